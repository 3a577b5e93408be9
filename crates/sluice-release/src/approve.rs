//! Approval and export: the IG officer's decision, bound to the exact release it was made on,
//! and the copy out of the secure area that only an approved, unchanged, passing release gets.
//!
//! `approval.json` records the SHA-256 of the `manifest.json` bytes. The manifest lists every
//! file's SHA-256, so any later change to any file either fails the check (the file no longer
//! matches the manifest) or changes the manifest's hash (the approval no longer matches it); an
//! approval copied from another release names that release's manifest and is refused too.

use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

use crate::check::{CheckPolicy, check};
use crate::manifest::{APPROVAL, MANIFEST, ReleaseManifest};
use crate::write::atomically;
use crate::{ReleaseError, io, sha256};

#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Decision {
    Approved,
    Rejected,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ApprovalRecord {
    pub schema_version: u32,
    /// SHA-256 of the `manifest.json` bytes this decision is about.
    pub manifest_sha256: String,
    pub reviewer: String,
    pub decision: Decision,
    pub note: String,
    /// UTC, RFC 3339 to the second.
    pub time_utc: String,
}

/// What [`export`] copied.
#[derive(Clone, Debug, PartialEq)]
pub struct ExportReport {
    pub from: PathBuf,
    pub to: PathBuf,
    pub files: Vec<String>,
    pub bytes: u64,
    pub manifest_sha256: String,
    pub reviewer: String,
    pub approved_at: String,
}

fn read_manifest(rel: &Path) -> Result<(Vec<u8>, ReleaseManifest), ReleaseError> {
    let path = rel.join(MANIFEST);
    let bytes = std::fs::read(&path).map_err(io(&path))?;
    let m = serde_json::from_slice(&bytes).map_err(|e| ReleaseError::Format {
        path: path.clone(),
        message: e.to_string(),
    })?;
    Ok((bytes, m))
}

/// Records the reviewer's decision in `<rel>/approval.json`. An approval is refused unless the
/// release passes [`check`]; a rejection can always be recorded.
pub fn approve(
    rel: &Path,
    reviewer: &str,
    decision: Decision,
    note: &str,
    policy: &CheckPolicy,
) -> Result<ApprovalRecord, ReleaseError> {
    if reviewer.trim().is_empty() {
        return Err(ReleaseError::NotApproved {
            path: rel.to_path_buf(),
            message: "the reviewer's name is empty".into(),
        });
    }
    let (bytes, _) = read_manifest(rel)?;
    if decision == Decision::Approved {
        let v = check(rel, policy);
        if !v.passed() {
            return Err(ReleaseError::CheckFailed {
                path: rel.to_path_buf(),
                verdict: v.to_string(),
            });
        }
    }
    let record = ApprovalRecord {
        schema_version: crate::SCHEMA_VERSION,
        manifest_sha256: sha256(&bytes),
        reviewer: reviewer.into(),
        decision,
        note: note.into(),
        time_utc: chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Secs, true),
    };
    let path = rel.join(APPROVAL);
    let tmp = rel.join(format!("{APPROVAL}.tmp"));
    let mut out = serde_json::to_vec_pretty(&record).expect("approval serializes");
    out.push(b'\n');
    std::fs::write(&tmp, out).map_err(io(&tmp))?;
    std::fs::rename(&tmp, &path).map_err(io(&path))?;
    Ok(record)
}

/// Copies the release `rel` to the folder `to` (absent or empty) only if it passes [`check`] and
/// carries an approval of exactly its current manifest.
pub fn export(rel: &Path, to: &Path, policy: &CheckPolicy) -> Result<ExportReport, ReleaseError> {
    let v = check(rel, policy);
    if !v.passed() {
        return Err(ReleaseError::CheckFailed {
            path: rel.to_path_buf(),
            verdict: v.to_string(),
        });
    }
    let not = |message: String| ReleaseError::NotApproved {
        path: rel.to_path_buf(),
        message,
    };
    let apath = rel.join(APPROVAL);
    let abytes = match std::fs::read(&apath) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            return Err(not(format!("no {APPROVAL}; run approve first")));
        }
        Err(e) => return Err(io(&apath)(e)),
    };
    let a: ApprovalRecord = serde_json::from_slice(&abytes)
        .map_err(|e| not(format!("{APPROVAL} is not an approval record: {e}")))?;
    if a.decision != Decision::Approved {
        return Err(not(format!("{} rejected it: {}", a.reviewer, a.note)));
    }
    let (mbytes, m) = read_manifest(rel)?;
    let mh = sha256(&mbytes);
    if a.manifest_sha256 != mh {
        return Err(not(format!(
            "{APPROVAL} approves manifest sha256 {} but {MANIFEST} has sha256 {mh}: the approval belongs to another release or the release changed after approval",
            a.manifest_sha256
        )));
    }

    let mut names: Vec<String> = m.files.iter().map(|f| f.name.clone()).collect();
    names.push(MANIFEST.into());
    names.push(APPROVAL.into());
    let bytes = atomically(to, |tmp| {
        let mut total = 0u64;
        for f in &m.files {
            let b = std::fs::read(rel.join(&f.name)).map_err(io(&rel.join(&f.name)))?;
            // Re-hash what is copied, so a change between the check and the copy is caught.
            if sha256(&b) != f.sha256 {
                return Err(not(format!("{} changed during export", f.name)));
            }
            std::fs::write(tmp.join(&f.name), &b).map_err(io(&tmp.join(&f.name)))?;
            total += b.len() as u64;
        }
        std::fs::write(tmp.join(MANIFEST), &mbytes).map_err(io(&tmp.join(MANIFEST)))?;
        std::fs::write(tmp.join(APPROVAL), &abytes).map_err(io(&tmp.join(APPROVAL)))?;
        Ok(total + mbytes.len() as u64 + abytes.len() as u64)
    })?;
    Ok(ExportReport {
        from: rel.to_path_buf(),
        to: to.to_path_buf(),
        files: names,
        bytes,
        manifest_sha256: mh,
        reviewer: a.reviewer,
        approved_at: a.time_utc,
    })
}
