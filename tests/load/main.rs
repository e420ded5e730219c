//! Load script for the registry service, bounded in count and time, loopback only.
//!
//! It seeds a fresh database with 100 000 parts whose stored figures are invented (for the band query
//! only), starts the release binary `henrybook serve` on 127.0.0.1, uploads N synthetic sweeps of
//! 1601 points (made from known models) concurrently and waits for their fits, then measures the
//! status poll and the SRF band query, and reads the server's peak memory from /proc.
//!
//! cargo build --release -p henrybook && cargo run --release -p henrybook-tests --example load -- [N]

use henrybook::store::Store;
use henrybook::store::tokens::Role;
use henrybook_tests::procstat::{clock_ticks, cpu_times};
use henrybook_tests::repo_root;
use henrybook_tests::service::{simple_model, synthetic_csv};
use serde_json::{Value, json};
use std::process::{Command, Stdio};
use std::sync::Arc;
use std::time::{Duration, Instant};
use tokio::sync::Semaphore;

const SEEDED_PARTS: usize = 100_000;
const POINTS: usize = 1601;
const TIME_BOUND: Duration = Duration::from_secs(600);

fn percentile(mut v: Vec<f64>, p: f64) -> f64 {
    v.sort_by(|a, b| a.total_cmp(b));
    let i = ((v.len() as f64 - 1.0) * p).round() as usize;
    v[i]
}

fn proc_status_kib(pid: u32, key: &str) -> Option<u64> {
    let text = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    text.lines()
        .find(|l| l.starts_with(key))?
        .split_whitespace()
        .nth(1)?
        .parse()
        .ok()
}

/// Clock ticks per second of the CPU times in /proc/PID/stat.
/// CPU time (user, system) a process has used so far, in seconds.
fn cpu_seconds(pid: &str, ticks: f64) -> Option<(f64, f64)> {
    cpu_times(pid, ticks).map(|c| (c[0], c[1]))
}

/// Invented figures for the seeded parts: SRF log-uniform in 100 kHz–2 GHz (a fixed LCG, no I/O).
async fn seed(path: &std::path::Path) -> anyhow::Result<()> {
    use sqlx::sqlite::SqliteConnectOptions;
    use sqlx::{ConnectOptions, Connection};
    let mut conn = SqliteConnectOptions::new().filename(path).connect().await?;
    let mut tx = conn.begin().await?;
    let mut state: u64 = 0x2545_f491_4f6c_dd1d;
    let mut next = || {
        state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    for i in 0..SEEDED_PARTS {
        let part_id: i64 = sqlx::query_scalar(
            "INSERT INTO parts (part_number, description, created_at_ms) VALUES (?, 'seeded for the load script', 0) RETURNING part_id",
        )
        .bind(format!("SEED-{i:06}"))
        .fetch_one(&mut *tx)
        .await?;
        let lot_id: i64 =
            sqlx::query_scalar("INSERT INTO lots (part_id, lot) VALUES (?, 'S') RETURNING lot_id")
                .bind(part_id)
                .fetch_one(&mut *tx)
                .await?;
        let sweep_id: i64 = sqlx::query_scalar(
            "INSERT INTO sweeps (part_id, lot_id, file_name, file_bytes, sha256, method, operator, points, uploaded_by, uploaded_at_ms) \
             VALUES (?, ?, 's.csv', x'00', ?, 'direct', '', 0, 'load', 0) RETURNING sweep_id",
        )
        .bind(part_id)
        .bind(lot_id)
        .bind(format!("{i:064}"))
        .fetch_one(&mut *tx)
        .await?;
        let srf = 1e5 * (2e9f64 / 1e5).powf(next());
        let fit_id: i64 = sqlx::query_scalar(
            "INSERT INTO fits (sweep_id, part_id, lot_id, revision, status, progress, options_json, options_key, created_at_ms, srf_hz, l0_h, rdc_ohm) \
             VALUES (?, ?, ?, 1, 'succeeded', 1, '{}', '', 0, ?, ?, ?) RETURNING fit_id",
        )
        .bind(sweep_id)
        .bind(part_id)
        .bind(lot_id)
        .bind(srf)
        .bind(1e-6 * (1.0 + 100.0 * next()))
        .bind(0.01 + next())
        .fetch_one(&mut *tx)
        .await?;
        sqlx::query("INSERT INTO jobs (fit_id, state, enqueued_at_ms) VALUES (?, 'done', 0)")
            .bind(fit_id)
            .execute(&mut *tx)
            .await?;
        sqlx::query("UPDATE parts SET latest_fit_id = ? WHERE part_id = ?")
            .bind(fit_id)
            .bind(part_id)
            .execute(&mut *tx)
            .await?;
    }
    tx.commit().await?;
    sqlx::query("ANALYZE").execute(&mut conn).await?;
    conn.close().await?;
    Ok(())
}

/// Where the server's log goes: the file `HENRYBOOK_LOAD_SERVER_LOG` names (with
/// `HENRYBOOK_LOAD_RUST_LOG` as its filter, e.g. `sqlx::query=debug` to count statements with
/// `tests/load/statements.py`), else nowhere.
fn server_log() -> anyhow::Result<Stdio> {
    Ok(match std::env::var_os("HENRYBOOK_LOAD_SERVER_LOG") {
        Some(path) => Stdio::from(std::fs::File::create(path)?),
        None => Stdio::null(),
    })
}

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    let n: usize = std::env::args()
        .nth(1)
        .and_then(|a| a.parse().ok())
        .unwrap_or(400);
    anyhow::ensure!((1..=5000).contains(&n), "N must be 1..5000");
    let started = Instant::now();
    let dir = tempfile::tempdir()?;
    let db = dir.path().join("load.db");

    let store = Store::open(&db).await?;
    let (_, inspector) = store.create_token(Role::Engineer, Some("load")).await?;
    store.close().await;
    let t = Instant::now();
    seed(&db).await?;
    println!(
        "seeded {SEEDED_PARTS} parts in {:.1} s",
        t.elapsed().as_secs_f64()
    );

    let port = std::net::TcpListener::bind("127.0.0.1:0")?
        .local_addr()?
        .port();
    let bin = std::env::var("HENRYBOOK_BIN")
        .map(std::path::PathBuf::from)
        .unwrap_or_else(|_| repo_root().join("target/release/henrybook"));
    let mut child = Command::new(&bin)
        .args([
            "serve",
            "--listen",
            &format!("127.0.0.1:{port}"),
            "--grpc-listen",
            "127.0.0.1:0",
            // This script measures throughput with every upload taken: the queue bounds (one part
            // here) are lifted; tests/load/flood.sh measures them.
            "--max-queued-fits",
            "100000",
            "--max-queued-fits-per-part",
            "100000",
            "--database",
        ])
        .arg(&db)
        .env(
            "RUST_LOG",
            std::env::var("HENRYBOOK_LOAD_RUST_LOG").unwrap_or_else(|_| "warn".into()),
        )
        .stdout(server_log()?)
        .spawn()
        .map_err(|e| {
            anyhow::anyhow!(
                "cannot start {}: {e} (cargo build --release -p henrybook)",
                bin.display()
            )
        })?;
    let pid = child.id();
    let base = format!("http://127.0.0.1:{port}");
    let http = reqwest::Client::new();
    let result = async {
        loop {
            if http.get(format!("{base}/readyz")).send().await.is_ok_and(|r| r.status() == 200) {
                break;
            }
            if let Some(status) = child.try_wait()? {
                anyhow::bail!("the server exited before it was ready ({status}); is {} current?", bin.display());
            }
            anyhow::ensure!(started.elapsed() < TIME_BOUND, "the server did not become ready");
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
        let r = http
            .post(format!("{base}/api/v1/parts"))
            .bearer_auth(&inspector)
            .json(&json!({"part_number": "LOAD-1", "limits": {"srf_min_hz": 1e6}}))
            .send()
            .await?;
        anyhow::ensure!(r.status() == 201, "create part: {}", r.status());

        // Uploads: N distinct synthetic 1601-point sweeps (known models), 8 at a time.
        let files: Vec<Vec<u8>> = (0..n)
            .map(|i| synthetic_csv(&simple_model(1e-5 * (1.0 + i as f64 * 1e-3), 0.05, 5e-12), 1e3, 1e8, POINTS))
            .collect();
        let gate = Arc::new(Semaphore::new(8));
        let (server, ticks) = (pid.to_string(), clock_ticks());
        let server_cpu_before = cpu_seconds(&server, ticks);
        let own_cpu_before = cpu_seconds("self", ticks);
        let t_upload = Instant::now();
        let mut handles = Vec::new();
        for (i, bytes) in files.into_iter().enumerate() {
            let (http, base, token, gate) = (http.clone(), base.clone(), inspector.clone(), gate.clone());
            handles.push(tokio::spawn(async move {
                let _p = gate.acquire().await;
                let form = reqwest::multipart::Form::new()
                    .part("file", reqwest::multipart::Part::bytes(bytes).file_name(format!("load-{i}.csv")))
                    .text("part_number", "LOAD-1")
                    .text("lot", format!("L{}", i % 10));
                let r = http.post(format!("{base}/api/v1/sweeps")).bearer_auth(&token).multipart(form).send().await?;
                anyhow::ensure!(r.status() == 202, "upload {i}: {}", r.status());
                Ok(r.json::<Value>().await?["fit_id"].as_i64().unwrap_or_default())
            }));
        }
        let mut ids = Vec::new();
        for h in handles {
            ids.push(h.await??);
        }
        let upload_s = t_upload.elapsed().as_secs_f64();
        let q: Value = http.get(format!("{base}/api/v1/queue")).bearer_auth(&inspector).send().await?.json().await?;
        let fitted_during_upload = q["succeeded"].as_u64().unwrap_or_default().saturating_sub(SEEDED_PARTS as u64);
        loop {
            let q: Value = http.get(format!("{base}/api/v1/queue")).bearer_auth(&inspector).send().await?.json().await?;
            if q["queued"] == 0 && q["running"] == 0 {
                anyhow::ensure!(q["succeeded"].as_u64() == Some(n as u64 + SEEDED_PARTS as u64), "not all fits succeeded: {q}");
                break;
            }
            anyhow::ensure!(started.elapsed() < TIME_BOUND, "fits did not finish in time: {q}");
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
        let fit_s = t_upload.elapsed().as_secs_f64();
        println!("{n} sweeps of {POINTS} points: uploaded in {upload_s:.2} s ({fitted_during_upload} fitted by then), all fitted after {fit_s:.2} s → {:.1} fits/s end to end", n as f64 / fit_s);
        // CPU per upload+fit: less sensitive than wall time to whatever else the machine runs.
        let used = |before: Option<(f64, f64)>, now: Option<(f64, f64)>| match (before, now) {
            (Some((u0, s0)), Some((u1, s1))) => format!(
                "{:.2} ms user + {:.2} ms system per sweep",
                (u1 - u0) * 1e3 / n as f64,
                (s1 - s0) * 1e3 / n as f64
            ),
            _ => "unknown".to_string(),
        };
        println!(
            "CPU over uploads and fits: server {}; this script {}",
            used(server_cpu_before, cpu_seconds(&server, ticks)),
            used(own_cpu_before, cpu_seconds("self", ticks))
        );
        // Group commit: how many writes shared each transaction (the server's own histogram).
        let metrics = http.get(format!("{base}/metrics")).send().await?.text().await?;
        let series = |name: &str| {
            metrics
                .lines()
                .find_map(|l| l.strip_prefix(name)?.trim().parse::<f64>().ok())
        };
        if let (Some(sum), Some(count)) = (
            series("henrybook_fit_duration_seconds_sum"),
            series("henrybook_fit_duration_seconds_count"),
        ) && count > 0.0
        {
            println!(
                "server's engine time per fit (sweep parsed and fitted): {:.2} ms mean",
                sum / count * 1e3
            );
        }
        if let (Some(sum), Some(count)) = (
            series("henrybook_write_batch_requests_sum"),
            series("henrybook_write_batch_requests_count"),
        ) && count > 0.0
        {
            println!(
                "write batches since start: {count:.0}, {:.2} requests per transaction on average",
                sum / count
            );
        }

        if std::env::var_os("HENRYBOOK_LOAD_FITS_ONLY").is_some() {
            return Ok(());
        }

        // Status poll latency (sequential, like one dashboard).
        let mut poll = Vec::new();
        for k in 0..2000 {
            let id = ids[k % ids.len()];
            let t = Instant::now();
            let r = http.get(format!("{base}/api/v1/fits/{id}")).bearer_auth(&inspector).send().await?;
            let _ = r.bytes().await?;
            poll.push(t.elapsed().as_secs_f64() * 1e3);
        }
        println!("status poll GET /api/v1/fits/{{id}} ×2000: p50 {:.2} ms, p99 {:.2} ms", percentile(poll.clone(), 0.5), percentile(poll, 0.99));

        // SRF band query over the 100 000 seeded parts.
        let mut band = Vec::new();
        let mut hits = 0usize;
        for k in 0..500 {
            let lo = 1e5 * 1.02f64.powi(k % 400);
            let hi = lo * 1.5;
            let t = Instant::now();
            let r = http
                .get(format!("{base}/api/v1/parts?answer_from=latest&srf_min_hz={lo}&srf_max_hz={hi}&limit=50"))
                .bearer_auth(&inspector)
                .send()
                .await?;
            anyhow::ensure!(r.status() == 200, "band query: {}", r.status());
            let v: Value = r.json().await?;
            hits += v["items"].as_array().map_or(0, |a| a.len());
            band.push(t.elapsed().as_secs_f64() * 1e3);
        }
        println!(
            "SRF band query over {SEEDED_PARTS} parts ×500 (limit 50, {:.0} items per answer): p50 {:.2} ms, p99 {:.2} ms",
            hits as f64 / 500.0,
            percentile(band.clone(), 0.5),
            percentile(band, 0.99)
        );
        println!(
            "server memory: peak RSS {} MiB, RSS now {} MiB",
            proc_status_kib(pid, "VmHWM:").unwrap_or(0) / 1024,
            proc_status_kib(pid, "VmRSS:").unwrap_or(0) / 1024
        );
        Ok(())
    }
    .await;
    let _ = Command::new("kill")
        .arg("-TERM")
        .arg(pid.to_string())
        .status();
    let _ = child.wait();
    println!("total {:.1} s", started.elapsed().as_secs_f64());
    result
}
