//! From a file's rows (already turned into impedance by the method) to a [`Sweep`]: rows that repeat a
//! frequency are merged, a 0 Hz row becomes the DC reading or is left out, and every such step is
//! written into [`Sweep::warnings`] with the lines it concerns.
//!
//! Merging: a segmented sweep (several frequency ranges measured one after the other, each with its
//! own points) often ends one segment and starts the next on the same frequency. The merged point is
//! the plain mean of the readings; its σ is
//! σ = √( mean(σᵢ²) + spread² ), spread = |(max Re − min Re) + j(max Im − min Im)|
//! (for two readings, spread = |z₁ − z₂|). It is not divided by √n: the readings share the calibration
//! and fixture errors that the relative floor stands for, which averaging does not remove, and two
//! readings that disagree show an error their stated σ did not cover (common practice, no source:
//! a repeatability term taken from the observed spread).
//!
//! The 0 Hz row: some impedance analysers start a sweep at DC. Its real part is a DC resistance
//! reading with the σ the method gives there. It is left out (with a warning saying why) when it is
//! not a plausible resistance: a non-finite impedance (an open), a negative real part, or an
//! imaginary part more than [`DC_MAX_IMAG_SIGMA`] σ from zero (at 0 Hz a resistor has no reactance).

use super::{DcReading, Method, Sweep, SweepError};
use num_complex::Complex64;

/// The largest |Im Z| at 0 Hz, in units of the row's σ, that still reads as a resistance (a 3σ
/// test: common practice, no source).
pub const DC_MAX_IMAG_SIGMA: f64 = 3.0;

/// How many merges are listed one by one; the rest are counted in one more warning, so a hostile
/// file of a million repeated pairs cannot grow the warnings without bound.
pub const LISTED_MERGES: usize = 10;

/// One row of a file: its frequency, the impedance the method gives, its σ and its 1-based line.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Row {
    pub frequency_hz: f64,
    pub impedance_ohm: Complex64,
    pub sigma_ohm: f64,
    pub line: usize,
}

/// Builds the sweep from rows in file order. The rows must have passed the grid check with repeats
/// allowed (finite, ≥ 0, never decreasing); every row above 0 Hz must have a finite impedance and a
/// positive σ (the readers check both and name the line).
pub fn assemble(rows: Vec<Row>, method: Method, z0_ohm: f64) -> Result<Sweep, SweepError> {
    let mut sweep = Sweep {
        frequency_hz: Vec::with_capacity(rows.len()),
        impedance_ohm: Vec::with_capacity(rows.len()),
        sigma_ohm: Vec::with_capacity(rows.len()),
        method,
        z0_ohm,
        dc_reading: None,
        warnings: Vec::new(),
    };
    let mut merges = 0usize;
    let mut unlisted_lines: Option<(usize, usize)> = None;
    let mut start = 0;
    while start < rows.len() {
        let f = rows[start].frequency_hz;
        let end = start
            + rows[start..]
                .iter()
                .take_while(|r| r.frequency_hz == f)
                .count();
        let group = &rows[start..end];
        start = end;
        let merged = merge(group);
        if group.len() > 1 && f > 0.0 {
            merges += 1;
            if merges <= LISTED_MERGES {
                sweep.warnings.push(format!(
                    "{} repeat {} Hz (a segment boundary): merged into one point, impedance \
                     averaged, σ {} Ω including their spread of {} Ω",
                    lines_text(group),
                    f,
                    g4(merged.sigma_ohm),
                    g4(spread(group))
                ));
            } else {
                let last = group[group.len() - 1].line;
                unlisted_lines = Some(match unlisted_lines {
                    None => (group[0].line, last),
                    Some((first, _)) => (first, last),
                });
            }
        }
        if f == 0.0 {
            let what = if group.len() > 1 {
                format!(
                    "{}: the 0 Hz reading (its rows averaged)",
                    lines_text(group)
                )
            } else {
                format!("line {}: the 0 Hz row", group[0].line)
            };
            match dc_reading(&merged, method) {
                Ok(dc) => {
                    sweep.warnings.push(format!(
                        "{what} is used as a DC resistance reading: {} Ω ± {} Ω (its real part); \
                         it is not a point of the sweep",
                        g4(dc.resistance_ohm),
                        g4(dc.sigma_ohm)
                    ));
                    sweep.dc_reading = Some(DcReading {
                        line: group[0].line,
                        ..dc
                    });
                }
                Err(why) => sweep.warnings.push(format!("{what} is left out: {why}")),
            }
            continue;
        }
        let z = merged.impedance_ohm;
        if !(z.re.is_finite() && z.im.is_finite()) {
            return Err(SweepError::at(
                group[0].line,
                format!(
                    "{} repeat {f} Hz and their mean impedance overflows",
                    lines_text(group)
                ),
            ));
        }
        sweep.frequency_hz.push(f);
        sweep.impedance_ohm.push(z);
        sweep.sigma_ohm.push(merged.sigma_ohm);
    }
    if let Some((first, last)) = unlisted_lines {
        sweep.warnings.push(format!(
            "{} more repeated frequencies between lines {first} and {last} were merged the same way",
            merges - LISTED_MERGES
        ));
    }
    if sweep.frequency_hz.is_empty() {
        return Err(match sweep.dc_reading {
            Some(dc) => SweepError::at(
                dc.line,
                "the file holds only a 0 Hz row: a sweep needs points above 0 Hz",
            ),
            None => SweepError::file("the file holds no data points above 0 Hz"),
        });
    }
    Ok(sweep)
}

/// The mean of a group of readings at one frequency, with the σ of the module docs.
fn merge(group: &[Row]) -> Row {
    if let [one] = group {
        return *one;
    }
    let n = group.len() as f64;
    // Each term divided first, so readings near f64::MAX do not overflow the sum.
    let mean: Complex64 = group.iter().map(|r| r.impedance_ohm / n).sum();
    let mean_var = group.iter().map(|r| r.sigma_ohm * r.sigma_ohm).sum::<f64>() / n;
    let s = spread(group);
    let sigma = (mean_var + s * s).sqrt();
    Row {
        frequency_hz: group[0].frequency_hz,
        impedance_ohm: mean,
        sigma_ohm: if sigma.is_finite() { sigma } else { f64::MAX },
        line: group[0].line,
    }
}

/// How far apart the readings of a group lie: the diagonal of their bounding box in the complex
/// plane (|z₁ − z₂| for two readings), in one pass.
fn spread(group: &[Row]) -> f64 {
    let (mut lo_re, mut hi_re) = (f64::INFINITY, f64::NEG_INFINITY);
    let (mut lo_im, mut hi_im) = (f64::INFINITY, f64::NEG_INFINITY);
    for r in group {
        let z = r.impedance_ohm;
        lo_re = lo_re.min(z.re);
        hi_re = hi_re.max(z.re);
        lo_im = lo_im.min(z.im);
        hi_im = hi_im.max(z.im);
    }
    (hi_re - lo_re).hypot(hi_im - lo_im)
}

/// The DC reading a (merged) 0 Hz row gives, or why it is not a plausible resistance.
fn dc_reading(row: &Row, method: Method) -> Result<DcReading, String> {
    let z = row.impedance_ohm;
    if !(z.re.is_finite() && z.im.is_finite()) {
        return Err(format!(
            "the {} formula gives no finite impedance there (the part looks like {})",
            method.as_str(),
            super::open_description(method)
        ));
    }
    if !(row.sigma_ohm.is_finite() && row.sigma_ohm > 0.0) {
        return Err(format!("its uncertainty {} Ω is not usable", row.sigma_ohm));
    }
    if z.re < 0.0 {
        return Err(format!(
            "its real part {} Ω is negative, which no resistance reads",
            g4(z.re)
        ));
    }
    let k = z.im.abs() / row.sigma_ohm;
    if k > DC_MAX_IMAG_SIGMA {
        return Err(format!(
            "its imaginary part {} Ω is {} σ from zero (σ {} Ω); a resistance at 0 Hz has none",
            g4(z.im),
            g4(k),
            g4(row.sigma_ohm)
        ));
    }
    Ok(DcReading {
        resistance_ohm: z.re,
        sigma_ohm: row.sigma_ohm,
        line: row.line,
    })
}

/// "lines 910 and 911" or "lines 910 to 914 (4 rows)".
fn lines_text(group: &[Row]) -> String {
    match group {
        [a, b] => format!("lines {} and {}", a.line, b.line),
        [a, .., b] => format!("lines {} to {} ({} rows)", a.line, b.line, group.len()),
        [a] => format!("line {}", a.line),
        [] => String::new(),
    }
}

/// Four significant digits, plain where that reads well, else with an exponent.
pub(crate) fn g4(x: f64) -> String {
    if x == 0.0 || !x.is_finite() {
        return format!("{x}");
    }
    let e = x.abs().log10().floor() as i32;
    if (-4..6).contains(&e) {
        let d = (3 - e).max(0) as usize;
        format!("{x:.d$}")
    } else {
        format!("{x:.3e}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(f: f64, re: f64, im: f64, sigma: f64, line: usize) -> Row {
        Row {
            frequency_hz: f,
            impedance_ohm: Complex64::new(re, im),
            sigma_ohm: sigma,
            line,
        }
    }

    #[test]
    fn two_readings_at_one_frequency_become_their_mean_with_the_spread_in_sigma() {
        let rows = vec![
            row(1e6, 1.0, 10.0, 0.01, 5),
            row(2e6, 1.0, 20.0, 0.01, 6),
            row(2e6, 1.3, 20.4, 0.02, 8),
            row(3e6, 1.0, 30.0, 0.01, 9),
        ];
        let s = assemble(rows, Method::Direct, 50.0).unwrap();
        assert_eq!(s.frequency_hz, vec![1e6, 2e6, 3e6]);
        assert!((s.impedance_ohm[1] - Complex64::new(1.15, 20.2)).norm() < 1e-12);
        // spread = |0.3 + j0.4| = 0.5; mean σ² = (1e-4 + 4e-4)/2.
        let want = (2.5e-4f64 + 0.25).sqrt();
        assert!((s.sigma_ohm[1] - want).abs() < 1e-12, "{}", s.sigma_ohm[1]);
        assert_eq!(s.warnings.len(), 1);
        let w = &s.warnings[0];
        assert!(
            w.contains("lines 6 and 8") && w.contains("2000000 Hz"),
            "{w}"
        );
        assert!(w.contains("0.5000 Ω"), "{w}");
        s.validate().unwrap();
    }

    #[test]
    fn readings_that_agree_keep_at_least_their_own_sigma() {
        let rows = vec![
            row(1e6, 1.0, 10.0, 0.01, 2),
            row(1e6, 1.0, 10.0, 0.01, 3),
            row(1e6, 1.0, 10.0, 0.01, 4),
        ];
        let s = assemble(rows, Method::Direct, 50.0).unwrap();
        assert_eq!(s.sigma_ohm, vec![0.01]);
        assert!(
            s.warnings[0].contains("lines 2 to 4 (3 rows)"),
            "{:?}",
            s.warnings
        );
    }

    #[test]
    fn merges_beyond_the_listed_ones_are_counted_in_one_warning() {
        let mut rows = Vec::new();
        for k in 0..(LISTED_MERGES + 5) {
            let f = (k + 1) as f64;
            rows.push(row(f, 1.0, f, 0.1, 2 * k + 1));
            rows.push(row(f, 1.0, f, 0.1, 2 * k + 2));
        }
        let s = assemble(rows, Method::Direct, 50.0).unwrap();
        assert_eq!(s.frequency_hz.len(), LISTED_MERGES + 5);
        assert_eq!(s.warnings.len(), LISTED_MERGES + 1);
        let last = s.warnings.last().unwrap();
        assert!(
            last.starts_with("5 more repeated frequencies between lines 21 and 30"),
            "{last}"
        );
    }

    #[test]
    fn a_0_hz_row_is_a_dc_reading_when_it_reads_as_a_resistance() {
        let rows = vec![
            row(0.0, 0.25, 0.001, 0.002, 3),
            row(1e3, 0.25, 0.1, 0.002, 4),
        ];
        let s = assemble(rows, Method::Direct, 50.0).unwrap();
        assert_eq!(
            s.dc_reading,
            Some(DcReading {
                resistance_ohm: 0.25,
                sigma_ohm: 0.002,
                line: 3
            })
        );
        assert_eq!(s.frequency_hz, vec![1e3]);
        assert!(
            s.warnings[0].starts_with("line 3: the 0 Hz row is used"),
            "{:?}",
            s.warnings
        );
    }

    #[test]
    fn a_0_hz_row_that_is_no_resistance_is_left_out_with_the_reason() {
        let cases = [
            (row(0.0, -0.1, 0.0, 0.01, 2), "negative"),
            (row(0.0, 0.1, 0.5, 0.01, 2), "50.00 σ from zero"),
            (row(0.0, f64::INFINITY, 0.0, 0.01, 2), "no finite impedance"),
            (row(0.0, f64::NAN, f64::NAN, 0.01, 2), "no finite impedance"),
        ];
        for (dc, needle) in cases {
            let s = assemble(
                vec![dc, row(1.0, 1.0, 1.0, 0.1, 3)],
                Method::Reflection,
                50.0,
            )
            .unwrap();
            assert_eq!(s.dc_reading, None);
            assert_eq!(s.warnings.len(), 1);
            let w = &s.warnings[0];
            assert!(w.starts_with("line 2: the 0 Hz row is left out"), "{w}");
            assert!(w.contains(needle), "{w}");
        }
    }

    #[test]
    fn repeated_0_hz_rows_are_one_dc_reading() {
        let rows = vec![
            row(0.0, 0.25, 0.0, 0.002, 3),
            row(0.0, 0.27, 0.0, 0.002, 4),
            row(1e3, 0.25, 0.1, 0.002, 5),
        ];
        let s = assemble(rows, Method::Direct, 50.0).unwrap();
        let dc = s.dc_reading.unwrap();
        assert!((dc.resistance_ohm - 0.26).abs() < 1e-12, "{dc:?}");
        assert!(
            (dc.sigma_ohm - (4e-6f64 + 4e-4).sqrt()).abs() < 1e-12,
            "{dc:?}"
        );
        assert_eq!(dc.line, 3);
        assert_eq!(s.warnings.len(), 1, "{:?}", s.warnings);
        assert!(
            s.warnings[0]
                .starts_with("lines 3 and 4: the 0 Hz reading (its rows averaged) is used"),
            "{:?}",
            s.warnings
        );
    }

    #[test]
    fn a_file_of_only_a_0_hz_row_is_no_sweep() {
        let err = assemble(vec![row(0.0, 1.0, 0.0, 0.1, 7)], Method::Direct, 50.0).unwrap_err();
        assert_eq!(err.line, Some(7));
        let err = assemble(vec![], Method::Direct, 50.0).unwrap_err();
        assert!(err.message.contains("no data points"), "{err}");
    }

    #[test]
    fn four_significant_digits() {
        assert_eq!(g4(0.02134567), "0.02135");
        assert_eq!(g4(55184016.0), "5.518e7");
        assert_eq!(g4(1.5), "1.500");
        assert_eq!(g4(-123.456), "-123.5");
        assert_eq!(g4(0.0), "0");
    }
}
