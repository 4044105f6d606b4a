//! The supervised model and its artifact: feature standardisation, classifier (logistic
//! regression, or gradient-boosted trees where they win), calibration, the outlier model, drift
//! baselines, and per-claim reasons.
//!
//! Two types: [`ModelArtifact`] is the versioned file (plain data, serde); [`Model`] is an
//! artifact that has been checked against this build's feature catalogue and made ready to
//! score. Loading never panics: every incompatibility is an [`ArtifactError`] that says what is
//! wrong.

use crate::features::{self, FeatureVector};
use crate::monitor::drift::Baseline;
use crate::outliers::OutlierModel;
use forust_ml::gradientbooster::ContributionsMethod;
use forust_ml::{GradientBooster, Matrix};
use ndarray::{Array2, ArrayView1, ArrayView2, Axis};
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::path::Path;

pub const ARTIFACT_FORMAT: &str = "weir-model";
/// Version 2: calibration is Platt or isotonic, the classifier may be a blend, and tree
/// settings carry the minimum leaf weight. Version 3: the claims graph's settings (window,
/// hub caps) travel with the model. Older files are refused with that message.
pub const ARTIFACT_FORMAT_VERSION: u32 = 3;

/// Per-feature centring and scaling (population standard deviation, as scikit-learn's
/// `StandardScaler`); a constant feature gets scale 1 so it maps to 0.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Standardiser {
    pub mean: Vec<f64>,
    pub scale: Vec<f64>,
}

impl Standardiser {
    pub fn fit(x: ArrayView2<f64>) -> Standardiser {
        let n = x.nrows().max(1) as f64;
        let mean = x
            .mean_axis(Axis(0))
            .map_or_else(|| vec![0.0; x.ncols()], |m| m.to_vec());
        let scale = x
            .axis_iter(Axis(1))
            .zip(&mean)
            .map(|(col, m)| {
                let var = col.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / n;
                let sd = var.sqrt();
                if sd > 1e-12 { sd } else { 1.0 }
            })
            .collect();
        Standardiser { mean, scale }
    }

    pub fn apply(&self, x: ArrayView2<f64>) -> Array2<f64> {
        let mut z = x.to_owned();
        for mut row in z.outer_iter_mut() {
            for ((v, m), s) in row.iter_mut().zip(&self.mean).zip(&self.scale) {
                *v = (*v - m) / s;
            }
        }
        z
    }

    pub fn apply_row(&self, x: &[f64], out: &mut [f64]) {
        for (((o, v), m), s) in out.iter_mut().zip(x).zip(&self.mean).zip(&self.scale) {
            *o = (v - m) / s;
        }
    }
}

pub fn sigmoid(t: f64) -> f64 {
    if t >= 0.0 {
        1.0 / (1.0 + (-t).exp())
    } else {
        let e = t.exp();
        e / (1.0 + e)
    }
}

#[derive(Debug, thiserror::Error)]
pub enum FitError {
    #[error("training data has no {0} rows: both classes are needed")]
    OneClass(&'static str),
    #[error("logistic regression failed: {0}")]
    Logistic(String),
    #[error("boosted trees failed: {0}")]
    Trees(String),
    #[error(transparent)]
    Outliers(#[from] crate::outliers::OutlierError),
}

/// Solve `H s = g` for a symmetric positive-definite `H` given by its lower triangle (row-major
/// `p x p`, overwritten by its Cholesky factor). `None` when `H` is not positive definite.
fn cholesky_solve(h: &mut [f64], g: &[f64], p: usize) -> Option<Vec<f64>> {
    for j in 0..p {
        let mut d = h[j * p + j];
        for k in 0..j {
            d -= h[j * p + k] * h[j * p + k];
        }
        if d <= 0.0 || !d.is_finite() {
            return None;
        }
        let d = d.sqrt();
        h[j * p + j] = d;
        for i in j + 1..p {
            let mut v = h[i * p + j];
            for k in 0..j {
                v -= h[i * p + k] * h[j * p + k];
            }
            h[i * p + j] = v / d;
        }
    }
    // L u = g, then L^T s = u.
    let mut u = vec![0.0; p];
    for i in 0..p {
        let mut v = g[i];
        for k in 0..i {
            v -= h[i * p + k] * u[k];
        }
        u[i] = v / h[i * p + i];
    }
    let mut s = vec![0.0; p];
    for i in (0..p).rev() {
        let mut v = u[i];
        for k in i + 1..p {
            v -= h[k * p + i] * s[k];
        }
        s[i] = v / h[i * p + i];
    }
    Some(s)
}

/// Fitted logistic regression on standardised features.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Logistic {
    pub coef: Vec<f64>,
    pub intercept: f64,
    /// L2 penalty: loss = sum of log-losses + alpha/2 |w|^2 (scikit-learn's C = 1/alpha).
    pub alpha: f64,
}

impl Logistic {
    /// Fit with labels `y` (true = positive) by Newton's method: minimise
    /// `sum of log-losses + alpha/2 |w|^2` (intercept not penalised; scikit-learn's
    /// `LogisticRegression(C = 1/alpha)`). The objective is strictly convex for alpha > 0, so
    /// Newton converges in a handful of steps, each one pass over the rows to build the
    /// gradient and the (d+1)x(d+1) Hessian, then a Cholesky solve. A step that does not lower
    /// the objective is halved. Stops when the largest gradient component, relative to the
    /// number of rows, is below 1e-10 (far tighter than scikit-learn's default `tol = 1e-4`).
    ///
    /// Replaces linfa-logistic's L-BFGS, whose absolute gradient tolerance on the summed loss
    /// ran a 100,000-row fit for all of its iterations (17.5 s; this takes well under 1 s).
    pub fn fit(z: ArrayView2<f64>, y: &[bool], alpha: f64) -> Result<Logistic, FitError> {
        if !y.iter().any(|&v| v) {
            return Err(FitError::OneClass("positive"));
        }
        if y.iter().all(|&v| v) {
            return Err(FitError::OneClass("negative"));
        }
        let (n, d) = (z.nrows(), z.ncols());
        let p = d + 1; // parameters: weights, then the intercept
        let mut beta = vec![0.0; p];
        let objective = |beta: &[f64]| -> f64 {
            let mut loss = 0.0;
            for (row, &yi) in z.outer_iter().zip(y) {
                let m = beta[d] + row.iter().zip(beta).map(|(x, w)| x * w).sum::<f64>();
                // log(1 + e^-m) for a positive row, log(1 + e^m) for a negative one, stably.
                let t = if yi { -m } else { m };
                loss += if t > 0.0 {
                    t + (-t).exp().ln_1p()
                } else {
                    t.exp().ln_1p()
                };
            }
            loss + 0.5 * alpha * beta[..d].iter().map(|w| w * w).sum::<f64>()
        };
        let mut current = objective(&beta);
        for _ in 0..100 {
            let mut grad = vec![0.0; p];
            let mut hess = vec![0.0; p * p];
            let mut xr = vec![0.0; p];
            for (row, &yi) in z.outer_iter().zip(y) {
                xr[..d]
                    .iter_mut()
                    .zip(row.iter())
                    .for_each(|(o, v)| *o = *v);
                xr[d] = 1.0;
                let m: f64 = xr.iter().zip(&beta).map(|(x, w)| x * w).sum();
                let prob = sigmoid(m);
                let r = prob - f64::from(u8::from(yi));
                let w = prob * (1.0 - prob);
                for a in 0..p {
                    grad[a] += r * xr[a];
                    let wa = w * xr[a];
                    for b in 0..=a {
                        hess[a * p + b] += wa * xr[b];
                    }
                }
            }
            for a in 0..d {
                grad[a] += alpha * beta[a];
                hess[a * p + a] += alpha;
            }
            let largest = grad.iter().fold(0.0f64, |m, g| m.max(g.abs()));
            if largest / n as f64 <= 1e-10 {
                return Ok(Logistic {
                    coef: beta[..d].to_vec(),
                    intercept: beta[d],
                    alpha,
                });
            }
            let step = cholesky_solve(&mut hess, &grad, p)
                .ok_or_else(|| FitError::Logistic("the Hessian is not positive definite".into()))?;
            let mut scale = 1.0;
            loop {
                let trial: Vec<f64> = beta.iter().zip(&step).map(|(b, s)| b - scale * s).collect();
                let value = objective(&trial);
                // Near the optimum the objective changes below its own rounding error: allow
                // that much, or the search would halve a good step away.
                if value <= current + 1e-12 * current.abs().max(1.0) || scale < 1e-10 {
                    beta = trial;
                    current = value;
                    break;
                }
                scale *= 0.5;
            }
        }
        Err(FitError::Logistic(
            "Newton's method did not converge in 100 steps".into(),
        ))
    }

    pub fn margin(&self, z: &[f64]) -> f64 {
        self.intercept + self.coef.iter().zip(z).map(|(w, v)| w * v).sum::<f64>()
    }
}

/// Settings of the boosted-trees challenger.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TreeSettings {
    pub iterations: usize,
    pub learning_rate: f32,
    pub max_depth: usize,
    /// Least sum of hessians in a leaf (forust's `min_leaf_weight`): larger is smoother.
    pub min_leaf_weight: f32,
    pub seed: u64,
}

impl Default for TreeSettings {
    fn default() -> Self {
        TreeSettings {
            iterations: 150,
            learning_rate: 0.1,
            max_depth: 4,
            min_leaf_weight: 1.0,
            seed: 0,
        }
    }
}

/// Gradient-boosted trees (forust-ml, log-loss) on raw features. forust fits them; scoring one
/// claim walks a flattened copy of its trees here, because forust's per-call set-up (a thread
/// pool, and for contributions every node's average recomputed) cost about 70 µs a claim.
/// The walk follows forust's own rules (`value < split` goes left, missing goes to the
/// missing branch) and is checked against forust's predictions and contributions in tests.
pub struct Trees {
    booster: Box<GradientBooster>,
    flat: FlatTrees,
}

/// forust's trees as arrays: per node its feature, split, children and values.
#[derive(Debug, Default)]
struct FlatTrees {
    base_score: f64,
    /// Index of each tree's root in the node arrays.
    roots: Vec<u32>,
    feature: Vec<u32>,
    split: Vec<f64>,
    left: Vec<u32>,
    right: Vec<u32>,
    missing: Vec<u32>,
    leaf: Vec<bool>,
    value: Vec<f64>,
    /// The node's average leaf weight (forust's `distribute_leaf_weights`), from which a
    /// split's contribution is the child's average less the parent's.
    average: Vec<f64>,
}

impl FlatTrees {
    fn of(b: &GradientBooster) -> FlatTrees {
        let n_trees = b
            .prediction_iteration
            .unwrap_or(b.trees.len())
            .min(b.trees.len());
        let mut f = FlatTrees {
            base_score: b.base_score,
            ..FlatTrees::default()
        };
        for tree in &b.trees[..n_trees] {
            let offset = f.feature.len() as u32;
            f.roots.push(offset);
            let averages = tree.distribute_leaf_weights();
            for (node, avg) in tree.nodes.iter().zip(averages) {
                f.feature.push(node.split_feature as u32);
                f.split.push(node.split_value);
                f.left.push(offset + node.left_child as u32);
                f.right.push(offset + node.right_child as u32);
                f.missing.push(offset + node.missing_node as u32);
                f.leaf.push(node.is_leaf);
                f.value.push(f64::from(node.weight_value));
                f.average.push(avg);
            }
        }
        f
    }

    fn child(&self, i: usize, row: &[f64]) -> usize {
        let v = row
            .get(self.feature[i] as usize)
            .copied()
            .unwrap_or(f64::NAN);
        (if v.is_nan() {
            self.missing[i]
        } else if v < self.split[i] {
            self.left[i]
        } else {
            self.right[i]
        }) as usize
    }

    fn margin(&self, row: &[f64]) -> f64 {
        let mut m = self.base_score;
        for &r in &self.roots {
            let mut i = r as usize;
            while !self.leaf[i] {
                i = self.child(i, row);
            }
            m += self.value[i];
        }
        m
    }

    /// Margin, with each feature's contribution added into `contrib`.
    fn margin_and_contributions(&self, row: &[f64], contrib: &mut [f64]) -> f64 {
        let mut m = self.base_score;
        for &r in &self.roots {
            let mut i = r as usize;
            while !self.leaf[i] {
                let c = self.child(i, row);
                if let Some(slot) = contrib.get_mut(self.feature[i] as usize) {
                    *slot += self.average[c] - self.average[i];
                }
                i = c;
            }
            m += self.value[i];
        }
        m
    }
}

impl std::fmt::Debug for Trees {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Trees { .. }")
    }
}

fn column_major(x: ArrayView2<f64>) -> Vec<f64> {
    x.t().iter().copied().collect()
}

impl Trees {
    /// Fit with per-row weights (class balancing happens through them).
    pub fn fit(
        x: ArrayView2<f64>,
        y: &[bool],
        weights: &[f64],
        s: &TreeSettings,
    ) -> Result<Trees, FitError> {
        let data = column_major(x);
        let m = Matrix::new(&data, x.nrows(), x.ncols());
        let yv: Vec<f64> = y.iter().map(|&v| f64::from(u8::from(v))).collect();
        let mut booster = GradientBooster::default()
            .set_iterations(s.iterations)
            .set_learning_rate(s.learning_rate)
            .set_max_depth(s.max_depth)
            .set_min_leaf_weight(s.min_leaf_weight)
            .set_seed(s.seed)
            .set_parallel(true);
        booster
            .fit(&m, &yv, weights, None)
            .map_err(|e| FitError::Trees(e.to_string()))?;
        Ok(Trees::from_booster(booster))
    }

    fn from_booster(booster: GradientBooster) -> Trees {
        let flat = FlatTrees::of(&booster);
        Trees {
            booster: Box::new(booster),
            flat,
        }
    }

    /// A loaded booster must be walkable: every split's children later in its own tree (so no
    /// walk can loop or leave the tree), finite splits and leaf values.
    fn check(booster: &GradientBooster) -> Result<(), String> {
        for (t, tree) in booster.trees.iter().enumerate() {
            let n = tree.nodes.len();
            if n == 0 {
                return Err(format!("tree {t} has no nodes"));
            }
            for (i, node) in tree.nodes.iter().enumerate() {
                if node.is_leaf {
                    if !node.weight_value.is_finite() {
                        return Err(format!("tree {t} node {i}: leaf value is not finite"));
                    }
                    continue;
                }
                let ok = |c: usize| c > i && c < n;
                if !(ok(node.left_child) && ok(node.right_child) && ok(node.missing_node)) {
                    return Err(format!("tree {t} node {i}: a child outside the tree"));
                }
                if node.split_value.is_nan() {
                    return Err(format!("tree {t} node {i}: split value is not a number"));
                }
            }
        }
        if !booster.base_score.is_finite() {
            return Err("base score is not finite".into());
        }
        Ok(())
    }

    pub fn margins(&self, x: ArrayView2<f64>) -> Vec<f64> {
        x.outer_iter()
            .map(|r| match r.as_slice() {
                Some(row) => self.flat.margin(row),
                None => self.flat.margin(&r.to_vec()),
            })
            .collect()
    }

    /// The margin of one row.
    pub fn margin(&self, row: &[f64]) -> f64 {
        self.flat.margin(row)
    }

    /// The margin of one row, with per-feature contributions to the log-odds (each split's
    /// change in average leaf weight, forust's `ContributionsMethod::Average`) added into
    /// `contrib`.
    pub fn margin_and_contributions(&self, row: &[f64], contrib: &mut [f64]) -> f64 {
        self.flat.margin_and_contributions(row, contrib)
    }

    /// forust's own predictions (for the checks against it).
    pub fn forust_margins(&self, x: ArrayView2<f64>) -> Vec<f64> {
        let data = column_major(x);
        self.booster
            .predict(&Matrix::new(&data, x.nrows(), x.ncols()), false)
    }

    /// forust's own per-feature contributions of one row (averaged node values).
    pub fn forust_contributions(&self, row: &[f64]) -> Vec<f64> {
        let mut c = self.booster.predict_contributions(
            &Matrix::new(row, 1, row.len()),
            ContributionsMethod::Average,
            false,
        );
        c.truncate(row.len()); // last entry is the bias
        c
    }

    pub fn to_value(&self) -> serde_json::Value {
        serde_json::to_value(&*self.booster).unwrap_or(serde_json::Value::Null)
    }

    pub fn from_value(v: &serde_json::Value) -> Result<Trees, String> {
        let booster = GradientBooster::deserialize(v).map_err(|e| e.to_string())?;
        Trees::check(&booster)?;
        Ok(Trees::from_booster(booster))
    }
}

/// Platt scaling: p = sigmoid(a * margin + b), fitted by maximum likelihood (Newton's method)
/// on out-of-fold margins. It undoes the shift that class rebalancing puts into the margins.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Platt {
    pub a: f64,
    pub b: f64,
}

impl Platt {
    pub fn fit(margins: &[f64], y: &[bool]) -> Platt {
        let nll = |a: f64, b: f64| -> f64 {
            margins
                .iter()
                .zip(y)
                .map(|(&s, &t)| {
                    let z = a * s + b;
                    // log(1 + e^z) - t z, computed stably
                    let sp = if z > 0.0 {
                        z + (-z).exp().ln_1p()
                    } else {
                        z.exp().ln_1p()
                    };
                    sp - if t { z } else { 0.0 }
                })
                .sum()
        };
        let (mut a, mut b) = (1.0, 0.0);
        let mut f = nll(a, b);
        for _ in 0..100 {
            let (mut ga, mut gb, mut haa, mut hab, mut hbb) = (0.0, 0.0, 1e-9, 0.0, 1e-9);
            for (&s, &t) in margins.iter().zip(y) {
                let p = sigmoid(a * s + b);
                let r = p - f64::from(u8::from(t));
                let w = p * (1.0 - p);
                ga += r * s;
                gb += r;
                haa += w * s * s;
                hab += w * s;
                hbb += w;
            }
            let det = haa * hbb - hab * hab;
            if det.abs() < 1e-300 {
                break;
            }
            let da = (hbb * ga - hab * gb) / det;
            let db = (haa * gb - hab * ga) / det;
            // Halve the step until the likelihood does not get worse.
            let mut step = 1.0;
            let mut accepted = false;
            while step > 1e-10 {
                let (na, nb) = (a - step * da, b - step * db);
                let nf = nll(na, nb);
                if nf <= f {
                    a = na;
                    b = nb;
                    accepted = (f - nf) > 1e-13 * f.abs().max(1.0);
                    f = nf;
                    break;
                }
                step /= 2.0;
            }
            if !accepted {
                break;
            }
        }
        Platt { a, b }
    }

    pub fn apply(&self, margin: f64) -> f64 {
        sigmoid(self.a * margin + self.b)
    }
}

/// Isotonic calibration: the non-decreasing step function of the margin that best fits the
/// labels in squared error (pool adjacent violators), read between its knots by linear
/// interpolation and clipped outside them: scikit-learn's
/// `IsotonicRegression(out_of_bounds="clip")`, which the reference tests compare it with.
/// Only the first and last knot of each constant block are kept (as scikit-learn does): the
/// interpolation is the same, and the artifact stays small.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Isotonic {
    pub x: Vec<f64>,
    pub y: Vec<f64>,
}

impl Isotonic {
    pub fn fit(margins: &[f64], y: &[bool]) -> Isotonic {
        let weights = vec![1.0; margins.len()];
        let targets: Vec<f64> = y.iter().map(|&v| f64::from(u8::from(v))).collect();
        Isotonic::fit_weighted(margins, &targets, &weights)
    }

    pub fn fit_weighted(x: &[f64], t: &[f64], w: &[f64]) -> Isotonic {
        let mut order: Vec<usize> = (0..x.len()).filter(|&i| x[i].is_finite()).collect();
        order.sort_by(|&a, &b| x[a].total_cmp(&x[b]));
        // Equal x values become one point with their weighted mean target.
        let (mut ux, mut uy, mut uw): (Vec<f64>, Vec<f64>, Vec<f64>) = (vec![], vec![], vec![]);
        for i in order {
            if ux.last() == Some(&x[i]) {
                let k = ux.len() - 1;
                uy[k] += w[i] * t[i];
                uw[k] += w[i];
            } else {
                ux.push(x[i]);
                uy.push(w[i] * t[i]);
                uw.push(w[i]);
            }
        }
        for (v, wt) in uy.iter_mut().zip(&uw) {
            *v /= wt.max(f64::MIN_POSITIVE);
        }
        // Pool adjacent violators: blocks of (mean, weight, count of points).
        let mut blocks: Vec<(f64, f64, usize)> = Vec::with_capacity(ux.len());
        for (&v, &wt) in uy.iter().zip(&uw) {
            blocks.push((v, wt, 1));
            while blocks.len() > 1 {
                let (m2, w2, n2) = blocks[blocks.len() - 1];
                let (m1, w1, n1) = blocks[blocks.len() - 2];
                if m1 <= m2 {
                    break;
                }
                blocks.pop();
                let wsum = w1 + w2;
                *blocks.last_mut().expect("two blocks") =
                    ((m1 * w1 + m2 * w2) / wsum, wsum, n1 + n2);
            }
        }
        let (mut kx, mut ky) = (Vec::new(), Vec::new());
        let mut start = 0;
        for (m, _, n) in blocks {
            kx.push(ux[start]);
            ky.push(m);
            if n > 1 {
                kx.push(ux[start + n - 1]);
                ky.push(m);
            }
            start += n;
        }
        Isotonic { x: kx, y: ky }
    }

    pub fn apply(&self, margin: f64) -> f64 {
        let (x, y) = (&self.x, &self.y);
        match x.len() {
            0 => 0.5,
            // A margin that is not a number refers nobody: the lowest probability.
            _ if margin.is_nan() => y[0],
            _ if margin <= x[0] => y[0],
            n if margin >= x[n - 1] => y[n - 1],
            _ => {
                let j = x.partition_point(|&v| v <= margin); // x[j-1] <= margin < x[j]
                let (x0, x1, y0, y1) = (x[j - 1], x[j], y[j - 1], y[j]);
                if x1 > x0 {
                    y0 + (y1 - y0) * (margin - x0) / (x1 - x0)
                } else {
                    y1
                }
            }
        }
    }
}

/// How margins become probabilities. Training fits both on out-of-fold margins, compares them
/// out of fold (each fitted without the fold it is judged on) and keeps the better.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Calibration {
    Platt(Platt),
    Isotonic(Isotonic),
}

impl Calibration {
    /// Fit `kind`; a Platt fit whose slope is not positive (a candidate that ranks worse than
    /// chance out of fold) cannot be a monotone calibration, and isotonic is fitted instead.
    pub fn fit(kind: CalibrationKind, margins: &[f64], y: &[bool]) -> Calibration {
        let platt = match kind {
            CalibrationKind::Platt => Calibration::Platt(Platt::fit(margins, y)),
            CalibrationKind::Isotonic => return Calibration::Isotonic(Isotonic::fit(margins, y)),
        };
        if platt.problem().is_some() {
            Calibration::Isotonic(Isotonic::fit(margins, y))
        } else {
            platt
        }
    }

    pub fn apply(&self, margin: f64) -> f64 {
        match self {
            Calibration::Platt(p) => p.apply(margin),
            Calibration::Isotonic(i) => i.apply(margin),
        }
    }

    pub fn kind(&self) -> CalibrationKind {
        match self {
            Calibration::Platt(_) => CalibrationKind::Platt,
            Calibration::Isotonic(_) => CalibrationKind::Isotonic,
        }
    }

    /// Problems that make the calibration unusable (a loaded file is checked with this).
    fn problem(&self) -> Option<String> {
        match self {
            Calibration::Platt(p) if !(p.a.is_finite() && p.b.is_finite()) => {
                Some("calibration: Platt parameters must be finite".into())
            }
            Calibration::Platt(p) if p.a <= 0.0 || p.a.abs() > 1e6 || p.b.abs() > 1e6 => Some(
                "calibration: Platt slope must be positive and both parameters within 1e6".into(),
            ),
            Calibration::Isotonic(i)
                if i.x.len() != i.y.len()
                    || i.x.is_empty()
                    || i.x.windows(2).any(|w| w[0] > w[1])
                    || i.y.windows(2).any(|w| w[0] > w[1])
                    || i.x.iter().any(|v| !v.is_finite())
                    || i.y.iter().any(|v| !(0.0..=1.0).contains(v)) =>
            {
                Some("calibration: isotonic knots must be finite, non-decreasing, equal in number, with probabilities in [0, 1]".into())
            }
            _ => None,
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum CalibrationKind {
    Platt,
    Isotonic,
}

impl CalibrationKind {
    pub const ALL: [CalibrationKind; 2] = [CalibrationKind::Platt, CalibrationKind::Isotonic];
    pub fn as_str(self) -> &'static str {
        match self {
            CalibrationKind::Platt => "platt",
            CalibrationKind::Isotonic => "isotonic",
        }
    }
}

/// Which classifier the artifact carries, with its parameters.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum ClassifierSpec {
    LogisticRegression(Logistic),
    BoostedTrees {
        settings: TreeSettings,
        booster: serde_json::Value,
    },
    /// A weighted mean of calibrated member probabilities, carried as log-odds so that the
    /// artifact's own calibration maps it back to a probability. Members read the artifact's
    /// feature list (logistic members its standardiser too).
    Blend {
        members: Vec<BlendMember>,
    },
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BlendMember {
    pub classifier: ClassifierSpec,
    pub calibration: Calibration,
    pub weight: f64,
}

/// Log-odds of a probability, kept finite.
pub fn logit(p: f64) -> f64 {
    let p = p.clamp(1e-9, 1.0 - 1e-9);
    (p / (1.0 - p)).ln()
}

/// Drift baselines recorded at training time.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Baselines {
    /// One per model feature, in the artifact's feature order.
    pub features: Vec<Baseline>,
    pub probability: Baseline,
    pub outlier_score: Baseline,
}

/// Where the model came from and how good it was found.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrainingInfo {
    pub created_at: String,
    pub data_from: String,
    pub data_to: String,
    pub train_rows: usize,
    pub train_positives: usize,
    pub test_rows: usize,
    pub test_positives: usize,
    /// Held-out and cross-validation figures, as in the training report.
    pub metrics: serde_json::Value,
}

/// The versioned model file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModelArtifact {
    pub format: String,
    pub format_version: u32,
    /// First 16 hex digits of the SHA-256 of the artifact with this field empty.
    pub version: String,
    pub features: Vec<String>,
    pub standardiser: Standardiser,
    pub classifier: ClassifierSpec,
    pub calibration: Calibration,
    /// Probability at or above which the training rule refers a claim (see the report).
    pub threshold: f64,
    pub outliers: OutlierModel,
    pub baselines: Baselines,
    pub training: TrainingInfo,
    /// How the claims graph links claims (window, hub caps measured in training): serving
    /// builds the graph features exactly as training did.
    pub graph: crate::graph::Settings,
}

#[derive(Debug, thiserror::Error)]
pub enum ArtifactError {
    #[error("cannot read model file {path}: {source}")]
    Io {
        path: String,
        source: std::io::Error,
    },
    #[error("model file is not a weir model artifact: {0}")]
    Parse(String),
    #[error(
        "model file format {found:?} version {version} is not supported (this build reads {ARTIFACT_FORMAT:?} version {ARTIFACT_FORMAT_VERSION})"
    )]
    Format { found: String, version: u32 },
    #[error(
        "model file content does not match its version hash (recorded {recorded}, computed {computed}): the file was changed or damaged"
    )]
    Hash { recorded: String, computed: String },
    #[error("model uses features this build cannot produce: {0:?}")]
    UnknownFeatures(Vec<String>),
    #[error("model file is inconsistent: {0}")]
    Shape(String),
}

impl ModelArtifact {
    fn content_hash(&self) -> String {
        let mut copy = self.clone();
        copy.version = String::new();
        let bytes = serde_json::to_vec(&copy).unwrap_or_default();
        let digest = Sha256::digest(&bytes);
        digest.iter().take(8).map(|b| format!("{b:02x}")).collect()
    }

    /// Set `version` to the content hash.
    pub fn seal(&mut self) {
        self.version = self.content_hash();
    }

    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).unwrap_or_default()
    }

    pub fn from_json(text: &str) -> Result<ModelArtifact, ArtifactError> {
        // Check the format header first so an old or foreign file gets the clearer message.
        let v: serde_json::Value =
            serde_json::from_str(text).map_err(|e| ArtifactError::Parse(e.to_string()))?;
        let found = v.get("format").and_then(|f| f.as_str()).unwrap_or("");
        let version = v
            .get("format_version")
            .and_then(|f| f.as_u64())
            .unwrap_or(0);
        if found != ARTIFACT_FORMAT || version != u64::from(ARTIFACT_FORMAT_VERSION) {
            return Err(ArtifactError::Format {
                found: found.to_string(),
                version: u32::try_from(version).unwrap_or(u32::MAX),
            });
        }
        let a: ModelArtifact =
            serde_json::from_value(v).map_err(|e| ArtifactError::Parse(e.to_string()))?;
        let computed = a.content_hash();
        if computed != a.version {
            return Err(ArtifactError::Hash {
                recorded: a.version.clone(),
                computed,
            });
        }
        Ok(a)
    }

    pub fn read(path: &Path) -> Result<ModelArtifact, ArtifactError> {
        let text = std::fs::read_to_string(path).map_err(|source| ArtifactError::Io {
            path: path.display().to_string(),
            source,
        })?;
        ModelArtifact::from_json(&text)
    }
}

/// A short, plain reason for a score.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Reason {
    pub code: String,
    pub text: String,
    /// Contribution to the log-odds (model reasons) or rule points.
    pub weight: f64,
}

/// The result of scoring one claim.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Scored {
    /// Calibrated probability that a referral is worth it.
    pub probability: f64,
    pub outlier_score: f64,
    pub cluster: usize,
    /// Top features pushing the score up, strongest first.
    pub reasons: Vec<Reason>,
}

enum Classifier {
    Logistic(Logistic),
    Trees(Trees),
    Blend(Vec<(Classifier, Calibration, f64)>),
}

impl Classifier {
    fn from_spec(
        spec: &ClassifierSpec,
        d: usize,
        depth: usize,
    ) -> Result<Classifier, ArtifactError> {
        Ok(match spec {
            ClassifierSpec::LogisticRegression(l) => {
                if l.coef.len() != d {
                    return Err(ArtifactError::Shape(format!(
                        "classifier.coef has {} entries for {d} features",
                        l.coef.len()
                    )));
                }
                if l.coef.iter().any(|c| !c.is_finite()) || !l.intercept.is_finite() {
                    return Err(ArtifactError::Shape(
                        "classifier: coefficients must be finite".into(),
                    ));
                }
                Classifier::Logistic(l.clone())
            }
            ClassifierSpec::BoostedTrees { booster, .. } => Classifier::Trees(
                Trees::from_value(booster)
                    .map_err(|e| ArtifactError::Shape(format!("classifier.booster: {e}")))?,
            ),
            ClassifierSpec::Blend { members } => {
                if depth > 0 || members.is_empty() {
                    return Err(ArtifactError::Shape(
                        "classifier: a blend needs members, and members cannot be blends".into(),
                    ));
                }
                let total: f64 = members.iter().map(|m| m.weight).sum();
                if members
                    .iter()
                    .any(|m| !(m.weight.is_finite() && m.weight > 0.0))
                    || (total - 1.0).abs() > 1e-6
                {
                    return Err(ArtifactError::Shape(
                        "classifier: blend weights must be positive and add up to 1".into(),
                    ));
                }
                let mut out = Vec::with_capacity(members.len());
                for m in members {
                    if let Some(p) = m.calibration.problem() {
                        return Err(ArtifactError::Shape(format!("blend member {p}")));
                    }
                    out.push((
                        Classifier::from_spec(&m.classifier, d, depth + 1)?,
                        m.calibration.clone(),
                        m.weight,
                    ));
                }
                Classifier::Blend(out)
            }
        })
    }

    /// Margin of one row (`x` raw, `z` standardised), writing per-feature contributions to
    /// the log-odds into `contrib`.
    fn margin(&self, x: &[f64], z: &[f64], contrib: &mut [f64]) -> f64 {
        match self {
            Classifier::Logistic(l) => {
                for ((o, w), v) in contrib.iter_mut().zip(&l.coef).zip(z) {
                    *o = w * v;
                }
                l.margin(z)
            }
            Classifier::Trees(t) => {
                contrib.iter_mut().for_each(|c| *c = 0.0);
                t.margin_and_contributions(x, contrib)
            }
            Classifier::Blend(members) => {
                let mut p = 0.0;
                let mut part = [0.0; features::N_FEATURES];
                contrib.iter_mut().for_each(|c| *c = 0.0);
                for (c, cal, w) in members {
                    p += w * cal.apply(c.margin(x, z, &mut part[..x.len()]));
                    for (o, v) in contrib.iter_mut().zip(&part) {
                        *o += w * v;
                    }
                }
                logit(p)
            }
        }
    }
}

/// A checked artifact, ready to score.
pub struct Model {
    pub artifact: ModelArtifact,
    index: Vec<usize>,
    classifier: Classifier,
    /// Per model feature, the training values below which and above which one claim in
    /// twenty lies (from the stored baselines; NaN without them).
    rare: Vec<(f64, f64)>,
}

impl std::fmt::Debug for Model {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "Model({})", self.artifact.version)
    }
}

/// How many reasons a score carries.
pub const MAX_REASONS: usize = 3;

impl Model {
    pub fn new(artifact: ModelArtifact) -> Result<Model, ArtifactError> {
        let index =
            features::resolve(&artifact.features).map_err(ArtifactError::UnknownFeatures)?;
        let graph = artifact.graph.problems();
        if !graph.is_empty() {
            return Err(ArtifactError::Shape(graph.join("; ")));
        }
        let d = index.len();
        let mut distinct = index.clone();
        distinct.sort_unstable();
        distinct.dedup();
        if distinct.len() != d {
            return Err(ArtifactError::Shape(
                "features: a feature is named twice".into(),
            ));
        }
        let shape = |what: &str, got: usize| {
            Err(ArtifactError::Shape(format!(
                "{what} has {got} entries for {d} features"
            )))
        };
        if artifact.standardiser.mean.len() != d {
            return shape("standardiser.mean", artifact.standardiser.mean.len());
        }
        if artifact.standardiser.scale.len() != d {
            return shape("standardiser.scale", artifact.standardiser.scale.len());
        }
        if artifact
            .standardiser
            .scale
            .iter()
            .any(|s| !(s.is_finite() && *s > 0.0))
            || artifact.standardiser.mean.iter().any(|m| !m.is_finite())
        {
            return Err(ArtifactError::Shape(
                "standardiser: means must be finite and scales finite and positive".into(),
            ));
        }
        if artifact.outliers.centres.is_empty()
            || artifact.outliers.centres.iter().any(|c| c.len() != d)
            || artifact.outliers.spreads.len() != artifact.outliers.centres.len()
        {
            return Err(ArtifactError::Shape(format!(
                "outliers: need at least one centre of {d} values and one spread per centre"
            )));
        }
        if artifact.baselines.features.len() != d {
            return shape("baselines.features", artifact.baselines.features.len());
        }
        if !(0.0..=1.0).contains(&artifact.threshold) {
            return Err(ArtifactError::Shape(format!(
                "threshold {} is not a probability (0 to 1)",
                artifact.threshold
            )));
        }
        if let Some(p) = artifact.calibration.problem() {
            return Err(ArtifactError::Shape(p));
        }
        let classifier = Classifier::from_spec(&artifact.classifier, d, 0)?;
        let rare = (0..d)
            .map(|j| {
                let sketch = artifact
                    .baselines
                    .features
                    .get(j)
                    .map_or(&[][..], |b| &b.sketch[..]);
                if sketch.len() < 20 {
                    return (f64::NAN, f64::NAN);
                }
                let at =
                    |q: f64| sketch[((q * sketch.len() as f64) as usize).min(sketch.len() - 1)];
                (at(features::RARE_SHARE), at(1.0 - features::RARE_SHARE))
            })
            .collect();
        Ok(Model {
            artifact,
            index,
            classifier,
            rare,
        })
    }

    pub fn version(&self) -> &str {
        &self.artifact.version
    }

    /// The model's features selected from a full feature vector.
    pub fn select(&self, full: &FeatureVector) -> Vec<f64> {
        self.index.iter().map(|&i| full[i]).collect()
    }

    /// Uncalibrated margins (log-odds) for rows of model features.
    pub fn margins(&self, x: ArrayView2<f64>) -> Vec<f64> {
        let d = x.ncols();
        let mut z = vec![0.0; d];
        let mut c = vec![0.0; d];
        x.outer_iter()
            .map(|r| {
                let r = r.to_vec();
                self.artifact.standardiser.apply_row(&r, &mut z);
                self.classifier.margin(&r, &z, &mut c)
            })
            .collect()
    }

    pub fn calibrated(&self, margin: f64) -> f64 {
        self.artifact.calibration.apply(margin)
    }

    /// Score one claim. The hot path of intake: model features, standardised values and
    /// contributions live on the stack (a model has at most the catalogue's features).
    pub fn score(&self, full: &FeatureVector) -> Scored {
        let d = self.index.len();
        let mut xb = [0.0; features::N_FEATURES];
        let mut zb = [0.0; features::N_FEATURES];
        for (o, &i) in xb.iter_mut().zip(&self.index) {
            *o = full[i];
        }
        let (x, z) = (&xb[..d], &mut zb[..d]);
        self.artifact.standardiser.apply_row(x, z);
        let z = &*z;
        let mut cb = [0.0; features::N_FEATURES];
        let margin = self.classifier.margin(x, z, &mut cb[..d]);
        let (cluster, outlier_score) = self.artifact.outliers.score(ArrayView1::from(z));
        Scored {
            probability: self.calibrated(margin),
            outlier_score,
            cluster,
            reasons: self.reasons(full, z, &cb[..d]),
        }
    }

    fn reasons(&self, full: &FeatureVector, z: &[f64], contrib: &[f64]) -> Vec<Reason> {
        features::reasons(full, &self.index, z, &self.rare, contrib, MAX_REASONS)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn platt_recovers_known_parameters() {
        // Labels drawn deterministically from p = sigmoid(2 s - 1): Platt must find a≈2, b≈-1.
        let mut margins = Vec::new();
        let mut y = Vec::new();
        for i in 0..4000 {
            let s = (f64::from(i) / 4000.0) * 6.0 - 3.0;
            let p = sigmoid(2.0 * s - 1.0);
            // A low-discrepancy sequence instead of random draws keeps the test exact.
            let u = (f64::from(i) * 0.618_033_988_749_895) % 1.0;
            margins.push(s);
            y.push(u < p);
        }
        let pl = Platt::fit(&margins, &y);
        assert!((pl.a - 2.0).abs() < 0.15, "{pl:?}");
        assert!((pl.b + 1.0).abs() < 0.15, "{pl:?}");
    }

    #[test]
    fn standardiser_uses_population_sd_and_guards_constants() {
        let x = ndarray::array![[1.0, 5.0], [3.0, 5.0]];
        let s = Standardiser::fit(x.view());
        assert_eq!(s.mean, vec![2.0, 5.0]);
        assert_eq!(s.scale, vec![1.0, 1.0]);
        let z = s.apply(x.view());
        assert_eq!(z, ndarray::array![[-1.0, 0.0], [1.0, 0.0]]);
    }

    #[test]
    fn artifact_errors_name_the_problem() {
        let err = ModelArtifact::from_json("{\"format\": \"other\"}").unwrap_err();
        assert!(matches!(err, ArtifactError::Format { .. }), "{err}");
        let err = ModelArtifact::from_json("not json").unwrap_err();
        assert!(matches!(err, ArtifactError::Parse(_)), "{err}");
    }
}
