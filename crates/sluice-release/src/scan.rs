//! The identifier scan check runs over every decoded value and metadata string of a release:
//! NHS numbers (ten digits in any spacing that pass the modulus 11 check of the NHS Data
//! Dictionary), UK-format postcodes, and dates finer than a month in the forms people write them
//! (2024-03-05, 05/03/2024, 5.3.24, 20240305, 5 March 2024, March 5, 2024, 05-Mar-2024).
//!
//! A match is a finding, not proof: a valid-looking NHS number can be a coincidence of a long
//! count. Releases hold labels and aggregates, so no real value of a release should match.

use regex::Regex;
use std::sync::OnceLock;

/// What an identifier scan found in a string.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Finding {
    pub kind: &'static str,
    pub text: String,
}

fn postcode() -> &'static Regex {
    static R: OnceLock<Regex> = OnceLock::new();
    // The UK postcode shape: outward code (area letters, district) and inward code (sector
    // digit, unit letters). Common practice; the inward letters exclude C, I, K, M, O and V.
    R.get_or_init(|| {
        Regex::new(r"(?i)\b[A-Z]{1,2}[0-9][A-Z0-9]?\s*[0-9][ABD-HJLNP-UW-Z]{2}\b").expect("regex")
    })
}

const MONTHS: &str = "jan(uary)?|feb(ruary)?|mar(ch)?|apr(il)?|may|june?|july?|aug(ust)?|sep(t(ember)?)?|oct(ober)?|nov(ember)?|dec(ember)?";

fn dates() -> &'static [Regex] {
    static R: OnceLock<Vec<Regex>> = OnceLock::new();
    R.get_or_init(|| {
        [
            r"\b\d{4}-\d{1,2}-\d{1,2}\b".to_string(),
            r"\b\d{1,2}[/.\-]\d{1,2}[/.\-](\d{4}|\d{2})\b".to_string(),
            format!(r"(?i)\b\d{{1,2}}(st|nd|rd|th)?[\s\-]+({MONTHS})\.?[\s\-,]+\d{{2,4}}\b"),
            format!(r"(?i)\b({MONTHS})\.?\s+\d{{1,2}}(st|nd|rd|th)?,?\s+\d{{4}}\b"),
        ]
        .iter()
        .map(|p| Regex::new(p).expect("regex"))
        .collect()
    })
}

/// An eight-digit run that is a calendar date yyyymmdd between 1900 and 2099.
fn compact_date(digits: &str) -> bool {
    let n = |a: usize, b: usize| digits[a..b].parse::<u32>().unwrap_or(0);
    let (y, m, d) = (n(0, 4), n(4, 6), n(6, 8));
    (1900..2100).contains(&y) && (1..=12).contains(&m) && (1..=31).contains(&d)
}

/// Ten digits in any spacing (single spaces or hyphens between digits), standing apart from
/// letters and digits (so not inside a hash), that form a valid NHS number.
fn nhs_numbers(s: &str) -> Vec<String> {
    let b = s.as_bytes();
    let mut out = Vec::new();
    let mut i = 0;
    while i < b.len() {
        if !b[i].is_ascii_digit() || (i > 0 && b[i - 1].is_ascii_alphanumeric()) {
            i += 1;
            continue;
        }
        // A run of digits with single separators.
        let mut digits = Vec::new();
        let mut j = i;
        while j < b.len() {
            if b[j].is_ascii_digit() {
                digits.push(b[j] - b'0');
                j += 1;
            } else if (b[j] == b' ' || b[j] == b'-')
                && j + 1 < b.len()
                && b[j + 1].is_ascii_digit()
                && j > i
            {
                j += 1;
            } else {
                break;
            }
        }
        let apart = j == b.len() || !b[j].is_ascii_alphanumeric();
        if digits.len() == 10 && apart {
            let text: String = digits.iter().map(|d| char::from(b'0' + d)).collect();
            if sluice_policy::nhs::parse(&text).is_ok() {
                out.push(s[i..j].to_string());
            }
        }
        i = j.max(i + 1);
    }
    out
}

/// Identifiers and day-level dates in one string. `dates` is false for text that may name study
/// dates (the report and the manifest, which carry the study's windows).
pub fn scan(s: &str, with_dates: bool) -> Vec<Finding> {
    let mut out: Vec<Finding> = nhs_numbers(s)
        .into_iter()
        .map(|text| Finding {
            kind: "NHS number",
            text,
        })
        .collect();
    for m in postcode().find_iter(s) {
        // A CSS colour (#e6f0ff) has the shape of a compact postcode.
        if s[..m.start()].ends_with('#') {
            continue;
        }
        out.push(Finding {
            kind: "postcode",
            text: m.as_str().to_string(),
        });
    }
    if with_dates {
        for r in dates() {
            for m in r.find_iter(s) {
                out.push(Finding {
                    kind: "date",
                    text: m.as_str().to_string(),
                });
            }
        }
        let b = s.as_bytes();
        let mut i = 0;
        while i + 8 <= b.len() {
            let run = b[i..].iter().take_while(|c| c.is_ascii_digit()).count();
            let apart = (i == 0 || !b[i - 1].is_ascii_alphanumeric())
                && b.get(i + run).is_none_or(|c| !c.is_ascii_alphanumeric());
            if run == 8 && apart && compact_date(&s[i..i + 8]) {
                out.push(Finding {
                    kind: "date",
                    text: s[i..i + 8].to_string(),
                });
            }
            i += run.max(1);
        }
    }
    out
}

/// A numeric value that reads as an identifier: a whole number that is a valid NHS number.
pub fn scan_number(x: f64) -> Option<Finding> {
    if x.fract() != 0.0 || !(1e9..1e10).contains(&x.abs()) {
        return None;
    }
    let text = format!("{:010}", x.abs() as u64);
    sluice_policy::nhs::parse(&text).ok().map(|_| Finding {
        kind: "NHS number",
        text,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    // NHS Data Dictionary worked example 943 476 5919 (valid); 943 476 5918 fails the check digit.
    #[test]
    fn nhs_numbers_in_any_spacing() {
        for s in [
            "9434765919",
            "943 476 5919",
            "943-476-5919",
            "x 9 4 3 4 7 6 5 9 1 9 y",
        ] {
            assert_eq!(scan(s, false).len(), 1, "{s}");
        }
        assert!(scan("9434765918", false).is_empty());
        assert!(scan("n = 19434765919", false).is_empty(), "eleven digits");
        assert!(scan("sha 3fa9434765919c", true).is_empty(), "inside a hash");
        assert_eq!(
            scan_number(9434765919.0).map(|f| f.kind),
            Some("NHS number")
        );
        assert_eq!(scan_number(145.0), None);
    }

    #[test]
    fn postcodes_and_written_dates() {
        assert_eq!(scan("QV1 2AB", false)[0].kind, "postcode");
        assert_eq!(scan("qv12ab", false)[0].kind, "postcode");
        assert!(scan("color: #e6f0ff;", false).is_empty());
        for s in [
            "04/03/1957",
            "4.3.57",
            "19570304",
            "4 March 1957",
            "March 4, 1957",
            "04-Mar-1957",
            "1957-03-04",
        ] {
            assert!(scan(s, true).iter().any(|f| f.kind == "date"), "{s}");
        }
        for s in [
            "three_monthly",
            "2024-03",
            "monthly_to_three_monthly",
            "q75",
            "n_patients",
        ] {
            assert!(scan(s, true).is_empty(), "{s}");
        }
    }
}
