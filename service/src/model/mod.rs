//! Circuit models as pure math: Z(f) and (in `lumped`) its analytic Jacobian.
//!
//! The lumped model, with the SI names the JSON and the database use:
//! `Z(f) = jω·ls_h + 1 / ( 1/Zw + jω·cp_f + Σ_series 1/(r + jω·l + 1/(jω·c)) ) + Σ_tank 1/(1/r + 1/(jω·l) + jω·c)`,
//! `Zw = rdc_ohm + k_ac_ohm_per_sqrt_hz·√f + Z_core`, where the core is one of
//! - lossless: `Z_core = jω·l0_h`;
//! - the single-pole core loss: `Z_core = (jω·l0_h·rp_ohm)/(jω·l0_h + rp_ohm)`;
//! - a dispersive core ([`CoreDispersion`]): `Z_core = jω·l0_h·((1 − r)·m(f) + r)`, with m the
//!   normalised complex permeability of a published dispersion law (m(0) = 1) and r the fraction of L0
//!   that does not disperse (an air path or a gap).

use num_complex::Complex64;
use serde::{Deserialize, Serialize};
use std::f64::consts::PI;

/// Anything that has an impedance at a frequency: the lumped model, the rational model, a netlist.
pub trait ImpedanceModel {
    fn impedance(&self, frequency_hz: f64) -> Complex64;
}

/// Where an extra resonant section sits.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SectionKind {
    /// A series R–L–C branch in parallel with the winding: a series resonance (|Z| notch) above SRF.
    Series,
    /// An R‖L‖C tank in series with the whole part: an extra parallel resonance (|Z| peak).
    Parallel,
}

#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Section {
    pub kind: SectionKind,
    pub r_ohm: f64,
    pub l_h: f64,
    pub c_f: f64,
}

/// A dispersion law of the core's relative permeability, normalised to its initial value:
/// m(f) = μ(f)/μ_i, with s = jf/corner_hz and x = f/corner_hz:
/// - `cole_cole`: m = 1/(1 + s^(1−α)) (Cole & Cole, J. Chem. Phys. 9, 341 (1941); α = 0 is the single
///   pole of a Debye relaxation);
/// - `havriliak_negami`: m = 1/(1 + s^(1−α))^β (Havriliak & Negami, Polymer 8, 161 (1967); β = 1 is
///   Cole–Cole);
/// - `resonance`: m = 1/(1 − x² + j·2ζ·x), a damped second-order resonance of the permeability (the form
///   of a ferrite's natural resonance; common practice, no source);
/// - `resonance_relaxation`: m = w·m_res(resonance_hz, ζ) + (1 − w)·m_cole_cole(corner_hz, α), the sum
///   of a resonant and a relaxing mechanism with shares w and 1 − w (domain-wall resonance beside spin
///   relaxation in a ferrite: the usual two-mechanism reading of a ferrite's spectrum; from memory).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum CoreLaw {
    ColeCole,
    HavriliakNegami,
    Resonance,
    ResonanceRelaxation,
}

impl CoreLaw {
    pub fn as_str(self) -> &'static str {
        match self {
            CoreLaw::ColeCole => "cole_cole",
            CoreLaw::HavriliakNegami => "havriliak_negami",
            CoreLaw::Resonance => "resonance",
            CoreLaw::ResonanceRelaxation => "resonance_relaxation",
        }
    }
}

/// A dispersive core: which law, its parameters, and the share of L0 that does not disperse.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct CoreDispersion {
    pub law: CoreLaw,
    /// The relaxation corner (Cole–Cole, Havriliak–Negami, the relaxing part of
    /// `resonance_relaxation`) or the resonance frequency (`resonance`).
    pub corner_hz: f64,
    /// Broadening, 0 ≤ α < 1 (0 for the resonance law).
    pub alpha: f64,
    /// Asymmetry, 0 < β ≤ 1 (1 for the others).
    pub beta: f64,
    /// Damping ratio ζ of the resonance (0 for the relaxation laws).
    pub damping: f64,
    /// Fraction of L0 that does not disperse, 0 ≤ r < 1.
    pub air_fraction: f64,
    /// `resonance_relaxation`: the resonant mechanism's frequency (0 for the others).
    #[serde(default)]
    pub resonance_hz: f64,
    /// `resonance_relaxation`: the resonant mechanism's share w of the initial permeability (0 for the
    /// others).
    #[serde(default)]
    pub resonance_share: f64,
}

impl CoreDispersion {
    /// m(f), the normalised complex permeability.
    pub fn permeability(&self, frequency_hz: f64) -> Complex64 {
        let x = frequency_hz / self.corner_hz;
        match self.law {
            CoreLaw::ColeCole | CoreLaw::HavriliakNegami => {
                let u = jx_pow(x, 1.0 - self.alpha);
                let one_u = Complex64::new(1.0, 0.0) + u;
                if self.law == CoreLaw::ColeCole {
                    one_u.inv()
                } else {
                    one_u.powf(-self.beta)
                }
            }
            CoreLaw::Resonance => Complex64::new(1.0 - x * x, 2.0 * self.damping * x).inv(),
            CoreLaw::ResonanceRelaxation => {
                let xr = frequency_hz / self.resonance_hz;
                let res = Complex64::new(1.0 - xr * xr, 2.0 * self.damping * xr).inv();
                let relax = (Complex64::new(1.0, 0.0) + jx_pow(x, 1.0 - self.alpha)).inv();
                self.resonance_share * res + (1.0 - self.resonance_share) * relax
            }
        }
    }
}

/// (j·x)^a for x ≥ 0: x^a·e^(jπa/2).
pub fn jx_pow(x: f64, a: f64) -> Complex64 {
    let mag = x.powf(a);
    let ph = std::f64::consts::FRAC_PI_2 * a;
    Complex64::new(mag * ph.cos(), mag * ph.sin())
}

/// The lumped inductor model. `rp_ohm = None` means no core-loss resistor (infinite); `ls_h = 0` and
/// `k_ac_ohm_per_sqrt_hz = 0` mean those elements are absent. A `core` dispersion replaces `rp_ohm`
/// (the two are never both present).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LumpedModel {
    pub l0_h: f64,
    pub rdc_ohm: f64,
    pub k_ac_ohm_per_sqrt_hz: f64,
    pub rp_ohm: Option<f64>,
    pub cp_f: f64,
    pub ls_h: f64,
    pub sections: Vec<Section>,
    /// A dispersive core; `None` for the lossless or single-pole (`rp_ohm`) core.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub core: Option<CoreDispersion>,
}

impl LumpedModel {
    /// The core's impedance jω·L0·(...) without the winding resistance.
    pub fn core_impedance(&self, frequency_hz: f64) -> Complex64 {
        let jwl0 = Complex64::new(0.0, 2.0 * PI * frequency_hz * self.l0_h);
        match (&self.core, self.rp_ohm) {
            (Some(c), _) => {
                jwl0 * ((1.0 - c.air_fraction) * c.permeability(frequency_hz) + c.air_fraction)
            }
            (None, Some(rp)) => jwl0 * rp / (jwl0 + rp),
            (None, None) => jwl0,
        }
    }
}

impl ImpedanceModel for LumpedModel {
    fn impedance(&self, frequency_hz: f64) -> Complex64 {
        let w = 2.0 * PI * frequency_hz;
        let jw = Complex64::new(0.0, w);
        let core = self.core_impedance(frequency_hz);
        let zw = self.rdc_ohm + self.k_ac_ohm_per_sqrt_hz * frequency_hz.sqrt() + core;
        let mut y = zw.inv() + jw * self.cp_f;
        let mut z_tanks = Complex64::new(0.0, 0.0);
        for s in &self.sections {
            match s.kind {
                SectionKind::Series => y += (s.r_ohm + jw * s.l_h + (jw * s.c_f).inv()).inv(),
                SectionKind::Parallel => {
                    z_tanks += (1.0 / s.r_ohm + (jw * s.l_h).inv() + jw * s.c_f).inv()
                }
            }
        }
        jw * self.ls_h + y.inv() + z_tanks
    }
}

pub mod construction;
pub mod lumped;
pub mod material;
pub mod rational;
pub use rational::RationalModel;

/// A fitted model of either family, tagged by `kind` in JSON.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum FittedModel {
    Lumped(LumpedModel),
    Rational(RationalModel),
}

impl ImpedanceModel for FittedModel {
    fn impedance(&self, frequency_hz: f64) -> Complex64 {
        match self {
            FittedModel::Lumped(m) => m.impedance(frequency_hz),
            FittedModel::Rational(m) => m.impedance(frequency_hz),
        }
    }
}
