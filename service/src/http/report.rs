//! The printable inspection report of a fit: `GET /api/v1/fits/{fit_id}/report` (one self-contained
//! HTML page) and `…/report.pdf`. Reads the store, builds the report with [`crate::report`] off the
//! runtime, answers; no logic of its own.

use super::auth::Reader;
use super::problem::{ApiResult, Kind, Problem};
use crate::app::AppState;
use crate::report::{self, ReportInput};
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

/// Everything the report states, read from the store and the stored sweep.
async fn input(state: &AppState, fit_id: i64) -> ApiResult<ReportInput> {
    let detail = state.store.fit_detail(fit_id).await?;
    let Some(json) = detail.report.clone() else {
        return Err(Problem::new(
            Kind::Conflict,
            format!(
                "fit {fit_id} is {}: a report needs a succeeded fit",
                detail.summary.status.as_str()
            ),
        ));
    };
    let fit_report: crate::fit::FitReport =
        serde_json::from_value(json).map_err(Problem::internal)?;
    let part = state.store.part_row(&detail.summary.part_number).await?;
    let provenance = state.store.fit_provenance(fit_id).await?;
    let job = state.store.job_input(fit_id).await?;
    let engine = state.engine.clone();
    let model = fit_report.model.clone();
    let (frequency_hz, measured_ohm, model_ohm) = tokio::task::spawn_blocking(move || {
        crate::jobs::job_sweep(engine.as_ref(), &job).map(|sweep| {
            let (re, im) = crate::registry::figures::model_curve(&model, &sweep.frequency_hz);
            let measured: Vec<(f64, f64)> =
                sweep.impedance_ohm.iter().map(|z| (z.re, z.im)).collect();
            (
                sweep.frequency_hz,
                measured,
                re.into_iter().zip(im).collect(),
            )
        })
    })
    .await
    .map_err(Problem::internal)?
    .map_err(|e| Problem::internal(format!("a stored sweep no longer reads: {e}")))?;
    Ok(ReportInput {
        part_number: detail.summary.part_number.clone(),
        part_description: provenance.part_description,
        limits: part.limits,
        lot: detail.summary.lot.clone(),
        fit_id,
        revision: detail.summary.revision,
        file_name: detail.file_name,
        sha256: detail.sha256,
        method: detail.method,
        z0_ohm: detail.z0_ohm,
        dcr_reading_ohm: detail.dcr_ohm,
        temperature_c: detail.temperature_c,
        operator: detail.operator,
        points: provenance.points,
        uploaded_at: provenance.uploaded_at,
        uploaded_by: provenance.uploaded_by,
        engine_version: detail.engine_version,
        report: fit_report,
        verdict: detail.summary.verdict,
        verdict_note: detail.verdict_note,
        checks: detail.verdict_checks,
        drift: detail.drift,
        approval: detail.summary.approval,
        approved_by: provenance.approved_by,
        approved_at: provenance.approved_at,
        approved_reason: provenance.approved_reason,
        frequency_hz,
        measured_ohm,
        model_ohm,
        generated_at: crate::store::rfc3339(crate::store::now_ms()),
    })
}

fn title(i: &ReportInput) -> String {
    format!(
        "Inspection report {} lot {} (fit {})",
        i.part_number, i.lot, i.fit_id
    )
}

fn file_stem(i: &ReportInput) -> String {
    let safe = |s: &str| -> String {
        s.chars()
            .map(|c| {
                if c.is_ascii_alphanumeric() || "-_.".contains(c) {
                    c
                } else {
                    '_'
                }
            })
            .collect()
    };
    format!(
        "report-{}-lot-{}-fit-{}",
        safe(&i.part_number),
        safe(&i.lot),
        i.fit_id
    )
}

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
) -> ApiResult<impl IntoResponse> {
    let i = input(&state, fit_id).await?;
    let page =
        tokio::task::spawn_blocking(move || report::html::render(&report::build(&i), &title(&i)))
            .await
            .map_err(Problem::internal)?;
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
) -> ApiResult<impl IntoResponse> {
    let i = input(&state, fit_id).await?;
    let name = format!("{}.pdf", file_stem(&i));
    let bytes = tokio::task::spawn_blocking(move || {
        let footer = format!(
            "{} lot {}, fit #{} revision {}; made {}",
            i.part_number, i.lot, i.fit_id, i.revision, i.generated_at
        );
        report::pdf::render(&report::build(&i), &title(&i), &footer)
    })
    .await
    .map_err(Problem::internal)?;
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
