//! Evaluation on a second book of business (`weir train --also-evaluate FILE`): a model is
//! scored on the later part of claims it was never shaped on, through the same feature, model
//! and routing code the service runs.
//!
//! The file is featurised on its own history, in time order, and split where `weir train`
//! would split it (the last `test_share` of its labelled claims); only that later part is
//! scored. With a truth file (`claim_id,mechanism[,...]`, as `weir demo-data` writes), the
//! report adds the share of each mechanism's referral-worthy claims within the top 5% of
//! claims, and how the claims of a `surge` (genuine claims arriving together) fare in the
//! investigate queue against their share of all claims.

use crate::feedback::Outcome;
use crate::metrics;
use crate::model::{Model, ModelArtifact};
use crate::rules::{self, Queue, Routing, RuleSet};
use crate::train::{self, Loaded, TrainError};
use serde::{Deserialize, Serialize};
use std::collections::{BTreeMap, HashMap};

/// Mechanism name of genuine claims that arrive together after a weather event.
pub const SURGE: &str = "surge";

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MechanismRecall {
    pub mechanism: String,
    /// Referral-worthy claims of this mechanism in the later part.
    pub positives: usize,
    /// Of them, how many are within the top 5% of claims by probability.
    pub in_top_5pct: usize,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Elsewhere {
    pub file: String,
    /// First report time of the later part.
    pub from: String,
    /// Claims in the later part, labelled ones, and referral-worthy ones.
    pub claims: usize,
    pub labelled: usize,
    pub positives: usize,
    pub auc: Option<f64>,
    pub average_precision: Option<f64>,
    pub precision_at_2pct: Option<f64>,
    pub precision_at_5pct: Option<f64>,
    pub expected_calibration_error: Option<f64>,
    /// By mechanism (needs a truth file).
    pub mechanisms: Vec<MechanismRecall>,
    /// Claims routed to each queue in the later part.
    pub queues: BTreeMap<String, usize>,
    /// Surge claims among all claims and among the investigate queue (needs a truth file).
    pub surge_share_of_claims: Option<f64>,
    pub surge_share_of_investigate: Option<f64>,
}

/// Read a truth file: `claim_id,mechanism` first on each line; a header line is skipped.
pub fn read_truth(text: &str) -> HashMap<String, String> {
    text.lines()
        .filter_map(|l| {
            let mut parts = l.split(',');
            let (id, m) = (parts.next()?.trim(), parts.next()?.trim());
            (id != "claim_id" && !id.is_empty()).then(|| (id.to_string(), m.to_string()))
        })
        .collect()
}

/// Score the later part of `loaded` with `artifact`, route it with `rules` and `routing`.
pub fn evaluate(
    artifact: &ModelArtifact,
    mut loaded: Loaded,
    file: &str,
    test_share: f64,
    truth: Option<&HashMap<String, String>>,
    rules: &RuleSet,
    routing: &Routing,
) -> Result<Elsewhere, TrainError> {
    let model = Model::new(artifact.clone())?;
    let full = train::featurise(&mut loaded.rows, &artifact.graph, false);
    let rows = &loaded.rows;
    let labelled: Vec<usize> = (0..rows.len())
        .filter(|&i| rows[i].outcome.and_then(Outcome::label).is_some())
        .collect();
    let cut = ((labelled.len() as f64) * (1.0 - test_share)).round() as usize;
    let Some(&first_later) = labelled.get(cut) else {
        return Err(TrainError::NotEnough(format!(
            "{file}: no labelled claims in its later part"
        )));
    };
    let from = rows[first_later].claim.reported_at;
    let (mut probs, mut ys, mut mech_of_labelled) = (Vec::new(), Vec::new(), Vec::new());
    let mut queues: BTreeMap<String, usize> = BTreeMap::new();
    let (mut claims, mut surge_claims, mut investigate, mut surge_investigate) = (0, 0, 0, 0);
    for (i, r) in rows.iter().enumerate() {
        if r.claim.reported_at < from {
            continue;
        }
        claims += 1;
        let s = model.score(&full[i]);
        let routed = rules::route(
            rules,
            routing,
            &rules::Inputs {
                claim_id: &r.claim.claim_id,
                features: &full[i],
                probability: s.probability,
                outlier_score: s.outlier_score,
                claimed_amount: r.claim.claimed_amount,
                model_threshold: artifact.threshold,
            },
        );
        *queues.entry(routed.queue.as_str().to_string()).or_default() += 1;
        let mechanism = truth.and_then(|t| t.get(&r.claim.claim_id)).cloned();
        let is_surge = mechanism.as_deref() == Some(SURGE);
        surge_claims += usize::from(is_surge);
        if routed.queue == Queue::Investigate {
            investigate += 1;
            surge_investigate += usize::from(is_surge);
        }
        if let Some(label) = r.outcome.and_then(Outcome::label) {
            probs.push(s.probability);
            ys.push(label);
            mech_of_labelled.push(mechanism);
        }
    }
    let k5 = train::capacity_k(0.05, probs.len());
    let k2 = train::capacity_k(0.02, probs.len());
    let top5: std::collections::HashSet<usize> = metrics::top_k(&probs, k5).into_iter().collect();
    let mut by: BTreeMap<String, (usize, usize)> = BTreeMap::new();
    for (i, m) in mech_of_labelled.iter().enumerate() {
        if let (Some(m), true) = (m, ys[i]) {
            let e = by.entry(m.clone()).or_default();
            e.0 += 1;
            e.1 += usize::from(top5.contains(&i));
        }
    }
    let ratio = |a: usize, b: usize| (b > 0).then(|| a as f64 / b as f64);
    Ok(Elsewhere {
        file: file.to_string(),
        from: from.to_rfc3339(),
        claims,
        labelled: probs.len(),
        positives: ys.iter().filter(|&&y| y).count(),
        auc: metrics::roc_auc(&probs, &ys),
        average_precision: metrics::average_precision(&probs, &ys),
        precision_at_2pct: metrics::precision_at_k(&probs, &ys, k2),
        precision_at_5pct: metrics::precision_at_k(&probs, &ys, k5),
        expected_calibration_error: metrics::expected_calibration_error(&probs, &ys, 10),
        mechanisms: by
            .into_iter()
            .map(|(mechanism, (positives, in_top_5pct))| MechanismRecall {
                mechanism,
                positives,
                in_top_5pct,
            })
            .collect(),
        queues,
        surge_share_of_claims: truth.and_then(|_| ratio(surge_claims, claims)),
        surge_share_of_investigate: truth.and_then(|_| ratio(surge_investigate, investigate)),
    })
}
