//! Fits: list and status (dashboard polling), detail with verdict and drift, curves, downloads,
//! cancel/retry (inspector), refit/approve/reject (engineer). Each handler extracts, calls one
//! operation of [`crate::ops`] and answers.

use super::auth::{Engineer, Inspector, Reader};
use super::problem::json_body;
use crate::app::AppState;
use crate::ops::exports::TextExport;
use crate::ops::fits::FitListQuery;
use crate::ops::{self, OpsResult};
use crate::registry::wire::{FitCurves, FitDetail, FitPage, FitSummary};
use axum::Json;
use axum::body::Bytes;
use axum::extract::{Path, Query, State};
use axum::http::{StatusCode, header};
use axum::response::IntoResponse;
use serde::{Deserialize, Serialize};
use utoipa_axum::{router::OpenApiRouter, routes};

/// Fits, newest first, filtered and paginated.
#[utoipa::path(get, path = "/api/v1/fits", tag = "fits", params(FitListQuery),
    responses((status = 200, body = FitPage), (status = 422, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn list_fits(
    _: Reader,
    State(state): State<AppState>,
    Query(q): Query<FitListQuery>,
) -> OpsResult<Json<FitPage>> {
    Ok(Json(ops::fits::list(&state, q).await?))
}

/// One fit: status, report, verdict per limit, drift against the approved baseline.
#[utoipa::path(get, path = "/api/v1/fits/{fit_id}", tag = "fits", params(("fit_id" = i64, Path)),
    responses((status = 200, body = FitDetail), (status = 404, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn get_fit(
    _: Reader,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
) -> OpsResult<Json<FitDetail>> {
    Ok(Json(ops::fits::detail(&state, fit_id).await?))
}

/// Measured impedance with its uncertainty, and the model at the same frequencies.
#[utoipa::path(get, path = "/api/v1/fits/{fit_id}/curves", tag = "fits", params(("fit_id" = i64, Path)),
    responses((status = 200, body = FitCurves), (status = 404, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn curves(
    _: Reader,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
) -> OpsResult<Json<FitCurves>> {
    Ok(Json(ops::fits::curves(&state, fit_id).await?))
}

/// Cancel a queued fit, or ask a running one to stop.
#[utoipa::path(post, path = "/api/v1/fits/{fit_id}/cancel", tag = "fits", params(("fit_id" = i64, Path)),
    responses((status = 200, body = FitSummary), (status = 409, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn cancel(
    Inspector(caller): Inspector,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
) -> OpsResult<Json<FitSummary>> {
    Ok(Json(
        ops::fits::cancel(&state, &caller.label, fit_id).await?,
    ))
}

/// Queue a failed or cancelled fit again.
#[utoipa::path(post, path = "/api/v1/fits/{fit_id}/retry", tag = "fits", params(("fit_id" = i64, Path)),
    responses((status = 200, body = FitSummary), (status = 409, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn retry(
    Inspector(caller): Inspector,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
) -> OpsResult<Json<FitSummary>> {
    Ok(Json(ops::fits::retry(&state, &caller.label, fit_id).await?))
}

#[derive(Debug, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct RefitRequest {
    /// The engine's fit options (every field optional); null or absent for the defaults.
    #[schema(value_type = Option<super::sweeps::FitOptionsBody>)]
    #[serde(default)]
    pub options: serde_json::Value,
}

#[derive(Debug, Serialize, utoipa::ToSchema)]
pub struct RefitAccepted {
    /// The new revision's fit.
    pub fit_id: i64,
}

/// Fit the same sweep again with new options (or a newer engine): a new revision.
#[utoipa::path(post, path = "/api/v1/fits/{fit_id}/refit", tag = "fits", params(("fit_id" = i64, Path)),
    request_body = RefitRequest,
    responses((status = 202, body = RefitAccepted), (status = 422, body = super::problem::ProblemBody),
        (status = 429, body = super::problem::ProblemBody), (status = 503, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn refit(
    Engineer(caller): Engineer,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
    body: Bytes,
) -> OpsResult<impl IntoResponse> {
    let req: RefitRequest = if body.is_empty() {
        RefitRequest {
            options: serde_json::Value::Null,
        }
    } else {
        json_body(&body)?
    };
    let new_id = ops::fits::refit(&state, &caller.label, fit_id, req.options).await?;
    Ok((StatusCode::ACCEPTED, Json(RefitAccepted { fit_id: new_id })))
}

#[derive(Debug, Default, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct Decision {
    /// Why: optional for a plain approval, required for an approval with `override`. A reason of only
    /// spaces, or holding a NUL character (U+0000), is refused.
    #[serde(default)]
    #[schema(min_length = 1, pattern = r"^[^\x00]*[^\s\x00][^\x00]*$")]
    pub reason: Option<String>,
    /// Approve a fit that fails its limits or whose model is poor anyway (the audit records it).
    #[serde(default, rename = "override")]
    pub overriding: bool,
}

fn decision(body: &Bytes) -> OpsResult<Decision> {
    if body.is_empty() {
        Ok(Decision::default())
    } else {
        json_body(body)
    }
}

/// Approve a succeeded fit: it becomes the part's baseline (the previous baseline stops being approved).
/// A fit that fails its limits or whose model is poor needs `override: true` and a reason.
#[utoipa::path(post, path = "/api/v1/fits/{fit_id}/approve", tag = "fits", params(("fit_id" = i64, Path)),
    request_body = Decision,
    responses((status = 200, body = FitDetail), (status = 409, body = super::problem::ProblemBody),
        (status = 422, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn approve(
    Engineer(caller): Engineer,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
    body: Bytes,
) -> OpsResult<Json<FitDetail>> {
    let d = decision(&body)?;
    let detail = ops::fits::approve(
        &state,
        &caller.label,
        fit_id,
        d.reason.as_deref(),
        d.overriding,
    )
    .await?;
    Ok(Json(detail))
}

#[derive(Debug, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct Rejection {
    /// What is wrong with the fit (required, not blank, no NUL character).
    #[schema(min_length = 1, pattern = r"^[^\x00]*[^\s\x00][^\x00]*$")]
    pub reason: String,
}

/// Reject a succeeded fit, with the reason.
#[utoipa::path(post, path = "/api/v1/fits/{fit_id}/reject", tag = "fits", params(("fit_id" = i64, Path)),
    request_body = Rejection,
    responses((status = 200, body = FitDetail), (status = 409, body = super::problem::ProblemBody),
        (status = 422, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn reject(
    Engineer(caller): Engineer,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
    body: Bytes,
) -> OpsResult<Json<FitDetail>> {
    // An empty body has no reason: the operation refuses it as it refuses a blank one.
    let reason = if body.is_empty() {
        String::new()
    } else {
        json_body::<Rejection>(&body)?.reason
    };
    Ok(Json(
        ops::fits::reject(&state, &caller.label, fit_id, &reason).await?,
    ))
}

/// The fitted model as JSON (the report's `model`).
/// The fitted model as JSON, with the band where it is valid (`band_hz`) and its provenance.
#[utoipa::path(get, path = "/api/v1/fits/{fit_id}/model.json", tag = "exports", params(("fit_id" = i64, Path)),
    responses((status = 200, body = Object), (status = 409, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn model_json(
    _: Reader,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
) -> OpsResult<impl IntoResponse> {
    let (name, body) = ops::exports::model_json(&state, fit_id).await?;
    Ok((
        [(
            header::CONTENT_DISPOSITION,
            format!("attachment; filename=\"{name}\""),
        )],
        Json(body),
    ))
}

fn text_download(name: String, text: String) -> axum::response::Response {
    (
        [
            (
                header::CONTENT_TYPE,
                "text/plain; charset=utf-8".to_string(),
            ),
            (
                header::CONTENT_DISPOSITION,
                format!(
                    "attachment; filename=\"{}\"",
                    ops::exports::safe_file_name(&name)
                ),
            ),
        ],
        text,
    )
        .into_response()
}

/// The model as a passive SPICE subcircuit.
#[utoipa::path(get, path = "/api/v1/fits/{fit_id}/netlist.cir", tag = "exports", params(("fit_id" = i64, Path)),
    responses((status = 200, content_type = "text/plain", body = String),
        (status = 409, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn netlist(
    _: Reader,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
) -> OpsResult<axum::response::Response> {
    let (name, text) = ops::exports::export_text(&state, fit_id, TextExport::Subcircuit).await?;
    Ok(text_download(name, text))
}

/// The model as a Touchstone 1-port over the sweep band (reference impedance: the sweep's, or 50 Ω).
#[utoipa::path(get, path = "/api/v1/fits/{fit_id}/model.s1p", tag = "exports", params(("fit_id" = i64, Path)),
    responses((status = 200, content_type = "text/plain", body = String),
        (status = 409, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn touchstone(
    _: Reader,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
) -> OpsResult<axum::response::Response> {
    let (name, text) = ops::exports::export_text(&state, fit_id, TextExport::Touchstone).await?;
    Ok(text_download(name, text))
}

pub fn router() -> OpenApiRouter<AppState> {
    OpenApiRouter::new()
        .routes(routes!(list_fits))
        .routes(routes!(get_fit))
        .routes(routes!(curves))
        .routes(routes!(cancel))
        .routes(routes!(retry))
        .routes(routes!(refit))
        .routes(routes!(approve))
        .routes(routes!(reject))
        .routes(routes!(model_json))
        .routes(routes!(netlist))
        .routes(routes!(touchstone))
}
