//! Vector fitting: exact pole recovery, automatic order, passivity enforcement, robustness, bad input.

use henrybook::fit::rational::passivity::check_passivity;
use henrybook::fit::rational::{VectorFitSettings, vector_fit};
use henrybook::fit::{FitControl, FitError, FitOptions, ModelFamily, Termination, fit};
use henrybook::model::rational::{ComplexPole, RealPole};
use henrybook::model::{FittedModel, ImpedanceModel, RationalModel};
use henrybook::sweep::{Method, Sweep};
use henrybook_tests::vector_fit_synth::*;
use num_complex::Complex64;
use proptest::prelude::*;
use std::f64::consts::PI;

fn rational_options() -> FitOptions {
    FitOptions {
        family: ModelFamily::Rational,
        ..FitOptions::default()
    }
}

fn rational_of(report: &henrybook::fit::FitReport) -> &RationalModel {
    match &report.model {
        FittedModel::Rational(m) => m,
        other => panic!("expected a rational model, got {other:?}"),
    }
}

fn exact_sweep(model: &dyn ImpedanceModel, f: &[f64]) -> Sweep {
    let z: Vec<Complex64> = f.iter().map(|f| model.impedance(*f)).collect();
    Sweep {
        frequency_hz: f.to_vec(),
        sigma_ohm: z.iter().map(|z| 1e-3 * z.norm()).collect(),
        impedance_ohm: z,
        method: Method::Direct,
        z0_ohm: 50.0,
        dc_reading: None,
        warnings: Vec::new(),
    }
}

/// (Rs + sL) ‖ Cp ‖ Rp.
struct ParallelRlc {
    l: f64,
    rs: f64,
    cp: f64,
    rp: f64,
}

impl ImpedanceModel for ParallelRlc {
    fn impedance(&self, frequency_hz: f64) -> Complex64 {
        let s = Complex64::new(0.0, 2.0 * PI * frequency_hz);
        (1.0 / (self.rs + s * self.l) + s * self.cp + 1.0 / self.rp).inv()
    }
}

fn rel(a: Complex64, b: Complex64) -> f64 {
    (a - b).norm() / b.norm()
}

#[test]
fn the_pole_pair_of_an_exact_parallel_rlc_sweep_is_recovered_to_1e_9() {
    // Check value from issue 5: L = 10 µH, Rs = 0.1 Ω, Cp = 5 pF, Rp = 20 kΩ has its pole pair at
    // s/2π = −0.79657 ± j22.49386 MHz. Derived here: Z = (Rs + sL)·Rp / (L·Cp·Rp·s² + (L + Rs·Cp·Rp)·s +
    // Rp + Rs), so the poles solve s² + (1/(Rp·Cp) + Rs/L)·s + (Rp + Rs)/(L·Cp·Rp) = 0 (circuit algebra).
    let c = ParallelRlc {
        l: 10e-6,
        rs: 0.1,
        cp: 5e-12,
        rp: 20e3,
    };
    let b = 1.0 / (c.rp * c.cp) + c.rs / c.l;
    let k = (c.rp + c.rs) / (c.l * c.cp * c.rp);
    let exact = Complex64::new(-b / 2.0, (k - b * b / 4.0).sqrt());
    let mhz = exact / (2.0 * PI * 1e6);
    assert!(
        (mhz.re + 0.79657).abs() < 5e-6 && (mhz.im - 22.49386).abs() < 5e-6,
        "{mhz}"
    );
    // Residue at the pole: N(p)/D'(p) with N = (Rs + sL)·Rp/(L·Cp·Rp), D = s² + b·s + k.
    let residue = (c.rs + exact * c.l) * c.rp / (c.l * c.cp * c.rp) / (2.0 * exact + b);

    let sweep = exact_sweep(&c, &log_grid(1e4, 1e9, 401));
    let fixed = vector_fit(
        &sweep,
        VectorFitSettings {
            order: 2,
            max_relocations: 30,
        },
        &FitControl::default(),
    )
    .unwrap();
    let auto = fit(&sweep, &rational_options(), &FitControl::default()).unwrap();
    for (what, m) in [
        ("fixed order", &fixed.model),
        ("automatic", rational_of(&auto)),
    ] {
        assert_eq!(m.complex_poles.len(), 1, "{what}: {m:?}");
        assert!(m.real_poles.is_empty(), "{what}: {m:?}");
        let p = m.complex_poles[0];
        let err = rel(p.pole_rad_per_s, exact);
        println!("{what}: pole relative error {err:.3e}");
        assert!(err < 1e-9, "{what}: pole {} vs {exact}", p.pole_rad_per_s);
        assert!(rel(p.residue_ohm_rad_per_s, residue) < 1e-9, "{what}");
        // No constant or proportional term in this circuit.
        assert!(
            m.d_ohm.abs() < 1e-9 * c.rp && m.e_h.abs() < 1e-9 * c.l,
            "{what}: {m:?}"
        );
    }
    assert_eq!(auto.quality.parameters, 6);
    assert!(auto.candidates.iter().filter(|c| c.chosen).count() == 1);
}

#[test]
fn derived_figures_of_the_rational_fit_match_those_of_the_circuit() {
    // The SRF of the parallel RLC from the fitted rational model equals the one of the circuit itself;
    // Thomson's 1/(2π·√(L·C)) for 10 µH with 5 pF is 22.5079 MHz (TOOLBOX reference values), which the
    // lossy circuit's SRF matches to its 6 digits.
    let c = ParallelRlc {
        l: 10e-6,
        rs: 0.1,
        cp: 5e-12,
        rp: 20e3,
    };
    let band = [1e4, 1e9];
    let sweep = exact_sweep(&c, &log_grid(band[0], band[1], 401));
    let report = fit(&sweep, &rational_options(), &FitControl::default()).unwrap();
    let known = henrybook::fit::derived::KnownElements::default();
    let truth = henrybook::fit::derived::derived_figures(&c, band, &[], &known);
    let srf = report.derived.srf_hz.unwrap();
    assert!((srf / truth.srf_hz.unwrap() - 1.0).abs() < 1e-9, "{srf}");
    // Im Z = 0 of (Rs + sL) ‖ Cp ‖ Rp at ω² = 1/(L·Cp) − (Rs/L)² (circuit algebra).
    let analytic = (1.0 / (c.l * c.cp) - (c.rs / c.l).powi(2)).sqrt() / (2.0 * PI);
    assert!((srf / analytic - 1.0).abs() < 1e-9, "{srf} vs {analytic}");
    assert!((srf / 22.5079e6 - 1.0).abs() < 5e-6, "{srf}");
    // dZ/ds at DC: with Y = 1/(Rs + sL) + s·Cp + 1/Rp, Z′(0) = −Y′(0)/Y(0)² =
    // (L/Rs² − Cp)/(1/Rs + 1/Rp)² (circuit algebra).
    let l0 = rational_of(&report).dc_inductance_h();
    let l0_exact = (c.l / (c.rs * c.rs) - c.cp) / (1.0 / c.rs + 1.0 / c.rp).powi(2);
    assert!((l0 / l0_exact - 1.0).abs() < 1e-9, "{l0} vs {l0_exact}");
    assert!((rational_of(&report).dc_resistance_ohm() - c.rs * c.rp / (c.rs + c.rp)).abs() < 1e-9);

    // The noisy choke: resonances of the passive fit against those of the known model.
    let f = log_grid(1e4, 1e9, 801);
    let sweep = noisy_sweep(&choke(), &f, 1e-3, 11);
    let report = fit(&sweep, &rational_options(), &FitControl::default()).unwrap();
    let truth = henrybook::fit::derived::derived_figures(&choke(), [1e4, 1e9], &[], &known);
    let got = &report.derived;
    assert_eq!(
        got.parallel_resonances_hz.len(),
        truth.parallel_resonances_hz.len(),
        "{got:?}"
    );
    assert_eq!(
        got.series_resonances_hz.len(),
        truth.series_resonances_hz.len(),
        "{got:?}"
    );
    for (a, b) in got
        .parallel_resonances_hz
        .iter()
        .zip(&truth.parallel_resonances_hz)
        .chain(
            got.series_resonances_hz
                .iter()
                .zip(&truth.series_resonances_hz),
        )
    {
        assert!((a / b - 1.0).abs() < 2e-3, "{a} vs {b}");
    }
}

#[test]
fn every_pole_of_an_exact_seventh_order_model_is_recovered_to_1e_9() {
    // Synthetic (no source): a known model with a real pole, three pairs, d and e.
    let known = RationalModel {
        d_ohm: 0.2,
        e_h: 3e-9,
        real_poles: vec![RealPole {
            pole_rad_per_s: -2e5,
            residue_ohm_rad_per_s: 4e5,
        }],
        complex_poles: vec![
            ComplexPole {
                pole_rad_per_s: Complex64::new(-3e5, 2e6),
                residue_ohm_rad_per_s: Complex64::new(1e6, 2e5),
            },
            ComplexPole {
                pole_rad_per_s: Complex64::new(-4e6, 9e7),
                residue_ohm_rad_per_s: Complex64::new(4e8, -1e7),
            },
            ComplexPole {
                pole_rad_per_s: Complex64::new(-6e7, 1.5e9),
                residue_ohm_rad_per_s: Complex64::new(2e9, 3e8),
            },
        ],
    };
    let sweep = exact_sweep(&known, &log_grid(1e3, 1e9, 801));
    let fitted = vector_fit(
        &sweep,
        VectorFitSettings {
            order: 7,
            max_relocations: 50,
        },
        &FitControl::default(),
    )
    .unwrap()
    .model;
    assert_eq!(fitted.real_poles.len(), 1);
    assert_eq!(fitted.complex_poles.len(), 3);
    let err_real = (fitted.real_poles[0].pole_rad_per_s - known.real_poles[0].pole_rad_per_s).abs()
        / known.real_poles[0].pole_rad_per_s.abs();
    assert!(err_real < 1e-9, "{err_real}");
    for (a, b) in fitted.complex_poles.iter().zip(&known.complex_poles) {
        let err = rel(a.pole_rad_per_s, b.pole_rad_per_s);
        assert!(
            err < 1e-9,
            "{} vs {}: {err}",
            a.pole_rad_per_s,
            b.pole_rad_per_s
        );
        assert!(rel(a.residue_ohm_rad_per_s, b.residue_ohm_rad_per_s) < 1e-8);
    }
    assert!(
        (fitted.d_ohm - known.d_ohm).abs() < 1e-9 && (fitted.e_h / known.e_h - 1.0).abs() < 1e-9
    );
}

#[test]
fn an_automatic_fit_of_a_noisy_choke_is_passive_stable_and_at_the_noise_level() {
    let f = log_grid(1e4, 1e9, 801);
    let sweep = noisy_sweep(&choke(), &f, 1e-3, 3);
    let report = fit(&sweep, &rational_options(), &FitControl::default()).unwrap();
    let m = rational_of(&report);
    assert!(check_passivity(m).passive);
    assert!(m.real_poles.iter().all(|p| p.pole_rad_per_s < 0.0));
    assert!(m.complex_poles.iter().all(|p| p.pole_rad_per_s.re < 0.0));
    // Residuals at the stated uncertainty give 1 (the noise is Gaussian with that σ).
    assert!(
        report.quality.rms_weighted > 0.85 && report.quality.rms_weighted < 1.1,
        "{:?}",
        report.quality
    );
    assert_eq!(report.candidates.iter().filter(|c| c.chosen).count(), 1);
    assert_eq!(report.termination, Termination::Converged);
    assert_eq!(report.band_hz, [1e4, 1e9]);
    assert!(report.uncertainty.is_none());
}

/// Re Z on a dense grid far beyond the band: an independent check of the eigenvalue-based test.
fn dense_min_re_z(m: &RationalModel) -> f64 {
    (0..=100_000)
        .map(|i| 1.0 * 1e12f64.powf(i as f64 / 100_000.0))
        .map(|f| m.impedance(f).re)
        .fold(f64::INFINITY, f64::min)
}

#[test]
fn over_ordered_fits_of_noisy_data_that_go_non_passive_are_enforced_within_the_bound() {
    let f = log_grid(1e4, 1e9, 801);
    let mut enforced = 0;
    for seed in [1, 2] {
        let sweep = noisy_sweep(&choke(), &f, 3e-3, seed);
        for order in [12, 16, 20, 24, 28] {
            let naive = vector_fit(
                &sweep,
                VectorFitSettings {
                    order,
                    max_relocations: 30,
                },
                &FitControl::default(),
            )
            .unwrap();
            if check_passivity(&naive.model).passive {
                continue;
            }
            let options = FitOptions {
                rational_order: Some(order),
                ..rational_options()
            };
            match fit(&sweep, &options, &FitControl::default()) {
                Ok(report) => {
                    let m = rational_of(&report);
                    assert!(check_passivity(m).passive, "seed {seed} order {order}");
                    assert!(m.d_ohm >= 0.0 && m.e_h >= 0.0);
                    let dense = dense_min_re_z(m);
                    assert!(dense >= 0.0, "seed {seed} order {order}: Re Z = {dense}");
                    // The bound of rational::passivity::error_bound: (1 + allowance)·max(naive, 0.001). A
                    // model past it is returned only with the warning that says so.
                    let bound =
                        naive.rms_weighted.max(1e-3) * (1.0 + options.passivity_rms_allowance);
                    let past_bound = report
                        .warnings
                        .iter()
                        .any(|w| w.contains("needed more than the allowed error increase"));
                    assert!(
                        past_bound || report.quality.rms_weighted <= bound * (1.0 + 1e-9),
                        "seed {seed} order {order}: {} past {bound} without a warning",
                        report.quality.rms_weighted
                    );
                    println!(
                        "seed {seed} order {order}: naive rms {:.4} (non-passive), enforced {:.4}",
                        naive.rms_weighted, report.quality.rms_weighted
                    );
                    enforced += 1;
                }
                Err(FitError::NotPassive(why)) => {
                    println!("seed {seed} order {order}: not enforceable within the bound: {why}")
                }
                Err(e) => panic!("seed {seed} order {order}: {e}"),
            }
        }
    }
    assert!(
        enforced >= 3,
        "only {enforced} naive fits went non-passive and were enforced"
    );
}

#[test]
fn bad_sweeps_get_clear_errors() {
    let f = log_grid(1e4, 1e8, 100);
    let good = exact_sweep(&choke(), &f);
    let opts = rational_options();
    let ctl = FitControl::default();
    let mut short = good.clone();
    short.frequency_hz.truncate(10);
    short.impedance_ohm.truncate(10);
    short.sigma_ohm.truncate(10);
    assert_eq!(fit(&short, &opts, &ctl), Err(FitError::TooFewPoints(10)));
    let mut nan = good.clone();
    nan.impedance_ohm[7] = Complex64::new(f64::NAN, 0.0);
    assert!(
        matches!(fit(&nan, &opts, &ctl), Err(FitError::InvalidOptions(m)) if m.contains("point 7"))
    );
    let mut zero_sigma = good.clone();
    zero_sigma.sigma_ohm[3] = 0.0;
    assert!(
        matches!(fit(&zero_sigma, &opts, &ctl), Err(FitError::InvalidOptions(m)) if m.contains("point 3"))
    );
    let mut unordered = good.clone();
    unordered.frequency_hz.swap(4, 5);
    assert!(
        matches!(fit(&unordered, &opts, &ctl), Err(FitError::InvalidOptions(m)) if m.contains("frequency 5"))
    );
    let too_high = FitOptions {
        rational_order: Some(150),
        ..rational_options()
    };
    assert!(matches!(
        fit(&good, &too_high, &ctl),
        Err(FitError::InvalidOptions(_))
    ));
}

#[test]
fn a_cancelled_fit_returns_cancelled() {
    let sweep = noisy_sweep(&choke(), &log_grid(1e4, 1e9, 401), 1e-3, 5);
    let flag = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(true));
    let ctl = FitControl {
        cancel: Some(flag),
        progress: None,
    };
    assert_eq!(
        fit(&sweep, &rational_options(), &ctl),
        Err(FitError::Cancelled)
    );
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 24, failure_persistence: None, ..ProptestConfig::default() })]

    #[test]
    fn noisy_sweeps_never_give_non_finite_or_unstable_models(
        seed in 1u64..10_000,
        log_noise in -4.0f64..-1.3,
        f_lo_exp in 3.0f64..5.0,
        points in 60usize..400,
    ) {
        // Synthetic sweeps of the known choke with 0.01 %–5 % noise (no source).
        let f = log_grid(10f64.powf(f_lo_exp), 1e9, points);
        let sweep = noisy_sweep(&choke(), &f, 10f64.powf(log_noise), seed);
        let naive = vector_fit(&sweep, VectorFitSettings { order: 12, max_relocations: 30 }, &FitControl::default()).unwrap();
        let finite = |m: &RationalModel| m.d_ohm.is_finite() && m.e_h.is_finite()
            && m.real_poles.iter().all(|p| p.pole_rad_per_s.is_finite() && p.residue_ohm_rad_per_s.is_finite())
            && m.complex_poles.iter().all(|p| p.pole_rad_per_s.norm().is_finite() && p.residue_ohm_rad_per_s.norm().is_finite());
        let stable = |m: &RationalModel| m.real_poles.iter().all(|p| p.pole_rad_per_s < 0.0)
            && m.complex_poles.iter().all(|p| p.pole_rad_per_s.re < 0.0 && p.pole_rad_per_s.im > 0.0);
        prop_assert!(finite(&naive.model) && stable(&naive.model));
        prop_assert!(naive.rms_weighted.is_finite());
        match fit(&sweep, &rational_options(), &FitControl::default()) {
            Ok(report) => {
                let m = rational_of(&report);
                prop_assert!(finite(m) && stable(m));
                prop_assert!(check_passivity(m).passive);
                prop_assert!(report.quality.rms_weighted.is_finite());
            }
            Err(FitError::NotPassive(_)) => {}
            Err(e) => prop_assert!(false, "unexpected error {e}"),
        }
    }
}

#[test]
fn a_noisy_sweep_whose_enforced_model_kept_a_narrow_dip_is_reported_passive_or_refused() {
    // A case the property test below found: 3.5 % noise fitted with a sharp spurious pole pair near
    // 23.6 kHz whose enforced model still had Re Z ≈ −2e-5 Ω over 2.5 Hz. (Invented data, no source.)
    let f = log_grid(10f64.powf(4.3818946991283685), 1e9, 208);
    let sweep = noisy_sweep(&choke(), &f, 10f64.powf(-1.4589715415547058), 4146);
    match fit(&sweep, &rational_options(), &FitControl::default()) {
        Ok(report) => assert!(check_passivity(rational_of(&report)).passive),
        Err(FitError::NotPassive(_)) => {}
        Err(e) => panic!("unexpected error {e}"),
    }
}

/// With no allowance at all, enforcing a non-passive fit always raises its error past the bound; the
/// data (an invented choke with noise) are passive, so the fit is not refused: the enforced model is
/// returned, passive, with the warning that it needed more than the allowance.
#[test]
fn a_model_that_needs_more_than_the_allowance_is_returned_with_a_warning_not_refused() {
    let f = log_grid(1e4, 1e9, 801);
    let sweep = noisy_sweep(&choke(), &f, 3e-3, 2);
    let order = 16;
    let naive = vector_fit(
        &sweep,
        VectorFitSettings {
            order,
            max_relocations: 30,
        },
        &FitControl::default(),
    )
    .unwrap();
    assert!(
        !check_passivity(&naive.model).passive,
        "the case needs a non-passive naive fit"
    );
    let options = FitOptions {
        rational_order: Some(order),
        passivity_rms_allowance: 0.0,
        ..rational_options()
    };
    let report = fit(&sweep, &options, &FitControl::default()).expect("not refused");
    let m = rational_of(&report);
    assert!(check_passivity(m).passive);
    assert!(dense_min_re_z(m) >= 0.0);
    assert!(report.quality.rms_weighted > naive.rms_weighted.max(1e-3));
    assert!(
        report
            .warnings
            .iter()
            .any(|w| w.contains("needed more than the allowed error increase (0 %)")),
        "{:?}",
        report.warnings
    );
}
