//! Vector fitting of a scalar impedance (Gustavsen & Semlyen, IEEE Trans. Power Delivery 14(3), 1999) in its
//! relaxed form (Gustavsen, IEEE Trans. Power Delivery 21(3), 2006): poles relocated as the zeros of a
//! weighted scaling function σ(s), then residues, constant and proportional terms identified by linear least
//! squares, every point weighted by 1/σ. Relocation stops when the poles are fixed (relative move below
//! 1e-10), settled (1e-6) with the error flat, at the first relocation without a 0.1 % gain once the poles
//! move by less than 10 %, or after three such relocations; the best iterate is kept. A short
//! Levenberg–Marquardt refinement of poles and residues together then minimises the weighted error itself
//! (the relocation's fixed point minimises a linearised one), with stable poles and no pole sharper than it
//! was or than Q = 500; it runs on the lumped fit's solver ([`crate::fit::lm`]) and stops when a
//! Gauss–Newton step could gain less than 0.001 % or a step near it gained less than 0.01 %. Order
//! selection, passivity enforcement and the report are in [`fit_rational`].
//!
//! Everything runs on a normalised frequency s′ = s/ω₀ (ω₀ = 2π·f_max) so the columns of the least-squares
//! systems are of similar size. Every tall system is first compressed to its triangle by Householder QR
//! taken one cache-sized block of rows at a time, and the triangle solved by QR with column pivoting (which
//! decides the numerical rank). One factorisation per relocation serves twice: its leading block is the
//! residue system of the current poles, so their residues and error come with it. When the poles have
//! settled, their residues are identified alone with the squared basis riding along as extra columns, so
//! the same triangle also says how much a Gauss–Newton step could still gain (the refinement's first
//! test). Rows are built 64 points at a time, one pole at a time over the points.

mod basis;
pub mod passivity;
mod refine;
mod relocation;
mod stop;

pub(crate) use basis::{Coefficients, FitData, Poles};
pub(crate) use stop::Stop;

use crate::fit::{Candidate, FitControl, FitError, FitOptions, FitReport, Quality, Termination};
use crate::model::{FittedModel, RationalModel};
use crate::sweep::Sweep;
use basis::{rms_weighted, to_model};
use refine::refine;
use relocation::{
    Identified, identify, identify_with_gain, pole_change, relocate_and_identify, starting_poles,
};
use std::time::Instant;
use stop::cancelled;

/// The result of vector fitting at one order, before passivity enforcement.
#[derive(Debug, Clone)]
pub struct VectorFit {
    pub model: RationalModel,
    pub rms_weighted: f64,
    /// Pole relocations run.
    pub relocations: u64,
    /// Accepted Levenberg–Marquardt refinement steps after the relocations.
    pub refinements: u64,
    /// True when the poles stopped moving (relative change below 1e-10) before the relocation limit.
    pub converged: bool,
    pub(crate) poles: Poles,
    pub(crate) coef: Coefficients,
}

/// Settings of one fixed-order vector fit.
#[derive(Debug, Clone, Copy)]
pub struct VectorFitSettings {
    /// Number of poles (real poles count one, complex pairs two).
    pub order: usize,
    pub max_relocations: u64,
}

/// Vector fitting at a fixed order. Keeps the best (lowest weighted error) of the relocation iterates.
pub fn vector_fit(
    sweep: &Sweep,
    settings: VectorFitSettings,
    control: &FitControl,
) -> Result<VectorFit, FitError> {
    validate(sweep)?;
    let data = FitData::new(&sweep.frequency_hz, &sweep.impedance_ohm, &sweep.sigma_ohm);
    vector_fit_data(&data, settings, control, None)
}

pub(crate) fn vector_fit_data(
    data: &FitData,
    settings: VectorFitSettings,
    control: &FitControl,
    deadline: Option<Instant>,
) -> Result<VectorFit, FitError> {
    let Relocated {
        best,
        poles,
        relocations,
        converged,
    } = relocate(data, settings, control, deadline)?;
    let (best_rms, poles, coef, gain) = match best {
        Some(b) => b,
        None => {
            let Identified { coef, rms, gain } = identify(data, &poles);
            (rms, poles, coef, gain)
        }
    };
    let stop = Stop { control, deadline };
    let (poles, coef, refinements) = refine(data, poles, coef, gain, 40, stop);
    if stop.cancelled() {
        return Err(FitError::Cancelled);
    }
    // Without an accepted step the model is the one whose error was just measured.
    let rms = if refinements == 0 {
        best_rms
    } else {
        rms_weighted(data, &poles, &coef)
    };
    if !rms.is_finite() || coef.c.iter().any(|c| !c.is_finite()) {
        return Err(FitError::NonFinite(format!(
            "vector fitting at order {} gave a non-finite model",
            settings.order
        )));
    }
    Ok(VectorFit {
        model: to_model(data.omega0, &poles, &coef),
        rms_weighted: rms,
        relocations,
        refinements,
        converged,
        poles,
        coef,
    })
}

/// The relocation stage of [`vector_fit_data`]: the best iterate judged (its error, poles, residues
/// and, when measured, the Gauss–Newton gain left), the last poles reached, the number of relocations
/// and whether they converged.
struct Relocated {
    best: Option<(f64, Poles, Coefficients, Option<f64>)>,
    poles: Poles,
    relocations: u64,
    converged: bool,
}

fn relocate(
    data: &FitData,
    settings: VectorFitSettings,
    control: &FitControl,
    deadline: Option<Instant>,
) -> Result<Relocated, FitError> {
    let w_lo = data
        .s
        .iter()
        .fold(f64::INFINITY, |m, s| m.min(s.im))
        .max(1e-9);
    let w_hi = data.s.iter().fold(0.0f64, |m, s| m.max(s.im));
    let mut poles = starting_poles(settings.order, w_lo, w_hi);
    // The best iterate: error, poles, residues and (when measured) the Gauss–Newton gain left.
    let mut best: Option<(f64, Poles, Coefficients, Option<f64>)> = None;
    let mut relocations = 0;
    let mut converged = false;
    let mut stalls = 0;
    // Each pass factors the relocation system of the current poles once: its leading block gives their
    // residues (for the error and the best iterate), the whole gives the next poles. The poles reached by
    // a relocation are therefore judged at the start of the next pass.
    let mut last_change: Option<f64> = None;
    loop {
        if cancelled(control) {
            return Err(FitError::Cancelled);
        }
        if deadline.is_some_and(|d| Instant::now() > d) {
            break;
        }
        // The first relocations move the poles far from the starting set; the residues are only worth
        // judging from the third relocation on, or once the poles settle.
        let judge = last_change.is_some_and(|change| {
            relocations >= 3 || change <= 1e-2 || relocations >= settings.max_relocations
        });
        if !judge && relocations >= settings.max_relocations {
            break;
        }
        // Poles that moved by less than 1e-6 are most likely judged final in this pass (they are
        // fixed, or settled with the error flat): identify their residues alone first (N + 2 columns
        // instead of 2N + 3, and N more for the refinement's first test) and relocate only if the run goes
        // on.
        let identify_first = judge && last_change.is_some_and(|c| c < 1e-6);
        let (mut next, Identified { coef, rms, gain }) = if identify_first {
            (None, identify_with_gain(data, &poles))
        } else {
            relocate_and_identify(data, &poles)
        };
        if judge {
            let change = last_change.expect("judged after a relocation");
            let mut flat = false;
            if rms.is_finite() {
                flat = best
                    .as_ref()
                    .is_some_and(|(b, ..)| (rms - *b).abs() <= 1e-6 * *b);
                let improved = best.as_ref().is_none_or(|(b, ..)| rms < *b * (1.0 - 1e-3));
                if improved {
                    stalls = 0;
                } else {
                    stalls += 1;
                }
                if best.as_ref().is_none_or(|(b, ..)| rms <= *b) {
                    best = Some((rms, poles.clone(), coef, gain));
                }
            }
            // Poles fixed to 1e-10, or settled to 1e-6 with the error no longer changing (noisy data).
            if change < 1e-10 || (change < 1e-6 && flat) {
                converged = true;
                break;
            }
            // Noisy data keep the poles wandering at the noise level: stop at the first relocation that
            // no longer improves the error when the poles only move by less than 10 % (the refinement
            // that follows minimises the error itself), otherwise once it has not improved for three.
            if stalls >= 3 || (stalls >= 1 && change < 0.1) {
                converged = true;
                break;
            }
        }
        if relocations >= settings.max_relocations {
            break;
        }
        if identify_first {
            next = relocate_and_identify(data, &poles).0;
        }
        let Some(next) = next else {
            break;
        };
        relocations += 1;
        last_change = Some(pole_change(&poles, &next, w_lo));
        poles = next;
    }
    Ok(Relocated {
        best,
        poles,
        relocations,
        converged,
    })
}

fn validate(sweep: &Sweep) -> Result<(), FitError> {
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
    for (i, f) in sweep.frequency_hz.iter().enumerate() {
        if !(f.is_finite() && *f >= 0.0) {
            return Err(FitError::InvalidOptions(format!(
                "frequency {i} is {f}: frequencies must be finite and not negative"
            )));
        }
        if i > 0 && *f <= sweep.frequency_hz[i - 1] {
            return Err(FitError::InvalidOptions(format!(
                "frequency {i} ({f} Hz) does not increase"
            )));
        }
    }
    if let Some(i) = sweep
        .impedance_ohm
        .iter()
        .position(|z| !(z.re.is_finite() && z.im.is_finite()))
    {
        return Err(FitError::InvalidOptions(format!(
            "impedance point {i} is not finite"
        )));
    }
    if let Some(i) = sweep
        .sigma_ohm
        .iter()
        .position(|s| !(s.is_finite() && *s > 0.0))
    {
        return Err(FitError::InvalidOptions(format!(
            "uncertainty of point {i} is {}: it must be finite and positive",
            sweep.sigma_ohm[i]
        )));
    }
    Ok(())
}

/// One order tried by [`fit_rational`].
struct Tried {
    order: usize,
    fit: VectorFit,
    /// The passive model and its weighted error, or why enforcement failed.
    passive: Result<(RationalModel, f64), String>,
}

impl Tried {
    /// The passive model's weighted RMS error (∞ when there is none).
    fn passive_rms(&self) -> f64 {
        self.passive.as_ref().map_or(f64::INFINITY, |p| p.1)
    }
}

/// Vector fitting with automatic order selection and passivity enforcement, giving the shared report.
///
/// Orders grow by one complex pair (2, 4, 6, …) until the passive model's weighted RMS error reaches
/// `rational_target_rms_weighted`, stops improving (less than 2 % better than the best for two orders in a
/// row), or `rational_max_order` / the time limit is reached. The chosen order is the lowest that meets
/// the target, otherwise the lowest within 5 % of the best error. Every candidate is made passive by
/// [`passivity`]; one that cannot be within the allowance is not chosen, and when
/// none can, the fit fails with [`FitError::NotPassive`].
pub fn fit_rational(
    sweep: &Sweep,
    options: &FitOptions,
    control: &FitControl,
) -> Result<FitReport, FitError> {
    validate(sweep)?;
    check_options(options, sweep.frequency_hz.len())?;
    let started = Instant::now();
    let deadline = started + std::time::Duration::from_secs_f64(options.time_limit_s);
    let data = FitData::new(&sweep.frequency_hz, &sweep.impedance_ohm, &sweep.sigma_ohm);
    let orders: Vec<usize> = match options.rational_order {
        Some(n) => vec![n],
        None => (2..=options.rational_max_order).step_by(2).collect(),
    };
    let stop = Stop {
        control,
        deadline: Some(deadline),
    };
    let mut trials = try_orders(&data, &orders, options, stop)?;
    let beyond_allowance = enforce_beyond_allowance(&data, &mut trials.tried, options, stop)?;
    let chosen_order = choose_order(&trials.tried, options)?;
    let chosen = trials
        .tried
        .iter()
        .find(|t| t.order == chosen_order)
        .expect("the chosen order was tried");
    let fallback_warning = beyond_allowance.contains(&chosen.order).then(|| {
        format!(
            "the model shown needed more than the allowed error increase ({:.0} %) to become \
             passive, and is still closer to the data than any order within it: order {}, weighted \
             RMS {:.3} before enforcement and {:.3} after",
            100.0 * options.passivity_rms_allowance,
            chosen.order,
            chosen.fit.rms_weighted,
            chosen.passive_rms()
        )
    });
    let termination = if trials.timed_out {
        Termination::TimeLimit
    } else if chosen.fit.converged {
        Termination::Converged
    } else {
        Termination::MaxIterations
    };
    let mut report = rational_report(sweep, options, chosen, termination);
    report.warnings.extend(fallback_warning);
    report.iterations = trials.iterations;
    report.candidates = candidates(&trials.tried, chosen_order, 2 * sweep.frequency_hz.len());
    Ok(report)
}

/// The orders [`fit_rational`] tried, the relocations they took, and whether the time limit ended the
/// search.
struct Trials {
    tried: Vec<Tried>,
    iterations: u64,
    timed_out: bool,
}

/// Fits and enforces passivity order by order until the target is met, the error stops improving, the
/// orders run out or time does (see [`fit_rational`]).
fn try_orders(
    data: &FitData,
    orders: &[usize],
    options: &FitOptions,
    stop: Stop<'_>,
) -> Result<Trials, FitError> {
    let mut trials = Trials {
        tried: Vec::new(),
        iterations: 0,
        timed_out: false,
    };
    let tried = &mut trials.tried;
    let mut best_rms = f64::INFINITY;
    let mut no_gain = 0;
    for (idx, &order) in orders.iter().enumerate() {
        if stop.expired() {
            trials.timed_out = true;
            break;
        }
        let settings = VectorFitSettings {
            order,
            max_relocations: options.rational_max_relocations,
        };
        let fit = match vector_fit_data(data, settings, stop.control, stop.deadline) {
            Ok(f) => f,
            Err(FitError::Cancelled) => return Err(FitError::Cancelled),
            Err(e) if tried.is_empty() && idx + 1 == orders.len() => return Err(e),
            Err(_) => continue,
        };
        trials.iterations += fit.relocations;
        let passive = passive_model(data, &fit, options.passivity_rms_allowance, stop);
        if stop.cancelled() {
            return Err(FitError::Cancelled);
        }
        if stop.expired() {
            trials.timed_out = true;
        }
        let rms = passive.as_ref().map_or(f64::INFINITY, |p| p.1);
        // Progress is judged on the fit before enforcement: an order that cannot be made passive within
        // the bound may be followed by one that can.
        let naive_rms = fit.rms_weighted;
        tried.push(Tried {
            order,
            fit,
            passive,
        });
        if let Some(p) = &stop.control.progress {
            p((idx + 1) as f64 / orders.len() as f64);
        }
        if rms <= options.rational_target_rms_weighted {
            break;
        }
        if naive_rms < best_rms * 0.98 {
            no_gain = 0;
        } else {
            no_gain += 1;
        }
        best_rms = best_rms.min(naive_rms);
        let any_passive = tried.iter().any(|t| t.passive.is_ok());
        if (no_gain >= 2 && any_passive) || no_gain >= 4 {
            break;
        }
    }
    Ok(trials)
}

/// The allowance keeps enforcement from reshaping a model far from what the data support, but the
/// enforced model's error against the data is the measure that counts: when no order within the
/// allowance reaches the target (none at all, or only ones well above the noise), the orders that
/// failed only for the allowance are enforced again without it, and one of them is kept where it is
/// clearly closer to the data (a tenth below the best within the allowance) — with a warning
/// saying so. A sweep whose data are passive is never refused for the allowance alone. Returns the
/// orders kept that way.
fn enforce_beyond_allowance(
    data: &FitData,
    tried: &mut [Tried],
    options: &FitOptions,
    stop: Stop<'_>,
) -> Result<Vec<usize>, FitError> {
    let best_within = tried
        .iter()
        .filter_map(|t| t.passive.as_ref().ok().map(|p| p.1))
        .fold(f64::INFINITY, f64::min);
    let mut beyond_allowance: Vec<usize> = Vec::new();
    if best_within > options.rational_target_rms_weighted {
        for t in tried.iter_mut() {
            if !t
                .passive
                .as_ref()
                .is_err_and(|e| e.contains("beyond the allowed bound"))
            {
                continue;
            }
            if let Ok(p) = passive_model(data, &t.fit, f64::INFINITY, stop)
                && p.1 < 0.9 * best_within
            {
                t.passive = Ok(p);
                beyond_allowance.push(t.order);
            }
        }
        if stop.cancelled() {
            return Err(FitError::Cancelled);
        }
    }
    Ok(beyond_allowance)
}

/// The lowest passive order that meets the target, otherwise the lowest within 5 % of the best error;
/// when no order is passive, why not.
fn choose_order(tried: &[Tried], options: &FitOptions) -> Result<usize, FitError> {
    let passive: Vec<&Tried> = tried.iter().filter(|t| t.passive.is_ok()).collect();
    let best = passive
        .iter()
        .map(|t| t.passive_rms())
        .fold(f64::INFINITY, f64::min);
    let chosen = passive
        .iter()
        .find(|t| t.passive_rms() <= options.rational_target_rms_weighted)
        .or_else(|| passive.iter().find(|t| t.passive_rms() <= best * 1.05))
        .map(|t| t.order);
    if let Some(order) = chosen {
        return Ok(order);
    }
    let reasons: Vec<String> = tried
        .iter()
        .map(|t| {
            format!(
                "order {}: {}",
                t.order,
                t.passive.as_ref().err().map_or("", |s| s.as_str())
            )
        })
        .collect();
    if tried.is_empty() {
        return Err(FitError::NonFinite(
            "vector fitting produced no model at any order".into(),
        ));
    }
    Err(FitError::NotPassive(reasons.join("; ")))
}

/// Every order tried as a candidate of the report, over `n_data` real residuals.
fn candidates(tried: &[Tried], chosen_order: usize, n_data: usize) -> Vec<Candidate> {
    tried
        .iter()
        .map(|t| {
            let parameters = 2 * t.order + 2;
            // A candidate that could not be made passive is listed with its error before enforcement.
            let rms = t.passive.as_ref().map_or(t.fit.rms_weighted, |p| p.1);
            let cost = rms * rms * n_data as f64;
            Candidate {
                label: format!(
                    "rational order {} ({} real, {} pairs){}",
                    t.order,
                    t.fit.poles.real.len(),
                    t.fit.poles.pairs.len(),
                    if t.passive.is_ok() {
                        ""
                    } else {
                        ", not passive"
                    }
                ),
                parameters,
                cost,
                bic: cost + parameters as f64 * (n_data as f64).ln(),
                chosen: t.order == chosen_order,
            }
        })
        .collect()
}

/// The report of the chosen (passive) order; the caller adds the iterations, the candidates and its
/// own warnings.
fn rational_report(
    sweep: &Sweep,
    options: &FitOptions,
    chosen: &Tried,
    termination: Termination,
) -> FitReport {
    let (model, _) = chosen
        .passive
        .clone()
        .expect("only passive candidates are chosen");
    let quality = Quality {
        parameters: 2 * chosen.order + 2,
        ..crate::fit::derived::quality(&model, sweep)
    };
    let band_hz = [
        sweep.frequency_hz[0],
        *sweep.frequency_hz.last().expect("validated non-empty"),
    ];
    // Resonances and L/Q come from the rational model itself; its low-frequency inductance is exact
    // (dZ/ds at s = 0); it has no Cp or Rp element to compare with.
    let derived = crate::fit::derived::derived_figures(
        &model,
        band_hz,
        &options.report_frequencies_hz,
        &crate::fit::derived::KnownElements {
            l0_h: Some(model.dc_inductance_h()).filter(|l| l.is_finite() && *l > 0.0),
            cp_f: None,
            rp_ohm: None,
        },
    );
    let assessment = crate::fit::assess::assess(&model, sweep, 2 * chosen.order + 2);
    FitReport {
        engine_version: crate::fit::ENGINE_VERSION.to_string(),
        model: FittedModel::Rational(model),
        uncertainty: None,
        not_identifiable: Vec::new(),
        correlation: None,
        derived,
        quality,
        assessment,
        warnings: crate::fit::lumped::report_warnings(sweep, options),
        termination,
        iterations: 0,
        candidates: Vec::new(),
        band_hz,
        material: None,
    }
}

/// Enforces passivity on one order's fit within `allowance` and checks the result as every exported
/// model is checked: the passive model and its weighted RMS error, or why there is none.
fn passive_model(
    data: &FitData,
    fit: &VectorFit,
    allowance: f64,
    stop: Stop<'_>,
) -> Result<(RationalModel, f64), String> {
    passivity::enforce(data, &fit.poles, &fit.coef, allowance, stop)
        .map(|e| (to_model(data.omega0, &fit.poles, &e.coef), e.rms_after))
        .map_err(|e| e.to_string())
        .and_then(|(model, rms)| {
            // The same test as every exported model gets, on the model as it is reported: a dip a
            // few hertz wide beside a sharp pole can pass in the fit's scaled coordinates and fail
            // in these by rounding.
            let check = passivity::check_passivity(&model);
            match check.violations.first() {
                _ if check.passive => Ok((model, rms)),
                Some(v) => Err(format!(
                    "after enforcement Re Z is still {:.3e} Ω at {:.6e} Hz",
                    v.worst_re_z_ohm, v.worst_hz
                )),
                None => Err("after enforcement the model is still not positive-real".to_string()),
            }
        })
}

fn check_options(options: &FitOptions, points: usize) -> Result<(), FitError> {
    options.validate()?;
    let max_order = options.rational_order.unwrap_or(options.rational_max_order);
    if max_order == 0 {
        return Err(FitError::InvalidOptions(
            "the rational order must be at least 1".into(),
        ));
    }
    // 2K real equations must exceed the 2N + 3 unknowns of the relocation system.
    if 2 * max_order + 3 > 2 * points {
        return Err(FitError::InvalidOptions(format!(
            "a rational model of order {max_order} needs more than {points} points"
        )));
    }
    if !(options.time_limit_s.is_finite() && options.time_limit_s > 0.0) {
        return Err(FitError::InvalidOptions(
            "time_limit_s must be positive".into(),
        ));
    }
    if !(options.passivity_rms_allowance.is_finite() && options.passivity_rms_allowance >= 0.0) {
        return Err(FitError::InvalidOptions(
            "passivity_rms_allowance must be a non-negative fraction".into(),
        ));
    }
    if options.rational_max_relocations == 0 {
        return Err(FitError::InvalidOptions(
            "rational_max_relocations must be at least 1".into(),
        ));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::basis::RANK_TOL;
    use super::refine::jacobian_row;
    use super::*;
    use crate::fit::linalg::PivotedQr;
    use num_complex::Complex64;
    use std::f64::consts::PI;
    use std::sync::atomic::Ordering;

    fn exact_sweep() -> Sweep {
        // Synthetic (no source): (Rs + sL) ‖ Cp ‖ Rp, a rational function with one pole pair.
        let (l, rs, cp, rp) = (10e-6, 0.1, 5e-12, 20e3);
        let f: Vec<f64> = (0..401)
            .map(|i| 1e4 * (1e9f64 / 1e4).powf(i as f64 / 400.0))
            .collect();
        let z: Vec<Complex64> = f
            .iter()
            .map(|f| {
                let s = Complex64::new(0.0, 2.0 * PI * f);
                (1.0 / (rs + s * l) + s * cp + 1.0 / rp).inv()
            })
            .collect();
        let sigma = z.iter().map(|z| 1e-3 * z.norm()).collect();
        Sweep {
            frequency_hz: f,
            impedance_ohm: z,
            sigma_ohm: sigma,
            method: crate::sweep::Method::Direct,
            z0_ohm: 50.0,
            dc_reading: None,
            warnings: Vec::new(),
        }
    }

    #[test]
    fn exact_second_order_data_give_their_pole_pair() {
        let fit = vector_fit(
            &exact_sweep(),
            VectorFitSettings {
                order: 2,
                max_relocations: 30,
            },
            &FitControl::default(),
        )
        .unwrap();
        assert_eq!(fit.model.complex_poles.len(), 1);
        let p = fit.model.complex_poles[0].pole_rad_per_s / (2.0 * PI);
        assert!((p.re + 0.79657e6).abs() < 0.00001e6, "{p}");
        assert!((p.im - 22.49386e6).abs() < 0.00001e6, "{p}");
        assert!(fit.rms_weighted < 1e-6, "{}", fit.rms_weighted);
    }

    /// The exact sweep with a deterministic ±0.1 % ripple (synthetic, no source), so that no pole set
    /// fits it exactly.
    fn rippled_data() -> FitData {
        let sw = exact_sweep();
        let z: Vec<Complex64> = sw
            .impedance_ohm
            .iter()
            .enumerate()
            .map(|(i, z)| {
                z * Complex64::new(
                    1.0 + 1e-3 * (i as f64 * 0.7).sin(),
                    1e-3 * (i as f64 * 1.3).cos(),
                )
            })
            .collect();
        FitData::new(&sw.frequency_hz, &z, &sw.sigma_ohm)
    }

    #[test]
    fn the_error_read_off_the_triangle_is_the_error_of_the_identified_residues() {
        let data = rippled_data();
        for poles in [starting_poles(4, 1e-5, 1.0), starting_poles(3, 1e-5, 1.0)] {
            let alone = identify(&data, &poles);
            let (_, shared) = relocate_and_identify(&data, &poles);
            let measured = rms_weighted(&data, &poles, &alone.coef);
            for fit in [&alone, &shared] {
                assert!(
                    (fit.rms - measured).abs() <= 1e-9 * measured,
                    "{} vs {measured}",
                    fit.rms
                );
            }
            for (a, b) in alone.coef.c.iter().zip(&shared.coef.c) {
                assert!((a - b).abs() <= 1e-8 * a.abs().max(1e-3), "{a} vs {b}");
            }
        }
    }

    #[test]
    fn the_refinement_takes_no_step_once_cancelled_or_past_its_deadline() {
        // Starting poles are far from the minimum: unhindered, the refinement takes steps.
        let data = rippled_data();
        let poles = starting_poles(4, 1e-5, 1.0);
        let coef = identify(&data, &poles).coef;
        let (.., free) = refine(&data, poles.clone(), coef.clone(), None, 40, Stop::NEVER);
        assert!(free > 0, "the refinement should move these poles");
        let flag = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(true));
        let control = FitControl {
            cancel: Some(flag),
            progress: None,
        };
        let cancelled = Stop {
            control: &control,
            deadline: None,
        };
        let (p, c, steps) = refine(&data, poles.clone(), coef.clone(), None, 40, cancelled);
        assert_eq!((steps, &p, &c), (0, &poles, &coef));
        let expired = Stop {
            control: &FitControl::default(),
            deadline: Some(Instant::now() - std::time::Duration::from_millis(1)),
        };
        let (.., steps) = refine(&data, poles, coef, None, 40, expired);
        assert_eq!(steps, 0);
    }

    #[test]
    fn a_time_limit_ends_a_high_order_fit_as_such() {
        // The same order-60 fit (about 1 s unhindered here) with a 0.1 s limit: it reports the limit,
        // as a model marked TimeLimit or as no passive model "after the time limit". The time it took
        // is printed, not asserted.
        let sweep = rippled_series_sweep();
        let options = FitOptions {
            family: crate::fit::ModelFamily::Rational,
            rational_order: Some(crate::fit::MAX_RATIONAL_ORDER),
            rational_max_relocations: 1000,
            time_limit_s: 0.1,
            ..FitOptions::default()
        };
        let started = Instant::now();
        let result = fit_rational(&sweep, &options, &FitControl::default());
        eprintln!(
            "order-60 fit with a 0.1 s limit took {:?}",
            started.elapsed()
        );
        match result {
            Ok(report) => assert_eq!(report.termination, Termination::TimeLimit),
            Err(FitError::NotPassive(why)) => assert!(why.contains("time limit"), "{why}"),
            Err(other) => panic!("{other}"),
        }
    }

    /// Synthetic (no source): a rippled series R-L on 4000 points, so order 60 runs for about a second.
    fn rippled_series_sweep() -> Sweep {
        let k = 4000;
        let f: Vec<f64> = (0..k)
            .map(|i| 1e3 * (1e6f64).powf(i as f64 / (k - 1) as f64))
            .collect();
        let z: Vec<Complex64> = f
            .iter()
            .enumerate()
            .map(|(i, f)| {
                let s = Complex64::new(0.0, 2.0 * PI * f);
                (s * 1e-5 + 0.1) * Complex64::new(1.0 + 1e-2 * (i as f64 * 0.37).sin(), 0.0)
            })
            .collect();
        Sweep {
            sigma_ohm: z.iter().map(|z| 1e-3 * z.norm()).collect(),
            frequency_hz: f,
            impedance_ohm: z,
            ..exact_sweep()
        }
    }

    #[test]
    fn a_cancel_during_a_high_order_fit_ends_it() {
        // The order-60 fit above runs for about a second; the flag is raised from another thread after
        // it started, and the fit must answer Cancelled (not a model). How long it took after the flag
        // is printed, not asserted.
        let model_sweep = rippled_series_sweep();
        let flag = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
        let control = FitControl {
            cancel: Some(flag.clone()),
            progress: None,
        };
        let options = FitOptions {
            family: crate::fit::ModelFamily::Rational,
            rational_order: Some(crate::fit::MAX_RATIONAL_ORDER),
            rational_max_relocations: 1000,
            time_limit_s: 3600.0,
            ..FitOptions::default()
        };
        let raiser = std::thread::spawn(move || {
            std::thread::sleep(std::time::Duration::from_millis(50));
            flag.store(true, Ordering::SeqCst);
            Instant::now()
        });
        let result = fit_rational(&model_sweep, &options, &control);
        let ended = Instant::now();
        let raised = raiser.join().unwrap();
        eprintln!(
            "order-60 fit ended {:?} after the cancel flag",
            ended.saturating_duration_since(raised)
        );
        assert_eq!(result.err(), Some(FitError::Cancelled));
    }

    /// ‖P_J r‖² by pivoted QR of the whole weighted Jacobian.
    fn qr_gain(data: &FitData, poles: &Poles, coef: &Coefficients, r: &[f64]) -> f64 {
        let n = poles.order();
        let params = poles.real.len() + 2 * poles.pairs.len() + n + 2;
        let k = data.len();
        let mut a = vec![0.0; 2 * k * params];
        let mut vals = vec![Complex64::new(0.0, 0.0); params];
        for i in 0..k {
            jacobian_row(data.s[i], poles, coef, &mut vals);
            for (j, v) in vals.iter().enumerate() {
                a[j * 2 * k + i] = v.re * data.w[i];
                a[j * 2 * k + k + i] = v.im * data.w[i];
            }
        }
        let qr = PivotedQr::new(a, 2 * k, params, RANK_TOL);
        let mut qtr = r.to_vec();
        qr.apply_qt(&mut qtr);
        qtr[..qr.rank()].iter().map(|v| v * v).sum()
    }

    /// A pair near the data's own (−0.000797 + 0.022494j on this axis) and a real pole, off their optimum:
    /// a well-posed Jacobian.
    fn near_poles() -> Poles {
        Poles {
            real: vec![-0.3],
            pairs: vec![Complex64::new(-0.0009, 0.0227)],
        }
    }

    /// The weighted residual (Re rows, then Im rows) of a pole–residue set.
    fn weighted_residual(data: &FitData, poles: &Poles, coef: &Coefficients) -> Vec<f64> {
        let k = data.len();
        let mut r = vec![0.0; 2 * k];
        for i in 0..k {
            let v = (basis::evaluate(data.s[i], poles, coef) - data.z[i]) * data.w[i];
            r[i] = v.re;
            r[k + i] = v.im;
        }
        r
    }

    #[test]
    fn the_gain_read_off_the_identify_triangle_is_the_qr_gain() {
        let data = rippled_data();
        // Off the optimum (as above) and at a relocation's fixed point, where the gain is small; then a
        // real-pole-only set.
        let near = near_poles();
        let mut settled = near.clone();
        for _ in 0..20 {
            settled = relocate_and_identify(&data, &settled).0.expect("poles");
        }
        let reals = Poles {
            real: vec![-0.01, -0.2],
            pairs: vec![],
        };
        for poles in [near, settled, reals] {
            let fit = identify_with_gain(&data, &poles);
            let plain = identify(&data, &poles);
            // The extra columns leave the residue system's triangle as it was.
            assert_eq!(fit.coef, plain.coef);
            assert_eq!(fit.rms, plain.rms);
            let r = weighted_residual(&data, &poles, &fit.coef);
            let cost: f64 = r.iter().map(|v| v * v).sum();
            let direct = qr_gain(&data, &poles, &fit.coef, &r) / cost;
            let gain = fit.gain.expect("a well-posed Jacobian");
            assert!(
                direct > 0.0 && (gain - direct).abs() <= 1e-6 * direct,
                "{gain} vs {direct}"
            );
        }
        // The same pair twice: the residue system is rank-deficient and no gain is read off.
        let twice = Poles {
            real: vec![],
            pairs: vec![Complex64::new(-0.0009, 0.0227); 2],
        };
        assert_eq!(identify_with_gain(&data, &twice).gain, None);
    }
}
