//! The listeners against clients that misbehave: a request head that never ends, connections that sit
//! idle, more connections than the limit, a shutdown with a half-sent request open, and uploads
//! beyond the bytes the service takes in at once. Bounds in these tests are generous waits (the
//! service's own timeouts are a fraction of a second here), not timing assertions; the figures from
//! outside are measured by `tests/load/connections.sh`.

use henrybook::jobs::CoreEngine;
use henrybook_tests::service::{
    TestApp, TestDatabase, simple_model, spawn_app_with, synthetic_csv,
};
use std::sync::Arc;
use std::time::Duration;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;

/// How long a test waits for something the service should do within a second.
const PATIENCE: Duration = Duration::from_secs(20);

async fn app_with(change: impl FnOnce(&mut henrybook::settings::Settings)) -> TestApp {
    let db = TestDatabase::new().await;
    let mut settings = db.settings();
    change(&mut settings);
    spawn_app_with(db, settings, Arc::new(CoreEngine), None).await
}

async fn connect(app: &TestApp) -> TcpStream {
    TcpStream::connect(app.base_url.trim_start_matches("http://"))
        .await
        .unwrap()
}

/// Reads until the service closes the connection; what it sent, or a panic after [`PATIENCE`].
async fn read_until_closed(stream: &mut TcpStream) -> Vec<u8> {
    let mut got = Vec::new();
    let mut buf = [0u8; 4096];
    loop {
        match tokio::time::timeout(PATIENCE, stream.read(&mut buf)).await {
            Ok(Ok(0)) | Ok(Err(_)) => return got,
            Ok(Ok(n)) => got.extend_from_slice(&buf[..n]),
            Err(_) => panic!("the service kept the connection open for {PATIENCE:?}"),
        }
    }
}

async fn healthz(app: &TestApp) -> u16 {
    let r = tokio::time::timeout(PATIENCE, app.client.get(app.url("/healthz")).send())
        .await
        .expect("/healthz answers")
        .expect("/healthz answers");
    r.status().as_u16()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_request_head_that_never_ends_is_closed_after_the_header_read_timeout() {
    let app = app_with(|s| {
        s.header_read_timeout = Duration::from_millis(300);
        s.idle_timeout = Duration::from_secs(600);
    })
    .await;
    let mut half = connect(&app).await;
    half.write_all(b"GET /healthz HTTP/1.1\r\nhost: x\r\nx-slow: ")
        .await
        .unwrap();
    let got = read_until_closed(&mut half).await;
    assert!(got.is_empty(), "{}", String::from_utf8_lossy(&got));
    assert_eq!(healthz(&app).await, 200);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn idle_connections_are_closed_after_the_idle_timeout_also_after_a_request() {
    let app = app_with(|s| {
        s.header_read_timeout = Duration::from_secs(600);
        s.idle_timeout = Duration::from_millis(300);
    })
    .await;
    // Never a byte.
    let mut silent = connect(&app).await;
    assert!(read_until_closed(&mut silent).await.is_empty());
    // One whole request on a keep-alive connection, then silence.
    let mut kept = connect(&app).await;
    kept.write_all(b"GET /healthz HTTP/1.1\r\nhost: x\r\n\r\n")
        .await
        .unwrap();
    let got = String::from_utf8(read_until_closed(&mut kept).await).unwrap();
    assert!(got.starts_with("HTTP/1.1 200"), "{got}");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn at_the_connection_limit_idle_connections_make_room_and_healthz_answers() {
    let app = app_with(|s| {
        s.max_connections = 8;
        s.header_read_timeout = Duration::from_secs(600);
        s.idle_timeout = Duration::from_secs(600);
    })
    .await;
    let mut idle = Vec::new();
    for _ in 0..40 {
        idle.push(connect(&app).await);
    }
    // Every health check gets a place: the longest-idle connection gives up its own.
    for _ in 0..5 {
        assert_eq!(healthz(&app).await, 200);
    }
    // The evicted connections are closed, not left hanging: at most the limit (and the few still
    // giving up their place) stay open.
    // (Connections refused while the evicted ones were closing got a 503 first, then the close.)
    let mut closed = 0;
    for c in idle.iter_mut() {
        let mut b = [0u8; 1024];
        loop {
            match tokio::time::timeout(Duration::from_millis(200), c.read(&mut b)).await {
                Ok(Ok(0) | Err(_)) => {
                    closed += 1;
                    break;
                }
                Ok(Ok(_)) => continue,
                Err(_) => break,
            }
        }
    }
    assert!(
        closed >= 40 - 8,
        "only {closed} of 40 idle connections were closed"
    );
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn when_every_connection_is_busy_a_new_one_is_refused_with_503_and_retry_after() {
    let app = app_with(|s| {
        s.max_connections = 4;
        s.header_read_timeout = Duration::from_secs(600);
        s.idle_timeout = Duration::from_secs(600);
        s.request_timeout = Duration::from_secs(600);
    })
    .await;
    // Four uploads that sent their head and stall in the body: requests in flight, not evictable.
    let mut busy = Vec::new();
    for _ in 0..4 {
        let mut c = connect(&app).await;
        let head = format!(
            "POST /api/v1/sweeps HTTP/1.1\r\nhost: x\r\nauthorization: Bearer {}\r\n\
             content-type: multipart/form-data; boundary=zz\r\ncontent-length: 5000\r\n\r\n--zz\r\n",
            app.inspector
        );
        c.write_all(head.as_bytes()).await.unwrap();
        busy.push(c);
    }
    // Time for the service to read their heads (setup, not a measurement): from then on they are
    // requests in flight, which no new connection may displace.
    tokio::time::sleep(Duration::from_secs(1)).await;
    let deadline = tokio::time::Instant::now() + PATIENCE;
    let refusal = loop {
        // Nothing is sent: the refusal is written at accept, before any request is read (a request
        // already sent may be lost to the reset of a socket closed with unread bytes).
        let mut c = connect(&app).await;
        let got = String::from_utf8_lossy(&read_until_closed(&mut c).await).to_string();
        if got.starts_with("HTTP/1.1 503") {
            break got;
        }
        assert!(
            tokio::time::Instant::now() < deadline,
            "never refused: {got}"
        );
        tokio::time::sleep(Duration::from_millis(20)).await;
    };
    let lower = refusal.to_ascii_lowercase();
    assert!(lower.contains("retry-after: 1"), "{refusal}");
    assert!(lower.contains("application/problem+json"), "{refusal}");
    let body = &refusal[refusal.find("\r\n\r\n").unwrap() + 4..];
    assert!(
        lower.contains(&format!("content-length: {}\r\n", body.len())),
        "{refusal}"
    );
    let problem: serde_json::Value = serde_json::from_str(body).unwrap();
    assert_eq!(problem["status"], 503);
    assert_eq!(problem["type"], "urn:henrybook:problem:overloaded");
    // Once the stalled uploads go away, their places are free again.
    drop(busy);
    let deadline = tokio::time::Instant::now() + PATIENCE;
    while !matches!(
        app.client
            .get(app.url("/healthz"))
            .send()
            .await
            .map(|r| r.status().as_u16()),
        Ok(200)
    ) {
        assert!(
            tokio::time::Instant::now() < deadline,
            "the places were never given back"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn shutdown_ends_by_the_drain_deadline_with_a_half_sent_request_open() {
    let app = app_with(|s| {
        s.header_read_timeout = Duration::from_secs(600);
        s.idle_timeout = Duration::from_secs(600);
        s.shutdown_grace = Duration::from_millis(200);
        s.drain_timeout = Duration::from_millis(800);
    })
    .await;
    let mut half = connect(&app).await;
    half.write_all(b"POST /api/v1/sweeps HTTP/1.1\r\nhost: x\r\ncontent-le")
        .await
        .unwrap();
    let mut grpc_half = TcpStream::connect(app.grpc_url.trim_start_matches("http://"))
        .await
        .unwrap();
    grpc_half.write_all(b"PRI * HTTP/2.0\r\n").await.unwrap();
    let started = std::time::Instant::now();
    tokio::time::timeout(PATIENCE, app.stop())
        .await
        .expect("shutdown ends by its drain deadline, not when the client finishes");
    eprintln!(
        "shutdown with half-sent requests took {:?}",
        started.elapsed()
    );
    assert!(read_until_closed(&mut half).await.is_empty());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn uploads_beyond_the_bytes_in_flight_get_503_with_retry_after() {
    let app = app_with(|s| {
        s.max_body_bytes = 64 * 1024;
        s.max_upload_bytes_in_flight = 64 * 1024;
        s.request_timeout = Duration::from_secs(600);
    })
    .await;
    app.create_part("B-1", serde_json::json!({})).await;
    // An upload that announced 60 000 bytes and sends them slowly holds its share.
    let mut slow = connect(&app).await;
    let head = format!(
        "POST /api/v1/sweeps HTTP/1.1\r\nhost: x\r\nauthorization: Bearer {}\r\n\
         content-type: multipart/form-data; boundary=zz\r\ncontent-length: 60000\r\n\r\n--zz\r\n",
        app.inspector
    );
    slow.write_all(head.as_bytes()).await.unwrap();
    // Time for the service to take it up (setup, not a measurement).
    tokio::time::sleep(Duration::from_secs(1)).await;
    // Synthetic sweep of a known model (invented values).
    let csv = synthetic_csv(&simple_model(10e-6, 0.05, 5e-12), 1e4, 1e8, 101);
    let fields = [("part_number", "B-1"), ("lot", "L")];
    let deadline = tokio::time::Instant::now() + PATIENCE;
    let refused = loop {
        let r = app.upload("b.csv", csv.clone(), &fields).await;
        if r.status() == 503 {
            break r;
        }
        assert_eq!(r.status(), 202);
        assert!(tokio::time::Instant::now() < deadline, "never refused");
        tokio::time::sleep(Duration::from_millis(20)).await;
    };
    assert!(refused.headers().contains_key("retry-after"));
    let body: serde_json::Value = refused.json().await.unwrap();
    assert_eq!(body["type"], "urn:henrybook:problem:overloaded", "{body}");
    // When the slow upload goes away, its bytes are free again.
    drop(slow);
    let deadline = tokio::time::Instant::now() + PATIENCE;
    loop {
        let r = app.upload("b.csv", csv.clone(), &fields).await;
        if r.status() == 202 {
            break;
        }
        assert_eq!(r.status(), 503);
        assert!(
            tokio::time::Instant::now() < deadline,
            "the bytes were never given back"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn grpc_uploads_beyond_what_the_bytes_in_flight_hold_are_unavailable_with_retry_after() {
    use henrybook::grpc::proto;
    // The bound holds one upload of the largest size at once.
    let app = app_with(|s| {
        s.max_body_bytes = 256 * 1024;
        s.max_upload_bytes_in_flight = 256 * 1024;
    })
    .await;
    app.create_part("G-1", serde_json::json!({})).await;
    let channel = app.grpc_channel().await;
    let mut calls = tokio::task::JoinSet::new();
    for i in 0..40 {
        let mut fits = proto::fit_registry_client::FitRegistryClient::new(channel.clone());
        let token = app.inspector.clone();
        calls.spawn(async move {
            // Synthetic sweeps of known models (invented values), all different.
            let message = proto::UploadSweepRequest {
                file_name: format!("g{i}.csv"),
                file: synthetic_csv(
                    &simple_model(1e-5 * (1.0 + i as f64 / 50.0), 0.05, 5e-12),
                    1e4,
                    1e8,
                    801,
                ),
                part_number: "G-1".into(),
                lot: "L".into(),
                ..Default::default()
            };
            fits.upload_sweep(henrybook_tests::service::grpc_request(message, &token))
                .await
        });
    }
    let (mut taken, mut refused) = (0, 0);
    while let Some(r) = calls.join_next().await {
        match r.unwrap() {
            Ok(_) => taken += 1,
            Err(s) => {
                assert_eq!(s.code(), tonic::Code::Unavailable, "{s:?}");
                assert!(s.metadata().get("retry-after").is_some(), "{s:?}");
                refused += 1;
            }
        }
    }
    eprintln!("40 concurrent gRPC uploads: {taken} taken, {refused} refused");
    assert!(
        refused > 0,
        "40 uploads at once, one place: none was refused"
    );
    let fits = app.get_json("/api/v1/fits?limit=500", &app.reader).await;
    assert_eq!(fits["items"].as_array().unwrap().len(), taken);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn during_the_unready_notice_the_service_answers_but_is_unready_and_claims_nothing() {
    // A replica behind a load balancer: at the signal /readyz turns 503 (draining) while requests
    // are still served for the notice, and fits uploaded meanwhile stay queued for another replica
    // or the next start; then the listeners close. Nothing uploaded is lost.
    let notice = Duration::from_secs(3);
    let db = TestDatabase::new().await;
    let mut settings = db.settings();
    settings.unready_notice = notice;
    settings.shutdown_grace = Duration::from_secs(2);
    settings.drain_timeout = Duration::from_secs(10);
    let mut app = spawn_app_with(db.clone(), settings.clone(), Arc::new(CoreEngine), None).await;
    app.create_part("N-1", serde_json::json!({})).await;
    let ready = app.client.get(app.url("/readyz")).send().await.unwrap();
    assert_eq!(ready.status(), 200);
    assert_eq!(
        ready.json::<serde_json::Value>().await.unwrap()["draining"],
        false
    );

    let signalled = std::time::Instant::now();
    app.signal_stop();
    let deadline = tokio::time::Instant::now() + Duration::from_secs(2);
    let body = loop {
        let r = app.client.get(app.url("/readyz")).send().await.unwrap();
        if r.status() == 503 {
            break r.json::<serde_json::Value>().await.unwrap();
        }
        assert!(
            tokio::time::Instant::now() < deadline,
            "never turned unready"
        );
        tokio::time::sleep(Duration::from_millis(20)).await;
    };
    assert_eq!(body["draining"], true, "{body}");
    assert_eq!(body["database"], true, "{body}");
    // Still served: an upload is taken and queued, but this replica claims nothing any more.
    // Synthetic sweep of a known model (invented values).
    let csv = synthetic_csv(&simple_model(10e-6, 0.05, 5e-12), 1e4, 1e8, 101);
    let r = app
        .upload("n.csv", csv, &[("part_number", "N-1"), ("lot", "L1")])
        .await;
    assert_eq!(r.status(), 202);
    let fit_id = r.json::<serde_json::Value>().await.unwrap()["fit_id"]
        .as_i64()
        .unwrap();
    // The pool polls every 50 ms in these settings: a claiming pool would have taken it by now.
    tokio::time::sleep(Duration::from_millis(800)).await;
    let fit = app
        .get_json(&format!("/api/v1/fits/{fit_id}"), &app.reader)
        .await;
    assert_eq!(fit["status"], "queued", "{fit}");
    assert!(
        signalled.elapsed() < notice,
        "the check ran past the notice"
    );
    let tokens = app.tokens();
    tokio::time::timeout(PATIENCE, app.stop())
        .await
        .expect("shutdown ends after the notice");
    assert!(
        signalled.elapsed() >= notice,
        "the listeners closed before the notice was over ({:?})",
        signalled.elapsed()
    );
    // The next start runs the queued fit.
    let again = spawn_app_with(db, settings, Arc::new(CoreEngine), Some(tokens)).await;
    let done = again.wait_for_fit(fit_id, PATIENCE).await;
    assert_eq!(done["status"], "succeeded", "{done}");
    again.stop().await;
}
