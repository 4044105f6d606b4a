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
    ARTIFACT_FORMAT, ARTIFACT_FORMAT_VERSION, Baselines, BlendMember, Calibration, CalibrationKind,
    ClassifierSpec, Logistic, Model, ModelArtifact, Standardiser, TrainingInfo, TreeSettings,
    Trees, logit,
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

/// Rows in the time order training reads them.
pub fn sort_rows(rows: &mut [TrainingRow]) {
    rows.sort_by(|a, b| {
        a.claim
            .reported_at
            .cmp(&b.claim.reported_at)
            .then_with(|| a.line.cmp(&b.line))
    });
}

/// Rows in time order with their full feature vectors, computed as the service would, with
/// the claims graph built by `graph`.
pub fn featurise(
    rows: &mut [TrainingRow],
    graph: &crate::graph::Settings,
    progress: bool,
) -> Vec<FeatureVector> {
    sort_rows(rows);
    let bar = bar(rows.len() as u64, "features", progress);
    let mut history = MemoryHistory::new();
    let out = rows
        .iter()
        .map(|r| {
            let v = features::compute_in_memory(&r.claim, &history, graph);
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
    LogisticRegression {
        alpha: f64,
    },
    BoostedTrees(TreeSettings),
    /// The mean of its members' calibrated probabilities.
    Blend {
        members: Vec<Candidate>,
    },
}

impl Candidate {
    pub fn name(&self) -> String {
        match self {
            Candidate::LogisticRegression { alpha } => {
                format!("logistic_regression(alpha={alpha})")
            }
            Candidate::BoostedTrees(s) => format!(
                "boosted_trees(rounds={},lr={},depth={},leaf={})",
                s.iterations, s.learning_rate, s.max_depth, s.min_leaf_weight
            ),
            Candidate::Blend { members } => format!(
                "blend({})",
                members
                    .iter()
                    .map(Candidate::name)
                    .collect::<Vec<_>>()
                    .join(" + ")
            ),
        }
    }

    fn is_logistic(&self) -> bool {
        matches!(self, Candidate::LogisticRegression { .. })
    }

    fn is_trees(&self) -> bool {
        matches!(self, Candidate::BoostedTrees(_))
    }
}

/// The tree settings the bounded search tries: `search` distinct points of the configured grid,
/// drawn with the training seed (the first point is always the grid's middle-of-the-road
/// corner: the first value of every axis).
pub fn tree_search(t: &crate::config::Trees, seed: u64) -> Vec<TreeSettings> {
    use rand::SeedableRng;
    use rand::seq::SliceRandom;
    let mut grid = Vec::new();
    for &iterations in &t.iterations {
        for &learning_rate in &t.learning_rate {
            for &max_depth in &t.max_depth {
                for &min_leaf_weight in &t.min_leaf_weight {
                    grid.push(TreeSettings {
                        iterations,
                        learning_rate,
                        max_depth,
                        min_leaf_weight,
                        seed,
                    });
                }
            }
        }
    }
    let first = grid.first().cloned();
    let mut rest: Vec<TreeSettings> = grid.into_iter().skip(1).collect();
    rest.shuffle(&mut rand_xoshiro::Xoshiro256Plus::seed_from_u64(seed));
    first
        .into_iter()
        .chain(rest)
        .take(t.search.max(1))
        .collect()
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
            Candidate::Blend { .. } => {
                return Err(TrainError::NotEnough(
                    "a blend is built from its fitted members".into(),
                ));
            }
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

    /// The artifact's description of this fit. A logistic fit's own standardiser is the
    /// artifact's (both are fitted on the same training rows), so only the weights travel.
    fn spec(&self, c: &Candidate) -> ClassifierSpec {
        match (self, c) {
            (Fitted::Logistic(_, l), _) => ClassifierSpec::LogisticRegression(l.clone()),
            (Fitted::Trees(tr), Candidate::BoostedTrees(s)) => ClassifierSpec::BoostedTrees {
                settings: s.clone(),
                booster: tr.to_value(),
            },
            (Fitted::Trees(tr), _) => ClassifierSpec::BoostedTrees {
                settings: TreeSettings::default(),
                booster: tr.to_value(),
            },
        }
    }
}

/// Cross-validated figures of one candidate.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CvResult {
    pub candidate: Candidate,
    pub name: String,
    /// Precision among the top `share` of each validation fold (the review capacity), by fold.
    pub fold_precision_at_capacity: Vec<f64>,
    /// Their mean: what selects the champion.
    pub mean_precision_at_capacity: f64,
    /// Average precision by fold, and the mean: the tie-break.
    pub fold_average_precision: Vec<f64>,
    pub mean_average_precision: f64,
    /// ROC AUC of each validation fold (folds without both classes are left out).
    pub fold_auc: Vec<f64>,
    pub mean_auc: f64,
    pub sd_auc: f64,
    /// AUC of all out-of-fold scores pooled.
    pub pooled_auc: Option<f64>,
    /// The calibration kept, and the out-of-fold Brier score of each kind compared.
    pub calibration: CalibrationKind,
    pub calibration_brier: Vec<(CalibrationKind, f64)>,
    /// Out-of-fold margins (uncalibrated log-odds).
    #[serde(skip)]
    pub oof_margins: Vec<f64>,
    /// Out-of-fold probabilities, each calibrated without its own fold.
    #[serde(skip)]
    pub oof_probs: Vec<f64>,
}

/// Out-of-fold margins of a candidate: each fold scored by a model fitted on the others.
fn oof_margins(
    c: &Candidate,
    x: ArrayView2<f64>,
    y: &[bool],
    folds: &[(usize, usize)],
) -> Result<Vec<f64>, TrainError> {
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
    for (i, m) in done {
        let (a, b) = folds[i];
        oof[a..b].copy_from_slice(&m?);
    }
    Ok(oof)
}

/// Calibrated out-of-fold probabilities, each fold's calibration fitted on the other folds'
/// margins only, for each calibration kind; the kind with the lower mean Brier score is kept.
fn cross_fitted_calibration(
    margins: &[f64],
    y: &[bool],
    folds: &[(usize, usize)],
) -> (CalibrationKind, Vec<(CalibrationKind, f64)>, Vec<f64>) {
    let n = margins.len();
    let mut best: Option<(CalibrationKind, f64, Vec<f64>)> = None;
    let mut briers = Vec::new();
    for kind in CalibrationKind::ALL {
        let mut probs = vec![0.0; n];
        for &(a, b) in folds {
            let idx: Vec<usize> = (0..a).chain(b..n).collect();
            let m: Vec<f64> = idx.iter().map(|&i| margins[i]).collect();
            let t: Vec<bool> = idx.iter().map(|&i| y[i]).collect();
            let cal = Calibration::fit(kind, &m, &t);
            for i in a..b {
                probs[i] = cal.apply(margins[i]);
            }
        }
        let brier = metrics::brier(&probs, y);
        briers.push((kind, brier));
        if best.as_ref().is_none_or(|(_, b, _)| brier < *b) {
            best = Some((kind, brier, probs));
        }
    }
    let (kind, _, probs) = best.unwrap_or((CalibrationKind::Platt, 0.0, vec![0.5; n]));
    (kind, briers, probs)
}

/// The number of referrals capacity allows among `n` claims: the k of precision at capacity.
pub fn capacity_k(share: f64, n: usize) -> usize {
    ((share * n as f64).round() as usize).clamp(1, n.max(1))
}

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len().max(1) as f64
}

/// Fold figures of a candidate's out-of-fold margins. They are read on the calibrated
/// probabilities the candidate would serve (each fold calibrated without itself), since a
/// calibration with flat stretches (isotonic) ties claims that the margins told apart.
fn score_folds(
    candidate: Candidate,
    margins: Vec<f64>,
    y: &[bool],
    folds: &[(usize, usize)],
    share: f64,
) -> CvResult {
    let (calibration, calibration_brier, oof_probs) = cross_fitted_calibration(&margins, y, folds);
    let scores = &oof_probs;
    let (mut prec, mut ap, mut auc) = (Vec::new(), Vec::new(), Vec::new());
    for &(a, b) in folds {
        let (s, t) = (&scores[a..b], &y[a..b]);
        let top = metrics::top_k(s, capacity_k(share, b - a));
        prec.push(top.iter().filter(|&&i| t[i]).count() as f64 / top.len().max(1) as f64);
        if let Some(v) = metrics::average_precision(s, t) {
            ap.push(v);
        }
        if let Some(v) = metrics::roc_auc(s, t) {
            auc.push(v);
        }
    }
    let m = mean(&auc);
    let k = auc.len().max(1) as f64;
    let sd = (auc.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (k - 1.0).max(1.0)).sqrt();
    CvResult {
        name: candidate.name(),
        candidate,
        mean_precision_at_capacity: mean(&prec),
        fold_precision_at_capacity: prec,
        mean_average_precision: mean(&ap),
        fold_average_precision: ap,
        pooled_auc: metrics::roc_auc(scores, y),
        fold_auc: auc,
        mean_auc: m,
        sd_auc: sd,
        calibration,
        calibration_brier,
        oof_margins: margins,
        oof_probs,
    }
}

fn cross_validate(
    c: &Candidate,
    x: ArrayView2<f64>,
    y: &[bool],
    folds: &[(usize, usize)],
    share: f64,
) -> Result<CvResult, TrainError> {
    Ok(score_folds(
        c.clone(),
        oof_margins(c, x, y, folds)?,
        y,
        folds,
        share,
    ))
}

/// The blend of finished candidates: the mean of their cross-fitted probabilities, carried as
/// log-odds.
fn cross_validate_blend(
    members: &[&CvResult],
    y: &[bool],
    folds: &[(usize, usize)],
    share: f64,
) -> CvResult {
    let n = y.len();
    let w = 1.0 / members.len() as f64;
    let margins: Vec<f64> = (0..n)
        .map(|i| logit(members.iter().map(|m| w * m.oof_probs[i]).sum()))
        .collect();
    let candidate = Candidate::Blend {
        members: members.iter().map(|m| m.candidate.clone()).collect(),
    };
    score_folds(candidate, margins, y, folds, share)
}

/// The winner among the candidates `among` (indices into `cv`) by the rule of [`select`],
/// with the indices tied with the best and the best mean precision at capacity.
fn winner(cv: &[CvResult], among: &[usize], tie: f64) -> (usize, Vec<usize>, f64) {
    let best_prec = among
        .iter()
        .map(|&i| cv[i].mean_precision_at_capacity)
        .fold(f64::NEG_INFINITY, f64::max);
    let tied: Vec<usize> = among
        .iter()
        .copied()
        .filter(|&i| cv[i].mean_precision_at_capacity >= best_prec - tie)
        .collect();
    let win = tied
        .iter()
        .copied()
        .max_by(|&a, &b| {
            cv[a]
                .mean_average_precision
                .total_cmp(&cv[b].mean_average_precision)
                .then(b.cmp(&a)) // on an exact tie, the earlier (simpler) candidate
        })
        .unwrap_or(0);
    (win, tied, best_prec)
}

/// The champion: the highest mean precision at capacity; candidates within one referral per
/// fold of it (1 / the mean k) count as tied, and among them the highest mean average
/// precision wins. Returns its index and the sentence that says why.
pub fn select(cv: &[CvResult], tie: f64) -> (usize, String) {
    let all: Vec<usize> = (0..cv.len()).collect();
    let (win, tied, best_prec) = winner(cv, &all, tie);
    let r = &cv[win];
    let why = if tied.len() == 1 {
        format!(
            "{} won on cross-validated precision at capacity ({:.1}%; next best {:.1}%)",
            r.name,
            r.mean_precision_at_capacity * 100.0,
            cv.iter()
                .enumerate()
                .filter(|&(i, _)| i != win)
                .map(|(_, c)| c.mean_precision_at_capacity)
                .fold(f64::NEG_INFINITY, f64::max)
                .max(0.0)
                * 100.0
        )
    } else {
        format!(
            "{} won: {} candidates were within one referral per fold of the best cross-validated precision at capacity ({:.1}%), and it had the highest average precision among them ({:.3})",
            r.name,
            tied.len(),
            best_prec * 100.0,
            r.mean_average_precision
        )
    };
    (win, why)
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
    /// Cross-validated precision at capacity and AUC (means over folds).
    pub cv_precision_at_capacity: f64,
    pub cv_mean_auc: f64,
    pub calibration_kind: CalibrationKind,
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
    /// Precision among the top 2% and 5% of held-out claims.
    pub precision_at_2pct: Option<f64>,
    pub precision_at_5pct: Option<f64>,
    /// The reliability table and the expected calibration error on the held-out part.
    pub calibration: Vec<CalibrationBin>,
    pub expected_calibration_error: Option<f64>,
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
    /// Features left out because their training column repeats an earlier one exactly:
    /// `(dropped, kept)`.
    pub duplicate_features: Vec<(String, String)>,
    /// The claims graph's settings: the window and the hub caps measured on the training part.
    pub graph: crate::graph::Settings,
    /// Every candidate's fold figures, in the order they were tried.
    pub cross_validation: Vec<CvResult>,
    pub champion: String,
    /// Why the champion won, in one sentence.
    pub selection: String,
    /// Held-out results, champion first.
    pub held_out: Vec<HeldOut>,
    pub outliers: OutlierReport,
    pub logistic_coefficients: Vec<(String, f64)>,
    /// The highest-scored held-out claims, as an investigator would see them.
    pub top_referrals: Vec<TopReferral>,
    /// The model on a second file's later part (`--also-evaluate`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub also_evaluated: Option<crate::elsewhere::Elsewhere>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct OutlierReport {
    pub clusters: usize,
    pub sizes: Vec<u64>,
    /// ROC AUC of the outlier score alone on the held-out part (it is not trained on labels).
    pub held_out_auc: Option<f64>,
}

/// A finalist refitted on the whole training part: its artifact description, its calibration
/// (fitted on all its out-of-fold margins) and its capacity threshold.
struct Final {
    name: String,
    cv: CvIndex,
    spec: ClassifierSpec,
    calibration: Calibration,
    threshold: f64,
}

#[derive(Clone, Copy)]
struct CvIndex(usize);

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

/// Held-out figures of one model's calibrated probabilities.
#[allow(clippy::too_many_arguments)]
fn held_out(
    name: String,
    cv: &CvResult,
    calibration_kind: CalibrationKind,
    probs: &[f64],
    referred: &[bool],
    y: &[bool],
    capacity_k: usize,
) -> HeldOut {
    let confusion = Confusion::from_decisions(referred.iter().copied(), y);
    let top = metrics::top_k(probs, capacity_k);
    let hits = top.iter().filter(|&&i| y[i]).count();
    let positives = y.iter().filter(|&&v| v).count();
    let at = |share: f64| metrics::precision_at_k(probs, y, capacity_k_of(share, probs.len()));
    HeldOut {
        model: name,
        cv_precision_at_capacity: cv.mean_precision_at_capacity,
        cv_mean_auc: cv.mean_auc,
        calibration_kind,
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
        precision_at_2pct: at(0.02),
        precision_at_5pct: at(0.05),
        calibration: metrics::calibration_table(probs, y, 10),
        expected_calibration_error: metrics::expected_calibration_error(probs, y, 10),
        brier: metrics::brier(probs, y),
    }
}

fn capacity_k_of(share: f64, n: usize) -> usize {
    if n == 0 { 0 } else { capacity_k(share, n) }
}

/// Decide referrals under the configured rule.
pub fn refer(rule: ThresholdRule, threshold: f64, review_cost: f64, p: f64, amount: f64) -> bool {
    match rule {
        ThresholdRule::Capacity => p >= threshold,
        ThresholdRule::ExpectedValue => p * amount > review_cost,
    }
}

/// Columns of `x` that repeat an earlier column exactly: `(dropped, kept)` index pairs.
fn duplicate_columns(x: ArrayView2<f64>) -> Vec<(usize, usize)> {
    let mut out = Vec::new();
    for j in 0..x.ncols() {
        if out.iter().any(|&(d, _)| d == j) {
            continue;
        }
        let col = x.column(j);
        // A constant column carries nothing either way; it stays (the standardiser maps it
        // to 0) rather than being called a duplicate of another constant.
        if col.iter().all(|v| Some(v) == col.first()) {
            continue;
        }
        for k in j + 1..x.ncols() {
            if !out.iter().any(|&(d, _)| d == k) && col == x.column(k) {
                out.push((k, j));
            }
        }
    }
    out.sort_unstable();
    out
}

/// Index (in time order) of the first held-out row: the cut `train` makes on labelled rows.
fn test_share_cut(rows: &[TrainingRow], test_share: f64) -> usize {
    let labelled: Vec<usize> = (0..rows.len())
        .filter(|&i| rows[i].outcome.and_then(Outcome::label).is_some())
        .collect();
    let cut = ((labelled.len() as f64) * (1.0 - test_share)).round() as usize;
    labelled.get(cut).copied().unwrap_or(rows.len())
}

/// The claims graph's settings, with hub caps measured on the window before the held-out
/// part (the held-out claims never shape them). Rows in time order.
pub fn graph_settings(
    rows: &[TrainingRow],
    first_held_out: usize,
    config: &Config,
) -> crate::graph::Settings {
    let s = config.training.graph.settings();
    let Some(last) = rows[..first_held_out.min(rows.len())].last() else {
        return s;
    };
    let to = last.claim.event_time() + 1;
    let from = to - s.window_days * features::DAY;
    s.with_caps_from(rows[..first_held_out].iter().map(|r| &r.claim), from, to)
}

/// Train on loaded rows. `progress` shows bars on stderr.
pub fn train(mut loaded: Loaded, config: &Config, progress: bool) -> Result<Trained, TrainError> {
    config
        .validate()
        .map_err(|p| TrainError::NotEnough(format!("invalid configuration: {}", p.join("; "))))?;
    let all_names = config.feature_names();
    let all_index = features::resolve(&all_names)
        .map_err(|m| TrainError::NotEnough(format!("unknown features {m:?}")))?;
    let t = &config.training;
    sort_rows(&mut loaded.rows);
    let graph = graph_settings(
        &loaded.rows,
        test_share_cut(&loaded.rows, t.test_share),
        config,
    );
    let full = featurise(&mut loaded.rows, &graph, progress);
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
    let (tr, te) = labelled.split_at(cut);
    let matrix = |idx: &[usize], cols: &[usize]| {
        let mut m = Array2::zeros((idx.len(), cols.len()));
        for (r, &i) in idx.iter().enumerate() {
            for (c, &f) in cols.iter().enumerate() {
                m[[r, c]] = full[i][f];
            }
        }
        m
    };
    // A feature whose training column repeats an earlier one exactly adds nothing but a
    // second, arbitrary share of one coefficient: leave it out, and say so.
    let dups = duplicate_columns(matrix(tr, &all_index).view());
    let keep: Vec<usize> = (0..all_index.len())
        .filter(|j| !dups.iter().any(|&(d, _)| d == *j))
        .collect();
    let index: Vec<usize> = keep.iter().map(|&j| all_index[j]).collect();
    let names: Vec<String> = keep.iter().map(|&j| all_names[j].clone()).collect();
    let duplicate_features = dups
        .iter()
        .map(|&(d, k)| (all_names[d].clone(), all_names[k].clone()))
        .collect();

    let label = |i: &usize| rows[*i].outcome.and_then(Outcome::label) == Some(true);
    let train_rows: Vec<&TrainingRow> = tr.iter().map(|&i| &rows[i]).collect();
    let test_rows: Vec<&TrainingRow> = te.iter().map(|&i| &rows[i]).collect();
    let split = Split {
        x_train: matrix(tr, &index),
        y_train: tr.iter().map(label).collect(),
        x_test: matrix(te, &index),
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

    // The share of claims the review capacity allows, from the training part's daily volume:
    // precision among that share of each fold selects the champion.
    let referral = &config.referral;
    let train_claims_per_day = split.y_train.len() as f64 / split.train_days;
    let share = (referral.daily_capacity / train_claims_per_day).clamp(0.0, 1.0);

    // Cross-validation of every candidate on the same folds.
    let folds = contiguous_folds(split.x_train.nrows(), t.folds);
    let mut candidates: Vec<Candidate> = t
        .alphas
        .iter()
        .map(|&alpha| Candidate::LogisticRegression { alpha })
        .collect();
    if t.trees.enabled {
        candidates.extend(
            tree_search(&t.trees, t.seed)
                .into_iter()
                .map(Candidate::BoostedTrees),
        );
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
            share,
        )?);
        cv_bar.inc(1);
    }
    cv_bar.finish_and_clear();
    let mean_k = folds
        .iter()
        .map(|&(a, b)| capacity_k(share, b - a) as f64)
        .sum::<f64>()
        / folds.len().max(1) as f64;
    let tie = 1.0 / mean_k.max(1.0);
    let best_of = |pred: &dyn Fn(&Candidate) -> bool| -> Option<usize> {
        let idx: Vec<usize> = (0..cv.len()).filter(|&i| pred(&cv[i].candidate)).collect();
        (!idx.is_empty()).then(|| winner(&cv, &idx, tie).0)
    };
    let best_lr = best_of(&Candidate::is_logistic)
        .ok_or_else(|| TrainError::NotEnough("no logistic regression candidate".into()))?;
    let best_trees = best_of(&Candidate::is_trees);
    let mut blend = None;
    if let (true, Some(bt)) = (t.blend, best_trees) {
        cv.push(cross_validate_blend(
            &[&cv[best_lr], &cv[bt]],
            &split.y_train,
            &folds,
            share,
        ));
        blend = Some(cv.len() - 1);
    }
    let (champion, selection) = select(&cv, tie);

    // Final fits on the whole training part. Each finalist is calibrated on its own
    // out-of-fold margins and gets its own capacity threshold from its cross-fitted
    // out-of-fold probabilities, so every model is judged under the same rule.
    let standardiser = Standardiser::fit(split.x_train.view());
    let z_train = standardiser.apply(split.x_train.view());
    let mut finalists: Vec<usize> = vec![champion];
    for i in [Some(best_lr), best_trees, blend].into_iter().flatten() {
        if !finalists.contains(&i) {
            finalists.push(i);
        }
    }
    let mut fitted_members: std::collections::HashMap<usize, (ClassifierSpec, Calibration)> =
        std::collections::HashMap::new();
    let mut fit_single = |i: usize| -> Result<(ClassifierSpec, Calibration), TrainError> {
        if let Some(f) = fitted_members.get(&i) {
            return Ok(f.clone());
        }
        let r = &cv[i];
        let fitted = Fitted::fit(&r.candidate, split.x_train.view(), &split.y_train)?;
        let out = (
            fitted.spec(&r.candidate),
            Calibration::fit(r.calibration, &r.oof_margins, &split.y_train),
        );
        fitted_members.insert(i, out.clone());
        Ok(out)
    };
    let threshold_of = |r: &CvResult| {
        let mut oof = r.oof_probs.clone();
        oof.sort_by(f64::total_cmp);
        crate::monitor::drift::quantile_sorted(&oof, 1.0 - share)
    };
    let mut finals: Vec<Final> = Vec::new();
    for &i in &finalists {
        let r = &cv[i];
        let (spec, calibration) = match &r.candidate {
            Candidate::Blend { members } => {
                let member_idx: Vec<usize> = members
                    .iter()
                    .filter_map(|m| cv.iter().position(|c| &c.candidate == m))
                    .collect();
                let w = 1.0 / member_idx.len().max(1) as f64;
                let mut parts = Vec::new();
                for m in member_idx {
                    let (classifier, calibration) = fit_single(m)?;
                    parts.push(BlendMember {
                        classifier,
                        calibration,
                        weight: w,
                    });
                }
                (
                    ClassifierSpec::Blend { members: parts },
                    Calibration::fit(r.calibration, &r.oof_margins, &split.y_train),
                )
            }
            _ => fit_single(i)?,
        };
        finals.push(Final {
            name: r.name.clone(),
            cv: CvIndex(i),
            spec,
            calibration,
            threshold: threshold_of(r),
        });
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

    // Each finalist as an artifact, scored on the held-out part through the same code the
    // service runs.
    let amounts: Vec<f64> = split
        .test_rows
        .iter()
        .map(|r| r.claim.claimed_amount)
        .collect();
    let placeholder = Baseline::from_sample(&[0.0], DEFAULT_BINS);
    let artifact_of = |f: &Final, baselines: Baselines| {
        let mut a = ModelArtifact {
            format: ARTIFACT_FORMAT.into(),
            format_version: ARTIFACT_FORMAT_VERSION,
            version: String::new(),
            features: names.clone(),
            standardiser: standardiser.clone(),
            classifier: f.spec.clone(),
            calibration: f.calibration.clone(),
            threshold: f.threshold,
            outliers: outliers.clone(),
            baselines,
            training: TrainingInfo {
                created_at: chrono::Utc::now().to_rfc3339(),
                data_from: String::new(),
                data_to: String::new(),
                train_rows: 0,
                train_positives: 0,
                test_rows: 0,
                test_positives: 0,
                metrics: serde_json::Value::Null,
            },
            graph: graph.clone(),
        };
        a.seal();
        a
    };
    let blank_baselines = || Baselines {
        features: vec![placeholder.clone(); names.len()],
        probability: placeholder.clone(),
        outlier_score: placeholder.clone(),
    };
    let mut held = Vec::new();
    let mut champion_test_probs = Vec::new();
    let mut champion_train_probs = Vec::new();
    for (i, f) in finals.iter().enumerate() {
        let model = Model::new(artifact_of(f, blank_baselines()))?;
        let probs: Vec<f64> = model
            .margins(split.x_test.view())
            .into_iter()
            .map(|m| model.calibrated(m))
            .collect();
        let referred: Vec<bool> = probs
            .iter()
            .zip(&amounts)
            .map(|(&p, &a)| refer(referral.rule, f.threshold, referral.review_cost, p, a))
            .collect();
        held.push(held_out(
            f.name.clone(),
            &cv[f.cv.0],
            f.calibration.kind(),
            &probs,
            &referred,
            &split.y_test,
            capacity_k,
        ));
        if i == 0 {
            champion_test_probs = probs;
            champion_train_probs = model
                .margins(split.x_train.view())
                .into_iter()
                .map(|m| model.calibrated(m))
                .collect();
        }
    }
    let z_test = standardiser.apply(split.x_test.view());
    let outlier_test: Vec<f64> = z_test.outer_iter().map(|r| outliers.score(r).1).collect();

    let lr_coef = match &fit_single(best_lr)?.0 {
        ClassifierSpec::LogisticRegression(l) => l.coef.clone(),
        _ => Vec::new(),
    };
    // Baselines for drift: the training part's features and the champion's scores on it.
    let train_outlier: Vec<f64> = z_train.outer_iter().map(|r| outliers.score(r).1).collect();
    let baselines = Baselines {
        features: split
            .x_train
            .axis_iter(Axis(1))
            .map(|col| Baseline::from_sample(&col.to_vec(), DEFAULT_BINS))
            .collect(),
        probability: Baseline::from_sample(&champion_train_probs, DEFAULT_BINS),
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

    let champ = finals.swap_remove(0);
    let mut artifact = artifact_of(&champ, baselines);
    artifact.training = TrainingInfo {
        created_at: chrono::Utc::now().to_rfc3339(),
        data_from: data.from.clone(),
        data_to: data.to.clone(),
        train_rows: data.train_rows,
        train_positives: data.train_positives,
        test_rows: data.test_rows,
        test_positives: data.test_positives,
        metrics: serde_json::to_value(&held).unwrap_or_default(),
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
        duplicate_features,
        graph: graph.clone(),
        cross_validation: cv,
        champion: champ.name,
        selection,
        held_out: held,
        outliers: outlier_report,
        logistic_coefficients,
        top_referrals,
        also_evaluated: None,
    };
    Ok(Trained { artifact, report })
}
