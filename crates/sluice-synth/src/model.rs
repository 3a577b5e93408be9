//! Result distributions, request panels and critical limits of the synthetic population.
//!
//! Ordinary results are drawn inside the critical limits (with a margin) so that every critical
//! value in the data is a planted one and the ground truth can list them all. The limits are the
//! Royal College of Pathologists' G158 adult biochemistry limits (2017) and, for haematology, the
//! commonly used limits recalled from memory (haemoglobin < 60 g/L, neutrophils < 0.5, platelets
//! < 30 ×10⁹/L, INR > 8); the study policies carry the same values with their sources.

use rand::Rng;
use rand_distr::{Distribution, Normal};

#[derive(Clone, Copy, Debug)]
pub enum Shape {
    Normal { mean: f64, sd: f64 },
    LogNormal { median: f64, sdlog: f64 },
}

#[derive(Clone, Copy, Debug)]
pub struct AnalyteModel {
    /// Canonical analyte id, as in `policies/analytes.toml`.
    pub id: &'static str,
    pub shape: Shape,
    pub decimals: u8,
    /// Ordinary values are clamped to this range; outside it lie only planted criticals.
    pub lo: f64,
    pub hi: f64,
    /// Planted critical values are drawn from these ranges (low side, high side).
    pub crit_low: Option<(f64, f64)>,
    pub crit_high: Option<(f64, f64)>,
}

const fn n(mean: f64, sd: f64) -> Shape {
    Shape::Normal { mean, sd }
}
const fn ln(median: f64, sdlog: f64) -> Shape {
    Shape::LogNormal { median, sdlog }
}

macro_rules! a {
    ($id:literal, $shape:expr, $dec:literal, $lo:expr, $hi:expr, $cl:expr, $ch:expr) => {
        AnalyteModel {
            id: $id,
            shape: $shape,
            decimals: $dec,
            lo: $lo,
            hi: $hi,
            crit_low: $cl,
            crit_high: $ch,
        }
    };
}

/// Every analyte the generator writes. Indices into this table are the generator's analyte codes.
pub const ANALYTES: [AnalyteModel; 23] = [
    a!(
        "sodium",
        n(139.0, 3.0),
        0,
        122.0,
        158.0,
        Some((112.0, 119.0)),
        Some((161.0, 168.0))
    ),
    a!(
        "potassium",
        n(4.3, 0.45),
        1,
        2.7,
        6.3,
        Some((1.9, 2.4)),
        Some((6.6, 7.6))
    ),
    a!("urea", ln(5.5, 0.4), 1, 1.0, 28.0, None, Some((31.0, 48.0))),
    a!(
        "creatinine",
        ln(80.0, 0.3),
        0,
        30.0,
        340.0,
        None,
        Some((360.0, 720.0))
    ),
    a!("egfr", n(80.0, 18.0), 0, 8.0, 140.0, None, None),
    a!(
        "glucose",
        ln(5.4, 0.2),
        1,
        2.7,
        24.0,
        Some((1.4, 2.4)),
        Some((26.0, 38.0))
    ),
    a!("hba1c", ln(40.0, 0.25), 0, 20.0, 140.0, None, None),
    a!("tsh", ln(1.8, 0.6), 2, 0.01, 60.0, None, None),
    a!(
        "adjusted_calcium",
        n(2.35, 0.1),
        2,
        1.9,
        3.4,
        Some((1.4, 1.75)),
        Some((3.55, 3.95))
    ),
    a!(
        "magnesium",
        n(0.85, 0.08),
        2,
        0.45,
        1.6,
        Some((0.2, 0.38)),
        None
    ),
    a!(
        "phosphate",
        n(1.1, 0.2),
        2,
        0.35,
        2.5,
        Some((0.12, 0.28)),
        None
    ),
    a!(
        "ck",
        ln(100.0, 0.6),
        0,
        20.0,
        4800.0,
        None,
        Some((5200.0, 24000.0))
    ),
    a!(
        "alt",
        ln(22.0, 0.5),
        0,
        2.0,
        580.0,
        None,
        Some((620.0, 2400.0))
    ),
    a!("ast", ln(24.0, 0.4), 0, 5.0, 500.0, None, None),
    a!("albumin", n(40.0, 4.0), 0, 15.0, 55.0, None, None),
    a!(
        "haemoglobin",
        n(135.0, 15.0),
        0,
        62.0,
        200.0,
        Some((42.0, 59.0)),
        None
    ),
    a!("wbc", ln(7.0, 0.3), 1, 0.8, 60.0, None, None),
    a!(
        "neutrophils",
        ln(4.2, 0.35),
        2,
        0.55,
        40.0,
        Some((0.05, 0.45)),
        None
    ),
    a!("lymphocytes", ln(1.9, 0.35), 2, 0.1, 20.0, None, None),
    a!("eosinophils", ln(0.15, 0.6), 2, 0.0, 5.0, None, None),
    a!(
        "platelets",
        n(260.0, 60.0),
        0,
        32.0,
        900.0,
        Some((5.0, 28.0)),
        None
    ),
    a!("mcv", n(90.0, 5.0), 1, 60.0, 125.0, None, None),
    a!("inr", ln(1.0, 0.1), 1, 0.8, 7.8, None, Some((8.2, 12.0))),
];

pub fn index(id: &str) -> usize {
    ANALYTES
        .iter()
        .position(|a| a.id == id)
        .unwrap_or_else(|| panic!("analyte {id} is not in the generator's model"))
}

/// Draws an ordinary value. `shift` moves the patient's own level, in units of the analyte's
/// spread, so that repeated results of one patient are correlated.
pub fn draw(rng: &mut impl Rng, a: &AnalyteModel, shift: f64, within: f64) -> f64 {
    let z: f64 = Normal::new(0.0, within).expect("positive sd").sample(rng);
    let v = match a.shape {
        Shape::Normal { mean, sd } => mean + sd * (shift + z),
        Shape::LogNormal { median, sdlog } => median * (sdlog * (shift + z)).exp(),
    };
    round_to(v.clamp(a.lo, a.hi), a.decimals)
}

pub fn round_to(v: f64, decimals: u8) -> f64 {
    let p = 10f64.powi(i32::from(decimals));
    (v * p).round() / p
}

/// A planted critical value for an analyte that has a critical limit on at least one side.
pub fn draw_critical(rng: &mut impl Rng, a: &AnalyteModel) -> Option<f64> {
    let (lo, hi) = match (a.crit_low, a.crit_high) {
        (Some(l), Some(h)) => {
            if rng.random_bool(0.5) {
                l
            } else {
                h
            }
        }
        (Some(l), None) => l,
        (None, Some(h)) => h,
        (None, None) => return None,
    };
    Some(round_to(rng.random_range(lo..=hi), a.decimals))
}

// Request panels: the analytes of one specimen.
pub const UE: &[&str] = &["sodium", "potassium", "urea", "creatinine", "egfr"];
pub const FBC: &[&str] = &[
    "haemoglobin",
    "wbc",
    "neutrophils",
    "lymphocytes",
    "platelets",
    "mcv",
];
pub const LFT: &[&str] = &["alt", "ast", "albumin"];
pub const BONE: &[&str] = &["adjusted_calcium", "phosphate", "magnesium"];
pub const DIAB: &[&str] = &["glucose", "hba1c"];
pub const THY: &[&str] = &["tsh"];
pub const COAG: &[&str] = &["inr"];
pub const CK: &[&str] = &["ck"];

/// The DMARD monitoring set: full blood count, liver and renal.
pub const MONITORING: &[&str] = &[
    "wbc",
    "neutrophils",
    "lymphocytes",
    "platelets",
    "mcv",
    "alt",
    "albumin",
    "creatinine",
    "egfr",
];

/// Tests that are requested and then cancelled (sample insufficient, duplicate request ...).
pub const CANCELLABLE: &[&str] = &["ck", "tsh", "inr", "hba1c", "eosinophils"];

/// Panels by setting, with weights. Community requests are small; acute ones are broad.
pub fn panels(setting_is_acute: bool) -> &'static [(&'static [&'static [&'static str]], f64)] {
    if setting_is_acute {
        &[
            (&[UE, FBC], 0.40),
            (&[UE, FBC, LFT, DIAB], 0.22),
            (&[UE, BONE], 0.15),
            (&[FBC, COAG], 0.10),
            (&[UE, CK], 0.08),
            (&[UE], 0.05),
        ]
    } else {
        &[
            (&[UE], 0.30),
            (&[FBC], 0.22),
            (&[LFT], 0.08),
            (&[DIAB], 0.12),
            (&[THY], 0.10),
            (&[BONE], 0.05),
            (&[UE, FBC, LFT], 0.13),
        ]
    }
}

/// Mean number of result rows of a background specimen, used to scale the request rate so that a
/// run writes about the number of rows asked for.
pub fn mean_panel_rows(acute: bool) -> f64 {
    panels(acute)
        .iter()
        .map(|(sets, w)| w * sets.iter().map(|s| s.len() as f64).sum::<f64>())
        .sum::<f64>()
        / panels(acute).iter().map(|(_, w)| w).sum::<f64>()
}
