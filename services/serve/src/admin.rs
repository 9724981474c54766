//! The admin HTTP endpoints: `/metrics`, `/healthz`, `/readyz`,
//! `/v1/models` and `/v1/compare`, all read-only. (The ingest endpoint of embedded mode is in
//! [`crate::embedded::http`].)

use std::sync::{Arc, Mutex};

use axum::extract::State;
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::{Json, Router};

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
