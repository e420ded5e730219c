//! A fit against its part's limits: one check per limit that is set, each with the measured value, the
//! limit it was held to, the margin (positive = inside the limit, in the unit of the measured value) and
//! pass/fail. Measured values come from the engine's report or from its fitted model at the limit's
//! test frequency; a test frequency outside the sweep band cannot be judged and fails with a note.

use super::limits::Limits;
use crate::fit::FitReport;
use crate::model::{FittedModel, ImpedanceModel};
use serde::{Deserialize, Serialize};
use std::f64::consts::PI;

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct Check {
    /// `inductance`, `dcr_max`, `srf_min`, `q_min`, `z_min_band` or `core_corner`.
    pub limit: String,
    pub measured: Option<f64>,
    pub limit_value: f64,
    /// `H`, `ohm`, `Hz` or `1`.
    pub unit: String,
    pub margin: Option<f64>,
    pub pass: bool,
    /// Why a check could not be judged, or what the measured value stands for.
    pub note: Option<String>,
}

use crate::units::eng as si;

fn in_band(report: &FitReport, f: f64) -> bool {
    // A relative tolerance: the band ends are the sweep's first and last frequency.
    f >= report.band_hz[0] * (1.0 - 1e-9) && f <= report.band_hz[1] * (1.0 + 1e-9)
}

fn out_of_band_note(report: &FitReport, f: f64) -> String {
    format!(
        "{} lies outside the swept band {} to {}",
        si(f, "Hz"),
        si(report.band_hz[0], "Hz"),
        si(report.band_hz[1], "Hz")
    )
}

fn check(limit: &str, unit: &str, limit_value: f64, measured: f64, margin: f64) -> Check {
    Check {
        limit: limit.into(),
        measured: Some(measured),
        limit_value,
        unit: unit.into(),
        margin: Some(margin),
        pass: margin >= 0.0,
        note: None,
    }
}

fn unjudged(limit: &str, unit: &str, limit_value: f64, note: String) -> Check {
    Check {
        limit: limit.into(),
        measured: None,
        limit_value,
        unit: unit.into(),
        margin: None,
        pass: false,
        note: Some(note),
    }
}

/// DC resistance of the model: the lumped model's `rdc_ohm` (an element of the circuit, determined by
/// the winding's loss across the band). A rational model is valid only over its sweep band, and DC lies
/// outside every band: extrapolated there it can read a 0.4 Ω chip inductor as 1.2 kΩ, so it gives none.
pub fn model_dcr_ohm(model: &FittedModel) -> Option<f64> {
    match model {
        FittedModel::Lumped(m) => Some(m.rdc_ohm),
        FittedModel::Rational(_) => None,
    }
}

/// All checks for the limits that are set, in a fixed order.
pub fn checks(limits: &Limits, report: &FitReport) -> Vec<Check> {
    let model = &report.model;
    let mut out = Vec::new();
    if let (Some(nominal), Some(f), Some(tol)) = (
        limits.l_nominal_h,
        limits.l_test_frequency_hz,
        limits.l_tolerance_percent,
    ) {
        let lo = nominal * (1.0 - tol / 100.0);
        let hi = nominal * (1.0 + tol / 100.0);
        if in_band(report, f) {
            let l = model.impedance(f).im / (2.0 * PI * f);
            let (bound, margin) = if l - lo < hi - l {
                (lo, l - lo)
            } else {
                (hi, hi - l)
            };
            let mut c = check("inductance", "H", bound, l, margin);
            c.note = Some(format!(
                "effective L at {} against {} ± {tol} %",
                si(f, "Hz"),
                si(nominal, "H")
            ));
            out.push(c);
        } else {
            out.push(unjudged(
                "inductance",
                "H",
                nominal,
                out_of_band_note(report, f),
            ));
        }
    }
    if let Some(max) = limits.dcr_max_ohm {
        match model_dcr_ohm(model) {
            Some(r) => out.push(check("dcr_max", "ohm", max, r, max - r)),
            None => out.push(unjudged(
                "dcr_max",
                "ohm",
                max,
                format!(
                    "the model gives no DC resistance: it is valid only from {} to {}",
                    si(report.band_hz[0], "Hz"),
                    si(report.band_hz[1], "Hz")
                ),
            )),
        }
    }
    if let Some(min) = limits.srf_min_hz {
        match (report.derived.srf_hz, report.derived.srf_above_hz) {
            (Some(srf), _) => out.push(check("srf_min", "Hz", min, srf, srf - min)),
            (None, Some(above)) if above >= min => {
                let mut c = check("srf_min", "Hz", min, above, above - min);
                c.note = Some(format!(
                    "no resonance inside the sweep: the SRF lies above {}",
                    si(above, "Hz")
                ));
                out.push(c);
            }
            (None, above) => out.push(unjudged(
                "srf_min",
                "Hz",
                min,
                match above {
                    Some(a) => format!(
                        "no resonance below {}, the top of the sweep, which is below the limit",
                        si(a, "Hz")
                    ),
                    None => "the report gives no SRF".into(),
                },
            )),
        }
    }
    if let (Some(min), Some(f)) = (limits.q_min, limits.q_test_frequency_hz) {
        if in_band(report, f) {
            let z = model.impedance(f);
            let q = z.im / z.re;
            let mut c = check("q_min", "1", min, q, q - min);
            c.note = Some(format!("Q at {}", si(f, "Hz")));
            out.push(c);
        } else {
            out.push(unjudged("q_min", "1", min, out_of_band_note(report, f)));
        }
    }
    if let (Some(min), Some(a), Some(b)) =
        (limits.z_min_ohm, limits.z_band_min_hz, limits.z_band_max_hz)
    {
        if in_band(report, a) && in_band(report, b) {
            let (z, at) = crate::fit::derived::min_abs_z(model, a, b);
            let mut c = check("z_min_band", "ohm", min, z, z - min);
            c.note = Some(format!(
                "lowest |Z| from {} to {}, at {}",
                si(a, "Hz"),
                si(b, "Hz"),
                si(at, "Hz")
            ));
            out.push(c);
        } else {
            out.push(unjudged(
                "z_min_band",
                "ohm",
                min,
                format!(
                    "the band {a}..{b} Hz is not inside the swept band {}..{} Hz",
                    report.band_hz[0], report.band_hz[1]
                ),
            ));
        }
    }
    if limits.core_corner_min_hz.is_some() || limits.core_corner_max_hz.is_some() {
        out.push(core_corner_check(limits, report));
    }
    out
}

/// The core corner frequency against `core_corner_min_hz..core_corner_max_hz` (either may be open):
/// one check held to the nearer bound, as the inductance is. A model without a core loss (or a
/// rational model) has no corner and cannot be judged.
fn core_corner_check(limits: &Limits, report: &FitReport) -> Check {
    let (lo, hi) = (limits.core_corner_min_hz, limits.core_corner_max_hz);
    let range = match (lo, hi) {
        (Some(a), Some(b)) => format!("{} to {}", si(a, "Hz"), si(b, "Hz")),
        (Some(a), None) => format!("at least {}", si(a, "Hz")),
        (None, Some(b)) => format!("at most {}", si(b, "Hz")),
        (None, None) => String::new(),
    };
    let nearer = lo.or(hi).unwrap_or(f64::NAN);
    let Some(fc) = report.derived.core_corner_hz.filter(|f| f.is_finite()) else {
        return unjudged(
            "core_corner",
            "Hz",
            nearer,
            "the model has no core loss and so no core corner frequency".into(),
        );
    };
    let below = lo.map(|a| fc - a);
    let above = hi.map(|b| b - fc);
    let (bound, margin) = match (below, above) {
        (Some(m1), Some(m2)) if m2 < m1 => (hi.unwrap_or(nearer), m2),
        (Some(m1), _) => (lo.unwrap_or(nearer), m1),
        (None, Some(m2)) => (hi.unwrap_or(nearer), m2),
        (None, None) => (nearer, f64::NAN),
    };
    let mut c = check("core_corner", "Hz", bound, fc, margin);
    let mut note = format!("core corner frequency against {range}");
    if !in_band(report, fc) {
        note.push_str(&format!(
            "; the corner lies outside the swept band {} to {}, so it is the model's extrapolation",
            si(report.band_hz[0], "Hz"),
            si(report.band_hz[1], "Hz")
        ));
    }
    c.note = Some(note);
    c
}

/// The overall verdict: `None` without limits, else pass only when every check passes.
/// What the API reports as the verdict of a poor model on a part with limits.
pub const WITHHELD: &str = "withheld";

/// Whether the report's model describes its data within their uncertainty: only such a model is
/// judged against limits.
pub fn trustworthy(report: &FitReport) -> bool {
    report.assessment.status == crate::fit::FitStatus::Ok
}

/// The stored quality of a report: `ok` or `poor`.
pub fn quality(report: &FitReport) -> &'static str {
    report.assessment.status.as_str()
}

/// Why a poor model gets no verdict, for the fit's detail (None for a trustworthy model).
pub fn withheld_note(report: &FitReport) -> Option<String> {
    (!trustworthy(report)).then(|| {
        format!(
            "no verdict: {}; the limits are shown against the model for reference only",
            report.assessment.summary
        )
    })
}

/// The overall verdict: none without limits; none for a model that does not describe its data (a
/// pass or a fail from it would be a guess; the API says `withheld`); otherwise pass when every check
/// passes.
pub fn overall(checks: &[Check], report: &FitReport) -> Option<&'static str> {
    if checks.is_empty() || !trustworthy(report) {
        None
    } else if checks.iter().all(|c| c.pass) {
        Some("pass")
    } else {
        Some("fail")
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;

    #[test]
    fn the_core_corner_is_held_to_its_nearer_bound_and_a_part_without_a_corner_fails_unjudged() {
        let mut r = report(1e-5, 0.05, 5e-12, Some(22.5e6));
        let limits = Limits {
            core_corner_min_hz: Some(1e6),
            core_corner_max_hz: Some(5e6),
            ..Limits::default()
        };
        let c = &checks(&limits, &r)[0];
        assert_eq!(c.limit, "core_corner");
        assert!(!c.pass && c.measured.is_none(), "{c:?}");
        assert!(c.note.as_deref().unwrap().contains("no core"), "{c:?}");
        r.derived.core_corner_hz = Some(4e6);
        let c = &checks(&limits, &r)[0];
        assert!(c.pass, "{c:?}");
        assert_eq!((c.limit_value, c.margin), (5e6, Some(1e6)));
        r.derived.core_corner_hz = Some(0.5e6);
        let c = &checks(&limits, &r)[0];
        assert!(!c.pass, "{c:?}");
        assert_eq!((c.limit_value, c.margin), (1e6, Some(-0.5e6)));
        let only_max = Limits {
            core_corner_max_hz: Some(2e8),
            ..Limits::default()
        };
        r.derived.core_corner_hz = Some(3e8);
        let c = &checks(&only_max, &r)[0];
        assert!(!c.pass && c.margin == Some(-1e8), "{c:?}");
        assert!(
            c.note
                .as_deref()
                .unwrap()
                .contains("outside the swept band"),
            "{c:?}"
        );
    }
    use crate::fit::{Derived, Quality, Termination};
    use crate::model::LumpedModel;

    /// A report around a known model (invented for the test: 10 µH, 50 mΩ, 5 pF).
    pub(crate) fn report(l0_h: f64, rdc_ohm: f64, cp_f: f64, srf_hz: Option<f64>) -> FitReport {
        FitReport {
            engine_version: "test".into(),
            model: FittedModel::Lumped(LumpedModel {
                l0_h,
                rdc_ohm,
                k_ac_ohm_per_sqrt_hz: 0.0,
                rp_ohm: None,
                cp_f,
                ls_h: 0.0,
                sections: vec![],
                core: None,
            }),
            uncertainty: None,
            not_identifiable: vec![],
            correlation: None,
            derived: Derived {
                srf_hz,
                srf_above_hz: if srf_hz.is_none() { Some(1e7) } else { None },
                ..Derived::default()
            },
            quality: Quality::default(),
            termination: Termination::Converged,
            iterations: 1,
            candidates: vec![],
            band_hz: [1e3, 1e8],
            assessment: Default::default(),
            warnings: vec![],
            material: None,
        }
    }

    #[test]
    fn no_limits_give_no_verdict() {
        let r = report(1e-5, 0.05, 5e-12, Some(2.25e7));
        assert!(checks(&Limits::default(), &r).is_empty());
        assert_eq!(overall(&[], &r), None);
    }

    #[test]
    fn each_limit_reports_measured_value_and_margin() {
        // Thomson: 10 µH with 5 pF resonates at 22.5079 MHz (TOOLBOX reference value).
        let r = report(1e-5, 0.05, 5e-12, Some(22.5079e6));
        let limits = Limits {
            l_nominal_h: Some(1e-5),
            l_test_frequency_hz: Some(1e5),
            l_tolerance_percent: Some(20.0),
            dcr_max_ohm: Some(0.04),
            srf_min_hz: Some(1.5e7),
            ..Limits::default()
        };
        let c = checks(&limits, &r);
        assert_eq!(c.len(), 3);
        // Effective L at 100 kHz: L0 / (1 − ω² L0 Cp) ≈ 10.0002 µH, 1.9998 µH inside the upper bound.
        assert_eq!(c[0].limit, "inductance");
        assert!(c[0].pass);
        assert!((c[0].limit_value - 1.2e-5).abs() < 1e-12);
        assert!((c[0].margin.unwrap() - 1.998e-6).abs() < 1e-8);
        assert_eq!(c[1].limit, "dcr_max");
        assert!(!c[1].pass);
        assert!((c[1].margin.unwrap() + 0.01).abs() < 1e-12);
        assert_eq!(c[2].limit, "srf_min");
        assert!(c[2].pass);
        assert_eq!(overall(&c, &r), Some("fail"));
    }

    #[test]
    fn a_rational_model_gives_no_dc_figure_outside_its_band() {
        // d = 1.2 kΩ would read as the DC resistance if the model were extrapolated to 0 Hz.
        let mut r = report(1e-7, 0.41, 1e-13, None);
        r.band_hz = [1e7, 3e9];
        r.model = FittedModel::Rational(crate::model::RationalModel {
            d_ohm: 1200.0,
            e_h: 1e-7,
            real_poles: vec![],
            complex_poles: vec![],
        });
        assert_eq!(model_dcr_ohm(&r.model), None);
        let limits = Limits {
            dcr_max_ohm: Some(0.5),
            ..Limits::default()
        };
        let c = checks(&limits, &r);
        assert!(!c[0].pass && c[0].measured.is_none(), "{c:?}");
        assert!(
            c[0].note
                .as_deref()
                .unwrap()
                .contains("valid only from 10 MHz to 3 GHz"),
            "{c:?}"
        );
        let figures = crate::registry::figures::from_report(&r);
        assert_eq!((figures.rdc_ohm, figures.l0_h), (None, None));
    }

    #[test]
    fn limits_are_worded_with_si_prefixes() {
        assert_eq!(si(1e-5, "H"), "10 µH");
        assert_eq!(si(1e5, "Hz"), "100 kHz");
        assert_eq!(si(4.7e-9, "H"), "4.7 nH");
        assert_eq!(si(0.0123, "ohm"), "12.3 mohm");
        assert_eq!(si(22.5079e6, "Hz"), "22.5079 MHz");
        let r = report(1e-5, 0.05, 5e-12, Some(22.5e6));
        let limits = Limits {
            l_nominal_h: Some(1e-5),
            l_test_frequency_hz: Some(1e5),
            l_tolerance_percent: Some(20.0),
            ..Limits::default()
        };
        let c = checks(&limits, &r);
        assert_eq!(
            c[0].note.as_deref(),
            Some("effective L at 100 kHz against 10 µH ± 20 %")
        );
    }

    #[test]
    fn a_poor_model_gets_no_verdict_and_says_why() {
        // The same checks on a model that does not describe its data: neither pass nor fail.
        let mut r = report(1e-5, 0.03, 5e-12, Some(22.5079e6));
        let limits = Limits {
            dcr_max_ohm: Some(0.04),
            ..Limits::default()
        };
        let c = checks(&limits, &r);
        assert!(c[0].pass);
        assert_eq!(overall(&c, &r), Some("pass"));
        assert_eq!(withheld_note(&r), None);
        r.assessment.status = crate::fit::FitStatus::Poor;
        r.assessment.summary = "the model misses the data between 1 MHz and 3 MHz".into();
        assert_eq!(overall(&c, &r), None);
        assert_eq!(quality(&r), "poor");
        let note = withheld_note(&r).unwrap();
        assert!(note.contains("between 1 MHz and 3 MHz"), "{note}");
    }

    #[test]
    fn a_test_frequency_outside_the_sweep_fails_with_a_note() {
        let r = report(1e-5, 0.05, 5e-12, Some(22.5e6));
        let limits = Limits {
            q_min: Some(10.0),
            q_test_frequency_hz: Some(1e9),
            ..Limits::default()
        };
        let c = checks(&limits, &r);
        assert!(!c[0].pass);
        assert!(c[0].measured.is_none());
        assert!(
            c[0].note
                .as_deref()
                .unwrap()
                .contains("outside the swept band")
        );
    }

    #[test]
    fn an_srf_above_the_sweep_passes_when_the_sweep_top_clears_the_limit() {
        let r = report(1e-6, 0.01, 1e-13, None);
        let ok = Limits {
            srf_min_hz: Some(5e6),
            ..Limits::default()
        };
        assert!(checks(&ok, &r)[0].pass);
        let too_high = Limits {
            srf_min_hz: Some(5e7),
            ..Limits::default()
        };
        assert!(!checks(&too_high, &r)[0].pass);
    }

    #[test]
    fn the_lowest_impedance_over_a_band_is_at_its_low_end_for_an_inductor_below_srf() {
        let r = report(1e-5, 0.05, 5e-12, Some(22.5e6));
        let limits = Limits {
            z_min_ohm: Some(100.0),
            z_band_min_hz: Some(1e6),
            z_band_max_hz: Some(1e7),
            ..Limits::default()
        };
        let c = checks(&limits, &r);
        // |Z(1 MHz)| ≈ ωL/(1 − ω²LC) = 62.83/(1 − 0.001974) ≈ 62.96 Ω < 100 Ω.
        assert!(!c[0].pass);
        assert!((c[0].measured.unwrap() - 62.955).abs() < 0.01);
    }
}
