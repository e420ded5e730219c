//! Uploaded sweeps (kept byte-for-byte with their SHA-256) and the first fit each upload queues.

use super::{Store, StoreError, StoreResult, audit, now_ms};
use crate::registry::ids::{LotCode, PartNumber};
use sqlx::Row;

/// A named file: its name as uploaded and its bytes.
#[derive(Debug, Clone)]
pub struct NamedFile {
    pub name: String,
    pub bytes: Vec<u8>,
}

/// An upload whose file the engine has already read successfully.
#[derive(Debug, Clone)]
pub struct NewSweep {
    pub part_number: PartNumber,
    pub lot: LotCode,
    pub file: NamedFile,
    pub sha256: String,
    pub method: String,
    pub z0_ohm: Option<f64>,
    pub dcr_ohm: Option<f64>,
    pub temperature_c: Option<f64>,
    pub operator: String,
    pub fixture_open: Option<NamedFile>,
    pub fixture_short: Option<NamedFile>,
    /// How the fixture sweeps are applied (`crate::jobs::engine::FixtureTopology::as_str`); `Some`
    /// exactly when both fixture files are.
    pub fixture_topology: Option<String>,
    pub points: usize,
    /// The effective fit options as canonical JSON.
    pub options_json: String,
    /// Identifies "the same fit of the same file": see [`crate::jobs::duplicate_key`].
    pub options_key: String,
}

/// The most fits queued or running at once, in all and per part.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct QueueBounds {
    pub all: i64,
    pub part: i64,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Uploaded {
    pub fit_id: i64,
    pub sweep_id: i64,
    /// True when the same file was already uploaded for this part with the same options: nothing new
    /// was stored and the answer points at the existing fit.
    pub duplicate: bool,
}

/// What a worker needs to run a fit.
#[derive(Debug, Clone)]
pub struct JobInput {
    pub fit_id: i64,
    pub part_id: i64,
    pub file: NamedFile,
    pub method: String,
    pub z0_ohm: Option<f64>,
    pub fixture_open: Option<NamedFile>,
    pub fixture_short: Option<NamedFile>,
    pub fixture_topology: Option<String>,
    pub options_json: String,
}

/// The SQL of a [`JobInput`] (one bound parameter: the fit id, to be appended).
pub(crate) const JOB_INPUT_SELECT: &str = "SELECT f.fit_id, f.part_id, f.options_json, s.file_name, \
    s.file_bytes, s.method, s.z0_ohm, s.fixture_open_name, s.fixture_open_bytes, \
    s.fixture_short_name, s.fixture_short_bytes, s.fixture_topology \
    FROM fits f JOIN sweeps s ON s.sweep_id = f.sweep_id WHERE f.fit_id = ";

/// A [`JOB_INPUT_SELECT`] row (of either backend).
pub(crate) fn job_input_from_row<'r, R>(row: &'r R) -> Result<JobInput, sqlx::Error>
where
    R: Row,
    &'r str: sqlx::ColumnIndex<R>,
    String: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
    Vec<u8>: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
    i64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
    f64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
{
    Ok(JobInput {
        fit_id: row.try_get("fit_id")?,
        part_id: row.try_get("part_id")?,
        file: NamedFile {
            name: row.try_get("file_name")?,
            bytes: row.try_get("file_bytes")?,
        },
        method: row.try_get("method")?,
        z0_ohm: row.try_get("z0_ohm")?,
        fixture_open: named(
            row.try_get("fixture_open_name")?,
            row.try_get("fixture_open_bytes")?,
        ),
        fixture_short: named(
            row.try_get("fixture_short_name")?,
            row.try_get("fixture_short_bytes")?,
        ),
        fixture_topology: row.try_get("fixture_topology")?,
        options_json: row.try_get("options_json")?,
    })
}

/// The refusal of an upload for a part that does not exist.
pub(crate) fn no_part_to_upload_to(part_number: &PartNumber) -> StoreError {
    StoreError::Invalid(format!(
        "no part {part_number}: an engineer creates the part before sweeps are uploaded"
    ))
}

/// The audit reason of an upload: the file and its lot.
pub(crate) fn upload_reason(new: &NewSweep) -> String {
    format!("{} (lot {})", new.file.name, new.lot)
}

/// The answer for a sweep id no sweep has.
pub(crate) fn no_sweep(sweep_id: i64) -> StoreError {
    StoreError::NotFound(format!("no sweep {sweep_id}"))
}

/// [`StoreError::QueueFull`] when `all` (queued or running fits of every part) or `part` (of the
/// part) is at its bound.
pub(crate) fn within_bounds(b: QueueBounds, all: i64, part: i64) -> StoreResult<()> {
    if all >= b.all {
        return Err(StoreError::QueueFull {
            part: false,
            queued: all,
        });
    }
    if part >= b.part {
        return Err(StoreError::QueueFull {
            part: true,
            queued: part,
        });
    }
    Ok(())
}

fn named(name: Option<String>, bytes: Option<Vec<u8>>) -> Option<NamedFile> {
    match (name, bytes) {
        (Some(name), Some(bytes)) => Some(NamedFile { name, bytes }),
        _ => None,
    }
}

impl Store {
    /// Stores the sweep, queues its first fit and records the upload, all in one transaction; or
    /// returns the existing fit for a duplicate.
    pub async fn upload(&self, actor: &str, new: NewSweep) -> StoreResult<Uploaded> {
        self.upload_bounded(actor, new, None).await
    }

    /// As [`Store::upload`], refusing with [`StoreError::QueueFull`] inside the write when a new fit
    /// would exceed `bounds` (a duplicate is still answered), so concurrent uploads cannot overshoot.
    pub async fn upload_bounded(
        &self,
        actor: &str,
        new: NewSweep,
        bounds: Option<QueueBounds>,
    ) -> StoreResult<Uploaded> {
        let actor = actor.to_string();
        self.batch
            .submit(move |conn| {
                Box::pin(async move { upload_in(conn, &actor, &new, bounds).await })
            })
            .await
    }

    /// The uploaded file of a sweep, as uploaded.
    pub async fn sweep_file(&self, sweep_id: i64) -> StoreResult<NamedFile> {
        let row: Option<(String, Vec<u8>)> =
            sqlx::query_as("SELECT file_name, file_bytes FROM sweeps WHERE sweep_id = ?")
                .bind(sweep_id)
                .fetch_optional(&self.reader)
                .await?;
        row.map(|(name, bytes)| NamedFile { name, bytes })
            .ok_or_else(|| no_sweep(sweep_id))
    }

    /// Everything a worker needs for one fit.
    pub async fn job_input(&self, fit_id: i64) -> StoreResult<JobInput> {
        let row = sqlx::query(sqlx::AssertSqlSafe(format!("{JOB_INPUT_SELECT}?")))
            .bind(fit_id)
            .fetch_optional(&self.reader)
            .await?
            .ok_or_else(|| super::fits::no_fit(fit_id))?;
        Ok(job_input_from_row(&row)?)
    }
}

/// Inserts a queued fit and its job row.
pub(crate) async fn insert_fit(
    tx: &mut sqlx::SqliteConnection,
    sweep_id: i64,
    part_id: i64,
    lot_id: i64,
    revision: i64,
    options_json: &str,
    options_key: &str,
) -> StoreResult<i64> {
    let now = now_ms();
    let fit_id: i64 = sqlx::query(
        "INSERT INTO fits (sweep_id, part_id, lot_id, revision, status, options_json, options_key, \
         created_at_ms) VALUES (?, ?, ?, ?, 'queued', ?, ?, ?) RETURNING fit_id",
    )
    .bind(sweep_id)
    .bind(part_id)
    .bind(lot_id)
    .bind(revision)
    .bind(options_json)
    .bind(options_key)
    .bind(now)
    .fetch_one(&mut *tx)
    .await?
    .try_get(0)?;
    sqlx::query("INSERT INTO jobs (fit_id, state, enqueued_at_ms) VALUES (?, 'queued', ?)")
        .bind(fit_id)
        .bind(now)
        .execute(&mut *tx)
        .await?;
    Ok(fit_id)
}

/// The queued and running fits of every part and of the part `part` (an SQL expression: a column or
/// a parameter) as two columns: the status counts the triggers keep (0004), and the part's open fits
/// from their partial index (0014).
fn open_fits(part: &str) -> String {
    format!(
        "(SELECT COALESCE(SUM(fits), 0) FROM fit_status_counts \
         WHERE status IN ('queued', 'running')) AS open_all, \
         (SELECT COUNT(*) FROM fits WHERE part_id = {part} AND status IN ('queued', 'running')) \
         AS open_part"
    )
}

/// Refuses with [`StoreError::QueueFull`] when the queue, in all or for the part, is at its bound.
/// Called inside the transaction that adds the fit, so concurrent requests cannot together pass it.
pub(crate) async fn check_queue_bounds(
    conn: &mut sqlx::SqliteConnection,
    b: QueueBounds,
    part_id: i64,
) -> StoreResult<()> {
    let (all, part): (i64, i64) =
        sqlx::query_as(sqlx::AssertSqlSafe(format!("SELECT {}", open_fits("?"))))
            .bind(part_id)
            .fetch_one(&mut *conn)
            .await?;
    within_bounds(b, all, part)
}

/// What an upload finds before it writes: the part, the duplicate's fit and sweep (when there is
/// one), and the queued and running fits in all and of the part.
type UploadLook = (i64, Option<i64>, Option<i64>, i64, i64);

/// The body of [`Store::upload`], inside the caller's transaction.
async fn upload_in(
    conn: &mut sqlx::SqliteConnection,
    actor: &str,
    new: &NewSweep,
    bounds: Option<QueueBounds>,
) -> StoreResult<Uploaded> {
    // The part, the newest fit of the same file with the same options, and the open fits (in all
    // and of the part) in one statement: the writer's time is the service's narrowest point. In
    // descending order a missing fit (NULL) sorts last, so the first row has the newest duplicate.
    let found: Option<UploadLook> = sqlx::query_as(sqlx::AssertSqlSafe(format!(
        "SELECT p.part_id, f.fit_id, f.sweep_id, {} FROM parts p \
             LEFT JOIN sweeps s ON s.part_id = p.part_id AND s.sha256 = ? \
             LEFT JOIN fits f ON f.sweep_id = s.sweep_id AND f.options_key = ? \
             WHERE p.part_number = ? ORDER BY f.fit_id DESC LIMIT 1",
        open_fits("p.part_id")
    )))
    .bind(&new.sha256)
    .bind(&new.options_key)
    .bind(new.part_number.as_str())
    .fetch_optional(&mut *conn)
    .await?;
    let (part_id, existing, open_all, open_part) = match found {
        Some((part_id, Some(fit_id), Some(sweep_id), all, part)) => {
            (part_id, Some((fit_id, sweep_id)), all, part)
        }
        Some((part_id, _, _, all, part)) => (part_id, None, all, part),
        None => return Err(no_part_to_upload_to(&new.part_number)),
    };
    if let Some((fit_id, sweep_id)) = existing {
        return Ok(Uploaded {
            fit_id,
            sweep_id,
            duplicate: true,
        });
    }
    if let Some(b) = bounds {
        within_bounds(b, open_all, open_part)?;
    }
    let now = now_ms();
    let lot_id: i64 = sqlx::query_scalar(
        "INSERT INTO lots (part_id, lot) VALUES (?, ?) \
         ON CONFLICT (part_id, lot) DO UPDATE SET lot = excluded.lot RETURNING lot_id",
    )
    .bind(part_id)
    .bind(new.lot.as_str())
    .fetch_one(&mut *conn)
    .await?;
    let (open_name, open_bytes) = new
        .fixture_open
        .as_ref()
        .map(|f| (f.name.clone(), f.bytes.clone()))
        .unzip();
    let (short_name, short_bytes) = new
        .fixture_short
        .as_ref()
        .map(|f| (f.name.clone(), f.bytes.clone()))
        .unzip();
    let sweep_id: i64 = sqlx::query_scalar(
        "INSERT INTO sweeps (part_id, lot_id, file_name, file_bytes, sha256, method, z0_ohm, \
         dcr_ohm, temperature_c, operator, fixture_open_name, fixture_open_bytes, \
         fixture_short_name, fixture_short_bytes, fixture_topology, points, uploaded_by, \
         uploaded_at_ms) \
         VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) RETURNING sweep_id",
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
    .fetch_one(&mut *conn)
    .await?;
    let fit_id = insert_fit(
        conn,
        sweep_id,
        part_id,
        lot_id,
        1,
        &new.options_json,
        &new.options_key,
    )
    .await?;
    audit(
        conn,
        actor,
        "sweep-uploaded",
        Some(part_id),
        Some(fit_id),
        Some(&upload_reason(new)),
    )
    .await?;
    Ok(Uploaded {
        fit_id,
        sweep_id,
        duplicate: false,
    })
}
