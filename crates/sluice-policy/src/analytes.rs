//! The canonical analyte table (`policies/analytes.toml`): identifier, LOINC code, name, UCUM unit
//! and the unit conversions accepted from sites that report in other units.

use crate::{PolicyError, PolicyText};
use serde::Deserialize;
use std::collections::BTreeMap;
use std::path::Path;

#[derive(Clone, Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Analyte {
    pub name: String,
    pub loinc: String,
    /// Canonical unit, written as UCUM.
    pub unit: String,
    /// Other UCUM units a site may report in, each with the factor that turns a value in that unit
    /// into the canonical unit.
    #[serde(default)]
    pub convert: Vec<Conversion>,
}

#[derive(Clone, Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Conversion {
    pub from: String,
    pub factor: f64,
    #[serde(default)]
    pub source: Option<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct File {
    analytes: BTreeMap<String, Analyte>,
}

/// All analytes sluice knows, keyed by canonical identifier (e.g. `creatinine`).
#[derive(Clone, Debug)]
pub struct AnalyteTable {
    pub by_id: BTreeMap<String, Analyte>,
    pub sha256: String,
}

impl AnalyteTable {
    pub fn load(path: &Path) -> Result<Self, PolicyError> {
        let text = PolicyText::read(path)?;
        let file: File = text.parse()?;
        for (id, a) in &file.analytes {
            if !id
                .bytes()
                .all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'_')
            {
                return Err(PolicyError::invalid(
                    path,
                    format!("analytes.{id}"),
                    "identifiers are lower-case letters, digits and underscores",
                ));
            }
            for (i, c) in a.convert.iter().enumerate() {
                if !(c.factor.is_finite() && c.factor > 0.0) {
                    return Err(PolicyError::invalid(
                        path,
                        format!("analytes.{id}.convert[{i}].factor"),
                        format!("must be a positive number, got {}", c.factor),
                    ));
                }
            }
        }
        Ok(Self {
            by_id: file.analytes,
            sha256: text.sha256,
        })
    }

    pub fn get(&self, id: &str) -> Option<&Analyte> {
        self.by_id.get(id)
    }

    /// The factor that converts a value reported in `unit` (UCUM) to the analyte's canonical
    /// unit: 1 for the canonical unit itself, `None` when the unit is not accepted.
    pub fn factor(&self, id: &str, unit: &str) -> Option<f64> {
        let a = self.by_id.get(id)?;
        if a.unit == unit {
            return Some(1.0);
        }
        a.convert.iter().find(|c| c.from == unit).map(|c| c.factor)
    }

    /// Position of each analyte in a stable order, used as a compact code in stored tables.
    pub fn ids(&self) -> Vec<&str> {
        self.by_id.keys().map(String::as_str).collect()
    }
}
