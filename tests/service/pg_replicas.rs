//! The real server binary on PostgreSQL: one process, then two processes on one database (two
//! replicas), over HTTP. Each test has a fresh database ([`TestDb`]); without a PostgreSQL server the
//! tests fail, they never skip. The binary must be built first (`cargo build -p henrybook`).
//!
//! The sweeps are synthetic, from known lumped models (invented for these tests); the SRF check uses
//! Thomson's formula f = 1/(2π√(LC)).

use henrybook_tests::pg::TestDb;
use henrybook_tests::service::{ServerProcess, service_token, simple_model, synthetic_csv};
use serde_json::{Value, json};
use std::collections::HashMap;
use std::time::Duration;

const FIT_TIMEOUT: Duration = Duration::from_secs(120);

/// A reader, an inspector and an engineer token, made with the binary's `token create`.
struct Tokens {
    reader: String,
    inspector: String,
    engineer: String,
}

fn tokens(database: &str) -> Tokens {
    Tokens {
        reader: service_token(database, "reader"),
        inspector: service_token(database, "inspector"),
        engineer: service_token(database, "engineer"),
    }
}

fn numbers(v: &Value) -> Vec<&str> {
    v["items"]
        .as_array()
        .expect("items")
        .iter()
        .map(|p| p["part_number"].as_str().expect("a part number"))
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn one_server_on_postgresql_fits_answers_a_band_query_and_approves() {
    let db = TestDb::new().await;
    let logs = tempfile::tempdir().unwrap();
    let t = tokens(&db.url);
    let server = ServerProcess::start(&db.url, 2, logs.path().join("server.log")).await;
    for part in ["PG-A", "PG-B"] {
        server
            .post_json(
                "/api/v1/parts",
                &t.engineer,
                &json!({"part_number": part, "description": "replica test part", "limits": {}}),
                201,
            )
            .await;
    }
    // PG-A: 10 µH ‖ 5 pF → SRF 1/(2π√(10 µH · 5 pF)) = 22.508 MHz; PG-B: 1 µH ‖ 2 pF → 112.54 MHz.
    let a = server
        .upload_csv(
            &t.inspector,
            "PG-A",
            "1",
            synthetic_csv(&simple_model(1e-5, 0.05, 5e-12), 1e4, 1e8, 401),
        )
        .await;
    let b = server
        .upload_csv(
            &t.inspector,
            "PG-B",
            "1",
            synthetic_csv(&simple_model(1e-6, 0.01, 2e-12), 1e5, 1e9, 401),
        )
        .await;
    for id in [a, b] {
        let fit = server.wait_for_fit(id, &t.reader, FIT_TIMEOUT).await;
        assert_eq!(fit["status"], "succeeded", "{fit}");
    }
    let fit_a = server
        .get_json(&format!("/api/v1/fits/{a}"), &t.reader)
        .await;
    let srf = fit_a["srf_hz"].as_f64().expect("an SRF");
    assert!((srf / 22.508e6 - 1.0).abs() < 1e-3, "{srf}");

    // The band query answers from the newest fits on request, from approved baselines by default.
    let band = server
        .get_json(
            "/api/v1/parts?answer_from=latest&srf_min_hz=2e7&srf_max_hz=3e7",
            &t.reader,
        )
        .await;
    assert_eq!(numbers(&band), ["PG-A"], "{band}");
    let approved = server.get_json("/api/v1/parts", &t.reader).await;
    assert!(numbers(&approved).is_empty(), "{approved}");
    server
        .post_json(
            &format!("/api/v1/fits/{a}/approve"),
            &t.engineer,
            &json!({"reason": "bench check"}),
            200,
        )
        .await;
    let approved = server
        .get_json("/api/v1/parts?srf_min_hz=1e7", &t.reader)
        .await;
    assert_eq!(numbers(&approved), ["PG-A"]);
    assert_eq!(approved["items"][0]["approved_fit_id"], a);

    // The record holds: /readyz checks the chain, `verify` checks it all.
    let ready = server.get_json("/readyz", &t.reader).await;
    assert_eq!(ready["audit_chain"], true, "{ready}");
    // The log names the store it opened (its fields may be coloured: look for the words).
    let log = server.log_text();
    let opened = log
        .lines()
        .find(|l| l.contains("the store is open"))
        .unwrap_or_else(|| panic!("no line naming the store: {log}"));
    assert!(opened.contains("\"postgres\""), "{opened}");
    server.stop();
    let verified =
        henrybook_tests::service::run_service_command(&["verify", "--database", &db.url]);
    assert!(verified.contains("the record is intact"), "{verified}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_servers_on_one_postgresql_database_run_each_fit_exactly_once() {
    let db = TestDb::new().await;
    let logs = tempfile::tempdir().unwrap();
    let t = tokens(&db.url);
    let one = ServerProcess::start(&db.url, 2, logs.path().join("one.log")).await;
    let two = ServerProcess::start(&db.url, 2, logs.path().join("two.log")).await;
    let servers = [&one, &two];
    const PARTS: usize = 3;
    const PER_PART: usize = 4;
    for p in 0..PARTS {
        servers[p % 2]
            .post_json(
                "/api/v1/parts",
                &t.engineer,
                &json!({"part_number": format!("RP-{p}"), "description": "", "limits": {}}),
                201,
            )
            .await;
    }
    // Uploads alternate between the servers: each server's pool is woken by the other's uploads
    // (LISTEN/NOTIFY) or finds them by polling.
    let mut fit_ids = Vec::new();
    for p in 0..PARTS {
        for lot in 0..PER_PART {
            let l0_h = 1e-6 * (1.0 + p as f64) * (1.0 + 0.05 * lot as f64);
            let csv = synthetic_csv(&simple_model(l0_h, 0.02, 3e-12), 1e4, 1e9, 201);
            let id = servers[(p + lot) % 2]
                .upload_csv(&t.inspector, &format!("RP-{p}"), &lot.to_string(), csv)
                .await;
            fit_ids.push(id);
        }
    }
    for id in &fit_ids {
        let fit = servers[(*id as usize) % 2]
            .wait_for_fit(*id, &t.reader, FIT_TIMEOUT)
            .await;
        assert_eq!(fit["status"], "succeeded", "{fit}");
    }
    // Exactly once: one succeeded audit row per fit, and each job claimed once (its claim counter
    // is 1: no second claim by either server) and done.
    let succeeded: Vec<(i64,)> =
        sqlx::query_as("SELECT fit_id FROM audit WHERE action = 'fit-succeeded' ORDER BY fit_id")
            .fetch_all(&db.pool)
            .await
            .unwrap();
    let mut per_fit: HashMap<i64, usize> = HashMap::new();
    for (id,) in &succeeded {
        *per_fit.entry(*id).or_default() += 1;
    }
    assert_eq!(per_fit.len(), fit_ids.len(), "{per_fit:?}");
    assert!(per_fit.values().all(|n| *n == 1), "{per_fit:?}");
    let claims: Vec<(i64, i64, String)> =
        sqlx::query_as("SELECT fit_id, claim_token, state FROM jobs ORDER BY fit_id")
            .fetch_all(&db.pool)
            .await
            .unwrap();
    assert_eq!(claims.len(), fit_ids.len());
    assert!(
        claims
            .iter()
            .all(|(_, token, state)| *token == 1 && state == "done"),
        "each job claimed once: {claims:?}"
    );
    // Both answer the same band query from the shared database.
    let q = "/api/v1/parts?answer_from=latest&l_at_hz=1e5&l_min_h=1.5e-6&l_max_h=2.8e-6";
    let (a, b) = (
        one.get_json(q, &t.reader).await,
        two.get_json(q, &t.reader).await,
    );
    assert_eq!(numbers(&a), ["RP-1"], "{a}");
    assert_eq!(a["items"], b["items"]);
    // Approve on one, seen by the other.
    let first = fit_ids[0];
    one.post_json(
        &format!("/api/v1/fits/{first}/approve"),
        &t.engineer,
        &json!({}),
        200,
    )
    .await;
    let approved = two.get_json("/api/v1/parts", &t.reader).await;
    assert_eq!(numbers(&approved), ["RP-0"]);
    one.stop();
    two.stop();
}

/// A job queued by another replica (here: written straight through a second `PgStore`, so the
/// server's own pool is not told in-process) wakes the server's idle pool through LISTEN/NOTIFY long
/// before its poll interval (60 s here) would find it.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_job_queued_by_another_replica_wakes_an_idle_pool_before_its_poll() {
    use henrybook::app::Application;
    use henrybook::registry::ids::{LotCode, PartNumber};
    use henrybook::registry::limits::Limits;
    use henrybook::store::pg::PgStore;
    use henrybook::store::sweeps::{NamedFile, NewSweep};

    let db = TestDb::new().await;
    let mut settings = henrybook::settings::Settings::new(db.url.clone());
    settings.workers = 1;
    settings.poll_interval = Duration::from_secs(60);
    let app = Application::build(settings)
        .await
        .expect("the application builds");
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(app.run(async move {
        let _ = stop_rx.await;
    }));
    // Let the pool make its first (empty) claim and go idle.
    tokio::time::sleep(Duration::from_millis(500)).await;

    let other = PgStore::new(db.replica().await);
    let pn = PartNumber::parse("NW-1").unwrap();
    other
        .create_part("eng", &pn, "", &Limits::default())
        .await
        .unwrap();
    let csv = synthetic_csv(&simple_model(1e-5, 0.05, 5e-12), 1e4, 1e8, 201);
    let options_json = "{}".to_string();
    let up = other
        .upload(
            "insp",
            NewSweep {
                part_number: pn,
                lot: LotCode::parse("1").unwrap(),
                sha256: henrybook::store::sha256_hex(&csv),
                file: NamedFile {
                    name: "nw-1.csv".into(),
                    bytes: csv,
                },
                method: "direct".into(),
                z0_ohm: None,
                dcr_ohm: None,
                temperature_c: None,
                operator: String::new(),
                fixture_open: None,
                fixture_short: None,
                fixture_topology: None,
                points: 201,
                options_key: henrybook::jobs::duplicate_key(&options_json, "direct", None),
                options_json,
            },
        )
        .await
        .unwrap();
    let queued_at = tokio::time::Instant::now();
    loop {
        let fit = other.fit_summary(up.fit_id).await.unwrap();
        if !matches!(fit.status.as_str(), "queued" | "running") {
            assert_eq!(fit.status.as_str(), "succeeded", "{fit:?}");
            break;
        }
        assert!(
            queued_at.elapsed() < Duration::from_secs(20),
            "fit {} still {:?} after 20 s: the idle pool was not woken",
            up.fit_id,
            fit.status
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let _ = stop_tx.send(());
    server.await.unwrap().unwrap();
}
