//! The weighted least-squares problem of one lumped structure on one sweep, for the LM solver.
//!
//! Residuals, interleaved per point: `(Re Z_model − Re Z_meas)/σ`, `(Im Z_model − Im Z_meas)/σ`, with σ
//! the sweep's per-point standard uncertainty; then, when a DCR reading is given, one prior residual
//! `(rdc − reading)/σ_reading`. So χ² = Σ r² is the cost a scipy `least_squares` with the same residual
//! vector would report as 2·cost.

use crate::model::lumped::{self, MAX_PARAMETERS, Structure, Values};
use argmin::core::{Error, Jacobian, Operator};
use nalgebra::{DMatrix, DVector};
use num_complex::Complex64;

/// The sweep prepared once for many fits: √f and 1/σ precomputed.
#[derive(Debug, Clone)]
pub struct FitData {
    pub frequency_hz: Vec<f64>,
    pub sqrt_f: Vec<f64>,
    pub z: Vec<Complex64>,
    pub inv_sigma: Vec<f64>,
    /// DCR reading as a prior on `rdc_ohm`: (value, σ).
    pub dcr_prior: Option<(f64, f64)>,
}

impl FitData {
    pub fn residual_count(&self) -> usize {
        2 * self.frequency_hz.len() + self.dcr_prior.is_some() as usize
    }
}

pub struct LumpedProblem<'a> {
    pub data: &'a FitData,
    pub structure: &'a Structure,
}

impl LumpedProblem<'_> {
    /// Residuals into a caller's buffer (length [`FitData::residual_count`]).
    pub fn residuals_into(&self, theta: &[f64], out: &mut [f64]) {
        let d = self.data;
        let v = Values::new(self.structure, theta);
        for (k, ((&f, &sf), (&zm, &w))) in d
            .frequency_hz
            .iter()
            .zip(&d.sqrt_f)
            .zip(d.z.iter().zip(&d.inv_sigma))
            .enumerate()
        {
            let z = lumped::eval(self.structure, &v, f, sf, None);
            out[2 * k] = (z.re - zm.re) * w;
            out[2 * k + 1] = (z.im - zm.im) * w;
        }
        if let Some((value, sigma)) = d.dcr_prior {
            out[2 * d.frequency_hz.len()] = (theta[1].exp() - value) / sigma;
        }
    }

    /// Jacobian ∂r/∂θ into a caller's column-major matrix.
    pub fn jacobian_into(&self, theta: &[f64], out: &mut DMatrix<f64>) {
        let d = self.data;
        let n = self.structure.len();
        let v = Values::new(self.structure, theta);
        let mut dz = [Complex64::new(0.0, 0.0); MAX_PARAMETERS];
        for (k, ((&f, &sf), &w)) in d
            .frequency_hz
            .iter()
            .zip(&d.sqrt_f)
            .zip(&d.inv_sigma)
            .enumerate()
        {
            lumped::eval(self.structure, &v, f, sf, Some(&mut dz[..n]));
            for (p, dzp) in dz[..n].iter().enumerate() {
                out[(2 * k, p)] = dzp.re * w;
                out[(2 * k + 1, p)] = dzp.im * w;
            }
        }
        if let Some((_, sigma)) = d.dcr_prior {
            let row = 2 * d.frequency_hz.len();
            for p in 0..n {
                out[(row, p)] = 0.0;
            }
            out[(row, 1)] = theta[1].exp() / sigma;
        }
    }
}

impl Operator for LumpedProblem<'_> {
    type Param = DVector<f64>;
    type Output = DVector<f64>;
    fn apply(&self, theta: &DVector<f64>) -> Result<DVector<f64>, Error> {
        let mut r = DVector::zeros(self.data.residual_count());
        self.residuals_into(theta.as_slice(), r.as_mut_slice());
        Ok(r)
    }
}

impl Jacobian for LumpedProblem<'_> {
    type Param = DVector<f64>;
    type Jacobian = DMatrix<f64>;
    fn jacobian(&self, theta: &DVector<f64>) -> Result<DMatrix<f64>, Error> {
        let mut j = DMatrix::zeros(self.data.residual_count(), self.structure.len());
        self.jacobian_into(theta.as_slice(), &mut j);
        Ok(j)
    }
}
