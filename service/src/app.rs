//! The whole service: open the store, bind the listeners, run HTTP, gRPC and the worker pool, shut
//! down gracefully (HTTP and gRPC drain, running fits finish or give their jobs back).

use crate::jobs::{CoreEngine, Engine, JobsHandle, Pool, PoolSettings};
use crate::settings::Settings;
use crate::store::Backend;
use anyhow::Context;
use metrics_exporter_prometheus::{Matcher, PrometheusBuilder, PrometheusHandle};
use std::future::Future;
use std::net::SocketAddr;
use std::sync::{Arc, OnceLock};
use tokio::net::TcpListener;
use tokio::sync::watch;

/// What every handler reads through axum's `State`.
#[derive(Clone)]
pub struct AppState {
    pub store: Backend,
    pub jobs: JobsHandle,
    pub engine: Arc<dyn Engine>,
    pub settings: Arc<Settings>,
    pub metrics: PrometheusHandle,
    /// The bounds on queued fits and uploads in flight.
    pub backpressure: Arc<crate::ops::backpressure::Backpressure>,
    /// Set at the shutdown signal: /readyz answers 503 from then on.
    pub draining: Arc<std::sync::atomic::AtomicBool>,
}

/// The process-wide Prometheus recorder (installed once, shared by every application in a process).
pub fn metrics_handle() -> PrometheusHandle {
    static HANDLE: OnceLock<PrometheusHandle> = OnceLock::new();
    HANDLE
        .get_or_init(|| {
            let builder = PrometheusBuilder::new()
                .set_buckets_for_metric(
                    Matcher::Full("henrybook_fit_duration_seconds".into()),
                    &[
                        0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0,
                    ],
                )
                .and_then(|b| {
                    b.set_buckets_for_metric(
                        Matcher::Full("henrybook_http_request_duration_seconds".into()),
                        &[
                            0.0005, 0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.5, 1.0, 5.0,
                        ],
                    )
                })
                .and_then(|b| {
                    b.set_buckets_for_metric(
                        Matcher::Full("henrybook_write_batch_requests".into()),
                        &[1.0, 2.0, 4.0, 8.0, 16.0, 32.0, 64.0],
                    )
                })
                .expect("bucket lists are not empty");
            let recorder = builder.build_recorder();
            let handle = recorder.handle();
            // Another recorder may already be installed (e.g. by a test harness); then this handle
            // renders empty text, which /metrics reports honestly.
            let _ = metrics::set_global_recorder(recorder);
            handle
        })
        .clone()
}

pub struct Application {
    listener: TcpListener,
    address: SocketAddr,
    grpc_listener: TcpListener,
    grpc_address: SocketAddr,
    state: AppState,
    pool: Pool,
    /// The SHA-256 of the tokens file as last applied.
    tokens_digest: Option<String>,
}

/// Who the audit trail names for the changes a tokens file makes in the service.
pub const TOKENS_FILE_ACTOR: &str = "tokens file";

/// Reads the tokens file every `every` and applies it when its content changed since `digest`. A file
/// that cannot be read or has an error is logged (once per distinct error) and changes nothing: the
/// tokens stay as they were.
async fn watch_tokens_file(
    store: Backend,
    path: std::path::PathBuf,
    every: std::time::Duration,
    mut digest: String,
) {
    let mut tick = tokio::time::interval(every);
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    tick.tick().await;
    let mut last_error = String::new();
    loop {
        tick.tick().await;
        let shown = path.display();
        let (tokens, now) = match crate::store::token_file::load(&path) {
            Ok(read) => read,
            Err(e) => {
                let error = format!("{e:#}");
                if error != last_error {
                    tracing::error!(file = %shown, "the tokens file is not applied, the tokens stay as they were: {error}");
                    last_error = error;
                }
                continue;
            }
        };
        last_error.clear();
        if now == digest {
            continue;
        }
        match store.sync_tokens(TOKENS_FILE_ACTOR, &tokens).await {
            Ok(sync) => {
                tracing::info!(file = %shown, "tokens file changed and applied: {}", sync.summary());
                digest = now;
            }
            Err(e) => {
                tracing::error!(file = %shown, error = %e, "cannot apply the changed tokens file; will try again");
            }
        }
    }
}

impl Application {
    /// Opens the database (applying migrations) and binds the listener; nothing runs until
    /// [`Application::run`].
    pub async fn build(settings: Settings) -> anyhow::Result<Application> {
        Application::build_with_engine(settings, Arc::new(CoreEngine)).await
    }

    /// As [`Application::build`], with another engine (tests wrap the real one).
    pub async fn build_with_engine(
        settings: Settings,
        engine: Arc<dyn Engine>,
    ) -> anyhow::Result<Application> {
        // A bad tokens file stops the start before the database is opened.
        let tokens = match &settings.tokens_file {
            Some(path) => Some(crate::store::token_file::load(path)?),
            None => None,
        };
        let store = Backend::open(&settings.database_path, settings.database_connections).await?;
        tracing::info!(
            database = %crate::store::backend::shown(&settings.database_path),
            backend = store.kind(),
            "the store is open"
        );
        let mut tokens_digest = None;
        if let (Some(path), Some((tokens, digest))) = (&settings.tokens_file, tokens) {
            let sync = store
                .sync_tokens(TOKENS_FILE_ACTOR, &tokens)
                .await
                .with_context(|| format!("cannot apply the tokens file {}", path.display()))?;
            tracing::info!(file = %path.display(), "tokens file applied: {}", sync.summary());
            tokens_digest = Some(digest);
        }
        let listener = TcpListener::bind(settings.listen)
            .await
            .with_context(|| format!("cannot listen on {}", settings.listen))?;
        let address = listener.local_addr()?;
        let grpc_listener = TcpListener::bind(settings.grpc_listen)
            .await
            .with_context(|| format!("cannot listen for gRPC on {}", settings.grpc_listen))?;
        let grpc_address = grpc_listener.local_addr()?;
        let pool = Pool::new(store.clone(), engine.clone(), PoolSettings::from(&settings));
        let state = AppState {
            store,
            jobs: pool.handle(),
            engine,
            backpressure: Arc::new(crate::ops::backpressure::Backpressure::new(&settings)),
            settings: Arc::new(settings),
            metrics: metrics_handle(),
            draining: Arc::new(std::sync::atomic::AtomicBool::new(false)),
        };
        Ok(Application {
            listener,
            address,
            grpc_listener,
            grpc_address,
            state,
            pool,
            tokens_digest,
        })
    }

    pub fn address(&self) -> SocketAddr {
        self.address
    }

    pub fn port(&self) -> u16 {
        self.address.port()
    }

    /// Where the gRPC interface listens (its port is known once built, also for port 0).
    pub fn grpc_address(&self) -> SocketAddr {
        self.grpc_address
    }

    pub fn store(&self) -> &Backend {
        &self.state.store
    }

    /// Serves until Ctrl-C or SIGTERM.
    pub async fn run_until_stopped(self) -> anyhow::Result<()> {
        self.run(shutdown_signal()).await
    }

    /// Serves until `shutdown` completes, then drains HTTP, gRPC and the worker pool and closes the
    /// store.
    pub async fn run(
        self,
        shutdown: impl Future<Output = ()> + Send + 'static,
    ) -> anyhow::Result<()> {
        let (stop_tx, stop_rx) = watch::channel(false);
        // At the signal the service turns unready and the pool stops claiming; the listeners close
        // `unready_notice` later (so a load balancer that polls /readyz stops sending first).
        let (pool_stop_tx, pool_stop_rx) = watch::channel(false);
        // The instant shutdown was asked for: everything below ends `drain_timeout` after it.
        let (stopped_tx, stopped_at) = tokio::sync::oneshot::channel::<tokio::time::Instant>();
        let draining = self.state.draining.clone();
        let notice = self.state.settings.unready_notice;
        tokio::spawn(async move {
            shutdown.await;
            let _ = stopped_tx.send(tokio::time::Instant::now());
            draining.store(true, std::sync::atomic::Ordering::SeqCst);
            let _ = pool_stop_tx.send(true);
            if !notice.is_zero() {
                tracing::info!(
                    notice_s = notice.as_secs_f64(),
                    "shutdown asked for: unready, closing the listeners after the notice"
                );
                tokio::time::sleep(notice).await;
            }
            let _ = stop_tx.send(true);
        });
        let drain = self.state.settings.drain_timeout;
        let limits = self.state.settings.connection_limits();
        // Dropping `run` (as an aborted task does) stops the pool too: its running fits are then
        // abandoned with their leases, exactly as in a crash.
        let mut pool = AbortOnDrop(Some(tokio::spawn(self.pool.run(pool_stop_rx))));
        let store = self.state.store.clone();
        let mut grpc = AbortOnGrpcDrop(Some(tokio::spawn(crate::grpc::serve(
            self.grpc_listener,
            self.state.clone(),
            stop_rx.clone(),
        ))));
        // The tokens file is watched while the service runs (aborted with `run`).
        let _tokens_watch = match (&self.state.settings.tokens_file, self.tokens_digest) {
            (Some(path), Some(digest)) => Some(AbortOnDrop(Some(tokio::spawn(watch_tokens_file(
                store.clone(),
                path.clone(),
                self.state.settings.tokens_file_recheck,
                digest,
            ))))),
            _ => None,
        };
        let router = crate::http::router(self.state);
        tracing::info!(address = %self.address, grpc_address = %self.grpc_address, "henrybook is serving");
        // The listeners close `notice` after the signal; what is left of the drain is theirs.
        let connection_drain = drain.saturating_sub(notice);
        crate::serve::serve_http(self.listener, router, limits, stop_rx, connection_drain).await;
        // Shutdown was asked for (the HTTP loop only ends then); gRPC and the pool get what is left of
        // the drain deadline, then are aborted: a fit abandoned so keeps its lease, which expires and
        // runs it again at the next start, as after a crash.
        let deadline = match stopped_at.await {
            Ok(at) => at + drain,
            Err(_) => tokio::time::Instant::now(),
        };
        // The handles stay in their abort-on-drop guards while awaited: should `run` be dropped
        // meanwhile (its task aborted mid-drain), gRPC and the pool stop with it instead of running
        // on detached (a pool left so would finish its fits behind the next start's back).
        if let Some(handle) = grpc.0.as_mut() {
            match tokio::time::timeout_at(deadline, &mut *handle).await {
                Ok(joined) => {
                    grpc.0 = None;
                    joined
                        .context("the gRPC server task")?
                        .context("the gRPC server stopped")?
                }
                Err(_) => {
                    tracing::warn!("gRPC connections still open at the drain deadline: closed");
                    handle.abort();
                }
            }
        }
        if let Some(handle) = pool.0.as_mut() {
            match tokio::time::timeout_at(deadline, &mut *handle).await {
                Ok(joined) => {
                    pool.0 = None;
                    joined.context("the worker pool stopped")?
                }
                Err(_) => {
                    tracing::warn!("fits still running at the drain deadline: abandoned");
                    handle.abort();
                }
            }
        }
        store.close().await;
        tracing::info!("henrybook stopped");
        Ok(())
    }
}

struct AbortOnDrop(Option<tokio::task::JoinHandle<()>>);

struct AbortOnGrpcDrop(Option<tokio::task::JoinHandle<Result<(), tonic::transport::Error>>>);

impl Drop for AbortOnGrpcDrop {
    fn drop(&mut self) {
        if let Some(h) = &self.0 {
            h.abort();
        }
    }
}

impl Drop for AbortOnDrop {
    fn drop(&mut self) {
        if let Some(h) = &self.0 {
            h.abort();
        }
    }
}

async fn shutdown_signal() {
    let ctrl_c = async {
        let _ = tokio::signal::ctrl_c().await;
    };
    #[cfg(unix)]
    let term = async {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut s) => {
                s.recv().await;
            }
            Err(_) => std::future::pending::<()>().await,
        }
    };
    #[cfg(not(unix))]
    let term = std::future::pending::<()>();
    tokio::select! {
        _ = ctrl_c => {},
        _ = term => {},
    }
}
