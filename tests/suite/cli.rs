//! The `sluice` command as a user runs it.

use crate::common;
use std::process::Command;

#[test]
fn demo_runs_and_reports_where_to_look() {
    let out = tempfile::tempdir().unwrap();
    let target = out.path().join("demo");
    let o = Command::new(common::sluice_bin())
        .current_dir(common::root())
        .args(["demo", "--out"])
        .arg(&target)
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(
        o.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(stdout.contains("identical to demo-data"), "{stdout}");
    assert!(stdout.contains("done: output in"), "{stdout}");
    assert!(stdout.contains("report.html in a browser"), "{stdout}");
    let exported = target.join("export");
    for rel in [
        "quillmere-mtx-monitoring",
        "quillmere-potassium-seasonal",
        "pooled-mtx-monitoring",
    ] {
        let rel = exported.join(rel);
        for f in ["manifest.json", "approval.json", "report.html"] {
            assert!(rel.join(f).is_file(), "{}/{f}", rel.display());
        }
        let o = Command::new(common::sluice_bin())
            .current_dir(common::root())
            .arg("check")
            .arg(&rel)
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stdout));
    }

    // The pooled estimates, recomputed from the pooled release's site rows by statsmodels'
    // combine_effects (DerSimonian-Laird), an implementation outside the project.
    let Some(py) = std::env::var_os("SLUICE_PYTHON") else {
        eprintln!(
            "SLUICE_PYTHON is not set: skipping the statsmodels comparison (.ci/run sets it)"
        );
        return;
    };
    let o = Command::new(py)
        .args(["-W", "ignore"])
        .arg(common::root().join("crates/sluice-pool/tests/pool_statsmodels.py"))
        .arg(exported.join("pooled-mtx-monitoring"))
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        o.status.success(),
        "{text}{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(text.contains(" 0 mismatches"), "{text}");

    // pyarrow, an independent Parquet reader, reads every file of every exported demo release.
    let script = r#"
import json, pathlib, sys, pyarrow.parquet as pq
n = 0
for rel in sys.argv[1:]:
    m = json.load(open(pathlib.Path(rel) / "manifest.json"))
    for f in m["files"]:
        if f["name"].endswith(".parquet"):
            assert pq.read_table(pathlib.Path(rel) / f["name"]).num_rows == f["rows"], f["name"]
            n += 1
print(n)
"#;
    let mut cmd = Command::new(std::env::var_os("SLUICE_PYTHON").unwrap());
    cmd.args(["-c", script]);
    for rel in [
        "quillmere-mtx-monitoring",
        "quillmere-potassium-seasonal",
        "pooled-mtx-monitoring",
    ] {
        cmd.arg(exported.join(rel));
    }
    let o = cmd.output().unwrap();
    assert!(
        o.status.success(),
        "pyarrow: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    let n: usize = String::from_utf8_lossy(&o.stdout).trim().parse().unwrap();
    assert!(n >= 40, "pyarrow read {n} demo release tables");
}

#[test]
fn demo_refuses_a_folder_in_use() {
    let out = tempfile::tempdir().unwrap();
    std::fs::write(out.path().join("keep.txt"), "x").unwrap();
    let o = Command::new(common::sluice_bin())
        .current_dir(common::root())
        .args(["demo", "--out"])
        .arg(out.path())
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("is not empty"), "{err}");
}

#[test]
fn a_bad_profile_names_file_and_key() {
    let dir = tempfile::tempdir().unwrap();
    let text = std::fs::read_to_string(common::policies().join("profiles/quillmere.toml"))
        .unwrap()
        .replace("delimiter = \",\"", "delimiter = \",,\"");
    let p = dir.path().join("broken.toml");
    std::fs::write(&p, text).unwrap();
    let o = Command::new(common::sluice_bin())
        .current_dir(common::root())
        .args(["synth", "--out"])
        .arg(dir.path().join("o"))
        .arg("--profile")
        .arg(&p)
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("broken.toml") && err.contains("format.delimiter"),
        "{err}"
    );
}
