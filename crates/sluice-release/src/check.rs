//! The independent check the IG officer runs on a release folder before approving it.
//!
//! It reads only the folder (the manifest and the Parquet files, through arrow-rs, not the
//! polars code that computed the tables) and trusts nothing the writer claims: it re-hashes every
//! file, refuses files the manifest does not list, re-reads the disclosure rules recorded in the
//! manifest and holds them to the site floor, and re-applies those rules to every released value:
//! counts, statistics, quantiles, withheld rows and secondary suppression over the recorded
//! constraints. Columns must be on the site's allow-list (`policies/disclosure/columns.toml`) and
//! pass generic bans (no day-level dates, no 64-bit integers but counts, no long free text).
//!
//! What it cannot check: dominance and the p%-rule (the contributions are never released), that
//! the recorded constraints are all the table's linear relations, and the content of extra files
//! (e.g. the HTML report), which it only hashes and lists for the reviewer.

use arrow::array::{Array, Float64Array, Int32Array, Int64Array, StringArray};
use arrow::datatypes::DataType;
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use serde::Deserialize;
use sluice_aggregate::{Column, Constraint, Role, Value};
use sluice_disclose::{Floor, PATIENTS, Rules, Status, unsafe_constraints};
use std::collections::{BTreeMap, BTreeSet};
use std::fmt;
use std::path::{Path, PathBuf};

use crate::manifest::{APPROVAL, FileKind, MANIFEST, META_PREFIX, ReleaseManifest, SCHEMA_VERSION};
use crate::write::{DISCLOSURE, plain_name};
use crate::{ReleaseError, sha256};

/// Parquet column types a release may use.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ColumnType {
    Utf8,
    Int32,
    Int64,
    Float64,
}

impl ColumnType {
    fn of(t: &DataType) -> Option<ColumnType> {
        match t {
            DataType::Utf8 => Some(ColumnType::Utf8),
            DataType::Int32 => Some(ColumnType::Int32),
            DataType::Int64 => Some(ColumnType::Int64),
            DataType::Float64 => Some(ColumnType::Float64),
            _ => None,
        }
    }
}

#[derive(Clone, Debug, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AllowedColumn {
    #[serde(rename = "type")]
    pub column_type: ColumnType,
    /// Roles the column may have: dimension, patients, count, statistic, quantile, magnitude.
    pub roles: Vec<String>,
    /// A dimension whose `all` rows are totals of the other values' rows: check rebuilds these
    /// margins from the values themselves rather than trusting the constraints a file records.
    #[serde(default)]
    pub margin: bool,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct AllowToml {
    max_text_chars: usize,
    columns: BTreeMap<String, AllowedColumn>,
}

/// The aggregate columns a release may contain (`policies/disclosure/columns.toml`).
#[derive(Clone, Debug, PartialEq)]
pub struct AllowList {
    pub max_text_chars: usize,
    pub columns: BTreeMap<String, AllowedColumn>,
    pub path: PathBuf,
}

const ROLES: [&str; 7] = [
    "dimension",
    "patients",
    "count",
    "person_time",
    "statistic",
    "quantile",
    "magnitude",
];

impl AllowList {
    pub fn load(path: &Path) -> Result<AllowList, ReleaseError> {
        let text = std::fs::read_to_string(path).map_err(crate::io(path))?;
        AllowList::parse(&text, path)
    }

    pub fn parse(text: &str, path: &Path) -> Result<AllowList, ReleaseError> {
        let t: AllowToml = toml::from_str(text).map_err(|e| ReleaseError::Format {
            path: path.to_path_buf(),
            message: e.to_string().trim().replace('\n', " "),
        })?;
        for (name, c) in &t.columns {
            if let Some(r) = c.roles.iter().find(|r| !ROLES.contains(&r.as_str())) {
                return Err(ReleaseError::Format {
                    path: path.to_path_buf(),
                    message: format!("columns.{name}.roles: unknown role {r:?}"),
                });
            }
        }
        Ok(AllowList {
            max_text_chars: t.max_text_chars,
            columns: t.columns,
            path: path.to_path_buf(),
        })
    }
}

/// What a check holds a release to: the site floor, the column allow-list and (for approval,
/// export and pooling) the site's register of reviewers.
#[derive(Clone, Debug, PartialEq)]
pub struct CheckPolicy {
    pub floor: Floor,
    /// SHA-256 of the floor file's bytes: what a signed approval records and export compares.
    pub floor_sha256: String,
    pub columns: AllowList,
    /// `reviewers.toml` beside the floor, where the site has one.
    pub reviewers: Option<crate::sign::Registry>,
}

impl CheckPolicy {
    pub fn load(floor: &Path, columns: &Path) -> Result<CheckPolicy, ReleaseError> {
        let bytes = std::fs::read(floor).map_err(crate::io(floor))?;
        let reviewers = floor.with_file_name("reviewers.toml");
        Ok(CheckPolicy {
            floor: Floor::load(floor)?,
            floor_sha256: sha256(&bytes),
            columns: AllowList::load(columns)?,
            reviewers: if reviewers.exists() {
                Some(crate::sign::Registry::load(&reviewers)?)
            } else {
                None
            },
        })
    }

    /// `floor.toml`, `columns.toml` and `reviewers.toml` from one folder (normally
    /// `policies/disclosure`).
    pub fn load_dir(dir: &Path) -> Result<CheckPolicy, ReleaseError> {
        CheckPolicy::load(&dir.join("floor.toml"), &dir.join("columns.toml"))
    }

    /// The same policy with another register of reviewers (the demo registers its own).
    pub fn with_reviewers(mut self, registry: crate::sign::Registry) -> CheckPolicy {
        self.reviewers = Some(registry);
        self
    }
}

/// One failure: the file, the row where there is one, the rule broken and what was found.
#[derive(Clone, Debug, PartialEq)]
pub struct Problem {
    pub file: String,
    pub row: Option<usize>,
    pub rule: String,
    pub message: String,
}

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.row {
            Some(r) => write!(
                f,
                "{}, row {}: {}: {}",
                self.file, r, self.rule, self.message
            ),
            None => write!(f, "{}: {}: {}", self.file, self.rule, self.message),
        }
    }
}

/// The result of [`check`]. A caller exits non-zero unless [`Verdict::passed`].
#[derive(Clone, Debug, PartialEq)]
pub struct Verdict {
    pub release: PathBuf,
    pub problems: Vec<Problem>,
    pub tables: usize,
    pub rows: usize,
    /// Extra files: hashed against the manifest, content for the reviewer to read.
    pub unchecked: Vec<String>,
}

impl Verdict {
    pub fn passed(&self) -> bool {
        self.problems.is_empty()
    }

    pub(crate) fn fail(&mut self, file: &str, row: Option<usize>, rule: &str, message: String) {
        self.problems.push(Problem {
            file: file.into(),
            row,
            rule: rule.into(),
            message,
        });
    }
}

impl fmt::Display for Verdict {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if self.passed() {
            write!(
                f,
                "PASS: {}: {} tables ({} rows) match the manifest, meet its disclosure rules and the site floor",
                self.release.display(),
                self.tables,
                self.rows
            )?;
            if !self.unchecked.is_empty() {
                write!(
                    f,
                    "; hashed but for the reviewer to read: {}",
                    self.unchecked.join(", ")
                )?;
            }
            Ok(())
        } else {
            write!(
                f,
                "FAIL: {} problems in {}",
                self.problems.len(),
                self.release.display()
            )?;
            for p in &self.problems {
                write!(f, "\n  {p}")?;
            }
            Ok(())
        }
    }
}

/// Checks the release folder `rel` against `policy`. Never fails itself: anything wrong,
/// including an unreadable folder, is a problem in the verdict.
pub fn check(rel: &Path, policy: &CheckPolicy) -> Verdict {
    let mut v = Verdict {
        release: rel.to_path_buf(),
        problems: Vec::new(),
        tables: 0,
        rows: 0,
        unchecked: Vec::new(),
    };
    let bytes = match std::fs::read(rel.join(MANIFEST)) {
        Ok(b) => b,
        Err(e) => {
            v.fail(
                MANIFEST,
                None,
                "manifest",
                format!("cannot read: {e}; not a release"),
            );
            return v;
        }
    };
    let m: ReleaseManifest = match serde_json::from_slice(&bytes) {
        Ok(m) => m,
        Err(e) => {
            v.fail(
                MANIFEST,
                None,
                "manifest",
                format!("not a release manifest: {e}"),
            );
            return v;
        }
    };
    if m.schema_version != SCHEMA_VERSION {
        v.fail(
            MANIFEST,
            None,
            "manifest",
            format!(
                "schema version {} but this check reads {SCHEMA_VERSION}",
                m.schema_version
            ),
        );
        return v;
    }
    for f in crate::scan::scan(&String::from_utf8_lossy(&bytes), false) {
        v.fail(
            MANIFEST,
            None,
            "identifier",
            format!("holds {} {:?}", f.kind, f.text),
        );
    }
    let rules = manifest_rules(&m, policy, &mut v);
    let listed = listed_files(rel, &m, &mut v);
    let mut seen = Vec::new();

    for entry in &m.files {
        if !listed.contains(&entry.name) {
            continue;
        }
        let path = rel.join(&entry.name);
        let bytes = match std::fs::read(&path) {
            Ok(b) => b,
            Err(e) => {
                v.fail(
                    &entry.name,
                    None,
                    "hash",
                    format!("listed in the manifest but cannot be read: {e}"),
                );
                continue;
            }
        };
        if bytes.len() as u64 != entry.bytes {
            v.fail(
                &entry.name,
                None,
                "hash",
                format!(
                    "{} bytes but the manifest records {}",
                    bytes.len(),
                    entry.bytes
                ),
            );
        }
        let h = sha256(&bytes);
        if h != entry.sha256 {
            v.fail(
                &entry.name,
                None,
                "hash",
                format!("sha256 {h} but the manifest records {}", entry.sha256),
            );
        }
        match entry.kind {
            FileKind::Extra if entry.name != REPORT => v.fail(
                &entry.name,
                None,
                "files",
                format!("a release holds its tables and {REPORT} only; an extra file is unverified content"),
            ),
            FileKind::Extra => {
                for f in crate::scan::scan(&String::from_utf8_lossy(&bytes), false) {
                    v.fail(
                        &entry.name,
                        None,
                        "identifier",
                        format!("holds {} {:?}", f.kind, f.text),
                    );
                }
                v.unchecked.push(entry.name.clone());
            }
            FileKind::Table => {
                if let Some(rules) = &rules
                    && let Some(t) = check_table(&path, entry, &m, rules, policy, &mut v)
                {
                    seen.push(t);
                }
            }
        }
    }
    if let Some(rules) = &rules {
        crate::attack::run(&seen, rules, &mut v);
    }
    v
}

/// The metadata keys (after the `sluice.` prefix) a released table carries.
const META_KEYS: [&str; 10] = [
    "study",
    "study_title",
    "site",
    "table",
    "title",
    "description",
    "columns",
    "constraints",
    "rules_sha256",
    "provenance",
];

/// The one extra file a release may hold besides its tables.
const REPORT: &str = "report.html";

/// A table as check read it, for the attacks that look across columns and tables.
pub(crate) struct Seen {
    /// File name without `.parquet`.
    pub name: String,
    pub columns: Vec<Column>,
    /// Values by column, then row.
    pub cols: Vec<Vec<Value>>,
    pub withheld: Vec<bool>,
}

impl Seen {
    pub fn col(&self, name: &str) -> Option<usize> {
        self.columns.iter().position(|c| c.name == name)
    }
    pub fn rows(&self) -> usize {
        self.withheld.len()
    }
    pub fn text(&self, r: usize, name: &str) -> Option<&str> {
        self.cols[self.col(name)?][r].as_text()
    }
    pub fn num(&self, r: usize, name: &str) -> Option<f64> {
        self.cols[self.col(name)?][r].as_f64()
    }
}

/// The margins a table's values imply: for each dimension the allow-list marks as a margin, the
/// rows whose value is `all` are totals of the rows that agree with them on every other
/// dimension (where there are at least two such parts).
fn rebuilt_margins(
    columns: &[Column],
    cols: &[Vec<Value>],
    policy: &CheckPolicy,
) -> Vec<Constraint> {
    let dims: Vec<usize> = (0..columns.len())
        .filter(|&c| columns[c].role == Role::Dimension)
        .collect();
    let n = cols.first().map_or(0, Vec::len);
    let mut out = Vec::new();
    for &d in &dims {
        let margin = policy
            .columns
            .columns
            .get(&columns[d].name)
            .is_some_and(|a| a.margin);
        if !margin {
            continue;
        }
        let key = |r: usize| -> String {
            dims.iter()
                .filter(|&&c| c != d)
                .map(|&c| format!("{:?}", cols[c][r]))
                .collect::<Vec<_>>()
                .join("\u{1f}")
        };
        let mut totals: BTreeMap<String, usize> = BTreeMap::new();
        let mut parts: BTreeMap<String, Vec<usize>> = BTreeMap::new();
        for (r, value) in cols[d].iter().enumerate().take(n) {
            if value.as_text() == Some(sluice_aggregate::ALL) {
                totals.insert(key(r), r);
            } else {
                parts.entry(key(r)).or_default().push(r);
            }
        }
        for (k, total) in totals {
            if let Some(p) = parts.remove(&k)
                && p.len() >= 2
            {
                out.push(Constraint { total, parts: p });
            }
        }
    }
    out
}

/// The probability a quantile column's name stands for: `median`, `qNN` / `pNN` (percent, with
/// `_` for a decimal point, e.g. `q2_5`).
pub(crate) fn quantile_of_name(name: &str) -> Option<f64> {
    if name == "median" {
        return Some(0.5);
    }
    let digits = name.strip_prefix('q').or_else(|| name.strip_prefix('p'))?;
    let pct: f64 = digits.replace('_', ".").parse().ok()?;
    (0.0..=100.0).contains(&pct).then_some(pct / 100.0)
}

/// A released count obeys the rules: at least the threshold and a multiple of the rounding base,
/// or 0 where zeros are shown. Check's own reading of the rules, not the release code's.
pub(crate) fn count_ok(k: i64, rules: &Rules) -> bool {
    if k == 0 {
        return rules.show_zeros();
    }
    let base = rules.rounding_base().max(1) as i64;
    k >= rules.threshold() as i64 && k % base == 0
}

/// x is a whole multiple of step (to a relative 1e-9).
pub(crate) fn is_multiple(x: f64, step: f64) -> bool {
    if step <= 0.0 {
        return true;
    }
    let k = x / step;
    (k - k.round()).abs() <= 1e-6_f64.max(1e-9 * k.abs())
}

/// The rules recorded in the manifest, if they are intact; held to the floor.
fn manifest_rules(m: &ReleaseManifest, policy: &CheckPolicy, v: &mut Verdict) -> Option<Rules> {
    let r = &m.disclosure_rules;
    let h = sha256(r.content.as_bytes());
    if h != r.sha256 {
        v.fail(
            MANIFEST,
            None,
            "rules",
            format!(
                "disclosure rules content has sha256 {h} but the manifest records {}",
                r.sha256
            ),
        );
    }
    let origin = PathBuf::from(format!("{MANIFEST} disclosure_rules ({})", r.path));
    match Rules::parse(&r.content, &origin) {
        Ok(rules) => {
            if let Err(e) = rules.check_floor(&policy.floor) {
                v.fail(MANIFEST, None, "floor", e.to_string());
            }
            Some(rules)
        }
        Err(e) => {
            v.fail(MANIFEST, None, "rules", e.to_string());
            None
        }
    }
}

/// The names both listed in the manifest and present; every other difference is a problem.
fn listed_files(rel: &Path, m: &ReleaseManifest, v: &mut Verdict) -> BTreeSet<String> {
    let mut listed = BTreeSet::new();
    for e in &m.files {
        if let Err(msg) = plain_name(&e.name) {
            v.fail(
                MANIFEST,
                None,
                "manifest",
                format!("file name {:?} {msg}", e.name),
            );
            continue;
        }
        let is_parquet = e.name.ends_with(".parquet");
        if is_parquet != (e.kind == FileKind::Table) {
            v.fail(
                MANIFEST,
                None,
                "manifest",
                format!(
                    "{} is listed as {:?}: tables and only tables are parquet files",
                    e.name, e.kind
                ),
            );
        }
        if e.kind == FileKind::Table && (e.rows.is_none() || e.withheld.is_none()) {
            v.fail(
                MANIFEST,
                None,
                "manifest",
                format!("table {} has no row counts", e.name),
            );
        }
        if !listed.insert(e.name.clone()) {
            v.fail(
                MANIFEST,
                None,
                "manifest",
                format!("{} is listed twice", e.name),
            );
        }
    }
    let mut present = BTreeSet::new();
    match std::fs::read_dir(rel) {
        Ok(entries) => {
            for entry in entries.flatten() {
                let name = entry.file_name().to_string_lossy().into_owned();
                if name == MANIFEST || name == APPROVAL {
                    continue;
                }
                if !entry.file_type().is_ok_and(|t| t.is_file()) {
                    v.fail(
                        &name,
                        None,
                        "files",
                        "is not a regular file; a release holds only files".into(),
                    );
                    continue;
                }
                if !listed.contains(&name) {
                    v.fail(
                        &name,
                        None,
                        "files",
                        "is not listed in the manifest (a file was added)".into(),
                    );
                }
                present.insert(name);
            }
        }
        Err(e) => v.fail(
            ".",
            None,
            "files",
            format!("cannot list the release folder: {e}"),
        ),
    }
    for name in &listed {
        if !present.contains(name) {
            v.fail(
                name,
                None,
                "files",
                "is listed in the manifest but missing (a file was removed)".into(),
            );
        }
    }
    listed.intersection(&present).cloned().collect()
}

fn role_name(r: &Role) -> &'static str {
    match r {
        Role::Dimension => "dimension",
        Role::Patients => "patients",
        Role::Count => "count",
        Role::PersonTime => "person_time",
        Role::Statistic => "statistic",
        Role::Quantile { .. } => "quantile",
        Role::Magnitude { .. } => "magnitude",
        Role::Contributions => "contributions",
        Role::Support => "support",
    }
}

/// The values of a released column (the four Parquet types a release uses), or `None` for any
/// other type. Shared with pooling, which reads site releases the same way.
pub fn array_values(a: &dyn Array) -> Option<Vec<Value>> {
    let n = a.len();
    let any = a.as_any();
    let get = |i: usize, f: &dyn Fn(usize) -> Value| if a.is_null(i) { Value::Null } else { f(i) };
    Some(match a.data_type() {
        DataType::Int64 => {
            let x = any.downcast_ref::<Int64Array>()?;
            (0..n)
                .map(|i| get(i, &|i| Value::Int(x.value(i))))
                .collect()
        }
        DataType::Int32 => {
            let x = any.downcast_ref::<Int32Array>()?;
            (0..n)
                .map(|i| get(i, &|i| Value::Int(x.value(i).into())))
                .collect()
        }
        DataType::Float64 => {
            let x = any.downcast_ref::<Float64Array>()?;
            (0..n)
                .map(|i| get(i, &|i| Value::Float(x.value(i))))
                .collect()
        }
        DataType::Utf8 => {
            let x = any.downcast_ref::<StringArray>()?;
            (0..n)
                .map(|i| get(i, &|i| Value::Text(x.value(i).into())))
                .collect()
        }
        _ => return None,
    })
}

/// A released Parquet file as read by arrow-rs: its key-value metadata, its schema and every
/// column's values. Used by `check` and by pooling, so both read releases one way.
pub type ReleasedTable = (
    BTreeMap<String, String>,
    arrow::datatypes::SchemaRef,
    Vec<Vec<Value>>,
);

pub fn read_released_table(path: &Path) -> Result<ReleasedTable, String> {
    let f = std::fs::File::open(path).map_err(|e| e.to_string())?;
    let b = ParquetRecordBatchReaderBuilder::try_new(f).map_err(|e| e.to_string())?;
    let kv: BTreeMap<String, String> = b
        .metadata()
        .file_metadata()
        .key_value_metadata()
        .map(|kv| {
            kv.iter()
                .filter_map(|k| Some((k.key.clone(), k.value.clone()?)))
                .collect()
        })
        .unwrap_or_default();
    let schema = b.schema().clone();
    let mut cols: Vec<Vec<Value>> = vec![Vec::new(); schema.fields().len()];
    for batch in b.build().map_err(|e| e.to_string())? {
        let batch = batch.map_err(|e| e.to_string())?;
        for (c, a) in batch.columns().iter().enumerate() {
            let vals = array_values(a.as_ref()).ok_or_else(|| {
                format!(
                    "column {} has type {}",
                    schema.field(c).name(),
                    a.data_type()
                )
            })?;
            cols[c].extend(vals);
        }
    }
    Ok((kv, schema, cols))
}

fn check_table(
    path: &Path,
    entry: &crate::manifest::FileEntry,
    m: &ReleaseManifest,
    rules: &Rules,
    policy: &CheckPolicy,
    v: &mut Verdict,
) -> Option<Seen> {
    let file = entry.name.as_str();
    let (kv, schema, cols) = match read_released_table(path) {
        Ok(x) => x,
        Err(e) => {
            v.fail(file, None, "parquet", format!("cannot read: {e}"));
            return None;
        }
    };
    v.tables += 1;
    for (k, value) in &kv {
        let known = k == "ARROW:schema"
            || k.strip_prefix(META_PREFIX)
                .is_some_and(|k| META_KEYS.contains(&k));
        if !known {
            v.fail(
                file,
                None,
                "metadata",
                format!("key {k:?} is not one a release carries; unverified content is refused"),
            );
            continue;
        }
        if k == "ARROW:schema" {
            continue;
        }
        for f in crate::scan::scan(value, true) {
            v.fail(
                file,
                None,
                if f.kind == "date" {
                    "date"
                } else {
                    "identifier"
                },
                format!("metadata {k} holds {} {:?}", f.kind, f.text),
            );
        }
    }
    let meta = |k: &str| kv.get(&format!("{META_PREFIX}{k}"));
    for (k, want) in [
        ("study", &m.study),
        ("site", &m.site),
        ("rules_sha256", &m.disclosure_rules.sha256),
    ] {
        if meta(k) != Some(want) {
            v.fail(
                file,
                None,
                "metadata",
                format!(
                    "{META_PREFIX}{k} is {:?} but the manifest records {want:?}",
                    meta(k)
                ),
            );
        }
    }
    let columns: Vec<Column> = match meta("columns").map(|s| serde_json::from_str(s)) {
        Some(Ok(c)) => c,
        other => {
            v.fail(
                file,
                None,
                "metadata",
                format!("{META_PREFIX}columns missing or invalid: {other:?}"),
            );
            return None;
        }
    };
    let mut constraints: Vec<Constraint> =
        match meta("constraints").map(|s| serde_json::from_str(s)) {
            Some(Ok(c)) => c,
            other => {
                v.fail(
                    file,
                    None,
                    "metadata",
                    format!("{META_PREFIX}constraints missing or invalid: {other:?}"),
                );
                return None;
            }
        };

    // Schema: the recorded columns in order, then the disclosure column.
    let names: Vec<&str> = schema.fields().iter().map(|f| f.name().as_str()).collect();
    let mut expected: Vec<&str> = columns.iter().map(|c| c.name.as_str()).collect();
    expected.push(DISCLOSURE);
    if names != expected {
        v.fail(
            file,
            None,
            "columns",
            format!("columns {names:?} but the metadata records {expected:?}"),
        );
        return None;
    }
    let patients: Vec<usize> = (0..columns.len())
        .filter(|&c| columns[c].role == Role::Patients)
        .collect();
    if patients.len() != 1 || columns[patients[0]].name != PATIENTS {
        v.fail(
            file,
            None,
            "columns",
            format!("needs exactly one patients column, named {PATIENTS}"),
        );
        return None;
    }
    let pc = patients[0];
    let dc = columns.len();
    let mut column_ok = true;
    for (c, col) in columns.iter().enumerate() {
        let field = schema.field(c);
        let ty = ColumnType::of(field.data_type());
        let role = role_name(&col.role);
        match policy.columns.columns.get(&col.name) {
            None => {
                v.fail(
                    file,
                    None,
                    "allow-list",
                    format!(
                        "column {} is not in {}",
                        col.name,
                        policy.columns.path.display()
                    ),
                );
                column_ok = false;
            }
            Some(a) => {
                if Some(a.column_type) != ty {
                    v.fail(
                        file,
                        None,
                        "allow-list",
                        format!(
                            "column {} has type {} but {} allows {:?}",
                            col.name,
                            field.data_type(),
                            policy.columns.path.display(),
                            a.column_type
                        ),
                    );
                    column_ok = false;
                }
                if !a.roles.iter().any(|r| r == role) {
                    v.fail(
                        file,
                        None,
                        "allow-list",
                        format!(
                            "column {} has role {role} but {} allows {:?}",
                            col.name,
                            policy.columns.path.display(),
                            a.roles
                        ),
                    );
                    column_ok = false;
                }
            }
        }
        if ty == Some(ColumnType::Int64) && !matches!(col.role, Role::Patients | Role::Count) {
            v.fail(
                file,
                None,
                "int64",
                format!("column {} is a 64-bit integer but not a count", col.name),
            );
            column_ok = false;
        }
        if matches!(col.role, Role::Contributions | Role::Support) {
            v.fail(
                file,
                None,
                "columns",
                format!(
                    "column {} has role {role}, which is never released",
                    col.name
                ),
            );
            column_ok = false;
        }
    }
    if !matches!(schema.field(dc).data_type(), DataType::Utf8) {
        v.fail(
            file,
            None,
            "columns",
            format!("column {DISCLOSURE} is not text"),
        );
        return None;
    }
    for (c, vals) in cols.iter().enumerate() {
        for (r, x) in vals.iter().enumerate() {
            if let Some(f) = x.as_f64().and_then(crate::scan::scan_number) {
                v.fail(
                    file,
                    Some(r),
                    "identifier",
                    format!(
                        "column {} value {} reads as an {}",
                        names[c], f.text, f.kind
                    ),
                );
            }
            if let Value::Text(s) = x {
                for f in crate::scan::scan(s, true) {
                    let (rule, what) = match f.kind {
                        "date" => ("date", "a date finer than a month".to_string()),
                        k => ("identifier", format!("an identifier ({k})")),
                    };
                    v.fail(
                        file,
                        Some(r),
                        rule,
                        format!("column {} value {s:?} holds {what}: {:?}", names[c], f.text),
                    );
                }
                if s.chars().count() > policy.columns.max_text_chars {
                    v.fail(
                        file,
                        Some(r),
                        "free-text",
                        format!(
                            "column {} value of {} characters is longer than {}",
                            names[c],
                            s.chars().count(),
                            policy.columns.max_text_chars
                        ),
                    );
                }
            }
        }
    }
    if !column_ok {
        return None;
    }

    let n = cols[dc].len();
    v.rows += n;
    if Some(n as u64) != entry.rows {
        v.fail(
            file,
            None,
            "manifest",
            format!("{n} rows but the manifest records {:?}", entry.rows),
        );
    }
    let mut withheld = vec![false; n];
    let t = rules.threshold();
    for r in 0..n {
        let status = match &cols[dc][r] {
            Value::Text(s) => Status::parse(s),
            _ => None,
        };
        let Some(status) = status else {
            v.fail(
                file,
                Some(r),
                "disclosure",
                format!("status {:?} is not a disclosure status", cols[dc][r]),
            );
            withheld[r] = true;
            continue;
        };
        if status.is_withheld() {
            withheld[r] = true;
            for (c, col) in columns.iter().enumerate() {
                if col.role != Role::Dimension && cols[c][r] != Value::Null {
                    v.fail(
                        file,
                        Some(r),
                        "withheld",
                        format!(
                            "{} row has {} = {:?}; withheld values must be null",
                            status.label(),
                            col.name,
                            cols[c][r]
                        ),
                    );
                }
            }
            continue;
        }
        let np = cols[pc][r].as_i64();
        if np.is_none() {
            v.fail(
                file,
                Some(r),
                "threshold",
                format!("released row without {PATIENTS}"),
            );
        }
        let enough = np.is_some_and(|p| p >= t as i64);
        for (c, col) in columns.iter().enumerate() {
            let x = &cols[c][r];
            if *x == Value::Null {
                continue;
            }
            if let Value::Float(f) = x
                && !f.is_finite()
            {
                v.fail(
                    file,
                    Some(r),
                    "value",
                    format!("{} = {f} is not a finite number", col.name),
                );
                continue;
            }
            match &col.role {
                Role::PersonTime => {
                    let y = x.as_f64().unwrap_or(-1.0);
                    let base = rules.person_time_base();
                    if y < 0.0 || !is_multiple(y, base) || !enough {
                        v.fail(
                            file,
                            Some(r),
                            "person-time",
                            format!(
                                "{} = {y} but released person-time is a non-negative multiple of {base} years, in a row with at least {t} patients",
                                col.name
                            ),
                        );
                    }
                }
                Role::Patients | Role::Count => match x.as_i64() {
                    Some(k) if count_ok(k, rules) => {}
                    _ => v.fail(
                        file,
                        Some(r),
                        if x.as_i64() == Some(0) { "zero" } else { "threshold" },
                        format!(
                            "{} = {x:?} but released counts must be {}at least {t} and a multiple of {}",
                            col.name,
                            if rules.show_zeros() { "0 or " } else { "" },
                            rules.rounding_base().max(1)
                        ),
                    ),
                },
                Role::Statistic | Role::Magnitude { .. } if !enough => v.fail(
                    file,
                    Some(r),
                    "threshold",
                    format!("{} is released with {PATIENTS} = {np:?}, below {t}", col.name),
                ),
                Role::Quantile { p, n: nc } => {
                    // The probability is the column's name (q25, p10, median), not what the
                    // file claims, and the observations are counted in a count column.
                    let named = quantile_of_name(&col.name);
                    if named.is_none_or(|q| (q - p).abs() > 1e-9) {
                        v.fail(
                            file,
                            Some(r),
                            "quantile",
                            format!(
                                "{} is recorded as the quantile at p = {p}, but its name says {named:?}",
                                col.name
                            ),
                        );
                        continue;
                    }
                    let counted = columns.iter().any(|c| {
                        c.name == *nc && matches!(c.role, Role::Patients | Role::Count)
                    });
                    if !counted {
                        v.fail(
                            file,
                            Some(r),
                            "quantile",
                            format!("{} counts its observations in {nc}, which is not a count column", col.name),
                        );
                        continue;
                    }
                    let obs = columns
                        .iter()
                        .position(|c| c.name == *nc)
                        .and_then(|i| cols[i][r].as_i64());
                    let q = rules.quantile_min_beyond() as f64;
                    let ok = enough
                        && (0.0..=1.0).contains(p)
                        && obs.is_some_and(|o| {
                            o >= 0 && (p.min(1.0 - p) * o as f64 + 1e-9).floor() >= q
                        });
                    if !ok {
                        v.fail(
                            file,
                            Some(r),
                            "quantile",
                            format!(
                                "{} (p = {p}) is released with {nc} = {obs:?} and {PATIENTS} = {np:?}; needs {} observations beyond it on each side",
                                col.name,
                                rules.quantile_min_beyond()
                            ),
                        );
                    }
                }
                _ => {}
            }
        }
    }
    crate::attack::sanity(file, &columns, &cols, v);
    let count = withheld.iter().filter(|&&w| w).count() as u64;
    if Some(count) != entry.withheld {
        v.fail(
            file,
            None,
            "manifest",
            format!(
                "{count} withheld rows but the manifest records {:?}",
                entry.withheld
            ),
        );
    }

    // Margins rebuilt from the dimension values, whatever the file records.
    for c in rebuilt_margins(&columns, &cols, policy) {
        if !constraints.contains(&c) {
            constraints.push(c);
        }
    }

    // Secondary suppression: each recorded or rebuilt constraint has 0 or ≥ 2 withheld members,
    // for rows and for each magnitude column's null cells.
    if let Some(c) = constraints
        .iter()
        .find(|c| c.total >= n || c.parts.iter().any(|&p| p >= n))
    {
        v.fail(
            file,
            None,
            "secondary",
            format!("constraint {c:?} refers to a row beyond {n}"),
        );
        return None;
    }
    for c in unsafe_constraints(&constraints, &withheld) {
        let lone = std::iter::once(c.total)
            .chain(c.parts.iter().copied())
            .find(|&r| withheld[r]);
        v.fail(
            file,
            lone,
            "secondary",
            format!("the only withheld cell of total row {} with parts {:?}: recoverable by subtraction", c.total, c.parts),
        );
    }
    for (mc, col) in columns.iter().enumerate() {
        if !matches!(col.role, Role::Magnitude { .. }) {
            continue;
        }
        let null: Vec<bool> = (0..n)
            .map(|r| withheld[r] || cols[mc][r] == Value::Null)
            .collect();
        for c in unsafe_constraints(&constraints, &null) {
            let lone = std::iter::once(c.total)
                .chain(c.parts.iter().copied())
                .find(|&r| null[r]);
            v.fail(
                file,
                lone,
                "secondary",
                format!(
                    "{} is the only null magnitude of total row {} with parts {:?}",
                    col.name, c.total, c.parts
                ),
            );
        }
    }
    Some(Seen {
        name: file.trim_end_matches(".parquet").to_string(),
        columns,
        cols,
        withheld,
    })
}

#[cfg(test)]
mod tests {
    use super::quantile_of_name;

    #[test]
    fn quantile_probabilities_come_from_names() {
        assert_eq!(quantile_of_name("median"), Some(0.5));
        assert_eq!(quantile_of_name("q25"), Some(0.25));
        assert_eq!(quantile_of_name("p90"), Some(0.9));
        assert_eq!(quantile_of_name("q2_5"), Some(0.025));
        assert_eq!(quantile_of_name("mean"), None);
        assert_eq!(quantile_of_name("q150"), None);
    }
}
