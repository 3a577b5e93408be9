//! Canonical terms that every site's local codes are mapped onto.

use serde::{Deserialize, Serialize};

/// Where the request came from. Sites have many local location codes; profiles map each onto one
/// of these four.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Setting {
    Community,
    Outpatient,
    Inpatient,
    Emergency,
}

impl Setting {
    pub const ALL: [Setting; 4] = [
        Setting::Community,
        Setting::Outpatient,
        Setting::Inpatient,
        Setting::Emergency,
    ];
    pub fn as_str(self) -> &'static str {
        match self {
            Setting::Community => "community",
            Setting::Outpatient => "outpatient",
            Setting::Inpatient => "inpatient",
            Setting::Emergency => "emergency",
        }
    }
    pub fn code(self) -> u8 {
        self as u8
    }
    pub fn from_code(code: u8) -> Option<Self> {
        Self::ALL.get(code as usize).copied()
    }
}

/// The state of one reported result.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Status {
    Final,
    Amended,
    Cancelled,
}

impl Status {
    pub fn as_str(self) -> &'static str {
        match self {
            Status::Final => "final",
            Status::Amended => "amended",
            Status::Cancelled => "cancelled",
        }
    }
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Sex {
    Female,
    Male,
    Unknown,
}

impl Sex {
    pub const ALL: [Sex; 3] = [Sex::Female, Sex::Male, Sex::Unknown];
    pub fn as_str(self) -> &'static str {
        match self {
            Sex::Female => "female",
            Sex::Male => "male",
            Sex::Unknown => "unknown",
        }
    }
    pub fn code(self) -> u8 {
        self as u8
    }
}
