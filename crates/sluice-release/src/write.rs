//! The release writer: checked tables to Parquet files and a manifest, in a temporary sibling
//! folder renamed into place only when complete, so an interrupted run never leaves a folder that
//! looks like a release.
//!
//! Output is deterministic (fixed `created_by`, no timestamps, metadata in a fixed order), so the
//! same inputs give a byte-identical release and the reviewer can re-make and compare one.

use arrow::array::{ArrayRef, Float64Array, Int32Array, Int64Array, StringArray};
use arrow::datatypes::{DataType, Field, Schema};
use arrow::record_batch::RecordBatch;
use parquet::arrow::ArrowWriter;
use parquet::basic::{Compression, ZstdLevel};
use parquet::file::metadata::KeyValue;
use parquet::file::properties::WriterProperties;
use serde_json::json;
use sluice_aggregate::{Provenance, Role, Value};
use sluice_disclose::{CheckedTable, PATIENTS, Rules};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use crate::manifest::{
    APPROVAL, FileEntry, FileKind, MANIFEST, META_PREFIX, ReleaseManifest, RulesRecord,
    SCHEMA_VERSION,
};
use crate::{ReleaseError, io, sha256};

/// Written as every Parquet file's `created_by`; fixed so releases are reproducible.
pub(crate) const WRITER: &str = concat!("sluice-release ", env!("CARGO_PKG_VERSION"));

/// The disclosure column: each row's [`sluice_disclose::Status`] label.
pub(crate) const DISCLOSURE: &str = "disclosure";

/// The Arrow type a released column is written as. Counts are the only 64-bit integers; integer
/// dimensions (years, bin edges) are 32-bit so the checker can tell them from counts.
fn arrow_type(t: &CheckedTable, c: usize) -> Result<DataType, ReleaseError> {
    let column = &t.columns()[c];
    let err = |message: String| ReleaseError::Table {
        table: t.name().into(),
        message: format!("column {}: {message}", column.name),
    };
    match column.role {
        Role::Patients | Role::Count => return Ok(DataType::Int64),
        Role::Statistic | Role::PersonTime | Role::Quantile { .. } | Role::Magnitude { .. } => {
            return Ok(DataType::Float64);
        }
        Role::Contributions | Role::Support => {
            return Err(err("contributions and support are never released".into()));
        }
        Role::Dimension => {}
    }
    let (mut text, mut int, mut float) = (false, false, false);
    for row in t.rows() {
        match &row[c] {
            Value::Null => {}
            Value::Text(_) => text = true,
            Value::Int(i) if i32::try_from(*i).is_ok() => int = true,
            Value::Int(i) => return Err(err(format!("dimension value {i} does not fit 32 bits"))),
            Value::Float(_) => float = true,
            Value::List(_) => return Err(err("a list is not a dimension value".into())),
        }
    }
    match (text, int || float) {
        (true, true) => Err(err("dimension mixes text and numbers".into())),
        (_, false) => Ok(DataType::Utf8),
        (false, true) if float => Ok(DataType::Float64),
        (false, true) => Ok(DataType::Int32),
    }
}

fn array(t: &CheckedTable, c: usize, ty: &DataType) -> Result<ArrayRef, ReleaseError> {
    let name = &t.columns()[c].name;
    let err = |r: usize, v: &Value| ReleaseError::Table {
        table: t.name().into(),
        message: format!("row {r}, column {name}: {v:?} does not fit {ty}"),
    };
    let vals = t.rows().iter().map(|row| &row[c]).enumerate();
    Ok(match ty {
        DataType::Int64 => {
            let mut v = Vec::new();
            for (r, x) in vals {
                v.push(match x {
                    Value::Null => None,
                    Value::Int(i) => Some(*i),
                    _ => return Err(err(r, x)),
                });
            }
            Arc::new(Int64Array::from(v))
        }
        DataType::Int32 => {
            let mut v = Vec::new();
            for (r, x) in vals {
                v.push(match x {
                    Value::Null => None,
                    Value::Int(i) => Some(i32::try_from(*i).map_err(|_| err(r, x))?),
                    _ => return Err(err(r, x)),
                });
            }
            Arc::new(Int32Array::from(v))
        }
        DataType::Float64 => {
            let mut v = Vec::new();
            for (r, x) in vals {
                v.push(match x {
                    Value::Null => None,
                    Value::Int(i) => Some(*i as f64),
                    Value::Float(f) if f.is_finite() => Some(*f),
                    _ => return Err(err(r, x)),
                });
            }
            Arc::new(Float64Array::from(v))
        }
        _ => {
            let mut v = Vec::new();
            for (r, x) in vals {
                v.push(match x {
                    Value::Null => None,
                    Value::Text(s) => Some(s.as_str()),
                    _ => return Err(err(r, x)),
                });
            }
            Arc::new(StringArray::from(v))
        }
    })
}

fn provenance_json(p: &Provenance) -> serde_json::Value {
    json!({
        "key_fingerprint": p.key_fingerprint,
        "store_manifest_sha256": p.store_manifest_sha256,
        "store_generation": p.store_generation,
        "tool_version": p.tool_version,
        "inputs": p.inputs,
    })
}

/// One table as Parquet bytes.
fn parquet_bytes(
    t: &CheckedTable,
    provenance: &Provenance,
    rules: &Rules,
    path: &Path,
) -> Result<Vec<u8>, ReleaseError> {
    let patients: Vec<usize> = (0..t.columns().len())
        .filter(|&c| t.columns()[c].role == Role::Patients)
        .collect();
    if patients.len() != 1 || t.columns()[patients[0]].name != PATIENTS {
        return Err(ReleaseError::Table {
            table: t.name().into(),
            message: format!("needs exactly one patients column, named {PATIENTS}"),
        });
    }
    let mut fields = Vec::new();
    let mut arrays = Vec::new();
    for (c, column) in t.columns().iter().enumerate() {
        if column.name == DISCLOSURE {
            return Err(ReleaseError::Table {
                table: t.name().into(),
                message: format!("the column name {DISCLOSURE} is reserved"),
            });
        }
        let ty = arrow_type(t, c)?;
        arrays.push(array(t, c, &ty)?);
        fields.push(Field::new(&column.name, ty, true));
    }
    fields.push(Field::new(DISCLOSURE, DataType::Utf8, false));
    let labels: Vec<String> = t.status().iter().map(|s| s.label()).collect();
    arrays.push(Arc::new(StringArray::from(labels)));
    let schema = Arc::new(Schema::new(fields));
    let pq = |e: &dyn std::fmt::Display| ReleaseError::Parquet {
        path: path.to_path_buf(),
        message: e.to_string(),
    };
    let batch = RecordBatch::try_new(schema.clone(), arrays).map_err(|e| pq(&e))?;

    let meta = [
        ("study", provenance.study.clone()),
        ("study_title", provenance.study_title.clone()),
        ("site", provenance.site.clone()),
        ("table", t.name().to_string()),
        ("title", t.title().to_string()),
        ("description", t.description().to_string()),
        ("columns", to_json(t.columns())),
        ("constraints", to_json(t.constraints())),
        ("rules_sha256", rules.sha256().to_string()),
        ("provenance", provenance_json(provenance).to_string()),
    ];
    let kv = meta
        .into_iter()
        .map(|(k, v)| KeyValue::new(format!("{META_PREFIX}{k}"), v))
        .collect();
    let props = WriterProperties::builder()
        .set_created_by(WRITER.into())
        .set_compression(Compression::ZSTD(ZstdLevel::default()))
        .set_key_value_metadata(Some(kv))
        .build();
    let mut buf = Vec::new();
    let mut w = ArrowWriter::try_new(&mut buf, schema, Some(props)).map_err(|e| pq(&e))?;
    w.write(&batch).map_err(|e| pq(&e))?;
    w.close().map_err(|e| pq(&e))?;
    Ok(buf)
}

fn to_json<T: serde::Serialize + ?Sized>(v: &T) -> String {
    serde_json::to_string(v).expect("metadata serializes")
}

fn write_file(path: &Path, bytes: &[u8]) -> Result<(), ReleaseError> {
    let mut f = std::fs::File::create(path).map_err(io(path))?;
    f.write_all(bytes).map_err(io(path))?;
    f.sync_all().map_err(io(path))
}

/// A file name inside a release: one plain path component.
pub(crate) fn plain_name(name: &str) -> Result<(), String> {
    if name.is_empty()
        || name.starts_with('.')
        || name.contains(['/', '\\', '\0'])
        || name == MANIFEST
        || name == APPROVAL
    {
        return Err(
            "must be a plain file name, not hidden, not manifest.json or approval.json".into(),
        );
    }
    Ok(())
}

/// `<out>` must be absent or an empty folder: a release is never overwritten.
pub(crate) fn destination_free(out: &Path) -> Result<(), ReleaseError> {
    match std::fs::read_dir(out) {
        Ok(mut entries) => {
            if entries.next().is_some() {
                Err(ReleaseError::Exists {
                    path: out.to_path_buf(),
                })
            } else {
                Ok(())
            }
        }
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(()),
        Err(_) if out.exists() => Err(ReleaseError::Exists {
            path: out.to_path_buf(),
        }),
        Err(e) => Err(io(out)(e)),
    }
}

/// The sibling folder a release or export is assembled in: `<out>.partial-<pid>`.
pub(crate) fn partial_dir(out: &Path) -> Result<PathBuf, ReleaseError> {
    let name = out.file_name().ok_or_else(|| ReleaseError::Name {
        name: out.display().to_string(),
        message: "a release folder needs a name".into(),
    })?;
    let mut n = name.to_os_string();
    n.push(format!(".partial-{}", std::process::id()));
    Ok(out.with_file_name(n))
}

/// Assembles a folder with `fill`, then renames it to `out`; on any error the partial folder is
/// removed and `out` is untouched.
pub(crate) fn atomically<T>(
    out: &Path,
    fill: impl FnOnce(&Path) -> Result<T, ReleaseError>,
) -> Result<T, ReleaseError> {
    destination_free(out)?;
    if let Some(parent) = out.parent().filter(|p| !p.as_os_str().is_empty()) {
        std::fs::create_dir_all(parent).map_err(io(parent))?;
    }
    let tmp = partial_dir(out)?;
    if tmp.exists() {
        // Left by an earlier run of this same process id, which cannot still be running.
        std::fs::remove_dir_all(&tmp).map_err(io(&tmp))?;
    }
    std::fs::create_dir(&tmp).map_err(io(&tmp))?;
    let done = fill(&tmp).and_then(|v| {
        std::fs::File::open(&tmp)
            .and_then(|d| d.sync_all())
            .map_err(io(&tmp))?;
        if out.exists() {
            std::fs::remove_dir(out).map_err(io(out))?;
        }
        std::fs::rename(&tmp, out).map_err(io(out))?;
        Ok(v)
    });
    if done.is_err() {
        let _ = std::fs::remove_dir_all(&tmp);
    }
    done
}

/// Writes a release of `tables` to the folder `out` (absent or empty). `rules` must be the rules
/// every table was controlled by; `extra_files` (e.g. `report.html`) are written and hashed too.
pub fn write_release(
    out: &Path,
    provenance: &Provenance,
    rules: &Rules,
    tables: &[CheckedTable],
    extra_files: &[(String, Vec<u8>)],
) -> Result<ReleaseManifest, ReleaseError> {
    let mut names = std::collections::BTreeSet::new();
    for t in tables {
        if t.rules_sha256() != rules.sha256() {
            return Err(ReleaseError::RulesMismatch {
                table: t.name().into(),
                table_sha256: t.rules_sha256().into(),
                rules_path: rules.path().display().to_string(),
                rules_sha256: rules.sha256().into(),
            });
        }
        let name = format!("{}.parquet", t.name());
        plain_name(&name).map_err(|message| ReleaseError::Name {
            name: name.clone(),
            message,
        })?;
        if !names.insert(name.clone()) {
            return Err(ReleaseError::Name {
                name,
                message: "two tables have this name".into(),
            });
        }
    }
    for (name, _) in extra_files {
        plain_name(name).map_err(|message| ReleaseError::Name {
            name: name.clone(),
            message,
        })?;
        if name.ends_with(".parquet") {
            // Every Parquet file in a release is a table the checker reads.
            return Err(ReleaseError::Name {
                name: name.clone(),
                message: "extra files may not be parquet files".into(),
            });
        }
        if !names.insert(name.clone()) {
            return Err(ReleaseError::Name {
                name: name.clone(),
                message: "two files have this name".into(),
            });
        }
    }

    atomically(out, |tmp| {
        let mut files = Vec::new();
        for t in tables {
            let name = format!("{}.parquet", t.name());
            let path = tmp.join(&name);
            let bytes = parquet_bytes(t, provenance, rules, &path)?;
            write_file(&path, &bytes)?;
            files.push(FileEntry {
                name,
                kind: FileKind::Table,
                sha256: sha256(&bytes),
                bytes: bytes.len() as u64,
                rows: Some(t.rows().len() as u64),
                withheld: Some(t.withheld() as u64),
            });
        }
        for (name, bytes) in extra_files {
            write_file(&tmp.join(name), bytes)?;
            files.push(FileEntry {
                name: name.clone(),
                kind: FileKind::Extra,
                sha256: sha256(bytes),
                bytes: bytes.len() as u64,
                rows: None,
                withheld: None,
            });
        }
        let manifest = ReleaseManifest {
            schema_version: SCHEMA_VERSION,
            tool_version: provenance.tool_version.clone(),
            writer: WRITER.into(),
            site: provenance.site.clone(),
            study: provenance.study.clone(),
            study_title: provenance.study_title.clone(),
            key_fingerprint: provenance.key_fingerprint.clone(),
            store_manifest_sha256: provenance.store_manifest_sha256.clone(),
            store_generation: provenance.store_generation,
            inputs: provenance.inputs.clone(),
            disclosure_rules: RulesRecord {
                path: rules.path().display().to_string(),
                sha256: rules.sha256().into(),
                content: rules.text().into(),
            },
            made_by: provenance.made_by.clone(),
            files,
        };
        // The manifest goes last: a folder with a manifest has every file it lists.
        write_file(&tmp.join(MANIFEST), &manifest.to_bytes())?;
        Ok(manifest)
    })
}
