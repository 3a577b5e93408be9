//! Renders rows in a site's layout: the profile decides column names and order, dialect, date
//! formats, local codes and encoding. The generator therefore writes exactly what the same
//! profile reads, for any site.

use crate::Synth;
use crate::emit::{Fault, Row, Val, specimen_id};
use crate::model::ANALYTES;
use chrono::format::{Item, StrftimeItems};
use chrono::{DateTime, NaiveDate, NaiveDateTime};
use sluice_policy::profile::{Encoding, Field, LineEnding};
use sluice_policy::{AnalyteTable, Profile, Setting, Sex, Status};
use std::fmt::Write as _;

pub struct Layout {
    pub header: Vec<String>,
    /// Canonical field of each column; `None` for a column the profile does not map (written
    /// empty).
    pub fields: Vec<Option<Field>>,
    pub delimiter: u8,
    pub quote: u8,
    pub eol: &'static [u8],
    pub latin1: bool,
    pub has_local_id: bool,
    date_items: Vec<Item<'static>>,
    datetime_items: Vec<Item<'static>>,
    setting_codes: [Vec<String>; 4],
    status_codes: [String; 3],
    sex_codes: [String; 3],
    analyte_codes: Vec<String>,
    unit_codes: Vec<String>,
}

#[derive(Debug, thiserror::Error)]
pub enum LayoutError {
    #[error("profile {profile}: {message}")]
    Profile { profile: String, message: String },
}

impl Layout {
    pub fn new(profile: &Profile, analytes: &AnalyteTable) -> Result<Self, LayoutError> {
        let err = |message: String| LayoutError::Profile {
            profile: profile.path.display().to_string(),
            message,
        };
        let mapped = profile.columns.mapped();
        let (header, fields) = if profile.format.header {
            (
                mapped.iter().map(|(_, c)| c.to_string()).collect(),
                mapped.iter().map(|(f, _)| Some(*f)).collect(),
            )
        } else {
            let width = mapped
                .iter()
                .map(|(_, c)| c.parse::<usize>().unwrap_or(0))
                .max()
                .unwrap_or(0);
            let mut fields = vec![None; width];
            for (f, c) in &mapped {
                fields[c.parse::<usize>().unwrap_or(1) - 1] = Some(*f);
            }
            (Vec::new(), fields)
        };
        let codes = &profile.codes;
        let setting_codes = Setting::ALL.map(|s| {
            codes
                .setting
                .iter()
                .filter(|(_, v)| **v == s)
                .map(|(k, _)| k.clone())
                .collect::<Vec<_>>()
        });
        for (s, c) in Setting::ALL.iter().zip(&setting_codes) {
            if c.is_empty() {
                return Err(err(format!("no setting code maps to {}", s.as_str())));
            }
        }
        let one = |name: &str, code: Option<&str>| {
            code.map(str::to_string)
                .ok_or_else(|| err(format!("no code maps to {name}")))
        };
        let status_codes = [
            one("final", Profile::local_code(&codes.status, &Status::Final))?,
            one(
                "amended",
                Profile::local_code(&codes.status, &Status::Amended),
            )?,
            one(
                "cancelled",
                Profile::local_code(&codes.status, &Status::Cancelled),
            )?,
        ];
        let sex_codes = [
            one("female", Profile::local_code(&codes.sex, &Sex::Female))?,
            one("male", Profile::local_code(&codes.sex, &Sex::Male))?,
            one("unknown", Profile::local_code(&codes.sex, &Sex::Unknown))?,
        ];
        let mut analyte_codes = Vec::new();
        let mut unit_codes = Vec::new();
        for a in &ANALYTES {
            let canonical = analytes
                .get(a.id)
                .ok_or_else(|| err(format!("analyte {} is not in the analyte table", a.id)))?;
            analyte_codes.push(one(
                &format!("analyte {}", a.id),
                Profile::local_code(&codes.analyte, &a.id.to_string()),
            )?);
            unit_codes.push(one(
                &format!("unit {} (for {})", canonical.unit, a.id),
                Profile::local_code(&codes.unit, &canonical.unit),
            )?);
        }
        let check = |fmt: &str, key: &str| -> Result<Vec<Item<'static>>, LayoutError> {
            let items = StrftimeItems::new(fmt)
                .parse_to_owned()
                .map_err(|_| err(format!("format.{key} {fmt:?} is not a valid date format")))?;
            Ok(items)
        };
        let f = &profile.format;
        Ok(Self {
            header,
            fields,
            delimiter: f.delimiter_byte(),
            quote: f.quote_byte(),
            eol: match f.line_ending {
                LineEnding::Lf => b"\n",
                LineEnding::Crlf => b"\r\n",
            },
            latin1: f.encoding == Encoding::Latin1,
            has_local_id: profile.columns.local_patient_id.is_some(),
            date_items: check(&f.date_format, "date_format")?,
            datetime_items: check(&f.datetime_format, "datetime_format")?,
            setting_codes,
            status_codes,
            sex_codes,
            analyte_codes,
            unit_codes,
        })
    }

    /// Appends one field, quoted when it holds the delimiter, the quote or a line break.
    pub fn push_field(&self, line: &mut Vec<u8>, text: &str) {
        let b = text.as_bytes();
        let needs = b
            .iter()
            .any(|&c| c == self.delimiter || c == self.quote || c == b'\n' || c == b'\r');
        let start = line.len();
        if needs {
            line.push(self.quote);
            for &c in b {
                if c == self.quote {
                    line.push(c);
                }
                line.push(c);
            }
            line.push(self.quote);
        } else {
            line.extend_from_slice(b);
        }
        if self.latin1 && !line[start..].is_ascii() {
            let s = String::from_utf8(line.split_off(start)).expect("utf-8 field");
            let (bytes, _, _) = encoding_rs::WINDOWS_1252.encode(&s);
            line.extend_from_slice(&bytes);
        }
    }

    fn date(&self, day: i64) -> String {
        let d =
            NaiveDate::from_num_days_from_ce_opt((day + 719_163) as i32).expect("date in range");
        d.format_with_items(self.date_items.iter()).to_string()
    }

    fn datetime(&self, minute: i64) -> String {
        let dt: NaiveDateTime = DateTime::from_timestamp(minute * 60, 0)
            .expect("time in range")
            .naive_utc();
        dt.format_with_items(self.datetime_items.iter()).to_string()
    }

    pub fn write_row(&self, s: &Synth, r: &Row, notes: &str, line: &mut Vec<u8>) {
        let p = &s.patients[r.patient as usize];
        let mut tmp = String::new();
        let n = self.fields.len();
        let cut = if r.fault == Fault::WrongFieldCount {
            n - 1
        } else {
            n
        };
        for (i, f) in self.fields[..cut].iter().enumerate() {
            if i > 0 {
                line.push(self.delimiter);
            }
            tmp.clear();
            match f {
                Some(Field::PatientId) => match r.fault {
                    Fault::BlankNhs | Fault::BlankIds => {}
                    _ => {
                        let mut d = p.nhs;
                        if r.fault == Fault::BadNhs {
                            d[9] = (d[9] + 1 + (r.specimen % 9) as u8) % 10;
                        }
                        for (k, x) in d.iter().enumerate() {
                            if p.nhs_spaced && (k == 3 || k == 6) {
                                tmp.push(' ');
                            }
                            tmp.push(char::from(b'0' + x));
                        }
                    }
                },
                Some(Field::LocalPatientId) if r.fault != Fault::BlankIds => {
                    let _ = write!(tmp, "QM{:07}", p.mrn);
                }
                Some(Field::LocalPatientId) => {}
                Some(Field::BirthDate) => tmp = self.date(p.birth_day),
                Some(Field::Sex) => tmp.push_str(&self.sex_codes[p.sex.code() as usize]),
                Some(Field::HomePostcode) => {
                    tmp.push_str(&s.region.postcodes[p.postcode as usize].code)
                }
                Some(Field::PracticeCode) => {
                    tmp.push_str(&s.region.practices[p.practice as usize].code)
                }
                Some(Field::SpecimenId) => tmp = specimen_id(r.specimen),
                Some(Field::CollectedAt) => {
                    if r.fault == Fault::BadDate {
                        tmp.push_str("00/00/0000 00:00");
                    } else {
                        tmp = self.datetime(r.collected);
                    }
                }
                Some(Field::ReportedAt) => tmp = self.datetime(r.reported),
                Some(Field::Setting) => {
                    if r.fault == Fault::UnknownSetting {
                        tmp.push_str("PHARMACY");
                    } else {
                        let codes = &self.setting_codes[r.setting.code() as usize];
                        tmp.push_str(&codes[(r.specimen % codes.len() as u64) as usize]);
                    }
                }
                Some(Field::ClinicalNotes) => tmp.push_str(notes),
                Some(Field::Analyte) => {
                    if r.fault == Fault::UnknownAnalyte {
                        tmp.push_str("ZZQ9");
                    } else {
                        tmp.push_str(&self.analyte_codes[r.analyte as usize]);
                    }
                }
                Some(Field::Value) => {
                    let dec = usize::from(ANALYTES[r.analyte as usize].decimals);
                    match r.value {
                        Val::Num(v) => {
                            let _ = write!(tmp, "{v:.dec$}");
                        }
                        Val::Qual(q, v) => {
                            let _ = write!(tmp, "{}{v:.0}", char::from(q));
                        }
                        Val::Text(t) => tmp.push_str(t),
                        Val::Empty => {}
                    }
                }
                Some(Field::Unit) => {
                    if r.fault == Fault::BadUnit {
                        tmp.push_str("mmol");
                    } else if !matches!(r.value, Val::Empty) {
                        tmp.push_str(&self.unit_codes[r.analyte as usize]);
                    }
                }
                Some(Field::Status) => tmp.push_str(
                    &self.status_codes[match r.status {
                        Status::Final => 0,
                        Status::Amended => 1,
                        Status::Cancelled => 2,
                    }],
                ),
                None => {}
            }
            self.push_field(line, &tmp);
        }
        line.extend_from_slice(self.eol);
    }
}
