use sluice_aggregate::{Input, Provenance, Role, Table, Value, col, dim};
use sluice_disclose::{Rules, control};
use sluice_release::{CheckPolicy, Decision, Registry, ReviewerKey, approve, write_release};
use std::path::{Path, PathBuf};

pub fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../..")
}

pub fn rules() -> Rules {
    Rules::load(&root().join("policies/disclosure/standard.toml")).unwrap()
}

/// The tests' reviewer, made once per run and registered in [`policy`].
pub fn reviewer() -> &'static ReviewerKey {
    static K: std::sync::OnceLock<ReviewerKey> = std::sync::OnceLock::new();
    K.get_or_init(|| ReviewerKey::generate("IG officer").unwrap())
}

pub fn policy() -> CheckPolicy {
    let registry = Registry::parse(
        &format!(
            "two_person = true\n[[reviewer]]\nname = \"IG officer\"\npublic_key = \"{}\"\n",
            reviewer().public_hex()
        ),
        Path::new("test-reviewers.toml"),
    )
    .unwrap();
    CheckPolicy::load_dir(&root().join("policies/disclosure"))
        .unwrap()
        .with_reviewers(registry)
}

pub fn provenance(site: &str, study: &str, study_sha: &str) -> Provenance {
    Provenance {
        study: study.into(),
        study_title: "Test study".into(),
        site: site.into(),
        key_fingerprint: format!("fp-{site}"),
        store_manifest_sha256: "0".repeat(64),
        store_generation: 1,
        tool_version: "0.1.0".into(),
        inputs: vec![Input {
            role: "study".into(),
            path: "policies/studies/test.toml".into(),
            sha256: study_sha.into(),
        }],
        made_by: String::new(),
    }
}

/// Writes and (optionally) approves a site release of `tables` at `dir/<site>`.
pub fn release(
    dir: &Path,
    prov: &Provenance,
    rules: &Rules,
    tables: &[Table],
    approved: bool,
) -> PathBuf {
    let out = dir.join(&prov.site);
    let checked: Vec<_> = tables.iter().map(|t| control(t, rules).unwrap()).collect();
    write_release(&out, prov, rules, &checked, &[]).unwrap();
    if approved {
        approve(&out, reviewer(), Decision::Approved, "test", &policy()).unwrap();
    }
    out
}

/// A count table with a margin: band in {a, b, all} per window.
pub fn bands(a: i64, b: i64) -> Table {
    let mut t = Table::new(
        "interval_bands",
        "Bands",
        "",
        vec![
            dim("window", ""),
            dim("band", ""),
            col("n_patients", Role::Patients, ""),
            col("n_results", Role::Count, ""),
            col("mean", Role::Statistic, ""),
        ],
    );
    for (w, x, y) in [("baseline", a, b), ("follow_up", b, a)] {
        t.push(vec![
            w.into(),
            "a".into(),
            x.into(),
            (2 * x).into(),
            1.0.into(),
        ]);
        t.push(vec![
            w.into(),
            "b".into(),
            y.into(),
            (2 * y).into(),
            1.0.into(),
        ]);
        t.push(vec![
            w.into(),
            "all".into(),
            (x + y).into(),
            (2 * (x + y)).into(),
            1.0.into(),
        ]);
    }
    t.add_margin_constraints("band").unwrap();
    t
}

/// An estimate table with one row per (analyte, statistic).
pub fn estimates(rows: &[(&str, &str, f64, f64, i64)]) -> Table {
    let mut t = Table::new(
        "distribution_changes",
        "Changes",
        "",
        vec![
            dim("analyte", ""),
            dim("statistic", ""),
            col("n_patients", Role::Patients, ""),
            col("estimate", Role::Statistic, ""),
            col("lower", Role::Statistic, ""),
            col("upper", Role::Statistic, ""),
            col("se", Role::Statistic, ""),
        ],
    );
    for &(a, s, y, se, n) in rows {
        t.push(vec![
            a.into(),
            s.into(),
            n.into(),
            y.into(),
            (y - 1.96 * se).into(),
            (y + 1.96 * se).into(),
            se.into(),
        ]);
    }
    t
}

/// A histogram with fixed bins [0,1), [1,2), ...; `counts` per bin as (patients, results), with
/// the support columns the disclosure merge needs.
pub fn histogram(counts: &[(i64, i64)]) -> Table {
    let mut t = Table::new(
        "histograms",
        "Histograms",
        "",
        vec![
            dim("analyte", ""),
            dim("bin_lower", ""),
            dim("bin_upper", ""),
            col("n_patients", Role::Patients, ""),
            col("n_results", Role::Count, ""),
            col("below", Role::Support, ""),
            col("above", Role::Support, ""),
        ],
    );
    let total: i64 = counts.iter().map(|c| c.0).sum();
    let mut cum = 0;
    for (i, &(p, r)) in counts.iter().enumerate() {
        cum += p;
        t.push(vec![
            "wbc".into(),
            Value::Float(i as f64),
            Value::Float(i as f64 + 1.0),
            p.into(),
            r.into(),
            cum.into(),
            (total - cum + p).into(),
        ]);
    }
    t.histogram = Some(sluice_aggregate::Histogram {
        group_by: vec!["analyte".into()],
        lower: "bin_lower".into(),
        upper: "bin_upper".into(),
        patients_at_or_below: "below".into(),
        patients_at_or_above: "above".into(),
    });
    t
}

pub fn read(rel: &Path, table: &str) -> (Vec<String>, Vec<Vec<Value>>) {
    use arrow::array::{Array, Float64Array, Int32Array, Int64Array, StringArray};
    use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    let f = std::fs::File::open(rel.join(format!("{table}.parquet"))).unwrap();
    let b = ParquetRecordBatchReaderBuilder::try_new(f).unwrap();
    let names: Vec<String> = b
        .schema()
        .fields()
        .iter()
        .map(|f| f.name().clone())
        .collect();
    let mut rows: Vec<Vec<Value>> = Vec::new();
    for batch in b.build().unwrap() {
        let batch = batch.unwrap();
        for r in 0..batch.num_rows() {
            let mut row = Vec::new();
            for a in batch.columns() {
                let any = a.as_any();
                row.push(if a.is_null(r) {
                    Value::Null
                } else if let Some(x) = any.downcast_ref::<Int64Array>() {
                    Value::Int(x.value(r))
                } else if let Some(x) = any.downcast_ref::<Int32Array>() {
                    Value::Int(x.value(r).into())
                } else if let Some(x) = any.downcast_ref::<Float64Array>() {
                    Value::Float(x.value(r))
                } else {
                    Value::Text(any.downcast_ref::<StringArray>().unwrap().value(r).into())
                });
            }
            rows.push(row);
        }
    }
    (names, rows)
}

pub fn get<'a>(names: &[String], row: &'a [Value], col: &str) -> &'a Value {
    &row[names
        .iter()
        .position(|n| n == col)
        .unwrap_or_else(|| panic!("no {col}"))]
}
