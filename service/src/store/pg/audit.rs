//! The audit trail on PostgreSQL, chained as on SQLite ([`crate::store::integrity`]: the same
//! [`row_hash`] over the same columns, so one check reads both).
//!
//! Several replicas append at once, and a chain needs one order. Every append takes a transaction-level
//! advisory lock ([`AUDIT_LOCK`]) and holds it until its transaction ends, then reads the newest row
//! and writes the next ids: appends are serialised, ids follow commit order, and a rolled-back append
//! leaves no gap. To keep that lock short and free of waits, the audit rows of a transaction are
//! written last, all in one call to [`append`], after every other row the transaction changes: a
//! holder of the lock then waits for nothing but its commit, so the lock cannot take part in a
//! deadlock. The cost: audited writes of all replicas commit one after the other.

use crate::store::integrity::{AuditRow, GENESIS, row_hash};
use crate::store::{StoreError, StoreResult, now_ms, sha256_hex};
use sqlx::PgConnection;
use std::collections::HashMap;

/// The advisory lock key every audit append holds until its transaction ends.
pub const AUDIT_LOCK: i64 = 0x6862_6175_6469_7400;

/// One audit entry to append: who did what, about which part and fit, and why.
#[derive(Debug, Clone)]
pub struct Entry {
    pub actor: String,
    pub action: String,
    pub part_id: Option<i64>,
    pub fit_id: Option<i64>,
    pub reason: Option<String>,
}

impl Entry {
    pub fn new(
        actor: &str,
        action: &str,
        part_id: Option<i64>,
        fit_id: Option<i64>,
        reason: Option<&str>,
    ) -> Entry {
        Entry {
            actor: actor.to_string(),
            action: action.to_string(),
            part_id,
            fit_id,
            reason: reason.map(str::to_owned),
        }
    }
}

/// Appends `entries`, in order, as chained audit rows inside the caller's transaction; the last
/// thing the transaction writes (see the module notes). Four statements however many entries.
pub async fn append(conn: &mut PgConnection, entries: &[Entry]) -> StoreResult<()> {
    if entries.is_empty() {
        return Ok(());
    }
    sqlx::query("SELECT pg_advisory_xact_lock($1)")
        .bind(AUDIT_LOCK)
        .execute(&mut *conn)
        .await?;
    // Read after the lock is held: in READ COMMITTED each statement sees every commit before it.
    let last: Option<(i64, Option<String>)> =
        sqlx::query_as("SELECT audit_id, hash FROM audit ORDER BY audit_id DESC LIMIT 1")
            .fetch_optional(&mut *conn)
            .await?;
    let (mut id, mut prev) = match last {
        Some((id, Some(h))) => (id, h),
        // Rows are only ever written here, chained; an unsealed one was written around the store.
        Some((id, None)) => {
            return Err(StoreError::Invalid(format!(
                "audit row {id} is not sealed into the chain"
            )));
        }
        None => (0, GENESIS.to_string()),
    };
    let fit_ids: Vec<i64> = entries.iter().filter_map(|e| e.fit_id).collect();
    let reports: HashMap<i64, String> = if fit_ids.is_empty() {
        HashMap::new()
    } else {
        sqlx::query_as::<_, (i64, String)>(
            "SELECT fit_id, report_json FROM fits \
             WHERE fit_id = ANY($1) AND report_json IS NOT NULL",
        )
        .bind(&fit_ids)
        .fetch_all(&mut *conn)
        .await?
        .into_iter()
        .map(|(id, r)| (id, sha256_hex(r.as_bytes())))
        .collect()
    };
    let at_ms = now_ms();
    let n = entries.len();
    let (mut ids, mut ats, mut actors, mut actions) = (
        Vec::with_capacity(n),
        Vec::with_capacity(n),
        Vec::with_capacity(n),
        Vec::with_capacity(n),
    );
    let (mut parts, mut fits, mut reasons, mut results, mut prevs, mut hashes) = (
        Vec::with_capacity(n),
        Vec::with_capacity(n),
        Vec::with_capacity(n),
        Vec::with_capacity(n),
        Vec::with_capacity(n),
        Vec::with_capacity(n),
    );
    for e in entries {
        id += 1;
        let row = AuditRow {
            audit_id: id,
            at_ms,
            actor: e.actor.clone(),
            action: e.action.clone(),
            part_id: e.part_id,
            fit_id: e.fit_id,
            reason: e.reason.clone(),
            result_sha256: e.fit_id.and_then(|f| reports.get(&f).cloned()),
        };
        let hash = row_hash(&prev, &row);
        ids.push(row.audit_id);
        ats.push(row.at_ms);
        actors.push(row.actor);
        actions.push(row.action);
        parts.push(row.part_id);
        fits.push(row.fit_id);
        reasons.push(row.reason);
        results.push(row.result_sha256);
        prevs.push(std::mem::replace(&mut prev, hash.clone()));
        hashes.push(hash);
    }
    sqlx::query(
        "INSERT INTO audit (audit_id, at_ms, actor, action, part_id, fit_id, reason, result_sha256, \
                            prev_hash, hash) \
         SELECT * FROM unnest($1::bigint[], $2::bigint[], $3::text[], $4::text[], $5::bigint[], \
                              $6::bigint[], $7::text[], $8::text[], $9::text[], $10::text[])",
    )
    .bind(&ids)
    .bind(&ats)
    .bind(&actors)
    .bind(&actions)
    .bind(&parts)
    .bind(&fits)
    .bind(&reasons)
    .bind(&results)
    .bind(&prevs)
    .bind(&hashes)
    .execute(&mut *conn)
    .await?;
    Ok(())
}
