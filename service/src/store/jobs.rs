//! The durable job table. A worker claims the oldest runnable job (queued, or running with an expired
//! lease) with one short `UPDATE … RETURNING`, renews its lease while the fit runs, and writes the
//! result only while its claim token still matches: a job whose worker died is run again, and a
//! result is written at most once (the `fits_report_written_once` trigger makes sure of it).

use super::{Store, StoreResult, audit, now_ms};
use crate::fit::FitReport;
use crate::registry::{drift, figures::StoredFigures, verdict};
use rand::RngCore;
use sqlx::SqliteConnection;
use std::time::Duration;

/// The actor the audit trail names for what workers do.
pub const WORKER_ACTOR: &str = "worker";

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Claim {
    pub fit_id: i64,
    pub token: String,
    /// 1 on the first run, more after a crash or restart re-ran the job.
    pub attempt: i64,
}

/// What a lease renewal learned.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Renewal {
    Held {
        cancel_requested: bool,
    },
    /// Another worker holds the job now (this one was too slow to renew): stop and write nothing.
    Lost,
}

fn new_token() -> String {
    let mut raw = [0u8; 16];
    rand::rng().fill_bytes(&mut raw);
    hex::encode(raw)
}

fn ms(d: Duration) -> i64 {
    d.as_millis().min(i64::MAX as u128) as i64
}

impl Store {
    /// Claims the oldest runnable job, first settling expired jobs that were cancelled or ran out of
    /// attempts.
    pub async fn claim_job(
        &self,
        lease: Duration,
        max_attempts: i64,
    ) -> StoreResult<Option<Claim>> {
        let now = now_ms();
        let mut tx = self.write().await?;
        let cancelled: Vec<i64> = sqlx::query_scalar(
            "UPDATE jobs SET state = 'done', claim_token = NULL, lease_until_ms = NULL \
             WHERE state = 'running' AND lease_until_ms < ? AND cancel_requested = 1 RETURNING fit_id",
        )
        .bind(now)
        .fetch_all(&mut *tx)
        .await?;
        for fit_id in cancelled {
            settle(&mut tx, fit_id, "cancelled", None, now).await?;
        }
        let exhausted: Vec<(i64, i64)> = sqlx::query_as(
            "UPDATE jobs SET state = 'done', claim_token = NULL, lease_until_ms = NULL \
             WHERE state = 'running' AND lease_until_ms < ? AND attempts >= ? \
             RETURNING fit_id, attempts",
        )
        .bind(now)
        .bind(max_attempts)
        .fetch_all(&mut *tx)
        .await?;
        for (fit_id, attempts) in exhausted {
            let error = format!(
                "the fit was started {attempts} times and never finished (the worker stopped each time); \
                 retry it to run it again"
            );
            settle(&mut tx, fit_id, "failed", Some(&error), now).await?;
        }
        let token = new_token();
        let claimed: Option<(i64, i64)> = sqlx::query_as(
            "UPDATE jobs SET state = 'running', claim_token = ?, lease_until_ms = ?, \
             attempts = attempts + 1 WHERE fit_id = (SELECT fit_id FROM jobs \
             WHERE state = 'queued' OR (state = 'running' AND lease_until_ms < ?) \
             ORDER BY fit_id LIMIT 1) RETURNING fit_id, attempts",
        )
        .bind(&token)
        .bind(now + ms(lease))
        .bind(now)
        .fetch_optional(&mut *tx)
        .await?;
        let claim = match claimed {
            Some((fit_id, attempt)) => {
                sqlx::query(
                    "UPDATE fits SET status = 'running', progress = 0, started_at_ms = ? WHERE fit_id = ?",
                )
                .bind(now)
                .bind(fit_id)
                .execute(&mut *tx)
                .await?;
                Some(Claim {
                    fit_id,
                    token,
                    attempt,
                })
            }
            None => None,
        };
        tx.commit().await?;
        Ok(claim)
    }

    /// Extends the lease and stores the progress; tells whether a cancel was asked for.
    pub async fn renew_lease(
        &self,
        claim: &Claim,
        lease: Duration,
        progress: f64,
    ) -> StoreResult<Renewal> {
        let mut tx = self.write().await?;
        let held: Option<i64> = sqlx::query_scalar(
            "UPDATE jobs SET lease_until_ms = ? WHERE fit_id = ? AND claim_token = ? \
             AND state = 'running' RETURNING cancel_requested",
        )
        .bind(now_ms() + ms(lease))
        .bind(claim.fit_id)
        .bind(&claim.token)
        .fetch_optional(&mut *tx)
        .await?;
        let Some(cancel) = held else {
            return Ok(Renewal::Lost);
        };
        sqlx::query("UPDATE fits SET progress = ? WHERE fit_id = ?")
            .bind(progress.clamp(0.0, 1.0))
            .bind(claim.fit_id)
            .execute(&mut *tx)
            .await?;
        tx.commit().await?;
        Ok(Renewal::Held {
            cancel_requested: cancel != 0,
        })
    }

    /// Writes a succeeded fit with its figures, verdict and drift, if the claim still holds.
    /// Returns false (and writes nothing) when it does not.
    pub async fn complete_succeeded(
        &self,
        claim: &Claim,
        report: &FitReport,
        figures: &StoredFigures,
    ) -> StoreResult<bool> {
        let now = now_ms();
        let mut tx = self.write().await?;
        if !release_claim(&mut tx, claim).await? {
            return Ok(false);
        }
        let part_id: i64 = sqlx::query_scalar("SELECT part_id FROM fits WHERE fit_id = ?")
            .bind(claim.fit_id)
            .fetch_one(&mut *tx)
            .await?;
        let limits_row = sqlx::query(sqlx::AssertSqlSafe(format!(
            "SELECT {} FROM parts WHERE part_id = ?",
            super::parts::LIMIT_COLUMNS
        )))
        .bind(part_id)
        .fetch_one(&mut *tx)
        .await?;
        let limits = super::parts::limits_from_row(&limits_row)?;
        let checks = verdict::checks(&limits, report);
        let drift = super::fits::baseline_report(&mut tx, part_id)
            .await?
            .map(|(bid, b)| drift::drift(bid, &b, report));
        sqlx::query(
            "UPDATE fits SET status = 'succeeded', progress = 1, error = NULL, engine_version = ?, \
             report_json = ?, finished_at_ms = ?, srf_hz = ?, srf_above_hz = ?, l0_h = ?, \
             rdc_ohm = ?, band_min_hz = ?, band_max_hz = ?, verdict = ?, verdict_json = ?, \
             drift_json = ?, drift_max_sigma = ? WHERE fit_id = ?",
        )
        .bind(&report.engine_version)
        .bind(serde_json::to_string(report)?)
        .bind(now)
        .bind(figures.srf_hz)
        .bind(figures.srf_above_hz)
        .bind(figures.l0_h)
        .bind(figures.rdc_ohm)
        .bind(figures.band_min_hz)
        .bind(figures.band_max_hz)
        .bind(verdict::overall(&checks))
        .bind(serde_json::to_string(&checks)?)
        .bind(drift.as_ref().map(serde_json::to_string).transpose()?)
        .bind(drift.as_ref().and_then(|d| d.max_sigma()))
        .bind(claim.fit_id)
        .execute(&mut *tx)
        .await?;
        for (kind, list) in [
            ("series", &figures.series_resonances_hz),
            ("parallel", &figures.parallel_resonances_hz),
        ] {
            for f in list.iter().filter(|f| f.is_finite()) {
                sqlx::query(
                    "INSERT INTO fit_resonances (fit_id, kind, frequency_hz) VALUES (?, ?, ?)",
                )
                .bind(claim.fit_id)
                .bind(kind)
                .bind(f)
                .execute(&mut *tx)
                .await?;
            }
        }
        for p in &figures.grid {
            sqlx::query("INSERT INTO fit_grid (fit_id, k, z_mag_ohm, l_eff_h) VALUES (?, ?, ?, ?)")
                .bind(claim.fit_id)
                .bind(p.k)
                .bind(p.z_mag_ohm)
                .bind(p.l_eff_h)
                .execute(&mut *tx)
                .await?;
        }
        sqlx::query(
            "UPDATE parts SET latest_fit_id = ? WHERE part_id = ? \
             AND (latest_fit_id IS NULL OR latest_fit_id < ?)",
        )
        .bind(claim.fit_id)
        .bind(part_id)
        .bind(claim.fit_id)
        .execute(&mut *tx)
        .await?;
        audit(
            &mut tx,
            WORKER_ACTOR,
            "fit-succeeded",
            Some(part_id),
            Some(claim.fit_id),
            None,
        )
        .await?;
        tx.commit().await?;
        Ok(true)
    }

    /// Writes a failed or cancelled outcome, if the claim still holds.
    pub async fn complete_unsuccessful(
        &self,
        claim: &Claim,
        cancelled: bool,
        error: &str,
    ) -> StoreResult<bool> {
        let mut tx = self.write().await?;
        if !release_claim(&mut tx, claim).await? {
            return Ok(false);
        }
        let status = if cancelled { "cancelled" } else { "failed" };
        settle(&mut tx, claim.fit_id, status, Some(error), now_ms()).await?;
        tx.commit().await?;
        Ok(true)
    }

    /// Gives a claimed job back to the queue without counting the attempt (graceful shutdown).
    pub async fn release_job(&self, claim: &Claim) -> StoreResult<bool> {
        let mut tx = self.write().await?;
        let done = sqlx::query(
            "UPDATE jobs SET state = 'queued', claim_token = NULL, lease_until_ms = NULL, \
             attempts = MAX(attempts - 1, 0) WHERE fit_id = ? AND claim_token = ? AND state = 'running'",
        )
        .bind(claim.fit_id)
        .bind(&claim.token)
        .execute(&mut *tx)
        .await?
        .rows_affected()
            == 1;
        if done {
            sqlx::query(
                "UPDATE fits SET status = 'queued', progress = 0, started_at_ms = NULL WHERE fit_id = ?",
            )
            .bind(claim.fit_id)
            .execute(&mut *tx)
            .await?;
        }
        tx.commit().await?;
        Ok(done)
    }
}

/// Marks the job done if `claim` still holds it.
async fn release_claim(tx: &mut SqliteConnection, claim: &Claim) -> StoreResult<bool> {
    Ok(sqlx::query(
        "UPDATE jobs SET state = 'done', claim_token = NULL, lease_until_ms = NULL \
         WHERE fit_id = ? AND claim_token = ? AND state = 'running'",
    )
    .bind(claim.fit_id)
    .bind(&claim.token)
    .execute(&mut *tx)
    .await?
    .rows_affected()
        == 1)
}

/// Final status of a fit without a result, with its audit entry.
async fn settle(
    tx: &mut SqliteConnection,
    fit_id: i64,
    status: &str,
    error: Option<&str>,
    now: i64,
) -> StoreResult<()> {
    let part_id: i64 = sqlx::query_scalar(
        "UPDATE fits SET status = ?, error = ?, finished_at_ms = ? WHERE fit_id = ? RETURNING part_id",
    )
    .bind(status)
    .bind(error)
    .bind(now)
    .bind(fit_id)
    .fetch_one(&mut *tx)
    .await?;
    audit(
        tx,
        WORKER_ACTOR,
        &format!("fit-{status}"),
        Some(part_id),
        Some(fit_id),
        error,
    )
    .await
}
