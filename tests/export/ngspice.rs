//! The exported netlists in a real SPICE simulator: ngspice (Debian package `ngspice`) runs AC, DC
//! operating point and transient analyses of every subcircuit, and its AC impedance must match the
//! model within the error the netlist states. ngspice is a Debian package that `.ci/setup` installs;
//! without it these tests fail with the command that starts it.

use henrybook::export::ExportContext;
use henrybook::export::foster::rational_subcircuit;
use henrybook::export::spice::{ERROR_BOUND_KEY, lumped_subcircuit};
use henrybook::model::rational::ComplexPole;
use henrybook::model::{ImpedanceModel, LumpedModel, RationalModel, Section, SectionKind};
use num_complex::Complex64;
use std::path::PathBuf;
use std::process::Command;
use std::sync::atomic::{AtomicUsize, Ordering};

static RUN: AtomicUsize = AtomicUsize::new(0);

struct Run {
    ac: Vec<(f64, Complex64)>,
    op_v1: f64,
    log: String,
}

fn subckt_name(text: &str) -> String {
    text.lines()
        .find_map(|l| l.strip_prefix(".SUBCKT "))
        .and_then(|l| l.split_whitespace().next())
        .expect(".SUBCKT line")
        .to_string()
}

fn stated_bound(text: &str) -> f64 {
    text.lines()
        .find_map(|l| l.strip_prefix("* ")?.strip_prefix(ERROR_BOUND_KEY))
        .expect("stated error")
        .trim()
        .parse()
        .unwrap()
}

/// Runs ngspice on `subckt` driven by a 1 A source into pin 1 (pin 2 grounded): the DC operating
/// point, one `ac dec` sweep over the band, one `ac lin` sweep around each given frequency, and a
/// transient run.
fn ngspice(subckt: &str, band: [f64; 2], zoom_hz: &[f64]) -> Run {
    let dir: PathBuf = std::env::temp_dir().join(format!(
        "henrybook-ngspice-{}-{}",
        std::process::id(),
        RUN.fetch_add(1, Ordering::SeqCst)
    ));
    std::fs::create_dir_all(&dir).unwrap();
    let name = subckt_name(subckt);
    let mut control = String::from("set wr_singlescale\nset numdgt=15\nop\n");
    control.push_str(&format!("wrdata {}/op.txt v(1)\n", dir.display()));
    control.push_str(&format!(
        "ac dec 40 {:e} {:e}\nwrdata {}/ac0.txt v(1)\n",
        band[0],
        band[1],
        dir.display()
    ));
    for (i, &f) in zoom_hz.iter().enumerate() {
        control.push_str(&format!(
            "ac lin 201 {:e} {:e}\nwrdata {}/ac{}.txt v(1)\n",
            f * (1.0 - 2e-3),
            f * (1.0 + 2e-3),
            dir.display(),
            i + 1
        ));
    }
    // `quit 0` after the control block: without it batch mode looks for netlist analyses, finds
    // none and exits with status 1.
    control.push_str("tran 10n 20u\nquit 0\n");
    let deck = format!(
        "* henrybook export check\n{subckt}I1 0 1 DC 1 AC 1\nX1 1 0 {name}\n.control\n{control}.endc\n.end\n"
    );
    std::fs::write(dir.join("deck.cir"), &deck).unwrap();
    let out = Command::new("ngspice")
        .arg("-b")
        .arg(dir.join("deck.cir"))
        .output()
        .expect("ngspice is installed (apt-get install -y ngspice)");
    let log = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(out.status.success(), "ngspice failed:\n{log}\n{deck}");
    let read = |file: &str| -> Vec<Vec<f64>> {
        std::fs::read_to_string(dir.join(file))
            .unwrap_or_else(|e| panic!("{file}: {e}\n{log}"))
            .lines()
            .map(|l| l.split_whitespace().map(|t| t.parse().unwrap()).collect())
            .collect()
    };
    let op_v1 = read("op.txt")[0][1];
    let mut ac = Vec::new();
    for i in 0..=zoom_hz.len() {
        for row in read(&format!("ac{i}.txt")) {
            ac.push((row[0], Complex64::new(row[1], row[2])));
        }
    }
    let _ = std::fs::remove_dir_all(&dir);
    Run { ac, op_v1, log }
}

fn resonances(z: &dyn Fn(f64) -> Complex64, lo: f64, hi: f64) -> Vec<f64> {
    let n = 20_000;
    let pts: Vec<f64> = (0..n)
        .map(|i| lo * (hi / lo).powf(i as f64 / (n - 1) as f64))
        .collect();
    pts.windows(2)
        .filter(|w| z(w[0]).im.signum() != z(w[1]).im.signum())
        .map(|w| (w[0] * w[1]).sqrt())
        .collect()
}

fn check(name: &str, text: &str, model: &dyn ImpedanceModel, band: [f64; 2], dc_ohm: f64) {
    let zoom = resonances(&|f| model.impedance(f), band[0], band[1]);
    let run = ngspice(text, band, &zoom);
    let bound = stated_bound(text);
    let mut worst = (0.0f64, 0.0);
    for &(f, z) in &run.ac {
        let zm = model.impedance(f);
        let e = (z - zm).norm() / zm.norm();
        if e > worst.0 {
            worst = (e, f);
        }
    }
    println!(
        "{name}: ngspice {} AC points, max error {:.3e} at {:.4e} Hz, stated {bound:.3e}; DC {} ohm",
        run.ac.len(),
        worst.0,
        worst.1,
        run.op_v1
    );
    assert!(run.ac.len() > 100);
    assert!(worst.0 <= bound, "{name}: {} > {bound}\n{text}", worst.0);
    assert!(
        (run.op_v1 - dc_ohm).abs() <= 1e-6 * dc_ohm.max(1.0),
        "{name}: DC {} vs {dc_ohm}",
        run.op_v1
    );
    let lower = run.log.to_ascii_lowercase();
    assert!(
        !lower.contains("error") && !lower.contains("timestep too small"),
        "{name}: {}",
        run.log
    );
}

fn choke() -> LumpedModel {
    // Invented test model (no demo data): a power choke.
    LumpedModel {
        l0_h: 10e-6,
        rdc_ohm: 0.02,
        k_ac_ohm_per_sqrt_hz: 2e-5,
        rp_ohm: Some(50e3),
        cp_f: 5e-12,
        ls_h: 2e-9,
        sections: vec![
            Section {
                kind: SectionKind::Series,
                r_ohm: 3.0,
                l_h: 0.4e-6,
                c_f: 30e-12,
            },
            Section {
                kind: SectionKind::Parallel,
                r_ohm: 800.0,
                l_h: 0.3e-6,
                c_f: 50e-12,
            },
        ],
        core: None,
    }
}

#[test]
fn ngspice_reproduces_lumped_netlists() {
    let band = [1e3, 1e8];
    let ctx = ExportContext::for_band(band[0], band[1]);
    for (name, m) in [
        ("choke with both sections", choke()),
        (
            "choke without rp (high Q)",
            LumpedModel {
                rp_ohm: None,
                sections: vec![],
                ..choke()
            },
        ),
        (
            // A broadened relaxation core with a resonance share (invented values): Debye cells and
            // a tank in the netlist.
            "choke with a resonance-relaxation core",
            LumpedModel {
                rp_ohm: None,
                core: Some(henrybook::model::CoreDispersion {
                    law: henrybook::model::CoreLaw::ResonanceRelaxation,
                    corner_hz: 2e6,
                    alpha: 0.35,
                    beta: 1.0,
                    damping: 0.5,
                    air_fraction: 0.1,
                    resonance_hz: 30e6,
                    resonance_share: 0.25,
                }),
                ..choke()
            },
        ),
    ] {
        let text = lumped_subcircuit(&m, &ctx).unwrap();
        check(name, &text, &m, band, m.rdc_ohm);
    }
}

#[test]
fn ngspice_reproduces_a_foster_netlist() {
    // (Rs + sL) ‖ C ‖ Rp with the check values, plus a second resonator and series R and L.
    let pair = |rs: f64, l: f64, c: f64, rp: f64| {
        let a1 = rs / l + 1.0 / (rp * c);
        let a0 = (1.0 + rs / rp) / (l * c);
        let p = Complex64::new(-a1 / 2.0, (a0 - a1 * a1 / 4.0).sqrt());
        ComplexPole {
            pole_rad_per_s: p,
            residue_ohm_rad_per_s: (p + rs / l) / (c * (p - p.conj())),
        }
    };
    let m = RationalModel {
        d_ohm: 0.05,
        e_h: 1e-9,
        real_poles: vec![],
        complex_poles: vec![pair(0.1, 10e-6, 5e-12, 20e3), pair(2.0, 200e-9, 3e-12, 3e3)],
    };
    let band = [1e3, 1e9];
    let text = rational_subcircuit(&m, &ExportContext::for_band(band[0], band[1])).unwrap();
    // DC: d + the first resonator's Rs‖Rp + the second's.
    let dc = 0.05 + 0.1 * 20e3 / (0.1 + 20e3) + 2.0 * 3e3 / (2.0 + 3e3);
    check("foster", &text, &m, band, dc);
}

#[test]
fn ngspice_reproduces_a_parallel_block_netlist() {
    // R0 + s·Ls + R ‖ (Rs + sL + 1/(sC)) (see export/foster.rs notch_model): its pole pair's residue
    // has a negative real part, so the export uses a series chain with a parallel block.
    let (r0, ls, r, rs, l, c) = (0.05, 1e-9, 200.0, 0.1, 0.2e-6, 2e-12);
    let a1 = (r + rs) / l;
    let a0 = 1.0 / (l * c);
    let p = Complex64::new(-a1 / 2.0, (a0 - a1 * a1 / 4.0).sqrt());
    let m = RationalModel {
        d_ohm: r0 + r,
        e_h: ls,
        real_poles: vec![],
        complex_poles: vec![ComplexPole {
            pole_rad_per_s: p,
            residue_ohm_rad_per_s: -(r * r / l) * p / (p - p.conj()),
        }],
    };
    let band = [1e3, 1e9];
    let text = rational_subcircuit(&m, &ExportContext::for_band(band[0], band[1])).unwrap();
    assert!(text.contains("parallel Foster block"), "{text}");
    check("notch (mixed form)", &text, &m, band, r0 + r);
}
