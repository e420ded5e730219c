//! The command line. `fit` and `impedance` run the numeric core on files; `serve`, `token` and `demo`
//! belong to the service (see [`crate::server_cli`]).
//!
//! `henrybook fit FILE... [--method M] [--z0 OHM] [--dcr OHM] [--family lumped|rational]
//! [--at HZ,...] [--json]` fits every file in one process (`--at`: frequencies for effective L and Q). With `--json` it prints one JSON object per file per line; a file
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
use crate::sweep::{self, Method, ReadOptions, Sweep};
use serde_json::{Value, json};
use std::io::Write;
use std::process::ExitCode;

const USAGE: &str = "\
usage:
  henrybook fit FILE... [--method reflection|series-thru|shunt-thru|direct] [--z0 OHM] [--dcr OHM]
                        [--family lumped|rational] [--at HZ[,HZ...]] [--json]
  henrybook impedance FILE [--method reflection|series-thru|shunt-thru|direct] [--z0 OHM] [--json]
  henrybook serve | token create | demo | verify --database FILE";

pub fn main(args: Vec<String>) -> ExitCode {
    match args.first().map(String::as_str) {
        Some("serve" | "token" | "demo" | "verify") => crate::server_cli::main(args),
        _ => {
            let stdout = std::io::stdout();
            let stderr = std::io::stderr();
            ExitCode::from(run(&args, &mut stdout.lock(), &mut stderr.lock()))
        }
    }
}

/// Parsed flags of `fit` and `impedance`.
#[derive(Debug, Default)]
struct Flags {
    files: Vec<String>,
    read: ReadOptions,
    dcr_ohm: Option<f64>,
    at_hz: Vec<f64>,
    family: ModelFamily,
    json: bool,
}

fn parse_number(flag: &str, value: Option<&String>) -> Result<f64, String> {
    let v = value.ok_or_else(|| format!("{flag} needs a value"))?;
    match v.parse::<f64>() {
        Ok(x) if x.is_finite() && x > 0.0 => Ok(x),
        _ => Err(format!("{flag} {v}: expected a positive number of ohms")),
    }
}

fn parse_method(value: Option<&String>) -> Result<Method, String> {
    match value.map(String::as_str) {
        Some("reflection") => Ok(Method::Reflection),
        Some("series-thru") => Ok(Method::SeriesThru),
        Some("shunt-thru") => Ok(Method::ShuntThru),
        Some("direct") => Ok(Method::Direct),
        Some(other) => Err(format!(
            "--method {other}: expected reflection, series-thru, shunt-thru or direct"
        )),
        None => Err("--method needs a value".into()),
    }
}

fn parse_flags(args: &[String]) -> Result<Flags, String> {
    let mut f = Flags::default();
    let mut it = args.iter();
    while let Some(a) = it.next() {
        match a.as_str() {
            "--json" => f.json = true,
            "--method" => f.read.method = Some(parse_method(it.next())?),
            "--z0" => f.read.z0_ohm = Some(parse_number("--z0", it.next())?),
            "--dcr" => f.dcr_ohm = Some(parse_number("--dcr", it.next())?),
            "--at" => {
                let list = it.next().ok_or("--at needs a value")?;
                for part in list.split(',') {
                    match part.trim().parse::<f64>() {
                        Ok(x) if x.is_finite() && x > 0.0 => f.at_hz.push(x),
                        _ => {
                            return Err(format!(
                                "--at {part}: expected positive frequencies in Hz"
                            ));
                        }
                    }
                }
            }
            "--family" => {
                f.family = match it.next().map(String::as_str) {
                    Some("lumped") => ModelFamily::Lumped,
                    Some("rational") => ModelFamily::Rational,
                    Some(other) => {
                        return Err(format!("--family {other}: expected lumped or rational"));
                    }
                    None => return Err("--family needs a value".into()),
                }
            }
            flag if flag.starts_with("--") => return Err(format!("unknown option {flag}")),
            file => f.files.push(file.to_string()),
        }
    }
    Ok(f)
}

/// Runs `fit` or `impedance` with output to the given writers; returns the exit code.
pub fn run(args: &[String], out: &mut dyn Write, err: &mut dyn Write) -> u8 {
    let (cmd, rest) = match args.split_first() {
        Some((c, r)) => (c.as_str(), r),
        None => {
            let _ = writeln!(err, "{USAGE}");
            return 2;
        }
    };
    if matches!(cmd, "-h" | "--help" | "help") {
        let _ = writeln!(out, "{USAGE}");
        return 0;
    }
    let flags = match parse_flags(rest) {
        Ok(f) => f,
        Err(e) => {
            let _ = writeln!(err, "henrybook {cmd}: {e}\n{USAGE}");
            return 2;
        }
    };
    match cmd {
        "fit" => {
            if flags.files.is_empty() {
                let _ = writeln!(err, "henrybook fit: no files given\n{USAGE}");
                return 2;
            }
            run_fit(&flags, out)
        }
        "impedance" => {
            if flags.files.len() != 1 {
                let _ = writeln!(
                    err,
                    "henrybook impedance: exactly one file expected, got {}\n{USAGE}",
                    flags.files.len()
                );
                return 2;
            }
            if flags.dcr_ohm.is_some() {
                let _ = writeln!(err, "henrybook impedance: --dcr applies to fit only");
                return 2;
            }
            run_impedance(&flags, out, err)
        }
        other => {
            let _ = writeln!(err, "henrybook: unknown command {other}\n{USAGE}");
            2
        }
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

fn table_row(file: &str, report: &FitReport) -> Vec<String> {
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
    match &report.model {
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
    }
}

fn print_table(rows: &[Vec<String>], out: &mut dyn Write) {
    let header: Vec<String> = [
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
    for file in &flags.files {
        match fit_one(file, flags) {
            Ok((_, report)) => {
                if report.assessment.status == fit::FitStatus::Poor {
                    any_poor = true;
                    poor.push(format!("{file}: {}", report.assessment.summary));
                }
                if flags.json {
                    let _ = writeln!(out, "{}", report_json(file, &report));
                } else {
                    rows.push(table_row(file, &report));
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
                    r.extend(std::iter::repeat_n("-".to_string(), 8));
                    rows.push(r);
                    failures.push(e);
                }
            }
        }
        let _ = out.flush();
    }
    if !flags.json {
        print_table(&rows, out);
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
            ("fit", "no files given"),
            ("fit a.s1p --method sideways", "--method sideways"),
            ("fit a.s1p --z0", "--z0 needs a value"),
            ("fit a.s1p --dcr -3", "positive number"),
            ("fit a.s1p --bogus", "unknown option --bogus"),
            ("fit a.s1p --at 1e6,x", "--at x"),
            ("impedance a.s1p b.s1p", "exactly one file"),
            ("frobnicate", "unknown command frobnicate"),
        ] {
            let (code, _, err) = run_str(cmdline);
            assert_eq!(code, 2, "{cmdline}");
            assert!(err.contains(needle), "{cmdline}: {err}");
            assert!(err.contains("usage:"), "{cmdline}");
        }
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
