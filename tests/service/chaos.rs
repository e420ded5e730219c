//! The bounded chaos runs (the full one is `tests/chaos/`, see its README): the real service binary on
//! SQLite with one replica, and on PostgreSQL with three replicas; 150 sweeps uploaded through the HTTP API, the replica killed with SIGKILL
//! three times at random moments and restarted, and a replica once stopped with SIGSTOP past its
//! 1.5 s lease and resumed. Then, from the database: every upload has its fit, every fit succeeded, no job is left,
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

/// One bounded run on `database` with `replicas` replicas: 150 fits, 3 kills, 1 stop past the lease.
async fn bounded_run(database: ChaosDatabase, replicas: usize, dir: tempfile::TempDir) {
    build_service_binary();
    let seed = std::env::var("HENRYBOOK_CHAOS_SEED")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or_else(clock_seed);
    println!("chaos seed {seed} (HENRYBOOK_CHAOS_SEED={seed} replays the plan)");
    let cfg = ChaosConfig {
        binary: service_binary(),
        database,
        replicas,
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
        // A failing run keeps its database (SQLite) and the replica logs for a look.
        let kept = dir.keep();
        panic!(
            "broken invariants (seed {seed}; replica logs kept in {}):\n{}",
            kept.display(),
            report.violations.join("\n")
        );
    }
    assert_eq!(report.accepted, 150);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn kills_and_a_stop_past_the_lease_lose_no_fit_and_write_none_twice() {
    let dir = tempfile::tempdir().unwrap();
    let database = ChaosDatabase::Sqlite(dir.path().join("chaos.db"));
    bounded_run(database, 1, dir).await;
}

/// The same on PostgreSQL with three replicas on one fresh database, so a stopped replica's jobs are
/// taken over by another process and its late writes must be refused. The database server's
/// restart is left to the full run (`tests/chaos/`): it would break the other tests of this binary
/// that use the same server.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn three_replicas_on_postgres_lose_no_fit_and_write_none_twice() {
    let db = henrybook_tests::pg::TestDb::new().await;
    let dir = tempfile::tempdir().unwrap();
    bounded_run(ChaosDatabase::Postgres(db.url.clone()), 3, dir).await;
    drop(db);
}

#[test]
fn what_cannot_run_is_refused_with_the_reason() {
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
    let pg = || ChaosDatabase::Postgres("postgres://postgres@127.0.0.1/chaos".into());
    assert!(err(cfg(pg(), 9, 0)).contains("1 to 8 replicas"));
    assert!(cfg(pg(), 3, 1).validate().is_ok());
    assert!(cfg(sqlite(), 1, 0).validate().is_ok());
}
