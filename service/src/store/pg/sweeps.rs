//! Uploaded sweeps and the first fit each upload queues, on PostgreSQL: the operations of
//! [`crate::store::sweeps`] with the same answers and errors, and the queue bounds.
//!
//! An upload is one transaction of its own (no group commit: every replica has a pool and the server
//! commits them side by side). It locks the part's row first, so two uploads of one file for one part
//! on two replicas cannot both pass the duplicate check. A write that queues a fit under
//! [`QueueBounds`] takes the advisory lock [`QUEUE_BOUND_LOCK`] before counting and holds it until it
//! commits, so concurrent writes on any replica cannot together pass a bound. Lock order: see
//! [`super::fits`].

use super::PgStore;
use super::audit::{self, Entry};
use super::parts::lock_part;
use crate::registry::ids::PartNumber;
use crate::registry::wire::QueueCounts;
use crate::store::fits::no_fit;
use crate::store::jobs::{PartRef, QueueDepth};
use crate::store::sweeps::{
    JOB_INPUT_SELECT, JobInput, NamedFile, NewSweep, QueueBounds, Uploaded, job_input_from_row,
    no_part_to_upload_to, no_sweep, upload_reason, within_bounds,
};
use crate::store::{StoreResult, now_ms};
use sqlx::PgConnection;

/// The advisory lock key a write holds, until it commits, from counting the queue to adding a fit.
pub const QUEUE_BOUND_LOCK: i64 = 0x6862_7175_6575_6500;

/// Counts queued and running fits, in all and of the part, after taking [`QUEUE_BOUND_LOCK`];
/// [`crate::store::StoreError::QueueFull`] when a bound is reached.
pub(crate) async fn check_queue_bounds(
    conn: &mut PgConnection,
    b: QueueBounds,
    part_id: i64,
) -> StoreResult<()> {
    sqlx::query("SELECT pg_advisory_xact_lock($1)")
        .bind(QUEUE_BOUND_LOCK)
        .execute(&mut *conn)
        .await?;
    // The status counts are deltas (migration 0004): their sum per status is the count.
    let (all, part): (i64, i64) = sqlx::query_as(
        "SELECT (SELECT COALESCE(SUM(fits), 0)::bigint FROM fit_status_counts \
                 WHERE status IN ('queued', 'running')), \
                (SELECT COUNT(*) FROM fits WHERE part_id = $1 AND status IN ('queued', 'running'))",
    )
    .bind(part_id)
    .fetch_one(&mut *conn)
    .await?;
    within_bounds(b, all, part)
}

/// Inserts a queued fit of an existing sweep and its job row in one statement; the new fit's id.
pub(crate) async fn insert_fit(
    conn: &mut PgConnection,
    sweep_id: i64,
    part_id: i64,
    lot_id: i64,
    revision: i64,
    options_json: &str,
    options_key: &str,
) -> StoreResult<i64> {
    Ok(sqlx::query_scalar(
        "WITH f AS ( \
             INSERT INTO fits (sweep_id, part_id, lot_id, revision, status, options_json, \
                               options_key, created_at_ms) \
             VALUES ($1, $2, $3, $4, 'queued', $5, $6, $7) RETURNING fit_id \
         ), j AS ( \
             INSERT INTO jobs (fit_id, state, enqueued_at_ms) SELECT fit_id, 'queued', $7 FROM f \
         ) \
         SELECT fit_id FROM f",
    )
    .bind(sweep_id)
    .bind(part_id)
    .bind(lot_id)
    .bind(revision)
    .bind(options_json)
    .bind(options_key)
    .bind(now_ms())
    .fetch_one(&mut *conn)
    .await?)
}

impl PgStore {
    /// Stores the sweep, queues its first fit and records the upload, all in one transaction; or
    /// returns the existing fit for a duplicate.
    pub async fn upload(&self, actor: &str, new: NewSweep) -> StoreResult<Uploaded> {
        self.upload_bounded(actor, new, None).await
    }

    /// As [`PgStore::upload`], refusing with [`crate::store::StoreError::QueueFull`] when a new fit
    /// would exceed `bounds` (a duplicate is still answered); see the module notes for why
    /// concurrent uploads cannot overshoot.
    pub async fn upload_bounded(
        &self,
        actor: &str,
        new: NewSweep,
        bounds: Option<QueueBounds>,
    ) -> StoreResult<Uploaded> {
        let mut tx = self.pool.begin().await?;
        let uploaded = upload_in(&mut tx, actor, &new, bounds).await?;
        tx.commit().await?;
        Ok(uploaded)
    }

    /// The uploaded file of a sweep, as uploaded.
    pub async fn sweep_file(&self, sweep_id: i64) -> StoreResult<NamedFile> {
        let row: Option<(String, Vec<u8>)> =
            sqlx::query_as("SELECT file_name, file_bytes FROM sweeps WHERE sweep_id = $1")
                .bind(sweep_id)
                .fetch_optional(&self.pool)
                .await?;
        row.map(|(name, bytes)| NamedFile { name, bytes })
            .ok_or_else(|| no_sweep(sweep_id))
    }

    /// Everything a worker needs for one fit.
    pub async fn job_input(&self, fit_id: i64) -> StoreResult<JobInput> {
        let row = sqlx::query(sqlx::AssertSqlSafe(format!("{JOB_INPUT_SELECT}$1")))
            .bind(fit_id)
            .fetch_optional(&self.pool)
            .await?
            .ok_or_else(|| no_fit(fit_id))?;
        Ok(job_input_from_row(&row)?)
    }

    /// Folds the status-count deltas into one row per status (`fit_status_counts_fold`, 0004), so the
    /// sums the counts and the queue bounds read stay short; safe on any replica at any time (a
    /// delta committed meanwhile waits for the next fold). How many rows it folded.
    pub async fn fold_status_counts(&self) -> StoreResult<i64> {
        let before: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM fit_status_counts")
            .fetch_one(&self.pool)
            .await?;
        sqlx::query("SELECT fit_status_counts_fold()")
            .execute(&self.pool)
            .await?;
        Ok(before)
    }

    /// Deletes the job rows of up to `limit` fits that finished (succeeded, failed or cancelled)
    /// before `finished_before_ms`, keeping each job's attempts and claim counter on its fit (0012);
    /// how many rows were deleted. Job rows first, then fits (the lock order); rows another
    /// transaction holds (a retry) are skipped, for the next pruning.
    pub async fn prune_finished_jobs(
        &self,
        finished_before_ms: i64,
        limit: i64,
    ) -> StoreResult<u64> {
        let pruned = sqlx::query(
            "WITH finished AS ( \
                 SELECT j.fit_id FROM jobs j JOIN fits f ON f.fit_id = j.fit_id \
                 WHERE j.state = 'done' AND f.status IN ('succeeded', 'failed', 'cancelled') \
                   AND f.finished_at_ms < $1 \
                 ORDER BY j.fit_id LIMIT $2 \
                 FOR UPDATE OF j SKIP LOCKED \
             ), gone AS ( \
                 DELETE FROM jobs j USING finished WHERE j.fit_id = finished.fit_id \
                 RETURNING j.fit_id, j.attempts, j.claim_token \
             ) \
             UPDATE fits f SET attempts = gone.attempts, job_claim_token = gone.claim_token \
             FROM gone WHERE f.fit_id = gone.fit_id",
        )
        .bind(finished_before_ms)
        .bind(limit)
        .execute(&self.pool)
        .await?
        .rows_affected();
        Ok(pruned)
    }

    /// Fits per status: the sums of the deltas the `fit_status_counts` triggers append (0004).
    pub async fn queue_counts(&self) -> StoreResult<QueueCounts> {
        let rows: Vec<(String, i64)> = sqlx::query_as(
            "SELECT status, SUM(fits)::bigint FROM fit_status_counts GROUP BY status",
        )
        .fetch_all(&self.pool)
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

    /// How many fits are queued or running, in all and for one part (by number or by one of its
    /// fits), without locking anything.
    pub async fn queue_depth(&self, part: PartRef<'_>) -> StoreResult<QueueDepth> {
        // One statement (one round trip to the server): both counts, the part's from the partial
        // index of open fits (0014).
        const ALL: &str = "SELECT COALESCE(SUM(fits), 0)::bigint FROM fit_status_counts \
                           WHERE status IN ('queued', 'running')";
        const BY_NUMBER: &str = "SELECT COUNT(*) FROM fits WHERE part_id = (SELECT part_id \
                                 FROM parts WHERE part_number = $1) AND status IN ('queued', 'running')";
        const BY_FIT: &str = "SELECT COUNT(*) FROM fits WHERE part_id = (SELECT part_id FROM fits \
                              WHERE fit_id = $1) AND status IN ('queued', 'running')";
        let (all, part): (i64, i64) = match part {
            PartRef::Unnamed => (sqlx::query_scalar(ALL).fetch_one(&self.pool).await?, 0),
            PartRef::Number(n) => {
                sqlx::query_as(sqlx::AssertSqlSafe(format!(
                    "SELECT ({ALL}), ({BY_NUMBER})"
                )))
                .bind(n.as_str())
                .fetch_one(&self.pool)
                .await?
            }
            PartRef::OfFit(id) => {
                sqlx::query_as(sqlx::AssertSqlSafe(format!("SELECT ({ALL}), ({BY_FIT})")))
                    .bind(id)
                    .fetch_one(&self.pool)
                    .await?
            }
        };
        Ok(QueueDepth { all, part })
    }
}

/// The body of [`PgStore::upload_bounded`], inside the caller's transaction.
async fn upload_in(
    conn: &mut PgConnection,
    actor: &str,
    new: &NewSweep,
    bounds: Option<QueueBounds>,
) -> StoreResult<Uploaded> {
    let part_number: &PartNumber = &new.part_number;
    let part_id = lock_part(conn, part_number)
        .await?
        .ok_or_else(|| no_part_to_upload_to(part_number))?;
    let existing: Option<(i64, i64)> = sqlx::query_as(
        "SELECT f.fit_id, f.sweep_id FROM sweeps s JOIN fits f ON f.sweep_id = s.sweep_id \
         WHERE s.part_id = $1 AND s.sha256 = $2 AND f.options_key = $3 \
         ORDER BY f.fit_id DESC LIMIT 1",
    )
    .bind(part_id)
    .bind(&new.sha256)
    .bind(&new.options_key)
    .fetch_optional(&mut *conn)
    .await?;
    if let Some((fit_id, sweep_id)) = existing {
        return Ok(Uploaded {
            fit_id,
            sweep_id,
            duplicate: true,
        });
    }
    if let Some(b) = bounds {
        check_queue_bounds(conn, b, part_id).await?;
    }
    // The part's row is locked: nobody else adds this lot meanwhile.
    let lot_id: i64 = sqlx::query_scalar(
        "WITH found AS (SELECT lot_id FROM lots WHERE part_id = $1 AND lot = $2), \
         added AS (INSERT INTO lots (part_id, lot) SELECT $1, $2 \
                   WHERE NOT EXISTS (SELECT 1 FROM found) RETURNING lot_id) \
         SELECT lot_id FROM found UNION ALL SELECT lot_id FROM added",
    )
    .bind(part_id)
    .bind(new.lot.as_str())
    .fetch_one(&mut *conn)
    .await?;
    let (open_name, open_bytes) = new
        .fixture_open
        .as_ref()
        .map(|f| (f.name.as_str(), f.bytes.as_slice()))
        .unzip();
    let (short_name, short_bytes) = new
        .fixture_short
        .as_ref()
        .map(|f| (f.name.as_str(), f.bytes.as_slice()))
        .unzip();
    let now = now_ms();
    // The sweep, its first fit and the fit's job in one statement.
    let (sweep_id, fit_id): (i64, i64) = sqlx::query_as(
        "WITH s AS ( \
             INSERT INTO sweeps (part_id, lot_id, file_name, file_bytes, sha256, method, z0_ohm, \
                 dcr_ohm, temperature_c, operator, fixture_open_name, fixture_open_bytes, \
                 fixture_short_name, fixture_short_bytes, fixture_topology, points, uploaded_by, \
                 uploaded_at_ms) \
             VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14, $15, $16, $17, $18) \
             RETURNING sweep_id \
         ), f AS ( \
             INSERT INTO fits (sweep_id, part_id, lot_id, revision, status, options_json, \
                               options_key, created_at_ms) \
             SELECT sweep_id, $1, $2, 1, 'queued', $19, $20, $18 FROM s RETURNING fit_id, sweep_id \
         ), j AS ( \
             INSERT INTO jobs (fit_id, state, enqueued_at_ms) SELECT fit_id, 'queued', $18 FROM f \
         ) \
         SELECT sweep_id, fit_id FROM f",
    )
    .bind(part_id)
    .bind(lot_id)
    .bind(&new.file.name)
    .bind(&new.file.bytes)
    .bind(&new.sha256)
    .bind(&new.method)
    .bind(new.z0_ohm)
    .bind(new.dcr_ohm)
    .bind(new.temperature_c)
    .bind(&new.operator)
    .bind(open_name)
    .bind(open_bytes)
    .bind(short_name)
    .bind(short_bytes)
    .bind(&new.fixture_topology)
    .bind(new.points as i64)
    .bind(actor)
    .bind(now)
    .bind(&new.options_json)
    .bind(&new.options_key)
    .fetch_one(&mut *conn)
    .await?;
    audit::append(
        conn,
        &[Entry::new(
            actor,
            "sweep-uploaded",
            Some(part_id),
            Some(fit_id),
            Some(&upload_reason(new)),
        )],
    )
    .await?;
    Ok(Uploaded {
        fit_id,
        sweep_id,
        duplicate: false,
    })
}
