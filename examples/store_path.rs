//! The decide path on the embedded store without HTTP: invented claims decided one after
//! another by `Service::decide` (lock, head, history features, model, rules, one store write),
//! then one flush; prints the time per claim for each part. What the service load benchmark
//! measures minus the HTTP stack and the group-commit waits, so the store's own cost is seen
//! alone (and can be profiled alone: `perf record -g target/release/examples/store_path`).
//!
//! `cargo run --release --example store_path -- CONFIG [CLAIMS] [--spread-days D]` (CONFIG as
//! for `weir serve`; its store path should be an empty folder). With `--spread-days`, decision
//! times are spread evenly over the D days before now, as a store filled over that time would
//! hold them (monitoring windows then see a realistic share); it also fills a store for the
//! resident-memory measurement of `weir serve` on millions of claims.

use std::time::Instant;

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    let config = args
        .get(1)
        .ok_or_else(|| anyhow::anyhow!("usage: store_path CONFIG [CLAIMS]"))?;
    let n: usize = args
        .get(2)
        .filter(|a| !a.starts_with("--"))
        .map_or(Ok(50_000), |s| s.parse())?;
    let spread_days: i64 = args
        .iter()
        .position(|a| a == "--spread-days")
        .and_then(|i| args.get(i + 1))
        .map_or(Ok(0), |s| s.parse())?;
    let config = weir::config::Config::load(Some(std::path::Path::new(config)))?;
    let store = weir::store::SledStore::open(
        &config.store.path,
        config.store.cache_mb << 20,
        config.store.history_cache_mb << 20,
    )?;
    let model = weir::model::Model::new(weir::model::ModelArtifact::read(&config.paths.model)?)?;
    let rules = weir::rules::RuleSet::read(&config.paths.rules)?;
    let svc = weir::service::Service::new(
        weir::store::Store::from_backend(std::sync::Arc::new(store.clone())),
        model,
        rules,
        config.routing.clone(),
        3600,
    );
    let claims: Vec<_> = weir::demo_data::generate_long(n, 7)
        .into_iter()
        .map(|d| d.claim)
        .collect();
    let now = chrono::Utc::now();
    let span_ms = spread_days * 86_400_000;
    let t = Instant::now();
    let mut queued = 0usize;
    for (i, c) in claims.into_iter().enumerate() {
        let back = span_ms - span_ms * i as i64 / n.max(1) as i64;
        let (rec, _) = svc.decide(c, now - chrono::Duration::milliseconds(back))?;
        if (i + 1) % 500_000 == 0 {
            eprintln!("{} claims, {:.0} s", i + 1, t.elapsed().as_secs_f64());
        }
        queued += usize::from(rec.queue != weir::rules::Queue::NoReview);
    }
    let decide = t.elapsed().as_secs_f64();
    let t = Instant::now();
    svc.store.flush()?;
    let flush = t.elapsed().as_secs_f64();
    let scoring = svc.metrics.scoring_seconds.get_sample_sum();
    let (hits, misses) = store.history_cache_counts();
    println!(
        "entity histories: {hits} answered from memory, {misses} read from the index ({:.1}% from memory)",
        100.0 * hits as f64 / (hits + misses).max(1) as f64
    );
    println!(
        "{n} claims ({queued} queued): decide {:.1} µs/claim, of which features+model+rules {:.1} µs; final flush {:.0} ms; {:.0} claims/s",
        decide / n as f64 * 1e6,
        scoring / n as f64 * 1e6,
        flush * 1e3,
        n as f64 / decide
    );
    Ok(())
}
