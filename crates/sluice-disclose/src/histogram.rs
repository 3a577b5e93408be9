//! Histogram bins: small bins are merged with their neighbours instead of withheld, so a
//! distribution keeps its shape without showing a tail of few patients.
//!
//! Tails are merged from each end inward until the merged bin holds at least `threshold`
//! distinct patients, counted exactly from the support columns (distinct patients at or below a
//! bin, at or above a bin). A middle bin still below the threshold is merged with its neighbours
//! until the largest per-bin patient count in the run reaches the threshold: a patient may have
//! observations in several bins, so distinct patients of a run are not the sum, but they are at
//! least the largest bin's — a conservative lower bound, released as the run's `n_patients`.

use sluice_aggregate::{Role, Table, Value};
use std::collections::BTreeMap;

use crate::{DiscloseError, Status};

/// Rows after merging: `rows[i]` came from input rows `sources[i]`; `status[i]` is set for merged
/// runs and for bins of a histogram too small to release at all.
pub(crate) struct Merged {
    pub rows: Vec<Vec<Value>>,
    pub status: Vec<Option<Status>>,
    /// Output row of every input row.
    pub map: Vec<usize>,
}

/// One run of consecutive bins and its distinct-patient count (exact or lower bound).
struct Run {
    first: usize,
    last: usize,
    patients: u64,
}

fn int(t: &Table, r: usize, c: usize) -> Result<u64, DiscloseError> {
    match &t.rows[r][c] {
        Value::Int(i) if *i >= 0 => Ok(*i as u64),
        v => Err(DiscloseError::Value {
            table: t.name.clone(),
            row: r,
            column: t.columns[c].name.clone(),
            message: format!("{v:?} is not a non-negative integer count"),
        }),
    }
}

/// Partitions bins `0..k` (ascending) into runs safe under `threshold`, or `None` when the whole
/// histogram has fewer patients than the threshold.
fn runs(p: &[u64], below: &[u64], above: &[u64], threshold: u64) -> Option<Vec<Run>> {
    let k = p.len();
    let lo = (0..k).find(|&i| below[i] >= threshold)?;
    let mut out = vec![Run {
        first: 0,
        last: lo,
        patients: below[lo],
    }];
    let hi = (lo + 1..k).rev().find(|&j| above[j] >= threshold);
    let Some(hi) = hi else {
        // What is left above the lower tail is itself too small: it joins the lower tail, which
        // then spans the whole histogram with an exact count.
        if lo + 1 < k {
            out[0].last = k - 1;
            out[0].patients = below[k - 1];
        }
        return Some(out);
    };
    let mut run: Option<Run> = None;
    for (m, &pm) in p.iter().enumerate().take(hi).skip(lo + 1) {
        let r = run.get_or_insert(Run {
            first: m,
            last: m,
            patients: 0,
        });
        r.last = m;
        r.patients = r.patients.max(pm);
        if r.patients >= threshold {
            out.extend(run.take());
        }
    }
    if let Some(r) = run {
        // A short run just below the upper tail joins the run to its left; when that is the
        // lower tail its count stays exact (it starts at the first bin).
        let prev = out.last_mut().expect("lower tail");
        prev.last = r.last;
        prev.patients = if prev.first == 0 {
            below[r.last]
        } else {
            prev.patients.max(r.patients)
        };
    }
    out.push(Run {
        first: hi,
        last: k - 1,
        patients: above[hi],
    });
    Some(out)
}

pub(crate) fn merge(t: &Table, threshold: u64) -> Result<Merged, DiscloseError> {
    let n = t.rows.len();
    let identity = || Merged {
        rows: t.rows.clone(),
        status: vec![None; n],
        map: (0..n).collect(),
    };
    let Some(h) = &t.histogram else {
        return Ok(identity());
    };
    let col = |name: &str| t.column(name).expect("validated");
    let (lower, upper) = (col(&h.lower), col(&h.upper));
    let (below_c, above_c) = (col(&h.patients_at_or_below), col(&h.patients_at_or_above));
    let group_c: Vec<usize> = h.group_by.iter().map(|g| col(g)).collect();
    let pc = t.patients_column().expect("validated");

    // Rows with at least one numeric edge are bins (an open tail bin has a null edge on its open
    // side); rows with neither (e.g. totals) pass through unchanged.
    let mut groups: BTreeMap<String, Vec<usize>> = BTreeMap::new();
    let mut first_of: Vec<Option<String>> = vec![None; n];
    for (r, row) in t.rows.iter().enumerate() {
        if row[lower].as_f64().is_none() && row[upper].as_f64().is_none() {
            continue;
        }
        let key = group_c
            .iter()
            .map(|&c| serde_json::to_string(&row[c]).unwrap_or_default())
            .collect::<Vec<_>>()
            .join("\u{1f}");
        let g = groups.entry(key.clone()).or_default();
        if g.is_empty() {
            first_of[r] = Some(key);
        }
        g.push(r);
    }

    let mut out = Merged {
        rows: Vec::new(),
        status: Vec::new(),
        map: vec![usize::MAX; n],
    };
    for (r, first) in first_of.iter().enumerate() {
        let is_bin = t.rows[r][lower].as_f64().is_some() || t.rows[r][upper].as_f64().is_some();
        if !is_bin {
            out.map[r] = out.rows.len();
            out.rows.push(t.rows[r].clone());
            out.status.push(None);
            continue;
        }
        let Some(key) = first else { continue };
        let mut bins = groups[key].clone();
        bins.sort_by(|&a, &b| {
            let (x, y) = (t.rows[a][lower].as_f64(), t.rows[b][lower].as_f64());
            // The open lower tail sorts first.
            x.unwrap_or(f64::NEG_INFINITY)
                .total_cmp(&y.unwrap_or(f64::NEG_INFINITY))
                .then(a.cmp(&b))
        });
        let mut p = Vec::with_capacity(bins.len());
        let mut below = Vec::with_capacity(bins.len());
        let mut above = Vec::with_capacity(bins.len());
        for &b in &bins {
            p.push(int(t, b, pc)?);
            below.push(int(t, b, below_c)?);
            above.push(int(t, b, above_c)?);
        }
        let Some(runs) = runs(&p, &below, &above, threshold) else {
            for &b in &bins {
                out.map[b] = out.rows.len();
                out.rows.push(t.rows[b].clone());
                out.status.push(Some(Status::Withheld {
                    rule: "histogram".into(),
                }));
            }
            continue;
        };
        for run in runs {
            let members = &bins[run.first..=run.last];
            let idx = out.rows.len();
            for &m in members {
                out.map[m] = idx;
            }
            if members.len() == 1 {
                out.rows.push(t.rows[members[0]].clone());
                out.status.push(None);
                continue;
            }
            out.rows
                .push(merged_row(t, members, lower, upper, pc, run.patients)?);
            out.status.push(Some(Status::Merged));
        }
    }
    Ok(out)
}

/// One row standing for several bins: outer edges, summed counts, the run's patients; values that
/// cannot be combined (statistics, quantiles, magnitudes, differing labels) are null.
fn merged_row(
    t: &Table,
    members: &[usize],
    lower: usize,
    upper: usize,
    pc: usize,
    patients: u64,
) -> Result<Vec<Value>, DiscloseError> {
    let first = &t.rows[members[0]];
    let last = &t.rows[members[members.len() - 1]];
    let mut row = Vec::with_capacity(t.columns.len());
    for (c, column) in t.columns.iter().enumerate() {
        let v = if c == lower {
            first[c].clone()
        } else if c == upper {
            last[c].clone()
        } else if c == pc {
            Value::Int(patients as i64)
        } else {
            match column.role {
                Role::Dimension if members.iter().all(|&m| t.rows[m][c] == first[c]) => {
                    first[c].clone()
                }
                Role::Count => {
                    let mut s = 0u64;
                    for &m in members {
                        s += int(t, m, c)?;
                    }
                    Value::Int(s as i64)
                }
                _ => Value::Null,
            }
        };
        row.push(v);
    }
    Ok(row)
}

#[cfg(test)]
mod tests {
    use super::runs;

    // Crafted: distinct patients per bin (each patient in one bin, so support columns are
    // cumulative sums). Tails 3 + 4 + 5 = 12 and 9 + 2 = 11 merge; the middle 6 and 7 merge
    // with the 15 after them (lower bound: the largest bin, 15).
    #[test]
    fn tails_merge_inward_and_short_middle_runs_merge() {
        let p = [3, 4, 5, 20, 6, 7, 15, 9, 2];
        let below: Vec<u64> = p
            .iter()
            .scan(0, |s, x| {
                *s += x;
                Some(*s)
            })
            .collect();
        let total = below[p.len() - 1];
        let above: Vec<u64> = (0..p.len())
            .map(|i| total - if i == 0 { 0 } else { below[i - 1] })
            .collect();
        let r = runs(&p, &below, &above, 10).unwrap();
        let spans: Vec<(usize, usize, u64)> =
            r.iter().map(|r| (r.first, r.last, r.patients)).collect();
        assert_eq!(spans, [(0, 2, 12), (3, 3, 20), (4, 6, 15), (7, 8, 11)]);
        // A middle run still short at the end joins its left neighbour (here: the lower tail,
        // whose count stays exact).
        let p = [12, 3, 15];
        let r = runs(&p, &[12, 15, 30], &[30, 18, 15], 10).unwrap();
        let spans: Vec<(usize, usize, u64)> =
            r.iter().map(|r| (r.first, r.last, r.patients)).collect();
        assert_eq!(spans, [(0, 1, 15), (2, 2, 15)]);
        assert!(runs(&[3, 4], &[3, 7], &[7, 4], 10).is_none());
    }
}
