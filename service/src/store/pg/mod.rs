//! Storage on PostgreSQL, for several replicas sharing one database. The schema is
//! `migrations/postgres/` (the same versions and names as `migrations/sqlite/`); [`queue`] is the job
//! queue; [`PgStore`] has the store's operations with the SQLite store's answers, errors and audit
//! rows: parts and limits ([`parts`]), uploads with the duplicate rule and the queue bounds
//! ([`sweeps`]), fits with refits, cancel, retry, approval and rejection ([`fits`]), a succeeded
//! fit's result with its figures, grid and verdict ([`results`]) and tokens ([`tokens`]), every audit
//! row chained as on SQLite ([`audit`]). Row decoders, messages and rules that do not depend on the
//! SQL are shared with the SQLite modules. tests/store/queue.rs tests the queue against a real
//! server and tests/store/parity.rs runs the same operations on both stores and compares the answers.
//!
//! The part queries ([`crate::store::query`]) build one statement text for either dialect; the
//! integrity check, /readyz's chain check and readiness are in [`integrity`], sharing the SQLite
//! store's checks.
//!
//! Every transaction takes its locks in one order: job rows, the part's row, fit rows, the queue-bound
//! lock ([`sweeps::QUEUE_BOUND_LOCK`]), the audit lock ([`audit::AUDIT_LOCK`], always last).
//!
//! Every connection of a pool made by [`connect`] sets `idle_in_transaction_session_timeout` as a
//! startup parameter (per connection, whatever the role's or database's settings), so a replica that
//! stalls inside a transaction cannot hold the queue's row locks for longer than that.

pub mod audit;
pub mod fits;
pub mod integrity;
pub mod parts;
pub mod queue;
pub mod results;
pub mod sweeps;
pub mod tokens;

use anyhow::Context;
use sqlx::PgPool;
use sqlx::postgres::{PgConnectOptions, PgPoolOptions};
use std::str::FromStr;
use std::time::Duration;

pub static MIGRATOR: sqlx::migrate::Migrator = sqlx::migrate!("../migrations/postgres");

/// How long a connection may sit idle inside an open transaction before the server ends its session.
/// Every transaction of the queue is a few statements long: this only ends a stalled replica's.
pub const IDLE_IN_TRANSACTION_TIMEOUT: Duration = Duration::from_secs(30);

/// Whether a database URL names PostgreSQL (`postgres://` or `postgresql://`) rather than a file.
pub fn is_postgres_url(url: &str) -> bool {
    let lower = url.trim_start().to_ascii_lowercase();
    lower.starts_with("postgres://") || lower.starts_with("postgresql://")
}

/// A pool of at most `max_connections` connections to `url`, each with the idle-in-transaction
/// timeout set. Migrations are not applied here: see [`migrate`].
pub async fn connect(url: &str, max_connections: u32) -> anyhow::Result<PgPool> {
    let timeout_ms = IDLE_IN_TRANSACTION_TIMEOUT.as_millis().to_string();
    let options = PgConnectOptions::from_str(url)
        .context("the PostgreSQL URL does not parse")?
        .application_name("henrybook")
        .options([("idle_in_transaction_session_timeout", timeout_ms.as_str())]);
    PgPoolOptions::new()
        .max_connections(max_connections)
        .acquire_timeout(Duration::from_secs(10))
        .connect_with(options)
        .await
        .context("cannot connect to PostgreSQL")
}

/// Applies the PostgreSQL migrations (sqlx takes an advisory lock, so replicas starting together
/// apply each migration once).
pub async fn migrate(pool: &PgPool) -> anyhow::Result<()> {
    MIGRATOR
        .run(pool)
        .await
        .context("cannot apply the PostgreSQL migrations")
}

/// The store on PostgreSQL: the same operations and answers as [`crate::store::Store`] for the
/// modules ported so far (see the module notes), over one pool that every replica has its own of.
#[derive(Clone, Debug)]
pub struct PgStore {
    pub(crate) pool: PgPool,
    pub(crate) queue: queue::PgQueue,
    /// What /readyz's audit check has verified: each check continues from there.
    pub(crate) chain_checked: crate::store::integrity::ChainWatch,
}

impl PgStore {
    /// A store over `pool`, whose database is already migrated ([`migrate`]).
    pub fn new(pool: PgPool) -> PgStore {
        PgStore {
            queue: queue::PgQueue::new(pool.clone()),
            pool,
            chain_checked: Default::default(),
        }
    }

    /// Connects to `url` with at most `max_connections` connections and applies the migrations.
    pub async fn open(url: &str, max_connections: u32) -> anyhow::Result<PgStore> {
        let pool = connect(url, max_connections).await?;
        migrate(&pool).await?;
        let store = PgStore::new(pool);
        // The whole chain is checked at start, so a trail changed while no replica ran shows.
        let checked = store
            .verify_audit(0, None)
            .await
            .context("cannot read the audit trail")?;
        store.chain_checked.start(checked).await;
        Ok(store)
    }

    pub fn pool(&self) -> &PgPool {
        &self.pool
    }

    /// The job queue on the same pool.
    pub fn queue(&self) -> &queue::PgQueue {
        &self.queue
    }

    pub async fn close(&self) {
        self.pool.close().await;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn postgres_urls_are_told_from_file_paths() {
        assert!(is_postgres_url(
            "postgres://postgres@127.0.0.1:5432/henrybook"
        ));
        assert!(is_postgres_url("PostgreSQL://h/db"));
        assert!(!is_postgres_url("/var/lib/henrybook/registry.db"));
        assert!(!is_postgres_url("sqlite://registry.db"));
    }

    #[test]
    fn both_migration_folders_hold_the_same_versions_and_names() {
        let sqlite: Vec<(i64, &str)> = crate::store::MIGRATOR
            .iter()
            .map(|m| (m.version, m.description.as_ref()))
            .collect();
        let postgres: Vec<(i64, &str)> = MIGRATOR
            .iter()
            .map(|m| (m.version, m.description.as_ref()))
            .collect();
        assert!(sqlite.len() >= 10, "{sqlite:?}");
        assert_eq!(sqlite, postgres);
    }
}
