//! Estimation: initial values from the curve, Levenberg–Marquardt, model selection, uncertainty and
//! derived figures. Everything here is pure: a [`Sweep`] and [`FitOptions`] in, a [`FitReport`] out.
//!
//! The report's field names are part of the JSON contract (CLI, HTTP, database): add fields, do not
//! rename them.

pub mod assess;
pub mod derived;
pub mod initial;
pub(crate) mod linalg;
pub mod lm;
pub mod lumped;
pub mod plausible;
pub mod problem;
pub mod rational;

pub use assess::{Assessment, Finding, FindingKind, FitStatus};

use crate::model::FittedModel;
use serde::{Deserialize, Serialize};
use std::sync::Arc;
use std::sync::atomic::AtomicBool;

/// The engine version stored with every fit, so a refit by a newer engine is a new revision.
pub const ENGINE_VERSION: &str = env!("CARGO_PKG_VERSION");

/// A separate four-wire DC resistance reading that pins `rdc_ohm`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct DcrReading {
    pub value_ohm: f64,
    /// Standard uncertainty of the reading; when absent, 0.5 % of the value plus 1 mΩ.
    pub sigma_ohm: Option<f64>,
}

/// Which model family to fit.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ModelFamily {
    #[default]
    Lumped,
    Rational,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct FitOptions {
    pub family: ModelFamily,
    pub dcr: Option<DcrReading>,
    /// Most extra resonant sections model selection may add (0..=3).
    pub max_sections: usize,
    pub max_iterations: u64,
    /// Wall-clock bound for one whole fit (all candidate models), in seconds.
    pub time_limit_s: f64,
    /// Frequencies at which the report gives effective L and Q.
    pub report_frequencies_hz: Vec<f64>,
    /// Rational fits: a fixed number of poles (real poles count one, complex pairs two); `None` grows the
    /// order automatically.
    pub rational_order: Option<usize>,
    /// Rational fits: the highest order automatic selection tries.
    pub rational_max_order: usize,
    /// Rational fits: automatic selection stops at the first order whose weighted RMS error
    /// (1 = residuals at the stated uncertainty) is at or below this.
    pub rational_target_rms_weighted: f64,
    /// Rational fits: most pole relocations per order.
    pub rational_max_relocations: u64,
    /// Rational fits: passivity enforcement may raise the weighted RMS error by at most this fraction
    /// (0.1 = 10 %; of at least 0.001, see `rational::passivity::error_bound`). When no order within it reaches
    /// the target error, an order enforced past it is kept if it is clearly closer to the data, with a
    /// warning; passive data are never refused for the allowance alone.
    pub passivity_rms_allowance: f64,
    /// For the service: when a lumped fit's weighted RMS error ends above this (the chosen model misses
    /// the data by more than its stated uncertainty explains), the service queues a rational fit of the
    /// same sweep as the next revision, so both are stored. `None` never does. The engine itself
    /// ignores it.
    pub rational_fallback_above_rms_weighted: Option<f64>,
    /// How the part is built (turns, core shape, gap): the lumped report then gives the core
    /// material's permeability spectrum and initial permeability ([`crate::model::material`]).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub construction: Option<crate::model::material::Construction>,
}

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions {
            family: ModelFamily::Lumped,
            dcr: None,
            max_sections: 3,
            max_iterations: 200,
            time_limit_s: 10.0,
            report_frequencies_hz: Vec::new(),
            rational_order: None,
            rational_max_order: 30,
            rational_target_rms_weighted: 1.0,
            rational_max_relocations: 30,
            passivity_rms_allowance: 0.1,
            rational_fallback_above_rms_weighted: Some(3.0),
            construction: None,
        }
    }
}

/// Hooks for a caller that runs the fit on a worker: cancellation and progress. Not serialised.
#[derive(Clone, Default)]
pub struct FitControl {
    /// Set to true to cancel; the fit returns [`FitError::Cancelled`].
    pub cancel: Option<Arc<AtomicBool>>,
    /// Called with a fraction in 0..=1 as candidate models finish.
    pub progress: Option<Arc<dyn Fn(f64) + Send + Sync>>,
}

/// One-sigma uncertainty with the same keys as the lumped model; `None` where the parameter is absent
/// from the chosen model or not identifiable from the data.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct LumpedUncertainty {
    pub l0_h: Option<f64>,
    pub rdc_ohm: Option<f64>,
    pub k_ac_ohm_per_sqrt_hz: Option<f64>,
    pub rp_ohm: Option<f64>,
    pub cp_f: Option<f64>,
    pub ls_h: Option<f64>,
    pub sections: Vec<SectionUncertainty>,
    /// The dispersive core's parameters, when the model has one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub core: Option<CoreUncertainty>,
}

/// One-sigma uncertainty of a dispersive core's parameters (keys as in `CoreDispersion`).
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
pub struct CoreUncertainty {
    pub corner_hz: Option<f64>,
    pub alpha: Option<f64>,
    pub beta: Option<f64>,
    pub damping: Option<f64>,
    pub air_fraction: Option<f64>,
    #[serde(default)]
    pub resonance_hz: Option<f64>,
    #[serde(default)]
    pub resonance_share: Option<f64>,
}

#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
pub struct SectionUncertainty {
    pub r_ohm: Option<f64>,
    pub l_h: Option<f64>,
    pub c_f: Option<f64>,
}

/// Correlation matrix of the fitted parameters, rows and columns in `names` order
/// (e.g. "l0_h", "sections[0].c_f").
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct Correlation {
    pub names: Vec<String>,
    pub matrix: Vec<Vec<f64>>,
}

/// Effective inductance and Q at one frequency, from the fitted model.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct PointFigures {
    pub frequency_hz: f64,
    /// Im Z / ω.
    pub l_eff_h: f64,
    /// Im Z / Re Z.
    pub q: f64,
    pub z_mag_ohm: f64,
}

/// Figures derived from the fitted model (never from raw points).
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct Derived {
    /// First parallel resonance (Im Z crosses zero from + to −), or `None` when above the sweep.
    pub srf_hz: Option<f64>,
    /// When `srf_hz` is `None`: the SRF lies above this frequency (the top of the sweep).
    pub srf_above_hz: Option<f64>,
    /// Im Z crossing from − to + (|Z| minima) inside the band.
    pub series_resonances_hz: Vec<f64>,
    /// Every Im Z crossing from + to − inside the band, the SRF first.
    pub parallel_resonances_hz: Vec<f64>,
    pub q_peak: Option<f64>,
    pub q_peak_hz: Option<f64>,
    /// 1/((2π·SRF)²·L0): what the usual one-line estimate would say.
    pub naive_cp_f: Option<f64>,
    /// (naive − fitted)/fitted in percent.
    pub naive_cp_error_percent: Option<f64>,
    /// rp/(2π·L0): the equivalent single-pole permeability roll-off corner.
    pub core_corner_hz: Option<f64>,
    /// L and Q at the requested frequencies.
    pub at_frequencies: Vec<PointFigures>,
}

#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct Quality {
    /// sqrt(Σ |r/σ|² / (2N)): 1 when the residuals match the stated uncertainty.
    pub rms_weighted: f64,
    /// max |Z_fit − Z_meas| / |Z_meas|.
    pub max_relative_error: f64,
    pub max_relative_error_at_hz: f64,
    pub points: usize,
    pub parameters: usize,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Termination {
    /// Relative cost or step change below tolerance.
    Converged,
    MaxIterations,
    TimeLimit,
    /// Damping grew without a cost decrease: at a minimum to machine precision or stuck.
    NoFurtherProgress,
}

/// One candidate tried during model selection.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Candidate {
    /// e.g. "l0+rdc+cp+rp+k_ac+ls+1s".
    pub label: String,
    pub parameters: usize,
    pub cost: f64,
    /// Bayesian information criterion (lower is better).
    pub bic: f64,
    pub chosen: bool,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FitReport {
    pub engine_version: String,
    pub model: FittedModel,
    /// Lumped fits only.
    pub uncertainty: Option<LumpedUncertainty>,
    /// Parameter names the data cannot determine (their uncertainty is `None`).
    pub not_identifiable: Vec<String>,
    pub correlation: Option<Correlation>,
    pub derived: Derived,
    pub quality: Quality,
    pub termination: Termination,
    pub iterations: u64,
    pub candidates: Vec<Candidate>,
    /// Lowest and highest frequency of the sweep: the band where the model is valid.
    pub band_hz: [f64; 2],
    /// Does the model describe the data within their uncertainty (`ok`), or not (`poor`, with what
    /// misses, where and by how much)? Reports stored before this field existed read as `ok` with no
    /// findings.
    #[serde(default)]
    pub assessment: Assessment,
    /// What the readers or the fit did that the user should know (merged rows, a 0 Hz row used as the
    /// DC resistance, …).
    #[serde(default)]
    pub warnings: Vec<String>,
    /// The core material as the model shows it, when the options state the construction (lumped fits).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub material: Option<crate::model::material::MaterialReport>,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum FitError {
    #[error("the sweep has {0} points; a fit needs at least 20")]
    TooFewPoints(usize),
    #[error("the sweep does not look like an inductor: {0}")]
    NotAnInductor(String),
    #[error("invalid fit options: {0}")]
    InvalidOptions(String),
    #[error("the fit was cancelled")]
    Cancelled,
    #[error("the fit did not produce a finite model: {0}")]
    NonFinite(String),
    #[error("no passive model within the error bound: {0}")]
    NotPassive(String),
}

impl FitOptions {
    /// Checks every option before any work (or storage) depends on it; the message names the option
    /// and its allowed range.
    pub fn validate(&self) -> Result<(), FitError> {
        let bad = |m: String| Err(FitError::InvalidOptions(m));
        if let Some(c) = &self.construction {
            c.validate().map_err(FitError::InvalidOptions)?;
        }
        if self.max_sections > 3 {
            return bad(format!(
                "max_sections is {}; it must be 0 to 3",
                self.max_sections
            ));
        }
        if !(1..=100_000).contains(&self.max_iterations) {
            return bad(format!(
                "max_iterations is {}; it must be 1 to 100000",
                self.max_iterations
            ));
        }
        if !(self.time_limit_s.is_finite()
            && self.time_limit_s > 0.0
            && self.time_limit_s <= 3600.0)
        {
            return bad(format!(
                "time_limit_s is {}; it must be above 0 and at most 3600 s",
                self.time_limit_s
            ));
        }
        if self.report_frequencies_hz.len() > 1000 {
            return bad(format!(
                "report_frequencies_hz has {} entries; at most 1000",
                self.report_frequencies_hz.len()
            ));
        }
        if let Some(f) = self
            .report_frequencies_hz
            .iter()
            .find(|f| !(f.is_finite() && **f > 0.0 && **f <= 1e12))
        {
            return bad(format!(
                "report_frequencies_hz holds {f}; every frequency must be above 0 Hz and at most 1 THz"
            ));
        }
        if let Some(n) = self.rational_order
            && !(1..=MAX_RATIONAL_ORDER).contains(&n)
        {
            return bad(format!(
                "rational_order is {n}; it must be 1 to {MAX_RATIONAL_ORDER}"
            ));
        }
        if !(2..=MAX_RATIONAL_ORDER).contains(&self.rational_max_order) {
            return bad(format!(
                "rational_max_order is {}; it must be 2 to {MAX_RATIONAL_ORDER}",
                self.rational_max_order
            ));
        }
        if !(self.rational_target_rms_weighted.is_finite()
            && self.rational_target_rms_weighted > 0.0)
        {
            return bad(format!(
                "rational_target_rms_weighted is {}; it must be a positive number",
                self.rational_target_rms_weighted
            ));
        }
        if !(1..=1000).contains(&self.rational_max_relocations) {
            return bad(format!(
                "rational_max_relocations is {}; it must be 1 to 1000",
                self.rational_max_relocations
            ));
        }
        if !(self.passivity_rms_allowance.is_finite()
            && (0.0..=10.0).contains(&self.passivity_rms_allowance))
        {
            return bad(format!(
                "passivity_rms_allowance is {}; it must be 0 to 10",
                self.passivity_rms_allowance
            ));
        }
        if let Some(x) = self.rational_fallback_above_rms_weighted
            && !(x.is_finite() && x > 0.0)
        {
            return bad(format!(
                "rational_fallback_above_rms_weighted is {x}; it must be a positive number or null"
            ));
        }
        if let Some(d) = self.dcr {
            if !(d.value_ohm.is_finite() && d.value_ohm > 0.0 && d.value_ohm <= 1e6) {
                return bad(format!(
                    "the DCR reading is {} Ω; it must be above 0 and at most 1 MΩ",
                    d.value_ohm
                ));
            }
            if let Some(s) = d.sigma_ohm
                && !(s.is_finite() && s > 0.0 && s <= d.value_ohm * 10.0)
            {
                return bad(format!(
                    "the DCR reading's uncertainty is {s} Ω; it must be above 0 and at most ten times \
                     the reading"
                ));
            }
        }
        Ok(())
    }
}

/// The highest rational order the options accept (poles; a complex pair counts two).
pub const MAX_RATIONAL_ORDER: usize = 60;

/// Fits the family the options ask for.
pub fn fit(
    sweep: &crate::sweep::Sweep,
    options: &FitOptions,
    control: &FitControl,
) -> Result<FitReport, FitError> {
    match options.family {
        ModelFamily::Lumped => fit_lumped(sweep, options, control),
        ModelFamily::Rational => fit_rational(sweep, options, control),
    }
}

/// The lumped fit: starting values from the curve, LM on log-parameters per candidate structure,
/// selection by BIC, uncertainty and derived figures (see [`lumped`]).
pub fn fit_lumped(
    sweep: &crate::sweep::Sweep,
    options: &FitOptions,
    control: &FitControl,
) -> Result<FitReport, FitError> {
    lumped::fit_lumped(sweep, options, control)
}

/// Vector fitting with automatic order, passivity enforcement and the shared report; see [`vector`].
pub fn fit_rational(
    sweep: &crate::sweep::Sweep,
    options: &FitOptions,
    control: &FitControl,
) -> Result<FitReport, FitError> {
    rational::fit_rational(sweep, options, control)
}
