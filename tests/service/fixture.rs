//! Fixture compensation on upload, over real HTTP: a DUT sweep measured through a fixture, with the
//! fixture's open and short sweeps, is compensated before the fit; bad fixture uploads are refused
//! before anything is stored. The sweeps are synthetic, made from a known model (invented values).

use henrybook::model::{ImpedanceModel, LumpedModel};
use henrybook_tests::service::{TestApp, simple_model, spawn_app};
use num_complex::Complex64;
use serde_json::{Value, json};
use std::f64::consts::PI;
use std::time::Duration;

const FIT_TIMEOUT: Duration = Duration::from_secs(60);
const F_MIN_HZ: f64 = 1e3;
const F_MAX_HZ: f64 = 100e6;
const POINTS: usize = 401;

/// An L-shaped test fixture (invented values): series Zs = 50 mΩ + jω·5 nH on the instrument side,
/// stray Yo = jω·2 pF across the part. Measured through it, Zxm = Zs + 1/(Yo + 1/Zdut); the open reads
/// Zs + 1/Yo, the short Zs (common practice, no source).
fn zs(f: f64) -> Complex64 {
    Complex64::new(0.05, 2.0 * PI * f * 5e-9)
}
fn yo(f: f64) -> Complex64 {
    Complex64::new(0.0, 2.0 * PI * f * 2e-12)
}

fn frequencies() -> Vec<f64> {
    (0..POINTS)
        .map(|i| F_MIN_HZ * (F_MAX_HZ / F_MIN_HZ).powf(i as f64 / (POINTS - 1) as f64))
        .collect()
}

/// Impedance CSV of `z(f)` on `freqs` with σ = 0.2 % of |Z|.
fn csv(freqs: &[f64], z: impl Fn(f64) -> Complex64) -> Vec<u8> {
    let mut out = String::from("frequency_hz,z_real_ohm,z_imag_ohm,sigma_ohm\n");
    for &f in freqs {
        let v = z(f);
        out.push_str(&format!(
            "{f:.9e},{:.12e},{:.12e},{:.6e}\n",
            v.re,
            v.im,
            2e-3 * v.norm()
        ));
    }
    out.into_bytes()
}

fn dut() -> LumpedModel {
    simple_model(10e-6, 0.05, 5e-12)
}

fn measured(freqs: &[f64]) -> Vec<u8> {
    let m = dut();
    csv(freqs, |f| zs(f) + (yo(f) + m.impedance(f).inv()).inv())
}
fn open(freqs: &[f64]) -> Vec<u8> {
    csv(freqs, |f| zs(f) + yo(f).inv())
}
fn short(freqs: &[f64]) -> Vec<u8> {
    csv(freqs, zs)
}

async fn upload_with_fixture(
    app: &TestApp,
    file: Vec<u8>,
    fixture: &[(&str, &str, Vec<u8>)],
    fields: &[(&str, &str)],
) -> reqwest::Response {
    let mut form = reqwest::multipart::Form::new().part(
        "file",
        reqwest::multipart::Part::bytes(file).file_name("dut.csv"),
    );
    for (field, name, bytes) in fixture {
        form = form.part(
            field.to_string(),
            reqwest::multipart::Part::bytes(bytes.clone()).file_name(name.to_string()),
        );
    }
    for (k, v) in fields {
        form = form.text(k.to_string(), v.to_string());
    }
    app.client
        .post(app.url("/api/v1/sweeps"))
        .bearer_auth(&app.inspector)
        .multipart(form)
        .send()
        .await
        .expect("request")
}

fn model_of(fit: &Value) -> &Value {
    &fit["report"]["model"]
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_sweep_with_open_and_short_fixture_sweeps_is_fitted_compensated() {
    let app = spawn_app().await;
    app.create_part("FX-1", json!({})).await;
    let f = frequencies();
    let fields = [
        ("part_number", "FX-1"),
        ("lot", "A"),
        ("method", "direct"),
        ("fixture_topology", "series-then-shunt"),
    ];
    let fixture = [
        ("fixture_open", "open.csv", open(&f)),
        ("fixture_short", "short.csv", short(&f)),
    ];

    let r = upload_with_fixture(&app, measured(&f), &fixture, &fields).await;
    assert_eq!(r.status(), 202, "{}", r.text().await.unwrap_or_default());
    let id = r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap();
    let fit = app.wait_for_fit(id, FIT_TIMEOUT).await;
    assert_eq!(fit["status"], "succeeded", "{fit}");
    // The exact L-fixture form removes the fixture: the part's own 10 µH, 5 pF, 50 mΩ come back
    // (Thomson SRF 1/(2π√(10 µH · 5 pF)) = 22.508 MHz, TOOLBOX reference value).
    let m = model_of(&fit);
    assert!(
        (m["l0_h"].as_f64().unwrap() / 10e-6 - 1.0).abs() < 1e-3,
        "{m}"
    );
    assert!(
        (m["cp_f"].as_f64().unwrap() / 5e-12 - 1.0).abs() < 5e-3,
        "{m}"
    );
    assert!(
        (m["rdc_ohm"].as_f64().unwrap() / 0.05 - 1.0).abs() < 0.03,
        "{m}"
    );
    assert!((fit["srf_hz"].as_f64().unwrap() / 22.508e6 - 1.0).abs() < 2e-3);
    // The curves the dashboard draws are the compensated ones too.
    let curves = app
        .get_json(&format!("/api/v1/fits/{id}/curves"), &app.reader)
        .await;
    let k = 200;
    let fk = curves["frequency_hz"][k].as_f64().unwrap();
    let want = dut().impedance(fk);
    let re = curves["measured_z_real_ohm"][k].as_f64().unwrap();
    let im = curves["measured_z_imag_ohm"][k].as_f64().unwrap();
    assert!(
        (Complex64::new(re, im) - want).norm() < 1e-6 * want.norm(),
        "at {fk} Hz: {re} {im} vs {want}"
    );

    // Without the fixture sweeps the stray 2 pF is fitted as part of the part: Cp ≈ 7 pF.
    let r = app
        .upload(
            "dut.csv",
            measured(&f),
            &[("part_number", "FX-1"), ("lot", "B"), ("method", "direct")],
        )
        .await;
    assert_eq!(r.status(), 202);
    let raw = r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap();
    let raw = app.wait_for_fit(raw, FIT_TIMEOUT).await;
    let cp_raw = model_of(&raw)["cp_f"].as_f64().unwrap();
    assert!(
        (cp_raw / 7e-12 - 1.0).abs() < 0.02,
        "uncompensated Cp {cp_raw}"
    );

    // The same files again are a duplicate; the same files with another topology are a new fit.
    let again = upload_with_fixture(&app, measured(&f), &fixture, &fields).await;
    let again: Value = again.json().await.unwrap();
    assert_eq!(again["duplicate"], true);
    assert_eq!(again["fit_id"], id);
    let approx = upload_with_fixture(
        &app,
        measured(&f),
        &fixture,
        &[
            ("part_number", "FX-1"),
            ("lot", "A"),
            ("method", "direct"),
            ("fixture_topology", "approximate"),
        ],
    )
    .await;
    let approx: Value = approx.json().await.unwrap();
    assert_eq!(approx["duplicate"], false, "{approx}");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bad_fixture_uploads_are_refused_and_nothing_is_stored() {
    let app = spawn_app().await;
    app.create_part("FX-2", json!({})).await;
    let f = frequencies();
    let ok = [("part_number", "FX-2"), ("lot", "A"), ("method", "direct")];
    let coarse: Vec<f64> = f.iter().step_by(2).copied().collect();
    let mut broken = open(&f);
    let line_7 = broken
        .split(|&b| b == b'\n')
        .take(6)
        .map(|l| l.len() + 1)
        .sum::<usize>();
    broken.splice(line_7..line_7 + 3, b"xyz".iter().copied());
    type Case<'a> = (
        &'a str,
        Vec<(&'a str, &'a str, Vec<u8>)>,
        Vec<(&'a str, &'a str)>,
        &'a str,
    );
    let cases: Vec<Case> = vec![
        (
            "an open without a short",
            vec![("fixture_open", "open.csv", open(&f))],
            ok.to_vec(),
            "both fixture_open and fixture_short",
        ),
        (
            "an unknown topology",
            vec![
                ("fixture_open", "open.csv", open(&f)),
                ("fixture_short", "short.csv", short(&f)),
            ],
            [ok.as_slice(), &[("fixture_topology", "diagonal")]].concat(),
            "fixture_topology must be one of",
        ),
        (
            "a topology without fixture files",
            vec![],
            [ok.as_slice(), &[("fixture_topology", "approximate")]].concat(),
            "without the fixture_open and fixture_short files",
        ),
        (
            "a short on another frequency grid",
            vec![
                ("fixture_open", "open.csv", open(&f)),
                ("fixture_short", "short-coarse.csv", short(&coarse)),
            ],
            ok.to_vec(),
            "compensation needs one frequency grid",
        ),
        (
            "a broken open file",
            vec![
                ("fixture_open", "open-broken.csv", broken),
                ("fixture_short", "short.csv", short(&f)),
            ],
            ok.to_vec(),
            "open-broken.csv: ",
        ),
        (
            "an empty short file",
            vec![
                ("fixture_open", "open.csv", open(&f)),
                ("fixture_short", "short.csv", Vec::new()),
            ],
            ok.to_vec(),
            "short.csv is empty",
        ),
    ];
    for (what, fixture, fields, detail) in cases {
        let r = upload_with_fixture(&app, measured(&f), &fixture, &fields).await;
        assert_eq!(r.status(), 422, "{what}");
        let body: Value = r.json().await.unwrap();
        let text = body["detail"].as_str().unwrap_or_default();
        assert!(text.contains(detail), "{what}: {body}");
        if what == "a broken open file" {
            assert_eq!(body["line"], 7, "{body}");
        }
    }
    let q = app.get_json("/api/v1/queue", &app.reader).await;
    assert_eq!(
        q,
        json!({"queued": 0, "running": 0, "succeeded": 0, "failed": 0, "cancelled": 0})
    );
    let part = app.get_json("/api/v1/parts/FX-2", &app.reader).await;
    assert!(part["lots"].as_array().unwrap().is_empty());
    app.stop().await;
}
