//! Parts: behavioural queries for design tools (from stored figures), create, read, set limits, and
//! the figures across lots.
//!
//! A new part's number is taken as given and parsed here, after its description and before its
//! limits (the order in which a create is refused). The operations on an existing part take its
//! [`PartNumber`], which both transports get from [`named`].

use super::error::{OpsError, OpsResult};
use crate::app::AppState;
use crate::registry::ids::PartNumber;
use crate::registry::limits::Limits;
use crate::registry::trend::PartTrend;
use crate::registry::wire::{Part, PartPage};
use crate::store::query::{AnswerSource, Cursor, PartQuery, Sort};
use serde::Deserialize;

#[derive(Debug, Default, Deserialize, utoipa::IntoParams)]
#[into_params(parameter_in = Query)]
#[serde(deny_unknown_fields)]
pub struct PartQueryInput {
    /// Substring of the part number or description (no NUL character).
    #[param(pattern = r"^[^\x00]*$")]
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

/// The store query for these parameters: sort, cursor and answer source parsed. Ranges and the
/// relations between bounds are checked once, by the store ([`PartQuery::validate`]).
pub fn part_query(p: PartQueryInput) -> OpsResult<PartQuery> {
    let sort = match p.sort.as_deref() {
        None | Some("") => Sort::parse("part_number"),
        Some(s) => Sort::parse(s),
    }
    .map_err(OpsError::validation)?;
    let cursor = match p.cursor.as_deref() {
        None | Some("") => None,
        Some(c) => Some(Cursor::decode(c).map_err(OpsError::validation)?),
    };
    // PostgreSQL cannot hold U+0000 in text, not even as a parameter: refused alike on both stores.
    if p.q.as_deref().is_some_and(|q| q.contains('\0')) {
        return Err(OpsError::validation(
            "q contains a NUL character (U+0000), which no text may hold",
        ));
    }
    Ok(PartQuery {
        q: p.q.filter(|s| !s.trim().is_empty()),
        source: match (p.answer_from.as_deref(), p.approved_only) {
            (Some(a), None) => AnswerSource::parse(a).map_err(OpsError::validation)?,
            (None, Some(true)) => AnswerSource::Approved,
            (None, Some(false)) => AnswerSource::Latest,
            (None, None) => AnswerSource::Approved,
            (Some(a), Some(o)) => {
                let s = AnswerSource::parse(a).map_err(OpsError::validation)?;
                if (s == AnswerSource::Approved) != o {
                    return Err(OpsError::validation(format!(
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
    })
}

/// Parts by electrical behaviour, from stored figures.
pub async fn query(state: &AppState, input: PartQueryInput) -> OpsResult<PartPage> {
    let query = part_query(input)?;
    Ok(state.store.query_parts(&query).await?)
}

/// The part a request names (a path segment, a gRPC field). Text that is no part number names no
/// part, since none could have been created under it: it is refused as any unknown part is (not
/// found), not as invalid input.
pub fn named(text: &str) -> OpsResult<PartNumber> {
    PartNumber::parse(text).map_err(|_| OpsError::not_found(format!("no part {text}")))
}

/// The longest part description.
const MAX_DESCRIPTION_CHARS: usize = 500;

/// Creates a part with its limits (the description trimmed; the part number as given, parsed by
/// [`PartNumber::parse`]).
pub async fn create(
    state: &AppState,
    actor: &str,
    part_number: &str,
    description: &str,
    limits: &Limits,
) -> OpsResult<Part> {
    let description = description.trim();
    if description.chars().count() > MAX_DESCRIPTION_CHARS {
        return Err(OpsError::validation(
            "description must be at most 500 characters",
        ));
    }
    let part_number = PartNumber::parse(part_number).map_err(OpsError::validation)?;
    state
        .store
        .create_part(actor, &part_number, description, limits)
        .await?;
    Ok(state.store.part(&part_number).await?)
}

/// A part with its limits, lots, baseline, fits and audit trail.
pub async fn get(state: &AppState, part_number: &PartNumber) -> OpsResult<Part> {
    Ok(state.store.part(part_number).await?)
}

/// Replaces a part's limits; every succeeded fit of the part is judged again.
pub async fn set_limits(
    state: &AppState,
    actor: &str,
    part_number: &PartNumber,
    limits: &Limits,
) -> OpsResult<Part> {
    state
        .store
        .update_limits(actor, part_number, limits)
        .await?;
    Ok(state.store.part(part_number).await?)
}

/// A part's figures across its lots with its limits and control limits
/// ([`crate::registry::trend::part_trend`]).
pub async fn trend(state: &AppState, part_number: &PartNumber) -> OpsResult<PartTrend> {
    let part = state.store.part_row(part_number).await?;
    let fits = state.store.lot_fits(part.part_id).await?;
    tokio::task::spawn_blocking(move || {
        crate::registry::trend::part_trend(&part.part_number, &part.limits, fits)
    })
    .await
    .map_err(OpsError::internal)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ops::ErrorKind;

    #[test]
    fn text_that_is_no_part_number_names_no_part() {
        assert_eq!(named("EMI-220/3").unwrap().as_str(), "EMI-220/3");
        for text in ["bad part", " EMI-220/3", "", "Ω"] {
            let e = named(text).unwrap_err();
            assert_eq!(e.kind, ErrorKind::NotFound, "{text:?}");
            // The store's words for an unknown part.
            assert_eq!(e.detail, format!("no part {text}"));
        }
    }
}
