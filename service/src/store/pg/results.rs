//! A succeeded fit's result on PostgreSQL: the report with its figures, grid, resonances, verdict and
//! drift, written only while the worker's claim holds; what [`crate::store::Store::complete_succeeded`]
//! writes on SQLite, for claims of [`super::queue`].
//!
//! One transaction: the job is marked done (if the claim still holds: jobs first, as in the queue),
//! then the part's row is locked before its limits and baseline are read, so an approval or a change
//! of limits on another replica is either committed before (and the fit is judged against it) or waits
//! for this commit (and re-judges the fit itself). Then the fit row, the grid and the resonances (one
//! statement each) and the audit row, last.

use super::PgStore;
use super::audit::{self, Entry};
use super::parts::lock_part_id;
use super::queue::Claim;
use crate::fit::FitReport;
use crate::registry::assessment::{Assessment, Basis, judge};
use crate::store::jobs::WORKER_ACTOR;
use crate::store::parts::{LIMIT_COLUMNS, limits_from_row};
use crate::store::{StoreResult, now_ms};
use sqlx::{PgConnection, Row};

/// The part of a fit with what its result is judged against.
async fn basis_of(conn: &mut PgConnection, fit_id: i64) -> StoreResult<(i64, Basis)> {
    let row = sqlx::query(sqlx::AssertSqlSafe(format!(
        "SELECT part_id, baseline_fit_id, {LIMIT_COLUMNS} FROM parts \
         WHERE part_id = (SELECT part_id FROM fits WHERE fit_id = $1)"
    )))
    .bind(fit_id)
    .fetch_one(&mut *conn)
    .await?;
    Ok((
        row.try_get("part_id")?,
        Basis {
            limits: limits_from_row(&row)?,
            baseline_fit_id: row.try_get("baseline_fit_id")?,
        },
    ))
}

/// The baseline's report of a part, if it has one.
pub(crate) async fn baseline_report(
    conn: &mut PgConnection,
    part_id: i64,
) -> StoreResult<Option<(i64, FitReport)>> {
    let row: Option<(i64, String)> = sqlx::query_as(
        "SELECT f.fit_id, f.report_json FROM parts p JOIN fits f ON f.fit_id = p.baseline_fit_id \
         WHERE p.part_id = $1 AND f.report_json IS NOT NULL",
    )
    .bind(part_id)
    .fetch_optional(&mut *conn)
    .await?;
    Ok(match row {
        Some((id, json)) => Some((id, serde_json::from_str(&json)?)),
        None => None,
    })
}

impl PgStore {
    /// What a succeeded fit of `fit_id` will be judged against, with the baseline's stored report;
    /// read without locks, before the result is written ([`PgStore::complete_succeeded`] checks it).
    pub async fn assessment_basis(&self, fit_id: i64) -> StoreResult<(Basis, Option<String>)> {
        let mut conn = self.pool.acquire().await?;
        let (_, basis) = basis_of(&mut conn, fit_id).await?;
        let baseline_json = match basis.baseline_fit_id {
            Some(id) => sqlx::query_scalar::<_, Option<String>>(
                "SELECT report_json FROM fits WHERE fit_id = $1",
            )
            .bind(id)
            .fetch_optional(&mut *conn)
            .await?
            .flatten(),
            None => None,
        };
        Ok((basis, baseline_json))
    }

    /// Writes a succeeded fit with its figures, verdict and drift if the claim still holds; false
    /// (nothing written) when it does not. Judged again here when the part's limits or baseline
    /// changed since the assessment.
    pub async fn complete_succeeded(
        &self,
        claim: &Claim,
        report: &FitReport,
        assessment: &Assessment,
    ) -> StoreResult<bool> {
        let mut tx = self.pool.begin().await?;
        let held = sqlx::query(
            "UPDATE jobs SET state = 'done', lease_until_ms = NULL \
             WHERE fit_id = $1 AND claim_token = $2 AND state = 'running'",
        )
        .bind(claim.fit_id)
        .bind(claim.token)
        .execute(&mut *tx)
        .await?
        .rows_affected()
            == 1;
        if !held {
            return Ok(false);
        }
        let part_id: i64 = sqlx::query_scalar("SELECT part_id FROM fits WHERE fit_id = $1")
            .bind(claim.fit_id)
            .fetch_one(&mut *tx)
            .await?;
        lock_part_id(&mut tx, part_id).await?;
        let (_, current) = basis_of(&mut tx, claim.fit_id).await?;
        let rejudged;
        let judgement = if current == assessment.judgement.basis {
            &assessment.judgement
        } else {
            let baseline = baseline_report(&mut tx, part_id).await?;
            rejudged = judge(current, baseline.as_ref().map(|(_, r)| r), report)?;
            &rejudged
        };
        let figures = &assessment.figures;
        sqlx::query(
            "UPDATE fits SET status = 'succeeded', progress = 1, error = NULL, error_kind = NULL, \
             engine_version = $1, report_json = $2, finished_at_ms = $3, srf_hz = $4, \
             srf_above_hz = $5, l0_h = $6, rdc_ohm = $7, band_min_hz = $8, band_max_hz = $9, \
             verdict = $10, verdict_json = $11, drift_json = $12, drift_max_sigma = $13, \
             quality = $14, core_corner_hz = $15 WHERE fit_id = $16",
        )
        .bind(&report.engine_version)
        .bind(&assessment.report_json)
        .bind(now_ms())
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
        .execute(&mut *tx)
        .await?;
        let (kinds, frequencies): (Vec<&str>, Vec<f64>) = [
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
        .unzip();
        if !kinds.is_empty() {
            sqlx::query(
                "INSERT INTO fit_resonances (fit_id, kind, frequency_hz) \
                 SELECT $1, kind, frequency_hz FROM unnest($2::text[], $3::float8[]) \
                     AS r(kind, frequency_hz)",
            )
            .bind(claim.fit_id)
            .bind(&kinds)
            .bind(&frequencies)
            .execute(&mut *tx)
            .await?;
        }
        if !figures.grid.is_empty() {
            let g = &figures.grid;
            sqlx::query(
                "INSERT INTO fit_grid (fit_id, k, z_mag_ohm, l_eff_h, z_mag_floor_ohm, z_floor_at_hz) \
                 SELECT $1, k, z, l, zf, fa FROM unnest($2::bigint[], $3::float8[], $4::float8[], \
                                                         $5::float8[], $6::float8[]) \
                     AS g(k, z, l, zf, fa)",
            )
            .bind(claim.fit_id)
            .bind(g.iter().map(|p| p.k).collect::<Vec<_>>())
            .bind(g.iter().map(|p| p.z_mag_ohm).collect::<Vec<_>>())
            .bind(g.iter().map(|p| p.l_eff_h).collect::<Vec<_>>())
            .bind(g.iter().map(|p| p.z_mag_floor_ohm).collect::<Vec<_>>())
            .bind(g.iter().map(|p| p.z_floor_at_hz).collect::<Vec<_>>())
            .execute(&mut *tx)
            .await?;
        }
        sqlx::query(
            "UPDATE parts SET latest_fit_id = $1 WHERE part_id = $2 \
             AND (latest_fit_id IS NULL OR latest_fit_id < $1)",
        )
        .bind(claim.fit_id)
        .bind(part_id)
        .execute(&mut *tx)
        .await?;
        audit::append(
            &mut tx,
            &[Entry::new(
                WORKER_ACTOR,
                "fit-succeeded",
                Some(part_id),
                Some(claim.fit_id),
                None,
            )],
        )
        .await?;
        tx.commit().await?;
        Ok(true)
    }
}
