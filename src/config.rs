//! Configuration: one TOML file, built-in defaults for every key, unknown keys refused, and
//! every problem reported at once.

use serde::{Deserialize, Serialize};
use std::path::Path;

/// Referral economics: what a review costs and how many reviews a day the team can do.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Referral {
    /// Cost of one review, in the claims' currency units.
    pub review_cost: f64,
    /// Reviews the investigation team completes per day.
    pub daily_capacity: f64,
    /// How the training command sets the referral threshold: "capacity" (refer the share of
    /// claims the team can review) or "expected_value" (refer when probability × claimed
    /// amount exceeds the review cost).
    pub rule: ThresholdRule,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ThresholdRule {
    Capacity,
    ExpectedValue,
}

impl Default for Referral {
    fn default() -> Self {
        Referral {
            review_cost: 300.0,
            daily_capacity: 1.5,
            rule: ThresholdRule::Capacity,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Trees {
    pub enabled: bool,
    /// The grid of the bounded search: each list is one axis. `search` settings are drawn
    /// from it without repetition (seeded), and each competes in cross-validation.
    pub iterations: Vec<usize>,
    pub learning_rate: Vec<f32>,
    pub max_depth: Vec<usize>,
    pub min_leaf_weight: Vec<f32>,
    /// How many tree settings the search tries (at most the grid's size).
    pub search: usize,
}

impl Default for Trees {
    fn default() -> Self {
        Trees {
            enabled: true,
            iterations: vec![100, 300],
            learning_rate: vec![0.05, 0.1],
            max_depth: vec![3, 5],
            min_leaf_weight: vec![1.0, 10.0],
            search: 4,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Training {
    /// Model features by catalogue name; empty means the whole catalogue.
    pub features: Vec<String>,
    /// Attributes that must never be model features (protected characteristics and obvious
    /// proxies). Training refuses a feature list naming any of them.
    pub protected_attributes: Vec<String>,
    /// Share of the time-ordered data held out as the later, test part.
    pub test_share: f64,
    /// Folds of cross-validation on the training part.
    pub folds: usize,
    /// L2 penalties tried for logistic regression (alpha = 1/C).
    pub alphas: Vec<f64>,
    /// Clusters for the outlier model.
    pub clusters: usize,
    pub seed: u64,
    pub trees: Trees,
    /// Also try the mean of the best logistic and the best trees candidate's calibrated
    /// probabilities; it competes like any candidate.
    pub blend: bool,
    /// The claims graph (see `graph`): its window and hub caps travel in the model artifact.
    pub graph: GraphConfig,
}

/// How the claims graph is built; training turns it into [`crate::graph::Settings`] with
/// per-kind caps measured on its own training part.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct GraphConfig {
    /// Days of the trailing window a component holds.
    pub window_days: i64,
    /// A party naming more claims within the window than this many times its kind's median
    /// is a hub and links nothing ...
    pub hub_factor: f64,
    /// ... unless it names no more than this many.
    pub hub_floor: u32,
    /// Most claims a component is followed to.
    pub max_claims: usize,
}

impl Default for GraphConfig {
    fn default() -> Self {
        let d = crate::graph::Settings::default();
        GraphConfig {
            window_days: d.window_days,
            hub_factor: d.hub_factor,
            hub_floor: d.hub_floor,
            max_claims: d.max_claims,
        }
    }
}

impl GraphConfig {
    /// Settings without caps (every kind at the floor) until training measures them.
    pub fn settings(&self) -> crate::graph::Settings {
        crate::graph::Settings {
            window_days: self.window_days,
            hub_factor: self.hub_factor,
            hub_floor: self.hub_floor,
            max_claims: self.max_claims,
            caps: Default::default(),
        }
    }
}

impl Default for Training {
    fn default() -> Self {
        Training {
            features: Vec::new(),
            protected_attributes: [
                "age",
                "date_of_birth",
                "gender",
                "sex",
                "ethnicity",
                "race",
                "nationality",
                "religion",
                "disability",
                "marital_status",
                "sexual_orientation",
                "postcode",
            ]
            .map(String::from)
            .to_vec(),
            test_share: 1.0 / 3.0,
            folds: 5,
            alphas: vec![10.0, 100.0, 1000.0],
            clusters: 8,
            seed: 20_251_202,
            trees: Trees::default(),
            blend: true,
            graph: GraphConfig::default(),
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum LogFormat {
    Text,
    Json,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Server {
    /// Address to listen on; port 0 picks a free port (printed at start-up).
    pub listen: String,
    /// Largest request body for single requests.
    pub body_limit_bytes: usize,
    /// Largest body for the batch intake.
    pub batch_limit_bytes: usize,
    /// Longest line accepted in a batch.
    pub batch_line_bytes: usize,
    pub request_timeout_seconds: u64,
    /// Requests served at once; beyond it the service answers 503 with Retry-After.
    pub concurrency_limit: usize,
    pub log_format: LogFormat,
}

impl Default for Server {
    fn default() -> Self {
        Server {
            listen: "127.0.0.1:8080".into(),
            body_limit_bytes: 256 * 1024,
            batch_limit_bytes: 512 * 1024 * 1024,
            batch_line_bytes: 64 * 1024,
            request_timeout_seconds: 30,
            concurrency_limit: 512,
            log_format: LogFormat::Text,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct StoreConfig {
    /// `sled` (embedded, one instance) or `postgres` (shared by several instances).
    pub backend: StoreBackend,
    /// Folder of the embedded sled store.
    pub path: std::path::PathBuf,
    /// sled page cache, in MiB.
    pub cache_mb: u64,
    /// Entity histories kept in memory by the sled store (write-through; over budget, entries
    /// are dropped in arbitrary order), in MiB. Spares the history range scans that dominated
    /// a decision.
    pub history_cache_mb: u64,
    /// Least time between two disk flushes of the sled store, in microseconds: an
    /// acknowledgement waits up to this much longer and one flush covers every write made
    /// meanwhile (group commit). 0 flushes as soon as a write waits.
    pub group_commit_us: u64,
    /// PostgreSQL connection string (libpq key=value form or a `postgresql://` URL). A password
    /// belongs in `WEIR_STORE_POSTGRES_URL`, set by the service manager, not in this file.
    pub postgres_url: String,
    /// Connections this instance keeps open to PostgreSQL.
    pub postgres_pool: usize,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum StoreBackend {
    Sled,
    Postgres,
}

impl Default for StoreConfig {
    fn default() -> Self {
        StoreConfig {
            backend: StoreBackend::Sled,
            path: "data/weir.sled".into(),
            cache_mb: 128,
            history_cache_mb: crate::store::DEFAULT_HISTORY_CACHE_BYTES >> 20,
            group_commit_us: crate::store::DEFAULT_GROUP_COMMIT_US,
            postgres_url: "host=127.0.0.1 user=weir dbname=weir".into(),
            postgres_pool: 8,
        }
    }
}

/// Claims taken from a NATS JetStream stream (off unless `enabled`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct StreamConfig {
    pub enabled: bool,
    /// NATS server addresses, comma-separated (`nats://host:4222,...`).
    pub url: String,
    /// The JetStream stream that holds filed claims (created when missing).
    pub stream: String,
    /// Subject claims are published on (the stream's subject).
    pub subject: String,
    /// Durable pull consumer shared by every instance.
    pub consumer: String,
    /// Subject each decision is published on (JSON, one message per decision).
    pub decisions_subject: String,
    /// Stream that keeps published decisions for downstream systems (created when missing).
    pub decisions_stream: String,
    /// Subject a message goes to when it cannot be decided, with the reason in headers.
    pub dead_letter_subject: String,
    /// Stream that keeps dead letters (created when missing).
    pub dead_letter_stream: String,
    /// Deliveries of one message before it goes to the dead-letter subject.
    pub max_deliver: i64,
    /// Seconds the stream waits for an acknowledgement before delivering again.
    pub ack_wait_seconds: u64,
    /// Claims this instance decides at the same time.
    pub in_flight: usize,
}

impl Default for StreamConfig {
    fn default() -> Self {
        StreamConfig {
            enabled: false,
            url: "nats://127.0.0.1:4222".into(),
            stream: "weir-claims".into(),
            subject: "weir.claims.filed".into(),
            consumer: "weir-scorers".into(),
            decisions_subject: "weir.decisions".into(),
            decisions_stream: "weir-decisions".into(),
            dead_letter_subject: "weir.claims.undecidable".into(),
            dead_letter_stream: "weir-undecidable".into(),
            max_deliver: 5,
            ack_wait_seconds: 30,
            in_flight: 16,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Paths {
    /// The champion model artifact.
    pub model: std::path::PathBuf,
    /// The rule file.
    pub rules: std::path::PathBuf,
}

impl Default for Paths {
    fn default() -> Self {
        Paths {
            model: "model.json".into(),
            rules: "config/rules.toml".into(),
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Queues {
    /// How long an investigator holds a leased item before it returns to the queue.
    pub lease_minutes: u64,
    /// Daily capacity of each worked queue (items a day).
    pub investigate_capacity: f64,
    pub desk_check_capacity: f64,
    pub audit_capacity: f64,
}

impl Default for Queues {
    fn default() -> Self {
        Queues {
            lease_minutes: 60,
            investigate_capacity: 1.5,
            desk_check_capacity: 6.0,
            audit_capacity: 1.0,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Monitor {
    /// Drift compares claims decided in the last this many days with the training baseline.
    pub drift_days: u32,
    /// Segments of the fairness read-out: "line", "region", "policy_age".
    pub segments: Vec<String>,
    /// A segment value whose referral rate is below this share of the highest is flagged
    /// (0.8: the four-fifths rule of 29 CFR 1607.4(D), an imported convention).
    pub fairness_bound: f64,
    /// How often the monitoring gauges in /metrics are recomputed.
    pub refresh_seconds: u64,
}

impl Default for Monitor {
    fn default() -> Self {
        Monitor {
            drift_days: 30,
            segments: vec!["line".into(), "region".into(), "policy_age".into()],
            fairness_bound: 0.8,
            refresh_seconds: 300,
        }
    }
}

/// Who may call the API.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct AccessConfig {
    /// TOML file of API keys (names, roles, SHA-256 of each key); `weir keys add` writes it.
    pub key_file: std::path::PathBuf,
    /// Serve without keys, every caller holding every role. Refused unless `server.listen` is
    /// a loopback address: for trying weir out and for tests only.
    pub unauthenticated: bool,
}

impl Default for AccessConfig {
    fn default() -> Self {
        AccessConfig {
            key_file: "config/keys.toml".into(),
            unauthenticated: false,
        }
    }
}

/// How long claims are kept.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Retention {
    /// Purge claims with no decision or outcome in this many days, with their history, audit
    /// records, queue entries and outcomes; claims under legal hold are kept. 0 keeps
    /// everything.
    pub days: u32,
    /// How often the service looks for claims past retention, in hours.
    pub check_hours: u32,
}

impl Default for Retention {
    fn default() -> Self {
        Retention {
            days: 0,
            check_hours: 24,
        }
    }
}

pub const SEGMENTS: [&str; 3] = ["line", "region", "policy_age"];

#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Config {
    pub referral: Referral,
    pub training: Training,
    pub server: Server,
    pub store: StoreConfig,
    pub stream: StreamConfig,
    pub paths: Paths,
    pub routing: crate::rules::Routing,
    pub queues: Queues,
    pub monitor: Monitor,
    pub access: AccessConfig,
    pub retention: Retention,
}

/// Keys that are valid but absent from the serialised defaults (their default is "none").
const OPTIONAL_KEYS: &[&str] = &["routing.desk_check_probability"];

#[derive(Debug, thiserror::Error)]
#[error("configuration {source_name} has {} problem(s):\n  - {}", .problems.len(), .problems.join("\n  - "))]
pub struct ConfigError {
    pub source_name: String,
    pub problems: Vec<String>,
}

impl Config {
    pub fn from_toml(text: &str, source_name: &str) -> Result<Config, ConfigError> {
        Config::from_toml_with_env(text, source_name, std::iter::empty())
    }

    /// As [`Config::from_toml`], then environment overrides: `WEIR_SECTION_KEY=value` sets
    /// `[section] key` (e.g. `WEIR_SERVER_LISTEN=0.0.0.0:8080`, `WEIR_STORE_PATH=/var/lib/weir`).
    /// The value is read as TOML when it parses as a TOML value, else as a string.
    pub fn from_toml_with_env(
        text: &str,
        source_name: &str,
        env: impl Iterator<Item = (String, String)>,
    ) -> Result<Config, ConfigError> {
        let fail = |problems| ConfigError {
            source_name: source_name.to_string(),
            problems,
        };
        let mut value: toml::Value =
            toml::from_str(text).map_err(|e: toml::de::Error| fail(vec![e.to_string()]))?;
        let mut problems: Vec<String> = Vec::new();
        apply_env(&mut value, env, &mut problems);
        // Unknown keys first, all of them, by comparing with the defaults' own keys.
        check_keys(&value, &Config::default(), "", &mut problems);
        if !problems.is_empty() {
            return Err(fail(problems));
        }
        let config: Config = value
            .try_into()
            .map_err(|e: toml::de::Error| fail(vec![e.message().to_string()]))?;
        config.validate().map_err(fail)?;
        Ok(config)
    }

    pub fn read(path: &Path) -> Result<Config, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|e| ConfigError {
            source_name: path.display().to_string(),
            problems: vec![format!("cannot read: {e}")],
        })?;
        Config::from_toml(&text, &path.display().to_string())
    }

    /// Read a file (or start from the defaults) and apply `WEIR_*` environment overrides.
    pub fn load(path: Option<&Path>) -> Result<Config, ConfigError> {
        let (text, name) = match path {
            Some(p) => (
                std::fs::read_to_string(p).map_err(|e| ConfigError {
                    source_name: p.display().to_string(),
                    problems: vec![format!("cannot read: {e}")],
                })?,
                p.display().to_string(),
            ),
            None => (String::new(), "built-in defaults".to_string()),
        };
        Config::from_toml_with_env(&text, &name, std::env::vars())
    }

    /// Every semantic problem, at once.
    pub fn validate(&self) -> Result<(), Vec<String>> {
        let mut p = Vec::new();
        let r = &self.referral;
        if !(r.review_cost.is_finite() && r.review_cost >= 0.0) {
            p.push("referral.review_cost: must be a finite number >= 0".into());
        }
        if !(r.daily_capacity.is_finite() && r.daily_capacity > 0.0) {
            p.push("referral.daily_capacity: must be a finite number > 0".into());
        }
        if self.store.postgres_pool == 0 {
            p.push("store.postgres_pool: must be at least 1".into());
        }
        let st = &self.stream;
        if st.enabled {
            if st.max_deliver < 1 {
                p.push("stream.max_deliver: must be at least 1".into());
            }
            if st.in_flight == 0 {
                p.push("stream.in_flight: must be at least 1".into());
            }
            if st.ack_wait_seconds == 0 {
                p.push("stream.ack_wait_seconds: must be at least 1".into());
            }
            for (k, v) in [
                ("stream.stream", &st.stream),
                ("stream.consumer", &st.consumer),
                ("stream.decisions_stream", &st.decisions_stream),
                ("stream.dead_letter_stream", &st.dead_letter_stream),
            ] {
                // JetStream names: no spaces, dots, wildcards or path separators.
                if v.is_empty() || v.chars().any(|c| " .*>/\\\t".contains(c)) {
                    p.push(format!(
                        "{k}: must be a non-empty name without spaces, dots, '*', '>' or slashes"
                    ));
                }
            }
        }
        let t = &self.training;
        if !(t.test_share > 0.0 && t.test_share < 1.0) {
            p.push("training.test_share: must be strictly between 0 and 1".into());
        }
        if t.folds < 2 {
            p.push("training.folds: must be at least 2".into());
        }
        if t.alphas.is_empty() || t.alphas.iter().any(|a| !(a.is_finite() && *a > 0.0)) {
            p.push("training.alphas: must be a non-empty list of positive numbers".into());
        }
        if t.clusters == 0 {
            p.push("training.clusters: must be at least 1".into());
        }
        let tr = &t.trees;
        if tr.iterations.is_empty() || tr.iterations.iter().any(|&v| v == 0 || v > 5000) {
            p.push("training.trees.iterations: must be a non-empty list of 1 to 5000".into());
        }
        if tr.max_depth.is_empty() || tr.max_depth.iter().any(|&v| v == 0 || v > 12) {
            p.push("training.trees.max_depth: must be a non-empty list of 1 to 12".into());
        }
        if tr.learning_rate.is_empty() || tr.learning_rate.iter().any(|&v| !(v > 0.0 && v <= 1.0)) {
            p.push(
                "training.trees.learning_rate: must be a non-empty list of values in (0, 1]".into(),
            );
        }
        if tr.min_leaf_weight.is_empty()
            || tr
                .min_leaf_weight
                .iter()
                .any(|&v| !(v.is_finite() && v >= 0.0))
        {
            p.push(
                "training.trees.min_leaf_weight: must be a non-empty list of numbers >= 0".into(),
            );
        }
        for problem in t.graph.settings().problems() {
            p.push(format!("training.{problem}"));
        }
        if tr.enabled && tr.search == 0 {
            p.push("training.trees.search: must be at least 1 when trees are enabled".into());
        }
        if let Err(missing) = crate::features::resolve(&t.features) {
            p.push(format!(
                "training.features: unknown feature(s) {missing:?}; known: {}",
                crate::features::names().join(", ")
            ));
        }
        for f in &t.features {
            let lower = f.to_ascii_lowercase();
            if let Some(attr) = t
                .protected_attributes
                .iter()
                .find(|a| !a.is_empty() && lower.contains(&a.to_ascii_lowercase()))
            {
                p.push(format!(
                    "training.features: {f:?} names the protected attribute {attr:?}; protected attributes must not be model features"
                ));
            }
        }
        let ro = &self.routing;
        for (name, v) in [
            (
                "routing.investigate_probability",
                ro.investigate_probability,
            ),
            ("routing.outlier_desk_check", ro.outlier_desk_check),
            ("routing.audit_share", ro.audit_share),
        ] {
            if !(0.0..=1.0).contains(&v) {
                p.push(format!("{name}: must be between 0 and 1"));
            }
        }
        if let Some(d) = ro.desk_check_probability
            && !(0.0..=1.0).contains(&d)
        {
            p.push("routing.desk_check_probability: must be between 0 and 1".into());
        }
        if !(ro.review_cost.is_finite() && ro.review_cost >= 0.0) {
            p.push("routing.review_cost: must be a finite number >= 0".into());
        }
        let sv = &self.server;
        if sv.listen.parse::<std::net::SocketAddr>().is_err() {
            p.push(format!(
                "server.listen: {:?} is not an address such as 127.0.0.1:8080",
                sv.listen
            ));
        }
        if sv.body_limit_bytes < 1024 || sv.batch_line_bytes < 1024 {
            p.push("server.body_limit_bytes and server.batch_line_bytes: at least 1024".into());
        }
        if sv.concurrency_limit == 0 || sv.request_timeout_seconds == 0 {
            p.push(
                "server.concurrency_limit and server.request_timeout_seconds: at least 1".into(),
            );
        }
        let m = &self.monitor;
        if m.drift_days == 0 || m.refresh_seconds == 0 {
            p.push("monitor.drift_days and monitor.refresh_seconds: at least 1".into());
        }
        if !(0.0..=1.0).contains(&m.fairness_bound) {
            p.push("monitor.fairness_bound: must be between 0 and 1".into());
        }
        for seg in &m.segments {
            if !SEGMENTS.contains(&seg.as_str()) {
                p.push(format!(
                    "monitor.segments: unknown segment {seg:?}; known: {}",
                    SEGMENTS.join(", ")
                ));
            }
        }
        if self.access.unauthenticated
            && !sv
                .listen
                .parse::<std::net::SocketAddr>()
                .is_ok_and(|a| a.ip().is_loopback())
        {
            p.push(format!(
                "access.unauthenticated: only allowed when server.listen is a loopback address, not {:?}; give callers API keys (weir keys add)",
                sv.listen
            ));
        }
        if self.retention.check_hours == 0 {
            p.push("retention.check_hours: at least 1".into());
        }
        if self.queues.lease_minutes == 0 {
            p.push("queues.lease_minutes: at least 1".into());
        }
        if p.is_empty() { Ok(()) } else { Err(p) }
    }

    /// The model's feature names: the configured list, or the whole catalogue.
    pub fn feature_names(&self) -> Vec<String> {
        if self.training.features.is_empty() {
            crate::features::names()
                .into_iter()
                .map(String::from)
                .collect()
        } else {
            self.training.features.clone()
        }
    }
}

fn apply_env(
    value: &mut toml::Value,
    env: impl Iterator<Item = (String, String)>,
    problems: &mut Vec<String>,
) {
    let Ok(toml::Value::Table(schema)) = toml::Value::try_from(Config::default()) else {
        return;
    };
    for (name, raw) in env {
        let Some(rest) = name.strip_prefix("WEIR_") else {
            continue;
        };
        let rest = rest.to_ascii_lowercase();
        let target = schema.iter().find_map(|(section, sub)| {
            let key = rest.strip_prefix(&format!("{section}_"))?;
            let known = sub.as_table().is_some_and(|t| t.contains_key(key))
                || OPTIONAL_KEYS.contains(&format!("{section}.{key}").as_str());
            known.then(|| (section.clone(), key.to_string()))
        });
        let Some((section, key)) = target else {
            problems.push(format!("environment {name}: names no configuration key"));
            continue;
        };
        let parsed = toml::from_str::<toml::Table>(&format!("v = {raw}"))
            .ok()
            .and_then(|mut t| t.remove("v"))
            .unwrap_or(toml::Value::String(raw));
        if let toml::Value::Table(root) = value {
            let entry = root
                .entry(section)
                .or_insert_with(|| toml::Value::Table(toml::Table::new()));
            if let toml::Value::Table(t) = entry {
                t.insert(key, parsed);
            }
        }
    }
}

/// Compare the keys of a parsed TOML table with the keys of the defaults serialised to TOML.
fn check_keys<T: Serialize>(
    value: &toml::Value,
    defaults: &T,
    prefix: &str,
    out: &mut Vec<String>,
) {
    let Ok(schema) = toml::Value::try_from(defaults) else {
        return;
    };
    walk(value, &schema, prefix, out);
}

fn walk(value: &toml::Value, schema: &toml::Value, prefix: &str, out: &mut Vec<String>) {
    if let (toml::Value::Table(v), toml::Value::Table(s)) = (value, schema) {
        for (k, sub) in v {
            let path = if prefix.is_empty() {
                k.clone()
            } else {
                format!("{prefix}.{k}")
            };
            match s.get(k) {
                None if OPTIONAL_KEYS.contains(&path.as_str()) => {}
                None => out.push(format!("{path}: unknown key")),
                Some(sub_schema) => walk(sub, sub_schema, &path, out),
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shipped_config_is_the_defaults_written_out() {
        let text = include_str!("../config/weir.toml");
        assert_eq!(
            Config::from_toml(text, "config/weir.toml").unwrap(),
            Config::default()
        );
    }

    #[test]
    fn environment_overrides_keys_and_unknown_names_are_problems() {
        let env = [
            ("WEIR_SERVER_LISTEN".to_string(), "0.0.0.0:9000".to_string()),
            ("WEIR_STORE_CACHE_MB".to_string(), "64".to_string()),
            (
                "WEIR_ROUTING_DESK_CHECK_PROBABILITY".to_string(),
                "0.2".to_string(),
            ),
            ("PATH".to_string(), "/bin".to_string()),
        ];
        let c = Config::from_toml_with_env("", "t", env.into_iter()).unwrap();
        assert_eq!(c.server.listen, "0.0.0.0:9000");
        assert_eq!(c.store.cache_mb, 64);
        assert_eq!(c.routing.desk_check_probability, Some(0.2));
        let env = [("WEIR_SERVER_COLOUR".to_string(), "red".to_string())];
        let err = Config::from_toml_with_env("", "t", env.into_iter()).unwrap_err();
        assert!(err.problems[0].contains("WEIR_SERVER_COLOUR"), "{err}");
    }

    #[test]
    fn defaults_are_valid_and_empty_file_gives_defaults() {
        assert_eq!(Config::from_toml("", "t").unwrap(), Config::default());
    }

    #[test]
    fn reports_every_problem_at_once() {
        let text = r#"
            [referral]
            review_cost = -1
            daily_capacity = 0
            colour = "red"
            [training]
            folds = 1
            features = ["night_loss", "claimant_age", "shoe_size"]
            protected_attributes = ["age"]
            [extra]
            x = 1
        "#;
        let err = Config::from_toml(text, "t").unwrap_err();
        let all = err.problems.join("\n");
        for needle in ["referral.colour: unknown key", "extra: unknown key"] {
            assert!(all.contains(needle), "{needle} missing from\n{all}");
        }
        // Unknown keys are reported before values are checked; fix them and the rest shows.
        let text = text
            .replace("colour = \"red\"", "")
            .replace("[extra]\n            x = 1", "");
        let err = Config::from_toml(&text, "t").unwrap_err();
        let all = err.problems.join("\n");
        for needle in [
            "referral.review_cost",
            "referral.daily_capacity",
            "training.folds",
            "\"shoe_size\"",
            "\"claimant_age\" names the protected attribute \"age\"",
        ] {
            assert!(all.contains(needle), "{needle} missing from\n{all}");
        }
    }
}
