//! Counts, withheld cells, histograms and estimates of two small sites.

use crate::common::{bands, estimates, get, histogram, policy, provenance, read, release, rules};
use sluice_aggregate::Value;
use std::path::PathBuf;

fn two_sites(dir: &std::path::Path) -> Vec<PathBuf> {
    let r = rules();
    let sha = "b".repeat(64);
    let a = release(
        dir,
        &provenance("alpha", "s", &sha),
        &r,
        &[
            bands(40, 30),
            estimates(&[("wbc", "mean_difference", 0.2, 0.1, 40)]),
            histogram(&[(12, 20), (30, 60), (25, 40)]),
        ],
        true,
    );
    let b = release(
        dir,
        &provenance("beta", "s", &sha),
        &r,
        &[
            bands(40, 5),
            estimates(&[("wbc", "mean_difference", 0.4, 0.2, 30)]),
            histogram(&[(3, 5), (30, 60), (25, 40)]),
        ],
        true,
    );
    vec![a, b]
}

fn row<'a>(names: &[String], rows: &'a [Vec<Value>], w: &str, b: &str) -> &'a Vec<Value> {
    rows.iter()
        .find(|r| {
            get(names, r, "window") == &Value::from(w) && get(names, r, "band") == &Value::from(b)
        })
        .unwrap()
}

#[test]
fn counts_sum_and_site_withheld_cells_stay_withheld() {
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("pooled");
    let rep = sluice_pool::pool(&two_sites(d.path()), &out, &rules(), &policy()).unwrap();
    assert!(rep.verdict.passed(), "{}", rep.verdict);
    let (names, rows) = read(&out, "interval_bands");
    assert!(
        !names.contains(&"mean".to_string()),
        "statistics are dropped"
    );
    // follow_up: alpha a=30, b=40; beta a=5 (withheld), b=40 → a withheld, b = 80.
    let fa = row(&names, &rows, "follow_up", "a");
    assert_eq!(get(&names, fa, "n_patients"), &Value::Null);
    assert!(matches!(get(&names, fa, "disclosure"), Value::Text(s) if s == "withheld"));
    let fb = row(&names, &rows, "follow_up", "b");
    // Secondary suppression at beta withheld one more of its follow_up cells, so at most one of
    // b and all is released; whatever is released is the sum of both sites.
    if let Value::Int(n) = get(&names, fb, "n_patients") {
        assert_eq!(*n, 80);
    }
    let (wn, wrows) = read(&out, "pooled_withheld");
    assert!(wrows.iter().any(
        |r| get(&wn, r, "source_table") == &Value::from("interval_bands")
            && get(&wn, r, "withheld_at") == &Value::from("beta")
    ));
    let meta = std::fs::read_to_string(out.join("manifest.json")).unwrap();
    assert!(meta.contains("pooled:alpha+beta"));
}

#[test]
fn histograms_merge_to_the_union_span_and_give_quantiles() {
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("pooled");
    sluice_pool::pool(&two_sites(d.path()), &out, &rules(), &policy()).unwrap();
    let (names, rows) = read(&out, "histograms");
    // beta merged its first bin into the second: pooled bins are (open, 2) and [2, 3).
    assert_eq!(rows.len(), 2, "{rows:?}");
    assert_eq!(get(&names, &rows[0], "bin_upper"), &Value::Float(2.0));
    assert_eq!(get(&names, &rows[1], "bin_lower"), &Value::Float(2.0));
    let (qn, qrows) = read(&out, "histograms_quantiles");
    assert_eq!(qrows.len(), 1);
    assert_eq!(
        get(&qn, &qrows[0], "statistic"),
        &Value::from("quantile_from_pooled_histogram")
    );
    // q95 falls in the closed bin [2, 3): linear interpolation.
    let n: i64 = rows
        .iter()
        .map(|r| get(&names, r, "n_results").as_i64().unwrap())
        .sum();
    let last = get(&names, &rows[1], "n_results").as_i64().unwrap() as f64;
    let want = 2.0 + (0.95 * n as f64 - (n as f64 - last)) / last;
    match get(&qn, &qrows[0], "q95") {
        Value::Float(q) => assert!((q - want).abs() < 1e-12, "{q} vs {want}"),
        v => panic!("q95 {v:?}"),
    }
}

#[test]
fn estimates_are_pooled_by_inverse_variance() {
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("pooled");
    sluice_pool::pool(&two_sites(d.path()), &out, &rules(), &policy()).unwrap();
    let (names, rows) = read(&out, "pooled_estimates");
    assert_eq!(rows.len(), 1);
    let fixed = get(&names, &rows[0], "fixed_estimate").as_f64().unwrap();
    assert!((fixed - 0.24).abs() < 1e-12, "{fixed}");
    assert_eq!(get(&names, &rows[0], "n_patients"), &Value::Int(70));
    let (_, srows) = read(&out, "site_estimates");
    assert_eq!(srows.len(), 2);
}

/// A site's critical results: events and person-time, with the rate declared as derived.
fn critical(events: i64, py: f64) -> sluice_aggregate::Table {
    use sluice_aggregate::{CellRef, Formula, Role, Table, col, dim};
    let mut t = Table::new(
        "critical_results",
        "Critical results",
        "",
        vec![
            dim("window", ""),
            col("n_patients", Role::Patients, ""),
            col("n_events", Role::Count, ""),
            col("person_years", Role::PersonTime, ""),
            col("rate_per_100py", Role::Statistic, ""),
            col("lower", Role::Statistic, ""),
            col("upper", Role::Statistic, ""),
        ],
    );
    t.push(vec![
        "baseline".into(),
        Value::Int(events),
        Value::Int(events),
        Value::Float(py),
        Value::Null,
        Value::Null,
        Value::Null,
    ]);
    let inputs = vec![
        CellRef::here(0, "n_events"),
        CellRef::here(0, "person_years"),
    ];
    for (c, f) in [
        ("rate_per_100py", Formula::Rate),
        ("lower", Formula::PoissonLower),
        ("upper", Formula::PoissonUpper),
    ] {
        t.derive(0, c, f, inputs.clone(), 0.95, 100.0);
    }
    t
}

// Crafted: sites release 15 events in 50 patient-years (from 13 in 48) and 20 in 60 (from 21
// in 61); the pooled rate is 35 events over 110 patient-years, from the released sums only, with
// its exact Poisson limits (common practice: a pooled rate is pooled events over pooled
// person-time).
#[test]
fn pooled_rates_come_from_summed_released_counts() {
    let d = tempfile::tempdir().unwrap();
    let r = rules();
    let sha = "c".repeat(64);
    let a = release(
        d.path(),
        &provenance("alpha", "s", &sha),
        &r,
        &[critical(13, 48.0)],
        true,
    );
    let b = release(
        d.path(),
        &provenance("beta", "s", &sha),
        &r,
        &[critical(21, 61.0)],
        true,
    );
    let out = d.path().join("pooled");
    let rep = sluice_pool::pool(&[a, b], &out, &r, &policy()).unwrap();
    assert!(rep.verdict.passed(), "{}", rep.verdict);
    let (names, rows) = read(&out, "critical_results");
    let row = &rows[0];
    assert_eq!(get(&names, row, "n_events"), &Value::Int(35));
    assert_eq!(get(&names, row, "person_years"), &Value::Float(110.0));
    assert_eq!(
        get(&names, row, "rate_per_100py"),
        &Value::Float(35.0 / 110.0 * 100.0)
    );
    let ci = sluice_stats::poisson_exact_ci(35, 1.1, 0.95).unwrap();
    assert_eq!(get(&names, row, "lower"), &Value::Float(ci.lower));
}
