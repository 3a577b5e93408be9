//! The release report: one self-contained HTML file for the information-governance (IG) officer
//! and the analyst, made only from tables that have been through disclosure control
//! ([`sluice_disclose::CheckedTable`]).
//!
//! [`render`] writes, in this order: the cautions; what the release is (study, site, tool
//! version, rules, key fingerprint, the hashes it was made from, pooled sites); a disclosure
//! summary per table; the cohort flow; the charts; and every table in full, each withheld row
//! marked with its rule and each withheld value shown as "—".
//!
//! The file has inline CSS and inline SVG only: no script, no external style sheet, font or
//! image, no link off the page (the one URL in it is the SVG namespace `xmlns`, which is a name,
//! not a fetch). All text from tables and metadata is HTML-escaped. Output is deterministic: the
//! same inputs give the same bytes (no clock is read; a date appears only if the caller passes
//! one in [`ReportMeta::created`]).
//!
//! # Charts
//!
//! Charts are drawn with `plotters` (SVG backend only, no font crates: the SVG backend writes
//! `<text>` elements and leaves glyphs to the viewer; label widths are estimated). Every chart is
//! drawn from released values only; a withheld value is never plotted, and a chart whose table is
//! missing, or whose values are all withheld, is left out with a note saying so. See
//! [`charts`] for what is drawn from which table, and [`forest_svg`] for the forest plot that
//! pooled (meta-analysis) output can use as well.

#![forbid(unsafe_code)]

pub mod charts;
mod forest;
mod html;
mod tables;
mod view;

pub use forest::{ForestKind, ForestOptions, ForestRow, forest_svg, forest_svg_with};
pub use html::escape;

use sluice_disclose::CheckedTable;
use std::fmt::Write as _;

/// The version of this crate, for the report's footer.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

/// A file or object the release was made from, with its SHA-256.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct SourceHash {
    /// What it is, e.g. "study policy", "store manifest", "disclosure rules".
    pub role: String,
    /// Where it was (a path inside the secure area, as recorded; no content).
    pub path: String,
    pub sha256: String,
}

/// What the report says about the release it describes.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct ReportMeta {
    /// Study identifier, e.g. `mtx_monitoring`.
    pub study: String,
    /// Human title of the study.
    pub title: String,
    /// Site (or, for a pooled release, the pooling centre).
    pub site: String,
    /// Version of sluice that made the release.
    pub tool_version: String,
    /// The disclosure rules in words (threshold, rounding, quantile rule, dominance, p%, ...).
    pub rules_summary: String,
    /// SHA-256 of the rules text; empty to take it from the tables.
    pub rules_sha256: String,
    /// Fingerprint of the pseudonymisation key (never the key).
    pub key_fingerprint: String,
    /// Everything the release was made from, with hashes.
    pub created_from: Vec<SourceHash>,
    /// For a pooled release: the sites pooled. Empty for a single-site release.
    pub pooled_sites: Vec<String>,
    /// A creation date to print, if the caller wants one (never read from the clock here).
    pub created: Option<String>,
}

impl ReportMeta {
    /// Metadata from the candidates' provenance; `rules_summary` describes the rules used.
    pub fn from_provenance(p: &sluice_aggregate::Provenance, rules_summary: &str) -> Self {
        let mut created_from = vec![SourceHash {
            role: format!("store manifest (generation {})", p.store_generation),
            path: String::new(),
            sha256: p.store_manifest_sha256.clone(),
        }];
        created_from.extend(p.inputs.iter().map(|i| SourceHash {
            role: i.role.clone(),
            path: i.path.clone(),
            sha256: i.sha256.clone(),
        }));
        ReportMeta {
            study: p.study.clone(),
            title: p.study_title.clone(),
            site: p.site.clone(),
            tool_version: p.tool_version.clone(),
            rules_summary: rules_summary.to_string(),
            rules_sha256: String::new(),
            key_fingerprint: p.key_fingerprint.clone(),
            created_from,
            pooled_sites: Vec::new(),
            created: None,
        }
    }
}

/// A range of an analyte's values to shade as abnormal on its histograms: values below `below`
/// or above `above` (either may be absent). Thresholds come from the caller (local policy), never
/// from this crate.
#[derive(Clone, Debug, PartialEq)]
pub struct ShadeZone {
    /// Analyte id as it appears in the tables' `analyte` column.
    pub analyte: String,
    pub below: Option<f64>,
    pub above: Option<f64>,
    /// Shown in the legend, e.g. "abnormal (local policy)".
    pub label: String,
}

/// The cautions printed at the top of every report.
pub const CAUTIONS: [&str; 4] = [
    "A statistical summary is not clinical advice. It describes groups of patients, not any one \
     patient, and must not be used to make decisions about an individual's care.",
    "Every release needs the approval of your local information-governance officer before it \
     leaves the secure environment; the checks shown here support that review, they do not \
     replace it.",
    "Clinical thresholds (abnormal and critical limits, monitoring schedules and the shaded zones \
     of the charts) follow local policy; the values used are examples, not recommendations.",
    "Everything shown here is released aggregates only: the tables below, after disclosure \
     control, and charts drawn from them. No patient-level data is in this file.",
];

/// What disclosure control closes and what it cannot see, in plain words for the IG officer.
pub const CHANNELS_CLOSED: [&str; 6] = [
    "Small cells: a count of fewer patients than the threshold, or of none, is withheld; every \
     released count is rounded to the rounding base, and a withheld row says only \"withheld\", \
     never why.",
    "Subtraction: where a total and its parts are released, at least two cells with patients \
     are withheld in any relation that has one withheld (a withheld zero does not count).",
    "Statistics that give counts back: rates, shares, confidence limits, standard errors and test \
     statistics that are functions of counts are computed from the released, rounded counts, \
     and withheld with them; person-time is rounded; t intervals use the rounded n; means and \
     quantiles are released only as finely as keeps every count the rounding allows possible.",
    "Fixed categories: tables of combinations list every combination, occurring or not, so a \
     row's presence says nothing.",
    "Near-identical releases: a release whose cohort or a subgroup differs from one released \
     before from the same store by fewer patients than the threshold has those rows withheld \
     (or is refused), as recorded in the store's release ledger.",
    "The independent check re-derives the counts each statistic implies and fails any release \
     where they are not released counts.",
];

/// What stays open: the reviewer must judge these.
pub const CHANNELS_OPEN: [&str; 4] = [
    "Releases made with other tools, from another store, or before the ledger existed; and \
     what an outsider already knows about particular patients.",
    "Bounds: rounding and suppression hide exact values, but a withheld cell can still be \
     bounded between values (for two withheld cells, their sum to within the rounding).",
    "Differences between cells over narrower sets than a cohort or subgroup (a window, an \
     analyte) in two releases whose cohorts are the same.",
    "Rank-based intervals and bootstrap intervals are released as computed; they do not invert \
     to counts by a formula, but they are not rounded.",
];

/// The whole report as one HTML document.
pub fn render(meta: &ReportMeta, tables: &[CheckedTable], zones: &[ShadeZone]) -> String {
    let mut out = String::with_capacity(64 * 1024);
    let title = if meta.title.is_empty() {
        format!("Release report: {}", meta.study)
    } else {
        format!("Release report: {}", meta.title)
    };
    out.push_str("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n");
    out.push_str("<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n");
    let _ = writeln!(out, "<title>{}</title>", escape(&title));
    out.push_str("<style>\n");
    out.push_str(html::CSS);
    out.push_str("</style>\n</head>\n<body>\n");
    let _ = writeln!(out, "<h1>{}</h1>", escape(&title));

    out.push_str("<section class=\"cautions\" id=\"cautions\">\n<h2>Cautions</h2>\n<ul>\n");
    for c in CAUTIONS {
        let _ = writeln!(out, "<li>{}</li>", escape(c));
    }
    out.push_str("</ul>\n</section>\n");

    html::contents(&mut out, tables);
    html::about(&mut out, meta, tables);
    tables::summary(&mut out, tables);
    out.push_str("<section id=\"channels\">\n<h2>What disclosure control protects against</h2>\n<p>Closed:</p>\n<ul>\n");
    for c in CHANNELS_CLOSED {
        let _ = writeln!(out, "<li>{}</li>", escape(c));
    }
    out.push_str("</ul>\n<p>Not closed, for the reviewer to judge:</p>\n<ul>\n");
    for c in CHANNELS_OPEN {
        let _ = writeln!(out, "<li>{}</li>", escape(c));
    }
    out.push_str("</ul>\n</section>\n");
    if let Some(flow) = tables.iter().find(|t| t.name() == "cohort_flow") {
        tables::cohort_flow(&mut out, flow);
    }
    out.push_str("<section id=\"charts\">\n<h2>Charts</h2>\n");
    out.push_str(
        "<p class=\"note\">Every chart is drawn from the released tables below and nothing else. \
         Withheld values are not plotted; a chart whose table is absent or entirely withheld is \
         left out.</p>\n",
    );
    for fig in charts::all(tables, zones) {
        fig.write(&mut out);
    }
    out.push_str("</section>\n");

    out.push_str("<section id=\"tables\">\n<h2>Tables in full</h2>\n");
    for t in tables {
        tables::full(&mut out, t);
    }
    out.push_str("</section>\n");
    let _ = writeln!(
        out,
        "<footer>Made by sluice-report {} from released tables only.</footer>\n</body>\n</html>",
        escape(VERSION)
    );
    out
}
