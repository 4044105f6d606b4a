//! Fitting time at scale, timed once per model (criterion would need ten samples of each):
//! invented claims → features with history → standardised matrix → logistic regression,
//! k-means (k = 8) and the boosted-trees challenger, each timed; then the whole
//! `weir train` pipeline (time split, 5-fold cross-validation, calibration, report) on the
//! same claims.
//!
//! `cargo run --release --example train_scale -- 1000000 [--matrix DIR] [--no-pipeline]`
//!
//! With `--matrix DIR` it also writes the standardised matrix (`x.f64`, row-major little-endian
//! f64), labels (`y.u8`) and shape (`shape.txt`) for `benches/reference/sklearn_fit.py`, which
//! times scikit-learn on exactly the same numbers.

use ndarray::Array2;
use std::io::Write;
use std::time::Instant;
use weir::features::N_FEATURES;
use weir::model::{Logistic, Standardiser, TreeSettings, Trees};
use weir::outliers::{KMeansSettings, OutlierModel};
use weir::train::TrainingRow;

fn peak_rss_mb() -> f64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1).map(String::from))
        })
        .and_then(|v| v.parse::<f64>().ok())
        .map_or(f64::NAN, |k| k / 1024.0)
}

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    let n: usize = args.get(1).map_or(Ok(1_000_000), |s| s.parse())?;
    let matrix_dir = args
        .iter()
        .position(|a| a == "--matrix")
        .and_then(|i| args.get(i + 1))
        .map(std::path::PathBuf::from);
    let pipeline = !args.iter().any(|a| a == "--no-pipeline");

    let t = Instant::now();
    let mut rows: Vec<TrainingRow> = weir::demo_data::generate_long(n, 11)
        .into_iter()
        .enumerate()
        .map(|(i, d)| TrainingRow {
            line: i + 1,
            claim: d.claim,
            outcome: Some(d.outcome),
        })
        .collect();
    println!(
        "generate {} claims: {:.1} s",
        rows.len(),
        t.elapsed().as_secs_f64()
    );

    // Features in time order with history, by the training code itself.
    let t = Instant::now();
    let fvs = weir::train::featurise(&mut rows, &weir::graph::Settings::default(), false);
    let x = Array2::from_shape_fn((fvs.len(), N_FEATURES), |(r, c)| fvs[r][c]);
    drop(fvs);
    let y: Vec<bool> = rows
        .iter()
        .map(|r| r.outcome.and_then(|o| o.label()).unwrap_or(false))
        .collect();
    let s = Standardiser::fit(x.view());
    let z = s.apply(x.view());
    drop(x);
    println!(
        "features with history + standardise: {:.1} s",
        t.elapsed().as_secs_f64()
    );

    if let Some(dir) = &matrix_dir {
        std::fs::create_dir_all(dir)?;
        let mut w = std::io::BufWriter::new(std::fs::File::create(dir.join("x.f64"))?);
        for v in z.iter() {
            w.write_all(&v.to_le_bytes())?;
        }
        w.flush()?;
        std::fs::write(
            dir.join("y.u8"),
            y.iter().map(|&b| u8::from(b)).collect::<Vec<_>>(),
        )?;
        std::fs::write(
            dir.join("shape.txt"),
            format!("{} {}\n", z.nrows(), z.ncols()),
        )?;
        println!("matrix written to {}", dir.display());
    }

    let t = Instant::now();
    let lr = Logistic::fit(z.view(), &y, 10.0)?;
    println!(
        "logistic regression (alpha 10, Newton): {:.1} s ({} coefficients)",
        t.elapsed().as_secs_f64(),
        lr.coef.len()
    );

    let t = Instant::now();
    let mut ks = KMeansSettings::new(8, 1);
    ks.n_runs = 1;
    let om = OutlierModel::fit(z.view(), &ks)?;
    println!(
        "k-means (k 8, 1 run, k-means++): {:.1} s ({} dims)",
        t.elapsed().as_secs_f64(),
        om.dims()
    );

    let t = Instant::now();
    let w: Vec<f64> = y.iter().map(|&v| if v { 20.0 } else { 1.0 }).collect();
    Trees::fit(
        z.view(),
        &y,
        &w,
        &TreeSettings {
            iterations: 150,
            learning_rate: 0.1,
            max_depth: 4,
            min_leaf_weight: 1.0,
            seed: 1,
        },
    )?;
    println!(
        "boosted trees (150 rounds, depth 4): {:.1} s",
        t.elapsed().as_secs_f64()
    );
    drop(z);

    if pipeline {
        let t = Instant::now();
        let loaded = weir::train::Loaded {
            rows,
            lines_read: n,
            skipped: Vec::new(),
        };
        let config = weir::config::Config::default();
        let trained = weir::train::train(loaded, &config, false)?;
        println!(
            "whole weir train pipeline (default config: 3 alphas and 4 tree settings x 5 folds, the blend, k-means x 3 runs): {:.1} s, champion {}",
            t.elapsed().as_secs_f64(),
            trained.report.champion
        );
    }
    println!("peak resident memory: {:.0} MB", peak_rss_mb());
    Ok(())
}
