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
use std::collections::HashMap;

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

/// An audit row with its stored `prev_hash` and `hash`, as [`check_chain`] reads it.
pub(crate) type ChainedRow = (AuditRow, Option<String>, Option<String>);

/// One row of [`ROW_SELECT`] (of either backend).
pub(crate) fn row_from<R>(r: &R) -> Result<ChainedRow, sqlx::Error>
where
    R: Row,
    for<'a> &'a str: sqlx::ColumnIndex<R>,
    for<'a> i64: sqlx::Decode<'a, R::Database> + sqlx::Type<R::Database>,
    for<'a> String: sqlx::Decode<'a, R::Database> + sqlx::Type<R::Database>,
{
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

pub(crate) const ROW_SELECT: &str = "SELECT audit_id, at_ms, actor, action, part_id, fit_id, reason, \
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
        .await?
        .iter()
        .map(row_from)
        .collect::<Result<Vec<_>, _>>()?;
        let mut results = HashMap::new();
        for id in recorded_fits(&rows) {
            results.insert(id, result_sha256(&mut conn, Some(id)).await?);
        }
        let audit_rows: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM audit")
            .fetch_one(&mut *conn)
            .await?;
        Ok(check_chain(&rows, after, after_hash, &results, audit_rows))
    }

    /// The whole check: the audit chain from its first row, and every succeeded fit's stored verdict
    /// against its report and its part's current limits.
    pub async fn verify_integrity(&self) -> StoreResult<IntegrityReport> {
        let (mut report, _, _) = self.verify_audit(0, None).await?;
        let rows = sqlx::query(VERDICT_SELECT).fetch_all(&self.reader).await?;
        for r in &rows {
            check_verdict(r, &mut report)?;
        }
        Ok(report)
    }
}

/// Every succeeded fit with its stored verdict and its part's limits, for [`check_verdict`] (the same
/// text on both backends).
pub(crate) const VERDICT_SELECT: &str = "SELECT f.fit_id, f.report_json, f.verdict, f.verdict_json, \
     p.l_nominal_h, p.l_test_frequency_hz, p.l_tolerance_percent, p.dcr_max_ohm, p.srf_min_hz, \
     p.q_min, p.q_test_frequency_hz, p.z_min_ohm, p.z_band_min_hz, p.z_band_max_hz, \
     p.core_corner_min_hz, p.core_corner_max_hz \
     FROM fits f JOIN parts p ON p.part_id = f.part_id \
     WHERE f.status = 'succeeded' ORDER BY f.fit_id";

/// The fits whose result an audit row recorded: their results are looked up now for [`check_chain`].
pub(crate) fn recorded_fits(rows: &[ChainedRow]) -> Vec<i64> {
    let mut ids: Vec<i64> = rows
        .iter()
        .filter(|(row, _, _)| row.result_sha256.is_some())
        .filter_map(|(row, _, _)| row.fit_id)
        .collect();
    ids.sort_unstable();
    ids.dedup();
    ids
}

/// Checks `rows` (audit ids after `after`, in order) as a continuation of the chain whose row `after`
/// hashed to `after_hash`, against the fits' results now (`results`: fit id → the SHA-256 of its
/// stored report, for [`recorded_fits`]); returns the report and the last row checked with its hash.
pub(crate) fn check_chain(
    rows: &[ChainedRow],
    after: i64,
    after_hash: Option<&str>,
    results: &HashMap<i64, Option<String>>,
    audit_rows: i64,
) -> (IntegrityReport, i64, Option<String>) {
    let mut report = IntegrityReport::default();
    let mut prev = after_hash.unwrap_or(GENESIS).to_string();
    let mut last = (after, after_hash.map(str::to_owned));
    for (row, stored_prev, hash) in rows {
        let id = row.audit_id;
        match (stored_prev, hash) {
            (Some(p), Some(h)) => {
                if *p != prev {
                    report.problems.push(format!(
                        "audit row {id} does not follow the row before it (a row was removed, \
                         inserted or changed)"
                    ));
                }
                if row_hash(p, row) != *h {
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
            let now = row.fit_id.and_then(|f| results.get(&f).cloned().flatten());
            if now.as_deref() != Some(expected.as_str()) {
                report.problems.push(format!(
                    "the result of fit {} changed after audit row {id} recorded it",
                    row.fit_id.unwrap_or_default()
                ));
            }
        }
        last = (id, hash.clone());
    }
    report.audit_rows = audit_rows;
    report.head_hash = last.1.clone();
    (report, last.0, last.1)
}

/// Checks one row of [`VERDICT_SELECT`] (of either backend): the stored verdict is what the stored
/// result and the part's current limits give. Adds what it finds to `report`.
pub(crate) fn check_verdict<R>(r: &R, report: &mut IntegrityReport) -> Result<(), sqlx::Error>
where
    R: Row,
    for<'a> &'a str: sqlx::ColumnIndex<R>,
    for<'a> i64: sqlx::Decode<'a, R::Database> + sqlx::Type<R::Database>,
    for<'a> f64: sqlx::Decode<'a, R::Database> + sqlx::Type<R::Database>,
    for<'a> String: sqlx::Decode<'a, R::Database> + sqlx::Type<R::Database>,
{
    let fit_id: i64 = r.try_get("fit_id")?;
    let Some(json) = r.try_get::<Option<String>, _>("report_json")? else {
        report
            .problems
            .push(format!("fit {fit_id} succeeded but has no stored result"));
        return Ok(());
    };
    let parsed: FitReport = match serde_json::from_str(&json) {
        Ok(p) => p,
        Err(e) => {
            report
                .problems
                .push(format!("fit {fit_id}'s stored result does not read: {e}"));
            return Ok(());
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
    Ok(())
}

/// What /readyz's audit check has verified so far: the last row checked, its hash, and whether the
/// chain held up to there. It starts at the first row, unbroken; each check continues from where the
/// last one ended. Once broken it stays broken until the service restarts and the full check passes.
#[derive(Debug, Clone)]
pub(crate) struct ChainWatch(std::sync::Arc<tokio::sync::Mutex<(i64, Option<String>, bool)>>);

impl Default for ChainWatch {
    fn default() -> ChainWatch {
        ChainWatch(std::sync::Arc::new(tokio::sync::Mutex::new((
            0, None, true,
        ))))
    }
}

impl ChainWatch {
    /// Continues the check with `verify(after, after_hash)` (the store's [`Store::verify_audit`]);
    /// answers whether the chain holds, and the head hash.
    pub(crate) async fn advance<F, Fut>(&self, verify: F) -> (bool, Option<String>)
    where
        F: FnOnce(i64, Option<String>) -> Fut,
        Fut: std::future::Future<Output = StoreResult<(IntegrityReport, i64, Option<String>)>>,
    {
        let mut state = self.0.lock().await;
        if !state.2 {
            return (false, state.1.clone());
        }
        match verify(state.0, state.1.clone()).await {
            Ok((report, last, head)) => {
                if !report.ok() {
                    tracing::error!(problems = ?report.problems, "the audit trail's hash chain is broken");
                }
                *state = (last, head, report.ok());
            }
            Err(e) => {
                tracing::warn!(error = %e, "cannot read the audit trail");
                return (false, state.1.clone());
            }
        }
        (state.2, state.1.clone())
    }

    /// The full check at start: logs what it found and continues from there.
    pub(crate) async fn start(&self, checked: (IntegrityReport, i64, Option<String>)) {
        let (report, last, head) = checked;
        if report.ok() {
            tracing::info!(
                audit_rows = report.audit_rows,
                head_hash = head.as_deref().unwrap_or("none"),
                "the audit trail's hash chain is intact"
            );
        } else {
            tracing::error!(problems = ?report.problems, "the audit trail's hash chain is broken");
        }
        *self.0.lock().await = (last, head, report.ok());
    }
}
