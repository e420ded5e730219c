//! The gRPC interface (`api/henrybook.proto`, package `henrybook.v1`): a thin tonic shell over the
//! operations of [`crate::ops`], the same ones the HTTP handlers call, with the same bearer tokens
//! and roles. The operations' errors are mapped to gRPC status codes in one place ([`status`]);
//! internal causes go to the log, never to the client. gRPC health (`grpc.health.v1`) reports both
//! services as serving.

mod convert;
mod fits;
mod parts;

use crate::app::AppState;
use crate::ops::auth::authorize;
use crate::ops::{ErrorKind, OpsError};
use crate::store::tokens::{Caller, Role};
use tokio::net::TcpListener;
use tokio::sync::watch;
use tonic::{Request, Status};

/// The messages, servers and clients generated from `api/henrybook.proto`.
pub mod proto {
    tonic::include_proto!("henrybook.v1");
}

/// An operation's error as a gRPC status (the `retry-after` and `henrybook-line` metadata carry what
/// HTTP sends as the Retry-After header and the problem's `line`).
pub fn status(p: OpsError) -> Status {
    let code = match p.kind {
        ErrorKind::BadSweepFile | ErrorKind::Validation => tonic::Code::InvalidArgument,
        ErrorKind::Unauthorized => tonic::Code::Unauthenticated,
        ErrorKind::Forbidden => tonic::Code::PermissionDenied,
        ErrorKind::NotFound => tonic::Code::NotFound,
        ErrorKind::Conflict => tonic::Code::FailedPrecondition,
        ErrorKind::PayloadTooLarge => tonic::Code::ResourceExhausted,
        ErrorKind::NotImplemented => tonic::Code::Unimplemented,
        ErrorKind::Unavailable | ErrorKind::Overloaded => tonic::Code::Unavailable,
        ErrorKind::Throttled => tonic::Code::ResourceExhausted,
        ErrorKind::Internal => tonic::Code::Internal,
    };
    let mut s = Status::new(code, p.detail);
    if let Some(after) = p.retry_after_s
        && let Ok(v) = after.to_string().parse()
    {
        // As HTTP's Retry-After: seconds before trying again.
        s.metadata_mut().insert("retry-after", v);
    }
    if let Some(line) = p.line
        && let Ok(v) = line.to_string().parse()
    {
        // The 1-based line of a file error, as HTTP's problem `line`.
        s.metadata_mut().insert("henrybook-line", v);
    }
    s
}

/// The caller of `req`, checked for `needed` exactly as the HTTP extractors check the header.
async fn caller<T>(state: &AppState, req: &Request<T>, needed: Role) -> Result<Caller, Status> {
    let value = req
        .metadata()
        .get("authorization")
        .map(|v| v.to_str().unwrap_or("").to_string());
    authorize(&state.store, value.as_deref(), needed)
        .await
        .map_err(status)
}

/// Serves both services and gRPC health on `listener` until `stop` turns true; a watch stream still
/// open then ends with UNAVAILABLE so the drain does not wait on it.
pub async fn serve(
    listener: TcpListener,
    state: AppState,
    stop: watch::Receiver<bool>,
) -> Result<(), tonic::transport::Error> {
    use proto::fit_registry_server::FitRegistryServer;
    use proto::part_registry_server::PartRegistryServer;
    let max_message = state.settings.max_body_bytes;
    let timeout = state.settings.request_timeout;
    let state_limits = state.settings.connection_limits();
    let state_settings = state.settings.clone();
    let (health, health_service) = tonic_health::server::health_reporter();
    health
        .set_serving::<PartRegistryServer<parts::Parts>>()
        .await;
    health.set_serving::<FitRegistryServer<fits::Fits>>().await;
    let parts = PartRegistryServer::new(parts::Parts {
        state: state.clone(),
    })
    .max_decoding_message_size(max_message);
    let fits = FitRegistryServer::new(fits::Fits {
        state,
        stop: stop.clone(),
    })
    .max_decoding_message_size(max_message)
    .max_encoding_message_size(max_message);
    let mut drain = stop;
    let limits = state_limits;
    let gate = crate::serve::Gate::new(limits, false);
    tonic::transport::Server::builder()
        .timeout(timeout)
        // Dead peers are found by pings; idle and surplus connections by the gate.
        .http2_keepalive_interval(Some(std::time::Duration::from_secs(30)))
        .http2_keepalive_timeout(Some(std::time::Duration::from_secs(10)))
        .layer(crate::serve::CountLayer)
        .layer(UploadGateLayer::new(&state_settings))
        .trace_fn(|req| tracing::info_span!("grpc", path = %req.uri().path()))
        .add_service(health_service)
        .add_service(parts)
        .add_service(fits)
        .serve_with_incoming_shutdown(crate::serve::guarded_incoming(listener, gate), async move {
            let _ = drain.wait_for(|s| *s).await;
        })
        .await
}

/// A fit id as given: proto3's default 0 means it was not set.
fn fit_id(id: i64) -> Result<i64, Status> {
    if id <= 0 {
        return Err(Status::invalid_argument(format!(
            "fit_id must be a fit's id (a positive number), not {id}"
        )));
    }
    Ok(id)
}

/// Bounds the `UploadSweep` calls received at once. The gRPC library reads a whole message before the
/// method sees it, so the bound on upload bytes in flight cannot be applied before the bytes are in
/// memory; this gate lets only as many uploads in as that bound holds messages of the largest size,
/// and answers the rest UNAVAILABLE with `retry-after` before their message is read.
#[derive(Clone)]
struct UploadGateLayer {
    permits: std::sync::Arc<tokio::sync::Semaphore>,
}

impl UploadGateLayer {
    fn new(settings: &crate::settings::Settings) -> UploadGateLayer {
        let at_once = (settings.max_upload_bytes_in_flight / settings.max_body_bytes.max(1)).max(1);
        UploadGateLayer {
            permits: std::sync::Arc::new(tokio::sync::Semaphore::new(at_once)),
        }
    }
}

impl<S> tower::Layer<S> for UploadGateLayer {
    type Service = UploadGate<S>;
    fn layer(&self, inner: S) -> UploadGate<S> {
        UploadGate {
            inner,
            permits: self.permits.clone(),
        }
    }
}

#[derive(Clone)]
struct UploadGate<S> {
    inner: S,
    permits: std::sync::Arc<tokio::sync::Semaphore>,
}

const UPLOAD_PATH: &str = "/henrybook.v1.FitRegistry/UploadSweep";

impl<S, ReqB, ResB> tower::Service<http::Request<ReqB>> for UploadGate<S>
where
    S: tower::Service<http::Request<ReqB>, Response = http::Response<ResB>>,
    S::Future: Send + 'static,
    ResB: Default + Send + 'static,
    S::Error: Send + 'static,
{
    type Response = http::Response<ResB>;
    type Error = S::Error;
    type Future = std::pin::Pin<
        Box<dyn std::future::Future<Output = Result<Self::Response, S::Error>> + Send>,
    >;

    fn poll_ready(
        &mut self,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<Result<(), S::Error>> {
        self.inner.poll_ready(cx)
    }

    fn call(&mut self, req: http::Request<ReqB>) -> Self::Future {
        if req.uri().path() != UPLOAD_PATH {
            return Box::pin(self.inner.call(req));
        }
        let Ok(permit) = self.permits.clone().try_acquire_owned() else {
            metrics::counter!("henrybook_refused_total", "bound" => "grpc_uploads").increment(1);
            let status = status(OpsError::busy(
                ErrorKind::Overloaded,
                "the service is receiving as many uploads as it takes at once; try again shortly",
                crate::ops::backpressure::BYTES_RETRY_AFTER_S,
            ));
            return Box::pin(std::future::ready(Ok(status.into_http())));
        };
        let fut = self.inner.call(req);
        Box::pin(async move {
            let res = fut.await;
            drop(permit);
            res
        })
    }
}
