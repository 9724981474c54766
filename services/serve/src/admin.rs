//! The admin HTTP endpoints: `/metrics`, `/healthz`, `/readyz`,
//! `/v1/models` and `/v1/compare`, all read-only and open; in Kafka mode
//! also `POST /v1/erase`, behind the admin token ([`erase_router`]). (The
//! ingest endpoints of embedded mode are in [`crate::embedded::http`].)

use std::sync::{Arc, Mutex};

use apportion_engine::Pseudonymizer;
use axum::body::Bytes;
use axum::extract::State;
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};

use crate::auth::BearerToken;
use crate::erase_request::EraseRequest;
use crate::kafka::erase::EraseSender;

use crate::metrics::Metrics;
use crate::run_loop::Shared;

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
        .route("/v1/compare", get(compare))
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
    if s.metrics.changelog_restoring.get() > 0 {
        (StatusCode::SERVICE_UNAVAILABLE, "not ready: restoring partitions from their changelog\n").into_response()
    } else if sh.ready {
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

/// The comparison of the models over the conversions credited since start:
/// the JSON of `apportion compare --format json` (without bootstrap and
/// lift tests, which need the path rows and an experiments file).
async fn compare(State(s): State<AdminState>) -> Response {
    let sh = s.shared.lock().expect("shared");
    match sh.compare.as_ref() {
        None => (StatusCode::NOT_FOUND, "the running comparison is off (admin.compare = false)\n").into_response(),
        Some(c) if c.conversions() == 0 => {
            (StatusCode::SERVICE_UNAVAILABLE, "no conversion credited yet\n").into_response()
        }
        Some(c) => match c.result() {
            Ok(r) => Json(r).into_response(),
            Err(e) => (StatusCode::INTERNAL_SERVER_ERROR, format!("{e}\n")).into_response(),
        },
    }
}

#[derive(Clone)]
struct EraseState {
    sender: Arc<EraseSender>,
    pseudo: Pseudonymizer,
}

/// `POST /v1/erase` of the admin listener in Kafka mode: with a token, the
/// erase is produced to every input partition ([`crate::kafka::erase`]) and
/// answered `202` once delivered; without one the endpoint is off (`404`
/// saying how to turn it on).
pub fn erase_router(config: Option<(EraseSender, Pseudonymizer, BearerToken)>) -> Router {
    match config {
        None => Router::new().route(
            "/v1/erase",
            post(|| async {
                (
                    StatusCode::NOT_FOUND,
                    "POST /v1/erase is off: set an admin token (APPORTION_ADMIN_TOKEN, admin.token or admin.token_file) to turn it on\n",
                )
            }),
        ),
        Some((sender, pseudo, token)) => crate::auth::protect(
            Router::new()
                .route("/v1/erase", post(erase))
                .layer(axum::extract::DefaultBodyLimit::max(64 << 10))
                .with_state(EraseState { sender: Arc::new(sender), pseudo }),
            token,
        ),
    }
}

async fn erase(State(s): State<EraseState>, body: Bytes) -> Response {
    let req = match EraseRequest::parse(&body, &s.pseudo) {
        Ok(r) => r,
        Err(e) => return (StatusCode::BAD_REQUEST, format!("{e}\n")).into_response(),
    };
    let line = req.event_line(crate::pipeline::now_ms());
    let key = req.user_key.to_hex();
    let sender = s.sender.clone();
    match tokio::task::spawn_blocking(move || sender.send(&line, &key)).await {
        Ok(Ok(partitions)) => {
            let mut answer = req.json();
            answer["partitions"] = partitions.into();
            (StatusCode::ACCEPTED, Json(answer)).into_response()
        }
        Ok(Err(e)) => {
            tracing::warn!(error = %format!("{e:#}"), "an erase request could not be produced");
            (
                StatusCode::SERVICE_UNAVAILABLE,
                format!("the erase could not be produced to every input partition ({e:#}); send the request again (with the same request_id a repeat is a duplicate)\n"),
            )
                .into_response()
        }
        Err(_) => (StatusCode::INTERNAL_SERVER_ERROR, "the erase task failed\n").into_response(),
    }
}
