//! Seeded percentile bootstrap: of one sample, of clusters (patients resampled with replacement,
//! keeping each patient's observations together), and of a follow-up minus baseline difference
//! within clusters.
//!
//! Each replicate draws as many units (observations or clusters) as there are, uniformly with
//! replacement, and evaluates the statistic on all observations of the drawn units. The interval
//! is the type 7 quantiles at α/2 and 1 − α/2 of the replicate statistics; the estimate is the
//! statistic of the original data. Draws come from `Pcg64Mcg` seeded with `seed`, so a seed gives
//! the same interval on every platform for a given version of `rand`, and `bootstrap` on a
//! sample equals `bootstrap_clustered` on one-observation clusters with the same seed.

use crate::describe::quantile_sorted;
use crate::dist::{check_finite, check_level};
use crate::{Interval, Result, StatsError};
use rand::{Rng, SeedableRng};
use rand_pcg::Pcg64Mcg;

/// Observations of one cluster (patient) at baseline and at follow-up.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PairedCluster<'a> {
    pub baseline: &'a [f64],
    pub follow_up: &'a [f64],
}

/// Percentile bootstrap interval of `stat` over one sample of independent observations.
pub fn bootstrap(
    data: &[f64],
    stat: impl Fn(&[f64]) -> f64,
    reps: usize,
    seed: u64,
    level: f64,
) -> Result<Interval> {
    let clusters: Vec<&[f64]> = data.chunks(1).collect();
    bootstrap_clustered(&clusters, stat, reps, seed, level)
}

/// Percentile bootstrap interval of `stat` when observations are grouped in clusters (e.g.
/// repeated results of one patient): clusters are resampled with replacement and `stat` is
/// evaluated on all observations of the drawn clusters, so within-patient correlation is kept.
pub fn bootstrap_clustered(
    clusters: &[&[f64]],
    stat: impl Fn(&[f64]) -> f64,
    reps: usize,
    seed: u64,
    level: f64,
) -> Result<Interval> {
    check_setup(clusters.len(), reps, level)?;
    let all: Vec<f64> = clusters.iter().flat_map(|c| c.iter().copied()).collect();
    // Checked after flattening so a reported index counts observations across clusters.
    check_finite(&all)?;
    if all.is_empty() {
        return Err(StatsError::TooFew { need: 1, got: 0 });
    }
    let estimate = stat(&all);
    let mut buf = all;
    percentile(estimate, reps, seed, level, |rng| {
        buf.clear();
        for _ in 0..clusters.len() {
            buf.extend_from_slice(clusters[rng.random_range(0..clusters.len())]);
        }
        stat(&buf)
    })
}

/// Percentile bootstrap interval of `stat(follow-up) − stat(baseline)` when every cluster has
/// observations in both groups: clusters are resampled with replacement, and each group's
/// statistic is evaluated on that group's observations of the drawn clusters, so the pairing
/// of a patient's baseline and follow-up results is kept.
pub fn bootstrap_clustered_diff(
    clusters: &[PairedCluster<'_>],
    stat: impl Fn(&[f64]) -> f64,
    reps: usize,
    seed: u64,
    level: f64,
) -> Result<Interval> {
    check_setup(clusters.len(), reps, level)?;
    for (i, c) in clusters.iter().enumerate() {
        for (group, obs) in [("baseline", c.baseline), ("follow-up", c.follow_up)] {
            if obs.is_empty() {
                return Err(StatsError::EmptyGroup { cluster: i, group });
            }
            check_finite(obs)?;
        }
    }
    let all_base: Vec<f64> = clusters
        .iter()
        .flat_map(|c| c.baseline.iter().copied())
        .collect();
    let all_follow: Vec<f64> = clusters
        .iter()
        .flat_map(|c| c.follow_up.iter().copied())
        .collect();
    let estimate = stat(&all_follow) - stat(&all_base);
    // The flattened groups become the replicate buffers: already at the typical draw size, so
    // replicates rarely grow them and never allocate otherwise.
    let (mut base, mut follow) = (all_base, all_follow);
    percentile(estimate, reps, seed, level, |rng| {
        base.clear();
        follow.clear();
        for _ in 0..clusters.len() {
            let c = &clusters[rng.random_range(0..clusters.len())];
            base.extend_from_slice(c.baseline);
            follow.extend_from_slice(c.follow_up);
        }
        stat(&follow) - stat(&base)
    })
}

/// A statistic of a sample, as [`bootstrap_clustered_diff_many`] takes several.
pub type Statistic<'a> = &'a dyn Fn(&[f64]) -> f64;

/// [`bootstrap_clustered_diff`] for several statistics at once: every statistic is evaluated on
/// the same replicates, so interval `k` equals `bootstrap_clustered_diff(clusters, stats[k], reps,
/// seed, level)` exactly, while the clusters are drawn and gathered once per replicate rather than
/// once per statistic.
pub fn bootstrap_clustered_diff_many(
    clusters: &[PairedCluster<'_>],
    stats: &[Statistic<'_>],
    reps: usize,
    seed: u64,
    level: f64,
) -> Result<Vec<Interval>> {
    check_setup(clusters.len(), reps, level)?;
    for (i, c) in clusters.iter().enumerate() {
        for (group, obs) in [("baseline", c.baseline), ("follow-up", c.follow_up)] {
            if obs.is_empty() {
                return Err(StatsError::EmptyGroup { cluster: i, group });
            }
            check_finite(obs)?;
        }
    }
    let mut base: Vec<f64> = clusters
        .iter()
        .flat_map(|c| c.baseline.iter().copied())
        .collect();
    let mut follow: Vec<f64> = clusters
        .iter()
        .flat_map(|c| c.follow_up.iter().copied())
        .collect();
    let estimates: Vec<f64> = stats.iter().map(|s| s(&follow) - s(&base)).collect();
    if let Some(e) = estimates.iter().find(|e| !e.is_finite()) {
        return Err(StatsError::NonFiniteStatistic(*e));
    }
    let mut rng = Pcg64Mcg::seed_from_u64(seed);
    let mut values: Vec<Vec<f64>> = vec![Vec::with_capacity(reps); stats.len()];
    for rep in 0..reps {
        base.clear();
        follow.clear();
        for _ in 0..clusters.len() {
            let c = &clusters[rng.random_range(0..clusters.len())];
            base.extend_from_slice(c.baseline);
            follow.extend_from_slice(c.follow_up);
        }
        for (k, s) in stats.iter().enumerate() {
            let value = s(&follow) - s(&base);
            if !value.is_finite() {
                return Err(StatsError::NonFiniteReplicate { rep, value });
            }
            values[k].push(value);
        }
    }
    let alpha = 1.0 - level;
    Ok(estimates
        .into_iter()
        .zip(values)
        .map(|(estimate, mut v)| {
            v.sort_by(f64::total_cmp);
            Interval {
                estimate,
                lower: quantile_sorted(&v, alpha / 2.0),
                upper: quantile_sorted(&v, 1.0 - alpha / 2.0),
                level,
            }
        })
        .collect())
}

fn check_setup(units: usize, reps: usize, level: f64) -> Result<()> {
    check_level(level)?;
    if units == 0 {
        return Err(StatsError::TooFew { need: 1, got: 0 });
    }
    if reps == 0 {
        return Err(StatsError::NoReplicates(reps));
    }
    Ok(())
}

fn percentile(
    estimate: f64,
    reps: usize,
    seed: u64,
    level: f64,
    mut replicate: impl FnMut(&mut Pcg64Mcg) -> f64,
) -> Result<Interval> {
    if !estimate.is_finite() {
        return Err(StatsError::NonFiniteStatistic(estimate));
    }
    let mut rng = Pcg64Mcg::seed_from_u64(seed);
    let mut stats = Vec::with_capacity(reps);
    for rep in 0..reps {
        let value = replicate(&mut rng);
        if !value.is_finite() {
            return Err(StatsError::NonFiniteReplicate { rep, value });
        }
        stats.push(value);
    }
    stats.sort_by(f64::total_cmp);
    let alpha = 1.0 - level;
    Ok(Interval {
        estimate,
        lower: quantile_sorted(&stats, alpha / 2.0),
        upper: quantile_sorted(&stats, 1.0 - alpha / 2.0),
        level,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::describe::mean_unchecked;

    #[test]
    fn many_statistics_share_the_draws_of_single_runs() {
        let (b1, f1, b2, f2, b3, f3) = (
            [1.0, 2.0, 3.5],
            [2.0, 4.0],
            [0.5],
            [1.5, 2.5, 9.0],
            [7.0, 1.0],
            [3.0],
        );
        let clusters = [
            PairedCluster {
                baseline: &b1,
                follow_up: &f1,
            },
            PairedCluster {
                baseline: &b2,
                follow_up: &f2,
            },
            PairedCluster {
                baseline: &b3,
                follow_up: &f3,
            },
        ];
        let mean = |x: &[f64]| mean_unchecked(x);
        let max = |x: &[f64]| x.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let many = bootstrap_clustered_diff_many(&clusters, &[&mean, &max], 500, 7, 0.9).unwrap();
        assert_eq!(
            many[0],
            bootstrap_clustered_diff(&clusters, mean, 500, 7, 0.9).unwrap()
        );
        assert_eq!(
            many[1],
            bootstrap_clustered_diff(&clusters, max, 500, 7, 0.9).unwrap()
        );
    }

    #[test]
    fn rejects_degenerate_setups() {
        assert_eq!(
            bootstrap(&[], mean_unchecked, 10, 1, 0.95),
            Err(StatsError::TooFew { need: 1, got: 0 })
        );
        assert_eq!(
            bootstrap(&[1.0], mean_unchecked, 0, 1, 0.95),
            Err(StatsError::NoReplicates(0))
        );
        let empty: &[f64] = &[];
        let clusters = [PairedCluster {
            baseline: &[1.0],
            follow_up: empty,
        }];
        assert_eq!(
            bootstrap_clustered_diff(&clusters, mean_unchecked, 10, 1, 0.95),
            Err(StatsError::EmptyGroup {
                cluster: 0,
                group: "follow-up"
            })
        );
        // An all-empty draw makes the mean NaN: reported, not returned as a bound.
        let clusters: [&[f64]; 2] = [&[1.0], empty];
        assert!(matches!(
            bootstrap_clustered(&clusters, mean_unchecked, 200, 1, 0.95),
            Err(StatsError::NonFiniteReplicate { .. })
        ));
    }
}
