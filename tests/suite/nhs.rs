//! NHS number validation against the NHS Data Dictionary's modulus-11 rule.

use serde::Deserialize;
use sluice_policy::nhs::{self, NhsProblem};

#[derive(Deserialize)]
struct Case {
    number: String,
    valid: bool,
    #[serde(default)]
    problem: Option<String>,
    #[allow(dead_code)]
    source: String,
}

#[derive(Deserialize)]
struct Vectors {
    case: Vec<Case>,
}

#[test]
fn data_dictionary_cases() {
    let v: Vectors = toml::from_str(&crate::common::vectors("nhs-number.toml")).unwrap();
    assert!(v.case.len() >= 7);
    for c in v.case {
        let got = nhs::parse(&c.number);
        assert_eq!(got.is_ok(), c.valid, "{}", c.number);
        if let Some(p) = c.problem {
            let want = match p.as_str() {
                "wrong_check_digit" => NhsProblem::WrongCheckDigit,
                "check_is_ten" => NhsProblem::CheckIsTen,
                "placeholder" => NhsProblem::Placeholder,
                other => panic!("unknown problem {other}"),
            };
            assert_eq!(got, Err(want), "{}", c.number);
        }
    }
}

#[test]
fn worked_example_arithmetic() {
    // NHS Data Dictionary worked example: 943 476 591 → weighted sum 299, remainder 2, check 9.
    assert_eq!(nhs::check_digit(&[9, 4, 3, 4, 7, 6, 5, 9, 1]), Some(9));
}
