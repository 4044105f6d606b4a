//! Feature definitions, the feature vector, and history features across claims.
//!
//! Every claim produces the full catalogue ([`CATALOGUE`]); a model names the subset it was
//! trained on, and that list travels in the model artifact. History is read through
//! [`HistoryView`] so that training (an in-memory [`MemoryHistory`] filled in time order) and
//! serving (the store) run this same code: no train/serve skew.
//!
//! Time line: a claim sits at its report instant. History features count only claims reported
//! strictly before it, in trailing windows of 30 and 365 days, and never the claim itself (a
//! re-scored revision does not count its own earlier revision).

use crate::claim::{Claim, Line, Role};
use std::collections::HashMap;

pub const DAY: i64 = 86_400;
pub const SHORT_WINDOW_DAYS: i64 = 30;
pub const LONG_WINDOW_DAYS: i64 = 365;

/// One earlier claim as seen from an entity (claimant, policy, party, address).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HistoryEvent {
    /// Report instant, seconds since the Unix epoch.
    pub at: i64,
    /// [`stable_hash`] of the claim id.
    pub claim: u64,
    /// [`stable_hash`] of the claimant id.
    pub claimant: u64,
    pub amount: f64,
}

/// Read access to the history of entities. Implemented in memory for training and by the
/// store for serving.
pub trait HistoryView {
    /// Call `f` for every event of `entity` with `from <= at < to`.
    fn for_each_event(&self, entity: &str, from: i64, to: i64, f: &mut dyn FnMut(&HistoryEvent));
}

impl<T: HistoryView + ?Sized> HistoryView for &T {
    fn for_each_event(&self, entity: &str, from: i64, to: i64, f: &mut dyn FnMut(&HistoryEvent)) {
        (**self).for_each_event(entity, from, to, f);
    }
}

/// FNV-1a, 64 bit: a hash that is the same on every machine and every run, unlike std's
/// `DefaultHasher`, because history written by one process is read by another.
/// Parameters from the FNV reference (Fowler, Noll, Vo; IETF draft-eastlake-fnv).
pub fn stable_hash(s: &str) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for b in s.bytes() {
        h ^= u64::from(b);
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

/// The events one claim adds to history: one per entity key.
pub fn events_of(claim: &Claim) -> Vec<(String, HistoryEvent)> {
    let ev = HistoryEvent {
        at: claim.event_time(),
        claim: stable_hash(&claim.claim_id),
        claimant: stable_hash(&claim.claimant_id),
        amount: claim.claimed_amount,
    };
    claim.entity_keys().into_iter().map(|k| (k, ev)).collect()
}

/// FNV-1a as a `HashMap` hasher: entity keys are short strings, for which SipHash (the
/// default, built to resist crafted collisions) costs more than the lookup itself. Training
/// data is the insurer's own, so collision attacks are not a concern here.
#[derive(Default, Clone, Copy)]
pub struct FnvHasher(u64);

impl std::hash::Hasher for FnvHasher {
    fn finish(&self) -> u64 {
        self.0
    }
    fn write(&mut self, bytes: &[u8]) {
        let mut h = if self.0 == 0 {
            0xcbf2_9ce4_8422_2325
        } else {
            self.0
        };
        for &b in bytes {
            h ^= u64::from(b);
            h = h.wrapping_mul(0x0100_0000_01b3);
        }
        self.0 = h;
    }
}

pub type FnvBuild = std::hash::BuildHasherDefault<FnvHasher>;

/// History held in memory, per entity sorted by time.
#[derive(Debug, Default)]
pub struct MemoryHistory {
    by_entity: HashMap<String, Vec<HistoryEvent>, FnvBuild>,
}

impl MemoryHistory {
    pub fn new() -> Self {
        Self::default()
    }

    /// Add a claim's events. Claims may come in any order; each entity's list stays sorted.
    pub fn record(&mut self, claim: &Claim) {
        for (key, ev) in events_of(claim) {
            let list = self.by_entity.entry(key).or_default();
            let pos = list.partition_point(|e| e.at <= ev.at);
            list.insert(pos, ev);
        }
    }

    pub fn entities(&self) -> usize {
        self.by_entity.len()
    }
}

impl HistoryView for MemoryHistory {
    fn for_each_event(&self, entity: &str, from: i64, to: i64, f: &mut dyn FnMut(&HistoryEvent)) {
        if let Some(list) = self.by_entity.get(entity) {
            let start = list.partition_point(|e| e.at < from);
            for e in list[start..].iter().take_while(|e| e.at < to) {
                f(e);
            }
        }
    }
}

/// A feature's definition: its name, what it means, and how to say it to an investigator.
pub struct FeatureDef {
    pub name: &'static str,
    pub meaning: &'static str,
    /// Plain words for a claim whose value pushed its score up.
    pub reason: fn(f64) -> String,
}

macro_rules! catalogue {
    ($($idx:ident = $name:literal, $meaning:literal, $reason:expr;)*) => {
        /// Indices into the full feature vector.
        #[allow(non_camel_case_types, clippy::upper_case_acronyms)]
        #[derive(Clone, Copy)]
        #[repr(usize)]
        enum F { $($idx,)* }
        pub const CATALOGUE: &[FeatureDef] = &[
            $(FeatureDef { name: $name, meaning: $meaning, reason: $reason },)*
        ];
    };
}

fn n(v: f64) -> i64 {
    v.round() as i64
}

/// "1 other claim", "3 other claims".
fn others(v: f64, noun: &str) -> String {
    let k = n(v);
    if k == 1 {
        format!("1 other {noun}")
    } else {
        format!("{k} other {noun}s")
    }
}

catalogue! {
    AmountRatio = "amount_to_sum_insured", "claimed amount divided by sum insured",
        |v| format!("claimed amount is {:.0}% of the sum insured", v * 100.0);
    LogAmount = "log_claimed_amount", "natural log of 1 + claimed amount",
        |v| format!("large claimed amount (about {:.0})", v.exp() - 1.0);
    DaysPolicyToLoss = "days_policy_start_to_loss", "days from policy start to loss date (negative: loss before start)",
        |v| if v < 0.0 { format!("loss dated {} days before the policy started", -n(v)) }
            else { format!("loss {} days after the policy started", n(v)) };
    DaysLossToReport = "days_loss_to_report", "days from loss date to report",
        |v| format!("reported {} days after the loss", n(v));
    NightLoss = "night_loss", "1 if the loss time is between 22:00 and 05:59",
        |_| "loss at night (22:00 to 06:00)".to_string();
    LossTimeUnknown = "loss_time_unknown", "1 if no loss time was given",
        |_| "no time of loss given".to_string();
    NoPoliceReport = "no_police_report", "1 if no police report was made",
        |_| "no police report".to_string();
    Injury = "injury", "1 if an injury is claimed",
        |_| "injury claimed".to_string();
    TotalLoss = "total_loss", "1 if a total loss is claimed",
        |_| "total loss claimed".to_string();
    Theft = "theft", "1 if the loss is a theft",
        |_| "theft".to_string();
    LineHome = "line_home", "1 for home, 0 for motor",
        |_| "home claim".to_string();
    PartyCount = "party_count", "number of parties named on the claim",
        |v| if n(v) == 1 { "only one party named on the claim".to_string() }
            else { format!("{} parties named on the claim", n(v)) };
    NewPolicyLoss = "loss_within_30_days_of_start", "1 if the loss is dated less than 30 days after the policy started (or before it)",
        |_| "loss within 30 days of the policy starting".to_string();
    LateReport = "reported_after_30_days", "1 if the claim was reported more than 30 days after the loss",
        |_| "reported more than 30 days after the loss".to_string();
    ClaimantShort = "claimant_claims_30d", "earlier claims by this claimant in 30 days",
        |v| format!("claimant made {} in the last 30 days", others(v, "claim"));
    ClaimantLong = "claimant_claims_365d", "earlier claims by this claimant in 365 days",
        |v| format!("claimant made {} in the last year", others(v, "claim"));
    ClaimantAmountLong = "claimant_log_amount_365d", "log of 1 + amount claimed by this claimant in 365 days",
        |v| format!("claimant claimed about {:.0} in the last year", v.exp() - 1.0);
    PolicyLong = "policy_claims_365d", "earlier claims on this policy in 365 days",
        |v| format!("{} on this policy in the last year", others(v, "claim"));
    RepairerShort = "repairer_claims_30d", "earlier claims naming this repairer in 30 days (highest over repairers)",
        |v| format!("repairer named on {} in the last 30 days", others(v, "claim"));
    RepairerClaimants = "repairer_claimants_365d", "distinct other claimants using this repairer in 365 days",
        |v| format!("repairer shared with {} in the last year", others(v, "claimant"));
    MedicalShort = "medical_provider_claims_30d", "earlier claims naming this medical provider in 30 days",
        |v| format!("medical provider named on {} in the last 30 days", others(v, "claim"));
    MedicalClaimants = "medical_provider_claimants_365d", "distinct other claimants of this medical provider in 365 days",
        |v| format!("medical provider shared with {} in the last year", others(v, "claimant"));
    AttorneyLong = "attorney_claims_365d", "earlier claims naming this attorney in 365 days",
        |v| format!("attorney named on {} in the last year", others(v, "claim"));
    AttorneyClaimants = "attorney_claimants_365d", "distinct other claimants of this attorney in 365 days",
        |v| format!("attorney shared with {} in the last year", others(v, "claimant"));
    PayeeLong = "payee_account_claims_365d", "earlier claims paying into this bank account in 365 days",
        |v| format!("payee bank account used on {} in the last year", others(v, "claim"));
    PayeeClaimants = "payee_account_claimants_365d", "distinct other claimants paid into this bank account in 365 days",
        |v| format!("payee bank account shared with {} in the last year", others(v, "claimant"));
    WitnessLong = "witness_claims_365d", "earlier claims naming this witness in 365 days",
        |v| format!("witness appears on {} in the last year", others(v, "claim"));
    AddressLong = "address_claims_365d", "earlier claims at this address in 365 days",
        |v| format!("{} at this address in the last year", others(v, "claim"));
    AddressClaimants = "address_claimants_365d", "distinct other claimants at this address in 365 days",
        |v| format!("address shared with {} in the last year", others(v, "claimant"));
}

pub const N_FEATURES: usize = CATALOGUE.len();

/// Which side of a feature's range an investigator reads as a warning sign. A model reason is
/// only given when the claim's value lies on that side of the training average: a positive
/// contribution from the *absence* of a signal ("0 other claimants") is arithmetic, not a
/// reason anyone can check.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Warning {
    /// Higher values are the warning sign (counts, amounts, flags).
    High,
    /// Lower values are the warning sign (days from policy start, number of parties).
    Low,
    /// Never a reason on its own (line of business).
    Never,
}

pub fn warning_side(index: usize) -> Warning {
    match CATALOGUE.get(index).map(|d| d.name) {
        Some("days_policy_start_to_loss" | "party_count") => Warning::Low,
        Some("line_home") | None => Warning::Never,
        Some(_) => Warning::High,
    }
}

/// The full feature vector of one claim, in catalogue order.
pub type FeatureVector = [f64; N_FEATURES];

/// Catalogue index of a feature name.
pub fn index_of(name: &str) -> Option<usize> {
    CATALOGUE.iter().position(|d| d.name == name)
}

pub fn names() -> Vec<&'static str> {
    CATALOGUE.iter().map(|d| d.name).collect()
}

#[derive(Default, Clone, Copy, Debug, PartialEq)]
struct EntityStats {
    short: f64,
    long: f64,
    amount_long: f64,
    other_claimants_long: f64,
}

impl EntityStats {
    fn max(self, o: EntityStats) -> EntityStats {
        EntityStats {
            short: self.short.max(o.short),
            long: self.long.max(o.long),
            amount_long: self.amount_long.max(o.amount_long),
            other_claimants_long: self.other_claimants_long.max(o.other_claimants_long),
        }
    }
}

fn entity_stats(
    history: &dyn HistoryView,
    key: &str,
    t: i64,
    claim: u64,
    claimant: u64,
    seen: &mut Vec<u64>,
) -> EntityStats {
    let mut s = EntityStats::default();
    seen.clear();
    let short_from = t - SHORT_WINDOW_DAYS * DAY;
    history.for_each_event(key, t - LONG_WINDOW_DAYS * DAY, t, &mut |e| {
        if e.claim == claim {
            return;
        }
        s.long += 1.0;
        s.amount_long += e.amount;
        if e.at >= short_from {
            s.short += 1.0;
        }
        if e.claimant != claimant {
            seen.push(e.claimant);
        }
    });
    seen.sort_unstable();
    seen.dedup();
    s.other_claimants_long = seen.len() as f64;
    s
}

fn b(x: bool) -> f64 {
    if x { 1.0 } else { 0.0 }
}

/// Compute every catalogue feature of `claim` against `history`.
pub fn compute(claim: &Claim, history: &dyn HistoryView) -> FeatureVector {
    let mut v = [0.0; N_FEATURES];
    let t = claim.event_time();
    let claim_h = stable_hash(&claim.claim_id);
    let claimant_h = stable_hash(&claim.claimant_id);
    let mut seen = Vec::new();
    // One key buffer for every entity of the claim, rather than a new String each.
    let mut key = String::with_capacity(96);
    let mut stats = |kind: &str, id: &str| {
        key.clear();
        key.push_str(kind);
        key.push(':');
        key.push_str(id);
        entity_stats(history, &key, t, claim_h, claimant_h, &mut seen)
    };

    v[F::AmountRatio as usize] = claim.claimed_amount / claim.sum_insured;
    v[F::LogAmount as usize] = claim.claimed_amount.ln_1p();
    v[F::DaysPolicyToLoss as usize] = (claim.loss_date - claim.policy_start).num_days() as f64;
    v[F::DaysLossToReport as usize] =
        (claim.reported_at.date_naive() - claim.loss_date).num_days() as f64;
    let hour = claim.loss_time.map(|t| chrono::Timelike::hour(&t));
    v[F::NightLoss as usize] = b(matches!(hour, Some(h) if !(6..22).contains(&h)));
    v[F::LossTimeUnknown as usize] = b(hour.is_none());
    v[F::NoPoliceReport as usize] = b(!claim.circumstances.police_report);
    v[F::Injury as usize] = b(claim.circumstances.injury);
    v[F::TotalLoss as usize] = b(claim.circumstances.total_loss);
    v[F::Theft as usize] = b(claim.circumstances.theft);
    v[F::LineHome as usize] = b(claim.line == Line::Home);
    v[F::PartyCount as usize] = claim.parties.len() as f64;
    v[F::NewPolicyLoss as usize] = b(v[F::DaysPolicyToLoss as usize] < 30.0);
    v[F::LateReport as usize] = b(v[F::DaysLossToReport as usize] > 30.0);

    let c = stats("claimant", &claim.claimant_id);
    v[F::ClaimantShort as usize] = c.short;
    v[F::ClaimantLong as usize] = c.long;
    v[F::ClaimantAmountLong as usize] = c.amount_long.ln_1p();
    v[F::PolicyLong as usize] = stats("policy", &claim.policy_id).long;

    let mut by_role = |role: Role| {
        claim
            .parties
            .iter()
            .filter(|p| p.role == role)
            .map(|p| stats(role.as_str(), &p.id))
            .fold(EntityStats::default(), EntityStats::max)
    };
    let r = by_role(Role::Repairer);
    v[F::RepairerShort as usize] = r.short;
    v[F::RepairerClaimants as usize] = r.other_claimants_long;
    let m = by_role(Role::MedicalProvider);
    v[F::MedicalShort as usize] = m.short;
    v[F::MedicalClaimants as usize] = m.other_claimants_long;
    let a = by_role(Role::Attorney);
    v[F::AttorneyLong as usize] = a.long;
    v[F::AttorneyClaimants as usize] = a.other_claimants_long;
    let p = by_role(Role::PayeeAccount);
    v[F::PayeeLong as usize] = p.long;
    v[F::PayeeClaimants as usize] = p.other_claimants_long;
    v[F::WitnessLong as usize] = by_role(Role::Witness).long;

    if let Some(addr) = &claim.address_id {
        let s = stats("address", addr);
        v[F::AddressLong as usize] = s.long;
        v[F::AddressClaimants as usize] = s.other_claimants_long;
    }
    v
}

/// Indices of `names` in the catalogue; the error lists every name the catalogue lacks.
pub fn resolve(names: &[String]) -> Result<Vec<usize>, Vec<String>> {
    let mut missing = Vec::new();
    let idx: Vec<usize> = names
        .iter()
        .filter_map(|n| {
            let i = index_of(n);
            if i.is_none() {
                missing.push(n.clone());
            }
            i
        })
        .collect();
    if missing.is_empty() {
        Ok(idx)
    } else {
        Err(missing)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    fn claim(id: &str, claimant: &str, reported: &str, repairer: &str, amount: f64) -> Claim {
        Claim::from_value(&json!({
            "claim_id": id, "policy_id": format!("P-{claimant}"), "claimant_id": claimant,
            "line": "motor", "loss_date": &reported[..10], "reported_at": reported,
            "policy_start": "2024-01-01", "claimed_amount": amount, "sum_insured": 10000,
            "currency": "EUR", "parties": [{"role": "repairer", "id": repairer}],
            "circumstances": {"police_report": true, "injury": false}
        }))
        .unwrap()
    }

    fn get(v: &FeatureVector, name: &str) -> f64 {
        v[index_of(name).unwrap()]
    }

    #[test]
    fn fnv1a_matches_published_test_vectors() {
        // Test vectors from the FNV reference test suite (draft-eastlake-fnv, section on FNV-1a 64).
        assert_eq!(stable_hash(""), 0xcbf29ce484222325);
        assert_eq!(stable_hash("a"), 0xaf63dc4c8601ec8c);
        assert_eq!(stable_hash("foobar"), 0x85944171f73967e8);
    }

    #[test]
    fn history_counts_only_earlier_claims_in_window() {
        let mut h = MemoryHistory::new();
        let c1 = claim("C1", "K1", "2025-01-01T10:00:00Z", "R1", 1000.0);
        let c2 = claim("C2", "K2", "2025-05-01T10:00:00Z", "R1", 2000.0);
        let c3 = claim("C3", "K3", "2025-05-20T10:00:00Z", "R1", 3000.0);
        let c4 = claim("C4", "K2", "2025-05-25T10:00:00Z", "R1", 500.0);
        for c in [&c1, &c2, &c3] {
            h.record(c);
        }
        let v = compute(&c4, &h);
        // R1 earlier: C1 (144 days before), C2 (24 days), C3 (5 days); 30-day window holds 2.
        assert_eq!(get(&v, "repairer_claims_30d"), 2.0);
        // Other claimants of R1 within a year: K1 and K3 (K2 is this claimant).
        assert_eq!(get(&v, "repairer_claimants_365d"), 2.0);
        assert_eq!(get(&v, "claimant_claims_365d"), 1.0);
        assert_eq!(get(&v, "claimant_claims_30d"), 1.0);
        assert!((get(&v, "claimant_log_amount_365d") - 2000f64.ln_1p()).abs() < 1e-12);
        // A later claim is invisible, and a claim never sees itself.
        h.record(&c4);
        let v3 = compute(&c3, &h);
        assert_eq!(get(&v3, "repairer_claims_30d"), 1.0);
        let v4 = compute(&c4, &h);
        assert_eq!(v4, v, "recording the claim itself changes nothing");
    }

    #[test]
    fn claim_level_features() {
        let mut c = claim("C1", "K1", "2025-01-11T10:00:00Z", "R1", 2500.0);
        c.loss_date = chrono::NaiveDate::from_ymd_opt(2025, 1, 1).unwrap();
        c.loss_time = chrono::NaiveTime::from_hms_opt(23, 0, 0);
        let v = compute(&c, &MemoryHistory::new());
        assert_eq!(get(&v, "amount_to_sum_insured"), 0.25);
        assert_eq!(get(&v, "days_policy_start_to_loss"), 366.0);
        assert_eq!(get(&v, "days_loss_to_report"), 10.0);
        assert_eq!(get(&v, "night_loss"), 1.0);
        assert_eq!(get(&v, "loss_time_unknown"), 0.0);
        assert_eq!(get(&v, "no_police_report"), 0.0);
        assert_eq!(get(&v, "party_count"), 1.0);
        assert_eq!(get(&v, "loss_within_30_days_of_start"), 0.0);
        assert_eq!(get(&v, "reported_after_30_days"), 0.0);
    }

    #[test]
    fn resolve_names_every_unknown_feature() {
        let err = resolve(&["night_loss".into(), "shoe_size".into(), "age".into()]).unwrap_err();
        assert_eq!(err, vec!["shoe_size", "age"]);
        assert_eq!(resolve(&["theft".into()]).unwrap(), vec![9]);
    }
}
