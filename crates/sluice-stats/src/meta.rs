//! Inverse-variance meta-analysis of k estimates with known sampling variances: the fixed-effect
//! pool, Cochran's Q and I², and the DerSimonian–Laird random-effects pool with its τ².

use crate::dist::{check_finite, check_level, chi2_sf, z_two_sided};
use crate::{Result, StatsError};

/// One pooled estimate with its standard error and normal-theory interval.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Pooled {
    pub estimate: f64,
    pub se: f64,
    pub lower: f64,
    pub upper: f64,
}

/// Result of [`meta_analysis`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MetaAnalysis {
    pub k: usize,
    pub level: f64,
    /// Weights 1/vᵢ.
    pub fixed: Pooled,
    /// Weights 1/(vᵢ + τ²) with the DerSimonian–Laird τ².
    pub random: Pooled,
    /// Cochran's Q = Σ wᵢ(yᵢ − ŷ_FE)², on k − 1 degrees of freedom.
    pub q: f64,
    pub q_df: f64,
    /// P(χ²ₖ₋₁ ≥ Q).
    pub q_p: f64,
    /// max(0, (Q − (k − 1))/Q), as a proportion (0.92), not a percent; 0 when Q = 0.
    pub i2: f64,
    /// DerSimonian–Laird moment estimate max(0, (Q − (k − 1))/(Σw − Σw²/Σw)).
    pub tau2: f64,
}

/// Pools estimates `yi` (e.g. log risk ratios) with sampling variances `vi`. Needs k ≥ 2 and
/// every variance positive and finite. Intervals are estimate ± z·SE at `level`.
pub fn meta_analysis(yi: &[f64], vi: &[f64], level: f64) -> Result<MetaAnalysis> {
    check_level(level)?;
    if yi.len() != vi.len() {
        return Err(StatsError::LengthMismatch {
            left: yi.len(),
            right: vi.len(),
        });
    }
    if yi.len() < 2 {
        return Err(StatsError::TooFew {
            need: 2,
            got: yi.len(),
        });
    }
    check_finite(yi)?;
    if let Some(index) = vi.iter().position(|v| !(v.is_finite() && *v > 0.0)) {
        return Err(StatsError::Variance {
            index,
            value: vi[index],
        });
    }
    let z = z_two_sided(level);
    let w: Vec<f64> = vi.iter().map(|v| 1.0 / v).collect();
    let fixed = pool(yi, &w, z);
    let q: f64 = yi
        .iter()
        .zip(&w)
        .map(|(y, w)| w * (y - fixed.estimate).powi(2))
        .sum();
    let df = (yi.len() - 1) as f64;
    let sw: f64 = w.iter().sum();
    let sw2: f64 = w.iter().map(|w| w * w).sum();
    let tau2 = ((q - df) / (sw - sw2 / sw)).max(0.0);
    let i2 = if q > 0.0 {
        ((q - df) / q).max(0.0)
    } else {
        0.0
    };
    let w_re: Vec<f64> = vi.iter().map(|v| 1.0 / (v + tau2)).collect();
    Ok(MetaAnalysis {
        k: yi.len(),
        level,
        fixed,
        random: pool(yi, &w_re, z),
        q,
        q_df: df,
        q_p: chi2_sf(df, q)?,
        i2,
        tau2,
    })
}

fn pool(y: &[f64], w: &[f64], z: f64) -> Pooled {
    let sw: f64 = w.iter().sum();
    let estimate = y.iter().zip(w).map(|(y, w)| y * w).sum::<f64>() / sw;
    let se = (1.0 / sw).sqrt();
    Pooled {
        estimate,
        se,
        lower: estimate - z * se,
        upper: estimate + z * se,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn homogeneous_studies_have_no_heterogeneity() {
        let m = meta_analysis(&[0.5, 0.5, 0.5], &[0.1, 0.2, 0.3], 0.95).unwrap();
        assert!(m.q < 1e-20);
        assert_eq!((m.i2, m.tau2), (0.0, 0.0));
        assert_eq!(m.fixed, m.random);
        assert_eq!(
            meta_analysis(&[0.5, 0.1], &[0.1, 0.0], 0.95),
            Err(StatsError::Variance {
                index: 1,
                value: 0.0
            })
        );
        assert_eq!(
            meta_analysis(&[0.5], &[0.1], 0.95),
            Err(StatsError::TooFew { need: 2, got: 1 })
        );
    }
}
