//! Parts: behavioural queries for design tools (from stored figures), create, read, set limits.

use super::auth::{Engineer, Reader};
use super::problem::{ApiResult, Problem, json_body};
use crate::app::AppState;
use crate::registry::limits::Limits;
use crate::registry::wire::{Part, PartPage};
use crate::store::query::{AnswerSource, Cursor, PartQuery, Sort};
use axum::Json;
use axum::body::Bytes;
use axum::extract::{Path, Query, State};
use axum::http::StatusCode;
use axum::response::IntoResponse;
use serde::Deserialize;
use utoipa_axum::{router::OpenApiRouter, routes};

#[derive(Debug, Default, Deserialize, utoipa::IntoParams)]
#[into_params(parameter_in = Query)]
#[serde(deny_unknown_fields)]
pub struct PartQueryParams {
    /// Substring of the part number or description.
    pub q: Option<String>,
    /// Which fit of each part answers: `approved` (its approved baseline; the default), `latest` (the
    /// newest succeeded fit, whatever its verdict) or `latest-passing` (the newest whose model is ok and
    /// that does not fail the part's limits).
    #[param(pattern = r"^(approved|latest|latest-passing)$")]
    pub answer_from: Option<String>,
    /// Older form: `true` is `answer_from=approved`, `false` is `answer_from=latest`.
    pub approved_only: Option<bool>,
    #[param(exclusive_minimum = 0.0)]
    pub srf_min_hz: Option<f64>,
    #[param(exclusive_minimum = 0.0)]
    pub srf_max_hz: Option<f64>,
    /// A series resonance (|Z| minimum) lies in this band.
    #[param(exclusive_minimum = 0.0)]
    pub series_resonance_min_hz: Option<f64>,
    #[param(exclusive_minimum = 0.0)]
    pub series_resonance_max_hz: Option<f64>,
    /// Frequency at which the effective L is held to `l_min_h..l_max_h`.
    #[param(minimum = 100.0, maximum = 1e10)]
    pub l_at_hz: Option<f64>,
    #[param(exclusive_minimum = 0.0)]
    pub l_min_h: Option<f64>,
    #[param(exclusive_minimum = 0.0)]
    pub l_max_h: Option<f64>,
    #[param(exclusive_minimum = 0.0)]
    pub dcr_max_ohm: Option<f64>,
    /// |Z| at least this over `z_band_min_hz..z_band_max_hz`.
    #[param(exclusive_minimum = 0.0)]
    pub z_min_ohm: Option<f64>,
    #[param(exclusive_minimum = 0.0)]
    pub z_band_min_hz: Option<f64>,
    #[param(exclusive_minimum = 0.0)]
    pub z_band_max_hz: Option<f64>,
    /// The core corner frequency (the dispersive core's corner, or Rp/(2π·L0) for the single-pole
    /// core) is at least this. A part whose model has no core loss has no corner and never matches a
    /// query on it.
    #[param(exclusive_minimum = 0.0)]
    pub core_corner_min_hz: Option<f64>,
    /// The core corner frequency is at most this (no corner: no match).
    #[param(exclusive_minimum = 0.0)]
    pub core_corner_max_hz: Option<f64>,
    /// part_number (default), srf_hz, l0_h, rdc_ohm or core_corner_hz; prefix - for descending.
    #[param(pattern = r"^-?(part_number|srf_hz|l0_h|rdc_ohm|core_corner_hz)?$")]
    pub sort: Option<String>,
    /// 1..500, default 50.
    #[param(minimum = 1, maximum = 500)]
    pub limit: Option<i64>,
    pub cursor: Option<String>,
}

/// Parts by electrical behaviour, from stored figures.
#[utoipa::path(get, path = "/api/v1/parts", tag = "parts", params(PartQueryParams),
    responses((status = 200, body = PartPage), (status = 422, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn query_parts(
    _: Reader,
    State(state): State<AppState>,
    Query(p): Query<PartQueryParams>,
) -> ApiResult<Json<PartPage>> {
    let query = part_query(p)?;
    Ok(Json(state.store.query_parts(&query).await?))
}

/// The validated store query for these parameters (shared by the HTTP and gRPC interfaces).
pub fn part_query(p: PartQueryParams) -> ApiResult<PartQuery> {
    let sort = match p.sort.as_deref() {
        None | Some("") => Sort::parse("part_number"),
        Some(s) => Sort::parse(s),
    }
    .map_err(Problem::validation)?;
    let cursor = match p.cursor.as_deref() {
        None | Some("") => None,
        Some(c) => Some(Cursor::decode(c).map_err(Problem::validation)?),
    };
    let query = PartQuery {
        q: p.q.filter(|s| !s.trim().is_empty()),
        source: match (p.answer_from.as_deref(), p.approved_only) {
            (Some(a), None) => AnswerSource::parse(a).map_err(Problem::validation)?,
            (None, Some(true)) => AnswerSource::Approved,
            (None, Some(false)) => AnswerSource::Latest,
            (None, None) => AnswerSource::Approved,
            (Some(a), Some(o)) => {
                let s = AnswerSource::parse(a).map_err(Problem::validation)?;
                if (s == AnswerSource::Approved) != o {
                    return Err(Problem::validation(format!(
                        "answer_from={a} and approved_only={o} disagree; give answer_from only"
                    )));
                }
                s
            }
        },
        srf_min_hz: p.srf_min_hz,
        srf_max_hz: p.srf_max_hz,
        series_resonance_min_hz: p.series_resonance_min_hz,
        series_resonance_max_hz: p.series_resonance_max_hz,
        l_at_hz: p.l_at_hz,
        l_min_h: p.l_min_h,
        l_max_h: p.l_max_h,
        dcr_max_ohm: p.dcr_max_ohm,
        z_min_ohm: p.z_min_ohm,
        z_band_min_hz: p.z_band_min_hz,
        z_band_max_hz: p.z_band_max_hz,
        core_corner_min_hz: p.core_corner_min_hz,
        core_corner_max_hz: p.core_corner_max_hz,
        sort,
        limit: p.limit.unwrap_or(50),
        cursor,
    };
    query.validate().map_err(Problem::validation)?;
    Ok(query)
}

#[derive(Debug, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct NewPart {
    /// 1 to 64 characters of letters, digits and `-_.+/#`.
    #[schema(pattern = r"^[A-Za-z0-9_.+/#-]{1,64}$")]
    pub part_number: String,
    #[serde(default)]
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
) -> ApiResult<impl IntoResponse> {
    let new: NewPart = json_body(&body)?;
    let description = new.description.trim();
    if description.chars().count() > 500 {
        return Err(Problem::validation(
            "description must be at most 500 characters",
        ));
    }
    state
        .store
        .create_part(&caller.label, &new.part_number, description, &new.limits)
        .await?;
    Ok((
        StatusCode::CREATED,
        Json(state.store.part(&new.part_number).await?),
    ))
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
) -> ApiResult<Json<Part>> {
    Ok(Json(state.store.part(&part_number).await?))
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
) -> ApiResult<Json<Part>> {
    let update: LimitsUpdate = json_body(&body)?;
    state
        .store
        .update_limits(&caller.label, &part_number, &update.limits)
        .await?;
    Ok(Json(state.store.part(&part_number).await?))
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
) -> ApiResult<Json<crate::registry::trend::PartTrend>> {
    let part = state.store.part_row(&part_number).await?;
    let fits = state.store.lot_fits(part.part_id).await?;
    let trend = tokio::task::spawn_blocking(move || {
        crate::registry::trend::part_trend(&part.part_number, &part.limits, fits)
    })
    .await
    .map_err(Problem::internal)?;
    Ok(Json(trend))
}

pub fn router() -> OpenApiRouter<AppState> {
    OpenApiRouter::new()
        .routes(routes!(query_parts, create_part))
        .routes(routes!(get_part))
        .routes(routes!(part_trend))
        .routes(routes!(put_limits))
}
