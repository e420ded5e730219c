//! Which PostgreSQL errors the store calls transient (`StoreError::is_transient`): the service
//! answers those with 503 and a Retry-After, and the worker tries a result write again, instead of
//! an internal error. Checked against the real server (the test database of
//! [`henrybook_tests::pg::TestDb`]).

use henrybook::store::StoreError;
use henrybook_tests::pg::TestDb;
use sqlx::Connection;

#[tokio::test]
async fn a_session_ended_by_the_server_is_transient_and_a_refusal_is_not() {
    let db = TestDb::new().await;
    // The server ends the session as it does on shutdown or a restart: SQLSTATE 57P01.
    let mut conn = sqlx::PgConnection::connect(&db.url).await.unwrap();
    let ended = sqlx::query("SELECT pg_terminate_backend(pg_backend_pid())")
        .execute(&mut conn)
        .await
        .unwrap_err();
    let code = ended
        .as_database_error()
        .and_then(|d| d.code())
        .map(|c| c.to_string());
    assert_eq!(code.as_deref(), Some("57P01"), "{ended}");
    assert!(StoreError::Database(ended).is_transient());
    // After it, the connection is gone: an I/O error, also transient.
    let gone = sqlx::query("SELECT 1")
        .execute(&mut conn)
        .await
        .unwrap_err();
    assert!(StoreError::Database(gone).is_transient());

    // A constraint the data break is a refusal, not a passing state of the server.
    let refused =
        sqlx::query("INSERT INTO jobs (fit_id, state, enqueued_at_ms) VALUES (1, 'queued', 0)")
            .execute(&db.pool)
            .await
            .unwrap_err();
    assert!(!StoreError::Database(refused).is_transient());
    // So is an unknown table (42P01) and a permission refusal (42501, whose number ends in the
    // same byte as SQLite's SQLITE_BUSY: the check must know which database spoke).
    let unknown = sqlx::query("SELECT * FROM no_such_table")
        .execute(&db.pool)
        .await
        .unwrap_err();
    assert!(!StoreError::Database(unknown).is_transient());
    sqlx::query("CREATE ROLE hb_no_rights NOLOGIN")
        .execute(&db.pool)
        .await
        .ok();
    let mut tx = db.pool.begin().await.unwrap();
    sqlx::query("SET LOCAL ROLE hb_no_rights")
        .execute(&mut *tx)
        .await
        .unwrap();
    let denied = sqlx::query("SELECT * FROM jobs")
        .execute(&mut *tx)
        .await
        .unwrap_err();
    let code = denied
        .as_database_error()
        .and_then(|d| d.code())
        .map(|c| c.to_string());
    assert_eq!(code.as_deref(), Some("42501"), "{denied}");
    assert!(!StoreError::Database(denied).is_transient());
    drop(tx);
    sqlx::query("DROP ROLE IF EXISTS hb_no_rights")
        .execute(&db.pool)
        .await
        .ok();
}
