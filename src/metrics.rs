//! Classification metrics for scores against 0/1 labels: ROC AUC, ROC curve, average precision,
//! confusion counts at a threshold, precision at k, calibration table.
//!
//! Pure functions over slices; shared by `train`, `evaluate` and (later) monitoring. Conventions
//! follow scikit-learn where it has a function, so its results can serve as the oracle:
//! a score at or above the threshold is a referral; tied scores count one half in AUC.

use serde::{Deserialize, Serialize};

/// Confusion counts of referrals (predicted positive) against labels.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Confusion {
    pub tp: u64,
    pub fp: u64,
    pub tn: u64,
    #[serde(rename = "fn")]
    pub fn_: u64,
}

fn ratio(num: u64, den: u64) -> Option<f64> {
    (den > 0).then(|| num as f64 / den as f64)
}

impl Confusion {
    /// Counts with `flagged[i]` as the referral decision for `labels[i]`.
    pub fn from_decisions(flagged: impl IntoIterator<Item = bool>, labels: &[bool]) -> Confusion {
        let mut c = Confusion::default();
        for (f, &y) in flagged.into_iter().zip(labels) {
            match (f, y) {
                (true, true) => c.tp += 1,
                (true, false) => c.fp += 1,
                (false, false) => c.tn += 1,
                (false, true) => c.fn_ += 1,
            }
        }
        c
    }

    /// Counts with a referral wherever `score >= threshold`.
    pub fn at_threshold(scores: &[f64], labels: &[bool], threshold: f64) -> Confusion {
        Confusion::from_decisions(scores.iter().map(|&s| s >= threshold), labels)
    }

    pub fn total(&self) -> u64 {
        self.tp + self.fp + self.tn + self.fn_
    }
    pub fn accuracy(&self) -> Option<f64> {
        ratio(self.tp + self.tn, self.total())
    }
    pub fn precision(&self) -> Option<f64> {
        ratio(self.tp, self.tp + self.fp)
    }
    /// Recall, also called sensitivity or true positive rate.
    pub fn recall(&self) -> Option<f64> {
        ratio(self.tp, self.tp + self.fn_)
    }
    pub fn specificity(&self) -> Option<f64> {
        ratio(self.tn, self.tn + self.fp)
    }
    /// Harmonic mean of precision and recall; `None` when both are undefined or zero.
    pub fn f1(&self) -> Option<f64> {
        ratio(2 * self.tp, 2 * self.tp + self.fp + self.fn_)
    }
}

/// Ranks (1-based) with ties given their average rank.
pub fn average_ranks(values: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&a, &b| values[a].total_cmp(&values[b]));
    let mut ranks = vec![0.0; values.len()];
    let mut i = 0;
    while i < order.len() {
        let mut j = i;
        while j + 1 < order.len() && values[order[j + 1]] == values[order[i]] {
            j += 1;
        }
        let avg = (i + j) as f64 / 2.0 + 1.0;
        for &k in &order[i..=j] {
            ranks[k] = avg;
        }
        i = j + 1;
    }
    ranks
}

/// Area under the ROC curve by the rank-sum (Mann–Whitney U) identity, so a tied
/// positive/negative pair counts one half. `None` when one class is absent.
pub fn roc_auc(scores: &[f64], labels: &[bool]) -> Option<f64> {
    let n_pos = labels.iter().filter(|&&y| y).count();
    let n_neg = labels.len() - n_pos;
    if n_pos == 0 || n_neg == 0 {
        return None;
    }
    let ranks = average_ranks(scores);
    let pos_rank_sum: f64 = ranks
        .iter()
        .zip(labels)
        .filter(|(_, y)| **y)
        .map(|(r, _)| r)
        .sum();
    let u = pos_rank_sum - (n_pos as f64) * (n_pos as f64 + 1.0) / 2.0;
    Some(u / (n_pos as f64 * n_neg as f64))
}

/// One point of a ROC curve: referring everything scored at or above `threshold`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct RocPoint {
    pub threshold: f64,
    pub fpr: f64,
    pub tpr: f64,
}

/// The ROC curve at every distinct score, from the strictest threshold down, starting at (0, 0)
/// with threshold +infinity (scikit-learn's `roc_curve(..., drop_intermediate=False)`).
pub fn roc_curve(scores: &[f64], labels: &[bool]) -> Vec<RocPoint> {
    let n_pos = labels.iter().filter(|&&y| y).count() as f64;
    let n_neg = labels.len() as f64 - n_pos;
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[b].total_cmp(&scores[a]));
    let mut out = vec![RocPoint {
        threshold: f64::INFINITY,
        fpr: 0.0,
        tpr: 0.0,
    }];
    let (mut tp, mut fp) = (0.0, 0.0);
    let mut i = 0;
    while i < order.len() {
        let s = scores[order[i]];
        while i < order.len() && scores[order[i]] == s {
            if labels[order[i]] {
                tp += 1.0;
            } else {
                fp += 1.0;
            }
            i += 1;
        }
        out.push(RocPoint {
            threshold: s,
            fpr: if n_neg > 0.0 { fp / n_neg } else { 0.0 },
            tpr: if n_pos > 0.0 { tp / n_pos } else { 0.0 },
        });
    }
    out
}

/// Average precision as scikit-learn defines it: the sum over distinct thresholds of
/// (recall step) × (precision at that threshold). `None` without positives.
pub fn average_precision(scores: &[f64], labels: &[bool]) -> Option<f64> {
    let n_pos = labels.iter().filter(|&&y| y).count() as f64;
    if n_pos == 0.0 {
        return None;
    }
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[b].total_cmp(&scores[a]));
    let (mut tp, mut n, mut ap, mut prev_recall) = (0.0, 0.0, 0.0, 0.0);
    let mut i = 0;
    while i < order.len() {
        let s = scores[order[i]];
        while i < order.len() && scores[order[i]] == s {
            tp += f64::from(u8::from(labels[order[i]]));
            n += 1.0;
            i += 1;
        }
        let recall = tp / n_pos;
        ap += (recall - prev_recall) * (tp / n);
        prev_recall = recall;
    }
    Some(ap)
}

/// Indices of the `k` highest scores; ties broken by position (earlier first), so the result
/// is deterministic.
pub fn top_k(scores: &[f64], k: usize) -> Vec<usize> {
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[b].total_cmp(&scores[a]).then(a.cmp(&b)));
    order.truncate(k);
    order
}

/// Share of positives among the `k` highest scores (`None` when k is 0).
pub fn precision_at_k(scores: &[f64], labels: &[bool], k: usize) -> Option<f64> {
    let top = top_k(scores, k.min(scores.len()));
    let hits = top.iter().filter(|&&i| labels[i]).count() as u64;
    ratio(hits, top.len() as u64)
}

/// One row of a calibration table.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct CalibrationBin {
    pub lower: f64,
    pub upper: f64,
    pub count: u64,
    pub mean_predicted: f64,
    pub observed_rate: f64,
}

/// Calibration table over `n_bins` equal-width bins of predicted probability on [0, 1]; empty
/// bins are omitted (scikit-learn's `calibration_curve(strategy="uniform")`, which puts a
/// probability exactly on an inner edge in the upper bin and 1.0 in the last).
pub fn calibration_table(probs: &[f64], labels: &[bool], n_bins: usize) -> Vec<CalibrationBin> {
    let mut count = vec![0u64; n_bins];
    let mut sum_p = vec![0.0; n_bins];
    let mut pos = vec![0u64; n_bins];
    for (&p, &y) in probs.iter().zip(labels) {
        let i = ((p * n_bins as f64).floor() as usize).min(n_bins - 1);
        count[i] += 1;
        sum_p[i] += p;
        pos[i] += u64::from(y);
    }
    (0..n_bins)
        .filter(|&i| count[i] > 0)
        .map(|i| CalibrationBin {
            lower: i as f64 / n_bins as f64,
            upper: (i + 1) as f64 / n_bins as f64,
            count: count[i],
            mean_predicted: sum_p[i] / count[i] as f64,
            observed_rate: pos[i] as f64 / count[i] as f64,
        })
        .collect()
}

/// Expected calibration error over the same equal-width bins as [`calibration_table`]: the
/// count-weighted mean of |mean predicted − observed rate| (Naeini, Cooper and Hauskrecht,
/// 2015). `None` for no claims.
pub fn expected_calibration_error(probs: &[f64], labels: &[bool], n_bins: usize) -> Option<f64> {
    if probs.is_empty() {
        return None;
    }
    let n = probs.len() as f64;
    Some(
        calibration_table(probs, labels, n_bins)
            .iter()
            .map(|b| b.count as f64 / n * (b.mean_predicted - b.observed_rate).abs())
            .sum(),
    )
}

/// Brier score: the mean squared difference between probability and outcome (0 for none).
pub fn brier(probs: &[f64], labels: &[bool]) -> f64 {
    probs
        .iter()
        .zip(labels)
        .map(|(p, &t)| (p - f64::from(u8::from(t))).powi(2))
        .sum::<f64>()
        / probs.len().max(1) as f64
}

/// Everything `weir evaluate` reports for one score file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Evaluation {
    pub n: usize,
    pub positives: usize,
    pub threshold: f64,
    pub auc: Option<f64>,
    pub average_precision: Option<f64>,
    pub confusion: Confusion,
    pub accuracy: Option<f64>,
    pub precision: Option<f64>,
    pub recall: Option<f64>,
    pub specificity: Option<f64>,
    pub f1: Option<f64>,
    pub k: usize,
    pub precision_at_k: Option<f64>,
}

pub fn evaluate(scores: &[f64], labels: &[bool], threshold: f64, k: usize) -> Evaluation {
    let confusion = Confusion::at_threshold(scores, labels, threshold);
    Evaluation {
        n: scores.len(),
        positives: labels.iter().filter(|&&y| y).count(),
        threshold,
        auc: roc_auc(scores, labels),
        average_precision: average_precision(scores, labels),
        confusion,
        accuracy: confusion.accuracy(),
        precision: confusion.precision(),
        recall: confusion.recall(),
        specificity: confusion.specificity(),
        f1: confusion.f1(),
        k: k.min(scores.len()),
        precision_at_k: precision_at_k(scores, labels, k),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// Naive AUC over all pairs: the definition, for the property test.
    fn naive_auc(s: &[f64], y: &[bool]) -> f64 {
        let (mut num, mut den) = (0.0, 0.0);
        for i in 0..s.len() {
            for j in 0..s.len() {
                if y[i] && !y[j] {
                    den += 1.0;
                    num += if s[i] > s[j] {
                        1.0
                    } else if s[i] == s[j] {
                        0.5
                    } else {
                        0.0
                    };
                }
            }
        }
        num / den
    }

    proptest! {
        #[test]
        fn auc_equals_pairwise_definition(
            pairs in prop::collection::vec((0u8..6, any::<bool>()), 2..60)
        ) {
            let s: Vec<f64> = pairs.iter().map(|p| f64::from(p.0) / 5.0).collect();
            let y: Vec<bool> = pairs.iter().map(|p| p.1).collect();
            match roc_auc(&s, &y) {
                None => prop_assert!(y.iter().all(|&v| v) || y.iter().all(|&v| !v)),
                Some(a) => prop_assert!((a - naive_auc(&s, &y)).abs() < 1e-12),
            }
        }

        #[test]
        fn last_roc_point_is_one_one_and_area_matches_auc(
            pairs in prop::collection::vec((0u8..10, any::<bool>()), 2..60)
        ) {
            let s: Vec<f64> = pairs.iter().map(|p| f64::from(p.0)).collect();
            let y: Vec<bool> = pairs.iter().map(|p| p.1).collect();
            prop_assume!(y.iter().any(|&v| v) && y.iter().any(|&v| !v));
            let curve = roc_curve(&s, &y);
            let last = curve.last().unwrap();
            prop_assert_eq!((last.fpr, last.tpr), (1.0, 1.0));
            // Trapezoids under the curve equal the rank-sum AUC (ties as diagonal segments).
            let area: f64 = curve.windows(2)
                .map(|w| (w[1].fpr - w[0].fpr) * (w[1].tpr + w[0].tpr) / 2.0).sum();
            prop_assert!((area - roc_auc(&s, &y).unwrap()).abs() < 1e-12);
        }
    }

    #[test]
    fn confusion_ratios_by_hand() {
        // Worked by hand: 3 referred of which 2 right, 1 positive missed, 4 correctly passed.
        let c = Confusion {
            tp: 2,
            fp: 1,
            tn: 4,
            fn_: 1,
        };
        assert_eq!(c.precision(), Some(2.0 / 3.0));
        assert_eq!(c.recall(), Some(2.0 / 3.0));
        assert_eq!(c.specificity(), Some(0.8));
        assert_eq!(c.accuracy(), Some(0.75));
        assert_eq!(c.f1(), Some(2.0 / 3.0));
        assert_eq!(Confusion::default().precision(), None);
        let json = serde_json::to_value(c).unwrap();
        assert_eq!(json["fn"], 1);
    }

    #[test]
    fn precision_at_k_breaks_ties_by_position() {
        let s = [0.9, 0.5, 0.5, 0.1];
        let y = [true, false, true, false];
        assert_eq!(top_k(&s, 2), vec![0, 1]);
        assert_eq!(precision_at_k(&s, &y, 2), Some(0.5));
        assert_eq!(precision_at_k(&s, &y, 3), Some(2.0 / 3.0));
        assert_eq!(precision_at_k(&s, &y, 10), Some(0.5));
        assert_eq!(precision_at_k(&s, &y, 0), None);
    }
}
