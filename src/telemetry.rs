//! Prometheus metrics and log set-up. Metric names end in `_total` or `_seconds`; labels come
//! from small fixed sets (queues, rejection reasons, intake status), never from claim data.

use crate::rules::Queue;
use prometheus::{
    Encoder, Gauge, GaugeVec, Histogram, HistogramOpts, IntCounter, IntCounterVec, IntGaugeVec,
    Opts, Registry, TextEncoder,
};

/// Why a claim was refused at intake (the `reason` label).
pub const REJECT_REASONS: [&str; 4] = [
    "invalid_json",
    "invalid_claim",
    "too_large",
    "wrong_media_type",
];

#[derive(Clone)]
pub struct Metrics {
    pub registry: Registry,
    /// Claims accepted by intake status (new, duplicate, revised).
    pub claims_received: IntCounterVec,
    pub claims_rejected: IntCounterVec,
    pub decisions: IntCounterVec,
    pub scoring_seconds: Histogram,
    pub queue_depth: IntGaugeVec,
    pub http_requests: IntCounterVec,
    /// Outcomes recorded (first outcomes and revisions), by outcome.
    pub outcomes: IntCounterVec,
    /// PSI of each model feature and score against the training baseline.
    pub drift_psi: GaugeVec,
    /// Precision of referrals: estimate and 95% Wilson bounds.
    pub precision: GaugeVec,
    pub awaiting_outcome: Gauge,
    /// Referral rate of a segment value divided by the highest in its segment.
    pub referral_rate_ratio: GaugeVec,
    /// Claims removed by retention purges.
    pub purged_claims: IntCounter,
    /// Requests refused by access control, by reason (missing/unknown key, role).
    pub auth_refused: IntCounterVec,
    /// Claims decided from the stream, by intake status.
    pub stream_claims: IntCounterVec,
    /// Stream messages sent to the dead-letter subject, by reason.
    pub stream_dead_letters: IntCounterVec,
    /// Stream messages delivered more than once.
    pub stream_redeliveries: IntCounter,
}

fn must<T>(r: prometheus::Result<T>) -> T {
    // Metric definitions are static; failing here is a programming error caught by any test.
    r.unwrap_or_else(|e| panic!("metric definition: {e}"))
}

impl Metrics {
    pub fn new(flush: &prometheus::Histogram) -> Metrics {
        let registry = Registry::new();
        let claims_received = must(IntCounterVec::new(
            Opts::new(
                "weir_claims_received_total",
                "Claims accepted at intake, by status",
            ),
            &["status"],
        ));
        let claims_rejected = must(IntCounterVec::new(
            Opts::new(
                "weir_claims_rejected_total",
                "Claims refused at intake, by reason",
            ),
            &["reason"],
        ));
        let decisions = must(IntCounterVec::new(
            Opts::new("weir_decisions_total", "Decisions written, by queue"),
            &["queue"],
        ));
        let scoring_seconds = must(Histogram::with_opts(
            HistogramOpts::new(
                "weir_scoring_seconds",
                "Time to compute features, score and route one claim (store write excluded)",
            )
            .buckets(vec![
                0.000_01, 0.000_02, 0.000_05, 0.000_1, 0.000_2, 0.000_5, 0.001, 0.002, 0.005, 0.01,
            ]),
        ));
        let queue_depth = must(IntGaugeVec::new(
            Opts::new("weir_queue_depth", "Items waiting in each review queue"),
            &["queue"],
        ));
        let http_requests = must(IntCounterVec::new(
            Opts::new("weir_http_requests_total", "HTTP responses by status class"),
            &["class"],
        ));
        let outcomes = must(IntCounterVec::new(
            Opts::new(
                "weir_outcomes_total",
                "Adjudicated outcomes recorded, by outcome",
            ),
            &["outcome"],
        ));
        let drift_psi = must(GaugeVec::new(
            Opts::new(
                "weir_drift_psi",
                "Population stability index of a model feature or score against the training baseline (recent window)",
            ),
            &["name"],
        ));
        let precision = must(GaugeVec::new(
            Opts::new(
                "weir_referral_precision_ratio",
                "Share of adjudicated referrals that were referral-worthy, with 95% Wilson bounds",
            ),
            &["bound"],
        ));
        let awaiting_outcome = must(Gauge::new(
            "weir_referrals_awaiting_outcome_ratio",
            "Share of referrals with no outcome yet",
        ));
        let referral_rate_ratio = must(GaugeVec::new(
            Opts::new(
                "weir_referral_rate_ratio",
                "Referral rate of a segment value divided by the highest rate in its segment",
            ),
            &["segment", "value"],
        ));
        let purged_claims = must(IntCounter::new(
            "weir_purged_claims_total",
            "Claims removed by retention purges (legal holds exempt)",
        ));
        let auth_refused = must(IntCounterVec::new(
            Opts::new(
                "weir_auth_refused_total",
                "Requests refused by access control, by reason",
            ),
            &["reason"],
        ));
        let stream_claims = must(IntCounterVec::new(
            Opts::new(
                "weir_stream_claims_total",
                "Claims from the stream decided and acknowledged, by intake status",
            ),
            &["status"],
        ));
        let stream_dead_letters = must(IntCounterVec::new(
            Opts::new(
                "weir_stream_dead_letters_total",
                "Stream messages sent to the dead-letter subject, by reason",
            ),
            &["reason"],
        ));
        let stream_redeliveries = must(IntCounter::new(
            "weir_stream_redeliveries_total",
            "Stream messages delivered more than once (crash, timeout or retry)",
        ));
        for s in ["new", "duplicate", "revised"] {
            stream_claims.with_label_values(&[s]);
        }
        for r in ["invalid_claim", "undecidable"] {
            stream_dead_letters.with_label_values(&[r]);
        }
        for r in ["missing_key", "unknown_key", "role"] {
            auth_refused.with_label_values(&[r]);
        }
        for o in crate::feedback::Outcome::ALL {
            outcomes.with_label_values(&[o.as_str()]);
        }
        for c in [
            Box::new(outcomes.clone()) as Box<dyn prometheus::core::Collector>,
            Box::new(drift_psi.clone()),
            Box::new(precision.clone()),
            Box::new(awaiting_outcome.clone()),
            Box::new(referral_rate_ratio.clone()),
            Box::new(claims_received.clone()),
            Box::new(claims_rejected.clone()),
            Box::new(decisions.clone()),
            Box::new(scoring_seconds.clone()),
            Box::new(queue_depth.clone()),
            Box::new(http_requests.clone()),
            Box::new(flush.clone()),
            Box::new(purged_claims.clone()),
            Box::new(auth_refused.clone()),
            Box::new(stream_claims.clone()),
            Box::new(stream_dead_letters.clone()),
            Box::new(stream_redeliveries.clone()),
        ] {
            must(registry.register(c));
        }
        // Series that exist from the start, so dashboards and alerts see zeros, not gaps.
        for r in REJECT_REASONS {
            claims_rejected.with_label_values(&[r]);
        }
        for s in ["new", "duplicate", "revised"] {
            claims_received.with_label_values(&[s]);
        }
        for q in Queue::ALL {
            decisions.with_label_values(&[q.as_str()]);
        }
        for q in Queue::WORKED {
            queue_depth.with_label_values(&[q.as_str()]);
        }
        Metrics {
            registry,
            claims_received,
            claims_rejected,
            decisions,
            scoring_seconds,
            queue_depth,
            http_requests,
            outcomes,
            drift_psi,
            precision,
            awaiting_outcome,
            referral_rate_ratio,
            purged_claims,
            auth_refused,
            stream_claims,
            stream_dead_letters,
            stream_redeliveries,
        }
    }

    pub fn render(&self) -> String {
        let mut buf = Vec::new();
        let _ = TextEncoder::new().encode(&self.registry.gather(), &mut buf);
        String::from_utf8(buf).unwrap_or_default()
    }
}

/// Structured logs to standard error: JSON lines or human-readable text. `RUST_LOG` filters.
pub fn init_logs(format: crate::config::LogFormat) {
    use tracing_subscriber::EnvFilter;
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .with_writer(std::io::stderr);
    let _ = match format {
        crate::config::LogFormat::Json => builder.json().flatten_event(true).try_init(),
        crate::config::LogFormat::Text => builder.try_init(),
    };
}
