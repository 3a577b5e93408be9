//! Rank methods: the Wilcoxon signed-rank test with the one-sample (paired) Hodges–Lehmann
//! estimate and interval, and the Wilcoxon–Mann–Whitney rank-sum test with the two-sample
//! Hodges–Lehmann shift and interval.
//!
//! # Statistics
//!
//! * Signed rank: zeros are dropped (Wilcoxon's convention, R's and scipy's default), |d| is
//!   ranked with average ranks for ties, and V is the sum of the ranks of the positive values.
//! * Rank sum: x and y are ranked together (average ranks) and W = Σ rank(xᵢ) − nₓ(nₓ + 1)/2, the
//!   Mann–Whitney U of x; R prints it as `W`, scipy as `U`.
//!
//! # Exact or normal
//!
//! [`RankMethod::Auto`] uses the exact null distribution, built by dynamic programming, when
//! there are no ties (and, for the signed-rank test, no zeros) and the samples are small:
//! n ≤ 50 for one sample, nₓ ≤ 50 and n_y ≤ 50 for two (R's rule is n < 50). Otherwise it uses the
//! normal approximation with the tie-corrected variance and a continuity correction of ½ towards
//! the mean, as R's `wilcox.test(correct = TRUE)` and scipy's `method="asymptotic",
//! correction=True` / `use_continuity=True` do. [`RankMethod::Exact`] refuses tied data rather
//! than silently falling back. The exact two-sided p is min(1, 2·(smaller tail)), R's rule.
//!
//! # Interval convention
//!
//! The interval for the one-sample location (two-sample shift) is built from the sorted Walsh
//! averages (dᵢ + dⱼ)/2, i ≤ j (pairwise differences xᵢ − y_j), of which there are N. With q the
//! smallest integer whose exact lower-tail probability P(W ≤ q) reaches α/2 (raised to 1 if it is
//! 0), the bounds are the q-th smallest and the q-th largest of them, and the achieved confidence
//! is 1 − 2·P(W ≤ q − 1). This is the convention of R's `wilcox.test(conf.int = TRUE)` (Bauer
//! 1972), including R's tolerance of 10 machine epsilons when comparing P(W ≤ q) with α/2.
//! The estimate is always the median of the N values. For the interval, `Auto` is exact when all
//! observations are distinct (one sample: the dᵢ themselves, since zeros and sign ties do not
//! matter for an interval; two samples: x and y together) and the size rule above holds;
//! otherwise q comes from the normal approximation of W with the untied variance,
//! q = ⌈μ − c − z·σ⌉ with c = ½ for the continuity correction (0 without), so that the normal
//! analogue of P(W ≤ q) reaches α/2.

use crate::describe::quantile_sorted;
use crate::dist::{check_finite, check_len, check_level, normal_cdf, normal_sf, z_two_sided};
use crate::{Alternative, Interval, Result, StatsError};

/// How the null distribution of a rank statistic is obtained.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RankMethod {
    /// Exact for small untied samples, otherwise normal with continuity correction (see module
    /// documentation).
    Auto,
    /// Exact null distribution; an error for tied data (or zeros in the signed-rank test).
    Exact,
    /// Normal approximation with tie-corrected variance, optionally continuity-corrected.
    Normal { continuity: bool },
}

/// Largest n for a forced exact signed-rank distribution (the counts stay below 2¹⁰⁰⁰ ≈ 1e301,
/// inside f64, and the table costs n³/2 additions).
const MAX_EXACT_SIGNED: usize = 1000;
/// Largest nₓ·n_y for a forced exact rank-sum distribution (cost grows as (nₓ + n_y)·min²·max).
const MAX_EXACT_PRODUCT: usize = 10_000;
/// Size rule of `Auto` for each sample.
const AUTO_EXACT_MAX: usize = 50;
/// Walsh averages or pairwise differences are materialised; this caps them at 256 MiB.
const MAX_PAIRS: usize = 1 << 25;

/// Result of a Wilcoxon signed-rank test.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SignedRankTest {
    /// Sum of the ranks of the positive values (average ranks under ties).
    pub v: f64,
    /// Number of non-zero values ranked.
    pub n: usize,
    /// Number of zeros dropped.
    pub zeros: usize,
    pub p_value: f64,
    pub exact: bool,
}

/// Result of a Wilcoxon–Mann–Whitney rank-sum test.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RankSumTest {
    /// Σ rank(xᵢ) − nₓ(nₓ + 1)/2, the Mann–Whitney U of x.
    pub w: f64,
    pub p_value: f64,
    pub exact: bool,
}

/// Hodges–Lehmann estimate with its rank-test interval.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HodgesLehmann {
    /// `level` in it is the requested confidence.
    pub interval: Interval,
    /// Confidence actually achieved by the order statistics chosen (exact or normal analogue).
    pub achieved_level: f64,
    pub exact: bool,
}

/// Wilcoxon signed-rank test of location 0 for `d` (pass `differences(x, y)` for a paired test
/// of x − y). `Greater` tests whether the values tend to be positive.
pub fn signed_rank_test(
    d: &[f64],
    alternative: Alternative,
    method: RankMethod,
) -> Result<SignedRankTest> {
    check_finite(d)?;
    let nonzero: Vec<f64> = d.iter().copied().filter(|v| *v != 0.0).collect();
    let zeros = d.len() - nonzero.len();
    let n = nonzero.len();
    if n == 0 {
        return Err(StatsError::TooFew { need: 1, got: 0 });
    }
    let abs: Vec<f64> = nonzero.iter().map(|v| v.abs()).collect();
    let (ranks, ties) = average_ranks(&abs);
    let v: f64 = ranks
        .iter()
        .zip(&nonzero)
        .filter(|(_, x)| **x > 0.0)
        .map(|(r, _)| r)
        .sum();
    let tied: usize = ties.iter().sum::<usize>() + zeros;
    let exact = choose_exact(method, tied, n <= AUTO_EXACT_MAX, n, MAX_EXACT_SIGNED)?;
    let nf = n as f64;
    let p_value = if exact {
        exact_p(&ExactNull::signed_rank(n), v, alternative)
    } else {
        let tie_term: f64 = ties.iter().map(|&t| cube_minus(t)).sum::<f64>() / 48.0;
        let var = nf * (nf + 1.0) * (2.0 * nf + 1.0) / 24.0 - tie_term;
        normal_p(
            v,
            nf * (nf + 1.0) / 4.0,
            var,
            alternative,
            continuity(method),
        )
    };
    Ok(SignedRankTest {
        v,
        n,
        zeros,
        p_value,
        exact,
    })
}

/// Wilcoxon–Mann–Whitney rank-sum test of no shift between x and y. `Greater` tests whether x
/// tends to exceed y.
pub fn rank_sum_test(
    x: &[f64],
    y: &[f64],
    alternative: Alternative,
    method: RankMethod,
) -> Result<RankSumTest> {
    check_len(x, 1)?;
    check_len(y, 1)?;
    let (m, n) = (x.len(), y.len());
    let combined: Vec<f64> = x.iter().chain(y).copied().collect();
    let (ranks, ties) = average_ranks(&combined);
    let (mf, nf) = (m as f64, n as f64);
    let w = ranks[..m].iter().sum::<f64>() - mf * (mf + 1.0) / 2.0;
    let tied: usize = ties.iter().sum();
    let small = m <= AUTO_EXACT_MAX && n <= AUTO_EXACT_MAX;
    let exact = choose_exact(method, tied, small, m.saturating_mul(n), MAX_EXACT_PRODUCT)?;
    let p_value = if exact {
        exact_p(&ExactNull::rank_sum(m, n), w, alternative)
    } else {
        let big_n = mf + nf;
        let tie_term: f64 =
            ties.iter().map(|&t| cube_minus(t)).sum::<f64>() / (big_n * (big_n - 1.0));
        let var = mf * nf / 12.0 * ((big_n + 1.0) - tie_term);
        if var <= 0.0 {
            return Err(StatsError::ZeroVariance(x[0]));
        }
        normal_p(w, mf * nf / 2.0, var, alternative, continuity(method))
    };
    Ok(RankSumTest { w, p_value, exact })
}

/// One-sample Hodges–Lehmann estimate (median of the Walsh averages) of the location of `d`, with
/// the signed-rank interval described in the module documentation. For paired data pass
/// `differences(x, y)`.
pub fn hodges_lehmann_one_sample(
    d: &[f64],
    level: f64,
    method: RankMethod,
) -> Result<HodgesLehmann> {
    check_level(level)?;
    check_len(d, 1)?;
    let n = d.len();
    let pairs = n.saturating_mul(n + 1) / 2;
    check_pairs(pairs)?;
    let mut walsh = Vec::with_capacity(pairs);
    for i in 0..n {
        for j in i..n {
            walsh.push((d[i] + d[j]) / 2.0);
        }
    }
    let tied = tied_count(d);
    let exact = choose_exact(method, tied, n <= AUTO_EXACT_MAX, n, MAX_EXACT_SIGNED)?;
    let nf = n as f64;
    let sigma = (nf * (nf + 1.0) * (2.0 * nf + 1.0) / 24.0).sqrt();
    let null = exact.then(|| ExactNull::signed_rank(n));
    Ok(order_interval(
        walsh,
        level,
        null,
        sigma,
        continuity(method),
    ))
}

/// Two-sample Hodges–Lehmann shift of x relative to y (median of all xᵢ − y_j), with the
/// rank-sum interval described in the module documentation.
pub fn hodges_lehmann_two_sample(
    x: &[f64],
    y: &[f64],
    level: f64,
    method: RankMethod,
) -> Result<HodgesLehmann> {
    check_level(level)?;
    check_len(x, 1)?;
    check_len(y, 1)?;
    let (m, n) = (x.len(), y.len());
    let pairs = m.saturating_mul(n);
    check_pairs(pairs)?;
    let diffs: Vec<f64> = x
        .iter()
        .flat_map(|a| y.iter().map(move |b| a - b))
        .collect();
    let combined: Vec<f64> = x.iter().chain(y).copied().collect();
    let tied = tied_count(&combined);
    let small = m <= AUTO_EXACT_MAX && n <= AUTO_EXACT_MAX;
    let exact = choose_exact(method, tied, small, pairs, MAX_EXACT_PRODUCT)?;
    let (mf, nf) = (m as f64, n as f64);
    let sigma = (mf * nf * (mf + nf + 1.0) / 12.0).sqrt();
    let null = exact.then(|| ExactNull::rank_sum(m, n));
    Ok(order_interval(
        diffs,
        level,
        null,
        sigma,
        continuity(method),
    ))
}

fn check_pairs(pairs: usize) -> Result<()> {
    if pairs > MAX_PAIRS {
        return Err(StatsError::TooManyPairs {
            pairs,
            max: MAX_PAIRS,
        });
    }
    Ok(())
}

fn continuity(method: RankMethod) -> bool {
    match method {
        RankMethod::Normal { continuity } => continuity,
        RankMethod::Auto | RankMethod::Exact => true,
    }
}

fn choose_exact(
    method: RankMethod,
    tied: usize,
    small: bool,
    size: usize,
    max: usize,
) -> Result<bool> {
    match method {
        RankMethod::Auto => Ok(tied == 0 && small),
        RankMethod::Normal { .. } => Ok(false),
        RankMethod::Exact if tied > 0 => Err(StatsError::ExactTies(tied)),
        RankMethod::Exact if size > max => Err(StatsError::ExactTooLarge { size, max }),
        RankMethod::Exact => Ok(true),
    }
}

fn cube_minus(t: usize) -> f64 {
    let t = t as f64;
    t * t * t - t
}

/// Bounds at the q-th smallest and q-th largest of `values` (see the module documentation), with
/// q from the exact null when given, else from the normal approximation N(N/2, σ²).
fn order_interval(
    mut values: Vec<f64>,
    level: f64,
    null: Option<ExactNull>,
    sigma: f64,
    continuity: bool,
) -> HodgesLehmann {
    values.sort_by(f64::total_cmp);
    let big_n = values.len();
    let alpha = 1.0 - level;
    let (q, achieved_level) = match &null {
        Some(null) => {
            let q = null.quantile(alpha / 2.0).max(1);
            (q, 1.0 - 2.0 * null.cdf(q as f64 - 1.0))
        }
        None => {
            let mu = big_n as f64 / 2.0;
            let c = if continuity { 0.5 } else { 0.0 };
            let q = (mu - c - z_two_sided(level) * sigma).ceil().max(1.0);
            let achieved = 1.0 - 2.0 * normal_cdf((q - 1.0 + c - mu) / sigma);
            (q as usize, achieved)
        }
    };
    HodgesLehmann {
        interval: Interval {
            estimate: quantile_sorted(&values, 0.5),
            lower: values[q - 1],
            upper: values[big_n - q],
            level,
        },
        achieved_level,
        exact: null.is_some(),
    }
}

/// Average ranks (1-based) in input order, and the sizes of the tie groups larger than one.
fn average_ranks(values: &[f64]) -> (Vec<f64>, Vec<usize>) {
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&a, &b| values[a].total_cmp(&values[b]));
    let mut ranks = vec![0.0; values.len()];
    let mut ties = Vec::new();
    let mut start = 0;
    while start < order.len() {
        let mut end = start + 1;
        while end < order.len() && values[order[end]] == values[order[start]] {
            end += 1;
        }
        // Positions start..end hold ranks start+1 ..= end; their mean is (start + 1 + end) / 2.
        let rank = (start + 1 + end) as f64 / 2.0;
        for &i in &order[start..end] {
            ranks[i] = rank;
        }
        if end - start > 1 {
            ties.push(end - start);
        }
        start = end;
    }
    (ranks, ties)
}

/// Number of observations that share their value with another one.
fn tied_count(values: &[f64]) -> usize {
    average_ranks(values).1.iter().sum()
}

/// Exact null distribution of an integer-valued rank statistic on 0..=N, as counts of the
/// equally likely arrangements, with both tails accumulated from their own end so that small
/// upper-tail probabilities are not lost to cancellation.
struct ExactNull {
    /// `lower[q]` = number of arrangements with statistic ≤ q.
    lower: Vec<f64>,
    /// `upper[q]` = number of arrangements with statistic ≥ q.
    upper: Vec<f64>,
    total: f64,
}

impl ExactNull {
    fn from_counts(counts: Vec<f64>) -> Self {
        let mut lower = counts.clone();
        for i in 1..lower.len() {
            lower[i] += lower[i - 1];
        }
        let mut upper = counts;
        for i in (0..upper.len().saturating_sub(1)).rev() {
            upper[i] += upper[i + 1];
        }
        let total = lower.last().copied().unwrap_or(1.0);
        ExactNull {
            lower,
            upper,
            total,
        }
    }

    /// Signed-rank V for n untied non-zero values: subsets of {1, …, n} by their sum.
    fn signed_rank(n: usize) -> Self {
        let max = n * (n + 1) / 2;
        let mut counts = vec![0.0; max + 1];
        counts[0] = 1.0;
        for r in 1..=n {
            for s in (r..=r * (r + 1) / 2).rev() {
                counts[s] += counts[s - r];
            }
        }
        Self::from_counts(counts)
    }

    /// Mann–Whitney U for samples of m and n: arrangements of the smaller sample among the
    /// combined order, where placing one of its members after `t` of the other sample adds `t`.
    fn rank_sum(m: usize, n: usize) -> Self {
        // U of x with sizes (m, n) has the same law as with (n, m) (symmetry about mn/2), so
        // the table is built over the smaller sample.
        let (k, other) = if m <= n { (m, n) } else { (n, m) };
        let width = k * other + 1;
        let mut dp = vec![0.0; (k + 1) * width];
        dp[0] = 1.0;
        for t in 0..k + other {
            for j in (0..k.min(t + 1)).rev() {
                let before = t - j;
                if before > other {
                    continue;
                }
                let (head, tail) = dp.split_at_mut((j + 1) * width);
                let src = &head[j * width..];
                let dst = &mut tail[..width];
                for u in (0..=j * before.min(other)).rev() {
                    if src[u] != 0.0 {
                        dst[u + before] += src[u];
                    }
                }
            }
        }
        Self::from_counts(dp[k * width..].to_vec())
    }

    fn max(&self) -> usize {
        self.lower.len() - 1
    }

    /// P(W ≤ w); w may be fractional or out of range.
    fn cdf(&self, w: f64) -> f64 {
        if w < 0.0 {
            return 0.0;
        }
        let q = (w.floor() as usize).min(self.max());
        self.lower[q] / self.total
    }

    /// P(W ≥ w).
    fn sf(&self, w: f64) -> f64 {
        if w <= 0.0 {
            return 1.0;
        }
        let q = w.ceil() as usize;
        if q > self.max() {
            return 0.0;
        }
        self.upper[q] / self.total
    }

    /// Smallest q with P(W ≤ q) ≥ p, allowing R's tolerance of 10 machine epsilons.
    fn quantile(&self, p: f64) -> usize {
        let target = p - 10.0 * f64::EPSILON;
        self.lower
            .iter()
            .position(|&c| c / self.total >= target)
            .unwrap_or(self.max())
    }
}

fn exact_p(null: &ExactNull, w: f64, alternative: Alternative) -> f64 {
    match alternative {
        Alternative::Less => null.cdf(w),
        Alternative::Greater => null.sf(w),
        Alternative::TwoSided => {
            let mean = null.max() as f64 / 2.0;
            let tail = if w > mean { null.sf(w) } else { null.cdf(w) };
            (2.0 * tail).min(1.0)
        }
    }
}

fn normal_p(w: f64, mu: f64, var: f64, alternative: Alternative, continuity: bool) -> f64 {
    let sigma = var.sqrt();
    let c = if continuity { 0.5 } else { 0.0 };
    let diff = w - mu;
    match alternative {
        Alternative::Greater => normal_sf((diff - c) / sigma),
        Alternative::Less => normal_cdf((diff + c) / sigma),
        Alternative::TwoSided => {
            // The correction moves the statistic towards the mean, as R and scipy do.
            let shift = if diff > 0.0 {
                c
            } else if diff < 0.0 {
                -c
            } else {
                0.0
            };
            let z = (diff - shift) / sigma;
            (2.0 * normal_cdf(z).min(normal_sf(z))).min(1.0)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn signed_rank_counts_are_subset_sums() {
        // n = 3: subsets of {1,2,3} by sum 0..6 are 1,1,1,2,1,1,1.
        let null = ExactNull::signed_rank(3);
        let counts: Vec<f64> = (0..=6)
            .map(|q| null.lower[q] - if q > 0 { null.lower[q - 1] } else { 0.0 })
            .collect();
        assert_eq!(counts, vec![1.0, 1.0, 1.0, 2.0, 1.0, 1.0, 1.0]);
        assert_eq!(null.total, 8.0);
    }

    #[test]
    fn rank_sum_counts_are_gaussian_binomial() {
        // U for m = 2, n = 3: coefficients of the Gaussian binomial [5 choose 2]_q.
        let null = ExactNull::rank_sum(2, 3);
        let counts: Vec<f64> = (0..=6)
            .map(|q| null.lower[q] - if q > 0 { null.lower[q - 1] } else { 0.0 })
            .collect();
        assert_eq!(counts, vec![1.0, 1.0, 2.0, 2.0, 2.0, 1.0, 1.0]);
        assert_eq!(ExactNull::rank_sum(3, 2).lower, null.lower);
        // Total arrangements of 20 + 30 is C(50, 20).
        assert_eq!(ExactNull::rank_sum(20, 30).total, 47_129_212_243_960.0);
    }

    #[test]
    fn average_ranks_with_ties() {
        let (r, t) = average_ranks(&[3.0, 1.0, 3.0, 2.0, 3.0]);
        assert_eq!(r, vec![4.0, 1.0, 4.0, 2.0, 4.0]);
        assert_eq!(t, vec![3]);
    }

    #[test]
    fn exact_refuses_ties_and_zeros() {
        assert_eq!(
            signed_rank_test(&[0.0, 1.0, 2.0], Alternative::TwoSided, RankMethod::Exact),
            Err(StatsError::ExactTies(1))
        );
        assert_eq!(
            rank_sum_test(
                &[1.0, 2.0],
                &[2.0],
                Alternative::TwoSided,
                RankMethod::Exact
            ),
            Err(StatsError::ExactTies(2))
        );
        assert_eq!(
            signed_rank_test(&[0.0, 0.0], Alternative::TwoSided, RankMethod::Auto),
            Err(StatsError::TooFew { need: 1, got: 0 })
        );
        assert_eq!(
            rank_sum_test(&[1.0, 1.0], &[1.0], Alternative::TwoSided, RankMethod::Auto),
            Err(StatsError::ZeroVariance(1.0))
        );
    }

    #[test]
    fn single_observation_interval_is_degenerate() {
        let hl = hodges_lehmann_one_sample(&[2.5], 0.95, RankMethod::Auto).unwrap();
        assert_eq!((hl.interval.lower, hl.interval.upper), (2.5, 2.5));
        assert_eq!(hl.achieved_level, 0.0);
    }
}
