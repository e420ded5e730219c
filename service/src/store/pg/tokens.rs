//! Bearer tokens on PostgreSQL: the operations of [`crate::store::tokens`] with the same answers and
//! errors (only the SHA-256 is stored; a token's last use is written at most once a minute, and a
//! failure of that write never fails the request).

use super::PgStore;
use super::audit::{self, Entry};
use crate::store::token_file::{self, FileToken, STORED_COLUMNS, Step, StoredToken, TokenSync};
use crate::store::tokens::stored_token;
use crate::store::tokens::{
    Caller, LAST_USED_RESOLUTION_MS, Role, TOKEN_COLUMNS, TokenInfo, TokenRow, already_revoked,
    caller_of, label_or_default, new_token, no_token, revoked_reason, token_info,
};
use crate::store::{StoreResult, now_ms, sha256_hex};

/// The advisory lock key a tokens-file sync holds until it commits.
pub const TOKEN_SYNC_LOCK: i64 = 0x6862_746f_6b65_6e73;

impl PgStore {
    /// Creates a token and returns it in plain text; only its hash is kept.
    pub async fn create_token(
        &self,
        role: Role,
        label: Option<&str>,
    ) -> StoreResult<(i64, String)> {
        let token = new_token();
        let mut tx = self.pool.begin().await?;
        let id: i64 = sqlx::query_scalar(
            "INSERT INTO tokens (token_sha256, role, label, created_at_ms) VALUES ($1, $2, '', $3) \
             RETURNING token_id",
        )
        .bind(sha256_hex(token.as_bytes()))
        .bind(role.as_str())
        .bind(now_ms())
        .fetch_one(&mut *tx)
        .await?;
        sqlx::query("UPDATE tokens SET label = $1 WHERE token_id = $2")
            .bind(label_or_default(label, role, id))
            .bind(id)
            .execute(&mut *tx)
            .await?;
        tx.commit().await?;
        Ok((id, token))
    }

    /// Every token, oldest first, revoked ones included.
    pub async fn list_tokens(&self) -> StoreResult<Vec<TokenInfo>> {
        let rows: Vec<TokenRow> = sqlx::query_as(sqlx::AssertSqlSafe(format!(
            "SELECT {TOKEN_COLUMNS} FROM tokens ORDER BY token_id"
        )))
        .fetch_all(&self.pool)
        .await?;
        Ok(rows.into_iter().filter_map(token_info).collect())
    }

    /// Revokes a token (recorded in the audit trail); revoking twice is a conflict. The row is
    /// locked, so two replicas revoking it at once record one revocation.
    pub async fn revoke_token(&self, actor: &str, token_id: i64) -> StoreResult<TokenInfo> {
        let mut tx = self.pool.begin().await?;
        let row: Option<TokenRow> = sqlx::query_as(sqlx::AssertSqlSafe(format!(
            "SELECT {TOKEN_COLUMNS} FROM tokens WHERE token_id = $1 FOR UPDATE"
        )))
        .bind(token_id)
        .fetch_optional(&mut *tx)
        .await?;
        let Some((_, role, label, created_at_ms, last_used_at_ms, revoked, from_file)) = row else {
            return Err(no_token(token_id));
        };
        if revoked.is_some() {
            return Err(already_revoked(token_id, &label));
        }
        let now = now_ms();
        sqlx::query("UPDATE tokens SET revoked_at_ms = $1 WHERE token_id = $2")
            .bind(now)
            .bind(token_id)
            .execute(&mut *tx)
            .await?;
        audit::append(
            &mut tx,
            &[Entry::new(
                actor,
                "token-revoked",
                None,
                None,
                Some(&revoked_reason(token_id, &role, &label)),
            )],
        )
        .await?;
        tx.commit().await?;
        Ok(TokenInfo {
            token_id,
            role: Role::parse(&role).unwrap_or(Role::Reader),
            label,
            created_at_ms,
            last_used_at_ms,
            revoked_at_ms: Some(now),
            from_file,
        })
    }

    /// Makes the tokens agree with a tokens file's, as on SQLite
    /// ([`crate::store::Store::sync_tokens`]). The transaction holds [`TOKEN_SYNC_LOCK`], so replicas
    /// that start together with the same file apply it once between them.
    pub async fn sync_tokens(&self, actor: &str, file: &[FileToken]) -> StoreResult<TokenSync> {
        let mut tx = self.pool.begin().await?;
        sqlx::query("SELECT pg_advisory_xact_lock($1)")
            .bind(TOKEN_SYNC_LOCK)
            .execute(&mut *tx)
            .await?;
        let stored: Vec<StoredToken> = sqlx::query_as(sqlx::AssertSqlSafe(format!(
            "SELECT {STORED_COLUMNS} FROM tokens ORDER BY token_id"
        )))
        .fetch_all(&mut *tx)
        .await?
        .into_iter()
        .map(stored_token)
        .collect();
        let (steps, report) = token_file::plan(file, &stored);
        let now = now_ms();
        let mut entries = Vec::new();
        for step in steps {
            let mut added_id = 0;
            match &step {
                Step::Add(entry) => {
                    added_id = sqlx::query_scalar(
                        "INSERT INTO tokens (token_sha256, role, label, created_at_ms, from_file) \
                         VALUES ($1, $2, $3, $4, TRUE) RETURNING token_id",
                    )
                    .bind(&entry.sha256)
                    .bind(entry.role.as_str())
                    .bind(&entry.label)
                    .bind(now)
                    .fetch_one(&mut *tx)
                    .await?;
                }
                Step::Change {
                    token_id,
                    role,
                    label,
                    ..
                } => {
                    sqlx::query(
                        "UPDATE tokens SET role = $1, label = $2, from_file = TRUE \
                         WHERE token_id = $3",
                    )
                    .bind(role.as_str())
                    .bind(label)
                    .bind(token_id)
                    .execute(&mut *tx)
                    .await?;
                }
                Step::Revoke { token_id, .. } => {
                    sqlx::query("UPDATE tokens SET revoked_at_ms = $1 WHERE token_id = $2")
                        .bind(now)
                        .bind(token_id)
                        .execute(&mut *tx)
                        .await?;
                }
            }
            let (action, reason) = step.audit(added_id);
            entries.push(Entry::new(actor, action, None, None, Some(&reason)));
        }
        audit::append(&mut tx, &entries).await?;
        tx.commit().await?;
        Ok(report)
    }

    /// The caller a presented token belongs to, or `None` for an unknown or revoked token; its last
    /// use is recorded as on SQLite ([`crate::store::Store::authenticate`]).
    pub async fn authenticate(&self, token: &str) -> StoreResult<Option<Caller>> {
        let row: Option<(i64, String, String, Option<i64>)> = sqlx::query_as(
            "SELECT token_id, role, label, last_used_at_ms FROM tokens \
             WHERE token_sha256 = $1 AND revoked_at_ms IS NULL",
        )
        .bind(sha256_hex(token.as_bytes()))
        .fetch_optional(&self.pool)
        .await?;
        let now = now_ms();
        let Some((caller, record)) = row.and_then(|r| caller_of(r, now)) else {
            return Ok(None);
        };
        if record && let Err(e) = self.record_token_use(caller.token_id, now).await {
            let token_id = caller.token_id;
            tracing::warn!(token_id, error = %e, "cannot record when the token was last used");
        }
        Ok(Some(caller))
    }

    /// Sets a token's last use unless another request did within the last minute (the condition is
    /// in the UPDATE, so requests on several replicas at once write once).
    async fn record_token_use(&self, token_id: i64, now_ms: i64) -> StoreResult<()> {
        sqlx::query(
            "UPDATE tokens SET last_used_at_ms = $1 WHERE token_id = $2 \
             AND (last_used_at_ms IS NULL OR last_used_at_ms < $3)",
        )
        .bind(now_ms)
        .bind(token_id)
        .bind(now_ms - LAST_USED_RESOLUTION_MS)
        .execute(&self.pool)
        .await?;
        Ok(())
    }
}
