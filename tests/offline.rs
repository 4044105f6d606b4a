//! The offline job end to end: demo data → training → artifact → scoring, bad training input,
//! and the analyst commands run as a user would run them.

use std::io::Cursor;
use std::process::Command;
use weir::config::Config;
use weir::demo_data::{self, Mechanism};
use weir::features::{self, MemoryHistory};
use weir::model::{ArtifactError, Model, ModelArtifact};
use weir::train::{self, BadLines};

fn demo_file(n: usize, seed: u64) -> (String, Vec<demo_data::DemoClaim>) {
    let claims = demo_data::generate(n, seed);
    let text = claims
        .iter()
        .map(|c| c.to_training_json())
        .collect::<Vec<_>>()
        .join("\n");
    (text, claims)
}

fn quick_config() -> Config {
    let mut c = Config::default();
    c.training.alphas = vec![1.0, 10.0];
    c.training.trees.iterations = vec![60];
    c.training.trees.search = 2;
    c
}

#[test]
fn training_finds_the_planted_mechanisms_on_held_out_claims() {
    let (text, claims) = demo_file(7000, 11);
    let loaded = train::load(Cursor::new(text), BadLines::Refuse).unwrap();
    let trained = train::train(loaded, &quick_config(), false).unwrap();
    let r = &trained.report;
    // The champion beside the best logistic, the best trees and their blend (each once).
    assert!(
        (2..=3).contains(&r.held_out.len()),
        "finalists side by side: {:?}",
        r.held_out.iter().map(|h| &h.model).collect::<Vec<_>>()
    );
    let champ = &r.held_out[0];
    let auc = champ.auc.unwrap();
    println!("{}", serde_json::to_string_pretty(&r.held_out).unwrap());
    assert!(auc > 0.85, "held-out AUC {auc}");
    for h in &r.held_out {
        // Calibration: mean predicted probability within a factor of two of the base rate.
        let mean_p: f64 = h
            .calibration
            .iter()
            .map(|b| b.mean_predicted * b.count as f64)
            .sum::<f64>()
            / r.data.test_rows as f64;
        let base = r.data.test_positives as f64 / r.data.test_rows as f64;
        assert!(
            mean_p > base / 2.0 && mean_p < base * 2.0,
            "{}: mean p {mean_p} vs base rate {base}",
            h.model
        );
    }

    // Score the held-out claims again through the artifact, as the service will, and see
    // which planted mechanisms reach the top of the queue.
    let model = Model::new(ModelArtifact::from_json(&trained.artifact.to_json()).unwrap()).unwrap();
    let mut history = MemoryHistory::new();
    let split = chrono::DateTime::parse_from_rfc3339(&r.data.split_at).unwrap();
    let mut scored = Vec::new();
    for c in &claims {
        let fv = features::compute_in_memory(&c.claim, &history, &model.artifact.graph);
        history.record(&c.claim);
        if c.claim.reported_at >= split && c.outcome.label().is_some() {
            scored.push((model.score(&fv).probability, c.mechanism));
        }
    }
    scored.sort_by(|a, b| b.0.total_cmp(&a.0));
    let k = r.rule.capacity_k.min(scored.len());
    let found = |m: Mechanism| {
        let total = scored.iter().filter(|s| s.1 == m).count();
        let top = scored[..k].iter().filter(|s| s.1 == m).count();
        (top, total)
    };
    for m in [
        Mechanism::Ring,
        Mechanism::EarlyLoss,
        Mechanism::StagedTheft,
    ] {
        let (top, total) = found(m);
        println!("{m:?}: {top} of {total} in the top {k}");
        assert!(total > 0, "{m:?} absent from the held-out part");
        assert!(
            top * 2 >= total,
            "{m:?}: only {top} of {total} in the top {k}"
        );
    }
    // The top of the queue is far richer in referral-worthy claims than the stream.
    let base = r.data.test_positives as f64 / r.data.test_rows as f64;
    let lift = champ.precision_at_capacity.unwrap() / base;
    assert!(
        lift > 5.0,
        "precision at capacity is only {lift:.1} times the base rate"
    );
}

#[test]
fn bad_training_lines_are_named_and_skipped_or_refused() {
    let (text, _) = demo_file(400, 5);
    let mut lines: Vec<String> = text.lines().map(String::from).collect();
    lines[2] = "{not json".into();
    lines[5] = lines[5].replace(",\"outcome\":\"genuine\"", "");
    lines[8] = lines[8]
        .replace("\"line\":\"motor\"", "\"line\":\"boat\"")
        .replace("\"line\":\"home\"", "\"line\":\"boat\"");
    let dup = lines[10].clone();
    lines.push(dup);
    let text = lines.join("\n");

    let err = train::load(Cursor::new(text.clone()), BadLines::Refuse).unwrap_err();
    assert!(err.to_string().starts_with("line 3: not JSON"), "{err}");

    let loaded = train::load(Cursor::new(text), BadLines::Skip).unwrap();
    let problems: Vec<(usize, &str)> = loaded
        .skipped
        .iter()
        .map(|p| (p.line, p.problem.as_str()))
        .collect();
    assert_eq!(problems.len(), 4, "{problems:?}");
    assert_eq!(problems[0].0, 3);
    assert!(problems[1].1.contains("outcome: required"), "{problems:?}");
    assert!(problems[1].1.contains("unadjudicated"), "{problems:?}");
    assert_eq!(problems[1].0, 6);
    assert!(
        problems[2].1.contains("line: unknown line of business"),
        "{problems:?}"
    );
    assert_eq!(problems[3].0, 401);
    assert!(problems[3].1.contains("appears on an earlier line"));
    assert_eq!(loaded.rows.len(), 397);
}

#[test]
fn artifact_round_trips_exactly_and_refuses_tampering() {
    let (text, claims) = demo_file(1500, 2);
    let mut cfg = quick_config();
    cfg.training.trees.enabled = false;
    let trained = train::train(
        train::load(Cursor::new(text), BadLines::Refuse).unwrap(),
        &cfg,
        false,
    )
    .unwrap();
    let json = trained.artifact.to_json();
    let back = ModelArtifact::from_json(&json).unwrap();
    // Exact f64 round trip needs serde_json's float_roundtrip feature.
    assert_eq!(back, trained.artifact);
    let a = Model::new(trained.artifact.clone()).unwrap();
    let b = Model::new(back).unwrap();
    let fv = features::compute_in_memory(
        &claims[100].claim,
        &MemoryHistory::new(),
        &weir::graph::Settings::default(),
    );
    assert_eq!(a.score(&fv), b.score(&fv));

    let tampered = json.replacen("\"threshold\": ", "\"threshold\": 1", 1);
    assert!(matches!(
        ModelArtifact::from_json(&tampered),
        Err(ArtifactError::Hash { .. })
    ));
    let mut wrong = trained.artifact.clone();
    wrong.features[0] = "shoe_size".into();
    wrong.seal();
    let err = Model::new(wrong).unwrap_err();
    assert!(err.to_string().contains("shoe_size"), "{err}");
    let mut short = trained.artifact.clone();
    short.standardiser.mean.pop();
    short.seal();
    assert!(matches!(Model::new(short), Err(ArtifactError::Shape(_))));
}

#[test]
fn protected_attribute_in_feature_list_is_refused() {
    let mut cfg = Config::default();
    cfg.training.features = vec!["night_loss".into()];
    cfg.training.protected_attributes = vec!["night".into()];
    let (text, _) = demo_file(300, 1);
    let err = train::train(
        train::load(Cursor::new(text), BadLines::Refuse).unwrap(),
        &cfg,
        false,
    )
    .err()
    .unwrap();
    assert!(err.to_string().contains("protected attribute"), "{err}");
}

fn weir(args: &[&str]) -> (bool, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_weir"))
        .args(args)
        .output()
        .unwrap();
    (
        out.status.success(),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

fn fixture(name: &str) -> serde_json::Value {
    let path = format!(
        "{}/tests/reference/fixtures/{name}",
        env!("CARGO_MANIFEST_DIR")
    );
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

/// `weir evaluate` on the Fawcett (2006) Fig. 3 instances (from memory) against the values
/// scikit-learn computed for the fixture.
#[test]
fn evaluate_command_matches_the_oracle() {
    let f = fixture("fawcett_2006.json");
    let dir = tempdir();
    let csv = dir.join("scores.csv");
    let mut text = String::from("score,label\n");
    for (s, y) in f["scores"]
        .as_array()
        .unwrap()
        .iter()
        .zip(f["labels"].as_array().unwrap())
    {
        text.push_str(&format!("{s},{y}\n"));
    }
    std::fs::write(&csv, text).unwrap();
    let (ok, out, err) = weir(&[
        "evaluate",
        "--scores",
        csv.to_str().unwrap(),
        "--threshold",
        "0.54",
        "--top-k",
        "10",
    ]);
    assert!(ok, "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).unwrap();
    for key in [
        "auc",
        "accuracy",
        "precision",
        "recall",
        "specificity",
        "f1",
        "precision_at_k",
    ] {
        let (a, b) = (v[key].as_f64().unwrap(), f[key].as_f64().unwrap());
        assert!((a - b).abs() < 1e-12, "{key}: {a} vs {b}");
    }
    assert_eq!(v["confusion"], f["confusion"]);

    std::fs::write(&csv, "score,label\n0.3,1\nabc,0\n").unwrap();
    let (ok, _, err) = weir(&["evaluate", "--scores", csv.to_str().unwrap()]);
    assert!(!ok);
    assert!(err.contains("line 3, column score"), "{err}");
}

/// `weir drift` against SciPy's ks_2samp and a NumPy PSI (fixture drift.json).
#[test]
fn drift_command_matches_the_oracle() {
    let f = fixture("drift.json");
    let dir = tempdir();
    let write = |name: &str, key: &str| {
        let p = dir.join(name);
        let mut t = String::from("id,texture\n");
        for (i, v) in f[key].as_array().unwrap().iter().enumerate() {
            t.push_str(&format!("{i},{v}\n"));
        }
        std::fs::write(&p, t).unwrap();
        p
    };
    let a = write("a.csv", "baseline");
    let b = write("b.csv", "current");
    let (ok, out, err) = weir(&[
        "drift",
        "--baseline",
        a.to_str().unwrap(),
        "--current",
        b.to_str().unwrap(),
        "--column",
        "texture",
    ]);
    assert!(ok, "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).unwrap();
    assert!((v["psi"].as_f64().unwrap() - f["psi"].as_f64().unwrap()).abs() < 1e-12);
    assert!((v["ks"].as_f64().unwrap() - f["ks"].as_f64().unwrap()).abs() < 1e-12);
    assert_eq!(v["band"], "shifted");
    let (ok, _, err) = weir(&[
        "drift",
        "--baseline",
        a.to_str().unwrap(),
        "--current",
        b.to_str().unwrap(),
        "--column",
        "nope",
    ]);
    assert!(!ok && err.contains("no column \"nope\""), "{err}");
}

fn tempdir() -> std::path::PathBuf {
    use std::sync::atomic::{AtomicUsize, Ordering};
    static N: AtomicUsize = AtomicUsize::new(0);
    let p = std::env::temp_dir().join(format!(
        "weir-test-{}-{}",
        std::process::id(),
        N.fetch_add(1, Ordering::SeqCst)
    ));
    std::fs::create_dir_all(&p).unwrap();
    p
}
