//! henrybook's impedance CSV: a header, then one row per frequency.
//!
//! ```text
//! frequency_hz,z_real_ohm,z_imag_ohm          or    frequency_hz,z_mag_ohm,z_phase_deg
//! 1000,0.0123,0.0629                                1000,0.0641,78.9
//! ```
//! Columns may come in any order; an optional `sigma_ohm` column gives each point's standard
//! uncertainty and replaces the uncertainty model. The separator is a comma (a semicolon or a tab
//! when the header has no comma). Lines starting with `#` and blank lines are skipped. Column names
//! carry their SI unit; a name with another unit (`frequency_mhz`, `z_real_mohm`) is refused as mixed
//! units rather than rescaled.

use super::assemble::{Row, assemble};
use super::{Method, ReadOptions, Repeats, Sweep, SweepError, check_grid};
use num_complex::Complex64;

/// A parsed impedance CSV, before repeated frequencies are merged, the 0 Hz row is set aside and the
/// uncertainty is attached.
#[derive(Debug, Clone, PartialEq)]
pub struct ImpedanceTable {
    pub frequency_hz: Vec<f64>,
    pub impedance_ohm: Vec<Complex64>,
    /// When the file has a `sigma_ohm` column.
    pub sigma_ohm: Option<Vec<f64>>,
    /// The 1-based line of each row.
    pub line: Vec<usize>,
}

#[derive(Clone, Copy, PartialEq)]
enum Style {
    RealImag,
    MagPhase,
}

/// Largest |z_phase_deg| the reader takes (see [`Header::read_row`]).
pub const MAX_PHASE_DEG: f64 = 360.0;

const EXPECTED: &str = "expected frequency_hz with z_real_ohm,z_imag_ohm or z_mag_ohm,z_phase_deg \
                        (and optionally sigma_ohm)";

/// Parses the CSV text (see the module docs).
pub fn parse_csv(text: &str) -> Result<ImpedanceTable, SweepError> {
    let mut lines = text
        .split('\n')
        .enumerate()
        .map(|(i, l)| (i + 1, l.trim()))
        .filter(|(_, l)| !l.is_empty() && !l.starts_with('#'));
    let (header_line, header) = lines
        .next()
        .ok_or_else(|| SweepError::file("the CSV file is empty"))?;
    let header = Header::parse(header_line, header)?;
    let mut table = ImpedanceTable {
        frequency_hz: Vec::new(),
        impedance_ohm: Vec::new(),
        sigma_ohm: header.sigma_col.map(|_| Vec::new()),
        line: Vec::new(),
    };
    // One buffer for every row's fields (a row of a long sweep would otherwise allocate its own).
    let mut fields = Vec::with_capacity(header.names.len());
    for (ln, row) in lines {
        header.read_row(ln, row, &mut fields, &mut table)?;
    }
    if table.frequency_hz.is_empty() {
        return Err(SweepError::at(
            header_line,
            "the CSV file has a header but no data rows",
        ));
    }
    check_grid(&table.frequency_hz, &table.line, Repeats::Allow)?;
    Ok(table)
}

/// What the header line says: the separator, the column names and which column holds what.
struct Header {
    line: usize,
    sep: char,
    names: Vec<String>,
    f_col: usize,
    style: Style,
    /// The two impedance columns: real and imaginary part, or magnitude and phase.
    a_col: usize,
    b_col: usize,
    sigma_col: Option<usize>,
}

impl Header {
    /// Reads the header on line `header_line`, refusing repeated, unknown or non-SI columns and an
    /// incomplete set.
    fn parse(header_line: usize, header: &str) -> Result<Header, SweepError> {
        let sep = if header.contains(',') {
            ','
        } else if header.contains(';') {
            ';'
        } else {
            '\t'
        };
        let names: Vec<String> = header
            .split(sep)
            .map(|n| unquote(n).to_ascii_lowercase())
            .collect();
        check_column_names(header_line, &names)?;
        let find = |name: &str| names.iter().position(|n| n == name);
        let f_col = find("frequency_hz").ok_or_else(|| {
            SweepError::at(header_line, format!("no frequency_hz column; {EXPECTED}"))
        })?;
        let ri = (find("z_real_ohm"), find("z_imag_ohm"));
        let mp = (find("z_mag_ohm"), find("z_phase_deg"));
        let (style, a_col, b_col) = match (ri, mp) {
            ((Some(a), Some(b)), (None, None)) => (Style::RealImag, a, b),
            ((None, None), (Some(a), Some(b))) => (Style::MagPhase, a, b),
            ((None, None), (None, None)) => {
                return Err(SweepError::at(
                    header_line,
                    format!("no impedance columns; {EXPECTED}"),
                ));
            }
            _ => {
                return Err(SweepError::at(
                    header_line,
                    format!("the impedance columns mix or miss a pair; {EXPECTED}"),
                ));
            }
        };
        let sigma_col = find("sigma_ohm");
        Ok(Header {
            line: header_line,
            sep,
            names,
            f_col,
            style,
            a_col,
            b_col,
            sigma_col,
        })
    }

    /// Reads data row `row` on line `ln` into `table`.
    fn read_row<'a>(
        &self,
        ln: usize,
        row: &'a str,
        fields: &mut Vec<&'a str>,
        table: &mut ImpedanceTable,
    ) -> Result<(), SweepError> {
        fields.clear();
        fields.extend(row.split(self.sep).map(unquote));
        if fields.len() != self.names.len() {
            return Err(SweepError::at(
                ln,
                format!(
                    "wrong column count: {} fields, the header (line {}) has {}",
                    fields.len(),
                    self.line,
                    self.names.len()
                ),
            ));
        }
        let num = |col: usize| -> Result<f64, SweepError> {
            let tok = fields[col];
            let v: f64 = tok.parse().map_err(|_| {
                SweepError::at(ln, format!("{} '{tok}' is not a number", self.names[col]))
            })?;
            if v.is_finite() {
                Ok(v)
            } else {
                Err(SweepError::at(
                    ln,
                    format!("{} '{tok}' is not finite", self.names[col]),
                ))
            }
        };
        let f = num(self.f_col)?;
        let (a, b) = (num(self.a_col)?, num(self.b_col)?);
        let z = match self.style {
            Style::RealImag => Complex64::new(a, b),
            Style::MagPhase => {
                if a < 0.0 {
                    return Err(SweepError::at(ln, format!("z_mag_ohm {a} is negative")));
                }
                // An impedance's phase is within ±180° (a passive part's within ±90°, and noise);
                // ±360° admits a phase written from 0 to 360°. A larger one is a slip of the pen
                // (a decimal point lost), which would otherwise become a point anywhere on the
                // circle of its magnitude.
                if b.abs() > MAX_PHASE_DEG {
                    return Err(SweepError::at(
                        ln,
                        format!(
                            "z_phase_deg {b} lies outside ±{MAX_PHASE_DEG}°: an impedance's phase \
                             is within ±180° (a passive part's within ±90°)"
                        ),
                    ));
                }
                Complex64::from_polar(a, b.to_radians())
            }
        };
        if let (Some(col), Some(s)) = (self.sigma_col, table.sigma_ohm.as_mut()) {
            let v = num(col)?;
            if v <= 0.0 {
                return Err(SweepError::at(
                    ln,
                    format!("sigma_ohm {v} must be positive"),
                ));
            }
            s.push(v);
        }
        table.frequency_hz.push(f);
        table.impedance_ohm.push(z);
        table.line.push(ln);
        Ok(())
    }
}

/// Refuses a column named twice, one in another unit than the SI one, and an unknown one.
fn check_column_names(header_line: usize, names: &[String]) -> Result<(), SweepError> {
    for (i, n) in names.iter().enumerate() {
        if names[..i].contains(n) {
            return Err(SweepError::at(
                header_line,
                format!("column '{n}' appears twice"),
            ));
        }
        match n.as_str() {
            "frequency_hz" | "z_real_ohm" | "z_imag_ohm" | "z_mag_ohm" | "z_phase_deg"
            | "sigma_ohm" => {}
            other if is_other_unit(other) => {
                return Err(SweepError::at(
                    header_line,
                    format!(
                        "mixed units: column '{other}' is not in the SI unit henrybook reads; {EXPECTED}"
                    ),
                ));
            }
            other => {
                return Err(SweepError::at(
                    header_line,
                    format!("unknown column '{other}'; {EXPECTED}"),
                ));
            }
        }
    }
    Ok(())
}

/// Reads the CSV into a sweep. The data are the DUT impedance; when the options state an S-method the
/// uncertainty uses that method's sensitivity, otherwise the relative floor only. Repeated frequencies
/// are merged and a 0 Hz row becomes the DC reading ([`super::assemble`]).
pub fn read_csv(text: &str, options: &ReadOptions) -> Result<Sweep, SweepError> {
    let table = parse_csv(text)?;
    let noise = options.noise_model()?;
    let z0 = options.checked_z0()?.unwrap_or(50.0);
    let method = options.method.unwrap_or(Method::Direct);
    let rows = (0..table.frequency_hz.len())
        .map(|k| {
            let z = table.impedance_ohm[k];
            Row {
                frequency_hz: table.frequency_hz[k],
                impedance_ohm: z,
                sigma_ohm: match &table.sigma_ohm {
                    Some(s) => s[k],
                    None => noise.sigma_from_z(method, z, z0),
                },
                line: table.line[k],
            }
        })
        .collect();
    assemble(rows, method, z0)
}

fn unquote(s: &str) -> &str {
    let s = s.trim();
    s.strip_prefix('"')
        .and_then(|s| s.strip_suffix('"'))
        .unwrap_or(s)
        .trim()
}

/// A column that names one of ours in another unit, e.g. `frequency_mhz` or `z_real_mohm`.
fn is_other_unit(name: &str) -> bool {
    [
        "frequency_",
        "z_real_",
        "z_imag_",
        "z_mag_",
        "z_phase_",
        "sigma_",
    ]
    .iter()
    .any(|p| name.starts_with(p))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rows(header: &str, n: usize) -> String {
        let mut s = format!("{header}\n");
        for k in 0..n {
            s.push_str(&format!(
                "{},{},{}\n",
                1000.0 * (k + 1) as f64,
                0.1,
                0.2 * k as f64
            ));
        }
        s
    }

    #[test]
    fn both_header_styles_give_the_same_impedance() {
        let a = parse_csv("frequency_hz,z_real_ohm,z_imag_ohm\n10,3,4\n").unwrap();
        let b =
            parse_csv("# exported\nfrequency_hz,z_mag_ohm,z_phase_deg\n10,5,53.13010235415598\n")
                .unwrap();
        assert!((a.impedance_ohm[0] - b.impedance_ohm[0]).norm() < 1e-12);
        assert_eq!(b.line, vec![3]);
        // A phase written from 0 to 360°: 306.87° is −53.13°, and ±360° itself is taken.
        let c =
            parse_csv("frequency_hz,z_mag_ohm,z_phase_deg\n10,5,306.86989764584402\n20,1,-360\n")
                .unwrap();
        assert!((c.impedance_ohm[0] - Complex64::new(3.0, -4.0)).norm() < 1e-12);
        assert!((c.impedance_ohm[1] - Complex64::new(1.0, 0.0)).norm() < 1e-12);
    }

    #[test]
    fn columns_may_be_reordered_quoted_and_semicolon_separated() {
        let t = parse_csv("\"z_imag_ohm\";\"frequency_hz\";\"z_real_ohm\"\n4;10;3\n").unwrap();
        assert_eq!(t.frequency_hz, vec![10.0]);
        assert_eq!(t.impedance_ohm[0], Complex64::new(3.0, 4.0));
    }

    #[test]
    fn read_csv_takes_a_0_hz_row_as_the_dc_reading_and_uses_the_relative_floor() {
        let mut text = rows("frequency_hz,z_real_ohm,z_imag_ohm", 25);
        text = text.replacen("1000,", "0,", 1);
        let sweep = read_csv(&text, &ReadOptions::default()).unwrap();
        assert_eq!(sweep.frequency_hz.len(), 24);
        assert_eq!(sweep.method, Method::Direct);
        let z = sweep.impedance_ohm[3];
        assert!((sweep.sigma_ohm[3] - 0.002 * z.norm()).abs() < 1e-9);
        let dc = sweep.dc_reading.unwrap();
        assert_eq!((dc.resistance_ohm, dc.line), (0.1, 2));
        assert!((dc.sigma_ohm - 0.002 * 0.1).abs() < 1e-12, "{dc:?}");
        // A 0 Hz row with reactance is no resistance reading.
        let text = text.replacen("0,0.1,0\n", "0,0.1,0.5\n", 1);
        let sweep = read_csv(&text, &ReadOptions::default()).unwrap();
        assert_eq!(sweep.dc_reading, None);
        assert!(
            sweep.warnings[0].contains("σ from zero"),
            "{:?}",
            sweep.warnings
        );
    }

    #[test]
    fn repeated_rows_are_merged_and_a_short_file_reads() {
        let text = "frequency_hz,z_real_ohm,z_imag_ohm,sigma_ohm\n1,1,1,0.1\n2,1,2,0.1\n2,1,2.2,0.1\n3,1,3,0.1\n";
        let sweep = read_csv(text, &ReadOptions::default()).unwrap();
        assert_eq!(sweep.frequency_hz, vec![1.0, 2.0, 3.0]);
        assert!((sweep.impedance_ohm[1] - Complex64::new(1.0, 2.1)).norm() < 1e-12);
        assert!((sweep.sigma_ohm[1] - (0.01f64 + 0.04).sqrt()).abs() < 1e-12);
        assert!(
            sweep.warnings[0].starts_with("lines 3 and 4 repeat 2 Hz"),
            "{:?}",
            sweep.warnings
        );
    }

    #[test]
    fn a_sigma_column_replaces_the_model() {
        let mut text = String::from("frequency_hz,z_real_ohm,z_imag_ohm,sigma_ohm\n");
        for k in 1..=20 {
            text.push_str(&format!("{k},1,1,0.5\n"));
        }
        let sweep = read_csv(&text, &ReadOptions::default()).unwrap();
        assert!(sweep.sigma_ohm.iter().all(|&s| s == 0.5));
    }

    #[test]
    fn errors_name_the_line() {
        let cases: &[(&str, Option<usize>, &str)] = &[
            (
                "frequency_hz,z_real_ohm,z_imag_ohm\n1,2\n",
                Some(2),
                "column count",
            ),
            (
                "frequency_hz,z_real_ohm,z_imag_ohm\n2,2,3\n1,2,3\n",
                Some(3),
                "increase",
            ),
            (
                "frequency_hz,z_real_ohm,z_imag_ohm\n1,NaN,3\n",
                Some(2),
                "not finite",
            ),
            (
                "frequency_hz,z_real_ohm,z_imag_ohm\n1,x,3\n",
                Some(2),
                "not a number",
            ),
            (
                "frequency_mhz,z_real_ohm,z_imag_ohm\n",
                Some(1),
                "mixed units",
            ),
            ("frequency_hz,z_real_ohm,z_phase_deg\n", Some(1), "mix"),
            (
                "frequency_hz,z_real_ohm,z_imag_ohm,colour\n",
                Some(1),
                "unknown column",
            ),
            ("frequency_hz,z_real_ohm,z_imag_ohm\n", Some(1), "no data"),
            (
                "frequency_hz,z_mag_ohm,z_phase_deg\n1,-2,3\n",
                Some(2),
                "negative",
            ),
            // A decimal point lost from 89.63°: refused, not wrapped onto the circle.
            (
                "frequency_hz,z_mag_ohm,z_phase_deg\n1,2,89.5\n2,3,8962.99\n",
                Some(3),
                "outside ±360°",
            ),
            (
                "frequency_hz,z_mag_ohm,z_phase_deg\n1,2,-360.5\n",
                Some(2),
                "outside ±360°",
            ),
            ("", None, "empty"),
        ];
        for (text, line, needle) in cases {
            let err = parse_csv(text).unwrap_err();
            assert_eq!(err.line, *line, "{text:?}: {err}");
            assert!(err.message.contains(needle), "{text:?}: {err}");
        }
        let err = read_csv(
            "frequency_hz,z_real_ohm,z_imag_ohm\n0,1,0\n",
            &ReadOptions::default(),
        )
        .unwrap_err();
        assert_eq!(err.line, Some(2), "{err}");
        assert!(err.message.contains("only a 0 Hz row"), "{err}");
    }
}
