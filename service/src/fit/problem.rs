//! The weighted least-squares problem of one lumped structure on one sweep, for the LM solver.
//!
//! Residuals, interleaved per point: `(Re Z_model − Re Z_meas)/σ`, `(Im Z_model − Im Z_meas)/σ`, with σ
//! the sweep's per-point standard uncertainty; then, when a DCR reading is given, one prior residual
//! `(rdc − reading)/σ_reading`. So χ² = Σ r² is the cost a scipy `least_squares` with the same residual
//! vector would report as 2·cost.

use super::lm::RecycleJacobian;
use crate::model::lumped::{self, MAX_PARAMETERS, Structure, Values};
use argmin::core::{Error, Jacobian, Operator};
use nalgebra::{DMatrix, DVector};
use num_complex::Complex64;
use std::cell::RefCell;

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
    /// A Jacobian the solver handed back, refilled by the next [`Jacobian::jacobian`] call.
    pub spare: RefCell<Option<DMatrix<f64>>>,
    /// When set, every residual evaluation also fills the Jacobian in the same pass over the points
    /// and keeps it for a following `jacobian` call at the same θ: cheaper near the optimum, where
    /// nearly every trial step is accepted; wasted work on rejected steps.
    pub combined: bool,
    cached: RefCell<Option<(Vec<f64>, DMatrix<f64>)>>,
}

impl<'a> LumpedProblem<'a> {
    pub fn new(data: &'a FitData, structure: &'a Structure) -> Self {
        LumpedProblem {
            data,
            structure,
            spare: RefCell::new(None),
            combined: false,
            cached: RefCell::new(None),
        }
    }

    pub fn with_combined(mut self, combined: bool) -> Self {
        self.combined = combined;
        self
    }

    fn buffer(&self) -> DMatrix<f64> {
        let shape = (self.data.residual_count(), self.structure.len());
        // The fills write every entry, so a recycled matrix needs no zeroing.
        let recycled = self
            .spare
            .borrow_mut()
            .take()
            .or_else(|| self.cached.borrow_mut().take().map(|c| c.1));
        match recycled {
            Some(j) if j.shape() == shape => j,
            _ => DMatrix::zeros(shape.0, shape.1),
        }
    }

    /// Residuals and Jacobian in one pass over the points.
    pub fn residuals_and_jacobian_into(&self, theta: &[f64], r: &mut [f64], j: &mut DMatrix<f64>) {
        let d = self.data;
        let n = self.structure.len();
        let v = Values::new(self.structure, theta);
        let mut dz = [Complex64::new(0.0, 0.0); MAX_PARAMETERS];
        for (k, ((&f, &sf), (&zm, &w))) in d
            .frequency_hz
            .iter()
            .zip(&d.sqrt_f)
            .zip(d.z.iter().zip(&d.inv_sigma))
            .enumerate()
        {
            let z = lumped::eval(self.structure, &v, f, sf, Some(&mut dz[..n]));
            r[2 * k] = (z.re - zm.re) * w;
            r[2 * k + 1] = (z.im - zm.im) * w;
            for (p, dzp) in dz[..n].iter().enumerate() {
                j[(2 * k, p)] = dzp.re * w;
                j[(2 * k + 1, p)] = dzp.im * w;
            }
        }
        if let Some((value, sigma)) = d.dcr_prior {
            let row = 2 * d.frequency_hz.len();
            r[row] = (theta[1].exp() - value) / sigma;
            for p in 0..n {
                j[(row, p)] = 0.0;
            }
            j[(row, 1)] = theta[1].exp() / sigma;
        }
    }
}

impl RecycleJacobian for LumpedProblem<'_> {
    fn recycle_jacobian(&self, jacobian: DMatrix<f64>) {
        *self.spare.borrow_mut() = Some(jacobian);
    }
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
        if self.combined {
            let mut j = self.buffer();
            self.residuals_and_jacobian_into(theta.as_slice(), r.as_mut_slice(), &mut j);
            *self.cached.borrow_mut() = Some((theta.as_slice().to_vec(), j));
        } else {
            self.residuals_into(theta.as_slice(), r.as_mut_slice());
        }
        Ok(r)
    }
}

impl Jacobian for LumpedProblem<'_> {
    type Param = DVector<f64>;
    type Jacobian = DMatrix<f64>;
    fn jacobian(&self, theta: &DVector<f64>) -> Result<DMatrix<f64>, Error> {
        let hit = {
            let mut cached = self.cached.borrow_mut();
            match cached.take() {
                Some((t, j)) if t.as_slice() == theta.as_slice() => Some(j),
                other => {
                    *cached = other;
                    None
                }
            }
        };
        if let Some(j) = hit {
            return Ok(j);
        }
        let mut j = self.buffer();
        self.jacobian_into(theta.as_slice(), &mut j);
        Ok(j)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{LumpedModel, Section, SectionKind};

    #[test]
    fn the_combined_pass_equals_the_separate_ones_and_the_cache_is_keyed_by_theta() {
        let m = LumpedModel {
            l0_h: 22e-6,
            rdc_ohm: 0.08,
            k_ac_ohm_per_sqrt_hz: 2e-4,
            rp_ohm: Some(40e3),
            cp_f: 3.5e-12,
            ls_h: 4e-9,
            sections: vec![Section {
                kind: SectionKind::Series,
                r_ohm: 15.0,
                l_h: 300e-9,
                c_f: 1.2e-12,
            }],
        };
        let f: Vec<f64> = (0..50).map(|i| 1e4 * 1.25f64.powi(i)).collect();
        let data = FitData {
            sqrt_f: f.iter().map(|x| x.sqrt()).collect(),
            z: f.iter().map(|&x| Complex64::new(1.0, x * 1e-6)).collect(),
            inv_sigma: vec![3.0; f.len()],
            frequency_hz: f,
            dcr_prior: Some((0.08, 0.001)),
        };
        let s = Structure::of(&m);
        let theta = DVector::from_vec(s.pack(&m));
        let plain = LumpedProblem::new(&data, &s);
        let combined = LumpedProblem::new(&data, &s).with_combined(true);
        let (r1, j1) = (
            plain.apply(&theta).unwrap(),
            plain.jacobian(&theta).unwrap(),
        );
        let (r2, j2) = (
            combined.apply(&theta).unwrap(),
            combined.jacobian(&theta).unwrap(),
        );
        assert_eq!(r1, r2);
        assert_eq!(j1, j2);
        // A Jacobian at another θ is computed afresh, not taken from the cache.
        let other = theta.add_scalar(0.01);
        combined.apply(&theta).unwrap();
        assert_eq!(
            combined.jacobian(&other).unwrap(),
            plain.jacobian(&other).unwrap()
        );
    }
}
