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

impl RationalModel {
    /// Z(0) = d − Σ r/p (conjugates included): the DC resistance of the model.
    pub fn dc_resistance_ohm(&self) -> f64 {
        let mut z = self.d_ohm;
        for p in &self.real_poles {
            z -= p.residue_ohm_rad_per_s / p.pole_rad_per_s;
        }
        for p in &self.complex_poles {
            z -= 2.0 * (p.residue_ohm_rad_per_s / p.pole_rad_per_s).re;
        }
        z
    }

    /// dZ/ds at s = 0, i.e. e − Σ r/p² (conjugates included): the low-frequency inductance of the model.
    pub fn dc_inductance_h(&self) -> f64 {
        let mut l = self.e_h;
        for p in &self.real_poles {
            l -= p.residue_ohm_rad_per_s / (p.pole_rad_per_s * p.pole_rad_per_s);
        }
        for p in &self.complex_poles {
            l -= 2.0 * (p.residue_ohm_rad_per_s / (p.pole_rad_per_s * p.pole_rad_per_s)).re;
        }
        l
    }

    /// Number of poles (a complex pair counts two).
    pub fn order(&self) -> usize {
        self.real_poles.len() + 2 * self.complex_poles.len()
    }
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dc_resistance_and_inductance_of_a_series_rl_in_parallel_with_c() {
        // (R + sL) ‖ C: Z(0) = R and dZ/ds(0) = L − R²C (circuit algebra, no source).
        let (r, l, c) = (2.0, 1e-6, 1e-9);
        // Z = (R + sL)/(LC s² + RC s + 1): poles of s² + (R/L)s + 1/(LC), residue N(p)/D'(p).
        let b = r / l;
        let k = 1.0 / (l * c);
        let p = Complex64::new(-b / 2.0, (k - b * b / 4.0).sqrt());
        let residue = (r + p * l) / (l * c) / (2.0 * p + b);
        let m = RationalModel {
            d_ohm: 0.0,
            e_h: 0.0,
            real_poles: vec![],
            complex_poles: vec![ComplexPole {
                pole_rad_per_s: p,
                residue_ohm_rad_per_s: residue,
            }],
        };
        assert!((m.dc_resistance_ohm() - r).abs() < 1e-9);
        assert!((m.dc_inductance_h() - (l - r * r * c)).abs() < 1e-15);
        let z = m.impedance(1e3);
        let s = Complex64::new(0.0, 2.0 * PI * 1e3);
        assert!((z - (r + s * l) / (l * c * s * s + r * c * s + 1.0)).norm() < 1e-9);
        assert_eq!(m.order(), 2);
    }
}
