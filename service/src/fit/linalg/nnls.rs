//! Non-negative least squares and least-distance programming (Lawson & Hanson, "Solving Least Squares
//! Problems", 1974, ch. 23: algorithms NNLS and LDP), the one active-set solver of the crate: passivity
//! enforcement solves its least-distance programme with it, and the exported ladder and core networks
//! get their non-negative element values from it (which is what makes them passive).

use super::PivotedQr;

/// min ‖G·u − h‖ subject to u ≥ 0, for a column-major `rows × cols` G (a nalgebra `DMatrix`'s
/// `as_slice()`). Columns should be scaled to comparable norms by the caller. Non-finite input gives
/// u = 0.
pub(crate) fn nnls(g: &[f64], rows: usize, cols: usize, h: &[f64]) -> Vec<f64> {
    let col = |j: usize| &g[j * rows..(j + 1) * rows];
    let mut x = vec![0.0; cols];
    if !(g.iter().all(|v| v.is_finite()) && h.iter().all(|v| v.is_finite())) {
        return x;
    }
    let mut in_p = vec![false; cols];
    let gnorm = g.iter().fold(0.0f64, |m, v| m.max(v.abs())).max(1e-300);
    let tol = 1e-12 * gnorm * h.iter().fold(0.0f64, |m, v| m.max(v.abs())).max(1e-300);
    let residual = |x: &[f64]| -> Vec<f64> {
        let mut r = h.to_vec();
        for (j, xj) in x.iter().enumerate() {
            if *xj != 0.0 {
                for (ri, gi) in r.iter_mut().zip(col(j)) {
                    *ri -= gi * xj;
                }
            }
        }
        r
    };
    for _outer in 0..3 * cols + 10 {
        let r = residual(&x);
        let w: Vec<f64> = (0..cols)
            .map(|j| col(j).iter().zip(&r).map(|(a, b)| a * b).sum())
            .collect();
        let Some(t) = (0..cols)
            .filter(|&j| !in_p[j] && w[j] > tol)
            .max_by(|&a, &b| w[a].total_cmp(&w[b]))
        else {
            break;
        };
        in_p[t] = true;
        for _inner in 0..3 * cols + 10 {
            let p: Vec<usize> = (0..cols).filter(|&j| in_p[j]).collect();
            let mut a = Vec::with_capacity(rows * p.len());
            for &j in &p {
                a.extend_from_slice(col(j));
            }
            let zp = PivotedQr::new(a, rows, p.len(), 1e-13).solve(h);
            let mut z = vec![0.0; cols];
            for (k, &j) in p.iter().enumerate() {
                z[j] = zp[k];
            }
            if p.iter().all(|&j| z[j] > 0.0) {
                x = z;
                break;
            }
            let mut alpha = f64::INFINITY;
            for &j in &p {
                if z[j] <= 0.0 {
                    let den = x[j] - z[j];
                    if den > 0.0 {
                        alpha = alpha.min(x[j] / den);
                    } else {
                        alpha = 0.0;
                    }
                }
            }
            if !alpha.is_finite() {
                alpha = 0.0;
            }
            for j in 0..cols {
                x[j] += alpha * (z[j] - x[j]);
            }
            for &j in &p {
                if x[j] <= 1e-300 || (z[j] <= 0.0 && alpha == 0.0) {
                    x[j] = 0.0;
                    in_p[j] = false;
                }
            }
        }
    }
    x
}

/// Least-distance programming: min ‖y‖ subject to E·y ≥ f, with E given as `m` rows of length `n`.
/// Returns `None` when the constraints are incompatible.
pub(crate) fn ldp(e: &[Vec<f64>], f: &[f64], n: usize) -> Option<Vec<f64>> {
    let m = e.len();
    if m == 0 {
        return Some(vec![0.0; n]);
    }
    // G = [Eᵀ; fᵀ] ((n + 1) × m), h = [0, …, 0, 1].
    let rows = n + 1;
    let mut g = vec![0.0; rows * m];
    for (i, (ei, fi)) in e.iter().zip(f).enumerate() {
        g[i * rows..i * rows + n].copy_from_slice(ei);
        g[i * rows + n] = *fi;
    }
    let mut h = vec![0.0; rows];
    h[n] = 1.0;
    let u = nnls(&g, rows, m, &h);
    let mut r = vec![0.0; rows];
    for (i, ui) in u.iter().enumerate() {
        for k in 0..rows {
            r[k] += g[i * rows + k] * ui;
        }
    }
    r[n] -= 1.0;
    let rnorm = r.iter().map(|v| v * v).sum::<f64>().sqrt();
    if rnorm < 1e-12 || r[n].abs() < 1e-300 {
        return None;
    }
    Some((0..n).map(|k| -r[k] / r[n]).collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn nnls_clamps_the_negative_component() {
        // min ‖u − (1, −2)‖ with u ≥ 0 → (1, 0).
        let g = vec![1.0, 0.0, 0.0, 1.0];
        let u = nnls(&g, 2, 2, &[1.0, -2.0]);
        assert!((u[0] - 1.0).abs() < 1e-12 && u[1].abs() < 1e-12, "{u:?}");
    }

    #[test]
    fn an_unconstrained_optimum_inside_the_orthant_is_found() {
        // Rows (1, 0), (0, 1), (1, 1), right-hand side (1, 2, 3): the least-squares solution (1, 2).
        let g = vec![1.0, 0.0, 1.0, 0.0, 1.0, 1.0];
        let u = nnls(&g, 3, 2, &[1.0, 2.0, 3.0]);
        assert!(
            (u[0] - 1.0).abs() < 1e-12 && (u[1] - 2.0).abs() < 1e-12,
            "{u:?}"
        );
    }

    #[test]
    fn a_negative_unconstrained_component_is_clamped_to_zero() {
        // Rows (1, 1), (1, 0), right-hand side (1, 2): unconstrained (2, −1); with u ≥ 0 the optimum is
        // u = (b·a₁/|a₁|², 0) = (1.5, 0).
        let g = vec![1.0, 1.0, 1.0, 0.0];
        let u = nnls(&g, 2, 2, &[1.0, 2.0]);
        assert!((u[0] - 1.5).abs() < 1e-12 && u[1] == 0.0, "{u:?}");
    }

    #[test]
    fn non_finite_input_gives_zero() {
        let g = vec![1.0, f64::NAN];
        assert_eq!(nnls(&g, 2, 1, &[1.0, 2.0]), vec![0.0]);
    }

    #[test]
    fn ldp_finds_the_nearest_feasible_point() {
        // min ‖y‖ with y₀ + y₁ ≥ 2 → (1, 1); with y₀ ≥ 3 as well → (3, 0).
        let y = ldp(&[vec![1.0, 1.0]], &[2.0], 2).unwrap();
        assert!(
            (y[0] - 1.0).abs() < 1e-12 && (y[1] - 1.0).abs() < 1e-12,
            "{y:?}"
        );
        let y = ldp(&[vec![1.0, 1.0], vec![1.0, 0.0]], &[2.0, 3.0], 2).unwrap();
        assert!((y[0] - 3.0).abs() < 1e-12 && y[1].abs() < 1e-12, "{y:?}");
        // y₀ ≥ 1 and −y₀ ≥ 0 cannot both hold.
        assert!(ldp(&[vec![1.0], vec![-1.0]], &[1.0, 0.0], 1).is_none());
    }
}
