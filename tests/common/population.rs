//! A population of invented parts and sweeps drawn from the space users produce, for the fit's
//! robustness test (`tests/fit/population.rs`) and its benchmark (`tests/population/bench.rs`, the example `population`).
//!
//! Each part is drawn from wide, independent distributions (log-uniform unless stated), not from the
//! region the fitter likes:
//! - L0 100 nH–10 mH, Cp 0.2–200 pF, L0/Rdc 3 µs–30 ms;
//! - Rp 1.5–60 × the reactance ω·L0 at the SRF; √f term 0.3–10 × Rdc at the SRF; ls 0.3–8 nH;
//! - the top of the sweep from a third of the SRF (SRF up to 3× above the band) to 30× the SRF, at
//!   most 3 GHz; the bottom 3–6 decades below the top, never below 20 Hz;
//! - 401–1601 points, spaced logarithmically, linearly (as most analysers sweep) or in linear segments;
//! - the method: impedance analyser (direct), reflection, series-thru or shunt-thru, with the noise
//!   each adds: the S-parameter noise σ_S = √((1e-3·|S|)² + (1e-5)²) per real and imaginary part, plus
//!   a 0.2 % relative floor on Z (common practice for a calibrated analyser at a narrow IF bandwidth,
//!   no source; the same model henrybook's readers assume, so χ² at the truth is about 2N).
//!
//! The sweep reaches the fit through the real readers: each part is written as the file an instrument
//! would write (Touchstone 1.x S-parameters, 1- or 2-port, or an impedance CSV) and read back.
//! Everything here is invented data for testing, not measurements.
use henrybook::model::{ImpedanceModel, LumpedModel};
use henrybook::sweep::{Method, ReadOptions, Sweep, convert, read_sweep};
use num_complex::Complex64;
use std::f64::consts::PI;

/// Deterministic xorshift generator with Box–Muller normals.
pub struct Rng(u64);

impl Rng {
    pub fn new(seed: u64) -> Rng {
        // splitmix64 of the seed, so neighbouring seeds give unrelated streams.
        let mut z = seed.wrapping_add(0x9E37_79B9_7F4A_7C15);
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        Rng((z ^ (z >> 31)) | 1)
    }
    pub fn uniform(&mut self) -> f64 {
        self.0 ^= self.0 << 13;
        self.0 ^= self.0 >> 7;
        self.0 ^= self.0 << 17;
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
    pub fn between(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * self.uniform()
    }
    /// Log-uniform in [lo, hi].
    pub fn log_between(&mut self, lo: f64, hi: f64) -> f64 {
        (lo.ln() + (hi.ln() - lo.ln()) * self.uniform()).exp()
    }
    pub fn normal(&mut self) -> f64 {
        let (u1, u2) = (self.uniform().max(1e-300), self.uniform());
        (-2.0 * u1.ln()).sqrt() * (2.0 * PI * u2).cos()
    }
    pub fn pick<T: Copy>(&mut self, items: &[T]) -> T {
        items[((self.uniform() * items.len() as f64) as usize).min(items.len() - 1)]
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Spacing {
    Log,
    Linear,
    Segmented,
}

impl Spacing {
    pub fn name(self) -> &'static str {
        match self {
            Spacing::Log => "log",
            Spacing::Linear => "linear",
            Spacing::Segmented => "segmented",
        }
    }
}

pub const METHODS: [Method; 4] = [
    Method::Direct,
    Method::Reflection,
    Method::SeriesThru,
    Method::ShuntThru,
];

/// One drawn part: the truth, how it was swept, and the file an instrument would write.
#[derive(Debug, Clone)]
pub struct Part {
    pub index: usize,
    pub truth: LumpedModel,
    pub method: Method,
    pub spacing: Spacing,
    pub band_hz: [f64; 2],
    pub points: usize,
    /// The truth's self-resonant frequency (ls ignored): 1/(2π√(L0·Cp)).
    pub srf_hz: f64,
    pub file_name: String,
    pub file_text: String,
}

impl Part {
    /// The sweep as henrybook's readers see the file.
    pub fn sweep(&self) -> Sweep {
        let options = ReadOptions {
            method: Some(self.method),
            ..ReadOptions::default()
        };
        read_sweep(&self.file_name, self.file_text.as_bytes(), &options)
            .unwrap_or_else(|e| panic!("part {}: the readers refuse the file: {e}", self.index))
    }

    pub fn describe(&self) -> String {
        let m = &self.truth;
        format!(
            "part {} ({}, {} spacing, {} points, {:.3e}–{:.3e} Hz, SRF {:.3e} Hz): l0 {:.3e} H, rdc {:.3e} Ω, \
             k_ac {:.3e} Ω/√Hz, rp {:.3e} Ω, cp {:.3e} F, ls {:.3e} H",
            self.index,
            self.method.as_str(),
            self.spacing.name(),
            self.points,
            self.band_hz[0],
            self.band_hz[1],
            self.srf_hz,
            m.l0_h,
            m.rdc_ohm,
            m.k_ac_ohm_per_sqrt_hz,
            m.rp_ohm.unwrap_or(f64::INFINITY),
            m.cp_f,
            m.ls_h
        )
    }
}

fn grid(rng: &mut Rng, spacing: Spacing, f_lo: f64, f_hi: f64, n: usize) -> Vec<f64> {
    match spacing {
        Spacing::Log => (0..n)
            .map(|i| f_lo * (f_hi / f_lo).powf(i as f64 / (n - 1) as f64))
            .collect(),
        Spacing::Linear => (0..n)
            .map(|i| f_lo + (f_hi - f_lo) * i as f64 / (n - 1) as f64)
            .collect(),
        Spacing::Segmented => {
            // 2–4 linear segments whose edges are spaced evenly in log f, with the points shared
            // evenly; each segment starts one step above the previous one's end (no repeated row).
            let segments = 2 + (rng.uniform() * 3.0) as usize;
            let edges: Vec<f64> = (0..=segments)
                .map(|s| f_lo * (f_hi / f_lo).powf(s as f64 / segments as f64))
                .collect();
            let per = n / segments;
            let mut f = Vec::with_capacity(n);
            for s in 0..segments {
                let count = if s + 1 == segments { n - f.len() } else { per };
                let (a, b) = (edges[s], edges[s + 1]);
                let step = (b - a) / count as f64;
                let first = if s == 0 { 0 } else { 1 };
                for i in 0..count {
                    let k = if s == 0 {
                        (b - a) * i as f64 / (count - 1) as f64
                    } else {
                        step * (i + first) as f64
                    };
                    f.push(a + k);
                }
            }
            f
        }
    }
}

/// A drawn truth whose √f term also carries its reactive half: the winding's series impedance is
/// rdc + k·√f·(1 + j) + core instead of rdc + k·√f + core. A resistance that grows as √f with no
/// reactance is not the impedance of any causal element (its Hilbert transform is not zero); a
/// conductor's internal impedance in the skin-effect regime has equal resistance and internal
/// reactance (the surface impedance (1 + j)/(σδ); common practice, no source). The lumped model keeps
/// the usual resistance-only term; this form is for checking a causal model family (the rational fit)
/// on sweeps a causal part could produce. Parts drawn here have no extra sections.
pub struct CausalSkin<'a>(pub &'a LumpedModel);

impl ImpedanceModel for CausalSkin<'_> {
    fn impedance(&self, frequency_hz: f64) -> Complex64 {
        let t = self.0;
        assert!(
            t.sections.is_empty(),
            "CausalSkin takes a truth without sections"
        );
        let bare = LumpedModel {
            cp_f: 0.0,
            ls_h: 0.0,
            ..t.clone()
        };
        let w = 2.0 * PI * frequency_hz;
        let zw = bare.impedance(frequency_hz)
            + Complex64::new(0.0, t.k_ac_ohm_per_sqrt_hz * frequency_hz.sqrt());
        1.0 / (1.0 / zw + Complex64::new(0.0, w * t.cp_f)) + Complex64::new(0.0, w * t.ls_h)
    }
}

/// Draws part `index` of the population with `seed`.
pub fn draw(seed: u64, index: usize) -> Part {
    draw_as(seed, index, false)
}

/// Draws part `index` as [`draw`] does (the same parameters, grid and method), but measures the truth
/// with the causal skin term of [`CausalSkin`].
pub fn draw_causal(seed: u64, index: usize) -> Part {
    draw_as(seed, index, true)
}

fn draw_as(seed: u64, index: usize, causal_skin: bool) -> Part {
    let mut rng = Rng::new(seed.wrapping_mul(1_000_003).wrapping_add(index as u64));
    let l0_h = rng.log_between(100e-9, 10e-3);
    let cp_f = rng.log_between(0.2e-12, 200e-12);
    let rdc_ohm = l0_h / rng.log_between(3e-6, 30e-3);
    let srf_hz = 1.0 / (2.0 * PI * (l0_h * cp_f).sqrt());
    let x_srf = 2.0 * PI * srf_hz * l0_h;
    let rp_ohm = rng.log_between(1.5, 60.0) * x_srf;
    let k_ac_ohm_per_sqrt_hz = rng.log_between(0.3, 10.0) * rdc_ohm / srf_hz.sqrt();
    let ls_h = rng.log_between(0.3e-9, 8e-9);
    let truth = LumpedModel {
        l0_h,
        rdc_ohm,
        k_ac_ohm_per_sqrt_hz,
        rp_ohm: Some(rp_ohm),
        cp_f,
        ls_h,
        sections: Vec::new(),
        core: None,
    };
    let f_hi = (srf_hz * rng.log_between(1.0 / 3.0, 30.0)).min(3e9);
    let f_lo = (f_hi / 10f64.powf(rng.between(3.0, 6.0))).max(20.0);
    let points = 401 + (rng.uniform() * 1201.0) as usize;
    let spacing = rng.pick(&[Spacing::Log, Spacing::Linear, Spacing::Segmented]);
    let method = rng.pick(&METHODS);
    let f = grid(&mut rng, spacing, f_lo, f_hi, points);
    let measured: &dyn ImpedanceModel = if causal_skin {
        &CausalSkin(&truth)
    } else {
        &truth
    };
    let (file_name, file_text) = write_file(&mut rng, measured, method, &f, index);
    Part {
        index,
        truth,
        method,
        spacing,
        band_hz: [f_lo, f_hi],
        points,
        srf_hz,
        file_name,
        file_text,
    }
}

/// The measured impedance of `truth` at `f` with the method's noise, and the S-parameter an analyser
/// would record (the impedance itself for the direct method).
fn measure(rng: &mut Rng, truth: &dyn ImpedanceModel, method: Method, f: f64) -> Complex64 {
    let z0 = 50.0;
    let z = truth.impedance(f);
    let rel = 2e-3 * z.norm();
    let z = z + Complex64::new(rel * rng.normal(), rel * rng.normal());
    if method == Method::Direct {
        return z;
    }
    let s = convert::s_from_z(method, z, z0);
    let sigma_s = (1e-3 * s.norm()).hypot(1e-5);
    s + Complex64::new(sigma_s * rng.normal(), sigma_s * rng.normal())
}

fn write_file(
    rng: &mut Rng,
    truth: &dyn ImpedanceModel,
    method: Method,
    f: &[f64],
    index: usize,
) -> (String, String) {
    use std::fmt::Write;
    let mut text = String::new();
    let name = match method {
        Method::Direct => {
            text.push_str("frequency_hz,z_real_ohm,z_imag_ohm\n");
            for &x in f {
                let z = measure(rng, truth, method, x);
                writeln!(text, "{x:.10e},{:.12e},{:.12e}", z.re, z.im).unwrap();
            }
            format!("part-{index:04}_analyser.csv")
        }
        Method::Reflection => {
            text.push_str("! invented part for the population test\n# Hz S RI R 50\n");
            for &x in f {
                let s = measure(rng, truth, method, x);
                writeln!(text, "{x:.10e} {:.12e} {:.12e}", s.re, s.im).unwrap();
            }
            format!("part-{index:04}_reflection.s1p")
        }
        Method::SeriesThru | Method::ShuntThru => {
            text.push_str("! invented part for the population test\n# Hz S RI R 50\n");
            for &x in f {
                let s21 = measure(rng, truth, method, x);
                // S11 of the ideal element (unused by the thru formulas); v1 order N11 N21 N12 N22.
                let z = convert::z_from_s(method, s21, 50.0);
                let s11 = convert::two_port_s(method, z, 50.0).expect("2-port method")[0][0];
                writeln!(
                    text,
                    "{x:.10e} {:.12e} {:.12e} {:.12e} {:.12e} {:.12e} {:.12e} {:.12e} {:.12e}",
                    s11.re, s11.im, s21.re, s21.im, s21.re, s21.im, s11.re, s11.im
                )
                .unwrap();
            }
            format!("part-{index:04}_{}.s2p", method.as_str())
        }
    };
    (name, text)
}

/// χ² = Σ |Z_model − Z_meas|²/σ² over the sweep (both parts of each point).
pub fn chi2(model: &dyn ImpedanceModel, sweep: &Sweep) -> f64 {
    weighted_sum(model, sweep, std::iter::repeat(1.0))
}

/// χ² with each point counted by its density weight (`henrybook::fit::problem::density_weights`), the
/// data part of the objective the lumped fit minimises: on a linear or segmented sweep it differs from
/// [`chi2`], which counts the dense top of the band more, so a fit at the weighted optimum can sit a
/// little above the truth's plain χ² while below its weighted one.
pub fn chi2_weighted(model: &dyn ImpedanceModel, sweep: &Sweep) -> f64 {
    let g = henrybook::fit::problem::density_weights(&sweep.frequency_hz);
    weighted_sum(model, sweep, g)
}

/// Σ gₖ·|Z_model − Z_k|²/σₖ² over the sweep's points.
fn weighted_sum(
    model: &dyn ImpedanceModel,
    sweep: &Sweep,
    g: impl IntoIterator<Item = f64>,
) -> f64 {
    sweep
        .frequency_hz
        .iter()
        .zip(&sweep.impedance_ohm)
        .zip(&sweep.sigma_ohm)
        .zip(g)
        .map(|(((&f, &z), &s), g)| g * (model.impedance(f) - z).norm_sqr() / (s * s))
        .sum()
}

/// The found criterion: the fit reached the data's best basin when its χ² is no worse than
/// 1.1 × the truth's χ² + 20.
pub fn found(chi2_fit: f64, chi2_truth: f64) -> bool {
    chi2_fit <= 1.1 * chi2_truth + 20.0
}
