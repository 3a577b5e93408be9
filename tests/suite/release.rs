//! The release gate end to end on synthetic data: releases of both shipped studies pass the
//! independent check, hold none of the input identifiers, and are readable by pyarrow (an
//! independent Parquet reader, installed by `.ci/run`).

use crate::common;
use crate::link::synth_and_link;
use std::path::{Path, PathBuf};
use std::process::Command;

pub(crate) fn sluice(args: &[&str]) -> std::process::Output {
    sluice_with(&common::policies(), args)
}

pub(crate) fn sluice_with(policies: &Path, args: &[&str]) -> std::process::Output {
    let mut all = vec!["--policies", policies.to_str().unwrap()];
    all.extend_from_slice(args);
    Command::new(common::sluice_bin())
        .args(&all)
        .output()
        .expect("run sluice")
}

fn files(dir: &Path) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    v.sort();
    v
}

/// Every identifier the extracts carry, in each spelling it was written in.
fn identifiers(data: &Path) -> Vec<String> {
    let mut ids = Vec::new();
    let mut r = csv::Reader::from_path(data.join("truth/patients.csv")).unwrap();
    for rec in r.records() {
        let rec = rec.unwrap();
        let nhs = rec[0].to_string();
        ids.push(format!("{} {} {}", &nhs[..3], &nhs[3..6], &nhs[6..]));
        ids.push(nhs);
        ids.push(rec[1].to_string()); // local hospital number
        ids.push(rec[4].to_string()); // birth date, ISO
        let (y, m, d) = (&rec[4][..4], &rec[4][5..7], &rec[4][8..10]);
        ids.push(format!("{d}/{m}/{y}"));
        ids.push(rec[5].to_string()); // home postcode
    }
    for f in files(&data.join("extracts")) {
        let mut r = csv::Reader::from_path(&f).unwrap();
        let col = r
            .headers()
            .unwrap()
            .iter()
            .position(|h| h == "SPECIMEN_NO")
            .unwrap();
        for rec in r.records().flatten() {
            if let Some(s) = rec.get(col)
                && s.len() >= 8
            {
                ids.push(s.to_string());
            }
        }
    }
    ids.sort();
    ids.dedup();
    ids.retain(|s| s.len() >= 6);
    ids
}

#[test]
fn releases_pass_check_hold_no_identifier_and_read_in_pyarrow() {
    let l = synth_and_link("quillmere", 515);
    let ids = identifiers(l.dir.path());
    assert!(ids.len() > 1000, "the scan has identifiers to look for");
    for study in ["mtx-monitoring", "potassium-seasonal"] {
        let work = l.dir.path().join(format!("work-{study}"));
        let rel = l.dir.path().join(format!("rel-{study}"));
        let o = sluice(&[
            "measure",
            "--study",
            study,
            "--store",
            l.store.to_str().unwrap(),
            "--work",
            work.to_str().unwrap(),
        ]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let o = sluice(&[
            "release",
            "--work",
            work.to_str().unwrap(),
            "--out",
            rel.to_str().unwrap(),
        ]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let o = sluice(&["check", rel.to_str().unwrap()]);
        let verdict = String::from_utf8_lossy(&o.stdout);
        assert!(
            o.status.success() && verdict.starts_with("PASS"),
            "{verdict}"
        );

        // No released byte holds an identifier, a birth date, a postcode or a specimen number.
        // Aho-Corasick would be faster; a substring scan over a few MB is quick enough here.
        for f in files(&rel) {
            let bytes = std::fs::read(&f).unwrap();
            let text = String::from_utf8_lossy(&bytes);
            for id in &ids {
                assert!(
                    !text.contains(id.as_str()),
                    "{} contains the input identifier {id}",
                    f.display()
                );
            }
        }

        // An independent reader: pyarrow reads every table with the row count of the manifest.
        match std::env::var_os("SLUICE_PYTHON") {
            None => eprintln!(
                "SLUICE_PYTHON is not set: skipping the pyarrow reading (.ci/run sets it)"
            ),
            Some(py) => {
                let script = r#"
import json, sys, pyarrow.parquet as pq
rel = sys.argv[1]
m = json.load(open(rel + "/manifest.json"))
n = 0
for f in m["files"]:
    if f["name"].endswith(".parquet"):
        t = pq.read_table(rel + "/" + f["name"])
        assert t.num_rows == f["rows"], (f["name"], t.num_rows, f["rows"])
        assert "n_patients" in t.column_names and "disclosure" in t.column_names, f["name"]
        n += 1
print(n)
"#;
                let o = Command::new(py)
                    .args(["-c", script, rel.to_str().unwrap()])
                    .output()
                    .unwrap();
                assert!(
                    o.status.success(),
                    "pyarrow: {}",
                    String::from_utf8_lossy(&o.stderr)
                );
                let n: usize = String::from_utf8_lossy(&o.stdout).trim().parse().unwrap();
                assert!(n >= 5, "pyarrow read {n} tables");
            }
        }
    }
}

/// A copy of the shipped policies whose register holds one reviewer made with
/// `sluice reviewer new`; returns the policies folder and the reviewer's key file.
fn policies_with_reviewer(dir: &Path, name: &str) -> (PathBuf, PathBuf) {
    fn copy(from: &Path, to: &Path) {
        std::fs::create_dir_all(to).unwrap();
        for e in std::fs::read_dir(from).unwrap() {
            let p = e.unwrap().path();
            let t = to.join(p.file_name().unwrap());
            if p.is_dir() {
                copy(&p, &t);
            } else {
                std::fs::copy(&p, &t).unwrap();
            }
        }
    }
    let policies = dir.join("policies");
    copy(&common::policies(), &policies);
    let key = dir.join("reviewer.key");
    let o = sluice(&[
        "reviewer",
        "new",
        "--name",
        name,
        "--out",
        key.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let reg = policies.join("disclosure/reviewers.toml");
    let mut text = std::fs::read_to_string(&reg).unwrap();
    text.push('\n');
    text.push_str(&String::from_utf8_lossy(&o.stdout));
    std::fs::write(&reg, text).unwrap();
    (policies, key)
}

#[test]
fn export_needs_an_approval_of_the_exact_bytes() {
    let l = synth_and_link("quillmere", 516);
    let work = l.dir.path().join("work");
    let rel = l.dir.path().join("rel");
    let to = l.dir.path().join("out");
    let (policies, key) = policies_with_reviewer(l.dir.path(), "A. Reviewer");
    let s = |a: &[&str]| sluice_with(&policies, a);
    assert!(
        s(&[
            "measure",
            "--study",
            "mtx-monitoring",
            "--store",
            l.store.to_str().unwrap(),
            "--work",
            work.to_str().unwrap()
        ])
        .status
        .success()
    );
    assert!(
        s(&[
            "release",
            "--work",
            work.to_str().unwrap(),
            "--out",
            rel.to_str().unwrap()
        ])
        .status
        .success()
    );
    let o = s(&[
        "export",
        rel.to_str().unwrap(),
        "--to",
        to.to_str().unwrap(),
    ]);
    assert!(
        !o.status.success() && !to.exists(),
        "export without approval"
    );
    let o = s(&[
        "approve",
        rel.to_str().unwrap(),
        "--key",
        key.to_str().unwrap(),
        "--decision",
        "approved",
        "--note",
        "ok",
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    // A change after approval voids it.
    let report = rel.join("report.html");
    let mut bytes = std::fs::read(&report).unwrap();
    bytes.push(b' ');
    std::fs::write(&report, &bytes).unwrap();
    let o = s(&[
        "export",
        rel.to_str().unwrap(),
        "--to",
        to.to_str().unwrap(),
    ]);
    assert!(!o.status.success() && !to.exists(), "export after a change");
    let o = s(&["check", rel.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(1));
    assert!(
        String::from_utf8_lossy(&o.stdout).contains("report.html"),
        "check names the changed file"
    );
    bytes.pop();
    std::fs::write(&report, &bytes).unwrap();
    let o = s(&[
        "export",
        rel.to_str().unwrap(),
        "--to",
        to.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(to.join("manifest.json").is_file() && to.join("report.html").is_file());
}
