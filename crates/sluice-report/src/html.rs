//! HTML pieces: escaping, the style sheet, the contents and the release description.

use crate::ReportMeta;
use crate::view::distinct;
use sluice_disclose::CheckedTable;
use std::fmt::Write as _;

/// Escapes text for HTML element content and quoted attribute values.
pub fn escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for ch in s.chars() {
        match ch {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

pub(crate) const CSS: &str = "\
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,Helvetica,Arial,sans-serif;margin:2em auto;max-width:70em;padding:0 1em;color:#1a1a1a;line-height:1.45}
h1{font-size:1.6em}h2{border-bottom:2px solid #ccc;padding-bottom:.2em;margin-top:2em}h3{margin-top:1.6em}
.cautions{border:2px solid #b35900;background:#fff4e5;padding:.5em 1.2em;border-radius:4px}
.cautions h2{border:none;margin-top:.3em;color:#8a4500}
.note{color:#444;font-size:.92em}
dl.meta{display:grid;grid-template-columns:max-content 1fr;gap:.2em 1em}dl.meta dt{font-weight:600}dl.meta dd{margin:0}
code,.hash{font-family:ui-monospace,Menlo,Consolas,monospace;font-size:.9em;word-break:break-all}
table{border-collapse:collapse;margin:.5em 0 1em;font-size:.88em}
th,td{border:1px solid #bbb;padding:.15em .5em;text-align:left;vertical-align:top}
th{background:#eee}td.n{text-align:right;font-variant-numeric:tabular-nums}
.scroll{overflow-x:auto}
td.withheld{background:#f2f2f2;color:#777;text-align:center}
td.status-withheld{background:#ffe0e0;font-weight:600;color:#8b0000}
td.status-merged{background:#e6f0ff;font-weight:600;color:#1f4e9a}
td.status-rounded{color:#555}
td.suppressed{background:#fafafa;color:#999;text-align:center}
tr.withheld-row td{border-color:#d9a0a0}
figure{margin:1.5em 0;border:1px solid #ddd;padding:.5em;border-radius:4px}
figure svg{max-width:100%;height:auto;display:block}
figcaption{font-size:.9em;color:#333;margin-top:.3em}
.flow{list-style:none;padding:0;margin:0}
.flow li{margin:0}
.step{display:flex;gap:1em;align-items:stretch}
.box{border:2px solid #4a6fa5;border-radius:4px;padding:.4em .8em;background:#f0f5fc;min-width:24em}
.excl{border:1px dashed #999;border-radius:4px;padding:.4em .8em;color:#444;background:#fafafa;align-self:center}
.arrow{padding-left:2em;color:#4a6fa5;font-size:1.2em}
.marker{font-weight:600}
nav ol{columns:2}
footer{margin-top:3em;color:#666;font-size:.85em;border-top:1px solid #ccc;padding-top:.5em}
";

pub(crate) fn contents(out: &mut String, tables: &[CheckedTable]) {
    out.push_str("<nav>\n<h2>Contents</h2>\n<ol>\n");
    out.push_str("<li><a href=\"#about\">About this release</a></li>\n");
    out.push_str("<li><a href=\"#disclosure\">Disclosure summary</a></li>\n");
    if tables.iter().any(|t| t.name() == "cohort_flow") {
        out.push_str("<li><a href=\"#flow\">Cohort flow</a></li>\n");
    }
    out.push_str("<li><a href=\"#charts\">Charts</a></li>\n");
    out.push_str("<li><a href=\"#tables\">Tables in full</a><ol>\n");
    for t in tables {
        let _ = writeln!(
            out,
            "<li><a href=\"#t-{}\">{}</a></li>",
            escape(t.name()),
            escape(t.title())
        );
    }
    out.push_str("</ol></li>\n</ol>\n</nav>\n");
}

pub(crate) fn about(out: &mut String, meta: &ReportMeta, tables: &[CheckedTable]) {
    out.push_str("<section id=\"about\">\n<h2>About this release</h2>\n<dl class=\"meta\">\n");
    let mut item = |k: &str, v: &str, class: &str| {
        let v = if v.is_empty() { "(not recorded)" } else { v };
        let _ = writeln!(out, "<dt>{}</dt><dd{}>{}</dd>", escape(k), class, escape(v));
    };
    item("Study", &meta.study, "");
    item("Title", &meta.title, "");
    item("Site", &meta.site, "");
    item("Tool version", &meta.tool_version, "");
    if let Some(c) = &meta.created {
        item("Created", c, "");
    }
    item("Key fingerprint", &meta.key_fingerprint, " class=\"hash\"");
    let rules_hash = if meta.rules_sha256.is_empty() {
        distinct(tables.iter().map(|t| t.rules_sha256().to_string())).join(", ")
    } else {
        meta.rules_sha256.clone()
    };
    item("Disclosure rules SHA-256", &rules_hash, " class=\"hash\"");
    item("Disclosure rules", &meta.rules_summary, "");
    if !meta.pooled_sites.is_empty() {
        item("Pooled sites", &meta.pooled_sites.join(", "), "");
    }
    out.push_str("</dl>\n");
    if !meta.created_from.is_empty() {
        out.push_str(
            "<h3>Made from</h3>\n<table>\n<thead><tr><th>role</th><th>path</th><th>SHA-256</th></tr></thead>\n<tbody>\n",
        );
        for h in &meta.created_from {
            let _ = writeln!(
                out,
                "<tr><td>{}</td><td><code>{}</code></td><td class=\"hash\">{}</td></tr>",
                escape(&h.role),
                escape(&h.path),
                escape(&h.sha256)
            );
        }
        out.push_str("</tbody>\n</table>\n");
    }
    out.push_str("</section>\n");
}
