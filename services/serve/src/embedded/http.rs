//! The ingest endpoint of embedded mode: `POST /v1/events` with a body of
//! NDJSON lines, answered once every line of the body is committed, with
//! a result per line.
//!
//! Memory is bounded: the body is at most `embedded.max_body_bytes` (413
//! above, before anything is applied), it is kept as it came and cut into
//! lines only as the pipeline takes them (no copy and no index per line:
//! a request costs its body, whatever its line count), at most `embedded.queue_requests` requests wait for
//! the pipeline (one more gets 429 with `Retry-After` at once), and the
//! pipeline takes a request's lines in batches of at most the batch limit
//! (`batch_size`, growing to `max_batch_size` under a backlog), so one big
//! request is not one big batch. An ingest token, when configured, is
//! checked before the body is read ([`crate::auth`]).

use std::sync::mpsc::{SyncSender, TrySendError};

use axum::body::Bytes;
use axum::extract::{DefaultBodyLimit, State};
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::post;
use axum::{Json, Router};
use serde::Serialize;

use crate::auth::BearerToken;

/// At most this many rejected lines are described in one reply; the
/// others are counted in `errors_omitted`.
pub const MAX_REPORTED_ERRORS: usize = 100;

/// Seconds a client is asked to wait after a 429 (`Retry-After`, RFC 9110
/// section 10.2.3).
pub const RETRY_AFTER_SECONDS: u32 = 1;

/// One HTTP ingest request.
pub struct IngestRequest {
    /// The body: NDJSON lines, at least one of them not blank.
    pub body: Bytes,
    /// Where the answer goes.
    pub reply: tokio::sync::oneshot::Sender<IngestReply>,
}

/// A position in a body: the lines before `pos` are taken; `line` is the
/// 1-based number of the line starting at `pos`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Cursor {
    /// Byte offset of the next line.
    pub pos: usize,
    /// Its 1-based line number.
    pub line: usize,
}

impl Default for Cursor {
    fn default() -> Self {
        Cursor { pos: 0, line: 1 }
    }
}

/// The next non-blank line of `body` at or after `at` (a trailing `\r`
/// removed) with its 1-based number, moving `at` past it; `None` at the end.
pub fn next_line<'a>(body: &'a [u8], at: &mut Cursor) -> Option<(usize, &'a [u8])> {
    while at.pos < body.len() {
        let start = at.pos;
        let end = body[start..].iter().position(|b| *b == b'\n').map_or(body.len(), |i| start + i);
        let n = at.line;
        at.pos = end + 1;
        at.line += 1;
        let line = &body[start..end];
        let line = line.strip_suffix(b"\r").unwrap_or(line);
        if !line.iter().all(u8::is_ascii_whitespace) {
            return Some((n, line));
        }
    }
    None
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
    /// Valid lines dropped unread because their `consent.measurement` is
    /// false (contract: Input events, Consent).
    pub without_consent: usize,
    /// Lines rejected (see `errors`).
    pub rejected: usize,
    /// One entry per rejected line, the first [`MAX_REPORTED_ERRORS`].
    pub errors: Vec<LineError>,
    /// Rejected lines beyond those in `errors`.
    pub errors_omitted: usize,
}

impl IngestReply {
    /// Counts a rejected line, describing it while there is room.
    pub fn reject(&mut self, e: LineError) {
        self.rejected += 1;
        if self.errors.len() < MAX_REPORTED_ERRORS {
            self.errors.push(e);
        } else {
            self.errors_omitted += 1;
        }
    }
}

#[derive(Clone)]
struct IngestState {
    tx: SyncSender<IngestRequest>,
    pseudo: apportion_engine::Pseudonymizer,
    /// Bodies that may be read at once.
    slots: std::sync::Arc<tokio::sync::Semaphore>,
}

/// A slot for reading one request body, taken before the body is read
/// (extractors of the request head run first) and given back by the
/// handler once the body is in memory; none free: `429`.
struct UploadSlot(#[allow(dead_code)] tokio::sync::OwnedSemaphorePermit);

impl axum::extract::FromRequestParts<IngestState> for UploadSlot {
    type Rejection = Response;

    async fn from_request_parts(
        _parts: &mut axum::http::request::Parts,
        state: &IngestState,
    ) -> Result<Self, Self::Rejection> {
        state
            .slots
            .clone()
            .try_acquire_owned()
            .map(UploadSlot)
            .map_err(|_| too_many("too many ingest bodies are being read at once"))
    }
}

/// The ingest router: `POST /v1/events` with NDJSON lines. 202 when every
/// line was accepted (or a duplicate), and for a body with no line at all;
/// 400 with per-line reasons when some were rejected (the other lines of
/// the body are still applied: do not resend them, although resending is
/// harmless because ids are deduplicated); 413 when the body is longer
/// than `max_body`; 429 with `Retry-After` when `tx` is full; 401 without
/// the right bearer token when `token` is set.
///
/// At most `uploads` request bodies are read at once: one more gets `429`
/// before its body is read, so ingest holds at most `uploads` bodies being
/// read plus the queue's.
pub fn ingest_router(
    tx: SyncSender<IngestRequest>,
    pseudo: apportion_engine::Pseudonymizer,
    max_body: usize,
    uploads: usize,
    token: Option<BearerToken>,
) -> Router {
    let slots = std::sync::Arc::new(tokio::sync::Semaphore::new(uploads));
    let router = Router::new()
        .route("/v1/events", post(ingest_handler))
        .route("/v1/erase", post(erase))
        .layer(DefaultBodyLimit::max(max_body))
        .with_state(IngestState { tx, pseudo, slots });
    match token {
        Some(t) => crate::auth::protect(router, t),
        None => router,
    }
}

/// Counts the requests `router` refuses before applying anything (401, 413,
/// 429) in `apportion_ingest_requests_refused_total`.
pub fn count_refusals(router: Router, metrics: crate::metrics::Metrics) -> Router {
    router.layer(axum::middleware::from_fn(move |req: axum::extract::Request, next: axum::middleware::Next| {
        let metrics = metrics.clone();
        async move {
            let resp = next.run(req).await;
            let reason = match resp.status() {
                StatusCode::UNAUTHORIZED => Some("unauthorized"),
                StatusCode::PAYLOAD_TOO_LARGE => Some("too_large"),
                StatusCode::TOO_MANY_REQUESTS => Some("queue_full"),
                _ => None,
            };
            if let Some(r) = reason {
                metrics.ingest_refused.with_label_values(&[r]).inc();
            }
            resp
        }
    }))
}

/// Every non-blank line of `body` with its 1-based number (see [`next_line`]).
pub fn split_lines(body: &[u8]) -> Vec<(usize, &[u8])> {
    let mut at = Cursor::default();
    std::iter::from_fn(|| next_line(body, &mut at)).collect()
}

/// `POST /v1/erase` with `{"user_id": "..."}` or `{"user_key": "..."}` and
/// an optional `"request_id"` ([`crate::erase_request`]): an `erase` event
/// for the user (by key), timed now, through the same queue and pipeline as
/// ingested events (so it is applied in order, deduplicated and audited
/// like one; contract: HTTP ingest).
async fn erase(State(s): State<IngestState>, slot: UploadSlot, body: Bytes) -> Response {
    drop(slot);
    let req = match crate::erase_request::EraseRequest::parse(&body, &s.pseudo) {
        Ok(r) => r,
        Err(e) => return (StatusCode::BAD_REQUEST, format!("{e}\n")).into_response(),
    };
    let mut line = req.event_line(crate::pipeline::now_ms());
    line.push(b'\n');
    ingest(State(s), Bytes::from(line)).await
}

/// `POST /v1/events`: the body is read under an upload slot.
async fn ingest_handler(State(s): State<IngestState>, slot: UploadSlot, body: Bytes) -> Response {
    drop(slot);
    ingest(State(s), body).await
}

/// `429` with `Retry-After`: nothing of the request was applied.
fn too_many(why: &str) -> Response {
    (
        StatusCode::TOO_MANY_REQUESTS,
        [(header::RETRY_AFTER, RETRY_AFTER_SECONDS.to_string())],
        format!("{why}; nothing of this one was applied, retry after the Retry-After seconds\n"),
    )
        .into_response()
}

async fn ingest(State(s): State<IngestState>, body: Bytes) -> Response {
    if body.iter().all(u8::is_ascii_whitespace) {
        // Nothing to apply: answered at once, without a batch.
        return (StatusCode::ACCEPTED, Json(IngestReply::default())).into_response();
    }
    let (reply, rx) = tokio::sync::oneshot::channel();
    match s.tx.try_send(IngestRequest { body, reply }) {
        Ok(()) => {}
        Err(TrySendError::Full(_)) => return too_many("too many ingest requests are waiting"),
        Err(TrySendError::Disconnected(_)) => {
            return (StatusCode::SERVICE_UNAVAILABLE, "the service is shutting down\n").into_response()
        }
    }
    match rx.await {
        Ok(r) if r.rejected == 0 => (StatusCode::ACCEPTED, Json(r)).into_response(),
        Ok(r) => (StatusCode::BAD_REQUEST, Json(r)).into_response(),
        Err(_) => (
            StatusCode::SERVICE_UNAVAILABLE,
            "the request was not (or not completely) committed; resend it (lines already applied count as duplicates)\n",
        )
            .into_response(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use tokio::io::{AsyncReadExt, AsyncWriteExt};

    /// Serves `router` on a free loopback port.
    async fn serve(router: Router) -> std::net::SocketAddr {
        let l = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let addr = l.local_addr().unwrap();
        tokio::spawn(async move { axum::serve(l, router).await.unwrap() });
        addr
    }

    /// One HTTP/1.0 request: (status, head, body).
    async fn post(addr: std::net::SocketAddr, headers: &str, body: &[u8]) -> (u16, String, String) {
        let mut s = tokio::net::TcpStream::connect(addr).await.unwrap();
        let head =
            format!("POST /v1/events HTTP/1.0\r\nHost: localhost\r\nContent-Length: {}\r\n{headers}\r\n", body.len());
        s.write_all(head.as_bytes()).await.unwrap();
        let _ = s.write_all(body).await;
        let mut buf = Vec::new();
        let _ = s.read_to_end(&mut buf).await;
        let text = String::from_utf8_lossy(&buf).into_owned();
        let status = text.split_whitespace().nth(1).unwrap().parse().unwrap();
        let (h, b) = text.split_once("\r\n\r\n").unwrap_or((&text, ""));
        (status, h.to_ascii_lowercase(), b.to_string())
    }

    /// Answers every queued request with `accepted` = its line count.
    fn answer_all(rx: std::sync::mpsc::Receiver<IngestRequest>) {
        std::thread::spawn(move || {
            for r in rx {
                let _ = r.reply.send(IngestReply { accepted: split_lines(&r.body).len(), ..Default::default() });
            }
        });
    }

    #[test]
    fn lines_are_cut_with_their_numbers() {
        assert_eq!(split_lines(b"a\r\n\n  \nbc\nd"), vec![(1, &b"a"[..]), (4, &b"bc"[..]), (5, &b"d"[..])]);
        assert_eq!(split_lines(b"a\n"), vec![(1, &b"a"[..])]);
        assert!(split_lines(b"").is_empty());
        assert!(split_lines(b"\n\r\n \t\n").is_empty());
    }

    #[tokio::test]
    async fn body_over_the_limit_is_413() {
        let (tx, rx) = std::sync::mpsc::sync_channel(4);
        answer_all(rx);
        let addr = serve(ingest_router(tx, apportion_engine::Pseudonymizer::new(b"http-test-key"), 64, 16, None)).await;
        let (status, _, _) = post(addr, "", &[b'x'; 65]).await;
        // RFC 9110 section 15.5.14: 413 Content Too Large.
        assert_eq!(status, 413);
        let (status, _, body) = post(addr, "", &[b'x'; 64]).await;
        assert_eq!(status, 202, "{body}");
    }

    #[tokio::test]
    async fn a_token_is_required_when_configured() {
        let (tx, rx) = std::sync::mpsc::sync_channel(4);
        answer_all(rx);
        let addr = serve(ingest_router(
            tx,
            apportion_engine::Pseudonymizer::new(b"http-test-key"),
            1 << 20,
            16,
            Some(BearerToken::new("mF_9.B5f-4.1JqM")),
        ))
        .await;
        // RFC 6750 section 3.1: 401 with a Bearer challenge; no error code
        // when the request has no credentials, invalid_token when wrong.
        let (status, head, _) = post(addr, "", b"{}\n").await;
        assert_eq!(status, 401);
        assert!(head.contains("www-authenticate: bearer realm=\"apportion\""), "{head}");
        assert!(!head.contains("invalid_token"), "{head}");
        let (status, head, _) = post(addr, "Authorization: Bearer wrong\r\n", b"{}\n").await;
        assert_eq!(status, 401);
        assert!(head.contains("www-authenticate: bearer") && head.contains("error=\"invalid_token\""), "{head}");
        let (status, _, body) = post(addr, "Authorization: Bearer mF_9.B5f-4.1JqM\r\n", b"{}\n{}\n").await;
        assert_eq!(status, 202, "{body}");
        assert_eq!(serde_json::from_str::<serde_json::Value>(&body).unwrap()["accepted"], 2);
        // The check comes before the body limit: no token, a large body, 401.
        let (status, _, _) = post(addr, "", &vec![b'x'; 2 << 20]).await;
        assert_eq!(status, 401);
    }

    #[tokio::test]
    async fn a_full_queue_is_429_with_retry_after() {
        // A queue of one, already holding a request nobody reads (a stalled pipeline).
        let (tx, rx) = std::sync::mpsc::sync_channel(1);
        let (held, _held_rx) = tokio::sync::oneshot::channel();
        tx.try_send(IngestRequest { body: Bytes::from_static(b"{}"), reply: held }).unwrap();
        let addr =
            serve(ingest_router(tx, apportion_engine::Pseudonymizer::new(b"http-test-key"), 1 << 20, 16, None)).await;
        let (status, head, _) = post(addr, "", b"{}\n").await;
        assert_eq!(status, 429);
        // RFC 9110 section 10.2.3: Retry-After as delay-seconds.
        assert!(head.contains(&format!("retry-after: {RETRY_AFTER_SECONDS}")), "{head}");
        // Once the pipeline has read the queue, the retry is taken and answered.
        let _taken = rx.recv().unwrap();
        answer_all(rx);
        let (status, _, body) = post(addr, "", b"{}\n").await;
        assert_eq!(status, 202, "{body}");
    }

    #[tokio::test]
    async fn uploads_beyond_the_limit_are_429_before_their_body_is_read() {
        // One request in flight at most: an upload whose body is still
        // arriving holds the slot, so a second request is refused at once
        // (RFC 9110 section 15.5.30) without reading its body; once the
        // first is answered the slot is free again.
        let (tx, rx) = std::sync::mpsc::sync_channel(16);
        answer_all(rx);
        let addr =
            serve(ingest_router(tx, apportion_engine::Pseudonymizer::new(b"http-test-key"), 1 << 20, 1, None)).await;
        let mut slow = tokio::net::TcpStream::connect(addr).await.unwrap();
        slow.write_all(b"POST /v1/events HTTP/1.0\r\nHost: localhost\r\nContent-Length: 3\r\n\r\n{}").await.unwrap();
        tokio::time::sleep(std::time::Duration::from_millis(200)).await;
        let (status, head, _) = post(addr, "", b"{}\n").await;
        assert_eq!(status, 429);
        assert!(head.contains(&format!("retry-after: {RETRY_AFTER_SECONDS}")), "{head}");
        slow.write_all(b"\n").await.unwrap();
        let mut buf = Vec::new();
        slow.read_to_end(&mut buf).await.unwrap();
        assert!(String::from_utf8_lossy(&buf).starts_with("HTTP/1.0 202"), "{}", String::from_utf8_lossy(&buf));
        let (status, _, body) = post(addr, "", b"{}\n").await;
        assert_eq!(status, 202, "{body}");
    }

    #[tokio::test]
    async fn an_empty_body_is_answered() {
        // Nobody reads the queue: an empty body must not wait for it.
        let (tx, _rx) = std::sync::mpsc::sync_channel(1);
        let addr =
            serve(ingest_router(tx, apportion_engine::Pseudonymizer::new(b"http-test-key"), 1 << 20, 16, None)).await;
        for body in [&b""[..], b"\n\r\n  \n"] {
            let (status, _, reply) =
                tokio::time::timeout(std::time::Duration::from_secs(10), post(addr, "", body)).await.expect("answered");
            assert_eq!(status, 202, "{reply}");
            let v: serde_json::Value = serde_json::from_str(&reply).unwrap();
            assert_eq!((v["accepted"].as_u64(), v["rejected"].as_u64()), (Some(0), Some(0)));
        }
    }

    #[test]
    fn rejected_lines_are_described_up_to_the_cap() {
        let mut r = IngestReply::default();
        for line in 1..=MAX_REPORTED_ERRORS + 7 {
            r.reject(LineError { line, reason: "invalid_json".into(), detail: String::new() });
        }
        assert_eq!((r.rejected, r.errors.len(), r.errors_omitted), (MAX_REPORTED_ERRORS + 7, MAX_REPORTED_ERRORS, 7));
        assert_eq!(r.errors.last().unwrap().line, MAX_REPORTED_ERRORS);
    }
}
