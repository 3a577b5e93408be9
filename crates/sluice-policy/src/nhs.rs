//! The NHS number: normalisation and the modulus-11 check digit.
//!
//! The rule is the one the NHS Data Dictionary gives for the NHS NUMBER attribute: weights 10..2
//! on the first nine digits, remainder of the sum modulo 11, check digit 11 − remainder (11 → 0);
//! a result of 10 means no valid number has those nine digits.

/// Why a string is not a valid NHS number.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum NhsProblem {
    Blank,
    /// Not ten digits once spaces and dashes are removed.
    Malformed,
    /// Nine digits whose check computation gives 10: no number can carry them.
    CheckIsTen,
    /// The tenth digit is not the check digit.
    WrongCheckDigit,
    /// All ten digits equal (e.g. 000 000 0000): passes the arithmetic but is a placeholder that
    /// systems use for "unknown", never a person's number.
    Placeholder,
}

impl NhsProblem {
    pub fn as_str(self) -> &'static str {
        match self {
            NhsProblem::Blank => "blank NHS number",
            NhsProblem::Malformed => "NHS number is not 10 digits",
            NhsProblem::CheckIsTen => "NHS number check computation gives 10 (no valid number)",
            NhsProblem::WrongCheckDigit => "NHS number fails the modulus-11 check digit",
            NhsProblem::Placeholder => "NHS number is a placeholder (all digits equal)",
        }
    }
}

/// The check digit for nine leading digits, or `None` when the computation gives 10.
pub fn check_digit(first_nine: &[u8; 9]) -> Option<u8> {
    let sum: u32 = first_nine
        .iter()
        .zip((2..=10u32).rev())
        .map(|(&d, w)| u32::from(d) * w)
        .sum();
    match 11 - (sum % 11) {
        11 => Some(0),
        10 => None,
        c => Some(c as u8),
    }
}

/// Normalises (drops spaces and dashes) and validates an NHS number, returning its ten digits.
pub fn parse(raw: &str) -> Result<[u8; 10], NhsProblem> {
    let trimmed = raw.trim();
    if trimmed.is_empty() {
        return Err(NhsProblem::Blank);
    }
    let mut digits = [0u8; 10];
    let mut n = 0;
    for b in trimmed.bytes() {
        match b {
            b' ' | b'-' => {}
            b'0'..=b'9' => {
                if n == 10 {
                    return Err(NhsProblem::Malformed);
                }
                digits[n] = b - b'0';
                n += 1;
            }
            _ => return Err(NhsProblem::Malformed),
        }
    }
    if n != 10 {
        return Err(NhsProblem::Malformed);
    }
    let nine: [u8; 9] = digits[..9].try_into().expect("nine digits");
    match check_digit(&nine) {
        None => Err(NhsProblem::CheckIsTen),
        Some(c) if c != digits[9] => Err(NhsProblem::WrongCheckDigit),
        Some(_) if digits.iter().all(|&d| d == digits[0]) => Err(NhsProblem::Placeholder),
        Some(_) => Ok(digits),
    }
}

/// The canonical text form: ten digits, no separators.
pub fn canonical(digits: &[u8; 10]) -> String {
    digits.iter().map(|d| char::from(b'0' + d)).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn separators_are_dropped() {
        assert_eq!(canonical(&parse("943-476-5919").unwrap()), "9434765919");
        assert_eq!(canonical(&parse(" 943 476 5919 ").unwrap()), "9434765919");
    }

    #[test]
    fn wrong_lengths_and_letters_are_malformed() {
        assert_eq!(parse("943476591"), Err(NhsProblem::Malformed));
        assert_eq!(parse("94347659190"), Err(NhsProblem::Malformed));
        assert_eq!(parse("94347659x9"), Err(NhsProblem::Malformed));
        assert_eq!(parse("  "), Err(NhsProblem::Blank));
    }
}
