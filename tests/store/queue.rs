//! The PostgreSQL schema and job queue (henrybook::store::pg) against a real server. Each test makes
//! a database of its own ([`henrybook_tests::pg::TestDb`]: a random name, migrations/postgres/
//! applied, dropped at the end also when the test fails). An unreachable server fails the tests with
//! a message saying how to start it; they are never skipped. The rest of the PostgreSQL store is
//! held to the SQLite store in the module `parity`.

use henrybook::registry::wire::FailureKind;
use henrybook::store::jobs::Renewal;
use henrybook::store::pg::IDLE_IN_TRANSACTION_TIMEOUT;
use henrybook::store::pg::queue::{
    self, Cancel, Claim, JobWaker, Outcome, PgQueue, Wake, complete_in,
};
use henrybook_tests::pg::TestDb;
use henrybook_tests::repo_root;
use sqlx::PgPool;
use std::collections::HashSet;
use std::time::{Duration, Instant};

/// Inserts one part, one lot, and `n` sweeps with one queued fit each, and queues their jobs; the
/// fit ids, oldest first.
async fn queue_fits(pool: &PgPool, n: usize) -> Vec<i64> {
    let mut tx = pool.begin().await.unwrap();
    let part: i64 = sqlx::query_scalar(
        "INSERT INTO parts (part_number, created_at_ms) VALUES \
         ('Q-' || substr(md5(random()::text), 1, 8), 0) RETURNING part_id",
    )
    .fetch_one(&mut *tx)
    .await
    .unwrap();
    let lot: i64 =
        sqlx::query_scalar("INSERT INTO lots (part_id, lot) VALUES ($1, 'L1') RETURNING lot_id")
            .bind(part)
            .fetch_one(&mut *tx)
            .await
            .unwrap();
    let mut ids: Vec<i64> = sqlx::query_scalar(
        "WITH s AS ( \
             INSERT INTO sweeps (part_id, lot_id, file_name, file_bytes, sha256, method, points, \
                                 uploaded_by, uploaded_at_ms) \
             SELECT $1, $2, 's' || i || '.csv', convert_to('bytes ' || i, 'UTF8'), md5(i::text), \
                    'direct', 3, 'test', 0 \
             FROM generate_series(1, $3) AS i \
             RETURNING sweep_id \
         ) \
         INSERT INTO fits (sweep_id, part_id, lot_id, revision, status, options_json, options_key, \
                           created_at_ms) \
         SELECT sweep_id, $1, $2, 1, 'queued', '{}', 'k', 0 FROM s \
         RETURNING fit_id",
    )
    .bind(part)
    .bind(lot)
    .bind(n as i64)
    .fetch_all(&mut *tx)
    .await
    .unwrap();
    ids.sort_unstable();
    queue::enqueue(&mut tx, &ids).await.unwrap();
    tx.commit().await.unwrap();
    ids
}

fn succeeded(report: &str) -> Outcome {
    Outcome::Succeeded {
        engine_version: "test".into(),
        report_json: report.into(),
    }
}

async fn fit_row(pool: &PgPool, fit_id: i64) -> (String, Option<String>, Option<String>) {
    sqlx::query_as("SELECT status, report_json, error_kind FROM fits WHERE fit_id = $1")
        .bind(fit_id)
        .fetch_one(pool)
        .await
        .unwrap()
}

/// Counts the UPDATE statements run on `table` from now on (a test-only statement-level trigger).
async fn count_updates(pool: &PgPool, table: &str) {
    sqlx::raw_sql(sqlx::AssertSqlSafe(format!(
        "CREATE TABLE IF NOT EXISTS statement_count (tbl TEXT PRIMARY KEY, n BIGINT NOT NULL); \
         INSERT INTO statement_count VALUES ('{table}', 0); \
         CREATE OR REPLACE FUNCTION count_statement() RETURNS trigger LANGUAGE plpgsql AS $$ \
         BEGIN UPDATE statement_count SET n = n + 1 WHERE tbl = TG_TABLE_NAME; RETURN NULL; END; $$; \
         CREATE TRIGGER count_{table} AFTER UPDATE ON {table} \
             FOR EACH STATEMENT EXECUTE FUNCTION count_statement();"
    )))
    .execute(pool)
    .await
    .unwrap();
}

async fn updates_of(pool: &PgPool, table: &str) -> i64 {
    sqlx::query_scalar("SELECT n FROM statement_count WHERE tbl = $1")
        .bind(table)
        .fetch_one(pool)
        .await
        .unwrap()
}

fn migration_files(folder: &str) -> Vec<String> {
    let dir = repo_root().join("migrations").join(folder);
    let mut names: Vec<String> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| e.unwrap().file_name().into_string().unwrap())
        .filter(|n| n.ends_with(".sql"))
        .collect();
    names.sort();
    names
}

#[tokio::test]
async fn the_migrations_apply_to_a_fresh_database_with_sqlites_versions() {
    let db = TestDb::new().await;
    // The two folders hold the same versions and names, and the server applied all of them.
    let sqlite = migration_files("sqlite");
    assert!(sqlite.len() >= 10, "{sqlite:?}");
    assert_eq!(sqlite, migration_files("postgres"));
    let applied: Vec<(i64, String)> = sqlx::query_as(
        "SELECT version, description FROM _sqlx_migrations WHERE success ORDER BY version",
    )
    .fetch_all(&db.pool)
    .await
    .unwrap();
    let expected: Vec<(i64, String)> = sqlite
        .iter()
        .map(|n| {
            let (v, rest) = n.split_once('_').unwrap();
            (
                v.parse().unwrap(),
                rest.trim_end_matches(".sql").replace('_', " "),
            )
        })
        .collect();
    assert_eq!(applied, expected);

    // The queue table's settings and index.
    let options: Vec<String> =
        sqlx::query_scalar("SELECT unnest(reloptions) FROM pg_class WHERE relname = 'jobs'")
            .fetch_all(&db.pool)
            .await
            .unwrap();
    for o in [
        "fillfactor=70",
        "autovacuum_vacuum_scale_factor=0",
        "autovacuum_vacuum_threshold=1000",
    ] {
        assert!(options.iter().any(|x| x == o), "{o} not in {options:?}");
    }
    let index: String =
        sqlx::query_scalar("SELECT indexdef FROM pg_indexes WHERE indexname = 'jobs_runnable'")
            .fetch_one(&db.pool)
            .await
            .unwrap();
    assert!(index.contains("WHERE (state = ANY"), "{index}");
    // Every pooled connection ends a transaction left idle.
    let timeout: String = sqlx::query_scalar("SHOW idle_in_transaction_session_timeout")
        .fetch_one(&db.pool)
        .await
        .unwrap();
    assert_eq!(
        timeout,
        format!("{}s", IDLE_IN_TRANSACTION_TIMEOUT.as_secs())
    );

    // The rules the triggers keep, with SQLite's messages.
    let ids = queue_fits(&db.pool, 3).await;
    let mut c = db.pool.acquire().await.unwrap();
    let refused = |r: Result<sqlx::postgres::PgQueryResult, sqlx::Error>, what: &str| {
        let e = r.expect_err(what).to_string();
        assert!(e.contains(what), "{e}");
    };
    refused(
        sqlx::query("UPDATE sweeps SET operator = 'x'")
            .execute(&mut *c)
            .await,
        "sweeps are immutable",
    );
    refused(
        sqlx::query("DELETE FROM sweeps").execute(&mut *c).await,
        "sweeps are never deleted",
    );
    refused(
        sqlx::query("UPDATE fits SET error_kind = 'gremlins' WHERE fit_id = $1")
            .bind(ids[0])
            .execute(&mut *c)
            .await,
        "unknown error_kind",
    );
    sqlx::query("UPDATE fits SET report_json = '{}' WHERE fit_id = $1")
        .bind(ids[0])
        .execute(&mut *c)
        .await
        .unwrap();
    refused(
        sqlx::query("UPDATE fits SET report_json = '{\"again\":1}' WHERE fit_id = $1")
            .bind(ids[0])
            .execute(&mut *c)
            .await,
        "a fit result is written once",
    );
    sqlx::query("INSERT INTO audit (at_ms, actor, action) VALUES (1, 'test', 'created')")
        .execute(&mut *c)
        .await
        .unwrap();
    // Sealing a row once (hash from NULL to a value, nothing else) is the one update allowed.
    sqlx::query("UPDATE audit SET hash = 'h', prev_hash = 'p'")
        .execute(&mut *c)
        .await
        .unwrap();
    refused(
        sqlx::query("UPDATE audit SET hash = 'other'")
            .execute(&mut *c)
            .await,
        "append-only",
    );
    refused(
        sqlx::query("UPDATE audit SET actor = 'x'")
            .execute(&mut *c)
            .await,
        "append-only",
    );
    refused(
        sqlx::query("DELETE FROM audit").execute(&mut *c).await,
        "append-only",
    );
    refused(
        sqlx::query("TRUNCATE audit").execute(&mut *c).await,
        "append-only",
    );

    // The status counts follow every change, before and after folding the deltas.
    sqlx::query("UPDATE fits SET status = 'running' WHERE fit_id = $1")
        .bind(ids[1])
        .execute(&mut *c)
        .await
        .unwrap();
    sqlx::query("UPDATE fits SET status = 'failed' WHERE fit_id = $1")
        .bind(ids[2])
        .execute(&mut *c)
        .await
        .unwrap();
    let counted = "SELECT status, COUNT(*)::bigint FROM fits GROUP BY status ORDER BY status";
    let kept = "SELECT status, SUM(fits)::bigint FROM fit_status_counts GROUP BY status \
                HAVING SUM(fits) <> 0 ORDER BY status";
    let truth: Vec<(String, i64)> = sqlx::query_as(counted).fetch_all(&mut *c).await.unwrap();
    assert_eq!(
        truth,
        [
            ("failed".to_string(), 1),
            ("queued".to_string(), 1),
            ("running".to_string(), 1)
        ]
    );
    let before: Vec<(String, i64)> = sqlx::query_as(kept).fetch_all(&mut *c).await.unwrap();
    assert_eq!(before, truth);
    sqlx::query("SELECT fit_status_counts_fold()")
        .execute(&mut *c)
        .await
        .unwrap();
    let rows: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM fit_status_counts")
        .fetch_one(&mut *c)
        .await
        .unwrap();
    assert_eq!(rows, 3, "one row per status after folding");
    let after: Vec<(String, i64)> = sqlx::query_as(kept).fetch_all(&mut *c).await.unwrap();
    assert_eq!(after, truth);
}

#[tokio::test]
async fn concurrent_claimers_on_two_replicas_take_every_job_exactly_once() {
    let db = TestDb::new().await;
    let ids = queue_fits(&db.pool, 200).await;
    let replicas = [db.pool.clone(), db.replica().await];
    let started = Instant::now();
    let mut set = tokio::task::JoinSet::new();
    for worker in 0..4 {
        let q = PgQueue::new(replicas[worker % 2].clone());
        set.spawn(async move {
            let mut mine = Vec::new();
            loop {
                let got = q.claim_jobs(Duration::from_secs(60), 3, 3).await.unwrap();
                if got.is_empty() {
                    return mine;
                }
                mine.extend(got);
                tokio::task::yield_now().await;
            }
        });
    }
    let mut all: Vec<Claim> = Vec::new();
    let mut per_worker = Vec::new();
    while let Some(mine) = set.join_next().await {
        let mine = mine.unwrap();
        per_worker.push(mine.len());
        all.extend(mine);
    }
    let elapsed = started.elapsed();
    let claimed: HashSet<i64> = all.iter().map(|c| c.fit_id).collect();
    assert_eq!(all.len(), 200, "no job claimed twice");
    assert_eq!(claimed, ids.iter().copied().collect::<HashSet<_>>());
    assert!(all.iter().all(|c| c.token == 1 && c.attempt == 1));
    eprintln!(
        "200 jobs claimed by 4 workers on 2 pools in {:.1} ms, per worker {per_worker:?}",
        elapsed.as_secs_f64() * 1e3
    );
    let state: Vec<(String, i64)> =
        sqlx::query_as("SELECT state, COUNT(*) FROM jobs GROUP BY state")
            .fetch_all(&db.pool)
            .await
            .unwrap();
    assert_eq!(state, [("running".to_string(), 200)]);
}

#[tokio::test]
async fn an_expired_lease_is_reclaimed_with_a_larger_token_and_the_old_worker_writes_nothing() {
    let db = TestDb::new().await;
    let ids = queue_fits(&db.pool, 2).await;
    let (q, other) = (
        PgQueue::new(db.pool.clone()),
        PgQueue::new(db.replica().await),
    );
    // Leases of a second: the claims before the expiry are far quicker even on a loaded machine.
    let short = Duration::from_millis(1000);

    let first = q.claim_job(short, 3).await.unwrap().unwrap();
    assert_eq!((first.fit_id, first.token, first.attempt), (ids[0], 1, 1));
    assert!(q.mark_started(&first).await.unwrap());
    let second = q
        .claim_job(Duration::from_secs(60), 3)
        .await
        .unwrap()
        .unwrap();
    assert_eq!(second.fit_id, ids[1]);
    assert_eq!(other.claim_job(short, 3).await.unwrap(), None, "both held");

    // The first worker stops renewing; another replica's claim takes the job over.
    tokio::time::sleep(Duration::from_millis(1200)).await;
    let again = other
        .claim_job(Duration::from_secs(60), 3)
        .await
        .unwrap()
        .unwrap();
    assert_eq!((again.fit_id, again.attempt), (ids[0], 2));
    assert!(again.token > first.token, "{again:?} after {first:?}");
    assert_eq!(
        q.renew_leases(&[(first, 0.5), (second, 0.5)], Duration::from_secs(60))
            .await
            .unwrap(),
        [
            Renewal::Lost,
            Renewal::Held {
                cancel_requested: false
            }
        ]
    );
    assert!(!q.mark_started(&first).await.unwrap());

    // The stale worker's outcome writes nothing, alone or in a batch with a live claim.
    assert_eq!(
        q.complete(&[(first, succeeded("{\"stale\":true}"))])
            .await
            .unwrap(),
        [false]
    );
    assert_eq!(
        fit_row(&db.pool, ids[0]).await,
        ("running".to_string(), None, None)
    );
    assert_eq!(
        q.complete(&[
            (
                first,
                Outcome::Failed {
                    kind: FailureKind::Internal,
                    error: "stale".into()
                }
            ),
            (second, succeeded("{\"b\":2}"))
        ])
        .await
        .unwrap(),
        [false, true]
    );
    assert_eq!(
        fit_row(&db.pool, ids[0]).await,
        ("running".to_string(), None, None)
    );
    // The current claim writes once; a repeat writes nothing.
    assert_eq!(
        other
            .complete(&[(again, succeeded("{\"a\":1}"))])
            .await
            .unwrap(),
        [true]
    );
    assert_eq!(
        other
            .complete(&[(again, succeeded("{\"a\":3}"))])
            .await
            .unwrap(),
        [false]
    );
    assert_eq!(
        fit_row(&db.pool, ids[0]).await,
        ("succeeded".to_string(), Some("{\"a\":1}".to_string()), None)
    );
    let tokens: Vec<(i64, String, i64)> =
        sqlx::query_as("SELECT claim_token, state, attempts FROM jobs ORDER BY fit_id")
            .fetch_all(&db.pool)
            .await
            .unwrap();
    assert_eq!(
        tokens,
        [(2, "done".to_string(), 2), (1, "done".to_string(), 1)]
    );
}

#[tokio::test]
async fn attempts_run_out_cancels_settle_and_a_release_is_not_counted() {
    let db = TestDb::new().await;
    let ids = queue_fits(&db.pool, 3).await;
    let q = PgQueue::new(db.pool.clone());
    // Leases of a second, as above.
    let short = Duration::from_millis(1000);
    let long = Duration::from_secs(60);

    // A released claim goes back without counting; the next claim's token is larger still.
    let c = q.claim_job(short, 2).await.unwrap().unwrap();
    assert!(q.release_job(&c).await.unwrap());
    assert!(!q.release_job(&c).await.unwrap(), "released once");
    let c2 = q.claim_job(short, 2).await.unwrap().unwrap();
    assert_eq!((c2.fit_id, c2.attempt, c2.token), (ids[0], 1, 2));
    // The other two are held with long leases; the first expires twice and then fails.
    let b = q.claim_job(long, 2).await.unwrap().unwrap();
    let running = q.claim_job(long, 2).await.unwrap().unwrap();
    assert!(q.mark_started(&running).await.unwrap());
    tokio::time::sleep(Duration::from_millis(1200)).await;
    let c3 = q.claim_job(short, 2).await.unwrap().unwrap();
    assert_eq!((c3.fit_id, c3.attempt, c3.token), (ids[0], 2, 3));
    tokio::time::sleep(Duration::from_millis(1200)).await;
    assert_eq!(q.claim_job(short, 2).await.unwrap(), None);
    let (status, _, kind) = fit_row(&db.pool, ids[0]).await;
    assert_eq!(
        (status.as_str(), kind.as_deref()),
        ("failed", Some("attempts_exhausted"))
    );
    let error: String = sqlx::query_scalar("SELECT error FROM fits WHERE fit_id = $1")
        .bind(ids[0])
        .fetch_one(&db.pool)
        .await
        .unwrap();
    // The same words as the SQLite queue's (store::jobs).
    assert_eq!(
        error,
        "the fit was started 2 times and never finished (the worker stopped each time); \
         retry it to run it again"
    );

    // Cancelling a claimed but not started fit ends it at once: its worker cannot start it.
    assert_eq!(q.cancel(b.fit_id).await.unwrap(), Cancel::Cancelled);
    assert!(!q.mark_started(&b).await.unwrap());
    assert_eq!(
        fit_row(&db.pool, b.fit_id).await,
        ("cancelled".to_string(), None, Some("cancelled".to_string()))
    );
    // Cancelling a running fit is a request its worker learns at renewal, and then writes.
    assert_eq!(q.cancel(running.fit_id).await.unwrap(), Cancel::Requested);
    assert_eq!(
        q.renew_leases(&[(running, 0.25)], long).await.unwrap(),
        [Renewal::Held {
            cancel_requested: true
        }]
    );
    let progress: f64 = sqlx::query_scalar("SELECT progress FROM fits WHERE fit_id = $1")
        .bind(running.fit_id)
        .fetch_one(&db.pool)
        .await
        .unwrap();
    assert_eq!(progress, 0.25);
    assert_eq!(
        q.complete(&[(running, Outcome::Cancelled { reason: None })])
            .await
            .unwrap(),
        [true]
    );
    assert_eq!(
        fit_row(&db.pool, running.fit_id).await,
        ("cancelled".to_string(), None, Some("cancelled".to_string()))
    );
    let refused = q.cancel(running.fit_id).await.unwrap_err().to_string();
    assert!(refused.contains("only queued or running"), "{refused}");

    // Each outcome without a result left its audit row by the worker, as on SQLite (store::jobs):
    // the claim that found the first job out of attempts wrote `fit-failed` with the error as its
    // reason, and the cancelled outcome its worker wrote, `fit-cancelled`. (The queue's own cancel of
    // a claimed job is the store's to audit: PgStore's cancel writes the user's row.) The rows are
    // chained as the SQLite store chains them.
    let rows: Vec<(String, String, Option<i64>, Option<String>)> =
        sqlx::query_as("SELECT actor, action, fit_id, reason FROM audit ORDER BY audit_id")
            .fetch_all(&db.pool)
            .await
            .unwrap();
    assert_eq!(
        rows,
        [
            (
                "worker".to_string(),
                "fit-failed".to_string(),
                Some(ids[0]),
                Some(error)
            ),
            (
                "worker".to_string(),
                "fit-cancelled".to_string(),
                Some(running.fit_id),
                None
            ),
        ]
    );
    crate::parity::assert_pg_chain_holds(&db.pool).await;
}

#[tokio::test]
async fn renewing_many_jobs_is_one_statement() {
    let db = TestDb::new().await;
    queue_fits(&db.pool, 150).await;
    let q = PgQueue::new(db.pool.clone());
    let claims = q.claim_jobs(Duration::from_secs(5), 3, 150).await.unwrap();
    assert_eq!(claims.len(), 150);
    let before: Vec<i64> = sqlx::query_scalar("SELECT lease_until_ms FROM jobs ORDER BY fit_id")
        .fetch_all(&db.pool)
        .await
        .unwrap();
    count_updates(&db.pool, "jobs").await;
    count_updates(&db.pool, "fits").await;
    let held: Vec<(Claim, f64)> = claims.iter().map(|c| (*c, 0.5)).collect();
    let started = Instant::now();
    let renewed = q
        .renew_leases(&held, Duration::from_secs(600))
        .await
        .unwrap();
    eprintln!(
        "150 leases renewed in {:.2} ms",
        started.elapsed().as_secs_f64() * 1e3
    );
    assert!(renewed.iter().all(|r| *r
        == Renewal::Held {
            cancel_requested: false
        }));
    assert_eq!(updates_of(&db.pool, "jobs").await, 1, "one UPDATE of jobs");
    assert_eq!(updates_of(&db.pool, "fits").await, 1, "one UPDATE of fits");
    let after: Vec<i64> = sqlx::query_scalar("SELECT lease_until_ms FROM jobs ORDER BY fit_id")
        .fetch_all(&db.pool)
        .await
        .unwrap();
    assert!(
        before.iter().zip(&after).all(|(b, a)| a - b >= 590_000),
        "every lease moved ~10 minutes on"
    );
}

#[tokio::test]
async fn an_enqueue_wakes_a_waiting_worker_and_polling_is_the_fallback() {
    let db = TestDb::new().await;
    let mut waker = JobWaker::listen(&db.pool).await.unwrap();
    // Nothing queued: the wait ends at the poll interval.
    let started = Instant::now();
    assert_eq!(waker.wait(Duration::from_millis(200)).await, Wake::Polled);
    assert!(started.elapsed() >= Duration::from_millis(190));

    let waiting = tokio::spawn(async move {
        let started = Instant::now();
        let wake = waker.wait(Duration::from_secs(30)).await;
        (wake, started.elapsed(), waker)
    });
    tokio::time::sleep(Duration::from_millis(100)).await;
    let enqueued = Instant::now();
    let ids = queue_fits(&db.replica().await, 20).await;
    let (wake, waited, mut waker) = waiting.await.unwrap();
    let latency = enqueued.elapsed();
    assert_eq!(wake, Wake::Notified);
    assert!(
        waited < Duration::from_secs(5),
        "woken after {waited:?}, not at the 30 s poll"
    );
    eprintln!(
        "a waiting worker woke {:.1} ms after the enqueue of 20 jobs began",
        latency.as_secs_f64() * 1e3
    );
    // The 20 enqueues were one notification: nothing else is pending.
    assert_eq!(waker.wait(Duration::from_millis(200)).await, Wake::Polled);
    // A job going back to the queue wakes too.
    let q = PgQueue::new(db.pool.clone());
    let c = q
        .claim_job(Duration::from_secs(60), 3)
        .await
        .unwrap()
        .unwrap();
    assert_eq!(c.fit_id, ids[0]);
    assert!(q.release_job(&c).await.unwrap());
    assert_eq!(waker.wait(Duration::from_secs(5)).await, Wake::Notified);
}

#[tokio::test]
async fn a_batch_of_many_outcomes_is_one_transaction_without_savepoints() {
    let db = TestDb::new().await;
    let ids = queue_fits(&db.pool, 130).await;
    let q = PgQueue::new(db.pool.clone());
    let claims = q.claim_jobs(Duration::from_secs(60), 3, 130).await.unwrap();
    assert_eq!(claims.len(), 130);
    // Three of them are stale (a takeover would have given them a larger token).
    let outcomes: Vec<(Claim, Outcome)> = claims
        .iter()
        .enumerate()
        .map(|(i, c)| {
            if i % 50 == 7 {
                (
                    Claim {
                        token: c.token - 1,
                        ..*c
                    },
                    succeeded("{}"),
                )
            } else if i % 2 == 0 {
                (*c, succeeded(&format!("{{\"i\":{i}}}")))
            } else {
                (
                    *c,
                    Outcome::Failed {
                        kind: FailureKind::NotAnInductor,
                        error: format!("fit {i} is not an inductor"),
                    },
                )
            }
        })
        .collect();
    let mut tx = db.pool.begin().await.unwrap();
    let written = complete_in(&mut tx, &outcomes).await.unwrap();
    // Every row this transaction changed carries its own transaction ID: a savepoint's writes would
    // carry a subtransaction's.
    let (xid, jobs_rows, fits_rows): (i64, i64, i64) = sqlx::query_as(
        "SELECT txid_current() % 4294967296, \
                (SELECT COUNT(*) FROM jobs WHERE xmin::text::bigint = txid_current() % 4294967296), \
                (SELECT COUNT(*) FROM fits WHERE xmin::text::bigint = txid_current() % 4294967296)",
    )
    .fetch_one(&mut *tx)
    .await
    .unwrap();
    tx.commit().await.unwrap();
    assert!(xid > 0);
    assert_eq!(written.iter().filter(|w| !**w).count(), 3);
    assert_eq!((jobs_rows, fits_rows), (127, 127));
    let statuses: Vec<(String, i64)> =
        sqlx::query_as("SELECT status, COUNT(*) FROM fits GROUP BY status ORDER BY status")
            .fetch_all(&db.pool)
            .await
            .unwrap();
    assert_eq!(
        statuses,
        [
            ("failed".to_string(), 62),
            ("queued".to_string(), 3),
            ("succeeded".to_string(), 65)
        ]
    );
    for (i, w) in written.iter().enumerate() {
        assert_eq!(*w, i % 50 != 7, "outcome {i} of fit {}", ids[i]);
    }
    // A second outcome for the same fit in one batch is refused before anything is written.
    let twice = complete_in(
        &mut db.pool.acquire().await.unwrap(),
        &[
            (claims[7], succeeded("{}")),
            (claims[7], Outcome::Cancelled { reason: None }),
        ],
    )
    .await
    .unwrap_err()
    .to_string();
    assert!(twice.contains("more than one outcome"), "{twice}");
}

#[tokio::test]
async fn a_listener_whose_connection_is_ended_polls_and_then_wakes_again() {
    let db = TestDb::new().await;
    let mut waker = JobWaker::listen(&db.pool).await.unwrap();
    let ended: Vec<bool> = sqlx::query_scalar(
        "SELECT pg_terminate_backend(pid) FROM pg_stat_activity \
         WHERE datname = current_database() AND query LIKE 'LISTEN%'",
    )
    .fetch_all(&db.pool)
    .await
    .unwrap();
    assert_eq!(ended, [true], "the listener's session was found and ended");
    // No notification can arrive on the lost connection: the wait ends by polling.
    assert_eq!(waker.wait(Duration::from_millis(300)).await, Wake::Polled);
    // The listener connects and listens again by itself; an enqueue wakes it as before.
    let waiting = tokio::spawn(async move { waker.wait(Duration::from_secs(30)).await });
    tokio::time::sleep(Duration::from_millis(300)).await;
    queue_fits(&db.pool, 1).await;
    let wake = tokio::time::timeout(Duration::from_secs(10), waiting)
        .await
        .expect("woken well before the 30 s poll")
        .unwrap();
    assert_eq!(wake, Wake::Notified);
}

/// Waits until some session of this database waits for a row lock (the statement under test).
async fn until_one_waits_for_a_lock(pool: &PgPool) {
    for _ in 0..200 {
        let waiting: i64 = sqlx::query_scalar(
            "SELECT COUNT(*) FROM pg_stat_activity \
             WHERE datname = current_database() AND wait_event_type = 'Lock'",
        )
        .fetch_one(pool)
        .await
        .unwrap();
        if waiting > 0 {
            return;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    panic!("the statement under test never waited for the row lock");
}

#[tokio::test]
async fn writes_racing_a_takeover_or_a_cancel_wait_for_it_and_then_write_nothing() {
    let db = TestDb::new().await;
    let ids = queue_fits(&db.pool, 2).await;
    let q = PgQueue::new(db.pool.clone());
    let long = Duration::from_secs(60);
    let a = q.claim_job(long, 3).await.unwrap().unwrap();
    let b = q.claim_job(long, 3).await.unwrap().unwrap();
    assert_eq!((a.fit_id, b.fit_id), (ids[0], ids[1]));
    assert!(q.mark_started(&a).await.unwrap());

    // Another replica takes job a over (what its claim does to an expired row), not yet committed;
    // a's outcome, sent meanwhile, waits for that row and then finds its token gone.
    let mut takeover = db.pool.begin().await.unwrap();
    sqlx::query(
        "UPDATE jobs SET claim_token = claim_token + 1, attempts = attempts + 1 WHERE fit_id = $1",
    )
    .bind(a.fit_id)
    .execute(&mut *takeover)
    .await
    .unwrap();
    let racing = {
        let q = q.clone();
        tokio::spawn(async move { q.complete(&[(a, succeeded("{\"late\":1}"))]).await })
    };
    until_one_waits_for_a_lock(&db.pool).await;
    takeover.commit().await.unwrap();
    assert_eq!(racing.await.unwrap().unwrap(), [false]);
    assert_eq!(
        fit_row(&db.pool, a.fit_id).await,
        ("running".to_string(), None, None)
    );

    // A cancel of the claimed, not yet started job b, not yet committed; b's worker starting it
    // meanwhile waits for the job row and then does not show it as running.
    let mut cancel = db.pool.begin().await.unwrap();
    sqlx::query("SELECT state FROM jobs WHERE fit_id = $1 FOR UPDATE")
        .bind(b.fit_id)
        .execute(&mut *cancel)
        .await
        .unwrap();
    sqlx::query("UPDATE jobs SET state = 'done', lease_until_ms = NULL WHERE fit_id = $1")
        .bind(b.fit_id)
        .execute(&mut *cancel)
        .await
        .unwrap();
    sqlx::query("UPDATE fits SET status = 'cancelled', error_kind = 'cancelled' WHERE fit_id = $1")
        .bind(b.fit_id)
        .execute(&mut *cancel)
        .await
        .unwrap();
    let starting = {
        let q = q.clone();
        tokio::spawn(async move { q.mark_started(&b).await })
    };
    until_one_waits_for_a_lock(&db.pool).await;
    cancel.commit().await.unwrap();
    assert!(!starting.await.unwrap().unwrap());
    assert_eq!(
        fit_row(&db.pool, b.fit_id).await,
        ("cancelled".to_string(), None, Some("cancelled".to_string()))
    );
}

#[tokio::test]
async fn the_status_counts_fold_into_one_row_per_status_and_keep_their_sums() {
    let db = TestDb::new().await;
    let store = henrybook::store::pg::PgStore::new(db.pool.clone());
    let ids = queue_fits(&db.pool, 30).await;
    let q = PgQueue::new(db.pool.clone());
    let claims = q.claim_jobs(Duration::from_secs(60), 3, 20).await.unwrap();
    for c in &claims[..10] {
        assert!(q.mark_started(c).await.unwrap());
    }
    let outcomes: Vec<(Claim, Outcome)> =
        claims[..10].iter().map(|c| (*c, succeeded("{}"))).collect();
    q.complete(&outcomes).await.unwrap();
    let before = store.queue_counts().await.unwrap();
    let rows = |pool: PgPool| async move {
        sqlx::query_scalar::<_, i64>("SELECT COUNT(*) FROM fit_status_counts")
            .fetch_one(&pool)
            .await
            .unwrap()
    };
    // One delta per insert and two per status change: 30 + 2·10 + 2·10.
    assert_eq!(rows(db.pool.clone()).await, 70);
    assert_eq!(store.fold_status_counts().await.unwrap(), 70);
    assert_eq!(
        rows(db.pool.clone()).await,
        2,
        "queued and succeeded remain"
    );
    assert_eq!(store.queue_counts().await.unwrap(), before);
    assert_eq!((before.queued, before.succeeded), (20, 10));
    assert_eq!(ids.len(), 30);
    // Folding again changes nothing.
    store.fold_status_counts().await.unwrap();
    assert_eq!(store.queue_counts().await.unwrap(), before);
}

#[tokio::test]
async fn the_pool_opens_at_most_the_connections_it_is_given() {
    use henrybook::store::backend::Backend;
    let db = TestDb::new().await;
    let backend = Backend::open(std::path::Path::new(&db.url), 3)
        .await
        .unwrap();
    let Backend::Postgres(store) = &backend else {
        panic!("a postgres:// URL opens PostgreSQL");
    };
    assert_eq!(store.pool().options().get_max_connections(), 3);
    // Five queries at once on three connections: all answered, never more than three open.
    let mut set = tokio::task::JoinSet::new();
    for _ in 0..5 {
        let pool = store.pool().clone();
        set.spawn(async move {
            sqlx::query("SELECT pg_sleep(0.1)")
                .execute(&pool)
                .await
                .unwrap();
            pool.size()
        });
    }
    while let Some(size) = set.join_next().await {
        assert!(size.unwrap() <= 3);
    }
    backend.close().await;
}

#[tokio::test]
async fn a_pruned_job_queued_again_continues_its_claim_counter_and_an_old_claim_writes_nothing() {
    let db = TestDb::new().await;
    let ids = queue_fits(&db.pool, 1).await;
    let store = henrybook::store::pg::PgStore::new(db.pool.clone());
    let q = store.queue();
    let first = q
        .claim_job(Duration::from_secs(60), 3)
        .await
        .unwrap()
        .unwrap();
    assert_eq!((first.token, first.attempt), (1, 1));
    let failed = Outcome::Failed {
        kind: FailureKind::Internal,
        error: "stopped".into(),
    };
    assert_eq!(q.complete(&[(first, failed)]).await.unwrap(), [true]);

    // Pruned: the row goes, its attempts and claim counter stay on the fit.
    let later = henrybook::store::now_ms() + 1000;
    assert_eq!(store.prune_finished_jobs(later, 10).await.unwrap(), 1);
    let jobs: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM jobs")
        .fetch_one(&db.pool)
        .await
        .unwrap();
    assert_eq!(jobs, 0);
    let kept: (i64, i64) =
        sqlx::query_as("SELECT attempts, job_claim_token FROM fits WHERE fit_id = $1")
            .bind(ids[0])
            .fetch_one(&db.pool)
            .await
            .unwrap();
    assert_eq!(kept, (1, 1));
    assert_eq!(store.fit_detail(ids[0]).await.unwrap().attempts, 1);

    // Retried: the row is made again and the next claim's token is past every earlier one, so the
    // claim from before the pruning matches nothing.
    store.retry_fit("test", ids[0], None).await.unwrap();
    let again = q
        .claim_job(Duration::from_secs(60), 3)
        .await
        .unwrap()
        .unwrap();
    assert_eq!((again.fit_id, again.attempt), (ids[0], 1));
    assert!(again.token > first.token, "{again:?} after {first:?}");
    assert_eq!(
        q.complete(&[(first, succeeded("{\"stale\":true}"))])
            .await
            .unwrap(),
        [false]
    );
    assert_eq!(
        fit_row(&db.pool, ids[0]).await.0,
        "queued",
        "claimed, not yet started"
    );
    // A running job is never pruned.
    assert_eq!(
        store.prune_finished_jobs(later + 1000, 10).await.unwrap(),
        0
    );
}
