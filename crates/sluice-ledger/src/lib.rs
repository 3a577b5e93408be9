//! The release ledger and the differencing guard.
//!
//! Two releases of nearly the same study — windows shifted by a few days, one more exclusion
//! tag, a stability rule one month shorter — can have populations that differ by one to a few
//! patients. Each release passes disclosure control alone, yet subtracting one from the other
//! gives those few patients' results (Hundepool et al., *Statistical Disclosure Control*, Wiley
//! 2012, §5 on disclosure by differencing). No check of one release can see this; only a record
//! of what was released before can.
//!
//! The ledger (`<store>-ledger/ledger.json`, beside the store, so every study and work folder
//! made from that store shares it; inside the secure area, never released) records for each
//! release its study, site, manifest hash and the populations behind its cells: the cohort
//! (`all`) and each subgroup, with size, SHA-256 of the sorted set and the set itself (keyed
//! pseudonyms, as sensitive as the store and kept with it). [`guard`] compares each population
//! of a new release with every population of every earlier one: where the symmetric difference
//! is 1 to threshold − 1 patients, every row of that population is withheld
//! (`differencing`, naming the earlier release) — or, by the rules' `differencing = "refuse"`,
//! the release is refused.
//!
//! # Limits
//!
//! - A row's population is its `subgroup` value, or the cohort for tables without one. Cells
//!   over narrower sets (a window, an analyte) whose own sets differ by a few patients while the
//!   cohorts do not (windows shifted with the same cohort) are not compared cell by cell.
//! - Releases made from another store, with another tool, or before the ledger existed are not
//!   in it; studies without a cohort record no population.

#![forbid(unsafe_code)]

use serde::{Deserialize, Serialize};
use sluice_aggregate::Candidates;
use sluice_disclose::{CheckedTable, Differencing, Rules};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

#[derive(Debug, thiserror::Error)]
pub enum LedgerError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: not a release ledger: {message}")]
    Format { path: PathBuf, message: String },
    #[error(
        "differencing: population {population} ({size} patients) of this release differs from population {earlier_population} of the release {earlier_release} (study {earlier_study}) by {differ_by} patients, fewer than the threshold {threshold}; the rules say refuse"
    )]
    Refused {
        population: String,
        size: usize,
        earlier_population: String,
        earlier_release: String,
        earlier_study: String,
        differ_by: usize,
        threshold: u64,
    },
}

/// One population of a release: its name, size, the SHA-256 of its sorted members and the
/// members themselves.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Population {
    pub name: String,
    pub size: usize,
    pub set_sha256: String,
    pub members: Vec<u64>,
}

impl Population {
    pub fn new(name: &str, members: &[u64]) -> Population {
        let mut m = members.to_vec();
        m.sort_unstable();
        m.dedup();
        let bytes: Vec<u8> = m.iter().flat_map(|x| x.to_le_bytes()).collect();
        Population {
            name: name.into(),
            size: m.len(),
            set_sha256: sluice_aggregate::sha256_hex(&bytes),
            members: m,
        }
    }
}

/// One release recorded in the ledger.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Entry {
    /// Where the release was written.
    pub release: String,
    pub manifest_sha256: String,
    pub study: String,
    pub site: String,
    pub made_utc: String,
    /// Rows released (not withheld), over all tables.
    pub released_rows: usize,
    pub populations: Vec<Population>,
}

#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Ledger {
    pub entries: Vec<Entry>,
}

/// Where the ledger of a store lives: `<store>-ledger/ledger.json`.
pub fn ledger_path(store: &Path) -> PathBuf {
    let name = store
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "store".into());
    store
        .with_file_name(format!("{name}-ledger"))
        .join("ledger.json")
}

impl Ledger {
    /// Reads a ledger; a missing file is an empty ledger (no release made yet).
    pub fn load(path: &Path) -> Result<Ledger, LedgerError> {
        match std::fs::read(path) {
            Ok(b) => serde_json::from_slice(&b).map_err(|e| LedgerError::Format {
                path: path.to_path_buf(),
                message: e.to_string(),
            }),
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(Ledger::default()),
            Err(source) => Err(LedgerError::Io {
                path: path.to_path_buf(),
                source,
            }),
        }
    }

    /// Appends an entry and replaces the file atomically. An entry for the same release folder
    /// is replaced (a release re-made in place supersedes itself).
    pub fn record(&mut self, path: &Path, entry: Entry) -> Result<(), LedgerError> {
        self.entries.retain(|e| e.release != entry.release);
        self.entries.push(entry);
        let io = |source| LedgerError::Io {
            path: path.to_path_buf(),
            source,
        };
        if let Some(dir) = path.parent() {
            std::fs::create_dir_all(dir).map_err(io)?;
        }
        let tmp = path.with_extension("json.tmp");
        let bytes = serde_json::to_vec(self).map_err(|e| LedgerError::Format {
            path: path.to_path_buf(),
            message: e.to_string(),
        })?;
        std::fs::write(&tmp, bytes).map_err(io)?;
        std::fs::rename(&tmp, path).map_err(io)
    }
}

/// A differencing pair: a population of the new release close to one released before.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Pair {
    pub population: String,
    pub size: usize,
    pub earlier_release: String,
    pub earlier_study: String,
    pub earlier_population: String,
    pub differ_by: usize,
}

/// Size of the symmetric difference of two sorted, deduplicated sets.
pub fn symmetric_difference(a: &[u64], b: &[u64]) -> usize {
    let (mut i, mut j, mut d) = (0, 0, 0);
    while i < a.len() && j < b.len() {
        match a[i].cmp(&b[j]) {
            std::cmp::Ordering::Less => {
                d += 1;
                i += 1;
            }
            std::cmp::Ordering::Greater => {
                d += 1;
                j += 1;
            }
            std::cmp::Ordering::Equal => {
                i += 1;
                j += 1;
            }
        }
    }
    d + (a.len() - i) + (b.len() - j)
}

/// The populations of a candidate set, as the ledger records them.
pub fn populations(c: &Candidates) -> Vec<Population> {
    c.populations
        .iter()
        .map(|(name, m)| Population::new(name, m))
        .collect()
}

/// Every population of `new` within 1 … threshold − 1 patients of a population of an earlier
/// release of the same site (other than `this_release`, a release re-made in place).
pub fn pairs(
    ledger: &Ledger,
    new: &[Population],
    site: &str,
    this_release: &str,
    threshold: u64,
) -> Vec<Pair> {
    let mut out = Vec::new();
    for p in new {
        for e in ledger
            .entries
            .iter()
            .filter(|e| e.site == site && e.release != this_release)
        {
            for q in &e.populations {
                // Sizes alone bound the difference from below: skip the merge when they are far.
                if p.size.abs_diff(q.size) as u64 >= threshold {
                    continue;
                }
                let d = symmetric_difference(&p.members, &q.members);
                if d > 0 && (d as u64) < threshold {
                    out.push(Pair {
                        population: p.name.clone(),
                        size: p.size,
                        earlier_release: e.release.clone(),
                        earlier_study: e.study.clone(),
                        earlier_population: q.name.clone(),
                        differ_by: d,
                    });
                }
            }
        }
    }
    out
}

/// The population a released row belongs to: its `subgroup` value where the table has one and
/// it names a population, else the cohort (`all`).
fn row_population<'a>(t: &'a CheckedTable, r: usize, known: &BTreeMap<&str, ()>) -> &'a str {
    if let Some(c) = t.column("subgroup")
        && let Some(s) = t.rows()[r][c].as_text()
        && known.contains_key(s)
    {
        return s;
    }
    sluice_aggregate::ALL
}

/// What the guard did: rows withheld per table, with the pairs that caused it.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Guarded {
    pub pairs: Vec<Pair>,
    /// (table, rows withheld by the guard, and then by secondary suppression).
    pub withheld: Vec<(String, usize)>,
}

/// Applies the differencing guard to controlled tables: withholds every row of a population in
/// a pair (then re-runs secondary suppression), or refuses, as the rules say.
pub fn guard(
    tables: &mut [CheckedTable],
    new: &[Population],
    pairs: Vec<Pair>,
    rules: &Rules,
) -> Result<Guarded, LedgerError> {
    if pairs.is_empty() {
        return Ok(Guarded::default());
    }
    if rules.differencing() == Differencing::Refuse {
        let p = &pairs[0];
        return Err(LedgerError::Refused {
            population: p.population.clone(),
            size: p.size,
            earlier_population: p.earlier_population.clone(),
            earlier_release: p.earlier_release.clone(),
            earlier_study: p.earlier_study.clone(),
            differ_by: p.differ_by,
            threshold: rules.threshold(),
        });
    }
    let known: BTreeMap<&str, ()> = new.iter().map(|p| (p.name.as_str(), ())).collect();
    let hit: BTreeMap<&str, ()> = pairs.iter().map(|p| (p.population.as_str(), ())).collect();
    let mut withheld = Vec::new();
    for t in tables.iter_mut() {
        let before = t.withheld();
        let rows: Vec<usize> = (0..t.rows().len())
            .filter(|&r| hit.contains_key(row_population(t, r, &known)))
            .collect();
        t.withhold_rows(&rows, "differencing");
        t.protect_again();
        let n = t.withheld() - before;
        if n > 0 {
            withheld.push((t.name().to_string(), n));
        }
    }
    Ok(Guarded { pairs, withheld })
}

/// The ledger entry for a release just written.
pub fn entry(
    release: &Path,
    manifest_sha256: &str,
    c: &Candidates,
    tables: &[CheckedTable],
    populations: Vec<Population>,
) -> Entry {
    Entry {
        release: release.to_string_lossy().into_owned(),
        manifest_sha256: manifest_sha256.into(),
        study: c.provenance.study.clone(),
        site: c.provenance.site.clone(),
        made_utc: chrono::Utc::now().format("%Y-%m-%dT%H:%M:%SZ").to_string(),
        released_rows: tables.iter().map(|t| t.rows().len() - t.withheld()).sum(),
        populations,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn symmetric_difference_counts_both_sides() {
        assert_eq!(symmetric_difference(&[1, 2, 3], &[2, 3, 4, 5]), 3);
        assert_eq!(symmetric_difference(&[], &[7]), 1);
        assert_eq!(symmetric_difference(&[1, 2], &[1, 2]), 0);
    }

    #[test]
    fn ledger_sits_beside_the_store() {
        assert_eq!(
            ledger_path(Path::new("/secure/store")),
            Path::new("/secure/store-ledger/ledger.json")
        );
    }

    #[test]
    fn pairs_find_populations_a_few_patients_apart() {
        let a: Vec<u64> = (0..100).collect();
        let b: Vec<u64> = (0..103).collect();
        let c: Vec<u64> = (0..150).collect();
        let ledger = Ledger {
            entries: vec![Entry {
                release: "r1".into(),
                manifest_sha256: String::new(),
                study: "s".into(),
                site: "x".into(),
                made_utc: String::new(),
                released_rows: 0,
                populations: vec![Population::new("all", &a)],
            }],
        };
        let found = pairs(&ledger, &[Population::new("all", &b)], "x", "r2", 10);
        assert_eq!(found.len(), 1);
        assert_eq!(found[0].differ_by, 3);
        // The same population again (an honest re-run), another site, or far apart: no pair.
        assert!(pairs(&ledger, &[Population::new("all", &a)], "x", "r2", 10).is_empty());
        assert!(pairs(&ledger, &[Population::new("all", &b)], "y", "r2", 10).is_empty());
        assert!(pairs(&ledger, &[Population::new("all", &c)], "x", "r2", 10).is_empty());
        // The release itself, re-made in place, is not its own pair.
        assert!(pairs(&ledger, &[Population::new("all", &b)], "x", "r1", 10).is_empty());
    }
}
