//! Liveness, readiness and Prometheus metrics; no token needed.

use crate::app::AppState;
use axum::Json;
use axum::extract::State;
use axum::http::{StatusCode, header};
use axum::response::IntoResponse;
use serde::Serialize;
use utoipa_axum::{router::OpenApiRouter, routes};

/// The process is up.
#[utoipa::path(get, path = "/healthz", tag = "ops", responses((status = 200, body = String)))]
async fn healthz() -> &'static str {
    "ok\n"
}

#[derive(Debug, Serialize, utoipa::ToSchema)]
pub struct Readiness {
    /// The database answers.
    pub database: bool,
    /// Every migration this build knows is applied.
    pub migrations: bool,
    /// The audit trail's hash chain is intact (checked in full at start, then row by row as it grows).
    pub audit_chain: bool,
    /// The hash of the newest audit row: keep it elsewhere to detect a rewritten database.
    pub audit_head_hash: Option<String>,
    /// Shutdown was asked for: the service still answers but takes no new work (see
    /// `--unready-notice-s`), so it is not ready.
    pub draining: bool,
}

/// Ready to serve: database reachable, migrations applied, the audit chain intact and no shutdown under
/// way (503 otherwise).
#[utoipa::path(get, path = "/readyz", tag = "ops",
    responses((status = 200, body = Readiness), (status = 503, body = Readiness)))]
async fn readyz(State(state): State<AppState>) -> impl IntoResponse {
    let (database, migrations) = state.store.readiness().await;
    let (audit_chain, audit_head_hash) = state.store.audit_chain_ok().await;
    let draining = state.draining.load(std::sync::atomic::Ordering::SeqCst);
    let status = if database && migrations && audit_chain && !draining {
        StatusCode::OK
    } else {
        StatusCode::SERVICE_UNAVAILABLE
    };
    (
        status,
        Json(Readiness {
            database,
            migrations,
            audit_chain,
            audit_head_hash,
            draining,
        }),
    )
}

/// Prometheus text exposition: queue depth, fits by outcome, fit time and HTTP latency histograms.
#[utoipa::path(get, path = "/metrics", tag = "ops", responses((status = 200, body = String)))]
async fn metrics(State(state): State<AppState>) -> impl IntoResponse {
    if let Ok(q) = state.store.queue_counts().await {
        metrics::gauge!("henrybook_queue_depth", "status" => "queued").set(q.queued as f64);
        metrics::gauge!("henrybook_queue_depth", "status" => "running").set(q.running as f64);
    }
    (
        [(header::CONTENT_TYPE, "text/plain; version=0.0.4")],
        state.metrics.render(),
    )
}

pub fn router() -> OpenApiRouter<AppState> {
    OpenApiRouter::new()
        .routes(routes!(healthz))
        .routes(routes!(readyz))
        .routes(routes!(metrics))
}
