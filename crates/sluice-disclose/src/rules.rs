//! The disclosure rules a release is controlled by (`policies/disclosure/standard.toml`) and the
//! site floor they may never go below (`policies/disclosure/floor.toml`).
//!
//! Both are plain TOML with every key required and unknown keys refused, so a typo cannot
//! silently fall back to a weaker default. The rules keep the exact text they were read from, so
//! a release records (and the checker re-reads) precisely what was applied.

use serde::Deserialize;
use std::path::{Path, PathBuf};

use crate::DiscloseError;

/// The (n, k)-dominance rule: a magnitude cell is unsafe when its `n` largest contributions make
/// up more than `k` percent of its total (Hundepool et al. 2012, §4.2).
#[derive(Clone, Copy, Debug, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Dominance {
    pub n: usize,
    pub k: f64,
}

/// How secondary suppression protects withheld cells.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Secondary {
    /// Every recorded total-and-parts constraint has 0 or at least 2 withheld cells.
    Margins,
    /// No secondary suppression: only for experiments, the floor refuses it.
    None,
}

/// What a release does with a cell whose population differs from an earlier released cell's by
/// fewer patients than the threshold (a differencing pair).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Differencing {
    /// Withhold the new cell (its reason names the earlier release).
    Withhold,
    /// Refuse the whole release, naming the cell and the earlier release.
    Refuse,
}

impl Differencing {
    pub fn as_str(self) -> &'static str {
        match self {
            Differencing::Withhold => "withhold",
            Differencing::Refuse => "refuse",
        }
    }
}

impl Secondary {
    pub fn as_str(self) -> &'static str {
        match self {
            Secondary::Margins => "margins",
            Secondary::None => "none",
        }
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RulesToml {
    threshold: u64,
    show_zeros: bool,
    rounding_base: u64,
    quantile_min_beyond: u64,
    p_percent: f64,
    secondary: Secondary,
    person_time_base: f64,
    differencing: Differencing,
    dominance: Dominance,
}

/// Disclosure rules as read from a file. Fields are private so that the values applied can never
/// drift from the text recorded in a release.
#[derive(Clone, Debug, PartialEq)]
pub struct Rules {
    threshold: u64,
    show_zeros: bool,
    rounding_base: u64,
    quantile_min_beyond: u64,
    p_percent: f64,
    secondary: Secondary,
    person_time_base: f64,
    differencing: Differencing,
    dominance: Dominance,
    path: PathBuf,
    text: String,
    sha256: String,
}

fn parse_error(path: &Path, e: toml::de::Error) -> DiscloseError {
    DiscloseError::Parse {
        path: path.to_path_buf(),
        message: e.to_string().trim().replace('\n', " "),
    }
}

fn read(path: &Path) -> Result<String, DiscloseError> {
    std::fs::read_to_string(path).map_err(|source| DiscloseError::Io {
        path: path.to_path_buf(),
        source,
    })
}

impl Rules {
    /// Reads and validates a rules file.
    pub fn load(path: &Path) -> Result<Rules, DiscloseError> {
        Rules::parse(&read(path)?, path)
    }

    /// Parses rules from TOML text; `path` names where the text came from, for errors and the
    /// release manifest.
    pub fn parse(text: &str, path: &Path) -> Result<Rules, DiscloseError> {
        let t: RulesToml = toml::from_str(text).map_err(|e| parse_error(path, e))?;
        let bad = |key: &'static str, message: String| DiscloseError::Invalid {
            path: path.to_path_buf(),
            key,
            message,
        };
        if t.threshold < 1 {
            return Err(bad("threshold", "must be at least 1".into()));
        }
        if t.dominance.n < 1 {
            return Err(bad("dominance.n", "must be at least 1".into()));
        }
        if !(t.dominance.k > 0.0 && t.dominance.k <= 100.0) {
            return Err(bad(
                "dominance.k",
                format!("{} is not a percentage in (0, 100]", t.dominance.k),
            ));
        }
        if !(t.person_time_base.is_finite() && t.person_time_base >= 0.0) {
            return Err(bad(
                "person_time_base",
                format!(
                    "{} is not a non-negative number of years",
                    t.person_time_base
                ),
            ));
        }
        if !(t.p_percent >= 0.0 && t.p_percent.is_finite()) {
            return Err(bad(
                "p_percent",
                format!("{} is not a non-negative percentage", t.p_percent),
            ));
        }
        Ok(Rules {
            threshold: t.threshold,
            show_zeros: t.show_zeros,
            rounding_base: t.rounding_base,
            quantile_min_beyond: t.quantile_min_beyond,
            p_percent: t.p_percent,
            secondary: t.secondary,
            person_time_base: t.person_time_base,
            differencing: t.differencing,
            dominance: t.dominance,
            path: path.to_path_buf(),
            text: text.to_string(),
            sha256: sluice_aggregate::sha256_hex(text.as_bytes()),
        })
    }

    /// Minimum distinct patients in a released cell.
    pub fn threshold(&self) -> u64 {
        self.threshold
    }
    /// Whether cells with no patients are released as 0.
    pub fn show_zeros(&self) -> bool {
        self.show_zeros
    }
    /// Released counts are multiples of this (0 or 1: no rounding).
    pub fn rounding_base(&self) -> u64 {
        self.rounding_base
    }
    /// Observations needed beyond a released quantile on each side.
    pub fn quantile_min_beyond(&self) -> u64 {
        self.quantile_min_beyond
    }
    pub fn p_percent(&self) -> f64 {
        self.p_percent
    }
    pub fn secondary(&self) -> Secondary {
        self.secondary
    }
    pub fn dominance(&self) -> Dominance {
        self.dominance
    }
    /// Released person-time (years) is a multiple of this (0: no rounding).
    pub fn person_time_base(&self) -> f64 {
        self.person_time_base
    }
    /// What happens to a cell that differs from an earlier release's by a few patients.
    pub fn differencing(&self) -> Differencing {
        self.differencing
    }
    /// The released value of a person-time: the nearest multiple of the person-time base (ties
    /// up). Person-time over a window's length is a patient count, so it is rounded like one.
    pub fn round_person_time(&self, years: f64) -> f64 {
        let b = self.person_time_base;
        if b <= 0.0 {
            return years;
        }
        (years / b + 0.5).floor() * b
    }
    /// The file the rules were read from.
    pub fn path(&self) -> &Path {
        &self.path
    }
    /// The exact text the rules were parsed from.
    pub fn text(&self) -> &str {
        &self.text
    }
    /// Lower-case hex SHA-256 of [`Rules::text`].
    pub fn sha256(&self) -> &str {
        &self.sha256
    }

    /// The released value of a count: nearest multiple of the rounding base (ties up), and never
    /// a non-zero count below the threshold (rounded up to the next multiple instead).
    pub fn round_count(&self, x: u64) -> u64 {
        if x == 0 {
            return 0;
        }
        let b = self.rounding_base;
        let r = if b <= 1 { x } else { (x + b / 2) / b * b };
        if r < self.threshold {
            if b <= 1 {
                self.threshold
            } else {
                self.threshold.div_ceil(b) * b
            }
        } else {
            r
        }
    }

    /// Whether a released count value obeys the rules (0 only when zeros are shown).
    pub fn count_ok(&self, x: u64) -> bool {
        if x == 0 {
            return self.show_zeros;
        }
        x >= self.threshold && (self.rounding_base <= 1 || x.is_multiple_of(self.rounding_base))
    }

    /// The quantile rule: a quantile at probability `p` of `n` observations is released only when
    /// at least `quantile_min_beyond` observations lie beyond it on each side.
    pub fn quantile_ok(&self, p: f64, n: u64) -> bool {
        if !(0.0..=1.0).contains(&p) {
            return false;
        }
        // The epsilon keeps p = 0.1, n = 100 at 10 despite binary fractions.
        let beyond = (p.min(1.0 - p) * n as f64 + 1e-9).floor();
        beyond >= self.quantile_min_beyond as f64
    }

    /// Checks the rules against the site floor; the error names the first key below it.
    pub fn check_floor(&self, floor: &Floor) -> Result<(), DiscloseError> {
        let below = |key: &'static str, value: String, requirement: String| {
            Err(DiscloseError::BelowFloor {
                rules: self.path.clone(),
                floor: floor.path.clone(),
                key,
                value,
                requirement,
            })
        };
        if self.threshold < floor.min_threshold {
            return below(
                "threshold",
                self.threshold.to_string(),
                format!("at least {}", floor.min_threshold),
            );
        }
        if self.show_zeros && !floor.allow_show_zeros {
            return below(
                "show_zeros",
                "true".into(),
                "false (the floor does not allow zeros to be shown)".into(),
            );
        }
        let base = self.rounding_base.max(1);
        let min_base = floor.min_rounding_base.max(1);
        if base < min_base || !base.is_multiple_of(min_base) {
            return below(
                "rounding_base",
                self.rounding_base.to_string(),
                format!("a multiple of {min_base}"),
            );
        }
        if self.quantile_min_beyond < floor.min_quantile_beyond {
            return below(
                "quantile_min_beyond",
                self.quantile_min_beyond.to_string(),
                format!("at least {}", floor.min_quantile_beyond),
            );
        }
        if self.dominance.n < floor.dominance_min_n {
            return below(
                "dominance.n",
                self.dominance.n.to_string(),
                format!("at least {}", floor.dominance_min_n),
            );
        }
        if self.dominance.k > floor.dominance_max_k {
            return below(
                "dominance.k",
                self.dominance.k.to_string(),
                format!("at most {}", floor.dominance_max_k),
            );
        }
        if self.p_percent < floor.min_p_percent {
            return below(
                "p_percent",
                self.p_percent.to_string(),
                format!("at least {}", floor.min_p_percent),
            );
        }
        if self.person_time_base < floor.min_person_time_base {
            return below(
                "person_time_base",
                self.person_time_base.to_string(),
                format!("at least {}", floor.min_person_time_base),
            );
        }
        if floor.require_secondary == Secondary::Margins && self.secondary != Secondary::Margins {
            return below(
                "secondary",
                self.secondary.as_str().into(),
                "\"margins\"".into(),
            );
        }
        Ok(())
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct FloorToml {
    min_threshold: u64,
    allow_show_zeros: bool,
    min_rounding_base: u64,
    min_quantile_beyond: u64,
    dominance_min_n: usize,
    dominance_max_k: f64,
    min_p_percent: f64,
    min_person_time_base: f64,
    require_secondary: Secondary,
}

/// The site's minimum disclosure rules: no release may be controlled by anything weaker.
#[derive(Clone, Debug, PartialEq)]
pub struct Floor {
    pub min_threshold: u64,
    pub allow_show_zeros: bool,
    /// The rounding base must be a multiple of this (so at least this).
    pub min_rounding_base: u64,
    pub min_quantile_beyond: u64,
    /// A dominance rule (n, k) is at least as strict as (min_n, max_k) when n ≥ min_n and
    /// k ≤ max_k: its n largest contributions sum to at least as much, against a lower share.
    pub dominance_min_n: usize,
    pub dominance_max_k: f64,
    pub min_p_percent: f64,
    /// Released person-time must be rounded to at least this many years.
    pub min_person_time_base: f64,
    pub require_secondary: Secondary,
    pub path: PathBuf,
}

impl Floor {
    pub fn load(path: &Path) -> Result<Floor, DiscloseError> {
        Floor::parse(&read(path)?, path)
    }

    pub fn parse(text: &str, path: &Path) -> Result<Floor, DiscloseError> {
        let t: FloorToml = toml::from_str(text).map_err(|e| parse_error(path, e))?;
        if t.min_threshold < 1 {
            return Err(DiscloseError::Invalid {
                path: path.to_path_buf(),
                key: "min_threshold",
                message: "must be at least 1".into(),
            });
        }
        Ok(Floor {
            min_threshold: t.min_threshold,
            allow_show_zeros: t.allow_show_zeros,
            min_rounding_base: t.min_rounding_base,
            min_quantile_beyond: t.min_quantile_beyond,
            dominance_min_n: t.dominance_min_n,
            dominance_max_k: t.dominance_max_k,
            min_p_percent: t.min_p_percent,
            min_person_time_base: t.min_person_time_base,
            require_secondary: t.require_secondary,
            path: path.to_path_buf(),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn policy(name: &str) -> PathBuf {
        Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("../../policies/disclosure")
            .join(name)
    }

    #[test]
    fn shipped_rules_meet_the_shipped_floor() {
        let rules = Rules::load(&policy("standard.toml")).unwrap();
        let floor = Floor::load(&policy("floor.toml")).unwrap();
        rules.check_floor(&floor).unwrap();
        assert_eq!(rules.threshold(), 10);
        assert_eq!(rules.rounding_base(), 5);
        assert_eq!(rules.dominance(), Dominance { n: 2, k: 80.0 });
    }

    // Crafted: lowering any one key below the floor names that key.
    #[test]
    fn lowered_keys_are_named() {
        let floor = Floor::load(&policy("floor.toml")).unwrap();
        let text = std::fs::read_to_string(policy("standard.toml")).unwrap();
        for (from, to, key) in [
            ("threshold = 10", "threshold = 5", "threshold"),
            ("rounding_base = 5", "rounding_base = 1", "rounding_base"),
            ("rounding_base = 5", "rounding_base = 7", "rounding_base"),
            ("k = 80.0", "k = 90.0", "dominance.k"),
            ("n = 2", "n = 1", "dominance.n"),
            ("p_percent = 25.0", "p_percent = 10.0", "p_percent"),
            (
                "quantile_min_beyond = 10",
                "quantile_min_beyond = 3",
                "quantile_min_beyond",
            ),
            (
                "secondary = \"margins\"",
                "secondary = \"none\"",
                "secondary",
            ),
        ] {
            assert!(text.contains(from), "{from}");
            let r = Rules::parse(&text.replace(from, to), Path::new("lowered.toml")).unwrap();
            let e = r.check_floor(&floor).unwrap_err().to_string();
            assert!(e.contains(&format!("{key} = ")), "{e}");
            assert!(
                e.contains("lowered.toml") && e.contains("floor.toml"),
                "{e}"
            );
        }
    }

    #[test]
    fn missing_and_unknown_keys_are_errors() {
        let text = std::fs::read_to_string(policy("standard.toml")).unwrap();
        let e = Rules::parse(&text.replace("threshold = 10", ""), Path::new("r.toml"))
            .unwrap_err()
            .to_string();
        assert!(e.starts_with("r.toml: ") && e.contains("threshold"), "{e}");
        let e = Rules::parse(
            &text.replace("threshold = 10", "threshhold = 10"),
            Path::new("r.toml"),
        )
        .unwrap_err()
        .to_string();
        assert!(e.contains("threshhold"), "{e}");
    }

    // Common practice: nearest multiple of 5, ties up, never below the threshold.
    #[test]
    fn rounding() {
        let text = std::fs::read_to_string(policy("standard.toml")).unwrap();
        let r = Rules::parse(&text, Path::new("r")).unwrap();
        let got: Vec<u64> = [0, 10, 11, 12, 13, 14, 15, 17, 18, 102]
            .iter()
            .map(|&x| r.round_count(x))
            .collect();
        assert_eq!(got, [0, 10, 10, 10, 15, 15, 15, 15, 20, 100]);
        let r12 = Rules::parse(
            &text.replace("threshold = 10", "threshold = 12"),
            Path::new("r"),
        )
        .unwrap();
        // 12 would round to 10, below the threshold: up to 15 instead.
        assert_eq!(r12.round_count(12), 15);
        let r10 = Rules::parse(
            &text.replace("rounding_base = 5", "rounding_base = 10"),
            Path::new("r"),
        )
        .unwrap();
        assert_eq!(r10.round_count(15), 20);
        assert_eq!(r10.round_count(14), 10);
    }
}
