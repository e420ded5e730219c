//! The durable job table. A worker claims the oldest runnable job (queued, or running with an expired
//! lease) with one short `UPDATE … RETURNING`, renews its lease while the fit runs, and writes the
//! result only while its claim token still matches: a job whose worker died is run again, and a
//! result is written at most once (the `fits_report_written_once` trigger makes sure of it).

use super::{Store, StoreResult, audit, now_ms};
use crate::fit::FitReport;
use crate::registry::assessment::{Assessment, Basis, judge};
use crate::registry::wire::FailureKind;
use sqlx::{Row, SqliteConnection};
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
        Ok(self.claim_jobs(lease, max_attempts, 1).await?.pop())
    }

    /// Claims up to `n` runnable jobs, oldest first, in one transaction (a pool with `n` idle
    /// workers fills them with one commit).
    pub async fn claim_jobs(
        &self,
        lease: Duration,
        max_attempts: i64,
        n: usize,
    ) -> StoreResult<Vec<Claim>> {
        self.batch
            .submit_priority(move |conn| Box::pin(claim_in(conn, lease, max_attempts, n)))
            .await
    }

    /// Shows a claimed fit as running, when its worker starts the engine (a pool claims a few jobs
    /// ahead of its free workers). The write is queued at once and needs no waiting for: the
    /// outcome, queued later, is written after it. The answer tells whether the claim still held.
    pub fn mark_started(
        &self,
        claim: &Claim,
    ) -> impl std::future::Future<Output = StoreResult<bool>> + use<> {
        let claim = claim.clone();
        self.batch.enqueue_priority(move |conn| {
            Box::pin(async move {
                let started = sqlx::query(
                    "UPDATE fits SET status = 'running', progress = 0, started_at_ms = ? \
                     WHERE fit_id = ? AND EXISTS (SELECT 1 FROM jobs WHERE fit_id = ? \
                     AND claim_token = ? AND state = 'running')",
                )
                .bind(now_ms())
                .bind(claim.fit_id)
                .bind(claim.fit_id)
                .bind(&claim.token)
                .execute(&mut *conn)
                .await?
                .rows_affected();
                Ok(started == 1)
            })
        })
    }

    /// Extends the lease and stores the progress; tells whether a cancel was asked for.
    pub async fn renew_lease(
        &self,
        claim: &Claim,
        lease: Duration,
        progress: f64,
    ) -> StoreResult<Renewal> {
        let claim = claim.clone();
        self.batch
            .submit_priority(move |conn| {
                Box::pin(async move {
                    let held: Option<i64> = sqlx::query_scalar(
                        "UPDATE jobs SET lease_until_ms = ? WHERE fit_id = ? AND claim_token = ? \
                         AND state = 'running' RETURNING cancel_requested",
                    )
                    .bind(now_ms() + ms(lease))
                    .bind(claim.fit_id)
                    .bind(&claim.token)
                    .fetch_optional(&mut *conn)
                    .await?;
                    let Some(cancel) = held else {
                        return Ok(Renewal::Lost);
                    };
                    sqlx::query("UPDATE fits SET progress = ? WHERE fit_id = ?")
                        .bind(progress.clamp(0.0, 1.0))
                        .bind(claim.fit_id)
                        .execute(&mut *conn)
                        .await?;
                    Ok(Renewal::Held {
                        cancel_requested: cancel != 0,
                    })
                })
            })
            .await
    }

    /// What a succeeded fit of `fit_id` will be judged against: its part's limits and approved
    /// baseline (with the baseline's stored report). Read without the writer, before the result is
    /// written; [`Store::complete_succeeded`] checks it still holds.
    pub async fn assessment_basis(&self, fit_id: i64) -> StoreResult<(Basis, Option<String>)> {
        // One statement: the basis with the baseline's report beside it.
        let row = sqlx::query(sqlx::AssertSqlSafe(format!(
            "SELECT part_id, baseline_fit_id, {}, (SELECT b.report_json FROM fits b \
             WHERE b.fit_id = parts.baseline_fit_id) AS baseline_report_json FROM parts \
             WHERE part_id = (SELECT part_id FROM fits WHERE fit_id = ?)",
            super::parts::LIMIT_COLUMNS
        )))
        .bind(fit_id)
        .fetch_one(&self.reader)
        .await?;
        let (_, basis) = basis_from_row(&row)?;
        let baseline_json: Option<String> = row.try_get("baseline_report_json")?;
        Ok((basis, baseline_json))
    }

    /// Writes a succeeded fit with its figures, verdict and drift, if the claim still holds.
    /// Returns false (and writes nothing) when it does not. The assessment was computed before the
    /// writer was taken; when the part's limits or baseline changed since, the verdict and drift are
    /// judged again here against the current ones.
    pub async fn complete_succeeded(
        &self,
        claim: &Claim,
        report: FitReport,
        assessment: Assessment,
    ) -> StoreResult<bool> {
        let claim = claim.clone();
        self.batch
            .submit_priority(move |conn| {
                Box::pin(
                    async move { complete_succeeded_in(conn, &claim, &report, &assessment).await },
                )
            })
            .await
    }

    /// Writes a failed or cancelled outcome with its kind, if the claim still holds.
    pub async fn complete_unsuccessful(
        &self,
        claim: &Claim,
        cancelled: bool,
        kind: FailureKind,
        error: &str,
    ) -> StoreResult<bool> {
        let (claim, error) = (claim.clone(), error.to_string());
        self.batch
            .submit_priority(move |conn| {
                Box::pin(async move {
                    if !release_claim(conn, &claim).await? {
                        return Ok(false);
                    }
                    let status = if cancelled { "cancelled" } else { "failed" };
                    settle(conn, claim.fit_id, status, kind, Some(&error), now_ms()).await?;
                    Ok(true)
                })
            })
            .await
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

    /// Deletes the job rows of up to `limit` fits that finished (succeeded, failed or cancelled)
    /// before `finished_before_ms`, keeping each job's attempts on its fit (0012); how many rows were
    /// deleted. A retry of such a fit makes its job row again.
    pub async fn prune_finished_jobs(
        &self,
        finished_before_ms: i64,
        limit: i64,
    ) -> StoreResult<u64> {
        const FINISHED: &str = "SELECT j.fit_id FROM jobs j JOIN fits f ON f.fit_id = j.fit_id \
            WHERE j.state = 'done' AND f.status IN ('succeeded', 'failed', 'cancelled') \
            AND f.finished_at_ms < ? ORDER BY j.fit_id LIMIT ?";
        let mut tx = self.write().await?;
        sqlx::query(sqlx::AssertSqlSafe(format!(
            "UPDATE fits SET attempts = (SELECT j.attempts FROM jobs j WHERE j.fit_id = fits.fit_id) \
             WHERE fit_id IN ({FINISHED})"
        )))
        .bind(finished_before_ms)
        .bind(limit)
        .execute(&mut *tx)
        .await?;
        let deleted = sqlx::query(sqlx::AssertSqlSafe(format!(
            "DELETE FROM jobs WHERE fit_id IN ({FINISHED})"
        )))
        .bind(finished_before_ms)
        .bind(limit)
        .execute(&mut *tx)
        .await?
        .rows_affected();
        tx.commit().await?;
        Ok(deleted)
    }
}

/// The body of [`Store::claim_jobs`], inside the caller's transaction.
async fn claim_in(
    conn: &mut SqliteConnection,
    lease: Duration,
    max_attempts: i64,
    n: usize,
) -> StoreResult<Vec<Claim>> {
    let now = now_ms();
    // Expired jobs that were cancelled or ran out of attempts are settled first (cancelled when
    // both), so the claim below never takes them.
    let expired: Vec<(i64, i64, i64)> = sqlx::query_as(
        "UPDATE jobs SET state = 'done', claim_token = NULL, lease_until_ms = NULL \
         WHERE state = 'running' AND lease_until_ms < ? AND (cancel_requested = 1 OR attempts >= ?) \
         RETURNING fit_id, attempts, cancel_requested",
    )
    .bind(now)
    .bind(max_attempts)
    .fetch_all(&mut *conn)
    .await?;
    for (fit_id, attempts, cancel_requested) in expired {
        if cancel_requested != 0 {
            settle(conn, fit_id, "cancelled", FailureKind::Cancelled, None, now).await?;
            continue;
        }
        let error = format!(
            "the fit was started {attempts} times and never finished (the worker stopped each time); \
             retry it to run it again"
        );
        settle(
            conn,
            fit_id,
            "failed",
            FailureKind::AttemptsExhausted,
            Some(&error),
            now,
        )
        .await?;
    }
    // Up to n runnable jobs, oldest first, in one statement; each gets its own token: 16 random
    // bytes (SQLite's generator, seeded from the system's) in hex.
    let mut claims: Vec<Claim> = sqlx::query_as(
        "UPDATE jobs SET state = 'running', claim_token = lower(hex(randomblob(16))), \
         lease_until_ms = ?, attempts = attempts + 1 WHERE fit_id IN (SELECT fit_id FROM jobs \
         WHERE state = 'queued' OR (state = 'running' AND lease_until_ms < ?) \
         ORDER BY fit_id LIMIT ?) RETURNING fit_id, claim_token, attempts",
    )
    .bind(now + ms(lease))
    .bind(now)
    .bind(i64::try_from(n).unwrap_or(i64::MAX))
    .fetch_all(&mut *conn)
    .await?
    .into_iter()
    .map(|(fit_id, token, attempt)| Claim {
        fit_id,
        token,
        attempt,
    })
    .collect();
    // RETURNING gives no order; the fit shows as running only when its worker starts it
    // ([`Store::mark_started`]).
    claims.sort_by_key(|c| c.fit_id);
    Ok(claims)
}

/// The body of [`Store::complete_succeeded`], inside the caller's transaction.
async fn complete_succeeded_in(
    conn: &mut SqliteConnection,
    claim: &Claim,
    report: &FitReport,
    assessment: &Assessment,
) -> StoreResult<bool> {
    let now = now_ms();
    if !release_claim(conn, claim).await? {
        return Ok(false);
    }
    let row = sqlx::query(sqlx::AssertSqlSafe(basis_sql()))
        .bind(claim.fit_id)
        .fetch_one(&mut *conn)
        .await?;
    let (part_id, current) = basis_from_row(&row)?;
    let rejudged;
    let judgement = if current == assessment.judgement.basis {
        &assessment.judgement
    } else {
        let baseline = super::fits::baseline_report(conn, part_id).await?;
        rejudged = judge(current, baseline.as_ref().map(|(_, r)| r), report)?;
        &rejudged
    };
    let figures = &assessment.figures;
    sqlx::query(
        "UPDATE fits SET status = 'succeeded', progress = 1, error = NULL, error_kind = NULL, \
         engine_version = ?, \
         report_json = ?, finished_at_ms = ?, srf_hz = ?, srf_above_hz = ?, l0_h = ?, \
         rdc_ohm = ?, band_min_hz = ?, band_max_hz = ?, verdict = ?, verdict_json = ?, \
         drift_json = ?, drift_max_sigma = ?, quality = ?, core_corner_hz = ? WHERE fit_id = ?",
    )
    .bind(&report.engine_version)
    .bind(&assessment.report_json)
    .bind(now)
    .bind(figures.srf_hz)
    .bind(figures.srf_above_hz)
    .bind(figures.l0_h)
    .bind(figures.rdc_ohm)
    .bind(figures.band_min_hz)
    .bind(figures.band_max_hz)
    .bind(judgement.verdict)
    .bind(&judgement.verdict_json)
    .bind(&judgement.drift_json)
    .bind(judgement.drift_max_sigma)
    .bind(crate::registry::verdict::quality(report))
    .bind(figures.core_corner_hz)
    .bind(claim.fit_id)
    .execute(&mut *conn)
    .await?;
    // One statement per table (not one per row): the single writer connection is the service's
    // narrowest point, and each statement is a round trip to it.
    let resonances: Vec<(&str, f64)> = [
        ("series", &figures.series_resonances_hz),
        ("parallel", &figures.parallel_resonances_hz),
    ]
    .into_iter()
    .flat_map(|(kind, list)| {
        list.iter()
            .copied()
            .filter(|f| f.is_finite())
            .map(move |f| (kind, f))
    })
    .collect();
    if !resonances.is_empty() {
        let mut q = sqlx::QueryBuilder::<sqlx::Sqlite>::new(
            "INSERT INTO fit_resonances (fit_id, kind, frequency_hz) ",
        );
        q.push_values(&resonances, |mut b, (kind, f)| {
            b.push_bind(claim.fit_id).push_bind(*kind).push_bind(*f);
        });
        q.build().execute(&mut *conn).await?;
    }
    // At most 161 rows × 6 values, far below SQLite's limit of bound parameters.
    if !figures.grid.is_empty() {
        let mut q = sqlx::QueryBuilder::<sqlx::Sqlite>::new(
            "INSERT INTO fit_grid (fit_id, k, z_mag_ohm, l_eff_h, z_mag_floor_ohm, z_floor_at_hz) ",
        );
        q.push_values(&figures.grid, |mut b, p| {
            b.push_bind(claim.fit_id)
                .push_bind(p.k)
                .push_bind(p.z_mag_ohm)
                .push_bind(p.l_eff_h)
                .push_bind(p.z_mag_floor_ohm)
                .push_bind(p.z_floor_at_hz);
        });
        q.build().execute(&mut *conn).await?;
    }
    sqlx::query(
        "UPDATE parts SET latest_fit_id = ? WHERE part_id = ? \
         AND (latest_fit_id IS NULL OR latest_fit_id < ?)",
    )
    .bind(claim.fit_id)
    .bind(part_id)
    .bind(claim.fit_id)
    .execute(&mut *conn)
    .await?;
    audit(
        conn,
        WORKER_ACTOR,
        "fit-succeeded",
        Some(part_id),
        Some(claim.fit_id),
        None,
    )
    .await?;
    Ok(true)
}

/// The part of a fit with what its result is judged against (one bound parameter: the fit id).
fn basis_sql() -> String {
    format!(
        "SELECT part_id, baseline_fit_id, {} FROM parts \
         WHERE part_id = (SELECT part_id FROM fits WHERE fit_id = ?)",
        super::parts::LIMIT_COLUMNS
    )
}

/// The part id and the [`Basis`] of a [`basis_sql`] row.
fn basis_from_row(row: &sqlx::sqlite::SqliteRow) -> StoreResult<(i64, Basis)> {
    Ok((
        row.try_get("part_id")?,
        Basis {
            limits: super::parts::limits_from_row(row)?,
            baseline_fit_id: row.try_get("baseline_fit_id")?,
        },
    ))
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

/// Final status of a fit without a result, with its failure kind and its audit entry.
async fn settle(
    tx: &mut SqliteConnection,
    fit_id: i64,
    status: &str,
    kind: FailureKind,
    error: Option<&str>,
    now: i64,
) -> StoreResult<()> {
    let part_id: i64 = sqlx::query_scalar(
        "UPDATE fits SET status = ?, error = ?, error_kind = ?, finished_at_ms = ? WHERE fit_id = ? \
         RETURNING part_id",
    )
    .bind(status)
    .bind(error)
    .bind(kind.as_str())
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::registry::assessment;
    use crate::registry::ids::{LotCode, PartNumber};
    use crate::registry::limits::Limits;
    use crate::registry::verdict::tests::report;
    use crate::store::sweeps::{NamedFile, NewSweep};
    use crate::store::testing::temp_store;

    fn part_j1() -> PartNumber {
        PartNumber::parse("J-1").unwrap()
    }

    /// A store holding the part J-1 with no limits.
    async fn store_with_part() -> (Store, tempfile::TempDir) {
        let (store, dir) = temp_store().await;
        store
            .create_part("test", &part_j1(), "", &Limits::default())
            .await
            .unwrap();
        (store, dir)
    }

    async fn queue_one(store: &Store, i: usize) -> i64 {
        let new = NewSweep {
            part_number: part_j1(),
            lot: LotCode::parse("L").unwrap(),
            file: NamedFile {
                name: format!("{i}.csv"),
                bytes: format!("bytes {i}").into_bytes(),
            },
            sha256: crate::store::sha256_hex(format!("bytes {i}").as_bytes()),
            method: "direct".into(),
            z0_ohm: None,
            dcr_ohm: None,
            temperature_c: None,
            operator: String::new(),
            fixture_open: None,
            fixture_short: None,
            fixture_topology: None,
            points: 3,
            options_json: "{}".into(),
            options_key: "k".into(),
        };
        store.upload("test", new).await.unwrap().fit_id
    }

    #[tokio::test]
    async fn an_upload_past_a_queue_bound_is_refused_inside_its_write_but_a_duplicate_is_answered()
    {
        use crate::store::StoreError;
        use crate::store::sweeps::QueueBounds;
        let (store, _dir) = store_with_part().await;
        let first = queue_one(&store, 0).await;
        let new = |i: usize| NewSweep {
            part_number: part_j1(),
            lot: LotCode::parse("L").unwrap(),
            file: NamedFile {
                name: format!("{i}.csv"),
                bytes: format!("bytes {i}").into_bytes(),
            },
            sha256: crate::store::sha256_hex(format!("bytes {i}").as_bytes()),
            method: "direct".into(),
            z0_ohm: None,
            dcr_ohm: None,
            temperature_c: None,
            operator: String::new(),
            fixture_open: None,
            fixture_short: None,
            fixture_topology: None,
            points: 3,
            options_json: "{}".into(),
            options_key: "k".into(),
        };
        let per_part = Some(QueueBounds { all: 10, part: 1 });
        let refused = store.upload_bounded("test", new(1), per_part).await;
        assert!(
            matches!(
                refused,
                Err(StoreError::QueueFull {
                    part: true,
                    queued: 1
                })
            ),
            "{refused:?}"
        );
        let all = Some(QueueBounds { all: 1, part: 10 });
        let refused = store.upload_bounded("test", new(1), all).await;
        assert!(
            matches!(
                refused,
                Err(StoreError::QueueFull {
                    part: false,
                    queued: 1
                })
            ),
            "{refused:?}"
        );
        let again = store
            .upload_bounded("test", new(0), per_part)
            .await
            .unwrap();
        assert!(again.duplicate && again.fit_id == first);
        let fits: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM fits")
            .fetch_one(&store.reader)
            .await
            .unwrap();
        assert_eq!(fits, 1);
    }

    #[tokio::test]
    async fn one_claim_fills_several_workers_oldest_first_and_each_job_once() {
        let (store, _dir) = store_with_part().await;
        let mut queued = Vec::new();
        for i in 0..5 {
            queued.push(queue_one(&store, i).await);
        }
        let lease = Duration::from_secs(30);
        let three = store.claim_jobs(lease, 3, 3).await.unwrap();
        let ids: Vec<i64> = three.iter().map(|c| c.fit_id).collect();
        assert_eq!(ids, queued[..3]);
        let tokens: std::collections::HashSet<&str> =
            three.iter().map(|c| c.token.as_str()).collect();
        assert_eq!(tokens.len(), 3, "each claim has its own token");
        // Fewer runnable jobs than asked for: the rest, then nothing.
        let rest = store.claim_jobs(lease, 3, 4).await.unwrap();
        assert_eq!(
            rest.iter().map(|c| c.fit_id).collect::<Vec<_>>(),
            queued[3..]
        );
        assert!(store.claim_jobs(lease, 3, 4).await.unwrap().is_empty());

        // Outcomes written concurrently (so they share write batches) each land once, and a stale
        // claim among them writes nothing without failing the others.
        let r = report(1e-5, 0.05, 5e-12, Some(2.25e7));
        let stale = Claim {
            token: "not-the-token".into(),
            ..three[0].clone()
        };
        let mut set = tokio::task::JoinSet::new();
        for (claim, expect) in three
            .iter()
            .chain(&rest)
            .map(|c| (c.clone(), true))
            .chain([(stale, false)])
        {
            let store = store.clone();
            let r = r.clone();
            set.spawn(async move {
                let (basis, baseline) = store.assessment_basis(claim.fit_id).await.unwrap();
                let a = assessment::assess(&r, basis, baseline.as_deref()).unwrap();
                (
                    claim.fit_id,
                    expect,
                    store.complete_succeeded(&claim, r, a).await,
                )
            });
        }
        while let Some(done) = set.join_next().await {
            let (fit_id, expect, written) = done.unwrap();
            // The stale claim may run before or after the real one: either way it writes nothing.
            assert_eq!(written.unwrap(), expect, "fit {fit_id}");
        }
        for id in &queued {
            assert_eq!(
                store.fit_summary(*id).await.unwrap().status.as_str(),
                "succeeded"
            );
        }
        let audits: i64 =
            sqlx::query_scalar("SELECT COUNT(*) FROM audit WHERE action = 'fit-succeeded'")
                .fetch_one(&store.reader)
                .await
                .unwrap();
        assert_eq!(audits, 5);
    }

    #[tokio::test]
    async fn an_expired_lease_is_claimed_again_and_only_the_current_claim_writes() {
        let (store, _dir) = store_with_part().await;
        let a = queue_one(&store, 0).await;
        let b = queue_one(&store, 1).await;
        let lease = Duration::from_millis(30);

        // Oldest first; nothing left once both are held.
        let first = store.claim_job(lease, 3).await.unwrap().unwrap();
        assert_eq!((first.fit_id, first.attempt), (a, 1));
        let second = store.claim_job(lease, 3).await.unwrap().unwrap();
        assert_eq!(second.fit_id, b);
        assert_eq!(store.claim_job(lease, 3).await.unwrap(), None);

        // The first worker stops renewing; after expiry another claim takes the job over.
        tokio::time::sleep(Duration::from_millis(60)).await;
        assert!(matches!(
            store
                .renew_lease(&second, Duration::from_secs(30), 0.5)
                .await
                .unwrap(),
            Renewal::Held {
                cancel_requested: false
            }
        ));
        let again = store.claim_job(lease, 3).await.unwrap().unwrap();
        assert_eq!((again.fit_id, again.attempt), (a, 2));
        assert_ne!(again.token, first.token);
        assert_eq!(
            store.renew_lease(&first, lease, 0.5).await.unwrap(),
            Renewal::Lost
        );

        // The stale claim writes nothing; the current one writes once; a repeat writes nothing.
        let r = report(1e-5, 0.05, 5e-12, Some(2.25e7));
        let (basis, baseline) = store.assessment_basis(a).await.unwrap();
        let done = assessment::assess(&r, basis, baseline.as_deref()).unwrap();
        assert!(
            !store
                .complete_succeeded(&first, r.clone(), done.clone())
                .await
                .unwrap()
        );
        assert!(
            store
                .complete_succeeded(&again, r.clone(), done.clone())
                .await
                .unwrap()
        );
        assert!(
            !store
                .complete_succeeded(&again, r.clone(), done.clone())
                .await
                .unwrap()
        );
        let summary = store.fit_summary(a).await.unwrap();
        assert_eq!(summary.status.as_str(), "succeeded");
        // And the database itself refuses a second result.
        let rewrite = sqlx::query("UPDATE fits SET report_json = '{}' WHERE fit_id = ?")
            .bind(a)
            .execute(&store.writer)
            .await;
        assert!(rewrite.unwrap_err().to_string().contains("written once"));
    }

    #[tokio::test]
    async fn limits_changed_after_the_assessment_are_judged_again_when_the_result_is_written() {
        let (store, _dir) = store_with_part().await;
        let a = queue_one(&store, 0).await;
        let claim = store
            .claim_job(Duration::from_secs(30), 3)
            .await
            .unwrap()
            .unwrap();
        let r = report(1e-5, 0.05, 5e-12, Some(2.25e7));
        let (basis, baseline) = store.assessment_basis(a).await.unwrap();
        assert_eq!(basis.limits, Limits::default());
        let done = assessment::assess(&r, basis, baseline.as_deref()).unwrap();
        assert_eq!(done.judgement.verdict, None, "no limits, no verdict");
        // An engineer sets a DCR limit while the result is on its way to the writer.
        let tight = Limits {
            dcr_max_ohm: Some(0.04),
            ..Limits::default()
        };
        sqlx::query("UPDATE parts SET dcr_max_ohm = 0.04 WHERE part_number = 'J-1'")
            .execute(&store.writer)
            .await
            .unwrap();
        assert_eq!(store.assessment_basis(a).await.unwrap().0.limits, tight);
        assert!(
            store
                .complete_succeeded(&claim, r.clone(), done.clone())
                .await
                .unwrap()
        );
        let verdict: Option<String> =
            sqlx::query_scalar("SELECT verdict FROM fits WHERE fit_id = ?")
                .bind(a)
                .fetch_one(&store.reader)
                .await
                .unwrap();
        assert_eq!(
            verdict.as_deref(),
            Some("fail"),
            "0.05 Ω against a 0.04 Ω limit"
        );
    }

    /// The kept counts against a full count of the fits table.
    async fn assert_counts_match(store: &Store) {
        let counted: Vec<(String, i64)> =
            sqlx::query_as("SELECT status, COUNT(*) FROM fits GROUP BY status")
                .fetch_all(&store.reader)
                .await
                .unwrap();
        let kept = store.queue_counts().await.unwrap();
        let get = |s: &str| counted.iter().find(|r| r.0 == s).map_or(0, |r| r.1);
        assert_eq!(
            (
                kept.queued,
                kept.running,
                kept.succeeded,
                kept.failed,
                kept.cancelled
            ),
            (
                get("queued"),
                get("running"),
                get("succeeded"),
                get("failed"),
                get("cancelled")
            )
        );
    }

    #[tokio::test]
    async fn the_queue_counts_follow_every_status_change() {
        let (store, _dir) = store_with_part().await;
        let ids = [
            queue_one(&store, 0).await,
            queue_one(&store, 1).await,
            queue_one(&store, 2).await,
        ];
        assert_eq!(store.queue_counts().await.unwrap().queued, 3);
        assert_counts_match(&store).await;
        let lease = Duration::from_secs(30);
        let done = store.claim_job(lease, 3).await.unwrap().unwrap();
        let failed = store.claim_job(lease, 3).await.unwrap().unwrap();
        // Claimed is not yet running: a fit shows as running when its worker starts it.
        assert_eq!(store.queue_counts().await.unwrap().queued, 3);
        assert!(store.mark_started(&done).await.unwrap());
        assert!(store.mark_started(&failed).await.unwrap());
        let stale = Claim {
            token: "not-the-token".into(),
            ..done.clone()
        };
        assert!(!store.mark_started(&stale).await.unwrap());
        assert_eq!(store.queue_counts().await.unwrap().running, 2);
        assert_counts_match(&store).await;
        let r = report(1e-5, 0.05, 5e-12, Some(2.25e7));
        let (basis, baseline) = store.assessment_basis(done.fit_id).await.unwrap();
        let a = assessment::assess(&r, basis, baseline.as_deref()).unwrap();
        assert!(
            store
                .complete_succeeded(&done, r.clone(), a.clone())
                .await
                .unwrap()
        );
        assert!(
            store
                .complete_unsuccessful(&failed, false, FailureKind::UnreadableSweep, "bad file")
                .await
                .unwrap()
        );
        store.cancel_fit("test", ids[2]).await.unwrap();
        let c = store.queue_counts().await.unwrap();
        assert_eq!(
            (c.queued, c.running, c.succeeded, c.failed, c.cancelled),
            (0, 0, 1, 1, 1)
        );
        assert_counts_match(&store).await;
        let mut kinds = Vec::new();
        for id in &ids {
            kinds.push(store.fit_summary(*id).await.unwrap().error_kind);
        }
        assert_eq!(
            kinds,
            [
                None,
                Some(FailureKind::UnreadableSweep),
                Some(FailureKind::Cancelled)
            ]
        );
        let unknown = sqlx::query("UPDATE fits SET error_kind = 'gremlins' WHERE fit_id = ?")
            .bind(ids[1])
            .execute(&store.writer)
            .await;
        assert!(
            unknown
                .unwrap_err()
                .to_string()
                .contains("unknown error_kind")
        );
        store.retry_fit("test", ids[1], None).await.unwrap();
        let again = store.fit_summary(ids[1]).await.unwrap();
        assert_eq!((again.error, again.error_kind), (None, None));
    }

    #[tokio::test]
    async fn a_job_that_never_finishes_fails_after_its_attempts_and_a_release_is_not_counted() {
        let (store, _dir) = store_with_part().await;
        let a = queue_one(&store, 0).await;
        let lease = Duration::from_millis(10);
        let c = store.claim_job(lease, 2).await.unwrap().unwrap();
        assert!(store.release_job(&c).await.unwrap());
        let c = store.claim_job(lease, 2).await.unwrap().unwrap();
        assert_eq!(c.attempt, 1, "the released attempt was not counted");
        tokio::time::sleep(Duration::from_millis(30)).await;
        let c = store.claim_job(lease, 2).await.unwrap().unwrap();
        assert_eq!(c.attempt, 2);
        tokio::time::sleep(Duration::from_millis(30)).await;
        assert_eq!(store.claim_job(lease, 2).await.unwrap(), None);
        let s = store.fit_summary(a).await.unwrap();
        assert_eq!(s.status.as_str(), "failed");
        assert!(s.error.unwrap().contains("started 2 times"));
        assert_eq!(s.error_kind, Some(FailureKind::AttemptsExhausted));
    }
}

/// Fits waiting for or holding a worker, for the queue bounds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct QueueDepth {
    /// Queued and running fits of every part.
    pub all: i64,
    /// Queued and running fits of the part asked about (0 when it has none, does not exist or none
    /// was named).
    pub part: i64,
}

impl Store {
    /// How many fits are queued or running, in all and for one part (by number or by one of its fits).
    /// Read without the writer: the trigger-kept status counts, and the part's fits by index.
    pub async fn queue_depth(&self, part: PartRef<'_>) -> StoreResult<QueueDepth> {
        // One statement: both counts, the part's from the partial index of open fits (0014).
        const ALL: &str = "SELECT COALESCE(SUM(fits), 0) FROM fit_status_counts \
                           WHERE status IN ('queued', 'running')";
        let part_sql = "SELECT COUNT(*) FROM fits WHERE part_id = (SELECT part_id FROM parts WHERE \
                        part_number = ?) AND status IN ('queued', 'running')";
        let by_fit_sql = "SELECT COUNT(*) FROM fits WHERE part_id = (SELECT part_id FROM fits WHERE \
                          fit_id = ?) AND status IN ('queued', 'running')";
        let (all, part): (i64, i64) = match part {
            PartRef::Unnamed => (sqlx::query_scalar(ALL).fetch_one(&self.reader).await?, 0),
            PartRef::Number(n) => {
                sqlx::query_as(sqlx::AssertSqlSafe(format!("SELECT ({ALL}), ({part_sql})")))
                    .bind(n.as_str())
                    .fetch_one(&self.reader)
                    .await?
            }
            PartRef::OfFit(id) => {
                sqlx::query_as(sqlx::AssertSqlSafe(format!(
                    "SELECT ({ALL}), ({by_fit_sql})"
                )))
                .bind(id)
                .fetch_one(&self.reader)
                .await?
            }
        };
        Ok(QueueDepth { all, part })
    }
}

/// A part, by its number or by one of its fits; or none, when only the count of every part matters.
#[derive(Debug, Clone, Copy)]
pub enum PartRef<'a> {
    Number(&'a crate::registry::ids::PartNumber),
    OfFit(i64),
    Unnamed,
}
