//! Bearer-token roles as extractors: a handler that takes `Inspector` can only run for an inspector
//! or engineer token. No token or an unknown token → 401; a token whose role is too low → 403.

use super::problem::{Kind, Problem};
use crate::app::AppState;
use crate::store::tokens::{Caller, Role};
use axum::extract::FromRequestParts;
use axum::http::header;
use axum::http::request::Parts;

async fn caller(parts: &Parts, state: &AppState, needed: Role) -> Result<Caller, Problem> {
    let header = parts
        .headers
        .get(header::AUTHORIZATION)
        .map(|h| h.to_str().unwrap_or(""));
    authorize(&state.store, header, needed).await
}

/// The caller behind an `Authorization` value (HTTP header or gRPC metadata), if its role is at
/// least `needed`: absent, malformed or unknown → [`Kind::Unauthorized`]; too low → [`Kind::Forbidden`].
/// A value that is not visible ASCII is passed as `""`.
pub async fn authorize(
    store: &crate::store::Store,
    authorization: Option<&str>,
    needed: Role,
) -> Result<Caller, Problem> {
    let header = authorization
        .ok_or_else(|| Problem::new(Kind::Unauthorized, "send Authorization: Bearer <token>"))?;
    // The scheme name is case-insensitive (RFC 9110 §11.1): `bearer`, `BEARER` and `Bearer` all count.
    let token = header
        .split_once(' ')
        .filter(|(scheme, _)| scheme.eq_ignore_ascii_case("bearer"))
        .map(|(_, t)| t.trim())
        .filter(|t| !t.is_empty())
        .ok_or_else(|| {
            Problem::new(
                Kind::Unauthorized,
                "the Authorization header must be Bearer <token>",
            )
        })?;
    let caller = store
        .authenticate(token)
        .await
        .map_err(Problem::from)?
        .ok_or_else(|| Problem::new(Kind::Unauthorized, "the token is unknown or revoked"))?;
    if caller.role < needed {
        return Err(Problem::new(
            Kind::Forbidden,
            format!(
                "this needs the {} role; the token has {}",
                needed.as_str(),
                caller.role.as_str()
            ),
        ));
    }
    Ok(caller)
}

macro_rules! role_extractor {
    ($name:ident, $role:expr, $doc:literal) => {
        #[doc = $doc]
        pub struct $name(pub Caller);

        impl FromRequestParts<AppState> for $name {
            type Rejection = Problem;
            async fn from_request_parts(
                parts: &mut Parts,
                state: &AppState,
            ) -> Result<Self, Self::Rejection> {
                caller(parts, state, $role).await.map($name)
            }
        }
    };
}

role_extractor!(
    Reader,
    Role::Reader,
    "Any valid token (reader, inspector or engineer)."
);
role_extractor!(
    Inspector,
    Role::Inspector,
    "An inspector or engineer token."
);
role_extractor!(Engineer, Role::Engineer, "An engineer token.");
