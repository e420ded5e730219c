//! The rational model `Z(s) = d + s·e + Σ r/(s − p)` as a series Foster realisation of R, L, C.
//!
//! Each term becomes one cell in series between the pins:
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
//! A model that is not passive (Re Z < 0 somewhere, a pole in the right half-plane, e < 0) is refused
//! with [`ExportError::NotPassive`]; a passive model whose terms are not each positive-real (possible
//! when one term's negative real part is covered by another's) is refused with
//! [`ExportError::NotRealisable`], since this series form cannot hold it with positive elements.

use super::netlist::{Netlist, PIN_A, PIN_B, subckt_name};
use super::spice::ERROR_BOUND_KEY;
use super::{
    ExportContext, ExportError, grid_with_resonances, log_grid, provenance_lines, resonances,
    stated_bound,
};
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

/// The series chain realising a rational model.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FosterRealisation {
    pub cells: Vec<FosterCell>,
}

impl ImpedanceModel for FosterRealisation {
    fn impedance(&self, frequency_hz: f64) -> Complex64 {
        self.cells.iter().map(|c| c.impedance(frequency_hz)).sum()
    }
}

/// Relative tolerance for a term that sits on the boundary of positive-realness (rounding in the fit).
const EDGE_TOL: f64 = 1e-9;

/// Checks passivity and builds the series Foster chain.
pub fn foster_realisation(m: &RationalModel) -> Result<FosterRealisation, ExportError> {
    check_finite(m)?;
    check_passive(m)?;
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
    for (i, p) in m.complex_poles.iter().enumerate() {
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
        cells.push(FosterCell::Resonator {
            c_f,
            rp_ohm: (y > 0.0).then_some(rp),
            rs_ohm: (x > 0.0).then_some(rs),
            l_h,
        });
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
    Ok(FosterRealisation { cells })
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
    let [lo, hi] = ctx.checked_band()?;
    let real = foster_realisation(model)?;
    let model_z = |f: f64| model.impedance(f);
    let res = resonances(&model_z, lo, hi);
    let check = grid_with_resonances(lo, hi, 200.0, 400, 6000, &res, 300);
    let mut max_err = 0.0f64;
    let mut max_err_at = lo;
    let mut spread = 1.0f64;
    for &f in &check {
        let z_model = model.impedance(f);
        if z_model.norm() == 0.0 || !z_model.norm().is_finite() {
            return Err(ExportError::NotFinite { frequency_hz: f });
        }
        let smallest = real
            .cells
            .iter()
            .flat_map(|c| {
                let rs = match c {
                    FosterCell::Resonator {
                        rs_ohm: Some(rs), ..
                    } => *rs,
                    _ => f64::INFINITY,
                };
                [c.impedance(f).norm(), rs]
            })
            .fold(f64::INFINITY, f64::min);
        spread = spread.max(z_model.norm() / smallest);
        let e = (real.impedance(f) - z_model).norm() / z_model.norm();
        if e > max_err {
            max_err = e;
            max_err_at = f;
        }
    }
    let bound = stated_bound(max_err, spread);

    let mut net = Netlist::new();
    net.comment("henrybook rational (pole-residue) model as a passive series Foster subcircuit (R, L, C only)");
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
    net.comment(
        "cells in series: RD = d (less the R||L cells' constants), LE = e, RAn||CAn and RBn||LBn per real pole,",
    );
    net.comment("  CZn per pole at s = 0, CQn || RQPn || (RQSn + LQn) per complex pole pair");
    net.comment(format!(
        "whole subcircuit: max |Z_net - Z_model| / |Z_model| = {max_err:.3e} (at {max_err_at:.4e} Hz, {} points: log-spaced over the band and dense around its {} resonances)",
        check.len(),
        res.len()
    ));
    net.comment(format!(
        "stated error = 1.25 x that maximum + 2e-15 x max |Z|/|z_series| (= {spread:.3e}: a simulator's rounding, z_series the smallest cell impedance in series) + 1e-9"
    ));
    net.comment(format!("{ERROR_BOUND_KEY} {bound:.3e}"));
    net.comment("pins: 1 and 2; values in ohm, henry, farad");
    net.comment("");

    let n_cells = real.cells.len();
    let mut at = PIN_A;
    let (mut n_rc, mut n_rl, mut n_c, mut n_q) = (0, 0, 0, 0);
    for (i, cell) in real.cells.iter().enumerate() {
        let next = if i + 1 == n_cells { PIN_B } else { net.node() };
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
    Ok(net.render(&subckt_name(ctx.part_number.as_deref())))
}
