//! A fresh PostgreSQL database per test, for the tests of the PostgreSQL store and the service tests
//! run on PostgreSQL (`crate::service::TestDatabase`). Each [`TestDb`] makes a
//! database with a random name (collating text by ICU's en-US rules), applies migrations/postgres/ and
//! drops the database when dropped (also when the test fails). The server is the one RULES.md and .ci/setup name: 127.0.0.1:5432, user
//! postgres, trust authentication (HENRYBOOK_TEST_PG_ADMIN overrides the URL of the `postgres`
//! database used to create and drop the test databases). An unreachable server fails the test with a
//! message saying how to start it; it is never skipped.

use henrybook::store::pg;
use sqlx::{Connection, PgConnection, PgPool};

pub fn admin_url() -> String {
    std::env::var("HENRYBOOK_TEST_PG_ADMIN")
        .unwrap_or_else(|_| "postgres://postgres@127.0.0.1:5432/postgres".into())
}

/// A fresh, migrated database, dropped when this guard is dropped.
pub struct TestDb {
    name: String,
    pub url: String,
    pub pool: PgPool,
}

impl TestDb {
    pub async fn new() -> TestDb {
        TestDb::with_pool(8).await
    }

    /// As [`TestDb::new`], with a pool of at most `max_connections` (the service tests use the
    /// application's own pools and keep this one small).
    pub async fn with_pool(max_connections: u32) -> TestDb {
        let admin = admin_url();
        let mut conn = PgConnection::connect(&admin).await.unwrap_or_else(|e| {
            panic!(
                "PostgreSQL is not reachable at {admin}: {e}\n\
                 Start it with `pg_ctlcluster --skip-systemctl-redirect $(ls /etc/postgresql) main start` \
                 (or run `bash .ci/setup` as root, which starts it when it is down)."
            )
        });
        let name: String = sqlx::query_scalar(
            "SELECT 'henrybook_test_' || substr(md5(random()::text || clock_timestamp()::text), 1, 16)",
        )
        .fetch_one(&mut conn)
        .await
        .unwrap();
        // Text sorts by a language's rules here (ICU en-US), as under a production server's usual
        // locale, not in byte order as SQLite does: a query that needs byte order must say so.
        sqlx::raw_sql(sqlx::AssertSqlSafe(format!(
            "CREATE DATABASE {name} TEMPLATE template0 LOCALE_PROVIDER icu ICU_LOCALE 'en-US' \
             LOCALE 'C.UTF-8'"
        )))
        .execute(&mut conn)
        .await
        .unwrap_or_else(|e| panic!("cannot create the test database {name}: {e}"));
        conn.close().await.ok();
        let url = match admin.rsplit_once('/') {
            Some((server, _)) => format!("{server}/{name}"),
            None => panic!("{admin} names no database"),
        };
        let pool = pg::connect(&url, max_connections)
            .await
            .expect("connect to the test database");
        pg::migrate(&pool).await.expect("the migrations apply");
        TestDb { name, url, pool }
    }

    /// A second pool on the same database: another replica.
    pub async fn replica(&self) -> PgPool {
        pg::connect(&self.url, 8).await.expect("connect a replica")
    }
}

impl Drop for TestDb {
    fn drop(&mut self) {
        let name = self.name.clone();
        // Drop runs inside the test's runtime, which is blocked meanwhile: a thread and runtime of
        // its own, touching none of the test's connections (FORCE ends their sessions).
        std::thread::spawn(move || {
            let rt = tokio::runtime::Builder::new_current_thread()
                .enable_all()
                .build()
                .unwrap();
            rt.block_on(async move {
                if let Ok(mut conn) = PgConnection::connect(&admin_url()).await {
                    let dropped = sqlx::raw_sql(sqlx::AssertSqlSafe(format!(
                        "DROP DATABASE IF EXISTS {name} WITH (FORCE)"
                    )))
                    .execute(&mut conn)
                    .await;
                    if let Err(e) = dropped {
                        eprintln!("cannot drop the test database {name}: {e}");
                    }
                }
            });
        })
        .join()
        .ok();
    }
}
