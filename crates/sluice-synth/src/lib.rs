//! Synthetic monthly laboratory extracts for an invented region, with the ground truth planted in
//! them written beside the data.
//!
//! The generator is deterministic for a seed, writes each month's extract in any site's layout
//! (it renders through the same site profile the linker reads with), and streams month by month so
//! memory stays bounded however long the history. What it plants, and why, is described on
//! [`Config`] and in the README; the truth files list every planted patient group, monitoring
//! request and critical value, and per file the rows the linker must store, quarantine (with the
//! reason), drop as duplicates or cancellations, or mark superseded.

pub mod emit;
pub mod layout;
pub mod model;
pub mod population;
pub mod region;
pub mod text;

use chrono::{Datelike, NaiveDate};
use emit::{FileTruth, MonthRows};
use layout::Layout;
use population::{Group, Patient, Plan};
use rand::SeedableRng;
use rand_pcg::Pcg64Mcg;
use rayon::prelude::*;
use region::Region;
use serde::Serialize;
use sluice_policy::{AnalyteTable, Profile};
use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};

#[derive(Debug, thiserror::Error)]
pub enum SynthError {
    #[error(transparent)]
    Layout(#[from] layout::LayoutError),
    #[error("cannot write {path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("invalid synth setting {key}: {message}")]
    Config { key: &'static str, message: String },
}

/// Probabilities of planted faults and events.
#[derive(Clone, Debug, Serialize)]
pub struct Rates {
    /// Per background specimen: NHS number with a wrong check digit.
    pub bad_nhs: f64,
    /// Per background specimen: blank NHS number (70 % of them keep the local identifier).
    pub blank_nhs: f64,
    /// Per background result row: a malformed row (bad date, short row, unknown code or unit).
    pub row_fault: f64,
    /// Per background result row: a text result ("HAEMOLYSED", "CLOTTED").
    pub text_result: f64,
    /// Per numeric result row: a later amended version.
    pub amended: f64,
    /// Per specimen: one extra requested test that was cancelled.
    pub cancelled: f64,
    pub critical_emergency: f64,
    pub critical_inpatient: f64,
    pub critical_routine: f64,
    pub critical_monitoring: f64,
}

impl Default for Rates {
    fn default() -> Self {
        Self {
            bad_nhs: 0.002,
            blank_nhs: 0.002,
            row_fault: 0.0005,
            text_result: 0.004,
            amended: 0.003,
            cancelled: 0.01,
            critical_emergency: 0.03,
            critical_inpatient: 0.015,
            critical_routine: 0.001,
            critical_monitoring: 0.003,
        }
    }
}

#[derive(Clone, Debug, Serialize)]
pub struct Config {
    pub seed: u64,
    pub patients: u32,
    pub months: u32,
    /// First day of the first month.
    #[serde(serialize_with = "iso_date")]
    pub start: NaiveDate,
    /// The testing-policy change: stable patients move to their "after" schedule from here.
    #[serde(serialize_with = "iso_date")]
    pub policy_change: NaiveDate,
    /// Approximate number of rows to write; sets the background request rate.
    pub rows: Option<u64>,
    /// Share of patients on methotrexate.
    pub mtx_share: f64,
    /// Each monthly file repeats the last days of the month before.
    pub overlap_days: u32,
    pub faults: Rates,
}

impl Config {
    pub fn new(seed: u64, patients: u32, months: u32, start: NaiveDate) -> Self {
        Self {
            seed,
            patients,
            months,
            start,
            policy_change: add_months(start, months.saturating_sub(12)),
            rows: None,
            mtx_share: 0.04,
            overlap_days: 3,
            faults: Rates::default(),
        }
    }
}

fn iso_date<S: serde::Serializer>(d: &NaiveDate, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_str(&d.format("%Y-%m-%d").to_string())
}

pub fn add_months(d: NaiveDate, months: u32) -> NaiveDate {
    let total = d.year() * 12 + d.month0() as i32 + months as i32;
    NaiveDate::from_ymd_opt(total.div_euclid(12), total.rem_euclid(12) as u32 + 1, 1)
        .expect("valid month")
}

fn day_number(d: NaiveDate) -> i64 {
    i64::from(d.num_days_from_ce()) - 719_163
}

/// Everything the month writers share.
pub struct Synth {
    pub cfg: Config,
    pub profile: Profile,
    pub layout: Layout,
    pub region: Region,
    pub patients: Vec<Patient>,
    pub background_rate: f64,
    month_days: Vec<i64>,
}

impl Synth {
    pub fn month_start_day(&self, m: u32) -> i64 {
        self.month_days[m as usize]
    }
    pub fn file_name(&self, m: u32) -> String {
        let d = add_months(self.cfg.start, m);
        format!(
            "{}-{:04}-{:02}.csv",
            self.profile.site.label,
            d.year(),
            d.month()
        )
    }
}

/// What a run wrote, with the counts the tests compare the linker and the studies against.
#[derive(Debug, Serialize)]
pub struct Summary {
    pub config: Config,
    pub site: String,
    pub profile_sha256: String,
    pub files: Vec<FileTruth>,
    pub totals: FileTruth,
    /// rows − quarantined − duplicate − cancelled − superseded: what the store must hold.
    pub expected_stored: u64,
    pub patients_by_group: BTreeMap<String, u64>,
    /// Long-term stable patients by (before → after) schedule.
    pub stable_transitions: BTreeMap<String, u64>,
    pub critical_rows: u64,
    pub monitoring_specimens: u64,
}

/// A planted critical value as written (first copy only).
#[derive(Debug, Serialize)]
struct CriticalTruth<'a> {
    nhs_number: String,
    specimen_id: String,
    collected_minute: i64,
    setting: &'a str,
    analyte: &'a str,
    value: f64,
    monitoring: bool,
}

fn io(path: &Path) -> impl FnOnce(std::io::Error) -> SynthError + '_ {
    move |source| SynthError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// Writes bytes to `path` through a temporary file and a rename, so a crash leaves no half file.
fn write_atomic(
    path: &Path,
    f: impl FnOnce(&mut dyn Write) -> std::io::Result<()>,
) -> Result<(), SynthError> {
    let tmp = path.with_extension("partial");
    let file = std::fs::File::create(&tmp).map_err(io(&tmp))?;
    let mut w = std::io::BufWriter::with_capacity(1 << 20, file);
    f(&mut w).map_err(io(&tmp))?;
    w.flush().map_err(io(&tmp))?;
    drop(w);
    std::fs::rename(&tmp, path).map_err(io(path))
}

/// Generates the extracts, reference tables and ground truth into `out`:
/// `extracts/`, `reference/practices.csv`, `reference/postcodes.csv` and `truth/`.
pub fn run(
    cfg: Config,
    profile: Profile,
    analytes: &AnalyteTable,
    out: &Path,
    mut on_file: impl FnMut(&FileTruth) + Send,
) -> Result<Summary, SynthError> {
    if cfg.patients == 0 || cfg.patients > 4_000_000 {
        return Err(SynthError::Config {
            key: "patients",
            message: format!("must be between 1 and 4,000,000, got {}", cfg.patients),
        });
    }
    if cfg.months < 13 || cfg.months > 240 {
        return Err(SynthError::Config {
            key: "months",
            message: format!("must be between 13 and 240, got {}", cfg.months),
        });
    }
    if !(0.0..=1.0).contains(&cfg.mtx_share) {
        return Err(SynthError::Config {
            key: "mtx-share",
            message: format!("must be between 0 and 1, got {}", cfg.mtx_share),
        });
    }
    let layout = Layout::new(&profile, analytes)?;
    let month_days: Vec<i64> = (0..=cfg.months)
        .map(|m| day_number(add_months(cfg.start, m)))
        .collect();
    let plan = Plan {
        start_day: month_days[0],
        end_day: month_days[cfg.months as usize],
        change_day: day_number(cfg.policy_change),
        baseline_day: day_number(add_months(cfg.policy_change, 0)) - 365,
    };
    if plan.change_day - 365 < plan.start_day + 120 || plan.change_day + 365 > plan.end_day {
        return Err(SynthError::Config {
            key: "policy-change",
            message: format!(
                "{} must leave at least 16 months of history before it and 12 after",
                cfg.policy_change
            ),
        });
    }
    let mut rng = Pcg64Mcg::seed_from_u64(cfg.seed);
    let region = Region::generate(
        &mut rng,
        (cfg.patients as usize / 20).max(200),
        (cfg.patients as usize / 4000).max(8),
    );
    let patients = population::generate(
        &mut rng,
        &region,
        cfg.patients as usize,
        cfg.mtx_share,
        &plan,
    );

    // Scale the background request rate so the run writes about the rows asked for.
    let monitoring_rows: f64 = patients
        .iter()
        .filter_map(|p| p.mtx.as_ref())
        .map(|m| (m.days.len() * model::MONITORING.len()) as f64)
        .sum();
    let rows_per_specimen =
        0.7 * model::mean_panel_rows(false) + 0.3 * model::mean_panel_rows(true);
    let patient_months = f64::from(cfg.patients) * f64::from(cfg.months);
    let repeat = 1.0 + f64::from(cfg.overlap_days) / 30.44;
    let background_rate = match cfg.rows {
        None => 0.5,
        Some(target) => ((target as f64 / repeat - monitoring_rows)
            / (patient_months * rows_per_specimen))
            .max(0.0),
    };

    for d in ["extracts", "reference", "truth"] {
        std::fs::create_dir_all(out.join(d)).map_err(io(&out.join(d)))?;
    }
    let synth = Synth {
        cfg,
        profile,
        layout,
        region,
        patients,
        background_rate,
        month_days,
    };
    let s = &synth;
    write_atomic(&out.join("reference/practices.csv"), |w| {
        w.write_all(s.region.practices_csv().as_bytes())
    })?;
    write_atomic(&out.join("reference/postcodes.csv"), |w| {
        w.write_all(s.region.postcodes_csv().as_bytes())
    })?;

    // Months are generated in batches across threads; each file needs its own month and the one
    // before (for the overlapping re-export and late reports), so a batch carries its last month.
    let batch = (rayon::current_num_threads() * 2).max(2) as u32;
    let mut files = Vec::new();
    let mut criticals = Vec::new();
    let mut carried: Option<MonthRows> = None;
    let mut m0 = 0;
    while m0 < s.cfg.months {
        let m1 = (m0 + batch).min(s.cfg.months);
        let generated: Vec<MonthRows> = (m0..m1)
            .into_par_iter()
            .map(|m| emit::month_rows(s, m))
            .collect();
        let results: Vec<Result<(FileTruth, Vec<String>), SynthError>> = (m0..m1)
            .into_par_iter()
            .map(|m| {
                let i = (m - m0) as usize;
                let prev = if i == 0 {
                    carried.as_ref()
                } else {
                    Some(&generated[i - 1])
                };
                let path = out.join("extracts").join(s.file_name(m));
                let mut truth = None;
                write_atomic(&path, |w| {
                    truth = Some(emit::write_file(s, m, prev, &generated[i], w)?);
                    Ok(())
                })?;
                Ok((
                    truth.expect("written"),
                    critical_lines(s, m, prev, &generated[i]),
                ))
            })
            .collect();
        for r in results {
            let (t, c) = r?;
            on_file(&t);
            files.push(t);
            criticals.extend(c);
        }
        carried = generated.into_iter().last();
        m0 = m1;
    }

    let mut totals = FileTruth {
        file: "all".into(),
        ..Default::default()
    };
    for f in &files {
        totals.rows += f.rows;
        totals.duplicate += f.duplicate;
        totals.cancelled += f.cancelled;
        totals.superseded += f.superseded;
        totals.amended += f.amended;
        totals.linked_on_local_id += f.linked_on_local_id;
        totals.text_results += f.text_results;
        totals.qualified_results += f.qualified_results;
        for (k, v) in &f.quarantined {
            *totals.quarantined.entry(k.clone()).or_default() += v;
        }
    }
    let quarantined: u64 = totals.quarantined.values().sum();
    let mut patients_by_group = BTreeMap::new();
    let mut stable_transitions = BTreeMap::new();
    for p in &s.patients {
        *patients_by_group
            .entry(p.group.as_str().to_string())
            .or_default() += 1;
        if p.group == Group::MtxStable {
            let m = p.mtx.as_ref().expect("mtx");
            *stable_transitions
                .entry(format!("{}->{}", m.before.as_str(), m.after.as_str()))
                .or_default() += 1;
        }
    }
    write_truth(s, out, &criticals)?;
    let monitoring_specimens = s
        .patients
        .iter()
        .filter_map(|p| p.mtx.as_ref())
        .map(|m| m.days.len() as u64)
        .sum();
    let summary = Summary {
        site: s.profile.site.label.clone(),
        profile_sha256: s.profile.sha256.clone(),
        expected_stored: totals.rows
            - quarantined
            - totals.duplicate
            - totals.cancelled
            - totals.superseded,
        critical_rows: criticals.len() as u64,
        totals,
        files,
        patients_by_group,
        stable_transitions,
        monitoring_specimens,
        config: synth.cfg.clone(),
    };
    let json = serde_json::to_string_pretty(&summary).expect("summary serialises");
    write_atomic(&out.join("truth/summary.json"), |w| {
        w.write_all(json.as_bytes())
    })?;
    Ok(summary)
}

/// The planted critical rows first written in file `m`, as CSV lines.
fn critical_lines(s: &Synth, m: u32, prev: Option<&MonthRows>, cur: &MonthRows) -> Vec<String> {
    let own = s.month_start_day(m) * 1440;
    let to = s.month_start_day(m + 1) * 1440;
    prev.into_iter()
        .chain(std::iter::once(cur))
        .flat_map(|src| src.rows.iter())
        .filter(|r| r.critical && r.reported >= own && r.reported < to)
        .map(|r| {
            let p = &s.patients[r.patient as usize];
            let c = CriticalTruth {
                nhs_number: sluice_policy::nhs::canonical(&p.nhs),
                specimen_id: emit::specimen_id(r.specimen),
                collected_minute: r.collected,
                setting: r.setting.as_str(),
                analyte: model::ANALYTES[r.analyte as usize].id,
                value: match r.value {
                    emit::Val::Num(v) => v,
                    _ => f64::NAN,
                },
                monitoring: r.monitoring,
            };
            format!(
                "{},{},{},{},{},{},{}",
                c.nhs_number,
                c.specimen_id,
                minute_text(c.collected_minute),
                c.setting,
                c.analyte,
                c.value,
                c.monitoring
            )
        })
        .collect()
}

fn minute_text(minute: i64) -> String {
    chrono::DateTime::from_timestamp(minute * 60, 0)
        .expect("in range")
        .naive_utc()
        .format("%Y-%m-%dT%H:%M")
        .to_string()
}

fn day_text(day: i64) -> String {
    NaiveDate::from_num_days_from_ce_opt((day + 719_163) as i32)
        .expect("in range")
        .to_string()
}

fn write_truth(s: &Synth, out: &Path, criticals: &[String]) -> Result<(), SynthError> {
    let mut text =
        String::from("nhs_number,specimen_id,collected_at,setting,analyte,value,monitoring\n");
    let mut sorted = criticals.to_vec();
    sorted.sort();
    for c in sorted {
        text.push_str(&c);
        text.push('\n');
    }
    write_atomic(&out.join("truth/critical.csv"), |w| {
        w.write_all(text.as_bytes())
    })?;

    let mut pat = String::from(
        "nhs_number,local_id,group,sex,birth_date,postcode,practice_code,schedule_before,schedule_after,other_dmard,first_monitoring,monitoring_requests\n",
    );
    let mut mon = String::from("nhs_number,collected_date\n");
    for p in &s.patients {
        let nhs = sluice_policy::nhs::canonical(&p.nhs);
        let (before, after, other, first, count) = match &p.mtx {
            Some(m) => {
                for &d in &m.days {
                    mon.push_str(&format!("{nhs},{}\n", day_text(d)));
                }
                (
                    m.before.as_str(),
                    m.after.as_str(),
                    m.other_dmard.map_or("", |i| text::OTHER_DMARDS[i].0),
                    m.days.first().map_or(String::new(), |&d| day_text(d)),
                    m.days.len(),
                )
            }
            None => ("", "", "", String::new(), 0),
        };
        pat.push_str(&format!(
            "{nhs},QM{:07},{},{},{},{},{},{before},{after},{other},{first},{count}\n",
            p.mrn,
            p.group.as_str(),
            p.sex.as_str(),
            day_text(p.birth_day),
            s.region.postcodes[p.postcode as usize].code,
            s.region.practices[p.practice as usize].code,
        ));
    }
    write_atomic(&out.join("truth/patients.csv"), |w| {
        w.write_all(pat.as_bytes())
    })?;
    write_atomic(&out.join("truth/monitoring.csv"), |w| {
        w.write_all(mon.as_bytes())
    })?;
    Ok(())
}
