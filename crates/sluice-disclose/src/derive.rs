//! Statistics that are functions of counts, recomputed from what is released, and the precision
//! at which other statistics are released.
//!
//! A rate, share, interval, SE or test statistic computed from exact counts inverts to those
//! counts: events = rate × person-time, (b, c) from McNemar's χ² and exact p, n from a t quantile.
//! So the value measure computed is never released for a [`Formula`] cell: `apply` recomputes
//! it from the released (rounded) inputs, and leaves it null, with the reason `derived`, when an
//! input is withheld. Statistics inherit the suppression of the counts they come from: common
//! practice in output checking; Hundepool et al., *Statistical Disclosure Control* (Wiley 2012)
//! §4.4 on derived and linked statistics.

use crate::{CheckedTable, DiscloseError, Note, PATIENTS, Rules};
use sluice_aggregate::{CellRef, Formula, Precision, Table, Value};

/// Evaluates a formula on released inputs. `None`: not computable (a zero denominator, no
/// discordant pairs, a count that is not a whole number).
pub fn evaluate(formula: Formula, x: &[f64], level: f64, per: f64) -> Option<f64> {
    use Formula::*;
    let count = |v: f64| (v >= 0.0 && v.fract() == 0.0).then_some(v as u64);
    let finite = |v: f64| v.is_finite().then_some(v);
    let v = match formula {
        Rate => (x[1] > 0.0).then(|| x[0] / x[1] * per)?,
        PoissonLower | PoissonUpper => {
            let ci = sluice_stats::poisson_exact_ci(count(x[0])?, x[1] / per, level).ok()?;
            if formula == PoissonLower {
                ci.lower
            } else {
                ci.upper
            }
        }
        Share => (x[1] > 0.0).then(|| x[0] / x[1])?,
        WilsonLower | WilsonUpper => {
            let ci = sluice_stats::wilson_ci(count(x[0])?, count(x[1])?, level).ok()?;
            if formula == WilsonLower {
                ci.lower
            } else {
                ci.upper
            }
        }
        McNemarChi2 | McNemarP | McNemarExactP => {
            let m = sluice_stats::mcnemar(count(x[0])?, count(x[1])?).ok()?;
            match formula {
                McNemarChi2 => m.chi2_corrected,
                McNemarP => m.p_chi2_corrected,
                _ => m.p_exact,
            }
        }
        RateRatio | RateRatioLower | RateRatioUpper => {
            let ci =
                sluice_stats::rate_ratio_exact_ci(count(x[0])?, x[1], count(x[2])?, x[3], level)
                    .ok()?;
            match formula {
                RateRatio => ci.estimate,
                RateRatioLower => ci.lower,
                _ => ci.upper,
            }
        }
        LogRateRatio | LogRateRatioLower | LogRateRatioUpper | LogRateRatioSe => {
            let (x1, t1, x0, t0) = (x[0], x[1], x[2], x[3]);
            if !(x1 > 0.0 && x0 > 0.0 && t1 > 0.0 && t0 > 0.0) {
                return None;
            }
            let est = ((x1 / t1) / (x0 / t0)).ln();
            let se = (1.0 / x1 + 1.0 / x0).sqrt();
            let z = sluice_stats::z_two_sided(level);
            match formula {
                LogRateRatio => est,
                LogRateRatioLower => est - z * se,
                LogRateRatioUpper => est + z * se,
                _ => se,
            }
        }
        TLower | TUpper | TPValue => {
            let (est, se, n) = (x[0], x[1], x[2]);
            if !(se > 0.0 && n >= 2.0) {
                return None;
            }
            let df = n - 1.0;
            match formula {
                TPValue => sluice_stats::t_p_two_sided(est / se, df).ok()?,
                _ => {
                    let half = sluice_stats::t_two_sided(df, level).ok()? * se;
                    if formula == TLower {
                        est - half
                    } else {
                        est + half
                    }
                }
            }
        }
    };
    finite(v)
}

/// Rounds `x` to a multiple of `step`, keeping the decimal digits of a power-of-ten step exact
/// in the printed value (45.23, not 45.230000000000004).
pub fn to_step(x: f64, step: f64) -> f64 {
    let k = (x / step).round();
    if step < 1.0 {
        let decimals = (-step.log10()).ceil() as i32;
        let scale = 10f64.powi(decimals);
        if ((step * scale).round() - step * scale).abs() < 1e-9 {
            return k * (step * scale).round() / scale;
        }
    }
    k * step
}

/// The step a mean-like statistic over `n_released` observations on `grid` is released at: the
/// smallest power of ten with step · n ≥ grid for the smallest n the rounded count allows.
pub fn grid_step(grid: f64, n_released: u64, rules: &Rules) -> f64 {
    let half = rules.rounding_base() / 2;
    let n_lo = n_released
        .saturating_sub(half)
        .max(rules.threshold())
        .max(1);
    10f64.powf((grid / n_lo as f64).log10().ceil())
}

/// `x` to `digits` significant digits.
pub fn significant(x: f64, digits: u32) -> f64 {
    if x == 0.0 || !x.is_finite() {
        return x;
    }
    let e = x.abs().log10().floor() as i32;
    let step = 10f64.powi(e + 1 - digits as i32);
    to_step(x, step)
}

/// The released value of a statistic or quantile cell under its column's precision; `grid` is
/// the row's grid for [`Precision::Grid`].
pub(crate) fn released_precision(
    value: f64,
    precision: &Precision,
    grid: Option<f64>,
    quantile: bool,
    n_released: Option<u64>,
    rules: &Rules,
) -> Option<f64> {
    match precision {
        Precision::Grid { .. } if quantile => Some(to_step(value, grid?)),
        Precision::Grid { .. } => Some(to_step(value, grid_step(grid?, n_released?, rules))),
        Precision::Significant { digits } => Some(significant(value, *digits)),
    }
}

/// Recomputes every derived cell of every table from the released values of `out` (the
/// controlled tables, in the order of `tables`).
pub(crate) fn apply(
    tables: &[Table],
    out: &mut [CheckedTable],
    rules: &Rules,
) -> Result<(), DiscloseError> {
    for (i, table) in tables.iter().enumerate() {
        for d in &table.derived {
            let bad = |message: String| DiscloseError::Value {
                table: table.name.clone(),
                row: d.row,
                column: d.column.clone(),
                message,
            };
            let r = out[i].row_map[d.row];
            let c = out[i]
                .column(&d.column)
                .ok_or_else(|| bad("not a released column".into()))?;
            let released_row = !out[i].status[r].is_withheld()
                && out[i]
                    .column(PATIENTS)
                    .and_then(|pc| out[i].rows[r][pc].as_i64())
                    .is_some_and(|p| p >= rules.threshold() as i64);
            if !released_row {
                out[i].rows[r][c] = Value::Null;
                continue;
            }
            let mut xs = Vec::with_capacity(d.inputs.len());
            for input in &d.inputs {
                xs.push(resolve(tables, out, i, input).map_err(&bad)?);
            }
            let v = xs
                .iter()
                .copied()
                .collect::<Option<Vec<f64>>>()
                .and_then(|xs| evaluate(d.formula, &xs, d.level, d.per));
            out[i].rows[r][c] = Value::opt(v);
            if v.is_none() {
                out[i].notes.push(Note {
                    row: r,
                    column: d.column.clone(),
                    reason: "derived".into(),
                });
            }
        }
    }
    Ok(())
}

/// The released value of a referenced cell; `None` where it is withheld or null.
fn resolve(
    tables: &[Table],
    out: &[CheckedTable],
    here: usize,
    cell: &CellRef,
) -> Result<Option<f64>, String> {
    let j = if cell.table.is_empty() {
        here
    } else {
        tables
            .iter()
            .position(|t| t.name == cell.table)
            .ok_or_else(|| {
                format!(
                    "refers to table {}, which is not released with it",
                    cell.table
                )
            })?
    };
    let t = &tables[j];
    if cell.row >= t.rows.len() {
        return Err(format!(
            "refers to row {} of {}, which has {} rows",
            cell.row,
            t.name,
            t.rows.len()
        ));
    }
    let name = match t.patients_column() {
        Some(pc) if t.columns[pc].name == cell.column => PATIENTS,
        _ => cell.column.as_str(),
    };
    let c = out[j].column(name).ok_or_else(|| {
        format!(
            "refers to column {} of {}, which is not released",
            cell.column, t.name
        )
    })?;
    let r = out[j].row_map[cell.row];
    if out[j].status[r].is_withheld() {
        return Ok(None);
    }
    Ok(out[j].rows[r][c].as_f64())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn steps_print_as_decimals() {
        assert_eq!(to_step(45.234_567, 0.01), 45.23);
        assert_eq!(to_step(45.236, 0.01).to_string(), "45.24");
        assert_eq!(to_step(1234.0, 10.0), 1230.0);
        assert_eq!(significant(0.012_345, 2), 0.012);
        assert_eq!(significant(0.000_123_4, 2).to_string(), "0.00012");
    }
}
