//! The pooled report: `sluice_report::render` plus a section of forest plots, one per pooled
//! estimate, inserted before the full tables (render has no hook for extra sections).

use sluice_aggregate::Provenance;
use sluice_disclose::{CheckedTable, Rules};
use sluice_report::{ForestOptions, ReportMeta, escape, forest_svg_with, render as render_report};
use std::fmt::Write as _;

use crate::counts::rounding_note;
use crate::estimates::Forest;

pub(crate) fn rules_summary(r: &Rules) -> String {
    format!(
        "threshold {} patients; zeros {}; counts rounded to {}; quantiles need {} observations \
         beyond; dominance ({}, {}); p% {}; secondary suppression {}",
        r.threshold(),
        if r.show_zeros() { "shown" } else { "withheld" },
        r.rounding_base(),
        r.quantile_min_beyond(),
        r.dominance().n,
        r.dominance().k,
        r.p_percent(),
        r.secondary().as_str()
    )
}

pub(crate) fn render(
    p: &Provenance,
    rules: &Rules,
    sites: &[String],
    base: u64,
    tables: &[CheckedTable],
    forests: &[Forest],
) -> String {
    let mut meta = ReportMeta::from_provenance(p, &rules_summary(rules));
    meta.pooled_sites = sites.to_vec();
    let html = render_report(&meta, tables, &[]);

    let mut s = String::new();
    s.push_str("<section id=\"pooling\">\n<h2>Pooling</h2>\n");
    let _ = writeln!(
        s,
        "<p class=\"note\">{}</p>",
        escape(&format!(
            "Pooled from the approved releases of {} sites ({}). Counts are sums of the sites' \
             released counts: {} Cells withheld at any site are withheld in the pool (table \
             pooled_withheld names the sites). Site means and quantiles are not pooled; \
             histogram quantiles are estimated from the pooled histograms by linear \
             interpolation. Estimates are pooled by inverse variance (fixed effect and \
             DerSimonian-Laird random effects, 95 % intervals).",
            sites.len(),
            sites.join(", "),
            rounding_note(sites.len(), base)
        ))
    );
    let _ = writeln!(s, "<h3>Forest plots ({})</h3>", forests.len());
    for (title, rows) in forests {
        let opts = ForestOptions {
            title: title.clone(),
            ..ForestOptions::default()
        };
        let _ = writeln!(s, "<figure>{}</figure>", forest_svg_with(rows, &opts));
    }
    s.push_str("</section>\n");

    let anchor = "<section id=\"tables\">";
    match html.find(anchor) {
        Some(i) => format!("{}{}{}", &html[..i], s, &html[i..]),
        None => html.replace("</body>", &format!("{s}</body>")),
    }
}
