//! Wall-clock benchmark of vector fitting at a fixed order (harness-free, so the side-by-side script in
//! tests/bench/ can drive it).
//!
//! Without arguments: a synthetic 1601-point choke sweep (a known lumped model, 0.1 % noise) at order 8.
//! With `VF_BENCH_INPUT=<file.json>` (`frequency_hz`, `z_re`, `z_im`, `sigma_ohm`, `order`, `repeat`):
//! those data. Prints one JSON object: best and median seconds of the fixed-order vector fit (relocation
//! and refinement) and of the whole `fit_rational` at that order (with the passivity check/enforcement),
//! and the RMS error in ohm of each.

use henrybook::fit::rational::{VectorFitSettings, vector_fit};
use henrybook::fit::{FitControl, FitOptions, ModelFamily, fit};
use henrybook::model::{ImpedanceModel, LumpedModel, Section, SectionKind};
use henrybook::sweep::{Method, Sweep};
use num_complex::Complex64;
use std::time::Instant;

fn default_sweep() -> Sweep {
    let model = LumpedModel {
        l0_h: 10e-6,
        rdc_ohm: 0.05,
        k_ac_ohm_per_sqrt_hz: 2e-5,
        rp_ohm: Some(20e3),
        cp_f: 5e-12,
        ls_h: 2e-9,
        sections: vec![Section {
            kind: SectionKind::Series,
            r_ohm: 1.0,
            l_h: 50e-9,
            c_f: 2e-12,
        }],
        core: None,
    };
    let n = 1601;
    let mut state = 0x2545_F491_4F6C_DD1Du64;
    let mut uniform = move || {
        state ^= state >> 12;
        state ^= state << 25;
        state ^= state >> 27;
        ((state.wrapping_mul(0x2545_F491_4F6C_DD1D) >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    };
    let mut f = Vec::new();
    let mut z = Vec::new();
    let mut sigma = Vec::new();
    for i in 0..n {
        let fi = 1e4 * (1e9f64 / 1e4).powf(i as f64 / (n - 1) as f64);
        let z0 = model.impedance(fi);
        let s = 1e-3 * z0.norm();
        let (u1, u2) = (uniform(), uniform());
        let r = (-2.0 * u1.ln()).sqrt();
        let t = 2.0 * std::f64::consts::PI * u2;
        f.push(fi);
        z.push(z0 + Complex64::new(r * t.cos(), r * t.sin()) * s);
        sigma.push(s);
    }
    Sweep {
        frequency_hz: f,
        impedance_ohm: z,
        sigma_ohm: sigma,
        method: Method::Direct,
        z0_ohm: 50.0,
        dc_reading: None,
        warnings: Vec::new(),
    }
}

fn load(path: &str) -> (Sweep, usize, usize) {
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{path}: {e}"));
    let v: serde_json::Value =
        serde_json::from_str(&text).unwrap_or_else(|e| panic!("{path}: {e}"));
    let floats = |k: &str| -> Vec<f64> {
        v[k].as_array()
            .unwrap_or_else(|| panic!("{path}: no array {k}"))
            .iter()
            .map(|x| x.as_f64().expect("numbers"))
            .collect()
    };
    let (re, im) = (floats("z_re"), floats("z_im"));
    let sweep = Sweep {
        frequency_hz: floats("frequency_hz"),
        impedance_ohm: re
            .iter()
            .zip(&im)
            .map(|(a, b)| Complex64::new(*a, *b))
            .collect(),
        sigma_ohm: floats("sigma_ohm"),
        method: Method::Direct,
        z0_ohm: 50.0,
        dc_reading: None,
        warnings: Vec::new(),
    };
    let order = v["order"].as_u64().expect("order") as usize;
    let repeat = v["repeat"].as_u64().unwrap_or(20) as usize;
    (sweep, order, repeat)
}

fn rms_ohm(sweep: &Sweep, m: &dyn ImpedanceModel) -> f64 {
    let ss: f64 = sweep
        .frequency_hz
        .iter()
        .zip(&sweep.impedance_ohm)
        .map(|(f, z)| (m.impedance(*f) - z).norm_sqr())
        .sum();
    (ss / sweep.frequency_hz.len() as f64).sqrt()
}

fn stats(mut t: Vec<f64>) -> (f64, f64) {
    t.sort_by(f64::total_cmp);
    (t[0], t[t.len() / 2])
}

fn main() {
    let (sweep, order, repeat) = match std::env::var("VF_BENCH_INPUT") {
        Ok(p) => load(&p),
        Err(_) => (default_sweep(), 8, 20),
    };
    let ctl = FitControl::default();
    let settings = VectorFitSettings {
        order,
        max_relocations: 30,
    };
    let mut t_vf = Vec::new();
    let mut vf_model = None;
    let mut relocations = 0;
    let mut refinements = 0;
    for _ in 0..repeat {
        let t0 = Instant::now();
        let r = vector_fit(&sweep, settings, &ctl).expect("vector fit");
        t_vf.push(t0.elapsed().as_secs_f64());
        relocations = r.relocations;
        refinements = r.refinements;
        vf_model = Some(r.model);
    }
    let options = FitOptions {
        family: ModelFamily::Rational,
        rational_order: Some(order),
        ..FitOptions::default()
    };
    let mut t_full = Vec::new();
    let mut full = None;
    for _ in 0..repeat {
        let t0 = Instant::now();
        let r = fit(&sweep, &options, &ctl);
        t_full.push(t0.elapsed().as_secs_f64());
        full = Some(r);
    }
    let (vf_best, vf_median) = stats(t_vf);
    let (full_best, full_median) = stats(t_full);
    let full_rms = match full.expect("ran") {
        Ok(r) => serde_json::json!(rms_ohm(&sweep, &r.model)),
        Err(e) => serde_json::json!(e.to_string()),
    };
    let out = serde_json::json!({
        "points": sweep.frequency_hz.len(),
        "order": order,
        "repeat": repeat,
        "relocations": relocations,
        "refinements": refinements,
        "vector_fit_best_s": vf_best,
        "vector_fit_median_s": vf_median,
        "vector_fit_rms_ohm": rms_ohm(&sweep, &vf_model.expect("ran")),
        "fit_rational_best_s": full_best,
        "fit_rational_median_s": full_median,
        "fit_rational_rms_ohm": full_rms,
    });
    println!("{out}");
}
