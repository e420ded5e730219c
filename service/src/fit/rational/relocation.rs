//! Pole relocation (the relaxed vector-fitting step) and residue identification: the tall systems are
//! streamed into a [`RowCompressor`] and solved on their triangle; the starting poles and the measure of
//! how far a relocation moved them.

use super::basis::{
    CHUNK, Coefficients, FitData, Poles, RANK_TOL, basis_at, basis_chunk, rms_weighted,
};
use crate::fit::linalg::{PivotedQr, RowCompressor, padded, rational_zeros};
use num_complex::Complex64;

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

/// Largest relative move of any pole, or ∞ when the real/pair split changed. Moves are measured against
/// the pole's magnitude but at least `floor` (the bottom of the band): a real pole far below the band may
/// wander by a large fraction of itself without changing the fit.
pub(super) fn pole_change(old: &Poles, new: &Poles, floor: f64) -> f64 {
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
