//! `GET /api/v1/whoami`: the role of the presented token.

use super::auth::Reader;
use crate::app::AppState;
use crate::store::tokens::Role;
use axum::Json;
use serde::Serialize;
use utoipa_axum::{router::OpenApiRouter, routes};

#[derive(Debug, Serialize, utoipa::ToSchema)]
pub struct WhoAmI {
    pub role: Role,
    /// The token's label: the actor named in the audit trail.
    pub label: String,
}

/// The role of the presented token.
#[utoipa::path(get, path = "/api/v1/whoami", tag = "session",
    responses((status = 200, body = WhoAmI), (status = 401, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn whoami(Reader(caller): Reader) -> Json<WhoAmI> {
    Json(WhoAmI {
        role: caller.role,
        label: caller.label,
    })
}

pub fn router() -> OpenApiRouter<AppState> {
    OpenApiRouter::new().routes(routes!(whoami))
}
