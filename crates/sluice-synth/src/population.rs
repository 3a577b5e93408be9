//! The synthetic population: identities, registrations and the planted methotrexate groups with
//! their monitoring schedules.

use crate::region::{Region, pick_weighted};
use rand::Rng;
use rand_distr::{Distribution, Gamma, Normal};
use serde::Serialize;
use sluice_policy::{Sex, nhs};

/// What the generator planted for one patient; the study must recover it.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Group {
    /// Unrelated testing only.
    Background,
    /// Long-term methotrexate, stable before the history starts, monitored throughout.
    MtxStable,
    /// Methotrexate with another DMARD (excluded by a study's co-medication rule).
    MtxOtherDmard,
    /// Started methotrexate near the baseline window (excluded by the stability rule).
    MtxRecentStart,
    /// Stopped monitoring soon after the policy change (excluded by the continuation rule).
    MtxStopped,
}

impl Group {
    pub fn as_str(self) -> &'static str {
        match self {
            Group::Background => "background",
            Group::MtxStable => "mtx_stable",
            Group::MtxOtherDmard => "mtx_other_dmard",
            Group::MtxRecentStart => "mtx_recent_start",
            Group::MtxStopped => "mtx_stopped",
        }
    }
}

/// A monitoring schedule: a nominal interval in days with a jitter that never crosses a band.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Schedule {
    Fortnightly,
    Monthly,
    ThreeMonthly,
    FiveMonthly,
}

impl Schedule {
    pub fn as_str(self) -> &'static str {
        match self {
            Schedule::Fortnightly => "fortnightly",
            Schedule::Monthly => "monthly",
            Schedule::ThreeMonthly => "three_monthly",
            Schedule::FiveMonthly => "five_monthly",
        }
    }
    /// (nominal days, jitter sd, jitter clamp): monthly stays within 21–35 days, three-monthly
    /// within 77–105, five-monthly within 132–172, so the bands of the shipped study policy
    /// (≤ 45, 46–75, 76–120, ≥ 121 days) classify every patient unambiguously.
    fn interval(self) -> (f64, f64, f64) {
        match self {
            Schedule::Fortnightly => (14.0, 1.5, 3.0),
            Schedule::Monthly => (28.0, 3.0, 7.0),
            Schedule::ThreeMonthly => (91.0, 7.0, 14.0),
            Schedule::FiveMonthly => (152.0, 10.0, 20.0),
        }
    }
    pub fn draw_days(self, rng: &mut impl Rng) -> i64 {
        let (mean, sd, clamp) = self.interval();
        let j: f64 = Normal::new(0.0, sd).expect("sd").sample(rng);
        (mean + j.clamp(-clamp, clamp)).round() as i64
    }
}

#[derive(Clone, Debug)]
pub struct Patient {
    pub nhs: [u8; 10],
    /// Written with spaces ("999 123 4567") on this patient's rows.
    pub nhs_spaced: bool,
    pub mrn: u32,
    pub birth_day: i64,
    pub sex: Sex,
    pub postcode: u32,
    pub practice: u16,
    /// Relative request rate (mean 1).
    pub frailty: f32,
    pub group: Group,
    pub mtx: Option<Box<Mtx>>,
}

/// Everything about a patient on methotrexate.
#[derive(Clone, Debug)]
pub struct Mtx {
    pub before: Schedule,
    pub after: Schedule,
    /// Day numbers (days since 1970-01-01) of every monitoring request, ascending.
    pub days: Vec<i64>,
    pub dose: u32,
    /// Index into `text::OTHER_DMARDS` for co-prescribed patients.
    pub other_dmard: Option<usize>,
    /// Patient's own level of each monitoring analyte, in sd units.
    pub shift: [f32; 9],
    /// Usual setting of monitoring: true for a hospital clinic (outpatient), else the GP.
    pub clinic: bool,
}

pub struct Plan {
    pub start_day: i64,
    pub end_day: i64,
    pub change_day: i64,
    /// Baseline window start (12 months before the change).
    pub baseline_day: i64,
}

/// Makes `n` distinct NHS numbers from the never-issued 999 range that pass modulus 11.
fn nhs_numbers(rng: &mut impl Rng, n: usize) -> Vec<[u8; 10]> {
    let mut seen = std::collections::HashSet::with_capacity(n);
    let mut out = Vec::with_capacity(n);
    while out.len() < n {
        let body: u32 = rng.random_range(0..1_000_000);
        let mut nine = [9u8, 9, 9, 0, 0, 0, 0, 0, 0];
        let mut b = body;
        for i in (3..9).rev() {
            nine[i] = (b % 10) as u8;
            b /= 10;
        }
        let Some(check) = nhs::check_digit(&nine) else {
            continue;
        };
        if body == 999_999 {
            continue; // 9999999999 is an all-equal placeholder, never a person's number
        }
        if !seen.insert(body) {
            continue;
        }
        let mut d = [0u8; 10];
        d[..9].copy_from_slice(&nine);
        d[9] = check;
        out.push(d);
    }
    out
}

pub fn generate(
    rng: &mut impl Rng,
    region: &Region,
    n: usize,
    mtx_share: f64,
    plan: &Plan,
) -> Vec<Patient> {
    let numbers = nhs_numbers(rng, n);
    let frailty = Gamma::new(0.8, 1.0 / 0.8).expect("gamma");
    let mut patients = Vec::with_capacity(n);
    for (i, nhs) in numbers.into_iter().enumerate() {
        let on_mtx = rng.random_bool(mtx_share);
        let group = if on_mtx {
            [
                Group::MtxStable,
                Group::MtxOtherDmard,
                Group::MtxRecentStart,
                Group::MtxStopped,
            ][pick_weighted(rng, [0.70, 0.12, 0.10, 0.08].into_iter())]
        } else {
            Group::Background
        };
        // A lab's population is older than the general one; methotrexate users are adults.
        let age_years: f64 = if on_mtx {
            rng.random_range(25.0..88.0)
        } else if rng.random_bool(0.08) {
            rng.random_range(0.0..18.0)
        } else {
            rng.random_range(18.0..97.0)
        };
        let sex = if on_mtx {
            if rng.random_bool(0.7) {
                Sex::Female
            } else {
                Sex::Male
            }
        } else {
            match rng.random_range(0..200) {
                0 => Sex::Unknown,
                k if k % 2 == 0 => Sex::Female,
                _ => Sex::Male,
            }
        };
        let postcode = rng.random_range(0..region.postcodes.len());
        let town = region.postcodes[postcode].town;
        let local: Vec<usize> = (0..region.practices.len())
            .filter(|&p| region.practices[p].town == town)
            .collect();
        let practice = if !local.is_empty() && rng.random_bool(0.85) {
            local[rng.random_range(0..local.len())]
        } else {
            rng.random_range(0..region.practices.len())
        };
        let mtx = on_mtx.then(|| Box::new(mtx_plan(rng, group, plan)));
        patients.push(Patient {
            nhs,
            nhs_spaced: rng.random_bool(0.1),
            mrn: 1_000_000 + i as u32 * 7 % 9_000_000,
            birth_day: plan.start_day - (age_years * 365.25) as i64,
            sex,
            postcode: postcode as u32,
            practice: practice as u16,
            frailty: frailty.sample(rng) as f32,
            group,
            mtx,
        });
    }
    patients
}

fn mtx_plan(rng: &mut impl Rng, group: Group, plan: &Plan) -> Mtx {
    let (before, after) = match group {
        Group::MtxStable => [
            (Schedule::Monthly, Schedule::ThreeMonthly),
            (Schedule::ThreeMonthly, Schedule::FiveMonthly),
            (Schedule::Monthly, Schedule::Monthly),
            (Schedule::ThreeMonthly, Schedule::ThreeMonthly),
        ][pick_weighted(rng, [0.35, 0.30, 0.15, 0.20].into_iter())],
        Group::MtxRecentStart => (Schedule::ThreeMonthly, Schedule::ThreeMonthly),
        _ => {
            let s = if rng.random_bool(0.5) {
                Schedule::Monthly
            } else {
                Schedule::ThreeMonthly
            };
            (s, s)
        }
    };
    let mut days = Vec::new();
    match group {
        Group::MtxRecentStart => {
            // The rheumatology schedule for a new start: fortnightly for six weeks, monthly for
            // three months, then every three months. Starts fall from two months before the
            // baseline window to three months before the change.
            let mut t = rng.random_range(plan.baseline_day - 61..plan.change_day - 91);
            for _ in 0..4 {
                days.push(t);
                t += Schedule::Fortnightly.draw_days(rng);
            }
            for _ in 0..3 {
                days.push(t);
                t += Schedule::Monthly.draw_days(rng);
            }
            while t < plan.end_day - 2 {
                days.push(t);
                t += Schedule::ThreeMonthly.draw_days(rng);
            }
        }
        _ => {
            // Stable patients were monitored before the history starts; the first request seen
            // falls in its first two months.
            let mut t = plan.start_day + rng.random_range(0..60);
            while t < plan.end_day - 2 {
                days.push(t);
                if group == Group::MtxStopped && t >= plan.change_day {
                    break;
                }
                let schedule = if t >= plan.change_day { after } else { before };
                let mut next = t + schedule.draw_days(rng);
                // The first interval that reaches past the change already follows the new policy.
                if t < plan.change_day && next >= plan.change_day {
                    next = t + after.draw_days(rng);
                }
                t = next;
            }
        }
    }
    let other_dmard = (group == Group::MtxOtherDmard)
        .then(|| rng.random_range(0..crate::text::OTHER_DMARDS.len()));
    let shift_d = Normal::new(0.0, 0.6).expect("sd");
    let mut shift = [0f32; 9];
    for s in &mut shift {
        *s = shift_d.sample(rng) as f32;
    }
    Mtx {
        before,
        after,
        days,
        dose: [7, 10, 12, 15, 17, 20, 25][rng.random_range(0..7)],
        other_dmard,
        shift,
        clinic: rng.random_bool(0.25),
    }
}
