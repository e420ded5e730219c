//! Rational models out as series Foster subcircuits, checked by the independent MNA solver, against the
//! closed form of a hand-computable circuit, and refused when not passive.

use henrybook_tests::mna;

use henrybook::export::foster::{FosterForm, foster_realisation, rational_subcircuit};
use henrybook::export::spice::ERROR_BOUND_KEY;
use henrybook::export::{ExportContext, ExportError};
use henrybook::model::rational::{ComplexPole, RealPole};
use henrybook::model::{ImpedanceModel, RationalModel};
use num_complex::Complex64;
use std::f64::consts::PI;

/// The pole pair and residue of (Rs + sL) ‖ C ‖ Rp (Rp = ∞ allowed), from the closed form
/// Z = (1/C)(s + Rs/L) / (s² + s(Rs/L + 1/(Rp·C)) + (1 + Rs/Rp)/(LC)).
fn resonator(rs: f64, l: f64, c: f64, rp: f64) -> ComplexPole {
    let a1 = rs / l + 1.0 / (rp * c);
    let a0 = (1.0 + rs / rp) / (l * c);
    let p = Complex64::new(-a1 / 2.0, (a0 - a1 * a1 / 4.0).sqrt());
    let residue = (p + rs / l) / (c * (p - p.conj()));
    ComplexPole {
        pole_rad_per_s: p,
        residue_ohm_rad_per_s: residue,
    }
}

/// R ‖ C as a real pole.
fn rc_pole(r: f64, c: f64) -> RealPole {
    RealPole {
        pole_rad_per_s: -1.0 / (r * c),
        residue_ohm_rad_per_s: 1.0 / c,
    }
}

/// R ‖ L = R − R²/L/(s + R/L): a real pole plus R into d.
fn rl_pole(r: f64, l: f64) -> RealPole {
    RealPole {
        pole_rad_per_s: -r / l,
        residue_ohm_rad_per_s: -r * r / l,
    }
}

fn ctx() -> ExportContext {
    ExportContext {
        part_number: Some("WB-4711".to_string()),
        fit_id: Some("vf-0012".to_string()),
        revision: Some(1),
        sweep_sha256: Some("ab".repeat(32)),
        band_hz: [1e3, 1e9],
    }
}

fn check_against_mna(name: &str, model: &RationalModel) -> mna::Subckt {
    let text = rational_subcircuit(model, &ctx()).unwrap_or_else(|e| panic!("{name}: {e}"));
    let net = mna::parse(&text).unwrap_or_else(|e| panic!("{name}: {e}\n{text}"));
    let bound = mna::comment_number(&net, ERROR_BOUND_KEY).expect("stated error");
    let mut worst = (0.0f64, 0.0);
    for f in mna::points_with_resonances(&|f| model.impedance(f), 1e3, 1e9, 997) {
        let e = (mna::impedance(&net, f) - model.impedance(f)).norm() / model.impedance(f).norm();
        if e > worst.0 {
            worst = (e, f);
        }
    }
    println!(
        "{name}: stated {bound:.3e}, MNA {:.3e} at {:.4e} Hz",
        worst.0, worst.1
    );
    assert!(worst.0 <= bound, "{name}: {} > {bound}\n{text}", worst.0);
    // The realisation is exact algebra: only rounding remains.
    assert!(bound <= 1e-6, "{name}: {bound}");
    for needle in [
        "part: WB-4711",
        "fit id: vf-0012",
        "revision: 1",
        "band of validity",
    ] {
        assert!(text.contains(needle), "{name}: {needle}");
    }
    net
}

fn value(net: &mna::Subckt, name: &str) -> f64 {
    net.elements
        .iter()
        .find(|e| e.name == name)
        .unwrap_or_else(|| panic!("no element {name}"))
        .value
}

#[test]
fn the_check_value_resonator_comes_back_as_its_own_elements() {
    // Source (issue 5 check value): (Rs + jωL) ‖ Cp ‖ Rp with L = 10 µH, Rs = 0.1 Ω, Cp = 5 pF,
    // Rp = 20 kΩ has its pole pair at s/2π = −0.79657 ± j22.49386 MHz.
    let pair = resonator(0.1, 10e-6, 5e-12, 20e3);
    let p_mhz = pair.pole_rad_per_s / (2.0 * PI * 1e6);
    assert!(
        (p_mhz.re + 0.79657).abs() < 5e-6 && (p_mhz.im - 22.49386).abs() < 5e-6,
        "{p_mhz}"
    );
    let model = RationalModel {
        d_ohm: 0.0,
        e_h: 0.0,
        real_poles: vec![],
        complex_poles: vec![pair],
    };
    let net = check_against_mna("check-value resonator", &model);
    // Closed form: the synthesis must give back the circuit the model was made from.
    for (name, expect) in [
        ("LQ1", 10e-6),
        ("CQ1", 5e-12),
        ("RQS1", 0.1),
        ("RQP1", 20e3),
    ] {
        let got = value(&net, name);
        assert!(
            (got / expect - 1.0).abs() < 1e-9,
            "{name}: {got} vs {expect}"
        );
    }
    assert_eq!(net.elements.len(), 4);
}

#[test]
fn a_plain_tank_and_a_tank_without_shunt_loss_need_one_resistor_each() {
    // Rs = 0: R ‖ L ‖ C, the Rs of the cell is absent.
    let tank = RationalModel {
        d_ohm: 0.0,
        e_h: 0.0,
        real_poles: vec![],
        complex_poles: vec![resonator(0.0, 1e-6, 20e-12, 5e3)],
    };
    let net = check_against_mna("R||L||C tank", &tank);
    assert!(net.elements.iter().all(|e| e.name != "RQS1"));
    assert!((value(&net, "RQP1") / 5e3 - 1.0).abs() < 1e-9);
    // Rp = ∞: (Rs + L) ‖ C, the Rp of the cell is absent.
    let lossy_l = RationalModel {
        d_ohm: 0.0,
        e_h: 0.0,
        real_poles: vec![],
        complex_poles: vec![resonator(0.5, 1e-6, 20e-12, f64::INFINITY)],
    };
    let net = check_against_mna("(Rs+L)||C", &lossy_l);
    assert!(net.elements.iter().all(|e| e.name != "RQP1"));
    assert!((value(&net, "RQS1") / 0.5 - 1.0).abs() < 1e-9);
}

#[test]
fn real_poles_constant_and_proportional_terms_map_to_cells() {
    // d = R0 + the R of every R‖L cell (see rl_pole).
    let model = RationalModel {
        d_ohm: 0.3 + 12.0 + 400.0,
        e_h: 2e-9,
        real_poles: vec![
            rc_pole(50.0, 1e-9),
            rl_pole(12.0, 3e-6),
            rl_pole(400.0, 80e-9),
            RealPole {
                pole_rad_per_s: 0.0,
                residue_ohm_rad_per_s: 1.0 / 1e-6,
            },
        ],
        complex_poles: vec![],
    };
    let net = check_against_mna("real poles", &model);
    for (name, expect) in [
        ("RD", 0.3),
        ("LE", 2e-9),
        ("RA1", 50.0),
        ("CA1", 1e-9),
        ("RB1", 12.0),
        ("LB1", 3e-6),
        ("RB2", 400.0),
        ("LB2", 80e-9),
        ("CZ1", 1e-6),
    ] {
        let got = value(&net, name);
        assert!(
            (got / expect - 1.0).abs() < 1e-9,
            "{name}: {got} vs {expect}"
        );
    }
}

#[test]
fn a_wideband_model_with_several_resonances_matches() {
    let model = RationalModel {
        d_ohm: 0.05 + 2.0,
        e_h: 1e-9,
        real_poles: vec![rl_pole(2.0, 50e-9), rc_pole(1e3, 0.2e-12)],
        complex_poles: vec![
            resonator(0.1, 10e-6, 5e-12, 20e3),
            resonator(2.0, 200e-9, 3e-12, 3e3),
            resonator(0.0, 30e-9, 1e-12, 800.0),
            resonator(5.0, 5e-9, 0.5e-12, f64::INFINITY),
        ],
    };
    let net = check_against_mna("wideband", &model);
    // Every element value is a positive plain number, every name unique (parse checked), R/L/C only.
    assert!(net.elements.iter().all(|e| e.value > 0.0));
}

fn refused(model: &RationalModel) -> ExportError {
    let e = rational_subcircuit(model, &ctx()).unwrap_err();
    println!("refused: {e}");
    e
}

#[test]
fn models_that_are_not_passive_are_refused_with_the_reason() {
    let good = resonator(0.1, 10e-6, 5e-12, 20e3);
    let base = RationalModel {
        d_ohm: 0.0,
        e_h: 0.0,
        real_poles: vec![],
        complex_poles: vec![good],
    };
    let unstable = RationalModel {
        real_poles: vec![RealPole {
            pole_rad_per_s: 1e6,
            residue_ohm_rad_per_s: 1e3,
        }],
        ..base.clone()
    };
    assert!(
        matches!(refused(&unstable), ExportError::NotPassive(m) if m.contains("right half-plane"))
    );
    let negative_l = RationalModel {
        e_h: -1e-9,
        ..base.clone()
    };
    assert!(matches!(refused(&negative_l), ExportError::NotPassive(m) if m.contains("e_h")));
    let negative_r = RationalModel {
        d_ohm: -1.0,
        ..base.clone()
    };
    assert!(matches!(refused(&negative_r), ExportError::NotPassive(m) if m.contains("Re Z")));
    let unstable_pair = RationalModel {
        complex_poles: vec![ComplexPole {
            pole_rad_per_s: Complex64::new(1e5, 1e8),
            ..good
        }],
        ..base.clone()
    };
    assert!(matches!(
        refused(&unstable_pair),
        ExportError::NotPassive(_)
    ));
    let nan = RationalModel {
        d_ohm: f64::NAN,
        ..base.clone()
    };
    assert!(matches!(
        refused(&nan),
        ExportError::InvalidParameter { .. }
    ));
}

#[test]
fn a_passive_model_with_a_non_positive_real_term_is_refused_as_unrealisable() {
    // A pair whose own real part goes negative above resonance (b0 > a1·b1), covered by a large d:
    // Re Z ≥ 0 everywhere, but no positive-element series Foster cell holds the pair.
    let p = Complex64::new(-1e6, 1e8);
    let pair = ComplexPole {
        pole_rad_per_s: p,
        // b1 = 2a = 2e10, b0 = 2(a·α − b·β) = 2(1e16 + 1e18) ≫ a1·b1 = 4e16.
        residue_ohm_rad_per_s: Complex64::new(1e10, -1e10),
    };
    let model = RationalModel {
        d_ohm: 1e6,
        e_h: 0.0,
        real_poles: vec![],
        complex_poles: vec![pair],
    };
    let min_re = mna::log_points(1e3, 1e10, 4001)
        .into_iter()
        .map(|f| model.impedance(f).re)
        .fold(f64::INFINITY, f64::min);
    assert!(min_re > 0.0, "the test model must be passive: {min_re}");
    assert!(matches!(
        foster_realisation(&model).unwrap_err(),
        ExportError::NotRealisable(m) if m.contains("complex_poles[0]")
    ));
    // An R‖L cell whose constant exceeds d.
    let short_d = RationalModel {
        d_ohm: 1.0,
        e_h: 0.0,
        real_poles: vec![rl_pole(5.0, 1e-6)],
        complex_poles: vec![],
    };
    let e = refused(&short_d);
    assert!(
        matches!(
            &e,
            ExportError::NotPassive(_) | ExportError::NotRealisable(_)
        ),
        "{e}"
    );
}

#[test]
fn element_values_beyond_the_floating_point_range_are_an_error_not_a_panic() {
    let model = RationalModel {
        d_ohm: 1.0,
        e_h: 0.0,
        real_poles: vec![RealPole {
            pole_rad_per_s: -1e-300,
            residue_ohm_rad_per_s: 1e-320,
        }],
        complex_poles: vec![],
    };
    let e = foster_realisation(&model).unwrap_err();
    assert!(
        matches!(&e, ExportError::NotRealisable(m) if m.contains("floating-point")),
        "{e}"
    );
}

/// R0 + s·Ls + R ‖ (Rs + sL + 1/(sC)): a lossy series-resonant notch shunted by R. By hand:
/// R ‖ (…) = R − (R²/L)·s / (s² + s(R + Rs)/L + 1/(LC)), so d = R0 + R, e = Ls and one pole pair
/// whose residue has a negative real part: no series Foster cell holds it.
fn notch_model(r0: f64, ls: f64, r: f64, rs: f64, l: f64, c: f64) -> RationalModel {
    let a1 = (r + rs) / l;
    let a0 = 1.0 / (l * c);
    let p = Complex64::new(-a1 / 2.0, (a0 - a1 * a1 / 4.0).sqrt());
    let residue = -(r * r / l) * p / (p - p.conj());
    RationalModel {
        d_ohm: r0 + r,
        e_h: ls,
        real_poles: vec![],
        complex_poles: vec![ComplexPole {
            pole_rad_per_s: p,
            residue_ohm_rad_per_s: residue,
        }],
    }
}

#[test]
fn a_notch_goes_to_a_parallel_form_and_matches() {
    for (name, m) in [
        ("notch", notch_model(0.2, 0.0, 500.0, 2.0, 1e-6, 10e-12)),
        (
            "notch + series L",
            notch_model(0.2, 5e-9, 500.0, 2.0, 1e-6, 10e-12),
        ),
        (
            "sharp notch + series L",
            notch_model(0.05, 1e-9, 200.0, 0.1, 0.2e-6, 2e-12),
        ),
    ] {
        assert!(m.complex_poles[0].residue_ohm_rad_per_s.re < 0.0);
        let real = foster_realisation(&m).unwrap();
        println!("{name}: {:?}", real.form);
        assert_ne!(real.form, FosterForm::Series, "{name}");
        let net = check_against_mna(name, &m);
        assert!(
            net.comments
                .iter()
                .any(|c| c.starts_with("parallel Foster form")
                    || c.contains("parallel Foster block")),
            "{name}"
        );
    }
}
