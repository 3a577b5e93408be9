//! Approval and export: signed, bound to the manifest's hash, refused for failing, unapproved,
//! changed, forged or wrongly approved releases.

use crate::common::*;
use sluice_release::{Decision, ReleaseError, approve, check, export};

#[test]
fn an_approved_release_exports_and_still_checks() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    let a = approve(
        &rel,
        reviewer("I. G. Officer"),
        Decision::Approved,
        "fine",
        &policy(),
    )
    .unwrap();
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
    approve(
        &rel,
        reviewer("I. G. Officer"),
        Decision::Rejected,
        "too granular",
        &policy(),
    )
    .unwrap();
    let e = export(&rel, &dir.path().join("out"), &policy()).unwrap_err();
    assert!(
        e.to_string()
            .contains("I. G. Officer rejected it: too granular"),
        "{e}"
    );
    assert!(!dir.path().join("out").exists());
}

#[test]
fn a_failing_release_cannot_be_approved() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    std::fs::write(rel.join("notes.txt"), "x").unwrap();
    let e = approve(
        &rel,
        reviewer("I. G. Officer"),
        Decision::Approved,
        "",
        &policy(),
    )
    .unwrap_err();
    assert!(matches!(e, ReleaseError::CheckFailed { .. }), "{e}");
    assert!(e.to_string().contains("notes.txt"), "{e}");
    assert!(!rel.join("approval.json").exists());
}

#[test]
fn a_change_after_approval_voids_it() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    approve(
        &rel,
        reviewer("I. G. Officer"),
        Decision::Approved,
        "",
        &policy(),
    )
    .unwrap();
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
    approve(
        &a,
        reviewer("I. G. Officer"),
        Decision::Approved,
        "",
        &policy(),
    )
    .unwrap();
    std::fs::copy(a.join("approval.json"), b.join("approval.json")).unwrap();
    assert!(check(&b, &policy()).passed());
    let e = export(&b, &dir.path().join("out"), &policy()).unwrap_err();
    assert!(matches!(e, ReleaseError::NotApproved { .. }), "{e}");
    assert!(e.to_string().contains("belongs to another release"), "{e}");
}

#[test]
fn a_hand_written_or_edited_approval_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    approve(
        &rel,
        reviewer("I. G. Officer"),
        Decision::Rejected,
        "no",
        &policy(),
    )
    .unwrap();
    // Turning the rejection into an approval by editing the file breaks the signature.
    let p = rel.join("approval.json");
    let text = std::fs::read_to_string(&p).unwrap();
    std::fs::write(&p, text.replace("\"rejected\"", "\"approved\"")).unwrap();
    let e = export(&rel, &dir.path().join("out"), &policy()).unwrap_err();
    assert!(
        e.to_string().contains("the signature does not verify"),
        "{e}"
    );
    // An approval in the old, unsigned form is not an approval record at all.
    std::fs::write(
        &p,
        format!(
            "{{\"schema_version\":1,\"manifest_sha256\":\"{}\",\"reviewer\":\"x\",\"decision\":\"approved\",\"note\":\"\",\"time_utc\":\"2026-01-01T00:00:00Z\"}}",
            sha256(&std::fs::read(rel.join("manifest.json")).unwrap())
        ),
    )
    .unwrap();
    let e = export(&rel, &dir.path().join("out"), &policy()).unwrap_err();
    assert!(
        e.to_string().contains("not a signed approval record"),
        "{e}"
    );
}

#[test]
fn an_unregistered_key_cannot_approve_and_its_signature_does_not_export() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    let e = approve(
        &rel,
        reviewer("intruder"),
        Decision::Approved,
        "",
        &policy(),
    )
    .unwrap_err();
    assert!(e.to_string().contains("is not registered"), "{e}");
    // Signed by a key registered only in a register of its own making: export, with the site's
    // register, refuses it.
    let mine = sluice_release::Registry::parse(
        &format!(
            "two_person = false\n[[reviewer]]\nname = \"intruder\"\npublic_key = \"{}\"\n",
            reviewer("intruder").public_hex()
        ),
        std::path::Path::new("mine.toml"),
    )
    .unwrap();
    let own = policy().with_reviewers(mine);
    approve(&rel, reviewer("intruder"), Decision::Approved, "", &own).unwrap();
    let e = export(&rel, &dir.path().join("out"), &policy()).unwrap_err();
    assert!(e.to_string().contains("which is not registered"), "{e}");
}

#[test]
fn a_rejection_is_final() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    approve(
        &rel,
        reviewer("I. G. Officer"),
        Decision::Rejected,
        "too granular",
        &policy(),
    )
    .unwrap();
    let e = approve(
        &rel,
        reviewer("I. G. Officer"),
        Decision::Approved,
        "",
        &policy(),
    )
    .unwrap_err();
    assert!(e.to_string().contains("a rejection is final"), "{e}");
    // Deleting approval.json does not help: the decisions log still holds the rejection.
    std::fs::remove_file(rel.join("approval.json")).unwrap();
    let e = approve(
        &rel,
        reviewer("A. Analyst"),
        Decision::Approved,
        "",
        &policy(),
    )
    .unwrap_err();
    assert!(e.to_string().contains("a rejection is final"), "{e}");
    let log = std::fs::read_to_string(sluice_release::decisions_log(&rel)).unwrap();
    assert_eq!(log.lines().count(), 1);
}

#[test]
fn the_maker_of_a_release_cannot_approve_it_where_two_people_are_required() {
    let dir = tempfile::tempdir().unwrap();
    let r = rules();
    let out = dir.path().join("r");
    let mut prov = provenance("quillmere");
    prov.made_by = "A. Analyst".into();
    sluice_release::write_release(&out, &prov, &r, &checked(&r), &extra()).unwrap();
    let e = approve(
        &out,
        reviewer("A. Analyst"),
        Decision::Approved,
        "",
        &policy(),
    )
    .unwrap_err();
    assert!(e.to_string().contains("requires another person"), "{e}");
    approve(
        &out,
        reviewer("I. G. Officer"),
        Decision::Approved,
        "",
        &policy(),
    )
    .unwrap();
    export(&out, &dir.path().join("x"), &policy()).unwrap();
}

#[test]
fn an_approval_against_a_laxer_floor_does_not_export() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    // A floor folder of the analyst's own, allowing cells of 1.
    let lax = dir.path().join("lax");
    std::fs::create_dir(&lax).unwrap();
    let floor = std::fs::read_to_string(policies().join("floor.toml"))
        .unwrap()
        .replace("min_threshold = 10", "min_threshold = 1");
    std::fs::write(lax.join("floor.toml"), floor).unwrap();
    std::fs::copy(policies().join("columns.toml"), lax.join("columns.toml")).unwrap();
    let lax_policy = sluice_release::CheckPolicy::load_dir(&lax)
        .unwrap()
        .with_reviewers(registry());
    approve(
        &rel,
        reviewer("I. G. Officer"),
        Decision::Approved,
        "",
        &lax_policy,
    )
    .unwrap();
    let e = export(&rel, &dir.path().join("out"), &policy()).unwrap_err();
    let m = e.to_string();
    assert!(
        m.contains("approved against the floor with sha256") && m.contains("the site's floor"),
        "{m}"
    );
}

#[test]
fn export_refuses_a_destination_inside_the_release() {
    let dir = tempfile::tempdir().unwrap();
    let (rel, _) = release(dir.path(), "r", "quillmere");
    approve(
        &rel,
        reviewer("I. G. Officer"),
        Decision::Approved,
        "",
        &policy(),
    )
    .unwrap();
    let e = export(&rel, &rel.join("copy"), &policy()).unwrap_err();
    assert!(e.to_string().contains("is inside the release"), "{e}");
    assert!(!rel.join("copy").exists());
}
