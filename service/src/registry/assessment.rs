//! Everything a succeeded fit stores besides the report itself, computed before the store's single
//! writer is taken: the indexed figures and grid, the verdict against the part's limits and the drift
//! against the approved baseline, each already serialised. The worker computes it off the async
//! runtime; the store checks inside its write transaction that the limits and the baseline it was
//! computed against are still the part's, and recomputes it there in the rare case they changed.

use super::figures::{self, StoredFigures};
use super::limits::Limits;
use super::{drift, verdict};
use crate::fit::FitReport;

/// What the verdict and the drift were judged against.
#[derive(Debug, Clone, PartialEq)]
pub struct Basis {
    pub limits: Limits,
    pub baseline_fit_id: Option<i64>,
}

/// The verdict and drift of one report against one basis, serialised for the store.
#[derive(Debug, Clone, PartialEq)]
pub struct Judgement {
    pub basis: Basis,
    pub verdict: Option<&'static str>,
    pub verdict_json: String,
    pub drift_json: Option<String>,
    pub drift_max_sigma: Option<f64>,
}

/// A succeeded fit ready to be written.
#[derive(Debug, Clone)]
pub struct Assessment {
    pub report_json: String,
    pub figures: StoredFigures,
    pub judgement: Judgement,
}

/// Judges `report` against the basis: the part's limits and, when the part has an approved baseline
/// and its report is given, the drift from it.
pub fn judge(
    basis: Basis,
    baseline: Option<&FitReport>,
    report: &FitReport,
) -> serde_json::Result<Judgement> {
    let checks = verdict::checks(&basis.limits, report);
    let drift = basis
        .baseline_fit_id
        .zip(baseline)
        .map(|(id, b)| drift::drift(id, b, report));
    Ok(Judgement {
        verdict: verdict::overall(&checks, report),
        verdict_json: serde_json::to_string(&checks)?,
        drift_json: drift.as_ref().map(serde_json::to_string).transpose()?,
        drift_max_sigma: drift.as_ref().and_then(|d| d.max_sigma()),
        basis,
    })
}

/// The whole assessment of a report; `baseline_json` is the stored report of the basis's baseline.
pub fn assess(
    report: &FitReport,
    basis: Basis,
    baseline_json: Option<&str>,
) -> serde_json::Result<Assessment> {
    let baseline = baseline_json
        .map(serde_json::from_str::<FitReport>)
        .transpose()?;
    Ok(Assessment {
        report_json: serde_json::to_string(report)?,
        figures: figures::from_report(report),
        judgement: judge(basis, baseline.as_ref(), report)?,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::registry::verdict::tests::report;

    #[test]
    fn the_judgement_names_its_basis_and_drift_needs_a_baseline() {
        let r = report(1e-5, 0.05, 5e-12, Some(2.25e7));
        let limits = Limits {
            dcr_max_ohm: Some(0.04),
            ..Limits::default()
        };
        let basis = |baseline_fit_id| Basis {
            limits: limits.clone(),
            baseline_fit_id,
        };
        let alone = assess(&r, basis(None), None).unwrap();
        assert_eq!(
            alone.judgement.verdict,
            Some("fail"),
            "0.05 Ω is above 0.04 Ω"
        );
        assert_eq!(alone.judgement.drift_json, None);
        assert_eq!(alone.judgement.basis.baseline_fit_id, None);
        assert_eq!(alone.figures, figures::from_report(&r));

        // Against a baseline whose L0 is 2 % lower, the drift of L0 is +2.04 %.
        let b = report(0.98e-5, 0.05, 5e-12, Some(2.25e7));
        let b_json = serde_json::to_string(&b).unwrap();
        let with = assess(&r, basis(Some(7)), Some(&b_json)).unwrap();
        assert_eq!(with.judgement.basis.baseline_fit_id, Some(7));
        let drift: serde_json::Value =
            serde_json::from_str(with.judgement.drift_json.as_deref().unwrap()).unwrap();
        assert_eq!(drift["baseline_fit_id"], 7);
        let l0 = drift["parameters"]
            .as_array()
            .unwrap()
            .iter()
            .find(|p| p["name"] == "l0_h")
            .unwrap();
        let percent = l0["percent"].as_f64().unwrap();
        assert!((percent - 2.0408).abs() < 1e-3, "L0 drift {percent} %");
        let parsed: FitReport = serde_json::from_str(&with.report_json).unwrap();
        assert_eq!(parsed.model, r.model);
        assert!(assess(&r, basis(Some(7)), Some("{")).is_err());
    }
}
