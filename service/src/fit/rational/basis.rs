//! The pole–residue representation on the normalised frequency axis: poles, coefficients, the sweep as
//! fitted (s′, data, weights), the partial-fraction basis and its evaluation, and the conversion to and
//! from the physical [`RationalModel`].

use crate::fit::linalg;
use crate::model::RationalModel;
use crate::model::rational::{ComplexPole, RealPole};
use num_complex::Complex64;
use std::f64::consts::PI;

/// Relative pivot below which a least-squares column is taken as beyond the numerical rank.
pub(super) const RANK_TOL: f64 = 1e-13;

/// Poles on the normalised frequency axis: real poles, and complex pairs by their member with Im > 0.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Poles {
    pub real: Vec<f64>,
    pub pairs: Vec<Complex64>,
}

impl Poles {
    pub(crate) fn order(&self) -> usize {
        self.real.len() + 2 * self.pairs.len()
    }
}

/// The linear part on the normalised axis: residues (real poles first, then Re, Im per pair), d and e.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Coefficients {
    pub c: Vec<f64>,
    pub d: f64,
    pub e: f64,
}

/// A sweep prepared for fitting: normalised s′, data, weights 1/σ.
#[derive(Debug, Clone)]
pub(crate) struct FitData {
    pub omega0: f64,
    pub s: Vec<Complex64>,
    pub z: Vec<Complex64>,
    pub w: Vec<f64>,
}

impl FitData {
    pub(crate) fn new(frequency_hz: &[f64], z: &[Complex64], sigma: &[f64]) -> FitData {
        let f_max = frequency_hz.iter().fold(0.0f64, |m, f| m.max(*f));
        let omega0 = 2.0 * PI * f_max;
        FitData {
            omega0,
            s: frequency_hz
                .iter()
                .map(|f| Complex64::new(0.0, 2.0 * PI * f / omega0))
                .collect(),
            z: z.to_vec(),
            w: sigma.iter().map(|s| 1.0 / s).collect(),
        }
    }

    pub(super) fn len(&self) -> usize {
        self.s.len()
    }
}

/// Values of the partial-fraction basis at s, in the coefficient order of [`Coefficients::c`]:
/// 1/(s − a) for a real pole; 1/(s − p) + 1/(s − p̄) and j/(s − p) − j/(s − p̄) for a pair.
pub(crate) fn basis_at(s: Complex64, poles: &Poles, out: &mut Vec<Complex64>) {
    out.resize(poles.order(), Complex64::new(0.0, 0.0));
    basis_into(s, poles, out);
}

/// 1/z with one division.
#[inline(always)]
pub(super) fn recip(z: Complex64) -> Complex64 {
    let q = 1.0 / (z.re * z.re + z.im * z.im);
    Complex64::new(z.re * q, -z.im * q)
}

/// [`basis_at`] into a slice of length `poles.order()`.
#[inline]
pub(super) fn basis_into(s: Complex64, poles: &Poles, out: &mut [Complex64]) {
    let nr = poles.real.len();
    for (o, &a) in out.iter_mut().zip(&poles.real) {
        *o = recip(s - a);
    }
    for (o, &p) in out[nr..].chunks_exact_mut(2).zip(&poles.pairs) {
        let t1 = recip(s - p);
        let t2 = recip(s - p.conj());
        o[0] = t1 + t2;
        // j·(t1 − t2)
        o[1] = Complex64::new(t2.im - t1.im, t1.re - t2.re);
    }
}

/// Points per chunk of the row builders: two rows per point fill one block of the [`RowCompressor`].
pub(super) const CHUNK: usize = linalg::BLOCK_ROWS / 2;

/// [`basis_into`] (and, with `sq`, the squared basis of [`identify_with_gain`]: 1/(s − a)² for a real pole;
/// 1/(s − p)² + 1/(s − p̄)² and j/(s − p)² − j/(s − p̄)² for a pair) at up to [`CHUNK`] points, laid out by
/// function: function j at point i in `[j * CHUNK + i]`, real and imaginary parts
/// apart. The same arithmetic as those functions, one pole at a time over the points (so that it runs in
/// vector registers).
pub(super) fn basis_chunk(
    s: &[Complex64],
    poles: &Poles,
    re: &mut [f64],
    im: &mut [f64],
    mut sq: Option<(&mut [f64], &mut [f64])>,
) {
    let len = s.len();
    assert!(len <= CHUNK && re.len() >= poles.order() * CHUNK && im.len() >= poles.order() * CHUNK);
    for (j, &a) in poles.real.iter().enumerate() {
        let (ore, oim) = (&mut re[j * CHUNK..][..len], &mut im[j * CHUNK..][..len]);
        for i in 0..len {
            let (zr, zi) = (s[i].re - a, s[i].im);
            let q = 1.0 / (zr * zr + zi * zi);
            ore[i] = zr * q;
            oim[i] = -zi * q;
        }
        if let Some((ur, ui)) = sq.as_mut() {
            let (ur, ui) = (&mut ur[j * CHUNK..][..len], &mut ui[j * CHUNK..][..len]);
            for i in 0..len {
                let (tr, ti) = (ore[i], oim[i]);
                ur[i] = tr * tr - ti * ti;
                ui[i] = tr * ti + ti * tr;
            }
        }
    }
    let nr = poles.real.len();
    for (q, &p) in poles.pairs.iter().enumerate() {
        let j = nr + 2 * q;
        let (re0, re1) = re[j * CHUNK..(j + 2) * CHUNK].split_at_mut(CHUNK);
        let (im0, im1) = im[j * CHUNK..(j + 2) * CHUNK].split_at_mut(CHUNK);
        let mut squares = sq.as_mut().map(|(ur, ui)| {
            let (ur0, ur1) = ur[j * CHUNK..(j + 2) * CHUNK].split_at_mut(CHUNK);
            let (ui0, ui1) = ui[j * CHUNK..(j + 2) * CHUNK].split_at_mut(CHUNK);
            (ur0, ur1, ui0, ui1)
        });
        let pc = p.conj();
        for i in 0..len {
            let (z1r, z1i) = (s[i].re - p.re, s[i].im - p.im);
            let q1 = 1.0 / (z1r * z1r + z1i * z1i);
            let (t1r, t1i) = (z1r * q1, -z1i * q1);
            let (z2r, z2i) = (s[i].re - pc.re, s[i].im - pc.im);
            let q2 = 1.0 / (z2r * z2r + z2i * z2i);
            let (t2r, t2i) = (z2r * q2, -z2i * q2);
            re0[i] = t1r + t2r;
            im0[i] = t1i + t2i;
            re1[i] = t2i - t1i;
            im1[i] = t1r - t2r;
            if let Some((ur0, ur1, ui0, ui1)) = squares.as_mut() {
                let (a1r, a1i) = (t1r * t1r - t1i * t1i, t1r * t1i + t1i * t1r);
                let (a2r, a2i) = (t2r * t2r - t2i * t2i, t2r * t2i + t2i * t2r);
                ur0[i] = a1r + a2r;
                ui0[i] = a1i + a2i;
                ur1[i] = a2i - a1i;
                ui1[i] = a1r - a2r;
            }
        }
    }
}

/// Z at normalised s′.
pub(crate) fn evaluate(s: Complex64, poles: &Poles, coef: &Coefficients) -> Complex64 {
    let mut z = Complex64::new(coef.d, 0.0) + s * coef.e;
    for (&a, &c) in poles.real.iter().zip(&coef.c) {
        z += recip(s - a) * c;
    }
    let o = poles.real.len();
    for (i, &p) in poles.pairs.iter().enumerate() {
        let r = Complex64::new(coef.c[o + 2 * i], coef.c[o + 2 * i + 1]);
        z += r * recip(s - p) + r.conj() * recip(s - p.conj());
    }
    z
}

/// sqrt(Σ |w·(Z_fit − Z)|² / 2K): 1 when the residuals match the stated uncertainty.
pub(crate) fn rms_weighted(data: &FitData, poles: &Poles, coef: &Coefficients) -> f64 {
    let ss: f64 = (0..data.len())
        .map(|i| ((evaluate(data.s[i], poles, coef) - data.z[i]) * data.w[i]).norm_sqr())
        .sum();
    (ss / (2 * data.len()) as f64).sqrt()
}

pub(crate) fn to_model(omega0: f64, poles: &Poles, coef: &Coefficients) -> RationalModel {
    let o = poles.real.len();
    RationalModel {
        d_ohm: coef.d,
        e_h: coef.e / omega0,
        real_poles: poles
            .real
            .iter()
            .zip(&coef.c)
            .map(|(&a, &c)| RealPole {
                pole_rad_per_s: a * omega0,
                residue_ohm_rad_per_s: c * omega0,
            })
            .collect(),
        complex_poles: poles
            .pairs
            .iter()
            .enumerate()
            .map(|(i, &p)| ComplexPole {
                pole_rad_per_s: p * omega0,
                residue_ohm_rad_per_s: Complex64::new(coef.c[o + 2 * i], coef.c[o + 2 * i + 1])
                    * omega0,
            })
            .collect(),
    }
}

/// Converts a physical model to the normalised axis of `omega0`.
pub(crate) fn from_model(omega0: f64, model: &RationalModel) -> (Poles, Coefficients) {
    let mut c = Vec::new();
    let mut real = Vec::new();
    for p in &model.real_poles {
        real.push(p.pole_rad_per_s / omega0);
        c.push(p.residue_ohm_rad_per_s / omega0);
    }
    let mut pairs = Vec::new();
    for p in &model.complex_poles {
        pairs.push(p.pole_rad_per_s / omega0);
        c.push(p.residue_ohm_rad_per_s.re / omega0);
        c.push(p.residue_ohm_rad_per_s.im / omega0);
    }
    (
        Poles { real, pairs },
        Coefficients {
            c,
            d: model.d_ohm,
            e: model.e_h * omega0,
        },
    )
}
