//! The chaos harness: replica processes of the real `henrybook` binary on one database, sweeps uploaded
//! through the HTTP API, and while they are fitted a replica killed with SIGKILL (and restarted on the
//! same database) at random moments, and once stopped with SIGSTOP for longer than its lease and
//! resumed. At the end every replica is stopped and the database is read to check that no work was
//! lost or done twice ([`check`]).
//!
//! Used by the bounded test `tests/service/chaos.rs` and the full run `tests/chaos/main.rs`
//! (see tests/chaos/README.md). On SQLite with one replica; on PostgreSQL with several replicas on one
//! database, and there also restarts of the database server mid-run (`pg_ctlcluster ... restart`, which
//! needs root and restarts the machine's server: run it where nothing else uses that server).

use serde_json::{Value, json};
use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::process::{Child, Command};
use std::sync::Arc;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::{Duration, Instant};
use tokio::sync::Semaphore;

use crate::procstat::{clock_ticks, cpu_times, parent_pid};
use crate::service::{simple_model, synthetic_csv};

/// Where the replicas keep their data.
#[derive(Debug, Clone)]
pub enum ChaosDatabase {
    /// A SQLite file (one replica: SQLite has one writer).
    Sqlite(PathBuf),
    /// A PostgreSQL URL (a database of the machine's server, already created).
    Postgres(String),
}

#[derive(Debug, Clone)]
pub struct ChaosConfig {
    /// The service binary (`target/<profile>/henrybook`).
    pub binary: PathBuf,
    pub database: ChaosDatabase,
    /// Replica processes on the database.
    pub replicas: usize,
    /// Sweeps uploaded (one fit each).
    pub fits: usize,
    /// Points per sweep.
    pub points: usize,
    /// SIGKILLs (each followed by a restart of the same replica on the same database).
    pub kills: usize,
    /// SIGSTOPs past the lease (each followed by SIGCONT).
    pub stops: usize,
    /// Restarts of the database server mid-run (PostgreSQL only).
    pub database_restarts: usize,
    /// The replicas' `--lease-s`.
    pub lease_s: f64,
    /// The replicas' `--workers`.
    pub workers: usize,
    /// Uploads in flight at once.
    pub upload_concurrency: usize,
    pub seed: u64,
    /// The whole run (uploads, chaos, drain) must end within this.
    pub time_bound: Duration,
    /// Replica logs go here (`replica-<i>.log`, appended across restarts).
    pub log_dir: PathBuf,
}

impl ChaosConfig {
    /// Refuses what cannot be run yet, with the reason.
    pub fn validate(&self) -> anyhow::Result<()> {
        match &self.database {
            ChaosDatabase::Postgres(_) => {
                anyhow::ensure!(
                    (1..=8).contains(&self.replicas),
                    "1 to 8 replicas on PostgreSQL"
                );
            }
            ChaosDatabase::Sqlite(_) => {
                anyhow::ensure!(
                    self.replicas == 1,
                    "SQLite has one writer, so the service runs one replica on it: --replicas must \
                     be 1 with a SQLite database (several replicas need PostgreSQL)"
                );
                anyhow::ensure!(
                    self.database_restarts == 0,
                    "a database restart needs a database server: SQLite is a file opened by the \
                     replica itself, with no separate server to restart"
                );
            }
        }
        anyhow::ensure!((1..=5000).contains(&self.fits), "fits must be 1..5000");
        anyhow::ensure!(self.points >= 16, "at least 16 points per sweep");
        anyhow::ensure!(
            self.lease_s > 0.0 && self.lease_s <= 60.0,
            "the lease must be in (0, 60] s"
        );
        anyhow::ensure!(self.workers >= 1 && self.upload_concurrency >= 1);
        Ok(())
    }
}

/// What happened, and what the database showed afterwards.
#[derive(Debug, Default)]
pub struct ChaosReport {
    pub seed: u64,
    pub kills: usize,
    pub restarts: usize,
    pub stops: usize,
    pub database_restarts: usize,
    /// Fits queued or running (by the API) when each kill came.
    pub to_go_at_kills: Vec<i64>,
    /// Uploads sent again after a connection error or a 429/503.
    pub upload_retries: usize,
    /// Uploads answered 2xx.
    pub accepted: usize,
    /// Fits whose job was claimed more than once (`jobs.attempts > 1`): work the chaos made run again.
    pub fits_rerun: i64,
    pub max_attempts_seen: i64,
    /// Outcomes a replica computed but was refused to write (its claim had been taken over or its
    /// lease lost), counted from the replicas' logs.
    pub late_writes_refused: usize,
    pub elapsed: Duration,
    /// CPU seconds the replica processes used, all of them, from the start of the run until each was
    /// stopped (the children this process waited for).
    pub replica_cpu_s: f64,
    /// CPU seconds the PostgreSQL server used over the run, its postmaster and every backend (on
    /// PostgreSQL without a restart of the server; `None` otherwise).
    pub database_cpu_s: Option<f64>,
    /// Broken invariants, each with what was found. Empty: the run passed.
    pub violations: Vec<String>,
}

impl ChaosReport {
    pub fn summary(&self) -> String {
        format!(
            "seed {}: {} kills (fits to go at each: {:?}), {} restarts, {} stops past the lease, \
             {} database restarts; \
             {} uploads accepted ({} sent again); {} fits re-run (most claims of one job: {}); \
             {} late writes refused; {:.1} s, {:.1} fits/s; CPU per fit: replicas {:.2} ms, \
             database {}; {}",
            self.seed,
            self.kills,
            self.to_go_at_kills,
            self.restarts,
            self.stops,
            self.database_restarts,
            self.accepted,
            self.upload_retries,
            self.fits_rerun,
            self.max_attempts_seen,
            self.late_writes_refused,
            self.elapsed.as_secs_f64(),
            self.accepted as f64 / self.elapsed.as_secs_f64().max(1e-9),
            1e3 * self.replica_cpu_s / self.accepted.max(1) as f64,
            self.database_cpu_s
                .map_or("not measured".to_string(), |c| format!(
                    "{:.2} ms",
                    1e3 * c / self.accepted.max(1) as f64
                )),
            if self.violations.is_empty() {
                "every invariant holds".to_string()
            } else {
                format!("{} invariants broken", self.violations.len())
            }
        )
    }
}

/// A small seeded generator (SplitMix64), so a run can be replayed from its printed seed.
pub struct SplitMix(u64);

impl SplitMix {
    pub fn new(seed: u64) -> Self {
        SplitMix(seed)
    }
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }
    /// Uniform in [lo, hi).
    pub fn uniform(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * ((self.next_u64() >> 11) as f64 / (1u64 << 53) as f64)
    }
}

/// A seed from the clock, for runs that do not name one.
pub fn clock_seed() -> u64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_nanos() as u64)
        .unwrap_or(1)
}

/// One replica process on a fixed loopback port (kept across restarts).
struct Replica {
    index: usize,
    port: u16,
    child: Option<Child>,
    log: PathBuf,
}

fn free_port() -> anyhow::Result<u16> {
    Ok(std::net::TcpListener::bind("127.0.0.1:0")?
        .local_addr()?
        .port())
}

fn database_args(db: &ChaosDatabase) -> Vec<String> {
    match db {
        ChaosDatabase::Sqlite(path) => vec!["--database".into(), path.display().to_string()],
        ChaosDatabase::Postgres(url) => vec!["--database".into(), url.clone()],
    }
}

impl Replica {
    fn url(&self) -> String {
        format!("http://127.0.0.1:{}", self.port)
    }

    fn pid(&self) -> Option<u32> {
        self.child.as_ref().map(|c| c.id())
    }

    /// Starts the process and waits until it answers /healthz.
    async fn start(&mut self, cfg: &ChaosConfig, http: &reqwest::Client) -> anyhow::Result<()> {
        let log = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(&self.log)?;
        let mut cmd = Command::new(&cfg.binary);
        cmd.arg("serve")
            .args(["--listen", &format!("127.0.0.1:{}", self.port)])
            .args(["--grpc-listen", "127.0.0.1:0"])
            .args(database_args(&cfg.database))
            .args(["--lease-s", &cfg.lease_s.to_string()])
            .args(["--workers", &cfg.workers.to_string()])
            // Every upload is queued at once: the bound on queued fits must hold the whole run.
            .args(["--max-queued-fits", &(cfg.fits + 100).to_string()])
            // Shutdown at the end of the run is quick; a graceful stop is not what is tested here.
            .args(["--shutdown-grace-s", "2", "--drain-timeout-s", "5"])
            .env("RUST_LOG", "warn")
            // The service logs on standard output.
            .stdout(log.try_clone()?)
            .stderr(log);
        let child = cmd.spawn().map_err(|e| {
            anyhow::anyhow!(
                "cannot start {}: {e} (build it first)",
                cfg.binary.display()
            )
        })?;
        self.child = Some(child);
        let deadline = Instant::now() + Duration::from_secs(60);
        loop {
            if let Ok(r) = http.get(format!("{}/healthz", self.url())).send().await
                && r.status() == 200
            {
                return Ok(());
            }
            if let Some(status) = self
                .child
                .as_mut()
                .and_then(|c| c.try_wait().ok().flatten())
            {
                anyhow::bail!(
                    "replica {} exited at start ({status}); its log: {}",
                    self.index,
                    self.log.display()
                );
            }
            anyhow::ensure!(
                Instant::now() < deadline,
                "replica {} did not answer /healthz within 60 s",
                self.index
            );
            tokio::time::sleep(Duration::from_millis(25)).await;
        }
    }

    /// SIGKILL: no shutdown work at all, leases and half-written batches stay as they are.
    fn kill(&mut self) -> anyhow::Result<()> {
        if let Some(mut c) = self.child.take() {
            c.kill()?;
            c.wait()?;
        }
        Ok(())
    }

    /// SIGTERM and wait (the end of the run).
    fn terminate(&mut self) -> anyhow::Result<()> {
        if let Some(mut c) = self.child.take() {
            signal(c.id(), "TERM")?;
            let deadline = Instant::now() + Duration::from_secs(30);
            while c.try_wait()?.is_none() {
                if Instant::now() > deadline {
                    c.kill()?;
                    break;
                }
                std::thread::sleep(Duration::from_millis(20));
            }
            c.wait()?;
        }
        Ok(())
    }
}

impl Drop for Replica {
    fn drop(&mut self) {
        if let Some(c) = self.child.as_mut() {
            let _ = signal(c.id(), "CONT");
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

/// Sends a signal by name with `kill(1)` (no libc binding needed).
fn signal(pid: u32, name: &str) -> anyhow::Result<()> {
    let status = Command::new("kill")
        .arg(format!("-{name}"))
        .arg(pid.to_string())
        .status()?;
    anyhow::ensure!(status.success(), "kill -{name} {pid} failed");
    Ok(())
}

/// A token of `role` made with the service's own command.
fn make_token(cfg: &ChaosConfig, role: &str) -> anyhow::Result<String> {
    let out = Command::new(&cfg.binary)
        .args(["token", "create", "--role", role])
        .args(database_args(&cfg.database))
        .output()
        .map_err(|e| anyhow::anyhow!("cannot run {}: {e}", cfg.binary.display()))?;
    anyhow::ensure!(
        out.status.success(),
        "token create: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    Ok(String::from_utf8(out.stdout)?.trim().to_string())
}

/// Sweeps per part: under the service's default bound of queued fits per part (100).
const FITS_PER_PART: usize = 50;

fn part_number(i: usize) -> String {
    format!("CHAOS-{:03}", i / FITS_PER_PART)
}

/// One upload, sent again after a connection error (the replica was killed or is restarting) or a
/// 429/503 (after its Retry-After), as a client would. A sweep sent twice is answered with the same
/// fit (the service's duplicate check), so a retry of an upload that did land adds nothing.
async fn upload(
    http: &reqwest::Client,
    urls: &[String],
    token: &str,
    i: usize,
    bytes: Vec<u8>,
    retries: &AtomicUsize,
    deadline: Instant,
) -> anyhow::Result<i64> {
    let mut attempt = 0usize;
    loop {
        let url = &urls[(i + attempt) % urls.len()];
        let form = reqwest::multipart::Form::new()
            .part(
                "file",
                reqwest::multipart::Part::bytes(bytes.clone()).file_name(format!("chaos-{i}.csv")),
            )
            .text("part_number", part_number(i))
            .text("lot", format!("L{}", i % 7));
        let sent = http
            .post(format!("{url}/api/v1/sweeps"))
            .bearer_auth(token)
            .multipart(form)
            .send()
            .await;
        let wait = match sent {
            Ok(r) if r.status().is_success() => {
                let body: Value = r.json().await?;
                return body["fit_id"]
                    .as_i64()
                    .ok_or_else(|| anyhow::anyhow!("upload {i}: no fit_id in {body}"));
            }
            Ok(r) if r.status() == 429 || r.status() == 503 => r
                .headers()
                .get("retry-after")
                .and_then(|v| v.to_str().ok()?.parse::<f64>().ok())
                .map_or(Duration::from_millis(200), Duration::from_secs_f64),
            Ok(r) => {
                let status = r.status();
                anyhow::bail!(
                    "upload {i}: {status} {}",
                    r.text().await.unwrap_or_default()
                )
            }
            Err(_) => Duration::from_millis(100),
        };
        anyhow::ensure!(Instant::now() < deadline, "upload {i}: not taken in time");
        retries.fetch_add(1, Ordering::Relaxed);
        attempt += 1;
        tokio::time::sleep(wait).await;
    }
}

/// Queued and running fits as a live replica sees them, or None when none answers.
async fn to_go(http: &reqwest::Client, urls: &[String], token: &str) -> Option<(i64, i64)> {
    for url in urls {
        let r = http
            .get(format!("{url}/api/v1/queue"))
            .bearer_auth(token)
            .timeout(Duration::from_secs(2))
            .send()
            .await;
        if let Ok(r) = r
            && r.status() == 200
            && let Ok(q) = r.json::<Value>().await
        {
            let n = |k: &str| q[k].as_i64().unwrap_or(0);
            return Some((
                n("queued") + n("running"),
                n("succeeded") + n("failed") + n("cancelled"),
            ));
        }
    }
    None
}

/// A chaos event, due once this many fits have ended.
#[derive(Debug, Clone, Copy)]
enum Event {
    Kill,
    Stop,
    DatabaseRestart,
}

/// CPU seconds used by the children this process has waited for (the replicas, the token command).
fn children_cpu_s() -> Option<f64> {
    cpu_times("self", clock_ticks()).map(|c| c[2] + c[3])
}

/// CPU seconds the PostgreSQL server has used so far: its postmaster (with the backends it reaped)
/// and the backends alive now. `None` on SQLite, or when the server's processes cannot be read
/// (another machine, another user's /proc).
async fn database_cpu_s(cfg: &ChaosConfig) -> Option<f64> {
    let ChaosDatabase::Postgres(url) = &cfg.database else {
        return None;
    };
    use sqlx::Connection;
    let mut conn = sqlx::PgConnection::connect(url).await.ok()?;
    let dir: String = sqlx::query_scalar("SHOW data_directory")
        .fetch_one(&mut conn)
        .await
        .ok()?;
    conn.close().await.ok()?;
    let pid_file = std::fs::read_to_string(format!("{dir}/postmaster.pid")).ok()?;
    let postmaster = pid_file.lines().next()?.trim().to_string();
    let ticks = clock_ticks();
    let mut total: f64 = cpu_times(&postmaster, ticks)?.iter().sum();
    for entry in std::fs::read_dir("/proc").ok()?.flatten() {
        let name = entry.file_name().to_string_lossy().into_owned();
        if name.bytes().all(|b| b.is_ascii_digit())
            && parent_pid(&name).as_deref() == Some(postmaster.as_str())
            && let Some(c) = cpu_times(&name, ticks)
        {
            total += c[0] + c[1];
        }
    }
    Some(total)
}

/// Restarts the machine's PostgreSQL server (the cluster `pg_ctlcluster` finds under
/// /etc/postgresql), waiting until it has stopped and started again: every replica's connections
/// break at once and new ones are refused meanwhile.
fn restart_postgres() -> anyhow::Result<()> {
    let version = std::fs::read_dir("/etc/postgresql")?
        .filter_map(|e| e.ok())
        .filter_map(|e| e.file_name().into_string().ok())
        .max()
        .ok_or_else(|| anyhow::anyhow!("no cluster under /etc/postgresql"))?;
    let out = Command::new("pg_ctlcluster")
        .args(["--skip-systemctl-redirect", &version, "main", "restart"])
        .output()?;
    anyhow::ensure!(
        out.status.success(),
        "pg_ctlcluster {version} main restart: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    Ok(())
}

/// Runs the whole harness; the report lists every broken invariant (an error is a run that could not
/// be carried out at all).
pub async fn run(cfg: &ChaosConfig) -> anyhow::Result<ChaosReport> {
    cfg.validate()?;
    let started = Instant::now();
    let deadline = started + cfg.time_bound;
    let mut rng = SplitMix::new(cfg.seed);
    let mut report = ChaosReport {
        seed: cfg.seed,
        ..ChaosReport::default()
    };
    std::fs::create_dir_all(&cfg.log_dir)?;
    let token = make_token(cfg, "engineer")?;
    let children_cpu_before = children_cpu_s().unwrap_or(0.0);
    let database_cpu_before = database_cpu_s(cfg).await;
    let http = reqwest::Client::builder()
        .timeout(Duration::from_secs(60))
        .build()?;
    let mut replicas = Vec::new();
    for index in 0..cfg.replicas {
        let mut r = Replica {
            index,
            port: free_port()?,
            child: None,
            log: cfg.log_dir.join(format!("replica-{index}.log")),
        };
        r.start(cfg, &http).await?;
        replicas.push(r);
    }
    let urls: Vec<String> = replicas.iter().map(|r| r.url()).collect();
    for p in 0..cfg.fits.div_ceil(FITS_PER_PART) {
        let r = http
            .post(format!("{}/api/v1/parts", urls[0]))
            .bearer_auth(&token)
            .json(&json!({"part_number": part_number(p * FITS_PER_PART),
                          "description": "chaos run", "limits": {"srf_min_hz": 1e6}}))
            .send()
            .await?;
        anyhow::ensure!(r.status() == 201, "create part: {}", r.status());
    }

    // The chaos plan: each event is due once a random share of the fits has ended, so every one
    // lands while there is work in flight, whatever the machine's speed; then a random delay.
    let mut plan: Vec<(i64, Event)> = (0..cfg.kills)
        .map(|_| Event::Kill)
        .chain((0..cfg.stops).map(|_| Event::Stop))
        .chain((0..cfg.database_restarts).map(|_| Event::DatabaseRestart))
        .map(|e| ((rng.uniform(0.03, 0.85) * cfg.fits as f64) as i64, e))
        .collect();
    plan.sort_by_key(|p| p.0);

    // Uploads: distinct synthetic sweeps of known models, `upload_concurrency` at a time.
    let retries = Arc::new(AtomicUsize::new(0));
    let gate = Arc::new(Semaphore::new(cfg.upload_concurrency));
    let mut uploads = tokio::task::JoinSet::new();
    for i in 0..cfg.fits {
        let bytes = synthetic_csv(
            &simple_model(1e-5 * (1.0 + i as f64 * 1e-3), 0.05, 5e-12),
            1e3,
            1e8,
            cfg.points,
        );
        let (http, urls, token, gate, retries) = (
            http.clone(),
            urls.clone(),
            token.clone(),
            gate.clone(),
            retries.clone(),
        );
        uploads.spawn(async move {
            let _p = gate.acquire().await;
            (
                i,
                upload(&http, &urls, &token, i, bytes, &retries, deadline).await,
            )
        });
    }

    for (due, event) in plan {
        loop {
            anyhow::ensure!(
                Instant::now() < deadline,
                "the run did not reach its chaos events in time"
            );
            match to_go(&http, &urls, &token).await {
                Some((_, ended)) if ended >= due => break,
                _ => tokio::time::sleep(Duration::from_millis(20)).await,
            }
        }
        tokio::time::sleep(Duration::from_secs_f64(rng.uniform(0.0, 0.3))).await;
        let k = (rng.next_u64() % replicas.len() as u64) as usize;
        match event {
            Event::Kill => {
                report
                    .to_go_at_kills
                    .push(to_go(&http, &urls, &token).await.map_or(-1, |t| t.0));
                replicas[k].kill()?;
                report.kills += 1;
                replicas[k].start(cfg, &http).await?;
                report.restarts += 1;
            }
            Event::Stop => {
                let pid = replicas[k].pid().expect("a running replica");
                signal(pid, "STOP")?;
                // Past the lease by a margin, so every lease it held has expired when it wakes.
                tokio::time::sleep(Duration::from_secs_f64(2.0 * cfg.lease_s + 0.5)).await;
                signal(pid, "CONT")?;
                report.stops += 1;
            }
            Event::DatabaseRestart => {
                tokio::task::spawn_blocking(restart_postgres).await??;
                report.database_restarts += 1;
            }
        }
    }

    let mut fit_of_upload: HashMap<usize, i64> = HashMap::new();
    while let Some(done) = uploads.join_next().await {
        let (i, result) = done?;
        match result {
            Ok(fit_id) => {
                fit_of_upload.insert(i, fit_id);
            }
            Err(e) => report
                .violations
                .push(format!("an upload was not taken: {e:#}")),
        }
    }
    report.accepted = fit_of_upload.len();
    report.upload_retries = retries.load(Ordering::Relaxed);
    loop {
        match to_go(&http, &urls, &token).await {
            Some((0, _)) => break,
            Some((n, _)) if Instant::now() > deadline => {
                report.violations.push(format!(
                    "{n} fits still queued or running at the time bound"
                ));
                break;
            }
            _ => tokio::time::sleep(Duration::from_millis(50)).await,
        }
    }
    report.elapsed = started.elapsed();
    for r in &mut replicas {
        r.terminate()?;
    }
    report.replica_cpu_s = children_cpu_s().unwrap_or(0.0) - children_cpu_before;
    if cfg.database_restarts == 0
        && let (Some(before), Some(after)) = (database_cpu_before, database_cpu_s(cfg).await)
    {
        report.database_cpu_s = Some(after - before);
    }
    report.late_writes_refused = replicas
        .iter()
        .map(|r| {
            std::fs::read_to_string(&r.log).map_or(0, |t| {
                t.lines()
                    .filter(|l| {
                        l.contains("lease lost to another worker")
                            || l.contains("the claim was taken over before the result was written")
                    })
                    .count()
            })
        })
        .sum();
    check(cfg, &fit_of_upload, &mut report).await?;
    Ok(report)
}

/// Reads the database after every replica stopped and records each broken invariant:
///
/// - every upload answered 2xx has its fit, and the sweeps were stored once each;
/// - no job is queued or running, and every fit of an upload succeeded with a stored report;
/// - each fit's result was written once. What proves it: the schema refuses a second report
///   (trigger `fits_report_written_once`: an UPDATE of `report_json` once set aborts its whole
///   transaction), every result write appends one `fit-succeeded` audit row in that same
///   transaction (the audit trail is append-only), so one such row per fit, never two, means one
///   write committed; no fit has two outcomes of any kind (a failure and a success, say); and its
///   resonance rows, which no key keeps unique, are not repeated (its grid rows are keyed by fit);
/// - the chaos did make work run again: some job was claimed more than once (`attempts > 1`), so the
///   single write above held while a fit really ran twice;
/// - SQLite's integrity check (on SQLite) and `henrybook verify` (audit hash chain, stored results)
///   are clean.
async fn check(
    cfg: &ChaosConfig,
    fit_of_upload: &HashMap<usize, i64>,
    report: &mut ChaosReport,
) -> anyhow::Result<()> {
    let mut db = Db::open(&cfg.database).await?;
    let v = &mut report.violations;

    let fits: Vec<(i64, String, bool)> = db
        .rows("SELECT fit_id, status, report_json IS NOT NULL FROM fits")
        .await?;
    let by_id: HashMap<i64, (String, bool)> =
        fits.into_iter().map(|(id, s, r)| (id, (s, r))).collect();
    let mut distinct = HashSet::new();
    for (i, fit_id) in fit_of_upload {
        distinct.insert(*fit_id);
        match by_id.get(fit_id) {
            None => v.push(format!(
                "upload {i} was answered with fit {fit_id}, which is not stored"
            )),
            Some((status, has_report)) if status != "succeeded" || !has_report => v.push(format!(
                "fit {fit_id} (upload {i}) ended {status}, report stored: {has_report}"
            )),
            Some(_) => {}
        }
    }
    if distinct.len() != fit_of_upload.len() {
        v.push(format!(
            "{} uploads of distinct sweeps were answered with {} distinct fits",
            fit_of_upload.len(),
            distinct.len()
        ));
    }
    let (sweeps,): (i64,) = db.one("SELECT COUNT(*) FROM sweeps").await?;
    if sweeps != cfg.fits as i64 {
        v.push(format!("{sweeps} sweeps stored for {} uploaded", cfg.fits));
    }
    let unfinished: Vec<(i64, String)> = db
        .rows("SELECT fit_id, state FROM jobs WHERE state <> 'done' ORDER BY fit_id")
        .await?;
    if !unfinished.is_empty() {
        v.push(format!(
            "{} jobs not done: {:?}",
            unfinished.len(),
            &unfinished[..unfinished.len().min(10)]
        ));
    }
    let written: Vec<(i64, i64)> = db
        .rows("SELECT fit_id, COUNT(*) FROM audit WHERE action = 'fit-succeeded' GROUP BY fit_id")
        .await?;
    let written: HashMap<i64, i64> = written.into_iter().collect();
    // Every outcome (succeeded, failed, cancelled) appends one audit row with the outcome it wrote;
    // the harness never retries a fit, so two such rows for one fit are two outcomes written (two
    // result writes among them: the list shows `fit-succeeded,fit-succeeded`).
    let outcomes: Vec<(i64, String)> = db
        .rows(&format!(
            "SELECT fit_id, {} FROM audit WHERE action IN \
             ('fit-succeeded', 'fit-failed', 'fit-cancelled') GROUP BY fit_id HAVING COUNT(*) > 1",
            db.joined("action")
        ))
        .await?;
    if !outcomes.is_empty() {
        v.push(format!(
            "{} fits have more than one outcome written: {:?}",
            outcomes.len(),
            &outcomes[..outcomes.len().min(10)]
        ));
    }
    let never = distinct
        .iter()
        .filter(|id| !written.contains_key(id))
        .count();
    if never > 0 {
        v.push(format!("{never} fits of uploads have no result write"));
    }
    let (repeated,): (i64,) = db
        .one(
            "SELECT COUNT(*) FROM (SELECT 1 FROM fit_resonances GROUP BY fit_id, kind, \
             frequency_hz HAVING COUNT(*) > 1) AS r",
        )
        .await?;
    if repeated > 0 {
        v.push(format!(
            "{repeated} resonance rows are stored more than once"
        ));
    }
    let (rerun, most): (i64, Option<i64>) = db
        .one("SELECT COUNT(*) FILTER (WHERE attempts > 1), MAX(attempts) FROM jobs")
        .await?;
    report.fits_rerun = rerun;
    report.max_attempts_seen = most.unwrap_or(0);
    if cfg.kills + cfg.stops > 0 && rerun == 0 {
        report.violations.push(
            "no job was claimed twice: the chaos re-ran no work, so it proved nothing".into(),
        );
    }
    if let Some(problem) = db.integrity().await? {
        report.violations.push(problem);
    }
    db.close().await?;
    let out = Command::new(&cfg.binary)
        .arg("verify")
        .args(database_args(&cfg.database))
        .output()?;
    if !out.status.success() {
        report.violations.push(format!(
            "henrybook verify: {}{}",
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        ));
    }
    Ok(())
}

/// One connection to the run's database, for [`check`]'s queries (the same SQL on both, except
/// where a function is named differently).
enum Db {
    Sqlite(sqlx::SqliteConnection),
    Postgres(sqlx::PgConnection),
}

impl Db {
    async fn open(database: &ChaosDatabase) -> anyhow::Result<Db> {
        use sqlx::{ConnectOptions, Connection};
        Ok(match database {
            ChaosDatabase::Sqlite(path) => Db::Sqlite(
                sqlx::sqlite::SqliteConnectOptions::new()
                    .filename(path)
                    .read_only(true)
                    .connect()
                    .await?,
            ),
            ChaosDatabase::Postgres(url) => Db::Postgres(sqlx::PgConnection::connect(url).await?),
        })
    }

    async fn rows<T>(&mut self, sql: &str) -> anyhow::Result<Vec<T>>
    where
        T: for<'r> sqlx::FromRow<'r, sqlx::sqlite::SqliteRow>
            + for<'r> sqlx::FromRow<'r, sqlx::postgres::PgRow>
            + Send
            + Unpin,
    {
        let sql = sqlx::AssertSqlSafe(sql.to_string());
        Ok(match self {
            Db::Sqlite(c) => sqlx::query_as(sql).fetch_all(c).await?,
            Db::Postgres(c) => sqlx::query_as(sql).fetch_all(c).await?,
        })
    }

    async fn one<T>(&mut self, sql: &str) -> anyhow::Result<T>
    where
        T: for<'r> sqlx::FromRow<'r, sqlx::sqlite::SqliteRow>
            + for<'r> sqlx::FromRow<'r, sqlx::postgres::PgRow>
            + Send
            + Unpin,
    {
        self.rows(sql)
            .await?
            .into_iter()
            .next()
            .ok_or_else(|| anyhow::anyhow!("no row from {sql}"))
    }

    /// The values of `column` in a group, joined by commas.
    fn joined(&self, column: &str) -> String {
        match self {
            Db::Sqlite(_) => format!("GROUP_CONCAT({column})"),
            Db::Postgres(_) => format!("string_agg({column}, ',' ORDER BY audit_id)"),
        }
    }

    /// SQLite's own integrity check (what it found, when not clean). PostgreSQL has no such check
    /// of a whole database; its pages carry no checksums unless the cluster was made with them.
    async fn integrity(&mut self) -> anyhow::Result<Option<String>> {
        Ok(match self {
            Db::Sqlite(c) => {
                let found: String = sqlx::query_scalar("PRAGMA integrity_check")
                    .fetch_one(c)
                    .await?;
                (found != "ok").then(|| format!("SQLite integrity check: {found}"))
            }
            Db::Postgres(_) => None,
        })
    }

    async fn close(self) -> anyhow::Result<()> {
        use sqlx::Connection;
        match self {
            Db::Sqlite(c) => c.close().await?,
            Db::Postgres(c) => c.close().await?,
        }
        Ok(())
    }
}

/// The service binary: `$HENRYBOOK_BIN`, else `henrybook` in the profile folder (`target/debug/`,
/// `target/release/`) the running test or example was built into.
pub fn service_binary() -> PathBuf {
    if let Ok(p) = std::env::var("HENRYBOOK_BIN") {
        return PathBuf::from(p);
    }
    // target/<profile>/deps/<test> or target/<profile>/examples/<example>
    let exe = std::env::current_exe().expect("the running executable's path");
    exe.parent()
        .and_then(Path::parent)
        .expect("the executable sits in target/<profile>/<folder>/")
        .join("henrybook")
}
