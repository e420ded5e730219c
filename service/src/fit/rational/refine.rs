//! The joint refinement of poles and residues on the weighted error itself.

use super::basis::{Coefficients, FitData, Poles, RANK_TOL, evaluate, recip};
use super::stop::Stop;
use crate::fit::linalg::{GramAccumulator, PivotedQr, RowCompressor, padded};
use num_complex::Complex64;

/// ∂Z/∂(parameter) at normalised s for the refinement's parameters, in its order: real poles, (Re, Im)
/// per pair, residues, d, e. Each 1/(s − p) is computed once and serves both the pole's column and
/// its basis function's.
pub(super) fn jacobian_row(
    s: Complex64,
    poles: &Poles,
    coef: &Coefficients,
    vals: &mut [Complex64],
) {
    let nr = poles.real.len();
    let np = poles.pairs.len();
    let n = poles.order();
    let (dp, rest) = vals.split_at_mut(nr + 2 * np);
    let (basis, tail) = rest.split_at_mut(n);
    for (q, &a) in poles.real.iter().enumerate() {
        let t = recip(s - a);
        dp[q] = coef.c[q] * t * t;
        basis[q] = t;
    }
    for (q, &p) in poles.pairs.iter().enumerate() {
        let o = nr + 2 * q;
        let res = Complex64::new(coef.c[o], coef.c[o + 1]);
        let t1 = recip(s - p);
        let t2 = recip(s - p.conj());
        let a1 = res * t1 * t1;
        let a2 = res.conj() * t2 * t2;
        dp[o] = a1 + a2;
        // j·(a1 − a2), and the pair's basis t1 + t2, j·(t1 − t2) as in [`basis_into`].
        dp[o + 1] = Complex64::new(a2.im - a1.im, a1.re - a2.re);
        basis[o] = t1 + t2;
        basis[o + 1] = Complex64::new(t2.im - t1.im, t1.re - t2.re);
    }
    tail[0] = Complex64::new(1.0, 0.0);
    tail[1] = s;
}

/// The refinement stops when a Gauss–Newton step could lower the cost by at most this fraction of it.
const MIN_GAIN: f64 = 1e-5;

/// The weighted residual of a pole–residue set (Re rows, then Im rows, as in [`refine`]) and the most a
/// Gauss–Newton step could lower its cost, ‖P_J r‖² = gᵀ(JᵀJ)⁻¹g with g = Jᵀr, from one pass of Gram
/// sums of [J r] and a Cholesky factorisation of the column-scaled JᵀJ. The gain is `None` when that
/// factorisation meets a pivot below 1e-8 of its unit diagonal: the normal equations then square a
/// condition number too large to trust to a few digits, and the QR test of [`refine`] decides. Above that
/// pivot the computed gain is good to far better than the 10 % its use needs (Gram sums in f64 carry
/// relative errors near 1e-13).
pub(super) fn gauss_newton_gain(
    data: &FitData,
    poles: &Poles,
    coef: &Coefficients,
) -> (Vec<f64>, Option<f64>) {
    let k = data.len();
    let nr = poles.real.len();
    let np = poles.pairs.len();
    let n = poles.order();
    let params = nr + 2 * np + n + 2;
    let mut r = vec![0.0; 2 * k];
    let mut vals = vec![Complex64::new(0.0, 0.0); params];
    let mut gram = GramAccumulator::new(params + 1);
    let lin = nr + 2 * np;
    for i in 0..k {
        let s = data.s[i];
        jacobian_row(s, poles, coef, &mut vals);
        let mut zf = Complex64::new(coef.d, 0.0) + s * coef.e;
        for (b, c) in vals[lin..lin + n].iter().zip(&coef.c) {
            zf += b * c;
        }
        let w = data.w[i];
        let v = (zf - data.z[i]) * w;
        r[i] = v.re;
        r[k + i] = v.im;
        let row = gram.row_unzeroed();
        for (x, d) in row.iter_mut().zip(&vals) {
            *x = d.re * w;
        }
        row[params] = v.re;
        let row = gram.row_unzeroed();
        for (x, d) in row.iter_mut().zip(&vals) {
            *x = d.im * w;
        }
        row[params] = v.im;
    }
    gram.finish();
    (r, scaled_cholesky_gain(&gram, params))
}

/// gᵀG⁻¹g for G the leading `p × p` block of the Gram matrix and g its column `p`, through the Cholesky
/// factor of G scaled to unit diagonal; `None` below a pivot of 1e-8 (see [`gauss_newton_gain`]).
fn scaled_cholesky_gain(gram: &GramAccumulator, p: usize) -> Option<f64> {
    let d: Vec<f64> = (0..p).map(|j| gram.get(j, j).sqrt()).collect();
    if d.iter().any(|v| !(v.is_finite() && *v > 0.0)) {
        return None;
    }
    // L row by row (lower, row-major p × p), and y = L⁻¹·ĝ alongside.
    let mut l = vec![0.0; p * p];
    let mut y = vec![0.0; p];
    for i in 0..p {
        for j in 0..=i {
            let mut v = gram.get(i, j) / (d[i] * d[j]);
            for q in 0..j {
                v -= l[i * p + q] * l[j * p + q];
            }
            if i == j {
                if v.is_nan() || v < 1e-8 {
                    return None;
                }
                l[i * p + i] = v.sqrt();
            } else {
                l[i * p + j] = v / l[j * p + j];
            }
        }
        let mut v = gram.get(i, p) / d[i];
        for q in 0..i {
            v -= l[i * p + q] * y[q];
        }
        y[i] = v / l[i * p + i];
    }
    let gain: f64 = y.iter().map(|v| v * v).sum();
    gain.is_finite().then_some(gain)
}

/// Refines poles and residues together by Levenberg–Marquardt on the weighted error (the relocation's
/// fixed point minimises a linearised error, not the error itself). Steps that would move a pole into the
/// right half-plane or change the real/pair split are rejected. Stops after a step that lowers the cost by
/// less than 0.01 % (another Jacobian would not change the fit materially). `known_gain` is the fraction of
/// the cost a Gauss–Newton step could gain at the start, when the caller measured it
/// ([`identify_with_gain`]). Returns the refined set and the number of accepted steps.
pub(crate) fn refine(
    data: &FitData,
    mut poles: Poles,
    mut coef: Coefficients,
    known_gain: Option<f64>,
    max_steps: u64,
    stop: Stop<'_>,
) -> (Poles, Coefficients, u64) {
    let k = data.len();
    let nr = poles.real.len();
    let np = poles.pairs.len();
    let n = poles.order();
    // Parameters: real poles, (Re, Im) per pair, residues c (n), d, e.
    let params = nr + 2 * np + n + 2;
    let rows = 2 * k;
    let residual = |poles: &Poles, coef: &Coefficients| -> Vec<f64> {
        let mut r = vec![0.0; rows];
        for i in 0..k {
            let v = (evaluate(data.s[i], poles, coef) - data.z[i]) * data.w[i];
            r[i] = v.re;
            r[k + i] = v.im;
        }
        r
    };
    let cost_of = |r: &[f64]| r.iter().map(|v| v * v).sum::<f64>();
    // The first test (is the fit already at its minimum?): most fits end there. When the caller has not
    // measured the gain, it runs on the normal equations: one pass of Gram sums costs a fraction of the
    // QR pass below.
    let (mut r, gain) = match known_gain {
        Some(g) if g <= MIN_GAIN => return (poles, coef, 0),
        Some(_) => (residual(&poles, &coef), None),
        None => gauss_newton_gain(data, &poles, &coef),
    };
    let mut cost = cost_of(&r);
    if gain.is_some_and(|g| g <= MIN_GAIN * cost) {
        return (poles, coef, 0);
    }
    let mut lambda: f64 = 1e-3;
    let mut accepted = 0;
    let mut vals = vec![Complex64::new(0.0, 0.0); params];
    let damping_floor: Vec<f64> = poles
        .pairs
        .iter()
        .map(|p| (-p.re / p.norm()).min(1e-3))
        .collect();
    for _ in 0..max_steps {
        // Past the deadline or cancelled: the last accepted step is the result.
        if stop.now() {
            break;
        }
        let Linearised {
            qr,
            qtr,
            norms,
            rank,
        } = linearise(data, &poles, &coef, &r, &mut vals);
        // The undamped (Gauss–Newton) step could lower the cost by at most ‖(Qᵀr)₁‖²: when that is
        // negligible the fit is at its minimum.
        let predicted: f64 = qtr[..rank].iter().map(|v| v * v).sum();
        if predicted <= MIN_GAIN * cost {
            break;
        }
        let mut improved = false;
        let mut trials = 0;
        while lambda < 1e12 && trials < 8 {
            trials += 1;
            let delta = damped_step(&qr, &qtr, &norms, rank, lambda);
            let (trial_poles, trial_coef, stable) =
                trial_point(&poles, &coef, &delta, &damping_floor);
            if stable {
                let tr = residual(&trial_poles, &trial_coef);
                let tc = cost_of(&tr);
                if tc.is_finite() && tc < cost {
                    let gain = (cost - tc) / cost.max(1e-300);
                    poles = trial_poles;
                    coef = trial_coef;
                    r = tr;
                    cost = tc;
                    lambda = (lambda / 10.0).max(1e-12);
                    accepted += 1;
                    improved = gain > 1e-4;
                    break;
                }
            }
            lambda *= 10.0;
        }
        if !improved {
            break;
        }
    }
    (poles, coef, accepted)
}

/// The weighted Jacobian at one point, as the pivoted QR of its column-scaled triangle: Qᵀr, the column
/// norms the step is scaled back by, and the numerical rank.
struct Linearised {
    qr: PivotedQr,
    qtr: Vec<f64>,
    norms: Vec<f64>,
    rank: usize,
}

/// The Jacobian streamed into its triangle with the residual `r` as right-hand side (Q₁ᵀr), then scaled
/// by its column norms (those of the triangle: scaling columns commutes with QR); the pivoted QR of that
/// triangle then acts as one of the scaled Jacobian: Qᵀr = Q₂ᵀ·(Q₁ᵀr). `vals` is a buffer of one
/// Jacobian row.
fn linearise(
    data: &FitData,
    poles: &Poles,
    coef: &Coefficients,
    r: &[f64],
    vals: &mut [Complex64],
) -> Linearised {
    let k = data.len();
    let params = vals.len();
    let mut tall = RowCompressor::new(params, 1);
    for i in 0..k {
        let s = data.s[i];
        jacobian_row(s, poles, coef, vals);
        let w = data.w[i];
        let row = tall.row();
        for (x, v) in row.iter_mut().zip(vals.iter()) {
            *x = v.re * w;
        }
        row[params] = r[i];
        let row = tall.row();
        for (x, v) in row.iter_mut().zip(vals.iter()) {
            *x = v.im * w;
        }
        row[params] = r[k + i];
    }
    tall.finish();
    let sp = padded(params);
    let mut tri = tall.triangle(params);
    let norms: Vec<f64> = (0..params)
        .map(|c| {
            (0..=c)
                .map(|i| tri[i * sp + c] * tri[i * sp + c])
                .sum::<f64>()
                .sqrt()
                .max(1e-300)
        })
        .collect();
    for row in tri.chunks_exact_mut(sp) {
        for (x, d) in row.iter_mut().zip(&norms) {
            *x /= d;
        }
    }
    let qr = PivotedQr::from_rows(tri, params, params, sp, RANK_TOL);
    let mut qtr = tall.qtb(0);
    let rank = qr.rank();
    qr.apply_qt(&mut qtr);
    Linearised {
        qr,
        qtr,
        norms,
        rank,
    }
}

/// The Levenberg–Marquardt step for damping `lambda` on the scaled Jacobian: the least-squares solution
/// of [R; √λ·I]·v = [−Qᵀr; 0], scaled back to the parameters.
fn damped_step(qr: &PivotedQr, qtr: &[f64], norms: &[f64], rank: usize, lambda: f64) -> Vec<f64> {
    let params = norms.len();
    let arows = rank + params;
    let mut a = vec![0.0; arows * params];
    for c in 0..params {
        for i in 0..rank.min(c + 1) {
            a[c * arows + i] = qr.r(i, c);
        }
        a[c * arows + rank + c] = lambda.sqrt();
    }
    let mut b = vec![0.0; arows];
    for i in 0..rank {
        b[i] = -qtr[i];
    }
    let v = PivotedQr::new(a, arows, params, RANK_TOL).solve(&b);
    // Undo the pivoting (and the QR's own, near-unit, column scaling).
    let mut u = vec![0.0; params];
    for (k, vk) in v.iter().enumerate() {
        let (j, sc) = qr.column_at(k);
        u[j] = vk * sc;
    }
    u.iter().zip(norms).map(|(u, d)| u / d).collect()
}

/// The point one step `delta` away, with every pair projected onto its damping floor, and whether it
/// is admissible: stable, with no pair sharper than its floor.
fn trial_point(
    poles: &Poles,
    coef: &Coefficients,
    delta: &[f64],
    damping_floor: &[f64],
) -> (Poles, Coefficients, bool) {
    let nr = poles.real.len();
    let np = poles.pairs.len();
    let n = poles.order();
    let mut trial_poles = poles.clone();
    for (q, a) in trial_poles.real.iter_mut().enumerate() {
        *a += delta[q];
    }
    for (q, p) in trial_poles.pairs.iter_mut().enumerate() {
        *p += Complex64::new(delta[nr + 2 * q], delta[nr + 2 * q + 1]);
        // Projected onto the damping floor.
        let z = damping_floor[q];
        if -p.re < z * p.norm() {
            p.re = -z * p.im.abs() / (1.0 - z * z).sqrt();
        }
    }
    // A pole may not become sharper than it was or than Q = 500: between the sweep's points
    // nothing would stop it drifting onto the axis to fit noise.
    let stable = trial_poles.real.iter().all(|a| *a < 0.0)
        && trial_poles
            .pairs
            .iter()
            .zip(damping_floor)
            .all(|(p, z)| p.im > 0.0 && -p.re >= z * p.norm() * (1.0 - 1e-12));
    let trial_coef = Coefficients {
        c: (0..n).map(|q| coef.c[q] + delta[nr + 2 * np + q]).collect(),
        d: coef.d + delta[nr + 2 * np + n],
        e: coef.e + delta[nr + 2 * np + n + 1],
    };
    (trial_poles, trial_coef, stable)
}
