//! Figures derived from a fitted model, for any [`ImpedanceModel`] (lumped or rational): resonances by
//! root finding of Im Z, the Q peak, effective L and Q at chosen frequencies, the naive Cp estimate, the
//! core corner, and the fit quality against the sweep.
//!
//! Resonances come from a fine logarithmic scan of Im Z over the band (at least
//! [`SCAN_POINTS_PER_DECADE`] points per decade) followed by bisection on ln f inside every bracket
//! where Im Z changes sign; a pair of crossings closer together than one scan step (a section with a
//! relative bandwidth below about 0.1 %) can be missed, which is why the step is this fine.

use super::{Derived, PointFigures, Quality};
use crate::model::ImpedanceModel;
use crate::sweep::Sweep;
use std::f64::consts::PI;

/// Density of the resonance scan.
pub const SCAN_POINTS_PER_DECADE: usize = 2000;

/// Element values a model family knows exactly; what is `None` is estimated (L0) or left out.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct KnownElements {
    /// Low-frequency inductance; when `None`, Im Z/ω at the bottom of the band is used.
    pub l0_h: Option<f64>,
    /// Fitted interwinding capacitance, for the naive-Cp comparison.
    pub cp_f: Option<f64>,
    /// Core-loss parallel resistance, for the core corner.
    pub rp_ohm: Option<f64>,
}

/// Zero crossings of Im Z inside a band.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Resonances {
    /// Im Z from + to − (|Z| maxima), increasing.
    pub parallel_hz: Vec<f64>,
    /// Im Z from − to + (|Z| minima), increasing.
    pub series_hz: Vec<f64>,
}

fn scan_grid(band_hz: [f64; 2]) -> Vec<f64> {
    let (lo, hi) = (band_hz[0].ln(), band_hz[1].ln());
    let decades = (hi - lo) / std::f64::consts::LN_10;
    let n = ((decades * SCAN_POINTS_PER_DECADE as f64).ceil() as usize).max(2000);
    (0..=n)
        .map(|i| (lo + (hi - lo) * i as f64 / n as f64).exp())
        .collect()
}

fn valid_band(band_hz: [f64; 2]) -> bool {
    band_hz[0].is_finite() && band_hz[1].is_finite() && band_hz[0] > 0.0 && band_hz[1] > band_hz[0]
}

/// Bisection on ln f for a sign change of `g` between `a` and `b` (g(a) > 0 ≥ g(b) or the reverse).
fn bisect(g: &dyn Fn(f64) -> f64, mut a: f64, mut b: f64) -> f64 {
    let ga_positive = g(a) > 0.0;
    for _ in 0..200 {
        let m = (a.ln() * 0.5 + b.ln() * 0.5).exp();
        if m <= a || m >= b || (b / a - 1.0) < 1e-14 {
            break;
        }
        if (g(m) > 0.0) == ga_positive {
            a = m;
        } else {
            b = m;
        }
    }
    (a.ln() * 0.5 + b.ln() * 0.5).exp()
}

/// Every sign change of Im Z in the band, refined by bisection.
pub fn resonances(model: &dyn ImpedanceModel, band_hz: [f64; 2]) -> Resonances {
    let mut out = Resonances::default();
    if !valid_band(band_hz) {
        return out;
    }
    let grid = scan_grid(band_hz);
    let im = |f: f64| model.impedance(f).im;
    let mut prev_f = grid[0];
    let mut prev = im(prev_f);
    for &f in &grid[1..] {
        let cur = im(f);
        if prev.is_finite() && cur.is_finite() {
            if prev > 0.0 && cur <= 0.0 {
                out.parallel_hz.push(bisect(&im, prev_f, f));
            } else if prev <= 0.0 && cur > 0.0 {
                out.series_hz.push(bisect(&im, prev_f, f));
            }
        }
        prev = cur;
        prev_f = f;
    }
    out
}

/// The self-resonant frequency (first parallel resonance in the band) or, when there is none, the
/// frequency it lies above (the top of the band): `(srf_hz, srf_above_hz)`.
pub fn srf(model: &dyn ImpedanceModel, band_hz: [f64; 2]) -> (Option<f64>, Option<f64>) {
    match resonances(model, band_hz).parallel_hz.first() {
        Some(&f) => (Some(f), None),
        None => (None, Some(band_hz[1])),
    }
}

/// Effective inductance Im Z/ω, Q = Im Z/Re Z and |Z| at one frequency.
pub fn point_figures(model: &dyn ImpedanceModel, frequency_hz: f64) -> PointFigures {
    let z = model.impedance(frequency_hz);
    PointFigures {
        frequency_hz,
        l_eff_h: z.im / (2.0 * PI * frequency_hz),
        q: z.im / z.re,
        z_mag_ohm: z.norm(),
    }
}

/// The largest Q = Im Z/Re Z in the inductive part of the band below the SRF (or the whole band when the
/// SRF is above it): `(q, frequency_hz)`. `None` when Q is nowhere positive and finite.
pub fn q_peak(model: &dyn ImpedanceModel, band_hz: [f64; 2]) -> Option<(f64, f64)> {
    if !valid_band(band_hz) {
        return None;
    }
    q_peak_below(model, band_hz, srf(model, band_hz).0)
}

/// [`q_peak`] with the band's SRF already found (`None`: none in the band).
fn q_peak_below(
    model: &dyn ImpedanceModel,
    band_hz: [f64; 2],
    srf_hz: Option<f64>,
) -> Option<(f64, f64)> {
    if !valid_band(band_hz) {
        return None;
    }
    let top = srf_hz.unwrap_or(band_hz[1]);
    let q = |f: f64| {
        let z = model.impedance(f);
        if z.re > 0.0 && z.im > 0.0 && (z.im / z.re).is_finite() {
            z.im / z.re
        } else {
            f64::NEG_INFINITY
        }
    };
    let grid: Vec<f64> = scan_grid([band_hz[0], top.max(band_hz[0] * (1.0 + 1e-9))]);
    let (mut best_i, mut best_q) = (0usize, f64::NEG_INFINITY);
    for (i, &f) in grid.iter().enumerate() {
        let v = q(f);
        if v > best_q {
            best_q = v;
            best_i = i;
        }
    }
    if !best_q.is_finite() {
        return None;
    }
    // Golden-section refinement on ln f between the neighbours of the best grid point.
    let mut a = grid[best_i.saturating_sub(1)].ln();
    let mut b = grid[(best_i + 1).min(grid.len() - 1)].ln();
    let gr = (5f64.sqrt() - 1.0) / 2.0;
    let mut c = b - gr * (b - a);
    let mut d = a + gr * (b - a);
    for _ in 0..80 {
        if q(c.exp()) > q(d.exp()) {
            b = d;
        } else {
            a = c;
        }
        c = b - gr * (b - a);
        d = a + gr * (b - a);
    }
    let f = ((a + b) / 2.0).exp();
    let qf = q(f);
    if qf >= best_q {
        Some((qf, f))
    } else {
        Some((best_q, grid[best_i]))
    }
}

/// Samples per decade of the scan in [`min_abs_z`] before refinement.
const MIN_SCAN_PER_DECADE: f64 = 60.0;

/// Lowest |Z| of the model on `[a_hz, b_hz]` and where it occurs: a log-spaced scan (ends included,
/// at least 8 intervals), then a golden-section search in log f around every sampled local minimum,
/// so a narrow series-resonance notch between samples is found to its bottom rather than missed.
pub fn min_abs_z(model: &dyn ImpedanceModel, a_hz: f64, b_hz: f64) -> (f64, f64) {
    let mag = |f: f64| {
        let m = model.impedance(f).norm();
        if m.is_finite() { m } else { f64::INFINITY }
    };
    if !(a_hz > 0.0 && b_hz > a_hz) {
        return (mag(a_hz), a_hz);
    }
    let (la, lb) = (a_hz.ln(), b_hz.ln());
    let n = (((lb - la) / std::f64::consts::LN_10) * MIN_SCAN_PER_DECADE)
        .ceil()
        .max(8.0) as usize;
    let x: Vec<f64> = (0..=n)
        .map(|i| la + (lb - la) * i as f64 / n as f64)
        .collect();
    let y: Vec<f64> = x.iter().map(|&l| mag(l.exp())).collect();
    let mut best = (y[0], a_hz);
    for (i, &yi) in y.iter().enumerate() {
        if yi < best.0 {
            best = (yi, x[i].exp());
        }
        let left = i == 0 || yi <= y[i - 1];
        let right = i == n || yi <= y[i + 1];
        if !(left && right) || i == 0 || i == n {
            continue;
        }
        // |Z| is smooth and unimodal between the neighbouring samples.
        let (l, v) = golden_minimum(x[i - 1], x[i + 1], 1e-10, |l| mag(l.exp()));
        if v < best.0 {
            best = (v, l.exp());
        }
    }
    best
}

/// Golden-section search for the minimum of a unimodal `f` on `[a, b]`, until the bracket is
/// narrower than `tol`: the abscissa and the value there.
pub(crate) fn golden_minimum(
    mut a: f64,
    mut b: f64,
    tol: f64,
    f: impl Fn(f64) -> f64,
) -> (f64, f64) {
    let g = (5f64.sqrt() - 1.0) / 2.0;
    let mut c = b - g * (b - a);
    let mut d = a + g * (b - a);
    let (mut fc, mut fd) = (f(c), f(d));
    for _ in 0..200 {
        if (b - a).abs() <= tol {
            break;
        }
        if fc < fd {
            b = d;
            d = c;
            fd = fc;
            c = b - g * (b - a);
            fc = f(c);
        } else {
            a = c;
            c = d;
            fc = fd;
            d = a + g * (b - a);
            fd = f(d);
        }
    }
    if fc < fd { (c, fc) } else { (d, fd) }
}

/// 1/((2π·SRF)²·L0): the one-line Cp estimate from the SRF and the low-frequency inductance.
pub fn naive_cp_f(srf_hz: f64, l0_h: f64) -> f64 {
    1.0 / ((2.0 * PI * srf_hz).powi(2) * l0_h)
}

/// rp/(2π·L0): the corner of the single-pole permeability roll-off that `rp_ohm` is equivalent to.
pub fn core_corner_hz(rp_ohm: f64, l0_h: f64) -> f64 {
    rp_ohm / (2.0 * PI * l0_h)
}

/// All derived figures of a model over its band.
pub fn derived_figures(
    model: &dyn ImpedanceModel,
    band_hz: [f64; 2],
    report_frequencies_hz: &[f64],
    known: &KnownElements,
) -> Derived {
    let res = resonances(model, band_hz);
    let srf_hz = res.parallel_hz.first().copied();
    let l0_h = known
        .l0_h
        .or_else(|| Some(point_figures(model, band_hz[0]).l_eff_h))
        .filter(|l| l.is_finite() && *l > 0.0);
    let naive_cp = match (srf_hz, l0_h) {
        (Some(f), Some(l)) => Some(naive_cp_f(f, l)),
        _ => None,
    };
    let naive_cp_error_percent = match (naive_cp, known.cp_f) {
        (Some(n), Some(c)) if c > 0.0 => Some((n - c) / c * 100.0),
        _ => None,
    };
    let core_corner = match (known.rp_ohm, l0_h) {
        (Some(rp), Some(l)) => Some(core_corner_hz(rp, l)),
        _ => None,
    };
    // The resonance scan above already found the SRF: not scanned a second time.
    let qp = q_peak_below(model, band_hz, srf_hz);
    Derived {
        srf_hz,
        srf_above_hz: if srf_hz.is_none() {
            Some(band_hz[1])
        } else {
            None
        },
        series_resonances_hz: res.series_hz,
        parallel_resonances_hz: res.parallel_hz,
        q_peak: qp.map(|p| p.0),
        q_peak_hz: qp.map(|p| p.1),
        naive_cp_f: naive_cp,
        naive_cp_error_percent,
        core_corner_hz: core_corner,
        at_frequencies: report_frequencies_hz
            .iter()
            .map(|&f| point_figures(model, f))
            .collect(),
    }
}

/// How well a model reproduces a sweep. `parameters` is left 0: the caller knows its parameter count.
pub fn quality(model: &dyn ImpedanceModel, sweep: &Sweep) -> Quality {
    let mut chi2 = 0.0;
    let mut max_rel = 0.0;
    let mut max_rel_at = sweep.frequency_hz.first().copied().unwrap_or(0.0);
    for ((&f, &zm), &s) in sweep
        .frequency_hz
        .iter()
        .zip(&sweep.impedance_ohm)
        .zip(&sweep.sigma_ohm)
    {
        let d = model.impedance(f) - zm;
        chi2 += d.norm_sqr() / (s * s);
        let rel = d.norm() / zm.norm();
        if rel > max_rel || !rel.is_finite() {
            max_rel = rel;
            max_rel_at = f;
        }
    }
    let n = sweep.frequency_hz.len();
    Quality {
        rms_weighted: if n > 0 {
            (chi2 / (2 * n) as f64).sqrt()
        } else {
            0.0
        },
        max_relative_error: max_rel,
        max_relative_error_at_hz: max_rel_at,
        points: n,
        parameters: 0,
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::model::LumpedModel;
    use crate::sweep::Method;
    use num_complex::Complex64;

    /// A choke with a narrow series-resonance notch (invented values): 10 µH, 5 pF across, and a
    /// series section 0.2 Ω / 100 nH / 22.54 pF resonating at 1/(2π√(LC)) = 106.0 MHz (Thomson's
    /// formula), where |Z| drops to about the section's 0.2 Ω between the grid points at 100 MHz and
    /// 112.2 MHz.
    pub(crate) fn notched() -> LumpedModel {
        LumpedModel {
            l0_h: 1e-5,
            rdc_ohm: 0.05,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: None,
            cp_f: 5e-12,
            ls_h: 0.0,
            sections: vec![crate::model::Section {
                kind: crate::model::SectionKind::Series,
                r_ohm: 0.2,
                l_h: 100e-9,
                c_f: 22.54e-12,
            }],
            core: None,
        }
    }

    #[test]
    fn the_band_minimum_finds_a_notch_between_samples() {
        let m = notched();
        let f0 = 1.0 / (2.0 * PI * (100e-9f64 * 22.54e-12).sqrt());
        let (z, at) = min_abs_z(&m, 50e6, 200e6);
        // At the section's resonance its impedance is r_ohm; the tank around it barely changes that.
        assert!(z < 0.21, "lowest |Z| {z}");
        assert!(
            (at / f0 - 1.0).abs() < 2e-3,
            "at {at} Hz, resonance {f0} Hz"
        );
        // Outside the notch the band minimum sits at a band end.
        let (_, low_at) = min_abs_z(&m, 1e3, 1e5);
        assert_eq!(
            low_at, 1e3,
            "an inductor's lowest |Z| below its SRF is at the lowest frequency"
        );
    }

    fn ideal_lc(l0_h: f64, cp_f: f64) -> LumpedModel {
        LumpedModel {
            l0_h,
            rdc_ohm: 0.0,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: None,
            cp_f,
            ls_h: 0.0,
            sections: vec![],
            core: None,
        }
    }

    #[test]
    fn srf_of_an_ideal_l_parallel_c_matches_thomson() {
        // Source: Thomson formula f = 1/(2π√(LC)); 10 µH with 5 pF → 22.5079 MHz (shared/TOOLBOX.md).
        // A tiny Rdc keeps Im Z finite at resonance without moving it measurably.
        let mut m = ideal_lc(10e-6, 5e-12);
        m.rdc_ohm = 1e-6;
        let (srf_hz, above) = srf(&m, [1e3, 1e9]);
        let srf_hz = srf_hz.expect("resonance inside the band");
        assert!(above.is_none());
        assert!(
            (srf_hz / 22.5079e6 - 1.0).abs() < 5e-6,
            "srf {srf_hz} Hz vs 22.5079 MHz"
        );
        let naive = naive_cp_f(srf_hz, 10e-6);
        assert!((naive / 5e-12 - 1.0).abs() < 1e-5);
    }

    #[test]
    fn srf_above_the_band_is_reported_as_a_lower_bound() {
        let m = ideal_lc(10e-6, 5e-12);
        let (srf_hz, above) = srf(&m, [1e3, 10e6]);
        assert_eq!(srf_hz, None);
        assert_eq!(above, Some(10e6));
    }

    #[test]
    fn a_series_section_gives_a_series_and_a_second_parallel_resonance() {
        let mut m = ideal_lc(10e-6, 5e-12);
        m.rdc_ohm = 0.05;
        m.sections.push(crate::model::Section {
            kind: crate::model::SectionKind::Series,
            r_ohm: 2.0,
            l_h: 50e-9,
            c_f: 2e-12,
        });
        let res = resonances(&m, [1e3, 3e9]);
        // Series branch alone resonates at 1/(2π√(50 nH·2 pF)) = 503.3 MHz (Thomson).
        assert_eq!(res.series_hz.len(), 1, "{res:?}");
        assert!((res.series_hz[0] / 503.29e6 - 1.0).abs() < 0.01, "{res:?}");
        assert_eq!(res.parallel_hz.len(), 2, "{res:?}");
        assert!(res.parallel_hz[0] < res.series_hz[0] && res.series_hz[0] < res.parallel_hz[1]);
    }

    #[test]
    fn q_peak_of_an_l_with_series_and_parallel_loss_is_at_the_analytic_optimum() {
        // L with series R and parallel Rp (no Cp): Q = ωL/R for ωL ≪ Rp, and Rp/(ωL) for ωL ≫ Rp;
        // for small R the peak is at ω = √(R·Rp)/L with Q ≈ ½√(Rp/R) (from the two asymptotes, common
        // practice, no source). Checked here against Z = R + jωL‖Rp directly.
        let m = LumpedModel {
            l0_h: 1e-6,
            rdc_ohm: 0.01,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: Some(1e4),
            cp_f: 0.0,
            ls_h: 0.0,
            sections: vec![],
            core: None,
        };
        let (q, f) = q_peak(&m, [1e3, 1e9]).unwrap();
        let f_expected = (0.01f64 * 1e4).sqrt() / 1e-6 / (2.0 * PI);
        assert!((f / f_expected - 1.0).abs() < 0.01, "{f} vs {f_expected}");
        assert!(
            (q / (0.5 * (1e4f64 / 0.01).sqrt()) - 1.0).abs() < 0.01,
            "{q}"
        );
    }

    #[test]
    fn derived_figures_report_core_corner_and_naive_cp_error() {
        let mut m = ideal_lc(10e-6, 5e-12);
        m.rdc_ohm = 0.1;
        m.ls_h = 2e-9;
        let d = derived_figures(
            &m,
            [1e3, 1e9],
            &[1e6],
            &KnownElements {
                l0_h: Some(10e-6),
                cp_f: Some(5e-12),
                rp_ohm: Some(1e5),
            },
        );
        assert!(d.srf_hz.is_some());
        assert!(d.naive_cp_error_percent.unwrap().abs() < 0.1);
        assert!((d.core_corner_hz.unwrap() - 1e5 / (2.0 * PI * 10e-6)).abs() < 1e-6);
        // ls with cp: series resonance at 1/(2π√(2 nH·5 pF)) ≈ 1.59 GHz is above the band.
        assert!(d.series_resonances_hz.is_empty());
        assert_eq!(d.at_frequencies.len(), 1);
        let p = d.at_frequencies[0];
        let z = m.impedance(1e6);
        assert!((p.l_eff_h - z.im / (2.0 * PI * 1e6)).abs() < 1e-18);
    }

    #[test]
    fn quality_of_an_exact_model_is_zero_and_counts_points() {
        let m = ideal_lc(1e-6, 1e-12);
        let f: Vec<f64> = (0..30).map(|i| 1e5 * 1.2f64.powi(i)).collect();
        let z: Vec<Complex64> = f.iter().map(|&f| m.impedance(f)).collect();
        let mut sweep = Sweep {
            sigma_ohm: vec![0.01; f.len()],
            frequency_hz: f,
            impedance_ohm: z,
            method: Method::Direct,
            z0_ohm: 50.0,
            dc_reading: None,
            warnings: Vec::new(),
        };
        let q = quality(&m, &sweep);
        assert_eq!(q.points, 30);
        assert!(q.rms_weighted < 1e-9);
        sweep.impedance_ohm[3] += Complex64::new(0.02, 0.0);
        let q = quality(&m, &sweep);
        assert!((q.rms_weighted - (4.0f64 / 60.0).sqrt()).abs() < 1e-9);
        assert_eq!(q.max_relative_error_at_hz, sweep.frequency_hz[3]);
    }
}
