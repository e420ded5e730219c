//! Bearer tokens: random, shown once at creation, stored only as their SHA-256, with when each last
//! authenticated a request (to within a minute: see [`LAST_USED_RESOLUTION_MS`]).

use super::token_file::{self, FileToken, STORED_COLUMNS, Step, StoredToken, TokenSync};
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
    /// When the token last authenticated a request, to within a minute; `None` if it never has (or
    /// not since this was recorded).
    pub last_used_at_ms: Option<i64>,
    pub revoked_at_ms: Option<i64>,
    /// Whether the token came from a tokens file ([`super::token_file`]), which then governs it.
    pub from_file: bool,
}

/// A token's last use is written at most once per this many milliseconds: a request finds it older
/// than this before the write is made, so status polls do not write on every call.
pub const LAST_USED_RESOLUTION_MS: i64 = 60_000;

/// The columns of a [`TokenRow`], in its order (both backends).
pub(crate) const TOKEN_COLUMNS: &str =
    "token_id, role, label, created_at_ms, last_used_at_ms, revoked_at_ms, from_file";

/// A token's row as [`TOKEN_COLUMNS`] reads it.
pub(crate) type TokenRow = (i64, String, String, i64, Option<i64>, Option<i64>, bool);

/// Prefix that makes a henrybook token recognisable in logs and secret scanners.
const PREFIX: &str = "hbk_";

/// A new random token in plain text.
pub(crate) fn new_token() -> String {
    let mut raw = [0u8; 32];
    rand::rng().fill_bytes(&mut raw);
    format!("{PREFIX}{}", hex::encode(raw))
}

/// The label given, trimmed, or `<role>-<id>` when none (or only blanks) was.
pub(crate) fn label_or_default(label: Option<&str>, role: Role, id: i64) -> String {
    match label {
        Some(l) if !l.trim().is_empty() => l.trim().to_string(),
        _ => format!("{}-{id}", role.as_str()),
    }
}

/// A token's row as `henrybook token list` shows it; `None` for a role this build does not know.
pub(crate) fn token_info(row: TokenRow) -> Option<TokenInfo> {
    let (token_id, role, label, created_at_ms, last_used_at_ms, revoked_at_ms, from_file) = row;
    Role::parse(&role).map(|role| TokenInfo {
        token_id,
        role,
        label,
        created_at_ms,
        last_used_at_ms,
        revoked_at_ms,
        from_file,
    })
}

/// The row [`token_file::STORED_COLUMNS`] reads, as the sync takes it.
pub(crate) fn stored_token(
    (token_id, sha256, role, label, revoked, from_file): (i64, String, String, String, bool, bool),
) -> StoredToken {
    StoredToken {
        token_id,
        sha256,
        role,
        label,
        revoked,
        from_file,
    }
}

/// The answer for a token id no token has.
pub(crate) fn no_token(token_id: i64) -> super::StoreError {
    super::StoreError::NotFound(format!("no token {token_id}"))
}

/// The refusal of a second revocation.
pub(crate) fn already_revoked(token_id: i64, label: &str) -> super::StoreError {
    super::StoreError::Conflict(format!("token {token_id} ({label}) is already revoked"))
}

/// The audit reason of a revocation.
pub(crate) fn revoked_reason(token_id: i64, role: &str, label: &str) -> String {
    format!("token {token_id} ({role}, {label})")
}

/// The caller a token row (id, role, label, last use) names at `now` (ms), and whether its last use
/// is due to be written (older than [`LAST_USED_RESOLUTION_MS`]); `None` for a role no longer known.
/// Both backends authenticate through it.
pub(crate) fn caller_of(
    (token_id, role, label, last_used_at_ms): (i64, String, String, Option<i64>),
    now: i64,
) -> Option<(Caller, bool)> {
    let role = Role::parse(&role)?;
    let record = last_used_at_ms.is_none_or(|t| t < now - LAST_USED_RESOLUTION_MS);
    Some((
        Caller {
            token_id,
            role,
            label,
        },
        record,
    ))
}

impl Store {
    /// Creates a token and returns it in plain text; only its hash is kept.
    pub async fn create_token(
        &self,
        role: Role,
        label: Option<&str>,
    ) -> StoreResult<(i64, String)> {
        let token = new_token();
        let mut tx = self.write().await?;
        let id: i64 = sqlx::query_scalar(
            "INSERT INTO tokens (token_sha256, role, label, created_at_ms) VALUES (?, ?, '', ?) RETURNING token_id",
        )
        .bind(sha256_hex(token.as_bytes()))
        .bind(role.as_str())
        .bind(now_ms())
        .fetch_one(&mut *tx)
        .await?;
        let label = label_or_default(label, role, id);
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
        let rows: Vec<TokenRow> = sqlx::query_as(sqlx::AssertSqlSafe(format!(
            "SELECT {TOKEN_COLUMNS} FROM tokens ORDER BY token_id"
        )))
        .fetch_all(&self.reader)
        .await?;
        Ok(rows.into_iter().filter_map(token_info).collect())
    }

    /// Revokes a token: from now on it authenticates nobody (a running service reads tokens on every
    /// request, so this holds at once). Recorded in the audit trail; revoking twice is a conflict.
    pub async fn revoke_token(&self, actor: &str, token_id: i64) -> StoreResult<TokenInfo> {
        let mut tx = self.write().await?;
        let row: Option<TokenRow> = sqlx::query_as(sqlx::AssertSqlSafe(format!(
            "SELECT {TOKEN_COLUMNS} FROM tokens WHERE token_id = ?"
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
            Some(&revoked_reason(token_id, &role, &label)),
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

    /// Makes the tokens agree with a tokens file's (see [`super::token_file`]), in one transaction:
    /// adds, changes and revokes as [`token_file::plan`] says, each recorded in the audit trail
    /// under `actor`.
    pub async fn sync_tokens(&self, actor: &str, file: &[FileToken]) -> StoreResult<TokenSync> {
        let mut tx = self.write().await?;
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
        for step in steps {
            let mut added_id = 0;
            match &step {
                Step::Add(entry) => {
                    added_id = sqlx::query_scalar(
                        "INSERT INTO tokens (token_sha256, role, label, created_at_ms, from_file) \
                         VALUES (?, ?, ?, ?, 1) RETURNING token_id",
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
                        "UPDATE tokens SET role = ?, label = ?, from_file = 1 WHERE token_id = ?",
                    )
                    .bind(role.as_str())
                    .bind(label)
                    .bind(token_id)
                    .execute(&mut *tx)
                    .await?;
                }
                Step::Revoke { token_id, .. } => {
                    sqlx::query("UPDATE tokens SET revoked_at_ms = ? WHERE token_id = ?")
                        .bind(now)
                        .bind(token_id)
                        .execute(&mut *tx)
                        .await?;
                }
            }
            let (action, reason) = step.audit(added_id);
            super::audit(&mut tx, actor, action, None, None, Some(&reason)).await?;
        }
        tx.commit().await?;
        Ok(report)
    }

    /// The caller a presented token belongs to, or `None` for an unknown or revoked token. A token
    /// that authenticates has its last use recorded when the stored time is older than
    /// [`LAST_USED_RESOLUTION_MS`]; a failure of that write is logged and does not fail the caller.
    pub async fn authenticate(&self, token: &str) -> StoreResult<Option<Caller>> {
        let row: Option<(i64, String, String, Option<i64>)> = sqlx::query_as(
            "SELECT token_id, role, label, last_used_at_ms FROM tokens \
             WHERE token_sha256 = ? AND revoked_at_ms IS NULL",
        )
        .bind(sha256_hex(token.as_bytes()))
        .fetch_optional(&self.reader)
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

    /// Sets a token's last use to `now_ms` unless another request did within the last minute (the
    /// condition is in the UPDATE, so requests arriving together write once).
    async fn record_token_use(&self, token_id: i64, now_ms: i64) -> StoreResult<()> {
        sqlx::query(
            "UPDATE tokens SET last_used_at_ms = ? WHERE token_id = ? \
             AND (last_used_at_ms IS NULL OR last_used_at_ms < ?)",
        )
        .bind(now_ms)
        .bind(token_id)
        .bind(now_ms - LAST_USED_RESOLUTION_MS)
        .execute(&self.writer)
        .await?;
        Ok(())
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

    async fn last_used(store: &Store, token_id: i64) -> Option<i64> {
        let list = store.list_tokens().await.unwrap();
        list.iter()
            .find(|t| t.token_id == token_id)
            .unwrap()
            .last_used_at_ms
    }

    async fn set_last_used(store: &Store, token_id: i64, at_ms: i64) {
        sqlx::query("UPDATE tokens SET last_used_at_ms = ? WHERE token_id = ?")
            .bind(at_ms)
            .bind(token_id)
            .execute(&store.writer)
            .await
            .unwrap();
    }

    #[tokio::test]
    async fn a_token_records_its_last_use_at_most_once_a_minute() {
        let (store, _dir) = temp_store().await;
        let (id, token) = store.create_token(Role::Reader, None).await.unwrap();
        let (unused, _) = store.create_token(Role::Engineer, None).await.unwrap();
        assert_eq!(last_used(&store, id).await, None);

        let before = now_ms();
        assert!(store.authenticate(&token).await.unwrap().is_some());
        let first = last_used(&store, id).await.expect("set by the first use");
        assert!((before..=now_ms()).contains(&first), "{first}");

        // Used 30 s ago: another request within the minute does not write it again.
        set_last_used(&store, id, first - 30_000).await;
        assert!(store.authenticate(&token).await.unwrap().is_some());
        assert_eq!(last_used(&store, id).await, Some(first - 30_000));

        // Used more than a minute ago: the next request writes it.
        set_last_used(&store, id, first - LAST_USED_RESOLUTION_MS - 1_000).await;
        let before = now_ms();
        assert!(store.authenticate(&token).await.unwrap().is_some());
        let again = last_used(&store, id).await.unwrap();
        assert!((before..=now_ms()).contains(&again), "{again}");

        // An unknown token writes nothing; the unused token was never used.
        assert!(store.authenticate("hbk_nope").await.unwrap().is_none());
        assert_eq!(last_used(&store, unused).await, None);
    }

    /// Log lines written by a `tracing` subscriber, for the test that reads them.
    #[derive(Clone, Default)]
    struct Captured(std::sync::Arc<std::sync::Mutex<Vec<u8>>>);

    impl std::io::Write for Captured {
        fn write(&mut self, bytes: &[u8]) -> std::io::Result<usize> {
            self.0.lock().unwrap().extend_from_slice(bytes);
            Ok(bytes.len())
        }
        fn flush(&mut self) -> std::io::Result<()> {
            Ok(())
        }
    }

    #[tokio::test]
    async fn a_failed_write_of_the_last_use_is_logged_and_the_token_still_authenticates() {
        let (store, _dir) = temp_store().await;
        let (id, token) = store.create_token(Role::Inspector, None).await.unwrap();
        // Every write of the column fails, as it would on a read-only database.
        sqlx::query(
            "CREATE TRIGGER tokens_last_used_frozen BEFORE UPDATE OF last_used_at_ms ON tokens \
             BEGIN SELECT RAISE(ABORT, 'attempt to write a readonly database'); END",
        )
        .execute(&store.writer)
        .await
        .unwrap();
        let log = Captured::default();
        let writer = log.clone();
        let subscriber = tracing_subscriber::fmt()
            .with_max_level(tracing::Level::WARN)
            .with_ansi(false)
            .with_writer(move || writer.clone())
            .finish();
        // The test runtime has one thread: the subscriber sees everything `authenticate` logs.
        let guard = tracing::subscriber::set_default(subscriber);
        let caller = store.authenticate(&token).await.unwrap();
        drop(guard);
        assert_eq!(caller.map(|c| c.token_id), Some(id));
        assert_eq!(last_used(&store, id).await, None);
        let log = String::from_utf8(log.0.lock().unwrap().clone()).unwrap();
        assert!(log.contains("WARN"), "{log}");
        assert!(
            log.contains("cannot record when the token was last used") && log.contains("readonly"),
            "{log}"
        );
    }

    #[test]
    fn roles_are_ordered_reader_inspector_engineer() {
        assert!(Role::Reader < Role::Inspector && Role::Inspector < Role::Engineer);
        assert_eq!(Role::parse("engineer"), Some(Role::Engineer));
        assert_eq!(Role::parse("admin"), None);
    }
}
