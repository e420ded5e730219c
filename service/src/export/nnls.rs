//! Non-negative least squares (Lawson & Hanson, "Solving Least Squares Problems", 1974, ch. 23): the
//! active-set method. Used to give every ladder element a non-negative value, which is what makes the
//! synthesised network passive.

use nalgebra::{DMatrix, DVector};

/// Minimises ‖A·x − b‖₂ subject to x ≥ 0. Columns should be scaled to comparable norms by the caller.
pub(crate) fn nnls(a: &DMatrix<f64>, b: &DVector<f64>) -> DVector<f64> {
    let n = a.ncols();
    let mut x = DVector::<f64>::zeros(n);
    let mut passive = vec![false; n];
    let scale = a.norm() * b.norm().max(f64::MIN_POSITIVE);
    let tol = 1e-13 * scale;
    for _outer in 0..(3 * n + 10) {
        let w = a.transpose() * (b - a * &x);
        let candidate = (0..n)
            .filter(|&j| !passive[j])
            .max_by(|&i, &j| w[i].total_cmp(&w[j]));
        let Some(j) = candidate else { break };
        if w[j] <= tol {
            break;
        }
        passive[j] = true;
        for _inner in 0..(3 * n + 10) {
            let s = solve_on(a, b, &passive);
            if (0..n).all(|i| !passive[i] || s[i] > 0.0) {
                x = s;
                break;
            }
            let mut alpha = f64::INFINITY;
            for i in 0..n {
                if passive[i] && s[i] <= 0.0 {
                    let step = x[i] / (x[i] - s[i]);
                    if step < alpha {
                        alpha = step;
                    }
                }
            }
            x += (s - &x) * alpha;
            for i in 0..n {
                if passive[i] && x[i] <= 1e-15 * x.amax().max(f64::MIN_POSITIVE) {
                    passive[i] = false;
                    x[i] = 0.0;
                }
            }
        }
    }
    x
}

/// Unconstrained least squares on the passive columns; zero elsewhere.
fn solve_on(a: &DMatrix<f64>, b: &DVector<f64>, passive: &[bool]) -> DVector<f64> {
    let cols: Vec<usize> = (0..passive.len()).filter(|&j| passive[j]).collect();
    let sub = DMatrix::from_fn(a.nrows(), cols.len(), |r, c| a[(r, cols[c])]);
    let sol = sub
        .svd(true, true)
        .solve(b, 1e-14)
        .unwrap_or_else(|_| DVector::zeros(cols.len()));
    let mut out = DVector::zeros(passive.len());
    for (k, &j) in cols.iter().enumerate() {
        out[j] = sol[k];
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unconstrained_optimum_inside_the_orthant_is_found() {
        let a = DMatrix::from_row_slice(3, 2, &[1.0, 0.0, 0.0, 1.0, 1.0, 1.0]);
        let b = DVector::from_vec(vec![1.0, 2.0, 3.0]);
        let x = nnls(&a, &b);
        assert!(
            (x[0] - 1.0).abs() < 1e-12 && (x[1] - 2.0).abs() < 1e-12,
            "{x}"
        );
    }

    #[test]
    fn a_negative_unconstrained_component_is_clamped_to_zero() {
        // Unconstrained solution is (2, -1); with x >= 0 the optimum is x = (b·a1/|a1|², 0) = (1.5, 0).
        let a = DMatrix::from_row_slice(2, 2, &[1.0, 1.0, 1.0, 0.0]);
        let b = DVector::from_vec(vec![1.0, 2.0]);
        let x = nnls(&a, &b);
        assert!((x[0] - 1.5).abs() < 1e-12 && x[1] == 0.0, "{x}");
    }
}
