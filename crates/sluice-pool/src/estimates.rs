//! Estimates: rows with `estimate` and `se`, pooled across sites by inverse variance.

use sluice_aggregate::{Column, Role, Table, Value, col, dim};
use sluice_report::{ForestKind, ForestRow};
use sluice_stats::{MetaAnalysis, meta_analysis};
use std::collections::BTreeMap;

use crate::site::{Site, SiteTable};
use crate::{PoolError, key};

/// Confidence level of pooled intervals.
pub const LEVEL: f64 = 0.95;

/// One site's released estimate of one row.
#[derive(Clone, Debug, PartialEq)]
pub struct EstimateInput {
    pub site: String,
    pub estimate: f64,
    pub se: f64,
    pub lower: Option<f64>,
    pub upper: Option<f64>,
    pub n_patients: i64,
}

/// The pooled result of one row.
#[derive(Clone, Debug, PartialEq)]
pub struct PooledRow {
    pub meta: MetaAnalysis,
    pub n_sites: usize,
    pub n_patients: i64,
}

/// Pools the usable inputs (finite estimate, positive finite SE) of one row: `None` unless at
/// least 2 remain.
pub fn pool_rows(inputs: &[EstimateInput]) -> Option<PooledRow> {
    let ok: Vec<&EstimateInput> = inputs
        .iter()
        .filter(|i| i.estimate.is_finite() && i.se.is_finite() && i.se > 0.0)
        .collect();
    if ok.len() < 2 {
        return None;
    }
    let yi: Vec<f64> = ok.iter().map(|i| i.estimate).collect();
    let vi: Vec<f64> = ok.iter().map(|i| i.se * i.se).collect();
    let meta = meta_analysis(&yi, &vi, LEVEL).ok()?;
    Some(PooledRow {
        meta,
        n_sites: ok.len(),
        n_patients: ok.iter().map(|i| i.n_patients).sum(),
    })
}

pub(crate) fn is_estimate_table(t: &SiteTable) -> bool {
    t.column("estimate").is_some() && t.column("se").is_some()
}

/// A forest plot: its title and rows.
pub(crate) type Forest = (String, Vec<ForestRow>);

struct Group {
    table: String,
    dims: BTreeMap<String, Value>,
    inputs: Vec<EstimateInput>,
}

#[derive(Default)]
pub(crate) struct Collected {
    dim_names: Vec<String>,
    groups: Vec<Group>,
}

fn num(row: &[Value], c: Option<usize>) -> Option<f64> {
    c.and_then(|c| row[c].as_f64()).filter(|f| f.is_finite())
}

impl Collected {
    pub fn add(&mut self, sites: &[Site], t: &SiteTable, per_site: &[Option<&SiteTable>]) {
        let dims: Vec<usize> = (0..t.columns.len())
            .filter(|&c| t.columns[c].role == Role::Dimension)
            .collect();
        for &c in &dims {
            if !self.dim_names.contains(&t.columns[c].name) {
                self.dim_names.push(t.columns[c].name.clone());
            }
        }
        let names: Vec<&str> = dims.iter().map(|&c| t.columns[c].name.as_str()).collect();
        // Ratio-scale statistics with a log-scale twin are pooled on the log scale only.
        let stat_values: Vec<String> = t
            .column("statistic")
            .map(|sc| {
                t.rows
                    .iter()
                    .filter_map(|r| r[sc].as_text().map(str::to_string))
                    .collect()
            })
            .unwrap_or_default();
        let skip = |row: &[Value], st: &SiteTable| -> bool {
            st.column("statistic")
                .and_then(|sc| row[sc].as_text())
                .is_some_and(|s| stat_values.contains(&format!("log_{s}")))
        };
        let mut index: BTreeMap<String, usize> = BTreeMap::new();
        for (s, st) in per_site.iter().enumerate() {
            let Some(st) = st else { continue };
            let sdims: Vec<usize> = names.iter().filter_map(|n| st.column(n)).collect();
            if sdims.len() != names.len() {
                continue;
            }
            let (ec, sc, lc, uc) = (
                st.column("estimate"),
                st.column("se"),
                st.column("lower").or(st.column("ci_lower")),
                st.column("upper").or(st.column("ci_upper")),
            );
            let pc = st.columns.iter().position(|c| c.role == Role::Patients);
            for (r, row) in st.rows.iter().enumerate() {
                if skip(row, st) {
                    continue;
                }
                let k = key(row, &sdims);
                let g = *index.entry(k).or_insert_with(|| {
                    self.groups.push(Group {
                        table: t.name.clone(),
                        dims: names
                            .iter()
                            .zip(&sdims)
                            .map(|(n, &c)| (n.to_string(), row[c].clone()))
                            .collect(),
                        inputs: Vec::new(),
                    });
                    self.groups.len() - 1
                });
                if st.withheld(r) {
                    continue;
                }
                let (Some(estimate), Some(se)) = (num(row, ec), num(row, sc)) else {
                    continue;
                };
                self.groups[g].inputs.push(EstimateInput {
                    site: sites[s].label.clone(),
                    estimate,
                    se,
                    lower: num(row, lc),
                    upper: num(row, uc),
                    n_patients: pc.and_then(|c| row[c].as_i64()).unwrap_or(0),
                });
            }
        }
    }

    /// `pooled_estimates`, `site_estimates` and a forest plot per pooled row.
    pub fn build(&self, labels: &[String]) -> Result<(Table, Table, Vec<Forest>), PoolError> {
        let dim_cols = |extra: &[Column]| -> Vec<Column> {
            let mut v = vec![dim("source_table", "Site table the estimate comes from")];
            v.extend(
                self.dim_names
                    .iter()
                    .map(|n| dim(n, "As in the source table")),
            );
            v.extend(extra.iter().cloned());
            v
        };
        let stat = |n: &str, d: &str| col(n, Role::Statistic, d);
        let mut pooled = Table::new(
            "pooled_estimates",
            "Pooled estimates across sites",
            &format!(
                "Inverse-variance meta-analysis over the sites ({}) that released each row: fixed \
                 effect and DerSimonian-Laird random effects with {}% normal intervals, Cochran's Q \
                 on q_df degrees of freedom with its p-value q_p, I² as a proportion (0.92, not 92 \
                 %) and τ². Only rows released by at least 2 sites; n_sites says how many. \
                 n_patients is the sum of the sites' (rounded) patients. Ratios are pooled on the \
                 log scale.",
                labels.join(", "),
                LEVEL * 100.0
            ),
            dim_cols(&[
                col("n_patients", Role::Patients, "Sum of the sites' patients"),
                stat("n_sites", "Sites pooled"),
                stat("fixed_estimate", "Fixed-effect estimate"),
                stat("fixed_se", "Fixed-effect standard error"),
                stat("fixed_lower", "Fixed-effect lower limit"),
                stat("fixed_upper", "Fixed-effect upper limit"),
                stat(
                    "random_estimate",
                    "DerSimonian-Laird random-effects estimate",
                ),
                stat("random_se", "Random-effects standard error"),
                stat("random_lower", "Random-effects lower limit"),
                stat("random_upper", "Random-effects upper limit"),
                stat("q", "Cochran's Q"),
                stat("q_df", "Degrees of freedom of Q"),
                stat("q_p", "P(chi-squared >= Q)"),
                stat("i2", "I-squared as a proportion"),
                stat("tau2", "DerSimonian-Laird tau-squared"),
            ]),
        );
        let mut sites = Table::new(
            "site_estimates",
            "Site estimates pooled",
            "Each site's released estimate of every row in pooled_estimates, for forest plots.",
            dim_cols(&[
                dim("site", "Site label"),
                col("n_patients", Role::Patients, "Patients at the site"),
                stat("estimate", "Site estimate"),
                stat("lower", "Site lower limit"),
                stat("upper", "Site upper limit"),
                stat("se", "Site standard error"),
            ]),
        );
        let mut forests = Vec::new();
        let z = 1.959_963_984_540_054;
        for g in &self.groups {
            let Some(p) = pool_rows(&g.inputs) else {
                continue;
            };
            let mut dvals: Vec<Value> = vec![g.table.as_str().into()];
            dvals.extend(
                self.dim_names
                    .iter()
                    .map(|n| g.dims.get(n).cloned().unwrap_or(Value::Null)),
            );
            let m = &p.meta;
            let mut row = dvals.clone();
            row.extend([
                Value::Int(p.n_patients),
                Value::float(p.n_sites as f64),
                Value::float(m.fixed.estimate),
                Value::float(m.fixed.se),
                Value::float(m.fixed.lower),
                Value::float(m.fixed.upper),
                Value::float(m.random.estimate),
                Value::float(m.random.se),
                Value::float(m.random.lower),
                Value::float(m.random.upper),
                Value::float(m.q),
                Value::float(m.q_df),
                Value::float(m.q_p),
                Value::float(m.i2),
                Value::float(m.tau2),
            ]);
            pooled.push(row);
            let mut frows = Vec::new();
            let sw: f64 = g.inputs.iter().map(|i| 1.0 / (i.se * i.se)).sum();
            for i in &g.inputs {
                let lower = i.lower.unwrap_or(i.estimate - z * i.se);
                let upper = i.upper.unwrap_or(i.estimate + z * i.se);
                let mut row = dvals.clone();
                row.extend([
                    i.site.as_str().into(),
                    Value::Int(i.n_patients),
                    Value::float(i.estimate),
                    Value::float(lower),
                    Value::float(upper),
                    Value::float(i.se),
                ]);
                sites.push(row);
                let mut fr = ForestRow::estimate(&i.site, i.estimate, lower, upper);
                fr.weight = Some(1.0 / (i.se * i.se) / sw);
                frows.push(fr);
            }
            for (label, kind, pe) in [
                ("fixed effect", ForestKind::Fixed, m.fixed),
                ("random effects (DL)", ForestKind::Random, m.random),
            ] {
                let mut fr = ForestRow::estimate(label, pe.estimate, pe.lower, pe.upper);
                fr.kind = kind;
                frows.push(fr);
            }
            let title = std::iter::once(g.table.clone())
                .chain(
                    self.dim_names
                        .iter()
                        .filter_map(|n| g.dims.get(n).and_then(|v| v.as_text()).map(String::from)),
                )
                .collect::<Vec<_>>()
                .join(" · ");
            forests.push((
                format!(
                    "{title} (I² {:.1} %, τ² {:.4}, {} sites)",
                    m.i2 * 100.0,
                    m.tau2,
                    p.n_sites
                ),
                frows,
            ));
        }
        Ok((pooled, sites, forests))
    }
}
