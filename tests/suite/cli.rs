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
