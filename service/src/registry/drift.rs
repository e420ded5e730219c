//! A fit against the part's approved baseline: for each parameter both have, the change in percent of
//! the baseline and in combined standard uncertainties σ = (current − baseline)/√(u_c² + u_b²).

use crate::fit::FitReport;
use crate::model::FittedModel;
use serde::{Deserialize, Serialize};

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct ParameterDrift {
    pub name: String,
    pub baseline: f64,
    pub current: f64,
    /// (current − baseline)/|baseline| in percent; `None` when the baseline is 0.
    pub percent: Option<f64>,
    /// Change in combined standard uncertainties; `None` when either uncertainty is unknown.
    pub sigma: Option<f64>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct Drift {
    pub baseline_fit_id: i64,
    pub parameters: Vec<ParameterDrift>,
}

impl Drift {
    /// Largest |σ| over the parameters that have one.
    pub fn max_sigma(&self) -> Option<f64> {
        self.parameters
            .iter()
            .filter_map(|p| p.sigma.map(f64::abs))
            .fold(None, |m, s| Some(m.map_or(s, |m: f64| m.max(s))))
    }
}

type Named = Vec<(&'static str, f64, Option<f64>)>;

fn lumped_values(report: &FitReport) -> Named {
    let FittedModel::Lumped(m) = &report.model else {
        return Vec::new();
    };
    let u = report.uncertainty.clone().unwrap_or_default();
    let mut v: Named = vec![
        ("l0_h", m.l0_h, u.l0_h),
        ("rdc_ohm", m.rdc_ohm, u.rdc_ohm),
        (
            "k_ac_ohm_per_sqrt_hz",
            m.k_ac_ohm_per_sqrt_hz,
            u.k_ac_ohm_per_sqrt_hz,
        ),
        ("cp_f", m.cp_f, u.cp_f),
        ("ls_h", m.ls_h, u.ls_h),
    ];
    if let Some(rp) = m.rp_ohm {
        v.push(("rp_ohm", rp, u.rp_ohm));
    }
    if let Some(c) = &m.core {
        let uc = u.core.unwrap_or_default();
        v.push(("core.corner_hz", c.corner_hz, uc.corner_hz));
        v.push(("core.alpha", c.alpha, uc.alpha));
        v.push(("core.air_fraction", c.air_fraction, uc.air_fraction));
        v.push(("core.resonance_hz", c.resonance_hz, uc.resonance_hz));
    }
    v
}

/// Drift of `current` from `baseline`; parameters absent from either model are left out, and so are
/// those that are zero in both (elements the model selection did not use).
pub fn drift(baseline_fit_id: i64, baseline: &FitReport, current: &FitReport) -> Drift {
    let base = lumped_values(baseline);
    let cur = lumped_values(current);
    let mut parameters = Vec::new();
    for (name, c, uc) in &cur {
        let Some((_, b, ub)) = base.iter().find(|(n, _, _)| n == name) else {
            continue;
        };
        if *b == 0.0 && *c == 0.0 {
            continue;
        }
        parameters.push(change(name, *b, *c, *ub, *uc));
    }
    if let (Some(b), Some(c)) = (baseline.derived.srf_hz, current.derived.srf_hz) {
        parameters.push(change("srf_hz", b, c, None, None));
    }
    // The core corner across structures (a single-pole baseline against a dispersive current fit,
    // say), where `core.corner_hz` compares only two dispersive cores.
    if let (Some(b), Some(c)) = (
        baseline.derived.core_corner_hz,
        current.derived.core_corner_hz,
    ) {
        parameters.push(change(
            "core_corner_hz",
            b,
            c,
            core_corner_sigma_hz(baseline),
            core_corner_sigma_hz(current),
        ));
    }
    Drift {
        baseline_fit_id,
        parameters,
    }
}

/// σ of the core corner: the dispersive core's own, or for the single-pole core fc = Rp/(2π·L0) from
/// the relative σ of Rp and L0 and their correlation: (σ_fc/fc)² = s_rp² + s_l0² − 2ρ·s_rp·s_l0.
fn core_corner_sigma_hz(report: &FitReport) -> Option<f64> {
    let FittedModel::Lumped(m) = &report.model else {
        return None;
    };
    let u = report.uncertainty.as_ref()?;
    if m.core.is_some() {
        return u.core.as_ref().and_then(|c| c.corner_hz);
    }
    let (rp, fc) = (m.rp_ohm?, report.derived.core_corner_hz?);
    let (s_rp, s_l0) = (u.rp_ohm? / rp, u.l0_h? / m.l0_h);
    let corr = report.correlation.as_ref()?;
    let at = |name: &str| corr.names.iter().position(|n| n == name);
    let rho = corr.matrix.get(at("rp_ohm")?)?.get(at("l0_h")?).copied()?;
    let var = s_rp * s_rp + s_l0 * s_l0 - 2.0 * rho * s_rp * s_l0;
    (var.is_finite() && var >= 0.0).then(|| fc * var.sqrt())
}

fn change(name: &str, b: f64, c: f64, ub: Option<f64>, uc: Option<f64>) -> ParameterDrift {
    let percent = (b != 0.0).then(|| (c - b) / b.abs() * 100.0);
    let sigma = match (ub, uc) {
        (Some(ub), Some(uc)) if ub.is_finite() && uc.is_finite() && ub * ub + uc * uc > 0.0 => {
            Some((c - b) / (ub * ub + uc * uc).sqrt())
        }
        _ => None,
    };
    ParameterDrift {
        name: name.into(),
        baseline: b,
        current: c,
        percent,
        sigma,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fit::LumpedUncertainty;
    use crate::registry::verdict::tests::report;

    #[test]
    fn drift_is_given_in_percent_and_in_combined_sigma() {
        let mut base = report(1.0e-5, 0.050, 5e-12, Some(22.5e6));
        let mut cur = report(1.1e-5, 0.050, 5e-12, Some(21.5e6));
        base.uncertainty = Some(LumpedUncertainty {
            l0_h: Some(3e-8),
            ..Default::default()
        });
        cur.uncertainty = Some(LumpedUncertainty {
            l0_h: Some(4e-8),
            ..Default::default()
        });
        let d = drift(7, &base, &cur);
        assert_eq!(d.baseline_fit_id, 7);
        let l0 = d.parameters.iter().find(|p| p.name == "l0_h").unwrap();
        assert!((l0.percent.unwrap() - 10.0).abs() < 1e-9);
        // 1 µH over √(0.03² + 0.04²) µH = 0.05 µH → 20 σ.
        assert!((l0.sigma.unwrap() - 20.0).abs() < 1e-9);
        let rdc = d.parameters.iter().find(|p| p.name == "rdc_ohm").unwrap();
        assert_eq!(rdc.percent, Some(0.0));
        assert_eq!(rdc.sigma, None);
        assert!(d.parameters.iter().all(|p| p.name != "ls_h"));
        let srf = d.parameters.iter().find(|p| p.name == "srf_hz").unwrap();
        assert!((srf.percent.unwrap() + 4.444_444).abs() < 1e-5);
        assert!((d.max_sigma().unwrap() - 20.0).abs() < 1e-9);
        assert!(d.parameters.iter().all(|p| p.name != "core_corner_hz"));
    }

    #[test]
    fn the_core_corner_drifts_with_the_sigma_of_rp_over_l0() {
        // fc = Rp/(2π·L0): relative σ 2 % (Rp) and 1 % (L0) with correlation 0.5 give
        // √(4 + 1 − 2·0.5·2·1) % = √3 % (derived by hand).
        let with_rp = |rp: f64, corner: f64| {
            let mut r = report(1.0e-5, 0.050, 5e-12, Some(22.5e6));
            let FittedModel::Lumped(m) = &mut r.model else {
                unreachable!()
            };
            m.rp_ohm = Some(rp);
            r.derived.core_corner_hz = Some(corner);
            r.uncertainty = Some(LumpedUncertainty {
                l0_h: Some(1e-7),
                rp_ohm: Some(0.02 * rp),
                ..Default::default()
            });
            r.correlation = Some(crate::fit::Correlation {
                names: vec!["l0_h".into(), "rp_ohm".into()],
                matrix: vec![vec![1.0, 0.5], vec![0.5, 1.0]],
            });
            r
        };
        let base = with_rp(1000.0, 1e6);
        let cur = with_rp(1100.0, 1.1e6);
        let d = drift(3, &base, &cur);
        let fc = d
            .parameters
            .iter()
            .find(|p| p.name == "core_corner_hz")
            .unwrap();
        assert!((fc.percent.unwrap() - 10.0).abs() < 1e-9, "{fc:?}");
        let (ub, uc) = (1e6 * 3f64.sqrt() / 100.0, 1.1e6 * 3f64.sqrt() / 100.0);
        let want = 0.1e6 / (ub * ub + uc * uc).sqrt();
        assert!((fc.sigma.unwrap() - want).abs() < 1e-9, "{fc:?} vs {want}");
    }
}
