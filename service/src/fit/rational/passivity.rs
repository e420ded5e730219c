//! Passivity of the rational impedance: Z is positive-real when its poles are stable and
//! Re Z(jω) ≥ 0 at every ω, not only at the sweep's points.
//!
//! The check finds every ω where Re Z(jω) = 0 from the model itself. With x = ω²,
//! `Re Z = (Z(jω) + Z(−jω))/2 = d + Σₖ ρₖ/(x − qₖ)`, ρₖ = −rₖpₖ, qₖ = −pₖ² (sum over all poles, conjugates
//! included): a proper rational function of x whose zeros are the eigenvalues of a matrix like the one of
//! the pole relocation. A Möbius shift x = x₀ + 1/y makes the constant term non-zero even when d = 0. The
//! crossings split the axis into bands of constant sign; each band, and a dense log grid, is sampled and
//! every negative minimum refined by golden-section search.
//!
//! Enforcement perturbs the residues, d and e (poles fixed) by the smallest change of the weighted fit at
//! the sweep's points — the exact increase of the weighted squared error, since the unperturbed residues
//! are the least-squares optimum — subject to Re Z ≥ 0 at the violation minima, d ≥ 0 and e ≥ 0; the
//! constraint set grows until the check passes. The quadratic programme is solved as a least-distance
//! problem through NNLS (Lawson & Hanson 1974, ch. 23).

use super::basis::{Coefficients, FitData, Poles, basis_at, from_model};
use super::relocation::linear_system;
use super::stop::Stop;
use crate::fit::derived::golden_minimum;
use crate::fit::linalg::nnls;
use crate::fit::linalg::{PivotedQr, rational_zeros};
use crate::model::RationalModel;
use num_complex::Complex64;
use serde::{Deserialize, Serialize};
use std::f64::consts::PI;

/// One frequency band where Re Z < 0.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Violation {
    pub from_hz: f64,
    /// `f64::INFINITY` when the band reaches infinite frequency.
    pub to_hz: f64,
    pub worst_hz: f64,
    pub worst_re_z_ohm: f64,
}

/// Outcome of the positive-real test of a rational impedance.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PassivityCheck {
    pub passive: bool,
    /// Every pole has a negative real part.
    pub stable: bool,
    pub d_ohm_non_negative: bool,
    pub e_h_non_negative: bool,
    /// Frequencies where Re Z(jω) crosses or touches zero.
    pub crossings_hz: Vec<f64>,
    pub violations: Vec<Violation>,
}

/// Tests whether the model is positive-real (stable poles, Re Z(jω) ≥ 0 for all ω ≥ 0, d ≥ 0, e ≥ 0).
pub fn check_passivity(model: &RationalModel) -> PassivityCheck {
    let omega0 = reference_omega(model);
    let (poles, coef) = from_model(omega0, model);
    let stable = poles.real.iter().all(|a| *a < 0.0) && poles.pairs.iter().all(|p| p.re < 0.0);
    let crossings = crossings(&poles, &coef);
    let minima = negative_minima(&poles, &coef, &crossings);
    let to_hz = |w: f64| w * omega0 / (2.0 * PI);
    let violations: Vec<Violation> = minima
        .iter()
        .map(|m| Violation {
            from_hz: to_hz(m.from),
            to_hz: to_hz(m.to),
            worst_hz: to_hz(m.at),
            worst_re_z_ohm: m.value,
        })
        .collect();
    let d_ok = coef.d >= 0.0;
    let e_ok = coef.e >= 0.0;
    PassivityCheck {
        passive: stable && d_ok && e_ok && violations.is_empty(),
        stable,
        d_ohm_non_negative: d_ok,
        e_h_non_negative: e_ok,
        crossings_hz: crossings.iter().map(|w| to_hz(*w)).collect(),
        violations,
    }
}

/// A frequency scale for a model on its own: the geometric mean of its pole magnitudes.
fn reference_omega(model: &RationalModel) -> f64 {
    let mags: Vec<f64> = model
        .real_poles
        .iter()
        .map(|p| p.pole_rad_per_s.abs())
        .chain(model.complex_poles.iter().map(|p| p.pole_rad_per_s.norm()))
        .filter(|m| *m > 0.0 && m.is_finite())
        .collect();
    if mags.is_empty() {
        return 1.0;
    }
    (mags.iter().map(|m| m.ln()).sum::<f64>() / mags.len() as f64).exp()
}

/// Re Z(jω) on the normalised axis, and the sum of the magnitudes of its terms (a roundoff scale).
pub(crate) fn re_z(w: f64, poles: &Poles, coef: &Coefficients) -> (f64, f64) {
    let s = Complex64::new(0.0, w);
    let mut v = coef.d;
    let mut mag = coef.d.abs();
    for (&a, &c) in poles.real.iter().zip(&coef.c) {
        let t = (c / (s - a)).re;
        v += t;
        mag += t.abs();
    }
    let o = poles.real.len();
    for (i, &p) in poles.pairs.iter().enumerate() {
        let r = Complex64::new(coef.c[o + 2 * i], coef.c[o + 2 * i + 1]);
        let t = (r / (s - p) + r.conj() / (s - p.conj())).re;
        v += t;
        mag += t.abs();
    }
    (v, mag)
}

/// Every ω ≥ 0 (normalised) where Re Z(jω) = 0, from the eigenvalues of the shifted test matrix.
pub(crate) fn crossings(poles: &Poles, coef: &Coefficients) -> Vec<f64> {
    let o = poles.real.len();
    // ρₖ/(x − qₖ) terms: real poles give real terms, pairs conjugate pairs of terms.
    let real_terms: Vec<(f64, f64)> = poles
        .real
        .iter()
        .zip(&coef.c)
        .map(|(&a, &c)| (-a * a, -c * a))
        .collect();
    let pair_terms: Vec<(Complex64, Complex64)> = poles
        .pairs
        .iter()
        .enumerate()
        .map(|(i, &p)| {
            let r = Complex64::new(coef.c[o + 2 * i], coef.c[o + 2 * i + 1]);
            (-p * p, -r * p)
        })
        .collect();
    let mags: Vec<f64> = poles
        .real
        .iter()
        .map(|a| a.abs())
        .chain(poles.pairs.iter().map(|p| p.norm()))
        .collect();
    let centre = if mags.is_empty() {
        1.0
    } else {
        (mags.iter().map(|m| m.ln()).sum::<f64>() / mags.len() as f64).exp()
    };
    // Choose the shift x₀ = −c² where the constant term of the shifted function is least cancelled.
    let mut best: Option<(f64, f64, f64)> = None;
    for factor in [1.0, 0.37, 2.7, 0.13, 7.4, 0.05, 20.0] {
        let x0 = -(centre * factor).powi(2);
        let mut dt = coef.d;
        let mut mag = coef.d.abs();
        for &(q, rho) in &real_terms {
            let t = rho / (x0 - q);
            dt += t;
            mag += t.abs();
        }
        for &(q, rho) in &pair_terms {
            let t = 2.0 * (rho / (x0 - q)).re;
            dt += t;
            mag += (rho / (x0 - q)).norm() * 2.0;
        }
        let quality = if mag > 0.0 { dt.abs() / mag } else { 0.0 };
        if dt.is_finite() && best.is_none_or(|(_, _, qb)| quality > qb) {
            best = Some((x0, dt, quality));
        }
    }
    let Some((x0, dt, _)) = best else {
        return Vec::new();
    };
    // x = x₀ + 1/y: ρ/(x − q) = ρ/u − (ρ/u²)/(y + 1/u), u = x₀ − q.
    let real_shifted: Vec<(f64, f64)> = real_terms
        .iter()
        .map(|&(q, rho)| {
            let u = x0 - q;
            (-1.0 / u, -rho / (u * u))
        })
        .collect();
    let pair_shifted: Vec<(Complex64, Complex64)> = pair_terms
        .iter()
        .map(|&(q, rho)| {
            let u = x0 - q;
            (-u.inv(), -rho / (u * u))
        })
        .collect();
    let Some(ys) = rational_zeros(dt, &real_shifted, &pair_shifted) else {
        return Vec::new();
    };
    let mut out: Vec<f64> = ys
        .iter()
        .filter(|y| y.norm() > 1e-300)
        .map(|y| x0 + y.inv())
        .filter(|x| x.re > 0.0 && x.im.abs() <= 1e-6 * x.norm())
        .map(|x| x.re.sqrt())
        .collect();
    // Polish each crossing by bisection where Re Z changes sign around it, so band edges sit on zeros.
    for w in out.iter_mut() {
        let f = |w: f64| re_z(w, poles, coef).0;
        let (mut a, mut b) = (*w * (1.0 - 1e-6), *w * (1.0 + 1e-6));
        let (fa, fb) = (f(a), f(b));
        if fa.signum() != fb.signum() {
            for _ in 0..60 {
                let m = 0.5 * (a + b);
                if f(m).signum() == fa.signum() {
                    a = m;
                } else {
                    b = m;
                }
            }
            *w = 0.5 * (a + b);
        }
    }
    out.sort_by(f64::total_cmp);
    out.dedup_by(|a, b| (*a - *b).abs() <= 1e-12 * b.abs());
    out
}

/// A band of negative Re Z on the normalised axis.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Minimum {
    pub from: f64,
    pub to: f64,
    pub at: f64,
    pub value: f64,
}

fn is_negative(v: f64, mag: f64) -> bool {
    v < -1e-11 * mag
}

/// The minima of Re Z where it is negative, one per band between crossings (DC and ω → ∞ included).
pub(crate) fn negative_minima(poles: &Poles, coef: &Coefficients, cross: &[f64]) -> Vec<Minimum> {
    let mags: Vec<f64> = poles
        .real
        .iter()
        .map(|a| a.abs())
        .chain(poles.pairs.iter().map(|p| p.norm()))
        .chain(poles.pairs.iter().map(|p| p.im.abs()))
        .chain(cross.iter().copied())
        .filter(|m| *m > 0.0)
        .collect();
    let lo = mags.iter().fold(1.0f64, |m, v| m.min(*v)) * 1e-4;
    let hi = mags.iter().fold(1.0f64, |m, v| m.max(*v)) * 1e4;
    // Breakpoints: 0, the crossings, ∞ (represented by hi·10 and the limit d).
    let mut edges = vec![0.0];
    edges.extend(cross.iter().copied().filter(|w| *w > 0.0 && *w < hi));
    edges.push(f64::INFINITY);
    let mut out = Vec::new();
    for win in edges.windows(2) {
        let (a, b) = (win[0], win[1]);
        let a_eff = if a == 0.0 { lo.min(b * 1e-3) } else { a };
        let b_eff = if b.is_infinite() { hi.max(a * 1e3) } else { b };
        // Dense log samples in the band (at least 40 per decade), plus the band's ends.
        let decades = (b_eff / a_eff).log10().max(0.0);
        let n = ((decades * 40.0).ceil() as usize).clamp(16, 4000);
        let mut samples: Vec<f64> = (0..=n)
            .map(|i| a_eff * (b_eff / a_eff).powf(i as f64 / n as f64))
            .collect();
        if a == 0.0 {
            samples.insert(0, 0.0);
        }
        // Pole frequencies inside the band are where narrow features sit.
        for p in &poles.pairs {
            if p.im > a_eff && p.im < b_eff {
                samples.push(p.im);
            }
        }
        samples.sort_by(f64::total_cmp);
        let values: Vec<(f64, f64)> = samples.iter().map(|w| re_z(*w, poles, coef)).collect();
        let (imin, &(vmin, magmin)) = values
            .iter()
            .enumerate()
            .min_by(|x, y| x.1.0.total_cmp(&y.1.0))
            .expect("samples are never empty");
        let mut at = samples[imin];
        let mut value = vmin;
        let mut negative = is_negative(vmin, magmin);
        if b.is_infinite() && (coef.d < 0.0) {
            negative = true;
            if coef.d < value {
                at = hi * 10.0;
                value = coef.d;
            }
        }
        if !negative {
            continue;
        }
        // Refine the minimum between its neighbouring samples.
        let l = samples[imin.saturating_sub(1)];
        let r = samples[(imin + 1).min(samples.len() - 1)];
        if r > l {
            let (wr, vr) = golden_minimum(l, r, 1e-14 * r.abs(), |w| re_z(w, poles, coef).0);
            if vr < value {
                at = wr;
                value = vr;
            }
        }
        out.push(Minimum {
            from: a,
            to: b,
            at,
            value,
        });
    }
    out
}

/// What enforcement did.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Enforced {
    pub coef: Coefficients,
    pub rms_before: f64,
    pub rms_after: f64,
    /// Constraint-growing rounds run (0: the fit was passive already).
    pub rounds: usize,
}

/// Why enforcement gave up.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum EnforceFailure {
    Unstable,
    Infeasible,
    NotConverged {
        rounds: usize,
    },
    /// The fit's time limit ran out, or it was cancelled, before Re Z ≥ 0 was reached.
    Stopped {
        rounds: usize,
    },
    OverBound {
        rms_before: f64,
        rms_after: f64,
    },
}

impl std::fmt::Display for EnforceFailure {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            EnforceFailure::Unstable => write!(f, "a pole is not in the left half-plane"),
            EnforceFailure::Infeasible => {
                write!(f, "no residue change makes Re Z ≥ 0 with these poles")
            }
            EnforceFailure::NotConverged { rounds } => {
                write!(
                    f,
                    "Re Z still dips below zero after {rounds} enforcement rounds"
                )
            }
            EnforceFailure::Stopped { rounds } => write!(
                f,
                "the fit's time limit ran out (or it was cancelled) after {rounds} enforcement \
                 rounds, with Re Z still below zero"
            ),
            EnforceFailure::OverBound {
                rms_before,
                rms_after,
            } => write!(
                f,
                "making the model passive would raise the weighted RMS error from {rms_before:.4} to \
                 {rms_after:.4}, beyond the allowed bound"
            ),
        }
    }
}

/// The largest weighted RMS error enforcement may leave: `(1 + allowance)·max(before, 0.001)`. The floor
/// (a thousandth of the stated uncertainty) lets a fit far below the noise, e.g. of exact data, move by
/// a negligible amount when d or e must be lifted to exactly zero.
pub fn error_bound(rms_before: f64, allowance: f64) -> f64 {
    (1.0 + allowance) * rms_before.max(1e-3)
}

/// Makes the fit passive by the least change of its weighted error, within [`error_bound`].
pub(crate) fn enforce(
    data: &FitData,
    poles: &Poles,
    coef0: &Coefficients,
    allowance: f64,
    stop: Stop<'_>,
) -> Result<Enforced, EnforceFailure> {
    if !(poles.real.iter().all(|a| *a < 0.0) && poles.pairs.iter().all(|p| p.re < 0.0)) {
        return Err(EnforceFailure::Unstable);
    }
    let n = poles.order();
    let nv = n + 2;
    let (a, b) = linear_system(data, poles);
    let rows = 2 * data.s.len();
    let rms_of = |x: &[f64]| -> f64 {
        let mut ss = 0.0;
        for i in 0..rows {
            let mut v = -b[i];
            for (j, xj) in x.iter().enumerate() {
                v += a[j * rows + i] * xj;
            }
            ss += v * v;
        }
        (ss / rows as f64).sqrt()
    };
    let x0: Vec<f64> = coef0.c.iter().copied().chain([coef0.d, coef0.e]).collect();
    let rms_before = rms_of(&x0);
    let to_coef = |x: &[f64]| Coefficients {
        c: x[..n].to_vec(),
        d: x[n],
        e: x[n + 1],
    };
    let passes = |c: &Coefficients| {
        c.d >= 0.0 && c.e >= 0.0 && negative_minima(poles, c, &crossings(poles, c)).is_empty()
    };
    if passes(coef0) {
        return Ok(Enforced {
            coef: coef0.clone(),
            rms_before,
            rms_after: rms_before,
            rounds: 0,
        });
    }
    let qr = PivotedQr::new(a.clone(), rows, nv, 1e-13);
    let rank = qr.rank();
    // Constraints gᵀx ≥ h on the full parameter vector.
    let mut cons: Vec<(Vec<f64>, f64)> = Vec::new();
    let unit = |k: usize| {
        let mut g = vec![0.0; nv];
        g[k] = 1.0;
        (g, 0.0)
    };
    cons.push(unit(n));
    cons.push(unit(n + 1));
    let mut x = x0.clone();
    let mut phi = Vec::with_capacity(n);
    let max_rounds = 40;
    for round in 1..=max_rounds {
        // The first round always runs; later ones only within the fit's time and while not cancelled.
        if round > 1 && stop.now() {
            return Err(EnforceFailure::Stopped { rounds: round - 1 });
        }
        let c = to_coef(&x);
        let minima = negative_minima(poles, &c, &crossings(poles, &c));
        for m in &minima {
            for w in constraint_points(m, round) {
                basis_at(Complex64::new(0.0, w), poles, &mut phi);
                let mut g: Vec<f64> = phi.iter().map(|p| p.re).collect();
                g.push(1.0);
                g.push(0.0);
                // A margin relative to the size of the terms there, so a tail that only needs to reach
                // zero is not pushed up by a margin scaled to the whole response.
                let margin = 1e-6 * re_z(w, poles, coef0).1;
                cons.push((g, margin));
            }
        }
        let (e_rows, f) = distance_constraints(&cons, &x0, &qr);
        let y = nnls::ldp(&e_rows, &f, rank).ok_or(EnforceFailure::Infeasible)?;
        let z = qr.back_substitute(&y);
        let delta = qr.unpermute(&z);
        x = x0.iter().zip(&delta).map(|(a, b)| a + b).collect();
        // The bounds d ≥ 0 and e ≥ 0 are met by the programme up to roundoff: make them exact.
        x[n] = x[n].max(0.0);
        x[n + 1] = x[n + 1].max(0.0);
        let c = to_coef(&x);
        if passes(&c) {
            let rms_after = rms_of(&x);
            if rms_after > error_bound(rms_before, allowance) {
                return Err(EnforceFailure::OverBound {
                    rms_before,
                    rms_after,
                });
            }
            return Ok(Enforced {
                coef: c,
                rms_before,
                rms_after,
                rounds: round,
            });
        }
    }
    Err(EnforceFailure::NotConverged { rounds: max_rounds })
}

/// Where a negative minimum is constrained in round `round`: the minimum itself, and from the second
/// round on a spread of points across the band (bounded to two decades around the minimum), so narrow
/// dips beside a constraint are caught.
fn constraint_points(m: &Minimum, round: usize) -> Vec<f64> {
    let mut points = vec![m.at];
    if round > 1 {
        let lo = m.from.max(m.at / 100.0);
        let hi = m.to.min(m.at * 100.0);
        if hi > lo && lo > 0.0 {
            let count = 4 * round.min(8);
            for i in 0..=count {
                points.push(lo * (hi / lo).powf(i as f64 / count as f64));
            }
        }
        for t in [1e-9, 1e-7, 1e-5] {
            points.push(m.at * (1.0 - t));
            points.push(m.at * (1.0 + t));
        }
    }
    points
}

/// The constraints gᵀx ≥ h as constraints E·y ≥ f on y = R·z (z: pivoted, scaled coordinates of
/// Δ = x − x₀), so that ‖A·Δ‖ = ‖y‖.
fn distance_constraints(
    cons: &[(Vec<f64>, f64)],
    x0: &[f64],
    qr: &PivotedQr,
) -> (Vec<Vec<f64>>, Vec<f64>) {
    let rank = qr.rank();
    let mut e_rows = Vec::with_capacity(cons.len());
    let mut f = Vec::with_capacity(cons.len());
    for (g, h) in cons {
        let gx0: f64 = g.iter().zip(x0).map(|(a, b)| a * b).sum();
        let mut gt: Vec<f64> = (0..rank)
            .map(|k| {
                let (j, sc) = qr.column_at(k);
                g[j] * sc
            })
            .collect();
        // Solve Rᵀ·e = g̃ (forward substitution).
        for i in 0..rank {
            let mut s = gt[i];
            for (k, gk) in gt.iter().enumerate().take(i) {
                s -= qr.r(k, i) * gk;
            }
            gt[i] = s / qr.r(i, i);
        }
        e_rows.push(gt);
        f.push(h - gx0);
    }
    (e_rows, f)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::rational::{ComplexPole, RealPole};

    /// Synthetic (no source): a pair with a residue whose real part term goes negative around the pole.
    fn lossy_pair(d: f64, r_im: f64) -> RationalModel {
        RationalModel {
            d_ohm: d,
            e_h: 1e-9,
            real_poles: vec![RealPole {
                pole_rad_per_s: -1e5,
                residue_ohm_rad_per_s: 1e5,
            }],
            complex_poles: vec![ComplexPole {
                pole_rad_per_s: Complex64::new(-1e5, 1e7),
                residue_ohm_rad_per_s: Complex64::new(1e4, r_im),
            }],
        }
    }

    fn dense_min(model: &RationalModel) -> (f64, f64) {
        use crate::model::ImpedanceModel;
        (0..200_000)
            .map(|i| 1e2 * 1e8f64.powf(i as f64 / 200_000.0))
            .map(|f| (f, model.impedance(f).re))
            .fold((0.0, f64::INFINITY), |m, v| if v.1 < m.1 { v } else { m })
    }

    #[test]
    fn crossings_bracket_the_negative_band_found_by_dense_sampling() {
        let m = lossy_pair(0.5, 3e5);
        let (f_min, v_min) = dense_min(&m);
        assert!(v_min < 0.0, "the test model must be non-passive");
        let check = check_passivity(&m);
        assert!(!check.passive);
        assert_eq!(check.violations.len(), 1, "{check:?}");
        let v = check.violations[0];
        assert!(v.from_hz < f_min && f_min < v.to_hz, "{check:?} vs {f_min}");
        assert!(
            v.worst_re_z_ohm <= v_min + 1e-9 * v_min.abs(),
            "{check:?} vs {v_min}"
        );
        assert!((v.worst_hz - f_min).abs() < 1e-4 * f_min);
        // At the band edges Re Z is zero.
        use crate::model::ImpedanceModel;
        for f in [v.from_hz, v.to_hz] {
            let z = m.impedance(f);
            assert!(z.re.abs() < 1e-9 * z.norm(), "Re Z({f}) = {}", z.re);
        }
    }

    #[test]
    fn a_positive_real_model_passes_also_with_zero_d() {
        // Series R–L–C branch in parallel with R: positive-real by construction.
        let m = lossy_pair(0.5, 0.0);
        assert!(dense_min(&m).1 >= 0.0);
        assert!(check_passivity(&m).passive);
        let mut m0 = m.clone();
        m0.d_ohm = 0.0;
        assert!(dense_min(&m0).1 >= 0.0);
        assert!(check_passivity(&m0).passive, "{:?}", check_passivity(&m0));
        let mut neg = m.clone();
        neg.d_ohm = -1e-3;
        let c = check_passivity(&neg);
        assert!(!c.passive && !c.d_ohm_non_negative);
    }
}
