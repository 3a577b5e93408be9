//! Generation of one collection month's rows and the writing of one monthly extract file in a
//! site's layout.

use crate::Synth;
use crate::model::{self, ANALYTES};
use crate::population::{Group, Patient};
use crate::text;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Poisson};
use rand_pcg::Pcg64Mcg;
use serde::Serialize;
use sluice_policy::{Setting, Status};
use std::io::Write;

/// A planted fault and the quarantine reason the linker is expected to give for it.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Fault {
    None,
    /// NHS number with a wrong check digit.
    BadNhs,
    /// Blank NHS number, local identifier present (linked on the fallback when the profile has one).
    BlankNhs,
    /// Blank NHS number and blank local identifier.
    BlankIds,
    /// Collection date-time that does not parse.
    BadDate,
    /// A row cut short (one field missing).
    WrongFieldCount,
    UnknownAnalyte,
    UnknownSetting,
    /// A unit the analyte does not accept.
    BadUnit,
}

impl Fault {
    pub const QUARANTINE: [Fault; 7] = [
        Fault::BadNhs,
        Fault::BlankIds,
        Fault::BadDate,
        Fault::WrongFieldCount,
        Fault::UnknownAnalyte,
        Fault::UnknownSetting,
        Fault::BadUnit,
    ];
    pub fn as_str(self) -> &'static str {
        match self {
            Fault::None => "none",
            Fault::BadNhs => "bad_nhs",
            Fault::BlankNhs => "blank_nhs",
            Fault::BlankIds => "blank_ids",
            Fault::BadDate => "bad_date",
            Fault::WrongFieldCount => "wrong_field_count",
            Fault::UnknownAnalyte => "unknown_analyte",
            Fault::UnknownSetting => "unknown_setting",
            Fault::BadUnit => "bad_unit",
        }
    }
}

#[derive(Clone, Copy, Debug)]
pub enum Val {
    Num(f64),
    /// A qualified bound: '<' or '>' and the bound.
    Qual(u8, f64),
    Text(&'static str),
    Empty,
}

#[derive(Clone, Debug)]
pub struct Row {
    /// Minutes since 1970-01-01.
    pub reported: i64,
    pub collected: i64,
    pub patient: u32,
    pub specimen: u64,
    /// Index into the month's notes.
    pub notes: u32,
    pub analyte: u8,
    pub value: Val,
    pub setting: Setting,
    pub status: Status,
    pub fault: Fault,
    /// The row is a planted critical value.
    pub critical: bool,
    pub monitoring: bool,
}

pub struct MonthRows {
    pub rows: Vec<Row>,
    pub notes: Vec<String>,
}

fn mix(a: u64, b: u64, c: u64) -> u64 {
    // splitmix64 finaliser over a combination; only seeds generators, never used as a hash of data.
    let mut z = a
        .wrapping_mul(0x9E37_79B9_7F4A_7C15)
        .wrapping_add(b.wrapping_mul(0xBF58_476D_1CE4_E5B9))
        .wrapping_add(c.wrapping_mul(0x94D0_49BB_1331_11EB));
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

const SPEC_BITS: u64 = 36;

/// A specimen number that is unique per (month, patient, k) and looks unordered.
fn specimen_number(month: u32, patient: u32, k: u32, n_patients: u32) -> u64 {
    let x = (u64::from(month) * u64::from(n_patients) + u64::from(patient)) * 32 + u64::from(k);
    // Multiplication by an odd constant is a bijection modulo 2^36.
    (x.wrapping_mul(0x5DEE_CE66D)) & ((1 << SPEC_BITS) - 1)
}

pub fn specimen_id(n: u64) -> String {
    format!("QV{n:011}")
}

fn setting_acute(s: Setting) -> bool {
    matches!(s, Setting::Inpatient | Setting::Emergency)
}

/// Generates every row of specimens collected in month `m`.
pub fn month_rows(s: &Synth, m: u32) -> MonthRows {
    let (m_start, m_end) = (s.month_start_day(m), s.month_start_day(m + 1));
    let mut out = MonthRows {
        rows: Vec::new(),
        notes: Vec::new(),
    };
    let n_pat = s.patients.len() as u32;
    for (pi, p) in s.patients.iter().enumerate() {
        let pi = pi as u32;
        let mut rng = Pcg64Mcg::seed_from_u64(mix(s.cfg.seed, u64::from(m) + 1, u64::from(pi)));
        let rate = s.background_rate * f64::from(p.frailty);
        let n_bg = if rate > 0.0 {
            Poisson::new(rate).expect("rate").sample(&mut rng) as u32
        } else {
            0
        }
        .min(16);
        let mtx_drug = p
            .mtx
            .as_ref()
            .map(|_| text::pick(&mut rng, text::METHOTREXATE));
        for k in 0..n_bg {
            let setting = Setting::ALL
                [crate::region::pick_weighted(&mut rng, [0.55, 0.15, 0.18, 0.12].into_iter())];
            let day = rng.random_range(m_start..m_end);
            let minute = if setting_acute(setting) {
                rng.random_range(0..1440)
            } else {
                rng.random_range(8 * 60..18 * 60)
            };
            let notes = text::background(&mut rng, setting_acute(setting), mtx_drug);
            let sets = model::panels(setting_acute(setting));
            let panel = sets[crate::region::pick_weighted(&mut rng, sets.iter().map(|x| x.1))].0;
            let analytes: Vec<usize> = panel
                .iter()
                .flat_map(|set| set.iter().map(|id| model::index(id)))
                .collect();
            specimen(
                s,
                &mut rng,
                &mut out,
                Spec {
                    patient: pi,
                    p,
                    specimen: specimen_number(m, pi, k, n_pat),
                    collected: day * 1440 + minute,
                    setting,
                    notes,
                    analytes,
                    monitoring: false,
                },
            );
        }
        if let Some(mtx) = &p.mtx {
            let first = mtx.days.partition_point(|&d| d < m_start);
            let last = mtx.days.partition_point(|&d| d < m_end);
            for (j, &day) in mtx.days[first..last].iter().enumerate() {
                let setting = if mtx.clinic && rng.random_bool(0.8) {
                    Setting::Outpatient
                } else {
                    Setting::Community
                };
                let other = mtx
                    .other_dmard
                    .map(|i| text::pick(&mut rng, text::OTHER_DMARDS[i].1));
                let drug = text::pick(&mut rng, text::METHOTREXATE);
                let notes = text::monitoring(&mut rng, drug, other, mtx.dose);
                let analytes = model::MONITORING
                    .iter()
                    .map(|id| model::index(id))
                    .collect();
                let collected = day * 1440 + rng.random_range(8 * 60..17 * 60);
                specimen(
                    s,
                    &mut rng,
                    &mut out,
                    Spec {
                        patient: pi,
                        p,
                        specimen: specimen_number(m, pi, 16 + j as u32, n_pat),
                        collected,
                        setting,
                        notes,
                        analytes,
                        monitoring: true,
                    },
                );
            }
        }
    }
    out
}

struct Spec<'a> {
    patient: u32,
    p: &'a Patient,
    specimen: u64,
    collected: i64,
    setting: Setting,
    notes: String,
    analytes: Vec<usize>,
    monitoring: bool,
}

fn specimen(s: &Synth, rng: &mut impl Rng, out: &mut MonthRows, sp: Spec<'_>) {
    let f = &s.cfg.faults;
    let background = sp.p.group == Group::Background;
    let spec_fault = if !background {
        Fault::None
    } else {
        let x: f64 = rng.random();
        if x < f.bad_nhs {
            Fault::BadNhs
        } else if x < f.bad_nhs + f.blank_nhs {
            if rng.random_bool(0.7) {
                Fault::BlankNhs
            } else {
                Fault::BlankIds
            }
        } else {
            Fault::None
        }
    };
    let delay = match sp.setting {
        Setting::Emergency => rng.random_range(60..240),
        Setting::Inpatient => rng.random_range(120..600),
        _ => rng.random_range(240..1800),
    };
    let reported = sp.collected + delay;
    let notes_idx = out.notes.len() as u32;
    out.notes.push(sp.notes);
    // Critical values: mostly from acute settings; rarely on a routine monitoring specimen.
    let p_crit = match (sp.monitoring, sp.setting) {
        (true, _) => f.critical_monitoring,
        (false, Setting::Emergency) => f.critical_emergency,
        (false, Setting::Inpatient) => f.critical_inpatient,
        (false, _) => f.critical_routine,
    };
    let crit_at = if spec_fault == Fault::None && rng.random_bool(p_crit) {
        let capable: Vec<usize> = (0..sp.analytes.len())
            .filter(|&i| {
                let a = &ANALYTES[sp.analytes[i]];
                a.crit_low.is_some() || a.crit_high.is_some()
            })
            .collect();
        (!capable.is_empty()).then(|| capable[rng.random_range(0..capable.len())])
    } else {
        None
    };
    let shift_of = |ai: usize| -> f64 {
        sp.p.mtx
            .as_ref()
            .and_then(|m| {
                model::MONITORING
                    .iter()
                    .position(|id| *id == ANALYTES[ai].id)
                    .map(|k| f64::from(m.shift[k]))
            })
            .unwrap_or(0.0)
    };
    let egfr_i = model::index("egfr");
    let creat_i = model::index("creatinine");
    let alt_i = model::index("alt");
    let wbc_i = model::index("wbc");
    let neut_i = model::index("neutrophils");
    let lymph_i = model::index("lymphocytes");
    let mut creat_value: Option<f64> = None;
    let mut wbc_value: Option<f64> = None;
    for (i, &ai) in sp.analytes.iter().enumerate() {
        let a = &ANALYTES[ai];
        let critical = crit_at == Some(i);
        let mut value = if critical {
            Val::Num(model::draw_critical(rng, a).expect("critical-capable"))
        } else if ai == egfr_i {
            // eGFR follows creatinine; UK laboratories report values above 90 as ">90".
            let c = creat_value.unwrap_or(80.0);
            let v = model::round_to((90.0 * (80.0f64 / c).powf(1.1)).clamp(4.0, 130.0), 0);
            if v > 90.0 {
                Val::Qual(b'>', 90.0)
            } else {
                Val::Num(v)
            }
        } else if let (Some(w), true) = (wbc_value, ai == neut_i || ai == lymph_i) {
            // The differential is a share of the white count it was counted from.
            let share: f64 = if ai == neut_i {
                rng.random_range(0.45..0.75)
            } else {
                rng.random_range(0.15..0.35)
            };
            Val::Num(model::round_to((w * share).clamp(a.lo, a.hi), a.decimals))
        } else {
            let v = model::draw(
                rng,
                a,
                shift_of(ai),
                if sp.p.mtx.is_some() { 0.5 } else { 1.0 },
            );
            if ai == alt_i && v < 5.0 {
                Val::Qual(b'<', 5.0)
            } else {
                Val::Num(v)
            }
        };
        if let Val::Num(v) = value {
            if ai == creat_i {
                creat_value = Some(v);
            } else if ai == wbc_i {
                wbc_value = Some(v);
            }
        }
        // Text results only on background patients' potassium and full blood counts.
        if background && !critical && rng.random_bool(f.text_result) {
            value = Val::Text(if a.id == "potassium" {
                "HAEMOLYSED"
            } else {
                "CLOTTED"
            });
        }
        let mut fault = spec_fault;
        let amend = !critical
            && fault == Fault::None
            && matches!(value, Val::Num(_))
            && rng.random_bool(f.amended);
        // Row faults go on numeric results only: a text result carries no unit, so a bad unit on
        // it would not be a fault at all.
        let numeric = matches!(value, Val::Num(_) | Val::Qual(..));
        if fault == Fault::None
            && background
            && numeric
            && !critical
            && !amend
            && rng.random_bool(f.row_fault)
        {
            fault = [
                Fault::BadDate,
                Fault::WrongFieldCount,
                Fault::UnknownAnalyte,
                Fault::UnknownSetting,
                Fault::BadUnit,
            ][rng.random_range(0..5)];
        }
        let amend_reported = reported + rng.random_range(1440..14400);
        out.rows.push(Row {
            reported,
            collected: sp.collected,
            patient: sp.patient,
            specimen: sp.specimen,
            notes: notes_idx,
            analyte: ai as u8,
            value,
            setting: sp.setting,
            status: Status::Final,
            fault,
            critical,
            monitoring: sp.monitoring,
        });
        if amend {
            let Val::Num(old) = value else { unreachable!() };
            let new = model::round_to(
                (old * rng.random_range(0.85..1.15)).clamp(a.lo, a.hi),
                a.decimals,
            );
            let new = if new == old {
                model::round_to(old + 10f64.powi(-i32::from(a.decimals)), a.decimals).min(a.hi)
            } else {
                new
            };
            out.rows.push(Row {
                reported: amend_reported,
                value: Val::Num(new),
                status: Status::Amended,
                ..out.rows.last().expect("just pushed").clone()
            });
        }
    }
    // A cancelled request is for a test the specimen has no result for, so it withdraws nothing.
    let cancellable: Vec<usize> = model::CANCELLABLE
        .iter()
        .map(|id| model::index(id))
        .filter(|i| !sp.analytes.contains(i))
        .collect();
    if spec_fault == Fault::None && !cancellable.is_empty() && rng.random_bool(f.cancelled) {
        let ai = cancellable[rng.random_range(0..cancellable.len())];
        out.rows.push(Row {
            reported,
            collected: sp.collected,
            patient: sp.patient,
            specimen: sp.specimen,
            notes: notes_idx,
            analyte: ai as u8,
            value: Val::Empty,
            setting: sp.setting,
            status: Status::Cancelled,
            fault: Fault::None,
            critical: false,
            monitoring: sp.monitoring,
        });
    }
}

/// Per-file counts of what was written and what the linker should make of it.
#[derive(Clone, Debug, Default, Serialize)]
pub struct FileTruth {
    pub file: String,
    pub rows: u64,
    /// Rows that repeat a row of the previous month's file (overlapping re-export).
    pub duplicate: u64,
    pub cancelled: u64,
    /// Earlier versions replaced by an amendment arriving in this file.
    pub superseded: u64,
    pub amended: u64,
    /// Quarantine entries expected, by planted fault.
    pub quarantined: std::collections::BTreeMap<String, u64>,
    /// Rows with a blank NHS number that carry a local identifier.
    pub linked_on_local_id: u64,
    pub text_results: u64,
    pub qualified_results: u64,
}

/// Writes one extract file: rows reported from `overlap_days` before the month to its end.
pub fn write_file(
    s: &Synth,
    m: u32,
    prev: Option<&MonthRows>,
    cur: &MonthRows,
    w: &mut dyn Write,
) -> std::io::Result<FileTruth> {
    let from = (s.month_start_day(m) - i64::from(s.cfg.overlap_days)) * 1440;
    let own = s.month_start_day(m) * 1440;
    let to = s.month_start_day(m + 1) * 1440;
    let mut rows: Vec<(&Row, &MonthRows)> = Vec::new();
    for src in prev.into_iter().chain(std::iter::once(cur)) {
        rows.extend(
            src.rows
                .iter()
                .filter(|r| r.reported >= from && r.reported < to)
                .map(|r| (r, src)),
        );
    }
    rows.sort_by_key(|(r, _)| (r.reported, r.specimen, r.analyte, r.status as u8));
    let mut t = FileTruth {
        file: s.file_name(m),
        ..Default::default()
    };
    let layout = &s.layout;
    let mut line = Vec::with_capacity(512);
    if s.profile.format.bom {
        w.write_all(&[0xEF, 0xBB, 0xBF])?;
    }
    if s.profile.format.header {
        line.clear();
        for (i, name) in layout.header.iter().enumerate() {
            if i > 0 {
                line.push(layout.delimiter);
            }
            layout.push_field(&mut line, name);
        }
        line.extend_from_slice(layout.eol);
        w.write_all(&line)?;
    }
    for (r, src) in rows {
        t.rows += 1;
        let repeat = r.reported < own;
        let reason = match r.fault {
            Fault::None => None,
            Fault::BlankNhs if s.layout.has_local_id => None,
            Fault::BlankNhs => Some(Fault::BlankIds),
            f => Some(f),
        };
        if let Some(f) = reason {
            *t.quarantined.entry(f.as_str().to_string()).or_default() += 1;
        } else if repeat {
            t.duplicate += 1;
        } else {
            match r.status {
                Status::Cancelled => t.cancelled += 1,
                Status::Amended => {
                    t.amended += 1;
                    t.superseded += 1;
                }
                Status::Final => {}
            }
            if r.fault == Fault::BlankNhs {
                t.linked_on_local_id += 1;
            }
            match r.value {
                Val::Text(_) => t.text_results += 1,
                Val::Qual(..) => t.qualified_results += 1,
                _ => {}
            }
        }
        line.clear();
        s.layout
            .write_row(s, r, &src.notes[r.notes as usize], &mut line);
        w.write_all(&line)?;
    }
    Ok(t)
}
