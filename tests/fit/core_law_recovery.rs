//! The dispersive core's own parameters, recovered from synthetic sweeps of a known core (an invented
//! 47 µH toroid choke, tests/common/synth.rs, whose core follows each published law in turn; not a
//! measurement). Over independent noise draws, per law: how often model selection names the true law,
//! and, where it does, how often each fitted parameter (L0, the corner, the law's shape parameters)
//! lies within its stated 1σ and 2σ of the truth. A normal spread puts 68.3 % within 1σ and 95.4 %
//! within 2σ (common practice, no source). The rates are printed; the bounds leave room for the
//! binomial spread of the draw count. Each law is drawn with a skin-effect term (k_ac) beside it, which
//! a poor single-pole fit has no use for: the laws must be tried on the structure that keeps it.

use henrybook::fit::{FitControl, FitOptions, fit};
use henrybook::model::{CoreDispersion, CoreLaw, FittedModel, LumpedModel};
use henrybook::sweep::Method;
use henrybook_tests::synth::*;

fn truth(core: CoreDispersion) -> LumpedModel {
    let mut m = power_choke();
    m.rp_ohm = None;
    m.ls_h = 0.0;
    m.core = Some(core);
    m
}

fn law(law: CoreLaw, alpha: f64, beta: f64, damping: f64) -> CoreDispersion {
    CoreDispersion {
        law,
        corner_hz: 500e3,
        alpha,
        beta,
        damping,
        air_fraction: 0.0,
        resonance_hz: 0.0,
        resonance_share: 0.0,
    }
}

struct Rates {
    draws: usize,
    law_named: usize,
    estimates: usize,
    within1: usize,
    within2: usize,
}

/// Fits `draws` noise draws of the truth; counts the draws whose chosen law is the truth's and the
/// pulls |fitted − true| / σ of L0 and of every core parameter the law has (and the fit states a σ
/// for) in those draws.
fn recover(truth: &LumpedModel, draws: u64, seed0: u64) -> Rates {
    let want = truth.core.unwrap();
    let mut r = Rates {
        draws: draws as usize,
        law_named: 0,
        estimates: 0,
        within1: 0,
        within2: 0,
    };
    for seed in 0..draws {
        let sweep = synthetic_sweep(truth, 1e3, 100e6, 301, Method::Direct, seed0 + seed);
        let report = fit(&sweep, &FitOptions::default(), &FitControl::default()).unwrap();
        let FittedModel::Lumped(m) = &report.model else {
            panic!("a lumped model")
        };
        let Some(got) = m.core.filter(|c| c.law == want.law) else {
            continue;
        };
        r.law_named += 1;
        let u = report.uncertainty.as_ref().unwrap();
        let cu = u.core.unwrap_or_default();
        let mut pairs = vec![
            (m.l0_h, truth.l0_h, u.l0_h),
            (got.corner_hz, want.corner_hz, cu.corner_hz),
        ];
        match want.law {
            CoreLaw::ColeCole => pairs.push((got.alpha, want.alpha, cu.alpha)),
            CoreLaw::HavriliakNegami => {
                pairs.push((got.alpha, want.alpha, cu.alpha));
                pairs.push((got.beta, want.beta, cu.beta));
            }
            CoreLaw::Resonance => pairs.push((got.damping, want.damping, cu.damping)),
            CoreLaw::ResonanceRelaxation => unreachable!("not drawn here"),
        }
        for (value, true_value, sigma) in pairs {
            let Some(s) = sigma else { continue };
            assert!(s > 0.0 && s.is_finite(), "σ {s}");
            r.estimates += 1;
            let pull = (value - true_value).abs() / s;
            r.within1 += (pull <= 1.0) as usize;
            r.within2 += (pull <= 2.0) as usize;
        }
    }
    eprintln!(
        "{:?}: law named in {} of {} draws; {} estimates, {:.1} % within 1σ, {:.1} % within 2σ",
        want.law,
        r.law_named,
        r.draws,
        r.estimates,
        100.0 * r.within1 as f64 / r.estimates.max(1) as f64,
        100.0 * r.within2 as f64 / r.estimates.max(1) as f64
    );
    r
}

fn assert_covers(r: &Rates, min_named: f64) {
    assert!(
        r.law_named as f64 >= min_named * r.draws as f64,
        "the true law named in only {} of {} draws",
        r.law_named,
        r.draws
    );
    let (r1, r2) = (
        r.within1 as f64 / r.estimates as f64,
        r.within2 as f64 / r.estimates as f64,
    );
    // Binomial spread on 150–200 estimates (correlated within a draw) is a few percent. Measured
    // (seeds below): 78–84 % within 1σ and 96.5–98.6 % within 2σ, σ a little on the safe side because
    // the reported σ carries the spread over nearly equal structures (see tests/fit/material_sigma.rs;
    // without it 68–79 % and 95.5–98 %); the bounds still fail a σ half or twice the right size (38 %
    // or 95 % within 1σ).
    assert!((0.55..=0.90).contains(&r1), "within 1σ: {r1}");
    assert!(r2 >= 0.93, "within 2σ: {r2}");
}

#[test]
fn a_cole_cole_core_is_named_and_its_parameters_are_covered_by_their_sigma() {
    let r = recover(&truth(law(CoreLaw::ColeCole, 0.3, 1.0, 0.0)), 50, 11_000);
    assert_covers(&r, 0.9);
}

#[test]
fn a_havriliak_negami_core_is_named_and_its_parameters_are_covered_by_their_sigma() {
    let r = recover(
        &truth(law(CoreLaw::HavriliakNegami, 0.3, 0.6, 0.0)),
        50,
        12_000,
    );
    assert_covers(&r, 0.9);
}

#[test]
fn a_resonant_core_is_named_and_its_parameters_are_covered_by_their_sigma() {
    let r = recover(&truth(law(CoreLaw::Resonance, 0.0, 1.0, 0.7)), 50, 13_000);
    assert_covers(&r, 0.9);
}
