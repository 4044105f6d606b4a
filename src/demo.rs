//! `weir demo`: the whole loop on the invented demo scenario, on a fresh machine, finishing on
//! its own. Generate claims, train, start the service on a local sled folder, replay the claims
//! through the HTTP batch intake, and print what an investigator would see first.

use crate::access::{Role, add_key};
use crate::client;
use crate::config::Config;
use crate::rules::Queue;
use crate::train::{self, BadLines};
use anyhow::{Context, Result, bail};
use hyper::{Method, StatusCode};
use std::io::Write;
use std::path::PathBuf;

pub struct DemoOptions {
    pub dir: PathBuf,
    pub claims: usize,
    pub seed: u64,
    pub keep_serving: bool,
    pub listen: String,
}

const DEFAULT_RULES: &str = include_str!("../config/rules.toml");

pub async fn run(o: DemoOptions) -> Result<()> {
    std::fs::create_dir_all(&o.dir)
        .with_context(|| format!("cannot create {}", o.dir.display()))?;
    let data = o.dir.join("claims.ndjson");
    let claims = crate::demo_data::generate(o.claims, o.seed);
    {
        let mut w = std::io::BufWriter::new(std::fs::File::create(&data)?);
        for c in &claims {
            writeln!(w, "{}", c.to_training_json())?;
        }
        w.flush()?;
    }
    println!(
        "1. wrote {} invented claims (Fernlow Mutual scenario, seed {}) to {}",
        claims.len(),
        o.seed,
        data.display()
    );

    let config = {
        let mut c = Config::load(None)?;
        c.store.path = o.dir.join("store");
        c.paths.model = o.dir.join("model.json");
        c.paths.rules = o.dir.join("rules.toml");
        c.server.listen = o.listen.clone();
        c.access.key_file = o.dir.join("keys.toml");
        c
    };
    let loaded = train::load(
        std::io::BufReader::new(std::fs::File::open(&data)?),
        BadLines::Refuse,
    )?;
    let trained = train::train(loaded, &config, false)?;
    std::fs::write(&config.paths.model, trained.artifact.to_json())?;
    std::fs::write(
        o.dir.join("training-report.json"),
        serde_json::to_string_pretty(&trained.report)?,
    )?;
    let champ = &trained.report.held_out[0];
    println!(
        "2. trained {} on the earlier two thirds: held-out ROC AUC {:.3}, precision at capacity {:.1}% (training report: {})",
        trained.report.champion,
        champ.auc.unwrap_or(f64::NAN),
        champ.precision_at_capacity.unwrap_or(0.0) * 100.0,
        o.dir.join("training-report.json").display()
    );

    if !config.paths.rules.exists() {
        std::fs::write(&config.paths.rules, DEFAULT_RULES)?;
    }
    // A fresh store each run, so the demo always tells the same story.
    if config.store.path.exists() {
        std::fs::remove_dir_all(&config.store.path)?;
    }
    // One API key per role, made fresh each run. The key file holds only their hashes; the
    // keys themselves go to a file in the demo folder so you can try the API by hand.
    let _ = std::fs::remove_file(&config.access.key_file);
    let mut keys = std::collections::BTreeMap::new();
    for (name, role) in [
        ("demo-claims-system", Role::ClaimsSystem),
        ("demo-investigator", Role::Investigator),
        ("demo-analyst", Role::Analyst),
        ("demo-administrator", Role::Administrator),
    ] {
        keys.insert(role, add_key(&config.access.key_file, name, vec![role])?);
    }
    let key_list = o.dir.join("demo-keys.txt");
    std::fs::write(
        &key_list,
        keys.iter()
            .map(|(r, k)| format!("{}\t{k}\n", r.as_str()))
            .collect::<String>(),
    )?;
    let (svc, settings) = crate::server::build(&config)?;
    let (listener, addr) = crate::server::bind(&config.server.listen).await?;
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(crate::server::run(svc, settings, listener, async move {
        let _ = stop_rx.await;
    }));
    println!(
        "3. serving on http://{addr} with the sled store in {}; one API key per role in {}",
        config.store.path.display(),
        key_list.display()
    );
    let api = client::Api::new(addr);
    let claims_system = api.with_key(&keys[&Role::ClaimsSystem]);
    let investigator = api.with_key(&keys[&Role::Investigator]);
    let analyst = api.with_key(&keys[&Role::Analyst]);

    // The intake schema has no outcome: strip it, as a claims system would never send one.
    let mut body = Vec::new();
    for c in &claims {
        body.extend_from_slice(serde_json::to_string(&c.claim)?.as_bytes());
        body.push(b'\n');
    }
    let t0 = std::time::Instant::now();
    let reply = claims_system
        .request(
            Method::POST,
            "/v1/claims/batch",
            Some("application/x-ndjson"),
            body,
        )
        .await?;
    if reply.status != StatusCode::OK {
        bail!("batch intake answered {}", reply.status);
    }
    let mut by_queue = std::collections::BTreeMap::new();
    let mut problems = 0;
    for line in reply.body.split(|&b| b == b'\n').filter(|l| !l.is_empty()) {
        let v: serde_json::Value = serde_json::from_slice(line)?;
        match v.get("queue").and_then(|q| q.as_str()) {
            Some(q) => *by_queue.entry(q.to_string()).or_insert(0usize) += 1,
            None => problems += 1,
        }
    }
    println!(
        "4. replayed {} claims through POST /v1/claims/batch in {:.1} s ({} refused)",
        claims.len(),
        t0.elapsed().as_secs_f64(),
        problems
    );
    for (q, n) in &by_queue {
        println!("     {q:<12} {n:>6}");
    }

    let queues = investigator.get("/v1/queues").await?.json()?;
    println!("\n5. review queues (depth against daily capacity):");
    for q in queues["queues"].as_array().into_iter().flatten() {
        println!(
            "     {:<12} {:>5} waiting, {} a day",
            q["queue"].as_str().unwrap_or("?"),
            q["depth"],
            q["daily_capacity"]
        );
    }
    for q in Queue::WORKED {
        let page = investigator
            .get(&format!("/v1/queues/{}?limit=5", q.as_str()))
            .await?
            .json()?;
        let order = if q == Queue::Audit {
            "drawn at random, in no order of suspicion"
        } else {
            "priority: expected saving with linked exposure, in currency units"
        };
        println!("\n   top of {} ({order}):", q.as_str());
        for item in page["items"].as_array().into_iter().flatten() {
            println!(
                "     {}  priority {:>9}  {} {:>9}  p={:.2} outlier={:.2}",
                item["claim_id"].as_str().unwrap_or("?"),
                crate::features::fmt_amount(item["priority"].as_f64().unwrap_or(0.0)),
                item["currency"].as_str().unwrap_or(""),
                crate::features::fmt_amount(item["claimed_amount"].as_f64().unwrap_or(0.0)),
                item["model_probability"].as_f64().unwrap_or(0.0),
                item["outlier_score"].as_f64().unwrap_or(0.0),
            );
            for r in item["reasons"].as_array().into_iter().flatten() {
                println!("         - {}", r["text"].as_str().unwrap_or(""));
            }
        }
    }
    // Investigators close the referred and audited cases: the demo posts each one's
    // ground-truth outcome, as the adjudication would have found it, 30 days after the report.
    // The most recent twentieth of the claims stays under investigation, so the queues (and
    // the web pages, with --keep-serving) still have work in them.
    let mut times: Vec<_> = claims.iter().map(|c| c.claim.reported_at).collect();
    times.sort();
    let still_open_from = times[times.len() * 19 / 20];
    let mut posted = 0;
    let mut left_open = 0;
    for line in reply.body.split(|&b| b == b'\n').filter(|l| !l.is_empty()) {
        let v: serde_json::Value = serde_json::from_slice(line)?;
        let (Some(id), Some(q)) = (v["claim_id"].as_str(), v["queue"].as_str()) else {
            continue;
        };
        if q == Queue::NoReview.as_str() {
            continue;
        }
        let Some(d) = claims.iter().find(|c| c.claim.claim_id == id) else {
            continue;
        };
        if d.claim.reported_at >= still_open_from {
            left_open += 1;
            continue;
        }
        let body = serde_json::json!({
            "outcome": d.outcome.as_str(),
            "adjudicated_on": (d.claim.reported_at.date_naive() + chrono::Days::new(30)).to_string(),
            "decided_by": "demo-panel",
        });
        let r = investigator
            .post_json(&format!("/v1/claims/{id}/outcome"), &body)
            .await?;
        if !r.status.is_success() {
            bail!("outcome for {id} answered {}", r.status);
        }
        posted += 1;
    }
    let q = analyst.get("/v1/monitor/quality").await?.json()?;
    let p = &q["precision"];
    println!(
        "\n6. posted {posted} adjudicated outcomes for the referred and audited claims ({left_open} recent ones left open in the queues); precision of referrals {:.1}% (95% interval {:.1}% to {:.1}%, {} adjudicated referrals)",
        p["precision"].as_f64().unwrap_or(f64::NAN) * 100.0,
        p["interval"][0].as_f64().unwrap_or(f64::NAN) * 100.0,
        p["interval"][1].as_f64().unwrap_or(f64::NAN) * 100.0,
        p["referred_labelled"]
    );
    let a = &q["audit"];
    if let (Some(r), Some(lo), Some(hi)) = (
        a["recall"].as_f64(),
        a["recall_interval"][0].as_f64(),
        a["recall_interval"][1].as_f64(),
    ) {
        println!(
            "   estimated recall {:.1}% (from the audit sample: {:.1}% to {:.1}%)",
            r * 100.0,
            lo * 100.0,
            hi * 100.0
        );
    }
    println!("   {}", a["note"].as_str().unwrap_or(""));
    // Rings: claims tied by shared parties, ranked (the outcomes just posted count in the score).
    let rings = investigator.get("/v1/rings?limit=3").await?.json()?;
    println!(
        "\n7. rings (groups of claims tied by shared parties, best score first; GET /v1/rings, /ui/rings):"
    );
    for (i, r) in rings["rings"].as_array().into_iter().flatten().enumerate() {
        let f = &r["facts"];
        let ties: Vec<String> = r["ties"]
            .as_array()
            .into_iter()
            .flatten()
            .take(4)
            .map(|t| {
                format!(
                    "{} {} ({})",
                    t["kind"].as_str().unwrap_or("").replace('_', " "),
                    t["id"].as_str().unwrap_or(""),
                    t["claims"].as_array().map_or(0, Vec::len)
                )
            })
            .collect();
        println!(
            "     {}. {}  score {:.1}: {} claims by {} claimants, {} referred or confirmed, {} in all; tied by {}",
            i + 1,
            r["id"].as_str().unwrap_or("?"),
            r["score"].as_f64().unwrap_or(0.0),
            f["claims"],
            f["claimants"],
            f["flagged"],
            crate::features::fmt_amount(f["amount"].as_f64().unwrap_or(0.0)),
            ties.join(", ")
        );
        if i == 0 {
            let members: Vec<String> = r["members"]
                .as_array()
                .into_iter()
                .flatten()
                .map(|m| {
                    let outcome = m["outcome"].as_str().unwrap_or("open").replace('_', " ");
                    format!("{} ({outcome})", m["claim_id"].as_str().unwrap_or("?"))
                })
                .collect();
            println!("        members: {}", members.join(", "));
        }
    }
    let html = analyst.get("/v1/report").await?;
    let report = o.dir.join("report.html");
    std::fs::write(&report, &html.body)?;
    println!("8. monitoring report written to {}", report.display());

    println!(
        "\nA referral is a prompt for human review, not a finding of fraud: payment decisions follow\nthe insurer's own procedures and the law where it operates."
    );

    if o.keep_serving {
        println!(
            "\nserving on http://{addr} until Ctrl-C. In a browser: http://{addr}/ui (sign in with the investigator or analyst key from {}). With curl:\n  curl -H \"Authorization: Bearer $(grep investigator {} | cut -f2)\" http://{addr}/v1/queues",
            key_list.display(),
            key_list.display()
        );
        crate::server::shutdown_signal().await;
    }
    let _ = stop_tx.send(());
    server.await??;
    Ok(())
}
