//! The pseudonymisation key: creation, the key file, and its public fingerprint.
//!
//! The key is 256 bits from the operating system's secure random source. It lives in [`Key`],
//! which zeroes its bytes on drop and never prints them. The key file is written mode 0600 and is
//! refused on load if the group or others may read it, as ssh refuses a lax private key.
//! The file is parsed by hand rather than through a TOML parser so the secret is never copied into
//! buffers we cannot wipe.

use hmac::{Hmac, KeyInit, Mac};
use sha2::Sha256;
use std::io::Write;
use std::os::unix::fs::{OpenOptionsExt, PermissionsExt};
use std::path::{Path, PathBuf};
use zeroize::{Zeroize, Zeroizing};

pub type HmacSha256 = Hmac<Sha256>;

const FORMAT: &str = "sluice-key-1";
const FINGERPRINT_LABEL: &[u8] = b"sluice:key-fingerprint:v1";

#[derive(Debug, thiserror::Error)]
pub enum KeyError {
    #[error("key file {path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("key file {path} already exists; refusing to overwrite a key")]
    Exists { path: PathBuf },
    #[error(
        "key file {path} is readable by group or others (mode {mode:o}); run: chmod 600 {path}"
    )]
    LaxPermissions { path: PathBuf, mode: u32 },
    #[error("key file {path}: line {line}: {message}")]
    Malformed {
        path: PathBuf,
        line: usize,
        message: String,
    },
    #[error("cannot get random bytes from the operating system: {0}")]
    Random(String),
}

/// A 256-bit secret. No `Clone`, no `Display`; `Debug` shows only that it is redacted.
pub struct Key {
    bytes: Zeroizing<[u8; 32]>,
    pub label: String,
    pub created: String,
}

impl std::fmt::Debug for Key {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Key")
            .field("label", &self.label)
            .field("bytes", &"<redacted>")
            .finish()
    }
}

impl Key {
    /// A fresh key from the operating system's secure random source.
    pub fn generate(label: &str) -> Result<Self, KeyError> {
        let mut bytes = Zeroizing::new([0u8; 32]);
        getrandom::fill(bytes.as_mut()).map_err(|e| KeyError::Random(e.to_string()))?;
        Ok(Self {
            bytes,
            label: label.to_string(),
            created: chrono::Utc::now().format("%Y-%m-%dT%H:%M:%SZ").to_string(),
        })
    }

    /// A key from known bytes (tests and published vectors only).
    pub fn from_bytes(bytes: [u8; 32], label: &str) -> Self {
        Self {
            bytes: Zeroizing::new(bytes),
            label: label.to_string(),
            created: String::new(),
        }
    }

    /// A keyed HMAC-SHA256 state, ready for input.
    pub fn mac(&self) -> HmacSha256 {
        <HmacSha256 as KeyInit>::new_from_slice(self.bytes.as_ref())
            .expect("HMAC takes any key length")
    }

    /// A public fingerprint: a keyed hash of a fixed label (never the key), 128 bits in hex.
    /// Stores and releases record it so that a store can refuse a different key later.
    pub fn fingerprint(&self) -> String {
        let mut m = self.mac();
        m.update(FINGERPRINT_LABEL);
        let out = m.finalize().into_bytes();
        hex::encode(&out[..16])
    }

    /// Writes the key file, created with mode 0600; refuses to overwrite.
    pub fn save(&self, path: &Path) -> Result<(), KeyError> {
        let io = |source| KeyError::Io {
            path: path.to_path_buf(),
            source,
        };
        let mut f = std::fs::OpenOptions::new()
            .write(true)
            .create_new(true)
            .mode(0o600)
            .open(path)
            .map_err(|e| {
                if e.kind() == std::io::ErrorKind::AlreadyExists {
                    KeyError::Exists {
                        path: path.to_path_buf(),
                    }
                } else {
                    io(e)
                }
            })?;
        let mut text = Zeroizing::new(String::new());
        text.push_str(
            "# sluice pseudonymisation key. Secret: keep it inside the secure environment,\n\
             # mode 0600, and never copy it out. Losing it means pseudonyms cannot be reproduced.\n",
        );
        text.push_str(&format!("format = \"{FORMAT}\"\n"));
        text.push_str(&format!("label = \"{}\"\n", self.label.replace('"', "'")));
        text.push_str(&format!("created = \"{}\"\n", self.created));
        text.push_str("key = \"");
        let mut hexed = Zeroizing::new(hex::encode(self.bytes.as_ref()));
        text.push_str(&hexed);
        hexed.zeroize();
        text.push_str("\"\n");
        f.write_all(text.as_bytes()).map_err(io)?;
        f.sync_all().map_err(io)
    }

    /// Loads a key file, refusing lax permissions and malformed content.
    pub fn load(path: &Path) -> Result<Self, KeyError> {
        let io = |source| KeyError::Io {
            path: path.to_path_buf(),
            source,
        };
        let meta = std::fs::metadata(path).map_err(io)?;
        let mode = meta.permissions().mode() & 0o777;
        if mode & 0o077 != 0 {
            return Err(KeyError::LaxPermissions {
                path: path.to_path_buf(),
                mode,
            });
        }
        let bytes = Zeroizing::new(std::fs::read(path).map_err(io)?);
        let bad = |line: usize, message: &str| KeyError::Malformed {
            path: path.to_path_buf(),
            line,
            message: message.to_string(),
        };
        let text = std::str::from_utf8(&bytes).map_err(|_| bad(0, "not UTF-8 text"))?;
        let (mut format, mut label, mut created, mut key) = (None, None, None, None);
        for (i, l) in text.lines().enumerate() {
            let l = l.trim();
            if l.is_empty() || l.starts_with('#') {
                continue;
            }
            let (k, v) = l
                .split_once('=')
                .ok_or_else(|| bad(i + 1, "expected name = \"value\""))?;
            let v = v.trim();
            let v = v
                .strip_prefix('"')
                .and_then(|v| v.strip_suffix('"'))
                .ok_or_else(|| bad(i + 1, "value must be in double quotes"))?;
            match k.trim() {
                "format" => format = Some(v.to_string()),
                "label" => label = Some(v.to_string()),
                "created" => created = Some(v.to_string()),
                "key" => key = Some((i + 1, v)),
                other => return Err(bad(i + 1, &format!("unknown entry {other:?}"))),
            }
        }
        if format.as_deref() != Some(FORMAT) {
            return Err(bad(
                0,
                &format!("not a {FORMAT} key file (format line missing or different)"),
            ));
        }
        let (line, hexkey) = key.ok_or_else(|| bad(0, "no key line"))?;
        if hexkey.len() != 64 {
            return Err(bad(
                line,
                &format!(
                    "key must be 64 hex digits (256 bits), found {} characters",
                    hexkey.len()
                ),
            ));
        }
        let mut out = Zeroizing::new([0u8; 32]);
        hex::decode_to_slice(hexkey, out.as_mut())
            .map_err(|_| bad(line, "key is not hexadecimal"))?;
        Ok(Self {
            bytes: out,
            label: label.unwrap_or_default(),
            created: created.unwrap_or_default(),
        })
    }
}
