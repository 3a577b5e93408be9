//! Aggregate candidates: the tables `measure` computes inside the secure area and hands to the
//! release stage, which puts every one of them through disclosure control.
//!
//! A candidate is still sensitive: it may hold small cells, per-patient contributions (for the
//! dominance rule) and support columns (for quantile and histogram rules) that must never be
//! released as they are. Only `sluice-disclose` turns a candidate into something the release
//! writer accepts.
//!
//! Tables are in long form: dimension columns (text or numbers) identify a cell, and every row
//! carries the number of distinct patients contributing to it in its [`Role::Patients`] column.
//! Linear relations between rows (a total and its parts, or one step of a cohort flow and the
//! patients it excluded) are listed as [`Constraint`]s so that secondary suppression can make
//! sure no withheld cell is recoverable by subtraction.

use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// Version of the candidate file format; release refuses any other.
pub const SCHEMA_VERSION: u32 = 2;

/// The dimension value that marks a total over that dimension.
pub const ALL: &str = "all";

#[derive(Debug, thiserror::Error)]
pub enum AggregateError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: not a candidate file: {message}")]
    Format { path: PathBuf, message: String },
    #[error(
        "{path}: candidate schema version {found} but this sluice reads version {SCHEMA_VERSION}; rerun measure"
    )]
    Version { path: PathBuf, found: u32 },
    #[error("table {table}: {message}")]
    Table { table: String, message: String },
}

/// What a column holds, which decides how disclosure control treats it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "role", rename_all = "snake_case")]
pub enum Role {
    /// Part of the cell's key: window, analyte, band, month (YYYY-MM), setting, sex, age band,
    /// histogram bin edges. Never a date finer than a month, never a pseudonym.
    Dimension,
    /// Distinct patients contributing to the row: the unit of the threshold rule. Exactly one per
    /// table.
    Patients,
    /// Another count (results, events, specimens): released, rounded, only with its row.
    Count,
    /// Person-time in years (patients at risk × time): released rounded to the rules'
    /// person-time base, because person-time divided by the window length is a patient count.
    PersonTime,
    /// A statistic (mean, SD, estimate, standard error, CI bound, p-value, rate): released only
    /// when the row has enough patients.
    Statistic,
    /// A quantile at probability `p` of the observations counted in column `n`: released only when
    /// enough observations lie beyond it on both sides.
    Quantile { p: f64, n: String },
    /// A sum of per-patient contributions (e.g. miles). The `contributions` column holds the
    /// largest contributions, for the dominance rule.
    Magnitude { contributions: String },
    /// Largest per-patient contributions to a magnitude column, descending (list of numbers).
    /// Never released.
    Contributions,
    /// Support for a rule, never released (e.g. cumulative distinct patients of a histogram).
    Support,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Column {
    pub name: String,
    #[serde(flatten)]
    pub role: Role,
    /// What the column means, for the report and the file metadata.
    #[serde(default)]
    pub description: String,
    /// How finely a statistic or quantile may be released; `None` releases it as computed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub precision: Option<Precision>,
}

/// How finely a statistic is released, so that it does not pin the count beside it.
///
/// A mean of `n` observations recorded on a grid `g` (whole days, results to 0.1) times `n` is a
/// multiple of `g`; released exactly, it tells which `n` of those the rounded count allows is the
/// true one. Released as a multiple of a step `s` with `s · n ≥ g` for every `n` the rounded count
/// allows, every such `n` has a multiple of `g` within reach, so none is singled out.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Precision {
    /// A mean, SD or difference of observations recorded on `grid`, over the observations
    /// counted in column `n` (a patients or count column of the same row). Quantiles are
    /// released on the grid itself, which also hides the interpolation weight that gives n.
    Grid {
        grid: f64,
        n: String,
        /// Grids for some values of one dimension (e.g. each analyte's reporting resolution);
        /// rows with other values use `grid`.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        by: Option<GridBy>,
    },
    /// A p-value or similar: released to this many significant digits.
    Significant { digits: u32 },
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct GridBy {
    pub dimension: String,
    pub grids: BTreeMap<String, f64>,
}

impl Precision {
    /// The grid of one row of `table` (for [`Precision::Grid`]).
    pub fn grid_of(&self, table: &Table, row: &[Value]) -> Option<f64> {
        let Precision::Grid { grid, by, .. } = self else {
            return None;
        };
        let g = by.as_ref().and_then(|b| {
            let c = table.column(&b.dimension)?;
            b.grids.get(row[c].as_text()?).copied()
        });
        Some(g.unwrap_or(*grid))
    }
}

/// One value of a cell.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(untagged)]
pub enum Value {
    Null,
    Int(i64),
    Float(f64),
    Text(String),
    List(Vec<f64>),
}

impl Value {
    pub fn as_f64(&self) -> Option<f64> {
        match self {
            Value::Int(i) => Some(*i as f64),
            Value::Float(f) => Some(*f),
            _ => None,
        }
    }
    pub fn as_i64(&self) -> Option<i64> {
        match self {
            Value::Int(i) => Some(*i),
            _ => None,
        }
    }
    pub fn as_text(&self) -> Option<&str> {
        match self {
            Value::Text(s) => Some(s),
            _ => None,
        }
    }
    /// A float that is NaN or infinite becomes null: a statistic that could not be computed.
    pub fn float(f: f64) -> Value {
        if f.is_finite() {
            Value::Float(f)
        } else {
            Value::Null
        }
    }
    pub fn opt(f: Option<f64>) -> Value {
        f.map_or(Value::Null, Value::float)
    }
}

impl From<&str> for Value {
    fn from(s: &str) -> Self {
        Value::Text(s.to_string())
    }
}
impl From<String> for Value {
    fn from(s: String) -> Self {
        Value::Text(s)
    }
}
impl From<i64> for Value {
    fn from(i: i64) -> Self {
        Value::Int(i)
    }
}
impl From<u64> for Value {
    fn from(i: u64) -> Self {
        Value::Int(i as i64)
    }
}
impl From<usize> for Value {
    fn from(i: usize) -> Self {
        Value::Int(i as i64)
    }
}
impl From<f64> for Value {
    fn from(f: f64) -> Self {
        Value::float(f)
    }
}

/// Rows `parts` sum to row `total` in every count column (and in patients, because each patient
/// falls in exactly one part). A withheld part must not be recoverable as total − other parts.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Constraint {
    pub total: usize,
    pub parts: Vec<usize>,
}

/// A cell of a candidate table: the table (empty for the table that holds the reference), the
/// row index in that table as measure built it, and the column.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct CellRef {
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub table: String,
    pub row: usize,
    pub column: String,
}

impl CellRef {
    /// A cell of the same table.
    pub fn here(row: usize, column: &str) -> CellRef {
        CellRef {
            table: String::new(),
            row,
            column: column.into(),
        }
    }
    /// A cell of another table.
    pub fn of(table: &str, row: usize, column: &str) -> CellRef {
        CellRef {
            table: table.into(),
            row,
            column: column.into(),
        }
    }
}

/// A statistic that is an exact function of counts (or of other released values). Disclosure
/// control never releases the value measure computed for such a cell: it recomputes it from the
/// *released* (rounded) inputs, and withholds it when any input is withheld, so the statistic
/// says nothing the released counts do not.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Formula {
    /// [events, exposure]: events / exposure × `per`.
    Rate,
    /// [events, exposure]: exact Poisson limits of the rate, at `level`.
    PoissonLower,
    PoissonUpper,
    /// [part, whole]: part / whole.
    Share,
    /// [part, whole]: Wilson score limits of the share, at `level`.
    WilsonLower,
    WilsonUpper,
    /// [b, c] discordant counts: McNemar chi-squared with continuity correction, its p and the
    /// exact binomial p.
    McNemarChi2,
    McNemarP,
    McNemarExactP,
    /// [events1, exposure1, events0, exposure0]: (events1/exposure1) / (events0/exposure0), and
    /// its exact conditional-binomial limits at `level`.
    RateRatio,
    RateRatioLower,
    RateRatioUpper,
    /// [events1, exposure1, events0, exposure0]: the log rate ratio, its Wald limits at `level`,
    /// and its SE √(1/events1 + 1/events0).
    LogRateRatio,
    LogRateRatioLower,
    LogRateRatioUpper,
    LogRateRatioSe,
    /// [estimate, se, n]: a t interval limit estimate ∓ t(n − 1)·se at `level`, and the two-sided
    /// p of estimate/se on n − 1 degrees of freedom, with n the released (rounded) count, so the
    /// t quantile reveals only the rounded n.
    TLower,
    TUpper,
    TPValue,
}

impl Formula {
    /// How many inputs the formula takes.
    pub fn arity(self) -> usize {
        use Formula::*;
        match self {
            Rate | PoissonLower | PoissonUpper | Share | WilsonLower | WilsonUpper
            | McNemarChi2 | McNemarP | McNemarExactP => 2,
            TLower | TUpper | TPValue => 3,
            RateRatio | RateRatioLower | RateRatioUpper | LogRateRatio | LogRateRatioLower
            | LogRateRatioUpper | LogRateRatioSe => 4,
        }
    }
}

/// One derived cell of a table: `column` of `row` is `formula` of `inputs`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Derived {
    pub row: usize,
    pub column: String,
    pub formula: Formula,
    pub inputs: Vec<CellRef>,
    /// Confidence level of an interval formula (0.95); unused otherwise.
    #[serde(default)]
    pub level: f64,
    /// Scale of a rate (100 for per 100 patient-years); unused otherwise.
    #[serde(default)]
    pub per: f64,
}

/// How histogram rows are laid out, so that small tail bins can be merged instead of dropped.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Histogram {
    /// Dimensions that identify one histogram (e.g. subgroup, analyte, window).
    pub group_by: Vec<String>,
    /// Numeric columns with each bin's edges; rows of a histogram are in ascending bin order.
    pub lower: String,
    pub upper: String,
    /// Support columns: distinct patients with an observation in this bin or any bin below it,
    /// and in this bin or any bin above it (exact counts for merged tails).
    pub patients_at_or_below: String,
    pub patients_at_or_above: String,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Table {
    /// File stem of the released table: lower-case letters, digits and underscores.
    pub name: String,
    pub title: String,
    #[serde(default)]
    pub description: String,
    pub columns: Vec<Column>,
    pub rows: Vec<Vec<Value>>,
    #[serde(default)]
    pub constraints: Vec<Constraint>,
    #[serde(default)]
    pub histogram: Option<Histogram>,
    /// Cells that are exact functions of released values (see [`Formula`]).
    #[serde(default)]
    pub derived: Vec<Derived>,
    /// Rows that count the same patients as cells of other tables (see [`Link`]).
    #[serde(default)]
    pub links: Vec<Link>,
}

/// A row of this table whose patients are exactly the patients of `parts` (cells of other
/// tables, disjoint): the same count released in two tables. Disclosure control protects the
/// relation like a margin, across tables: no member may be the only one withheld.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Link {
    pub row: usize,
    pub parts: Vec<CellRef>,
}

impl Table {
    pub fn new(name: &str, title: &str, description: &str, columns: Vec<Column>) -> Self {
        Table {
            name: name.to_string(),
            title: title.to_string(),
            description: description.to_string(),
            columns,
            rows: Vec::new(),
            constraints: Vec::new(),
            histogram: None,
            derived: Vec::new(),
            links: Vec::new(),
        }
    }

    /// Declares that `column` of `row` is `formula` of `inputs` (see [`Derived`]).
    pub fn derive(
        &mut self,
        row: usize,
        column: &str,
        formula: Formula,
        inputs: Vec<CellRef>,
        level: f64,
        per: f64,
    ) {
        self.derived.push(Derived {
            row,
            column: column.into(),
            formula,
            inputs,
            level,
            per,
        });
    }

    /// Declares the rate per 100 patient-years of `row` and its exact Poisson limits at `level`
    /// (columns `rate_per_100py`, `lower`, `upper`) as derived from its `n_events` and
    /// `person_years`.
    pub fn derive_rate_per_100py(&mut self, row: usize, level: f64) {
        let inputs = vec![
            CellRef::here(row, "n_events"),
            CellRef::here(row, "person_years"),
        ];
        for (c, f) in [
            ("rate_per_100py", Formula::Rate),
            ("lower", Formula::PoissonLower),
            ("upper", Formula::PoissonUpper),
        ] {
            self.derive(row, c, f, inputs.clone(), level, 100.0);
        }
    }

    /// Sets the release precision of a column.
    pub fn set_precision(&mut self, column: &str, precision: Precision) {
        if let Some(c) = self.columns.iter_mut().find(|c| c.name == column) {
            c.precision = Some(precision);
        }
    }

    pub fn column(&self, name: &str) -> Option<usize> {
        self.columns.iter().position(|c| c.name == name)
    }

    pub fn patients_column(&self) -> Option<usize> {
        self.columns.iter().position(|c| c.role == Role::Patients)
    }

    pub fn push(&mut self, row: Vec<Value>) {
        debug_assert_eq!(row.len(), self.columns.len(), "row width of {}", self.name);
        self.rows.push(row);
    }

    /// Adds a constraint for every total over `dim`: the rows whose `dim` is [`ALL`] are totals of
    /// the rows that agree with them on every other dimension. Call only where each patient of a
    /// total falls in exactly one part (e.g. a patient's one band per window).
    pub fn add_margin_constraints(&mut self, dim: &str) -> Result<(), AggregateError> {
        let d = self.column(dim).ok_or_else(|| AggregateError::Table {
            table: self.name.clone(),
            message: format!("no dimension {dim}"),
        })?;
        let dims: Vec<usize> = (0..self.columns.len())
            .filter(|&i| i != d && self.columns[i].role == Role::Dimension)
            .collect();
        let key = |row: &[Value]| -> String {
            dims.iter()
                .map(|&i| serde_json::to_string(&row[i]).unwrap_or_default())
                .collect::<Vec<_>>()
                .join("\u{1f}")
        };
        let mut totals: BTreeMap<String, usize> = BTreeMap::new();
        let mut parts: BTreeMap<String, Vec<usize>> = BTreeMap::new();
        for (r, row) in self.rows.iter().enumerate() {
            let k = key(row);
            if row[d].as_text() == Some(ALL) {
                totals.insert(k, r);
            } else {
                parts.entry(k).or_default().push(r);
            }
        }
        for (k, total) in totals {
            if let Some(p) = parts.remove(&k) {
                self.constraints.push(Constraint { total, parts: p });
            }
        }
        Ok(())
    }

    /// Structural checks shared by release and tests: names, widths, one patients column,
    /// referenced columns exist, constraint indices in range.
    pub fn validate(&self) -> Result<(), AggregateError> {
        let err = |message: String| AggregateError::Table {
            table: self.name.clone(),
            message,
        };
        if self.name.is_empty()
            || !self
                .name
                .chars()
                .all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '_')
        {
            return Err(err(format!(
                "name {:?} is not lower-case letters, digits and underscores",
                self.name
            )));
        }
        let np = self
            .columns
            .iter()
            .filter(|c| c.role == Role::Patients)
            .count();
        if np != 1 {
            return Err(err(format!(
                "{np} patients columns; exactly one is required"
            )));
        }
        for c in &self.columns {
            let need = match &c.role {
                Role::Quantile { n, .. } => Some(n),
                Role::Magnitude { contributions } => Some(contributions),
                _ => None,
            };
            if let Some(n) = need
                && self.column(n).is_none()
            {
                return Err(err(format!(
                    "column {} refers to missing column {n}",
                    c.name
                )));
            }
        }
        for (i, row) in self.rows.iter().enumerate() {
            if row.len() != self.columns.len() {
                return Err(err(format!(
                    "row {i} has {} values for {} columns",
                    row.len(),
                    self.columns.len()
                )));
            }
        }
        for c in &self.constraints {
            if c.total >= self.rows.len() || c.parts.iter().any(|&p| p >= self.rows.len()) {
                return Err(err(
                    "a constraint refers to a row that does not exist".into()
                ));
            }
        }
        for c in &self.columns {
            match (&c.precision, &c.role) {
                (None, _) => {}
                (
                    Some(Precision::Grid { grid, n, by }),
                    Role::Statistic | Role::Quantile { .. },
                ) => {
                    let grids = by.iter().flat_map(|b| b.grids.values());
                    if std::iter::once(grid)
                        .chain(grids)
                        .any(|g| !(g.is_finite() && *g > 0.0))
                    {
                        return Err(err(format!("column {} has grid {grid}", c.name)));
                    }
                    let ok = self.column(n).is_some_and(|i| {
                        matches!(self.columns[i].role, Role::Patients | Role::Count)
                    });
                    if !ok {
                        return Err(err(format!(
                            "column {} has its precision over {n}, which is not a count column",
                            c.name
                        )));
                    }
                }
                (Some(Precision::Significant { digits }), Role::Statistic) if *digits > 0 => {}
                (Some(p), _) => {
                    return Err(err(format!(
                        "column {} cannot take precision {p:?}",
                        c.name
                    )));
                }
            }
        }
        for d in &self.derived {
            let col = self.column(&d.column);
            if d.row >= self.rows.len()
                || !col.is_some_and(|c| self.columns[c].role == Role::Statistic)
            {
                return Err(err(format!(
                    "derived cell row {} column {} is not a statistic cell of the table",
                    d.row, d.column
                )));
            }
            if d.inputs.len() != d.formula.arity() {
                return Err(err(format!(
                    "derived cell row {} column {}: {:?} takes {} inputs, not {}",
                    d.row,
                    d.column,
                    d.formula,
                    d.formula.arity(),
                    d.inputs.len()
                )));
            }
        }
        if let Some(h) = &self.histogram {
            for n in h.group_by.iter().chain([
                &h.lower,
                &h.upper,
                &h.patients_at_or_below,
                &h.patients_at_or_above,
            ]) {
                if self.column(n).is_none() {
                    return Err(err(format!("histogram refers to missing column {n}")));
                }
            }
        }
        Ok(())
    }
}

/// A file the candidates were computed from, with its SHA-256.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Input {
    pub role: String,
    pub path: String,
    pub sha256: String,
}

/// Where the candidates came from: recorded in every release made of them.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Provenance {
    pub study: String,
    pub study_title: String,
    pub site: String,
    pub key_fingerprint: String,
    pub store_manifest_sha256: String,
    pub store_generation: u64,
    pub tool_version: String,
    /// The study policy and every reference table it used.
    pub inputs: Vec<Input>,
    /// Who made the release (set by `sluice release`), for separation of duties at approval.
    #[serde(default)]
    pub made_by: String,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Candidates {
    pub schema_version: u32,
    pub provenance: Provenance,
    pub tables: Vec<Table>,
    /// The populations behind the tables, by name: `all` (the cohort) and each subgroup, as
    /// sorted patient pseudonyms. For the differencing guard inside the secure area; never
    /// released. Empty for a study without a cohort.
    #[serde(default)]
    pub populations: BTreeMap<String, Vec<u64>>,
    /// The store measured, as given to measure; the release ledger is kept beside it.
    #[serde(default)]
    pub store: String,
}

impl Candidates {
    pub const FILE: &'static str = "candidates.json";

    pub fn save(&self, work: &Path) -> Result<PathBuf, AggregateError> {
        let path = work.join(Self::FILE);
        let tmp = work.join("candidates.json.tmp");
        let io = |source| AggregateError::Io {
            path: tmp.clone(),
            source,
        };
        let bytes = serde_json::to_vec(self).map_err(|e| AggregateError::Format {
            path: path.clone(),
            message: e.to_string(),
        })?;
        std::fs::write(&tmp, bytes).map_err(io)?;
        std::fs::rename(&tmp, &path).map_err(|source| AggregateError::Io {
            path: path.clone(),
            source,
        })?;
        Ok(path)
    }

    pub fn load(work: &Path) -> Result<Self, AggregateError> {
        let path = work.join(Self::FILE);
        let bytes = std::fs::read(&path).map_err(|source| AggregateError::Io {
            path: path.clone(),
            source,
        })?;
        #[derive(Deserialize)]
        struct Head {
            schema_version: u32,
        }
        let head: Head = serde_json::from_slice(&bytes).map_err(|e| AggregateError::Format {
            path: path.clone(),
            message: e.to_string(),
        })?;
        if head.schema_version != SCHEMA_VERSION {
            return Err(AggregateError::Version {
                path,
                found: head.schema_version,
            });
        }
        let c: Candidates = serde_json::from_slice(&bytes).map_err(|e| AggregateError::Format {
            path: path.clone(),
            message: e.to_string(),
        })?;
        for t in &c.tables {
            t.validate()?;
        }
        Ok(c)
    }

    pub fn table(&self, name: &str) -> Option<&Table> {
        self.tables.iter().find(|t| t.name == name)
    }
}

/// Lower-case hex SHA-256 of bytes.
pub fn sha256_hex(bytes: &[u8]) -> String {
    use sha2::Digest;
    hex::encode(sha2::Sha256::digest(bytes))
}

/// Shorthand constructors for columns.
pub fn dim(name: &str, description: &str) -> Column {
    col(name, Role::Dimension, description)
}
pub fn col(name: &str, role: Role, description: &str) -> Column {
    Column {
        name: name.to_string(),
        role,
        description: description.to_string(),
        precision: None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn margins_group_parts_under_their_total() {
        let mut t = Table::new(
            "t",
            "t",
            "",
            vec![
                dim("a", ""),
                dim("b", ""),
                col("n_patients", Role::Patients, ""),
            ],
        );
        for (a, b, n) in [
            ("x", "p", 3),
            ("x", "q", 4),
            ("x", ALL, 7),
            ("y", "p", 1),
            (ALL, "p", 4),
        ] {
            t.push(vec![a.into(), b.into(), Value::Int(n)]);
        }
        t.add_margin_constraints("b").unwrap();
        assert_eq!(
            t.constraints,
            vec![Constraint {
                total: 2,
                parts: vec![0, 1]
            }]
        );
        t.add_margin_constraints("a").unwrap();
        assert_eq!(
            t.constraints[1],
            Constraint {
                total: 4,
                parts: vec![0, 3]
            }
        );
        t.validate().unwrap();
    }

    #[test]
    fn values_round_trip_through_json() {
        let v = vec![
            Value::Null,
            Value::Int(3),
            Value::Float(2.5),
            "a".into(),
            Value::List(vec![1.0, 2.0]),
        ];
        let s = serde_json::to_string(&v).unwrap();
        let back: Vec<Value> = serde_json::from_str(&s).unwrap();
        assert_eq!(v, back);
    }
}
