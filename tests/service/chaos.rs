//! The bounded chaos run (the full one is `tests/chaos/`, see its README): the real service binary on
//! SQLite with one replica, 150 sweeps uploaded through the HTTP API, the replica killed with SIGKILL
//! three times at random moments and restarted, and once stopped with SIGSTOP past its 1.5 s lease and
//! resumed. Then, from the database: every upload has its fit, every fit succeeded, no job is left,
//! each result was written once (one `fit-succeeded` row per fit, which the schema's
//! `fits_report_written_once` trigger backs), some jobs really ran more than once, and the database
//! and its audit chain are intact. The seed is printed; `HENRYBOOK_CHAOS_SEED` replays a run.

use henrybook_tests::chaos::{ChaosConfig, ChaosDatabase, clock_seed, run, service_binary};
use std::process::Command;
use std::time::Duration;

/// Builds the service binary in this test's profile, so the run never uses a stale one.
fn build_service_binary() {
    if std::env::var_os("HENRYBOOK_BIN").is_some() {
        return;
    }
    let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".into());
    let mut cmd = Command::new(cargo);
    cmd.args(["build", "-p", "henrybook", "--bin", "henrybook"]);
    let bin = service_binary();
    if bin.parent().and_then(|p| p.file_name()) == Some("release".as_ref()) {
        cmd.arg("--release");
    }
    let status = cmd.status().expect("cargo runs");
    assert!(status.success(), "cargo build -p henrybook failed");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn kills_and_a_stop_past_the_lease_lose_no_fit_and_write_none_twice() {
    build_service_binary();
    let dir = tempfile::tempdir().unwrap();
    let seed = std::env::var("HENRYBOOK_CHAOS_SEED")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or_else(clock_seed);
    println!("chaos seed {seed} (HENRYBOOK_CHAOS_SEED={seed} replays the plan)");
    let cfg = ChaosConfig {
        binary: service_binary(),
        database: ChaosDatabase::Sqlite(dir.path().join("chaos.db")),
        replicas: 1,
        fits: 150,
        points: 1601,
        kills: 3,
        stops: 1,
        database_restarts: 0,
        lease_s: 1.5,
        workers: 2,
        upload_concurrency: 8,
        seed,
        time_bound: Duration::from_secs(300),
        log_dir: dir.path().join("logs"),
    };
    let report = run(&cfg).await.expect("the chaos run is carried out");
    println!("{}", report.summary());
    assert_eq!((report.kills, report.restarts, report.stops), (3, 3, 1));
    if !report.violations.is_empty() {
        // A failing run keeps its database and the replica logs for a look.
        let kept = dir.keep();
        panic!(
            "broken invariants (seed {seed}; database and replica logs kept in {}):\n{}",
            kept.display(),
            report.violations.join("\n")
        );
    }
    assert_eq!(report.accepted, 150);
}

#[test]
fn what_cannot_run_yet_is_refused_with_the_reason() {
    let cfg = |database, replicas, database_restarts| ChaosConfig {
        binary: "henrybook".into(),
        database,
        replicas,
        fits: 10,
        points: 101,
        kills: 1,
        stops: 0,
        database_restarts,
        lease_s: 1.0,
        workers: 1,
        upload_concurrency: 1,
        seed: 1,
        time_bound: Duration::from_secs(1),
        log_dir: "logs".into(),
    };
    let sqlite = || ChaosDatabase::Sqlite("x.db".into());
    let err = |c: ChaosConfig| c.validate().unwrap_err().to_string();
    assert!(err(cfg(sqlite(), 1, 1)).contains("no separate server to restart"));
    assert!(err(cfg(sqlite(), 3, 0)).contains("--replicas must be 1"));
    let pg = ChaosDatabase::Postgres("postgres://postgres@127.0.0.1/chaos".into());
    assert!(err(cfg(pg, 3, 1)).contains("does not run on PostgreSQL yet"));
    assert!(cfg(sqlite(), 1, 0).validate().is_ok());
}
