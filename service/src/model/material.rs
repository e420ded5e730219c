//! The core material seen through a fitted model: when the user states how the part is built (turns,
//! the core's shape, optionally an air gap), the model's core inductance becomes the material's
//! complex relative permeability μ(f) = μ′ − jμ″ and its initial permeability.
//!
//! - Inductance per unit permeability: a toroid of rectangular cross-section (outer and inner diameter
//!   OD, ID, height h) has L = μ0·μr·N²·h·ln(OD/ID)/(2π) (the field H = N·I/(2πr) integrated over the
//!   cross-section; e.g. Kazimierczuk, "High-Frequency Magnetic Components", 2nd ed., Wiley 2014,
//!   ch. 2 — from memory); any other core L = μ0·μr·N²·Ae/le from its effective area and path length
//!   (the data sheet's Ae and le).
//! - Gap: the effective permeability of a gapped core is μe = μ/(1 + μ·lg/le) (see
//!   [`super::construction::gapped_permeability`]); with a gap stated, the material's μ is recovered
//!   from the μe the part shows by μ = μe/(1 − μe·lg/le), on the complex value.
//! - From the model: the core branch's impedance is Zc(f) = jω·L(f) with L(f) = L′ − jL″ complex
//!   (L0 ‖ Rp, or L0 times the dispersive law); μe(f) = L(f)/L₁ where L₁ is the inductance per unit
//!   permeability, so μ′ = Re L/L₁ and μ″ = −Im L/L₁ = Re Zc/(ω·L₁). The initial permeability is the
//!   low-frequency limit, L0/L₁ (through the gap formula when a gap is stated); its σ follows L0's
//!   (the dimensions are taken as exact: their tolerance adds to it and is the user's to judge).

use super::LumpedModel;
use super::construction::MU0_H_PER_M;
use num_complex::Complex64;
use serde::{Deserialize, Serialize};
use std::f64::consts::PI;

/// The core's shape.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case", deny_unknown_fields)]
pub enum CoreShape {
    /// A toroid of rectangular cross-section.
    Toroid {
        outer_diameter_m: f64,
        inner_diameter_m: f64,
        height_m: f64,
    },
    /// Any core given by its effective magnetic area and path length.
    Effective { area_m2: f64, path_m: f64 },
}

/// How the part is built, as the user states it.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Construction {
    pub turns: f64,
    pub core: CoreShape,
    /// Total air-gap length in the magnetic path; absent or 0 for an ungapped core.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub gap_m: Option<f64>,
    /// The material's initial permeability from its data sheet, for the expected L0.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub nominal_initial_permeability: Option<f64>,
}

impl Construction {
    /// Checks the stated values; the message names the field.
    pub fn validate(&self) -> Result<(), String> {
        let positive = |name: &str, v: f64| {
            if v.is_finite() && v > 0.0 {
                Ok(())
            } else {
                Err(format!(
                    "construction.{name} is {v}; it must be a positive number"
                ))
            }
        };
        positive("turns", self.turns)?;
        // Plausible ranges (common practice, no source): a winding of at least one turn and at most
        // 100 000; core dimensions from 10 µm to 10 m, areas from 1e-12 m² to 1 m²; an initial
        // permeability from 1 to 1e6. Outside them the numbers are typing slips, not cores.
        let within = |name: &str, v: f64, lo: f64, hi: f64| {
            if (lo..=hi).contains(&v) {
                Ok(())
            } else {
                Err(format!(
                    "construction.{name} is {v}; it must be {lo:e} to {hi:e}"
                ))
            }
        };
        within("turns", self.turns, 1.0, 1e5)?;
        match self.core {
            CoreShape::Toroid {
                outer_diameter_m,
                inner_diameter_m,
                height_m,
            } => {
                within("core.toroid.outer_diameter_m", outer_diameter_m, 1e-5, 10.0)?;
                within("core.toroid.inner_diameter_m", inner_diameter_m, 1e-5, 10.0)?;
                within("core.toroid.height_m", height_m, 1e-5, 10.0)?;
            }
            CoreShape::Effective { area_m2, path_m } => {
                within("core.effective.area_m2", area_m2, 1e-12, 1.0)?;
                within("core.effective.path_m", path_m, 1e-5, 10.0)?;
            }
        }
        if let Some(mu) = self.nominal_initial_permeability {
            within("nominal_initial_permeability", mu, 1.0, 1e6)?;
        }
        match self.core {
            CoreShape::Toroid {
                outer_diameter_m,
                inner_diameter_m,
                height_m,
            } => {
                positive("core.toroid.outer_diameter_m", outer_diameter_m)?;
                positive("core.toroid.inner_diameter_m", inner_diameter_m)?;
                positive("core.toroid.height_m", height_m)?;
                if inner_diameter_m >= outer_diameter_m {
                    return Err(format!(
                        "construction.core.toroid: the inner diameter {inner_diameter_m} m must be \
                         smaller than the outer {outer_diameter_m} m"
                    ));
                }
            }
            CoreShape::Effective { area_m2, path_m } => {
                positive("core.effective.area_m2", area_m2)?;
                positive("core.effective.path_m", path_m)?;
            }
        }
        if let Some(g) = self.gap_m
            && !(g.is_finite() && g >= 0.0 && g < self.path_m())
        {
            return Err(format!(
                "construction.gap_m is {g}; it must be at least 0 and shorter than the magnetic path \
                 ({} m)",
                self.path_m()
            ));
        }
        if let Some(mu) = self.nominal_initial_permeability {
            positive("nominal_initial_permeability", mu)?;
        }
        Ok(())
    }

    /// Effective magnetic path length: the data sheet's le, or for a toroid the mean circumference
    /// π·(OD + ID)/2 (used only with a gap).
    pub fn path_m(&self) -> f64 {
        match self.core {
            CoreShape::Toroid {
                outer_diameter_m,
                inner_diameter_m,
                ..
            } => PI * (outer_diameter_m + inner_diameter_m) / 2.0,
            CoreShape::Effective { path_m, .. } => path_m,
        }
    }

    /// Inductance per unit relative permeability, H.
    pub fn inductance_per_permeability_h(&self) -> f64 {
        let n2 = self.turns * self.turns;
        match self.core {
            CoreShape::Toroid {
                outer_diameter_m,
                inner_diameter_m,
                height_m,
            } => {
                MU0_H_PER_M * n2 * height_m * (outer_diameter_m / inner_diameter_m).ln()
                    / (2.0 * PI)
            }
            CoreShape::Effective { area_m2, path_m } => MU0_H_PER_M * n2 * area_m2 / path_m,
        }
    }

    /// The material's μ from the effective μe the part shows (the gap formula inverted).
    pub fn material_from_effective(&self, mu_e: Complex64) -> Complex64 {
        match self.gap_m {
            Some(g) if g > 0.0 => mu_e / (1.0 - mu_e * (g / self.path_m())),
            _ => mu_e,
        }
    }

    /// The effective μe of the material's μ (the gap formula).
    pub fn effective_from_material(&self, mu: f64) -> f64 {
        match self.gap_m {
            Some(g) if g > 0.0 => mu / (1.0 + mu * g / self.path_m()),
            _ => mu,
        }
    }
}

/// One point of the material's spectrum.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct PermeabilityPoint {
    pub frequency_hz: f64,
    /// μ′.
    pub mu_real: f64,
    /// μ″ (≥ 0 for a lossy material; μ = μ′ − jμ″).
    pub mu_imag: f64,
}

/// The material as the fitted model shows it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MaterialReport {
    pub construction: Construction,
    /// μ0·N²·(shape factor): the inductance the winding would have with μr = 1.
    pub inductance_per_permeability_h: f64,
    /// The material's initial (low-frequency) relative permeability.
    pub initial_permeability: f64,
    /// Its standard uncertainty from L0's (dimensions taken as exact); `None` when L0 has none.
    pub initial_permeability_sigma: Option<f64>,
    /// L0 expected from the turns, the shape and the stated nominal permeability.
    pub expected_l0_h: Option<f64>,
    /// (fitted L0 / expected L0 − 1) in percent.
    pub l0_versus_expected_percent: Option<f64>,
    /// μ′ and μ″ over the band, 10 points per decade.
    pub spectrum: Vec<PermeabilityPoint>,
}

/// The material report for a lumped model (its core branch) over `band_hz`.
impl MaterialReport {
    /// Whether every number is finite (and the permeability positive): a report that is not cannot be
    /// stored as JSON faithfully, and says nothing about the material.
    pub fn is_finite(&self) -> bool {
        self.inductance_per_permeability_h.is_finite()
            && self.inductance_per_permeability_h > 0.0
            && self.initial_permeability.is_finite()
            && self.initial_permeability > 0.0
            && self.initial_permeability_sigma.is_none_or(f64::is_finite)
            && self.expected_l0_h.is_none_or(f64::is_finite)
            && self.l0_versus_expected_percent.is_none_or(f64::is_finite)
            && self
                .spectrum
                .iter()
                .all(|p| p.mu_real.is_finite() && p.mu_imag.is_finite())
    }
}

pub fn material_report(
    model: &LumpedModel,
    l0_sigma_h: Option<f64>,
    construction: &Construction,
    band_hz: [f64; 2],
) -> MaterialReport {
    let l1 = construction.inductance_per_permeability_h();
    let mu_of = |l: Complex64| construction.material_from_effective(l / l1);
    let initial = mu_of(Complex64::new(model.l0_h, 0.0)).re;
    // dμ/dL0 through the gap formula (real at DC): μ = μe/(1 − μe·g/le), dμ/dμe = 1/(1 − μe·g/le)².
    let sigma = l0_sigma_h.map(|s| {
        let mu_e = model.l0_h / l1;
        let k = match construction.gap_m {
            Some(g) if g > 0.0 => 1.0 / (1.0 - mu_e * g / construction.path_m()).powi(2),
            _ => 1.0,
        };
        (k * s / l1).abs()
    });
    let expected_l0_h = construction
        .nominal_initial_permeability
        .map(|mu| construction.effective_from_material(mu) * l1);
    let [lo, hi] = band_hz;
    let n = ((hi / lo).log10() * 10.0).ceil().max(1.0) as usize + 1;
    let spectrum = (0..n)
        .map(|i| {
            let f = if i + 1 == n {
                hi
            } else {
                lo * (hi / lo).powf(i as f64 / (n - 1) as f64)
            };
            let jw = Complex64::new(0.0, 2.0 * PI * f);
            let mu = mu_of(model.core_impedance(f) / jw);
            PermeabilityPoint {
                frequency_hz: f,
                mu_real: mu.re,
                mu_imag: -mu.im,
            }
        })
        .collect();
    MaterialReport {
        construction: *construction,
        inductance_per_permeability_h: l1,
        initial_permeability: initial,
        initial_permeability_sigma: sigma,
        expected_l0_h,
        l0_versus_expected_percent: expected_l0_h.map(|e| 100.0 * (model.l0_h / e - 1.0)),
        spectrum,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_construction_outside_plausible_ranges_is_refused() {
        let mut c = toroid(10.0);
        c.core = CoreShape::Effective {
            area_m2: 5e-324,
            path_m: 5e-324,
        };
        let e = c.validate().unwrap_err();
        assert!(e.contains("area_m2"), "{e}");
        let mut c = toroid(0.5);
        assert!(c.validate().unwrap_err().contains("turns"));
        c.turns = 2.0;
        c.nominal_initial_permeability = Some(1e9);
        assert!(c.validate().is_err());
    }

    #[test]
    fn a_gap_the_fitted_inductance_cannot_have_gives_no_finite_report() {
        // μe = L0/L1 above le/g makes μ = μe/(1 − μe·g/le) negative: no material has it.
        let mut c = toroid(10.0);
        c.gap_m = Some(0.5 * c.path_m());
        let l1 = c.inductance_per_permeability_h();
        let model = LumpedModel {
            l0_h: 10.0 * l1,
            rdc_ohm: 0.1,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: None,
            cp_f: 1e-12,
            ls_h: 0.0,
            sections: vec![],
            core: None,
        };
        let r = material_report(&model, None, &c, [1e3, 1e6]);
        assert!(!r.is_finite(), "{:?}", r.initial_permeability);
    }

    fn toroid(turns: f64) -> Construction {
        Construction {
            turns,
            core: CoreShape::Toroid {
                outer_diameter_m: 20e-3,
                inner_diameter_m: 10e-3,
                height_m: 5e-3,
            },
            gap_m: None,
            nominal_initial_permeability: None,
        }
    }

    #[test]
    fn the_toroid_formula_equals_the_integrated_field() {
        // L = μ0·μr·N²·h·ln(OD/ID)/(2π): 10 turns on 20 × 10 × 5 mm give 69.315 nH per unit μr
        // (computed by hand: 2e-7 · 100 · 0.005 · ln 2). Independently, the flux N·∫ B·h dr with
        // B = μ0·N·I/(2πr), by Simpson's rule over the cross-section.
        let c = toroid(10.0);
        let l1 = c.inductance_per_permeability_h();
        assert!((l1 / 69.3147e-9 - 1.0).abs() < 1e-5, "{l1}");
        let (r1, r2, h, n) = (5e-3, 10e-3, 5e-3, 10.0);
        let m = 1000;
        let dr = (r2 - r1) / m as f64;
        let b = |r: f64| MU0_H_PER_M * n / (2.0 * PI * r);
        let mut integral = b(r1) + b(r2);
        for i in 1..m {
            integral += b(r1 + i as f64 * dr) * if i % 2 == 1 { 4.0 } else { 2.0 };
        }
        let flux_linkage = n * h * integral * dr / 3.0;
        assert!(
            (flux_linkage / l1 - 1.0).abs() < 1e-9,
            "{flux_linkage} {l1}"
        );
    }

    #[test]
    fn a_single_pole_core_shows_a_debye_spectrum_and_its_initial_permeability() {
        // L0 ‖ Rp: μe(f) = μi/(1 + jf/fc) with fc = Rp/(2π·L0); μ″ peaks at fc with μi/2.
        let c = toroid(10.0);
        let l1 = c.inductance_per_permeability_h();
        let mu_i = 800.0;
        let l0 = mu_i * l1;
        let fc = 5e6;
        let model = LumpedModel {
            l0_h: l0,
            rdc_ohm: 0.01,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: Some(2.0 * PI * fc * l0),
            cp_f: 1e-12,
            ls_h: 0.0,
            sections: vec![],
            core: None,
        };
        let r = material_report(&model, Some(0.01 * l0), &c, [1e4, 1e8]);
        assert!((r.initial_permeability - mu_i).abs() < 1e-9 * mu_i);
        assert!((r.initial_permeability_sigma.unwrap() - 8.0).abs() < 1e-9);
        for p in &r.spectrum {
            let x = p.frequency_hz / fc;
            let want = Complex64::new(mu_i, 0.0) / Complex64::new(1.0, x);
            assert!((p.mu_real - want.re).abs() < 1e-9 * mu_i, "{p:?}");
            assert!((p.mu_imag + want.im).abs() < 1e-9 * mu_i, "{p:?}");
            assert!(p.mu_imag >= 0.0);
        }
    }

    #[test]
    fn a_gap_is_taken_out_to_recover_the_material() {
        // μ = 2000 with lg = 1 mm in le = 100 mm shows μe = 95.238 (the gapped-core formula); the
        // report recovers 2000 from a part built that way.
        let c = Construction {
            turns: 20.0,
            core: CoreShape::Effective {
                area_m2: 50e-6,
                path_m: 0.1,
            },
            gap_m: Some(1e-3),
            nominal_initial_permeability: Some(2000.0),
        };
        assert!((c.effective_from_material(2000.0) - 95.238).abs() < 1e-3);
        let l1 = c.inductance_per_permeability_h();
        let model = LumpedModel {
            l0_h: 95.238_095_238 * l1,
            rdc_ohm: 0.01,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: None,
            cp_f: 1e-12,
            ls_h: 0.0,
            sections: vec![],
            core: None,
        };
        let r = material_report(&model, None, &c, [1e3, 1e6]);
        assert!((r.initial_permeability - 2000.0).abs() < 1e-3, "{r:?}");
        assert!(r.l0_versus_expected_percent.unwrap().abs() < 1e-6);
    }

    #[test]
    fn impossible_constructions_are_refused_naming_the_field() {
        let mut c = toroid(5.0);
        c.core = CoreShape::Toroid {
            outer_diameter_m: 5e-3,
            inner_diameter_m: 8e-3,
            height_m: 2e-3,
        };
        assert!(c.validate().unwrap_err().contains("inner diameter"));
        let mut c = toroid(0.0);
        assert!(c.validate().unwrap_err().contains("turns"));
        c.turns = 3.0;
        c.gap_m = Some(1.0);
        assert!(c.validate().unwrap_err().contains("gap_m"));
    }
}
