//! The per-point standard uncertainty of a measured impedance.
//!
//! Per real and imaginary part, the measured S-parameter (S11 or S21) carries
//! σ_S = √( (ε · |S|)² + ν² ), and the impedance
//! σ_Z = √( (|∂Z/∂S| · σ_S)² + (ρ · |Z|)² + σ_abs² ):
//! - ε, [`DEFAULT_S_NOISE`] = 1e-3 (about 0.01 dB): trace noise and tracking drift of a calibrated
//!   vector network analyser, proportional to the signal (from memory: data sheets state
//!   0.001–0.01 dB trace noise; common practice, no source).
//! - ν, [`DEFAULT_S_FLOOR`] = 1e-5 (−100 dB): the receiver noise floor at a narrow IF bandwidth (from
//!   memory; common practice, no source).
//! - ρ, [`DEFAULT_RELATIVE_FLOOR`] = 0.2 % of |Z|: calibration-standard and fixture repeatability that
//!   no averaging removes (common practice, no source). Files that hold Z directly (CSV, Z/Y
//!   Touchstone without a stated S-method) get this floor only.
//! - σ_abs, [`ABSOLUTE_FLOOR_OHM`] = 1 nΩ: keeps every σ positive so a fit can divide by it.
//!
//! Through ∂Z/∂S this makes reflection accurate near Z0 (S11 ≈ 0), series-thru for high |Z| and
//! shunt-thru for low |Z| (S21 small, so its noise is near the floor), as the trade knows. The terms are
//! independent, so they add in quadrature.
//!
//! Near the edge of a method's range the first-order term is not enough. Each S → Z map has one pole
//! (S11 = 1 for reflection, S21 = 1 for shunt-thru, S21 = 0 for series-thru: the impedance the method
//! cannot tell from an open or a short), and Z = A + K/(S − p) there. A step of σ_S towards the pole
//! moves Z by |∂Z/∂S|·σ_S/(1 − u), u = σ_S/|S − p|, not by |∂Z/∂S|·σ_S: the error of Z is skewed and
//! heavy-tailed, and the measured S (from which σ is computed) may sit closer to or further from the
//! pole than the true one. So the S term is |∂Z/∂S|·σ_S/(1 − u), the change a 1σ step towards the pole
//! makes; with u ≥ [`POLE_LIMIT`] the point's impedance is undetermined and its σ is set to
//! [`UNDETERMINED_FACTOR`]·(|Z| + |∂Z/∂S|·σ_S), so it counts for nothing in a fit. For u ≪ 1 this is the
//! usual first-order propagation.

use super::Method;
use super::convert::{dz_ds, s_from_z};
use num_complex::Complex64;
use serde::{Deserialize, Serialize};

pub const DEFAULT_S_NOISE: f64 = 1e-3;
pub const DEFAULT_S_FLOOR: f64 = 1e-5;
pub const DEFAULT_RELATIVE_FLOOR: f64 = 2e-3;
pub const ABSOLUTE_FLOOR_OHM: f64 = 1e-9;
/// σ_S/|S − pole| at or above which a point's impedance is undetermined.
pub const POLE_LIMIT: f64 = 0.5;
/// How much larger than its value and first-order σ an undetermined point's σ is made.
pub const UNDETERMINED_FACTOR: f64 = 100.0;

/// Distance of the measured S-parameter from the pole of the method's S → Z map.
fn pole_distance(method: Method, s: Complex64) -> f64 {
    match method {
        Method::Reflection | Method::ShuntThru => (Complex64::new(1.0, 0.0) - s).norm(),
        Method::SeriesThru => s.norm(),
        Method::Direct => f64::INFINITY,
    }
}

/// The two knobs of the uncertainty model; see the module docs for the defaults and their reasons.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct NoiseModel {
    /// Part of the S-parameter uncertainty proportional to |S|.
    pub s_noise: f64,
    /// Part of the S-parameter uncertainty independent of |S| (the noise floor).
    pub s_floor: f64,
    /// Fraction of |Z|.
    pub relative_floor: f64,
}

impl Default for NoiseModel {
    fn default() -> Self {
        NoiseModel {
            s_noise: DEFAULT_S_NOISE,
            s_floor: DEFAULT_S_FLOOR,
            relative_floor: DEFAULT_RELATIVE_FLOOR,
        }
    }
}

impl NoiseModel {
    /// σ of `z`, which `method` derived from the measured S-parameter `s`.
    pub fn sigma_from_s(&self, method: Method, s: Complex64, z: Complex64, z0_ohm: f64) -> f64 {
        if method == Method::Direct {
            return combine(0.0, self.relative_floor * z.norm());
        }
        let sigma_s = self.sigma_s(s);
        let linear = dz_ds(method, s, z0_ohm).norm() * sigma_s;
        let u = sigma_s / pole_distance(method, s);
        let from_s = if u.is_nan() || u >= POLE_LIMIT {
            UNDETERMINED_FACTOR * (z.norm() + linear)
        } else {
            linear / (1.0 - u)
        };
        combine(from_s, self.relative_floor * z.norm())
    }

    /// σ of each real and imaginary part of a measured S-parameter `s`.
    pub fn sigma_s(&self, s: Complex64) -> f64 {
        (self.s_noise * s.norm()).hypot(self.s_floor)
    }

    /// σ of an impedance read directly; when a file of Z values states an S-method, the method's
    /// sensitivity applies at the S-parameter that Z implies.
    pub fn sigma_from_z(&self, method: Method, z: Complex64, z0_ohm: f64) -> f64 {
        match method {
            Method::Direct => combine(0.0, self.relative_floor * z.norm()),
            m => self.sigma_from_s(m, s_from_z(m, z, z0_ohm), z, z0_ohm),
        }
    }
}

fn combine(a: f64, b: f64) -> f64 {
    let s = (a * a + b * b + ABSOLUTE_FLOOR_OHM * ABSOLUTE_FLOOR_OHM).sqrt();
    if s.is_finite() { s } else { f64::MAX }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_method_is_most_accurate_where_the_trade_says() {
        // Common practice (no source): reflection is best near Z0, series-thru for high |Z|,
        // shunt-thru for low |Z|.
        let n = NoiseModel {
            relative_floor: 0.0,
            ..NoiseModel::default()
        };
        let rel = |m: Method, z: f64| {
            let z = Complex64::new(0.0, z);
            n.sigma_from_z(m, z, 50.0) / z.norm()
        };
        for z in [0.1, 1.0] {
            assert!(rel(Method::ShuntThru, z) < rel(Method::Reflection, z));
            assert!(rel(Method::ShuntThru, z) < rel(Method::SeriesThru, z));
        }
        for z in [1e3, 1e4] {
            assert!(rel(Method::SeriesThru, z) < rel(Method::Reflection, z));
            assert!(rel(Method::SeriesThru, z) < rel(Method::ShuntThru, z));
        }
        let near = rel(Method::Reflection, 50.0);
        assert!(near < rel(Method::Reflection, 0.5) && near < rel(Method::Reflection, 5e3));
    }

    #[test]
    fn reflection_sigma_at_a_matched_load() {
        // Z = Z0: S11 = 0, ∂Z/∂S = 2·Z0 = 100 Ω, σ_S = ν = 1e-5 at distance 1 from the pole, so
        // σ = √((100·1e-5/(1 − 1e-5))² + (0.002·50)²) Ω.
        let n = NoiseModel::default();
        let s = n.sigma_from_z(Method::Reflection, Complex64::new(50.0, 0.0), 50.0);
        let from_s = 100.0 * 1e-5 / (1.0 - 1e-5);
        assert!(
            (s - (from_s * from_s + 1e-2f64).sqrt()).abs() < 1e-12,
            "{s}"
        );
    }

    #[test]
    fn near_the_pole_sigma_is_the_step_towards_it() {
        // Reflection of 5 kΩ: S11 = 4950/5050, |1 − S| = 100/5050 = 0.0198; σ_S = √((1e-3·0.980)² +
        // 1e-10) ≈ 9.80e-4, u = 0.0495. A step of σ_S towards S = 1 moves Z = Z0(1+S)/(1−S) from 5 kΩ
        // to Z0(2 − d')/d' with d' = 0.0198 − 9.80e-4: exactly the first-order σ/(1 − u).
        let n = NoiseModel {
            relative_floor: 0.0,
            ..NoiseModel::default()
        };
        let z = Complex64::new(5e3, 0.0);
        let s = super::super::convert::s_from_z(Method::Reflection, z, 50.0);
        let sigma_s = n.sigma_s(s);
        let d = (1.0 - s.re) - sigma_s;
        let moved = 50.0 * (2.0 - d) / d;
        let got = n.sigma_from_z(Method::Reflection, z, 50.0);
        assert!(
            (got / (moved - 5e3) - 1.0).abs() < 1e-9,
            "{got} vs {}",
            moved - 5e3
        );
        // A point whose S is within half a σ_S of the pole is undetermined.
        let far = Complex64::new(0.0, 1e9);
        assert!(n.sigma_from_z(Method::Reflection, far, 50.0) > 100.0 * far.norm());
    }

    #[test]
    fn direct_data_get_the_relative_floor_only() {
        let n = NoiseModel::default();
        let s = n.sigma_from_z(Method::Direct, Complex64::new(3.0, 4.0), 50.0);
        assert!((s - 0.01).abs() < 1e-12, "{s}");
        assert!(n.sigma_from_z(Method::Direct, Complex64::new(0.0, 0.0), 50.0) > 0.0);
    }
}
