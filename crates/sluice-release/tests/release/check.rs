//! The independent check: a clean release passes; each tamper is caught with a message naming
//! the file, row and rule.

use crate::common::*;
use arrow::array::{Float64Array, Int64Array, StringArray};
use arrow::datatypes::DataType;
use sluice_release::{Verdict, check};
use std::path::Path;
use std::sync::Arc;

fn fails_with(v: &Verdict, rule: &str, text: &str) {
    assert!(!v.passed(), "expected a failure, got {v}");
    assert!(
        v.problems
            .iter()
            .any(|p| p.rule == rule && p.to_string().contains(text)),
        "no {rule} problem mentioning {text:?} in:\n{v}"
    );
    assert!(v.to_string().starts_with("FAIL: "), "{v}");
}

#[test]
fn a_clean_release_passes() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    let v = check(&rel, &policy());
    assert!(v.passed(), "{v}");
    assert_eq!((v.tables, v.rows), (3, 9 + 3 + 4));
    assert_eq!(v.unchecked, ["report.html"]);
    assert!(v.to_string().starts_with("PASS: "), "{v}");
    // An approval file is the one name check ignores.
    std::fs::write(rel.join("approval.json"), "{}").unwrap();
    assert!(check(&rel, &policy()).passed());
}

#[test]
fn a_flipped_byte_is_caught() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    let p = rel.join("bands.parquet");
    let mut b = std::fs::read(&p).unwrap();
    let i = b.len() / 2;
    b[i] ^= 0x01;
    std::fs::write(&p, b).unwrap();
    let v = check(&rel, &policy());
    fails_with(&v, "hash", "bands.parquet: hash: sha256");
}

#[test]
fn added_and_removed_files_are_caught() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    std::fs::write(rel.join("extra.csv"), "nhs_number\n9991234560\n").unwrap();
    fails_with(
        &check(&rel, &policy()),
        "files",
        "extra.csv: files: is not listed",
    );
    std::fs::remove_file(rel.join("extra.csv")).unwrap();
    std::fs::remove_file(rel.join("travel.parquet")).unwrap();
    fails_with(
        &check(&rel, &policy()),
        "files",
        "travel.parquet: files: is listed in the manifest but missing",
    );
}

#[test]
fn an_edited_manifest_is_caught() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    let mut m = read_manifest(&rel);
    m["files"][0]["withheld"] = 0.into();
    write_manifest(&rel, &m);
    fails_with(
        &check(&rel, &policy()),
        "manifest",
        "4 withheld rows but the manifest records Some(0)",
    );
    let mut m = read_manifest(&rel);
    m["files"][0]["withheld"] = 4.into();
    m["site"] = "elsewhere".into();
    write_manifest(&rel, &m);
    fails_with(&check(&rel, &policy()), "metadata", "sluice.site");
    let mut m = read_manifest(&rel);
    m["reviewed"] = true.into();
    write_manifest(&rel, &m);
    fails_with(
        &check(&rel, &policy()),
        "manifest",
        "unknown field `reviewed`",
    );
}

#[test]
fn rules_lowered_below_the_floor_are_caught() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    let mut m = read_manifest(&rel);
    let content = m["disclosure_rules"]["content"]
        .as_str()
        .unwrap()
        .replace("threshold = 10", "threshold = 5");
    m["disclosure_rules"]["sha256"] = sha256(content.as_bytes()).into();
    m["disclosure_rules"]["content"] = content.into();
    write_manifest(&rel, &m);
    let v = check(&rel, &policy());
    fails_with(&v, "floor", "threshold = 5 is below the site floor");
    // Content changed without its hash: caught as well.
    let mut m = read_manifest(&rel);
    m["disclosure_rules"]["content"] = m["disclosure_rules"]["content"]
        .as_str()
        .unwrap()
        .replace("k = 80.0", "k = 99.0")
        .into();
    write_manifest(&rel, &m);
    fails_with(
        &check(&rel, &policy()),
        "rules",
        "disclosure rules content has sha256",
    );
}

/// Rewrites `bands.parquet` by hand with arrow-rs, keeping its metadata, with the patients of row
/// `row` set to `n`, and records the new file's hash in the manifest, so only the content rules
/// can catch it.
fn hand_written_bands(rel: &Path, row: usize, n: i64, status: &str) {
    rewrite(rel, "bands.parquet", |cols, schema, _| {
        let np = schema.index_of("n_patients").unwrap();
        assert_eq!(schema.field(np).data_type(), &DataType::Int64);
        let mut v: Vec<Option<i64>> = cols[np]
            .as_any()
            .downcast_ref::<Int64Array>()
            .unwrap()
            .iter()
            .collect();
        v[row] = Some(n);
        cols[np] = Arc::new(Int64Array::from(v));
        let dc = schema.index_of("disclosure").unwrap();
        let mut s: Vec<Option<String>> = cols[dc]
            .as_any()
            .downcast_ref::<StringArray>()
            .unwrap()
            .iter()
            .map(|x| x.map(String::from))
            .collect();
        s[row] = Some(status.into());
        cols[dc] = Arc::new(StringArray::from(s));
        let mean = schema.index_of("mean").unwrap();
        let mut m: Vec<Option<f64>> = cols[mean]
            .as_any()
            .downcast_ref::<Float64Array>()
            .unwrap()
            .iter()
            .collect();
        m[row] = Some(1.33);
        cols[mean] = Arc::new(Float64Array::from(m));
    });
}

#[test]
fn a_hand_written_small_count_is_caught_by_the_count_rule() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    // Row 2 (alt, all) is released with 44 → 45 patients; make it 3.
    hand_written_bands(&rel, 2, 3, "released");
    let v = check(&rel, &policy());
    assert!(v.problems.iter().all(|p| p.rule != "hash"), "{v}");
    fails_with(
        &v,
        "threshold",
        "bands.parquet, row 2: threshold: n_patients = Int(3)",
    );
    fails_with(
        &v,
        "threshold",
        "mean is released with n_patients = Some(3)",
    );
}

#[test]
fn a_hand_released_withheld_cell_breaks_secondary_suppression() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    // Row 0 (alt, on_time) was withheld by secondary suppression; releasing it with a valid
    // count leaves (alt, late) recoverable from its row.
    hand_written_bands(&rel, 0, 40, "released");
    let v = check(&rel, &policy());
    fails_with(
        &v,
        "secondary",
        "bands.parquet, row 1: secondary: the only withheld cell",
    );
}

#[test]
fn columns_outside_the_allow_list_are_caught() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    let mut policy = policy();
    policy.columns.columns.remove("median");
    fails_with(
        &check(&rel, &policy),
        "allow-list",
        "column median is not in",
    );
    let mut policy = crate::common::policy();
    policy.columns.max_text_chars = 3;
    fails_with(&check(&rel, &policy), "free-text", "longer than 3");
}
