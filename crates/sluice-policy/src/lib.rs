//! The shared vocabulary of sluice and the policy files that speak it.
//!
//! Every stage agrees on a handful of canonical terms (settings, result statuses, sexes, analytes)
//! and reads its instructions from TOML policy files under `policies/`. This crate owns both: the
//! enums, the NHS number rule, and typed loaders that reject a bad policy with the file and key.

pub mod analytes;
pub mod error;
pub mod nhs;
pub mod profile;
pub mod vocab;

pub use analytes::{Analyte, AnalyteTable};
pub use error::PolicyError;
pub use profile::Profile;
pub use vocab::{Setting, Sex, Status};

use sha2::{Digest, Sha256};
use std::path::Path;

/// A policy file's text together with its SHA-256, so stores and releases can record exactly which
/// policy produced them.
#[derive(Clone)]
pub struct PolicyText {
    pub path: std::path::PathBuf,
    pub text: String,
    pub sha256: String,
}

impl PolicyText {
    pub fn read(path: &Path) -> Result<Self, PolicyError> {
        let bytes = std::fs::read(path).map_err(|source| PolicyError::Io {
            path: path.to_path_buf(),
            source,
        })?;
        let sha256 = hex::encode(Sha256::digest(&bytes));
        let text = String::from_utf8(bytes).map_err(|_| PolicyError::NotUtf8 {
            path: path.to_path_buf(),
        })?;
        Ok(Self {
            path: path.to_path_buf(),
            text,
            sha256,
        })
    }

    /// Parses the text as TOML into `T`, naming the file in any error.
    pub fn parse<T: serde::de::DeserializeOwned>(&self) -> Result<T, PolicyError> {
        toml::from_str(&self.text).map_err(|e| PolicyError::Toml {
            path: self.path.clone(),
            message: e.to_string(),
        })
    }
}
