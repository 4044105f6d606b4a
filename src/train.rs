//! Offline training: loading adjudicated claims, time-ordered split, k-fold cross-validation
//! for model selection, class balancing and calibration, the outlier model, drift baselines,
//! the artifact and the evaluation report.
//!
//! The procedure, in the order it runs:
//! 1. Read newline-delimited claims with an `outcome`; each bad line is reported with its line
//!    number and either skipped (counted) or the whole file refused, as the caller chooses.
//! 2. Sort by report time and compute features in that order, each claim seeing only claims
//!    reported before it (the same [`features::compute`] the service runs).
//! 3. Keep claims whose outcome gives a label (see [`Outcome::label`]); split in time: the
//!    earlier part trains, the later part (default one third, a common rule of thumb) is held
//!    out and touched only for the final report.
//! 4. On the training part, k contiguous time folds: every candidate (logistic regression at
//!    each penalty, boosted trees) is fitted on k-1 folds and scored on the remaining one. The
//!    candidate with the best mean fold ROC AUC becomes the champion.
//! 5. Class imbalance: logistic regression is fitted on data where positives are repeated to
//!    balance the classes; trees get the same balance through sample weights. That shifts raw
//!    scores, so each model is calibrated with Platt scaling fitted on its out-of-fold margins.
//! 6. Refit on the whole training part, score the held-out part, report.

use crate::claim::Claim;
use crate::config::{Config, ThresholdRule};
use crate::features::{self, FeatureVector, MemoryHistory};
use crate::feedback::Outcome;
use crate::metrics::{self, CalibrationBin, Confusion};
use crate::model::{
    ARTIFACT_FORMAT, ARTIFACT_FORMAT_VERSION, Baselines, ClassifierSpec, Logistic, Model,
    ModelArtifact, Platt, Standardiser, TrainingInfo, TreeSettings, Trees,
};
use crate::monitor::drift::{Baseline, DEFAULT_BINS};
use crate::outliers::{KMeansSettings, OutlierModel};
use indicatif::{ProgressBar, ProgressStyle};
use ndarray::{Array2, ArrayView2, Axis};
use serde::{Deserialize, Serialize};
use std::io::BufRead;

/// What to do with a line that cannot be used.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum BadLines {
    /// Skip it, count it, and say which lines were skipped.
    Skip,
    /// Refuse the whole file at the first bad line.
    Refuse,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LineProblem {
    pub line: usize,
    pub problem: String,
}

#[derive(Debug, thiserror::Error)]
pub enum TrainError {
    #[error("line {line}: {problem} (use --bad-lines skip to skip such lines)")]
    BadLine { line: usize, problem: String },
    #[error("cannot read training data: {0}")]
    Io(#[from] std::io::Error),
    #[error("not enough data: {0}")]
    NotEnough(String),
    #[error(transparent)]
    Fit(#[from] crate::model::FitError),
    #[error(transparent)]
    Artifact(#[from] crate::model::ArtifactError),
    #[error(transparent)]
    Outliers(#[from] crate::outliers::OutlierError),
}

/// One usable line of a training file.
#[derive(Debug, Clone)]
pub struct TrainingRow {
    pub line: usize,
    pub claim: Claim,
    /// `None` for a claim without an outcome yet.
    pub outcome: Option<Outcome>,
}

#[derive(Debug, Default)]
pub struct Loaded {
    pub rows: Vec<TrainingRow>,
    pub lines_read: usize,
    pub skipped: Vec<LineProblem>,
}

/// The `outcome` value of a claim that has none yet (as `weir export` writes it): the claim
/// counts in history features but is not fitted on.
pub const UNADJUDICATED: &str = "unadjudicated";

fn parse_line(text: &str) -> Result<(Claim, Option<Outcome>), String> {
    let v = crate::claim::strict_json(text.as_bytes()).map_err(|e| format!("not JSON: {e}"))?;
    let outcome = match v.get("outcome") {
        None | Some(serde_json::Value::Null) => Err(format!(
            "outcome: required (use \"{UNADJUDICATED}\" for a claim without one)"
        )),
        Some(serde_json::Value::String(s)) if s == UNADJUDICATED => Ok(None),
        Some(serde_json::Value::String(s)) => Outcome::parse(s).map(Some).ok_or_else(|| {
            let names: Vec<_> = Outcome::ALL.iter().map(|o| o.as_str()).collect();
            format!(
                "outcome: unknown outcome {s:?}; expected one of {}, or {UNADJUDICATED}",
                names.join(", ")
            )
        }),
        Some(_) => Err("outcome: expected a string".to_string()),
    };
    let claim = Claim::from_value_allowing(&v, &["outcome"]).map_err(|errs| {
        errs.iter()
            .map(ToString::to_string)
            .collect::<Vec<_>>()
            .join("; ")
    });
    match (claim, outcome) {
        (Ok(c), Ok(o)) => Ok((c, o)),
        (Err(a), Err(b)) => Err(format!("{b}; {a}")),
        (Err(a), Ok(_)) | (Ok(_), Err(a)) => Err(a),
    }
}

/// One line of a training file: the claim in the intake schema (its own field order, claim id
/// first) followed by its `outcome`.
pub fn training_line(claim: &Claim, outcome: Option<Outcome>) -> String {
    let text = serde_json::to_string(claim).unwrap_or_default();
    let body = text.strip_suffix('}').unwrap_or(&text);
    format!(
        "{body},\"outcome\":\"{}\"}}",
        outcome.map_or(UNADJUDICATED, Outcome::as_str)
    )
}

/// Read a training file. Blank lines are ignored; a claim id seen twice is a bad line (the
/// second one), since history would count it twice.
pub fn load(reader: impl BufRead, bad: BadLines) -> Result<Loaded, TrainError> {
    let mut out = Loaded::default();
    let mut seen = std::collections::HashSet::new();
    for (i, line) in reader.split(b'\n').enumerate() {
        let line_no = i + 1;
        let bytes = line?;
        out.lines_read = line_no;
        let result = match std::str::from_utf8(&bytes) {
            Err(e) => Err(format!("not UTF-8: {e}")),
            Ok(text) if text.trim().is_empty() => continue,
            Ok(text) => parse_line(text).and_then(|(c, o)| {
                if seen.insert(c.claim_id.clone()) {
                    Ok((c, o))
                } else {
                    Err(format!(
                        "claim_id {:?} appears on an earlier line",
                        c.claim_id
                    ))
                }
            }),
        };
        match result {
            Ok((claim, outcome)) => out.rows.push(TrainingRow {
                line: line_no,
                claim,
                outcome,
            }),
            Err(problem) => match bad {
                BadLines::Refuse => {
                    return Err(TrainError::BadLine {
                        line: line_no,
                        problem,
                    });
                }
                BadLines::Skip => out.skipped.push(LineProblem {
                    line: line_no,
                    problem,
                }),
            },
        }
    }
    Ok(out)
}

/// Rows in time order with their full feature vectors, computed as the service would.
pub fn featurise(rows: &mut [TrainingRow], progress: bool) -> Vec<FeatureVector> {
    rows.sort_by(|a, b| {
        a.claim
            .reported_at
            .cmp(&b.claim.reported_at)
            .then_with(|| a.line.cmp(&b.line))
    });
    let bar = bar(rows.len() as u64, "features", progress);
    let mut history = MemoryHistory::new();
    let out = rows
        .iter()
        .map(|r| {
            let v = features::compute(&r.claim, &history);
            history.record(&r.claim);
            bar.inc(1);
            v
        })
        .collect();
    bar.finish_and_clear();
    out
}

fn bar(n: u64, what: &str, visible: bool) -> ProgressBar {
    if !visible {
        return ProgressBar::hidden();
    }
    let pb = ProgressBar::new(n);
    if let Ok(style) = ProgressStyle::with_template("{msg:>10} [{bar:40}] {pos}/{len} {elapsed}") {
        pb.set_style(style.progress_chars("=> "));
    }
    pb.set_message(what.to_string());
    pb
}

/// Contiguous folds over `n` rows: `(start, end)` of each validation block.
pub fn contiguous_folds(n: usize, k: usize) -> Vec<(usize, usize)> {
    (0..k).map(|i| (i * n / k, (i + 1) * n / k)).collect()
}

/// Rows with positives repeated so the classes are about balanced (integer repeat factor).
fn oversample(x: ArrayView2<f64>, y: &[bool]) -> (Array2<f64>, Vec<bool>) {
    let pos = y.iter().filter(|&&v| v).count().max(1);
    let neg = y.len() - pos.min(y.len());
    let reps = (neg / pos).max(1);
    let mut idx = Vec::with_capacity(y.len() + pos * (reps - 1));
    for (i, &v) in y.iter().enumerate() {
        let times = if v { reps } else { 1 };
        idx.extend(std::iter::repeat_n(i, times));
    }
    let xs = x.select(Axis(0), &idx);
    let ys = idx.iter().map(|&i| y[i]).collect();
    (xs, ys)
}

fn balance_weights(y: &[bool]) -> Vec<f64> {
    let pos = y.iter().filter(|&&v| v).count().max(1) as f64;
    let neg = (y.len() as f64 - pos).max(1.0);
    y.iter().map(|&v| if v { neg / pos } else { 1.0 }).collect()
}

/// A candidate model specification for cross-validation.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "model", rename_all = "snake_case")]
pub enum Candidate {
    LogisticRegression { alpha: f64 },
    BoostedTrees(TreeSettings),
}

impl Candidate {
    fn name(&self) -> String {
        match self {
            Candidate::LogisticRegression { alpha } => {
                format!("logistic_regression(alpha={alpha})")
            }
            Candidate::BoostedTrees(_) => "boosted_trees".into(),
        }
    }
}

/// A fitted candidate: margins for any rows of raw model features.
enum Fitted {
    Logistic(Standardiser, Logistic),
    Trees(Trees),
}

impl Fitted {
    fn fit(c: &Candidate, x: ArrayView2<f64>, y: &[bool]) -> Result<Fitted, TrainError> {
        Ok(match c {
            Candidate::LogisticRegression { alpha } => {
                let st = Standardiser::fit(x);
                let z = st.apply(x);
                let (zb, yb) = oversample(z.view(), y);
                Fitted::Logistic(st, Logistic::fit(zb.view(), &yb, *alpha)?)
            }
            Candidate::BoostedTrees(s) => Fitted::Trees(Trees::fit(x, y, &balance_weights(y), s)?),
        })
    }

    fn margins(&self, x: ArrayView2<f64>) -> Vec<f64> {
        match self {
            Fitted::Logistic(st, l) => st
                .apply(x)
                .outer_iter()
                .map(|r| l.margin(&r.to_vec()))
                .collect(),
            Fitted::Trees(t) => t.margins(x),
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CvResult {
    pub candidate: Candidate,
    /// ROC AUC of each validation fold (folds without both classes are left out).
    pub fold_auc: Vec<f64>,
    pub mean_auc: f64,
    pub sd_auc: f64,
    /// AUC of all out-of-fold scores pooled.
    pub pooled_auc: Option<f64>,
    #[serde(skip)]
    pub oof_margins: Vec<f64>,
}

fn cross_validate(
    c: &Candidate,
    x: ArrayView2<f64>,
    y: &[bool],
    folds: &[(usize, usize)],
) -> Result<CvResult, TrainError> {
    let n = x.nrows();
    let fit_fold = |&(a, b): &(usize, usize)| -> Result<Vec<f64>, TrainError> {
        let train_idx: Vec<usize> = (0..a).chain(b..n).collect();
        let xt = x.select(Axis(0), &train_idx);
        let yt: Vec<bool> = train_idx.iter().map(|&i| y[i]).collect();
        let fitted = Fitted::fit(c, xt.view(), &yt)?;
        Ok(fitted.margins(x.slice(ndarray::s![a..b, ..])))
    };
    // Folds are independent: fit them on every core (each fit is deterministic, and results
    // are put back in fold order, so the outcome does not depend on the number of threads).
    let workers = std::thread::available_parallelism()
        .map_or(1, |w| w.get())
        .clamp(1, folds.len().max(1));
    let next = std::sync::atomic::AtomicUsize::new(0);
    let mut done: Vec<(usize, Result<Vec<f64>, TrainError>)> = std::thread::scope(|s| {
        let handles: Vec<_> = (0..workers)
            .map(|_| {
                s.spawn(|| {
                    let mut out = Vec::new();
                    loop {
                        let i = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                        let Some(f) = folds.get(i) else { break };
                        out.push((i, fit_fold(f)));
                    }
                    out
                })
            })
            .collect();
        handles
            .into_iter()
            .flat_map(|h| h.join().unwrap_or_else(|p| std::panic::resume_unwind(p)))
            .collect()
    });
    done.sort_by_key(|(i, _)| *i);
    let mut oof = vec![0.0; n];
    let mut fold_auc = Vec::new();
    for (i, m) in done {
        let (a, b) = folds[i];
        let m = m?;
        if let Some(auc) = metrics::roc_auc(&m, &y[a..b]) {
            fold_auc.push(auc);
        }
        oof[a..b].copy_from_slice(&m);
    }
    let k = fold_auc.len().max(1) as f64;
    let mean = fold_auc.iter().sum::<f64>() / k;
    let sd = (fold_auc.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (k - 1.0).max(1.0)).sqrt();
    Ok(CvResult {
        candidate: c.clone(),
        pooled_auc: metrics::roc_auc(&oof, y),
        fold_auc,
        mean_auc: mean,
        sd_auc: sd,
        oof_margins: oof,
    })
}

/// How referrals are decided, fixed at training time.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RuleReport {
    pub rule: ThresholdRule,
    pub description: String,
    /// Probability threshold (capacity rule).
    pub threshold: Option<f64>,
    pub daily_capacity: f64,
    pub review_cost: f64,
    /// Reviews the capacity allows over the held-out period: the k of precision at k.
    pub capacity_k: usize,
}

/// Held-out figures of one model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HeldOut {
    pub model: String,
    pub cv_mean_auc: f64,
    pub auc: Option<f64>,
    pub average_precision: Option<f64>,
    pub confusion: Confusion,
    pub referred: u64,
    pub accuracy: Option<f64>,
    pub precision: Option<f64>,
    pub recall: Option<f64>,
    pub specificity: Option<f64>,
    pub f1: Option<f64>,
    pub precision_at_capacity: Option<f64>,
    pub recall_at_capacity: Option<f64>,
    pub calibration: Vec<CalibrationBin>,
    pub brier: f64,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DataReport {
    pub lines_read: usize,
    pub rows_loaded: usize,
    pub skipped_count: usize,
    /// The first 50 skipped lines with their problems.
    pub skipped: Vec<LineProblem>,
    /// Claims kept for history but not for fitting, by outcome.
    pub unlabelled: std::collections::BTreeMap<String, usize>,
    pub from: String,
    pub to: String,
    /// Report time of the first held-out claim.
    pub split_at: String,
    pub train_rows: usize,
    pub train_positives: usize,
    pub test_rows: usize,
    pub test_positives: usize,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TopReferral {
    pub claim_id: String,
    pub probability: f64,
    pub outlier_score: f64,
    pub outcome: Option<Outcome>,
    pub reasons: Vec<String>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Report {
    pub model_version: String,
    pub data: DataReport,
    pub rule: RuleReport,
    pub cross_validation: Vec<CvResult>,
    pub champion: String,
    /// Held-out results, champion first.
    pub held_out: Vec<HeldOut>,
    pub outliers: OutlierReport,
    pub logistic_coefficients: Vec<(String, f64)>,
    /// The highest-scored held-out claims, as an investigator would see them.
    pub top_referrals: Vec<TopReferral>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct OutlierReport {
    pub clusters: usize,
    pub sizes: Vec<u64>,
    /// ROC AUC of the outlier score alone on the held-out part (it is not trained on labels).
    pub held_out_auc: Option<f64>,
}

struct Final {
    name: String,
    cv_auc: f64,
    spec: ClassifierSpec,
    platt: Platt,
    fitted: Fitted,
    threshold: f64,
}

pub struct Trained {
    pub artifact: ModelArtifact,
    pub report: Report,
}

struct Split<'a> {
    x_train: Array2<f64>,
    y_train: Vec<bool>,
    x_test: Array2<f64>,
    y_test: Vec<bool>,
    test_rows: Vec<&'a TrainingRow>,
    train_days: f64,
    test_days: f64,
}

fn span_days(rows: &[&TrainingRow]) -> f64 {
    match (rows.first(), rows.last()) {
        (Some(a), Some(b)) => {
            ((b.claim.reported_at - a.claim.reported_at).num_seconds() as f64 / 86_400.0).max(1.0)
        }
        _ => 1.0,
    }
}

fn held_out(
    name: String,
    cv_mean_auc: f64,
    probs: &[f64],
    referred: &[bool],
    y: &[bool],
    capacity_k: usize,
) -> HeldOut {
    let confusion = Confusion::from_decisions(referred.iter().copied(), y);
    let top = metrics::top_k(probs, capacity_k);
    let hits = top.iter().filter(|&&i| y[i]).count();
    let positives = y.iter().filter(|&&v| v).count();
    HeldOut {
        model: name,
        cv_mean_auc,
        auc: metrics::roc_auc(probs, y),
        average_precision: metrics::average_precision(probs, y),
        confusion,
        referred: confusion.tp + confusion.fp,
        accuracy: confusion.accuracy(),
        precision: confusion.precision(),
        recall: confusion.recall(),
        specificity: confusion.specificity(),
        f1: confusion.f1(),
        precision_at_capacity: (!top.is_empty()).then(|| hits as f64 / top.len() as f64),
        recall_at_capacity: (positives > 0).then(|| hits as f64 / positives as f64),
        calibration: metrics::calibration_table(probs, y, 10),
        brier: probs
            .iter()
            .zip(y)
            .map(|(p, &t)| (p - f64::from(u8::from(t))).powi(2))
            .sum::<f64>()
            / probs.len().max(1) as f64,
    }
}

/// Decide referrals under the configured rule.
pub fn refer(rule: ThresholdRule, threshold: f64, review_cost: f64, p: f64, amount: f64) -> bool {
    match rule {
        ThresholdRule::Capacity => p >= threshold,
        ThresholdRule::ExpectedValue => p * amount > review_cost,
    }
}

/// Train on loaded rows. `progress` shows bars on stderr.
pub fn train(mut loaded: Loaded, config: &Config, progress: bool) -> Result<Trained, TrainError> {
    config
        .validate()
        .map_err(|p| TrainError::NotEnough(format!("invalid configuration: {}", p.join("; "))))?;
    let names = config.feature_names();
    let index = features::resolve(&names)
        .map_err(|m| TrainError::NotEnough(format!("unknown features {m:?}")))?;
    let t = &config.training;
    let full = featurise(&mut loaded.rows, progress);
    let rows = &loaded.rows;

    let mut unlabelled = std::collections::BTreeMap::new();
    let mut labelled: Vec<usize> = Vec::new();
    for (i, r) in rows.iter().enumerate() {
        match r.outcome.and_then(Outcome::label) {
            Some(_) => labelled.push(i),
            None => {
                *unlabelled
                    .entry(r.outcome.map_or(UNADJUDICATED, Outcome::as_str).to_string())
                    .or_insert(0) += 1
            }
        }
    }
    if labelled.len() < 50 {
        return Err(TrainError::NotEnough(format!(
            "{} labelled claims; at least 50 are needed",
            labelled.len()
        )));
    }
    let cut = ((labelled.len() as f64) * (1.0 - t.test_share)).round() as usize;
    let matrix = |idx: &[usize]| {
        let mut m = Array2::zeros((idx.len(), index.len()));
        for (r, &i) in idx.iter().enumerate() {
            for (c, &f) in index.iter().enumerate() {
                m[[r, c]] = full[i][f];
            }
        }
        m
    };
    let label = |i: &usize| rows[*i].outcome.and_then(Outcome::label) == Some(true);
    let (tr, te) = labelled.split_at(cut);
    let train_rows: Vec<&TrainingRow> = tr.iter().map(|&i| &rows[i]).collect();
    let test_rows: Vec<&TrainingRow> = te.iter().map(|&i| &rows[i]).collect();
    let split = Split {
        x_train: matrix(tr),
        y_train: tr.iter().map(label).collect(),
        x_test: matrix(te),
        y_test: te.iter().map(label).collect(),
        train_days: span_days(&train_rows),
        test_days: span_days(&test_rows),
        test_rows,
    };
    let train_pos = split.y_train.iter().filter(|&&v| v).count();
    let test_pos = split.y_test.iter().filter(|&&v| v).count();
    if train_pos < t.folds || train_pos == split.y_train.len() {
        return Err(TrainError::NotEnough(format!(
            "the training part has {train_pos} positive(s) among {} claims; need at least one per fold ({}) and some negatives",
            split.y_train.len(),
            t.folds
        )));
    }

    // Cross-validation.
    let folds = contiguous_folds(split.x_train.nrows(), t.folds);
    let mut candidates: Vec<Candidate> = t
        .alphas
        .iter()
        .map(|&alpha| Candidate::LogisticRegression { alpha })
        .collect();
    let tree_settings = TreeSettings {
        iterations: t.trees.iterations,
        learning_rate: t.trees.learning_rate,
        max_depth: t.trees.max_depth,
        seed: t.seed,
    };
    if t.trees.enabled {
        candidates.push(Candidate::BoostedTrees(tree_settings.clone()));
    }
    let cv_bar = bar(candidates.len() as u64, "cross-val", progress);
    let mut cv = Vec::new();
    for c in &candidates {
        cv_bar.set_message(c.name());
        cv.push(cross_validate(
            c,
            split.x_train.view(),
            &split.y_train,
            &folds,
        )?);
        cv_bar.inc(1);
    }
    cv_bar.finish_and_clear();

    let best_of = |pred: &dyn Fn(&Candidate) -> bool| {
        cv.iter()
            .filter(|r| pred(&r.candidate))
            .max_by(|a, b| a.mean_auc.total_cmp(&b.mean_auc))
    };
    let best_lr = best_of(&|c| matches!(c, Candidate::LogisticRegression { .. }))
        .ok_or_else(|| TrainError::NotEnough("no logistic regression candidate".into()))?;
    let best_trees = best_of(&|c| matches!(c, Candidate::BoostedTrees(_)));
    // Trees must beat the simpler, more readable model, not tie it.
    let champion_is_trees = best_trees.is_some_and(|b| b.mean_auc > best_lr.mean_auc + 0.005);

    // Final fits on the whole training part, each calibrated on its own out-of-fold margins
    // and given its own capacity threshold from its out-of-fold probabilities, so the
    // challenger is judged under the same rule as the champion, not under the champion's cut.
    let referral = &config.referral;
    let train_claims_per_day = split.y_train.len() as f64 / split.train_days;
    let share = (referral.daily_capacity / train_claims_per_day).clamp(0.0, 1.0);
    let standardiser = Standardiser::fit(split.x_train.view());
    let z_train = standardiser.apply(split.x_train.view());
    let mut finals: Vec<Final> = Vec::new();
    for r in std::iter::once(best_lr).chain(best_trees) {
        let platt = Platt::fit(&r.oof_margins, &split.y_train);
        let fitted = Fitted::fit(&r.candidate, split.x_train.view(), &split.y_train)?;
        let spec = match (&fitted, &r.candidate) {
            (Fitted::Logistic(_, l), _) => ClassifierSpec::LogisticRegression(l.clone()),
            (Fitted::Trees(tr), Candidate::BoostedTrees(s)) => ClassifierSpec::BoostedTrees {
                settings: s.clone(),
                booster: tr.to_value(),
            },
            (Fitted::Trees(_), Candidate::LogisticRegression { .. }) => unreachable!(),
        };
        let mut oof: Vec<f64> = r.oof_margins.iter().map(|&m| platt.apply(m)).collect();
        oof.sort_by(f64::total_cmp);
        finals.push(Final {
            name: r.candidate.name(),
            cv_auc: r.mean_auc,
            spec,
            platt,
            fitted,
            threshold: crate::monitor::drift::quantile_sorted(&oof, 1.0 - share),
        });
    }
    if champion_is_trees {
        finals.swap(0, 1);
    }
    let threshold = finals[0].threshold;

    // The referral rule, fixed on training data only.
    let capacity_k = (referral.daily_capacity * split.test_days).round() as usize;
    let rule = RuleReport {
        rule: referral.rule,
        description: match referral.rule {
            ThresholdRule::Capacity => format!(
                "refer when the calibrated probability is at least {threshold:.4} (champion): the level at which the training part would have sent {:.1}% of claims, what {} reviews a day allow at {:.1} claims a day",
                share * 100.0,
                referral.daily_capacity,
                train_claims_per_day
            ),
            ThresholdRule::ExpectedValue => format!(
                "refer when calibrated probability x claimed amount exceeds the review cost of {}",
                referral.review_cost
            ),
        },
        threshold: (referral.rule == ThresholdRule::Capacity).then_some(threshold),
        daily_capacity: referral.daily_capacity,
        review_cost: referral.review_cost,
        capacity_k,
    };

    // Outliers on the standardised training part.
    let mut ks = KMeansSettings::new(t.clusters.min(split.x_train.nrows()), t.seed);
    ks.n_runs = 3;
    let outliers = OutlierModel::fit(z_train.view(), &ks)?;

    // Held-out evaluation.
    let amounts: Vec<f64> = split
        .test_rows
        .iter()
        .map(|r| r.claim.claimed_amount)
        .collect();
    let mut held = Vec::new();
    let mut champion_test_probs = Vec::new();
    for (i, f) in finals.iter().enumerate() {
        let probs: Vec<f64> = f
            .fitted
            .margins(split.x_test.view())
            .into_iter()
            .map(|m| f.platt.apply(m))
            .collect();
        let referred: Vec<bool> = probs
            .iter()
            .zip(&amounts)
            .map(|(&p, &a)| refer(referral.rule, f.threshold, referral.review_cost, p, a))
            .collect();
        held.push(held_out(
            f.name.clone(),
            f.cv_auc,
            &probs,
            &referred,
            &split.y_test,
            capacity_k,
        ));
        if i == 0 {
            champion_test_probs = probs;
        }
    }
    let z_test = standardiser.apply(split.x_test.view());
    let outlier_test: Vec<f64> = z_test.outer_iter().map(|r| outliers.score(r).1).collect();

    let lr_coef = finals
        .iter()
        .find_map(|f| match &f.spec {
            ClassifierSpec::LogisticRegression(l) => Some(l.coef.clone()),
            ClassifierSpec::BoostedTrees { .. } => None,
        })
        .unwrap_or_default();
    // Baselines for drift: the training part's features and the champion's scores on it.
    let Final {
        name: champ_name,
        spec: champ_spec,
        platt: champ_platt,
        fitted: champ_fitted,
        ..
    } = finals.swap_remove(0);
    let train_probs: Vec<f64> = champ_fitted
        .margins(split.x_train.view())
        .into_iter()
        .map(|m| champ_platt.apply(m))
        .collect();
    let train_outlier: Vec<f64> = z_train.outer_iter().map(|r| outliers.score(r).1).collect();
    let baselines = Baselines {
        features: split
            .x_train
            .axis_iter(Axis(1))
            .map(|col| Baseline::from_sample(&col.to_vec(), DEFAULT_BINS))
            .collect(),
        probability: Baseline::from_sample(&train_probs, DEFAULT_BINS),
        outlier_score: Baseline::from_sample(&train_outlier, DEFAULT_BINS),
    };

    let first = rows.first().map(|r| r.claim.reported_at.to_rfc3339());
    let last = rows.last().map(|r| r.claim.reported_at.to_rfc3339());
    let data = DataReport {
        lines_read: loaded.lines_read,
        rows_loaded: rows.len(),
        skipped_count: loaded.skipped.len(),
        skipped: loaded.skipped.iter().take(50).cloned().collect(),
        unlabelled,
        from: first.unwrap_or_default(),
        to: last.unwrap_or_default(),
        split_at: split
            .test_rows
            .first()
            .map(|r| r.claim.reported_at.to_rfc3339())
            .unwrap_or_default(),
        train_rows: split.y_train.len(),
        train_positives: train_pos,
        test_rows: split.y_test.len(),
        test_positives: test_pos,
    };
    let outlier_report = OutlierReport {
        clusters: outliers.centres.len(),
        sizes: outliers.sizes.clone(),
        held_out_auc: metrics::roc_auc(&outlier_test, &split.y_test),
    };
    let mut logistic_coefficients: Vec<(String, f64)> =
        names.iter().cloned().zip(lr_coef).collect();
    logistic_coefficients.sort_by(|a, b| b.1.abs().total_cmp(&a.1.abs()));

    let mut artifact = ModelArtifact {
        format: ARTIFACT_FORMAT.into(),
        format_version: ARTIFACT_FORMAT_VERSION,
        version: String::new(),
        features: names.clone(),
        standardiser,
        classifier: champ_spec,
        calibration: champ_platt,
        threshold,
        outliers,
        baselines,
        training: TrainingInfo {
            created_at: chrono::Utc::now().to_rfc3339(),
            data_from: data.from.clone(),
            data_to: data.to.clone(),
            train_rows: data.train_rows,
            train_positives: data.train_positives,
            test_rows: data.test_rows,
            test_positives: data.test_positives,
            metrics: serde_json::to_value(&held).unwrap_or_default(),
        },
    };
    artifact.seal();

    // What an investigator would see first on the held-out part.
    let model = Model::new(artifact.clone())?;
    let top_referrals = metrics::top_k(&champion_test_probs, 10)
        .into_iter()
        .map(|i| {
            let row = split.test_rows[i];
            let fv = full[te[i]];
            let s = model.score(&fv);
            TopReferral {
                claim_id: row.claim.claim_id.clone(),
                probability: s.probability,
                outlier_score: s.outlier_score,
                outcome: row.outcome,
                reasons: s.reasons.into_iter().map(|r| r.text).collect(),
            }
        })
        .collect();

    let report = Report {
        model_version: artifact.version.clone(),
        data,
        rule,
        cross_validation: cv,
        champion: champ_name,
        held_out: held,
        outliers: outlier_report,
        logistic_coefficients,
        top_referrals,
    };
    Ok(Trained { artifact, report })
}
