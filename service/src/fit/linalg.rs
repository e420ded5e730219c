//! Small dense linear algebra for the rational fit and the exported networks: Householder QR with column pivoting for least squares
//! (never the normal equations), a streaming QR that compresses a tall system to its triangle as its rows
//! are produced, and the zeros of a pole–residue sum as eigenvalues of a real matrix.
//!
//! Both factorisations store matrices row-major with rows padded to a multiple of four and share one
//! kernel, [`reflect`]: apply a Householder reflector to the trailing columns of a head row and a block of
//! rows below it. On x86-64 with AVX2 and FMA it runs four columns per instruction with fused
//! multiply–adds; elsewhere a scalar loop does the same arithmetic.

// Index loops over rows and lanes read more plainly than iterator chains in these kernels.
#![allow(clippy::needless_range_loop)]

pub(crate) mod nnls;

use nalgebra::{DMatrix, Schur};
use num_complex::Complex64;

/// Row length of a matrix of `cols` columns: padded to whole four-lane registers.
pub(crate) fn padded(cols: usize) -> usize {
    cols.div_ceil(4) * 4
}

/// Applies `H = I − τ·u·uᵀ` with `u = [v0; body[·][k]]` to the columns `j > k` of the matrix formed by
/// `head` (one row) over `body` (`nrows` rows, row-major, `stride` a multiple of 4). Columns `j ≤ k` and
/// the reflector's own column are left as they are (that is where the caller keeps `u`). Returns the sum
/// of squares of column `k + 1` of `body` after the update (the next reflector's norm), or 0 when
/// `k + 1 ≥ stride`.
pub(crate) fn reflect(
    head: &mut [f64],
    body: &mut [f64],
    nrows: usize,
    stride: usize,
    k: usize,
    v0: f64,
    tau: f64,
) -> f64 {
    assert!(
        stride.is_multiple_of(4)
            && k < stride
            && head.len() >= stride
            && body.len() >= nrows * stride
    );
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("fma") {
        // SAFETY: the processor supports AVX2 and FMA (checked just above), and the slices hold the rows
        // the kernel reads and writes (asserted above).
        return unsafe { reflect_fma(head, body, nrows, stride, k, v0, tau) };
    }
    reflect_portable(head, body, nrows, stride, k, v0, tau)
}

fn reflect_portable(
    head: &mut [f64],
    body: &mut [f64],
    nrows: usize,
    stride: usize,
    k: usize,
    v0: f64,
    tau: f64,
) -> f64 {
    let mut next = 0.0;
    let mut c = k + 1;
    while c < stride {
        let w = (stride - c).min(8);
        let mut d = [0.0f64; 8];
        for l in 0..w {
            d[l] = v0 * head[c + l];
        }
        for row in body[..nrows * stride].chunks_exact(stride) {
            let x = row[k];
            for l in 0..w {
                d[l] += x * row[c + l];
            }
        }
        for l in 0..w {
            d[l] *= tau;
            head[c + l] -= d[l] * v0;
        }
        for row in body[..nrows * stride].chunks_exact_mut(stride) {
            let x = row[k];
            for l in 0..w {
                row[c + l] -= d[l] * x;
            }
            if c == k + 1 {
                next += row[c] * row[c];
            }
        }
        c += w;
    }
    next
}

/// [`reflect`] for AVX2 + FMA: the columns from the register holding column k + 1 on, in chunks of up to
/// four registers; lanes of columns ≤ k get a zero multiplier.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn reflect_fma(
    head: &mut [f64],
    body: &mut [f64],
    nrows: usize,
    stride: usize,
    k: usize,
    v0: f64,
    tau: f64,
) -> f64 {
    let first = (k + 1) / 4 * 4;
    let mut next = 0.0;
    let mut c = first;
    let (h, b) = (head.as_mut_ptr(), body.as_mut_ptr());
    while c < stride {
        let w = ((stride - c) / 4).min(4);
        // SAFETY: columns c .. c + 4w lie within the stride of every row (c + 4w ≤ stride), which the
        // caller's slices hold.
        let sq = unsafe {
            match w {
                1 => reflect_chunk::<1>(h, b, nrows, stride, k, c, v0, tau),
                2 => reflect_chunk::<2>(h, b, nrows, stride, k, c, v0, tau),
                3 => reflect_chunk::<3>(h, b, nrows, stride, k, c, v0, tau),
                _ => reflect_chunk::<4>(h, b, nrows, stride, k, c, v0, tau),
            }
        };
        if c == first {
            next = sq;
        }
        c += 4 * w;
    }
    next
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
#[allow(clippy::too_many_arguments)]
unsafe fn reflect_chunk<const W: usize>(
    head: *mut f64,
    body: *mut f64,
    nrows: usize,
    stride: usize,
    k: usize,
    c: usize,
    v0: f64,
    tau: f64,
) -> f64 {
    use std::arch::x86_64::*;
    // SAFETY (whole body): every pointer is `head` or a row of `body` offset by a column below
    // c + 4W ≤ stride, inside the slices the caller checked.
    unsafe {
        let vv0 = _mm256_set1_pd(v0);
        let mut a0 = [_mm256_setzero_pd(); W];
        for q in 0..W {
            a0[q] = _mm256_mul_pd(vv0, _mm256_loadu_pd(head.add(c + 4 * q)));
        }
        let (a0, a1) = column_dots::<W>(body, nrows, stride, k, c, a0);
        let vt = _mm256_set1_pd(tau);
        let mut f = [_mm256_setzero_pd(); W];
        for q in 0..W {
            f[q] = _mm256_mul_pd(vt, _mm256_add_pd(a0[q], a1[q]));
        }
        if c <= k {
            let mut lanes = [0.0f64; 4];
            _mm256_storeu_pd(lanes.as_mut_ptr(), f[0]);
            for (l, v) in lanes.iter_mut().enumerate() {
                if c + l <= k {
                    *v = 0.0;
                }
            }
            f[0] = _mm256_loadu_pd(lanes.as_ptr());
        }
        for q in 0..W {
            let p = head.add(c + 4 * q);
            _mm256_storeu_pd(p, _mm256_fnmadd_pd(f[q], vv0, _mm256_loadu_pd(p)));
        }
        let mut sq = _mm256_setzero_pd();
        for i in 0..nrows {
            let r = body.add(i * stride);
            let x = _mm256_set1_pd(*r.add(k));
            for q in 0..W {
                let p = r.add(c + 4 * q);
                let y = _mm256_fnmadd_pd(f[q], x, _mm256_loadu_pd(p));
                _mm256_storeu_pd(p, y);
                if q == 0 {
                    sq = _mm256_fmadd_pd(y, y, sq);
                }
            }
        }
        if (c..c + 4).contains(&(k + 1)) {
            let mut lanes = [0.0f64; 4];
            _mm256_storeu_pd(lanes.as_mut_ptr(), sq);
            lanes[k + 1 - c]
        } else {
            0.0
        }
    }
}

/// Σᵣ body[r][k]·body[r][c .. c + 4W] over `nrows` rows, in two chains per register (even rows on top of
/// `init`, odd rows from zero; two independent chains hide the latency of the fused adds); the caller
/// adds the two.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
#[inline]
unsafe fn column_dots<const W: usize>(
    body: *const f64,
    nrows: usize,
    stride: usize,
    k: usize,
    c: usize,
    init: [std::arch::x86_64::__m256d; W],
) -> (
    [std::arch::x86_64::__m256d; W],
    [std::arch::x86_64::__m256d; W],
) {
    use std::arch::x86_64::*;
    // SAFETY (whole body): every pointer is a row of `body` offset by a column below c + 4W ≤ stride,
    // inside the slice the caller checked.
    unsafe {
        let mut a0 = init;
        let mut a1 = [_mm256_setzero_pd(); W];
        let mut i = 0;
        while i + 1 < nrows {
            let r0 = body.add(i * stride);
            let r1 = r0.add(stride);
            let x0 = _mm256_set1_pd(*r0.add(k));
            let x1 = _mm256_set1_pd(*r1.add(k));
            for q in 0..W {
                a0[q] = _mm256_fmadd_pd(x0, _mm256_loadu_pd(r0.add(c + 4 * q)), a0[q]);
                a1[q] = _mm256_fmadd_pd(x1, _mm256_loadu_pd(r1.add(c + 4 * q)), a1[q]);
            }
            i += 2;
        }
        if i < nrows {
            let r0 = body.add(i * stride);
            let x0 = _mm256_set1_pd(*r0.add(k));
            for q in 0..W {
                a0[q] = _mm256_fmadd_pd(x0, _mm256_loadu_pd(r0.add(c + 4 * q)), a0[q]);
            }
        }
        (a0, a1)
    }
}

/// Sum of squares of column `k` over `nrows` rows of a row-major matrix.
fn column_sq(a: &[f64], nrows: usize, stride: usize, k: usize) -> f64 {
    let mut acc = [0.0f64; 4];
    let quads = nrows / 4;
    for q in 0..quads {
        for (l, acc) in acc.iter_mut().enumerate() {
            let x = a[(4 * q + l) * stride + k];
            *acc += x * x;
        }
    }
    let mut s = (acc[0] + acc[1]) + (acc[2] + acc[3]);
    for i in 4 * quads..nrows {
        let x = a[i * stride + k];
        s += x * x;
    }
    s
}

/// A `rows × cols` real matrix factored as `A·S·P = Q·R` (S: unit-norm column scaling, P: column
/// pivoting). Row-major with rows padded to `stride`; the Householder vectors stay in the lower part
/// (v₀ on the diagonal), R in the upper part and `r_diag`.
pub(crate) struct PivotedQr {
    rows: usize,
    cols: usize,
    stride: usize,
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
    /// Factors `a` (column-major, `rows × cols`). Columns whose pivot falls below `rel_tol · |R₀₀|` are
    /// treated as beyond the numerical rank.
    pub(crate) fn new(a: Vec<f64>, rows: usize, cols: usize, rel_tol: f64) -> PivotedQr {
        debug_assert_eq!(a.len(), rows * cols);
        let stride = padded(cols);
        let mut m = vec![0.0; rows * stride];
        for j in 0..cols {
            for i in 0..rows {
                m[i * stride + j] = a[j * rows + i];
            }
        }
        Self::from_rows(m, rows, cols, stride, rel_tol)
    }

    /// Factors `a` given row-major, `rows × cols` in rows of `stride` (a multiple of 4, padding zero).
    pub(crate) fn from_rows(
        mut a: Vec<f64>,
        rows: usize,
        cols: usize,
        stride: usize,
        rel_tol: f64,
    ) -> PivotedQr {
        assert!(stride.is_multiple_of(4) && stride >= cols && a.len() >= rows * stride);
        let mut scale = vec![1.0; cols];
        for (j, sc) in scale.iter_mut().enumerate() {
            let n = column_norm(&a, rows, stride, j);
            if n > 0.0 && n.is_finite() {
                *sc = 1.0 / n;
                for row in a[..rows * stride].chunks_exact_mut(stride) {
                    row[j] *= *sc;
                }
            }
        }
        let mut perm: Vec<usize> = (0..cols).collect();
        let mut norms2: Vec<f64> = (0..cols).map(|j| column_sq(&a, rows, stride, j)).collect();
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
                for row in a[..rows * stride].chunks_exact_mut(stride) {
                    row.swap(k, p);
                }
                perm.swap(k, p);
                norms2.swap(k, p);
                ref_norms2.swap(k, p);
            }
            let (head, body) = a.split_at_mut((k + 1) * stride);
            let head = &mut head[k * stride..];
            let below = column_sq(body, rows - k - 1, stride, k);
            let x0 = head[k];
            let xnorm = (x0 * x0 + below).sqrt();
            if xnorm == 0.0 || !xnorm.is_finite() {
                tau[k] = 0.0;
                r_diag[k] = 0.0;
                continue;
            }
            let alpha = if x0 > 0.0 { -xnorm } else { xnorm };
            let v0 = x0 - alpha;
            let vtv = v0 * v0 + below;
            let t = if vtv > 0.0 { 2.0 / vtv } else { 0.0 };
            tau[k] = t;
            r_diag[k] = alpha;
            head[k] = v0;
            reflect(head, body, rows - k - 1, stride, k, v0, t);
            for j in k + 1..cols {
                // Downdate the remaining norm; recompute when cancellation has eaten its accuracy.
                norms2[j] -= head[j] * head[j];
                if norms2[j] < 1e-8 * ref_norms2[j] {
                    norms2[j] = column_sq(body, rows - k - 1, stride, j);
                    ref_norms2[j] = norms2[j];
                } else {
                    norms2[j] = norms2[j].max(0.0);
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
            stride,
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
        let (m, st) = (self.rows, self.stride);
        for k in 0..self.tau.len() {
            if self.tau[k] == 0.0 {
                continue;
            }
            let mut s = 0.0;
            for i in k..m {
                s += self.a[i * st + k] * b[i];
            }
            let f = self.tau[k] * s;
            for i in k..m {
                b[i] -= f * self.a[i * st + k];
            }
        }
    }

    /// R[i][j] for i < j (upper part) or the diagonal.
    pub(crate) fn r(&self, i: usize, j: usize) -> f64 {
        if i == j {
            self.r_diag[i]
        } else {
            self.a[i * self.stride + j]
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

fn column_norm(a: &[f64], rows: usize, stride: usize, j: usize) -> f64 {
    let direct = column_sq(a, rows, stride, j).sqrt();
    if direct.is_finite() && direct > 1e-150 && direct < 1e150 {
        return direct;
    }
    let col = || a[..rows * stride].chunks_exact(stride).map(|r| r[j]);
    let m = col().fold(0.0f64, |m, x| m.max(x.abs()));
    if m == 0.0 || !m.is_finite() {
        return m;
    }
    let s: f64 = col().map(|x| (x / m) * (x / m)).sum();
    m * s.sqrt()
}

/// Rows eliminated per pass of [`RowCompressor`]: a block of this many rows and the triangle so far stay
/// in the first-level cache (24 KB at 24 columns).
pub(crate) const BLOCK_ROWS: usize = 128;

/// Up to [`BLOCK_ROWS`] rows waiting to be folded into a [`RowCompressor`] or [`GramAccumulator`]:
/// row-major, `width` entries used per row, padded to `stride` with zeros that nobody writes.
struct PendingRows {
    width: usize,
    stride: usize,
    blk: Vec<f64>,
    len: usize,
}

impl PendingRows {
    fn new(width: usize) -> PendingRows {
        let stride = padded(width);
        PendingRows {
            width,
            stride,
            blk: vec![0.0; BLOCK_ROWS * stride],
            len: 0,
        }
    }

    /// Whether `count` more rows fit in the block.
    fn fits(&self, count: usize) -> bool {
        assert!(count <= BLOCK_ROWS);
        self.len + count <= BLOCK_ROWS
    }

    /// The next `count` rows, whole (`count × stride`), which the caller has made room for.
    fn take(&mut self, count: usize) -> &mut [f64] {
        let o = self.len * self.stride;
        self.len += count;
        &mut self.blk[o..o + count * self.stride]
    }
}

/// Reduces a tall least-squares problem `A·x ≈ b` (rows ≫ cols) to the square `R·x ≈ (Qᵀb)[..cols]`,
/// `A = Q·R`, by unpivoted Householder QR taken one block of rows at a time, as the rows are produced:
/// each block is eliminated against the triangle of the blocks before it, so the working set stays in
/// cache, each element of A is read once instead of once per reflector, and A itself is never stored. R
/// has the column norms and singular values of A, so a [`PivotedQr`] of R decides the rank as one of A
/// would, and the least-squares solutions agree (‖A·x − b‖² = ‖R·x − (Qᵀb)[..cols]‖² + a constant).
/// Right-hand sides are extra columns after the `cols` of A.
pub(crate) struct RowCompressor {
    cols: usize,
    stride: usize,
    /// The triangle and Qᵀb so far, row-major `cols × stride`.
    t: Vec<f64>,
    pending: PendingRows,
}

impl RowCompressor {
    /// A compressor for `cols` unknowns and `nrhs` right-hand sides.
    pub(crate) fn new(cols: usize, nrhs: usize) -> RowCompressor {
        let pending = PendingRows::new(cols + nrhs);
        RowCompressor {
            cols,
            stride: pending.stride,
            t: vec![0.0; cols * pending.stride],
            pending,
        }
    }

    /// The next row, zeroed: `cols` entries of A, then one per right-hand side.
    #[cfg(test)]
    pub(crate) fn row(&mut self) -> &mut [f64] {
        let width = self.pending.width;
        let row = &mut self.rows_unzeroed(1)[..width];
        row.fill(0.0);
        row
    }

    /// The next `count` rows (at most [`BLOCK_ROWS`]), not zeroed, as one row-major slice of rows of
    /// [`Self::stride`]: the caller writes the first `cols` entries of A and one per right-hand side of
    /// every row (the padding after them stays zero). When they do not fit in the pending block, that
    /// block is eliminated first, so requests of [`BLOCK_ROWS`] rows block the rows as single rows would.
    pub(crate) fn rows_unzeroed(&mut self, count: usize) -> &mut [f64] {
        if !self.pending.fits(count) {
            self.eliminate();
        }
        self.pending.take(count)
    }

    /// Row length in [`Self::rows_unzeroed`].
    pub(crate) fn stride(&self) -> usize {
        self.stride
    }

    fn eliminate(&mut self) {
        let (len, st) = (self.pending.len, self.stride);
        let blk = &mut self.pending.blk;
        let mut sigma = None;
        for k in 0..self.cols {
            let sg = sigma.take().unwrap_or_else(|| column_sq(blk, len, st, k));
            if sg == 0.0 {
                continue;
            }
            let head = &mut self.t[k * st..(k + 1) * st];
            let x0 = head[k];
            let xnorm = (x0 * x0 + sg).sqrt();
            if !xnorm.is_finite() {
                continue;
            }
            let alpha = if x0 > 0.0 { -xnorm } else { xnorm };
            let v0 = x0 - alpha;
            let tau = 2.0 / (v0 * v0 + sg);
            head[k] = alpha;
            let next = reflect(head, blk, len, st, k, v0, tau);
            sigma = Some(next);
        }
        self.pending.len = 0;
    }

    /// Eliminates the pending rows; then [`Self::triangle`] and [`Self::qtb`] are those of all rows so far.
    pub(crate) fn finish(&mut self) {
        if self.pending.len > 0 {
            self.eliminate();
        }
    }

    /// The leading `m × m` block of R, row-major in rows of `padded(m)` (for [`PivotedQr::from_rows`]).
    pub(crate) fn triangle(&self, m: usize) -> Vec<f64> {
        let sm = padded(m);
        let mut r = vec![0.0; m * sm];
        for i in 0..m {
            r[i * sm..i * sm + m].copy_from_slice(&self.t[i * self.stride..i * self.stride + m]);
        }
        r
    }

    /// Σ R[i][j]² over the rows `from ≤ i ≤ j` of column `j` of the triangle: for a column that repeats a
    /// right-hand side b (up to sign), the squared residual of the least-squares fit of b by the columns
    /// before `from` (the rest of its norm, which Householder QR keeps without cancellation).
    pub(crate) fn column_tail_sq(&self, j: usize, from: usize) -> f64 {
        (from..=j)
            .map(|i| self.t[i * self.stride + j] * self.t[i * self.stride + j])
            .sum()
    }

    /// R[i][j] (`i, j < cols`).
    pub(crate) fn r(&self, i: usize, j: usize) -> f64 {
        debug_assert!(i < self.cols && j < self.cols);
        self.t[i * self.stride + j]
    }

    /// The first `cols` entries of Qᵀb for right-hand side `i`.
    pub(crate) fn qtb(&self, i: usize) -> Vec<f64> {
        (0..self.cols)
            .map(|r| self.t[r * self.stride + self.cols + i])
            .collect()
    }
}

/// Adds BᵀB of a row-major block B (`nrows` rows of `stride`, the first `width` columns used, the rest
/// zero) to the upper part of `g` (row-major `width × stride`): row i gets the columns from the register
/// holding column i on (entries left of the diagonal in that register are filled too; they are never read).
pub(crate) fn gram_add(g: &mut [f64], block: &[f64], nrows: usize, stride: usize, width: usize) {
    assert!(
        stride.is_multiple_of(4)
            && width <= stride
            && g.len() >= width * stride
            && block.len() >= nrows * stride
    );
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("fma") {
        // SAFETY: the processor supports AVX2 and FMA (checked just above), and the slices hold the rows
        // the kernel reads and writes (asserted above).
        unsafe { gram_add_fma(g, block, nrows, stride, width) };
        return;
    }
    gram_add_portable(g, block, nrows, stride, width)
}

fn gram_add_portable(g: &mut [f64], block: &[f64], nrows: usize, stride: usize, width: usize) {
    for i in 0..width {
        let first = i / 4 * 4;
        let gi = &mut g[i * stride + first..(i + 1) * stride];
        for row in block[..nrows * stride].chunks_exact(stride) {
            let x = row[i];
            for (acc, y) in gi.iter_mut().zip(&row[first..]) {
                *acc += x * y;
            }
        }
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn gram_add_fma(g: &mut [f64], block: &[f64], nrows: usize, stride: usize, width: usize) {
    let (gp, b) = (g.as_mut_ptr(), block.as_ptr());
    for i in 0..width {
        let mut c = i / 4 * 4;
        while c < stride {
            let w = ((stride - c) / 4).min(4);
            // SAFETY: row i of g and columns c .. c + 4w ≤ stride of every block row lie inside the
            // slices the caller checked.
            unsafe {
                let gi = gp.add(i * stride);
                match w {
                    1 => gram_chunk::<1>(gi, b, nrows, stride, i, c),
                    2 => gram_chunk::<2>(gi, b, nrows, stride, i, c),
                    3 => gram_chunk::<3>(gi, b, nrows, stride, i, c),
                    _ => gram_chunk::<4>(gi, b, nrows, stride, i, c),
                }
            }
            c += 4 * w;
        }
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn gram_chunk<const W: usize>(
    gi: *mut f64,
    block: *const f64,
    nrows: usize,
    stride: usize,
    i: usize,
    c: usize,
) {
    use std::arch::x86_64::*;
    // SAFETY (whole body): `gi` is a row of g and every other pointer a block row offset by a column
    // below c + 4W ≤ stride, inside the slices the caller checked.
    unsafe {
        let (a0, a1) = column_dots::<W>(block, nrows, stride, i, c, [_mm256_setzero_pd(); W]);
        for q in 0..W {
            let p = gi.add(c + 4 * q);
            _mm256_storeu_pd(
                p,
                _mm256_add_pd(_mm256_loadu_pd(p), _mm256_add_pd(a0[q], a1[q])),
            );
        }
    }
}

/// Accumulates the Gram matrix AᵀA of a tall matrix as its rows are produced, one block of
/// [`BLOCK_ROWS`] rows at a time (A itself is never stored). For tests that only need the normal
/// equations' answer to a few digits, such as how much a Gauss–Newton step could gain; least-squares
/// solutions go through [`RowCompressor`].
pub(crate) struct GramAccumulator {
    g: Vec<f64>,
    pending: PendingRows,
}

impl GramAccumulator {
    pub(crate) fn new(width: usize) -> GramAccumulator {
        let pending = PendingRows::new(width);
        GramAccumulator {
            g: vec![0.0; width * pending.stride],
            pending,
        }
    }

    /// The next row, not zeroed: the caller writes all `width` entries.
    pub(crate) fn row_unzeroed(&mut self) -> &mut [f64] {
        if !self.pending.fits(1) {
            self.flush();
        }
        let width = self.pending.width;
        &mut self.pending.take(1)[..width]
    }

    fn flush(&mut self) {
        let p = &mut self.pending;
        gram_add(&mut self.g, &p.blk, p.len, p.stride, p.width);
        p.len = 0;
    }

    /// Adds the pending rows; then [`Self::get`] is over all rows so far.
    pub(crate) fn finish(&mut self) {
        if self.pending.len > 0 {
            self.flush();
        }
    }

    /// (AᵀA)ᵢⱼ.
    pub(crate) fn get(&self, i: usize, j: usize) -> f64 {
        let (i, j) = if i <= j { (i, j) } else { (j, i) };
        self.g[i * self.pending.stride + j]
    }
}

#[cfg(test)]
/// [`RowCompressor`] over a column-major `rows × cols` matrix: R column-major `cols × cols` and, per
/// right-hand side, the first `cols` entries of Qᵀb.
pub(crate) fn compress(
    a: &[f64],
    rows: usize,
    cols: usize,
    rhs: &[&[f64]],
) -> (Vec<f64>, Vec<Vec<f64>>) {
    debug_assert_eq!(a.len(), rows * cols);
    let mut c = RowCompressor::new(cols, rhs.len());
    for i in 0..rows {
        let row = c.row();
        for j in 0..cols {
            row[j] = a[j * rows + i];
        }
        for (l, b) in rhs.iter().enumerate() {
            row[cols + l] = b[i];
        }
    }
    c.finish();
    let t = c.triangle(cols);
    let sm = padded(cols);
    let mut r = vec![0.0; cols * cols];
    for j in 0..cols {
        for i in 0..cols {
            r[j * cols + i] = t[i * sm + j];
        }
    }
    (r, (0..rhs.len()).map(|i| c.qtb(i)).collect())
}

#[cfg(test)]
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
            let na = a[j * rows..(j + 1) * rows]
                .iter()
                .map(|v| v * v)
                .sum::<f64>()
                .sqrt();
            let nr = r[j * cols..(j + 1) * cols]
                .iter()
                .map(|v| v * v)
                .sum::<f64>()
                .sqrt();
            assert!((na - nr).abs() <= 1e-12 * na, "column {j}: {na} vs {nr}");
        }
    }

    #[test]
    fn the_vector_kernel_agrees_with_the_scalar_one() {
        // Synthetic (no source): one reflector applied to a 37-row block of 23 columns (stride 24) by
        // both kernels, for every reflector column k; they differ only in rounding.
        let (nrows, stride) = (37, 24);
        let fill = |i: usize| ((i as f64 * 0.37).sin() + 0.1 * (i % 7) as f64) * 1e3;
        for k in 0..23 {
            let mut head: Vec<f64> = (0..stride)
                .map(|j| if j < 23 { fill(j + 1000) } else { 0.0 })
                .collect();
            let mut body: Vec<f64> = (0..nrows * stride)
                .map(|i| if i % stride < 23 { fill(i) } else { 0.0 })
                .collect();
            let (mut head2, mut body2) = (head.clone(), body.clone());
            let before = body.clone();
            let (v0, tau) = (0.7, 2.0 / (0.49 + column_sq(&body, nrows, stride, k)));
            let n1 = reflect(&mut head, &mut body, nrows, stride, k, v0, tau);
            let n2 = reflect_portable(&mut head2, &mut body2, nrows, stride, k, v0, tau);
            assert!(
                (n1 - n2).abs() <= 1e-12 * n2.abs().max(1.0),
                "k {k}: {n1} vs {n2}"
            );
            if k + 1 < stride {
                let direct = column_sq(&body2, nrows, stride, k + 1);
                assert!((n2 - direct).abs() <= 1e-12 * direct.max(1.0), "k {k}");
            }
            for (x, y) in head.iter().zip(&head2).chain(body.iter().zip(&body2)) {
                assert!(
                    (x - y).abs() <= 1e-9 * y.abs().max(1.0),
                    "k {k}: {x} vs {y}"
                );
            }
            // Columns up to k are not touched.
            for (row, old) in body.chunks_exact(stride).zip(before.chunks_exact(stride)) {
                assert_eq!(row[..=k], old[..=k], "k {k}");
            }
        }
    }

    #[test]
    fn gram_kernels_agree_with_a_direct_sum() {
        // Synthetic (no source): AᵀA of 301 rows of 11 columns (stride 12; several blocks, an odd last
        // one) by the accumulator, and by both kernels on one block, against the plain sum over rows.
        let (rows, width) = (301, 11);
        let fill =
            |r: usize, j: usize| ((r * 13 + j * 7) as f64 * 0.31).sin() * 10f64.powi(j as i32 % 4);
        let mut acc = GramAccumulator::new(width);
        for r in 0..rows {
            for (j, x) in acc.row_unzeroed().iter_mut().enumerate() {
                *x = fill(r, j);
            }
        }
        acc.finish();
        let stride = padded(width);
        let mut block = vec![0.0; rows * stride];
        for r in 0..rows {
            for j in 0..width {
                block[r * stride + j] = fill(r, j);
            }
        }
        let (mut g1, mut g2) = (vec![0.0; width * stride], vec![0.0; width * stride]);
        gram_add(&mut g1, &block, rows, stride, width);
        gram_add_portable(&mut g2, &block, rows, stride, width);
        for i in 0..width {
            for j in i..width {
                let direct: f64 = (0..rows).map(|r| fill(r, i) * fill(r, j)).sum();
                let tol = 1e-12
                    * (0..rows)
                        .map(|r| (fill(r, i) * fill(r, j)).abs())
                        .sum::<f64>();
                for v in [
                    acc.get(i, j),
                    acc.get(j, i),
                    g1[i * stride + j],
                    g2[i * stride + j],
                ] {
                    assert!((v - direct).abs() <= tol, "({i}, {j}): {v} vs {direct}");
                }
            }
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
