//! The release: writing disclosure-controlled tables to a folder the IG officer can check,
//! approving it, and exporting it out of the secure area.
//!
//! - [`write_release`] (`write.rs`) writes each [`sluice_disclose::CheckedTable`] as
//!   `<name>.parquet` plus `manifest.json`, deterministically and atomically.
//! - [`check`] (`check.rs`) is the independent check: it reads only the release folder, with
//!   arrow-rs rather than the polars code that made the tables, and re-applies the rules.
//! - [`approve`] and [`export`] (`approve.rs`) bind a reviewer's decision to the SHA-256 of the
//!   manifest and copy out only a checked, approved, unchanged release.
//!
//! `manifest.rs` holds the manifest format shared by all three.

#![forbid(unsafe_code)]

mod approve;
mod attack;
mod check;
mod manifest;
pub mod scan;
pub mod sign;
mod write;

pub use approve::{
    ApprovalRecord, Decided, Decision, ExportReport, approve, decisions_log, export,
    verify_approval,
};
pub use check::{
    AllowList, AllowedColumn, CheckPolicy, ColumnType, Problem, ReleasedTable, Verdict,
    array_values, check, read_released_table,
};
pub use manifest::{
    APPROVAL, FileEntry, FileKind, MANIFEST, META_PREFIX, ReleaseManifest, RulesRecord,
    SCHEMA_VERSION,
};
pub use sign::{Registry, ReviewerKey};
pub use write::write_release;

use std::path::PathBuf;

#[derive(Debug, thiserror::Error)]
pub enum ReleaseError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: already exists and is not an empty folder; a release is never overwritten")]
    Exists { path: PathBuf },
    #[error("table {table}: {message}")]
    Table { table: String, message: String },
    #[error(
        "table {table} was controlled by rules with sha256 {table_sha256} but the release records rules {rules_path} with sha256 {rules_sha256}"
    )]
    RulesMismatch {
        table: String,
        table_sha256: String,
        rules_path: String,
        rules_sha256: String,
    },
    #[error("{path}: parquet: {message}")]
    Parquet { path: PathBuf, message: String },
    #[error("file name {name:?}: {message}")]
    Name { name: String, message: String },
    #[error("{path}: {message}")]
    Format { path: PathBuf, message: String },
    #[error(transparent)]
    Disclose(#[from] sluice_disclose::DiscloseError),
    #[error("{path}: the release fails check; {verdict}")]
    CheckFailed { path: PathBuf, verdict: String },
    #[error("{path}: not approved: {message}")]
    NotApproved { path: PathBuf, message: String },
}

pub(crate) fn io(path: &std::path::Path) -> impl FnOnce(std::io::Error) -> ReleaseError + '_ {
    move |source| ReleaseError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// Lower-case hex SHA-256.
pub(crate) fn sha256(bytes: &[u8]) -> String {
    sluice_aggregate::sha256_hex(bytes)
}
