//! Thin wrappers over `statrs` distributions and the input checks shared by every module, so that
//! a rejected parameter surfaces as a [`StatsError`] rather than a panic inside `statrs`.

use crate::{Result, StatsError};
use statrs::distribution::{
    Beta, Binomial, ChiSquared, ContinuousCDF, DiscreteCDF, Gamma, Normal, StudentsT,
};

pub(crate) fn check_level(level: f64) -> Result<f64> {
    if level.is_finite() && level > 0.0 && level < 1.0 {
        Ok(level)
    } else {
        Err(StatsError::Level(level))
    }
}

pub(crate) fn check_finite(x: &[f64]) -> Result<()> {
    match x.iter().position(|v| !v.is_finite()) {
        Some(index) => Err(StatsError::NonFinite {
            index,
            value: x[index],
        }),
        None => Ok(()),
    }
}

pub(crate) fn check_len(x: &[f64], need: usize) -> Result<()> {
    if x.len() < need {
        return Err(StatsError::TooFew { need, got: x.len() });
    }
    check_finite(x)
}

fn standard_normal() -> Normal {
    Normal::standard()
}

/// Upper `1 − α/2` point of the standard normal for a two-sided interval at `level`.
pub fn z_two_sided(level: f64) -> f64 {
    standard_normal().inverse_cdf(0.5 + level / 2.0)
}

pub(crate) fn normal_cdf(z: f64) -> f64 {
    standard_normal().cdf(z)
}

pub(crate) fn normal_sf(z: f64) -> f64 {
    standard_normal().sf(z)
}

/// Upper `1 − α/2` point of Student's t with `df` degrees of freedom.
pub fn t_two_sided(df: f64, level: f64) -> Result<f64> {
    let t = StudentsT::new(0.0, 1.0, df).map_err(|e| StatsError::Distribution(e.to_string()))?;
    Ok(t.inverse_cdf(0.5 + level / 2.0))
}

/// Two-sided p of a t statistic on `df` degrees of freedom: 2·P(T > |t|).
pub fn t_p_two_sided(t: f64, df: f64) -> Result<f64> {
    let d = StudentsT::new(0.0, 1.0, df).map_err(|e| StatsError::Distribution(e.to_string()))?;
    Ok(2.0 * d.sf(t.abs()))
}

/// Quantile of Gamma(shape, rate 1); for shape k this is half the chi-square quantile on 2k df.
pub(crate) fn gamma_quantile(shape: f64, p: f64) -> Result<f64> {
    let g = Gamma::new(shape, 1.0).map_err(|e| StatsError::Distribution(e.to_string()))?;
    Ok(g.inverse_cdf(p))
}

pub(crate) fn beta_quantile(a: f64, b: f64, p: f64) -> Result<f64> {
    let d = Beta::new(a, b).map_err(|e| StatsError::Distribution(e.to_string()))?;
    Ok(d.inverse_cdf(p))
}

pub(crate) fn chi2_sf(df: f64, x: f64) -> Result<f64> {
    let d = ChiSquared::new(df).map_err(|e| StatsError::Distribution(e.to_string()))?;
    Ok(d.sf(x))
}

/// P(X ≤ k) for X ~ Binomial(n, p).
pub(crate) fn binomial_cdf(n: u64, p: f64, k: u64) -> Result<f64> {
    let d = Binomial::new(p, n).map_err(|e| StatsError::Distribution(e.to_string()))?;
    Ok(d.cdf(k))
}
