//! Student t intervals for a mean difference: Welch's unequal-variance two-sample interval and the
//! paired interval, matching scipy's `ttest_ind(equal_var=False)` and `ttest_rel` intervals.

use crate::describe::{differences, mean_unchecked, variance_unchecked};
use crate::dist::{check_len, check_level, t_two_sided};
use crate::{Interval, Result, StatsError};

/// A t interval with the standard error and degrees of freedom it was built from.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TInterval {
    pub interval: Interval,
    pub se: f64,
    pub df: f64,
}

/// Welch interval for mean(x) − mean(y): SE = √(sₓ²/nₓ + s_y²/n_y) on Welch–Satterthwaite
/// degrees of freedom. Each sample needs two observations, and the SE must not be zero.
pub fn welch_t_ci(x: &[f64], y: &[f64], level: f64) -> Result<TInterval> {
    check_level(level)?;
    check_len(x, 2)?;
    check_len(y, 2)?;
    let (nx, ny) = (x.len() as f64, y.len() as f64);
    let ax = variance_unchecked(x) / nx;
    let ay = variance_unchecked(y) / ny;
    let se2 = ax + ay;
    let estimate = mean_unchecked(x) - mean_unchecked(y);
    if se2 <= 0.0 {
        return Err(StatsError::ZeroVariance(estimate));
    }
    let df = se2 * se2 / (ax * ax / (nx - 1.0) + ay * ay / (ny - 1.0));
    build(estimate, se2.sqrt(), df, level)
}

/// Paired interval for the mean of x − y on n − 1 degrees of freedom. Needs two pairs whose
/// differences are not all equal.
pub fn paired_t_ci(x: &[f64], y: &[f64], level: f64) -> Result<TInterval> {
    check_level(level)?;
    let d = differences(x, y)?;
    check_len(&d, 2)?;
    let n = d.len() as f64;
    let var = variance_unchecked(&d);
    if var <= 0.0 {
        return Err(StatsError::ZeroVariance(d[0]));
    }
    build(mean_unchecked(&d), (var / n).sqrt(), n - 1.0, level)
}

fn build(estimate: f64, se: f64, df: f64, level: f64) -> Result<TInterval> {
    let half = t_two_sided(df, level)? * se;
    Ok(TInterval {
        interval: Interval {
            estimate,
            lower: estimate - half,
            upper: estimate + half,
            level,
        },
        se,
        df,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn constant_samples_are_rejected() {
        assert_eq!(
            welch_t_ci(&[2.0, 2.0], &[3.0, 3.0], 0.95),
            Err(StatsError::ZeroVariance(-1.0))
        );
        assert_eq!(
            paired_t_ci(&[2.0, 3.0], &[1.0, 2.0], 0.95),
            Err(StatsError::ZeroVariance(1.0))
        );
        assert_eq!(
            welch_t_ci(&[1.0, 2.0], &[1.0, 2.0], 1.0),
            Err(StatsError::Level(1.0))
        );
        assert_eq!(
            paired_t_ci(&[1.0], &[2.0], 0.95),
            Err(StatsError::TooFew { need: 2, got: 1 })
        );
    }
}
