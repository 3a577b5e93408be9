//! Errors raised while reading or validating a policy file.

use std::path::PathBuf;

#[derive(Debug, thiserror::Error)]
pub enum PolicyError {
    #[error("cannot read policy {path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("policy {path} is not valid UTF-8")]
    NotUtf8 { path: PathBuf },
    #[error("policy {path}: {message}")]
    Toml { path: PathBuf, message: String },
    #[error("policy {path}: key `{key}`: {message}")]
    Invalid {
        path: PathBuf,
        key: String,
        message: String,
    },
}

impl PolicyError {
    pub fn invalid(
        path: &std::path::Path,
        key: impl Into<String>,
        message: impl Into<String>,
    ) -> Self {
        Self::Invalid {
            path: path.to_path_buf(),
            key: key.into(),
            message: message.into(),
        }
    }
}
