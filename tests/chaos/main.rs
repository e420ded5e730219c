//! The full chaos run: replicas of the release binary on one database, sweeps uploaded through the
//! HTTP API, SIGKILLs and restarts at random moments, a SIGSTOP past the lease, then the database is
//! checked (see tests/chaos/README.md and `henrybook_tests::chaos`). Exits non-zero when an invariant
//! is broken.
//!
//! cargo build --release -p henrybook && cargo run --release -p henrybook-tests --example chaos -- [options]

use henrybook_tests::chaos::{ChaosConfig, ChaosDatabase, clock_seed, run, service_binary};
use std::time::Duration;

const USAGE: &str = "options (defaults in brackets):
  --fits N               sweeps uploaded, one fit each [1000]
  --points N             points per sweep [1601]
  --kills N              SIGKILLs, each followed by a restart [10]
  --stops N              SIGSTOPs past the lease, each followed by SIGCONT [1]
  --lease-s S            the replicas' --lease-s [5]
  --workers N            the replicas' --workers [2]
  --replicas N           replica processes on the database [1; SQLite runs one]
  --database-url URL     a PostgreSQL database (existing; migrated by the replicas) instead of a
                         fresh SQLite file
  --database-restarts N  restarts of the machine's PostgreSQL server mid-run (PostgreSQL only;
                         needs root, and breaks whatever else uses that server) [0]
  --seed N               the chaos plan's seed [from the clock; printed]
  --time-bound-s S       the whole run must end within this [900]
  --keep DIR             keep the database and the replica logs in DIR [a temporary folder]";

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let (mut fits, mut points, mut kills, mut stops) = (1000usize, 1601usize, 10usize, 1usize);
    let (mut lease_s, mut workers, mut replicas, mut restarts) = (5.0f64, 2usize, 1usize, 0usize);
    let (mut url, mut seed, mut bound_s, mut keep) = (None, clock_seed(), 900.0f64, None);
    let mut i = 0;
    while i < args.len() {
        let flag = args[i].as_str();
        if flag == "-h" || flag == "--help" {
            println!("{USAGE}");
            return Ok(());
        }
        let value = args
            .get(i + 1)
            .ok_or_else(|| anyhow::anyhow!("{flag} needs a value\n{USAGE}"))?;
        i += 2;
        fn num<T: std::str::FromStr>(flag: &str, v: &str) -> anyhow::Result<T> {
            v.parse()
                .map_err(|_| anyhow::anyhow!("{flag}: {v:?} is not a number\n{USAGE}"))
        }
        match flag {
            "--fits" => fits = num(flag, value)?,
            "--points" => points = num(flag, value)?,
            "--kills" => kills = num(flag, value)?,
            "--stops" => stops = num(flag, value)?,
            "--lease-s" => lease_s = num(flag, value)?,
            "--workers" => workers = num(flag, value)?,
            "--replicas" => replicas = num(flag, value)?,
            "--database-url" => url = Some(value.clone()),
            "--database-restarts" => restarts = num(flag, value)?,
            "--seed" => seed = num(flag, value)?,
            "--time-bound-s" => bound_s = num(flag, value)?,
            "--keep" => keep = Some(std::path::PathBuf::from(value)),
            other => anyhow::bail!("unknown option {other}\n{USAGE}"),
        }
    }
    let temp = tempfile::tempdir()?;
    let dir = keep.unwrap_or_else(|| temp.path().to_path_buf());
    std::fs::create_dir_all(&dir)?;
    let cfg = ChaosConfig {
        binary: service_binary(),
        database: match url {
            Some(u) => ChaosDatabase::Postgres(u),
            None => ChaosDatabase::Sqlite(dir.join("chaos.db")),
        },
        replicas,
        fits,
        points,
        kills,
        stops,
        database_restarts: restarts,
        lease_s,
        workers,
        upload_concurrency: 8,
        seed,
        time_bound: Duration::from_secs_f64(bound_s),
        log_dir: dir.join("logs"),
    };
    cfg.validate()?;
    println!(
        "chaos: {} on {:?}, {replicas} replica(s), {fits} fits of {points} points, {kills} kills, \
         {stops} stops, {restarts} database restarts, lease {lease_s} s, seed {seed}",
        cfg.binary.display(),
        cfg.database
    );
    let report = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?
        .block_on(run(&cfg))?;
    println!("{}", report.summary());
    if report.violations.is_empty() {
        Ok(())
    } else {
        // A failing run keeps its database and the replica logs.
        let _ = temp.keep();
        for v in &report.violations {
            eprintln!("broken: {v}");
        }
        anyhow::bail!(
            "{} invariants broken (seed {seed}; database and logs in {})",
            report.violations.len(),
            dir.display()
        )
    }
}
