//! Levenberg–Marquardt as an argmin [`Solver`] (argmin 0.11 has none).
//!
//! Works on any problem that forms its normal equations, χ² = Σ r², JᵀJ and Jᵀr at x
//! ([`NormalEquations`]; [`Dense`] adapts a problem that gives residuals ([`Operator`]) and a
//! Jacobian matrix ([`Jacobian`])), so a problem with many residuals never has to store J. Each
//! iteration solves the damped normal equations
//! `(JᵀJ + λ·D) δ = −Jᵀr` by Cholesky (never an explicit inverse), where D is the running maximum of
//! diag(JᵀJ) (Marquardt's scaling as in MINPACK, so the step does not depend on parameter units), and
//! updates λ by Nielsen's rule from the gain ratio. A step that would make the cost non-finite is
//! rejected like any other bad step, so the state never holds a NaN.
//!
//! One argmin iteration is one accepted step; rejected trial steps happen inside it. Every trial
//! point is evaluated once, normal equations included, so an accepted step costs one pass over the
//! data and its JᵀJ is the one the next iteration (and the covariance) uses. Each iteration first
//! asks whether the undamped Gauss–Newton step predicts any worthwhile decrease: when gᵀ(JᵀJ)⁻¹g, the
//! squared norm of the residual's projection on the range of J, is below `ptol`·χ², the current point
//! is the minimum to that tolerance and the run stops without evaluating a trial point (the
//! relative-offset test of Bates & Watts, Technometrics 23 (1981) 179–183, in the form of a relative
//! predicted reduction as in MINPACK's `ftol` test; from memory). A run started near the minimum, as
//! the full-data stage of a fit is, then costs two passes: the start and one Gauss–Newton step.
//!
//! The last step is cheaper still. When the Gauss–Newton step predicts a small decrease (below
//! `last_step`·χ², default 1e-4), it is taken with a cost-only evaluation, which for the lumped
//! problem is a fraction of a pass, and the run stops there when the measured decrease equals the
//! predicted one to within `ptol`·χ². The reasoning: the model's error on the step, δᵀ(H − JᵀJ)δ
//! plus the cubic terms, is what the measurement compares; the decrease still left after the step
//! is of the order of that error times the relative Hessian error (or the step size) again, so
//! below `ptol`·χ² as well (Gauss–Newton convergence, common practice, no source). After such a
//! step the state's JᵀJ and Jᵀr are those of the point one step before (a step that changed χ² by
//! less than 1e-4 relative), which is what the covariance then uses. The state carries x,
//! the cost, Jᵀr in the gradient slot (half the gradient of χ²) and JᵀJ in the Hessian slot (half
//! the Gauss–Newton Hessian). Buffers are allocated once per run, not per iteration.
//!
//! A problem may keep its parameters in an admissible set ([`NormalEquations::admit`]): every trial
//! point is offered to it first, and it may move the point (onto a bound, say: the step is then the
//! one actually taken) or refuse it (a failed step, as a higher cost would be). It may also end the
//! run at its current point ([`NormalEquations::halt`], asked once per iteration), which is how a
//! deadline or a cancel flag stops a run without losing the last accepted step. Both the lumped fit
//! and the rational family's refinement run on this solver.

use argmin::core::{
    Error, IterState, Jacobian, KV, Operator, Problem, Solver, State, TerminationReason,
    TerminationStatus,
};
use nalgebra::{DMatrix, DVector};

/// The state the solver runs on: parameters, Jᵀr (gradient slot), JᵀJ (Hessian slot), cost.
pub type LmState = IterState<DVector<f64>, DVector<f64>, (), DMatrix<f64>, (), f64>;

/// A least-squares problem that forms its own normal equations.
pub trait NormalEquations {
    /// Fills `jtj` (n×n) and `g` = Jᵀr (n) at `x` and returns χ² = Σ r². Non-finite values are
    /// allowed (the solver rejects such a point).
    fn normal_equations(
        &self,
        x: &[f64],
        jtj: &mut DMatrix<f64>,
        g: &mut DVector<f64>,
    ) -> Result<f64, Error>;

    /// χ² alone at `x`, for the final step (see [`LevenbergMarquardt::last_step`]). By default a
    /// full [`NormalEquations::normal_equations`] pass; a problem with a cheaper cost-only pass
    /// overrides it.
    fn cost(&self, x: &[f64]) -> Result<f64, Error> {
        let n = x.len();
        let (mut jtj, mut g) = (DMatrix::zeros(n, n), DVector::zeros(n));
        self.normal_equations(x, &mut jtj, &mut g)
    }

    /// Brings a trial point into the admissible set in place (for example onto a bound) and says
    /// whether it is admissible at all; the solver treats an inadmissible point as a failed step and
    /// raises the damping. By default every point is admissible and none is moved.
    fn admit(&self, _x: &mut [f64]) -> bool {
        true
    }

    /// Whether the run should end now (cancelled, past a deadline); it then ends at the current
    /// point, the last accepted one. Asked once per iteration. By default never.
    fn halt(&self) -> bool {
        false
    }
}

/// Adapts a problem with residuals and a Jacobian matrix to [`NormalEquations`].
pub struct Dense<O>(pub O);

impl<O> NormalEquations for Dense<O>
where
    O: Operator<Param = DVector<f64>, Output = DVector<f64>>
        + Jacobian<Param = DVector<f64>, Jacobian = DMatrix<f64>>
        + RecycleJacobian,
{
    fn normal_equations(
        &self,
        x: &[f64],
        jtj: &mut DMatrix<f64>,
        g: &mut DVector<f64>,
    ) -> Result<f64, Error> {
        let x = DVector::from_column_slice(x);
        let r = self.0.apply(&x)?;
        let j = self.0.jacobian(&x)?;
        let (a, b) = normal_equations(&j, &r);
        jtj.copy_from(&a);
        g.copy_from(&b);
        self.0.recycle_jacobian(j);
        Ok(r.norm_squared())
    }
}

/// Solves A·x = b for symmetric positive definite A by Cholesky, in place: `a` is overwritten by
/// its factor and `x` by the solution. Returns false (and leaves garbage) when A is not positive
/// definite to working precision.
fn cholesky_solve(a: &mut DMatrix<f64>, x: &mut DVector<f64>) -> bool {
    // A = UᵀU with U upper triangular, built in A's upper triangle column by column: column-major
    // storage makes every sum below a dot product of contiguous slices.
    let n = a.nrows();
    let s = a.as_mut_slice();
    let x = x.as_mut_slice();
    for j in 0..n {
        let (left, right) = s.split_at_mut((j + 1) * n);
        let cj = &mut left[j * n..];
        let d = cj[j] - dot(&cj[..j], &cj[..j]);
        if !(d > 0.0 && d.is_finite()) {
            return false;
        }
        let d = d.sqrt();
        cj[j] = d;
        let uj = &cj[..j];
        for ci in right.chunks_exact_mut(n) {
            ci[j] = (ci[j] - dot(&ci[..j], uj)) / d;
        }
    }
    // Uᵀy = b, then Ux = y (by columns of U).
    for i in 0..n {
        let ci = &s[i * n..i * n + n];
        x[i] = (x[i] - dot(&ci[..i], &x[..i])) / ci[i];
    }
    for i in (0..n).rev() {
        let ci = &s[i * n..i * n + n];
        x[i] /= ci[i];
        let xi = x[i];
        for (xk, u) in x[..i].iter_mut().zip(&ci[..i]) {
            *xk -= u * xi;
        }
    }
    true
}

/// Buffers of one run, so iterations do not allocate.
#[derive(Debug, Clone)]
struct Work {
    a: DMatrix<f64>,
    delta: DVector<f64>,
    x_new: DVector<f64>,
    jtj_new: DMatrix<f64>,
    g_new: DVector<f64>,
    scale: DVector<f64>,
    /// The trial point as the step made it, before [`NormalEquations::admit`].
    x_step: DVector<f64>,
}

impl Work {
    fn new(n: usize) -> Work {
        Work {
            a: DMatrix::zeros(n, n),
            delta: DVector::zeros(n),
            x_new: DVector::zeros(n),
            jtj_new: DMatrix::zeros(n, n),
            g_new: DVector::zeros(n),
            scale: DVector::zeros(n),
            x_step: DVector::zeros(n),
        }
    }

    /// Raises Marquardt's scale D to diag(JᵀJ) where that is larger, keeping it above zero.
    fn raise_scale(&mut self, jtj: &DMatrix<f64>) {
        for i in 0..self.scale.len() {
            self.scale[i] = self.scale[i].max(jtj[(i, i)]).max(f64::MIN_POSITIVE);
        }
    }
}

fn all_finite(jtj: &DMatrix<f64>, g: &DVector<f64>) -> bool {
    // A non-finite entry of J makes its column's squared norm (a diagonal entry) non-finite.
    (0..jtj.nrows()).all(|i| jtj[(i, i)].is_finite()) && g.iter().all(|v| v.is_finite())
}

/// Damping (relative to Marquardt's scale) at or below which a step counts as near Gauss–Newton for the
/// `ftol` and `xtol` tests.
pub const NEAR_GAUSS_NEWTON: f64 = 1e-2;

/// The message of [`TerminationReason::SolverExit`] when damping grew without any cost decrease.
pub const NO_PROGRESS: &str = "no further progress";

/// The message of [`TerminationReason::SolverExit`] when the problem asked the run to end
/// ([`NormalEquations::halt`]).
pub const HALTED: &str = "halted by the problem";

#[derive(Debug, Clone)]
pub struct LevenbergMarquardt {
    /// Converged when a step lowers the cost by less than `ftol`·cost.
    pub ftol: f64,
    /// Converged when ‖δ‖ < `xtol`·(‖x‖ + `xtol`).
    pub xtol: f64,
    /// Converged when every |gᵢ| / (‖Jᵢ‖·‖r‖) < `gtol` (cosine between residual and a column).
    pub gtol: f64,
    /// Converged, without a trial point, when the Gauss–Newton step at x predicts a decrease
    /// gᵀ(JᵀJ)⁻¹g below `ptol`·χ² (0 turns the test off).
    pub ptol: f64,
    /// When the Gauss–Newton step predicts a decrease between `ptol`·χ² and `last_step`·χ², it is
    /// taken on a cost-only evaluation ([`NormalEquations::cost`]) and the run stops there if the
    /// measured decrease equals the predicted one to within `ptol`·χ² (0 turns this off; see the
    /// module notes).
    pub last_step: f64,
    /// Largest change of any parameter in one step (the step is shortened to it); for log-parameters
    /// 5 means a factor e⁵ ≈ 150.
    pub max_step: f64,
    /// Trial steps tried per iteration before giving up.
    pub max_trials: usize,
    /// Damping (relative to Marquardt's scale) at or below which an accepted step may end the run by
    /// the `ftol` and `xtol` tests; [`NEAR_GAUSS_NEWTON`] by default, infinite to let any step end it.
    pub near_gauss_newton: f64,
    /// Evaluates each trial point's cost alone first ([`NormalEquations::cost`]) and forms its normal
    /// equations only when the step is accepted: for a problem whose cost-only pass is much cheaper
    /// than a full one and whose trials are often rejected. Off by default (one pass per trial).
    pub cost_first: bool,
    /// Steps accepted in the current (or last) run, the cost-only last step included.
    accepted: u64,
    lambda: f64,
    nu: f64,
    work: Option<Work>,
    stop: Option<TerminationReason>,
}

impl Default for LevenbergMarquardt {
    fn default() -> Self {
        LevenbergMarquardt {
            ftol: 1e-9,
            xtol: 1e-10,
            gtol: 1e-10,
            ptol: 1e-9,
            last_step: 1e-4,
            max_step: 5.0,
            max_trials: 40,
            near_gauss_newton: NEAR_GAUSS_NEWTON,
            cost_first: false,
            accepted: 0,
            lambda: 1e-3,
            nu: 2.0,
            work: None,
            stop: None,
        }
    }
}

impl LevenbergMarquardt {
    /// Starts with damping `lambda` (relative to diag(JᵀJ)); small when the start is near the answer.
    pub fn with_initial_damping(mut self, lambda: f64) -> Self {
        self.lambda = lambda;
        self
    }

    /// Converges when a step lowers the cost by less than `ftol`·cost or moves less than `xtol`.
    pub fn with_tolerances(mut self, ftol: f64, xtol: f64) -> Self {
        self.ftol = ftol;
        self.xtol = xtol;
        self
    }

    /// Converges, without a trial point, when the Gauss–Newton step predicts a decrease below
    /// `ptol`·cost.
    pub fn with_predicted_tolerance(mut self, ptol: f64) -> Self {
        self.ptol = ptol;
        self
    }

    /// Steps accepted in the last run (read from the solver an argmin result hands back). An
    /// iteration that only finds the point at its minimum accepts none.
    pub fn accepted_steps(&self) -> u64 {
        self.accepted
    }
}

/// x·y with four accumulators, so the compiler can vectorise it.
#[inline]
fn dot(x: &[f64], y: &[f64]) -> f64 {
    let mut acc = [0.0; 4];
    let (xc, yc) = (x.chunks_exact(4), y.chunks_exact(4));
    let tail: f64 = xc
        .remainder()
        .iter()
        .zip(yc.remainder())
        .map(|(a, b)| a * b)
        .sum();
    for (a, b) in xc.zip(yc) {
        for i in 0..4 {
            acc[i] += a[i] * b[i];
        }
    }
    acc[0] + acc[1] + acc[2] + acc[3] + tail
}

/// JᵀJ and Jᵀr from the contiguous columns of J.
pub fn normal_equations(j: &DMatrix<f64>, r: &DVector<f64>) -> (DMatrix<f64>, DVector<f64>) {
    let (m, n) = j.shape();
    let data = j.as_slice();
    let col = |c: usize| &data[c * m..(c + 1) * m];
    let mut jtj = DMatrix::zeros(n, n);
    let mut g = DVector::zeros(n);
    for a in 0..n {
        g[a] = dot(col(a), r.as_slice());
        for b in 0..=a {
            let v = dot(col(a), col(b));
            jtj[(a, b)] = v;
            jtj[(b, a)] = v;
        }
    }
    (jtj, g)
}

fn non_finite(what: &str) -> Error {
    Error::msg(format!("the {what} is not finite at the starting point"))
}

/// A least-squares problem may take back a Jacobian the solver no longer needs, to fill it again
/// instead of allocating and zeroing a new one (a 3202×6 matrix is 150 kB per iteration).
pub trait RecycleJacobian {
    fn recycle_jacobian(&self, _jacobian: DMatrix<f64>) {}
}

impl<O: NormalEquations> Solver<O, LmState> for LevenbergMarquardt {
    fn name(&self) -> &str {
        "Levenberg-Marquardt"
    }

    fn init(
        &mut self,
        problem: &mut Problem<O>,
        state: LmState,
    ) -> Result<(LmState, Option<KV>), Error> {
        let x = state
            .get_param()
            .cloned()
            .ok_or_else(|| Error::msg("Levenberg-Marquardt needs a starting point"))?;
        let n = x.len();
        let mut jtj = DMatrix::zeros(n, n);
        let mut g = DVector::zeros(n);
        let cost = problem.problem("normal_equations", |p| {
            p.normal_equations(x.as_slice(), &mut jtj, &mut g)
        })?;
        if !cost.is_finite() {
            return Err(non_finite("cost"));
        }
        if !all_finite(&jtj, &g) {
            return Err(non_finite("Jacobian"));
        }
        self.work = Some(Work::new(n));
        self.stop = None;
        self.nu = 2.0;
        self.accepted = 0;
        Ok((state.param(x).gradient(g).hessian(jtj).cost(cost), None))
    }

    fn next_iter(
        &mut self,
        problem: &mut Problem<O>,
        mut state: LmState,
    ) -> Result<(LmState, Option<KV>), Error> {
        let x = state.take_param().expect("init sets the parameters");
        let g = state.take_gradient().expect("init sets Jᵀr");
        let jtj = state.take_hessian().expect("init sets JᵀJ");
        let cost = state.get_cost();
        let n = x.len();
        if problem.problem("halt", |p| Ok(p.halt()))? {
            self.stop = Some(TerminationReason::SolverExit(HALTED.into()));
            return Ok((state.param(x).gradient(g).hessian(jtj).cost(cost), None));
        }
        self.work
            .get_or_insert_with(|| Work::new(n))
            .raise_scale(&jtj);
        let g_cos = gradient_cosine(&jtj, &g, cost);
        if cost == 0.0 || g_cos < self.gtol {
            self.stop = Some(TerminationReason::SolverConverged);
            return Ok((state.param(x).gradient(g).hessian(jtj).cost(cost), None));
        }
        if self.ptol > 0.0 {
            match self.gauss_newton_test(problem, &x, &g, &jtj, cost)? {
                GaussNewton::Undecided => {}
                GaussNewton::AtMinimum => {
                    self.stop = Some(TerminationReason::SolverConverged);
                    return Ok((state.param(x).gradient(g).hessian(jtj).cost(cost), None));
                }
                GaussNewton::LastStep(cost_new) => {
                    self.stop = Some(TerminationReason::SolverConverged);
                    self.accepted += 1;
                    let w = self.work.as_mut().expect("set above");
                    let mut x = x;
                    std::mem::swap(&mut x, &mut w.x_new);
                    return Ok((state.param(x).gradient(g).hessian(jtj).cost(cost_new), None));
                }
            }
        }
        if let Some(cost_new) = self.damped_step(problem, &x, &g, &jtj, cost)? {
            // Swap the accepted point in; the old buffers become next iteration's scratch.
            let w = self.work.as_mut().expect("set above");
            let mut x = x;
            let mut g = g;
            let mut jtj = jtj;
            std::mem::swap(&mut x, &mut w.x_new);
            std::mem::swap(&mut g, &mut w.g_new);
            std::mem::swap(&mut jtj, &mut w.jtj_new);
            return Ok((state.param(x).gradient(g).hessian(jtj).cost(cost_new), None));
        }
        // Damping exhausted: at a minimum to rounding when the gradient is orthogonal to the residual.
        self.stop = Some(if g_cos < 1e-6 {
            TerminationReason::SolverConverged
        } else {
            TerminationReason::SolverExit(NO_PROGRESS.into())
        });
        Ok((state.param(x).gradient(g).hessian(jtj).cost(cost), None))
    }

    fn terminate(&mut self, _state: &LmState) -> TerminationStatus {
        match &self.stop {
            Some(reason) => TerminationStatus::Terminated(reason.clone()),
            None => TerminationStatus::NotTerminated,
        }
    }
}

/// What the undamped Gauss–Newton step says about the current point.
enum GaussNewton {
    /// It predicts no worthwhile decrease: the point is the minimum.
    AtMinimum,
    /// It was taken on a cost-only evaluation that confirmed the predicted decrease: the run
    /// ends at the new point (in `Work::x_new`) with this cost.
    LastStep(f64),
    /// Neither: damped steps follow.
    Undecided,
}

impl LevenbergMarquardt {
    /// The `ptol` and `last_step` tests of the module notes on the undamped step at `x`.
    fn gauss_newton_test<O: NormalEquations>(
        &mut self,
        problem: &mut Problem<O>,
        x: &DVector<f64>,
        g: &DVector<f64>,
        jtj: &DMatrix<f64>,
        cost: f64,
    ) -> Result<GaussNewton, Error> {
        let n = x.len();
        let w = self.work.as_mut().expect("next_iter sets the buffers");
        // The undamped step δ = −(JᵀJ)⁻¹g predicts the decrease −(2δᵀg + δᵀJᵀJδ) = −δᵀg. A
        // singular JᵀJ (no Cholesky factor) or a non-finite step skips the test.
        w.a.copy_from(jtj);
        for i in 0..n {
            w.delta[i] = -g[i];
        }
        if !cholesky_solve(&mut w.a, &mut w.delta) {
            return Ok(GaussNewton::Undecided);
        }
        let predicted = -w.delta.dot(g);
        if predicted.is_finite() && predicted <= self.ptol * cost {
            return Ok(GaussNewton::AtMinimum);
        }
        if predicted > 0.0 && predicted <= self.last_step * cost && w.delta.amax() <= self.max_step
        {
            w.x_new.copy_from(x);
            w.x_new += &w.delta;
            // Only a step the problem admits unchanged is the step the prediction is for.
            w.x_step.copy_from(&w.x_new);
            let x_new = &mut w.x_new;
            if !problem.problem("admit", |p| Ok(p.admit(x_new.as_mut_slice())))?
                || *x_new != w.x_step
            {
                return Ok(GaussNewton::Undecided);
            }
            let cost_new = problem.problem("cost", |p| p.cost(x_new.as_slice()))?;
            let actual = cost - cost_new;
            if cost_new.is_finite()
                && actual > 0.0
                && (actual - predicted).abs() <= self.ptol * cost
            {
                return Ok(GaussNewton::LastStep(cost_new));
            }
        }
        Ok(GaussNewton::Undecided)
    }

    /// Trial steps with growing damping until one lowers the cost. Returns that cost, with the new
    /// point and its normal equations in `Work::x_new`, `Work::jtj_new` and `Work::g_new`;
    /// `None` when the damping runs out first. Marks the run converged when the accepted step, near
    /// Gauss–Newton, gained or moved too little.
    fn damped_step<O: NormalEquations>(
        &mut self,
        problem: &mut Problem<O>,
        x: &DVector<f64>,
        g: &DVector<f64>,
        jtj: &DMatrix<f64>,
        cost: f64,
    ) -> Result<Option<f64>, Error> {
        let n = x.len();
        let w = self.work.as_mut().expect("next_iter sets the buffers");
        for _ in 0..self.max_trials {
            w.a.copy_from(jtj);
            for i in 0..n {
                w.a[(i, i)] += self.lambda * w.scale[i];
                w.delta[i] = -g[i];
            }
            let solved = cholesky_solve(&mut w.a, &mut w.delta);
            let biggest = w.delta.amax();
            if !solved || !biggest.is_finite() {
                self.lambda *= self.nu;
                self.nu *= 2.0;
                continue;
            }
            if biggest > self.max_step {
                w.delta *= self.max_step / biggest;
            }
            w.x_new.copy_from(x);
            w.x_new += &w.delta;
            w.x_step.copy_from(&w.x_new);
            let x_new = &mut w.x_new;
            if !problem.problem("admit", |p| Ok(p.admit(x_new.as_mut_slice())))? {
                self.lambda *= self.nu;
                self.nu *= 2.0;
                continue;
            }
            // A point the problem moved (onto a bound, say): the moved parameters keep where it put
            // them and the others take the damped step that is best given that, so a bound on one
            // parameter does not leave the ones correlated with it where the free step sent them.
            // The step is then the one actually taken.
            if w.x_new != w.x_step {
                let moved: Vec<bool> = (0..n).map(|i| w.x_new[i] != w.x_step[i]).collect();
                let damping = (self.lambda, self.max_step);
                if let Some(free_step) = step_given(damping, jtj, g, &w.scale, x, &w.x_new, &moved)
                {
                    w.x_step.copy_from(x);
                    w.x_step += &free_step;
                    for (i, _) in moved.iter().enumerate().filter(|(_, m)| **m) {
                        w.x_step[i] = w.x_new[i];
                    }
                    let candidate = &mut w.x_step;
                    if problem.problem("admit", |p| Ok(p.admit(candidate.as_mut_slice())))? {
                        w.x_new.copy_from(&w.x_step);
                    }
                }
                w.delta.copy_from(&w.x_new);
                w.delta -= x;
            }
            // Predicted decrease of χ² from the linear model: −(2δᵀg + δᵀJᵀJδ).
            let quad = quadratic_form(jtj, &w.delta);
            let predicted = -(2.0 * w.delta.dot(g) + quad);
            let (x_new, jtj_new, g_new) = (&w.x_new, &mut w.jtj_new, &mut w.g_new);
            let mut cost_new = f64::NAN;
            if self.cost_first {
                cost_new = problem.problem("cost", |p| p.cost(x_new.as_slice()))?;
            }
            let worth_a_pass = !self.cost_first
                || (cost_new.is_finite()
                    && cost_new < cost
                    && predicted > 0.0
                    && (cost - cost_new) / predicted > 1e-4);
            if worth_a_pass {
                cost_new = problem.problem("normal_equations", |p| {
                    p.normal_equations(x_new.as_slice(), jtj_new, g_new)
                })?;
            }
            let rho = (cost - cost_new) / predicted;
            if cost_new.is_finite()
                && cost_new < cost
                && predicted > 0.0
                && rho > 1e-4
                && all_finite(&w.jtj_new, &w.g_new)
            {
                self.lambda *= (1.0 - (2.0 * rho - 1.0).powi(3)).max(1.0 / 3.0);
                self.lambda = self.lambda.max(1e-15);
                self.nu = 2.0;
                self.accepted += 1;
                // A small decrease or step says "converged" only for a step near Gauss–Newton: a
                // heavily damped step is short and gains little far from the minimum too (seen on a
                // sweep whose DC resistance lies below the noise: damping stopped a fit 30 % above
                // the minimum in χ²).
                if self.lambda <= self.near_gauss_newton
                    && (cost - cost_new <= self.ftol * cost
                        || w.delta.norm() <= self.xtol * (x.norm() + self.xtol))
                {
                    self.stop = Some(TerminationReason::SolverConverged);
                }
                return Ok(Some(cost_new));
            }
            self.lambda *= self.nu;
            self.nu *= 2.0;
            if self.lambda > 1e30 {
                break;
            }
        }
        Ok(None)
    }
}

/// The damped step (`damping` = (λ, largest change of a parameter)) with the `moved` parameters held
/// at `x_moved`: the free parameters F solve (JᵀJ + λD)_FF δ_F = −g_F − (JᵀJ + λD)_FA δ_A with
/// δ_A = (x_moved − x)_A. `None` when nothing is free or the reduced system has no Cholesky factor.
fn step_given(
    (lambda, max_step): (f64, f64),
    jtj: &DMatrix<f64>,
    g: &DVector<f64>,
    scale: &DVector<f64>,
    x: &DVector<f64>,
    x_moved: &DVector<f64>,
    moved: &[bool],
) -> Option<DVector<f64>> {
    let n = x.len();
    let free: Vec<usize> = (0..n).filter(|&i| !moved[i]).collect();
    if free.is_empty() {
        return None;
    }
    let damped = |i: usize, j: usize| jtj[(i, j)] + if i == j { lambda * scale[i] } else { 0.0 };
    let mut a = DMatrix::from_fn(free.len(), free.len(), |r, c| damped(free[r], free[c]));
    let mut b = DVector::from_fn(free.len(), |r, _| {
        let i = free[r];
        -g[i]
            - (0..n)
                .filter(|&j| moved[j])
                .map(|j| damped(i, j) * (x_moved[j] - x[j]))
                .sum::<f64>()
    });
    if !cholesky_solve(&mut a, &mut b) || !b.iter().all(|v| v.is_finite()) {
        return None;
    }
    let mut step = DVector::zeros(n);
    for (r, &i) in free.iter().enumerate() {
        step[i] = b[r];
    }
    let biggest = step.amax();
    if biggest > max_step {
        step *= max_step / biggest;
    }
    Some(step)
}

/// The largest cosine between the residual and a column of J, |gᵢ| / (‖Jᵢ‖·‖r‖).
fn gradient_cosine(jtj: &DMatrix<f64>, g: &DVector<f64>, cost: f64) -> f64 {
    let r_norm = cost.sqrt();
    (0..g.len())
        .map(|i| g[i].abs() / (jtj[(i, i)].sqrt() * r_norm).max(f64::MIN_POSITIVE))
        .fold(0.0, f64::max)
}

/// vᵀAv, row by row.
fn quadratic_form(a: &DMatrix<f64>, v: &DVector<f64>) -> f64 {
    let n = v.len();
    let mut quad = 0.0;
    for i in 0..n {
        let mut row = 0.0;
        for k in 0..n {
            row += a[(i, k)] * v[k];
        }
        quad += v[i] * row;
    }
    quad
}

#[cfg(test)]
mod tests {
    use super::*;
    use argmin::core::Executor;

    /// y = a·exp(−b·t) sampled without noise: the solver must find (a, b) exactly.
    struct Decay {
        t: Vec<f64>,
        y: Vec<f64>,
    }

    impl Operator for Decay {
        type Param = DVector<f64>;
        type Output = DVector<f64>;
        fn apply(&self, p: &DVector<f64>) -> Result<DVector<f64>, Error> {
            Ok(DVector::from_iterator(
                self.t.len(),
                self.t
                    .iter()
                    .zip(&self.y)
                    .map(|(t, y)| p[0] * (-p[1] * t).exp() - y),
            ))
        }
    }

    impl RecycleJacobian for Decay {}

    impl Jacobian for Decay {
        type Param = DVector<f64>;
        type Jacobian = DMatrix<f64>;
        fn jacobian(&self, p: &DVector<f64>) -> Result<DMatrix<f64>, Error> {
            Ok(DMatrix::from_fn(self.t.len(), 2, |i, k| {
                let e = (-p[1] * self.t[i]).exp();
                if k == 0 { e } else { -p[0] * self.t[i] * e }
            }))
        }
    }

    #[test]
    fn recovers_an_exponential_decay_from_a_poor_start() {
        let t: Vec<f64> = (0..40).map(|i| i as f64 * 0.1).collect();
        let y = t.iter().map(|t| 3.0 * (-1.7 * t).exp()).collect();
        let res = Executor::new(Dense(Decay { t, y }), LevenbergMarquardt::default())
            .configure(|s| s.param(DVector::from_vec(vec![1.0, 0.1])).max_iters(200))
            .run()
            .unwrap();
        let p = res.state().get_best_param().unwrap();
        assert!(
            (p[0] - 3.0).abs() < 1e-9 && (p[1] - 1.7).abs() < 1e-9,
            "{p}"
        );
        assert!(res.state().get_best_cost() < 1e-18);
        assert!(matches!(
            res.state().get_termination_reason(),
            Some(TerminationReason::SolverConverged)
        ));
    }

    #[test]
    fn a_short_heavily_damped_step_does_not_count_as_converged() {
        // Start far off with heavy damping and a loose ftol: each early step is short and gains
        // little, which used to stop the run at once; only a step near Gauss–Newton may stop it.
        let t: Vec<f64> = (0..40).map(|i| i as f64 * 0.1).collect();
        let y = t.iter().map(|t| 3.0 * (-1.7 * t).exp()).collect();
        let solver = LevenbergMarquardt::default()
            .with_initial_damping(1e6)
            .with_tolerances(1e-3, 1e-3);
        let res = Executor::new(Dense(Decay { t, y }), solver)
            .configure(|s| s.param(DVector::from_vec(vec![1.0, 0.1])).max_iters(500))
            .run()
            .unwrap();
        let p = res.state().get_best_param().unwrap();
        assert!(
            (p[0] - 3.0).abs() < 1e-3 && (p[1] - 1.7).abs() < 1e-3,
            "stopped early at {p}"
        );
    }

    #[test]
    fn a_start_where_the_cost_is_not_finite_is_an_error_not_a_nan() {
        let t = vec![0.0, 1.0, 2.0];
        let y = vec![1.0, 0.5, 0.25];
        let res = Executor::new(Dense(Decay { t, y }), LevenbergMarquardt::default())
            .configure(|s| s.param(DVector::from_vec(vec![1.0, -1e6])).max_iters(10))
            .run();
        assert!(res.is_err());
    }

    /// The decay problem with its rate held at or below `cap` (a step beyond is projected onto it) and
    /// its amplitude positive (a step to a negative one is refused), ending when `halt_after` passes
    /// have run.
    struct Capped {
        inner: Dense<Decay>,
        cap: f64,
        passes: std::cell::Cell<usize>,
        halt_after: usize,
    }

    impl NormalEquations for Capped {
        fn normal_equations(
            &self,
            x: &[f64],
            jtj: &mut DMatrix<f64>,
            g: &mut DVector<f64>,
        ) -> Result<f64, Error> {
            self.passes.set(self.passes.get() + 1);
            self.inner.normal_equations(x, jtj, g)
        }

        fn admit(&self, x: &mut [f64]) -> bool {
            x[1] = x[1].min(self.cap);
            x[0] > 0.0
        }

        fn halt(&self) -> bool {
            self.passes.get() >= self.halt_after
        }
    }

    fn capped(cap: f64, halt_after: usize) -> Capped {
        let t: Vec<f64> = (0..40).map(|i| i as f64 * 0.1).collect();
        let y = t.iter().map(|t| 3.0 * (-1.7 * t).exp()).collect();
        Capped {
            inner: Dense(Decay { t, y }),
            cap,
            passes: std::cell::Cell::new(0),
            halt_after,
        }
    }

    #[test]
    fn a_projected_run_ends_on_its_bound_at_the_constrained_minimum() {
        // Rate capped at 1.2 below the data's 1.7: the constrained optimum has b = 1.2 and the
        // amplitude that is then linear least squares, a = Σ y·e / Σ e² with e = exp(−1.2 t).
        let res = Executor::new(capped(1.2, usize::MAX), LevenbergMarquardt::default())
            .configure(|s| s.param(DVector::from_vec(vec![1.0, 0.1])).max_iters(200))
            .run()
            .unwrap();
        let p = res.state().get_param().unwrap().clone();
        let Dense(Decay { t, y }) = &res.problem.problem.as_ref().unwrap().inner;
        let e: Vec<f64> = t.iter().map(|t| (-1.2 * t).exp()).collect();
        let a =
            e.iter().zip(y).map(|(e, y)| e * y).sum::<f64>() / e.iter().map(|e| e * e).sum::<f64>();
        let c_min: f64 = e.iter().zip(y).map(|(e, y)| (a * e - y).powi(2)).sum();
        let cost = res.state().get_cost();
        eprintln!(
            "cost {cost} c_min {c_min} reason {:?} steps {}",
            res.state().get_termination_reason(),
            res.solver.accepted_steps()
        );
        assert_eq!(p[1], 1.2, "{p}");
        assert!((p[0] - a).abs() <= 1e-6 * a, "{p} against a = {a}");
        assert!(
            (cost - c_min).abs() <= 1e-9 * c_min,
            "{cost} against {c_min}"
        );
        assert!(res.solver.accepted_steps() > 0);
    }

    #[test]
    fn a_halted_run_keeps_its_last_accepted_point() {
        // Unhindered the run takes several steps; halted after its first pass it takes none and
        // returns the start; halted later it returns a point of lower cost than the start.
        let start = vec![1.0, 0.1];
        let run = |halt_after: usize| {
            let res = Executor::new(capped(10.0, halt_after), LevenbergMarquardt::default())
                .configure(|s| s.param(DVector::from_vec(start.clone())).max_iters(200))
                .run()
                .unwrap();
            let x = res.state().get_param().unwrap().clone();
            let reason = res.state().get_termination_reason().cloned();
            (
                x,
                res.state().get_cost(),
                res.solver.accepted_steps(),
                reason,
            )
        };
        let (x, _, steps, reason) = run(1);
        assert_eq!((x.as_slice(), steps), (&start[..], 0));
        assert_eq!(reason, Some(TerminationReason::SolverExit(HALTED.into())));
        let (free_x, free_cost, free_steps, _) = run(usize::MAX);
        let (x, cost, steps, _) = run(3);
        assert!(free_steps > steps && steps > 0, "{free_steps} vs {steps}");
        assert!(cost > free_cost && x != free_x, "{cost} vs {free_cost}");
    }

    /// Counts the full passes a run makes and, apart, its cost-only evaluations.
    struct Counted<P>(P, std::cell::Cell<usize>, std::cell::Cell<usize>);

    impl<P> Counted<P> {
        fn new(problem: P) -> Self {
            Counted(problem, std::cell::Cell::new(0), std::cell::Cell::new(0))
        }
    }

    impl<P: NormalEquations> NormalEquations for Counted<P> {
        fn normal_equations(
            &self,
            x: &[f64],
            jtj: &mut DMatrix<f64>,
            g: &mut DVector<f64>,
        ) -> Result<f64, Error> {
            self.1.set(self.1.get() + 1);
            self.0.normal_equations(x, jtj, g)
        }

        fn cost(&self, x: &[f64]) -> Result<f64, Error> {
            self.2.set(self.2.get() + 1);
            self.0.cost(x)
        }
    }

    #[test]
    fn the_last_step_on_a_cost_only_pass_reaches_the_same_minimum() {
        // Noisy decay data (a residual at the minimum), started off the minimum so that after one or
        // two full steps the Gauss–Newton prediction is small but above ptol.
        let t: Vec<f64> = (0..60).map(|i| i as f64 * 0.1).collect();
        let y: Vec<f64> = t
            .iter()
            .enumerate()
            .map(|(i, t)| 3.0 * (-1.7 * t).exp() + 1e-2 * ((i * 7919 % 13) as f64 / 6.0 - 1.0))
            .collect();
        let run = |solver: LevenbergMarquardt| {
            let problem = Counted::new(Dense(Decay {
                t: t.clone(),
                y: y.clone(),
            }));
            let res = Executor::new(problem, solver)
                .configure(|s| s.param(DVector::from_vec(vec![2.0, 1.2])).max_iters(200))
                .run()
                .unwrap();
            let p = res.problem.problem.as_ref().unwrap();
            let (passes, costs) = (p.1.get(), p.2.get());
            let state = res.state();
            assert!(matches!(
                state.get_termination_reason(),
                Some(TerminationReason::SolverConverged)
            ));
            (
                state.get_best_param().unwrap().clone(),
                state.get_cost(),
                passes,
                costs,
            )
        };
        // Only the predicted-decrease test ends these runs (no ftol or xtol stop after a full pass).
        let solver = LevenbergMarquardt::default()
            .with_tolerances(0.0, 0.0)
            .with_predicted_tolerance(1e-11);
        let (p_full, c_full, passes_full, costs_full) = run(LevenbergMarquardt {
            last_step: 0.0,
            ..solver.clone()
        });
        assert_eq!(costs_full, 0, "no cost-only pass when the last step is off");
        let (p_cheap, c_cheap, passes_cheap, costs_cheap) = run(solver);
        assert_eq!(costs_cheap, 1, "the last step is taken on a cost-only pass");
        assert!(
            passes_cheap < passes_full,
            "{passes_cheap} full passes with the cheap last step, {passes_full} without"
        );
        // The same minimum: the cost to 1e-12 relative and the parameters to 1e-6.
        assert!(
            (c_cheap / c_full - 1.0).abs() < 1e-12,
            "{c_cheap} vs {c_full}"
        );
        for k in 0..2 {
            assert!(
                (p_cheap[k] / p_full[k] - 1.0).abs() < 1e-6,
                "{p_cheap} vs {p_full}"
            );
        }
    }

    #[test]
    fn a_run_started_at_the_minimum_stops_after_the_first_pass() {
        // Data with a residual (no exact fit), so only the predicted-decrease test can stop the run
        // before a trial point: first converge, then start again from the answer.
        let t: Vec<f64> = (0..40).map(|i| i as f64 * 0.1).collect();
        let y: Vec<f64> = t
            .iter()
            .enumerate()
            .map(|(i, t)| 3.0 * (-1.7 * t).exp() + if i % 2 == 0 { 1e-3 } else { -1e-3 })
            .collect();
        let run = |x0: Vec<f64>, solver: LevenbergMarquardt| {
            let problem = Counted::new(Dense(Decay {
                t: t.clone(),
                y: y.clone(),
            }));
            let res = Executor::new(problem, solver)
                .configure(|s| s.param(DVector::from_vec(x0)).max_iters(200))
                .run()
                .unwrap();
            let passes = res.problem.problem.as_ref().unwrap().1.get();
            let reason = res.state().get_termination_reason().cloned();
            (
                res.state().get_best_param().unwrap().clone(),
                passes,
                reason,
            )
        };
        let (p, passes, _) = run(vec![1.0, 0.1], LevenbergMarquardt::default());
        assert!(
            passes > 2,
            "a poor start takes several passes, took {passes}"
        );
        // A start a little off the minimum: one Gauss–Newton step, then the test stops the run.
        let near = vec![p[0] * (1.0 + 1e-4), p[1]];
        let (_, without, _) = run(
            near.clone(),
            LevenbergMarquardt::default().with_predicted_tolerance(0.0),
        );
        let (_, with, _) = run(near, LevenbergMarquardt::default());
        assert!(
            with < without,
            "{with} passes with the test, {without} without"
        );
        let (q, again, reason) = run(p.as_slice().to_vec(), LevenbergMarquardt::default());
        assert_eq!(again, 1, "started at the minimum");
        assert!(matches!(reason, Some(TerminationReason::SolverConverged)));
        assert!((&q - &p).norm() == 0.0);
    }
}
