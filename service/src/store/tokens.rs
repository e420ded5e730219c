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
