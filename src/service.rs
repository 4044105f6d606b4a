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
use crate::model::{Model, Reason};
use crate::rules::{self, Queue, Routing, RuleSet};
use crate::store::{DecisionRecord, IntakeStatus, QueueItem, Store, StoreError};
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
}

/// Shared state: cheap to clone.
#[derive(Clone)]
pub struct Service {
    pub store: Store,
    pub model: Arc<RwLock<Arc<Model>>>,
    pub rules: Arc<RwLock<Arc<RuleSet>>>,
    pub routing: Arc<Routing>,
    pub lease_seconds: i64,
    pub metrics: Metrics,
    intake_lock: Arc<Mutex<()>>,
    queue_lock: Arc<Mutex<()>>,
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
        let metrics = Metrics::new(&store.flusher.flush_seconds);
        let svc = Service {
            store,
            model: Arc::new(RwLock::new(Arc::new(model))),
            rules: Arc::new(RwLock::new(Arc::new(rules))),
            routing: Arc::new(routing),
            lease_seconds,
            metrics,
            intake_lock: Arc::new(Mutex::new(())),
            queue_lock: Arc::new(Mutex::new(())),
        };
        svc.refresh_depths();
        svc
    }

    pub fn model(&self) -> Arc<Model> {
        self.model
            .read()
            .map(|m| Arc::clone(&m))
            .unwrap_or_else(|p| Arc::clone(&p.into_inner()))
    }

    pub fn rules(&self) -> Arc<RuleSet> {
        self.rules
            .read()
            .map(|r| Arc::clone(&r))
            .unwrap_or_else(|p| Arc::clone(&p.into_inner()))
    }

    fn refresh_depths(&self) {
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
        let hash = content_hash(&claim);
        let _guard = self
            .intake_lock
            .lock()
            .map_err(|_| ServiceError::Poisoned)?;
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
        let t0 = Instant::now();
        let model = self.model();
        let rules = self.rules();
        let fv = features::compute(&claim, &self.store);
        let scored = model.score(&fv);
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
            reasons.extend(scored.reasons);
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
        };
        let item = (rec.queue != Queue::NoReview).then(|| QueueItem {
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
        for q in [Some(rec.queue), previous.as_ref().map(|p| p.queue)]
            .into_iter()
            .flatten()
        {
            if q != Queue::NoReview {
                self.metrics
                    .queue_depth
                    .with_label_values(&[q.as_str()])
                    .set(self.store.queue_depth(q) as i64);
            }
        }
        Ok((rec, status))
    }

    /// Decide one claim and return once the decision is on disk.
    pub async fn intake(&self, claim: Claim, now: DateTime<Utc>) -> Result<Decision, ServiceError> {
        let (rec, status) = self.decide(claim, now)?;
        self.store.flusher.durable().await;
        Ok(Decision::from_record(&rec, status))
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
            self.store.flusher.durable().await;
        }
        Ok(item)
    }

    pub async fn release(&self, queue: Queue, claim_id: &str) -> Result<bool, ServiceError> {
        let found = {
            let _g = self.queue_lock.lock().map_err(|_| ServiceError::Poisoned)?;
            self.store.release(queue, claim_id)?
        };
        if found {
            self.store.flusher.durable().await;
        }
        Ok(found)
    }
}
