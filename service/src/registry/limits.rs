//! A part's acceptance limits. Every field is optional: `None` means no limit.

use serde::{Deserialize, Serialize};

#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(default, deny_unknown_fields)]
pub struct Limits {
    /// Nominal inductance, checked as the effective L (Im Z / ω) at `l_test_frequency_hz`.
    #[schema(exclusive_minimum = 0.0)]
    pub l_nominal_h: Option<f64>,
    #[schema(exclusive_minimum = 0.0)]
    pub l_test_frequency_hz: Option<f64>,
    /// Allowed deviation from `l_nominal_h`, in percent (both ways).
    #[schema(exclusive_minimum = 0.0)]
    pub l_tolerance_percent: Option<f64>,
    #[schema(exclusive_minimum = 0.0)]
    pub dcr_max_ohm: Option<f64>,
    #[schema(exclusive_minimum = 0.0)]
    pub srf_min_hz: Option<f64>,
    #[schema(exclusive_minimum = 0.0)]
    pub q_min: Option<f64>,
    #[schema(exclusive_minimum = 0.0)]
    pub q_test_frequency_hz: Option<f64>,
    /// |Z| must stay at or above this over `z_band_min_hz..=z_band_max_hz`.
    #[schema(exclusive_minimum = 0.0)]
    pub z_min_ohm: Option<f64>,
    #[schema(exclusive_minimum = 0.0)]
    pub z_band_min_hz: Option<f64>,
    #[schema(exclusive_minimum = 0.0)]
    pub z_band_max_hz: Option<f64>,
    /// The core corner frequency (the dispersive core's corner, or Rp/(2π·L0) for the single-pole
    /// core) must be at least this. A model without a core loss has no corner and fails the check.
    #[schema(exclusive_minimum = 0.0)]
    pub core_corner_min_hz: Option<f64>,
    /// The core corner frequency must be at most this.
    #[schema(exclusive_minimum = 0.0)]
    pub core_corner_max_hz: Option<f64>,
}

impl Limits {
    /// Checks that every given value is finite and positive and that dependent fields come together.
    pub fn validate(&self) -> Result<(), String> {
        let positive = [
            ("l_nominal_h", self.l_nominal_h),
            ("l_test_frequency_hz", self.l_test_frequency_hz),
            ("l_tolerance_percent", self.l_tolerance_percent),
            ("dcr_max_ohm", self.dcr_max_ohm),
            ("srf_min_hz", self.srf_min_hz),
            ("q_min", self.q_min),
            ("q_test_frequency_hz", self.q_test_frequency_hz),
            ("z_min_ohm", self.z_min_ohm),
            ("z_band_min_hz", self.z_band_min_hz),
            ("z_band_max_hz", self.z_band_max_hz),
            ("core_corner_min_hz", self.core_corner_min_hz),
            ("core_corner_max_hz", self.core_corner_max_hz),
        ];
        for (name, value) in positive {
            if let Some(v) = value
                && !(v.is_finite() && v > 0.0)
            {
                return Err(format!(
                    "{name} must be a finite number above zero (got {v})"
                ));
            }
        }
        let together = |a: (&str, bool), b: (&str, bool)| -> Result<(), String> {
            if a.1 != b.1 {
                let (given, missing) = if a.1 { (a.0, b.0) } else { (b.0, a.0) };
                return Err(format!("{given} needs {missing}"));
            }
            Ok(())
        };
        together(
            ("l_nominal_h", self.l_nominal_h.is_some()),
            ("l_test_frequency_hz", self.l_test_frequency_hz.is_some()),
        )?;
        together(
            ("l_nominal_h", self.l_nominal_h.is_some()),
            ("l_tolerance_percent", self.l_tolerance_percent.is_some()),
        )?;
        together(
            ("q_min", self.q_min.is_some()),
            ("q_test_frequency_hz", self.q_test_frequency_hz.is_some()),
        )?;
        together(
            ("z_min_ohm", self.z_min_ohm.is_some()),
            ("z_band_min_hz", self.z_band_min_hz.is_some()),
        )?;
        together(
            ("z_min_ohm", self.z_min_ohm.is_some()),
            ("z_band_max_hz", self.z_band_max_hz.is_some()),
        )?;
        if let Some(t) = self.l_tolerance_percent
            && t >= 100.0
        {
            return Err(format!("l_tolerance_percent must be below 100 (got {t})"));
        }
        if let (Some(lo), Some(hi)) = (self.z_band_min_hz, self.z_band_max_hz)
            && lo >= hi
        {
            return Err(format!(
                "z_band_min_hz ({lo}) must be below z_band_max_hz ({hi})"
            ));
        }
        if let (Some(lo), Some(hi)) = (self.core_corner_min_hz, self.core_corner_max_hz)
            && lo > hi
        {
            return Err(format!(
                "core_corner_min_hz ({lo}) must not be above core_corner_max_hz ({hi})"
            ));
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn empty_limits_are_valid() {
        assert_eq!(Limits::default().validate(), Ok(()));
    }

    #[test]
    fn a_negative_limit_is_refused_by_name() {
        let l = Limits {
            dcr_max_ohm: Some(-1.0),
            ..Limits::default()
        };
        assert!(l.validate().unwrap_err().contains("dcr_max_ohm"));
    }

    #[test]
    fn a_nominal_inductance_needs_its_test_frequency_and_tolerance() {
        let l = Limits {
            l_nominal_h: Some(1e-5),
            l_tolerance_percent: Some(20.0),
            ..Limits::default()
        };
        assert!(l.validate().unwrap_err().contains("l_test_frequency_hz"));
    }

    #[test]
    fn inverted_core_corner_bounds_are_refused_by_name() {
        let l = Limits {
            core_corner_min_hz: Some(2e6),
            core_corner_max_hz: Some(1e6),
            ..Limits::default()
        };
        assert!(l.validate().unwrap_err().contains("core_corner_min_hz"));
        let l = Limits {
            core_corner_max_hz: Some(f64::NAN),
            ..Limits::default()
        };
        assert!(l.validate().unwrap_err().contains("core_corner_max_hz"));
    }

    #[test]
    fn an_inverted_impedance_band_is_refused() {
        let l = Limits {
            z_min_ohm: Some(100.0),
            z_band_min_hz: Some(2e8),
            z_band_max_hz: Some(1e8),
            ..Limits::default()
        };
        assert!(l.validate().unwrap_err().contains("below z_band_max_hz"));
    }
}
