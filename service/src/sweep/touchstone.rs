//! Touchstone 1.x and 2.x (IBIS Open Forum, Touchstone File Format Specification 2.0, 2009), 1- and
//! 2-port, into a [`Network`]: frequencies in Hz and one n×n matrix per frequency in physical units.
//!
//! Read as the specification says: comments (`!` to the end of the line) anywhere; keywords, option
//! tokens and units case-insensitive; option line `# <unit> <parameter> <format> R <n>` with the
//! defaults GHz S MA R 50; version 1 two-port order N11 N21 N12 N22, version 2 as
//! `[Two-Port Data Order]` states; version 1 Z and Y data normalised by R, version 2 not; noise data
//! skipped (version 1: the block that starts with a frequency not above the last network frequency;
//! version 2: after `[Noise Data]`).
//!
//! Decisions beyond the specification:
//! - A second option line that agrees with the first is ignored, as the specification says. One that
//!   states other units, parameter, format or R is an error ("mixed units"): reading it either way
//!   would be a guess.
//! - A frequency's numbers may continue on the next lines (version 2 allows it), but must end at the
//!   end of a line; otherwise the column count is wrong and the error names the line.
//! - Only 1- and 2-port data; G and H parameters and mixed-mode files are refused with a clear error.
//!   `[Number of Ports]` is checked against 1 and 2 where it is read, before anything uses it.
//! - After `[Network Data]` only `[Noise Data]` and `[End]` may follow (from memory: the
//!   specification lists every other keyword before `[Network Data]`); any other keyword there is an
//!   error with its line, because it would change how the data already read are laid out.
//! - A frequency may repeat the one before it (segmented sweeps repeat their boundary frequency):
//!   [`super::sweep_from_network`] merges such rows. A frequency that goes backwards is an error.
//! - Nothing a file states sizes an allocation: counts are compared with the data, never reserved.

use super::{Repeats, SweepError, check_grid};
use num_complex::Complex64;
use serde::{Deserialize, Serialize};

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum TouchstoneVersion {
    V1,
    V2,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum Parameter {
    S,
    Y,
    Z,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum DataFormat {
    /// `RI`: real, imaginary.
    RealImaginary,
    /// `MA`: magnitude, angle in degrees.
    MagnitudeAngle,
    /// `DB`: 20·log10 magnitude, angle in degrees.
    DecibelAngle,
}

/// Order of the two off-diagonal entries of a 2-port line.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum TwoPortOrder {
    /// N11 N21 N12 N22: version 1, and version 2 with `21_12`.
    N21First,
    /// N11 N12 N21 N22: version 2 with `12_21`.
    N12First,
}

/// A parsed Touchstone file, before any measurement method is applied.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Network {
    pub version: TouchstoneVersion,
    pub ports: usize,
    pub parameter: Parameter,
    pub format: DataFormat,
    /// Hz per unit of the file's frequency column (1, 1e3, 1e6 or 1e9).
    pub frequency_unit_hz: f64,
    /// Reference resistance of each port: `[Reference]` in version 2, else R of the option line.
    pub reference_ohm: Vec<f64>,
    /// `None` for 1-port files.
    pub two_port_order: Option<TwoPortOrder>,
    /// Never decreasing; a segmented sweep may repeat a boundary frequency.
    pub frequency_hz: Vec<f64>,
    /// Per frequency the n×n matrix, row-major (`data[k][i·n + j]` is N(i+1)(j+1)), in physical units:
    /// S unitless, Z in ohm, Y in siemens (version 1 Z and Y already multiplied out of R).
    pub data: Vec<Vec<Complex64>>,
    /// The 1-based line on which each frequency's data starts.
    pub line: Vec<usize>,
}

impl Network {
    /// The single reference resistance of all ports; an error when the ports differ, because the
    /// thru formulas assume one Z0.
    pub fn common_reference_ohm(&self) -> Result<f64, SweepError> {
        let r0 = self.reference_ohm.first().copied().unwrap_or(50.0);
        if self.reference_ohm.iter().any(|&r| r != r0) {
            return Err(SweepError::file(format!(
                "the ports have different reference resistances {:?} Ω; henrybook needs one Z0",
                self.reference_ohm
            )));
        }
        Ok(r0)
    }
}

#[derive(Debug, Clone, Copy, PartialEq)]
struct OptionLine {
    unit_hz: f64,
    parameter: Parameter,
    format: DataFormat,
    r_ohm: f64,
    /// A second reference resistance (`R 50 50`: one per port, as some writers of 2-port files do).
    r_port2_ohm: Option<f64>,
    line: usize,
}

impl OptionLine {
    fn same_as(&self, o: &OptionLine) -> bool {
        self.unit_hz == o.unit_hz
            && self.parameter == o.parameter
            && self.format == o.format
            && self.r_ohm == o.r_ohm
            && self.r_port2_ohm == o.r_port2_ohm
    }
}

fn parse_option_line(rest: &str, line: usize) -> Result<OptionLine, SweepError> {
    let mut opt = OptionLine {
        unit_hz: 1e9,
        parameter: Parameter::S,
        format: DataFormat::MagnitudeAngle,
        r_ohm: 50.0,
        r_port2_ohm: None,
        line,
    };
    let mut tokens = rest.split_whitespace().peekable();
    while let Some(tok) = tokens.next() {
        match tok.to_ascii_lowercase().as_str() {
            "hz" => opt.unit_hz = 1.0,
            "khz" => opt.unit_hz = 1e3,
            "mhz" => opt.unit_hz = 1e6,
            "ghz" => opt.unit_hz = 1e9,
            "s" => opt.parameter = Parameter::S,
            "y" => opt.parameter = Parameter::Y,
            "z" => opt.parameter = Parameter::Z,
            "g" | "h" => {
                return Err(SweepError::at(
                    line,
                    format!("{tok}-parameters are not supported: use S, Y or Z"),
                ));
            }
            "ri" => opt.format = DataFormat::RealImaginary,
            "ma" => opt.format = DataFormat::MagnitudeAngle,
            "db" => opt.format = DataFormat::DecibelAngle,
            "r" => {
                let v = tokens.next().ok_or_else(|| {
                    SweepError::at(line, "option R needs a reference resistance after it")
                })?;
                let r: f64 = v.parse().map_err(|_| {
                    SweepError::at(line, format!("reference resistance '{v}' is not a number"))
                })?;
                if !(r.is_finite() && r > 0.0) {
                    return Err(SweepError::at(
                        line,
                        format!("reference resistance {v} must be finite and positive"),
                    ));
                }
                opt.r_ohm = r;
                if let Some(r2) = tokens.peek().and_then(|t| t.parse::<f64>().ok()) {
                    tokens.next();
                    if !(r2.is_finite() && r2 > 0.0) {
                        return Err(SweepError::at(
                            line,
                            format!("reference resistance {r2} must be finite and positive"),
                        ));
                    }
                    opt.r_port2_ohm = Some(r2);
                }
            }
            _ => {
                return Err(SweepError::at(
                    line,
                    format!(
                        "unknown option '{tok}' on the option line: expected a unit (Hz, kHz, MHz, GHz), \
                         a parameter (S, Y, Z), a format (RI, MA, DB) or R <ohm>"
                    ),
                ));
            }
        }
    }
    Ok(opt)
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum MatrixFormat {
    Full,
    Lower,
    Upper,
}

#[derive(Debug, PartialEq)]
enum State {
    /// Version 1 body, or version 2 before `[Network Data]`.
    Header,
    NetworkData,
    /// Skipping noise data (to the end in version 1, to `[End]` in version 2).
    Noise,
    Information,
    End,
}

struct Record {
    start_line: usize,
    values: Vec<f64>,
}

/// Parses Touchstone text. `ports_hint` is the port count the file name states (`.s2p` → 2); version 2
/// files state their own, and a version 1 file without a hint is 1- or 2-port by its column count.
pub fn parse_touchstone(text: &str, ports_hint: Option<usize>) -> Result<Network, SweepError> {
    let mut reader = Reader::new(ports_hint);
    for (idx, raw) in text.split('\n').enumerate() {
        reader.line(idx + 1, raw)?;
    }
    reader.finish()
}

/// The reader's state between lines: what the header has said so far, where in the file it is, and
/// the data records read (the last one possibly still open across lines).
struct Reader {
    ports_hint: Option<usize>,
    version: TouchstoneVersion,
    option: Option<OptionLine>,
    ports: Option<usize>,
    ports_line: Option<usize>,
    order: Option<TwoPortOrder>,
    /// `[Number of Frequencies]` and its line.
    n_freq: Option<(usize, usize)>,
    reference: Vec<f64>,
    reference_line: Option<usize>,
    /// `[Reference]` may continue on the following lines.
    collecting_reference: bool,
    matrix: MatrixFormat,
    state: State,
    saw_content: bool,
    saw_network_data: bool,
    records: Vec<Record>,
    current: Option<Record>,
    last_line: usize,
}

impl Reader {
    fn new(ports_hint: Option<usize>) -> Reader {
        Reader {
            ports_hint,
            version: TouchstoneVersion::V1,
            option: None,
            ports: None,
            ports_line: None,
            order: None,
            n_freq: None,
            reference: Vec::new(),
            reference_line: None,
            collecting_reference: false,
            matrix: MatrixFormat::Full,
            state: State::Header,
            saw_content: false,
            saw_network_data: false,
            records: Vec::new(),
            current: None,
            last_line: 0,
        }
    }

    /// One line of the file, `ln` 1-based.
    fn line(&mut self, ln: usize, raw: &str) -> Result<(), SweepError> {
        self.last_line = ln;
        let body = raw.split('!').next().unwrap_or("").trim();
        if body.is_empty() {
            return Ok(());
        }
        let first_content = !self.saw_content;
        self.saw_content = true;
        if self.state == State::End {
            return Err(SweepError::at(ln, "content after [End]"));
        }
        if let Some(rest) = body.strip_prefix('[') {
            return self.keyword(ln, rest, first_content);
        }
        if self.state == State::Information || self.state == State::Noise {
            return Ok(());
        }
        if let Some(rest) = body.strip_prefix('#') {
            return self.option_line(ln, rest);
        }
        self.numbers(ln, body)
    }

    /// A line starting with `[` (`rest` is what follows it).
    fn keyword(&mut self, ln: usize, rest: &str, first_content: bool) -> Result<(), SweepError> {
        let (name, value) = match rest.split_once(']') {
            Some((n, v)) => (n, v.trim()),
            None => {
                return Err(SweepError::at(ln, "a keyword '[' has no closing ']'"));
            }
        };
        let key = name
            .split_whitespace()
            .collect::<Vec<_>>()
            .join(" ")
            .to_ascii_lowercase();
        if let Some(rec) = &self.current {
            return Err(incomplete(rec, expected_len(self.ports, self.matrix)));
        }
        if self.state == State::Information {
            if key == "end information" {
                self.state = State::Header;
            }
            return Ok(());
        }
        if self.saw_network_data
            && !(key == "end" || (key == "noise data" && self.state != State::Noise))
        {
            return Err(SweepError::at(
                ln,
                format!(
                    "keyword [{name}] after [Network Data]: only [Noise Data] and [End] may \
                     follow the network data"
                ),
            ));
        }
        if key == "version" {
            return self.version_keyword(ln, value, first_content);
        }
        if self.version == TouchstoneVersion::V1 {
            return Err(SweepError::at(
                ln,
                format!(
                    "keyword [{name}] in a version 1 file (a version 2 file starts with [Version] 2.0)"
                ),
            ));
        }
        self.collecting_reference = false;
        self.header_keyword(ln, &key, name, value)
    }

    fn version_keyword(
        &mut self,
        ln: usize,
        value: &str,
        first_content: bool,
    ) -> Result<(), SweepError> {
        if !first_content {
            return Err(SweepError::at(
                ln,
                "[Version] must come before everything else except comments",
            ));
        }
        match value.trim() {
            v if v.starts_with("2.") => self.version = TouchstoneVersion::V2,
            v if v.starts_with("1.") => self.version = TouchstoneVersion::V1,
            v => {
                return Err(SweepError::at(
                    ln,
                    format!("unsupported Touchstone version '{v}': expected 1.x or 2.x"),
                ));
            }
        }
        Ok(())
    }

    /// A version 2 keyword other than `[Version]`: `key` normalised, `name` as written.
    fn header_keyword(
        &mut self,
        ln: usize,
        key: &str,
        name: &str,
        value: &str,
    ) -> Result<(), SweepError> {
        match key {
            "number of ports" => self.number_of_ports(ln, value)?,
            "two-port data order" => {
                self.order = Some(match value.to_ascii_lowercase().as_str() {
                    "12_21" => TwoPortOrder::N12First,
                    "21_12" => TwoPortOrder::N21First,
                    _ => {
                        return Err(SweepError::at(
                            ln,
                            format!("[Two-Port Data Order] '{value}': expected 12_21 or 21_12"),
                        ));
                    }
                });
            }
            "number of frequencies" => {
                let n: usize = value.parse().map_err(|_| {
                    SweepError::at(
                        ln,
                        format!("[Number of Frequencies] '{value}' is not a whole number"),
                    )
                })?;
                self.n_freq = Some((n, ln));
            }
            "number of noise frequencies" => {}
            "reference" => {
                self.reference.clear();
                push_reference(&mut self.reference, value, ln)?;
                self.reference_line = Some(ln);
                self.collecting_reference = true;
            }
            "matrix format" => {
                self.matrix = match value.to_ascii_lowercase().as_str() {
                    "full" => MatrixFormat::Full,
                    "lower" => MatrixFormat::Lower,
                    "upper" => MatrixFormat::Upper,
                    _ => {
                        return Err(SweepError::at(
                            ln,
                            format!("[Matrix Format] '{value}': expected Full, Lower or Upper"),
                        ));
                    }
                };
            }
            "mixed-mode order" => {
                return Err(SweepError::at(
                    ln,
                    "mixed-mode (differential) data are not supported",
                ));
            }
            "begin information" => self.state = State::Information,
            "network data" => self.network_data(ln)?,
            "noise data" => {
                if !self.saw_network_data {
                    return Err(SweepError::at(ln, "[Noise Data] before [Network Data]"));
                }
                self.state = State::Noise;
            }
            "end" => self.state = State::End,
            _ => {
                return Err(SweepError::at(ln, format!("unknown keyword [{name}]")));
            }
        }
        Ok(())
    }

    fn number_of_ports(&mut self, ln: usize, value: &str) -> Result<(), SweepError> {
        if let Some(first) = self.ports_line {
            return Err(SweepError::at(
                ln,
                format!("[Number of Ports] appears twice (first on line {first})"),
            ));
        }
        let n: usize = value.parse().map_err(|_| {
            SweepError::at(
                ln,
                format!("[Number of Ports] '{value}' is not a whole number"),
            )
        })?;
        if n == 0 {
            return Err(SweepError::at(ln, "[Number of Ports] must be at least 1"));
        }
        if n > 2 {
            return Err(SweepError::at(
                ln,
                format!(
                    "{n}-port files are not supported: an inductor is measured as a \
                     1-port or a 2-port"
                ),
            ));
        }
        self.ports = Some(n);
        self.ports_line = Some(ln);
        Ok(())
    }

    /// `[Network Data]`: everything the data need must have been stated.
    fn network_data(&mut self, ln: usize) -> Result<(), SweepError> {
        if self.option.is_none() {
            return Err(SweepError::at(
                ln,
                "[Network Data] before the option line ('# <unit> <parameter> <format> R <ohm>')",
            ));
        }
        let n = self
            .ports
            .ok_or_else(|| SweepError::at(ln, "[Network Data] before [Number of Ports]"))?;
        if self.n_freq.is_none() {
            return Err(SweepError::at(
                ln,
                "[Network Data] before [Number of Frequencies]",
            ));
        }
        if n == 2 && self.order.is_none() {
            return Err(SweepError::at(
                ln,
                "a 2-port version 2 file needs [Two-Port Data Order] before [Network Data]",
            ));
        }
        self.state = State::NetworkData;
        self.saw_network_data = true;
        Ok(())
    }

    /// A line starting with `#` (`rest` is what follows it).
    fn option_line(&mut self, ln: usize, rest: &str) -> Result<(), SweepError> {
        let opt = parse_option_line(rest, ln)?;
        match &self.option {
            None => self.option = Some(opt),
            Some(first) if first.same_as(&opt) => {}
            Some(first) => {
                return Err(SweepError::at(
                    ln,
                    format!(
                        "mixed units: this option line disagrees with the one on line {}; \
                         the file would read differently depending on which one is meant",
                        first.line
                    ),
                ));
            }
        }
        Ok(())
    }

    /// A line of numbers: reference continuation, network data, or noise data.
    fn numbers(&mut self, ln: usize, body: &str) -> Result<(), SweepError> {
        if self.collecting_reference {
            if self.reference.len() < self.ports.unwrap_or(1) && self.state == State::Header {
                return push_reference(&mut self.reference, body, ln);
            }
            self.collecting_reference = false;
        }
        if self.version == TouchstoneVersion::V2 && self.state != State::NetworkData {
            return Err(SweepError::at(
                ln,
                "numbers before [Network Data] in a version 2 file",
            ));
        }
        let opt = self.option.ok_or_else(|| {
            SweepError::at(
                ln,
                "data before the option line ('# <unit> <parameter> <format> R <ohm>')",
            )
        })?;
        let values = parse_numbers(body, ln)?;
        if self.current.is_none() && !self.open_record(ln, &values, &opt)? {
            return Ok(());
        }
        let ports = self.ports;
        let want = expected_len(ports, self.matrix);
        let rec = self.current.as_mut().expect("a record is open");
        rec.values.extend_from_slice(&values);
        if rec.values.len() > want {
            return Err(SweepError::at(
                ln,
                format!(
                    "wrong column count: a {}-port frequency has {want} numbers (frequency and {} pairs), \
                     this one has {}{}",
                    ports.unwrap_or(1),
                    (want - 1) / 2,
                    rec.values.len(),
                    if rec.start_line == ln {
                        String::new()
                    } else {
                        format!(" counting from line {}", rec.start_line)
                    }
                ),
            ));
        }
        if rec.values.len() == want {
            self.records
                .push(self.current.take().expect("a record is open"));
        }
        Ok(())
    }

    /// The first line of a frequency's numbers `values`: opens its record, or returns false when the
    /// line starts a version 1 noise block instead (which is then skipped to the end).
    fn open_record(
        &mut self,
        ln: usize,
        values: &[f64],
        opt: &OptionLine,
    ) -> Result<bool, SweepError> {
        // Version 1 2-port noise block: a 5-number line whose frequency is not above the last.
        if self.version == TouchstoneVersion::V1
            && self.ports.or(self.ports_hint) == Some(2)
            && values.len() == 5
            && let (Some(&f), Some(&last)) = (
                values.first(),
                self.records.last().and_then(|r| r.values.first()),
            )
            && f * opt.unit_hz <= last * opt.unit_hz
        {
            self.state = State::Noise;
            return Ok(false);
        }
        if self.version == TouchstoneVersion::V2
            && let Some((n, _)) = self.n_freq
            && self.records.len() >= n
        {
            return Err(SweepError::at(
                ln,
                format!("more frequencies than [Number of Frequencies] = {n}"),
            ));
        }
        if self.ports.is_none() {
            self.ports = Some(match self.ports_hint {
                Some(n) => n,
                None => match values.len() {
                    3 => 1,
                    9 => 2,
                    c => {
                        return Err(SweepError::at(
                            ln,
                            format!(
                                "{c} numbers on the first data line: a 1-port line has 3 \
                                 (frequency and one pair), a 2-port line 9"
                            ),
                        ));
                    }
                },
            });
        }
        if !(1..=2).contains(&self.ports.unwrap_or(1)) {
            return Err(SweepError::at(
                ln,
                format!(
                    "{}-port data are not supported: an inductor is measured as a 1-port or a 2-port",
                    self.ports.unwrap_or(0)
                ),
            ));
        }
        self.current = Some(Record {
            start_line: ln,
            values: Vec::new(),
        });
        Ok(true)
    }

    /// After the last line: the checks that need the whole file, then the network.
    fn finish(mut self) -> Result<Network, SweepError> {
        if let Some(rec) = &self.current {
            return Err(incomplete(rec, expected_len(self.ports, self.matrix)));
        }
        if self.state == State::Information {
            return Err(SweepError::at(
                self.last_line,
                "[Begin Information] without [End Information]",
            ));
        }
        let opt = self.option.ok_or_else(|| {
            SweepError::file(
                "no option line ('# <unit> <parameter> <format> R <ohm>'): not a Touchstone file",
            )
        })?;
        if self.version == TouchstoneVersion::V2 {
            if !self.saw_network_data {
                return Err(SweepError::file("a version 2 file needs [Network Data]"));
            }
            if let Some((n, line)) = self.n_freq
                && self.records.len() != n
            {
                return Err(SweepError::at(
                    line,
                    format!(
                        "[Number of Frequencies] says {n} but the file holds {}",
                        self.records.len()
                    ),
                ));
            }
        }
        if self.records.is_empty() {
            return Err(SweepError::file("the file holds no data points"));
        }
        let n = self.ports.unwrap_or(1);
        if !(1..=2).contains(&n) {
            return Err(SweepError::file(format!(
                "{n}-port files are not supported: an inductor is measured as a 1-port or a 2-port"
            )));
        }
        self.settle_reference(n, &opt)?;
        let order = if n == 2 {
            Some(self.order.unwrap_or(TwoPortOrder::N21First))
        } else {
            None
        };
        let records = std::mem::take(&mut self.records);
        let mut net = Network {
            version: self.version,
            ports: n,
            parameter: opt.parameter,
            format: opt.format,
            frequency_unit_hz: opt.unit_hz,
            reference_ohm: std::mem::take(&mut self.reference),
            two_port_order: order,
            frequency_hz: Vec::with_capacity(records.len()),
            data: Vec::with_capacity(records.len()),
            line: Vec::with_capacity(records.len()),
        };
        // Version 1 Z and Y are normalised by R (spec 2.0, "Option line"); version 2 data are not.
        let denorm = match (self.version, opt.parameter) {
            (TouchstoneVersion::V1, Parameter::Z) => opt.r_ohm,
            (TouchstoneVersion::V1, Parameter::Y) => 1.0 / opt.r_ohm,
            _ => 1.0,
        };
        for rec in records {
            let f = rec.values.first().copied().unwrap_or(f64::NAN) * opt.unit_hz;
            let m = matrix_of(&rec, n, self.matrix, order, opt.format, denorm)?;
            net.frequency_hz.push(f);
            net.data.push(m);
            net.line.push(rec.start_line);
        }
        check_grid(&net.frequency_hz, &net.line, Repeats::Allow)?;
        Ok(net)
    }

    /// The ports' reference resistances: version 2's `[Reference]` when given (one per port), else
    /// the option line's R (one, or one per port of a 2-port file).
    fn settle_reference(&mut self, n: usize, opt: &OptionLine) -> Result<(), SweepError> {
        if self.version == TouchstoneVersion::V2 && !self.reference.is_empty() {
            if self.reference.len() != n {
                return Err(SweepError::at(
                    self.reference_line.unwrap_or(self.last_line),
                    format!(
                        "[Reference] gives {} values for {n} ports",
                        self.reference.len()
                    ),
                ));
            }
        } else {
            self.reference = match (n, opt.r_port2_ohm) {
                (2, Some(r2)) => vec![opt.r_ohm, r2],
                (_, Some(_)) => {
                    return Err(SweepError::at(
                        opt.line,
                        format!(
                            "the option line gives two reference resistances for a {n}-port file"
                        ),
                    ));
                }
                _ => vec![opt.r_ohm; n],
            };
        }
        if self.version == TouchstoneVersion::V1
            && opt.parameter != Parameter::S
            && self.reference.iter().any(|&r| r != opt.r_ohm)
        {
            return Err(SweepError::at(
                opt.line,
                "version 1 Z or Y data normalised by different resistances per port are not supported",
            ));
        }
        Ok(())
    }
}

/// One frequency's record as its n×n matrix (row-major) in physical units.
fn matrix_of(
    rec: &Record,
    n: usize,
    matrix: MatrixFormat,
    order: Option<TwoPortOrder>,
    format: DataFormat,
    denorm: f64,
) -> Result<Vec<Complex64>, SweepError> {
    let want = expected_len(Some(n), matrix);
    let wrong_count = || {
        SweepError::at(
            rec.start_line,
            format!(
                "wrong column count: a {n}-port frequency needs {want} numbers, this one has {}",
                rec.values.len()
            ),
        )
    };
    let Some((_, numbers)) = rec.values.split_first() else {
        return Err(wrong_count());
    };
    if numbers.len() % 2 != 0 {
        return Err(wrong_count());
    }
    let pairs: Vec<Complex64> = numbers
        .chunks_exact(2)
        .map(|p| to_complex(format, p[0], p[1]) * denorm)
        .collect();
    if let Some(bad) = pairs
        .iter()
        .find(|c| !(c.re.is_finite() && c.im.is_finite()))
    {
        return Err(SweepError::at(
            rec.start_line,
            format!("value {bad} overflows (a dB magnitude too large?)"),
        ));
    }
    match (n, matrix, pairs.as_slice()) {
        (1, _, &[a]) => Ok(vec![a]),
        (2, MatrixFormat::Full, &[a, b, c, d]) => Ok(match order {
            Some(TwoPortOrder::N12First) => vec![a, b, c, d],
            _ => vec![a, c, b, d],
        }),
        // Lower lists N11 N21 N22, upper N11 N12 N22: either way the off-diagonal is shared.
        (2, MatrixFormat::Lower | MatrixFormat::Upper, &[a, b, c]) => Ok(vec![a, b, b, c]),
        _ => Err(wrong_count()),
    }
}

/// Writes a network as Touchstone text: version 1 (Z and Y normalised by R, two-port order N11 N21
/// N12 N22) or version 2 (values in ohm/siemens, the keywords, `[Two-Port Data Order]` as the network
/// states), in the network's unit, parameter and format. Numbers are written in the shortest form that
/// reads back to the same `f64`. `comments` become `!` lines at the top.
pub fn write_touchstone(net: &Network, comments: &[&str]) -> String {
    write_touchstone_with_digits(net, comments, None)
}

/// As [`write_touchstone`], with data values rounded to `significant_digits` (as instruments write
/// them); frequencies keep full precision.
pub fn write_touchstone_with_digits(
    net: &Network,
    comments: &[&str],
    significant_digits: Option<usize>,
) -> String {
    use std::fmt::Write;
    let mut out = String::new();
    for c in comments {
        for line in c.lines() {
            let _ = writeln!(out, "! {line}");
        }
    }
    let (unit, unit_hz) = [("kHz", 1e3), ("MHz", 1e6), ("GHz", 1e9)]
        .into_iter()
        .find(|&(_, u)| u == net.frequency_unit_hz)
        .unwrap_or(("Hz", 1.0));
    let parameter = match net.parameter {
        Parameter::S => "S",
        Parameter::Y => "Y",
        Parameter::Z => "Z",
    };
    let format = match net.format {
        DataFormat::RealImaginary => "RI",
        DataFormat::MagnitudeAngle => "MA",
        DataFormat::DecibelAngle => "DB",
    };
    let r = net.reference_ohm.first().copied().unwrap_or(50.0);
    let n = net.ports;
    let order = net.two_port_order.unwrap_or(TwoPortOrder::N21First);
    if net.version == TouchstoneVersion::V2 {
        let _ = writeln!(out, "[Version] 2.0");
        let _ = writeln!(out, "# {unit} {parameter} {format} R {r}");
        let _ = writeln!(out, "[Number of Ports] {n}");
        if n == 2 {
            let o = match order {
                TwoPortOrder::N12First => "12_21",
                TwoPortOrder::N21First => "21_12",
            };
            let _ = writeln!(out, "[Two-Port Data Order] {o}");
        }
        let _ = writeln!(out, "[Number of Frequencies] {}", net.frequency_hz.len());
        let refs: Vec<String> = net.reference_ohm.iter().map(|r| r.to_string()).collect();
        if !refs.is_empty() {
            let _ = writeln!(out, "[Reference] {}", refs.join(" "));
        }
        let _ = writeln!(out, "[Network Data]");
    } else {
        let _ = writeln!(out, "# {unit} {parameter} {format} R {r}");
    }
    let scale = match (net.version, net.parameter) {
        (TouchstoneVersion::V1, Parameter::Z) => 1.0 / r,
        (TouchstoneVersion::V1, Parameter::Y) => r,
        _ => 1.0,
    };
    for (f, m) in net.frequency_hz.iter().zip(&net.data) {
        let entries: Vec<Complex64> = if n == 2 && m.len() == 4 {
            match (net.version, order) {
                (TouchstoneVersion::V2, TwoPortOrder::N12First) => m.clone(),
                _ => vec![m[0], m[2], m[1], m[3]],
            }
        } else {
            m.clone()
        };
        out.push_str(&frequency_text(*f, unit_hz));
        for c in entries {
            let c = c * scale;
            let (a, b) = match net.format {
                DataFormat::RealImaginary => (c.re, c.im),
                DataFormat::MagnitudeAngle => (c.norm(), c.arg().to_degrees()),
                DataFormat::DecibelAngle => (20.0 * c.norm().log10(), c.arg().to_degrees()),
            };
            match significant_digits {
                Some(d) => {
                    let p = d.clamp(1, 17) - 1;
                    let _ = write!(out, " {a:.p$e} {b:.p$e}");
                }
                None => {
                    let _ = write!(out, " {a:e} {b:e}");
                }
            }
        }
        out.push('\n');
    }
    if net.version == TouchstoneVersion::V2 {
        out.push_str("[End]\n");
    }
    out
}

/// The shortest decimal of `f / unit_hz` that reads back (times the unit) to `f` within two ulps (the
/// product itself rounds, so exactly `f` is not always reachable).
fn frequency_text(f: f64, unit_hz: f64) -> String {
    let v = f / unit_hz;
    for p in 0..17 {
        let text = format!("{v:.p$e}");
        if text
            .parse::<f64>()
            .is_ok_and(|x| (x * unit_hz - f).abs() <= 2.0 * f64::EPSILON * f.abs())
        {
            return text;
        }
    }
    format!("{v:e}")
}

/// Numbers per frequency: the frequency and one pair per matrix entry. Saturating, so a port count
/// that slipped past the checks can never overflow (it then matches no line and is an error).
fn expected_len(ports: Option<usize>, matrix: MatrixFormat) -> usize {
    let n = ports.unwrap_or(1);
    let entries = match matrix {
        MatrixFormat::Full => n.saturating_mul(n),
        _ => n.saturating_mul(n.saturating_add(1)) / 2,
    };
    entries.saturating_mul(2).saturating_add(1)
}

fn incomplete(rec: &Record, want: usize) -> SweepError {
    SweepError::at(
        rec.start_line,
        format!(
            "wrong column count: this frequency has {} of the {want} numbers it needs",
            rec.values.len()
        ),
    )
}

fn push_reference(reference: &mut Vec<f64>, text: &str, ln: usize) -> Result<(), SweepError> {
    for tok in text.split_whitespace() {
        let r: f64 = tok.parse().map_err(|_| {
            SweepError::at(ln, format!("[Reference] value '{tok}' is not a number"))
        })?;
        if !(r.is_finite() && r > 0.0) {
            return Err(SweepError::at(
                ln,
                format!("[Reference] value {tok} must be finite and positive"),
            ));
        }
        reference.push(r);
    }
    Ok(())
}

fn parse_numbers(body: &str, ln: usize) -> Result<Vec<f64>, SweepError> {
    body.split_whitespace()
        .map(|tok| {
            let v: f64 = tok
                .parse()
                .map_err(|_| SweepError::at(ln, format!("'{tok}' is not a number")))?;
            if v.is_finite() {
                Ok(v)
            } else {
                Err(SweepError::at(ln, format!("value '{tok}' is not finite")))
            }
        })
        .collect()
}

fn to_complex(format: DataFormat, a: f64, b: f64) -> Complex64 {
    match format {
        DataFormat::RealImaginary => Complex64::new(a, b),
        DataFormat::MagnitudeAngle => Complex64::from_polar(a, b.to_radians()),
        DataFormat::DecibelAngle => Complex64::from_polar(10f64.powf(a / 20.0), b.to_radians()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn c(re: f64, im: f64) -> Complex64 {
        Complex64::new(re, im)
    }

    fn close(a: Complex64, b: Complex64) -> bool {
        (a - b).norm() < 1e-9 * (1.0 + b.norm())
    }

    #[test]
    fn version_1_one_port_with_defaults_and_comments() {
        let text =
            "! a comment\n# ghz s ma r 50 ! trailing comment\n1 0.5 90\n! between\n2 0.25 -90\n";
        let net = parse_touchstone(text, None).unwrap();
        assert_eq!(net.version, TouchstoneVersion::V1);
        assert_eq!(net.ports, 1);
        assert_eq!(net.frequency_hz, vec![1e9, 2e9]);
        assert!(close(net.data[0][0], c(0.0, 0.5)));
        assert!(close(net.data[1][0], c(0.0, -0.25)));
        assert_eq!(net.line, vec![3, 5]);
    }

    #[test]
    fn option_line_defaults_are_ghz_s_ma_50() {
        // Source: Touchstone File Format Specification 2.0 (IBIS Open Forum, 2009), option line
        // defaults: GHz, S, MA, R 50.
        let net = parse_touchstone("#\n1 1 0\n", Some(1)).unwrap();
        assert_eq!(net.frequency_unit_hz, 1e9);
        assert_eq!(net.parameter, Parameter::S);
        assert_eq!(net.format, DataFormat::MagnitudeAngle);
        assert_eq!(net.reference_ohm, vec![50.0]);
    }

    #[test]
    fn formats_ri_ma_db_agree() {
        let ri = parse_touchstone("# Hz S RI\n1 0.3 0.4\n", None).unwrap();
        let ma = parse_touchstone("# Hz S MA\n1 0.5 53.13010235415598\n", None).unwrap();
        let db = parse_touchstone(
            &format!("# Hz S DB\n1 {} 53.13010235415598\n", 20.0 * 0.5f64.log10()),
            None,
        )
        .unwrap();
        assert!(close(ma.data[0][0], ri.data[0][0]));
        assert!(close(db.data[0][0], ri.data[0][0]));
    }

    #[test]
    fn version_1_two_port_order_is_n11_n21_n12_n22() {
        // Source: Touchstone 2.0 specification (IBIS Open Forum, 2009): version 1 two-port data are
        // written N11 N21 N12 N22.
        let net = parse_touchstone("# MHz S RI\n1 11 0 21 0 12 0 22 0\n", Some(2)).unwrap();
        assert_eq!(
            net.data[0],
            vec![c(11.0, 0.0), c(12.0, 0.0), c(21.0, 0.0), c(22.0, 0.0)]
        );
        assert_eq!(net.frequency_hz, vec![1e6]);
    }

    #[test]
    fn version_2_states_the_two_port_order() {
        let body = "[Version] 2.0\n# MHz S RI\n[Number of Ports] 2\n[Two-Port Data Order] 12_21\n\
                    [Number of Frequencies] 1\n[Network Data]\n1 11 0 12 0 21 0 22 0\n[End]\n";
        let net = parse_touchstone(body, None).unwrap();
        assert_eq!(
            net.data[0],
            vec![c(11.0, 0.0), c(12.0, 0.0), c(21.0, 0.0), c(22.0, 0.0)]
        );
        let body = body.replace("12_21", "21_12");
        let net = parse_touchstone(&body, None).unwrap();
        assert_eq!(
            net.data[0],
            vec![c(11.0, 0.0), c(21.0, 0.0), c(12.0, 0.0), c(22.0, 0.0)]
        );
    }

    #[test]
    fn version_1_z_is_normalised_and_version_2_is_not() {
        // Source: Touchstone File Format Specification 2.0 (IBIS Open Forum, 2009): the version 1
        // example with "# GHz Z MA R 75" lists normalised values (0.99 ∠ −4 …) while its version 2
        // twin lists ohms (74.25 ∠ −4 …).
        let v1 = parse_touchstone("# GHz Z MA R 75\n2 0.99 -4\n", Some(1)).unwrap();
        let v2 = parse_touchstone(
            "[Version] 2.0\n# GHz Z MA R 75\n[Number of Ports] 1\n[Number of Frequencies] 1\n\
             [Reference] 75\n[Network Data]\n2 74.25 -4\n[End]\n",
            None,
        )
        .unwrap();
        assert!(
            close(v1.data[0][0], v2.data[0][0]),
            "{} vs {}",
            v1.data[0][0],
            v2.data[0][0]
        );
        assert!((v1.data[0][0].norm() - 74.25).abs() < 1e-12);
        let y1 = parse_touchstone("# GHz Y RI R 25\n2 2 0\n", Some(1)).unwrap();
        assert!(close(y1.data[0][0], c(0.08, 0.0)));
    }

    #[test]
    fn noise_blocks_are_skipped() {
        let v1 = "# GHz S MA\n1 1 0 0.1 0 0.1 0 1 0\n2 1 0 0.1 0 0.1 0 1 0\n! noise\n1 2.0 0.5 30 0.3\n2 2.1 0.5 35 0.3\n";
        let net = parse_touchstone(v1, Some(2)).unwrap();
        assert_eq!(net.frequency_hz.len(), 2);
        let v2 = "[Version] 2.0\n# GHz S MA\n[Number of Ports] 2\n[Two-Port Data Order] 21_12\n\
                  [Number of Frequencies] 1\n[Number of Noise Frequencies] 1\n[Network Data]\n\
                  1 1 0 0.1 0 0.1 0 1 0\n[Noise Data]\n1 2.0 0.5 30 0.3\n[End]\n";
        assert_eq!(parse_touchstone(v2, None).unwrap().frequency_hz.len(), 1);
    }

    #[test]
    fn a_second_option_line_is_ignored_when_it_agrees_and_refused_when_not() {
        let same = parse_touchstone("# MHz S RI\n1 0 0\n# mhz s ri r 50\n2 0 0\n", None).unwrap();
        assert_eq!(same.frequency_hz, vec![1e6, 2e6]);
        let err = parse_touchstone("# MHz S RI\n1 0 0\n# GHz S RI\n2 0 0\n", None).unwrap_err();
        assert_eq!(err.line, Some(3));
        assert!(err.message.contains("mixed units"), "{err}");
    }

    #[test]
    fn data_may_continue_on_the_next_line() {
        let net = parse_touchstone(
            "# MHz S RI\n1 11 0 21 0\n 12 0 22 0\n2 1 0 2 0 3 0 4 0\n",
            Some(2),
        )
        .unwrap();
        assert_eq!(net.line, vec![2, 4]);
        assert_eq!(net.data[0][1], c(12.0, 0.0));
    }

    #[test]
    fn information_blocks_and_reference_continuations() {
        let net = parse_touchstone(
            "[Version] 2.1\n# Hz S RI\n[Number of Ports] 2\n[Two-Port Data Order] 12_21\n\
             [Number of Frequencies] 1\n[Reference] 75\n 75\n[Begin Information]\nanything\n\
             [End Information]\n[Network Data]\n1 1 0 2 0 3 0 4 0\n[End]\n",
            None,
        )
        .unwrap();
        assert_eq!(net.reference_ohm, vec![75.0, 75.0]);
        assert_eq!(net.common_reference_ohm().unwrap(), 75.0);
    }

    #[test]
    fn one_reference_resistance_per_port_on_the_option_line() {
        let net = parse_touchstone("# MHz S RI R 50 50\n1 1 0 2 0 3 0 4 0\n", Some(2)).unwrap();
        assert_eq!(net.reference_ohm, vec![50.0, 50.0]);
        let net = parse_touchstone("# MHz S RI R 50 75\n1 1 0 2 0 3 0 4 0\n", Some(2)).unwrap();
        assert!(net.common_reference_ohm().is_err());
    }

    #[test]
    fn lower_matrix_format_fills_the_symmetric_entry() {
        let net = parse_touchstone(
            "[Version] 2.0\n# Hz Z RI\n[Number of Ports] 2\n[Two-Port Data Order] 12_21\n\
             [Number of Frequencies] 1\n[Matrix Format] Lower\n[Network Data]\n1 1 0 2 0 3 0\n[End]\n",
            None,
        )
        .unwrap();
        assert_eq!(
            net.data[0],
            vec![c(1.0, 0.0), c(2.0, 0.0), c(2.0, 0.0), c(3.0, 0.0)]
        );
    }

    #[test]
    fn errors_name_the_line() {
        let cases: &[(&str, Option<usize>, usize, &str)] = &[
            ("# MHz S RI\n1 0 0\n2 0 0 0\n", Some(1), 3, "column count"),
            ("# MHz S RI\n1 0 0\n2 0\n", Some(1), 3, "column count"),
            ("# MHz S RI\n2 0 0\n1 0 0\n", Some(1), 3, "increase"),
            ("# MHz S RI\n1 nan 0\n", Some(1), 2, "not finite"),
            ("# MHz S RI\n1 inf 0\n", Some(1), 2, "not finite"),
            ("# MHz S RI\n1 x 0\n", Some(1), 2, "not a number"),
            ("# MHz S RI Q\n", Some(1), 1, "unknown option"),
            ("1 0 0\n", Some(1), 1, "before the option line"),
            ("# MHz S RI\n[Number of Ports] 1\n", None, 2, "version 1"),
            ("\n[Version] 3.0\n", None, 2, "version"),
            ("# MHz S RI\n-1 0 0\n", Some(1), 2, "negative"),
            ("# MHz S RI\n1 0 0 0 0\n", None, 2, "first data line"),
            ("# MHz S RI\n1 0 0\n", Some(0), 2, "not supported"),
            ("# MHz S RI R 50 75\n1 0 0\n", Some(1), 1, "two reference"),
            ("# MHz S RI R 50 0\n1 0 0\n", Some(1), 1, "positive"),
            ("# MHz S RI\n1 0 0\n", Some(4), 2, "not supported"),
        ];
        for (text, hint, line, needle) in cases {
            let err = parse_touchstone(text, *hint).unwrap_err();
            assert_eq!(err.line, Some(*line), "{text:?}: {err}");
            assert!(err.message.contains(needle), "{text:?}: {err}");
        }
        let err = parse_touchstone("! only a comment\n# MHz S RI\n", Some(1)).unwrap_err();
        assert!(err.message.contains("no data"), "{err}");
    }

    #[test]
    fn written_files_read_back() {
        for version in [TouchstoneVersion::V1, TouchstoneVersion::V2] {
            for parameter in [Parameter::S, Parameter::Z, Parameter::Y] {
                for format in [
                    DataFormat::RealImaginary,
                    DataFormat::MagnitudeAngle,
                    DataFormat::DecibelAngle,
                ] {
                    for order in [TwoPortOrder::N12First, TwoPortOrder::N21First] {
                        let net = Network {
                            version,
                            ports: 2,
                            parameter,
                            format,
                            frequency_unit_hz: 1e6,
                            reference_ohm: vec![75.0, 75.0],
                            two_port_order: Some(order),
                            frequency_hz: vec![1e6, 2.5e6],
                            data: vec![
                                vec![c(0.1, 0.2), c(0.3, -0.4), c(-0.5, 0.6), c(0.7, 0.8)],
                                vec![c(1.1, 0.2), c(1.3, -0.4), c(-1.5, 0.6), c(1.7, 0.8)],
                            ],
                            line: vec![0, 0],
                        };
                        let text = write_touchstone(&net, &["a comment"]);
                        let back = parse_touchstone(&text, Some(2)).unwrap();
                        assert_eq!(back.frequency_hz, net.frequency_hz);
                        for (a, b) in back.data.iter().flatten().zip(net.data.iter().flatten()) {
                            assert!(
                                close(*a, *b),
                                "{version:?} {parameter:?} {format:?}: {a} vs {b}"
                            );
                        }
                    }
                }
            }
        }
    }

    const V2_ONE_PORT: &str = "[Version] 2.0\n# Hz S RI\n[Number of Ports] 1\n\
                               [Number of Frequencies] 2\n[Network Data]\n1 0.1 0\n2 0.2 0\n";
    const V2_LOWER: &str = "[Version] 2.0\n# Hz Z RI\n[Number of Ports] 2\n[Two-Port Data Order] 12_21\n\
                            [Number of Frequencies] 1\n[Matrix Format] Lower\n[Network Data]\n\
                            1 1 0 2 0 3 0\n";
    const V2_NOISE: &str = "[Version] 2.0\n# GHz S MA\n[Number of Ports] 2\n[Two-Port Data Order] 21_12\n\
                            [Number of Frequencies] 1\n[Network Data]\n1 1 0 0.1 0 0.1 0 1 0\n\
                            [Noise Data]\n1 2.0 0.5 30 0.3\n";

    /// `head` + `tail` on its own line, with and without a closing `[End]`: an error at `line` that
    /// says the keyword came after the data.
    fn refused_after_the_data(head: &str, tail: &str, line: usize) {
        for end in ["", "[End]\n", "3 0.3 0\n[End]\n"] {
            let text = format!("{head}{tail}\n{end}");
            let err = parse_touchstone(&text, None).unwrap_err();
            assert_eq!(err.line, Some(line), "{text:?}: {err}");
            assert!(
                err.message.contains("after [Network Data]"),
                "{text:?}: {err}"
            );
        }
    }

    #[test]
    fn crafted_keywords_after_the_data_no_longer_crash_the_reader() {
        // Issue 16, each checked against the reader before the fix: a port count or layout changed
        // after the data were read.
        // 800 GB reference vector: "memory allocation of 800000000000 bytes failed", abort.
        refused_after_the_data(V2_ONE_PORT, "[Number of Ports] 100000000000", 8);
        // "capacity overflow" panic.
        refused_after_the_data(V2_ONE_PORT, "[Number of Ports] 4611686018427387904", 8);
        // "entered unreachable code: ports above 2 are refused earlier".
        refused_after_the_data(V2_ONE_PORT, "[Number of Ports] 3", 8);
        // "index out of bounds: the len is 1 but the index is 2" (1-port data laid out as 2-port).
        refused_after_the_data(V2_ONE_PORT, "[Number of Ports] 2", 8);
        refused_after_the_data(
            V2_ONE_PORT,
            "[Number of Ports] 2\n[Two-Port Data Order] 21_12",
            8,
        );
        // "index out of bounds: the len is 3 but the index is 3" (lower-triangle data read as full).
        let lower_21 = V2_LOWER.replace("12_21", "21_12");
        refused_after_the_data(&lower_21, "[Matrix Format] Full", 9);
    }

    #[test]
    fn keywords_after_the_data_are_errors_with_their_line() {
        // These did not crash but changed the meaning of data already read (the first left a 2-port
        // network with three entries) or were silently skipped.
        refused_after_the_data(V2_LOWER, "[Matrix Format] Full", 9);
        refused_after_the_data(V2_LOWER, "[Two-Port Data Order] 21_12", 9);
        refused_after_the_data(V2_ONE_PORT, "[Reference] 75", 8);
        refused_after_the_data(V2_ONE_PORT, "[Number of Frequencies] 3", 8);
        refused_after_the_data(V2_ONE_PORT, "[Begin Information]\n[End Information]", 8);
        refused_after_the_data(V2_ONE_PORT, "[Network Data]", 8);
        refused_after_the_data(V2_NOISE, "[Number of Ports] 100000000000", 10);
        refused_after_the_data(V2_NOISE, "[Matrix Format] Lower", 10);
        refused_after_the_data(V2_NOISE, "[Noise Data]", 10);
        // What the specification allows after the data still reads.
        let net = parse_touchstone(&format!("{V2_NOISE}[End]\n"), None).unwrap();
        assert_eq!(net.frequency_hz, vec![1e9]);
        let err = parse_touchstone(
            "[Version] 2.0\n# Hz S RI\n[Number of Ports] 1\n[Noise Data]\n",
            None,
        )
        .unwrap_err();
        assert_eq!(err.line, Some(4));
        assert!(err.message.contains("before [Network Data]"), "{err}");
    }

    #[test]
    fn the_port_count_is_checked_where_it_is_read() {
        let head = "[Version] 2.0\n# Hz S RI\n";
        for n in ["3", "100000000000", "18446744073709551615"] {
            let err =
                parse_touchstone(&format!("{head}[Number of Ports] {n}\n"), None).unwrap_err();
            assert_eq!(err.line, Some(3), "{n}: {err}");
            assert!(err.message.contains("not supported"), "{n}: {err}");
        }
        let err = parse_touchstone(
            &format!("{head}[Number of Ports] 18446744073709551616\n"),
            None,
        )
        .unwrap_err();
        assert!(err.message.contains("not a whole number"), "{err}");
        let err = parse_touchstone(
            &format!("{head}[Number of Ports] 1\n[Number of Ports] 1\n"),
            None,
        )
        .unwrap_err();
        assert_eq!(err.line, Some(4));
        assert!(err.message.contains("twice (first on line 3)"), "{err}");
        // The file name's port count is checked before it sizes anything, too.
        let err = parse_touchstone("# Hz S RI\n1 0 0\n", Some(usize::MAX)).unwrap_err();
        assert_eq!(err.line, Some(2));
        assert!(err.message.contains("not supported"), "{err}");
    }

    #[test]
    fn a_repeated_frequency_reads_and_a_step_back_does_not() {
        let net = parse_touchstone("# MHz S RI\n1 0 0\n2 0 0\n2 0.1 0\n3 0 0\n", Some(1)).unwrap();
        assert_eq!(net.frequency_hz, vec![1e6, 2e6, 2e6, 3e6]);
        assert_eq!(net.line, vec![2, 3, 4, 5]);
        let err = parse_touchstone("# MHz S RI\n1 0 0\n2 0 0\n1.5 0 0\n", Some(1)).unwrap_err();
        assert_eq!(err.line, Some(4));
        assert!(err.message.contains("must increase"), "{err}");
    }

    #[test]
    fn version_2_counts_are_checked() {
        let head = "[Version] 2.0\n# Hz S RI\n[Number of Ports] 1\n[Number of Frequencies] 2\n[Network Data]\n";
        let err = parse_touchstone(&format!("{head}1 0 0\n[End]\n"), None).unwrap_err();
        assert_eq!(err.line, Some(4));
        let err = parse_touchstone(&format!("{head}1 0 0\n2 0 0\n3 0 0\n"), None).unwrap_err();
        assert_eq!(err.line, Some(8));
        let err =
            parse_touchstone(&format!("{head}1 0 0\n2 0 0\n[End]\n4 0 0\n"), None).unwrap_err();
        assert!(err.message.contains("after [End]"), "{err}");
    }
}
