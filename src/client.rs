//! A small HTTP/1.1 client for talking to a running `weir serve` (used by `weir demo` and by
//! tests against a real server). One connection per request; enough for a demo and tests, not
//! a general-purpose client.

use anyhow::{Context, Result};
use axum::body::Bytes;
use http_body_util::{BodyExt, Full};
use hyper::{Method, Request, StatusCode, header};
use hyper_util::rt::TokioIo;
use std::net::SocketAddr;

pub struct Reply {
    pub status: StatusCode,
    pub content_type: String,
    pub body: Bytes,
}

impl Reply {
    pub fn json(&self) -> Result<serde_json::Value> {
        serde_json::from_slice(&self.body).context("reply is not JSON")
    }
}

/// Where to send requests, and the API key to send them with.
#[derive(Debug, Clone)]
pub struct Api {
    pub addr: SocketAddr,
    pub key: Option<String>,
}

impl Api {
    pub fn new(addr: SocketAddr) -> Api {
        Api { addr, key: None }
    }

    pub fn with_key(&self, key: &str) -> Api {
        Api {
            addr: self.addr,
            key: Some(key.to_string()),
        }
    }

    pub async fn request(
        &self,
        method: Method,
        path: &str,
        content_type: Option<&str>,
        body: Vec<u8>,
    ) -> Result<Reply> {
        request(
            self.addr,
            self.key.as_deref(),
            method,
            path,
            content_type,
            body,
        )
        .await
    }

    pub async fn get(&self, path: &str) -> Result<Reply> {
        self.request(Method::GET, path, None, Vec::new()).await
    }

    pub async fn post_json(&self, path: &str, body: &serde_json::Value) -> Result<Reply> {
        self.request(
            Method::POST,
            path,
            Some("application/json"),
            serde_json::to_vec(body)?,
        )
        .await
    }
}

pub async fn request(
    addr: SocketAddr,
    key: Option<&str>,
    method: Method,
    path: &str,
    content_type: Option<&str>,
    body: Vec<u8>,
) -> Result<Reply> {
    let stream = tokio::net::TcpStream::connect(addr)
        .await
        .with_context(|| format!("cannot connect to {addr}"))?;
    let (mut sender, conn) = hyper::client::conn::http1::handshake(TokioIo::new(stream)).await?;
    tokio::spawn(async move {
        let _ = conn.await;
    });
    let mut req = Request::builder()
        .method(method)
        .uri(path)
        .header(header::HOST, addr.to_string());
    if let Some(ct) = content_type {
        req = req.header(header::CONTENT_TYPE, ct);
    }
    if let Some(k) = key {
        req = req.header(header::AUTHORIZATION, format!("Bearer {k}"));
    }
    let resp = sender
        .send_request(req.body(Full::new(Bytes::from(body)))?)
        .await?;
    let status = resp.status();
    let content_type = resp
        .headers()
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("")
        .to_string();
    let body = resp.into_body().collect().await?.to_bytes();
    Ok(Reply {
        status,
        content_type,
        body,
    })
}
