//! How closely a realised R, L, C network follows its model over the band of validity: the one
//! check every netlist export runs before it states an error in its comments.

use super::netlist::Netlist;
use super::{ExportError, grid_with_resonances, resonances, stated_bound};
use num_complex::Complex64;

/// The machine-readable comment line carrying the stated error of every netlist.
pub const ERROR_BOUND_KEY: &str = "max_relative_error_bound:";

/// The worst relative error of a network against its model on a log grid made dense around the
/// model's resonances.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct BandAccuracy {
    pub max_err: f64,
    pub max_err_at_hz: f64,
    /// max over f of |Z| over the smallest single-element impedance (see [`stated_bound`]).
    pub spread: f64,
    pub points: usize,
    pub resonances: usize,
}

fn is_finite(z: Complex64) -> bool {
    z.re.is_finite() && z.im.is_finite()
}

/// Measures `realised` (the network `net` holds) against `model` over `[lo, hi]`: 200 points per
/// decade (400 to 6000) plus 300 on each side of every resonance of the model.
///
/// Refuses, naming the frequency, a model impedance that is zero or not finite (in either part or in
/// magnitude), since no relative error can be stated there ([`ExportError::NotFinite`]), and a
/// realised impedance that is not finite ([`ExportError::NetworkNotFinite`]).
pub(crate) fn band_accuracy(
    model: impl Fn(f64) -> Complex64,
    realised: impl Fn(f64) -> Complex64,
    net: &Netlist,
    [lo, hi]: [f64; 2],
) -> Result<BandAccuracy, ExportError> {
    let res = resonances(&model, lo, hi);
    let check = grid_with_resonances(lo, hi, 200.0, 400, 6000, &res, 300);
    let mut acc = BandAccuracy {
        max_err: 0.0,
        max_err_at_hz: lo,
        spread: 1.0,
        points: check.len(),
        resonances: res.len(),
    };
    for &f in &check {
        let z_model = model(f);
        let norm = z_model.norm();
        if !is_finite(z_model) || !norm.is_finite() || norm == 0.0 {
            return Err(ExportError::NotFinite { frequency_hz: f });
        }
        let z_net = realised(f);
        if !is_finite(z_net) {
            return Err(ExportError::NetworkNotFinite { frequency_hz: f });
        }
        acc.spread = acc.spread.max(norm / net.min_element_impedance(f));
        let e = (z_net - z_model).norm() / norm;
        if !e.is_finite() {
            return Err(ExportError::NetworkNotFinite { frequency_hz: f });
        }
        if e > acc.max_err {
            acc.max_err = e;
            acc.max_err_at_hz = f;
        }
    }
    Ok(acc)
}

impl BandAccuracy {
    /// The error the netlist states (see [`stated_bound`]).
    pub fn bound(&self) -> f64 {
        stated_bound(self.max_err, self.spread)
    }

    /// The measured error, how the stated error follows from it, and the machine-readable line.
    pub fn comments(&self, net: &mut Netlist) {
        let BandAccuracy {
            max_err,
            max_err_at_hz,
            spread,
            points,
            resonances,
        } = *self;
        net.comment(format!(
            "whole subcircuit: max |Z_net - Z_model| / |Z_model| = {max_err:.3e} (at {max_err_at_hz:.4e} Hz, {points} points: log-spaced over the band and dense around its {resonances} resonances)"
        ));
        net.comment(format!(
            "stated error = 1.25 x that maximum + 2e-15 x max over f of |Z|/|z_min| (= {spread:.3e}: a simulator's rounding, z_min the smallest single-element impedance) + 1e-8"
        ));
        net.comment(format!("{ERROR_BOUND_KEY} {:.3e}", self.bound()));
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;

    /// A 1 µH inductor with 0.1 Ω in series, as both the model and the network.
    fn inductor(f: f64) -> Complex64 {
        Complex64::new(0.1, 2.0 * PI * f * 1e-6)
    }

    fn inductor_net() -> Netlist {
        let mut net = Netlist::new();
        let x = net.node();
        net.element("R1", super::super::netlist::PIN_A, x, 0.1);
        net.element("L1", x, super::super::netlist::PIN_B, 1e-6);
        net
    }

    #[test]
    fn an_exact_network_has_no_error_and_states_the_floor() {
        let acc = band_accuracy(inductor, inductor, &inductor_net(), [1e3, 1e8]).unwrap();
        assert_eq!(acc.max_err, 0.0);
        assert_eq!(acc.resonances, 0);
        // 5 decades at 200 per decade.
        assert_eq!(acc.points, 1000);
        assert!(
            acc.bound() >= 1e-8 && acc.bound() < 1.1e-8,
            "{}",
            acc.bound()
        );
    }

    #[test]
    fn a_wrong_network_is_measured_where_it_is_worst() {
        // The network's inductance is 1 % high: the error grows towards high frequency.
        let net_z = |f: f64| Complex64::new(0.1, 2.0 * PI * f * 1.01e-6);
        let acc = band_accuracy(inductor, net_z, &inductor_net(), [1e3, 1e8]).unwrap();
        assert!((acc.max_err - 0.01).abs() < 1e-6, "{}", acc.max_err);
        assert_eq!(acc.max_err_at_hz, 1e8);
    }

    #[test]
    fn an_infinite_model_impedance_is_refused_with_its_frequency() {
        let model = |f: f64| {
            if f > 1e6 {
                Complex64::new(f64::INFINITY, 0.0)
            } else {
                inductor(f)
            }
        };
        let err = band_accuracy(model, inductor, &inductor_net(), [1e3, 1e8]).unwrap_err();
        let ExportError::NotFinite { frequency_hz } = err else {
            panic!("{err:?}")
        };
        assert!(frequency_hz > 1e6 && frequency_hz < 1.1e6, "{frequency_hz}");
        assert!(err.to_string().contains("not finite"), "{err}");
    }

    #[test]
    fn a_model_magnitude_that_overflows_is_refused() {
        // Both parts finite, the magnitude not: no relative error can be formed.
        let model = |_f: f64| Complex64::new(1.5e308, 1.5e308);
        let err = band_accuracy(model, inductor, &inductor_net(), [1e3, 1e8]).unwrap_err();
        assert!(
            // The grid's first point, exp(ln 1e3).
            matches!(err, ExportError::NotFinite { frequency_hz } if (frequency_hz / 1e3 - 1.0).abs() < 1e-12),
            "{err:?}"
        );
    }

    #[test]
    fn a_zero_model_impedance_is_refused() {
        let err = band_accuracy(
            |_| Complex64::new(0.0, 0.0),
            inductor,
            &inductor_net(),
            [1e3, 1e8],
        )
        .unwrap_err();
        assert!(matches!(err, ExportError::NotFinite { .. }), "{err:?}");
    }

    #[test]
    fn a_network_impedance_that_is_not_a_number_is_refused_with_a_clear_message() {
        let net_z = |f: f64| {
            if f >= 1e5 {
                Complex64::new(f64::NAN, 0.0)
            } else {
                inductor(f)
            }
        };
        let err = band_accuracy(inductor, net_z, &inductor_net(), [1e3, 1e8]).unwrap_err();
        let ExportError::NetworkNotFinite { frequency_hz } = err else {
            panic!("{err:?}")
        };
        assert!((1e5..1.02e5).contains(&frequency_hz), "{frequency_hz}");
        let msg = err.to_string();
        assert!(
            msg.contains("realised network") && msg.contains("not finite") && msg.contains("Hz"),
            "{msg}"
        );
    }
}
