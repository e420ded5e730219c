//! Fits: list and status (dashboard polling), detail with verdict and drift, curves, downloads,
//! cancel/retry (inspector), refit/approve/reject (engineer).

use super::auth::{Engineer, Inspector, Reader};
use super::problem::{ApiResult, Kind, Problem, json_body};
use super::sweeps::{checked_options, parse_options_value, safe_file_name};
use crate::app::AppState;
use crate::registry::figures::model_curve;
use crate::registry::wire::{FailureKind, FitCurves, FitDetail, FitPage, FitStatus, FitSummary};
use crate::store::fits::FitFilter;
use crate::store::jobs::PartRef;
use crate::store::parse_rfc3339;
use axum::Json;
use axum::body::Bytes;
use axum::extract::{Path, Query, State};
use axum::http::{StatusCode, header};
use axum::response::IntoResponse;
use serde::{Deserialize, Serialize};
use utoipa_axum::{router::OpenApiRouter, routes};

#[derive(Debug, Default, Deserialize, utoipa::IntoParams)]
#[into_params(parameter_in = Query)]
#[serde(deny_unknown_fields)]
pub struct FitListParams {
    /// queued, running, succeeded, failed or cancelled.
    #[param(pattern = r"^(queued|running|succeeded|failed|cancelled)?$")]
    pub status: Option<String>,
    /// Only fits that ended with this failure kind: too_few_points, not_an_inductor,
    /// invalid_options, non_finite, not_passive, cancelled, unreadable_sweep, attempts_exhausted or
    /// internal.
    #[param(
        pattern = r"^(too_few_points|not_an_inductor|invalid_options|non_finite|not_passive|cancelled|unreadable_sweep|attempts_exhausted|internal)?$"
    )]
    pub error_kind: Option<String>,
    pub part_number: Option<String>,
    pub lot: Option<String>,
    /// RFC 3339: fits created at or after.
    #[param(format = DateTime)]
    pub since: Option<String>,
    /// 1..500, default 50.
    #[param(minimum = 1, maximum = 500)]
    pub limit: Option<i64>,
    pub cursor: Option<String>,
}

/// The validated store filter for these parameters (shared by the HTTP and gRPC interfaces).
pub fn fit_filter(p: FitListParams) -> ApiResult<FitFilter> {
    let status = match p.status.as_deref() {
        None | Some("") => None,
        Some(s) => Some(FitStatus::parse(s).ok_or_else(|| {
            Problem::validation(format!(
                "status must be queued, running, succeeded, failed or cancelled, not {s:?}"
            ))
        })?),
    };
    let error_kind = match p.error_kind.as_deref() {
        None | Some("") => None,
        Some(k) => Some(FailureKind::parse(k).ok_or_else(|| {
            let names: Vec<&str> = FailureKind::ALL.iter().map(|k| k.as_str()).collect();
            Problem::validation(format!(
                "error_kind must be one of {}, not {k:?}",
                names.join(", ")
            ))
        })?),
    };
    let since_ms = match p.since.as_deref() {
        None => None,
        Some(s) => Some(parse_rfc3339(s).ok_or_else(|| {
            Problem::validation(format!("since must be an RFC 3339 time, not {s:?}"))
        })?),
    };
    let before_fit_id = match p.cursor.as_deref() {
        None | Some("") => None,
        Some(c) => Some(
            c.parse::<i64>()
                .map_err(|_| Problem::validation("cursor is not one this service handed out"))?,
        ),
    };
    let limit = p.limit.unwrap_or(50);
    if !(1..=500).contains(&limit) {
        return Err(Problem::validation("limit must be 1 to 500"));
    }
    Ok(FitFilter {
        status,
        error_kind,
        part_number: p.part_number.filter(|s| !s.is_empty()),
        lot: p.lot.filter(|s| !s.is_empty()),
        since_ms,
        before_fit_id,
        limit,
    })
}

/// Fits, newest first, filtered and paginated.
#[utoipa::path(get, path = "/api/v1/fits", tag = "fits", params(FitListParams),
    responses((status = 200, body = FitPage), (status = 422, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn list_fits(
    _: Reader,
    State(state): State<AppState>,
    Query(p): Query<FitListParams>,
) -> ApiResult<Json<FitPage>> {
    let filter = fit_filter(p)?;
    Ok(Json(state.store.list_fits(&filter).await?))
}

/// One fit: status, report, verdict per limit, drift against the approved baseline.
#[utoipa::path(get, path = "/api/v1/fits/{fit_id}", tag = "fits", params(("fit_id" = i64, Path)),
    responses((status = 200, body = FitDetail), (status = 404, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn get_fit(
    _: Reader,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
) -> ApiResult<Json<FitDetail>> {
    Ok(Json(state.store.fit_detail(fit_id).await?))
}

/// Measured impedance with its uncertainty, and the model at the same frequencies.
#[utoipa::path(get, path = "/api/v1/fits/{fit_id}/curves", tag = "fits", params(("fit_id" = i64, Path)),
    responses((status = 200, body = FitCurves), (status = 404, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn curves(
    _: Reader,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
) -> ApiResult<Json<FitCurves>> {
    let input = state.store.job_input(fit_id).await?;
    let report = state.store.fit_report(fit_id).await?;
    let engine = state.engine.clone();
    let curves = tokio::task::spawn_blocking(move || -> Result<FitCurves, String> {
        let sweep = crate::jobs::job_sweep(engine.as_ref(), &input)?;
        let (model_re, model_im) = match &report {
            Some(r) => model_curve(&r.model, &sweep.frequency_hz),
            None => (Vec::new(), Vec::new()),
        };
        Ok(FitCurves {
            measured_z_real_ohm: sweep.impedance_ohm.iter().map(|z| z.re).collect(),
            measured_z_imag_ohm: sweep.impedance_ohm.iter().map(|z| z.im).collect(),
            sigma_ohm: sweep.sigma_ohm,
            frequency_hz: sweep.frequency_hz,
            model_z_real_ohm: model_re,
            model_z_imag_ohm: model_im,
        })
    })
    .await
    .map_err(Problem::internal)?
    .map_err(|e| Problem::internal(format!("a stored sweep no longer reads: {e}")))?;
    Ok(Json(curves))
}

/// Cancel a queued fit, or ask a running one to stop.
#[utoipa::path(post, path = "/api/v1/fits/{fit_id}/cancel", tag = "fits", params(("fit_id" = i64, Path)),
    responses((status = 200, body = FitSummary), (status = 409, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn cancel(
    Inspector(caller): Inspector,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
) -> ApiResult<Json<FitSummary>> {
    if state.store.cancel_fit(&caller.label, fit_id).await? {
        state.jobs.cancel_local(fit_id);
    }
    Ok(Json(state.store.fit_summary(fit_id).await?))
}

/// Queue a failed or cancelled fit again.
#[utoipa::path(post, path = "/api/v1/fits/{fit_id}/retry", tag = "fits", params(("fit_id" = i64, Path)),
    responses((status = 200, body = FitSummary), (status = 409, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn retry(
    Inspector(caller): Inspector,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
) -> ApiResult<Json<FitSummary>> {
    state
        .backpressure
        .check_queue(&state.store, PartRef::OfFit(fit_id))
        .await?;
    // Checked again inside the write, so concurrent retries cannot together pass the bound.
    let bounds = Some(state.backpressure.queue_bounds());
    state.store.retry_fit(&caller.label, fit_id, bounds).await?;
    state.jobs.wake();
    Ok(Json(state.store.fit_summary(fit_id).await?))
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
) -> ApiResult<impl IntoResponse> {
    let req: RefitRequest = if body.is_empty() {
        RefitRequest {
            options: serde_json::Value::Null,
        }
    } else {
        json_body(&body)?
    };
    let detail = state.store.fit_detail(fit_id).await?;
    state
        .backpressure
        .check_queue(&state.store, PartRef::OfFit(fit_id))
        .await?;
    let options = checked_options(parse_options_value(req.options)?, detail.dcr_ohm)?;
    let options_json = serde_json::to_string(&options).map_err(Problem::internal)?;
    let key = crate::jobs::job_key(&state.store.job_input(fit_id).await?, &options_json);
    let new_id = state
        .store
        .refit(
            &caller.label,
            fit_id,
            &options_json,
            &key,
            Some(state.backpressure.queue_bounds()),
        )
        .await?;
    state.jobs.wake();
    Ok((StatusCode::ACCEPTED, Json(RefitAccepted { fit_id: new_id })))
}

#[derive(Debug, Default, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct Decision {
    /// Why: optional for a plain approval, required for an approval with `override`. A reason of only
    /// spaces is refused.
    #[serde(default)]
    #[schema(min_length = 1, pattern = r"\S")]
    pub reason: Option<String>,
    /// Approve a fit that fails its limits or whose model is poor anyway (the audit records it).
    #[serde(default, rename = "override")]
    pub overriding: bool,
}

fn decision(body: &Bytes) -> ApiResult<Decision> {
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
) -> ApiResult<Json<FitDetail>> {
    let d = decision(&body)?;
    let reason = match d.reason.as_deref().map(str::trim) {
        Some("") => {
            return Err(Problem::validation(
                "the reason is empty: give one or leave it out",
            ));
        }
        r => r,
    };
    state
        .store
        .approve_fit(&caller.label, fit_id, reason, d.overriding)
        .await?;
    Ok(Json(state.store.fit_detail(fit_id).await?))
}

#[derive(Debug, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct Rejection {
    /// What is wrong with the fit (required, not blank).
    #[schema(min_length = 1, pattern = r"\S")]
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
) -> ApiResult<Json<FitDetail>> {
    if body.is_empty() {
        return Err(Problem::validation("a rejection needs a reason"));
    }
    let d: Rejection = json_body(&body)?;
    let reason = Some(d.reason.trim())
        .filter(|r| !r.is_empty())
        .ok_or_else(|| Problem::validation("a rejection needs a reason"))?;
    state
        .store
        .reject_fit(&caller.label, fit_id, reason)
        .await?;
    Ok(Json(state.store.fit_detail(fit_id).await?))
}

async fn succeeded_report(state: &AppState, fit_id: i64) -> ApiResult<crate::fit::FitReport> {
    state.store.fit_report(fit_id).await?.ok_or_else(|| {
        Problem::new(
            Kind::Conflict,
            format!("fit {fit_id} has not succeeded: there is no model yet"),
        )
    })
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
) -> ApiResult<impl IntoResponse> {
    let report = succeeded_report(&state, fit_id).await?;
    let detail = state.store.fit_detail(fit_id).await?;
    let name = format!("fit-{fit_id}-model.json");
    // The model's own fields at the top (as before), then where it is valid and where it came from:
    // a figure read from it outside `band_hz` is an extrapolation.
    let mut body = serde_json::to_value(&report.model).map_err(Problem::internal)?;
    if let Some(object) = body.as_object_mut() {
        object.insert("band_hz".into(), serde_json::json!(report.band_hz));
        object.insert(
            "provenance".into(),
            serde_json::json!({
                "part_number": detail.summary.part_number,
                "lot": detail.summary.lot,
                "fit_id": fit_id,
                "revision": detail.summary.revision,
                "sweep_sha256": detail.sha256,
                "file_name": detail.file_name,
                "method": detail.method,
                "engine_version": report.engine_version,
                "quality": report.assessment.status.as_str(),
                "approval": detail.summary.approval,
                "fitted_at": detail.summary.finished_at,
            }),
        );
    }
    Ok((
        [(
            header::CONTENT_DISPOSITION,
            format!("attachment; filename=\"{}\"", safe_file_name(&name)),
        )],
        Json(body),
    ))
}

fn export_context(
    report: &crate::fit::FitReport,
    detail: &FitDetail,
) -> crate::export::ExportContext {
    let mut ctx = crate::export::ExportContext::for_report(report);
    ctx.part_number = Some(detail.summary.part_number.clone());
    ctx.fit_id = Some(detail.summary.fit_id.to_string());
    ctx.revision = u64::try_from(detail.summary.revision).ok();
    ctx.sweep_sha256 = Some(detail.sha256.clone());
    ctx
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
                format!("attachment; filename=\"{}\"", safe_file_name(&name)),
            ),
        ],
        text,
    )
        .into_response()
}

fn export_problem(e: crate::export::ExportError) -> Problem {
    Problem::new(
        Kind::Conflict,
        format!("this model cannot be exported: {e}"),
    )
}

/// Points of the Touchstone export, log-spaced over the sweep band.
const TOUCHSTONE_POINTS: usize = 401;

/// The text exports of a fitted model.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TextExport {
    /// A passive SPICE subcircuit.
    Subcircuit,
    /// A Touchstone 1-port over the sweep band (reference impedance: the sweep's, or 50 Ω).
    Touchstone,
}

/// A succeeded fit's model as export text, with the file name offered for it (shared by the HTTP
/// and gRPC interfaces). A fit without a model is a conflict; so is a model the exporter refuses.
pub async fn export_text(
    state: &AppState,
    fit_id: i64,
    export: TextExport,
) -> ApiResult<(String, String)> {
    let report = succeeded_report(state, fit_id).await?;
    let detail = state.store.fit_detail(fit_id).await?;
    let ctx = export_context(&report, &detail);
    let z0 = detail.z0_ohm.unwrap_or(50.0);
    let text = tokio::task::spawn_blocking(move || match export {
        TextExport::Subcircuit => crate::export::subcircuit(&report.model, &ctx),
        TextExport::Touchstone => {
            let grid = crate::export::log_frequency_grid(
                report.band_hz[0],
                report.band_hz[1],
                TOUCHSTONE_POINTS,
            )?;
            crate::export::touchstone::touchstone_1port(&report.model, &grid, z0, &ctx)
        }
    })
    .await
    .map_err(Problem::internal)?
    .map_err(export_problem)?;
    let name = match export {
        TextExport::Subcircuit => format!("fit-{fit_id}.cir"),
        TextExport::Touchstone => format!("fit-{fit_id}.s1p"),
    };
    Ok((name, text))
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
) -> ApiResult<axum::response::Response> {
    let (name, text) = export_text(&state, fit_id, TextExport::Subcircuit).await?;
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
) -> ApiResult<axum::response::Response> {
    let (name, text) = export_text(&state, fit_id, TextExport::Touchstone).await?;
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
