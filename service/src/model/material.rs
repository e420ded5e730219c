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
//! - σ per point of the spectrum: the delta method on the fit's covariance C of θ = ln p (the
//!   model's log-parameters, [`super::lumped`]). L(f) and its analytic derivatives ∂L/∂θ come from the
//!   core law's own derivatives ([`super::lumped::law_and_derivatives`]), the chain rule takes them
//!   through the gap formula (dμ/dμe = 1/(1 − μe·lg/le)²), and Var μ′ = g′ᵀ·C·g′ with g′ = ∂μ′/∂θ (the
//!   same for μ″). C is the chosen model's sandwich covariance (widened by the misfit and the
//!   residuals' correlation) with the share of the spread between nearly equal models each
//!   parameter's reported σ carries, conditioned on the undetermined parameters that have no effect
//!   worth the name anywhere in the band ([`ParameterCovariance::effective`]). A point that depends on a
//!   parameter the data do not determine (one whose e-fold change would move μ′ or μ″ there by more
//!   than 1 % of |μ|) has no σ: the linearisation has nothing to stand on.

use super::LumpedModel;
use super::construction::MU0_H_PER_M;
use super::lumped::{Param, Structure, law_and_derivatives, law_parameters};
use nalgebra::{DMatrix, DVector};
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
    /// Standard uncertainty of μ′ from the fit's covariance; absent when the fit has none (reports
    /// stored before it existed) or μ′ there depends on a parameter the data do not determine.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub mu_real_sigma: Option<f64>,
    /// Standard uncertainty of μ″, likewise.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub mu_imag_sigma: Option<f64>,
}

/// The fit's covariance of θ = ln p for the chosen structure: what the spectrum's σ needs.
#[derive(Debug, Clone)]
pub struct ParameterCovariance {
    pub structure: Structure,
    pub theta: Vec<f64>,
    /// Covariance of θ for the chosen model alone, n × n (its diagonal the squares of the model's own
    /// σ of θ).
    pub covariance: DMatrix<f64>,
    /// Each parameter's σ of θ as the report states it: `None` when not identifiable; it may include
    /// the spread between nearly equal models.
    pub reported_sigma: Vec<Option<f64>>,
}

impl ParameterCovariance {
    pub fn from_fit(
        structure: &Structure,
        theta: &[f64],
        covariance: &DMatrix<f64>,
        reported_sigma: &[Option<f64>],
    ) -> ParameterCovariance {
        ParameterCovariance {
            structure: structure.clone(),
            theta: theta.to_vec(),
            covariance: covariance.clone(),
            reported_sigma: reported_sigma.to_vec(),
        }
    }

    /// Whether the data determine parameter `i` (it has a finite reported σ).
    pub fn determined(&self, i: usize) -> bool {
        self.reported_sigma[i].is_some_and(f64::is_finite)
    }

    /// The covariance the spectrum's σ uses: conditioned on the parameters in `held` (undetermined
    /// ones whose effect on the core is negligible over the band: held at their fitted values), with
    /// rows and columns of every undetermined parameter zero, and scaled to the reported σ's share of
    /// the spread between nearly equal models, C′ᵢⱼ = Cᵢⱼ·(σ′ᵢ/σᵢ)·(σ′ⱼ/σⱼ) with σ the model's own
    /// marginal σ and σ′ the reported.
    ///
    /// Why hold some: a law parameter that went to its nesting limit (a Havriliak–Negami 1 − β near
    /// zero, an air fraction near zero) has an unbounded linearised σ of its logarithm for an effect on
    /// Z that vanishes with it, and left in the covariance it inflates every parameter correlated
    /// with it (by 6× at the top of the band on the coverage test). Conditioning is the precision's
    /// block inverted, (P_AA)⁻¹, i.e. the Schur complement C_AA − C_AB·C_BB⁻¹·C_BA. An undetermined
    /// parameter that does matter somewhere in the band is not held: it stays in the marginal of the
    /// others, and the points where it matters get no σ.
    pub fn effective(&self, held: &[bool]) -> DMatrix<f64> {
        let n = self.theta.len();
        let c = &self.covariance;
        let d: Vec<f64> = (0..n).map(|i| c[(i, i)].sqrt()).collect();
        let usable = |i: usize| d[i].is_finite() && d[i] > 0.0;
        let keep: Vec<usize> = (0..n).filter(|&i| usable(i) && !held[i]).collect();
        let a: Vec<usize> = keep
            .iter()
            .copied()
            .filter(|&i| self.determined(i))
            .collect();
        // The precision of the correlation matrix over every parameter with a variance; its block
        // without the held ones inverted gives their conditional covariance. Both through
        // eigen-decompositions that leave out directions below 1e-12 of the largest (the fit's own
        // rule for singular directions).
        let all: Vec<usize> = (0..n).filter(|&i| usable(i)).collect();
        let corr = DMatrix::from_fn(all.len(), all.len(), |i, j| {
            c[(all[i], all[j])] / (d[all[i]] * d[all[j]])
        });
        let precision = pseudo_inverse(corr);
        let pos = |i: usize| all.iter().position(|&k| k == i).expect("usable");
        let block = DMatrix::from_fn(keep.len(), keep.len(), |i, j| {
            precision[(pos(keep[i]), pos(keep[j]))]
        });
        let conditioned = pseudo_inverse(block);
        let at = |i: usize| keep.iter().position(|&k| k == i).expect("kept");
        let share = |k: usize| self.reported_sigma[k].unwrap_or(0.0) / d[k];
        let mut out = DMatrix::zeros(n, n);
        for &i in &a {
            for &j in &a {
                out[(i, j)] = conditioned[(at(i), at(j))] * d[i] * d[j] * share(i) * share(j);
            }
        }
        out
    }
}

/// The pseudo-inverse of a symmetric matrix, leaving out eigen-directions below 1e-12 of the largest.
fn pseudo_inverse(m: DMatrix<f64>) -> DMatrix<f64> {
    let n = m.nrows();
    if n == 0 {
        return m;
    }
    let eig = nalgebra::SymmetricEigen::new(m);
    let lmax = eig.eigenvalues.amax();
    let mut out = DMatrix::zeros(n, n);
    for k in 0..n {
        let lambda = eig.eigenvalues[k];
        if lambda.is_finite() && lambda > 1e-12 * lmax {
            let v = eig.eigenvectors.column(k);
            out += (v * v.transpose()) / lambda;
        }
    }
    out
}

/// The core's complex inductance L(f) = Z_core/(jω) and ∂L/∂θ for every θ entry (zero for the
/// entries outside the core: rdc, cp, k_ac, ls, sections), from the law's analytic derivatives.
pub fn core_inductance_and_gradient(
    structure: &Structure,
    theta: &[f64],
    frequency_hz: f64,
    gradient: &mut [Complex64],
) -> Complex64 {
    let zero = Complex64::new(0.0, 0.0);
    gradient.iter_mut().for_each(|g| *g = zero);
    let l0 = theta[0].exp();
    if let Some(law) = structure.dispersion {
        let first = structure
            .index(Param::CoreCorner)
            .expect("a dispersive structure has a corner");
        let k = law_parameters(law);
        let p: Vec<f64> = theta[first..first + k].iter().map(|t| t.exp()).collect();
        let (m, dm) = law_and_derivatives(law, &p, frequency_hz);
        let air = structure.index(Param::AirFraction);
        let r = air.map_or(0.0, |i| theta[i].exp());
        let l = l0 * ((1.0 - r) * m + r);
        gradient[0] = l;
        for j in 0..k {
            gradient[first + j] = l0 * (1.0 - r) * dm[j];
        }
        if let Some(i) = air {
            // ∂/∂ln r of l0·((1 − r)·m + r) = l0·r·(1 − m).
            gradient[i] = l0 * r * (Complex64::new(1.0, 0.0) - m);
        }
        l
    } else if let Some(i) = structure.index(Param::Rp) {
        // L = l0·rp/(a + rp), a = jω·l0: ∂L/∂ln l0 = l0·rp²/(a + rp)², ∂L/∂ln rp = a·l0·rp/(a + rp)².
        let rp = theta[i].exp();
        let a = Complex64::new(0.0, 2.0 * PI * frequency_hz * l0);
        let den = (a + rp).inv();
        let g = l0 * rp * den * den;
        gradient[0] = g * rp;
        gradient[i] = g * a;
        l0 * rp * den
    } else {
        gradient[0] = Complex64::new(l0, 0.0);
        Complex64::new(l0, 0.0)
    }
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
            && self.spectrum.iter().all(|p| {
                p.mu_real.is_finite()
                    && p.mu_imag.is_finite()
                    && p.mu_real_sigma.is_none_or(f64::is_finite)
                    && p.mu_imag_sigma.is_none_or(f64::is_finite)
            })
    }
}

/// A parameter whose e-fold change moves μ′ or μ″ at a point by more than this share of |μ| there
/// leaves that point without σ when the data do not determine it.
const UNDETERMINED_INFLUENCE: f64 = 0.01;

/// The material report of `model` (the fitted one) over `band_hz`; `covariance` (of the same model's
/// θ) gives σ per point of the spectrum.
pub fn material_report(
    model: &LumpedModel,
    l0_sigma_h: Option<f64>,
    covariance: Option<&ParameterCovariance>,
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
    let frequencies: Vec<f64> = (0..n)
        .map(|i| {
            if i + 1 == n {
                hi
            } else {
                lo * (hi / lo).powf(i as f64 / (n - 1) as f64)
            }
        })
        .collect();
    let gradients: Option<(&ParameterCovariance, DMatrix<f64>, Vec<Gradient>)> =
        covariance.map(|c| {
            let g: Vec<Gradient> = frequencies
                .iter()
                .map(|&f| permeability_gradient(c, construction, f))
                .collect();
            // Held: undetermined parameters that move μ′ and μ″ by at most the influence limit at
            // every point of the band.
            let held: Vec<bool> = (0..c.theta.len())
                .map(|i| !c.determined(i) && g.iter().all(|p| !p.rests_on(i)))
                .collect();
            (c, c.effective(&held), g)
        });
    let spectrum = frequencies
        .iter()
        .enumerate()
        .map(|(k, &f)| {
            let jw = Complex64::new(0.0, 2.0 * PI * f);
            let mu = mu_of(model.core_impedance(f) / jw);
            let (mu_real_sigma, mu_imag_sigma) = gradients
                .as_ref()
                .map(|(c, matrix, g)| g[k].sigma(c, matrix))
                .unwrap_or((None, None));
            PermeabilityPoint {
                frequency_hz: f,
                mu_real: mu.re,
                mu_imag: -mu.im,
                mu_real_sigma,
                mu_imag_sigma,
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

/// ∂μ′/∂θ and ∂μ″/∂θ at one frequency, and the influence limit there.
struct Gradient {
    re: DVector<f64>,
    im: DVector<f64>,
    limit: f64,
}

impl Gradient {
    /// Whether μ′ or μ″ here moves by more than the influence limit per e-fold of parameter `i`.
    fn rests_on(&self, i: usize) -> bool {
        self.re[i].abs() > self.limit || self.im[i].abs() > self.limit
    }

    /// σ of μ′ and μ″ by the delta method; `None` for a component that rests on an undetermined
    /// parameter.
    fn sigma(&self, c: &ParameterCovariance, matrix: &DMatrix<f64>) -> (Option<f64>, Option<f64>) {
        let one = |g: &DVector<f64>| {
            if (0..g.len()).any(|i| !c.determined(i) && g[i].abs() > self.limit) {
                return None;
            }
            let var = (g.transpose() * matrix * g)[(0, 0)];
            (var.is_finite() && var >= 0.0).then(|| var.sqrt())
        };
        (one(&self.re), one(&self.im))
    }
}

/// The gradient of μ′ and μ″ at `frequency_hz` with respect to θ: L(f)'s analytic derivatives taken
/// through the gap formula.
fn permeability_gradient(
    c: &ParameterCovariance,
    construction: &Construction,
    frequency_hz: f64,
) -> Gradient {
    let n = c.theta.len();
    let mut dl = vec![Complex64::new(0.0, 0.0); n];
    let l = core_inductance_and_gradient(&c.structure, &c.theta, frequency_hz, &mut dl);
    let l1 = construction.inductance_per_permeability_h();
    let mu_e = l / l1;
    let mu = construction.material_from_effective(mu_e);
    // dμ/dμe through the gap formula μ = μe/(1 − μe·lg/le).
    let chain = match construction.gap_m {
        Some(g) if g > 0.0 => (Complex64::new(1.0, 0.0) - mu_e * (g / construction.path_m()))
            .powi(2)
            .inv(),
        _ => Complex64::new(1.0, 0.0),
    };
    let scale = chain / l1;
    // μ = μ′ − jμ″: ∂μ′/∂θ = Re ∂μ/∂θ, ∂μ″/∂θ = −Im ∂μ/∂θ.
    Gradient {
        re: DVector::from_iterator(n, dl.iter().map(|d| (d * scale).re)),
        im: DVector::from_iterator(n, dl.iter().map(|d| -(d * scale).im)),
        limit: UNDETERMINED_INFLUENCE * mu.norm(),
    }
}

/// σ of μ′ and μ″ at one frequency with every undetermined parameter held (tests).
#[cfg(test)]
fn spectrum_sigma(
    c: &ParameterCovariance,
    construction: &Construction,
    frequency_hz: f64,
) -> (Option<f64>, Option<f64>) {
    let held: Vec<bool> = (0..c.theta.len()).map(|i| !c.determined(i)).collect();
    permeability_gradient(c, construction, frequency_hz).sigma(c, &c.effective(&held))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{CoreDispersion, CoreLaw};

    fn dispersive(law: CoreLaw, air: f64) -> LumpedModel {
        let mixed = law == CoreLaw::ResonanceRelaxation;
        LumpedModel {
            l0_h: 40e-6,
            rdc_ohm: 0.05,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: None,
            cp_f: 3e-12,
            ls_h: 0.0,
            sections: vec![],
            core: Some(CoreDispersion {
                law,
                corner_hz: 2e6,
                alpha: if law == CoreLaw::Resonance { 0.0 } else { 0.3 },
                beta: if law == CoreLaw::HavriliakNegami {
                    0.7
                } else {
                    1.0
                },
                damping: if law == CoreLaw::Resonance || mixed {
                    0.4
                } else {
                    0.0
                },
                air_fraction: air,
                resonance_hz: if mixed { 20e6 } else { 0.0 },
                resonance_share: if mixed { 0.3 } else { 0.0 },
            }),
        }
    }

    #[test]
    fn the_spectrum_sigma_of_a_single_pole_core_has_its_known_values_at_the_corner() {
        // L0 ‖ Rp: μ = μi/(1 + jx), x = 2πf·L0/Rp. At the corner (x = 1), ∂μ/∂ln L0 = μi/(1 + j)² =
        // −jμi/2 and ∂μ/∂ln Rp = jμi/(1 + j)² = μi/2 (derived by hand): μ′ depends on Rp alone and μ″
        // on L0 alone, so σ(μ′) = μi/2·σ(ln Rp) and σ(μ″) = μi/2·σ(ln L0) whatever their correlation.
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
        let structure = Structure::of(&model);
        let theta = structure.pack(&model);
        let (s_l0, s_rp, rho) = (0.01, 0.03, 0.6);
        let n = theta.len();
        let rp = structure.index(Param::Rp).unwrap();
        let mut cov: DMatrix<f64> = DMatrix::from_diagonal_element(n, n, 1e-4);
        cov[(0, 0)] = s_l0 * s_l0;
        cov[(rp, rp)] = s_rp * s_rp;
        cov[(0, rp)] = rho * s_l0 * s_rp;
        cov[(rp, 0)] = cov[(0, rp)];
        let sigma: Vec<Option<f64>> = (0..n).map(|i| Some(cov[(i, i)].sqrt())).collect();
        let pc = ParameterCovariance::from_fit(&structure, &theta, &cov, &sigma);
        let r = material_report(&model, None, Some(&pc), &c, [fc, fc * 10.0]);
        let p = r.spectrum[0];
        assert_eq!(p.frequency_hz, fc);
        assert!((p.mu_real - mu_i / 2.0).abs() < 1e-9 * mu_i, "{p:?}");
        assert!(
            (p.mu_real_sigma.unwrap() - mu_i / 2.0 * s_rp).abs() < 1e-9,
            "{p:?}"
        );
        assert!(
            (p.mu_imag_sigma.unwrap() - mu_i / 2.0 * s_l0).abs() < 1e-9,
            "{p:?}"
        );
        // A reported σ twice the model's own doubles both.
        let wider: Vec<Option<f64>> = sigma.iter().map(|s| s.map(|s| 2.0 * s)).collect();
        let pc = ParameterCovariance::from_fit(&structure, &theta, &cov, &wider);
        let p = material_report(&model, None, Some(&pc), &c, [fc, fc * 10.0]).spectrum[0];
        assert!(
            (p.mu_real_sigma.unwrap() - mu_i * s_rp).abs() < 1e-9,
            "{p:?}"
        );
        // Rp not determined: μ′ at the corner rests on it and has no σ; μ″ does not, and keeps the
        // marginal σ of L0 (Rp matters in the band, so it is not held fixed).
        let mut unknown = sigma.clone();
        unknown[rp] = None;
        let pc = ParameterCovariance::from_fit(&structure, &theta, &cov, &unknown);
        let p = material_report(&model, None, Some(&pc), &c, [fc, fc * 10.0]).spectrum[0];
        assert_eq!(p.mu_real_sigma, None, "{p:?}");
        assert!(
            (p.mu_imag_sigma.unwrap() - mu_i / 2.0 * s_l0).abs() < 1e-9,
            "{p:?}"
        );
        // Held fixed (as an undetermined parameter without effect in the band is), L0 keeps its
        // conditional σ, s_l0·√(1 − ρ²) (the conditional σ of a bivariate normal).
        let mut held = vec![false; n];
        held[rp] = true;
        let (_, im) = permeability_gradient(&pc, &c, fc).sigma(&pc, &pc.effective(&held));
        let conditional = mu_i / 2.0 * s_l0 * (1.0 - rho * rho).sqrt();
        assert!((im.unwrap() - conditional).abs() < 1e-9, "{im:?}");
    }

    /// μ′ + jμ″ of the material at f for θ, through the model's own Z_core (no derivatives).
    fn mu_at(structure: &Structure, theta: &[f64], c: &Construction, f: f64) -> (f64, f64) {
        let m = structure.unpack(theta);
        let jw = Complex64::new(0.0, 2.0 * PI * f);
        let mu =
            c.material_from_effective(m.core_impedance(f) / jw / c.inductance_per_permeability_h());
        (mu.re, -mu.im)
    }

    #[test]
    fn the_spectrum_sigma_matches_central_differences_for_every_core_and_a_gap() {
        // The analytic gradient against central differences of the model's own Z_core, through the
        // gap formula; then σ = √(gᵀCg) with a full covariance (a test-only check; the product code
        // uses the analytic derivatives only).
        let mut c = toroid(12.0);
        c.gap_m = Some(0.02e-3);
        let mut models = vec![choke_with_rp()];
        for law in [
            CoreLaw::ColeCole,
            CoreLaw::HavriliakNegami,
            CoreLaw::Resonance,
            CoreLaw::ResonanceRelaxation,
        ] {
            models.push(dispersive(law, 0.0));
            models.push(dispersive(law, 0.15));
        }
        for model in &models {
            let structure = Structure::of(model);
            let theta = structure.pack(model);
            let n = theta.len();
            // A correlated covariance: A·Aᵀ with A of small entries.
            let a = DMatrix::from_fn(n, n, |i, j| {
                0.01 * (((i * 7 + j * 3) % 5) as f64 - 2.0) / 2.0
            });
            let cov = &a * a.transpose() + DMatrix::from_diagonal_element(n, n, 1e-5);
            let sigma: Vec<Option<f64>> = (0..n).map(|i| Some(cov[(i, i)].sqrt())).collect();
            let pc = ParameterCovariance::from_fit(&structure, &theta, &cov, &sigma);
            for f in [1e4, 7e5, 2e6, 9e6, 6e7] {
                let h = 1e-6;
                let mut g_re = DVector::zeros(n);
                let mut g_im = DVector::zeros(n);
                for k in 0..n {
                    let mut up = theta.clone();
                    let mut down = theta.clone();
                    up[k] += h;
                    down[k] -= h;
                    let (a, b) = (
                        mu_at(&structure, &up, &c, f),
                        mu_at(&structure, &down, &c, f),
                    );
                    g_re[k] = (a.0 - b.0) / (2.0 * h);
                    g_im[k] = (a.1 - b.1) / (2.0 * h);
                }
                let want_re = (g_re.transpose() * &cov * &g_re)[(0, 0)].sqrt();
                let want_im = (g_im.transpose() * &cov * &g_im)[(0, 0)].sqrt();
                let (got_re, got_im) = spectrum_sigma(&pc, &c, f);
                let label = structure.label();
                let got_re = got_re.unwrap();
                let got_im = got_im.unwrap();
                let scale = mu_at(&structure, &theta, &c, f)
                    .0
                    .hypot(mu_at(&structure, &theta, &c, f).1);
                assert!(
                    (got_re - want_re).abs() < 1e-6 * scale,
                    "{label} at {f}: {got_re} vs {want_re}"
                );
                assert!(
                    (got_im - want_im).abs() < 1e-6 * scale,
                    "{label} at {f}: {got_im} vs {want_im}"
                );
            }
        }
    }

    fn choke_with_rp() -> LumpedModel {
        let mut m = dispersive(CoreLaw::ColeCole, 0.0);
        m.core = None;
        m.rp_ohm = Some(2.0 * PI * 2e6 * m.l0_h);
        m
    }

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
        let r = material_report(&model, None, None, &c, [1e3, 1e6]);
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
        let r = material_report(&model, Some(0.01 * l0), None, &c, [1e4, 1e8]);
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
        let r = material_report(&model, None, None, &c, [1e3, 1e6]);
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
