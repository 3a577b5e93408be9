//! Approval and export: bound to the manifest's hash, refused for failing, unapproved, changed
//! or wrongly approved releases.

use crate::common::*;
use sluice_release::{Decision, ReleaseError, approve, check, export};

#[test]
fn an_approved_release_exports_and_still_checks() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    let a = approve(&rel, "I. G. Officer", Decision::Approved, "fine", &policy()).unwrap();
    assert_eq!(
        a.manifest_sha256,
        sha256(&std::fs::read(rel.join("manifest.json")).unwrap())
    );
    assert!(a.time_utc.ends_with('Z'));
    let to = dir.path().join("out");
    let report = export(&rel, &to, &policy()).unwrap();
    assert_eq!(report.reviewer, "I. G. Officer");
    assert_eq!(report.files.len(), 6);
    let v = check(&to, &policy());
    assert!(v.passed(), "{v}");
    assert!(to.join("approval.json").exists());
    // Exports never overwrite either.
    let e = export(&rel, &to, &policy()).unwrap_err();
    assert!(matches!(e, ReleaseError::Exists { .. }), "{e}");
}

#[test]
fn export_needs_an_approval() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    let e = export(&rel, &dir.path().join("out"), &policy()).unwrap_err();
    assert!(e.to_string().contains("no approval.json"), "{e}");
    approve(&rel, "igo", Decision::Rejected, "too granular", &policy()).unwrap();
    let e = export(&rel, &dir.path().join("out"), &policy()).unwrap_err();
    assert!(
        e.to_string().contains("igo rejected it: too granular"),
        "{e}"
    );
    assert!(!dir.path().join("out").exists());
}

#[test]
fn a_failing_release_cannot_be_approved() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    std::fs::write(rel.join("notes.txt"), "x").unwrap();
    let e = approve(&rel, "igo", Decision::Approved, "", &policy()).unwrap_err();
    assert!(matches!(e, ReleaseError::CheckFailed { .. }), "{e}");
    assert!(e.to_string().contains("notes.txt"), "{e}");
    assert!(!rel.join("approval.json").exists());
}

#[test]
fn a_change_after_approval_voids_it() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    approve(&rel, "igo", Decision::Approved, "", &policy()).unwrap();
    // A changed file fails the check.
    let p = rel.join("report.html");
    std::fs::write(&p, "<html>changed</html>").unwrap();
    let e = export(&rel, &dir.path().join("out"), &policy()).unwrap_err();
    assert!(matches!(e, ReleaseError::CheckFailed { .. }), "{e}");
    // Changing the file and its manifest entry passes the check but not the approval.
    let mut m = read_manifest(&rel);
    let b = std::fs::read(&p).unwrap();
    for f in m["files"].as_array_mut().unwrap() {
        if f["name"] == "report.html" {
            f["sha256"] = sha256(&b).into();
            f["bytes"] = b.len().into();
        }
    }
    write_manifest(&rel, &m);
    assert!(check(&rel, &policy()).passed());
    let e = export(&rel, &dir.path().join("out"), &policy()).unwrap_err();
    assert!(
        e.to_string().contains("the release changed after approval"),
        "{e}"
    );
}

#[test]
fn an_approval_copied_from_another_release_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let (a, _) = release(dir.path(), "a", "quillmere");
    let (b, _) = release(dir.path(), "b", "brackenholt");
    approve(&a, "igo", Decision::Approved, "", &policy()).unwrap();
    std::fs::copy(a.join("approval.json"), b.join("approval.json")).unwrap();
    assert!(check(&b, &policy()).passed());
    let e = export(&b, &dir.path().join("out"), &policy()).unwrap_err();
    assert!(matches!(e, ReleaseError::NotApproved { .. }), "{e}");
    assert!(e.to_string().contains("belongs to another release"), "{e}");
}
