//! Disclosure control: turns an aggregate candidate ([`sluice_aggregate::Table`]) into a
//! [`CheckedTable`], the only thing the release writer accepts.
//!
//! [`control`] applies, in this order:
//!
//! 1. **Histogram merging** (tables with [`sluice_aggregate::Histogram`]): within each group,
//!    bins in ascending order; tail bins are merged from each end inward until the merged bin's
//!    exact distinct patients (from the support columns) reach the threshold; a middle bin still
//!    below it is merged with its neighbours, using the largest per-bin patient count as a
//!    conservative lower bound. A histogram with fewer patients than the threshold in all is
//!    withheld whole (rule `histogram`).
//! 2. **Primary suppression** on the patients column: fewer than `threshold` patients → withheld
//!    (`threshold`); no patients → withheld (`zero`) unless `show_zeros`. The same applies to
//!    every other count column of the row, and a row is withheld as a whole.
//! 3. **Secondary suppression** (`secondary = "margins"`): every [`Constraint`] (a total and its
//!    parts) has 0 or at least 2 withheld members; where one member alone is withheld, the
//!    released part with the fewest patients (or else the total) is withheld too (`secondary`);
//!    a withheld zero does not count as one of the two,
//!    repeated to a fixed point over all constraints, so a 2-D table with row and column margins
//!    is protected along both.
//! 4. **Cell rules** in released rows: statistics only with at least `threshold` patients;
//!    quantiles only when at least `quantile_min_beyond` observations lie beyond them on each
//!    side (checked on the raw and on the released, rounded, observation count); magnitudes only
//!    when they pass (n, k)-dominance and the p%-rule (Hundepool et al. 2012 §4.2), with
//!    secondary suppression of magnitude cells over the same constraints.
//! 5. **Rounding** of every released count (patients and other counts) to the rounding base,
//!    never to a non-zero value below the threshold, and of person-time to the person-time base.
//!    Withheld values are null, never sentinels.
//! 6. **Precision**: statistics and quantiles with a [`sluice_aggregate::Precision`] are released
//!    at a step that keeps every count the rounding allows possible ([`derive::grid_step`]).
//! 7. **Derived cells** ([`control_all`]): every [`sluice_aggregate::Formula`] cell is recomputed
//!    from the released values of its inputs, in this table or another, and left null (reason
//!    `derived`) when any input is withheld ([`derive`](mod@derive)).
//!
//! 8. **Links across tables** ([`sluice_aggregate::Link`]): a count released in two tables (a
//!    subgroup's size and its transition cells, the cohort's bands and the transition margins)
//!    is protected like a margin across them, to a fixed point with each table's own margins.
//!
//! A released row says only `released`, `merged` or `withheld` ([`Status::label`]); the reason
//! is kept for the secure area's log ([`Status::log_label`], [`CheckedTable::notes`]).
//!
//! Contributions and support columns are dropped; the patients column is named `n_patients`.
//!
//! # Limits
//!
//! - Secondary suppression protects each cell against exact recovery by subtraction within the
//!   constraints and links recorded with the tables. It does not defend against interval
//!   (linear-programming) attacks that bound a withheld cell between values, nor against
//!   relations measure does not record (differencing across releases is the ledger's).
//! - Two withheld cells in one constraint still reveal their sum (to within rounding).
//! - Rounding is unbiased nearest-multiple rounding, not controlled rounding: rounded parts need
//!   not add up to the rounded total, and many overlapping tables can narrow a true value.
//! - A merged middle histogram bin reports a lower bound of its distinct patients.
//! - Dominance and p% use the contributions the candidate lists; a truncated list shorter than
//!   `n` understates the top-n share only if it omits real contributors, which `measure` must not.

#![forbid(unsafe_code)]

pub mod derive;
mod histogram;
mod rules;
mod secondary;

pub use rules::{Differencing, Dominance, Floor, Rules, Secondary};
pub use secondary::unsafe_constraints;

use serde::Serialize;
use sluice_aggregate::{AggregateError, Column, Constraint, Precision, Role, Table, Value};
use std::path::PathBuf;

/// The name of the patients column in every released table.
pub const PATIENTS: &str = "n_patients";

#[derive(Debug, thiserror::Error)]
pub enum DiscloseError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: {message}")]
    Parse { path: PathBuf, message: String },
    #[error("{path}: key {key}: {message}")]
    Invalid {
        path: PathBuf,
        key: &'static str,
        message: String,
    },
    #[error(
        "{rules}: {key} = {value} is below the site floor in {floor}: it must be {requirement}"
    )]
    BelowFloor {
        rules: PathBuf,
        floor: PathBuf,
        key: &'static str,
        value: String,
        requirement: String,
    },
    #[error(transparent)]
    Table(#[from] AggregateError),
    #[error("table {table}, row {row}, column {column}: {message}")]
    Value {
        table: String,
        row: usize,
        column: String,
        message: String,
    },
}

/// What disclosure control did with a row. Released files carry only [`Status::label`]
/// (`released`, `merged` or `withheld`): one status for every withheld row whatever the reason,
/// and no word on whether a count was rounded, because "withheld because zero" or "released
/// unrounded" would itself tell the count. The reason stays in the secure area's log
/// ([`Status::log_label`]).
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
pub enum Status {
    /// Released as computed (counts already multiples of the rounding base).
    Released,
    /// Released with at least one count rounded.
    Rounded,
    /// Several histogram bins released as one row.
    Merged,
    /// Every non-dimension value is null; `rule` names why: `threshold`, `zero`, `secondary`,
    /// `histogram`, `differencing`.
    Withheld { rule: String },
}

/// The label every withheld row carries in a released file.
pub const WITHHELD: &str = "withheld";

impl Status {
    /// The label written to the `disclosure` column of a released file.
    pub fn label(&self) -> String {
        match self {
            Status::Released | Status::Rounded => "released".into(),
            Status::Merged => "merged".into(),
            Status::Withheld { .. } => WITHHELD.into(),
        }
    }

    /// The label of the secure area's log, with the reason: `released`, `rounded`, `merged`,
    /// `withheld:<rule>`.
    pub fn log_label(&self) -> String {
        match self {
            Status::Released => "released".into(),
            Status::Rounded => "rounded".into(),
            Status::Merged => "merged".into(),
            Status::Withheld { rule } => format!("withheld:{rule}"),
        }
    }

    /// Reads a released file's label; a withheld row's reason is not in the file, so it comes
    /// back as an empty rule.
    pub fn parse(label: &str) -> Option<Status> {
        match label {
            "released" => Some(Status::Released),
            "merged" => Some(Status::Merged),
            WITHHELD => Some(Status::Withheld {
                rule: String::new(),
            }),
            _ => None,
        }
    }

    pub fn is_withheld(&self) -> bool {
        matches!(self, Status::Withheld { .. })
    }
}

/// A single value left null in a released row, and why (for the secure area's log): `derived`
/// (an input withheld), `quantile`, `dominance`, `threshold`.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
pub struct Note {
    pub row: usize,
    pub column: String,
    pub reason: String,
}

/// A table that has been through disclosure control. It can be made only by [`control`]: its
/// fields are private and it has no public constructor, `Default` or `Deserialize`, so the
/// release writer's signature alone guarantees every table it writes was controlled.
///
/// ```compile_fail
/// // Not constructible outside this crate, not even from a candidate table.
/// let t = sluice_disclose::CheckedTable {
///     name: "t".into(),
///     title: "t".into(),
///     description: String::new(),
///     columns: Vec::new(),
///     rows: Vec::new(),
///     status: Vec::new(),
///     constraints: Vec::new(),
///     rules_sha256: String::new(),
///     row_map: Vec::new(),
///     notes: Vec::new(),
///     weights: Vec::new(),
/// };
/// ```
///
/// ```compile_fail
/// let t: sluice_disclose::CheckedTable = Default::default();
/// ```
///
/// ```compile_fail
/// let table = sluice_aggregate::Table::new("t", "t", "", Vec::new());
/// let t: sluice_disclose::CheckedTable = table.into();
/// ```
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct CheckedTable {
    name: String,
    title: String,
    description: String,
    columns: Vec<Column>,
    rows: Vec<Vec<Value>>,
    status: Vec<Status>,
    constraints: Vec<Constraint>,
    rules_sha256: String,
    /// Candidate row → output row (histogram merging joins rows).
    row_map: Vec<usize>,
    notes: Vec<Note>,
    /// Unrounded patients per output row, for secondary suppression re-run after control.
    weights: Vec<f64>,
}

impl CheckedTable {
    /// Values left null in released rows, with their reasons (never released).
    pub fn notes(&self) -> &[Note] {
        &self.notes
    }
    /// The output row a candidate row went to.
    pub fn output_row(&self, candidate_row: usize) -> Option<usize> {
        self.row_map.get(candidate_row).copied()
    }
    /// Withholds whole rows after control (the differencing guard); the caller re-runs
    /// secondary suppression through [`CheckedTable::protect_again`].
    pub fn withhold_rows(&mut self, rows: &[usize], rule: &str) {
        for &r in rows {
            if r < self.rows.len() && !self.status[r].is_withheld() {
                self.status[r] = Status::Withheld { rule: rule.into() };
                for (c, col) in self.columns.iter().enumerate() {
                    if col.role != Role::Dimension {
                        self.rows[r][c] = Value::Null;
                    }
                }
            }
        }
    }
    /// Re-applies secondary suppression over the table's constraints after rows were withheld
    /// late, weighted by the unrounded patients as in [`control`].
    pub fn protect_again(&mut self) {
        let mut w: Vec<bool> = self.status.iter().map(Status::is_withheld).collect();
        let weight = self.weights.clone();
        let added = secondary::protect(&self.constraints, &mut w, &weight);
        self.withhold_rows(&added, "secondary");
    }
    pub fn name(&self) -> &str {
        &self.name
    }
    pub fn title(&self) -> &str {
        &self.title
    }
    pub fn description(&self) -> &str {
        &self.description
    }
    /// Released columns only, with their roles (no contributions or support columns).
    pub fn columns(&self) -> &[Column] {
        &self.columns
    }
    /// Values, one row per output row, in [`CheckedTable::columns`] order.
    pub fn rows(&self) -> &[Vec<Value>] {
        &self.rows
    }
    /// What happened to each row.
    pub fn status(&self) -> &[Status] {
        &self.status
    }
    /// The candidate's constraints in output row indices (histogram merging renumbers rows).
    pub fn constraints(&self) -> &[Constraint] {
        &self.constraints
    }
    /// SHA-256 of the text of the rules this table was controlled by.
    pub fn rules_sha256(&self) -> &str {
        &self.rules_sha256
    }
    pub fn withheld(&self) -> usize {
        self.status.iter().filter(|s| s.is_withheld()).count()
    }
    pub fn column(&self, name: &str) -> Option<usize> {
        self.columns.iter().position(|c| c.name == name)
    }
}

/// The (n, k)-dominance rule: safe unless the `n` largest contributions exceed `k` % of the total
/// (Hundepool et al. 2012 §4.2).
pub fn dominance_safe(total: f64, contributions: &[f64], d: Dominance) -> bool {
    let top = descending(contributions);
    let s: f64 = top.iter().take(d.n).sum();
    s <= d.k / 100.0 * total
}

/// The p%-rule: safe unless total − x₁ − x₂ < p/100 · x₁, i.e. the second-largest contributor
/// could estimate the largest to within p % (Hundepool et al. 2012 §4.2).
pub fn p_percent_safe(total: f64, contributions: &[f64], p: f64) -> bool {
    let top = descending(contributions);
    let x1 = top.first().copied().unwrap_or(0.0);
    let x2 = top.get(1).copied().unwrap_or(0.0);
    total - x1 - x2 >= p / 100.0 * x1
}

fn descending(xs: &[f64]) -> Vec<f64> {
    let mut v = xs.to_vec();
    v.sort_by(|a, b| b.total_cmp(a));
    v
}

fn count(t: &Table, rows: &[Vec<Value>], r: usize, c: usize) -> Result<u64, DiscloseError> {
    match &rows[r][c] {
        Value::Int(i) if *i >= 0 => Ok(*i as u64),
        v => Err(DiscloseError::Value {
            table: t.name.clone(),
            row: r,
            column: t.columns[c].name.clone(),
            message: format!("{v:?} is not a non-negative integer count"),
        }),
    }
}

fn remap(constraints: &[Constraint], map: &[usize]) -> Vec<Constraint> {
    let mut out: Vec<Constraint> = Vec::new();
    for c in constraints {
        let total = map[c.total];
        let mut parts: Vec<usize> = c
            .parts
            .iter()
            .map(|&p| map[p])
            .filter(|&p| p != total)
            .collect();
        parts.sort_unstable();
        parts.dedup();
        let c = Constraint { total, parts };
        if !c.parts.is_empty() && !out.contains(&c) {
            out.push(c);
        }
    }
    out
}

fn withhold(status: &mut [Option<Status>], r: usize, rule: &str) {
    status[r] = Some(Status::Withheld { rule: rule.into() });
}

/// Applies the disclosure rules to one candidate table. See the crate documentation for the
/// method and its limits. A table whose derived cells refer to other tables needs
/// [`control_all`].
pub fn control(table: &Table, rules: &Rules) -> Result<CheckedTable, DiscloseError> {
    let mut v = control_all(std::slice::from_ref(table), rules)?;
    Ok(v.pop().expect("one table"))
}

/// Applies the disclosure rules to every table of a release, then recomputes every derived cell
/// from the released values of all of them ([`derive`](mod@derive)).
pub fn control_all(tables: &[Table], rules: &Rules) -> Result<Vec<CheckedTable>, DiscloseError> {
    let mut out = tables
        .iter()
        .map(|t| control_one(t, rules))
        .collect::<Result<Vec<_>, _>>()?;
    link_protect(tables, &mut out)?;
    derive::apply(tables, &mut out, rules)?;
    Ok(out)
}

/// Secondary suppression across tables over [`sluice_aggregate::Link`]s: a count released in
/// one table and withheld in another (or a total whose only withheld part sits in another
/// table) would give the withheld one back. Runs to a fixed point, re-running each table's own
/// margins after every late withholding.
fn link_protect(tables: &[Table], out: &mut [CheckedTable]) -> Result<(), DiscloseError> {
    let index = |name: &str, here: usize| -> Result<usize, DiscloseError> {
        if name.is_empty() {
            return Ok(here);
        }
        tables
            .iter()
            .position(|t| t.name == name)
            .ok_or_else(|| DiscloseError::Value {
                table: tables[here].name.clone(),
                row: 0,
                column: String::new(),
                message: format!("a link refers to table {name}, which is not released with it"),
            })
    };
    let mut links: Vec<Vec<(usize, usize)>> = Vec::new();
    for (i, t) in tables.iter().enumerate() {
        for l in &t.links {
            let mut members = vec![(i, out[i].row_map[l.row])];
            for p in &l.parts {
                let j = index(&p.table, i)?;
                let r = *out[j]
                    .row_map
                    .get(p.row)
                    .ok_or_else(|| DiscloseError::Value {
                        table: t.name.clone(),
                        row: l.row,
                        column: String::new(),
                        message: format!(
                            "a link refers to row {} of {}, which has fewer rows",
                            p.row, tables[j].name
                        ),
                    })?;
                members.push((j, r));
            }
            links.push(members);
        }
    }
    for _ in 0..1000 {
        let mut changed = false;
        for members in &links {
            let held = members
                .iter()
                .filter(|&&(j, r)| out[j].status[r].is_withheld() && out[j].weights[r] > 0.0)
                .count();
            let any = members.iter().any(|&(j, r)| out[j].status[r].is_withheld());
            if !any || held >= 2 {
                continue;
            }
            let pick = members
                .iter()
                .copied()
                .filter(|&(j, r)| !out[j].status[r].is_withheld() && out[j].weights[r] > 0.0)
                .min_by(|a, b| {
                    out[a.0].weights[a.1]
                        .total_cmp(&out[b.0].weights[b.1])
                        .then(a.cmp(b))
                });
            if let Some((j, r)) = pick {
                out[j].withhold_rows(&[r], "secondary");
                out[j].protect_again();
                changed = true;
            }
        }
        if !changed {
            return Ok(());
        }
    }
    Ok(())
}

fn control_one(table: &Table, rules: &Rules) -> Result<CheckedTable, DiscloseError> {
    table.validate()?;
    let pc = table.patients_column().expect("validated");
    if let Some(c) = table.column(PATIENTS)
        && c != pc
    {
        return Err(DiscloseError::Value {
            table: table.name.clone(),
            row: 0,
            column: PATIENTS.into(),
            message: format!(
                "the name {PATIENTS} is reserved for the patients column, which is {}",
                table.columns[pc].name
            ),
        });
    }
    let t = rules.threshold();
    let merged = histogram::merge(table, t)?;
    let rows = merged.rows;
    let n = rows.len();
    let mut status = merged.status;
    let constraints = remap(&table.constraints, &merged.map);

    let count_cols: Vec<usize> = (0..table.columns.len())
        .filter(|&c| matches!(table.columns[c].role, Role::Patients | Role::Count))
        .collect();

    // Primary suppression: any count of the row below the threshold withholds the row.
    let mut patients = vec![0u64; n];
    for r in 0..n {
        if status[r].as_ref().is_some_and(Status::is_withheld) {
            patients[r] = count(table, &rows, r, pc).unwrap_or(0);
            continue;
        }
        patients[r] = count(table, &rows, r, pc)?;
        for &c in &count_cols {
            let v = count(table, &rows, r, c)?;
            if v == 0 && !rules.show_zeros() {
                withhold(&mut status, r, "zero");
                break;
            }
            if v > 0 && v < t {
                withhold(&mut status, r, "threshold");
                break;
            }
        }
    }

    let is_withheld = |s: &[Option<Status>]| -> Vec<bool> {
        s.iter()
            .map(|s| s.as_ref().is_some_and(Status::is_withheld))
            .collect()
    };
    if rules.secondary() == Secondary::Margins {
        let mut w = is_withheld(&status);
        let weight: Vec<f64> = patients.iter().map(|&p| p as f64).collect();
        for r in secondary::protect(&constraints, &mut w, &weight) {
            withhold(&mut status, r, "secondary");
        }
    }
    let withheld = is_withheld(&status);

    // Magnitude cells: null where the row is withheld, too few patients, or dominance or p%
    // fails; then protected like rows over the same constraints.
    let mut magnitude_null: Vec<(usize, Vec<bool>)> = Vec::new();
    for (c, column) in table.columns.iter().enumerate() {
        let Role::Magnitude { contributions } = &column.role else {
            continue;
        };
        let cc = table.column(contributions).expect("validated");
        let mut null = vec![false; n];
        let mut weight = vec![0.0; n];
        for r in 0..n {
            let total = rows[r][c].as_f64();
            weight[r] = total.unwrap_or(0.0);
            let safe = match (total, &rows[r][cc]) {
                (Some(total), Value::List(xs)) => {
                    dominance_safe(total, xs, rules.dominance())
                        && p_percent_safe(total, xs, rules.p_percent())
                }
                _ => false,
            };
            null[r] = withheld[r] || patients[r] < t || !safe;
        }
        if rules.secondary() == Secondary::Margins {
            secondary::protect(&constraints, &mut null, &weight);
        }
        magnitude_null.push((c, null));
    }

    let mut out_rows = Vec::with_capacity(n);
    let mut out_status = Vec::with_capacity(n);
    let mut notes = Vec::new();
    for r in 0..n {
        let mut row = Vec::new();
        let mut rounded = false;
        let released_count = |name: &str| -> Option<u64> {
            let c = table.column(name)?;
            let raw = rows[r][c].as_i64()?;
            Some(rules.round_count(raw.max(0) as u64))
        };
        for (c, column) in table.columns.iter().enumerate() {
            let v = &rows[r][c];
            let mut note = |reason: &str| {
                notes.push(Note {
                    row: r,
                    column: column.name.clone(),
                    reason: reason.into(),
                })
            };
            let released = match &column.role {
                Role::Contributions | Role::Support => continue,
                Role::Dimension => v.clone(),
                _ if withheld[r] => Value::Null,
                Role::Patients | Role::Count => {
                    let x = count(table, &rows, r, c)?;
                    let y = rules.round_count(x);
                    rounded |= y != x;
                    Value::Int(y as i64)
                }
                Role::PersonTime => match v.as_f64() {
                    Some(x) if x.is_finite() && x >= 0.0 && patients[r] >= t => {
                        let y = rules.round_person_time(x);
                        rounded |= y != x;
                        Value::float(y)
                    }
                    Some(x) if !(x.is_finite() && x >= 0.0) => {
                        return Err(DiscloseError::Value {
                            table: table.name.clone(),
                            row: r,
                            column: column.name.clone(),
                            message: format!("{x} is not a person-time"),
                        });
                    }
                    _ => Value::Null,
                },
                Role::Statistic if patients[r] >= t => match (&column.precision, v.as_f64()) {
                    (Some(p), Some(x)) => {
                        let n = match p {
                            Precision::Grid { n, .. } => released_count(n),
                            Precision::Significant { .. } => None,
                        };
                        let g = p.grid_of(table, &rows[r]);
                        Value::opt(derive::released_precision(x, p, g, false, n, rules))
                    }
                    _ => v.clone(),
                },
                Role::Statistic => {
                    note("threshold");
                    Value::Null
                }
                Role::Quantile { p, n: nc } => {
                    let nc = table.column(nc).expect("validated");
                    let ok = patients[r] >= t
                        && match rows[r][nc].as_i64() {
                            Some(raw) if raw >= 0 => {
                                let raw = raw as u64;
                                let is_count = count_cols.contains(&nc);
                                rules.quantile_ok(*p, raw)
                                    && (!is_count || rules.quantile_ok(*p, rules.round_count(raw)))
                            }
                            _ => false,
                        };
                    match (ok, &column.precision, v.as_f64()) {
                        (false, _, _) => {
                            note("quantile");
                            Value::Null
                        }
                        (true, Some(prec), Some(x)) => {
                            let g = prec.grid_of(table, &rows[r]);
                            Value::opt(derive::released_precision(x, prec, g, true, None, rules))
                        }
                        (true, _, _) => v.clone(),
                    }
                }
                Role::Magnitude { .. } => {
                    let null = &magnitude_null
                        .iter()
                        .find(|(m, _)| *m == c)
                        .expect("built")
                        .1;
                    if null[r] {
                        note("dominance");
                        Value::Null
                    } else {
                        v.clone()
                    }
                }
            };
            row.push(released);
        }
        out_rows.push(row);
        out_status.push(match status[r].take() {
            Some(s) => s,
            None if rounded => Status::Rounded,
            None => Status::Released,
        });
    }
    let columns = table
        .columns
        .iter()
        .filter(|c| !matches!(c.role, Role::Contributions | Role::Support))
        .map(|c| {
            let mut c = c.clone();
            if c.role == Role::Patients {
                c.name = PATIENTS.into();
            }
            if let Role::Quantile { n, .. } = &mut c.role
                && *n == table.columns[pc].name
            {
                *n = PATIENTS.into();
            }
            c
        })
        .collect();

    Ok(CheckedTable {
        name: table.name.clone(),
        title: table.title.clone(),
        description: table.description.clone(),
        columns,
        rows: out_rows,
        status: out_status,
        constraints,
        rules_sha256: rules.sha256().to_string(),
        row_map: merged.map,
        notes,
        weights: patients.iter().map(|&p| p as f64).collect(),
    })
}

#[cfg(test)]
mod tests;
