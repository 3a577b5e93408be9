//! Small statistics on plain `f64` slices and counts, for the interval estimates a pathology lab
//! analyst reports: every function validates its input and returns a [`StatsError`] instead of
//! panicking on empty data, too few observations, non-finite values or impossible counts.
//!
//! # What is here, and which definitions are used
//!
//! * [`describe`]: [`mean`], [`variance`] and [`sd`] (denominator n − 1), [`quantile`],
//!   [`quantiles`] and [`median`]. Quantiles are **Hyndman & Fan (1996) type 7**, the default of
//!   R's `quantile` and numpy's `quantile`: with the sorted sample x₍₁₎ ≤ … ≤ x₍ₙ₎ and
//!   h = (n − 1)·p + 1, Q(p) = x₍⌊h⌋₎ + (h − ⌊h⌋)·(x₍⌊h⌋+1₎ − x₍⌊h⌋₎).
//! * [`ttest`]: Welch two-sample t interval for a difference in means (Welch–Satterthwaite
//!   degrees of freedom) and the paired t interval for a mean difference; t quantiles from
//!   `statrs`' `StudentsT`.
//! * [`proportion`]: Wilson score and Clopper–Pearson intervals for a binomial proportion, and
//!   McNemar's test on the discordant pairs (b, c) — chi-square with and without the continuity
//!   correction (|b − c| − 1)², as R's `mcnemar.test` and statsmodels compute it, and the exact
//!   two-sided binomial version.
//! * [`rate`]: Garwood's exact interval for a Poisson count (or rate per person-time) from gamma
//!   (chi-square) quantiles, and the exact conditional interval for a rate ratio: Clopper–Pearson on
//!   p = x₁/(x₁ + x₂), mapped through RR = p/(1 − p) · t₂/t₁. Zero counts give a bound of 0 or ∞.
//! * [`rank`]: Wilcoxon signed-rank statistic V with its p-value and the one-sample
//!   Hodges–Lehmann estimate (median of the Walsh averages) with its signed-rank interval; the
//!   Wilcoxon–Mann–Whitney statistic W (rank sum of `x` minus nₓ(nₓ + 1)/2, R's `W`, scipy's `U`)
//!   with its p-value and the two-sample Hodges–Lehmann shift (median of all xᵢ − yⱼ) with its
//!   interval. See [`rank`] for the exact-versus-normal rule and the interval convention, which
//!   is R's `wilcox.test`: with q the smallest value whose exact lower-tail probability P(W ≤ q)
//!   reaches α/2 (q at least 1), the bounds are the q-th smallest and q-th largest Walsh averages
//!   (pairwise differences). `RankMethod::Auto` uses the exact null distribution (dynamic
//!   programming) for untied data — for the signed-rank test also without zeros — with n ≤ 50
//!   (each sample ≤ 50), and otherwise the normal approximation with tie-corrected variance and a
//!   continuity correction of ½.
//! * [`mod@bootstrap`]: seeded percentile bootstrap of one sample, of clusters (patients resampled
//!   with replacement, the statistic computed over all observations of the drawn clusters), and of
//!   a within-cluster difference (follow-up minus baseline). The percentile bounds are type 7
//!   quantiles of the replicates; draws use `rand_pcg`'s `Pcg64Mcg`, so a seed always gives the same
//!   interval for a given version of `rand`.
//! * [`meta`]: inverse-variance meta-analysis — fixed effect, DerSimonian–Laird random effects,
//!   Cochran's Q, I² and τ² — with the standard error and normal-theory interval of each pooled
//!   estimate.
//!
//! Confidence levels are given as a fraction (0.95), never as a percent.

pub mod bootstrap;
pub mod describe;
mod dist;
mod error;
pub mod meta;
pub mod proportion;
pub mod rank;
pub mod rate;
pub mod ttest;

pub use bootstrap::{
    PairedCluster, bootstrap, bootstrap_clustered, bootstrap_clustered_diff,
    bootstrap_clustered_diff_many,
};
pub use describe::{differences, mean, median, quantile, quantiles, sd, variance};
pub use dist::{t_p_two_sided, t_two_sided, z_two_sided};
pub use error::StatsError;
pub use meta::{MetaAnalysis, Pooled, meta_analysis};
pub use proportion::{McNemar, clopper_pearson_ci, mcnemar, wilson_ci};
pub use rank::{
    HodgesLehmann, RankMethod, RankSumTest, SignedRankTest, hodges_lehmann_one_sample,
    hodges_lehmann_two_sample, rank_sum_test, signed_rank_test,
};
pub use rate::{poisson_exact_ci, rate_ratio_exact_ci};
pub use ttest::{TInterval, paired_t_ci, welch_t_ci};

/// Shorthand for this crate's results.
pub type Result<T> = std::result::Result<T, StatsError>;

/// A point estimate with a two-sided confidence interval at `level` (e.g. 0.95).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Interval {
    pub estimate: f64,
    pub lower: f64,
    pub upper: f64,
    pub level: f64,
}

/// Direction of the alternative hypothesis of a test; `Greater` means the location of the first
/// (or only) sample exceeds the null value.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Alternative {
    TwoSided,
    Less,
    Greater,
}
