//! Storage on PostgreSQL, for several replicas sharing one database. What exists so far: the schema
//! (`migrations/postgres/`, the same versions and names as `migrations/sqlite/`) and the job queue
//! ([`queue`]), both tested against a real server (tests/store_postgres.rs). The rest of the store
//! (parts, uploads, queries, tokens, the audit chain) runs on SQLite only, and the service does not
//! open PostgreSQL yet.
//!
//! Every connection of a pool made by [`connect`] sets `idle_in_transaction_session_timeout` as a
//! startup parameter (per connection, whatever the role's or database's settings), so a replica that
//! stalls inside a transaction cannot hold the queue's row locks for longer than that.

pub mod queue;

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
