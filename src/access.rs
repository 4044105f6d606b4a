//! Who may do what. Callers present an API key as `Authorization: Bearer <key>`; weir holds
//! only the SHA-256 of each key (keys are 256 random bits, so a fast hash is enough: there is
//! nothing to guess), compares digests in constant time, and knows each key by a name that is
//! the only thing written to logs.
//!
//! Four roles, one per kind of caller:
//!
//! | role | for | may |
//! |---|---|---|
//! | `claims_system` | the claims platform filing claims | post claims, read the decisions on claims it filed |
//! | `investigator` | special investigations staff | read and lease queues, read claims, post outcomes |
//! | `analyst` | fraud and model analysts | read claims, monitoring, the report, the training export |
//! | `administrator` | whoever runs weir | load models and rules, legal holds, retention, claimant export |
//!
//! A key may carry several roles. The route table lives in [`crate::http`].

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::path::Path;
use subtle::ConstantTimeEq;

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Role {
    ClaimsSystem,
    Investigator,
    Analyst,
    Administrator,
}

impl Role {
    pub const ALL: [Role; 4] = [
        Role::ClaimsSystem,
        Role::Investigator,
        Role::Analyst,
        Role::Administrator,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            Role::ClaimsSystem => "claims_system",
            Role::Investigator => "investigator",
            Role::Analyst => "analyst",
            Role::Administrator => "administrator",
        }
    }

    pub fn parse(s: &str) -> Option<Role> {
        Role::ALL.into_iter().find(|r| r.as_str() == s)
    }
}

/// One key as written in the key file: its name, roles and the hex SHA-256 of the key.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct KeyEntry {
    pub name: String,
    pub roles: Vec<Role>,
    pub sha256: String,
}

#[derive(Debug, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct KeyFile {
    #[serde(default)]
    key: Vec<KeyEntry>,
}

/// Who is calling, once authenticated.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Principal {
    /// The key's name (or `unauthenticated` in open mode): the only identity that is logged.
    pub name: String,
    pub roles: Vec<Role>,
}

impl Principal {
    pub fn has_any(&self, roles: &[Role]) -> bool {
        roles.iter().any(|r| self.roles.contains(r))
    }
}

#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum AuthError {
    #[error("an API key is required: send it as 'Authorization: Bearer <key>'")]
    Missing,
    #[error("the API key is not recognised")]
    Unknown,
}

/// The keys in force, or open mode.
#[derive(Debug, Clone)]
pub enum Access {
    Keys(Vec<(KeyEntry, [u8; 32])>),
    /// No authentication: every caller has every role. Only for tests and closed networks;
    /// `weir serve` refuses it on anything but a loopback address.
    Open,
}

#[derive(Debug, thiserror::Error)]
#[error("key file {source_name} has {} problem(s):\n  - {}", .problems.len(), .problems.join("\n  - "))]
pub struct KeyFileError {
    pub source_name: String,
    pub problems: Vec<String>,
}

pub fn digest(key: &str) -> [u8; 32] {
    Sha256::digest(key.as_bytes()).into()
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

fn unhex(s: &str) -> Option<[u8; 32]> {
    if s.len() != 64 {
        return None;
    }
    let mut out = [0u8; 32];
    for (i, o) in out.iter_mut().enumerate() {
        *o = u8::from_str_radix(s.get(2 * i..2 * i + 2)?, 16).ok()?;
    }
    Some(out)
}

impl Access {
    /// Parse a key file; every problem reported at once.
    pub fn from_toml(text: &str, source_name: &str) -> Result<Access, KeyFileError> {
        let fail = |problems| KeyFileError {
            source_name: source_name.to_string(),
            problems,
        };
        let file: KeyFile = toml::from_str(text).map_err(|e| fail(vec![e.to_string()]))?;
        let mut problems = Vec::new();
        let mut keys = Vec::new();
        let mut names = std::collections::BTreeSet::new();
        let mut digests = std::collections::BTreeSet::new();
        for (i, k) in file.key.iter().enumerate() {
            let at = format!("key[{i}] ({:?})", k.name);
            if k.name.is_empty()
                || k.name.len() > 64
                || !k
                    .name
                    .bytes()
                    .all(|b| b.is_ascii_alphanumeric() || b"-_.@".contains(&b))
            {
                problems.push(format!(
                    "{at}.name: 1 to 64 characters of letters, digits, - _ . @"
                ));
            }
            if !names.insert(k.name.clone()) {
                problems.push(format!("{at}.name: used by an earlier key"));
            }
            if k.roles.is_empty() {
                problems.push(format!("{at}.roles: at least one role"));
            }
            match unhex(&k.sha256.to_ascii_lowercase()) {
                Some(d) => {
                    if !digests.insert(d) {
                        problems.push(format!("{at}.sha256: the same key as an earlier entry"));
                    }
                    keys.push((k.clone(), d));
                }
                None => problems.push(format!(
                    "{at}.sha256: 64 hexadecimal characters (the SHA-256 of the key, never the key)"
                )),
            }
        }
        if !problems.is_empty() {
            return Err(fail(problems));
        }
        Ok(Access::Keys(keys))
    }

    pub fn read(path: &Path) -> Result<Access, KeyFileError> {
        let text = std::fs::read_to_string(path).map_err(|e| KeyFileError {
            source_name: path.display().to_string(),
            problems: vec![format!("cannot read: {e}")],
        })?;
        Access::from_toml(&text, &path.display().to_string())
    }

    pub fn is_open(&self) -> bool {
        matches!(self, Access::Open)
    }

    /// Check an `Authorization` header value. Every stored digest is compared, match or not,
    /// in constant time, so the time taken says nothing about which key came close.
    pub fn authenticate(&self, authorization: Option<&str>) -> Result<Principal, AuthError> {
        let keys = match self {
            Access::Open => {
                return Ok(Principal {
                    name: "unauthenticated".into(),
                    roles: Role::ALL.to_vec(),
                });
            }
            Access::Keys(keys) => keys,
        };
        let presented = authorization
            .and_then(|h| {
                let (scheme, rest) = h.split_once(' ')?;
                scheme.eq_ignore_ascii_case("bearer").then(|| rest.trim())
            })
            .filter(|k| !k.is_empty())
            .ok_or(AuthError::Missing)?;
        let d = digest(presented);
        let mut found: Option<&KeyEntry> = None;
        for (entry, stored) in keys {
            let same: bool = d.ct_eq(stored).into();
            if same {
                found = Some(entry);
            }
        }
        found
            .map(|e| Principal {
                name: e.name.clone(),
                roles: e.roles.clone(),
            })
            .ok_or(AuthError::Unknown)
    }
}

/// A new random key (256 bits from the operating system) and its key-file entry.
pub fn new_key(name: &str, roles: Vec<Role>) -> (String, KeyEntry) {
    use rand::RngCore;
    let mut bytes = [0u8; 32];
    rand::rngs::OsRng.fill_bytes(&mut bytes);
    let key = format!("weir_{}", hex(&bytes));
    let entry = KeyEntry {
        name: name.to_string(),
        roles,
        sha256: hex(&digest(&key)),
    };
    (key, entry)
}

/// The TOML text of one key-file entry, to append to a key file.
pub fn entry_toml(entry: &KeyEntry) -> String {
    let file = KeyFile {
        key: vec![entry.clone()],
    };
    toml::to_string(&file).unwrap_or_default()
}

/// Add a new key to `path` (created if missing) after checking that the result still parses;
/// returns the key, which is shown once and never stored.
pub fn add_key(path: &Path, name: &str, roles: Vec<Role>) -> anyhow::Result<String> {
    let existing = match std::fs::read_to_string(path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => String::new(),
        Err(e) => anyhow::bail!("cannot read {}: {e}", path.display()),
    };
    let (key, entry) = new_key(name, roles);
    let mut text = existing.clone();
    if !text.is_empty() && !text.ends_with('\n') {
        text.push('\n');
    }
    if !text.is_empty() {
        text.push('\n');
    }
    text.push_str(&entry_toml(&entry));
    Access::from_toml(&text, &path.display().to_string())?;
    let tmp = path.with_extension("tmp");
    std::fs::write(&tmp, &text)?;
    std::fs::rename(&tmp, path)?;
    Ok(key)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sha256_of_abc_is_the_fips_180_2_example() {
        // FIPS 180-2, Appendix B.1: SHA-256("abc").
        assert_eq!(
            hex(&digest("abc")),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }

    #[test]
    fn keys_authenticate_by_hash_only() {
        let (k1, e1) = new_key("intake-gw", vec![Role::ClaimsSystem]);
        let (k2, e2) = new_key("ana", vec![Role::Analyst, Role::Investigator]);
        assert_ne!(k1, k2);
        let text = format!("{}\n{}", entry_toml(&e1), entry_toml(&e2));
        assert!(!text.contains(&k1) && !text.contains(&k2));
        let access = Access::from_toml(&text, "t").unwrap();
        let p = access.authenticate(Some(&format!("Bearer {k2}"))).unwrap();
        assert_eq!(p.name, "ana");
        assert!(p.has_any(&[Role::Investigator]));
        assert!(!p.has_any(&[Role::ClaimsSystem, Role::Administrator]));
        assert_eq!(
            access
                .authenticate(Some(&format!("bearer {k1}")))
                .unwrap()
                .name,
            "intake-gw"
        );
        assert_eq!(access.authenticate(None), Err(AuthError::Missing));
        assert_eq!(
            access.authenticate(Some("Basic abc")),
            Err(AuthError::Missing)
        );
        assert_eq!(
            access.authenticate(Some("Bearer ")),
            Err(AuthError::Missing)
        );
        let mut wrong = k1.clone();
        wrong.pop();
        wrong.push('x');
        assert_eq!(
            access.authenticate(Some(&format!("Bearer {wrong}"))),
            Err(AuthError::Unknown)
        );
    }

    #[test]
    fn bad_key_files_are_refused_with_every_reason() {
        let text = r#"
[[key]]
name = "a"
roles = []
sha256 = "zz"

[[key]]
name = "a"
roles = ["investigator"]
sha256 = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
"#;
        let e = Access::from_toml(text, "k").unwrap_err();
        assert_eq!(e.problems.len(), 3, "{:?}", e.problems);
        assert!(e.problems[0].contains("roles"));
        assert!(e.problems[1].contains("sha256"));
        assert!(e.problems[2].contains("earlier key"));
        let unknown_role = "[[key]]\nname='a'\nroles=['boss']\nsha256='00'";
        assert!(Access::from_toml(unknown_role, "k").is_err());
        let extra = "[[key]]\nname='a'\nroles=['analyst']\nsha256='00'\nsecret='x'";
        assert!(
            Access::from_toml(extra, "k")
                .unwrap_err()
                .to_string()
                .contains("secret")
        );
    }
}
