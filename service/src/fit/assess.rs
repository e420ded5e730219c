//! Does the model describe the data within its uncertainty? The honest status of every fit.
//!
//! A fit is `ok` only when its residuals look like the measurement's noise: no larger overall, no
//! larger in any part of the band, and without structure along the frequency axis. Otherwise it is
//! `poor`, with findings that say what misses, where and by how much. The tests, on the residuals
//! r = (Z_model − Z_meas)/σ of both parts of every point:
//!
//! - **Noise scale.** The data's own scatter is measured without any model: each point is predicted
//!   from its four neighbours by the cubic through them in ln f, and the robust spread (1.4826 × the
//!   median absolute deviation) of the prediction errors, divided by the spread the stated σ implies,
//!   is the scatter ratio. When it exceeds [`SCATTER_TRUSTED_UP_TO`] the stated σ is optimistic and the
//!   tests use the measured scatter instead (a finding says so); otherwise they use the stated σ.
//! - **Overall.** χ²/s² against its expectation ν = 2N − k: poor when
//!   z = (χ²/s² − ν)/√(2ν) > [`OVERALL_Z_LIMIT`].
//! - **Bands.** The band is cut into bands of equal width in ln f (about two per decade, each of at
//!   least [`MIN_BAND_POINTS`] points); a band whose χ² exceeds its expectation by more than
//!   [`BAND_Z_LIMIT`] standard deviations is a misfit there, reported with its median relative error.
//! - **Structure.** The signs of the real and of the imaginary residuals along frequency, counted as
//!   runs (Wald–Wolfowitz runs test): far fewer runs than chance (z < −[`RUNS_Z_LIMIT`]) means the
//!   model leaves a systematic shape in the data even when the size of the misfit looks acceptable.
//!   A shape counts only while the weighted RMS is at least [`RUNS_RMS_FLOOR`] of the noise: residuals
//!   far below the noise (a noise-free synthetic sweep fitted to rounding) are within the uncertainty
//!   whatever their signs do.
//!
//! Only points whose impedance the measurement determines are judged: where σ/|Z| exceeds
//! [`DETERMINED_RELATIVE_SIGMA`] (for a network analyser, where the S-parameter lies within a tenth of
//! its distance to the pole of the method's S → Z map: the impedance is near an open or a short for
//! that method) the error of Z is skewed and heavy-tailed, not the Gaussian the tests assume; such
//! stretches are reported, not judged. A sweep with fewer than [`MIN_DETERMINED_POINTS`] such points
//! is poor: nothing vouches for the model.
//!
//! The limits are several standard deviations of each statistic under a correct model (false alarms
//! below about one fit in ten thousand per test), chosen on the fit population test
//! (`tests/fit/population.rs`) so that every fit that misses the data's best basin is caught.
//!
//! Parameter uncertainty follows the misfit: besides the usual max(1, χ²/ν) scaling of the covariance
//! (see `fit::lumped`), residuals correlated from point to point (lag-1 correlation ρ > 0) carry fewer
//! independent observations, N(1 − ρ)/(1 + ρ), so σ is widened by √((1 + ρ)/(1 − ρ)) (at most 10×);
//! [`Assessment::sigma_widening`] is that factor.

use crate::model::ImpedanceModel;
use crate::sweep::Sweep;
use num_complex::Complex64;
use serde::{Deserialize, Serialize};

/// Scatter ratios up to this are within what the estimate itself scatters: the stated σ is used.
pub const SCATTER_TRUSTED_UP_TO: f64 = 1.2;
pub const OVERALL_Z_LIMIT: f64 = 4.0;
pub const BAND_Z_LIMIT: f64 = 5.0;
pub const RUNS_Z_LIMIT: f64 = 4.5;
/// Residual shape counts only when the residuals are not far below the noise: under half of it (weighted
/// RMS relative to the noise scale) the model is within the uncertainty whatever the shape, as on a
/// noise-free synthetic sweep, where the residuals are rounding and their signs run in long stretches.
pub const RUNS_RMS_FLOOR: f64 = 0.5;
pub const MIN_BAND_POINTS: usize = 12;
/// Points with σ/|Z| above this are not judged (see the module notes).
pub const DETERMINED_RELATIVE_SIGMA: f64 = 0.1;
/// Fewest judged points for any verdict but poor.
pub const MIN_DETERMINED_POINTS: usize = 20;
/// Most the correlation widening may multiply a σ by.
pub const MAX_CORRELATION_WIDENING: f64 = 10.0;
/// The bottom of the band, for the inductance reading there: this many of the lowest points where Im Z
/// stands at least [`BOTTOM_CLEARANCE`] times clear of its σ.
pub const BOTTOM_POINTS: usize = 10;
pub const BOTTOM_CLEARANCE: f64 = 10.0;
/// The model's inductance at the bottom of the band may differ from the data's reading there by this
/// fraction (and by four standard deviations of the reading) before the fit is poor.
pub const BOTTOM_L_TOLERANCE: f64 = 0.05;
/// A constant reactance at the bottom of a reflection sweep is reported when it stands this many
/// standard deviations clear of zero.
pub const PORT_OFFSET_Z: f64 = 5.0;

#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FitStatus {
    /// The model describes the data within its uncertainty.
    #[default]
    Ok,
    /// The model misses the data; the findings say where and by how much.
    Poor,
}

impl FitStatus {
    pub fn as_str(self) -> &'static str {
        match self {
            FitStatus::Ok => "ok",
            FitStatus::Poor => "poor",
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FindingKind {
    /// The data scatter more than the stated uncertainty (informational: the tests use the scatter).
    NoisierThanStated,
    /// The residuals are larger than the noise over the whole band.
    OverallMisfit,
    /// The residuals are larger than the noise in one band.
    BandMisfit,
    /// The residuals keep their sign over long stretches.
    StructuredResiduals,
    /// A parameter ended at the edge of its plausible range.
    AtPlausibilityLimit,
    /// Part of the band where the measurement does not determine Z (σ/|Z| above 10 %): not judged.
    Undetermined,
    /// Too few points determine Z for any judgement.
    TooFewDetermined,
    /// The measurement resolves no inductive stretch: below the first point whose Im Z stands clear
    /// of its noise, Im Z is buried in noise, and that point is already capacitive. L0 then rests on
    /// the resonance and the capacitive side alone, not on inductive data.
    InductanceUnresolved,
    /// At the bottom of the band the model's inductance differs from the data's own reading there by
    /// more than [`BOTTOM_L_TOLERANCE`] and by more than that reading's own uncertainty allows
    /// ([`bottom_inductance`]).
    BottomInductance,
    /// Im Z at the bottom of a reflection sweep follows ωL + X with a constant X < 0, which no
    /// inductor's own reactance has there (informational; [`port_reactance_offset`]).
    PortReactanceOffset,
}

impl FindingKind {
    /// Whether a finding of this kind makes the fit poor (the others inform).
    pub fn makes_poor(self) -> bool {
        matches!(
            self,
            FindingKind::OverallMisfit
                | FindingKind::BandMisfit
                | FindingKind::StructuredResiduals
                | FindingKind::TooFewDetermined
                | FindingKind::InductanceUnresolved
                | FindingKind::BottomInductance
        )
    }
}

/// One thing the assessment found. Findings of kind `noisier_than_stated` do not make a fit poor.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Finding {
    pub kind: FindingKind,
    /// The part of the band concerned, when it is one part.
    pub band_hz: Option<[f64; 2]>,
    pub message: String,
}

/// The residuals of one band.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BandQuality {
    pub band_hz: [f64; 2],
    pub points: usize,
    /// √(χ²/2n) in this band with the stated σ.
    pub rms_weighted: f64,
    /// Median of |Z_model − Z_meas|/|Z_meas| in this band.
    pub median_relative_error: f64,
}

#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct Assessment {
    pub status: FitStatus,
    /// One sentence for people: what the status means for this fit.
    pub summary: String,
    pub findings: Vec<Finding>,
    /// The data's own scatter over the stated σ (1 when they agree); `None` for too few points.
    pub scatter_ratio: Option<f64>,
    /// The noise scale the tests used, in units of the stated σ.
    pub noise_scale: f64,
    /// (χ²/s² − ν)/√(2ν).
    pub overall_z: f64,
    /// Runs test z of the residual signs (negative: fewer runs than chance).
    pub runs_z: f64,
    /// Lag-1 correlation of the residuals along frequency.
    pub lag1_correlation: f64,
    /// Factor the parameter σ carry for correlated residuals (≥ 1).
    pub sigma_widening: f64,
    pub bands: Vec<BandQuality>,
}

/// Measured scatter of the data over its stated σ, from each point's deviation from the cubic (in ln f)
/// through its four neighbours; robust to the few points where the curve itself bends sharply.
pub fn scatter_ratio(frequency_hz: &[f64], z: &[Complex64], sigma: &[f64]) -> Option<f64> {
    let n = frequency_hz.len();
    if n < 12 {
        return None;
    }
    let x: Vec<f64> = frequency_hz.iter().map(|f| f.ln()).collect();
    let mut t = Vec::with_capacity(2 * (n - 4));
    for k in 2..n - 2 {
        let nb = [k - 2, k - 1, k + 1, k + 2];
        // Lagrange weights of the cubic through the neighbours, evaluated at x[k].
        let mut c = [0.0; 4];
        for (a, &i) in nb.iter().enumerate() {
            let mut w = 1.0;
            for &j in nb.iter().filter(|&&j| j != i) {
                w *= (x[k] - x[j]) / (x[i] - x[j]);
            }
            c[a] = w;
        }
        let pred: Complex64 = nb.iter().zip(&c).map(|(&i, &w)| z[i] * w).sum();
        let var = sigma[k] * sigma[k]
            + nb.iter()
                .zip(&c)
                .map(|(&i, &w)| w * w * sigma[i] * sigma[i])
                .sum::<f64>();
        if !(var.is_finite() && var > 0.0) {
            continue;
        }
        let e = (z[k] - pred) / var.sqrt();
        if e.re.is_finite() && e.im.is_finite() {
            t.push(e.re.abs());
            t.push(e.im.abs());
        }
    }
    if t.len() < 16 {
        return None;
    }
    // The middle element in total order (a selection, not a sort: the same value).
    let mid = t.len() / 2;
    let (_, median, _) = t.select_nth_unstable_by(mid, f64::total_cmp);
    // For N(0, 1), the median of |x| is 0.67449.
    Some(*median / 0.674_489_750_196_081_7)
}

/// Bands of about two per decade, equal in ln f, merged until each has `MIN_BAND_POINTS` points.
fn band_edges(frequency_hz: &[f64]) -> Vec<(usize, usize)> {
    let n = frequency_hz.len();
    let (lo, hi) = (frequency_hz[0].ln(), frequency_hz[n - 1].ln());
    let decades = (hi - lo) / std::f64::consts::LN_10;
    let count = ((2.0 * decades).round() as usize).clamp(1, 24);
    let mut raw = Vec::with_capacity(count);
    let mut start = 0;
    for b in 1..=count {
        let edge = lo + (hi - lo) * b as f64 / count as f64;
        let end = if b == count {
            n
        } else {
            frequency_hz.partition_point(|f| f.ln() < edge)
        };
        if end > start {
            raw.push((start, end));
            start = end;
        }
    }
    // Merge small bands into the next one (the last into the previous one).
    let mut out: Vec<(usize, usize)> = Vec::new();
    let mut pending: Option<(usize, usize)> = None;
    for (a, b) in raw {
        let (a, b) = match pending.take() {
            Some((pa, _)) => (pa, b),
            None => (a, b),
        };
        if b - a < MIN_BAND_POINTS {
            pending = Some((a, b));
        } else {
            out.push((a, b));
        }
    }
    if let Some((a, b)) = pending {
        match out.last_mut() {
            Some(last) => last.1 = b,
            None => out.push((a, b)),
        }
    }
    out
}

/// Wald–Wolfowitz runs test z for a sequence of signs.
fn runs_z(signs: &[bool]) -> Option<f64> {
    let n1 = signs.iter().filter(|&&s| s).count() as f64;
    let n2 = signs.len() as f64 - n1;
    if n1 < 1.0 || n2 < 1.0 {
        // All one sign: as structured as a sequence can be.
        return if signs.len() >= 20 {
            Some(-(signs.len() as f64).sqrt())
        } else {
            None
        };
    }
    let n = n1 + n2;
    let runs = 1 + signs.windows(2).filter(|w| w[0] != w[1]).count();
    let mean = 2.0 * n1 * n2 / n + 1.0;
    let var = 2.0 * n1 * n2 * (2.0 * n1 * n2 - n) / (n * n * (n - 1.0));
    if var <= 0.0 {
        return None;
    }
    Some((runs as f64 - mean) / var.sqrt())
}

/// A frequency with an SI prefix for people, e.g. "12.5 MHz".
pub(crate) fn engineering(f: f64) -> String {
    let (v, p) = match f {
        f if f >= 1e9 => (f / 1e9, "GHz"),
        f if f >= 1e6 => (f / 1e6, "MHz"),
        f if f >= 1e3 => (f / 1e3, "kHz"),
        f => (f, "Hz"),
    };
    let digits = if v >= 100.0 {
        0
    } else if v >= 10.0 {
        1
    } else {
        2
    };
    format!("{v:.digits$} {p}")
}

/// Judges `model` against `sweep` with `parameters` fitted parameters.
pub fn assess(model: &dyn ImpedanceModel, sweep: &Sweep, parameters: usize) -> Assessment {
    let n_all = sweep.frequency_hz.len();
    // Judged by the model's |Z|, not the measured one: a noisy point whose |Z| the noise inflated
    // would otherwise pass more easily than one it deflated.
    let mut judged_mask: Vec<bool> = (0..n_all)
        .map(|k| {
            let z = model.impedance(sweep.frequency_hz[k]).norm();
            sweep.sigma_ohm[k] <= DETERMINED_RELATIVE_SIGMA * z
        })
        .collect();
    // Islands of fewer than MIN_BAND_POINTS judged points between undetermined stretches are not
    // judged either: they are where the noise happened to be small.
    let mut k = 0;
    while k < n_all {
        if judged_mask[k] {
            let start = k;
            while k < n_all && judged_mask[k] {
                k += 1;
            }
            let bounded = start > 0 && k < n_all;
            if bounded && k - start < MIN_BAND_POINTS {
                judged_mask[start..k].fill(false);
            }
        } else {
            k += 1;
        }
    }
    let determined: Vec<usize> = (0..n_all).filter(|&k| judged_mask[k]).collect();
    let mut undetermined_findings = Vec::new();
    for (a, b) in stretches(n_all, &determined) {
        undetermined_findings.push(Finding {
            kind: FindingKind::Undetermined,
            band_hz: Some([sweep.frequency_hz[a], sweep.frequency_hz[b]]),
            message: format!(
                "from {} to {} ({} points) the measurement does not determine Z to within {:.0} % \
                 (the part is near an open or a short for this method); not judged",
                engineering(sweep.frequency_hz[a]),
                engineering(sweep.frequency_hz[b]),
                b - a + 1,
                100.0 * DETERMINED_RELATIVE_SIGMA
            ),
        });
    }
    if determined.len() < MIN_DETERMINED_POINTS {
        let mut findings = undetermined_findings;
        findings.push(Finding {
            kind: FindingKind::TooFewDetermined,
            band_hz: None,
            message: format!(
                "only {} of {n_all} points determine Z to within {:.0} %: too few to judge the model",
                determined.len(),
                100.0 * DETERMINED_RELATIVE_SIGMA
            ),
        });
        return Assessment {
            status: FitStatus::Poor,
            summary: format!(
                "the model cannot be vouched for: only {} of {n_all} points determine Z",
                determined.len()
            ),
            findings,
            noise_scale: 1.0,
            sigma_widening: 1.0,
            ..Assessment::default()
        };
    }
    let pick = |v: &[f64]| determined.iter().map(|&k| v[k]).collect::<Vec<f64>>();
    let judged = Sweep {
        frequency_hz: pick(&sweep.frequency_hz),
        impedance_ohm: determined.iter().map(|&k| sweep.impedance_ohm[k]).collect(),
        sigma_ohm: pick(&sweep.sigma_ohm),
        method: sweep.method,
        z0_ohm: sweep.z0_ohm,
        dc_reading: None,
        warnings: Vec::new(),
    };
    let mut out = assess_determined(model, &judged, parameters);
    let mut findings = undetermined_findings;
    findings.append(&mut out.findings);
    out.findings = findings;
    if let Some(offset) = port_reactance_offset(sweep) {
        out.add_finding(offset.finding());
    }
    if let Some(bottom) = bottom_inductance(model, sweep, out.noise_scale)
        && bottom.misses()
    {
        out.add_finding(bottom.finding());
    }
    out
}

/// The inductance Im Z/ω at the bottom of the band, as the data read it and as the model does, at the
/// same points: the [`BOTTOM_POINTS`] lowest where the model's Im Z stands [`BOTTOM_CLEARANCE`] times
/// clear of σ, below the first point that is as clearly capacitive.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BottomReading {
    pub band_hz: [f64; 2],
    pub points: usize,
    /// Median of the measured Im Z/ω over the points.
    pub data_h: f64,
    /// Median of the model's Im Z/ω over the same points.
    pub model_h: f64,
    /// Standard uncertainty of `data_h` relative to it (the median of n points: 1.2533·σ/√n, with
    /// each point's relative σ, σ over the model's Im Z there, scaled by the noise scale).
    pub data_sigma_relative: f64,
}

impl BottomReading {
    /// model/data − 1.
    pub fn deviation(&self) -> f64 {
        self.model_h / self.data_h - 1.0
    }

    /// More than [`BOTTOM_L_TOLERANCE`] off and more than four standard deviations of the reading.
    pub fn misses(&self) -> bool {
        let d = self.deviation().abs();
        d > BOTTOM_L_TOLERANCE && d > 4.0 * self.data_sigma_relative
    }

    fn finding(&self) -> Finding {
        Finding {
            kind: FindingKind::BottomInductance,
            band_hz: Some(self.band_hz),
            message: format!(
                "at the bottom of the band ({} to {}, the {} lowest points where the model's Im Z \
                 stands ten σ clear of the noise) the model's inductance is {}, {:+.1} % from the \
                 data's own reading of {} there (± {:.1} %)",
                engineering(self.band_hz[0]),
                engineering(self.band_hz[1]),
                self.points,
                crate::units::eng(self.model_h, "H"),
                100.0 * self.deviation(),
                crate::units::eng(self.data_h, "H"),
                100.0 * self.data_sigma_relative
            ),
        }
    }
}

/// The indices of the bottom points of [`BottomReading`], ascending; fewer than five: none. Points
/// are chosen by the reactance `reactance(k)` stands clear of σ: for a reading of the data, the model's
/// (picking by the measured Im Z would favour points whose noise happened to raise it, and bias the
/// reading up where Im Z rises through the threshold).
fn bottom_points(sweep: &Sweep, reactance: impl Fn(usize) -> f64) -> Vec<usize> {
    let mut picked = Vec::with_capacity(BOTTOM_POINTS);
    for k in 0..sweep.frequency_hz.len() {
        let x = reactance(k) / sweep.sigma_ohm[k];
        if x > BOTTOM_CLEARANCE {
            picked.push(k);
            if picked.len() == BOTTOM_POINTS {
                break;
            }
        } else if x < -BOTTOM_CLEARANCE && !picked.is_empty() {
            break;
        }
    }
    if picked.len() < 5 { Vec::new() } else { picked }
}

/// The data's and the model's inductance at the bottom of the band ([`BottomReading`]); `None` when
/// fewer than five points there stand clear of their noise.
pub fn bottom_inductance(
    model: &dyn ImpedanceModel,
    sweep: &Sweep,
    noise_scale: f64,
) -> Option<BottomReading> {
    let picked = bottom_points(sweep, |k| model.impedance(sweep.frequency_hz[k]).im);
    if picked.is_empty() {
        return None;
    }
    let omega = |k: usize| 2.0 * std::f64::consts::PI * sweep.frequency_hz[k];
    let model_im: Vec<f64> = picked
        .iter()
        .map(|&k| model.impedance(sweep.frequency_hz[k]).im)
        .collect();
    let data_h = median(
        picked
            .iter()
            .map(|&k| sweep.impedance_ohm[k].im / omega(k))
            .collect(),
    );
    let model_h = median(
        picked
            .iter()
            .zip(&model_im)
            .map(|(&k, im)| im / omega(k))
            .collect(),
    );
    let n = picked.len() as f64;
    let mean_sq: f64 = picked
        .iter()
        .zip(&model_im)
        .map(|(&k, im)| (sweep.sigma_ohm[k] / im).powi(2))
        .sum::<f64>()
        / n;
    Some(BottomReading {
        band_hz: [
            sweep.frequency_hz[picked[0]],
            sweep.frequency_hz[picked[picked.len() - 1]],
        ],
        points: picked.len(),
        data_h,
        model_h,
        data_sigma_relative: 1.2533 * noise_scale.max(1.0) * (mean_sq / n).sqrt(),
    })
}

/// A constant reactance at the bottom of a reflection sweep: Im Z = ωL + X fitted (weighted by σ) to
/// every point from the lowest up to the last bottom point ([`bottom_points`]) while |Z| stays below a
/// fifth of the reference impedance, where a reflection port's phase error φ reads as the constant
/// series reactance X ≈ −Z0·φ/2. Reported when X < 0 stands [`PORT_OFFSET_Z`] standard deviations
/// (widened by the fit's own misfit) clear of zero and shifts the inductance read at the bottom by
/// more than 1 %.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PortOffset {
    pub band_hz: [f64; 2],
    pub points: usize,
    pub reactance_ohm: f64,
    pub sigma_ohm: f64,
    /// The slope L of the same fit.
    pub inductance_h: f64,
    pub z0_ohm: f64,
}

impl PortOffset {
    fn finding(&self) -> Finding {
        Finding {
            kind: FindingKind::PortReactanceOffset,
            band_hz: Some(self.band_hz),
            message: format!(
                "from {} to {} ({} points) Im Z follows ωL + X with L = {} and a constant X = \
                 {:.3} ± {:.3} Ω, which no inductor's own reactance has there. At a reflection \
                 port a calibration phase error of about {:.2}° near a short reads so, and would \
                 make the inductance read there low by up to |X|/ω: check the calibration at the \
                 bottom of the band",
                engineering(self.band_hz[0]),
                engineering(self.band_hz[1]),
                self.points,
                crate::units::eng(self.inductance_h, "H"),
                self.reactance_ohm,
                self.sigma_ohm,
                (-2.0 * self.reactance_ohm / self.z0_ohm).to_degrees()
            ),
        }
    }
}

/// [`PortOffset`] for a reflection sweep, when there is one.
pub fn port_reactance_offset(sweep: &Sweep) -> Option<PortOffset> {
    if sweep.method != crate::sweep::Method::Reflection {
        return None;
    }
    let last = *bottom_points(sweep, |k| sweep.impedance_ohm[k].im).last()?;
    let series_limit = sweep.z0_ohm / 5.0;
    let end = (0..=last)
        .find(|&k| sweep.impedance_ohm[k].norm() > series_limit)
        .unwrap_or(last + 1);
    if end < 5 || sweep.frequency_hz[end - 1] < 3.0 * sweep.frequency_hz[0] {
        return None;
    }
    // Weighted least squares on (ω/ω_top, 1): well scaled whatever the band.
    let w_top = sweep.frequency_hz[end - 1];
    let (mut a11, mut a12, mut a22, mut b1, mut b2) = (0.0, 0.0, 0.0, 0.0, 0.0);
    for k in 0..end {
        let u = sweep.frequency_hz[k] / w_top;
        let q = sweep.sigma_ohm[k].powi(-2);
        let y = sweep.impedance_ohm[k].im;
        a11 += q * u * u;
        a12 += q * u;
        a22 += q;
        b1 += q * u * y;
        b2 += q * y;
    }
    let det = a11 * a22 - a12 * a12;
    if det.is_nan() || det <= 0.0 {
        return None;
    }
    let slope = (a22 * b1 - a12 * b2) / det;
    let x = (a11 * b2 - a12 * b1) / det;
    let chi2: f64 = (0..end)
        .map(|k| {
            let u = sweep.frequency_hz[k] / w_top;
            ((sweep.impedance_ohm[k].im - slope * u - x) / sweep.sigma_ohm[k]).powi(2)
        })
        .sum();
    let reduced = chi2 / (end as f64 - 2.0);
    let sigma = (a11 / det * reduced.max(1.0)).sqrt();
    let inductance_h = slope / (2.0 * std::f64::consts::PI * w_top);
    let w_bottom = 2.0 * std::f64::consts::PI * sweep.frequency_hz[last];
    let shift = -x / (w_bottom * inductance_h);
    (x < -PORT_OFFSET_Z * sigma && inductance_h > 0.0 && shift > 0.01).then_some(PortOffset {
        band_hz: [sweep.frequency_hz[0], sweep.frequency_hz[end - 1]],
        points: end,
        reactance_ohm: x,
        sigma_ohm: sigma,
        inductance_h,
        z0_ohm: sweep.z0_ohm,
    })
}

/// The maximal runs of indices in 0..n missing from the sorted `kept`, as (first, last).
fn stretches(n: usize, kept: &[usize]) -> Vec<(usize, usize)> {
    let mut out = Vec::new();
    let mut next = 0;
    for &k in kept.iter().chain(std::iter::once(&n)) {
        if k > next {
            out.push((next, k - 1));
        }
        next = k + 1;
    }
    out
}

fn assess_determined(model: &dyn ImpedanceModel, sweep: &Sweep, parameters: usize) -> Assessment {
    let f = &sweep.frequency_hz;
    let n = f.len();
    let (r, rel) = residuals(model, sweep);
    let scatter = scatter_ratio(f, &sweep.impedance_ohm, &sweep.sigma_ohm);
    let mut findings = Vec::new();
    let noise_scale = match scatter {
        Some(s) if s > SCATTER_TRUSTED_UP_TO => {
            findings.push(Finding {
                kind: FindingKind::NoisierThanStated,
                band_hz: None,
                message: format!(
                    "the data scatter {s:.2}× more than the stated uncertainty; the model is judged \
                     against the measured scatter"
                ),
            });
            s
        }
        _ => 1.0,
    };
    let s2 = noise_scale * noise_scale;
    let chi2: f64 = r.iter().map(|x| x.norm_sqr()).sum();
    let nu = ((2 * n) as f64 - parameters as f64).max(1.0);
    let overall_z = (chi2 / s2 - nu) / (2.0 * nu).sqrt();
    let rms = (chi2 / (2 * n) as f64).sqrt();
    if overall_z > OVERALL_Z_LIMIT {
        findings.push(Finding {
            kind: FindingKind::OverallMisfit,
            band_hz: None,
            message: format!(
                "over the whole band the model misses the data by {:.2}× the noise (weighted RMS \
                 {rms:.3}); median error {:.2} % of |Z|",
                rms / noise_scale,
                100.0 * median(rel.clone())
            ),
        });
    }
    let (bands, worst) = band_qualities(f, &r, &rel, s2);
    if let Some(i) = worst {
        findings.push(band_misfit(&bands, i, s2, noise_scale));
    }
    let (runs, structured) = runs_test(f, &r, rms / noise_scale);
    findings.extend(structured);

    let lag1 = lag1_correlation(&r);
    let sigma_widening = if lag1 > 3.0 / (n as f64).sqrt() {
        ((1.0 + lag1) / (1.0 - lag1).max(1e-6))
            .sqrt()
            .min(MAX_CORRELATION_WIDENING)
    } else {
        1.0
    };
    let poor = findings.iter().any(|x| x.kind.makes_poor());
    let summary = summary(&findings, poor, noise_scale);
    Assessment {
        status: if poor { FitStatus::Poor } else { FitStatus::Ok },
        summary,
        findings,
        scatter_ratio: scatter,
        noise_scale,
        overall_z,
        runs_z: runs,
        lag1_correlation: lag1,
        sigma_widening,
        bands,
    }
}

/// The residual of each point in units of its σ, (Z_model − Z_meas)/σ, and its relative error
/// |Z_model − Z_meas|/|Z_meas|.
fn residuals(model: &dyn ImpedanceModel, sweep: &Sweep) -> (Vec<Complex64>, Vec<f64>) {
    let n = sweep.frequency_hz.len();
    let mut r = Vec::with_capacity(n);
    let mut rel = Vec::with_capacity(n);
    for ((&fk, &zk), &sk) in sweep
        .frequency_hz
        .iter()
        .zip(&sweep.impedance_ohm)
        .zip(&sweep.sigma_ohm)
    {
        let d = model.impedance(fk) - zk;
        r.push(d / sk);
        rel.push(d.norm() / zk.norm());
    }
    (r, rel)
}

/// The quality of each band, and the index of the one that misses the data most when any misses
/// by more than [`BAND_Z_LIMIT`].
fn band_qualities(
    f: &[f64],
    r: &[Complex64],
    rel: &[f64],
    s2: f64,
) -> (Vec<BandQuality>, Option<usize>) {
    let mut bands = Vec::new();
    let mut worst: Option<(f64, usize)> = None;
    for (a, b) in band_edges(f) {
        let m = b - a;
        let c: f64 = r[a..b].iter().map(|x| x.norm_sqr()).sum();
        let z = (c / s2 - 2.0 * m as f64) / (4.0 * m as f64).sqrt();
        bands.push(BandQuality {
            band_hz: [f[a], f[b - 1]],
            points: m,
            rms_weighted: (c / (2 * m) as f64).sqrt(),
            median_relative_error: median(rel[a..b].to_vec()),
        });
        if z > BAND_Z_LIMIT && worst.is_none_or(|(wz, _)| z > wz) {
            worst = Some((z, bands.len() - 1));
        }
    }
    (bands, worst.map(|(_, i)| i))
}

/// The finding for the worst band `i`, with a count of the other bands that miss too.
fn band_misfit(bands: &[BandQuality], i: usize, s2: f64, noise_scale: f64) -> Finding {
    let bq = &bands[i];
    let others = bands
        .iter()
        .enumerate()
        .filter(|(j, b)| {
            *j != i && {
                let c = b.rms_weighted * b.rms_weighted * (2 * b.points) as f64;
                (c / s2 - 2.0 * b.points as f64) / (4.0 * b.points as f64).sqrt() > BAND_Z_LIMIT
            }
        })
        .count();
    Finding {
        kind: FindingKind::BandMisfit,
        band_hz: Some(bq.band_hz),
        message: format!(
            "between {} and {} the model misses the data by {:.2}× the noise (median error \
             {:.2} % of |Z|){}",
            engineering(bq.band_hz[0]),
            engineering(bq.band_hz[1]),
            bq.rms_weighted / noise_scale,
            100.0 * bq.median_relative_error,
            match others {
                0 => String::new(),
                1 => "; one other band misses too".into(),
                k => format!("; {k} other bands miss too"),
            }
        ),
    }
}

/// The runs test z of the residual signs (real and imaginary parts combined), and a finding when
/// they keep their sign too long while the residuals (`rms_in_noise`, the weighted RMS over the
/// noise scale) are not far below the noise.
fn runs_test(f: &[f64], r: &[Complex64], rms_in_noise: f64) -> (f64, Option<Finding>) {
    let re: Vec<bool> = r.iter().map(|x| x.re > 0.0).collect();
    let im: Vec<bool> = r.iter().map(|x| x.im > 0.0).collect();
    let runs = match (runs_z(&re), runs_z(&im)) {
        (Some(a), Some(b)) => (a + b) / 2f64.sqrt(),
        (Some(a), None) | (None, Some(a)) => a,
        (None, None) => 0.0,
    };
    if !(runs < -RUNS_Z_LIMIT && rms_in_noise >= RUNS_RMS_FLOOR) {
        return (runs, None);
    }
    let longest = longest_run(&re).max(longest_run(&im));
    let finding = Finding {
        kind: FindingKind::StructuredResiduals,
        band_hz: Some([f[longest.1], f[longest.2]]),
        message: format!(
            "the residuals keep their sign over long stretches (runs test z = {runs:.1}; the \
             longest, {} points, from {} to {}): the model leaves a systematic shape in the data",
            longest.0,
            engineering(f[longest.1]),
            engineering(f[longest.2])
        ),
    };
    (runs, Some(finding))
}

impl Assessment {
    /// Adds a finding; one that makes a fit poor makes this one poor, and the summary follows.
    pub fn add_finding(&mut self, finding: Finding) {
        let poor = finding.kind.makes_poor();
        self.findings.push(finding);
        if poor {
            self.status = FitStatus::Poor;
            self.summary = summary(&self.findings, true, self.noise_scale);
        }
    }
}

/// The one sentence for people: the main miss when the fit is poor, else which noise the model
/// is within.
fn summary(findings: &[Finding], poor: bool, noise_scale: f64) -> String {
    if poor {
        let worst_message = findings
            .iter()
            .find(|x| x.kind == FindingKind::InductanceUnresolved)
            .or_else(|| findings.iter().find(|x| x.kind == FindingKind::BandMisfit))
            .or_else(|| findings.iter().find(|x| x.kind.makes_poor()))
            .map(|x| x.message.clone())
            .unwrap_or_default();
        format!("the model does not describe the data within its uncertainty: {worst_message}")
    } else if noise_scale > 1.0 {
        format!(
            "the model describes the data within their measured scatter ({noise_scale:.2}× the \
             stated uncertainty)"
        )
    } else {
        "the model describes the data within their stated uncertainty".into()
    }
}

fn median(mut v: Vec<f64>) -> f64 {
    v.retain(|x| x.is_finite());
    if v.is_empty() {
        return f64::NAN;
    }
    let mid = v.len() / 2;
    *v.select_nth_unstable_by(mid, f64::total_cmp).1
}

/// (length, first index, last index) of the longest run of equal signs.
fn longest_run(signs: &[bool]) -> (usize, usize, usize) {
    let mut best = (0, 0, 0);
    let mut start = 0;
    for k in 1..=signs.len() {
        if k == signs.len() || signs[k] != signs[start] {
            if k - start > best.0 {
                best = (k - start, start, k - 1);
            }
            start = k;
        }
    }
    best
}

/// Lag-1 correlation of the residuals, real and imaginary parts pooled.
fn lag1_correlation(r: &[Complex64]) -> f64 {
    if r.len() < 3 {
        return 0.0;
    }
    let (mut num, mut den) = (0.0, 0.0);
    for w in r.windows(2) {
        num += w[0].re * w[1].re + w[0].im * w[1].im;
    }
    for x in r {
        den += x.norm_sqr();
    }
    if den > 0.0 { num / den } else { 0.0 }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::LumpedModel;
    use crate::sweep::Method;

    fn rng(seed: u64) -> impl FnMut() -> f64 {
        let mut s = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
        let mut u = move || {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            (s >> 11) as f64 / (1u64 << 53) as f64
        };
        move || {
            let (a, b) = (u().max(1e-300), u());
            (-2.0 * a.ln()).sqrt() * (2.0 * std::f64::consts::PI * b).cos()
        }
    }

    fn choke() -> LumpedModel {
        LumpedModel {
            l0_h: 10e-6,
            rdc_ohm: 0.05,
            k_ac_ohm_per_sqrt_hz: 1e-4,
            rp_ohm: Some(30e3),
            cp_f: 4e-12,
            ls_h: 1e-9,
            sections: vec![],
            core: None,
        }
    }

    fn sweep_of(model: &LumpedModel, n: usize, noise: f64, seed: u64) -> Sweep {
        let mut g = rng(seed);
        let f: Vec<f64> = (0..n)
            .map(|i| 1e3 * (3e8f64 / 1e3).powf(i as f64 / (n - 1) as f64))
            .collect();
        let mut z = Vec::new();
        let mut s = Vec::new();
        for &x in &f {
            let z0 = model.impedance(x);
            let sigma = 2e-3 * z0.norm();
            z.push(z0 + noise * sigma * Complex64::new(g(), g()));
            s.push(sigma);
        }
        Sweep {
            frequency_hz: f,
            impedance_ohm: z,
            sigma_ohm: s,
            method: Method::Direct,
            z0_ohm: 50.0,
            dc_reading: None,
            warnings: Vec::new(),
        }
    }

    #[test]
    fn the_true_model_is_ok_and_the_scatter_matches() {
        for seed in 1..6 {
            let sweep = sweep_of(&choke(), 801, 1.0, seed);
            let a = assess(&choke(), &sweep, 6);
            assert_eq!(a.status, FitStatus::Ok, "{a:#?}");
            let s = a.scatter_ratio.unwrap();
            assert!((s - 1.0).abs() < 0.1, "{s}");
            assert_eq!(a.sigma_widening, 1.0);
        }
    }

    #[test]
    fn noisier_data_than_stated_are_judged_against_their_scatter() {
        let sweep = sweep_of(&choke(), 801, 3.0, 9);
        let a = assess(&choke(), &sweep, 6);
        assert_eq!(a.status, FitStatus::Ok, "{a:#?}");
        assert!((a.noise_scale - 3.0).abs() < 0.3, "{}", a.noise_scale);
        assert_eq!(a.findings[0].kind, FindingKind::NoisierThanStated);
    }

    #[test]
    fn a_model_off_by_two_percent_in_one_element_is_poor_and_says_where() {
        let sweep = sweep_of(&choke(), 801, 1.0, 3);
        let mut off = choke();
        off.cp_f *= 1.02;
        let a = assess(&off, &sweep, 6);
        assert_eq!(a.status, FitStatus::Poor, "{a:#?}");
        let band = a
            .findings
            .iter()
            .find(|x| x.kind == FindingKind::BandMisfit)
            .expect("a band misfit");
        // The SRF of 10 µH with 4 pF is 25.2 MHz (Thomson); a wrong Cp misses near it.
        let [lo, hi] = band.band_hz.unwrap();
        assert!(lo < 40e6 && hi > 15e6, "{lo} {hi}");
        assert!(a.summary.contains("MHz"), "{}", a.summary);
        assert!(a.sigma_widening > 1.5, "{}", a.sigma_widening);
    }

    #[test]
    fn the_inductance_at_the_bottom_is_read_and_a_miss_there_is_poor() {
        let sweep = sweep_of(&choke(), 801, 1.0, 4);
        let true_reading = bottom_inductance(&choke(), &sweep, 1.0).expect("a bottom reading");
        assert_eq!(true_reading.points, BOTTOM_POINTS);
        // The choke's L0 + ls (10.001 µH) is what Im Z/ω reads far below its 25 MHz SRF.
        assert!(
            (true_reading.data_h / 10.001e-6 - 1.0).abs() < 0.01,
            "{true_reading:?}"
        );
        assert!(!true_reading.misses(), "{true_reading:?}");
        let a = assess(&choke(), &sweep, 6);
        assert!(
            a.findings
                .iter()
                .all(|x| x.kind != FindingKind::BottomInductance)
        );

        let mut off = choke();
        off.l0_h *= 1.07;
        let a = assess(&off, &sweep, 6);
        assert_eq!(a.status, FitStatus::Poor);
        let finding = a
            .findings
            .iter()
            .find(|x| x.kind == FindingKind::BottomInductance)
            .expect("the bottom miss is named");
        let d = bottom_inductance(&off, &sweep, 1.0).unwrap().deviation();
        assert!((d - 0.07).abs() < 0.005, "{d}");
        assert!(
            finding.message.contains(&format!("{:+.1} %", 100.0 * d)),
            "{}",
            finding.message
        );
        let [lo, hi] = finding.band_hz.unwrap();
        assert!(lo == sweep.frequency_hz[0] && hi < 2e3, "{lo} {hi}");
    }

    fn small_toroid() -> LumpedModel {
        LumpedModel {
            l0_h: 1.3e-6,
            rdc_ohm: 0.02,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: None,
            cp_f: 2e-12,
            ls_h: 0.0,
            sections: vec![],
            core: None,
        }
    }

    /// A reflection sweep of an inductor measured through a port whose calibration leaves a phase
    /// error φ: Γ_measured = Γ·e^{jφ}, with Z = Z0(1 + Γ)/(1 − Γ) (the bilinear map of any
    /// reflection measurement; common practice, no source). Near a short it reads as the constant
    /// series reactance −Z0·φ/2.
    fn reflection_sweep(phase_rad: f64) -> Sweep {
        use crate::sweep::convert::{s_from_z, z_from_s};
        let part = small_toroid();
        let noise = crate::sweep::uncertainty::NoiseModel::default();
        let mut g = rng(11);
        let f: Vec<f64> = (0..1000).map(|i| 50e3 + 100e3 * i as f64).collect();
        let mut z = Vec::new();
        let mut sigma = Vec::new();
        for &x in &f {
            let s = s_from_z(Method::Reflection, part.impedance(x), 50.0)
                * Complex64::from_polar(1.0, phase_rad);
            let zm = z_from_s(Method::Reflection, s, 50.0);
            let sk = noise.sigma_from_s(Method::Reflection, s, zm, 50.0);
            z.push(zm + sk * Complex64::new(g(), g()));
            sigma.push(sk);
        }
        Sweep {
            frequency_hz: f,
            impedance_ohm: z,
            sigma_ohm: sigma,
            method: Method::Reflection,
            z0_ohm: 50.0,
            dc_reading: None,
            warnings: Vec::new(),
        }
    }

    #[test]
    fn a_reflection_phase_error_reads_as_a_constant_reactance_at_the_bottom() {
        assert_eq!(port_reactance_offset(&reflection_sweep(0.0)), None);
        let phase = 0.6f64.to_radians();
        let sweep = reflection_sweep(phase);
        let offset = port_reactance_offset(&sweep).expect("the offset is found");
        let expected = -50.0 * phase / 2.0;
        assert!(
            (offset.reactance_ohm - expected).abs() < 4.0 * offset.sigma_ohm,
            "{offset:?} against {expected}"
        );
        assert!(
            (offset.inductance_h / 1.3e-6 - 1.0).abs() < 0.03,
            "{offset:?}"
        );
        // The same numbers as a direct impedance measurement: not a port's doing, not reported.
        let direct = Sweep {
            method: Method::Direct,
            ..sweep.clone()
        };
        assert_eq!(port_reactance_offset(&direct), None);
        // Informational: it names the calibration, and does not by itself make a fit poor.
        let a = assess(&small_toroid(), &sweep, 4);
        let finding = a
            .findings
            .iter()
            .find(|x| x.kind == FindingKind::PortReactanceOffset)
            .expect("reported");
        assert!(!finding.kind.makes_poor());
        assert!(
            finding.message.contains("calibration"),
            "{}",
            finding.message
        );
    }

    #[test]
    fn runs_count_structure_not_size() {
        // Alternating signs: more runs than chance; a block of one sign: far fewer.
        let alt: Vec<bool> = (0..200).map(|k| k % 2 == 0).collect();
        assert!(runs_z(&alt).unwrap() > 10.0);
        let block: Vec<bool> = (0..200).map(|k| k < 100).collect();
        assert!(runs_z(&block).unwrap() < -10.0);
    }

    #[test]
    fn bands_cover_the_sweep_and_hold_enough_points() {
        let f: Vec<f64> = (0..500).map(|i| 20.0 + 40e3 * i as f64).collect();
        let edges = band_edges(&f);
        assert_eq!(edges.first().unwrap().0, 0);
        assert_eq!(edges.last().unwrap().1, 500);
        for w in edges.windows(2) {
            assert_eq!(w[0].1, w[1].0);
        }
        assert!(edges.iter().all(|(a, b)| b - a >= MIN_BAND_POINTS));
    }
}
