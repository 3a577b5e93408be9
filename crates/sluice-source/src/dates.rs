//! Date and date-time parsing in a profile's strftime-style format.
//!
//! Extracts carry two or three date fields on every row, tens of millions of rows a run, so the
//! common specifiers (%Y %m %d %H %M %S and literal characters) are parsed by a small compiled
//! program instead of chrono's general parser (which re-interprets the format on every call);
//! any other specifier falls back to chrono, so every format chrono accepts still works.

use chrono::{NaiveDate, NaiveDateTime, Timelike};

#[derive(Clone, Debug, PartialEq, Eq)]
enum Tok {
    Year4,
    Month,
    Day,
    Hour,
    Minute,
    Second,
    Lit(u8),
    /// Any run of ASCII spaces.
    Space,
}

#[derive(Clone, Debug)]
pub struct DateFormat {
    fmt: String,
    fast: Option<Vec<Tok>>,
    with_time: bool,
}

const EPOCH_DAYS_FROM_CE: i64 = 719_163;

impl DateFormat {
    /// `with_time`: the format is a date-time (minutes are kept) rather than a date.
    pub fn new(fmt: &str, with_time: bool) -> Result<Self, String> {
        if chrono::format::StrftimeItems::new(fmt).parse().is_err() {
            return Err(format!("{fmt:?} is not a valid strftime format"));
        }
        Ok(Self {
            fmt: fmt.to_string(),
            fast: compile(fmt),
            with_time,
        })
    }

    /// Minutes since 1970-01-01 00:00 for a date-time; days since 1970-01-01 for a date.
    pub fn parse(&self, s: &str) -> Option<i64> {
        let s = s.trim();
        if let Some(toks) = &self.fast {
            return run(toks, s.as_bytes(), self.with_time);
        }
        if self.with_time {
            let t = NaiveDateTime::parse_from_str(s, &self.fmt).ok()?;
            Some(t.and_utc().timestamp().div_euclid(60))
        } else {
            let d = NaiveDate::parse_from_str(s, &self.fmt).ok()?;
            Some(i64::from(chrono::Datelike::num_days_from_ce(&d)) - EPOCH_DAYS_FROM_CE)
        }
    }

    /// Renders minutes (date-time) or days (date) in this format; used by tests and writers.
    pub fn format(&self, v: i64) -> String {
        if self.with_time {
            chrono::DateTime::from_timestamp(v * 60, 0)
                .map(|t| t.naive_utc().format(&self.fmt).to_string())
                .unwrap_or_default()
        } else {
            NaiveDate::from_num_days_from_ce_opt((v + EPOCH_DAYS_FROM_CE) as i32)
                .map(|d| d.format(&self.fmt).to_string())
                .unwrap_or_default()
        }
    }
}

fn compile(fmt: &str) -> Option<Vec<Tok>> {
    let b = fmt.as_bytes();
    let mut out = Vec::new();
    let mut i = 0;
    while i < b.len() {
        match b[i] {
            b'%' => {
                let t = match b.get(i + 1)? {
                    b'Y' => Tok::Year4,
                    b'm' => Tok::Month,
                    b'd' => Tok::Day,
                    b'H' => Tok::Hour,
                    b'M' => Tok::Minute,
                    b'S' => Tok::Second,
                    _ => return None,
                };
                out.push(t);
                i += 2;
            }
            b' ' => {
                out.push(Tok::Space);
                while i < b.len() && b[i] == b' ' {
                    i += 1;
                }
            }
            c if c.is_ascii() => {
                out.push(Tok::Lit(c));
                i += 1;
            }
            _ => return None,
        }
    }
    Some(out)
}

fn digits(s: &[u8], pos: &mut usize, min: usize, max: usize) -> Option<u32> {
    let start = *pos;
    let mut v = 0u32;
    while *pos < s.len() && *pos - start < max && s[*pos].is_ascii_digit() {
        v = v * 10 + u32::from(s[*pos] - b'0');
        *pos += 1;
    }
    (*pos - start >= min).then_some(v)
}

fn run(toks: &[Tok], s: &[u8], with_time: bool) -> Option<i64> {
    let (mut y, mut mo, mut d, mut h, mut mi, mut se) = (None, None, None, 0, 0, 0);
    let mut pos = 0;
    for t in toks {
        match t {
            Tok::Year4 => y = Some(digits(s, &mut pos, 4, 4)? as i32),
            Tok::Month => mo = Some(digits(s, &mut pos, 1, 2)?),
            Tok::Day => d = Some(digits(s, &mut pos, 1, 2)?),
            Tok::Hour => h = digits(s, &mut pos, 1, 2)?,
            Tok::Minute => mi = digits(s, &mut pos, 1, 2)?,
            Tok::Second => se = digits(s, &mut pos, 1, 2)?,
            Tok::Lit(c) => {
                if s.get(pos) != Some(c) {
                    return None;
                }
                pos += 1;
            }
            Tok::Space => {
                if s.get(pos) != Some(&b' ') {
                    return None;
                }
                while s.get(pos) == Some(&b' ') {
                    pos += 1;
                }
            }
        }
    }
    if pos != s.len() {
        return None;
    }
    let date = NaiveDate::from_ymd_opt(y?, mo?, d?)?;
    let days = i64::from(chrono::Datelike::num_days_from_ce(&date)) - EPOCH_DAYS_FROM_CE;
    if !with_time {
        return Some(days);
    }
    let time = chrono::NaiveTime::from_hms_opt(h, mi, se)?;
    Some(days * 1440 + i64::from(time.hour() * 60 + time.minute()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fast_path_agrees_with_chrono() {
        for (fmt, s) in [
            ("%Y-%m-%d %H:%M", "2024-02-29 23:59"),
            ("%d/%m/%Y %H:%M:%S", "01/03/2023 07:05:09"),
            ("%Y%m%d", "20230131"),
        ] {
            let f = DateFormat::new(fmt, fmt.contains("%H")).unwrap();
            assert!(f.fast.is_some());
            let slow = DateFormat {
                fast: None,
                ..f.clone()
            };
            assert_eq!(f.parse(s), slow.parse(s), "{fmt} {s}");
            assert!(f.parse(s).is_some());
        }
    }

    #[test]
    fn impossible_dates_fail() {
        let f = DateFormat::new("%Y-%m-%d %H:%M", true).unwrap();
        for s in [
            "2023-02-30 10:00",
            "2023-13-01 10:00",
            "00/00/0000 00:00",
            "",
            "2023-01-01 25:00",
        ] {
            assert_eq!(f.parse(s), None, "{s}");
        }
    }

    #[test]
    fn other_specifiers_use_chrono() {
        let f = DateFormat::new("%d-%b-%Y", false).unwrap();
        assert!(f.fast.is_none());
        assert_eq!(
            f.parse("05-Mar-2024"),
            DateFormat::new("%Y-%m-%d", false)
                .unwrap()
                .parse("2024-03-05")
        );
    }
}
