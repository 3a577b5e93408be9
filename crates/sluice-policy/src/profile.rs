//! Site profiles (`policies/profiles/*.toml`): how one site lays out its extracts.
//!
//! A profile names the CSV dialect, the date formats, which of the site's columns carries each
//! canonical field, and maps the site's own codes (settings, statuses, sexes, analytes, units) onto
//! the canonical vocabulary. A new site is a new profile file; nothing about a layout is compiled in.

use crate::{AnalyteTable, PolicyError, PolicyText, Setting, Sex, Status};
use serde::Deserialize;
use std::collections::BTreeMap;
use std::path::Path;

#[derive(Clone, Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Profile {
    pub site: Site,
    pub format: Format,
    pub columns: Columns,
    pub codes: Codes,
    /// SHA-256 of the profile file, filled in by [`Profile::load`].
    #[serde(skip)]
    pub sha256: String,
    #[serde(skip)]
    pub path: std::path::PathBuf,
}

#[derive(Clone, Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Site {
    /// Short label recorded in stores and releases; never patient-level.
    pub label: String,
    #[serde(default)]
    pub description: String,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, Deserialize)]
pub enum Encoding {
    #[serde(rename = "utf-8")]
    Utf8,
    /// ISO-8859-1, read as its superset windows-1252 (the WHATWG reading of the label).
    #[serde(rename = "latin-1")]
    Latin1,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum LineEnding {
    Lf,
    Crlf,
}

#[derive(Clone, Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Format {
    /// One ASCII character, e.g. "," ";" "|" or "\t".
    pub delimiter: String,
    #[serde(default = "default_quote")]
    pub quote: String,
    pub encoding: Encoding,
    /// Whether the first line names the columns. Without a header, columns are given as 1-based
    /// positions ("3") in `[columns]`.
    #[serde(default = "yes")]
    pub header: bool,
    /// Whether files start with a byte-order mark (writers add one; readers skip one either way).
    #[serde(default)]
    pub bom: bool,
    /// Line ending the site writes; readers accept both.
    #[serde(default = "default_line_ending")]
    pub line_ending: LineEnding,
    /// strftime-style date format, e.g. "%Y-%m-%d" or "%d/%m/%Y".
    pub date_format: String,
    /// strftime-style date-time format, e.g. "%Y-%m-%d %H:%M".
    pub datetime_format: String,
}

fn default_quote() -> String {
    "\"".into()
}
fn yes() -> bool {
    true
}
fn default_line_ending() -> LineEnding {
    LineEnding::Lf
}

impl Format {
    pub fn delimiter_byte(&self) -> u8 {
        self.delimiter.as_bytes()[0]
    }
    pub fn quote_byte(&self) -> u8 {
        self.quote.as_bytes()[0]
    }
}

/// Which site column carries each canonical field.
#[derive(Clone, Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Columns {
    pub patient_id: String,
    #[serde(default)]
    pub local_patient_id: Option<String>,
    pub birth_date: String,
    pub sex: String,
    pub home_postcode: String,
    pub practice_code: String,
    pub specimen_id: String,
    pub collected_at: String,
    #[serde(default)]
    pub reported_at: Option<String>,
    pub setting: String,
    pub clinical_notes: String,
    pub analyte: String,
    pub value: String,
    pub unit: String,
    pub status: String,
}

impl Columns {
    /// (canonical field, site column) for every field the profile maps, in a fixed order.
    pub fn mapped(&self) -> Vec<(Field, &str)> {
        let mut v = vec![
            (Field::PatientId, self.patient_id.as_str()),
            (Field::BirthDate, self.birth_date.as_str()),
            (Field::Sex, self.sex.as_str()),
            (Field::HomePostcode, self.home_postcode.as_str()),
            (Field::PracticeCode, self.practice_code.as_str()),
            (Field::SpecimenId, self.specimen_id.as_str()),
            (Field::CollectedAt, self.collected_at.as_str()),
            (Field::Setting, self.setting.as_str()),
            (Field::ClinicalNotes, self.clinical_notes.as_str()),
            (Field::Analyte, self.analyte.as_str()),
            (Field::Value, self.value.as_str()),
            (Field::Unit, self.unit.as_str()),
            (Field::Status, self.status.as_str()),
        ];
        if let Some(c) = &self.local_patient_id {
            v.insert(1, (Field::LocalPatientId, c.as_str()));
        }
        if let Some(c) = &self.reported_at {
            v.push((Field::ReportedAt, c.as_str()));
        }
        v
    }
}

/// The canonical fields an extract row carries, whatever a site calls its columns.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Field {
    PatientId,
    LocalPatientId,
    BirthDate,
    Sex,
    HomePostcode,
    PracticeCode,
    SpecimenId,
    CollectedAt,
    ReportedAt,
    Setting,
    ClinicalNotes,
    Analyte,
    Value,
    Unit,
    Status,
}

impl std::fmt::Display for Field {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.name())
    }
}

impl Field {
    pub const COUNT: usize = 15;

    /// The field's name as used in profiles (`[columns]` keys) and in messages.
    pub fn name(self) -> &'static str {
        match self {
            Field::PatientId => "patient_id",
            Field::LocalPatientId => "local_patient_id",
            Field::BirthDate => "birth_date",
            Field::Sex => "sex",
            Field::HomePostcode => "home_postcode",
            Field::PracticeCode => "practice_code",
            Field::SpecimenId => "specimen_id",
            Field::CollectedAt => "collected_at",
            Field::ReportedAt => "reported_at",
            Field::Setting => "setting",
            Field::ClinicalNotes => "clinical_notes",
            Field::Analyte => "analyte",
            Field::Value => "value",
            Field::Unit => "unit",
            Field::Status => "status",
        }
    }
}

/// Maps from the site's own codes to canonical terms. Codes are matched after trimming; matching
/// is exact (case-sensitive) so that a profile states every spelling it accepts.
#[derive(Clone, Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Codes {
    pub setting: BTreeMap<String, Setting>,
    pub status: BTreeMap<String, Status>,
    pub sex: BTreeMap<String, Sex>,
    /// Local analyte code → canonical analyte identifier from `policies/analytes.toml`.
    pub analyte: BTreeMap<String, String>,
    /// Local unit text → UCUM unit.
    pub unit: BTreeMap<String, String>,
}

impl Profile {
    pub fn load(path: &Path) -> Result<Self, PolicyError> {
        let text = PolicyText::read(path)?;
        let mut p: Profile = text.parse()?;
        p.sha256 = text.sha256;
        p.path = path.to_path_buf();
        p.validate()?;
        Ok(p)
    }

    fn validate(&self) -> Result<(), PolicyError> {
        let path = &self.path;
        let one_ascii = |s: &str| s.len() == 1 && s.is_ascii();
        if !one_ascii(&self.format.delimiter) {
            return Err(PolicyError::invalid(
                path,
                "format.delimiter",
                format!(
                    "must be one ASCII character, got {:?}",
                    self.format.delimiter
                ),
            ));
        }
        if !one_ascii(&self.format.quote) {
            return Err(PolicyError::invalid(
                path,
                "format.quote",
                format!("must be one ASCII character, got {:?}", self.format.quote),
            ));
        }
        if self.format.quote == self.format.delimiter {
            return Err(PolicyError::invalid(
                path,
                "format.quote",
                "must differ from the delimiter",
            ));
        }
        if self.format.bom && self.format.encoding != Encoding::Utf8 {
            return Err(PolicyError::invalid(
                path,
                "format.bom",
                "a byte-order mark only exists for utf-8 files",
            ));
        }
        if self.site.label.is_empty()
            || !self
                .site
                .label
                .bytes()
                .all(|b| b.is_ascii_alphanumeric() || b == b'-' || b == b'_')
        {
            return Err(PolicyError::invalid(
                path,
                "site.label",
                "must be non-empty letters, digits, '-' or '_'",
            ));
        }
        let mut seen = BTreeMap::new();
        for (field, col) in self.columns.mapped() {
            if col.trim().is_empty() {
                return Err(PolicyError::invalid(
                    path,
                    format!("columns.{field}"),
                    "is empty",
                ));
            }
            if !self.format.header && col.parse::<usize>().map_or(true, |n| n == 0) {
                return Err(PolicyError::invalid(
                    path,
                    format!("columns.{field}"),
                    "without a header row, columns are 1-based positions",
                ));
            }
            if let Some(other) = seen.insert(col.to_string(), field) {
                return Err(PolicyError::invalid(
                    path,
                    format!("columns.{field}"),
                    format!("column {col:?} is already mapped to {other}"),
                ));
            }
        }
        Ok(())
    }

    /// Checks that every analyte code maps to a known analyte and every unit either is an
    /// analyte's canonical unit or one it converts from.
    pub fn check_against(&self, analytes: &AnalyteTable) -> Result<(), PolicyError> {
        for (local, id) in &self.codes.analyte {
            if analytes.get(id).is_none() {
                return Err(PolicyError::invalid(
                    &self.path,
                    format!("codes.analyte.{local}"),
                    format!("unknown analyte {id:?} (not in the analyte table)"),
                ));
            }
        }
        for (local, ucum) in &self.codes.unit {
            let known = analytes
                .by_id
                .values()
                .any(|a| &a.unit == ucum || a.convert.iter().any(|c| &c.from == ucum));
            if !known {
                return Err(PolicyError::invalid(
                    &self.path,
                    format!("codes.unit.{local}"),
                    format!("unit {ucum:?} is not used by any analyte"),
                ));
            }
        }
        Ok(())
    }

    /// The first local code that maps to each canonical term; writers of synthetic extracts use it.
    pub fn local_code<'a, T: PartialEq>(
        map: &'a BTreeMap<String, T>,
        value: &T,
    ) -> Option<&'a str> {
        map.iter()
            .find(|(_, v)| *v == value)
            .map(|(k, _)| k.as_str())
    }
}
