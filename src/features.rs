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
/// Days of a region's history features read: its last two days against the 28 before.
pub const REGION_WINDOW_DAYS: i64 = 30;
const SURGE_RECENT_DAYS: i64 = 2;
/// A region receiving claims at this many times its usual rate is in a surge (a storm, a
/// flood): context in which firms are busy for good reason. Common practice, no source: a
/// threefold rise over two days is far outside the day-to-day variation of a region's volume
/// (a Poisson count of 9 a day rarely triples), yet a weather event easily exceeds it.
pub const SURGE_RATIO: f64 = 3.0;
/// Claims a region needs in the 28 days before for its surge ratio to mean anything (common
/// practice, no source: below about ten, one busy day doubles the count by chance).
const SURGE_MIN_BASELINE: f64 = 10.0;

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

    /// How many events of `entity` have `from <= at < to`. Views that hold sorted lists
    /// answer by binary search: a region's count reads hundreds of events otherwise.
    fn count_events(&self, entity: &str, from: i64, to: i64) -> usize {
        let mut n = 0;
        self.for_each_event(entity, from, to, &mut |_| n += 1);
        n
    }
}

impl<T: HistoryView + ?Sized> HistoryView for &T {
    fn for_each_event(&self, entity: &str, from: i64, to: i64, f: &mut dyn FnMut(&HistoryEvent)) {
        (**self).for_each_event(entity, from, to, f);
    }
    fn count_events(&self, entity: &str, from: i64, to: i64) -> usize {
        (**self).count_events(entity, from, to)
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

/// History held in memory, per entity sorted by time, with each claim's links for the claims
/// graph ([`crate::graph::GraphSource`]). Entity keys are held once; a claim's links are
/// indices into them (at a million claims, strings per claim would cost hundreds of MB).
#[derive(Debug, Default)]
pub struct MemoryHistory {
    by_entity: HashMap<Box<str>, u32, FnvBuild>,
    lists: Vec<Vec<HistoryEvent>>,
    names: Vec<Box<str>>,
    claims: HashMap<u64, StoredNode, FnvBuild>,
}

#[derive(Debug)]
struct StoredNode {
    claim_id: Box<str>,
    at: i64,
    claimant: u64,
    amount: f64,
    keys: Box<[u32]>,
}

impl MemoryHistory {
    pub fn new() -> Self {
        Self::default()
    }

    fn entity(&mut self, key: &str) -> u32 {
        if let Some(&i) = self.by_entity.get(key) {
            return i;
        }
        let i = self.lists.len() as u32;
        self.by_entity.insert(key.into(), i);
        self.lists.push(Vec::new());
        self.names.push(key.into());
        i
    }

    /// Add a claim's events. Claims may come in any order; each entity's list stays sorted.
    /// (A training file names each claim once; a claim recorded twice keeps both events.)
    pub fn record(&mut self, claim: &Claim) {
        let h = stable_hash(&claim.claim_id);
        let mut link_ids = Vec::new();
        let links = claim.link_keys();
        for (key, ev) in events_of(claim) {
            let i = self.entity(&key);
            let list = &mut self.lists[i as usize];
            let pos = list.partition_point(|e| e.at <= ev.at);
            list.insert(pos, ev);
            if links.binary_search(&key).is_ok() {
                link_ids.push(i);
            }
        }
        self.claims.insert(
            h,
            StoredNode {
                claim_id: claim.claim_id.as_str().into(),
                at: claim.event_time(),
                claimant: stable_hash(&claim.claimant_id),
                amount: claim.claimed_amount,
                keys: link_ids.into(),
            },
        );
    }

    pub fn entities(&self) -> usize {
        self.lists.len()
    }

    fn list(&self, entity: &str) -> Option<&Vec<HistoryEvent>> {
        self.by_entity.get(entity).map(|&i| &self.lists[i as usize])
    }
}

impl HistoryView for MemoryHistory {
    fn for_each_event(&self, entity: &str, from: i64, to: i64, f: &mut dyn FnMut(&HistoryEvent)) {
        if let Some(list) = self.list(entity) {
            let start = list.partition_point(|e| e.at < from);
            for e in list[start..].iter().take_while(|e| e.at < to) {
                f(e);
            }
        }
    }

    fn count_events(&self, entity: &str, from: i64, to: i64) -> usize {
        self.list(entity).map_or(0, |list| {
            let end = list.partition_point(|e| e.at < to);
            end.saturating_sub(list.partition_point(|e| e.at < from))
        })
    }
}

impl crate::graph::GraphSource for MemoryHistory {
    fn events(
        &self,
        keys: &[(String, usize)],
        from: i64,
        to: i64,
    ) -> Result<Vec<Vec<HistoryEvent>>, crate::graph::SourceError> {
        Ok(keys
            .iter()
            .map(|(k, limit)| {
                let mut v = Vec::new();
                if let Some(list) = self.list(k) {
                    let start = list.partition_point(|e| e.at < from);
                    v.extend(list[start..].iter().take_while(|e| e.at < to).take(*limit));
                }
                v
            })
            .collect())
    }

    fn nodes(
        &self,
        claims: &[u64],
    ) -> Result<Vec<Option<crate::graph::ClaimNode>>, crate::graph::SourceError> {
        Ok(claims
            .iter()
            .map(|h| {
                self.claims.get(h).map(|n| crate::graph::ClaimNode {
                    claim: *h,
                    claim_id: n.claim_id.to_string(),
                    at: n.at,
                    claimant: n.claimant,
                    amount: n.amount,
                    keys: n
                        .keys
                        .iter()
                        .map(|&i| self.names[i as usize].to_string())
                        .collect(),
                })
            })
            .collect())
    }
}

/// Which side of a feature's range an investigator reads as a warning sign. A model reason is
/// only given when the claim's value lies on that side of the training average, and far
/// enough from it to be unusual: a positive contribution from the *absence* of a signal
/// ("0 other claimants") is arithmetic, not a reason anyone can check.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Warning {
    /// Higher values are the warning sign (counts, ratios, flags).
    High,
    /// Lower values are the warning sign (days from policy start, number of parties).
    Low,
    /// Never a reason on its own: the line of business, an absolute amount, a firm's sheer
    /// volume. Such features still inform the model, and other reasons quote them.
    Never,
}

/// A feature's definition: its name, what it means, which side warns, and how to say it to an
/// investigator. The wording function sees the claim's whole feature vector, so a reason can
/// give its comparison ("41 claimants in 30 days, usually 6").
pub struct FeatureDef {
    pub name: &'static str,
    pub meaning: &'static str,
    pub warning: Warning,
    /// Plain words for a claim whose value pushed its score up.
    pub reason: fn(f64, &[f64]) -> String,
}

macro_rules! catalogue {
    ($($idx:ident = $name:literal, $warn:ident, $meaning:literal, $reason:expr;)*) => {
        /// Indices into the full feature vector.
        #[allow(non_camel_case_types, clippy::upper_case_acronyms)]
        #[derive(Clone, Copy)]
        #[repr(usize)]
        enum F { $($idx,)* }
        pub const CATALOGUE: &[FeatureDef] = &[
            $(FeatureDef { name: $name, meaning: $meaning, warning: Warning::$warn, reason: $reason },)*
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

/// An amount with thousands separators and no decimals: "4,335", "1,250,000".
pub fn fmt_amount(x: f64) -> String {
    let neg = x < 0.0;
    let digits = format!("{:.0}", x.abs());
    let mut out = String::with_capacity(digits.len() + digits.len() / 3 + 1);
    for (i, ch) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i) % 3 == 0 {
            out.push(',');
        }
        out.push(ch);
    }
    if neg { format!("-{out}") } else { out }
}

fn amount_of(full: &[f64]) -> f64 {
    full[F::LogAmount as usize].exp_m1()
}

/// A business party's usual number of other claimants in 30 days, from its burst ratio.
fn usual_30d(burst: f64, recent: f64) -> String {
    let usual = ((recent + 1.0) / burst.max(1e-9) - 1.0).max(0.0);
    if usual < 10.0 {
        format!("{usual:.1}")
    } else {
        format!("{usual:.0}")
    }
}

fn burst_reason(kind: &str, v: f64, recent: f64) -> String {
    format!(
        "this {kind}: {} other claimants in the last 30 days, usually {}",
        n(recent),
        usual_30d(v, recent)
    )
}

catalogue! {
    AmountRatio = "amount_to_sum_insured", High, "claimed amount divided by sum insured",
        |v, _| format!("claimed amount is {:.0}% of the sum insured", v * 100.0);
    LogAmount = "log_claimed_amount", Never, "natural log of 1 + claimed amount",
        |v, _| format!("claimed amount {}", fmt_amount(v.exp_m1()));
    DaysPolicyToLoss = "days_policy_start_to_loss", Low, "days from policy start to loss date (negative: loss before start)",
        |v, _| if v < 0.0 { format!("loss dated {} days before the policy started", -n(v)) }
            else { format!("loss {} days after the policy started", n(v)) };
    DaysLossToReport = "days_loss_to_report", High, "days from loss date to report",
        |v, _| format!("reported {} days after the loss", n(v));
    NightLoss = "night_loss", High, "1 if the loss time is between 22:00 and 05:59",
        |_, _| "loss at night (22:00 to 06:00)".to_string();
    LossTimeUnknown = "loss_time_unknown", High, "1 if no loss time was given",
        |_, _| "no time of loss given".to_string();
    NoPoliceReport = "no_police_report", High, "1 if no police report was made",
        |_, _| "no police report".to_string();
    Injury = "injury", High, "1 if an injury is claimed",
        |_, _| "injury claimed".to_string();
    TotalLoss = "total_loss", High, "1 if a total loss is claimed",
        |_, _| "total loss claimed".to_string();
    Theft = "theft", High, "1 if the loss is a theft",
        |_, _| "theft".to_string();
    LineHome = "line_home", Never, "1 for home, 0 for motor",
        |_, _| "home claim".to_string();
    PartyCount = "party_count", Low, "number of parties named on the claim",
        |v, _| if n(v) <= 1 { "only one party named on the claim".to_string() }
            else { format!("only {} parties named on the claim", n(v)) };
    NewPolicyLoss = "loss_within_30_days_of_start", High, "1 if the loss is dated less than 30 days after the policy started (or before it)",
        |_, _| "loss within 30 days of the policy starting".to_string();
    LateReport = "reported_after_30_days", High, "1 if the claim was reported more than 30 days after the loss",
        |_, _| "reported more than 30 days after the loss".to_string();
    RoundAmount = "amount_round_figure", High, "1 if the claimed amount is at least 500 and a whole multiple of 100 (an estimate rather than an invoice)",
        |_, f| format!("claimed amount is a round figure ({})", fmt_amount(amount_of(f)));
    BelowRound = "amount_just_below_round_figure", High, "1 if the claimed amount lies within 2% below a round figure of 1,000 or more (1, 2, 2.5 or 5 times a power of ten), where authority limits and excesses tend to sit",
        |_, f| {
            let a = amount_of(f);
            format!("claimed amount {} is just under {}", fmt_amount(a), fmt_amount(round_figure_above(a).unwrap_or(a)))
        };
    Catastrophe = "catastrophe_event", Never, "1 if the claim is tagged with a catastrophe event code",
        |_, _| "filed under a catastrophe event".to_string();
    RegionSurge = "region_surge_ratio", Never, "claims reported in the claim's region in the last 2 days against its usual 2 days over the 28 days before ((recent + 1) / (usual + 1); 1 while the region has fewer than 10 claims in those 28 days)",
        |v, _| format!("its region is receiving claims at {v:.1} times the usual rate");
    SurgeContext = "surge_context", Never, "1 if the claim is tagged with a catastrophe event or its region is in a surge (region_surge_ratio at least 3): firms' bursts then count only claims outside the event, or not at all",
        |_, _| "filed during a surge of claims (a catastrophe event or a regional surge): context, not suspicion".to_string();
    ClaimantShort = "claimant_claims_30d", High, "earlier claims by this claimant in 30 days",
        |v, _| format!("claimant made {} in the last 30 days", others(v, "claim"));
    ClaimantLong = "claimant_claims_365d", High, "earlier claims by this claimant in 365 days",
        |v, _| format!("claimant made {} in the last year", others(v, "claim"));
    ClaimantAmountLong = "claimant_log_amount_365d", Never, "log of 1 + amount claimed by this claimant in 365 days",
        |v, _| format!("claimant claimed {} in the last year", fmt_amount(v.exp_m1()));
    PolicyLong = "policy_claims_365d", High, "earlier claims on this policy in 365 days",
        |v, _| format!("{} on this policy in the last year", others(v, "claim"));
    RepairerRecent = "repairer_claimants_30d", Never, "distinct other claimants naming this repairer in the last 30 days (highest over the claim's repairers)",
        |v, _| format!("repairer named by {} in the last 30 days", others(v, "claimant"));
    RepairerBurst = "repairer_burst", High, "repairer's other claimants in the last 30 days against its own usual 30 days over the year before ((recent + 1) / (usual + 1)); claims filed under the same catastrophe event are left out",
        |v, f| burst_reason("repairer", v, f[F::RepairerRecent as usize]);
    MedicalRecent = "medical_provider_claimants_30d", Never, "distinct other claimants naming this medical provider in the last 30 days",
        |v, _| format!("medical provider named by {} in the last 30 days", others(v, "claimant"));
    MedicalBurst = "medical_provider_burst", High, "medical provider's other claimants in the last 30 days against its own usual 30 days (as for repairers)",
        |v, f| burst_reason("medical provider", v, f[F::MedicalRecent as usize]);
    AttorneyRecent = "attorney_claimants_30d", Never, "distinct other claimants naming this attorney in the last 30 days",
        |v, _| format!("attorney named by {} in the last 30 days", others(v, "claimant"));
    AttorneyBurst = "attorney_burst", High, "attorney's other claimants in the last 30 days against its own usual 30 days (as for repairers)",
        |v, f| burst_reason("attorney", v, f[F::AttorneyRecent as usize]);
    PayeeClaimants = "payee_account_claimants_365d", High, "distinct other claimants paid into this bank account in 365 days",
        |v, _| format!("payee bank account also used by {} in the last year", others(v, "claimant"));
    WitnessClaimants = "witness_claimants_365d", High, "distinct other claimants naming this witness in 365 days",
        |v, _| format!("witness also named by {} in the last year", others(v, "claimant"));
    ThirdPartyClaimants = "third_party_claimants_365d", High, "distinct other claimants naming this third party in 365 days",
        |v, _| format!("third party also involved with {} in the last year", others(v, "claimant"));
    AddressClaimants = "address_claimants_365d", High, "distinct other claimants at this address in 365 days",
        |v, _| format!("address shared with {} in the last year", others(v, "claimant"));
    LinkedLong = "linked_claimants_365d", High, "distinct other claimants sharing a bank account, witness, third party or address with this claim in 365 days",
        |v, _| format!("linked through a shared bank account, witness, third party or address to {} in the last year", others(v, "claimant"));
    LinkedAmount = "linked_log_amount_365d", Never, "log of 1 + the amounts of other claimants' claims in 365 days linked to this one through a shared bank account, witness, third party or address, or through two of its parties named together when at least half of the smaller party's claimants came with the other too: the exposure a review of this claim opens",
        |v, _| format!("linked claims worth {} in the last year", fmt_amount(v.exp_m1()));
    LinkedShort = "linked_claimants_30d", High, "as linked_claimants_365d, in the last 30 days",
        |v, _| format!("linked through a shared bank account, witness, third party or address to {} in the last 30 days", others(v, "claimant"));
    PairClaimants = "party_pair_claimants_365d", High, "distinct other claimants on claims naming two of this claim's parties together in 365 days (highest over pairs)",
        |v, _| format!("two of this claim's parties appear together on claims of {} in the last year", others(v, "claimant"));
    RingClaims = "ring_claims_365d", High, "other claims in this claim's component of the claims graph within 365 days: claims linked through a shared personal identifier (claimant, policy, address, bank account, witness, third party) or through two firms named together, followed from claim to claim; parties above their kind's hub cap link nothing (see the graph module)",
        |v, f| format!("tied through shared parties to {} by {} in the last year ({} of them in the last 30 days)",
            others(v, "claim"), others(f[F::RingClaimants as usize], "claimant"), n(f[F::RingRecent as usize]));
    RingClaimants = "ring_claimants_365d", High, "distinct other claimants in this claim's component of the claims graph within 365 days",
        |v, f| format!("tied through shared parties to {} on {} in the last year", others(v, "claimant"), others(f[F::RingClaims as usize], "claim"));
    RingRecent = "ring_claims_30d", High, "claims of this claim's component of the claims graph reported in the last 30 days before it: how fast the component grows",
        |v, f| format!("{} of the {} tied to this one through shared parties were reported in the last 30 days", n(v), others(f[F::RingClaims as usize], "claim"));
    SimilarAmounts = "party_similar_amount_share", High, "share of a party's earlier claims in 365 days within 15% of this claimed amount (highest over parties with at least 3 earlier claims)",
        |v, _| format!("{:.0}% of the earlier claims naming one of its parties this year were within 15% of this amount", v * 100.0);
    AmountVsParty = "amount_vs_party_typical", High, "log of the claimed amount over the median amount of the earlier claims naming the same party (the party with the most earlier claims, at least 3)",
        |v, f| format!("claimed amount {:.1} times the typical claim naming the same party (about {})", v.exp(), fmt_amount(amount_of(f) / v.exp()));
}

pub const N_FEATURES: usize = CATALOGUE.len();

pub fn warning_side(index: usize) -> Warning {
    CATALOGUE.get(index).map_or(Warning::Never, |d| d.warning)
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

/// The amounts of other claimants' claims linked to this one (see `linked_log_amount_365d`).
pub fn linked_amount(full: &[f64]) -> f64 {
    // Bounded (at 1e15, far above any book) so that a corrupt value cannot make a priority
    // infinite; a missing one counts as nothing linked.
    let v = full[F::LinkedAmount as usize];
    if v.is_finite() {
        v.clamp(0.0, 15.0 * std::f64::consts::LN_10).exp_m1()
    } else {
        0.0
    }
}

/// Features that say one thing share a family, named by its first member's index: a claim
/// gets at most one reason from each, and a rule testing one member stands for the family.
pub fn family(index: usize) -> usize {
    const FAMILIES: &[&[F]] = &[
        &[
            F::LinkedLong,
            F::LinkedShort,
            F::PayeeClaimants,
            F::WitnessClaimants,
            F::ThirdPartyClaimants,
            F::AddressClaimants,
        ],
        &[F::DaysPolicyToLoss, F::NewPolicyLoss],
        &[F::DaysLossToReport, F::LateReport],
        &[F::ClaimantShort, F::ClaimantLong, F::PolicyLong],
        &[F::RoundAmount, F::BelowRound],
        &[F::RingClaims, F::RingClaimants, F::RingRecent],
    ];
    FAMILIES
        .iter()
        .find(|fam| fam.iter().any(|f| *f as usize == index))
        .map_or(index, |fam| fam[0] as usize)
}

/// What a referral says when no single feature qualifies as a reason: the score rests on many
/// small signs together (or on the amount and volumes, which are never a reason on their own).
pub fn pattern_reason() -> crate::model::Reason {
    crate::model::Reason {
        code: "model.pattern".into(),
        text: "no single sign stands out: the model refers it on the pattern of the claim as a whole (amount, history and parties together); check it like any referral, without presuming anything".into(),
        weight: 0.0,
    }
}

/// The evidence a never-a-reason feature is said through when it raises a score: the amount
/// of linked claims is exposure, and what an investigator can check is the links behind it.
fn stand_in(index: usize, full: &FeatureVector) -> Option<usize> {
    if index != F::LinkedAmount as usize {
        return None;
    }
    // The component first; then the parties named together (a pair the graph does not
    // follow because one of them is a hub still counts in the exposure).
    [F::RingClaims, F::PairClaimants, F::LinkedLong]
        .into_iter()
        .map(|f| f as usize)
        .find(|&f| full[f] > 0.0)
}

/// The smallest round figure (1, 2, 2.5 or 5 times a power of ten, 1,000 or more) above `a`.
fn round_figure_above(a: f64) -> Option<f64> {
    if !(a.is_finite() && a > 0.0) {
        return None;
    }
    let mut p = 1000.0;
    while p <= 1e12 {
        for m in [1.0, 2.0, 2.5, 5.0] {
            if m * p > a {
                return Some(m * p);
            }
        }
        p *= 10.0;
    }
    None
}

/// How far beyond the training mean, in standard deviations, a value must lie to be called
/// unusual in a reason (common practice, no source: about the outer seventh of a normal
/// population; a flag qualifies when fewer than about three claims in ten carry it).
pub const UNUSUAL_Z: f64 = 1.5;

/// A value is also unusual when fewer than this share of training claims lie beyond it on
/// its warning side (common practice, no source: one claim in twenty). Counts are heavy
/// tailed: a few large rings stretch the standard deviation until "2 other claims in 30
/// days", which 97% of claims never see, is under [`UNUSUAL_Z`] deviations from the mean.
pub const RARE_SHARE: f64 = 0.05;

/// The model's reasons for a score: features whose contribution raises the log-odds
/// noticeably (by 0.2, a factor of about 1.2 in the odds), whose value lies on their warning
/// side and is unusual ([`UNUSUAL_Z`] standard deviations of the training data beyond its
/// mean, or beyond the value all but [`RARE_SHARE`] of training claims stay within: `rare`
/// holds those low and high values per model feature), strongest first. `index` maps model
/// features to the catalogue; `z` are the standardised model features and `contrib` their
/// contributions.
pub fn reasons(
    full: &FeatureVector,
    index: &[usize],
    z: &[f64],
    rare: &[(f64, f64)],
    contrib: &[f64],
    max: usize,
) -> Vec<crate::model::Reason> {
    let value = |i: usize| full[index[i]];
    let bounds = |i: usize| rare.get(i).copied().unwrap_or((f64::NAN, f64::NAN));
    // What each model feature is said as: itself, or the evidence behind a feature that is
    // never a reason on its own (the linked claims' amount is said as the links themselves).
    let said = |i: usize| stand_in(index[i], full).unwrap_or(index[i]);
    let mut order: Vec<usize> = (0..contrib.len())
        .filter(|&i| contrib[i] > 0.2)
        .filter(|&i| match warning_side(index[i]) {
            Warning::High => z[i] >= UNUSUAL_Z || value(i) > bounds(i).1,
            Warning::Low => z[i] <= -UNUSUAL_Z || value(i) < bounds(i).0,
            Warning::Never => said(i) != index[i],
        })
        .collect();
    order.sort_by(|&a, &b| contrib[b].total_cmp(&contrib[a]));
    // One reason per family: "linked to 9 claimants this year" and "to 5 this month" say
    // one thing.
    let mut families = Vec::new();
    order.retain(|&i| {
        let f = family(said(i));
        let new = !families.contains(&f);
        families.push(f);
        new
    });
    order
        .into_iter()
        .take(max)
        .map(|i| {
            let s = said(i);
            let def = &CATALOGUE[s];
            crate::model::Reason {
                code: format!("feature.{}", def.name),
                text: (def.reason)(full[s], full),
                weight: contrib[i],
            }
        })
        .collect()
}

/// One entity's earlier events in the long window, the claim's own left out.
#[derive(Default)]
struct Window {
    events: Vec<HistoryEvent>,
}

impl Window {
    fn load(&mut self, history: &dyn HistoryView, key: &str, t: i64, claim: u64) {
        self.events.clear();
        history.for_each_event(key, t - LONG_WINDOW_DAYS * DAY, t, &mut |e| {
            if e.claim != claim {
                self.events.push(*e);
            }
        });
    }

    /// Other claimants' events of a personal identifier: their claimants (in the long and the
    /// short window) and their claims with amounts, the links and the exposure.
    fn link_into(
        &self,
        me: u64,
        short_from: i64,
        long: &mut Vec<u64>,
        short: &mut Vec<u64>,
        claims: &mut Vec<(u64, f64)>,
    ) {
        for e in self.events.iter().filter(|e| e.claimant != me) {
            long.push(e.claimant);
            claims.push((e.claim, e.amount));
            if e.at >= short_from {
                short.push(e.claimant);
            }
        }
    }

    /// Distinct claimants other than `claimant` among events passing `keep`.
    fn claimants(
        &self,
        claimant: u64,
        scratch: &mut Vec<u64>,
        keep: impl Fn(&HistoryEvent) -> bool,
    ) -> f64 {
        scratch.clear();
        scratch.extend(
            self.events
                .iter()
                .filter(|e| e.claimant != claimant && keep(e))
                .map(|e| e.claimant),
        );
        scratch.sort_unstable();
        scratch.dedup();
        scratch.len() as f64
    }
}

fn b(x: bool) -> f64 {
    if x { 1.0 } else { 0.0 }
}

/// Buffers one feature computation fills and empties again: kept per thread, so that a claim
/// costs no allocation once the first few have been computed.
#[derive(Default)]
struct Buffers {
    key: String,
    scratch: Vec<u64>,
    window: Window,
    parties: Vec<Window>,
    linked_long: Vec<u64>,
    linked_short: Vec<u64>,
    linked_claims: Vec<(u64, f64)>,
    storm: Vec<u64>,
    by_claim: Vec<Vec<(u64, u64, f64)>>,
    party_claimants: Vec<f64>,
    pair_claims: Vec<(u64, f64)>,
}

thread_local! {
    static BUFFERS: std::cell::RefCell<Buffers> = std::cell::RefCell::new(Buffers::default());
}

/// Compute every catalogue feature of `claim` against `history`, with `ring` the summary of
/// its component of the claims graph ([`crate::graph::Component::summary`]).
pub fn compute(
    claim: &Claim,
    history: &dyn HistoryView,
    ring: &crate::graph::Summary,
) -> FeatureVector {
    let mut v = BUFFERS.with(|b| match b.try_borrow_mut() {
        Ok(mut bufs) => compute_with(claim, history, &mut bufs),
        // Re-entered from inside a history view (never today): fresh buffers.
        Err(_) => compute_with(claim, history, &mut Buffers::default()),
    });
    v[F::RingClaims as usize] = ring.claims;
    v[F::RingClaimants as usize] = ring.claimants;
    v[F::RingRecent as usize] = ring.recent;
    v
}

/// [`compute`] against history in memory, which answers the claims graph too: what training
/// runs, claim after claim in time order.
pub fn compute_in_memory(
    claim: &Claim,
    history: &MemoryHistory,
    graph: &crate::graph::Settings,
) -> FeatureVector {
    // History in memory never fails to answer.
    let ring = crate::graph::component_of_new(history, graph, claim)
        .map(|c| c.summary(stable_hash(&claim.claim_id), claim.event_time()))
        .unwrap_or_default();
    compute(claim, history, &ring)
}

fn compute_with(claim: &Claim, history: &dyn HistoryView, bufs: &mut Buffers) -> FeatureVector {
    let Buffers {
        key,
        scratch,
        window: w,
        parties: windows,
        linked_long,
        linked_short,
        linked_claims,
        storm,
        by_claim,
        party_claimants,
        pair_claims,
    } = bufs;
    for l in [&mut *linked_long, &mut *linked_short, &mut *storm] {
        l.clear();
    }
    linked_claims.clear();
    let mut v = [0.0; N_FEATURES];
    let t = claim.event_time();
    let short_from = t - SHORT_WINDOW_DAYS * DAY;
    let claim_h = stable_hash(&claim.claim_id);
    let me = stable_hash(&claim.claimant_id);
    let amount = claim.claimed_amount;

    v[F::AmountRatio as usize] = amount / claim.sum_insured;
    v[F::LogAmount as usize] = amount.ln_1p();
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
    v[F::RoundAmount as usize] = b(amount >= 500.0 && (amount / 100.0).fract() == 0.0);
    v[F::BelowRound as usize] = b(round_figure_above(amount).is_some_and(|r| amount >= 0.98 * r));
    v[F::Catastrophe as usize] = b(claim.catastrophe_code.is_some());

    let mut load = |w: &mut Window, kind: &str, id: &str| {
        key.clear();
        key.push_str(kind);
        key.push(':');
        key.push_str(id);
        w.load(history, key, t, claim_h);
    };

    load(w, "claimant", &claim.claimant_id);
    v[F::ClaimantShort as usize] = w.events.iter().filter(|e| e.at >= short_from).count() as f64;
    v[F::ClaimantLong as usize] = w.events.len() as f64;
    v[F::ClaimantAmountLong as usize] = w.events.iter().map(|e| e.amount).sum::<f64>().ln_1p();
    load(w, "policy", &claim.policy_id);
    v[F::PolicyLong as usize] = w.events.len() as f64;

    // Claims filed under the same catastrophe event: a storm's contractors are busy for it.
    if let Some(code) = &claim.catastrophe_code {
        load(w, crate::claim::CATASTROPHE_KIND, code);
        storm.extend(w.events.iter().map(|e| e.claim));
        storm.sort_unstable();
    }
    if let Some(region) = &claim.region {
        let rkey = format!("{}:{region}", crate::claim::REGION_KIND);
        let recent_from = t - SURGE_RECENT_DAYS * DAY;
        let past_from = t - REGION_WINDOW_DAYS * DAY;
        let recent = history.count_events(&rkey, recent_from, t) as f64;
        let past = history.count_events(&rkey, past_from, recent_from) as f64;
        let usual =
            past * SURGE_RECENT_DAYS as f64 / (REGION_WINDOW_DAYS - SURGE_RECENT_DAYS) as f64;
        // Without a baseline (a new region, the start of the history) there is no surge to
        // see: a handful of claims against none is not one.
        v[F::RegionSurge as usize] = if past >= SURGE_MIN_BASELINE {
            (recent + 1.0) / (usual + 1.0)
        } else {
            1.0
        };
    }
    let regional_surge = v[F::RegionSurge as usize] >= SURGE_RATIO;
    v[F::SurgeContext as usize] = b(regional_surge || claim.catastrophe_code.is_some());

    // Per party: its window, kept for the pair, similarity and typical-amount features.
    // (`linked_claims`: other claimants' claims linked to this one, with their amounts: the
    // exposure.)
    if windows.len() < claim.parties.len() {
        windows.resize_with(claim.parties.len(), Window::default);
    }
    for (p, pw) in claim.parties.iter().zip(windows.iter_mut()) {
        load(pw, p.role.as_str(), &p.id);
        let (recent_i, burst_i, long_i) = match p.role {
            Role::Repairer => (F::RepairerRecent, Some(F::RepairerBurst), None),
            Role::MedicalProvider => (F::MedicalRecent, Some(F::MedicalBurst), None),
            Role::Attorney => (F::AttorneyRecent, Some(F::AttorneyBurst), None),
            Role::PayeeAccount => (F::PayeeClaimants, None, Some(())),
            Role::Witness => (F::WitnessClaimants, None, Some(())),
            Role::ThirdParty => (F::ThirdPartyClaimants, None, Some(())),
        };
        if let Some(burst_i) = burst_i {
            let not_storm = |e: &HistoryEvent| storm.binary_search(&e.claim).is_err();
            let recent = pw.claimants(me, scratch, |e| e.at >= short_from && not_storm(e));
            let past = pw.claimants(me, scratch, |e| e.at < short_from && not_storm(e));
            let usual =
                past * SHORT_WINDOW_DAYS as f64 / (LONG_WINDOW_DAYS - SHORT_WINDOW_DAYS) as f64;
            // In a regional surge a firm's burst cannot be told from the surge's (untagged
            // storm claims count in it, tagged or not this one): it counts as no burst at all.
            let burst = if regional_surge {
                1.0
            } else {
                (recent + 1.0) / (usual + 1.0)
            };
            if burst > v[burst_i as usize] {
                v[burst_i as usize] = burst;
            }
            // Shown beside the burst in its reason: the firm with the highest burst.
            if burst >= v[burst_i as usize] {
                v[recent_i as usize] = recent;
            }
        }
        if long_i.is_some() {
            let c = pw.claimants(me, scratch, |_| true);
            v[recent_i as usize] = v[recent_i as usize].max(c);
            pw.link_into(me, short_from, linked_long, linked_short, linked_claims);
        }
    }
    let windows = &windows[..claim.parties.len()];
    if let Some(addr) = &claim.address_id {
        load(w, "address", addr);
        v[F::AddressClaimants as usize] = w.claimants(me, scratch, |_| true);
        w.link_into(me, short_from, linked_long, linked_short, linked_claims);
    }
    for l in [&mut *linked_long, &mut *linked_short] {
        l.sort_unstable();
        l.dedup();
    }
    v[F::LinkedLong as usize] = linked_long.len() as f64;
    v[F::LinkedShort as usize] = linked_short.len() as f64;

    // Parties named together on other claimants' claims.
    if by_claim.len() < windows.len() {
        by_claim.resize_with(windows.len(), Vec::new);
    }
    for (c, pw) in by_claim.iter_mut().zip(windows) {
        c.clear();
        c.extend(pw.events.iter().map(|e| (e.claim, e.claimant, e.amount)));
        c.sort_unstable_by_key(|e| e.0);
        c.dedup_by_key(|e| e.0);
    }
    let by_claim = &by_claim[..windows.len()];
    // Distinct other claimants of each party, to tell a pair that works together (a clinic and
    // a solicitor whose claimants are mostly the same) from two busy firms that meet by chance.
    party_claimants.clear();
    party_claimants.extend(windows.iter().map(|pw| pw.claimants(me, scratch, |_| true)));
    let mut best_pair = 0.0f64;
    for i in 0..by_claim.len() {
        for j in i + 1..by_claim.len() {
            if claim.parties[i].id == claim.parties[j].id
                && claim.parties[i].role == claim.parties[j].role
            {
                continue;
            }
            scratch.clear();
            pair_claims.clear();
            let (a, bb) = (&by_claim[i], &by_claim[j]);
            let (mut x, mut y) = (0, 0);
            while x < a.len() && y < bb.len() {
                match a[x].0.cmp(&bb[y].0) {
                    std::cmp::Ordering::Less => x += 1,
                    std::cmp::Ordering::Greater => y += 1,
                    std::cmp::Ordering::Equal => {
                        if a[x].1 != me {
                            scratch.push(a[x].1);
                            pair_claims.push((a[x].0, a[x].2));
                        }
                        x += 1;
                        y += 1;
                    }
                }
            }
            scratch.sort_unstable();
            scratch.dedup();
            let together = scratch.len() as f64;
            best_pair = best_pair.max(together);
            // The pair's claims count in the exposure only when at least half of the smaller
            // party's claimants came with the other party too.
            if together > 0.0 && 2.0 * together >= party_claimants[i].min(party_claimants[j]) {
                linked_claims.extend_from_slice(pair_claims);
            }
        }
    }
    v[F::PairClaimants as usize] = best_pair;
    linked_claims.sort_by_key(|e| e.0);
    linked_claims.dedup_by_key(|e| e.0);
    v[F::LinkedAmount as usize] = linked_claims.iter().map(|e| e.1).sum::<f64>().ln_1p();

    // Amounts against the same parties' earlier claims.
    let mut best_share = 0.0f64;
    let mut typical_from: Option<&Window> = None;
    for pw in windows {
        let k = pw.events.len();
        if k < 3 {
            continue;
        }
        let close = pw
            .events
            .iter()
            .filter(|e| (e.amount - amount).abs() <= 0.15 * amount)
            .count();
        best_share = best_share.max(close as f64 / k as f64);
        if typical_from.is_none_or(|t| k > t.events.len()) {
            typical_from = Some(pw);
        }
    }
    v[F::SimilarAmounts as usize] = best_share;
    if let Some(pw) = typical_from {
        let mut logs: Vec<f64> = pw.events.iter().map(|e| e.amount.max(1e-9).ln()).collect();
        logs.sort_by(f64::total_cmp);
        let m = logs.len();
        let median = if m % 2 == 1 {
            logs[m / 2]
        } else {
            0.5 * (logs[m / 2 - 1] + logs[m / 2])
        };
        v[F::AmountVsParty as usize] = amount.max(1e-9).ln() - median;
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
        let v = compute_in_memory(&c4, &h, &crate::graph::Settings::default());
        // R1 earlier: C1 by K1 (144 days before), C2 by K2 (24 days), C3 by K3 (5 days). K2 is
        // this claimant, so the other claimants in 30 days are K3 alone, and before that K1.
        assert_eq!(get(&v, "repairer_claimants_30d"), 1.0);
        let usual = 1.0 * 30.0 / 335.0;
        assert!((get(&v, "repairer_burst") - 2.0 / (1.0 + usual)).abs() < 1e-12);
        assert_eq!(get(&v, "claimant_claims_365d"), 1.0);
        assert_eq!(get(&v, "claimant_claims_30d"), 1.0);
        assert!((get(&v, "claimant_log_amount_365d") - 2000f64.ln_1p()).abs() < 1e-12);
        // R1 has 3 earlier claims (1000, 2000, 3000): none within 15% of 500; the median is
        // 2000, so the amount is a quarter of the typical one.
        assert_eq!(get(&v, "party_similar_amount_share"), 0.0);
        assert!((get(&v, "amount_vs_party_typical") - (500f64 / 2000.0).ln()).abs() < 1e-12);
        // A later claim is invisible, and a claim never sees itself.
        h.record(&c4);
        let v3 = compute_in_memory(&c3, &h, &crate::graph::Settings::default());
        assert_eq!(
            get(&v3, "repairer_claimants_30d"),
            1.0,
            "K2 (C2) 19 days before"
        );
        let v4 = compute_in_memory(&c4, &h, &crate::graph::Settings::default());
        assert_eq!(v4, v, "recording the claim itself changes nothing");
    }

    #[test]
    fn personal_links_pairs_and_round_figures() {
        let mk = |id: &str, k: &str, day: &str, parties: serde_json::Value, amount: f64| {
            Claim::from_value(&json!({
                "claim_id": id, "policy_id": format!("P-{k}"), "claimant_id": k,
                "line": "motor", "loss_date": day, "reported_at": format!("{day}T10:00:00Z"),
                "policy_start": "2024-01-01", "claimed_amount": amount, "sum_insured": 10000,
                "currency": "EUR", "parties": parties,
                "circumstances": {"police_report": true, "injury": true}
            }))
            .unwrap()
        };
        let mut h = MemoryHistory::new();
        // Two other claimants share the bank account B1; one of them also names M1 with A1.
        h.record(&mk("C1", "K1", "2025-03-01", json!([{"role": "payee_account", "id": "B1"}, {"role": "medical_provider", "id": "M1"}, {"role": "attorney", "id": "A1"}]), 1000.0));
        h.record(&mk(
            "C2",
            "K2",
            "2025-05-20",
            json!([{"role": "payee_account", "id": "B1"}]),
            1000.0,
        ));
        h.record(&mk(
            "C3",
            "K3",
            "2025-05-21",
            json!([{"role": "medical_provider", "id": "M1"}]),
            1000.0,
        ));
        let c = mk(
            "C9",
            "K9",
            "2025-06-01",
            json!([{"role": "payee_account", "id": "B1"}, {"role": "medical_provider", "id": "M1"}, {"role": "attorney", "id": "A1"}]),
            4950.0,
        );
        let v = compute_in_memory(&c, &h, &crate::graph::Settings::default());
        assert_eq!(get(&v, "payee_account_claimants_365d"), 2.0);
        assert_eq!(
            get(&v, "linked_claimants_365d"),
            2.0,
            "K1 and K2 through B1"
        );
        assert_eq!(
            get(&v, "linked_claimants_30d"),
            1.0,
            "K2 only, 12 days before"
        );
        // B1+M1 and B1+A1 and M1+A1 each appear together on C1 (K1) alone.
        assert_eq!(get(&v, "party_pair_claimants_365d"), 1.0);
        assert_eq!(
            get(&v, "amount_just_below_round_figure"),
            1.0,
            "4,950 under 5,000"
        );
        assert_eq!(get(&v, "amount_round_figure"), 0.0);
        assert_eq!(fmt_amount(4335.2), "4,335");
        assert_eq!(fmt_amount(1_250_000.0), "1,250,000");
        assert_eq!(fmt_amount(999.0), "999");
    }

    #[test]
    fn claim_level_features() {
        let mut c = claim("C1", "K1", "2025-01-11T10:00:00Z", "R1", 2500.0);
        c.loss_date = chrono::NaiveDate::from_ymd_opt(2025, 1, 1).unwrap();
        c.loss_time = chrono::NaiveTime::from_hms_opt(23, 0, 0);
        let v = compute_in_memory(
            &c,
            &MemoryHistory::new(),
            &crate::graph::Settings::default(),
        );
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
