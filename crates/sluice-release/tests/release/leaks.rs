//! Check names each leak through a formula. Every release here is built the way a careless
//! measure stage would build it: the statistic is computed from the exact counts and declared a
//! plain statistic, not a derived one, so disclosure control passes it through unchanged and only
//! the check's own attacks can see it. Each case is crafted; the formulas are the textbook ones
//! (Wilson 1927; McNemar 1947; Poisson exact limits; the Wald SE of a log rate ratio; Student's t),
//! computed with `sluice-stats`, whose values are checked against scipy in its own suite.

use crate::common::{policy, provenance, rules};
use sluice_aggregate::{Role, Table, Value, col, dim};
use sluice_disclose::control_all;
use sluice_release::{Verdict, check, write_release};

fn released(tables: Vec<Table>) -> (tempfile::TempDir, Verdict) {
    let dir = tempfile::tempdir().unwrap();
    let r = rules();
    let checked = control_all(&tables, &r).unwrap();
    let out = dir.path().join("rel");
    write_release(&out, &provenance("quillmere"), &r, &checked, &[]).unwrap();
    let v = check(&out, &policy());
    (dir, v)
}

fn names(v: &Verdict, file: &str, text: &str) {
    assert!(
        v.problems
            .iter()
            .any(|p| p.rule == "derived" || p.rule == "precision")
            && v.problems
                .iter()
                .any(|p| p.file == file && p.to_string().contains(text)),
        "no problem in {file} mentioning {text:?}:\n{v}"
    );
}

fn patients() -> sluice_aggregate::Column {
    col("n_patients", Role::Patients, "")
}

#[test]
fn a_rate_from_unrounded_events_is_named() {
    // 13 events in 48 patient-years: released 15 events and 50 patient-years, but the rate
    // 27.083 per 100 patient-years gives back 13.54 events from the released person-time.
    let mut t = Table::new(
        "critical_results",
        "t",
        "",
        vec![
            dim("window", ""),
            patients(),
            col("n_events", Role::Count, ""),
            col("person_years", Role::PersonTime, ""),
            col("rate_per_100py", Role::Statistic, ""),
        ],
    );
    t.push(vec![
        "baseline".into(),
        Value::Int(12),
        Value::Int(13),
        Value::Float(48.0),
        Value::Float(13.0 / 48.0 * 100.0),
    ]);
    let (_d, v) = released(vec![t]);
    names(
        &v,
        "critical_results.parquet",
        "not the released n_events = 15",
    );
}

#[test]
fn wilson_limits_from_unrounded_counts_are_named() {
    let w = sluice_stats::wilson_ci(23, 87, 0.95).unwrap();
    let mut t = Table::new(
        "flagged_tests",
        "t",
        "",
        vec![
            dim("analyte", ""),
            patients(),
            col("n_tests", Role::Count, ""),
            col("share", Role::Statistic, ""),
            col("lower", Role::Statistic, ""),
            col("upper", Role::Statistic, ""),
        ],
    );
    t.push(vec![
        "alt".into(),
        Value::Int(14),
        Value::Int(23),
        Value::Float(w.estimate),
        Value::Float(w.lower),
        Value::Float(w.upper),
    ]);
    let (_d, v) = released(vec![t]);
    names(&v, "flagged_tests.parquet", "recovers 23 of 87");
}

#[test]
fn mcnemar_from_a_withheld_discordant_cell_is_named() {
    // b = 21, c = 8: the cell of 8 would be withheld, yet χ² and the exact p give it back.
    let m = sluice_stats::mcnemar(21, 8).unwrap();
    let mut t = Table::new(
        "worst_mcnemar",
        "t",
        "",
        vec![
            dim("analyte", ""),
            patients(),
            col("chi2_corrected", Role::Statistic, ""),
            col("p_value", Role::Statistic, ""),
            col("p_exact", Role::Statistic, ""),
        ],
    );
    t.push(vec![
        "alt".into(),
        Value::Int(60),
        Value::Float(m.chi2_corrected),
        Value::Float(m.p_chi2_corrected),
        Value::Float(m.p_exact),
    ]);
    let (_d, v) = released(vec![t]);
    names(&v, "worst_mcnemar.parquet", "(21, 8)");
}

#[test]
fn a_log_rate_ratio_se_from_small_counts_is_named() {
    let mut t = Table::new(
        "critical_rate_ratio",
        "t",
        "",
        vec![
            dim("context", ""),
            patients(),
            dim("statistic", ""),
            col("estimate", Role::Statistic, ""),
            col("se", Role::Statistic, ""),
        ],
    );
    t.push(vec![
        "all".into(),
        Value::Int(15),
        "log_rate_ratio".into(),
        Value::Float((13.0f64 / 7.0).ln()),
        Value::Float((1.0 / 13.0 + 1.0 / 7.0f64).sqrt()),
    ]);
    let (_d, v) = released(vec![t]);
    names(&v, "critical_rate_ratio.parquet", "recovers event counts");
}

#[test]
fn a_t_interval_on_the_exact_n_is_named() {
    // 37 pairs, released as 35: the interval's t quantile is t(36), which gives 37 back.
    let q = sluice_stats::t_two_sided(36.0, 0.95).unwrap();
    let mut t = Table::new(
        "worst_paired",
        "t",
        "",
        vec![
            dim("analyte", ""),
            patients(),
            dim("method", ""),
            col("estimate", Role::Statistic, ""),
            col("lower", Role::Statistic, ""),
            col("upper", Role::Statistic, ""),
            col("se", Role::Statistic, ""),
        ],
    );
    t.push(vec![
        "alt".into(),
        Value::Int(37),
        "paired t".into(),
        Value::Float(1.0),
        Value::Float(1.0 - q * 0.5),
        Value::Float(1.0 + q * 0.5),
        Value::Float(0.5),
    ]);
    let (_d, v) = released(vec![t]);
    names(&v, "worst_paired.parquet", "recovers n = 37");
}

#[test]
fn a_mean_of_whole_days_released_too_finely_is_named() {
    // 4,322 days over 87 intervals, released with n_intervals 85: only n = 87 makes the sum whole.
    let mut t = Table::new(
        "interval_summary",
        "t",
        "",
        vec![
            dim("window", ""),
            patients(),
            col("n_intervals", Role::Count, ""),
            col("mean_days", Role::Statistic, ""),
        ],
    );
    t.push(vec![
        "baseline".into(),
        Value::Int(40),
        Value::Int(87),
        Value::Float(4322.0 / 87.0),
    ]);
    let (_d, v) = released(vec![t]);
    names(&v, "interval_summary.parquet", "only for n = 87");
}

#[test]
fn declared_derivations_and_precision_pass_the_same_attacks() {
    use sluice_aggregate::{CellRef, Formula, Precision};
    // The same cells declared as measure declares them now: check finds nothing.
    let mut t = Table::new(
        "critical_results",
        "t",
        "",
        vec![
            dim("window", ""),
            patients(),
            col("n_events", Role::Count, ""),
            col("person_years", Role::PersonTime, ""),
            col("rate_per_100py", Role::Statistic, ""),
            col("lower", Role::Statistic, ""),
            col("upper", Role::Statistic, ""),
        ],
    );
    t.push(vec![
        "baseline".into(),
        Value::Int(12),
        Value::Int(13),
        Value::Float(48.0),
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
    let mut m = Table::new(
        "interval_summary",
        "t",
        "",
        vec![
            dim("window", ""),
            patients(),
            col("n_intervals", Role::Count, ""),
            col("mean_days", Role::Statistic, ""),
        ],
    );
    m.push(vec![
        "baseline".into(),
        Value::Int(40),
        Value::Int(87),
        Value::Float(4322.0 / 87.0),
    ]);
    m.set_precision(
        "mean_days",
        Precision::Grid {
            grid: 1.0,
            n: "n_intervals".into(),
            by: None,
        },
    );
    let (_d, v) = released(vec![t, m]);
    assert!(v.passed(), "{v}");
}
