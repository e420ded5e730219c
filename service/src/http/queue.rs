//! `GET /api/v1/queue`: how many fits are in each state.

use super::auth::Reader;
use crate::app::AppState;
use crate::ops::OpsResult;
use crate::registry::wire::QueueCounts;
use axum::Json;
use axum::extract::State;
use utoipa_axum::{router::OpenApiRouter, routes};

/// Fits per state.
#[utoipa::path(get, path = "/api/v1/queue", tag = "fits",
    responses((status = 200, body = QueueCounts), (status = 401, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn queue(_: Reader, State(state): State<AppState>) -> OpsResult<Json<QueueCounts>> {
    Ok(Json(crate::ops::fits::counts(&state).await?))
}

pub fn router() -> OpenApiRouter<AppState> {
    OpenApiRouter::new().routes(routes!(queue))
}
