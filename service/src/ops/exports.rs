//! What leaves the service as a file: a succeeded fit's model as JSON with its provenance, as a SPICE
//! subcircuit or a Touchstone 1-port, and the names offered for downloads.

use super::error::{OpsError, OpsResult};
use crate::app::AppState;
use crate::registry::wire::FitDetail;

pub async fn succeeded_report(state: &AppState, fit_id: i64) -> OpsResult<crate::fit::FitReport> {
    state.store.fit_report(fit_id).await?.ok_or_else(|| {
        OpsError::conflict(format!(
            "fit {fit_id} has not succeeded: there is no model yet"
        ))
    })
}

/// The fitted model as JSON: the model's own fields at the top, then where it is valid (`band_hz`) and
/// where it came from (`provenance`); with the file name offered for it. A figure read from it
/// outside `band_hz` is an extrapolation.
pub async fn model_json(state: &AppState, fit_id: i64) -> OpsResult<(String, serde_json::Value)> {
    let report = succeeded_report(state, fit_id).await?;
    let detail = state.store.fit_detail(fit_id).await?;
    let name = safe_file_name(&format!("fit-{fit_id}-model.json"));
    let mut body = serde_json::to_value(&report.model).map_err(OpsError::internal)?;
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
    Ok((name, body))
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

fn export_problem(e: crate::export::ExportError) -> OpsError {
    OpsError::conflict(format!("this model cannot be exported: {e}"))
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
) -> OpsResult<(String, String)> {
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
    .map_err(OpsError::internal)?
    .map_err(export_problem)?;
    let name = match export {
        TextExport::Subcircuit => format!("fit-{fit_id}.cir"),
        TextExport::Touchstone => format!("fit-{fit_id}.s1p"),
    };
    Ok((name, text))
}

/// A download file name that cannot name a path or break the header: the last component of what was
/// uploaded (after any `/` or `\\`), letters, digits, `.`, `-` and `_` only (anything else becomes
/// `_`), no leading dot, at most 120 characters; `download` when nothing is left.
pub fn safe_file_name(name: &str) -> String {
    let last = name.rsplit(['/', '\\']).next().unwrap_or_default();
    let cleaned: String = last
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || matches!(c, '.' | '-' | '_') {
                c
            } else {
                '_'
            }
        })
        .collect();
    let trimmed: String = cleaned.trim_start_matches('.').chars().take(120).collect();
    if trimmed.chars().all(|c| c == '_' || c == '.') {
        "download".into()
    } else {
        trimmed
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn download_names_cannot_name_a_path_or_break_the_header() {
        for (given, want) in [
            ("lot-7_reflection.s1p", "lot-7_reflection.s1p"),
            ("../../etc/passwd", "passwd"),
            ("..\\..\\boot.ini", "boot.ini"),
            ("a\"; filename=evil.exe", "a___filename_evil.exe"),
            ("..", "download"),
            ("/", "download"),
            (".hidden.csv", "hidden.csv"),
            ("messung äöü.csv", "messung____.csv"),
            ("x\r\nSet-Cookie: a=b", "x__Set-Cookie__a_b"),
        ] {
            assert_eq!(safe_file_name(given), want, "{given:?}");
        }
        assert_eq!(safe_file_name(&"a".repeat(500)).len(), 120);
    }
}
