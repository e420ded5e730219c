//! Parts and their limits, lots, the baseline pointer and the part's audit trail.

use super::{Store, StoreError, StoreResult, audit, now_ms, rfc3339};
use crate::fit::FitReport;
use crate::registry::ids::PartNumber;
use crate::registry::limits::Limits;
use crate::registry::verdict;
use crate::registry::wire::{AuditEntry, Part};
use sqlx::Row;

pub(crate) const LIMIT_COLUMNS: &str = "l_nominal_h, l_test_frequency_hz, l_tolerance_percent, \
    dcr_max_ohm, srf_min_hz, q_min, q_test_frequency_hz, z_min_ohm, z_band_min_hz, z_band_max_hz, \
    core_corner_min_hz, core_corner_max_hz";

/// A part's limits in the order of [`LIMIT_COLUMNS`].
pub(crate) fn limit_values(l: &Limits) -> [Option<f64>; 12] {
    [
        l.l_nominal_h,
        l.l_test_frequency_hz,
        l.l_tolerance_percent,
        l.dcr_max_ohm,
        l.srf_min_hz,
        l.q_min,
        l.q_test_frequency_hz,
        l.z_min_ohm,
        l.z_band_min_hz,
        l.z_band_max_hz,
        l.core_corner_min_hz,
        l.core_corner_max_hz,
    ]
}

/// A part's limits from a row holding [`LIMIT_COLUMNS`] (of either backend).
pub(crate) fn limits_from_row<'r, R>(row: &'r R) -> Result<Limits, sqlx::Error>
where
    R: Row,
    &'r str: sqlx::ColumnIndex<R>,
    f64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
{
    Ok(Limits {
        l_nominal_h: row.try_get("l_nominal_h")?,
        l_test_frequency_hz: row.try_get("l_test_frequency_hz")?,
        l_tolerance_percent: row.try_get("l_tolerance_percent")?,
        dcr_max_ohm: row.try_get("dcr_max_ohm")?,
        srf_min_hz: row.try_get("srf_min_hz")?,
        q_min: row.try_get("q_min")?,
        q_test_frequency_hz: row.try_get("q_test_frequency_hz")?,
        z_min_ohm: row.try_get("z_min_ohm")?,
        z_band_min_hz: row.try_get("z_band_min_hz")?,
        z_band_max_hz: row.try_get("z_band_max_hz")?,
        core_corner_min_hz: row.try_get("core_corner_min_hz")?,
        core_corner_max_hz: row.try_get("core_corner_max_hz")?,
    })
}

/// An audit row as a part's trail shows it: at_ms, actor, action, fit_id, reason.
pub(crate) type AuditRow = (i64, String, String, Option<i64>, Option<String>);

/// A part's audit rows, oldest first, as the wire shows them.
pub(crate) fn audit_entries(rows: Vec<AuditRow>) -> Vec<AuditEntry> {
    rows.into_iter()
        .map(|(at, actor, action, fit_id, reason)| AuditEntry {
            at: rfc3339(at),
            actor,
            action,
            fit_id,
            reason,
        })
        .collect()
}

/// The refusal of a second part with the same number.
pub(crate) fn part_exists(part_number: &PartNumber) -> StoreError {
    StoreError::Conflict(format!("part {part_number} already exists"))
}

/// The answer for a part number no part has.
pub(crate) fn no_part(part_number: &PartNumber) -> StoreError {
    StoreError::NotFound(format!("no part {part_number}"))
}

#[derive(Debug, Clone)]
pub struct PartRow {
    pub part_id: i64,
    pub part_number: String,
    pub description: String,
    pub limits: Limits,
    pub baseline_fit_id: Option<i64>,
}

impl Store {
    pub async fn create_part(
        &self,
        actor: &str,
        part_number: &PartNumber,
        description: &str,
        limits: &Limits,
    ) -> StoreResult<()> {
        limits.validate().map_err(StoreError::Invalid)?;
        let mut tx = self.write().await?;
        let inserted = sqlx::query(sqlx::AssertSqlSafe(format!(
            "INSERT INTO parts (part_number, description, {LIMIT_COLUMNS}, created_at_ms) \
             VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) RETURNING part_id"
        )))
        .bind(part_number.as_str())
        .bind(description)
        .bind(limits.l_nominal_h)
        .bind(limits.l_test_frequency_hz)
        .bind(limits.l_tolerance_percent)
        .bind(limits.dcr_max_ohm)
        .bind(limits.srf_min_hz)
        .bind(limits.q_min)
        .bind(limits.q_test_frequency_hz)
        .bind(limits.z_min_ohm)
        .bind(limits.z_band_min_hz)
        .bind(limits.z_band_max_hz)
        .bind(limits.core_corner_min_hz)
        .bind(limits.core_corner_max_hz)
        .bind(now_ms())
        .fetch_one(&mut *tx)
        .await;
        let part_id: i64 = match inserted {
            Ok(row) => row.get(0),
            Err(sqlx::Error::Database(e)) if e.is_unique_violation() => {
                return Err(part_exists(part_number));
            }
            Err(e) => return Err(e.into()),
        };
        audit(&mut tx, actor, "part-created", Some(part_id), None, None).await?;
        tx.commit().await?;
        Ok(())
    }

    pub async fn part_row(&self, part_number: &PartNumber) -> StoreResult<PartRow> {
        let row = sqlx::query(sqlx::AssertSqlSafe(format!(
            "SELECT part_id, part_number, description, baseline_fit_id, {LIMIT_COLUMNS} \
             FROM parts WHERE part_number = ?"
        )))
        .bind(part_number.as_str())
        .fetch_optional(&self.reader)
        .await?
        .ok_or_else(|| no_part(part_number))?;
        Ok(PartRow {
            part_id: row.try_get("part_id")?,
            part_number: row.try_get("part_number")?,
            description: row.try_get("description")?,
            limits: limits_from_row(&row)?,
            baseline_fit_id: row.try_get("baseline_fit_id")?,
        })
    }

    pub async fn part(&self, part_number: &PartNumber) -> StoreResult<Part> {
        let p = self.part_row(part_number).await?;
        let lots: Vec<String> =
            sqlx::query_scalar("SELECT lot FROM lots WHERE part_id = ? ORDER BY lot")
                .bind(p.part_id)
                .fetch_all(&self.reader)
                .await?;
        let fits = self.fits_of_part(p.part_id, 500).await?;
        let audit_rows: Vec<AuditRow> = sqlx::query_as(
            "SELECT at_ms, actor, action, fit_id, reason FROM \
             (SELECT * FROM audit WHERE part_id = ? ORDER BY audit_id DESC LIMIT 500) \
             ORDER BY audit_id",
        )
        .bind(p.part_id)
        .fetch_all(&self.reader)
        .await?;
        Ok(Part {
            part_number: p.part_number,
            description: p.description,
            limits: p.limits,
            lots,
            baseline_fit_id: p.baseline_fit_id,
            fits,
            audit: audit_entries(audit_rows),
        })
    }

    /// Replaces a part's limits and re-judges every succeeded fit of the part against them.
    pub async fn update_limits(
        &self,
        actor: &str,
        part_number: &PartNumber,
        limits: &Limits,
    ) -> StoreResult<()> {
        limits.validate().map_err(StoreError::Invalid)?;
        let mut tx = self.write().await?;
        let part_id: i64 = sqlx::query_scalar("SELECT part_id FROM parts WHERE part_number = ?")
            .bind(part_number.as_str())
            .fetch_optional(&mut *tx)
            .await?
            .ok_or_else(|| no_part(part_number))?;
        sqlx::query(
            "UPDATE parts SET l_nominal_h = ?, l_test_frequency_hz = ?, l_tolerance_percent = ?, \
             dcr_max_ohm = ?, srf_min_hz = ?, q_min = ?, q_test_frequency_hz = ?, z_min_ohm = ?, \
             z_band_min_hz = ?, z_band_max_hz = ?, core_corner_min_hz = ?, core_corner_max_hz = ? \
             WHERE part_id = ?",
        )
        .bind(limits.l_nominal_h)
        .bind(limits.l_test_frequency_hz)
        .bind(limits.l_tolerance_percent)
        .bind(limits.dcr_max_ohm)
        .bind(limits.srf_min_hz)
        .bind(limits.q_min)
        .bind(limits.q_test_frequency_hz)
        .bind(limits.z_min_ohm)
        .bind(limits.z_band_min_hz)
        .bind(limits.z_band_max_hz)
        .bind(limits.core_corner_min_hz)
        .bind(limits.core_corner_max_hz)
        .bind(part_id)
        .execute(&mut *tx)
        .await?;
        let reports: Vec<(i64, String)> = sqlx::query_as(
            "SELECT fit_id, report_json FROM fits WHERE part_id = ? AND status = 'succeeded'",
        )
        .bind(part_id)
        .fetch_all(&mut *tx)
        .await?;
        for (fit_id, json) in reports {
            let (verdict, verdict_json) = verdict_of(limits, &json)?;
            sqlx::query("UPDATE fits SET verdict = ?, verdict_json = ? WHERE fit_id = ?")
                .bind(verdict)
                .bind(verdict_json)
                .bind(fit_id)
                .execute(&mut *tx)
                .await?;
        }
        let reason = serde_json::to_string(limits)?;
        audit(
            &mut tx,
            actor,
            "limits-changed",
            Some(part_id),
            None,
            Some(&reason),
        )
        .await?;
        tx.commit().await?;
        Ok(())
    }
}

/// A stored report judged against `limits`: the verdict and the checks as stored JSON.
pub(crate) fn verdict_of(
    limits: &Limits,
    report_json: &str,
) -> StoreResult<(Option<&'static str>, String)> {
    let report: FitReport = serde_json::from_str(report_json)?;
    let checks = verdict::checks(limits, &report);
    Ok((
        verdict::overall(&checks, &report),
        serde_json::to_string(&checks)?,
    ))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::testing::temp_store;

    #[tokio::test]
    async fn a_part_is_created_once_and_read_back_with_its_limits() {
        let (store, _dir) = temp_store().await;
        let limits = Limits {
            dcr_max_ohm: Some(0.05),
            ..Limits::default()
        };
        let pn = PartNumber::parse("PC-100").unwrap();
        store
            .create_part("eng", &pn, "choke", &limits)
            .await
            .unwrap();
        let again = store.create_part("eng", &pn, "choke", &limits).await;
        assert!(matches!(again, Err(StoreError::Conflict(_))));
        let p = store.part(&pn).await.unwrap();
        assert_eq!(p.limits, limits);
        assert_eq!(p.audit.len(), 1);
        assert_eq!(p.audit[0].action, "part-created");
        assert!(matches!(
            store.part(&PartNumber::parse("nope").unwrap()).await,
            Err(StoreError::NotFound(_))
        ));
    }
}
