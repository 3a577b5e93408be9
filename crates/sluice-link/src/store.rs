//! The linked store: pseudonymised results in Parquet, one file per collection month, and a
//! manifest that is written last.
//!
//! In memory a month is a [`Partition`]: rows plus an index from (specimen, analyte) to the newest
//! version, older versions chained behind it, so a repeated row, an amendment or a cancellation
//! finds what it relates to in constant time. Every version is kept (with `current` false for
//! superseded and cancelled ones) so that a later re-export of an old version is recognised as a
//! duplicate rather than taken for news; studies read `current` rows only.
//!
//! Writes are atomic: partition files get a new generation number, the manifest is replaced by
//! rename only after every file it names is on disk, and files of an older generation are removed
//! after that. A crash at any point leaves the previous manifest and its files intact.

use polars::prelude::*;
use serde::{Deserialize, Serialize};
use sluice_policy::{Setting, Sex, Status};
use sluice_source::Qualifier;
use std::collections::HashMap;
use std::path::{Path, PathBuf};

pub const SCHEMA_VERSION: u32 = 1;
const NONE: u32 = u32::MAX;

#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("store {path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("store {path}: {source}")]
    Polars { path: PathBuf, source: PolarsError },
    #[error("store {path}: manifest is not valid: {message}")]
    Manifest { path: PathBuf, message: String },
    #[error("store {path}: {message}")]
    Refused { path: PathBuf, message: String },
}

/// One stored result version. Strings that repeat (practice, area, text results) are interned.
#[derive(Clone, Debug)]
pub struct StoreRow {
    pub patient: u64,
    pub specimen: u64,
    /// Minutes since 1970-01-01.
    pub collected: i64,
    pub reported: Option<i64>,
    pub setting: Setting,
    pub analyte: u16,
    pub value: Option<f64>,
    pub qualifier: Option<Qualifier>,
    pub text: u32,
    pub status: Status,
    pub current: bool,
    pub age: Option<u8>,
    pub sex: Sex,
    pub distance_km: Option<f32>,
    pub practice: u32,
    pub area: u32,
    pub tags: u64,
    pub source_file: u32,
    pub source_line: u32,
    /// Next older version of the same (specimen, analyte), or `NONE`.
    prev: u32,
}

impl StoreRow {
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        patient: u64,
        specimen: u64,
        collected: i64,
        reported: Option<i64>,
        setting: Setting,
        analyte: u16,
        status: Status,
    ) -> Self {
        Self {
            patient,
            specimen,
            collected,
            reported,
            setting,
            analyte,
            value: None,
            qualifier: None,
            text: NONE,
            status,
            current: false,
            age: None,
            sex: Sex::Unknown,
            distance_km: None,
            practice: NONE,
            area: NONE,
            tags: 0,
            source_file: 0,
            source_line: 0,
            prev: NONE,
        }
    }

    fn same_version(&self, o: &StoreRow) -> bool {
        self.status == o.status
            && self.reported == o.reported
            && self.value.map(f64::to_bits) == o.value.map(f64::to_bits)
            && self.qualifier == o.qualifier
            && self.text == o.text
    }
}

/// Interned strings shared by all partitions of a run.
#[derive(Default, Clone)]
pub struct Strings {
    pub values: Vec<String>,
    index: HashMap<String, u32>,
}

impl Strings {
    pub fn intern(&mut self, s: &str) -> u32 {
        if let Some(&i) = self.index.get(s) {
            return i;
        }
        let i = self.values.len() as u32;
        self.values.push(s.to_string());
        self.index.insert(s.to_string(), i);
        i
    }
    pub fn get(&self, i: u32) -> Option<&str> {
        (i != NONE).then(|| self.values[i as usize].as_str())
    }
}

/// What merging one row did.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Outcome {
    /// A new current version (the first, or newer than what was there).
    Stored { replaced_current: bool },
    /// An exact repeat of a version already held.
    Duplicate,
    /// A cancellation; `replaced_current` if it withdrew a current version.
    Cancelled { replaced_current: bool },
    /// An older version than one already held: kept, not current.
    Older,
    /// The specimen is already stored for a different patient.
    PatientConflict,
}

/// Hasher for the version index. Its keys are keyed-HMAC pseudonyms, already uniformly
/// distributed and unguessable without the key, so mixing the analyte into them is enough; the
/// default SipHash would only cost time on every row.
#[derive(Default, Clone, Copy)]
pub struct PseudonymHasher(u64);

impl std::hash::Hasher for PseudonymHasher {
    fn finish(&self) -> u64 {
        self.0
    }
    fn write(&mut self, bytes: &[u8]) {
        for &b in bytes {
            self.0 = (self.0.rotate_left(8) ^ u64::from(b)).wrapping_mul(0x9E37_79B9_7F4A_7C15);
        }
    }
    fn write_u64(&mut self, v: u64) {
        self.0 ^= v;
    }
    fn write_u16(&mut self, v: u16) {
        self.0 = (self.0 ^ u64::from(v)).wrapping_mul(0x9E37_79B9_7F4A_7C15);
    }
}

type Index = HashMap<(u64, u16), u32, std::hash::BuildHasherDefault<PseudonymHasher>>;

#[derive(Default)]
pub struct Partition {
    pub rows: Vec<StoreRow>,
    index: Index,
    pub dirty: bool,
    pub last_touched: usize,
}

impl Partition {
    /// Builds the version index over rows loaded from disk (rows are in any order; versions of one
    /// key are ordered by (reported, source file, source line)).
    fn from_rows(mut rows: Vec<StoreRow>) -> Self {
        rows.sort_by_key(|r| {
            (
                r.specimen,
                r.analyte,
                r.reported,
                r.source_file,
                r.source_line,
            )
        });
        let mut index = Index::with_capacity_and_hasher(rows.len(), Default::default());
        for (i, r) in rows.iter_mut().enumerate() {
            if let Some(prev) = index.insert((r.specimen, r.analyte), i as u32) {
                r.prev = prev;
            }
        }
        Self {
            rows,
            index,
            dirty: false,
            last_touched: 0,
        }
    }

    pub fn merge(&mut self, mut r: StoreRow) -> Outcome {
        self.dirty = true;
        let key = (r.specimen, r.analyte);
        let Some(&head) = self.index.get(&key) else {
            let cancel = r.status == Status::Cancelled;
            r.current = !cancel;
            self.index.insert(key, self.rows.len() as u32);
            self.rows.push(r);
            return if cancel {
                Outcome::Cancelled {
                    replaced_current: false,
                }
            } else {
                Outcome::Stored {
                    replaced_current: false,
                }
            };
        };
        let mut i = head;
        while i != NONE {
            if self.rows[i as usize].same_version(&r) {
                return Outcome::Duplicate;
            }
            i = self.rows[i as usize].prev;
        }
        let h = &self.rows[head as usize];
        if h.patient != r.patient {
            return Outcome::PatientConflict;
        }
        // Newer when reported later; with equal or missing report times, the later extract wins.
        let newer = match (r.reported, h.reported) {
            (Some(a), Some(b)) => a >= b,
            _ => true,
        };
        let cancel = r.status == Status::Cancelled;
        if newer {
            let replaced_current = h.current;
            self.rows[head as usize].current = false;
            r.current = !cancel;
            r.prev = head;
            self.index.insert(key, self.rows.len() as u32);
            self.rows.push(r);
            if cancel {
                Outcome::Cancelled { replaced_current }
            } else {
                Outcome::Stored { replaced_current }
            }
        } else {
            r.current = false;
            r.prev = self.rows[head as usize].prev;
            self.rows[head as usize].prev = self.rows.len() as u32;
            self.rows.push(r);
            if cancel {
                Outcome::Cancelled {
                    replaced_current: false,
                }
            } else {
                Outcome::Older
            }
        }
    }
}

/// Per input file: what became of its rows.
#[derive(Clone, Debug, Default, Serialize, Deserialize, PartialEq, Eq)]
pub struct Accounting {
    pub rows: u64,
    /// New current versions.
    pub stored: u64,
    pub quarantined: u64,
    pub duplicate: u64,
    /// Versions that stopped being current while this file was linked (earlier rows replaced by
    /// an amendment or cancellation, and rows of this file older than a version already held).
    pub superseded: u64,
    pub cancelled: u64,
}

impl Accounting {
    pub fn add(&mut self, o: &Accounting) {
        self.rows += o.rows;
        self.stored += o.stored;
        self.quarantined += o.quarantined;
        self.duplicate += o.duplicate;
        self.superseded += o.superseded;
        self.cancelled += o.cancelled;
    }
}

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct LedgerEntry {
    pub file: String,
    pub sha256: String,
    pub profile_sha256: String,
    pub ingested_at: String,
    pub accounting: Accounting,
    /// Quarantine file (inside the secure area, outside the store), if any row was quarantined.
    pub quarantine_file: Option<String>,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct PartitionEntry {
    /// Collection month, YYYY-MM.
    pub month: String,
    pub file: String,
    pub rows: u64,
    pub current: u64,
    pub sha256: String,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct Manifest {
    pub schema_version: u32,
    pub tool_version: String,
    pub site: String,
    pub key_fingerprint: String,
    pub analytes_sha256: String,
    pub analyte_ids: Vec<String>,
    pub tags_sha256: String,
    pub tag_names: Vec<String>,
    pub keep_area: bool,
    pub generation: u64,
    pub ledger: Vec<LedgerEntry>,
    /// Cumulative over the ledger; `rows == current + superseded + quarantined + duplicate +
    /// cancelled` always holds.
    pub totals: Accounting,
    pub current_rows: u64,
    pub partitions: Vec<PartitionEntry>,
}

impl Manifest {
    pub fn path(store: &Path) -> PathBuf {
        store.join("manifest.json")
    }

    pub fn load(store: &Path) -> Result<Option<Self>, StoreError> {
        let p = Self::path(store);
        let bytes = match std::fs::read(&p) {
            Ok(b) => b,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
            Err(source) => return Err(StoreError::Io { path: p, source }),
        };
        let m: Manifest = serde_json::from_slice(&bytes).map_err(|e| StoreError::Manifest {
            path: p.clone(),
            message: e.to_string(),
        })?;
        if m.schema_version != SCHEMA_VERSION {
            return Err(StoreError::Refused {
                path: store.to_path_buf(),
                message: format!(
                    "schema version {} but this sluice reads version {SCHEMA_VERSION}; relink the extracts into a new store",
                    m.schema_version
                ),
            });
        }
        Ok(Some(m))
    }

    pub fn save(&self, store: &Path) -> Result<(), StoreError> {
        let p = Self::path(store);
        let tmp = store.join("manifest.json.tmp");
        let json = serde_json::to_vec_pretty(self).expect("manifest serialises");
        let io = |source| StoreError::Io {
            path: tmp.clone(),
            source,
        };
        std::fs::write(&tmp, json).map_err(io)?;
        std::fs::File::open(&tmp)
            .and_then(|f| f.sync_all())
            .map_err(io)?;
        std::fs::rename(&tmp, &p).map_err(|source| StoreError::Io { path: p, source })
    }
}

pub fn month_label(month: i32) -> String {
    format!(
        "{:04}-{:02}",
        month.div_euclid(12),
        month.rem_euclid(12) + 1
    )
}

/// The month number (year × 12 + month − 1) of a minute since 1970.
pub fn month_of(minute: i64) -> i32 {
    let d = chrono::DateTime::from_timestamp(minute.div_euclid(1440) * 86_400, 0)
        .expect("date in range")
        .date_naive();
    chrono::Datelike::year(&d) * 12 + chrono::Datelike::month0(&d) as i32
}

fn setting_from(s: &str) -> Option<Setting> {
    Setting::ALL.into_iter().find(|x| x.as_str() == s)
}
fn sex_from(s: &str) -> Option<Sex> {
    Sex::ALL.into_iter().find(|x| x.as_str() == s)
}
fn status_from(s: &str) -> Option<Status> {
    [Status::Final, Status::Amended, Status::Cancelled]
        .into_iter()
        .find(|x| x.as_str() == s)
}
fn qualifier_from(s: &str) -> Option<Qualifier> {
    [Qualifier::Lt, Qualifier::Le, Qualifier::Gt, Qualifier::Ge]
        .into_iter()
        .find(|x| x.as_str() == s)
}

/// Column layout of partition files.
pub struct Schema<'a> {
    pub analyte_ids: &'a [String],
    pub tag_names: &'a [String],
    pub keep_area: bool,
}

const STATUSES: [Status; 3] = [Status::Final, Status::Amended, Status::Cancelled];

/// A string column of few distinct values, gathered from a dictionary by code: copying short
/// string views is much cheaper than building every string anew.
fn dict_column(
    name: &str,
    dict: &[&str],
    codes: impl Iterator<Item = Option<IdxSize>>,
) -> PolarsResult<Column> {
    let d = Series::new("".into(), dict);
    let idx: IdxCa = codes.collect();
    Ok(d.take(&idx)?.with_name(name.into()).into_column())
}

fn pe(path: &Path) -> impl Fn(PolarsError) -> StoreError + '_ {
    move |source| StoreError::Polars {
        path: path.to_path_buf(),
        source,
    }
}

/// Writes a partition's rows as Parquet, sorted by patient, collection time, specimen and
/// analyte — the order studies read in. Returns (rows, current rows, SHA-256 of the file).
pub fn write_partition(
    path: &Path,
    rows: &mut [StoreRow],
    strings: &Strings,
    schema: &Schema<'_>,
    metadata: Vec<(String, String)>,
) -> Result<(u64, u64, String), StoreError> {
    let t0 = std::time::Instant::now();
    // Sorting the rows themselves (not an index into them) lets every column below be built by
    // one sequential pass; the key is unique, so the unstable sort is still deterministic.
    rows.sort_unstable_by_key(|r| {
        (
            r.patient,
            r.collected,
            r.specimen,
            r.analyte,
            r.reported,
            r.source_file,
            r.source_line,
        )
    });
    let it = || rows.iter();
    let t_sort = t0.elapsed().as_secs_f64();
    let minutes_ms = |m: i64| m * 60_000;
    let dt = DataType::Datetime(TimeUnit::Milliseconds, None);
    let mut cols: Vec<Column> = vec![
        Column::new(
            "patient".into(),
            it().map(|r| r.patient).collect::<Vec<u64>>(),
        ),
        Column::new(
            "specimen".into(),
            it().map(|r| r.specimen).collect::<Vec<u64>>(),
        ),
        Column::new(
            "collected_at".into(),
            it().map(|r| minutes_ms(r.collected)).collect::<Vec<i64>>(),
        )
        .cast(&dt)
        .map_err(pe(path))?,
        Column::new(
            "reported_at".into(),
            it().map(|r| r.reported.map(minutes_ms))
                .collect::<Vec<Option<i64>>>(),
        )
        .cast(&dt)
        .map_err(pe(path))?,
        dict_column(
            "setting",
            &Setting::ALL.map(Setting::as_str),
            it().map(|r| Some(r.setting.code() as IdxSize)),
        )
        .map_err(pe(path))?,
        dict_column(
            "analyte",
            &schema
                .analyte_ids
                .iter()
                .map(String::as_str)
                .collect::<Vec<_>>(),
            it().map(|r| Some(r.analyte as IdxSize)),
        )
        .map_err(pe(path))?,
        Column::new(
            "value".into(),
            it().map(|r| r.value).collect::<Vec<Option<f64>>>(),
        ),
        Column::new(
            "qualifier".into(),
            it().map(|r| r.qualifier.map(Qualifier::as_str))
                .collect::<Vec<Option<&str>>>(),
        ),
        Column::new(
            "text_value".into(),
            it().map(|r| strings.get(r.text))
                .collect::<Vec<Option<&str>>>(),
        ),
        dict_column(
            "status",
            &STATUSES.map(Status::as_str),
            it().map(|r| Some(r.status as IdxSize)),
        )
        .map_err(pe(path))?,
        Column::new(
            "current".into(),
            it().map(|r| r.current).collect::<Vec<bool>>(),
        ),
        Column::new(
            "age_years".into(),
            it().map(|r| r.age).collect::<Vec<Option<u8>>>(),
        ),
        dict_column(
            "sex",
            &Sex::ALL.map(Sex::as_str),
            it().map(|r| Some(r.sex.code() as IdxSize)),
        )
        .map_err(pe(path))?,
        Column::new(
            "distance_km".into(),
            it().map(|r| r.distance_km).collect::<Vec<Option<f32>>>(),
        ),
        dict_column(
            "practice_code",
            &strings
                .values
                .iter()
                .map(String::as_str)
                .collect::<Vec<_>>(),
            it().map(|r| (r.practice != NONE).then_some(r.practice as IdxSize)),
        )
        .map_err(pe(path))?,
    ];
    if schema.keep_area {
        cols.push(Column::new(
            "home_area".into(),
            it().map(|r| strings.get(r.area))
                .collect::<Vec<Option<&str>>>(),
        ));
    }
    for (b, name) in schema.tag_names.iter().enumerate() {
        cols.push(Column::new(
            format!("tag_{name}").into(),
            it().map(|r| r.tags & (1 << b) != 0).collect::<Vec<bool>>(),
        ));
    }
    cols.push(Column::new(
        "source_file".into(),
        it().map(|r| r.source_file).collect::<Vec<u32>>(),
    ));
    cols.push(Column::new(
        "source_line".into(),
        it().map(|r| r.source_line).collect::<Vec<u32>>(),
    ));
    let mut df = DataFrame::new(rows.len(), cols).map_err(pe(path))?;
    let t1 = t0.elapsed().as_secs_f64();
    let tmp = path.with_extension("parquet.tmp");
    let file = std::fs::File::create(&tmp).map_err(|source| StoreError::Io {
        path: tmp.clone(),
        source,
    })?;
    // Hash while writing rather than reading the file back.
    let mut w = HashingWriter {
        inner: std::io::BufWriter::new(file),
        hasher: <sha2::Sha256 as sha2::Digest>::new(),
    };
    ParquetWriter::new(&mut w)
        .with_compression(ParquetCompression::Zstd(None))
        .with_key_value_metadata(Some(KeyValueMetadata::from_static(metadata)))
        .finish(&mut df)
        .map_err(pe(path))?;
    let sha = hex::encode(sha2::Digest::finalize(w.hasher));
    if std::env::var_os("SLUICE_PROFILE").is_some() {
        eprintln!(
            "write {}: sort {t_sort:.3}s build {t1:.3}s total {:.3}s",
            path.display(),
            t0.elapsed().as_secs_f64()
        );
    }
    let file = w.inner.into_inner().map_err(|e| StoreError::Io {
        path: tmp.clone(),
        source: e.into_error(),
    })?;
    file.sync_all().map_err(|source| StoreError::Io {
        path: tmp.clone(),
        source,
    })?;
    drop(file);
    std::fs::rename(&tmp, path).map_err(|source| StoreError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let current = rows.iter().filter(|r| r.current).count() as u64;
    Ok((rows.len() as u64, current, sha))
}

struct HashingWriter<W> {
    inner: W,
    hasher: sha2::Sha256,
}

impl<W: std::io::Write> std::io::Write for HashingWriter<W> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        let n = self.inner.write(buf)?;
        sha2::Digest::update(&mut self.hasher, &buf[..n]);
        Ok(n)
    }
    fn flush(&mut self) -> std::io::Result<()> {
        self.inner.flush()
    }
}

/// Reads a partition file back into rows (for merging the next month's extract into it).
pub fn read_partition(
    path: &Path,
    strings: &mut Strings,
    schema: &Schema<'_>,
) -> Result<Partition, StoreError> {
    let file = std::fs::File::open(path).map_err(|source| StoreError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let df = ParquetReader::new(file).finish().map_err(pe(path))?;
    let e = pe(path);
    let bad = |what: &str| StoreError::Manifest {
        path: path.to_path_buf(),
        message: format!("unexpected content in column {what}"),
    };
    let col = |n: &str| df.column(n).map_err(pe(path));
    let ms = |c: &Column| -> Result<Vec<Option<i64>>, StoreError> {
        let c = c.cast(&DataType::Int64).map_err(pe(path))?;
        Ok(c.i64().map_err(pe(path))?.iter().collect())
    };
    let patient: Vec<u64> = col("patient")?
        .u64()
        .map_err(&e)?
        .into_no_null_iter()
        .collect();
    let specimen: Vec<u64> = col("specimen")?
        .u64()
        .map_err(&e)?
        .into_no_null_iter()
        .collect();
    let collected = ms(col("collected_at")?)?;
    let reported = ms(col("reported_at")?)?;
    let setting = col("setting")?.str().map_err(&e)?.clone();
    let analyte = col("analyte")?.str().map_err(&e)?.clone();
    let value = col("value")?.f64().map_err(&e)?.clone();
    let qualifier = col("qualifier")?.str().map_err(&e)?.clone();
    let text = col("text_value")?.str().map_err(&e)?.clone();
    let status = col("status")?.str().map_err(&e)?.clone();
    let current = col("current")?.bool().map_err(&e)?.clone();
    let age = col("age_years")?.u8().map_err(&e)?.clone();
    let sex = col("sex")?.str().map_err(&e)?.clone();
    let dist = col("distance_km")?.f32().map_err(&e)?.clone();
    let practice = col("practice_code")?.str().map_err(&e)?.clone();
    let area = if schema.keep_area {
        Some(col("home_area")?.str().map_err(&e)?.clone())
    } else {
        None
    };
    let tags: Vec<BooleanChunked> = schema
        .tag_names
        .iter()
        .map(|n| Ok(col(&format!("tag_{n}"))?.bool().map_err(&e)?.clone()))
        .collect::<Result<_, StoreError>>()?;
    let sfile: Vec<u32> = col("source_file")?
        .u32()
        .map_err(&e)?
        .into_no_null_iter()
        .collect();
    let sline: Vec<u32> = col("source_line")?
        .u32()
        .map_err(&e)?
        .into_no_null_iter()
        .collect();
    let analyte_index: HashMap<&str, u16> = schema
        .analyte_ids
        .iter()
        .enumerate()
        .map(|(i, a)| (a.as_str(), i as u16))
        .collect();
    let mut rows = Vec::with_capacity(df.height());
    for i in 0..df.height() {
        let mut r = StoreRow::new(
            patient[i],
            specimen[i],
            collected[i].ok_or_else(|| bad("collected_at"))? / 60_000,
            reported[i].map(|v| v / 60_000),
            setting
                .get(i)
                .and_then(setting_from)
                .ok_or_else(|| bad("setting"))?,
            *analyte
                .get(i)
                .and_then(|a| analyte_index.get(a))
                .ok_or_else(|| bad("analyte"))?,
            status
                .get(i)
                .and_then(status_from)
                .ok_or_else(|| bad("status"))?,
        );
        r.value = value.get(i);
        r.qualifier = qualifier.get(i).and_then(qualifier_from);
        r.text = text.get(i).map_or(NONE, |t| strings.intern(t));
        r.current = current.get(i).unwrap_or(false);
        r.age = age.get(i);
        r.sex = sex.get(i).and_then(sex_from).ok_or_else(|| bad("sex"))?;
        r.distance_km = dist.get(i);
        r.practice = practice.get(i).map_or(NONE, |t| strings.intern(t));
        r.area = area
            .as_ref()
            .and_then(|a| a.get(i))
            .map_or(NONE, |t| strings.intern(t));
        for (b, t) in tags.iter().enumerate() {
            if t.get(i) == Some(true) {
                r.tags |= 1 << b;
            }
        }
        r.source_file = sfile[i];
        r.source_line = sline[i];
        rows.push(r);
    }
    Ok(Partition::from_rows(rows))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(reported: i64, value: f64, status: Status) -> StoreRow {
        let mut r = StoreRow::new(1, 2, 0, Some(reported), Setting::Community, 0, status);
        r.value = Some(value);
        r
    }

    #[test]
    fn versions() {
        let mut p = Partition::default();
        assert_eq!(
            p.merge(row(10, 4.0, Status::Final)),
            Outcome::Stored {
                replaced_current: false
            }
        );
        assert_eq!(p.merge(row(10, 4.0, Status::Final)), Outcome::Duplicate);
        assert_eq!(
            p.merge(row(20, 4.4, Status::Amended)),
            Outcome::Stored {
                replaced_current: true
            }
        );
        // The original re-exported after its amendment is a duplicate, not news.
        assert_eq!(p.merge(row(10, 4.0, Status::Final)), Outcome::Duplicate);
        // An older version never seen before is kept but not current.
        assert_eq!(p.merge(row(5, 3.9, Status::Final)), Outcome::Older);
        let mut c = row(30, 0.0, Status::Cancelled);
        c.value = None;
        assert_eq!(
            p.merge(c),
            Outcome::Cancelled {
                replaced_current: true
            }
        );
        assert_eq!(p.rows.iter().filter(|r| r.current).count(), 0);
        let mut other = row(40, 1.0, Status::Final);
        other.patient = 9;
        assert_eq!(p.merge(other), Outcome::PatientConflict);
    }
}
