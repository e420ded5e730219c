//! The printable inspection report of a fit: everything it states read from the store and the stored
//! sweep, then built by [`crate::report`] off the runtime, as one HTML page or a PDF.

use super::error::{OpsError, OpsResult};
use crate::app::AppState;
use crate::report::{self, ReportInput};

/// Everything the report states, read from the store and the stored sweep.
async fn input(state: &AppState, fit_id: i64) -> OpsResult<ReportInput> {
    let detail = state.store.fit_detail(fit_id).await?;
    let Some(json) = detail.report.clone() else {
        return Err(OpsError::conflict(format!(
            "fit {fit_id} is {}: a report needs a succeeded fit",
            detail.summary.status.as_str()
        )));
    };
    let fit_report: crate::fit::FitReport =
        serde_json::from_value(json).map_err(OpsError::internal)?;
    // A stored part number passed `PartNumber::parse` when it was created.
    let part_number = crate::registry::ids::PartNumber::parse(&detail.summary.part_number)
        .map_err(OpsError::internal)?;
    let part = state.store.part_row(&part_number).await?;
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
    .map_err(OpsError::internal)?
    .map_err(|e| OpsError::internal(format!("a stored sweep no longer reads: {e}")))?;
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

/// The report as one self-contained HTML page.
pub async fn html(state: &AppState, fit_id: i64) -> OpsResult<String> {
    let i = input(state, fit_id).await?;
    tokio::task::spawn_blocking(move || report::html::render(&report::build(&i), &title(&i)))
        .await
        .map_err(OpsError::internal)
}

/// The report as a PDF (A4, standard fonts), with the file name offered for it.
pub async fn pdf(state: &AppState, fit_id: i64) -> OpsResult<(String, Vec<u8>)> {
    let i = input(state, fit_id).await?;
    let name = format!("{}.pdf", file_stem(&i));
    let bytes = tokio::task::spawn_blocking(move || {
        let footer = format!(
            "{} lot {}, fit #{} revision {}; made {}",
            i.part_number, i.lot, i.fit_id, i.revision, i.generated_at
        );
        report::pdf::render(&report::build(&i), &title(&i), &footer)
    })
    .await
    .map_err(OpsError::internal)?;
    Ok((name, bytes))
}
