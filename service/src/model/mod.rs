//! Circuit models as pure math: Z(f) and (in `lumped`) its analytic Jacobian.
//!
//! The lumped model, with the SI names the JSON and the database use:
//! `Z(f) = jω·ls_h + 1 / ( 1/Zw + jω·cp_f + Σ_series 1/(r + jω·l + 1/(jω·c)) ) + Σ_tank 1/(1/r + 1/(jω·l) + jω·c)`,
//! `Zw = rdc_ohm + k_ac_ohm_per_sqrt_hz·√f + (jω·l0_h·rp_ohm)/(jω·l0_h + rp_ohm)`.

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

/// The lumped inductor model. `rp_ohm = None` means no core-loss resistor (infinite); `ls_h = 0` and
/// `k_ac_ohm_per_sqrt_hz = 0` mean those elements are absent.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LumpedModel {
    pub l0_h: f64,
    pub rdc_ohm: f64,
    pub k_ac_ohm_per_sqrt_hz: f64,
    pub rp_ohm: Option<f64>,
    pub cp_f: f64,
    pub ls_h: f64,
    pub sections: Vec<Section>,
}

impl ImpedanceModel for LumpedModel {
    fn impedance(&self, frequency_hz: f64) -> Complex64 {
        let w = 2.0 * PI * frequency_hz;
        let jw = Complex64::new(0.0, w);
        let jwl0 = jw * self.l0_h;
        let core = match self.rp_ohm {
            Some(rp) => jwl0 * rp / (jwl0 + rp),
            None => jwl0,
        };
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
