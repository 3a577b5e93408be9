//! Descriptive statistics: mean, variance and SD with denominator n − 1, and quantiles by
//! Hyndman & Fan's type 7 definition (the default of R and numpy), so that a value printed by
//! sluice can be reproduced by an analyst in either tool.

use crate::dist::{check_finite, check_len};
use crate::{Result, StatsError};

/// Arithmetic mean. Errors on an empty slice or a non-finite value.
pub fn mean(x: &[f64]) -> Result<f64> {
    check_len(x, 1)?;
    Ok(mean_unchecked(x))
}

pub(crate) fn mean_unchecked(x: &[f64]) -> f64 {
    x.iter().sum::<f64>() / x.len() as f64
}

/// Sample variance with denominator n − 1. Needs at least two observations.
pub fn variance(x: &[f64]) -> Result<f64> {
    check_len(x, 2)?;
    Ok(variance_unchecked(x))
}

pub(crate) fn variance_unchecked(x: &[f64]) -> f64 {
    let m = mean_unchecked(x);
    // Two-pass with the compensating term keeps precision when the mean is large relative to
    // the spread (e.g. creatinine in µmol/L).
    let (ss, s) = x.iter().fold((0.0, 0.0), |(ss, s), v| {
        let d = v - m;
        (ss + d * d, s + d)
    });
    (ss - s * s / x.len() as f64) / (x.len() - 1) as f64
}

/// Sample standard deviation with denominator n − 1. Needs at least two observations.
pub fn sd(x: &[f64]) -> Result<f64> {
    variance(x).map(f64::sqrt)
}

/// Element-wise `x[i] − y[i]` of two paired samples of equal length.
pub fn differences(x: &[f64], y: &[f64]) -> Result<Vec<f64>> {
    if x.len() != y.len() {
        return Err(StatsError::LengthMismatch {
            left: x.len(),
            right: y.len(),
        });
    }
    check_finite(x)?;
    check_finite(y)?;
    Ok(x.iter().zip(y).map(|(a, b)| a - b).collect())
}

/// The `p`-quantile by Hyndman & Fan type 7: with h = (n − 1)·p on the 0-based sorted sample,
/// the value is x[⌊h⌋] + (h − ⌊h⌋)·(x[⌊h⌋ + 1] − x[⌊h⌋]). This is R's `quantile(type = 7)` and
/// numpy's `quantile(method = "linear")`, both defaults.
pub fn quantile(x: &[f64], p: f64) -> Result<f64> {
    Ok(quantiles(x, &[p])?[0])
}

/// Several type 7 quantiles of one sample, sorting it once. See [`quantile`].
pub fn quantiles(x: &[f64], ps: &[f64]) -> Result<Vec<f64>> {
    check_len(x, 1)?;
    if let Some(&p) = ps.iter().find(|p| !(0.0..=1.0).contains(*p)) {
        return Err(StatsError::Probability(p));
    }
    let mut sorted = x.to_vec();
    sorted.sort_by(f64::total_cmp);
    Ok(ps.iter().map(|&p| quantile_sorted(&sorted, p)).collect())
}

/// Median (the type 7 quantile at 0.5: the middle value, or the mean of the two middle values).
pub fn median(x: &[f64]) -> Result<f64> {
    quantile(x, 0.5)
}

/// Type 7 quantile of an already sorted, non-empty, finite sample with `p` in [0, 1].
pub(crate) fn quantile_sorted(sorted: &[f64], p: f64) -> f64 {
    let h = (sorted.len() - 1) as f64 * p;
    let lo = h.floor() as usize;
    let frac = h - lo as f64;
    match sorted.get(lo + 1) {
        Some(&next) if frac > 0.0 => sorted[lo] + frac * (next - sorted[lo]),
        _ => sorted[lo],
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn type7_hand_worked() {
        // h = 3·0.25 = 0.75 → 1 + 0.75·(2 − 1).
        let x = [4.0, 1.0, 3.0, 2.0];
        assert_eq!(quantile(&x, 0.25).unwrap(), 1.75);
        assert_eq!(quantile(&x, 0.0).unwrap(), 1.0);
        assert_eq!(quantile(&x, 1.0).unwrap(), 4.0);
        assert_eq!(median(&x).unwrap(), 2.5);
        assert_eq!(median(&[7.0]).unwrap(), 7.0);
    }

    #[test]
    fn rejects_bad_input() {
        assert_eq!(mean(&[]), Err(StatsError::TooFew { need: 1, got: 0 }));
        assert_eq!(sd(&[1.0]), Err(StatsError::TooFew { need: 2, got: 1 }));
        assert!(matches!(
            quantile(&[1.0, f64::NAN], 0.5),
            Err(StatsError::NonFinite { index: 1, .. })
        ));
        assert_eq!(quantile(&[1.0], 1.5), Err(StatsError::Probability(1.5)));
        assert!(matches!(
            quantile(&[1.0], f64::NAN),
            Err(StatsError::Probability(_))
        ));
        assert_eq!(
            differences(&[1.0], &[]),
            Err(StatsError::LengthMismatch { left: 1, right: 0 })
        );
    }

    #[test]
    fn variance_of_offset_data_is_exact() {
        let x = [1e9 + 1.0, 1e9 + 2.0, 1e9 + 3.0];
        assert_eq!(variance(&x).unwrap(), 1.0);
    }
}
