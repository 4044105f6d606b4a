//! The claim schema, parsing and validation with field-level errors.
//!
//! A claim arrives as JSON. Parsing goes through [`serde_json::Value`] and a hand-written walk
//! rather than `#[derive(Deserialize)]` because serde stops at the first problem, and a claims
//! system fixing a rejected claim wants every problem at once, each with its field path
//! (`parties[2].role`). Nothing here panics on any input.
//!
//! Ids of people and firms are opaque strings: they may arrive pseudonymised and are never
//! interpreted beyond equality.

use chrono::{DateTime, Datelike, NaiveDate, NaiveTime, Utc};
use serde::{Deserialize, Serialize};
use serde_json::{Map, Value};
use std::fmt;

/// Longest id or free-text value accepted, in bytes.
pub const MAX_STRING_BYTES: usize = 128;
/// Most parties one claim may name.
pub const MAX_PARTIES: usize = 50;
/// Largest claimed amount accepted (currency units). Larger values are data errors here.
pub const MAX_AMOUNT: f64 = 1e9;
/// Largest sum insured accepted.
pub const MAX_SUM_INSURED: f64 = 1e10;
/// Earliest and latest calendar years accepted in any date.
pub const MIN_YEAR: i32 = 1900;
pub const MAX_YEAR: i32 = 2100;

/// Line of business.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Line {
    Motor,
    Home,
}

impl Line {
    pub const ALL: [Line; 2] = [Line::Motor, Line::Home];
    pub fn as_str(self) -> &'static str {
        match self {
            Line::Motor => "motor",
            Line::Home => "home",
        }
    }
}

/// Role of a party named on a claim.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Role {
    Repairer,
    MedicalProvider,
    Attorney,
    Witness,
    PayeeAccount,
    ThirdParty,
}

impl Role {
    pub const ALL: [Role; 6] = [
        Role::Repairer,
        Role::MedicalProvider,
        Role::Attorney,
        Role::Witness,
        Role::PayeeAccount,
        Role::ThirdParty,
    ];
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Repairer => "repairer",
            Role::MedicalProvider => "medical_provider",
            Role::Attorney => "attorney",
            Role::Witness => "witness",
            Role::PayeeAccount => "payee_account",
            Role::ThirdParty => "third_party",
        }
    }
    fn parse(s: &str) -> Option<Role> {
        Role::ALL.into_iter().find(|r| r.as_str() == s)
    }
}

/// Entity kind of a catastrophe event in history keys.
pub const CATASTROPHE_KIND: &str = "catastrophe";
/// Entity kind of a region in history keys.
pub const REGION_KIND: &str = "region";
/// History kinds that give context (a surge) and link no claims.
pub const CONTEXT_KINDS: [&str; 2] = [REGION_KIND, CATASTROPHE_KIND];

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Party {
    pub role: Role,
    pub id: String,
}

/// Circumstances reported with the loss.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct Circumstances {
    pub police_report: bool,
    pub injury: bool,
    #[serde(default)]
    pub total_loss: bool,
    #[serde(default)]
    pub theft: bool,
}

/// A validated claim. Construct it with [`Claim::from_json`] or [`Claim::from_value`]; the
/// fields then satisfy every rule in this module.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Claim {
    pub claim_id: String,
    pub policy_id: String,
    pub claimant_id: String,
    pub line: Line,
    pub loss_date: NaiveDate,
    /// Local time of the loss, when known.
    #[serde(default, skip_serializing_if = "Option::is_none", with = "hhmm")]
    pub loss_time: Option<NaiveTime>,
    pub reported_at: DateTime<Utc>,
    pub policy_start: NaiveDate,
    pub claimed_amount: f64,
    pub sum_insured: f64,
    pub currency: String,
    /// Sales or claims region; used for segment read-outs, never as a model feature by default.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub region: Option<String>,
    /// Opaque id of the loss or risk address, when the claims system supplies one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub address_id: Option<String>,
    /// The insurer's code of the catastrophe event (storm, flood, hail day) the claim was
    /// filed under, when it has tagged one: many genuine claims then share a few contractors
    /// within days, which is context, not suspicion.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub catastrophe_code: Option<String>,
    #[serde(default)]
    pub parties: Vec<Party>,
    pub circumstances: Circumstances,
}

/// Parse JSON, refusing an object that names the same key twice: `serde_json::Value` would
/// silently keep the last one, and two systems reading the same claim must not disagree on
/// its amount. Nesting is bounded by serde_json's recursion limit (128).
pub fn strict_json(bytes: &[u8]) -> Result<Value, serde_json::Error> {
    serde_json::from_slice::<Strict>(bytes).map(|s| s.0)
}

struct Strict(Value);

impl<'de> serde::Deserialize<'de> for Strict {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        d.deserialize_any(StrictVisitor).map(Strict)
    }
}

struct StrictVisitor;

impl<'de> serde::de::Visitor<'de> for StrictVisitor {
    type Value = Value;

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("any JSON value")
    }
    fn visit_bool<E>(self, v: bool) -> Result<Value, E> {
        Ok(Value::Bool(v))
    }
    fn visit_i64<E>(self, v: i64) -> Result<Value, E> {
        Ok(Value::from(v))
    }
    fn visit_u64<E>(self, v: u64) -> Result<Value, E> {
        Ok(Value::from(v))
    }
    fn visit_f64<E: serde::de::Error>(self, v: f64) -> Result<Value, E> {
        serde_json::Number::from_f64(v)
            .map(Value::Number)
            .ok_or_else(|| E::custom("number out of range"))
    }
    fn visit_str<E>(self, v: &str) -> Result<Value, E> {
        Ok(Value::String(v.to_string()))
    }
    fn visit_string<E>(self, v: String) -> Result<Value, E> {
        Ok(Value::String(v))
    }
    fn visit_unit<E>(self) -> Result<Value, E> {
        Ok(Value::Null)
    }
    fn visit_none<E>(self) -> Result<Value, E> {
        Ok(Value::Null)
    }
    fn visit_some<D: serde::Deserializer<'de>>(self, d: D) -> Result<Value, D::Error> {
        d.deserialize_any(StrictVisitor)
    }
    fn visit_seq<A: serde::de::SeqAccess<'de>>(self, mut seq: A) -> Result<Value, A::Error> {
        let mut out = Vec::new();
        while let Some(Strict(v)) = seq.next_element()? {
            out.push(v);
        }
        Ok(Value::Array(out))
    }
    fn visit_map<A: serde::de::MapAccess<'de>>(self, mut map: A) -> Result<Value, A::Error> {
        let mut out = Map::new();
        while let Some(k) = map.next_key::<String>()? {
            if out.contains_key(&k) {
                let shown: String = k.chars().take(40).collect();
                return Err(serde::de::Error::custom(format!("duplicate key {shown:?}")));
            }
            let Strict(v) = map.next_value()?;
            out.insert(k, v);
        }
        Ok(Value::Object(out))
    }
}

/// `loss_time` travels as "HH:MM", the form the validator accepts.
mod hhmm {
    use chrono::NaiveTime;
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(t: &Option<NaiveTime>, s: S) -> Result<S::Ok, S::Error> {
        match t {
            Some(t) => s.serialize_str(&t.format("%H:%M").to_string()),
            None => s.serialize_none(),
        }
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Option<NaiveTime>, D::Error> {
        let v: Option<String> = Option::deserialize(d)?;
        v.map(|s| NaiveTime::parse_from_str(&s, "%H:%M").map_err(serde::de::Error::custom))
            .transpose()
    }
}

/// One problem with one field.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct FieldError {
    /// Path of the field, e.g. `parties[2].role`; empty for the document itself.
    pub field: String,
    pub problem: String,
}

impl fmt::Display for FieldError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if self.field.is_empty() {
            write!(f, "{}", self.problem)
        } else {
            write!(f, "{}: {}", self.field, self.problem)
        }
    }
}

/// Why a claim was refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ClaimError {
    #[error("not valid JSON at line {line}, column {column}: {message}")]
    NotJson {
        line: usize,
        column: usize,
        message: String,
    },
    #[error("{} problem(s): {}", .0.len(), join(.0))]
    Invalid(Vec<FieldError>),
}

fn join(errors: &[FieldError]) -> String {
    errors
        .iter()
        .map(ToString::to_string)
        .collect::<Vec<_>>()
        .join("; ")
}

impl ClaimError {
    /// The field-level problems; a JSON syntax error counts as one problem of the document.
    pub fn field_errors(&self) -> Vec<FieldError> {
        match self {
            ClaimError::NotJson { .. } => vec![FieldError {
                field: String::new(),
                problem: self.to_string(),
            }],
            ClaimError::Invalid(v) => v.clone(),
        }
    }
}

impl Claim {
    /// Parse and validate one claim from JSON bytes.
    pub fn from_json(bytes: &[u8]) -> Result<Claim, ClaimError> {
        let value: Value = strict_json(bytes).map_err(|e| ClaimError::NotJson {
            line: e.line(),
            column: e.column(),
            message: e.to_string(),
        })?;
        Claim::from_value(&value).map_err(ClaimError::Invalid)
    }

    /// Validate a parsed JSON document as a claim. `extra` keys listed in `allowed_extra` are
    /// ignored (training files carry an `outcome` beside the claim); any other unknown key is a
    /// problem, so a misspelt optional field is not silently dropped.
    pub fn from_value_allowing(
        value: &Value,
        allowed_extra: &[&str],
    ) -> Result<Claim, Vec<FieldError>> {
        let mut w = Walker::default();
        let Some(obj) = value.as_object() else {
            w.err("", "a claim must be a JSON object");
            return Err(w.errors);
        };
        w.unknown_keys(
            obj,
            "",
            &[
                "claim_id",
                "policy_id",
                "claimant_id",
                "line",
                "loss_date",
                "loss_time",
                "reported_at",
                "policy_start",
                "claimed_amount",
                "sum_insured",
                "currency",
                "region",
                "address_id",
                "catastrophe_code",
                "parties",
                "circumstances",
            ],
            allowed_extra,
        );
        let claim_id = w.id(obj, "claim_id", "claim_id");
        let policy_id = w.id(obj, "policy_id", "policy_id");
        let claimant_id = w.id(obj, "claimant_id", "claimant_id");
        let line = w
            .string(obj, "line", "line")
            .and_then(|s| match s.as_str() {
                "motor" => Some(Line::Motor),
                "home" => Some(Line::Home),
                other => {
                    w.err(
                        "line",
                        &format!(
                            "unknown line of business {other:?}; expected \"motor\" or \"home\""
                        ),
                    );
                    None
                }
            });
        let loss_date = w.date(obj, "loss_date");
        let policy_start = w.date(obj, "policy_start");
        let loss_time = match obj.get("loss_time") {
            None | Some(Value::Null) => None,
            Some(Value::String(s)) => match NaiveTime::parse_from_str(s, "%H:%M") {
                Ok(t) => Some(t),
                Err(_) => {
                    w.err("loss_time", "expected a local time as \"HH:MM\" (24-hour)");
                    None
                }
            },
            Some(_) => {
                w.err("loss_time", "expected a string \"HH:MM\" or null");
                None
            }
        };
        let reported_at = w.string(obj, "reported_at", "reported_at").and_then(|s| {
            match DateTime::parse_from_rfc3339(&s) {
                Ok(t) if (MIN_YEAR..=MAX_YEAR).contains(&t.year()) => Some(t.with_timezone(&Utc)),
                Ok(_) => {
                    w.err(
                        "reported_at",
                        &format!("year must be between {MIN_YEAR} and {MAX_YEAR}"),
                    );
                    None
                }
                Err(_) => {
                    w.err(
                        "reported_at",
                        "expected an RFC 3339 timestamp such as \"2025-03-14T09:30:00Z\"",
                    );
                    None
                }
            }
        });
        let claimed_amount = w.amount(obj, "claimed_amount", MAX_AMOUNT);
        let sum_insured = w.amount(obj, "sum_insured", MAX_SUM_INSURED);
        let currency = w.string(obj, "currency", "currency").and_then(|s| {
            if s.len() == 3 && s.bytes().all(|b| b.is_ascii_uppercase()) {
                Some(s)
            } else {
                w.err(
                    "currency",
                    "expected an ISO 4217 code: three upper-case letters",
                );
                None
            }
        });
        let region = w.optional_id(obj, "region");
        let address_id = w.optional_id(obj, "address_id");
        let catastrophe_code = w.optional_id(obj, "catastrophe_code");
        let parties = w.parties(obj);
        let circumstances = w.circumstances(obj);

        // Cross-field rules, only where both sides parsed.
        if let (Some(loss), Some(rep)) = (loss_date, reported_at) {
            // One day of slack: the loss date is local, the report time is UTC.
            if loss > rep.date_naive() + chrono::Days::new(1) {
                w.err(
                    "loss_date",
                    "the loss date is after the report time: a loss cannot be reported before it happens",
                );
            }
        }

        if !w.errors.is_empty() {
            return Err(w.errors);
        }
        // Every Option below is Some when no error was recorded.
        match (
            claim_id,
            policy_id,
            claimant_id,
            line,
            loss_date,
            reported_at,
            policy_start,
            claimed_amount,
            sum_insured,
            currency,
            parties,
            circumstances,
        ) {
            (
                Some(claim_id),
                Some(policy_id),
                Some(claimant_id),
                Some(line),
                Some(loss_date),
                Some(reported_at),
                Some(policy_start),
                Some(claimed_amount),
                Some(sum_insured),
                Some(currency),
                Some(parties),
                Some(circumstances),
            ) => Ok(Claim {
                claim_id,
                policy_id,
                claimant_id,
                line,
                loss_date,
                loss_time,
                reported_at,
                policy_start,
                claimed_amount,
                sum_insured,
                currency,
                region,
                address_id,
                catastrophe_code,
                parties,
                circumstances,
            }),
            _ => Err(vec![FieldError {
                field: String::new(),
                problem: "claim incomplete".into(),
            }]),
        }
    }

    /// Validate a parsed JSON document as a claim; unknown keys are problems.
    pub fn from_value(value: &Value) -> Result<Claim, Vec<FieldError>> {
        Claim::from_value_allowing(value, &[])
    }

    /// Seconds since the Unix epoch of the report: the claim's place on the time line. History
    /// features count only claims reported strictly before this instant.
    pub fn event_time(&self) -> i64 {
        self.reported_at.timestamp()
    }

    /// The ids this claim contributes to history, as `kind:id` keys: the claimant, policy,
    /// address and parties, which link claims, and the context kinds ([`CONTEXT_KINDS`]: the
    /// region and the catastrophe event), which let features see a surge but link nothing.
    pub fn entity_keys(&self) -> Vec<String> {
        let mut keys = self.link_keys();
        if let Some(r) = &self.region {
            keys.push(format!("{REGION_KIND}:{r}"));
        }
        if let Some(c) = &self.catastrophe_code {
            keys.push(format!("{CATASTROPHE_KIND}:{c}"));
        }
        keys.sort();
        keys.dedup();
        keys
    }

    /// The entities that link claims: claimant, policy, address and parties (not the context
    /// kinds, which many unrelated claims share).
    pub fn link_keys(&self) -> Vec<String> {
        let mut keys = vec![
            format!("claimant:{}", self.claimant_id),
            format!("policy:{}", self.policy_id),
        ];
        if let Some(a) = &self.address_id {
            keys.push(format!("address:{a}"));
        }
        for p in &self.parties {
            keys.push(format!("{}:{}", p.role.as_str(), p.id));
        }
        keys.sort();
        keys.dedup();
        keys
    }
}

/// Whether a history key is of a context kind (region, catastrophe event).
pub fn is_context_key(key: &str) -> bool {
    CONTEXT_KINDS.iter().any(|k| {
        key.strip_prefix(k)
            .is_some_and(|rest| rest.starts_with(':'))
    })
}

#[derive(Default)]
struct Walker {
    errors: Vec<FieldError>,
}

impl Walker {
    fn err(&mut self, field: &str, problem: &str) {
        self.errors.push(FieldError {
            field: field.to_string(),
            problem: problem.to_string(),
        });
    }

    fn unknown_keys(
        &mut self,
        obj: &Map<String, Value>,
        prefix: &str,
        known: &[&str],
        allowed: &[&str],
    ) {
        for key in obj.keys() {
            if !known.contains(&key.as_str()) && !allowed.contains(&key.as_str()) {
                let shown: String = key.chars().take(40).collect();
                let path = if prefix.is_empty() {
                    shown
                } else {
                    format!("{prefix}.{shown}")
                };
                self.err(&path, "unknown field");
            }
        }
    }

    fn string(&mut self, obj: &Map<String, Value>, key: &str, path: &str) -> Option<String> {
        match obj.get(key) {
            None | Some(Value::Null) => {
                self.err(path, "required");
                None
            }
            Some(Value::String(s)) => Some(s.clone()),
            Some(_) => {
                self.err(path, "expected a string");
                None
            }
        }
    }

    fn check_id(&mut self, s: &str, path: &str) -> bool {
        if s.trim().is_empty() {
            self.err(path, "must not be empty");
            false
        } else if s.len() > MAX_STRING_BYTES {
            self.err(
                path,
                &format!("too long: {} bytes, at most {MAX_STRING_BYTES}", s.len()),
            );
            false
        } else if s.chars().any(char::is_control) {
            self.err(path, "contains control characters");
            false
        } else {
            true
        }
    }

    fn id(&mut self, obj: &Map<String, Value>, key: &str, path: &str) -> Option<String> {
        let s = self.string(obj, key, path)?;
        self.check_id(&s, path).then_some(s)
    }

    fn optional_id(&mut self, obj: &Map<String, Value>, key: &str) -> Option<String> {
        match obj.get(key) {
            None | Some(Value::Null) => None,
            Some(Value::String(s)) => self.check_id(s, key).then(|| s.clone()),
            Some(_) => {
                self.err(key, "expected a string or null");
                None
            }
        }
    }

    fn date(&mut self, obj: &Map<String, Value>, key: &str) -> Option<NaiveDate> {
        let s = self.string(obj, key, key)?;
        match NaiveDate::parse_from_str(&s, "%Y-%m-%d") {
            Ok(d) if (MIN_YEAR..=MAX_YEAR).contains(&d.year()) => Some(d),
            Ok(_) => {
                self.err(
                    key,
                    &format!("year must be between {MIN_YEAR} and {MAX_YEAR}"),
                );
                None
            }
            Err(_) => {
                self.err(key, "expected a calendar date as \"YYYY-MM-DD\"");
                None
            }
        }
    }

    fn amount(&mut self, obj: &Map<String, Value>, key: &str, max: f64) -> Option<f64> {
        match obj.get(key) {
            None | Some(Value::Null) => {
                self.err(key, "required");
                None
            }
            Some(Value::Number(n)) => match n.as_f64() {
                Some(x) if !x.is_finite() => {
                    self.err(key, "must be a finite number");
                    None
                }
                Some(x) if x <= 0.0 => {
                    self.err(key, "must be greater than zero");
                    None
                }
                Some(x) if x > max => {
                    self.err(key, &format!("implausibly large: more than {max:e}"));
                    None
                }
                Some(x) => Some(x),
                None => {
                    self.err(key, "must be a finite number");
                    None
                }
            },
            Some(_) => {
                self.err(key, "expected a number");
                None
            }
        }
    }

    fn parties(&mut self, obj: &Map<String, Value>) -> Option<Vec<Party>> {
        let items = match obj.get("parties") {
            None | Some(Value::Null) => return Some(Vec::new()),
            Some(Value::Array(items)) => items,
            Some(_) => {
                self.err("parties", "expected an array of {role, id} objects");
                return None;
            }
        };
        if items.len() > MAX_PARTIES {
            self.err(
                "parties",
                &format!("{} parties, at most {MAX_PARTIES}", items.len()),
            );
            return None;
        }
        let before = self.errors.len();
        let mut out = Vec::with_capacity(items.len());
        for (i, item) in items.iter().enumerate() {
            let path = format!("parties[{i}]");
            let Some(p) = item.as_object() else {
                self.err(&path, "expected an object with \"role\" and \"id\"");
                continue;
            };
            self.unknown_keys(p, &path, &["role", "id"], &[]);
            let role_path = format!("{path}.role");
            let role = self
                .string(p, "role", &role_path)
                .and_then(|s| match Role::parse(&s) {
                    Some(r) => Some(r),
                    None => {
                        let expected = Role::ALL.map(Role::as_str).join(", ");
                        let shown: String = s.chars().take(40).collect();
                        self.err(
                            &role_path,
                            &format!("unknown role {shown:?}; expected one of {expected}"),
                        );
                        None
                    }
                });
            let id = self.id(p, "id", &format!("{path}.id"));
            if let (Some(role), Some(id)) = (role, id) {
                out.push(Party { role, id });
            }
        }
        (self.errors.len() == before).then_some(out)
    }

    fn circumstances(&mut self, obj: &Map<String, Value>) -> Option<Circumstances> {
        let c = match obj.get("circumstances") {
            None | Some(Value::Null) => {
                self.err("circumstances", "required");
                return None;
            }
            Some(Value::Object(c)) => c,
            Some(_) => {
                self.err("circumstances", "expected an object");
                return None;
            }
        };
        self.unknown_keys(
            c,
            "circumstances",
            &["police_report", "injury", "total_loss", "theft"],
            &[],
        );
        let before = self.errors.len();
        let mut flag = |key: &str, required: bool| -> bool {
            let path = format!("circumstances.{key}");
            match c.get(key) {
                Some(Value::Bool(b)) => *b,
                None | Some(Value::Null) if !required => false,
                None | Some(Value::Null) => {
                    self.err(&path, "required");
                    false
                }
                Some(_) => {
                    self.err(&path, "expected true or false");
                    false
                }
            }
        };
        let circ = Circumstances {
            police_report: flag("police_report", true),
            injury: flag("injury", true),
            total_loss: flag("total_loss", false),
            theft: flag("theft", false),
        };
        (self.errors.len() == before).then_some(circ)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    pub(crate) fn valid() -> Value {
        json!({
            "claim_id": "C-1",
            "policy_id": "P-1",
            "claimant_id": "K-1",
            "line": "motor",
            "loss_date": "2025-03-10",
            "loss_time": "23:15",
            "reported_at": "2025-03-12T08:00:00Z",
            "policy_start": "2024-06-01",
            "claimed_amount": 4200.0,
            "sum_insured": 20000,
            "currency": "EUR",
            "parties": [{"role": "repairer", "id": "R-9"}, {"role": "payee_account", "id": "B-3"}],
            "circumstances": {"police_report": false, "injury": true}
        })
    }

    #[test]
    fn accepts_a_valid_claim() {
        let c = Claim::from_value(&valid()).unwrap();
        assert_eq!(c.line, Line::Motor);
        assert_eq!(c.parties.len(), 2);
        assert_eq!(c.parties[1].role, Role::PayeeAccount);
        assert_eq!(c.loss_time, NaiveTime::from_hms_opt(23, 15, 0));
        assert!(!c.circumstances.theft);
        assert_eq!(
            c.entity_keys(),
            vec![
                "claimant:K-1",
                "payee_account:B-3",
                "policy:P-1",
                "repairer:R-9"
            ]
        );
    }

    #[test]
    fn serialised_claim_validates_again() {
        let c = Claim::from_value(&valid()).unwrap();
        let v = serde_json::to_value(&c).unwrap();
        assert_eq!(v["loss_time"], "23:15");
        assert_eq!(v["reported_at"], "2025-03-12T08:00:00Z");
        assert_eq!(Claim::from_value(&v).unwrap(), c);
    }

    #[test]
    fn reports_every_problem_with_its_path() {
        let mut v = valid();
        v["claimed_amount"] = json!(-5);
        v["line"] = json!("marine");
        v["parties"][1]["role"] = json!("cousin");
        v["currency"] = json!("euro");
        v["extra"] = json!(1);
        v["circumstances"]["injury"] = json!("yes");
        let errs = Claim::from_value(&v).unwrap_err();
        let fields: Vec<&str> = errs.iter().map(|e| e.field.as_str()).collect();
        for f in [
            "claimed_amount",
            "line",
            "parties[1].role",
            "currency",
            "extra",
            "circumstances.injury",
        ] {
            assert!(fields.contains(&f), "missing {f} in {fields:?}");
        }
        assert_eq!(errs.len(), 6, "{errs:?}");
    }

    #[test]
    fn rejects_loss_after_report() {
        let mut v = valid();
        v["loss_date"] = json!("2025-03-20");
        let errs = Claim::from_value(&v).unwrap_err();
        assert_eq!(errs[0].field, "loss_date");
    }

    #[test]
    fn rejects_oversized_strings_and_bad_dates() {
        let mut v = valid();
        v["claimant_id"] = json!("x".repeat(MAX_STRING_BYTES + 1));
        v["policy_start"] = json!("2024-02-30");
        v["reported_at"] = json!("3025-03-12T08:00:00Z");
        let errs = Claim::from_value(&v).unwrap_err();
        let fields: Vec<&str> = errs.iter().map(|e| e.field.as_str()).collect();
        assert_eq!(fields, vec!["claimant_id", "policy_start", "reported_at"]);
    }

    #[test]
    fn syntax_errors_carry_position() {
        let err = Claim::from_json(b"{\"claim_id\": ").unwrap_err();
        assert!(matches!(err, ClaimError::NotJson { line: 1, .. }), "{err}");
        let err = Claim::from_json(b"[1,2]").unwrap_err();
        assert_eq!(err.field_errors()[0].field, "");
    }

    #[test]
    fn duplicate_keys_are_refused_at_any_depth() {
        let err = Claim::from_json(br#"{"claim_id": "a", "claim_id": "b"}"#).unwrap_err();
        assert!(
            err.to_string().contains("duplicate key \"claim_id\""),
            "{err}"
        );
        let err = strict_json(br#"{"p": [{"role": "x", "role": "y"}]}"#).unwrap_err();
        assert!(err.to_string().contains("duplicate key"), "{err}");
        let deep = "[".repeat(200) + &"]".repeat(200);
        assert!(strict_json(deep.as_bytes()).is_err(), "nesting is bounded");
        assert_eq!(
            strict_json(br#"{"a": [1, 2.5, null, true, "x"]}"#).unwrap()["a"][1],
            2.5
        );
    }

    #[test]
    fn huge_numbers_are_refused_not_overflowed() {
        let mut v = valid();
        v["sum_insured"] = json!(1e300);
        let errs = Claim::from_value(&v).unwrap_err();
        assert_eq!(errs[0].field, "sum_insured");
        // serde_json parses 1e400 as a syntax error (out of range), never as infinity.
        let text = serde_json::to_string(&valid())
            .unwrap()
            .replace("4200.0", "1e400");
        assert!(Claim::from_json(text.as_bytes()).is_err());
    }
}
