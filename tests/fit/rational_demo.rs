//! The rational fit on every demo sweep (invented parts from a known generator, demo-data/README.md):
//! each must give a passive, stable model whose SRF agrees with the lumped fit's to 1 % and whose weighted
//! error stays within 2.5 (1 = at the stated uncertainty).
//!
//! Measured state, not a target: on the power and filter chokes the rational fit matches the lumped
//! fit's weighted error (≈ 1.0); on the RF part (OMW-L100N-RF, a skin term that dominates the whole band
//! and a high-Q SRF seen by reflection) it reaches only ≈ 2.1–2.4 where the lumped fit reaches ≈ 1.0 — the
//! automatic order search finds no passive model closer to the data (enforcement of the closer,
//! higher-order fits exceeds the 10 % error allowance).

use henrybook::fit::rational::passivity::check_passivity;
use henrybook::fit::{FitControl, FitOptions, ModelFamily, fit};
use henrybook::model::FittedModel;
use henrybook::sweep::{Method, ReadOptions, read_sweep};
use henrybook_tests::repo_root;

#[test]
fn every_demo_sweep_gets_a_passive_rational_model_near_its_noise_level() {
    let root = repo_root().join("demo-data");
    let manifest: serde_json::Value =
        serde_json::from_slice(&std::fs::read(root.join("manifest.json")).unwrap()).unwrap();
    let mut fitted = 0;
    for part in manifest["parts"].as_array().unwrap() {
        for sw in part["sweeps"].as_array().unwrap() {
            let file = sw["file"].as_str().unwrap();
            let method: Method = serde_json::from_value(sw["method"].clone()).unwrap();
            let options = ReadOptions {
                method: Some(method),
                ..ReadOptions::default()
            };
            let sweep = read_sweep(file, &std::fs::read(root.join(file)).unwrap(), &options)
                .unwrap_or_else(|e| panic!("{file}: {e}"));
            let started = std::time::Instant::now();
            let report = fit(
                &sweep,
                &FitOptions {
                    family: ModelFamily::Rational,
                    ..FitOptions::default()
                },
                &FitControl::default(),
            )
            .unwrap_or_else(|e| panic!("{file}: {e}"));
            let FittedModel::Rational(m) = &report.model else {
                panic!("{file}: not rational")
            };
            let lumped = fit(&sweep, &FitOptions::default(), &FitControl::default());
            println!(
                "{file}: {} points, order {}, rms_weighted {:.3} (lumped {:?}), max rel {:.2e}, srf {:?} (lumped {:?}), {:?}",
                sweep.frequency_hz.len(),
                m.order(),
                report.quality.rms_weighted,
                lumped.as_ref().ok().map(|r| r.quality.rms_weighted),
                report.quality.max_relative_error,
                report.derived.srf_hz,
                lumped.as_ref().ok().and_then(|r| r.derived.srf_hz),
                started.elapsed()
            );
            for c in &report.candidates {
                println!(
                    "    {} rms_w {:.3}",
                    c.label,
                    (c.cost / (2.0 * sweep.frequency_hz.len() as f64)).sqrt()
                );
            }
            assert!(check_passivity(m).passive, "{file}");
            assert!(
                report.quality.rms_weighted < 2.5,
                "{file}: {:?}",
                report.quality
            );
            assert!(m.real_poles.iter().all(|p| p.pole_rad_per_s < 0.0));
            assert!(m.complex_poles.iter().all(|p| p.pole_rad_per_s.re < 0.0));
            let lumped = lumped.unwrap_or_else(|e| panic!("{file}: lumped fit: {e}"));
            match (report.derived.srf_hz, lumped.derived.srf_hz) {
                (Some(a), Some(b)) => {
                    assert!((a / b - 1.0).abs() < 0.01, "{file}: SRF {a} vs lumped {b}")
                }
                (None, None) => {}
                (a, b) => panic!("{file}: SRF {a:?}, lumped {b:?}"),
            }
            fitted += 1;
        }
    }
    assert!(fitted >= 8, "{fitted} demo sweeps");
}
