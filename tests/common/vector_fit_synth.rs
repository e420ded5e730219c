//! Synthetic sweeps for the vector-fitting checks (synthetic data from known models, no source).

use henrybook::model::{ImpedanceModel, LumpedModel, Section, SectionKind};
use henrybook::sweep::{Method, Sweep};
use num_complex::Complex64;

/// A small deterministic generator of standard normal numbers (xorshift64* and Box–Muller).
pub struct Gauss(u64);

impl Gauss {
    pub fn new(seed: u64) -> Gauss {
        Gauss(seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1)
    }
    fn uniform(&mut self) -> f64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        let v = self.0.wrapping_mul(0x2545_F491_4F6C_DD1D);
        ((v >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    pub fn normal(&mut self) -> f64 {
        let (u1, u2) = (self.uniform(), self.uniform());
        (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
    }
}

pub fn log_grid(f_lo: f64, f_hi: f64, n: usize) -> Vec<f64> {
    (0..n)
        .map(|i| f_lo * (f_hi / f_lo).powf(i as f64 / (n - 1) as f64))
        .collect()
}

/// A power choke with skin effect, core loss, winding capacitance, lead inductance, one series and one
/// parallel section: not rational (the √f term), so the fit can only approximate it.
pub fn choke() -> LumpedModel {
    LumpedModel {
        l0_h: 10e-6,
        rdc_ohm: 0.05,
        k_ac_ohm_per_sqrt_hz: 2e-5,
        rp_ohm: Some(20e3),
        cp_f: 5e-12,
        ls_h: 2e-9,
        sections: vec![
            Section {
                kind: SectionKind::Series,
                r_ohm: 1.0,
                l_h: 50e-9,
                c_f: 2e-12,
            },
            Section {
                kind: SectionKind::Parallel,
                r_ohm: 200.0,
                l_h: 20e-9,
                c_f: 1e-12,
            },
        ],
        core: None,
    }
}

/// Sweep of `model` with Gaussian noise of standard deviation σ = `rel_noise·|Z|` on the real and on the
/// imaginary part of each point (the circular uncertainty `Sweep::sigma_ohm` describes), σ stated.
pub fn noisy_sweep(model: &dyn ImpedanceModel, f: &[f64], rel_noise: f64, seed: u64) -> Sweep {
    let mut g = Gauss::new(seed);
    let mut z = Vec::new();
    let mut sigma = Vec::new();
    for &fi in f {
        let z0 = model.impedance(fi);
        let s = rel_noise * z0.norm();
        let n = Complex64::new(g.normal(), g.normal()) * s;
        z.push(z0 + n);
        sigma.push(s);
    }
    Sweep {
        frequency_hz: f.to_vec(),
        impedance_ohm: z,
        sigma_ohm: sigma,
        method: Method::Direct,
        z0_ohm: 50.0,
        dc_reading: None,
        warnings: Vec::new(),
    }
}
