//! The HTTP API (api/openapi.yaml): one file per resource, merged here; bearer-token roles in [`auth`];
//! every error a problem+json body ([`problem`]); request ids, tracing, latency metrics, timeouts and
//! an explicit body limit around everything. The OpenAPI description is generated from the same
//! routes ([`openapi`]).

pub mod auth;
pub mod dashboard;
pub mod fits;
pub mod health;
pub mod parts;
pub mod problem;
pub mod queue;
pub mod report;
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
        .merge(health::router())
        .merge(session::router())
        .merge(queue::router())
        .merge(fits::router())
        .merge(sweeps::router())
        .merge(parts::router())
        .merge(report::router())
}

/// The OpenAPI description of every route, as committed in `api/openapi.yaml`.
pub fn openapi() -> utoipa::openapi::OpenApi {
    let mut api = api_router().split_for_parts().1;
    api.info.version = env!("CARGO_PKG_VERSION").to_string();
    problem_answers(&mut api);
    optional_bodies(&mut api);
    api
}

/// Operations whose body may be left out (the defaults apply): approve (no reason, no override) and
/// refit (the default options). utoipa marks every declared body as required.
fn optional_bodies(api: &mut utoipa::openapi::OpenApi) {
    use utoipa::openapi::Required;
    for path in [
        "/api/v1/fits/{fit_id}/approve",
        "/api/v1/fits/{fit_id}/refit",
    ] {
        if let Some(utoipa::openapi::RefOr::T(body)) = api
            .paths
            .paths
            .get_mut(path)
            .and_then(|item| item.post.as_mut())
            .and_then(|op| op.request_body.as_mut())
        {
            body.required = Some(Required::False);
        }
    }
}

/// Every error answer as the service gives it: `application/problem+json` with [`problem::ProblemBody`],
/// and on every operation the answers any request can get (401/403 for a secured one, 400 for unknown
/// or malformed query parameters, 404 for an unknown resource in the path, 422 for invalid values, 503
/// when overloaded or draining).
fn problem_answers(api: &mut utoipa::openapi::OpenApi) {
    use utoipa::openapi::content::Content;
    use utoipa::openapi::path::ParameterIn;
    use utoipa::openapi::{Ref, RefOr, Response};
    const PROBLEM: &str = "application/problem+json";
    let problem = |description: &str| {
        let mut r = Response::new(description);
        r.content.insert(
            PROBLEM.into(),
            RefOr::T(Content::new(Some(Ref::from_schema_name("ProblemBody")))),
        );
        RefOr::T(r)
    };
    for item in api.paths.paths.values_mut() {
        for op in [
            &mut item.get,
            &mut item.put,
            &mut item.post,
            &mut item.delete,
            &mut item.patch,
        ]
        .into_iter()
        .flatten()
        {
            let secured = op.security.as_ref().is_some_and(|s| !s.is_empty());
            let query = op.parameters.as_ref().is_some_and(|ps| {
                ps.iter().any(
                    |p| matches!(p, RefOr::T(p) if matches!(p.parameter_in, ParameterIn::Query)),
                )
            });
            let input = op.parameters.as_ref().is_some_and(|ps| !ps.is_empty())
                || op.request_body.is_some();
            let in_path = op.parameters.as_ref().is_some_and(|ps| {
                ps.iter().any(
                    |p| matches!(p, RefOr::T(p) if matches!(p.parameter_in, ParameterIn::Path)),
                )
            });
            let responses = &mut op.responses.responses;
            for (code, answer) in responses.iter_mut() {
                if (code.starts_with('4') || code.starts_with('5'))
                    && let RefOr::T(r) = answer
                    && let Some(c) = r.content.shift_remove("application/json")
                {
                    r.content.insert(PROBLEM.into(), c);
                }
            }
            let mut add = |code: &str, why: &str| {
                responses
                    .entry(code.to_string())
                    .or_insert_with(|| problem(why));
            };
            if secured {
                add(
                    "401",
                    "no token, an unknown or revoked one, or a malformed Authorization header",
                );
                add("403", "the token's role is too low for this operation");
            }
            if query || in_path || op.request_body.is_some() {
                add(
                    "400",
                    "an unknown or malformed parameter, or a body that cannot be read",
                );
            }
            if in_path {
                add("404", "no such fit, sweep or part");
            }
            if input {
                add("422", "a value is invalid; the problem names it");
            }
            add(
                "503",
                "the service is at a bound (connections, queue, upload bytes), draining, or its \
                 database is out of reach for the moment; retry after the Retry-After header",
            );
        }
    }
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
        .fallback(|| async { problem::OpsError::not_found("no such route") })
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
