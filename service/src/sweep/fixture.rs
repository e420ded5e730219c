//! Fixture compensation from an open and a short measurement taken on the same frequency grid.
//!
//! One-port forms, with Zxm, Zom, Zsm the measured DUT, open and short impedances:
//! - [`Topology::Approximate`]: Zdut = (Zxm − Zsm) / (1 − (Zxm − Zsm)·Yom), Yom = 1/Zom — the usual
//!   open/short compensation of impedance analysers, exact when the fixture's series impedance is
//!   small beside the open's (common practice, no source).
//! - [`Topology::SeriesThenShunt`]: an L-shaped fixture with the series impedance Zs on the
//!   instrument side and the stray admittance Yo across the DUT: Zxm = Zs + 1/(Yo + 1/Zdut), so
//!   Zs = Zsm, Yo = 1/(Zom − Zsm) and exactly Zdut = (Zxm − Zsm) / (1 − (Zxm − Zsm)/(Zom − Zsm)).
//! - [`Topology::ShuntThenSeries`]: the mirror L, Yo on the instrument side, Zs next to the DUT:
//!   Zxm = 1/(Yo + 1/(Zs + Zdut)), so Yo = 1/Zom and exactly
//!   Zdut = Zxm/(1 − Zxm·Yom) − Zsm/(1 − Zsm·Yom).
//!
//! DC readings (a 0 Hz row in the files, [`Sweep::dc_reading`]) are compensated by the same forms with
//! real values; an open without a DC reading counts as infinite at DC (an open is an open there), so
//! then R = Rx − Rs. A DUT DC reading without a short DC reading to subtract is left out with a
//! warning: the fixture's own resistance would sit in it unnoticed.
//!
//! Two-port: [`deembed_open_short_two_port`] removes the pads' shunt admittance and the leads' series
//! impedance from a 2-port, Ydut = ((Yx − Yo)⁻¹ − (Ys − Yo)⁻¹)⁻¹ (the matrix form of the same idea).

use super::assemble::g4;
use super::convert::{self, Mat2};
use super::{DcReading, Network, Parameter, Sweep, SweepError};
use num_complex::Complex64;
use serde::{Deserialize, Serialize};

/// How the fixture's parasitics sit around the DUT.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Topology {
    #[default]
    Approximate,
    SeriesThenShunt,
    ShuntThenSeries,
}

/// The compensated DUT impedance from one measured point of DUT, open and short.
pub fn compensate_point(
    topology: Topology,
    zxm: Complex64,
    zom: Complex64,
    zsm: Complex64,
) -> Complex64 {
    let one = Complex64::new(1.0, 0.0);
    match topology {
        Topology::Approximate => {
            let d = zxm - zsm;
            d / (one - d / zom)
        }
        Topology::SeriesThenShunt => {
            let d = zxm - zsm;
            d / (one - d / (zom - zsm))
        }
        Topology::ShuntThenSeries => {
            let yom = zom.inv();
            zxm / (one - zxm * yom) - zsm / (one - zsm * yom)
        }
    }
}

/// Two frequency grids are the same when every point agrees to 1e-9 relative.
fn check_same_grid(what: &str, dut: &[f64], other: &[f64]) -> Result<(), SweepError> {
    if dut.len() != other.len() {
        return Err(SweepError::file(format!(
            "the {what} sweep has {} points but the DUT sweep {}: compensation needs one frequency grid",
            other.len(),
            dut.len()
        )));
    }
    for (k, (a, b)) in dut.iter().zip(other).enumerate() {
        if (a - b).abs() > 1e-9 * a.abs().max(b.abs()) {
            return Err(SweepError::file(format!(
                "the {what} sweep's point {} is at {b} Hz but the DUT's at {a} Hz: compensation needs one \
                 frequency grid",
                k + 1
            )));
        }
    }
    Ok(())
}

/// Compensates a DUT sweep with open and short sweeps on the same grid. The uncertainty propagates to
/// first order from all three sweeps.
pub fn compensate(
    topology: Topology,
    dut: &Sweep,
    open: &Sweep,
    short: &Sweep,
) -> Result<Sweep, SweepError> {
    check_same_grid("open", &dut.frequency_hz, &open.frequency_hz)?;
    check_same_grid("short", &dut.frequency_hz, &short.frequency_hz)?;
    let mut out = dut.clone();
    for k in 0..dut.frequency_hz.len() {
        let (zx, zo, zs) = (
            dut.impedance_ohm[k],
            open.impedance_ohm[k],
            short.impedance_ohm[k],
        );
        let z = compensate_point(topology, zx, zo, zs);
        if !(z.re.is_finite() && z.im.is_finite()) {
            return Err(SweepError::file(format!(
                "compensation has no finite result at {} Hz: the DUT reads like the open",
                dut.frequency_hz[k]
            )));
        }
        // The map is holomorphic in each argument: a central difference along the real axis gives the
        // complex derivative.
        let d = |f: &dyn Fn(Complex64) -> Complex64, x: Complex64| {
            let h = 1e-6 * x.norm().max(1e-12);
            ((f(x + h) - f(x - h)) / (2.0 * h)).norm()
        };
        let gx = d(&|x| compensate_point(topology, x, zo, zs), zx);
        let go = d(&|x| compensate_point(topology, zx, x, zs), zo);
        let gs = d(&|x| compensate_point(topology, zx, zo, x), zs);
        let sigma = ((gx * dut.sigma_ohm[k]).powi(2)
            + (go * open.sigma_ohm[k]).powi(2)
            + (gs * short.sigma_ohm[k]).powi(2))
        .sqrt();
        out.impedance_ohm[k] = z;
        out.sigma_ohm[k] = if sigma.is_finite() { sigma } else { f64::MAX };
    }
    for (what, s) in [("open", open), ("short", short)] {
        out.warnings.extend(
            s.warnings
                .iter()
                .map(|w| format!("the {what} fixture sweep: {w}")),
        );
    }
    out.dc_reading = None;
    if let Some(dc) = dut.dc_reading {
        match compensate_dc(topology, &dc, open.dc_reading, short.dc_reading) {
            Ok(r) => out.dc_reading = Some(r),
            Err(why) => out.warnings.push(format!(
                "line {}: the DC reading {} Ω is left out after fixture compensation: {why}",
                dc.line,
                g4(dc.resistance_ohm)
            )),
        }
    }
    Ok(out)
}

/// The DUT's DC reading with the fixture's taken out (see the module docs), or why it cannot be.
fn compensate_dc(
    topology: Topology,
    dut: &DcReading,
    open: Option<DcReading>,
    short: Option<DcReading>,
) -> Result<DcReading, String> {
    let short = short.ok_or("the short fixture sweep has no DC reading to subtract")?;
    let re = |x: f64| Complex64::new(x, 0.0);
    let (rx, rs) = (re(dut.resistance_ohm), re(short.resistance_ohm));
    let ro = re(open.map_or(f64::INFINITY, |o| o.resistance_ohm));
    let eval = |x: Complex64, o: Complex64, s: Complex64| {
        if o.re.is_infinite() {
            x - s
        } else {
            compensate_point(topology, x, o, s)
        }
    };
    let r = eval(rx, ro, rs).re;
    // Each argument's sensitivity by a central difference (the forms are smooth in each).
    let d = |f: &dyn Fn(Complex64) -> Complex64, x: Complex64| {
        let h = 1e-6 * x.norm().max(1e-12);
        ((f(x + h) - f(x - h)) / (2.0 * h)).norm()
    };
    let gx = d(&|x| eval(x, ro, rs), rx);
    let gs = d(&|x| eval(rx, ro, x), rs);
    let go = match open {
        Some(o) => d(&|x| eval(rx, x, rs), ro) * o.sigma_ohm,
        None => 0.0,
    };
    let sigma = ((gx * dut.sigma_ohm).powi(2) + (gs * short.sigma_ohm).powi(2) + go * go).sqrt();
    if !(r.is_finite() && sigma.is_finite() && sigma > 0.0) {
        return Err("the compensation has no finite result".into());
    }
    if r < 0.0 {
        return Err(format!(
            "the short's {} Ω is more than the DUT's, leaving a negative resistance",
            g4(short.resistance_ohm)
        ));
    }
    Ok(DcReading {
        resistance_ohm: r,
        sigma_ohm: sigma,
        line: dut.line,
    })
}

fn y_matrix(net: &Network, k: usize, z0: f64) -> Mat2 {
    let m = convert::mat2(&net.data[k]);
    match net.parameter {
        Parameter::Y => m,
        Parameter::Z => convert::inv(&m),
        Parameter::S => convert::y_from_s_matrix(&m, z0),
    }
}

/// Two-port open/short de-embedding; returns the DUT as a Y-parameter network on the DUT's grid.
pub fn deembed_open_short_two_port(
    dut: &Network,
    open: &Network,
    short: &Network,
) -> Result<Network, SweepError> {
    for (what, n) in [("DUT", dut), ("open", open), ("short", short)] {
        if n.ports != 2 {
            return Err(SweepError::file(format!(
                "two-port de-embedding needs 2-port files; the {what} file has {} port(s)",
                n.ports
            )));
        }
    }
    check_same_grid("open", &dut.frequency_hz, &open.frequency_hz)?;
    check_same_grid("short", &dut.frequency_hz, &short.frequency_hz)?;
    let (z0x, z0o, z0s) = (
        dut.common_reference_ohm()?,
        open.common_reference_ohm()?,
        short.common_reference_ohm()?,
    );
    let mut out = dut.clone();
    out.parameter = Parameter::Y;
    for k in 0..dut.frequency_hz.len() {
        let yo = y_matrix(open, k, z0o);
        let zx = convert::inv(&convert::sub(&y_matrix(dut, k, z0x), &yo));
        let zs = convert::inv(&convert::sub(&y_matrix(short, k, z0s), &yo));
        let y = convert::inv(&convert::sub(&zx, &zs));
        if y.iter()
            .flatten()
            .any(|c| !(c.re.is_finite() && c.im.is_finite()))
        {
            return Err(SweepError::at(
                dut.line[k],
                format!(
                    "de-embedding has no finite result at {} Hz (DUT, open and short too alike)",
                    dut.frequency_hz[k]
                ),
            ));
        }
        out.data[k] = vec![y[0][0], y[0][1], y[1][0], y[1][1]];
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sweep::Method;

    fn c(re: f64, im: f64) -> Complex64 {
        Complex64::new(re, im)
    }

    #[test]
    fn the_exact_forms_recover_the_dut_through_their_fixture() {
        // Synthetic fixture (invented values): Zs = 0.05 + j·ω·5 nH, Yo = j·ω·2 pF at 30 MHz.
        let w = 2.0 * std::f64::consts::PI * 30e6;
        let zs = c(0.05, w * 5e-9);
        let yo = c(0.0, w * 2e-12);
        let zdut = c(3.0, w * 1e-6);
        let one = c(1.0, 0.0);

        // Series first, shunt across the DUT.
        let zxm = zs + one / (yo + one / zdut);
        let zom = zs + one / yo;
        let zsm = zs;
        let got = compensate_point(Topology::SeriesThenShunt, zxm, zom, zsm);
        assert!((got - zdut).norm() < 1e-9 * zdut.norm(), "{got}");
        // The approximation is close but not exact here.
        let approx = compensate_point(Topology::Approximate, zxm, zom, zsm);
        assert!((approx - zdut).norm() > 1e-6 * zdut.norm());
        assert!((approx - zdut).norm() < 1e-2 * zdut.norm());

        // Shunt first, series next to the DUT.
        let zxm = one / (yo + one / (zs + zdut));
        let zom = one / yo;
        let zsm = one / (yo + one / zs);
        let got = compensate_point(Topology::ShuntThenSeries, zxm, zom, zsm);
        assert!((got - zdut).norm() < 1e-9 * zdut.norm(), "{got}");
    }

    fn sweep(f: &[f64], z: Complex64) -> Sweep {
        Sweep {
            frequency_hz: f.to_vec(),
            impedance_ohm: vec![z; f.len()],
            sigma_ohm: vec![1e-3; f.len()],
            method: Method::Direct,
            z0_ohm: 50.0,
            dc_reading: None,
            warnings: Vec::new(),
        }
    }

    #[test]
    fn compensation_needs_one_grid() {
        let a = sweep(&[1.0, 2.0], c(1.0, 1.0));
        let b = sweep(&[1.0, 2.5], c(1e6, 0.0));
        let err = compensate(Topology::Approximate, &a, &b, &a).unwrap_err();
        assert!(err.message.contains("one frequency grid"), "{err}");
        let short = sweep(&[1.0], c(0.0, 0.0));
        let err = compensate(Topology::Approximate, &a, &a, &short).unwrap_err();
        assert!(err.message.contains("short"), "{err}");
    }

    #[test]
    fn compensation_propagates_the_uncertainty() {
        let f = [1.0, 2.0];
        let dut = sweep(&f, c(10.0, 100.0));
        let open = sweep(&f, c(0.0, -1e5));
        let short = sweep(&f, c(0.01, 0.1));
        let out = compensate(Topology::Approximate, &dut, &open, &short).unwrap();
        // Dominated by the DUT and short terms, each ≈ 1e-3: σ ≈ √2·1e-3.
        assert!(
            (out.sigma_ohm[0] / (2f64.sqrt() * 1e-3) - 1.0).abs() < 0.01,
            "{}",
            out.sigma_ohm[0]
        );
    }

    fn dc(r: f64, sigma: f64, line: usize) -> Option<DcReading> {
        Some(DcReading {
            resistance_ohm: r,
            sigma_ohm: sigma,
            line,
        })
    }

    #[test]
    fn a_dc_reading_loses_the_short_and_keeps_the_fixture_warnings() {
        let f = [1.0, 2.0];
        let mut dut = sweep(&f, c(10.0, 100.0));
        dut.dc_reading = dc(0.30, 3e-4, 2);
        let mut open = sweep(&f, c(0.0, -1e5));
        open.warnings
            .push("line 2: the 0 Hz row is left out: …".into());
        let mut short = sweep(&f, c(0.01, 0.1));
        short.dc_reading = dc(0.05, 4e-4, 2);
        let out = compensate(Topology::Approximate, &dut, &open, &short).unwrap();
        let got = out.dc_reading.unwrap();
        // No open DC reading: an open at DC, R = Rx − Rs, σ in quadrature.
        assert!((got.resistance_ohm - 0.25).abs() < 1e-12, "{got:?}");
        assert!((got.sigma_ohm - 5e-4).abs() < 1e-9, "{got:?}");
        assert_eq!(got.line, 2);
        assert!(out.warnings[0].starts_with("the open fixture sweep: line 2"));

        // An open with a finite DC reading takes its part, as at every other frequency.
        open.dc_reading = dc(1e3, 1.0, 2);
        let out = compensate(Topology::Approximate, &dut, &open, &short).unwrap();
        let want = compensate_point(
            Topology::Approximate,
            c(0.30, 0.0),
            c(1e3, 0.0),
            c(0.05, 0.0),
        );
        assert!((out.dc_reading.unwrap().resistance_ohm - want.re).abs() < 1e-12);

        // Without the short's DC reading the DUT's is left out, with the reason.
        short.dc_reading = None;
        let out = compensate(Topology::SeriesThenShunt, &dut, &open, &short).unwrap();
        assert_eq!(out.dc_reading, None);
        let w = out.warnings.last().unwrap();
        assert!(
            w.contains("line 2") && w.contains("no DC reading to subtract"),
            "{w}"
        );

        // A short that reads more than the DUT leaves no resistance.
        short.dc_reading = dc(0.5, 4e-4, 2);
        let out = compensate(Topology::Approximate, &dut, &open, &short).unwrap();
        assert_eq!(out.dc_reading, None);
        assert!(out.warnings.last().unwrap().contains("negative"));
    }
}
