//! Criterion benchmarks of the scoring core and of model fitting.
//!
//! `cargo bench --bench core` (all), or e.g. `cargo bench --bench core -- score/` for one
//! group. The training group fits on 100,000 invented claims; 1,000,000 claims are timed once
//! each by `cargo run --release --example train_scale -- 1000000` (criterion's ten samples of a
//! one-million-row fit would take most of an hour).

use criterion::{BatchSize, Criterion, Throughput, black_box, criterion_group, criterion_main};
use ndarray::Array2;
use std::io::Cursor;
use weir::config::Config;
use weir::features::{self, FeatureVector, MemoryHistory, N_FEATURES};
use weir::model::{Logistic, Model, Standardiser, TreeSettings, Trees};
use weir::outliers::{KMeansSettings, OutlierModel};
use weir::rules::{self, Inputs, Routing, RuleSet};
use weir::train::{self, BadLines};

const RULES: &str = include_str!("../config/rules.toml");

/// Two models trained on 6,000 demo claims (logistic regression alone, as the benchmark has
/// always measured; and the champion the default configuration selects, trees or a blend),
/// the history of 20,000 claims, and the claims to score.
fn setup() -> (
    Model,
    Model,
    RuleSet,
    MemoryHistory,
    Vec<weir::claim::Claim>,
) {
    let claims = weir::demo_data::generate(20_000, 7);
    let text: Vec<String> = claims[..6000]
        .iter()
        .map(|c| c.to_training_json())
        .collect();
    let mut cfg = Config::default();
    cfg.training.trees.enabled = false;
    cfg.training.alphas = vec![10.0];
    let loaded = train::load(Cursor::new(text.join("\n")), BadLines::Refuse).unwrap();
    let trained = train::train(loaded, &cfg, false).unwrap();
    let model = Model::new(trained.artifact).unwrap();
    let loaded = train::load(Cursor::new(text.join("\n")), BadLines::Refuse).unwrap();
    let champion = train::train(loaded, &Config::default(), false).unwrap();
    println!("default champion: {}", champion.report.champion);
    let champion = Model::new(champion.artifact).unwrap();
    let mut history = MemoryHistory::new();
    for c in &claims {
        history.record(&c.claim);
    }
    let rules = RuleSet::from_toml(RULES, "rules.toml").unwrap();
    (
        model,
        champion,
        rules,
        history,
        claims.into_iter().map(|c| c.claim).collect(),
    )
}

/// Counts the history events a feature computation visits (where its time goes).
struct Counting<'a>(&'a MemoryHistory, std::cell::Cell<usize>);

impl weir::features::HistoryView for Counting<'_> {
    fn for_each_event(
        &self,
        entity: &str,
        from: i64,
        to: i64,
        f: &mut dyn FnMut(&weir::features::HistoryEvent),
    ) {
        self.0.for_each_event(entity, from, to, &mut |e| {
            self.1.set(self.1.get() + 1);
            f(e)
        });
    }
}

fn scoring(c: &mut Criterion) {
    let (model, champion, rules, history, claims) = setup();
    let counting = Counting(&history, std::cell::Cell::new(0));
    for cl in claims.iter().take(1000) {
        features::compute(cl, &counting, &weir::graph::Summary::default());
    }
    println!(
        "history events visited per claim (mean over the 1,000 benchmarked claims): {:.0}",
        counting.1.get() as f64 / 1000.0
    );
    let routing = Routing::default();
    // Linked as the champion was trained (caps measured on its training part).
    let graph = champion.artifact.graph.clone();
    println!("graph caps: {:?}", graph.caps);
    let fvs: Vec<FeatureVector> = claims
        .iter()
        .take(1000)
        .map(|cl| features::compute_in_memory(cl, &history, &graph))
        .collect();
    let mut g = c.benchmark_group("score");
    g.throughput(Throughput::Elements(1));
    let mut i = 0usize;
    // The claims graph alone: the claim's component (what features_with_history adds to the
    // history features).
    g.bench_function("graph_component", |b| {
        b.iter(|| {
            i = (i + 1) % 1000;
            black_box(weir::graph::component_of_new(&history, &graph, &claims[i]).is_ok())
        })
    });
    g.bench_function("features_with_history", |b| {
        b.iter(|| {
            i = (i + 1) % 1000;
            black_box(features::compute_in_memory(&claims[i], &history, &graph))
        })
    });
    g.bench_function("model_and_outliers", |b| {
        b.iter(|| {
            i = (i + 1) % 1000;
            black_box(model.score(&fvs[i]))
        })
    });
    g.bench_function("rules", |b| {
        b.iter(|| {
            i = (i + 1) % 1000;
            black_box(rules::route(
                &rules,
                &routing,
                &Inputs {
                    claim_id: &claims[i].claim_id,
                    features: &fvs[i],
                    probability: 0.3,
                    outlier_score: 0.5,
                    claimed_amount: claims[i].claimed_amount,
                    model_threshold: model.artifact.threshold,
                },
            ))
        })
    });
    // Features, model with reasons, outlier score and rules: what intake runs per claim.
    let whole = |m: &Model, cl: &weir::claim::Claim| {
        let fv = features::compute_in_memory(cl, &history, &graph);
        let s = m.score(&fv);
        rules::route(
            &rules,
            &routing,
            &Inputs {
                claim_id: &cl.claim_id,
                features: &fv,
                probability: s.probability,
                outlier_score: s.outlier_score,
                claimed_amount: cl.claimed_amount,
                model_threshold: m.artifact.threshold,
            },
        )
    };
    for (name, m) in [
        ("whole_core", &model),
        ("whole_core_default_champion", &champion),
    ] {
        g.bench_function(name, |b| {
            b.iter(|| {
                i = (i + 1) % 1000;
                black_box(whole(m, &claims[i]))
            })
        });
    }
    g.finish();
}

/// The standardised feature matrix and labels of `n` invented claims, featurised in time
/// order by the training code itself (`train::featurise`).
pub fn matrix(n: usize) -> (Array2<f64>, Vec<bool>) {
    let mut rows: Vec<train::TrainingRow> = weir::demo_data::generate_long(n, 11)
        .into_iter()
        .enumerate()
        .map(|(i, d)| train::TrainingRow {
            line: i + 1,
            claim: d.claim,
            outcome: Some(d.outcome),
        })
        .collect();
    let fvs = train::featurise(&mut rows, &weir::graph::Settings::default(), false);
    let x = Array2::from_shape_fn((fvs.len(), N_FEATURES), |(r, c)| fvs[r][c]);
    let y = rows
        .iter()
        .map(|r| r.outcome.and_then(|o| o.label()).unwrap_or(false))
        .collect();
    let s = Standardiser::fit(x.view());
    (s.apply(x.view()), y)
}

fn training(c: &mut Criterion) {
    let (z, y) = matrix(100_000);
    let mut g = c.benchmark_group("fit_100k");
    g.sample_size(10);
    g.throughput(Throughput::Elements(z.nrows() as u64));
    g.bench_function("logistic_regression", |b| {
        b.iter(|| black_box(Logistic::fit(z.view(), &y, 10.0).unwrap()))
    });
    g.bench_function("kmeans_k8", |b| {
        b.iter_batched(
            || KMeansSettings::new(8, 1),
            |s| black_box(OutlierModel::fit(z.view(), &s).unwrap()),
            BatchSize::SmallInput,
        )
    });
    let w: Vec<f64> = y.iter().map(|&v| if v { 20.0 } else { 1.0 }).collect();
    g.bench_function("boosted_trees_150", |b| {
        b.iter(|| {
            black_box(
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
                )
                .unwrap(),
            )
        })
    });
    g.finish();
}

criterion_group!(benches, scoring, training);
criterion_main!(benches);
