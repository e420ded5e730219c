//! Estimates from how a part is built, to set against a fit: copper wire resistance from the AWG size
//! and length at temperature, the skin depth, Dowell's AC resistance factor for a layered winding of
//! round wire, the effective permeability of a gapped core, and the inductance from turns.
//!
//! - Copper: 100 % IACS, ρ20 = 1/58 MS/m = 1.72414e-8 Ω·m and α20 = 0.00393 /K (the annealed-copper
//!   standard, NBS Handbook 100, Copper Wire Tables).
//! - AWG diameter (ASTM B258): d = 0.005 in · 92^((36 − n)/39); gauge 0 is "1/0", −1 "2/0" … −3 "4/0".
//! - Skin depth δ = √(ρ / (π·f·μ0·μr)).
//! - Dowell (Proc. IEE 113(8), 1966): for m layers, `F_R = Rac/Rdc = Δ·[ς1(Δ) + (2/3)(m² − 1)·ς2(Δ)]`
//!   with `ς1 = (sinh 2Δ + sin 2Δ)/(cosh 2Δ − cos 2Δ)`, `ς2 = (sinh Δ − sin Δ)/(cosh Δ + cos Δ)`.
//!   Round wire of diameter d at pitch p becomes the equivalent foil of thickness h = d·√π/2 with
//!   layer porosity η = h/p, so `Δ = h·√η/δ = (π/4)^(3/4)·(d/δ)·√(d/p)`.
//! - Gapped core: μe = μr / (1 + μr·lg/le); inductance L = N²·A_L or μ0·μe·A·N²/le.

use std::f64::consts::PI;

/// Resistivity of annealed copper at 20 °C (100 % IACS), Ω·m.
pub const COPPER_RESISTIVITY_20C_OHM_M: f64 = 1.0 / 58.0e6;
/// Temperature coefficient of resistance of annealed copper at 20 °C, 1/K.
pub const COPPER_ALPHA_20_PER_K: f64 = 0.00393;
/// Magnetic constant, H/m (CODATA 2018).
pub const MU0_H_PER_M: f64 = 1.256_637_062_12e-6;
const INCH_M: f64 = 0.0254;

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{name} = {value} is invalid: {reason}")]
pub struct ConstructionError {
    pub name: &'static str,
    pub value: f64,
    pub reason: &'static str,
}

fn positive(name: &'static str, value: f64) -> Result<f64, ConstructionError> {
    if value.is_finite() && value > 0.0 {
        Ok(value)
    } else {
        Err(ConstructionError {
            name,
            value,
            reason: "need a finite value > 0",
        })
    }
}

/// Bare-wire diameter of AWG `gauge` (−3 = 4/0 … 56), m.
pub fn awg_diameter_m(gauge: i32) -> Result<f64, ConstructionError> {
    if !(-3..=56).contains(&gauge) {
        return Err(ConstructionError {
            name: "awg",
            value: gauge as f64,
            reason: "AWG sizes run from -3 (4/0) to 56",
        });
    }
    Ok(0.005 * INCH_M * 92f64.powf((36 - gauge) as f64 / 39.0))
}

/// Copper resistivity at `temperature_c`, linear in temperature from 20 °C with α20.
pub fn copper_resistivity_ohm_m(temperature_c: f64) -> Result<f64, ConstructionError> {
    if !(temperature_c.is_finite() && (-100.0..=400.0).contains(&temperature_c)) {
        return Err(ConstructionError {
            name: "temperature_c",
            value: temperature_c,
            reason: "the linear α20 law holds from about -100 °C to 400 °C",
        });
    }
    Ok(COPPER_RESISTIVITY_20C_OHM_M * (1.0 + COPPER_ALPHA_20_PER_K * (temperature_c - 20.0)))
}

/// DC resistance of a round copper wire.
pub fn wire_resistance_ohm(
    diameter_m: f64,
    length_m: f64,
    temperature_c: f64,
) -> Result<f64, ConstructionError> {
    let d = positive("diameter_m", diameter_m)?;
    let l = positive("length_m", length_m)?;
    Ok(copper_resistivity_ohm_m(temperature_c)? * l / (PI * d * d / 4.0))
}

/// Skin depth δ = √(ρ / (π·f·μ0·μr)), m.
pub fn skin_depth_m(
    resistivity_ohm_m: f64,
    frequency_hz: f64,
    mu_r: f64,
) -> Result<f64, ConstructionError> {
    let rho = positive("resistivity_ohm_m", resistivity_ohm_m)?;
    let f = positive("frequency_hz", frequency_hz)?;
    let mu_r = positive("mu_r", mu_r)?;
    Ok((rho / (PI * f * MU0_H_PER_M * mu_r)).sqrt())
}

/// Dowell's AC resistance factor Rac/Rdc for `layers` layers at penetration ratio `delta` (Δ = h/δ of
/// the equivalent foil).
pub fn dowell_factor(delta: f64, layers: u32) -> Result<f64, ConstructionError> {
    if !(delta.is_finite() && delta >= 0.0) {
        return Err(ConstructionError {
            name: "delta",
            value: delta,
            reason: "need a finite value >= 0",
        });
    }
    if layers == 0 {
        return Err(ConstructionError {
            name: "layers",
            value: 0.0,
            reason: "need at least one layer",
        });
    }
    let m2 = (layers as f64).powi(2);
    if delta < 1e-2 {
        // Series of the same expression: the closed form cancels catastrophically for small Δ.
        return Ok(1.0 + (5.0 * m2 - 1.0) * delta.powi(4) / 45.0);
    }
    let (s1, s2) = if delta > 40.0 {
        (1.0, 1.0)
    } else {
        let x = 2.0 * delta;
        (
            (x.sinh() + x.sin()) / (x.cosh() - x.cos()),
            (delta.sinh() - delta.sin()) / (delta.cosh() + delta.cos()),
        )
    };
    Ok(delta * (s1 + 2.0 / 3.0 * (m2 - 1.0) * s2))
}

/// Δ of round wire of `diameter_m` wound at `pitch_m` centre to centre within a layer, through the
/// porosity-corrected equivalent foil.
pub fn round_wire_delta(
    diameter_m: f64,
    pitch_m: f64,
    skin_depth_m: f64,
) -> Result<f64, ConstructionError> {
    let d = positive("diameter_m", diameter_m)?;
    let p = positive("pitch_m", pitch_m)?;
    let delta = positive("skin_depth_m", skin_depth_m)?;
    if p < d {
        return Err(ConstructionError {
            name: "pitch_m",
            value: p,
            reason: "the pitch cannot be smaller than the wire diameter",
        });
    }
    Ok((PI / 4.0).powf(0.75) * (d / delta) * (d / p).sqrt())
}

/// Effective permeability of a core of relative permeability `mu_r` with an air gap `gap_m` in a
/// magnetic path of length `path_m`.
pub fn gapped_permeability(mu_r: f64, gap_m: f64, path_m: f64) -> Result<f64, ConstructionError> {
    let mu_r = positive("mu_r", mu_r)?;
    let le = positive("path_m", path_m)?;
    if !(gap_m.is_finite() && gap_m >= 0.0 && gap_m < le) {
        return Err(ConstructionError {
            name: "gap_m",
            value: gap_m,
            reason: "need 0 <= gap < magnetic path length",
        });
    }
    Ok(mu_r / (1.0 + mu_r * gap_m / le))
}

/// L = N²·A_L.
pub fn inductance_from_al(turns: f64, al_h: f64) -> Result<f64, ConstructionError> {
    let n = positive("turns", turns)?;
    Ok(n * n * positive("al_h", al_h)?)
}

/// L = μ0·μe·A·N²/le.
pub fn inductance_from_core(
    mu_e: f64,
    area_m2: f64,
    path_m: f64,
    turns: f64,
) -> Result<f64, ConstructionError> {
    let n = positive("turns", turns)?;
    Ok(
        MU0_H_PER_M * positive("mu_e", mu_e)? * positive("area_m2", area_m2)? * n * n
            / positive("path_m", path_m)?,
    )
}

/// A layered copper winding, for a construction-based Rdc and Rac estimate.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Winding {
    pub awg: i32,
    pub turns: f64,
    pub mean_turn_length_m: f64,
    pub layers: u32,
    /// Centre-to-centre spacing of turns within a layer; `None` means touching turns (pitch = d).
    pub pitch_m: Option<f64>,
    pub temperature_c: f64,
}

impl Winding {
    pub fn wire_length_m(&self) -> Result<f64, ConstructionError> {
        Ok(positive("turns", self.turns)?
            * positive("mean_turn_length_m", self.mean_turn_length_m)?)
    }

    pub fn rdc_ohm(&self) -> Result<f64, ConstructionError> {
        wire_resistance_ohm(
            awg_diameter_m(self.awg)?,
            self.wire_length_m()?,
            self.temperature_c,
        )
    }

    /// Rac = F_R(Δ, m)·Rdc at `frequency_hz` (Dowell, porosity-corrected round wire).
    pub fn rac_ohm(&self, frequency_hz: f64) -> Result<f64, ConstructionError> {
        let d = awg_diameter_m(self.awg)?;
        let delta = skin_depth_m(
            copper_resistivity_ohm_m(self.temperature_c)?,
            frequency_hz,
            1.0,
        )?;
        let big_delta = round_wire_delta(d, self.pitch_m.unwrap_or(d), delta)?;
        Ok(dowell_factor(big_delta, self.layers)? * self.rdc_ohm()?)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_small_delta_series_joins_the_closed_form() {
        for m in [1, 2, 5] {
            let below = dowell_factor(0.0099999, m).unwrap();
            let above = dowell_factor(0.0100001, m).unwrap();
            assert!((below - above).abs() < 1e-9, "{m}: {below} {above}");
        }
        assert_eq!(dowell_factor(0.0, 3).unwrap(), 1.0);
        assert!(dowell_factor(1e3, 1).unwrap().is_finite());
    }

    #[test]
    fn bad_inputs_are_named() {
        assert_eq!(awg_diameter_m(57).unwrap_err().name, "awg");
        assert_eq!(
            gapped_permeability(2000.0, 0.2, 0.1).unwrap_err().name,
            "gap_m"
        );
        assert_eq!(
            round_wire_delta(1e-3, 0.5e-3, 1e-4).unwrap_err().name,
            "pitch_m"
        );
        assert_eq!(dowell_factor(1.0, 0).unwrap_err().name, "layers");
    }
}
