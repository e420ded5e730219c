//! The service with a tokens file (`--tokens-file`): its tokens authenticate from the start, a change
//! to the file reaches the running service, a broken change leaves the tokens as they were, and a
//! broken file stops the start before the database is touched.

use henrybook::jobs::CoreEngine;
use henrybook_tests::service::{TestDatabase, spawn_app_with};
use std::sync::Arc;
use std::time::{Duration, Instant};

/// The status `GET /api/v1/fits` answers with `token`.
async fn status(app: &henrybook_tests::service::TestApp, token: &str) -> u16 {
    app.get("/api/v1/fits", token).await.status().as_u16()
}

/// Waits (up to 10 s) until `token` is answered `expected`; panics with `what` otherwise.
async fn until_status(
    app: &henrybook_tests::service::TestApp,
    token: &str,
    expected: u16,
    what: &str,
) {
    let start = Instant::now();
    loop {
        let got = status(app, token).await;
        if got == expected {
            return;
        }
        assert!(
            start.elapsed() < Duration::from_secs(10),
            "{what}: still {got}"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

#[tokio::test]
async fn a_tokens_file_is_applied_at_start_and_followed_while_serving() {
    let database = TestDatabase::new().await;
    let file = database.dir.path().join("tokens");
    let [reader, inspector, engineer] = ["c3", "d4", "e5"].map(|d| d.repeat(32));
    std::fs::write(
        &file,
        format!("reader r {reader}\ninspector i {inspector}\nengineer e {engineer}\n"),
    )
    .unwrap();
    let mut settings = database.settings();
    settings.tokens_file = Some(file.clone());
    settings.tokens_file_recheck = Duration::from_millis(100);
    let tokens = [reader.clone(), inspector.clone(), engineer.clone()];
    let app = spawn_app_with(database, settings, Arc::new(CoreEngine), Some(tokens)).await;
    // Applied before the first request.
    assert_eq!(status(&app, &reader).await, 200);
    assert_eq!(status(&app, &"f6".repeat(32)).await, 401);

    // A new reader is added and the inspector dropped: both take effect without a restart.
    let newcomer = "f6".repeat(32);
    std::fs::write(
        &file,
        format!("reader r {reader}\nreader n {newcomer}\nengineer e {engineer}\n"),
    )
    .unwrap();
    until_status(&app, &newcomer, 200, "the added token").await;
    until_status(&app, &inspector, 401, "the dropped token").await;

    // A broken change is logged and changes nothing.
    std::fs::write(&file, format!("reader r {reader}\nreader short 12345\n")).unwrap();
    tokio::time::sleep(Duration::from_millis(400)).await;
    assert_eq!(
        status(&app, &newcomer).await,
        200,
        "the tokens stay as they were"
    );
    let tokens = app.store.list_tokens().await.unwrap();
    let revoked: Vec<&str> = tokens
        .iter()
        .filter(|t| t.revoked_at_ms.is_some())
        .map(|t| t.label.as_str())
        .collect();
    assert_eq!(revoked, ["i"]);
    assert!(tokens.iter().all(|t| t.from_file));
    // The audit trail names the file as the actor of each change: three tokens added at start, then
    // one added and one revoked.
    let mut raw = app.database.raw().await;
    let count = |action: &str| {
        format!("SELECT COUNT(*) FROM audit WHERE actor = 'tokens file' AND action = '{action}'")
    };
    assert_eq!(raw.fetch_i64(&count("token-added")).await.unwrap(), 4);
    assert_eq!(raw.fetch_i64(&count("token-revoked")).await.unwrap(), 1);
    raw.close().await;
    let audit = app.store.verify_integrity().await.unwrap();
    assert!(audit.ok(), "{:?}", audit.problems);
    app.stop().await;
}

#[tokio::test]
async fn a_broken_tokens_file_stops_the_start_and_leaves_the_database_alone() {
    let database = TestDatabase::new().await;
    let file = database.dir.path().join("tokens");
    std::fs::write(&file, "engineer lead replace-with-64-hex-digits\n").unwrap();
    let mut settings = database.settings();
    settings.tokens_file = Some(file.clone());
    let err = henrybook::app::Application::build(settings.clone())
        .await
        .err()
        .expect("the start is refused");
    let text = format!("{err:#}");
    assert!(
        text.contains(&format!(
            "the tokens file {}, line 1: the token of lead has 26 characters",
            file.display()
        )),
        "{text}"
    );
    // Nothing was opened: on SQLite the database file was not even created.
    if database.backend() == henrybook_tests::service::TestBackend::Sqlite {
        assert!(!database.location().exists(), "the database was created");
    }
    settings.tokens_file = Some(database.dir.path().join("missing"));
    let err = henrybook::app::Application::build(settings)
        .await
        .err()
        .expect("refused");
    assert!(
        format!("{err:#}").contains("cannot open the tokens file"),
        "{err:#}"
    );
}
