//! Distance from home to the registered GP practice.
//!
//! The site supplies two CSV tables: postcode centroids (`postcode,latitude,longitude`) and
//! practices (`practice_code,latitude,longitude`, or `practice_code,postcode` to place a practice
//! at its postcode's centroid). Distances are great-circle (haversine) on a sphere of the IUGG
//! mean Earth radius, 6371.0088 km (common practice); only the distance is stored, never the
//! postcode.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

/// IUGG mean Earth radius R1 in kilometres.
pub const EARTH_RADIUS_KM: f64 = 6371.0088;

#[derive(Debug, thiserror::Error)]
pub enum GeoError {
    #[error("cannot read {path}: {message}")]
    Read { path: PathBuf, message: String },
    #[error("{path}: line 1: missing column {column:?} (found: {found})")]
    Column {
        path: PathBuf,
        column: &'static str,
        found: String,
    },
    #[error("{path}: line {line}: field {field}: {message}")]
    Field {
        path: PathBuf,
        line: u64,
        field: &'static str,
        message: String,
    },
}

/// Great-circle distance in km between two (latitude, longitude) points in degrees.
pub fn haversine_km(a: (f64, f64), b: (f64, f64)) -> f64 {
    let (la1, lo1) = (a.0.to_radians(), a.1.to_radians());
    let (la2, lo2) = (b.0.to_radians(), b.1.to_radians());
    let h = ((la2 - la1) / 2.0).sin().powi(2)
        + la1.cos() * la2.cos() * ((lo2 - lo1) / 2.0).sin().powi(2);
    2.0 * EARTH_RADIUS_KM * h.sqrt().min(1.0).asin()
}

/// Upper case without spaces, so "qv9 4wq" and "QV94WQ" are the same postcode.
pub fn normalise_postcode(s: &str) -> String {
    s.chars()
        .filter(|c| !c.is_whitespace())
        .flat_map(char::to_uppercase)
        .collect()
}

/// The outward code (area and district, "QV9"), the only part of a postcode a study may keep.
pub fn outward(s: &str) -> Option<String> {
    let n = normalise_postcode(s);
    (n.len() >= 5 && n.len() <= 7).then(|| n[..n.len() - 3].to_string())
}

#[derive(Default)]
pub struct Geo {
    postcodes: HashMap<String, (f64, f64)>,
    practices: HashMap<String, (f64, f64)>,
}

fn open(path: &Path) -> Result<(csv::Reader<std::fs::File>, Vec<String>), GeoError> {
    let mut r = csv::Reader::from_path(path).map_err(|e| GeoError::Read {
        path: path.to_path_buf(),
        message: e.to_string(),
    })?;
    let h = r
        .headers()
        .map_err(|e| GeoError::Read {
            path: path.to_path_buf(),
            message: e.to_string(),
        })?
        .iter()
        .map(|s| s.trim().trim_start_matches('\u{feff}').to_lowercase())
        .collect();
    Ok((r, h))
}

fn col(path: &Path, h: &[String], name: &'static str) -> Result<usize, GeoError> {
    h.iter()
        .position(|x| x == name)
        .ok_or_else(|| GeoError::Column {
            path: path.to_path_buf(),
            column: name,
            found: h.join(", "),
        })
}

fn coord(
    path: &Path,
    line: u64,
    field: &'static str,
    s: &str,
    limit: f64,
) -> Result<f64, GeoError> {
    let v: f64 = s.trim().parse().map_err(|_| GeoError::Field {
        path: path.to_path_buf(),
        line,
        field,
        message: format!("{s:?} is not a number"),
    })?;
    if !(v.is_finite() && v.abs() <= limit) {
        return Err(GeoError::Field {
            path: path.to_path_buf(),
            line,
            field,
            message: format!("{v} is out of range"),
        });
    }
    Ok(v)
}

impl Geo {
    pub fn load(postcodes: &Path, practices: &Path) -> Result<Self, GeoError> {
        let mut g = Geo::default();
        let (mut r, h) = open(postcodes)?;
        let (pc, la, lo) = (
            col(postcodes, &h, "postcode")?,
            col(postcodes, &h, "latitude")?,
            col(postcodes, &h, "longitude")?,
        );
        for rec in r.records() {
            let rec = rec.map_err(|e| GeoError::Read {
                path: postcodes.to_path_buf(),
                message: e.to_string(),
            })?;
            let line = rec.position().map_or(0, |p| p.line());
            let lat = coord(postcodes, line, "latitude", &rec[la], 90.0)?;
            let lon = coord(postcodes, line, "longitude", &rec[lo], 180.0)?;
            g.postcodes.insert(normalise_postcode(&rec[pc]), (lat, lon));
        }
        let (mut r, h) = open(practices)?;
        let code = col(practices, &h, "practice_code")?;
        let latlon = match (
            col(practices, &h, "latitude"),
            col(practices, &h, "longitude"),
        ) {
            (Ok(a), Ok(b)) => Some((a, b)),
            _ => None,
        };
        let ppc = if latlon.is_none() {
            Some(col(practices, &h, "postcode")?)
        } else {
            None
        };
        for rec in r.records() {
            let rec = rec.map_err(|e| GeoError::Read {
                path: practices.to_path_buf(),
                message: e.to_string(),
            })?;
            let line = rec.position().map_or(0, |p| p.line());
            let at = match (latlon, ppc) {
                (Some((a, b)), _) => (
                    coord(practices, line, "latitude", &rec[a], 90.0)?,
                    coord(practices, line, "longitude", &rec[b], 180.0)?,
                ),
                (None, Some(p)) => {
                    *g.postcodes
                        .get(&normalise_postcode(&rec[p]))
                        .ok_or_else(|| GeoError::Field {
                            path: practices.to_path_buf(),
                            line,
                            field: "postcode",
                            message: "not in the postcode table".into(),
                        })?
                }
                (None, None) => unreachable!("one of the two is required above"),
            };
            g.practices.insert(rec[code].trim().to_string(), at);
        }
        Ok(g)
    }

    pub fn is_empty(&self) -> bool {
        self.postcodes.is_empty()
    }

    /// Straight-line km from a home postcode to a practice; `None` when either is unknown.
    pub fn distance_km(&self, postcode: &str, practice: &str) -> Option<f64> {
        let home = self.postcodes.get(&normalise_postcode(postcode))?;
        let gp = self.practices.get(practice.trim())?;
        Some(haversine_km(*home, *gp))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn outward_codes() {
        assert_eq!(outward("QV9 4WQ").as_deref(), Some("QV9"));
        assert_eq!(outward("qv12 4wq").as_deref(), Some("QV12"));
        assert_eq!(outward("X"), None);
    }
}

#[cfg(test)]
mod distance_tests {
    use super::*;

    #[test]
    fn one_degree_of_latitude() {
        // Computed: one degree of a great circle is 2πR/360 = 111.19508 km for R = 6371.0088 km.
        let d = haversine_km((54.0, 2.0), (55.0, 2.0));
        assert!((d - 111.195_08).abs() < 1e-4, "{d}");
        assert_eq!(haversine_km((54.9, 2.6), (54.9, 2.6)), 0.0);
    }
}
