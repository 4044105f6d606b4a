//! The claims graph: claims linked through the parties they name, within a trailing window.
//!
//! Nodes are claims and parties (claimant, policy, address, payee account, witness, third
//! party, repairer, medical provider, attorney). Two claims are linked when they share a
//! personal identifier (the first six kinds: a person, an account, a household), or when they
//! share at least two firms (repairer, provider, attorney): one busy body shop in common says
//! nothing, the same body shop with the same clinic does. A party naming more claims within
//! the window than its kind's cap ([`Settings::cap`]) is a hub and links nothing.
//!
//! A component is *recomputed around a claim* (breadth first, bounded by
//! [`Settings::max_claims`]) each time it is needed: at intake for the new claim, and when a
//! ring is read. Why not union–find kept across claims: union–find cannot forget, and a
//! trailing window must (a claim older than the window stops linking), so it would need
//! periodic rebuilds whose result depends on when they ran. A component recomputed from the
//! history at time `t` has one definition, answered identically by training (history in
//! memory, filled in time order) and by both stores, whatever order claims arrived in. The
//! cost is bounded by the cap on members and by hubs linking nothing; the decide path's time
//! with the graph is in the README.
//!
//! Everything here is pure: the history comes through [`GraphSource`].

use crate::claim::Claim;
use crate::features::{DAY, HistoryEvent, SHORT_WINDOW_DAYS, stable_hash};
use serde::{Deserialize, Serialize};
use std::collections::{BTreeMap, BTreeSet, HashMap, HashSet};

/// Kinds that identify a person, a household or an account: sharing one links two claims.
pub const PERSONAL_KINDS: [&str; 6] = [
    "claimant",
    "policy",
    "address",
    "payee_account",
    "witness",
    "third_party",
];
/// Firms: two claims sharing two of them are linked, sharing one is not.
pub const FIRM_KINDS: [&str; 3] = ["repairer", "medical_provider", "attorney"];

/// The kind of an entity key (`repairer:R-3` is a `repairer`).
pub fn kind_of(key: &str) -> &str {
    key.split_once(':').map_or(key, |(k, _)| k)
}

/// The id part of an entity key.
pub fn id_of(key: &str) -> &str {
    key.split_once(':').map_or(key, |(_, id)| id)
}

fn is_firm(key: &str) -> bool {
    FIRM_KINDS.contains(&kind_of(key))
}

/// How the graph is built. Training computes the caps from its own data and the settings
/// travel in the model artifact, so that serving links claims exactly as training did.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Settings {
    /// Trailing window, in days, of the claims a component holds.
    pub window_days: i64,
    /// A party's cap is this many times the median number of claims that parties of its kind
    /// name within the window ...
    pub hub_factor: f64,
    /// ... and never below this.
    pub hub_floor: u32,
    /// Most claims a component is followed to; beyond, it is reported as truncated.
    pub max_claims: usize,
    /// Claims a party may name within the window and still link them, by kind (computed).
    pub caps: BTreeMap<String, u32>,
}

impl Default for Settings {
    /// Common practice, no source: a year's window (the history features' long window); a
    /// hub is ten times its kind's median and at least 25 claims a year (a person or account
    /// naming more is a business, or something an investigator sees without a graph).
    fn default() -> Self {
        Settings {
            window_days: crate::features::LONG_WINDOW_DAYS,
            hub_factor: 10.0,
            hub_floor: 25,
            max_claims: 200,
            caps: BTreeMap::new(),
        }
    }
}

impl Settings {
    /// The cap of a kind: kinds training never saw get the floor.
    pub fn cap(&self, kind: &str) -> u32 {
        self.caps.get(kind).copied().unwrap_or(self.hub_floor)
    }

    /// Caps from the claims each party named within `[from, to)`: per kind, `hub_factor`
    /// times the median over the kind's parties, at least `hub_floor`.
    pub fn with_caps_from<'a>(
        mut self,
        claims: impl Iterator<Item = &'a Claim>,
        from: i64,
        to: i64,
    ) -> Settings {
        let mut counts: HashMap<String, u32> = HashMap::new();
        for c in claims {
            let t = c.event_time();
            if t < from || t >= to {
                continue;
            }
            for k in c.link_keys() {
                *counts.entry(k).or_default() += 1;
            }
        }
        let mut by_kind: BTreeMap<String, Vec<u32>> = BTreeMap::new();
        for (k, n) in counts {
            by_kind.entry(kind_of(&k).to_string()).or_default().push(n);
        }
        self.caps = by_kind
            .into_iter()
            .map(|(kind, mut v)| {
                v.sort_unstable();
                let m = v.len();
                let median = if m % 2 == 1 {
                    f64::from(v[m / 2])
                } else {
                    0.5 * f64::from(v[m / 2 - 1] + v[m / 2])
                };
                let cap = (self.hub_factor * median)
                    .floor()
                    .max(f64::from(self.hub_floor));
                (kind, cap.min(f64::from(u32::MAX)) as u32)
            })
            .collect();
        self
    }

    /// Problems with loaded settings (an artifact's), all at once.
    pub fn problems(&self) -> Vec<String> {
        let mut p = Vec::new();
        if self.window_days < 1 {
            p.push("graph.window_days must be at least 1".into());
        }
        if !(self.hub_factor.is_finite() && self.hub_factor > 0.0) {
            p.push("graph.hub_factor must be a positive number".into());
        }
        if self.max_claims < 2 {
            p.push("graph.max_claims must be at least 2".into());
        }
        p
    }
}

/// One claim as the graph sees it.
#[derive(Debug, Clone, PartialEq)]
pub struct ClaimNode {
    /// [`stable_hash`] of the claim id.
    pub claim: u64,
    pub claim_id: String,
    /// Report instant (seconds since the Unix epoch).
    pub at: i64,
    /// [`stable_hash`] of the claimant id.
    pub claimant: u64,
    pub amount: f64,
    /// The entity keys that link it ([`Claim::link_keys`]), sorted.
    pub keys: Vec<String>,
}

impl ClaimNode {
    pub fn of(claim: &Claim) -> ClaimNode {
        ClaimNode {
            claim: stable_hash(&claim.claim_id),
            claim_id: claim.claim_id.clone(),
            at: claim.event_time(),
            claimant: stable_hash(&claim.claimant_id),
            amount: claim.claimed_amount,
            keys: claim.link_keys(),
        }
    }

    /// Compact bytes for a store: time, claimant, amount, then the id and keys separated by
    /// the unit separator (ids hold no control characters: validation refuses them).
    pub fn encode(&self) -> Vec<u8> {
        let mut b = Vec::with_capacity(24 + self.claim_id.len() + 16 * self.keys.len());
        b.extend_from_slice(&self.at.to_le_bytes());
        b.extend_from_slice(&self.claimant.to_le_bytes());
        b.extend_from_slice(&self.amount.to_le_bytes());
        b.extend_from_slice(self.claim_id.as_bytes());
        for k in &self.keys {
            b.push(0x1f);
            b.extend_from_slice(k.as_bytes());
        }
        b
    }

    /// The inverse of [`ClaimNode::encode`]; `None` for bytes it did not write.
    pub fn decode(claim: u64, b: &[u8]) -> Option<ClaimNode> {
        if b.len() < 24 {
            return None;
        }
        let at = i64::from_le_bytes(b[0..8].try_into().ok()?);
        let claimant = u64::from_le_bytes(b[8..16].try_into().ok()?);
        let amount = f64::from_le_bytes(b[16..24].try_into().ok()?);
        let text = std::str::from_utf8(&b[24..]).ok()?;
        let mut parts = text.split('\u{1f}');
        let claim_id = parts.next()?.to_string();
        Some(ClaimNode {
            claim,
            claim_id,
            at,
            claimant,
            amount,
            keys: parts.map(String::from).collect(),
        })
    }
}

/// A store's failure while the graph was read.
#[derive(Debug, thiserror::Error)]
#[error("claims graph: {0}")]
pub struct SourceError(pub String);

/// Where the graph's history comes from: the in-memory history in training, a store in
/// serving. Calls are batched by breadth-first level, so a remote store answers a component
/// in a few round trips.
pub trait GraphSource {
    /// For each `(key, limit)`: the key's events with `from <= at < to`, in `(at, claim)`
    /// order, at most `limit` of them (enough to tell a hub).
    fn events(
        &self,
        keys: &[(String, usize)],
        from: i64,
        to: i64,
    ) -> Result<Vec<Vec<HistoryEvent>>, SourceError>;
    /// The stored claims with these hashes (`None` for one no longer stored).
    fn nodes(&self, claims: &[u64]) -> Result<Vec<Option<ClaimNode>>, SourceError>;
}

/// A party that ties two or more claims of a component.
#[derive(Debug, Clone, PartialEq)]
pub struct Tie {
    pub key: String,
    /// Hashes of the member claims it ties, in member order.
    pub claims: Vec<u64>,
}

/// A party met that names more claims than its kind's cap: it links nothing.
#[derive(Debug, Clone, PartialEq)]
pub struct Hub {
    pub key: String,
    /// Claims it names within the window (at least; counting stops past the cap).
    pub claims: usize,
    pub cap: u32,
}

/// The connected component of a claim.
#[derive(Debug, Clone, PartialEq)]
pub struct Component {
    /// `G-` and the hash of its earliest claim: stable while that claim stays in the window.
    pub id: String,
    /// Members in report order (the seed among them).
    pub members: Vec<ClaimNode>,
    pub ties: Vec<Tie>,
    pub hubs: Vec<Hub>,
    /// More than [`Settings::max_claims`] claims: the rest were not followed.
    pub truncated: bool,
    /// The window read: `from <= at < to`.
    pub from: i64,
    pub to: i64,
}

/// What the features read of a claim's component.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Summary {
    /// Other claims in the component.
    pub claims: f64,
    /// Distinct claimants of those claims, the claim's own claimant left out.
    pub claimants: f64,
    /// Other claims reported within the short window (30 days) before the claim.
    pub recent: f64,
}

/// A component as a decision records it, and as a store keeps it for the rings list.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ComponentRef {
    pub id: String,
    /// Claims in the component, this one included.
    pub claims: usize,
    pub claimants: usize,
    /// Claims reported in the 30 days before the decided claim (it included).
    pub recent: usize,
    pub amount: f64,
    /// Report instants of its first and last claims.
    pub first_at: i64,
    pub last_at: i64,
    /// More claims than the bound: the figures count those followed.
    pub truncated: bool,
}

/// A store's entry for one component: the latest claim decided in it (where a read starts
/// recomputing it) and its figures then.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RingRecord {
    pub seed: String,
    pub component: ComponentRef,
}

impl RingRecord {
    /// A first ranking before the ring is recomputed with its outcomes.
    pub fn pre_score(&self) -> f64 {
        let c = &self.component;
        ring_score(&RingFacts {
            claims: c.claims,
            claimants: c.claimants,
            recent: c.recent,
            flagged: 0,
            amount: c.amount,
        })
    }
}

/// The id of the component whose earliest claim has this hash.
pub fn component_id(earliest: u64) -> String {
    format!("G-{earliest:016x}")
}

/// Parse a component id back to its earliest claim's hash.
pub fn parse_component_id(id: &str) -> Option<u64> {
    let hex = id.strip_prefix("G-")?;
    if hex.len() != 16 {
        return None;
    }
    u64::from_str_radix(hex, 16).ok()
}

impl Component {
    /// What the features of `seed` (a member) read, at time `t`.
    pub fn summary(&self, seed: u64, t: i64) -> Summary {
        let Some(me) = self.members.iter().find(|m| m.claim == seed) else {
            return Summary::default();
        };
        let others = self.members.iter().filter(|m| m.claim != seed);
        let claimants: HashSet<u64> = others
            .clone()
            .map(|m| m.claimant)
            .filter(|&c| c != me.claimant)
            .collect();
        let recent_from = t - SHORT_WINDOW_DAYS * DAY;
        Summary {
            claims: (self.members.len() - 1) as f64,
            claimants: claimants.len() as f64,
            recent: others.filter(|m| m.at >= recent_from).count() as f64,
        }
    }

    /// The record a decision at time `t` keeps.
    pub fn reference(&self, t: i64) -> ComponentRef {
        let recent_from = t - SHORT_WINDOW_DAYS * DAY;
        ComponentRef {
            id: self.id.clone(),
            claims: self.members.len(),
            claimants: self.claimants(),
            recent: self.members.iter().filter(|m| m.at >= recent_from).count(),
            amount: self.amount(),
            first_at: self.members.first().map_or(t, |m| m.at),
            last_at: self.members.last().map_or(t, |m| m.at),
            truncated: self.truncated,
        }
    }

    /// Distinct claimants of all members.
    pub fn claimants(&self) -> usize {
        self.members
            .iter()
            .map(|m| m.claimant)
            .collect::<HashSet<_>>()
            .len()
    }

    pub fn amount(&self) -> f64 {
        self.members.iter().map(|m| m.amount).sum()
    }

    /// The ties that link `claim` to other members, strongest (most claims) first.
    pub fn ties_of(&self, claim: u64) -> Vec<&Tie> {
        let mut t: Vec<&Tie> = self
            .ties
            .iter()
            .filter(|t| t.claims.contains(&claim))
            .collect();
        t.sort_by(|a, b| b.claims.len().cmp(&a.claims.len()).then(a.key.cmp(&b.key)));
        t
    }
}

/// The component of `seed` among the claims with `from <= at < to`. `seed_stored` says
/// whether the seed is itself in the history (a ring read back) or not yet (a claim being
/// decided, which then counts towards its parties' caps too).
pub fn component(
    source: &dyn GraphSource,
    settings: &Settings,
    seed: ClaimNode,
    from: i64,
    to: i64,
    seed_stored: bool,
) -> Result<Component, SourceError> {
    let mut members: Vec<ClaimNode> = vec![seed];
    let mut index: HashSet<u64> = HashSet::from([members[0].claim]);
    // Per key: its events in the window, or `None` for a hub.
    let mut known: HashMap<String, Option<Vec<HistoryEvent>>> = HashMap::new();
    let mut ties: BTreeMap<String, BTreeSet<u64>> = BTreeMap::new();
    let mut hubs: BTreeMap<String, (usize, u32)> = BTreeMap::new();
    let mut truncated = false;
    let mut frontier: Vec<usize> = vec![0];
    while !frontier.is_empty() {
        let mut need: Vec<(String, usize)> = frontier
            .iter()
            .flat_map(|&i| members[i].keys.iter())
            .filter(|k| !known.contains_key(*k))
            .map(|k| (k.clone(), settings.cap(kind_of(k)) as usize + 1))
            .collect();
        need.sort();
        need.dedup();
        let got = source.events(&need, from, to)?;
        for ((key, _), events) in need.into_iter().zip(got) {
            let cap = settings.cap(kind_of(&key));
            let mut n = events.len();
            if !seed_stored
                && members[0].keys.binary_search(&key).is_ok()
                && !events.iter().any(|e| e.claim == members[0].claim)
            {
                n += 1;
            }
            if n > cap as usize {
                hubs.insert(key.clone(), (n, cap));
                known.insert(key, None);
            } else {
                known.insert(key, Some(events));
            }
        }
        let mut found: Vec<u64> = Vec::new();
        let mut seen_found: HashSet<u64> = HashSet::new();
        for &i in &frontier {
            let x = members[i].claim;
            let mut firm_hits: BTreeMap<u64, Vec<&str>> = BTreeMap::new();
            let mut link = |key: &str, c: u64, found: &mut Vec<u64>| {
                let t = ties.entry(key.to_string()).or_default();
                t.insert(x);
                t.insert(c);
                if !index.contains(&c) && seen_found.insert(c) {
                    found.push(c);
                }
            };
            for key in &members[i].keys {
                let Some(Some(events)) = known.get(key) else {
                    continue;
                };
                for e in events.iter().filter(|e| e.claim != x) {
                    if is_firm(key) {
                        let hits = firm_hits.entry(e.claim).or_default();
                        if hits.last() != Some(&key.as_str()) {
                            hits.push(key);
                        }
                    } else {
                        link(key, e.claim, &mut found);
                    }
                }
            }
            for (c, keys) in firm_hits {
                if keys.len() >= 2 {
                    for k in keys {
                        link(k, c, &mut found);
                    }
                }
            }
        }
        let room = settings.max_claims.saturating_sub(members.len());
        if found.len() > room {
            truncated = true;
            found.truncate(room);
        }
        frontier.clear();
        for node in source.nodes(&found)?.into_iter().flatten() {
            if index.insert(node.claim) {
                frontier.push(members.len());
                members.push(node);
            }
        }
    }
    members.sort_by(|a, b| a.at.cmp(&b.at).then(a.claim.cmp(&b.claim)));
    let order: HashMap<u64, usize> = members
        .iter()
        .enumerate()
        .map(|(i, m)| (m.claim, i))
        .collect();
    let ties = ties
        .into_iter()
        .filter_map(|(key, claims)| {
            let mut claims: Vec<u64> = claims
                .into_iter()
                .filter(|c| order.contains_key(c))
                .collect();
            claims.sort_by_key(|c| order[c]);
            (claims.len() >= 2).then_some(Tie { key, claims })
        })
        .collect();
    Ok(Component {
        id: component_id(members[0].claim),
        members,
        ties,
        hubs: hubs
            .into_iter()
            .map(|(key, (claims, cap))| Hub { key, claims, cap })
            .collect(),
        truncated,
        from,
        to,
    })
}

/// The component of a claim about to be decided: the claims of the window before it.
pub fn component_of_new(
    source: &dyn GraphSource,
    settings: &Settings,
    claim: &Claim,
) -> Result<Component, SourceError> {
    let t = claim.event_time();
    component(
        source,
        settings,
        ClaimNode::of(claim),
        t - settings.window_days * DAY,
        t,
        false,
    )
}

/// What a ring's score reads.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize)]
pub struct RingFacts {
    pub claims: usize,
    pub claimants: usize,
    /// Claims reported in the last 30 days.
    pub recent: usize,
    /// Claims referred for review (investigate or desk check) or confirmed as fraud.
    pub flagged: usize,
    pub amount: f64,
}

/// The ring score, stated (common practice, no source): distinct claimants beyond the first
/// (one person's own claims are not a ring), times one plus the share reported in the last 30
/// days (growth), times one plus the share referred or confirmed, times one plus the base-10
/// logarithm of the total amount in tens of thousands (plus one).
pub fn ring_score(f: &RingFacts) -> f64 {
    if f.claims == 0 {
        return 0.0;
    }
    let n = f.claims as f64;
    (f.claimants.saturating_sub(1)) as f64
        * (1.0 + f.recent as f64 / n)
        * (1.0 + f.flagged as f64 / n)
        * (1.0 + (1.0 + f.amount.max(0.0) / 10_000.0).log10())
}

/// How a party appears in an investigator's sentence: `payee account B-1`.
pub fn party_words(key: &str) -> String {
    format!("{} {}", kind_of(key).replace('_', " "), id_of(key))
}

/// What GraphML's writer needs of each claim beyond the graph itself.
pub struct MemberFacts {
    pub queue: String,
    pub outcome: String,
}

fn xml_escape(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for ch in s.chars() {
        match ch {
            '&' => o.push_str("&amp;"),
            '<' => o.push_str("&lt;"),
            '>' => o.push_str("&gt;"),
            '"' => o.push_str("&quot;"),
            '\'' => o.push_str("&apos;"),
            c => o.push(c),
        }
    }
    o
}

/// The component as GraphML (<http://graphml.graphdrawing.org/>): claim and party nodes, an
/// edge from each claim to each party that ties it to another member.
pub fn graphml(c: &Component, facts: &dyn Fn(&ClaimNode) -> MemberFacts) -> String {
    let mut o = String::new();
    o.push_str("<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n");
    o.push_str("<graphml xmlns=\"http://graphml.graphdrawing.org/xmlns\" xmlns:xsi=\"http://www.w3.org/2001/XMLSchema-instance\" xsi:schemaLocation=\"http://graphml.graphdrawing.org/xmlns http://graphml.graphdrawing.org/xmlns/1.0/graphml.xsd\">\n");
    for (id, ty, name) in [
        ("d0", "string", "kind"),
        ("d1", "string", "label"),
        ("d2", "double", "amount"),
        ("d3", "string", "reported_at"),
        ("d4", "string", "queue"),
        ("d5", "string", "outcome"),
        ("d6", "string", "role"),
    ] {
        o.push_str(&format!(
            "  <key id=\"{id}\" for=\"node\" attr.name=\"{name}\" attr.type=\"{ty}\"/>\n"
        ));
    }
    o.push_str(&format!(
        "  <graph id=\"{}\" edgedefault=\"undirected\">\n",
        xml_escape(&c.id)
    ));
    for m in &c.members {
        let f = facts(m);
        let when = chrono::DateTime::from_timestamp(m.at, 0)
            .map(|d| d.to_rfc3339())
            .unwrap_or_default();
        o.push_str(&format!(
            "    <node id=\"claim:{}\"><data key=\"d0\">claim</data><data key=\"d1\">{}</data><data key=\"d2\">{}</data><data key=\"d3\">{}</data><data key=\"d4\">{}</data><data key=\"d5\">{}</data></node>\n",
            xml_escape(&m.claim_id),
            xml_escape(&m.claim_id),
            m.amount,
            when,
            xml_escape(&f.queue),
            xml_escape(&f.outcome),
        ));
    }
    for t in &c.ties {
        o.push_str(&format!(
            "    <node id=\"party:{}\"><data key=\"d0\">party</data><data key=\"d1\">{}</data><data key=\"d6\">{}</data></node>\n",
            xml_escape(&t.key),
            xml_escape(id_of(&t.key)),
            xml_escape(kind_of(&t.key)),
        ));
    }
    let ids: HashMap<u64, &str> = c
        .members
        .iter()
        .map(|m| (m.claim, m.claim_id.as_str()))
        .collect();
    for t in &c.ties {
        for h in &t.claims {
            o.push_str(&format!(
                "    <edge source=\"claim:{}\" target=\"party:{}\"/>\n",
                xml_escape(ids[h]),
                xml_escape(&t.key)
            ));
        }
    }
    o.push_str("  </graph>\n</graphml>\n");
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A graph source over a fixed list of nodes.
    pub(crate) struct Fixed(pub Vec<ClaimNode>);

    impl GraphSource for Fixed {
        fn events(
            &self,
            keys: &[(String, usize)],
            from: i64,
            to: i64,
        ) -> Result<Vec<Vec<HistoryEvent>>, SourceError> {
            Ok(keys
                .iter()
                .map(|(k, limit)| {
                    let mut v: Vec<HistoryEvent> = self
                        .0
                        .iter()
                        .filter(|n| n.keys.contains(k) && n.at >= from && n.at < to)
                        .map(|n| HistoryEvent {
                            at: n.at,
                            claim: n.claim,
                            claimant: n.claimant,
                            amount: n.amount,
                        })
                        .collect();
                    v.sort_by_key(|e| (e.at, e.claim));
                    v.truncate(*limit);
                    v
                })
                .collect())
        }
        fn nodes(&self, claims: &[u64]) -> Result<Vec<Option<ClaimNode>>, SourceError> {
            Ok(claims
                .iter()
                .map(|c| self.0.iter().find(|n| n.claim == *c).cloned())
                .collect())
        }
    }

    fn node(id: &str, at: i64, keys: &[&str]) -> ClaimNode {
        let mut keys: Vec<String> = keys.iter().map(|s| s.to_string()).collect();
        keys.sort();
        ClaimNode {
            claim: stable_hash(id),
            claim_id: id.into(),
            at,
            claimant: stable_hash(&format!("K-{id}")),
            amount: 100.0,
            keys,
        }
    }

    fn ids(c: &Component) -> Vec<&str> {
        let mut v: Vec<&str> = c.members.iter().map(|m| m.claim_id.as_str()).collect();
        v.sort();
        v
    }

    #[test]
    fn personal_keys_link_one_firm_does_not_two_firms_do() {
        let src = Fixed(vec![
            node("A", 10, &["payee_account:B1", "repairer:R1"]),
            node("B", 20, &["payee_account:B1"]),
            node("C", 30, &["repairer:R1"]),
            node("D", 40, &["repairer:R1", "attorney:L1"]),
            node("E", 50, &["repairer:R1", "attorney:L1"]),
        ]);
        let s = Settings::default();
        let c = component(&src, &s, src.0[0].clone(), 0, 100, true).unwrap();
        assert_eq!(ids(&c), ["A", "B"]);
        assert_eq!(c.id, component_id(stable_hash("A")));
        let d = component(&src, &s, src.0[3].clone(), 0, 100, true).unwrap();
        assert_eq!(ids(&d), ["D", "E"]);
        assert_eq!(d.ties.len(), 2, "both firms tie the pair: {:?}", d.ties);
        // Out of the window, B no longer links.
        let late = component(&src, &s, src.0[0].clone(), 25, 100, true).unwrap();
        assert_eq!(ids(&late), ["A"]);
    }

    #[test]
    fn a_hub_above_its_cap_links_nothing() {
        let mut nodes: Vec<ClaimNode> = (0..30)
            .map(|i| node(&format!("C{i}"), i, &["payee_account:BIG"]))
            .collect();
        nodes.push(node("X", 100, &["payee_account:BIG", "address:H1"]));
        nodes.push(node("Y", 101, &["address:H1"]));
        let src = Fixed(nodes);
        let s = Settings::default(); // floor 25: BIG names 31 claims
        let c = component(&src, &s, src.0[30].clone(), 0, 1000, true).unwrap();
        assert_eq!(ids(&c), ["X", "Y"]);
        assert_eq!(c.hubs.len(), 1);
        assert_eq!(c.hubs[0].key, "payee_account:BIG");
        assert!(c.hubs[0].claims > 25);
    }

    #[test]
    fn the_bound_truncates_and_says_so() {
        let nodes: Vec<ClaimNode> = (0..20)
            .map(|i| node(&format!("C{i:02}"), i, &["address:H"]))
            .collect();
        let src = Fixed(nodes);
        let s = Settings {
            max_claims: 5,
            ..Settings::default()
        };
        let c = component(&src, &s, src.0[0].clone(), 0, 100, true).unwrap();
        assert_eq!(c.members.len(), 5);
        assert!(c.truncated);
    }

    #[test]
    fn caps_follow_the_kinds_median() {
        let claim = |id: &str, r: &str| {
            Claim::from_value(&serde_json::json!({
                "claim_id": id, "policy_id": format!("P{id}"), "claimant_id": format!("K{id}"),
                "line": "motor", "loss_date": "2025-01-01", "reported_at": "2025-01-02T00:00:00Z",
                "policy_start": "2024-01-01", "claimed_amount": 100.0, "sum_insured": 1000.0,
                "currency": "EUR", "parties": [{"role": "repairer", "id": r}],
                "circumstances": {"police_report": true, "injury": false, "total_loss": false, "theft": false}
            }))
            .unwrap_or_else(|e| panic!("{e:?}"))
        };
        // Repairers naming 3, 3 and 5 claims: median 3, cap max(10 x 3, 25) = 30.
        let mut claims = Vec::new();
        for (r, n) in [("R1", 3), ("R2", 3), ("R3", 5)] {
            for i in 0..n {
                claims.push(claim(&format!("{r}-{i}"), r));
            }
        }
        let s = Settings::default().with_caps_from(claims.iter(), 0, i64::MAX);
        assert_eq!(s.cap("repairer"), 30);
        assert_eq!(s.cap("claimant"), 25);
        let s = Settings {
            hub_factor: 2.0,
            hub_floor: 1,
            ..Settings::default()
        }
        .with_caps_from(claims.iter(), 0, i64::MAX);
        assert_eq!(s.cap("repairer"), 6);
    }

    #[test]
    fn node_bytes_round_trip() {
        let n = node("C-1", -5, &["claimant:K", "repairer:R 1"]);
        assert_eq!(ClaimNode::decode(n.claim, &n.encode()), Some(n));
        assert_eq!(ClaimNode::decode(1, b"short"), None);
    }

    #[test]
    fn ring_score_needs_two_claimants() {
        let one = RingFacts {
            claims: 5,
            claimants: 1,
            recent: 5,
            flagged: 5,
            amount: 1e6,
        };
        assert_eq!(ring_score(&one), 0.0);
        let ring = RingFacts {
            claimants: 4,
            ..one
        };
        // 3 x 2 x 2 x (1 + log10(101))
        assert!((ring_score(&ring) - 12.0 * (1.0 + 101f64.log10())).abs() < 1e-9);
    }
}
