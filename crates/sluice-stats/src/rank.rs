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
//!
//! # Order statistics without materialising the pairs
//!
//! On the exact path (at most 1000 observations, or nₓ·n_y ≤ 10 000) the N values are
//! materialised and sorted. On the normal path they are never stored, so regional samples
//! (nₓ, n_y in the hundreds of thousands, N ≈ 10¹¹) cost O((nₓ + n_y)·log) memory-light passes:
//!
//! * The samples are sorted once (IEEE total order). The computed values fl(xᵢ − y_j) and
//!   fl(fl(dᵢ + d_j)/2) are monotone in each argument under that order (rounding is monotone,
//!   and a zero result is −0 only when both operands force it), so they form an implicit
//!   matrix sorted along rows and columns — with the very bits the materialised path produces.
//! * A two-pointer scan gives, for any threshold t, the number of values ≤ t together with the
//!   largest value ≤ t and the smallest value > t, in O(nₓ + n_y) (O(n) for the Walsh averages,
//!   walking the upper triangle i ≤ j).
//! * The k-th smallest value is found by bisection on the 64-bit total-order key of t between
//!   the smallest and the largest value. After each scan the bracket snaps to an actual value
//!   (the largest ≤ t when at least k values are ≤ t, otherwise the smallest > t), so the bracket
//!   at least halves in key space and always holds actual values; it closes on the k-th smallest
//!   exactly, within 64 scans.
//! * The bounds are the q-th smallest and the (N − q + 1)-th smallest. The estimate follows
//!   `quantile_sorted(.., 0.5)` step for step: the value at 0-based position ⌊(N − 1)/2⌋ and,
//!   for even N, its successor (the same value if enough ties reach it, otherwise the smallest
//!   value above it from one more scan), combined with the same arithmetic. The results are
//!   therefore bit-identical to sorting all N values. N is limited to 2⁵³ so that positions
//!   stay exact in f64.

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
/// On the exact path the Walsh averages or pairwise differences are materialised; this caps them
/// at 256 MiB (the exact size limits above are far below it).
const MAX_MATERIALISED_PAIRS: usize = 1 << 25;
/// On the normal path the values are only counted (see the module documentation); positions
/// up to 2⁵³ stay exact in f64.
const MAX_IMPLICIT_PAIRS: usize = 1 << 53;

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
    let pairs = n.saturating_mul(n.saturating_add(1)) / 2;
    let tied = tied_count(d);
    let exact = choose_exact(method, tied, n <= AUTO_EXACT_MAX, n, MAX_EXACT_SIGNED)?;
    let nf = n as f64;
    let sigma = (nf * (nf + 1.0) * (2.0 * nf + 1.0) / 24.0).sqrt();
    if exact {
        check_pairs(pairs, MAX_MATERIALISED_PAIRS)?;
        let mut walsh = Vec::with_capacity(pairs);
        for i in 0..n {
            for j in i..n {
                walsh.push((d[i] + d[j]) / 2.0);
            }
        }
        let null = ExactNull::signed_rank(n);
        return Ok(order_interval(
            walsh,
            level,
            Some(null),
            sigma,
            continuity(method),
        ));
    }
    check_pairs(pairs, MAX_IMPLICIT_PAIRS)?;
    let mut sorted = d.to_vec();
    sorted.sort_by(f64::total_cmp);
    Ok(implicit_interval(
        &WalshAverages { d: &sorted },
        level,
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
    let combined: Vec<f64> = x.iter().chain(y).copied().collect();
    let tied = tied_count(&combined);
    drop(combined);
    let small = m <= AUTO_EXACT_MAX && n <= AUTO_EXACT_MAX;
    let exact = choose_exact(method, tied, small, pairs, MAX_EXACT_PRODUCT)?;
    let (mf, nf) = (m as f64, n as f64);
    let sigma = (mf * nf * (mf + nf + 1.0) / 12.0).sqrt();
    if exact {
        check_pairs(pairs, MAX_MATERIALISED_PAIRS)?;
        let diffs: Vec<f64> = x
            .iter()
            .flat_map(|a| y.iter().map(move |b| a - b))
            .collect();
        let null = ExactNull::rank_sum(m, n);
        return Ok(order_interval(
            diffs,
            level,
            Some(null),
            sigma,
            continuity(method),
        ));
    }
    check_pairs(pairs, MAX_IMPLICIT_PAIRS)?;
    let mut xs = x.to_vec();
    xs.sort_by(f64::total_cmp);
    let mut ys = y.to_vec();
    ys.sort_by(f64::total_cmp);
    Ok(implicit_interval(
        &Differences { x: &xs, y: &ys },
        level,
        sigma,
        continuity(method),
    ))
}

fn check_pairs(pairs: usize, max: usize) -> Result<()> {
    if pairs > max {
        return Err(StatsError::TooManyPairs { pairs, max });
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

/// Rank q of the bounds among N values (see the module documentation), with the achieved
/// confidence: from the exact null when given, else from the normal approximation N(N/2, σ²).
fn bound_rank(
    big_n: usize,
    level: f64,
    null: Option<&ExactNull>,
    sigma: f64,
    continuity: bool,
) -> (usize, f64) {
    let alpha = 1.0 - level;
    match null {
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
    }
}

/// Bounds at the q-th smallest and q-th largest of `values`, materialised and sorted.
fn order_interval(
    mut values: Vec<f64>,
    level: f64,
    null: Option<ExactNull>,
    sigma: f64,
    continuity: bool,
) -> HodgesLehmann {
    values.sort_by(f64::total_cmp);
    let big_n = values.len();
    let (q, achieved_level) = bound_rank(big_n, level, null.as_ref(), sigma, continuity);
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

/// The same as [`order_interval`] on the normal path, by selection on the implicit matrix.
fn implicit_interval(
    values: &impl PairValues,
    level: f64,
    sigma: f64,
    continuity: bool,
) -> HodgesLehmann {
    let big_n = values.len();
    let (q, achieved_level) = bound_rank(big_n, level, None, sigma, continuity);
    HodgesLehmann {
        interval: Interval {
            estimate: implicit_median(values),
            lower: select(values, q),
            upper: select(values, big_n - q + 1),
            level,
        },
        achieved_level,
        exact: false,
    }
}

/// What one threshold scan of the implicit values reports.
struct Scan {
    /// Number of values ≤ t (total order).
    at_most: usize,
    /// Largest value ≤ t; meaningful when `at_most > 0`.
    max_at_most: f64,
    /// Smallest value > t; meaningful when `at_most < len()`.
    min_above: f64,
}

/// N pairwise values held implicitly as a matrix sorted along rows and columns.
trait PairValues {
    fn len(&self) -> usize;
    /// Smallest and largest value.
    fn range(&self) -> (f64, f64);
    fn scan(&self, t: f64) -> Scan;
}

fn above(v: f64, t: f64) -> bool {
    v.total_cmp(&t).is_gt()
}

fn total_max(a: f64, b: f64) -> f64 {
    if b.total_cmp(&a).is_gt() { b } else { a }
}

fn total_min(a: f64, b: f64) -> f64 {
    if b.total_cmp(&a).is_lt() { b } else { a }
}

/// All xᵢ − y_j, with x and y sorted in total order: each row (fixed i) decreases along j.
struct Differences<'a> {
    x: &'a [f64],
    y: &'a [f64],
}

impl PairValues for Differences<'_> {
    fn len(&self) -> usize {
        self.x.len() * self.y.len()
    }

    fn range(&self) -> (f64, f64) {
        let (x, y) = (self.x, self.y);
        (x[0] - y[y.len() - 1], x[x.len() - 1] - y[0])
    }

    fn scan(&self, t: f64) -> Scan {
        let (x, y) = (self.x, self.y);
        let n = y.len();
        let mut at_most = 0;
        let (mut max_at_most, mut min_above) = (f64::NEG_INFINITY, f64::INFINITY);
        // In row i the values ≤ t are j ≥ p; p never decreases as xᵢ grows.
        let mut p = 0;
        for &a in x {
            while p < n && above(a - y[p], t) {
                p += 1;
            }
            at_most += n - p;
            if p < n {
                max_at_most = total_max(max_at_most, a - y[p]);
            }
            if p > 0 {
                min_above = total_min(min_above, a - y[p - 1]);
            }
        }
        Scan {
            at_most,
            max_at_most,
            min_above,
        }
    }
}

/// All Walsh averages (dᵢ + d_j)/2, i ≤ j, with d sorted in total order: the upper triangle of
/// a symmetric matrix increasing along rows and columns.
struct WalshAverages<'a> {
    d: &'a [f64],
}

fn walsh(a: f64, b: f64) -> f64 {
    (a + b) / 2.0
}

impl PairValues for WalshAverages<'_> {
    fn len(&self) -> usize {
        let n = self.d.len();
        n * (n + 1) / 2
    }

    fn range(&self) -> (f64, f64) {
        let (first, last) = (self.d[0], self.d[self.d.len() - 1]);
        (walsh(first, first), walsh(last, last))
    }

    fn scan(&self, t: f64) -> Scan {
        let d = self.d;
        let mut at_most = 0;
        let (mut max_at_most, mut min_above) = (f64::NEG_INFINITY, f64::INFINITY);
        // r = number of j (over the full row) with w(i, j) ≤ t; it never increases with i.
        let mut r = d.len();
        for (i, &a) in d.iter().enumerate() {
            while r > i && above(walsh(a, d[r - 1]), t) {
                r -= 1;
            }
            if r <= i {
                // Row i and every later row lie wholly above t; w(i, i) is their minimum.
                min_above = total_min(min_above, walsh(a, a));
                break;
            }
            at_most += r - i;
            max_at_most = total_max(max_at_most, walsh(a, d[r - 1]));
            if r < d.len() {
                min_above = total_min(min_above, walsh(a, d[r]));
            }
        }
        Scan {
            at_most,
            max_at_most,
            min_above,
        }
    }
}

/// Key of `v` that orders as [`f64::total_cmp`] does.
fn total_key(v: f64) -> i64 {
    let bits = v.to_bits() as i64;
    bits ^ (((bits >> 63) as u64) >> 1) as i64
}

/// Inverse of [`total_key`] (the map is an involution on the bits).
fn from_total_key(key: i64) -> f64 {
    f64::from_bits((key ^ (((key >> 63) as u64) >> 1) as i64) as u64)
}

/// The k-th smallest (1-based) of the implicit values, exactly: bisection on the total-order key
/// with the bracket snapped to actual values after every scan.
fn select(values: &impl PairValues, k: usize) -> f64 {
    debug_assert!(k >= 1 && k <= values.len());
    let (mut lo, mut hi) = values.range();
    while lo.total_cmp(&hi).is_lt() {
        let mid = (i128::from(total_key(lo)) + i128::from(total_key(hi))).div_euclid(2);
        let scan = values.scan(from_total_key(mid as i64));
        if scan.at_most >= k {
            hi = scan.max_at_most;
        } else {
            lo = scan.min_above;
        }
    }
    lo
}

/// `quantile_sorted(sorted values, 0.5)` without the sorted values.
fn implicit_median(values: &impl PairValues) -> f64 {
    let big_n = values.len();
    let h = (big_n - 1) as f64 * 0.5;
    let lo = h.floor() as usize;
    let frac = h - lo as f64;
    let at = select(values, lo + 1);
    if frac > 0.0 && lo + 1 < big_n {
        let scan = values.scan(at);
        let next = if scan.at_most >= lo + 2 {
            at
        } else {
            scan.min_above
        };
        at + frac * (next - at)
    } else {
        at
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

    use rand::{Rng, SeedableRng};
    use rand_pcg::Pcg64Mcg;

    /// Seeded sample; with `decimals` the values are rounded, which makes ties and −0.0.
    fn sample(rng: &mut Pcg64Mcg, n: usize, shift: f64, decimals: Option<i32>) -> Vec<f64> {
        (0..n)
            .map(|_| {
                let v: f64 = rng.random_range(-1.0..1.0) * rng.random_range(0.0..3.0) + shift;
                match decimals {
                    Some(k) => (v * 10f64.powi(k)).round() / 10f64.powi(k),
                    None => v,
                }
            })
            .collect()
    }

    fn all_differences(x: &[f64], y: &[f64]) -> Vec<f64> {
        x.iter()
            .flat_map(|a| y.iter().map(move |b| a - b))
            .collect()
    }

    fn all_walsh(d: &[f64]) -> Vec<f64> {
        let mut w = Vec::new();
        for i in 0..d.len() {
            for j in i..d.len() {
                w.push((d[i] + d[j]) / 2.0);
            }
        }
        w
    }

    fn bits(hl: &HodgesLehmann) -> [u64; 4] {
        let i = hl.interval;
        [i.estimate, i.lower, i.upper, hl.achieved_level].map(f64::to_bits)
    }

    /// The normal path against the materialised reference (`order_interval` without a null).
    fn check_two(x: &[f64], y: &[f64], level: f64, continuity: bool) {
        let method = RankMethod::Normal { continuity };
        let got = hodges_lehmann_two_sample(x, y, level, method).unwrap();
        let (mf, nf) = (x.len() as f64, y.len() as f64);
        let sigma = (mf * nf * (mf + nf + 1.0) / 12.0).sqrt();
        let want = order_interval(all_differences(x, y), level, None, sigma, continuity);
        assert_eq!(
            bits(&got),
            bits(&want),
            "m={} n={} {got:?} {want:?}",
            mf,
            nf
        );
        assert!(!got.exact);
    }

    fn check_one(d: &[f64], level: f64, continuity: bool) {
        let method = RankMethod::Normal { continuity };
        let got = hodges_lehmann_one_sample(d, level, method).unwrap();
        let nf = d.len() as f64;
        let sigma = (nf * (nf + 1.0) * (2.0 * nf + 1.0) / 24.0).sqrt();
        let want = order_interval(all_walsh(d), level, None, sigma, continuity);
        assert_eq!(bits(&got), bits(&want), "n={} {got:?} {want:?}", nf);
    }

    #[test]
    fn selection_matches_sorting_at_every_rank() {
        let mut rng = Pcg64Mcg::seed_from_u64(7);
        for round in 0..200 {
            let decimals = [None, Some(0), Some(1), Some(2)][round % 4];
            let m = rng.random_range(1..25);
            let n = rng.random_range(1..25);
            let mut x = sample(&mut rng, m, 0.3, decimals);
            let mut y = sample(&mut rng, n, 0.0, decimals);
            if round % 7 == 0 {
                x[0] = -0.0;
                y[n - 1] = 0.0;
            }
            let mut want = all_differences(&x, &y);
            want.sort_by(f64::total_cmp);
            x.sort_by(f64::total_cmp);
            y.sort_by(f64::total_cmp);
            let diffs = Differences { x: &x, y: &y };
            for (k, w) in want.iter().enumerate() {
                assert_eq!(
                    select(&diffs, k + 1).to_bits(),
                    w.to_bits(),
                    "{x:?} {y:?} {k}"
                );
            }
            assert_eq!(
                implicit_median(&diffs).to_bits(),
                quantile_sorted(&want, 0.5).to_bits()
            );
            let mut want = all_walsh(&x);
            want.sort_by(f64::total_cmp);
            let walsh = WalshAverages { d: &x };
            for (k, w) in want.iter().enumerate() {
                assert_eq!(select(&walsh, k + 1).to_bits(), w.to_bits(), "{x:?} {k}");
            }
            assert_eq!(
                implicit_median(&walsh).to_bits(),
                quantile_sorted(&want, 0.5).to_bits()
            );
        }
    }

    #[test]
    fn implicit_normal_path_is_bit_identical_to_materialised() {
        let mut rng = Pcg64Mcg::seed_from_u64(2024);
        for round in 0..60 {
            let decimals = [None, Some(0), Some(1), Some(3)][round % 4];
            let m = rng.random_range(1..120);
            let n = rng.random_range(1..120);
            let x = sample(&mut rng, m, 0.4, decimals);
            let y = sample(&mut rng, n, 0.0, decimals);
            let level = [0.95, 0.9, 0.99, 0.5][round % 4];
            check_two(&x, &y, level, round % 3 != 0);
            check_one(&x, level, round % 3 != 1);
        }
        // Heavy ties: three distinct values only.
        let x: Vec<f64> = (0..301).map(|i| f64::from(i % 3)).collect();
        let y: Vec<f64> = (0..200).map(|i| f64::from(i % 3) - 0.5).collect();
        check_two(&x, &y, 0.95, true);
        check_one(&y, 0.95, true);
    }

    #[test]
    fn implicit_normal_path_at_3000_matches_materialised() {
        let mut rng = Pcg64Mcg::seed_from_u64(11);
        let x = sample(&mut rng, 3000, 0.25, Some(2));
        let y = sample(&mut rng, 3000, 0.0, Some(2));
        check_two(&x, &y, 0.95, true);
        check_one(&x, 0.95, true);
        // Auto takes the normal path for tied data, also through the public entry point.
        let auto = hodges_lehmann_two_sample(&x, &y, 0.95, RankMethod::Auto).unwrap();
        let normal =
            hodges_lehmann_two_sample(&x, &y, 0.95, RankMethod::Normal { continuity: true })
                .unwrap();
        assert_eq!(bits(&auto), bits(&normal));
        let x = sample(&mut rng, 2999, 0.25, None);
        let y = sample(&mut rng, 3001, 0.0, None);
        check_two(&x, &y, 0.9, false);
        check_one(&y, 0.9, false);
    }

    #[test]
    fn single_observation_interval_is_degenerate() {
        let hl = hodges_lehmann_one_sample(&[2.5], 0.95, RankMethod::Auto).unwrap();
        assert_eq!((hl.interval.lower, hl.interval.upper), (2.5, 2.5));
        assert_eq!(hl.achieved_level, 0.0);
    }
}
