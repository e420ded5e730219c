//! The record's integrity on PostgreSQL: the checks of [`crate::store::integrity`] (the same hash
//! chain, the same verdict checks, the same words), each read in one snapshot so the chain, the
//! results it recorded and the verdicts are seen as of one moment while other replicas write.

use super::PgStore;
use super::parts::snapshot;
use crate::store::StoreResult;
use crate::store::integrity::{
    IntegrityReport, ROW_SELECT, VERDICT_SELECT, check_chain, check_verdict, recorded_fits,
    row_from,
};
use crate::store::sha256_hex;
use sqlx::PgConnection;
use std::collections::HashMap;

/// [`crate::store::Store::verify_audit`] inside the caller's snapshot.
async fn verify_audit_in(
    conn: &mut PgConnection,
    after: i64,
    after_hash: Option<&str>,
) -> StoreResult<(IntegrityReport, i64, Option<String>)> {
    let rows = sqlx::query(sqlx::AssertSqlSafe(format!(
        "{ROW_SELECT} WHERE audit_id > $1 ORDER BY audit_id"
    )))
    .bind(after)
    .fetch_all(&mut *conn)
    .await?
    .iter()
    .map(row_from)
    .collect::<Result<Vec<_>, _>>()?;
    let ids = recorded_fits(&rows);
    let mut results: HashMap<i64, Option<String>> = ids.iter().map(|id| (*id, None)).collect();
    let reports: Vec<(i64, Option<String>)> =
        sqlx::query_as("SELECT fit_id, report_json FROM fits WHERE fit_id = ANY($1)")
            .bind(&ids)
            .fetch_all(&mut *conn)
            .await?;
    for (id, report) in reports {
        results.insert(id, report.map(|r| sha256_hex(r.as_bytes())));
    }
    let audit_rows: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM audit")
        .fetch_one(&mut *conn)
        .await?;
    Ok(check_chain(&rows, after, after_hash, &results, audit_rows))
}

impl PgStore {
    /// Checks the audit chain from row `after + 1` on (0: all of it), given the hash of row `after`;
    /// returns the report and the last row checked with its hash.
    pub async fn verify_audit(
        &self,
        after: i64,
        after_hash: Option<&str>,
    ) -> StoreResult<(IntegrityReport, i64, Option<String>)> {
        let mut tx = snapshot(&self.pool).await?;
        let checked = verify_audit_in(&mut tx, after, after_hash).await?;
        tx.commit().await?;
        Ok(checked)
    }

    /// The whole check: the audit chain from its first row, and every succeeded fit's stored verdict
    /// against its report and its part's current limits.
    pub async fn verify_integrity(&self) -> StoreResult<IntegrityReport> {
        let mut tx = snapshot(&self.pool).await?;
        let (mut report, _, _) = verify_audit_in(&mut tx, 0, None).await?;
        let rows = sqlx::query(VERDICT_SELECT).fetch_all(&mut *tx).await?;
        for r in &rows {
            check_verdict(r, &mut report)?;
        }
        tx.commit().await?;
        Ok(report)
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
        let database = sqlx::query_scalar::<_, i32>("SELECT 1")
            .fetch_one(&self.pool)
            .await
            .is_ok();
        let applied: Result<Vec<i64>, _> = sqlx::query_scalar(
            "SELECT version FROM _sqlx_migrations WHERE success ORDER BY version",
        )
        .fetch_all(&self.pool)
        .await;
        (
            database,
            crate::store::all_applied(&super::MIGRATOR, applied.ok()),
        )
    }
}
