//! Adjudicated outcomes and their taxonomy.
//!
//! An outcome is richer than yes/no. For training and for confusion counts each outcome maps to
//! a label: a referral was *worth it* when the claim was fraudulent or inflated; it was not when
//! the claim was genuine. `not_proven` and `withdrawn` say too little either way and are kept
//! out of fitting and of confusion counts (they are reported as counts of their own).

use serde::{Deserialize, Serialize};

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
}
