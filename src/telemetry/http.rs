//! The telemetry listener: `GET /metrics` (Prometheus), `/ready` and `/live` for probes,
//! `/status` (the live quality as JSON, read by `candor status`).

use super::Telemetry;
use axum::extract::State;
use axum::http::{header, StatusCode};
use axum::response::IntoResponse;
use axum::routing::get;
use axum::Router;
use std::fmt::Write as _;
use std::future::Future;
use tokio::net::TcpListener;

/// Content type of the exposition (OpenMetrics text, which Prometheus reads).
const METRICS_CONTENT_TYPE: &str = "application/openmetrics-text; version=1.0.0; charset=utf-8";

async fn metrics(State(t): State<Telemetry>) -> impl IntoResponse {
    if let Some(log) = t.live() {
        log.live_now().await;
    }
    ([(header::CONTENT_TYPE, METRICS_CONTENT_TYPE)], t.encode())
}

/// The live quality of every (model, map version) as JSON, with each window's verdict in
/// words: what `candor status` shows.
async fn status(State(t): State<Telemetry>) -> impl IntoResponse {
    let windows = match t.live() {
        Some(log) => log.live_now().await,
        None => std::sync::Arc::new(Vec::new()),
    };
    let body: Vec<StatusEntry<'_>> = windows
        .iter()
        .map(|q| StatusEntry {
            verdict: crate::live::verdict_lines(q),
            quality: q,
        })
        .collect();
    let doc = serde_json::json!({
        "ready": t.registry().is_ready(),
        "windows": body,
    });
    (
        [(header::CONTENT_TYPE, "application/json")],
        serde_json::to_string_pretty(&doc).unwrap_or_default(),
    )
}

/// One window in `/status`.
#[derive(serde::Serialize)]
struct StatusEntry<'a> {
    #[serde(flatten)]
    quality: &'a crate::live::LiveQuality,
    verdict: Vec<String>,
}

/// 200 once every model has a valid active map; 503 before, with the reasons in the body.
async fn ready(State(t): State<Telemetry>) -> impl IntoResponse {
    let registry = t.registry();
    if registry.is_ready() {
        return (StatusCode::OK, "ready\n".to_owned());
    }
    let view = registry.view();
    let mut body = String::from("not ready\n");
    if view.models.is_empty() {
        body.push_str("no valid map has loaded\n");
    }
    for m in view.models.iter().filter(|m| m.active.is_none()) {
        let _ = writeln!(body, "model {} has no valid active map", m.model);
    }
    for r in view.rejections.iter().rev().take(10) {
        let _ = writeln!(body, "rejected {}: {}", r.path.display(), r.reason);
    }
    (StatusCode::SERVICE_UNAVAILABLE, body)
}

async fn live() -> &'static str {
    "live\n"
}

/// The telemetry routes over `telemetry`.
pub fn router(telemetry: Telemetry) -> Router {
    Router::new()
        .route("/metrics", get(metrics))
        .route("/ready", get(ready))
        .route("/live", get(live))
        .route("/status", get(status))
        .with_state(telemetry)
}

/// Serves the telemetry routes on `listener` until `shutdown` completes.
///
/// # Errors
/// When the listener fails.
pub async fn run_telemetry(
    listener: TcpListener,
    telemetry: Telemetry,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    axum::serve(listener, router(telemetry))
        .with_graceful_shutdown(shutdown)
        .await
}
