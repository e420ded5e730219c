//! The job machinery across restarts: a crash leaves leases that expire and are re-run; a graceful
//! shutdown gives running jobs back; every fit finishes once and its result is written once.
//! The engine is the real one, wrapped so that a fit takes long enough to be interrupted.

use henrybook::fit::{FitControl, FitError, FitOptions, FitReport};
use henrybook::jobs::{CoreEngine, Engine};
use henrybook::settings::Settings;
use henrybook::sweep::{ReadOptions, Sweep, SweepError};
use henrybook_tests::service::{
    TestApp, TestDatabase, simple_model, spawn_app_with, synthetic_csv,
};
use serde_json::{Value, json};
use std::collections::HashMap;
use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

/// The real engine, holding each fit back for `delay` first (and honouring cancellation meanwhile).
struct SlowEngine {
    delay: Duration,
}

impl Engine for SlowEngine {
    fn read_sweep(&self, name: &str, bytes: &[u8], o: &ReadOptions) -> Result<Sweep, SweepError> {
        CoreEngine.read_sweep(name, bytes, o)
    }
    fn fit(&self, s: &Sweep, o: &FitOptions, c: &FitControl) -> Result<FitReport, FitError> {
        let start = Instant::now();
        while start.elapsed() < self.delay {
            if c.cancel.as_ref().is_some_and(|f| f.load(Ordering::SeqCst)) {
                return Err(FitError::Cancelled);
            }
            std::thread::sleep(Duration::from_millis(10));
        }
        CoreEngine.fit(s, o, c)
    }
}

/// The service on `db` with [`SlowEngine`] holding each fit back for `delay`.
async fn spawn_slow(db: TestDatabase, settings: Settings, delay: Duration) -> TestApp {
    spawn_app_with(db, settings, Arc::new(SlowEngine { delay }), None).await
}

async fn upload_n(app: &TestApp, n: usize) -> Vec<i64> {
    app.create_part("R-1", json!({})).await;
    let mut ids = Vec::new();
    for i in 0..n {
        // Synthetic sweeps of known models (invented), all different so none is a duplicate.
        let csv = synthetic_csv(
            &simple_model(1e-5 * (1.0 + i as f64 / 10.0), 0.05, 5e-12),
            1e4,
            1e8,
            201,
        );
        let r = app
            .upload(
                &format!("s{i}.csv"),
                csv,
                &[("part_number", "R-1"), ("lot", "L")],
            )
            .await;
        assert_eq!(r.status(), 202);
        ids.push(r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap());
    }
    ids
}

async fn wait_for_running(app: &TestApp) {
    let deadline = Instant::now() + Duration::from_secs(20);
    loop {
        let q = app.get_json("/api/v1/queue", &app.reader).await;
        if q["running"].as_i64().unwrap() > 0 {
            return;
        }
        assert!(Instant::now() < deadline, "no fit started: {q}");
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
}

/// Counts "fit-succeeded" audit entries per fit.
async fn successes(app: &TestApp) -> HashMap<i64, usize> {
    let part = app.get_json("/api/v1/parts/R-1", &app.reader).await;
    let mut n = HashMap::new();
    for a in part["audit"].as_array().unwrap() {
        if a["action"] == "fit-succeeded" {
            *n.entry(a["fit_id"].as_i64().unwrap()).or_insert(0) += 1;
        }
    }
    n
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn after_a_crash_queued_and_running_jobs_all_finish_and_none_twice() {
    // Arrange: a slow pool with jobs queued and running, then a crash (no shutdown work at all).
    let db = TestDatabase::new().await;
    let settings = db.settings();
    let app = spawn_slow(db.clone(), settings.clone(), Duration::from_secs(3)).await;
    let ids = upload_n(&app, 6).await;
    wait_for_running(&app).await;
    let before = app.get_json("/api/v1/queue", &app.reader).await;
    assert!(
        before["running"].as_i64().unwrap() >= 1 && before["queued"].as_i64().unwrap() >= 1,
        "{before}"
    );
    let tokens = app.tokens();
    app.crash().await;

    // Act: start again on the same database.
    let app = spawn_app_with(db, settings, Arc::new(CoreEngine), Some(tokens)).await;

    // Assert: every fit succeeds, each result is written exactly once.
    let mut reruns = 0;
    for id in &ids {
        let f = app.wait_for_fit(*id, Duration::from_secs(60)).await;
        assert_eq!(f["status"], "succeeded", "{f}");
        if f["attempts"].as_i64().unwrap() > 1 {
            reruns += 1;
        }
    }
    assert!(reruns >= 1, "the jobs that were running were run again");
    let n = successes(&app).await;
    assert_eq!(n.len(), ids.len());
    assert!(n.values().all(|&c| c == 1), "{n:?}");
    let q = app.get_json("/api/v1/queue", &app.reader).await;
    assert_eq!(q["succeeded"], ids.len() as i64);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_graceful_shutdown_gives_unfinished_jobs_back_and_the_next_start_runs_them() {
    let db = TestDatabase::new().await;
    let mut settings = db.settings();
    settings.shutdown_grace = Duration::from_millis(200);
    let app = spawn_slow(db.clone(), settings.clone(), Duration::from_secs(30)).await;
    let ids = upload_n(&app, 3).await;
    wait_for_running(&app).await;
    let tokens = app.tokens();
    let started = Instant::now();
    app.stop().await;
    assert!(
        started.elapsed() < Duration::from_secs(10),
        "shutdown waited for the 30 s fits"
    );

    // Nothing is left running or failed: the interrupted jobs are queued again, attempts not counted.
    let app = spawn_app_with(db, settings, Arc::new(CoreEngine), Some(tokens)).await;
    for id in &ids {
        let f = app.wait_for_fit(*id, Duration::from_secs(60)).await;
        assert_eq!(f["status"], "succeeded", "{f}");
        assert_eq!(
            f["attempts"], 1,
            "a released job's attempt is not counted: {f}"
        );
    }
    assert!(successes(&app).await.values().all(|&c| c == 1));
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_running_fit_can_be_cancelled_and_retried() {
    let db = TestDatabase::new().await;
    let mut settings = db.settings();
    settings.workers = 1;
    let app = spawn_slow(db, settings, Duration::from_secs(2)).await;
    let ids = upload_n(&app, 2).await;
    wait_for_running(&app).await;
    // The first is running, the second queued: cancel both.
    for id in &ids {
        let r = app
            .post_json(
                &format!("/api/v1/fits/{id}/cancel"),
                &app.inspector,
                &json!({}),
            )
            .await;
        assert_eq!(r.status(), 200);
    }
    for id in &ids {
        let f = app.wait_for_fit(*id, Duration::from_secs(20)).await;
        assert_eq!(f["status"], "cancelled", "{f}");
        // Cancelled by its worker (running) or by the store (queued): the same kind.
        assert_eq!(f["error_kind"], "cancelled", "{f}");
    }
    let r = app
        .post_json(
            &format!("/api/v1/fits/{}/retry", ids[0]),
            &app.inspector,
            &json!({}),
        )
        .await;
    assert_eq!(r.status(), 200);
    let f = app.wait_for_fit(ids[0], Duration::from_secs(30)).await;
    assert_eq!(f["status"], "succeeded", "{f}");
    app.stop().await;
}

/// Uploads one distinct synthetic sweep (invented model) for `part`.
async fn upload_one(app: &TestApp, part: &str, i: usize) -> reqwest::Response {
    let csv = synthetic_csv(
        &simple_model(1e-5 * (1.0 + i as f64 / 10.0), 0.05, 5e-12),
        1e4,
        1e8,
        101,
    );
    app.upload(
        &format!("{part}-{i}.csv"),
        csv,
        &[("part_number", part), ("lot", "L")],
    )
    .await
}

async fn assert_busy(r: reqwest::Response, status: u16, kind: &str) {
    assert_eq!(r.status().as_u16(), status);
    let after: u64 = r.headers()["retry-after"]
        .to_str()
        .unwrap()
        .parse()
        .unwrap();
    assert!(after >= 1);
    assert_eq!(r.headers()["content-type"], "application/problem+json");
    let body: Value = r.json().await.unwrap();
    assert_eq!(
        body["type"],
        format!("urn:henrybook:problem:{kind}"),
        "{body}"
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn past_the_queue_bounds_uploads_and_refits_are_refused_with_retry_after() {
    let db = TestDatabase::new().await;
    let mut settings = db.settings();
    settings.workers = 1;
    settings.shutdown_grace = Duration::from_millis(200);
    settings.max_queued_fits_per_part = 2;
    settings.max_queued_fits = 3;
    let app = spawn_slow(db, settings, Duration::from_secs(60)).await;
    app.create_part("Q-1", json!({})).await;
    app.create_part("Q-2", json!({})).await;
    let mut ids = Vec::new();
    for i in 0..2 {
        let r = upload_one(&app, "Q-1", i).await;
        assert_eq!(r.status(), 202);
        ids.push(r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap());
    }
    // The part's bound: 429, per part.
    assert_busy(upload_one(&app, "Q-1", 2).await, 429, "throttled").await;
    let r = app
        .post_json(
            &format!("/api/v1/fits/{}/refit", ids[0]),
            &app.engineer,
            &json!({"options": {"max_sections": 1}}),
        )
        .await;
    assert_busy(r, 429, "throttled").await;
    // Another part still gets in, up to the service's bound: then 503 for everyone.
    assert_eq!(upload_one(&app, "Q-2", 3).await.status(), 202);
    assert_busy(upload_one(&app, "Q-2", 4).await, 503, "overloaded").await;

    // gRPC answers the same bounds with RESOURCE_EXHAUSTED and UNAVAILABLE.
    let mut fits = henrybook::grpc::proto::fit_registry_client::FitRegistryClient::new(
        app.grpc_channel().await,
    );
    let message = |part: &str| henrybook::grpc::proto::UploadSweepRequest {
        file_name: format!("{part}-9.csv"),
        file: synthetic_csv(&simple_model(3e-5, 0.05, 5e-12), 1e4, 1e8, 101),
        part_number: part.into(),
        lot: "L".into(),
        ..Default::default()
    };
    let s = fits
        .upload_sweep(henrybook_tests::service::grpc_request(
            message("Q-2"),
            &app.inspector,
        ))
        .await
        .unwrap_err();
    assert_eq!(s.code(), tonic::Code::Unavailable, "{s:?}");
    assert!(s.metadata().get("retry-after").is_some(), "{s:?}");

    // Nothing of the refused was stored: three fits, queued or running.
    let q = app.get_json("/api/v1/queue", &app.reader).await;
    assert_eq!(
        q["queued"].as_i64().unwrap() + q["running"].as_i64().unwrap(),
        3,
        "{q}"
    );
    let all = app.get_json("/api/v1/fits", &app.reader).await;
    assert_eq!(all["items"].as_array().unwrap().len(), 3);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_part_over_its_bound_is_resource_exhausted_over_grpc() {
    let db = TestDatabase::new().await;
    let mut settings = db.settings();
    settings.workers = 1;
    settings.shutdown_grace = Duration::from_millis(200);
    settings.max_queued_fits_per_part = 1;
    let app = spawn_slow(db, settings, Duration::from_secs(60)).await;
    app.create_part("Q-1", json!({})).await;
    assert_eq!(upload_one(&app, "Q-1", 0).await.status(), 202);
    let mut fits = henrybook::grpc::proto::fit_registry_client::FitRegistryClient::new(
        app.grpc_channel().await,
    );
    let s = fits
        .upload_sweep(henrybook_tests::service::grpc_request(
            henrybook::grpc::proto::UploadSweepRequest {
                file_name: "Q-1-9.csv".into(),
                file: synthetic_csv(&simple_model(3e-5, 0.05, 5e-12), 1e4, 1e8, 101),
                part_number: "Q-1".into(),
                lot: "L".into(),
                ..Default::default()
            },
            &app.inspector,
        ))
        .await
        .unwrap_err();
    assert_eq!(s.code(), tonic::Code::ResourceExhausted, "{s:?}");
    assert!(s.metadata().get("retry-after").is_some(), "{s:?}");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn options_stored_out_of_range_fail_their_fit_naming_the_option() {
    // Options reach the database only through the checks at upload and refit; a row stored by an
    // older build (or edited by hand) must fail its own fit, with the option named, not the worker.
    let db = TestDatabase::new().await;
    let mut settings = db.settings();
    settings.workers = 1;
    settings.shutdown_grace = Duration::from_millis(200);
    let app = spawn_slow(db.clone(), settings.clone(), Duration::from_secs(60)).await;
    let ids = upload_n(&app, 2).await;
    let tokens = app.tokens();
    app.stop().await;
    let mut raw = db.raw().await;
    for (id, options) in ids.iter().zip([
        r#"{"time_limit_s": 1e300}"#,
        r#"{"family": "rational", "rational_order": 2000}"#,
    ]) {
        let changed = raw
            .execute(&format!(
                "UPDATE fits SET options_json = '{options}' WHERE fit_id = {id}"
            ))
            .await
            .unwrap();
        assert_eq!(changed, 1);
    }
    raw.close().await;
    let app = spawn_app_with(db, settings, Arc::new(CoreEngine), Some(tokens)).await;
    for (id, named) in ids.iter().zip(["time_limit_s", "rational_order"]) {
        let f = app.wait_for_fit(*id, Duration::from_secs(60)).await;
        assert_eq!(f["status"], "failed", "{f}");
        assert!(f["error"].as_str().unwrap().contains(named), "{f}");
        assert_eq!(f["error_kind"], "invalid_options", "{f}");
    }
    // The worker is still there: a good upload afterwards is fitted.
    let r = upload_one(&app, "R-1", 50).await;
    let id = r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap();
    let f = app.wait_for_fit(id, Duration::from_secs(60)).await;
    assert_eq!(f["status"], "succeeded", "{f}");
    app.stop().await;
}

/// The real engine with a reader that refuses every file: a later build, stricter than the one that
/// accepted and stored a sweep.
struct StricterReader;

impl Engine for StricterReader {
    fn read_sweep(&self, _: &str, _: &[u8], _: &ReadOptions) -> Result<Sweep, SweepError> {
        Err(SweepError::at(2, "this reader no longer accepts the row"))
    }
    fn fit(&self, s: &Sweep, o: &FitOptions, c: &FitControl) -> Result<FitReport, FitError> {
        CoreEngine.fit(s, o, c)
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_stored_sweep_that_no_longer_reads_fails_as_unreadable_naming_the_line() {
    // Arrange: a sweep accepted and stored, its fit held back and given back at shutdown.
    let db = TestDatabase::new().await;
    let settings = db.settings();
    let app = spawn_slow(db.clone(), settings.clone(), Duration::from_secs(60)).await;
    let id = upload_n(&app, 1).await[0];
    wait_for_running(&app).await;
    let tokens = app.tokens();
    app.stop().await;

    // Act: a later build, whose reader refuses the stored file, runs the job.
    let app = spawn_app_with(db, settings, Arc::new(StricterReader), Some(tokens)).await;

    // Assert
    let f = app.wait_for_fit(id, Duration::from_secs(60)).await;
    assert_eq!(f["status"], "failed", "{f}");
    assert_eq!(f["error_kind"], "unreadable_sweep", "{f}");
    assert!(f["error"].as_str().unwrap().contains("line 2"), "{f}");
    app.stop().await;
}

/// The real engine, counting the files its reader reads.
struct CountingReader {
    reads: Arc<std::sync::atomic::AtomicUsize>,
}

impl Engine for CountingReader {
    fn read_sweep(&self, name: &str, bytes: &[u8], o: &ReadOptions) -> Result<Sweep, SweepError> {
        self.reads.fetch_add(1, Ordering::SeqCst);
        CoreEngine.read_sweep(name, bytes, o)
    }
    fn fit(&self, s: &Sweep, o: &FitOptions, c: &FitControl) -> Result<FitReport, FitError> {
        CoreEngine.fit(s, o, c)
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_uploaded_sweep_is_read_once_and_a_refit_reads_the_stored_file() {
    let db = TestDatabase::new().await;
    let settings = db.settings();
    let reads = Arc::new(std::sync::atomic::AtomicUsize::new(0));
    let engine = CountingReader {
        reads: reads.clone(),
    };
    let app = spawn_app_with(db, settings, Arc::new(engine), None).await;
    let ids = upload_n(&app, 3).await;
    for id in &ids {
        let f = app.wait_for_fit(*id, Duration::from_secs(60)).await;
        assert_eq!(f["status"], "succeeded", "{f}");
    }
    // Each upload read its file and its worker took that sweep. (A worker that claims a job in the
    // microseconds between the upload's commit and its hand-off reads the stored file instead, so
    // one more read is allowed; two in three uploads would be a hand-off that does not work.)
    let after_uploads = reads.load(Ordering::SeqCst);
    assert!((3..=4).contains(&after_uploads), "{after_uploads} reads");
    // A refit has no upload: its worker reads the stored file, and the result is the same fit.
    let r = app
        .post_json(
            &format!("/api/v1/fits/{}/refit", ids[0]),
            &app.engineer,
            &json!({"options": {}}),
        )
        .await;
    assert_eq!(r.status(), 202);
    let again = r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap();
    let f = app.wait_for_fit(again, Duration::from_secs(60)).await;
    assert_eq!(f["status"], "succeeded", "{f}");
    assert_eq!(reads.load(Ordering::SeqCst), after_uploads + 1);
    let first = app
        .get_json(&format!("/api/v1/fits/{}", ids[0]), &app.reader)
        .await;
    assert_eq!(f["report"]["model"], first["report"]["model"]);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_part_at_its_bound_is_refused_before_its_file_is_looked_at() {
    let db = TestDatabase::new().await;
    let mut settings = db.settings();
    settings.workers = 1;
    settings.shutdown_grace = Duration::from_millis(200);
    settings.max_queued_fits_per_part = 1;
    let app = spawn_slow(db, settings, Duration::from_secs(60)).await;
    app.create_part("Q-1", json!({})).await;
    assert_eq!(upload_one(&app, "Q-1", 0).await.status(), 202);
    // The form names the part first: the part's bound answers (429), not the empty file (422), and
    // the whole body was read before the answer (the client sees the refusal, not a broken pipe).
    let form = reqwest::multipart::Form::new()
        .text("part_number", "Q-1")
        .text("lot", "L")
        .part(
            "file",
            reqwest::multipart::Part::bytes(Vec::new()).file_name("empty.csv"),
        );
    let r = app
        .client
        .post(app.url("/api/v1/sweeps"))
        .bearer_auth(&app.inspector)
        .multipart(form)
        .send()
        .await
        .unwrap();
    assert_busy(r, 429, "throttled").await;
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn concurrent_refits_never_take_a_part_past_its_queue_bound() {
    let db = TestDatabase::new().await;
    let mut settings = db.settings();
    settings.workers = 1;
    settings.shutdown_grace = Duration::from_millis(200);
    settings.max_queued_fits_per_part = 3;
    let app = spawn_slow(db, settings, Duration::from_secs(60)).await;
    app.create_part("B-1", json!({})).await;
    let r = upload_one(&app, "B-1", 0).await;
    assert_eq!(r.status(), 202);
    let fit_id = r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap();
    // Twelve refits at once: each passes the check before the write, so only the check inside the
    // write keeps the part at its bound (one fit already queued or running, two more fit).
    let mut requests = tokio::task::JoinSet::new();
    for i in 0..12 {
        let request = app
            .client
            .post(app.url(&format!("/api/v1/fits/{fit_id}/refit")))
            .bearer_auth(&app.engineer)
            .json(&json!({"options": {"max_iterations": 100 + i}}));
        requests.spawn(request.send());
    }
    let mut accepted = 0;
    while let Some(r) = requests.join_next().await {
        let r = r.unwrap().unwrap();
        match r.status().as_u16() {
            202 => accepted += 1,
            429 => assert_busy(r, 429, "throttled").await,
            other => panic!("refit answered {other}: {}", r.text().await.unwrap()),
        }
    }
    assert_eq!(
        accepted, 2,
        "the part's bound is 3 with one fit already queued"
    );
    let fits: Value = app
        .client
        .get(app.url("/api/v1/fits?part_number=B-1"))
        .bearer_auth(&app.inspector)
        .send()
        .await
        .unwrap()
        .json()
        .await
        .unwrap();
    let items = fits["items"]
        .as_array()
        .or(fits.as_array())
        .cloned()
        .unwrap_or_default();
    assert_eq!(items.len(), 3, "the upload and two refits: {fits}");
    let waiting = items
        .iter()
        .filter(|f| f["status"] == "queued" || f["status"] == "running")
        .count();
    assert!(waiting <= 3, "{waiting} fits of the part wait: {fits}");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn finished_jobs_are_pruned_after_the_retention_and_their_fits_answer_as_before() {
    // Arrange: one fit succeeds and one is cancelled before it runs, under the default retention
    // (a week): their job rows stay.
    let db = TestDatabase::new().await;
    let mut settings = db.settings();
    settings.workers = 1;
    let app = spawn_slow(db.clone(), settings.clone(), Duration::from_millis(500)).await;
    let ids = upload_n(&app, 2).await;
    let r = app
        .post_json(
            &format!("/api/v1/fits/{}/cancel", ids[1]),
            &app.inspector,
            &json!({}),
        )
        .await;
    assert_eq!(r.status(), 200);
    let mut before = Vec::new();
    for id in &ids {
        before.push(app.wait_for_fit(*id, Duration::from_secs(60)).await);
    }
    assert_eq!(before[0]["status"], "succeeded", "{}", before[0]);
    assert_eq!(before[1]["status"], "cancelled", "{}", before[1]);
    let mut raw = db.raw().await;
    let count = "SELECT COUNT(*) FROM jobs";
    assert_eq!(raw.fetch_i64(count).await.unwrap(), 2);
    let tokens = app.tokens();
    app.stop().await;

    // Act: start again with a retention far shorter than any real one; the pool's housekeeping
    // deletes both job rows.
    settings.job_retention = Duration::from_millis(100);
    let app = spawn_app_with(db, settings, Arc::new(CoreEngine), Some(tokens)).await;
    let deadline = Instant::now() + Duration::from_secs(30);
    loop {
        let rows = raw.fetch_i64(count).await.unwrap();
        if rows == 0 {
            break;
        }
        assert!(Instant::now() < deadline, "{rows} job rows still there");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }

    // Assert: the fits answer as before, attempts included.
    for (id, was) in ids.iter().zip(&before) {
        let now = app.wait_for_fit(*id, Duration::from_secs(1)).await;
        assert_eq!(&now, was);
    }
    // A finished fit without its job row is still a finished fit: a cancel conflicts (409), it is
    // not unknown.
    let r = app
        .post_json(
            &format!("/api/v1/fits/{}/cancel", ids[0]),
            &app.inspector,
            &json!({}),
        )
        .await;
    assert_eq!(r.status(), 409, "{}", r.text().await.unwrap_or_default());
    // A retry queues the pruned job again, and it runs.
    let r = app
        .post_json(
            &format!("/api/v1/fits/{}/retry", ids[1]),
            &app.inspector,
            &json!({}),
        )
        .await;
    assert_eq!(r.status(), 200, "{}", r.text().await.unwrap_or_default());
    let retried = app.wait_for_fit(ids[1], Duration::from_secs(60)).await;
    assert_eq!(retried["status"], "succeeded", "{retried}");
    assert_eq!(retried["attempts"], 1, "{retried}");
    assert_eq!(successes(&app).await.len(), 2);
    let report = app.store.verify_integrity().await.unwrap();
    assert!(report.ok(), "{report:?}");
    raw.close().await;
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_service_dropped_during_its_drain_leaves_no_worker_pool_running_behind() {
    // Arrange: a fit running (held back for 30 s) and a long grace, so the drain waits for the pool.
    let db = TestDatabase::new().await;
    let mut settings = db.settings();
    settings.workers = 1;
    let app = spawn_slow(db.clone(), settings.clone(), Duration::from_secs(30)).await;
    let id = upload_n(&app, 1).await[0];
    wait_for_running(&app).await;
    let tokens = app.tokens();

    // Act: ask for a graceful shutdown, wait until both listeners are closed (the drain now waits for
    // the pool), then drop the service there, as an aborted task or a runtime shut down does.
    let mut app = app;
    app.signal_stop();
    let grpc_address = app.grpc_url.trim_start_matches("http://").to_string();
    let deadline = Instant::now() + Duration::from_secs(20);
    while app.client.get(app.url("/healthz")).send().await.is_ok()
        || tokio::net::TcpStream::connect(&grpc_address).await.is_ok()
    {
        assert!(Instant::now() < deadline, "the listeners stay open");
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    app.crash().await;

    // Assert: the next start runs the abandoned job again after its lease, its first run counted.
    // (A pool left running behind would give the job back at the end of its grace, uncounted, or
    // write the result itself: attempts 1 either way.)
    let app = spawn_app_with(db, settings, Arc::new(CoreEngine), Some(tokens)).await;
    let f = app.wait_for_fit(id, Duration::from_secs(60)).await;
    assert_eq!(f["status"], "succeeded", "{f}");
    assert_eq!(f["attempts"], 2, "the abandoned run counts");
    assert_eq!(successes(&app).await.get(&id), Some(&1));
    app.stop().await;
}
