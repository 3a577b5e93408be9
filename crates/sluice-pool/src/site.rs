//! Loading and verifying one site release: schema version, check, approval, and its tables.

use sluice_aggregate::{Column, Constraint, Value, sha256_hex};
use sluice_release::{
    CheckPolicy, FileKind, MANIFEST, META_PREFIX, ReleaseManifest, SCHEMA_VERSION, check,
};
use std::path::{Path, PathBuf};

use crate::PoolError;

/// One released table as read back from Parquet.
#[derive(Clone, Debug)]
pub(crate) struct SiteTable {
    pub name: String,
    pub title: String,
    pub description: String,
    pub columns: Vec<Column>,
    pub rows: Vec<Vec<Value>>,
    /// The `disclosure` label of each row.
    pub status: Vec<String>,
    pub constraints: Vec<Constraint>,
}

impl SiteTable {
    pub fn column(&self, name: &str) -> Option<usize> {
        self.columns.iter().position(|c| c.name == name)
    }
    pub fn withheld(&self, r: usize) -> bool {
        self.status[r] == sluice_disclose::WITHHELD
    }
}

/// A verified site release.
#[derive(Clone, Debug)]
pub(crate) struct Site {
    pub label: String,
    pub path: PathBuf,
    pub manifest: ReleaseManifest,
    pub manifest_sha256: String,
    pub tables: Vec<SiteTable>,
}

impl Site {
    pub fn table(&self, name: &str) -> Option<&SiteTable> {
        self.tables.iter().find(|t| t.name == name)
    }
    /// SHA-256 of the study policy (the provenance input with role "study").
    pub fn study_policy_sha256(&self) -> Option<&str> {
        self.manifest
            .inputs
            .iter()
            .find(|i| i.role == "study")
            .map(|i| i.sha256.as_str())
    }
}

/// Reads the release at `rel`: refuses a newer (or other) schema version, a release that fails
/// [`check`], and one without an approval of exactly its current manifest.
pub(crate) fn load(rel: &Path, policy: &CheckPolicy) -> Result<Site, PoolError> {
    let mpath = rel.join(MANIFEST);
    let bytes = std::fs::read(&mpath).map_err(|source| PoolError::Io {
        path: mpath.clone(),
        source,
    })?;
    let head: serde_json::Value =
        serde_json::from_slice(&bytes).map_err(|e| PoolError::Refused {
            site: "?".into(),
            path: rel.to_path_buf(),
            message: format!("{MANIFEST} is not JSON: {e}"),
        })?;
    let label = head
        .get("site")
        .and_then(|s| s.as_str())
        .unwrap_or("?")
        .to_string();
    let refuse = |message: String| PoolError::Refused {
        site: label.clone(),
        path: rel.to_path_buf(),
        message,
    };
    let version = head.get("schema_version").and_then(|v| v.as_u64());
    match version {
        Some(v) if v == u64::from(SCHEMA_VERSION) => {}
        Some(v) if v > u64::from(SCHEMA_VERSION) => {
            return Err(PoolError::NewerSchema {
                site: label,
                path: rel.to_path_buf(),
                found: v,
                supported: SCHEMA_VERSION,
            });
        }
        other => {
            return Err(refuse(format!(
                "release schema version {other:?} is not the version {SCHEMA_VERSION} this sluice pools"
            )));
        }
    }
    let manifest: ReleaseManifest = serde_json::from_slice(&bytes)
        .map_err(|e| refuse(format!("{MANIFEST} is not a release manifest: {e}")))?;

    let verdict = check(rel, policy);
    if !verdict.passed() {
        return Err(refuse(format!("the release fails check; {verdict}")));
    }

    let manifest_sha256 = sha256_hex(&bytes);
    // The same verification export applies: a signature by a registered reviewer over exactly
    // this manifest, against the site's floor.
    sluice_release::verify_approval(rel, policy)
        .map_err(|e| refuse(format!("not approved: {e}")))?;

    let mut tables = Vec::new();
    for f in manifest.files.iter().filter(|f| f.kind == FileKind::Table) {
        let path = rel.join(&f.name);
        tables.push(read_table(&path).map_err(|message| refuse(format!("{}: {message}", f.name)))?);
    }
    Ok(Site {
        label: manifest.site.clone(),
        path: rel.to_path_buf(),
        manifest,
        manifest_sha256,
        tables,
    })
}

/// Reads one released table (arrow record batches) with its `sluice.*` metadata.
pub(crate) fn read_table(path: &Path) -> Result<SiteTable, String> {
    let (kv, schema, cols) = sluice_release::read_released_table(path)?;
    let meta = |k: &str| {
        kv.get(&format!("{META_PREFIX}{k}"))
            .cloned()
            .ok_or_else(|| format!("no {META_PREFIX}{k} metadata"))
    };
    let columns: Vec<Column> =
        serde_json::from_str(&meta("columns")?).map_err(|e| format!("columns metadata: {e}"))?;
    let constraints: Vec<Constraint> = serde_json::from_str(&meta("constraints")?)
        .map_err(|e| format!("constraints metadata: {e}"))?;
    let width = schema.fields().len();
    if width != columns.len() + 1 {
        return Err(format!(
            "{width} columns but the metadata records {} and the disclosure column",
            columns.len()
        ));
    }
    let n = cols[width - 1].len();
    let status = cols[width - 1]
        .iter()
        .map(|v| v.as_text().unwrap_or("").to_string())
        .collect();
    let rows = (0..n)
        .map(|r| (0..columns.len()).map(|c| cols[c][r].clone()).collect())
        .collect();
    Ok(SiteTable {
        name: meta("table")?,
        title: meta("title")?,
        description: meta("description").unwrap_or_default(),
        columns,
        rows,
        status,
        constraints,
    })
}
