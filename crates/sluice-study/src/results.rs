//! Result distributions (with the follow-up − baseline changes), worst results per patient with
//! their paired comparisons, and who flags: the analyses of result values.

use crate::cohort::{Member, quantile_cols, quantile_values, subgroup_names};
use crate::load::{Result_, SETTINGS, SEXES};
use crate::policy::{Dim, Study, Worse};
use crate::{MeasureError, counts_table, patients_col, z};
use rayon::prelude::*;
use sluice_aggregate::{
    ALL, CellRef, Formula, GridBy, Histogram, Precision, Role, Table, Value, col, dim,
};
use sluice_stats::{PairedCluster, RankMethod};
use std::collections::{BTreeMap, BTreeSet, HashMap, HashSet};

/// Context shared by the analyses: the study, the rows, and each patient's subgroups and age band.
pub struct Rows<'a> {
    pub study: &'a Study,
    pub rows: &'a [Result_],
    /// Patient → subgroups (cohort studies only).
    pub subgroups: HashMap<u64, &'a [String]>,
    /// Patient → age band (age at the patient's first row considered).
    pub age_band: HashMap<u64, String>,
    /// Each study analyte's result grid ([`analyte_grids`]).
    pub grids: Vec<f64>,
}

impl<'a> Rows<'a> {
    pub fn new(study: &'a Study, rows: &'a [Result_], members: Option<&'a [Member]>) -> Self {
        let subgroups = members
            .map(|ms| {
                ms.iter()
                    .map(|m| (m.patient, m.subgroups.as_slice()))
                    .collect()
            })
            .unwrap_or_default();
        let mut age_band = HashMap::new();
        for r in rows {
            age_band
                .entry(r.patient)
                .or_insert_with(|| study.age_band(r.age));
        }
        Rows {
            study,
            rows,
            subgroups,
            age_band,
            grids: analyte_grids(study, rows),
        }
    }

    /// Every cell key (values of `by`, in order) a row belongs to; none when it falls outside every
    /// window and the key needs one.
    pub fn keys(&self, by: &[Dim], r: &Result_) -> Vec<Vec<String>> {
        let mut keys = vec![Vec::with_capacity(by.len())];
        for d in by {
            let one = match d {
                Dim::Window => match self.study.window_of(crate::cohort::day(r.minute)) {
                    Some(w) => self.study.windows[w].name.clone(),
                    None => return Vec::new(),
                },
                Dim::Month => crate::policy::month_label(crate::cohort::day(r.minute)),
                Dim::Setting => SETTINGS[r.setting as usize].to_string(),
                Dim::Sex => SEXES[r.sex as usize].to_string(),
                Dim::AgeBand => self.age_band.get(&r.patient).cloned().unwrap_or_default(),
                Dim::Subgroup => {
                    let gs = self.subgroups.get(&r.patient).copied().unwrap_or(&[]);
                    keys = keys
                        .into_iter()
                        .flat_map(|k| {
                            gs.iter().map(move |g| {
                                let mut k = k.clone();
                                k.push(g.clone());
                                k
                            })
                        })
                        .collect();
                    continue;
                }
            };
            for k in &mut keys {
                k.push(one.clone());
            }
        }
        keys
    }

    /// Rows the value analyses use: monitoring events only when the policy says so.
    fn usable(&self, events_only: bool) -> impl Iterator<Item = &Result_> {
        self.rows.iter().filter(move |r| {
            (!events_only || r.event) && (r.analyte as usize) < self.study.analytes.len()
        })
    }
}

/// Per analyte: tests, flagged tests, patients tested, patients flagged.
type TestCounts = (u64, u64, HashSet<u64>, HashSet<u64>);

#[derive(Default)]
struct Cell {
    values: Vec<f64>,
    patients: Vec<u64>,
}

/// The finest decimal grid each study analyte's results are recorded on: 10^-d for the most
/// decimals any of its results has (up to 6). A sum of results is a multiple of it, which is what
/// the release precision of means must not give away.
pub fn analyte_grids(study: &Study, rows: &[Result_]) -> Vec<f64> {
    let mut decimals = vec![0i32; study.analytes.len()];
    for r in rows {
        let Some(d) = decimals.get_mut(r.analyte as usize) else {
            continue;
        };
        while *d < 6 {
            let scaled = r.value * 10f64.powi(*d);
            if (scaled - scaled.round()).abs() <= 1e-6 * scaled.abs().max(1.0) {
                break;
            }
            *d += 1;
        }
    }
    decimals.into_iter().map(|d| 10f64.powi(-d)).collect()
}

/// Release precision over the observations counted in `n`, with each analyte's own grid (rows
/// of another analyte use the coarsest, which only rounds more).
pub fn analyte_precision(study: &Study, grids: &[f64], n: &str) -> Precision {
    let map: BTreeMap<String, f64> = study
        .analytes
        .iter()
        .zip(grids)
        .map(|(a, g)| (a.id.clone(), *g))
        .collect();
    Precision::Grid {
        grid: grids.iter().copied().fold(1.0, f64::max),
        n: n.into(),
        by: Some(GridBy {
            dimension: "analyte".into(),
            grids: map,
        }),
    }
}

/// p-values are released to two significant digits: exact p-values of rank and t tests depend
/// on n and can single out the count. Common practice in reporting (two significant digits).
pub fn p_precision() -> Precision {
    Precision::Significant { digits: 2 }
}

pub fn distributions(ctx: &Rows<'_>) -> Result<Vec<Table>, MeasureError> {
    let study = ctx.study;
    let Some(d) = &study.distributions else {
        return Ok(Vec::new());
    };
    let mut cells: BTreeMap<(Vec<String>, u16), Cell> = BTreeMap::new();
    for r in ctx.usable(d.events_only) {
        for k in ctx.keys(&d.by, r) {
            let c = cells.entry((k, r.analyte)).or_default();
            c.values.push(r.value);
            c.patients.push(r.patient);
        }
    }
    let dims: Vec<_> =
        d.by.iter()
            .map(|x| dim(x.name(), ""))
            .chain([dim("analyte", "")])
            .collect();
    let mut cols = dims.clone();
    cols.extend([
        patients_col(),
        col("n_results", Role::Count, "results"),
        col("mean", Role::Statistic, ""),
        col("sd", Role::Statistic, "standard deviation"),
    ]);
    cols.extend(quantile_cols(&d.quantiles, "n_results", "results"));
    let mut dist = Table::new(
        "distributions",
        "Result distributions",
        "Results per cell: count, patients, mean, standard deviation and quantiles (type 7); minima and maxima are never computed for release",
        cols,
    );
    let mut hcols = dims.clone();
    hcols.extend([
        col(
            "bin_lower",
            Role::Dimension,
            "lower edge (inclusive); empty for the open lower tail",
        ),
        col(
            "bin_upper",
            Role::Dimension,
            "upper edge (exclusive); empty for the open upper tail",
        ),
        patients_col(),
        col("n_results", Role::Count, ""),
        col("patients_at_or_below", Role::Support, ""),
        col("patients_at_or_above", Role::Support, ""),
    ]);
    let mut hist = Table::new(
        "histograms",
        "Histograms",
        "Results per fixed bin of the study policy",
        hcols,
    );
    hist.histogram = Some(Histogram {
        group_by: dims.iter().map(|c| c.name.clone()).collect(),
        lower: "bin_lower".into(),
        upper: "bin_upper".into(),
        patients_at_or_below: "patients_at_or_below".into(),
        patients_at_or_above: "patients_at_or_above".into(),
    });
    for ((key, a), c) in &cells {
        let an = &study.analytes[*a as usize];
        let distinct: HashSet<u64> = c.patients.iter().copied().collect();
        let mut row: Vec<Value> = key.iter().map(|k| k.as_str().into()).collect();
        row.push(an.id.as_str().into());
        let mut drow = row.clone();
        drow.extend([
            distinct.len().into(),
            c.values.len().into(),
            Value::opt(sluice_stats::mean(&c.values).ok()),
            Value::opt(sluice_stats::sd(&c.values).ok()),
        ]);
        drow.extend(quantile_values(&c.values, &d.quantiles));
        dist.push(drow);
        // Per bin: distinct patients, and per patient the lowest and highest bin, for the
        // cumulative counts the tail-merging rule needs.
        let nb = an.bins.len();
        let mut n = vec![0u64; nb];
        let mut pb: Vec<HashSet<u64>> = vec![HashSet::new(); nb];
        let mut span: HashMap<u64, (usize, usize)> = HashMap::new();
        for (&v, &p) in c.values.iter().zip(&c.patients) {
            let b = an.bins.index(v);
            n[b] += 1;
            pb[b].insert(p);
            let e = span.entry(p).or_insert((b, b));
            e.0 = e.0.min(b);
            e.1 = e.1.max(b);
        }
        for b in 0..nb {
            let (lo, hi) = an.bins.edges(b);
            let below = span.values().filter(|s| s.0 <= b).count();
            let above = span.values().filter(|s| s.1 >= b).count();
            let mut hrow = row.clone();
            hrow.extend([
                Value::opt(lo),
                Value::opt(hi),
                pb[b].len().into(),
                n[b].into(),
                below.into(),
                above.into(),
            ]);
            hist.push(hrow);
        }
    }
    let prec = analyte_precision(study, &ctx.grids, "n_results");
    for c in ["mean", "sd"]
        .into_iter()
        .map(String::from)
        .chain(d.quantiles.iter().map(|p| crate::cohort::qname(*p)))
    {
        dist.set_precision(&c, prec.clone());
    }
    let mut out = vec![dist, hist];

    // Changes between the compared windows, per cell without the window.
    if let (Some((b, a)), Some(wpos)) = (study.compare, d.by.iter().position(|x| *x == Dim::Window))
    {
        let (bn, an_) = (&study.windows[b].name, &study.windows[a].name);
        let mut pairs: BTreeMap<(Vec<String>, u16), [Option<&Cell>; 2]> = BTreeMap::new();
        for ((key, a), c) in &cells {
            let w = &key[wpos];
            let slot = if w == bn {
                0
            } else if w == an_ {
                1
            } else {
                continue;
            };
            let mut k = key.clone();
            k.remove(wpos);
            pairs.entry((k, *a)).or_default()[slot] = Some(c);
        }
        let bs = &study.bootstrap;
        let jobs: Vec<_> = pairs
            .into_iter()
            .enumerate()
            .filter_map(|(i, (k, [x, y]))| Some((i, k, x?, y?)))
            .collect();
        let rows: Vec<Vec<Vec<Value>>> = jobs
            .par_iter()
            .map(|(i, (key, a), before, after)| {
                let mut byp: BTreeMap<u64, (Vec<f64>, Vec<f64>)> = BTreeMap::new();
                for (&v, &p) in before.values.iter().zip(&before.patients) {
                    byp.entry(p).or_default().0.push(v);
                }
                for (&v, &p) in after.values.iter().zip(&after.patients) {
                    byp.entry(p).or_default().1.push(v);
                }
                let both: Vec<PairedCluster<'_>> = byp
                    .values()
                    .filter(|(x, y)| !x.is_empty() && !y.is_empty())
                    .map(|(x, y)| PairedCluster {
                        baseline: x,
                        follow_up: y,
                    })
                    .collect();
                let base: Vec<Value> = key
                    .iter()
                    .map(|k| k.as_str().into())
                    .chain([study.analytes[*a as usize].id.as_str().into()])
                    .collect();
                let seed = bs.seed.wrapping_add(*i as u64);
                let median = |x: &[f64]| {
                    let mut v = x.to_vec();
                    let m = v.len() / 2;
                    if v.len() % 2 == 1 {
                        *v.select_nth_unstable_by(m, f64::total_cmp).1
                    } else {
                        let hi = *v.select_nth_unstable_by(m, f64::total_cmp).1;
                        let lo = v[..m].iter().copied().fold(f64::NEG_INFINITY, f64::max);
                        (lo + hi) / 2.0
                    }
                };
                let mean = |x: &[f64]| x.iter().sum::<f64>() / x.len() as f64;
                let mut rows = Vec::new();
                let ivs = sluice_stats::bootstrap_clustered_diff_many(
                    &both,
                    &[&mean, &median],
                    bs.replicates,
                    seed,
                    bs.level,
                )
                .ok();
                for (k, name) in ["mean_difference", "median_difference"]
                    .into_iter()
                    .enumerate()
                {
                    let iv = ivs.as_ref().map(|v| v[k]);
                    let mut r = base.clone();
                    r.extend([
                        name.into(),
                        "patient-clustered percentile bootstrap".into(),
                        both.len().into(),
                    ]);
                    r.extend(estimate_values(
                        iv.map(|i| (i.estimate, i.lower, i.upper)),
                        bs.level,
                    ));
                    rows.push(r);
                }
                let hl = sluice_stats::hodges_lehmann_two_sample(
                    &after.values,
                    &before.values,
                    bs.level,
                    RankMethod::Auto,
                )
                .ok();
                let ps: HashSet<u64> = before
                    .patients
                    .iter()
                    .chain(&after.patients)
                    .copied()
                    .collect();
                let mut r = base.clone();
                r.extend([
                    "hodges_lehmann_shift".into(),
                    "Hodges-Lehmann, Mann-Whitney interval".into(),
                    ps.len().into(),
                ]);
                r.extend(estimate_values(
                    hl.map(|h| (h.interval.estimate, h.interval.lower, h.interval.upper)),
                    bs.level,
                ));
                rows.push(r);
                rows
            })
            .collect();
        let mut cols: Vec<_> =
            d.by.iter()
                .filter(|x| **x != Dim::Window)
                .map(|x| dim(x.name(), ""))
                .collect();
        cols.extend([
            dim("analyte", ""),
            dim("statistic", "what the estimate is"),
            dim("method", "how its interval was computed"),
            patients_col(),
        ]);
        cols.extend(estimate_cols());
        let mut t = Table::new(
            "distribution_changes",
            "Change in result distributions",
            &format!(
                "{an_} minus {bn}: difference in mean and median (patients with results in both windows; patient-clustered percentile bootstrap) and the Hodges-Lehmann shift with its Mann-Whitney interval, which treats results as independent (the bootstrap intervals do not)"
            ),
            cols,
        );
        for r in rows.into_iter().flatten() {
            t.push(r);
        }
        // Over the patients with results in both windows: fewer than the results, so the step
        // is at least as coarse as the results' count would need.
        let prec = analyte_precision(study, &ctx.grids, "n_patients");
        for c in ["estimate", "lower", "upper", "se"] {
            t.set_precision(c, prec.clone());
        }
        out.push(t);
    }
    Ok(out)
}

/// Columns of an effect estimate, with a standard error for inverse-variance pooling.
pub fn estimate_cols() -> Vec<sluice_aggregate::Column> {
    vec![
        col("estimate", Role::Statistic, ""),
        col("lower", Role::Statistic, "lower confidence limit"),
        col("upper", Role::Statistic, "upper confidence limit"),
        col(
            "se",
            Role::Statistic,
            "standard error (for an interval not built from one: width / (2 z), the usual back-calculation)",
        ),
    ]
}

pub fn estimate_values(e: Option<(f64, f64, f64)>, level: f64) -> Vec<Value> {
    match e {
        Some((est, lo, hi)) => vec![
            Value::float(est),
            Value::float(lo),
            Value::float(hi),
            Value::float((hi - lo) / (2.0 * z(level))),
        ],
        None => vec![Value::Null; 4],
    }
}

/// Each cohort patient's worst result per analyte and window (closest to abnormal), used by the
/// paired comparisons and written as a patient-level table.
pub struct Worst {
    /// (patient, analyte index, window index) → value.
    pub values: BTreeMap<(u64, u16, usize), f64>,
}

pub fn worst(ctx: &Rows<'_>) -> Option<Worst> {
    let events_only = ctx.study.worst_events_only?;
    let mut values: BTreeMap<(u64, u16, usize), f64> = BTreeMap::new();
    for r in ctx.usable(events_only) {
        let Some(w) = ctx.study.window_of(crate::cohort::day(r.minute)) else {
            continue;
        };
        let dir = ctx.study.analytes[r.analyte as usize].worse;
        values
            .entry((r.patient, r.analyte, w))
            .and_modify(|v| {
                *v = match dir {
                    Worse::Higher => v.max(r.value),
                    Worse::Lower => v.min(r.value),
                }
            })
            .or_insert(r.value);
    }
    Some(Worst { values })
}

pub fn worst_tables(
    ctx: &Rows<'_>,
    w: &Worst,
    members: &[Member],
) -> Result<Vec<Table>, MeasureError> {
    let study = ctx.study;
    let (b, a) = study.compare.expect("validated");
    let level = study.bootstrap.level;
    let mut cols = vec![
        dim("subgroup", ""),
        dim("analyte", ""),
        patients_col(),
        col(
            "mean_before",
            Role::Statistic,
            "mean worst result, first window",
        ),
        col(
            "mean_after",
            Role::Statistic,
            "mean worst result, second window",
        ),
    ];
    cols.extend([dim("statistic", ""), dim("method", "")]);
    cols.extend(estimate_cols());
    cols.push(col(
        "p_value",
        Role::Statistic,
        "two-sided p of the test named by method",
    ));
    let mut paired = Table::new(
        "worst_paired",
        "Worst results: paired differences",
        &format!(
            "Per patient the worst result of each analyte in {} and in {}; {} minus {}: mean difference with a paired t interval, and the Hodges-Lehmann estimate with the Wilcoxon signed-rank interval",
            study.windows[b].name,
            study.windows[a].name,
            study.windows[a].name,
            study.windows[b].name
        ),
        cols,
    );
    let mut crossing = counts_table(
        "worst_abnormal",
        "Worst results: abnormal before and after",
        "Patients whose worst result is abnormal under each threshold set in the first window, the second, both or neither (paired, with the total as a margin)",
        &["subgroup", "analyte", "threshold_set", "crossing"],
    );
    let mut mc_cols = vec![
        dim("subgroup", ""),
        dim("analyte", ""),
        dim("threshold_set", ""),
        patients_col(),
    ];
    mc_cols.extend([
        col(
            "chi2_corrected",
            Role::Statistic,
            "McNemar chi-squared with continuity correction",
        ),
        col(
            "p_value",
            Role::Statistic,
            "two-sided p, continuity-corrected",
        ),
        col("p_exact", Role::Statistic, "two-sided exact binomial p"),
    ]);
    let mut mcn = Table::new(
        "worst_mcnemar",
        "Worst results: McNemar's test",
        "McNemar's test of the paired abnormal/normal crossings of the worst results",
        mc_cols,
    );
    for g in subgroup_names(study) {
        let ps: Vec<u64> = members
            .iter()
            .filter(|m| m.subgroups.contains(&g))
            .map(|m| m.patient)
            .collect();
        for (ai, an) in study.analytes.iter().enumerate() {
            let ai = ai as u16;
            let pairs: Vec<(f64, f64)> = ps
                .iter()
                .filter_map(|p| Some((*w.values.get(&(*p, ai, b))?, *w.values.get(&(*p, ai, a))?)))
                .collect();
            let (x, y): (Vec<f64>, Vec<f64>) = pairs.iter().copied().unzip();
            let n = pairs.len();
            let base = |s: &str, m: &str| -> Vec<Value> {
                vec![
                    g.as_str().into(),
                    an.id.as_str().into(),
                    n.into(),
                    Value::opt(sluice_stats::mean(&x).ok()),
                    Value::opt(sluice_stats::mean(&y).ok()),
                    s.into(),
                    m.into(),
                ]
            };
            let t = sluice_stats::paired_t_ci(&y, &x, level).ok();
            // The t limits and p are recomputed at release from the released estimate, SE and
            // rounded n: from exact ones, (upper − estimate) / se is a t quantile that gives n.
            let tr = paired.rows.len();
            let here = |c: &str| CellRef::here(tr, c);
            for (c, f) in [
                ("lower", Formula::TLower),
                ("upper", Formula::TUpper),
                ("p_value", Formula::TPValue),
            ] {
                paired.derive(
                    tr,
                    c,
                    f,
                    vec![here("estimate"), here("se"), here("n_patients")],
                    level,
                    0.0,
                );
            }
            let mut r = base("mean_difference", "paired t");
            r.extend(match t {
                Some(t) => vec![
                    Value::float(t.interval.estimate),
                    Value::float(t.interval.lower),
                    Value::float(t.interval.upper),
                    Value::float(t.se),
                ],
                None => vec![Value::Null; 4],
            });
            r.push(Value::opt(
                t.and_then(|t| paired_t_p(t.interval.estimate, t.se, t.df)),
            ));
            paired.push(r);
            let d = sluice_stats::differences(&y, &x).unwrap_or_default();
            let hl = sluice_stats::hodges_lehmann_one_sample(&d, level, RankMethod::Auto).ok();
            let sr = sluice_stats::signed_rank_test(
                &d,
                sluice_stats::Alternative::TwoSided,
                RankMethod::Auto,
            )
            .ok();
            let mut r = base("hodges_lehmann", "Wilcoxon signed-rank");
            r.extend(estimate_values(
                hl.map(|h| (h.interval.estimate, h.interval.lower, h.interval.upper)),
                level,
            ));
            r.push(Value::opt(sr.map(|s| s.p_value)));
            paired.push(r);
            for set in &study.threshold_sets {
                let Some(rule) = set.rules.get(&an.id) else {
                    continue;
                };
                let mut n4 = [0usize; 4];
                for &(before, after) in &pairs {
                    n4[usize::from(rule.abnormal(before)) * 2
                        + usize::from(rule.abnormal(after))] += 1;
                }
                let start = crossing.rows.len();
                for (name, k) in [
                    ("normal_both", 0),
                    ("abnormal_after_only", 1),
                    ("abnormal_before_only", 2),
                    ("abnormal_both", 3),
                ] {
                    crossing.push(vec![
                        g.as_str().into(),
                        an.id.as_str().into(),
                        set.name.as_str().into(),
                        name.into(),
                        n4[k].into(),
                    ]);
                }
                crossing.push(vec![
                    g.as_str().into(),
                    an.id.as_str().into(),
                    set.name.as_str().into(),
                    ALL.into(),
                    n.into(),
                ]);
                crossing.constraints.push(sluice_aggregate::Constraint {
                    total: start + 4,
                    parts: (start..start + 4).collect(),
                });
                let m = sluice_stats::mcnemar(n4[2] as u64, n4[1] as u64).ok();
                // From the released discordant cells of worst_abnormal, or withheld with them.
                let mr = mcn.rows.len();
                let b = CellRef::of("worst_abnormal", start + 2, "n_patients");
                let c = CellRef::of("worst_abnormal", start + 1, "n_patients");
                for (col, f) in [
                    ("chi2_corrected", Formula::McNemarChi2),
                    ("p_value", Formula::McNemarP),
                    ("p_exact", Formula::McNemarExactP),
                ] {
                    mcn.derive(mr, col, f, vec![b.clone(), c.clone()], 0.0, 0.0);
                }
                mcn.push(vec![
                    g.as_str().into(),
                    an.id.as_str().into(),
                    set.name.as_str().into(),
                    n.into(),
                    Value::opt(m.map(|m| m.chi2_corrected)),
                    Value::opt(m.map(|m| m.p_chi2_corrected)),
                    Value::opt(m.map(|m| m.p_exact)),
                ]);
            }
        }
    }
    let prec = analyte_precision(study, &ctx.grids, "n_patients");
    for c in ["mean_before", "mean_after", "estimate", "se"] {
        paired.set_precision(c, prec.clone());
    }
    // Hodges-Lehmann rows: their limits are order statistics of Walsh averages, on half the grid.
    for c in ["lower", "upper"] {
        paired.set_precision(c, prec.clone());
    }
    paired.set_precision("p_value", p_precision());
    Ok(vec![paired, crossing, mcn])
}

fn paired_t_p(est: f64, se: f64, df: f64) -> Option<f64> {
    use statrs::distribution::{ContinuousCDF, StudentsT};
    let t = StudentsT::new(0.0, 1.0, df).ok()?;
    Some(2.0 * t.sf((est / se).abs()))
}

/// flag_combinations lists all 2^k combinations of a set's k analytes.
const MAX_COMBINATION_ANALYTES: usize = 10;

/// Who flags: patients with an abnormal result by age band and sex, the share of tests flagged,
/// the combinations of flagged analytes per patient, and the overlap between threshold sets.
pub fn flags(ctx: &Rows<'_>) -> Result<Vec<Table>, MeasureError> {
    let study = ctx.study;
    if study.age_bands.is_none() {
        return Ok(Vec::new());
    }
    let events_only = study.distributions.as_ref().is_some_and(|d| d.events_only);
    let in_scope = |r: &Result_| {
        study.windows.is_empty() || study.window_of(crate::cohort::day(r.minute)).is_some()
    };
    // Per set: patient → flagged analytes; per set and analyte: (tests, flagged tests, patients, flagged patients).
    let nsets = study.threshold_sets.len();
    let mut flagged: Vec<BTreeMap<u64, BTreeSet<u16>>> = vec![BTreeMap::new(); nsets];
    let mut patients: BTreeMap<u64, (String, u8)> = BTreeMap::new();
    let mut tests: Vec<BTreeMap<u16, TestCounts>> = vec![BTreeMap::new(); nsets];
    for r in ctx.usable(events_only).filter(|r| in_scope(r)) {
        patients
            .entry(r.patient)
            .or_insert_with(|| (ctx.age_band[&r.patient].clone(), r.sex));
        let id = &study.analytes[r.analyte as usize].id;
        for (s, set) in study.threshold_sets.iter().enumerate() {
            let Some(rule) = set.rules.get(id) else {
                continue;
            };
            let e = tests[s].entry(r.analyte).or_default();
            e.0 += 1;
            e.2.insert(r.patient);
            if rule.abnormal(r.value) {
                e.1 += 1;
                e.3.insert(r.patient);
                flagged[s].entry(r.patient).or_default().insert(r.analyte);
            }
        }
    }
    let mut out = Vec::new();
    let mut t = counts_table(
        "flags_by_age_sex",
        "Who flags: age and sex",
        "Patients with at least one abnormal result (yes) or none (no), by threshold set, age band and sex",
        &["threshold_set", "age_band", "sex", "flagged"],
    );
    let mut bands: BTreeSet<String> = patients.values().map(|p| p.0.clone()).collect();
    bands.insert(ALL.into());
    for (s, set) in study.threshold_sets.iter().enumerate() {
        for band in &bands {
            for (sx, sex) in SEXES
                .iter()
                .enumerate()
                .map(|(i, s)| (Some(i as u8), *s))
                .chain([(None, ALL)])
            {
                let ps: Vec<u64> = patients
                    .iter()
                    .filter(|(_, (b, x))| {
                        (band == ALL || b == band) && sx.is_none_or(|sx| sx == *x)
                    })
                    .map(|(p, _)| *p)
                    .collect();
                let yes = ps.iter().filter(|p| flagged[s].contains_key(p)).count();
                for (f, n) in [("yes", yes), ("no", ps.len() - yes), (ALL, ps.len())] {
                    t.push(vec![
                        set.name.as_str().into(),
                        band.as_str().into(),
                        sex.into(),
                        f.into(),
                        n.into(),
                    ]);
                }
            }
        }
    }
    t.add_margin_constraints("flagged")?;
    t.add_margin_constraints("sex")?;
    t.add_margin_constraints("age_band")?;
    out.push(t);

    let mut cols = vec![
        dim("threshold_set", ""),
        dim("analyte", ""),
        dim("flagged", "yes: flagged tests only; all: every test"),
        patients_col(),
        col("n_tests", Role::Count, ""),
    ];
    cols.extend([
        col(
            "share",
            Role::Statistic,
            "share of tests flagged (yes rows)",
        ),
        col("lower", Role::Statistic, "Wilson lower limit"),
        col("upper", Role::Statistic, "Wilson upper limit"),
    ]);
    let mut t = Table::new(
        "flagged_tests",
        "Who flags: tests flagged",
        "Monitoring tests flagged abnormal per analyte and threshold set, with the share and its Wilson interval",
        cols,
    );
    for (s, set) in study.threshold_sets.iter().enumerate() {
        for (a, (n, k, ps, fps)) in &tests[s] {
            let id = study.analytes[*a as usize].id.as_str();
            let w = sluice_stats::wilson_ci(*k, *n, study.bootstrap.level).ok();
            // Share and limits from the released (rounded) flagged and total tests.
            let yes = t.rows.len();
            let part = CellRef::here(yes, "n_tests");
            let whole = CellRef::here(yes + 1, "n_tests");
            for (c, f) in [
                ("share", Formula::Share),
                ("lower", Formula::WilsonLower),
                ("upper", Formula::WilsonUpper),
            ] {
                t.derive(
                    yes,
                    c,
                    f,
                    vec![part.clone(), whole.clone()],
                    study.bootstrap.level,
                    0.0,
                );
            }
            t.push(vec![
                set.name.as_str().into(),
                id.into(),
                "yes".into(),
                fps.len().into(),
                (*k).into(),
                Value::opt(w.map(|w| w.estimate)),
                Value::opt(w.map(|w| w.lower)),
                Value::opt(w.map(|w| w.upper)),
            ]);
            t.push(vec![
                set.name.as_str().into(),
                id.into(),
                ALL.into(),
                ps.len().into(),
                (*n).into(),
                Value::Null,
                Value::Null,
                Value::Null,
            ]);
        }
    }
    out.push(t);

    let mut t = counts_table(
        "flag_combinations",
        "Who flags: combinations",
        "Patients by the combination of analytes flagged abnormal at least once (none: no flag)",
        &["threshold_set", "combination"],
    );
    for (s, set) in study.threshold_sets.iter().enumerate() {
        // Every combination the set can flag is listed, occurring or not, so that a row's
        // presence says nothing about a patient.
        let ids: Vec<u16> = (0..study.analytes.len() as u16)
            .filter(|a| set.rules.contains_key(&study.analytes[*a as usize].id))
            .collect();
        if ids.len() > MAX_COMBINATION_ANALYTES {
            return Err(MeasureError::Store(format!(
                "threshold set {} flags {} analytes; flag_combinations lists every combination and allows at most {MAX_COMBINATION_ANALYTES}",
                set.name,
                ids.len()
            )));
        }
        let mut combos: BTreeMap<String, usize> = BTreeMap::new();
        for mask in 0u32..1 << ids.len() {
            let name = if mask == 0 {
                "none".to_string()
            } else {
                ids.iter()
                    .enumerate()
                    .filter(|(i, _)| mask & (1 << i) != 0)
                    .map(|(_, a)| study.analytes[*a as usize].id.as_str())
                    .collect::<Vec<_>>()
                    .join("+")
            };
            combos.insert(name, 0);
        }
        for p in patients.keys() {
            let c = match flagged[s].get(p) {
                Some(fs) => fs
                    .iter()
                    .map(|a| study.analytes[*a as usize].id.as_str())
                    .collect::<Vec<_>>()
                    .join("+"),
                None => "none".into(),
            };
            *combos.entry(c).or_default() += 1;
        }
        for (c, n) in combos {
            t.push(vec![set.name.as_str().into(), c.into(), n.into()]);
        }
        t.push(vec![
            set.name.as_str().into(),
            ALL.into(),
            patients.len().into(),
        ]);
    }
    t.add_margin_constraints("combination")?;
    out.push(t);

    let mut t = counts_table(
        "set_overlap",
        "Who flags: overlap of threshold sets",
        "Patients flagged by both sets of a pair, by one only, or by neither",
        &["first_set", "second_set", "flagged_by"],
    );
    for i in 0..nsets {
        for j in i + 1..nsets {
            let mut n4 = [0usize; 4];
            for p in patients.keys() {
                n4[usize::from(flagged[i].contains_key(p)) * 2
                    + usize::from(flagged[j].contains_key(p))] += 1;
            }
            let (x, y) = (
                study.threshold_sets[i].name.as_str(),
                study.threshold_sets[j].name.as_str(),
            );
            for (name, k) in [
                ("neither", 0),
                ("second_only", 1),
                ("first_only", 2),
                ("both", 3),
            ] {
                t.push(vec![x.into(), y.into(), name.into(), n4[k].into()]);
            }
            t.push(vec![x.into(), y.into(), ALL.into(), patients.len().into()]);
        }
    }
    t.add_margin_constraints("flagged_by")?;
    out.push(t);
    Ok(out)
}
