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
    pub(crate) fn new(mut a: Vec<f64>, rows: usize, cols: usize, rel_tol: f64) -> PivotedQr {
        debug_assert_eq!(a.len(), rows * cols);
        let mut scale = vec![1.0; cols];
        for (j, sc) in scale.iter_mut().enumerate() {
            let col = &mut a[j * rows..(j + 1) * rows];
            let n = norm(col);
            if n > 0.0 && n.is_finite() {
                *sc = 1.0 / n;
                col.iter_mut().for_each(|v| *v /= n);
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
                for i in 0..rows {
                    a.swap(k * rows + i, p * rows + i);
                }
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
                reflect_group(v, t, &mut group, len);
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

/// cols[i] −= t·(vᵀcols[i])·v for up to four columns, reading v once per pass.
fn reflect_group(v: &[f64], t: f64, cols: &mut [&mut [f64]], len: usize) {
    if cols.len() == 4 {
        let (mut s0, mut s1, mut s2, mut s3) = (0.0, 0.0, 0.0, 0.0);
        {
            let (c0, c1, c2, c3) = (
                &cols[0][..len],
                &cols[1][..len],
                &cols[2][..len],
                &cols[3][..len],
            );
            for i in 0..len {
                let vi = v[i];
                s0 += vi * c0[i];
                s1 += vi * c1[i];
                s2 += vi * c2[i];
                s3 += vi * c3[i];
            }
        }
        let f = [t * s0, t * s1, t * s2, t * s3];
        for (c, fc) in cols.iter_mut().zip(f) {
            axpy(-fc, v, &mut c[..len]);
        }
    } else {
        for c in cols.iter_mut() {
            let f = t * dot(v, &c[..len]);
            axpy(-f, v, &mut c[..len]);
        }
    }
}

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

fn axpy(f: f64, x: &[f64], y: &mut [f64]) {
    for (yi, xi) in y.iter_mut().zip(x) {
        *yi += f * xi;
    }
}

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
