//! The weighted least-squares problem of one lumped structure on one sweep, for the LM solver.
//!
//! Residuals, interleaved per point: `(Re Z_model − Re Z_meas)/σ`, `(Im Z_model − Im Z_meas)/σ`, with σ
//! the sweep's per-point standard uncertainty; then, when a DCR reading is given, one prior residual
//! `(rdc − reading)/σ_reading`. So χ² = Σ r² is the cost a scipy `least_squares` with the same residual
//! vector would report as 2·cost.

use super::lm::{NormalEquations, RecycleJacobian};
use crate::model::lumped::{self, BLOCK, Block, MAX_PARAMETERS, Structure, Values};
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
    /// Scratch for [`LumpedProblem::normal_equations_into`], allocated once per problem.
    block: RefCell<Box<Block>>,
}

/// x·y over one block's columns, eight accumulators so it vectorises.
#[inline(always)]
fn dot(x: &[f64; 2 * BLOCK], y: &[f64; 2 * BLOCK]) -> f64 {
    let mut acc = [0.0; 8];
    for (a, b) in x.chunks_exact(8).zip(y.chunks_exact(8)) {
        for i in 0..8 {
            acc[i] += a[i] * b[i];
        }
    }
    (acc[0] + acc[4]) + (acc[1] + acc[5]) + (acc[2] + acc[6]) + (acc[3] + acc[7])
}

impl<'a> LumpedProblem<'a> {
    pub fn new(data: &'a FitData, structure: &'a Structure) -> Self {
        LumpedProblem {
            data,
            structure,
            spare: RefCell::new(None),
            block: RefCell::new(Block::new_boxed()),
        }
    }

    fn buffer(&self) -> DMatrix<f64> {
        let shape = (self.data.residual_count(), self.structure.len());
        // The fills write every entry, so a recycled matrix needs no zeroing.
        match self.spare.borrow_mut().take() {
            Some(j) if j.shape() == shape => j,
            _ => DMatrix::zeros(shape.0, shape.1),
        }
    }

    /// χ² = Σ r², JᵀJ and Jᵀr at θ in one pass over the points, without storing J: the points go
    /// through [`lumped::eval_block`] [`BLOCK`] at a time, and each block's weighted columns are
    /// multiplied out while they are in L1 cache. `jtj` is n×n, `g` has n entries (n = θ's length).
    pub fn normal_equations_into(
        &self,
        theta: &[f64],
        jtj: &mut DMatrix<f64>,
        g: &mut DVector<f64>,
    ) -> f64 {
        let d = self.data;
        let n = self.structure.len();
        assert!(jtj.shape() == (n, n) && g.len() == n, "JᵀJ must be {n}×{n}");
        let v = Values::new(self.structure, theta);
        let mut block = self.block.borrow_mut();
        let b = &mut **block;
        // Lower triangle of JᵀJ, packed row by row.
        let mut tri = [0.0; MAX_PARAMETERS * (MAX_PARAMETERS + 1) / 2];
        let mut jr = [0.0; MAX_PARAMETERS];
        let mut cost = 0.0;
        let mut r = [0.0; 2 * BLOCK];
        let points = d.frequency_hz.len();
        let mut start = 0;
        while start < points {
            let end = (start + BLOCK).min(points);
            let m = end - start;
            lumped::eval_block(
                self.structure,
                &v,
                &d.frequency_hz[start..end],
                &d.sqrt_f[start..end],
                b,
            );
            let w = &d.inv_sigma[start..end];
            let zm = &d.z[start..end];
            for k in 0..m {
                r[k] = (b.z[k] - zm[k].re) * w[k];
                r[BLOCK + k] = (b.z[BLOCK + k] - zm[k].im) * w[k];
            }
            for col in b.d[..n].iter_mut() {
                for k in 0..m {
                    col[k] *= w[k];
                    col[BLOCK + k] *= w[k];
                }
            }
            if m < BLOCK {
                // The last, partial block: the unused entries must not count.
                for row in std::iter::once(&mut r).chain(b.d[..n].iter_mut()) {
                    row[m..BLOCK].fill(0.0);
                    row[BLOCK + m..].fill(0.0);
                }
            }
            cost += dot(&r, &r);
            let mut t = 0;
            for (a, jr_a) in jr[..n].iter_mut().enumerate() {
                *jr_a += dot(&b.d[a], &r);
                for c in 0..=a {
                    tri[t] += dot(&b.d[a], &b.d[c]);
                    t += 1;
                }
            }
            start = end;
        }
        if let Some((value, sigma)) = d.dcr_prior {
            let rdc = theta[1].exp();
            let (res, der) = ((rdc - value) / sigma, rdc / sigma);
            cost += res * res;
            jr[1] += der * res;
            tri[2] += der * der;
        }
        let mut t = 0;
        for a in 0..n {
            g[a] = jr[a];
            for c in 0..=a {
                jtj[(a, c)] = tri[t];
                jtj[(c, a)] = tri[t];
                t += 1;
            }
        }
        cost
    }
}

impl NormalEquations for LumpedProblem<'_> {
    fn normal_equations(
        &self,
        x: &[f64],
        jtj: &mut DMatrix<f64>,
        g: &mut DVector<f64>,
    ) -> Result<f64, Error> {
        Ok(self.normal_equations_into(x, jtj, g))
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
        self.residuals_into(theta.as_slice(), r.as_mut_slice());
        Ok(r)
    }
}

impl Jacobian for LumpedProblem<'_> {
    type Param = DVector<f64>;
    type Jacobian = DMatrix<f64>;
    fn jacobian(&self, theta: &DVector<f64>) -> Result<DMatrix<f64>, Error> {
        let mut j = self.buffer();
        self.jacobian_into(theta.as_slice(), &mut j);
        Ok(j)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fit::lm::normal_equations;
    use crate::model::{LumpedModel, Section, SectionKind};

    fn choke_with_sections() -> LumpedModel {
        LumpedModel {
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
        }
    }

    #[test]
    fn the_fused_normal_equations_equal_those_of_the_stored_jacobian() {
        // 150 points: two full blocks and a partial one.
        let f: Vec<f64> = (0..150).map(|i| 1e4 * 1.08f64.powi(i)).collect();
        let data = FitData {
            sqrt_f: f.iter().map(|x| x.sqrt()).collect(),
            z: f.iter()
                .map(|&x| Complex64::new(1.0 + 1e-7 * x, x * 1e-6))
                .collect(),
            inv_sigma: f.iter().map(|x| 3.0 + x.ln()).collect(),
            frequency_hz: f,
            dcr_prior: Some((0.08, 0.001)),
        };
        let full = choke_with_sections();
        let mut no_sections = full.clone();
        no_sections.sections.clear();
        let mut bare = no_sections.clone();
        bare.rp_ohm = None;
        bare.ls_h = 0.0;
        let mut only_ls = bare.clone();
        only_ls.ls_h = 2e-9;
        for (m, prior) in [
            (&full, true),
            (&no_sections, true),
            (&no_sections, false),
            (&bare, false),
            (&only_ls, true),
        ] {
            let data = FitData {
                dcr_prior: if prior { data.dcr_prior } else { None },
                ..data.clone()
            };
            let s = Structure::of(m);
            let n = s.len();
            let theta = s.pack(m);
            let p = LumpedProblem::new(&data, &s);
            let tv = DVector::from_vec(theta.clone());
            let (r, j) = (p.apply(&tv).unwrap(), p.jacobian(&tv).unwrap());
            let (jtj_ref, g_ref) = normal_equations(&j, &r);
            let mut jtj = DMatrix::zeros(n, n);
            let mut g = DVector::zeros(n);
            let cost = p.normal_equations_into(&theta, &mut jtj, &mut g);
            let label = s.label();
            assert!((cost / r.norm_squared() - 1.0).abs() < 1e-12, "{label}");
            for a in 0..n {
                let ga = (g[a] - g_ref[a]).abs();
                assert!(
                    ga <= 1e-10 * (jtj_ref[(a, a)] * cost).sqrt(),
                    "{label} g[{a}]"
                );
                for c in 0..n {
                    let scale = (jtj_ref[(a, a)] * jtj_ref[(c, c)]).sqrt();
                    assert!(
                        (jtj[(a, c)] - jtj_ref[(a, c)]).abs() <= 1e-10 * scale,
                        "{label} JᵀJ[{a},{c}]: {} vs {}",
                        jtj[(a, c)],
                        jtj_ref[(a, c)]
                    );
                }
            }
        }
    }
}
