//! `henrybook migrate`: apply the database migrations and exit, for a deployment's migration step
//! (deploy/compose.yaml's `migrate` service, deploy/henrybook-postgres.yaml's Job).

use crate::settings::DatabaseArgs;
use crate::store::backend::{Location, shown};
use crate::store::{Store, pg};
use anyhow::Context;
use std::io::Write;

/// Applies every migration to the database `database` names (a SQLite file, created when missing, or
/// a `postgres://` URL) and prints the versions the database then has.
pub async fn run(database: &DatabaseArgs, out: &mut dyn Write) -> anyhow::Result<()> {
    let sql = "SELECT version FROM _sqlx_migrations WHERE success ORDER BY version";
    let place = shown(&database.path);
    let (versions, expected): (Vec<i64>, Vec<i64>) = match Location::of(&database.path)? {
        Location::Postgres(url) => {
            let pool = pg::connect(url, 2).await?;
            pg::migrate(&pool).await?;
            let versions = sqlx::query_scalar(sql)
                .fetch_all(&pool)
                .await
                .context("cannot read the applied migrations")?;
            pool.close().await;
            (versions, pg::MIGRATOR.iter().map(|m| m.version).collect())
        }
        Location::Sqlite(file) => {
            let store = Store::open_file(&file).await?;
            let versions = sqlx::query_scalar(sql)
                .fetch_all(&store.reader)
                .await
                .context("cannot read the applied migrations")?;
            store.close().await;
            let expected = crate::store::MIGRATOR.iter().map(|m| m.version).collect();
            (versions, expected)
        }
    };
    let missing: Vec<&i64> = expected.iter().filter(|v| !versions.contains(v)).collect();
    anyhow::ensure!(
        missing.is_empty(),
        "after migrating, {place} still lacks the migrations {missing:?}"
    );
    let list: Vec<String> = versions.iter().map(|v| v.to_string()).collect();
    writeln!(
        out,
        "{place}: {} migrations applied ({}); the schema is current",
        versions.len(),
        list.join(", ")
    )?;
    Ok(())
}
