//! The service's domain operations: intake (validate, featurise against stored history, score,
//! route, write atomically, acknowledge when durable) and the review queues (list, lease,
//! release). The HTTP layer only unpacks requests and calls these.
//!
//! Intake runs the read-score-write step under one lock, so two claims sharing a party are
//! decided one after the other and the second sees the first in its history; the slow part,
//! waiting for the disk, happens after the lock is released and is shared by every claim
//! waiting at the same time.

use crate::claim::Claim;
use crate::features::{self, CATALOGUE};
use crate::feedback::{OutcomeRecord, OutcomeReport};
use crate::graph;
use crate::model::{Model, Reason};
use crate::rules::{self, Queue, Routing, RuleSet};
use crate::store::{DecisionRecord, IntakeStatus, QueueItem, ShadowScore, Store, StoreError};
use crate::telemetry::Metrics;
use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::sync::{Arc, Mutex, RwLock};
use std::time::Instant;

/// The reply to a claims system: the decision on one claim revision.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Decision {
    pub claim_id: String,
    pub revision: u32,
    pub status: IntakeStatus,
    pub queue: Queue,
    /// Expected value of a review (currency units) plus rule points; higher is reviewed first.
    pub priority: f64,
    pub model_probability: f64,
    pub outlier_score: f64,
    pub reasons: Vec<ReasonOut>,
    pub model_version: String,
    pub rules_version: String,
    pub decided_at: String,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReasonOut {
    pub code: String,
    pub text: String,
}

impl Decision {
    pub fn from_record(r: &DecisionRecord, status: IntakeStatus) -> Decision {
        Decision {
            claim_id: r.claim_id.clone(),
            revision: r.revision,
            status,
            queue: r.queue,
            priority: r.priority,
            model_probability: r.model_probability,
            outlier_score: r.outlier_score,
            reasons: r
                .reasons
                .iter()
                .map(|x| ReasonOut {
                    code: x.code.clone(),
                    text: x.text.clone(),
                })
                .collect(),
            model_version: r.model_version.clone(),
            rules_version: r.rules_version.clone(),
            decided_at: r.decided_at.clone(),
        }
    }
}

#[derive(Debug, thiserror::Error)]
pub enum ServiceError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("the intake lock was poisoned by an earlier panic")]
    Poisoned,
    #[error("a decision worker stopped: {0}")]
    Worker(String),
}

/// A challenger model and when it started shadow-scoring.
pub type Challenger = (Arc<Model>, DateTime<Utc>);

/// Shared state: cheap to clone.
#[derive(Clone)]
pub struct Service {
    pub store: Store,
    pub model: Arc<RwLock<Arc<Model>>>,
    pub rules: Arc<RwLock<Arc<RuleSet>>>,
    pub routing: Arc<Routing>,
    pub lease_seconds: i64,
    pub metrics: Metrics,
    pub monitor: Arc<crate::config::Monitor>,
    /// A model shadow-scoring every claim beside the champion, with when it started.
    pub challenger: Arc<RwLock<Option<Challenger>>>,
    queue_lock: Arc<Mutex<()>>,
    /// The claims stream consumer, when `weir serve` runs one (for `/readyz`).
    pub stream_health: Arc<std::sync::OnceLock<Arc<crate::stream::Health>>>,
}

/// The caller recorded on revisions taken from the claims stream.
pub const STREAM_CALLER: &str = "stream";

/// The lock key of a claim's own records (entity keys are `kind:id`; this cannot clash).
pub(crate) fn claim_lock_key(claim_id: &str) -> String {
    format!("claim-record:{claim_id}")
}

/// Content hash of a claim: equal for the same content, whatever the JSON key order.
pub fn content_hash(claim: &Claim) -> String {
    let bytes = serde_json::to_vec(claim).unwrap_or_default();
    Sha256::digest(&bytes)
        .iter()
        .take(16)
        .map(|b| format!("{b:02x}"))
        .collect()
}

impl Service {
    pub fn new(
        store: Store,
        model: Model,
        rules: RuleSet,
        routing: Routing,
        lease_seconds: i64,
    ) -> Service {
        let metrics = Metrics::new(store.flush_seconds());
        let svc = Service {
            store,
            model: Arc::new(RwLock::new(Arc::new(model))),
            rules: Arc::new(RwLock::new(Arc::new(rules))),
            routing: Arc::new(routing),
            lease_seconds,
            metrics,
            monitor: Arc::new(crate::config::Monitor::default()),
            challenger: Arc::new(RwLock::new(None)),
            queue_lock: Arc::new(Mutex::new(())),
            stream_health: Arc::default(),
        };
        svc.refresh_depths();
        svc
    }

    pub fn with_monitor(mut self, m: crate::config::Monitor) -> Service {
        self.monitor = Arc::new(m);
        self
    }

    pub fn model(&self) -> Arc<Model> {
        self.model
            .read()
            .map(|m| Arc::clone(&m))
            .unwrap_or_else(|p| Arc::clone(&p.into_inner()))
    }

    pub fn challenger(&self) -> Option<Challenger> {
        self.challenger
            .read()
            .map(|c| c.clone())
            .unwrap_or_else(|p| p.into_inner().clone())
    }

    /// Load a model without a restart: as champion (it decides from the next claim on; claims
    /// being decided finish with the model they started with) or as challenger (shadow scores
    /// only).
    pub fn load_model(&self, model: Model, role: ModelRole, now: DateTime<Utc>) {
        let model = Arc::new(model);
        match role {
            ModelRole::Champion => match self.model.write() {
                Ok(mut m) => *m = model,
                Err(p) => *p.into_inner() = model,
            },
            ModelRole::Challenger => match self.challenger.write() {
                Ok(mut c) => *c = Some((model, now)),
                Err(p) => *p.into_inner() = Some((model, now)),
            },
        }
    }

    /// Make the challenger the champion. `false` when there is no challenger.
    pub fn promote(&self) -> bool {
        let taken = match self.challenger.write() {
            Ok(mut c) => c.take(),
            Err(p) => p.into_inner().take(),
        };
        match taken {
            Some((m, _)) => {
                match self.model.write() {
                    Ok(mut cur) => *cur = m,
                    Err(p) => *p.into_inner() = m,
                }
                true
            }
            None => false,
        }
    }

    pub fn rules(&self) -> Arc<RuleSet> {
        self.rules
            .read()
            .map(|r| Arc::clone(&r))
            .unwrap_or_else(|p| Arc::clone(&p.into_inner()))
    }

    /// Replace the rule set; claims decided from now on use it.
    pub fn load_rules(&self, rules: RuleSet) {
        match self.rules.write() {
            Ok(mut r) => *r = Arc::new(rules),
            Err(p) => *p.into_inner() = Arc::new(rules),
        }
    }

    /// Set the queue-depth gauges from the store. Called when metrics are scraped (and after
    /// a purge), not on every decision: on a shared store each depth is a query.
    pub fn refresh_depths(&self) {
        for q in Queue::WORKED {
            self.metrics
                .queue_depth
                .with_label_values(&[q.as_str()])
                .set(self.store.queue_depth(q) as i64);
        }
    }

    /// Decide and write one claim (not yet durable: call [`Store`]'s flusher or use
    /// [`Service::intake`]).
    pub fn decide(
        &self,
        claim: Claim,
        now: DateTime<Utc>,
    ) -> Result<(DecisionRecord, IntakeStatus), ServiceError> {
        self.decide_as(claim, now, None)
    }

    /// As [`Service::decide`], recording which caller filed the claim.
    pub fn decide_as(
        &self,
        claim: Claim,
        now: DateTime<Utc>,
        submitted_by: Option<&str>,
    ) -> Result<(DecisionRecord, IntakeStatus), ServiceError> {
        self.decide_with(claim, now, submitted_by, None)
    }

    /// Decide a claim taken from the stream at `sequence`. A version of the claim from an
    /// earlier message than the one stored (redelivered late, or overtaken by a newer version
    /// on another instance) is answered with the stored decision and never overwrites it.
    pub fn decide_from_stream(
        &self,
        claim: Claim,
        now: DateTime<Utc>,
        sequence: u64,
    ) -> Result<(DecisionRecord, IntakeStatus), ServiceError> {
        self.decide_with(claim, now, Some(STREAM_CALLER), Some(sequence))
    }

    fn decide_with(
        &self,
        claim: Claim,
        now: DateTime<Utc>,
        submitted_by: Option<&str>,
        stream_sequence: Option<u64>,
    ) -> Result<(DecisionRecord, IntakeStatus), ServiceError> {
        let hash = content_hash(&claim);
        // Held until the decision is written: no other writer touches this claim or any
        // entity it names meanwhile (across instances on a shared store).
        // Context keys (region, catastrophe event) are locked too: the sled store's history
        // cache keeps a list only when no writer of that entity ran while it was loaded.
        let mut keys = claim.entity_keys();
        keys.push(claim_lock_key(&claim.claim_id));
        let _guard = self.store.lock(&keys)?;
        let head = self.store.head(&claim.claim_id)?;
        if let Some(h) = &head
            && h.content_hash == hash
            && let Some(rec) = self.store.decision(&claim.claim_id, h.revision)?
        {
            self.metrics
                .claims_received
                .with_label_values(&["duplicate"])
                .inc();
            return Ok((rec, IntakeStatus::Duplicate));
        }
        let previous = match &head {
            Some(h) => self.store.decision(&claim.claim_id, h.revision)?,
            None => None,
        };
        if let (Some(seq), Some(p)) = (stream_sequence, &previous)
            && p.stream_sequence.is_some_and(|stored| stored > seq)
        {
            tracing::info!(
                claim_id = %p.claim_id,
                seq,
                "stream message older than the stored revision: not applied"
            );
            self.metrics
                .claims_received
                .with_label_values(&["duplicate"])
                .inc();
            return Ok((p.clone(), IntakeStatus::Duplicate));
        }
        let t0 = Instant::now();
        let model = self.model();
        let rules = self.rules();
        // The claim's component of the claims graph, linked as the champion was trained.
        let component = graph::component_of_new(self.store.graph(), &model.artifact.graph, &claim)
            .map_err(StoreError::from)?;
        let seed = features::stable_hash(&claim.claim_id);
        let t = claim.event_time();
        let fv = features::compute(
            &claim,
            &*self.store.history_view(&claim)?,
            &component.summary(seed, t),
        );
        let scored = model.score(&fv);
        let challenger = self.challenger().map(|(c, _)| {
            let s = c.score(&fv);
            ShadowScore {
                model_version: c.version().to_string(),
                probability: s.probability,
                outlier_score: s.outlier_score,
                refers: s.probability >= c.artifact.threshold,
            }
        });
        let routed = rules::route(
            &rules,
            &self.routing,
            &rules::Inputs {
                claim_id: &claim.claim_id,
                features: &fv,
                probability: scored.probability,
                outlier_score: scored.outlier_score,
                claimed_amount: claim.claimed_amount,
                model_threshold: model.artifact.threshold,
            },
        );
        let mut reasons: Vec<Reason> = rules
            .rules
            .iter()
            .filter(|r| routed.fired.contains(&r.id))
            .map(|r| Reason {
                code: format!("rule.{}", r.id),
                text: r.reason.clone(),
                weight: r.add_priority,
            })
            .collect();
        if scored.outlier_score >= self.routing.outlier_desk_check {
            reasons.push(Reason {
                code: "outlier".into(),
                text: format!(
                    "unusual claim: further from its cluster's centre than {:.1}% of the claims the model was trained on",
                    scored.outlier_score * 100.0
                ),
                weight: scored.outlier_score,
            });
        }
        if routed.queue == Queue::Audit {
            // The model's reasons would mislead here: the claim was drawn at random.
            reasons.push(Reason {
                code: "audit".into(),
                text: "drawn at random for the audit sample that keeps precision and recall measurable; not suspected".into(),
                weight: 0.0,
            });
        } else {
            // A rule that fired already says what its features say: one reason, not two.
            let ruled: Vec<usize> = rules
                .rules
                .iter()
                .filter(|r| routed.fired.contains(&r.id))
                .flat_map(|r| r.features().map(features::family).collect::<Vec<_>>())
                .collect();
            reasons.extend(scored.reasons.into_iter().filter(|r| {
                r.code
                    .strip_prefix("feature.")
                    .and_then(features::index_of)
                    .is_none_or(|i| !ruled.contains(&features::family(i)))
            }));
            if routed.queue != Queue::NoReview
                && let Some(i) = features::index_of("surge_context")
                && fv[i] == 1.0
            {
                reasons.push(Reason {
                    code: "context.surge".into(),
                    text: (CATALOGUE[i].reason)(1.0, &fv),
                    weight: 0.0,
                });
            }
            // A referral always says why, even when the why is that no one sign stands out.
            if matches!(routed.queue, Queue::Investigate | Queue::DeskCheck)
                && reasons.iter().all(|r| r.code.starts_with("context."))
            {
                reasons.insert(0, features::pattern_reason());
            }
        }
        if routed.queue != Queue::NoReview {
            self.name_linked_claims(&claim, &rules, &mut reasons)?;
            name_ring_ties(&component, seed, &rules, &mut reasons);
        }
        self.metrics
            .scoring_seconds
            .observe(t0.elapsed().as_secs_f64());

        let revision = head.as_ref().map_or(1, |h| h.revision + 1);
        let rec = DecisionRecord {
            claim_id: claim.claim_id.clone(),
            revision,
            decided_at: now.to_rfc3339(),
            queue: routed.queue,
            priority: routed.priority,
            expected_value: routed.expected_value,
            model_probability: scored.probability,
            outlier_score: scored.outlier_score,
            reasons,
            rules_fired: routed.fired,
            model_version: model.version().to_string(),
            rules_version: rules.version.clone(),
            content_hash: hash,
            features: CATALOGUE
                .iter()
                .zip(fv.iter())
                .map(|(d, v)| (d.name.to_string(), *v))
                .collect(),
            claim,
            challenger,
            submitted_by: submitted_by.map(String::from),
            stream_sequence,
            component: Some(component.reference(t)),
            revised_because: None,
        };
        // A claim already adjudicated is re-scored for the record but not queued again.
        // (An outcome needs a stored claim: a new claim cannot have one.)
        let adjudicated = head.is_some() && self.store.outcome(&rec.claim_id)?.is_some();
        let item = (rec.queue != Queue::NoReview && !adjudicated).then(|| QueueItem {
            claim_id: rec.claim_id.clone(),
            revision,
            queue: rec.queue,
            priority: rec.priority,
            claimed_amount: rec.claim.claimed_amount,
            currency: rec.claim.currency.clone(),
            model_probability: rec.model_probability,
            outlier_score: rec.outlier_score,
            reasons: rec.reasons.iter().take(3).cloned().collect(),
            enqueued_at: rec.decided_at.clone(),
            lease: None,
        });
        self.store.record(&rec, previous.as_ref(), item.as_ref())?;
        let status = if previous.is_some() {
            IntakeStatus::Revised
        } else {
            IntakeStatus::New
        };
        self.metrics
            .claims_received
            .with_label_values(&[match status {
                IntakeStatus::Revised => "revised",
                _ => "new",
            }])
            .inc();
        self.metrics
            .decisions
            .with_label_values(&[rec.queue.as_str()])
            .inc();
        Ok((rec, status))
    }

    /// Name the claims behind a linking reason ("... to 4 other claimants in the last year:
    /// C-000017, C-000024, ..."): the feature counted them, and the investigator will open
    /// them. Earlier claims through the same entities the feature reads, from the history index.
    fn name_linked_claims(
        &self,
        claim: &Claim,
        rules: &RuleSet,
        reasons: &mut [Reason],
    ) -> Result<(), ServiceError> {
        const PERSONAL: [&str; 4] = ["payee_account", "witness", "third_party", "address"];
        // Which entity kinds a linking feature reads, over how many days, and whether a claim
        // must name two of this claim's parties together.
        let linking = |name: &str| -> Option<(Vec<&str>, i64, bool)> {
            Some(match name {
                "linked_claimants_365d" => (PERSONAL.to_vec(), features::LONG_WINDOW_DAYS, false),
                "linked_claimants_30d" => (PERSONAL.to_vec(), features::SHORT_WINDOW_DAYS, false),
                "payee_account_claimants_365d" => (vec!["payee_account"], 365, false),
                "witness_claimants_365d" => (vec!["witness"], 365, false),
                "third_party_claimants_365d" => (vec!["third_party"], 365, false),
                "address_claimants_365d" => (vec!["address"], 365, false),
                "party_pair_claimants_365d" => (
                    crate::claim::Role::ALL.iter().map(|r| r.as_str()).collect(),
                    365,
                    true,
                ),
                _ => return None,
            })
        };
        let t = claim.event_time();
        let keys = claim.link_keys();
        for r in reasons.iter_mut() {
            // A rule reason names the claims of the first linking feature its conditions read.
            let names: Vec<&str> = match r.code.strip_prefix("rule.") {
                Some(id) => rules
                    .rules
                    .iter()
                    .filter(|rule| rule.id == id)
                    .flat_map(|rule| rule.features().map(|i| CATALOGUE[i].name))
                    .collect(),
                None => r.code.strip_prefix("feature.").into_iter().collect(),
            };
            let Some((kinds, days, together)) = names.iter().find_map(|n| linking(n)) else {
                continue;
            };
            let from = t - days * features::DAY;
            // The claimant's own earlier claims are not links: the features count other
            // claimants only.
            let own: std::collections::HashSet<String> = self
                .store
                .history_claim_ids(&format!("claimant:{}", claim.claimant_id), from, t)?
                .into_iter()
                .collect();
            let mut lists: Vec<Vec<String>> = Vec::new();
            for k in keys
                .iter()
                .filter(|k| kinds.contains(&k.split_once(':').map_or("", |(kind, _)| kind)))
            {
                let mut ids: Vec<String> = self
                    .store
                    .history_claim_ids(k, from, t)?
                    .into_iter()
                    .filter(|id| *id != claim.claim_id && !own.contains(id))
                    .collect();
                ids.sort();
                ids.dedup();
                lists.push(ids);
            }
            let mut ids: Vec<String> = if together {
                // The pair of parties named together on the most claims, as the feature reads.
                let mut best: Vec<String> = Vec::new();
                for i in 0..lists.len() {
                    for j in i + 1..lists.len() {
                        let both: Vec<String> = lists[i]
                            .iter()
                            .filter(|id| lists[j].binary_search(id).is_ok())
                            .cloned()
                            .collect();
                        if both.len() > best.len() {
                            best = both;
                        }
                    }
                }
                best
            } else {
                lists.concat()
            };
            ids.sort();
            ids.dedup();
            if !ids.is_empty() {
                let shown: Vec<&str> = ids.iter().take(5).map(String::as_str).collect();
                let more = ids.len().saturating_sub(shown.len());
                r.text = if more > 0 {
                    format!("{}: {} and {more} more", r.text, shown.join(", "))
                } else {
                    format!("{}: {}", r.text, shown.join(", "))
                };
            }
        }
        Ok(())
    }

    /// Decide one claim and return once the decision is on disk.
    pub async fn intake(&self, claim: Claim, now: DateTime<Utc>) -> Result<Decision, ServiceError> {
        self.intake_as(claim, now, None).await
    }

    /// As [`Service::intake`], recording which caller filed the claim.
    pub async fn intake_as(
        &self,
        claim: Claim,
        now: DateTime<Utc>,
        submitted_by: Option<&str>,
    ) -> Result<Decision, ServiceError> {
        let (rec, status) = if self.store.remote() {
            // A shared store answers over the network: decide on a blocking thread, so the
            // runtime's workers go on serving while this claim waits on the database.
            let (svc, by) = (self.clone(), submitted_by.map(String::from));
            tokio::task::spawn_blocking(move || svc.decide_as(claim, now, by.as_deref()))
                .await
                .map_err(|e| ServiceError::Worker(e.to_string()))??
        } else {
            self.decide_as(claim, now, submitted_by)?
        };
        self.store.durable().await;
        Ok(Decision::from_record(&rec, status))
    }

    /// As [`Service::intake`] for a claim taken from the stream at `sequence`.
    pub async fn intake_from_stream(
        &self,
        claim: Claim,
        now: DateTime<Utc>,
        sequence: u64,
    ) -> Result<Decision, ServiceError> {
        let svc = self.clone();
        let (rec, status) =
            tokio::task::spawn_blocking(move || svc.decide_from_stream(claim, now, sequence))
                .await
                .map_err(|e| ServiceError::Worker(e.to_string()))??;
        self.store.durable().await;
        Ok(Decision::from_record(&rec, status))
    }

    /// Record an adjudicated outcome. `Ok(None)` when the claim is unknown (nothing stored).
    /// Posting the same outcome again changes nothing; a different one is a new revision.
    pub async fn record_outcome(
        &self,
        claim_id: &str,
        report: OutcomeReport,
        now: DateTime<Utc>,
    ) -> Result<Option<(OutcomeRecord, bool)>, ServiceError> {
        self.record_outcome_as(claim_id, report, now, None).await
    }

    /// As [`Service::record_outcome`], recording which caller posted it.
    pub async fn record_outcome_as(
        &self,
        claim_id: &str,
        report: OutcomeReport,
        now: DateTime<Utc>,
        posted_by: Option<&str>,
    ) -> Result<Option<(OutcomeRecord, bool)>, ServiceError> {
        let (rec, created) = {
            let _guard = self.store.lock(&[claim_lock_key(claim_id)])?;
            let Some(head) = self.store.head(claim_id)? else {
                return Ok(None);
            };
            let Some(decision) = self.store.decision(claim_id, head.revision)? else {
                return Ok(None);
            };
            let current = self.store.outcome(claim_id)?;
            if let Some(c) = current.as_ref().filter(|c| c.report == report) {
                (c.clone(), false)
            } else {
                let rec = OutcomeRecord {
                    claim_id: claim_id.to_string(),
                    revision: current.as_ref().map_or(1, |c| c.revision + 1),
                    claim_revision: head.revision,
                    recorded_at: now.to_rfc3339(),
                    posted_by: posted_by.map(String::from),
                    report,
                };
                self.store.record_outcome(&rec, &decision)?;
                self.metrics
                    .outcomes
                    .with_label_values(&[rec.report.outcome.as_str()])
                    .inc();
                (rec, true)
            }
        };
        // Open claims linked to a confirmed fraud move up their queue, with a reason and an
        // audit revision each. Run again on a repeated post (it changes nothing then), so a
        // post retried after a failure here still raises them.
        if rec.report.outcome == crate::feedback::Outcome::FraudConfirmed {
            let raised = self.raise_linked(claim_id, now)?;
            if !raised.is_empty() {
                tracing::info!(claim_id, raised = raised.len(), "linked open claims raised");
            }
        }
        self.store.durable().await;
        Ok(Some((rec, created)))
    }

    /// Lease the next item of a queue to an investigator (durable before returning).
    pub async fn lease(
        &self,
        queue: Queue,
        holder: &str,
        now: DateTime<Utc>,
    ) -> Result<Option<QueueItem>, ServiceError> {
        let item = {
            let _g = self.queue_lock.lock().map_err(|_| ServiceError::Poisoned)?;
            self.store
                .lease_next(queue, holder, now.timestamp(), self.lease_seconds)?
        };
        if item.is_some() {
            self.store.durable().await;
        }
        Ok(item)
    }

    /// Set or lift a legal hold. `Ok(false)` when the claim is unknown (nothing stored).
    pub async fn set_hold(
        &self,
        claim_id: &str,
        hold: Option<crate::store::Hold>,
    ) -> Result<bool, ServiceError> {
        {
            // Under the intake lock, so a purge or an intake never interleaves with it.
            let _g = self.store.lock(&[claim_lock_key(claim_id)])?;
            if self.store.head(claim_id)?.is_none() {
                return Ok(false);
            }
            self.store.set_hold(claim_id, hold.as_ref())?;
        }
        self.store.durable().await;
        Ok(true)
    }

    /// Purge every claim with no activity in the last `days` days, except those under legal
    /// hold. Each claim goes in its own transaction, under the intake lock so that a claim
    /// being revised at the same moment is either purged before or kept whole.
    pub async fn purge(
        &self,
        days: u32,
        now: DateTime<Utc>,
    ) -> Result<crate::store::PurgeReport, ServiceError> {
        let cutoff = now - chrono::Duration::days(i64::from(days));
        let candidates = self.store.inactive_since(cutoff)?;
        let mut report = crate::store::PurgeReport::default();
        for id in candidates {
            let _g = self.store.lock(&[claim_lock_key(&id)])?;
            match self.store.purge_claim(&id)? {
                Some(n) => {
                    report.purged_claims += 1;
                    report.removed_entries += n;
                }
                None => report.kept_on_hold += 1,
            }
        }
        self.store.durable().await;
        self.metrics
            .purged_claims
            .inc_by(report.purged_claims as u64);
        self.refresh_depths();
        Ok(report)
    }

    pub async fn release(&self, queue: Queue, claim_id: &str) -> Result<bool, ServiceError> {
        let found = {
            let _g = self.queue_lock.lock().map_err(|_| ServiceError::Poisoned)?;
            self.store.release(queue, claim_id)?
        };
        if found {
            self.store.durable().await;
        }
        Ok(found)
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ModelRole {
    Champion,
    Challenger,
}

/// Champion against challenger on claims both scored that have a labelled outcome.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Comparison {
    pub champion_version: Option<String>,
    pub challenger_version: Option<String>,
    pub challenger_since: Option<String>,
    pub claims_scored_by_both: usize,
    pub labelled: usize,
    pub positives: usize,
    pub champion_auc: Option<f64>,
    pub challenger_auc: Option<f64>,
    /// Precision of each model's own referrals (probability at or above its threshold).
    pub champion_precision: Option<f64>,
    pub challenger_precision: Option<f64>,
    /// Share of claims (scored by both) on which both models make the same referral decision.
    pub agreement: Option<f64>,
}

/// Band of policy age at the loss, for the fairness read-out.
pub fn policy_age_band(claim: &Claim) -> &'static str {
    match (claim.loss_date - claim.policy_start).num_days() {
        d if d < 30 => "under 30 days",
        d if d < 365 => "30 days to 1 year",
        d if d < 3 * 365 => "1 to 3 years",
        _ => "3 years or more",
    }
}

/// Drift of one model feature or score against its training baseline.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DriftRow {
    pub name: String,
    pub psi: f64,
    pub ks: Option<f64>,
    pub band: crate::monitor::drift::Band,
    pub current_n: usize,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DriftReport {
    pub model_version: String,
    pub window_days: u32,
    pub claims_in_window: usize,
    /// Reading bands: PSI below 0.1 stable, 0.1 to 0.25 watch, above 0.25 shifted (a rule of
    /// thumb from credit-scoring practice, not a statistical test).
    pub bands: String,
    pub features: Vec<DriftRow>,
    pub scores: Vec<DriftRow>,
}

impl Service {
    /// Every decided claim with its outcome, as monitoring sees it, one at a time (the store
    /// is streamed: nothing is collected).
    pub fn for_each_observation(
        &self,
        f: &mut dyn FnMut(&crate::monitor::quality::Observation),
    ) -> Result<(), ServiceError> {
        let segs = &self.monitor.segments;
        self.store.for_each_latest(&mut |rec, outcome| {
            let mut segments = std::collections::BTreeMap::new();
            for s in segs {
                let v = match s.as_str() {
                    "line" => rec.claim.line.as_str().to_string(),
                    "region" => rec.claim.region.clone().unwrap_or_else(|| "(none)".into()),
                    "policy_age" => policy_age_band(&rec.claim).to_string(),
                    _ => continue,
                };
                segments.insert(s.clone(), v);
            }
            f(&crate::monitor::quality::Observation {
                decided_at: DateTime::parse_from_rfc3339(&rec.decided_at)
                    .map(|t| t.with_timezone(&Utc))
                    .unwrap_or_default(),
                queue: rec.queue,
                model_version: rec.model_version.clone(),
                rules_version: rec.rules_version.clone(),
                outcome: outcome.map(|o| o.report.outcome),
                segments,
            });
        })?;
        Ok(())
    }

    /// Drift of the champion's features and scores over claims decided in the last
    /// `monitor.drift_days` before `now`.
    pub fn drift(&self, now: DateTime<Utc>) -> Result<DriftReport, ServiceError> {
        let model = self.model();
        let a = &model.artifact;
        let since = now - chrono::Duration::days(i64::from(self.monitor.drift_days));
        let mut cols: Vec<Vec<f64>> = vec![Vec::new(); a.features.len()];
        let (mut probs, mut outl) = (Vec::new(), Vec::new());
        let mut n = 0;
        self.store.for_each_latest(&mut |rec, _| {
            let t = DateTime::parse_from_rfc3339(&rec.decided_at)
                .map(|t| t.with_timezone(&Utc))
                .unwrap_or_default();
            if t < since || t > now {
                return;
            }
            n += 1;
            for (i, name) in a.features.iter().enumerate() {
                if let Some(v) = rec.features.get(name) {
                    cols[i].push(*v);
                }
            }
            if rec.model_version == a.version {
                probs.push(rec.model_probability);
                outl.push(rec.outlier_score);
            }
        })?;
        let row = |name: &str, b: &crate::monitor::drift::Baseline, xs: &[f64]| {
            let d = b.drift(xs);
            DriftRow {
                name: name.to_string(),
                psi: d.psi,
                ks: d.ks,
                band: d.band,
                current_n: xs.len(),
            }
        };
        let features: Vec<DriftRow> = a
            .features
            .iter()
            .zip(&a.baselines.features)
            .zip(&cols)
            .filter(|(_, xs)| !xs.is_empty())
            .map(|((name, b), xs)| row(name, b, xs))
            .collect();
        let mut scores = Vec::new();
        if !probs.is_empty() {
            scores.push(row("probability", &a.baselines.probability, &probs));
            scores.push(row("outlier_score", &a.baselines.outlier_score, &outl));
        }
        for r in features.iter().chain(&scores) {
            self.metrics
                .drift_psi
                .with_label_values(&[r.name.as_str()])
                .set(r.psi);
        }
        Ok(DriftReport {
            model_version: a.version.clone(),
            window_days: self.monitor.drift_days,
            claims_in_window: n,
            bands: "PSI below 0.1 stable, 0.1 to 0.25 watch, above 0.25 shifted (common practice, not a statistical test)".into(),
            features,
            scores,
        })
    }

    /// Precision and audit estimates over `[from, to)`; updates the precision gauges when the
    /// window is open-ended.
    pub fn quality(
        &self,
        from: Option<DateTime<Utc>>,
        to: Option<DateTime<Utc>>,
    ) -> Result<crate::monitor::quality::QualityReport, ServiceError> {
        let mut tally = crate::monitor::quality::QualityTally::new(from, to);
        self.for_each_observation(&mut |o| tally.add(o))?;
        let q = tally.finish();
        if from.is_none() && to.is_none() {
            self.set_quality_gauges(&q);
        }
        Ok(q)
    }

    fn set_quality_gauges(&self, q: &crate::monitor::quality::QualityReport) {
        let g = &self.metrics.precision;
        g.with_label_values(&["estimate"])
            .set(q.precision.precision.unwrap_or(f64::NAN));
        g.with_label_values(&["wilson_low"])
            .set(q.precision.interval.map_or(f64::NAN, |i| i.0));
        g.with_label_values(&["wilson_high"])
            .set(q.precision.interval.map_or(f64::NAN, |i| i.1));
        self.metrics
            .awaiting_outcome
            .set(q.share_awaiting_outcome.unwrap_or(f64::NAN));
    }

    pub fn fairness(&self) -> Result<Vec<crate::monitor::quality::SegmentRow>, ServiceError> {
        let mut tally = crate::monitor::quality::FairnessTally::default();
        self.for_each_observation(&mut |o| tally.add(o))?;
        let rows = tally.finish(self.monitor.fairness_bound);
        self.set_fairness_gauges(&rows);
        Ok(rows)
    }

    fn set_fairness_gauges(&self, rows: &[crate::monitor::quality::SegmentRow]) {
        // Only segments with fixed value sets become metric labels; regions are free text.
        for r in rows.iter().filter(|r| r.segment != "region") {
            self.metrics
                .referral_rate_ratio
                .with_label_values(&[r.segment.as_str(), r.value.as_str()])
                .set(r.ratio_to_highest);
        }
    }

    /// Recompute the monitoring gauges (called periodically by the server): drift over its
    /// window, then quality and fairness together in one pass over the store.
    pub fn refresh_monitoring(&self, now: DateTime<Utc>) -> Result<(), ServiceError> {
        self.drift(now)?;
        let mut quality = crate::monitor::quality::QualityTally::new(None, None);
        let mut fairness = crate::monitor::quality::FairnessTally::default();
        self.for_each_observation(&mut |o| {
            quality.add(o);
            fairness.add(o);
        })?;
        self.set_quality_gauges(&quality.finish());
        self.set_fairness_gauges(&fairness.finish(self.monitor.fairness_bound));
        Ok(())
    }
}

impl Service {
    /// Champion against the current challenger on claims both scored.
    pub fn compare(&self) -> Result<Comparison, ServiceError> {
        let champion = self.model();
        let challenger = self.challenger();
        let cv = challenger.as_ref().map(|(m, _)| m.version().to_string());
        let (mut both, mut agree) = (0usize, 0usize);
        let (mut pc, mut pz, mut y) = (Vec::new(), Vec::new(), Vec::new());
        let (mut cref, mut zref) = (Vec::new(), Vec::new());
        self.store.for_each_latest(&mut |rec, outcome| {
            let Some(sh) = &rec.challenger else { return };
            if cv.as_deref() != Some(sh.model_version.as_str())
                || rec.model_version != champion.version()
            {
                return;
            }
            both += 1;
            let champ_refers = rec.model_probability >= champion.artifact.threshold;
            agree += usize::from(champ_refers == sh.refers);
            if let Some(label) = outcome.and_then(|o| o.report.outcome.label()) {
                pc.push(rec.model_probability);
                pz.push(sh.probability);
                y.push(label);
                cref.push(champ_refers);
                zref.push(sh.refers);
            }
        })?;
        let precision = |refs: &[bool]| {
            crate::metrics::Confusion::from_decisions(refs.iter().copied(), &y).precision()
        };
        Ok(Comparison {
            champion_version: Some(champion.version().to_string()),
            challenger_version: cv,
            challenger_since: challenger.map(|(_, t)| t.to_rfc3339()),
            claims_scored_by_both: both,
            labelled: y.len(),
            positives: y.iter().filter(|&&v| v).count(),
            champion_auc: crate::metrics::roc_auc(&pc, &y),
            challenger_auc: crate::metrics::roc_auc(&pz, &y),
            champion_precision: precision(&cref),
            challenger_precision: precision(&zref),
            agreement: (both > 0).then(|| agree as f64 / both as f64),
        })
    }
}

impl Service {
    /// Everything the HTML report shows, at `now`.
    pub fn report_data(
        &self,
        now: DateTime<Utc>,
        daily_capacity: f64,
    ) -> Result<crate::report::ReportData, ServiceError> {
        let champion = self.model();
        let (mut scores, mut labels) = (Vec::new(), Vec::new());
        self.store.for_each_latest(&mut |rec, outcome| {
            if rec.model_version != champion.version() {
                return;
            }
            if let Some(y) = outcome.and_then(|o| o.report.outcome.label()) {
                scores.push(rec.model_probability);
                labels.push(y);
            }
        })?;
        Ok(crate::report::ReportData {
            generated_at: now.to_rfc3339(),
            model_version: champion.version().to_string(),
            rules_version: self.rules().version.clone(),
            scores,
            labels,
            quality: self.quality(None, None)?,
            drift: self.drift(now)?,
            daily_capacity,
        })
    }
}

/// Say which parties tie a claim to its component, and the claims they tie it to, on a
/// reason that reads the component ("... in the last year; through payee account B-1:
/// C-000017, C-000024; attorney A-5 and repairer R-3: C-000031").
fn name_ring_ties(c: &graph::Component, seed: u64, rules: &RuleSet, reasons: &mut [Reason]) {
    let reads_ring = |name: &str| name.starts_with("ring_");
    let ids: std::collections::HashMap<u64, &str> = c
        .members
        .iter()
        .map(|m| (m.claim, m.claim_id.as_str()))
        .collect();
    let words = ring_tie_words(c, seed, &ids);
    if words.is_empty() {
        return;
    }
    for r in reasons.iter_mut() {
        let reads = match r.code.strip_prefix("rule.") {
            Some(id) => rules
                .rules
                .iter()
                .filter(|rule| rule.id == id)
                .any(|rule| rule.features().any(|i| reads_ring(CATALOGUE[i].name))),
            None => r.code.strip_prefix("feature.").is_some_and(reads_ring),
        };
        if reads {
            r.text = format!("{}; {words}", r.text);
        }
    }
}

/// "through payee account B-1: C-000017, C-000024; attorney A-5: C-000031" for the ties of
/// `seed`, strongest first, at most three parties and five claims each.
pub fn ring_tie_words(
    c: &graph::Component,
    seed: u64,
    ids: &std::collections::HashMap<u64, &str>,
) -> String {
    let ties = c.ties_of(seed);
    let mut parts = Vec::new();
    for t in ties.iter().take(3) {
        let others: Vec<&str> = t
            .claims
            .iter()
            .filter(|h| **h != seed)
            .filter_map(|h| ids.get(h).copied())
            .collect();
        let mut list = others
            .iter()
            .take(5)
            .copied()
            .collect::<Vec<_>>()
            .join(", ");
        if others.len() > 5 {
            list.push_str(&format!(" and {} more", others.len() - 5));
        }
        parts.push(format!("{}: {list}", graph::party_words(&t.key)));
    }
    if ties.len() > 3 {
        parts.push(format!("and {} more parties", ties.len() - 3));
    }
    if parts.is_empty() {
        String::new()
    } else {
        format!("through {}", parts.join("; "))
    }
}
