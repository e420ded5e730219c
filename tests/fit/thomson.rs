//! Reference check of the derived SRF against the Thomson formula f = 1/(2π√(LC)).
//! Source: Thomson formula; 10 µH with 5 pF → 22.5079 MHz (value recorded in shared/TOOLBOX.md).

use henrybook_tests::synth;

use henrybook::fit::{FitControl, FitOptions, derived, fit};
use henrybook::model::{FittedModel, LumpedModel};
use henrybook::sweep::Method;

fn ideal(rdc_ohm: f64) -> LumpedModel {
    LumpedModel {
        l0_h: 10e-6,
        rdc_ohm,
        k_ac_ohm_per_sqrt_hz: 0.0,
        rp_ohm: None,
        cp_f: 5e-12,
        ls_h: 0.0,
        sections: vec![],
        core: None,
    }
}

#[test]
fn derived_srf_of_an_ideal_l_parallel_c_is_the_thomson_frequency() {
    // 1 µΩ of series resistance keeps Z finite at resonance; it shifts the crossing by ~1e-14.
    let (srf, above) = derived::srf(&ideal(1e-6), [1e3, 1e9]);
    assert!(above.is_none());
    let srf = srf.unwrap();
    assert!((srf / 22.5079e6 - 1.0).abs() < 5e-6, "{srf}");
}

#[test]
fn srf_of_a_fitted_sweep_of_a_low_loss_l_parallel_c_is_the_thomson_frequency() {
    // A synthetic sweep (invented part, analyser-like noise) of 10 µH ‖ 5 pF with 0.2 Ω series
    // resistance; with that loss the Im Z zero moves by (R²C/L)/2 ≈ 1e-8 relative, far below 0.2 %.
    let sweep = synth::synthetic_sweep(&ideal(0.2), 10e3, 100e6, 801, Method::Direct, 42);
    let report = fit(&sweep, &FitOptions::default(), &FitControl::default()).unwrap();
    let srf = report.derived.srf_hz.expect("SRF in band");
    assert!((srf / 22.5079e6 - 1.0).abs() < 2e-3, "{srf}");
    let FittedModel::Lumped(m) = &report.model else {
        panic!()
    };
    // The naive Cp from the SRF and L0 agrees with the fitted Cp for an ideal part.
    let naive = report.derived.naive_cp_f.unwrap();
    assert!((naive / m.cp_f - 1.0).abs() < 1e-2, "{naive} vs {}", m.cp_f);
}
