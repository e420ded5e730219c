//! The job queue on PostgreSQL, shared by every replica. The same life of a job as on SQLite
//! ([`crate::store::jobs`]): queued → claimed (running, with a lease) → done, with an outcome written
//! to the fit only while the claim still holds. The protocol:
//!
//! - **Claim**: one statement. A CTE picks runnable rows (queued, or running with an expired lease
//!   and attempts left, not being cancelled), oldest first, `FOR UPDATE SKIP LOCKED`, and the
//!   `UPDATE … RETURNING` around it marks them running with a new lease and adds one to their
//!   `claim_token`. Concurrent claimers on any replica skip each other's rows instead of waiting, and
//!   a job is claimed by one of them only. The token is a per-job counter that only grows, so the
//!   token of a worker whose lease was taken over can never match again. Any replica's claim reaps
//!   expired leases: the expired job is simply runnable again; before it, in the same transaction, one
//!   statement settles expired jobs that were cancelled (cancelled) or ran out of attempts (failed).
//! - **Renewal**: one statement for all of a worker's jobs (`UPDATE … FROM unnest(ids, tokens)`),
//!   extending the leases still held, storing progress, and answering which are held and which were
//!   asked to cancel.
//! - **Outcome**: one statement for any number of jobs: the jobs whose token still matches are marked
//!   done and, in the same statement (so the same transaction), their fits get their outcome. A job
//!   taken over writes nothing. A fit's result is written once (the `fits_report_written_once`
//!   trigger refuses a second one), and a job is done once (the state check), so no outcome can be
//!   written twice. Callers can run it inside their own transaction ([`complete_in`]).
//! - **Waking**: a trigger sends `NOTIFY henrybook_jobs` when a job becomes queued; idle workers wait
//!   in [`JobWaker::wait`] (`LISTEN` through [`sqlx::postgres::PgListener`]), which also returns after
//!   a poll interval, so a lost notification (or an expired lease, which sends none) delays work by
//!   at most that interval. Listen before the first claim, so an enqueue between an empty claim and
//!   the wait is not missed.
//! - **Batching**: set-based statements over arrays; no savepoints, so a batch of any size uses one
//!   transaction ID and never overflows PostgreSQL's cache of 64 subtransactions per backend.
//! - **Clock**: leases are measured on the database server's clock (`clock_timestamp()`), which every
//!   replica shares, never on a replica's own: a replica whose clock runs ahead can neither take
//!   another's live lease nor keep its own past its end.
//! - **Lock order**: every statement that changes both tables changes `jobs` before `fits`, and the
//!   claim waits on nothing (SKIP LOCKED), so the queue's statements cannot deadlock each other.
//!
//! - **Audit**: every failed or cancelled outcome written here, by a worker or by a claim settling an
//!   expired job, appends its `fit-failed` or `fit-cancelled` row by the worker, as the SQLite queue
//!   does, in the same transaction and last in it ([`super::audit`]).
//!
//! Elsewhere: a succeeded fit's figures, grid, resonances, verdict and audit row
//! ([`super::results`]); queue bounds ([`super::sweeps`]) and retries ([`super::fits`]).

use super::audit::{self, Entry};
use crate::registry::wire::FailureKind;
use crate::store::jobs::{Renewal, WORKER_ACTOR};
use crate::store::{StoreError, StoreResult, now_ms};
use sqlx::postgres::PgListener;
use sqlx::{PgConnection, PgPool};
use std::collections::HashSet;
use std::time::Duration;

/// The channel a job's becoming queued is announced on (see migrations/postgres/0001_registry.sql).
pub const CHANNEL: &str = "henrybook_jobs";

/// A job held by a worker: valid while the job is running and its token is still `token`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct Claim {
    pub fit_id: i64,
    /// The job's claim counter after this claim: larger on every claim of the same job.
    pub token: i64,
    /// 1 on the first run, more after a lease expired and the job was claimed again.
    pub attempt: i64,
}

/// What a worker writes when its job ends.
#[derive(Debug, Clone, PartialEq)]
pub enum Outcome {
    Succeeded {
        engine_version: String,
        report_json: String,
    },
    Failed {
        kind: FailureKind,
        error: String,
    },
    /// Stopped on request; `reason` is stored as the fit's error and the audit row's reason (the
    /// worker's words, as the SQLite queue stores them), or nothing.
    Cancelled {
        reason: Option<String>,
    },
}

/// What [`PgQueue::cancel`] did.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Cancel {
    /// The fit was waiting (or claimed but not started): it is cancelled now.
    Cancelled,
    /// The fit is running: its worker learns of the request at its next renewal.
    Requested,
}

fn ms(d: Duration) -> i64 {
    d.as_millis().min(i64::MAX as u128) as i64
}

/// The database server's clock in milliseconds since the Unix epoch: what leases are measured on.
const SERVER_NOW_MS: &str = "SELECT (extract(epoch FROM clock_timestamp()) * 1000)::bigint";

/// The PostgreSQL job queue over a pool (every replica has its own; they share the tables).
#[derive(Clone, Debug)]
pub struct PgQueue {
    pool: PgPool,
}

/// Queues the jobs of `fit_ids` (fits already inserted, status queued) inside the caller's
/// transaction; one statement, and one notification however many there are.
pub async fn enqueue(conn: &mut PgConnection, fit_ids: &[i64]) -> StoreResult<()> {
    sqlx::query(
        "INSERT INTO jobs (fit_id, state, enqueued_at_ms) \
         SELECT fit_id, 'queued', $2 FROM unnest($1::bigint[]) AS q(fit_id)",
    )
    .bind(fit_ids)
    .bind(now_ms())
    .execute(&mut *conn)
    .await?;
    Ok(())
}

/// Writes outcomes inside the caller's transaction, in one statement; the answer tells, for each
/// claim in order, whether it still held (and so whether its outcome was written). The audit rows of
/// the failed and cancelled outcomes written are appended last (a succeeded one's row is its
/// result's, [`super::results`]), so the caller writes nothing after this.
pub async fn complete_in(
    conn: &mut PgConnection,
    outcomes: &[(Claim, Outcome)],
) -> StoreResult<Vec<bool>> {
    let mut seen = HashSet::new();
    if let Some((c, _)) = outcomes.iter().find(|(c, _)| !seen.insert(c.fit_id)) {
        return Err(StoreError::Invalid(format!(
            "fit {} has more than one outcome in one batch",
            c.fit_id
        )));
    }
    let mut ids = Vec::with_capacity(outcomes.len());
    let mut tokens = Vec::with_capacity(outcomes.len());
    let mut statuses = Vec::with_capacity(outcomes.len());
    let mut kinds: Vec<Option<&str>> = Vec::with_capacity(outcomes.len());
    let mut errors: Vec<Option<&str>> = Vec::with_capacity(outcomes.len());
    let mut engines: Vec<Option<&str>> = Vec::with_capacity(outcomes.len());
    let mut reports: Vec<Option<&str>> = Vec::with_capacity(outcomes.len());
    for (claim, outcome) in outcomes {
        ids.push(claim.fit_id);
        tokens.push(claim.token);
        let (status, kind, error, engine, report) = match outcome {
            Outcome::Succeeded {
                engine_version,
                report_json,
            } => (
                "succeeded",
                None,
                None,
                Some(engine_version.as_str()),
                Some(report_json.as_str()),
            ),
            Outcome::Failed { kind, error } => (
                "failed",
                Some(kind.as_str()),
                Some(error.as_str()),
                None,
                None,
            ),
            Outcome::Cancelled { reason } => (
                "cancelled",
                Some(FailureKind::Cancelled.as_str()),
                reason.as_deref(),
                None,
                None,
            ),
        };
        statuses.push(status);
        kinds.push(kind);
        errors.push(error);
        engines.push(engine);
        reports.push(report);
    }
    let written: Vec<(i64, i64, String, Option<String>)> = sqlx::query_as(
        "WITH outcome AS ( \
             SELECT * FROM unnest($1::bigint[], $2::bigint[], $3::text[], $4::text[], $5::text[], \
                                  $6::text[], $7::text[]) \
                 AS o(fit_id, token, status, error_kind, error, engine_version, report_json) \
         ), won AS ( \
             UPDATE jobs AS j SET state = 'done', lease_until_ms = NULL \
             FROM outcome AS o \
             WHERE j.fit_id = o.fit_id AND j.claim_token = o.token AND j.state = 'running' \
             RETURNING j.fit_id \
         ) \
         UPDATE fits AS f \
         SET status = o.status, error_kind = o.error_kind, error = o.error, \
             engine_version = COALESCE(o.engine_version, f.engine_version), \
             report_json = COALESCE(o.report_json, f.report_json), \
             progress = CASE WHEN o.status = 'succeeded' THEN 1 ELSE f.progress END, \
             finished_at_ms = $8 \
         FROM outcome AS o, won AS w \
         WHERE f.fit_id = o.fit_id AND w.fit_id = o.fit_id \
         RETURNING f.fit_id, f.part_id, f.status, f.error",
    )
    .bind(&ids)
    .bind(&tokens)
    .bind(&statuses)
    .bind(&kinds)
    .bind(&errors)
    .bind(&engines)
    .bind(&reports)
    .bind(now_ms())
    .fetch_all(&mut *conn)
    .await?;
    let entries = settled_entries(
        ids.iter()
            .filter_map(|id| written.iter().find(|w| w.0 == *id))
            .map(|(fit_id, part_id, status, error)| {
                (*fit_id, *part_id, status.as_str(), error.as_deref())
            }),
    );
    audit::append(conn, &entries).await?;
    let written: HashSet<i64> = written.iter().map(|w| w.0).collect();
    Ok(ids.iter().map(|id| written.contains(id)).collect())
}

/// The worker's audit entries for outcomes without a result, in the given order: (fit, part, status,
/// error) → `fit-<status>` with the error as its reason. Succeeded outcomes have their own row.
fn settled_entries<'a>(
    outcomes: impl Iterator<Item = (i64, i64, &'a str, Option<&'a str>)>,
) -> Vec<Entry> {
    outcomes
        .filter(|(_, _, status, _)| *status != "succeeded")
        .map(|(fit_id, part_id, status, error)| {
            Entry::new(
                WORKER_ACTOR,
                &format!("fit-{status}"),
                Some(part_id),
                Some(fit_id),
                error,
            )
        })
        .collect()
}

impl PgQueue {
    pub fn new(pool: PgPool) -> PgQueue {
        PgQueue { pool }
    }

    pub fn pool(&self) -> &PgPool {
        &self.pool
    }

    /// Claims the oldest runnable job, first settling expired jobs that were cancelled or ran out of
    /// attempts.
    pub async fn claim_job(
        &self,
        lease: Duration,
        max_attempts: i64,
    ) -> StoreResult<Option<Claim>> {
        Ok(self.claim_jobs(lease, max_attempts, 1).await?.pop())
    }

    /// Claims up to `n` runnable jobs, oldest first (fewer when other claimers hold the rest). One
    /// transaction: one statement settling expired jobs that will not run again, one claiming.
    pub async fn claim_jobs(
        &self,
        lease: Duration,
        max_attempts: i64,
        n: usize,
    ) -> StoreResult<Vec<Claim>> {
        let mut tx = self.pool.begin().await?;
        // Leases are read and written on the database server's clock, the one clock every replica
        // shares: a replica whose own clock runs ahead can neither take live leases nor keep its own
        // past their end.
        let now: i64 = sqlx::query_scalar(SERVER_NOW_MS)
            .fetch_one(&mut *tx)
            .await?;
        // Expired and cancelled, or expired with no attempt left: settled, jobs before fits. Their
        // audit rows are appended after the claim, last in the transaction.
        let settled: Vec<(i64, i64, String, Option<String>)> = sqlx::query_as(
            "WITH expired AS ( \
                 SELECT fit_id FROM jobs \
                 WHERE state = 'running' AND lease_until_ms < $1 \
                   AND (cancel_requested OR attempts >= $2) \
                 FOR UPDATE SKIP LOCKED \
             ), settled AS ( \
                 UPDATE jobs AS j SET state = 'done', lease_until_ms = NULL \
                 FROM expired AS e WHERE j.fit_id = e.fit_id \
                 RETURNING j.fit_id, j.cancel_requested, j.attempts \
             ) \
             UPDATE fits AS f \
             SET status = CASE WHEN s.cancel_requested THEN 'cancelled' ELSE 'failed' END, \
                 error_kind = CASE WHEN s.cancel_requested THEN $3 ELSE $4 END, \
                 error = CASE WHEN s.cancel_requested THEN NULL ELSE format( \
                     'the fit was started %s times and never finished (the worker stopped each \
time); retry it to run it again', s.attempts) END, \
                 finished_at_ms = $1 \
             FROM settled AS s WHERE f.fit_id = s.fit_id \
             RETURNING f.fit_id, f.part_id, f.status, f.error",
        )
        .bind(now)
        .bind(max_attempts)
        .bind(FailureKind::Cancelled.as_str())
        .bind(FailureKind::AttemptsExhausted.as_str())
        .fetch_all(&mut *tx)
        .await?;
        let mut claims: Vec<Claim> = sqlx::query_as::<_, (i64, i64, i64)>(
            "WITH runnable AS ( \
                 SELECT fit_id FROM jobs \
                 WHERE state IN ('queued', 'running') \
                   AND (state = 'queued' \
                        OR (lease_until_ms < $1 AND NOT cancel_requested AND attempts < $2)) \
                 ORDER BY fit_id \
                 LIMIT $3 \
                 FOR UPDATE SKIP LOCKED \
             ) \
             UPDATE jobs AS j \
             SET state = 'running', claim_token = j.claim_token + 1, lease_until_ms = $4, \
                 attempts = j.attempts + 1 \
             FROM runnable AS r WHERE j.fit_id = r.fit_id \
             RETURNING j.fit_id, j.claim_token, j.attempts",
        )
        .bind(now)
        .bind(max_attempts)
        .bind(i64::try_from(n).unwrap_or(i64::MAX))
        .bind(now.saturating_add(ms(lease)))
        .fetch_all(&mut *tx)
        .await?
        .into_iter()
        .map(|(fit_id, token, attempt)| Claim {
            fit_id,
            token,
            attempt,
        })
        .collect();
        // As the SQLite queue: the cancelled ones first, each group by fit id.
        let mut settled = settled;
        settled.sort_by_key(|s| (s.2 != "cancelled", s.0));
        let entries = settled_entries(settled.iter().map(|(fit_id, part_id, status, error)| {
            (*fit_id, *part_id, status.as_str(), error.as_deref())
        }));
        audit::append(&mut tx, &entries).await?;
        tx.commit().await?;
        claims.sort_by_key(|c| c.fit_id);
        Ok(claims)
    }

    /// Shows a claimed fit as running when its worker starts it; tells whether the claim still held.
    /// The job row is locked first (jobs before fits), so a cancel or takeover committed meanwhile is
    /// seen.
    pub async fn mark_started(&self, claim: &Claim) -> StoreResult<bool> {
        let started = sqlx::query(
            "WITH held AS ( \
                 SELECT fit_id FROM jobs \
                 WHERE fit_id = $2 AND claim_token = $3 AND state = 'running' FOR SHARE \
             ) \
             UPDATE fits AS f SET status = 'running', progress = 0, started_at_ms = $1 \
             FROM held WHERE f.fit_id = held.fit_id",
        )
        .bind(now_ms())
        .bind(claim.fit_id)
        .bind(claim.token)
        .execute(&self.pool)
        .await?
        .rows_affected();
        Ok(started == 1)
    }

    /// Extends the leases of all of a worker's jobs and stores their progress, in one statement; the
    /// answer, in the order given, tells for each whether it is still held and whether a cancel was
    /// asked for.
    pub async fn renew_leases(
        &self,
        held: &[(Claim, f64)],
        lease: Duration,
    ) -> StoreResult<Vec<Renewal>> {
        let ids: Vec<i64> = held.iter().map(|(c, _)| c.fit_id).collect();
        let tokens: Vec<i64> = held.iter().map(|(c, _)| c.token).collect();
        let progress: Vec<f64> = held
            .iter()
            .map(|(_, p)| {
                if p.is_finite() {
                    p.clamp(0.0, 1.0)
                } else {
                    0.0
                }
            })
            .collect();
        let rows: Vec<(i64, bool)> = sqlx::query_as(
            "WITH claim AS ( \
                 SELECT * FROM unnest($1::bigint[], $2::bigint[], $3::float8[]) \
                     AS c(fit_id, token, progress) \
             ), held AS ( \
                 UPDATE jobs AS j \
                 SET lease_until_ms = (extract(epoch FROM clock_timestamp()) * 1000)::bigint + $4 \
                 FROM claim AS c \
                 WHERE j.fit_id = c.fit_id AND j.claim_token = c.token AND j.state = 'running' \
                 RETURNING j.fit_id, j.cancel_requested \
             ), shown AS ( \
                 UPDATE fits AS f SET progress = c.progress \
                 FROM claim AS c, held AS h \
                 WHERE f.fit_id = c.fit_id AND h.fit_id = c.fit_id \
             ) \
             SELECT fit_id, cancel_requested FROM held",
        )
        .bind(&ids)
        .bind(&tokens)
        .bind(&progress)
        .bind(ms(lease))
        .fetch_all(&self.pool)
        .await?;
        Ok(ids
            .iter()
            .map(|id| match rows.iter().find(|(f, _)| f == id) {
                Some((_, cancel)) => Renewal::Held {
                    cancel_requested: *cancel,
                },
                None => Renewal::Lost,
            })
            .collect())
    }

    /// Writes outcomes in a transaction of their own (see [`complete_in`]).
    pub async fn complete(&self, outcomes: &[(Claim, Outcome)]) -> StoreResult<Vec<bool>> {
        let mut tx = self.pool.begin().await?;
        let written = complete_in(&mut tx, outcomes).await?;
        tx.commit().await?;
        Ok(written)
    }

    /// Gives a claimed job back to the queue without counting the attempt (graceful shutdown). The
    /// token is kept, so the next claim gets a larger one.
    pub async fn release_job(&self, claim: &Claim) -> StoreResult<bool> {
        let released = sqlx::query(
            "WITH back AS ( \
                 UPDATE jobs SET state = 'queued', lease_until_ms = NULL, \
                     attempts = GREATEST(attempts - 1, 0) \
                 WHERE fit_id = $1 AND claim_token = $2 AND state = 'running' \
                 RETURNING fit_id \
             ) \
             UPDATE fits AS f SET status = 'queued', progress = 0, started_at_ms = NULL \
             FROM back WHERE f.fit_id = back.fit_id",
        )
        .bind(claim.fit_id)
        .bind(claim.token)
        .execute(&self.pool)
        .await?
        .rows_affected();
        Ok(released == 1)
    }

    /// Cancels a queued fit at once, or asks the worker of a running one to stop.
    pub async fn cancel(&self, fit_id: i64) -> StoreResult<Cancel> {
        let mut tx = self.pool.begin().await?;
        let answer = cancel_in(&mut tx, fit_id).await?;
        tx.commit().await?;
        Ok(answer)
    }
}

/// The body of [`PgQueue::cancel`], inside the caller's transaction (its first lock is the job row).
pub async fn cancel_in(conn: &mut PgConnection, fit_id: i64) -> StoreResult<Cancel> {
    // Jobs before fits, as everywhere in the queue. A finished fit's job row may be gone
    // (pruned): the fit's status answers then, as on SQLite.
    sqlx::query("SELECT 1 FROM jobs WHERE fit_id = $1 FOR UPDATE")
        .bind(fit_id)
        .execute(&mut *conn)
        .await?;
    let status: Option<String> = sqlx::query_scalar("SELECT status FROM fits WHERE fit_id = $1")
        .bind(fit_id)
        .fetch_optional(&mut *conn)
        .await?;
    let Some(status) = status else {
        return Err(StoreError::NotFound(format!(
            "no fit {fit_id} in the queue"
        )));
    };
    let answer = match status.as_str() {
        "queued" => {
            sqlx::query("UPDATE jobs SET state = 'done', lease_until_ms = NULL WHERE fit_id = $1")
                .bind(fit_id)
                .execute(&mut *conn)
                .await?;
            sqlx::query(
                "UPDATE fits SET status = 'cancelled', error_kind = $2, finished_at_ms = $3 \
                 WHERE fit_id = $1",
            )
            .bind(fit_id)
            .bind(FailureKind::Cancelled.as_str())
            .bind(now_ms())
            .execute(&mut *conn)
            .await?;
            Cancel::Cancelled
        }
        "running" => {
            sqlx::query("UPDATE jobs SET cancel_requested = true WHERE fit_id = $1")
                .bind(fit_id)
                .execute(&mut *conn)
                .await?;
            Cancel::Requested
        }
        other => {
            return Err(crate::store::fits::not_now(
                fit_id,
                other,
                "queued or running",
                "cancelled",
            ));
        }
    };
    Ok(answer)
}

/// Why [`JobWaker::wait`] returned.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Wake {
    /// A job became queued somewhere.
    Notified,
    /// The poll interval passed (or the listener's connection failed and will be made again).
    Polled,
}

/// Wakes an idle worker when a job is queued on any replica, with polling as the fallback.
pub struct JobWaker {
    listener: PgListener,
}

impl JobWaker {
    /// Listens on [`CHANNEL`] with a connection of its own taken from `pool`'s settings.
    pub async fn listen(pool: &PgPool) -> StoreResult<JobWaker> {
        let mut listener = PgListener::connect_with(pool).await?;
        listener.listen(CHANNEL).await?;
        Ok(JobWaker { listener })
    }

    /// Waits for a notification, at most `poll`. Notifications that arrived while nobody waited are
    /// answered at once (one wakes; the claim that follows takes whatever is queued).
    pub async fn wait(&mut self, poll: Duration) -> Wake {
        match tokio::time::timeout(poll, self.listener.recv()).await {
            Ok(Ok(_)) => {
                // Several enqueues may have been announced: one wake-up serves them all.
                while self.listener.next_buffered().is_some() {}
                Wake::Notified
            }
            Ok(Err(e)) => {
                // The listener reconnects on the next call; meanwhile, poll.
                tracing::warn!(error = %e, "the job listener lost its connection; polling");
                tokio::time::sleep(poll).await;
                Wake::Polled
            }
            Err(_) => Wake::Polled,
        }
    }
}
