//! The linker: the one place where identifiers exist.
//!
//! It reads each extract through the site's profile ([`sluice_source`]), replaces identifiers
//! with keyed pseudonyms ([`pseudonym`]), turns free text into dictionary tags ([`tags`]), derives
//! age at collection and distance from home to GP ([`geo`]), and merges the rows into the
//! pseudonymised, deduplicated, versioned Parquet store ([`store`]). Nothing identifying is
//! written to the store: no NHS number, local identifier, birth date, postcode, specimen number
//! or free text. Quarantined rows, which do carry their raw line, go to a separate quarantine
//! folder inside the secure area.
//!
//! Every input row ends as stored, quarantined, duplicate, superseded or cancelled, and the store
//! manifest keeps that accounting per file and in total.

pub mod geo;
pub mod key;
pub mod pseudonym;
pub mod store;
pub mod tags;

use geo::Geo;
use key::Key;
use pseudonym::{Kind, Pseudonymiser};
use rayon::prelude::*;
use sha2::{Digest, Sha256};
use sluice_policy::{AnalyteTable, Profile};
use sluice_source::{PatientRef, Quarantined, Source, SourceError, Value};
use std::collections::{BTreeMap, HashSet};
use std::path::{Path, PathBuf};
use store::{
    Accounting, LedgerEntry, Manifest, Outcome, Partition, PartitionEntry, Schema, StoreError,
    StoreRow, Strings,
};
use tags::TagDictionary;

#[derive(Debug, thiserror::Error)]
pub enum LinkError {
    #[error(transparent)]
    Source(#[from] SourceError),
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("cannot read {path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("store {store}: {message}")]
    Mismatch { store: PathBuf, message: String },
    #[error("internal accounting error: {0}")]
    Accounting(String),
}

/// The policies and secret a link run needs.
pub struct Inputs<'a> {
    pub profile: &'a Profile,
    pub analytes: &'a AnalyteTable,
    pub tags: &'a TagDictionary,
    pub key: &'a Key,
    pub geo: Option<&'a Geo>,
}

pub struct Options {
    pub store: PathBuf,
    /// Where quarantined rows (with their raw lines) are written; outside the store.
    pub quarantine: PathBuf,
    /// Keep the outward part of the home postcode ("QV9") as `home_area`.
    pub keep_area: bool,
}

#[derive(Clone, Debug)]
pub struct FileResult {
    pub file: PathBuf,
    /// Already in the store's ledger (same SHA-256): nothing done.
    pub skipped: bool,
    pub accounting: Accounting,
}

#[derive(Debug)]
pub struct Report {
    pub files: Vec<FileResult>,
    pub totals: Accounting,
    pub current_rows: u64,
    pub distinct_patients_hashed: usize,
}

/// A row after pseudonymisation, with strings interned in the worker's table.
struct Incoming {
    row: StoreRow,
    span: (usize, usize),
    line: u64,
}

/// One file read and pseudonymised by a worker thread.
struct Parsed {
    path: PathBuf,
    name: String,
    sha256: String,
    text: String,
    rows: Vec<Incoming>,
    quarantined: Vec<Quarantined>,
    rows_read: u64,
    strings: Strings,
    hashed: usize,
    /// Already in the store's ledger: not parsed at all.
    known: bool,
}

fn civil(day: i64) -> (i32, u32, u32) {
    let d =
        chrono::NaiveDate::from_num_days_from_ce_opt((day + 719_163) as i32).unwrap_or_default();
    (
        chrono::Datelike::year(&d),
        chrono::Datelike::month(&d),
        chrono::Datelike::day(&d),
    )
}

/// Whole years from birth to the day of collection.
fn age_years(birth_day: i64, on_day: i64) -> i64 {
    let (y1, m1, d1) = civil(birth_day);
    let (y2, m2, d2) = civil(on_day);
    i64::from(y2 - y1) - i64::from((m2, d2) < (m1, d1))
}

fn parse_file(
    path: &Path,
    source: &Source<'_>,
    inputs: &Inputs<'_>,
    site: &str,
    keep_area: bool,
    ledger: &HashSet<String>,
) -> Result<Parsed, LinkError> {
    let bytes = std::fs::read(path).map_err(|source| LinkError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let sha256 = hex::encode(Sha256::digest(&bytes));
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().to_string())
        .unwrap_or_default();
    if ledger.contains(&sha256) {
        return Ok(Parsed {
            path: path.to_path_buf(),
            name,
            sha256,
            text: String::new(),
            rows: Vec::new(),
            quarantined: Vec::new(),
            rows_read: 0,
            strings: Strings::default(),
            hashed: 0,
            known: true,
        });
    }
    let text = sluice_source::decode(path, bytes, inputs.profile.format.encoding)?;
    let mut pseudo = Pseudonymiser::new(inputs.key, site);
    let mut tagger = inputs.tags.clone();
    let mut strings = Strings::default();
    // About one row per hundred bytes of extract; sizing up front saves regrowing a large buffer.
    let mut rows = Vec::with_capacity(text.len() / 100);
    let mut extra_q = Vec::new();
    let mut last_specimen = (String::new(), 0u64);
    let mut last_patient = (None::<[u8; 10]>, 0u64);
    let mut last_notes = (String::new(), 0u64);
    let mut last_practice = (String::new(), u32::MAX);
    let mut last_geo = (String::new(), String::new(), None::<f32>);
    let report = source.read_text(path, &text, |r: sluice_source::Row<'_>| {
        // Consecutive rows are mostly one specimen of one patient: reuse what the last row found.
        let patient = match r.patient {
            PatientRef::Nhs(d) if last_patient.0 == Some(d) => last_patient.1,
            PatientRef::Nhs(d) => {
                let mut buf = [0u8; 10];
                for (b, x) in buf.iter_mut().zip(d) {
                    *b = b'0' + x;
                }
                let p = pseudo.get(Kind::Patient, std::str::from_utf8(&buf).expect("digits"));
                last_patient = (Some(d), p);
                p
            }
            PatientRef::Local(id) => {
                last_patient.0 = None;
                pseudo.get(Kind::LocalPatient, id)
            }
        };
        if last_specimen.0 != r.specimen {
            last_specimen = (
                r.specimen.to_string(),
                pseudo.once(Kind::Specimen, r.specimen),
            );
        }
        let age = match r.birth_day {
            None => None,
            Some(b) => {
                let a = age_years(b, r.collected.div_euclid(1440));
                if !(0..=130).contains(&a) {
                    extra_q.push(Quarantined {
                        line: r.line,
                        field: "birth_date".into(),
                        reason: if a < 0 {
                            "birth date is after collection".into()
                        } else {
                            format!("implausible age {a} years at collection")
                        },
                        raw: text.as_bytes()[r.span.0..r.span.1].to_vec(),
                    });
                    return;
                }
                Some(a as u8)
            }
        };
        let mut row = StoreRow::new(
            patient,
            last_specimen.1,
            r.collected,
            r.reported,
            r.setting,
            r.analyte,
            r.status,
        );
        match r.value {
            Value::Num(v) => row.value = Some(v),
            Value::Qualified(q, v) => {
                row.value = Some(v);
                row.qualifier = Some(q);
            }
            Value::Text(t) => row.text = strings.intern(t),
            Value::None => {}
        }
        row.age = age;
        row.sex = r.sex;
        if let Some(g) = inputs.geo {
            if last_geo.0 != r.postcode || last_geo.1 != r.practice {
                let d = g.distance_km(r.postcode, r.practice).map(|d| d as f32);
                last_geo = (r.postcode.to_string(), r.practice.to_string(), d);
            }
            row.distance_km = last_geo.2;
        }
        if !r.practice.is_empty() {
            if last_practice.0 != r.practice {
                last_practice = (r.practice.to_string(), strings.intern(r.practice));
            }
            row.practice = last_practice.1;
        }
        if keep_area && let Some(a) = geo::outward(r.postcode) {
            row.area = strings.intern(&a);
        }
        if last_notes.0 != r.notes || last_notes.0.is_empty() {
            last_notes = (r.notes.to_string(), tagger.tags(r.notes));
        }
        row.tags = last_notes.1;
        row.source_line = r.line as u32;
        rows.push(Incoming {
            row,
            span: r.span,
            line: r.line,
        });
    })?;
    let mut quarantined = report.quarantined;
    quarantined.extend(extra_q);
    Ok(Parsed {
        name,
        path: path.to_path_buf(),
        sha256,
        text,
        rows,
        quarantined,
        rows_read: report.rows_read,
        strings,
        hashed: pseudo.distinct(),
        known: false,
    })
}

struct State<'a> {
    store: &'a Path,
    generation: u64,
    manifest: Manifest,
    /// Partition files by month number, as currently on disk for this run.
    files: BTreeMap<i32, PartitionEntry>,
    open: BTreeMap<i32, Partition>,
    strings: Strings,
    schema_ids: Vec<String>,
    tag_names: Vec<String>,
    keep_area: bool,
    /// Partition writes run on a writer thread while the next file is merged.
    jobs: Option<std::sync::mpsc::SyncSender<WriteJob>>,
    done: std::sync::mpsc::Receiver<Result<(i32, PartitionEntry), StoreError>>,
    pending: HashSet<i32>,
}

/// One partition to write, owning everything the writer thread needs.
struct WriteJob {
    month: i32,
    rows: Vec<StoreRow>,
    strings: Strings,
    analyte_ids: Vec<String>,
    tag_names: Vec<String>,
    keep_area: bool,
    path: PathBuf,
    rel: String,
    meta: Vec<(String, String)>,
}

impl WriteJob {
    fn run(mut self) -> Result<(i32, PartitionEntry), StoreError> {
        let schema = Schema {
            analyte_ids: &self.analyte_ids,
            tag_names: &self.tag_names,
            keep_area: self.keep_area,
        };
        let (rows, current, sha256) = store::write_partition(
            &self.path,
            &mut self.rows,
            &self.strings,
            &schema,
            self.meta,
        )?;
        Ok((
            self.month,
            PartitionEntry {
                month: store::month_label(self.month),
                file: self.rel,
                rows,
                current,
                sha256,
            },
        ))
    }
}

impl State<'_> {
    /// Takes in finished writes; with `wait_for`, blocks until that month's write is done.
    fn drain(&mut self, wait_for: Option<i32>) -> Result<(), StoreError> {
        loop {
            let must_wait = wait_for.is_some_and(|m| self.pending.contains(&m));
            let next = if must_wait {
                self.done.recv().ok()
            } else {
                self.done.try_recv().ok()
            };
            let Some(r) = next else { return Ok(()) };
            let (month, entry) = r?;
            self.pending.remove(&month);
            self.files.insert(month, entry);
        }
    }

    fn partition(&mut self, month: i32) -> Result<&mut Partition, StoreError> {
        if self.pending.contains(&month) {
            self.drain(Some(month))?;
        }
        if !self.open.contains_key(&month) {
            let p = match self.files.get(&month) {
                Some(e) => {
                    let path = self.store.join(&e.file);
                    let schema = Schema {
                        analyte_ids: &self.schema_ids,
                        tag_names: &self.tag_names,
                        keep_area: self.keep_area,
                    };
                    store::read_partition(&path, &mut self.strings, &schema)?
                }
                None => Partition::default(),
            };
            self.open.insert(month, p);
        }
        Ok(self.open.get_mut(&month).expect("inserted"))
    }

    /// Hands a partition to the writer thread and drops it from memory.
    fn write(&mut self, month: i32) -> Result<(), StoreError> {
        let Some(p) = self.open.remove(&month) else {
            return Ok(());
        };
        if !p.dirty {
            return Ok(());
        }
        let rel = format!(
            "results/{}.g{}.parquet",
            store::month_label(month),
            self.generation
        );
        let meta = vec![
            (
                "sluice.schema_version".to_string(),
                store::SCHEMA_VERSION.to_string(),
            ),
            (
                "sluice.key_fingerprint".to_string(),
                self.manifest.key_fingerprint.clone(),
            ),
            ("sluice.site".to_string(), self.manifest.site.clone()),
            ("sluice.month".to_string(), store::month_label(month)),
        ];
        let job = WriteJob {
            month,
            rows: p.rows,
            strings: self.strings.clone(),
            analyte_ids: self.schema_ids.clone(),
            tag_names: self.tag_names.clone(),
            keep_area: self.keep_area,
            path: self.store.join(&rel),
            rel,
            meta,
        };
        self.pending.insert(month);
        match &self.jobs {
            Some(tx) if tx.send(job).is_ok() => Ok(()),
            // The writer stopped: its error is waiting in `done`.
            _ => {
                self.drain(Some(month))?;
                Err(StoreError::Refused {
                    path: self.store.to_path_buf(),
                    message: "the partition writer stopped".into(),
                })
            }
        }
    }

    /// Writes every open partition and waits for all writes to finish.
    fn finish(&mut self) -> Result<(), StoreError> {
        let months: Vec<i32> = self.open.keys().copied().collect();
        for m in months {
            self.write(m)?;
        }
        self.jobs = None;
        while let Some(&m) = self.pending.iter().next() {
            self.drain(Some(m))?;
            if self.pending.contains(&m) {
                return Err(StoreError::Refused {
                    path: self.store.to_path_buf(),
                    message: "the partition writer stopped before finishing".into(),
                });
            }
        }
        Ok(())
    }

    /// Writes and drops partitions no recent file touched, keeping memory bounded on long runs.
    fn evict(&mut self, file_seq: usize) -> Result<(), StoreError> {
        let stale: Vec<i32> = self
            .open
            .iter()
            .filter(|(_, p)| p.last_touched + 2 <= file_seq)
            .map(|(m, _)| *m)
            .collect();
        for m in stale {
            self.write(m)?;
        }
        self.drain(None)
    }
}

fn mismatch(store: &Path, message: String) -> LinkError {
    LinkError::Mismatch {
        store: store.to_path_buf(),
        message,
    }
}

/// Links extract files into the store: incremental (files already in the ledger are skipped)
/// and atomic (the manifest is replaced last). `on_file` is called as each file is merged.
pub fn link(
    inputs: &Inputs<'_>,
    opts: &Options,
    files: &[PathBuf],
    mut on_file: impl FnMut(&FileResult),
) -> Result<Report, LinkError> {
    let source = Source::new(inputs.profile, inputs.analytes)?;
    let site = inputs.profile.site.label.clone();
    let fingerprint = inputs.key.fingerprint();
    let analyte_ids: Vec<String> = source.analyte_ids().to_vec();
    let tag_names: Vec<String> = inputs
        .tags
        .names()
        .into_iter()
        .map(str::to_string)
        .collect();
    let store = opts.store.as_path();
    let io = |path: &Path| {
        let path = path.to_path_buf();
        move |source| LinkError::Io { path, source }
    };
    std::fs::create_dir_all(store.join("results")).map_err(io(store))?;
    std::fs::create_dir_all(&opts.quarantine).map_err(io(&opts.quarantine))?;

    let manifest = match Manifest::load(store)? {
        Some(m) => {
            if m.key_fingerprint != fingerprint {
                return Err(mismatch(
                    store,
                    format!(
                        "was made with the key of fingerprint {} but this key's is {fingerprint}; use the store's own key",
                        m.key_fingerprint
                    ),
                ));
            }
            if m.site != site {
                return Err(mismatch(
                    store,
                    format!("belongs to site {:?}, the profile is for {site:?}", m.site),
                ));
            }
            if m.tag_names != tag_names || m.tags_sha256 != inputs.tags.sha256 {
                return Err(mismatch(
                    store,
                    "was built with another tag dictionary; link into a new store to change tags"
                        .into(),
                ));
            }
            if m.analyte_ids != analyte_ids {
                return Err(mismatch(
                    store,
                    "was built with another analyte table; link into a new store to change analytes".into(),
                ));
            }
            if m.keep_area != opts.keep_area {
                return Err(mismatch(
                    store,
                    format!(
                        "was built with keep_area = {}; use the same setting",
                        m.keep_area
                    ),
                ));
            }
            m
        }
        None => Manifest {
            schema_version: store::SCHEMA_VERSION,
            tool_version: env!("CARGO_PKG_VERSION").to_string(),
            site: site.clone(),
            key_fingerprint: fingerprint.clone(),
            analytes_sha256: inputs.analytes.sha256.clone(),
            analyte_ids: analyte_ids.clone(),
            tags_sha256: inputs.tags.sha256.clone(),
            tag_names: tag_names.clone(),
            keep_area: opts.keep_area,
            generation: 0,
            ledger: Vec::new(),
            totals: Accounting::default(),
            current_rows: 0,
            partitions: Vec::new(),
        },
    };
    // Remove what an interrupted run may have left: files the manifest does not name.
    let named: HashSet<String> = manifest.partitions.iter().map(|p| p.file.clone()).collect();
    for e in std::fs::read_dir(store.join("results")).map_err(io(store))? {
        let e = e.map_err(io(store))?;
        let rel = format!("results/{}", e.file_name().to_string_lossy());
        if !named.contains(&rel) {
            let _ = std::fs::remove_file(e.path());
        }
    }
    // Three stages overlap: worker threads parse the next files, this thread merges, and a writer
    // thread writes partitions that are no longer touched. Channels are bounded so memory is too.
    let chunk = rayon::current_num_threads().max(1);
    let ledger: HashSet<String> = manifest.ledger.iter().map(|l| l.sha256.clone()).collect();
    let ledger = &ledger;
    std::thread::scope(|scope| {
        let (parsed_tx, parsed_rx) =
            std::sync::mpsc::sync_channel::<Result<Parsed, LinkError>>(chunk);
        let source = &source;
        let site = &site;
        scope.spawn(move || {
            for group in files.chunks(chunk) {
                let parsed: Vec<Result<Parsed, LinkError>> = group
                    .par_iter()
                    .map(|p| parse_file(p, source, inputs, site, opts.keep_area, ledger))
                    .collect();
                for p in parsed {
                    if parsed_tx.send(p).is_err() {
                        return;
                    }
                }
            }
        });
        let (jobs_tx, jobs_rx) = std::sync::mpsc::sync_channel::<WriteJob>(2);
        let (done_tx, done_rx) = std::sync::mpsc::channel();
        scope.spawn(move || {
            for job in jobs_rx {
                if done_tx.send(job.run()).is_err() {
                    return;
                }
            }
        });
        let mut state = State {
            store,
            generation: manifest.generation + 1,
            files: manifest
                .partitions
                .iter()
                .map(|p| {
                    let (y, m) = (
                        p.month[..4].parse::<i32>().unwrap_or(0),
                        p.month[5..].parse::<i32>().unwrap_or(1),
                    );
                    (y * 12 + m - 1, p.clone())
                })
                .collect(),
            manifest,
            open: BTreeMap::new(),
            strings: Strings::default(),
            schema_ids: analyte_ids,
            tag_names,
            keep_area: opts.keep_area,
            jobs: Some(jobs_tx),
            done: done_rx,
            pending: HashSet::new(),
        };
        let mut known: HashSet<String> = state
            .manifest
            .ledger
            .iter()
            .map(|l| l.sha256.clone())
            .collect();
        let mut results = Vec::new();
        let mut hashed = 0;
        let mut seq = 0usize;
        let profile = std::env::var_os("SLUICE_PROFILE").is_some();
        let (mut t_wait, mut t_merge, mut t_evict) = (0.0, 0.0, 0.0);
        {
            let mut waited = std::time::Instant::now();
            for p in parsed_rx {
                t_wait += waited.elapsed().as_secs_f64();
                let p = p?;
                seq += 1;
                if p.known || !known.insert(p.sha256.clone()) {
                    let r = FileResult {
                        file: p.path.clone(),
                        skipped: true,
                        accounting: Accounting::default(),
                    };
                    on_file(&r);
                    results.push(r);
                    waited = std::time::Instant::now();
                    continue;
                }
                hashed = hashed.max(p.hashed);
                let t1 = std::time::Instant::now();
                let acc = merge_file(&mut state, p, seq, &opts.quarantine, inputs)?;
                t_merge += t1.elapsed().as_secs_f64();
                on_file(&acc);
                results.push(acc);
                let t2 = std::time::Instant::now();
                state.evict(seq)?;
                t_evict += t2.elapsed().as_secs_f64();
                waited = std::time::Instant::now();
            }
        }
        let changed = results.iter().any(|r| !r.skipped);
        // A parser thread that died (a bug, not bad input) would end the stream early; never
        // commit a run that did not see every file it was given.
        if seq != files.len() {
            return Err(LinkError::Accounting(format!(
                "only {seq} of {} files came back from the parser",
                files.len()
            )));
        }
        let t3 = std::time::Instant::now();
        state.finish()?;
        if profile {
            eprintln!(
                "profile: waiting for parsed files {t_wait:.2}s, merging {t_merge:.2}s, evicting {t_evict:.2}s, final writes {:.2}s",
                t3.elapsed().as_secs_f64()
            );
        }
        if changed {
            let old: Vec<String> = state
                .manifest
                .partitions
                .iter()
                .map(|p| p.file.clone())
                .collect();
            let mut m = state.manifest.clone();
            m.generation = state.generation;
            m.tool_version = env!("CARGO_PKG_VERSION").to_string();
            m.partitions = state.files.values().cloned().collect();
            m.current_rows = m.partitions.iter().map(|p| p.current).sum();
            let t = &m.totals;
            if t.rows != m.current_rows + t.superseded + t.quarantined + t.duplicate + t.cancelled {
                return Err(LinkError::Accounting(format!(
                    "rows {} != current {} + superseded {} + quarantined {} + duplicate {} + cancelled {}",
                    t.rows, m.current_rows, t.superseded, t.quarantined, t.duplicate, t.cancelled
                )));
            }
            m.save(store)?;
            let now: HashSet<&String> = m.partitions.iter().map(|p| &p.file).collect();
            for f in old {
                if !now.contains(&f) {
                    let _ = std::fs::remove_file(store.join(f));
                }
            }
            state.manifest = m;
        }
        Ok(Report {
            files: results,
            totals: state.manifest.totals.clone(),
            current_rows: state.manifest.current_rows,
            distinct_patients_hashed: hashed,
        })
    })
}

fn merge_file(
    state: &mut State<'_>,
    p: Parsed,
    seq: usize,
    quarantine_dir: &Path,
    inputs: &Inputs<'_>,
) -> Result<FileResult, LinkError> {
    let file_index = state.manifest.ledger.len() as u32;
    // Map the worker's interned strings into the store's table.
    let remap: Vec<u32> = p
        .strings
        .values
        .iter()
        .map(|s| state.strings.intern(s))
        .collect();
    let map = |i: u32| if i == u32::MAX { i } else { remap[i as usize] };
    let mut acc = Accounting {
        rows: p.rows_read,
        ..Default::default()
    };
    let mut quarantined = p.quarantined;
    let mut last_day = (i64::MIN, 0);
    for inc in p.rows {
        let mut row = inc.row;
        row.text = map(row.text);
        row.practice = map(row.practice);
        row.area = map(row.area);
        row.source_file = file_index;
        let day = row.collected.div_euclid(1440);
        if day != last_day.0 {
            last_day = (day, store::month_of(row.collected));
        }
        let month = last_day.1;
        let part = state.partition(month)?;
        part.last_touched = seq;
        match part.merge(row) {
            Outcome::Stored { replaced_current } => {
                acc.stored += 1;
                acc.superseded += u64::from(replaced_current);
            }
            Outcome::Duplicate => acc.duplicate += 1,
            Outcome::Cancelled { replaced_current } => {
                acc.cancelled += 1;
                acc.superseded += u64::from(replaced_current);
            }
            Outcome::Older => acc.superseded += 1,
            Outcome::PatientConflict => quarantined.push(Quarantined {
                line: inc.line,
                field: "specimen_id".into(),
                reason: "specimen already stored for a different patient".into(),
                raw: p.text.as_bytes()[inc.span.0..inc.span.1].to_vec(),
            }),
        }
    }
    acc.quarantined = quarantined.len() as u64;
    let quarantine_file = if quarantined.is_empty() {
        None
    } else {
        quarantined.sort_by_key(|q| q.line);
        let name = format!("{}.{}.quarantine.csv", p.name, &p.sha256[..12]);
        let path = quarantine_dir.join(&name);
        write_quarantine(&path, &p.name, &quarantined).map_err(|source| LinkError::Io {
            path: path.clone(),
            source,
        })?;
        Some(path.display().to_string())
    };
    state.manifest.totals.add(&acc);
    state.manifest.ledger.push(LedgerEntry {
        file: p.name.clone(),
        sha256: p.sha256,
        profile_sha256: inputs.profile.sha256.clone(),
        ingested_at: chrono::Utc::now().format("%Y-%m-%dT%H:%M:%SZ").to_string(),
        accounting: acc.clone(),
        quarantine_file,
    });
    Ok(FileResult {
        file: p.path,
        skipped: false,
        accounting: acc,
    })
}

fn write_quarantine(path: &Path, file: &str, q: &[Quarantined]) -> std::io::Result<()> {
    let tmp = path.with_extension("tmp");
    {
        let mut w = csv::Writer::from_path(&tmp)?;
        w.write_record(["file", "line", "field", "reason", "raw"])?;
        for e in q {
            w.write_record([
                file.as_bytes(),
                e.line.to_string().as_bytes(),
                e.field.as_bytes(),
                e.reason.as_bytes(),
                &e.raw,
            ])?;
        }
        w.flush()?;
    }
    std::fs::rename(&tmp, path)
}

#[cfg(test)]
mod tests {
    use super::age_years;

    fn day(y: i32, m: u32, d: u32) -> i64 {
        i64::from(chrono::Datelike::num_days_from_ce(
            &chrono::NaiveDate::from_ymd_opt(y, m, d).unwrap(),
        )) - 719_163
    }

    #[test]
    fn whole_years_turn_on_the_birthday() {
        assert_eq!(age_years(day(1960, 5, 1), day(2024, 4, 30)), 63);
        assert_eq!(age_years(day(1960, 5, 1), day(2024, 5, 1)), 64);
        // Born on 29 February: a year is complete on 1 March in common years.
        assert_eq!(age_years(day(2000, 2, 29), day(2023, 2, 28)), 22);
        assert_eq!(age_years(day(2000, 2, 29), day(2023, 3, 1)), 23);
        assert_eq!(age_years(day(2024, 1, 2), day(2024, 1, 1)), -1);
    }
}
