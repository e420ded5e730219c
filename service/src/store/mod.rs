//! Storage on SQLite through sqlx: parts, lots, sweeps, fits and their revisions, the job table,
//! query figures, tokens and the audit trail (schema in `migrations/sqlite/`).
//!
//! Writes go through a single-connection writer pool, so write transactions never race each other into
//! SQLITE_BUSY_SNAPSHOT; reads use a separate pool of WAL readers. The store translates between rows and
//! the wire types in [`crate::registry::wire`]; it computes nothing beyond calling the pure
//! [`crate::registry`] functions when a stored verdict or drift must follow a change of limits or
//! baseline.
//!
//! [`pg`] is the store on PostgreSQL for several replicas, with this store's operations and answers;
//! [`backend::Backend`] is the one the service uses, over whichever of the two the database location
//! names.

pub mod backend;
pub mod batch;
pub mod fits;
pub mod integrity;
pub mod jobs;
pub mod parts;
pub mod pg;
pub mod query;
pub mod sweeps;
pub mod token_file;
pub mod tokens;

pub use backend::{Backend, JobClaim};

use anyhow::Context;
use sqlx::SqlitePool;
use sqlx::sqlite::{SqliteConnectOptions, SqliteJournalMode, SqlitePoolOptions, SqliteSynchronous};
use std::path::Path;
use std::time::Duration;

pub static MIGRATOR: sqlx::migrate::Migrator = sqlx::migrate!("../migrations/sqlite");

/// Errors the HTTP layer maps to problems; anything else is an internal error (logged, not shown).
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("{0}")]
    NotFound(String),
    #[error("{0}")]
    Conflict(String),
    #[error("{0}")]
    Invalid(String),
    #[error(transparent)]
    Database(#[from] sqlx::Error),
    #[error(transparent)]
    Json(#[from] serde_json::Error),
    /// A queue bound was reached when the write was about to queue a fit (`part`: the part's bound,
    /// else the service's); nothing was written.
    #[error("{queued} fits are queued or running, the most {} may have", if *.part { "one part" } else { "this service" })]
    QueueFull { part: bool, queued: i64 },
}

pub type StoreResult<T> = Result<T, StoreError>;

impl StoreError {
    /// Whether the database was out of reach for the moment rather than refusing the request: a
    /// connection lost or refused, a pool with no connection free in time, a server shutting down
    /// or starting (SQLSTATE class 08, 57P01–57P03), a transaction chosen as the victim of a
    /// serialisation conflict or deadlock (40001, 40P01), SQLite busy or locked past its timeout.
    /// The same request may succeed when tried again.
    pub fn is_transient(&self) -> bool {
        let StoreError::Database(e) = self else {
            return false;
        };
        match e {
            sqlx::Error::Io(_) | sqlx::Error::PoolTimedOut | sqlx::Error::PoolClosed => true,
            sqlx::Error::Database(db) => {
                let Some(code) = db.code() else {
                    return false;
                };
                if db
                    .try_downcast_ref::<sqlx::postgres::PgDatabaseError>()
                    .is_some()
                {
                    code.starts_with("08")
                        || matches!(&*code, "57P01" | "57P02" | "57P03" | "40001" | "40P01")
                } else {
                    // SQLite's extended result codes: the primary code is the low byte
                    // (SQLITE_BUSY = 5, SQLITE_LOCKED = 6).
                    code.parse::<u32>().is_ok_and(|c| matches!(c & 0xff, 5 | 6))
                }
            }
            _ => false,
        }
    }
}

#[derive(Clone, Debug)]
pub struct Store {
    /// One connection: every write transaction is serialised here.
    pub(crate) writer: SqlitePool,
    pub(crate) reader: SqlitePool,
    /// Group commit on the writer for the busy paths (uploads, claims, outcomes).
    pub(crate) batch: batch::Batcher,
    /// What /readyz's audit check has verified: each check continues from there.
    pub(crate) chain_checked: integrity::ChainWatch,
}

impl Store {
    /// Opens (creating when missing) the database file and applies the migrations.
    pub async fn open(path: &Path) -> anyhow::Result<Store> {
        Store::open_file(&backend::SqliteFile {
            path: path.to_path_buf(),
            create: true,
        })
        .await
    }

    /// Opens the database file (creating it and its folder when missing, if `file.create` says so)
    /// and applies the migrations.
    pub async fn open_file(file: &backend::SqliteFile) -> anyhow::Result<Store> {
        let path = file.path.as_path();
        if !file.create {
            anyhow::ensure!(
                path.is_file(),
                "cannot open the database {}: there is no such file, and mode=rw does not create one",
                path.display()
            );
        } else if let Some(dir) = path.parent()
            && !dir.as_os_str().is_empty()
        {
            std::fs::create_dir_all(dir)
                .with_context(|| format!("cannot create the folder {}", dir.display()))?;
        }
        let options = SqliteConnectOptions::new()
            .filename(path)
            .create_if_missing(file.create)
            .journal_mode(SqliteJournalMode::Wal)
            .synchronous(SqliteSynchronous::Normal)
            .busy_timeout(Duration::from_secs(10))
            .foreign_keys(true)
            // Sorts and temporary B-trees stay in memory, and each connection caches 4 MiB of pages
            // (the query indexes of 100 000 parts fit). A memory map would read faster but counts
            // the mapped file into the process's resident memory once per connection.
            .pragma("temp_store", "memory")
            .pragma("cache_size", "-4096");
        // A pooled SQLite connection is a thread of its own, and each ping a round trip to it. The
        // pool pings every connection given back (and closes one that does not answer), so the
        // ping before each hand-out only doubles the round trips: off.
        let writer = SqlitePoolOptions::new()
            .max_connections(1)
            .test_before_acquire(false)
            .connect_with(options.clone())
            .await
            .with_context(|| format!("cannot open the database {}", path.display()))?;
        MIGRATOR
            .run(&writer)
            .await
            .context("cannot apply the database migrations")?;
        let reader = SqlitePoolOptions::new()
            .max_connections(8)
            .test_before_acquire(false)
            .connect_with(options.read_only(true))
            .await
            .with_context(|| format!("cannot open the database {}", path.display()))?;
        let batch = batch::Batcher::start(writer.clone());
        let store = Store {
            writer,
            reader,
            batch,
            chain_checked: Default::default(),
        };
        // Rows from before the chain existed are sealed once; then the whole chain is checked, so a
        // trail changed while the service was down shows at start.
        store
            .seal_audit()
            .await
            .context("cannot seal the audit trail")?;
        let checked = store
            .verify_audit(0, None)
            .await
            .context("cannot read the audit trail")?;
        store.chain_checked.start(checked).await;
        Ok(store)
    }

    /// /readyz's audit check: continues the chain from the last row it verified (cheap); once broken
    /// it stays broken until the service restarts and the full check passes.
    pub async fn audit_chain_ok(&self) -> (bool, Option<String>) {
        self.chain_checked
            .advance(|after, hash| async move { self.verify_audit(after, hash.as_deref()).await })
            .await
    }

    /// Readiness: the database answers and every embedded migration is applied.
    pub async fn readiness(&self) -> (bool, bool) {
        let database = sqlx::query_scalar::<_, i64>("SELECT 1")
            .fetch_one(&self.reader)
            .await
            .is_ok();
        let applied: Result<Vec<i64>, _> = sqlx::query_scalar(
            "SELECT version FROM _sqlx_migrations WHERE success = 1 ORDER BY version",
        )
        .fetch_all(&self.reader)
        .await;
        (database, all_applied(&MIGRATOR, applied.ok()))
    }

    pub async fn close(&self) {
        self.reader.close().await;
        self.writer.close().await;
    }

    /// Starts a write transaction on the writer connection.
    pub(crate) async fn write(&self) -> StoreResult<sqlx::Transaction<'static, sqlx::Sqlite>> {
        Ok(self.writer.begin().await?)
    }
}

/// Whether every migration of `migrator` is among the `applied` versions (`None`: they could not be
/// read).
pub(crate) fn all_applied(migrator: &sqlx::migrate::Migrator, applied: Option<Vec<i64>>) -> bool {
    applied.is_some_and(|v| migrator.iter().all(|m| v.contains(&m.version)))
}

/// Milliseconds since the Unix epoch.
pub fn now_ms() -> i64 {
    time::OffsetDateTime::now_utc().unix_timestamp_nanos() as i64 / 1_000_000
}

/// RFC 3339 text of a millisecond timestamp.
pub fn rfc3339(ms: i64) -> String {
    use time::format_description::well_known::Rfc3339;
    time::OffsetDateTime::from_unix_timestamp_nanos(ms as i128 * 1_000_000)
        .ok()
        .and_then(|t| t.format(&Rfc3339).ok())
        .unwrap_or_default()
}

/// Parses an RFC 3339 timestamp into milliseconds.
pub fn parse_rfc3339(text: &str) -> Option<i64> {
    use time::format_description::well_known::Rfc3339;
    time::OffsetDateTime::parse(text, &Rfc3339)
        .ok()
        .map(|t| (t.unix_timestamp_nanos() / 1_000_000) as i64)
}

/// Lowercase hex SHA-256.
pub fn sha256_hex(bytes: &[u8]) -> String {
    use sha2::Digest;
    hex::encode(sha2::Sha256::digest(bytes))
}

/// Records one audit entry inside a write transaction.
/// The row is chained into the audit trail's hash chain ([`integrity`]).
pub(crate) async fn audit(
    tx: &mut sqlx::SqliteConnection,
    actor: &str,
    action: &str,
    part_id: Option<i64>,
    fit_id: Option<i64>,
    reason: Option<&str>,
) -> StoreResult<()> {
    integrity::append(tx, actor, action, part_id, fit_id, reason).await
}

#[cfg(test)]
pub(crate) mod testing {
    use super::*;

    /// A store on a fresh database file in its own temporary folder (kept alive by the guard).
    pub(crate) async fn temp_store() -> (Store, tempfile::TempDir) {
        let dir = tempfile::tempdir().expect("temp dir");
        let store = Store::open(&dir.path().join("test.db"))
            .await
            .expect("open");
        (store, dir)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn a_new_database_is_migrated_and_ready() {
        let (store, _dir) = testing::temp_store().await;
        assert_eq!(store.readiness().await, (true, true));
    }

    #[test]
    fn a_lost_connection_or_a_busy_pool_is_transient_and_a_refusal_is_not() {
        let io = std::io::Error::new(std::io::ErrorKind::ConnectionReset, "reset by peer");
        assert!(StoreError::Database(sqlx::Error::Io(io)).is_transient());
        assert!(StoreError::Database(sqlx::Error::PoolTimedOut).is_transient());
        assert!(!StoreError::Database(sqlx::Error::RowNotFound).is_transient());
        assert!(!StoreError::Conflict("approved already".into()).is_transient());
    }

    #[tokio::test]
    async fn a_constraint_refusal_on_sqlite_is_not_transient() {
        let (store, _dir) = testing::temp_store().await;
        let e = sqlx::query("INSERT INTO audit (audit_id) VALUES (NULL), (NULL)")
            .execute(&store.writer)
            .await
            .unwrap_err();
        assert!(!StoreError::Database(e).is_transient());
    }

    #[test]
    fn timestamps_round_trip_through_rfc3339() {
        let ms = 1_764_547_200_123;
        let text = rfc3339(ms);
        assert_eq!(text, "2025-12-01T00:00:00.123Z");
        assert_eq!(parse_rfc3339(&text), Some(ms));
    }

    #[tokio::test]
    async fn the_audit_trail_refuses_updates_and_deletes() {
        let (store, _dir) = testing::temp_store().await;
        let mut tx = store.write().await.unwrap();
        audit(&mut tx, "test", "created", None, None, None)
            .await
            .unwrap();
        tx.commit().await.unwrap();
        let upd = sqlx::query("UPDATE audit SET actor = 'x'")
            .execute(&store.writer)
            .await;
        assert!(upd.unwrap_err().to_string().contains("append-only"));
        let del = sqlx::query("DELETE FROM audit")
            .execute(&store.writer)
            .await;
        assert!(del.unwrap_err().to_string().contains("append-only"));
    }
}
