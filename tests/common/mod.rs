//! Helpers shared by the test files that need them (each test crate uses some).
#![allow(dead_code)]

use std::io::Cursor;
use std::path::PathBuf;
use std::sync::OnceLock;
use weir::config::Config;
use weir::model::ModelArtifact;
use weir::train::{self, BadLines};

pub fn tempdir(tag: &str) -> PathBuf {
    use std::sync::atomic::{AtomicUsize, Ordering};
    static N: AtomicUsize = AtomicUsize::new(0);
    let p = std::env::temp_dir().join(format!(
        "weir-suite-{tag}-{}-{}",
        std::process::id(),
        N.fetch_add(1, Ordering::SeqCst)
    ));
    let _ = std::fs::remove_dir_all(&p);
    std::fs::create_dir_all(&p).unwrap();
    p
}

pub fn artifact() -> &'static ModelArtifact {
    static A: OnceLock<ModelArtifact> = OnceLock::new();
    A.get_or_init(|| {
        let text: Vec<String> = weir::demo_data::generate(1500, 11)
            .iter()
            .map(|c| c.to_training_json())
            .collect();
        let mut cfg = Config::default();
        cfg.training.trees.enabled = false;
        cfg.training.alphas = vec![100.0];
        let loaded = train::load(Cursor::new(text.join("\n")), BadLines::Refuse).unwrap();
        train::train(loaded, &cfg, false).unwrap().artifact
    })
}

/// Create an empty database on the server `url` names and return a connection string for it.
pub fn fresh_database(url: &str) -> String {
    use std::sync::atomic::{AtomicUsize, Ordering};
    static N: AtomicUsize = AtomicUsize::new(0);
    let name = format!(
        "weir_test_{}_{}",
        std::process::id(),
        N.fetch_add(1, Ordering::SeqCst)
    );
    let mut admin = postgres::Client::connect(url, postgres::NoTls).unwrap();
    admin
        .batch_execute(&format!("DROP DATABASE IF EXISTS {name}"))
        .unwrap();
    admin
        .batch_execute(&format!("CREATE DATABASE {name}"))
        .unwrap();
    format!("{url} dbname={name}")
}

/// Start the real `weir serve` on `config` (stderr appended to `log` beside it) and read the
/// address it prints on its first line.
pub fn start_server(
    config: &std::path::Path,
    log: &str,
) -> (std::process::Child, std::net::SocketAddr) {
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_weir"))
        .args(["serve", "--config", config.to_str().unwrap()])
        .stdout(std::process::Stdio::piped())
        .stderr(
            std::fs::OpenOptions::new()
                .create(true)
                .append(true)
                .open(config.with_file_name(log))
                .unwrap(),
        )
        .spawn()
        .unwrap();
    let mut line = String::new();
    let mut out = std::io::BufReader::new(child.stdout.take().unwrap());
    std::io::BufRead::read_line(&mut out, &mut line).unwrap();
    let addr = line
        .trim()
        .rsplit("http://")
        .next()
        .unwrap()
        .parse()
        .unwrap_or_else(|_| panic!("no address in {line:?}"));
    (child, addr)
}
