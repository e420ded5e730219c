//! Parts and their limits, lots, the baseline pointer and the part's audit trail on PostgreSQL: the
//! operations of [`crate::store::parts`] with the same answers and errors.
//!
//! A write that depends on a part's limits or baseline locks the part's row first
//! (`FOR NO KEY UPDATE`, which leaves the foreign-key checks of new sweeps and fits free), so two
//! replicas changing one part's limits, baseline or fits judge against one state.

use super::PgStore;
use super::audit::{self, Entry};
use crate::registry::ids::PartNumber;
use crate::registry::limits::Limits;
use crate::registry::wire::Part;
use crate::store::StoreError;
use crate::store::StoreResult;
use crate::store::parts::{
    AuditRow, LIMIT_COLUMNS, PartRow, audit_entries, limit_values, limits_from_row, no_part,
    part_exists, verdict_of,
};
use crate::store::{fits::summary_from_row, now_ms};
use sqlx::{PgConnection, Row};

/// Starts a read-only transaction that sees one snapshot for all its statements.
pub(crate) async fn snapshot(
    pool: &sqlx::PgPool,
) -> StoreResult<sqlx::Transaction<'static, sqlx::Postgres>> {
    let mut tx = pool.begin().await?;
    sqlx::query("SET TRANSACTION ISOLATION LEVEL REPEATABLE READ, READ ONLY")
        .execute(&mut *tx)
        .await?;
    Ok(tx)
}

/// Locks the part's row for the rest of the transaction; its id, or `None` when there is no such part.
pub(crate) async fn lock_part(
    conn: &mut PgConnection,
    part_number: &PartNumber,
) -> StoreResult<Option<i64>> {
    Ok(
        sqlx::query_scalar("SELECT part_id FROM parts WHERE part_number = $1 FOR NO KEY UPDATE")
            .bind(part_number.as_str())
            .fetch_optional(&mut *conn)
            .await?,
    )
}

/// Locks the part's row by its id (see [`lock_part`]).
pub(crate) async fn lock_part_id(conn: &mut PgConnection, part_id: i64) -> StoreResult<()> {
    sqlx::query("SELECT 1 FROM parts WHERE part_id = $1 FOR NO KEY UPDATE")
        .bind(part_id)
        .execute(&mut *conn)
        .await?;
    Ok(())
}

impl PgStore {
    pub async fn create_part(
        &self,
        actor: &str,
        part_number: &PartNumber,
        description: &str,
        limits: &Limits,
    ) -> StoreResult<()> {
        limits.validate().map_err(StoreError::Invalid)?;
        let mut tx = self.pool.begin().await?;
        let mut q = sqlx::query_scalar::<_, i64>(sqlx::AssertSqlSafe(format!(
            "INSERT INTO parts (part_number, description, {LIMIT_COLUMNS}, created_at_ms) \
             VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14, $15) \
             ON CONFLICT (part_number) DO NOTHING RETURNING part_id"
        )))
        .bind(part_number.as_str())
        .bind(description);
        for v in limit_values(limits) {
            q = q.bind(v);
        }
        let part_id = q
            .bind(now_ms())
            .fetch_optional(&mut *tx)
            .await?
            .ok_or_else(|| part_exists(part_number))?;
        audit::append(
            &mut tx,
            &[Entry::new(actor, "part-created", Some(part_id), None, None)],
        )
        .await?;
        tx.commit().await?;
        Ok(())
    }

    pub async fn part_row(&self, part_number: &PartNumber) -> StoreResult<PartRow> {
        part_row_on(&mut *self.pool.acquire().await?, part_number).await
    }

    /// The part with its lots, newest 500 fits and newest 500 audit rows, read from one snapshot.
    pub async fn part(&self, part_number: &PartNumber) -> StoreResult<Part> {
        let mut tx = snapshot(&self.pool).await?;
        let p = part_row_on(&mut tx, part_number).await?;
        // Byte order, as SQLite's default collation sorts, whatever the database's locale.
        let lots: Vec<String> = sqlx::query_scalar(
            "SELECT lot FROM lots WHERE part_id = $1 ORDER BY lot COLLATE \"C\"",
        )
        .bind(p.part_id)
        .fetch_all(&mut *tx)
        .await?;
        let fits = sqlx::query(sqlx::AssertSqlSafe(format!(
            "{} WHERE f.part_id = $1 ORDER BY f.fit_id DESC LIMIT 500",
            crate::store::fits::SUMMARY_SELECT
        )))
        .bind(p.part_id)
        .fetch_all(&mut *tx)
        .await?
        .iter()
        .map(summary_from_row)
        .collect::<Result<Vec<_>, _>>()?;
        let audit_rows: Vec<AuditRow> = sqlx::query_as(
            "SELECT at_ms, actor, action, fit_id, reason FROM \
             (SELECT * FROM audit WHERE part_id = $1 ORDER BY audit_id DESC LIMIT 500) AS newest \
             ORDER BY audit_id",
        )
        .bind(p.part_id)
        .fetch_all(&mut *tx)
        .await?;
        tx.commit().await?;
        Ok(Part {
            part_number: p.part_number,
            description: p.description,
            limits: p.limits,
            lots,
            baseline_fit_id: p.baseline_fit_id,
            fits,
            audit: audit_entries(audit_rows),
        })
    }

    /// Replaces a part's limits and re-judges every succeeded fit of the part against them (one
    /// statement for all of them).
    pub async fn update_limits(
        &self,
        actor: &str,
        part_number: &PartNumber,
        limits: &Limits,
    ) -> StoreResult<()> {
        limits.validate().map_err(StoreError::Invalid)?;
        let mut tx = self.pool.begin().await?;
        let part_id = lock_part(&mut tx, part_number)
            .await?
            .ok_or_else(|| no_part(part_number))?;
        let mut q = sqlx::query(
            "UPDATE parts SET l_nominal_h = $1, l_test_frequency_hz = $2, l_tolerance_percent = $3, \
             dcr_max_ohm = $4, srf_min_hz = $5, q_min = $6, q_test_frequency_hz = $7, z_min_ohm = $8, \
             z_band_min_hz = $9, z_band_max_hz = $10, core_corner_min_hz = $11, \
             core_corner_max_hz = $12 WHERE part_id = $13",
        );
        for v in limit_values(limits) {
            q = q.bind(v);
        }
        q.bind(part_id).execute(&mut *tx).await?;
        let reports: Vec<(i64, String)> = sqlx::query_as(
            "SELECT fit_id, report_json FROM fits WHERE part_id = $1 AND status = 'succeeded'",
        )
        .bind(part_id)
        .fetch_all(&mut *tx)
        .await?;
        let mut ids = Vec::with_capacity(reports.len());
        let mut verdicts = Vec::with_capacity(reports.len());
        let mut checks = Vec::with_capacity(reports.len());
        for (fit_id, json) in &reports {
            let (verdict, verdict_json) = verdict_of(limits, json)?;
            ids.push(*fit_id);
            verdicts.push(verdict);
            checks.push(verdict_json);
        }
        if !ids.is_empty() {
            sqlx::query(
                "UPDATE fits AS f SET verdict = v.verdict, verdict_json = v.verdict_json \
                 FROM unnest($1::bigint[], $2::text[], $3::text[]) AS v(fit_id, verdict, verdict_json) \
                 WHERE f.fit_id = v.fit_id",
            )
            .bind(&ids)
            .bind(&verdicts)
            .bind(&checks)
            .execute(&mut *tx)
            .await?;
        }
        let reason = serde_json::to_string(limits)?;
        audit::append(
            &mut tx,
            &[Entry::new(
                actor,
                "limits-changed",
                Some(part_id),
                None,
                Some(&reason),
            )],
        )
        .await?;
        tx.commit().await?;
        Ok(())
    }
}

async fn part_row_on(conn: &mut PgConnection, part_number: &PartNumber) -> StoreResult<PartRow> {
    let row = sqlx::query(sqlx::AssertSqlSafe(format!(
        "SELECT part_id, part_number, description, baseline_fit_id, {LIMIT_COLUMNS} \
         FROM parts WHERE part_number = $1"
    )))
    .bind(part_number.as_str())
    .fetch_optional(&mut *conn)
    .await?
    .ok_or_else(|| no_part(part_number))?;
    Ok(PartRow {
        part_id: row.try_get("part_id")?,
        part_number: row.try_get("part_number")?,
        description: row.try_get("description")?,
        limits: limits_from_row(&row)?,
        baseline_fit_id: row.try_get("baseline_fit_id")?,
    })
}
