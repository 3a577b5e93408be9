//! Count tables: pooled cells are sums of the sites' released cells, keyed by dimension values.

use sluice_aggregate::{Constraint, Role, Table, Value, col, dim};
use std::collections::BTreeMap;

use crate::site::SiteTable;
use crate::{MARKER, PoolError, key, site_list};

/// Confidence level of pooled Poisson limits.
const RATE_LEVEL: f64 = 0.95;

/// Which sites withheld each pooled cell, for the `pooled_withheld` table.
#[derive(Default)]
pub(crate) struct WithheldLog {
    /// (table, pooled row, sites that withheld or lacked it, patients at the sites that released it)
    rows: Vec<(String, usize, Vec<String>, i64)>,
}

impl WithheldLog {
    pub fn push(&mut self, table: &str, row: usize, sites: Vec<String>, released: i64) {
        self.rows.push((table.to_string(), row, sites, released));
    }

    pub fn table(&self, labels: &[String]) -> Table {
        let mut t = Table::new(
            "pooled_withheld",
            "Pooled cells withheld at a site",
            "One row per pooled cell that is withheld because at least one site withheld it (or \
             has no such row): source_table and pooled_row (0-based row of that pooled table) name \
             the cell, withheld_at the sites. n_patients is the sum over the sites that released \
             the cell, a lower bound of the pooled total.",
            vec![
                dim("source_table", "Pooled table"),
                dim("pooled_row", "0-based row index in the pooled table"),
                dim("withheld_at", "Sites that withheld the cell, joined by +"),
                col(
                    "n_patients",
                    Role::Patients,
                    "Patients at the sites that released the cell",
                ),
            ],
        );
        for (table, row, sites, released) in &self.rows {
            let s: Vec<&str> = sites.iter().map(String::as_str).collect();
            t.push(vec![
                table.as_str().into(),
                Value::Int(*row as i64),
                site_list(&s, labels.len()).into(),
                Value::Int(*released),
            ]);
        }
        t
    }
}

pub(crate) fn rounding_note(k: usize, base: u64) -> String {
    if base > 1 {
        format!(
            "Site counts are rounded to a multiple of {base}, so a pooled sum of {k} sites' counts \
             is within ±{} of the true total.",
            k as f64 * base as f64 / 2.0
        )
    } else {
        "Site counts are not rounded.".to_string()
    }
}

pub(crate) fn pool(
    labels: &[String],
    t: &SiteTable,
    per_site: &[Option<&SiteTable>],
    base: u64,
    log: &mut WithheldLog,
) -> Result<Table, PoolError> {
    let keep: Vec<usize> = (0..t.columns.len())
        .filter(|&c| {
            matches!(
                t.columns[c].role,
                Role::Dimension | Role::Patients | Role::Count | Role::PersonTime
            )
        })
        .collect();
    let dropped: Vec<&str> = (0..t.columns.len())
        .filter(|c| !keep.contains(c))
        .map(|c| t.columns[c].name.as_str())
        .collect();
    let dims: Vec<usize> = keep
        .iter()
        .copied()
        .filter(|&c| t.columns[c].role == Role::Dimension)
        .collect();
    let names: Vec<&str> = dims.iter().map(|&c| t.columns[c].name.as_str()).collect();

    // Union of keys, first site's order first.
    let mut order: Vec<(String, Vec<Value>)> = Vec::new();
    let mut index: BTreeMap<String, usize> = BTreeMap::new();
    let mut lookup: Vec<BTreeMap<String, usize>> = Vec::new();
    for st in per_site {
        let mut m = BTreeMap::new();
        if let Some(st) = st {
            let sdims: Vec<usize> = names.iter().filter_map(|n| st.column(n)).collect();
            if sdims.len() != names.len() {
                return Err(PoolError::Table {
                    table: t.name.clone(),
                    message: "the sites' tables have different dimensions".into(),
                });
            }
            for (r, row) in st.rows.iter().enumerate() {
                let k = key(row, &sdims);
                if !index.contains_key(&k) {
                    index.insert(k.clone(), order.len());
                    order.push((k.clone(), sdims.iter().map(|&c| row[c].clone()).collect()));
                }
                m.insert(k, r);
            }
        }
        lookup.push(m);
    }

    // Rates are pooled as the summed events over the summed person-time, computed at release
    // from the pooled (released) sums like any rate.
    let rates = ["n_events", "person_years", "rate_per_100py"]
        .iter()
        .all(|n| t.columns.iter().any(|c| c.name == *n));
    let mut columns = Vec::new();
    for &c in &keep {
        columns.push(t.columns[c].clone());
    }
    let k = labels.len();
    let mut description = t.description.clone();
    if !description.is_empty() {
        description.push(' ');
    }
    description.push_str(&format!(
        "Pooled over {}: each cell is the sum of the sites' released cells. {} A cell withheld at \
         any site is withheld here; table pooled_withheld names the sites.",
        labels.join(", "),
        rounding_note(k, base)
    ));
    if !dropped.is_empty() {
        description.push_str(&format!(
            " Site statistics not pooled (they do not add): {}.",
            dropped
                .iter()
                .filter(|d| !(rates && ["rate_per_100py", "lower", "upper"].contains(d)))
                .copied()
                .collect::<Vec<_>>()
                .join(", ")
        ));
    }
    if rates {
        for (n, d) in [
            (
                "rate_per_100py",
                "pooled events per 100 pooled patient-years",
            ),
            ("lower", "exact Poisson lower limit (95%)"),
            ("upper", "exact Poisson upper limit (95%)"),
        ] {
            columns.push(col(n, Role::Statistic, d));
        }
        description.push_str(" Rates are the pooled events over the pooled person-time.");
    }
    let mut out = Table::new(&t.name, &t.title, &description, columns);

    for (p, (k_, dvals)) in order.iter().enumerate() {
        let mut missing: Vec<String> = Vec::new();
        let mut sums: Vec<f64> = vec![0.0; keep.len()];
        let mut released_patients = 0i64;
        for (s, st) in per_site.iter().enumerate() {
            let row = st.and_then(|st| lookup[s].get(k_).map(|&r| (st, r)));
            let Some((st, r)) = row else {
                missing.push(labels[s].clone());
                continue;
            };
            if st.withheld(r) {
                missing.push(labels[s].clone());
                continue;
            }
            let mut ok = true;
            let mut vals = vec![0f64; keep.len()];
            for (i, &c) in keep.iter().enumerate() {
                let v = st.column(&t.columns[c].name).map(|sc| &st.rows[r][sc]);
                match (&t.columns[c].role, v) {
                    (Role::Dimension, _) => {}
                    (Role::PersonTime, Some(v)) if v.as_f64().is_some() => {
                        vals[i] = v.as_f64().unwrap_or(0.0);
                    }
                    (_, Some(Value::Int(v))) => vals[i] = *v as f64,
                    _ => ok = false,
                }
            }
            if !ok {
                missing.push(labels[s].clone());
                continue;
            }
            for i in 0..keep.len() {
                sums[i] += vals[i];
            }
            if let Some(pc) = st.columns.iter().position(|c| c.role == Role::Patients) {
                released_patients += st.rows[r][pc].as_i64().unwrap_or(0);
            }
        }
        let mut row = Vec::new();
        let mut d = 0;
        for (i, &c) in keep.iter().enumerate() {
            match (&t.columns[c].role, missing.is_empty()) {
                (Role::Dimension, _) => {
                    row.push(dvals[d].clone());
                    d += 1;
                }
                (Role::PersonTime, true) => row.push(Value::Float(sums[i])),
                (Role::PersonTime, false) => row.push(Value::Null),
                (_, true) => row.push(Value::Int(sums[i] as i64)),
                (_, false) => row.push(Value::Int(MARKER)),
            }
        }
        if rates {
            row.extend([Value::Null, Value::Null, Value::Null]);
            out.derive_rate_per_100py(out.rows.len(), RATE_LEVEL);
        }
        if !missing.is_empty() {
            log.push(&t.name, p, missing, released_patients);
        }
        out.push(row);
    }

    // The first site's constraints, mapped to pooled rows by dimension values.
    if let Some(st) = per_site.iter().find_map(|st| *st) {
        let sdims: Vec<usize> = names.iter().filter_map(|n| st.column(n)).collect();
        let map = |r: usize| -> Option<usize> {
            st.rows
                .get(r)
                .and_then(|row| index.get(&key(row, &sdims)).copied())
        };
        for c in &st.constraints {
            let total = map(c.total);
            let parts: Option<Vec<usize>> = c.parts.iter().map(|&p| map(p)).collect();
            if let (Some(total), Some(parts)) = (total, parts) {
                let c = Constraint { total, parts };
                if !out.constraints.contains(&c) {
                    out.constraints.push(c);
                }
            }
        }
    }
    Ok(out)
}
