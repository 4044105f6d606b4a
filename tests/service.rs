//! The service driven in process (`tower::ServiceExt::oneshot` on `http::app`) and as a real
//! `weir serve` process on port 0, including a restart on the same sled folder.

use axum::body::Body;
use axum::http::{Method, Request, StatusCode};
use http_body_util::BodyExt;
use serde_json::{Value, json};
use std::io::Cursor;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;
use tower::ServiceExt;
use weir::config::Config;
use weir::http::{self, HttpSettings};
use weir::model::Model;
use weir::rules::{Queue, Routing, RuleSet};
use weir::service::Service;
use weir::store::Store;
use weir::train::{self, BadLines};

mod common;

fn tempdir(tag: &str) -> PathBuf {
    use std::sync::atomic::{AtomicUsize, Ordering};
    static N: AtomicUsize = AtomicUsize::new(0);
    let p = std::env::temp_dir().join(format!(
        "weir-svc-{tag}-{}-{}",
        std::process::id(),
        N.fetch_add(1, Ordering::SeqCst)
    ));
    let _ = std::fs::remove_dir_all(&p);
    std::fs::create_dir_all(&p).unwrap();
    p
}

/// A model trained once on invented demo claims, shared by every test.
fn model_path() -> &'static Path {
    static PATH: OnceLock<PathBuf> = OnceLock::new();
    PATH.get_or_init(|| {
        let claims = weir::demo_data::generate(2000, 4);
        let text: Vec<String> = claims.iter().map(|c| c.to_training_json()).collect();
        let mut cfg = Config::default();
        cfg.training.trees.enabled = false;
        cfg.training.alphas = vec![100.0];
        let loaded = train::load(Cursor::new(text.join("\n")), BadLines::Refuse).unwrap();
        let trained = train::train(loaded, &cfg, false).unwrap();
        let dir = tempdir("model");
        let p = dir.join("model.json");
        std::fs::write(&p, trained.artifact.to_json()).unwrap();
        p
    })
}

fn rules_path() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("config/rules.toml")
}

fn settings() -> HttpSettings {
    HttpSettings {
        body_limit_bytes: 16 * 1024,
        concurrency_limit: 64,
        request_timeout: std::time::Duration::from_secs(10),
        batch_limit_bytes: 1024 * 1024,
        batch_line_bytes: 8 * 1024,
        capacities: [
            (Queue::Investigate, 1.5),
            (Queue::DeskCheck, 6.0),
            (Queue::Audit, 1.0),
        ],
        access: std::sync::Arc::new(weir::access::Access::Open),
        retention_days: 0,
        retention_check_hours: 24,
        stream: None,
    }
}

fn service(dir: &Path) -> Service {
    let store = Store::open(&dir.join("store"), 16 * 1024 * 1024).unwrap();
    store.start();
    let model = Model::new(weir::model::ModelArtifact::read(model_path()).unwrap()).unwrap();
    let rules = RuleSet::read(&rules_path()).unwrap();
    Service::new(store, model, rules, Routing::default(), 3600)
}

fn claim(id: &str) -> Value {
    json!({
        "claim_id": id, "policy_id": "P-1", "claimant_id": "K-1", "line": "motor",
        "loss_date": "2025-03-10", "loss_time": "23:15", "reported_at": "2025-03-12T08:00:00Z",
        "policy_start": "2025-03-01", "claimed_amount": 9000.0, "sum_insured": 10000,
        "currency": "EUR",
        "parties": [{"role": "repairer", "id": "R-9"}, {"role": "payee_account", "id": "B-3"}],
        "circumstances": {"police_report": false, "injury": false, "theft": true}
    })
}

async fn call(
    app: &axum::Router,
    method: Method,
    uri: &str,
    ct: Option<&str>,
    body: Vec<u8>,
) -> (StatusCode, String, Value) {
    call_as(app, None, method, uri, ct, body).await
}

async fn call_as(
    app: &axum::Router,
    key: Option<&str>,
    method: Method,
    uri: &str,
    ct: Option<&str>,
    body: Vec<u8>,
) -> (StatusCode, String, Value) {
    let mut req = Request::builder().method(method).uri(uri);
    if let Some(ct) = ct {
        req = req.header("content-type", ct);
    }
    if let Some(k) = key {
        req = req.header("authorization", format!("Bearer {k}"));
    }
    let resp = app
        .clone()
        .oneshot(req.body(Body::from(body)).unwrap())
        .await
        .unwrap();
    let status = resp.status();
    let ctype = resp
        .headers()
        .get("content-type")
        .map(|v| v.to_str().unwrap().to_string())
        .unwrap_or_default();
    let bytes = resp.into_body().collect().await.unwrap().to_bytes();
    let v = serde_json::from_slice(&bytes)
        .unwrap_or(Value::String(String::from_utf8_lossy(&bytes).into()));
    (status, ctype, v)
}

async fn post_claim(app: &axum::Router, v: &Value) -> (StatusCode, String, Value) {
    call(
        app,
        Method::POST,
        "/v1/claims",
        Some("application/json"),
        serde_json::to_vec(v).unwrap(),
    )
    .await
}

#[tokio::test]
async fn claim_in_decision_out_then_idempotent_repost_and_revision() {
    let dir = tempdir("intake");
    let svc = service(&dir);
    let app = http::app(svc.clone(), settings());

    let (status, _, d) = post_claim(&app, &claim("C-1")).await;
    assert_eq!(status, StatusCode::CREATED, "{d}");
    for key in [
        "claim_id",
        "queue",
        "priority",
        "model_probability",
        "outlier_score",
        "reasons",
        "model_version",
        "rules_version",
    ] {
        assert!(d.get(key).is_some(), "decision lacks {key}: {d}");
    }
    assert_eq!(d["status"], "new");
    assert_eq!(d["revision"], 1);
    // A theft 9 days into the policy for 90% of the sum insured fires the new-policy rule.
    let codes: Vec<&str> = d["reasons"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["code"].as_str().unwrap())
        .collect();
    assert!(codes.contains(&"rule.new-policy-large-loss"), "{codes:?}");

    let new_before = svc
        .metrics
        .claims_received
        .with_label_values(&["new"])
        .get();
    let (status, _, again) = post_claim(&app, &claim("C-1")).await;
    assert_eq!(status, StatusCode::OK);
    assert_eq!(again["status"], "duplicate");
    assert_eq!(again["decided_at"], d["decided_at"]);
    assert_eq!(
        svc.metrics
            .claims_received
            .with_label_values(&["new"])
            .get(),
        new_before
    );

    // The same claim with a document-driven change: a new revision, the old one kept.
    let mut changed = claim("C-1");
    changed["claimed_amount"] = json!(9500.0);
    let (status, _, rev) = post_claim(&app, &changed).await;
    assert_eq!(status, StatusCode::CREATED);
    assert_eq!(rev["status"], "revised");
    assert_eq!(rev["revision"], 2);

    let (status, _, view) = call(&app, Method::GET, "/v1/claims/C-1", None, vec![]).await;
    assert_eq!(status, StatusCode::OK);
    assert_eq!(view["revisions"].as_array().unwrap().len(), 2);
    assert_eq!(view["claim"]["claimed_amount"], 9500.0);

    // History counts the claim once, not once per revision: a second claim by the same
    // claimant sees exactly one earlier claim.
    let mut other = claim("C-2");
    other["reported_at"] = json!("2025-03-20T08:00:00Z");
    other["loss_date"] = json!("2025-03-19");
    post_claim(&app, &other).await;
    let (_, _, view2) = call(&app, Method::GET, "/v1/claims/C-2", None, vec![]).await;
    assert_eq!(view2["features"]["claimant_claims_30d"], 1.0);
    let linked: Vec<&str> = view2["linked_claims"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| l["claim_id"].as_str().unwrap())
        .collect();
    assert!(linked.contains(&"C-1"), "{view2}");
}

#[tokio::test]
async fn bad_claims_get_problems_naming_the_field_and_leave_no_trace() {
    let dir = tempdir("bad");
    let svc = service(&dir);
    let app = http::app(svc.clone(), settings());
    post_claim(&app, &claim("C-ok")).await;
    let before = svc.store.claim_count();
    let depths: Vec<usize> = Queue::WORKED
        .iter()
        .map(|&q| svc.store.queue_depth(q))
        .collect();

    let mut bad = claim("C-bad");
    bad["claimed_amount"] = json!(-1);
    bad["parties"][1]["role"] = json!("cousin");
    let (status, ct, p) = post_claim(&app, &bad).await;
    assert_eq!(status, StatusCode::UNPROCESSABLE_ENTITY);
    assert_eq!(ct, "application/problem+json");
    let fields: Vec<&str> = p["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["field"].as_str().unwrap())
        .collect();
    assert_eq!(fields, vec!["claimed_amount", "parties[1].role"]);

    let (status, _, p) = call(
        &app,
        Method::POST,
        "/v1/claims",
        Some("application/json"),
        b"{\"claim_id\": ".to_vec(),
    )
    .await;
    assert_eq!(status, StatusCode::BAD_REQUEST);
    assert_eq!(p["type"], "urn:weir:problem:invalid-json");
    let (status, _, _) = call(
        &app,
        Method::POST,
        "/v1/claims",
        Some("text/plain"),
        serde_json::to_vec(&claim("C-x")).unwrap(),
    )
    .await;
    assert_eq!(status, StatusCode::UNSUPPORTED_MEDIA_TYPE);
    let mut huge = claim("C-huge");
    huge["region"] = json!("x".repeat(20_000));
    let (status, _, _) = post_claim(&app, &huge).await;
    assert_eq!(status, StatusCode::PAYLOAD_TOO_LARGE);

    assert_eq!(
        svc.store.claim_count(),
        before,
        "a refused claim was stored"
    );
    let after: Vec<usize> = Queue::WORKED
        .iter()
        .map(|&q| svc.store.queue_depth(q))
        .collect();
    assert_eq!(after, depths);
    let (status, _, _) = call(&app, Method::GET, "/v1/claims/C-bad", None, vec![]).await;
    assert_eq!(status, StatusCode::NOT_FOUND);
    assert!(
        svc.metrics
            .claims_rejected
            .with_label_values(&["invalid_claim"])
            .get()
            >= 1
    );
}

#[tokio::test]
async fn batch_intake_answers_every_line_in_order() {
    let dir = tempdir("batch");
    let svc = service(&dir);
    let app = http::app(svc.clone(), settings());
    let mut body = Vec::new();
    for (i, id) in ["B-1", "B-2", "B-3"].iter().enumerate() {
        let mut c = claim(id);
        c["claimant_id"] = json!(format!("K-b{i}"));
        body.extend(serde_json::to_vec(&c).unwrap());
        body.push(b'\n');
        if i == 1 {
            body.extend(b"{\"claim_id\": \"B-broken\"}\n");
        }
    }
    let resp = app
        .clone()
        .oneshot(
            Request::post("/v1/claims/batch")
                .header("content-type", "application/x-ndjson")
                .body(Body::from(body))
                .unwrap(),
        )
        .await
        .unwrap();
    assert_eq!(resp.status(), StatusCode::OK);
    let bytes = resp.into_body().collect().await.unwrap().to_bytes();
    let lines: Vec<Value> = bytes
        .split(|&b| b == b'\n')
        .filter(|l| !l.is_empty())
        .map(|l| serde_json::from_slice(l).unwrap())
        .collect();
    assert_eq!(lines.len(), 4);
    let nums: Vec<u64> = lines.iter().map(|l| l["line"].as_u64().unwrap()).collect();
    assert_eq!(nums, vec![1, 2, 3, 4]);
    assert_eq!(lines[2]["problem"]["status"], 422);
    assert!(
        lines[2]["problem"]["errors"]
            .as_array()
            .unwrap()
            .iter()
            .any(|e| e["field"] == "policy_id")
    );
    assert_eq!(lines[3]["claim_id"], "B-3");
    assert_eq!(svc.store.claim_count(), 3);
}

#[tokio::test]
async fn queues_list_lease_release() {
    let dir = tempdir("queues");
    let svc = service(&dir);
    let app = http::app(svc.clone(), settings());
    // Three claims sharing one payee account: the shared-account rule forces investigation.
    for i in 0..5 {
        let mut c = claim(&format!("Q-{i}"));
        c["claimant_id"] = json!(format!("K-q{i}"));
        c["policy_id"] = json!(format!("P-q{i}"));
        c["reported_at"] = json!(format!("2025-04-0{}T08:00:00Z", i + 1));
        c["loss_date"] = json!(format!("2025-04-0{}", i + 1));
        c["claimed_amount"] = json!(1000.0 + f64::from(i) * 500.0);
        post_claim(&app, &c).await;
    }
    let (status, _, qs) = call(&app, Method::GET, "/v1/queues", None, vec![]).await;
    assert_eq!(status, StatusCode::OK);
    let inv = qs["queues"]
        .as_array()
        .unwrap()
        .iter()
        .find(|q| q["queue"] == "investigate")
        .unwrap();
    assert!(inv["depth"].as_u64().unwrap() >= 2, "{qs}");

    let (_, _, page) = call(
        &app,
        Method::GET,
        "/v1/queues/investigate?limit=10",
        None,
        vec![],
    )
    .await;
    let prios: Vec<f64> = page["items"]
        .as_array()
        .unwrap()
        .iter()
        .map(|i| i["priority"].as_f64().unwrap())
        .collect();
    assert!(
        prios.windows(2).all(|w| w[0] >= w[1]),
        "not ordered by priority: {prios:?}"
    );

    let lease = |who: &str| json!({"investigator": who}).to_string().into_bytes();
    let (s1, _, a) = call(
        &app,
        Method::POST,
        "/v1/queues/investigate/lease",
        Some("application/json"),
        lease("inv-a"),
    )
    .await;
    let (s2, _, b) = call(
        &app,
        Method::POST,
        "/v1/queues/investigate/lease",
        Some("application/json"),
        lease("inv-b"),
    )
    .await;
    assert_eq!((s1, s2), (StatusCode::OK, StatusCode::OK));
    assert_ne!(
        a["claim_id"], b["claim_id"],
        "two investigators got the same item"
    );
    assert_eq!(
        a["claim_id"], page["items"][0]["claim_id"],
        "lease takes the top item first"
    );
    assert_eq!(a["lease"]["holder"], "inv-a");

    let uri = format!(
        "/v1/queues/investigate/items/{}/release",
        a["claim_id"].as_str().unwrap()
    );
    let (status, _, _) = call(&app, Method::POST, &uri, None, vec![]).await;
    assert_eq!(status, StatusCode::OK);
    let (_, _, again) = call(
        &app,
        Method::POST,
        "/v1/queues/investigate/lease",
        Some("application/json"),
        lease("inv-c"),
    )
    .await;
    assert_eq!(
        again["claim_id"], a["claim_id"],
        "a released item is leased again"
    );

    // An outcome takes the item out of its queue; the same outcome again changes nothing; an
    // outcome for an unknown claim is a 404 and stores nothing.
    let depth = svc.store.queue_depth(Queue::Investigate);
    let out = json!({"outcome": "fraud_confirmed", "amount_saved": 2500, "adjudicated_on": "2025-05-20", "decided_by": "inv-a"});
    let uri = format!("/v1/claims/{}/outcome", a["claim_id"].as_str().unwrap());
    let (status, _, rec) = call(
        &app,
        Method::POST,
        &uri,
        Some("application/json"),
        out.to_string().into_bytes(),
    )
    .await;
    assert_eq!(status, StatusCode::CREATED, "{rec}");
    assert_eq!(rec["revision"], 1);
    assert_eq!(svc.store.queue_depth(Queue::Investigate), depth - 1);
    let (status, _, _) = call(
        &app,
        Method::POST,
        &uri,
        Some("application/json"),
        out.to_string().into_bytes(),
    )
    .await;
    assert_eq!(status, StatusCode::OK);
    let sizes = svc.store.tree_sizes();
    let (status, _, _) = call(
        &app,
        Method::POST,
        "/v1/claims/NO-SUCH/outcome",
        Some("application/json"),
        out.to_string().into_bytes(),
    )
    .await;
    assert_eq!(status, StatusCode::NOT_FOUND);
    let (status, _, p) = call(
        &app,
        Method::POST,
        &uri,
        Some("application/json"),
        br#"{"outcome": "guilty"}"#.to_vec(),
    )
    .await;
    assert_eq!(status, StatusCode::BAD_REQUEST);
    assert_eq!(p["errors"][0]["field"], "outcome");
    assert_eq!(
        svc.store.tree_sizes(),
        sizes,
        "a refused outcome left a trace"
    );

    let (status, _, p) = call(&app, Method::GET, "/v1/queues/nonsense", None, vec![]).await;
    assert_eq!(status, StatusCode::NOT_FOUND);
    assert_eq!(p["status"], 404);
    let (status, _, _) = call(
        &app,
        Method::POST,
        "/v1/queues/investigate/lease",
        Some("application/json"),
        b"{}".to_vec(),
    )
    .await;
    assert_eq!(status, StatusCode::BAD_REQUEST);
}

#[tokio::test]
async fn operations_routes_and_openapi_match_the_router() {
    let dir = tempdir("ops");
    let svc = service(&dir);
    let app = http::app(svc.clone(), settings());
    post_claim(&app, &claim("M-1")).await;
    let (status, _, body) = call(&app, Method::GET, "/metrics", None, vec![]).await;
    assert_eq!(status, StatusCode::OK);
    let text = body.as_str().unwrap();
    for series in [
        "weir_claims_received_total{status=\"new\"} 1",
        "weir_claims_rejected_total{reason=\"invalid_claim\"} 0",
        "weir_decisions_total",
        "weir_scoring_seconds_bucket",
        "weir_queue_depth{queue=\"investigate\"}",
        "weir_store_flush_seconds_count",
    ] {
        assert!(text.contains(series), "metrics lack {series}:\n{text}");
    }
    // The gauges are read from the store at scrape time: each equals the queue's depth.
    for q in Queue::WORKED {
        let line = format!(
            "weir_queue_depth{{queue=\"{}\"}} {}",
            q.as_str(),
            svc.store.queue_depth(q)
        );
        assert!(text.contains(&line), "metrics lack {line}:\n{text}");
    }
    assert!(
        Queue::WORKED.iter().any(|&q| svc.store.queue_depth(q) > 0),
        "M-1 was queued"
    );
    let (status, _, r) = call(&app, Method::GET, "/readyz", None, vec![]).await;
    assert_eq!(status, StatusCode::OK);
    assert_eq!(r["status"], "ready");
    let (status, _, p) = call(&app, Method::GET, "/no/such/route", None, vec![]).await;
    assert_eq!(
        (status, p["status"].as_u64()),
        (StatusCode::NOT_FOUND, Some(404))
    );
    let (status, ct, _) = call(&app, Method::DELETE, "/v1/claims", None, vec![]).await;
    assert_eq!(status, StatusCode::METHOD_NOT_ALLOWED);
    assert_eq!(ct, "application/problem+json");

    // Every operation in the OpenAPI document exists on the router (not a route-404 or 405).
    let (_, _, doc) = call(&app, Method::GET, "/v1/openapi.json", None, vec![]).await;
    let paths = doc["paths"].as_object().unwrap();
    assert_eq!(paths.len(), 28, "document and router list 28 paths");
    for (path, ops) in paths {
        let uri = path
            .replace("{claim_id}", "M-1")
            .replace("{queue}", "audit")
            .replace("{claimant_id}", "K-1")
            .replace("{ring_id}", "G-0000000000000001");
        for method in ops.as_object().unwrap().keys() {
            let m = Method::from_bytes(method.to_uppercase().as_bytes()).unwrap();
            let (status, _, p) = call(
                &app,
                m.clone(),
                &uri,
                Some("application/json"),
                b"{}".to_vec(),
            )
            .await;
            assert_ne!(status, StatusCode::METHOD_NOT_ALLOWED, "{m} {path}");
            let route_missing = status == StatusCode::NOT_FOUND
                && p["detail"].as_str().unwrap_or("").starts_with("route");
            assert!(!route_missing, "{m} {path} is documented but not routed");
        }
    }
}

/// Keys of a real server: one for every role (`all`), and one per role.
struct Keys {
    all: String,
    claims_system: String,
    investigator: String,
}

/// A configuration for a real `weir serve` on a free port, on `dir`'s sled folder, with a key
/// file made by `weir::access::add_key` and JSON logs.
fn server_config(dir: &Path) -> (PathBuf, Keys) {
    server_config_with(dir, "")
}

/// As [`server_config`], with more TOML lines for the `[server]` table.
fn server_config_with(dir: &Path, server_extra: &str) -> (PathBuf, Keys) {
    use weir::access::{Role, add_key};
    let config = dir.join("weir.toml");
    let key_file = dir.join("keys.toml");
    let keys = Keys {
        all: add_key(&key_file, "test-everything", Role::ALL.to_vec()).unwrap(),
        claims_system: add_key(&key_file, "test-claims-system", vec![Role::ClaimsSystem]).unwrap(),
        investigator: add_key(&key_file, "test-investigator", vec![Role::Investigator]).unwrap(),
    };
    std::fs::write(
        &config,
        format!(
            "[server]\nlisten = \"127.0.0.1:0\"\nlog_format = \"json\"\n{server_extra}\n[store]\npath = {:?}\ncache_mb = 32\n[paths]\nmodel = {:?}\nrules = {:?}\n[access]\nkey_file = {:?}\n",
            dir.join("store"),
            model_path(),
            rules_path(),
            key_file
        ),
    )
    .unwrap();
    (config, keys)
}

/// Start the real binary and read the address it prints.
fn start_server(config: &Path) -> (std::process::Child, std::net::SocketAddr) {
    common::start_server(config, "serve.log")
}

/// The real binary on port 0: serve, decide, stop with SIGTERM, start again on the same sled
/// folder, and find the acknowledged claim with the same decision.
#[test]
fn real_server_keeps_acknowledged_claims_across_restart() {
    let dir = tempdir("restart");
    let (config, keys) = server_config(&dir);
    let rt = tokio::runtime::Runtime::new().unwrap();
    let mut first: Option<Value> = None;
    for round in 0..2 {
        let (mut child, addr) = start_server(&config);
        let api = weir::client::Api::new(addr);
        let intake = api.with_key(&keys.claims_system);
        let investigator = api.with_key(&keys.investigator);
        rt.block_on(async {
            if round == 0 {
                let r = api.post_json("/v1/claims", &claim("R-1")).await.unwrap();
                assert_eq!(r.status, StatusCode::UNAUTHORIZED, "no key, no intake");
                let r = intake.post_json("/v1/claims", &claim("R-1")).await.unwrap();
                assert_eq!(r.status, StatusCode::CREATED);
                first = Some(r.json().unwrap());
                let bad = intake
                    .post_json("/v1/claims", &json!({"claim_id": "R-2"}))
                    .await
                    .unwrap();
                assert_eq!(bad.status, StatusCode::UNPROCESSABLE_ENTITY);
            } else {
                let r = investigator.get("/v1/claims/R-1").await.unwrap();
                assert_eq!(r.status, StatusCode::OK);
                let v = r.json().unwrap();
                let f = first.as_ref().unwrap();
                assert_eq!(v["decision"]["decided_at"], f["decided_at"]);
                assert_eq!(v["decision"]["queue"], f["queue"]);
                assert_eq!(v["decision"]["model_probability"], f["model_probability"]);
                let r = investigator.get("/v1/claims/R-2").await.unwrap();
                assert_eq!(r.status, StatusCode::NOT_FOUND);
            }
        });
        std::process::Command::new("kill")
            .args(["-TERM", &child.id().to_string()])
            .status()
            .unwrap();
        let status = child.wait().unwrap();
        assert!(status.success(), "graceful shutdown exit: {status}");
    }
    // Logs name the caller by its key's name, never the key, and carry ids, not claim content.
    let log = std::fs::read_to_string(dir.join("serve.log")).unwrap();
    assert!(log.contains("\"caller\":\"test-claims-system\""), "{log}");
    assert!(log.contains("R-1"), "claim ids are logged");
    for secret in [&keys.all, &keys.claims_system, &keys.investigator] {
        assert!(!log.contains(secret.as_str()), "a key reached the log");
    }
    // Timings are numbers that may happen to contain the amount's digits: drop them first.
    let without_timings: String = log
        .lines()
        .map(|l| match serde_json::from_str::<Value>(l) {
            Ok(Value::Object(mut m)) => {
                m.remove("millis");
                Value::Object(m).to_string()
            }
            _ => l.to_string(),
        })
        .collect::<Vec<_>>()
        .join("\n");
    for content in ["K-1", "R-9", "B-3", "9000"] {
        assert!(
            !without_timings.contains(content),
            "claim content {content} reached the log"
        );
    }
}

fn report_for(o: weir::feedback::Outcome, on: chrono::NaiveDate) -> weir::feedback::OutcomeReport {
    weir::feedback::OutcomeReport {
        outcome: o,
        amount_saved: 0.0,
        amount_recovered: 0.0,
        adjudicated_on: on,
        decided_by: "panel-1".into(),
    }
}

/// Over an invented demo stream decided on its own clock, with the ground-truth outcomes posted
/// back for every claim sent to review: the confusion counts per week and queue equal a count
/// made here, independently, from the same data.
#[tokio::test]
async fn confusion_counts_by_week_match_an_independent_count() {
    use chrono::Datelike;
    use std::collections::BTreeMap;
    let dir = tempdir("quality");
    let svc = service(&dir);
    let stream = weir::demo_data::generate(1500, 9);
    let mut expected: BTreeMap<(String, String), [u64; 4]> = BTreeMap::new();
    for d in &stream {
        let (rec, _) = svc.decide(d.claim.clone(), d.claim.reported_at).unwrap();
        if rec.queue == Queue::NoReview {
            continue;
        }
        let on = d.claim.reported_at.date_naive() + chrono::Days::new(30);
        svc.record_outcome(
            &rec.claim_id,
            report_for(d.outcome, on),
            d.claim.reported_at,
        )
        .await
        .unwrap()
        .unwrap();
        if let Some(y) = d.outcome.label() {
            let w = d.claim.reported_at.iso_week();
            let key = (
                format!("{}-W{:02}", w.year(), w.week()),
                rec.queue.as_str().to_string(),
            );
            let referred = matches!(rec.queue, Queue::Investigate | Queue::DeskCheck);
            let cell = expected.entry(key).or_default();
            cell[match (referred, y) {
                (true, true) => 0,
                (true, false) => 1,
                (false, false) => 2,
                (false, true) => 3,
            }] += 1;
        }
    }
    let q = svc.quality(None, None).unwrap();
    let got: BTreeMap<(String, String), [u64; 4]> = q
        .groups
        .iter()
        .filter(|g| g.labelled > 0)
        .map(|g| {
            let c = g.confusion;
            (
                (g.week.clone(), g.queue.as_str().to_string()),
                [c.tp, c.fp, c.tn, c.fn_],
            )
        })
        .collect();
    assert!(
        expected.len() > 10,
        "too few weeks to mean anything: {}",
        expected.len()
    );
    assert_eq!(got, expected);
    let (tp, fp): (u64, u64) = expected
        .values()
        .fold((0, 0), |a, c| (a.0 + c[0], a.1 + c[1]));
    assert_eq!(q.precision.precision, Some(tp as f64 / (tp + fp) as f64));
    assert_eq!(q.referred_awaiting_outcome, 0);
    // A second, different outcome for a claim is a revision, not a second count.
    let first = q.groups.iter().find(|g| g.labelled > 0).unwrap().clone();
    let any = stream
        .iter()
        .find(|d| {
            iso(d.claim.reported_at) == first.week
                && d.outcome.label().is_some()
                && svc.store.outcome(&d.claim.claim_id).unwrap().is_some()
        })
        .unwrap();
    let on = any.claim.reported_at.date_naive() + chrono::Days::new(40);
    let (rec, created) = svc
        .record_outcome(
            &any.claim.claim_id,
            report_for(weir::feedback::Outcome::Withdrawn, on),
            any.claim.reported_at,
        )
        .await
        .unwrap()
        .unwrap();
    assert!(created);
    assert_eq!(rec.revision, 2);
    let q2 = svc.quality(None, None).unwrap();
    let decided: u64 = q2.groups.iter().map(|g| g.decided).sum();
    assert_eq!(decided, stream.len() as u64);
    assert_eq!(
        q2.totals.total() + 1,
        q.totals.total(),
        "the withdrawn claim leaves the labelled counts"
    );
    // The background refresh (one streamed pass for quality and fairness together) sets the
    // same figures as the read-outs.
    let estimate = svc.metrics.precision.with_label_values(&["estimate"]);
    estimate.set(-1.0);
    svc.refresh_monitoring(chrono::Utc::now()).unwrap();
    assert_eq!(Some(estimate.get()), q2.precision.precision);
    for r in svc
        .fairness()
        .unwrap()
        .iter()
        .filter(|r| r.segment == "line")
    {
        let g = svc
            .metrics
            .referral_rate_ratio
            .with_label_values(&[r.segment.as_str(), r.value.as_str()]);
        assert_eq!(g.get(), r.ratio_to_highest, "{} {}", r.segment, r.value);
    }

    // The HTML report is well-formed XML with all five charts, each titled for screen readers.
    let html = weir::report::render(&svc.report_data(chrono::Utc::now(), 7.5).unwrap());
    let mut reader = quick_xml::Reader::from_str(&html);
    let (mut svgs, mut titles) = (0, Vec::new());
    let mut in_title = false;
    loop {
        match reader.read_event() {
            Ok(quick_xml::events::Event::Eof) => break,
            Ok(quick_xml::events::Event::Start(e)) => {
                svgs += usize::from(e.name().as_ref() == b"svg");
                in_title = e.name().as_ref() == b"title";
            }
            Ok(quick_xml::events::Event::Text(t)) if in_title => {
                titles.push(t.unescape().unwrap().into_owned());
                in_title = false;
            }
            Ok(_) => {}
            Err(e) => panic!(
                "report is not well-formed at {}: {e}",
                reader.buffer_position()
            ),
        }
    }
    assert_eq!(svgs, 5, "five charts");
    for chart in [
        "ROC curve",
        "Precision by week",
        "Referrals against capacity",
        "PSI per feature",
        "Calibration",
    ] {
        assert!(
            titles.iter().any(|t| t == chart),
            "{chart} missing from {titles:?}"
        );
    }
    assert!(html.contains("not a finding of fraud"));
    assert!(
        !html.contains("needs adjudicated claims"),
        "the ROC chart had data"
    );

    // The export is a training file: every claim once, outcomes where posted, and it trains.
    let mut buf = Vec::new();
    let (n, with_outcome) = svc.store.export_training(&mut buf).unwrap();
    assert_eq!(n, stream.len());
    let loaded = train::load(Cursor::new(buf), BadLines::Refuse).unwrap();
    assert_eq!(loaded.rows.len(), stream.len());
    assert_eq!(
        loaded.rows.iter().filter(|r| r.outcome.is_some()).count(),
        with_outcome
    );
    let changed = loaded
        .rows
        .iter()
        .find(|r| r.claim.claim_id == any.claim.claim_id)
        .unwrap();
    assert_eq!(changed.outcome, Some(weir::feedback::Outcome::Withdrawn));
    assert_depths_match(&svc);
}

fn iso(t: chrono::DateTime<chrono::Utc>) -> String {
    weir::monitor::quality::iso_week(t)
}

/// Claims like the training data drift little; claims whose police-report flag is shifted
/// move that one feature past the "shifted" band and leave the others stable.
#[tokio::test]
async fn drift_flags_the_shifted_feature_only() {
    let at = chrono::DateTime::parse_from_rfc3339("2026-01-15T12:00:00Z")
        .unwrap()
        .with_timezone(&chrono::Utc);
    let mut reports = Vec::new();
    for shift in [false, true] {
        let dir = tempdir("drift");
        let svc = service(&dir);
        for d in weir::demo_data::generate(2000, 21) {
            let mut c = d.claim;
            if shift {
                c.circumstances.police_report = false;
            }
            svc.decide(c, at).unwrap();
        }
        reports.push(svc.drift(at).unwrap());
    }
    let psi = |r: &weir::service::DriftReport, name: &str| {
        r.features.iter().find(|f| f.name == name).unwrap().psi
    };
    for f in &reports[0].features {
        assert!(f.psi < 0.1, "unshifted {} has PSI {}", f.name, f.psi);
    }
    assert!(psi(&reports[1], "no_police_report") > 0.25);
    for f in reports[1]
        .features
        .iter()
        .filter(|f| f.name != "no_police_report")
    {
        assert!(
            f.psi < 0.1,
            "{} drifted ({}) though only the police report was shifted",
            f.name,
            f.psi
        );
    }
    assert_eq!(reports[0].claims_in_window, 2000);
}

fn renamed(d: &weir::demo_data::DemoClaim, prefix: &str) -> weir::claim::Claim {
    let mut c = d.claim.clone();
    c.claim_id = format!("{prefix}{}", c.claim_id);
    c
}

/// The retraining loop: outcomes posted back, exported, trained on, the new model hot-loaded
/// as challenger (shadow scores only), compared, then promoted while claims keep arriving,
/// with no request failing during the swap.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn retrain_from_export_then_challenger_then_promotion_without_failures() {
    let dir = tempdir("loop");
    let svc = service(&dir);
    let app = http::app(svc.clone(), settings());
    let first = weir::demo_data::generate(1500, 31);
    for d in &first {
        let (rec, _) = svc.decide(d.claim.clone(), d.claim.reported_at).unwrap();
        let on = d.claim.reported_at.date_naive() + chrono::Days::new(20);
        // Every claim gets its ground truth here, as if the whole batch had been adjudicated.
        svc.record_outcome(
            &rec.claim_id,
            report_for(d.outcome, on),
            d.claim.reported_at,
        )
        .await
        .unwrap();
    }
    let (status, _, export) = call(&app, Method::GET, "/v1/export/training", None, vec![]).await;
    assert_eq!(status, StatusCode::OK);
    let text = export.as_str().unwrap().to_string();
    let mut cfg = Config::default();
    cfg.training.trees.enabled = false;
    cfg.training.alphas = vec![10.0];
    let trained = train::train(
        train::load(Cursor::new(text), BadLines::Refuse).unwrap(),
        &cfg,
        false,
    )
    .unwrap();
    let new_version = trained.artifact.version.clone();
    let (status, _, r) = call(
        &app,
        Method::POST,
        "/v1/admin/model?role=challenger",
        Some("application/json"),
        trained.artifact.to_json().into_bytes(),
    )
    .await;
    assert_eq!(status, StatusCode::OK, "{r}");
    let (_, _, ready) = call(&app, Method::GET, "/readyz", None, vec![]).await;
    assert_eq!(ready["challenger"], new_version.as_str());
    assert_ne!(ready["model"], new_version.as_str());

    // Shadow scoring: the challenger scores new claims but never routes them.
    let second = weir::demo_data::generate(600, 32);
    for d in &second {
        let (rec, _) = svc.decide(renamed(d, "S-"), d.claim.reported_at).unwrap();
        assert_eq!(rec.challenger.as_ref().unwrap().model_version, new_version);
        let on = d.claim.reported_at.date_naive() + chrono::Days::new(20);
        svc.record_outcome(
            &rec.claim_id,
            report_for(d.outcome, on),
            d.claim.reported_at,
        )
        .await
        .unwrap();
    }
    let (_, _, cmp) = call(&app, Method::GET, "/v1/monitor/compare", None, vec![]).await;
    assert_eq!(cmp["claims_scored_by_both"], 600, "{cmp}");
    assert!(cmp["champion_auc"].as_f64().unwrap() > 0.6, "{cmp}");
    assert!(cmp["challenger_auc"].as_f64().unwrap() > 0.6, "{cmp}");
    assert!(cmp["agreement"].as_f64().unwrap() > 0.5, "{cmp}");

    // Promotion while claims arrive: every request succeeds.
    let third = weir::demo_data::generate(300, 33);
    let poster = {
        let app = app.clone();
        let claims: Vec<Value> = third
            .iter()
            .map(|d| serde_json::to_value(renamed(d, "T-")).unwrap())
            .collect();
        tokio::spawn(async move {
            let mut statuses = Vec::new();
            for c in claims {
                statuses.push(post_claim(&app, &c).await.0);
            }
            statuses
        })
    };
    tokio::time::sleep(std::time::Duration::from_millis(20)).await;
    let (status, _, p) = call(&app, Method::POST, "/v1/admin/model/promote", None, vec![]).await;
    assert_eq!(status, StatusCode::OK);
    assert_eq!(p["champion"], new_version.as_str());
    let statuses = poster.await.unwrap();
    assert_eq!(statuses.len(), 300);
    assert!(
        statuses.iter().all(|s| *s == StatusCode::CREATED),
        "{statuses:?}"
    );
    let (_, _, last) = call(&app, Method::GET, "/v1/claims/T-C-000300", None, vec![]).await;
    assert_eq!(last["decision"]["model_version"], new_version.as_str());
    let (status, _, _) = call(&app, Method::POST, "/v1/admin/model/promote", None, vec![]).await;
    assert_eq!(
        status,
        StatusCode::NOT_FOUND,
        "no challenger left to promote"
    );
    let (status, _, p) = call(
        &app,
        Method::POST,
        "/v1/admin/model?role=champion",
        Some("application/json"),
        b"{\"format\": \"other\"}".to_vec(),
    )
    .await;
    assert_eq!(status, StatusCode::BAD_REQUEST);
    assert!(
        p["errors"][0]["problem"]
            .as_str()
            .unwrap()
            .contains("not supported"),
        "{p}"
    );
}

/// One hostile or broken request and the status it must get.
struct Hostile {
    name: String,
    method: Method,
    uri: String,
    content_type: Option<&'static str>,
    body: Vec<u8>,
    status: u16,
}

fn hostile_corpus() -> Vec<Hostile> {
    let mut out = Vec::new();
    let mut claim_case = |name: &str, body: Vec<u8>, status: u16| {
        out.push(Hostile {
            name: name.to_string(),
            method: Method::POST,
            uri: "/v1/claims".into(),
            content_type: Some("application/json"),
            body,
            status,
        })
    };
    let base = claim("H-1");
    let with = |f: &dyn Fn(&mut Value)| {
        let mut v = base.clone();
        f(&mut v);
        serde_json::to_vec(&v).unwrap()
    };
    // Missing required fields.
    for k in [
        "claim_id",
        "policy_id",
        "claimant_id",
        "line",
        "loss_date",
        "reported_at",
        "policy_start",
        "claimed_amount",
        "sum_insured",
        "currency",
        "circumstances",
    ] {
        claim_case(
            &format!("missing {k}"),
            with(&|v| {
                v.as_object_mut().unwrap().remove(k);
            }),
            422,
        );
    }
    // Wrong types.
    for (k, bad) in [
        ("claim_id", json!(17)),
        ("policy_id", json!(["P"])),
        ("claimant_id", json!({"id": 1})),
        ("line", json!(true)),
        ("loss_date", json!(20250310)),
        ("loss_time", json!(2315)),
        ("reported_at", json!(false)),
        ("policy_start", json!([])),
        ("claimed_amount", json!("4200")),
        ("sum_insured", json!(true)),
        ("currency", json!(978)),
        ("region", json!(5)),
        ("address_id", json!({})),
        ("parties", json!({"role": "repairer"})),
        ("circumstances", json!("none")),
    ] {
        claim_case(
            &format!("{k} of the wrong type"),
            with(&|v| v[k] = bad.clone()),
            422,
        );
    }
    // Impossible amounts.
    for (k, bad) in [
        ("claimed_amount", json!(-1)),
        ("claimed_amount", json!(0)),
        ("claimed_amount", json!(2e9)),
        ("claimed_amount", json!(1e300)),
        ("claimed_amount", json!(null)),
        ("sum_insured", json!(-5)),
        ("sum_insured", json!(0)),
        ("sum_insured", json!(1e11)),
    ] {
        claim_case(&format!("{k} = {bad}"), with(&|v| v[k] = bad.clone()), 422);
    }
    let text = String::from_utf8(with(&|_| {})).unwrap();
    for lit in ["NaN", "Infinity", "-Infinity", "1e400", "0x10", "+5"] {
        claim_case(
            &format!("claimed_amount literal {lit}"),
            text.replace("9000.0", lit).into_bytes(),
            400,
        );
    }
    // Dates and times.
    for (k, bad) in [
        ("loss_date", "2025-02-30"),
        ("loss_date", "1800-01-01"),
        ("loss_date", "3000-01-01"),
        ("loss_date", "yesterday"),
        ("loss_date", "2025-13-01"),
        ("loss_date", "2025-06-01"),
        ("reported_at", "2025-03-12"),
        ("reported_at", "not a time"),
        ("reported_at", "0001-01-01T00:00:00Z"),
        ("policy_start", ""),
        ("loss_time", "25:00"),
        ("loss_time", "12:60"),
        ("loss_time", "noon"),
    ] {
        claim_case(&format!("{k} = {bad:?}"), with(&|v| v[k] = json!(bad)), 422);
    }
    // Strings.
    for (k, bad) in [
        ("claim_id", "x".repeat(200)),
        ("claim_id", String::new()),
        ("claim_id", "   ".into()),
        ("claim_id", "a\u{0}b".into()),
        ("claimant_id", "line\nbreak".into()),
        ("policy_id", "y".repeat(129)),
        ("currency", "eur".into()),
        ("currency", "EURO".into()),
        ("currency", "€€€".into()),
        ("line", "Motor".into()),
        ("line", "boat".into()),
        ("region", "z".repeat(300)),
        ("address_id", "\u{7}".into()),
    ] {
        claim_case(
            &format!("{k} = {:?}", bad.chars().take(12).collect::<String>()),
            with(&|v| v[k] = json!(bad)),
            422,
        );
    }
    // Parties and circumstances.
    let many: Vec<Value> = (0..51)
        .map(|i| json!({"role": "witness", "id": format!("W-{i}")}))
        .collect();
    claim_case("51 parties", with(&|v| v["parties"] = json!(many)), 422);
    claim_case(
        "unknown party role",
        with(&|v| v["parties"][0]["role"] = json!("uncle")),
        422,
    );
    claim_case(
        "party without id",
        with(&|v| {
            v["parties"][0].as_object_mut().unwrap().remove("id");
        }),
        422,
    );
    claim_case(
        "party with extra field",
        with(&|v| v["parties"][0]["phone"] = json!("555")),
        422,
    );
    claim_case(
        "party id too long",
        with(&|v| v["parties"][1]["id"] = json!("b".repeat(500))),
        422,
    );
    claim_case(
        "party not an object",
        with(&|v| v["parties"][0] = json!("R-9")),
        422,
    );
    claim_case(
        "extra top-level field",
        with(&|v| v["fraud"] = json!(true)),
        422,
    );
    claim_case(
        "extra circumstance",
        with(&|v| v["circumstances"]["weather"] = json!("rain")),
        422,
    );
    claim_case(
        "circumstances without police_report",
        with(&|v| {
            v["circumstances"]
                .as_object_mut()
                .unwrap()
                .remove("police_report");
        }),
        422,
    );
    claim_case(
        "circumstance not a boolean",
        with(&|v| v["circumstances"]["injury"] = json!("yes")),
        422,
    );
    // Structure of the document itself.
    let valid = with(&|_| {});
    for cut in [1, 10, valid.len() / 2, valid.len() - 1] {
        claim_case(&format!("truncated at {cut}"), valid[..cut].to_vec(), 400);
    }
    for (name, body) in [
        ("empty body", b"".to_vec()),
        ("an array", b"[]".to_vec()),
        ("null", b"null".to_vec()),
        ("a string", b"\"claim\"".to_vec()),
        ("a number", b"42".to_vec()),
        ("trailing garbage", [valid.clone(), b"}".to_vec()].concat()),
        ("two documents", [valid.clone(), valid.clone()].concat()),
    ] {
        let status = if matches!(name, "an array" | "null" | "a string" | "a number") {
            422
        } else {
            400
        };
        claim_case(name, body, status);
    }
    claim_case(
        "deeply nested array",
        ("[".repeat(5000) + &"]".repeat(5000)).into_bytes(),
        400,
    );
    claim_case(
        "deeply nested field",
        text.replace("\"EUR\"", &("[".repeat(300) + &"]".repeat(300)))
            .into_bytes(),
        400,
    );
    claim_case(
        "duplicate top-level key",
        text.replacen("{", "{\"claimed_amount\": 1.0, ", 1)
            .into_bytes(),
        400,
    );
    claim_case(
        "duplicate key in a party",
        text.replacen(
            "\"role\":\"repairer\"",
            "\"role\":\"repairer\",\"role\":\"attorney\"",
            1,
        )
        .into_bytes(),
        400,
    );
    claim_case(
        "invalid UTF-8",
        [
            b"{\"claim_id\": \"".to_vec(),
            vec![0xff, 0xfe],
            b"\"}".to_vec(),
        ]
        .concat(),
        400,
    );
    claim_case(
        "UTF-8 byte order mark",
        [vec![0xef, 0xbb, 0xbf], valid.clone()].concat(),
        400,
    );
    claim_case(
        "UTF-16 body",
        text.encode_utf16().flat_map(|u| u.to_le_bytes()).collect(),
        400,
    );
    claim_case(
        "oversized body",
        [
            b"{\"claim_id\": \"".to_vec(),
            vec![b'a'; 40_000],
            b"\"}".to_vec(),
        ]
        .concat(),
        413,
    );
    // Content types and methods.
    for ct in [
        Some("text/plain"),
        None,
        Some("application/xml"),
        Some("multipart/form-data"),
        Some("application/x-ndjson"),
    ] {
        out.push(Hostile {
            name: format!("content type {ct:?}"),
            method: Method::POST,
            uri: "/v1/claims".into(),
            content_type: ct,
            body: valid.clone(),
            status: 415,
        });
    }
    out.push(Hostile {
        name: "batch as JSON".into(),
        method: Method::POST,
        uri: "/v1/claims/batch".into(),
        content_type: Some("application/json"),
        body: valid.clone(),
        status: 415,
    });
    for (m, uri) in [
        (Method::PUT, "/v1/claims"),
        (Method::DELETE, "/v1/claims"),
        (Method::PATCH, "/v1/claims"),
        (Method::GET, "/v1/claims"),
        (Method::DELETE, "/v1/claims/H-0"),
        (Method::GET, "/v1/claims/H-0/outcome"),
        (Method::GET, "/v1/queues/audit/lease"),
        (Method::PUT, "/v1/queues"),
    ] {
        out.push(Hostile {
            name: format!("{m} {uri}"),
            method: m,
            uri: uri.into(),
            content_type: None,
            body: vec![],
            status: 405,
        });
    }
    // Unknown ids, paths and query values.
    let get = |name: &str, uri: &str, status: u16| Hostile {
        name: name.into(),
        method: Method::GET,
        uri: uri.into(),
        content_type: None,
        body: vec![],
        status,
    };
    let gets = vec![
        get("unknown claim", "/v1/claims/NOPE", 404),
        get(
            "path traversal in claim id",
            "/v1/claims/..%2F..%2Fetc%2Fpasswd",
            404,
        ),
        get("dot-dot claim id", "/v1/claims/..", 404),
        get("NUL in claim id", "/v1/claims/a%00b", 400),
        get(
            "overlong claim id",
            &format!("/v1/claims/{}", "c".repeat(300)),
            400,
        ),
        get("unknown queue", "/v1/queues/everything", 404),
        get(
            "no_review is not a worked queue",
            "/v1/queues/no_review",
            404,
        ),
        get("dot-dot queue", "/v1/queues/..", 404),
        get("limit not a number", "/v1/queues/audit?limit=abc", 400),
        get("limit too large", "/v1/queues/audit?limit=100000", 400),
        get("negative offset", "/v1/queues/audit?offset=-1", 400),
        get("bad from date", "/v1/monitor/quality?from=last-week", 400),
        get("unknown route", "/v1/admin", 404),
        get("unknown version", "/v2/claims/H-0", 404),
    ];
    out.extend(gets);
    // Outcomes and leases.
    let post = |name: &str, uri: &str, body: Vec<u8>, status: u16| Hostile {
        name: name.into(),
        method: Method::POST,
        uri: uri.into(),
        content_type: Some("application/json"),
        body,
        status,
    };
    let outcome =
        json!({"outcome": "genuine", "adjudicated_on": "2025-05-01", "decided_by": "inv-1"});
    let with_o = |f: &dyn Fn(&mut Value)| {
        let mut v = outcome.clone();
        f(&mut v);
        serde_json::to_vec(&v).unwrap()
    };
    let posts = vec![
        post(
            "outcome for unknown claim",
            "/v1/claims/NOPE/outcome",
            with_o(&|_| {}),
            404,
        ),
        post(
            "unknown outcome",
            "/v1/claims/H-0/outcome",
            with_o(&|v| v["outcome"] = json!("guilty")),
            400,
        ),
        post(
            "negative amount saved",
            "/v1/claims/H-0/outcome",
            with_o(&|v| v["amount_saved"] = json!(-10)),
            400,
        ),
        post(
            "huge amount recovered",
            "/v1/claims/H-0/outcome",
            with_o(&|v| v["amount_recovered"] = json!(1e12)),
            400,
        ),
        post(
            "impossible adjudication date",
            "/v1/claims/H-0/outcome",
            with_o(&|v| v["adjudicated_on"] = json!("2025-02-31")),
            400,
        ),
        post(
            "outcome without decided_by",
            "/v1/claims/H-0/outcome",
            with_o(&|v| {
                v.as_object_mut().unwrap().remove("decided_by");
            }),
            400,
        ),
        post(
            "outcome with extra field",
            "/v1/claims/H-0/outcome",
            with_o(&|v| v["note"] = json!("looks dodgy")),
            400,
        ),
        post(
            "outcome not JSON",
            "/v1/claims/H-0/outcome",
            b"fraud!".to_vec(),
            400,
        ),
        post(
            "outcome with duplicate key",
            "/v1/claims/H-0/outcome",
            br#"{"outcome": "genuine", "outcome": "inflated"}"#.to_vec(),
            400,
        ),
        post(
            "lease without investigator",
            "/v1/queues/audit/lease",
            b"{}".to_vec(),
            400,
        ),
        post(
            "lease with overlong investigator",
            "/v1/queues/audit/lease",
            serde_json::to_vec(&json!({"investigator": "i".repeat(200)})).unwrap(),
            400,
        ),
        post(
            "lease body not JSON",
            "/v1/queues/audit/lease",
            b"me".to_vec(),
            400,
        ),
        post(
            "lease on unknown queue",
            "/v1/queues/nowhere/lease",
            serde_json::to_vec(&json!({"investigator": "i"})).unwrap(),
            404,
        ),
        post(
            "release of unknown item",
            "/v1/queues/audit/items/NOPE/release",
            vec![],
            404,
        ),
        post(
            "model upload that is not a model",
            "/v1/admin/model?role=challenger",
            b"{}".to_vec(),
            400,
        ),
        post(
            "model upload with unknown role",
            "/v1/admin/model?role=boss",
            b"{}".to_vec(),
            400,
        ),
        post(
            "promotion without a challenger",
            "/v1/admin/model/promote",
            vec![],
            404,
        ),
    ];
    out.extend(posts);
    out
}

/// Every request of the hostile corpus gets the expected 4xx problem body, nothing is stored,
/// and the service goes on answering.
#[tokio::test]
async fn hostile_requests_get_problems_and_change_nothing() {
    let dir = tempdir("hostile");
    let svc = service(&dir);
    let app = http::app(svc.clone(), settings());
    let (status, _, _) = post_claim(&app, &claim("H-0")).await;
    assert_eq!(status, StatusCode::CREATED);
    let before = svc.store.tree_sizes();
    let corpus = hostile_corpus();
    assert!(corpus.len() >= 100, "corpus has {} cases", corpus.len());
    println!("{} hostile cases", corpus.len());
    let mut failures = Vec::new();
    for h in &corpus {
        let (status, ct, p) = call(
            &app,
            h.method.clone(),
            &h.uri,
            h.content_type,
            h.body.clone(),
        )
        .await;
        let ok = status.as_u16() == h.status
            && ct == "application/problem+json"
            && p["status"].as_u64() == Some(u64::from(h.status))
            && !p["detail"].as_str().unwrap_or("").is_empty();
        if !ok {
            failures.push(format!("{}: got {status} {ct} {p}", h.name));
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {} cases failed:\n{}",
        failures.len(),
        corpus.len(),
        failures.join("\n")
    );
    assert_eq!(
        svc.store.tree_sizes(),
        before,
        "a refused request left a trace"
    );
    let (status, _, _) = call(&app, Method::GET, "/healthz", None, vec![]).await;
    assert_eq!(status, StatusCode::OK);
    let (status, _, _) = post_claim(&app, &claim("H-after")).await;
    assert_eq!(status, StatusCode::CREATED, "still taking claims");
}

/// Crash safety: the real binary on one sled folder, claims and outcomes posted from several
/// connections at once, SIGKILL at a random moment, restart; every request that got a 2xx
/// must be there, whole, after the restart. Ten cycles.
#[test]
fn acknowledged_writes_survive_sigkill() {
    use std::collections::BTreeMap;
    use std::sync::{Arc, Mutex};
    let dir = tempdir("crash");
    let (config, keys) = server_config(&dir);
    let key = keys.all;
    let seed = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_nanos() as u64;
    println!("crash test seed {seed}");
    let mut rng = seed | 1;
    let mut next = move || {
        rng ^= rng << 13;
        rng ^= rng >> 7;
        rng ^= rng << 17;
        rng
    };
    let rt = tokio::runtime::Runtime::new().unwrap();
    // claim id -> acknowledged decision; claim id -> acknowledged outcome
    let acked_claims: Arc<Mutex<BTreeMap<String, Value>>> = Arc::default();
    let acked_outcomes: Arc<Mutex<BTreeMap<String, Value>>> = Arc::default();
    let verify = |addr: std::net::SocketAddr,
                  claims: &BTreeMap<String, Value>,
                  outcomes: &BTreeMap<String, Value>| {
        let api = weir::client::Api::new(addr).with_key(&key);
        rt.block_on(async {
            for (id, d) in claims {
                let r = api.get(&format!("/v1/claims/{id}")).await.unwrap();
                assert_eq!(r.status, StatusCode::OK, "acknowledged claim {id} lost");
                let v = r.json().unwrap();
                assert_eq!(
                    v["decision"]["decided_at"], d["decided_at"],
                    "{id}: decision changed"
                );
                assert_eq!(v["decision"]["queue"], d["queue"]);
                assert!(
                    v["features"].as_object().is_some_and(|f| !f.is_empty()),
                    "{id}: audit record incomplete"
                );
                if let Some(o) = outcomes.get(id) {
                    assert_eq!(
                        v["outcome"]["outcome"], o["outcome"],
                        "{id}: acknowledged outcome lost"
                    );
                    assert_eq!(v["outcome"]["revision"], o["revision"]);
                }
            }
            // Nothing half-written: every stored claim reads back whole.
            let export = api.get("/v1/export/training").await.unwrap();
            for line in export.body.split(|&b| b == b'\n').filter(|l| !l.is_empty()) {
                let v: Value = serde_json::from_slice(line).unwrap();
                let id = v["claim_id"].as_str().unwrap();
                let r = api.get(&format!("/v1/claims/{id}")).await.unwrap();
                assert_eq!(r.status, StatusCode::OK, "{id} listed but unreadable");
            }
        })
    };
    for cycle in 0..10u64 {
        let (mut child, addr) = start_server(&config);
        verify(
            addr,
            &acked_claims.lock().unwrap(),
            &acked_outcomes.lock().unwrap(),
        );
        let kill_after = std::time::Duration::from_millis(50 + next() % 400);
        rt.block_on(async {
            let mut tasks = Vec::new();
            for worker in 0..4u64 {
                let claims = Arc::clone(&acked_claims);
                let outcomes = Arc::clone(&acked_outcomes);
                let api = weir::client::Api::new(addr).with_key(&key);
                tasks.push(tokio::spawn(async move {
                    for i in 0.. {
                        let id = format!("K{cycle}-{worker}-{i}");
                        let mut c = claim(&id);
                        c["claimant_id"] = json!(format!("KC-{}", i % 7));
                        c["parties"][0]["id"] = json!(format!("R-{}", i % 3));
                        let Ok(r) = api.post_json("/v1/claims", &c).await else { return };
                        if r.status.is_success() {
                            claims.lock().unwrap().insert(id.clone(), r.json().unwrap());
                        }
                        if i % 2 == 0 {
                            let o = json!({"outcome": if i % 4 == 0 { "genuine" } else { "fraud_confirmed" },
                                "adjudicated_on": "2025-05-01", "decided_by": "crash-test"});
                            let Ok(r) = api.post_json(&format!("/v1/claims/{id}/outcome"), &o).await else { return };
                            if r.status.is_success() {
                                outcomes.lock().unwrap().insert(id.clone(), r.json().unwrap());
                            }
                        }
                    }
                }));
            }
            tokio::time::sleep(kill_after).await;
            child.kill().unwrap(); // SIGKILL
            for t in tasks {
                let _ = t.await;
            }
        });
        let _ = child.wait();
    }
    let (mut child, addr) = start_server(&config);
    let claims = acked_claims.lock().unwrap().clone();
    let outcomes = acked_outcomes.lock().unwrap().clone();
    verify(addr, &claims, &outcomes);
    println!(
        "{} acknowledged claims and {} outcomes survived 10 SIGKILLs",
        claims.len(),
        outcomes.len()
    );
    assert!(
        claims.len() > 50,
        "too few writes to mean anything: {}",
        claims.len()
    );
    child.kill().unwrap();
    let _ = child.wait();
}

/// The queue depths the store keeps without scanning equal a scan of the queues.
fn assert_depths_match(svc: &Service) {
    for q in Queue::ALL {
        assert_eq!(
            svc.store.queue_depth(q),
            svc.store.count_queue(q),
            "kept depth of {q} differs from a scan"
        );
    }
}

/// One key per role (named after the role) and the app serving with those keys.
fn app_with_keys(
    svc: &Service,
    retention_days: u32,
) -> (
    axum::Router,
    std::collections::BTreeMap<weir::access::Role, String>,
) {
    use weir::access::{Access, Role, entry_toml, new_key};
    let mut text = String::new();
    let mut keys = std::collections::BTreeMap::new();
    for r in Role::ALL {
        let (k, e) = new_key(r.as_str(), vec![r]);
        text.push_str(&entry_toml(&e));
        keys.insert(r, k);
    }
    let mut st = settings();
    st.access = std::sync::Arc::new(Access::from_toml(&text, "test keys").unwrap());
    st.retention_days = retention_days;
    (http::app(svc.clone(), st), keys)
}

/// The full route × role matrix: every API route refuses a missing or unknown key with 401,
/// refuses every role not in its entry with 403 and lets every listed role through; a refused
/// request changes nothing; every documented operation has an entry and every entry is
/// documented; the operations routes need no key.
#[tokio::test]
async fn every_route_checks_its_roles() {
    use weir::access::Role;
    use weir::http::ROUTE_ROLES;
    let dir = tempdir("matrix");
    let svc = service(&dir);
    let (app, keys) = app_with_keys(&svc, 3650);
    let cs = Some(keys[&Role::ClaimsSystem].as_str());
    let body = serde_json::to_vec(&claim("M-1")).unwrap();
    let (status, _, _) = call_as(
        &app,
        cs,
        Method::POST,
        "/v1/claims",
        Some("application/json"),
        body,
    )
    .await;
    assert_eq!(status, StatusCode::CREATED);

    let doc: Value = serde_json::from_str(http::OPENAPI).unwrap();
    let ops_routes = ["/healthz", "/readyz", "/metrics", "/v1/openapi.json"];
    let mut documented = Vec::new();
    for (path, ops) in doc["paths"].as_object().unwrap() {
        for (m, op) in ops.as_object().unwrap() {
            if ops_routes.contains(&path.as_str()) {
                continue;
            }
            let m = m.to_uppercase();
            let entry = ROUTE_ROLES
                .iter()
                .find(|(rm, rp, _)| *rm == m && rp == path);
            let (_, _, roles) = entry.unwrap_or_else(|| panic!("{m} {path} has no role entry"));
            let listed: Vec<&str> = roles.iter().map(|r| r.as_str()).collect();
            assert_eq!(
                op["x-weir-roles"],
                json!(listed),
                "{m} {path}: document and table differ"
            );
            documented.push((m, path.clone()));
        }
    }
    assert_eq!(
        documented.len(),
        ROUTE_ROLES.len(),
        "a table entry is not documented"
    );

    let unknown = "weir_".to_string() + &"0".repeat(64);
    let mut cells = 0;
    for (method, path, allowed) in ROUTE_ROLES {
        let uri = path
            .replace("{claim_id}", "M-1")
            .replace("{queue}", "audit")
            .replace("{claimant_id}", "K-1")
            .replace("{ring_id}", "G-0000000000000001");
        let m = Method::from_bytes(method.as_bytes()).unwrap();
        let before = svc.store.tree_sizes();
        for key in [None, Some(unknown.as_str())] {
            let (status, ct, p) = call_as(
                &app,
                key,
                m.clone(),
                &uri,
                Some("application/json"),
                b"{}".to_vec(),
            )
            .await;
            assert_eq!(
                status,
                StatusCode::UNAUTHORIZED,
                "{method} {path} with {key:?}"
            );
            assert_eq!(ct, "application/problem+json");
            assert_eq!(p["type"], "urn:weir:problem:unauthenticated");
        }
        for role in Role::ALL {
            let (status, _, p) = call_as(
                &app,
                Some(&keys[&role]),
                m.clone(),
                &uri,
                Some("application/json"),
                b"{}".to_vec(),
            )
            .await;
            if allowed.contains(&role) {
                assert!(
                    status != StatusCode::UNAUTHORIZED && status != StatusCode::FORBIDDEN,
                    "{method} {path} refused {role:?}: {status} {p}"
                );
            } else {
                assert_eq!(
                    status,
                    StatusCode::FORBIDDEN,
                    "{method} {path} let {role:?} in: {p}"
                );
                assert_eq!(p["type"], "urn:weir:problem:forbidden");
                assert!(
                    p["detail"].as_str().unwrap().contains(allowed[0].as_str()),
                    "{p}"
                );
                assert_eq!(
                    svc.store.tree_sizes(),
                    before,
                    "a refused request left a trace"
                );
            }
            cells += 1;
        }
    }
    assert_eq!(cells, ROUTE_ROLES.len() * Role::ALL.len());
    for path in ops_routes {
        let (status, _, _) = call_as(&app, None, Method::GET, path, None, vec![]).await;
        assert_eq!(status, StatusCode::OK, "{path} must stay open for probes");
    }
    let (_, _, metrics) = call_as(&app, None, Method::GET, "/metrics", None, vec![]).await;
    let text = metrics.as_str().unwrap();
    assert!(
        text.contains("weir_auth_refused_total{reason=\"missing_key\"}"),
        "{text}"
    );
}

/// A claims system reads the decisions on its own claims and nothing else; leases are held in
/// the key's name; outcomes record who posted them.
#[tokio::test]
async fn claims_systems_read_only_their_own_and_names_come_from_keys() {
    use weir::access::{Access, Role, entry_toml, new_key};
    let dir = tempdir("own");
    let svc = service(&dir);
    let mut text = String::new();
    let mut keys = std::collections::BTreeMap::new();
    for (name, role) in [
        ("north-intake", Role::ClaimsSystem),
        ("south-intake", Role::ClaimsSystem),
        ("inv-ada", Role::Investigator),
    ] {
        let (k, e) = new_key(name, vec![role]);
        text.push_str(&entry_toml(&e));
        keys.insert(name, k);
    }
    let mut st = settings();
    st.access = std::sync::Arc::new(Access::from_toml(&text, "t").unwrap());
    let app = http::app(svc.clone(), st);
    let mut c = claim("OWN-1");
    c["claimed_amount"] = json!(9900.0);
    let (status, _, d) = call_as(
        &app,
        Some(&keys["north-intake"]),
        Method::POST,
        "/v1/claims",
        Some("application/json"),
        serde_json::to_vec(&c).unwrap(),
    )
    .await;
    assert_eq!(status, StatusCode::CREATED, "{d}");
    let get = |who: &'static str| {
        let app = app.clone();
        let key = keys[who].clone();
        async move {
            call_as(
                &app,
                Some(&key),
                Method::GET,
                "/v1/claims/OWN-1",
                None,
                vec![],
            )
            .await
        }
    };
    let (status, _, mine) = get("north-intake").await;
    assert_eq!(status, StatusCode::OK);
    assert_eq!(mine["decision"]["queue"], d["queue"]);
    assert!(
        mine.get("claim").is_none() && mine.get("linked_claims").is_none(),
        "{mine}"
    );
    let (status, _, _) = get("south-intake").await;
    assert_eq!(
        status,
        StatusCode::NOT_FOUND,
        "another system's claim is not found"
    );
    let (status, _, full) = get("inv-ada").await;
    assert_eq!(status, StatusCode::OK);
    assert_eq!(full["claim"]["claimant_id"], "K-1");

    let queue = d["queue"].as_str().unwrap();
    if queue != "no_review" {
        let inv = Some(keys["inv-ada"].as_str());
        let lease_uri = format!("/v1/queues/{queue}/lease");
        let (status, _, p) = call_as(
            &app,
            inv,
            Method::POST,
            &lease_uri,
            Some("application/json"),
            br#"{"investigator": "someone-else"}"#.to_vec(),
        )
        .await;
        assert_eq!(status, StatusCode::BAD_REQUEST, "{p}");
        let (status, _, item) = call_as(
            &app,
            inv,
            Method::POST,
            &lease_uri,
            Some("application/json"),
            b"{}".to_vec(),
        )
        .await;
        assert_eq!(status, StatusCode::OK, "{item}");
        assert_eq!(item["lease"]["holder"], "inv-ada");
    }
    let o = json!({"outcome": "genuine", "adjudicated_on": "2025-04-01", "decided_by": "panel-2"});
    let (status, _, rec) = call_as(
        &app,
        Some(&keys["inv-ada"]),
        Method::POST,
        "/v1/claims/OWN-1/outcome",
        Some("application/json"),
        serde_json::to_vec(&o).unwrap(),
    )
    .await;
    assert_eq!(status, StatusCode::CREATED, "{rec}");
    assert_eq!(rec["posted_by"], "inv-ada");
    assert_eq!(rec["decided_by"], "panel-2");
}

/// Retention: claims with no activity for longer than the retention period go, with their
/// history, audit records, queue entries and outcomes; a claim under legal hold stays whole;
/// the claimant export finds a person as claimant and as a party.
#[tokio::test]
async fn retention_purges_everything_but_legal_holds_and_claimant_export_finds_all() {
    use weir::access::Role;
    let dir = tempdir("retention");
    let svc = service(&dir);
    let (app, keys) = app_with_keys(&svc, 0);
    let admin = Some(keys[&Role::Administrator].as_str());
    let cs = Some(keys[&Role::ClaimsSystem].as_str());
    let mut a = claim("RET-A");
    a["claimant_id"] = json!("K-7");
    let mut b = claim("RET-B");
    b["claimant_id"] = json!("K-7");
    b["claimed_amount"] = json!(800.0);
    let mut c = claim("RET-C");
    c["claimant_id"] = json!("K-8");
    c["parties"] = json!([{"role": "witness", "id": "K-7"}, {"role": "repairer", "id": "R-9"}]);
    for v in [&a, &b, &c] {
        let (status, _, d) = call_as(
            &app,
            cs,
            Method::POST,
            "/v1/claims",
            Some("application/json"),
            serde_json::to_vec(v).unwrap(),
        )
        .await;
        assert_eq!(status, StatusCode::CREATED, "{d}");
    }
    let o = json!({"outcome": "genuine", "adjudicated_on": "2025-04-01", "decided_by": "panel"});
    svc.record_outcome(
        "RET-B",
        weir::feedback::OutcomeReport::from_value(&o).unwrap(),
        chrono::Utc::now(),
    )
    .await
    .unwrap()
    .unwrap();

    let (status, _, rec) = call_as(
        &app,
        admin,
        Method::GET,
        "/v1/claimants/K-7/records",
        None,
        vec![],
    )
    .await;
    assert_eq!(status, StatusCode::OK);
    let found: Vec<(String, Value)> = rec["claims"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| {
            (
                c["claim_id"].as_str().unwrap().to_string(),
                c["appears_as"].clone(),
            )
        })
        .collect();
    assert_eq!(
        found,
        vec![
            ("RET-A".to_string(), json!(["claimant"])),
            ("RET-B".to_string(), json!(["claimant"])),
            ("RET-C".to_string(), json!(["witness"])),
        ]
    );
    assert_eq!(rec["claims"][1]["outcomes"][0]["outcome"], "genuine");

    // Retention off: the admin route says so and purges nothing.
    let (status, _, p) = call_as(&app, admin, Method::POST, "/v1/admin/purge", None, vec![]).await;
    assert_eq!(status, StatusCode::CONFLICT, "{p}");

    // A hold needs a reason; then it is set.
    let hold_uri = "/v1/claims/RET-A/hold";
    let (status, _, p) = call_as(
        &app,
        admin,
        Method::POST,
        hold_uri,
        Some("application/json"),
        br#"{"hold": true}"#.to_vec(),
    )
    .await;
    assert_eq!(
        (status, p["errors"][0]["field"].as_str()),
        (StatusCode::BAD_REQUEST, Some("reason"))
    );
    let (status, _, p) = call_as(
        &app,
        admin,
        Method::POST,
        "/v1/claims/NOPE/hold",
        Some("application/json"),
        br#"{"hold": true, "reason": "x"}"#.to_vec(),
    )
    .await;
    assert_eq!(status, StatusCode::NOT_FOUND, "{p}");
    let (status, _, h) = call_as(
        &app,
        admin,
        Method::POST,
        hold_uri,
        Some("application/json"),
        br#"{"hold": true, "reason": "litigation matter 2025-114"}"#.to_vec(),
    )
    .await;
    assert_eq!(status, StatusCode::OK, "{h}");
    assert_eq!(h["hold"]["set_by"], "administrator");

    let a_claim: weir::claim::Claim = serde_json::from_value(a.clone()).unwrap();
    let later = chrono::Utc::now() + chrono::Duration::days(60);
    // Nothing is older than 90 days yet.
    let r = svc.purge(90, later).await.unwrap();
    assert_eq!((r.purged_claims, r.kept_on_hold), (0, 0));
    let r = svc.purge(30, later).await.unwrap();
    assert_eq!((r.purged_claims, r.kept_on_hold), (2, 1), "{r:?}");
    let [
        claims,
        revisions,
        history,
        items,
        ranks,
        outcomes,
        outcome_revs,
        holds,
    ] = svc.store.tree_sizes();
    assert_eq!(
        (claims, revisions, outcomes, outcome_revs, holds),
        (1, 1, 0, 0, 1)
    );
    assert_eq!(
        history,
        weir::features::events_of(&a_claim).len(),
        "only A's history is left"
    );
    assert_eq!(items, ranks);
    assert!(items <= 1);
    let (status, _, rec) = call_as(
        &app,
        admin,
        Method::GET,
        "/v1/claimants/K-7/records",
        None,
        vec![],
    )
    .await;
    assert_eq!(status, StatusCode::OK);
    assert_eq!(rec["claims"].as_array().unwrap().len(), 1);
    assert_eq!(
        rec["claims"][0]["hold"]["reason"],
        "litigation matter 2025-114"
    );
    let (status, _, _) = call_as(
        &app,
        Some(&keys[&Role::Analyst]),
        Method::GET,
        "/v1/claims/RET-B",
        None,
        vec![],
    )
    .await;
    assert_eq!(status, StatusCode::NOT_FOUND, "purged claims are gone");

    // Lift the hold: the next purge takes the last claim and leaves every tree empty.
    let (status, _, _) = call_as(
        &app,
        admin,
        Method::POST,
        hold_uri,
        Some("application/json"),
        br#"{"hold": false}"#.to_vec(),
    )
    .await;
    assert_eq!(status, StatusCode::OK);
    let r = svc.purge(30, later).await.unwrap();
    assert_eq!(r.purged_claims, 1);
    assert_eq!(svc.store.tree_sizes(), [0; 8]);
    assert_depths_match(&svc);
}

/// An administrator replaces the rule set; a broken rule file is refused with its line and the
/// old rules stay.
#[tokio::test]
async fn administrators_load_rules_without_a_restart() {
    use weir::access::Role;
    let dir = tempdir("rules");
    let svc = service(&dir);
    let (app, keys) = app_with_keys(&svc, 0);
    let admin = Some(keys[&Role::Administrator].as_str());
    let old = svc.rules().version.clone();
    let (status, _, p) = call_as(&app, admin, Method::POST, "/v1/admin/rules", Some("application/toml"),
        b"version = \"x\"\n[[rule]]\nid = \"r\"\nreason = \"r\"\nall = [{ value = \"no_such_feature\", op = \">\", than = 1 }]\n".to_vec()).await;
    assert_eq!(status, StatusCode::BAD_REQUEST, "{p}");
    assert!(
        p["errors"][0]["problem"]
            .as_str()
            .unwrap()
            .contains("no_such_feature"),
        "{p}"
    );
    assert_eq!(svc.rules().version, old);
    let text = std::fs::read_to_string(rules_path())
        .unwrap()
        .replace(&old, "2026-12-02.test");
    let (status, _, r) = call_as(
        &app,
        admin,
        Method::POST,
        "/v1/admin/rules",
        Some("application/toml"),
        text.into_bytes(),
    )
    .await;
    assert_eq!(status, StatusCode::OK, "{r}");
    assert_eq!(svc.rules().version, "2026-12-02.test");
    let (status, _, d) = call_as(
        &app,
        Some(&keys[&Role::ClaimsSystem]),
        Method::POST,
        "/v1/claims",
        Some("application/json"),
        serde_json::to_vec(&claim("RULES-1")).unwrap(),
    )
    .await;
    assert_eq!(status, StatusCode::CREATED);
    assert_eq!(d["rules_version"], "2026-12-02.test");
}

/// Resident memory of a process, in KiB (Linux).
fn rss_kib(pid: u32) -> Option<u64> {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    status
        .lines()
        .find(|l| l.starts_with("VmRSS:"))?
        .split_whitespace()
        .nth(1)?
        .parse()
        .ok()
}

/// A bounded load test on loopback: the real binary with a concurrency limit of 8 under 24
/// connections posting 4,800 claims (one in ten posted twice), so that it sheds load. Every
/// 503 carries Retry-After and a problem body; clients retry; at the end every claim was
/// acknowledged as new exactly once, every repeat as a duplicate, the store holds exactly the
/// claims sent, and the metrics agree. Resident memory is sampled throughout and printed; the
/// bound asserted is loose (the figures are in the README), the accounting is exact.
#[test]
fn load_is_shed_not_queued_and_nothing_is_lost_or_doubled() {
    use std::sync::Arc;
    use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
    let dir = tempdir("load");
    let (config, keys) =
        server_config_with(&dir, "concurrency_limit = 8\nrequest_timeout_seconds = 5");
    let (mut child, addr) = start_server(&config);
    let pid = child.id();
    let done = Arc::new(AtomicBool::new(false));
    let sampler = {
        let done = Arc::clone(&done);
        std::thread::spawn(move || {
            let mut samples = Vec::new();
            while !done.load(Ordering::SeqCst) {
                if let Some(kib) = rss_kib(pid) {
                    samples.push(kib);
                }
                std::thread::sleep(std::time::Duration::from_millis(100));
            }
            samples
        })
    };
    const WORKERS: u64 = 24;
    const PER_WORKER: u64 = 200;
    let shed = Arc::new(AtomicU64::new(0));
    let created = Arc::new(AtomicU64::new(0));
    let duplicates = Arc::new(AtomicU64::new(0));
    let t0 = std::time::Instant::now();
    let rt = tokio::runtime::Runtime::new().unwrap();
    rt.block_on(async {
        let mut tasks = Vec::new();
        for w in 0..WORKERS {
            let api = weir::client::Api::new(addr).with_key(&keys.claims_system);
            let (shed, created, duplicates) = (
                Arc::clone(&shed),
                Arc::clone(&created),
                Arc::clone(&duplicates),
            );
            tasks.push(tokio::spawn(async move {
                for i in 0..PER_WORKER {
                    let id = format!("L-{w}-{i}");
                    let mut c = claim(&id);
                    c["claimant_id"] = json!(format!("LK-{}", (w * PER_WORKER + i) % 997));
                    c["parties"][0]["id"] = json!(format!("LR-{}", i % 41));
                    let sends = if i % 10 == 0 { 2 } else { 1 };
                    for n in 0..sends {
                        loop {
                            let r = api.post_json("/v1/claims", &c).await.unwrap();
                            match r.status.as_u16() {
                                201 => {
                                    assert_eq!(n, 0, "{id} created twice");
                                    created.fetch_add(1, Ordering::Relaxed);
                                }
                                200 => {
                                    assert_eq!(n, 1, "{id} a duplicate on first send");
                                    assert_eq!(r.json().unwrap()["status"], "duplicate");
                                    duplicates.fetch_add(1, Ordering::Relaxed);
                                }
                                503 => {
                                    assert_eq!(r.content_type, "application/problem+json");
                                    shed.fetch_add(1, Ordering::Relaxed);
                                    tokio::time::sleep(std::time::Duration::from_millis(5)).await;
                                    continue;
                                }
                                s => panic!("{id}: unexpected {s}"),
                            }
                            break;
                        }
                    }
                }
            }));
        }
        for t in tasks {
            t.await.unwrap();
        }
    });
    let elapsed = t0.elapsed();
    done.store(true, Ordering::SeqCst);
    let samples = sampler.join().unwrap();
    let total = WORKERS * PER_WORKER;
    let repeats = WORKERS * PER_WORKER.div_ceil(10);
    assert_eq!(created.load(Ordering::Relaxed), total);
    assert_eq!(duplicates.load(Ordering::Relaxed), repeats);
    let analyst = weir::client::Api::new(addr).with_key(&keys.all);
    rt.block_on(async {
        let ready = analyst.get("/readyz").await.unwrap().json().unwrap();
        assert_eq!(
            ready["store"]["claims"], total,
            "store holds exactly the claims sent"
        );
        let metrics = analyst.get("/metrics").await.unwrap();
        let text = String::from_utf8_lossy(&metrics.body).to_string();
        assert!(text.contains(&format!(
            "weir_claims_received_total{{status=\"new\"}} {total}"
        )));
        assert!(text.contains(&format!(
            "weir_claims_received_total{{status=\"duplicate\"}} {repeats}"
        )));
    });
    let mb = |k: u64| k as f64 / 1024.0;
    let quarter = samples.len() / 4;
    let early = samples[..quarter.max(1)].iter().copied().max().unwrap_or(0);
    let peak = samples.iter().copied().max().unwrap_or(0);
    println!(
        "load: {total} claims + {repeats} repeats in {:.1} s ({:.0} requests/s accepted), {} answered 503 and retried; RSS {:.0} MB after the first quarter, peak {:.0} MB, last {:.0} MB ({} samples)",
        elapsed.as_secs_f64(),
        (total + repeats) as f64 / elapsed.as_secs_f64(),
        shed.load(Ordering::Relaxed),
        mb(early),
        mb(peak),
        mb(*samples.last().unwrap_or(&0)),
        samples.len()
    );
    assert!(
        shed.load(Ordering::Relaxed) > 0,
        "the limit of 8 never shed load"
    );
    assert!(mb(peak) < 400.0, "peak RSS {:.0} MB", mb(peak));
    child.kill().unwrap();
    let _ = child.wait();
}

/// The web pages: no session → the sign-in page; a wrong key → 401; a session → the page for
/// its role only; a form without the session's token → refused and nothing leased.
#[tokio::test]
async fn web_pages_need_a_session_a_role_and_the_form_token() {
    use weir::access::Role;
    let dir = tempdir("web");
    let svc = service(&dir);
    let (app, keys) = app_with_keys(&svc, 0);
    let body = serde_json::to_vec(&claim("W-1")).unwrap();
    let cs = Some(keys[&Role::ClaimsSystem].as_str());
    let (status, _, d) = call_as(
        &app,
        cs,
        Method::POST,
        "/v1/claims",
        Some("application/json"),
        body,
    )
    .await;
    assert_eq!(status, StatusCode::CREATED, "{d}");

    let send = |method: Method, uri: &str, cookie: Option<&str>, form: Option<String>| {
        let mut req = Request::builder().method(method).uri(uri);
        if let Some(c) = cookie {
            req = req.header("cookie", c);
        }
        if form.is_some() {
            req = req.header("content-type", "application/x-www-form-urlencoded");
        }
        let req = req.body(Body::from(form.unwrap_or_default())).unwrap();
        let app = app.clone();
        async move {
            let r = app.oneshot(req).await.unwrap();
            let status = r.status();
            let headers = r.headers().clone();
            let bytes = r.into_body().collect().await.unwrap().to_bytes();
            (
                status,
                headers,
                String::from_utf8_lossy(&bytes).into_owned(),
            )
        }
    };
    let (status, headers, _) = send(Method::GET, "/ui/queues", None, None).await;
    assert_eq!(status, StatusCode::SEE_OTHER);
    assert_eq!(headers["location"], "/ui/login");
    let (status, _, page) = send(
        Method::POST,
        "/ui/login",
        None,
        Some("key=weir_nope".into()),
    )
    .await;
    assert_eq!(status, StatusCode::UNAUTHORIZED);
    assert!(page.contains("not recognised"));

    let login = |role: Role| {
        let form = format!("key={}", keys[&role]);
        let send = &send;
        async move {
            let (status, headers, _) = send(Method::POST, "/ui/login", None, Some(form)).await;
            assert_eq!(status, StatusCode::SEE_OTHER);
            let cookie = headers["set-cookie"].to_str().unwrap().to_string();
            assert!(
                cookie.contains("HttpOnly") && cookie.contains("SameSite=Strict"),
                "{cookie}"
            );
            cookie.split(';').next().unwrap().to_string()
        }
    };
    let inv = login(Role::Investigator).await;
    let (status, _, page) = send(Method::GET, "/ui/queues", Some(&inv), None).await;
    assert_eq!(status, StatusCode::OK);
    assert!(page.contains("A referral is a prompt for human review"));
    let (status, _, _) = send(Method::GET, "/ui/monitoring", Some(&inv), None).await;
    assert_eq!(status, StatusCode::FORBIDDEN);
    let (status, _, page) = send(Method::GET, "/ui/claims/W-1", Some(&inv), None).await;
    assert_eq!(status, StatusCode::OK);
    assert!(page.contains("Record outcome"));

    let before = svc.store.tree_sizes();
    let queue = d["queue"].as_str().unwrap();
    let lease_uri = format!("/ui/queues/{queue}/lease");
    let (status, _, _) = send(
        Method::POST,
        &lease_uri,
        Some(&inv),
        Some("csrf=forged".into()),
    )
    .await;
    assert_eq!(status, StatusCode::FORBIDDEN, "a forged form is refused");
    let (status, _, _) = send(
        Method::POST,
        "/ui/claims/W-1/outcome",
        Some(&inv),
        Some("csrf=forged&outcome=genuine&adjudicated_on=2025-05-01&decided_by=x".into()),
    )
    .await;
    assert_eq!(status, StatusCode::FORBIDDEN);
    assert_eq!(
        svc.store.tree_sizes(),
        before,
        "a refused form changed nothing"
    );
    assert!(svc.store.outcome("W-1").unwrap().is_none());

    // A claims system has no page; an analyst reads monitoring but cannot post outcomes.
    let cs_cookie = login(Role::ClaimsSystem).await;
    let (status, _, _) = send(Method::GET, "/ui/claims/W-1", Some(&cs_cookie), None).await;
    assert_eq!(status, StatusCode::FORBIDDEN);
    let ana = login(Role::Analyst).await;
    let (status, _, page) = send(Method::GET, "/ui/monitoring", Some(&ana), None).await;
    assert_eq!(status, StatusCode::OK, "{page}");
    let (status, _, page) = send(Method::GET, "/ui/claims/W-1", Some(&ana), None).await;
    assert_eq!(status, StatusCode::OK);
    assert!(
        !page.contains("Record outcome"),
        "analysts read claims but post no outcomes"
    );
}
