//! Crafted candidate tables, put through disclosure control with the shipped standard rules,
//! rendered as a report.

use sluice_aggregate::{ALL, Column, Constraint, Histogram, Role, Table, Value, col, dim};
use sluice_disclose::{CheckedTable, Rules, control};
use sluice_report::{
    CAUTIONS, ForestKind, ForestRow, ReportMeta, ShadeZone, SourceHash, forest_svg, render,
};
use std::path::Path;

fn rules() -> Rules {
    let p = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../policies/disclosure/standard.toml");
    Rules::load(&p).unwrap()
}

fn patients() -> Column {
    col("n_patients", Role::Patients, "distinct patients")
}

fn q(p: f64, n: &str) -> Column {
    let name = format!("q{}", (p * 100.0).round() as i64);
    col(&name, Role::Quantile { p, n: n.into() }, "quantile")
}

fn cohort_flow() -> Table {
    let mut t = Table::new(
        "cohort_flow",
        "Cohort flow",
        "Patients at each step",
        vec![
            dim("step", ""),
            dim("rule", ""),
            dim("outcome", ""),
            patients(),
        ],
    );
    let steps = [
        ("1", "monitoring marker on any specimen", 500, 0),
        ("2", "monitoring event with every drug tag", 300, 200),
        ("3", "no excluded co-medication", 296, 4),
        ("4", "stable before the first window", 250, 46),
    ];
    for (i, (s, r, rem, out)) in steps.iter().enumerate() {
        if i > 0 {
            t.push(vec![
                (*s).into(),
                (*r).into(),
                "excluded".into(),
                Value::Int(*out),
            ]);
        }
        t.push(vec![
            (*s).into(),
            (*r).into(),
            "remaining".into(),
            Value::Int(*rem),
        ]);
    }
    let remaining = |k: usize| if k == 0 { 0 } else { 2 * k };
    for k in 1..steps.len() {
        t.constraints.push(Constraint {
            total: remaining(k - 1),
            parts: vec![2 * k - 1, 2 * k],
        });
    }
    t
}

fn intervals_by_month() -> Table {
    let mut cols = vec![
        dim("month", ""),
        patients(),
        col("n_intervals", Role::Count, ""),
        col("mean_days", Role::Statistic, ""),
    ];
    for p in [0.1, 0.25, 0.5, 0.75, 0.9] {
        cols.push(q(p, "n_intervals"));
    }
    let mut t = Table::new(
        "intervals_by_month",
        "Monitoring intervals by month",
        "Days between monitoring events",
        cols,
    );
    for m in 1..=12 {
        let np = if m == 6 { 4 } else { 80 };
        let ni = if m == 6 { 6 } else { 200 + m };
        let base = 60.0 + m as f64 * (if m > 7 { 3.0 } else { 0.0 });
        t.push(vec![
            format!("2023-{m:02}").into(),
            Value::Int(np),
            Value::Int(ni),
            Value::Float(base + 5.0),
            Value::Float(base - 30.0),
            Value::Float(base - 15.0),
            Value::Float(base),
            Value::Float(base + 15.0),
            Value::Float(base + 40.0),
        ]);
    }
    t
}

fn histograms() -> Table {
    let mut t = Table::new(
        "histograms",
        "Histograms",
        "Results per fixed bin",
        vec![
            dim("window", ""),
            dim("analyte", ""),
            dim("bin_lower", ""),
            dim("bin_upper", ""),
            patients(),
            col("n_results", Role::Count, ""),
            col("patients_at_or_below", Role::Support, ""),
            col("patients_at_or_above", Role::Support, ""),
        ],
    );
    t.histogram = Some(Histogram {
        group_by: vec!["window".into(), "analyte".into()],
        lower: "bin_lower".into(),
        upper: "bin_upper".into(),
        patients_at_or_below: "patients_at_or_below".into(),
        patients_at_or_above: "patients_at_or_above".into(),
    });
    for (w, ps) in [
        ("before", [2u64, 3, 30, 60, 45, 20, 4, 2]),
        ("after", [1u64, 5, 25, 50, 55, 30, 8, 3]),
    ] {
        let total: u64 = ps.iter().sum();
        let mut below = 0;
        for (i, &p) in ps.iter().enumerate() {
            below += p;
            let above = total - below + p;
            let lo = 10.0 * i as f64;
            t.push(vec![
                w.into(),
                "alt".into(),
                Value::Float(lo),
                Value::Float(lo + 10.0),
                Value::Int(p as i64),
                Value::Int(3 * p as i64),
                Value::Int(below as i64),
                Value::Int(above as i64),
            ]);
        }
    }
    t
}

fn worst_paired() -> Table {
    let mut t = Table::new(
        "worst_paired",
        "Worst results: paired differences",
        "after minus before",
        vec![
            dim("subgroup", ""),
            dim("analyte", ""),
            patients(),
            col("mean_before", Role::Statistic, ""),
            col("mean_after", Role::Statistic, ""),
            dim("statistic", ""),
            dim("method", ""),
            col("estimate", Role::Statistic, ""),
            col("lower", Role::Statistic, ""),
            col("upper", Role::Statistic, ""),
            col("se", Role::Statistic, ""),
            col("p_value", Role::Statistic, ""),
        ],
    );
    for (g, n, shift) in [(ALL, 120, 0.0), ("mtx_only", 90, 1.0), ("small", 6, 2.0)] {
        for a in ["alt", "egfr"] {
            for (s, m) in [
                ("mean_difference", "paired t"),
                ("hodges_lehmann", "Wilcoxon signed-rank"),
            ] {
                t.push(vec![
                    g.into(),
                    a.into(),
                    Value::Int(n),
                    Value::Float(30.0),
                    Value::Float(32.0 + shift),
                    s.into(),
                    m.into(),
                    Value::Float(2.0 + shift),
                    Value::Float(-0.5 + shift),
                    Value::Float(4.5 + shift),
                    Value::Float(1.25),
                    Value::Float(0.11),
                ]);
            }
        }
    }
    t
}

fn critical_results() -> Table {
    let mut t = Table::new(
        "critical_results",
        "Critical results",
        "Results beyond the critical limits",
        vec![
            dim("window", ""),
            dim("context", ""),
            patients(),
            col("n_events", Role::Count, ""),
            col("person_years", Role::Statistic, ""),
            col("rate_per_100py", Role::Statistic, ""),
            col("lower", Role::Statistic, ""),
            col("upper", Role::Statistic, ""),
        ],
    );
    for (w, f) in [("before", 1.0), ("after", 1.4)] {
        for (c, n) in [("monitoring", 12), ("other", 40), (ALL, 52)] {
            let e = (n as f64 * f).round() as i64;
            t.push(vec![
                w.into(),
                c.into(),
                Value::Int(n),
                Value::Int(e),
                Value::Float(400.0),
                Value::Float(e as f64 / 4.0),
                Value::Float(e as f64 / 5.0),
                Value::Float(e as f64 / 3.2),
            ]);
        }
    }
    t
}

fn travel() -> Table {
    let mut t = Table::new(
        "travel",
        "Travel saved",
        "Home-to-GP distance",
        vec![
            dim("subgroup", ""),
            dim("scenario", ""),
            patients(),
            col("mean_round_trip_miles", Role::Statistic, ""),
            col(
                "miles_saved_per_year",
                Role::Magnitude {
                    contributions: "miles_top".into(),
                },
                "",
            ),
            col("miles_top", Role::Contributions, ""),
        ],
    );
    for (g, n, total) in [(ALL, 200, 9000.0), ("mtx_only", 150, 7000.0)] {
        t.push(vec![
            g.into(),
            "three_monthly".into(),
            Value::Int(n),
            Value::Float(6.5),
            Value::Float(total),
            Value::List(vec![120.0, 110.0, 100.0, 90.0, 80.0]),
        ]);
    }
    t
}

fn potassium_distributions() -> Table {
    let mut t = Table::new(
        "distributions",
        "Result distributions",
        "Potassium by month and setting",
        vec![
            dim("month", ""),
            dim("setting", ""),
            dim("analyte", ""),
            patients(),
            col("n_results", Role::Count, ""),
            col("mean", Role::Statistic, ""),
            q(0.5, "n_results"),
        ],
    );
    for m in 1..=6 {
        for (s, n) in [("gp", 300), ("ward", 120), ("ed", 8)] {
            t.push(vec![
                format!("2024-{m:02}").into(),
                s.into(),
                "potassium".into(),
                Value::Int(n),
                Value::Int(2 * n),
                Value::Float(4.3),
                Value::Float(4.2 + m as f64 * 0.02),
            ]);
        }
    }
    t
}

fn checked(tables: &[Table]) -> Vec<CheckedTable> {
    let r = rules();
    tables.iter().map(|t| control(t, &r).unwrap()).collect()
}

fn meta() -> ReportMeta {
    ReportMeta {
        study: "mtx_monitoring".into(),
        title: "Methotrexate monitoring <interval> & harm".into(),
        site: "quillmere".into(),
        tool_version: "sluice 0.1.0".into(),
        rules_summary: "threshold 10 patients; counts rounded to 5".into(),
        rules_sha256: String::new(),
        key_fingerprint: "ab12cd34".into(),
        created_from: vec![SourceHash {
            role: "study policy".into(),
            path: "policies/studies/mtx.toml".into(),
            sha256: "0".repeat(64),
        }],
        pooled_sites: Vec::new(),
        created: None,
    }
}

fn zones() -> Vec<ShadeZone> {
    vec![ShadeZone {
        analyte: "alt".into(),
        below: None,
        above: Some(50.0),
        label: "abnormal (local policy)".into(),
    }]
}

fn all_tables() -> Vec<Table> {
    vec![
        cohort_flow(),
        intervals_by_month(),
        histograms(),
        worst_paired(),
        critical_results(),
        travel(),
    ]
}

/// Every `http://` or `https://` in the text is the SVG namespace.
fn only_svg_namespace_urls(html: &str) {
    for scheme in ["http://", "https://"] {
        for (i, _) in html.match_indices(scheme) {
            let rest = &html[i..];
            assert!(
                rest.starts_with("http://www.w3.org/2000/svg\""),
                "stray URL: {}",
                &rest[..rest.len().min(60)]
            );
        }
    }
}

#[test]
fn report_has_cautions_tables_markers_and_charts() {
    let tables = checked(&all_tables());
    // The crafted data really has withheld and merged rows.
    assert!(
        tables[0].withheld() > 0,
        "cohort flow has a small exclusion"
    );
    assert!(tables[1].withheld() > 0, "a month has 4 patients");
    assert!(
        tables[2]
            .status()
            .contains(&sluice_disclose::Status::Merged)
    );
    let html = render(&meta(), &tables, &zones());
    for c in CAUTIONS {
        assert!(html.contains(&sluice_report::escape(c)), "{c}");
    }
    assert!(html.contains("not clinical advice"));
    assert!(html.contains("information-governance officer"));
    for t in &tables {
        assert!(
            html.contains(&sluice_report::escape(t.title())),
            "{}",
            t.title()
        );
        assert!(html.contains(&format!("id=\"t-{}\"", t.name())));
    }
    // Reasons are counted in the summary, never written beside a cell: a cell's reason (zero,
    // below the threshold) would say what the withheld count is.
    assert!(html.contains("small or empty: "));
    assert!(html.contains("secondary: "));
    assert!(!html.contains("withheld:threshold") && !html.contains("withheld:zero"));
    assert!(html.contains("class=\"withheld\""));
    assert!(html.contains("merged bins"));
    // Metadata is escaped.
    assert!(html.contains("Methotrexate monitoring &lt;interval&gt; &amp; harm"));
    assert!(!html.contains("<interval>"));
    // Cohort flow diagram.
    assert!(html.contains("class=\"flow\""));
    assert!(html.contains("Step 3"));
    // One chart of each kind.
    for title in [
        "Monitoring intervals over time",
        "Histogram: alt",
        "alt: mean difference",
        "egfr: hodges lehmann",
        "Critical results",
        "Travel saved: miles saved per year",
    ] {
        let at = html
            .find(&format!("<h3>{title}</h3>"))
            .unwrap_or_else(|| panic!("no chart {title}"));
        assert!(
            html[at..]
                .trim_start_matches(&format!("<h3>{title}</h3>"))
                .trim_start()
                .starts_with("<figure>\n<svg"),
            "{title} is not drawn"
        );
    }
    let n_svg = html.matches("<svg").count();
    assert!(n_svg >= 8, "{n_svg} charts");
    assert!(!html.contains("Not drawn"), "every chart drawn");
    // No script, no external resources.
    assert!(!html.to_lowercase().contains("<script"));
    only_svg_namespace_urls(&html);
}

#[test]
fn report_is_deterministic() {
    let a = render(&meta(), &checked(&all_tables()), &zones());
    let b = render(&meta(), &checked(&all_tables()), &zones());
    assert_eq!(a, b);
}

#[test]
fn second_study_draws_medians_by_month_and_setting() {
    let tables = checked(&[potassium_distributions()]);
    assert!(tables[0].withheld() > 0, "ed has 8 patients a month");
    let html = render(&meta(), &tables, &[]);
    let at = html
        .find("<h3>Median potassium by month and setting</h3>")
        .expect("median chart");
    assert!(html[at..].contains("<svg"));
    assert!(html.contains("small or empty: "));
    only_svg_namespace_urls(&html);
}

#[test]
fn missing_or_withheld_tables_are_skipped_with_a_note() {
    // A travel table whose every row has too few patients.
    let mut t = travel();
    for row in &mut t.rows {
        row[2] = Value::Int(3);
    }
    let tables = checked(&[t]);
    assert_eq!(tables[0].withheld(), tables[0].rows().len());
    let html = render(&meta(), &tables, &[]);
    assert!(!html.contains("<svg"));
    assert!(html.contains("Not drawn: every row is withheld"));
    // No tables at all: still a valid report with the cautions.
    let html = render(&meta(), &[], &[]);
    assert!(html.contains("not clinical advice"));
    assert!(!html.contains("<svg"));
}

#[test]
fn forest_plot_of_pooled_sites() {
    let mut rows = vec![
        ForestRow::estimate("quillmere", 1.2, 0.4, 2.0),
        ForestRow::estimate("brackenholt", 0.8, -0.1, 1.7),
        ForestRow::estimate("saltreach <b>", f64::NAN, f64::NAN, f64::NAN),
    ];
    rows.push(ForestRow {
        label: "pooled (fixed)".into(),
        estimate: 1.0,
        lower: 0.45,
        upper: 1.55,
        kind: ForestKind::Fixed,
        weight: None,
    });
    rows.push(ForestRow {
        label: "pooled (random)".into(),
        estimate: 1.0,
        lower: 0.3,
        upper: 1.7,
        kind: ForestKind::Random,
        weight: None,
    });
    let svg = forest_svg(&rows);
    assert!(svg.starts_with("<svg"));
    assert_eq!(svg.matches("<polygon").count(), 2, "two diamonds");
    assert!(svg.contains("not released"));
    assert!(svg.contains("saltreach &lt;b&gt;"));
    assert_eq!(svg, forest_svg(&rows));
    assert!(forest_svg(&[]).is_empty());
}
