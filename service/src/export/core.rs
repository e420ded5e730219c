//! A dispersive core as a passive network of R, L and C.
//!
//! The core's impedance is Zc(ω) = jω·L0·(a + (1 − a)·m(ω)), with `a` the air fraction and m(ω) the
//! relative permeability law ([`crate::model::CoreDispersion::permeability`]). Each piece becomes
//! elements in series:
//!
//! - the air part: an inductor a·L0;
//! - a relaxation law (Cole–Cole, Havriliak–Negami, and the relaxing share of resonance-relaxation):
//!   both laws are superpositions of single-pole (Debye) relaxations with non-negative weights (for
//!   0 ≤ α < 1 and 0 < β ≤ 1), m(ω) = ∫ g(τ)/(1 + jωτ) dτ. On a grid of relaxation times (eight per
//!   decade, two decades beyond the band on each side, and the law's own corner) the weights w_k ≥ 0 come from non-negative least
//!   squares on the relative error of m over the band, plus one constant term w_∞ (relaxations far
//!   above the band act as plain inductance). A term jω·Lc·w/(1 + jωτ) is exactly an inductor Lc·w in
//!   parallel with a resistor Lc·w/τ, so the law becomes a chain of R‖L cells;
//! - a resonance law, m(ω) = 1/(1 − x² + j2ζx) with x = f/f0: jω·Lc·m(ω) is exactly an L‖C‖R tank
//!   with L = Lc, C = 1/((2πf0)²·Lc), R = 2πf0·Lc/(2ζ).
//!
//! The relative error of m over the band is stated; the netlist's whole-circuit error (checked against
//! the model on a dense grid) includes it.

use super::{ExportError, log_grid};
use crate::fit::linalg::nnls::nnls;
use crate::model::{CoreDispersion, CoreLaw};
use nalgebra::{DMatrix, DVector};
use num_complex::Complex64;
use std::f64::consts::PI;

/// Relaxation times per decade of the Debye grid.
const TAUS_PER_DECADE: f64 = 8.0;
/// Decades of relaxation times beyond the band on each side.
const TAU_MARGIN_DECADES: f64 = 2.0;
/// Fit points per decade of the band.
const FIT_POINTS_PER_DECADE: f64 = 40.0;

/// One element group of the realised core, in series with the others.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum CoreCell {
    /// A plain inductor.
    Inductor { l_h: f64 },
    /// An inductor in parallel with a resistor (one Debye relaxation).
    Relaxation { l_h: f64, r_ohm: f64 },
    /// An inductor, a capacitor and a resistor in parallel (the resonance law).
    Tank { l_h: f64, c_f: f64, r_ohm: f64 },
}

impl CoreCell {
    pub fn impedance(&self, frequency_hz: f64) -> Complex64 {
        let jw = Complex64::new(0.0, 2.0 * PI * frequency_hz);
        match *self {
            CoreCell::Inductor { l_h } => jw * l_h,
            CoreCell::Relaxation { l_h, r_ohm } => (jw * l_h * r_ohm) / (jw * l_h + r_ohm),
            CoreCell::Tank { l_h, c_f, r_ohm } => (1.0 / r_ohm + (jw * l_h).inv() + jw * c_f).inv(),
        }
    }
}

/// The realised core and how closely it follows the law.
#[derive(Debug, Clone, PartialEq)]
pub struct CoreNetwork {
    pub cells: Vec<CoreCell>,
    /// max |m_network − m| / |m| over the band (0 for the resonance law alone, which is exact).
    pub max_law_error_rel: f64,
    /// Debye cells used for the relaxing part (0 without one).
    pub relaxation_cells: usize,
}

impl CoreNetwork {
    pub fn impedance(&self, frequency_hz: f64) -> Complex64 {
        self.cells.iter().map(|c| c.impedance(frequency_hz)).sum()
    }
}

/// The relaxing part of a law: m for Cole–Cole / Havriliak–Negami, or the relaxation of
/// resonance-relaxation.
fn relaxation(core: &CoreDispersion, frequency_hz: f64) -> Complex64 {
    let mut c = *core;
    if c.law == CoreLaw::ResonanceRelaxation {
        c.law = CoreLaw::ColeCole;
    }
    c.permeability(frequency_hz)
}

/// Debye weights (w_k ≥ 0 on `taus`, then w_∞) that fit `target` over the band in relative terms;
/// returns the weights and the largest relative error over `check`.
fn debye_weights(
    target: &dyn Fn(f64) -> Complex64,
    taus: &[f64],
    fit: &[f64],
    check: &[f64],
) -> (Vec<f64>, f64) {
    let n = taus.len() + 1;
    let mut a = DMatrix::<f64>::zeros(2 * fit.len(), n);
    let mut b = DVector::<f64>::zeros(2 * fit.len());
    for (i, &f) in fit.iter().enumerate() {
        let w = 2.0 * PI * f;
        let t = target(f);
        let scale = 1.0 / t.norm();
        for (k, &tau) in taus.iter().enumerate() {
            let basis = Complex64::new(1.0, w * tau).inv();
            a[(2 * i, k)] = basis.re * scale;
            a[(2 * i + 1, k)] = basis.im * scale;
        }
        a[(2 * i, n - 1)] = scale;
        b[2 * i] = t.re * scale;
        b[2 * i + 1] = t.im * scale;
    }
    // Columns of comparable norm for the active-set solver.
    let norms: Vec<f64> = (0..n)
        .map(|k| a.column(k).norm().max(f64::MIN_POSITIVE))
        .collect();
    for (k, s) in norms.iter().enumerate() {
        a.column_mut(k).scale_mut(1.0 / s);
    }
    let x = nnls(a.as_slice(), a.nrows(), a.ncols(), b.as_slice());
    let weights: Vec<f64> = (0..n).map(|k| x[k] / norms[k]).collect();
    let value = |f: f64| {
        let w = 2.0 * PI * f;
        let mut m = Complex64::new(weights[n - 1], 0.0);
        for (k, &tau) in taus.iter().enumerate() {
            m += weights[k] * Complex64::new(1.0, w * tau).inv();
        }
        m
    };
    let err = check
        .iter()
        .map(|&f| (value(f) - target(f)).norm() / target(f).norm())
        .fold(0.0f64, f64::max);
    (weights, err)
}

/// Realises the core of a model with inductance `l0_h` over `band_hz`.
pub fn design_core(
    core: &CoreDispersion,
    l0_h: f64,
    band_hz: [f64; 2],
) -> Result<CoreNetwork, ExportError> {
    let [lo, hi] = band_hz;
    check_realisable(core)?;
    let mut cells = Vec::new();
    let a = core.air_fraction;
    if a > 0.0 {
        cells.push(CoreCell::Inductor { l_h: a * l0_h });
    }
    let lc = (1.0 - a) * l0_h;
    let tank = |share: f64, f0: f64, zeta: f64| -> Result<CoreCell, ExportError> {
        if !(f0.is_finite() && f0 > 0.0 && zeta.is_finite() && zeta > 0.0) {
            return Err(ExportError::NotRealisable(format!(
                "a core resonance at {f0} Hz with damping {zeta} has no passive R–L–C tank"
            )));
        }
        let l = share * lc;
        let w0 = 2.0 * PI * f0;
        Ok(CoreCell::Tank {
            l_h: l,
            c_f: 1.0 / (w0 * w0 * l),
            r_ohm: w0 * l / (2.0 * zeta),
        })
    };
    let (relax_share, resonance) = match core.law {
        CoreLaw::ColeCole | CoreLaw::HavriliakNegami => (1.0, None),
        CoreLaw::Resonance => (0.0, Some((1.0, core.corner_hz))),
        CoreLaw::ResonanceRelaxation => (
            1.0 - core.resonance_share,
            Some((core.resonance_share, core.resonance_hz)),
        ),
    };
    if let Some((share, f0)) = resonance
        && share > 0.0
    {
        cells.push(tank(share, f0, core.damping)?);
    }
    let mut max_err = 0.0;
    let mut relaxation_cells = 0;
    if relax_share > 0.0 {
        let decades = (hi / lo).log10() + 2.0 * TAU_MARGIN_DECADES;
        let n_tau = (decades * TAUS_PER_DECADE).ceil() as usize + 1;
        let f_taus = log_grid(
            lo / 10f64.powf(TAU_MARGIN_DECADES),
            hi * 10f64.powf(TAU_MARGIN_DECADES),
            n_tau,
        );
        // The law's own corner joins the grid: a narrow law (α near 0) is then followed exactly.
        let mut taus: Vec<f64> = f_taus.iter().map(|f| 1.0 / (2.0 * PI * f)).collect();
        taus.push(1.0 / (2.0 * PI * core.corner_hz));
        let n_fit = ((hi / lo).log10() * FIT_POINTS_PER_DECADE).ceil() as usize + 2;
        let fit = log_grid(lo, hi, n_fit);
        let check = log_grid(lo, hi, 4 * n_fit + 1);
        let target = |f: f64| relaxation(core, f);
        let (weights, err) = debye_weights(&target, &taus, &fit, &check);
        max_err = err;
        let total: f64 = weights.iter().sum();
        let l_relax = relax_share * lc;
        for (k, &tau) in taus.iter().enumerate() {
            let w = weights[k];
            if w > 1e-12 * total {
                let l = l_relax * w;
                cells.push(CoreCell::Relaxation {
                    l_h: l,
                    r_ohm: l / tau,
                });
                relaxation_cells += 1;
            }
        }
        let w_inf = weights[taus.len()];
        if w_inf > 1e-12 * total {
            cells.push(CoreCell::Inductor {
                l_h: l_relax * w_inf,
            });
        }
    }
    let bad = cells.iter().any(|c| match *c {
        CoreCell::Inductor { l_h } => !(l_h.is_finite() && l_h > 0.0),
        CoreCell::Relaxation { l_h, r_ohm } => {
            !(l_h.is_finite() && l_h > 0.0 && r_ohm.is_finite() && r_ohm > 0.0)
        }
        CoreCell::Tank { l_h, c_f, r_ohm } => {
            ![l_h, c_f, r_ohm].iter().all(|v| v.is_finite() && *v > 0.0)
        }
    });
    if bad || cells.is_empty() {
        return Err(ExportError::NotRealisable(format!(
            "the {} core gave no network of positive elements",
            core.law.as_str()
        )));
    }
    Ok(CoreNetwork {
        cells,
        max_law_error_rel: max_err,
        relaxation_cells,
    })
}

/// Whether the core's parameters lie in the range whose law is a passive network.
fn check_realisable(core: &CoreDispersion) -> Result<(), ExportError> {
    let finite = [
        core.corner_hz,
        core.alpha,
        core.beta,
        core.damping,
        core.air_fraction,
    ];
    if finite.iter().any(|v| !v.is_finite())
        || core.corner_hz <= 0.0
        || !(0.0..1.0).contains(&core.alpha)
        || !(core.beta > 0.0 && core.beta <= 1.0)
        || !(0.0..1.0).contains(&core.air_fraction)
    {
        return Err(ExportError::NotRealisable(format!(
            "the {} core's parameters are outside the range whose law is a passive network \
             (corner {} Hz, α {}, β {}, air fraction {})",
            core.law.as_str(),
            core.corner_hz,
            core.alpha,
            core.beta,
            core.air_fraction
        )));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::LumpedModel;

    fn core(law: CoreLaw) -> CoreDispersion {
        CoreDispersion {
            law,
            corner_hz: 2e6,
            alpha: 0.35,
            beta: if law == CoreLaw::HavriliakNegami {
                0.6
            } else {
                1.0
            },
            damping: if matches!(law, CoreLaw::Resonance | CoreLaw::ResonanceRelaxation) {
                0.4
            } else {
                0.0
            },
            air_fraction: 0.1,
            resonance_hz: if law == CoreLaw::ResonanceRelaxation {
                40e6
            } else {
                0.0
            },
            resonance_share: if law == CoreLaw::ResonanceRelaxation {
                0.3
            } else {
                0.0
            },
        }
    }

    /// The model's own core impedance, for comparison.
    fn law_z(c: &CoreDispersion, l0_h: f64, f: f64) -> Complex64 {
        LumpedModel {
            l0_h,
            rdc_ohm: 0.0,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: None,
            cp_f: 0.0,
            ls_h: 0.0,
            sections: vec![],
            core: Some(*c),
        }
        .core_impedance(f)
    }

    #[test]
    fn every_law_is_realised_within_its_stated_error_and_the_resonance_exactly() {
        let band = [1e3, 3e8];
        for law in [
            CoreLaw::ColeCole,
            CoreLaw::HavriliakNegami,
            CoreLaw::Resonance,
            CoreLaw::ResonanceRelaxation,
        ] {
            let c = core(law);
            let net = design_core(&c, 22e-6, band).unwrap();
            let mut worst = 0.0f64;
            for f in log_grid(band[0], band[1], 3001) {
                let z = law_z(&c, 22e-6, f);
                worst = worst.max((net.impedance(f) - z).norm() / z.norm());
            }
            println!(
                "{law:?}: {} cells, stated law error {:.2e}, measured {worst:.2e}",
                net.cells.len(),
                net.max_law_error_rel
            );
            if law == CoreLaw::Resonance {
                assert!(worst < 1e-12, "{law:?}: {worst:e}");
            } else {
                // The core's error relative to |Zc| is at most the law's, as the air part adds a
                // term without error (|a + (1 − a)m| ≥ … is not smaller than (1 − a)|m| here).
                assert!(worst < 1e-3, "{law:?}: {worst:e}");
                assert!(net.max_law_error_rel < 1e-3, "{law:?}");
            }
        }
    }

    #[test]
    fn a_single_pole_core_is_followed_exactly() {
        // Cole–Cole with α = 0 is L0 ‖ Rp with Rp = 2π·fc·L0: the Debye fit concentrates on it.
        let mut c = core(CoreLaw::ColeCole);
        c.alpha = 0.0;
        c.air_fraction = 0.0;
        let net = design_core(&c, 10e-6, [1e4, 1e8]).unwrap();
        assert!(net.max_law_error_rel < 1e-6, "{}", net.max_law_error_rel);
    }

    #[test]
    fn parameters_outside_the_passive_range_are_refused() {
        let mut c = core(CoreLaw::HavriliakNegami);
        c.beta = 1.5;
        assert!(design_core(&c, 1e-6, [1e3, 1e8]).is_err());
        let mut c = core(CoreLaw::Resonance);
        c.damping = 0.0;
        assert!(design_core(&c, 1e-6, [1e3, 1e8]).is_err());
    }
}
