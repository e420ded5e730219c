//! `spawn_app()`: the real service on 127.0.0.1 with a free port and its own fresh database, with
//! one token per role and a request helper per endpoint.
//!
//! The database is SQLite (a file in a temporary folder) unless `HENRYBOOK_TEST_BACKEND=postgres`:
//! then every application runs on a fresh PostgreSQL database of its own ([`crate::pg::TestDb`]),
//! dropped with the last handle on it. The tests that look under the API do it through
//! [`TestApp::store`] (a [`Backend`], either store) or, for what only SQL can do (tampering with
//! the record), through [`TestDatabase::raw`], which takes each statement in both dialects.

use crate::pg::TestDb;
use henrybook::app::Application;
use henrybook::jobs::{CoreEngine, Engine};
use henrybook::model::{ImpedanceModel, LumpedModel};
use henrybook::settings::Settings;
use henrybook::store::Backend;
use henrybook::store::tokens::Role;
use serde_json::Value;
use sqlx::Connection;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::oneshot;
use tokio::task::JoinHandle;

/// The environment variable that chooses the database of the service tests: `sqlite` (the default)
/// or `postgres`.
pub const BACKEND_VARIABLE: &str = "HENRYBOOK_TEST_BACKEND";

/// Which database the service tests run on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TestBackend {
    Sqlite,
    Postgres,
}

impl TestBackend {
    /// The backend [`BACKEND_VARIABLE`] names (SQLite when unset); any other value fails the test,
    /// so a typo never runs the suite on the wrong database unnoticed.
    pub fn chosen() -> TestBackend {
        match std::env::var(BACKEND_VARIABLE).as_deref() {
            Err(_) | Ok("") | Ok("sqlite") => TestBackend::Sqlite,
            Ok("postgres") => TestBackend::Postgres,
            Ok(other) => panic!("{BACKEND_VARIABLE}={other}: expected sqlite or postgres"),
        }
    }
}

/// The database of one test's application (shared by its restarts): a temporary folder, with the
/// SQLite file in it or beside a fresh PostgreSQL database. Clones share both; the folder is removed
/// and the PostgreSQL database dropped when the last clone goes.
#[derive(Clone)]
pub struct TestDatabase {
    /// A temporary folder for the test's files (and the SQLite database).
    pub dir: Arc<tempfile::TempDir>,
    postgres: Option<Arc<TestDb>>,
}

impl TestDatabase {
    /// A fresh database on the backend [`TestBackend::chosen`] names.
    pub async fn new() -> TestDatabase {
        TestDatabase::on(TestBackend::chosen()).await
    }

    /// A fresh database on `backend`.
    pub async fn on(backend: TestBackend) -> TestDatabase {
        let dir = Arc::new(tempfile::tempdir().expect("temp dir"));
        let postgres = match backend {
            TestBackend::Sqlite => None,
            TestBackend::Postgres => Some(Arc::new(TestDb::with_pool(1).await)),
        };
        TestDatabase { dir, postgres }
    }

    pub fn backend(&self) -> TestBackend {
        match self.postgres {
            Some(_) => TestBackend::Postgres,
            None => TestBackend::Sqlite,
        }
    }

    /// The location as `--database` takes it: the SQLite file's path or the PostgreSQL URL.
    pub fn location(&self) -> PathBuf {
        match &self.postgres {
            Some(db) => PathBuf::from(&db.url),
            None => self.dir.path().join("henrybook.db"),
        }
    }

    /// [`test_settings`] on this database.
    pub fn settings(&self) -> Settings {
        test_settings(self.location())
    }

    /// A connection of its own to the database, for statements under the API.
    pub async fn raw(&self) -> RawConnection {
        match &self.postgres {
            Some(db) => RawConnection::Postgres(
                sqlx::PgConnection::connect(&db.url)
                    .await
                    .expect("a raw PostgreSQL connection"),
            ),
            None => RawConnection::Sqlite(
                sqlx::SqliteConnection::connect(&format!("sqlite://{}", self.location().display()))
                    .await
                    .expect("a raw SQLite connection"),
            ),
        }
    }
}

/// A plain connection to a test's database, of either kind: each statement is given in both dialects.
pub enum RawConnection {
    Sqlite(sqlx::SqliteConnection),
    Postgres(sqlx::PgConnection),
}

impl RawConnection {
    /// Runs `sql` (the same text on both backends); the rows it changed.
    pub async fn execute(&mut self, sql: &str) -> Result<u64, sqlx::Error> {
        self.execute_per_dialect(sql, sql).await
    }

    /// Runs `sqlite` on SQLite or `postgres` on PostgreSQL; the rows it changed.
    pub async fn execute_per_dialect(
        &mut self,
        sqlite: &str,
        postgres: &str,
    ) -> Result<u64, sqlx::Error> {
        match self {
            RawConnection::Sqlite(c) => sqlx::raw_sql(sqlx::AssertSqlSafe(sqlite.to_string()))
                .execute(c)
                .await
                .map(|r| r.rows_affected()),
            RawConnection::Postgres(c) => sqlx::raw_sql(sqlx::AssertSqlSafe(postgres.to_string()))
                .execute(c)
                .await
                .map(|r| r.rows_affected()),
        }
    }

    /// The single integer `sql` (the same text on both backends) selects, e.g. a `COUNT(*)`.
    pub async fn fetch_i64(&mut self, sql: &str) -> Result<i64, sqlx::Error> {
        let sql = sqlx::AssertSqlSafe(sql.to_string());
        match self {
            RawConnection::Sqlite(c) => sqlx::query_scalar(sql).fetch_one(c).await,
            RawConnection::Postgres(c) => sqlx::query_scalar(sql).fetch_one(c).await,
        }
    }

    pub async fn close(self) {
        match self {
            RawConnection::Sqlite(c) => c.close().await.ok(),
            RawConnection::Postgres(c) => c.close().await.ok(),
        };
    }
}

pub struct TestApp {
    pub base_url: String,
    /// The gRPC listener, as `http://127.0.0.1:<port>`.
    pub grpc_url: String,
    pub client: reqwest::Client,
    pub reader: String,
    pub inspector: String,
    pub engineer: String,
    /// A second handle on the database (either store), for checks that look under the API.
    pub store: Backend,
    /// The database (and temporary folder), kept alive for as long as the app; shared with a
    /// restarted app.
    pub database: TestDatabase,
    stop: Option<oneshot::Sender<()>>,
    server: Option<JoinHandle<anyhow::Result<()>>>,
}

/// Test settings on `location`: a short lease and poll so restarts are quick, and a small pool on
/// PostgreSQL (tests run side by side on one server).
pub fn test_settings(location: PathBuf) -> Settings {
    let mut s = Settings::new(location);
    s.workers = 2;
    s.lease = Duration::from_millis(600);
    s.poll_interval = Duration::from_millis(50);
    s.shutdown_grace = Duration::from_secs(10);
    s.database_connections = 6;
    s
}

/// The service on a fresh database ([`TestDatabase::new`]) with [`test_settings`].
pub async fn spawn_app() -> TestApp {
    let database = TestDatabase::new().await;
    let settings = database.settings();
    spawn_app_with(database, settings, Arc::new(CoreEngine), None).await
}

/// Starts an application on `database` with `settings` (made by [`TestDatabase::settings`], then
/// changed as the test needs; the database may already hold data and tokens).
pub async fn spawn_app_with(
    database: TestDatabase,
    settings: Settings,
    engine: Arc<dyn Engine>,
    tokens: Option<[String; 3]>,
) -> TestApp {
    assert_eq!(
        settings.database_path,
        database.location(),
        "the settings name the test's database"
    );
    let app = Application::build_with_engine(settings, engine)
        .await
        .expect("the application builds");
    let base_url = format!("http://127.0.0.1:{}", app.port());
    let grpc_url = format!("http://{}", app.grpc_address());
    let store = Backend::open(&database.location(), 2)
        .await
        .expect("second store handle");
    let [reader, inspector, engineer] = match tokens {
        Some(t) => t,
        None => {
            let mut t = Vec::new();
            for role in Role::ALL {
                t.push(store.create_token(role, None).await.unwrap().1);
            }
            [t[0].clone(), t[1].clone(), t[2].clone()]
        }
    };
    let (tx, rx) = oneshot::channel::<()>();
    let server = tokio::spawn(app.run(async move {
        let _ = rx.await;
    }));
    TestApp {
        base_url,
        grpc_url,
        client: reqwest::Client::new(),
        reader,
        inspector,
        engineer,
        store,
        database,
        stop: Some(tx),
        server: Some(server),
    }
}

impl TestApp {
    pub fn url(&self, path: &str) -> String {
        format!("{}{}", self.base_url, path)
    }

    pub fn tokens(&self) -> [String; 3] {
        [
            self.reader.clone(),
            self.inspector.clone(),
            self.engineer.clone(),
        ]
    }

    /// Sends the shutdown signal without waiting for the server to stop ([`TestApp::stop`] waits).
    pub fn signal_stop(&mut self) {
        if let Some(tx) = self.stop.take() {
            let _ = tx.send(());
        }
    }

    /// Graceful shutdown; waits for the server to stop.
    pub async fn stop(mut self) {
        if let Some(tx) = self.stop.take() {
            let _ = tx.send(());
        }
        if let Some(s) = self.server.take() {
            s.await.expect("server task").expect("server stops cleanly");
        }
    }

    /// Stops without any shutdown work, as a crash would: the server task is aborted, leases stay.
    pub async fn crash(mut self) {
        // The stop sender is kept until the server task is gone: dropping it completes the shutdown
        // future, which would start a graceful shutdown racing the abort.
        let stop = self.stop.take();
        if let Some(s) = self.server.take() {
            s.abort();
            let _ = s.await;
        }
        drop(stop);
    }

    pub async fn get(&self, path: &str, token: &str) -> reqwest::Response {
        self.client
            .get(self.url(path))
            .bearer_auth(token)
            .send()
            .await
            .expect("request")
    }

    pub async fn get_json(&self, path: &str, token: &str) -> Value {
        let r = self.get(path, token).await;
        let status = r.status();
        let body: Value = r.json().await.expect("JSON body");
        assert!(status.is_success(), "GET {path}: {status} {body}");
        body
    }

    pub async fn post_json(&self, path: &str, token: &str, body: &Value) -> reqwest::Response {
        self.client
            .post(self.url(path))
            .bearer_auth(token)
            .json(body)
            .send()
            .await
            .expect("request")
    }

    pub async fn put_json(&self, path: &str, token: &str, body: &Value) -> reqwest::Response {
        self.client
            .put(self.url(path))
            .bearer_auth(token)
            .json(body)
            .send()
            .await
            .expect("request")
    }

    /// Creates a part (as engineer) and checks the 201.
    pub async fn create_part(&self, part_number: &str, limits: Value) {
        let r = self
            .post_json(
                "/api/v1/parts",
                &self.engineer,
                &serde_json::json!({"part_number": part_number, "description": "test part", "limits": limits}),
            )
            .await;
        assert_eq!(r.status(), 201, "{}", r.text().await.unwrap_or_default());
    }

    /// Uploads a sweep (as inspector) with the given text fields.
    pub async fn upload(
        &self,
        file_name: &str,
        bytes: Vec<u8>,
        fields: &[(&str, &str)],
    ) -> reqwest::Response {
        let mut form = reqwest::multipart::Form::new().part(
            "file",
            reqwest::multipart::Part::bytes(bytes).file_name(file_name.to_string()),
        );
        for (k, v) in fields {
            form = form.text(k.to_string(), v.to_string());
        }
        self.client
            .post(self.url("/api/v1/sweeps"))
            .bearer_auth(&self.inspector)
            .multipart(form)
            .send()
            .await
            .expect("request")
    }

    /// A gRPC channel to the application's gRPC listener.
    pub async fn grpc_channel(&self) -> tonic::transport::Channel {
        tonic::transport::Endpoint::from_shared(self.grpc_url.clone())
            .expect("the gRPC URL is valid")
            .connect()
            .await
            .expect("the gRPC listener accepts")
    }

    /// Polls a fit until it leaves queued/running (at most `timeout`).
    pub async fn wait_for_fit(&self, fit_id: i64, timeout: Duration) -> Value {
        let every = Duration::from_millis(25);
        let get = |path: String| async move { self.get_json(&path, &self.reader).await };
        poll_fit(get, fit_id, timeout, every).await
    }
}

/// An impedance CSV of a known lumped model, noise-free, on a log grid, with σ = 0.2 % of |Z| per
/// point (a synthetic sweep from a known model, for recovery and query tests).
pub fn synthetic_csv(model: &LumpedModel, f_min_hz: f64, f_max_hz: f64, points: usize) -> Vec<u8> {
    let mut out = String::from("frequency_hz,z_real_ohm,z_imag_ohm,sigma_ohm\n");
    for i in 0..points {
        let f = f_min_hz * (f_max_hz / f_min_hz).powf(i as f64 / (points - 1) as f64);
        let z = model.impedance(f);
        out.push_str(&format!(
            "{f:.9e},{:.12e},{:.12e},{:.6e}\n",
            z.re,
            z.im,
            2e-3 * z.norm()
        ));
    }
    out.into_bytes()
}

/// A simple lumped model: L0, Rdc, Cp, no other elements.
pub fn simple_model(l0_h: f64, rdc_ohm: f64, cp_f: f64) -> LumpedModel {
    LumpedModel {
        l0_h,
        rdc_ohm,
        k_ac_ohm_per_sqrt_hz: 0.0,
        rp_ohm: None,
        cp_f,
        ls_h: 0.0,
        sections: vec![],
        core: None,
    }
}

/// `message` with `authorization: Bearer <token>` metadata.
pub fn grpc_request<T>(message: T, token: &str) -> tonic::Request<T> {
    let mut r = tonic::Request::new(message);
    r.metadata_mut().insert(
        "authorization",
        format!("Bearer {token}")
            .parse()
            .expect("a token is visible ASCII"),
    );
    r
}

/// A `henrybook serve` process of the built service binary ([`crate::chaos::service_binary`]: build it
/// first with `cargo build -p henrybook`), on a database given as the server takes it (a path, a
/// `sqlite:` URL or a PostgreSQL URL), with its log in a file of its own. Killed when dropped.
pub struct ServerProcess {
    child: Option<std::process::Child>,
    pub base_url: String,
    pub log: PathBuf,
    pub client: reqwest::Client,
}

/// Runs the service binary with `args`; its standard output, or a panic with its error output.
pub fn run_service_command(args: &[&str]) -> String {
    let bin = crate::chaos::service_binary();
    let out = std::process::Command::new(&bin)
        .args(args)
        .output()
        .unwrap_or_else(|e| {
            panic!(
                "cannot run {}: {e} (build it first: cargo build -p henrybook)",
                bin.display()
            )
        });
    assert!(
        out.status.success(),
        "henrybook {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).expect("UTF-8 output")
}

/// A token of `role` made with the service's own `token create` on `database`.
pub fn service_token(database: &str, role: &str) -> String {
    run_service_command(&["token", "create", "--role", role, "--database", database])
        .trim()
        .to_string()
}

impl ServerProcess {
    /// Starts the server with `workers` workers and a 2 s lease and waits (at most 60 s) until it
    /// answers /readyz with 200.
    pub async fn start(database: &str, workers: usize, log: PathBuf) -> ServerProcess {
        let port = std::net::TcpListener::bind("127.0.0.1:0")
            .and_then(|l| l.local_addr())
            .expect("a free port")
            .port();
        let file = std::fs::File::create(&log).expect("the log file");
        let bin = crate::chaos::service_binary();
        let child = std::process::Command::new(&bin)
            .arg("serve")
            .args(["--listen", &format!("127.0.0.1:{port}")])
            .args(["--grpc-listen", "127.0.0.1:0"])
            .args(["--database", database])
            .args(["--workers", &workers.to_string()])
            .args([
                "--lease-s",
                "2",
                "--shutdown-grace-s",
                "5",
                "--drain-timeout-s",
                "10",
            ])
            .env("RUST_LOG", "info")
            .stdout(file.try_clone().expect("the log file"))
            .stderr(file)
            .spawn()
            .unwrap_or_else(|e| {
                panic!(
                    "cannot start {}: {e} (build it first: cargo build -p henrybook)",
                    bin.display()
                )
            });
        let mut server = ServerProcess {
            child: Some(child),
            base_url: format!("http://127.0.0.1:{port}"),
            log,
            client: reqwest::Client::new(),
        };
        let deadline = tokio::time::Instant::now() + Duration::from_secs(60);
        loop {
            if let Ok(r) = server.client.get(server.url("/readyz")).send().await
                && r.status() == 200
            {
                return server;
            }
            if let Some(status) = server
                .child
                .as_mut()
                .and_then(|c| c.try_wait().ok().flatten())
            {
                panic!(
                    "the server exited at start ({status}): {}",
                    server.log_text()
                );
            }
            assert!(
                tokio::time::Instant::now() < deadline,
                "the server was not ready within 60 s: {}",
                server.log_text()
            );
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
    }

    pub fn url(&self, path: &str) -> String {
        format!("{}{}", self.base_url, path)
    }

    pub fn log_text(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    /// SIGTERM, then waits (at most 30 s) for a clean exit.
    pub fn stop(mut self) {
        let Some(mut child) = self.child.take() else {
            return;
        };
        let sent = std::process::Command::new("kill")
            .args(["-TERM", &child.id().to_string()])
            .status()
            .expect("kill -TERM");
        assert!(sent.success());
        let deadline = std::time::Instant::now() + Duration::from_secs(30);
        loop {
            if let Some(status) = child.try_wait().expect("the server's status") {
                assert!(
                    status.success(),
                    "the server stopped with {status}: {}",
                    self.log_text()
                );
                return;
            }
            assert!(
                std::time::Instant::now() < deadline,
                "the server did not stop within 30 s"
            );
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    pub async fn get_json(&self, path: &str, token: &str) -> Value {
        let r = self
            .client
            .get(self.url(path))
            .bearer_auth(token)
            .send()
            .await
            .expect("request");
        let status = r.status();
        let body: Value = r.json().await.expect("JSON body");
        assert!(status.is_success(), "GET {path}: {status} {body}");
        body
    }

    /// POSTs JSON and asserts the status; the answer's body.
    pub async fn post_json(&self, path: &str, token: &str, body: &Value, status: u16) -> Value {
        let r = self
            .client
            .post(self.url(path))
            .bearer_auth(token)
            .json(body)
            .send()
            .await
            .expect("request");
        let got = r.status();
        let text = r.text().await.unwrap_or_default();
        assert_eq!(got, status, "POST {path}: {text}");
        serde_json::from_str(&text).unwrap_or(Value::Null)
    }

    /// Uploads a CSV sweep of `part` (lot `lot`, method direct) and asserts the 202; the fit's id.
    pub async fn upload_csv(&self, token: &str, part: &str, lot: &str, csv: Vec<u8>) -> i64 {
        let form = reqwest::multipart::Form::new()
            .part(
                "file",
                reqwest::multipart::Part::bytes(csv).file_name(format!("{part}-{lot}.csv")),
            )
            .text("part_number", part.to_string())
            .text("lot", lot.to_string())
            .text("method", "direct");
        let r = self
            .client
            .post(self.url("/api/v1/sweeps"))
            .bearer_auth(token)
            .multipart(form)
            .send()
            .await
            .expect("request");
        let status = r.status();
        let body: Value = r.json().await.expect("JSON body");
        assert_eq!(status, 202, "upload: {body}");
        body["fit_id"].as_i64().expect("a fit id")
    }

    /// Polls a fit until it leaves queued/running (at most `timeout`).
    pub async fn wait_for_fit(&self, fit_id: i64, token: &str, timeout: Duration) -> Value {
        let every = Duration::from_millis(50);
        let get = |path: String| async move { self.get_json(&path, token).await };
        poll_fit(get, fit_id, timeout, every).await
    }
}

impl Drop for ServerProcess {
    fn drop(&mut self) {
        if let Some(c) = self.child.as_mut() {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

/// Polls `GET /api/v1/fits/{fit_id}` through `get` every `every` until the fit leaves queued and
/// running; fails the test after `timeout`.
async fn poll_fit<F, Fut>(get: F, fit_id: i64, timeout: Duration, every: Duration) -> Value
where
    F: Fn(String) -> Fut,
    Fut: std::future::Future<Output = Value>,
{
    let deadline = tokio::time::Instant::now() + timeout;
    loop {
        let fit = get(format!("/api/v1/fits/{fit_id}")).await;
        let status = fit["status"].as_str().unwrap_or_default().to_string();
        if status != "queued" && status != "running" {
            return fit;
        }
        assert!(
            tokio::time::Instant::now() < deadline,
            "fit {fit_id} still {status} after {timeout:?}"
        );
        tokio::time::sleep(every).await;
    }
}
