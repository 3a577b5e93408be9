//! Histograms: pooled bin by bin over the union of the sites' bins, and quantiles estimated from
//! the pooled histogram by linear interpolation within bins.

use sluice_aggregate::{Role, Table, Value, col, dim};
use std::collections::BTreeMap;

use crate::counts::{WithheldLog, rounding_note};
use crate::site::SiteTable;
use crate::{MARKER, PoolError, key};

const LOWER: &str = "bin_lower";
const UPPER: &str = "bin_upper";
/// The quantiles estimated from each pooled histogram.
const QUANTILES: [(&str, f64); 5] = [
    ("q5", 0.05),
    ("q25", 0.25),
    ("q50", 0.5),
    ("q75", 0.75),
    ("q95", 0.95),
];

pub(crate) fn is_histogram(t: &SiteTable) -> bool {
    t.column(LOWER).is_some() && t.column(UPPER).is_some()
}

struct Bin {
    lower: f64,
    upper: f64,
    counts: Vec<i64>,
    withheld: bool,
}

#[derive(Default)]
struct Group {
    dims: Vec<Value>,
    /// Per site: its bins of this group.
    bins: Vec<Vec<Bin>>,
}

pub(crate) fn pool(
    labels: &[String],
    t: &SiteTable,
    per_site: &[Option<&SiteTable>],
    base: u64,
    log: &mut WithheldLog,
) -> Result<(Table, Option<Table>), PoolError> {
    let gdims: Vec<usize> = (0..t.columns.len())
        .filter(|&c| {
            t.columns[c].role == Role::Dimension
                && t.columns[c].name != LOWER
                && t.columns[c].name != UPPER
        })
        .collect();
    let gnames: Vec<&str> = gdims.iter().map(|&c| t.columns[c].name.as_str()).collect();
    let counts: Vec<usize> = (0..t.columns.len())
        .filter(|&c| matches!(t.columns[c].role, Role::Patients | Role::Count))
        .collect();
    let cnames: Vec<&str> = counts.iter().map(|&c| t.columns[c].name.as_str()).collect();
    let pidx = counts
        .iter()
        .position(|&c| t.columns[c].role == Role::Patients)
        .ok_or_else(|| PoolError::Table {
            table: t.name.clone(),
            message: "no patients column".into(),
        })?;
    // The count interpolated for quantiles: the first other count (observations), else patients.
    let qidx = counts
        .iter()
        .position(|&c| t.columns[c].role == Role::Count)
        .unwrap_or(pidx);

    let mut groups: Vec<Group> = Vec::new();
    let mut index: BTreeMap<String, usize> = BTreeMap::new();
    for (s, st) in per_site.iter().enumerate() {
        let Some(st) = st else { continue };
        let sg: Vec<usize> = gnames.iter().filter_map(|n| st.column(n)).collect();
        let sc: Vec<usize> = cnames.iter().filter_map(|n| st.column(n)).collect();
        let (Some(lc), Some(uc)) = (st.column(LOWER), st.column(UPPER)) else {
            continue;
        };
        if sg.len() != gnames.len() || sc.len() != cnames.len() {
            return Err(PoolError::Table {
                table: t.name.clone(),
                message: format!("site {} has other columns", labels[s]),
            });
        }
        for (r, row) in st.rows.iter().enumerate() {
            let k = key(row, &sg);
            let g = *index.entry(k).or_insert_with(|| {
                groups.push(Group {
                    dims: sg.iter().map(|&c| row[c].clone()).collect(),
                    bins: (0..per_site.len()).map(|_| Vec::new()).collect(),
                });
                groups.len() - 1
            });
            let vals: Vec<Option<i64>> = sc.iter().map(|&c| row[c].as_i64()).collect();
            groups[g].bins[s].push(Bin {
                lower: row[lc].as_f64().unwrap_or(f64::NEG_INFINITY),
                upper: row[uc].as_f64().unwrap_or(f64::INFINITY),
                withheld: st.withheld(r) || vals.iter().any(Option::is_none),
                counts: vals.into_iter().map(|v| v.unwrap_or(0)).collect(),
            });
        }
    }

    let mut columns = Vec::new();
    for c in gdims.iter().copied() {
        columns.push(t.columns[c].clone());
    }
    columns.push(dim(LOWER, "Lower edge of the pooled bin (null: open)"));
    columns.push(dim(UPPER, "Upper edge of the pooled bin (null: open)"));
    for &c in &counts {
        columns.push(t.columns[c].clone());
    }
    let description = format!(
        "{}{}Pooled over {} bin by bin: where a site merged bins, the pooled bins it spans are \
         merged to the union span, so each pooled bin is a union of whole site bins. {} A \
         histogram withheld (in any bin) at any site is withheld whole; pooled_withheld names the \
         sites.",
        t.description,
        if t.description.is_empty() { "" } else { " " },
        labels.join(", "),
        rounding_note(labels.len(), base)
    );
    let mut out = Table::new(&t.name, &t.title, &description, columns);

    let qname = format!("{}_quantiles", t.name);
    let mut qcols = Vec::new();
    for c in gdims.iter().copied() {
        qcols.push(t.columns[c].clone());
    }
    qcols.push(dim("statistic", "quantile_from_pooled_histogram"));
    qcols.push(col(
        "n_patients",
        Role::Patients,
        "Sum over sites of each site's largest bin: a lower bound of the patients",
    ));
    let nname = if qidx == pidx {
        "n_patients".to_string()
    } else {
        cnames[qidx].to_string()
    };
    if qidx != pidx {
        qcols.push(t.columns[counts[qidx]].clone());
    }
    for (name, p) in QUANTILES {
        qcols.push(col(
            name,
            Role::Quantile {
                p,
                n: nname.clone(),
            },
            "Estimated from the pooled histogram by linear interpolation within a bin",
        ));
    }
    let mut q = Table::new(
        &qname,
        &format!("{}: quantiles from the pooled histogram", t.title),
        &format!(
            "Quantiles estimated from the pooled {} by linear interpolation within bins \
             (statistic quantile_from_pooled_histogram), from rounded counts: approximate. A \
             quantile in an open tail bin is null.",
            t.name
        ),
        qcols,
    );

    for g in &groups {
        let mut edges: Vec<f64> = g
            .bins
            .iter()
            .flatten()
            .flat_map(|b| [b.lower, b.upper])
            .filter(|e| e.is_finite())
            .collect();
        edges.sort_by(f64::total_cmp);
        edges.dedup();
        let m = edges.len();
        let pos = |e: f64| edges.iter().position(|&x| x == e);
        // Elementary interval i (0..=m) lies between edges[i-1] and edges[i].
        let span = |b: &Bin| -> (usize, usize) {
            let start = if b.lower.is_finite() {
                pos(b.lower).map_or(0, |i| i + 1)
            } else {
                0
            };
            let end = if b.upper.is_finite() {
                pos(b.upper).unwrap_or(m)
            } else {
                m
            };
            (start, end.max(start))
        };
        let mut covered = vec![false; m + 1];
        let mut joined = vec![false; m + 1];
        for b in g.bins.iter().flatten() {
            let (s, e) = span(b);
            for c in &mut covered[s..=e] {
                *c = true;
            }
            for j in &mut joined[s..e] {
                *j = true;
            }
        }
        // Runs of covered, joined intervals are the pooled bins.
        let mut runs: Vec<(usize, usize)> = Vec::new();
        let mut i = 0;
        while i <= m {
            if !covered[i] {
                i += 1;
                continue;
            }
            let s = i;
            while i < m && joined[i] {
                i += 1;
            }
            runs.push((s, i));
            i += 1;
        }
        let run_of = |b: &Bin| {
            let (s, _) = span(b);
            runs.iter()
                .position(|&(a, z)| a <= s && s <= z)
                .unwrap_or(0)
        };
        let mut sums = vec![vec![0i64; counts.len()]; runs.len()];
        let mut withheld_at: Vec<String> = Vec::new();
        let mut patients_lb = 0i64;
        for (s, bins) in g.bins.iter().enumerate() {
            if bins.is_empty() || bins.iter().any(|b| b.withheld) {
                withheld_at.push(labels[s].clone());
                continue;
            }
            patients_lb += bins.iter().map(|b| b.counts[pidx]).max().unwrap_or(0);
            for b in bins {
                let r = run_of(b);
                for (c, v) in b.counts.iter().enumerate() {
                    sums[r][c] += v;
                }
            }
        }
        let withheld = !withheld_at.is_empty();
        let edge = |i: isize| -> Value {
            if i < 0 || i as usize >= m {
                Value::Null
            } else {
                Value::Float(edges[i as usize])
            }
        };
        for (r, &(s, e)) in runs.iter().enumerate() {
            let mut row = g.dims.clone();
            row.push(edge(s as isize - 1));
            row.push(edge(e as isize));
            for &v in &sums[r] {
                row.push(Value::Int(if withheld { MARKER } else { v }));
            }
            if withheld {
                log.push(&t.name, out.rows.len(), withheld_at.clone(), 0);
            }
            out.push(row);
        }

        // Quantiles by linear interpolation within the pooled bins.
        let total: i64 = sums.iter().map(|s| s[qidx]).sum();
        let mut row = g.dims.clone();
        row.push("quantile_from_pooled_histogram".into());
        row.push(Value::Int(if withheld { MARKER } else { patients_lb }));
        if qidx != pidx {
            row.push(Value::Int(if withheld { MARKER } else { total }));
        }
        for (_, p) in QUANTILES {
            let v = if withheld || total <= 0 {
                None
            } else {
                interpolate(&runs, &sums, qidx, &edges, p * total as f64)
            };
            row.push(Value::opt(v));
        }
        if withheld {
            log.push(&qname, q.rows.len(), withheld_at.clone(), 0);
        }
        q.push(row);
    }
    Ok((out, Some(q)))
}

/// The value below which `target` of the counted observations lie, interpolating linearly within
/// the bin it falls in; `None` in an open tail bin.
fn interpolate(
    runs: &[(usize, usize)],
    sums: &[Vec<i64>],
    qidx: usize,
    edges: &[f64],
    target: f64,
) -> Option<f64> {
    let m = edges.len();
    let mut cum = 0.0;
    for (r, &(s, e)) in runs.iter().enumerate() {
        let n = sums[r][qidx] as f64;
        if n > 0.0 && cum + n >= target {
            if s == 0 || e >= m {
                return None;
            }
            let (lo, hi) = (edges[s - 1], edges[e]);
            return Some(lo + (target - cum) / n * (hi - lo));
        }
        cum += n;
    }
    None
}

#[cfg(test)]
mod tests {
    use super::interpolate;

    #[test]
    fn interpolates_within_a_bin() {
        // Edges 0, 1, 2, 3; bins (0,1) = 10, (1,3) = 30 (a merged bin).
        let edges = [0.0, 1.0, 2.0, 3.0];
        let runs = [(1, 1), (2, 3)];
        let sums = [vec![10], vec![30]];
        assert_eq!(
            interpolate(&runs, &sums, 0, &edges, 20.0),
            Some(1.0 + 10.0 / 30.0 * 2.0)
        );
        assert_eq!(interpolate(&runs, &sums, 0, &edges, 5.0), Some(0.5));
    }
}
