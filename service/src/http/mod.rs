//! The HTTP API (api/openapi.yaml): one file per resource, merged here; bearer-token roles in [`auth`];
//! every error a problem+json body ([`problem`]); request ids, tracing, latency metrics, timeouts and
//! an explicit body limit around everything. The OpenAPI description is generated from the same
//! routes ([`openapi`]).

pub mod auth;
pub mod backpressure;
pub mod dashboard;
pub mod fits;
pub mod ops;
pub mod parts;
pub mod problem;
pub mod queue;
pub mod session;
pub mod sweeps;

use crate::app::AppState;
use axum::Router;
use axum::extract::{DefaultBodyLimit, MatchedPath, Request};
use axum::http::{HeaderName, StatusCode};
use axum::middleware::{self, Next};
use axum::response::Response;
use std::time::Instant;
use tower::ServiceBuilder;
use tower_http::request_id::{MakeRequestUuid, PropagateRequestIdLayer, SetRequestIdLayer};
use tower_http::timeout::TimeoutLayer;
use tower_http::trace::TraceLayer;
use utoipa::OpenApi;
use utoipa::openapi::security::{HttpAuthScheme, HttpBuilder, SecurityScheme};
use utoipa_axum::router::OpenApiRouter;

#[derive(OpenApi)]
#[openapi(
    info(
        title = "henrybook",
        description = "Impedance sweeps of inductors in, fitted models, verdicts and behavioural queries out. \
            Numbers carry SI units in their names; errors are application/problem+json (RFC 9457) with \
            type urn:henrybook:problem:<kind>. Roles: reader < inspector < engineer."
    ),
    modifiers(&BearerScheme),
    components(schemas(problem::ProblemBody))
)]
struct ApiDoc;

struct BearerScheme;

impl utoipa::Modify for BearerScheme {
    fn modify(&self, openapi: &mut utoipa::openapi::OpenApi) {
        let components = openapi.components.get_or_insert_with(Default::default);
        components.add_security_scheme(
            "bearer",
            SecurityScheme::Http(HttpBuilder::new().scheme(HttpAuthScheme::Bearer).build()),
        );
    }
}

fn api_router() -> OpenApiRouter<AppState> {
    OpenApiRouter::with_openapi(ApiDoc::openapi())
        .merge(ops::router())
        .merge(session::router())
        .merge(queue::router())
        .merge(fits::router())
        .merge(sweeps::router())
        .merge(parts::router())
}

/// The OpenAPI description of every route, as committed in `api/openapi.yaml`.
pub fn openapi() -> utoipa::openapi::OpenApi {
    let mut api = api_router().split_for_parts().1;
    api.info.version = env!("CARGO_PKG_VERSION").to_string();
    api
}

/// The OpenAPI description as YAML text.
pub fn openapi_yaml() -> String {
    openapi()
        .to_yaml()
        .expect("the OpenAPI description serialises")
}

const REQUEST_ID: HeaderName = HeaderName::from_static("x-request-id");

async fn record_latency(req: Request, next: Next) -> Response {
    let started = Instant::now();
    let method = req.method().to_string();
    let route = req
        .extensions()
        .get::<MatchedPath>()
        .map_or_else(|| "unmatched".to_string(), |p| p.as_str().to_string());
    let res = next.run(req).await;
    metrics::histogram!(
        "henrybook_http_request_duration_seconds",
        "method" => method,
        "route" => route,
        "status" => res.status().as_u16().to_string()
    )
    .record(started.elapsed().as_secs_f64());
    res
}

/// The whole API over `state`, with its middleware.
pub fn router(state: AppState) -> Router {
    let max_body = state.settings.max_body_bytes;
    let timeout = state.settings.request_timeout;
    let (routes, _) = api_router().split_for_parts();
    routes
        .merge(dashboard::router())
        .fallback(|| async { problem::Problem::not_found("no such route") })
        .layer(middleware::from_fn(record_latency))
        .layer(DefaultBodyLimit::max(max_body))
        .with_state(state)
        .layer(
            ServiceBuilder::new()
                .layer(SetRequestIdLayer::new(REQUEST_ID, MakeRequestUuid))
                .layer(TraceLayer::new_for_http().make_span_with(|req: &Request| {
                    let id = req
                        .headers()
                        .get(REQUEST_ID)
                        .and_then(|v| v.to_str().ok())
                        .unwrap_or("");
                    tracing::info_span!("request", method = %req.method(), uri = %req.uri(), request_id = %id)
                }))
                .layer(PropagateRequestIdLayer::new(REQUEST_ID))
                .layer(middleware::from_fn(problem::problem_for_plain_errors))
                .layer(TimeoutLayer::with_status_code(
                    StatusCode::SERVICE_UNAVAILABLE,
                    timeout,
                )),
        )
}
