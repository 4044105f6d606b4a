//! Stream intake: claims taken from a NATS JetStream stream by a durable pull consumer that
//! every instance shares, so each claim goes to one instance at a time.
//!
//! For each message: parse and validate exactly as `POST /v1/claims` does; decide; wait until
//! the decision is durable; publish it on the decisions subject (message id `claim:revision`,
//! so JetStream drops a republication within its duplicate window); only then acknowledge the
//! claim. A claim redelivered after a crash (or a lost acknowledgement) is recognised by its id
//! and content hash and answered with the stored decision, not scored again; so is an older
//! version of a claim delivered after a newer one (each decision records the stream sequence
//! it came from, and a lower sequence never overwrites a higher one).
//!
//! A message that can never be decided goes to the dead-letter subject with the reason in its
//! headers and is terminated: at once when it is not a valid claim (it would fail the same way
//! every time), after `max_deliver` tries when deciding fails (a store outage, say). Both are
//! counted in `weir_stream_dead_letters_total`.

use crate::claim::Claim;
use crate::config::StreamConfig;
use crate::service::{Decision, Service};
use async_nats::jetstream::{self, AckKind, consumer::pull, stream};
use futures_util::StreamExt;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::{Semaphore, watch};

/// The stream consumer's view of its dependency, for `/readyz`.
pub struct Health {
    client: async_nats::Client,
    consuming: std::sync::atomic::AtomicBool,
}

impl Health {
    /// Connected to NATS and consuming.
    pub fn ready(&self) -> bool {
        self.client.connection_state() == async_nats::connection::State::Connected
            && self.consuming.load(std::sync::atomic::Ordering::SeqCst)
    }

    pub fn state(&self) -> String {
        format!("{:?}", self.client.connection_state()).to_lowercase()
    }
}

/// Header names on dead letters.
pub const REASON_HEADER: &str = "Weir-Reason";
pub const DETAIL_HEADER: &str = "Weir-Detail";
pub const SEQUENCE_HEADER: &str = "Weir-Stream-Sequence";

/// Connect (retrying in the background if NATS is not up yet) and make sure the streams and
/// the durable consumer exist. Returns the consumer task's handle; it stops pulling when
/// `stop` turns true and returns once its in-flight claims are finished.
pub async fn start(
    svc: Service,
    cfg: StreamConfig,
    mut stop: watch::Receiver<bool>,
) -> anyhow::Result<(Arc<Health>, tokio::task::JoinHandle<()>)> {
    let client = async_nats::ConnectOptions::new()
        .name("weir")
        .retry_on_initial_connect()
        .connect(cfg.url.as_str())
        .await?;
    let health = Arc::new(Health {
        client: client.clone(),
        consuming: false.into(),
    });
    let h = Arc::clone(&health);
    let task = tokio::spawn(async move {
        let js = jetstream::new(client);
        loop {
            match consume(&svc, &cfg, &js, &h, &mut stop).await {
                Ok(()) => break,
                Err(e) => {
                    h.consuming
                        .store(false, std::sync::atomic::Ordering::SeqCst);
                    tracing::error!(error = %e, "claims stream: consumer failed; retrying in 2 s");
                    tokio::select! {
                        _ = tokio::time::sleep(Duration::from_secs(2)) => {}
                        _ = stop.wait_for(|s| *s) => break,
                    }
                }
            }
        }
        h.consuming
            .store(false, std::sync::atomic::Ordering::SeqCst);
    });
    Ok((health, task))
}

/// Create the claims, decisions and dead-letter streams when missing (an operator may have
/// made them already, with replicas and limits of their own: existing ones are used as they
/// are).
pub async fn ensure_streams(js: &jetstream::Context, cfg: &StreamConfig) -> anyhow::Result<()> {
    js.get_or_create_stream(stream::Config {
        name: cfg.stream.clone(),
        subjects: vec![cfg.subject.clone()],
        // Each claim is for one consumer and leaves the stream once acknowledged.
        retention: stream::RetentionPolicy::WorkQueue,
        storage: stream::StorageType::File,
        ..Default::default()
    })
    .await?;
    for (name, subject) in [
        (&cfg.decisions_stream, &cfg.decisions_subject),
        (&cfg.dead_letter_stream, &cfg.dead_letter_subject),
    ] {
        js.get_or_create_stream(stream::Config {
            name: name.clone(),
            subjects: vec![subject.clone()],
            storage: stream::StorageType::File,
            ..Default::default()
        })
        .await?;
    }
    Ok(())
}

async fn consume(
    svc: &Service,
    cfg: &StreamConfig,
    js: &jetstream::Context,
    health: &Health,
    stop: &mut watch::Receiver<bool>,
) -> anyhow::Result<()> {
    ensure_streams(js, cfg).await?;
    let claims = js.get_stream(&cfg.stream).await?;
    let consumer: jetstream::consumer::PullConsumer = claims
        .get_or_create_consumer(
            &cfg.consumer,
            pull::Config {
                durable_name: Some(cfg.consumer.clone()),
                ack_policy: jetstream::consumer::AckPolicy::Explicit,
                ack_wait: Duration::from_secs(cfg.ack_wait_seconds),
                // No server-side limit: the server would stop delivering a message after its
                // last try and leave it in the stream unacknowledged. weir counts tries itself
                // and dead-letters at `max_deliver`, so every message ends acknowledged.
                max_deliver: -1,
                ..Default::default()
            },
        )
        .await?;
    let mut messages = consumer
        .stream()
        .max_messages_per_batch(cfg.in_flight)
        .heartbeat(Duration::from_secs(5))
        .expires(Duration::from_secs(10))
        .messages()
        .await?;
    health
        .consuming
        .store(true, std::sync::atomic::Ordering::SeqCst);
    tracing::info!(stream = %cfg.stream, consumer = %cfg.consumer, "claims stream: consuming");
    let slots = Arc::new(Semaphore::new(cfg.in_flight));
    let cfg = Arc::new(cfg.clone());
    loop {
        let next = tokio::select! {
            m = messages.next() => m,
            _ = stop.wait_for(|s| *s) => None,
        };
        let Some(msg) = next else { break };
        let msg = msg?;
        let permit = Arc::clone(&slots).acquire_owned().await?;
        // The wait for a slot counts against the message's ack wait: say it is in hand.
        let _ = msg.ack_with(AckKind::Progress).await;
        let (svc, js, cfg) = (svc.clone(), js.clone(), Arc::clone(&cfg));
        tokio::spawn(async move {
            handle(&svc, &js, &cfg, msg).await;
            drop(permit);
        });
    }
    // Finish what is in flight; anything not acknowledged is delivered again elsewhere.
    let _all = slots.acquire_many(cfg.in_flight as u32).await?;
    Ok(())
}

async fn handle(
    svc: &Service,
    js: &jetstream::Context,
    cfg: &StreamConfig,
    msg: jetstream::Message,
) {
    let (delivered, sequence) = msg
        .info()
        .map(|i| (i.delivered, i.stream_sequence))
        .unwrap_or((1, 0));
    if delivered > 1 {
        svc.metrics.stream_redeliveries.inc();
    }
    let claim = match Claim::from_json(&msg.payload) {
        Ok(c) => c,
        Err(e) => {
            dead_letter(
                svc,
                js,
                cfg,
                &msg,
                sequence,
                "invalid_claim",
                &e.to_string(),
            )
            .await;
            return;
        }
    };
    let claim_id = claim.claim_id.clone();
    // While deciding (a claim may wait on another one's locks), keep telling the stream the
    // message is in hand, so it is not delivered to a second instance meanwhile.
    let decided = {
        let work = decide_and_publish(svc, js, cfg, claim, sequence);
        tokio::pin!(work);
        let every = Duration::from_millis((cfg.ack_wait_seconds * 1000 / 2).max(500));
        loop {
            tokio::select! {
                r = &mut work => break r,
                _ = tokio::time::sleep(every) => {
                    let _ = msg.ack_with(AckKind::Progress).await;
                }
            }
        }
    };
    match decided {
        Ok(status) => {
            svc.metrics.stream_claims.with_label_values(&[status]).inc();
            if let Err(e) = msg.ack().await {
                // The decision is stored: a redelivery will be recognised as a duplicate.
                tracing::warn!(claim_id, error = %e, "claims stream: acknowledgement failed");
            }
        }
        Err(e) if delivered >= cfg.max_deliver => {
            dead_letter(svc, js, cfg, &msg, sequence, "undecidable", &e.to_string()).await;
        }
        Err(e) => {
            tracing::warn!(claim_id, delivered, error = %e, "claims stream: will retry");
            let delay = Duration::from_secs((delivered.clamp(1, 30)) as u64);
            let _ = msg.ack_with(AckKind::Nak(Some(delay))).await;
        }
    }
}

async fn decide_and_publish(
    svc: &Service,
    js: &jetstream::Context,
    cfg: &StreamConfig,
    claim: Claim,
    sequence: u64,
) -> anyhow::Result<&'static str> {
    let decision: Decision = svc
        .intake_from_stream(claim, chrono::Utc::now(), sequence)
        .await?;
    let mut headers = async_nats::HeaderMap::new();
    headers.insert(
        "Nats-Msg-Id",
        format!("{}:{}", decision.claim_id, decision.revision).as_str(),
    );
    js.publish_with_headers(
        cfg.decisions_subject.clone(),
        headers,
        serde_json::to_vec(&decision)?.into(),
    )
    .await?
    .await?;
    Ok(decision.status.as_str())
}

async fn dead_letter(
    svc: &Service,
    js: &jetstream::Context,
    cfg: &StreamConfig,
    msg: &jetstream::Message,
    sequence: u64,
    reason: &'static str,
    detail: &str,
) {
    let mut headers = async_nats::HeaderMap::new();
    headers.insert(REASON_HEADER, reason);
    // Header values are one line.
    headers.insert(DETAIL_HEADER, detail.replace(['\r', '\n'], " ").as_str());
    headers.insert(SEQUENCE_HEADER, sequence.to_string().as_str());
    headers.insert(
        "Nats-Msg-Id",
        format!("dead:{}:{sequence}", cfg.stream).as_str(),
    );
    let published = match js
        .publish_with_headers(
            cfg.dead_letter_subject.clone(),
            headers,
            msg.payload.clone(),
        )
        .await
    {
        Ok(ack) => ack.await.is_ok(),
        Err(_) => false,
    };
    if published {
        svc.metrics
            .stream_dead_letters
            .with_label_values(&[reason])
            .inc();
        tracing::warn!(reason, sequence, "claims stream: message dead-lettered");
        let _ = msg.ack_with(AckKind::Term).await;
    } else {
        // Keep it in the stream rather than lose it: it is delivered again later (the consumer
        // has no delivery limit of its own, see `consume`).
        tracing::error!(
            reason,
            sequence,
            "claims stream: dead-letter publish failed"
        );
        let _ = msg
            .ack_with(AckKind::Nak(Some(Duration::from_secs(5))))
            .await;
    }
}
