//! Synthetic sweeps for the fit tests: invented models (not measurements) sampled on a log grid, with
//! Gaussian noise of the size an instrument of each method would add (`henrybook_tests::synth`).

use henrybook::model::{ImpedanceModel, LumpedModel, Section, SectionKind};
use henrybook::sweep::{Method, Sweep};
use num_complex::Complex64;

/// Deterministic xorshift generator with Box–Muller normals, so every run sees the same noise.
pub struct Noise(u64);

impl Noise {
    pub fn new(seed: u64) -> Noise {
        Noise(seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1)
    }
    pub fn uniform(&mut self) -> f64 {
        self.0 ^= self.0 << 13;
        self.0 ^= self.0 >> 7;
        self.0 ^= self.0 << 17;
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
    pub fn normal(&mut self) -> f64 {
        let (u1, u2) = (self.uniform().max(1e-300), self.uniform());
        (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
    }
}

/// Standard uncertainty of one impedance point for a method: |∂Z/∂S| times an S-parameter noise of
/// 1e-3·|S| + 1e-5 (trace noise about −60 dB relative, floor −100 dB: common practice for a calibrated
/// network analyser at a narrow IF bandwidth, no source) plus a 0.1 % relative floor on Z; an impedance
/// analyser (`Direct`) gets 0.2 % of |Z| plus 1 mΩ.
pub fn sigma_for(method: Method, z: Complex64, z0: f64) -> f64 {
    let rel = 1e-3 * z.norm();
    let (s, dz_ds) = match method {
        // S11 = (Z − Z0)/(Z + Z0); Z = Z0(1+S)/(1−S): ∂Z/∂S = (Z + Z0)²/(2 Z0).
        Method::Reflection => ((z - z0) / (z + z0), (z + z0).norm_sqr() / (2.0 * z0)),
        // S21 = 2 Z0/(Z + 2 Z0); Z = 2 Z0 (1−S)/S: |∂Z/∂S| = |Z + 2 Z0|²/(2 Z0).
        Method::SeriesThru => (
            2.0 * z0 / (z + 2.0 * z0),
            (z + 2.0 * z0).norm_sqr() / (2.0 * z0),
        ),
        // S21 = 2Z/(2Z + Z0); Z = Z0 S/(2(1−S)): ∂Z/∂S = (2Z + Z0)²/(2 Z0).
        Method::ShuntThru => (
            2.0 * z / (2.0 * z + z0),
            (2.0 * z + z0).norm_sqr() / (2.0 * z0),
        ),
        Method::Direct => return 2e-3 * z.norm() + 1e-3,
    };
    (1e-3 * s.norm() + 1e-5) * dz_ds + rel
}

pub fn log_grid(f_lo: f64, f_hi: f64, n: usize) -> Vec<f64> {
    (0..n)
        .map(|i| f_lo * (f_hi / f_lo).powf(i as f64 / (n - 1) as f64))
        .collect()
}

/// A sweep of `model` with noise drawn at the method's σ.
pub fn synthetic_sweep(
    model: &LumpedModel,
    f_lo: f64,
    f_hi: f64,
    n: usize,
    method: Method,
    seed: u64,
) -> Sweep {
    let z0 = 50.0;
    let mut noise = Noise::new(seed);
    let frequency_hz = log_grid(f_lo, f_hi, n);
    let mut impedance_ohm = Vec::with_capacity(n);
    let mut sigma_ohm = Vec::with_capacity(n);
    for &f in &frequency_hz {
        let z = model.impedance(f);
        let s = sigma_for(method, z, z0);
        impedance_ohm.push(z + Complex64::new(s * noise.normal(), s * noise.normal()));
        sigma_ohm.push(s);
    }
    Sweep {
        frequency_hz,
        impedance_ohm,
        sigma_ohm,
        method,
        z0_ohm: z0,
        dc_reading: None,
        warnings: Vec::new(),
    }
}

pub fn section(kind: SectionKind, r_ohm: f64, l_h: f64, c_f: f64) -> Section {
    Section {
        kind,
        r_ohm,
        l_h,
        c_f,
    }
}

/// Invented parts of several types (values typical of each type; not any real product).
pub fn power_choke() -> LumpedModel {
    LumpedModel {
        l0_h: 47e-6,
        rdc_ohm: 0.12,
        k_ac_ohm_per_sqrt_hz: 3e-4,
        rp_ohm: Some(60e3),
        cp_f: 4.2e-12,
        ls_h: 3e-9,
        sections: vec![],
        core: None,
    }
}

pub fn emi_choke() -> LumpedModel {
    LumpedModel {
        l0_h: 2.2e-3,
        rdc_ohm: 0.35,
        k_ac_ohm_per_sqrt_hz: 0.0,
        rp_ohm: Some(25e3),
        cp_f: 9e-12,
        ls_h: 0.0,
        sections: vec![section(SectionKind::Series, 40.0, 3e-6, 2e-12)],
        core: None,
    }
}

pub fn rf_inductor() -> LumpedModel {
    LumpedModel {
        l0_h: 100e-9,
        rdc_ohm: 0.08,
        k_ac_ohm_per_sqrt_hz: 1.5e-5,
        rp_ohm: None,
        cp_f: 0.12e-12,
        ls_h: 0.0,
        sections: vec![],
        core: None,
    }
}

pub fn buck_inductor() -> LumpedModel {
    LumpedModel {
        l0_h: 1.0e-6,
        rdc_ohm: 4e-3,
        k_ac_ohm_per_sqrt_hz: 2e-6,
        rp_ohm: Some(900.0),
        cp_f: 6e-12,
        ls_h: 0.4e-9,
        sections: vec![],
        core: None,
    }
}

pub fn tank_choke() -> LumpedModel {
    LumpedModel {
        l0_h: 330e-6,
        rdc_ohm: 0.9,
        k_ac_ohm_per_sqrt_hz: 0.0,
        rp_ohm: Some(150e3),
        cp_f: 5e-12,
        ls_h: 0.0,
        sections: vec![section(SectionKind::Parallel, 2.5e3, 1.5e-6, 1.5e-12)],
        core: None,
    }
}
