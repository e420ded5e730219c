//! End to end: a synthetic sweep (made from a known model, for this test only) is fitted by
//! henrybook's lumped fit, and the fitted model's netlist reproduces the fitted model within the error
//! it states, as read by the independent MNA solver.

use henrybook_tests::mna;

use henrybook::export::spice::ERROR_BOUND_KEY;
use henrybook::export::{ExportContext, subcircuit};
use henrybook::fit::{FitControl, FitOptions, fit};
use henrybook::model::{ImpedanceModel, LumpedModel};
use henrybook::sweep::{Method, Sweep};

#[test]
fn a_fitted_choke_exports_to_a_netlist_that_matches_the_fit() {
    let truth = LumpedModel {
        l0_h: 22e-6,
        rdc_ohm: 0.035,
        k_ac_ohm_per_sqrt_hz: 3e-5,
        rp_ohm: Some(30e3),
        cp_f: 4e-12,
        ls_h: 1e-9,
        sections: vec![],
        core: None,
    };
    let frequency_hz: Vec<f64> = (0..401)
        .map(|i| 1e3 * (1e5f64).powf(i as f64 / 400.0))
        .collect();
    let impedance_ohm: Vec<_> = frequency_hz.iter().map(|&f| truth.impedance(f)).collect();
    let sigma_ohm = impedance_ohm.iter().map(|z| 1e-4 * z.norm()).collect();
    let sweep = Sweep {
        frequency_hz,
        impedance_ohm,
        sigma_ohm,
        method: Method::Direct,
        z0_ohm: 50.0,
        dc_reading: None,
        warnings: Vec::new(),
    };
    let report = fit(&sweep, &FitOptions::default(), &FitControl::default()).expect("fit");
    let ctx = ExportContext {
        part_number: Some("PC-22U".into()),
        fit_id: Some("e2e".into()),
        revision: Some(1),
        sweep_sha256: None,
        ..ExportContext::for_report(&report)
    };
    let text = subcircuit(&report.model, &ctx).expect("export");
    let net = mna::parse(&text).unwrap();
    let bound = mna::comment_number(&net, ERROR_BOUND_KEY).unwrap();
    let band = report.band_hz;
    let worst = mna::points_with_resonances(&|f| report.model.impedance(f), band[0], band[1], 499)
        .into_iter()
        .map(|f| {
            let z = report.model.impedance(f);
            (mna::impedance(&net, f) - z).norm() / z.norm()
        })
        .fold(0.0f64, f64::max);
    println!("fitted choke: stated {bound:.3e}, MNA {worst:.3e}\n{text}");
    assert!(worst <= bound, "{worst} > {bound}");
    assert!(bound < 2e-2, "{bound}");
    assert!(
        text.contains("band of validity: 1e3 Hz to 1e8 Hz"),
        "{text}"
    );
}

fn synthetic_sweep(truth: &LumpedModel, lo: f64, hi: f64, n: usize) -> Sweep {
    let frequency_hz: Vec<f64> = (0..n)
        .map(|i| lo * (hi / lo).powf(i as f64 / (n - 1) as f64))
        .collect();
    let impedance_ohm: Vec<_> = frequency_hz.iter().map(|&f| truth.impedance(f)).collect();
    let sigma_ohm = impedance_ohm.iter().map(|z| 1e-4 * z.norm()).collect();
    Sweep {
        frequency_hz,
        impedance_ohm,
        sigma_ohm,
        method: Method::Direct,
        z0_ohm: 50.0,
        dc_reading: None,
        warnings: Vec::new(),
    }
}

#[test]
fn vector_fitted_models_export_to_netlists_that_match_the_fit() {
    use henrybook::fit::ModelFamily;
    use henrybook::model::{FittedModel, Section, SectionKind};
    // Synthetic sweeps from known lumped models (test data only): a plain choke, and one with a
    // series-resonant notch above its SRF, so the rational fit has a pair a series Foster cell cannot
    // hold alone.
    let plain = LumpedModel {
        l0_h: 10e-6,
        rdc_ohm: 0.1,
        k_ac_ohm_per_sqrt_hz: 0.0,
        rp_ohm: Some(20e3),
        cp_f: 5e-12,
        ls_h: 0.0,
        sections: vec![],
        core: None,
    };
    let notched = LumpedModel {
        sections: vec![Section {
            kind: SectionKind::Series,
            r_ohm: 3.0,
            l_h: 0.4e-6,
            c_f: 30e-12,
        }],
        ..plain.clone()
    };
    for (name, truth) in [("plain", plain), ("notched", notched)] {
        let sweep = synthetic_sweep(&truth, 1e5, 2e8, 401);
        let options = FitOptions {
            family: ModelFamily::Rational,
            ..FitOptions::default()
        };
        let report = fit(&sweep, &options, &FitControl::default()).expect("vector fit");
        let FittedModel::Rational(rational) = &report.model else {
            panic!("{name}: a rational model")
        };
        let text = match subcircuit(&report.model, &ExportContext::for_report(&report)) {
            Ok(t) => t,
            Err(e) => panic!("{name}: {e}\n{rational:?}"),
        };
        let net = mna::parse(&text).unwrap();
        let bound = mna::comment_number(&net, ERROR_BOUND_KEY).unwrap();
        let band = report.band_hz;
        let worst = mna::points_with_resonances(&|f| rational.impedance(f), band[0], band[1], 499)
            .into_iter()
            .map(|f| {
                let z = rational.impedance(f);
                (mna::impedance(&net, f) - z).norm() / z.norm()
            })
            .fold(0.0f64, f64::max);
        let form = text
            .lines()
            .find(|l| l.contains("Foster form") || l.contains("Foster chain"))
            .unwrap_or("");
        println!(
            "{name}: {} real poles, {} pairs; stated {bound:.3e}, MNA {worst:.3e}; {form}",
            rational.real_poles.len(),
            rational.complex_poles.len()
        );
        assert!(worst <= bound, "{name}: {worst} > {bound}");
    }
}
