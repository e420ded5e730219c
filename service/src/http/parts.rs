//! Parts: behavioural queries for design tools (from stored figures), create, read, set limits, the
//! trend across lots. Each handler extracts, calls one operation of [`crate::ops`] and answers; the
//! part in the path becomes a `PartNumber` through [`ops::parts::named`] (text that is none names
//! no part: 404).

use super::auth::{Engineer, Reader};
use super::problem::json_body;
use crate::app::AppState;
use crate::ops::parts::PartQueryInput;
use crate::ops::{self, OpsResult};
use crate::registry::limits::Limits;
use crate::registry::wire::{Part, PartPage};
use axum::Json;
use axum::body::Bytes;
use axum::extract::{Path, Query, State};
use axum::http::StatusCode;
use axum::response::IntoResponse;
use serde::Deserialize;
use utoipa_axum::{router::OpenApiRouter, routes};

/// Parts by electrical behaviour, from stored figures.
#[utoipa::path(get, path = "/api/v1/parts", tag = "parts", params(PartQueryInput),
    responses((status = 200, body = PartPage), (status = 422, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn query_parts(
    _: Reader,
    State(state): State<AppState>,
    Query(p): Query<PartQueryInput>,
) -> OpsResult<Json<PartPage>> {
    Ok(Json(ops::parts::query(&state, p).await?))
}

#[derive(Debug, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct NewPart {
    /// 1 to 64 characters of letters, digits and `-_.+/#`.
    #[schema(pattern = r"^[A-Za-z0-9_.+/#-]{1,64}$")]
    pub part_number: String,
    /// Free text; no NUL character (U+0000).
    #[serde(default)]
    #[schema(pattern = r"^[^\x00]*$")]
    pub description: String,
    #[serde(default, deserialize_with = "super::problem::object_only")]
    pub limits: Limits,
}

/// Create a part with its limits.
#[utoipa::path(post, path = "/api/v1/parts", tag = "parts", request_body = NewPart,
    responses((status = 201, body = Part), (status = 409, body = super::problem::ProblemBody),
        (status = 422, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn create_part(
    Engineer(caller): Engineer,
    State(state): State<AppState>,
    body: Bytes,
) -> OpsResult<impl IntoResponse> {
    let new: NewPart = json_body(&body)?;
    let part = ops::parts::create(
        &state,
        &caller.label,
        &new.part_number,
        &new.description,
        &new.limits,
    )
    .await?;
    Ok((StatusCode::CREATED, Json(part)))
}

/// A part with its limits, lots, baseline, fits and audit trail.
#[utoipa::path(get, path = "/api/v1/parts/{part_number}", tag = "parts",
    params(("part_number" = String, Path)),
    responses((status = 200, body = Part), (status = 404, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn get_part(
    _: Reader,
    State(state): State<AppState>,
    Path(part_number): Path<String>,
) -> OpsResult<Json<Part>> {
    let part_number = ops::parts::named(&part_number)?;
    Ok(Json(ops::parts::get(&state, &part_number).await?))
}

#[derive(Debug, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct LimitsUpdate {
    #[serde(deserialize_with = "super::problem::object_only")]
    pub limits: Limits,
}

/// Replace a part's limits; every succeeded fit of the part is judged again.
#[utoipa::path(put, path = "/api/v1/parts/{part_number}/limits", tag = "parts",
    params(("part_number" = String, Path)), request_body = LimitsUpdate,
    responses((status = 200, body = Part), (status = 404, body = super::problem::ProblemBody),
        (status = 422, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn put_limits(
    Engineer(caller): Engineer,
    State(state): State<AppState>,
    Path(part_number): Path<String>,
    body: Bytes,
) -> OpsResult<Json<Part>> {
    let update: LimitsUpdate = json_body(&body)?;
    let part_number = ops::parts::named(&part_number)?;
    let part = ops::parts::set_limits(&state, &caller.label, &part_number, &update.limits).await?;
    Ok(Json(part))
}

/// The trend route takes no query parameters; any given is refused (400), as elsewhere.
#[derive(Debug, Default, Deserialize, utoipa::IntoParams)]
#[into_params(parameter_in = Query)]
#[serde(deny_unknown_fields)]
pub struct TrendParams {}

/// A part's figures across its lots (one point per lot: its approved fit, else its newest succeeded
/// one), with the part's limits, Shewhart control limits (mean ± 3σ of the approved lots, σ the
/// sample standard deviation; none with fewer than two approved lots) and per point: outside the
/// limits, beyond the control limits (Nelson rule 1), in a run of nine on one side of the centre line
/// (Nelson rule 2).
#[utoipa::path(get, path = "/api/v1/parts/{part_number}/trend", tag = "parts",
    params(("part_number" = String, Path), TrendParams),
    responses((status = 200, body = crate::registry::trend::PartTrend),
        (status = 404, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn part_trend(
    _: Reader,
    State(state): State<AppState>,
    Path(part_number): Path<String>,
    Query(_): Query<TrendParams>,
) -> OpsResult<Json<crate::registry::trend::PartTrend>> {
    let part_number = ops::parts::named(&part_number)?;
    Ok(Json(ops::parts::trend(&state, &part_number).await?))
}

pub fn router() -> OpenApiRouter<AppState> {
    OpenApiRouter::new()
        .routes(routes!(query_parts, create_part))
        .routes(routes!(get_part))
        .routes(routes!(part_trend))
        .routes(routes!(put_limits))
}
