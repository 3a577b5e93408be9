//! Published examples: Hollander & Wolfe's data from R's `wilcox.test` documentation, and the BCG
//! vaccine meta-analysis (Colditz et al. 1994) as printed by metafor; each value is checked to the
//! precision it was printed with.

use crate::vectors::{Printed, load, printed};
use serde::Deserialize;
use sluice_stats::{
    Alternative, RankMethod, differences, hodges_lehmann_one_sample, hodges_lehmann_two_sample,
    meta_analysis, rank_sum_test, signed_rank_test,
};

#[derive(Deserialize)]
struct HollanderWolfe {
    paired: Paired,
    two_sample: TwoSample,
}

#[derive(Deserialize)]
struct Paired {
    x: Vec<f64>,
    y: Vec<f64>,
    v: Printed,
    p_greater: Printed,
    level: f64,
    estimate_y_minus_x: Printed,
    lower_y_minus_x: Printed,
    upper_y_minus_x: Printed,
    achieved_level: Printed,
}

#[derive(Deserialize)]
struct TwoSample {
    x: Vec<f64>,
    y: Vec<f64>,
    w: Printed,
    p_greater: Printed,
    level: f64,
    estimate: Printed,
    lower: Printed,
    upper: Printed,
    achieved_level: Printed,
}

fn hollander_wolfe() -> HollanderWolfe {
    load("stats-hollander-wolfe.toml")
}

#[test]
fn signed_rank_statistic_and_exact_p() {
    let p = hollander_wolfe().paired;
    let d = differences(&p.x, &p.y).unwrap();
    for method in [RankMethod::Auto, RankMethod::Exact] {
        let t = signed_rank_test(&d, Alternative::Greater, method).unwrap();
        assert!(t.exact);
        printed(t.v, p.v, "V");
        printed(t.p_value, p.p_greater, "one-sided p");
    }
    // The same test from the other side: y − x is shifted downwards.
    let back = differences(&p.y, &p.x).unwrap();
    let t = signed_rank_test(&back, Alternative::Less, RankMethod::Auto).unwrap();
    printed(t.p_value, p.p_greater, "one-sided p of y − x");
}

#[test]
fn paired_hodges_lehmann_exact_interval() {
    let p = hollander_wolfe().paired;
    let d = differences(&p.y, &p.x).unwrap();
    let hl = hodges_lehmann_one_sample(&d, p.level, RankMethod::Auto).unwrap();
    assert!(hl.exact);
    printed(hl.interval.estimate, p.estimate_y_minus_x, "HL estimate");
    printed(hl.interval.lower, p.lower_y_minus_x, "lower");
    printed(hl.interval.upper, p.upper_y_minus_x, "upper");
    printed(hl.achieved_level, p.achieved_level, "achieved confidence");
    assert_eq!(hl.interval.level, p.level);
}

#[test]
fn rank_sum_statistic_and_exact_p() {
    let t = hollander_wolfe().two_sample;
    let r = rank_sum_test(&t.x, &t.y, Alternative::Greater, RankMethod::Auto).unwrap();
    assert!(r.exact);
    printed(r.w, t.w, "W");
    printed(r.p_value, t.p_greater, "one-sided p");
    // Two-sided doubles the smaller tail.
    let two = rank_sum_test(&t.x, &t.y, Alternative::TwoSided, RankMethod::Exact).unwrap();
    assert!((two.p_value - 2.0 * r.p_value).abs() < 1e-15);
}

#[test]
fn two_sample_hodges_lehmann_exact_interval() {
    let t = hollander_wolfe().two_sample;
    let hl = hodges_lehmann_two_sample(&t.x, &t.y, t.level, RankMethod::Auto).unwrap();
    assert!(hl.exact);
    printed(hl.interval.estimate, t.estimate, "HL shift");
    printed(hl.interval.lower, t.lower, "lower");
    printed(hl.interval.upper, t.upper, "upper");
    printed(hl.achieved_level, t.achieved_level, "achieved confidence");
}

#[derive(Deserialize)]
struct Bcg {
    trials: Vec<[f64; 4]>,
    level: f64,
    fixed: BcgPooled,
    heterogeneity: BcgHeterogeneity,
    random: BcgRandom,
}

#[derive(Deserialize)]
struct BcgPooled {
    estimate: Printed,
    lower: Printed,
    upper: Printed,
}

#[derive(Deserialize)]
struct BcgHeterogeneity {
    q: Printed,
    df: Printed,
    tau2: Printed,
    i2: Printed,
}

#[derive(Deserialize)]
struct BcgRandom {
    estimate: Printed,
    se: Printed,
    lower: Printed,
    upper: Printed,
    rr: Printed,
    rr_lower: Printed,
    rr_upper: Printed,
}

#[test]
fn bcg_fixed_and_dersimonian_laird() {
    let b: Bcg = load("stats-bcg.toml");
    let yi: Vec<f64> = b
        .trials
        .iter()
        .map(|[a, b, c, d]| ((a / (a + b)) / (c / (c + d))).ln())
        .collect();
    let vi: Vec<f64> = b
        .trials
        .iter()
        .map(|[a, b, c, d]| 1.0 / a - 1.0 / (a + b) + 1.0 / c - 1.0 / (c + d))
        .collect();
    let m = meta_analysis(&yi, &vi, b.level).unwrap();
    assert_eq!(m.k, 13);
    printed(m.fixed.estimate, b.fixed.estimate, "fixed estimate");
    printed(m.fixed.lower, b.fixed.lower, "fixed lower");
    printed(m.fixed.upper, b.fixed.upper, "fixed upper");
    printed(m.q, b.heterogeneity.q, "Q");
    printed(m.q_df, b.heterogeneity.df, "Q df");
    printed(m.tau2, b.heterogeneity.tau2, "tau2");
    printed(m.i2, b.heterogeneity.i2, "I2");
    printed(m.random.estimate, b.random.estimate, "DL estimate");
    printed(m.random.se, b.random.se, "DL se");
    printed(m.random.lower, b.random.lower, "DL lower");
    printed(m.random.upper, b.random.upper, "DL upper");
    printed(m.random.estimate.exp(), b.random.rr, "pooled RR");
    printed(m.random.lower.exp(), b.random.rr_lower, "RR lower");
    printed(m.random.upper.exp(), b.random.rr_upper, "RR upper");
    assert!(m.q_p < 1e-20, "Q on 12 df is far in the tail: {}", m.q_p);
}
