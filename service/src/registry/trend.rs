//! A part's figures across its lots: the series a component engineer watches for drift between lots.
//!
//! For every figure (L0, L at the test frequency, DCR, SRF, Q peak, Q at the test frequency, lowest
//! |Z| in the limit's band, core corner) this module gives, in lot order:
//!
//! - the part's limits on that figure, where the part sets one;
//! - Shewhart control limits for individual values: centre line = mean of the approved lots' values,
//!   control limits = mean ± 3·s, where s is the sample standard deviation (divisor n − 1) of those
//!   same values. (The textbook individuals chart estimates σ from the average moving range, MR̄/1.128;
//!   the sample standard deviation of the approved lots is used here because the approved lots are the
//!   reference set, not a time series in control by construction.) With fewer than two approved lots
//!   that have the figure there is no s: no centre line, no control limits and no flags, and
//!   `control_note` says how many approved lots there are;
//! - per point: outside the part's limits, outside the control limits (Nelson rule 1 / Western
//!   Electric rule 1: one point beyond 3σ), in a run (Nelson rule 2: nine or more points in a row
//!   on the same side of the centre line), and the two zone tests: two of three points in a row
//!   beyond 2σ on the same side (Western Electric rule 2, Nelson rule 5), and four of five in a row
//!   beyond 1σ on the same side (Western Electric rule 3, Nelson rule 6); the points flagged are the
//!   ones beyond the zone in such a window, not the point between them. Source, from memory: L. S.
//!   Nelson, "The Shewhart Control Chart — Tests for Special Causes", Journal of Quality Technology
//!   16(4), 1984, pp. 237–239; the Western Electric Statistical Quality Control Handbook (1956) states
//!   the same tests (its run test with eight points). A point exactly on the centre line ends a run,
//!   and a point exactly on a zone boundary is not beyond it (our choices; the rules are silent on
//!   ties). Lots without the figure are skipped: "in a row" counts the lots that have it.
//!
//! One point per lot: the lot's approved fit (approved now, or approved earlier and superseded by a
//! later approval, and not rejected since), else its newest succeeded fit with a trustworthy model,
//! else its newest succeeded fit (a rational revision queued after a poor lumped fit does not hide
//! the lumped fit's L0 and DCR when that one is `ok`). Lots are ordered by their
//! first upload. Only models assessed `ok` count towards the control limits: the figures of a `poor`
//! model are plotted (marked) but not trusted as a reference.
//!
//! Pure: figures come from the stored [`FitReport`]s; no I/O.

use super::limits::Limits;
use crate::fit::FitReport;
use crate::model::{FittedModel, ImpedanceModel};
use serde::{Deserialize, Serialize};
use std::f64::consts::PI;

/// Points in a row on one side of the centre line that make a run (Nelson rule 2).
pub const RUN_LENGTH: usize = 9;

/// Approved lots needed for a sample standard deviation.
pub const MIN_APPROVED: usize = 2;

/// One succeeded fit of the part, as the store reads it.
#[derive(Debug, Clone)]
pub struct LotFit {
    pub fit_id: i64,
    pub lot: String,
    /// Position of the lot among the part's lots (its first upload); smaller is older.
    pub lot_order: i64,
    /// Approved now, or approved earlier and superseded, and not rejected since.
    pub approved: bool,
    pub uploaded_at: String,
    pub report: FitReport,
}

/// The figures a trend follows, in the order they are reported.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Figure {
    L0,
    LTest,
    Dcr,
    Srf,
    QPeak,
    QTest,
    ZMinBand,
    CoreCorner,
}

impl Figure {
    pub const ALL: [Figure; 8] = [
        Figure::L0,
        Figure::LTest,
        Figure::Dcr,
        Figure::Srf,
        Figure::QPeak,
        Figure::QTest,
        Figure::ZMinBand,
        Figure::CoreCorner,
    ];

    /// The name on the wire: the SI unit is in it.
    pub fn key(self) -> &'static str {
        match self {
            Figure::L0 => "l0_h",
            Figure::LTest => "l_test_h",
            Figure::Dcr => "dcr_ohm",
            Figure::Srf => "srf_hz",
            Figure::QPeak => "q_peak",
            Figure::QTest => "q_test",
            Figure::ZMinBand => "z_min_band_ohm",
            Figure::CoreCorner => "core_corner_hz",
        }
    }

    /// `H`, `ohm`, `Hz` or `1`.
    pub fn unit(self) -> &'static str {
        match self {
            Figure::L0 | Figure::LTest => "H",
            Figure::Dcr | Figure::ZMinBand => "ohm",
            Figure::Srf | Figure::CoreCorner => "Hz",
            Figure::QPeak | Figure::QTest => "1",
        }
    }

    /// What a person calls it.
    pub fn label(self, limits: &Limits) -> String {
        use crate::units::eng;
        match self {
            Figure::L0 => "Inductance at low frequency (L0)".into(),
            Figure::LTest => match limits.l_test_frequency_hz {
                Some(f) => format!("Inductance at {}", eng(f, "Hz")),
                None => "Inductance at the test frequency".into(),
            },
            Figure::Dcr => "DC resistance".into(),
            Figure::Srf => "Self-resonant frequency".into(),
            Figure::QPeak => "Peak Q".into(),
            Figure::QTest => match limits.q_test_frequency_hz {
                Some(f) => format!("Q at {}", eng(f, "Hz")),
                None => "Q at the test frequency".into(),
            },
            Figure::ZMinBand => match (limits.z_band_min_hz, limits.z_band_max_hz) {
                (Some(a), Some(b)) => {
                    format!("Lowest |Z| from {} to {}", eng(a, "Hz"), eng(b, "Hz"))
                }
                _ => "Lowest |Z| in the band".into(),
            },
            Figure::CoreCorner => "Core corner frequency".into(),
        }
    }

    /// The part's limits on this figure: (lower, upper).
    pub fn limits(self, limits: &Limits) -> (Option<f64>, Option<f64>) {
        match self {
            Figure::LTest => match (limits.l_nominal_h, limits.l_tolerance_percent) {
                (Some(n), Some(t)) => (Some(n * (1.0 - t / 100.0)), Some(n * (1.0 + t / 100.0))),
                _ => (None, None),
            },
            Figure::Dcr => (None, limits.dcr_max_ohm),
            Figure::Srf => (limits.srf_min_hz, None),
            Figure::QTest => (limits.q_min, None),
            Figure::ZMinBand => (limits.z_min_ohm, None),
            Figure::L0 | Figure::QPeak | Figure::CoreCorner => (None, None),
        }
    }

    /// The figure of one report, or `None` where the model cannot give it (outside its band, a DC
    /// figure of a rational model, no resonance in the sweep, a limit not set).
    pub fn value(self, report: &FitReport, limits: &Limits) -> Option<f64> {
        let in_band =
            |f: f64| f >= report.band_hz[0] * (1.0 - 1e-9) && f <= report.band_hz[1] * (1.0 + 1e-9);
        let v = match self {
            Figure::L0 => match &report.model {
                FittedModel::Lumped(m) => Some(m.l0_h),
                FittedModel::Rational(_) => None,
            },
            Figure::LTest => limits
                .l_test_frequency_hz
                .filter(|&f| in_band(f))
                .map(|f| report.model.impedance(f).im / (2.0 * PI * f)),
            Figure::Dcr => super::verdict::model_dcr_ohm(&report.model),
            Figure::Srf => report.derived.srf_hz,
            Figure::QPeak => report.derived.q_peak,
            Figure::QTest => limits.q_test_frequency_hz.filter(|&f| in_band(f)).map(|f| {
                let z = report.model.impedance(f);
                z.im / z.re
            }),
            Figure::ZMinBand => match (limits.z_band_min_hz, limits.z_band_max_hz) {
                (Some(a), Some(b)) if in_band(a) && in_band(b) => {
                    Some(crate::fit::derived::min_abs_z(&report.model, a, b).0)
                }
                _ => None,
            },
            Figure::CoreCorner => match &report.model {
                FittedModel::Lumped(m) => m
                    .core
                    .as_ref()
                    .map(|c| c.corner_hz)
                    .or(report.derived.core_corner_hz),
                FittedModel::Rational(_) => None,
            },
        };
        v.filter(|x| x.is_finite())
    }
}

/// One lot on a trend.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct TrendLot {
    pub lot: String,
    /// The fit that stands for the lot (its approved fit, else its newest trustworthy one, else its
    /// newest succeeded one).
    pub fit_id: i64,
    pub approved: bool,
    /// `ok` or `poor` (see the fit's assessment); a poor model's figures are not used for control
    /// limits.
    pub quality: String,
    /// When the lot's sweep was uploaded (RFC 3339).
    pub uploaded_at: String,
}

/// One lot's value of one figure, with its flags.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct TrendPoint {
    /// Index into the trend's `lots`.
    pub lot_index: usize,
    /// In the figure's unit; null where the model cannot give it.
    pub value: Option<f64>,
    /// Outside the part's limits on this figure.
    pub outside_limits: bool,
    /// Beyond the control limits (Nelson rule 1).
    pub out_of_control: bool,
    /// Part of nine or more points in a row on one side of the centre line (Nelson rule 2).
    pub in_run: bool,
    /// One of two (or three) of three points in a row beyond 2σ on the same side of the centre line
    /// (Western Electric rule 2, Nelson rule 5).
    pub beyond_2_sigma_2_of_3: bool,
    /// One of four (or five) of five points in a row beyond 1σ on the same side of the centre line
    /// (Western Electric rule 3, Nelson rule 6).
    pub beyond_1_sigma_4_of_5: bool,
}

/// One figure across the lots. Every number is in `unit`, the SI unit the `figure` name ends in.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct FigureTrend {
    /// `l0_h`, `l_test_h`, `dcr_ohm`, `srf_hz`, `q_peak`, `q_test`, `z_min_band_ohm` or
    /// `core_corner_hz`.
    pub figure: String,
    pub label: String,
    /// `H`, `ohm`, `Hz` or `1`.
    pub unit: String,
    pub limit_low: Option<f64>,
    pub limit_high: Option<f64>,
    /// Mean of the approved lots (with an ok model) that have the figure.
    pub centre: Option<f64>,
    /// Their sample standard deviation (divisor n − 1).
    pub sigma: Option<f64>,
    /// centre − 3σ.
    pub control_low: Option<f64>,
    /// centre + 3σ.
    pub control_high: Option<f64>,
    /// How many approved lots the control limits come from.
    pub approved_lots: usize,
    /// Why there are no control limits, or null.
    pub control_note: Option<String>,
    pub points: Vec<TrendPoint>,
}

/// Every figure of a part across its lots.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct PartTrend {
    pub part_number: String,
    /// Oldest first.
    pub lots: Vec<TrendLot>,
    /// Points in a row that make a run.
    pub run_length: usize,
    /// The figures any lot has, in a fixed order.
    pub figures: Vec<FigureTrend>,
}

/// One fit per lot (the approved one, else the newest trustworthy one, else the newest), lots oldest
/// first.
pub fn one_per_lot(mut fits: Vec<LotFit>) -> Vec<LotFit> {
    fits.sort_by_key(|f| {
        (
            f.lot_order,
            f.approved,
            super::verdict::trustworthy(&f.report),
            f.fit_id,
        )
    });
    let mut out: Vec<LotFit> = Vec::new();
    for f in fits {
        match out.last_mut() {
            // Sorted so that within a lot the approved, then the trustworthy, then the newest come last.
            Some(last) if last.lot_order == f.lot_order => *last = f,
            _ => out.push(f),
        }
    }
    out
}

/// Mean and sample standard deviation; `None` below two values.
pub fn mean_and_sample_sd(values: &[f64]) -> Option<(f64, f64)> {
    if values.len() < MIN_APPROVED {
        return None;
    }
    let n = values.len() as f64;
    let mean = values.iter().sum::<f64>() / n;
    let ss = values.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>();
    Some((mean, (ss / (n - 1.0)).sqrt()))
}

/// Which points belong to a run of at least `run` in a row strictly on one side of `centre`. A
/// missing value interrupts nothing (it is skipped); a value on the centre line ends the run.
pub fn runs(values: &[Option<f64>], centre: f64, run: usize) -> Vec<bool> {
    let mut flags = vec![false; values.len()];
    let mut current: Vec<usize> = Vec::new();
    let mut side = 0i8;
    let close = |current: &mut Vec<usize>, flags: &mut Vec<bool>| {
        if current.len() >= run {
            for &i in current.iter() {
                flags[i] = true;
            }
        }
        current.clear();
    };
    for (i, v) in values.iter().enumerate() {
        let Some(v) = v else { continue };
        let s = if *v > centre {
            1
        } else if *v < centre {
            -1
        } else {
            0
        };
        if s == 0 || s != side {
            close(&mut current, &mut flags);
        }
        side = s;
        if s != 0 {
            current.push(i);
        }
    }
    close(&mut current, &mut flags);
    flags
}

/// The zone test "`needed` of `window` points in a row beyond `centre ± k·sigma` on the same side":
/// which points are beyond the zone, on the side in question, in some window of `window`
/// consecutive present values that holds at least `needed` of them. Missing values are skipped.
pub fn zone_test(
    values: &[Option<f64>],
    centre: f64,
    sigma: f64,
    k: f64,
    needed: usize,
    window: usize,
) -> Vec<bool> {
    let mut flags = vec![false; values.len()];
    let present: Vec<(usize, f64)> = values
        .iter()
        .enumerate()
        .filter_map(|(i, v)| v.map(|v| (i, v)))
        .collect();
    if sigma <= 0.0 || !sigma.is_finite() {
        return flags;
    }
    for side in [1.0, -1.0] {
        let beyond = |v: f64| side * (v - centre) > k * sigma;
        for w in present.windows(window) {
            if w.iter().filter(|(_, v)| beyond(*v)).count() >= needed {
                for &(i, v) in w {
                    if beyond(v) {
                        flags[i] = true;
                    }
                }
            }
        }
    }
    flags
}

/// The trend of one figure over `lots` (already one per lot, in order).
pub fn figure_trend(figure: Figure, lots: &[LotFit], limits: &Limits) -> FigureTrend {
    let values: Vec<Option<f64>> = lots
        .iter()
        .map(|l| figure.value(&l.report, limits))
        .collect();
    let reference: Vec<f64> = lots
        .iter()
        .zip(&values)
        .filter(|(l, _)| l.approved && super::verdict::trustworthy(&l.report))
        .filter_map(|(_, v)| *v)
        .collect();
    let (limit_low, limit_high) = figure.limits(limits);
    let stats = mean_and_sample_sd(&reference);
    let control = stats.map(|(m, s)| (m - 3.0 * s, m + 3.0 * s));
    let none = || vec![false; values.len()];
    let in_run = match stats {
        Some((m, _)) => runs(&values, m, RUN_LENGTH),
        None => none(),
    };
    let (two_of_three, four_of_five) = match stats {
        Some((m, s)) => (
            zone_test(&values, m, s, 2.0, 2, 3),
            zone_test(&values, m, s, 1.0, 4, 5),
        ),
        None => (none(), none()),
    };
    let points = values
        .iter()
        .enumerate()
        .map(|(i, v)| TrendPoint {
            lot_index: i,
            value: *v,
            outside_limits: v.is_some_and(|x| {
                limit_low.is_some_and(|lo| x < lo) || limit_high.is_some_and(|hi| x > hi)
            }),
            out_of_control: match (v, control) {
                (Some(x), Some((lo, hi))) => *x < lo || *x > hi,
                _ => false,
            },
            in_run: in_run[i],
            beyond_2_sigma_2_of_3: two_of_three[i],
            beyond_1_sigma_4_of_5: four_of_five[i],
        })
        .collect();
    FigureTrend {
        figure: figure.key().into(),
        label: figure.label(limits),
        unit: figure.unit().into(),
        limit_low,
        limit_high,
        centre: stats.map(|s| s.0),
        sigma: stats.map(|s| s.1),
        control_low: control.map(|c| c.0),
        control_high: control.map(|c| c.1),
        approved_lots: reference.len(),
        control_note: stats.is_none().then(|| {
            format!(
                "control limits need at least {MIN_APPROVED} approved lots with a trustworthy model; \
                 this figure has {}",
                reference.len()
            )
        }),
        points,
    }
}

/// The trend of every figure any lot has.
pub fn part_trend(part_number: &str, limits: &Limits, fits: Vec<LotFit>) -> PartTrend {
    let lots = one_per_lot(fits);
    let figures = Figure::ALL
        .iter()
        .map(|&f| figure_trend(f, &lots, limits))
        .filter(|t| t.points.iter().any(|p| p.value.is_some()))
        .collect();
    PartTrend {
        part_number: part_number.into(),
        lots: lots
            .iter()
            .map(|l| TrendLot {
                lot: l.lot.clone(),
                fit_id: l.fit_id,
                approved: l.approved,
                quality: super::verdict::quality(&l.report).into(),
                uploaded_at: l.uploaded_at.clone(),
            })
            .collect(),
        run_length: RUN_LENGTH,
        figures,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::registry::verdict::tests::report;

    fn lot(i: i64, approved: bool, l0_h: f64, rdc_ohm: f64) -> LotFit {
        LotFit {
            fit_id: 100 + i,
            lot: format!("L{i}"),
            lot_order: i,
            approved,
            uploaded_at: "2026-01-01T00:00:00Z".into(),
            report: report(l0_h, rdc_ohm, 5e-12, Some(22.5e6)),
        }
    }

    #[test]
    fn the_sample_standard_deviation_divides_by_n_minus_one() {
        // Hand-computed: 2, 4, 4, 4, 5, 5, 7, 9 → mean 5, Σ(x − 5)² = 32, s = √(32/7) = 2.138 089 935.
        let (m, s) = mean_and_sample_sd(&[2.0, 4.0, 4.0, 4.0, 5.0, 5.0, 7.0, 9.0]).unwrap();
        assert_eq!(m, 5.0);
        assert!((s - (32.0f64 / 7.0).sqrt()).abs() < 1e-15);
        assert!((s - 2.138_089_935).abs() < 1e-9);
        assert_eq!(mean_and_sample_sd(&[1.0]), None);
        assert_eq!(mean_and_sample_sd(&[]), None);
    }

    #[test]
    fn control_limits_come_from_approved_lots_only_and_flag_a_lot_beyond_three_sigma() {
        // Approved L0: 10.0, 10.2, 10.1, 9.9 µH → mean 10.05 µH; deviations ±0.05, ±0.15 µH,
        // Σd² = 0.05 µH², s = √(0.05/3) = 0.129 099 µH; limits 10.05 ± 0.387 298 µH.
        let lots = vec![
            lot(1, true, 10.0e-6, 0.0118),
            lot(2, true, 10.2e-6, 0.0120),
            lot(3, true, 10.1e-6, 0.0119),
            lot(4, true, 9.9e-6, 0.0121),
            lot(5, false, 9.45e-6, 0.0122),
            lot(6, false, 10.3e-6, 0.0300),
        ];
        let limits = Limits {
            dcr_max_ohm: Some(0.018),
            ..Limits::default()
        };
        let t = part_trend("P", &limits, lots);
        let l0 = t.figures.iter().find(|f| f.figure == "l0_h").unwrap();
        assert_eq!(l0.approved_lots, 4);
        assert!((l0.centre.unwrap() - 10.05e-6).abs() < 1e-18);
        assert!((l0.sigma.unwrap() - 0.129_099_444_9e-6).abs() < 1e-15);
        assert!((l0.control_low.unwrap() - 9.662_701_665e-6).abs() < 1e-14);
        assert!((l0.control_high.unwrap() - 10.437_298_335e-6).abs() < 1e-14);
        let ooc: Vec<bool> = l0.points.iter().map(|p| p.out_of_control).collect();
        assert_eq!(ooc, [false, false, false, false, true, false]);
        assert!(l0.points.iter().all(|p| !p.outside_limits && !p.in_run));
        let dcr = t.figures.iter().find(|f| f.figure == "dcr_ohm").unwrap();
        assert_eq!(dcr.limit_high, Some(0.018));
        assert!(dcr.points[5].outside_limits && dcr.points[5].out_of_control);
        assert!(!dcr.points[4].outside_limits);
        assert_eq!(t.lots.len(), 6);
        assert_eq!(t.lots[4].lot, "L5");
    }

    #[test]
    fn with_fewer_than_two_approved_lots_there_are_no_control_limits_and_no_flags() {
        let lots = vec![lot(1, true, 10.0e-6, 0.0118), lot(2, false, 5.0e-6, 0.5)];
        let t = part_trend("P", &Limits::default(), lots);
        let l0 = t.figures.iter().find(|f| f.figure == "l0_h").unwrap();
        assert_eq!(l0.centre, None);
        assert_eq!(l0.control_high, None);
        assert_eq!(l0.approved_lots, 1);
        assert!(l0.control_note.as_deref().unwrap().contains("at least 2"));
        assert!(l0.points.iter().all(|p| !p.out_of_control
            && !p.in_run
            && !p.beyond_2_sigma_2_of_3
            && !p.beyond_1_sigma_4_of_5));
    }

    /// The zone tests on hand-checked series (centre 0, σ 1; the rules as Nelson 1984 states them,
    /// from memory; ties and skipped lots as the module comment says).
    #[test]
    fn two_of_three_beyond_two_sigma_and_four_of_five_beyond_one_sigma_flag_their_points() {
        let two_of_three = |v: &[Option<f64>]| zone_test(v, 0.0, 1.0, 2.0, 2, 3);
        let four_of_five = |v: &[Option<f64>]| zone_test(v, 0.0, 1.0, 1.0, 4, 5);
        let some = |v: &[f64]| v.iter().map(|&x| Some(x)).collect::<Vec<_>>();
        // 2.5 and 2.2 fall in one window of three; the point between them is not flagged.
        assert_eq!(
            two_of_three(&some(&[0.5, 2.5, -0.3, 2.2, 0.1])),
            [false, true, false, true, false]
        );
        // Two of three but on opposite sides, or on the boundary: no flag.
        assert!(two_of_three(&some(&[2.5, -2.5, 0.0])).iter().all(|&f| !f));
        assert!(two_of_three(&some(&[2.0, 2.0, 2.0])).iter().all(|&f| !f));
        // Far apart (a window of three holds only one): no flag.
        assert!(
            two_of_three(&some(&[2.5, 0.0, 0.0, 2.5]))
                .iter()
                .all(|&f| !f)
        );
        // Below, and across a lot without the figure (skipped).
        assert_eq!(
            two_of_three(&[Some(-2.5), None, Some(0.0), Some(-2.1)]),
            [true, false, false, true]
        );
        assert_eq!(
            four_of_five(&some(&[1.5, 1.2, 0.2, 1.1, 1.9, -0.5])),
            [true, true, false, true, true, false]
        );
        assert!(
            four_of_five(&some(&[1.5, 1.2, 0.2, 0.3, 1.9]))
                .iter()
                .all(|&f| !f)
        );
        // No spread, no zones.
        assert!(
            zone_test(&some(&[1.0, 1.0]), 1.0, 0.0, 2.0, 2, 3)
                .iter()
                .all(|&f| !f)
        );
    }

    #[test]
    fn the_zone_tests_use_the_approved_lots_centre_and_sigma() {
        // Approved L0 10.0, 10.2, 10.1, 9.9 µH: centre 10.05 µH, σ 0.129 µH (as in the test above),
        // so 2σ above the centre is 10.308 µH. Lots 5 and 7 (10.35, 10.4 µH) are beyond it, two of
        // three in a row; lot 6 (10.0 µH) between them is not flagged.
        let l0 = [10.0, 10.2, 10.1, 9.9, 10.35, 10.0, 10.4];
        let lots: Vec<LotFit> = l0
            .iter()
            .enumerate()
            .map(|(i, &l)| lot(i as i64 + 1, i < 4, l * 1e-6, 0.012))
            .collect();
        let t = part_trend("P", &Limits::default(), lots);
        let l0 = t.figures.iter().find(|f| f.figure == "l0_h").unwrap();
        let flags: Vec<bool> = l0.points.iter().map(|p| p.beyond_2_sigma_2_of_3).collect();
        assert_eq!(flags, [false, false, false, false, true, false, true]);
        assert!(
            l0.points.iter().all(|p| !p.out_of_control),
            "none is beyond 3σ (10.437 µH)"
        );
    }

    #[test]
    fn nine_in_a_row_on_one_side_make_a_run_and_eight_do_not() {
        let above = |n: usize| vec![Some(1.0); n];
        assert!(runs(&above(9), 0.0, RUN_LENGTH).iter().all(|&f| f));
        assert!(runs(&above(8), 0.0, RUN_LENGTH).iter().all(|&f| !f));
        // Eight above, one on the line, one below, nine below: only the last nine.
        let mut v = above(8);
        v.push(Some(0.0));
        v.extend(vec![Some(-1.0); 10]);
        let flags = runs(&v, 0.0, RUN_LENGTH);
        assert_eq!(flags.iter().filter(|&&f| f).count(), 10);
        assert!(flags[..9].iter().all(|&f| !f));
        // A missing value is skipped, not a break.
        let mut w = above(5);
        w.push(None);
        w.extend(above(4));
        let flags = runs(&w, 0.0, RUN_LENGTH);
        assert_eq!(
            flags,
            [true, true, true, true, true, false, true, true, true, true]
        );
    }

    #[test]
    fn a_lot_is_drawn_from_its_approved_fit_before_a_newer_revision() {
        let mut a = lot(1, true, 10.0e-6, 0.0118);
        let mut b = lot(1, false, 11.0e-6, 0.0118);
        a.fit_id = 5;
        b.fit_id = 9;
        let c = lot(2, false, 12.0e-6, 0.0118);
        let picked = one_per_lot(vec![c, b, a]);
        assert_eq!(
            picked.iter().map(|l| l.fit_id).collect::<Vec<_>>(),
            [5, 102]
        );
    }

    #[test]
    fn an_unapproved_lot_is_drawn_from_its_trustworthy_fit_before_a_newer_poor_one() {
        let ok = lot(1, false, 10.0e-6, 0.0118);
        let mut poor = lot(1, false, 11.0e-6, 0.0118);
        poor.fit_id = 999;
        poor.report.assessment.status = crate::fit::FitStatus::Poor;
        let picked = one_per_lot(vec![poor.clone(), ok]);
        assert_eq!(picked[0].fit_id, 101);
        let only_poor = one_per_lot(vec![poor]);
        assert_eq!(only_poor[0].fit_id, 999);
        assert_eq!(
            part_trend("P", &Limits::default(), only_poor).lots[0].quality,
            "poor"
        );
    }

    #[test]
    fn a_limit_set_at_a_test_frequency_gives_its_own_figure_with_the_tolerance_band() {
        let limits = Limits {
            l_nominal_h: Some(10e-6),
            l_test_frequency_hz: Some(100e3),
            l_tolerance_percent: Some(20.0),
            ..Limits::default()
        };
        let t = part_trend("P", &limits, vec![lot(1, false, 10.0e-6, 0.01)]);
        let lt = t.figures.iter().find(|f| f.figure == "l_test_h").unwrap();
        assert_eq!(lt.label, "Inductance at 100 kHz");
        assert!((lt.limit_low.unwrap() - 8e-6).abs() < 1e-18);
        assert!((lt.limit_high.unwrap() - 12e-6).abs() < 1e-18);
        // Far below the 22.5 MHz SRF, L(100 kHz) is L0 within 0.01 %.
        let v = lt.points[0].value.unwrap();
        assert!((v / 10e-6 - 1.0).abs() < 1e-4, "{v}");
    }
}
