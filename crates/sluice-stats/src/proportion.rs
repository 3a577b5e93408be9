//! Binomial proportions and paired binary data: Wilson score and Clopper–Pearson intervals, and
//! McNemar's test on the discordant cells of a paired 2 × 2 table.

use crate::dist::{beta_quantile, binomial_cdf, check_level, chi2_sf, z_two_sided};
use crate::{Interval, Result, StatsError};

fn check_counts(x: u64, n: u64) -> Result<()> {
    if n == 0 {
        return Err(StatsError::NoTrials(n));
    }
    if x > n {
        return Err(StatsError::CountExceedsTrials {
            count: x,
            trials: n,
        });
    }
    Ok(())
}

/// Wilson score interval for x successes in n trials:
/// (p̂ + z²/2n ± z·√(p̂(1 − p̂)/n + z²/4n²)) / (1 + z²/n).
pub fn wilson_ci(x: u64, n: u64, level: f64) -> Result<Interval> {
    check_level(level)?;
    check_counts(x, n)?;
    let nf = n as f64;
    let p = x as f64 / nf;
    let z = z_two_sided(level);
    let z2 = z * z;
    let denom = 1.0 + z2 / nf;
    let centre = (p + z2 / (2.0 * nf)) / denom;
    let half = z / denom * (p * (1.0 - p) / nf + z2 / (4.0 * nf * nf)).sqrt();
    Ok(Interval {
        estimate: p,
        // At x = 0 (x = n) the bound is exactly 0 (1); rounding would leave a few ulps.
        lower: if x == 0 { 0.0 } else { centre - half },
        upper: if x == n { 1.0 } else { centre + half },
        level,
    })
}

/// Clopper–Pearson ("exact") interval for x successes in n trials, from beta quantiles; the
/// lower bound is 0 when x = 0 and the upper bound 1 when x = n.
pub fn clopper_pearson_ci(x: u64, n: u64, level: f64) -> Result<Interval> {
    check_level(level)?;
    check_counts(x, n)?;
    let alpha = 1.0 - level;
    let lower = if x == 0 {
        0.0
    } else {
        beta_quantile(x as f64, (n - x + 1) as f64, alpha / 2.0)?
    };
    let upper = if x == n {
        1.0
    } else {
        beta_quantile((x + 1) as f64, (n - x) as f64, 1.0 - alpha / 2.0)?
    };
    Ok(Interval {
        estimate: x as f64 / n as f64,
        lower,
        upper,
        level,
    })
}

/// McNemar's test of marginal homogeneity from the discordant counts b and c of a paired 2 × 2
/// table (e.g. b = negative → positive, c = positive → negative between two assays).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct McNemar {
    pub b: u64,
    pub c: u64,
    /// (b − c)² / (b + c), on one degree of freedom.
    pub chi2: f64,
    pub p_chi2: f64,
    /// (|b − c| − 1)² / (b + c). As in R's `mcnemar.test` and statsmodels, the correction is not
    /// truncated at zero, so b = c gives 1/(b + c) rather than 0.
    pub chi2_corrected: f64,
    pub p_chi2_corrected: f64,
    /// Two-sided exact p: min(1, 2·P(X ≤ min(b, c))) for X ~ Binomial(b + c, ½).
    pub p_exact: f64,
}

/// McNemar's test on the discordant counts; errors when b + c = 0 since nothing is compared.
pub fn mcnemar(b: u64, c: u64) -> Result<McNemar> {
    let n = b + c;
    if n == 0 {
        return Err(StatsError::NoDiscordantPairs { b, c });
    }
    let nf = n as f64;
    let diff = b.abs_diff(c) as f64;
    let chi2 = diff * diff / nf;
    let chi2_corrected = (diff - 1.0) * (diff - 1.0) / nf;
    let p_exact = (2.0 * binomial_cdf(n, 0.5, b.min(c))?).min(1.0);
    Ok(McNemar {
        b,
        c,
        chi2,
        p_chi2: chi2_sf(1.0, chi2)?,
        chi2_corrected,
        p_chi2_corrected: chi2_sf(1.0, chi2_corrected)?,
        p_exact,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rejects_impossible_counts() {
        assert_eq!(wilson_ci(1, 0, 0.95), Err(StatsError::NoTrials(0)));
        assert_eq!(
            clopper_pearson_ci(5, 4, 0.95),
            Err(StatsError::CountExceedsTrials {
                count: 5,
                trials: 4
            })
        );
        assert_eq!(
            mcnemar(0, 0),
            Err(StatsError::NoDiscordantPairs { b: 0, c: 0 })
        );
    }

    #[test]
    fn edges_are_closed() {
        let w = wilson_ci(0, 10, 0.95).unwrap();
        assert_eq!(w.lower, 0.0);
        let cp = clopper_pearson_ci(10, 10, 0.95).unwrap();
        assert_eq!(cp.upper, 1.0);
        // Closed form at x = n: lower = (α/2)^(1/n).
        assert!((cp.lower - 0.025f64.powf(0.1)).abs() < 1e-12);
    }
}
