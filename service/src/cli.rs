//! The command line: one clap tree for every command. `fit` and `impedance` run the numeric core on
//! files (here); `serve`, `token`, `demo`, `verify` and `migrate` belong to the service
//! ([`crate::server_cli`]).
//!
//! `--help` (`-h`) and `--version` answer on every command; a file whose name starts with `-` goes
//! after `--`. Values take SI prefixes through one parser, [`crate::units::parse_si`].
//!
//! `henrybook fit FILE... [--method M] [--z0 OHM] [--dcr OHM] [--family lumped|rational]
//! [--at HZ,...] [--json]` fits every file in one process (`--at`: frequencies for effective L and Q,
//! as columns of the table or in the JSON). With `--json` it prints one JSON object per file per line; a file
//! that cannot be read or fitted gives `"status": "failed"` with the error and the other files still
//! run. Each fitted file's status is `ok` (the model describes the data within their uncertainty) or
//! `poor` (it does not; the findings say where and by how much). Exit code 0 when every file was
//! fitted `ok`, 3 when every file was fitted but some are `poor`, 1 when any failed, 2 for a usage
//! error.
//!
//! `henrybook impedance FILE [--method M] [--z0 OHM] [--json]` prints the impedance the file implies,
//! for any file the readers accept (also one too short to fit), with the reader's warnings and the DC
//! reading of a 0 Hz row when there is one.

use crate::fit::{self, DcrReading, FitControl, FitOptions, FitReport, ModelFamily};
use crate::model::FittedModel;
use crate::server_cli::ServiceCommand;
use crate::sweep::{self, Method, ReadOptions, Sweep};
use crate::units::parse_positive_si;
use clap::{Args, Parser, Subcommand, ValueEnum};
use serde_json::{Value, json};
use std::io::Write;
use std::process::ExitCode;

/// Shown under the top-level help.
const AFTER_HELP: &str = "\
Values take SI prefixes (p, n, u or µ, m, k, M, G): --at 100k,1M  --dcr 46.35m  --z0 50.
Each command has its own --help. A file whose name starts with '-' goes after '--'.";

#[derive(Debug, Parser)]
#[command(
    name = "henrybook",
    version,
    propagate_version = true,
    about = "Fit high-frequency models to inductor impedance sweeps; serve the registry",
    long_about = "Fit high-frequency models (lumped or rational, with uncertainty) to impedance \
sweeps of inductors from Touchstone or CSV files, and serve the registry of parts, sweeps and fits \
that design tools query over HTTP and gRPC.",
    after_help = AFTER_HELP
)]
struct Cli {
    #[command(subcommand)]
    command: Cmd,
}

#[derive(Debug, Subcommand)]
enum Cmd {
    /// Fit a model to each sweep file and print its status, parameters and findings.
    #[command(
        long_about = "Fit a model to each sweep file (Touchstone .s1p/.s2p/.ts or CSV) and print \
a table, or one JSON object per file per line with --json. A file that cannot be read or fitted is \
reported as failed and the others still run.\n\nEach fitted file is `ok` (the model describes the \
data within their uncertainty) or `poor` (it does not; the findings say where and by how much).\n\n\
Exit status: 0 every file ok, 3 every file fitted but some poor, 1 any file failed, 2 a usage error."
    )]
    Fit(FitArgs),
    /// Print the impedance a sweep file implies (any readable file, also one too short to fit).
    #[command(
        long_about = "Print the impedance a sweep file implies, as CSV (frequency_hz, \
z_real_ohm, z_imag_ohm, sigma_ohm) or one JSON object with --json, for any file the readers accept \
(also one too short to fit). The reader's warnings and a 0 Hz row's DC reading go to standard error."
    )]
    Impedance(ImpedanceArgs),
    #[command(flatten)]
    Service(ServiceCommand),
}

/// How a file was measured.
#[derive(Debug, Clone, Copy, ValueEnum)]
enum MethodArg {
    /// One-port S11.
    Reflection,
    /// Two-port, the part in series between the ports.
    SeriesThru,
    /// Two-port, the part from the line to ground.
    ShuntThru,
    /// The file holds impedance itself.
    Direct,
}

impl From<MethodArg> for Method {
    fn from(m: MethodArg) -> Method {
        match m {
            MethodArg::Reflection => Method::Reflection,
            MethodArg::SeriesThru => Method::SeriesThru,
            MethodArg::ShuntThru => Method::ShuntThru,
            MethodArg::Direct => Method::Direct,
        }
    }
}

#[derive(Debug, Clone, Copy, ValueEnum)]
enum FamilyArg {
    /// Lumped elements with uncertainty (L0, DCR, skin effect, core, Cp, sections).
    Lumped,
    /// A wideband rational model (vector fitting), passive.
    Rational,
}

#[derive(Debug, Args)]
struct ReadArgs {
    /// How the file was measured (a two-port file needs it; a one-port file is reflection).
    #[arg(long, value_enum)]
    method: Option<MethodArg>,
    /// Reference impedance in ohms, when the file does not state it (SI prefixes: 50, 75, 1k).
    #[arg(long, value_name = "OHM", value_parser = parse_positive_si)]
    z0: Option<f64>,
    /// One JSON object per file per line instead of a table.
    #[arg(long)]
    json: bool,
}

#[derive(Debug, Args)]
struct FitArgs {
    /// Sweep files: Touchstone (.s1p, .s2p, .ts) or CSV.
    #[arg(required = true, value_name = "FILE")]
    files: Vec<String>,
    #[command(flatten)]
    read: ReadArgs,
    /// A four-wire DC resistance reading in ohms that pins Rdc (SI prefixes: 46.35m).
    #[arg(long, value_name = "OHM", value_parser = parse_positive_si)]
    dcr: Option<f64>,
    /// Model family.
    #[arg(long, value_enum, default_value = "lumped")]
    family: FamilyArg,
    /// Frequencies at which to give effective L and Q, comma-separated (SI prefixes: 100k,1M).
    #[arg(long, value_name = "HZ", value_delimiter = ',', value_parser = parse_positive_si)]
    at: Vec<f64>,
    #[command(flatten)]
    construction: ConstructionArgs,
}

/// How the part is built: with turns and a core, the lumped fit also reports the core material's
/// initial permeability and its μ′/μ″ spectrum.
#[derive(Debug, Args)]
struct ConstructionArgs {
    /// Turns of the winding (with --toroid or --core-area and --core-path).
    #[arg(long, value_name = "N", value_parser = parse_positive_si)]
    turns: Option<f64>,
    /// A toroid's outer diameter, inner diameter and height in metres (SI prefixes: 9.5m,4.75m,3.2m).
    #[arg(long, value_name = "OD,ID,H", value_delimiter = ',', value_parser = parse_positive_si)]
    toroid: Option<Vec<f64>>,
    /// Any core's effective magnetic area in m² (with --core-path).
    #[arg(long, value_name = "M2", value_parser = parse_positive_si)]
    core_area: Option<f64>,
    /// Any core's effective magnetic path length in m (with --core-area).
    #[arg(long, value_name = "M", value_parser = parse_positive_si)]
    core_path: Option<f64>,
    /// Air gap in m (gapped cores; shorter than the magnetic path).
    #[arg(long, value_name = "M", value_parser = parse_positive_si)]
    gap: Option<f64>,
    /// The material's nominal initial permeability, for the expected L0.
    #[arg(long, value_name = "MU", value_parser = parse_positive_si)]
    initial_permeability: Option<f64>,
}

impl ConstructionArgs {
    /// The construction the flags state, `None` when none is given, or what is missing.
    fn construction(&self) -> Result<Option<crate::model::material::Construction>, String> {
        use crate::model::material::{Construction, CoreShape};
        let core = match (&self.toroid, self.core_area, self.core_path) {
            (None, None, None) => None,
            (Some(t), None, None) if t.len() != 3 => {
                return Err(format!(
                    "--toroid takes three values, OD,ID,H in metres; got {}",
                    t.len()
                ));
            }
            (Some(t), None, None) => Some(CoreShape::Toroid {
                outer_diameter_m: t[0],
                inner_diameter_m: t[1],
                height_m: t[2],
            }),
            (None, Some(area_m2), Some(path_m)) => Some(CoreShape::Effective { area_m2, path_m }),
            (Some(_), _, _) => {
                return Err(
                    "give the core as --toroid or as --core-area and --core-path, not both".into(),
                );
            }
            _ => return Err("--core-area and --core-path come together".into()),
        };
        let any_other = self.gap.is_some() || self.initial_permeability.is_some();
        match (self.turns, core) {
            (None, None) if !any_other => Ok(None),
            (Some(turns), Some(core)) => {
                let c = Construction {
                    turns,
                    core,
                    gap_m: self.gap,
                    nominal_initial_permeability: self.initial_permeability,
                };
                c.validate()?;
                Ok(Some(c))
            }
            (None, _) => Err("the construction needs --turns".into()),
            (Some(_), None) => Err(
                "the construction needs its core: --toroid, or --core-area and --core-path".into(),
            ),
        }
    }
}

#[derive(Debug, Args)]
struct ImpedanceArgs {
    /// One sweep file: Touchstone (.s1p, .s2p, .ts) or CSV.
    #[arg(value_name = "FILE")]
    file: String,
    #[command(flatten)]
    read: ReadArgs,
}

/// The binary's entry point: parses the arguments, writes to standard output and error (unlocked, so
/// that the service's log lines are never held up) and returns the exit status.
pub fn main(args: Vec<String>) -> ExitCode {
    let (mut out, mut err) = (std::io::stdout(), std::io::stderr());
    let cli = match parse(&args, &mut out, &mut err) {
        Ok(cli) => cli,
        Err(code) => return ExitCode::from(code),
    };
    if let Cmd::Service(_) = cli.command {
        // Before the service's runtime starts any thread.
        crate::server_cli::limit_malloc_arenas();
    }
    ExitCode::from(execute(cli, &mut out, &mut err))
}

/// What `fit` and `impedance` were asked to do.
#[derive(Debug, Default)]
struct Flags {
    files: Vec<String>,
    read: ReadOptions,
    dcr_ohm: Option<f64>,
    at_hz: Vec<f64>,
    family: ModelFamily,
    construction: Option<crate::model::material::Construction>,
    json: bool,
}

fn read_options(r: &ReadArgs) -> ReadOptions {
    ReadOptions {
        method: r.method.map(Method::from),
        z0_ohm: r.z0,
        ..ReadOptions::default()
    }
}

/// Runs a command line (without the program name) with output to the given writers and returns the
/// exit status: help and version go to `out` with 0, usage errors to `err` with 2.
pub fn run(args: &[String], out: &mut dyn Write, err: &mut dyn Write) -> u8 {
    match parse(args, out, err) {
        Ok(cli) => execute(cli, out, err),
        Err(code) => code,
    }
}

/// The parsed command line, or the exit status after help, version or a usage error was written.
fn parse(args: &[String], out: &mut dyn Write, err: &mut dyn Write) -> Result<Cli, u8> {
    Cli::try_parse_from(std::iter::once("henrybook".to_string()).chain(args.iter().cloned()))
        .map_err(|e| {
            let text = e.render().to_string();
            if e.use_stderr() {
                let _ = write!(err, "{text}");
                2
            } else {
                let _ = write!(out, "{text}");
                0
            }
        })
}

fn execute(cli: Cli, out: &mut dyn Write, err: &mut dyn Write) -> u8 {
    match cli.command {
        Cmd::Fit(a) => {
            let construction = match a.construction.construction() {
                Ok(c) => c,
                Err(e) => {
                    let _ = writeln!(err, "error: {e}\n\nFor more information, try '--help'.");
                    return 2;
                }
            };
            let flags = Flags {
                construction,
                files: a.files,
                read: read_options(&a.read),
                dcr_ohm: a.dcr,
                at_hz: a.at,
                family: match a.family {
                    FamilyArg::Lumped => ModelFamily::Lumped,
                    FamilyArg::Rational => ModelFamily::Rational,
                },
                json: a.read.json,
            };
            run_fit(&flags, out)
        }
        Cmd::Impedance(a) => {
            let flags = Flags {
                files: vec![a.file],
                read: read_options(&a.read),
                json: a.read.json,
                ..Flags::default()
            };
            run_impedance(&flags, out, err)
        }
        Cmd::Service(command) => crate::server_cli::run(command, out, err),
    }
}

fn read(file: &str, options: &ReadOptions) -> Result<Sweep, String> {
    let bytes = std::fs::read(file).map_err(|e| format!("cannot read {file}: {e}"))?;
    let name = std::path::Path::new(file)
        .file_name()
        .and_then(|n| n.to_str())
        .unwrap_or(file);
    sweep::read_sweep(name, &bytes, options).map_err(|e| format!("{file}: {e}"))
}

fn fit_one(file: &str, flags: &Flags) -> Result<(Sweep, FitReport), String> {
    let sweep = read(file, &flags.read)?;
    sweep.check_fittable().map_err(|e| format!("{file}: {e}"))?;
    let options = FitOptions {
        family: flags.family,
        dcr: flags.dcr_ohm.map(|value_ohm| DcrReading {
            value_ohm,
            sigma_ohm: None,
        }),
        report_frequencies_hz: flags.at_hz.clone(),
        construction: flags.construction,
        ..FitOptions::default()
    };
    let report =
        fit::fit(&sweep, &options, &FitControl::default()).map_err(|e| format!("{file}: {e}"))?;
    Ok((sweep, report))
}

/// The one-line JSON object of a fitted file.
pub fn report_json(file: &str, report: &FitReport) -> Value {
    let chosen = report
        .candidates
        .iter()
        .find(|c| c.chosen)
        .map(|c| c.label.clone());
    json!({
        "file": file,
        "status": report.assessment.status.as_str(),
        "summary": report.assessment.summary,
        "findings": report.assessment.findings,
        "warnings": report.warnings,
        "model": report.model,
        "uncertainty": report.uncertainty,
        "not_identifiable": report.not_identifiable,
        "srf_hz": report.derived.srf_hz,
        "srf_above_hz": report.derived.srf_above_hz,
        "series_resonances_hz": report.derived.series_resonances_hz,
        "parallel_resonances_hz": report.derived.parallel_resonances_hz,
        "q_peak": report.derived.q_peak,
        "q_peak_hz": report.derived.q_peak_hz,
        "core_corner_hz": report.derived.core_corner_hz,
        "at_frequencies": report.derived.at_frequencies,
        "naive_cp_f": report.derived.naive_cp_f,
        "naive_cp_error_percent": report.derived.naive_cp_error_percent,
        "rms_weighted": report.quality.rms_weighted,
        "max_relative_error": report.quality.max_relative_error,
        "max_relative_error_at_hz": report.quality.max_relative_error_at_hz,
        "termination": report.termination,
        "iterations": report.iterations,
        "structure": chosen,
        "band_hz": report.band_hz,
        "engine_version": report.engine_version,
        "report": report,
    })
}

pub use crate::units::eng;

fn table_row(file: &str, report: &FitReport, at_hz: &[f64]) -> Vec<String> {
    let srf = match (report.derived.srf_hz, report.derived.srf_above_hz) {
        (Some(f), _) => eng(f, "Hz"),
        (None, Some(b)) => format!("> {}", eng(b, "Hz")),
        _ => "-".into(),
    };
    let structure = report
        .candidates
        .iter()
        .find(|c| c.chosen)
        .map(|c| c.label.clone())
        .unwrap_or_else(|| "rational".into());
    let mut row = match &report.model {
        FittedModel::Lumped(m) => vec![
            file.into(),
            report.assessment.status.as_str().into(),
            eng(m.l0_h, "H"),
            eng(m.rdc_ohm, "Ω"),
            eng(m.cp_f, "F"),
            m.rp_ohm.map_or("-".into(), |r| eng(r, "Ω")),
            srf,
            format!("{:.3}", report.quality.rms_weighted),
            structure,
            if report.not_identifiable.is_empty() {
                "-".into()
            } else {
                report.not_identifiable.join(",")
            },
        ],
        FittedModel::Rational(_) => vec![
            file.into(),
            report.assessment.status.as_str().into(),
            "-".into(),
            "-".into(),
            "-".into(),
            "-".into(),
            srf,
            format!("{:.3}", report.quality.rms_weighted),
            structure,
            "-".into(),
        ],
    };
    for f in at_hz {
        match report
            .derived
            .at_frequencies
            .iter()
            .find(|p| p.frequency_hz == *f)
        {
            Some(p) => {
                row.push(eng(p.l_eff_h, "H"));
                row.push(format!("{:.2}", p.q));
            }
            None => row.extend(["-".to_string(), "-".to_string()]),
        }
    }
    row
}

fn print_table(rows: &[Vec<String>], at_hz: &[f64], out: &mut dyn Write) {
    let mut header: Vec<String> = [
        "file",
        "status",
        "L0",
        "Rdc",
        "Cp",
        "Rp",
        "SRF",
        "rms_w",
        "model",
        "not identifiable",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    for f in at_hz {
        header.push(format!("L @ {}", eng(*f, "Hz")));
        header.push(format!("Q @ {}", eng(*f, "Hz")));
    }
    let mut width = vec![0; header.len()];
    for r in std::iter::once(&header).chain(rows) {
        for (w, c) in width.iter_mut().zip(r) {
            *w = (*w).max(c.chars().count());
        }
    }
    for r in std::iter::once(&header).chain(rows) {
        let line: Vec<String> = r
            .iter()
            .zip(&width)
            .map(|(c, w)| format!("{c}{}", " ".repeat(w - c.chars().count())))
            .collect();
        let _ = writeln!(out, "{}", line.join("  ").trim_end());
    }
}

/// Exit code of `fit` when every file was fitted but some model is `poor`.
pub const EXIT_POOR: u8 = 3;

fn run_fit(flags: &Flags, out: &mut dyn Write) -> u8 {
    let mut all_ok = true;
    let mut any_poor = false;
    let mut rows = Vec::new();
    let mut failures = Vec::new();
    let mut poor = Vec::new();
    let mut materials = Vec::new();
    for file in &flags.files {
        match fit_one(file, flags) {
            Ok((_, report)) => {
                if report.assessment.status == fit::FitStatus::Poor {
                    any_poor = true;
                    poor.push(format!("{file}: {}", report.assessment.summary));
                }
                if let Some(m) = &report.material {
                    // Permeabilities to three or four significant digits, as data sheets give them.
                    let mu = |x: f64| {
                        if x.abs() >= 10.0 {
                            format!("{x:.0}")
                        } else {
                            format!("{x:.2}")
                        }
                    };
                    let sigma = m
                        .initial_permeability_sigma
                        .map_or(String::new(), |s| format!(" ± {}", mu(s)));
                    let expected = m.l0_versus_expected_percent.map_or(String::new(), |p| {
                        format!(", fitted L0 {p:+.1} % against the nominal permeability's")
                    });
                    materials.push(format!(
                        "{file}: initial permeability {}{sigma}{expected}",
                        mu(m.initial_permeability)
                    ));
                }
                if flags.json {
                    let _ = writeln!(out, "{}", report_json(file, &report));
                } else {
                    rows.push(table_row(file, &report, &flags.at_hz));
                }
            }
            Err(e) => {
                all_ok = false;
                if flags.json {
                    let _ = writeln!(
                        out,
                        "{}",
                        json!({"file": file, "status": "failed", "error": e})
                    );
                } else {
                    let mut r = vec![file.clone(), "failed".into()];
                    r.extend(std::iter::repeat_n(
                        "-".to_string(),
                        8 + 2 * flags.at_hz.len(),
                    ));
                    rows.push(r);
                    failures.push(e);
                }
            }
        }
        let _ = out.flush();
    }
    if !flags.json {
        print_table(&rows, &flags.at_hz, out);
        for m in materials {
            let _ = writeln!(out, "material: {m}");
        }
        for p in poor {
            let _ = writeln!(out, "poor: {p}");
        }
        for e in failures {
            let _ = writeln!(out, "failed: {e}");
        }
    }
    match (all_ok, any_poor) {
        (false, _) => 1,
        (true, true) => EXIT_POOR,
        (true, false) => 0,
    }
}

fn run_impedance(flags: &Flags, out: &mut dyn Write, err: &mut dyn Write) -> u8 {
    let file = &flags.files[0];
    let sweep = match read(file, &flags.read) {
        Ok(s) => s,
        Err(e) => {
            if flags.json {
                let _ = writeln!(
                    out,
                    "{}",
                    json!({"file": file, "status": "failed", "error": e})
                );
            }
            let _ = writeln!(err, "henrybook impedance: {e}");
            return 1;
        }
    };
    if flags.json {
        let mut v = json!({
            "file": file,
            "status": "ok",
            "method": sweep.method,
            "z0_ohm": sweep.z0_ohm,
            "frequency_hz": sweep.frequency_hz,
            "z_real_ohm": sweep.impedance_ohm.iter().map(|z| z.re).collect::<Vec<_>>(),
            "z_imag_ohm": sweep.impedance_ohm.iter().map(|z| z.im).collect::<Vec<_>>(),
            "sigma_ohm": sweep.sigma_ohm,
            "warnings": sweep.warnings,
        });
        if let Some(dc) = &sweep.dc_reading {
            v["dc_reading"] = json!(dc);
        }
        let _ = writeln!(out, "{v}");
    } else {
        for w in &sweep.warnings {
            let _ = writeln!(err, "henrybook impedance: {file}: {w}");
        }
        if let Some(dc) = &sweep.dc_reading {
            let _ = writeln!(
                err,
                "henrybook impedance: {file}: DC reading {} Ω, σ {} Ω (line {})",
                dc.resistance_ohm, dc.sigma_ohm, dc.line
            );
        }
        let _ = writeln!(out, "frequency_hz,z_real_ohm,z_imag_ohm,sigma_ohm");
        for ((f, z), s) in sweep
            .frequency_hz
            .iter()
            .zip(&sweep.impedance_ohm)
            .zip(&sweep.sigma_ohm)
        {
            let _ = writeln!(out, "{f},{},{},{s}", z.re, z.im);
        }
    }
    0
}

#[cfg(test)]
mod tests {
    use super::*;

    fn args(s: &str) -> Vec<String> {
        s.split_whitespace().map(String::from).collect()
    }

    fn run_str(s: &str) -> (u8, String, String) {
        let (mut out, mut err) = (Vec::new(), Vec::new());
        let code = run(&args(s), &mut out, &mut err);
        (
            code,
            String::from_utf8(out).unwrap(),
            String::from_utf8(err).unwrap(),
        )
    }

    #[test]
    fn usage_errors_are_clear_and_exit_2() {
        for (cmdline, needle) in [
            ("fit", "FILE"),
            ("fit a.s1p --method sideways", "sideways"),
            ("fit a.s1p --z0", "--z0"),
            ("fit a.s1p --dcr -3", "-3"),
            ("fit a.s1p --dcr 0", "not a positive number"),
            ("fit a.s1p --bogus", "--bogus"),
            ("fit a.s1p --at 1e6,x", "\"x\" is not a number"),
            ("impedance a.s1p b.s1p", "b.s1p"),
            ("frobnicate", "frobnicate"),
        ] {
            let (code, out, err) = run_str(cmdline);
            assert_eq!(code, 2, "{cmdline}");
            assert!(out.is_empty(), "{cmdline}: {out}");
            assert!(err.contains(needle), "{cmdline}: {err}");
            // Either the usage itself or where to find it.
            assert!(
                err.contains("Usage:") || err.contains("--help"),
                "{cmdline}: {err}"
            );
        }
    }

    #[test]
    fn help_and_version_answer_on_every_command() {
        for cmdline in [
            "--help",
            "-h",
            "fit --help",
            "fit -h",
            "impedance --help",
            "serve --help",
            "token --help",
            "token create -h",
            "token list --help",
            "token revoke --help",
            "demo --help",
            "verify --help",
            "migrate --help",
        ] {
            let (code, out, err) = run_str(cmdline);
            assert_eq!(code, 0, "{cmdline}: {err}");
            assert!(out.contains("Usage:"), "{cmdline}: {out}");
        }
        let (_, out, _) = run_str("fit --help");
        for flag in [
            "--method",
            "--z0",
            "--dcr",
            "--family",
            "--at",
            "--json",
            "Exit status",
        ] {
            assert!(out.contains(flag), "fit --help names {flag}: {out}");
        }
        let (_, out, _) = run_str("--help");
        for cmd in [
            "fit",
            "impedance",
            "serve",
            "token",
            "demo",
            "verify",
            "migrate",
        ] {
            assert!(out.contains(cmd), "the top-level help names {cmd}");
        }
        for cmdline in ["--version", "fit --version", "token revoke --version"] {
            let (code, out, _) = run_str(cmdline);
            assert_eq!(code, 0);
            assert!(out.contains(env!("CARGO_PKG_VERSION")), "{cmdline}: {out}");
        }
    }

    #[test]
    fn construction_flags_make_a_construction_or_say_what_is_missing() {
        let parse = |line: &str| {
            let cli = Cli::try_parse_from(line.split_whitespace()).unwrap();
            let Cmd::Fit(a) = cli.command else { panic!() };
            a.construction.construction()
        };
        let c = parse("henrybook fit a.s1p --turns 2 --toroid 9.5m,4.75m,3.2m")
            .unwrap()
            .unwrap();
        assert_eq!(c.turns, 2.0);
        assert!(matches!(
            c.core,
            crate::model::material::CoreShape::Toroid { outer_diameter_m, .. }
                if (outer_diameter_m - 9.5e-3).abs() < 1e-15
        ));
        assert!(parse("henrybook fit a.s1p").unwrap().is_none());
        for (line, needle) in [
            ("henrybook fit a.s1p --toroid 9.5m,4.75m,3.2m", "--turns"),
            ("henrybook fit a.s1p --turns 3", "core"),
            (
                "henrybook fit a.s1p --turns 3 --core-area 1e-5",
                "come together",
            ),
            (
                "henrybook fit a.s1p --turns 3 --toroid 4m,9m,3m",
                "inner diameter",
            ),
        ] {
            let e = parse(line).unwrap_err();
            assert!(e.contains(needle), "{line}: {e}");
        }
        let (code, _, err) = run_str("fit a.s1p --turns 3");
        assert_eq!(code, 2);
        assert!(err.contains("--toroid"), "{err}");
    }

    #[test]
    fn values_take_si_prefixes() {
        let cli = Cli::try_parse_from(
            "henrybook fit a.s1p --at 100k,1.5MHz --dcr 46.35m --z0 75".split_whitespace(),
        )
        .unwrap();
        let Cmd::Fit(a) = cli.command else { panic!() };
        assert_eq!(a.at, vec![1e5, 1.5e6]);
        assert!((a.dcr.unwrap() - 0.04635).abs() < 1e-15);
        assert_eq!(a.read.z0, Some(75.0));
    }

    #[test]
    fn a_missing_file_fails_alone_and_sets_the_exit_code() {
        let (code, out, _) = run_str("fit /nonexistent/a.s1p /nonexistent/b.csv --json");
        assert_eq!(code, 1);
        let lines: Vec<Value> = out
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect();
        assert_eq!(lines.len(), 2);
        for (l, name) in lines
            .iter()
            .zip(["/nonexistent/a.s1p", "/nonexistent/b.csv"])
        {
            assert_eq!(l["file"], name);
            assert_eq!(l["status"], "failed");
            assert!(l["error"].as_str().unwrap().contains("cannot read"));
        }
    }

    fn temp_file(name: &str, text: &str) -> std::path::PathBuf {
        let dir = std::env::temp_dir().join(format!("henrybook-cli-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join(name);
        std::fs::write(&path, text).unwrap();
        path
    }

    #[test]
    fn impedance_converts_a_short_file_with_its_warnings_and_dc_reading() {
        // Five rows: a 0 Hz row, and a boundary frequency measured twice (invented values).
        let text = "frequency_hz,z_real_ohm,z_imag_ohm\n0,0.05,0\n1000,0.05,0.3\n2000,0.05,0.6\n\
                    2000,0.05,0.62\n3000,0.05,0.9\n";
        let path = temp_file("short.csv", text);
        let file = path.to_str().unwrap();
        let (code, out, _) = run_str(&format!("impedance {file} --json"));
        assert_eq!(code, 0);
        let v: Value = serde_json::from_str(out.trim()).unwrap();
        assert_eq!(v["status"], "ok");
        assert_eq!(v["frequency_hz"], json!([1000.0, 2000.0, 3000.0]));
        assert_eq!(v["z_imag_ohm"][1], json!(0.61));
        assert_eq!(v["dc_reading"]["resistance_ohm"], json!(0.05));
        assert_eq!(v["dc_reading"]["line"], json!(2));
        let warnings = v["warnings"].as_array().unwrap();
        assert_eq!(warnings.len(), 2, "{warnings:?}");
        assert!(
            warnings[0]
                .as_str()
                .unwrap()
                .contains("line 2: the 0 Hz row is used")
        );
        assert!(
            warnings[1]
                .as_str()
                .unwrap()
                .starts_with("lines 4 and 5 repeat 2000 Hz")
        );

        // Without --json: CSV on standard output, the warnings on standard error.
        let (code, out, err) = run_str(&format!("impedance {file}"));
        assert_eq!(code, 0);
        assert_eq!(out.lines().count(), 4, "{out}");
        assert!(
            err.contains("repeat 2000 Hz") && err.contains("DC reading 0.05 Ω"),
            "{err}"
        );

        // Fitting the same file is refused, naming the file.
        let (code, out, _) = run_str(&format!("fit {file} --json"));
        assert_eq!(code, 1);
        let v: Value = serde_json::from_str(out.trim()).unwrap();
        assert_eq!(v["status"], "failed");
        let e = v["error"].as_str().unwrap();
        assert!(
            e.starts_with(file) && e.contains("a fit needs at least 20"),
            "{e}"
        );
        std::fs::remove_file(path).ok();
    }

    #[test]
    fn engineering_notation() {
        assert_eq!(eng(4.7e-5, "H"), "47 µH");
        assert_eq!(eng(0.12, "Ω"), "120 mΩ");
        assert_eq!(eng(22.5079e6, "Hz"), "22.5079 MHz");
        assert_eq!(eng(4.2e-12, "F"), "4.2 pF");
        assert_eq!(eng(0.0, "Ω"), "0 Ω");
    }
}
