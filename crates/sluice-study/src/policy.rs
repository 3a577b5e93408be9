//! The study policy file (`policies/studies/*.toml`) and the reference tables it names: parsed,
//! then validated against each other so that a mistake is reported with the key that holds it
//! before any data is read.

use chrono::{Datelike, Months, NaiveDate};
use serde::Deserialize;
use sluice_policy::{PolicyError, PolicyText};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct Raw {
    study: RawStudy,
    #[serde(default)]
    window: Vec<RawWindow>,
    cohort: Option<RawCohort>,
    intervals: Option<RawIntervals>,
    #[serde(default)]
    subgroup: Vec<RawSubgroup>,
    #[serde(default)]
    analyte: Vec<RawAnalyte>,
    thresholds: Option<RawThresholds>,
    distributions: Option<RawDistributions>,
    worst: Option<RawWorst>,
    critical: Option<RawCritical>,
    travel: Option<RawTravel>,
    flags: Option<RawFlags>,
    bootstrap: Option<RawBootstrap>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawStudy {
    name: String,
    title: String,
    #[serde(default)]
    description: String,
    #[serde(default)]
    compare: Vec<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawWindow {
    name: String,
    from: String,
    to: String,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCohort {
    marker_tag: String,
    #[serde(default)]
    drug_tags: Vec<String>,
    #[serde(default)]
    exclude_tags: Vec<String>,
    #[serde(default)]
    exclude_lookback_months: u32,
    #[serde(default)]
    stable_months: u32,
    #[serde(default)]
    min_events_per_window: u32,
    evidence_in_last_months: Option<u32>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawIntervals {
    band_statistic: String,
    bands: Vec<RawBand>,
    #[serde(default = "default_quantiles")]
    quantiles: Vec<f64>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawBand {
    name: String,
    max_days: Option<f64>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSubgroup {
    name: String,
    before: Vec<String>,
    after: Vec<String>,
    #[serde(default)]
    same_band: bool,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawAnalyte {
    id: String,
    worse: String,
    bins: RawBins,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawBins {
    start: f64,
    width: f64,
    count: u32,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawThresholds {
    file: String,
    sets: Vec<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawDistributions {
    by: Vec<String>,
    #[serde(default)]
    events_only: bool,
    #[serde(default = "default_quantiles")]
    quantiles: Vec<f64>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawWorst {
    #[serde(default = "yes")]
    events_only: bool,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCritical {
    limits: String,
    #[serde(default)]
    analytes: Option<Vec<String>>,
    by: Vec<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawTravel {
    circuity: f64,
    kg_co2e_per_mile: f64,
    window: String,
    scenario: String,
    scenario_tests_per_year: f64,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawFlags {
    age_bands: Vec<u32>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawBootstrap {
    seed: u64,
    replicates: usize,
    level: f64,
}

fn default_quantiles() -> Vec<f64> {
    vec![0.05, 0.25, 0.5, 0.75, 0.95]
}
fn yes() -> bool {
    true
}

/// A window [from, to) in days since 1970-01-01.
#[derive(Clone, Debug)]
pub struct Window {
    pub name: String,
    pub from: NaiveDate,
    pub to: NaiveDate,
    pub from_day: i64,
    pub to_day: i64,
}

impl Window {
    pub fn days(&self) -> i64 {
        self.to_day - self.from_day
    }
    pub fn years(&self) -> f64 {
        self.days() as f64 / 365.25
    }
}

#[derive(Clone, Debug)]
pub struct Cohort {
    pub marker_tag: String,
    pub drug_tags: Vec<String>,
    pub exclude_tags: Vec<String>,
    /// First day of the exclusion look-back.
    pub exclude_from_day: i64,
    pub exclude_lookback_months: u32,
    /// Day on or before which the first event must fall to be stable.
    pub stable_by_day: i64,
    pub stable_months: u32,
    pub min_events_per_window: u32,
    /// (months, first day of the evidence period).
    pub evidence_in_last: Option<(u32, i64)>,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum BandStatistic {
    Mean,
    Median,
}

#[derive(Clone, Debug)]
pub struct Band {
    pub name: String,
    pub max_days: Option<f64>,
}

#[derive(Clone, Debug)]
pub struct Intervals {
    pub statistic: BandStatistic,
    pub bands: Vec<Band>,
    pub quantiles: Vec<f64>,
}

impl Intervals {
    pub fn band(&self, days: f64) -> &str {
        for b in &self.bands {
            match b.max_days {
                Some(m) if days <= m => return &b.name,
                None => return &b.name,
                _ => {}
            }
        }
        &self.bands[self.bands.len() - 1].name
    }
}

#[derive(Clone, Debug)]
pub struct Subgroup {
    pub name: String,
    pub before: Vec<String>,
    pub after: Vec<String>,
    pub same_band: bool,
}

impl Subgroup {
    pub fn contains(&self, before: &str, after: &str) -> bool {
        self.before.iter().any(|b| b == before)
            && self.after.iter().any(|a| a == after)
            && (!self.same_band || before == after)
    }
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Worse {
    Higher,
    Lower,
}

#[derive(Clone, Debug)]
pub struct Bins {
    pub start: f64,
    pub width: f64,
    pub count: u32,
}

impl Bins {
    /// Bin index 0 is the open lower tail, `count + 1` the open upper tail.
    pub fn index(&self, v: f64) -> usize {
        if v < self.start {
            return 0;
        }
        let i = ((v - self.start) / self.width).floor() as i64;
        if i >= i64::from(self.count) {
            self.count as usize + 1
        } else {
            i as usize + 1
        }
    }
    pub fn len(&self) -> usize {
        self.count as usize + 2
    }
    pub fn is_empty(&self) -> bool {
        false
    }
    /// Edges of bin `i`; `None` for an open side.
    pub fn edges(&self, i: usize) -> (Option<f64>, Option<f64>) {
        let edge = |k: usize| self.start + self.width * k as f64;
        if i == 0 {
            (None, Some(self.start))
        } else if i > self.count as usize {
            (Some(edge(self.count as usize)), None)
        } else {
            (Some(edge(i - 1)), Some(edge(i)))
        }
    }
}

#[derive(Clone, Debug)]
pub struct StudyAnalyte {
    pub id: String,
    pub worse: Worse,
    pub bins: Bins,
}

/// One rule of a threshold set: abnormal below and/or above.
#[derive(Clone, Debug)]
pub struct Threshold {
    pub analyte: String,
    pub below: Option<f64>,
    pub above: Option<f64>,
    pub source: String,
}

impl Threshold {
    pub fn abnormal(&self, v: f64) -> bool {
        self.below.is_some_and(|b| v < b) || self.above.is_some_and(|a| v > a)
    }
}

#[derive(Clone, Debug)]
pub struct ThresholdSet {
    pub name: String,
    pub title: String,
    /// By analyte id.
    pub rules: BTreeMap<String, Threshold>,
}

#[derive(Clone, Debug)]
pub struct CriticalLimit {
    pub low: Option<f64>,
    pub high: Option<f64>,
    pub strict: bool,
    pub source: String,
}

impl CriticalLimit {
    pub fn critical(&self, v: f64) -> bool {
        if self.strict {
            self.low.is_some_and(|l| v < l) || self.high.is_some_and(|h| v > h)
        } else {
            self.low.is_some_and(|l| v <= l) || self.high.is_some_and(|h| v >= h)
        }
    }
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord)]
pub enum Dim {
    Window,
    Month,
    Setting,
    Subgroup,
    Sex,
    AgeBand,
}

impl Dim {
    pub fn name(self) -> &'static str {
        match self {
            Dim::Window => "window",
            Dim::Month => "month",
            Dim::Setting => "setting",
            Dim::Subgroup => "subgroup",
            Dim::Sex => "sex",
            Dim::AgeBand => "age_band",
        }
    }
    fn parse(s: &str) -> Option<Dim> {
        Some(match s {
            "window" => Dim::Window,
            "month" => Dim::Month,
            "setting" => Dim::Setting,
            "subgroup" => Dim::Subgroup,
            "sex" => Dim::Sex,
            "age_band" => Dim::AgeBand,
            _ => return None,
        })
    }
}

#[derive(Clone, Debug)]
pub struct Distributions {
    pub by: Vec<Dim>,
    pub events_only: bool,
    pub quantiles: Vec<f64>,
}

#[derive(Clone, Debug)]
pub struct Critical {
    pub limits: BTreeMap<String, CriticalLimit>,
    pub by: Vec<Dim>,
}

#[derive(Clone, Debug)]
pub struct Travel {
    pub circuity: f64,
    pub kg_co2e_per_mile: f64,
    pub window: usize,
    pub scenario: String,
    pub scenario_tests_per_year: f64,
}

#[derive(Clone, Debug)]
pub struct Bootstrap {
    pub seed: u64,
    pub replicates: usize,
    pub level: f64,
}

/// A reference file a study used, with its hash.
#[derive(Clone, Debug)]
pub struct Reference {
    pub role: String,
    pub path: PathBuf,
    pub sha256: String,
}

/// A validated study.
#[derive(Clone, Debug)]
pub struct Study {
    pub path: PathBuf,
    pub sha256: String,
    pub name: String,
    pub title: String,
    pub description: String,
    pub windows: Vec<Window>,
    /// Indices into `windows` of (before, after).
    pub compare: Option<(usize, usize)>,
    pub cohort: Option<Cohort>,
    pub intervals: Option<Intervals>,
    pub subgroups: Vec<Subgroup>,
    pub analytes: Vec<StudyAnalyte>,
    pub threshold_sets: Vec<ThresholdSet>,
    pub distributions: Option<Distributions>,
    pub worst_events_only: Option<bool>,
    pub critical: Option<Critical>,
    pub travel: Option<Travel>,
    pub age_bands: Option<Vec<u32>>,
    pub bootstrap: Bootstrap,
    pub references: Vec<Reference>,
}

/// What the study is checked against: the store's tags and analytes.
pub struct Known<'a> {
    pub tags: &'a [String],
    pub analytes: &'a [String],
}

pub fn day_of(d: NaiveDate) -> i64 {
    (d - NaiveDate::from_ymd_opt(1970, 1, 1).expect("epoch")).num_days()
}

fn months_before(d: NaiveDate, m: u32) -> NaiveDate {
    d.checked_sub_months(Months::new(m)).unwrap_or(d)
}

impl Study {
    /// Reads and validates a study; reference paths are relative to `policies`.
    pub fn load(path: &Path, policies: &Path, known: &Known<'_>) -> Result<Study, PolicyError> {
        let text = PolicyText::read(path)?;
        let raw: Raw = text.parse()?;
        let bad = |key: &str, msg: String| PolicyError::invalid(path, key, msg);
        let mut references = Vec::new();

        let name = raw.study.name.trim().to_string();
        if name.is_empty() {
            return Err(bad("study.name", "is empty".into()));
        }

        let mut windows = Vec::new();
        for (i, w) in raw.window.iter().enumerate() {
            let key = |f: &str| format!("window[{i}].{f}");
            let parse = |f: &str, s: &str| {
                NaiveDate::parse_from_str(s, "%Y-%m-%d")
                    .map_err(|_| bad(&key(f), format!("{s:?} is not a date (YYYY-MM-DD)")))
            };
            let (from, to) = (parse("from", &w.from)?, parse("to", &w.to)?);
            if to <= from {
                return Err(bad(&key("to"), format!("{to} is not after from {from}")));
            }
            if windows.iter().any(|x: &Window| x.name == w.name) {
                return Err(bad(
                    &key("name"),
                    format!("window {:?} is named twice", w.name),
                ));
            }
            for x in &windows {
                if from < x.to && x.from < to {
                    return Err(bad(
                        &key("from"),
                        format!(
                            "window {:?} ({from} to {to}) overlaps window {:?} ({} to {})",
                            w.name, x.name, x.from, x.to
                        ),
                    ));
                }
            }
            windows.push(Window {
                name: w.name.clone(),
                from,
                to,
                from_day: day_of(from),
                to_day: day_of(to),
            });
        }
        windows.sort_by_key(|w| w.from_day);
        let window_index = |key: &str, n: &str| {
            windows.iter().position(|w| w.name == n).ok_or_else(|| {
                bad(
                    key,
                    format!(
                        "no window named {n:?} (windows: {})",
                        names(windows.iter().map(|w| &w.name))
                    ),
                )
            })
        };
        let compare = match raw.study.compare.as_slice() {
            [] => None,
            [a, b] => {
                let (a, b) = (
                    window_index("study.compare", a)?,
                    window_index("study.compare", b)?,
                );
                if windows[a].from_day >= windows[b].from_day {
                    return Err(bad(
                        "study.compare",
                        "the first window compared must come before the second".into(),
                    ));
                }
                Some((a, b))
            }
            _ => {
                return Err(bad(
                    "study.compare",
                    "must name exactly two windows (before, after)".into(),
                ));
            }
        };

        let tag = |key: &str, t: &str| {
            if known.tags.iter().any(|k| k == t) {
                Ok(t.to_string())
            } else {
                Err(bad(
                    key,
                    format!(
                        "unknown tag {t:?}; the store has tags {}",
                        names(known.tags.iter())
                    ),
                ))
            }
        };
        let cohort = match &raw.cohort {
            None => None,
            Some(c) => {
                if windows.is_empty() {
                    return Err(bad(
                        "cohort",
                        "a cohort needs at least one [[window]]".into(),
                    ));
                }
                let first = &windows[0];
                let last = &windows[windows.len() - 1];
                let marker = tag("cohort.marker_tag", &c.marker_tag)?;
                let drug_tags = c
                    .drug_tags
                    .iter()
                    .map(|t| tag("cohort.drug_tags", t))
                    .collect::<Result<Vec<_>, _>>()?;
                let exclude_tags = c
                    .exclude_tags
                    .iter()
                    .map(|t| tag("cohort.exclude_tags", t))
                    .collect::<Result<Vec<_>, _>>()?;
                if let Some(t) = exclude_tags
                    .iter()
                    .find(|t| drug_tags.contains(t) || **t == marker)
                {
                    return Err(bad(
                        "cohort.exclude_tags",
                        format!("{t:?} is also a tag that selects the cohort"),
                    ));
                }
                let evidence_in_last = match c.evidence_in_last_months {
                    None => None,
                    Some(0) => {
                        return Err(bad(
                            "cohort.evidence_in_last_months",
                            "must be at least 1".into(),
                        ));
                    }
                    Some(m) => Some((m, day_of(months_before(last.to, m)))),
                };
                Some(Cohort {
                    marker_tag: marker,
                    drug_tags,
                    exclude_tags,
                    exclude_from_day: day_of(months_before(first.from, c.exclude_lookback_months)),
                    exclude_lookback_months: c.exclude_lookback_months,
                    stable_by_day: day_of(months_before(first.from, c.stable_months)),
                    stable_months: c.stable_months,
                    min_events_per_window: c.min_events_per_window,
                    evidence_in_last,
                })
            }
        };

        let intervals = match &raw.intervals {
            None => None,
            Some(iv) => {
                if cohort.is_none() {
                    return Err(bad(
                        "intervals",
                        "intervals need a [cohort] (its monitoring events)".into(),
                    ));
                }
                let statistic = match iv.band_statistic.as_str() {
                    "median" => BandStatistic::Median,
                    "mean" => BandStatistic::Mean,
                    s => {
                        return Err(bad(
                            "intervals.band_statistic",
                            format!("{s:?} is not \"median\" or \"mean\""),
                        ));
                    }
                };
                if iv.bands.is_empty() {
                    return Err(bad("intervals.bands", "is empty".into()));
                }
                let mut prev = f64::NEG_INFINITY;
                for (i, b) in iv.bands.iter().enumerate() {
                    match b.max_days {
                        Some(m) if m <= prev => {
                            return Err(bad(
                                &format!("intervals.bands[{i}].max_days"),
                                format!("{m} is not above the previous band's {prev}"),
                            ));
                        }
                        Some(m) => prev = m,
                        None if i + 1 != iv.bands.len() => {
                            return Err(bad(
                                &format!("intervals.bands[{i}].max_days"),
                                "only the last band may have no upper limit".into(),
                            ));
                        }
                        None => {}
                    }
                    if b.name == "none" || b.name == sluice_aggregate::ALL {
                        return Err(bad(
                            &format!("intervals.bands[{i}].name"),
                            format!("{:?} is reserved", b.name),
                        ));
                    }
                }
                check_probabilities(&iv.quantiles).map_err(|m| bad("intervals.quantiles", m))?;
                Some(Intervals {
                    statistic,
                    bands: iv
                        .bands
                        .iter()
                        .map(|b| Band {
                            name: b.name.clone(),
                            max_days: b.max_days,
                        })
                        .collect(),
                    quantiles: iv.quantiles.clone(),
                })
            }
        };

        let mut subgroups = Vec::new();
        for (i, s) in raw.subgroup.iter().enumerate() {
            let Some(iv) = &intervals else {
                return Err(bad(
                    "subgroup",
                    "subgroups are defined on interval bands: add [intervals]".into(),
                ));
            };
            if compare.is_none() {
                return Err(bad(
                    "subgroup",
                    "subgroups need study.compare (the windows of the transition)".into(),
                ));
            }
            if s.name == sluice_aggregate::ALL
                || subgroups.iter().any(|g: &Subgroup| g.name == s.name)
            {
                return Err(bad(
                    &format!("subgroup[{i}].name"),
                    format!("{:?} is reserved or used twice", s.name),
                ));
            }
            for (field, list) in [("before", &s.before), ("after", &s.after)] {
                for b in list {
                    if b != "none" && !iv.bands.iter().any(|x| &x.name == b) {
                        return Err(bad(
                            &format!("subgroup[{i}].{field}"),
                            format!("unknown band {b:?}"),
                        ));
                    }
                }
            }
            subgroups.push(Subgroup {
                name: s.name.clone(),
                before: s.before.clone(),
                after: s.after.clone(),
                same_band: s.same_band,
            });
        }

        let mut analytes = Vec::new();
        for (i, a) in raw.analyte.iter().enumerate() {
            if !known.analytes.iter().any(|k| k == &a.id) {
                return Err(bad(
                    &format!("analyte[{i}].id"),
                    format!(
                        "unknown analyte {:?}; the store has {}",
                        a.id,
                        names(known.analytes.iter())
                    ),
                ));
            }
            if analytes.iter().any(|x: &StudyAnalyte| x.id == a.id) {
                return Err(bad(
                    &format!("analyte[{i}].id"),
                    format!("{:?} is listed twice", a.id),
                ));
            }
            let worse = match a.worse.as_str() {
                "higher" => Worse::Higher,
                "lower" => Worse::Lower,
                s => {
                    return Err(bad(
                        &format!("analyte[{i}].worse"),
                        format!("{s:?} is not \"higher\" or \"lower\""),
                    ));
                }
            };
            if !(a.bins.width > 0.0 && a.bins.width.is_finite())
                || a.bins.count == 0
                || a.bins.count > 1000
                || !a.bins.start.is_finite()
            {
                return Err(bad(
                    &format!("analyte[{i}].bins"),
                    "needs a finite start, a positive width and 1 to 1000 bins".into(),
                ));
            }
            analytes.push(StudyAnalyte {
                id: a.id.clone(),
                worse,
                bins: Bins {
                    start: a.bins.start,
                    width: a.bins.width,
                    count: a.bins.count,
                },
            });
        }

        let mut threshold_sets = Vec::new();
        if let Some(t) = &raw.thresholds {
            let file = policies.join(&t.file);
            let sets = load_thresholds(&file, known)?;
            references.push(reference("thresholds", &file)?);
            for (i, s) in t.sets.iter().enumerate() {
                let set = sets.iter().find(|x| &x.name == s).ok_or_else(|| {
                    bad(
                        &format!("thresholds.sets[{i}]"),
                        format!(
                            "unknown threshold set {s:?}; {} has {}",
                            file.display(),
                            names(sets.iter().map(|x| &x.name))
                        ),
                    )
                })?;
                threshold_sets.push(set.clone());
            }
        }

        let dims = |key: &str, by: &[String]| -> Result<Vec<Dim>, PolicyError> {
            let mut out = Vec::new();
            for s in by {
                let d = Dim::parse(s).ok_or_else(|| bad(key, format!("unknown dimension {s:?} (window, month, setting, subgroup, sex, age_band)")))?;
                match d {
                    Dim::Window if windows.is_empty() => {
                        return Err(bad(key, "\"window\" needs [[window]] entries".into()));
                    }
                    Dim::Subgroup if cohort.is_none() => {
                        return Err(bad(key, "\"subgroup\" needs a [cohort]".into()));
                    }
                    Dim::AgeBand if raw.flags.is_none() => {
                        return Err(bad(key, "\"age_band\" needs [flags] age_bands".into()));
                    }
                    _ => {}
                }
                if out.contains(&d) {
                    return Err(bad(key, format!("{s:?} is listed twice")));
                }
                out.push(d);
            }
            Ok(out)
        };

        let distributions = match &raw.distributions {
            None => None,
            Some(d) => {
                if analytes.is_empty() {
                    return Err(bad(
                        "distributions",
                        "needs at least one [[analyte]]".into(),
                    ));
                }
                if d.events_only && cohort.is_none() {
                    return Err(bad(
                        "distributions.events_only",
                        "monitoring events need a [cohort]".into(),
                    ));
                }
                check_probabilities(&d.quantiles).map_err(|m| bad("distributions.quantiles", m))?;
                Some(Distributions {
                    by: dims("distributions.by", &d.by)?,
                    events_only: d.events_only,
                    quantiles: d.quantiles.clone(),
                })
            }
        };

        let worst_events_only = match &raw.worst {
            None => None,
            Some(w) => {
                if compare.is_none() || cohort.is_none() {
                    return Err(bad(
                        "worst",
                        "worst results need a [cohort] and study.compare".into(),
                    ));
                }
                Some(w.events_only)
            }
        };

        let critical = match &raw.critical {
            None => None,
            Some(c) => {
                let file = policies.join(&c.limits);
                let mut limits = load_critical(&file, known)?;
                references.push(reference("critical_limits", &file)?);
                if let Some(list) = &c.analytes {
                    for (i, a) in list.iter().enumerate() {
                        if !limits.contains_key(a) {
                            return Err(bad(
                                &format!("critical.analytes[{i}]"),
                                format!("{a:?} has no critical limit in {}", file.display()),
                            ));
                        }
                    }
                    limits.retain(|k, _| list.contains(k));
                }
                Some(Critical {
                    limits,
                    by: dims("critical.by", &c.by)?,
                })
            }
        };

        let travel = match &raw.travel {
            None => None,
            Some(t) => {
                if cohort.is_none() {
                    return Err(bad("travel", "travel needs a [cohort]".into()));
                }
                if !(t.circuity >= 1.0 && t.circuity < 5.0) {
                    return Err(bad(
                        "travel.circuity",
                        format!(
                            "{} is not a road/straight-line ratio between 1 and 5",
                            t.circuity
                        ),
                    ));
                }
                if !(t.kg_co2e_per_mile >= 0.0 && t.kg_co2e_per_mile.is_finite()) {
                    return Err(bad(
                        "travel.kg_co2e_per_mile",
                        "must be a non-negative number".into(),
                    ));
                }
                if !(t.scenario_tests_per_year > 0.0 && t.scenario_tests_per_year.is_finite()) {
                    return Err(bad(
                        "travel.scenario_tests_per_year",
                        "must be positive".into(),
                    ));
                }
                Some(Travel {
                    circuity: t.circuity,
                    kg_co2e_per_mile: t.kg_co2e_per_mile,
                    window: window_index("travel.window", &t.window)?,
                    scenario: t.scenario.clone(),
                    scenario_tests_per_year: t.scenario_tests_per_year,
                })
            }
        };

        let age_bands = match &raw.flags {
            None => None,
            Some(f) => {
                if f.age_bands.is_empty()
                    || f.age_bands[0] != 0
                    || f.age_bands.windows(2).any(|w| w[1] <= w[0])
                {
                    return Err(bad("flags.age_bands", "must start at 0 and ascend".into()));
                }
                if threshold_sets.is_empty() {
                    return Err(bad("flags", "who-flags needs [thresholds] sets".into()));
                }
                Some(f.age_bands.clone())
            }
        };

        let bootstrap = match &raw.bootstrap {
            None => Bootstrap {
                seed: 1,
                replicates: 1000,
                level: 0.95,
            },
            Some(b) => {
                if !(b.level > 0.5 && b.level < 1.0) {
                    return Err(bad(
                        "bootstrap.level",
                        format!("{} is not between 0.5 and 1", b.level),
                    ));
                }
                if !(100..=100_000).contains(&b.replicates) {
                    return Err(bad(
                        "bootstrap.replicates",
                        format!("{} is not between 100 and 100000", b.replicates),
                    ));
                }
                Bootstrap {
                    seed: b.seed,
                    replicates: b.replicates,
                    level: b.level,
                }
            }
        };

        Ok(Study {
            path: path.to_path_buf(),
            sha256: text.sha256,
            name,
            title: raw.study.title,
            description: raw.study.description,
            windows,
            compare,
            cohort,
            intervals,
            subgroups,
            analytes,
            threshold_sets,
            distributions,
            worst_events_only,
            critical,
            travel,
            age_bands,
            bootstrap,
            references,
        })
    }

    /// Age band label of an age in years.
    pub fn age_band(&self, age: u8) -> String {
        let bands = self.age_bands.as_deref().unwrap_or(&[0]);
        let age = u32::from(age);
        let i = bands.partition_point(|&b| b <= age).saturating_sub(1);
        match bands.get(i + 1) {
            Some(next) => format!("{}-{}", bands[i], next - 1),
            None => format!("{}+", bands[i]),
        }
    }

    /// The window holding day `d`, if any.
    pub fn window_of(&self, d: i64) -> Option<usize> {
        self.windows
            .iter()
            .position(|w| d >= w.from_day && d < w.to_day)
    }
}

fn reference(role: &str, path: &Path) -> Result<Reference, PolicyError> {
    let t = PolicyText::read(path)?;
    Ok(Reference {
        role: role.to_string(),
        path: path.to_path_buf(),
        sha256: t.sha256,
    })
}

fn names<'a>(it: impl Iterator<Item = &'a String>) -> String {
    let v: Vec<&str> = it.map(String::as_str).collect();
    if v.is_empty() {
        "none".into()
    } else {
        v.join(", ")
    }
}

fn check_probabilities(ps: &[f64]) -> Result<(), String> {
    if ps.is_empty() {
        return Err("is empty".into());
    }
    if ps.iter().any(|&p| !(p > 0.0 && p < 1.0)) || ps.windows(2).any(|w| w[1] <= w[0]) {
        return Err("probabilities must ascend strictly inside (0, 1); minima and maxima are never released".into());
    }
    Ok(())
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawThresholdFile {
    sets: BTreeMap<String, toml::Table>,
}

fn load_thresholds(path: &Path, known: &Known<'_>) -> Result<Vec<ThresholdSet>, PolicyError> {
    let text = PolicyText::read(path)?;
    let raw: RawThresholdFile = text.parse()?;
    let mut out = Vec::new();
    for (name, table) in raw.sets {
        let mut title = String::new();
        let mut rules = BTreeMap::new();
        for (k, v) in table {
            let key = format!("sets.{name}.{k}");
            if k == "title" {
                title = v.as_str().unwrap_or_default().to_string();
                continue;
            }
            let t = v.as_table().ok_or_else(|| {
                PolicyError::invalid(path, &key, "must be a table { below, above, source }")
            })?;
            let num = |f: &str| -> Result<Option<f64>, PolicyError> {
                match t.get(f) {
                    None => Ok(None),
                    Some(x) => x
                        .as_float()
                        .or_else(|| x.as_integer().map(|i| i as f64))
                        .map(Some)
                        .ok_or_else(|| {
                            PolicyError::invalid(path, format!("{key}.{f}"), "must be a number")
                        }),
                }
            };
            let (below, above) = (num("below")?, num("above")?);
            if below.is_none() && above.is_none() {
                return Err(PolicyError::invalid(path, &key, "needs `below` or `above`"));
            }
            let source = t
                .get("source")
                .and_then(|s| s.as_str())
                .unwrap_or_default()
                .to_string();
            if source.is_empty() {
                return Err(PolicyError::invalid(
                    path,
                    format!("{key}.source"),
                    "every threshold names its source (or says from memory)",
                ));
            }
            let analyte = t
                .get("analyte")
                .and_then(|s| s.as_str())
                .unwrap_or(&k)
                .to_string();
            if !known.analytes.contains(&analyte) {
                return Err(PolicyError::invalid(
                    path,
                    &key,
                    format!("unknown analyte {analyte:?}"),
                ));
            }
            rules.insert(
                analyte.clone(),
                Threshold {
                    analyte,
                    below,
                    above,
                    source,
                },
            );
        }
        out.push(ThresholdSet { name, title, rules });
    }
    Ok(out)
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCriticalFile {
    limits: BTreeMap<String, RawLimit>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawLimit {
    low: Option<f64>,
    high: Option<f64>,
    #[serde(default)]
    strict: bool,
    source: String,
}

fn load_critical(
    path: &Path,
    known: &Known<'_>,
) -> Result<BTreeMap<String, CriticalLimit>, PolicyError> {
    let text = PolicyText::read(path)?;
    let raw: RawCriticalFile = text.parse()?;
    let mut out = BTreeMap::new();
    for (a, l) in raw.limits {
        if !known.analytes.contains(&a) {
            // A shared limits file may cover analytes a store does not hold; they simply never fire.
            continue;
        }
        if l.low.is_none() && l.high.is_none() {
            return Err(PolicyError::invalid(
                path,
                format!("limits.{a}"),
                "needs `low` or `high`",
            ));
        }
        out.insert(
            a,
            CriticalLimit {
                low: l.low,
                high: l.high,
                strict: l.strict,
                source: l.source,
            },
        );
    }
    Ok(out)
}

/// YYYY-MM label of a day number.
pub fn month_label(day: i64) -> String {
    let d = NaiveDate::from_ymd_opt(1970, 1, 1).expect("epoch") + chrono::Duration::days(day);
    format!("{:04}-{:02}", d.year(), d.month())
}
