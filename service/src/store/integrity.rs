//! The record's integrity: a hash chain over the audit trail, and stored verdicts checked against the
//! reports and limits they come from.
//!
//! Each audit row's `hash` is the SHA-256 of the canonical JSON array
//! `[prev_hash, audit_id, at_ms, actor, action, part_id, fit_id, reason, result_sha256]`, where
//! `prev_hash` is the previous row's hash (64 zeros for the first) and `result_sha256` the SHA-256 of the
//! fit's stored report at the time of the row (for rows about a fit that had a result). Changing,
//! inserting or removing a row breaks the chain from there on; changing an approved result breaks its
//! `result_sha256`. Triggers refuse such writes through SQL (including `INSERT OR REPLACE`); the chain
//! is what shows it when someone goes around them. The chain has no secret: someone who rewrites the
//! whole database can recompute it, so the head hash is logged at start and shown by /readyz for
//! keeping elsewhere.

use super::{Store, StoreResult, now_ms, sha256_hex};
use crate::fit::FitReport;
use crate::registry::verdict;
use serde::Serialize;
use sqlx::{Row, SqliteConnection};

/// The `prev_hash` of the first row.
pub const GENESIS: &str = "0000000000000000000000000000000000000000000000000000000000000000";

/// One audit row's content, as hashed.
#[derive(Debug, Clone)]
pub struct AuditRow {
    pub audit_id: i64,
    pub at_ms: i64,
    pub actor: String,
    pub action: String,
    pub part_id: Option<i64>,
    pub fit_id: Option<i64>,
    pub reason: Option<String>,
    pub result_sha256: Option<String>,
}

/// The chained hash of `row` after `prev`.
pub fn row_hash(prev: &str, row: &AuditRow) -> String {
    let canonical = serde_json::json!([
        prev,
        row.audit_id,
        row.at_ms,
        row.actor,
        row.action,
        row.part_id,
        row.fit_id,
        row.reason,
        row.result_sha256
    ]);
    sha256_hex(canonical.to_string().as_bytes())
}

/// The SHA-256 of a fit's stored report, when it has one.
async fn result_sha256(
    conn: &mut SqliteConnection,
    fit_id: Option<i64>,
) -> StoreResult<Option<String>> {
    let Some(id) = fit_id else { return Ok(None) };
    let report: Option<Option<String>> =
        sqlx::query_scalar("SELECT report_json FROM fits WHERE fit_id = ?")
            .bind(id)
            .fetch_optional(&mut *conn)
            .await?;
    Ok(report.flatten().map(|r| sha256_hex(r.as_bytes())))
}

/// Appends one chained audit row inside the caller's write transaction.
pub(crate) async fn append(
    conn: &mut SqliteConnection,
    actor: &str,
    action: &str,
    part_id: Option<i64>,
    fit_id: Option<i64>,
    reason: Option<&str>,
) -> StoreResult<()> {
    let last: Option<(i64, Option<String>)> =
        sqlx::query_as("SELECT audit_id, hash FROM audit ORDER BY audit_id DESC LIMIT 1")
            .fetch_optional(&mut *conn)
            .await?;
    let (last_id, prev) = match last {
        Some((id, Some(h))) => (id, h),
        // Only before the legacy rows were sealed (never once the store is open).
        Some((id, None)) => (
            id,
            seal(&mut *conn).await?.unwrap_or_else(|| GENESIS.into()),
        ),
        None => (0, GENESIS.to_string()),
    };
    let row = AuditRow {
        audit_id: last_id + 1,
        at_ms: now_ms(),
        actor: actor.to_string(),
        action: action.to_string(),
        part_id,
        fit_id,
        reason: reason.map(str::to_owned),
        result_sha256: result_sha256(&mut *conn, fit_id).await?,
    };
    let hash = row_hash(&prev, &row);
    sqlx::query(
        "INSERT INTO audit (audit_id, at_ms, actor, action, part_id, fit_id, reason, result_sha256, \
         prev_hash, hash) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
    )
    .bind(row.audit_id)
    .bind(row.at_ms)
    .bind(&row.actor)
    .bind(&row.action)
    .bind(row.part_id)
    .bind(row.fit_id)
    .bind(&row.reason)
    .bind(&row.result_sha256)
    .bind(&prev)
    .bind(&hash)
    .execute(&mut *conn)
    .await?;
    Ok(())
}

fn row_from(
    r: &sqlx::sqlite::SqliteRow,
) -> Result<(AuditRow, Option<String>, Option<String>), sqlx::Error> {
    Ok((
        AuditRow {
            audit_id: r.try_get("audit_id")?,
            at_ms: r.try_get("at_ms")?,
            actor: r.try_get("actor")?,
            action: r.try_get("action")?,
            part_id: r.try_get("part_id")?,
            fit_id: r.try_get("fit_id")?,
            reason: r.try_get("reason")?,
            result_sha256: r.try_get("result_sha256")?,
        },
        r.try_get("prev_hash")?,
        r.try_get("hash")?,
    ))
}

const ROW_SELECT: &str = "SELECT audit_id, at_ms, actor, action, part_id, fit_id, reason, \
    result_sha256, prev_hash, hash FROM audit";

/// Seals audit rows written before the chain existed (hash NULL), in order; returns the head hash.
pub(crate) async fn seal(conn: &mut SqliteConnection) -> StoreResult<Option<String>> {
    let rows = sqlx::query(sqlx::AssertSqlSafe(format!(
        "{ROW_SELECT} ORDER BY audit_id"
    )))
    .fetch_all(&mut *conn)
    .await?;
    let mut prev = GENESIS.to_string();
    for r in &rows {
        let (mut row, _, hash) = row_from(r)?;
        match hash {
            Some(h) => prev = h,
            None => {
                // A legacy row's result is the fit's report as it is now.
                row.result_sha256 = result_sha256(&mut *conn, row.fit_id).await?;
                let h = row_hash(&prev, &row);
                sqlx::query(
                    "UPDATE audit SET result_sha256 = ?, prev_hash = ?, hash = ? WHERE audit_id = ?",
                )
                .bind(&row.result_sha256)
                .bind(&prev)
                .bind(&h)
                .bind(row.audit_id)
                .execute(&mut *conn)
                .await?;
                prev = h;
            }
        }
    }
    Ok((!rows.is_empty()).then_some(prev))
}

/// What a check of the record found.
#[derive(Debug, Clone, Default, PartialEq, Serialize, utoipa::ToSchema)]
pub struct IntegrityReport {
    pub audit_rows: i64,
    /// The hash of the newest audit row (keep it elsewhere to detect a rewritten database).
    pub head_hash: Option<String>,
    /// Succeeded fits whose stored verdict was checked against their report and the part's limits.
    pub verdicts_checked: i64,
    /// Each problem in words, naming the row or the fit.
    pub problems: Vec<String>,
}

impl IntegrityReport {
    pub fn ok(&self) -> bool {
        self.problems.is_empty()
    }
}

impl Store {
    /// Seals legacy audit rows (run once at open).
    pub(crate) async fn seal_audit(&self) -> StoreResult<Option<String>> {
        let mut tx = self.write().await?;
        let head = seal(&mut tx).await?;
        tx.commit().await?;
        Ok(head)
    }

    /// Checks the audit chain from row `after + 1` on (0: all of it), given the hash of row `after`;
    /// returns the report and the last row checked with its hash.
    pub async fn verify_audit(
        &self,
        after: i64,
        after_hash: Option<&str>,
    ) -> StoreResult<(IntegrityReport, i64, Option<String>)> {
        let mut conn = self.reader.acquire().await?;
        let rows = sqlx::query(sqlx::AssertSqlSafe(format!(
            "{ROW_SELECT} WHERE audit_id > ? ORDER BY audit_id"
        )))
        .bind(after)
        .fetch_all(&mut *conn)
        .await?;
        let mut report = IntegrityReport::default();
        let mut prev = after_hash.unwrap_or(GENESIS).to_string();
        let mut last = (after, after_hash.map(str::to_owned));
        for r in &rows {
            let (row, stored_prev, hash) = row_from(r)?;
            let id = row.audit_id;
            match (&stored_prev, &hash) {
                (Some(p), Some(h)) => {
                    if *p != prev {
                        report.problems.push(format!(
                            "audit row {id} does not follow the row before it (a row was removed, \
                             inserted or changed)"
                        ));
                    }
                    if row_hash(p, &row) != *h {
                        report
                            .problems
                            .push(format!("audit row {id} was changed after it was written"));
                    }
                    prev = h.clone();
                }
                _ => report
                    .problems
                    .push(format!("audit row {id} is not sealed into the chain")),
            }
            if let Some(expected) = &row.result_sha256 {
                let now = result_sha256(&mut conn, row.fit_id).await?;
                if now.as_deref() != Some(expected.as_str()) {
                    report.problems.push(format!(
                        "the result of fit {} changed after audit row {id} recorded it",
                        row.fit_id.unwrap_or_default()
                    ));
                }
            }
            last = (id, hash);
        }
        report.audit_rows = sqlx::query_scalar("SELECT COUNT(*) FROM audit")
            .fetch_one(&mut *conn)
            .await?;
        report.head_hash = last.1.clone();
        Ok((report, last.0, last.1))
    }

    /// The whole check: the audit chain from its first row, and every succeeded fit's stored verdict
    /// against its report and its part's current limits.
    pub async fn verify_integrity(&self) -> StoreResult<IntegrityReport> {
        let (mut report, _, _) = self.verify_audit(0, None).await?;
        let rows = sqlx::query(
            "SELECT f.fit_id, f.report_json, f.verdict, f.verdict_json, p.l_nominal_h, \
             p.l_test_frequency_hz, p.l_tolerance_percent, p.dcr_max_ohm, p.srf_min_hz, p.q_min, \
             p.q_test_frequency_hz, p.z_min_ohm, p.z_band_min_hz, p.z_band_max_hz, \
             p.core_corner_min_hz, p.core_corner_max_hz \
             FROM fits f JOIN parts p ON p.part_id = f.part_id \
             WHERE f.status = 'succeeded' ORDER BY f.fit_id",
        )
        .fetch_all(&self.reader)
        .await?;
        for r in &rows {
            let fit_id: i64 = r.try_get("fit_id")?;
            let Some(json) = r.try_get::<Option<String>, _>("report_json")? else {
                report
                    .problems
                    .push(format!("fit {fit_id} succeeded but has no stored result"));
                continue;
            };
            let parsed: FitReport = match serde_json::from_str(&json) {
                Ok(p) => p,
                Err(e) => {
                    report
                        .problems
                        .push(format!("fit {fit_id}'s stored result does not read: {e}"));
                    continue;
                }
            };
            let limits = super::parts::limits_from_row(r)?;
            let checks = verdict::checks(&limits, &parsed);
            let want = verdict::overall(&checks, &parsed);
            let stored: Option<String> = r.try_get("verdict")?;
            let stored_checks: Option<String> = r.try_get("verdict_json")?;
            let same_checks = stored_checks
                .as_deref()
                .and_then(|t| serde_json::from_str::<Vec<verdict::Check>>(t).ok())
                .is_some_and(|c| c == checks);
            if stored.as_deref() != want || !same_checks {
                report.problems.push(format!(
                    "fit {fit_id}'s stored verdict ({}) is not what its result and the part's \
                     limits give ({})",
                    stored.as_deref().unwrap_or("none"),
                    want.unwrap_or("none")
                ));
            }
            report.verdicts_checked += 1;
        }
        Ok(report)
    }
}
