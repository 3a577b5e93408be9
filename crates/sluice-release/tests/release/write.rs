//! The writer: reproducible, atomic, never overwriting, bound to the rules the tables were
//! controlled by.

use crate::common::*;
use sluice_aggregate::Value;
use sluice_disclose::{Rules, control};
use sluice_release::{ReleaseError, check, write_release};

#[test]
fn same_inputs_give_a_byte_identical_release() {
    let dir = tempfile::tempdir().unwrap();
    let (a, ma) = release(dir.path(), "a", "quillmere");
    let (b, mb) = release(dir.path(), "b", "quillmere");
    assert_eq!(ma, mb);
    let mut names: Vec<String> = std::fs::read_dir(&a)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    assert_eq!(
        names,
        [
            "bands.parquet",
            "intervals.parquet",
            "manifest.json",
            "report.html",
            "travel.parquet"
        ]
    );
    for n in &names {
        assert_eq!(
            std::fs::read(a.join(n)).unwrap(),
            std::fs::read(b.join(n)).unwrap(),
            "{n}"
        );
    }
    let bands = ma.files.iter().find(|f| f.name == "bands.parquet").unwrap();
    assert_eq!((bands.rows, bands.withheld), (Some(9), Some(4)));
    let m = read_manifest(&a);
    assert_eq!(m["disclosure_rules"]["sha256"], rules().sha256());
    assert_eq!(m["disclosure_rules"]["content"], rules().text());
    assert_eq!(m["key_fingerprint"], "ab12cd34");
    assert_eq!(m["inputs"][0]["role"], "study");
}

#[test]
fn an_existing_release_is_never_overwritten() {
    let dir = tempfile::tempdir().unwrap();
    let (a, _) = release(dir.path(), "a", "quillmere");
    let r = rules();
    let e = write_release(&a, &provenance("x"), &r, &checked(&r), &[]).unwrap_err();
    assert!(matches!(e, ReleaseError::Exists { .. }), "{e}");
    assert!(e.to_string().contains("never overwritten"), "{e}");
    // An empty folder is fine.
    let empty = dir.path().join("empty");
    std::fs::create_dir(&empty).unwrap();
    write_release(&empty, &provenance("x"), &r, &checked(&r), &[]).unwrap();
    assert!(check(&empty, &policy()).passed());
}

#[test]
fn tables_controlled_by_other_rules_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let standard = rules();
    let other = Rules::parse(
        &standard.text().replace("threshold = 10", "threshold = 20"),
        std::path::Path::new("strict.toml"),
    )
    .unwrap();
    let e = write_release(
        &dir.path().join("r"),
        &provenance("x"),
        &standard,
        &checked(&other),
        &[],
    )
    .unwrap_err();
    assert!(matches!(e, ReleaseError::RulesMismatch { .. }), "{e}");
    assert!(!dir.path().join("r").exists());
}

#[test]
fn extra_files_need_plain_non_parquet_names() {
    let dir = tempfile::tempdir().unwrap();
    let r = rules();
    for bad in [
        "../x.html",
        "manifest.json",
        "approval.json",
        "sneaky.parquet",
        ".hidden",
    ] {
        let e = write_release(
            &dir.path().join("r"),
            &provenance("x"),
            &r,
            &checked(&r),
            &[(bad.to_string(), vec![1])],
        )
        .unwrap_err();
        assert!(matches!(e, ReleaseError::Name { .. }), "{bad}: {e}");
    }
}

// A failure halfway (the second table cannot be written) leaves neither the release nor the
// partial folder; a stale partial folder from a killed run is not a release, and a new write
// succeeds beside it.
#[test]
fn an_interrupted_write_leaves_no_release() {
    let dir = tempfile::tempdir().unwrap();
    let r = rules();
    let mut bad = bands();
    bad.name = "mixed".into();
    for row in &mut bad.rows {
        if row[1] == Value::from("late") {
            row[1] = Value::Int(2);
        }
    }
    let tables = vec![control(&bands(), &r).unwrap(), control(&bad, &r).unwrap()];
    let out = dir.path().join("rel");
    let e = write_release(&out, &provenance("x"), &r, &tables, &[]).unwrap_err();
    assert!(e.to_string().contains("mixes text and numbers"), "{e}");
    assert!(!out.exists());
    let left: Vec<_> = std::fs::read_dir(dir.path()).unwrap().collect();
    assert!(left.is_empty(), "partial folder left behind");

    // What a killed run leaves: tables, no manifest.
    let stale = dir.path().join("rel.partial-999999");
    std::fs::create_dir(&stale).unwrap();
    std::fs::copy(
        release(dir.path(), "tmp", "x").0.join("bands.parquet"),
        stale.join("bands.parquet"),
    )
    .unwrap();
    let v = check(&stale, &policy());
    assert!(!v.passed());
    assert!(v.to_string().contains("not a release"), "{v}");
    write_release(&out, &provenance("x"), &r, &checked(&r), &[]).unwrap();
    assert!(check(&out, &policy()).passed());
}
