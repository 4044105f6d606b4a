//! How good the referrals have been: confusion counts by week of decision, queue, model version
//! and rules version; precision with a Wilson score interval; recall and specificity estimated
//! from the random audit sample; referral rates by segment (fairness read-out).
//!
//! Only referrals have outcomes, as a rule, so precision is measured directly while recall
//! cannot be: claims that were not referred are adjudicated only when the audit sample drew
//! them. The audit sample is a uniform random draw from the unreferred claims, so its rate of
//! referral-worthy claims estimates the rate among all unreferred claims.

use crate::feedback::Outcome;
use crate::metrics::Confusion;
use crate::rules::Queue;
use chrono::{DateTime, Datelike, Utc};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// z for a two-sided 95% interval: the 0.975 quantile of the standard normal distribution.
pub const Z95: f64 = 1.959_963_984_540_054;

/// Wilson score interval for k successes in n trials (Wilson, 1927, JASA 22:209-212).
/// `None` when n is 0.
pub fn wilson(k: u64, n: u64, z: f64) -> Option<(f64, f64)> {
    if n == 0 {
        return None;
    }
    let n_f = n as f64;
    let p = k as f64 / n_f;
    let z2 = z * z;
    let centre = (p + z2 / (2.0 * n_f)) / (1.0 + z2 / n_f);
    let half = z / (1.0 + z2 / n_f) * (p * (1.0 - p) / n_f + z2 / (4.0 * n_f * n_f)).sqrt();
    Some(((centre - half).max(0.0), (centre + half).min(1.0)))
}

/// One decided claim as monitoring sees it.
#[derive(Debug, Clone, PartialEq)]
pub struct Observation {
    pub decided_at: DateTime<Utc>,
    pub queue: Queue,
    pub model_version: String,
    pub rules_version: String,
    pub outcome: Option<Outcome>,
    /// Segment name → value, for the fairness read-out.
    pub segments: BTreeMap<String, String>,
}

fn referred(q: Queue) -> bool {
    matches!(q, Queue::Investigate | Queue::DeskCheck)
}

/// ISO 8601 week of a time, as "2025-W07".
pub fn iso_week(t: DateTime<Utc>) -> String {
    let w = t.iso_week();
    format!("{}-W{:02}", w.year(), w.week())
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GroupRow {
    pub week: String,
    pub queue: Queue,
    pub model_version: String,
    pub rules_version: String,
    pub decided: u64,
    /// Claims with an outcome that gives a label (fraud_confirmed, inflated, genuine).
    pub labelled: u64,
    /// Claims with an outcome that does not (not_proven, withdrawn).
    pub unlabelled_outcomes: u64,
    pub awaiting_outcome: u64,
    /// Among labelled claims: referred (investigate, desk check) against label.
    pub confusion: Confusion,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Precision {
    pub referred_labelled: u64,
    pub true_positives: u64,
    pub precision: Option<f64>,
    /// 95% Wilson score interval.
    pub interval: Option<(f64, f64)>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AuditEstimate {
    /// Audit-sample claims with a labelled outcome, and how many were referral-worthy.
    pub audited_labelled: u64,
    pub audited_positive: u64,
    /// Rate of referral-worthy claims among unreferred claims, with its 95% Wilson interval.
    pub unreferred_positive_rate: Option<f64>,
    pub unreferred_positive_interval: Option<(f64, f64)>,
    pub recall: Option<f64>,
    /// Recall at the two ends of the Wilson interval of the unreferred positive rate (the
    /// precision of referrals held at its estimate): how far the audit sample's own
    /// uncertainty moves recall. A sample with no positive in it gives recall 1 with a wide
    /// interval, not a certainty.
    pub recall_interval: Option<(f64, f64)>,
    pub specificity: Option<f64>,
    /// False when the sample is too small to say anything (fewer than
    /// [`MIN_AUDIT_SAMPLE`] labelled audit claims); the estimates are then withheld.
    pub sufficient: bool,
    pub note: String,
}

/// Labelled audit claims below which recall is not estimated (common practice, no source:
/// with fewer, the interval on a rate of a few percent spans most of the plausible range).
pub const MIN_AUDIT_SAMPLE: u64 = 30;

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct QualityReport {
    pub from: Option<String>,
    pub to: Option<String>,
    pub groups: Vec<GroupRow>,
    pub totals: Confusion,
    pub precision: Precision,
    pub referred: u64,
    pub referred_awaiting_outcome: u64,
    pub share_awaiting_outcome: Option<f64>,
    pub audit: AuditEstimate,
}

/// The quality read-out of observations decided in `[from, to)` (either end open).
pub fn quality(
    obs: &[Observation],
    from: Option<DateTime<Utc>>,
    to: Option<DateTime<Utc>>,
) -> QualityReport {
    let mut t = QualityTally::new(from, to);
    for o in obs {
        t.add(o);
    }
    t.finish()
}

/// [`quality`] one observation at a time: the store is read once, in a stream, and nothing
/// but the counts is kept (a store of millions of claims is never held in memory).
#[derive(Debug, Clone)]
pub struct QualityTally {
    from: Option<DateTime<Utc>>,
    to: Option<DateTime<Utc>>,
    groups: BTreeMap<(String, Queue, String, String), GroupRow>,
    totals: Confusion,
    referred_n: u64,
    awaiting: u64,
    unreferred_n: u64,
    audit_n: u64,
    audit_pos: u64,
}

impl QualityTally {
    pub fn new(from: Option<DateTime<Utc>>, to: Option<DateTime<Utc>>) -> QualityTally {
        QualityTally {
            from,
            to,
            groups: BTreeMap::new(),
            totals: Confusion::default(),
            referred_n: 0,
            awaiting: 0,
            unreferred_n: 0,
            audit_n: 0,
            audit_pos: 0,
        }
    }

    pub fn add(&mut self, o: &Observation) {
        if !(self.from.is_none_or(|f| o.decided_at >= f)
            && self.to.is_none_or(|t| o.decided_at < t))
        {
            return;
        }
        let week = iso_week(o.decided_at);
        let key = (
            week,
            o.queue,
            o.model_version.clone(),
            o.rules_version.clone(),
        );
        let row = self.groups.entry(key).or_insert_with_key(|key| GroupRow {
            week: key.0.clone(),
            queue: key.1,
            model_version: key.2.clone(),
            rules_version: key.3.clone(),
            decided: 0,
            labelled: 0,
            unlabelled_outcomes: 0,
            awaiting_outcome: 0,
            confusion: Confusion::default(),
        });
        row.decided += 1;
        let r = referred(o.queue);
        if r {
            self.referred_n += 1;
        } else {
            self.unreferred_n += 1;
        }
        match o.outcome.map(Outcome::label) {
            None => {
                if o.queue != Queue::NoReview {
                    row.awaiting_outcome += 1;
                    if r {
                        self.awaiting += 1;
                    }
                }
            }
            Some(None) => row.unlabelled_outcomes += 1,
            Some(Some(y)) => {
                row.labelled += 1;
                let c = Confusion::from_decisions([r], &[y]);
                for t in [&mut row.confusion, &mut self.totals] {
                    t.tp += c.tp;
                    t.fp += c.fp;
                    t.tn += c.tn;
                    t.fn_ += c.fn_;
                }
                if o.queue == Queue::Audit {
                    self.audit_n += 1;
                    self.audit_pos += u64::from(y);
                }
            }
        }
    }

    pub fn finish(self) -> QualityReport {
        let QualityTally {
            from,
            to,
            groups,
            totals,
            referred_n,
            awaiting,
            unreferred_n,
            audit_n,
            audit_pos,
        } = self;
        let referred_labelled = totals.tp + totals.fp;
        let precision = Precision {
            referred_labelled,
            true_positives: totals.tp,
            precision: totals.precision(),
            interval: wilson(totals.tp, referred_labelled, Z95),
        };
        let sufficient = audit_n >= MIN_AUDIT_SAMPLE && referred_labelled > 0;
        let rate = (audit_n > 0).then(|| audit_pos as f64 / audit_n as f64);
        // Expected counts over every decided claim in the window.
        let recall_at = |p: f64, r: f64| {
            let tp = p * referred_n as f64;
            let fn_ = r * unreferred_n as f64;
            (tp + fn_ > 0.0).then(|| tp / (tp + fn_))
        };
        let (recall, specificity) = match (sufficient, rate, totals.precision()) {
            (true, Some(r), Some(p)) => {
                let fp = (1.0 - p) * referred_n as f64;
                let tn = (1.0 - r) * unreferred_n as f64;
                (recall_at(p, r), (tn + fp > 0.0).then(|| tn / (tn + fp)))
            }
            _ => (None, None),
        };
        let recall_interval = match (
            sufficient,
            wilson(audit_pos, audit_n, Z95),
            totals.precision(),
        ) {
            (true, Some((r_lo, r_hi)), Some(p)) => recall_at(p, r_hi).zip(recall_at(p, r_lo)),
            _ => None,
        };
        let note = if sufficient {
            format!(
                "recall and specificity estimated from {audit_n} labelled audit claims (a random sample of unreferred claims) and the precision of referrals"
            )
        } else {
            format!(
                "the audit sample holds {audit_n} labelled claims; at least {MIN_AUDIT_SAMPLE} are needed before recall and specificity say anything"
            )
        };
        QualityReport {
            from: from.map(|f| f.to_rfc3339()),
            to: to.map(|t| t.to_rfc3339()),
            groups: groups.into_values().collect(),
            totals,
            precision,
            referred: referred_n,
            referred_awaiting_outcome: awaiting,
            share_awaiting_outcome: (referred_n > 0).then(|| awaiting as f64 / referred_n as f64),
            audit: AuditEstimate {
                audited_labelled: audit_n,
                audited_positive: audit_pos,
                unreferred_positive_rate: rate,
                unreferred_positive_interval: wilson(audit_pos, audit_n, Z95),
                recall: if sufficient { recall } else { None },
                recall_interval,
                specificity: if sufficient { specificity } else { None },
                sufficient,
                note,
            },
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SegmentRow {
    pub segment: String,
    pub value: String,
    pub claims: u64,
    pub referred: u64,
    pub referral_rate: f64,
    /// This value's referral rate divided by the highest rate in the same segment.
    pub ratio_to_highest: f64,
    /// True when the ratio is below the configured bound.
    pub flagged: bool,
}

/// Referral rate by segment value and its ratio to the highest rate in that segment. The
/// default bound of 0.8 is the "four-fifths rule" of the US Uniform Guidelines on Employee
/// Selection Procedures (29 CFR 1607.4(D)), imported here as a convention for spotting uneven
/// referral rates; it is not a legal test for insurance.
pub fn fairness(obs: &[Observation], bound: f64) -> Vec<SegmentRow> {
    let mut t = FairnessTally::default();
    for o in obs {
        t.add(o);
    }
    t.finish(bound)
}

/// [`fairness`] one observation at a time (counts per segment value only).
#[derive(Debug, Clone, Default)]
pub struct FairnessTally {
    counts: BTreeMap<(String, String), (u64, u64)>,
}

impl FairnessTally {
    pub fn add(&mut self, o: &Observation) {
        for (seg, val) in &o.segments {
            let c = self.counts.entry((seg.clone(), val.clone())).or_default();
            c.0 += 1;
            c.1 += u64::from(referred(o.queue));
        }
    }

    pub fn finish(self, bound: f64) -> Vec<SegmentRow> {
        fairness_rows(self.counts, bound)
    }
}

fn fairness_rows(counts: BTreeMap<(String, String), (u64, u64)>, bound: f64) -> Vec<SegmentRow> {
    let mut highest: BTreeMap<String, f64> = BTreeMap::new();
    for ((seg, _), (n, r)) in &counts {
        let rate = *r as f64 / *n as f64;
        let h = highest.entry(seg.clone()).or_insert(0.0);
        *h = h.max(rate);
    }
    counts
        .into_iter()
        .map(|((segment, value), (n, r))| {
            let rate = r as f64 / n as f64;
            let top = highest.get(&segment).copied().unwrap_or(0.0);
            let ratio = if top > 0.0 { rate / top } else { 1.0 };
            SegmentRow {
                segment,
                value,
                claims: n,
                referred: r,
                referral_rate: rate,
                ratio_to_highest: ratio,
                flagged: ratio < bound,
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn iso_weeks_follow_iso_8601() {
        // 2021-01-03 is a Sunday in ISO week 53 of 2020; 2021-01-04 starts week 1 (ISO 8601).
        let t = |s: &str| DateTime::parse_from_rfc3339(s).unwrap().with_timezone(&Utc);
        assert_eq!(iso_week(t("2021-01-03T12:00:00Z")), "2020-W53");
        assert_eq!(iso_week(t("2021-01-04T00:00:00Z")), "2021-W01");
    }

    #[test]
    fn wilson_interval_edge_cases() {
        assert_eq!(wilson(0, 0, Z95), None);
        let (lo, hi) = wilson(0, 10, Z95).unwrap();
        assert_eq!(lo, 0.0);
        assert!(hi > 0.2 && hi < 0.35, "{hi}");
        let (lo, hi) = wilson(10, 10, Z95).unwrap();
        assert!(lo > 0.65 && (hi - 1.0).abs() < 1e-12, "{lo} {hi}");
    }

    fn obs(queue: Queue, outcome: Option<Outcome>, line: &str) -> Observation {
        Observation {
            decided_at: DateTime::parse_from_rfc3339("2025-03-05T10:00:00Z")
                .unwrap()
                .with_timezone(&Utc),
            queue,
            model_version: "m".into(),
            rules_version: "r".into(),
            outcome,
            segments: [("line".to_string(), line.to_string())].into(),
        }
    }

    #[test]
    fn recall_from_the_audit_sample_by_hand() {
        // 10 referrals, 6 worth it (precision 0.6); 38 audit claims of which 2 worth it, plus
        // 152 unreferred claims without outcome: 190 unreferred in all.
        let mut o = Vec::new();
        for i in 0..10 {
            let out = if i < 6 {
                Outcome::FraudConfirmed
            } else {
                Outcome::Genuine
            };
            o.push(obs(Queue::Investigate, Some(out), "motor"));
        }
        for i in 0..38 {
            let out = if i < 2 {
                Outcome::Inflated
            } else {
                Outcome::Genuine
            };
            o.push(obs(Queue::Audit, Some(out), "home"));
        }
        for _ in 0..152 {
            o.push(obs(Queue::NoReview, None, "home"));
        }
        let q = quality(&o, None, None);
        assert!(q.audit.sufficient);
        // Expected TP = 0.6 * 10 = 6; expected FN = (2/38) * 190 = 10; recall = 6/16.
        let r = q.audit.recall.unwrap();
        assert!((r - 6.0 / 16.0).abs() < 1e-12, "{r}");
        let (lo, hi) = q.audit.recall_interval.unwrap();
        assert!(lo < r && r < hi, "{lo} {r} {hi}");
        // Specificity: TN = (36/38) * 190 = 180, FP = 4; 180 / 184.
        assert!((q.audit.specificity.unwrap() - 180.0 / 184.0).abs() < 1e-12);
    }

    #[test]
    fn small_audit_samples_withhold_recall() {
        let o = vec![
            obs(Queue::Investigate, Some(Outcome::FraudConfirmed), "motor"),
            obs(Queue::Investigate, Some(Outcome::Genuine), "motor"),
            obs(Queue::DeskCheck, None, "home"),
            obs(Queue::Audit, Some(Outcome::Genuine), "home"),
            obs(Queue::NoReview, None, "home"),
        ];
        let q = quality(&o, None, None);
        assert_eq!(q.totals.tp, 1);
        assert_eq!(q.totals.fp, 1);
        assert_eq!(q.totals.tn, 1);
        assert_eq!(q.precision.precision, Some(0.5));
        assert_eq!(q.referred, 3);
        assert_eq!(q.referred_awaiting_outcome, 1);
        assert!(!q.audit.sufficient);
        assert_eq!(q.audit.recall, None);
        assert!(q.audit.note.contains("at least 30"));
        let f = fairness(&o, 0.8);
        let home = f.iter().find(|r| r.value == "home").unwrap();
        // home: 1 referred of 3; motor: 2 of 2.
        assert!((home.ratio_to_highest - 1.0 / 3.0).abs() < 1e-12);
        assert!(home.flagged);
    }
}
