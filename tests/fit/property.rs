//! Property test: random valid lumped models (invented, drawn over the range of real parts: 100 nH to
//! 1 mH, 0.1 to 20 pF, any mix of rp, k_ac and ls) → synthetic sweeps with impedance-analyser noise
//! around their SRF → the fit converges to the truth (L0 0.5 %, Cp 1 %, Rp 3 %, SRF 0.2 %; Rdc 3 % or
//! within 4 stated σ where the noise floor hides it).
//! A modest case count keeps it to seconds.

use henrybook::fit::{FitControl, FitOptions, Termination, derived, fit};
use henrybook::model::{FittedModel, LumpedModel};
use henrybook::sweep::Method;
use henrybook_tests::synth::{self, synthetic_sweep};
use proptest::prelude::*;
use std::f64::consts::PI;

#[derive(Debug, Clone)]
struct Case {
    model: LumpedModel,
    band: [f64; 2],
    seed: u64,
}

fn log_uniform(lo: f64, hi: f64) -> impl Strategy<Value = f64> {
    (lo.ln()..hi.ln()).prop_map(f64::exp)
}

fn case() -> impl Strategy<Value = Case> {
    (
        log_uniform(100e-9, 1e-3),
        log_uniform(0.1e-12, 20e-12),
        log_uniform(0.3, 5.0),
        log_uniform(5.0, 100.0),
        proptest::option::of(log_uniform(0.5, 5.0)),
        proptest::option::of(log_uniform(1e-4, 1e-3)),
        any::<bool>(),
        any::<u64>(),
    )
        .prop_map(
            |(l0_h, cp_f, q_low, q_peak, k_ratio, ls_ratio, has_rp, seed)| {
                let srf = 1.0 / (2.0 * PI * (l0_h * cp_f).sqrt());
                let band = [srf / 2000.0, srf * 4.0];
                // Rdc sets Q at the bottom of the band; rp the sharpness of the SRF peak.
                let rdc_ohm = 2.0 * PI * band[0] * l0_h / q_low;
                let rp_ohm = has_rp.then(|| q_peak * (l0_h / cp_f).sqrt());
                // Skin effect, when present, adds 0.5–5 × Rdc at a tenth of the SRF, where the sweep can
                // tell it from core loss (much smaller, and it hides under the SRF peak's noise).
                let k_ac_ohm_per_sqrt_hz =
                    k_ratio.map_or(0.0, |m| m * rdc_ohm / (srf / 10.0).sqrt());
                let ls_h = ls_ratio.map_or(0.0, |r| r * l0_h);
                Case {
                    model: LumpedModel {
                        l0_h,
                        rdc_ohm,
                        k_ac_ohm_per_sqrt_hz,
                        rp_ohm,
                        cp_f,
                        ls_h,
                        sections: vec![],
                        core: None,
                    },
                    band,
                    seed,
                }
            },
        )
}

fn rel(a: f64, b: f64) -> f64 {
    (a / b - 1.0).abs()
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 24, ..ProptestConfig::default() })]

    #[test]
    fn random_models_are_recovered(c in case()) {
        let sweep = synthetic_sweep(&c.model, c.band[0], c.band[1], 401, Method::Direct, c.seed);
        let report = fit(&sweep, &FitOptions::default(), &FitControl::default()).unwrap();
        let FittedModel::Lumped(m) = &report.model else { panic!("lumped expected") };
        let t = &c.model;
        prop_assert_ne!(report.termination, Termination::MaxIterations);
        prop_assert!(report.quality.rms_weighted < 1.3, "rms {} {:?}", report.quality.rms_weighted, m);
        prop_assert!(rel(m.l0_h, t.l0_h) < 5e-3, "L0 {} vs {}", m.l0_h, t.l0_h);
        prop_assert!(rel(m.cp_f, t.cp_f) < 1e-2, "Cp {} vs {}", m.cp_f, t.cp_f);
        // Rdc to 3 %, or, where the 1 mΩ noise floor hides it that well, within 4 stated σ.
        let s_rdc = report.uncertainty.as_ref().and_then(|u| u.rdc_ohm).unwrap_or(0.0);
        prop_assert!(
            rel(m.rdc_ohm, t.rdc_ohm) < 3e-2 || (m.rdc_ohm - t.rdc_ohm).abs() < 4.0 * s_rdc,
            "Rdc {} ± {} vs {}", m.rdc_ohm, s_rdc, t.rdc_ohm
        );
        if let Some(rp) = t.rp_ohm {
            let got = m.rp_ohm.expect("rp kept");
            prop_assert!(rel(got, rp) < 3e-2, "Rp {} vs {}", got, rp);
        }
        let srf = derived::srf(t, c.band).0.unwrap();
        let got = report.derived.srf_hz.expect("SRF in band");
        prop_assert!(rel(got, srf) < 2e-3, "SRF {} vs {}", got, srf);
    }
}

fn junk_sweep() -> impl Strategy<Value = henrybook::sweep::Sweep> {
    (
        20usize..120,
        log_uniform(1.0, 1e6),
        log_uniform(2.0, 1e5),
        proptest::collection::vec((-1e4f64..1e4, -1e4f64..1e4, 1e-6f64..1e3), 120),
    )
        .prop_map(|(n, f0, span, pts)| {
            let frequency_hz = synth::log_grid(f0, f0 * span, n);
            henrybook::sweep::Sweep {
                impedance_ohm: pts[..n]
                    .iter()
                    .map(|p| num_complex::Complex64::new(p.0, p.1))
                    .collect(),
                sigma_ohm: pts[..n].iter().map(|p| p.2).collect(),
                frequency_hz,
                method: Method::Direct,
                z0_ohm: 50.0,
                dc_reading: None,
                warnings: Vec::new(),
            }
        })
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, ..ProptestConfig::default() })]

    /// Arbitrary (junk) sweeps: the fit returns an error or a finite model and report, never a panic
    /// and never a NaN.
    #[test]
    fn junk_sweeps_give_an_error_or_a_finite_report(s in junk_sweep()) {
        let options = FitOptions { time_limit_s: 2.0, ..FitOptions::default() };
        if let Ok(r) = fit(&s, &options, &FitControl::default()) {
            let FittedModel::Lumped(m) = &r.model else { panic!("lumped expected") };
            let values = [m.l0_h, m.rdc_ohm, m.cp_f, m.ls_h, m.k_ac_ohm_per_sqrt_hz, m.rp_ohm.unwrap_or(1.0)];
            prop_assert!(values.iter().all(|v| v.is_finite()), "{:?}", m);
            prop_assert!(r.quality.rms_weighted.is_finite());
            prop_assert!(r.candidates.iter().all(|c| c.cost.is_finite() && c.bic.is_finite()));
            let json = serde_json::to_string(&r).unwrap();
            prop_assert!(!json.contains("NaN"));
        }
    }
}
