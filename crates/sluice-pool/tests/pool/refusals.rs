//! Inputs that must not be pooled, each refused with a message naming the site and the problem.

use crate::common::{bands, estimates, histogram, policy, provenance, release, rules};
use sluice_disclose::Rules;
use sluice_pool::{PoolError, pool};
use std::path::{Path, PathBuf};

const SHA: &str = "f0c1f5b22e9ae21e4f2f9ce958d7db47a4a353bb0c00deec16572961d06a78e5";

fn site(dir: &Path, label: &str, study: &str, sha: &str, rules: &Rules, ok: bool) -> PathBuf {
    let tables = [
        bands(40, 30),
        estimates(&[("wbc", "mean_difference", 0.2, 0.1, 40)]),
        histogram(&[(12, 20), (30, 60), (25, 40)]),
    ];
    release(dir, &provenance(label, study, sha), rules, &tables, ok)
}

fn refused(inputs: &[PathBuf]) -> String {
    let dir = tempfile::tempdir().unwrap();
    let e = pool(inputs, &dir.path().join("pooled"), &rules(), &policy()).unwrap_err();
    e.to_string()
}

#[test]
fn good_sites_pool() {
    let d = tempfile::tempdir().unwrap();
    let r = rules();
    let a = site(d.path(), "alpha", "s", SHA, &r, true);
    let b = site(d.path(), "beta", "s", SHA, &r, true);
    let out = d.path().join("pooled");
    let rep = pool(&[a, b], &out, &r, &policy()).unwrap();
    assert!(rep.verdict.passed(), "{}", rep.verdict);
    assert_eq!(rep.manifest.site, "pooled:alpha+beta");
    assert_eq!(rep.manifest.inputs.len(), 3);
    assert_eq!(rep.manifest.inputs[1].role, "site_release:alpha");
}

#[test]
fn different_studies_are_refused() {
    let d = tempfile::tempdir().unwrap();
    let r = rules();
    let a = site(d.path(), "alpha", "s", SHA, &r, true);
    let b = site(d.path(), "beta", "other", SHA, &r, true);
    let m = refused(&[a.clone(), b]);
    assert!(
        m.contains("site beta") && m.contains("the study is other"),
        "{m}"
    );
    let c = site(d.path(), "gamma", "s", &"1".repeat(64), &r, true);
    let m = refused(&[a, c]);
    assert!(
        m.contains("site gamma") && m.contains("study policy sha256"),
        "{m}"
    );
}

#[test]
fn different_rules_are_refused() {
    let d = tempfile::tempdir().unwrap();
    let r = rules();
    let r2 = Rules::parse(&format!("{}# a variant\n", r.text()), r.path()).unwrap();
    let a = site(d.path(), "alpha", "s", SHA, &r, true);
    let b = site(d.path(), "beta", "s", SHA, &r2, true);
    let m = refused(&[a, b]);
    assert!(
        m.contains("site beta") && m.contains("disclosure rules sha256"),
        "{m}"
    );
}

#[test]
fn a_tampered_release_is_refused() {
    let d = tempfile::tempdir().unwrap();
    let r = rules();
    let a = site(d.path(), "alpha", "s", SHA, &r, true);
    let b = site(d.path(), "beta", "s", SHA, &r, true);
    let f = b.join("interval_bands.parquet");
    let mut bytes = std::fs::read(&f).unwrap();
    let i = bytes.len() / 2;
    bytes[i] ^= 0xff;
    std::fs::write(&f, bytes).unwrap();
    let m = refused(&[a, b]);
    assert!(
        m.contains("site beta") && m.contains("fails check") && m.contains("sha256"),
        "{m}"
    );
}

#[test]
fn an_unapproved_release_is_refused() {
    let d = tempfile::tempdir().unwrap();
    let r = rules();
    let a = site(d.path(), "alpha", "s", SHA, &r, true);
    let b = site(d.path(), "beta", "s", SHA, &r, false);
    let m = refused(&[a.clone(), b.clone()]);
    assert!(m.contains("site beta") && m.contains("not approved"), "{m}");
    sluice_release::approve(
        &b,
        crate::common::reviewer(),
        sluice_release::Decision::Rejected,
        "no",
        &policy(),
    )
    .unwrap();
    let m = refused(&[a, b]);
    assert!(m.contains("site beta") && m.contains("rejected"), "{m}");
}

#[test]
fn the_same_site_twice_is_refused() {
    let d1 = tempfile::tempdir().unwrap();
    let d2 = tempfile::tempdir().unwrap();
    let r = rules();
    let a = site(d1.path(), "alpha", "s", SHA, &r, true);
    let b = site(d2.path(), "alpha", "s", SHA, &r, true);
    let m = refused(&[a.clone(), a.clone()]);
    assert!(m.contains("site alpha appears twice"), "{m}");
    let m = refused(&[a, b]);
    assert!(m.contains("site alpha appears twice"), "{m}");
}

#[test]
fn a_newer_schema_version_is_refused() {
    let d = tempfile::tempdir().unwrap();
    let r = rules();
    let a = site(d.path(), "alpha", "s", SHA, &r, true);
    let b = site(d.path(), "beta", "s", SHA, &r, true);
    let mpath = b.join("manifest.json");
    let text = std::fs::read_to_string(&mpath).unwrap();
    std::fs::write(
        &mpath,
        text.replacen("\"schema_version\": 1", "\"schema_version\": 2", 1),
    )
    .unwrap();
    let dir = tempfile::tempdir().unwrap();
    let e = pool(&[a, b], &dir.path().join("p"), &r, &policy()).unwrap_err();
    assert!(matches!(e, PoolError::NewerSchema { found: 2, .. }), "{e}");
    let m = e.to_string();
    assert!(
        m.contains("site beta") && m.contains("newer") && m.contains("upgrade"),
        "{m}"
    );
}

#[test]
fn one_site_is_too_few() {
    let d = tempfile::tempdir().unwrap();
    let a = site(d.path(), "alpha", "s", SHA, &rules(), true);
    assert!(refused(&[a]).contains("at least 2"));
}
