//! Tables as HTML: the disclosure summary, the cohort flow and every table in full.

use crate::html::escape;
use crate::view::{View, show};
use sluice_aggregate::Role;
use sluice_disclose::{CheckedTable, Status};
use std::collections::BTreeMap;
use std::fmt::Write as _;

/// The marker for a withheld value.
pub(crate) const DASH: &str = "—";

/// Why a row or value was withheld, as the report names it. Too few patients and no patients
/// are one reason here: counting the empty cells of a table apart would say which withheld cells
/// are zero.
fn reason(rule: &str) -> &str {
    match rule {
        "threshold" | "zero" => "small or empty",
        r => r,
    }
}

/// Per table: rows released, merged and withheld (by reason), and single values withheld in
/// released rows (by reason).
pub(crate) fn summary(out: &mut String, tables: &[CheckedTable]) {
    out.push_str("<section id=\"disclosure\">\n<h2>Disclosure summary</h2>\n");
    out.push_str(
        "<p class=\"note\">Rows of each released table by what disclosure control did with them. \
         Every withheld row carries the same status, <code>withheld</code>, whatever the reason, and \
         its values other than its dimensions are null; the reasons are counted here for the \
         reviewer (small or empty: fewer patients than the threshold, or none; secondary: withheld \
         so that another withheld cell cannot be recovered by subtraction; histogram: the whole \
         histogram has too few patients; differencing: the row's population differs from one \
         released before from the same store by fewer patients than the threshold). Values withheld \
         inside released rows: derived (a statistic computed from a withheld count), quantile (too \
         few observations beyond it), dominance (one or two patients make up most of a total). \
         Merged rows are histogram bins released together. Released counts are rounded; which ones \
         changed is not said.</p>\n",
    );
    out.push_str(
        "<table>\n<thead><tr><th>table</th><th>rows</th><th>released</th><th>merged</th><th>withheld</th><th>withheld rows by reason</th><th>values withheld in released rows</th></tr></thead>\n<tbody>\n",
    );
    for t in tables {
        let (mut released, mut merged) = (0usize, 0usize);
        let mut rules: BTreeMap<&str, usize> = BTreeMap::new();
        for s in t.status() {
            match s {
                Status::Released | Status::Rounded => released += 1,
                Status::Merged => merged += 1,
                Status::Withheld { rule } => *rules.entry(reason(rule)).or_default() += 1,
            }
        }
        let mut cells: BTreeMap<&str, usize> = BTreeMap::new();
        for n in t.notes() {
            *cells.entry(reason(&n.reason)).or_default() += 1;
        }
        let list = |m: &BTreeMap<&str, usize>| {
            m.iter()
                .map(|(r, n)| format!("{r}: {n}"))
                .collect::<Vec<_>>()
                .join(", ")
        };
        let _ = writeln!(
            out,
            "<tr><td><a href=\"#t-{}\">{}</a></td><td class=\"n\">{}</td><td class=\"n\">{released}</td><td class=\"n\">{merged}</td><td class=\"n\">{}</td><td>{}</td><td>{}</td></tr>",
            escape(t.name()),
            escape(t.name()),
            t.rows().len(),
            t.withheld(),
            escape(&list(&rules)),
            escape(&list(&cells))
        );
    }
    out.push_str("</tbody>\n</table>\n</section>\n");
}

/// The cohort flow as a diagram of boxes: each step's rule and patients remaining, with the
/// patients excluded at the step beside it.
pub(crate) fn cohort_flow(out: &mut String, t: &CheckedTable) {
    let v = View::new(t);
    out.push_str("<section id=\"flow\">\n<h2>Cohort flow</h2>\n");
    let (Some(step), Some(rule), Some(outcome), Some(n)) = (
        v.col("step"),
        v.col("rule"),
        v.col("outcome"),
        v.col(sluice_disclose::PATIENTS),
    ) else {
        out.push_str("<p class=\"note\">The cohort_flow table does not have the columns step, rule, outcome and n_patients; see the table in full below.</p>\n</section>\n");
        return;
    };
    let count = |r: usize| -> String {
        match v.num(r, n) {
            Some(x) => format!("{} patients", crate::view::num(x)),
            None => match &t.status()[r] {
                Status::Withheld { .. } => format!("{DASH} (withheld)"),
                _ => DASH.to_string(),
            },
        }
    };
    let steps = crate::view::distinct((0..v.n()).map(|r| v.text(r, step)));
    out.push_str("<ol class=\"flow\">\n");
    for (i, s) in steps.iter().enumerate() {
        let rows: Vec<usize> = (0..v.n()).filter(|&r| &v.text(r, step) == s).collect();
        let find = |o: &str| rows.iter().copied().find(|&r| v.text(r, outcome) == o);
        let text = rows.first().map(|&r| v.text(r, rule)).unwrap_or_default();
        if i > 0 {
            out.push_str("<li class=\"arrow\" aria-hidden=\"true\">↓</li>\n");
        }
        let _ = write!(
            out,
            "<li class=\"step\"><div class=\"box\"><span class=\"marker\">Step {}</span>: {}<br><strong>{}</strong> remaining</div>",
            escape(s),
            escape(&text),
            escape(&find("remaining").map(count).unwrap_or_else(|| DASH.into()))
        );
        if let Some(r) = find("excluded") {
            let _ = write!(
                out,
                "<div class=\"excl\">excluded: {}</div>",
                escape(&count(r))
            );
        }
        out.push_str("</li>\n");
    }
    out.push_str("</ol>\n</section>\n");
}

fn is_numeric(role: &Role) -> bool {
    !matches!(role, Role::Dimension)
}

/// One table in full, with a `disclosure` column naming what happened to each row.
pub(crate) fn full(out: &mut String, t: &CheckedTable) {
    let _ = writeln!(
        out,
        "<h3 id=\"t-{}\">{} <code>{}</code></h3>",
        escape(t.name()),
        escape(t.title()),
        escape(t.name())
    );
    if !t.description().is_empty() {
        let _ = writeln!(out, "<p>{}</p>", escape(t.description()));
    }
    let hist = t.column("bin_lower").is_some() && t.column("bin_upper").is_some();
    out.push_str("<div class=\"scroll\"><table>\n<thead><tr>");
    for c in t.columns() {
        let _ = write!(
            out,
            "<th title=\"{}\">{}</th>",
            escape(&c.description),
            escape(&c.name)
        );
    }
    out.push_str("<th>disclosure</th></tr></thead>\n<tbody>\n");
    for (r, row) in t.rows().iter().enumerate() {
        let status = &t.status()[r];
        let withheld = status.is_withheld();
        if withheld {
            out.push_str("<tr class=\"withheld-row\">");
        } else {
            out.push_str("<tr>");
        }
        for (c, col) in t.columns().iter().enumerate() {
            let v = &row[c];
            if col.role == Role::Dimension {
                let s = match v {
                    sluice_aggregate::Value::Null if hist && col.name == "bin_lower" => {
                        "(open: below)".to_string()
                    }
                    sluice_aggregate::Value::Null if hist && col.name == "bin_upper" => {
                        "(open: above)".to_string()
                    }
                    v => show(v),
                };
                let class = if v.as_f64().is_some() {
                    " class=\"n\""
                } else {
                    ""
                };
                let _ = write!(out, "<td{class}>{}</td>", escape(&s));
            } else if withheld {
                let _ = write!(
                    out,
                    "<td class=\"withheld\" title=\"withheld ({})\">{DASH}</td>",
                    escape(&status.label())
                );
            } else if matches!(v, sluice_aggregate::Value::Null) {
                let _ = write!(
                    out,
                    "<td class=\"suppressed\" title=\"not released: too few patients or observations for this statistic, or not computable\">{DASH}</td>"
                );
            } else {
                let class = if is_numeric(&col.role) {
                    " class=\"n\""
                } else {
                    ""
                };
                let _ = write!(out, "<td{class}>{}</td>", escape(&show(v)));
            }
        }
        let (class, text) = match status {
            Status::Withheld { .. } => ("status-withheld", format!("⛔ {}", status.label())),
            Status::Merged => ("status-merged", "merged bins".to_string()),
            Status::Rounded | Status::Released => ("status-released", status.label()),
        };
        let _ = writeln!(
            out,
            "<td class=\"{class}\" data-status=\"{}\">{}</td></tr>",
            escape(&status.label()),
            escape(&text)
        );
    }
    out.push_str("</tbody>\n</table></div>\n");
    let described: Vec<_> = t
        .columns()
        .iter()
        .filter(|c| !c.description.is_empty())
        .collect();
    if !described.is_empty() {
        out.push_str("<details><summary>Columns</summary><dl class=\"meta\">\n");
        for c in described {
            let _ = writeln!(
                out,
                "<dt><code>{}</code></dt><dd>{}</dd>",
                escape(&c.name),
                escape(&c.description)
            );
        }
        out.push_str("</dl></details>\n");
    }
}
