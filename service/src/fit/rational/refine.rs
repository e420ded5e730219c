//! The joint refinement of poles and residues on the weighted error itself.

use super::basis::{Coefficients, FitData, Poles, evaluate, recip};
use super::stop::Stop;
use crate::fit::linalg::GramAccumulator;
use crate::fit::lm::{LevenbergMarquardt, NormalEquations};
use argmin::core::{Error, Executor};
use nalgebra::{DMatrix, DVector};
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

/// A step that lowers the cost by less than this fraction of it, near Gauss–Newton, ends the refinement:
/// another Jacobian would not change the fit materially.
const SMALL_STEP: f64 = 1e-4;

/// The weighted error of a pole–residue set as a least-squares problem in its parameters (real poles,
/// (Re, Im) per pair, residues, d, e), for the solver of [`crate::fit::lm`].
struct PoleResidueProblem<'a> {
    data: &'a FitData,
    /// Real poles and pairs of the set being refined (the split never changes).
    nr: usize,
    np: usize,
    /// Per pair, the smallest damping ratio −Re p/|p| a step may leave it with.
    damping_floor: Vec<f64>,
    stop: Stop<'a>,
}

impl PoleResidueProblem<'_> {
    fn params(&self) -> usize {
        let n = self.nr + 2 * self.np;
        2 * n + 2
    }

    fn pack(poles: &Poles, coef: &Coefficients) -> Vec<f64> {
        let mut x: Vec<f64> = poles.real.clone();
        for p in &poles.pairs {
            x.extend([p.re, p.im]);
        }
        x.extend(&coef.c);
        x.extend([coef.d, coef.e]);
        x
    }

    fn unpack(&self, x: &[f64]) -> (Poles, Coefficients) {
        let (nr, np) = (self.nr, self.np);
        let n = nr + 2 * np;
        let poles = Poles {
            real: x[..nr].to_vec(),
            pairs: (0..np)
                .map(|q| Complex64::new(x[nr + 2 * q], x[nr + 2 * q + 1]))
                .collect(),
        };
        let lin = nr + 2 * np;
        let coef = Coefficients {
            c: x[lin..lin + n].to_vec(),
            d: x[lin + n],
            e: x[lin + n + 1],
        };
        (poles, coef)
    }
}

impl NormalEquations for PoleResidueProblem<'_> {
    /// One pass: each point's Jacobian row (Re and Im rows, weighted) and residual go into Gram sums of
    /// [J r], from which JᵀJ and Jᵀr are read; χ² is summed directly.
    fn normal_equations(
        &self,
        x: &[f64],
        jtj: &mut DMatrix<f64>,
        g: &mut DVector<f64>,
    ) -> Result<f64, Error> {
        let (poles, coef) = self.unpack(x);
        let params = self.params();
        // Poles first, then the residues: as many as the order.
        let lin = self.nr + 2 * self.np;
        let mut vals = vec![Complex64::new(0.0, 0.0); params];
        let mut gram = GramAccumulator::new(params + 1);
        let mut cost = 0.0;
        for i in 0..self.data.len() {
            let s = self.data.s[i];
            jacobian_row(s, &poles, &coef, &mut vals);
            let mut zf = Complex64::new(coef.d, 0.0) + s * coef.e;
            for (b, c) in vals[lin..2 * lin].iter().zip(&coef.c) {
                zf += b * c;
            }
            let w = self.data.w[i];
            let v = (zf - self.data.z[i]) * w;
            cost += v.norm_sqr();
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
        for a in 0..params {
            g[a] = gram.get(a, params);
            for b in 0..params {
                jtj[(a, b)] = gram.get(a, b);
            }
        }
        Ok(cost)
    }

    fn cost(&self, x: &[f64]) -> Result<f64, Error> {
        let (poles, coef) = self.unpack(x);
        let data = self.data;
        Ok((0..data.len())
            .map(|i| ((evaluate(data.s[i], &poles, &coef) - data.z[i]) * data.w[i]).norm_sqr())
            .sum())
    }

    /// Every pair is projected onto its damping floor; the point is admissible when every real pole is
    /// negative and every pair has Im > 0 and is no sharper than its floor.
    fn admit(&self, x: &mut [f64]) -> bool {
        let nr = self.nr;
        for (q, &z) in self.damping_floor.iter().enumerate() {
            let (re, im) = (x[nr + 2 * q], x[nr + 2 * q + 1]);
            if -re < z * re.hypot(im) {
                x[nr + 2 * q] = -z * im.abs() / (1.0 - z * z).sqrt();
            }
        }
        x[..nr].iter().all(|a| *a < 0.0)
            && self.damping_floor.iter().enumerate().all(|(q, &z)| {
                let (re, im) = (x[nr + 2 * q], x[nr + 2 * q + 1]);
                im > 0.0 && -re >= z * re.hypot(im) * (1.0 - 1e-12)
            })
    }

    fn halt(&self) -> bool {
        self.stop.now()
    }
}

/// Refines poles and residues together by Levenberg–Marquardt ([`crate::fit::lm`], the same solver as
/// the lumped fit) on the weighted error: the relocation's fixed point minimises a linearised error, not
/// the error itself. Steps that would move a pole into the right half-plane or change the real/pair
/// split are rejected, and a pair may not become sharper than it was or than Q = 500 (between the
/// sweep's points nothing would stop it drifting onto the axis to fit noise). The run stops when a
/// Gauss–Newton step could gain less than 0.001 % of the cost, or after a step near Gauss–Newton that
/// gained less than 0.01 %. `known_gain` is the fraction of the cost a Gauss–Newton step could gain at the
/// start, when the caller measured it ([`super::identify_with_gain`]). Cancelled or past the deadline,
/// the last accepted point is the result. Returns the refined set and the number of accepted steps.
pub(crate) fn refine(
    data: &FitData,
    poles: Poles,
    coef: Coefficients,
    known_gain: Option<f64>,
    max_steps: u64,
    stop: Stop<'_>,
) -> (Poles, Coefficients, u64) {
    if known_gain.is_some_and(|g| g <= MIN_GAIN) || stop.now() {
        return (poles, coef, 0);
    }
    let problem = PoleResidueProblem {
        data,
        nr: poles.real.len(),
        np: poles.pairs.len(),
        damping_floor: poles
            .pairs
            .iter()
            .map(|p| (-p.re / p.norm()).min(1e-3))
            .collect(),
        stop,
    };
    let x0 = PoleResidueProblem::pack(&poles, &coef);
    let mut solver = LevenbergMarquardt::default()
        .with_tolerances(SMALL_STEP, 0.0)
        .with_predicted_tolerance(MIN_GAIN);
    // Poles and residues are plain (not logarithmic) parameters on the normalised axis.
    solver.max_step = f64::INFINITY;
    // Any accepted step that gains less than `SMALL_STEP` ends the run, damped or not, and a trial's
    // cost is measured alone first: a pass of Gram sums costs several residual passes at high orders.
    solver.near_gauss_newton = f64::INFINITY;
    solver.cost_first = true;
    let run = Executor::new(problem, solver)
        .configure(|s| s.param(DVector::from_vec(x0)).max_iters(max_steps))
        .run();
    // A start the solver cannot evaluate (non-finite) keeps the set as it came.
    let Ok(mut res) = run else {
        return (poles, coef, 0);
    };
    let accepted = res.solver.accepted_steps();
    match (accepted, res.state.take_param(), res.problem.take_problem()) {
        (1.., Some(x), Some(problem)) => {
            let (poles, coef) = problem.unpack(x.as_slice());
            (poles, coef, accepted)
        }
        _ => (poles, coef, 0),
    }
}
