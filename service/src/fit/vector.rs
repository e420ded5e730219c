//! Vector fitting of a scalar impedance (Gustavsen & Semlyen, IEEE Trans. Power Delivery 14(3), 1999) in its
//! relaxed form (Gustavsen, IEEE Trans. Power Delivery 21(3), 2006): poles relocated as the zeros of a
//! weighted scaling function σ(s), then residues, constant and proportional terms identified by linear least
//! squares, every point weighted by 1/σ. Relocation stops when the poles are fixed (relative move below
//! 1e-10), settled (1e-6) with the error flat, at the first relocation without a 0.1 % gain once the poles
//! move by less than 10 %, or after three such relocations; the best iterate is kept. A short
//! Levenberg–Marquardt refinement of poles and residues together then minimises the weighted error itself
//! (the relocation's fixed point minimises a linearised one), with stable poles and no pole sharper than it
//! was or than Q = 500; it stops at the first step that gains less than 0.01 %. Order selection, passivity
//! enforcement and the report are in
//! [`fit_rational`].
//!
//! Everything runs on a normalised frequency s′ = s/ω₀ (ω₀ = 2π·f_max) so the columns of the least-squares
//! systems are of similar size. Every tall system is first compressed to its triangle by Householder QR
//! taken one cache-sized block of rows at a time, and the triangle solved by QR with column pivoting (which
//! decides the numerical rank). One factorisation per relocation serves twice: its leading block is the
//! residue system of the current poles, so their residues and error come with it. When the poles have
//! settled, their residues are identified alone with the squared basis riding along as extra columns, so
//! the same triangle also says how much a Gauss–Newton step could still gain (the refinement's first
//! test). Rows are built 64 points at a time, one pole at a time over the points.

pub(crate) mod linalg;

use crate::fit::{Candidate, FitControl, FitError, FitOptions, FitReport, Quality, Termination};
use crate::model::rational::{ComplexPole, RealPole};
use crate::model::{FittedModel, RationalModel};
use crate::sweep::Sweep;
use linalg::{GramAccumulator, PivotedQr, RowCompressor, padded, rational_zeros};
use num_complex::Complex64;
use std::f64::consts::PI;
use std::sync::atomic::Ordering;
use std::time::Instant;

/// Relative pivot below which a least-squares column is taken as beyond the numerical rank.
const RANK_TOL: f64 = 1e-13;

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

    fn len(&self) -> usize {
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
fn recip(z: Complex64) -> Complex64 {
    let q = 1.0 / (z.re * z.re + z.im * z.im);
    Complex64::new(z.re * q, -z.im * q)
}

/// [`basis_at`] into a slice of length `poles.order()`.
#[inline]
fn basis_into(s: Complex64, poles: &Poles, out: &mut [Complex64]) {
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
const CHUNK: usize = linalg::BLOCK_ROWS / 2;

/// [`basis_into`] (and, with `sq`, the squared basis of [`identify_with_gain`]: 1/(s − a)² for a real pole;
/// 1/(s − p)² + 1/(s − p̄)² and j/(s − p)² − j/(s − p̄)² for a pair) at up to [`CHUNK`] points, laid out by
/// function: function j at point i in `[j * CHUNK + i]`, real and imaginary parts
/// apart. The same arithmetic as those functions, one pole at a time over the points (so that it runs in
/// vector registers).
fn basis_chunk(
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

/// Log-spaced complex starting pairs across the band with Re = −Im/100 (Gustavsen & Semlyen 1999, §IV),
/// and for an odd order one real pole at the geometric centre of the band.
pub(crate) fn starting_poles(order: usize, w_lo: f64, w_hi: f64) -> Poles {
    let n_pairs = order / 2;
    let mut pairs = Vec::with_capacity(n_pairs);
    for k in 0..n_pairs {
        let t = if n_pairs == 1 {
            0.5
        } else {
            k as f64 / (n_pairs - 1) as f64
        };
        let im = w_lo * (w_hi / w_lo).powf(t);
        pairs.push(Complex64::new(-im / 100.0, im));
    }
    let real = if order % 2 == 1 {
        vec![-(w_lo * w_hi).sqrt()]
    } else {
        Vec::new()
    };
    Poles { real, pairs }
}

/// Streams the relaxed relocation system into `qr`, two rows (Re, Im) per point, columns
/// [c…, d, e, c̃…, d̃]. With `fixed_d = None` there is no right-hand side column: the relaxed system's own
/// right-hand side is zero on these rows, and the d̃ column, −(weighted data), is up to sign the
/// right-hand side of the residue system in the first N + 2 columns. The relaxed system's one non-zero
/// row, the relaxation `Re Σₖ σ(sₖ) = K`, is returned as (row, target) for the caller to add to the
/// triangle. With `Some(d̃)` the d̃ column moves to the only right-hand side and there is no relaxation
/// row (Gustavsen 2006, §III).
fn relocation_rows(
    data: &FitData,
    poles: &Poles,
    fixed_d: Option<f64>,
    qr: &mut RowCompressor,
) -> Option<(Vec<f64>, f64)> {
    let k = data.len();
    let n = poles.order();
    let mut br = vec![0.0; n * CHUNK];
    let mut bi = vec![0.0; n * CHUNK];
    let mut phi_sum = vec![0.0; n];
    let scale = {
        let ss: f64 = data
            .z
            .iter()
            .zip(&data.w)
            .map(|(z, w)| (z * w).norm_sqr())
            .sum();
        ss.sqrt() / k as f64
    };
    let width = 2 * n + 3;
    let st = qr.stride();
    let d_col = fixed_d.unwrap_or(-1.0);
    for start in (0..k).step_by(CHUNK) {
        let len = CHUNK.min(k - start);
        basis_chunk(&data.s[start..start + len], poles, &mut br, &mut bi, None);
        // Row of the real parts, then of the imaginary parts: w·φ, w, w·s, −w·Z·φ, then −w·Z (the d̃
        // column) or, with d̃ fixed, the right-hand side; every entry is written.
        let w = &data.w[start..start + len];
        let mut wz = [Complex64::new(0.0, 0.0); CHUNK];
        for (o, (z, w)) in wz.iter_mut().zip(data.z[start..start + len].iter().zip(w)) {
            *o = z * w;
        }
        let blk = &mut qr.rows_unzeroed(2 * len)[..2 * len * st];
        // Column by column (the arithmetic runs over the points in vector registers).
        for j in 0..n {
            let (pr, pi) = (&br[j * CHUNK..][..len], &bi[j * CHUNK..][..len]);
            let points = pr.iter().zip(pi).zip(w.iter().zip(&wz));
            for (rows, ((&a, &b), (&w, wz))) in blk.chunks_exact_mut(2 * st).zip(points) {
                let (re, im) = rows.split_at_mut(st);
                re[j] = a * w;
                im[j] = b * w;
                re[n + 2 + j] = wz.im * b - wz.re * a;
                im[n + 2 + j] = -(wz.re * b + wz.im * a);
            }
        }
        for (i, rows) in blk.chunks_exact_mut(2 * st).enumerate() {
            let (re, im) = rows.split_at_mut(st);
            let (w, wz) = (w[i], wz[i]);
            re[n] = w;
            re[n + 1] = 0.0;
            im[n] = 0.0;
            im[n + 1] = w * data.s[start + i].im;
            re[width - 1] = d_col * wz.re;
            im[width - 1] = d_col * wz.im;
        }
        for (acc, col) in phi_sum.iter_mut().zip(br.chunks_exact(CHUNK)) {
            for v in &col[..len] {
                *acc += v;
            }
        }
    }
    qr.finish();
    fixed_d.is_none().then(|| {
        let mut row = vec![0.0; 2 * n + 3];
        for j in 0..n {
            row[n + 2 + j] = scale * phi_sum[j];
        }
        row[2 * n + 2] = scale * k as f64;
        (row, scale * k as f64)
    })
}

/// One pole relocation: solve the relaxed linearised problem
/// `w·[Σ cₙφₙ + d + s·e − Z·(Σ c̃ₙφₙ + d̃)] ≈ 0` with the relaxation row `Re Σₖ σ(sₖ) = K`, and returns the
/// zeros of σ, with unstable ones flipped into the left half-plane.
/// Also returns the residues, d and e of the poles given (what [`identify`] returns), from the same
/// factorisation: the first N + 2 columns of the relocation system are the weighted residue system of
/// those poles, so the leading block of its triangle (with the d̃ column as their right-hand side) is the
/// triangle [`identify`] would compute.
pub(crate) fn relocate_and_identify(data: &FitData, poles: &Poles) -> (Option<Poles>, Identified) {
    let n = poles.order();
    let cols = 2 * n + 3;
    let mut qr = RowCompressor::new(cols, 0);
    let (relax, target) = relocation_rows(data, poles, None, &mut qr).expect("relaxed rows");
    let m = n + 2;
    // The d̃ column is −(weighted data): its triangle column holds the residue system's right-hand side
    // (negated) in the rows above m and its residual in the rows from m on.
    let (fit, _) = Identified::solve(data, poles, &qr, m, cols - 1);
    // The relaxed system: the triangle of the data rows (whose right-hand side is zero) over the
    // relaxation row.
    let sc = padded(cols);
    let mut a = qr.triangle(cols);
    a.resize((cols + 1) * sc, 0.0);
    a[cols * sc..cols * sc + cols].copy_from_slice(&relax);
    let full = PivotedQr::from_rows(a, cols + 1, cols, sc, RANK_TOL);
    let mut b = vec![0.0; cols + 1];
    b[cols] = target;
    (relocate_from_triangle(data, poles, &full, &b), fit)
}

/// Residues, d and e of fixed poles with the weighted RMS error they leave.
#[derive(Debug, Clone)]
pub(crate) struct Identified {
    pub coef: Coefficients,
    /// [`rms_weighted`] of `coef`, read off the triangle.
    pub rms: f64,
    /// The most a Gauss–Newton step on poles and residues together could lower the cost, as a fraction
    /// of the cost, when the pass measured it ([`identify_with_gain`]).
    pub gain: Option<f64>,
}

impl Identified {
    /// Solves the residue system, the leading `m` columns of the compressed `qr`; `data_col` is a column
    /// of `qr` equal to −(weighted data), whose triangle rows above `m` give the right-hand side (negated)
    /// and rows from `m` on the residual. When the residue system is rank-deficient the solution is a
    /// truncated one and its error is measured instead; the flag says whether it had full rank.
    fn solve(
        data: &FitData,
        poles: &Poles,
        qr: &RowCompressor,
        m: usize,
        data_col: usize,
    ) -> (Identified, bool) {
        let n = poles.order();
        let pq = PivotedQr::from_rows(qr.triangle(m), m, m, padded(m), RANK_TOL);
        let rhs: Vec<f64> = (0..m).map(|i| -qr.r(i, data_col)).collect();
        let x = pq.solve(&rhs);
        let coef = Coefficients {
            c: x[..n].to_vec(),
            d: x[n],
            e: x[n + 1],
        };
        let full = pq.rank() == m;
        let rms = if full {
            (qr.column_tail_sq(data_col, m) / (2 * data.len()) as f64).sqrt()
        } else {
            rms_weighted(data, poles, &coef)
        };
        (
            Identified {
                coef,
                rms,
                gain: None,
            },
            full,
        )
    }
}

/// The relocation once its system is factored: `qr` of the compressed relaxed system and `rhs` its
/// right-hand side.
fn relocate_from_triangle(
    data: &FitData,
    poles: &Poles,
    qr: &PivotedQr,
    rhs: &[f64],
) -> Option<Poles> {
    let n = poles.order();
    let x = qr.solve(rhs);
    let mut c_sigma = x[n + 2..2 * n + 2].to_vec();
    let mut d_sigma = x[2 * n + 2];

    // Gustavsen (2006) §III: when d̃ comes out tiny (or huge) the relaxed solution is unreliable: fix d̃ and
    // solve again without the relaxation row.
    if !(d_sigma.is_finite() && (1e-8..=1e8).contains(&d_sigma.abs())) {
        let fixed = if d_sigma == 0.0 || !d_sigma.is_finite() {
            1.0
        } else {
            d_sigma.signum() * d_sigma.abs().clamp(1e-8, 1e8)
        };
        let cols2 = 2 * n + 2;
        let mut qr2 = RowCompressor::new(cols2, 1);
        relocation_rows(data, poles, Some(fixed), &mut qr2);
        let x2 = PivotedQr::from_rows(qr2.triangle(cols2), cols2, cols2, padded(cols2), RANK_TOL)
            .solve(&qr2.qtb(0));
        c_sigma = x2[n + 2..2 * n + 2].to_vec();
        d_sigma = fixed;
    }
    if c_sigma.iter().any(|v| !v.is_finite()) {
        return None;
    }
    let real: Vec<(f64, f64)> = poles
        .real
        .iter()
        .zip(&c_sigma)
        .map(|(&a, &c)| (a, c))
        .collect();
    let pairs: Vec<(Complex64, Complex64)> = poles
        .pairs
        .iter()
        .enumerate()
        .map(|(i, &p)| {
            let o = poles.real.len() + 2 * i;
            (p, Complex64::new(c_sigma[o], c_sigma[o + 1]))
        })
        .collect();
    let zeros = rational_zeros(d_sigma, &real, &pairs)?;
    Some(poles_from_eigenvalues(&zeros))
}

/// Sorts eigenvalues into real poles and pairs (keeping the member with Im > 0), flipping unstable ones.
pub(crate) fn poles_from_eigenvalues(eig: &[Complex64]) -> Poles {
    let scale = eig.iter().fold(0.0f64, |m, z| m.max(z.norm())).max(1e-300);
    let mut real = Vec::new();
    let mut pairs = Vec::new();
    let mut neg_im = 0usize;
    for &z in eig {
        let stable_re = |re: f64| {
            if re < 0.0 {
                re
            } else if re > 0.0 {
                -re
            } else {
                // A pole on the axis would make Z infinite there: nudge it into the left half-plane.
                -1e-9 * scale
            }
        };
        if z.im.abs() <= 1e-12 * z.norm().max(1e-300) {
            real.push(stable_re(z.re));
        } else if z.im > 0.0 {
            pairs.push(Complex64::new(stable_re(z.re), z.im));
        } else {
            neg_im += 1;
        }
    }
    // Schur gives exact conjugates; if one ever went missing, keep the order by adding it back as real.
    while neg_im > pairs.len() {
        real.push(-scale * 1e-3);
        neg_im -= 1;
    }
    real.sort_by(|a, b| b.total_cmp(a));
    pairs.sort_by(|a, b| a.im.total_cmp(&b.im));
    Poles { real, pairs }
}

/// The weighted least-squares matrix of the linear part for fixed poles: rows Re then Im, columns
/// [residues…, d, e]. Column-major, `2K × (N + 2)`.
pub(crate) fn linear_system(data: &FitData, poles: &Poles) -> (Vec<f64>, Vec<f64>) {
    let k = data.len();
    let n = poles.order();
    let cols = n + 2;
    let rows = 2 * k;
    let mut a = vec![0.0; rows * cols];
    let mut b = vec![0.0; rows];
    let mut phi = Vec::with_capacity(n);
    for i in 0..k {
        let w = data.w[i];
        basis_at(data.s[i], poles, &mut phi);
        for (j, ph) in phi.iter().enumerate() {
            a[j * rows + i] = ph.re * w;
            a[j * rows + k + i] = ph.im * w;
        }
        a[n * rows + i] = w;
        a[(n + 1) * rows + k + i] = w * data.s[i].im;
        b[i] = w * data.z[i].re;
        b[k + i] = w * data.z[i].im;
    }
    (a, b)
}

/// Residues, d and e for fixed poles by weighted linear least squares (the rows of [`linear_system`],
/// streamed), and their error: the data ride along as a column after e, −(weighted data), so the
/// triangle holds both the right-hand side and the residual.
pub(crate) fn identify(data: &FitData, poles: &Poles) -> Identified {
    identify_rows(data, poles, false).0
}

/// [`identify`], and how much a Gauss–Newton step on poles and residues together could still lower the
/// cost ([`Identified::gain`]), from the same factorisation: the pole derivatives of the weighted model
/// are, per pole, combinations with the residues as coefficients of the squared basis (1/(s − a)² for a
/// real pole; 1/(s − p)² + 1/(s − p̄)² and j/(s − p)² − j/(s − p̄)² for a pair), which ride along as N more
/// columns after the data. With nonzero residues those combinations span the same space as the squared
/// basis, so the gain ‖P_J r‖² is the part of the residual r that the squared basis, taken orthogonal to
/// the residue system, can reach; a residue of zero only makes the measured gain an upper bound. The
/// gain is `None` when the residue system is rank-deficient or a squared-basis column lies within 1e-10
/// (relative) of the span of the columns before it.
pub(crate) fn identify_with_gain(data: &FitData, poles: &Poles) -> Identified {
    let (mut fit, qr, full) = identify_rows(data, poles, true);
    if full {
        fit.gain = gain_fraction(&qr, poles.order() + 2, poles.order());
    }
    fit
}

/// Streams the residue system [w·φ…, w, w·s, −w·Z] and, with `squares`, the weighted squared basis after
/// it; solves the residue system.
fn identify_rows(
    data: &FitData,
    poles: &Poles,
    squares: bool,
) -> (Identified, RowCompressor, bool) {
    let n = poles.order();
    let m = n + 2;
    let cols = if squares { m + 1 + n } else { m + 1 };
    let mut qr = RowCompressor::new(cols, 0);
    let st = qr.stride();
    let mut br = vec![0.0; n * CHUNK];
    let mut bi = vec![0.0; n * CHUNK];
    let (mut ur, mut ui) = if squares {
        (vec![0.0; n * CHUNK], vec![0.0; n * CHUNK])
    } else {
        (Vec::new(), Vec::new())
    };
    for start in (0..data.len()).step_by(CHUNK) {
        let len = CHUNK.min(data.len() - start);
        let sq = squares.then_some((&mut ur[..], &mut ui[..]));
        basis_chunk(&data.s[start..start + len], poles, &mut br, &mut bi, sq);
        // Every entry of both rows is written (so they need no zeroing), column by column.
        let w = &data.w[start..start + len];
        let blk = qr.rows_unzeroed(2 * len);
        let mut column = |col: usize, re_src: &[f64], im_src: &[f64]| {
            let points = re_src.iter().zip(im_src).zip(w);
            for (rows, ((&a, &b), &w)) in blk.chunks_exact_mut(2 * st).zip(points) {
                rows[col] = a * w;
                rows[st + col] = b * w;
            }
        };
        for j in 0..n {
            column(j, &br[j * CHUNK..][..len], &bi[j * CHUNK..][..len]);
            if squares {
                column(m + 1 + j, &ur[j * CHUNK..][..len], &ui[j * CHUNK..][..len]);
            }
        }
        for (i, rows) in blk.chunks_exact_mut(2 * st).enumerate() {
            let g = start + i;
            let (w, z) = (data.w[g], data.z[g]);
            let wz = z * w;
            rows[n] = w;
            rows[n + 1] = 0.0;
            rows[st + n] = 0.0;
            rows[st + n + 1] = w * data.s[g].im;
            rows[m] = -wz.re;
            rows[st + m] = -wz.im;
        }
    }
    qr.finish();
    let (fit, full) = Identified::solve(data, poles, &qr, m, m);
    (fit, qr, full)
}

/// The Gauss–Newton gain as a fraction of the cost from the triangle T of [A, −b, U] (A the `m` columns
/// of the residue system, solved; U the `q` squared-basis columns). In the basis of Q the residual is
/// T[m][m]·eₘ, and the parts of U orthogonal to A are the rows m… of its columns: V = [vᵀ; R_U] with
/// v = T[m][U] and R_U the triangle of U. So gain/cost = vᵀ(VᵀV)⁻¹v = a/(1 + a) with a = ‖R_U⁻ᵀv‖²
/// (VᵀV = R_UᵀR_U + vvᵀ, Sherman–Morrison).
fn gain_fraction(qr: &RowCompressor, m: usize, q: usize) -> Option<f64> {
    let u0 = m + 1;
    let mut y = vec![0.0; q];
    for j in 0..q {
        let c = u0 + j;
        let diag = qr.r(c, c);
        let norm = (0..=c).map(|i| qr.r(i, c) * qr.r(i, c)).sum::<f64>().sqrt();
        if diag.is_nan() || diag.abs() <= 1e-10 * norm {
            return None;
        }
        let mut t = qr.r(m, c);
        for (i, yi) in y[..j].iter().enumerate() {
            t -= qr.r(u0 + i, c) * yi;
        }
        y[j] = t / diag;
    }
    let a: f64 = y.iter().map(|v| v * v).sum();
    let g = a / (1.0 + a);
    g.is_finite().then_some(g)
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

/// ∂Z/∂(parameter) at normalised s for the refinement's parameters, in its order: real poles, (Re, Im)
/// per pair, residues, d, e. Each 1/(s − p) is computed once and serves both the pole's column and
/// its basis function's.
fn jacobian_row(s: Complex64, poles: &Poles, coef: &Coefficients, vals: &mut [Complex64]) {
    let nr = poles.real.len();
    let np = poles.pairs.len();
    let n = poles.order();
    let (dp, rest) = vals.split_at_mut(nr + 2 * np);
    let (basis, tail) = rest.split_at_mut(n);
    for (q, &a) in poles.real.iter().enumerate() {
        let t = recip(s - a);
        dp[q] = coef.c[q] * t * t;
        basis[q] = t;
    }
    for (q, &p) in poles.pairs.iter().enumerate() {
        let o = nr + 2 * q;
        let res = Complex64::new(coef.c[o], coef.c[o + 1]);
        let t1 = recip(s - p);
        let t2 = recip(s - p.conj());
        let a1 = res * t1 * t1;
        let a2 = res.conj() * t2 * t2;
        dp[o] = a1 + a2;
        // j·(a1 − a2), and the pair's basis t1 + t2, j·(t1 − t2) as in [`basis_into`].
        dp[o + 1] = Complex64::new(a2.im - a1.im, a1.re - a2.re);
        basis[o] = t1 + t2;
        basis[o + 1] = Complex64::new(t2.im - t1.im, t1.re - t2.re);
    }
    tail[0] = Complex64::new(1.0, 0.0);
    tail[1] = s;
}

/// The refinement stops when a Gauss–Newton step could lower the cost by at most this fraction of it.
const MIN_GAIN: f64 = 1e-5;

/// The weighted residual of a pole–residue set (Re rows, then Im rows, as in [`refine`]) and the most a
/// Gauss–Newton step could lower its cost, ‖P_J r‖² = gᵀ(JᵀJ)⁻¹g with g = Jᵀr, from one pass of Gram
/// sums of [J r] and a Cholesky factorisation of the column-scaled JᵀJ. The gain is `None` when that
/// factorisation meets a pivot below 1e-8 of its unit diagonal: the normal equations then square a
/// condition number too large to trust to a few digits, and the QR test of [`refine`] decides. Above that
/// pivot the computed gain is good to far better than the 10 % its use needs (Gram sums in f64 carry
/// relative errors near 1e-13).
fn gauss_newton_gain(
    data: &FitData,
    poles: &Poles,
    coef: &Coefficients,
) -> (Vec<f64>, Option<f64>) {
    let k = data.len();
    let nr = poles.real.len();
    let np = poles.pairs.len();
    let n = poles.order();
    let params = nr + 2 * np + n + 2;
    let mut r = vec![0.0; 2 * k];
    let mut vals = vec![Complex64::new(0.0, 0.0); params];
    let mut gram = GramAccumulator::new(params + 1);
    let lin = nr + 2 * np;
    for i in 0..k {
        let s = data.s[i];
        jacobian_row(s, poles, coef, &mut vals);
        let mut zf = Complex64::new(coef.d, 0.0) + s * coef.e;
        for (b, c) in vals[lin..lin + n].iter().zip(&coef.c) {
            zf += b * c;
        }
        let w = data.w[i];
        let v = (zf - data.z[i]) * w;
        r[i] = v.re;
        r[k + i] = v.im;
        let row = gram.row_unzeroed();
        for (x, d) in row.iter_mut().zip(&vals) {
            *x = d.re * w;
        }
        row[params] = v.re;
        let row = gram.row_unzeroed();
        for (x, d) in row.iter_mut().zip(&vals) {
            *x = d.im * w;
        }
        row[params] = v.im;
    }
    gram.finish();
    (r, scaled_cholesky_gain(&gram, params))
}

/// gᵀG⁻¹g for G the leading `p × p` block of the Gram matrix and g its column `p`, through the Cholesky
/// factor of G scaled to unit diagonal; `None` below a pivot of 1e-8 (see [`gauss_newton_gain`]).
fn scaled_cholesky_gain(gram: &GramAccumulator, p: usize) -> Option<f64> {
    let d: Vec<f64> = (0..p).map(|j| gram.get(j, j).sqrt()).collect();
    if d.iter().any(|v| !(v.is_finite() && *v > 0.0)) {
        return None;
    }
    // L row by row (lower, row-major p × p), and y = L⁻¹·ĝ alongside.
    let mut l = vec![0.0; p * p];
    let mut y = vec![0.0; p];
    for i in 0..p {
        for j in 0..=i {
            let mut v = gram.get(i, j) / (d[i] * d[j]);
            for q in 0..j {
                v -= l[i * p + q] * l[j * p + q];
            }
            if i == j {
                if v.is_nan() || v < 1e-8 {
                    return None;
                }
                l[i * p + i] = v.sqrt();
            } else {
                l[i * p + j] = v / l[j * p + j];
            }
        }
        let mut v = gram.get(i, p) / d[i];
        for q in 0..i {
            v -= l[i * p + q] * y[q];
        }
        y[i] = v / l[i * p + i];
    }
    let gain: f64 = y.iter().map(|v| v * v).sum();
    gain.is_finite().then_some(gain)
}

/// Refines poles and residues together by Levenberg–Marquardt on the weighted error (the relocation's
/// fixed point minimises a linearised error, not the error itself). Steps that would move a pole into the
/// right half-plane or change the real/pair split are rejected. Stops after a step that lowers the cost by
/// less than 0.01 % (another Jacobian would not change the fit materially). `known_gain` is the fraction of
/// the cost a Gauss–Newton step could gain at the start, when the caller measured it
/// ([`identify_with_gain`]). Returns the refined set and the number of accepted steps.
pub(crate) fn refine(
    data: &FitData,
    mut poles: Poles,
    mut coef: Coefficients,
    known_gain: Option<f64>,
    max_steps: u64,
    stop: Stop<'_>,
) -> (Poles, Coefficients, u64) {
    let k = data.len();
    let nr = poles.real.len();
    let np = poles.pairs.len();
    let n = poles.order();
    // Parameters: real poles, (Re, Im) per pair, residues c (n), d, e.
    let params = nr + 2 * np + n + 2;
    let rows = 2 * k;
    let residual = |poles: &Poles, coef: &Coefficients| -> Vec<f64> {
        let mut r = vec![0.0; rows];
        for i in 0..k {
            let v = (evaluate(data.s[i], poles, coef) - data.z[i]) * data.w[i];
            r[i] = v.re;
            r[k + i] = v.im;
        }
        r
    };
    let cost_of = |r: &[f64]| r.iter().map(|v| v * v).sum::<f64>();
    // The first test (is the fit already at its minimum?): most fits end there. When the caller has not
    // measured the gain, it runs on the normal equations: one pass of Gram sums costs a fraction of the
    // QR pass below.
    let (mut r, gain) = match known_gain {
        Some(g) if g <= MIN_GAIN => return (poles, coef, 0),
        Some(_) => (residual(&poles, &coef), None),
        None => gauss_newton_gain(data, &poles, &coef),
    };
    let mut cost = cost_of(&r);
    if gain.is_some_and(|g| g <= MIN_GAIN * cost) {
        return (poles, coef, 0);
    }
    let mut lambda: f64 = 1e-3;
    let mut accepted = 0;
    let mut vals = vec![Complex64::new(0.0, 0.0); params];
    let damping_floor: Vec<f64> = poles
        .pairs
        .iter()
        .map(|p| (-p.re / p.norm()).min(1e-3))
        .collect();
    for _ in 0..max_steps {
        // Past the deadline or cancelled: the last accepted step is the result.
        if stop.now() {
            break;
        }
        // The Jacobian streamed into its triangle with the residual as right-hand side (Q₁ᵀr), then
        // scaled by its column norms (those of the triangle: scaling columns commutes with QR); the pivoted
        // QR of that triangle then acts as one of the scaled Jacobian: Qᵀr = Q₂ᵀ·(Q₁ᵀr).
        let mut tall = RowCompressor::new(params, 1);
        for i in 0..k {
            let s = data.s[i];
            jacobian_row(s, &poles, &coef, &mut vals);
            let w = data.w[i];
            let row = tall.row();
            for (x, v) in row.iter_mut().zip(&vals) {
                *x = v.re * w;
            }
            row[params] = r[i];
            let row = tall.row();
            for (x, v) in row.iter_mut().zip(&vals) {
                *x = v.im * w;
            }
            row[params] = r[k + i];
        }
        tall.finish();
        let sp = padded(params);
        let mut tri = tall.triangle(params);
        let norms: Vec<f64> = (0..params)
            .map(|c| {
                (0..=c)
                    .map(|i| tri[i * sp + c] * tri[i * sp + c])
                    .sum::<f64>()
                    .sqrt()
                    .max(1e-300)
            })
            .collect();
        for row in tri.chunks_exact_mut(sp) {
            for (x, d) in row.iter_mut().zip(&norms) {
                *x /= d;
            }
        }
        let qr = PivotedQr::from_rows(tri, params, params, sp, RANK_TOL);
        let mut qtr = tall.qtb(0);
        let rank = qr.rank();
        qr.apply_qt(&mut qtr);
        // The undamped (Gauss–Newton) step could lower the cost by at most ‖(Qᵀr)₁‖²: when that is
        // negligible the fit is at its minimum.
        let predicted: f64 = qtr[..rank].iter().map(|v| v * v).sum();
        if predicted <= MIN_GAIN * cost {
            break;
        }
        let mut improved = false;
        let mut trials = 0;
        while lambda < 1e12 && trials < 8 {
            trials += 1;
            let arows = rank + params;
            let mut a = vec![0.0; arows * params];
            for c in 0..params {
                for i in 0..rank.min(c + 1) {
                    a[c * arows + i] = qr.r(i, c);
                }
                a[c * arows + rank + c] = lambda.sqrt();
            }
            let mut b = vec![0.0; arows];
            for i in 0..rank {
                b[i] = -qtr[i];
            }
            let v = PivotedQr::new(a, arows, params, RANK_TOL).solve(&b);
            // Undo the pivoting (and the QR's own, near-unit, column scaling).
            let mut u = vec![0.0; params];
            for (k, vk) in v.iter().enumerate() {
                let (j, sc) = qr.column_at(k);
                u[j] = vk * sc;
            }
            let delta: Vec<f64> = u.iter().zip(&norms).map(|(u, d)| u / d).collect();
            let mut trial_poles = poles.clone();
            for (q, a) in trial_poles.real.iter_mut().enumerate() {
                *a += delta[q];
            }
            for (q, p) in trial_poles.pairs.iter_mut().enumerate() {
                *p += Complex64::new(delta[nr + 2 * q], delta[nr + 2 * q + 1]);
                // Projected onto the damping floor.
                let z = damping_floor[q];
                if -p.re < z * p.norm() {
                    p.re = -z * p.im.abs() / (1.0 - z * z).sqrt();
                }
            }
            // A pole may not become sharper than it was or than Q = 500: between the sweep's points
            // nothing would stop it drifting onto the axis to fit noise.
            let stable = trial_poles.real.iter().all(|a| *a < 0.0)
                && trial_poles
                    .pairs
                    .iter()
                    .zip(&damping_floor)
                    .all(|(p, z)| p.im > 0.0 && -p.re >= z * p.norm() * (1.0 - 1e-12));
            let trial_coef = Coefficients {
                c: (0..n).map(|q| coef.c[q] + delta[nr + 2 * np + q]).collect(),
                d: coef.d + delta[nr + 2 * np + n],
                e: coef.e + delta[nr + 2 * np + n + 1],
            };
            if stable {
                let tr = residual(&trial_poles, &trial_coef);
                let tc = cost_of(&tr);
                if tc.is_finite() && tc < cost {
                    let gain = (cost - tc) / cost.max(1e-300);
                    poles = trial_poles;
                    coef = trial_coef;
                    r = tr;
                    cost = tc;
                    lambda = (lambda / 10.0).max(1e-12);
                    accepted += 1;
                    improved = gain > 1e-4;
                    break;
                }
            }
            lambda *= 10.0;
        }
        if !improved {
            break;
        }
    }
    (poles, coef, accepted)
}

/// Converts a normalised pole–residue set to the physical model (rad/s, Ω, H).
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

/// The result of vector fitting at one order, before passivity enforcement.
#[derive(Debug, Clone)]
pub struct VectorFit {
    pub model: RationalModel,
    pub rms_weighted: f64,
    /// Pole relocations run.
    pub relocations: u64,
    /// Accepted Levenberg–Marquardt refinement steps after the relocations.
    pub refinements: u64,
    /// True when the poles stopped moving (relative change below 1e-10) before the relocation limit.
    pub converged: bool,
    pub(crate) poles: Poles,
    pub(crate) coef: Coefficients,
}

/// Settings of one fixed-order vector fit.
#[derive(Debug, Clone, Copy)]
pub struct VectorFitSettings {
    /// Number of poles (real poles count one, complex pairs two).
    pub order: usize,
    pub max_relocations: u64,
}

/// Vector fitting at a fixed order. Keeps the best (lowest weighted error) of the relocation iterates.
pub fn vector_fit(
    sweep: &Sweep,
    settings: VectorFitSettings,
    control: &FitControl,
) -> Result<VectorFit, FitError> {
    validate(sweep)?;
    let data = FitData::new(&sweep.frequency_hz, &sweep.impedance_ohm, &sweep.sigma_ohm);
    vector_fit_data(&data, settings, control, None)
}

pub(crate) fn vector_fit_data(
    data: &FitData,
    settings: VectorFitSettings,
    control: &FitControl,
    deadline: Option<Instant>,
) -> Result<VectorFit, FitError> {
    let w_lo = data
        .s
        .iter()
        .fold(f64::INFINITY, |m, s| m.min(s.im))
        .max(1e-9);
    let w_hi = data.s.iter().fold(0.0f64, |m, s| m.max(s.im));
    let mut poles = starting_poles(settings.order, w_lo, w_hi);
    // The best iterate: error, poles, residues and (when measured) the Gauss–Newton gain left.
    let mut best: Option<(f64, Poles, Coefficients, Option<f64>)> = None;
    let mut relocations = 0;
    let mut converged = false;
    let mut stalls = 0;
    // Each pass factors the relocation system of the current poles once: its leading block gives their
    // residues (for the error and the best iterate), the whole gives the next poles. The poles reached by
    // a relocation are therefore judged at the start of the next pass.
    let mut last_change: Option<f64> = None;
    loop {
        if cancelled(control) {
            return Err(FitError::Cancelled);
        }
        if deadline.is_some_and(|d| Instant::now() > d) {
            break;
        }
        // The first relocations move the poles far from the starting set; the residues are only worth
        // judging from the third relocation on, or once the poles settle.
        let judge = last_change.is_some_and(|change| {
            relocations >= 3 || change <= 1e-2 || relocations >= settings.max_relocations
        });
        if !judge && relocations >= settings.max_relocations {
            break;
        }
        // Poles that moved by less than 1e-6 are most likely judged final in this pass (they are
        // fixed, or settled with the error flat): identify their residues alone first (N + 2 columns
        // instead of 2N + 3, and N more for the refinement's first test) and relocate only if the run goes
        // on.
        let identify_first = judge && last_change.is_some_and(|c| c < 1e-6);
        let (mut next, Identified { coef, rms, gain }) = if identify_first {
            (None, identify_with_gain(data, &poles))
        } else {
            relocate_and_identify(data, &poles)
        };
        if judge {
            let change = last_change.expect("judged after a relocation");
            let mut flat = false;
            if rms.is_finite() {
                flat = best
                    .as_ref()
                    .is_some_and(|(b, ..)| (rms - *b).abs() <= 1e-6 * *b);
                let improved = best.as_ref().is_none_or(|(b, ..)| rms < *b * (1.0 - 1e-3));
                if improved {
                    stalls = 0;
                } else {
                    stalls += 1;
                }
                if best.as_ref().is_none_or(|(b, ..)| rms <= *b) {
                    best = Some((rms, poles.clone(), coef, gain));
                }
            }
            // Poles fixed to 1e-10, or settled to 1e-6 with the error no longer changing (noisy data).
            if change < 1e-10 || (change < 1e-6 && flat) {
                converged = true;
                break;
            }
            // Noisy data keep the poles wandering at the noise level: stop at the first relocation that
            // no longer improves the error when the poles only move by less than 10 % (the refinement
            // that follows minimises the error itself), otherwise once it has not improved for three.
            if stalls >= 3 || (stalls >= 1 && change < 0.1) {
                converged = true;
                break;
            }
        }
        if relocations >= settings.max_relocations {
            break;
        }
        if identify_first {
            next = relocate_and_identify(data, &poles).0;
        }
        let Some(next) = next else {
            break;
        };
        relocations += 1;
        last_change = Some(pole_change(&poles, &next, w_lo));
        poles = next;
    }
    let (best_rms, poles, coef, gain) = match best {
        Some(b) => b,
        None => {
            let Identified { coef, rms, gain } = identify(data, &poles);
            (rms, poles, coef, gain)
        }
    };
    let stop = Stop { control, deadline };
    let (poles, coef, refinements) = refine(data, poles, coef, gain, 40, stop);
    if stop.cancelled() {
        return Err(FitError::Cancelled);
    }
    // Without an accepted step the model is the one whose error was just measured.
    let rms = if refinements == 0 {
        best_rms
    } else {
        rms_weighted(data, &poles, &coef)
    };
    if !rms.is_finite() || coef.c.iter().any(|c| !c.is_finite()) {
        return Err(FitError::NonFinite(format!(
            "vector fitting at order {} gave a non-finite model",
            settings.order
        )));
    }
    Ok(VectorFit {
        model: to_model(data.omega0, &poles, &coef),
        rms_weighted: rms,
        relocations,
        refinements,
        converged,
        poles,
        coef,
    })
}

fn cancelled(control: &FitControl) -> bool {
    control
        .cancel
        .as_ref()
        .is_some_and(|c| c.load(Ordering::Relaxed))
}

/// What ends a rational fit early, checked inside every stage's loop (relocation, refinement,
/// passivity enforcement): the caller's cancel flag and the fit's deadline.
#[derive(Clone, Copy)]
pub(crate) struct Stop<'a> {
    pub control: &'a FitControl,
    pub deadline: Option<Instant>,
}

impl Stop<'_> {
    /// A stop that never fires.
    #[cfg(test)]
    pub(crate) const NEVER: Stop<'static> = Stop {
        control: &NO_CONTROL,
        deadline: None,
    };

    pub(crate) fn cancelled(&self) -> bool {
        cancelled(self.control)
    }

    pub(crate) fn expired(&self) -> bool {
        self.deadline.is_some_and(|d| Instant::now() > d)
    }

    /// Cancelled or past the deadline: the current stage ends with what it has.
    pub(crate) fn now(&self) -> bool {
        self.cancelled() || self.expired()
    }
}

#[cfg(test)]
static NO_CONTROL: FitControl = FitControl {
    cancel: None,
    progress: None,
};

/// Largest relative move of any pole, or ∞ when the real/pair split changed. Moves are measured against
/// the pole's magnitude but at least `floor` (the bottom of the band): a real pole far below the band may
/// wander by a large fraction of itself without changing the fit.
fn pole_change(old: &Poles, new: &Poles, floor: f64) -> f64 {
    if old.real.len() != new.real.len() || old.pairs.len() != new.pairs.len() {
        return f64::INFINITY;
    }
    let mut worst = 0.0f64;
    for (a, b) in old.real.iter().zip(&new.real) {
        worst = worst.max((a - b).abs() / b.abs().max(floor).max(1e-300));
    }
    for (a, b) in old.pairs.iter().zip(&new.pairs) {
        worst = worst.max((a - b).norm() / b.norm().max(floor).max(1e-300));
    }
    worst
}

fn validate(sweep: &Sweep) -> Result<(), FitError> {
    let n = sweep.frequency_hz.len();
    if n < 20 {
        return Err(FitError::TooFewPoints(n));
    }
    if sweep.impedance_ohm.len() != n || sweep.sigma_ohm.len() != n {
        return Err(FitError::InvalidOptions(format!(
            "the sweep has {n} frequencies but {} impedances and {} uncertainties",
            sweep.impedance_ohm.len(),
            sweep.sigma_ohm.len()
        )));
    }
    for (i, f) in sweep.frequency_hz.iter().enumerate() {
        if !(f.is_finite() && *f >= 0.0) {
            return Err(FitError::InvalidOptions(format!(
                "frequency {i} is {f}: frequencies must be finite and not negative"
            )));
        }
        if i > 0 && *f <= sweep.frequency_hz[i - 1] {
            return Err(FitError::InvalidOptions(format!(
                "frequency {i} ({f} Hz) does not increase"
            )));
        }
    }
    if let Some(i) = sweep
        .impedance_ohm
        .iter()
        .position(|z| !(z.re.is_finite() && z.im.is_finite()))
    {
        return Err(FitError::InvalidOptions(format!(
            "impedance point {i} is not finite"
        )));
    }
    if let Some(i) = sweep
        .sigma_ohm
        .iter()
        .position(|s| !(s.is_finite() && *s > 0.0))
    {
        return Err(FitError::InvalidOptions(format!(
            "uncertainty of point {i} is {}: it must be finite and positive",
            sweep.sigma_ohm[i]
        )));
    }
    Ok(())
}

/// One order tried by [`fit_rational`].
struct Tried {
    order: usize,
    fit: VectorFit,
    /// The passive model and its weighted error, or why enforcement failed.
    passive: Result<(RationalModel, f64), String>,
}

/// Vector fitting with automatic order selection and passivity enforcement, giving the shared report.
///
/// Orders grow by one complex pair (2, 4, 6, …) until the passive model's weighted RMS error reaches
/// `rational_target_rms_weighted`, stops improving (less than 2 % better than the best for two orders in a
/// row), or `rational_max_order` / the time limit is reached. The chosen order is the lowest that meets
/// the target, otherwise the lowest within 5 % of the best error. Every candidate is made passive by
/// [`passivity`](crate::fit::passivity); one that cannot be within the allowance is not chosen, and when
/// none can, the fit fails with [`FitError::NotPassive`].
pub fn fit_rational(
    sweep: &Sweep,
    options: &FitOptions,
    control: &FitControl,
) -> Result<FitReport, FitError> {
    validate(sweep)?;
    check_options(options, sweep.frequency_hz.len())?;
    let started = Instant::now();
    let deadline = started + std::time::Duration::from_secs_f64(options.time_limit_s);
    let data = FitData::new(&sweep.frequency_hz, &sweep.impedance_ohm, &sweep.sigma_ohm);
    let orders: Vec<usize> = match options.rational_order {
        Some(n) => vec![n],
        None => (2..=options.rational_max_order).step_by(2).collect(),
    };
    let mut tried: Vec<Tried> = Vec::new();
    let mut iterations = 0u64;
    let mut timed_out = false;
    let mut best_rms = f64::INFINITY;
    let mut no_gain = 0;
    for (idx, &order) in orders.iter().enumerate() {
        if Instant::now() > deadline {
            timed_out = true;
            break;
        }
        let settings = VectorFitSettings {
            order,
            max_relocations: options.rational_max_relocations,
        };
        let fit = match vector_fit_data(&data, settings, control, Some(deadline)) {
            Ok(f) => f,
            Err(FitError::Cancelled) => return Err(FitError::Cancelled),
            Err(e) if tried.is_empty() && idx + 1 == orders.len() => return Err(e),
            Err(_) => continue,
        };
        iterations += fit.relocations;
        let stop = Stop {
            control,
            deadline: Some(deadline),
        };
        let passive = passive_model(&data, &fit, options.passivity_rms_allowance, stop);
        if stop.cancelled() {
            return Err(FitError::Cancelled);
        }
        if stop.expired() {
            timed_out = true;
        }
        let rms = passive.as_ref().map_or(f64::INFINITY, |p| p.1);
        // Progress is judged on the fit before enforcement: an order that cannot be made passive within
        // the bound may be followed by one that can.
        let naive_rms = fit.rms_weighted;
        tried.push(Tried {
            order,
            fit,
            passive,
        });
        if let Some(p) = &control.progress {
            p((idx + 1) as f64 / orders.len() as f64);
        }
        if rms <= options.rational_target_rms_weighted {
            break;
        }
        if naive_rms < best_rms * 0.98 {
            no_gain = 0;
        } else {
            no_gain += 1;
        }
        best_rms = best_rms.min(naive_rms);
        let any_passive = tried.iter().any(|t| t.passive.is_ok());
        if (no_gain >= 2 && any_passive) || no_gain >= 4 {
            break;
        }
    }
    // The allowance keeps enforcement from reshaping a model far from what the data support, but the
    // enforced model's error against the data is the measure that counts: when no order within the
    // allowance reaches the target (none at all, or only ones well above the noise), the orders that
    // failed only for the allowance are enforced again without it, and one of them is kept where it is
    // clearly closer to the data (a tenth below the best within the allowance) — with a warning
    // saying so. A sweep whose data are passive is never refused for the allowance alone.
    let best_within = tried
        .iter()
        .filter_map(|t| t.passive.as_ref().ok().map(|p| p.1))
        .fold(f64::INFINITY, f64::min);
    let mut beyond_allowance: Vec<usize> = Vec::new();
    if best_within > options.rational_target_rms_weighted {
        let stop = Stop {
            control,
            deadline: Some(deadline),
        };
        for t in tried.iter_mut() {
            if !t
                .passive
                .as_ref()
                .is_err_and(|e| e.contains("beyond the allowed bound"))
            {
                continue;
            }
            if let Ok(p) = passive_model(&data, &t.fit, f64::INFINITY, stop)
                && p.1 < 0.9 * best_within
            {
                t.passive = Ok(p);
                beyond_allowance.push(t.order);
            }
        }
        if stop.cancelled() {
            return Err(FitError::Cancelled);
        }
    }
    let passive: Vec<&Tried> = tried.iter().filter(|t| t.passive.is_ok()).collect();
    let rms_of = |t: &Tried| t.passive.as_ref().map_or(f64::INFINITY, |p| p.1);
    let best = passive
        .iter()
        .map(|t| rms_of(t))
        .fold(f64::INFINITY, f64::min);
    let chosen = passive
        .iter()
        .find(|t| rms_of(t) <= options.rational_target_rms_weighted)
        .or_else(|| passive.iter().find(|t| rms_of(t) <= best * 1.05))
        .map(|t| t.order);
    let Some(chosen_order) = chosen else {
        let reasons: Vec<String> = tried
            .iter()
            .map(|t| {
                format!(
                    "order {}: {}",
                    t.order,
                    t.passive.as_ref().err().map_or("", |s| s.as_str())
                )
            })
            .collect();
        if tried.is_empty() {
            return Err(FitError::NonFinite(
                "vector fitting produced no model at any order".into(),
            ));
        }
        return Err(FitError::NotPassive(reasons.join("; ")));
    };
    let n_data = 2 * sweep.frequency_hz.len();
    let candidates = tried
        .iter()
        .map(|t| {
            let parameters = 2 * t.order + 2;
            // A candidate that could not be made passive is listed with its error before enforcement.
            let rms = t.passive.as_ref().map_or(t.fit.rms_weighted, |p| p.1);
            let cost = rms * rms * n_data as f64;
            Candidate {
                label: format!(
                    "rational order {} ({} real, {} pairs){}",
                    t.order,
                    t.fit.poles.real.len(),
                    t.fit.poles.pairs.len(),
                    if t.passive.is_ok() {
                        ""
                    } else {
                        ", not passive"
                    }
                ),
                parameters,
                cost,
                bic: cost + parameters as f64 * (n_data as f64).ln(),
                chosen: t.order == chosen_order,
            }
        })
        .collect();
    let chosen = tried
        .iter()
        .find(|t| t.order == chosen_order)
        .expect("the chosen order was tried");
    let fallback_warning = beyond_allowance.contains(&chosen.order).then(|| {
        format!(
            "the model shown needed more than the allowed error increase ({:.0} %) to become \
             passive, and is still closer to the data than any order within it: order {}, weighted \
             RMS {:.3} before enforcement and {:.3} after",
            100.0 * options.passivity_rms_allowance,
            chosen.order,
            chosen.fit.rms_weighted,
            rms_of(chosen)
        )
    });
    let (model, _) = chosen
        .passive
        .clone()
        .expect("only passive candidates are chosen");
    let quality = Quality {
        parameters: 2 * chosen_order + 2,
        ..crate::fit::derived::quality(&model, sweep)
    };
    let termination = if timed_out {
        Termination::TimeLimit
    } else if chosen.fit.converged {
        Termination::Converged
    } else {
        Termination::MaxIterations
    };
    let band_hz = [
        sweep.frequency_hz[0],
        *sweep.frequency_hz.last().expect("validated non-empty"),
    ];
    // Resonances and L/Q come from the rational model itself; its low-frequency inductance is exact
    // (dZ/ds at s = 0); it has no Cp or Rp element to compare with.
    let derived = crate::fit::derived::derived_figures(
        &model,
        band_hz,
        &options.report_frequencies_hz,
        &crate::fit::derived::KnownElements {
            l0_h: Some(model.dc_inductance_h()).filter(|l| l.is_finite() && *l > 0.0),
            cp_f: None,
            rp_ohm: None,
        },
    );
    let assessment = crate::fit::assess::assess(&model, sweep, 2 * chosen_order + 2);
    Ok(FitReport {
        engine_version: crate::fit::ENGINE_VERSION.to_string(),
        model: FittedModel::Rational(model),
        uncertainty: None,
        not_identifiable: Vec::new(),
        correlation: None,
        derived,
        quality,
        assessment,
        warnings: {
            let mut w = crate::fit::lumped::report_warnings(sweep, options);
            w.extend(fallback_warning);
            w
        },
        termination,
        iterations,
        candidates,
        band_hz,
        material: None,
    })
}

/// Enforces passivity on one order's fit within `allowance` and checks the result as every exported
/// model is checked: the passive model and its weighted RMS error, or why there is none.
fn passive_model(
    data: &FitData,
    fit: &VectorFit,
    allowance: f64,
    stop: Stop<'_>,
) -> Result<(RationalModel, f64), String> {
    crate::fit::passivity::enforce(data, &fit.poles, &fit.coef, allowance, stop)
        .map(|e| (to_model(data.omega0, &fit.poles, &e.coef), e.rms_after))
        .map_err(|e| e.to_string())
        .and_then(|(model, rms)| {
            // The same test as every exported model gets, on the model as it is reported: a dip a
            // few hertz wide beside a sharp pole can pass in the fit's scaled coordinates and fail
            // in these by rounding.
            let check = crate::fit::passivity::check_passivity(&model);
            match check.violations.first() {
                _ if check.passive => Ok((model, rms)),
                Some(v) => Err(format!(
                    "after enforcement Re Z is still {:.3e} Ω at {:.6e} Hz",
                    v.worst_re_z_ohm, v.worst_hz
                )),
                None => Err("after enforcement the model is still not positive-real".to_string()),
            }
        })
}

fn check_options(options: &FitOptions, points: usize) -> Result<(), FitError> {
    options.validate()?;
    let max_order = options.rational_order.unwrap_or(options.rational_max_order);
    if max_order == 0 {
        return Err(FitError::InvalidOptions(
            "the rational order must be at least 1".into(),
        ));
    }
    // 2K real equations must exceed the 2N + 3 unknowns of the relocation system.
    if 2 * max_order + 3 > 2 * points {
        return Err(FitError::InvalidOptions(format!(
            "a rational model of order {max_order} needs more than {points} points"
        )));
    }
    if !(options.time_limit_s.is_finite() && options.time_limit_s > 0.0) {
        return Err(FitError::InvalidOptions(
            "time_limit_s must be positive".into(),
        ));
    }
    if !(options.passivity_rms_allowance.is_finite() && options.passivity_rms_allowance >= 0.0) {
        return Err(FitError::InvalidOptions(
            "passivity_rms_allowance must be a non-negative fraction".into(),
        ));
    }
    if options.rational_max_relocations == 0 {
        return Err(FitError::InvalidOptions(
            "rational_max_relocations must be at least 1".into(),
        ));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn exact_sweep() -> Sweep {
        // Synthetic (no source): (Rs + sL) ‖ Cp ‖ Rp, a rational function with one pole pair.
        let (l, rs, cp, rp) = (10e-6, 0.1, 5e-12, 20e3);
        let f: Vec<f64> = (0..401)
            .map(|i| 1e4 * (1e9f64 / 1e4).powf(i as f64 / 400.0))
            .collect();
        let z: Vec<Complex64> = f
            .iter()
            .map(|f| {
                let s = Complex64::new(0.0, 2.0 * PI * f);
                (1.0 / (rs + s * l) + s * cp + 1.0 / rp).inv()
            })
            .collect();
        let sigma = z.iter().map(|z| 1e-3 * z.norm()).collect();
        Sweep {
            frequency_hz: f,
            impedance_ohm: z,
            sigma_ohm: sigma,
            method: crate::sweep::Method::Direct,
            z0_ohm: 50.0,
            dc_reading: None,
            warnings: Vec::new(),
        }
    }

    #[test]
    fn exact_second_order_data_give_their_pole_pair() {
        let fit = vector_fit(
            &exact_sweep(),
            VectorFitSettings {
                order: 2,
                max_relocations: 30,
            },
            &FitControl::default(),
        )
        .unwrap();
        assert_eq!(fit.model.complex_poles.len(), 1);
        let p = fit.model.complex_poles[0].pole_rad_per_s / (2.0 * PI);
        assert!((p.re + 0.79657e6).abs() < 0.00001e6, "{p}");
        assert!((p.im - 22.49386e6).abs() < 0.00001e6, "{p}");
        assert!(fit.rms_weighted < 1e-6, "{}", fit.rms_weighted);
    }

    /// The exact sweep with a deterministic ±0.1 % ripple (synthetic, no source), so that no pole set
    /// fits it exactly.
    fn rippled_data() -> FitData {
        let sw = exact_sweep();
        let z: Vec<Complex64> = sw
            .impedance_ohm
            .iter()
            .enumerate()
            .map(|(i, z)| {
                z * Complex64::new(
                    1.0 + 1e-3 * (i as f64 * 0.7).sin(),
                    1e-3 * (i as f64 * 1.3).cos(),
                )
            })
            .collect();
        FitData::new(&sw.frequency_hz, &z, &sw.sigma_ohm)
    }

    #[test]
    fn the_error_read_off_the_triangle_is_the_error_of_the_identified_residues() {
        let data = rippled_data();
        for poles in [starting_poles(4, 1e-5, 1.0), starting_poles(3, 1e-5, 1.0)] {
            let alone = identify(&data, &poles);
            let (_, shared) = relocate_and_identify(&data, &poles);
            let measured = rms_weighted(&data, &poles, &alone.coef);
            for fit in [&alone, &shared] {
                assert!(
                    (fit.rms - measured).abs() <= 1e-9 * measured,
                    "{} vs {measured}",
                    fit.rms
                );
            }
            for (a, b) in alone.coef.c.iter().zip(&shared.coef.c) {
                assert!((a - b).abs() <= 1e-8 * a.abs().max(1e-3), "{a} vs {b}");
            }
        }
    }

    #[test]
    fn the_refinement_takes_no_step_once_cancelled_or_past_its_deadline() {
        // Starting poles are far from the minimum: unhindered, the refinement takes steps.
        let data = rippled_data();
        let poles = starting_poles(4, 1e-5, 1.0);
        let coef = identify(&data, &poles).coef;
        let (.., free) = refine(&data, poles.clone(), coef.clone(), None, 40, Stop::NEVER);
        assert!(free > 0, "the refinement should move these poles");
        let flag = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(true));
        let control = FitControl {
            cancel: Some(flag),
            progress: None,
        };
        let cancelled = Stop {
            control: &control,
            deadline: None,
        };
        let (p, c, steps) = refine(&data, poles.clone(), coef.clone(), None, 40, cancelled);
        assert_eq!((steps, &p, &c), (0, &poles, &coef));
        let expired = Stop {
            control: &FitControl::default(),
            deadline: Some(Instant::now() - std::time::Duration::from_millis(1)),
        };
        let (.., steps) = refine(&data, poles, coef, None, 40, expired);
        assert_eq!(steps, 0);
    }

    #[test]
    fn a_time_limit_ends_a_high_order_fit_as_such() {
        // The same order-60 fit (about 1 s unhindered here) with a 0.1 s limit: it reports the limit,
        // as a model marked TimeLimit or as no passive model "after the time limit". The time it took
        // is printed, not asserted.
        let sweep = rippled_series_sweep();
        let options = FitOptions {
            family: crate::fit::ModelFamily::Rational,
            rational_order: Some(crate::fit::MAX_RATIONAL_ORDER),
            rational_max_relocations: 1000,
            time_limit_s: 0.1,
            ..FitOptions::default()
        };
        let started = Instant::now();
        let result = fit_rational(&sweep, &options, &FitControl::default());
        eprintln!(
            "order-60 fit with a 0.1 s limit took {:?}",
            started.elapsed()
        );
        match result {
            Ok(report) => assert_eq!(report.termination, Termination::TimeLimit),
            Err(FitError::NotPassive(why)) => assert!(why.contains("time limit"), "{why}"),
            Err(other) => panic!("{other}"),
        }
    }

    /// Synthetic (no source): a rippled series R-L on 4000 points, so order 60 runs for about a second.
    fn rippled_series_sweep() -> Sweep {
        let k = 4000;
        let f: Vec<f64> = (0..k)
            .map(|i| 1e3 * (1e6f64).powf(i as f64 / (k - 1) as f64))
            .collect();
        let z: Vec<Complex64> = f
            .iter()
            .enumerate()
            .map(|(i, f)| {
                let s = Complex64::new(0.0, 2.0 * PI * f);
                (s * 1e-5 + 0.1) * Complex64::new(1.0 + 1e-2 * (i as f64 * 0.37).sin(), 0.0)
            })
            .collect();
        Sweep {
            sigma_ohm: z.iter().map(|z| 1e-3 * z.norm()).collect(),
            frequency_hz: f,
            impedance_ohm: z,
            ..exact_sweep()
        }
    }

    #[test]
    fn a_cancel_during_a_high_order_fit_ends_it() {
        // The order-60 fit above runs for about a second; the flag is raised from another thread after
        // it started, and the fit must answer Cancelled (not a model). How long it took after the flag
        // is printed, not asserted.
        let model_sweep = rippled_series_sweep();
        let flag = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
        let control = FitControl {
            cancel: Some(flag.clone()),
            progress: None,
        };
        let options = FitOptions {
            family: crate::fit::ModelFamily::Rational,
            rational_order: Some(crate::fit::MAX_RATIONAL_ORDER),
            rational_max_relocations: 1000,
            time_limit_s: 3600.0,
            ..FitOptions::default()
        };
        let raiser = std::thread::spawn(move || {
            std::thread::sleep(std::time::Duration::from_millis(50));
            flag.store(true, Ordering::SeqCst);
            Instant::now()
        });
        let result = fit_rational(&model_sweep, &options, &control);
        let ended = Instant::now();
        let raised = raiser.join().unwrap();
        eprintln!(
            "order-60 fit ended {:?} after the cancel flag",
            ended.saturating_duration_since(raised)
        );
        assert_eq!(result.err(), Some(FitError::Cancelled));
    }

    /// ‖P_J r‖² by pivoted QR of the whole weighted Jacobian.
    fn qr_gain(data: &FitData, poles: &Poles, coef: &Coefficients, r: &[f64]) -> f64 {
        let n = poles.order();
        let params = poles.real.len() + 2 * poles.pairs.len() + n + 2;
        let k = data.len();
        let mut a = vec![0.0; 2 * k * params];
        let mut vals = vec![Complex64::new(0.0, 0.0); params];
        for i in 0..k {
            jacobian_row(data.s[i], poles, coef, &mut vals);
            for (j, v) in vals.iter().enumerate() {
                a[j * 2 * k + i] = v.re * data.w[i];
                a[j * 2 * k + k + i] = v.im * data.w[i];
            }
        }
        let qr = PivotedQr::new(a, 2 * k, params, RANK_TOL);
        let mut qtr = r.to_vec();
        qr.apply_qt(&mut qtr);
        qtr[..qr.rank()].iter().map(|v| v * v).sum()
    }

    /// A pair near the data's own (−0.000797 + 0.022494j on this axis) and a real pole, off their optimum:
    /// a well-posed Jacobian.
    fn near_poles() -> Poles {
        Poles {
            real: vec![-0.3],
            pairs: vec![Complex64::new(-0.0009, 0.0227)],
        }
    }

    #[test]
    fn the_normal_equation_gain_is_the_qr_gain_or_declines() {
        let data = rippled_data();
        let poles = near_poles();
        let coef = identify(&data, &poles).coef;
        let (r, gain) = gauss_newton_gain(&data, &poles, &coef);
        let direct = qr_gain(&data, &poles, &coef, &r);
        let gain = gain.expect("a well-posed Jacobian");
        assert!(
            direct > 0.0 && (gain - direct).abs() <= 1e-6 * direct,
            "{gain} vs {direct}"
        );
        let measured = rms_weighted(&data, &poles, &coef);
        let cost: f64 = r.iter().map(|v| v * v).sum();
        let from_pass = (cost / (2 * data.len()) as f64).sqrt();
        assert!(
            (from_pass - measured).abs() <= 1e-12 * measured,
            "{from_pass} vs {measured}"
        );
        // The same pair twice: the Jacobian has dependent columns, and the normal equations decline.
        let twice = Poles {
            real: vec![],
            pairs: vec![poles.pairs[0], poles.pairs[0]],
        };
        let coef = Coefficients {
            c: vec![1e-3, 2e-3, 1e-3, 2e-3],
            d: 0.0,
            e: 0.0,
        };
        assert_eq!(gauss_newton_gain(&data, &twice, &coef).1, None);
    }

    #[test]
    fn the_gain_read_off_the_identify_triangle_is_the_qr_gain() {
        let data = rippled_data();
        // Off the optimum (as above) and at a relocation's fixed point, where the gain is small; then a
        // real-pole-only set.
        let near = near_poles();
        let mut settled = near.clone();
        for _ in 0..20 {
            settled = relocate_and_identify(&data, &settled).0.expect("poles");
        }
        let reals = Poles {
            real: vec![-0.01, -0.2],
            pairs: vec![],
        };
        for poles in [near, settled, reals] {
            let fit = identify_with_gain(&data, &poles);
            let plain = identify(&data, &poles);
            // The extra columns leave the residue system's triangle as it was.
            assert_eq!(fit.coef, plain.coef);
            assert_eq!(fit.rms, plain.rms);
            let (r, _) = gauss_newton_gain(&data, &poles, &fit.coef);
            let cost: f64 = r.iter().map(|v| v * v).sum();
            let direct = qr_gain(&data, &poles, &fit.coef, &r) / cost;
            let gain = fit.gain.expect("a well-posed Jacobian");
            assert!(
                direct > 0.0 && (gain - direct).abs() <= 1e-6 * direct,
                "{gain} vs {direct}"
            );
        }
        // The same pair twice: the residue system is rank-deficient and no gain is read off.
        let twice = Poles {
            real: vec![],
            pairs: vec![Complex64::new(-0.0009, 0.0227); 2],
        };
        assert_eq!(identify_with_gain(&data, &twice).gain, None);
    }
}
