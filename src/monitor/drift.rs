//! Drift between a baseline and a current sample: population stability index (PSI) and the
//! two-sample Kolmogorov–Smirnov statistic D.
//!
//! Binning rule for numeric columns: the inner edges are the baseline's quantiles at 1/B, 2/B,
//! ..., (B-1)/B (linear interpolation between order statistics, numpy's default "linear"
//! method), repeated edges merged; a value equal to an edge falls in the lower bin. Text columns
//! are compared category by category. An empty bin's share is floored at [`SHARE_FLOOR`] before
//! the logarithm (common practice, no source), so one empty bin gives a large but finite PSI.
//!
//! Reading bands: PSI below 0.1 stable, 0.1 to 0.25 watch, above 0.25 shifted. These are a
//! rule of thumb of credit-scoring practice (common practice, no source), not a test.

use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

pub const DEFAULT_BINS: usize = 10;
pub const SHARE_FLOOR: f64 = 1e-4;

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Band {
    Stable,
    Watch,
    Shifted,
}

impl Band {
    pub fn of(psi: f64) -> Band {
        if psi < 0.1 {
            Band::Stable
        } else if psi <= 0.25 {
            Band::Watch
        } else {
            Band::Shifted
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DriftBin {
    /// `(lower, upper]` for numeric bins, the category for text.
    pub bin: String,
    pub baseline_count: u64,
    pub current_count: u64,
    pub baseline_share: f64,
    pub current_share: f64,
    /// This bin's term of the PSI sum.
    pub psi_term: f64,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Drift {
    pub psi: f64,
    /// Two-sample KS statistic D (numeric columns only).
    pub ks: Option<f64>,
    pub band: Band,
    pub baseline_n: usize,
    pub current_n: usize,
    pub bins: Vec<DriftBin>,
}

/// Quantile with linear interpolation between order statistics of a sorted slice
/// (numpy's default method, Hyndman and Fan type 7).
pub fn quantile_sorted(sorted: &[f64], q: f64) -> f64 {
    let h = (sorted.len() - 1) as f64 * q;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(sorted.len() - 1);
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

/// Inner bin edges at the baseline's quantiles, repeated edges merged.
pub fn quantile_edges(baseline: &[f64], bins: usize) -> Vec<f64> {
    let mut sorted = baseline.to_vec();
    sorted.sort_by(f64::total_cmp);
    let mut edges: Vec<f64> = (1..bins)
        .map(|i| quantile_sorted(&sorted, i as f64 / bins as f64))
        .collect();
    edges.dedup();
    edges
}

/// Bin index of `x`: the number of edges strictly below it.
pub fn bin_of(edges: &[f64], x: f64) -> usize {
    edges.partition_point(|&e| e < x)
}

fn counts(edges: &[f64], xs: &[f64]) -> Vec<u64> {
    let mut c = vec![0u64; edges.len() + 1];
    for &x in xs {
        c[bin_of(edges, x)] += 1;
    }
    c
}

fn psi_terms(base: &[u64], cur: &[u64], labels: Vec<String>) -> (f64, Vec<DriftBin>) {
    let nb: u64 = base.iter().sum();
    let nc: u64 = cur.iter().sum();
    let mut psi = 0.0;
    let bins = labels
        .into_iter()
        .zip(base.iter().zip(cur))
        .map(|(bin, (&b, &c))| {
            let bs = (b as f64 / nb.max(1) as f64).max(SHARE_FLOOR);
            let cs = (c as f64 / nc.max(1) as f64).max(SHARE_FLOOR);
            let term = (cs - bs) * (cs / bs).ln();
            psi += term;
            DriftBin {
                bin,
                baseline_count: b,
                current_count: c,
                baseline_share: bs,
                current_share: cs,
                psi_term: term,
            }
        })
        .collect();
    (psi, bins)
}

fn edge_labels(edges: &[f64]) -> Vec<String> {
    let fmt = |x: f64| format!("{x}");
    (0..=edges.len())
        .map(|i| {
            let lo = if i == 0 {
                "-inf".into()
            } else {
                fmt(edges[i - 1])
            };
            let hi = if i == edges.len() {
                "inf".into()
            } else {
                fmt(edges[i])
            };
            format!("({lo}, {hi}]")
        })
        .collect()
}

/// Two-sample Kolmogorov–Smirnov statistic: the largest gap between the two empirical CDFs.
pub fn ks_statistic(a: &[f64], b: &[f64]) -> f64 {
    let mut a = a.to_vec();
    let mut b = b.to_vec();
    a.sort_by(f64::total_cmp);
    b.sort_by(f64::total_cmp);
    let (na, nb) = (a.len() as f64, b.len() as f64);
    let (mut i, mut j, mut d) = (0usize, 0usize, 0.0f64);
    while i < a.len() && j < b.len() {
        let x = a[i].min(b[j]);
        while i < a.len() && a[i] <= x {
            i += 1;
        }
        while j < b.len() && b[j] <= x {
            j += 1;
        }
        d = d.max((i as f64 / na - j as f64 / nb).abs());
    }
    d
}

/// PSI and KS of a numeric column. Both samples must be non-empty.
pub fn numeric(baseline: &[f64], current: &[f64], bins: usize) -> Drift {
    let edges = quantile_edges(baseline, bins);
    numeric_with_edges(&edges, baseline, current)
}

/// As [`numeric`], with bin edges fixed beforehand (e.g. stored in a model artifact).
pub fn numeric_with_edges(edges: &[f64], baseline: &[f64], current: &[f64]) -> Drift {
    let (psi, bins) = psi_terms(
        &counts(edges, baseline),
        &counts(edges, current),
        edge_labels(edges),
    );
    Drift {
        psi,
        ks: Some(ks_statistic(baseline, current)),
        band: Band::of(psi),
        baseline_n: baseline.len(),
        current_n: current.len(),
        bins,
    }
}

/// PSI of a text column, category by category (categories of either sample, sorted).
pub fn categorical(baseline: &[String], current: &[String]) -> Drift {
    let mut table: BTreeMap<&str, (u64, u64)> = BTreeMap::new();
    for s in baseline {
        table.entry(s).or_default().0 += 1;
    }
    for s in current {
        table.entry(s).or_default().1 += 1;
    }
    let labels = table.keys().map(|k| k.to_string()).collect();
    let base: Vec<u64> = table.values().map(|v| v.0).collect();
    let cur: Vec<u64> = table.values().map(|v| v.1).collect();
    let (psi, bins) = psi_terms(&base, &cur, labels);
    Drift {
        psi,
        ks: None,
        band: Band::of(psi),
        baseline_n: baseline.len(),
        current_n: current.len(),
        bins,
    }
}

/// A column's training distribution as kept in a model artifact: PSI bin edges and shares, and
/// evenly spaced order statistics standing in for the sample when computing KS.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Baseline {
    pub edges: Vec<f64>,
    pub shares: Vec<f64>,
    /// Order statistics at ranks spread evenly over the sample (at most [`SKETCH_POINTS`]).
    pub sketch: Vec<f64>,
    pub n: usize,
}

pub const SKETCH_POINTS: usize = 1000;

impl Baseline {
    pub fn from_sample(xs: &[f64], bins: usize) -> Baseline {
        let edges = quantile_edges(xs, bins);
        let c = counts(&edges, xs);
        let n = xs.len();
        let mut sorted = xs.to_vec();
        sorted.sort_by(f64::total_cmp);
        let m = SKETCH_POINTS.min(n);
        let sketch = (0..m)
            .map(|i| sorted[((i as f64 + 0.5) * n as f64 / m as f64) as usize])
            .collect();
        Baseline {
            shares: c.iter().map(|&k| k as f64 / n.max(1) as f64).collect(),
            edges,
            sketch,
            n,
        }
    }

    /// Drift of `current` against this baseline. KS uses the sketch, so it is exact up to about
    /// 1/[`SKETCH_POINTS`].
    pub fn drift(&self, current: &[f64]) -> Drift {
        // Baseline counts rebuilt from shares on the scale of the stored n.
        let base: Vec<u64> = self
            .shares
            .iter()
            .map(|s| (s * self.n as f64).round() as u64)
            .collect();
        let (psi, bins) = psi_terms(
            &base,
            &counts(&self.edges, current),
            edge_labels(&self.edges),
        );
        Drift {
            psi,
            ks: Some(ks_statistic(&self.sketch, current)),
            band: Band::of(psi),
            baseline_n: self.n,
            current_n: current.len(),
            bins,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bands_follow_the_rule_of_thumb() {
        assert_eq!(Band::of(0.05), Band::Stable);
        assert_eq!(Band::of(0.1), Band::Watch);
        assert_eq!(Band::of(0.25), Band::Watch);
        assert_eq!(Band::of(0.26), Band::Shifted);
    }

    #[test]
    fn identical_samples_have_no_drift() {
        let xs: Vec<f64> = (0..500).map(|i| f64::from(i % 37)).collect();
        let d = numeric(&xs, &xs, 10);
        assert!(d.psi.abs() < 1e-15);
        assert_eq!(d.ks, Some(0.0));
    }

    #[test]
    fn ties_collapse_edges_and_edge_values_fall_low() {
        let base = [0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 1.0, 2.0];
        let edges = quantile_edges(&base, 10);
        // numpy.quantile(base, [.1, ..., .9]) = [0]*7 + [0.2, 1.1] (NumPy 2.4)
        let want = [0.0, 0.2, 1.1];
        assert_eq!(edges.len(), 3);
        for (a, b) in edges.iter().zip(want) {
            assert!((a - b).abs() < 1e-12, "{edges:?}");
        }
        assert_eq!(bin_of(&edges, 0.0), 0);
        assert_eq!(bin_of(&edges, 0.2), 1);
        assert_eq!(bin_of(&edges, 1.0), 2);
        assert_eq!(bin_of(&edges, 2.0), 3);
    }

    #[test]
    fn baseline_sketch_tracks_the_full_sample() {
        let base: Vec<f64> = (0..5000).map(|i| f64::from(i * 7919 % 5000)).collect();
        let cur: Vec<f64> = (0..800).map(|i| f64::from(i * 3) + 900.0).collect();
        let full = numeric(&base, &cur, 10);
        let stored = Baseline::from_sample(&base, 10).drift(&cur);
        assert!((full.psi - stored.psi).abs() < 1e-9);
        assert!((full.ks.unwrap() - stored.ks.unwrap()).abs() < 2.0 / SKETCH_POINTS as f64);
    }
}
