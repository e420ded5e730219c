//! The fixed log-frequency grid for stored model figures: 20 points per decade from 100 Hz to 10 GHz
//! (k = 0..=160). Every succeeded fit stores |Z| and effective L of its model at the grid points inside
//! its sweep band; queries read those rows and interpolate L linearly in log f between neighbours.

use crate::fit::derived::min_abs_z;
use crate::model::{FittedModel, ImpedanceModel};
use std::f64::consts::PI;

pub const POINTS_PER_DECADE: i64 = 20;
pub const LOG10_MIN_HZ: i64 = 2;
pub const LOG10_MAX_HZ: i64 = 10;
pub const LAST_K: i64 = (LOG10_MAX_HZ - LOG10_MIN_HZ) * POINTS_PER_DECADE;

/// Frequency of grid point `k`.
pub fn frequency_hz(k: i64) -> f64 {
    10f64.powf(LOG10_MIN_HZ as f64 + k as f64 / POINTS_PER_DECADE as f64)
}

/// Fractional grid position of a frequency (may lie outside 0..=LAST_K).
pub fn position(frequency_hz: f64) -> f64 {
    (frequency_hz.log10() - LOG10_MIN_HZ as f64) * POINTS_PER_DECADE as f64
}

/// Grid points strictly usable inside `[lo, hi]`: the first index at or above `lo` and the last at or
/// below `hi` (a tiny tolerance keeps exact grid frequencies on the grid), clipped to the grid.
pub fn index_range(lo_hz: f64, hi_hz: f64) -> Option<(i64, i64)> {
    const TOL: f64 = 1e-9;
    let a = (position(lo_hz) - TOL).ceil().max(0.0) as i64;
    let b = (position(hi_hz) + TOL).floor().min(LAST_K as f64) as i64;
    (a <= b).then_some((a, b))
}

/// The grid rows whose intervals `[f_k, f_(k+1)]` touch `[lo, hi]`: from the point at or below `lo`
/// to the last point below `hi`, clipped to the grid. `None` unless `lo < hi` inside the grid.
pub fn cover_range(lo_hz: f64, hi_hz: f64) -> Option<(i64, i64)> {
    const TOL: f64 = 1e-9;
    let (pa, pb) = (position(lo_hz), position(hi_hz));
    if !(pa.is_finite() && pb.is_finite() && pa < pb && pa > -TOL && pb < LAST_K as f64 + TOL) {
        return None;
    }
    let a = (pa + TOL).floor().max(0.0) as i64;
    let b = ((pb - TOL).ceil() as i64 - 1).clamp(a, LAST_K);
    Some((a, b))
}

/// Where a frequency sits between two grid points: `(k, w)` with `f` at `k + w`, `0 <= w < 1`.
/// `None` outside the grid.
pub fn bracket(frequency_hz: f64) -> Option<(i64, f64)> {
    if !(frequency_hz.is_finite() && frequency_hz > 0.0) {
        return None;
    }
    let p = position(frequency_hz);
    let snapped = p.round();
    let p = if (p - snapped).abs() < 1e-9 {
        snapped
    } else {
        p
    };
    if !(0.0..=LAST_K as f64).contains(&p) {
        return None;
    }
    let k = p.floor() as i64;
    Some((k, p - k as f64))
}

/// One stored grid row.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GridPoint {
    pub k: i64,
    pub z_mag_ohm: f64,
    /// Im Z / ω.
    pub l_eff_h: f64,
    /// Lowest |Z| from this grid point up to the next one (or the band's upper end): see
    /// [`min_abs_z`].
    pub z_mag_floor_ohm: f64,
    /// Where that lowest |Z| is.
    pub z_floor_at_hz: f64,
}

/// The model at the grid points inside the band `[band_min_hz, band_max_hz]` where it is valid.
/// Non-finite values (a model evaluated at a pole) are left out.
pub fn evaluate(model: &FittedModel, band_min_hz: f64, band_max_hz: f64) -> Vec<GridPoint> {
    let Some((a, b)) = index_range(band_min_hz, band_max_hz) else {
        return Vec::new();
    };
    (a..=b)
        .filter_map(|k| {
            let f = frequency_hz(k);
            let z = model.impedance(f);
            let upper = frequency_hz(k + 1).min(band_max_hz);
            let (z_mag_floor_ohm, z_floor_at_hz) = if upper > f {
                min_abs_z(model, f, upper)
            } else {
                (z.norm(), f)
            };
            let p = GridPoint {
                k,
                z_mag_ohm: z.norm(),
                l_eff_h: z.im / (2.0 * PI * f),
                z_mag_floor_ohm,
                z_floor_at_hz,
            };
            (p.z_mag_ohm.is_finite() && p.l_eff_h.is_finite() && p.z_mag_floor_ohm.is_finite())
                .then_some(p)
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::LumpedModel;

    #[test]
    fn the_grid_runs_from_100_hz_to_10_ghz_at_20_points_per_decade() {
        assert_eq!(LAST_K, 160);
        assert!((frequency_hz(0) - 100.0).abs() < 1e-9);
        assert!((frequency_hz(20) - 1000.0).abs() < 1e-9);
        assert!((frequency_hz(LAST_K) - 1e10).abs() < 1e-3);
    }

    #[test]
    fn exact_grid_frequencies_stay_on_their_point() {
        assert_eq!(bracket(1e6), Some((80, 0.0)));
        assert_eq!(index_range(1e3, 1e6), Some((20, 80)));
        let (k, w) = bracket(1.5e6).unwrap();
        assert_eq!(k, 83);
        assert!(w > 0.0 && w < 1.0);
        assert_eq!(bracket(10.0), None);
        assert_eq!(index_range(1.01e3, 1.05e3), None);
    }

    #[test]
    fn grid_rows_are_only_inside_the_band() {
        let m = FittedModel::Lumped(LumpedModel {
            l0_h: 1e-5,
            rdc_ohm: 0.05,
            k_ac_ohm_per_sqrt_hz: 0.0,
            rp_ohm: None,
            cp_f: 5e-12,
            ls_h: 0.0,
            sections: vec![],
            core: None,
        });
        let rows = evaluate(&m, 1e3, 1e7);
        assert_eq!(rows.first().unwrap().k, 20);
        assert_eq!(rows.last().unwrap().k, 100);
        // Well below the SRF (22.5 MHz for 10 µH with 5 pF) the effective L is L0 within 0.3 %.
        let at_10k = rows.iter().find(|r| r.k == 40).unwrap();
        assert!((at_10k.l_eff_h / 1e-5 - 1.0).abs() < 3e-3);
    }

    #[test]
    fn a_grid_row_carries_the_notch_between_it_and_the_next_point() {
        let m = FittedModel::Lumped(crate::fit::derived::tests::notched());
        let f0 = 1.0 / (2.0 * PI * (100e-9f64 * 22.54e-12).sqrt());
        // The grid points on either side see far more than the notch.
        let rows = evaluate(&m, 1e6, 1e9);
        let k = bracket(f0).unwrap().0;
        let row = rows.iter().find(|r| r.k == k).unwrap();
        let next = rows.iter().find(|r| r.k == k + 1).unwrap();
        assert!(
            row.z_mag_ohm > 3.0 && next.z_mag_ohm > 3.0,
            "{row:?} {next:?}"
        );
        assert!(row.z_mag_floor_ohm < 0.21, "floor {}", row.z_mag_floor_ohm);
        assert!((row.z_floor_at_hz / f0 - 1.0).abs() < 2e-3);
        assert!(next.z_mag_floor_ohm > 3.0);
    }
}
