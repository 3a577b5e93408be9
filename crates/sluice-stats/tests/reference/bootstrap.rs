//! Bootstrap checks. No outside software reproduces these draws, so the checks are properties
//! that pin the method down: determinism for a seed, equivalence of the plain and clustered forms
//! on one-observation clusters, and the behaviour clustering is for.

use rand::{Rng, SeedableRng};
use rand_pcg::Pcg64Mcg;
use sluice_stats::{
    Interval, PairedCluster, StatsError, bootstrap, bootstrap_clustered, bootstrap_clustered_diff,
};

fn mean(x: &[f64]) -> f64 {
    x.iter().sum::<f64>() / x.len() as f64
}

fn median(x: &[f64]) -> f64 {
    sluice_stats::median(x).unwrap_or(f64::NAN)
}

/// Standard normal draws by Box–Muller, so the tests need nothing beyond `rand`.
fn normals(n: usize, seed: u64) -> Vec<f64> {
    let mut rng = Pcg64Mcg::seed_from_u64(seed);
    (0..n)
        .map(|_| {
            let u: f64 = 1.0 - rng.random::<f64>();
            let v: f64 = rng.random();
            (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
        })
        .collect()
}

fn width(i: &Interval) -> f64 {
    i.upper - i.lower
}

#[test]
fn same_seed_same_interval_other_seed_other_interval() {
    let x = normals(60, 1);
    let a = bootstrap(&x, median, 999, 42, 0.95).unwrap();
    let b = bootstrap(&x, median, 999, 42, 0.95).unwrap();
    let c = bootstrap(&x, median, 999, 43, 0.95).unwrap();
    assert_eq!(a, b);
    assert_ne!((a.lower, a.upper), (c.lower, c.upper));
    assert_eq!(a.estimate, median(&x));
    assert!(a.lower <= a.estimate && a.estimate <= a.upper);
}

#[test]
fn plain_bootstrap_is_clustered_bootstrap_of_singletons() {
    let x = normals(37, 2);
    let singletons: Vec<&[f64]> = x.chunks(1).collect();
    let plain = bootstrap(&x, mean, 500, 7, 0.9).unwrap();
    let clustered = bootstrap_clustered(&singletons, mean, 500, 7, 0.9).unwrap();
    assert_eq!(plain, clustered);
}

#[test]
fn duplicated_observations_within_patients_add_no_information() {
    // Each patient's value recorded three times: resampling patients must give the same
    // interval for the mean as resampling the patient values themselves.
    let values = normals(40, 3);
    let tripled: Vec<Vec<f64>> = values.iter().map(|v| vec![*v; 3]).collect();
    let clusters: Vec<&[f64]> = tripled.iter().map(Vec::as_slice).collect();
    let by_patient = bootstrap_clustered(&clusters, mean, 800, 11, 0.95).unwrap();
    let plain = bootstrap(&values, mean, 800, 11, 0.95).unwrap();
    for (a, b) in [
        (by_patient.lower, plain.lower),
        (by_patient.upper, plain.upper),
        (by_patient.estimate, plain.estimate),
    ] {
        assert!((a - b).abs() < 1e-12, "{a} vs {b}");
    }
    // Treating the 120 copies as independent understates the uncertainty by about √3.
    let flat: Vec<f64> = tripled.concat();
    let naive = bootstrap(&flat, mean, 800, 11, 0.95).unwrap();
    let ratio = width(&by_patient) / width(&naive);
    assert!((1.4..2.1).contains(&ratio), "width ratio {ratio}");
}

#[test]
fn percentile_interval_of_a_mean_is_near_normal_theory() {
    let x = normals(400, 4);
    let i = bootstrap(&x, mean, 4000, 5, 0.95).unwrap();
    let sd = sluice_stats::sd(&x).unwrap();
    let half = 1.959_964 * sd / 20.0;
    let m = mean(&x);
    assert!((i.lower - (m - half)).abs() < 0.1 * half, "{i:?}");
    assert!((i.upper - (m + half)).abs() < 0.1 * half, "{i:?}");
}

#[test]
fn paired_difference_of_a_constant_shift_is_that_shift() {
    let base: Vec<Vec<f64>> = (0..25)
        .map(|i| normals(1 + i % 4, 100 + i as u64))
        .collect();
    let follow: Vec<Vec<f64>> = base
        .iter()
        .map(|b| b.iter().map(|v| v + 1.5).collect())
        .collect();
    let clusters: Vec<PairedCluster<'_>> = base
        .iter()
        .zip(&follow)
        .map(|(b, f)| PairedCluster {
            baseline: b,
            follow_up: f,
        })
        .collect();
    let i = bootstrap_clustered_diff(&clusters, mean, 500, 9, 0.95).unwrap();
    for v in [i.estimate, i.lower, i.upper] {
        assert!((v - 1.5).abs() < 1e-12, "{i:?}");
    }
}

#[test]
fn paired_difference_keeps_the_pairing() {
    // Large between-patient spread, small within-patient change: a bootstrap that kept the
    // pairing sees only the change's noise, so its interval is far narrower than the spread.
    let level: Vec<f64> = normals(30, 6).iter().map(|v| 10.0 * v).collect();
    let noise = normals(60, 7);
    let base: Vec<Vec<f64>> = level
        .iter()
        .zip(noise.chunks(2))
        .map(|(l, e)| vec![l + 0.1 * e[0]])
        .collect();
    let follow: Vec<Vec<f64>> = level
        .iter()
        .zip(noise.chunks(2))
        .map(|(l, e)| vec![l + 0.5 + 0.1 * e[1]])
        .collect();
    let clusters: Vec<PairedCluster<'_>> = base
        .iter()
        .zip(&follow)
        .map(|(b, f)| PairedCluster {
            baseline: b,
            follow_up: f,
        })
        .collect();
    let i = bootstrap_clustered_diff(&clusters, mean, 2000, 8, 0.95).unwrap();
    assert!(i.lower > 0.3 && i.upper < 0.7, "{i:?}");
    let direct = mean(&follow.concat()) - mean(&base.concat());
    assert_eq!(i.estimate, direct);
}

#[test]
fn bad_statistics_and_inputs_are_errors() {
    let x = [1.0, 2.0, f64::NAN];
    assert!(matches!(
        bootstrap(&x, mean, 10, 1, 0.95),
        Err(StatsError::NonFinite { index: 2, .. })
    ));
    assert!(matches!(
        bootstrap(&[1.0, 2.0], |_| f64::NAN, 10, 1, 0.95),
        Err(StatsError::NonFiniteStatistic(_))
    ));
    assert_eq!(
        bootstrap(&[1.0, 2.0], mean, 10, 1, 95.0),
        Err(StatsError::Level(95.0))
    );
}
