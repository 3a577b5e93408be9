//! Fixtures: crafted candidate tables, the shipped rules and policy, a written release.

use sluice_aggregate::{ALL, Histogram, Input, Provenance, Role, Table, Value, col, dim};
use sluice_disclose::{CheckedTable, Rules, control};
use sluice_release::{CheckPolicy, Registry, ReleaseManifest, ReviewerKey, write_release};
use std::path::{Path, PathBuf};

pub fn policies() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../../policies/disclosure")
}

pub fn rules() -> Rules {
    Rules::load(&policies().join("standard.toml")).unwrap()
}

/// A reviewer key made once per run; "I. G. Officer" is registered in [`policy`], "intruder"
/// is not.
pub fn reviewer(name: &str) -> &'static ReviewerKey {
    static K: std::sync::OnceLock<Vec<ReviewerKey>> = std::sync::OnceLock::new();
    let keys = K.get_or_init(|| {
        ["I. G. Officer", "intruder", "A. Analyst"]
            .iter()
            .map(|n| ReviewerKey::generate(n).unwrap())
            .collect()
    });
    keys.iter()
        .find(|k| k.name() == name)
        .expect("a test reviewer")
}

pub fn registry() -> Registry {
    let mut text = String::from("two_person = true\n");
    for n in ["I. G. Officer", "A. Analyst"] {
        text.push_str(&format!(
            "[[reviewer]]\nname = {n:?}\npublic_key = \"{}\"\n",
            reviewer(n).public_hex()
        ));
    }
    Registry::parse(&text, Path::new("test-reviewers.toml")).unwrap()
}

pub fn policy() -> CheckPolicy {
    CheckPolicy::load_dir(&policies())
        .unwrap()
        .with_reviewers(registry())
}

pub fn provenance(site: &str) -> Provenance {
    Provenance {
        study: "mtx_monitoring".into(),
        study_title: "Methotrexate monitoring intervals".into(),
        site: site.into(),
        key_fingerprint: "ab12cd34".into(),
        store_manifest_sha256: "0".repeat(64),
        store_generation: 3,
        tool_version: "0.1.0".into(),
        inputs: vec![Input {
            role: "study".into(),
            path: "policies/studies/mtx.toml".into(),
            sha256: "1".repeat(64),
        }],
        made_by: String::new(),
    }
}

/// A 2-D table (analyte × band) with margins; one small cell. Crafted.
pub fn bands() -> Table {
    let mut t = Table::new(
        "bands",
        "Patients by analyte and interval band",
        "crafted",
        vec![
            dim("analyte", ""),
            dim("band", ""),
            col("patients", Role::Patients, ""),
            col("n_results", Role::Count, ""),
            col("mean", Role::Statistic, ""),
            col(
                "median",
                Role::Quantile {
                    p: 0.5,
                    n: "n_results".into(),
                },
                "",
            ),
        ],
    );
    let cells = [
        ("alt", "on_time", 40),
        ("alt", "late", 4),
        ("alt", ALL, 44),
        ("wbc", "on_time", 52),
        ("wbc", "late", 23),
        ("wbc", ALL, 75),
        (ALL, "on_time", 92),
        (ALL, "late", 27),
        (ALL, ALL, 119),
    ];
    for (a, b, n) in cells {
        t.push(vec![
            a.into(),
            b.into(),
            Value::Int(n),
            Value::Int(3 * n),
            Value::Float(n as f64 / 3.0),
            Value::Float(41.5),
        ]);
    }
    t.add_margin_constraints("band").unwrap();
    t.add_margin_constraints("analyte").unwrap();
    t
}

/// A histogram of intervals with small tails. Crafted.
pub fn intervals() -> Table {
    let mut t = Table::new(
        "intervals",
        "Days between monitoring tests",
        "",
        vec![
            dim("analyte", ""),
            dim("bin_lower", ""),
            dim("bin_upper", ""),
            col("patients", Role::Patients, ""),
            col("n_intervals", Role::Count, ""),
            col("le", Role::Support, ""),
            col("ge", Role::Support, ""),
        ],
    );
    let bins = [
        (0.0, 14.0, 2),
        (14.0, 28.0, 9),
        (28.0, 56.0, 30),
        (56.0, 84.0, 25),
        (84.0, 112.0, 6),
        (112.0, 365.0, 3),
    ];
    let total: i64 = bins.iter().map(|b| b.2).sum();
    let mut below = 0;
    for (lo, hi, p) in bins {
        let above = total - below;
        below += p;
        t.push(vec![
            "alt".into(),
            Value::Float(lo),
            Value::Float(hi),
            Value::Int(p),
            Value::Int(2 * p),
            Value::Int(below),
            Value::Int(above),
        ]);
    }
    t.histogram = Some(Histogram {
        group_by: vec!["analyte".into()],
        lower: "bin_lower".into(),
        upper: "bin_upper".into(),
        patients_at_or_below: "le".into(),
        patients_at_or_above: "ge".into(),
    });
    t
}

/// Travel miles by setting, one dominated by two patients (Hundepool et al. 2012 §4.2 example).
pub fn miles() -> Table {
    let mut t = Table::new(
        "travel",
        "Miles travelled",
        "",
        vec![
            dim("setting", ""),
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
        "gp".into(),
        Value::Int(30),
        Value::Float(100_000.0),
        Value::List(vec![50_000.0, 49_000.0]),
    ]);
    t.push(vec![
        "ward".into(),
        Value::Int(30),
        Value::Float(900.0),
        Value::List(vec![40.0, 35.0]),
    ]);
    t.push(vec![
        "opd".into(),
        Value::Int(35),
        Value::Float(1200.0),
        Value::List(vec![50.0, 45.0]),
    ]);
    t.push(vec![
        ALL.into(),
        Value::Int(95),
        Value::Float(102_100.0),
        Value::List(vec![50_000.0, 49_000.0]),
    ]);
    t.add_margin_constraints("setting").unwrap();
    t
}

pub fn checked(rules: &Rules) -> Vec<CheckedTable> {
    [bands(), intervals(), miles()]
        .iter()
        .map(|t| control(t, rules).unwrap())
        .collect()
}

pub fn extra() -> Vec<(String, Vec<u8>)> {
    vec![(
        "report.html".into(),
        b"<html><body>report</body></html>\n".to_vec(),
    )]
}

/// Writes the standard release to `<dir>/<name>` and returns its path and manifest.
pub fn release(dir: &Path, name: &str, site: &str) -> (PathBuf, ReleaseManifest) {
    let r = rules();
    let out = dir.join(name);
    let m = write_release(&out, &provenance(site), &r, &checked(&r), &extra()).unwrap();
    (out, m)
}

pub fn read_manifest(rel: &Path) -> serde_json::Value {
    serde_json::from_slice(&std::fs::read(rel.join("manifest.json")).unwrap()).unwrap()
}

pub fn write_manifest(rel: &Path, m: &serde_json::Value) {
    std::fs::write(
        rel.join("manifest.json"),
        serde_json::to_vec_pretty(m).unwrap(),
    )
    .unwrap();
}

pub fn sha256(b: &[u8]) -> String {
    sluice_aggregate::sha256_hex(b)
}

/// Rewrites one released table by hand (arrow-rs), letting `edit` change its columns and
/// metadata, and records the new hash in the manifest, so only content rules can catch it.
pub fn rewrite(
    rel: &std::path::Path,
    file: &str,
    edit: impl FnOnce(
        &mut Vec<arrow::array::ArrayRef>,
        &arrow::datatypes::Schema,
        &mut Vec<parquet::file::metadata::KeyValue>,
    ),
) {
    let path = rel.join(file);
    let b = parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder::try_new(
        std::fs::File::open(&path).unwrap(),
    )
    .unwrap();
    let mut kv = b
        .metadata()
        .file_metadata()
        .key_value_metadata()
        .cloned()
        .unwrap();
    let batch = b.build().unwrap().next().unwrap().unwrap();
    let schema = batch.schema();
    let mut cols = batch.columns().to_vec();
    edit(&mut cols, &schema, &mut kv);
    let batch = arrow::record_batch::RecordBatch::try_new(schema.clone(), cols).unwrap();
    let props = parquet::file::properties::WriterProperties::builder()
        .set_key_value_metadata(Some(kv))
        .build();
    let mut buf = Vec::new();
    let mut w = parquet::arrow::ArrowWriter::try_new(&mut buf, schema, Some(props)).unwrap();
    w.write(&batch).unwrap();
    w.close().unwrap();
    std::fs::write(&path, &buf).unwrap();
    let mut man = read_manifest(rel);
    for f in man["files"].as_array_mut().unwrap() {
        if f["name"] == file {
            f["sha256"] = sha256(&buf).into();
            f["bytes"] = buf.len().into();
        }
    }
    write_manifest(rel, &man);
}
