//! Writes demo-data/: the invented parts of Osterhane Motion Works, their sweeps (Touchstone and CSV,
//! made from known lumped models with noise drawn from henrybook's uncertainty model), manifest.json
//! and truth.json (the models each sweep was made from, for parameter-recovery checks).
//!
//! `cargo run --example make_demo_data [-- OUTPUT_DIR]`; the output is the same on every run.

use henrybook::model::{ImpedanceModel, LumpedModel, Section, SectionKind};
use henrybook::sweep::convert::{s_from_z, two_port_s};
use henrybook::sweep::{
    DataFormat, Method, Network, NoiseModel, Parameter, TouchstoneVersion, TwoPortOrder,
    write_touchstone_with_digits,
};
use num_complex::Complex64;
use serde_json::{Value, json};
use std::f64::consts::PI;
use std::path::{Path, PathBuf};

const SCENARIO: &str = "Osterhane Motion Works is a small (invented) maker of servo and variable-speed motor \
drives. Its component-engineering group qualifies every lot of inductors at incoming inspection before the \
parts reach the production line: the 10 µH buck choke of the 48 V auxiliary supply, the 1 mH mains filter \
choke, the 100 nH inductor of the service-radio board, the 47 µH output-filter choke of the gate-driver \
supply, and the 220 µH choke of the PFC stage. Technicians measure each lot on the bench network analyser \
(reflection, series-thru or shunt-thru, whichever suits the part's impedance) or on the impedance \
analyser, and upload the files. This quarter the buck-choke supplier changed its ferrite, and one PFC-choke \
lot came in with the wrong air gap.";

/// A deterministic generator (SplitMix64) with Box–Muller normal deviates: the demo files must not
/// change between runs, and the example needs no extra dependency.
struct Rng(u64);

impl Rng {
    fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    fn uniform(&mut self) -> f64 {
        ((self.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    fn normal(&mut self) -> f64 {
        let (u, v) = (self.uniform(), self.uniform());
        (-2.0 * u.ln()).sqrt() * (2.0 * PI * v).cos()
    }
    /// Circular complex noise with σ per real and imaginary part.
    fn complex(&mut self, sigma: f64) -> Complex64 {
        Complex64::new(self.normal() * sigma, self.normal() * sigma)
    }
}

fn log_grid(start_hz: f64, stop_hz: f64, points: usize) -> Vec<f64> {
    (0..points)
        .map(|k| {
            let t = k as f64 / (points - 1) as f64;
            // Rounded to 6 significant digits, as an instrument's sweep list shows them.
            let f = start_hz * (stop_hz / start_hz).powf(t);
            format!("{f:.5e}")
                .parse()
                .expect("a formatted number parses")
        })
        .collect()
}

#[derive(Clone, Copy)]
enum Layout {
    Touchstone {
        version: TouchstoneVersion,
        format: DataFormat,
        unit_hz: f64,
    },
    CsvRealImag,
    CsvMagPhase,
}

struct SweepSpec {
    file: &'static str,
    lot: &'static str,
    method: Method,
    layout: Layout,
    model: LumpedModel,
    start_hz: f64,
    stop_hz: f64,
    points: usize,
    dcr_ohm: Option<f64>,
    temperature_c: f64,
    operator: &'static str,
    seed: u64,
    /// The demo approves this lot (in upload order; the newest approved lot is the baseline).
    approve: bool,
}

struct PartSpec {
    part_number: &'static str,
    description: &'static str,
    limits: Value,
    sweeps: Vec<SweepSpec>,
}

fn limits(
    l_nominal_h: Option<f64>,
    l_test_frequency_hz: Option<f64>,
    l_tolerance_percent: Option<f64>,
    dcr_max_ohm: Option<f64>,
    srf_min_hz: Option<f64>,
    q: Option<(f64, f64)>,
    z_band: Option<(f64, f64, f64)>,
) -> Value {
    json!({
        "l_nominal_h": l_nominal_h,
        "l_test_frequency_hz": l_test_frequency_hz,
        "l_tolerance_percent": l_tolerance_percent,
        "dcr_max_ohm": dcr_max_ohm,
        "srf_min_hz": srf_min_hz,
        "q_min": q.map(|q| q.0),
        "q_test_frequency_hz": q.map(|q| q.1),
        "z_min_ohm": z_band.map(|z| z.0),
        "z_band_min_hz": z_band.map(|z| z.1),
        "z_band_max_hz": z_band.map(|z| z.2),
    })
}

fn ts(version: TouchstoneVersion, format: DataFormat, unit_hz: f64) -> Layout {
    Layout::Touchstone {
        version,
        format,
        unit_hz,
    }
}

fn parts() -> Vec<PartSpec> {
    use DataFormat::*;
    use TouchstoneVersion::*;
    let buck = |l0_h: f64, rdc_ohm: f64, cp_f: f64, rp_ohm: f64| LumpedModel {
        l0_h,
        rdc_ohm,
        k_ac_ohm_per_sqrt_hz: 2.5e-6,
        rp_ohm: Some(rp_ohm),
        cp_f,
        ls_h: 1.5e-9,
        sections: vec![],
        core: None,
    };
    let rf = |l0_h: f64, cp_f: f64| LumpedModel {
        l0_h,
        rdc_ohm: 0.42,
        k_ac_ohm_per_sqrt_hz: 2.1e-4,
        rp_ohm: None,
        cp_f,
        ls_h: 0.35e-9,
        sections: vec![],
        core: None,
    };
    let pfc = |l0_h: f64| LumpedModel {
        l0_h,
        rdc_ohm: 0.088,
        k_ac_ohm_per_sqrt_hz: 1.2e-5,
        rp_ohm: Some(40e3),
        cp_f: 18e-12,
        ls_h: 0.0,
        sections: vec![],
        core: None,
    };
    vec![
        PartSpec {
            part_number: "OMW-L10U-BK",
            description: "10 µH shielded power choke, buck converter of the 48 V auxiliary supply (8 A)",
            limits: limits(
                Some(10e-6),
                Some(100e3),
                Some(20.0),
                Some(0.018),
                Some(12e6),
                None,
                None,
            ),
            sweeps: vec![
                SweepSpec {
                    file: "OMW-L10U-BK/lot-2611A_shunt-thru.s2p",
                    lot: "2611A",
                    method: Method::ShuntThru,
                    layout: ts(V1, DecibelAngle, 1e3),
                    model: buck(10.2e-6, 0.0118, 7.5e-12, 9e3),
                    start_hz: 1e3,
                    stop_hz: 200e6,
                    points: 401,
                    dcr_ohm: Some(0.0119),
                    temperature_c: 23.0,
                    operator: "A. Marsh",
                    seed: 11,
                    approve: true,
                },
                SweepSpec {
                    file: "OMW-L10U-BK/lot-2615A_shunt-thru.s2p",
                    lot: "2615A",
                    method: Method::ShuntThru,
                    layout: ts(V1, DecibelAngle, 1e3),
                    // Old ferrite: the lot-to-lot spread of a stable supply.
                    model: buck(1.005e-05, 0.0119, 7.6e-12, 9.2e+03),
                    start_hz: 1e3,
                    stop_hz: 200e6,
                    points: 401,
                    dcr_ohm: Some(0.012),
                    temperature_c: 23.5,
                    operator: "J. Varga",
                    seed: 13,
                    approve: true,
                },
                SweepSpec {
                    file: "OMW-L10U-BK/lot-2619B_shunt-thru.s2p",
                    lot: "2619B",
                    method: Method::ShuntThru,
                    layout: ts(V1, DecibelAngle, 1e3),
                    // Old ferrite: the lot-to-lot spread of a stable supply.
                    model: buck(1.030e-05, 0.0117, 7.4e-12, 8.8e+03),
                    start_hz: 1e3,
                    stop_hz: 200e6,
                    points: 401,
                    dcr_ohm: Some(0.0118),
                    temperature_c: 22.5,
                    operator: "A. Marsh",
                    seed: 14,
                    approve: true,
                },
                SweepSpec {
                    file: "OMW-L10U-BK/lot-2623A_shunt-thru.s2p",
                    lot: "2623A",
                    method: Method::ShuntThru,
                    layout: ts(V1, DecibelAngle, 1e3),
                    // Old ferrite: the lot-to-lot spread of a stable supply.
                    model: buck(1.015e-05, 0.012, 7.5e-12, 9.1e+03),
                    start_hz: 1e3,
                    stop_hz: 200e6,
                    points: 401,
                    dcr_ohm: Some(0.0121),
                    temperature_c: 23.0,
                    operator: "T. Ilunga",
                    seed: 15,
                    approve: true,
                },
                SweepSpec {
                    file: "OMW-L10U-BK/lot-2628B_shunt-thru.s2p",
                    lot: "2628B",
                    method: Method::ShuntThru,
                    layout: ts(V1, DecibelAngle, 1e3),
                    // Old ferrite: the lot-to-lot spread of a stable supply.
                    model: buck(9.950e-06, 0.0118, 7.7e-12, 8.9e+03),
                    start_hz: 1e3,
                    stop_hz: 200e6,
                    points: 401,
                    dcr_ohm: Some(0.0119),
                    temperature_c: 24.0,
                    operator: "A. Marsh",
                    seed: 16,
                    approve: true,
                },
                SweepSpec {
                    file: "OMW-L10U-BK/lot-2634A_shunt-thru.s2p",
                    lot: "2634A",
                    method: Method::ShuntThru,
                    layout: ts(V1, DecibelAngle, 1e3),
                    // Old ferrite: the lot-to-lot spread of a stable supply.
                    model: buck(1.025e-05, 0.0119, 7.5e-12, 9.0e+03),
                    start_hz: 1e3,
                    stop_hz: 200e6,
                    points: 401,
                    dcr_ohm: Some(0.012),
                    temperature_c: 23.0,
                    operator: "J. Varga",
                    seed: 17,
                    approve: true,
                },
                SweepSpec {
                    file: "OMW-L10U-BK/lot-2647C_shunt-thru.s2p",
                    lot: "2647C",
                    method: Method::ShuntThru,
                    layout: ts(V1, DecibelAngle, 1e3),
                    // New ferrite: lower permeability and more core loss, a little more capacitance.
                    model: buck(9.45e-6, 0.0122, 7.9e-12, 6.5e3),
                    start_hz: 1e3,
                    stop_hz: 200e6,
                    points: 401,
                    dcr_ohm: Some(0.0123),
                    temperature_c: 24.5,
                    operator: "J. Varga",
                    seed: 12,
                    approve: false,
                },
            ],
        },
        PartSpec {
            part_number: "OMW-L1M0-MF",
            description: "1 mH mains filter choke, nanocrystalline core (one winding measured); strong core loss",
            limits: limits(
                Some(1e-3),
                Some(10e3),
                Some(30.0),
                Some(0.12),
                None,
                None,
                Some((1000.0, 300e3, 10e6)),
            ),
            sweeps: vec![SweepSpec {
                file: "OMW-L1M0-MF/lot-2630B_series-thru.s2p",
                lot: "2630B",
                method: Method::SeriesThru,
                layout: ts(V2, RealImaginary, 1e6),
                model: LumpedModel {
                    l0_h: 1.04e-3,
                    rdc_ohm: 0.081,
                    k_ac_ohm_per_sqrt_hz: 4e-5,
                    rp_ohm: Some(3.2e3),
                    cp_f: 11.5e-12,
                    ls_h: 8e-9,
                    sections: vec![],
                    core: None,
                },
                start_hz: 1e3,
                stop_hz: 100e6,
                points: 401,
                dcr_ohm: None,
                temperature_c: 23.0,
                operator: "A. Marsh",
                seed: 21,
                approve: false,
            }],
        },
        PartSpec {
            part_number: "OMW-L100N-RF",
            description: "100 nH wire-wound chip inductor (0603), matching network of the 868 MHz service radio",
            limits: limits(
                Some(100e-9),
                Some(100e6),
                Some(5.0),
                None,
                Some(1.2e9),
                Some((35.0, 250e6)),
                None,
            ),
            sweeps: vec![
                SweepSpec {
                    file: "OMW-L100N-RF/lot-2602A_reflection.s1p",
                    lot: "2602A",
                    method: Method::Reflection,
                    layout: ts(V1, MagnitudeAngle, 1e9),
                    model: rf(99.0e-9, 0.118e-12),
                    start_hz: 10e6,
                    stop_hz: 3e9,
                    points: 401,
                    dcr_ohm: None,
                    temperature_c: 23.0,
                    operator: "J. Varga",
                    seed: 31,
                    approve: false,
                },
                SweepSpec {
                    file: "OMW-L100N-RF/lot-2651A_reflection.ts",
                    lot: "2651A",
                    method: Method::Reflection,
                    layout: ts(V2, DecibelAngle, 1e6),
                    model: rf(100.6e-9, 0.121e-12),
                    start_hz: 10e6,
                    stop_hz: 3e9,
                    points: 401,
                    dcr_ohm: None,
                    temperature_c: 22.5,
                    operator: "A. Marsh",
                    seed: 32,
                    approve: false,
                },
            ],
        },
        PartSpec {
            part_number: "OMW-L47U-GD",
            description: "47 µH output-filter choke of the isolated gate-driver supply; a second resonance near 50 MHz",
            limits: limits(
                Some(47e-6),
                Some(100e3),
                Some(20.0),
                Some(0.06),
                Some(8e6),
                None,
                None,
            ),
            sweeps: vec![SweepSpec {
                file: "OMW-L47U-GD/lot-2618A_analyser.csv",
                lot: "2618A",
                method: Method::Direct,
                layout: Layout::CsvMagPhase,
                model: LumpedModel {
                    l0_h: 46.5e-6,
                    rdc_ohm: 0.047,
                    k_ac_ohm_per_sqrt_hz: 8e-6,
                    rp_ohm: Some(25e3),
                    cp_f: 4.5e-12,
                    ls_h: 0.0,
                    // A winding section resonating with its own capacitance: a series resonance
                    // (|Z| notch) near 50 MHz above the SRF.
                    sections: vec![Section {
                        kind: SectionKind::Series,
                        r_ohm: 6.0,
                        l_h: 3.4e-6,
                        c_f: 3e-12,
                    }],
                    core: None,
                },
                start_hz: 10e3,
                stop_hz: 120e6,
                points: 401,
                dcr_ohm: Some(0.0468),
                temperature_c: 23.5,
                operator: "T. Ilunga",
                seed: 41,
                approve: false,
            }],
        },
        PartSpec {
            part_number: "OMW-L220U-PF",
            description: "220 µH PFC boost choke, gapped ferrite (6 A)",
            limits: limits(
                Some(220e-6),
                Some(10e3),
                Some(10.0),
                Some(0.1),
                Some(1.5e6),
                None,
                None,
            ),
            sweeps: vec![
                SweepSpec {
                    file: "OMW-L220U-PF/lot-2609A_analyser.csv",
                    lot: "2609A",
                    method: Method::Direct,
                    layout: Layout::CsvRealImag,
                    model: pfc(223e-6),
                    start_hz: 100.0,
                    stop_hz: 30e6,
                    points: 301,
                    dcr_ohm: Some(0.0884),
                    temperature_c: 23.0,
                    operator: "T. Ilunga",
                    seed: 51,
                    approve: false,
                },
                SweepSpec {
                    // The lot with the wrong air gap: L about 17 % low, out of its ±10 %.
                    file: "OMW-L220U-PF/lot-2644B_analyser.csv",
                    lot: "2644B",
                    method: Method::Direct,
                    layout: Layout::CsvRealImag,
                    model: pfc(183e-6),
                    start_hz: 100.0,
                    stop_hz: 30e6,
                    points: 301,
                    dcr_ohm: Some(0.0881),
                    temperature_c: 23.0,
                    operator: "T. Ilunga",
                    seed: 52,
                    approve: false,
                },
            ],
        },
    ]
}

/// The measured file for one sweep, with noise drawn from henrybook's uncertainty model: relative
/// noise ρ·|Z| on the impedance, then (for the network-analyser methods) noise of σ_S(|S|) on the
/// S-parameters.
fn synthesise(spec: &SweepSpec) -> String {
    let noise = NoiseModel::default();
    let mut rng = Rng(spec.seed);
    let z0 = 50.0;
    let f = log_grid(spec.start_hz, spec.stop_hz, spec.points);
    let z_true: Vec<Complex64> = f.iter().map(|&f| spec.model.impedance(f)).collect();
    let z_rel: Vec<Complex64> = z_true
        .iter()
        .map(|&z| z + rng.complex(noise.relative_floor * z.norm()))
        .collect();
    let comments = |extra: &str| {
        format!(
            "Osterhane Motion Works - incoming inspection (invented demo data)\n{}\nlot {} - {} - {} °C - operator {}\n{extra}",
            spec.file,
            spec.lot,
            spec.method.as_str(),
            spec.temperature_c,
            spec.operator
        )
    };
    match spec.layout {
        Layout::Touchstone {
            version,
            format,
            unit_hz,
        } => {
            let two_port = matches!(spec.method, Method::SeriesThru | Method::ShuntThru);
            let s_noisy = |s: Complex64, rng: &mut Rng| s + rng.complex(noise.sigma_s(s));
            let data: Vec<Vec<Complex64>> = z_rel
                .iter()
                .map(|&z| {
                    if two_port {
                        let m = two_port_s(spec.method, z, z0).expect("a thru method");
                        vec![
                            s_noisy(m[0][0], &mut rng),
                            s_noisy(m[0][1], &mut rng),
                            s_noisy(m[1][0], &mut rng),
                            s_noisy(m[1][1], &mut rng),
                        ]
                    } else {
                        vec![s_noisy(s_from_z(spec.method, z, z0), &mut rng)]
                    }
                })
                .collect();
            let ports = if two_port { 2 } else { 1 };
            let net = Network {
                version,
                ports,
                parameter: Parameter::S,
                format,
                frequency_unit_hz: unit_hz,
                reference_ohm: vec![z0; ports],
                two_port_order: two_port.then_some(TwoPortOrder::N12First),
                frequency_hz: f.clone(),
                data,
                line: vec![0; f.len()],
            };
            let fixture = match spec.method {
                Method::SeriesThru => "part in series between port 1 and port 2 (series-thru)",
                Method::ShuntThru => "part from the through line to ground (shunt-thru)",
                _ => "part at port 1, calibrated at the part's pads (reflection)",
            };
            write_touchstone_with_digits(&net, &[&comments(fixture)], Some(9))
        }
        Layout::CsvRealImag | Layout::CsvMagPhase => {
            let mut out = String::new();
            for line in
                comments("impedance analyser, open/short compensated at the fixture").lines()
            {
                out.push_str(&format!("# {line}\n"));
            }
            let mag_phase = matches!(spec.layout, Layout::CsvMagPhase);
            out.push_str(if mag_phase {
                "frequency_hz,z_mag_ohm,z_phase_deg\n"
            } else {
                "frequency_hz,z_real_ohm,z_imag_ohm\n"
            });
            for (f, z) in f.iter().zip(&z_rel) {
                if mag_phase {
                    out.push_str(&format!(
                        "{f},{:.7e},{:.7e}\n",
                        z.norm(),
                        z.arg().to_degrees()
                    ));
                } else {
                    out.push_str(&format!("{f},{:.7e},{:.7e}\n", z.re, z.im));
                }
            }
            out
        }
    }
}

/// What the true model says at the limits' test points, for the README's story.
fn describe(part: &PartSpec, spec: &SweepSpec) -> String {
    let m = &spec.model;
    let l_at = |f: f64| m.impedance(f).im / (2.0 * PI * f);
    let mut srf = None;
    let grid = log_grid(spec.start_hz, spec.stop_hz * 3.0, 20_000);
    for w in grid.windows(2) {
        if m.impedance(w[0]).im > 0.0 && m.impedance(w[1]).im <= 0.0 {
            srf = Some(w[0]);
            break;
        }
    }
    let mut s = format!("{} lot {}:", part.part_number, spec.lot);
    if let Some(f) = part.limits["l_test_frequency_hz"].as_f64() {
        let nominal = part.limits["l_nominal_h"].as_f64().unwrap_or(f64::NAN);
        s.push_str(&format!(
            " L({f:e} Hz) = {:.4e} H ({:+.1} %)",
            l_at(f),
            100.0 * (l_at(f) / nominal - 1.0)
        ));
    }
    if let Some(f) = srf {
        s.push_str(&format!(", SRF ≈ {f:.4e} Hz"));
    }
    if let Some(fq) = part.limits["q_test_frequency_hz"].as_f64() {
        let z = m.impedance(fq);
        s.push_str(&format!(", Q({fq:e} Hz) = {:.1}", z.im / z.re));
    }
    if let (Some(a), Some(b)) = (
        part.limits["z_band_min_hz"].as_f64(),
        part.limits["z_band_max_hz"].as_f64(),
    ) {
        let zmin = log_grid(a, b, 2000)
            .iter()
            .map(|&f| m.impedance(f).norm())
            .fold(f64::INFINITY, f64::min);
        s.push_str(&format!(", min |Z| in band = {zmin:.0} Ω"));
    }
    s.push_str(&format!(", Rdc = {} Ω", m.rdc_ohm));
    s
}

fn main() {
    let out: PathBuf = std::env::args()
        .nth(1)
        .map(PathBuf::from)
        .unwrap_or_else(|| Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo-data"));
    let parts = parts();
    let mut manifest_parts = Vec::new();
    let mut truth = serde_json::Map::new();
    for part in &parts {
        let mut sweeps = Vec::new();
        for spec in &part.sweeps {
            let path = out.join(spec.file);
            std::fs::create_dir_all(path.parent().expect("a file sits in a folder"))
                .expect("create the part folder");
            std::fs::write(&path, synthesise(spec)).expect("write the sweep file");
            sweeps.push(json!({
                "file": spec.file,
                "lot": spec.lot,
                "method": spec.method.as_str(),
                "z0_ohm": 50,
                "dcr_ohm": spec.dcr_ohm,
                "temperature_c": spec.temperature_c,
                "operator": spec.operator,
            }));
            if spec.approve {
                sweeps.last_mut().expect("just pushed")["approve"] = json!(true);
            }
            truth.insert(
                spec.file.to_string(),
                serde_json::to_value(&spec.model).expect("a model serialises"),
            );
            println!("{}", describe(part, spec));
        }
        manifest_parts.push(json!({
            "part_number": part.part_number,
            "description": part.description,
            "limits": part.limits,
            "sweeps": sweeps,
        }));
    }
    let manifest = json!({ "scenario": SCENARIO, "parts": manifest_parts });
    let write_json = |name: &str, v: &Value| {
        let mut text = serde_json::to_string_pretty(v).expect("JSON serialises");
        text.push('\n');
        std::fs::write(out.join(name), text).expect("write JSON");
    };
    write_json("manifest.json", &manifest);
    write_json(
        "truth.json",
        &json!({
            "note": "The lumped models (henrybook::model::LumpedModel) each demo sweep was synthesised from, \
                     before noise. Invented; for parameter-recovery checks only.",
            "models": truth,
        }),
    );
    println!("wrote {}", out.display());
}
