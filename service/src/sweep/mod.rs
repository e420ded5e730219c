//! Measurement files in, a [`Sweep`] out: frequency grid, DUT impedance and its per-point uncertainty.
//!
//! Everything here takes text or bytes and returns values; nothing opens a file.
//! - [`touchstone`]: Touchstone 1.x and 2.x, 1- and 2-port, S/Y/Z, RI/MA/DB, into a [`Network`].
//! - [`csv`]: henrybook's impedance CSV (`frequency_hz` + `z_real_ohm,z_imag_ohm` or
//!   `z_mag_ohm,z_phase_deg`).
//! - [`convert`]: S ↔ Z for each [`Method`], and the sensitivity ∂Z/∂S the uncertainty is built from.
//! - [`uncertainty`]: the per-point standard uncertainty model and its documented defaults.
//! - [`fixture`]: open/short compensation (the usual approximation and the exact L-shaped forms) and
//!   two-port open/short de-embedding.
//!
//! Conventions decided here (documented once, relied on everywhere):
//! - The readers refuse only what is not a valid file; every refusal names the line.
//! - Rows that repeat a frequency (a segmented sweep repeats its boundary frequency) are merged into
//!   one point and the sweep's [`Sweep::warnings`] say so; a frequency that goes backwards is an error
//!   ([`assemble`]).
//! - A 0 Hz row (some analysers start there) is a DC resistance reading, [`Sweep::dc_reading`], when
//!   its impedance is a plausible resistance; otherwise it is left out with a warning saying why. The
//!   models need f > 0, so it is never a point of the sweep. A negative frequency is an error.
//! - A 2-port file needs [`ReadOptions::method`]; henrybook never guesses between series-thru and
//!   shunt-thru. A 1-port S file without a method is a reflection measurement.
//! - Any number of points reads; a fit needs at least [`MIN_FIT_POINTS`], which the callers that fit
//!   check ([`Sweep::check_fittable`]).

pub mod assemble;
pub mod convert;
pub mod csv;
pub mod fixture;
pub mod touchstone;
pub mod uncertainty;

pub use touchstone::{
    DataFormat, Network, Parameter, TouchstoneVersion, TwoPortOrder, parse_touchstone,
    write_touchstone, write_touchstone_with_digits,
};
pub use uncertainty::NoiseModel;

use num_complex::Complex64;
use serde::{Deserialize, Serialize};

/// The fewest points a fit needs: below this a fit of even the simplest model is not trustworthy
/// (common practice, no source: several points per fitted parameter and per decade). The readers
/// accept shorter files; the callers that fit check this ([`Sweep::check_fittable`]).
pub const MIN_FIT_POINTS: usize = 20;

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

impl Method {
    /// The name used on the command line, in the API and in the manifest.
    pub fn as_str(self) -> &'static str {
        match self {
            Method::Reflection => "reflection",
            Method::SeriesThru => "series-thru",
            Method::ShuntThru => "shunt-thru",
            Method::Direct => "direct",
        }
    }
}

impl std::str::FromStr for Method {
    type Err = SweepError;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        match s.trim().to_ascii_lowercase().as_str() {
            "reflection" => Ok(Method::Reflection),
            "series-thru" => Ok(Method::SeriesThru),
            "shunt-thru" => Ok(Method::ShuntThru),
            "direct" => Ok(Method::Direct),
            other => Err(SweepError::file(format!(
                "unknown measurement method '{other}': expected reflection, series-thru, shunt-thru or direct"
            ))),
        }
    }
}

/// A measured impedance sweep of one part, on a strictly increasing, finite frequency grid above 0 Hz.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Sweep {
    pub frequency_hz: Vec<f64>,
    pub impedance_ohm: Vec<Complex64>,
    /// Standard uncertainty of each impedance point, in ohm, taken as circular in the complex plane
    /// (the same σ applies to the real and the imaginary part).
    pub sigma_ohm: Vec<f64>,
    pub method: Method,
    pub z0_ohm: f64,
    /// The DC resistance a 0 Hz row of the file gave, when it had a plausible one.
    #[serde(default)]
    pub dc_reading: Option<DcReading>,
    /// What the reader did that the user should know: merged repeated frequencies, a 0 Hz row used
    /// or left out. Each names the lines it concerns.
    #[serde(default)]
    pub warnings: Vec<String>,
}

/// A DC resistance read off a file's 0 Hz row: the real part of its impedance, with the uncertainty
/// the method gives at that point.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct DcReading {
    pub resistance_ohm: f64,
    pub sigma_ohm: f64,
    /// The 1-based file line of the 0 Hz row (the first one, when several were merged).
    pub line: usize,
}

impl Sweep {
    /// Checks a sweep that did not come from the readers (e.g. deserialised): equal lengths, at least
    /// one point, a finite strictly increasing grid above 0 Hz, finite impedances, positive finite
    /// uncertainties, and a finite non-negative DC reading with a positive σ. The error's `line` is
    /// the 1-based point number.
    pub fn validate(&self) -> Result<(), SweepError> {
        let n = self.frequency_hz.len();
        if self.impedance_ohm.len() != n || self.sigma_ohm.len() != n {
            return Err(SweepError::file(format!(
                "the sweep has {n} frequencies, {} impedances and {} uncertainties",
                self.impedance_ohm.len(),
                self.sigma_ohm.len()
            )));
        }
        if n == 0 {
            return Err(SweepError::file("the sweep has no points"));
        }
        let points: Vec<usize> = (1..=n).collect();
        check_grid(&self.frequency_hz, &points, Repeats::Refuse)?;
        for k in 0..n {
            let (f, z, s) = (
                self.frequency_hz[k],
                self.impedance_ohm[k],
                self.sigma_ohm[k],
            );
            if f <= 0.0 {
                return Err(SweepError::at(
                    k + 1,
                    format!("frequency {f} Hz is not above 0"),
                ));
            }
            if !(z.re.is_finite() && z.im.is_finite()) {
                return Err(SweepError::at(
                    k + 1,
                    format!("impedance {z} is not finite"),
                ));
            }
            if !(s.is_finite() && s > 0.0) {
                return Err(SweepError::at(
                    k + 1,
                    format!("uncertainty {s} Ω must be finite and positive"),
                ));
            }
        }
        if let Some(dc) = &self.dc_reading
            && !(dc.resistance_ohm.is_finite()
                && dc.resistance_ohm >= 0.0
                && dc.sigma_ohm.is_finite()
                && dc.sigma_ohm > 0.0)
        {
            return Err(SweepError::file(format!(
                "the DC reading {} ± {} Ω must be a finite resistance ≥ 0 with a positive σ",
                dc.resistance_ohm, dc.sigma_ohm
            )));
        }
        if !(self.z0_ohm.is_finite() && self.z0_ohm > 0.0) {
            return Err(SweepError::file(format!(
                "z0_ohm {} must be finite and positive",
                self.z0_ohm
            )));
        }
        Ok(())
    }

    /// The check every caller that fits makes: at least [`MIN_FIT_POINTS`] points above 0 Hz. The
    /// readers accept shorter files (they convert; they do not fit).
    pub fn check_fittable(&self) -> Result<(), SweepError> {
        let n = self.frequency_hz.len();
        if n < MIN_FIT_POINTS {
            return Err(SweepError::file(format!(
                "the sweep has {n} points above 0 Hz; a fit needs at least {MIN_FIT_POINTS}"
            )));
        }
        Ok(())
    }
}

/// How to read a file: the measurement method (required for 2-port files) and overrides.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(default)]
pub struct ReadOptions {
    /// Required for 2-port files; for 1-port S files `None` means reflection.
    pub method: Option<Method>,
    /// Overrides the file's reference impedance in the S → Z formula (the Touchstone `R` value, or
    /// `[Reference]`, when absent; 50 Ω for CSV).
    pub z0_ohm: Option<f64>,
    /// Part of the S-parameter uncertainty proportional to |S| (linear, per real and imaginary part);
    /// [`uncertainty::DEFAULT_S_NOISE`] when absent.
    pub s_noise: Option<f64>,
    /// Part of the S-parameter uncertainty independent of |S| (linear);
    /// [`uncertainty::DEFAULT_S_FLOOR`] when absent.
    pub s_floor: Option<f64>,
    /// Relative floor of the impedance uncertainty (fraction of |Z|);
    /// [`uncertainty::DEFAULT_RELATIVE_FLOOR`] when absent.
    pub relative_floor: Option<f64>,
}

impl ReadOptions {
    /// The uncertainty model these options ask for, after checking the overrides.
    pub fn noise_model(&self) -> Result<NoiseModel, SweepError> {
        let mut noise = NoiseModel::default();
        if let Some(s) = self.s_noise {
            if !(s.is_finite() && s >= 0.0) {
                return Err(SweepError::file(format!(
                    "s_noise must be a finite number ≥ 0, got {s}"
                )));
            }
            noise.s_noise = s;
        }
        if let Some(s) = self.s_floor {
            if !(s.is_finite() && s >= 0.0) {
                return Err(SweepError::file(format!(
                    "s_floor must be a finite number ≥ 0, got {s}"
                )));
            }
            noise.s_floor = s;
        }
        if let Some(r) = self.relative_floor {
            if !(r.is_finite() && r >= 0.0) {
                return Err(SweepError::file(format!(
                    "relative_floor must be a finite number ≥ 0, got {r}"
                )));
            }
            noise.relative_floor = r;
        }
        Ok(noise)
    }

    fn checked_z0(&self) -> Result<Option<f64>, SweepError> {
        match self.z0_ohm {
            Some(z0) if !(z0.is_finite() && z0 > 0.0) => Err(SweepError::file(format!(
                "z0_ohm must be a finite positive number, got {z0}"
            ))),
            other => Ok(other),
        }
    }
}

/// A file that cannot be read: what is wrong and, when known, the 1-based line.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{}{message}", line.map(|l| format!("line {l}: ")).unwrap_or_default())]
pub struct SweepError {
    pub line: Option<usize>,
    pub message: String,
}

impl SweepError {
    /// An error at a 1-based line.
    pub fn at(line: usize, message: impl Into<String>) -> Self {
        SweepError {
            line: Some(line),
            message: message.into(),
        }
    }

    /// An error about the file (or the options) as a whole.
    pub fn file(message: impl Into<String>) -> Self {
        SweepError {
            line: None,
            message: message.into(),
        }
    }
}

/// What kind of file the name and content point to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FileKind {
    /// Touchstone, with the port count the extension states (`.s1p`, `.s2p`), if any.
    Touchstone(Option<usize>),
    Csv,
}

/// Decides the file kind from the extension (`.sNp`, `.ts`, `.csv`), else from the first line that is
/// neither blank nor a comment.
pub fn detect_kind(file_name: &str, text: &str) -> Result<FileKind, SweepError> {
    let lower = file_name.to_ascii_lowercase();
    if let Some(ext) = lower.rsplit_once('.').map(|(_, e)| e) {
        if ext == "csv" {
            return Ok(FileKind::Csv);
        }
        if ext == "ts" {
            return Ok(FileKind::Touchstone(None));
        }
        if let Some(n) = ext
            .strip_prefix('s')
            .and_then(|r| r.strip_suffix('p'))
            .and_then(|n| n.parse::<usize>().ok())
        {
            return Ok(FileKind::Touchstone(Some(n)));
        }
    }
    for (i, raw) in text.lines().enumerate() {
        let line = raw.trim().trim_start_matches('\u{feff}');
        if line.is_empty() || line.starts_with('!') {
            continue;
        }
        if line.starts_with('#') && !line.to_ascii_lowercase().contains("frequency_hz") {
            return Ok(FileKind::Touchstone(None));
        }
        if line.starts_with('[') {
            return Ok(FileKind::Touchstone(None));
        }
        if line.to_ascii_lowercase().contains("frequency_hz") {
            return Ok(FileKind::Csv);
        }
        return Err(SweepError::at(
            i + 1,
            format!(
                "cannot tell the file type of '{file_name}': expected a Touchstone file (.s1p, .s2p, .ts; \
                 an option line '# …' or '[Version]') or a CSV file with a 'frequency_hz' header"
            ),
        ));
    }
    Err(SweepError::file(format!("'{file_name}' is empty")))
}

/// Parses a Touchstone file into its network (frequencies, matrices, format), before any method is
/// applied and without the minimum-points rule: for fixture dummies, checks and tools.
pub fn read_network(file_name: &str, bytes: &[u8]) -> Result<Network, SweepError> {
    let text = decode(bytes);
    match detect_kind(file_name, &text)? {
        FileKind::Touchstone(ports) => parse_touchstone(&text, ports),
        FileKind::Csv => Err(SweepError::file(format!(
            "'{file_name}' is a CSV impedance file, not a Touchstone network"
        ))),
    }
}

/// Reads a Touchstone or CSV file (chosen by extension and content) into a sweep.
pub fn read_sweep(
    file_name: &str,
    bytes: &[u8],
    options: &ReadOptions,
) -> Result<Sweep, SweepError> {
    let text = decode(bytes);
    match detect_kind(file_name, &text)? {
        FileKind::Touchstone(ports) => {
            let network = parse_touchstone(&text, ports)?;
            sweep_from_network(&network, options)
        }
        FileKind::Csv => csv::read_csv(&text, options),
    }
}

/// Bytes to text. Instrument files are ASCII with the odd Latin-1 character in a comment; such bytes
/// become U+FFFD, and if one lands in a number the number's parse error names the line.
pub fn decode(bytes: &[u8]) -> String {
    let text = String::from_utf8_lossy(bytes);
    text.strip_prefix('\u{feff}').unwrap_or(&text).to_string()
}

/// Turns a parsed Touchstone network into the DUT impedance, by the method the options state; rows
/// that repeat a frequency are merged and a 0 Hz row becomes the DC reading ([`assemble`]).
pub fn sweep_from_network(network: &Network, options: &ReadOptions) -> Result<Sweep, SweepError> {
    let noise = options.noise_model()?;
    let z0 = match options.checked_z0()? {
        Some(z0) => z0,
        None => network.common_reference_ohm()?,
    };
    let rows = network.frequency_hz.len();
    let entries = match network.ports {
        1 => 1,
        2 => 4,
        n => {
            return Err(SweepError::file(format!(
                "{n}-port files are not supported: an inductor is measured as a 1-port or a 2-port"
            )));
        }
    };
    if network.data.len() != rows
        || network.line.len() != rows
        || network.data.iter().any(|m| m.len() != entries)
    {
        return Err(SweepError::file(format!(
            "the network's {rows} frequencies, {} lines and {} matrices of {entries} entries do not match",
            network.line.len(),
            network.data.len()
        )));
    }
    let mut points = Vec::with_capacity(rows);
    let method = match (network.ports, network.parameter) {
        (1, Parameter::S) => {
            let method = options.method.unwrap_or(Method::Reflection);
            if method != Method::Reflection {
                return Err(SweepError::file(format!(
                    "a 1-port S-parameter file is a reflection measurement; method '{}' needs {}",
                    method.as_str(),
                    if method == Method::Direct {
                        "impedance data (Z-parameters or CSV)"
                    } else {
                        "a 2-port file"
                    }
                )));
            }
            for m in &network.data {
                let s = m[0];
                let z = convert::z_from_s(method, s, z0);
                points.push((z, noise.sigma_from_s(method, s, z, z0)));
            }
            method
        }
        (1, Parameter::Z | Parameter::Y) => {
            let method = options.method.unwrap_or(Method::Direct);
            for m in &network.data {
                let z = if network.parameter == Parameter::Z {
                    m[0]
                } else {
                    m[0].inv()
                };
                points.push((z, noise.sigma_from_z(method, z, z0)));
            }
            method
        }
        (_, parameter) => {
            let method = match options.method {
                Some(m @ (Method::SeriesThru | Method::ShuntThru)) => m,
                Some(m) => {
                    return Err(SweepError::file(format!(
                        "method '{}' does not apply to a 2-port file: state series-thru or shunt-thru",
                        m.as_str()
                    )));
                }
                None => {
                    return Err(SweepError::file(
                        "a 2-port file needs the measurement method: series-thru (part between the \
                         ports) or shunt-thru (part from the line to ground); henrybook does not guess",
                    ));
                }
            };
            for m in &network.data {
                let m = convert::mat2(m);
                let s = match parameter {
                    Parameter::S => m,
                    Parameter::Z => convert::s_from_z_matrix(&m, z0),
                    Parameter::Y => convert::s_from_y_matrix(&m, z0),
                };
                let s21 = s[1][0];
                let z = convert::z_from_s(method, s21, z0);
                points.push((z, noise.sigma_from_s(method, s21, z, z0)));
            }
            method
        }
    };

    let mut rows = Vec::with_capacity(points.len());
    for (k, (z, sigma)) in points.into_iter().enumerate() {
        let (f, line) = (network.frequency_hz[k], network.line[k]);
        // At 0 Hz a non-finite value is a reading to leave out, not a broken file (`assemble` says so).
        if f != 0.0 && !(z.re.is_finite() && z.im.is_finite()) {
            return Err(SweepError::at(
                line,
                format!(
                    "the {} formula gives no finite impedance at {f} Hz (the part looks like {})",
                    method.as_str(),
                    open_description(method)
                ),
            ));
        }
        rows.push(assemble::Row {
            frequency_hz: f,
            impedance_ohm: z,
            sigma_ohm: sigma,
            line,
        });
    }
    assemble::assemble(rows, method, z0)
}

/// What an infinite impedance means in each method's raw data.
pub(crate) fn open_description(method: Method) -> &'static str {
    match method {
        Method::SeriesThru => "an open: S21 = 0",
        Method::ShuntThru => "an open: S21 = 1",
        Method::Reflection => "an open: S11 = 1",
        Method::Direct => "an open: Y = 0",
    }
}

/// Whether [`check_grid`] lets a frequency repeat the one before it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Repeats {
    /// Files: a segmented sweep repeats its boundary frequency; [`assemble`] merges the rows.
    Allow,
    /// A finished [`Sweep`]: strictly increasing.
    Refuse,
}

/// Checks a frequency grid: finite, not negative, increasing (equal neighbours only with
/// [`Repeats::Allow`]). `line[k]` is the file line (or point number) of point `k`.
pub(crate) fn check_grid(
    frequency_hz: &[f64],
    line: &[usize],
    repeats: Repeats,
) -> Result<(), SweepError> {
    for (k, (&f, &ln)) in frequency_hz.iter().zip(line).enumerate() {
        if !f.is_finite() {
            return Err(SweepError::at(ln, format!("frequency {f} is not finite")));
        }
        if f < 0.0 {
            return Err(SweepError::at(ln, format!("frequency {f} Hz is negative")));
        }
        if k > 0 {
            let (prev, prev_line) = (frequency_hz[k - 1], line[k - 1]);
            if f == prev && repeats == Repeats::Refuse {
                return Err(SweepError::at(
                    ln,
                    format!("duplicate frequency {f} Hz (also on line {prev_line})"),
                ));
            }
            if f < prev {
                return Err(SweepError::at(
                    ln,
                    format!(
                        "frequencies must increase: {f} Hz follows {prev} Hz on line {prev_line}"
                    ),
                ));
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn file_kind_follows_the_extension_then_the_content() {
        assert_eq!(
            detect_kind("a.S2P", "").unwrap(),
            FileKind::Touchstone(Some(2))
        );
        assert_eq!(detect_kind("a.ts", "").unwrap(), FileKind::Touchstone(None));
        assert_eq!(detect_kind("a.CSV", "").unwrap(), FileKind::Csv);
        assert_eq!(
            detect_kind("upload", "! c\n\n# MHz S RI\n").unwrap(),
            FileKind::Touchstone(None)
        );
        assert_eq!(
            detect_kind("upload", "frequency_hz,z_real_ohm,z_imag_ohm\n").unwrap(),
            FileKind::Csv
        );
        let err = detect_kind("upload", "\nhello\n").unwrap_err();
        assert_eq!(err.line, Some(2));
    }

    #[test]
    fn grid_errors_name_the_line() {
        check_grid(&[1.0, 2.0, 2.0], &[3, 4, 7], Repeats::Allow).unwrap();
        let err = check_grid(&[1.0, 2.0, 2.0], &[3, 4, 7], Repeats::Refuse).unwrap_err();
        assert_eq!(err.line, Some(7));
        assert!(err.message.contains("duplicate"), "{err}");
        for repeats in [Repeats::Allow, Repeats::Refuse] {
            let err = check_grid(&[1.0, 3.0, 2.0], &[3, 4, 5], repeats).unwrap_err();
            assert_eq!(err.line, Some(5));
            assert!(err.message.contains("increase"), "{err}");
            let err = check_grid(&[-1.0], &[9], repeats).unwrap_err();
            assert_eq!(err.to_string(), "line 9: frequency -1 Hz is negative");
        }
    }

    /// A synthetic 1 µH + 0.5 Ω part (invented), as Touchstone text in the given method.
    fn synthetic(method: Method, header: &str, n: usize) -> (String, Vec<Complex64>) {
        let mut text = format!("! synthetic\n{header}\n");
        let mut truth = Vec::new();
        for k in 0..n {
            let f = 1e5 * 1.2f64.powi(k as i32);
            let z = Complex64::new(0.5, 2.0 * std::f64::consts::PI * f * 1e-6);
            truth.push(z);
            let s = convert::s_from_z(method, z, 50.0);
            let o = Complex64::new(0.0, 0.0);
            match method {
                Method::Reflection => text.push_str(&format!("{f} {} {}\n", s.re, s.im)),
                _ => {
                    let s11 = o;
                    text.push_str(&format!(
                        "{f} {} {} {} {} {} {} {} {}\n",
                        s11.re, s11.im, s.re, s.im, s.re, s.im, s11.re, s11.im
                    ))
                }
            }
        }
        (text, truth)
    }

    #[test]
    fn read_sweep_applies_the_method_and_refuses_to_guess() {
        let (text, truth) = synthetic(Method::Reflection, "# Hz S RI R 50", 30);
        let sweep = read_sweep("a.s1p", text.as_bytes(), &ReadOptions::default()).unwrap();
        assert_eq!(sweep.method, Method::Reflection);
        for (z, t) in sweep.impedance_ohm.iter().zip(&truth) {
            assert!((z - t).norm() < 1e-9 * t.norm());
        }
        for method in [Method::SeriesThru, Method::ShuntThru] {
            let (text, truth) = synthetic(method, "# Hz S RI R 50", 30);
            let err = read_sweep("a.s2p", text.as_bytes(), &ReadOptions::default()).unwrap_err();
            assert!(
                err.message.contains("needs the measurement method"),
                "{err}"
            );
            let options = ReadOptions {
                method: Some(method),
                ..ReadOptions::default()
            };
            let sweep = read_sweep("a.s2p", text.as_bytes(), &options).unwrap();
            for (z, t) in sweep.impedance_ohm.iter().zip(&truth) {
                assert!((z - t).norm() < 1e-9 * t.norm(), "{method:?}");
            }
            assert!(sweep.sigma_ohm.iter().all(|s| s.is_finite() && *s > 0.0));
        }
        // A short file reads (converting is not fitting); the fit's minimum is the callers' check.
        let (text, _) = synthetic(Method::Reflection, "# Hz S RI R 50", 19);
        let sweep = read_sweep("a.s1p", text.as_bytes(), &ReadOptions::default()).unwrap();
        assert_eq!(sweep.frequency_hz.len(), 19);
        let err = sweep.check_fittable().unwrap_err();
        assert!(err.message.contains("at least 20"), "{err}");
        let (text, _) = synthetic(Method::Reflection, "# Hz S RI R 50", 20);
        let sweep = read_sweep("a.s1p", text.as_bytes(), &ReadOptions::default()).unwrap();
        sweep.check_fittable().unwrap();
        let one = read_sweep(
            "a.s1p",
            b"# Hz S RI\n1e3 0.5 0.5\n",
            &ReadOptions::default(),
        )
        .unwrap();
        assert_eq!(one.frequency_hz, vec![1e3]);
    }

    #[test]
    fn a_one_port_z_file_is_direct_and_an_open_is_an_error() {
        let mut text = String::from("# MHz Z RI R 50\n");
        for k in 1..=25 {
            text.push_str(&format!("{k} 0.02 {}\n", 0.1 * k as f64));
        }
        let sweep = read_sweep("z.s1p", text.as_bytes(), &ReadOptions::default()).unwrap();
        assert_eq!(sweep.method, Method::Direct);
        // Version 1 Z is normalised: 0.1 · 50 Ω.
        assert!((sweep.impedance_ohm[0] - Complex64::new(1.0, 5.0)).norm() < 1e-12);
        let open = "# MHz S RI\n1 1 0\n";
        let err = read_sweep("o.s1p", open.as_bytes(), &ReadOptions::default()).unwrap_err();
        assert_eq!(err.line, Some(2), "{err}");
    }

    #[test]
    fn a_0_hz_row_is_the_dc_reading_and_the_result_validates() {
        let (text, _) = synthetic(Method::Reflection, "# Hz S RI R 50", 25);
        // S11 = −0.99 at DC: Z = 50·0.01/1.99 = 0.251256… Ω, a plausible winding resistance.
        let text = text.replacen("# Hz S RI R 50\n", "# Hz S RI R 50\n0 -0.99 0\n", 1);
        let sweep = read_sweep("a.s1p", text.as_bytes(), &ReadOptions::default()).unwrap();
        assert_eq!(sweep.frequency_hz.len(), 25);
        assert_eq!(sweep.frequency_hz[0], 1e5);
        let dc = sweep.dc_reading.unwrap();
        assert!((dc.resistance_ohm - 0.5 / 1.99).abs() < 1e-12, "{dc:?}");
        assert_eq!(dc.line, 3);
        let noise = NoiseModel::default();
        let s = Complex64::new(-0.99, 0.0);
        let want = noise.sigma_from_s(
            Method::Reflection,
            s,
            convert::z_from_s(Method::Reflection, s, 50.0),
            50.0,
        );
        assert_eq!(dc.sigma_ohm, want);
        assert_eq!(sweep.warnings.len(), 1, "{:?}", sweep.warnings);
        assert!(sweep.warnings[0].contains("line 3"), "{:?}", sweep.warnings);
        sweep.validate().unwrap();
        let mut bad = sweep.clone();
        bad.sigma_ohm[4] = 0.0;
        assert_eq!(bad.validate().unwrap_err().line, Some(5));
        let mut bad = sweep.clone();
        bad.impedance_ohm.pop();
        assert!(bad.validate().is_err());
        let mut bad = sweep.clone();
        bad.dc_reading = Some(DcReading {
            resistance_ohm: -1.0,
            ..dc
        });
        assert!(bad.validate().is_err());
        let net = read_network("a.s1p", text.as_bytes()).unwrap();
        assert_eq!(net.frequency_hz.len(), 26);
        assert!(read_network("a.csv", b"frequency_hz,z_real_ohm,z_imag_ohm\n").is_err());

        // An open at DC (S11 = 1) is no resistance: left out, and the warning says why.
        let open = text.replacen("0 -0.99 0\n", "0 1 0\n", 1);
        let sweep = read_sweep("a.s1p", open.as_bytes(), &ReadOptions::default()).unwrap();
        assert_eq!(sweep.dc_reading, None);
        assert!(
            sweep.warnings[0].contains("left out"),
            "{:?}",
            sweep.warnings
        );
    }

    #[test]
    fn a_repeated_boundary_frequency_is_merged_and_a_step_back_is_an_error() {
        let (text, _) = synthetic(Method::Reflection, "# Hz S RI R 50", 25);
        let lines: Vec<&str> = text.lines().collect();
        // Line 12 repeated right after itself, a little different (a second segment's first point).
        let row: Vec<&str> = lines[11].split_whitespace().collect();
        let again = format!(
            "{} {} {}",
            row[0],
            row[1],
            row[2].parse::<f64>().unwrap() + 1e-3
        );
        let mut merged = lines.clone();
        merged.insert(12, &again);
        let sweep = read_sweep(
            "a.s1p",
            merged.join("\n").as_bytes(),
            &ReadOptions::default(),
        )
        .unwrap();
        assert_eq!(sweep.frequency_hz.len(), 25);
        assert_eq!(sweep.warnings.len(), 1);
        assert!(
            sweep.warnings[0].starts_with("lines 12 and 13 repeat"),
            "{:?}",
            sweep.warnings
        );
        sweep.validate().unwrap();

        let mut back = lines.clone();
        back.insert(12, lines[10]);
        let err =
            read_sweep("a.s1p", back.join("\n").as_bytes(), &ReadOptions::default()).unwrap_err();
        assert_eq!(err.line, Some(13));
        assert!(err.message.contains("must increase"), "{err}");
    }

    #[test]
    fn method_names_round_trip() {
        for m in [
            Method::Reflection,
            Method::SeriesThru,
            Method::ShuntThru,
            Method::Direct,
        ] {
            assert_eq!(m.as_str().parse::<Method>().unwrap(), m);
            assert_eq!(
                serde_json::to_string(&m).unwrap(),
                format!("\"{}\"", m.as_str())
            );
        }
        assert!("thru".parse::<Method>().is_err());
    }
}
