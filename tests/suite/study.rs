//! The measure stage against the generator's planted truth: cohort flow, band transitions,
//! subgroup sizes and critical results per window are recovered exactly; bad study policies are
//! refused with the key that holds the mistake.

use crate::common;
use crate::link::synth_and_link;
use sluice_aggregate::{Candidates, Table, Value};
use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};

fn measure(
    store: &Path,
    work: &Path,
    study: &Path,
) -> Result<sluice_study::Outcome, sluice_study::MeasureError> {
    sluice_study::measure(&sluice_study::Options {
        study,
        policies: &common::policies(),
        store,
        work,
    })
}

fn study(name: &str) -> PathBuf {
    common::policies()
        .join("studies")
        .join(format!("{name}.toml"))
}

/// Value of `column` in the rows whose named dimensions equal the given values.
fn cell(t: &Table, key: &[(&str, &str)], column: &str) -> Value {
    let c = t
        .column(column)
        .unwrap_or_else(|| panic!("{} has no column {column}", t.name));
    let idx: Vec<(usize, &str)> = key
        .iter()
        .map(|(k, v)| {
            (
                t.column(k)
                    .unwrap_or_else(|| panic!("{} has no {k}", t.name)),
                *v,
            )
        })
        .collect();
    let rows: Vec<_> = t
        .rows
        .iter()
        .filter(|r| idx.iter().all(|(i, v)| r[*i].as_text() == Some(v)))
        .collect();
    assert_eq!(
        rows.len(),
        1,
        "{}: {key:?} matches {} rows",
        t.name,
        rows.len()
    );
    rows[0][c].clone()
}

fn count(t: &Table, key: &[(&str, &str)]) -> i64 {
    cell(t, key, "n_patients").as_i64().unwrap()
}

struct Truth {
    groups: BTreeMap<String, i64>,
    transitions: BTreeMap<String, i64>,
    /// (window, monitoring) → critical rows of mtx_stable patients.
    critical: BTreeMap<(String, bool), i64>,
}

fn truth(dir: &Path) -> Truth {
    let s: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.join("truth/summary.json")).unwrap()).unwrap();
    let map = |k: &str| {
        s[k].as_object()
            .unwrap()
            .iter()
            .map(|(k, v)| (k.clone(), v.as_i64().unwrap()))
            .collect()
    };
    let mut group = HashMap::new();
    let mut r = csv::Reader::from_path(dir.join("truth/patients.csv")).unwrap();
    for rec in r.records() {
        let rec = rec.unwrap();
        group.insert(rec[0].to_string(), rec[2].to_string());
    }
    let mut critical = BTreeMap::new();
    let mut r = csv::Reader::from_path(dir.join("truth/critical.csv")).unwrap();
    for rec in r.records() {
        let rec = rec.unwrap();
        if group.get(&rec[0]).map(String::as_str) != Some("mtx_stable") {
            continue;
        }
        let date = &rec[2][..10];
        let window = if ("2023-07-01".."2024-07-01").contains(&date) {
            "baseline"
        } else if ("2024-07-01".."2025-07-01").contains(&date) {
            "follow_up"
        } else {
            continue;
        };
        *critical
            .entry((window.to_string(), &rec[6] == "true"))
            .or_default() += 1;
    }
    Truth {
        groups: map("patients_by_group"),
        transitions: map("stable_transitions"),
        critical,
    }
}

#[test]
fn monitoring_study_recovers_the_planted_truth() {
    let l = synth_and_link("quillmere", 4242);
    let work = l.dir.path().join("work");
    let o = measure(&l.store, &work, &study("mtx-monitoring")).unwrap();
    let t = truth(l.dir.path());
    let c = Candidates::load(&work).unwrap();
    let table = |n: &str| c.table(n).unwrap_or_else(|| panic!("no table {n}"));
    let g = |k: &str| t.groups.get(k).copied().unwrap_or(0);

    // Cohort flow: every methotrexate group reaches step 2; each exclusion removes its group.
    let flow = table("cohort_flow");
    assert_eq!(o.cohort_size, Some(g("mtx_stable") as usize));
    let mtx = g("mtx_stable") + g("mtx_other_dmard") + g("mtx_recent_start") + g("mtx_stopped");
    assert_eq!(count(flow, &[("step", "2"), ("outcome", "remaining")]), mtx);
    assert_eq!(
        count(flow, &[("step", "3"), ("outcome", "excluded")]),
        g("mtx_other_dmard")
    );
    assert_eq!(
        count(flow, &[("step", "4"), ("outcome", "excluded")]),
        g("mtx_recent_start")
    );
    assert_eq!(
        count(flow, &[("step", "5"), ("outcome", "excluded")]),
        g("mtx_stopped")
    );
    assert_eq!(
        count(flow, &[("step", "5"), ("outcome", "remaining")]),
        g("mtx_stable")
    );

    // Band transitions: the generator's schedules, named by the study's bands.
    let band = |s: &str| match s {
        "monthly" => "monthly",
        "three_monthly" => "three_monthly",
        "five_monthly" => "longer",
        other => panic!("unexpected schedule {other}"),
    };
    let tr = table("band_transitions");
    let mut total = 0;
    for (k, n) in &t.transitions {
        let (b, a) = k.split_once("->").unwrap();
        assert_eq!(
            count(tr, &[("before_band", band(b)), ("after_band", band(a))]),
            *n,
            "transition {k}"
        );
        total += n;
    }
    assert_eq!(
        count(tr, &[("before_band", "all"), ("after_band", "all")]),
        total
    );
    let sg = table("subgroups");
    let tn = |k: &str| t.transitions.get(k).copied().unwrap_or(0);
    assert_eq!(
        count(sg, &[("subgroup", "monthly_to_three_monthly")]),
        tn("monthly->three_monthly")
    );
    assert_eq!(
        count(sg, &[("subgroup", "three_monthly_to_longer")]),
        tn("three_monthly->five_monthly")
    );
    assert_eq!(
        count(sg, &[("subgroup", "unchanged")]),
        tn("monthly->monthly") + tn("three_monthly->three_monthly")
    );

    // Critical results of the cohort, per window and context.
    let cr = table("critical_results");
    for w in ["baseline", "follow_up"] {
        let m = t.critical.get(&(w.to_string(), true)).copied().unwrap_or(0);
        let o = t
            .critical
            .get(&(w.to_string(), false))
            .copied()
            .unwrap_or(0);
        let ev = |ctx: &str| {
            cell(
                cr,
                &[("subgroup", "all"), ("window", w), ("context", ctx)],
                "n_events",
            )
            .as_i64()
            .unwrap()
        };
        assert_eq!(
            (ev("monitoring"), ev("other"), ev("all")),
            (m, o, m + o),
            "critical results in {w}"
        );
    }

    // Patient-level tables stay in the work folder.
    for f in ["cohort", "intervals", "worst", "critical", "travel"] {
        assert!(
            work.join("patients").join(format!("{f}.parquet")).is_file(),
            "{f}.parquet"
        );
    }
    // Every table has a patients column and its statistics line up with their inputs.
    let wp = table("worst_paired");
    let n = count(
        wp,
        &[
            ("subgroup", "all"),
            ("analyte", "alt"),
            ("statistic", "mean_difference"),
        ],
    );
    assert_eq!(
        n,
        g("mtx_stable"),
        "every cohort patient has an ALT in both windows"
    );
}

#[test]
fn population_study_runs_through_the_same_engine() {
    let l = synth_and_link("quillmere", 77);
    let work = l.dir.path().join("work");
    let o = measure(&l.store, &work, &study("potassium-seasonal")).unwrap();
    assert_eq!(o.cohort_size, None);
    let c = Candidates::load(&work).unwrap();
    let d = c.table("distributions").unwrap();
    let months: std::collections::BTreeSet<_> = d
        .rows
        .iter()
        .map(|r| r[0].as_text().unwrap().to_string())
        .collect();
    assert_eq!(
        months.len(),
        30,
        "one row set per calendar month of the history"
    );
    let n: i64 = d
        .rows
        .iter()
        .map(|r| r[d.column("n_results").unwrap()].as_i64().unwrap())
        .sum();
    assert_eq!(
        n as usize, o.rows_read,
        "every potassium result lands in exactly one month and setting"
    );
    assert!(c.table("critical_results").is_some() && c.table("flags_by_age_sex").is_some());
}

fn edited(dir: &Path, from: &str, to: &str) -> PathBuf {
    let text = std::fs::read_to_string(study("mtx-monitoring")).unwrap();
    assert!(text.contains(from), "the shipped study has {from:?}");
    let p = dir.join("edited.toml");
    std::fs::write(&p, text.replacen(from, to, 1)).unwrap();
    p
}

#[test]
fn bad_study_policies_name_the_key() {
    let l = synth_and_link("quillmere", 9);
    let work = l.dir.path().join("work");
    let cases = [
        (
            "drug_tags = [\"methotrexate\"]",
            "drug_tags = [\"methotrexat\"]",
            "cohort.drug_tags",
        ),
        ("id = \"alt\"", "id = \"alanine\"", "analyte[5].id"),
        (
            "sets = [\"rheumatology\",",
            "sets = [\"rheumatolgy\",",
            "thresholds.sets[0]",
        ),
        (
            "from = \"2024-07-01\"",
            "from = \"2024-06-01\"",
            "window[1].from",
        ),
        (
            "band_statistic = \"median\"",
            "band_statistic = \"mode\"",
            "intervals.band_statistic",
        ),
        (
            "stable_months = 3",
            "stable_months = 40",
            "cohort.stable_months",
        ),
        (
            "by = [\"subgroup\", \"window\"]",
            "by = [\"subgroup\", \"ward\"]",
            "distributions.by",
        ),
    ];
    for (from, to, key) in cases {
        let p = edited(l.dir.path(), from, to);
        let e = measure(&l.store, &work, &p)
            .err()
            .unwrap_or_else(|| panic!("{to} was accepted"))
            .to_string();
        assert!(e.contains(&format!("`{key}`")), "{to}: {e}");
    }
    // A store of another schema version is refused before anything is read.
    let m = l.store.join("manifest.json");
    let text = std::fs::read_to_string(&m).unwrap();
    std::fs::write(
        &m,
        text.replacen("\"schema_version\": 1", "\"schema_version\": 99", 1),
    )
    .unwrap();
    let e = measure(&l.store, &work, &study("mtx-monitoring"))
        .err()
        .unwrap()
        .to_string();
    assert!(e.contains("schema version 99"), "{e}");
}
