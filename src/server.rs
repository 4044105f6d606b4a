//! `weir serve`: load configuration, open the store, load the model and rules, serve until
//! SIGTERM or Ctrl-C, finish in-flight requests, flush the store.

use crate::access::Access;
use crate::config::Config;
use crate::http::{self, HttpSettings};
use crate::model::{Model, ModelArtifact};
use crate::rules::{Queue, RuleSet};
use crate::service::Service;
use crate::store::Store;
use anyhow::{Context, Result};
use std::net::SocketAddr;

/// Everything loaded and checked, ready to bind. Fails with every reason it can find.
pub fn build(config: &Config) -> Result<(Service, HttpSettings)> {
    let access = load_access(config)?;
    let svc = build_service(config)?;
    let settings = HttpSettings {
        body_limit_bytes: config.server.body_limit_bytes,
        concurrency_limit: config.server.concurrency_limit,
        request_timeout: std::time::Duration::from_secs(config.server.request_timeout_seconds),
        batch_limit_bytes: config.server.batch_limit_bytes,
        batch_line_bytes: config.server.batch_line_bytes,
        capacities: [
            (Queue::Investigate, config.queues.investigate_capacity),
            (Queue::DeskCheck, config.queues.desk_check_capacity),
            (Queue::Audit, config.queues.audit_capacity),
        ],
        access: std::sync::Arc::new(access),
        retention_days: config.retention.days,
        retention_check_hours: config.retention.check_hours,
        stream: config.stream.enabled.then(|| config.stream.clone()),
    };
    Ok((svc, settings))
}

/// The store, model and rules of a configuration (no HTTP settings, no keys: for offline
/// commands on a stopped store).
pub fn build_service(config: &Config) -> Result<Service> {
    let artifact = ModelArtifact::read(&config.paths.model)
        .with_context(|| format!("model {}", config.paths.model.display()))?;
    let model =
        Model::new(artifact).with_context(|| format!("model {}", config.paths.model.display()))?;
    let rules = RuleSet::read(&config.paths.rules)?;
    let store = Store::from_config(&config.store).with_context(|| match config.store.backend {
        crate::config::StoreBackend::Sled => format!("store {}", config.store.path.display()),
        crate::config::StoreBackend::Postgres => "store (postgres)".to_string(),
    })?;
    let svc = Service::new(
        store,
        model,
        rules,
        config.routing.clone(),
        i64::try_from(config.queues.lease_minutes * 60).unwrap_or(i64::MAX),
    )
    .with_monitor(config.monitor.clone());
    Ok(svc)
}

/// The API keys in force: the key file, or open mode when configured (loopback only, checked
/// by the configuration).
pub fn load_access(config: &Config) -> Result<Access> {
    let access = if config.access.unauthenticated {
        tracing::warn!(
            "access.unauthenticated is set: every caller holds every role (loopback only)"
        );
        Access::Open
    } else {
        let path = &config.access.key_file;
        if !path.exists() {
            anyhow::bail!(
                "no API key file at {}: create keys with\n  weir keys add --file {} --name NAME --role ROLE\n(roles: claims_system, investigator, analyst, administrator), or set access.unauthenticated = true to try weir on a loopback address",
                path.display(),
                path.display()
            );
        }
        let a = Access::read(path)?;
        if matches!(&a, Access::Keys(k) if k.is_empty()) {
            anyhow::bail!(
                "the key file {} holds no keys: nobody could call the API",
                path.display()
            );
        }
        a
    };
    Ok(access)
}

/// Serve on an already bound listener until `shutdown` resolves.
pub async fn run(
    svc: Service,
    settings: HttpSettings,
    listener: tokio::net::TcpListener,
    shutdown: impl std::future::Future<Output = ()> + Send + 'static,
) -> Result<()> {
    svc.store.start();
    let store = svc.store.clone();
    // Monitoring gauges are recomputed in the background, never on the request path.
    let refresher = svc.clone();
    tokio::spawn(async move {
        let every = std::time::Duration::from_secs(refresher.monitor.refresh_seconds);
        loop {
            let svc = refresher.clone();
            let r = tokio::task::spawn_blocking(move || svc.refresh_monitoring(chrono::Utc::now()))
                .await;
            if let Ok(Err(e)) = r {
                tracing::warn!(error = %e, "monitoring refresh failed");
            }
            tokio::time::sleep(every).await;
        }
    });
    if settings.retention_days > 0 {
        let purger = svc.clone();
        let days = settings.retention_days;
        let every =
            std::time::Duration::from_secs(u64::from(settings.retention_check_hours) * 3600);
        tokio::spawn(async move {
            loop {
                match purger.purge(days, chrono::Utc::now()).await {
                    Ok(r) => tracing::info!(
                        purged = r.purged_claims,
                        kept_on_hold = r.kept_on_hold,
                        "retention purge"
                    ),
                    Err(e) => tracing::error!(error = %e, "retention purge failed"),
                }
                tokio::time::sleep(every).await;
            }
        });
    }
    let (stop_stream, stream_stopped) = tokio::sync::watch::channel(false);
    let consumer = match settings.stream.clone() {
        Some(cfg) => {
            let (health, task) = crate::stream::start(svc.clone(), cfg, stream_stopped)
                .await
                .context("claims stream")?;
            let _ = svc.stream_health.set(health);
            Some(task)
        }
        None => None,
    };
    let app = http::app(svc, settings);
    axum::serve(listener, app)
        .with_graceful_shutdown(shutdown)
        .await
        .context("server")?;
    if let Some(task) = consumer {
        // Stop pulling; claims in flight finish and are acknowledged before the store closes.
        let _ = stop_stream.send(true);
        let _ = task.await;
    }
    store.flush().context("final store flush")?;
    tracing::info!("stopped; store flushed");
    Ok(())
}

pub async fn bind(addr: &str) -> Result<(tokio::net::TcpListener, SocketAddr)> {
    let listener = tokio::net::TcpListener::bind(addr)
        .await
        .with_context(|| format!("cannot listen on {addr}"))?;
    let local = listener.local_addr()?;
    Ok((listener, local))
}

/// Resolves on SIGTERM or Ctrl-C.
pub async fn shutdown_signal() {
    let ctrl_c = async {
        let _ = tokio::signal::ctrl_c().await;
    };
    #[cfg(unix)]
    let term = async {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut s) => {
                s.recv().await;
            }
            Err(_) => std::future::pending::<()>().await,
        }
    };
    #[cfg(not(unix))]
    let term = std::future::pending::<()>();
    tokio::select! {
        _ = ctrl_c => {},
        _ = term => {},
    }
    tracing::info!("shutting down: finishing requests in flight");
}
