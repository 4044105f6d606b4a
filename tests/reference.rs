//! weir's computations checked against outside oracles. Each fixture under
//! `tests/reference/fixtures/` was written by `tests/reference/make_fixtures.py` with
//! scikit-learn, SciPy, NumPy and networkx on data sets bundled in scikit-learn and networkx;
//! each check names its source beside it.

use ndarray::Array2;
use serde_json::Value;
use weir::metrics::{self, Confusion};
use weir::model::{Isotonic, Logistic, Platt, TreeSettings, Trees, sigmoid};
use weir::monitor::drift;
use weir::outliers::{KMeansSettings, OutlierModel};

fn fixture(name: &str) -> Value {
    let path = format!(
        "{}/tests/reference/fixtures/{name}",
        env!("CARGO_MANIFEST_DIR")
    );
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
    serde_json::from_str(&text).unwrap()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

fn bools(v: &Value) -> Vec<bool> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_i64().unwrap() == 1)
        .collect()
}

fn matrix(v: &Value) -> Array2<f64> {
    let rows: Vec<Vec<f64>> = v.as_array().unwrap().iter().map(floats).collect();
    let (n, d) = (rows.len(), rows[0].len());
    Array2::from_shape_vec((n, d), rows.into_iter().flatten().collect()).unwrap()
}

fn close(a: f64, b: f64, tol: f64, what: &str) {
    assert!(
        (a - b).abs() <= tol,
        "{what}: weir {a} vs reference {b} (tolerance {tol})"
    );
}

fn check_classification(f: &Value, label: &str) {
    let s = floats(&f["scores"]);
    let y = bools(&f["labels"]);
    let t = f["threshold"].as_f64().unwrap();
    let k = f["k"].as_u64().unwrap() as usize;
    let e = metrics::evaluate(&s, &y, t, k);
    close(
        e.auc.unwrap(),
        f["auc"].as_f64().unwrap(),
        1e-12,
        &format!("{label} auc"),
    );
    close(
        e.average_precision.unwrap(),
        f["average_precision"].as_f64().unwrap(),
        1e-12,
        &format!("{label} average precision"),
    );
    let c = &f["confusion"];
    assert_eq!(
        e.confusion,
        Confusion {
            tp: c["tp"].as_u64().unwrap(),
            fp: c["fp"].as_u64().unwrap(),
            tn: c["tn"].as_u64().unwrap(),
            fn_: c["fn"].as_u64().unwrap(),
        },
        "{label} confusion"
    );
    for (name, ours) in [
        ("accuracy", e.accuracy),
        ("precision", e.precision),
        ("recall", e.recall),
        ("specificity", e.specificity),
        ("f1", e.f1),
        ("precision_at_k", e.precision_at_k),
    ] {
        close(
            ours.unwrap(),
            f[name].as_f64().unwrap(),
            1e-12,
            &format!("{label} {name}"),
        );
    }
    // ROC curve point by point (scikit-learn roc_curve, drop_intermediate=False).
    let curve = metrics::roc_curve(&s, &y);
    let fpr = floats(&f["roc_fpr"]);
    let tpr = floats(&f["roc_tpr"]);
    assert_eq!(curve.len(), fpr.len(), "{label} roc points");
    for (i, p) in curve.iter().enumerate() {
        close(p.fpr, fpr[i], 1e-12, &format!("{label} fpr[{i}]"));
        close(p.tpr, tpr[i], 1e-12, &format!("{label} tpr[{i}]"));
        if let Some(th) = f["roc_thresholds"][i].as_f64() {
            close(p.threshold, th, 1e-12, &format!("{label} threshold[{i}]"));
        }
    }
}

/// Source: scikit-learn `roc_auc_score`, `average_precision_score`, `confusion_matrix`,
/// `precision/recall/f1/accuracy_score`, `roc_curve` on the Wisconsin breast cancer data
/// bundled in scikit-learn (score = mean radius, which has ties; positive = malignant).
#[test]
fn classification_metrics_match_scikit_learn_on_breast_cancer() {
    check_classification(&fixture("metrics_breast_cancer.json"), "breast cancer");
}

/// Source: Fawcett, "An introduction to ROC analysis", Pattern Recognition Letters 27 (2006),
/// Fig. 3: 10 positives, 10 negatives. The instances are from memory; the paper's text places
/// threshold 0.54 at ROC point (0.1, 0.5), which is checked here, and scikit-learn computed the
/// other values in the fixture.
#[test]
fn fawcett_twenty_instance_example() {
    let f = fixture("fawcett_2006.json");
    check_classification(&f, "Fawcett");
    let s = floats(&f["scores"]);
    let y = bools(&f["labels"]);
    let c = Confusion::at_threshold(&s, &y, 0.54);
    assert_eq!((c.fp as f64 / 10.0, c.tp as f64 / 10.0), (0.1, 0.5));
}

/// Source: scikit-learn `calibration_curve(strategy="uniform", n_bins=10)`.
#[test]
fn calibration_table_matches_scikit_learn() {
    let f = fixture("metrics_breast_cancer.json");
    let p = floats(&f["calibration_probs"]);
    let y = bools(&f["labels"]);
    let table = metrics::calibration_table(&p, &y, 10);
    let obs = floats(&f["calibration_observed"]);
    let mean = floats(&f["calibration_mean_predicted"]);
    assert_eq!(table.len(), obs.len());
    for (i, b) in table.iter().enumerate() {
        close(b.observed_rate, obs[i], 1e-12, &format!("observed[{i}]"));
        close(
            b.mean_predicted,
            mean[i],
            1e-12,
            &format!("mean predicted[{i}]"),
        );
    }
}

/// Source: scikit-learn `KMeans(init=rows 0, 50, 100 of iris, n_init=1, algorithm="lloyd")`
/// on Fisher's iris as bundled in scikit-learn. scikit-learn's `inertia_` is a sum of squared
/// distances; linfa reports the mean, weir stores the sum.
#[test]
fn kmeans_matches_scikit_learn_on_iris() {
    let f = fixture("kmeans_iris.json");
    let x = matrix(&f["x"]);
    let mut s = KMeansSettings::new(3, 0);
    s.init = Some(matrix(&f["init"]));
    s.tolerance = 1e-12;
    s.max_iterations = 1000;
    let m = OutlierModel::fit(x.view(), &s).unwrap();
    let want = matrix(&f["centres"]);
    for (i, c) in m.centres.iter().enumerate() {
        for (j, v) in c.iter().enumerate() {
            close(*v, want[[i, j]], 1e-9, &format!("centre[{i}][{j}]"));
        }
    }
    close(
        m.inertia,
        f["inertia_sum"].as_f64().unwrap(),
        1e-8,
        "inertia (sum)",
    );
    let labels: Vec<u64> = f["labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_u64().unwrap())
        .collect();
    for k in 0..3u64 {
        let n = labels.iter().filter(|&&l| l == k).count() as u64;
        assert_eq!(m.sizes[k as usize], n, "cluster {k} size");
    }
}

/// Source: scikit-learn `LogisticRegression(C=1/alpha, solver="lbfgs", tol=1e-12)` on the
/// standardised breast cancer data. Malignant (the positive class) is the *less* frequent
/// class, so a solver that mixed up which class is positive would fail here.
#[test]
fn logistic_regression_matches_scikit_learn_on_breast_cancer() {
    let f = fixture("logistic_breast_cancer.json");
    let z = matrix(&f["z"]);
    let y = bools(&f["y"]);
    for fit in f["fits"].as_array().unwrap() {
        let alpha = fit["alpha"].as_f64().unwrap();
        let ours = Logistic::fit(z.view(), &y, alpha).unwrap();
        let coef = floats(&fit["coef"]);
        // Both solve the same strictly convex problem (scikit-learn's L-BFGS with tol 1e-12,
        // which also stops on a small relative change of the objective; weir's Newton to a
        // gradient of 1e-10 per row); the coefficients agree to about 1e-6.
        for (i, (a, b)) in ours.coef.iter().zip(&coef).enumerate() {
            close(*a, *b, 1e-5, &format!("alpha {alpha} coef[{i}]"));
        }
        close(
            ours.intercept,
            fit["intercept"].as_f64().unwrap(),
            1e-5,
            "intercept",
        );
        let proba = floats(&fit["proba"]);
        for (i, row) in z.outer_iter().enumerate() {
            let p = sigmoid(ours.margin(&row.to_vec()));
            close(p, proba[i], 1e-6, &format!("alpha {alpha} proba[{i}]"));
        }
    }
}

/// Source: scikit-learn `LogisticRegression(C=inf)` on one feature: Platt scaling is exactly
/// an unpenalised one-feature logistic regression.
#[test]
fn platt_scaling_matches_unpenalised_logistic_regression() {
    let f = fixture("platt_breast_cancer.json");
    let p = Platt::fit(&floats(&f["margins"]), &bools(&f["y"]));
    close(p.a, f["a"].as_f64().unwrap(), 1e-6, "Platt a");
    close(p.b, f["b"].as_f64().unwrap(), 1e-6, "Platt b");
}

/// Source: `scipy.stats.ks_2samp(...).statistic` and a NumPy PSI with weir's binning rule
/// (numpy.quantile deciles, `searchsorted(side="left")`, shares floored at 1e-4) on breast
/// cancer mean texture, benign (baseline) against malignant (current); categorical PSI on
/// rounded iris petal length, versicolor against virginica.
#[test]
fn drift_matches_scipy_and_numpy() {
    let f = fixture("drift.json");
    let base = floats(&f["baseline"]);
    let cur = floats(&f["current"]);
    let edges = drift::quantile_edges(&base, 10);
    let want_edges = floats(&f["edges"]);
    assert_eq!(edges.len(), want_edges.len());
    for (a, b) in edges.iter().zip(&want_edges) {
        close(*a, *b, 1e-12, "edge");
    }
    let d = drift::numeric(&base, &cur, 10);
    let counts: Vec<u64> = d.bins.iter().map(|b| b.current_count).collect();
    let want: Vec<u64> = f["current_counts"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_u64().unwrap())
        .collect();
    assert_eq!(counts, want);
    close(d.psi, f["psi"].as_f64().unwrap(), 1e-12, "psi");
    close(d.ks.unwrap(), f["ks"].as_f64().unwrap(), 1e-12, "ks");
    let strings = |v: &Value| -> Vec<String> {
        v.as_array()
            .unwrap()
            .iter()
            .map(|s| s.as_str().unwrap().to_string())
            .collect()
    };
    let c = drift::categorical(
        &strings(&f["categorical_baseline"]),
        &strings(&f["categorical_current"]),
    );
    close(
        c.psi,
        f["categorical_psi"].as_f64().unwrap(),
        1e-12,
        "categorical psi",
    );
}

/// Source: SciPy `binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")`.
#[test]
fn wilson_interval_matches_scipy() {
    use weir::monitor::quality::{Z95, wilson};
    let f = fixture("wilson.json");
    for c in f["cases"].as_array().unwrap() {
        let (k, n) = (c["k"].as_u64().unwrap(), c["n"].as_u64().unwrap());
        let (lo, hi) = wilson(k, n, Z95).unwrap();
        close(
            lo,
            c["low"].as_f64().unwrap(),
            1e-12,
            &format!("wilson low {k}/{n}"),
        );
        close(
            hi,
            c["high"].as_f64().unwrap(),
            1e-12,
            &format!("wilson high {k}/{n}"),
        );
    }
}

/// Source: scikit-learn `IsotonicRegression(out_of_bounds="clip")` fitted on the standardised
/// mean radius of breast cancer (bundled in scikit-learn), which has ties; compared at the
/// training points and at query points between, on and beyond the knots.
#[test]
fn isotonic_calibration_matches_scikit_learn() {
    let f = fixture("isotonic_breast_cancer.json");
    let iso = Isotonic::fit(&floats(&f["x"]), &bools(&f["y"]));
    let q = floats(&f["queries"]);
    let want = floats(&f["predicted"]);
    for (i, (&x, &w)) in q.iter().zip(&want).enumerate() {
        close(
            iso.apply(x),
            w,
            1e-12,
            &format!("isotonic at query {i} ({x})"),
        );
    }
    let x = floats(&f["x"]);
    let fitted = floats(&f["fitted"]);
    for (i, (&v, &w)) in x.iter().zip(&fitted).enumerate() {
        close(iso.apply(v), w, 1e-12, &format!("isotonic fitted[{i}]"));
    }
}

/// Source: a direct NumPy computation of expected calibration error (ten equal-width bins,
/// |mean predicted − observed rate| weighted by the bin's share) on scikit-learn's isotonic
/// fit above.
#[test]
fn expected_calibration_error_matches_a_direct_computation() {
    let f = fixture("isotonic_breast_cancer.json");
    let ece = metrics::expected_calibration_error(&floats(&f["fitted"]), &bools(&f["y"]), 10);
    close(
        ece.unwrap(),
        f["ece_of_fitted"].as_f64().unwrap(),
        1e-12,
        "ECE",
    );
}

/// Source: forust-ml's own `predict` and `predict_contributions(ContributionsMethod::Average)`,
/// against weir's walk of the same trees, on the standardised breast cancer data bundled in
/// scikit-learn (depth 5, 60 rounds, so that missing-free splits of every depth are taken).
#[test]
fn tree_walk_matches_forust_predictions_and_contributions() {
    let f = fixture("logistic_breast_cancer.json");
    let z = matrix(&f["z"]);
    let y = bools(&f["y"]);
    let settings = TreeSettings {
        iterations: 60,
        learning_rate: 0.1,
        max_depth: 5,
        min_leaf_weight: 1.0,
        seed: 3,
    };
    let t = Trees::fit(z.view(), &y, &vec![1.0; y.len()], &settings).unwrap();
    let ours = t.margins(z.view());
    let theirs = t.forust_margins(z.view());
    for (i, row) in z.outer_iter().enumerate() {
        close(ours[i], theirs[i], 1e-9, &format!("margin[{i}]"));
        let row = row.to_vec();
        let mut c = vec![0.0; row.len()];
        let m = t.margin_and_contributions(&row, &mut c);
        close(
            m,
            theirs[i],
            1e-9,
            &format!("margin with contributions[{i}]"),
        );
        for (j, (a, b)) in c.iter().zip(t.forust_contributions(&row)).enumerate() {
            close(*a, b, 1e-9, &format!("contribution[{i}][{j}]"));
        }
    }
}

/// A claim for the graph checks: its own claimant and policy, the parties given, reported
/// `hour` hours into 2025.
fn graph_claim(id: &str, hour: i64, parties: &[(&str, String)]) -> weir::claim::Claim {
    let at = chrono::DateTime::from_timestamp(1_735_689_600 + hour * 3600, 0).unwrap();
    let parties: Vec<Value> = parties
        .iter()
        .map(|(role, pid)| serde_json::json!({"role": role, "id": pid}))
        .collect();
    weir::claim::Claim::from_value(&serde_json::json!({
        "claim_id": id, "policy_id": format!("P-{id}"), "claimant_id": format!("K-{id}"),
        "line": "motor", "loss_date": "2024-12-30", "reported_at": at.to_rfc3339(),
        "policy_start": "2024-01-01", "claimed_amount": 1000.0, "sum_insured": 20000.0,
        "currency": "EUR", "parties": parties,
        "circumstances": {"police_report": true, "injury": false, "total_loss": false, "theft": false}
    }))
    .unwrap_or_else(|e| panic!("{e:?}"))
}

fn ids_of(v: &Value) -> Vec<Vec<usize>> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|g| {
            g.as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_u64().unwrap() as usize)
                .collect()
        })
        .collect()
}

/// Settings for the checks: only witnesses and third parties can be hubs (at `cap`).
fn graph_settings(cap: u32) -> weir::graph::Settings {
    weir::graph::Settings {
        hub_floor: 1_000_000,
        max_claims: 10_000,
        caps: [
            ("witness".to_string(), cap),
            ("third_party".to_string(), cap),
        ]
        .into_iter()
        .collect(),
        ..weir::graph::Settings::default()
    }
}

/// The groups of claims weir's components form, each sorted, as claim numbers.
fn weir_groups(
    history: &weir::features::MemoryHistory,
    settings: &weir::graph::Settings,
    n: usize,
    prefix: &str,
) -> Vec<Vec<usize>> {
    use weir::graph::GraphSource;
    let mut seen = vec![false; n];
    let mut groups = Vec::new();
    for i in 0..n {
        if seen[i] {
            continue;
        }
        let h = weir::features::stable_hash(&format!("{prefix}{i}"));
        let seed = history.nodes(&[h]).unwrap().pop().flatten().unwrap();
        let c = weir::graph::component(history, settings, seed, i64::MIN, i64::MAX, true).unwrap();
        assert!(!c.truncated);
        let mut g: Vec<usize> = c
            .members
            .iter()
            .map(|m| m.claim_id[prefix.len()..].parse().unwrap())
            .collect();
        g.sort_unstable();
        for &j in &g {
            seen[j] = true;
        }
        groups.push(g);
    }
    groups.sort();
    groups
}

/// Source: networkx.connected_components on networkx.karate_club_graph(), read as claims
/// (friendships) naming two parties (members); members with more than `cap` friendships are
/// hubs and link nothing (tests/reference/make_fixtures.py, section 9a).
#[test]
fn components_match_networkx_on_the_karate_club_with_hubs_cut() {
    let f = fixture("components.json");
    let k = &f["karate"];
    let cap = k["cap"].as_u64().unwrap() as u32;
    let edges = ids_of(&k["edges"]);
    let mut history = weir::features::MemoryHistory::new();
    for (i, e) in edges.iter().enumerate() {
        history.record(&graph_claim(
            &format!("KC-{i}"),
            i as i64,
            &[
                ("witness", format!("M{}", e[0])),
                ("witness", format!("M{}", e[1])),
            ],
        ));
    }
    let settings = graph_settings(cap);
    let got = weir_groups(&history, &settings, edges.len(), "KC-");
    assert_eq!(got, ids_of(&k["claim_groups"]));
    // The hubs weir reports are networkx's members above the cap.
    let mut hubs = std::collections::BTreeSet::new();
    for i in 0..edges.len() {
        use weir::graph::GraphSource;
        let seed = history
            .nodes(&[weir::features::stable_hash(&format!("KC-{i}"))])
            .unwrap()
            .pop()
            .flatten()
            .unwrap();
        let c =
            weir::graph::component(&history, &settings, seed, i64::MIN, i64::MAX, true).unwrap();
        hubs.extend(c.hubs.iter().map(|h| h.key.clone()));
    }
    let want: std::collections::BTreeSet<String> = k["hubs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|m| format!("witness:M{}", m.as_u64().unwrap()))
        .collect();
    assert_eq!(hubs, want);
}

/// Source: networkx.connected_components on networkx.gnm_random_graph(300, 240, seed=7):
/// each node a claim, each edge a party both its claims name (make_fixtures.py, section 9b).
#[test]
fn components_match_networkx_on_a_random_graph() {
    let f = fixture("components.json");
    let r = &f["random"];
    let n = r["nodes"].as_u64().unwrap() as usize;
    let mut parties: Vec<Vec<(&str, String)>> = vec![Vec::new(); n];
    for (i, e) in ids_of(&r["edges"]).iter().enumerate() {
        parties[e[0]].push(("third_party", format!("E{i}")));
        parties[e[1]].push(("third_party", format!("E{i}")));
    }
    let mut history = weir::features::MemoryHistory::new();
    for (i, p) in parties.iter().enumerate() {
        history.record(&graph_claim(&format!("RG-{i}"), i as i64, p));
    }
    let got = weir_groups(&history, &graph_settings(1000), n, "RG-");
    assert_eq!(got, ids_of(&r["groups"]));
}

/// weir's GraphML is read by a general graph library: networkx.read_graphml, run by
/// python3 (networkx installed by pip: tests/reference/requirements.txt, and `.ci/run`).
/// Skipped, saying so, without python3 and networkx, unless GRAPHML_TEST_REQUIRED is set.
#[test]
fn graphml_is_read_by_networkx() {
    let f = fixture("components.json");
    let edges = ids_of(&f["karate"]["edges"]);
    let mut history = weir::features::MemoryHistory::new();
    for (i, e) in edges.iter().enumerate() {
        history.record(&graph_claim(
            &format!("KC-{i}"),
            i as i64,
            &[
                ("witness", format!("M{}", e[0])),
                ("witness", format!("M{}", e[1])),
            ],
        ));
    }
    use weir::graph::GraphSource;
    let seed = history
        .nodes(&[weir::features::stable_hash("KC-0")])
        .unwrap()
        .pop()
        .flatten()
        .unwrap();
    let c = weir::graph::component(
        &history,
        &graph_settings(10),
        seed,
        i64::MIN,
        i64::MAX,
        true,
    )
    .unwrap();
    let xml = weir::graph::graphml(&c, &|_| weir::graph::MemberFacts {
        queue: "investigate".into(),
        outcome: "".into(),
    });
    let path = std::env::temp_dir().join(format!("weir-graphml-{}.graphml", std::process::id()));
    std::fs::write(&path, &xml).unwrap();
    let script = "import sys, json, networkx as nx\n\
        g = nx.read_graphml(sys.argv[1])\n\
        claims = sorted(n for n, d in g.nodes(data=True) if d.get('kind') == 'claim')\n\
        print(json.dumps({'nodes': g.number_of_nodes(), 'edges': g.number_of_edges(), \
        'components': nx.number_connected_components(g), 'claims': claims, \
        'amount': g.nodes['claim:KC-0']['amount'], 'queue': g.nodes['claim:KC-0']['queue']}))";
    let out = std::process::Command::new("python3")
        .arg("-c")
        .arg(script)
        .arg(&path)
        .output();
    let _ = std::fs::remove_file(&path);
    let out = match out {
        Ok(o) if o.status.success() => o,
        other => {
            let why = match other {
                Ok(o) => String::from_utf8_lossy(&o.stderr).to_string(),
                Err(e) => e.to_string(),
            };
            assert!(
                std::env::var("GRAPHML_TEST_REQUIRED").is_err(),
                "python3 with networkx is needed and GRAPHML_TEST_REQUIRED is set: {why}"
            );
            eprintln!("skipped: python3 with networkx not available ({why})");
            return;
        }
    };
    let got: Value = serde_json::from_slice(&out.stdout).unwrap();
    let ties_edges: usize = c.ties.iter().map(|t| t.claims.len()).sum();
    assert_eq!(got["nodes"], c.members.len() + c.ties.len());
    assert_eq!(got["edges"], ties_edges);
    assert_eq!(got["components"], 1, "a component reads back as one");
    let mut want: Vec<String> = c
        .members
        .iter()
        .map(|m| format!("claim:{}", m.claim_id))
        .collect();
    want.sort();
    assert_eq!(got["claims"], serde_json::json!(want));
    assert_eq!(got["amount"], 1000.0);
    assert_eq!(got["queue"], "investigate");
}
