//! Loading of the committed reference vectors and the two comparisons used against them:
//! relative agreement with software output, and agreement to the printed precision of a
//! published value.

use serde::Deserialize;
use serde::de::DeserializeOwned;
use std::path::PathBuf;

/// Relative tolerance against scipy/statsmodels output.
pub const REL: f64 = 1e-6;

pub fn load<T: DeserializeOwned>(file: &str) -> T {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../../tests/vectors")
        .join(file);
    let text = std::fs::read_to_string(&path)
        .unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
    toml::from_str(&text).unwrap_or_else(|e| panic!("cannot parse {}: {e}", path.display()))
}

/// Asserts |actual − expected| ≤ REL·|expected|; exact zeros and infinities must match exactly
/// (up to 1e-12 absolute for zeros, since a bound computed as a difference can land a few ulps
/// away from a reference that is exactly 0).
#[track_caller]
pub fn close(actual: f64, expected: f64, what: &str) {
    let ok = if expected.is_infinite() {
        actual == expected
    } else {
        (actual - expected).abs() <= REL * expected.abs() + 1e-12
    };
    assert!(ok, "{what}: got {actual:e}, reference {expected:e}");
}

/// A published value and the number of decimals it was printed with.
#[derive(Debug, Clone, Copy, Deserialize)]
pub struct Printed {
    pub value: f64,
    pub decimals: i32,
}

/// Asserts that `actual` rounds to the printed value: within half a unit of the last place.
#[track_caller]
pub fn printed(actual: f64, expected: Printed, what: &str) {
    let tol = 0.5 * 10f64.powi(-expected.decimals) + 1e-12;
    assert!(
        (actual - expected.value).abs() <= tol,
        "{what}: got {actual}, published {} (to {} decimals)",
        expected.value,
        expected.decimals
    );
}
