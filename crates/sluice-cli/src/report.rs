//! Glue between a release and its report: the report's metadata, and the abnormal zones shaded on
//! the histograms, read from the threshold set the study named (only if the file still has the
//! hash recorded when the candidates were measured).

use anyhow::Result;
use sluice_aggregate::Provenance;
use sluice_disclose::{CheckedTable, Rules};
use sluice_report::{ReportMeta, ShadeZone};
use std::path::Path;

pub fn render(p: &Provenance, rules: &Rules, tables: &[CheckedTable]) -> Result<String> {
    let summary = format!(
        "at least {} distinct patients per cell; zeros {}; counts rounded to base {}, person-time to {} years; quantiles need {} observations beyond them; dominance ({}, {} %) and p% = {}; secondary suppression: {:?}; differencing: {} ({})",
        rules.threshold(),
        if rules.show_zeros() {
            "shown"
        } else {
            "withheld"
        },
        rules.rounding_base(),
        rules.person_time_base(),
        rules.quantile_min_beyond(),
        rules.dominance().n,
        rules.dominance().k,
        rules.p_percent(),
        rules.secondary(),
        rules.differencing().as_str(),
        rules.path().display(),
    );
    let meta = ReportMeta::from_provenance(p, &summary);
    Ok(sluice_report::render(&meta, tables, &zones(p)))
}

/// The first threshold set of the study, as shaded zones per analyte.
fn zones(p: &Provenance) -> Vec<ShadeZone> {
    let unchanged = |role: &str| {
        p.inputs.iter().find(|i| i.role == role).and_then(|i| {
            let bytes = std::fs::read(Path::new(&i.path)).ok()?;
            (sluice_aggregate::sha256_hex(&bytes) == i.sha256)
                .then(|| String::from_utf8(bytes).ok())?
        })
    };
    let (Some(study), Some(thresholds)) = (unchanged("study"), unchanged("thresholds")) else {
        return Vec::new();
    };
    let (Ok(study), Ok(thresholds)) = (
        study.parse::<toml::Table>(),
        thresholds.parse::<toml::Table>(),
    ) else {
        return Vec::new();
    };
    let Some(set) = study
        .get("thresholds")
        .and_then(|t| t.get("sets"))
        .and_then(|s| s.as_array())
        .and_then(|s| s.first())
        .and_then(|s| s.as_str())
    else {
        return Vec::new();
    };
    let Some(rules) = thresholds
        .get("sets")
        .and_then(|s| s.get(set))
        .and_then(|s| s.as_table())
    else {
        return Vec::new();
    };
    let num = |v: Option<&toml::Value>| {
        v.and_then(|x| x.as_float().or_else(|| x.as_integer().map(|i| i as f64)))
    };
    rules
        .iter()
        .filter_map(|(k, v)| {
            let t = v.as_table()?;
            let analyte = t
                .get("analyte")
                .and_then(|a| a.as_str())
                .unwrap_or(k)
                .to_string();
            Some(ShadeZone {
                analyte,
                below: num(t.get("below")),
                above: num(t.get("above")),
                label: format!("abnormal ({set} set, local policy)"),
            })
        })
        .collect()
}
