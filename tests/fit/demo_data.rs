//! Every demo sweep (demo-data/: invented parts, synthesised from the known models in truth.json with
//! henrybook's own noise model — see demo-data/README.md) read by the sweep readers in its method and
//! format and fitted: parameter recovery within the targets (L0 0.5 %, Cp 1 %, SRF 0.2 %, Rdc
//! 3 % when a DCR reading is given; Rp 3 % or within 4 stated σ where the method hides the SRF peak).

use henrybook::fit::{DcrReading, FitControl, FitOptions, derived, fit};
use henrybook::model::{FittedModel, LumpedModel};
use henrybook::sweep::{Method, ReadOptions, read_sweep};
use henrybook_tests::repo_root;
use serde_json::Value;

fn rel(a: f64, b: f64) -> f64 {
    (a / b - 1.0).abs()
}

#[test]
fn every_demo_sweep_is_fitted_close_to_the_model_it_was_made_from() {
    let root = repo_root().join("demo-data");
    let manifest: Value =
        serde_json::from_str(&std::fs::read_to_string(root.join("manifest.json")).unwrap())
            .unwrap();
    let truth: Value =
        serde_json::from_str(&std::fs::read_to_string(root.join("truth.json")).unwrap()).unwrap();
    let mut fitted = 0;
    for part in manifest["parts"].as_array().unwrap() {
        for s in part["sweeps"].as_array().unwrap() {
            let file = s["file"].as_str().unwrap();
            let method: Method = s["method"].as_str().unwrap().parse().unwrap();
            let bytes = std::fs::read(root.join(file)).unwrap();
            let sweep = read_sweep(
                file,
                &bytes,
                &ReadOptions {
                    method: Some(method),
                    ..ReadOptions::default()
                },
            )
            .unwrap_or_else(|e| panic!("{file}: {e}"));
            let dcr = s["dcr_ohm"].as_f64();
            let options = FitOptions {
                dcr: dcr.map(|value_ohm| DcrReading {
                    value_ohm,
                    sigma_ohm: None,
                }),
                ..FitOptions::default()
            };
            let report = fit(&sweep, &options, &FitControl::default())
                .unwrap_or_else(|e| panic!("{file}: {e}"));
            let t: LumpedModel = serde_json::from_value(truth["models"][file].clone()).unwrap();
            let FittedModel::Lumped(m) = &report.model else {
                panic!("{file}: lumped expected")
            };
            let band = report.band_hz;
            eprintln!(
                "{file}: L0 {:.1e} Cp {:.1e} Rdc {:.1e} Rp {:?} SRF {:?} rms {:.3}",
                rel(m.l0_h, t.l0_h),
                rel(m.cp_f, t.cp_f),
                rel(m.rdc_ohm, t.rdc_ohm),
                m.rp_ohm.zip(t.rp_ohm).map(|(a, b)| rel(a, b)),
                report
                    .derived
                    .srf_hz
                    .zip(derived::srf(&t, band).0)
                    .map(|(a, b)| rel(a, b)),
                report.quality.rms_weighted
            );
            assert!(rel(m.l0_h, t.l0_h) < 5e-3, "{file}: L0 {}", m.l0_h);
            assert!(rel(m.cp_f, t.cp_f) < 1e-2, "{file}: Cp {}", m.cp_f);
            if dcr.is_some() {
                assert!(
                    rel(m.rdc_ohm, t.rdc_ohm) < 3e-2,
                    "{file}: Rdc {}",
                    m.rdc_ohm
                );
            }
            if let Some(rp) = t.rp_ohm {
                let got = m.rp_ohm.expect("rp kept");
                let s = report.uncertainty.as_ref().unwrap().rp_ohm.unwrap_or(0.0);
                assert!(
                    rel(got, rp) < 3e-2 || (got - rp).abs() < 4.0 * s,
                    "{file}: Rp {got} ± {s} vs {rp}"
                );
            }
            let srf = derived::srf(&t, band).0.expect("SRF in band");
            let got = report.derived.srf_hz.expect("fitted SRF in band");
            assert!(rel(got, srf) < 2e-3, "{file}: SRF {got} vs {srf}");
            assert_eq!(m.sections.len(), t.sections.len(), "{file}");
            assert!(report.quality.rms_weighted < 1.3, "{file}");
            fitted += 1;
        }
    }
    assert_eq!(fitted, 13, "every demo sweep");
}
