//! Approval and export: the IG officer's decision, bound to the exact release it was made on,
//! and the copy out of the secure area that only an approved, unchanged, passing release gets.
//!
//! `approval.json` records the SHA-256 of the `manifest.json` bytes and of the site floor the
//! release was checked against, signed with the reviewer's Ed25519 key (RFC 8032). The manifest
//! lists every file's SHA-256, so any later change to any file either fails the check (the file
//! no longer matches the manifest) or changes the manifest's hash (the approval no longer matches
//! it); an approval copied from another release names that release's manifest; a hand-written or
//! edited approval does not verify; an approval by a key the site has not registered, by the
//! release's own maker where the site requires two people, or against another floor is refused.
//! Every decision is appended to `<release>.decisions.jsonl` beside the release, inside the
//! secure area, and a rejection there is final.

use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

use crate::check::{CheckPolicy, check};
use crate::manifest::{APPROVAL, MANIFEST, ReleaseManifest};
use crate::sign::ReviewerKey;
use crate::write::atomically;
use crate::{ReleaseError, io, sha256};

#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Decision {
    Approved,
    Rejected,
}

/// The signed part of an approval, in the order it is serialised and signed.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Decided {
    pub schema_version: u32,
    /// SHA-256 of the `manifest.json` bytes this decision is about.
    pub manifest_sha256: String,
    /// SHA-256 and text of the site floor the release was checked against.
    pub floor_sha256: String,
    pub reviewer: String,
    /// The reviewer's Ed25519 public key (hex), registered in `reviewers.toml`.
    pub public_key: String,
    pub decision: Decision,
    pub note: String,
    /// UTC, RFC 3339 to the second.
    pub time_utc: String,
}

/// `approval.json`: a decision and the reviewer's signature over its JSON bytes.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ApprovalRecord {
    pub decided: Decided,
    /// Ed25519 signature (hex) of `serde_json::to_vec(&decided)`.
    pub signature: String,
}

impl std::ops::Deref for ApprovalRecord {
    type Target = Decided;
    fn deref(&self) -> &Decided {
        &self.decided
    }
}

/// The decisions log beside a release (`<release>.decisions.jsonl`), inside the secure area:
/// every decision ever made on it, appended, so a rejection stays on record.
pub fn decisions_log(rel: &Path) -> PathBuf {
    let name = rel
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "release".into());
    rel.with_file_name(format!("{name}.decisions.jsonl"))
}

fn logged(rel: &Path) -> Vec<ApprovalRecord> {
    std::fs::read_to_string(decisions_log(rel))
        .map(|t| {
            t.lines()
                .filter_map(|l| serde_json::from_str(l).ok())
                .collect()
        })
        .unwrap_or_default()
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

/// Verifies an approval against the release and the site: its signature, a registered reviewer,
/// the manifest it names, the site's floor, separation of duties and the decisions log.
pub fn verify_approval(rel: &Path, policy: &CheckPolicy) -> Result<ApprovalRecord, ReleaseError> {
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
        .map_err(|e| not(format!("{APPROVAL} is not a signed approval record: {e}")))?;
    let signed = serde_json::to_vec(&a.decided).expect("decision serializes");
    crate::sign::verify(&a.public_key, &signed, &a.signature).map_err(|e| {
        not(format!(
            "{APPROVAL}: {e}: it was not signed by the key it names, or was edited"
        ))
    })?;
    let registry = policy
        .reviewers
        .as_ref()
        .ok_or_else(|| not("the site has no reviewers.toml: no approval can be verified".into()))?;
    if !registry.is_registered(&a.reviewer, &a.public_key) {
        return Err(not(format!(
            "{APPROVAL} is signed by {:?} with key {}, which is not registered in {}",
            a.reviewer,
            a.public_key,
            registry.path.display()
        )));
    }
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
    if a.floor_sha256 != policy.floor_sha256 {
        return Err(not(format!(
            "approved against the floor with sha256 {} but the site's floor {} has sha256 {}: the release was checked against another floor",
            a.floor_sha256,
            policy.floor.path.display(),
            policy.floor_sha256
        )));
    }
    if registry.two_person && !m.made_by.is_empty() && m.made_by == a.reviewer {
        return Err(not(format!(
            "{} made the release and approved it; this site requires two people",
            a.reviewer
        )));
    }
    if logged(rel)
        .iter()
        .any(|d| d.manifest_sha256 == mh && d.decision == Decision::Rejected)
    {
        return Err(not(format!(
            "{} records a rejection of this release",
            decisions_log(rel).display()
        )));
    }
    Ok(a)
}

/// Records the reviewer's signed decision in `<rel>/approval.json` and appends it to the
/// decisions log. Refused: an approval of a release that fails [`check`]; by a key not
/// registered under the reviewer's name; by the release's maker where the site requires two
/// people; and any decision on a release already rejected (a rejection cannot be overwritten).
pub fn approve(
    rel: &Path,
    key: &ReviewerKey,
    decision: Decision,
    note: &str,
    policy: &CheckPolicy,
) -> Result<ApprovalRecord, ReleaseError> {
    let not = |message: String| ReleaseError::NotApproved {
        path: rel.to_path_buf(),
        message,
    };
    let registry = policy
        .reviewers
        .as_ref()
        .ok_or_else(|| not("the site has no reviewers.toml: register the reviewer first".into()))?;
    if !registry.is_registered(key.name(), &key.public_hex()) {
        return Err(not(format!(
            "reviewer {:?} with public key {} is not registered in {}",
            key.name(),
            key.public_hex(),
            registry.path.display()
        )));
    }
    let (bytes, m) = read_manifest(rel)?;
    let mh = sha256(&bytes);
    if registry.two_person && !m.made_by.is_empty() && m.made_by == key.name() {
        return Err(not(format!(
            "{} made this release; this site requires another person to decide on it",
            key.name()
        )));
    }
    if let Some(r) = logged(rel)
        .iter()
        .find(|d| d.manifest_sha256 == mh && d.decision == Decision::Rejected)
    {
        return Err(not(format!(
            "{} rejected this release at {} ({}); a rejection is final: make a new release",
            r.reviewer, r.time_utc, r.note
        )));
    }
    if decision == Decision::Approved {
        let v = check(rel, policy);
        if !v.passed() {
            return Err(ReleaseError::CheckFailed {
                path: rel.to_path_buf(),
                verdict: v.to_string(),
            });
        }
    }
    let decided = Decided {
        schema_version: crate::SCHEMA_VERSION,
        manifest_sha256: mh,
        floor_sha256: policy.floor_sha256.clone(),
        reviewer: key.name().into(),
        public_key: key.public_hex(),
        decision,
        note: note.into(),
        time_utc: chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Secs, true),
    };
    let signature = key.sign(&serde_json::to_vec(&decided).expect("decision serializes"));
    let record = ApprovalRecord { decided, signature };
    let log = decisions_log(rel);
    let mut line = serde_json::to_vec(&record).expect("approval serializes");
    line.push(b'\n');
    {
        use std::io::Write;
        let mut f = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(&log)
            .map_err(io(&log))?;
        f.write_all(&line).map_err(io(&log))?;
    }
    let path = rel.join(APPROVAL);
    let tmp = rel.join(format!("{APPROVAL}.tmp"));
    let mut out = serde_json::to_vec_pretty(&record).expect("approval serializes");
    out.push(b'\n');
    std::fs::write(&tmp, out).map_err(io(&tmp))?;
    std::fs::rename(&tmp, &path).map_err(io(&path))?;
    Ok(record)
}

/// Whether `to` (which need not exist yet) lies inside `dir`.
fn inside(to: &Path, dir: &Path) -> bool {
    let dir = std::fs::canonicalize(dir).unwrap_or_else(|_| dir.to_path_buf());
    let mut p = to.to_path_buf();
    loop {
        if let Ok(c) = std::fs::canonicalize(&p) {
            let rest = to.strip_prefix(&p).unwrap_or(Path::new(""));
            return c.join(rest).starts_with(&dir);
        }
        if !p.pop() {
            return false;
        }
    }
}

/// Copies the release `rel` to the folder `to` (absent or empty, outside the release), written
/// atomically, only if it passes [`check`] and carries a verified approval of exactly its
/// current manifest ([`verify_approval`]).
pub fn export(rel: &Path, to: &Path, policy: &CheckPolicy) -> Result<ExportReport, ReleaseError> {
    let not = |message: String| ReleaseError::NotApproved {
        path: rel.to_path_buf(),
        message,
    };
    if inside(to, rel) {
        return Err(not(format!(
            "the destination {} is inside the release: a copy there would change what was approved",
            to.display()
        )));
    }
    let v = check(rel, policy);
    if !v.passed() {
        return Err(ReleaseError::CheckFailed {
            path: rel.to_path_buf(),
            verdict: v.to_string(),
        });
    }
    let a = verify_approval(rel, policy)?;
    let abytes = std::fs::read(rel.join(APPROVAL)).map_err(io(&rel.join(APPROVAL)))?;
    let (mbytes, m) = read_manifest(rel)?;
    let mh = sha256(&mbytes);

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
        reviewer: a.reviewer.clone(),
        approved_at: a.time_utc.clone(),
    })
}
