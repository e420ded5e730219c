//! σ per point of the core material's spectrum: over independent noise draws of a synthetic sweep of
//! a known dispersive core (an invented 47 µH toroid choke with a Cole–Cole core, not a measurement),
//! the true μ′ and μ″ at a few frequencies must lie within the reported 1σ about 68 % of the time and
//! within 2σ about 95 % of the time (normal distribution: 68.3 %, 95.4 %; common practice, no source).
//! The choke has no lead inductance here: with 3 nH of it the model selection often leaves it out, and
//! the bias of that misspecified model (not the σ) brings the coverage down to 56 % / 86 %.

use henrybook::fit::{FitControl, FitOptions, fit};
use henrybook::model::material::{Construction, CoreShape, material_report};
use henrybook::model::{CoreDispersion, CoreLaw, LumpedModel};
use henrybook::sweep::Method;
use henrybook_tests::synth::*;

/// The invented power choke (tests/common/synth.rs) without lead inductance, its core a dispersion law.
fn truth(law: CoreLaw, beta: f64) -> LumpedModel {
    let mut m = power_choke();
    m.rp_ohm = None;
    m.ls_h = 0.0;
    m.core = Some(CoreDispersion {
        law,
        corner_hz: 500e3,
        alpha: 0.3,
        beta,
        damping: 0.0,
        air_fraction: 0.0,
        resonance_hz: 0.0,
        resonance_share: 0.0,
    });
    m
}

fn construction() -> Construction {
    Construction {
        turns: 12.0,
        core: CoreShape::Toroid {
            outer_diameter_m: 20e-3,
            inner_diameter_m: 10e-3,
            height_m: 5e-3,
        },
        gap_m: None,
        nominal_initial_permeability: None,
    }
}

/// The share of estimates within 1σ and 2σ of the truth at 50 kHz, 500 kHz (the corner) and 5 MHz,
/// μ′ and μ″, over `draws` noise draws.
fn coverage(truth: &LumpedModel, draws: u64) -> (f64, f64) {
    let (f_lo, f_hi, n) = (1e3, 100e6, 301);
    let want = material_report(truth, None, None, &construction(), [f_lo, f_hi]);
    // The spectrum points nearest each frequency (10 per decade from the band's low end).
    let picks: Vec<usize> = [50e3, 500e3, 5e6]
        .iter()
        .map(|&f| {
            (0..want.spectrum.len())
                .min_by(|&a, &b| {
                    let d = |i: usize| (want.spectrum[i].frequency_hz / f).ln().abs();
                    d(a).total_cmp(&d(b))
                })
                .unwrap()
        })
        .collect();
    let options = FitOptions {
        construction: Some(construction()),
        ..FitOptions::default()
    };
    let (mut within1, mut within2, mut total, mut missing) = (0usize, 0usize, 0usize, 0usize);
    for seed in 0..draws {
        let sweep = synthetic_sweep(truth, f_lo, f_hi, n, Method::Direct, 7000 + seed);
        let report = fit(&sweep, &options, &FitControl::default()).unwrap();
        let got = report.material.expect("a material report");
        for &i in &picks {
            let (g, w) = (got.spectrum[i], want.spectrum[i]);
            assert_eq!(g.frequency_hz, w.frequency_hz);
            for (value, truth, sigma) in [
                (g.mu_real, w.mu_real, g.mu_real_sigma),
                (g.mu_imag, w.mu_imag, g.mu_imag_sigma),
            ] {
                let Some(s) = sigma else {
                    missing += 1;
                    continue;
                };
                assert!(s > 0.0, "σ {s} at {} Hz", g.frequency_hz);
                total += 1;
                let pull = (value - truth).abs() / s;
                within1 += (pull <= 1.0) as usize;
                within2 += (pull <= 2.0) as usize;
            }
        }
    }
    let (r1, r2) = (within1 as f64 / total as f64, within2 as f64 / total as f64);
    eprintln!(
        "{total} estimates ({missing} without σ): {:.1} % within 1σ, {:.1} % within 2σ",
        100.0 * r1,
        100.0 * r2
    );
    assert!(
        missing * 10 <= total,
        "σ is missing too often: {missing} of {}",
        total + missing
    );
    (r1, r2)
}

// Binomial spread on 480 estimates (correlated within a draw) is a few percent: the bounds leave room
// for it and still fail a σ understated by 1.5× (48 % within 1σ) or overstated by 1.6× (89 %). With a
// Cole–Cole core named as such (not as Havriliak–Negami with β held), σ is on the safe side: 79 % within
// 1σ, 98 % within 2σ. The ~1.2× is the selection spread (`fit::lumped`, model-averaged variance): the
// structures that nest the chosen one (β, an air fraction or ls added) reach the same cost, lie 6.4 in
// BIC behind (ln M) with weight e^(−3.2) each, and their marginal σ of the shared parameters is 2–3×
// the chosen model's. With that spread switched off the same draws give 69 % / 97 % (Cole–Cole) and
// 67 % / 95 % (Havriliak–Negami): the covariance itself is right, and the spread is kept on purpose,
// as a hedge for real cores that no single law fits exactly.

#[test]
fn the_spectrum_sigma_of_a_cole_cole_core_covers_the_truth_as_a_normal_spread_would() {
    let (r1, r2) = coverage(&truth(CoreLaw::ColeCole, 1.0), 80);
    assert!((0.58..=0.85).contains(&r1), "within 1σ: {r1}");
    assert!(r2 >= 0.90, "within 2σ: {r2}");
}

#[test]
fn the_spectrum_sigma_of_a_havriliak_negami_core_covers_the_truth_as_a_normal_spread_would() {
    let (r1, r2) = coverage(&truth(CoreLaw::HavriliakNegami, 0.6), 80);
    assert!((0.58..=0.78).contains(&r1), "within 1σ: {r1}");
    assert!(r2 >= 0.90, "within 2σ: {r2}");
}
