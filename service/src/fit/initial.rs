//! Starting values read off the measured curve, and the other starts the fit tries beside them.
//!
//! Every window here is a band of frequency, never a count of points: on a linear sweep most points
//! sit in the top decade, and "the lowest 2 % of points" can run past the SRF.
//!
//! - Resonances: a point counts as inductive or capacitive only when |Im Z| exceeds three times its σ;
//!   the SRF is where the significant points turn from inductive to capacitive (the zero crossing of
//!   Im Z between them, log-interpolated), so noise around Im Z = 0 at the bottom of a sweep that starts
//!   deep in the resistive region does not count as a resonance.
//! - L0: the precision-weighted median of Im Z/ω over the lowest 1.5 decades of the inductive stretch
//!   below SRF/3 where Im Z stands above its noise, corrected for Cp by the factor 1 − (f/SRF)².
//! - Cp: Thomson's 1/((2π·SRF)²·L0) when the SRF is in the band; otherwise from the rise of the
//!   effective inductance, 1/L_eff = 1/L0 − ω²·Cp, fitted by weighted least squares over the inductive
//!   stretch.
//! - Rdc, k_ac, Rp: the winding impedance Zw = 1/(1/Z − jωCp) below SRF/2 has
//!   Re Zw ≈ Rdc + k·√f + (ωL0)²/Rp while ωL0 ≪ Rp; the three coefficients come from a weighted
//!   non-negative least-squares fit of that line (the crate's active-set NNLS on unit-norm columns).
//! - ls: from the series resonance of ls with Cp when one shows above the SRF, else from the capacitive
//!   stretch, ω·Im Z = ω²·ls − 1/Cp, by least squares.
//! - Extra sections: from the pairs (series resonance, next parallel resonance) above the SRF, solved for
//!   each section's L and C by its own resonance conditions.
//!
//! [`rational_start`] reads the same elements off a low-order rational fit of the whole sweep
//! (Sanathanan–Koerner iteration, Z = N(s)/D(s) with deg N = 3, deg D = 2), which needs no window at all;
//! [`read_curve`] lists the curve's reading, that one, and scaled variants (L0 and Cp halved and doubled
//! with the SRF kept, the core loss and series resistances moved by a decade) as the starts of the base
//! structure; the fit keeps the best.

use super::linalg::nnls::nnls;
use super::problem::FitData;
use crate::model::{LumpedModel, Section, SectionKind};
use nalgebra::{DMatrix, DVector};
use num_complex::Complex64;
use std::f64::consts::PI;

/// |Im Z|/σ above which a point counts as clearly inductive or capacitive.
const SIGNIFICANT: f64 = 3.0;

/// Zero crossings of the measured Im Z.
#[derive(Debug, Clone, Default)]
pub struct CurveFeatures {
    /// (frequency, +→− parallel?) in increasing frequency, between significant points only.
    pub crossings: Vec<(f64, bool)>,
}

/// What the curve says: the base model (every element present), section guesses and the readings the
/// plausibility limits are built from.
#[derive(Debug, Clone)]
pub struct Guess {
    pub base: LumpedModel,
    /// (notch frequency, peak frequency, resistance at notch, resistance at peak) per visible pair,
    /// lowest first.
    pub pairs: Vec<(f64, f64, f64, f64)>,
    /// The SRF read off the curve, when it lies in the band.
    pub srf_hz: Option<f64>,
    /// The inductance the data show at the bottom of the inductive stretch, and where it was read.
    pub l_reading_h: f64,
    pub l_reading_at_hz: f64,
    /// The range of L0 the readings span: the curve's and, when it maps to elements, the rational
    /// fit's ([`rational_start`]); the plausibility walls allow a decade beyond either.
    pub l_readings_h: [f64; 2],
}

fn weighted_median(mut v: Vec<(f64, f64)>) -> f64 {
    v.retain(|(x, w)| x.is_finite() && w.is_finite() && *w > 0.0);
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(|a, b| a.0.total_cmp(&b.0));
    let total: f64 = v.iter().map(|p| p.1).sum();
    let mut acc = 0.0;
    for (x, w) in &v {
        acc += w;
        if acc >= total / 2.0 {
            return *x;
        }
    }
    v[v.len() - 1].0
}

fn crossing_at(f0: f64, y0: f64, f1: f64, y1: f64) -> f64 {
    let t = y0 / (y0 - y1);
    (f0.ln() + t * (f1.ln() - f0.ln())).exp()
}

/// |Im Z|/σ of point k with the sweep's own σ (not the fit's density weight).
fn significance(data: &FitData, k: usize) -> f64 {
    data.z[k].im / data.sigma[k]
}

/// Im Z/σ of each point, as the running median over the point and its two neighbours on each side:
/// in a long stretch where Im Z is buried in noise a few single points pass 3σ by chance (0.27 % of
/// them), five in a row do not.
pub fn smoothed_significance(z: &[Complex64], sigma: &[f64]) -> Vec<f64> {
    let n = z.len();
    let raw: Vec<f64> = z.iter().zip(sigma).map(|(z, s)| z.im / s).collect();
    (0..n)
        .map(|k| {
            let (a, b) = (k.saturating_sub(2), (k + 3).min(n));
            let mut w = [0.0; 5];
            let w = &mut w[..b - a];
            w.copy_from_slice(&raw[a..b]);
            w.sort_unstable_by(f64::total_cmp);
            w[w.len() / 2]
        })
        .collect()
}

pub fn features(data: &FitData) -> CurveFeatures {
    let f = &data.frequency_hz;
    let mut out = Vec::new();
    let smooth = smoothed_significance(&data.z, &data.sigma);
    // The last significant point: (index, inductive?).
    let mut last: Option<(usize, bool)> = None;
    for k in 0..f.len() {
        let s = smooth[k];
        if s.abs() < SIGNIFICANT {
            continue;
        }
        let inductive = s > 0.0;
        if let Some((a, was)) = last
            && was != inductive
        {
            // Between the two significant points, the zero crossing of Im Z nearest in log f to
            // the interpolated one (there may be several in the noise).
            let guess = crossing_at(f[a], data.z[a].im, f[k], data.z[k].im);
            let mut best = guess;
            let mut best_d = f64::INFINITY;
            for i in a + 1..=k {
                let (y0, y1) = (data.z[i - 1].im, data.z[i].im);
                if (y0 > 0.0) != (y1 > 0.0) {
                    let c = crossing_at(f[i - 1], y0, f[i], y1);
                    let d = (c / guess).ln().abs();
                    if d < best_d {
                        best_d = d;
                        best = c;
                    }
                }
            }
            out.push((best, was));
        }
        last = Some((k, inductive));
    }
    CurveFeatures { crossings: out }
}

fn nearest(data: &FitData, freq: f64) -> usize {
    let f = &data.frequency_hz;
    let k = f.partition_point(|&x| x < freq).min(f.len() - 1);
    if k > 0 && (freq / f[k - 1]).ln() < (f[k] / freq).ln() {
        k - 1
    } else {
        k
    }
}

/// Weighted linear least squares (columns × weights), solved by SVD; `None` when degenerate.
fn lstsq(rows: &[(Vec<f64>, f64, f64)]) -> Option<Vec<f64>> {
    let n = rows.first()?.0.len();
    if rows.len() < n {
        return None;
    }
    let a = DMatrix::from_fn(rows.len(), n, |i, j| rows[i].0[j] * rows[i].2);
    let b = DVector::from_iterator(rows.len(), rows.iter().map(|r| r.1 * r.2));
    let scale: Vec<f64> = (0..n)
        .map(|j| a.column(j).norm().max(f64::MIN_POSITIVE))
        .collect();
    let a = DMatrix::from_fn(rows.len(), n, |i, j| a[(i, j)] / scale[j]);
    let x = a.svd(true, true).solve(&b, 1e-12).ok()?;
    let out: Vec<f64> = (0..n).map(|j| x[j] / scale[j]).collect();
    out.iter().all(|v| v.is_finite()).then_some(out)
}

/// Non-negative weighted least squares (columns × weights) by the crate's active-set solver
/// ([`nnls`], Lawson & Hanson), on columns scaled to unit norm; `None` without rows.
fn nnls_weighted(rows: &[(Vec<f64>, f64, f64)]) -> Option<Vec<f64>> {
    let n = rows.first()?.0.len();
    let m = rows.len();
    let mut g = DMatrix::from_fn(m, n, |i, j| rows[i].0[j] * rows[i].2);
    let h: Vec<f64> = rows.iter().map(|r| r.1 * r.2).collect();
    let scale: Vec<f64> = (0..n)
        .map(|j| g.column(j).norm().max(f64::MIN_POSITIVE))
        .collect();
    for (j, sc) in scale.iter().enumerate() {
        g.column_mut(j).scale_mut(1.0 / sc);
    }
    let u = nnls(g.as_slice(), m, n, &h);
    Some(u.iter().zip(&scale).map(|(v, sc)| v / sc).collect())
}

/// The curve's reading ([`guess`]) with the rational fit's L0 added to the readings the plausibility
/// walls are built around, and the list of starts ([`starts`]).
pub fn read_curve(data: &FitData) -> (Guess, Vec<LumpedModel>) {
    let mut g = guess(data);
    let rational = rational_start(data, &g);
    if let Some(m) = &rational {
        g.l_readings_h = [g.l_reading_h.min(m.l0_h), g.l_reading_h.max(m.l0_h)];
    }
    let mut starts = vec![g.base.clone()];
    starts.extend(rational);
    starts.extend(scaled_starts(&g.base));
    (g, starts)
}

/// The curve's reading: every element of the base model read off the measured curve (see the
/// module notes).
pub fn guess(data: &FitData) -> Guess {
    let f = &data.frequency_hz;
    let n = f.len();
    let top = n - 1;
    let feats = features(data);
    let srf = feats.crossings.iter().find(|c| c.1).map(|c| c.0);
    let stretch_top = srf.map_or(f[top], |s| s / 3.0);
    let stretch: Vec<usize> = (0..n)
        .filter(|&k| f[k] <= stretch_top && data.z[k].im > 0.0)
        .collect();
    let (l0, l_at) = read_l0(data, srf, &stretch);
    let cp = read_cp(data, srf, &stretch, l0);
    let srf_est = 1.0 / (2.0 * PI * (l0 * cp).sqrt());
    let floor_r = 1e-6 * omega(f, 0) * l0;
    let (rdc, k_ac, rp) = read_resistances(data, srf, l0, cp, srf_est, floor_r);
    let (mut pairs, last_series) = resonance_pairs(data, srf, &feats.crossings, floor_r);
    let ls = read_ls(data, last_series, l0, cp, srf_est);
    if let Some(fs) = last_series {
        // The series resonance may also be the notch of a section whose peak lies above the band.
        pairs.push((
            fs,
            2.0 * f[top].max(fs),
            data.z[nearest(data, fs)].re.max(floor_r),
            rp,
        ));
    }

    Guess {
        base: LumpedModel {
            l0_h: l0,
            rdc_ohm: rdc,
            k_ac_ohm_per_sqrt_hz: k_ac,
            rp_ohm: Some(rp),
            cp_f: cp,
            ls_h: ls,
            sections: Vec::new(),
            core: None,
        },
        pairs,
        srf_hz: srf,
        l_reading_h: l0,
        l_reading_at_hz: l_at,
        l_readings_h: [l0, l0],
    }
}

/// ω at point k.
fn omega(f: &[f64], k: usize) -> f64 {
    2.0 * PI * f[k]
}

/// L0 and the frequency it was read at: the precision-weighted median of Im Z/ω over the lowest
/// 1.5 decades of the inductive `stretch` where Im Z stands above its noise, corrected for Cp.
fn read_l0(data: &FitData, srf: Option<f64>, stretch: &[usize]) -> (f64, f64) {
    let f = &data.frequency_hz;
    let n = f.len();
    let w = |k: usize| omega(f, k);
    let corr = |k: usize| srf.map_or(1.0, |s| (1.0 - (f[k] / s).powi(2)).max(0.1));
    // Points where Im Z stands clear of its noise (as the running median) and the measurement
    // determines Z to 10 %: near an open or a short a method's error is heavy-tailed, and the few
    // points that pass 3σ there are the ones the noise inflated.
    let smooth = smoothed_significance(&data.z, &data.sigma);
    let clear: Vec<usize> = stretch
        .iter()
        .copied()
        .filter(|&k| smooth[k] >= SIGNIFICANT && significance(data, k) >= SIGNIFICANT)
        .collect();
    let determined: Vec<usize> = clear
        .iter()
        .copied()
        .filter(|&k| data.sigma[k] <= 0.1 * data.z[k].norm())
        .collect();
    let pool = if !determined.is_empty() {
        determined.as_slice()
    } else if !clear.is_empty() {
        clear.as_slice()
    } else {
        stretch
    };
    let (mut l0, mut l_at) = (f64::NAN, f[0]);
    if let Some(&first) = pool.first() {
        let window: Vec<usize> = pool
            .iter()
            .copied()
            .filter(|&k| f[k] <= f[first] * 30.0)
            .collect();
        l0 = weighted_median(
            window
                .iter()
                .map(|&k| {
                    let s = significance(data, k);
                    (data.z[k].im / w(k) * corr(k), s * s)
                })
                .collect(),
        );
        l_at = (f[window[0]] * f[*window.last().expect("not empty")]).sqrt();
    }
    if !(l0.is_finite() && l0 > 0.0) {
        // Nowhere inductive above the noise: the largest Im Z/ω anywhere below the top is the best
        // there is (the fit will judge it).
        l0 = (0..n)
            .map(|k| data.z[k].im / w(k))
            .fold(f64::NAN, f64::max)
            .max(data.z[0].norm() / w(0) * 1e-3)
            .max(1e-15);
    }
    (l0, l_at)
}

/// Cp: Thomson from the SRF, else the rise of L_eff over the inductive `stretch`.
fn read_cp(data: &FitData, srf: Option<f64>, stretch: &[usize], l0: f64) -> f64 {
    let f = &data.frequency_hz;
    let top = f.len() - 1;
    let w = |k: usize| omega(f, k);
    match srf {
        Some(s) => 1.0 / ((2.0 * PI * s).powi(2) * l0),
        None => {
            let rows: Vec<(Vec<f64>, f64, f64)> = stretch
                .iter()
                .filter(|&&k| significance(data, k) >= SIGNIFICANT)
                .map(|&k| {
                    // 1/L = a − ω²·Cp; σ(1/L) = σ(Im Z)·ω/Im Z².
                    let im = data.z[k].im;
                    let wk = w(k);
                    (vec![1.0, -wk * wk], wk / im, im * im / (wk * data.sigma[k]))
                })
                .collect();
            match lstsq(&rows) {
                Some(x) if x[1] > 0.0 && x[0] > 0.0 && 1.0 / (x[0] * x[1]) > 0.0 => {
                    let srf_est = 1.0 / (2.0 * PI * (x[1] / x[0]).sqrt());
                    // A rise that puts the SRF far above the band says little; bound it.
                    let s = srf_est.clamp(1.05 * f[top], 30.0 * f[top]);
                    1.0 / ((2.0 * PI * s).powi(2) * l0)
                }
                _ => 1.0 / ((2.0 * PI * 30.0 * f[top]).powi(2) * l0),
            }
        }
    }
}

/// (Rdc, k_ac, Rp) from Re Zw below SRF/2, each with its fallback where the fit gives none;
/// a DCR reading replaces the fitted Rdc.
fn read_resistances(
    data: &FitData,
    srf: Option<f64>,
    l0: f64,
    cp: f64,
    srf_est: f64,
    floor_r: f64,
) -> (f64, f64, f64) {
    let f = &data.frequency_hz;
    let n = f.len();
    let top = n - 1;
    let w = |k: usize| omega(f, k);
    let coef = winding_resistance_fit(data, l0, cp, srf_est);
    let mut rdc = coef[0];
    if let Some((value, _)) = data.dcr_prior {
        rdc = value;
    }
    if !(rdc.is_finite() && rdc > floor_r) {
        // Below the noise: the lowest window's real part, else a small fraction of the reactance.
        let low: Vec<(f64, f64)> = (0..n)
            .filter(|&k| f[k] <= f[0] * 3.0 || k < 3)
            .map(|k| (data.z[k].re, 1.0 / data.sigma[k].powi(2)))
            .collect();
        rdc = weighted_median(low);
        if !(rdc.is_finite() && rdc > floor_r) {
            rdc = (1e-3 * w(0) * l0).max(floor_r).max(1e-9);
        }
    }
    let x_srf = 2.0 * PI * srf_est * l0;
    let rp = if coef[2] > 0.0 {
        (1.0 / coef[2]).max(0.5 * x_srf)
    } else if let Some(s) = srf {
        // The resistance at the peak is about Rp in parallel with the winding's transformed loss.
        let peak = data.z[nearest(data, s)].re.max(floor_r);
        let inv = 1.0 / peak - rdc / x_srf.powi(2);
        if inv > 0.0 { 1.0 / inv } else { 100.0 * peak }
    } else {
        100.0 * (w(top) * l0)
    };
    let f_mid = (f[0] * srf_est.min(f[top])).sqrt();
    let k_ac = if coef[1] > 0.0 {
        coef[1]
    } else {
        0.1 * rdc / f_mid.sqrt()
    };
    (rdc, k_ac, rp)
}

/// The coefficients of Re Zw ≈ Rdc + k·√f + (ωL0)²/Rp below SRF/2 (the winding impedance
/// Zw = 1/(1/Z − jωCp)), non-negative; zeros when the fit fails.
fn winding_resistance_fit(data: &FitData, l0: f64, cp: f64, srf_est: f64) -> Vec<f64> {
    let f = &data.frequency_hz;
    let w = |k: usize| omega(f, k);
    let half = srf_est / 2.0;
    let mut rows = Vec::new();
    for (k, &fk) in f.iter().enumerate() {
        if fk > half {
            break;
        }
        let jwc = Complex64::new(0.0, w(k) * cp);
        let den = Complex64::new(1.0, 0.0) - jwc * data.z[k];
        let zw = data.z[k] / den;
        let sigma = data.sigma[k] / den.norm_sqr();
        let x = w(k) * l0;
        rows.push((vec![1.0, fk.sqrt(), x * x], zw.re, 1.0 / sigma));
    }
    nnls_weighted(&rows).unwrap_or_else(|| vec![0.0; 3])
}

/// (notch frequency, peak frequency, resistance at notch, resistance at peak), as in
/// [`Guess::pairs`].
type ResonancePair = (f64, f64, f64, f64);

/// The resonance pairs after the SRF (a series crossing and the parallel one after it), and a last
/// series crossing that has no parallel one after it.
fn resonance_pairs(
    data: &FitData,
    srf: Option<f64>,
    crossings: &[(f64, bool)],
    floor_r: f64,
) -> (Vec<ResonancePair>, Option<f64>) {
    let after: Vec<(f64, bool)> = match srf {
        Some(s) => crossings.iter().copied().filter(|c| c.0 > s).collect(),
        None => Vec::new(),
    };
    let mut pairs = Vec::new();
    let mut i = 0;
    let mut last_series: Option<f64> = None;
    while i < after.len() {
        if !after[i].1 {
            let fs = after[i].0;
            let fp = after.get(i + 1).filter(|c| c.1).map(|c| c.0);
            let r_at = |freq: f64| data.z[nearest(data, freq)].re.max(floor_r);
            match fp {
                Some(fp) => {
                    pairs.push((fs, fp, r_at(fs), r_at(fp)));
                    i += 2;
                    continue;
                }
                None => last_series = Some(fs),
            }
        }
        i += 1;
    }
    (pairs, last_series)
}

/// ls: from a trailing series resonance with Cp, else the capacitive stretch above 2·SRF; a small
/// share of L0 when neither gives a plausible value.
fn read_ls(data: &FitData, last_series: Option<f64>, l0: f64, cp: f64, srf_est: f64) -> f64 {
    let f = &data.frequency_hz;
    let n = f.len();
    let w = |k: usize| omega(f, k);
    let mut ls = match last_series {
        Some(fs) => 1.0 / ((2.0 * PI * fs).powi(2) * cp),
        None => {
            let rows: Vec<(Vec<f64>, f64, f64)> = (0..n)
                .filter(|&k| f[k] > 2.0 * srf_est)
                .map(|k| {
                    let wk = w(k);
                    (
                        vec![wk * wk, -1.0],
                        wk * data.z[k].im,
                        1.0 / (wk * data.sigma[k]),
                    )
                })
                .collect();
            match lstsq(&rows) {
                Some(x) if rows.len() >= 5 && x[0] > 0.0 => x[0],
                _ => 1e-3 * l0,
            }
        }
    };
    if !(ls.is_finite() && ls > 1e-5 * l0 && ls < 0.1 * l0) {
        ls = 1e-3 * l0;
    }
    ls
}

/// The base elements read off a rational fit Z = N(s)/D(s), deg N = 3, deg D = 2, of the whole sweep by
/// the Sanathanan–Koerner iteration (each pass a linear least-squares fit of N − Z·D = 0 weighted by
/// 1/(σ·|D_previous|); Sanathanan & Koerner, IEEE Trans. Automatic Control 8(1), 1963, from memory).
/// With ls and the parallel Rp the base model is exactly of this form:
/// Z = s·ls + (R + s·L(1 + R/Rp)) / (1 + s(L/Rp + C·R) + s²·C·L(1 + R/Rp)); k_ac is left to the curve's
/// reading. `None` when the rational fit does not map to positive elements.
pub fn rational_start(data: &FitData, guess: &Guess) -> Option<LumpedModel> {
    let f = &data.frequency_hz;
    let n = f.len();
    let w_ref = 2.0 * PI * (f[0] * f[n - 1]).sqrt();
    let s: Vec<Complex64> = f
        .iter()
        .map(|&x| Complex64::new(0.0, 2.0 * PI * x / w_ref))
        .collect();
    let mut d_prev = vec![1.0f64; n];
    let mut x = DVector::zeros(6);
    for _ in 0..8 {
        let mut a = DMatrix::zeros(2 * n, 6);
        let mut b = DVector::zeros(2 * n);
        for k in 0..n {
            let wt = data.inv_sigma[k] / d_prev[k];
            let (sk, zk) = (s[k], data.z[k]);
            let cols = [
                Complex64::new(1.0, 0.0),
                sk,
                sk * sk,
                sk * sk * sk,
                -zk * sk,
                -zk * sk * sk,
            ];
            for (j, c) in cols.iter().enumerate() {
                a[(2 * k, j)] = c.re * wt;
                a[(2 * k + 1, j)] = c.im * wt;
            }
            b[2 * k] = zk.re * wt;
            b[2 * k + 1] = zk.im * wt;
        }
        let scale: Vec<f64> = (0..6)
            .map(|j| a.column(j).norm().max(f64::MIN_POSITIVE))
            .collect();
        for (j, sc) in scale.iter().enumerate() {
            a.column_mut(j).scale_mut(1.0 / sc);
        }
        // The least-squares solution by SVD, taken through a QR first: with A = QR (Q's columns
        // orthonormal) A⁺b = R⁺Qᵀb and A and R share their singular values, so the SVD of the 6×6 R
        // gives the same solution (and the same cut-off) as that of the 2n×6 A, at a fraction of
        // its cost.
        let qr = a.qr();
        let mut qtb = b;
        qr.q_tr_mul(&mut qtb);
        let r = qr.r();
        let qtb = qtb.rows(0, 6).into_owned();
        let sol = r.svd(true, true).solve(&qtb, 1e-13).ok()?;
        let new_x = DVector::from_fn(6, |j, _| sol[j] / scale[j]);
        let mut change = 0.0f64;
        for k in 0..n {
            let d = (1.0 + new_x[4] * s[k] + new_x[5] * s[k] * s[k]).norm();
            if !(d.is_finite() && d > 0.0) {
                return None;
            }
            change = change.max((d / d_prev[k]).ln().abs());
            d_prev[k] = d;
        }
        x = new_x;
        if change < 1e-6 {
            break;
        }
    }
    // Back to unscaled s: coefficient of s^j is x_j / w_ref^j.
    let a0 = x[0];
    let a1 = x[1] / w_ref;
    let a3 = x[3] / w_ref.powi(3);
    let b1 = x[4] / w_ref;
    let b2 = x[5] / w_ref.powi(2);
    if !(b2 > 0.0 && a0 > 0.0) {
        return None;
    }
    let ls = if a3 > 0.0 { a3 / b2 } else { 0.0 };
    let a1p = a1 - ls;
    if a1p <= 0.0 {
        return None;
    }
    let c = b2 / a1p;
    let loss = b1 - c * a0;
    let (l, rp) = if loss > 0.0 {
        let l = a1p - a0 * loss;
        (l, l / loss)
    } else {
        (a1p, f64::INFINITY)
    };
    if !(l > 0.0 && c > 0.0 && l.is_finite() && c.is_finite()) {
        return None;
    }
    let base = &guess.base;
    let mut m = base.clone();
    m.l0_h = l;
    m.cp_f = c;
    m.rdc_ohm = a0.max(base.rdc_ohm * 1e-3);
    if rp.is_finite() && rp > 0.0 {
        m.rp_ohm = Some(rp);
    }
    if ls > 1e-5 * l && ls < 0.1 * l {
        m.ls_h = ls;
    }
    Some(m)
}

/// The curve's reading with L0 and Cp scaled (the SRF kept), and with the core loss and the series
/// resistances moved by a decade.
fn scaled_starts(base: &LumpedModel) -> Vec<LumpedModel> {
    let mut out = Vec::new();
    for factor in [0.5, 2.0] {
        let mut m = base.clone();
        m.l0_h *= factor;
        m.cp_f /= factor;
        out.push(m);
    }
    let mut m = base.clone();
    m.rp_ohm = m.rp_ohm.map(|r| r * 10.0);
    m.k_ac_ohm_per_sqrt_hz *= 0.1;
    out.push(m);
    let mut m = base.clone();
    m.rp_ohm = m.rp_ohm.map(|r| r * 0.3);
    m.rdc_ohm *= 0.3;
    m.k_ac_ohm_per_sqrt_hz *= 3.0;
    out.push(m);
    out
}

/// A section of `kind` placed on a (notch, peak) pair, given the winding capacitance seen so far;
/// returns the section and the winding capacitance to use with it (below its notch a series branch
/// acts as its own c in parallel with Cp, so the SRF-derived Cp already contains it).
pub fn section_for(kind: SectionKind, pair: (f64, f64, f64, f64), cp_f: f64) -> (Section, f64) {
    let (fs, fp, r_notch, r_peak) = pair;
    let (ws2, wp2) = ((2.0 * PI * fs).powi(2), (2.0 * PI * fp).powi(2));
    let (r_ohm, l_h, c_f, cp) = match kind {
        // Branch l–c resonates at the notch; above it the branch is inductive and resonates with Cp
        // at the peak: ωp² = ωs² + 1/(l·Cp).
        SectionKind::Series => {
            let mut cp = cp_f;
            let mut l = 0.0;
            let mut c = 0.0;
            for _ in 0..3 {
                l = 1.0 / (cp * (wp2 - ws2).max(0.1 * ws2));
                c = 1.0 / (ws2 * l);
                cp = (cp_f - c).max(0.2 * cp_f);
            }
            (r_notch, l, c, cp)
        }
        // Tank resonates at the peak; below it the tank is inductive and cancels the winding's
        // capacitive reactance at the notch: 1/ωs² = l·(Cp + c), 1/ωp² = l·c.
        SectionKind::Parallel => {
            let l = ((1.0 / ws2 - 1.0 / wp2) / cp_f).max(1e-3 / (ws2 * cp_f));
            (r_peak, l, 1.0 / (wp2 * l), cp_f)
        }
    };
    (
        Section {
            kind,
            r_ohm,
            l_h,
            c_f,
        },
        cp,
    )
}
