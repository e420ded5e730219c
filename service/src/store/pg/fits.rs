//! Fits on PostgreSQL: status, details, revisions (refit), cancel and retry, approval and rejection,
//! the lots of a part's trend and a fit's provenance; the operations of [`crate::store::fits`] with the
//! same answers and errors.
//!
//! Locks, in the order every transaction of the PostgreSQL store takes them: job rows, the part's
//! row, fit rows, the queue-bound lock, the audit lock. Approval, rejection and refit lock the part's
//! row before any fit row they change, so two replicas approving fits of one part take turns and a
//! refit's revision number is taken once; a worker writing a result locks its job and then the part
//! (see [`super::results`]). Audit rows are written last ([`super::audit`]).
//! Queued and running fits keep their job's claim counter through a retry: it only grows (see
//! [`super::queue`]), where SQLite clears its claim token.

use super::PgStore;
use super::audit::{self, Entry};
use super::parts::{lock_part_id, snapshot};
use super::queue::{Cancel, cancel_in};
use super::results::baseline_report;
use super::sweeps::{check_queue_bounds, insert_fit};
use crate::fit::FitReport;
use crate::registry::wire::{FitDetail, FitPage, FitSummary};
use crate::store::fits::{
    DETAIL_SELECT, FitFilter, FitProvenance, SUMMARY_SELECT, approval_decision, detail_from_row,
    drift_of, fit_page, list_query, no_fit, not_now, refit_reason, summary_from_row,
    superseded_reason,
};
use crate::store::sweeps::QueueBounds;
use crate::store::{StoreResult, now_ms, rfc3339};
use sqlx::{PgConnection, Postgres, QueryBuilder, Row};

async fn summary_on(conn: &mut PgConnection, fit_id: i64) -> StoreResult<FitSummary> {
    let row = sqlx::query(sqlx::AssertSqlSafe(format!(
        "{SUMMARY_SELECT} WHERE f.fit_id = $1"
    )))
    .bind(fit_id)
    .fetch_optional(&mut *conn)
    .await?
    .ok_or_else(|| no_fit(fit_id))?;
    Ok(summary_from_row(&row)?)
}

/// The fit's status and part, locking nothing.
async fn status_of(conn: &mut PgConnection, fit_id: i64) -> StoreResult<(String, i64)> {
    sqlx::query_as("SELECT status, part_id FROM fits WHERE fit_id = $1")
        .bind(fit_id)
        .fetch_optional(&mut *conn)
        .await?
        .ok_or_else(|| no_fit(fit_id))
}

/// Recomputes the stored drift of every succeeded fit of a part against its current baseline, in one
/// statement (the caller holds the part's row).
async fn refresh_drift(conn: &mut PgConnection, part_id: i64) -> StoreResult<()> {
    let baseline = baseline_report(conn, part_id).await?;
    let fits: Vec<(i64, String)> = sqlx::query_as(
        "SELECT fit_id, report_json FROM fits WHERE part_id = $1 AND status = 'succeeded'",
    )
    .bind(part_id)
    .fetch_all(&mut *conn)
    .await?;
    if fits.is_empty() {
        return Ok(());
    }
    let mut ids = Vec::with_capacity(fits.len());
    let mut jsons = Vec::with_capacity(fits.len());
    let mut maxes = Vec::with_capacity(fits.len());
    for (fit_id, json) in &fits {
        let (d, max) = drift_of(baseline.as_ref(), *fit_id, json)?;
        ids.push(*fit_id);
        jsons.push(d);
        maxes.push(max);
    }
    sqlx::query(
        "UPDATE fits AS f SET drift_json = d.drift_json, drift_max_sigma = d.drift_max_sigma \
         FROM unnest($1::bigint[], $2::text[], $3::float8[]) AS d(fit_id, drift_json, drift_max_sigma) \
         WHERE f.fit_id = d.fit_id",
    )
    .bind(&ids)
    .bind(&jsons)
    .bind(&maxes)
    .execute(&mut *conn)
    .await?;
    Ok(())
}

impl PgStore {
    pub async fn fit_summary(&self, fit_id: i64) -> StoreResult<FitSummary> {
        summary_on(&mut *self.pool.acquire().await?, fit_id).await
    }

    /// The detail and the summary from one snapshot.
    pub async fn fit_detail(&self, fit_id: i64) -> StoreResult<FitDetail> {
        let mut tx = snapshot(&self.pool).await?;
        let row = sqlx::query(sqlx::AssertSqlSafe(format!("{DETAIL_SELECT}$1")))
            .bind(fit_id)
            .fetch_optional(&mut *tx)
            .await?
            .ok_or_else(|| no_fit(fit_id))?;
        let summary = summary_on(&mut tx, fit_id).await?;
        tx.commit().await?;
        detail_from_row(&row, summary)
    }

    /// The stored report of a succeeded fit.
    pub async fn fit_report(&self, fit_id: i64) -> StoreResult<Option<FitReport>> {
        let text: Option<Option<String>> =
            sqlx::query_scalar("SELECT report_json FROM fits WHERE fit_id = $1")
                .bind(fit_id)
                .fetch_optional(&self.pool)
                .await?;
        match text {
            None => Err(no_fit(fit_id)),
            Some(None) => Ok(None),
            Some(Some(t)) => Ok(Some(serde_json::from_str(&t)?)),
        }
    }

    /// The sweep a fit belongs to.
    pub async fn fit_sweep_id(&self, fit_id: i64) -> StoreResult<i64> {
        sqlx::query_scalar("SELECT sweep_id FROM fits WHERE fit_id = $1")
            .bind(fit_id)
            .fetch_optional(&self.pool)
            .await?
            .ok_or_else(|| no_fit(fit_id))
    }

    /// Newest first, filtered, one page.
    pub async fn list_fits(&self, filter: &FitFilter) -> StoreResult<FitPage> {
        let mut q: QueryBuilder<Postgres> = list_query(filter);
        let rows = q.build().fetch_all(&self.pool).await?;
        let items = rows
            .iter()
            .map(summary_from_row)
            .collect::<Result<Vec<_>, _>>()?;
        Ok(fit_page(items, filter.limit))
    }

    /// Cancels a queued fit at once; asks a running one to stop (its worker sees the request at the
    /// next lease renewal). Returns whether the fit was running.
    pub async fn cancel_fit(&self, actor: &str, fit_id: i64) -> StoreResult<bool> {
        let mut tx = self.pool.begin().await?;
        let (_, part_id) = status_of(&mut tx, fit_id).await?;
        let running = match cancel_in(&mut tx, fit_id).await? {
            Cancel::Cancelled => false,
            Cancel::Requested => true,
        };
        audit::append(
            &mut tx,
            &[Entry::new(
                actor,
                "fit-cancelled",
                Some(part_id),
                Some(fit_id),
                None,
            )],
        )
        .await?;
        tx.commit().await?;
        Ok(running)
    }

    /// Queues a failed or cancelled fit again (same revision: its result was never written).
    pub async fn retry_fit(
        &self,
        actor: &str,
        fit_id: i64,
        bounds: Option<QueueBounds>,
    ) -> StoreResult<()> {
        let mut tx = self.pool.begin().await?;
        // The job row first, as in the queue (a pruned job's row is made again below, its claim
        // counter continuing from the one kept on the fit).
        sqlx::query("SELECT 1 FROM jobs WHERE fit_id = $1 FOR UPDATE")
            .bind(fit_id)
            .execute(&mut *tx)
            .await?;
        let (status, part_id): (String, i64) =
            sqlx::query_as("SELECT status, part_id FROM fits WHERE fit_id = $1 FOR UPDATE")
                .bind(fit_id)
                .fetch_optional(&mut *tx)
                .await?
                .ok_or_else(|| no_fit(fit_id))?;
        if status != "failed" && status != "cancelled" {
            return Err(not_now(fit_id, &status, "failed or cancelled", "retried"));
        }
        if let Some(b) = bounds {
            check_queue_bounds(&mut tx, b, part_id).await?;
        }
        sqlx::query(
            "WITH j AS ( \
                 INSERT INTO jobs (fit_id, state, claim_token, enqueued_at_ms) \
                 SELECT fit_id, 'queued', job_claim_token, $2 FROM fits WHERE fit_id = $1 \
                 ON CONFLICT (fit_id) DO UPDATE SET state = 'queued', lease_until_ms = NULL, \
                     attempts = 0, cancel_requested = false, \
                     enqueued_at_ms = excluded.enqueued_at_ms \
             ) \
             UPDATE fits SET status = 'queued', progress = 0, error = NULL, error_kind = NULL, \
                 started_at_ms = NULL, finished_at_ms = NULL, attempts = 0 WHERE fit_id = $1",
        )
        .bind(fit_id)
        .bind(now_ms())
        .execute(&mut *tx)
        .await?;
        audit::append(
            &mut tx,
            &[Entry::new(
                actor,
                "fit-retried",
                Some(part_id),
                Some(fit_id),
                None,
            )],
        )
        .await?;
        tx.commit().await?;
        Ok(())
    }

    /// Queues a new revision of the fit's sweep with new options; the old revision stays as it is.
    pub async fn refit(
        &self,
        actor: &str,
        fit_id: i64,
        options_json: &str,
        options_key: &str,
        bounds: Option<QueueBounds>,
    ) -> StoreResult<i64> {
        let mut tx = self.pool.begin().await?;
        let row: Option<(i64, i64, i64)> =
            sqlx::query_as("SELECT sweep_id, part_id, lot_id FROM fits WHERE fit_id = $1")
                .bind(fit_id)
                .fetch_optional(&mut *tx)
                .await?;
        let (sweep_id, part_id, lot_id) = row.ok_or_else(|| no_fit(fit_id))?;
        // Refits of the part's sweeps take turns: each takes the next revision once.
        lock_part_id(&mut tx, part_id).await?;
        if let Some(b) = bounds {
            check_queue_bounds(&mut tx, b, part_id).await?;
        }
        let revision: i64 =
            sqlx::query_scalar("SELECT MAX(revision) + 1 FROM fits WHERE sweep_id = $1")
                .bind(sweep_id)
                .fetch_one(&mut *tx)
                .await?;
        let new_id = insert_fit(
            &mut tx,
            sweep_id,
            part_id,
            lot_id,
            revision,
            options_json,
            options_key,
        )
        .await?;
        audit::append(
            &mut tx,
            &[Entry::new(
                actor,
                "refit-requested",
                Some(part_id),
                Some(new_id),
                Some(&refit_reason(revision, fit_id, options_json)),
            )],
        )
        .await?;
        tx.commit().await?;
        Ok(new_id)
    }

    /// Approves a succeeded fit: it becomes the part's baseline and every other succeeded fit of the
    /// part is compared against it (the rules of [`crate::store::Store::approve_fit`]).
    pub async fn approve_fit(
        &self,
        actor: &str,
        fit_id: i64,
        reason: Option<&str>,
        overriding: bool,
    ) -> StoreResult<()> {
        let mut tx = self.pool.begin().await?;
        let (_, part_id) = status_of(&mut tx, fit_id).await?;
        lock_part_id(&mut tx, part_id).await?;
        let (status, approval, verdict, quality, baseline): (
            String,
            Option<String>,
            Option<String>,
            Option<String>,
            Option<i64>,
        ) = sqlx::query_as(
            "SELECT f.status, f.approval, f.verdict, f.quality, p.baseline_fit_id FROM fits f \
             JOIN parts p ON p.part_id = f.part_id WHERE f.fit_id = $1",
        )
        .bind(fit_id)
        .fetch_one(&mut *tx)
        .await?;
        if status != "succeeded" {
            return Err(not_now(fit_id, &status, "succeeded", "approved"));
        }
        let decision = approval_decision(
            fit_id,
            (
                approval.as_deref(),
                verdict.as_deref(),
                quality.as_deref(),
                baseline,
            ),
            reason,
            overriding,
        )?;
        let mut superseded: Vec<i64> = sqlx::query_scalar(
            "UPDATE fits SET approval = NULL \
             WHERE part_id = $1 AND approval = 'approved' AND fit_id <> $2 RETURNING fit_id",
        )
        .bind(part_id)
        .bind(fit_id)
        .fetch_all(&mut *tx)
        .await?;
        superseded.sort_unstable();
        sqlx::query("UPDATE fits SET approval = 'approved' WHERE fit_id = $1")
            .bind(fit_id)
            .execute(&mut *tx)
            .await?;
        sqlx::query("UPDATE parts SET baseline_fit_id = $1 WHERE part_id = $2")
            .bind(fit_id)
            .bind(part_id)
            .execute(&mut *tx)
            .await?;
        refresh_drift(&mut tx, part_id).await?;
        let why = superseded_reason(fit_id);
        let mut entries: Vec<Entry> = superseded
            .iter()
            .map(|old| {
                Entry::new(
                    actor,
                    "approval-superseded",
                    Some(part_id),
                    Some(*old),
                    Some(&why),
                )
            })
            .collect();
        entries.push(Entry::new(
            actor,
            decision.action,
            Some(part_id),
            Some(fit_id),
            decision.recorded.as_deref(),
        ));
        audit::append(&mut tx, &entries).await?;
        tx.commit().await?;
        Ok(())
    }

    /// Rejects a succeeded fit; a rejected baseline stops being the baseline.
    pub async fn reject_fit(&self, actor: &str, fit_id: i64, reason: &str) -> StoreResult<()> {
        let mut tx = self.pool.begin().await?;
        let (_, part_id) = status_of(&mut tx, fit_id).await?;
        lock_part_id(&mut tx, part_id).await?;
        let (status, _) = status_of(&mut tx, fit_id).await?;
        if status != "succeeded" {
            return Err(not_now(fit_id, &status, "succeeded", "rejected"));
        }
        sqlx::query("UPDATE fits SET approval = 'rejected' WHERE fit_id = $1")
            .bind(fit_id)
            .execute(&mut *tx)
            .await?;
        sqlx::query(
            "UPDATE parts SET baseline_fit_id = NULL WHERE part_id = $1 AND baseline_fit_id = $2",
        )
        .bind(part_id)
        .bind(fit_id)
        .execute(&mut *tx)
        .await?;
        refresh_drift(&mut tx, part_id).await?;
        audit::append(
            &mut tx,
            &[Entry::new(
                actor,
                "fit-rejected",
                Some(part_id),
                Some(fit_id),
                Some(reason),
            )],
        )
        .await?;
        tx.commit().await?;
        Ok(())
    }

    /// Every succeeded fit of a part as [`crate::registry::trend`] draws it (the same rows as
    /// [`crate::store::Store::lot_fits`]).
    pub async fn lot_fits(&self, part_id: i64) -> StoreResult<Vec<crate::registry::trend::LotFit>> {
        let rows = sqlx::query(
            "SELECT f.fit_id, l.lot, \
             (SELECT MIN(s2.sweep_id) FROM sweeps s2 WHERE s2.lot_id = f.lot_id) AS lot_order, \
             s.uploaded_at_ms, f.report_json, \
             (f.approval = 'approved' OR (f.approval IS NULL AND EXISTS ( \
                 SELECT 1 FROM audit a WHERE a.fit_id = f.fit_id \
                 AND a.action IN ('fit-approved', 'fit-approved-override')))) AS approved \
             FROM fits f JOIN lots l ON l.lot_id = f.lot_id JOIN sweeps s ON s.sweep_id = f.sweep_id \
             WHERE f.part_id = $1 AND f.status = 'succeeded' AND f.report_json IS NOT NULL \
             ORDER BY f.fit_id DESC LIMIT 2000",
        )
        .bind(part_id)
        .fetch_all(&self.pool)
        .await?;
        rows.iter()
            .map(|row| {
                let json: String = row.try_get("report_json")?;
                Ok(crate::registry::trend::LotFit {
                    fit_id: row.try_get("fit_id")?,
                    lot: row.try_get("lot")?,
                    lot_order: row.try_get("lot_order")?,
                    approved: row.try_get::<Option<bool>, _>("approved")? == Some(true),
                    uploaded_at: rfc3339(row.try_get("uploaded_at_ms")?),
                    report: serde_json::from_str(&json)?,
                })
            })
            .collect()
    }

    /// What the printed report of a fit states besides its detail (see
    /// [`crate::store::Store::fit_provenance`]).
    pub async fn fit_provenance(&self, fit_id: i64) -> StoreResult<FitProvenance> {
        let row = sqlx::query(
            "SELECT s.points, s.uploaded_at_ms, s.uploaded_by, p.description, \
             a.actor AS approved_by, a.at_ms AS approved_at_ms, a.reason AS approved_reason \
             FROM fits f JOIN sweeps s ON s.sweep_id = f.sweep_id JOIN parts p ON p.part_id = f.part_id \
             LEFT JOIN LATERAL (SELECT actor, at_ms, reason FROM audit \
                 WHERE audit.fit_id = f.fit_id AND action IN ('fit-approved', 'fit-approved-override') \
                 ORDER BY audit_id DESC LIMIT 1) a ON true \
             WHERE f.fit_id = $1",
        )
        .bind(fit_id)
        .fetch_optional(&self.pool)
        .await?
        .ok_or_else(|| no_fit(fit_id))?;
        Ok(FitProvenance {
            points: row.try_get("points")?,
            uploaded_at: rfc3339(row.try_get("uploaded_at_ms")?),
            uploaded_by: row.try_get("uploaded_by")?,
            part_description: row.try_get("description")?,
            approved_by: row.try_get("approved_by")?,
            approved_at: row
                .try_get::<Option<i64>, _>("approved_at_ms")?
                .map(rfc3339),
            approved_reason: row.try_get("approved_reason")?,
        })
    }
}
