//! Read-only helpers over a checked table: cells by column name, display formatting, margins.

use sluice_aggregate::{ALL, Role, Value};
use sluice_disclose::CheckedTable;

/// A number for display: four significant digits, scientific for very small magnitudes, never
/// locale-dependent, so the report is the same on every machine.
pub(crate) fn num(x: f64) -> String {
    if !x.is_finite() {
        return "—".into();
    }
    if x == 0.0 {
        return "0".into();
    }
    let a = x.abs();
    if a < 1e-4 {
        return format!("{x:.3e}");
    }
    if a >= 1e6 {
        return format!("{x:.0}");
    }
    let digits = (3 - a.log10().floor() as i32).clamp(0, 8) as usize;
    let s = format!("{x:.digits$}");
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}

/// A value for display (not for withheld cells, which the caller marks itself).
pub(crate) fn show(v: &Value) -> String {
    match v {
        Value::Null => String::new(),
        Value::Int(i) => i.to_string(),
        Value::Float(f) => num(*f),
        Value::Text(s) => s.clone(),
        Value::List(xs) => xs.iter().map(|x| num(*x)).collect::<Vec<_>>().join(", "),
    }
}

pub(crate) struct View<'a> {
    pub t: &'a CheckedTable,
}

impl<'a> View<'a> {
    pub fn new(t: &'a CheckedTable) -> Self {
        View { t }
    }
    pub fn col(&self, name: &str) -> Option<usize> {
        self.t.column(name)
    }
    pub fn n(&self) -> usize {
        self.t.rows().len()
    }
    pub fn withheld(&self, r: usize) -> bool {
        self.t.status()[r].is_withheld()
    }
    /// A dimension value as text ("" for null).
    pub fn text(&self, r: usize, c: usize) -> String {
        show(&self.t.rows()[r][c])
    }
    /// A released number; `None` when null or the row is withheld.
    pub fn num(&self, r: usize, c: usize) -> Option<f64> {
        if self.withheld(r) {
            return None;
        }
        self.t.rows()[r][c].as_f64().filter(|x| x.is_finite())
    }
    pub fn dims(&self) -> Vec<usize> {
        (0..self.t.columns().len())
            .filter(|&c| self.t.columns()[c].role == Role::Dimension)
            .collect()
    }
    /// The column holding the quantile at probability `p`, if any.
    pub fn quantile(&self, p: f64) -> Option<usize> {
        self.t
            .columns()
            .iter()
            .position(|c| matches!(c.role, Role::Quantile { p: q, .. } if (q - p).abs() < 1e-9))
    }
    /// Rows kept when every dimension not in `keep` is restricted to its [`ALL`] margin where the
    /// table has one, so a chart shows totals over the dimensions it does not draw.
    pub fn margin_rows(&self, keep: &[&str]) -> Vec<usize> {
        let mut rows: Vec<usize> = (0..self.n()).collect();
        for c in self.dims() {
            if keep.contains(&self.t.columns()[c].name.as_str()) {
                continue;
            }
            let has_all = rows
                .iter()
                .any(|&r| self.t.rows()[r][c].as_text() == Some(ALL));
            if has_all {
                rows.retain(|&r| self.t.rows()[r][c].as_text() == Some(ALL));
            }
        }
        rows
    }
}

/// Distinct values in first-seen order (deterministic, follows the table's own order).
pub(crate) fn distinct<I: IntoIterator<Item = String>>(it: I) -> Vec<String> {
    let mut out: Vec<String> = Vec::new();
    for s in it {
        if !out.contains(&s) {
            out.push(s);
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::num;

    #[test]
    fn numbers_are_short_and_stable() {
        assert_eq!(num(12.345678), "12.35");
        assert_eq!(num(0.5), "0.5");
        assert_eq!(num(1234.56), "1235");
        assert_eq!(num(-3.0), "-3");
        assert_eq!(num(0.000012), "1.200e-5");
        assert_eq!(num(0.01234), "0.01234");
    }
}
