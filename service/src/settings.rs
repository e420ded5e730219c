//! Typed settings for the service, from command-line flags and environment variables (flags win).

use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::Duration;

/// Log output format.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum LogFormat {
    Text,
    Json,
}

#[derive(Debug, Clone, clap::Args)]
pub struct ServeArgs {
    /// Address to listen on (loopback by default; port 0 picks a free port).
    #[arg(long, env = "HENRYBOOK_LISTEN", default_value = "127.0.0.1:8480")]
    pub listen: SocketAddr,
    /// Address of the gRPC interface (loopback by default; port 0 picks a free port).
    #[arg(long, env = "HENRYBOOK_GRPC_LISTEN", default_value = "127.0.0.1:8481")]
    pub grpc_listen: SocketAddr,
    #[command(flatten)]
    pub database: DatabaseArgs,
    /// Fits run at the same time (default: the number of CPUs).
    #[arg(long, env = "HENRYBOOK_WORKERS")]
    pub workers: Option<usize>,
    /// Largest accepted request body, in bytes (uploads included).
    #[arg(long, env = "HENRYBOOK_MAX_BODY_BYTES", default_value_t = 32 * 1024 * 1024)]
    pub max_body_bytes: usize,
    /// Longest a request may take, in seconds.
    #[arg(long, env = "HENRYBOOK_REQUEST_TIMEOUT_S", default_value_t = 30.0)]
    pub request_timeout_s: f64,
    /// How long a claimed job stays claimed without renewal, in seconds.
    #[arg(long, env = "HENRYBOOK_LEASE_S", default_value_t = 30.0)]
    pub lease_s: f64,
    /// Claims of one job before it is failed for good (a fit that keeps crashing the worker).
    #[arg(long, env = "HENRYBOOK_MAX_ATTEMPTS", default_value_t = 3)]
    pub max_attempts: i64,
    /// How long shutdown waits for running fits before releasing their lease, in seconds.
    #[arg(long, env = "HENRYBOOK_SHUTDOWN_GRACE_S", default_value_t = 20.0)]
    pub shutdown_grace_s: f64,
    /// Log format.
    #[arg(long, env = "HENRYBOOK_LOG_FORMAT", value_enum, default_value = "text")]
    pub log_format: LogFormat,
}

#[derive(Debug, Clone, clap::Args)]
pub struct DatabaseArgs {
    /// SQLite database file (created when missing).
    #[arg(
        long = "database",
        env = "HENRYBOOK_DATABASE",
        default_value = "henrybook.db"
    )]
    pub path: PathBuf,
}

/// Everything [`crate::app::Application::build`] needs.
#[derive(Debug, Clone)]
pub struct Settings {
    pub listen: SocketAddr,
    /// Where the gRPC interface listens.
    pub grpc_listen: SocketAddr,
    pub database_path: PathBuf,
    pub workers: usize,
    pub max_body_bytes: usize,
    pub request_timeout: Duration,
    pub lease: Duration,
    pub max_attempts: i64,
    pub shutdown_grace: Duration,
    /// How often an idle worker pool looks for work it was not told about (e.g. expired leases).
    pub poll_interval: Duration,
}

impl Settings {
    /// Defaults for a database file: loopback, free ports (HTTP and gRPC), one worker per CPU.
    pub fn new(database_path: impl Into<PathBuf>) -> Settings {
        Settings {
            listen: SocketAddr::from(([127, 0, 0, 1], 0)),
            grpc_listen: SocketAddr::from(([127, 0, 0, 1], 0)),
            database_path: database_path.into(),
            workers: default_workers(),
            max_body_bytes: 32 * 1024 * 1024,
            request_timeout: Duration::from_secs(30),
            lease: Duration::from_secs(30),
            max_attempts: 3,
            shutdown_grace: Duration::from_secs(20),
            poll_interval: Duration::from_millis(500),
        }
    }
}

fn default_workers() -> usize {
    std::thread::available_parallelism().map_or(2, |n| n.get())
}

fn seconds(name: &str, s: f64) -> anyhow::Result<Duration> {
    anyhow::ensure!(
        s.is_finite() && s > 0.0,
        "{name} must be a positive number of seconds (got {s})"
    );
    Ok(Duration::from_secs_f64(s))
}

impl TryFrom<&ServeArgs> for Settings {
    type Error = anyhow::Error;
    fn try_from(a: &ServeArgs) -> anyhow::Result<Settings> {
        let workers = a.workers.unwrap_or_else(default_workers);
        anyhow::ensure!(workers >= 1, "--workers must be at least 1");
        anyhow::ensure!(a.max_attempts >= 1, "--max-attempts must be at least 1");
        anyhow::ensure!(
            a.max_body_bytes >= 1024,
            "--max-body-bytes must be at least 1024"
        );
        let lease = seconds("--lease-s", a.lease_s)?;
        Ok(Settings {
            listen: a.listen,
            grpc_listen: a.grpc_listen,
            database_path: a.database.path.clone(),
            workers,
            max_body_bytes: a.max_body_bytes,
            request_timeout: seconds("--request-timeout-s", a.request_timeout_s)?,
            lease,
            max_attempts: a.max_attempts,
            shutdown_grace: seconds("--shutdown-grace-s", a.shutdown_grace_s)?,
            poll_interval: (lease / 4).min(Duration::from_millis(500)),
        })
    }
}
