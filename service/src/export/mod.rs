//! A fitted model out as text: SPICE subcircuit, Touchstone 1-port, CSV.
//!
//! Every function here is pure: a model and an [`ExportContext`] in, a `String` out. The netlists use
//! resistors, inductors and capacitors only (no behavioural sources, no frequency-dependent elements),
//! so they run in AC and transient analysis of any SPICE-family simulator; values are written in plain
//! exponent notation (`2.5e-6`, never a scale suffix, which avoids the `M` = milli trap).
//!
//! - [`spice::lumped_subcircuit`]: the lumped model, with the √f skin-effect resistance synthesised by
//!   [`ladder`] as a passive R‖L ladder and a dispersive core by [`core`] as R‖L relaxation cells and
//!   an L‖C‖R tank.
//! - [`foster::rational_subcircuit`]: the rational model as a series Foster realisation.
//! - [`touchstone::touchstone_1port`] and [`csv::impedance_csv`]: the model evaluated on a grid.

mod accuracy;
pub mod core;
pub mod csv;
pub mod foster;
pub mod ladder;
mod netlist;
pub mod spice;
pub mod touchstone;

use serde::{Deserialize, Serialize};

/// Where an exported model came from, written into every file's comments.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ExportContext {
    pub part_number: Option<String>,
    pub fit_id: Option<String>,
    pub revision: Option<u64>,
    /// SHA-256 (hex) of the sweep file the model was fitted to.
    pub sweep_sha256: Option<String>,
    /// The band the model is valid in (normally the sweep's first and last frequency), Hz.
    pub band_hz: [f64; 2],
}

impl ExportContext {
    /// A context with only the band of validity.
    pub fn for_band(f_min_hz: f64, f_max_hz: f64) -> Self {
        ExportContext {
            part_number: None,
            fit_id: None,
            revision: None,
            sweep_sha256: None,
            band_hz: [f_min_hz, f_max_hz],
        }
    }

    /// A context for a fit report: its band of validity (the sweep's), nothing else yet.
    pub fn for_report(report: &crate::fit::FitReport) -> Self {
        Self::for_band(report.band_hz[0], report.band_hz[1])
    }

    pub(crate) fn checked_band(&self) -> Result<[f64; 2], ExportError> {
        let [lo, hi] = self.band_hz;
        if !(lo.is_finite() && hi.is_finite() && lo > 0.0 && hi > lo) {
            return Err(ExportError::InvalidBand(format!(
                "band_hz = [{lo}, {hi}]: need 0 < f_min < f_max, both finite"
            )));
        }
        Ok([lo, hi])
    }
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ExportError {
    #[error("invalid band of validity: {0}")]
    InvalidBand(String),
    #[error("model parameter {name} = {value} is invalid: {reason}")]
    InvalidParameter {
        name: String,
        value: f64,
        reason: &'static str,
    },
    #[error("the model is not passive: {0}")]
    NotPassive(String),
    #[error(
        "the model is passive but has no series Foster realisation with positive elements: {0}"
    )]
    NotRealisable(String),
    #[error("invalid frequency grid: {0}")]
    InvalidGrid(String),
    #[error("invalid reference impedance z0_ohm = {0}: need a finite value > 0")]
    InvalidReference(f64),
    #[error(
        "the model's impedance is not finite (or is zero) at {frequency_hz} Hz: a lossless resonance \
         cannot be stated to a relative error; give the model a loss (e.g. rdc_ohm or rp_ohm)"
    )]
    NotFinite { frequency_hz: f64 },
    #[error(
        "the realised network's impedance is not finite at {frequency_hz} Hz: an element value is out \
         of floating-point range, so the netlist's error against the model cannot be stated"
    )]
    NetworkNotFinite { frequency_hz: f64 },
}

/// `n` log-spaced points from `lo` to `hi` inclusive (n ≥ 2).
pub(crate) fn log_grid(lo: f64, hi: f64, n: usize) -> Vec<f64> {
    let (a, b) = (lo.ln(), hi.ln());
    (0..n)
        .map(|i| {
            if i + 1 == n {
                hi
            } else {
                (a + (b - a) * i as f64 / (n - 1) as f64).exp()
            }
        })
        .collect()
}

/// Number of points for a verification grid: `per_decade` per decade, at least `min`, at most `max`.
pub(crate) fn grid_points(lo: f64, hi: f64, per_decade: f64, min: usize, max: usize) -> usize {
    (((hi / lo).log10() * per_decade).ceil() as usize).clamp(min, max)
}

/// The comment lines every export starts with (without the comment marker).
pub(crate) fn provenance_lines(ctx: &ExportContext) -> Vec<String> {
    let or_none = |v: &Option<String>| v.clone().unwrap_or_else(|| "(not given)".to_string());
    vec![
        format!("part: {}", or_none(&ctx.part_number)),
        format!("fit id: {}", or_none(&ctx.fit_id)),
        format!(
            "revision: {}",
            ctx.revision
                .map(|r| r.to_string())
                .unwrap_or_else(|| "(not given)".to_string())
        ),
        format!("sweep file sha256: {}", or_none(&ctx.sweep_sha256)),
        format!(
            "band of validity: {:e} Hz to {:e} Hz",
            ctx.band_hz[0], ctx.band_hz[1]
        ),
    ]
}

/// Rejects a parameter that is not finite or below its allowed minimum.
pub(crate) fn check_param(
    name: &str,
    value: f64,
    strictly_positive: bool,
) -> Result<(), ExportError> {
    let bad = |reason| {
        Err(ExportError::InvalidParameter {
            name: name.to_string(),
            value,
            reason,
        })
    };
    if !value.is_finite() {
        return bad("not a finite number");
    }
    if strictly_positive && value <= 0.0 {
        return bad("must be > 0");
    }
    if value < 0.0 {
        return bad("must be >= 0 (a negative element is not passive)");
    }
    Ok(())
}

/// Frequencies in `[lo, hi]` where Im Z changes sign (series and parallel resonances), located by
/// bisection from a 200-per-decade scan.
pub(crate) fn resonances(z: &dyn Fn(f64) -> num_complex::Complex64, lo: f64, hi: f64) -> Vec<f64> {
    let scan = log_grid(lo, hi, grid_points(lo, hi, 200.0, 200, 4000));
    let mut out = Vec::new();
    for pair in scan.windows(2) {
        let (mut a, mut b) = (pair[0], pair[1]);
        let (mut za, zb) = (z(a).im, z(b).im);
        if !(za.is_finite() && zb.is_finite()) || za.signum() == zb.signum() || za == 0.0 {
            continue;
        }
        for _ in 0..200 {
            let m = (a * b).sqrt();
            let zm = z(m).im;
            if zm.signum() == za.signum() {
                a = m;
                za = zm;
            } else {
                b = m;
            }
            if b / a - 1.0 < 1e-15 {
                break;
            }
        }
        out.push((a * b).sqrt());
    }
    out
}

/// A log grid over `[lo, hi]` with `per_decade` points, plus `per_side` points on each side of every
/// resonance, geometrically from 1e-10 to 3 % away (so a resonance of any Q is resolved), sorted.
pub(crate) fn grid_with_resonances(
    lo: f64,
    hi: f64,
    per_decade: f64,
    min: usize,
    max: usize,
    resonances_hz: &[f64],
    per_side: usize,
) -> Vec<f64> {
    let mut g = log_grid(lo, hi, grid_points(lo, hi, per_decade, min, max));
    for &fr in resonances_hz {
        g.push(fr);
        for t in log_grid(1e-10, 0.03, per_side) {
            for f in [fr * (1.0 + t), fr / (1.0 + t)] {
                if f > lo && f < hi {
                    g.push(f);
                }
            }
        }
    }
    g.sort_by(f64::total_cmp);
    g.dedup();
    g
}

/// A grid to export on: at least one point, every frequency finite and > 0, strictly increasing.
pub(crate) fn check_grid(frequencies_hz: &[f64]) -> Result<(), ExportError> {
    if frequencies_hz.is_empty() {
        return Err(ExportError::InvalidGrid("no frequencies".to_string()));
    }
    for (i, &f) in frequencies_hz.iter().enumerate() {
        if !(f.is_finite() && f > 0.0) {
            return Err(ExportError::InvalidGrid(format!(
                "frequency_hz[{i}] = {f}: need a finite value > 0"
            )));
        }
        if i > 0 && f <= frequencies_hz[i - 1] {
            return Err(ExportError::InvalidGrid(format!(
                "frequency_hz[{i}] = {f} does not exceed frequency_hz[{}] = {}",
                i - 1,
                frequencies_hz[i - 1]
            )));
        }
    }
    Ok(())
}

/// A requested grid: `points` log-spaced frequencies from `f_min_hz` to `f_max_hz` inclusive.
pub fn log_frequency_grid(
    f_min_hz: f64,
    f_max_hz: f64,
    points: usize,
) -> Result<Vec<f64>, ExportError> {
    if !(f_min_hz.is_finite() && f_max_hz.is_finite() && f_min_hz > 0.0 && f_max_hz > f_min_hz) {
        return Err(ExportError::InvalidGrid(format!(
            "[{f_min_hz}, {f_max_hz}]: need 0 < f_min < f_max, both finite"
        )));
    }
    if points < 2 {
        return Err(ExportError::InvalidGrid(format!(
            "{points} points: need at least 2"
        )));
    }
    Ok(log_grid(f_min_hz, f_max_hz, points))
}

/// The passive subcircuit of either model family: [`spice::lumped_subcircuit`] or
/// [`foster::rational_subcircuit`].
pub fn subcircuit(
    model: &crate::model::FittedModel,
    ctx: &ExportContext,
) -> Result<String, ExportError> {
    match model {
        crate::model::FittedModel::Lumped(m) => spice::lumped_subcircuit(m, ctx),
        crate::model::FittedModel::Rational(m) => foster::rational_subcircuit(m, ctx),
    }
}

/// The error a netlist states: the measured maximum with a 25 % margin for points between the check
/// grid's, plus the floating-point floor of a simulator's nodal solve. Eliminating a node next to an
/// element of small impedance z (in series, or a branch in parallel whose admittance nearly cancels
/// another's at a resonance) computes the result as a difference of admittances about |Z|/|z| times
/// larger, so about 2e-15 · max over f of |Z(f)| / min|z(f)| (z over every single element) is lost
/// however the simulator orders its elimination. `spread` is that maximum ratio. (Measured here: a 1 mH part whose ladder holds 20 µΩ
/// resistors loses 1.3e-5 at 100 MHz in both the test solver and plain nodal analysis, against an
/// estimate of 3e-6 · 4; and up to 2.4e-9 on random Foster networks with no small element, hence
/// the 1e-8.)
pub(crate) fn stated_bound(max_err: f64, spread: f64) -> f64 {
    1.25 * max_err + 2e-15 * spread + 1e-8
}
