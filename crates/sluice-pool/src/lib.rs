//! Pooling: several approved site releases of one study in, one pooled release out.
//!
//! [`pool`] verifies every input (it passes `sluice_release::check`, carries an approval of exactly
//! its current `manifest.json`, has this sluice's schema version), refuses inputs that are not the
//! same study (name and study-policy SHA-256), not controlled by the same disclosure rules, or
//! repeat a site, then builds pooled candidate tables from the released values only, puts each
//! through `sluice_disclose::control` with the caller's rules, renders a report with forest plots
//! and writes a release with `sluice_release::write_release`. The output is an ordinary release:
//! check, approve and export apply to it unchanged.
//!
//! # What is pooled, and how
//!
//! - **Count tables** (dimensions, `n_patients` and other counts): each pooled cell is the sum of
//!   the sites' released cells with the same dimension values. Site counts are rounded to the
//!   rounding base b, so a pooled sum over k sites is within ±k·b/2 of the true total (said in each
//!   table's description and in the report). Statistics, quantiles and magnitudes of a count table
//!   are dropped: means and quantiles do not add. Person-time is summed like a count, and a table
//!   with `n_events`, `person_years` and `rate_per_100py` gets pooled rates (pooled events over
//!   pooled person-time, with exact Poisson limits), computed at release from the pooled released
//!   sums like any derived cell. Site patients are assumed distinct (a patient belongs to one site).
//! - **Cells withheld at a site**: where any site withheld a cell (or lacks it), the pooled cell is
//!   withheld too. Disclosure control marks it `withheld` (the candidate carries a count
//!   below the threshold as the marker); which sites withheld it is recorded in the separate table
//!   `pooled_withheld` (`source_table`, `pooled_row` = row index in the pooled table, `withheld_at`
//!   = site labels joined by "+", `n_patients` = the sum at the sites that released it, a lower
//!   bound). A text column in the pooled table itself is not on the allow-list, hence the table.
//!   Secondary suppression is re-applied over the sites' constraints, mapped by dimension values.
//! - **Estimates** (rows with `estimate` and `se`): pooled by inverse variance over the sites that
//!   released the row, if at least 2 did (fixed effect, DerSimonian–Laird random effects, Q, I² as a
//!   proportion, τ²), into `pooled_estimates`; the site rows go to `site_estimates` (dimension
//!   `site`) for forest plots. A statistic `X` is skipped where the table also has `log_X` (a ratio
//!   is pooled on the log scale only, e.g. `log_rate_ratio`).
//! - **Histograms** (dimensions `bin_lower`, `bin_upper`): pooled bin by bin. A site's merged bin
//!   spanning several bins of another site merges those pooled bins into the union span, so every
//!   pooled bin is a union of whole site bins and its count is exact (up to rounding). A group with
//!   a withheld bin at any site is withheld whole. From each pooled histogram, quantiles are
//!   estimated by linear interpolation within bins (table `histogram_quantiles`, statistic
//!   `quantile_from_pooled_histogram`; a quantile falling in an open tail bin is null), with the
//!   patients of a group taken as the sum over sites of each site's largest bin (a lower bound).

#![forbid(unsafe_code)]

mod counts;
mod estimates;
mod histograms;
mod report;
mod site;

pub use estimates::{EstimateInput, PooledRow, pool_rows};

use sluice_aggregate::{Input, Provenance, Table, sha256_hex};
use sluice_disclose::{CheckedTable, Rules, control};
use sluice_release::{CheckPolicy, ReleaseManifest, Verdict, check, write_release};
use std::path::{Path, PathBuf};

use site::Site;

#[derive(Debug, thiserror::Error)]
pub enum PoolError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("pooling needs at least 2 site releases, got {0}")]
    TooFew(usize),
    #[error(
        "site {site} ({path}): release schema version {found} is newer than version {supported}, the newest this sluice pools; upgrade sluice to pool it"
    )]
    NewerSchema {
        site: String,
        path: PathBuf,
        found: u64,
        supported: u32,
    },
    #[error("site {site} ({path}): refused: {message}")]
    Refused {
        site: String,
        path: PathBuf,
        message: String,
    },
    #[error(
        "site {} ({}): {} is {} but site {} has {}; only releases of the same study under the same rules can be pooled",
        .0.site, .0.path.display(), .0.what, .0.found, .0.first_site, .0.expected
    )]
    Mismatch(Box<Mismatch>),
    #[error("site {site} appears twice: {first} and {second}; each site may be pooled once")]
    DuplicateSite {
        site: String,
        first: PathBuf,
        second: PathBuf,
    },
    #[error("rules {path}: {message}")]
    Rules { path: PathBuf, message: String },
    #[error("table {table}: {message}")]
    Table { table: String, message: String },
    #[error(transparent)]
    Disclose(#[from] sluice_disclose::DiscloseError),
    #[error(transparent)]
    Release(#[from] sluice_release::ReleaseError),
}

/// Two site releases that disagree on what must be the same.
#[derive(Debug)]
pub struct Mismatch {
    pub site: String,
    pub path: PathBuf,
    pub what: &'static str,
    pub found: String,
    pub first_site: String,
    pub expected: String,
}

/// What [`pool`] made.
#[derive(Clone, Debug)]
pub struct PoolReport {
    pub out: PathBuf,
    /// Site labels, in input order.
    pub sites: Vec<String>,
    pub manifest: ReleaseManifest,
    /// Pooled tables: name, rows, withheld rows.
    pub tables: Vec<(String, usize, usize)>,
    /// Pooled estimate rows (≥ 2 sites).
    pub pooled_estimates: usize,
    /// `sluice_release::check` of the pooled release.
    pub verdict: Verdict,
}

/// The pooling marker: a count below every threshold ≥ 2, so control withholds the cell.
pub(crate) const MARKER: i64 = 1;

/// Pools the approved site releases `inputs` into a new release at `out` (absent or empty). See
/// the crate documentation for the method.
pub fn pool(
    inputs: &[PathBuf],
    out: &Path,
    rules: &Rules,
    policy: &CheckPolicy,
) -> Result<PoolReport, PoolError> {
    if inputs.len() < 2 {
        return Err(PoolError::TooFew(inputs.len()));
    }
    if rules.threshold() <= MARKER as u64 {
        return Err(PoolError::Rules {
            path: rules.path().to_path_buf(),
            message: format!(
                "threshold {} cannot withhold a pooled cell that a site withheld; it must be at least 2",
                rules.threshold()
            ),
        });
    }
    let mut sites: Vec<Site> = Vec::new();
    for p in inputs {
        let s = site::load(p, policy)?;
        if let Some(first) = sites.first() {
            agree(first, &s)?;
        }
        if let Some(prev) = sites.iter().find(|x| x.label == s.label) {
            return Err(PoolError::DuplicateSite {
                site: s.label.clone(),
                first: prev.path.clone(),
                second: s.path.clone(),
            });
        }
        sites.push(s);
    }
    let first = &sites[0];
    let labels: Vec<String> = sites.iter().map(|s| s.label.clone()).collect();
    let provenance = provenance(&sites);
    let base = first_base(first);

    let mut candidates: Vec<Table> = Vec::new();
    let mut withheld = counts::WithheldLog::default();
    let mut est = estimates::Collected::default();
    for t in &first.tables {
        let per_site: Vec<Option<&site::SiteTable>> =
            sites.iter().map(|s| s.table(&t.name)).collect();
        if estimates::is_estimate_table(t) {
            est.add(&sites, t, &per_site);
        } else if histograms::is_histogram(t) {
            let (h, q) = histograms::pool(&labels, t, &per_site, base, &mut withheld)?;
            // An empty histogram has no typed bin edges to write; leave it out.
            if !h.rows.is_empty() {
                candidates.push(h);
                candidates.extend(q);
            }
        } else {
            candidates.push(counts::pool(&labels, t, &per_site, base, &mut withheld)?);
        }
    }
    let (pooled, site_rows, forest) = est.build(&labels)?;
    let n_pooled = pooled.rows.len();
    candidates.push(pooled);
    candidates.push(site_rows);
    let withheld = withheld.table(&labels);
    // Left out when no cell was withheld at a site (an empty table has no typed pooled_row).
    if !withheld.rows.is_empty() {
        candidates.push(withheld);
    }

    let mut checked: Vec<CheckedTable> = Vec::new();
    for c in &candidates {
        checked.push(control(c, rules)?);
    }
    let html = report::render(&provenance, rules, &labels, base, &checked, &forest);
    let manifest = write_release(
        out,
        &provenance,
        rules,
        &checked,
        &[("report.html".to_string(), html.into_bytes())],
    )?;
    let verdict = check(out, policy);
    Ok(PoolReport {
        out: out.to_path_buf(),
        sites: labels,
        manifest,
        tables: checked
            .iter()
            .map(|t| (t.name().to_string(), t.rows().len(), t.withheld()))
            .collect(),
        pooled_estimates: n_pooled,
        verdict,
    })
}

/// The rounding base the sites' counts were rounded to (from their recorded rules).
fn first_base(s: &Site) -> u64 {
    let r = &s.manifest.disclosure_rules;
    Rules::parse(&r.content, Path::new(&r.path))
        .map(|r| r.rounding_base())
        .unwrap_or(0)
}

fn agree(first: &Site, s: &Site) -> Result<(), PoolError> {
    let mismatch = |what: &'static str, found: &str, expected: &str| {
        PoolError::Mismatch(Box::new(Mismatch {
            site: s.label.clone(),
            path: s.path.clone(),
            what,
            found: found.to_string(),
            first_site: first.label.clone(),
            expected: expected.to_string(),
        }))
    };
    if s.manifest.study != first.manifest.study {
        return Err(mismatch(
            "the study",
            &s.manifest.study,
            &first.manifest.study,
        ));
    }
    let none = "(no study input)";
    let (a, b) = (
        s.study_policy_sha256().unwrap_or(none),
        first.study_policy_sha256().unwrap_or(none),
    );
    if a != b || a == none {
        return Err(mismatch("the study policy sha256", a, b));
    }
    let (a, b) = (
        &s.manifest.disclosure_rules.sha256,
        &first.manifest.disclosure_rules.sha256,
    );
    if a != b {
        return Err(mismatch("the disclosure rules sha256", a, b));
    }
    Ok(())
}

fn provenance(sites: &[Site]) -> Provenance {
    let first = &sites[0].manifest;
    let labels: Vec<&str> = sites.iter().map(|s| s.label.as_str()).collect();
    let hashes: Vec<&str> = sites.iter().map(|s| s.manifest_sha256.as_str()).collect();
    let mut inputs: Vec<Input> = first
        .inputs
        .iter()
        .filter(|i| i.role == "study")
        .cloned()
        .collect();
    inputs.extend(sites.iter().map(|s| Input {
        role: format!("site_release:{}", s.label),
        path: s.path.join(sluice_release::MANIFEST).display().to_string(),
        sha256: s.manifest_sha256.clone(),
    }));
    Provenance {
        study: first.study.clone(),
        study_title: first.study_title.clone(),
        site: format!("pooled:{}", labels.join("+")),
        key_fingerprint: sites
            .iter()
            .map(|s| s.manifest.key_fingerprint.as_str())
            .collect::<Vec<_>>()
            .join("+"),
        // SHA-256 of the sites' manifest SHA-256s, one per line in input order.
        store_manifest_sha256: sha256_hex(hashes.join("\n").as_bytes()),
        store_generation: 0,
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        inputs,
        made_by: String::new(),
    }
}

/// Key of a row: its values in `cols`, as JSON joined by a unit separator.
pub(crate) fn key(row: &[sluice_aggregate::Value], cols: &[usize]) -> String {
    cols.iter()
        .map(|&c| serde_json::to_string(&row[c]).unwrap_or_default())
        .collect::<Vec<_>>()
        .join("\u{1f}")
}

/// Site labels joined by "+", shortened to fit a released text value.
pub(crate) fn site_list(sites: &[&str], all: usize) -> String {
    let s = sites.join("+");
    if s.chars().count() <= 64 {
        s
    } else {
        format!("{} of {all} sites", sites.len())
    }
}
