//! A model evaluated on a frequency grid as CSV: header `frequency_hz,z_real_ohm,z_imag_ohm`, one row
//! per frequency — the same columns the sweep reader accepts, so an export can be read back as a sweep.

use super::{ExportError, check_grid};
use crate::model::ImpedanceModel;

pub fn impedance_csv(
    model: &dyn ImpedanceModel,
    frequencies_hz: &[f64],
) -> Result<String, ExportError> {
    check_grid(frequencies_hz)?;
    let mut out = String::from("frequency_hz,z_real_ohm,z_imag_ohm\n");
    for &f in frequencies_hz {
        let z = model.impedance(f);
        if !(z.re.is_finite() && z.im.is_finite()) {
            return Err(ExportError::NotFinite { frequency_hz: f });
        }
        out.push_str(&format!("{f:e},{:e},{:e}\n", z.re, z.im));
    }
    Ok(out)
}
