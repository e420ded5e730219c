//! The JSON shapes of the HTTP API (described in api/openapi.yaml). Numbers carry SI units in their names;
//! timestamps are RFC 3339 text.

use super::drift::Drift;
use super::limits::Limits;
use super::verdict::Check;
use serde::{Deserialize, Serialize};

/// The state of a fit's job.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum FitStatus {
    Queued,
    Running,
    Succeeded,
    Failed,
    Cancelled,
}

impl FitStatus {
    pub fn as_str(self) -> &'static str {
        match self {
            FitStatus::Queued => "queued",
            FitStatus::Running => "running",
            FitStatus::Succeeded => "succeeded",
            FitStatus::Failed => "failed",
            FitStatus::Cancelled => "cancelled",
        }
    }
    pub fn parse(text: &str) -> Option<FitStatus> {
        Some(match text {
            "queued" => FitStatus::Queued,
            "running" => FitStatus::Running,
            "succeeded" => FitStatus::Succeeded,
            "failed" => FitStatus::Failed,
            "cancelled" => FitStatus::Cancelled,
            _ => return None,
        })
    }
}

/// Why a fit ended without a model: a closed set of stable names, stored with the fit
/// (`fits.error_kind`, migration 0010) next to its message. The service maps the numeric core's errors
/// onto these in one place, `jobs::failure_kind`; the message says the details.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum FailureKind {
    /// The sweep has fewer points than a fit needs.
    TooFewPoints,
    /// The sweep is not inductive at the bottom of its band (a capacitor, or a sweep that starts
    /// above the self-resonance).
    NotAnInductor,
    /// An option (or a per-point uncertainty) the fit cannot work with.
    InvalidOptions,
    /// The fit produced no finite model.
    NonFinite,
    /// No passive rational model within the error bound.
    NotPassive,
    /// Cancelled on request.
    Cancelled,
    /// The stored sweep (or one of its fixture files) no longer reads.
    UnreadableSweep,
    /// Started as many times as the service allows and never finished (the worker stopped each time).
    AttemptsExhausted,
    /// The fit stopped on an internal error of the service.
    Internal,
}

impl FailureKind {
    pub const ALL: [FailureKind; 9] = [
        FailureKind::TooFewPoints,
        FailureKind::NotAnInductor,
        FailureKind::InvalidOptions,
        FailureKind::NonFinite,
        FailureKind::NotPassive,
        FailureKind::Cancelled,
        FailureKind::UnreadableSweep,
        FailureKind::AttemptsExhausted,
        FailureKind::Internal,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            FailureKind::TooFewPoints => "too_few_points",
            FailureKind::NotAnInductor => "not_an_inductor",
            FailureKind::InvalidOptions => "invalid_options",
            FailureKind::NonFinite => "non_finite",
            FailureKind::NotPassive => "not_passive",
            FailureKind::Cancelled => "cancelled",
            FailureKind::UnreadableSweep => "unreadable_sweep",
            FailureKind::AttemptsExhausted => "attempts_exhausted",
            FailureKind::Internal => "internal",
        }
    }

    pub fn parse(text: &str) -> Option<FailureKind> {
        FailureKind::ALL.into_iter().find(|k| k.as_str() == text)
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct FitSummary {
    pub fit_id: i64,
    /// 1 for the first fit of a sweep; each refit adds one.
    pub revision: i64,
    pub sweep_id: i64,
    pub part_number: String,
    pub lot: String,
    pub status: FitStatus,
    /// 0..1.
    pub progress: f64,
    pub error: Option<String>,
    /// Why a failed or cancelled fit has no model, as a stable name (see `FailureKind`); null for
    /// other fits and for failures stored before kinds were.
    pub error_kind: Option<FailureKind>,
    pub created_at: String,
    pub started_at: Option<String>,
    pub finished_at: Option<String>,
    pub srf_hz: Option<f64>,
    /// `pass`, `fail`, `withheld` (the part has limits but the model does not describe its data, so
    /// it is not judged), or null (no limits, or not succeeded).
    pub verdict: Option<String>,
    /// `ok` (the model describes the data within their uncertainty) or `poor` (it does not: see the
    /// report's `assessment` for what misses, where and by how much); null until succeeded.
    pub quality: Option<String>,
    /// `approved`, `rejected`, or null.
    pub approval: Option<String>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct FitDetail {
    #[serde(flatten)]
    pub summary: FitSummary,
    /// The engine's FitReport, or null until the fit succeeded.
    #[schema(value_type = Option<Object>)]
    pub report: Option<serde_json::Value>,
    pub verdict_checks: Vec<Check>,
    /// Why the verdict is withheld (a poor model), or null.
    pub verdict_note: Option<String>,
    /// The assessment's one-line summary of how well the model describes the data, or null until
    /// succeeded.
    pub quality_summary: Option<String>,
    pub drift: Option<Drift>,
    /// The fit options the engine ran with.
    #[schema(value_type = Object)]
    pub options: serde_json::Value,
    pub method: String,
    pub z0_ohm: Option<f64>,
    pub dcr_ohm: Option<f64>,
    pub temperature_c: Option<f64>,
    pub operator: String,
    pub file_name: String,
    pub sha256: String,
    pub engine_version: Option<String>,
    pub attempts: i64,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct FitCurves {
    pub frequency_hz: Vec<f64>,
    pub measured_z_real_ohm: Vec<f64>,
    pub measured_z_imag_ohm: Vec<f64>,
    pub sigma_ohm: Vec<f64>,
    pub model_z_real_ohm: Vec<f64>,
    pub model_z_imag_ohm: Vec<f64>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct AuditEntry {
    pub at: String,
    pub actor: String,
    pub action: String,
    pub fit_id: Option<i64>,
    pub reason: Option<String>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct Part {
    pub part_number: String,
    pub description: String,
    pub limits: Limits,
    pub lots: Vec<String>,
    pub baseline_fit_id: Option<i64>,
    /// Newest first (at most 500).
    pub fits: Vec<FitSummary>,
    /// Oldest first (the newest 500).
    pub audit: Vec<AuditEntry>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct PartSummary {
    pub part_number: String,
    pub description: String,
    pub approved_fit_id: Option<i64>,
    /// The newest succeeded fit.
    pub latest_fit_id: Option<i64>,
    pub latest_verdict: Option<String>,
    /// Largest |drift| of the newest fit against the approved baseline, in σ.
    pub drift_max_sigma: Option<f64>,
    /// L0 of the newest fit against the approved baseline, in percent (the figure a tolerance applies
    /// to).
    pub drift_l0_percent: Option<f64>,
    /// The part's inductance tolerance, in percent, when set.
    pub l_tolerance_percent: Option<f64>,
    /// Figures of the fit the query answered from (see the page's `answer_from`).
    pub srf_hz: Option<f64>,
    pub series_resonances_hz: Vec<f64>,
    pub l0_h: Option<f64>,
    pub rdc_ohm: Option<f64>,
    /// The core corner frequency (the dispersive core's corner, or Rp/(2π·L0) for the single-pole
    /// core); null when the model has no core loss.
    #[serde(default)]
    pub core_corner_hz: Option<f64>,
    /// With `l_at_hz`: the effective L there, interpolated on the stored grid.
    pub l_eff_h: Option<f64>,
    /// With a `z_band_*` query: the lowest stored |Z| in the band.
    pub z_min_ohm: Option<f64>,
    pub answered_from_fit_id: Option<i64>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct QueueCounts {
    pub queued: i64,
    pub running: i64,
    pub succeeded: i64,
    pub failed: i64,
    pub cancelled: i64,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct FitPage {
    pub items: Vec<FitSummary>,
    /// Pass as `cursor` for the next page; null on the last page.
    pub next_cursor: Option<String>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct PartPage {
    pub items: Vec<PartSummary>,
    /// Which fit of each part the figures come from: `approved` (the baseline; the default), `latest`
    /// or `latest-passing`.
    pub answer_from: String,
    /// Pass as `cursor` for the next page; null on the last page.
    pub next_cursor: Option<String>,
}
