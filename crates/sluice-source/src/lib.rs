//! Reading a site's extract files through its profile.
//!
//! One file at a time: the bytes are checked against the profile's encoding (and decoded from
//! Latin-1 when the profile says so), split as CSV in the profile's dialect, and every record is
//! either handed on as a typed, validated [`Row`] — identifiers still raw, for the linker to
//! pseudonymise at once — or set aside as a [`Quarantined`] entry naming line, field and reason,
//! with the raw line. A problem with the file as a whole (unreadable, wrong encoding, a column
//! the profile names is missing) is a [`SourceError`] and nothing of the file is taken.

pub mod dates;

use dates::DateFormat;
use sha2::{Digest, Sha256};
use sluice_policy::nhs::{self, NhsProblem};
use sluice_policy::profile::Encoding;
use sluice_policy::{AnalyteTable, Profile, Setting, Sex, Status};
use std::path::{Path, PathBuf};

#[derive(Debug, thiserror::Error)]
pub enum SourceError {
    #[error("cannot read {path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error(
        "{path}: line {line}: not valid UTF-8 (byte {byte}); the profile says utf-8 — is the file in another encoding?"
    )]
    NotUtf8 { path: PathBuf, line: u64, byte: u64 },
    #[error(
        "{path}: line {line}: looks like UTF-8 (multi-byte sequence) but the profile says latin-1"
    )]
    LooksUtf8 { path: PathBuf, line: u64 },
    #[error(
        "{path}: line 1: column {column:?} for field {field} is not in the header (found: {found})"
    )]
    MissingColumn {
        path: PathBuf,
        field: &'static str,
        column: String,
        found: String,
    },
    #[error("{path}: the file is empty (no header row)")]
    Empty { path: PathBuf },
    #[error("{path}: line {line}: {message}")]
    Csv {
        path: PathBuf,
        line: u64,
        message: String,
    },
    #[error("profile {profile}: {message}")]
    Profile { profile: PathBuf, message: String },
}

/// Who the row belongs to, as found in the extract.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum PatientRef<'a> {
    Nhs([u8; 10]),
    /// The profile's fallback local identifier, used when the NHS number is blank.
    Local(&'a str),
}

/// A numeric result, a qualified bound ("<5" → Lt, 5), or a text result.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Value<'a> {
    Num(f64),
    Qualified(Qualifier, f64),
    Text(&'a str),
    /// Cancelled results carry no value.
    None,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Qualifier {
    Lt,
    Le,
    Gt,
    Ge,
}

impl Qualifier {
    pub fn as_str(self) -> &'static str {
        match self {
            Qualifier::Lt => "<",
            Qualifier::Le => "<=",
            Qualifier::Gt => ">",
            Qualifier::Ge => ">=",
        }
    }
}

/// One validated result row. Identifiers and free text are borrowed from the file and must be
/// pseudonymised or reduced by the caller before anything is kept.
#[derive(Clone, Debug)]
pub struct Row<'a> {
    pub line: u64,
    /// Byte range of the raw record in the decoded text (for quarantining it later).
    pub span: (usize, usize),
    pub patient: PatientRef<'a>,
    /// Days since 1970-01-01; `None` when blank.
    pub birth_day: Option<i64>,
    pub sex: Sex,
    pub postcode: &'a str,
    pub practice: &'a str,
    pub specimen: &'a str,
    /// Minutes since 1970-01-01 00:00.
    pub collected: i64,
    pub reported: Option<i64>,
    pub setting: Setting,
    pub notes: &'a str,
    /// Index into the analyte table's sorted identifiers.
    pub analyte: u16,
    /// In the analyte's canonical unit.
    pub value: Value<'a>,
    pub status: Status,
}

/// A record set aside, with why.
#[derive(Clone, Debug)]
pub struct Quarantined {
    pub line: u64,
    pub field: String,
    pub reason: String,
    pub raw: Vec<u8>,
}

/// What reading one file produced, apart from the rows handed to the caller.
#[derive(Clone, Debug, Default)]
pub struct FileReport {
    pub rows_read: u64,
    pub quarantined: Vec<Quarantined>,
}

use sluice_policy::profile::Field as F;
const NF: usize = F::COUNT;

/// A code map searched by a linear scan. Site vocabularies have a few to a few dozen codes, for
/// which comparing lengths and bytes beats hashing the key on every row.
struct SmallMap<'p, T> {
    entries: Vec<(&'p str, T)>,
}

impl<'p, T: Copy> SmallMap<'p, T> {
    fn new(it: impl IntoIterator<Item = (&'p str, T)>) -> Self {
        Self {
            entries: it.into_iter().collect(),
        }
    }
    fn get(&self, k: &str) -> Option<T> {
        self.entries
            .iter()
            .find(|(key, _)| key.len() == k.len() && *key == k)
            .map(|(_, v)| *v)
    }
}

/// A profile prepared for reading: formats compiled, code maps resolved to indices.
pub struct Source<'p> {
    date: DateFormat,
    datetime: DateFormat,
    encoding: Encoding,
    format: &'p sluice_policy::profile::Format,
    columns: &'p sluice_policy::profile::Columns,
    setting: SmallMap<'p, Setting>,
    status: SmallMap<'p, Status>,
    sex: SmallMap<'p, Sex>,
    analyte_index: SmallMap<'p, u16>,
    /// Per (local unit text) the UCUM unit.
    units: SmallMap<'p, &'p str>,
    /// factor[analyte] = [(ucum, factor)]: conversions to the canonical unit.
    factors: Vec<Vec<(String, f64)>>,
    analyte_ids: Vec<String>,
}

impl<'p> Source<'p> {
    pub fn new(profile: &'p Profile, analytes: &AnalyteTable) -> Result<Self, SourceError> {
        let err = |message: String| SourceError::Profile {
            profile: profile.path.clone(),
            message,
        };
        let date = DateFormat::new(&profile.format.date_format, false)
            .map_err(|m| err(format!("format.date_format: {m}")))?;
        let datetime = DateFormat::new(&profile.format.datetime_format, true)
            .map_err(|m| err(format!("format.datetime_format: {m}")))?;
        profile
            .check_against(analytes)
            .map_err(|e| err(e.to_string()))?;
        let analyte_ids: Vec<String> = analytes.ids().into_iter().map(str::to_string).collect();
        let analyte_index = SmallMap::new(profile.codes.analyte.iter().map(|(local, id)| {
            let i = analyte_ids
                .iter()
                .position(|a| a == id)
                .expect("checked above");
            (local.as_str(), i as u16)
        }));
        let factors = analyte_ids
            .iter()
            .map(|id| {
                let a = analytes.get(id).expect("listed");
                let mut m = vec![(a.unit.clone(), 1.0)];
                m.extend(a.convert.iter().map(|c| (c.from.clone(), c.factor)));
                m
            })
            .collect();
        let codes = &profile.codes;
        Ok(Self {
            date,
            datetime,
            encoding: profile.format.encoding,
            format: &profile.format,
            columns: &profile.columns,
            setting: SmallMap::new(codes.setting.iter().map(|(k, v)| (k.as_str(), *v))),
            status: SmallMap::new(codes.status.iter().map(|(k, v)| (k.as_str(), *v))),
            sex: SmallMap::new(codes.sex.iter().map(|(k, v)| (k.as_str(), *v))),
            analyte_index,
            units: SmallMap::new(codes.unit.iter().map(|(k, v)| (k.as_str(), v.as_str()))),
            factors,
            analyte_ids,
        })
    }

    pub fn analyte_ids(&self) -> &[String] {
        &self.analyte_ids
    }

    pub fn datetime_format(&self) -> &DateFormat {
        &self.datetime
    }

    /// Reads one file, calling `each` for every valid row in file order. Returns the count of
    /// records read (header excluded) and the quarantined ones, or an error for the whole file.
    pub fn read_file(
        &self,
        path: &Path,
        mut each: impl FnMut(Row<'_>),
    ) -> Result<(FileReport, String), SourceError> {
        let bytes = std::fs::read(path).map_err(|source| SourceError::Io {
            path: path.to_path_buf(),
            source,
        })?;
        let sha256 = hex::encode(Sha256::digest(&bytes));
        let text = decode(path, bytes, self.encoding)?;
        let report = self.read_text(path, &text, &mut each)?;
        Ok((report, sha256))
    }

    /// Reads already decoded text (see [`decode`]); `path` is only used in messages.
    pub fn read_text(
        &self,
        path: &Path,
        text: &str,
        mut each: impl FnMut(Row<'_>),
    ) -> Result<FileReport, SourceError> {
        let f = self.format;
        let data = text.strip_prefix('\u{feff}').unwrap_or(text).as_bytes();
        let offset = text.len() - data.len();
        let mut rdr = csv::ReaderBuilder::new()
            .delimiter(f.delimiter_byte())
            .quote(f.quote_byte())
            .has_headers(false)
            .flexible(true)
            .from_reader(data);
        // String records validate UTF-8 once per record rather than once per field.
        let mut rec = csv::StringRecord::new();
        let cols = if f.header {
            let more = rdr.read_record(&mut rec).map_err(|e| csv_err(path, &e))?;
            if !more {
                return Err(SourceError::Empty {
                    path: path.to_path_buf(),
                });
            }
            let names: Vec<String> = rec.iter().map(|c| c.trim().to_string()).collect();
            self.columns_from_header(path, &names)?
        } else {
            self.columns_from_positions()
        };
        let width = if f.header {
            rec.len()
        } else {
            cols.iter().flatten().max().map_or(0, |m| m + 1)
        };
        let mut report = FileReport::default();
        let mut start = rdr.position().byte() as usize;
        loop {
            let line = rdr.position().line();
            let more = match rdr.read_record(&mut rec) {
                Ok(m) => m,
                Err(e) => return Err(csv_err(path, &e)),
            };
            if !more {
                break;
            }
            let end = rdr.position().byte() as usize;
            let raw = &data[start..end.min(data.len())];
            let raw_start = start;
            start = end;
            // A blank line between records is not a record.
            if rec.len() == 1 && rec.get(0).is_some_and(|c| c.trim().is_empty()) {
                continue;
            }
            report.rows_read += 1;
            match self.row(line, &rec, &cols, width) {
                Ok(mut row) => {
                    row.span = (raw_start + offset, raw_start + offset + trim_eol(raw).len());
                    each(row)
                }
                Err((field, reason)) => report.quarantined.push(Quarantined {
                    line,
                    field: field.to_string(),
                    reason,
                    raw: trim_eol(raw).to_vec(),
                }),
            }
        }
        Ok(report)
    }

    fn columns_from_header(
        &self,
        path: &Path,
        names: &[String],
    ) -> Result<[Option<usize>; NF], SourceError> {
        let mut cols = [None; NF];
        for (field, col) in self.columns.mapped() {
            match names.iter().position(|n| n == col) {
                Some(i) => cols[field as usize] = Some(i),
                None => {
                    return Err(SourceError::MissingColumn {
                        path: path.to_path_buf(),
                        field: field.name(),
                        column: col.to_string(),
                        found: names.join(", "),
                    });
                }
            }
        }
        Ok(cols)
    }

    fn columns_from_positions(&self) -> [Option<usize>; NF] {
        let mut cols = [None; NF];
        for (field, col) in self.columns.mapped() {
            cols[field as usize] = col.parse::<usize>().ok().map(|p| p - 1);
        }
        cols
    }

    /// Validates one record. The error names the canonical field and the reason.
    fn row<'r>(
        &self,
        line: u64,
        rec: &'r csv::StringRecord,
        cols: &[Option<usize>; NF],
        width: usize,
    ) -> Result<Row<'r>, (&'static str, String)> {
        if rec.len() != width {
            return Err(("", format!("expected {width} fields, found {}", rec.len())));
        }
        let get = |f: F| -> &'r str { cols[f as usize].and_then(|i| rec.get(i)).unwrap_or("") };
        let name = |f: F| f.name();

        let raw_nhs = get(F::PatientId);
        let patient = match nhs::parse(raw_nhs) {
            Ok(d) => PatientRef::Nhs(d),
            Err(NhsProblem::Blank) if cols[F::LocalPatientId as usize].is_some() => {
                let local = get(F::LocalPatientId).trim();
                if local.is_empty() {
                    return Err((
                        name(F::PatientId),
                        "blank NHS number and blank local identifier".into(),
                    ));
                }
                PatientRef::Local(local)
            }
            Err(p) => return Err((name(F::PatientId), p.as_str().to_string())),
        };
        let birth = get(F::BirthDate).trim();
        let birth_day = if birth.is_empty() {
            None
        } else {
            Some(
                self.date
                    .parse(birth)
                    .ok_or_else(|| (name(F::BirthDate), format!("cannot read date {birth:?}")))?,
            )
        };
        let sex_raw = get(F::Sex).trim();
        let sex = if sex_raw.is_empty() {
            Sex::Unknown
        } else {
            self.sex
                .get(sex_raw)
                .ok_or_else(|| (name(F::Sex), format!("unknown sex code {sex_raw:?}")))?
        };
        let specimen = get(F::SpecimenId).trim();
        if specimen.is_empty() {
            return Err((name(F::SpecimenId), "blank specimen identifier".into()));
        }
        let coll = get(F::CollectedAt);
        let collected = self.datetime.parse(coll).ok_or_else(|| {
            (
                name(F::CollectedAt),
                format!("cannot read date-time {:?}", coll.trim()),
            )
        })?;
        let reported = match cols[F::ReportedAt as usize] {
            None => None,
            Some(_) => {
                let r = get(F::ReportedAt).trim();
                if r.is_empty() {
                    None
                } else {
                    Some(self.datetime.parse(r).ok_or_else(|| {
                        (name(F::ReportedAt), format!("cannot read date-time {r:?}"))
                    })?)
                }
            }
        };
        let set_raw = get(F::Setting).trim();
        let setting = self.setting.get(set_raw).ok_or_else(|| {
            (
                name(F::Setting),
                format!("unknown setting code {set_raw:?}"),
            )
        })?;
        let st_raw = get(F::Status).trim();
        let status = self
            .status
            .get(st_raw)
            .ok_or_else(|| (name(F::Status), format!("unknown status code {st_raw:?}")))?;
        let an_raw = get(F::Analyte).trim();
        let analyte = self
            .analyte_index
            .get(an_raw)
            .ok_or_else(|| (name(F::Analyte), format!("unknown analyte code {an_raw:?}")))?;
        let v_raw = get(F::Value).trim();
        let value = if status == Status::Cancelled && v_raw.is_empty() {
            Value::None
        } else if v_raw.is_empty() {
            return Err((name(F::Value), "blank result".into()));
        } else {
            match parse_value(v_raw) {
                Value::Text(t) => Value::Text(t),
                v => {
                    let u_raw = get(F::Unit).trim();
                    let ucum = self
                        .units
                        .get(u_raw)
                        .ok_or_else(|| (name(F::Unit), format!("unknown unit {u_raw:?}")))?;
                    let factor = self.factors[analyte as usize]
                        .iter()
                        .find(|(u, _)| u == ucum)
                        .map(|(_, f)| *f)
                        .ok_or_else(|| {
                            (
                                name(F::Unit),
                                format!(
                                    "unit {ucum:?} is not accepted for {}",
                                    self.analyte_ids[analyte as usize]
                                ),
                            )
                        })?;
                    match v {
                        Value::Num(x) => Value::Num(x * factor),
                        Value::Qualified(q, x) => Value::Qualified(q, x * factor),
                        other => other,
                    }
                }
            }
        };
        Ok(Row {
            line,
            span: (0, 0),
            patient,
            birth_day,
            sex,
            postcode: get(F::HomePostcode).trim(),
            practice: get(F::PracticeCode).trim(),
            specimen,
            collected,
            reported,
            setting,
            notes: get(F::ClinicalNotes),
            analyte,
            value,
            status,
        })
    }
}

/// A number, a qualified bound, or else a text result (kept as text, never coerced).
pub fn parse_value(s: &str) -> Value<'_> {
    let (q, rest) = if let Some(r) = s.strip_prefix("<=") {
        (Some(Qualifier::Le), r)
    } else if let Some(r) = s.strip_prefix(">=") {
        (Some(Qualifier::Ge), r)
    } else if let Some(r) = s.strip_prefix('<') {
        (Some(Qualifier::Lt), r)
    } else if let Some(r) = s.strip_prefix('>') {
        (Some(Qualifier::Gt), r)
    } else {
        (None, s)
    };
    let rest = rest.trim();
    let numeric = !rest.is_empty()
        && rest.bytes().all(|b| {
            b.is_ascii_digit() || b == b'.' || b == b'-' || b == b'+' || b == b'e' || b == b'E'
        });
    match (numeric, rest.parse::<f64>()) {
        (true, Ok(x)) if x.is_finite() => match q {
            Some(q) => Value::Qualified(q, x),
            None => Value::Num(x),
        },
        _ => Value::Text(s),
    }
}

fn trim_eol(b: &[u8]) -> &[u8] {
    let mut e = b.len();
    while e > 0 && (b[e - 1] == b'\n' || b[e - 1] == b'\r') {
        e -= 1;
    }
    &b[..e]
}

fn csv_err(path: &Path, e: &csv::Error) -> SourceError {
    SourceError::Csv {
        path: path.to_path_buf(),
        line: e.position().map_or(0, |p| p.line()),
        message: e.to_string(),
    }
}

fn line_of(bytes: &[u8], offset: usize) -> u64 {
    1 + bytes[..offset].iter().filter(|&&b| b == b'\n').count() as u64
}

/// Checks and decodes a file's bytes as the profile's encoding says.
pub fn decode(path: &Path, bytes: Vec<u8>, encoding: Encoding) -> Result<String, SourceError> {
    match encoding {
        Encoding::Utf8 => String::from_utf8(bytes).map_err(|e| {
            let off = e.utf8_error().valid_up_to();
            let b = e.as_bytes();
            SourceError::NotUtf8 {
                path: path.to_path_buf(),
                line: line_of(b, off),
                byte: off as u64,
            }
        }),
        Encoding::Latin1 => {
            if !bytes.is_ascii() {
                // Text that is valid UTF-8 and uses multi-byte sequences was almost certainly
                // written as UTF-8; reading it as Latin-1 would garble every accented letter.
                if let Ok(s) = std::str::from_utf8(&bytes) {
                    let off = s.bytes().position(|b| b >= 0x80).unwrap_or(0);
                    return Err(SourceError::LooksUtf8 {
                        path: path.to_path_buf(),
                        line: line_of(&bytes, off),
                    });
                }
            }
            // Without BOM handling: encoding_rs would otherwise switch to UTF-8 on a UTF-8 BOM
            // and turn every Latin-1 byte above 0x7F into a replacement character.
            let body = bytes.strip_prefix(&[0xEF, 0xBB, 0xBF]).unwrap_or(&bytes);
            Ok(encoding_rs::WINDOWS_1252
                .decode_without_bom_handling(body)
                .0
                .into_owned())
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn values() {
        assert_eq!(parse_value("4.5"), Value::Num(4.5));
        assert_eq!(parse_value(">90"), Value::Qualified(Qualifier::Gt, 90.0));
        assert_eq!(parse_value("<= 5"), Value::Qualified(Qualifier::Le, 5.0));
        assert_eq!(parse_value("HAEMOLYSED"), Value::Text("HAEMOLYSED"));
        assert_eq!(parse_value("1..2"), Value::Text("1..2"));
        assert_eq!(parse_value("inf"), Value::Text("inf"));
        assert_eq!(parse_value("NaN"), Value::Text("NaN"));
    }
}
