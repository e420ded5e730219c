//! Measurement files in, a [`Sweep`] out: frequency grid, DUT impedance and its per-point uncertainty.

use num_complex::Complex64;
use serde::{Deserialize, Serialize};

/// How the instrument saw the part; decides how S-parameters become the DUT impedance.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Method {
    /// 1-port: Z = Z0 (1 + S11) / (1 − S11).
    Reflection,
    /// 2-port, part in series between the ports: Z = 2 Z0 (1 − S21) / S21.
    SeriesThru,
    /// 2-port, part from the through line to ground: Z = Z0 S21 / (2 (1 − S21)).
    ShuntThru,
    /// The file already holds the impedance (impedance-analyser CSV, or Z-parameter 1-port).
    Direct,
}

/// A measured impedance sweep of one part, on a strictly increasing, finite frequency grid.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Sweep {
    pub frequency_hz: Vec<f64>,
    pub impedance_ohm: Vec<Complex64>,
    /// Standard uncertainty of each impedance point, in ohm, taken as circular in the complex plane
    /// (the same σ applies to the real and the imaginary part).
    pub sigma_ohm: Vec<f64>,
    pub method: Method,
    pub z0_ohm: f64,
}
