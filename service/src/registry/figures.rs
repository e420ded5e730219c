//! Figures copied from a succeeded fit's report into indexed columns and side tables.

use super::grid::{self, GridPoint};
use crate::fit::FitReport;
use crate::model::FittedModel;

#[derive(Debug, Clone, PartialEq)]
pub struct StoredFigures {
    pub srf_hz: Option<f64>,
    pub srf_above_hz: Option<f64>,
    pub l0_h: Option<f64>,
    pub rdc_ohm: Option<f64>,
    /// The core corner frequency (`derived.core_corner_hz`); `None` without a core loss.
    pub core_corner_hz: Option<f64>,
    pub band_min_hz: f64,
    pub band_max_hz: f64,
    pub series_resonances_hz: Vec<f64>,
    pub parallel_resonances_hz: Vec<f64>,
    pub grid: Vec<GridPoint>,
}

pub fn from_report(report: &FitReport) -> StoredFigures {
    let (l0_h, rdc_ohm) = match &report.model {
        FittedModel::Lumped(m) => (Some(m.l0_h), Some(m.rdc_ohm)),
        // Both are DC figures, outside the band where a rational model is valid: unknown.
        FittedModel::Rational(_) => (None, None),
    };
    let finite = |v: Option<f64>| v.filter(|x| x.is_finite());
    StoredFigures {
        srf_hz: finite(report.derived.srf_hz),
        srf_above_hz: finite(report.derived.srf_above_hz),
        l0_h: finite(l0_h),
        rdc_ohm: finite(rdc_ohm),
        core_corner_hz: finite(report.derived.core_corner_hz),
        band_min_hz: report.band_hz[0],
        band_max_hz: report.band_hz[1],
        series_resonances_hz: report.derived.series_resonances_hz.clone(),
        parallel_resonances_hz: report.derived.parallel_resonances_hz.clone(),
        grid: grid::evaluate(&report.model, report.band_hz[0], report.band_hz[1]),
    }
}

/// The fitted model's impedance at the measured frequencies (for plotting against the data).
pub fn model_curve(model: &FittedModel, frequency_hz: &[f64]) -> (Vec<f64>, Vec<f64>) {
    use crate::model::ImpedanceModel;
    frequency_hz
        .iter()
        .map(|&f| {
            let z = model.impedance(f);
            (z.re, z.im)
        })
        .unzip()
}
