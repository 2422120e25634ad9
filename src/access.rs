//! API keys and their roles: who may call what.
//!
//! Keys are held only as SHA-256 digests, whether the config gave the key, its digest or the
//! environment variable that holds it, so a key never sits in memory in a form that could be
//! logged. A presented key is hashed and compared with every stored digest in constant time,
//! without stopping at a match, so the time taken says nothing about which key (if any) matched.

use sha2::{Digest, Sha256};
use subtle::ConstantTimeEq;

/// What a key may do. Each role includes the ones before it.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, serde::Deserialize, serde::Serialize,
)]
#[serde(rename_all = "snake_case")]
pub enum Role {
    /// Score, send outcomes and examples.
    Scorer,
    /// Also read the log, models, runs, candidate and drift; retrain, roll back, freeze.
    Operator,
}

impl Role {
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Scorer => "scorer",
            Role::Operator => "operator",
        }
    }
}

/// What a route needs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Access {
    /// The dashboard page itself: it holds no data (its data comes from keyed routes).
    Open,
    /// `/healthz`, `/readyz`: open when `access.open_health` is set, else any key.
    Health,
    /// `/metrics`: open when `access.open_metrics` is set, else an operator key.
    Metrics,
    /// At least this role.
    Role(Role),
}

#[derive(Debug, thiserror::Error)]
pub enum KeyringError {
    #[error("access.keys `{name}`: environment variable {var} is not set or is shorter than 16 characters")]
    MissingEnv { name: String, var: String },
}

struct StoredKey {
    name: String,
    role: Role,
    digest: [u8; 32],
}

/// Where a key comes from: the key itself, its SHA-256 (64 hex characters, checked by the
/// config), or the environment variable that holds it.
#[derive(Clone)]
pub enum KeySecret {
    Key(String),
    Sha256Hex(String),
    Env(String),
}

/// One configured key, before it is hashed.
#[derive(Clone)]
pub struct KeySource {
    pub name: String,
    pub role: Role,
    pub secret: KeySecret,
}

/// The configured keys.
pub struct Keyring {
    keys: Vec<StoredKey>,
    open_health: bool,
    open_metrics: bool,
}

/// Why a request was refused.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Refusal {
    /// No key, or not one of ours.
    Unauthenticated,
    /// A valid key whose role is too low: (key name, its role, the role needed).
    Forbidden {
        name: String,
        has: Role,
        needs: Role,
    },
}

fn digest(key: &str) -> [u8; 32] {
    Sha256::digest(key.as_bytes()).into()
}

/// Decodes 64 hex characters (validated by the config) into a digest.
fn from_hex(text: &str) -> [u8; 32] {
    let mut out = [0u8; 32];
    for (i, byte) in out.iter_mut().enumerate() {
        *byte = u8::from_str_radix(text.get(2 * i..2 * i + 2).unwrap_or("00"), 16).unwrap_or(0);
    }
    out
}

impl Keyring {
    /// Builds the keyring from the configured keys, reading `Env` secrets now.
    pub fn new(
        sources: &[KeySource],
        open_health: bool,
        open_metrics: bool,
    ) -> Result<Keyring, KeyringError> {
        let keys = sources
            .iter()
            .map(|k| {
                let digest = match &k.secret {
                    KeySecret::Key(raw) => digest(raw),
                    KeySecret::Sha256Hex(hex) => from_hex(hex),
                    KeySecret::Env(var) => match std::env::var(var) {
                        Ok(raw) if raw.len() >= 16 => digest(&raw),
                        _ => {
                            return Err(KeyringError::MissingEnv {
                                name: k.name.clone(),
                                var: var.clone(),
                            })
                        }
                    },
                };
                Ok(StoredKey {
                    name: k.name.clone(),
                    role: k.role,
                    digest,
                })
            })
            .collect::<Result<_, _>>()?;
        Ok(Keyring {
            keys,
            open_health,
            open_metrics,
        })
    }

    /// True when no key is configured: every route is open (and the service stays on loopback).
    pub fn is_open(&self) -> bool {
        self.keys.is_empty()
    }

    /// The key's name and role, comparing against every stored digest in constant time.
    fn identify(&self, presented: &str) -> Option<(&str, Role)> {
        let presented = digest(presented);
        let mut found = None;
        for key in &self.keys {
            let equal: bool = key.digest.ct_eq(&presented).into();
            if equal && found.is_none() {
                found = Some((key.name.as_str(), key.role));
            }
        }
        found
    }

    /// Whether a request presenting `bearer` (the `Authorization: Bearer` token, if any) may
    /// call a route that needs `access`. Returns the key's name when one was used.
    pub fn check(&self, access: Access, bearer: Option<&str>) -> Result<Option<String>, Refusal> {
        let opened = match access {
            Access::Open => true,
            Access::Health => self.open_health,
            Access::Metrics => self.open_metrics,
            Access::Role(_) => false,
        };
        if self.is_open() || opened {
            return Ok(None);
        }
        let (name, role) = bearer
            .and_then(|token| self.identify(token))
            .ok_or(Refusal::Unauthenticated)?;
        let needs = match access {
            Access::Open | Access::Health => Role::Scorer,
            Access::Metrics => Role::Operator,
            Access::Role(role) => role,
        };
        if role >= needs {
            Ok(Some(name.to_owned()))
        } else {
            Err(Refusal::Forbidden {
                name: name.to_owned(),
                has: role,
                needs,
            })
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn key(name: &str, role: Role, raw: &str) -> KeySource {
        KeySource {
            name: name.into(),
            role,
            secret: KeySecret::Key(raw.into()),
        }
    }

    #[test]
    fn digests_match_the_published_sha256_test_vector() {
        // FIPS 180-2, Appendix B.1: SHA-256("abc").
        assert_eq!(
            digest("abc"),
            from_hex("ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad")
        );
    }

    #[test]
    fn roles_include_the_ones_below_and_keys_given_as_hashes_work() {
        let keys = [
            key("backend", Role::Scorer, "scorer-key-0123456789"),
            KeySource {
                name: "ops".into(),
                role: Role::Operator,
                // SHA-256 of "abc" (FIPS 180-2, B.1).
                secret: KeySecret::Sha256Hex(
                    "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad".into(),
                ),
            },
        ];
        let ring = Keyring::new(&keys, true, false).unwrap();
        let operator = Access::Role(Role::Operator);
        let scorer = Access::Role(Role::Scorer);
        assert_eq!(ring.check(scorer, Some("abc")), Ok(Some("ops".into())));
        assert_eq!(ring.check(operator, Some("abc")), Ok(Some("ops".into())));
        assert_eq!(
            ring.check(scorer, Some("scorer-key-0123456789")),
            Ok(Some("backend".into()))
        );
        assert_eq!(
            ring.check(operator, Some("scorer-key-0123456789")),
            Err(Refusal::Forbidden {
                name: "backend".into(),
                has: Role::Scorer,
                needs: Role::Operator
            })
        );
        assert_eq!(
            ring.check(scorer, Some("nope")),
            Err(Refusal::Unauthenticated)
        );
        assert_eq!(ring.check(scorer, None), Err(Refusal::Unauthenticated));
        assert_eq!(ring.check(Access::Health, None), Ok(None));
    }

    #[test]
    fn no_keys_means_open_and_a_missing_environment_key_is_an_error() {
        let open = Keyring::new(&[], true, false).unwrap();
        assert!(open.is_open());
        assert_eq!(open.check(Access::Role(Role::Operator), None), Ok(None));
        let keys = [KeySource {
            name: "env".into(),
            role: Role::Scorer,
            secret: KeySecret::Env("UNDERSTUDY_TEST_KEY_THAT_IS_NOT_SET".into()),
        }];
        assert!(matches!(
            Keyring::new(&keys, false, false),
            Err(KeyringError::MissingEnv { .. })
        ));
    }
}
