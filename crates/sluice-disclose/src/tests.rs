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

fn labels(t: &CheckedTable) -> Vec<String> {
    t.status().iter().map(Status::label).collect()
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
fn status_labels_round_trip() {
    for s in [
        Status::Released,
        Status::Rounded,
        Status::Merged,
        Status::Withheld {
            rule: "secondary".into(),
        },
    ] {
        assert_eq!(Status::parse(&s.label()), Some(s));
    }
    assert_eq!(Status::parse("withheld:"), None);
    assert_eq!(Status::parse("ok"), None);
}
