//! Lumped models out as SPICE subcircuits, checked by an independent MNA solver that reads the text.

use henrybook_tests::mna;

use henrybook::export::ExportContext;
use henrybook::export::spice::{ERROR_BOUND_KEY, lumped_subcircuit};
use henrybook::model::{
    CoreDispersion, CoreLaw, ImpedanceModel, LumpedModel, Section, SectionKind,
};
use num_complex::Complex64;
use std::f64::consts::PI;

fn ctx(lo: f64, hi: f64) -> ExportContext {
    ExportContext {
        part_number: Some("CHK-100/22".to_string()),
        fit_id: Some("fit-7f3a".to_string()),
        revision: Some(3),
        sweep_sha256: Some("9c1e".repeat(16)),
        band_hz: [lo, hi],
    }
}

// Invented models for the demo-free proof: a power choke, an RF chip inductor, variants with each
// element removed, and both kinds of extra section.
fn choke() -> LumpedModel {
    LumpedModel {
        l0_h: 10e-6,
        rdc_ohm: 0.02,
        k_ac_ohm_per_sqrt_hz: 2e-5,
        rp_ohm: Some(50e3),
        cp_f: 5e-12,
        ls_h: 2e-9,
        sections: vec![],
        core: None,
    }
}

fn rf_chip() -> LumpedModel {
    LumpedModel {
        l0_h: 100e-9,
        rdc_ohm: 0.05,
        k_ac_ohm_per_sqrt_hz: 5e-6,
        rp_ohm: None,
        cp_f: 0.1e-12,
        ls_h: 0.3e-9,
        sections: vec![],
        core: None,
    }
}

fn series_section() -> Section {
    Section {
        kind: SectionKind::Series,
        r_ohm: 3.0,
        l_h: 0.4e-6,
        c_f: 30e-12,
    }
}

fn tank_section() -> Section {
    Section {
        kind: SectionKind::Parallel,
        r_ohm: 800.0,
        l_h: 0.3e-6,
        c_f: 50e-12,
    }
}

fn cases() -> Vec<(&'static str, LumpedModel, [f64; 2])> {
    let b = [1e3, 1e8];
    let mut out = vec![("choke", choke(), b)];
    out.push((
        "choke, no rp",
        LumpedModel {
            rp_ohm: None,
            ..choke()
        },
        b,
    ));
    out.push((
        "choke, no cp",
        LumpedModel {
            cp_f: 0.0,
            ..choke()
        },
        b,
    ));
    out.push((
        "choke, no ls",
        LumpedModel {
            ls_h: 0.0,
            ..choke()
        },
        b,
    ));
    out.push((
        "choke, no rdc",
        LumpedModel {
            rdc_ohm: 0.0,
            ..choke()
        },
        b,
    ));
    out.push((
        "choke, no skin term",
        LumpedModel {
            k_ac_ohm_per_sqrt_hz: 0.0,
            ..choke()
        },
        b,
    ));
    out.push((
        "bare inductor",
        LumpedModel {
            l0_h: 10e-6,
            rdc_ohm: 0.0,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: None,
            cp_f: 0.0,
            ls_h: 0.0,
            sections: vec![],
            core: None,
        },
        b,
    ));
    out.push((
        "choke + series section",
        LumpedModel {
            sections: vec![series_section()],
            ..choke()
        },
        b,
    ));
    out.push((
        "choke + parallel section",
        LumpedModel {
            sections: vec![tank_section()],
            ..choke()
        },
        b,
    ));
    out.push((
        "choke + both kinds, twice",
        LumpedModel {
            sections: vec![
                series_section(),
                tank_section(),
                Section {
                    kind: SectionKind::Series,
                    r_ohm: 0.0,
                    l_h: 0.0,
                    c_f: 0.3e-12,
                },
                Section {
                    kind: SectionKind::Parallel,
                    r_ohm: 2e3,
                    l_h: 20e-9,
                    c_f: 0.0,
                },
            ],
            ..choke()
        },
        b,
    ));
    out.push(("rf chip", rf_chip(), [1e6, 6e9]));
    // Dispersive cores (invented values): a broadened relaxation with some air, an asymmetric one, and
    // a damped resonance, which is realised exactly.
    let relax = |law: CoreLaw, beta: f64| CoreDispersion {
        law,
        corner_hz: 1.5e6,
        alpha: 0.3,
        beta,
        damping: 0.0,
        air_fraction: 0.05,
        resonance_hz: 0.0,
        resonance_share: 0.0,
    };
    out.push((
        "choke, Cole–Cole core",
        LumpedModel {
            rp_ohm: None,
            core: Some(relax(CoreLaw::ColeCole, 1.0)),
            ..choke()
        },
        b,
    ));
    out.push((
        "choke, Havriliak–Negami core, a series section",
        LumpedModel {
            rp_ohm: None,
            core: Some(relax(CoreLaw::HavriliakNegami, 0.7)),
            sections: vec![series_section()],
            ..choke()
        },
        b,
    ));
    out.push((
        "choke, resonant core, no skin term",
        LumpedModel {
            rp_ohm: None,
            k_ac_ohm_per_sqrt_hz: 0.0,
            core: Some(CoreDispersion {
                law: CoreLaw::Resonance,
                corner_hz: 8e6,
                alpha: 0.0,
                beta: 1.0,
                damping: 0.6,
                air_fraction: 0.0,
                resonance_hz: 0.0,
                resonance_share: 0.0,
            }),
            ..choke()
        },
        b,
    ));
    out
}

fn max_error_mna(net: &mna::Subckt, model: &LumpedModel, band: [f64; 2]) -> (f64, f64) {
    // 997 log points (not the exporter's own grid) plus points packed around every resonance.
    let mut worst = (0.0, 0.0);
    for f in mna::points_with_resonances(&|f| model.impedance(f), band[0], band[1], 997) {
        let z_net = mna::impedance(net, f);
        let z_model = model.impedance(f);
        let e = (z_net - z_model).norm() / z_model.norm();
        if e > worst.0 {
            worst = (e, f);
        }
    }
    worst
}

#[test]
fn every_lumped_netlist_matches_its_model_within_the_stated_error() {
    for (name, model, band) in cases() {
        let text = lumped_subcircuit(&model, &ctx(band[0], band[1])).unwrap();
        let net = mna::parse(&text).unwrap_or_else(|e| panic!("{name}: {e}\n{text}"));
        let bound = mna::comment_number(&net, ERROR_BOUND_KEY)
            .unwrap_or_else(|| panic!("{name}: no stated error\n{text}"));
        let (err, at) = max_error_mna(&net, &model, band);
        println!("{name}: stated bound {bound:.3e}, MNA max error {err:.3e} at {at:.4e} Hz");
        assert!(
            err <= bound,
            "{name}: MNA error {err:e} at {at} Hz exceeds the stated {bound:e}\n{text}"
        );
        // Without a skin-effect term or a relaxing core the map is exact (values are written
        // round-trip).
        let relaxing = model.core.is_some_and(|c| c.law != CoreLaw::Resonance);
        if model.k_ac_ohm_per_sqrt_hz == 0.0 && !relaxing {
            assert!(
                err < 1e-8 && bound < 1e-6,
                "{name}: {err:e}, stated {bound:e}"
            );
        }
        // The stated error must also be useful, not merely true. Its floor is physical: a causal
        // network whose resistance rises as √f carries a reactance of about k·√f, which is ~1 % of |Z|
        // at the bottom of these bands.
        assert!(bound < 2e-2, "{name}: stated error {bound:e} is too large");
    }
}

#[test]
fn the_dc_resistance_of_the_netlist_is_rdc() {
    // Transient analyses start from the DC operating point: the ladder must not add resistance at DC.
    for (name, model, _) in cases() {
        let text = lumped_subcircuit(&model, &ctx(1e3, 1e8)).unwrap();
        let net = mna::parse(&text).unwrap();
        let z = mna::impedance(&net, 1e-6);
        let tanks_r = 0.0; // tanks are shorted by their inductor at DC
        assert!(
            (z.re - model.rdc_ohm - tanks_r).abs() < 1e-9 * (1.0 + model.rdc_ohm),
            "{name}: DC resistance {} vs rdc {}",
            z.re,
            model.rdc_ohm
        );
    }
}

#[test]
fn the_skin_ladder_follows_k_sqrt_f_in_the_band() {
    // The real part of the winding branch: Re Z_net − rdc ≈ k·√f where the winding dominates (a model
    // with the winding alone: no cp, no ls, no rp).
    let model = LumpedModel {
        cp_f: 0.0,
        ls_h: 0.0,
        rp_ohm: None,
        ..choke()
    };
    let text = lumped_subcircuit(&model, &ctx(1e3, 1e8)).unwrap();
    let net = mna::parse(&text).unwrap();
    let stated_real = net
        .comments
        .iter()
        .find_map(|c| {
            c.strip_prefix("real part: max |Re Z_ladder - k*sqrt(f)| / (rdc + k*sqrt(f)) = ")
                .and_then(|v| v.split_whitespace().next())
                .and_then(|v| v.parse::<f64>().ok())
        })
        .expect("the real-part error is stated");
    let mut worst = 0.0f64;
    for f in mna::log_points(1e3, 1e8, 501) {
        let z = mna::impedance(&net, f);
        let target = model.rdc_ohm + model.k_ac_ohm_per_sqrt_hz * f.sqrt();
        worst = worst.max((z.re - target).abs() / target);
    }
    println!("ladder real-part error: stated {stated_real:.3e}, MNA {worst:.3e}");
    assert!(
        worst <= stated_real * 1.05 + 1e-12,
        "{worst} > {stated_real}"
    );
    assert!(stated_real < 1e-2);
}

#[test]
fn the_netlist_carries_its_provenance_and_only_plain_values() {
    let text = lumped_subcircuit(&choke(), &ctx(1e3, 1e8)).unwrap();
    for needle in [
        "part: CHK-100/22",
        "fit id: fit-7f3a",
        "revision: 3",
        &format!("sweep file sha256: {}", "9c1e".repeat(16)),
        "band of validity: 1e3 Hz to 1e8 Hz",
        ERROR_BOUND_KEY,
    ] {
        assert!(text.contains(needle), "missing {needle:?}\n{text}");
    }
    let net = mna::parse(&text).unwrap();
    assert_eq!(net.name, "HB_CHK_100_22");
    assert_eq!(net.pins, ["1", "2"]);
    for line in text
        .lines()
        .filter(|l| !l.starts_with('*') && !l.starts_with('.'))
    {
        let value = line.split_whitespace().nth(3).unwrap();
        assert!(
            value.parse::<f64>().is_ok_and(|v| v > 0.0),
            "value {value:?} is not a plain positive number: {line}"
        );
    }
}

#[test]
fn a_hand_written_netlist_with_scale_suffixes_matches_the_closed_form() {
    // (R + jωL) ‖ 1/(jωC) ‖ Rp, computed by hand.
    let text =
        "* hand check\n.subckt T a b\nR1 a n 2.2\nL1 n b 1.5uH\nC1 a b 10p\nRP a b 10meg\n.ends\n";
    let net = mna::parse(text).unwrap();
    for f in [1e3, 1e6, 4.1e7, 1e9] {
        let w = 2.0 * PI * f;
        let branch = Complex64::new(2.2, w * 1.5e-6);
        let y = branch.inv() + Complex64::new(1.0 / 10e6, w * 10e-12);
        let expect = y.inv();
        let got = mna::impedance(&net, f);
        assert!(
            (got - expect).norm() < 1e-12 * expect.norm(),
            "{f}: {got} vs {expect}"
        );
    }
}

#[test]
fn scale_suffixes_are_read_as_spice_reads_them() {
    // SPICE convention (common practice, e.g. the SPICE2 user's guide, from memory): M is milli, MEG
    // is mega, trailing unit letters are ignored.
    let cases = [
        ("10meg", 10e6),
        ("1.5u", 1.5e-6),
        ("2.2k", 2.2e3),
        ("47nH", 47e-9),
        ("100f", 100e-15),
        ("3m", 3e-3),
        ("1e-9", 1e-9),
        ("5pF", 5e-12),
        ("-2.5E+3", -2.5e3),
        ("4.7", 4.7),
    ];
    for (text, value) in cases {
        let got = mna::parse_value(text).unwrap();
        assert!((got - value).abs() <= 1e-15 * value.abs(), "{text}: {got}");
    }
    assert!(mna::parse_value("abc").is_err());
}

#[test]
fn the_solver_finds_the_thomson_resonance() {
    // Source (TOOLBOX reference values): Thomson f0 = 1/(2π√(LC)): 10 µH with 5 pF -> 22.5079 MHz.
    let net = mna::parse(".SUBCKT T 1 2\nL1 1 3 10u\nC1 3 2 5p\nR1 1 2 1meg\n.ENDS\n").unwrap();
    // Series LC shunted by 1 MΩ: |Z| has its minimum at f0; find it by golden-section search.
    let (mut a, mut b) = (20e6, 25e6);
    for _ in 0..200 {
        let m1 = b - (b - a) / 1.618_033_988_75;
        let m2 = a + (b - a) / 1.618_033_988_75;
        if mna::impedance(&net, m1).norm() < mna::impedance(&net, m2).norm() {
            b = m2;
        } else {
            a = m1;
        }
    }
    let f0 = 0.5 * (a + b);
    assert!((f0 / 22.5079e6 - 1.0).abs() < 5e-6, "{f0}");
}

#[test]
fn models_that_are_not_passive_or_not_finite_are_refused() {
    let bad = [
        LumpedModel {
            l0_h: 0.0,
            ..choke()
        },
        LumpedModel {
            rdc_ohm: -0.1,
            ..choke()
        },
        LumpedModel {
            rp_ohm: Some(f64::NAN),
            ..choke()
        },
        LumpedModel {
            k_ac_ohm_per_sqrt_hz: -1e-5,
            ..choke()
        },
        LumpedModel {
            sections: vec![Section {
                c_f: 0.0,
                ..series_section()
            }],
            ..choke()
        },
    ];
    for m in bad {
        let e = lumped_subcircuit(&m, &ctx(1e3, 1e8)).unwrap_err();
        assert!(e.to_string().contains("invalid"), "{e}");
    }
}

#[test]
fn absurd_but_finite_values_give_an_error_or_a_netlist_never_a_panic() {
    for m in [
        LumpedModel {
            l0_h: 1e300,
            ..choke()
        },
        LumpedModel {
            l0_h: 1e-300,
            ..choke()
        },
        LumpedModel {
            k_ac_ohm_per_sqrt_hz: 1e300,
            ..choke()
        },
        LumpedModel {
            cp_f: 1e300,
            ..choke()
        },
    ] {
        match lumped_subcircuit(&m, &ctx(1e3, 1e8)) {
            Ok(text) => assert!(mna::parse(&text).is_ok()),
            Err(e) => assert!(!e.to_string().is_empty()),
        }
    }
}
