//! `manifest.json`: what a release holds and where it came from. Every file of the release is
//! listed with its SHA-256, so the manifest's own SHA-256 (which an approval is bound to) stands
//! for the whole release.

use serde::{Deserialize, Serialize};
use sluice_aggregate::Input;

/// Version of the release format; check refuses any other.
pub const SCHEMA_VERSION: u32 = 1;
pub const MANIFEST: &str = "manifest.json";
/// The approval lives in the release folder but outside the manifest (it is made after it);
/// check ignores exactly this name and nothing else.
pub const APPROVAL: &str = "approval.json";
/// Prefix of the key-value metadata keys sluice writes into each Parquet file.
pub const META_PREFIX: &str = "sluice.";

/// The disclosure rules the tables were controlled by, in full, so the checker re-reads exactly
/// what was applied.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RulesRecord {
    pub path: String,
    pub sha256: String,
    pub content: String,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FileKind {
    /// A disclosure-controlled table, `<name>.parquet`; check reads and re-applies the rules.
    Table,
    /// Another file (e.g. the HTML report): hashed, but its content is for the reviewer.
    Extra,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FileEntry {
    pub name: String,
    pub kind: FileKind,
    pub sha256: String,
    pub bytes: u64,
    /// Rows and withheld rows of a table; absent for extra files.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rows: Option<u64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub withheld: Option<u64>,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ReleaseManifest {
    pub schema_version: u32,
    /// The sluice that computed the candidates, and the crate that wrote the release.
    pub tool_version: String,
    pub writer: String,
    pub site: String,
    pub study: String,
    pub study_title: String,
    pub key_fingerprint: String,
    pub store_manifest_sha256: String,
    pub store_generation: u64,
    /// The study policy and every reference table it used, with SHA-256s.
    pub inputs: Vec<Input>,
    pub disclosure_rules: RulesRecord,
    /// Who made the release; a site requiring two people refuses its approval by them.
    #[serde(default)]
    pub made_by: String,
    pub files: Vec<FileEntry>,
}

impl ReleaseManifest {
    /// The bytes written to `manifest.json`: pretty JSON with a final newline, fields in
    /// declaration order, so equal manifests are equal bytes.
    pub fn to_bytes(&self) -> Vec<u8> {
        let mut b = serde_json::to_vec_pretty(self).expect("manifest serializes");
        b.push(b'\n');
        b
    }
}
