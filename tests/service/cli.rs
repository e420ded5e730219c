//! The command line end to end: files on disk → sweep readers → fit → JSON lines or a table.
//! The files are synthetic (invented models, noise drawn at the reader's own uncertainty model) written
//! as Touchstone 1.x (1-port reflection, 2-port series-thru) and impedance CSV.

use henrybook::cli;
use henrybook::fit::derived;
use henrybook::model::{ImpedanceModel, LumpedModel};
use henrybook::store::Backend;
use henrybook::store::tokens::Role;
use henrybook::sweep::NoiseModel;
use henrybook_tests::service::TestDatabase;
use henrybook_tests::synth::*;
use num_complex::Complex64;
use serde_json::Value;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

fn temp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("henrybook-fit-cli-{}-{name}", std::process::id()));
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// A 1-port reflection Touchstone 1.x file (RI) of `model`, S11 noise at the reader's default model.
fn write_s1p(path: &Path, model: &LumpedModel, band: [f64; 2], n: usize, seed: u64) {
    let z0 = 50.0;
    let nm = NoiseModel::default();
    let mut noise = Noise::new(seed);
    let mut text =
        String::from("! synthetic sweep of an invented part (test data)\n# Hz S RI R 50\n");
    for f in log_grid(band[0], band[1], n) {
        let z = model.impedance(f);
        let s = (z - z0) / (z + z0);
        let sig = nm.sigma_s(s);
        let s = s + Complex64::new(sig * noise.normal(), sig * noise.normal());
        writeln!(text, "{f:.6} {:.12e} {:.12e}", s.re, s.im).unwrap();
    }
    std::fs::write(path, text).unwrap();
}

/// A 2-port series-thru Touchstone 1.x file (MA, v1 order N11 N21 N12 N22) of `model`.
fn write_s2p_series(path: &Path, model: &LumpedModel, band: [f64; 2], n: usize, seed: u64) {
    let z0 = 50.0;
    let nm = NoiseModel::default();
    let mut noise = Noise::new(seed);
    let mut text = String::from("# MHz S MA R 50\n");
    for f in log_grid(band[0], band[1], n) {
        let z = model.impedance(f);
        let s11 = z / (z + 2.0 * z0);
        let sig = nm.sigma_s(2.0 * z0 / (z + 2.0 * z0));
        let s21 =
            2.0 * z0 / (z + 2.0 * z0) + Complex64::new(sig * noise.normal(), sig * noise.normal());
        let ma = |c: Complex64| format!("{:.12e} {:.10}", c.norm(), c.arg().to_degrees());
        writeln!(
            text,
            "{:.9} {} {} {} {}",
            f / 1e6,
            ma(s11),
            ma(s21),
            ma(s21),
            ma(s11)
        )
        .unwrap();
    }
    std::fs::write(path, text).unwrap();
}

/// An impedance CSV with 0.2 % relative noise (the reader's floor for directly measured Z).
fn write_csv(path: &Path, model: &LumpedModel, band: [f64; 2], n: usize, seed: u64) {
    let mut noise = Noise::new(seed);
    let mut text = String::from("frequency_hz,z_real_ohm,z_imag_ohm\n");
    for f in log_grid(band[0], band[1], n) {
        let z = model.impedance(f);
        let s = 2e-3 * z.norm();
        writeln!(
            text,
            "{f},{:.12e},{:.12e}",
            z.re + s * noise.normal(),
            z.im + s * noise.normal()
        )
        .unwrap();
    }
    std::fs::write(path, text).unwrap();
}

fn run(args: &[&str]) -> (u8, String, String) {
    let args: Vec<String> = args.iter().map(|s| s.to_string()).collect();
    let (mut out, mut err) = (Vec::new(), Vec::new());
    let code = cli::run(&args, &mut out, &mut err);
    (
        code,
        String::from_utf8(out).unwrap(),
        String::from_utf8(err).unwrap(),
    )
}

fn rel(a: f64, b: f64) -> f64 {
    (a / b - 1.0).abs()
}

fn assert_recovered(line: &Value, truth: &LumpedModel, band: [f64; 2]) {
    assert_eq!(line["status"], "ok", "{line}");
    let m = &line["model"];
    for key in [
        "l0_h",
        "rdc_ohm",
        "k_ac_ohm_per_sqrt_hz",
        "rp_ohm",
        "cp_f",
        "ls_h",
        "sections",
    ] {
        assert!(m.get(key).is_some(), "model lacks {key}: {m}");
        assert!(
            line["uncertainty"].get(key).is_some(),
            "uncertainty lacks {key}"
        );
    }
    assert!(rel(m["l0_h"].as_f64().unwrap(), truth.l0_h) < 5e-3, "{m}");
    assert!(rel(m["cp_f"].as_f64().unwrap(), truth.cp_f) < 1e-2, "{m}");
    let srf = derived::srf(truth, band).0.unwrap();
    assert!(rel(line["srf_hz"].as_f64().unwrap(), srf) < 2e-3, "{line}");
    assert!(line["series_resonances_hz"].is_array());
    assert!(
        line["rms_weighted"].as_f64().unwrap() < 1.5,
        "{}",
        line["rms_weighted"]
    );
    assert!(line["termination"].is_string());
}

#[test]
fn fit_prints_one_json_line_per_file_and_a_bad_file_fails_alone() {
    let dir = temp_dir("json");
    let rf = dir.join("rf_inductor.s1p");
    let choke = dir.join("power_choke.csv");
    let junk = dir.join("junk.s1p");
    write_s1p(&rf, &rf_inductor(), [1e6, 3e9], 401, 1);
    write_csv(&choke, &power_choke(), [1e3, 200e6], 401, 2);
    std::fs::write(&junk, "# Hz S RI R 50\n1e6 0.1 0.2\n2e6 0.1\n").unwrap();
    let (code, out, _) = run(&[
        "fit",
        rf.to_str().unwrap(),
        junk.to_str().unwrap(),
        choke.to_str().unwrap(),
        "--json",
    ]);
    assert_eq!(code, 1, "one file failed: {out}");
    let lines: Vec<Value> = out
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(lines.len(), 3);
    assert_eq!(lines[0]["file"], rf.to_str().unwrap());
    assert_recovered(&lines[0], &rf_inductor(), [1e6, 3e9]);
    assert_eq!(lines[1]["status"], "failed");
    assert!(
        lines[1]["error"].as_str().unwrap().contains("line 3"),
        "{}",
        lines[1]
    );
    assert_recovered(&lines[2], &power_choke(), [1e3, 200e6]);

    // All good → exit code 0; --at gives effective L and Q there.
    let (code, out, _) = run(&["fit", choke.to_str().unwrap(), "--at", "1e5,1e6", "--json"]);
    assert_eq!(code, 0);
    let line: Value = serde_json::from_str(out.trim()).unwrap();
    let at = line["at_frequencies"].as_array().unwrap();
    assert_eq!(at.len(), 2);
    assert_eq!(at[1]["frequency_hz"], 1e6);
    let l_eff = at[0]["l_eff_h"].as_f64().unwrap();
    assert!(rel(l_eff, power_choke().l0_h) < 0.01, "{l_eff}");
    std::fs::remove_dir_all(dir).ok();
}

#[test]
fn a_two_port_file_needs_the_method_and_fits_with_it() {
    let dir = temp_dir("s2p");
    let emi = dir.join("emi_choke.s2p");
    write_s2p_series(&emi, &emi_choke(), [100.0, 200e6], 601, 3);
    let (code, out, _) = run(&["fit", emi.to_str().unwrap(), "--json"]);
    assert_eq!(code, 1);
    let line: Value = serde_json::from_str(out.trim()).unwrap();
    assert_eq!(line["status"], "failed");
    assert!(
        line["error"]
            .as_str()
            .unwrap()
            .to_lowercase()
            .contains("method"),
        "{line}"
    );

    let (code, out, _) = run(&[
        "fit",
        emi.to_str().unwrap(),
        "--method",
        "series-thru",
        "--dcr",
        "0.35",
        "--json",
    ]);
    assert_eq!(code, 0, "{out}");
    let line: Value = serde_json::from_str(out.trim()).unwrap();
    assert_recovered(&line, &emi_choke(), [100.0, 200e6]);
    assert_eq!(
        line["model"]["sections"].as_array().unwrap().len(),
        1,
        "{line}"
    );
    // The DCR reading (σ 0.5 % + 1 mΩ) pins rdc.
    assert!((line["model"]["rdc_ohm"].as_f64().unwrap() - 0.35).abs() < 0.01);
    std::fs::remove_dir_all(dir).ok();
}

#[test]
fn without_json_fit_prints_a_table() {
    let dir = temp_dir("table");
    let choke = dir.join("choke.csv");
    write_csv(&choke, &power_choke(), [1e3, 200e6], 201, 4);
    let (code, out, _) = run(&["fit", choke.to_str().unwrap()]);
    assert_eq!(code, 0);
    let mut lines = out.lines();
    let header = lines.next().unwrap();
    for col in ["file", "status", "L0", "Rdc", "Cp", "SRF", "rms_w"] {
        assert!(header.contains(col), "{header}");
    }
    let row = lines.next().unwrap();
    assert!(
        row.contains("choke.csv") && row.contains(" ok ") && row.contains("µH"),
        "{row}"
    );
    std::fs::remove_dir_all(dir).ok();
}

#[test]
fn impedance_prints_the_arrays_the_file_implies() {
    let dir = temp_dir("imp");
    let rf = dir.join("rf.s1p");
    let truth = rf_inductor();
    write_s1p(&rf, &truth, [1e6, 3e9], 101, 5);
    let (code, out, _) = run(&["impedance", rf.to_str().unwrap(), "--json"]);
    assert_eq!(code, 0);
    let v: Value = serde_json::from_str(out.trim()).unwrap();
    let f = v["frequency_hz"].as_array().unwrap();
    let re = v["z_real_ohm"].as_array().unwrap();
    let im = v["z_imag_ohm"].as_array().unwrap();
    let sg = v["sigma_ohm"].as_array().unwrap();
    assert_eq!(f.len(), 101);
    assert!(re.len() == 101 && im.len() == 101 && sg.len() == 101);
    for k in 0..101 {
        let z = truth.impedance(f[k].as_f64().unwrap());
        let d = Complex64::new(re[k].as_f64().unwrap(), im[k].as_f64().unwrap()) - z;
        assert!(d.norm() < 6.0 * sg[k].as_f64().unwrap(), "point {k}: {d}");
    }
    std::fs::remove_dir_all(dir).ok();
}

/// Every command path of the command line, for the help and version checks.
const COMMANDS: [&str; 12] = [
    "",
    "fit",
    "impedance",
    "serve",
    "token",
    "token create",
    "token list",
    "token revoke",
    "token sync",
    "demo",
    "verify",
    "migrate",
];

fn words(cmd: &str, flag: &str) -> Vec<String> {
    cmd.split_whitespace()
        .chain([flag])
        .map(String::from)
        .collect()
}

#[test]
fn help_and_version_answer_on_every_command() {
    for cmd in COMMANDS {
        for flag in ["--help", "-h"] {
            let args = words(cmd, flag);
            let args: Vec<&str> = args.iter().map(String::as_str).collect();
            let (code, out, err) = run(&args);
            assert_eq!(code, 0, "{args:?}: {err}");
            assert!(out.contains("Usage: henrybook"), "{args:?}: {out}");
            assert!(err.is_empty(), "{args:?}: {err}");
        }
        let args = words(cmd, "--version");
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let (code, out, _) = run(&args);
        assert_eq!(code, 0, "{args:?}");
        // `henrybook 0.1.0`, or `henrybook-fit 0.1.0` on a command (the service's own version).
        let version = out.trim().rsplit(' ').next().unwrap_or_default();
        assert!(out.starts_with("henrybook"), "{args:?}: {out}");
        assert_eq!(version, henrybook::fit::ENGINE_VERSION, "{args:?}: {out}");
    }
    // The top-level help describes every command in a line of its own.
    let (_, out, _) = run(&["--help"]);
    for cmd in [
        "fit",
        "impedance",
        "serve",
        "token",
        "demo",
        "verify",
        "migrate",
    ] {
        assert!(
            out.lines()
                .any(|l| l.trim_start().starts_with(cmd) && l.len() > cmd.len() + 20),
            "the help describes {cmd}: {out}"
        );
    }
    // Every option of `fit` is explained.
    let (_, out, _) = run(&["fit", "--help"]);
    for flag in [
        "--method", "--z0", "--dcr", "--family", "--at", "--json", "--turns", "--toroid",
    ] {
        assert!(out.contains(flag), "fit --help names {flag}: {out}");
    }
    let (_, out, _) = run(&["serve", "--help"]);
    assert!(out.contains("SI prefixes"), "{out}");
}

#[test]
fn a_file_named_like_an_option_is_read_after_double_dash() {
    // `-h` asks for help; after `--` it is a file name (here one that does not exist).
    let (code, out, _) = run(&["fit", "-h"]);
    assert_eq!(code, 0);
    assert!(out.contains("Usage:"), "{out}");
    let (code, out, _) = run(&["fit", "--json", "--", "-h"]);
    assert_eq!(code, 1, "{out}");
    let line: Value = serde_json::from_str(out.trim()).unwrap();
    assert_eq!(line["file"], "-h");
    assert_eq!(line["status"], "failed");
    assert!(
        line["error"].as_str().unwrap().contains("cannot read -h"),
        "{line}"
    );
}

#[test]
fn values_with_si_prefixes_fit_as_their_plain_numbers() {
    let dir = temp_dir("si");
    let choke = dir.join("choke.csv");
    write_csv(&choke, &power_choke(), [1e3, 200e6], 201, 6);
    let file = choke.to_str().unwrap();
    let fit_json = |at: &str, dcr: &str| {
        let (code, out, err) = run(&["fit", file, "--at", at, "--dcr", dcr, "--json"]);
        assert_eq!(code, 0, "{err}{out}");
        serde_json::from_str::<Value>(out.trim()).unwrap()
    };
    let prefixed = fit_json("100k,1MHz", "120m");
    let plain = fit_json("100000,1e6", "0.12");
    let (a, b) = (&prefixed["at_frequencies"], &plain["at_frequencies"]);
    assert_eq!(a.as_array().unwrap().len(), 2);
    for k in 0..2 {
        assert_eq!(a[k]["frequency_hz"], b[k]["frequency_hz"]);
        let (la, lb) = (
            a[k]["l_eff_h"].as_f64().unwrap(),
            b[k]["l_eff_h"].as_f64().unwrap(),
        );
        assert!(rel(la, lb) < 1e-9, "{la} {lb}");
    }
    assert_eq!(a[0]["frequency_hz"], 1e5);
    let rdc = |v: &Value| v["model"]["rdc_ohm"].as_f64().unwrap();
    assert!(rel(rdc(&prefixed), rdc(&plain)) < 1e-9);
    // A prefix that is not SI, or a value that is not positive, is a usage error naming it.
    for (arg, needle) in [
        ("--at=100q", "\"100q\" is not a number"),
        ("--dcr=-5m", "-0.005 is not a positive number"),
        ("--z0=0", "0 is not a positive number"),
    ] {
        let (code, _, err) = run(&["fit", file, arg]);
        assert_eq!(code, 2, "{arg}");
        assert!(err.contains(needle), "{arg}: {err}");
    }
    std::fs::remove_dir_all(dir).ok();
}

#[test]
fn at_adds_l_and_q_columns_to_the_table() {
    let dir = temp_dir("at-table");
    let choke = dir.join("choke.csv");
    write_csv(&choke, &power_choke(), [1e3, 200e6], 201, 7);
    let file = choke.to_str().unwrap();
    let (code, out, _) = run(&["fit", file, "--at", "100k,1M"]);
    assert_eq!(code, 0, "{out}");
    let mut lines = out.lines();
    // Columns are separated by at least two spaces; a cell holds at most one.
    let cells = |line: &str| -> Vec<String> {
        line.split("  ")
            .map(str::trim)
            .filter(|c| !c.is_empty())
            .map(String::from)
            .collect()
    };
    let header = cells(lines.next().unwrap());
    let row = cells(lines.next().unwrap());
    assert_eq!(header.len(), row.len(), "{header:?} {row:?}");
    let (code, json, _) = run(&["fit", file, "--at", "100k,1M", "--json"]);
    assert_eq!(code, 0);
    let line: Value = serde_json::from_str(json.trim()).unwrap();
    for (k, label) in ["100 kHz", "1 MHz"].iter().enumerate() {
        let point = &line["at_frequencies"][k];
        let l_col = header.iter().position(|h| *h == format!("L @ {label}"));
        let q_col = header.iter().position(|h| *h == format!("Q @ {label}"));
        let (l_col, q_col) = (l_col.expect("L column"), q_col.expect("Q column"));
        assert_eq!(
            row[l_col],
            cli::eng(point["l_eff_h"].as_f64().unwrap(), "H")
        );
        assert_eq!(row[q_col], format!("{:.2}", point["q"].as_f64().unwrap()));
    }
    std::fs::remove_dir_all(dir).ok();
}

#[test]
fn token_list_shows_every_token_and_revoke_stops_one() {
    // On the database the service tests run on (HENRYBOOK_TEST_BACKEND).
    let runtime = tokio::runtime::Runtime::new().unwrap();
    let database = runtime.block_on(TestDatabase::new());
    let location = database.location();
    let db = location.to_str().unwrap();
    let (code, token, err) = run(&[
        "token",
        "create",
        "--role",
        "inspector",
        "--label",
        "bench 3",
        "--database",
        db,
    ]);
    assert_eq!(code, 0, "{err}");
    assert!(err.contains("token 1 (inspector)"), "{err}");
    let token = token.trim().to_string();
    let (code, other, _) = run(&["token", "create", "--role", "reader", "--database", db]);
    assert_eq!(code, 0);

    let rows = |out: &str| -> Vec<Vec<String>> {
        out.lines()
            .skip(1)
            .map(|l| l.split_whitespace().map(String::from).collect())
            .collect()
    };
    let (code, out, _) = run(&["token", "list", "--database", db]);
    assert_eq!(code, 0);
    let header: Vec<&str> = out.lines().next().unwrap().split_whitespace().collect();
    assert_eq!(
        header,
        [
            "id",
            "role",
            "created",
            "last-used",
            "revoked",
            "source",
            "label"
        ]
    );
    assert!(!out.contains(&token), "the list never shows a token");
    let listed = rows(&out);
    assert_eq!(listed.len(), 2, "{out}");
    assert_eq!(listed[0][..2], ["1", "inspector"]);
    assert_eq!(
        listed[0][3..5],
        ["-", "-"],
        "never used, not revoked: {out}"
    );
    assert_eq!(listed[0][5], "created");
    assert_eq!(listed[0][6..].join(" "), "bench 3");
    assert_eq!(listed[1][..2], ["2", "reader"]);
    assert_eq!(listed[1][6], "reader-2");
    // Created is an RFC 3339 time.
    assert!(
        henrybook::store::parse_rfc3339(&listed[0][2]).is_some(),
        "{out}"
    );

    // The inspector's token authenticates a request (as the service checks it): the list shows
    // when, and the reader's token stays unused.
    let before = henrybook::store::now_ms();
    runtime.block_on(async {
        let store = Backend::open(Path::new(db), 2).await.unwrap();
        assert!(store.authenticate(&token).await.unwrap().is_some());
        store.close().await;
    });
    let (_, out, _) = run(&["token", "list", "--database", db]);
    let listed = rows(&out);
    let used = henrybook::store::parse_rfc3339(&listed[0][3]).expect("a last-used time");
    // RFC 3339 with milliseconds: the time is the one just written.
    assert!(
        used >= before && used <= henrybook::store::now_ms(),
        "{out}"
    );
    assert_eq!(listed[1][3], "-", "{out}");

    let (code, out, err) = run(&["token", "revoke", "1", "--database", db]);
    assert_eq!(code, 0, "{err}");
    assert!(
        out.contains("token 1 (inspector, bench 3) revoked"),
        "{out}"
    );
    let (_, out, _) = run(&["token", "list", "--database", db]);
    let listed = rows(&out);
    assert!(
        henrybook::store::parse_rfc3339(&listed[0][4]).is_some(),
        "{out}"
    );
    assert_eq!(listed[1][4], "-");

    // Revoking again or an unknown id fails with the reason; a non-number is a usage error.
    let (code, _, err) = run(&["token", "revoke", "1", "--database", db]);
    assert_eq!(code, 1);
    assert!(err.contains("already revoked"), "{err}");
    let (code, _, err) = run(&["token", "revoke", "99", "--database", db]);
    assert_eq!(code, 1);
    assert!(err.contains("no token 99"), "{err}");
    let (code, _, err) = run(&["token", "revoke", "first", "--database", db]);
    assert_eq!(code, 2, "{err}");

    // The revoked token authenticates nobody; the other one still does.
    runtime.block_on(async {
        let store = Backend::open(Path::new(db), 2).await.unwrap();
        assert!(store.authenticate(&token).await.unwrap().is_none());
        assert!(store.authenticate(other.trim()).await.unwrap().is_some());
        assert!(store.verify_integrity().await.unwrap().ok());
        store.close().await;
    });
    drop(database);
}

#[test]
fn token_sync_applies_a_tokens_file_and_a_bad_file_changes_nothing() {
    // On the database the service tests run on (HENRYBOOK_TEST_BACKEND).
    let runtime = tokio::runtime::Runtime::new().unwrap();
    let database = runtime.block_on(TestDatabase::new());
    let location = database.location();
    let db = location.to_str().unwrap();
    let dir = temp_dir("token-sync");
    let file = dir.join("tokens");
    let path = file.to_str().unwrap();
    let (lead, tool) = ("a1".repeat(32), "b2".repeat(32));
    std::fs::write(
        &file,
        format!("# the lab's tokens\nengineer lead {lead}\nreader tool {tool}\n"),
    )
    .unwrap();
    let (code, out, err) = run(&["token", "sync", "--file", path, "--database", db]);
    assert_eq!(code, 0, "{err}");
    assert!(
        out.contains("2 added, 0 changed, 0 revoked, 0 unchanged"),
        "{out}"
    );
    assert!(!out.contains(&lead), "a token is never printed");

    // tool is dropped from the file: revoked. lead moves to reader.
    std::fs::write(&file, format!("reader lead {lead}\n")).unwrap();
    let (code, out, err) = run(&["token", "sync", "--file", path, "--database", db]);
    assert_eq!(code, 0, "{err}");
    assert!(
        out.contains("0 added, 1 changed, 1 revoked, 0 unchanged; changed: lead (reader); revoked: tool (reader)"),
        "{out}"
    );
    let (_, out, _) = run(&["token", "list", "--database", db]);
    let rows: Vec<Vec<&str>> = out
        .lines()
        .skip(1)
        .map(|l| l.split_whitespace().collect())
        .collect();
    assert_eq!(rows.len(), 2, "{out}");
    assert_eq!(
        (rows[0][1], rows[0][4], rows[0][5], rows[0][6]),
        ("reader", "-", "file", "lead")
    );
    assert!(
        henrybook::store::parse_rfc3339(rows[1][4]).is_some(),
        "tool is revoked: {out}"
    );

    // A file with an error on line 2: exit status 1 naming the line, and nothing changes.
    std::fs::write(
        &file,
        format!("engineer lead {lead}\nengineer short 1234\n"),
    )
    .unwrap();
    let (code, _, err) = run(&["token", "sync", "--file", path, "--database", db]);
    assert_eq!(code, 1);
    assert!(
        err.contains(&format!(
            "the tokens file {path}, line 2: the token of short has 4 characters"
        )),
        "{err}"
    );
    let (_, after, _) = run(&["token", "list", "--database", db]);
    assert_eq!(after, out, "the bad file changed nothing");
    let (code, _, err) = run(&[
        "token",
        "sync",
        "--file",
        "/nonexistent/tokens",
        "--database",
        db,
    ]);
    assert_eq!(code, 1);
    assert!(
        err.contains("cannot open the tokens file /nonexistent/tokens"),
        "{err}"
    );

    runtime.block_on(async {
        let store = Backend::open(&location, 2).await.unwrap();
        let caller = store.authenticate(&lead).await.unwrap().unwrap();
        assert_eq!((caller.role, caller.label.as_str()), (Role::Reader, "lead"));
        assert!(store.authenticate(&tool).await.unwrap().is_none());
        assert!(store.verify_integrity().await.unwrap().ok());
        store.close().await;
    });
    drop(database);
    std::fs::remove_dir_all(dir).ok();
}

#[test]
fn migrate_brings_a_new_file_and_a_postgres_database_to_the_current_schema() {
    let dir = temp_dir("migrate");
    let db = dir.join("fresh.db");
    let (code, out, err) = run(&["migrate", "--database", db.to_str().unwrap()]);
    assert_eq!(code, 0, "{err}");
    let versions = henrybook::store::MIGRATOR.iter().count();
    assert!(db.exists(), "the file is created");
    assert!(
        out.contains(&format!("{versions} migrations applied")),
        "{out}"
    );
    // Again, named as a `sqlite:` URL: nothing left to apply, the same versions.
    let url = format!("sqlite:{}", db.display());
    let (code, again, _) = run(&["migrate", "--database", &url]);
    assert_eq!(code, 0);
    assert_eq!(
        again.split_once(": ").unwrap().1,
        out.split_once(": ").unwrap().1
    );

    // PostgreSQL, on a database of the test server (the same versions: the two migration folders are
    // held to each other by a unit test); a second run applies nothing and says so the same way.
    let runtime = tokio::runtime::Runtime::new().unwrap();
    let pg = runtime.block_on(henrybook_tests::pg::TestDb::new());
    for _ in 0..2 {
        let (code, out, err) = run(&["migrate", "--database", &pg.url]);
        assert_eq!(code, 0, "{err}");
        assert!(
            out.starts_with(&format!("{}: ", pg.url))
                && out.contains(&format!("{versions} migrations applied")),
            "{out}"
        );
    }
    // A `sqlite:` URL's parameters: mode=rw opens only a file that exists; mode=ro and anything
    // else are refused with the reason, and no file is made.
    let rw = format!("sqlite:{}?mode=rw", db.display());
    let (code, out, err) = run(&["migrate", "--database", &rw]);
    assert_eq!(code, 0, "{err}");
    assert!(
        out.contains(&format!("{versions} migrations applied")),
        "{out}"
    );
    let missing = dir.join("missing.db");
    for (url, reason) in [
        (
            format!("sqlite:{}?mode=rw", missing.display()),
            "mode=rw does not create one",
        ),
        (
            format!("sqlite:{}?mode=ro", missing.display()),
            "mode=ro is refused",
        ),
        (
            format!("sqlite:{}?journal=off", missing.display()),
            "\"journal=off\" is not one",
        ),
        ("sqlite::memory:".to_string(), "in-memory database"),
    ] {
        let (code, _, err) = run(&["migrate", "--database", &url]);
        assert_eq!(code, 1, "{url}");
        assert!(err.contains(reason), "{url}: {err}");
        assert!(!missing.exists(), "{url} made the file");
    }
    // Percent-decoded: a space in the file's name.
    let spaced = format!("sqlite:{}/with%20space.db", dir.display());
    let (code, _, err) = run(&["migrate", "--database", &spaced]);
    assert_eq!(code, 0, "{err}");
    assert!(dir.join("with space.db").exists());

    // An unreachable server is an error with the reason, exit status 1.
    let (code, _, err) = run(&[
        "migrate",
        "--database",
        "postgres://postgres@127.0.0.1:1/none",
    ]);
    assert_eq!(code, 1);
    assert!(err.contains("cannot connect to PostgreSQL"), "{err}");
    // A pool of no connections is refused before anything is opened.
    let (code, _, err) = run(&[
        "migrate",
        "--database",
        &pg.url,
        "--database-connections",
        "0",
    ]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("--database-connections"), "{err}");
    drop(pg);
    std::fs::remove_dir_all(dir).ok();
}
