//! The connections of both listeners: how many may be open, how long one may sit idle or take to send
//! a request's head, and how long shutdown waits for them.
//!
//! Every accepted connection is registered in a [`Gate`] and wrapped in a [`Guarded`] stream that
//! checks, a few times a second while the connection is being read, whether it has overstayed:
//! - no request in flight and no byte of a new one for the idle timeout (keep-alive included);
//! - on the HTTP listener, the first byte of a request head arrived longer ago than the header-read
//!   timeout and the head is still not complete (a half-sent request);
//!
//! and then fails the read, which closes the connection. Requests are counted in flight from the
//! moment the server hands them to the routes until their response body has been sent ([`CountLayer`]),
//! so a long upload, fit status stream or download is never cut by these timeouts (the request timeout
//! bounds the handler itself).
//!
//! At the connection limit a new connection takes the place of the connection that has been idle (or
//! sending a head) the longest, so a flood of idle connections cannot lock out `/healthz` or real
//! clients; only when every open connection has a request in flight is a new one refused at once
//! (HTTP: a 503 problem with `Retry-After`; gRPC: closed).

use axum::body::Body;
use axum::extract::Request;
use std::collections::HashMap;
use std::io;
use std::pin::Pin;
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};
use std::task::{Context, Poll, Waker};
use std::time::{Duration, Instant};
use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::watch;
use tokio::task::JoinSet;
use tower::Layer as _;

/// The limits of one listener's connections.
#[derive(Debug, Clone, Copy)]
pub struct Limits {
    /// Most connections open at once (a few more may be closing while they give up their place).
    pub max_connections: usize,
    /// Longest from the first byte of a request head to its end (HTTP listener).
    pub header_read_timeout: Duration,
    /// Longest a connection may stay open with no request in flight.
    pub idle_timeout: Duration,
}

impl Limits {
    /// How often a connection being read checks its timeouts.
    fn check_every(&self) -> Duration {
        (self.header_read_timeout.min(self.idle_timeout) / 4)
            .clamp(Duration::from_millis(20), Duration::from_secs(1))
    }
}

const NONE: u64 = u64::MAX;

/// What one connection is doing, shared by its stream, its requests and the gate.
#[derive(Debug)]
pub struct Activity {
    opened: Instant,
    /// Milliseconds since `opened` of the last request's start or end (0: none yet).
    last_request_ms: AtomicU64,
    in_flight: AtomicUsize,
    /// Milliseconds since `opened` when the first byte of a request head arrived on a connection
    /// with no request in flight; [`NONE`] when no head is being read.
    head_since_ms: AtomicU64,
    /// Chosen to make room for a new connection: closes at its next read.
    evicted: AtomicBool,
    /// The task reading the connection, woken when it is evicted.
    reader: Mutex<Option<Waker>>,
}

impl Activity {
    fn new() -> Activity {
        Activity {
            opened: Instant::now(),
            last_request_ms: AtomicU64::new(0),
            in_flight: AtomicUsize::new(0),
            head_since_ms: AtomicU64::new(NONE),
            evicted: AtomicBool::new(false),
            reader: Mutex::new(None),
        }
    }

    fn evict(&self) {
        self.evicted.store(true, Ordering::Relaxed);
        if let Some(w) = self.reader.lock().expect("reader waker").take() {
            w.wake();
        }
    }

    fn now_ms(&self) -> u64 {
        self.opened.elapsed().as_millis() as u64
    }

    /// Why the connection should close now, if it should.
    fn overstayed(&self, limits: &Limits) -> Option<&'static str> {
        if self.evicted.load(Ordering::Relaxed) {
            return Some("closed to make room at the connection limit");
        }
        if self.in_flight.load(Ordering::Relaxed) > 0 {
            return None;
        }
        let now = self.now_ms();
        let head = self.head_since_ms.load(Ordering::Relaxed);
        if head != NONE && now.saturating_sub(head) > limits.header_read_timeout.as_millis() as u64
        {
            return Some("the request head was not complete within the header-read timeout");
        }
        let last = self.last_request_ms.load(Ordering::Relaxed);
        if now.saturating_sub(last) > limits.idle_timeout.as_millis() as u64 {
            return Some("idle for longer than the idle timeout");
        }
        None
    }

    /// How long the connection has waited for something that is not a request in flight (the
    /// eviction order); `None` with a request in flight or already evicted.
    fn waiting_ms(&self) -> Option<u64> {
        if self.in_flight.load(Ordering::Relaxed) > 0 || self.evicted.load(Ordering::Relaxed) {
            return None;
        }
        let now = self.now_ms();
        let head = self.head_since_ms.load(Ordering::Relaxed);
        let since = if head != NONE {
            // A head being sent slowly goes before any idle connection.
            return Some(u64::MAX / 2 + now.saturating_sub(head));
        } else {
            self.last_request_ms.load(Ordering::Relaxed)
        };
        Some(now.saturating_sub(since))
    }
}

/// The open connections of one listener.
#[derive(Debug)]
pub struct Gate {
    limits: Limits,
    /// Count the head of a request from its first byte (HTTP/1); off for gRPC, whose idle
    /// connections carry pings.
    track_heads: bool,
    open: Mutex<HashMap<u64, Arc<Activity>>>,
    next_id: AtomicU64,
    /// Connections told to make room that have not closed yet.
    closing: AtomicUsize,
}

/// A gate's answer for a new connection.
pub enum Admission {
    Admitted(Guarded<TcpStream>),
    /// Every place is taken by a connection with a request in flight.
    Refused(TcpStream),
}

impl Gate {
    pub fn new(limits: Limits, track_heads: bool) -> Arc<Gate> {
        Arc::new(Gate {
            limits,
            track_heads,
            open: Mutex::new(HashMap::new()),
            next_id: AtomicU64::new(0),
            closing: AtomicUsize::new(0),
        })
    }

    /// Admits `stream`; when refused while evicted connections are still closing, waits for them a
    /// little (up to 100 ms, accepting nothing meanwhile) and tries again, so a burst of new
    /// connections replaces idle ones instead of being refused.
    pub async fn admit_patiently(self: &Arc<Gate>, stream: TcpStream) -> Admission {
        let mut stream = stream;
        for _ in 0..50 {
            match self.admit(stream) {
                Admission::Refused(s) if self.closing.load(Ordering::Relaxed) > 0 => {
                    stream = s;
                    tokio::time::sleep(Duration::from_millis(2)).await;
                }
                other => return other,
            }
        }
        self.admit(stream)
    }

    /// Connections open now (those closing to make room included).
    pub fn open_connections(&self) -> usize {
        self.open.lock().expect("gate").len()
    }

    /// Registers `stream`, evicting the longest-waiting connection when at the limit.
    pub fn admit(self: &Arc<Gate>, stream: TcpStream) -> Admission {
        let max = self.limits.max_connections;
        let mut open = self.open.lock().expect("gate");
        if open.len() >= max {
            // Places given up by evicted connections free within one check; past this overflow
            // the new connection is refused rather than the table growing.
            let overflow = (max / 4).max(4);
            let victim = if open.len() < max + overflow {
                open.values()
                    .filter_map(|a| a.waiting_ms().map(|w| (w, a)))
                    .max_by_key(|(w, _)| *w)
                    .map(|(_, a)| a.clone())
            } else {
                None
            };
            match victim {
                Some(v) => {
                    v.evict();
                    self.closing.fetch_add(1, Ordering::Relaxed);
                    metrics::counter!("henrybook_connections_evicted_total").increment(1);
                }
                None => return Admission::Refused(stream),
            }
        }
        let id = self.next_id.fetch_add(1, Ordering::Relaxed);
        let activity = Arc::new(Activity::new());
        open.insert(id, activity.clone());
        drop(open);
        Admission::Admitted(Guarded {
            inner: stream,
            activity,
            gate: self.clone(),
            id,
            check: Box::pin(tokio::time::sleep(self.limits.check_every())),
        })
    }
}

/// A connection's stream: closes itself when it overstays (see the module docs) and leaves the gate
/// when dropped.
pub struct Guarded<T> {
    inner: T,
    activity: Arc<Activity>,
    gate: Arc<Gate>,
    id: u64,
    check: Pin<Box<tokio::time::Sleep>>,
}

impl<T> Guarded<T> {
    pub fn activity(&self) -> Arc<Activity> {
        self.activity.clone()
    }

    pub fn get_ref(&self) -> &T {
        &self.inner
    }
}

impl<T> Drop for Guarded<T> {
    fn drop(&mut self) {
        self.gate.open.lock().expect("gate").remove(&self.id);
        if self.activity.evicted.load(Ordering::Relaxed) {
            self.gate.closing.fetch_sub(1, Ordering::Relaxed);
        }
    }
}

impl<T: AsyncRead + Unpin> AsyncRead for Guarded<T> {
    fn poll_read(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        let this = self.get_mut();
        let limits = this.gate.limits;
        {
            let mut reader = this.activity.reader.lock().expect("reader waker");
            if !reader.as_ref().is_some_and(|w| w.will_wake(cx.waker())) {
                *reader = Some(cx.waker().clone());
            }
        }
        while this.check.as_mut().poll(cx).is_ready() {
            if let Some(why) = this.activity.overstayed(&limits) {
                tracing::debug!(reason = why, "closing a connection");
                return Poll::Ready(Err(io::Error::new(io::ErrorKind::TimedOut, why)));
            }
            let next = tokio::time::Instant::now() + limits.check_every();
            this.check.as_mut().reset(next);
        }
        if this.activity.evicted.load(Ordering::Relaxed) {
            return Poll::Ready(Err(io::Error::new(
                io::ErrorKind::ConnectionAborted,
                "closed to make room at the connection limit",
            )));
        }
        let before = buf.filled().len();
        let res = Pin::new(&mut this.inner).poll_read(cx, buf);
        if this.gate.track_heads
            && buf.filled().len() > before
            && this.activity.in_flight.load(Ordering::Relaxed) == 0
        {
            let now = this.activity.now_ms();
            let _ = this.activity.head_since_ms.compare_exchange(
                NONE,
                now,
                Ordering::Relaxed,
                Ordering::Relaxed,
            );
        }
        res
    }
}

impl<T: AsyncWrite + Unpin> AsyncWrite for Guarded<T> {
    fn poll_write(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &[u8],
    ) -> Poll<io::Result<usize>> {
        Pin::new(&mut self.get_mut().inner).poll_write(cx, buf)
    }
    fn poll_flush(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().inner).poll_flush(cx)
    }
    fn poll_shutdown(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().inner).poll_shutdown(cx)
    }
    fn poll_write_vectored(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        bufs: &[io::IoSlice<'_>],
    ) -> Poll<io::Result<usize>> {
        Pin::new(&mut self.get_mut().inner).poll_write_vectored(cx, bufs)
    }
    fn is_write_vectored(&self) -> bool {
        self.inner.is_write_vectored()
    }
}

/// The connection a request came on, in its extensions.
#[derive(Debug, Clone)]
pub struct ConnectionActivity(pub Arc<Activity>);

impl tonic::transport::server::Connected for Guarded<TcpStream> {
    type ConnectInfo = ConnectionActivity;
    fn connect_info(&self) -> ConnectionActivity {
        ConnectionActivity(self.activity.clone())
    }
}

/// Counts a request in flight on its connection until its response body has ended (or been dropped).
struct InFlight(Arc<Activity>);

impl InFlight {
    fn start(a: Arc<Activity>) -> InFlight {
        a.in_flight.fetch_add(1, Ordering::Relaxed);
        a.head_since_ms.store(NONE, Ordering::Relaxed);
        a.last_request_ms.store(a.now_ms(), Ordering::Relaxed);
        InFlight(a)
    }
}

impl Drop for InFlight {
    fn drop(&mut self) {
        self.0
            .last_request_ms
            .store(self.0.now_ms(), Ordering::Relaxed);
        self.0.in_flight.fetch_sub(1, Ordering::Relaxed);
    }
}

/// A response body that keeps its request counted in flight until it ends.
pub struct Counted<B> {
    inner: B,
    _in_flight: Option<InFlight>,
}

impl<B: http_body::Body + Unpin> http_body::Body for Counted<B> {
    type Data = B::Data;
    type Error = B::Error;
    fn poll_frame(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
    ) -> Poll<Option<Result<http_body::Frame<Self::Data>, Self::Error>>> {
        let this = self.get_mut();
        let res = Pin::new(&mut this.inner).poll_frame(cx);
        if matches!(res, Poll::Ready(None)) {
            this._in_flight = None;
        }
        res
    }
    fn is_end_stream(&self) -> bool {
        self.inner.is_end_stream()
    }
    fn size_hint(&self) -> http_body::SizeHint {
        self.inner.size_hint()
    }
}

/// A tower layer that counts requests in flight on their connection (see [`ConnectionActivity`]).
#[derive(Debug, Clone, Copy, Default)]
pub struct CountLayer;

impl<S> tower::Layer<S> for CountLayer {
    type Service = Count<S>;
    fn layer(&self, inner: S) -> Count<S> {
        Count { inner }
    }
}

#[derive(Debug, Clone)]
pub struct Count<S> {
    inner: S,
}

impl<S, ReqB, ResB> tower::Service<http::Request<ReqB>> for Count<S>
where
    S: tower::Service<http::Request<ReqB>, Response = http::Response<ResB>>,
    S::Future: Send + 'static,
    ResB: http_body::Body + Unpin,
{
    type Response = http::Response<Counted<ResB>>;
    type Error = S::Error;
    type Future = Pin<Box<dyn Future<Output = Result<Self::Response, S::Error>> + Send>>;

    fn poll_ready(&mut self, cx: &mut Context<'_>) -> Poll<Result<(), S::Error>> {
        self.inner.poll_ready(cx)
    }

    fn call(&mut self, req: http::Request<ReqB>) -> Self::Future {
        let guard = req
            .extensions()
            .get::<ConnectionActivity>()
            .map(|a| InFlight::start(a.0.clone()));
        let fut = self.inner.call(req);
        Box::pin(async move {
            let res = fut.await?;
            Ok(res.map(|inner| Counted {
                inner,
                _in_flight: guard,
            }))
        })
    }
}

/// The answer to a connection refused at the limit (written once, without waiting, then closed): a
/// 503 `overloaded` problem with Retry-After, as the routes would answer it.
fn refusal() -> Vec<u8> {
    let body = serde_json::json!({
        "type": "urn:henrybook:problem:overloaded",
        "title": "The service is at capacity; try again later",
        "status": 503,
        "detail": "every connection the service accepts is busy with a request; try again shortly",
    })
    .to_string();
    format!(
        "HTTP/1.1 503 Service Unavailable\r\ncontent-type: application/problem+json\r\n\
         retry-after: 1\r\nconnection: close\r\ncontent-length: {}\r\n\r\n{body}",
        body.len()
    )
    .into_bytes()
}

/// Serves `router` on `listener` until `stop` turns true, then stops accepting, lets open connections
/// finish their requests, and closes whatever is still open `drain` after `stop` (a connection
/// half-way through sending a request cannot hold shutdown up).
pub async fn serve_http(
    listener: TcpListener,
    router: axum::Router,
    limits: Limits,
    mut stop: watch::Receiver<bool>,
    drain: Duration,
) {
    use hyper_util::rt::{TokioExecutor, TokioIo};
    use hyper_util::server::conn::auto::Builder;
    use hyper_util::service::TowerToHyperService;
    use tower::ServiceExt;

    let gate = Gate::new(limits, true);
    let refused = refusal();
    let (closing_tx, closing_rx) = watch::channel(false);
    let mut connections = JoinSet::new();
    loop {
        while connections.try_join_next().is_some() {}
        let accepted = tokio::select! {
            a = listener.accept() => a,
            _ = stop.wait_for(|s| *s) => break,
        };
        let stream = match accepted {
            Ok((s, _)) => s,
            Err(e) => {
                // Out of descriptors or a connection reset before accept: wait a little and go on.
                tracing::warn!(error = %e, "cannot accept a connection");
                tokio::time::sleep(Duration::from_millis(50)).await;
                continue;
            }
        };
        let _ = stream.set_nodelay(true);
        let guarded = match gate.admit_patiently(stream).await {
            Admission::Admitted(g) => g,
            Admission::Refused(s) => {
                metrics::counter!("henrybook_connections_refused_total", "listener" => "http")
                    .increment(1);
                let _ = s.try_write(&refused);
                continue;
            }
        };
        let activity = ConnectionActivity(guarded.activity());
        // The connection goes into the request's extensions before the count looks for it.
        let service = CountLayer.layer(router.clone()).map_request(
            move |req: http::Request<hyper::body::Incoming>| {
                let mut req: Request = req.map(Body::new);
                req.extensions_mut().insert(activity.clone());
                req
            },
        );
        let service = TowerToHyperService::new(service);
        let mut closing = closing_rx.clone();
        connections.spawn(async move {
            let builder = Builder::new(TokioExecutor::new());
            let conn = builder.serve_connection_with_upgrades(TokioIo::new(guarded), service);
            tokio::pin!(conn);
            tokio::select! {
                _ = conn.as_mut() => return,
                _ = closing.wait_for(|c| *c) => conn.as_mut().graceful_shutdown(),
            }
            let _ = conn.await;
        });
    }
    drop(listener);
    let _ = closing_tx.send(true);
    let open = connections.len();
    if open > 0 {
        tracing::info!(open, "waiting for open HTTP connections");
    }
    let drained = tokio::time::timeout(drain, async {
        while connections.join_next().await.is_some() {}
    })
    .await;
    if drained.is_err() {
        tracing::warn!(
            open = connections.len(),
            "HTTP connections still open at the drain deadline: closed"
        );
        connections.abort_all();
        while connections.join_next().await.is_some() {}
    }
}

/// The accepted connections of the gRPC listener, through `gate` (refused ones are closed at once).
pub fn guarded_incoming(
    listener: TcpListener,
    gate: Arc<Gate>,
) -> impl tokio_stream::Stream<Item = io::Result<Guarded<TcpStream>>> {
    let listener = tokio_stream::wrappers::TcpListenerStream::new(listener);
    tokio_stream::StreamExt::filter_map(listener, move |accepted| match accepted {
        Ok(stream) => {
            let _ = stream.set_nodelay(true);
            match gate.admit(stream) {
                Admission::Admitted(g) => Some(Ok(g)),
                Admission::Refused(_) => {
                    metrics::counter!("henrybook_connections_refused_total", "listener" => "grpc")
                        .increment(1);
                    None
                }
            }
        }
        Err(e) => {
            tracing::warn!(error = %e, "cannot accept a gRPC connection");
            None
        }
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn limits() -> Limits {
        Limits {
            max_connections: 2,
            header_read_timeout: Duration::from_secs(5),
            idle_timeout: Duration::from_secs(30),
        }
    }

    #[test]
    fn a_connection_overstays_only_without_a_request_in_flight() {
        let a = Activity::new();
        assert_eq!(a.overstayed(&limits()), None);
        a.head_since_ms.store(0, Ordering::Relaxed);
        a.last_request_ms.store(0, Ordering::Relaxed);
        let l = Limits {
            header_read_timeout: Duration::ZERO,
            idle_timeout: Duration::ZERO,
            ..limits()
        };
        std::thread::sleep(Duration::from_millis(5));
        assert!(a.overstayed(&l).unwrap().contains("header-read"));
        let guard = InFlight::start(Arc::new(Activity::new()));
        assert_eq!(guard.0.overstayed(&l), None);
        drop(guard);
        a.head_since_ms.store(NONE, Ordering::Relaxed);
        assert!(a.overstayed(&l).unwrap().contains("idle"));
    }
}
