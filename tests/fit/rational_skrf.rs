//! Vector fitting against scikit-rf's `VectorFitting` on the same impedance data.
//!
//! Source of the reference: scikit-rf (PyPI `scikit-rf`), `skrf.vectorFitting.VectorFitting.vector_fit`
//! with `parameter_type='z'`, `fit_constant=True`, `fit_proportional=True`, run by
//! tests/python/vf_skrf.py.
//!
//! How the comparison is made fair: both fit the identical Z values (scikit-rf receives them through
//! `Network.from_z`; the S round trip changes them by the `roundtrip_max_rel` the script reports, checked
//! below); both use the same number of poles (N/2 complex starting pairs, no real ones); scikit-rf weights
//! every point of a single response equally, so henrybook gets a constant σ (uniform weights); scikit-rf gets
//! the better of its logarithmic and linear starting-pole spacings; both are compared before any
//! passivity enforcement (scikit-rf enforces none for Z), by the same RMS error sqrt(mean |Z − Z_fit|²)
//! in ohm against the given data. henrybook's passive model is reported beside it.

use henrybook::fit::rational::{VectorFitSettings, vector_fit};
use henrybook::fit::{FitControl, FitOptions, ModelFamily, fit};
use henrybook::model::ImpedanceModel;
use henrybook::sweep::Sweep;
use henrybook_tests::run_reference_script;
use henrybook_tests::vector_fit_synth::*;
use serde_json::json;

fn rms_ohm(sweep: &Sweep, model: &dyn ImpedanceModel) -> f64 {
    let ss: f64 = sweep
        .frequency_hz
        .iter()
        .zip(&sweep.impedance_ohm)
        .map(|(f, z)| (model.impedance(*f) - z).norm_sqr())
        .sum();
    (ss / sweep.frequency_hz.len() as f64).sqrt()
}

fn uniform_sigma(mut sweep: Sweep) -> Sweep {
    let mean = sweep.sigma_ohm.iter().sum::<f64>() / sweep.sigma_ohm.len() as f64;
    sweep.sigma_ohm.iter_mut().for_each(|s| *s = mean);
    sweep
}

/// Compares at every order; asserts at the orders up to the one scikit-rf needs (its lowest order within
/// 5 % of its best RMS over the orders tried). Above it both fit noise with spurious poles and the RMS
/// difference is a matter of which noise the spurious poles catch; those rows are printed, not asserted.
fn compare(sweep: &Sweep, orders: &[usize], what: &str) {
    let request = json!({
        "frequency_hz": sweep.frequency_hz,
        "z_re": sweep.impedance_ohm.iter().map(|z| z.re).collect::<Vec<_>>(),
        "z_im": sweep.impedance_ohm.iter().map(|z| z.im).collect::<Vec<_>>(),
        "fits": orders.iter().map(|n| json!({"n_real": 0, "n_cmplx": n / 2})).collect::<Vec<_>>(),
        "spacings": ["log", "lin"],
    });
    let reply = run_reference_script("vf_skrf.py", &[], &request.to_string());
    assert!(reply["roundtrip_max_rel"].as_f64().unwrap() < 1e-8);
    let skrf_at = |order: usize| {
        reply["fits"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|f| f["n_cmplx"].as_u64().unwrap() as usize * 2 == order)
            .map(|f| f["rms_ohm"].as_f64().unwrap())
            .fold(f64::INFINITY, f64::min)
    };
    let skrf_min = orders
        .iter()
        .map(|&n| skrf_at(n))
        .fold(f64::INFINITY, f64::min);
    let needed = *orders
        .iter()
        .find(|&&n| skrf_at(n) <= 1.05 * skrf_min)
        .unwrap();
    println!("{what}: scikit-rf needs order {needed}");
    for &order in orders {
        let skrf_best = skrf_at(order);
        let ours = vector_fit(
            sweep,
            VectorFitSettings {
                order,
                max_relocations: 30,
            },
            &FitControl::default(),
        )
        .unwrap();
        let ours_rms = rms_ohm(sweep, &ours.model);
        let passive = fit(
            sweep,
            &FitOptions {
                family: ModelFamily::Rational,
                rational_order: Some(order),
                ..FitOptions::default()
            },
            &FitControl::default(),
        )
        .map(|r| rms_ohm(sweep, &r.model));
        println!(
            "{what}, order {order}: henrybook {ours_rms:.6e} Ω after {} relocations + {} refinements (passive: {passive:?}), scikit-rf {skrf_best:.6e} Ω",
            ours.relocations, ours.refinements
        );
        if order > needed {
            continue;
        }
        assert!(
            ours_rms <= skrf_best * (1.0 + 1e-6),
            "{what}, order {order}: henrybook RMS {ours_rms} Ω above scikit-rf's {skrf_best} Ω"
        );
    }
}

#[test]
fn rms_error_is_at_most_scikit_rf_on_a_noisy_choke_sweep() {
    // Synthetic sweep from a known lumped model plus 0.1 % Gaussian noise (no source).
    let f = log_grid(1e4, 1e9, 1601);
    let sweep = uniform_sigma(noisy_sweep(&choke(), &f, 1e-3, 7));
    compare(&sweep, &[4, 6, 8, 10], "noisy choke");
}

#[test]
fn rms_error_is_at_most_scikit_rf_on_a_noise_free_choke_sweep() {
    // The √f skin term makes these data non-rational: the comparison is of approximation error.
    let f = log_grid(1e4, 1e9, 801);
    let mut sweep = noisy_sweep(&choke(), &f, 0.0, 1);
    let mean_z = sweep.impedance_ohm.iter().map(|z| z.norm()).sum::<f64>() / f.len() as f64;
    sweep.sigma_ohm.iter_mut().for_each(|s| *s = 1e-3 * mean_z);
    compare(&sweep, &[6, 8, 10, 12, 16], "noise-free choke");
}
