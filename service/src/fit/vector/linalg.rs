//! Small dense linear algebra for the rational fit: Householder QR with column pivoting for least squares
//! (never the normal equations), and the zeros of a pole–residue sum as eigenvalues of a real matrix.

use nalgebra::{DMatrix, Schur};
use num_complex::Complex64;

/// A column-major `rows × cols` real matrix factored as `A·S·P = Q·R` (S: unit-norm column scaling, P: column
/// pivoting). The Householder vectors stay in the lower part of `a`, R in the upper part.
pub(crate) struct PivotedQr {
    rows: usize,
    cols: usize,
    a: Vec<f64>,
    /// Householder scalars: H_k = I − tau_k·v_k·v_kᵀ, v_k stored in column k from row k down.
    tau: Vec<f64>,
    /// Diagonal of R.
    r_diag: Vec<f64>,
    /// perm[k] = original column at position k.
    perm: Vec<usize>,
    scale: Vec<f64>,
    rank: usize,
}

impl PivotedQr {
    /// Factors `a` (column-major, `rows × cols`, consumed). Columns whose pivot falls below
    /// `rel_tol · |R₀₀|` are treated as beyond the numerical rank.
    pub(crate) fn new(a: Vec<f64>, rows: usize, cols: usize, rel_tol: f64) -> PivotedQr {
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: the processor supports AVX2, checked just above.
            return unsafe { Self::factor_avx2(a, rows, cols, rel_tol) };
        }
        Self::factor(a, rows, cols, rel_tol)
    }

    /// [`Self::factor`] compiled for AVX2 (same arithmetic, four lanes per instruction).
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn factor_avx2(a: Vec<f64>, rows: usize, cols: usize, rel_tol: f64) -> PivotedQr {
        Self::factor(a, rows, cols, rel_tol)
    }

    #[inline(always)]
    fn factor(mut a: Vec<f64>, rows: usize, cols: usize, rel_tol: f64) -> PivotedQr {
        debug_assert_eq!(a.len(), rows * cols);
        let mut scale = vec![1.0; cols];
        for (j, sc) in scale.iter_mut().enumerate() {
            let col = &mut a[j * rows..(j + 1) * rows];
            let n = norm(col);
            if n > 0.0 && n.is_finite() {
                *sc = 1.0 / n;
                let inv = 1.0 / n;
                col.iter_mut().for_each(|v| *v *= inv);
            }
        }
        let mut perm: Vec<usize> = (0..cols).collect();
        let mut norms2: Vec<f64> = (0..cols)
            .map(|j| dot(&a[j * rows..(j + 1) * rows], &a[j * rows..(j + 1) * rows]))
            .collect();
        let mut ref_norms2 = norms2.clone();
        let steps = rows.min(cols);
        let mut tau = vec![0.0; steps];
        let mut r_diag = vec![0.0; steps];
        for k in 0..steps {
            // Pivot: the remaining column of largest norm.
            let p = (k..cols)
                .max_by(|&i, &j| norms2[i].total_cmp(&norms2[j]))
                .unwrap_or(k);
            if p != k {
                let (left, right) = a.split_at_mut(p * rows);
                left[k * rows..(k + 1) * rows].swap_with_slice(&mut right[..rows]);
                perm.swap(k, p);
                norms2.swap(k, p);
                ref_norms2.swap(k, p);
            }
            let (head, tail) = a.split_at_mut((k + 1) * rows);
            let v = &mut head[k * rows + k..(k + 1) * rows];
            let xnorm = norm(v);
            if xnorm == 0.0 || !xnorm.is_finite() {
                tau[k] = 0.0;
                r_diag[k] = 0.0;
                continue;
            }
            let alpha = if v[0] > 0.0 { -xnorm } else { xnorm };
            v[0] -= alpha;
            let vtv = dot(v, v);
            let t = if vtv > 0.0 { 2.0 / vtv } else { 0.0 };
            tau[k] = t;
            r_diag[k] = alpha;
            // Apply the reflector to the trailing columns, four at a time so v is read once per group.
            let len = rows - k;
            let mut chunks = tail.chunks_exact_mut(rows);
            let mut j = k + 1;
            loop {
                let group: Vec<&mut [f64]> = chunks.by_ref().take(4).collect();
                if group.is_empty() {
                    break;
                }
                let mut group: Vec<&mut [f64]> = group.into_iter().map(|c| &mut c[k..]).collect();
                reflect_group_portable(v, t, &mut group, len);
                for col in group.iter() {
                    // Downdate the remaining norm; recompute when cancellation has eaten its accuracy.
                    norms2[j] -= col[0] * col[0];
                    if norms2[j] < 1e-8 * ref_norms2[j] {
                        norms2[j] = dot(&col[1..], &col[1..]);
                        ref_norms2[j] = norms2[j];
                    } else {
                        norms2[j] = norms2[j].max(0.0);
                    }
                    j += 1;
                }
            }
        }
        let r00 = r_diag.first().map_or(0.0, |r| r.abs());
        let rank = r_diag
            .iter()
            .take_while(|r| r.abs() > rel_tol * r00 && r.is_finite())
            .count();
        PivotedQr {
            rows,
            cols,
            a,
            tau,
            r_diag,
            perm,
            scale,
            rank,
        }
    }

    pub(crate) fn rank(&self) -> usize {
        self.rank
    }

    /// Overwrites `b` (length `rows`) with Qᵀ·b.
    pub(crate) fn apply_qt(&self, b: &mut [f64]) {
        let m = self.rows;
        for k in 0..self.tau.len() {
            if self.tau[k] == 0.0 {
                continue;
            }
            let v = &self.a[k * m + k..(k + 1) * m];
            let bk = &mut b[k..m];
            let f = self.tau[k] * dot(v, bk);
            axpy(-f, v, bk);
        }
    }

    /// R[i][j] for i < j (upper part) or the diagonal.
    pub(crate) fn r(&self, i: usize, j: usize) -> f64 {
        if i == j {
            self.r_diag[i]
        } else {
            self.a[j * self.rows + i]
        }
    }

    /// Least-squares solution of A·x ≈ b in the original columns and units; columns beyond the rank get 0.
    pub(crate) fn solve(&self, b: &[f64]) -> Vec<f64> {
        let mut qb = b.to_vec();
        self.apply_qt(&mut qb);
        let z = self.back_substitute(&qb[..self.rank]);
        self.unpermute(&z)
    }

    /// Solves R[..rank, ..rank]·z = y.
    pub(crate) fn back_substitute(&self, y: &[f64]) -> Vec<f64> {
        let r = self.rank;
        let mut z = y[..r].to_vec();
        for i in (0..r).rev() {
            let mut s = z[i];
            for (j, zj) in z.iter().enumerate().take(r).skip(i + 1) {
                s -= self.r(i, j) * zj;
            }
            z[i] = s / self.r_diag[i];
        }
        z
    }

    /// Maps pivoted, scaled coordinates z (length ≤ cols; missing entries are 0) back to x.
    pub(crate) fn unpermute(&self, z: &[f64]) -> Vec<f64> {
        let mut x = vec![0.0; self.cols];
        for (k, zk) in z.iter().enumerate() {
            let j = self.perm[k];
            x[j] = zk * self.scale[j];
        }
        x
    }

    /// The original column index and scale at pivoted position k.
    pub(crate) fn column_at(&self, k: usize) -> (usize, f64) {
        let j = self.perm[k];
        (j, self.scale[j])
    }
}

/// Rows eliminated per pass of [`compress`]: a block of this many rows and the triangle so far stay in the
/// first-level cache (20 KB at 20 columns).
const BLOCK_ROWS: usize = 128;

/// Reduces the tall least-squares problem `A·x ≈ b` (column-major `rows × cols`, rows ≫ cols) to the square
/// `R·x ≈ (Qᵀb)[..cols]`, `A = Q·R`, by unpivoted Householder QR taken one block of rows at a time: each
/// block is eliminated against the triangle of the blocks before it, so the working set stays in cache and
/// each element of A is read once instead of once per reflector. R has the column norms and singular values
/// of A, so a [`PivotedQr`] of R decides the rank as one of A would, and the least-squares solutions agree
/// (‖A·x − b‖² = ‖R·x − (Qᵀb)[..cols]‖² + a constant). Returns R (column-major `cols × cols`) and, per
/// right-hand side, the first `cols` entries of Qᵀb.
pub(crate) fn compress(
    a: &[f64],
    rows: usize,
    cols: usize,
    rhs: &[&[f64]],
) -> (Vec<f64>, Vec<Vec<f64>>) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the processor supports AVX2, checked just above.
        return unsafe { compress_avx2(a, rows, cols, rhs) };
    }
    compress_portable(a, rows, cols, rhs)
}

/// [`compress`] compiled for AVX2 (same arithmetic, four lanes per instruction).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn compress_avx2(
    a: &[f64],
    rows: usize,
    cols: usize,
    rhs: &[&[f64]],
) -> (Vec<f64>, Vec<Vec<f64>>) {
    compress_portable(a, rows, cols, rhs)
}

#[inline(always)]
fn compress_portable(
    a: &[f64],
    rows: usize,
    cols: usize,
    rhs: &[&[f64]],
) -> (Vec<f64>, Vec<Vec<f64>>) {
    debug_assert_eq!(a.len(), rows * cols);
    let nc = cols + rhs.len();
    // The triangle (and Qᵀb so far), column-major cols × nc; and one block of rows, column-major B × nc.
    let mut t = vec![0.0; cols * nc];
    let mut blk = vec![0.0; BLOCK_ROWS * nc];
    let mut r0 = 0;
    while r0 < rows {
        let len = BLOCK_ROWS.min(rows - r0);
        for j in 0..nc {
            let src = if j < cols {
                &a[j * rows + r0..j * rows + r0 + len]
            } else {
                &rhs[j - cols][r0..r0 + len]
            };
            blk[j * BLOCK_ROWS..j * BLOCK_ROWS + len].copy_from_slice(src);
        }
        for k in 0..cols {
            // The reflector acts on row k of the triangle and the block's rows only.
            let (head, tail) = blk.split_at_mut((k + 1) * BLOCK_ROWS);
            let v = &head[k * BLOCK_ROWS..k * BLOCK_ROWS + len];
            let sigma = dot(v, v);
            if sigma == 0.0 {
                continue;
            }
            let x0 = t[k * cols + k];
            let xnorm = (x0 * x0 + sigma).sqrt();
            if !xnorm.is_finite() {
                continue;
            }
            let alpha = if x0 > 0.0 { -xnorm } else { xnorm };
            let v0 = x0 - alpha;
            let tau = 2.0 / (v0 * v0 + sigma);
            t[k * cols + k] = alpha;
            // Four columns at a time: v is read once per group and the four sums are independent chains.
            for (g, group) in tail.chunks_mut(4 * BLOCK_ROWS).enumerate() {
                let j0 = k + 1 + 4 * g;
                if group.len() == 4 * BLOCK_ROWS {
                    let (c01, c23) = group.split_at_mut(2 * BLOCK_ROWS);
                    let (c0, c1) = c01.split_at_mut(BLOCK_ROWS);
                    let (c2, c3) = c23.split_at_mut(BLOCK_ROWS);
                    let mut cs = [
                        &mut c0[..len],
                        &mut c1[..len],
                        &mut c2[..len],
                        &mut c3[..len],
                    ];
                    let d = dot4(v, &cs);
                    let mut f = [0.0; 4];
                    for l in 0..4 {
                        let tk = &mut t[(j0 + l) * cols + k];
                        f[l] = tau * (v0 * *tk + d[l]);
                        *tk -= f[l] * v0;
                    }
                    axpy4(v, f, &mut cs);
                } else {
                    for (l, col) in group.chunks_exact_mut(BLOCK_ROWS).enumerate() {
                        let col = &mut col[..len];
                        let tk = &mut t[(j0 + l) * cols + k];
                        let f = tau * (v0 * *tk + dot(v, col));
                        *tk -= f * v0;
                        axpy(-f, v, col);
                    }
                }
            }
        }
        r0 += len;
    }
    let r = t[..cols * cols].to_vec();
    let qtb = (0..rhs.len())
        .map(|i| t[(cols + i) * cols..(cols + i + 1) * cols].to_vec())
        .collect();
    (r, qtb)
}

/// The four sums vᵀcₗ, accumulated lane-wise (four lanes per column) so the loop vectorises and the
/// columns form independent chains.
#[inline(always)]
fn dot4(v: &[f64], c: &[&mut [f64]; 4]) -> [f64; 4] {
    let len = v.len();
    let (c0, c1, c2, c3) = (&c[0][..len], &c[1][..len], &c[2][..len], &c[3][..len]);
    let mut acc = [[0.0f64; 4]; 4];
    let full = len / 4 * 4;
    for i in (0..full).step_by(4) {
        for l in 0..4 {
            let vi = v[i + l];
            acc[0][l] += vi * c0[i + l];
            acc[1][l] += vi * c1[i + l];
            acc[2][l] += vi * c2[i + l];
            acc[3][l] += vi * c3[i + l];
        }
    }
    let mut sums = [0.0f64; 4];
    for (k, a) in acc.iter().enumerate() {
        sums[k] = (a[0] + a[1]) + (a[2] + a[3]);
    }
    for i in full..len {
        sums[0] += v[i] * c0[i];
        sums[1] += v[i] * c1[i];
        sums[2] += v[i] * c2[i];
        sums[3] += v[i] * c3[i];
    }
    sums
}

/// cₗ −= fₗ·v for four columns.
#[inline(always)]
fn axpy4(v: &[f64], f: [f64; 4], c: &mut [&mut [f64]; 4]) {
    let len = v.len();
    let [c0, c1, c2, c3] = c;
    let (c0, c1, c2, c3) = (
        &mut c0[..len],
        &mut c1[..len],
        &mut c2[..len],
        &mut c3[..len],
    );
    for i in 0..len {
        let vi = v[i];
        c0[i] -= f[0] * vi;
        c1[i] -= f[1] * vi;
        c2[i] -= f[2] * vi;
        c3[i] -= f[3] * vi;
    }
}

/// Least squares `A·x ≈ b` for a tall A: [`compress`], then [`PivotedQr`] of R. Returns the factorisation
/// of R and `(Qᵀb)[..cols]` (apply [`PivotedQr::solve`] to it).
pub(crate) fn tall_qr(
    a: &[f64],
    rows: usize,
    cols: usize,
    b: &[f64],
    rel_tol: f64,
) -> (PivotedQr, Vec<f64>) {
    let (r, mut qtb) = compress(a, rows, cols, &[b]);
    (
        PivotedQr::new(r, cols, cols, rel_tol),
        qtb.pop().expect("one right-hand side"),
    )
}

/// cols[i] −= t·(vᵀcols[i])·v for up to four columns, reading v once per pass.
#[inline(always)]
fn reflect_group_portable(v: &[f64], t: f64, cols: &mut [&mut [f64]], len: usize) {
    let v = &v[..len];
    if let [c0, c1, c2, c3] = cols {
        let (c0, c1, c2, c3) = (
            &mut c0[..len],
            &mut c1[..len],
            &mut c2[..len],
            &mut c3[..len],
        );
        // Lane-wise partial sums (four per column) so the loop vectorises without reassociation.
        let mut acc = [[0.0f64; 4]; 4];
        let full = len / 4 * 4;
        for i in (0..full).step_by(4) {
            for l in 0..4 {
                let vi = v[i + l];
                acc[0][l] += vi * c0[i + l];
                acc[1][l] += vi * c1[i + l];
                acc[2][l] += vi * c2[i + l];
                acc[3][l] += vi * c3[i + l];
            }
        }
        let mut sums = [0.0f64; 4];
        for (k, a) in acc.iter().enumerate() {
            sums[k] = (a[0] + a[1]) + (a[2] + a[3]);
        }
        for i in full..len {
            sums[0] += v[i] * c0[i];
            sums[1] += v[i] * c1[i];
            sums[2] += v[i] * c2[i];
            sums[3] += v[i] * c3[i];
        }
        let f = sums.map(|x| t * x);
        for i in 0..len {
            let vi = v[i];
            c0[i] -= f[0] * vi;
            c1[i] -= f[1] * vi;
            c2[i] -= f[2] * vi;
            c3[i] -= f[3] * vi;
        }
    } else {
        for c in cols.iter_mut() {
            let f = t * dot(v, &c[..len]);
            axpy(-f, v, &mut c[..len]);
        }
    }
}

#[inline(always)]
fn dot(a: &[f64], b: &[f64]) -> f64 {
    // Four accumulators let the compiler vectorise and shorten the dependency chain.
    let mut acc = [0.0; 4];
    let chunks = a.len() / 4;
    for c in 0..chunks {
        for l in 0..4 {
            acc[l] += a[4 * c + l] * b[4 * c + l];
        }
    }
    let mut s = (acc[0] + acc[1]) + (acc[2] + acc[3]);
    for i in 4 * chunks..a.len() {
        s += a[i] * b[i];
    }
    s
}

#[inline(always)]
fn axpy(f: f64, x: &[f64], y: &mut [f64]) {
    for (yi, xi) in y.iter_mut().zip(x) {
        *yi += f * xi;
    }
}

#[inline(always)]
fn norm(v: &[f64]) -> f64 {
    let direct = dot(v, v).sqrt();
    if direct.is_finite() && direct > 1e-150 && direct < 1e150 {
        return direct;
    }
    let m = v.iter().fold(0.0f64, |m, x| m.max(x.abs()));
    if m == 0.0 || !m.is_finite() {
        return m;
    }
    let s: f64 = v.iter().map(|x| (x / m) * (x / m)).sum();
    m * s.sqrt()
}

/// The zeros of `d + Σ cᵢ/(s − aᵢ) + Σ [r/(s − p) + r̄/(s − p̄)]` (real poles with real residues, complex
/// pairs given by one member), as the eigenvalues of `Λ − b·cᵀ/d` in the real block form of Gustavsen &
/// Semlyen (1999): a 2×2 block [[p′, p″], [−p″, p′]] with b = [2, 0] and c = [r′, r″] per pair.
/// Returns `None` when d is zero or the eigenvalue iteration fails.
pub(crate) fn rational_zeros(
    d: f64,
    real: &[(f64, f64)],
    pairs: &[(Complex64, Complex64)],
) -> Option<Vec<Complex64>> {
    if d == 0.0 || !d.is_finite() {
        return None;
    }
    let n = real.len() + 2 * pairs.len();
    if n == 0 {
        return Some(Vec::new());
    }
    let mut h = DMatrix::<f64>::zeros(n, n);
    let mut b = vec![0.0; n];
    let mut c = vec![0.0; n];
    for (i, &(a, r)) in real.iter().enumerate() {
        h[(i, i)] = a;
        b[i] = 1.0;
        c[i] = r;
    }
    for (k, &(p, r)) in pairs.iter().enumerate() {
        let i = real.len() + 2 * k;
        h[(i, i)] = p.re;
        h[(i, i + 1)] = p.im;
        h[(i + 1, i)] = -p.im;
        h[(i + 1, i + 1)] = p.re;
        b[i] = 2.0;
        c[i] = r.re;
        c[i + 1] = r.im;
    }
    for i in 0..n {
        if b[i] != 0.0 {
            for j in 0..n {
                h[(i, j)] -= b[i] * c[j] / d;
            }
        }
    }
    if h.iter().any(|v| !v.is_finite()) {
        return None;
    }
    let schur = Schur::try_new(h, f64::EPSILON, 10_000)?;
    Some(schur.complex_eigenvalues().iter().copied().collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn least_squares_matches_a_known_line_fit() {
        // y = 2 + 3x sampled exactly, plus a duplicate (rank-deficient) column.
        let xs = [0.0, 1.0, 2.0, 3.0, 4.0];
        let mut a = Vec::new();
        a.extend(xs.iter().map(|_| 1.0));
        a.extend(xs.iter().copied());
        a.extend(xs.iter().copied());
        let b: Vec<f64> = xs.iter().map(|x| 2.0 + 3.0 * x).collect();
        let qr = PivotedQr::new(a, 5, 3, 1e-12);
        assert_eq!(qr.rank(), 2);
        let x = qr.solve(&b);
        assert!((x[0] - 2.0).abs() < 1e-12);
        assert!((x[1] + x[2] - 3.0).abs() < 1e-12);
    }

    #[test]
    fn compressed_least_squares_matches_the_direct_one() {
        // A tall, smooth, badly scaled system (synthetic, no source): the solution through the compressed
        // triangle equals the direct pivoted-QR one, and R keeps A's column norms.
        let (rows, cols) = (1001, 7);
        let mut a = Vec::new();
        for j in 0..cols {
            for i in 0..rows {
                let x = i as f64 / rows as f64;
                a.push(
                    (1.0 + 3.0 * j as f64)
                        * (x + 0.1 * j as f64).powi(j as i32 + 1)
                        * 10f64.powi(j as i32),
                );
            }
        }
        let b: Vec<f64> = (0..rows).map(|i| (i as f64 * 0.01).sin()).collect();
        let direct = PivotedQr::new(a.clone(), rows, cols, 1e-13).solve(&b);
        let (qr, qtb) = tall_qr(&a, rows, cols, &b, 1e-13);
        let fast = qr.solve(&qtb);
        for (x, y) in direct.iter().zip(&fast) {
            assert!((x - y).abs() <= 1e-8 * x.abs().max(1e-300), "{x} vs {y}");
        }
        let (r, _) = compress(&a, rows, cols, &[&b]);
        for j in 0..cols {
            let na = dot(&a[j * rows..(j + 1) * rows], &a[j * rows..(j + 1) * rows]).sqrt();
            let nr = dot(&r[j * cols..(j + 1) * cols], &r[j * cols..(j + 1) * cols]).sqrt();
            assert!((na - nr).abs() <= 1e-12 * na, "column {j}: {na} vs {nr}");
        }
    }

    #[test]
    fn zeros_of_a_pole_residue_sum() {
        // 1 + 1/(s+1) has its zero at s = −2; 1 + [r/(s−p) + c.c.] with p = −1+2j, r = 1 has zeros where
        // s² + 2s + 5 + 2(s+1) = 0 → s² + 4s + 7 = 0 → s = −2 ± j√3.
        let z = rational_zeros(1.0, &[(-1.0, 1.0)], &[]).unwrap();
        assert!((z[0] - Complex64::new(-2.0, 0.0)).norm() < 1e-12);
        let mut z = rational_zeros(
            1.0,
            &[],
            &[(Complex64::new(-1.0, 2.0), Complex64::new(1.0, 0.0))],
        )
        .unwrap();
        z.sort_by(|a, b| a.im.total_cmp(&b.im));
        assert!((z[1] - Complex64::new(-2.0, 3f64.sqrt())).norm() < 1e-12);
        assert!((z[0] - Complex64::new(-2.0, -(3f64.sqrt()))).norm() < 1e-12);
    }
}
