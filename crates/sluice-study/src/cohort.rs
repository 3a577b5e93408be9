//! The cohort rule (marker and drug tags, exclusions, stability, continuation) with its flow, and
//! the monitoring intervals, frequency bands, band transitions and subgroups built on it.

use crate::load::{Event, Tagged};
use crate::policy::{BandStatistic, Study};
use crate::{MeasureError, counts_table, patients_col};
use sluice_aggregate::{ALL, CellRef, Constraint, Link, Role, Table, Value, col, dim};
use std::collections::{BTreeMap, HashSet};

/// A cohort patient with everything later steps need.
#[derive(Clone, Debug)]
pub struct Member {
    pub patient: u64,
    /// Day numbers of the patient's monitoring events over the whole history, ascending.
    pub event_days: Vec<i64>,
    /// Per window: number of events, intervals ending in it, (mean, median) interval, band.
    pub windows: Vec<WindowIntervals>,
    /// Names of the subgroups the patient belongs to ("all" first).
    pub subgroups: Vec<String>,
}

#[derive(Clone, Debug, Default)]
pub struct WindowIntervals {
    pub events: u32,
    pub intervals: Vec<f64>,
    pub mean: Option<f64>,
    pub median: Option<f64>,
    pub band: String,
}

pub struct Cohort {
    pub members: Vec<Member>,
    pub flow: Table,
    /// (patient, from_day, to_day, days) of every interval of a cohort patient.
    pub intervals: Vec<(u64, i64, i64, i64)>,
}

pub fn day(minute: i64) -> i64 {
    minute.div_euclid(1440)
}

/// Applies the cohort rule; an empty result is an error naming the rule that emptied it.
pub fn build(study: &Study, tagged: &Tagged) -> Result<Cohort, MeasureError> {
    let c = study.cohort.as_ref().expect("cohort study");
    let mut by_patient: BTreeMap<u64, Vec<&Event>> = BTreeMap::new();
    for e in &tagged.events {
        by_patient.entry(e.patient).or_default().push(e);
    }
    let n_marker = tagged.marker_patients.len();
    let n_drug = by_patient.len();
    let mut excluded = 0usize;
    let mut unstable = 0usize;
    let mut stopped = 0usize;
    let mut members = Vec::new();
    let mut intervals = Vec::new();
    let last = &study.windows[study.windows.len() - 1];
    for (&patient, events) in &by_patient {
        if tagged.excluded.contains(&patient) {
            excluded += 1;
            continue;
        }
        let mut days: Vec<i64> = events.iter().map(|e| day(e.minute)).collect();
        days.sort_unstable();
        if days[0] > c.stable_by_day {
            unstable += 1;
            continue;
        }
        let in_window = |w: &crate::policy::Window| {
            days.iter()
                .filter(|&&d| d >= w.from_day && d < w.to_day)
                .count() as u32
        };
        let mut continuing = study
            .windows
            .iter()
            .all(|w| in_window(w) >= c.min_events_per_window);
        if let Some((_, from)) = c.evidence_in_last {
            continuing &= days.iter().any(|&d| d >= from && d < last.to_day);
        }
        if !continuing {
            stopped += 1;
            continue;
        }
        members.push(Member {
            patient,
            event_days: days,
            windows: Vec::new(),
            subgroups: vec![ALL.to_string()],
        });
    }
    let n_final = members.len();
    let empty = |key: &str, what: &str| MeasureError::EmptyCohort {
        key: key.to_string(),
        message: what.to_string(),
    };
    if n_marker == 0 {
        return Err(empty(
            "cohort.marker_tag",
            &format!(
                "no specimen in the store carries the tag {:?}",
                c.marker_tag
            ),
        ));
    }
    if n_drug == 0 {
        return Err(empty(
            "cohort.drug_tags",
            "no monitoring specimen carries every drug tag",
        ));
    }
    if n_drug == excluded {
        return Err(empty(
            "cohort.exclude_tags",
            "every patient is excluded by a co-medication tag",
        ));
    }
    if n_drug == excluded + unstable {
        return Err(empty(
            "cohort.stable_months",
            "no patient is stable long enough before the first window",
        ));
    }
    if n_final == 0 {
        return Err(empty(
            "cohort.min_events_per_window",
            "no patient is still monitored in every window",
        ));
    }

    // Intervals belong to the window and month of the event that ends them.
    if let Some(iv) = &study.intervals {
        for m in &mut members {
            m.windows = vec![WindowIntervals::default(); study.windows.len()];
            for &d in &m.event_days {
                if let Some(w) = study.window_of(d) {
                    m.windows[w].events += 1;
                }
            }
            for pair in m.event_days.windows(2) {
                let days = pair[1] - pair[0];
                intervals.push((m.patient, pair[0], pair[1], days));
                if let Some(w) = study.window_of(pair[1]) {
                    m.windows[w].intervals.push(days as f64);
                }
            }
            for w in &mut m.windows {
                if w.intervals.is_empty() {
                    w.band = "none".into();
                    continue;
                }
                w.mean = sluice_stats::mean(&w.intervals).ok();
                w.median = sluice_stats::median(&w.intervals).ok();
                let s = match iv.statistic {
                    BandStatistic::Mean => w.mean,
                    BandStatistic::Median => w.median,
                };
                w.band = s.map_or("none".into(), |s| iv.band(s).to_string());
            }
            if let Some((b, a)) = study.compare {
                for g in &study.subgroups {
                    if g.contains(&m.windows[b].band, &m.windows[a].band) {
                        m.subgroups.push(g.name.clone());
                    }
                }
            }
        }
    } else {
        for m in &mut members {
            m.windows = vec![WindowIntervals::default(); study.windows.len()];
            for &d in &m.event_days {
                if let Some(w) = study.window_of(d) {
                    m.windows[w].events += 1;
                }
            }
        }
    }

    let mut flow = Table::new(
        "cohort_flow",
        "Cohort flow",
        "Patients at each step of the cohort rule: those remaining and those excluded at the step",
        vec![
            dim("step", "order of the step"),
            dim("rule", "what the step checks"),
            dim("outcome", "remaining or excluded"),
            patients_col(),
        ],
    );
    let steps = [
        ("1", "monitoring marker on any specimen", n_marker, 0),
        (
            "2",
            "monitoring event with every drug tag",
            n_drug,
            n_marker - n_drug,
        ),
        (
            "3",
            "no excluded co-medication in the look-back",
            n_drug - excluded,
            excluded,
        ),
        (
            "4",
            "stable before the first window",
            n_drug - excluded - unstable,
            unstable,
        ),
        (
            "5",
            "enough monitoring events in every window",
            n_final,
            stopped,
        ),
    ];
    for (i, (step, rule, remaining, out)) in steps.iter().enumerate() {
        if i > 0 {
            flow.push(vec![
                (*step).into(),
                (*rule).into(),
                "excluded".into(),
                Value::from(*out),
            ]);
        }
        flow.push(vec![
            (*step).into(),
            (*rule).into(),
            "remaining".into(),
            Value::from(*remaining),
        ]);
    }
    // remaining(k-1) = remaining(k) + excluded(k): a withheld exclusion must not be recoverable.
    let remaining_row = |k: usize| if k == 0 { 0 } else { 2 * k };
    for k in 1..steps.len() {
        flow.constraints.push(Constraint {
            total: remaining_row(k - 1),
            parts: vec![2 * k - 1, 2 * k],
        });
    }
    Ok(Cohort {
        members,
        flow,
        intervals,
    })
}

/// Aggregates of the intervals: per window, bands, transitions, subgroups and by calendar month.
pub fn interval_tables(study: &Study, cohort: &Cohort) -> Result<Vec<Table>, MeasureError> {
    let mut out = Vec::new();
    // Per window: patients with events, events, person-time.
    let mut t = Table::new(
        "cohort_windows",
        "Cohort by window",
        "Cohort patients with at least one monitoring event in each window, the events, and the person-time (every cohort patient is followed through every window)",
        vec![
            dim("window", ""),
            patients_col(),
            col("n_events", Role::Count, "monitoring events"),
            col(
                "person_years",
                Role::PersonTime,
                "cohort size times window length (365.25-day years)",
            ),
        ],
    );
    for (wi, w) in study.windows.iter().enumerate() {
        let n = cohort
            .members
            .iter()
            .filter(|m| m.windows[wi].events > 0)
            .count();
        let e: u64 = cohort
            .members
            .iter()
            .map(|m| u64::from(m.windows[wi].events))
            .sum();
        t.push(vec![
            w.name.as_str().into(),
            n.into(),
            e.into(),
            Value::float(cohort.members.len() as f64 * w.years()),
        ]);
    }
    out.push(t);
    let Some(iv) = &study.intervals else {
        return Ok(out);
    };
    let subgroups = subgroup_names(study);

    // Patients per band in each window, per subgroup, with the total as a margin.
    let mut t = counts_table(
        "interval_bands",
        "Frequency bands",
        &format!(
            "Patients by monitoring frequency band in each window (band from the {} interval of the patient's intervals in the window)",
            match iv.statistic {
                BandStatistic::Mean => "mean",
                BandStatistic::Median => "median",
            }
        ),
        &["subgroup", "window", "band"],
    );
    let mut bands: Vec<String> = iv.bands.iter().map(|b| b.name.clone()).collect();
    bands.push("none".into());
    for g in &subgroups {
        for (wi, w) in study.windows.iter().enumerate() {
            let ms: Vec<_> = cohort
                .members
                .iter()
                .filter(|m| m.subgroups.contains(g))
                .collect();
            for b in &bands {
                let n = ms.iter().filter(|m| &m.windows[wi].band == b).count();
                t.push(vec![
                    g.as_str().into(),
                    w.name.as_str().into(),
                    b.as_str().into(),
                    n.into(),
                ]);
            }
            t.push(vec![
                g.as_str().into(),
                w.name.as_str().into(),
                ALL.into(),
                ms.len().into(),
            ]);
        }
    }
    t.add_margin_constraints("band")?;
    let bands_at = out.len();
    out.push(t);

    if let Some((b, a)) = study.compare {
        let mut bands_table_links = Vec::new();
        let mut t = counts_table(
            "band_transitions",
            "Band transitions",
            &format!(
                "Cohort patients by band in {} (rows) and {} (columns), with margins",
                study.windows[b].name, study.windows[a].name
            ),
            &["before_band", "after_band"],
        );
        let mut keys: Vec<String> = bands.clone();
        keys.push(ALL.into());
        let cell =
            |x: usize, y: usize| CellRef::of("band_transitions", x * keys.len() + y, "n_patients");
        // The whole cohort's bands in each compared window are the transition table's margins:
        // the same counts in two tables, protected together.
        let nb = bands.len();
        let all = keys.len() - 1;
        for (wi, w) in [(b, true), (a, false)] {
            for (bi, _) in keys.iter().enumerate() {
                let row = wi * (nb + 1) + bi;
                let part = if w { cell(bi, all) } else { cell(all, bi) };
                bands_table_links.push(Link {
                    row,
                    parts: vec![part],
                });
            }
        }
        for x in &keys {
            for y in &keys {
                let n = cohort
                    .members
                    .iter()
                    .filter(|m| {
                        (x == ALL || &m.windows[b].band == x)
                            && (y == ALL || &m.windows[a].band == y)
                    })
                    .count();
                t.push(vec![x.as_str().into(), y.as_str().into(), n.into()]);
            }
        }
        t.add_margin_constraints("after_band")?;
        t.add_margin_constraints("before_band")?;
        out.push(t);
        out[bands_at].links.extend(bands_table_links);

        let mut t = counts_table(
            "subgroups",
            "Subgroups",
            "Cohort patients in each named subgroup of the band transition",
            &["subgroup"],
        );
        let nw = study.windows.len();
        for (gi, g) in subgroups.iter().enumerate() {
            let n = cohort
                .members
                .iter()
                .filter(|m| m.subgroups.contains(g))
                .count();
            // A subgroup's size is the sum of its transition cells, and the total of its bands
            // in every window.
            let parts: Vec<CellRef> = match study.subgroups.iter().find(|s| &s.name == g) {
                None => vec![cell(all, all)],
                Some(sg) => {
                    let mut p = Vec::new();
                    for (xi, x) in bands.iter().enumerate() {
                        for (yi, y) in bands.iter().enumerate() {
                            if sg.contains(x, y) {
                                p.push(cell(xi, yi));
                            }
                        }
                    }
                    p
                }
            };
            let row = t.rows.len();
            if !parts.is_empty() {
                t.links.push(Link { row, parts });
            }
            for wi in 0..nw {
                t.links.push(Link {
                    row,
                    parts: vec![CellRef::of(
                        "interval_bands",
                        (gi * nw + wi) * (nb + 1) + nb,
                        "n_patients",
                    )],
                });
            }
            t.push(vec![g.as_str().into(), n.into()]);
        }
        out.push(t);
    }

    // Interval summary per subgroup and window.
    let mut cols = vec![
        dim("subgroup", ""),
        dim("window", ""),
        patients_col(),
        col("n_intervals", Role::Count, "intervals ending in the window"),
        col("mean_days", Role::Statistic, "mean interval"),
    ];
    cols.extend(quantile_cols(&iv.quantiles, "n_intervals", "intervals"));
    let mut t = Table::new(
        "interval_summary",
        "Monitoring intervals",
        "Days between successive monitoring events of a patient, by subgroup and window",
        cols,
    );
    for g in &subgroups {
        for (wi, w) in study.windows.iter().enumerate() {
            let ms: Vec<_> = cohort
                .members
                .iter()
                .filter(|m| m.subgroups.contains(g) && !m.windows[wi].intervals.is_empty())
                .collect();
            let xs: Vec<f64> = ms
                .iter()
                .flat_map(|m| m.windows[wi].intervals.iter().copied())
                .collect();
            let mut row = vec![
                g.as_str().into(),
                w.name.as_str().into(),
                ms.len().into(),
                xs.len().into(),
                Value::opt(sluice_stats::mean(&xs).ok()),
            ];
            row.extend(quantile_values(&xs, &iv.quantiles));
            t.push(row);
        }
    }
    day_precision(&mut t, &iv.quantiles);
    out.push(t);

    // Intervals by calendar month of the event that ends them, over the whole history.
    let mut cols = vec![
        dim(
            "month",
            "calendar month (YYYY-MM) of the event ending the interval",
        ),
        patients_col(),
        col("n_intervals", Role::Count, ""),
        col("mean_days", Role::Statistic, ""),
    ];
    cols.extend(quantile_cols(&iv.quantiles, "n_intervals", "intervals"));
    let mut t = Table::new(
        "intervals_by_month",
        "Monitoring intervals by month",
        "Days between successive monitoring events of cohort patients, by the calendar month of the event ending each interval",
        cols,
    );
    let mut by_month: BTreeMap<String, (HashSet<u64>, Vec<f64>)> = BTreeMap::new();
    for &(p, _, to, days) in &cohort.intervals {
        let e = by_month.entry(crate::policy::month_label(to)).or_default();
        e.0.insert(p);
        e.1.push(days as f64);
    }
    for (m, (ps, xs)) in by_month {
        let mut row = vec![
            m.into(),
            ps.len().into(),
            xs.len().into(),
            Value::opt(sluice_stats::mean(&xs).ok()),
        ];
        row.extend(quantile_values(&xs, &iv.quantiles));
        t.push(row);
    }
    day_precision(&mut t, &iv.quantiles);
    out.push(t);
    Ok(out)
}

/// Intervals are whole days: the mean is released at a step that does not pin n_intervals, the
/// quantiles in whole days.
fn day_precision(t: &mut Table, quantiles: &[f64]) {
    let p = sluice_aggregate::Precision::Grid {
        grid: 1.0,
        n: "n_intervals".into(),
        by: None,
    };
    t.set_precision("mean_days", p.clone());
    for q in quantiles {
        t.set_precision(&qname(*q), p.clone());
    }
}

pub fn subgroup_names(study: &Study) -> Vec<String> {
    std::iter::once(ALL.to_string())
        .chain(study.subgroups.iter().map(|g| g.name.clone()))
        .collect()
}

/// Quantile columns at `ps` of the observations counted in column `n`.
pub fn quantile_cols(ps: &[f64], n: &str, of: &str) -> Vec<sluice_aggregate::Column> {
    ps.iter()
        .map(|p| {
            col(
                &qname(*p),
                Role::Quantile { p: *p, n: n.into() },
                &format!("quantile of the {of} (type 7)"),
            )
        })
        .collect()
}

pub fn qname(p: f64) -> String {
    let s = format!("{:.3}", p * 100.0);
    let s = s.trim_end_matches('0').trim_end_matches('.');
    format!("q{}", s.replace('.', "_"))
}

pub fn quantile_values(xs: &[f64], ps: &[f64]) -> Vec<Value> {
    match sluice_stats::quantiles(xs, ps) {
        Ok(q) => q.into_iter().map(Value::float).collect(),
        Err(_) => ps.iter().map(|_| Value::Null).collect(),
    }
}
