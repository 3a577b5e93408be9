//! The measure stage: runs a study policy over the linked store, inside the secure area.
//!
//! It writes patient-level tables (Parquet, under `<work>/patients/`, never released) and the
//! aggregate candidates (`<work>/candidates.json`) that `sluice release` puts through disclosure
//! control. Nothing here decides what may leave the machine.

pub mod cohort;
pub mod events;
pub mod load;
pub mod policy;
pub mod results;

use polars::prelude::*;
use sluice_aggregate::{Candidates, Input, Provenance, Role, Table, col, dim};
use std::path::{Path, PathBuf};
use std::time::Instant;

pub use policy::Study;

#[derive(Debug, thiserror::Error)]
pub enum MeasureError {
    #[error(transparent)]
    Policy(#[from] sluice_policy::PolicyError),
    #[error("store: {0}")]
    Store(String),
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: {source}")]
    Polars { path: PathBuf, source: PolarsError },
    #[error("empty cohort: {message} (policy key `{key}`)")]
    EmptyCohort { key: String, message: String },
    #[error(transparent)]
    Aggregate(#[from] sluice_aggregate::AggregateError),
}

pub struct Options<'a> {
    pub study: &'a Path,
    pub policies: &'a Path,
    pub store: &'a Path,
    pub work: &'a Path,
}

/// What a run produced, for the command's summary.
#[derive(Debug)]
pub struct Outcome {
    pub study: String,
    pub candidates: PathBuf,
    pub tables: Vec<(String, usize)>,
    pub patient_files: Vec<PathBuf>,
    pub cohort_size: Option<usize>,
    pub rows_read: usize,
    pub timings: Vec<(&'static str, f64)>,
}

pub(crate) fn patients_col() -> sluice_aggregate::Column {
    col(
        "n_patients",
        Role::Patients,
        "distinct patients contributing to the row",
    )
}

/// A table of patient counts over the given dimensions.
pub(crate) fn counts_table(name: &str, title: &str, description: &str, dims: &[&str]) -> Table {
    let mut cols: Vec<_> = dims.iter().map(|d| dim(d, "")).collect();
    cols.push(patients_col());
    Table::new(name, title, description, cols)
}

/// Two-sided standard normal quantile for a confidence level.
pub(crate) fn z(level: f64) -> f64 {
    use statrs::distribution::{ContinuousCDF, Normal};
    Normal::new(0.0, 1.0)
        .expect("standard normal")
        .inverse_cdf(0.5 + level / 2.0)
}

pub fn measure(opts: &Options<'_>) -> Result<Outcome, MeasureError> {
    let t0 = Instant::now();
    let mut timings = Vec::new();
    let mut lap = |name: &'static str, t: &mut Instant| {
        timings.push((name, t.elapsed().as_secs_f64()));
        *t = Instant::now();
    };
    let mut t = Instant::now();
    let store = load::StoreFiles::open(opts.store)?;
    let study = Study::load(
        opts.study,
        opts.policies,
        &policy::Known {
            tags: &store.manifest.tag_names,
            analytes: &store.manifest.analyte_ids,
        },
    )?;
    std::fs::create_dir_all(opts.work.join("patients")).map_err(|source| MeasureError::Io {
        path: opts.work.to_path_buf(),
        source,
    })?;

    // Analytes read: the study's, then any other with a critical limit.
    let mut ids: Vec<String> = study.analytes.iter().map(|a| a.id.clone()).collect();
    if let Some(c) = &study.critical {
        for a in c.limits.keys() {
            if !ids.contains(a) {
                ids.push(a.clone());
            }
        }
    }
    let span = if study.windows.is_empty() {
        (i64::MIN, i64::MAX)
    } else {
        (
            study.windows[0].from_day * 1440,
            study.windows[study.windows.len() - 1].to_day * 1440,
        )
    };

    let mut tables = Vec::new();
    let mut patient_files = Vec::new();
    let (cohort, rows) = match &study.cohort {
        Some(c) => {
            let last = study.windows[study.windows.len() - 1].to_day;
            let tagged = load::tagged(
                &store.files,
                &load::TagQuery {
                    marker: &c.marker_tag,
                    drugs: &c.drug_tags,
                    exclude: &c.exclude_tags,
                    exclude_span: (c.exclude_from_day * 1440, last * 1440),
                },
            )?;
            lap("tags", &mut t);
            let cohort = cohort::build(&study, &tagged)?;
            let set = cohort.members.iter().map(|m| m.patient).collect();
            let rows = load::results(
                &store.files,
                &load::ResultQuery {
                    analytes: &ids,
                    patients: Some(&set),
                    span,
                    marker: Some(&c.marker_tag),
                    drugs: &c.drug_tags,
                },
            )?;
            lap("results", &mut t);
            tables.push(cohort.flow.clone());
            tables.extend(cohort::interval_tables(&study, &cohort)?);
            patient_files.push(write_cohort(opts.work, &study, &cohort)?);
            (Some(cohort), rows)
        }
        None => {
            let rows = load::results(
                &store.files,
                &load::ResultQuery {
                    analytes: &ids,
                    patients: None,
                    span,
                    marker: None,
                    drugs: &[],
                },
            )?;
            lap("results", &mut t);
            (None, rows)
        }
    };
    let members = cohort.as_ref().map(|c| c.members.as_slice());
    let ctx = results::Rows::new(&study, &rows, members);
    tables.extend(results::distributions(&ctx)?);
    lap("distributions", &mut t);
    if let (Some(w), Some(ms)) = (results::worst(&ctx), members) {
        tables.extend(results::worst_tables(&ctx, &w, ms)?);
        patient_files.push(write_worst(opts.work, &study, &w)?);
    }
    let crit = events::critical_events(&study, &rows, &ids);
    tables.extend(events::critical_tables(&ctx, &crit, members)?);
    if study.critical.is_some() {
        patient_files.push(write_critical(opts.work, &study, &ids, &crit)?);
    }
    if let Some(ms) = members {
        let trips = events::travel(&study, ms, &rows);
        tables.extend(events::travel_tables(&study, ms, &trips));
        if study.travel.is_some() {
            patient_files.push(write_travel(opts.work, &trips)?);
        }
    }
    tables.extend(results::flags(&ctx)?);
    lap("analyses", &mut t);

    let mut inputs = vec![Input {
        role: "study".into(),
        path: display(&study.path),
        sha256: study.sha256.clone(),
    }];
    inputs.extend(study.references.iter().map(|r| Input {
        role: r.role.clone(),
        path: display(&r.path),
        sha256: r.sha256.clone(),
    }));
    let m = &store.manifest;
    let candidates = Candidates {
        schema_version: sluice_aggregate::SCHEMA_VERSION,
        provenance: Provenance {
            study: study.name.clone(),
            study_title: study.title.clone(),
            site: m.site.clone(),
            key_fingerprint: m.key_fingerprint.clone(),
            store_manifest_sha256: store.manifest_sha256.clone(),
            store_generation: m.generation,
            tool_version: env!("CARGO_PKG_VERSION").to_string(),
            inputs,
            made_by: String::new(),
        },
        tables,
        populations: populations(members),
        store: display(opts.store),
    };
    for t in &candidates.tables {
        t.validate()?;
    }
    let path = candidates.save(opts.work)?;
    lap("write", &mut t);
    timings.push(("total", t0.elapsed().as_secs_f64()));
    Ok(Outcome {
        study: study.name.clone(),
        candidates: path,
        tables: candidates
            .tables
            .iter()
            .map(|t| (t.name.clone(), t.rows.len()))
            .collect(),
        patient_files,
        cohort_size: cohort.as_ref().map(|c| c.members.len()),
        rows_read: rows.len(),
        timings,
    })
}

/// The cohort (`all`) and each subgroup as sorted pseudonyms.
fn populations(members: Option<&[cohort::Member]>) -> std::collections::BTreeMap<String, Vec<u64>> {
    let mut out: std::collections::BTreeMap<String, Vec<u64>> = Default::default();
    for m in members.unwrap_or_default() {
        for g in &m.subgroups {
            out.entry(g.clone()).or_default().push(m.patient);
        }
    }
    for v in out.values_mut() {
        v.sort_unstable();
        v.dedup();
    }
    out
}

fn display(p: &Path) -> String {
    p.to_string_lossy().into_owned()
}

fn write_parquet(work: &Path, name: &str, mut df: DataFrame) -> Result<PathBuf, MeasureError> {
    let path = work.join("patients").join(format!("{name}.parquet"));
    let pe = |source: PolarsError| MeasureError::Polars {
        path: path.clone(),
        source,
    };
    let file = std::fs::File::create(&path).map_err(|source| MeasureError::Io {
        path: path.clone(),
        source,
    })?;
    ParquetWriter::new(file).finish(&mut df).map_err(pe)?;
    Ok(path)
}

fn frame(path: &str, cols: Vec<Column>) -> Result<DataFrame, MeasureError> {
    DataFrame::new_infer_height(cols).map_err(|source| MeasureError::Polars {
        path: PathBuf::from(path),
        source,
    })
}

fn write_cohort(work: &Path, study: &Study, c: &cohort::Cohort) -> Result<PathBuf, MeasureError> {
    let ms = &c.members;
    let mut cols = vec![
        Column::new(
            "patient".into(),
            ms.iter().map(|m| m.patient).collect::<Vec<_>>(),
        ),
        Column::new(
            "first_event_day".into(),
            ms.iter()
                .map(|m| m.event_days[0] as i32)
                .collect::<Vec<_>>(),
        ),
        Column::new(
            "events".into(),
            ms.iter()
                .map(|m| m.event_days.len() as u32)
                .collect::<Vec<_>>(),
        ),
        Column::new(
            "subgroups".into(),
            ms.iter().map(|m| m.subgroups.join(",")).collect::<Vec<_>>(),
        ),
    ];
    for (wi, w) in study.windows.iter().enumerate() {
        cols.push(Column::new(
            format!("{}_events", w.name).into(),
            ms.iter().map(|m| m.windows[wi].events).collect::<Vec<_>>(),
        ));
        cols.push(Column::new(
            format!("{}_mean_interval", w.name).into(),
            ms.iter().map(|m| m.windows[wi].mean).collect::<Vec<_>>(),
        ));
        cols.push(Column::new(
            format!("{}_median_interval", w.name).into(),
            ms.iter().map(|m| m.windows[wi].median).collect::<Vec<_>>(),
        ));
        cols.push(Column::new(
            format!("{}_band", w.name).into(),
            ms.iter()
                .map(|m| m.windows[wi].band.clone())
                .collect::<Vec<_>>(),
        ));
    }
    write_parquet(work, "cohort", frame("cohort", cols)?)?;
    let iv = &c.intervals;
    let cols = vec![
        Column::new("patient".into(), iv.iter().map(|x| x.0).collect::<Vec<_>>()),
        Column::new(
            "from_day".into(),
            iv.iter().map(|x| x.1 as i32).collect::<Vec<_>>(),
        ),
        Column::new(
            "to_day".into(),
            iv.iter().map(|x| x.2 as i32).collect::<Vec<_>>(),
        ),
        Column::new(
            "days".into(),
            iv.iter().map(|x| x.3 as i32).collect::<Vec<_>>(),
        ),
        Column::new(
            "window".into(),
            iv.iter()
                .map(|x| study.window_of(x.2).map(|w| study.windows[w].name.clone()))
                .collect::<Vec<_>>(),
        ),
    ];
    write_parquet(work, "intervals", frame("intervals", cols)?)?;
    Ok(work.join("patients").join("cohort.parquet"))
}

fn write_worst(work: &Path, study: &Study, w: &results::Worst) -> Result<PathBuf, MeasureError> {
    let v: Vec<_> = w.values.iter().collect();
    let cols = vec![
        Column::new(
            "patient".into(),
            v.iter().map(|x| x.0.0).collect::<Vec<_>>(),
        ),
        Column::new(
            "analyte".into(),
            v.iter()
                .map(|x| study.analytes[x.0.1 as usize].id.clone())
                .collect::<Vec<_>>(),
        ),
        Column::new(
            "window".into(),
            v.iter()
                .map(|x| study.windows[x.0.2].name.clone())
                .collect::<Vec<_>>(),
        ),
        Column::new("worst".into(), v.iter().map(|x| *x.1).collect::<Vec<_>>()),
    ];
    write_parquet(work, "worst", frame("worst", cols)?)
}

fn write_critical(
    work: &Path,
    study: &Study,
    ids: &[String],
    e: &[events::CriticalEvent],
) -> Result<PathBuf, MeasureError> {
    let cols = vec![
        Column::new(
            "patient".into(),
            e.iter().map(|x| x.patient).collect::<Vec<_>>(),
        ),
        Column::new(
            "day".into(),
            e.iter()
                .map(|x| cohort::day(x.minute) as i32)
                .collect::<Vec<_>>(),
        ),
        Column::new(
            "window".into(),
            e.iter()
                .map(|x| {
                    study
                        .window_of(cohort::day(x.minute))
                        .map(|w| study.windows[w].name.clone())
                })
                .collect::<Vec<_>>(),
        ),
        Column::new(
            "analyte".into(),
            e.iter()
                .map(|x| ids[x.analyte as usize].clone())
                .collect::<Vec<_>>(),
        ),
        Column::new(
            "value".into(),
            e.iter().map(|x| x.value).collect::<Vec<_>>(),
        ),
        Column::new(
            "setting".into(),
            e.iter()
                .map(|x| load::SETTINGS[x.setting as usize])
                .collect::<Vec<_>>(),
        ),
        Column::new(
            "monitoring".into(),
            e.iter().map(|x| x.monitoring).collect::<Vec<_>>(),
        ),
    ];
    write_parquet(work, "critical", frame("critical", cols)?)
}

fn write_travel(work: &Path, t: &[events::Trip]) -> Result<PathBuf, MeasureError> {
    let cols = vec![
        Column::new(
            "patient".into(),
            t.iter().map(|x| x.patient).collect::<Vec<_>>(),
        ),
        Column::new(
            "distance_km".into(),
            t.iter().map(|x| x.distance_km).collect::<Vec<_>>(),
        ),
        Column::new(
            "round_trip_miles".into(),
            t.iter().map(|x| x.round_trip_miles).collect::<Vec<_>>(),
        ),
        Column::new(
            "tests_per_year".into(),
            t.iter().map(|x| x.tests_per_year).collect::<Vec<_>>(),
        ),
        Column::new(
            "trips_saved".into(),
            t.iter().map(|x| x.trips_saved).collect::<Vec<_>>(),
        ),
        Column::new(
            "miles_saved".into(),
            t.iter().map(|x| x.miles_saved).collect::<Vec<_>>(),
        ),
        Column::new(
            "kg_co2e_saved".into(),
            t.iter().map(|x| x.kg_co2e_saved).collect::<Vec<_>>(),
        ),
    ];
    write_parquet(work, "travel", frame("travel", cols)?)
}
