//! The tag dictionary (`policies/tags/*.toml`): turns a request's clinical notes into a few named
//! tags (a monitoring marker, each drug) so the free text itself can be dropped.
//!
//! Matching is case-insensitive. `literal` terms match whole words or phrases; `regex` patterns
//! match anywhere; `fuzzy` terms match any single word of the notes within an edit distance
//! (optimal string alignment: insertions, deletions, substitutions and adjacent transpositions),
//! so "methotrexat" or "metotrexate" still tag as methotrexate.

use serde::Deserialize;
use sluice_policy::{PolicyError, PolicyText};
use std::collections::HashMap;
use std::path::Path;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct File {
    tag: Vec<TagSpec>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct TagSpec {
    name: String,
    #[serde(default)]
    description: String,
    #[serde(default)]
    literal: Vec<String>,
    #[serde(default)]
    regex: Vec<String>,
    #[serde(default)]
    fuzzy: Vec<String>,
    /// Largest edit distance for fuzzy terms; default by length: 0 below 5 letters, 1 up to 8,
    /// 2 from 9.
    #[serde(default)]
    max_edits: Option<usize>,
}

#[derive(Clone)]
struct Tag {
    name: String,
    pattern: Option<regex::Regex>,
    fuzzy: Vec<(String, usize)>,
}

/// A compiled dictionary of at most 64 tags.
#[derive(Clone)]
pub struct TagDictionary {
    tags: Vec<Tag>,
    pub sha256: String,
    cache: HashMap<Box<str>, u64>,
}

impl TagDictionary {
    pub fn load(path: &Path) -> Result<Self, PolicyError> {
        let text = PolicyText::read(path)?;
        let file: File = text.parse()?;
        if file.tag.len() > 64 {
            return Err(PolicyError::invalid(path, "tag", "at most 64 tags"));
        }
        let mut tags = Vec::new();
        for (i, t) in file.tag.into_iter().enumerate() {
            let _ = &t.description;
            let key = |k: &str| format!("tag[{i}].{k}");
            if t.name.is_empty()
                || !t
                    .name
                    .bytes()
                    .all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'_')
            {
                return Err(PolicyError::invalid(
                    path,
                    key("name"),
                    format!(
                        "{:?}: tag names are lower-case letters, digits and underscores",
                        t.name
                    ),
                ));
            }
            if tags.iter().any(|x: &Tag| x.name == t.name) {
                return Err(PolicyError::invalid(
                    path,
                    key("name"),
                    format!("duplicate tag {:?}", t.name),
                ));
            }
            let mut alts: Vec<String> = t
                .literal
                .iter()
                .map(|l| format!(r"\b{}\b", regex::escape(&l.to_lowercase())))
                .collect();
            for (j, r) in t.regex.iter().enumerate() {
                regex::Regex::new(r).map_err(|e| {
                    PolicyError::invalid(path, format!("tag[{i}].regex[{j}]"), e.to_string())
                })?;
                alts.push(format!("(?:{r})"));
            }
            let pattern = if alts.is_empty() {
                None
            } else {
                Some(
                    regex::RegexBuilder::new(&alts.join("|"))
                        .case_insensitive(true)
                        .build()
                        .map_err(|e| PolicyError::invalid(path, key("literal"), e.to_string()))?,
                )
            };
            let fuzzy = t
                .fuzzy
                .iter()
                .map(|w| {
                    let w = w.to_lowercase();
                    let n = w.chars().count();
                    let d = t.max_edits.unwrap_or(match n {
                        0..=4 => 0,
                        5..=8 => 1,
                        _ => 2,
                    });
                    (w, d)
                })
                .collect();
            if pattern.is_none() && t.fuzzy.is_empty() {
                return Err(PolicyError::invalid(
                    path,
                    key("name"),
                    "a tag needs literal, regex or fuzzy terms",
                ));
            }
            tags.push(Tag {
                name: t.name,
                pattern,
                fuzzy,
            });
        }
        Ok(Self {
            tags,
            sha256: text.sha256,
            cache: HashMap::new(),
        })
    }

    pub fn names(&self) -> Vec<&str> {
        self.tags.iter().map(|t| t.name.as_str()).collect()
    }

    /// The tags of a text as a bit set (bit i = tag i), cached per distinct text.
    pub fn tags(&mut self, notes: &str) -> u64 {
        if let Some(&m) = self.cache.get(notes) {
            return m;
        }
        let m = self.compute(notes);
        // Notes are mostly templated in practice; the cache is bounded so unique free text
        // cannot grow it without limit.
        if self.cache.len() < 1_000_000 {
            self.cache.insert(Box::from(notes), m);
        }
        m
    }

    fn compute(&self, notes: &str) -> u64 {
        let lower = notes.to_lowercase();
        let words: Vec<&str> = lower
            .split(|c: char| !c.is_alphanumeric())
            .filter(|w| !w.is_empty())
            .collect();
        let mut mask = 0u64;
        for (i, t) in self.tags.iter().enumerate() {
            let hit = t.pattern.as_ref().is_some_and(|p| p.is_match(&lower))
                || t.fuzzy.iter().any(|(term, d)| {
                    let tl = term.chars().count();
                    words.iter().any(|w| {
                        let wl = w.chars().count();
                        wl.abs_diff(tl) <= *d && strsim::osa_distance(w, term) <= *d
                    })
                });
            if hit {
                mask |= 1 << i;
            }
        }
        mask
    }
}
