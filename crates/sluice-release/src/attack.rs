//! Check attacks the release as an outsider holding it would: for every statistic with a known
//! formula it works the implied counts back out of the released values alone, and fails —
//! naming file, row, column and the recovered value — where an implied count could not be a
//! released count (not a multiple of the rounding base, below the threshold), contradicts the
//! count released beside it, or belongs to a cell withheld elsewhere in the release.
//!
//! The attacks know formulas, not the code that applied them: they use the statistics library
//! the way an outsider would use scipy, and never the disclosure crate's rule functions. What
//! they cover:
//!
//! - rates × person-time (`n_events`, `person_years`, `rate_per_100py`) and exact Poisson limits;
//! - shares and their Wilson limits (k and n searched);
//! - McNemar's corrected χ² with its exact p (the discordant pair searched), against the
//!   crossings of `worst_abnormal`;
//! - the SE √(1/a + 1/b) of a log rate ratio (a and b searched);
//! - t intervals, (upper − estimate) / se as a t quantile (its degrees of freedom searched);
//! - means whose sum must lie on the grid the table declares (whole days for `mean_days`): a
//!   mean released too finely is consistent with only one of the counts the rounding allows;
//! - quantiles declared on a grid lie on it.
//!
//! Sources: Hundepool et al., *Statistical Disclosure Control* (Wiley 2012) §4.4 on derived
//! statistics; that a statistic must not be more precise than the counts it comes from is common
//! practice in output checking.

use crate::check::{Seen, Verdict, count_ok, is_multiple};
use sluice_aggregate::{Precision, Role, Value};
use sluice_disclose::Rules;

/// Confidence levels an outsider would try.
const LEVELS: [f64; 3] = [0.95, 0.9, 0.99];

fn close(a: f64, b: f64, rel: f64) -> bool {
    (a - b).abs() <= rel * a.abs().max(b.abs()).max(1e-12)
}

/// Checks within one table that need no search: p-values and shares in [0, 1], limits in order.
pub(crate) fn sanity(
    file: &str,
    columns: &[sluice_aggregate::Column],
    cols: &[Vec<Value>],
    v: &mut Verdict,
) {
    let col = |n: &str| columns.iter().position(|c| c.name == n);
    for name in ["p_value", "p_exact", "q_p", "share", "proportion", "i2"] {
        let Some(c) = col(name) else { continue };
        for (r, x) in cols[c].iter().enumerate() {
            if let Some(x) = x.as_f64()
                && !(0.0..=1.0).contains(&x)
            {
                v.fail(
                    file,
                    Some(r),
                    "value",
                    format!("{name} = {x} is outside [0, 1]"),
                );
            }
        }
    }
    for (lo, hi) in [
        ("lower", "upper"),
        ("ci_lower", "ci_upper"),
        ("fixed_lower", "fixed_upper"),
        ("random_lower", "random_upper"),
    ] {
        let (Some(a), Some(b)) = (col(lo), col(hi)) else {
            continue;
        };
        for (r, (x, y)) in cols[a].iter().zip(&cols[b]).enumerate() {
            if let (Some(x), Some(y)) = (x.as_f64(), y.as_f64())
                && x > y
            {
                v.fail(
                    file,
                    Some(r),
                    "value",
                    format!("{lo} = {x} is above {hi} = {y}"),
                );
            }
        }
    }
    for name in ["se", "sd", "tau2", "person_years"] {
        let Some(c) = col(name) else { continue };
        for (r, x) in cols[c].iter().enumerate() {
            if let Some(x) = x.as_f64()
                && x < 0.0
            {
                v.fail(file, Some(r), "value", format!("{name} = {x} is negative"));
            }
        }
    }
}

/// Runs every attack over the tables check read.
pub(crate) fn run(seen: &[Seen], rules: &Rules, v: &mut Verdict) {
    let largest = seen.iter().map(table_max).max().unwrap_or(0);
    // Searches run well past anything released: an implied count larger than every released
    // count is still a finding.
    let bound = largest.saturating_mul(4).saturating_add(1000);
    for t in seen {
        // The counts behind a share are the table's own (rounded) counts: search a little past
        // the table's largest.
        let local = table_max(t)
            .saturating_mul(2)
            .saturating_add(100)
            .min(bound);
        rates(t, rules, v);
        wilson(t, rules, local, v);
        mcnemar(t, seen, rules, bound, v);
        log_se(t, rules, bound, v);
        t_quantile(t, rules, v);
        means(t, rules, v);
    }
}

/// The largest released count of a table.
fn table_max(t: &Seen) -> u64 {
    t.columns
        .iter()
        .enumerate()
        .filter(|(_, c)| matches!(c.role, Role::Patients | Role::Count))
        .flat_map(|(c, _)| t.cols[c].iter().filter_map(Value::as_i64))
        .max()
        .unwrap_or(0)
        .max(0) as u64
}

fn file(t: &Seen) -> String {
    format!("{}.parquet", t.name)
}

fn rates(t: &Seen, rules: &Rules, v: &mut Verdict) {
    let (Some(_), Some(_), Some(_)) = (
        t.col("n_events"),
        t.col("person_years"),
        t.col("rate_per_100py"),
    ) else {
        return;
    };
    for r in 0..t.rows() {
        let (Some(n), Some(py), Some(rate)) = (
            t.num(r, "n_events"),
            t.num(r, "person_years"),
            t.num(r, "rate_per_100py"),
        ) else {
            continue;
        };
        let implied = rate * py / 100.0;
        if !close(implied, n, 1e-6) {
            v.fail(
                &file(t),
                Some(r),
                "derived",
                format!(
                    "rate_per_100py × person_years / 100 = {implied:.4} events, not the released n_events = {n}: the rate was computed from other counts"
                ),
            );
            continue;
        }
        let (Some(lo), Some(hi)) = (t.num(r, "lower"), t.num(r, "upper")) else {
            continue;
        };
        let fits = |e: u64, level: f64| {
            sluice_stats::poisson_exact_ci(e, py / 100.0, level)
                .is_ok_and(|ci| close(ci.lower, lo, 1e-9) && close(ci.upper, hi, 1e-9))
        };
        if LEVELS.iter().any(|&l| fits(n as u64, l)) {
            continue;
        }
        let span = 10 * rules.rounding_base().max(1) + 50;
        let found = (0..=(n as u64 + span)).find(|&e| LEVELS.iter().any(|&l| fits(e, l)));
        v.fail(
            &file(t),
            Some(r),
            "derived",
            match found {
                Some(e) => format!(
                    "the exact Poisson limits lower/upper invert to {e} events, not the released n_events = {n}"
                ),
                None => format!(
                    "the Poisson limits lower/upper do not follow from the released n_events = {n} and person_years = {py}"
                ),
            },
        );
    }
}

fn wilson(t: &Seen, rules: &Rules, bound: u64, v: &mut Verdict) {
    if t.col("share").is_none() || t.col("lower").is_none() || t.col("upper").is_none() {
        return;
    }
    for r in 0..t.rows() {
        let (Some(share), Some(lo), Some(hi)) =
            (t.num(r, "share"), t.num(r, "lower"), t.num(r, "upper"))
        else {
            continue;
        };
        let mut found = Vec::new();
        for n in 1..=bound {
            let k = (share * n as f64).round();
            if (k / n as f64 - share).abs() > 1e-12 {
                continue;
            }
            let k = k as u64;
            let fits = LEVELS.iter().any(|&l| {
                sluice_stats::wilson_ci(k, n, l)
                    .is_ok_and(|ci| close(ci.lower, lo, 1e-9) && close(ci.upper, hi, 1e-9))
            });
            if fits {
                found.push((k, n));
            }
        }
        let released = |k: u64| count_ok(k as i64, rules);
        if !found.is_empty() && !found.iter().any(|&(k, n)| released(k) && released(n)) {
            let (k, n) = found[0];
            v.fail(
                &file(t),
                Some(r),
                "derived",
                format!(
                    "share = {share} with its Wilson limits recovers {k} of {n}, which are not released counts"
                ),
            );
        }
    }
}

/// Candidate discordant pairs (b, c), b ≥ c, with (|b − c| − 1)² / (b + c) = chi2.
fn mcnemar_pairs(chi2: f64, bound: u64) -> Vec<(u64, u64)> {
    let mut out = Vec::new();
    for s in 1..=bound {
        let root = (chi2 * s as f64).sqrt();
        for d in [1.0 + root, 1.0 - root] {
            let di = d.round();
            if di < 0.0 || (d - di).abs() > 1e-6 {
                continue;
            }
            let di = di as u64;
            if di > s || !(s - di).is_multiple_of(2) {
                continue;
            }
            let pair = ((s + di) / 2, (s - di) / 2);
            if !out.contains(&pair) {
                out.push(pair);
            }
        }
    }
    out
}

fn mcnemar(t: &Seen, seen: &[Seen], rules: &Rules, bound: u64, v: &mut Verdict) {
    if t.col("chi2_corrected").is_none() {
        return;
    }
    let crossings = seen.iter().find(|s| s.name == "worst_abnormal");
    for r in 0..t.rows() {
        let Some(chi2) = t.num(r, "chi2_corrected") else {
            continue;
        };
        let p = t.num(r, "p_exact");
        // The discordant pairs are some of the row's patients: b + c is at most its n_patients
        // before rounding.
        let row_bound = t
            .num(r, "n_patients")
            .map_or(bound, |n| n as u64 + rules.rounding_base().max(1) + 10)
            .min(bound);
        let found: Vec<(u64, u64)> = mcnemar_pairs(chi2, row_bound)
            .into_iter()
            .filter(|&(b, c)| {
                p.is_none_or(|p| {
                    sluice_stats::mcnemar(b, c).is_ok_and(|m| close(m.p_exact, p, 1e-9))
                })
            })
            .collect();
        let released = |k: u64| count_ok(k as i64, rules);
        if !found.is_empty() && !found.iter().any(|&(b, c)| released(b) && released(c)) {
            let (b, c) = found[0];
            v.fail(
                &file(t),
                Some(r),
                "derived",
                format!(
                    "chi2_corrected = {chi2} with p_exact recovers the discordant pair ({b}, {c}), which are not released counts"
                ),
            );
        }
        // The same crossings withheld in worst_abnormal: the test must be withheld with them.
        if let Some(x) = crossings {
            let key = |s: &Seen, i: usize| {
                ["subgroup", "analyte", "threshold_set"].map(|d| s.text(i, d).map(str::to_string))
            };
            let k = key(t, r);
            for i in 0..x.rows() {
                let discordant = matches!(
                    x.text(i, "crossing"),
                    Some("abnormal_after_only" | "abnormal_before_only")
                );
                if discordant && x.withheld[i] && key(x, i) == k {
                    v.fail(
                        &file(t),
                        Some(r),
                        "derived",
                        format!(
                            "McNemar's test is released while its discordant cell {} is withheld in worst_abnormal.parquet row {i}",
                            x.text(i, "crossing").unwrap_or_default()
                        ),
                    );
                }
            }
        }
    }
}

fn log_se(t: &Seen, rules: &Rules, bound: u64, v: &mut Verdict) {
    if t.col("se").is_none() || t.col("statistic").is_none() {
        return;
    }
    for r in 0..t.rows() {
        if t.text(r, "statistic") != Some("log_rate_ratio") {
            continue;
        }
        let Some(se) = t.num(r, "se") else {
            continue;
        };
        let s2 = se * se;
        let mut found = Vec::new();
        for a in 1..=bound {
            let rest = s2 - 1.0 / a as f64;
            if rest <= 0.0 {
                continue;
            }
            let b = 1.0 / rest;
            if b > bound as f64 * 4.0 {
                continue;
            }
            let bi = b.round();
            if bi >= 1.0 && close(1.0 / a as f64 + 1.0 / bi, s2, 1e-9) {
                found.push((a, bi as u64));
            }
        }
        let released = |k: u64| count_ok(k as i64, rules);
        if !found.is_empty() && !found.iter().any(|&(a, b)| released(a) && released(b)) {
            let (a, b) = found[0];
            v.fail(
                &file(t),
                Some(r),
                "derived",
                format!(
                    "se = {se} of the log rate ratio is √(1/{a} + 1/{b}): it recovers event counts {a} and {b}, which are not released counts"
                ),
            );
        }
    }
}

fn t_quantile(t: &Seen, rules: &Rules, v: &mut Verdict) {
    if t.col("estimate").is_none() || t.col("se").is_none() {
        return;
    }
    for r in 0..t.rows() {
        let (Some(est), Some(up), Some(se), Some(n)) = (
            t.num(r, "estimate"),
            t.num(r, "upper"),
            t.num(r, "se"),
            t.num(r, "n_patients"),
        ) else {
            continue;
        };
        if se <= 0.0 {
            continue;
        }
        let q = (up - est) / se;
        let n = n as u64;
        let fits = |df: u64| {
            LEVELS
                .iter()
                .any(|&l| sluice_stats::t_two_sided(df as f64, l).is_ok_and(|x| close(x, q, 1e-9)))
        };
        if n >= 2 && fits(n - 1) {
            continue;
        }
        let span = 2 * rules.rounding_base().max(1) + 2;
        let lo = n.saturating_sub(span).max(2);
        if let Some(m) = (lo..=n + span).find(|&m| fits(m - 1)) {
            v.fail(
                &file(t),
                Some(r),
                "derived",
                format!(
                    "(upper − estimate) / se = {q} is the t quantile on {} degrees of freedom: it recovers n = {m}, not the released n_patients = {n}",
                    m - 1
                ),
            );
        }
    }
}

/// Decimal digits of the shortest representation of x.
fn decimals(x: f64) -> i32 {
    let s = format!("{x}");
    match s.split_once('.') {
        Some((_, d)) => d.len() as i32,
        None => 0,
    }
}

fn means(t: &Seen, rules: &Rules, v: &mut Verdict) {
    let half = (rules.rounding_base().max(1) / 2) as i64;
    for (c, col) in t.columns.iter().enumerate() {
        let declared = match &col.precision {
            Some(p @ Precision::Grid { n, .. }) => Some((p.clone(), n.clone())),
            _ => None,
        };
        // Intervals are whole days whatever the file declares: a forged coarse grid must not
        // hide a mean that pins n_intervals.
        let (prec, ncol) = match (declared, col.name.as_str()) {
            (_, "mean_days") => (
                Precision::Grid {
                    grid: 1.0,
                    n: "n_intervals".into(),
                    by: None,
                },
                "n_intervals".to_string(),
            ),
            (Some(d), _) => d,
            _ => continue,
        };
        let quantile = matches!(col.role, Role::Quantile { .. });
        for r in 0..t.rows() {
            let Some(m) = t.cols[c][r].as_f64() else {
                continue;
            };
            let grid = match &prec {
                Precision::Grid { grid, by, .. } => by
                    .as_ref()
                    .and_then(|b| b.grids.get(t.text(r, &b.dimension)?).copied())
                    .unwrap_or(*grid),
                Precision::Significant { .. } => continue,
            };
            if quantile {
                if !is_multiple(m, grid) {
                    v.fail(
                        &file(t),
                        Some(r),
                        "precision",
                        format!(
                            "{} = {m} is not on the grid {grid} its column declares: a quantile between two observations gives away the interpolation weight, hence n",
                            col.name
                        ),
                    );
                }
                continue;
            }
            let Some(nr) = t.num(r, &ncol) else {
                continue;
            };
            let nr = nr as i64;
            let delta = 0.5 * 10f64.powi(-decimals(m));
            let lo = (nr - half).max(rules.threshold() as i64).max(1);
            let candidates: Vec<i64> = (lo..=nr + half).collect();
            let consistent: Vec<i64> = candidates
                .iter()
                .copied()
                .filter(|&n| {
                    let s = n as f64 * m / grid;
                    (s - s.round()).abs() * grid <= n as f64 * delta * (1.0 + 1e-9) + 1e-9
                })
                .collect();
            if candidates.len() > 1 && consistent.len() == 1 {
                v.fail(
                    &file(t),
                    Some(r),
                    "precision",
                    format!(
                        "{} = {m} times n is on the grid {grid} only for n = {}: it pins the count that {ncol} = {nr} rounds",
                        col.name, consistent[0]
                    ),
                );
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Crafted: b = 8, c = 20 gives (|8 − 20| − 1)² / 28 = 121/28.
    #[test]
    fn mcnemar_pairs_invert_the_corrected_statistic() {
        let pairs = mcnemar_pairs(121.0 / 28.0, 200);
        assert!(pairs.contains(&(20, 8)), "{pairs:?}");
    }

    #[test]
    fn decimals_of_released_values() {
        assert_eq!(decimals(45.23), 2);
        assert_eq!(decimals(45.0), 0);
        assert_eq!(decimals(0.001), 3);
    }
}
