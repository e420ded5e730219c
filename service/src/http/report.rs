//! The printable inspection report of a fit: `GET /api/v1/fits/{fit_id}/report` (one self-contained
//! HTML page) and `…/report.pdf`, both built by [`ops::report`]; no logic of their own.

use super::auth::Reader;
use crate::app::AppState;
use crate::ops::{self, OpsResult};
use axum::extract::{Path, Query, State};
use axum::http::header;
use axum::response::IntoResponse;
use serde::Deserialize;
use utoipa_axum::{router::OpenApiRouter, routes};

/// The report routes take no query parameters; any given is refused (400).
#[derive(Debug, Default, Deserialize, utoipa::IntoParams)]
#[into_params(parameter_in = Query)]
#[serde(deny_unknown_fields)]
pub struct ReportParams {}

/// The lot's inspection report as one self-contained HTML page that prints cleanly (A4, plots on
/// their own page): part, lot, sweep provenance, verdict per limit, parameters with σ, drift against
/// the baseline, model quality, approval, |Z|, L(f) and Q(f) plots.
#[utoipa::path(get, path = "/api/v1/fits/{fit_id}/report", tag = "exports",
    params(("fit_id" = i64, Path), ReportParams),
    responses((status = 200, content_type = "text/html", body = String),
        (status = 409, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn report_html(
    _: Reader,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
    Query(_): Query<ReportParams>,
) -> OpsResult<impl IntoResponse> {
    let page = ops::report::html(&state, fit_id).await?;
    Ok((
        [
            (header::CONTENT_TYPE, "text/html; charset=utf-8"),
            (header::CACHE_CONTROL, "no-store"),
        ],
        page,
    ))
}

/// The same report as a PDF (A4, standard fonts, nothing embedded), as a download.
#[utoipa::path(get, path = "/api/v1/fits/{fit_id}/report.pdf", tag = "exports",
    params(("fit_id" = i64, Path), ReportParams),
    responses((status = 200, content_type = "application/pdf", body = Vec<u8>),
        (status = 409, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn report_pdf(
    _: Reader,
    State(state): State<AppState>,
    Path(fit_id): Path<i64>,
    Query(_): Query<ReportParams>,
) -> OpsResult<impl IntoResponse> {
    let (name, bytes) = ops::report::pdf(&state, fit_id).await?;
    Ok((
        [
            (header::CONTENT_TYPE, "application/pdf".to_string()),
            (
                header::CONTENT_DISPOSITION,
                format!("attachment; filename=\"{name}\""),
            ),
            (header::CACHE_CONTROL, "no-store".to_string()),
        ],
        bytes,
    ))
}

pub fn router() -> OpenApiRouter<AppState> {
    OpenApiRouter::new()
        .routes(routes!(report_html))
        .routes(routes!(report_pdf))
}
