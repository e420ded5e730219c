//! The wideband rational impedance model: `Z(s) = d_ohm + s·e_h + Σ r/(s − p)`, s = jω in rad/s.
//! Complex poles come in conjugate pairs; only the member with positive imaginary part is stored and its
//! conjugate is implied.

use super::ImpedanceModel;
use num_complex::Complex64;
use serde::{Deserialize, Serialize};
use std::f64::consts::PI;

#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct RealPole {
    pub pole_rad_per_s: f64,
    pub residue_ohm_rad_per_s: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ComplexPole {
    /// The pole with positive imaginary part; its conjugate is part of the model too.
    pub pole_rad_per_s: Complex64,
    pub residue_ohm_rad_per_s: Complex64,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RationalModel {
    pub d_ohm: f64,
    pub e_h: f64,
    pub real_poles: Vec<RealPole>,
    pub complex_poles: Vec<ComplexPole>,
}

impl ImpedanceModel for RationalModel {
    fn impedance(&self, frequency_hz: f64) -> Complex64 {
        let s = Complex64::new(0.0, 2.0 * PI * frequency_hz);
        let mut z = self.d_ohm + s * self.e_h;
        for p in &self.real_poles {
            z += p.residue_ohm_rad_per_s / (s - p.pole_rad_per_s);
        }
        for p in &self.complex_poles {
            z += p.residue_ohm_rad_per_s / (s - p.pole_rad_per_s)
                + p.residue_ohm_rad_per_s.conj() / (s - p.pole_rad_per_s.conj());
        }
        z
    }
}
