//! The weighted least-squares problem of one lumped structure on one sweep, for the LM solver.
//!
//! Residuals, interleaved per point: `(Re Z_model − Re Z_meas)·w`, `(Im Z_model − Im Z_meas)·w`, with
//! w = √g/σ: σ the sweep's per-point standard uncertainty and g the point's density weight (see
//! [`density_weights`]); then, when a DCR reading is given, one prior residual
//! `(rdc − reading)/σ_reading`; then one residual per plausibility wall ([`Wall`]), zero inside the
//! plausible range. So χ² = Σ r² is the cost a scipy `least_squares` with the same residual vector
//! would report as 2·cost.

use super::lm::{NormalEquations, RecycleJacobian};
use crate::model::lumped::{self, BLOCK, Block, MAX_PARAMETERS, Param, Structure, Values};
use argmin::core::{Error, Jacobian, Operator};
use nalgebra::{DMatrix, DVector};
use num_complex::Complex64;
use std::cell::RefCell;

/// Width of a wall in ln units: a parameter 1 % past its plausible range adds 1 to χ², 10 % adds about
/// 90, so the data can push it past only when it matters to them enormously.
pub const WALL_WIDTH: f64 = 0.01;

/// A soft wall on a linear combination of log-parameters: `Σ cᵢ·ln pᵢ ≤ bound`, with the residual
/// `(Σ cᵢ·ln pᵢ − bound)/WALL_WIDTH` when it is exceeded and 0 inside. A wall whose parameters a
/// structure lacks does not apply to it.
#[derive(Debug, Clone, PartialEq)]
pub struct Wall {
    pub terms: Vec<(Param, f64)>,
    pub bound: f64,
    /// What the wall keeps plausible, for people ("Cp above 1 aF").
    pub label: String,
}

/// The sweep prepared once for many fits: √f, σ and the fit weights precomputed.
#[derive(Debug, Clone)]
pub struct FitData {
    pub frequency_hz: Vec<f64>,
    pub sqrt_f: Vec<f64>,
    pub z: Vec<Complex64>,
    /// The fit weight of each point, √g/σ.
    pub inv_sigma: Vec<f64>,
    /// The sweep's own standard uncertainty of each point.
    pub sigma: Vec<f64>,
    /// DCR reading as a prior on `rdc_ohm`: (value, σ).
    pub dcr_prior: Option<(f64, f64)>,
    /// Plausibility walls on the parameters.
    pub walls: Vec<Wall>,
    /// Multiplies every wall residual: √(χ²/M) of the curve's starting model, at least 1, so a model
    /// that misses the data by far more than the noise cannot push through a wall either.
    pub wall_stiffness: f64,
}

impl FitData {
    /// Data and prior residuals (the walls not counted).
    pub fn residual_count(&self) -> usize {
        2 * self.frequency_hz.len() + self.dcr_prior.is_some() as usize
    }

    /// The number of residuals the fit effectively has: 2·Σg over the points, plus the prior.
    pub fn effective_residuals(&self) -> f64 {
        let g: f64 = self
            .inv_sigma
            .iter()
            .zip(&self.sigma)
            .map(|(w, s)| (w * s).powi(2))
            .sum();
        2.0 * g + self.dcr_prior.is_some() as usize as f64
    }
}

/// Most a single point's density weight may be: one point stands for at most this many points of a
/// logarithmic sweep, so one stray reading in an otherwise empty decade cannot carry the fit.
pub const MAX_DENSITY_WEIGHT: f64 = 100.0;

/// Density weights that let each part of the band count as it would in a logarithmic sweep of the
/// same number of points: g = min(Δ/Δ̄, [`MAX_DENSITY_WEIGHT`]), where Δ is the point's share of ln f
/// (half the distance in ln f between its neighbours) and Δ̄ = ln(f_max/f_min)/(N − 1) the share in a
/// logarithmic sweep. A logarithmic sweep has g = 1 everywhere; a linear sweep (most analyser sweeps)
/// weighs its crowded top decade down and its few low points up, so the decades where L0 and Rdc show
/// count as much as the one where the points crowd. The weights make the fit minimise the misfit
/// integrated over ln f; they say nothing about how sure a point is, so the parameters' covariance is
/// the sandwich form of the weighted estimator (see `fit::lumped::spread`), which counts every point
/// with its own σ.
pub fn density_weights(frequency_hz: &[f64]) -> Vec<f64> {
    let n = frequency_hz.len();
    if n < 3 {
        return vec![1.0; n];
    }
    let x: Vec<f64> = frequency_hz.iter().map(|f| f.ln()).collect();
    let mean = (x[n - 1] - x[0]) / (n - 1) as f64;
    (0..n)
        .map(|k| {
            let share = match k {
                0 => x[1] - x[0],
                k if k == n - 1 => x[n - 1] - x[n - 2],
                k => 0.5 * (x[k + 1] - x[k - 1]),
            };
            (share / mean).min(MAX_DENSITY_WEIGHT)
        })
        .collect()
}

/// Walls compiled for one structure: (θ index, coefficient) terms and the bound.
type CompiledWall = ([(usize, f64); 4], usize, f64);

fn compile_walls(walls: &[Wall], structure: &Structure) -> Vec<CompiledWall> {
    let mut out = Vec::new();
    'walls: for w in walls {
        let mut terms = [(0usize, 0.0f64); 4];
        if w.terms.len() > 4 {
            continue;
        }
        for (t, (p, c)) in w.terms.iter().enumerate() {
            match structure.index(*p) {
                Some(i) => terms[t] = (i, *c),
                None => continue 'walls,
            }
        }
        out.push((terms, w.terms.len(), w.bound));
    }
    out
}

/// Packed lower-triangle index of (a, c), c ≤ a.
fn tri_index(a: usize, c: usize) -> usize {
    let (a, c) = if c > a { (c, a) } else { (a, c) };
    a * (a + 1) / 2 + c
}

pub struct LumpedProblem<'a> {
    pub data: &'a FitData,
    pub structure: &'a Structure,
    walls: Vec<CompiledWall>,
    /// A Jacobian the solver handed back, refilled by the next [`Jacobian::jacobian`] call.
    pub spare: RefCell<Option<DMatrix<f64>>>,
    /// Scratch for [`LumpedProblem::normal_equations_into`], taken from [`SPARE_BLOCK`] (or allocated)
    /// once per problem and handed back when the problem is dropped.
    block: RefCell<Option<Box<Block>>>,
}

/// Packed lower-triangle entries of a structure of up to 16 parameters (every structure without a
/// dispersive core and with at most three sections).
const SMALL_TRIANGLE: usize = 16 * 17 / 2;

thread_local! {
    /// One block scratch per thread, so the stages and candidates of a fit do not each allocate and
    /// zero 31 kB. Its contents do not matter: a pass writes every entry it reads.
    static SPARE_BLOCK: RefCell<Option<Box<Block>>> = const { RefCell::new(None) };
}

impl Drop for LumpedProblem<'_> {
    fn drop(&mut self) {
        if let Some(b) = self.block.get_mut().take() {
            // During thread teardown the slot may be gone; the block is then simply freed.
            let _ = SPARE_BLOCK.try_with(|s| *s.borrow_mut() = Some(b));
        }
    }
}

/// x·yᵢ for W columns yᵢ of one block at once, so each chunk of x is loaded once for all of them.
/// With `FMA` (only instantiated from the pass compiled for AVX2 and FMA, after the processor was
/// checked) the products run as fused multiply-adds four lanes wide, which changes the rounding only;
/// otherwise eight accumulators per column so the loop vectorises for the baseline target.
#[inline(always)]
fn dots<const FMA: bool, const W: usize>(
    x: &[f64; 2 * BLOCK],
    ys: [&[f64; 2 * BLOCK]; W],
) -> [f64; W] {
    #[cfg(target_arch = "x86_64")]
    if FMA {
        // SAFETY: FMA = true is only used by `normal_equations_fma`, which runs after the processor
        // was found to support AVX2 and FMA.
        return unsafe { dots_fma(x, ys) };
    }
    let mut acc = [[0.0f64; 8]; W];
    for c in 0..2 * BLOCK / 8 {
        let k = 8 * c;
        for q in 0..W {
            for l in 0..8 {
                acc[q][l] += x[k + l] * ys[q][k + l];
            }
        }
    }
    acc.map(|a| ((a[0] + a[4]) + (a[1] + a[5])) + ((a[2] + a[6]) + (a[3] + a[7])))
}

/// [`dots`] with AVX2 fused multiply-adds: two registers of four lanes per column, so the 2·W
/// accumulation chains hide the latency of the fused adds.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
#[inline]
unsafe fn dots_fma<const W: usize>(x: &[f64; 2 * BLOCK], ys: [&[f64; 2 * BLOCK]; W]) -> [f64; W] {
    use std::arch::x86_64::*;
    const { assert!((2 * BLOCK).is_multiple_of(8)) };
    let (xp, yp) = (x.as_ptr(), ys.map(|y| y.as_ptr()));
    // SAFETY (whole body): every load reads four f64 starting at k or k + 4 with k ≤ 2·BLOCK − 8,
    // inside the arrays of 2·BLOCK entries; the store writes a local array of four.
    unsafe {
        let mut a0 = [_mm256_setzero_pd(); W];
        let mut a1 = [_mm256_setzero_pd(); W];
        let mut k = 0;
        while k < 2 * BLOCK {
            let x0 = _mm256_loadu_pd(xp.add(k));
            let x1 = _mm256_loadu_pd(xp.add(k + 4));
            for q in 0..W {
                a0[q] = _mm256_fmadd_pd(x0, _mm256_loadu_pd(yp[q].add(k)), a0[q]);
                a1[q] = _mm256_fmadd_pd(x1, _mm256_loadu_pd(yp[q].add(k + 4)), a1[q]);
            }
            k += 8;
        }
        let mut out = [0.0; W];
        for q in 0..W {
            let mut lanes = [0.0; 4];
            _mm256_storeu_pd(lanes.as_mut_ptr(), _mm256_add_pd(a0[q], a1[q]));
            out[q] = (lanes[0] + lanes[2]) + (lanes[1] + lanes[3]);
        }
        out
    }
}

/// The weighted residuals of one block, `(Z_model − Z_meas)·w`, real parts in `r[..BLOCK]` and
/// imaginary parts in `r[BLOCK..]` like the block's Z; entries past the block's `zm.len()` points are
/// zeroed so they do not count.
#[inline(always)]
fn weighted_residuals(z: &[f64; 2 * BLOCK], zm: &[Complex64], w: &[f64], r: &mut [f64; 2 * BLOCK]) {
    let m = zm.len();
    for k in 0..m {
        r[k] = (z[k] - zm[k].re) * w[k];
        r[BLOCK + k] = (z[BLOCK + k] - zm[k].im) * w[k];
    }
    r[m..BLOCK].fill(0.0);
    r[BLOCK + m..].fill(0.0);
}

/// Adds one block's products to the packed lower triangle of JᵀJ (`tri`) and to Jᵀr (`jr`), row by
/// row, up to four columns per sweep over the block (the last sweep of a row includes r); returns
/// rᵀr. `d` holds the block's weighted Jacobian columns.
#[inline(always)]
fn accumulate<const FMA: bool>(
    d: &[[f64; 2 * BLOCK]],
    r: &[f64; 2 * BLOCK],
    tri: &mut [f64],
    jr: &mut [f64],
) -> f64 {
    let mut t = 0;
    for a in 0..d.len() {
        let x = &d[a];
        let mut c = 0;
        while c + 4 <= a + 1 {
            for v in dots::<FMA, 4>(x, [&d[c], &d[c + 1], &d[c + 2], &d[c + 3]]) {
                tri[t] += v;
                t += 1;
            }
            c += 4;
        }
        let last = match a + 1 - c {
            0 => dots::<FMA, 1>(x, [r])[0],
            1 => {
                let [s0, s] = dots::<FMA, 2>(x, [&d[c], r]);
                tri[t] += s0;
                s
            }
            2 => {
                let [s0, s1, s] = dots::<FMA, 3>(x, [&d[c], &d[c + 1], r]);
                tri[t] += s0;
                tri[t + 1] += s1;
                s
            }
            _ => {
                let [s0, s1, s2, s] = dots::<FMA, 4>(x, [&d[c], &d[c + 1], &d[c + 2], r]);
                tri[t] += s0;
                tri[t + 1] += s1;
                tri[t + 2] += s2;
                s
            }
        };
        t += a + 1 - c;
        jr[a] += last;
    }
    dots::<FMA, 1>(r, [r])[0]
}

impl<'a> LumpedProblem<'a> {
    pub fn new(data: &'a FitData, structure: &'a Structure) -> Self {
        LumpedProblem {
            data,
            structure,
            walls: compile_walls(&data.walls, structure),
            spare: RefCell::new(None),
            block: RefCell::new(Some(
                SPARE_BLOCK
                    .try_with(|s| s.borrow_mut().take())
                    .ok()
                    .flatten()
                    .unwrap_or_else(Block::new_boxed),
            )),
        }
    }

    /// Rows of the residual vector: the data, the prior and one per wall that applies.
    pub fn residual_rows(&self) -> usize {
        self.data.residual_count() + self.walls.len()
    }

    /// The walls' residuals at θ: (θ indices and coefficients, residual) of each exceeded wall.
    fn wall_residual(&self, wall: &CompiledWall, theta: &[f64]) -> f64 {
        let (terms, len, bound) = wall;
        let g: f64 = terms[..*len].iter().map(|(i, c)| c * theta[*i]).sum();
        if g > *bound {
            (g - bound) * self.data.wall_stiffness / WALL_WIDTH
        } else {
            0.0
        }
    }

    /// Which walls are exceeded at θ (their labels), for the report.
    pub fn exceeded_walls(&self, theta: &[f64]) -> Vec<String> {
        let applicable: Vec<&Wall> = self
            .data
            .walls
            .iter()
            .filter(|w| {
                w.terms
                    .iter()
                    .all(|(p, _)| self.structure.index(*p).is_some())
            })
            .collect();
        self.walls
            .iter()
            .zip(applicable)
            .filter(|(c, _)| self.wall_residual(c, theta) > 0.0)
            .map(|(_, w)| w.label.clone())
            .collect()
    }

    /// χ², Jᵀr and JᵀJ contributions of the walls.
    fn add_walls(&self, theta: &[f64], tri: &mut [f64], jr: &mut [f64]) -> f64 {
        let mut cost = 0.0;
        for wall in &self.walls {
            let r = self.wall_residual(wall, theta);
            if r == 0.0 {
                continue;
            }
            cost += r * r;
            let k = self.data.wall_stiffness / WALL_WIDTH;
            let terms = &wall.0[..wall.1];
            for &(a, ca) in terms {
                jr[a] += ca * k * r;
                for &(c, cc) in terms {
                    if c <= a {
                        tri[tri_index(a, c)] += ca * cc * k * k;
                    }
                }
            }
        }
        cost
    }

    fn buffer(&self) -> DMatrix<f64> {
        let shape = (self.residual_rows(), self.structure.len());
        // The fills write every entry, so a recycled matrix needs no zeroing.
        match self.spare.borrow_mut().take() {
            Some(j) if j.shape() == shape => j,
            _ => DMatrix::zeros(shape.0, shape.1),
        }
    }

    /// χ² = Σ r², JᵀJ and Jᵀr at θ in one pass over the points, without storing J: the points go
    /// through [`lumped::eval_block`] [`BLOCK`] at a time, and each block's weighted columns are
    /// multiplied out while they are in L1 cache. `jtj` is n×n, `g` has n entries (n = θ's length).
    /// Where the processor has AVX2 and FMA (detected at run time) the pass runs compiled for them;
    /// otherwise the same code runs for the baseline target (a unit test checks they agree).
    pub fn normal_equations_into(
        &self,
        theta: &[f64],
        jtj: &mut DMatrix<f64>,
        g: &mut DVector<f64>,
    ) -> f64 {
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("fma")
        {
            // SAFETY: the processor supports AVX2 and FMA (checked just above).
            return unsafe { self.normal_equations_fma(theta, jtj, g) };
        }
        self.normal_equations_with::<false>(theta, jtj, g)
    }

    /// [`LumpedProblem::normal_equations_into`] compiled for AVX2 and FMA: the same code, four lanes
    /// per instruction and fused multiply-adds in the products.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2,fma")]
    unsafe fn normal_equations_fma(
        &self,
        theta: &[f64],
        jtj: &mut DMatrix<f64>,
        g: &mut DVector<f64>,
    ) -> f64 {
        self.normal_equations_with::<true>(theta, jtj, g)
    }

    #[inline(always)]
    fn normal_equations_with<const FMA: bool>(
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
        let b = block.as_deref_mut().expect("the block is held until drop");
        // Lower triangle of JᵀJ, packed row by row. Most structures have few parameters: only the
        // entries they use are zeroed (the pass runs on every solver step, the thinned copies' too).
        let used = n * (n + 1) / 2;
        let mut small = [0.0; SMALL_TRIANGLE];
        let mut large;
        let tri: &mut [f64] = if used <= SMALL_TRIANGLE {
            &mut small[..used]
        } else {
            large = [0.0; MAX_PARAMETERS * (MAX_PARAMETERS + 1) / 2];
            &mut large[..used]
        };
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
                &d.inv_sigma[start..end],
                b,
            );
            weighted_residuals(&b.z, &d.z[start..end], &d.inv_sigma[start..end], &mut r);
            if m < BLOCK {
                // The last, partial block: the unused entries must not count.
                for row in b.d[..n].iter_mut() {
                    row[m..BLOCK].fill(0.0);
                    row[BLOCK + m..].fill(0.0);
                }
            }
            cost += accumulate::<FMA>(&b.d[..n], &r, tri, &mut jr[..n]);
            start = end;
        }
        if let Some((value, sigma)) = d.dcr_prior {
            let rdc = theta[1].exp();
            let (res, der) = ((rdc - value) / sigma, rdc / sigma);
            cost += res * res;
            jr[1] += der * res;
            tri[2] += der * der;
        }
        cost += self.add_walls(theta, tri, &mut jr[..n]);
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

impl LumpedProblem<'_> {
    /// χ² = Σ r² at θ alone, without derivatives: a fraction of a
    /// [`LumpedProblem::normal_equations_into`] pass (the points go through
    /// [`lumped::impedance_block`]). Dispatched to an AVX2 + FMA build like that pass.
    pub fn cost_at(&self, theta: &[f64]) -> f64 {
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("fma")
        {
            // SAFETY: the processor supports AVX2 and FMA (checked just above).
            return unsafe { self.cost_fma(theta) };
        }
        self.cost_with::<false>(theta)
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2,fma")]
    unsafe fn cost_fma(&self, theta: &[f64]) -> f64 {
        self.cost_with::<true>(theta)
    }

    #[inline(always)]
    fn cost_with<const FMA: bool>(&self, theta: &[f64]) -> f64 {
        let d = self.data;
        let v = Values::new(self.structure, theta);
        let mut z = [0.0; 2 * BLOCK];
        let mut r = [0.0; 2 * BLOCK];
        let mut cost = 0.0;
        let points = d.frequency_hz.len();
        let mut start = 0;
        while start < points {
            let end = (start + BLOCK).min(points);
            lumped::impedance_block(
                self.structure,
                &v,
                &d.frequency_hz[start..end],
                &d.sqrt_f[start..end],
                &mut z,
            );
            weighted_residuals(&z, &d.z[start..end], &d.inv_sigma[start..end], &mut r);
            cost += dots::<FMA, 1>(&r, [&r])[0];
            start = end;
        }
        if let Some((value, sigma)) = d.dcr_prior {
            let res = (theta[1].exp() - value) / sigma;
            cost += res * res;
        }
        for wall in &self.walls {
            let r = self.wall_residual(wall, theta);
            cost += r * r;
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

    fn cost(&self, x: &[f64]) -> Result<f64, Error> {
        Ok(self.cost_at(x))
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
        let first = d.residual_count();
        for (i, wall) in self.walls.iter().enumerate() {
            out[first + i] = self.wall_residual(wall, theta);
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
        let first = d.residual_count();
        for (i, wall) in self.walls.iter().enumerate() {
            for p in 0..n {
                out[(first + i, p)] = 0.0;
            }
            if self.wall_residual(wall, theta) > 0.0 {
                for &(a, c) in &wall.0[..wall.1] {
                    out[(first + i, a)] += c * self.data.wall_stiffness / WALL_WIDTH;
                }
            }
        }
    }
}

impl Operator for LumpedProblem<'_> {
    type Param = DVector<f64>;
    type Output = DVector<f64>;
    fn apply(&self, theta: &DVector<f64>) -> Result<DVector<f64>, Error> {
        let mut r = DVector::zeros(self.residual_rows());
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
pub(crate) mod tests {
    use super::*;
    use crate::fit::lm::normal_equations;
    use crate::model::{LumpedModel, Section, SectionKind};

    /// Asserts that two Gram matrices (JᵀJ-like) agree entry by entry to `tolerance` of the
    /// reference's diagonal scale √(R_aa·R_cc).
    pub(crate) fn assert_gram_close(
        got: &DMatrix<f64>,
        reference: &DMatrix<f64>,
        tolerance: f64,
        label: &str,
    ) {
        let n = reference.nrows();
        assert_eq!(got.shape(), reference.shape(), "{label}");
        for a in 0..n {
            for c in 0..n {
                let scale = (reference[(a, a)] * reference[(c, c)]).sqrt();
                assert!(
                    (got[(a, c)] - reference[(a, c)]).abs() <= tolerance * scale,
                    "{label}[{a},{c}]: {} vs {}",
                    got[(a, c)],
                    reference[(a, c)]
                );
            }
        }
    }

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
            core: None,
        }
    }

    #[test]
    fn the_fused_passes_equal_the_stored_jacobian_and_residuals() {
        // 150 points: two full blocks and a partial one.
        let f: Vec<f64> = (0..150).map(|i| 1e4 * 1.08f64.powi(i)).collect();
        let data = FitData {
            sqrt_f: f.iter().map(|x| x.sqrt()).collect(),
            z: f.iter()
                .map(|&x| Complex64::new(1.0 + 1e-7 * x, x * 1e-6))
                .collect(),
            inv_sigma: f.iter().map(|x| 3.0 + x.ln()).collect(),
            sigma: f.iter().map(|x| 1.0 / (3.0 + x.ln())).collect(),
            frequency_hz: f,
            dcr_prior: Some((0.08, 0.001)),
            // One wall the models exceed (Cp below 1 pF), one they respect (ls below L0), one on a
            // section (absent from most structures).
            walls: vec![
                Wall {
                    terms: vec![(Param::Cp, 1.0)],
                    bound: 1e-12f64.ln(),
                    label: "cp".into(),
                },
                Wall {
                    terms: vec![(Param::Ls, 1.0), (Param::L0, -1.0)],
                    bound: 0.0,
                    label: "ls".into(),
                },
                Wall {
                    terms: vec![
                        (Param::SectionL(0), 1.0),
                        (Param::SectionC(0), 1.0),
                        (Param::Cp, -1.0),
                    ],
                    bound: -30.0,
                    label: "section".into(),
                },
            ],
            wall_stiffness: 3.0,
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
            // The dispatched pass (AVX2 + FMA where the processor has them) and the portable one
            // must both agree with the stored Jacobian's normal equations.
            for path in ["dispatched", "portable"] {
                let mut jtj = DMatrix::zeros(n, n);
                let mut g = DVector::zeros(n);
                let cost = if path == "portable" {
                    p.normal_equations_with::<false>(&theta, &mut jtj, &mut g)
                } else {
                    p.normal_equations_into(&theta, &mut jtj, &mut g)
                };
                let label = format!("{} ({path})", s.label());
                assert!((cost / r.norm_squared() - 1.0).abs() < 1e-12, "{label}");
                // The cost-only pass gives the same χ².
                let alone = if path == "portable" {
                    p.cost_with::<false>(&theta)
                } else {
                    p.cost_at(&theta)
                };
                assert!(
                    (alone / r.norm_squared() - 1.0).abs() < 1e-12,
                    "{label}: cost alone {alone} vs {}",
                    r.norm_squared()
                );
                for a in 0..n {
                    let ga = (g[a] - g_ref[a]).abs();
                    assert!(
                        ga <= 1e-10 * (jtj_ref[(a, a)] * cost).sqrt(),
                        "{label} g[{a}]"
                    );
                }
                assert_gram_close(&jtj, &jtj_ref, 1e-10, &format!("{label} JᵀJ"));
            }
        }
    }
}
