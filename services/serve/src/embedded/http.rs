//! The ingest endpoint of embedded mode: `POST /v1/events` with a body of
//! NDJSON lines, answered once the lines' batch is committed, with a result
//! per line.

use std::sync::mpsc::SyncSender;

use axum::body::Bytes;
use axum::extract::{DefaultBodyLimit, State};
use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};
use axum::routing::post;
use axum::{Json, Router};
use serde::Serialize;

/// One HTTP ingest request.
pub struct IngestRequest {
    /// Non-empty lines with their 1-based line numbers in the body.
    pub lines: Vec<(usize, Vec<u8>)>,
    /// Where the answer goes.
    pub reply: tokio::sync::oneshot::Sender<IngestReply>,
}

/// Per-line problem in an ingest reply.
#[derive(Debug, Clone, Serialize)]
pub struct LineError {
    /// 1-based line number in the request body.
    pub line: usize,
    /// Machine-readable reason.
    pub reason: String,
    /// Detail.
    pub detail: String,
}

/// The answer to an ingest request.
#[derive(Debug, Clone, Default, Serialize)]
pub struct IngestReply {
    /// Lines applied.
    pub accepted: usize,
    /// Lines dropped as duplicates.
    pub duplicates: usize,
    /// Lines rejected (see `errors`).
    pub rejected: usize,
    /// One entry per rejected line.
    pub errors: Vec<LineError>,
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
