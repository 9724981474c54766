//! HTTP endpoints: admin (`/metrics`, `/healthz`, `/readyz`, `/v1/models`)
//! and, in embedded mode, ingest (`POST /v1/events`).

use std::sync::mpsc::SyncSender;
use std::sync::{Arc, Mutex};

use axum::body::Bytes;
use axum::extract::{DefaultBodyLimit, State};
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};

use crate::metrics::Metrics;
use crate::serve::embedded::IngestRequest;
use crate::serve::Shared;

#[derive(Clone)]
struct AdminState {
    metrics: Metrics,
    shared: Arc<Mutex<Shared>>,
}

/// The admin router.
pub fn admin_router(metrics: Metrics, shared: Arc<Mutex<Shared>>) -> Router {
    Router::new()
        .route("/metrics", get(metrics_handler))
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .route("/v1/models", get(models))
        .with_state(AdminState { metrics, shared })
}

async fn metrics_handler(State(s): State<AdminState>) -> Response {
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], s.metrics.render()).into_response()
}

async fn healthz(State(s): State<AdminState>) -> Response {
    match s.shared.lock().expect("shared").failed.clone() {
        None => (StatusCode::OK, "ok\n").into_response(),
        Some(e) => (StatusCode::SERVICE_UNAVAILABLE, format!("processing stopped: {e}\n")).into_response(),
    }
}

async fn readyz(State(s): State<AdminState>) -> Response {
    let sh = s.shared.lock().expect("shared");
    if sh.ready {
        (StatusCode::OK, "ready\n").into_response()
    } else {
        (StatusCode::SERVICE_UNAVAILABLE, "not ready: store opening, partitions not assigned, or lag above the limit\n")
            .into_response()
    }
}

async fn models(State(s): State<AdminState>) -> Response {
    let v = s.shared.lock().expect("shared").models.clone();
    Json(v).into_response()
}

/// The ingest router: `POST /v1/events` with NDJSON lines. 202 when every
/// line was accepted (or a duplicate); 400 with per-line reasons when some
/// were rejected (the other lines of the body are still applied: do not
/// resend them, although resending is harmless because ids are deduplicated).
pub fn ingest_router(tx: SyncSender<IngestRequest>, max_body: usize) -> Router {
    Router::new().route("/v1/events", post(ingest)).layer(DefaultBodyLimit::max(max_body)).with_state(tx)
}

async fn ingest(State(tx): State<SyncSender<IngestRequest>>, body: Bytes) -> Response {
    let lines: Vec<(usize, Vec<u8>)> = body
        .split(|b| *b == b'\n')
        .enumerate()
        .map(|(i, l)| (i + 1, l.strip_suffix(b"\r").unwrap_or(l).to_vec()))
        .filter(|(_, l)| !l.iter().all(u8::is_ascii_whitespace))
        .collect();
    let (reply, rx) = tokio::sync::oneshot::channel();
    let req = IngestRequest { lines, reply };
    let sent = tokio::task::spawn_blocking(move || tx.send(req)).await;
    if !matches!(sent, Ok(Ok(()))) {
        return (StatusCode::SERVICE_UNAVAILABLE, "the service is shutting down\n").into_response();
    }
    match rx.await {
        Ok(r) if r.rejected == 0 => (StatusCode::ACCEPTED, Json(r)).into_response(),
        Ok(r) => (StatusCode::BAD_REQUEST, Json(r)).into_response(),
        Err(_) => (StatusCode::SERVICE_UNAVAILABLE, "the batch was not committed; resend it\n").into_response(),
    }
}
