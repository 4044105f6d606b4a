//! Adjudicated outcomes and their taxonomy.
//!
//! An outcome is richer than yes/no. For training and for confusion counts each outcome maps to
//! a label: a referral was *worth it* when the claim was fraudulent or inflated; it was not when
//! the claim was genuine. `not_proven` and `withdrawn` say too little either way and are kept
//! out of fitting and of confusion counts (they are reported as counts of their own).

use crate::claim::FieldError;
use chrono::{Datelike, NaiveDate};
use serde::{Deserialize, Serialize};
use serde_json::Value;

#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Outcome {
    /// Investigation established deliberate fraud.
    FraudConfirmed,
    /// A genuine loss, but the amount claimed was inflated.
    Inflated,
    /// Nothing wrong found: the claim is genuine.
    Genuine,
    /// Suspicion remained but could not be established.
    NotProven,
    /// The claimant withdrew the claim.
    Withdrawn,
}

impl Outcome {
    pub const ALL: [Outcome; 5] = [
        Outcome::FraudConfirmed,
        Outcome::Inflated,
        Outcome::Genuine,
        Outcome::NotProven,
        Outcome::Withdrawn,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            Outcome::FraudConfirmed => "fraud_confirmed",
            Outcome::Inflated => "inflated",
            Outcome::Genuine => "genuine",
            Outcome::NotProven => "not_proven",
            Outcome::Withdrawn => "withdrawn",
        }
    }

    pub fn parse(s: &str) -> Option<Outcome> {
        Outcome::ALL.into_iter().find(|o| o.as_str() == s)
    }

    /// The training and evaluation label: `Some(true)` for a referral worth making,
    /// `Some(false)` for a genuine claim, `None` where the outcome does not say.
    pub fn label(self) -> Option<bool> {
        match self {
            Outcome::FraudConfirmed | Outcome::Inflated => Some(true),
            Outcome::Genuine => Some(false),
            Outcome::NotProven | Outcome::Withdrawn => None,
        }
    }
}

/// An adjudicated outcome as posted by an investigator.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct OutcomeReport {
    pub outcome: Outcome,
    /// Payment avoided thanks to the review (currency units of the claim).
    pub amount_saved: f64,
    /// Money recovered after payment.
    pub amount_recovered: f64,
    pub adjudicated_on: NaiveDate,
    /// Id of the person or panel who decided.
    pub decided_by: String,
}

/// An outcome as stored: the report plus where it sits in the claim's outcome history.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct OutcomeRecord {
    pub claim_id: String,
    /// 1 for the first outcome of a claim; a later one is a revision, never a second count.
    pub revision: u32,
    /// The claim revision the outcome was recorded against.
    pub claim_revision: u32,
    pub recorded_at: String,
    /// Name of the API key that posted it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub posted_by: Option<String>,
    #[serde(flatten)]
    pub report: OutcomeReport,
}

impl OutcomeReport {
    /// Validate a posted outcome; every problem with its field.
    pub fn from_value(v: &Value) -> Result<OutcomeReport, Vec<FieldError>> {
        let mut errs = Vec::new();
        let mut err = |field: &str, problem: String| {
            errs.push(FieldError {
                field: field.into(),
                problem,
            })
        };
        let Some(obj) = v.as_object() else {
            err("", "an outcome must be a JSON object".into());
            return Err(errs);
        };
        for k in obj.keys() {
            if ![
                "outcome",
                "amount_saved",
                "amount_recovered",
                "adjudicated_on",
                "decided_by",
            ]
            .contains(&k.as_str())
            {
                err(
                    &k.chars().take(40).collect::<String>(),
                    "unknown field".into(),
                );
            }
        }
        let outcome = match obj.get("outcome").and_then(Value::as_str) {
            Some(s) => Outcome::parse(s).or_else(|| {
                let names: Vec<_> = Outcome::ALL.iter().map(|o| o.as_str()).collect();
                err(
                    "outcome",
                    format!("unknown outcome; expected one of {}", names.join(", ")),
                );
                None
            }),
            None => {
                err("outcome", "required: a string".into());
                None
            }
        };
        let mut amount = |key: &str| match obj.get(key) {
            None | Some(Value::Null) => Some(0.0),
            Some(Value::Number(n)) => match n.as_f64() {
                Some(x) if x.is_finite() && (0.0..=crate::claim::MAX_AMOUNT).contains(&x) => {
                    Some(x)
                }
                _ => {
                    err(key, "must be a number from 0 to 1e9".into());
                    None
                }
            },
            Some(_) => {
                err(key, "expected a number".into());
                None
            }
        };
        let saved = amount("amount_saved");
        let recovered = amount("amount_recovered");
        let date = match obj.get("adjudicated_on").and_then(Value::as_str) {
            Some(s) => match NaiveDate::parse_from_str(s, "%Y-%m-%d") {
                Ok(d) if (crate::claim::MIN_YEAR..=crate::claim::MAX_YEAR).contains(&d.year()) => {
                    Some(d)
                }
                _ => {
                    err(
                        "adjudicated_on",
                        "expected a date as \"YYYY-MM-DD\" between 1900 and 2100".into(),
                    );
                    None
                }
            },
            None => {
                err(
                    "adjudicated_on",
                    "required: a date as \"YYYY-MM-DD\"".into(),
                );
                None
            }
        };
        let by = match obj.get("decided_by").and_then(Value::as_str) {
            Some(s)
                if !s.trim().is_empty()
                    && s.len() <= crate::claim::MAX_STRING_BYTES
                    && !s.chars().any(char::is_control) =>
            {
                Some(s.to_string())
            }
            _ => {
                err(
                    "decided_by",
                    "required: the id of who decided (at most 128 bytes)".into(),
                );
                None
            }
        };
        match (outcome, saved, recovered, date, by) {
            (
                Some(outcome),
                Some(amount_saved),
                Some(amount_recovered),
                Some(adjudicated_on),
                Some(decided_by),
            ) if errs.is_empty() => Ok(OutcomeReport {
                outcome,
                amount_saved,
                amount_recovered,
                adjudicated_on,
                decided_by,
            }),
            _ => Err(errs),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_round_trip_and_labels_are_as_documented() {
        for o in Outcome::ALL {
            assert_eq!(Outcome::parse(o.as_str()), Some(o));
            let json = serde_json::to_string(&o).unwrap();
            assert_eq!(json, format!("\"{}\"", o.as_str()));
        }
        assert_eq!(Outcome::parse("fraud"), None);
        let labelled: Vec<_> = Outcome::ALL.iter().filter_map(|o| o.label()).collect();
        assert_eq!(labelled, vec![true, true, false]);
    }

    #[test]
    fn outcome_reports_are_validated_field_by_field() {
        let ok = serde_json::json!({"outcome": "inflated", "amount_saved": 1200.5,
            "adjudicated_on": "2025-06-01", "decided_by": "inv-3"});
        let r = OutcomeReport::from_value(&ok).unwrap();
        assert_eq!(r.outcome, Outcome::Inflated);
        assert_eq!(r.amount_recovered, 0.0);
        let bad = serde_json::json!({"outcome": "guilty", "amount_saved": -1,
            "adjudicated_on": "2025-13-01", "extra": true});
        let fields: Vec<String> = OutcomeReport::from_value(&bad)
            .unwrap_err()
            .into_iter()
            .map(|e| e.field)
            .collect();
        assert_eq!(
            fields,
            vec![
                "extra",
                "outcome",
                "amount_saved",
                "adjudicated_on",
                "decided_by"
            ]
        );
    }
}
