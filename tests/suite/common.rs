//! Helpers shared by the topic modules.

use std::path::{Path, PathBuf};

pub fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

pub fn policies() -> PathBuf {
    root().join("policies")
}

pub fn vectors(name: &str) -> String {
    std::fs::read_to_string(root().join("tests/vectors").join(name)).expect("vector file")
}

pub fn analytes() -> sluice_policy::AnalyteTable {
    sluice_policy::AnalyteTable::load(&policies().join("analytes.toml")).expect("analytes")
}

pub fn profile(name: &str) -> sluice_policy::Profile {
    sluice_policy::Profile::load(&policies().join("profiles").join(format!("{name}.toml")))
        .expect("profile")
}

/// A small synthetic history (2 years and a half, 600 patients) written into `dir`.
pub fn small_synth(dir: &Path, profile_name: &str, seed: u64) -> sluice_synth::Summary {
    let start = chrono::NaiveDate::from_ymd_opt(2023, 1, 1).unwrap();
    let mut cfg = sluice_synth::Config::new(seed, 600, 30, start);
    cfg.mtx_share = 0.15;
    cfg.rows = Some(30_000);
    // More faults than the defaults, so that every kind occurs in a small history.
    cfg.faults.bad_nhs = 0.01;
    cfg.faults.blank_nhs = 0.01;
    cfg.faults.row_fault = 0.005;
    sluice_synth::run(cfg, profile(profile_name), &analytes(), dir, |_| {}).expect("synth")
}

pub fn sluice_bin() -> PathBuf {
    PathBuf::from(env!("CARGO_BIN_EXE_sluice"))
}
