//! Property tests of the netlist export: random valid models (synthetic, made up by the generator)
//! always give a netlist the independent MNA solver reproduces within the stated error; random
//! pole-residue models are either exported that way or refused with an error, never a panic.

use henrybook_tests::mna;

use henrybook::export::spice::ERROR_BOUND_KEY;
use henrybook::export::{ExportContext, ExportError as HbExportError, subcircuit};
use henrybook::model::rational::{ComplexPole, RealPole};
use henrybook::model::{
    FittedModel, ImpedanceModel, LumpedModel, RationalModel, Section, SectionKind,
};
use num_complex::Complex64;
use proptest::prelude::*;

fn log_uniform(lo: f64, hi: f64) -> impl Strategy<Value = f64> {
    (lo.ln()..hi.ln()).prop_map(f64::exp)
}

fn section() -> impl Strategy<Value = Section> {
    (
        prop::bool::ANY,
        log_uniform(0.1, 1e3),
        log_uniform(1e-8, 1e-6),
        log_uniform(1e-12, 1e-10),
    )
        .prop_map(|(series, r, l, c)| Section {
            kind: if series {
                SectionKind::Series
            } else {
                SectionKind::Parallel
            },
            r_ohm: r,
            l_h: l,
            c_f: c,
        })
}

fn lumped() -> impl Strategy<Value = LumpedModel> {
    (
        log_uniform(1e-7, 1e-3),
        prop::option::of(log_uniform(1e-3, 1.0)),
        prop::option::of(log_uniform(1e-6, 1e-4)),
        prop::option::of(log_uniform(1e3, 1e6)),
        prop::option::of(log_uniform(0.1e-12, 50e-12)),
        prop::option::of(log_uniform(0.1e-9, 10e-9)),
        prop::collection::vec(section(), 0..3),
    )
        .prop_map(|(l0, rdc, k, rp, cp, ls, sections)| LumpedModel {
            l0_h: l0,
            rdc_ohm: rdc.unwrap_or(0.0),
            k_ac_ohm_per_sqrt_hz: k.unwrap_or(0.0),
            rp_ohm: rp,
            cp_f: cp.unwrap_or(0.0),
            ls_h: ls.unwrap_or(0.0),
            sections,
            core: None,
        })
}

fn mna_error(text: &str, model: &dyn ImpedanceModel, band: [f64; 2]) -> (f64, f64) {
    let net = mna::parse(text).expect("netlist parses");
    let bound = mna::comment_number(&net, ERROR_BOUND_KEY).expect("stated error");
    let worst = mna::points_with_resonances(&|f| model.impedance(f), band[0], band[1], 199)
        .into_iter()
        .map(|f| (mna::impedance(&net, f) - model.impedance(f)).norm() / model.impedance(f).norm())
        .fold(0.0f64, f64::max);
    (worst, bound)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(24))]

    #[test]
    fn random_lumped_models_export_within_their_stated_error(m in lumped()) {
        let band = [1e3, 1e8];
        // No bound on Q: the stated error includes the rounding floor of a nodal solve, and the
        // regression seeds hold parts with Q ≈ 1e6 at their SRF.
        let fitted = FittedModel::Lumped(m.clone());
        match subcircuit(&fitted, &ExportContext::for_band(band[0], band[1])) {
            Ok(text) => {
                let (err, bound) = mna_error(&text, &m, band);
                prop_assert!(err <= bound, "error {} > stated {}\n{}", err, bound, text);
            }
            // Only a lossless L‖C (no rdc, no skin term, no rp) has an infinite impedance in band.
            Err(HbExportError::NotFinite { .. }) => prop_assert!(
                m.rdc_ohm == 0.0 && m.k_ac_ohm_per_sqrt_hz == 0.0 && m.rp_ohm.is_none() && m.cp_f > 0.0,
                "{:?}", m
            ),
            Err(e) => prop_assert!(false, "refused a valid model: {}", e),
        }
    }

    #[test]
    fn random_pole_residue_models_export_or_are_refused(
        d in -1.0f64..10.0,
        e in -1e-9f64..1e-8,
        reals in prop::collection::vec((log_uniform(1e3, 1e10), -1e9f64..1e9), 0..3),
        pairs in prop::collection::vec(
            (log_uniform(1e4, 1e9), log_uniform(1e5, 1e10), -1e9f64..1e9, -1e9f64..1e9), 0..3),
    ) {
        let m = RationalModel {
            d_ohm: d,
            e_h: e,
            real_poles: reals.iter().map(|&(s, r)| RealPole { pole_rad_per_s: -s, residue_ohm_rad_per_s: r }).collect(),
            complex_poles: pairs.iter().map(|&(a, b, ra, rb)| ComplexPole {
                pole_rad_per_s: Complex64::new(-a, b),
                residue_ohm_rad_per_s: Complex64::new(ra, rb),
            }).collect(),
        };
        let band = [1e3, 1e9];
        match subcircuit(&FittedModel::Rational(m.clone()), &ExportContext::for_band(band[0], band[1])) {
            Ok(text) => {
                let (err, bound) = mna_error(&text, &m, band);
                prop_assert!(err <= bound, "error {} > stated {}\n{}", err, bound, text);
                // An exported model is passive: Re Z >= 0 over the band.
                for f in mna::log_points(band[0], band[1], 400) {
                    prop_assert!(m.impedance(f).re >= -1e-9 * m.impedance(f).norm());
                }
            }
            Err(err) => prop_assert!(!err.to_string().is_empty()),
        }
    }
}
