//! Bearer tokens: random, shown once at creation, stored only as their SHA-256.

use super::{Store, StoreResult, now_ms, sha256_hex};
use rand::RngCore;
use serde::{Deserialize, Serialize};

/// What a token may do; a higher role may do everything a lower one may.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize, utoipa::ToSchema,
)]
#[serde(rename_all = "snake_case")]
pub enum Role {
    /// Queries and status only (design tools, the dashboard).
    Reader,
    /// Also uploads sweeps, cancels and retries fits.
    Inspector,
    /// Also sets limits, approves, rejects and refits.
    Engineer,
}

impl Role {
    pub const ALL: [Role; 3] = [Role::Reader, Role::Inspector, Role::Engineer];

    pub fn as_str(self) -> &'static str {
        match self {
            Role::Reader => "reader",
            Role::Inspector => "inspector",
            Role::Engineer => "engineer",
        }
    }

    pub fn parse(text: &str) -> Option<Role> {
        Role::ALL.into_iter().find(|r| r.as_str() == text)
    }
}

/// Who is calling: the token's id, role and label (the label is the actor in the audit trail).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Caller {
    pub token_id: i64,
    pub role: Role,
    pub label: String,
}

/// A token as `henrybook token list` shows it (never the token itself: only its hash is stored).
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct TokenInfo {
    pub token_id: i64,
    pub role: Role,
    pub label: String,
    pub created_at_ms: i64,
    pub revoked_at_ms: Option<i64>,
}

/// Prefix that makes a henrybook token recognisable in logs and secret scanners.
const PREFIX: &str = "hbk_";

impl Store {
    /// Creates a token and returns it in plain text; only its hash is kept.
    pub async fn create_token(
        &self,
        role: Role,
        label: Option<&str>,
    ) -> StoreResult<(i64, String)> {
        let mut raw = [0u8; 32];
        rand::rng().fill_bytes(&mut raw);
        let token = format!("{PREFIX}{}", hex::encode(raw));
        let mut tx = self.write().await?;
        let id: i64 = sqlx::query_scalar(
            "INSERT INTO tokens (token_sha256, role, label, created_at_ms) VALUES (?, ?, '', ?) RETURNING token_id",
        )
        .bind(sha256_hex(token.as_bytes()))
        .bind(role.as_str())
        .bind(now_ms())
        .fetch_one(&mut *tx)
        .await?;
        let label = match label {
            Some(l) if !l.trim().is_empty() => l.trim().to_string(),
            _ => format!("{}-{id}", role.as_str()),
        };
        sqlx::query("UPDATE tokens SET label = ? WHERE token_id = ?")
            .bind(&label)
            .bind(id)
            .execute(&mut *tx)
            .await?;
        tx.commit().await?;
        Ok((id, token))
    }

    /// Every token, oldest first, revoked ones included.
    pub async fn list_tokens(&self) -> StoreResult<Vec<TokenInfo>> {
        let rows: Vec<(i64, String, String, i64, Option<i64>)> = sqlx::query_as(
            "SELECT token_id, role, label, created_at_ms, revoked_at_ms FROM tokens ORDER BY token_id",
        )
        .fetch_all(&self.reader)
        .await?;
        Ok(rows
            .into_iter()
            .filter_map(|(token_id, role, label, created_at_ms, revoked_at_ms)| {
                Role::parse(&role).map(|role| TokenInfo {
                    token_id,
                    role,
                    label,
                    created_at_ms,
                    revoked_at_ms,
                })
            })
            .collect())
    }

    /// Revokes a token: from now on it authenticates nobody (a running service reads tokens on every
    /// request, so this holds at once). Recorded in the audit trail; revoking twice is a conflict.
    pub async fn revoke_token(&self, actor: &str, token_id: i64) -> StoreResult<TokenInfo> {
        let mut tx = self.write().await?;
        let row: Option<(String, String, i64, Option<i64>)> = sqlx::query_as(
            "SELECT role, label, created_at_ms, revoked_at_ms FROM tokens WHERE token_id = ?",
        )
        .bind(token_id)
        .fetch_optional(&mut *tx)
        .await?;
        let Some((role, label, created_at_ms, revoked)) = row else {
            return Err(super::StoreError::NotFound(format!("no token {token_id}")));
        };
        if revoked.is_some() {
            return Err(super::StoreError::Conflict(format!(
                "token {token_id} ({label}) is already revoked"
            )));
        }
        let now = now_ms();
        sqlx::query("UPDATE tokens SET revoked_at_ms = ? WHERE token_id = ?")
            .bind(now)
            .bind(token_id)
            .execute(&mut *tx)
            .await?;
        super::audit(
            &mut tx,
            actor,
            "token-revoked",
            None,
            None,
            Some(&format!("token {token_id} ({role}, {label})")),
        )
        .await?;
        tx.commit().await?;
        Ok(TokenInfo {
            token_id,
            role: Role::parse(&role).unwrap_or(Role::Reader),
            label,
            created_at_ms,
            revoked_at_ms: Some(now),
        })
    }

    /// The caller a presented token belongs to, or `None` for an unknown or revoked token.
    pub async fn authenticate(&self, token: &str) -> StoreResult<Option<Caller>> {
        let row: Option<(i64, String, String)> = sqlx::query_as(
            "SELECT token_id, role, label FROM tokens WHERE token_sha256 = ? AND revoked_at_ms IS NULL",
        )
        .bind(sha256_hex(token.as_bytes()))
        .fetch_optional(&self.reader)
        .await?;
        Ok(row.and_then(|(token_id, role, label)| {
            Role::parse(&role).map(|role| Caller {
                token_id,
                role,
                label,
            })
        }))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn a_revoked_token_authenticates_nobody_and_is_listed_as_revoked() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::open(&dir.path().join("t.db")).await.unwrap();
        let (id, token) = store
            .create_token(Role::Inspector, Some("bench 3"))
            .await
            .unwrap();
        let (_, other) = store.create_token(Role::Reader, None).await.unwrap();
        assert!(store.authenticate(&token).await.unwrap().is_some());
        let revoked = store.revoke_token("admin", id).await.unwrap();
        assert_eq!(revoked.label, "bench 3");
        assert!(store.authenticate(&token).await.unwrap().is_none());
        assert!(store.authenticate(&other).await.unwrap().is_some());
        let list = store.list_tokens().await.unwrap();
        assert_eq!(list.len(), 2);
        assert!(list[0].revoked_at_ms.is_some() && list[1].revoked_at_ms.is_none());
        assert!(matches!(
            store.revoke_token("admin", id).await,
            Err(crate::store::StoreError::Conflict(_))
        ));
        assert!(matches!(
            store.revoke_token("admin", 999).await,
            Err(crate::store::StoreError::NotFound(_))
        ));
        // The revocation is in the audit trail, and the chain still holds.
        assert!(store.verify_integrity().await.unwrap().ok());
    }
    use crate::store::testing::temp_store;

    #[tokio::test]
    async fn a_token_is_stored_only_as_its_hash_and_authenticates() {
        let (store, _dir) = temp_store().await;
        let (id, token) = store.create_token(Role::Inspector, None).await.unwrap();
        assert!(token.starts_with("hbk_") && token.len() == 4 + 64);
        let stored: String = sqlx::query_scalar("SELECT token_sha256 FROM tokens")
            .fetch_one(&store.reader)
            .await
            .unwrap();
        assert_ne!(stored, token);
        assert_eq!(stored, sha256_hex(token.as_bytes()));
        let caller = store.authenticate(&token).await.unwrap().unwrap();
        assert_eq!(caller.token_id, id);
        assert_eq!(caller.role, Role::Inspector);
        assert_eq!(caller.label, format!("inspector-{id}"));
        assert_eq!(store.authenticate("hbk_nope").await.unwrap(), None);
    }

    #[test]
    fn roles_are_ordered_reader_inspector_engineer() {
        assert!(Role::Reader < Role::Inspector && Role::Inspector < Role::Engineer);
        assert_eq!(Role::parse("engineer"), Some(Role::Engineer));
        assert_eq!(Role::parse("admin"), None);
    }
}
