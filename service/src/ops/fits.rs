//! Fits: list and status, detail with verdict and drift, curves, and the decisions on a fit (cancel,
//! retry, refit, approve, reject). The roles are the transports' business; everything else is here.

use super::error::{OpsError, OpsResult};
use super::sweeps::{checked_options, parse_options_value};
use crate::app::AppState;
use crate::registry::figures::model_curve;
use crate::registry::ids::{LotCode, PartNumber};
use crate::registry::wire::{
    FailureKind, FitCurves, FitDetail, FitPage, FitStatus, FitSummary, QueueCounts,
};
use crate::store::fits::FitFilter;
use crate::store::jobs::PartRef;
use crate::store::parse_rfc3339;
use serde::Deserialize;

#[derive(Debug, Default, Deserialize, utoipa::IntoParams)]
#[into_params(parameter_in = Query)]
#[serde(deny_unknown_fields)]
pub struct FitListQuery {
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
    /// Only fits of this part: 1 to 64 letters, digits and -_.+/# (empty: any part).
    #[param(pattern = r"^([A-Za-z0-9_.+/#-]{1,64})?$")]
    pub part_number: Option<String>,
    /// Only fits of this lot: up to 64 characters without control characters, whitespace around it
    /// dropped (blank: any lot).
    #[param(pattern = r"^\s*([^\x00-\x1f\x7f\s][^\x00-\x1f\x7f]{0,63})?\s*$")]
    pub lot: Option<String>,
    /// RFC 3339: fits created at or after.
    #[param(format = DateTime)]
    pub since: Option<String>,
    /// 1..500, default 50.
    #[param(minimum = 1, maximum = 500)]
    pub limit: Option<i64>,
    pub cursor: Option<String>,
}

/// The validated store filter for these parameters.
pub fn fit_filter(p: FitListQuery) -> OpsResult<FitFilter> {
    let status = match p.status.as_deref() {
        None | Some("") => None,
        Some(s) => Some(FitStatus::parse(s).ok_or_else(|| {
            OpsError::validation(format!(
                "status must be queued, running, succeeded, failed or cancelled, not {s:?}"
            ))
        })?),
    };
    let error_kind = match p.error_kind.as_deref() {
        None | Some("") => None,
        Some(k) => Some(FailureKind::parse(k).ok_or_else(|| {
            let names: Vec<&str> = FailureKind::ALL.iter().map(|k| k.as_str()).collect();
            OpsError::validation(format!(
                "error_kind must be one of {}, not {k:?}",
                names.join(", ")
            ))
        })?),
    };
    let since_ms = match p.since.as_deref() {
        None => None,
        Some(s) => Some(parse_rfc3339(s).ok_or_else(|| {
            OpsError::validation(format!("since must be an RFC 3339 time, not {s:?}"))
        })?),
    };
    let before_fit_id = match p.cursor.as_deref() {
        None | Some("") => None,
        Some(c) => Some(
            c.parse::<i64>()
                .map_err(|_| OpsError::validation("cursor is not one this service handed out"))?,
        ),
    };
    let limit = p.limit.unwrap_or(50);
    if !(1..=500).contains(&limit) {
        return Err(OpsError::validation("limit must be 1 to 500"));
    }
    // An empty filter is no filter; any other text must be a name the registry could hold.
    let part_number = match p.part_number.as_deref() {
        None | Some("") => None,
        Some(t) => Some(PartNumber::parse(t).map_err(OpsError::validation)?),
    };
    let lot = match p.lot.as_deref() {
        None => None,
        Some(t) if t.trim().is_empty() => None,
        Some(t) => Some(LotCode::parse(t).map_err(OpsError::validation)?),
    };
    Ok(FitFilter {
        status,
        error_kind,
        part_number,
        lot,
        since_ms,
        before_fit_id,
        limit,
    })
}

/// Fits, newest first, filtered and paginated.
pub async fn list(state: &AppState, query: FitListQuery) -> OpsResult<FitPage> {
    let filter = fit_filter(query)?;
    Ok(state.store.list_fits(&filter).await?)
}

/// One fit: status, report, verdict per limit, drift against the approved baseline.
pub async fn detail(state: &AppState, fit_id: i64) -> OpsResult<FitDetail> {
    Ok(state.store.fit_detail(fit_id).await?)
}

/// One fit's status.
pub async fn summary(state: &AppState, fit_id: i64) -> OpsResult<FitSummary> {
    Ok(state.store.fit_summary(fit_id).await?)
}

/// Fits per state.
pub async fn counts(state: &AppState) -> OpsResult<QueueCounts> {
    Ok(state.store.queue_counts().await?)
}

/// Measured impedance with its uncertainty, and the model (if any) at the same frequencies.
pub async fn curves(state: &AppState, fit_id: i64) -> OpsResult<FitCurves> {
    let input = state.store.job_input(fit_id).await?;
    let report = state.store.fit_report(fit_id).await?;
    let engine = state.engine.clone();
    tokio::task::spawn_blocking(move || -> Result<FitCurves, String> {
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
    .map_err(OpsError::internal)?
    .map_err(|e| OpsError::internal(format!("a stored sweep no longer reads: {e}")))
}

/// Cancels a queued fit, or asks a running one to stop.
pub async fn cancel(state: &AppState, actor: &str, fit_id: i64) -> OpsResult<FitSummary> {
    if state.store.cancel_fit(actor, fit_id).await? {
        state.jobs.cancel_local(fit_id);
    }
    Ok(state.store.fit_summary(fit_id).await?)
}

/// Queues a failed or cancelled fit again.
pub async fn retry(state: &AppState, actor: &str, fit_id: i64) -> OpsResult<FitSummary> {
    state
        .backpressure
        .check_queue(&state.store, PartRef::OfFit(fit_id))
        .await?;
    // Checked again inside the write, so concurrent retries cannot together pass the bound.
    let bounds = Some(state.backpressure.queue_bounds());
    state.store.retry_fit(actor, fit_id, bounds).await?;
    state.jobs.wake();
    Ok(state.store.fit_summary(fit_id).await?)
}

/// Fits the same sweep again with new options (JSON; null for the defaults): a new revision, whose
/// fit id is returned.
pub async fn refit(
    state: &AppState,
    actor: &str,
    fit_id: i64,
    options: serde_json::Value,
) -> OpsResult<i64> {
    let detail = state.store.fit_detail(fit_id).await?;
    state
        .backpressure
        .check_queue(&state.store, PartRef::OfFit(fit_id))
        .await?;
    let options = checked_options(parse_options_value(options)?, detail.dcr_ohm)?;
    let options_json = serde_json::to_string(&options).map_err(OpsError::internal)?;
    let key = crate::jobs::job_key(&state.store.job_input(fit_id).await?, &options_json);
    let new_id = state
        .store
        .refit(
            actor,
            fit_id,
            &options_json,
            &key,
            Some(state.backpressure.queue_bounds()),
        )
        .await?;
    state.jobs.wake();
    Ok(new_id)
}

/// Approves a succeeded fit: it becomes the part's baseline. A reason of only spaces is refused; a
/// fit that fails its limits or whose model is poor needs `overriding` and a reason.
pub async fn approve(
    state: &AppState,
    actor: &str,
    fit_id: i64,
    reason: Option<&str>,
    overriding: bool,
) -> OpsResult<FitDetail> {
    let reason = match reason.map(str::trim) {
        Some("") => {
            return Err(OpsError::validation(
                "the reason is empty: give one or leave it out",
            ));
        }
        r => r,
    };
    state
        .store
        .approve_fit(actor, fit_id, reason, overriding)
        .await?;
    Ok(state.store.fit_detail(fit_id).await?)
}

/// Rejects a succeeded fit with its reason (required, not blank).
pub async fn reject(
    state: &AppState,
    actor: &str,
    fit_id: i64,
    reason: &str,
) -> OpsResult<FitDetail> {
    let reason = Some(reason.trim())
        .filter(|r| !r.is_empty())
        .ok_or_else(|| OpsError::validation("a rejection needs a reason"))?;
    state.store.reject_fit(actor, fit_id, reason).await?;
    Ok(state.store.fit_detail(fit_id).await?)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ops::ErrorKind;

    fn filter_of(part_number: Option<&str>, lot: Option<&str>) -> OpsResult<FitFilter> {
        fit_filter(FitListQuery {
            part_number: part_number.map(str::to_string),
            lot: lot.map(str::to_string),
            ..Default::default()
        })
    }

    #[test]
    fn part_number_and_lot_filters_are_parsed_once_into_their_types() {
        let f = filter_of(Some("EMI-220/3"), Some(" 2024 W17 ")).unwrap();
        assert_eq!(f.part_number.unwrap().as_str(), "EMI-220/3");
        // A lot code's surrounding whitespace is not part of it (as when it was stored).
        assert_eq!(f.lot.unwrap().as_str(), "2024 W17");
        // Empty (or, for a lot, blank) text is no filter.
        let f = filter_of(Some(""), Some("  ")).unwrap();
        assert_eq!((f.part_number, f.lot), (None, None));
    }

    #[test]
    fn a_filter_that_is_no_name_is_refused_naming_the_parameter_and_why() {
        let e = filter_of(Some("has space"), None).unwrap_err();
        assert_eq!(e.kind, ErrorKind::Validation);
        assert_eq!(
            e.detail,
            "part_number \"has space\" must be 1 to 64 characters of letters, digits and -_.+/#"
        );
        let e = filter_of(None, Some("a\u{1}b")).unwrap_err();
        assert_eq!(e.kind, ErrorKind::Validation);
        assert_eq!(
            e.detail,
            "lot must be at most 64 characters without control characters"
        );
    }
}
