//! The registry service over real HTTP: a real server on a random loopback port with its own
//! temporary database. Sweeps here are the invented demo files or synthetic sweeps made from a known
//! model (marked where used).

use henrybook::model::{Section, SectionKind};
use henrybook_tests::repo_root;
use henrybook_tests::service::{
    TestApp, TestBackend, TestDatabase, simple_model, spawn_app, spawn_app_with, synthetic_csv,
};
use serde_json::{Value, json};
use std::sync::Arc;
use std::time::Duration;

const FIT_TIMEOUT: Duration = Duration::from_secs(60);

fn demo_file(rel: &str) -> Vec<u8> {
    std::fs::read(repo_root().join("demo-data").join(rel)).expect("demo file")
}

async fn upload_synthetic(app: &TestApp, part: &str, lot: &str, csv: Vec<u8>) -> i64 {
    let r = app
        .upload(
            &format!("{part}-{lot}.csv"),
            csv,
            &[("part_number", part), ("lot", lot), ("method", "direct")],
        )
        .await;
    assert_eq!(r.status(), 202, "{}", r.text().await.unwrap_or_default());
    let body: Value = r.json().await.unwrap();
    body["fit_id"].as_i64().unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_service_runs_on_the_database_the_suite_was_asked_for() {
    // HENRYBOOK_TEST_BACKEND picks the store: the application and the second handle are on it, and
    // on the same database (what the API stores, the handle reads).
    let app = spawn_app().await;
    let expected = match TestBackend::chosen() {
        TestBackend::Sqlite => "sqlite",
        TestBackend::Postgres => "postgres",
    };
    assert_eq!(app.store.kind(), expected);
    assert_eq!(app.database.backend(), TestBackend::chosen());
    app.create_part("K-1", json!({"dcr_max_ohm": 0.2})).await;
    let part = app
        .store
        .part(&henrybook::registry::ids::PartNumber::parse("K-1").unwrap())
        .await
        .unwrap();
    assert_eq!(part.part_number, "K-1");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn text_with_a_nul_character_is_refused_alike_on_both_backends_and_nothing_is_stored() {
    // PostgreSQL cannot store U+0000 in text (SQLite can): both refuse it as a bad input (422), never
    // a server error. Found by schemathesis on PostgreSQL (a rejection reason holding one).
    let app = spawn_app().await;
    let r = app
        .post_json(
            "/api/v1/parts",
            &app.engineer,
            &json!({"part_number": "N-1", "description": "choke\u{0}x"}),
        )
        .await;
    assert_eq!(r.status(), 422);
    let body: Value = r.json().await.unwrap();
    assert!(body["detail"].as_str().unwrap().contains("NUL"), "{body}");
    assert_eq!(
        app.get("/api/v1/parts/N-1", &app.reader).await.status(),
        404
    );

    app.create_part("N-1", json!({})).await;
    let f = upload_synthetic(
        &app,
        "N-1",
        "1",
        synthetic_csv(&simple_model(1e-5, 0.05, 5e-12), 1e4, 1e8, 201),
    )
    .await;
    assert_eq!(
        app.wait_for_fit(f, FIT_TIMEOUT).await["status"],
        "succeeded"
    );
    for action in ["reject", "approve"] {
        let r = app
            .post_json(
                &format!("/api/v1/fits/{f}/{action}"),
                &app.engineer,
                &json!({"reason": "bad\u{0}reason"}),
            )
            .await;
        assert_eq!(r.status(), 422, "{action}");
    }
    let fit = app
        .get_json(&format!("/api/v1/fits/{f}"), &app.reader)
        .await;
    assert_eq!(fit["approval"], Value::Null, "{fit}");
    let r = app
        .post_json(
            &format!("/api/v1/fits/{f}/reject"),
            &app.engineer,
            &json!({"reason": "out of family"}),
        )
        .await;
    assert_eq!(r.status(), 200);
    // A search text is never stored, but PostgreSQL refuses it as a parameter all the same.
    let r = app.get("/api/v1/parts?q=ch%00oke", &app.reader).await;
    assert_eq!(r.status(), 422);
    app.stop().await;
}

fn numbers(v: &Value) -> Vec<String> {
    v["items"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["part_number"].as_str().unwrap().to_string())
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_uploaded_sweep_is_fitted_and_its_result_can_be_polled_and_downloaded() {
    // Arrange
    let app = spawn_app().await;
    app.create_part(
        "OMW-L10U-BK",
        json!({"l_nominal_h": 1e-5, "l_test_frequency_hz": 1e5, "l_tolerance_percent": 20,
               "dcr_max_ohm": 0.018, "srf_min_hz": 1.2e7}),
    )
    .await;
    let bytes = demo_file("OMW-L10U-BK/lot-2611A_shunt-thru.s2p");
    let fields = [
        ("part_number", "OMW-L10U-BK"),
        ("lot", "2611A"),
        ("method", "shunt-thru"),
        ("z0_ohm", "50"),
        ("dcr_ohm", "0.0119"),
        ("temperature_c", "23"),
        ("operator", "A. Marsh"),
    ];

    // Act
    let r = app
        .upload("lot-2611A_shunt-thru.s2p", bytes.clone(), &fields)
        .await;

    // Assert
    assert_eq!(r.status(), 202);
    let accepted: Value = r.json().await.unwrap();
    assert_eq!(accepted["duplicate"], false);
    let fit_id = accepted["fit_id"].as_i64().unwrap();
    assert_eq!(accepted["status_url"], format!("/api/v1/fits/{fit_id}"));
    let fit = app.wait_for_fit(fit_id, FIT_TIMEOUT).await;
    assert_eq!(fit["status"], "succeeded", "{fit}");
    assert_eq!(fit["progress"], 1.0);
    assert_eq!(fit["revision"], 1);
    assert_eq!(fit["method"], "shunt-thru");
    assert!(fit["report"]["model"].is_object());
    assert!(fit["srf_hz"].as_f64().unwrap() > 1e6);
    assert_eq!(fit["verdict_checks"].as_array().unwrap().len(), 3);
    assert!(fit["verdict"] == "pass" || fit["verdict"] == "fail");
    assert_eq!(fit["options"]["dcr"]["value_ohm"], 0.0119);
    // The stored file is the uploaded one, byte for byte, with its SHA-256.
    let sweep_id = fit["sweep_id"].as_i64().unwrap();
    let stored = app
        .get(&format!("/api/v1/sweeps/{sweep_id}/file"), &app.reader)
        .await
        .bytes()
        .await
        .unwrap();
    assert_eq!(stored.as_ref(), bytes.as_slice());
    assert_eq!(fit["sha256"], henrybook::store::sha256_hex(&bytes));
    // Curves: measured and model on the same grid.
    let c = app
        .get_json(&format!("/api/v1/fits/{fit_id}/curves"), &app.reader)
        .await;
    let n = c["frequency_hz"].as_array().unwrap().len();
    assert!(n > 100);
    for k in [
        "measured_z_real_ohm",
        "measured_z_imag_ohm",
        "sigma_ohm",
        "model_z_real_ohm",
        "model_z_imag_ohm",
    ] {
        assert_eq!(c[k].as_array().unwrap().len(), n, "{k}");
    }
    // Downloads.
    let model = app
        .get_json(&format!("/api/v1/fits/{fit_id}/model.json"), &app.reader)
        .await;
    assert_eq!(model["kind"], "lumped");
    // It says where it is valid and where it came from.
    assert_eq!(model["band_hz"], json!([1e3, 2e8]), "the sweep's band");
    assert_eq!(model["provenance"]["fit_id"], fit_id);
    assert_eq!(model["provenance"]["quality"], "ok");
    assert_eq!(
        model["provenance"]["sweep_sha256"].as_str().map(str::len),
        Some(64)
    );
    let netlist = app
        .get(&format!("/api/v1/fits/{fit_id}/netlist.cir"), &app.reader)
        .await;
    assert_eq!(netlist.status(), 200);
    assert!(
        netlist
            .text()
            .await
            .unwrap()
            .to_lowercase()
            .contains(".subckt")
    );
    let s1p = app
        .get(&format!("/api/v1/fits/{fit_id}/model.s1p"), &app.reader)
        .await;
    assert_eq!(s1p.status(), 200);
    assert!(s1p.text().await.unwrap().contains('#'));
    // The same file with the same options again: recognised, not fitted twice.
    let again: Value = app
        .upload("lot-2611A_shunt-thru.s2p", bytes, &fields)
        .await
        .json()
        .await
        .unwrap();
    assert_eq!(again["duplicate"], true);
    assert_eq!(again["fit_id"], fit_id);
    let q = app.get_json("/api/v1/queue", &app.reader).await;
    assert_eq!(q["succeeded"], 1);
    // Ops: readiness and the Prometheus text with queue depth, fits, fit time and HTTP latency.
    let ready: Value = app
        .client
        .get(app.url("/readyz"))
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap();
    assert_eq!(ready["database"], true);
    assert_eq!(ready["migrations"], true);
    assert_eq!(ready["audit_chain"], true);
    assert_eq!(ready["audit_head_hash"].as_str().map(str::len), Some(64));
    let metrics = app
        .client
        .get(app.url("/metrics"))
        .send()
        .await
        .unwrap()
        .text()
        .await
        .unwrap();
    for name in [
        "henrybook_queue_depth",
        "henrybook_fits_total",
        "henrybook_fit_duration_seconds_bucket",
        "henrybook_http_request_duration_seconds_bucket",
    ] {
        assert!(metrics.contains(name), "{name} missing from /metrics");
    }
    let r = app.get("/api/v1/queue", &app.reader).await;
    assert!(r.headers().contains_key("x-request-id"));
    assert_eq!(q["queued"], 0);
    // Status list with filters.
    let list = app
        .get_json(
            "/api/v1/fits?status=succeeded&part_number=OMW-L10U-BK&lot=2611A",
            &app.reader,
        )
        .await;
    assert_eq!(list["items"].as_array().unwrap().len(), 1);
    let none = app
        .get_json("/api/v1/fits?since=2999-01-01T00:00:00Z", &app.reader)
        .await;
    assert!(none["items"].as_array().unwrap().is_empty());
    // What the OpenAPI document refuses, the service refuses too: an empty time, a frequency past the
    // stored grid (100 Hz to 10 GHz).
    for path in [
        "/api/v1/fits?since=",
        "/api/v1/parts?l_at_hz=10000000001&l_min_h=1e-6",
        "/api/v1/parts?l_at_hz=99",
    ] {
        let r = app
            .client
            .get(app.url(path))
            .bearer_auth(&app.reader)
            .send()
            .await
            .unwrap();
        assert_eq!(r.status(), 422, "{path}");
    }
    app.stop().await;
}

/// (method, path, least role); `None` = no token needed.
fn routes() -> Vec<(&'static str, String, Option<usize>)> {
    let (r, i, e) = (Some(0), Some(1), Some(2));
    vec![
        ("GET", "/api/v1/whoami".into(), r),
        ("GET", "/api/v1/queue".into(), r),
        ("GET", "/api/v1/fits".into(), r),
        ("GET", "/api/v1/fits/1".into(), r),
        ("GET", "/api/v1/fits/1/curves".into(), r),
        ("POST", "/api/v1/fits/1/cancel".into(), i),
        ("POST", "/api/v1/fits/1/retry".into(), i),
        ("POST", "/api/v1/fits/1/refit".into(), e),
        ("POST", "/api/v1/fits/1/approve".into(), e),
        ("POST", "/api/v1/fits/1/reject".into(), e),
        ("GET", "/api/v1/fits/1/model.json".into(), r),
        ("GET", "/api/v1/fits/1/netlist.cir".into(), r),
        ("GET", "/api/v1/fits/1/model.s1p".into(), r),
        ("GET", "/api/v1/sweeps/1/file".into(), r),
        ("POST", "/api/v1/sweeps".into(), i),
        ("GET", "/api/v1/parts".into(), r),
        ("POST", "/api/v1/parts".into(), e),
        ("GET", "/api/v1/parts/P-1".into(), r),
        ("PUT", "/api/v1/parts/P-1/limits".into(), e),
        ("GET", "/api/v1/parts/P-1/trend".into(), r),
        ("GET", "/api/v1/fits/1/report".into(), r),
        ("GET", "/api/v1/fits/1/report.pdf".into(), r),
    ]
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_route_admits_exactly_its_roles_and_refuses_no_token() {
    let app = spawn_app().await;
    let tokens = app.tokens();
    for (method, path, least) in routes() {
        let least = least.unwrap();
        let send = |token: Option<&str>| {
            let m = reqwest::Method::from_bytes(method.as_bytes()).unwrap();
            let mut req = app.client.request(m, app.url(&path));
            if let Some(t) = token {
                req = req.bearer_auth(t);
            }
            req.send()
        };
        let r = send(None).await.unwrap();
        assert_eq!(r.status(), 401, "{method} {path} without a token");
        assert_eq!(
            r.headers()["content-type"],
            "application/problem+json",
            "{method} {path}"
        );
        let body: Value = r.json().await.unwrap();
        assert_eq!(body["type"], "urn:henrybook:problem:unauthorized");
        let bad = send(Some("hbk_not-a-token")).await.unwrap();
        assert_eq!(bad.status(), 401, "{method} {path} with an unknown token");
        for (role, token) in tokens.iter().enumerate() {
            let r = send(Some(token)).await.unwrap();
            let status = r.status().as_u16();
            if role < least {
                assert_eq!(status, 403, "{method} {path} as role {role}");
                let body: Value = r.json().await.unwrap();
                assert_eq!(body["type"], "urn:henrybook:problem:forbidden");
            } else {
                assert!(
                    status != 401 && status != 403,
                    "{method} {path} as role {role} gave {status}"
                );
            }
        }
    }
    for path in ["/healthz", "/readyz", "/metrics"] {
        let r = app.client.get(app.url(path)).send().await.unwrap();
        assert_eq!(r.status(), 200, "{path} needs no token");
    }
    let who = app.get_json("/api/v1/whoami", &app.engineer).await;
    assert_eq!(who["role"], "engineer");
    // The scheme name is case-insensitive (RFC 9110 §11.1); other schemes are refused.
    for (header, status) in [
        (format!("bearer {}", app.engineer), 200),
        (format!("BEARER {}", app.engineer), 200),
        (format!("Basic {}", app.engineer), 401),
        (format!("Bearer{}", app.engineer), 401),
    ] {
        let r = app
            .client
            .get(app.url("/api/v1/whoami"))
            .header("authorization", &header)
            .send()
            .await
            .unwrap();
        assert_eq!(r.status(), status, "{}", &header[..8]);
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_token_records_when_it_last_authenticated_a_request_at_most_once_a_minute() {
    use henrybook::store::now_ms;
    use henrybook::store::tokens::Role;
    let app = spawn_app().await;
    let last_used = |tokens: &[henrybook::store::tokens::TokenInfo], role: Role| {
        tokens
            .iter()
            .find(|t| t.role == role)
            .unwrap()
            .last_used_at_ms
    };
    let tokens = app.store.list_tokens().await.unwrap();
    assert!(tokens.iter().all(|t| t.last_used_at_ms.is_none()));

    let before = now_ms();
    let who = app.get_json("/api/v1/whoami", &app.reader).await;
    assert_eq!(who["role"], "reader");
    // A token whose role is too low for the route still authenticated the request.
    let r = app
        .post_json(
            "/api/v1/parts",
            &app.inspector,
            &json!({"part_number": "U-1"}),
        )
        .await;
    assert_eq!(r.status(), 403);
    let after = now_ms();
    let tokens = app.store.list_tokens().await.unwrap();
    let reader = last_used(&tokens, Role::Reader).expect("the reader's request is recorded");
    assert!((before..=after).contains(&reader), "{reader}");
    let inspector = last_used(&tokens, Role::Inspector).expect("the refused request too");
    assert!((before..=after).contains(&inspector), "{inspector}");
    assert_eq!(last_used(&tokens, Role::Engineer), None);

    // Polls within the minute do not write it again (a write now would store a later time).
    tokio::time::sleep(Duration::from_millis(20)).await;
    for _ in 0..5 {
        app.get_json("/api/v1/whoami", &app.reader).await;
    }
    let tokens = app.store.list_tokens().await.unwrap();
    assert_eq!(last_used(&tokens, Role::Reader), Some(reader));
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn malformed_uploads_are_refused_with_a_problem_and_nothing_is_stored() {
    let db = TestDatabase::new().await;
    let mut settings = db.settings();
    settings.max_body_bytes = 64 * 1024;
    let app = spawn_app_with(db, settings, Arc::new(henrybook::jobs::CoreEngine), None).await;
    app.create_part("P-1", json!({})).await;
    let good = demo_file("OMW-L47U-GD/lot-2618A_analyser.csv");
    let ok = [("part_number", "P-1"), ("lot", "L1"), ("method", "direct")];
    let junk_line_3 = b"# comment\nfrequency_hz,z_real_ohm,z_imag_ohm\n1000,abc,2\n".to_vec();
    // A valid file that reads (the impedance command converts it) but is too short to fit.
    let five_points: Vec<u8> = std::iter::once("frequency_hz,z_real_ohm,z_imag_ohm\n".to_string())
        .chain((1..=5).map(|k| format!("{},0.1,{}\n", 1000 * k, 0.3 * k as f64)))
        .collect::<String>()
        .into_bytes();
    type Case<'a> = (
        &'a str,
        &'a str,
        Vec<u8>,
        Vec<(&'a str, &'a str)>,
        u16,
        &'a str,
    );
    let cases: Vec<Case> = vec![
        (
            "empty file",
            "a.csv",
            vec![],
            ok.to_vec(),
            422,
            "bad-sweep-file",
        ),
        (
            "junk on line 3",
            "a.csv",
            junk_line_3,
            ok.to_vec(),
            422,
            "bad-sweep-file",
        ),
        (
            "too short to fit",
            "five-points.csv",
            five_points,
            ok.to_vec(),
            422,
            "bad-sweep-file",
        ),
        (
            "binary junk",
            "a.s1p",
            vec![0xff, 0x00, 0x13, 0x37],
            ok.to_vec(),
            422,
            "bad-sweep-file",
        ),
        (
            "unknown part",
            "a.csv",
            good.clone(),
            vec![("part_number", "NOPE"), ("lot", "L1"), ("method", "direct")],
            422,
            "validation",
        ),
        (
            "bad part number",
            "a.csv",
            good.clone(),
            vec![("part_number", "has space"), ("lot", "L1")],
            422,
            "validation",
        ),
        (
            "missing lot",
            "a.csv",
            good.clone(),
            vec![("part_number", "P-1")],
            422,
            "validation",
        ),
        (
            "unknown method",
            "a.csv",
            good.clone(),
            vec![
                ("part_number", "P-1"),
                ("lot", "L1"),
                ("method", "sideways"),
            ],
            422,
            "validation",
        ),
        (
            "negative z0",
            "a.csv",
            good.clone(),
            vec![("part_number", "P-1"), ("lot", "L1"), ("z0_ohm", "-50")],
            422,
            "validation",
        ),
        (
            "text dcr",
            "a.csv",
            good.clone(),
            vec![("part_number", "P-1"), ("lot", "L1"), ("dcr_ohm", "low")],
            422,
            "validation",
        ),
        (
            "impossible temperature",
            "a.csv",
            good.clone(),
            vec![
                ("part_number", "P-1"),
                ("lot", "L1"),
                ("temperature_c", "-300"),
            ],
            422,
            "validation",
        ),
        (
            "options not JSON",
            "a.csv",
            good.clone(),
            vec![("part_number", "P-1"), ("lot", "L1"), ("options", "{")],
            422,
            "validation",
        ),
        (
            "unknown option",
            "a.csv",
            good.clone(),
            vec![
                ("part_number", "P-1"),
                ("lot", "L1"),
                ("options", "{\"speed\": 3}"),
            ],
            422,
            "validation",
        ),
        (
            "unknown field",
            "a.csv",
            good.clone(),
            vec![("part_number", "P-1"), ("lot", "L1"), ("colour", "red")],
            422,
            "validation",
        ),
        (
            "too large",
            "a.csv",
            vec![b'1'; 100 * 1024],
            ok.to_vec(),
            413,
            "payload-too-large",
        ),
    ];
    for (what, name, bytes, fields, status, kind) in cases {
        let r = app.upload(name, bytes, &fields).await;
        assert_eq!(r.status().as_u16(), status, "{what}");
        assert_eq!(
            r.headers()["content-type"],
            "application/problem+json",
            "{what}"
        );
        let body: Value = r.json().await.unwrap();
        assert_eq!(
            body["type"],
            format!("urn:henrybook:problem:{kind}"),
            "{what}: {body}"
        );
        assert_eq!(body["status"], status, "{what}");
        if what == "junk on line 3" {
            assert_eq!(body["line"], 3, "{body}");
        }
        if what == "too short to fit" {
            let detail = body["detail"].as_str().unwrap();
            assert!(
                detail.starts_with("five-points.csv: ") && detail.contains("at least 20"),
                "{body}"
            );
        }
    }
    // A multipart body without a file at all.
    let r = app
        .client
        .post(app.url("/api/v1/sweeps"))
        .bearer_auth(&app.inspector)
        .multipart(reqwest::multipart::Form::new().text("part_number", "P-1"))
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 422);
    // A lot name that is not UTF-8 is refused, not stored with replacement characters.
    let r = app
        .client
        .post(app.url("/api/v1/sweeps"))
        .bearer_auth(&app.inspector)
        .multipart(
            reqwest::multipart::Form::new()
                .part(
                    "file",
                    reqwest::multipart::Part::bytes(good.clone()).file_name("a.csv"),
                )
                .text("part_number", "P-1")
                .part(
                    "lot",
                    reqwest::multipart::Part::bytes(vec![b'L', 0xff, 0xfe]),
                )
                .text("method", "direct"),
        )
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 422);
    assert!(
        r.text()
            .await
            .unwrap()
            .contains("the field lot is not UTF-8 text")
    );
    // Nothing stored: no sweep, no fit, no lot.
    let q = app.get_json("/api/v1/queue", &app.reader).await;
    assert_eq!(
        q,
        json!({"queued": 0, "running": 0, "succeeded": 0, "failed": 0, "cancelled": 0})
    );
    let part = app.get_json("/api/v1/parts/P-1", &app.reader).await;
    assert!(part["lots"].as_array().unwrap().is_empty());
    assert!(part["fits"].as_array().unwrap().is_empty());
    // Bad JSON elsewhere is a problem too, and a good upload still works afterwards.
    let r = app
        .client
        .post(app.url("/api/v1/parts"))
        .bearer_auth(&app.engineer)
        .body("{not json")
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 422);
    let r = app.upload("a.csv", good, &ok).await;
    assert_eq!(r.status(), 202);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn behavioural_queries_are_answered_from_stored_figures() {
    // Arrange: synthetic sweeps of known models (invented for this test).
    // Thomson f = 1/(2π√(LC)): Q-A 10 µH ‖ 5 pF → 22.508 MHz (TOOLBOX reference value);
    // Q-B 1 µH ‖ 2 pF → 112.54 MHz; Q-C 100 µH ‖ 10 pF → 5.033 MHz (computed by hand).
    let app = spawn_app().await;
    for p in ["Q-A", "Q-B", "Q-C", "Q-D"] {
        app.create_part(p, json!({})).await;
    }
    let a = upload_synthetic(
        &app,
        "Q-A",
        "1",
        synthetic_csv(&simple_model(1e-5, 0.05, 5e-12), 1e4, 1e8, 401),
    )
    .await;
    let b = upload_synthetic(
        &app,
        "Q-B",
        "1",
        synthetic_csv(&simple_model(1e-6, 0.01, 2e-12), 1e5, 1e9, 401),
    )
    .await;
    let c = upload_synthetic(
        &app,
        "Q-C",
        "1",
        synthetic_csv(&simple_model(1e-4, 0.3, 1e-11), 1e3, 5e7, 401),
    )
    .await;
    // Q-D: 10 µH, 5 pF and a series R–L–C branch (2 Ω, 50 nH, 2 pF): a |Z| notch near 500 MHz.
    let mut d_model = simple_model(1e-5, 0.05, 5e-12);
    d_model.sections.push(Section {
        kind: SectionKind::Series,
        r_ohm: 2.0,
        l_h: 5e-8,
        c_f: 2e-12,
    });
    let d = upload_synthetic(&app, "Q-D", "1", synthetic_csv(&d_model, 1e4, 1e9, 801)).await;
    for id in [a, b, c, d] {
        let f = app.wait_for_fit(id, FIT_TIMEOUT).await;
        assert_eq!(f["status"], "succeeded", "{f}");
    }
    let r = &app;
    let srf = |id: i64| async move {
        r.get_json(&format!("/api/v1/fits/{id}"), &r.reader).await["srf_hz"]
            .as_f64()
            .unwrap()
    };
    assert!((srf(a).await / 22.5079e6 - 1.0).abs() < 1e-3);
    assert!((srf(b).await / 112.54e6 - 1.0).abs() < 1e-3);
    assert!((srf(c).await / 5.0329e6 - 1.0).abs() < 1e-3);
    // Until something is approved, the figures come from the newest fits on request only.
    let q = |query: &str| {
        let path = format!("/api/v1/parts?answer_from=latest&{query}");
        async move { r.get_json(&path, &r.reader).await }
    };
    let as_is = |query: &str| {
        let path = format!("/api/v1/parts?{query}");
        async move { r.get_json(&path, &r.reader).await }
    };
    assert!(
        numbers(&as_is("").await).is_empty(),
        "the default is the approved baseline"
    );
    assert_eq!(as_is("").await["answer_from"], "approved");
    assert_eq!(q("").await["answer_from"], "latest");

    // SRF band.
    assert_eq!(numbers(&q("srf_min_hz=2e7&srf_max_hz=3e7").await), ["Q-A"]);
    assert_eq!(numbers(&q("srf_min_hz=1e8").await), ["Q-B"]);
    // Series resonance band: only Q-D has a |Z| notch, near 1/(2π√(50 nH · 2 pF)) = 503 MHz.
    let notch = q("series_resonance_min_hz=3e8&series_resonance_max_hz=8e8").await;
    assert_eq!(numbers(&notch), ["Q-D"], "{notch}");
    // Effective L at 100 kHz in 9..11 µH: Q-A and Q-D (10.0002 µH), not Q-B (1 µH) or Q-C (100 µH).
    let l = q("l_at_hz=1e5&l_min_h=9e-6&l_max_h=1.1e-5").await;
    assert_eq!(numbers(&l), ["Q-A", "Q-D"]);
    assert!((l["items"][0]["l_eff_h"].as_f64().unwrap() / 1e-5 - 1.0).abs() < 1e-3);
    // DCR at most 20 mΩ: Q-B (10 mΩ).
    assert_eq!(numbers(&q("dcr_max_ohm=0.02").await), ["Q-B"]);
    // |Z| ≥ 500 Ω over 1–2 MHz: only Q-C (|Z(1 MHz)| = 2π·1e6·1e-4/(1 − (1/5.033)²) ≈ 654 Ω);
    // Q-A and Q-D are about 63 Ω there, Q-B about 6.3 Ω.
    let z = q("z_min_ohm=500&z_band_min_hz=1e6&z_band_max_hz=2e6").await;
    assert_eq!(numbers(&z), ["Q-C"]);
    assert!((z["items"][0]["z_min_ohm"].as_f64().unwrap() - 654.0).abs() < 5.0);
    // A band outside a part's sweep does not count as passing: Q-C stops at 50 MHz.
    assert!(
        numbers(&q("z_min_ohm=1&z_band_min_hz=6e8&z_band_max_hz=9e8").await)
            .iter()
            .all(|p| p == "Q-B" || p == "Q-D")
    );
    // Sorted by SRF, descending, two per page.
    let p1 = q("sort=-srf_hz&limit=2").await;
    assert_eq!(numbers(&p1), ["Q-B", "Q-A"]);
    let cursor = p1["next_cursor"].as_str().unwrap().to_string();
    let p2 = q(&format!("sort=-srf_hz&limit=2&cursor={cursor}")).await;
    assert_eq!(numbers(&p2), ["Q-D", "Q-C"]);
    assert!(p2["next_cursor"].is_null());
    // Approved only: nothing until an engineer approves Q-A's fit.
    assert!(numbers(&as_is("approved_only=true").await).is_empty());
    let r = app
        .post_json(
            &format!("/api/v1/fits/{a}/approve"),
            &app.engineer,
            &json!({"reason": "first lot"}),
        )
        .await;
    assert_eq!(r.status(), 200);
    let approved = as_is("approved_only=true&srf_min_hz=1e6").await;
    assert_eq!(numbers(&approved), ["Q-A"]);
    assert_eq!(approved["items"][0]["approved_fit_id"], a);
    assert_eq!(numbers(&as_is("srf_min_hz=1e6").await), ["Q-A"]);
    // The newest passing fit skips a newer lot that fails its limits: Q-A gets DCR ≤ 60 mΩ and a
    // second lot of 100 mΩ; `latest` answers from lot 2, `latest-passing` from lot 1.
    let r2 = app
        .put_json(
            "/api/v1/parts/Q-A/limits",
            &app.engineer,
            &json!({"limits": {"dcr_max_ohm": 0.06}}),
        )
        .await;
    assert_eq!(r2.status(), 200);
    let a2 = upload_synthetic(
        &app,
        "Q-A",
        "2",
        synthetic_csv(&simple_model(1e-5, 0.1, 5e-12), 1e4, 1e8, 401),
    )
    .await;
    assert_eq!(app.wait_for_fit(a2, FIT_TIMEOUT).await["verdict"], "fail");
    let answered = |page: &Value| page["items"][0]["answered_from_fit_id"].clone();
    assert_eq!(answered(&as_is("q=Q-A&answer_from=latest").await), a2);
    assert_eq!(
        answered(&as_is("q=Q-A&answer_from=latest-passing").await),
        a
    );
    assert_eq!(answered(&as_is("q=Q-A").await), a);
    for bad in [
        "answer_from=newest",
        "answer_from=latest&approved_only=true",
    ] {
        let r = app.get(&format!("/api/v1/parts?{bad}"), &app.reader).await;
        assert_eq!(r.status(), 422, "{bad}");
    }
    // Bad queries are problems.
    for bad in [
        "l_min_h=1e-6",
        "z_min_ohm=3",
        "srf_min_hz=-1",
        "sort=colour",
        "cursor=zz",
        "limit=0",
        "l_at_hz=1",
    ] {
        let r = app.get(&format!("/api/v1/parts?{bad}"), &app.reader).await;
        assert_eq!(r.status(), 422, "{bad}");
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn verdicts_drift_approvals_and_refits_are_recorded() {
    // Synthetic sweeps (invented): lot 1 10 µH, lot 2 10.5 µH (+5 %), both 50 mΩ, 5 pF.
    let app = spawn_app().await;
    app.create_part(
        "V-1",
        json!({"l_nominal_h": 1e-5, "l_test_frequency_hz": 1e5, "l_tolerance_percent": 20,
               "dcr_max_ohm": 0.04, "srf_min_hz": 1.5e7}),
    )
    .await;
    let f1 = upload_synthetic(
        &app,
        "V-1",
        "1",
        synthetic_csv(&simple_model(1e-5, 0.05, 5e-12), 1e4, 1e8, 401),
    )
    .await;
    let f2 = upload_synthetic(
        &app,
        "V-1",
        "2",
        synthetic_csv(&simple_model(1.05e-5, 0.05, 5e-12), 1e4, 1e8, 401),
    )
    .await;
    let d1 = app.wait_for_fit(f1, FIT_TIMEOUT).await;
    app.wait_for_fit(f2, FIT_TIMEOUT).await;
    // DCR 50 mΩ against at most 40 mΩ: fails by 10 mΩ; L and SRF pass.
    assert_eq!(d1["verdict"], "fail");
    let checks = d1["verdict_checks"].as_array().unwrap();
    let dcr = checks.iter().find(|c| c["limit"] == "dcr_max").unwrap();
    assert_eq!(dcr["pass"], false);
    assert!((dcr["margin"].as_f64().unwrap() + 0.01).abs() < 1e-4);
    assert!(
        checks
            .iter()
            .filter(|c| c["limit"] != "dcr_max")
            .all(|c| c["pass"] == true)
    );
    // Limits and decisions are objects of the documented shape: an array (which serde would read by
    // position, and `[]` would clear every limit) and unknown fields are refused; nothing changes.
    for body in [
        json!({"limits": []}),
        json!({"limits": [0.5]}),
        json!([{"dcr_max_ohm": 0.06}]),
        json!({"limits": {"dcr_max_ohm": 0.06}, "bogus": 1}),
    ] {
        let r = app
            .put_json("/api/v1/parts/V-1/limits", &app.engineer, &body)
            .await;
        assert_eq!(r.status(), 422, "{body}");
    }
    for (route, body) in [
        ("approve", json!([])),
        ("reject", json!(["a reason"])),
        ("refit", json!([{}])),
        ("refit", json!({"option": {}})),
    ] {
        let r = app
            .post_json(&format!("/api/v1/fits/{f1}/{route}"), &app.engineer, &body)
            .await;
        assert_eq!(r.status(), 422, "{route} {body}");
    }
    // Unknown query parameters are refused, not ignored (an ignored filter answers every part).
    for path in [
        "/api/v1/parts?bogus=1",
        "/api/v1/parts?srf_min=1e6",
        "/api/v1/fits?bogus=1",
    ] {
        let r = app.get(path, &app.reader).await;
        assert_eq!(r.status(), 400, "{path}");
        assert!(r.text().await.unwrap().contains("unknown field"), "{path}");
    }
    let part = app.get_json("/api/v1/parts/V-1", &app.reader).await;
    assert_eq!(part["limits"]["dcr_max_ohm"], 0.04, "{part}");
    assert_eq!(part["baseline_fit_id"], Value::Null);
    assert_eq!(part["fits"].as_array().unwrap().len(), 2);
    // Relaxing the limit re-judges the stored fits.
    let r = app
        .put_json(
            "/api/v1/parts/V-1/limits",
            &app.engineer,
            &json!({"limits": {"dcr_max_ohm": 0.06}}),
        )
        .await;
    assert_eq!(r.status(), 200);
    assert_eq!(
        app.get_json(&format!("/api/v1/fits/{f1}"), &app.reader)
            .await["verdict"],
        "pass"
    );
    // A rejection needs a reason; approval makes the baseline and drift appears on the other lot.
    let r = app
        .post_json(
            &format!("/api/v1/fits/{f1}/reject"),
            &app.engineer,
            &json!({}),
        )
        .await;
    assert_eq!(r.status(), 422);
    let r = app
        .post_json(
            &format!("/api/v1/fits/{f1}/approve"),
            &app.inspector,
            &json!({}),
        )
        .await;
    assert_eq!(r.status(), 403);
    let r = app
        .post_json(
            &format!("/api/v1/fits/{f1}/approve"),
            &app.engineer,
            &json!({"reason": "golden lot"}),
        )
        .await;
    assert_eq!(r.status(), 200);
    let d2 = app
        .get_json(&format!("/api/v1/fits/{f2}"), &app.reader)
        .await;
    assert_eq!(d2["drift"]["baseline_fit_id"], f1);
    let l0 = d2["drift"]["parameters"]
        .as_array()
        .unwrap()
        .iter()
        .find(|p| p["name"] == "l0_h")
        .unwrap()
        .clone();
    assert!((l0["percent"].as_f64().unwrap() - 5.0).abs() < 0.05, "{l0}");
    let parts = app.get_json("/api/v1/parts?q=V-1", &app.reader).await;
    assert_eq!(parts["items"][0]["approved_fit_id"], f1);
    assert_eq!(parts["items"][0]["latest_fit_id"], f2);
    // The parts list gives L0's drift in percent beside the part's tolerance, not only in σ.
    let pct = parts["items"][0]["drift_l0_percent"].as_f64().unwrap();
    assert!((pct - 5.0).abs() < 0.05, "{pct}");
    // (The limits were replaced above by a DCR limit alone: no inductance tolerance to show.)
    assert_eq!(parts["items"][0]["l_tolerance_percent"], Value::Null);
    // Reject lot 2 with a reason; refit lot 1 as a new revision, leaving revision 1 as it was.
    let r = app
        .post_json(
            &format!("/api/v1/fits/{f2}/reject"),
            &app.engineer,
            &json!({"reason": "L drifted 5 %"}),
        )
        .await;
    assert_eq!(r.status(), 200);
    let r = app
        .post_json(
            &format!("/api/v1/fits/{f1}/refit"),
            &app.engineer,
            &json!({"options": {"max_sections": 0}}),
        )
        .await;
    assert_eq!(r.status(), 202);
    let f3 = r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap();
    let d3 = app.wait_for_fit(f3, FIT_TIMEOUT).await;
    assert_eq!(d3["revision"], 2);
    assert_eq!(d3["sweep_id"], d1["sweep_id"]);
    assert_eq!(d3["options"]["max_sections"], 0);
    let d1_again = app
        .get_json(&format!("/api/v1/fits/{f1}"), &app.reader)
        .await;
    assert_eq!(d1_again["report"], d1["report"]);
    assert_eq!(d1_again["approval"], "approved");
    // The audit trail names who did what and why.
    let part = app.get_json("/api/v1/parts/V-1", &app.reader).await;
    let audit = part["audit"].as_array().unwrap();
    let find = |action: &str| {
        audit
            .iter()
            .find(|a| a["action"] == action)
            .cloned()
            .unwrap_or(Value::Null)
    };
    assert_eq!(find("fit-approved")["reason"], "golden lot");
    assert_eq!(find("fit-rejected")["reason"], "L drifted 5 %");
    assert!(
        find("fit-rejected")["actor"]
            .as_str()
            .unwrap()
            .starts_with("engineer-")
    );
    assert!(find("limits-changed").is_object());
    assert_eq!(part["lots"], json!(["1", "2"]));
    assert_eq!(part["baseline_fit_id"], f1);
    // Cancel and retry follow the state machine.
    let r = app
        .post_json(
            &format!("/api/v1/fits/{f1}/cancel"),
            &app.inspector,
            &json!({}),
        )
        .await;
    assert_eq!(r.status(), 409);
    let r = app
        .post_json(
            &format!("/api/v1/fits/{f1}/retry"),
            &app.inspector,
            &json!({}),
        )
        .await;
    assert_eq!(r.status(), 409);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_record_is_tamper_evident() {
    // Arrange: a part with limits, one fitted lot, approved: audit rows about the part and the fit.
    let app = spawn_app().await;
    app.create_part("T-1", json!({"dcr_max_ohm": 0.1})).await;
    let f = upload_synthetic(
        &app,
        "T-1",
        "1",
        synthetic_csv(&simple_model(1e-5, 0.05, 5e-12), 1e4, 1e8, 401),
    )
    .await;
    assert_eq!(app.wait_for_fit(f, FIT_TIMEOUT).await["verdict"], "pass");
    let r = app
        .post_json(
            &format!("/api/v1/fits/{f}/approve"),
            &app.engineer,
            &json!({"reason": "baseline"}),
        )
        .await;
    assert_eq!(r.status(), 200);
    let clean = app.store.verify_integrity().await.unwrap();
    assert!(clean.ok(), "{clean:?}");
    assert!(
        clean.audit_rows >= 2 && clean.verdicts_checked == 1,
        "{clean:?}"
    );
    let ready = app.get_json("/readyz", &app.reader).await;
    assert_eq!(ready["audit_chain"], true, "{ready}");
    assert_eq!(ready["audit_head_hash"], json!(clean.head_hash));

    let mut raw = app.database.raw().await;
    // Through SQL the trail cannot be rewritten, not even by a replacing insert (SQLite's INSERT OR
    // REPLACE deletes the old row without firing delete triggers; PostgreSQL's ON CONFLICT updates).
    let replace = raw
        .execute_per_dialect(
            "INSERT OR REPLACE INTO audit (audit_id, at_ms, actor, action) VALUES (1, 0, 'x', 'y')",
            "INSERT INTO audit (audit_id, at_ms, actor, action) VALUES (1, 0, 'x', 'y') \
             ON CONFLICT (audit_id) DO UPDATE SET actor = excluded.actor, action = excluded.action",
        )
        .await;
    assert!(
        replace.unwrap_err().to_string().contains("append-only"),
        "REPLACE refused"
    );
    let update = raw
        .execute("UPDATE audit SET reason = 'x' WHERE audit_id = 1")
        .await;
    assert!(
        update.unwrap_err().to_string().contains("append-only"),
        "UPDATE refused"
    );
    let delete = raw.execute("DELETE FROM audit WHERE audit_id = 1").await;
    assert!(
        delete.unwrap_err().to_string().contains("append-only"),
        "DELETE refused"
    );

    // A verdict set by hand is caught: it is not what the result and the limits give.
    let changed = raw
        .execute(&format!(
            "UPDATE fits SET verdict = 'fail' WHERE fit_id = {f}"
        ))
        .await
        .unwrap();
    assert_eq!(changed, 1);
    let found = app.store.verify_integrity().await.unwrap();
    assert!(
        found
            .problems
            .iter()
            .any(|p| p.contains(&format!("fit {f}'s stored verdict"))),
        "{found:?}"
    );

    // Going around the triggers: a row forged onto the end breaks the chain, and /readyz says so.
    raw.execute_per_dialect(
        "DROP TRIGGER audit_no_update",
        "DROP TRIGGER audit_no_update ON audit",
    )
    .await
    .unwrap();
    raw.execute(
        "INSERT INTO audit (audit_id, at_ms, actor, action, prev_hash, hash) \
         SELECT MAX(audit_id) + 1, 0, 'intruder', 'fit-approved', 'x', 'y' FROM audit",
    )
    .await
    .unwrap();
    let r = app.get("/readyz", &app.reader).await;
    assert_eq!(r.status(), 503);
    assert!(!app.store.audit_chain_ok().await.0);
    // An old row changed in place shows in the full check (at every start, and `henrybook verify`).
    let changed = raw
        .execute("UPDATE audit SET reason = 'rewritten' WHERE audit_id = 1")
        .await
        .unwrap();
    assert_eq!(changed, 1);
    raw.close().await;
    let after = app.store.verify_integrity().await.unwrap();
    assert!(
        after
            .problems
            .iter()
            .any(|p| p == "audit row 1 was changed after it was written"),
        "{after:?}"
    );
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn fit_options_and_readings_out_of_range_are_refused_before_anything_is_stored() {
    let app = spawn_app().await;
    app.create_part("O-1", json!({})).await;
    // Synthetic sweep of a known model (invented values).
    let csv = synthetic_csv(&simple_model(10e-6, 0.05, 5e-12), 1e4, 1e8, 101);
    let base = [("part_number", "O-1"), ("lot", "L1")];
    for (field, value, named) in [
        ("options", r#"{"max_sections": 99}"#, "max_sections"),
        ("options", r#"{"max_iterations": 0}"#, "max_iterations"),
        (
            "options",
            r#"{"family": "rational", "rational_order": 0}"#,
            "rational_order",
        ),
        (
            "options",
            r#"{"family": "rational", "rational_order": 2000}"#,
            "rational_order",
        ),
        ("options", r#"{"time_limit_s": -1}"#, "time_limit_s"),
        ("options", r#"{"time_limit_s": 1e300}"#, "time_limit_s"),
        ("options", r#"{"dcr": {"value_ohm": -0.1}}"#, "DCR"),
        ("dcr_ohm", "-0.1", "dcr_ohm"),
        ("dcr_ohm", "1e300", "dcr_ohm"),
        ("z0_ohm", "1e9", "z0_ohm"),
        ("temperature_c", "5000", "temperature_c"),
    ] {
        let mut fields = base.to_vec();
        fields.push((field, value));
        let r = app.upload("o.csv", csv.clone(), &fields).await;
        assert_eq!(r.status(), 422, "{field}={value}");
        let body: Value = r.json().await.unwrap();
        assert_eq!(body["type"], "urn:henrybook:problem:validation", "{body}");
        let detail = body["detail"].as_str().unwrap();
        assert!(detail.contains(named), "{field}={value}: {detail}");
    }
    let q = app.get_json("/api/v1/queue", &app.reader).await;
    assert_eq!(
        q,
        json!({"queued": 0, "running": 0, "succeeded": 0, "failed": 0, "cancelled": 0})
    );

    // A refit checks its options the same way and adds no revision.
    let r = app.upload("o.csv", csv, &base).await;
    assert_eq!(r.status(), 202);
    let fit_id = r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap();
    app.wait_for_fit(fit_id, FIT_TIMEOUT).await;
    for (options, named) in [
        (json!({"max_sections": 99}), "max_sections"),
        (json!({"time_limit_s": -1}), "time_limit_s"),
        (
            json!({"family": "rational", "rational_order": 0}),
            "rational_order",
        ),
    ] {
        let r = app
            .post_json(
                &format!("/api/v1/fits/{fit_id}/refit"),
                &app.engineer,
                &json!({ "options": options }),
            )
            .await;
        assert_eq!(r.status(), 422, "{options}");
        let body: Value = r.json().await.unwrap();
        assert!(
            body["detail"].as_str().unwrap().contains(named),
            "{options}: {body}"
        );
    }
    let fits = app.get_json("/api/v1/fits", &app.reader).await;
    assert_eq!(fits["items"].as_array().unwrap().len(), 1, "{fits}");
    app.stop().await;
}
