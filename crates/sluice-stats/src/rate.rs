//! Exact intervals for Poisson counts: Garwood's interval for one count per person-time, and the
//! conditional-binomial interval for the ratio of two rates.

use crate::dist::{check_level, gamma_quantile};
use crate::proportion::clopper_pearson_ci;
use crate::{Interval, Result, StatsError};

fn check_exposure(t: f64) -> Result<f64> {
    if t.is_finite() && t > 0.0 {
        Ok(t)
    } else {
        Err(StatsError::Exposure(t))
    }
}

/// Garwood's exact interval for the rate of `count` events in `exposure` person-time (pass 1.0
/// for the count itself): lower = χ²₂ₓ(α/2)/2, upper = χ²₂₍ₓ₊₁₎(1 − α/2)/2, each divided by the
/// exposure; the lower bound is 0 when the count is 0.
pub fn poisson_exact_ci(count: u64, exposure: f64, level: f64) -> Result<Interval> {
    check_level(level)?;
    let t = check_exposure(exposure)?;
    let alpha = 1.0 - level;
    let x = count as f64;
    // χ²_{2k}(p)/2 is the Gamma(k, 1) quantile; using it directly saves a halving.
    let lower = if count == 0 {
        0.0
    } else {
        gamma_quantile(x, alpha / 2.0)?
    };
    let upper = gamma_quantile(x + 1.0, 1.0 - alpha / 2.0)?;
    Ok(Interval {
        estimate: x / t,
        lower: lower / t,
        upper: upper / t,
        level,
    })
}

/// Exact conditional interval for the rate ratio (x₁/t₁)/(x₂/t₂). Given x₁ + x₂, x₁ is binomial
/// with p = RR·t₁/(RR·t₁ + t₂); the Clopper–Pearson bounds on p map to RR = p/(1 − p) · t₂/t₁.
/// x₁ = 0 gives estimate and lower bound 0; x₂ = 0 gives estimate and upper bound +∞. Both zero
/// is an error, since the data then say nothing about the ratio.
pub fn rate_ratio_exact_ci(x1: u64, t1: f64, x2: u64, t2: f64, level: f64) -> Result<Interval> {
    check_level(level)?;
    check_exposure(t1)?;
    check_exposure(t2)?;
    if x1 == 0 && x2 == 0 {
        return Err(StatsError::NoEvents { x1, x2 });
    }
    let cp = clopper_pearson_ci(x1, x1 + x2, level)?;
    let to_ratio = |p: f64| {
        if p >= 1.0 {
            f64::INFINITY
        } else {
            p / (1.0 - p) * t2 / t1
        }
    };
    let estimate = if x2 == 0 {
        f64::INFINITY
    } else {
        (x1 as f64 / t1) / (x2 as f64 / t2)
    };
    Ok(Interval {
        estimate,
        lower: to_ratio(cp.lower),
        upper: to_ratio(cp.upper),
        level,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn zero_counts() {
        let z = poisson_exact_ci(0, 1.0, 0.95).unwrap();
        assert_eq!(z.lower, 0.0);
        // Closed form for x = 0: upper = −ln(α/2).
        assert!((z.upper - (-(0.025f64).ln())).abs() < 1e-9);
        let r = rate_ratio_exact_ci(0, 100.0, 5, 100.0, 0.95).unwrap();
        assert_eq!((r.estimate, r.lower), (0.0, 0.0));
        assert!(r.upper.is_finite());
        let r = rate_ratio_exact_ci(5, 100.0, 0, 100.0, 0.95).unwrap();
        assert_eq!((r.estimate, r.upper), (f64::INFINITY, f64::INFINITY));
        assert!(r.lower.is_finite() && r.lower > 0.0);
        assert_eq!(
            rate_ratio_exact_ci(0, 1.0, 0, 1.0, 0.95),
            Err(StatsError::NoEvents { x1: 0, x2: 0 })
        );
        assert_eq!(
            poisson_exact_ci(3, 0.0, 0.95),
            Err(StatsError::Exposure(0.0))
        );
    }
}
