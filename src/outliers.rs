//! k-means fit and the outlier score.
//!
//! The score of a claim is the share of its nearest cluster's own training claims that lie
//! closer to that cluster's centre than it does: 0.99 means "further out than 99% of the
//! claims this cluster was fitted on". Distances are Euclidean in the standardised feature
//! space of the model. Normalising by each cluster's own spread matters because clusters differ
//! in tightness: a distance that is ordinary for a loose cluster is extreme for a tight one.

use linfa::prelude::*;
use linfa_clustering::{KMeans, KMeansInit};
use ndarray::{Array2, ArrayView1, ArrayView2};
use rand::SeedableRng;
use rand_xoshiro::Xoshiro256Plus;
use serde::{Deserialize, Serialize};

/// Most points kept of each cluster's distance distribution.
pub const SPREAD_POINTS: usize = 200;

#[derive(Debug, thiserror::Error)]
pub enum OutlierError {
    #[error("k-means needs at least {k} rows, got {rows}")]
    TooFewRows { k: usize, rows: usize },
    #[error("k must be at least 1")]
    ZeroClusters,
    #[error("initial centres have shape {got:?}, expected ({k}, {cols})")]
    InitShape {
        got: (usize, usize),
        k: usize,
        cols: usize,
    },
    #[error("k-means failed: {0}")]
    Fit(String),
}

/// Settings for a k-means fit, checked by [`KMeansSettings::validate`] before linfa sees them
/// (a wrong-shaped initial centre matrix panics inside linfa).
#[derive(Debug, Clone)]
pub struct KMeansSettings {
    pub k: usize,
    pub n_runs: usize,
    pub max_iterations: u64,
    /// Absolute: stop when the centres move less than this (linfa's convention).
    pub tolerance: f64,
    pub seed: u64,
    /// Explicit starting centres; k-means++ when absent.
    pub init: Option<Array2<f64>>,
}

impl KMeansSettings {
    pub fn new(k: usize, seed: u64) -> Self {
        KMeansSettings {
            k,
            n_runs: 3,
            max_iterations: 300,
            tolerance: 1e-6,
            seed,
            init: None,
        }
    }

    fn validate(&self, x: ArrayView2<f64>) -> Result<(), OutlierError> {
        if self.k == 0 {
            return Err(OutlierError::ZeroClusters);
        }
        if x.nrows() < self.k {
            return Err(OutlierError::TooFewRows {
                k: self.k,
                rows: x.nrows(),
            });
        }
        if let Some(init) = &self.init
            && init.dim() != (self.k, x.ncols())
        {
            return Err(OutlierError::InitShape {
                got: init.dim(),
                k: self.k,
                cols: x.ncols(),
            });
        }
        Ok(())
    }
}

/// Fitted k-means: centres plus each cluster's training distance distribution.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct OutlierModel {
    pub centres: Vec<Vec<f64>>,
    /// Training rows per cluster.
    pub sizes: Vec<u64>,
    /// Per cluster, evenly spaced order statistics of its members' distances to the centre.
    pub spreads: Vec<Vec<f64>>,
    /// Sum over training rows of the squared distance to the nearest centre (scikit-learn's
    /// `inertia_`; linfa reports the mean).
    pub inertia: f64,
}

fn sq_dist(a: ArrayView1<f64>, b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

impl OutlierModel {
    pub fn fit(x: ArrayView2<f64>, s: &KMeansSettings) -> Result<OutlierModel, OutlierError> {
        s.validate(x)?;
        let rng = Xoshiro256Plus::seed_from_u64(s.seed);
        let init = match &s.init {
            Some(c) => KMeansInit::Precomputed(c.clone()),
            None => KMeansInit::KMeansPlusPlus,
        };
        let n_runs = if s.init.is_some() { 1 } else { s.n_runs };
        let data = DatasetBase::from(x.to_owned());
        let fitted = KMeans::params_with_rng(s.k, rng)
            .n_runs(n_runs)
            .max_n_iterations(s.max_iterations)
            .tolerance(s.tolerance)
            .init_method(init)
            .fit(&data)
            .map_err(|e| OutlierError::Fit(e.to_string()))?;
        let centres: Vec<Vec<f64>> = fitted
            .centroids()
            .outer_iter()
            .map(|r| r.to_vec())
            .collect();
        Ok(Self::from_centres(centres, x))
    }

    /// Membership, sizes, inertia and spreads of `x` around given centres.
    pub fn from_centres(centres: Vec<Vec<f64>>, x: ArrayView2<f64>) -> OutlierModel {
        let k = centres.len();
        let mut dists: Vec<Vec<f64>> = vec![Vec::new(); k];
        let mut inertia = 0.0;
        for row in x.outer_iter() {
            let (c, d2) = nearest(&centres, row);
            inertia += d2;
            dists[c].push(d2.sqrt());
        }
        let sizes = dists.iter().map(|d| d.len() as u64).collect();
        let spreads = dists
            .into_iter()
            .map(|mut d| {
                d.sort_by(f64::total_cmp);
                let m = SPREAD_POINTS.min(d.len());
                (0..m)
                    .map(|i| d[((i as f64 + 0.5) * d.len() as f64 / m as f64) as usize])
                    .collect()
            })
            .collect();
        OutlierModel {
            centres,
            sizes,
            spreads,
            inertia,
        }
    }

    /// Nearest cluster and the outlier score in [0, 1].
    pub fn score(&self, z: ArrayView1<f64>) -> (usize, f64) {
        let (c, d2) = nearest(&self.centres, z);
        let d = d2.sqrt();
        let spread = &self.spreads[c];
        if spread.is_empty() {
            // A cluster that kept no training rows: anything near it is unusual.
            return (c, 1.0);
        }
        let below = spread.partition_point(|&s| s < d);
        (c, below as f64 / spread.len() as f64)
    }

    pub fn dims(&self) -> usize {
        self.centres.first().map_or(0, Vec::len)
    }
}

/// Index of the nearest centre and the squared distance to it (first centre wins ties).
pub fn nearest(centres: &[Vec<f64>], z: ArrayView1<f64>) -> (usize, f64) {
    let mut best = (0, f64::INFINITY);
    for (i, c) in centres.iter().enumerate() {
        let d = sq_dist(z, c);
        if d < best.1 {
            best = (i, d);
        }
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn score_is_the_share_of_the_cluster_closer_in() {
        // Two tight clusters; one point far from both.
        let x = array![
            [0.0, 0.0],
            [0.1, 0.0],
            [0.0, 0.1],
            [0.1, 0.1],
            [10.0, 10.0],
            [10.2, 10.0],
            [10.0, 10.2],
            [10.2, 10.2]
        ];
        let m = OutlierModel::fit(x.view(), &KMeansSettings::new(2, 7)).unwrap();
        assert_eq!(m.sizes.iter().sum::<u64>(), 8);
        assert_eq!(m.sizes, vec![4, 4]);
        let (_, inside) = m.score(array![0.05, 0.05].view());
        let (_, far) = m.score(array![3.0, 3.0].view());
        assert!(inside <= 0.25, "{inside}");
        assert_eq!(far, 1.0);
    }

    #[test]
    fn bad_settings_are_errors_not_panics() {
        let x = array![[0.0, 0.0], [1.0, 1.0]];
        assert!(matches!(
            OutlierModel::fit(x.view(), &KMeansSettings::new(3, 1)),
            Err(OutlierError::TooFewRows { .. })
        ));
        let mut s = KMeansSettings::new(2, 1);
        s.init = Some(array![[0.0], [1.0]]);
        assert!(matches!(
            OutlierModel::fit(x.view(), &s),
            Err(OutlierError::InitShape { .. })
        ));
    }
}
