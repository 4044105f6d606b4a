//! Rings: components of the claims graph as investigators read them, ranked by the stated
//! ring score ([`graph::ring_score`]), and the raise a confirmed fraud gives the open claims
//! linked to it.
//!
//! Components are recomputed from the stored history when read (see [`graph`] for why); the
//! store keeps, per component decided into, the latest claim decided in it, which is where a
//! read starts. Reads are "as of" the latest claim reported to weir, so that a book loaded
//! from last year's files reads the same as a live one.

use crate::feedback::Outcome;
use crate::graph::{self, Component, RingFacts};
use crate::rules::Queue;
use crate::service::{Service, ServiceError};
use crate::store::{DecisionRecord, StoreError};
use serde::Serialize;
use std::collections::HashMap;

/// How much a confirmed fraud in a claim's component raises its priority: this share of it
/// per confirmed claim, to at most [`RING_RAISE_MAX`] times (common practice, no source: the
/// raise moves linked claims up the queue without letting one finding outrank every other
/// piece of evidence).
pub const RING_RAISE_PER_CONFIRMED: f64 = 0.5;
pub const RING_RAISE_MAX: f64 = 2.0;
/// Rings recomputed per listing, at most (the stored pre-score picks them).
const LIST_CANDIDATES: usize = 300;

/// One claim of a ring.
#[derive(Debug, Clone, Serialize)]
pub struct Member {
    pub claim_id: String,
    pub reported_at: String,
    pub loss_date: String,
    pub claimant_id: String,
    pub amount: f64,
    pub currency: String,
    pub queue: Option<Queue>,
    pub outcome: Option<Outcome>,
    pub priority: Option<f64>,
}

/// A party tying two or more claims of a ring.
#[derive(Debug, Clone, Serialize)]
pub struct Tie {
    /// `payee_account:B-1`
    pub party: String,
    pub kind: String,
    pub id: String,
    pub claims: Vec<String>,
}

/// A party met while following the ring that names too many claims to link them.
#[derive(Debug, Clone, Serialize)]
pub struct Hub {
    pub party: String,
    /// Claims it names in the window (at least).
    pub claims: usize,
    pub cap: u32,
}

/// A ring read back.
#[derive(Debug, Clone, Serialize)]
pub struct Ring {
    pub id: String,
    pub score: f64,
    pub facts: RingFacts,
    pub first_reported: String,
    pub last_reported: String,
    /// The window read: claims reported from `window_from` on.
    pub window_from: String,
    pub as_of: String,
    pub truncated: bool,
    pub members: Vec<Member>,
    pub ties: Vec<Tie>,
    pub hubs: Vec<Hub>,
}

fn when(at: i64) -> String {
    chrono::DateTime::from_timestamp(at, 0)
        .map(|d| d.to_rfc3339())
        .unwrap_or_default()
}

fn flagged(m: &Member) -> bool {
    matches!(m.queue, Some(Queue::Investigate | Queue::DeskCheck))
        || m.outcome == Some(Outcome::FraudConfirmed)
}

impl Service {
    /// The instant rings are read at: the latest report among stored components, else `now`.
    pub fn rings_as_of(&self, now: i64) -> Result<i64, ServiceError> {
        let latest = self
            .store
            .rings(i64::MIN)?
            .iter()
            .map(|r| r.component.last_at)
            .max();
        Ok(latest.unwrap_or(now))
    }

    /// The component of a stored claim as of `as_of`, or `None` for an unknown claim.
    pub fn component_of(
        &self,
        claim_id: &str,
        as_of: i64,
    ) -> Result<Option<Component>, ServiceError> {
        let settings = self.model().artifact.graph.clone();
        let h = crate::features::stable_hash(claim_id);
        let Some(seed) = self
            .store
            .graph()
            .nodes(&[h])
            .map_err(StoreError::from)?
            .pop()
            .flatten()
        else {
            return Ok(None);
        };
        let from = as_of - settings.window_days * crate::features::DAY;
        Ok(Some(
            graph::component(self.store.graph(), &settings, seed, from, i64::MAX, true)
                .map_err(StoreError::from)?,
        ))
    }

    /// A component with what investigators read beside it: each claim's queue and outcome.
    pub fn ring_view(&self, c: &Component, as_of: i64) -> Result<Ring, ServiceError> {
        let mut members = Vec::with_capacity(c.members.len());
        for m in &c.members {
            let head = self.store.head(&m.claim_id)?;
            let rec: Option<DecisionRecord> = match &head {
                Some(h) => self.store.decision(&m.claim_id, h.revision)?,
                None => None,
            };
            let outcome = self.store.outcome(&m.claim_id)?.map(|o| o.report.outcome);
            members.push(Member {
                claim_id: m.claim_id.clone(),
                reported_at: when(m.at),
                loss_date: rec
                    .as_ref()
                    .map(|r| r.claim.loss_date.to_string())
                    .unwrap_or_default(),
                claimant_id: rec
                    .as_ref()
                    .map(|r| r.claim.claimant_id.clone())
                    .unwrap_or_default(),
                amount: m.amount,
                currency: rec
                    .as_ref()
                    .map(|r| r.claim.currency.clone())
                    .unwrap_or_default(),
                queue: rec.as_ref().map(|r| r.queue),
                outcome,
                priority: rec.as_ref().map(|r| r.priority),
            });
        }
        let ids: HashMap<u64, &str> = c
            .members
            .iter()
            .map(|m| (m.claim, m.claim_id.as_str()))
            .collect();
        let recent_from = as_of - crate::features::SHORT_WINDOW_DAYS * crate::features::DAY;
        let facts = RingFacts {
            claims: c.members.len(),
            claimants: c.claimants(),
            recent: c.members.iter().filter(|m| m.at >= recent_from).count(),
            flagged: members.iter().filter(|m| flagged(m)).count(),
            amount: c.amount(),
        };
        let mut ties: Vec<Tie> = c
            .ties
            .iter()
            .map(|t| Tie {
                party: t.key.clone(),
                kind: graph::kind_of(&t.key).to_string(),
                id: graph::id_of(&t.key).to_string(),
                claims: t.claims.iter().map(|h| ids[h].to_string()).collect(),
            })
            .collect();
        ties.sort_by(|a, b| {
            b.claims
                .len()
                .cmp(&a.claims.len())
                .then(a.party.cmp(&b.party))
        });
        Ok(Ring {
            id: c.id.clone(),
            score: graph::ring_score(&facts),
            facts,
            first_reported: c.members.first().map(|m| when(m.at)).unwrap_or_default(),
            last_reported: c.members.last().map(|m| when(m.at)).unwrap_or_default(),
            window_from: when(c.from),
            as_of: when(as_of),
            truncated: c.truncated,
            members,
            ties,
            hubs: c
                .hubs
                .iter()
                .map(|h| Hub {
                    party: h.key.clone(),
                    claims: h.claims,
                    cap: h.cap,
                })
                .collect(),
        })
    }

    /// Rings (components of two or more claimants) ranked by ring score, best first.
    pub fn rings(&self, now: i64, limit: usize) -> Result<(i64, Vec<Ring>), ServiceError> {
        let as_of = self.rings_as_of(now)?;
        let w = self.model().artifact.graph.window_days;
        let mut candidates = self.store.rings(as_of - w * crate::features::DAY)?;
        candidates.retain(|r| r.component.claimants >= 2);
        candidates.sort_by(|a, b| {
            b.pre_score()
                .total_cmp(&a.pre_score())
                .then(a.component.id.cmp(&b.component.id))
        });
        candidates.truncate(LIST_CANDIDATES.max(limit));
        let mut seen = std::collections::HashSet::new();
        let mut out = Vec::new();
        for r in candidates {
            let Some(c) = self.component_of(&r.seed, as_of)? else {
                continue;
            };
            if !seen.insert(c.id.clone()) || c.claimants() < 2 {
                continue;
            }
            out.push(self.ring_view(&c, as_of)?);
        }
        out.sort_by(|a, b| b.score.total_cmp(&a.score).then(a.id.cmp(&b.id)));
        out.truncate(limit);
        Ok((as_of, out))
    }

    /// One ring by id, recomputed from the latest claim decided into it (`None`: unknown id).
    pub fn ring(&self, id: &str, now: i64) -> Result<Option<Ring>, ServiceError> {
        let Some(r) = self.store.ring(id)? else {
            return Ok(None);
        };
        let as_of = self.rings_as_of(now)?;
        match self.component_of(&r.seed, as_of)? {
            Some(c) => Ok(Some(self.ring_view(&c, as_of)?)),
            None => Ok(None),
        }
    }

    /// After `claim_id` was confirmed as fraud: raise the priority of the open claims of its
    /// component, each by [`RING_RAISE_PER_CONFIRMED`] per confirmed claim in the component
    /// (at most [`RING_RAISE_MAX`] times the priority it was decided with), with a reason
    /// naming the party and the count, written as a new audit revision of each. Returns the
    /// claims raised.
    pub fn raise_linked(
        &self,
        claim_id: &str,
        now: chrono::DateTime<chrono::Utc>,
    ) -> Result<Vec<String>, ServiceError> {
        let as_of = self.rings_as_of(now.timestamp())?;
        let Some(c) = self.component_of(claim_id, as_of)? else {
            return Ok(Vec::new());
        };
        let mut confirmed: Vec<u64> = Vec::new();
        for m in &c.members {
            if self
                .store
                .outcome(&m.claim_id)?
                .is_some_and(|o| o.report.outcome == Outcome::FraudConfirmed)
            {
                confirmed.push(m.claim);
            }
        }
        if confirmed.is_empty() {
            return Ok(Vec::new());
        }
        let factor = (1.0 + RING_RAISE_PER_CONFIRMED * confirmed.len() as f64).min(RING_RAISE_MAX);
        let ids: HashMap<u64, &str> = c
            .members
            .iter()
            .map(|m| (m.claim, m.claim_id.as_str()))
            .collect();
        let mut raised = Vec::new();
        for m in c.members.iter().filter(|m| !confirmed.contains(&m.claim)) {
            let _guard = self
                .store
                .lock(&[crate::service::claim_lock_key(&m.claim_id)])?;
            if self.store.outcome(&m.claim_id)?.is_some() {
                continue; // already adjudicated: nothing open to raise
            }
            let Some(head) = self.store.head(&m.claim_id)? else {
                continue;
            };
            let Some(current) = self.store.decision(&m.claim_id, head.revision)? else {
                continue;
            };
            if !matches!(current.queue, Queue::Investigate | Queue::DeskCheck) {
                continue; // not referred (or drawn for the audit sample, which stays random)
            }
            let Some(item) = self.store.queue_item(current.queue, &m.claim_id)? else {
                continue;
            };
            // The priority the claim was scored with: the latest revision not itself a raise.
            let base = self
                .store
                .revisions(&m.claim_id)?
                .into_iter()
                .rev()
                .find(|r| r.revised_because.is_none())
                .map_or(current.priority, |r| r.priority);
            let priority = base * factor;
            let text = raise_words(&c, m.claim, &confirmed, &ids);
            // Nothing new: the same raise, said the same way (a repeated post).
            let said = current
                .reasons
                .iter()
                .any(|r| r.code == "ring.confirmed" && r.text == text);
            if priority <= current.priority && said {
                continue;
            }
            let reason = crate::model::Reason {
                code: "ring.confirmed".into(),
                text,
                weight: factor,
            };
            let mut rec = current.clone();
            rec.revision = head.revision + 1;
            rec.decided_at = now.to_rfc3339();
            rec.priority = priority.max(current.priority);
            rec.reasons.retain(|r| r.code != "ring.confirmed");
            rec.reasons.insert(0, reason.clone());
            rec.revised_because = Some(format!(
                "claim {claim_id} confirmed as fraud; {} claim(s) of component {} confirmed; priority {:.0} raised {factor:.1} times",
                confirmed.len(),
                c.id,
                base
            ));
            let mut it = item.clone();
            it.revision = rec.revision;
            it.priority = rec.priority;
            it.reasons.retain(|r| r.code != "ring.confirmed");
            it.reasons.insert(0, reason);
            it.reasons.truncate(3);
            self.store.record(&rec, Some(&current), Some(&it))?;
            raised.push(m.claim_id.clone());
        }
        Ok(raised)
    }
}

/// "linked through medical provider M-88 to 2 claims confirmed as fraud (C-1, C-2)".
fn raise_words(c: &Component, claim: u64, confirmed: &[u64], ids: &HashMap<u64, &str>) -> String {
    let direct: Vec<&graph::Tie> = c
        .ties_of(claim)
        .into_iter()
        .filter(|t| t.claims.iter().any(|h| confirmed.contains(h)))
        .collect();
    let names: Vec<&str> = confirmed
        .iter()
        .filter_map(|h| ids.get(h).copied())
        .collect();
    let n = confirmed.len();
    let what = if n == 1 {
        "1 claim confirmed as fraud".to_string()
    } else {
        format!("{n} claims confirmed as fraud")
    };
    let via = match direct.first() {
        Some(t) => format!("through {}", graph::party_words(&t.key)),
        None => format!("through shared parties (component {})", c.id),
    };
    format!("linked {via} to {what} ({})", names.join(", "))
}
