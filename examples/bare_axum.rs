//! The ceiling of the HTTP stack on this machine: an axum server that parses and validates the
//! same claim JSON as weir (`Claim::from_json`) and answers a small JSON object, with no
//! features, scoring, store or disk. `ops/load/run.sh` drives it with the same wrk script as
//! weir and prints weir's throughput as a share of this one.
//!
//! `cargo run --release --example bare_axum -- 127.0.0.1:18081`

use axum::Router;
use axum::body::Bytes;
use axum::http::StatusCode;
use axum::response::IntoResponse;
use axum::routing::post;

async fn one(body: Bytes) -> impl IntoResponse {
    match weir::claim::Claim::from_json(&body) {
        Ok(c) => (
            StatusCode::CREATED,
            axum::Json(serde_json::json!({"claim_id": c.claim_id, "queue": "no_review"})),
        ),
        Err(e) => (
            StatusCode::UNPROCESSABLE_ENTITY,
            axum::Json(serde_json::json!({"detail": e.to_string()})),
        ),
    }
}

async fn batch(body: Bytes) -> impl IntoResponse {
    let mut out = Vec::new();
    for line in body.split(|&b| b == b'\n').filter(|l| !l.is_empty()) {
        let v = match weir::claim::Claim::from_json(line) {
            Ok(c) => serde_json::json!({"claim_id": c.claim_id, "queue": "no_review"}),
            Err(e) => serde_json::json!({"detail": e.to_string()}),
        };
        out.extend_from_slice(v.to_string().as_bytes());
        out.push(b'\n');
    }
    out
}

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    let addr = std::env::args()
        .nth(1)
        .unwrap_or_else(|| "127.0.0.1:18081".into());
    let app = Router::new()
        .route("/v1/claims", post(one))
        .route("/v1/claims/batch", post(batch))
        .layer(axum::extract::DefaultBodyLimit::max(512 * 1024 * 1024));
    let listener = tokio::net::TcpListener::bind(&addr).await?;
    println!("bare axum ceiling on http://{}", listener.local_addr()?);
    axum::serve(listener, app).await?;
    Ok(())
}
