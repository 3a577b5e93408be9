//! Disclosure control on crafted tables; each test names its source or says "crafted" or
//! "common practice".

use super::*;
use sluice_aggregate::{ALL, Histogram, col, dim};
use std::path::Path;

const STANDARD: &str = include_str!("../../../policies/disclosure/standard.toml");

/// The shipped standard rules with some lines replaced.
fn rules(replace: &[(&str, &str)]) -> Rules {
    let mut text = STANDARD.to_string();
    for (from, to) in replace {
        assert!(text.contains(from), "{from}");
        text = text.replace(from, to);
    }
    Rules::parse(&text, Path::new("test-rules.toml")).unwrap()
}

/// The standard rules without rounding, so tests can see exact values.
fn unrounded() -> Rules {
    rules(&[("rounding_base = 5", "rounding_base = 1")])
}

/// The secure log's labels, which keep the reason.
fn labels(t: &CheckedTable) -> Vec<String> {
    t.status().iter().map(Status::log_label).collect()
}

fn counts_table(name: &str, dims: &[&str]) -> Table {
    let mut cols: Vec<Column> = dims.iter().map(|d| dim(d, "")).collect();
    cols.push(col("patients", Role::Patients, ""));
    cols.push(col("n_results", Role::Count, ""));
    cols.push(col("mean", Role::Statistic, ""));
    Table::new(name, name, "", cols)
}

// Crafted (common practice: threshold rule plus margin protection). Band b has 4 patients: it is
// withheld, and as the only withheld part of the total it would be total − a − c; the smallest
// other part (a) is withheld too.
#[test]
fn one_dimension_small_cell_and_total() {
    let mut t = counts_table("bands", &["band"]);
    for (b, n) in [("a", 25), ("b", 4), ("c", 30), (ALL, 59)] {
        t.push(vec![
            b.into(),
            Value::Int(n),
            Value::Int(2 * n),
            Value::Float(1.5),
        ]);
    }
    t.add_margin_constraints("band").unwrap();
    let c = control(&t, &unrounded()).unwrap();
    assert_eq!(
        labels(&c),
        [
            "withheld:secondary",
            "withheld:threshold",
            "released",
            "released"
        ]
    );
    assert_eq!(
        c.rows()[1],
        [Value::from("b"), Value::Null, Value::Null, Value::Null]
    );
    assert_eq!(c.rows()[0][1], Value::Null);
    assert_eq!(c.rows()[2][1], Value::Int(30));
    assert_eq!(c.rows()[2][3], Value::Float(1.5));
    assert_eq!(c.columns()[1].name, PATIENTS);
    let w: Vec<bool> = c.status().iter().map(Status::is_withheld).collect();
    assert_eq!(unsafe_constraints(c.constraints(), &w).count(), 0);
}

// Crafted: a 2-D table (sex × band) with row and column margins. Cell (f, y) is small; alone it
// is recoverable from its row (f, all − f, x) and from its column (all, y − m, y), so both
// margins get a second withheld cell, and the fixed point then protects (m, x) too.
#[test]
fn two_dimensions_protect_row_and_column() {
    let mut t = counts_table("sex_band", &["sex", "band"]);
    let cells = [
        ("f", "x", 20),
        ("f", "y", 3),
        ("f", ALL, 23),
        ("m", "x", 30),
        ("m", "y", 40),
        ("m", ALL, 70),
        (ALL, "x", 50),
        (ALL, "y", 43),
        (ALL, ALL, 93),
    ];
    for (s, b, n) in cells {
        t.push(vec![
            s.into(),
            b.into(),
            Value::Int(n),
            Value::Int(n),
            Value::Null,
        ]);
    }
    t.add_margin_constraints("band").unwrap();
    t.add_margin_constraints("sex").unwrap();
    let c = control(&t, &unrounded()).unwrap();
    let l = labels(&c);
    assert_eq!(l[1], "withheld:threshold");
    assert_eq!(l[0], "withheld:secondary", "row margin: (f, x)");
    assert_eq!(l[4], "withheld:secondary", "column margin: (m, y)");
    assert_eq!(l[3], "withheld:secondary", "then (m, x) for column x");
    for r in [2, 5, 6, 7, 8] {
        assert_eq!(l[r], "released", "row {r}");
    }
    let w: Vec<bool> = c.status().iter().map(Status::is_withheld).collect();
    assert_eq!(c.constraints().len(), 6);
    assert_eq!(unsafe_constraints(c.constraints(), &w).count(), 0);
}

// Hundepool et al. 2012 §4.2 worked example: total 100,000 with contributions 50,000 and 49,000
// is safe under (1, 90) dominance, unsafe under (2, 80) and under the p%-rule with p = 25.
#[test]
fn dominance_hundepool_worked_example() {
    let xs = [50_000.0, 49_000.0];
    assert!(dominance_safe(100_000.0, &xs, Dominance { n: 1, k: 90.0 }));
    assert!(!dominance_safe(100_000.0, &xs, Dominance { n: 2, k: 80.0 }));
    assert!(!p_percent_safe(100_000.0, &xs, 25.0));

    let mut t = Table::new(
        "miles",
        "miles",
        "",
        vec![
            dim("area", ""),
            col("patients", Role::Patients, ""),
            col(
                "miles",
                Role::Magnitude {
                    contributions: "top".into(),
                },
                "",
            ),
            col("top", Role::Contributions, ""),
        ],
    );
    t.push(vec![
        "q".into(),
        Value::Int(20),
        Value::Float(100_000.0),
        Value::List(xs.to_vec()),
    ]);
    t.push(vec![
        "r".into(),
        Value::Int(20),
        Value::Float(1_000.0),
        Value::List(vec![60.0, 55.0, 50.0]),
    ]);
    let c = control(&t, &unrounded()).unwrap();
    assert_eq!(c.rows()[0][2], Value::Null, "(2, 80) and p = 25 %: unsafe");
    assert_eq!(c.rows()[1][2], Value::Float(1_000.0));
    assert!(
        c.column("top").is_none(),
        "contributions are never released"
    );
    assert_eq!(labels(&c), ["released", "released"]);
    let lax = rules(&[
        ("n = 2", "n = 1"),
        ("k = 80.0", "k = 90.0"),
        ("p_percent = 25.0", "p_percent = 0.0"),
        ("rounding_base = 5", "rounding_base = 1"),
    ]);
    let c = control(&t, &lax).unwrap();
    assert_eq!(c.rows()[0][2], Value::Float(100_000.0), "(1, 90): safe");
}

// Crafted: a dominated part of a total has its magnitude nulled, and so does a second part, so
// the first is not total − others.
#[test]
fn magnitude_cells_get_secondary_suppression() {
    let mut t = Table::new(
        "miles",
        "miles",
        "",
        vec![
            dim("area", ""),
            col("patients", Role::Patients, ""),
            col(
                "miles",
                Role::Magnitude {
                    contributions: "top".into(),
                },
                "",
            ),
            col("top", Role::Contributions, ""),
        ],
    );
    let spread = || Value::List(vec![10.0, 10.0, 10.0]);
    t.push(vec![
        "a".into(),
        Value::Int(20),
        Value::Float(1000.0),
        Value::List(vec![900.0]),
    ]);
    t.push(vec![
        "b".into(),
        Value::Int(20),
        Value::Float(300.0),
        spread(),
    ]);
    t.push(vec![
        "c".into(),
        Value::Int(20),
        Value::Float(400.0),
        spread(),
    ]);
    t.push(vec![
        ALL.into(),
        Value::Int(60),
        Value::Float(1700.0),
        Value::List(vec![900.0, 10.0]),
    ]);
    t.add_margin_constraints("area").unwrap();
    let c = control(&t, &unrounded()).unwrap();
    let m: Vec<&Value> = c.rows().iter().map(|r| &r[2]).collect();
    assert_eq!(
        m,
        [
            &Value::Null,
            &Value::Null,
            &Value::Float(400.0),
            &Value::Float(1700.0)
        ]
    );
}

// Common practice: a zero cell is withheld unless the rules show zeros; a shown zero carries no
// statistics.
#[test]
fn zeros_shown_or_hidden() {
    let mut t = counts_table("z", &["band"]);
    t.push(vec![
        "a".into(),
        Value::Int(0),
        Value::Int(0),
        Value::Float(2.0),
    ]);
    t.push(vec![
        "b".into(),
        Value::Int(40),
        Value::Int(0),
        Value::Float(2.0),
    ]);
    let hidden = control(&t, &unrounded()).unwrap();
    assert_eq!(labels(&hidden), ["withheld:zero", "withheld:zero"]);
    let shown = control(
        &t,
        &rules(&[
            ("show_zeros = false", "show_zeros = true"),
            ("rounding_base = 5", "rounding_base = 1"),
        ]),
    )
    .unwrap();
    assert_eq!(labels(&shown), ["released", "released"]);
    assert_eq!(
        shown.rows()[0],
        [Value::from("a"), Value::Int(0), Value::Int(0), Value::Null]
    );
    assert_eq!(shown.rows()[1][3], Value::Float(2.0));
}

// NHS Digital HES/ECDS practice (from memory): counts to the nearest 5; here ties up and never
// below the threshold (crafted).
#[test]
fn counts_are_rounded_after_suppression() {
    let mut t = counts_table("r", &["band"]);
    for (b, n, k) in [("a", 12, 13), ("b", 15, 15), ("c", 9, 50)] {
        t.push(vec![b.into(), Value::Int(n), Value::Int(k), Value::Null]);
    }
    let c = control(&t, &rules(&[])).unwrap();
    assert_eq!(labels(&c), ["rounded", "released", "withheld:threshold"]);
    assert_eq!(c.rows()[0][1..3], [Value::Int(10), Value::Int(15)]);
    let c = control(&t, &rules(&[("threshold = 10", "threshold = 12")])).unwrap();
    assert_eq!(
        c.rows()[0][1],
        Value::Int(15),
        "12 → 10 would be below 12: up to 15"
    );
}

// Common practice (quantile rule): p with n observations needs floor(min(p, 1 − p) · n) ≥ 10,
// on the raw count and on the released (rounded) one.
#[test]
fn quantiles_need_observations_beyond_them() {
    let mut t = Table::new(
        "q",
        "q",
        "",
        vec![
            dim("band", ""),
            col("patients", Role::Patients, ""),
            col("n_results", Role::Count, ""),
            col(
                "p10",
                Role::Quantile {
                    p: 0.1,
                    n: "n_results".into(),
                },
                "",
            ),
            col(
                "p15",
                Role::Quantile {
                    p: 0.15,
                    n: "n_results".into(),
                },
                "",
            ),
            col(
                "median",
                Role::Quantile {
                    p: 0.5,
                    n: "patients".into(),
                },
                "",
            ),
        ],
    );
    for (b, p, n) in [("a", 20, 99), ("b", 20, 100), ("c", 20, 67), ("d", 19, 200)] {
        t.push(vec![
            b.into(),
            Value::Int(p),
            Value::Int(n),
            Value::Float(1.0),
            Value::Float(2.0),
            Value::Float(3.0),
        ]);
    }
    let exact = control(&t, &unrounded()).unwrap();
    let q = |c: &CheckedTable, r: usize| c.rows()[r][3..6].to_vec();
    assert_eq!(
        q(&exact, 0),
        [Value::Null, Value::Float(2.0), Value::Float(3.0)]
    );
    assert_eq!(
        q(&exact, 1),
        [Value::Float(1.0), Value::Float(2.0), Value::Float(3.0)]
    );
    assert_eq!(
        q(&exact, 2),
        [Value::Null, Value::Float(2.0), Value::Float(3.0)]
    );
    assert_eq!(
        q(&exact, 3)[2],
        Value::Null,
        "median of 19 patients: 9 beyond"
    );
    assert_eq!(
        exact.columns()[5].role,
        Role::Quantile {
            p: 0.5,
            n: PATIENTS.into()
        }
    );
    // 67 passes for p = 0.15 (floor(10.05) = 10) but is released as 65 (floor(9.75) = 9).
    let rounded = control(&t, &rules(&[])).unwrap();
    assert_eq!(rounded.rows()[2][4], Value::Null);
}

fn histogram_table(bins: &[(i64, i64, i64)]) -> Table {
    let mut t = Table::new(
        "hist",
        "hist",
        "",
        vec![
            dim("analyte", ""),
            dim("lower", ""),
            dim("upper", ""),
            col("patients", Role::Patients, ""),
            col("n_results", Role::Count, ""),
            col("le", Role::Support, ""),
            col("ge", Role::Support, ""),
        ],
    );
    let total: i64 = bins.iter().map(|b| b.2).sum();
    let mut below = 0;
    for &(lo, hi, p) in bins {
        let above = total - below;
        below += p;
        t.push(vec![
            "alt".into(),
            Value::Int(lo),
            Value::Int(hi),
            Value::Int(p),
            Value::Int(p * 2),
            Value::Int(below),
            Value::Int(above),
        ]);
    }
    t.histogram = Some(Histogram {
        group_by: vec!["analyte".into()],
        lower: "lower".into(),
        upper: "upper".into(),
        patients_at_or_below: "le".into(),
        patients_at_or_above: "ge".into(),
    });
    t
}

// Crafted: each patient in one bin, so the support columns are cumulative sums. The lower tail
// (3 + 8) and upper tail (6 + 5) merge; the middle bins pass; support columns are dropped.
#[test]
fn histogram_tails_merge() {
    let t = histogram_table(&[
        (0, 10, 3),
        (10, 20, 8),
        (20, 30, 25),
        (30, 40, 6),
        (40, 50, 5),
    ]);
    let c = control(&t, &unrounded()).unwrap();
    assert_eq!(labels(&c), ["merged", "released", "merged"]);
    let names: Vec<&str> = c.columns().iter().map(|c| c.name.as_str()).collect();
    assert_eq!(names, ["analyte", "lower", "upper", PATIENTS, "n_results"]);
    assert_eq!(
        c.rows()[0],
        [
            Value::from("alt"),
            Value::Int(0),
            Value::Int(20),
            Value::Int(11),
            Value::Int(22)
        ]
    );
    assert_eq!(
        c.rows()[2][1..5],
        [
            Value::Int(30),
            Value::Int(50),
            Value::Int(11),
            Value::Int(22)
        ]
    );
    let small = histogram_table(&[(0, 10, 3), (10, 20, 4)]);
    let c = control(&small, &unrounded()).unwrap();
    assert_eq!(labels(&c), ["withheld:histogram", "withheld:histogram"]);
    assert!(
        c.rows()
            .iter()
            .all(|r| r[3] == Value::Null && r[4] == Value::Null)
    );
}

// Crafted: a histogram's total row stays a constraint over the merged bins.
#[test]
fn constraints_follow_merged_rows() {
    let mut t = histogram_table(&[(0, 10, 3), (10, 20, 8), (20, 30, 25)]);
    t.push(vec![
        "alt".into(),
        Value::Null,
        Value::Null,
        Value::Int(36),
        Value::Int(72),
        Value::Null,
        Value::Null,
    ]);
    t.constraints.push(Constraint {
        total: 3,
        parts: vec![0, 1, 2],
    });
    let c = control(&t, &unrounded()).unwrap();
    assert_eq!(labels(&c), ["merged", "released", "released"]);
    assert_eq!(
        c.constraints(),
        [Constraint {
            total: 2,
            parts: vec![0, 1]
        }]
    );
}

#[test]
fn released_labels_say_only_released_merged_or_withheld() {
    // Common practice: one status for every withheld cell; "rounded" and the reason would each
    // tell something about the count.
    let withheld = |rule: &str| Status::Withheld { rule: rule.into() };
    assert_eq!(Status::Released.label(), "released");
    assert_eq!(Status::Rounded.label(), "released");
    assert_eq!(Status::Merged.label(), "merged");
    for rule in [
        "threshold",
        "zero",
        "secondary",
        "histogram",
        "differencing",
    ] {
        assert_eq!(withheld(rule).label(), "withheld");
        assert_eq!(withheld(rule).log_label(), format!("withheld:{rule}"));
    }
    assert!(Status::parse("withheld").is_some_and(|s| s.is_withheld()));
    assert_eq!(Status::parse("released"), Some(Status::Released));
    for bad in ["withheld:zero", "rounded", "ok"] {
        assert_eq!(Status::parse(bad), None, "{bad}");
    }
}

/// A crossings table (as worst_abnormal) and a McNemar table whose cells are derived from it.
fn crossings_and_mcnemar(b: i64, c: i64) -> Vec<Table> {
    use sluice_aggregate::{CellRef, Formula};
    let mut x = Table::new(
        "crossings",
        "crossings",
        "",
        vec![dim("crossing", ""), col("patients", Role::Patients, "")],
    );
    for (name, n) in [
        ("normal_both", 60),
        ("abnormal_after_only", c),
        ("abnormal_before_only", b),
        ("abnormal_both", 20),
        (ALL, 80 + b + c),
    ] {
        x.push(vec![name.into(), Value::Int(n)]);
    }
    x.constraints.push(Constraint {
        total: 4,
        parts: vec![0, 1, 2, 3],
    });
    let mut m = Table::new(
        "mcnemar",
        "mcnemar",
        "",
        vec![
            dim("analyte", ""),
            col("patients", Role::Patients, ""),
            col("chi2_corrected", Role::Statistic, ""),
            col("p_exact", Role::Statistic, ""),
        ],
    );
    let exact = sluice_stats::mcnemar(b as u64, c as u64).unwrap();
    m.push(vec![
        "alt".into(),
        Value::Int(80 + b + c),
        Value::Float(exact.chi2_corrected),
        Value::Float(exact.p_exact),
    ]);
    let inputs = vec![
        CellRef::of("crossings", 2, "patients"),
        CellRef::of("crossings", 1, "patients"),
    ];
    m.derive(
        0,
        "chi2_corrected",
        Formula::McNemarChi2,
        inputs.clone(),
        0.0,
        0.0,
    );
    m.derive(0, "p_exact", Formula::McNemarExactP, inputs, 0.0, 0.0);
    vec![x, m]
}

// Crafted; the statistic inherits the suppression of its counts (common practice in output
// checking; Hundepool et al. 2012 §4.4). b = 21, c = 8: the cell of 8 is withheld, so McNemar's
// test is withheld with it instead of giving the 8 back.
#[test]
fn a_statistic_of_a_withheld_count_is_withheld() {
    let out = control_all(&crossings_and_mcnemar(21, 8), &rules(&[])).unwrap();
    assert!(out[0].status()[1].is_withheld());
    let m = &out[1];
    assert!(!m.status()[0].is_withheld());
    assert_eq!(m.rows()[0][2], Value::Null);
    assert_eq!(m.rows()[0][3], Value::Null);
    assert!(m.notes().iter().any(|n| n.reason == "derived"));
}

// Crafted: b = 23, c = 12 are released as 25 and 10; the test is computed from those, so the
// χ² an outsider inverts gives 25 and 10, not 23 and 12.
#[test]
fn a_statistic_of_released_counts_uses_the_rounded_counts() {
    let out = control_all(&crossings_and_mcnemar(23, 12), &rules(&[])).unwrap();
    let want = sluice_stats::mcnemar(25, 10).unwrap();
    assert_eq!(out[1].rows()[0][2], Value::Float(want.chi2_corrected));
    assert_eq!(out[1].rows()[0][3], Value::Float(want.p_exact));
}

// Crafted: person-time is rounded to the rules' base (5 years), and the rate and its exact
// Poisson limits are computed from the rounded events (15) and person-time (50).
#[test]
fn rates_come_from_rounded_events_and_person_time() {
    use sluice_aggregate::{CellRef, Formula};
    let mut t = Table::new(
        "rates",
        "rates",
        "",
        vec![
            dim("window", ""),
            col("patients", Role::Patients, ""),
            col("n_events", Role::Count, ""),
            col("person_years", Role::PersonTime, ""),
            col("rate", Role::Statistic, ""),
            col("lower", Role::Statistic, ""),
        ],
    );
    t.push(vec![
        "w".into(),
        Value::Int(12),
        Value::Int(13),
        Value::Float(48.0),
        Value::Float(13.0 / 48.0 * 100.0),
        Value::Null,
    ]);
    let inputs = vec![
        CellRef::here(0, "n_events"),
        CellRef::here(0, "person_years"),
    ];
    t.derive(0, "rate", Formula::Rate, inputs.clone(), 0.95, 100.0);
    t.derive(0, "lower", Formula::PoissonLower, inputs, 0.95, 100.0);
    let c = control(&t, &rules(&[])).unwrap();
    let row = &c.rows()[0];
    assert_eq!(row[2], Value::Int(15));
    assert_eq!(row[3], Value::Float(50.0));
    assert_eq!(row[4], Value::Float(30.0));
    let ci = sluice_stats::poisson_exact_ci(15, 0.5, 0.95).unwrap();
    assert_eq!(row[5], Value::Float(ci.lower));
}

// Crafted: a mean of whole days over 87 intervals (released as 85) is released at a step of 0.1
// (1 / 83 rounded up to a power of ten), so each of 83..87 intervals stays possible.
#[test]
fn means_are_released_at_a_step_that_keeps_every_count_possible() {
    use sluice_aggregate::Precision;
    let mut t = Table::new(
        "iv",
        "iv",
        "",
        vec![
            dim("window", ""),
            col("patients", Role::Patients, ""),
            col("n_intervals", Role::Count, ""),
            col("mean_days", Role::Statistic, ""),
        ],
    );
    t.push(vec![
        "w".into(),
        Value::Int(40),
        Value::Int(87),
        Value::Float(4321.0 / 87.0),
    ]);
    t.set_precision(
        "mean_days",
        Precision::Grid {
            grid: 1.0,
            n: "n_intervals".into(),
            by: None,
        },
    );
    let c = control(&t, &rules(&[])).unwrap();
    assert_eq!(c.rows()[0][3], Value::Float(49.7));
    for n in 83..=87 {
        let s: f64 = 49.7 * n as f64;
        assert!((s - s.round()).abs() <= 0.05 * n as f64, "n = {n}");
    }
}

// Crafted: a withheld zero does not protect the small cell beside it. Parts 0 (zero), 4 (small)
// and 30, 31 under a total of 65: the zero and the 4 are withheld, and since the zero protects
// nothing, the smallest other part (30) is withheld too.
#[test]
fn a_withheld_zero_is_not_protection() {
    let mut t = counts_table("bands", &["band"]);
    for (b, n) in [("a", 0), ("b", 4), ("c", 30), ("d", 31), (ALL, 65)] {
        t.push(vec![b.into(), Value::Int(n), Value::Int(n), Value::Null]);
    }
    t.add_margin_constraints("band").unwrap();
    let c = control(&t, &unrounded()).unwrap();
    assert_eq!(
        labels(&c),
        [
            "withheld:zero",
            "withheld:threshold",
            "withheld:secondary",
            "released",
            "released"
        ]
    );
}

// Crafted: the same 23 patients are counted in two tables. In the first, the cell is withheld by
// secondary suppression (beside a cell of 4); released in the second it would give it back, so
// the link withholds it there too (common practice: secondary suppression across linked tables,
// Hundepool et al. 2012 §4.3).
#[test]
fn a_count_linked_across_tables_is_withheld_with_its_copy() {
    use sluice_aggregate::{CellRef, Link};
    let mut a = counts_table("bands", &["band"]);
    for (b, n) in [("x", 23), ("y", 4), ("z", 30), (ALL, 57)] {
        a.push(vec![b.into(), Value::Int(n), Value::Int(n), Value::Null]);
    }
    a.add_margin_constraints("band").unwrap();
    let mut g = counts_table("groups", &["group"]);
    g.push(vec![
        "x_only".into(),
        Value::Int(23),
        Value::Int(23),
        Value::Null,
    ]);
    g.push(vec![
        "other".into(),
        Value::Int(40),
        Value::Int(40),
        Value::Null,
    ]);
    g.links.push(Link {
        row: 0,
        parts: vec![CellRef::of("bands", 0, "patients")],
    });
    let out = control_all(&[a, g], &unrounded()).unwrap();
    assert_eq!(labels(&out[0])[0], "withheld:secondary");
    assert_eq!(labels(&out[1]), ["withheld:secondary", "released"]);
}
