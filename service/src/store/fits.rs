//! Fits: status for the dashboard, details, revisions (refit), cancel/retry, approval and rejection.

use super::{Store, StoreError, StoreResult, audit, now_ms, rfc3339};
use crate::fit::FitReport;
use crate::registry::drift;
use crate::registry::ids::{LotCode, PartNumber};
use crate::registry::wire::{FailureKind, FitDetail, FitPage, FitStatus, FitSummary, QueueCounts};
use sqlx::{QueryBuilder, Row, Sqlite, SqliteConnection};

/// The columns of a [`FitSummary`] (the same SQL on both backends; the caller adds the condition).
pub(crate) const SUMMARY_SELECT: &str = "SELECT f.fit_id, f.revision, f.sweep_id, p.part_number, l.lot, \
    f.status, f.progress, f.error, f.error_kind, f.created_at_ms, f.started_at_ms, f.finished_at_ms, f.srf_hz, \
    CASE WHEN f.quality = 'poor' AND f.verdict_json IS NOT NULL AND f.verdict_json <> '[]' \
    THEN 'withheld' ELSE f.verdict END AS verdict, f.quality, f.approval FROM fits f JOIN parts p ON p.part_id = f.part_id \
    JOIN lots l ON l.lot_id = f.lot_id";

/// A [`SUMMARY_SELECT`] row (of either backend) as the wire shows it.
pub(crate) fn summary_from_row<'r, R>(row: &'r R) -> Result<FitSummary, sqlx::Error>
where
    R: Row,
    &'r str: sqlx::ColumnIndex<R>,
    String: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
    i64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
    f64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
{
    let status: String = row.try_get("status")?;
    Ok(FitSummary {
        fit_id: row.try_get("fit_id")?,
        revision: row.try_get("revision")?,
        sweep_id: row.try_get("sweep_id")?,
        part_number: row.try_get("part_number")?,
        lot: row.try_get("lot")?,
        status: FitStatus::parse(&status).ok_or_else(|| sqlx::Error::ColumnDecode {
            index: "status".into(),
            source: format!("unknown status {status}").into(),
        })?,
        progress: row.try_get("progress")?,
        error: row.try_get("error")?,
        error_kind: match row.try_get::<Option<String>, _>("error_kind")? {
            None => None,
            Some(k) => Some(
                FailureKind::parse(&k).ok_or_else(|| sqlx::Error::ColumnDecode {
                    index: "error_kind".into(),
                    source: format!("unknown failure kind {k}").into(),
                })?,
            ),
        },
        created_at: rfc3339(row.try_get("created_at_ms")?),
        started_at: row.try_get::<Option<i64>, _>("started_at_ms")?.map(rfc3339),
        finished_at: row
            .try_get::<Option<i64>, _>("finished_at_ms")?
            .map(rfc3339),
        srf_hz: row.try_get("srf_hz")?,
        verdict: row.try_get("verdict")?,
        quality: row.try_get("quality")?,
        approval: row.try_get("approval")?,
    })
}

/// Filters of the fit list.
#[derive(Debug, Clone, Default)]
pub struct FitFilter {
    pub status: Option<FitStatus>,
    pub error_kind: Option<FailureKind>,
    pub part_number: Option<PartNumber>,
    pub lot: Option<LotCode>,
    pub since_ms: Option<i64>,
    /// Fits older than this id (the cursor of the previous page).
    pub before_fit_id: Option<i64>,
    pub limit: i64,
}

/// The summary of one fit, read on `conn` (a pool, or a transaction to read it with other rows).
async fn summary_on(
    conn: impl sqlx::Executor<'_, Database = Sqlite>,
    fit_id: i64,
) -> StoreResult<FitSummary> {
    let row = sqlx::query(sqlx::AssertSqlSafe(format!(
        "{SUMMARY_SELECT} WHERE f.fit_id = ?"
    )))
    .bind(fit_id)
    .fetch_optional(conn)
    .await?
    .ok_or_else(|| no_fit(fit_id))?;
    Ok(summary_from_row(&row)?)
}

impl Store {
    pub async fn fit_summary(&self, fit_id: i64) -> StoreResult<FitSummary> {
        summary_on(&self.reader, fit_id).await
    }

    pub async fn fit_detail(&self, fit_id: i64) -> StoreResult<FitDetail> {
        // Both reads in one read transaction, so they see the same snapshot: read one after the
        // other, a fit finishing in between showed as succeeded with no report.
        let mut tx = self.reader.begin().await?;
        let row = sqlx::query(sqlx::AssertSqlSafe(format!("{DETAIL_SELECT}?")))
            .bind(fit_id)
            .fetch_optional(&mut *tx)
            .await?
            .ok_or_else(|| no_fit(fit_id))?;
        let summary = summary_on(&mut *tx, fit_id).await?;
        tx.commit().await?;
        detail_from_row(&row, summary)
    }

    /// The stored report of a succeeded fit.
    pub async fn fit_report(&self, fit_id: i64) -> StoreResult<Option<FitReport>> {
        let text: Option<Option<String>> =
            sqlx::query_scalar("SELECT report_json FROM fits WHERE fit_id = ?")
                .bind(fit_id)
                .fetch_optional(&self.reader)
                .await?;
        match text {
            None => Err(no_fit(fit_id)),
            Some(None) => Ok(None),
            Some(Some(t)) => Ok(Some(serde_json::from_str(&t)?)),
        }
    }

    /// The sweep a fit belongs to.
    pub async fn fit_sweep_id(&self, fit_id: i64) -> StoreResult<i64> {
        sqlx::query_scalar("SELECT sweep_id FROM fits WHERE fit_id = ?")
            .bind(fit_id)
            .fetch_optional(&self.reader)
            .await?
            .ok_or_else(|| no_fit(fit_id))
    }

    /// Newest first, filtered, one page.
    pub async fn list_fits(&self, filter: &FitFilter) -> StoreResult<FitPage> {
        let mut q: QueryBuilder<Sqlite> = list_query(filter);
        let rows = q.build().fetch_all(&self.reader).await?;
        let items = rows
            .iter()
            .map(summary_from_row)
            .collect::<Result<Vec<_>, _>>()?;
        Ok(fit_page(items, filter.limit))
    }

    pub(crate) async fn fits_of_part(
        &self,
        part_id: i64,
        limit: i64,
    ) -> StoreResult<Vec<FitSummary>> {
        let rows = sqlx::query(sqlx::AssertSqlSafe(format!(
            "{SUMMARY_SELECT} WHERE f.part_id = ? ORDER BY f.fit_id DESC LIMIT ?"
        )))
        .bind(part_id)
        .bind(limit)
        .fetch_all(&self.reader)
        .await?;
        Ok(rows
            .iter()
            .map(summary_from_row)
            .collect::<Result<Vec<_>, _>>()?)
    }

    /// Fits per status, from the counts the `fit_status_counts` triggers keep (migration 0004).
    pub async fn queue_counts(&self) -> StoreResult<QueueCounts> {
        let rows: Vec<(String, i64)> = sqlx::query_as("SELECT status, fits FROM fit_status_counts")
            .fetch_all(&self.reader)
            .await?;
        let get = |s: &str| rows.iter().find(|r| r.0 == s).map_or(0, |r| r.1);
        Ok(QueueCounts {
            queued: get("queued"),
            running: get("running"),
            succeeded: get("succeeded"),
            failed: get("failed"),
            cancelled: get("cancelled"),
        })
    }

    /// Cancels a queued fit at once; asks a running one to stop (its worker sees the request at the
    /// next lease renewal). Returns whether the fit was running.
    pub async fn cancel_fit(&self, actor: &str, fit_id: i64) -> StoreResult<bool> {
        let mut tx = self.write().await?;
        let (status, part_id) = status_of(&mut tx, fit_id).await?;
        let running = match status.as_str() {
            "queued" => {
                sqlx::query(
                    "UPDATE fits SET status = 'cancelled', error_kind = 'cancelled', finished_at_ms = ? \
                     WHERE fit_id = ?",
                )
                .bind(now_ms())
                .bind(fit_id)
                .execute(&mut *tx)
                .await?;
                sqlx::query(
                    "UPDATE jobs SET state = 'done', claim_token = NULL, lease_until_ms = NULL \
                     WHERE fit_id = ?",
                )
                .bind(fit_id)
                .execute(&mut *tx)
                .await?;
                false
            }
            "running" => {
                sqlx::query("UPDATE jobs SET cancel_requested = 1 WHERE fit_id = ?")
                    .bind(fit_id)
                    .execute(&mut *tx)
                    .await?;
                true
            }
            other => return Err(not_now(fit_id, other, "queued or running", "cancelled")),
        };
        audit(
            &mut tx,
            actor,
            "fit-cancelled",
            Some(part_id),
            Some(fit_id),
            None,
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
        bounds: Option<super::sweeps::QueueBounds>,
    ) -> StoreResult<()> {
        let mut tx = self.write().await?;
        let (status, part_id) = status_of(&mut tx, fit_id).await?;
        if status != "failed" && status != "cancelled" {
            return Err(not_now(fit_id, &status, "failed or cancelled", "retried"));
        }
        if let Some(b) = bounds {
            super::sweeps::check_queue_bounds(&mut tx, b, part_id).await?;
        }
        sqlx::query(
            "UPDATE fits SET status = 'queued', progress = 0, error = NULL, error_kind = NULL, \
             started_at_ms = NULL, finished_at_ms = NULL, attempts = 0 WHERE fit_id = ?",
        )
        .bind(fit_id)
        .execute(&mut *tx)
        .await?;
        // The job row may have been pruned (store::jobs::prune_finished_jobs): made again then.
        sqlx::query(
            "INSERT INTO jobs (fit_id, state, enqueued_at_ms) VALUES (?, 'queued', ?) \
             ON CONFLICT (fit_id) DO UPDATE SET state = 'queued', claim_token = NULL, \
             lease_until_ms = NULL, attempts = 0, cancel_requested = 0, \
             enqueued_at_ms = excluded.enqueued_at_ms",
        )
        .bind(fit_id)
        .bind(now_ms())
        .execute(&mut *tx)
        .await?;
        audit(
            &mut tx,
            actor,
            "fit-retried",
            Some(part_id),
            Some(fit_id),
            None,
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
        bounds: Option<super::sweeps::QueueBounds>,
    ) -> StoreResult<i64> {
        let mut tx = self.write().await?;
        let row: Option<(i64, i64, i64)> =
            sqlx::query_as("SELECT sweep_id, part_id, lot_id FROM fits WHERE fit_id = ?")
                .bind(fit_id)
                .fetch_optional(&mut *tx)
                .await?;
        let (sweep_id, part_id, lot_id) = row.ok_or_else(|| no_fit(fit_id))?;
        if let Some(b) = bounds {
            super::sweeps::check_queue_bounds(&mut tx, b, part_id).await?;
        }
        let revision: i64 =
            sqlx::query_scalar("SELECT MAX(revision) + 1 FROM fits WHERE sweep_id = ?")
                .bind(sweep_id)
                .fetch_one(&mut *tx)
                .await?;
        let new_id = super::sweeps::insert_fit(
            &mut tx,
            sweep_id,
            part_id,
            lot_id,
            revision,
            options_json,
            options_key,
        )
        .await?;
        audit(
            &mut tx,
            actor,
            "refit-requested",
            Some(part_id),
            Some(new_id),
            Some(&refit_reason(revision, fit_id, options_json)),
        )
        .await?;
        tx.commit().await?;
        Ok(new_id)
    }

    /// Approves a succeeded fit: it becomes the part's baseline, and every other fit of the part is
    /// compared against it. The fit approved before it stops being approved (the audit keeps both).
    /// A fit that failed its limits, or whose model is poor (verdict withheld), is approved only with
    /// `overriding` and a reason, and the audit says so. The current baseline cannot be approved again.
    pub async fn approve_fit(
        &self,
        actor: &str,
        fit_id: i64,
        reason: Option<&str>,
        overriding: bool,
    ) -> StoreResult<()> {
        let mut tx = self.write().await?;
        let (status, part_id) = status_of(&mut tx, fit_id).await?;
        if status != "succeeded" {
            return Err(not_now(fit_id, &status, "succeeded", "approved"));
        }
        let (approval, verdict, quality, baseline): (
            Option<String>,
            Option<String>,
            Option<String>,
            Option<i64>,
        ) = sqlx::query_as(
            "SELECT f.approval, f.verdict, f.quality, p.baseline_fit_id FROM fits f \
             JOIN parts p ON p.part_id = f.part_id WHERE f.fit_id = ?",
        )
        .bind(fit_id)
        .fetch_one(&mut *tx)
        .await?;
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
        let superseded: Vec<i64> = sqlx::query_scalar(
            "SELECT fit_id FROM fits WHERE part_id = ? AND approval = 'approved' AND fit_id <> ?",
        )
        .bind(part_id)
        .bind(fit_id)
        .fetch_all(&mut *tx)
        .await?;
        for old in superseded {
            sqlx::query("UPDATE fits SET approval = NULL WHERE fit_id = ?")
                .bind(old)
                .execute(&mut *tx)
                .await?;
            audit(
                &mut tx,
                actor,
                "approval-superseded",
                Some(part_id),
                Some(old),
                Some(&superseded_reason(fit_id)),
            )
            .await?;
        }
        sqlx::query("UPDATE fits SET approval = 'approved' WHERE fit_id = ?")
            .bind(fit_id)
            .execute(&mut *tx)
            .await?;
        sqlx::query("UPDATE parts SET baseline_fit_id = ? WHERE part_id = ?")
            .bind(fit_id)
            .bind(part_id)
            .execute(&mut *tx)
            .await?;
        audit(
            &mut tx,
            actor,
            decision.action,
            Some(part_id),
            Some(fit_id),
            decision.recorded.as_deref(),
        )
        .await?;
        refresh_drift(&mut tx, part_id).await?;
        tx.commit().await?;
        Ok(())
    }

    /// Rejects a succeeded fit; a rejected baseline stops being the baseline.
    pub async fn reject_fit(&self, actor: &str, fit_id: i64, reason: &str) -> StoreResult<()> {
        let mut tx = self.write().await?;
        let (status, part_id) = status_of(&mut tx, fit_id).await?;
        if status != "succeeded" {
            return Err(not_now(fit_id, &status, "succeeded", "rejected"));
        }
        sqlx::query("UPDATE fits SET approval = 'rejected' WHERE fit_id = ?")
            .bind(fit_id)
            .execute(&mut *tx)
            .await?;
        sqlx::query(
            "UPDATE parts SET baseline_fit_id = NULL WHERE part_id = ? AND baseline_fit_id = ?",
        )
        .bind(part_id)
        .bind(fit_id)
        .execute(&mut *tx)
        .await?;
        audit(
            &mut tx,
            actor,
            "fit-rejected",
            Some(part_id),
            Some(fit_id),
            Some(reason),
        )
        .await?;
        refresh_drift(&mut tx, part_id).await?;
        tx.commit().await?;
        Ok(())
    }
}

/// A fit's detail from its summary and a [`DETAIL_SELECT`] row (of either backend).
pub(crate) fn detail_from_row<'r, R>(row: &'r R, summary: FitSummary) -> StoreResult<FitDetail>
where
    R: Row,
    &'r str: sqlx::ColumnIndex<R>,
    String: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
    i64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
    f64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
{
    let parse = |col: &'r str| -> StoreResult<Option<serde_json::Value>> {
        let text: Option<String> = row.try_get(col)?;
        Ok(text.map(|t| serde_json::from_str(&t)).transpose()?)
    };
    let verdict_checks = match row.try_get::<Option<String>, _>("verdict_json")? {
        Some(t) => serde_json::from_str(&t)?,
        None => Vec::new(),
    };
    let drift = match row.try_get::<Option<String>, _>("drift_json")? {
        Some(t) => Some(serde_json::from_str(&t)?),
        None => None,
    };
    let report = parse("report_json")?;
    let parsed: Option<FitReport> = report
        .as_ref()
        .map(|v| serde_json::from_value(v.clone()))
        .transpose()?;
    let verdict_note = parsed
        .as_ref()
        .filter(|_| !verdict_checks.is_empty())
        .and_then(crate::registry::verdict::withheld_note);
    let quality_summary = parsed.as_ref().map(|r| r.assessment.summary.clone());
    Ok(FitDetail {
        summary,
        report,
        verdict_checks,
        verdict_note,
        quality_summary,
        drift,
        options: parse("options_json")?.unwrap_or(serde_json::Value::Null),
        method: row.try_get("method")?,
        z0_ohm: row.try_get("z0_ohm")?,
        dcr_ohm: row.try_get("dcr_ohm")?,
        temperature_c: row.try_get("temperature_c")?,
        operator: row.try_get("operator")?,
        file_name: row.try_get("file_name")?,
        sha256: row.try_get("sha256")?,
        engine_version: row.try_get("engine_version")?,
        attempts: row.try_get("attempts")?,
    })
}

/// What the detail reads besides the summary (one bound parameter: the fit id). The attempts come
/// from the job row while it exists, from the fit once a finished job's row was pruned (0012).
pub(crate) const DETAIL_SELECT: &str = "SELECT f.report_json, f.verdict_json, f.drift_json, \
    f.options_json, f.engine_version, s.method, s.z0_ohm, s.dcr_ohm, s.temperature_c, s.operator, \
    s.file_name, s.sha256, COALESCE(j.attempts, f.attempts) AS attempts FROM fits f \
    JOIN sweeps s ON s.sweep_id = f.sweep_id LEFT JOIN jobs j ON j.fit_id = f.fit_id \
    WHERE f.fit_id = ";

/// The refusal of an action the fit's status does not allow.
pub(crate) fn not_now(fit_id: i64, status: &str, allowed: &str, done: &str) -> StoreError {
    StoreError::Conflict(format!(
        "fit {fit_id} is {status}: only {allowed} fits can be {done}"
    ))
}

/// The answer for a fit id no fit has.
/// The query of one page of fits, newest first, as `filter` asks (either backend: the SQL is common
/// to both); one row more than the page, which says whether another page follows.
pub(crate) fn list_query<DB>(filter: &FitFilter) -> QueryBuilder<DB>
where
    DB: sqlx::Database,
    &'static str: for<'t> sqlx::Encode<'t, DB> + sqlx::Type<DB>,
    String: for<'t> sqlx::Encode<'t, DB> + sqlx::Type<DB>,
    i64: for<'t> sqlx::Encode<'t, DB> + sqlx::Type<DB>,
{
    let mut q = QueryBuilder::new(SUMMARY_SELECT);
    q.push(" WHERE 1 = 1");
    if let Some(s) = filter.status {
        q.push(" AND f.status = ").push_bind(s.as_str());
    }
    if let Some(k) = filter.error_kind {
        q.push(" AND f.error_kind = ").push_bind(k.as_str());
    }
    if let Some(p) = &filter.part_number {
        q.push(" AND p.part_number = ")
            .push_bind(p.as_str().to_owned());
    }
    if let Some(l) = &filter.lot {
        q.push(" AND l.lot = ").push_bind(l.as_str().to_owned());
    }
    if let Some(t) = filter.since_ms {
        q.push(" AND f.created_at_ms >= ").push_bind(t);
    }
    if let Some(c) = filter.before_fit_id {
        q.push(" AND f.fit_id < ").push_bind(c);
    }
    q.push(" ORDER BY f.fit_id DESC LIMIT ")
        .push_bind(filter.limit + 1);
    q
}

/// A page of at most `limit` fits from the rows of [`list_query`], with the cursor of the next page
/// when there was one row more.
pub(crate) fn fit_page(mut items: Vec<FitSummary>, limit: i64) -> FitPage {
    let next_cursor = if items.len() as i64 > limit {
        items.truncate(limit as usize);
        items.last().map(|f| f.fit_id.to_string())
    } else {
        None
    };
    FitPage { items, next_cursor }
}

pub(crate) fn no_fit(fit_id: i64) -> StoreError {
    StoreError::NotFound(format!("no fit {fit_id}"))
}

/// The audit reason of a refit: its revision, the fit it came from and its family.
pub(crate) fn refit_reason(revision: i64, fit_id: i64, options_json: &str) -> String {
    format!(
        "revision {revision} of the sweep fitted by fit {fit_id} ({} family)",
        serde_json::from_str::<serde_json::Value>(options_json)
            .ok()
            .and_then(|o| o["family"].as_str().map(str::to_owned))
            .unwrap_or_else(|| "lumped".into())
    )
}

/// The audit reason of an approval superseded by the approval of `fit_id`.
pub(crate) fn superseded_reason(fit_id: i64) -> String {
    format!("fit {fit_id} approved as the new baseline")
}

/// What an approval records: its audit action and reason.
pub(crate) struct Approval {
    pub action: &'static str,
    pub recorded: Option<String>,
}

/// Whether a succeeded fit may be approved, from its (approval, verdict, quality) and the part's
/// baseline; the refusal, or what the approval records.
pub(crate) fn approval_decision(
    fit_id: i64,
    (approval, verdict, quality, baseline): (Option<&str>, Option<&str>, Option<&str>, Option<i64>),
    reason: Option<&str>,
    overriding: bool,
) -> StoreResult<Approval> {
    if approval == Some("approved") && baseline == Some(fit_id) {
        return Err(StoreError::Conflict(format!(
            "fit {fit_id} is already the part's approved baseline"
        )));
    }
    let concern = if quality == Some("poor") {
        Some("its model does not describe the data within their uncertainty (quality poor)")
    } else if verdict == Some("fail") {
        Some("it fails the part's limits")
    } else {
        None
    };
    let action = match (concern, overriding) {
        (Some(why), false) => {
            return Err(StoreError::Conflict(format!(
                "fit {fit_id} cannot be approved as it stands: {why}; approving it anyway needs \
                 `override: true` and a reason"
            )));
        }
        (Some(_), true) if reason.is_none() => {
            return Err(StoreError::Invalid(
                "an approval with `override: true` needs a reason".into(),
            ));
        }
        (Some(_), true) => "fit-approved-override",
        (None, _) => "fit-approved",
    };
    let recorded = match concern {
        Some(why) => Some(format!(
            "{} (approved although {why})",
            reason.unwrap_or_default()
        )),
        None => reason.map(str::to_owned),
    };
    Ok(Approval { action, recorded })
}

/// The stored drift of the succeeded fit `fit_id` (its report `json`) against the part's baseline:
/// none for the baseline itself or when the part has none.
pub(crate) fn drift_of(
    baseline: Option<&(i64, FitReport)>,
    fit_id: i64,
    json: &str,
) -> StoreResult<(Option<String>, Option<f64>)> {
    Ok(match baseline {
        Some((bid, b)) if *bid != fit_id => {
            let report: FitReport = serde_json::from_str(json)?;
            let d = drift::drift(*bid, b, &report);
            (Some(serde_json::to_string(&d)?), d.max_sigma())
        }
        _ => (None, None),
    })
}

async fn status_of(tx: &mut SqliteConnection, fit_id: i64) -> StoreResult<(String, i64)> {
    sqlx::query_as("SELECT status, part_id FROM fits WHERE fit_id = ?")
        .bind(fit_id)
        .fetch_optional(tx)
        .await?
        .ok_or_else(|| no_fit(fit_id))
}

/// The baseline's report of a part, if it has one.
pub(crate) async fn baseline_report(
    tx: &mut SqliteConnection,
    part_id: i64,
) -> StoreResult<Option<(i64, FitReport)>> {
    let row: Option<(i64, String)> = sqlx::query_as(
        "SELECT f.fit_id, f.report_json FROM parts p JOIN fits f ON f.fit_id = p.baseline_fit_id \
         WHERE p.part_id = ? AND f.report_json IS NOT NULL",
    )
    .bind(part_id)
    .fetch_optional(tx)
    .await?;
    Ok(match row {
        Some((id, json)) => Some((id, serde_json::from_str(&json)?)),
        None => None,
    })
}

/// Recomputes the stored drift of every succeeded fit of a part against its current baseline.
async fn refresh_drift(tx: &mut SqliteConnection, part_id: i64) -> StoreResult<()> {
    let baseline = baseline_report(tx, part_id).await?;
    let fits: Vec<(i64, String)> = sqlx::query_as(
        "SELECT fit_id, report_json FROM fits WHERE part_id = ? AND status = 'succeeded'",
    )
    .bind(part_id)
    .fetch_all(&mut *tx)
    .await?;
    for (fit_id, json) in fits {
        let (json_out, max) = drift_of(baseline.as_ref(), fit_id, &json)?;
        sqlx::query("UPDATE fits SET drift_json = ?, drift_max_sigma = ? WHERE fit_id = ?")
            .bind(json_out)
            .bind(max)
            .bind(fit_id)
            .execute(&mut *tx)
            .await?;
    }
    Ok(())
}

impl Store {
    /// Every succeeded fit of a part with its lot, the lot's place (its first upload), the upload time
    /// and whether it counts as approved (approved now, or approved earlier and superseded, and not
    /// rejected since): what [`crate::registry::trend`] draws. At most 2 000, the newest.
    pub async fn lot_fits(&self, part_id: i64) -> StoreResult<Vec<crate::registry::trend::LotFit>> {
        let rows = sqlx::query(
            "SELECT f.fit_id, l.lot, \
             (SELECT MIN(s2.sweep_id) FROM sweeps s2 WHERE s2.lot_id = f.lot_id) AS lot_order, \
             s.uploaded_at_ms, f.report_json, \
             CASE WHEN f.approval = 'approved' THEN 1 \
                  WHEN f.approval IS NULL AND EXISTS (SELECT 1 FROM audit a WHERE a.fit_id = f.fit_id \
                      AND a.action IN ('fit-approved', 'fit-approved-override')) THEN 1 \
                  ELSE 0 END AS approved \
             FROM fits f JOIN lots l ON l.lot_id = f.lot_id JOIN sweeps s ON s.sweep_id = f.sweep_id \
             WHERE f.part_id = ? AND f.status = 'succeeded' AND f.report_json IS NOT NULL \
             ORDER BY f.fit_id DESC LIMIT 2000",
        )
        .bind(part_id)
        .fetch_all(&self.reader)
        .await?;
        rows.iter()
            .map(|row| {
                let json: String = row.try_get("report_json")?;
                Ok(crate::registry::trend::LotFit {
                    fit_id: row.try_get("fit_id")?,
                    lot: row.try_get("lot")?,
                    lot_order: row.try_get("lot_order")?,
                    approved: row.try_get::<i64, _>("approved")? == 1,
                    uploaded_at: rfc3339(row.try_get("uploaded_at_ms")?),
                    report: serde_json::from_str(&json)?,
                })
            })
            .collect()
    }

    /// What the printed report of a fit states besides its detail: the sweep's point count and upload
    /// (when, by whom), and who approved the fit and when (the newest approval in the audit trail).
    pub async fn fit_provenance(&self, fit_id: i64) -> StoreResult<FitProvenance> {
        let row = sqlx::query(
            "SELECT s.points, s.uploaded_at_ms, s.uploaded_by, p.description, \
             (SELECT a.actor FROM audit a WHERE a.fit_id = f.fit_id AND a.action IN \
                ('fit-approved', 'fit-approved-override') ORDER BY a.audit_id DESC LIMIT 1) AS approved_by, \
             (SELECT a.at_ms FROM audit a WHERE a.fit_id = f.fit_id AND a.action IN \
                ('fit-approved', 'fit-approved-override') ORDER BY a.audit_id DESC LIMIT 1) AS approved_at_ms, \
             (SELECT a.reason FROM audit a WHERE a.fit_id = f.fit_id AND a.action IN \
                ('fit-approved', 'fit-approved-override') ORDER BY a.audit_id DESC LIMIT 1) AS approved_reason \
             FROM fits f JOIN sweeps s ON s.sweep_id = f.sweep_id JOIN parts p ON p.part_id = f.part_id \
             WHERE f.fit_id = ?",
        )
        .bind(fit_id)
        .fetch_optional(&self.reader)
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

/// See [`Store::fit_provenance`].
#[derive(Debug, Clone)]
pub struct FitProvenance {
    pub points: i64,
    pub uploaded_at: String,
    pub uploaded_by: String,
    pub part_description: String,
    pub approved_by: Option<String>,
    pub approved_at: Option<String>,
    pub approved_reason: Option<String>,
}
