//! The `weir` command. Thin: each subcommand unpacks its arguments, calls the library and
//! prints the result.

use anyhow::{Context, Result};
use clap::{Parser, Subcommand};
use std::io::{BufReader, BufWriter, IsTerminal, Write};
use std::path::PathBuf;
use weir::config::Config;
use weir::demo_data::World;
use weir::train::{self, BadLines};

#[derive(Parser)]
#[command(
    name = "weir",
    version,
    about = "Triage of insurance claims for fraud review. A flag is a referral for human review, never a finding of fraud."
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum KeysAction {
    /// Make a new random key with the given roles, append its hash to the key file (created
    /// when missing) and print the key. It is shown only this once.
    Add {
        #[arg(long, default_value = "config/keys.toml")]
        file: PathBuf,
        /// The key's name: what logs and audit records show (e.g. the investigator's id).
        #[arg(long)]
        name: String,
        /// claims_system, investigator, analyst or administrator; repeat for several.
        #[arg(long = "role", required = true)]
        roles: Vec<String>,
    },
}

#[derive(Subcommand)]
enum Command {
    /// Run the whole loop on the invented demo scenario: generate claims, train, serve, replay
    /// the claims through the HTTP intake, print the top of each review queue.
    Demo {
        /// Folder for the demo's claims, model, rules and sled store.
        #[arg(long, default_value = "weir-demo")]
        dir: PathBuf,
        #[arg(long, default_value_t = 6_000)]
        claims: usize,
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// Keep serving after the replay, until Ctrl-C.
        #[arg(long)]
        keep_serving: bool,
        /// Address to serve on (port 0: any free port).
        #[arg(long, default_value = "127.0.0.1:0")]
        listen: String,
    },
    /// Write every claim in the store with its latest outcome (or "unadjudicated") as a
    /// training file for `weir train`. The service must be stopped (sled allows one process);
    /// while it runs, use GET /v1/export/training instead.
    Export {
        #[arg(long)]
        config: Option<PathBuf>,
        #[arg(long)]
        out: PathBuf,
        /// Instead of the training file, write everything held about this person (claims
        /// naming the id as claimant or as any party, every revision, outcome and hold) as
        /// one JSON document: the answer to a subject access request.
        #[arg(long)]
        claimant: Option<String>,
    },
    /// API keys: `weir keys add` makes a key, prints it once and stores only its hash.
    Keys {
        #[command(subcommand)]
        action: KeysAction,
    },
    /// Write the self-contained HTML monitoring report of a (stopped) store to DIR/report.html.
    /// While the service runs, GET /v1/report gives the same page.
    Report {
        #[arg(long)]
        config: Option<PathBuf>,
        #[arg(long)]
        out: PathBuf,
    },
    /// Serve the HTTP API on the embedded sled store.
    Serve {
        /// Configuration file (defaults and WEIR_* environment overrides apply).
        #[arg(long)]
        config: Option<PathBuf>,
    },
    /// Write the invented demo scenario: claims with ground-truth outcomes.
    DemoData {
        /// Folder to write claims.ndjson and truth.csv into.
        #[arg(long)]
        out: PathBuf,
        /// About how many claims.
        #[arg(long, default_value_t = 20_000)]
        claims: usize,
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// Which invented world: fernlow (the demo's) or osterby (written only to evaluate).
        #[arg(long, value_enum, default_value_t = World::Fernlow)]
        world: World,
    },
    /// Train a model on adjudicated claims and report how good it is on held-out data.
    Train {
        /// Newline-delimited claims, each with an "outcome".
        #[arg(long)]
        data: PathBuf,
        /// Where to write the model artifact.
        #[arg(long)]
        out: PathBuf,
        /// Where to write the full evaluation report (JSON).
        #[arg(long)]
        report: Option<PathBuf>,
        /// Configuration file (built-in defaults when absent).
        #[arg(long)]
        config: Option<PathBuf>,
        /// What to do with a line that cannot be used.
        #[arg(long, value_enum, default_value_t = BadLines::Refuse)]
        bad_lines: BadLines,
        /// Also score the later part of this second file of claims (another book of
        /// business the model was not shaped on) and report how it fares there.
        #[arg(long)]
        also_evaluate: Option<PathBuf>,
        /// claim_id,mechanism file for --also-evaluate (as demo-data writes): adds recall by
        /// mechanism and the surge's share of the investigate queue.
        #[arg(long, requires = "also_evaluate")]
        truth: Option<PathBuf>,
    },
    /// Evaluate a score file (columns score,label) and print one JSON object.
    Evaluate {
        #[arg(long)]
        scores: PathBuf,
        /// Scores at or above this are referrals.
        #[arg(long, default_value_t = 0.5)]
        threshold: f64,
        /// k for precision at k (default: the number of positives).
        #[arg(long)]
        top_k: Option<usize>,
    },
    /// Population stability index and KS statistic of one column between two CSV extracts.
    Drift {
        #[arg(long)]
        baseline: PathBuf,
        #[arg(long)]
        current: PathBuf,
        #[arg(long)]
        column: String,
        /// Quantile bins for numeric columns.
        #[arg(long, default_value_t = weir::monitor::drift::DEFAULT_BINS)]
        bins: usize,
    },
}

fn main() {
    if let Err(e) = run(Cli::parse()) {
        eprintln!("error: {e:#}");
        std::process::exit(1);
    }
}

fn runtime() -> Result<tokio::runtime::Runtime> {
    tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("cannot start the async runtime")
}

fn run(cli: Cli) -> Result<()> {
    match cli.command {
        Command::Demo {
            dir,
            claims,
            seed,
            keep_serving,
            listen,
        } => runtime()?.block_on(weir::demo::run(weir::demo::DemoOptions {
            dir,
            claims,
            seed,
            keep_serving,
            listen,
        })),
        Command::Keys {
            action: KeysAction::Add { file, name, roles },
        } => {
            let mut parsed = Vec::new();
            for r in &roles {
                parsed.push(weir::access::Role::parse(r).with_context(|| {
                    format!(
                        "unknown role {r:?}; roles: claims_system, investigator, analyst, administrator"
                    )
                })?);
            }
            let key = weir::access::add_key(&file, &name, parsed)?;
            eprintln!(
                "added key {name:?} ({}) to {}; its hash is stored, the key is not. Keep it now:",
                roles.join(", "),
                file.display()
            );
            println!("{key}");
            Ok(())
        }
        Command::Export {
            config,
            out,
            claimant: Some(person),
        } => {
            let config = Config::load(config.as_deref())?;
            let store = weir::store::Store::from_config(&config.store)
                .with_context(|| {
                    format!(
                        "cannot open the store {} (is weir serve running on it? use GET /v1/claimants/ID/records then)",
                        config.store.path.display()
                    )
                })?;
            let records = store.person_records(&person)?;
            std::fs::write(&out, serde_json::to_string_pretty(&records)?)
                .with_context(|| format!("cannot write {}", out.display()))?;
            println!(
                "wrote {} claim(s) naming {person:?} to {}",
                records.claims.len(),
                out.display()
            );
            Ok(())
        }
        Command::Export {
            config,
            out,
            claimant: None,
        } => {
            let config = Config::load(config.as_deref())?;
            let store = weir::store::Store::from_config(&config.store)
                .with_context(|| {
                    format!(
                        "cannot open the store {} (is weir serve running on it? use GET /v1/export/training then)",
                        config.store.path.display()
                    )
                })?;
            let mut w = BufWriter::new(
                std::fs::File::create(&out)
                    .with_context(|| format!("cannot create {}", out.display()))?,
            );
            let (n, adjudicated) = store.export_training(&mut w)?;
            w.flush()?;
            println!(
                "wrote {n} claims ({adjudicated} with an outcome) to {}; train with: weir train --data {} --out MODEL",
                out.display(),
                out.display()
            );
            Ok(())
        }
        Command::Report { config, out } => {
            let config = Config::load(config.as_deref())?;
            let svc = weir::server::build_service(&config)?;
            let capacity = config.queues.investigate_capacity + config.queues.desk_check_capacity;
            let data = svc.report_data(chrono::Utc::now(), capacity)?;
            std::fs::create_dir_all(&out)
                .with_context(|| format!("cannot create {}", out.display()))?;
            let path = out.join("report.html");
            std::fs::write(&path, weir::report::render(&data))?;
            println!("wrote {}", path.display());
            Ok(())
        }
        Command::Serve { config } => {
            let config = Config::load(config.as_deref())?;
            weir::telemetry::init_logs(config.server.log_format);
            runtime()?.block_on(async move {
                let (svc, settings) = weir::server::build(&config)?;
                let (listener, addr) = weir::server::bind(&config.server.listen).await?;
                tracing::info!(%addr, model = svc.model().version(), rules = %svc.rules().version, "listening");
                println!("weir listening on http://{addr}");
                weir::server::run(svc, settings, listener, weir::server::shutdown_signal()).await
            })
        }
        Command::DemoData {
            out,
            claims,
            seed,
            world,
        } => demo_data(&out, claims, seed, world),
        Command::Train {
            data,
            out,
            report,
            config,
            bad_lines,
            also_evaluate,
            truth,
        } => {
            let config = match config {
                Some(p) => Config::read(&p)?,
                None => Config::default(),
            };
            let file = std::fs::File::open(&data)
                .with_context(|| format!("cannot open {}", data.display()))?;
            let loaded = train::load(BufReader::new(file), bad_lines)?;
            if !loaded.skipped.is_empty() {
                eprintln!("skipped {} bad line(s):", loaded.skipped.len());
                for p in loaded.skipped.iter().take(10) {
                    eprintln!("  line {}: {}", p.line, p.problem);
                }
            }
            let mut trained = train::train(loaded, &config, std::io::stderr().is_terminal())?;
            if let Some(other) = &also_evaluate {
                trained.report.also_evaluated = Some(also_evaluate_file(
                    &trained,
                    other,
                    truth.as_deref(),
                    &config,
                )?);
            }
            std::fs::write(&out, trained.artifact.to_json())
                .with_context(|| format!("cannot write {}", out.display()))?;
            if let Some(r) = report {
                let text = serde_json::to_string_pretty(&trained.report)?;
                std::fs::write(&r, text)
                    .with_context(|| format!("cannot write {}", r.display()))?;
            }
            print_summary(&trained.report, &out);
            Ok(())
        }
        Command::Evaluate {
            scores,
            threshold,
            top_k,
        } => {
            let e = weir::cli::evaluate_file(&scores, threshold, top_k)?;
            println!("{}", serde_json::to_string_pretty(&e)?);
            Ok(())
        }
        Command::Drift {
            baseline,
            current,
            column,
            bins,
        } => {
            let d = weir::cli::drift_files(&baseline, &current, &column, bins)?;
            println!("{}", serde_json::to_string_pretty(&d)?);
            Ok(())
        }
    }
}

/// The shipped rule file, used for `--also-evaluate` when the configured one is absent.
const SHIPPED_RULES: &str = include_str!("../config/rules.toml");

fn also_evaluate_file(
    trained: &train::Trained,
    file: &std::path::Path,
    truth: Option<&std::path::Path>,
    config: &Config,
) -> Result<weir::elsewhere::Elsewhere> {
    let f = std::fs::File::open(file).with_context(|| format!("cannot open {}", file.display()))?;
    let loaded = train::load(BufReader::new(f), BadLines::Refuse)
        .with_context(|| format!("in {}", file.display()))?;
    let truth = match truth {
        Some(p) => Some(weir::elsewhere::read_truth(
            &std::fs::read_to_string(p).with_context(|| format!("cannot read {}", p.display()))?,
        )),
        None => None,
    };
    let rules = if config.paths.rules.exists() {
        weir::rules::RuleSet::read(&config.paths.rules)?
    } else {
        weir::rules::RuleSet::from_toml(SHIPPED_RULES, "shipped config/rules.toml")?
    };
    Ok(weir::elsewhere::evaluate(
        &trained.artifact,
        loaded,
        &file.display().to_string(),
        config.training.test_share,
        truth.as_ref(),
        &rules,
        &config.routing,
    )?)
}

fn demo_data(out: &std::path::Path, n: usize, seed: u64, world: World) -> Result<()> {
    std::fs::create_dir_all(out).with_context(|| format!("cannot create {}", out.display()))?;
    let claims = world.generate(n, seed);
    let path = out.join("claims.ndjson");
    let mut w = BufWriter::new(std::fs::File::create(&path)?);
    for c in &claims {
        writeln!(w, "{}", c.to_training_json())?;
    }
    w.flush()?;
    let mut t = BufWriter::new(std::fs::File::create(out.join("truth.csv"))?);
    writeln!(t, "claim_id,mechanism,outcome")?;
    for c in &claims {
        writeln!(
            t,
            "{},{},{}",
            c.claim.claim_id,
            c.mechanism.as_str(),
            c.outcome.as_str()
        )?;
    }
    t.flush()?;
    let mut by = std::collections::BTreeMap::new();
    for c in &claims {
        *by.entry(c.mechanism.as_str()).or_insert(0usize) += 1;
    }
    println!(
        "wrote {} claims of the invented {} scenario to {} (seed {seed})",
        claims.len(),
        world.insurer(),
        path.display()
    );
    for (m, k) in by {
        println!("  {m:<13} {k:>7}");
    }
    Ok(())
}

fn pct(x: Option<f64>) -> String {
    x.map_or("-".into(), |v| format!("{:.1}%", v * 100.0))
}

fn num(x: Option<f64>) -> String {
    x.map_or("-".into(), |v| format!("{v:.3}"))
}

fn print_summary(r: &train::Report, out: &std::path::Path) {
    let d = &r.data;
    println!(
        "trained on {} claims ({} referral-worthy), held out {} later claims ({} referral-worthy) from {}",
        d.train_rows, d.train_positives, d.test_rows, d.test_positives, d.split_at
    );
    if d.skipped_count > 0 {
        println!("skipped {} bad line(s)", d.skipped_count);
    }
    println!("rule: {}", r.rule.description);
    println!(
        "capacity over the held-out period: {} reviews\n",
        r.rule.capacity_k
    );
    println!(
        "cross-validation ({} time-ordered folds of the training part):",
        r.cross_validation.first().map_or(0, |c| c.fold_auc.len())
    );
    println!(
        "  {:<58} {:>13} {:>7} {:>7} {:>10}",
        "candidate", "prec@capacity", "AP", "AUC", "calibrated"
    );
    for c in &r.cross_validation {
        println!(
            "  {:<58} {:>13} {:>7.3} {:>7.3} {:>10}",
            c.name,
            pct(Some(c.mean_precision_at_capacity)),
            c.mean_average_precision,
            c.mean_auc,
            c.calibration.as_str()
        );
    }
    if !r.duplicate_features.is_empty() {
        let d: Vec<String> = r
            .duplicate_features
            .iter()
            .map(|(a, b)| format!("{a} (= {b})"))
            .collect();
        println!("  left out as exact duplicates: {}", d.join(", "));
    }
    println!("\n{}.\n", r.selection);
    let caps: Vec<String> = r
        .graph
        .caps
        .iter()
        .map(|(k, v)| format!("{} {v}", k.replace('_', " ")))
        .collect();
    println!(
        "claims graph: claims tied within {} days; a party naming more claims than {} times its kind's median (at least {}) is a hub and ties nothing. Caps measured on the training part: {}\n",
        r.graph.window_days,
        r.graph.hub_factor,
        r.graph.hub_floor,
        caps.join(", ")
    );
    println!("held out (later claims, never used in fitting or selection):");
    println!(
        "  {:<58} {:>7} {:>7} {:>8} {:>8} {:>9} {:>8} {:>6} {:>9}",
        "model", "AUC", "AP", "prec@2%", "prec@5%", "prec@cap", "rec@cap", "ECE", "precision"
    );
    for h in &r.held_out {
        println!(
            "  {:<58} {:>7} {:>7} {:>8} {:>8} {:>9} {:>8} {:>6} {:>9}",
            h.model,
            num(h.auc),
            num(h.average_precision),
            pct(h.precision_at_2pct),
            pct(h.precision_at_5pct),
            pct(h.precision_at_capacity),
            pct(h.recall_at_capacity),
            num(h.expected_calibration_error),
            pct(h.precision)
        );
    }
    println!(
        "\nchampion: {} (model version {}), outlier score alone: test AUC {}",
        r.champion,
        r.model_version,
        num(r.outliers.held_out_auc)
    );
    if let Some(e) = &r.also_evaluated {
        println!(
            "\nalso evaluated on the later part of {} ({} claims from {}, {} labelled, {} referral-worthy):",
            e.file, e.claims, e.from, e.labelled, e.positives
        );
        println!(
            "  AUC {}  AP {}  prec@2% {}  prec@5% {}  ECE {}",
            num(e.auc),
            num(e.average_precision),
            pct(e.precision_at_2pct),
            pct(e.precision_at_5pct),
            num(e.expected_calibration_error)
        );
        for m in &e.mechanisms {
            println!(
                "  {:<18} {:>4} of {:>4} referral-worthy claims in the top 5%",
                m.mechanism, m.in_top_5pct, m.positives
            );
        }
        let q: Vec<String> = e.queues.iter().map(|(k, v)| format!("{k} {v}")).collect();
        println!("  queues: {}", q.join(", "));
        if let (Some(a), Some(b)) = (e.surge_share_of_claims, e.surge_share_of_investigate) {
            println!(
                "  surge claims: {} of all claims, {} of the investigate queue",
                pct(Some(a)),
                pct(Some(b))
            );
        }
    }
    println!("\nhighest-scored held-out claims (referrals for review, not findings):");
    for t in r.top_referrals.iter().take(5) {
        println!(
            "  {}  p={:.2} outlier={:.2} outcome={}  {}",
            t.claim_id,
            t.probability,
            t.outlier_score,
            t.outcome.map_or(train::UNADJUDICATED, |o| o.as_str()),
            t.reasons.join("; ")
        );
    }
    println!("\nmodel written to {}", out.display());
}
