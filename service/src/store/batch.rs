//! Group commit for the busy write paths (uploads, job claims, job outcomes).
//!
//! Every write transaction on SQLite ends in a commit that appends and syncs WAL frames, and the one
//! writer connection is the service's narrowest point. Requests sent here are queued; one task takes
//! all that are waiting (at most [`MAX_BATCH`]), runs each inside its own savepoint of one transaction
//! (a request alone in its batch inside the transaction itself), commits once, and only then answers
//! each caller. A request that fails is rolled back to its savepoint and answered with its error; the
//! others in the batch are not affected. A caller is never told "done" before its writes are
//! committed.
//!
//! The worker pool's writes (claims, starts, lease renewals, outcomes) go through a second, priority
//! queue: every batch takes them first, so an upload flood cannot hold up the claims that feed the
//! workers or the outcomes that free them.

use super::{StoreError, StoreResult};
use sqlx::{SqliteConnection, SqlitePool};
use std::any::Any;
use std::future::Future;
use std::pin::Pin;
use tokio::sync::{mpsc, oneshot};

/// At most this many requests share one transaction, so a long queue still commits steadily.
pub const MAX_BATCH: usize = 64;

pub(crate) type BoxFuture<'a, T> = Pin<Box<dyn Future<Output = T> + Send + 'a>>;

type Answer = Box<dyn Any + Send>;
type Work =
    Box<dyn for<'c> FnOnce(&'c mut SqliteConnection) -> BoxFuture<'c, StoreResult<Answer>> + Send>;

struct Request {
    work: Work,
    reply: oneshot::Sender<StoreResult<Answer>>,
}

/// The sending side; cloned with the store.
#[derive(Clone, Debug)]
pub(crate) struct Batcher {
    queue: mpsc::UnboundedSender<Request>,
    priority: mpsc::UnboundedSender<Request>,
}

/// The error every request of a batch that could not be committed is answered with.
fn batch_failed(why: &str) -> StoreError {
    StoreError::Database(sqlx::Error::Protocol(why.to_string()))
}

fn stopped() -> StoreError {
    StoreError::Database(sqlx::Error::PoolClosed)
}

impl Batcher {
    /// Starts the task that runs the batches on `writer` (the single-connection pool).
    pub(crate) fn start(writer: SqlitePool) -> Batcher {
        let (queue, rx) = mpsc::unbounded_channel();
        let (priority, priority_rx) = mpsc::unbounded_channel();
        tokio::spawn(run(writer, priority_rx, rx));
        Batcher { queue, priority }
    }

    /// As [`Batcher::submit`], ahead of every request of the ordinary queue (the worker pool's writes).
    pub(crate) async fn submit_priority<T, F>(&self, work: F) -> StoreResult<T>
    where
        T: Send + 'static,
        F: for<'c> FnOnce(&'c mut SqliteConnection) -> BoxFuture<'c, StoreResult<T>>
            + Send
            + 'static,
    {
        self.enqueue_on(&self.priority, work).await
    }

    /// Queues `work` on the priority queue now (before the returned future is first polled), so
    /// requests queued one after the other there are written in that order; the future gives the
    /// result after the commit. Dropping it leaves the request queued.
    pub(crate) fn enqueue_priority<T, F>(
        &self,
        work: F,
    ) -> impl Future<Output = StoreResult<T>> + use<T, F>
    where
        T: Send + 'static,
        F: for<'c> FnOnce(&'c mut SqliteConnection) -> BoxFuture<'c, StoreResult<T>>
            + Send
            + 'static,
    {
        self.enqueue_on(&self.priority, work)
    }

    /// Runs `work` in the next batch and returns its result once the batch is committed.
    pub(crate) async fn submit<T, F>(&self, work: F) -> StoreResult<T>
    where
        T: Send + 'static,
        F: for<'c> FnOnce(&'c mut SqliteConnection) -> BoxFuture<'c, StoreResult<T>>
            + Send
            + 'static,
    {
        self.enqueue_on(&self.queue, work).await
    }

    /// Queues `work` now (before the returned future is first polled), so requests queued one
    /// after the other are written in that order; the future gives the result after the commit.
    /// Dropping it leaves the request queued: its result is then not reported to anyone.
    fn enqueue_on<T, F>(
        &self,
        queue: &mpsc::UnboundedSender<Request>,
        work: F,
    ) -> impl Future<Output = StoreResult<T>> + use<T, F>
    where
        T: Send + 'static,
        F: for<'c> FnOnce(&'c mut SqliteConnection) -> BoxFuture<'c, StoreResult<T>>
            + Send
            + 'static,
    {
        let work: Work = Box::new(move |conn| {
            let fut = work(conn);
            Box::pin(async move { fut.await.map(|t| Box::new(t) as Answer) })
        });
        let (reply, answer) = oneshot::channel();
        let sent = queue.send(Request { work, reply }).is_ok();
        async move {
            if !sent {
                return Err(stopped());
            }
            let answer = answer.await.map_err(|_| stopped())??;
            answer.downcast::<T>().map(|t| *t).map_err(|_| {
                StoreError::Invalid("internal: a batched write answered with the wrong type".into())
            })
        }
    }
}

async fn run(
    writer: SqlitePool,
    mut priority: mpsc::UnboundedReceiver<Request>,
    mut rx: mpsc::UnboundedReceiver<Request>,
) {
    let mut waiting = Vec::with_capacity(MAX_BATCH);
    loop {
        // Both senders live in one Batcher: when either queue is closed, both are.
        let first = tokio::select! {
            biased;
            r = priority.recv() => r,
            r = rx.recv() => r,
        };
        let Some(first) = first else {
            break;
        };
        waiting.push(first);
        // Fill the batch: the pool's writes first, then the ordinary ones.
        while waiting.len() < MAX_BATCH {
            match priority.try_recv() {
                Ok(r) => waiting.push(r),
                Err(_) => break,
            }
        }
        while waiting.len() < MAX_BATCH {
            match rx.try_recv() {
                Ok(r) => waiting.push(r),
                Err(_) => break,
            }
        }
        let batch: Vec<Request> = std::mem::take(&mut waiting);
        metrics::histogram!("henrybook_write_batch_requests").record(batch.len() as f64);
        // Its own task, so a request that panics fails its batch (dropped replies, rolled-back
        // transaction) and not every later write.
        if let Err(e) = tokio::spawn(run_batch(writer.clone(), batch)).await {
            tracing::error!(error = %e, "a write batch stopped on a panic and was rolled back");
        }
    }
}

async fn run_batch(writer: SqlitePool, batch: Vec<Request>) {
    let mut tx = match writer.begin().await {
        Ok(tx) => tx,
        Err(e) => {
            let text = e.to_string();
            for r in batch {
                let _ = r.reply.send(Err(batch_failed(&text)));
            }
            return;
        }
    };
    let mut answers: Vec<(oneshot::Sender<StoreResult<Answer>>, StoreResult<Answer>)> =
        Vec::with_capacity(batch.len());
    let mut broken: Option<String> = None;
    // A request alone in its batch needs no savepoint: when it fails, the whole transaction is
    // rolled back, which is all its savepoint would undo. In a batch of several, each request runs
    // in its own savepoint; one that succeeded is released together with the next one's start (one
    // statement), and the last is released by the commit.
    let alone = batch.len() == 1;
    let mut open = false;
    for Request { work, reply } in batch {
        if let Some(why) = &broken {
            let _ = reply.send(Err(batch_failed(why)));
            continue;
        }
        if !alone {
            let start = if open {
                "RELEASE batched_request; SAVEPOINT batched_request"
            } else {
                "SAVEPOINT batched_request"
            };
            if let Err(e) = sqlx::raw_sql(start).execute(&mut *tx).await {
                broken = Some(e.to_string());
                let _ = reply.send(Err(e.into()));
                continue;
            }
            open = true;
        }
        let result = work(&mut tx).await;
        if alone && result.is_err() {
            let _ = tx.rollback().await;
            let _ = reply.send(result);
            return;
        }
        if !alone && result.is_err() {
            open = false;
            if let Err(e) = sqlx::raw_sql("ROLLBACK TO batched_request; RELEASE batched_request")
                .execute(&mut *tx)
                .await
            {
                // The transaction cannot be trusted any more: nothing of this batch is committed.
                broken = Some(format!("a batched write could not end its savepoint: {e}"));
                let _ = reply.send(Err(e.into()));
                continue;
            }
        }
        answers.push((reply, result));
    }
    if let Some(why) = broken {
        tracing::error!(error = %why, "a write batch is rolled back");
        let _ = tx.rollback().await;
        for (reply, _) in answers {
            let _ = reply.send(Err(batch_failed(&why)));
        }
        return;
    }
    match tx.commit().await {
        Ok(()) => {
            for (reply, result) in answers {
                let _ = reply.send(result);
            }
        }
        Err(e) => {
            let text = e.to_string();
            tracing::error!(error = %text, "a write batch could not be committed");
            for (reply, _) in answers {
                let _ = reply.send(Err(batch_failed(&text)));
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::temp_store;
    use super::*;

    #[tokio::test]
    async fn a_failed_request_leaves_the_others_of_its_batch_committed() {
        let (store, _dir) = temp_store().await;
        sqlx::query("CREATE TABLE t (v INTEGER NOT NULL UNIQUE)")
            .execute(&store.writer)
            .await
            .unwrap();
        // Submitted together, so most land in one batch: the duplicate fails on the UNIQUE
        // constraint after inserting a second row, and only its own rows are rolled back.
        let insert = |a: i64, b: i64| {
            let b2 = store.batch.clone();
            async move {
                b2.submit(move |conn| {
                    Box::pin(async move {
                        sqlx::query("INSERT INTO t (v) VALUES (?)")
                            .bind(a)
                            .execute(&mut *conn)
                            .await?;
                        sqlx::query("INSERT INTO t (v) VALUES (?)")
                            .bind(b)
                            .execute(&mut *conn)
                            .await?;
                        Ok(a)
                    })
                })
                .await
            }
        };
        let (one, bad, two) = tokio::join!(insert(1, 2), insert(3, 1), insert(4, 5));
        assert_eq!(one.unwrap(), 1);
        assert!(matches!(bad, Err(StoreError::Database(_))), "{bad:?}");
        assert_eq!(two.unwrap(), 4);
        let rows: Vec<i64> = sqlx::query_scalar("SELECT v FROM t ORDER BY v")
            .fetch_all(&store.reader)
            .await
            .unwrap();
        assert_eq!(rows, vec![1, 2, 4, 5]);
    }

    #[tokio::test]
    async fn a_failed_request_alone_in_its_batch_writes_nothing_and_the_next_one_commits() {
        let (store, _dir) = temp_store().await;
        sqlx::query("CREATE TABLE t (v INTEGER NOT NULL UNIQUE)")
            .execute(&store.writer)
            .await
            .unwrap();
        // Awaited one at a time: each request is alone in its batch (no savepoint).
        let insert = |a: i64, b: i64| {
            store.batch.submit(move |conn| {
                Box::pin(async move {
                    for v in [a, b] {
                        sqlx::query("INSERT INTO t (v) VALUES (?)")
                            .bind(v)
                            .execute(&mut *conn)
                            .await?;
                    }
                    Ok(a)
                })
            })
        };
        let bad = insert(1, 1).await;
        assert!(matches!(bad, Err(StoreError::Database(_))), "{bad:?}");
        assert_eq!(insert(2, 3).await.unwrap(), 2);
        let rows: Vec<i64> = sqlx::query_scalar("SELECT v FROM t ORDER BY v")
            .fetch_all(&store.reader)
            .await
            .unwrap();
        assert_eq!(
            rows,
            vec![2, 3],
            "the failed request's first row is rolled back"
        );
    }

    #[tokio::test]
    async fn answers_arrive_only_after_the_commit() {
        let (store, _dir) = temp_store().await;
        sqlx::query("CREATE TABLE t (v INTEGER NOT NULL)")
            .execute(&store.writer)
            .await
            .unwrap();
        let n = 200;
        let mut set = tokio::task::JoinSet::new();
        for i in 0..n {
            let b = store.batch.clone();
            let reader = store.reader.clone();
            set.spawn(async move {
                b.submit(move |conn| {
                    Box::pin(async move {
                        sqlx::query("INSERT INTO t (v) VALUES (?)")
                            .bind(i)
                            .execute(&mut *conn)
                            .await?;
                        Ok(())
                    })
                })
                .await
                .unwrap();
                // Another connection sees the row as soon as the caller is answered.
                let seen: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM t WHERE v = ?")
                    .bind(i)
                    .fetch_one(&reader)
                    .await
                    .unwrap();
                assert_eq!(seen, 1);
            });
        }
        while let Some(r) = set.join_next().await {
            r.unwrap();
        }
    }
}
