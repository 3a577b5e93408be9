//! Critical results (any setting, with rates and the rate ratio between the compared windows) and
//! the travel saved by a less frequent monitoring scenario.

use crate::cohort::{Member, subgroup_names};
use crate::load::Result_;
use crate::policy::{Dim, Study};
use crate::results::{Rows, estimate_values};
use crate::{MeasureError, patients_col};
use sluice_aggregate::{ALL, CellRef, Formula, Role, Table, Value, col, dim};
use std::collections::{BTreeMap, HashMap, HashSet};

/// One critical result of the study population.
#[derive(Clone, Copy, Debug)]
pub struct CriticalEvent {
    pub patient: u64,
    pub minute: i64,
    pub analyte: u16,
    pub value: f64,
    pub setting: u8,
    pub monitoring: bool,
}

pub fn critical_events(study: &Study, rows: &[Result_], ids: &[String]) -> Vec<CriticalEvent> {
    let Some(c) = &study.critical else {
        return Vec::new();
    };
    let limits: Vec<Option<&crate::policy::CriticalLimit>> =
        ids.iter().map(|id| c.limits.get(id)).collect();
    rows.iter()
        .filter(|r| limits[r.analyte as usize].is_some_and(|l| l.critical(r.value)))
        .map(|r| CriticalEvent {
            patient: r.patient,
            minute: r.minute,
            analyte: r.analyte,
            value: r.value,
            setting: r.setting,
            monitoring: r.event,
        })
        .collect()
}

/// Events in a cell and the patients they belong to.
type EventCell = (u64, HashSet<u64>);

const CONTEXTS: [&str; 3] = ["monitoring", "other", ALL];

pub fn critical_tables(
    ctx: &Rows<'_>,
    events: &[CriticalEvent],
    members: Option<&[Member]>,
) -> Result<Vec<Table>, MeasureError> {
    let study = ctx.study;
    let Some(c) = &study.critical else {
        return Ok(Vec::new());
    };
    let cohort = members.is_some();
    let mut cells: BTreeMap<(Vec<String>, &str), EventCell> = BTreeMap::new();
    for e in events {
        let r = Result_ {
            patient: e.patient,
            specimen: 0,
            minute: e.minute,
            analyte: e.analyte,
            value: e.value,
            setting: e.setting,
            age: 0,
            sex: 2,
            event: e.monitoring,
            distance_km: f32::NAN,
        };
        let contexts: &[&str] = if cohort {
            if e.monitoring {
                &["monitoring", ALL]
            } else {
                &["other", ALL]
            }
        } else {
            &[ALL]
        };
        for k in ctx.keys(&c.by, &r) {
            for ctxn in contexts {
                let cell = cells.entry((k.clone(), ctxn)).or_default();
                cell.0 += 1;
                cell.1.insert(e.patient);
            }
        }
    }
    // Cohort studies list every cell (zeros included) so a zero is a result, not a gap.
    if members.is_some() {
        for g in subgroup_names(study) {
            for w in &study.windows {
                let mut k = Vec::new();
                for d in &c.by {
                    match d {
                        Dim::Subgroup => k.push(g.clone()),
                        Dim::Window => k.push(w.name.clone()),
                        _ => {}
                    }
                }
                if k.len() == c.by.len() {
                    for ctxn in CONTEXTS {
                        cells.entry((k.clone(), ctxn)).or_default();
                    }
                }
            }
        }
    }
    let rates = cohort
        && c.by.contains(&Dim::Window)
        && c.by
            .iter()
            .all(|d| matches!(d, Dim::Window | Dim::Subgroup));
    let mut cols: Vec<_> = c.by.iter().map(|d| dim(d.name(), "")).collect();
    cols.push(dim(
        "context",
        "monitoring: on a routine monitoring specimen; other: any other setting or request",
    ));
    cols.extend([
        patients_col(),
        col("n_events", Role::Count, "critical results"),
    ]);
    if rates {
        cols.extend([
            col(
                "person_years",
                Role::PersonTime,
                "patients at risk times window length",
            ),
            col(
                "rate_per_100py",
                Role::Statistic,
                "events per 100 patient-years",
            ),
            col("lower", Role::Statistic, "exact Poisson lower limit"),
            col("upper", Role::Statistic, "exact Poisson upper limit"),
        ]);
    }
    let limits: Vec<String> = c
        .limits
        .iter()
        .map(|(a, l)| format!("{a} ({})", l.source))
        .collect();
    let mut t = Table::new(
        "critical_results",
        "Critical results",
        &format!(
            "Results beyond the critical limits, in any setting; n_patients counts patients with at least one. Limits: {}",
            limits.join("; ")
        ),
        cols,
    );
    let size = |g: &str| {
        members.map_or(0, |ms| {
            ms.iter()
                .filter(|m| m.subgroups.iter().any(|s| s == g))
                .count()
        })
    };
    let level = study.bootstrap.level;
    // Row of each (key, context), for the rate ratio's inputs.
    let mut row_of: HashMap<(Vec<String>, &str), usize> = HashMap::new();
    for ((k, ctxn), (n, ps)) in &cells {
        row_of.insert((k.clone(), *ctxn), t.rows.len());
        if rates {
            // Rate and limits from the released events and the rounded person-time.
            t.derive_rate_per_100py(t.rows.len(), level);
        }
        let mut row: Vec<Value> = k.iter().map(|x| x.as_str().into()).collect();
        row.extend([(*ctxn).into(), ps.len().into(), (*n).into()]);
        if rates {
            let g =
                c.by.iter()
                    .position(|d| *d == Dim::Subgroup)
                    .map_or(ALL, |i| k[i].as_str());
            let w = &study.windows[study
                .windows
                .iter()
                .position(|w| {
                    k[c.by.iter().position(|d| *d == Dim::Window).expect("window")] == w.name
                })
                .expect("window")];
            let py = size(g) as f64 * w.years();
            let ci = sluice_stats::poisson_exact_ci(*n, py / 100.0, level).ok();
            row.extend([
                Value::float(py),
                Value::opt(ci.map(|c| c.estimate)),
                Value::opt(ci.map(|c| c.lower)),
                Value::opt(ci.map(|c| c.upper)),
            ]);
        }
        t.push(row);
    }
    // all = monitoring + other: a withheld context must not be the total minus the other.
    t.add_margin_constraints("context")?;
    let mut out = vec![t];

    if let (true, Some((b, a))) = (rates, study.compare) {
        let mut cols = vec![
            dim("subgroup", ""),
            dim("context", ""),
            patients_col(),
            dim("statistic", ""),
        ];
        cols.extend(crate::results::estimate_cols());
        let mut t = Table::new(
            "critical_rate_ratio",
            "Critical results: rate ratio",
            &format!(
                "Rate of critical results in {} over {}, exact conditional-binomial interval; n_patients counts patients with a critical result in either window; log rate ratio with SE sqrt(1/x1 + 1/x0) for pooling",
                study.windows[a].name, study.windows[b].name
            ),
            cols,
        );
        let gs = if c.by.contains(&Dim::Subgroup) {
            subgroup_names(study)
        } else {
            vec![ALL.to_string()]
        };
        for g in gs {
            let size = size(&g) as f64;
            let (t0, t1) = (
                size * study.windows[b].years(),
                size * study.windows[a].years(),
            );
            for ctxn in CONTEXTS {
                let (mut x0, mut x1, mut ps) = (0u64, 0u64, HashSet::new());
                for e in events {
                    if ctxn != ALL && e.monitoring != (ctxn == "monitoring") {
                        continue;
                    }
                    if !ctx
                        .subgroups
                        .get(&e.patient)
                        .is_some_and(|gs| gs.contains(&g))
                    {
                        continue;
                    }
                    match study.window_of(crate::cohort::day(e.minute)) {
                        Some(w) if w == b => x0 += 1,
                        Some(w) if w == a => x1 += 1,
                        _ => continue,
                    }
                    ps.insert(e.patient);
                }
                let rr = sluice_stats::rate_ratio_exact_ci(x1, t1, x0, t0, level).ok();
                // Both rows are recomputed at release from critical_results' released events and
                // person-time of the two windows (withheld with them): the SE √(1/x1 + 1/x0)
                // of exact counts gives both counts.
                let key = |w: usize| -> Vec<String> {
                    c.by.iter()
                        .map(|d| match d {
                            Dim::Subgroup => g.clone(),
                            _ => study.windows[w].name.clone(),
                        })
                        .collect()
                };
                let cell = |w: usize, col: &str| {
                    row_of
                        .get(&(key(w), ctxn))
                        .map(|&r| CellRef::of("critical_results", r, col))
                };
                let inputs: Option<Vec<CellRef>> = [
                    cell(a, "n_events"),
                    cell(a, "person_years"),
                    cell(b, "n_events"),
                    cell(b, "person_years"),
                ]
                .into_iter()
                .collect();
                let inputs = inputs.ok_or_else(|| {
                    MeasureError::Store(format!(
                        "critical_rate_ratio: no critical_results row for subgroup {g}, context {ctxn}"
                    ))
                })?;
                let (rr_row, log_row) = (t.rows.len(), t.rows.len() + 1);
                for (row, col, f) in [
                    (rr_row, "estimate", Formula::RateRatio),
                    (rr_row, "lower", Formula::RateRatioLower),
                    (rr_row, "upper", Formula::RateRatioUpper),
                    (log_row, "estimate", Formula::LogRateRatio),
                    (log_row, "lower", Formula::LogRateRatioLower),
                    (log_row, "upper", Formula::LogRateRatioUpper),
                    (log_row, "se", Formula::LogRateRatioSe),
                ] {
                    t.derive(row, col, f, inputs.clone(), level, 0.0);
                }
                let mut r: Vec<Value> = vec![
                    g.as_str().into(),
                    ctxn.into(),
                    ps.len().into(),
                    "rate_ratio".into(),
                ];
                r.extend(match rr {
                    Some(i) => vec![
                        Value::float(i.estimate),
                        Value::float(i.lower),
                        Value::float(i.upper),
                        Value::Null,
                    ],
                    None => vec![Value::Null; 4],
                });
                t.push(r);
                let mut r: Vec<Value> = vec![
                    g.as_str().into(),
                    ctxn.into(),
                    ps.len().into(),
                    "log_rate_ratio".into(),
                ];
                if x0 > 0 && x1 > 0 {
                    let est = ((x1 as f64 / t1) / (x0 as f64 / t0)).ln();
                    let se = (1.0 / x1 as f64 + 1.0 / x0 as f64).sqrt();
                    let zc = crate::z(level);
                    r.extend([
                        Value::float(est),
                        Value::float(est - zc * se),
                        Value::float(est + zc * se),
                        Value::float(se),
                    ]);
                } else {
                    r.extend(estimate_values(None, level));
                }
                t.push(r);
            }
        }
        // all = monitoring + other, for the patients of either window as for the events.
        t.add_margin_constraints("context")?;
        out.push(t);
    }
    Ok(out)
}

/// Per patient: round trip and the miles the scenario would save in a year.
#[derive(Clone, Debug)]
pub struct Trip {
    pub patient: u64,
    pub distance_km: f64,
    pub round_trip_miles: f64,
    pub tests_per_year: f64,
    pub trips_saved: f64,
    pub miles_saved: f64,
    pub kg_co2e_saved: f64,
}

pub const KM_PER_MILE: f64 = 1.609_344;

pub fn travel(study: &Study, members: &[Member], rows: &[Result_]) -> Vec<Trip> {
    let Some(t) = &study.travel else {
        return Vec::new();
    };
    let w = &study.windows[t.window];
    let mut distance: BTreeMap<u64, f64> = BTreeMap::new();
    for r in rows {
        if r.distance_km.is_finite() {
            distance
                .entry(r.patient)
                .or_insert(f64::from(r.distance_km));
        }
    }
    members
        .iter()
        .filter_map(|m| {
            let d = *distance.get(&m.patient)?;
            let round_trip_miles = 2.0 * d * t.circuity / KM_PER_MILE;
            let tests = m
                .event_days
                .iter()
                .filter(|&&x| x >= w.from_day && x < w.to_day)
                .count() as f64
                / w.years();
            let trips_saved = (tests - t.scenario_tests_per_year).max(0.0);
            let miles_saved = trips_saved * round_trip_miles;
            Some(Trip {
                patient: m.patient,
                distance_km: d,
                round_trip_miles,
                tests_per_year: tests,
                trips_saved,
                miles_saved,
                kg_co2e_saved: miles_saved * t.kg_co2e_per_mile,
            })
        })
        .collect()
}

pub fn travel_tables(study: &Study, members: &[Member], trips: &[Trip]) -> Vec<Table> {
    let Some(t) = &study.travel else {
        return Vec::new();
    };
    let cols = vec![
        dim("subgroup", ""),
        dim("scenario", ""),
        patients_col(),
        col(
            "mean_round_trip_miles",
            Role::Statistic,
            "straight line home to GP, times the circuity factor, both ways",
        ),
        col(
            "mean_tests_per_year",
            Role::Statistic,
            "monitoring events per year in the travel window",
        ),
        col(
            "miles_saved_per_year",
            Role::Magnitude {
                contributions: "miles_top".into(),
            },
            "total over patients",
        ),
        col("miles_top", Role::Contributions, ""),
        col(
            "kg_co2e_saved_per_year",
            Role::Magnitude {
                contributions: "co2e_top".into(),
            },
            "total over patients",
        ),
        col("co2e_top", Role::Contributions, ""),
    ];
    let mut out = Table::new(
        "travel",
        "Travel saved",
        &format!(
            "Patients with a known home-to-GP distance; current tests per year in {} against the {} scenario ({} a year); circuity {}, {} kg CO2e per mile (from the study policy)",
            study.windows[t.window].name,
            t.scenario,
            t.scenario_tests_per_year,
            t.circuity,
            t.kg_co2e_per_mile
        ),
        cols,
    );
    let top = |mut v: Vec<f64>| {
        v.sort_by(|a, b| b.total_cmp(a));
        v.truncate(5);
        Value::List(v)
    };
    for g in subgroup_names(study) {
        let ps: HashSet<u64> = members
            .iter()
            .filter(|m| m.subgroups.contains(&g))
            .map(|m| m.patient)
            .collect();
        let ts: Vec<&Trip> = trips.iter().filter(|x| ps.contains(&x.patient)).collect();
        let rt: Vec<f64> = ts.iter().map(|x| x.round_trip_miles).collect();
        let tp: Vec<f64> = ts.iter().map(|x| x.tests_per_year).collect();
        let miles: Vec<f64> = ts.iter().map(|x| x.miles_saved).collect();
        let co2: Vec<f64> = ts.iter().map(|x| x.kg_co2e_saved).collect();
        out.push(vec![
            g.as_str().into(),
            t.scenario.as_str().into(),
            ts.len().into(),
            Value::opt(sluice_stats::mean(&rt).ok()),
            Value::opt(sluice_stats::mean(&tp).ok()),
            Value::float(miles.iter().sum()),
            top(miles),
            Value::float(co2.iter().sum()),
            top(co2),
        ]);
    }
    // Tests per patient in the window are whole numbers: their mean per year is on a grid of
    // 1 / window length, and released at a step that does not pin n_patients.
    out.set_precision(
        "mean_tests_per_year",
        sluice_aggregate::Precision::Grid {
            grid: 1.0 / study.windows[t.window].years(),
            n: "n_patients".into(),
            by: None,
        },
    );
    vec![out]
}
