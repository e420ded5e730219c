//! The lumped fit: starting values, LM per candidate structure, model selection, uncertainty, report.
//!
//! Model selection. Stage A fits every assignment of section kinds (series branch or parallel tank) to
//! the first 0..=`max_sections` resonance pairs the curve shows, with all of rp, k_ac and ls present;
//! a structure with n sections is started both from the solution with its first n − 1 and from the
//! curve's own reading, and the better of the two is kept. Stage B takes the best
//! section assignment and tries every subset of {rp, k_ac, ls}, starting from the stage-A solution.
//! The criterion is BIC with the noise scale estimated from the fit,
//! `M·ln(χ²/M) + k·ln(M)` (M residuals, k parameters), so a sweep whose stated σ is off by a constant
//! factor still selects the same model; every candidate is recorded.
//!
//! DCR reading: a prior residual `(rdc − reading)/σ_reading` in the least-squares problem (not a fixed
//! value; σ_reading defaults to 0.5 % + 1 mΩ), so rdc carries the reading's uncertainty combined with
//! what the sweep says, and a reading that contradicts the sweep is weighed against it instead of
//! being imposed exactly. The prior counts in each candidate's cost; `quality` is from the sweep alone.
//!
//! Each structure is fitted on log-parameters by [`fit_structure`]: LM first on a thinned copy of a
//! long sweep, then on all points (the result is the full-data optimum).
//!
//! Uncertainty: the covariance of θ = ln p is `s²·(JᵀJ)⁻¹·JᵀGJ·(JᵀJ)⁻¹` at the solution (J the
//! Jacobian of the weighted residuals, G the density weights, so with a logarithmic sweep it is
//! `s²·(JᵀJ)⁻¹`; the sandwich keeps σ honest when the weights count sparse points up), computed from
//! the symmetric eigen-decomposition of the column-scaled JᵀJ (no explicit inverse of an
//! ill-conditioned matrix), with `s² = max(1, χ²/(M − k))`: when the residuals are larger than the
//! stated σ the spread is
//! widened to match them; when they are smaller the stated σ is trusted (no shrinking). 1σ of p is
//! `p·σ_θ`. A parameter is *not identifiable* when its relative 1σ exceeds
//! [`NOT_IDENTIFIABLE_RELATIVE_SIGMA`] or it takes part (|eigenvector component| > 0.3) in a direction
//! whose eigenvalue is below 1e-12 of the largest; its uncertainty is then `None`. The reported 1σ
//! also carries the spread from the choice among nearly equal models (see
//! [`include_selection_spread`]); the correlation matrix is that of the chosen model alone.

use super::assess;
use super::derived::{self, KnownElements};
use super::initial::{self, Guess};
use super::lm::{LevenbergMarquardt, LmState, NO_PROGRESS};
use super::plausible;
use super::problem::{FitData, LumpedProblem, density_weights};
use super::{
    Candidate, CoreUncertainty, Correlation, FitControl, FitError, FitOptions, FitReport,
    LumpedUncertainty, SectionUncertainty, Termination,
};
use crate::model::lumped::{Param, Structure};
use crate::model::{CoreDispersion, CoreLaw, FittedModel, LumpedModel, SectionKind};
use crate::sweep::Sweep;
use argmin::core::observers::{Observe, ObserverMode};
use argmin::core::{Error, Executor, KV, State, TerminationReason};
use nalgebra::{DMatrix, DVector, SymmetricEigen};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

/// Relative 1σ above which a parameter is reported as not identifiable.
pub const NOT_IDENTIFIABLE_RELATIVE_SIGMA: f64 = 0.5;

/// Result of fitting one structure.
#[derive(Debug, Clone)]
pub struct StructureFit {
    pub structure: Structure,
    pub theta: Vec<f64>,
    /// χ² = Σ r² (weighted residuals, with the DCR prior when given).
    pub cost: f64,
    pub iterations: u64,
    pub termination: Termination,
    /// JᵀJ of the weighted residuals at `theta`. (The sandwich covariance's other factor, JᵀGJ, is
    /// computed by [`spread`] for the few fits whose spread is asked for, not for every candidate.)
    pub jtj: DMatrix<f64>,
}

impl StructureFit {
    pub fn model(&self) -> LumpedModel {
        self.structure.unpack(&self.theta)
    }
}

struct CancelObserver(Arc<AtomicBool>);

impl Observe<LmState> for CancelObserver {
    fn observe_iter(&mut self, _state: &LmState, _kv: &KV) -> Result<(), Error> {
        if self.0.load(Ordering::Relaxed) {
            Err(Error::msg("cancelled"))
        } else {
            Ok(())
        }
    }
}

fn cancelled(control: &FitControl) -> bool {
    control
        .cancel
        .as_ref()
        .is_some_and(|c| c.load(Ordering::Relaxed))
}

/// Checks the sweep and options and prepares the data every candidate shares.
pub fn prepare(sweep: &Sweep, options: &FitOptions) -> Result<FitData, FitError> {
    let n = sweep.frequency_hz.len();
    if n < 20 {
        return Err(FitError::TooFewPoints(n));
    }
    if sweep.impedance_ohm.len() != n || sweep.sigma_ohm.len() != n {
        return Err(FitError::InvalidOptions(format!(
            "the sweep has {n} frequencies but {} impedances and {} uncertainties",
            sweep.impedance_ohm.len(),
            sweep.sigma_ohm.len()
        )));
    }
    for k in 0..n {
        let f = sweep.frequency_hz[k];
        if !(f.is_finite() && f > 0.0) || (k > 0 && f <= sweep.frequency_hz[k - 1]) {
            return Err(FitError::InvalidOptions(format!(
                "frequency {k} ({f} Hz) is not positive, finite and increasing"
            )));
        }
        let z = sweep.impedance_ohm[k];
        if !(z.re.is_finite() && z.im.is_finite()) {
            return Err(FitError::NonFinite(format!(
                "the impedance at {f} Hz is not finite"
            )));
        }
        let s = sweep.sigma_ohm[k];
        if !(s.is_finite() && s > 0.0) {
            return Err(FitError::InvalidOptions(format!(
                "the uncertainty at {f} Hz is {s} ohm; it must be positive and finite"
            )));
        }
    }
    options.validate()?;
    // A four-wire DCR reading in the options wins; otherwise the sweep's own 0 Hz row, when it has one.
    let dcr_prior = match (options.dcr, &sweep.dc_reading) {
        (Some(d), _) => {
            let sigma = d.sigma_ohm.unwrap_or(0.005 * d.value_ohm + 1e-3);
            Some((d.value_ohm, sigma))
        }
        (None, Some(dc)) if dc.resistance_ohm > 0.0 => Some((dc.resistance_ohm, dc.sigma_ohm)),
        _ => None,
    };
    let g = density_weights(&sweep.frequency_hz);
    Ok(FitData {
        frequency_hz: sweep.frequency_hz.clone(),
        sqrt_f: sweep.frequency_hz.iter().map(|f| f.sqrt()).collect(),
        z: sweep.impedance_ohm.clone(),
        inv_sigma: sweep
            .sigma_ohm
            .iter()
            .zip(&g)
            .map(|(s, g)| g.sqrt() / s)
            .collect(),
        sigma: sweep.sigma_ohm.clone(),
        dcr_prior,
        walls: Vec::new(),
        wall_stiffness: 1.0,
    })
}

fn termination_of(reason: Option<&TerminationReason>) -> Termination {
    match reason {
        Some(TerminationReason::MaxItersReached) => Termination::MaxIterations,
        Some(TerminationReason::Timeout) => Termination::TimeLimit,
        Some(TerminationReason::SolverExit(m)) if m == NO_PROGRESS => {
            Termination::NoFurtherProgress
        }
        _ => Termination::Converged,
    }
}

/// Points above which [`fit_structure`] first converges on a thinned copy of the sweep.
pub const COARSE_ABOVE_POINTS: usize = 600;
/// Points of the thinned copy.
pub const COARSE_POINTS: usize = 200;
/// Points of a first, coarser copy for structures without sections (whose resonances a thinner
/// copy could step over).
pub const COARSEST_POINTS: usize = 50;

/// The sizes of the thinned copies [`fit_structure`] fits before the full sweep, coarsest first, for
/// a structure with or without sections.
fn coarse_sizes(points: usize, has_sections: bool) -> Vec<usize> {
    if points <= COARSE_ABOVE_POINTS {
        return Vec::new();
    }
    if !has_sections && points >= 4 * COARSEST_POINTS {
        vec![COARSEST_POINTS, COARSE_POINTS]
    } else {
        vec![COARSE_POINTS]
    }
}

/// Whether [`fit_structure_staged`] fits thinned copies first, and where they come from.
#[derive(Clone, Copy)]
enum Thinning<'a> {
    /// Straight to the full data (a start that is already a good point of it).
    None,
    /// Thinned stages, each copy made for this fit.
    Make,
    /// Thinned stages on copies made once for many candidates.
    Shared(&'a ThinnedCopies),
}

impl Thinning<'_> {
    fn shared(&self) -> Option<&ThinnedCopies> {
        match self {
            Thinning::Shared(c) => Some(c),
            _ => None,
        }
    }
}

/// The thinned copies of one sweep's data at every size [`coarse_sizes`] may ask for, made once per
/// fit and shared by all its candidates (each copy depends on the data alone, not on the structure).
struct ThinnedCopies(Vec<(usize, FitData)>);

impl ThinnedCopies {
    fn of(data: &FitData) -> ThinnedCopies {
        // A structure without sections asks for every size there is.
        let sizes = coarse_sizes(data.frequency_hz.len(), false);
        ThinnedCopies(sizes.into_iter().map(|k| (k, thinned(data, k))).collect())
    }

    fn get(&self, size: usize) -> Option<&FitData> {
        self.0.iter().find(|(k, _)| *k == size).map(|(_, d)| d)
    }
}

struct LmRun {
    theta: Vec<f64>,
    cost: f64,
    iterations: u64,
    termination: Termination,
    jtj: DMatrix<f64>,
}

fn run_lm(
    problem: LumpedProblem<'_>,
    solver: LevenbergMarquardt,
    theta0: Vec<f64>,
    max_iterations: u64,
    time_limit: Duration,
    control: &FitControl,
) -> Result<LmRun, FitError> {
    let structure = problem.structure;
    let mut exec = Executor::new(problem, solver)
        .configure(|s| s.param(DVector::from_vec(theta0)).max_iters(max_iterations))
        .timeout(time_limit);
    if let Some(flag) = &control.cancel {
        exec = exec.add_observer(CancelObserver(flag.clone()), ObserverMode::Always);
    }
    let res = exec.run().map_err(|e| {
        if cancelled(control) {
            FitError::Cancelled
        } else {
            FitError::NonFinite(format!("{}: {e}", structure.label()))
        }
    })?;
    let mut state = res.state;
    let termination = termination_of(state.get_termination_reason());
    let iterations = state.get_iter();
    let cost = state.get_cost();
    // The solver only accepts steps that lower the cost, so the current point is the best one and
    // its JᵀJ is in the state.
    let (Some(theta), Some(jtj)) = (state.take_param(), state.take_hessian()) else {
        return Err(FitError::NonFinite(
            "the solver returned no parameters".into(),
        ));
    };
    if !cost.is_finite() || !jtj.norm_squared().is_finite() {
        return Err(FitError::NonFinite(structure.label()));
    }
    Ok(LmRun {
        theta: theta.as_slice().to_vec(),
        cost,
        iterations,
        termination,
        jtj,
    })
}

/// About `target` points of the sweep spread evenly in ln f (the nearest point to each of `target`
/// logarithmically spaced frequencies, each taken once), with density weights for the thinned grid and
/// the DCR prior and walls kept: a cheap problem with nearly the same optimum, used to get close before
/// the full-data iterations. Spread by ln f, not by index, so a linear sweep keeps its low decades.
pub fn thinned(data: &FitData, target: usize) -> FitData {
    let f = &data.frequency_hz;
    let n = f.len();
    let (lo, hi) = (f[0].ln(), f[n - 1].ln());
    let mut pick: Vec<usize> = Vec::with_capacity(target);
    for i in 0..target {
        let x = lo + (hi - lo) * i as f64 / (target - 1).max(1) as f64;
        let k = f.partition_point(|v| v.ln() < x).min(n - 1);
        let k = if k > 0 && (x - f[k - 1].ln()) < (f[k].ln() - x) {
            k - 1
        } else {
            k
        };
        if pick.last() != Some(&k) {
            pick.push(k);
        }
    }
    let frequency_hz: Vec<f64> = pick.iter().map(|&k| f[k]).collect();
    let g = density_weights(&frequency_hz);
    FitData {
        sqrt_f: pick.iter().map(|&k| data.sqrt_f[k]).collect(),
        z: pick.iter().map(|&k| data.z[k]).collect(),
        inv_sigma: pick
            .iter()
            .zip(&g)
            .map(|(&k, g)| g.sqrt() / data.sigma[k])
            .collect(),
        sigma: pick.iter().map(|&k| data.sigma[k]).collect(),
        frequency_hz,
        dcr_prior: data.dcr_prior,
        walls: data.walls.clone(),
        wall_stiffness: data.wall_stiffness,
    }
}

/// Fits one structure from a starting model (which must have every element the structure has).
///
/// A sweep of more than [`COARSE_ABOVE_POINTS`] points is first fitted on about [`COARSE_POINTS`]
/// points picked evenly in ln f (a structure without sections first on about [`COARSEST_POINTS`]); LM then
/// continues on the full sweep from there, so the result is a full-data optimum (the thinning only
/// saves iterations on the full data: from the thinned optimum the full stage usually takes one
/// Gauss–Newton step and stops on the predicted decrease, two passes over the sweep). The thinned
/// optimum may lie in another basin than the full data's (the points that decide it dropped); when
/// the staged path ends above the start's own full-data cost, LM runs again on the full data from
/// the start and the better end is kept, so a fit never ends above its start.
pub fn fit_structure(
    data: &FitData,
    structure: &Structure,
    start: &LumpedModel,
    max_iterations: u64,
    time_limit: Duration,
    control: &FitControl,
) -> Result<StructureFit, FitError> {
    fit_structure_staged(
        data,
        structure,
        start,
        max_iterations,
        time_limit,
        control,
        Thinning::Make,
    )
}

/// [`fit_structure`], with the thinned stages only when `coarse`: a start that is already a good
/// point of the full problem (a nested solution carried over) goes straight to the full data, so
/// the result can only be better than the start.
fn fit_structure_staged(
    data: &FitData,
    structure: &Structure,
    start: &LumpedModel,
    max_iterations: u64,
    time_limit: Duration,
    control: &FitControl,
    thinning: Thinning<'_>,
) -> Result<StructureFit, FitError> {
    let started = Instant::now();
    let mut theta = structure.pack(start);
    if theta.iter().any(|t| !t.is_finite()) {
        return Err(FitError::NonFinite(format!(
            "the starting values of {} are not all positive",
            structure.label()
        )));
    }
    let n = data.frequency_hz.len();
    let mut iterations = 0;
    let sizes = if !matches!(thinning, Thinning::None) {
        coarse_sizes(n, !structure.sections.is_empty())
    } else {
        Vec::new()
    };
    // The start's own cost on the full data (one cost-only pass), when thinned stages run: their
    // optimum may lie in another basin than the full data's (points the thinning dropped decide it,
    // as near a resonance that a network-analyser method barely resolves).
    let start_theta = (!sizes.is_empty()).then(|| theta.clone());
    for size in sizes {
        let coarse = match thinning.shared().and_then(|c| c.get(size)) {
            Some(copy) => std::borrow::Cow::Borrowed(copy),
            None => std::borrow::Cow::Owned(thinned(data, size)),
        };
        // Only a starting point: loose tolerances are enough. After a coarser stage the start is
        // close: begin nearly Gauss–Newton.
        let mut solver = LevenbergMarquardt::default()
            .with_tolerances(1e-6, 1e-6)
            .with_predicted_tolerance(1e-6);
        solver = solver.with_initial_damping(if iterations > 0 {
            1e-8
        } else {
            // The start read off the curve can be far off: more damping than usual at first (on
            // the benchmark choke it saves four rejected trial steps).
            1e-2
        });
        match run_lm(
            LumpedProblem::new(&coarse, structure),
            solver,
            theta.clone(),
            max_iterations.saturating_sub(iterations).max(1),
            time_limit
                .saturating_sub(started.elapsed())
                .max(Duration::from_millis(1)),
            control,
        ) {
            Ok(r) => {
                theta = r.theta;
                iterations += r.iterations;
            }
            Err(FitError::Cancelled) => return Err(FitError::Cancelled),
            Err(_) => {}
        }
    }
    let remaining = time_limit.saturating_sub(started.elapsed());
    // After the coarse stage the start is close: begin nearly Gauss–Newton.
    let solver = if iterations > 0 {
        LevenbergMarquardt::default().with_initial_damping(1e-8)
    } else {
        LevenbergMarquardt::default()
    };
    let mut fine = run_lm(
        LumpedProblem::new(data, structure),
        solver,
        theta,
        max_iterations.saturating_sub(iterations).max(1),
        remaining.max(Duration::from_millis(1)),
        control,
    )?;
    // A fit never ends above its start: when the staged path did, LM runs again on the full data
    // from the start itself and the better end is kept.
    if let Some(start_theta) = start_theta {
        let problem = LumpedProblem::new(data, structure);
        let start_cost = problem.cost_at(&start_theta);
        // Costs within rounding of each other (relative to the χ² the noise implies, as in the
        // nesting rule) are one cost: a noise-free sweep's start already at its optimum is no miss.
        if start_cost.is_finite()
            && fine.cost > start_cost
            && !same_cost(fine.cost, start_cost, data.effective_residuals())
        {
            let direct = run_lm(
                problem,
                LevenbergMarquardt::default(),
                start_theta,
                max_iterations.saturating_sub(iterations).max(1),
                time_limit
                    .saturating_sub(started.elapsed())
                    .max(Duration::from_millis(1)),
                control,
            )?;
            // Every iteration spent counts, on whichever path is kept.
            if direct.cost < fine.cost {
                iterations += fine.iterations;
                fine = direct;
            } else {
                iterations += direct.iterations;
            }
        }
    }
    Ok(StructureFit {
        structure: structure.clone(),
        theta: fine.theta,
        cost: fine.cost,
        iterations: iterations + fine.iterations,
        termination: fine.termination,
        jtj: fine.jtj,
    })
}

/// JᵀGJ at θ: the weighted residuals' Jacobian with each data row counted once more by its density
/// weight g (the prior's and walls' rows by 1). The middle of the sandwich covariance: a row with
/// weight √g/σ has variance g, so the weighted estimator's covariance is (JᵀJ)⁻¹·JᵀGJ·(JᵀJ)⁻¹.
///
/// A data row's Jacobian carries the point's weight w = √g/σ, so g·(row)² is the same product with
/// the weight √g·w = g/σ = w²σ: JᵀGJ is the JᵀJ of the same problem with each point's weight w
/// replaced by w²σ, computed by the one streaming pass the solver uses (no J is stored).
fn density_weighted_jtj(data: &FitData, structure: &Structure, theta: &[f64]) -> DMatrix<f64> {
    let mut reweighted = data.clone();
    for (w, s) in reweighted.inv_sigma.iter_mut().zip(&data.sigma) {
        *w = *w * *w * s;
    }
    let n = structure.len();
    let mut jtgj = DMatrix::zeros(n, n);
    let mut jr = DVector::zeros(n);
    LumpedProblem::new(&reweighted, structure).normal_equations_into(theta, &mut jtgj, &mut jr);
    jtgj
}

/// BIC with the noise scale estimated from the fit, on the effective number of residuals `m`
/// (density weights change how much each point counts).
/// Costs below a millionth of `m` ([`NESTING_TOLERANCE`], the rounding floor of [`same_cost`]) count
/// as that floor: a sweep fitted to rounding (noise-free data) leaves differences of 1e-12 in the
/// cost, which the logarithm would otherwise blow up into a preference for more parameters.
fn bic(cost: f64, m: f64, parameters: usize) -> f64 {
    m * (cost.max(NESTING_TOLERANCE * m) / m).ln() + parameters as f64 * m.ln()
}

/// The starting model for a structure: `prefix` (a fitted model with fewer sections, or the guess),
/// plus sections placed on the curve's resonance pairs.
fn start_for(kinds: &[SectionKind], prefix: &LumpedModel, guess: &Guess) -> LumpedModel {
    let mut m = prefix.clone();
    m.sections.truncate(kinds.len());
    for (i, &kind) in kinds.iter().enumerate().skip(m.sections.len()) {
        let (section, cp_f) = initial::section_for(kind, guess.pairs[i], m.cp_f);
        m.sections.push(section);
        m.cp_f = cp_f;
    }
    m
}

/// `model` (a fitted smaller structure) carried into `target` with every element it lacks present
/// but negligible: its impedance changes by far less than the noise, so a fit of `target` started
/// here ends no worse than `model` did. This is what makes a larger candidate never report a higher
/// cost than a candidate it contains.
fn embed(model: &LumpedModel, target: &Structure, data: &FitData, guess: &Guess) -> LumpedModel {
    let f_hi = *data.frequency_hz.last().expect("a sweep");
    let w_hi = 2.0 * std::f64::consts::PI * f_hi;
    let z_max = data.z.iter().map(|z| z.norm()).fold(0.0f64, f64::max);
    let sigma_min = data.sigma.iter().copied().fold(f64::INFINITY, f64::min);
    let mut m = model.clone();
    if target.dispersion.is_some() || m.core.is_some() {
        carry_core(&mut m, target);
    }
    if target.has_rp && m.rp_ohm.is_none() {
        m.rp_ohm = Some(1e5 * z_max);
    }
    if !target.has_rp {
        m.rp_ohm = None;
    }
    if target.has_k_ac && m.k_ac_ohm_per_sqrt_hz <= 0.0 {
        m.k_ac_ohm_per_sqrt_hz = (1e-6 * sigma_min).max(1e-11) / f_hi.sqrt();
    }
    if !target.has_k_ac {
        m.k_ac_ohm_per_sqrt_hz = 0.0;
    }
    if target.has_ls && m.ls_h <= 0.0 {
        m.ls_h = ((1e-6 * sigma_min) / w_hi).max(1e-15);
    }
    if !target.has_ls {
        m.ls_h = 0.0;
    }
    m.sections.truncate(target.sections.len());
    let srf = 1.0 / (2.0 * std::f64::consts::PI * (m.l0_h * m.cp_f).sqrt());
    for (i, &kind) in target.sections.iter().enumerate().skip(m.sections.len()) {
        // Resonating where the curve shows a pair (or at twice the main resonance), its inductance a
        // tenth of L0; a series branch nearly open, a tank nearly shorted.
        let f_res = guess
            .pairs
            .get(i)
            .map_or(2.0 * srf, |p| match kind {
                SectionKind::Series => p.0,
                SectionKind::Parallel => p.1,
            })
            .max(1.5 * srf);
        let l_h = 0.1 * m.l0_h;
        let c_f = 1.0 / ((2.0 * std::f64::consts::PI * f_res).powi(2) * l_h);
        let r_ohm = match kind {
            SectionKind::Series => 1e8 * z_max,
            SectionKind::Parallel => (1e-6 * sigma_min).max(2e-9),
        };
        m.sections.push(crate::model::Section {
            kind,
            r_ohm,
            l_h,
            c_f,
        });
    }
    m
}

/// Does structure `small` have a subset of `large`'s elements (sections as a prefix, kinds equal; a core
/// that [`core_nested`] puts inside `large`'s)?
fn nested_in(small: &Structure, large: &Structure) -> bool {
    small != large
        && core_nested(small, large)
        && (!small.has_k_ac || large.has_k_ac)
        && (!small.has_ls || large.has_ls)
        && small.sections.len() <= large.sections.len()
        && large.sections.starts_with(&small.sections)
}

/// Whether `small`'s core is `large`'s with some parameters at a limit (model/lumped.rs): no core loss is
/// rp → ∞; a single pole (rp) is Cole–Cole with α → 0; Cole–Cole is Havriliak–Negami with 1 − β → 0
/// and resonance-plus-relaxation with the resonant share → 0; no air path is an air fraction → 0. The
/// resonance law holds a single pole only approximately (overdamped), so nothing nests in it but
/// itself.
fn core_nested(small: &Structure, large: &Structure) -> bool {
    use CoreLaw::{ColeCole, HavriliakNegami, ResonanceRelaxation};
    let relaxing = |law: CoreLaw| matches!(law, ColeCole | HavriliakNegami | ResonanceRelaxation);
    (!small.has_air || large.has_air)
        && match (small.dispersion, large.dispersion) {
            (None, None) => !small.has_rp || large.has_rp,
            (None, Some(law)) => small.has_rp && relaxing(law),
            (Some(a), Some(b)) => {
                a == b || (a == ColeCole && matches!(b, HavriliakNegami | ResonanceRelaxation))
            }
            (Some(_), None) => false,
        }
}

/// How far [`embed`] sets a core parameter from its nesting limit: α, 1 − β, the resonant share and
/// the air fraction. The core's m(f) then changes by about this much relative (times |ln f/f_c| for
/// α), far below any sweep's noise, and each of these is fitted on a log scale, so LM can still move it
/// by decades in a step.
const NEGLIGIBLE_CORE: f64 = 1e-8;

/// `model`'s core carried into `target`'s law along [`core_nested`], the new parameters negligible;
/// the core is removed when `target` has none.
fn carry_core(m: &mut LumpedModel, target: &Structure) {
    let Some(law) = target.dispersion else {
        m.core = None;
        return;
    };
    let mut core = m.core.unwrap_or_else(|| CoreDispersion {
        // L0 ‖ Rp is a single pole at Rp/(2π·L0).
        law: CoreLaw::ColeCole,
        corner_hz: m.rp_ohm.unwrap_or(f64::INFINITY) / (2.0 * std::f64::consts::PI * m.l0_h),
        alpha: NEGLIGIBLE_CORE,
        beta: 1.0,
        damping: 0.0,
        air_fraction: 0.0,
        resonance_hz: 0.0,
        resonance_share: 0.0,
    });
    match (core.law, law) {
        (CoreLaw::ColeCole, CoreLaw::HavriliakNegami) => core.beta = 1.0 - NEGLIGIBLE_CORE,
        (CoreLaw::ColeCole, CoreLaw::ResonanceRelaxation) => {
            core.resonance_hz = core.corner_hz;
            core.damping = 0.5;
            core.resonance_share = NEGLIGIBLE_CORE;
        }
        _ => {}
    }
    core.law = law;
    core.air_fraction = match (target.has_air, core.air_fraction > 0.0) {
        (false, _) => 0.0,
        (true, true) => core.air_fraction,
        (true, false) => NEGLIGIBLE_CORE,
    };
    m.core = Some(core);
    m.rp_ohm = None;
}

/// Uncertainty, identifiability and correlation of a structure fit.
pub struct Spread {
    pub sigma_theta: Vec<Option<f64>>,
    pub not_identifiable: Vec<String>,
    pub correlation: Correlation,
    /// Covariance of θ (with the noise scale and widening): the material spectrum's σ.
    pub covariance_theta: DMatrix<f64>,
}

/// `data` is what `fit` was fitted to; `residuals` is its effective number of residuals; `widening`
/// multiplies every σ (correlated residuals, see [`super::assess`]).
pub fn spread(fit: &StructureFit, data: &FitData, residuals: f64, widening: f64) -> Spread {
    let n = fit.structure.len();
    let params = fit.structure.params();
    let jtj = &fit.jtj;
    let d: Vec<f64> = (0..n)
        .map(|i| jtj[(i, i)].sqrt().max(f64::MIN_POSITIVE))
        .collect();
    let scaled = DMatrix::from_fn(n, n, |i, j| jtj[(i, j)] / (d[i] * d[j]));
    let eig = SymmetricEigen::new(scaled);
    let lmax = eig.eigenvalues.amax();
    let dof = (residuals - n as f64).max(1.0);
    let s2 = (fit.cost / dof).max(1.0) * widening * widening;
    let mut singular = vec![false; n];
    // The pseudo-inverse of the scaled JᵀJ, leaving out the directions the data do not fix.
    let mut inverse = DMatrix::zeros(n, n);
    for k in 0..n {
        let lambda = eig.eigenvalues[k];
        let v = eig.eigenvectors.column(k);
        if lambda.is_nan() || lambda <= 1e-12 * lmax {
            for i in 0..n {
                if v[i].abs() > 0.3 {
                    singular[i] = true;
                }
            }
            continue;
        }
        inverse += (v * v.transpose()) / lambda;
    }
    // Sandwich: (JᵀJ)⁻¹·JᵀGJ·(JᵀJ)⁻¹, in the same column scaling. With every g = 1 it is (JᵀJ)⁻¹.
    let jtgj = density_weighted_jtj(data, &fit.structure, &fit.theta);
    let meat = DMatrix::from_fn(n, n, |i, j| jtgj[(i, j)] / (d[i] * d[j]));
    let cov = &inverse * meat * &inverse;
    let mut sigma_theta = vec![None; n];
    let mut not_identifiable = Vec::new();
    for i in 0..n {
        let var = cov[(i, i)] * s2 / (d[i] * d[i]);
        let s = var.sqrt();
        if singular[i] || !s.is_finite() || s > NOT_IDENTIFIABLE_RELATIVE_SIGMA {
            not_identifiable.push(params[i].name());
        } else {
            sigma_theta[i] = Some(s);
        }
    }
    let matrix = (0..n)
        .map(|i| {
            (0..n)
                .map(|j| {
                    if i == j {
                        return 1.0;
                    }
                    let den = (cov[(i, i)] * cov[(j, j)]).sqrt();
                    let c = cov[(i, j)] / den;
                    if c.is_finite() {
                        c.clamp(-1.0, 1.0)
                    } else {
                        0.0
                    }
                })
                .collect()
        })
        .collect();
    Spread {
        sigma_theta,
        not_identifiable,
        correlation: Correlation {
            names: params.iter().map(Param::name).collect(),
            matrix,
        },
        covariance_theta: DMatrix::from_fn(n, n, |i, j| cov[(i, j)] * s2 / (d[i] * d[j])),
    }
}

/// Candidates further than this in BIC from the best carry no weight in the selection spread
/// (weight e^(−ΔBIC/2) < 5e-5).
const SELECTION_BIC_WINDOW: f64 = 20.0;

/// Adds the spread that comes from the choice of model: the data often support two structures
/// almost equally (say rp versus k_ac), and the shared parameters differ between them by more than
/// either fit's own σ. With BIC weights wᵢ = e^(−ΔBICᵢ/2) (normalised over the candidates that have
/// the parameter), the unconditional variance of θ = ln p about the chosen value is
/// Σ wᵢ (σᵢ² + (θᵢ − θ_chosen)²) — the model-averaged variance of Burnham & Anderson, *Model Selection
/// and Multimodel Inference* (2002), §4.3 (from memory). Candidates where the parameter is not
/// identifiable are left out; a total above the identifiability limit makes it not identifiable.
fn include_selection_spread(
    sp: &mut Spread,
    data: &FitData,
    fits: &[StructureFit],
    bics: &[f64],
    chosen: usize,
    residuals: f64,
    widening: f64,
) {
    let best = bics[chosen];
    let params = fits[chosen].structure.params();
    let others: Vec<(usize, Spread)> = (0..fits.len())
        .filter(|&i| i != chosen && bics[i] - best < SELECTION_BIC_WINDOW)
        .map(|i| (i, spread(&fits[i], data, residuals, widening)))
        .collect();
    if others.is_empty() {
        return;
    }
    for (k, param) in params.iter().enumerate() {
        let Some(own) = sp.sigma_theta[k] else {
            continue;
        };
        let theta_c = fits[chosen].theta[k];
        let mut weight = 1.0;
        let mut var = own * own;
        for (i, other) in &others {
            let Some(j) = fits[*i].structure.index(*param) else {
                continue;
            };
            let Some(s) = other.sigma_theta[j] else {
                continue;
            };
            let w = (-(bics[*i] - best) / 2.0).exp();
            let d = fits[*i].theta[j] - theta_c;
            weight += w;
            var += w * (s * s + d * d);
        }
        let total = (var / weight).sqrt();
        if total > NOT_IDENTIFIABLE_RELATIVE_SIGMA {
            sp.sigma_theta[k] = None;
            sp.not_identifiable.push(param.name());
        } else {
            sp.sigma_theta[k] = Some(total);
        }
    }
}

fn uncertainty_of(fit: &StructureFit, spread: &Spread) -> LumpedUncertainty {
    let m = fit.model();
    let s = &fit.structure;
    let get = |p: Param, value: f64| {
        s.index(p)
            .and_then(|i| spread.sigma_theta[i])
            .map(|st| st * value)
    };
    LumpedUncertainty {
        l0_h: get(Param::L0, m.l0_h),
        rdc_ohm: get(Param::Rdc, m.rdc_ohm),
        k_ac_ohm_per_sqrt_hz: get(Param::KAc, m.k_ac_ohm_per_sqrt_hz),
        rp_ohm: m.rp_ohm.and_then(|rp| get(Param::Rp, rp)),
        cp_f: get(Param::Cp, m.cp_f),
        ls_h: get(Param::Ls, m.ls_h),
        sections: m
            .sections
            .iter()
            .enumerate()
            .map(|(i, sec)| SectionUncertainty {
                r_ohm: get(Param::SectionR(i), sec.r_ohm),
                l_h: get(Param::SectionL(i), sec.l_h),
                c_f: get(Param::SectionC(i), sec.c_f),
            })
            .collect(),
        // θ holds ln(1 − β) for β, so σ_β = (1 − β)·σ_θ.
        core: m.core.map(|c| CoreUncertainty {
            corner_hz: get(Param::CoreCorner, c.corner_hz),
            alpha: get(Param::CoreAlpha, c.alpha),
            beta: get(Param::CoreBeta, 1.0 - c.beta),
            damping: get(Param::CoreDamping, c.damping),
            air_fraction: get(Param::AirFraction, c.air_fraction),
            resonance_hz: get(Param::CoreResonance, c.resonance_hz),
            resonance_share: get(Param::CoreResonanceShare, c.resonance_share),
        }),
    }
}

/// Every assignment of kinds to `n` sections.
fn kind_assignments(n: usize) -> Vec<Vec<SectionKind>> {
    (0..1usize << n)
        .map(|bits| {
            (0..n)
                .map(|i| {
                    if bits >> i & 1 == 0 {
                        SectionKind::Series
                    } else {
                        SectionKind::Parallel
                    }
                })
                .collect()
        })
        .collect()
}

/// Fits structures within one overall deadline, counting progress; a candidate that fails is skipped
/// (its error kept), only cancellation stops the whole fit.
struct Runner<'a> {
    data: &'a FitData,
    copies: ThinnedCopies,
    /// The last [`fit_leaves_misfit`] answer, with the structure and parameters it was for: the
    /// stages ask it of the same best fit when nothing between them improved on it.
    misfit_seen: Option<(Structure, Vec<f64>, bool)>,
    options: &'a FitOptions,
    control: &'a FitControl,
    deadline: Instant,
    ran_out_of_time: bool,
    last_error: Option<FitError>,
    done: usize,
    total: usize,
    any_fitted: bool,
}

impl Runner<'_> {
    fn fit(
        &mut self,
        structure: &Structure,
        start: &LumpedModel,
    ) -> Result<Option<StructureFit>, FitError> {
        self.fit_staged(structure, start, true)
    }

    /// [`Runner::fit`] from a start that is a good point of the full problem (no thinned stages).
    fn refine(
        &mut self,
        structure: &Structure,
        start: &LumpedModel,
    ) -> Result<Option<StructureFit>, FitError> {
        self.fit_staged(structure, start, false)
    }

    fn fit_staged(
        &mut self,
        structure: &Structure,
        start: &LumpedModel,
        coarse: bool,
    ) -> Result<Option<StructureFit>, FitError> {
        if cancelled(self.control) {
            return Err(FitError::Cancelled);
        }
        let now = Instant::now();
        // Out of time: skip the remaining candidates, but always fit the first one (for at least a
        // millisecond) so the caller gets a model whose termination says TimeLimit.
        if now >= self.deadline {
            self.ran_out_of_time = true;
            if self.any_fitted {
                return Ok(None);
            }
        }
        let budget = self
            .deadline
            .saturating_duration_since(now)
            .max(Duration::from_millis(1));
        let out = match fit_structure_staged(
            self.data,
            structure,
            start,
            self.options.max_iterations,
            budget,
            self.control,
            if coarse {
                Thinning::Shared(&self.copies)
            } else {
                Thinning::None
            },
        ) {
            Ok(f) => {
                self.any_fitted = true;
                Ok(Some(f))
            }
            Err(FitError::Cancelled) => Err(FitError::Cancelled),
            Err(e) => {
                self.last_error = Some(e);
                Ok(None)
            }
        };
        self.tick();
        out
    }

    /// [`fit_leaves_misfit`], answered again without a second assessment for the same fit.
    fn leaves_misfit(&mut self, fit: &StructureFit, sweep: &Sweep) -> bool {
        if let Some((structure, theta, answer)) = &self.misfit_seen
            && *structure == fit.structure
            && *theta == fit.theta
        {
            return *answer;
        }
        let answer = fit_leaves_misfit(fit, sweep);
        self.misfit_seen = Some((fit.structure.clone(), fit.theta.clone(), answer));
        answer
    }

    fn tick(&mut self) {
        self.done += 1;
        self.total = self.total.max(self.done + 1);
        if let Some(p) = &self.control.progress {
            p((self.done as f64 / self.total as f64).min(1.0));
        }
    }

    /// The best of fitting `structure` from each start (with the thinned stages where the flag says).
    ///
    /// The remaining starts are skipped once two starts have ended in the same optimum (the same cost,
    /// [`same_cost`]) and that optimum's χ² is no larger than the stated noise leads one to expect: a
    /// further start could only find a basin the data cannot tell apart. Data the model misses (every
    /// real sweep so far) always get every start.
    fn best_of(
        &mut self,
        structure: &Structure,
        starts: &[(LumpedModel, bool)],
    ) -> Result<Option<StructureFit>, FitError> {
        let m = self.data.effective_residuals();
        // A χ² no larger than the stated noise leads one to expect. (The assessment's looser overall
        // limit let a real sweep whose density-weighted χ² passes while its bands miss stop early.)
        let within_noise = m;
        let mut best: Option<StructureFit> = None;
        let mut settled = false;
        for (start, coarse) in starts {
            if settled {
                break;
            }
            let Some(f) = self.fit_staged(structure, start, *coarse)? else {
                continue;
            };
            if let Some(b) = &best
                && same_cost(f.cost, b.cost, m)
            {
                settled = b.cost.min(f.cost) <= within_noise;
            }
            if best.as_ref().is_none_or(|b| f.cost < b.cost) {
                best = Some(f);
            }
        }
        Ok(best)
    }
}

/// An inductor is inductive at the bottom of its band: the lowest point whose Im Z stands clear of its
/// noise (3σ, as the running median over five points) must be inductive. Points buried in noise say
/// nothing either way. Refuses a sweep whose clear points are all within noise, and one whose first
/// clear point is capacitive while the measurement resolves the points below it (a direct impedance
/// reading, or nothing below). When the method does not resolve the points below (a network-analyser
/// method far from its reference impedance), the part may be an inductor the method cannot measure:
/// it is fitted, and `Ok(Some(reason))` says why the fit is `poor` whatever its residuals.
fn inductive_bottom(sweep: &Sweep) -> Result<Option<String>, FitError> {
    let n = sweep.frequency_hz.len();
    let smooth = initial::smoothed_significance(&sweep.impedance_ohm, &sweep.sigma_ohm);
    match (0..n).find(|&k| smooth[k].abs() > 3.0) {
        None => Err(FitError::NotAnInductor(format!(
            "Im Z stays within three times its uncertainty from {} Hz to {} Hz: nothing in the \
             sweep is inductive",
            sweep.frequency_hz[0],
            sweep.frequency_hz[n - 1]
        ))),
        Some(k) if smooth[k] < 0.0 => match unresolved_below(sweep, k) {
            Some(reason) => Ok(Some(format!(
                "the lowest frequency where Im Z stands clear of its noise, {}, is already \
                 capacitive{reason}; L0 rests on the resonance and the capacitive side, not on \
                 inductive data",
                assess::engineering(sweep.frequency_hz[k])
            ))),
            None => Err(FitError::NotAnInductor(format!(
                "the lowest frequency where Im Z stands clear of its noise, {} Hz, is capacitive \
                 (Im Z = {:.4e} Ω): the sweep starts above the self-resonance or the part is not an \
                 inductor",
                sweep.frequency_hz[k], sweep.impedance_ohm[k].im,
            ))),
        },
        Some(_) => Ok(None),
    }
}

/// When the points below `k` (the first whose Im Z stands clear of its noise) are buried in noise, a
/// clause saying so with the median |Z| there: a method far from its reference impedance (shunt-thru on
/// a part of kilohms, series-thru on one of milliohms) may not resolve the part's inductive region at
/// all, and the user should know that rather than read only "not an inductor".
fn unresolved_below(sweep: &Sweep, k: usize) -> Option<String> {
    if k == 0 || sweep.method == crate::sweep::Method::Direct {
        return None;
    }
    let mut magnitudes: Vec<f64> = sweep.impedance_ohm[..k].iter().map(|z| z.norm()).collect();
    magnitudes.sort_by(f64::total_cmp);
    Some(format!(
        "; below it, from {}, Im Z is within its noise: the {} measurement does not resolve |Z| of \
         about {:.4e} Ω against a reference impedance of {} Ω there, so the part may be an inductor \
         this method cannot measure (an impedance analyser or another method would tell)",
        assess::engineering(sweep.frequency_hz[0]),
        sweep.method.as_str(),
        magnitudes[magnitudes.len() / 2],
        sweep.z0_ohm
    ))
}

/// Relative cost tolerance of the nesting rule: a larger candidate may end at most this fraction above
/// a candidate it contains. The negligible elements of [`embed`] cost up to about 1e-7 of χ² (more
/// where density weights count a linear sweep's sparse low points up); a millionth of χ² is far below
/// anything model selection can see (BIC charges ln M ≈ 7 per parameter).
pub const NESTING_TOLERANCE: f64 = 1e-6;

/// Whether two costs are the same for every purpose of the fit: within [`NESTING_TOLERANCE`] of each
/// other, relative to the larger of them and of `floor` (the χ² the stated noise leads one to expect,
/// [`FitData::effective_residuals`]). Below a millionth of that, differences are rounding, not data.
pub fn same_cost(a: f64, b: f64, floor: f64) -> bool {
    (a - b).abs() <= NESTING_TOLERANCE * a.max(b).max(floor)
}

/// The whole lumped fit of one sweep.
///
/// 1. The base structure with every element (l0, rdc, cp, rp, k_ac, ls) is fitted from each of
///    [`initial::starts`]: the curve's reading, the rational fit's, and scaled variants; the best is kept
///    (the rest are skipped once two agree on an optimum within the noise, see `Runner::best_of`).
/// 2. Sections (stage A): every assignment of kinds to the first 1..=`max_sections` resonance pairs the
///    curve shows, each started from the fit with one section fewer, once with the new section placed on
///    the curve's pair and once with it negligible ([`embed`]); the better is kept.
/// 3. Subsets (stage B): on the best section assignment, every subset of {rp, k_ac, ls}.
/// 4. Nesting: a candidate that ends with a higher cost than one it contains is fitted again from that
///    one's solution with the extra elements negligible, so no larger candidate reports a higher cost
///    than a smaller one inside it ([`NESTING_TOLERANCE`]); model selection then compares structures,
///    not failed optimisations.
/// 5. Core laws (stage C, [`dispersive_stage`]) when the best single-pole model leaves misfit; the
///    laws nest in one another and in the single pole ([`core_nested`]), and the nesting rule holds
///    across them too.
/// 6. Collapsed elements (stage D, [`revive_stage`]): when the best candidate still leaves misfit,
///    the best few are fitted again with any element a log-scale step drove to its wall set back to a
///    moderate value.
/// 7. Selection by BIC; uncertainty, identifiability, derived figures and the assessment
///    ([`super::assess`]) of the chosen model.
pub fn fit_lumped(
    sweep: &Sweep,
    options: &FitOptions,
    control: &FitControl,
) -> Result<FitReport, FitError> {
    let started = Instant::now();
    let deadline = started + Duration::from_secs_f64(options.time_limit_s.min(1e6));
    let mut data = prepare(sweep, options)?;
    let unresolved = inductive_bottom(sweep)?;
    let (guess, starts) = initial::read_curve(&data);
    data.walls = plausible::walls(&data, &guess, options.max_sections);
    let residuals = data.effective_residuals();
    {
        let base = Structure::of(&guess.base);
        let start_cost = LumpedProblem::new(&data, &base).cost_at(&base.pack(&guess.base));
        if start_cost.is_finite() {
            data.wall_stiffness = (start_cost / residuals).sqrt().max(1.0);
        }
    }
    let max_sec = options.max_sections.min(guess.pairs.len());
    let stage_a: Vec<Vec<SectionKind>> = (1..=max_sec).flat_map(kind_assignments).collect();
    let mut runner = Runner {
        data: &data,
        copies: ThinnedCopies::of(&data),
        misfit_seen: None,
        options,
        control,
        deadline,
        ran_out_of_time: false,
        last_error: None,
        done: 0,
        total: starts.len() + 3 * stage_a.len() + 7,
        any_fitted: false,
    };

    let mut fits: Vec<StructureFit> = Vec::new();
    let full_base = Structure {
        has_rp: true,
        has_k_ac: true,
        has_ls: true,
        dispersion: None,
        has_air: false,
        sections: Vec::new(),
    };
    let base_starts: Vec<(LumpedModel, bool)> = starts.iter().map(|m| (m.clone(), true)).collect();
    if let Some(f) = runner.best_of(&full_base, &base_starts)? {
        fits.push(f);
    }
    fit_sections(&mut fits, &mut runner, &stage_a, &full_base, &guess)?;
    fit_subsets(&mut fits, &mut runner, residuals)?;
    enforce_nesting(&mut fits, &mut runner, &data, &guess)?;
    dispersive_stage(&mut fits, &mut runner, sweep, residuals)?;
    // The laws are fitted on more than one structure and nest in each other: the same rule among
    // them, before and after the collapsed elements are revived (a law carried up from the one it
    // contains starts with its new parameter negligible, which is a collapsed element).
    enforce_nesting(&mut fits, &mut runner, &data, &guess)?;
    revive_stage(&mut fits, &mut runner, sweep, &guess, residuals)?;
    enforce_nesting(&mut fits, &mut runner, &data, &guess)?;
    let ran_out_of_time = runner.ran_out_of_time;
    let last_error = runner.last_error.take();
    if fits.is_empty() {
        return Err(last_error
            .unwrap_or_else(|| FitError::NonFinite("no candidate model could be fitted".into())));
    }
    let mut report = lumped_report(
        sweep,
        options,
        control,
        &data,
        &fits,
        residuals,
        ran_out_of_time,
    );
    if let Some(reason) = unresolved {
        report.assessment.add_finding(assess::Finding {
            kind: assess::FindingKind::InductanceUnresolved,
            band_hz: None,
            message: reason,
        });
    }
    Ok(report)
}

/// Stage A of [`fit_lumped`]: sections, everything else present. Each assignment of kinds is started
/// from the fit with one section fewer (which `fits` must already hold).
fn fit_sections(
    fits: &mut Vec<StructureFit>,
    runner: &mut Runner<'_>,
    stage_a: &[Vec<SectionKind>],
    full_base: &Structure,
    guess: &Guess,
) -> Result<(), FitError> {
    let mut by_kinds: Vec<(Vec<SectionKind>, usize)> = Vec::new();
    if !fits.is_empty() {
        by_kinds.push((Vec::new(), 0));
    }
    for kinds in stage_a {
        let Some(prefix) = by_kinds
            .iter()
            .find(|(k, _)| k[..] == kinds[..kinds.len() - 1])
            .map(|(_, i)| fits[*i].model())
        else {
            continue;
        };
        let structure = Structure {
            sections: kinds.clone(),
            ..full_base.clone()
        };
        // The smaller fit may have bent its elements to mimic the resonance the new section carries
        // (L0 and ls moved to fake a notch): also start every section from the curve's own reading,
        // with ls negligible (a series notch is a short only without it).
        let mut from_curve = guess.base.clone();
        from_curve.ls_h = (1e-4 * from_curve.l0_h).min(from_curve.ls_h);
        let candidates = [
            (start_for(kinds, &prefix, guess), true),
            (start_for(kinds, &from_curve, guess), true),
            (embed(&prefix, &structure, runner.data, guess), false),
        ];
        if let Some(f) = runner.best_of(&structure, &candidates)? {
            fits.push(f);
            by_kinds.push((kinds.clone(), fits.len() - 1));
        }
    }
    Ok(())
}

/// Stage B of [`fit_lumped`]: subsets of {rp, k_ac, ls} on the best section assignment so far.
fn fit_subsets(
    fits: &mut Vec<StructureFit>,
    runner: &mut Runner<'_>,
    residuals: f64,
) -> Result<(), FitError> {
    let best_a = (0..fits.len()).min_by(|&a, &b| {
        bic(fits[a].cost, residuals, fits[a].structure.len()).total_cmp(&bic(
            fits[b].cost,
            residuals,
            fits[b].structure.len(),
        ))
    });
    if let Some(ia) = best_a {
        let full = fits[ia].model();
        for mask in 0..7u8 {
            let mut start = full.clone();
            if mask & 1 == 0 {
                start.rp_ohm = None;
            }
            if mask & 2 == 0 {
                start.k_ac_ohm_per_sqrt_hz = 0.0;
            }
            if mask & 4 == 0 {
                start.ls_h = 0.0;
            }
            let structure = Structure::of(&start);
            if let Some(f) = runner.fit(&structure, &start)? {
                fits.push(f);
            }
        }
    }
    Ok(())
}

/// The report of the fit [`fit_lumped`] chooses by BIC among `fits` (not empty).
fn lumped_report(
    sweep: &Sweep,
    options: &FitOptions,
    control: &FitControl,
    data: &FitData,
    fits: &[StructureFit],
    residuals: f64,
    ran_out_of_time: bool,
) -> FitReport {
    let bics: Vec<f64> = fits
        .iter()
        .map(|f| bic(f.cost, residuals, f.structure.len()))
        .collect();
    let chosen = (0..fits.len())
        .min_by(|&a, &b| bics[a].total_cmp(&bics[b]))
        .expect("at least one fit");
    let fit = &fits[chosen];
    let model = fit.model();
    let mut assessment = assess::assess(&model, sweep, fit.structure.len());
    let at_walls = LumpedProblem::new(data, &fit.structure).exceeded_walls(&fit.theta);
    for label in &at_walls {
        assessment.findings.push(assess::Finding {
            kind: assess::FindingKind::AtPlausibilityLimit,
            band_hz: None,
            message: format!("a parameter ended at the edge of its plausible range: {label}"),
        });
    }
    let mut sp = spread(fit, data, residuals, assessment.sigma_widening);
    include_selection_spread(
        &mut sp,
        data,
        fits,
        &bics,
        chosen,
        residuals,
        assessment.sigma_widening,
    );
    let uncertainty = uncertainty_of(fit, &sp);
    let band_hz = [
        sweep.frequency_hz[0],
        *sweep.frequency_hz.last().expect("checked length"),
    ];
    let derived = derived::derived_figures(
        &model,
        band_hz,
        &options.report_frequencies_hz,
        &KnownElements {
            l0_h: Some(model.l0_h),
            cp_f: Some(model.cp_f),
            rp_ohm: model.rp_ohm,
        },
    );
    let mut derived = derived;
    if let Some(c) = &model.core {
        // The dispersive core's own corner (the resonance for the resonance law).
        derived.core_corner_hz = Some(c.corner_hz);
    }
    let mut quality = derived::quality(&model, sweep);
    quality.parameters = fit.structure.len();
    let termination = if ran_out_of_time && fit.termination != Termination::MaxIterations {
        Termination::TimeLimit
    } else {
        fit.termination
    };
    let candidates = fits
        .iter()
        .zip(&bics)
        .enumerate()
        .map(|(i, (f, &b))| Candidate {
            label: f.structure.label(),
            parameters: f.structure.len(),
            cost: f.cost,
            bic: b,
            chosen: i == chosen,
        })
        .collect();
    let iterations = fit.iterations;
    if let Some(p) = &control.progress {
        p(1.0);
    }
    let mut warnings = report_warnings(sweep, options);
    warnings.extend(plausibility_warnings(&model, band_hz));
    let material = options.construction.as_ref().and_then(|c| {
        material_of(
            c,
            fit,
            &model,
            &sp,
            uncertainty.l0_h,
            band_hz,
            &mut warnings,
        )
    });
    FitReport {
        material,
        engine_version: super::ENGINE_VERSION.to_string(),
        model: FittedModel::Lumped(model),
        uncertainty: Some(uncertainty),
        not_identifiable: sp.not_identifiable,
        correlation: Some(sp.correlation),
        derived,
        quality,
        assessment,
        warnings,
        termination,
        iterations,
        candidates,
        band_hz,
    }
}

/// The core material read off the chosen fit for the stated construction, or a warning saying why
/// there is none.
fn material_of(
    construction: &crate::model::material::Construction,
    fit: &StructureFit,
    model: &LumpedModel,
    sp: &Spread,
    sigma_l0_h: Option<f64>,
    band_hz: [f64; 2],
    warnings: &mut Vec<String>,
) -> Option<crate::model::material::MaterialReport> {
    let cov = crate::model::material::ParameterCovariance::from_fit(
        &fit.structure,
        &fit.theta,
        &sp.covariance_theta,
        &sp.sigma_theta,
    );
    let r = crate::model::material::material_report(
        model,
        sigma_l0_h,
        Some(&cov),
        construction,
        band_hz,
    );
    if r.is_finite() {
        Some(r)
    } else {
        warnings.push(
            "the core material is not reported: with the stated construction the fitted L0 \
             gives no finite permeability (a gap the fitted inductance cannot have, or \
             dimensions far from a real core)"
                .into(),
        );
        None
    }
}

/// Whether the residuals of a model leave enough misfit that a broader core law is worth trying:
/// poor, or a misfit or structure at three standard deviations (below the poor limits). Structure
/// counts as in the assessment only while the weighted RMS is at least [`assess::RUNS_RMS_FLOOR`] of
/// the noise: residuals far below it (a noise-free sweep fitted to rounding) leave nothing a broader
/// law could take up.
fn leaves_misfit(a: &assess::Assessment, rms_weighted: f64) -> bool {
    a.status == assess::FitStatus::Poor
        || a.overall_z > 3.0
        || (a.runs_z < -3.0 && rms_weighted / a.noise_scale >= assess::RUNS_RMS_FLOOR)
}

/// [`leaves_misfit`] for a structure fit's model on `sweep`.
fn fit_leaves_misfit(fit: &StructureFit, sweep: &Sweep) -> bool {
    let model = fit.model();
    let rms_weighted = super::derived::quality(&model, sweep).rms_weighted;
    leaves_misfit(
        &assess::assess(&model, sweep, fit.structure.len()),
        rms_weighted,
    )
}

/// A core law started from a fitted single-pole (rp) model: the same corner, the law's extra
/// parameters at `shape` (negligible when small).
fn law_start(single_pole: &LumpedModel, law: CoreLaw, shape: f64, air: Option<f64>) -> LumpedModel {
    let rp = single_pole.rp_ohm.unwrap_or(1e9);
    let corner = rp / (2.0 * std::f64::consts::PI * single_pole.l0_h);
    let mut m = single_pole.clone();
    m.rp_ohm = None;
    m.core = Some(match law {
        CoreLaw::ColeCole | CoreLaw::HavriliakNegami => CoreDispersion {
            law,
            corner_hz: corner,
            alpha: shape,
            beta: if law == CoreLaw::HavriliakNegami {
                1.0 - shape
            } else {
                1.0
            },
            damping: 0.0,
            air_fraction: air.unwrap_or(0.0),
            resonance_hz: 0.0,
            resonance_share: 0.0,
        },
        // An overdamped resonance, x ≪ 1/ζ, is close to a single pole at f_r/(2ζ).
        CoreLaw::Resonance => CoreDispersion {
            law,
            corner_hz: corner * 2.0 * shape,
            alpha: 0.0,
            beta: 1.0,
            damping: shape,
            air_fraction: air.unwrap_or(0.0),
            resonance_hz: 0.0,
            resonance_share: 0.0,
        },
        CoreLaw::ResonanceRelaxation => CoreDispersion {
            law,
            corner_hz: corner,
            alpha: 0.3,
            beta: 1.0,
            damping: 0.5,
            air_fraction: air.unwrap_or(0.0),
            resonance_hz: corner * shape,
            resonance_share: 1e-3,
        },
    });
    m
}

/// Stage C of [`fit_lumped`]: when the best single-pole model leaves misfit, the core's permeability
/// may fall with frequency more broadly than one pole: Cole–Cole, Havriliak–Negami (from the fitted
/// Cole–Cole), the resonance law and resonance plus relaxation (from the fitted Cole–Cole) are fitted
/// on the best structure with rp, the relaxation laws also with a non-dispersing share of L0; BIC
/// then decides with the others. Each law is started from the single
/// pole with its extra parameters negligible (so it ends no worse than the single pole) and from a
/// moderate broadening.
fn dispersive_stage(
    fits: &mut Vec<StructureFit>,
    runner: &mut Runner<'_>,
    sweep: &Sweep,
    residuals: f64,
) -> Result<(), FitError> {
    let Some(best) = (0..fits.len())
        .filter(|&i| fits[i].structure.has_rp)
        .min_by(|&a, &b| {
            bic(fits[a].cost, residuals, fits[a].structure.len()).total_cmp(&bic(
                fits[b].cost,
                residuals,
                fits[b].structure.len(),
            ))
        })
    else {
        return Ok(());
    };
    if !runner.leaves_misfit(&fits[best], sweep) {
        return Ok(());
    }
    // The laws are fitted on the best single-pole structure and also on the one with every series
    // element (k_ac, ls) when that is another: a term the poor single-pole fit had no use for may be
    // what the right law needs beside it (a skin-effect term under a resonant core).
    let mut bases = vec![best];
    let structure = &fits[best].structure;
    if !(structure.has_k_ac && structure.has_ls) {
        let sections = structure.sections.clone();
        if let Some(full) = (0..fits.len()).find(|&i| {
            let s = &fits[i].structure;
            s.has_rp && s.has_k_ac && s.has_ls && s.dispersion.is_none() && s.sections == sections
        }) {
            bases.push(full);
        }
    }
    for base in bases {
        let start = fits[base].model();
        let structure = fits[base].structure.clone();
        fit_laws(fits, runner, &start, &structure)?;
    }
    Ok(())
}

/// How many of the best candidates (by BIC) [`revive_stage`] looks at.
const REVIVED_CANDIDATES: usize = 3;

/// Stage D of [`fit_lumped`]: elements that collapsed. Every element is fitted as the logarithm of its
/// value, so one that an early step drove to its lower wall (ls at 0.1 fH, a resonant share at 1e-9)
/// has a vanishing derivative there and no later step brings it back, though the data may want it:
/// on real toroids a collapsed ls left χ² twice what the structure reaches with ls of tens of nH.
/// When the best candidate still leaves misfit, each of the best [`REVIVED_CANDIDATES`] with such an
/// element is fitted again with the element at a moderate value (the curve's reading, or a share of
/// a few per cent), and the better end is kept.
fn revive_stage(
    fits: &mut [StructureFit],
    runner: &mut Runner<'_>,
    sweep: &Sweep,
    guess: &Guess,
    residuals: f64,
) -> Result<(), FitError> {
    let bic_of = |f: &StructureFit| bic(f.cost, residuals, f.structure.len());
    let mut order: Vec<usize> = (0..fits.len()).collect();
    order.sort_by(|&a, &b| bic_of(&fits[a]).total_cmp(&bic_of(&fits[b])));
    let Some(&first) = order.first() else {
        return Ok(());
    };
    if !runner.leaves_misfit(&fits[first], sweep) {
        return Ok(());
    }
    for &i in order.iter().take(REVIVED_CANDIDATES) {
        let starts: Vec<(LumpedModel, bool)> = revived(&fits[i].model(), &fits[i].structure, guess)
            .into_iter()
            .map(|m| (m, true))
            .collect();
        let structure = fits[i].structure.clone();
        if let Some(f) = runner.best_of(&structure, &starts)?
            && f.cost < fits[i].cost
        {
            fits[i] = f;
        }
    }
    Ok(())
}

/// Starts from `model` with each element of `structure` that collapsed (below a millionth of where it
/// matters) set back to a moderate value; none when nothing collapsed. A collapsed resonant share
/// of the core comes back at two places, at the relaxation's corner and a decade above it (where the
/// real toroids put it).
fn revived(model: &LumpedModel, structure: &Structure, guess: &Guess) -> Vec<LumpedModel> {
    const COLLAPSED: f64 = 1e-6;
    let mut m = model.clone();
    let mut changed = false;
    if structure.has_ls && m.ls_h < COLLAPSED * m.l0_h {
        m.ls_h = guess.base.ls_h.clamp(1e-4 * m.l0_h, 1e-2 * m.l0_h);
        changed = true;
    }
    if structure.has_k_ac
        && guess.base.k_ac_ohm_per_sqrt_hz > 0.0
        && m.k_ac_ohm_per_sqrt_hz < COLLAPSED * guess.base.k_ac_ohm_per_sqrt_hz
    {
        m.k_ac_ohm_per_sqrt_hz = 0.1 * guess.base.k_ac_ohm_per_sqrt_hz;
        changed = true;
    }
    if let Some(c) = m.core.as_mut() {
        if c.law != CoreLaw::Resonance && c.alpha < COLLAPSED {
            c.alpha = 0.05;
            changed = true;
        }
        if structure.has_air && c.air_fraction < COLLAPSED {
            c.air_fraction = 0.05;
            changed = true;
        }
        if c.law == CoreLaw::ResonanceRelaxation && c.resonance_share < COLLAPSED {
            c.resonance_share = 0.05;
            c.resonance_hz = c.corner_hz;
            c.damping = 0.5;
            let mut above = m.clone();
            if let Some(c) = above.core.as_mut() {
                c.resonance_hz = 10.0 * c.corner_hz;
                c.damping = 1.0;
            }
            return vec![m, above];
        }
    }
    if changed { vec![m] } else { Vec::new() }
}

/// The core laws of [`dispersive_stage`] on one single-pole structure, each candidate pushed to `fits`.
fn fit_laws(
    fits: &mut Vec<StructureFit>,
    runner: &mut Runner<'_>,
    single: &LumpedModel,
    base_structure: &Structure,
) -> Result<(), FitError> {
    let single = single.clone();
    let with = |law, air: bool| Structure {
        has_rp: false,
        dispersion: Some(law),
        has_air: air,
        ..base_structure.clone()
    };
    let cc = with(CoreLaw::ColeCole, false);
    let Some(cc_fit) = runner.best_of(
        &cc,
        &[
            (law_start(&single, CoreLaw::ColeCole, 1e-3, None), false),
            (law_start(&single, CoreLaw::ColeCole, 0.3, None), true),
        ],
    )?
    else {
        return Ok(());
    };
    let mut cc_model = cc_fit.model();
    let cc_index = fits.len();
    fits.push(cc_fit);
    let mut hn_start = cc_model.clone();
    if let Some(c) = hn_start.core.as_mut() {
        c.law = CoreLaw::HavriliakNegami;
        c.beta = 1.0 - 1e-3;
    }
    let mut hn_wide = hn_start.clone();
    if let Some(c) = hn_wide.core.as_mut() {
        c.beta = 0.6;
    }
    let hn = with(CoreLaw::HavriliakNegami, false);
    let hn_model = runner
        .best_of(&hn, &[(hn_start, false), (hn_wide, true)])?
        .map(|f| {
            let m = f.model();
            fits.push(f);
            m
        });
    // Havriliak–Negami with β = 1 is Cole–Cole: where the broader law found a better optimum, Cole–Cole
    // is fitted again from it with β set to 1, so that a Cole–Cole core is not called
    // Havriliak–Negami only because its own fit stopped in a poorer basin.
    if let Some(hn_model) = &hn_model
        && fits.last().is_some_and(|f| f.cost < fits[cc_index].cost)
    {
        let mut from_hn = hn_model.clone();
        if let Some(c) = from_hn.core.as_mut() {
            c.law = CoreLaw::ColeCole;
            c.beta = 1.0;
        }
        if let Some(f) = runner.best_of(&cc, &[(from_hn, false)])?
            && f.cost < fits[cc_index].cost
        {
            cc_model = f.model();
            fits[cc_index] = f;
        }
    }
    let res = with(CoreLaw::Resonance, false);
    if let Some(f) = runner.best_of(
        &res,
        &[
            (law_start(&single, CoreLaw::Resonance, 2.0, None), true),
            (law_start(&single, CoreLaw::Resonance, 0.5, None), true),
        ],
    )? {
        fits.push(f);
    }
    // A resonant mechanism beside the relaxing one, from the fitted Cole–Cole with a negligible share
    // and with shares that matter at a few places below, at and a decade above its corner.
    let mixed_start = |share: f64, at: f64| {
        let mut m = cc_model.clone();
        if let Some(c) = m.core.as_mut() {
            c.law = CoreLaw::ResonanceRelaxation;
            c.resonance_hz = c.corner_hz * at;
            c.damping = 0.5;
            c.resonance_share = share;
        }
        m
    };
    let mixed = with(CoreLaw::ResonanceRelaxation, false);
    let mixed_model = runner
        .best_of(
            &mixed,
            &[
                (mixed_start(1e-3, 0.5), false),
                (mixed_start(0.3, 0.3), true),
                (mixed_start(0.3, 1.0), true),
                (mixed_start(0.1, 10.0), true),
            ],
        )?
        .map(|f| {
            let m = f.model();
            fits.push(f);
            m
        });
    // The same laws with a non-dispersing share of L0, from the fitted law with the share small.
    for (law, model) in [
        (CoreLaw::ColeCole, Some(cc_model)),
        (CoreLaw::HavriliakNegami, hn_model),
        (CoreLaw::ResonanceRelaxation, mixed_model),
    ] {
        let Some(mut start) = model else { continue };
        if let Some(c) = start.core.as_mut() {
            c.air_fraction = 1e-4;
        }
        let mut wide = start.clone();
        if let Some(c) = wide.core.as_mut() {
            c.air_fraction = 0.1;
        }
        if let Some(f) = runner.best_of(&with(law, true), &[(start, false), (wide, true)])? {
            fits.push(f);
        }
    }
    Ok(())
}

/// Figures no inductor of this trade has, which usually mean a wrong unit in the file (a Touchstone
/// option line saying Hz for data in GHz makes a 100 nH part look like 100 H): said in words, the fit
/// is not refused. The ranges are common practice, no source: components from about 0.1 nH to 1 H, and
/// impedance sweeps that reach at least 1 kHz.
pub fn plausibility_warnings(model: &LumpedModel, band_hz: [f64; 2]) -> Vec<String> {
    let mut out = Vec::new();
    if band_hz[1] < 1e3 {
        out.push(format!(
            "the sweep ends at {:.4e} Hz: impedance sweeps of inductors reach well above 1 kHz; check \
             the frequency unit of the file (a Touchstone option line of Hz for data in MHz or GHz)",
            band_hz[1]
        ));
    }
    if model.l0_h > 1.0 || model.l0_h < 1e-10 {
        out.push(format!(
            "the fitted L0 is {:.4e} H, outside what inductors of this kind have (about 0.1 nH to 1 H): \
             check the file's frequency unit and the method",
            model.l0_h
        ));
    }
    out
}

/// The readers' warnings, and how the fit used the sweep's DC reading.
pub fn report_warnings(sweep: &Sweep, options: &FitOptions) -> Vec<String> {
    let mut out = sweep.warnings.clone();
    if let Some(dc) = &sweep.dc_reading {
        out.push(if options.family == super::ModelFamily::Rational {
            format!(
                "the 0 Hz row (line {}, {:.6} Ω) was not used: the rational family fits the sweep \
                 alone",
                dc.line, dc.resistance_ohm
            )
        } else if options.dcr.is_some() {
            format!(
                "the 0 Hz row (line {}, {:.6} Ω) was not used: the DCR reading in the fit options \
                 takes its place",
                dc.line, dc.resistance_ohm
            )
        } else if dc.resistance_ohm > 0.0 {
            format!(
                "the 0 Hz row (line {}) entered the fit as a DC resistance reading of {:.6} Ω ± {:.2e} Ω",
                dc.line, dc.resistance_ohm, dc.sigma_ohm
            )
        } else {
            format!(
                "the 0 Hz row (line {}) reads 0 Ω: not used as a DC resistance reading",
                dc.line
            )
        });
    }
    out
}

/// Step 4 of [`fit_lumped`]: from the smallest structures up, a candidate whose cost exceeds that of a
/// candidate nested in it is fitted again from the nested one's solution ([`embed`]) and keeps the
/// better result.
fn enforce_nesting(
    fits: &mut [StructureFit],
    runner: &mut Runner<'_>,
    data: &FitData,
    guess: &Guess,
) -> Result<(), FitError> {
    let mut order: Vec<usize> = (0..fits.len()).collect();
    order.sort_by_key(|&i| fits[i].structure.len());
    for (pos, &t) in order.iter().enumerate() {
        // The nested candidate with the lowest cost, among those already settled.
        let Some(s) = order[..pos]
            .iter()
            .copied()
            .filter(|&s| nested_in(&fits[s].structure, &fits[t].structure))
            .min_by(|&a, &b| fits[a].cost.total_cmp(&fits[b].cost))
        else {
            continue;
        };
        // A larger candidate may end at most a rounding difference above a nested one: a millionth of
        // the larger cost or of the χ² the noise implies ([`same_cost`]), as the tests check it.
        if fits[t].cost <= fits[s].cost
            || same_cost(fits[t].cost, fits[s].cost, data.effective_residuals())
        {
            continue;
        }
        let start = embed(&fits[s].model(), &fits[t].structure, data, guess);
        let structure = fits[t].structure.clone();
        if let Some(f) = runner.refine(&structure, &start)?
            && f.cost < fits[t].cost
        {
            fits[t] = f;
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::ImpedanceModel as _;
    use crate::model::Section;
    use crate::sweep::Method;
    use num_complex::Complex64;

    /// Synthetic sweep from an invented model with deterministic pseudo-random noise of σ per point.
    pub(crate) fn synthetic(
        model: &LumpedModel,
        f_lo: f64,
        f_hi: f64,
        n: usize,
        seed: u64,
    ) -> Sweep {
        let mut state = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
        let mut uniform = move || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state >> 11) as f64 / (1u64 << 53) as f64
        };
        let mut gauss = move || {
            let (u1, u2) = (uniform().max(1e-300), uniform());
            (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
        };
        let frequency_hz: Vec<f64> = (0..n)
            .map(|i| f_lo * (f_hi / f_lo).powf(i as f64 / (n - 1) as f64))
            .collect();
        let mut z = Vec::new();
        let mut sigma = Vec::new();
        for &f in &frequency_hz {
            let z0 = model.impedance(f);
            let s = 2e-3 * z0.norm() + 1e-3;
            z.push(z0 + Complex64::new(s * gauss(), s * gauss()));
            sigma.push(s);
        }
        Sweep {
            frequency_hz,
            impedance_ohm: z,
            sigma_ohm: sigma,
            method: Method::Direct,
            z0_ohm: 50.0,
            dc_reading: None,
            warnings: Vec::new(),
        }
    }

    fn choke() -> LumpedModel {
        LumpedModel {
            l0_h: 47e-6,
            rdc_ohm: 0.12,
            k_ac_ohm_per_sqrt_hz: 3e-4,
            rp_ohm: Some(60e3),
            cp_f: 4.2e-12,
            ls_h: 3e-9,
            sections: vec![],
            core: None,
        }
    }

    /// `model` on a linear grid (as most analysers sweep) from `f_lo`, with the noise of
    /// [`synthetic`] (drawn for its log grid, rescaled to each point's σ).
    fn linear(model: &LumpedModel, f_lo: f64, f_hi: f64, n: usize, seed: u64) -> Sweep {
        let log = synthetic(model, f_lo, f_hi, n, seed);
        let mut s = log.clone();
        s.frequency_hz = (0..n)
            .map(|i| f_lo + (f_hi - f_lo) * i as f64 / (n - 1) as f64)
            .collect();
        for k in 0..n {
            let unit =
                (log.impedance_ohm[k] - model.impedance(log.frequency_hz[k])) / log.sigma_ohm[k];
            let z0 = model.impedance(s.frequency_hz[k]);
            s.sigma_ohm[k] = 2e-3 * z0.norm() + 1e-3;
            s.impedance_ohm[k] = z0 + unit * s.sigma_ohm[k];
        }
        s
    }

    #[test]
    fn a_linear_sweep_deep_in_the_resistive_region_reads_l0_from_frequency_windows() {
        // 100 µH with 2.4 Ω from 20 Hz (ωL0 = 0.0126 Ω at the first point, far below the noise): a
        // window of "the lowest points" would read noise; the frequency windows read L0 where Im Z
        // stands clear of it.
        let truth = LumpedModel {
            l0_h: 100e-6,
            rdc_ohm: 2.4,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: Some(200e3),
            cp_f: 5e-12,
            ls_h: 0.0,
            sections: vec![],
            core: None,
        };
        let sweep = linear(&truth, 20.0, 30e6, 1601, 3);
        let data = prepare(&sweep, &FitOptions::default()).unwrap();
        let g = initial::guess(&data);
        assert!(
            (g.base.l0_h / truth.l0_h - 1.0).abs() < 0.1,
            "reading {} H",
            g.base.l0_h
        );
        let rep = fit_lumped(&sweep, &FitOptions::default(), &FitControl::default()).unwrap();
        let FittedModel::Lumped(m) = &rep.model else {
            panic!()
        };
        assert!((m.l0_h / truth.l0_h - 1.0).abs() < 0.01, "{m:?}");
        assert_eq!(
            rep.assessment.status,
            super::super::FitStatus::Ok,
            "{:?}",
            rep.assessment
        );
    }

    #[test]
    fn density_weights_count_each_part_of_the_band_as_a_log_sweep_would() {
        let log: Vec<f64> = (0..100).map(|i| 1e3 * 1.1f64.powi(i)).collect();
        assert!(
            density_weights(&log)
                .iter()
                .all(|&g| (g - 1.0).abs() < 1e-12)
        );
        let lin: Vec<f64> = (0..1000).map(|i| 50e3 + 1e5 * i as f64).collect();
        let g = density_weights(&lin);
        // The lowest point stands for the ln f it spans (50 kHz to 150 kHz), up to the cap.
        let mean = (lin[999] / lin[0]).ln() / 999.0;
        let want = ((lin[1] / lin[0]).ln() / mean).min(super::super::problem::MAX_DENSITY_WEIGHT);
        assert!((g[0] / want - 1.0).abs() < 1e-12, "{} vs {want}", g[0]);
        assert!(g[0] > 100.0 - 1e-9, "{}", g[0]);
        assert!(g[999] < 0.2, "{}", g[999]);
        // Weights never exceed the cap.
        assert!(
            g.iter()
                .all(|&x| x <= super::super::problem::MAX_DENSITY_WEIGHT)
        );
        // The weights over the top decade sum to about what a log sweep puts there.
        let top: f64 = lin
            .iter()
            .zip(&g)
            .filter(|(f, _)| **f >= lin[999] / 10.0)
            .map(|(_, g)| g)
            .sum();
        let expected = 10f64.ln() / mean;
        assert!((top / expected - 1.0).abs() < 0.02, "{top} vs {expected}");
    }

    /// JᵀGJ the plain way: J stored row by row, each data row's products counted g times.
    fn explicit_jtgj(data: &FitData, structure: &Structure, theta: &[f64]) -> DMatrix<f64> {
        let problem = LumpedProblem::new(data, structure);
        let n = structure.len();
        let rows = problem.residual_rows();
        let mut j = DMatrix::zeros(rows, n);
        problem.jacobian_into(theta, &mut j);
        let points = data.frequency_hz.len();
        DMatrix::from_fn(n, n, |a, c| {
            (0..rows)
                .map(|r| {
                    let g = if r < 2 * points {
                        (data.inv_sigma[r / 2] * data.sigma[r / 2]).powi(2)
                    } else {
                        1.0
                    };
                    g * j[(r, a)] * j[(r, c)]
                })
                .sum()
        })
    }

    #[test]
    fn the_streamed_jtgj_is_the_explicit_sum_over_rows() {
        // A linear sweep (density weights from 100 down to 0.03), a DCR prior row, walls, a section
        // and a point away from the optimum: every kind of row the sandwich's middle counts.
        let mut truth = choke();
        truth.sections = vec![Section {
            kind: SectionKind::Series,
            r_ohm: 2.0,
            l_h: 40e-9,
            c_f: 30e-12,
        }];
        let sweep = linear(&truth, 1e3, 60e6, 901, 4);
        let options = FitOptions {
            dcr: Some(super::super::DcrReading {
                value_ohm: 0.118,
                sigma_ohm: Some(0.002),
            }),
            ..FitOptions::default()
        };
        let mut data = prepare(&sweep, &options).unwrap();
        assert!(data.dcr_prior.is_some());
        let g = initial::guess(&data);
        data.walls = plausible::walls(&data, &g, 1);
        let structure = Structure::of(&truth);
        let mut theta = structure.pack(&truth);
        for (i, t) in theta.iter_mut().enumerate() {
            *t += 0.05 * (i as f64 - 2.0);
        }
        let streamed = density_weighted_jtj(&data, &structure, &theta);
        let explicit = explicit_jtgj(&data, &structure, &theta);
        // The entries differ in rounding only.
        crate::fit::problem::tests::assert_gram_close(&streamed, &explicit, 1e-12, "JᵀGJ");
    }

    #[test]
    fn thinned_copies_spread_over_ln_f_and_keep_the_low_decades_of_a_linear_sweep() {
        let truth = choke();
        let sweep = linear(&truth, 100.0, 100e6, 1601, 9);
        let data = prepare(&sweep, &FitOptions::default()).unwrap();
        let t = thinned(&data, 50);
        // A strided copy would keep one point below 2 MHz; the ln f spread keeps several decades.
        assert!(t.frequency_hz.iter().filter(|&&f| f < 1e6).count() >= 2);
        assert!(t.frequency_hz.windows(2).all(|w| w[1] > w[0]));
        assert_eq!(t.frequency_hz.first(), data.frequency_hz.first());
        assert_eq!(t.frequency_hz.last(), data.frequency_hz.last());
    }

    #[test]
    fn the_rational_start_maps_a_noiseless_base_model_back_to_its_elements() {
        // Z = s·ls + (R + s·L(1 + R/Rp)) / (1 + s(L/Rp + C·R) + s²·C·L(1 + R/Rp)) exactly.
        let truth = LumpedModel {
            k_ac_ohm_per_sqrt_hz: 0.0,
            ..choke()
        };
        let mut sweep = synthetic(&truth, 1e3, 300e6, 801, 1);
        for (z, &f) in sweep.impedance_ohm.iter_mut().zip(&sweep.frequency_hz) {
            *z = truth.impedance(f);
        }
        let data = prepare(&sweep, &FitOptions::default()).unwrap();
        let m = initial::rational_start(&data, &initial::guess(&data)).expect("maps");
        for (got, want) in [
            (m.l0_h, truth.l0_h),
            (m.cp_f, truth.cp_f),
            (m.rdc_ohm, truth.rdc_ohm),
            (m.rp_ohm.unwrap(), truth.rp_ohm.unwrap()),
            (m.ls_h, truth.ls_h),
        ] {
            assert!((got / want - 1.0).abs() < 1e-3, "{got} vs {want}");
        }
    }

    /// Each step of the chain of core laws that [`embed`] takes (rp → Cole–Cole → Havriliak–Negami,
    /// Cole–Cole → resonance plus relaxation, no air path → one) changes Z by no more than about
    /// [`NEGLIGIBLE_CORE`] relative over the band, so a refit from there starts at the smaller
    /// candidate's cost; and only those steps count as nesting.
    #[test]
    fn a_core_carried_up_the_chain_of_laws_keeps_its_impedance() {
        let sweep = synthetic(&choke(), 100.0, 300e6, 401, 3);
        let data = prepare(&sweep, &FitOptions::default()).unwrap();
        let (guess, _) = initial::read_curve(&data);
        let single = choke();
        let of = |law: Option<CoreLaw>, air: bool| Structure {
            has_rp: law.is_none(),
            dispersion: law,
            has_air: air,
            ..Structure::of(&single)
        };
        let worst = |a: &LumpedModel, b: &LumpedModel| {
            sweep
                .frequency_hz
                .iter()
                .map(|&f| (a.impedance(f) - b.impedance(f)).norm() / a.impedance(f).norm())
                .fold(0.0f64, f64::max)
        };
        let cc = embed(&single, &of(Some(CoreLaw::ColeCole), false), &data, &guess);
        assert!(
            worst(&single, &cc) < 1e-6,
            "rp → Cole–Cole: {}",
            worst(&single, &cc)
        );
        for (law, air) in [
            (CoreLaw::HavriliakNegami, false),
            (CoreLaw::ResonanceRelaxation, false),
            (CoreLaw::ColeCole, true),
            (CoreLaw::HavriliakNegami, true),
        ] {
            let target = of(Some(law), air);
            assert!(nested_in(&of(Some(CoreLaw::ColeCole), false), &target));
            let up = embed(&cc, &target, &data, &guess);
            assert_eq!(Structure::of(&up), target, "{law:?} air {air}");
            let moved = worst(&cc, &up);
            assert!(moved < 1e-6, "Cole–Cole → {law:?} (air {air}): {moved}");
        }
        for (small, large) in [
            (
                Some(CoreLaw::HavriliakNegami),
                Some(CoreLaw::ResonanceRelaxation),
            ),
            (Some(CoreLaw::ColeCole), Some(CoreLaw::Resonance)),
            (None, Some(CoreLaw::Resonance)),
            (Some(CoreLaw::ColeCole), None),
        ] {
            assert!(
                !nested_in(&of(small, false), &of(large, false)),
                "{small:?} in {large:?}"
            );
        }
        assert!(!nested_in(
            &of(Some(CoreLaw::ColeCole), true),
            &of(Some(CoreLaw::ColeCole), false)
        ));
    }

    #[test]
    fn a_larger_candidate_never_ends_above_one_it_contains() {
        let sweep = synthetic(&choke(), 100.0, 300e6, 801, 21);
        let rep = fit_lumped(&sweep, &FitOptions::default(), &FitControl::default()).unwrap();
        let cost = |label: &str| {
            rep.candidates
                .iter()
                .find(|c| c.label == label)
                .map(|c| c.cost)
        };
        let full = cost("l0+rdc+cp+rp+k_ac+ls").expect("the full base structure");
        for sub in [
            "l0+rdc+cp",
            "l0+rdc+cp+rp",
            "l0+rdc+cp+k_ac",
            "l0+rdc+cp+ls",
            "l0+rdc+cp+rp+k_ac",
            "l0+rdc+cp+rp+ls",
            "l0+rdc+cp+k_ac+ls",
        ] {
            if let Some(c) = cost(sub) {
                let floor = 2.0 * density_weights(&sweep.frequency_hz).iter().sum::<f64>();
                assert!(
                    full <= c || same_cost(full, c, floor),
                    "{sub}: {c} < {full}"
                );
            }
        }
    }

    #[test]
    fn a_cole_cole_core_is_chosen_and_recovered_when_the_data_follow_one() {
        let mut truth = choke();
        truth.rp_ohm = None;
        truth.core = Some(CoreDispersion {
            law: CoreLaw::ColeCole,
            corner_hz: 2e6,
            alpha: 0.4,
            beta: 1.0,
            damping: 0.0,
            air_fraction: 0.0,
            resonance_hz: 0.0,
            resonance_share: 0.0,
        });
        let sweep = synthetic(&truth, 1e3, 200e6, 801, 5);
        let rep = fit_lumped(&sweep, &FitOptions::default(), &FitControl::default()).unwrap();
        let FittedModel::Lumped(m) = &rep.model else {
            panic!()
        };
        let c = m.core.expect("a dispersive core");
        assert!(
            matches!(c.law, CoreLaw::ColeCole | CoreLaw::HavriliakNegami),
            "{c:?}"
        );
        assert!((c.alpha - 0.4).abs() < 0.05, "{c:?}");
        assert!((c.corner_hz / 2e6 - 1.0).abs() < 0.1, "{c:?}");
        assert_eq!(
            rep.assessment.status,
            super::super::FitStatus::Ok,
            "{:?}",
            rep.assessment
        );
        assert_eq!(rep.derived.core_corner_hz, Some(c.corner_hz));
        let u = rep.uncertainty.unwrap().core.expect("core σ");
        assert!(u.alpha.is_some() && u.corner_hz.is_some(), "{u:?}");
    }

    /// `model` on a log grid with no noise and σ = 0.2 % of |Z|: what a simulator's export looks like.
    fn noise_free(model: &LumpedModel, f_lo: f64, f_hi: f64, n: usize) -> Sweep {
        let mut s = synthetic(model, f_lo, f_hi, n, 1);
        for k in 0..n {
            s.impedance_ohm[k] = model.impedance(s.frequency_hz[k]);
            s.sigma_ohm[k] = 2e-3 * s.impedance_ohm[k].norm();
        }
        s
    }

    #[test]
    fn a_sharp_series_notch_is_found_though_the_smaller_fit_bent_l0_and_ls_to_mimic_it() {
        // 10 µH ‖ 5 pF (SRF 22.5 MHz by Thomson's formula) with a series branch 2 Ω, 50 nH, 2 pF: a
        // notch at 503 MHz. The base fit without a section leans on ls and a lower L0 to follow the
        // notch; a section started from that bent fit stalls, one started from the curve finds it.
        let mut truth = choke();
        truth.l0_h = 10e-6;
        truth.rdc_ohm = 0.05;
        truth.k_ac_ohm_per_sqrt_hz = 0.0;
        truth.rp_ohm = None;
        truth.cp_f = 5e-12;
        truth.ls_h = 0.0;
        truth.sections = vec![Section {
            kind: SectionKind::Series,
            r_ohm: 2.0,
            l_h: 50e-9,
            c_f: 2e-12,
        }];
        let sweep = noise_free(&truth, 1e4, 1e9, 801);
        let rep = fit_lumped(&sweep, &FitOptions::default(), &FitControl::default()).unwrap();
        let FittedModel::Lumped(m) = &rep.model else {
            panic!()
        };
        assert_eq!(m.sections.len(), 1, "{m:?}");
        let s = &m.sections[0];
        assert_eq!(s.kind, SectionKind::Series);
        assert!((s.l_h / 50e-9 - 1.0).abs() < 1e-3, "{s:?}");
        assert!((s.c_f / 2e-12 - 1.0).abs() < 1e-3, "{s:?}");
        assert!((m.l0_h / 10e-6 - 1.0).abs() < 1e-4, "{m:?}");
        assert!(rep.quality.rms_weighted < 0.1, "{:?}", rep.quality);
        assert_eq!(
            rep.assessment.status,
            super::super::FitStatus::Ok,
            "{:?}",
            rep.assessment
        );
    }

    #[test]
    fn a_frequency_unit_a_thousand_million_times_too_small_is_said_in_words() {
        // 100 nH measured 10 MHz–3 GHz, read as if the numbers were Hz: the data show 100 H from 10 Hz
        // to 3 kHz (ωL is unchanged when f shrinks by 1e9 and L grows by 1e9).
        let mut m = choke();
        m.l0_h = 100.0;
        let w = plausibility_warnings(&m, [10.0, 3e3]);
        assert_eq!(w.len(), 1, "{w:?}");
        assert!(w[0].contains("fitted L0 is 1.0000e2 H"), "{w:?}");
        let w = plausibility_warnings(&m, [0.01, 3.0]);
        assert_eq!(w.len(), 2, "{w:?}");
        assert!(w[0].contains("frequency unit"), "{w:?}");
        assert!(plausibility_warnings(&choke(), [1e3, 1e8]).is_empty());
    }

    #[test]
    fn a_noise_free_sweep_fitted_to_rounding_is_ok() {
        // Residuals 1e-7 of the noise keep their sign in long runs (rounding is smooth in f); far below
        // the noise, that shape is no misfit.
        let sweep = noise_free(&choke(), 1e4, 1e8, 401);
        let rep = fit_lumped(&sweep, &FitOptions::default(), &FitControl::default()).unwrap();
        assert!(rep.quality.rms_weighted < 1e-3, "{:?}", rep.quality);
        assert_eq!(
            rep.assessment.status,
            super::super::FitStatus::Ok,
            "{:?}",
            rep.assessment
        );
    }

    #[test]
    fn fits_a_synthetic_choke() {
        let truth = choke();
        let sweep = synthetic(&truth, 1e3, 200e6, 801, 7);
        let rep = fit_lumped(&sweep, &FitOptions::default(), &FitControl::default()).unwrap();
        let FittedModel::Lumped(m) = &rep.model else {
            panic!()
        };
        assert!((m.l0_h / truth.l0_h - 1.0).abs() < 5e-3);
        assert!((m.cp_f / truth.cp_f - 1.0).abs() < 1e-2);
        assert_eq!(rep.termination, Termination::Converged);
        assert!(rep.candidates.iter().any(|c| c.chosen));
    }
}

#[cfg(test)]
mod control_tests {
    use super::tests::synthetic;
    use super::*;
    use std::sync::Mutex;

    fn choke() -> LumpedModel {
        LumpedModel {
            l0_h: 10e-6,
            rdc_ohm: 0.05,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: Some(20e3),
            cp_f: 3e-12,
            ls_h: 0.0,
            sections: vec![],
            core: None,
        }
    }

    #[test]
    fn a_set_cancel_flag_cancels() {
        let sweep = synthetic(&choke(), 1e3, 200e6, 201, 1);
        let flag = Arc::new(AtomicBool::new(true));
        let control = FitControl {
            cancel: Some(flag),
            progress: None,
        };
        assert_eq!(
            fit_lumped(&sweep, &FitOptions::default(), &control),
            Err(FitError::Cancelled)
        );
    }

    #[test]
    fn cancelling_from_the_progress_hook_stops_the_remaining_candidates() {
        let sweep = synthetic(&choke(), 1e3, 200e6, 201, 2);
        let flag = Arc::new(AtomicBool::new(false));
        let seen = Arc::new(Mutex::new(Vec::new()));
        let (f2, s2) = (flag.clone(), seen.clone());
        let control = FitControl {
            cancel: Some(flag),
            progress: Some(Arc::new(move |p| {
                s2.lock().unwrap().push(p);
                f2.store(true, Ordering::Relaxed);
            })),
        };
        let r = fit_lumped(&sweep, &FitOptions::default(), &control);
        assert_eq!(r, Err(FitError::Cancelled));
        assert_eq!(seen.lock().unwrap().len(), 1);
    }

    #[test]
    fn progress_rises_to_one() {
        let sweep = synthetic(&choke(), 1e3, 200e6, 201, 3);
        let seen = Arc::new(Mutex::new(Vec::new()));
        let s2 = seen.clone();
        let control = FitControl {
            cancel: None,
            progress: Some(Arc::new(move |p| s2.lock().unwrap().push(p))),
        };
        fit_lumped(&sweep, &FitOptions::default(), &control).unwrap();
        let seen = seen.lock().unwrap();
        assert!(seen.windows(2).all(|w| w[0] <= w[1]), "{seen:?}");
        assert_eq!(*seen.last().unwrap(), 1.0);
    }

    #[test]
    fn an_exhausted_time_limit_gives_a_model_marked_time_limit() {
        let sweep = synthetic(&choke(), 1e3, 200e6, 201, 4);
        let options = FitOptions {
            time_limit_s: 1e-9,
            ..FitOptions::default()
        };
        let r = fit_lumped(&sweep, &options, &FitControl::default()).unwrap();
        assert_eq!(r.termination, Termination::TimeLimit);
        assert_eq!(r.candidates.len(), 1);
        let FittedModel::Lumped(m) = &r.model else {
            panic!()
        };
        assert!(m.l0_h.is_finite() && m.l0_h > 0.0);
    }

    #[test]
    fn bad_sweeps_and_options_are_clear_errors() {
        let good = synthetic(&choke(), 1e3, 200e6, 50, 5);
        let mut short = good.clone();
        short.frequency_hz.truncate(10);
        short.impedance_ohm.truncate(10);
        short.sigma_ohm.truncate(10);
        assert_eq!(
            fit_lumped(&short, &FitOptions::default(), &FitControl::default()),
            Err(FitError::TooFewPoints(10))
        );
        let mut zero_sigma = good.clone();
        zero_sigma.sigma_ohm[7] = 0.0;
        assert!(matches!(
            fit_lumped(&zero_sigma, &FitOptions::default(), &FitControl::default()),
            Err(FitError::InvalidOptions(m)) if m.contains("uncertainty")
        ));
        let mut capacitor = good.clone();
        for z in &mut capacitor.impedance_ohm {
            z.im = -z.im.abs() - 1.0;
        }
        assert!(matches!(
            fit_lumped(&capacitor, &FitOptions::default(), &FitControl::default()),
            Err(FitError::NotAnInductor(_))
        ));
        let options = FitOptions {
            max_sections: 4,
            ..FitOptions::default()
        };
        assert!(matches!(
            fit_lumped(&good, &options, &FitControl::default()),
            Err(FitError::InvalidOptions(_))
        ));
    }
}
