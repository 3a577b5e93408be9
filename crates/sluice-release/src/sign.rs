//! Reviewer keys and the site's register of reviewers: an approval is an Ed25519 signature by a
//! registered IG officer, not a file anyone can write.
//!
//! A reviewer's secret key lives in a file of their own (mode 0600, zeroized in memory, never
//! printed); its public half is registered in `policies/disclosure/reviewers.toml`, which the IG
//! function keeps and analysts cannot change. `export` and `pool` accept only approvals whose
//! signature verifies against a registered key under the same name.

use ed25519_dalek::{Signer, SigningKey, VerifyingKey};
use serde::Deserialize;
use std::path::{Path, PathBuf};
use zeroize::Zeroizing;

use crate::{ReleaseError, io};

/// A reviewer's signing key. No `Debug`, no `Clone`: the secret never leaves this type except
/// into the key file.
pub struct ReviewerKey {
    name: String,
    secret: Zeroizing<[u8; 32]>,
}

fn bad(path: &Path, message: String) -> ReleaseError {
    ReleaseError::Format {
        path: path.to_path_buf(),
        message,
    }
}

impl ReviewerKey {
    /// A new key from the operating system's random source.
    pub fn generate(name: &str) -> Result<ReviewerKey, ReleaseError> {
        if name.trim().is_empty() {
            return Err(bad(
                Path::new("reviewer"),
                "the reviewer's name is empty".into(),
            ));
        }
        let mut secret = Zeroizing::new([0u8; 32]);
        getrandom::fill(secret.as_mut())
            .map_err(|e| bad(Path::new("reviewer"), format!("no random source: {e}")))?;
        Ok(ReviewerKey {
            name: name.into(),
            secret,
        })
    }

    pub fn name(&self) -> &str {
        &self.name
    }

    /// The public key, lower-case hex: what the site registers.
    pub fn public_hex(&self) -> String {
        hex::encode(
            SigningKey::from_bytes(&self.secret)
                .verifying_key()
                .to_bytes(),
        )
    }

    /// Signs `message`; the signature in lower-case hex.
    pub fn sign(&self, message: &[u8]) -> String {
        hex::encode(
            SigningKey::from_bytes(&self.secret)
                .sign(message)
                .to_bytes(),
        )
    }

    /// Writes `name` and the secret (hex) to a new file readable by its owner only.
    pub fn save(&self, path: &Path) -> Result<(), ReleaseError> {
        use std::io::Write;
        let mut o = std::fs::OpenOptions::new();
        o.write(true).create_new(true);
        #[cfg(unix)]
        {
            use std::os::unix::fs::OpenOptionsExt;
            o.mode(0o600);
        }
        let mut f = o.open(path).map_err(io(path))?;
        let text = Zeroizing::new(format!(
            "sluice reviewer key\nname = {}\nsecret = {}\n",
            self.name,
            hex::encode(self.secret.as_ref())
        ));
        f.write_all(text.as_bytes()).map_err(io(path))
    }

    pub fn load(path: &Path) -> Result<ReviewerKey, ReleaseError> {
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let mode = std::fs::metadata(path)
                .map_err(io(path))?
                .permissions()
                .mode();
            if mode & 0o077 != 0 {
                return Err(bad(
                    path,
                    format!(
                        "mode {:o}: a reviewer key must be readable by its owner only (chmod 600)",
                        mode & 0o777
                    ),
                ));
            }
        }
        let text = Zeroizing::new(std::fs::read_to_string(path).map_err(io(path))?);
        let mut lines = text.lines();
        if lines.next() != Some("sluice reviewer key") {
            return Err(bad(path, "not a sluice reviewer key".into()));
        }
        let mut name = None;
        let mut secret = Zeroizing::new([0u8; 32]);
        let mut have_secret = false;
        for l in lines {
            if let Some(n) = l.strip_prefix("name = ") {
                name = Some(n.to_string());
            } else if let Some(h) = l.strip_prefix("secret = ") {
                hex::decode_to_slice(h.trim(), secret.as_mut())
                    .map_err(|_| bad(path, "the secret is not 64 hex digits".into()))?;
                have_secret = true;
            }
        }
        match (name, have_secret) {
            (Some(name), true) => Ok(ReviewerKey { name, secret }),
            _ => Err(bad(path, "needs a name and a secret line".into())),
        }
    }
}

#[derive(Clone, Debug, PartialEq, Eq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Registered {
    pub name: String,
    pub public_key: String,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RegistryToml {
    two_person: bool,
    #[serde(default)]
    reviewer: Vec<Registered>,
}

/// The site's reviewers (`reviewers.toml`) and whether the maker of a release may approve it.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Registry {
    /// A release may not be approved by the person who made it.
    pub two_person: bool,
    pub reviewers: Vec<Registered>,
    pub path: PathBuf,
}

impl Registry {
    pub fn load(path: &Path) -> Result<Registry, ReleaseError> {
        let text = std::fs::read_to_string(path).map_err(io(path))?;
        Registry::parse(&text, path)
    }

    pub fn parse(text: &str, path: &Path) -> Result<Registry, ReleaseError> {
        let t: RegistryToml =
            toml::from_str(text).map_err(|e| bad(path, e.to_string().trim().replace('\n', " ")))?;
        for r in &t.reviewer {
            let ok = hex::decode(&r.public_key)
                .ok()
                .and_then(|b| <[u8; 32]>::try_from(b).ok())
                .is_some_and(|b| VerifyingKey::from_bytes(&b).is_ok());
            if !ok {
                return Err(bad(
                    path,
                    format!(
                        "reviewer {:?}: public_key is not an Ed25519 public key in hex",
                        r.name
                    ),
                ));
            }
        }
        Ok(Registry {
            two_person: t.two_person,
            reviewers: t.reviewer,
            path: path.to_path_buf(),
        })
    }

    /// Whether `name` is registered with `public_key`.
    pub fn is_registered(&self, name: &str, public_key: &str) -> bool {
        self.reviewers
            .iter()
            .any(|r| r.name == name && r.public_key.eq_ignore_ascii_case(public_key))
    }
}

/// Verifies a hex signature of `message` by the hex public key.
pub fn verify(public_key: &str, message: &[u8], signature: &str) -> Result<(), String> {
    let key: [u8; 32] = hex::decode(public_key)
        .ok()
        .and_then(|b| b.try_into().ok())
        .ok_or("the public key is not 32 bytes of hex")?;
    let key = VerifyingKey::from_bytes(&key).map_err(|e| e.to_string())?;
    let sig: [u8; 64] = hex::decode(signature)
        .ok()
        .and_then(|b| b.try_into().ok())
        .ok_or("the signature is not 64 bytes of hex")?;
    key.verify_strict(message, &ed25519_dalek::Signature::from_bytes(&sig))
        .map_err(|_| "the signature does not verify".to_string())
}

#[cfg(test)]
mod tests {
    use super::*;

    // RFC 8032 §7.1, test 1: the empty message under the published secret key gives the
    // published public key and signature (values recalled from memory of the RFC).
    #[test]
    fn rfc8032_test_vector_1() {
        let mut secret = Zeroizing::new([0u8; 32]);
        hex::decode_to_slice(
            "9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60",
            secret.as_mut(),
        )
        .unwrap();
        let k = ReviewerKey {
            name: "t".into(),
            secret,
        };
        assert_eq!(
            k.public_hex(),
            "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a"
        );
        let sig = k.sign(b"");
        assert_eq!(
            sig,
            "e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555fb8821590a33bacc61e39701cf9b46bd25bf5f0595bbe24655141438e7a100b"
        );
        assert!(verify(&k.public_hex(), b"", &sig).is_ok());
        assert!(verify(&k.public_hex(), b"x", &sig).is_err());
    }
}
