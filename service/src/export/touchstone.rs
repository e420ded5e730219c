//! A model evaluated on a frequency grid as a Touchstone 1-port file (Touchstone File Format
//! Specification, IBIS Open Forum): version 1 syntax, option line `# HZ S RI R <z0>`, one line per
//! frequency with Re S11 and Im S11, where S11 = (Z − Z0)/(Z + Z0). Version 1 is what every reader
//! accepts; RI keeps full precision (MA would round-trip through an angle). Provenance goes in `!`
//! comment lines before the option line.

use super::{ExportContext, ExportError, check_grid, provenance_lines};
use crate::model::ImpedanceModel;

/// The model's reflection coefficient against `z0_ohm` at every frequency of `frequencies_hz`.
pub fn touchstone_1port(
    model: &dyn ImpedanceModel,
    frequencies_hz: &[f64],
    z0_ohm: f64,
    ctx: &ExportContext,
) -> Result<String, ExportError> {
    check_grid(frequencies_hz)?;
    if !(z0_ohm.is_finite() && z0_ohm > 0.0) {
        return Err(ExportError::InvalidReference(z0_ohm));
    }
    let mut out = String::new();
    out.push_str("! henrybook model export: 1-port reflection S11 of the model's impedance\n");
    for line in provenance_lines(ctx) {
        out.push_str("! ");
        out.push_str(&line);
        out.push('\n');
    }
    out.push_str(&format!(
        "! {} points from {:e} Hz to {:e} Hz; S11 = (Z - Z0)/(Z + Z0), Z0 = {z0_ohm:e} ohm\n",
        frequencies_hz.len(),
        frequencies_hz[0],
        frequencies_hz[frequencies_hz.len() - 1]
    ));
    out.push_str(&format!("# HZ S RI R {z0_ohm}\n"));
    for &f in frequencies_hz {
        let z = model.impedance(f);
        if !(z.re.is_finite() && z.im.is_finite()) {
            return Err(ExportError::NotFinite { frequency_hz: f });
        }
        let s = (z - z0_ohm) / (z + z0_ohm);
        out.push_str(&format!("{f:e} {:e} {:e}\n", s.re, s.im));
    }
    Ok(out)
}
