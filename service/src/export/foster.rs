//! The rational model `Z(s) = d + s·e + Σ r/(s − p)` as a Foster realisation of R, L, C.
//!
//! Series form: each term becomes one cell in series between the pins:
//! - a real pole p = −σ < 0 with residue r > 0: R‖C with C = 1/r, R = r/σ;
//! - a real pole with r < 0: `r/(s+σ) = r/σ + (−r/σ)·s/(s+σ)`, an R‖L cell with R = −r/σ, L = −r/σ²,
//!   whose constant r/σ is taken from `d_ohm` (so `d + Σ r/σ` over these poles must be ≥ 0);
//! - a real pole at s = 0 with r > 0: a series C = 1/r;
//! - a complex pair p = −α ± jβ, r = a ± jb: `(b1·s + b0)/(s² + a1·s + a0)` with b1 = 2a,
//!   b0 = 2(aα − bβ), a1 = 2α, a0 = α² + β². Its real part on the jω axis has the sign of
//!   `b0·a0 + ω²·(b1·a1 − b0)`, so the pair is positive-real exactly when 0 ≤ b0 ≤ a1·b1. Every such pair
//!   is realised by C ‖ Rp ‖ (Rs + L):
//!   `Z = (s/C + Rs/(LC)) / (s² + s·(Rs/L + 1/(Rp·C)) + (1 + Rs/Rp)/(LC))`, giving C = 1/b1,
//!   x = Rs/L = b0/b1, y = 1/(Rp·C) = a1 − x, L = b1/(a0 − x·y) (a0 − x·y = x² − a1·x + a0 > 0 because
//!   the discriminant a1² − 4a0 = −4β² is negative), Rs = x·L, Rp = 1/(y·C). Rs vanishes when b0 = 0
//!   (a plain R‖L‖C tank); Rp vanishes (is infinite) when b0 = a1·b1. In between both resistors are
//!   needed — the case a tank alone cannot realise;
//! - d as a resistor, e as an inductor.
//!
//! A passive model whose terms are not each positive-real (a notch gives a pole pair whose residue has
//! a negative real part, covered by d) gets, in this order:
//! 1. the parallel Foster form: Y = 1/Z expanded the same way (Y's poles are Z's zeros, the
//!    eigenvalues of the state-space zero matrix polished by Newton steps), each term a branch across
//!    the pins, written as the dual of the cell above;
//! 2. a series chain of Z's positive-real terms in series with one parallel-form block holding the
//!    other pole pairs plus the share of d that makes them positive-real together.
//!
//! A model that is not passive (Re Z < 0 somewhere, a pole in the right half-plane, e < 0) is refused
//! with [`ExportError::NotPassive`]; a passive model none of these forms holds with positive elements
//! (e.g. a pair whose real part turns negative at high frequency, b0 > a1·b1, which needs a
//! Bott–Duffin-type network) is refused with [`ExportError::NotRealisable`], naming why each failed.

use super::accuracy::band_accuracy;
use super::netlist::{Netlist, PIN_A, PIN_B, subckt_name};
use super::{ExportContext, ExportError, log_grid, provenance_lines};
use crate::model::rational::{ComplexPole, RealPole};
use crate::model::{ImpedanceModel, RationalModel};
use num_complex::Complex64;
use serde::Serialize;
use std::f64::consts::PI;

/// One cell of the series Foster chain.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(tag = "cell", rename_all = "snake_case")]
pub enum FosterCell {
    Resistor {
        r_ohm: f64,
    },
    Inductor {
        l_h: f64,
    },
    Capacitor {
        c_f: f64,
    },
    /// R ‖ C (a real pole with positive residue).
    RParallelC {
        r_ohm: f64,
        c_f: f64,
    },
    /// R ‖ L (a real pole with negative residue).
    RParallelL {
        r_ohm: f64,
        l_h: f64,
    },
    /// C ‖ Rp ‖ (Rs + L) (a complex pole pair); `None` marks an absent resistor.
    Resonator {
        c_f: f64,
        rp_ohm: Option<f64>,
        rs_ohm: Option<f64>,
        l_h: f64,
    },
}

impl FosterCell {
    pub fn impedance(&self, frequency_hz: f64) -> Complex64 {
        let jw = Complex64::new(0.0, 2.0 * PI * frequency_hz);
        match *self {
            FosterCell::Resistor { r_ohm } => r_ohm.into(),
            FosterCell::Inductor { l_h } => jw * l_h,
            FosterCell::Capacitor { c_f } => (jw * c_f).inv(),
            FosterCell::RParallelC { r_ohm, c_f } => (1.0 / r_ohm + jw * c_f).inv(),
            FosterCell::RParallelL { r_ohm, l_h } => (1.0 / r_ohm + (jw * l_h).inv()).inv(),
            FosterCell::Resonator {
                c_f,
                rp_ohm,
                rs_ohm,
                l_h,
            } => {
                let mut y = jw * c_f + (rs_ohm.unwrap_or(0.0) + jw * l_h).inv();
                if let Some(rp) = rp_ohm {
                    y += 1.0 / rp;
                }
                y.inv()
            }
        }
    }
}

/// Which Foster form a realisation takes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FosterForm {
    /// Cells of Z's partial fractions in series between the pins.
    Series,
    /// Cells of Y = 1/Z's partial fractions as branches in parallel across the pins. Each cell is
    /// stored as the impedance cell of the same algebra and written as its dual network (series ↔
    /// parallel, L ↔ C of equal value, R ↔ a resistor of conductance R).
    Parallel,
    /// The positive-real terms of Z as a series chain (`cells`), in series with one parallel-form
    /// block (`block`) realising the remaining terms plus the share of `d_ohm` that makes them
    /// positive-real together.
    Mixed,
}

/// A Foster realisation of a rational model.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FosterRealisation {
    pub form: FosterForm,
    pub cells: Vec<FosterCell>,
    /// The parallel-form block of a [`FosterForm::Mixed`] realisation (Y-cells), else empty.
    pub block: Vec<FosterCell>,
}

impl ImpedanceModel for FosterRealisation {
    fn impedance(&self, frequency_hz: f64) -> Complex64 {
        let sum: Complex64 = self.cells.iter().map(|c| c.impedance(frequency_hz)).sum();
        match self.form {
            FosterForm::Series => sum,
            FosterForm::Parallel => sum.inv(),
            FosterForm::Mixed => {
                let y: Complex64 = self.block.iter().map(|c| c.impedance(frequency_hz)).sum();
                sum + y.inv()
            }
        }
    }
}

/// Relative tolerance for a term that sits on the boundary of positive-realness (rounding in the fit).
const EDGE_TOL: f64 = 1e-9;

/// Checks passivity and builds the series Foster chain of Z's partial fractions; when one of Z's terms
/// is not positive-real on its own (a notch, for instance, gives a pole pair with a negative residue),
/// the parallel form from Y = 1/Z's partial fractions instead.
pub fn foster_realisation(m: &RationalModel) -> Result<FosterRealisation, ExportError> {
    check_finite(m)?;
    let cleaned = without_negligible_terms(m);
    let m = &cleaned;
    check_passive(m)?;
    let series_err = match terms_to_cells(m) {
        Ok(cells) => {
            return Ok(FosterRealisation {
                form: FosterForm::Series,
                cells,
                block: Vec::new(),
            });
        }
        Err(ExportError::NotRealisable(e)) => e,
        Err(e) => return Err(e),
    };
    let parallel_err = match admittance_expansion(m).and_then(|y| {
        terms_to_cells(&y).map_err(|e| match e {
            ExportError::NotRealisable(s) => s,
            other => other.to_string(),
        })
    }) {
        Ok(cells) => {
            return Ok(FosterRealisation {
                form: FosterForm::Parallel,
                cells,
                block: Vec::new(),
            });
        }
        Err(e) => e,
    };
    mixed_realisation(m).map_err(|mixed_err| {
        ExportError::NotRealisable(format!(
            "series form: {series_err}; parallel form (from Y = 1/Z): {parallel_err}; \
             series chain with a parallel block: {mixed_err}"
        ))
    })
}

/// The pole pairs of Z that are not positive-real alone, with just enough of `d_ohm` to make them
/// positive-real together, realised in parallel form; everything else in series form.
fn mixed_realisation(m: &RationalModel) -> Result<FosterRealisation, String> {
    let failing: Vec<usize> = (0..m.complex_poles.len())
        .filter(|&i| {
            let one = RationalModel {
                d_ohm: 0.0,
                e_h: 0.0,
                real_poles: vec![],
                complex_poles: vec![m.complex_poles[i]],
            };
            terms_to_cells(&one).is_err()
        })
        .collect();
    if failing.is_empty() {
        return Err("no pole pair to move into a parallel block".to_string());
    }
    let mut rest = RationalModel {
        d_ohm: 0.0,
        e_h: 0.0,
        real_poles: vec![],
        complex_poles: failing.iter().map(|&i| m.complex_poles[i]).collect(),
    };
    let min_re = min_real_part(&rest);
    let y_of = |rest: &RationalModel| -> Result<Vec<FosterCell>, String> {
        let y = admittance_expansion(rest)?;
        terms_to_cells(&y).map_err(|e| e.to_string())
    };
    let mut last_err = String::new();
    // The share of d moved into the block: what makes the block positive-real plus a part of the
    // spare resistance (it costs nothing, the sum stays d, and it keeps Y's poles — Z's zeros — off
    // the jω axis, where they would be lossless and hard to locate).
    let need = (-min_re).max(0.0);
    let spare = (m.d_ohm - need).max(0.0);
    for t in [0.5, 0.1, 1e-2, 1e-4, 1e-6] {
        rest.d_ohm = need + t * spare;
        let series = RationalModel {
            d_ohm: m.d_ohm - rest.d_ohm,
            e_h: m.e_h,
            real_poles: m.real_poles.clone(),
            complex_poles: (0..m.complex_poles.len())
                .filter(|i| !failing.contains(i))
                .map(|i| m.complex_poles[i])
                .collect(),
        };
        let cells = match terms_to_cells(&series) {
            Ok(c) => c,
            Err(e) => {
                last_err = e.to_string();
                continue;
            }
        };
        match y_of(&rest) {
            Ok(block) => {
                return Ok(if cells.is_empty() {
                    FosterRealisation {
                        form: FosterForm::Parallel,
                        cells: block,
                        block: Vec::new(),
                    }
                } else {
                    FosterRealisation {
                        form: FosterForm::Mixed,
                        cells,
                        block,
                    }
                });
            }
            Err(e) => last_err = e,
        }
    }
    Err(last_err)
}

/// min over ω of Re Z(jω), on a dense grid spanning the poles and resolving each resonance.
fn min_real_part(m: &RationalModel) -> f64 {
    let mags: Vec<f64> = m
        .real_poles
        .iter()
        .map(|p| p.pole_rad_per_s.abs())
        .chain(m.complex_poles.iter().map(|p| p.pole_rad_per_s.norm()))
        .filter(|&w| w > 0.0)
        .map(|w| w / (2.0 * PI))
        .collect();
    let lo = mags.iter().copied().fold(f64::INFINITY, f64::min) / 1e3;
    let hi = mags.iter().copied().fold(0.0f64, f64::max) * 1e3;
    if !(lo.is_finite() && hi > lo) {
        return 0.0;
    }
    let mut grid = log_grid(lo, hi, ((hi / lo).log10() * 200.0).ceil() as usize + 2);
    for p in &m.complex_poles {
        let fr = p.pole_rad_per_s.im / (2.0 * PI);
        let width = -p.pole_rad_per_s.re / (2.0 * PI);
        for k in -400..=400 {
            let f = fr + width * k as f64 / 50.0;
            if f > 0.0 {
                grid.push(f);
            }
        }
    }
    grid.iter()
        .map(|&f| m.impedance(f).re)
        .fold(f64::INFINITY, f64::min)
}

/// `d_ohm` and `e_h` below 1e-12 of the model's impedance scale (a vector fit leaves such residue-level
/// values, 1e-20 Ω or 1e-22 H) are set to zero: written as elements they would change nothing but make
/// a simulator's matrix needlessly ill-conditioned. The error stated is measured after this.
fn without_negligible_terms(m: &RationalModel) -> RationalModel {
    let w_max = m
        .real_poles
        .iter()
        .map(|p| p.pole_rad_per_s.abs())
        .chain(m.complex_poles.iter().map(|p| p.pole_rad_per_s.norm()))
        .fold(0.0f64, f64::max);
    let z_scale = m
        .real_poles
        .iter()
        .map(|p| p.pole_rad_per_s.abs())
        .chain(m.complex_poles.iter().map(|p| p.pole_rad_per_s.norm()))
        .map(|w| m.impedance(w / (2.0 * PI)).norm())
        .filter(|z| z.is_finite())
        .fold(0.0f64, f64::max);
    let mut out = m.clone();
    if z_scale > 0.0 {
        if out.d_ohm.abs() < 1e-12 * z_scale {
            out.d_ohm = 0.0;
        }
        if out.e_h.abs() * w_max < 1e-12 * z_scale {
            out.e_h = 0.0;
        }
    }
    out
}

/// Each partial-fraction term of `m` (read as an impedance) as a positive-element cell.
fn terms_to_cells(m: &RationalModel) -> Result<Vec<FosterCell>, ExportError> {
    let (mut cells, d) = real_pole_cells(m)?;
    for (i, p) in m.complex_poles.iter().enumerate() {
        cells.push(pair_cell(i, p)?);
    }
    if m.e_h > 0.0 {
        cells.insert(0, FosterCell::Inductor { l_h: m.e_h });
    }
    if d > 0.0 {
        cells.insert(0, FosterCell::Resistor { r_ohm: d });
    }
    if cells.is_empty() {
        return Err(ExportError::NotRealisable(
            "the model is identically zero (a short circuit)".to_string(),
        ));
    }
    check_element_values(&cells)?;
    Ok(cells)
}

/// The cells of the real poles, and the share of `d_ohm` left for a series resistor once the R‖L
/// cells' constant parts are taken from it (refused when that share is negative).
fn real_pole_cells(m: &RationalModel) -> Result<(Vec<FosterCell>, f64), ExportError> {
    let mut cells = Vec::new();
    let mut d = m.d_ohm;
    let mut d_scale = m.d_ohm.abs();
    for p in &m.real_poles {
        let (pole, r) = (p.pole_rad_per_s, p.residue_ohm_rad_per_s);
        if r == 0.0 {
            continue;
        }
        if pole == 0.0 {
            cells.push(FosterCell::Capacitor { c_f: 1.0 / r });
            continue;
        }
        let sigma = -pole;
        if r > 0.0 {
            cells.push(FosterCell::RParallelC {
                r_ohm: r / sigma,
                c_f: 1.0 / r,
            });
        } else {
            let r_ohm = -r / sigma;
            cells.push(FosterCell::RParallelL {
                r_ohm,
                l_h: r_ohm / sigma,
            });
            d += r / sigma;
            d_scale += r_ohm;
        }
    }
    if d < 0.0 && d >= -EDGE_TOL * d_scale {
        d = 0.0;
    }
    if d < 0.0 {
        return Err(ExportError::NotRealisable(format!(
            "d_ohm + Σ r/σ over the real poles with negative residue = {d:e} ohm < 0 (the R‖L cells' \
             constant parts need more series resistance than d_ohm = {:e} holds)",
            m.d_ohm
        )));
    }
    Ok((cells, d))
}

/// The C ‖ Rp ‖ (Rs + L) cell of `complex_poles[i]` (see the module notes), refused when the pair
/// is not positive-real.
fn pair_cell(i: usize, p: &ComplexPole) -> Result<FosterCell, ExportError> {
    let (alpha, beta) = (-p.pole_rad_per_s.re, p.pole_rad_per_s.im);
    let (a, b) = (p.residue_ohm_rad_per_s.re, p.residue_ohm_rad_per_s.im);
    let b1 = 2.0 * a;
    let mut b0 = 2.0 * (a * alpha - b * beta);
    let a1 = 2.0 * alpha;
    let a0 = alpha * alpha + beta * beta;
    let edge = EDGE_TOL
        * (a1 * b1)
            .abs()
            .max(2.0 * (a * alpha).abs() + 2.0 * (b * beta).abs());
    if b1 <= 0.0 {
        return Err(ExportError::NotRealisable(format!(
            "complex_poles[{i}] (s/2π = {:e} ± j{:e} Hz): 2·Re(residue) = {b1:e} ≤ 0",
            -alpha / (2.0 * PI),
            beta / (2.0 * PI)
        )));
    }
    // On the edge within rounding: snap, so no resistor of 1e-16 Ω (or 1e16 Ω) is written; such a
    // value would only make a simulator's matrix ill-conditioned.
    if b0.abs() <= edge {
        b0 = 0.0;
    }
    if (b0 - a1 * b1).abs() <= edge {
        b0 = a1 * b1;
    }
    if b0 < 0.0 || b0 > a1 * b1 {
        return Err(ExportError::NotRealisable(format!(
            "complex_poles[{i}] (s/2π = {:e} ± j{:e} Hz): its pair term (b1·s + b0)/(s² + a1·s + a0) \
             has b0 = {b0:e} outside [0, a1·b1 = {:e}], so its real part is negative at {} \
             frequencies",
            -alpha / (2.0 * PI),
            beta / (2.0 * PI),
            a1 * b1,
            if b0 < 0.0 { "low" } else { "high" }
        )));
    }
    let c_f = 1.0 / b1;
    let x = b0 / b1;
    let y = (a1 - x).max(0.0);
    let l_h = b1 / (a0 - x * y);
    let rs = x * l_h;
    let rp = 1.0 / (y * c_f);
    Ok(FosterCell::Resonator {
        c_f,
        rp_ohm: (y > 0.0).then_some(rp),
        rs_ohm: (x > 0.0).then_some(rs),
        l_h,
    })
}

/// Refuses a cell whose element values (an absent resistor aside) are not positive and finite.
fn check_element_values(cells: &[FosterCell]) -> Result<(), ExportError> {
    for (i, cell) in cells.iter().enumerate() {
        let values = match *cell {
            FosterCell::Resistor { r_ohm } => vec![r_ohm],
            FosterCell::Inductor { l_h } => vec![l_h],
            FosterCell::Capacitor { c_f } => vec![c_f],
            FosterCell::RParallelC { r_ohm, c_f } => vec![r_ohm, c_f],
            FosterCell::RParallelL { r_ohm, l_h } => vec![r_ohm, l_h],
            FosterCell::Resonator {
                c_f,
                rp_ohm,
                rs_ohm,
                l_h,
            } => vec![c_f, l_h, rp_ohm.unwrap_or(1.0), rs_ohm.unwrap_or(1.0)],
        };
        if values.iter().any(|v| !(v.is_finite() && *v > 0.0)) {
            return Err(ExportError::NotRealisable(format!(
                "cell {i} ({cell:?}) would need an element value outside the floating-point range"
            )));
        }
    }
    Ok(())
}

/// Z(s) = d + s·e + Σ r/(s − p) with every pole listed, conjugates of the complex pairs included.
struct PoleResidues {
    poles: Vec<Complex64>,
    residues: Vec<Complex64>,
    d_ohm: f64,
    e_h: f64,
}

impl PoleResidues {
    fn new(m: &RationalModel) -> PoleResidues {
        let mut poles: Vec<Complex64> = Vec::new();
        let mut residues: Vec<Complex64> = Vec::new();
        for p in &m.real_poles {
            poles.push(p.pole_rad_per_s.into());
            residues.push(p.residue_ohm_rad_per_s.into());
        }
        for p in &m.complex_poles {
            poles.push(p.pole_rad_per_s);
            residues.push(p.residue_ohm_rad_per_s);
            poles.push(p.pole_rad_per_s.conj());
            residues.push(p.residue_ohm_rad_per_s.conj());
        }
        PoleResidues {
            poles,
            residues,
            d_ohm: m.d_ohm,
            e_h: m.e_h,
        }
    }

    fn z(&self, s: Complex64) -> Complex64 {
        let mut z = self.d_ohm + s * self.e_h;
        for (p, r) in self.poles.iter().zip(&self.residues) {
            z += r / (s - p);
        }
        z
    }

    /// dZ/ds.
    fn dz(&self, s: Complex64) -> Complex64 {
        let mut dz = Complex64::new(self.e_h, 0.0);
        for (p, r) in self.poles.iter().zip(&self.residues) {
            dz -= r / ((s - p) * (s - p));
        }
        dz
    }
}

/// Y = 1/Z in the same pole-residue form: Y's poles are Z's zeros, found as the eigenvalues of the
/// state-space zero matrix (A − B·C/d, or its pencil forms when d = 0 or e > 0), polished by Newton
/// steps on Z itself; residues 1/Z'(z).
fn admittance_expansion(m: &RationalModel) -> Result<RationalModel, String> {
    let z = PoleResidues::new(m);
    let scale = z
        .poles
        .iter()
        .map(|p| p.norm())
        .fold(0.0f64, f64::max)
        .max(f64::MIN_POSITIVE);
    let (mut zeros, d_y, e_y) = zeros_of(&z)?;
    for zero in zeros.iter_mut() {
        polish_zero(&z, zero, scale);
    }
    let (real_poles, complex_poles) = admittance_poles(&z, &zeros, scale)?;
    Ok(RationalModel {
        d_ohm: d_y,
        e_h: e_y,
        real_poles,
        complex_poles,
    })
}

/// Z's zeros as the eigenvalues of the state-space zero matrix, with Y's constant and
/// proportional terms (d and e of Y = 1/Z).
fn zeros_of(z: &PoleResidues) -> Result<(Vec<Complex64>, f64, f64), String> {
    use nalgebra::DMatrix;
    let (poles, residues) = (&z.poles, &z.residues);
    let n = poles.len();
    let m1: Complex64 = residues.iter().sum();
    let m2: Complex64 = poles.iter().zip(residues).map(|(p, r)| p * r).sum();
    let zero = Complex64::new(0.0, 0.0);
    if z.e_h > 0.0 {
        // Pencil [[A, B], [C, d]] − s·diag(I, −e): eig of [[A, B], [−C/e, −d/e]].
        let mat = DMatrix::from_fn(n + 1, n + 1, |i, j| match (i < n, j < n) {
            (true, true) => {
                if i == j {
                    poles[i]
                } else {
                    zero
                }
            }
            (true, false) => Complex64::new(1.0, 0.0),
            (false, true) => -residues[j] / z.e_h,
            (false, false) => Complex64::new(-z.d_ohm / z.e_h, 0.0),
        });
        Ok((eigenvalues(mat)?, 0.0, 0.0))
    } else if z.d_ohm > 0.0 {
        let mat = DMatrix::from_fn(n, n, |i, j| {
            let diag = if i == j { poles[i] } else { zero };
            diag - residues[j] / z.d_ohm
        });
        Ok((eigenvalues(mat)?, 1.0 / z.d_ohm, 0.0))
    } else {
        if m1.re.is_nan() || m1.re <= 0.0 {
            return Err("Z vanishes at infinity without a positive sum of residues".to_string());
        }
        // (I − B·(CB)⁻¹·C)·A has the n − 1 zeros and one spurious eigenvalue at 0.
        let mat = DMatrix::from_fn(n, n, |i, j| {
            let proj = if i == j { 1.0.into() } else { zero } - residues[j] / m1;
            proj * poles[j]
        });
        let mut ev = eigenvalues(mat)?;
        let k = (0..ev.len())
            .min_by(|&a, &b| ev[a].norm().total_cmp(&ev[b].norm()))
            .ok_or("no zeros")?;
        ev.remove(k);
        Ok((ev, (-m2 / (m1 * m1)).re, 1.0 / m1.re))
    }
}

/// Newton steps on Z from `zero` while they lower |Z|; a zero within 1e-12 of `scale` of the
/// origin is set to it.
fn polish_zero(z: &PoleResidues, zero: &mut Complex64, scale: f64) {
    for _ in 0..30 {
        let step = z.z(*zero) / z.dz(*zero);
        if !(step.re.is_finite() && step.im.is_finite()) {
            break;
        }
        let next = *zero - step;
        if z.z(next).norm() >= z.z(*zero).norm() {
            break;
        }
        *zero = next;
    }
    if zero.norm() < 1e-12 * scale {
        *zero = Complex64::new(0.0, 0.0);
    }
}

/// Z's zeros as Y's poles with residues 1/Z'(zero): real ones, and one of each conjugate pair.
/// Refused when a zero lies in the right half-plane or the pairs do not match up.
fn admittance_poles(
    z: &PoleResidues,
    zeros: &[Complex64],
    scale: f64,
) -> Result<(Vec<RealPole>, Vec<ComplexPole>), String> {
    let mut real_poles = Vec::new();
    let mut complex_poles = Vec::new();
    let mut n_upper = 0;
    let mut n_lower = 0;
    for &zero in zeros {
        if zero.re > 1e-6 * scale.max(zero.norm()) {
            return Err(format!(
                "Z has a zero in the right half-plane at {zero} rad/s"
            ));
        }
        let rho = z.dz(zero).inv();
        if zero.im.abs() <= 1e-9 * zero.norm().max(f64::MIN_POSITIVE) {
            real_poles.push(RealPole {
                pole_rad_per_s: zero.re.min(0.0),
                residue_ohm_rad_per_s: rho.re,
            });
        } else if zero.im > 0.0 {
            n_upper += 1;
            complex_poles.push(ComplexPole {
                pole_rad_per_s: Complex64::new(zero.re.min(0.0), zero.im),
                residue_ohm_rad_per_s: rho,
            });
        } else {
            n_lower += 1;
        }
    }
    if n_upper != n_lower {
        return Err("the zeros of Z do not come in conjugate pairs (numerically lost)".to_string());
    }
    Ok((real_poles, complex_poles))
}

fn eigenvalues(mat: nalgebra::DMatrix<Complex64>) -> Result<Vec<Complex64>, String> {
    if mat.nrows() == 0 {
        return Ok(Vec::new());
    }
    mat.schur()
        .eigenvalues()
        .map(|v| v.iter().copied().collect())
        .ok_or_else(|| "the eigenvalue solve for Z's zeros did not converge".to_string())
}

fn check_finite(m: &RationalModel) -> Result<(), ExportError> {
    let bad = |name: String, value: f64| {
        Err(ExportError::InvalidParameter {
            name,
            value,
            reason: "not a finite number",
        })
    };
    if !m.d_ohm.is_finite() {
        return bad("d_ohm".into(), m.d_ohm);
    }
    if !m.e_h.is_finite() {
        return bad("e_h".into(), m.e_h);
    }
    for (i, p) in m.real_poles.iter().enumerate() {
        for (name, v) in [
            ("pole_rad_per_s", p.pole_rad_per_s),
            ("residue_ohm_rad_per_s", p.residue_ohm_rad_per_s),
        ] {
            if !v.is_finite() {
                return bad(format!("real_poles[{i}].{name}"), v);
            }
        }
    }
    for (i, p) in m.complex_poles.iter().enumerate() {
        for (name, v) in [
            ("pole_rad_per_s.re", p.pole_rad_per_s.re),
            ("pole_rad_per_s.im", p.pole_rad_per_s.im),
            ("residue_ohm_rad_per_s.re", p.residue_ohm_rad_per_s.re),
            ("residue_ohm_rad_per_s.im", p.residue_ohm_rad_per_s.im),
        ] {
            if !v.is_finite() {
                return bad(format!("complex_poles[{i}].{name}"), v);
            }
        }
        if p.pole_rad_per_s.im <= 0.0 {
            return Err(ExportError::InvalidParameter {
                name: format!("complex_poles[{i}].pole_rad_per_s.im"),
                value: p.pole_rad_per_s.im,
                reason: "the stored member of a conjugate pair must have a positive imaginary part",
            });
        }
    }
    Ok(())
}

/// Positive-realness: poles in the closed left half-plane (on the axis only at s = 0 with a positive
/// residue), a non-negative residue at infinity, and Re Z(jω) ≥ 0 on a dense grid spanning every pole.
fn check_passive(m: &RationalModel) -> Result<(), ExportError> {
    if m.e_h < 0.0 {
        return Err(ExportError::NotPassive(format!(
            "e_h = {:e} H < 0: a passive impedance cannot fall like a negative inductance at high frequency",
            m.e_h
        )));
    }
    for (i, p) in m.real_poles.iter().enumerate() {
        if p.pole_rad_per_s > 0.0 {
            return Err(ExportError::NotPassive(format!(
                "real_poles[{i}] = {:e} rad/s lies in the right half-plane (unstable)",
                p.pole_rad_per_s
            )));
        }
        if p.pole_rad_per_s == 0.0 && p.residue_ohm_rad_per_s < 0.0 {
            return Err(ExportError::NotPassive(format!(
                "real_poles[{i}] at s = 0 has a negative residue {:e}",
                p.residue_ohm_rad_per_s
            )));
        }
    }
    for (i, p) in m.complex_poles.iter().enumerate() {
        if p.pole_rad_per_s.re >= 0.0 {
            return Err(ExportError::NotPassive(format!(
                "complex_poles[{i}] = {} rad/s is not in the open left half-plane",
                p.pole_rad_per_s
            )));
        }
    }
    let mags: Vec<f64> = m
        .real_poles
        .iter()
        .map(|p| p.pole_rad_per_s.abs())
        .chain(m.complex_poles.iter().map(|p| p.pole_rad_per_s.norm()))
        .filter(|&w| w > 0.0)
        .map(|w| w / (2.0 * PI))
        .collect();
    let lo = mags.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = mags.iter().copied().fold(0.0f64, f64::max);
    if hi == 0.0 {
        return Ok(());
    }
    let (lo, hi) = (lo / 1e3, hi * 1e3);
    let mut grid = log_grid(lo, hi, ((hi / lo).log10() * 100.0).ceil() as usize + 2);
    for p in &m.complex_poles {
        let fr = p.pole_rad_per_s.im / (2.0 * PI);
        let width = -p.pole_rad_per_s.re / (2.0 * PI);
        for k in -40..=40 {
            let f = fr + width * k as f64 / 10.0;
            if f > 0.0 {
                grid.push(f);
            }
        }
    }
    let scale = grid
        .iter()
        .map(|&f| m.impedance(f).norm())
        .fold(0.0f64, f64::max);
    for &f in &grid {
        let re = m.impedance(f).re;
        if re < -1e-12 * scale {
            return Err(ExportError::NotPassive(format!(
                "Re Z = {re:e} ohm < 0 at {f:e} Hz"
            )));
        }
    }
    Ok(())
}

/// Writes `model` as a `.SUBCKT` of its series Foster realisation, or refuses a model that is not
/// passive or not realisable this way.
pub fn rational_subcircuit(
    model: &RationalModel,
    ctx: &ExportContext,
) -> Result<String, ExportError> {
    let band = ctx.checked_band()?;
    let real = foster_realisation(model)?;
    let mut net = Netlist::new();
    match real.form {
        FosterForm::Series => write_series(&mut net, &real.cells, PIN_A, PIN_B),
        FosterForm::Parallel => write_parallel(&mut net, &real.cells, PIN_A, PIN_B),
        FosterForm::Mixed => {
            let x = net.node();
            write_series(&mut net, &real.cells, PIN_A, x);
            write_parallel(&mut net, &real.block, x, PIN_B);
        }
    }
    let accuracy = band_accuracy(|f| model.impedance(f), |f| real.impedance(f), &net, band)?;

    net.comment(
        "henrybook rational (pole-residue) model as a passive Foster subcircuit (R, L, C only)",
    );
    for line in provenance_lines(ctx) {
        net.comment(line);
    }
    net.comment(format!(
        "model: d_ohm={:e} e_h={:e}, {} real poles, {} complex pole pairs",
        model.d_ohm,
        model.e_h,
        model.real_poles.len(),
        model.complex_poles.len()
    ));
    match real.form {
        FosterForm::Series => {
            net.comment(
                "series Foster form of Z: RD = d (less the R||L cells' constants), LE = e, RAn||CAn and RBn||LBn per real pole,",
            );
            net.comment(
                "  CZn per pole at s = 0, CQn || RQPn || (RQSn + LQn) per complex pole pair",
            );
        }
        FosterForm::Parallel => {
            net.comment(
                "parallel Foster form of Y = 1/Z (a term of Z alone was not positive-real): branches across the pins,",
            );
            parallel_legend(&mut net);
        }
        FosterForm::Mixed => {
            net.comment(
                "series Foster chain of Z's positive-real terms (RD, LE, RAn||CAn, RBn||LBn, CZn, CQn || RQPn || (RQSn + LQn)),",
            );
            net.comment(
                "  in series with a parallel Foster block of Y for the pole pairs that are not positive-real alone:",
            );
            parallel_legend(&mut net);
        }
    }
    accuracy.comments(&mut net);
    net.comment("pins: 1 and 2; values in ohm, henry, farad");
    net.comment("");

    Ok(net.render(&subckt_name(ctx.part_number.as_deref())))
}

fn parallel_legend(net: &mut Netlist) {
    net.comment(
        "  RYG = 1/Y(inf), CYE, RYAn+LYAn and RYBn+CYBn per real pole of Y, LYZn per pole of Y at s = 0,",
    );
    net.comment("  LYQn + RYQPn + (CYQn || RYQSn) per complex pole pair of Y (the zeros of Z)");
}

fn write_series(net: &mut Netlist, cells: &[FosterCell], from: u32, to: u32) {
    let n_cells = cells.len();
    let mut at = from;
    let (mut n_rc, mut n_rl, mut n_c, mut n_q) = (0, 0, 0, 0);
    for (i, cell) in cells.iter().enumerate() {
        let next = if i + 1 == n_cells { to } else { net.node() };
        match *cell {
            FosterCell::Resistor { r_ohm } => net.element("RD", at, next, r_ohm),
            FosterCell::Inductor { l_h } => net.element("LE", at, next, l_h),
            FosterCell::Capacitor { c_f } => {
                n_c += 1;
                net.element(&format!("CZ{n_c}"), at, next, c_f);
            }
            FosterCell::RParallelC { r_ohm, c_f } => {
                n_rc += 1;
                net.element(&format!("RA{n_rc}"), at, next, r_ohm);
                net.element(&format!("CA{n_rc}"), at, next, c_f);
            }
            FosterCell::RParallelL { r_ohm, l_h } => {
                n_rl += 1;
                net.element(&format!("RB{n_rl}"), at, next, r_ohm);
                net.element(&format!("LB{n_rl}"), at, next, l_h);
            }
            FosterCell::Resonator {
                c_f,
                rp_ohm,
                rs_ohm,
                l_h,
            } => {
                n_q += 1;
                net.element(&format!("CQ{n_q}"), at, next, c_f);
                if let Some(rp) = rp_ohm {
                    net.element(&format!("RQP{n_q}"), at, next, rp);
                }
                match rs_ohm {
                    Some(rs) => {
                        let mid = net.node();
                        net.element(&format!("RQS{n_q}"), at, mid, rs);
                        net.element(&format!("LQ{n_q}"), mid, next, l_h);
                    }
                    None => net.element(&format!("LQ{n_q}"), at, next, l_h),
                }
            }
        }
        at = next;
    }
}

/// The dual of each cell as a branch across the pins: series ↔ parallel, an impedance-cell
/// capacitor of c farad becomes an inductor of c henry (and L → C), a resistor of r ohm becomes a
/// resistor of 1/r ohm.
fn write_parallel(net: &mut Netlist, cells: &[FosterCell], a: u32, b: u32) {
    let (mut n_rc, mut n_rl, mut n_c, mut n_q) = (0, 0, 0, 0);
    for cell in cells {
        match *cell {
            FosterCell::Resistor { r_ohm } => net.element("RYG", a, b, 1.0 / r_ohm),
            FosterCell::Inductor { l_h } => net.element("CYE", a, b, l_h),
            FosterCell::Capacitor { c_f } => {
                n_c += 1;
                net.element(&format!("LYZ{n_c}"), a, b, c_f);
            }
            FosterCell::RParallelC { r_ohm, c_f } => {
                n_rc += 1;
                let mid = net.node();
                net.element(&format!("RYA{n_rc}"), a, mid, 1.0 / r_ohm);
                net.element(&format!("LYA{n_rc}"), mid, b, c_f);
            }
            FosterCell::RParallelL { r_ohm, l_h } => {
                n_rl += 1;
                let mid = net.node();
                net.element(&format!("RYB{n_rl}"), a, mid, 1.0 / r_ohm);
                net.element(&format!("CYB{n_rl}"), mid, b, l_h);
            }
            FosterCell::Resonator {
                c_f,
                rp_ohm,
                rs_ohm,
                l_h,
            } => {
                n_q += 1;
                let mut at = net.node();
                net.element(&format!("LYQ{n_q}"), a, at, c_f);
                if let Some(rp) = rp_ohm {
                    let next = net.node();
                    net.element(&format!("RYQP{n_q}"), at, next, 1.0 / rp);
                    at = next;
                }
                net.element(&format!("CYQ{n_q}"), at, b, l_h);
                if let Some(rs) = rs_ohm {
                    net.element(&format!("RYQS{n_q}"), at, b, 1.0 / rs);
                }
            }
        }
    }
}
