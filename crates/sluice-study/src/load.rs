//! Reading the linked store for a study: the current rows of every partition, projected to the
//! columns a study needs and filtered in Rust as each file is decoded, in parallel over files.
//!
//! Two passes keep memory small at regional scale: the first reads only identifiers, times and
//! tags (to find monitoring events and exclusions, hence the cohort); the second reads results,
//! only for the cohort's patients (or, for a population study, only for the study's analytes).

use crate::MeasureError;
use polars::prelude::*;
use rayon::prelude::*;
use sluice_link::store::Manifest;
use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};

pub struct StoreFiles {
    pub manifest: Manifest,
    pub manifest_sha256: String,
    pub files: Vec<PathBuf>,
}

impl StoreFiles {
    pub fn open(store: &Path) -> Result<Self, MeasureError> {
        let manifest = Manifest::load(store)
            .map_err(|e| MeasureError::Store(e.to_string()))?
            .ok_or_else(|| {
                MeasureError::Store(format!(
                    "{}: no store here (manifest.json is missing); run sluice link first",
                    store.display()
                ))
            })?;
        let path = Manifest::path(store);
        let bytes = std::fs::read(&path).map_err(|source| MeasureError::Io {
            path: path.clone(),
            source,
        })?;
        let files = manifest
            .partitions
            .iter()
            .map(|p| store.join(&p.file))
            .collect();
        Ok(StoreFiles {
            manifest,
            manifest_sha256: sluice_aggregate::sha256_hex(&bytes),
            files,
        })
    }
}

fn read(path: &Path, columns: &[String]) -> Result<DataFrame, MeasureError> {
    let pe = |source: PolarsError| MeasureError::Polars {
        path: path.to_path_buf(),
        source,
    };
    let file = std::fs::File::open(path).map_err(|source| MeasureError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    ParquetReader::new(file)
        .with_columns(Some(columns.to_vec()))
        .finish()
        .map_err(pe)
}

fn ms_to_minutes(c: &Column, path: &Path) -> Result<Vec<i64>, MeasureError> {
    let pe = |source: PolarsError| MeasureError::Polars {
        path: path.to_path_buf(),
        source,
    };
    let c = c.cast(&DataType::Int64).map_err(pe)?;
    Ok(c.i64()
        .map_err(pe)?
        .iter()
        .map(|v| v.unwrap_or(i64::MIN).div_euclid(60_000))
        .collect())
}

fn bools(df: &DataFrame, name: &str, path: &Path) -> Result<Vec<bool>, MeasureError> {
    let pe = |source: PolarsError| MeasureError::Polars {
        path: path.to_path_buf(),
        source,
    };
    Ok(df
        .column(name)
        .map_err(pe)?
        .bool()
        .map_err(pe)?
        .iter()
        .map(|b| b.unwrap_or(false))
        .collect())
}

fn u64s(df: &DataFrame, name: &str, path: &Path) -> Result<Vec<u64>, MeasureError> {
    let pe = |source: PolarsError| MeasureError::Polars {
        path: path.to_path_buf(),
        source,
    };
    Ok(df
        .column(name)
        .map_err(pe)?
        .u64()
        .map_err(pe)?
        .iter()
        .map(|v| v.unwrap_or(0))
        .collect())
}

/// A specimen carrying the monitoring marker and every drug tag.
#[derive(Clone, Copy, Debug)]
pub struct Event {
    pub patient: u64,
    pub specimen: u64,
    pub minute: i64,
}

/// What the first pass finds.
pub struct Tagged {
    pub marker_patients: HashSet<u64>,
    pub events: Vec<Event>,
    pub excluded: HashSet<u64>,
}

pub struct TagQuery<'a> {
    pub marker: &'a str,
    pub drugs: &'a [String],
    pub exclude: &'a [String],
    /// Exclusion look-back, in minutes since 1970 [from, to).
    pub exclude_span: (i64, i64),
}

pub fn tagged(files: &[PathBuf], q: &TagQuery<'_>) -> Result<Tagged, MeasureError> {
    let tag = |t: &str| format!("tag_{t}");
    let mut cols: Vec<String> = ["patient", "specimen", "collected_at", "current"]
        .map(String::from)
        .to_vec();
    cols.push(tag(q.marker));
    cols.extend(q.drugs.iter().map(|t| tag(t)));
    cols.extend(q.exclude.iter().map(|t| tag(t)));
    cols.dedup();
    let parts: Vec<Tagged> = files
        .par_iter()
        .map(|path| -> Result<Tagged, MeasureError> {
            let df = read(path, &cols)?;
            let patient = u64s(&df, "patient", path)?;
            let specimen = u64s(&df, "specimen", path)?;
            let current = bools(&df, "current", path)?;
            let minute = ms_to_minutes(
                df.column("collected_at")
                    .map_err(|source| MeasureError::Polars {
                        path: path.clone(),
                        source,
                    })?,
                path,
            )?;
            let marker = bools(&df, &tag(q.marker), path)?;
            let drugs: Vec<Vec<bool>> = q
                .drugs
                .iter()
                .map(|t| bools(&df, &tag(t), path))
                .collect::<Result<_, _>>()?;
            let excl: Vec<Vec<bool>> = q
                .exclude
                .iter()
                .map(|t| bools(&df, &tag(t), path))
                .collect::<Result<_, _>>()?;
            let mut out = Tagged {
                marker_patients: HashSet::new(),
                events: Vec::new(),
                excluded: HashSet::new(),
            };
            let mut last_specimen = None;
            for i in 0..patient.len() {
                if !current[i] {
                    continue;
                }
                if excl.iter().any(|e| e[i])
                    && minute[i] >= q.exclude_span.0
                    && minute[i] < q.exclude_span.1
                {
                    out.excluded.insert(patient[i]);
                }
                if marker[i] {
                    out.marker_patients.insert(patient[i]);
                    // Rows of a specimen are adjacent (partitions are sorted by patient, time,
                    // specimen), so one event per specimen needs only the previous specimen.
                    if drugs.iter().all(|d| d[i]) && last_specimen != Some(specimen[i]) {
                        out.events.push(Event {
                            patient: patient[i],
                            specimen: specimen[i],
                            minute: minute[i],
                        });
                        last_specimen = Some(specimen[i]);
                    }
                }
            }
            Ok(out)
        })
        .collect::<Result<_, _>>()?;
    let mut all = Tagged {
        marker_patients: HashSet::new(),
        events: Vec::new(),
        excluded: HashSet::new(),
    };
    for p in parts {
        all.marker_patients.extend(p.marker_patients);
        all.events.extend(p.events);
        all.excluded.extend(p.excluded);
    }
    // A specimen's rows all sit in one partition, but sort and dedupe anyway so the order never
    // depends on the thread schedule.
    all.events
        .sort_by_key(|e| (e.patient, e.minute, e.specimen));
    all.events.dedup_by_key(|e| e.specimen);
    Ok(all)
}

/// One result row kept for a study.
#[derive(Clone, Copy, Debug)]
pub struct Result_ {
    pub patient: u64,
    pub specimen: u64,
    pub minute: i64,
    /// Index into the study's analyte list.
    pub analyte: u16,
    pub value: f64,
    pub setting: u8,
    pub age: u8,
    pub sex: u8,
    /// The row's specimen is a monitoring event (marker and drug tags).
    pub event: bool,
    pub distance_km: f32,
}

pub const SETTINGS: [&str; 4] = ["community", "outpatient", "inpatient", "emergency"];
pub const SEXES: [&str; 3] = ["female", "male", "unknown"];

pub struct ResultQuery<'a> {
    /// Analyte ids to keep, in the order their indices refer to.
    pub analytes: &'a [String],
    /// Keep only these patients (a cohort); `None` keeps everyone.
    pub patients: Option<&'a HashSet<u64>>,
    /// Keep rows collected in [from, to) minutes.
    pub span: (i64, i64),
    pub marker: Option<&'a str>,
    pub drugs: &'a [String],
}

pub fn results(files: &[PathBuf], q: &ResultQuery<'_>) -> Result<Vec<Result_>, MeasureError> {
    let tag = |t: &str| format!("tag_{t}");
    let mut cols: Vec<String> = [
        "patient",
        "specimen",
        "collected_at",
        "current",
        "setting",
        "analyte",
        "value",
        "age_years",
        "sex",
        "distance_km",
    ]
    .map(String::from)
    .to_vec();
    if let Some(m) = q.marker {
        cols.push(tag(m));
        cols.extend(q.drugs.iter().map(|t| tag(t)));
    }
    let index: HashMap<&str, u16> = q
        .analytes
        .iter()
        .enumerate()
        .map(|(i, a)| (a.as_str(), i as u16))
        .collect();
    let parts: Vec<Vec<Result_>> = files
        .par_iter()
        .map(|path| -> Result<Vec<Result_>, MeasureError> {
            let pe = |source: PolarsError| MeasureError::Polars {
                path: path.clone(),
                source,
            };
            let df = read(path, &cols)?;
            let patient = u64s(&df, "patient", path)?;
            let specimen = u64s(&df, "specimen", path)?;
            let current = bools(&df, "current", path)?;
            let minute = ms_to_minutes(df.column("collected_at").map_err(pe)?, path)?;
            let analyte = df.column("analyte").map_err(pe)?.str().map_err(pe)?.clone();
            let value = df.column("value").map_err(pe)?.f64().map_err(pe)?.clone();
            let setting = df.column("setting").map_err(pe)?.str().map_err(pe)?.clone();
            let sex = df.column("sex").map_err(pe)?.str().map_err(pe)?.clone();
            let age = df
                .column("age_years")
                .map_err(pe)?
                .u8()
                .map_err(pe)?
                .clone();
            let dist = df
                .column("distance_km")
                .map_err(pe)?
                .f32()
                .map_err(pe)?
                .clone();
            let flags: Vec<Vec<bool>> = match q.marker {
                Some(m) => std::iter::once(m)
                    .chain(q.drugs.iter().map(String::as_str))
                    .map(|t| bools(&df, &tag(t), path))
                    .collect::<Result<_, _>>()?,
                None => Vec::new(),
            };
            let mut out = Vec::new();
            for i in 0..patient.len() {
                if !current[i] || minute[i] < q.span.0 || minute[i] >= q.span.1 {
                    continue;
                }
                if let Some(p) = q.patients
                    && !p.contains(&patient[i])
                {
                    continue;
                }
                let Some(a) = analyte.get(i).and_then(|a| index.get(a)) else {
                    continue;
                };
                let Some(v) = value.get(i) else { continue };
                let setting = setting
                    .get(i)
                    .and_then(|s| SETTINGS.iter().position(|x| *x == s))
                    .unwrap_or(0) as u8;
                let sex = sex
                    .get(i)
                    .and_then(|s| SEXES.iter().position(|x| *x == s))
                    .unwrap_or(2) as u8;
                out.push(Result_ {
                    patient: patient[i],
                    specimen: specimen[i],
                    minute: minute[i],
                    analyte: *a,
                    value: v,
                    setting,
                    age: age.get(i).unwrap_or(0),
                    sex,
                    event: !flags.is_empty() && flags.iter().all(|f| f[i]),
                    distance_km: dist.get(i).unwrap_or(f32::NAN),
                });
            }
            Ok(out)
        })
        .collect::<Result<_, _>>()?;
    let mut all: Vec<Result_> = parts.into_iter().flatten().collect();
    all.sort_by_key(|r| (r.patient, r.minute, r.specimen, r.analyte));
    Ok(all)
}
