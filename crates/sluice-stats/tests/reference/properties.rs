//! Properties that hold by construction and tie the exact and normal paths together: shift
//! equivariance of the Hodges–Lehmann intervals, agreement of exact and normal p-values at
//! moderate n, and errors rather than panics on degenerate input.

use sluice_stats::{
    Alternative, RankMethod, StatsError, clopper_pearson_ci, differences,
    hodges_lehmann_one_sample, hodges_lehmann_two_sample, mcnemar, mean, meta_analysis,
    paired_t_ci, poisson_exact_ci, quantile, rank_sum_test, rate_ratio_exact_ci, sd,
    signed_rank_test, welch_t_ci, wilson_ci,
};

/// Distinct, irregular values without a random generator: frac(k·φ) spreads evenly.
fn spread(n: usize, offset: f64) -> Vec<f64> {
    (1..=n)
        .map(|k| (k as f64 * 0.618_033_988_749_895).fract() * 4.0 - 2.0 + offset)
        .collect()
}

#[test]
fn hodges_lehmann_intervals_move_with_a_shift() {
    let d = spread(30, 0.3);
    let shifted: Vec<f64> = d.iter().map(|v| v + 10.0).collect();
    let a = hodges_lehmann_one_sample(&d, 0.95, RankMethod::Auto).unwrap();
    let b = hodges_lehmann_one_sample(&shifted, 0.95, RankMethod::Auto).unwrap();
    for (u, v) in [
        (a.interval.estimate, b.interval.estimate),
        (a.interval.lower, b.interval.lower),
        (a.interval.upper, b.interval.upper),
    ] {
        assert!((u + 10.0 - v).abs() < 1e-9);
    }
    let x = spread(20, 1.0);
    let y = spread(17, 0.0);
    let xs: Vec<f64> = x.iter().map(|v| v - 3.0).collect();
    let c = hodges_lehmann_two_sample(&x, &y, 0.9, RankMethod::Auto).unwrap();
    let e = hodges_lehmann_two_sample(&xs, &y, 0.9, RankMethod::Auto).unwrap();
    assert!((c.interval.lower - 3.0 - e.interval.lower).abs() < 1e-9);
    assert!((c.interval.upper - 3.0 - e.interval.upper).abs() < 1e-9);
    assert!(c.interval.lower < c.interval.estimate && c.interval.estimate < c.interval.upper);
}

#[test]
fn exact_and_normal_agree_at_moderate_n() {
    let d = spread(50, 0.35);
    for alt in [
        Alternative::TwoSided,
        Alternative::Less,
        Alternative::Greater,
    ] {
        let e = signed_rank_test(&d, alt, RankMethod::Exact).unwrap();
        let n = signed_rank_test(&d, alt, RankMethod::Normal { continuity: true }).unwrap();
        assert!((e.p_value - n.p_value).abs() < 2e-3, "{e:?} {n:?}");
    }
    let he = hodges_lehmann_one_sample(&d, 0.95, RankMethod::Exact).unwrap();
    let hn = hodges_lehmann_one_sample(&d, 0.95, RankMethod::Normal { continuity: true }).unwrap();
    assert!((he.achieved_level - hn.achieved_level).abs() < 5e-3);
    assert!(he.achieved_level >= 0.95 && hn.achieved_level >= 0.95);

    // Forced exact beyond Auto's size rule: 100 vs 100 through the dynamic programme.
    let x = spread(100, 0.2);
    let y: Vec<f64> = spread(101, 0.0)[1..].iter().map(|v| v + 1e-7).collect();
    let e = rank_sum_test(&x, &y, Alternative::TwoSided, RankMethod::Exact).unwrap();
    let n = rank_sum_test(&x, &y, Alternative::TwoSided, RankMethod::Auto).unwrap();
    assert!(e.exact && !n.exact);
    assert!((e.p_value - n.p_value).abs() < 2e-3, "{e:?} {n:?}");
    let he = hodges_lehmann_two_sample(&x, &y, 0.95, RankMethod::Exact).unwrap();
    let hn = hodges_lehmann_two_sample(&x, &y, 0.95, RankMethod::Auto).unwrap();
    assert!((he.interval.lower - hn.interval.lower).abs() < 0.02);
    assert!((he.interval.upper - hn.interval.upper).abs() < 0.02);
}

#[test]
fn exact_tails_overlap_in_one_atom() {
    // P(V ≤ v) + P(V ≥ v) = 1 + P(V = v) > 1 for the exact law.
    let d = spread(12, 0.4);
    let less = signed_rank_test(&d, Alternative::Less, RankMethod::Exact).unwrap();
    let greater = signed_rank_test(&d, Alternative::Greater, RankMethod::Exact).unwrap();
    let atom = less.p_value + greater.p_value - 1.0;
    assert!(atom > 0.0 && atom < 0.05, "{atom}");
}

#[test]
fn exact_limits_are_errors() {
    let d = spread(1001, 0.0);
    assert_eq!(
        signed_rank_test(&d, Alternative::TwoSided, RankMethod::Exact),
        Err(StatsError::ExactTooLarge {
            size: 1001,
            max: 1000
        })
    );
    let x = spread(101, 0.0);
    let y: Vec<f64> = spread(101, 0.0).iter().map(|v| v + 1e-7).collect();
    assert_eq!(
        rank_sum_test(&x, &y, Alternative::TwoSided, RankMethod::Exact),
        Err(StatsError::ExactTooLarge {
            size: 10201,
            max: 10_000
        })
    );
}

#[test]
fn degenerate_input_gives_errors_not_panics() {
    let nan = [1.0, f64::NAN, 2.0];
    let empty: [f64; 0] = [];
    let one = [1.0];
    assert!(mean(&empty).is_err() && mean(&nan).is_err());
    assert!(sd(&one).is_err());
    assert!(quantile(&empty, 0.5).is_err());
    assert!(welch_t_ci(&one, &[1.0, 2.0], 0.95).is_err());
    assert!(welch_t_ci(&nan, &[1.0, 2.0], 0.95).is_err());
    assert!(paired_t_ci(&[1.0, 2.0], &one, 0.95).is_err());
    assert!(differences(&nan, &[0.0; 3]).is_err());
    assert!(wilson_ci(0, 0, 0.95).is_err());
    assert!(wilson_ci(1, 2, f64::NAN).is_err());
    assert!(clopper_pearson_ci(3, 2, 0.95).is_err());
    assert!(poisson_exact_ci(1, f64::INFINITY, 0.95).is_err());
    assert!(poisson_exact_ci(1, -1.0, 0.95).is_err());
    assert!(rate_ratio_exact_ci(0, 1.0, 0, 1.0, 0.95).is_err());
    assert!(mcnemar(0, 0).is_err());
    for method in [
        RankMethod::Auto,
        RankMethod::Exact,
        RankMethod::Normal { continuity: false },
    ] {
        assert!(signed_rank_test(&empty, Alternative::TwoSided, method).is_err());
        assert!(signed_rank_test(&nan, Alternative::TwoSided, method).is_err());
        assert!(rank_sum_test(&empty, &one, Alternative::Less, method).is_err());
        assert!(rank_sum_test(&nan, &one, Alternative::Less, method).is_err());
        assert!(hodges_lehmann_one_sample(&empty, 0.95, method).is_err());
        assert!(hodges_lehmann_one_sample(&nan, 0.95, method).is_err());
        assert!(hodges_lehmann_one_sample(&one, 0.0, method).is_err());
        assert!(hodges_lehmann_two_sample(&one, &empty, 0.95, method).is_err());
    }
    assert!(meta_analysis(&[0.1, 0.2], &[0.1], 0.95).is_err());
    assert!(meta_analysis(&[0.1, f64::NAN], &[0.1, 0.1], 0.95).is_err());
}

#[test]
fn error_messages_carry_the_value() {
    let e = poisson_exact_ci(1, -2.5, 0.95).unwrap_err();
    assert_eq!(
        e.to_string(),
        "person-time must be positive and finite, got -2.5"
    );
    let e = quantile(&[1.0, f64::INFINITY], 0.5).unwrap_err();
    assert_eq!(e.to_string(), "observation 1 is not finite: inf");
}

/// Regional-scale samples far beyond what could be materialised (4·10¹⁰ differences, 1.25·10⁹
/// Walsh averages) go through the counting path; no timing is asserted.
#[test]
fn hodges_lehmann_at_regional_scale_runs() {
    let round = |v: f64| (v * 100.0).round() / 100.0;
    let x: Vec<f64> = spread(200_000, 0.5).into_iter().map(round).collect();
    let y: Vec<f64> = spread(200_000, 0.0).into_iter().map(round).collect();
    let hl = hodges_lehmann_two_sample(&x, &y, 0.95, RankMethod::Auto).unwrap();
    assert!(!hl.exact);
    let i = hl.interval;
    assert!(i.lower <= i.estimate && i.estimate <= i.upper, "{hl:?}");
    assert!(
        (i.estimate - 0.5).abs() < 0.02 && i.upper - i.lower < 0.05,
        "{hl:?}"
    );
    assert!((hl.achieved_level - 0.95).abs() < 1e-3);

    let d: Vec<f64> = spread(50_000, 0.25).into_iter().map(round).collect();
    let hl = hodges_lehmann_one_sample(&d, 0.95, RankMethod::Auto).unwrap();
    let i = hl.interval;
    assert!(i.lower <= i.estimate && i.estimate <= i.upper, "{hl:?}");
    assert!(
        (i.estimate - 0.25).abs() < 0.02 && i.upper - i.lower < 0.1,
        "{hl:?}"
    );
}
