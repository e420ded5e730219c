//! Bearer-token roles as extractors: a handler that takes `Inspector` can only run for an inspector
//! or engineer token. No token or an unknown token → 401; a token whose role is too low → 403.

use crate::app::AppState;
use crate::ops::OpsError;
use crate::ops::auth::authorize;
use crate::store::tokens::{Caller, Role};
use axum::extract::FromRequestParts;
use axum::http::header;
use axum::http::request::Parts;

async fn caller(parts: &Parts, state: &AppState, needed: Role) -> Result<Caller, OpsError> {
    let header = parts
        .headers
        .get(header::AUTHORIZATION)
        .map(|h| h.to_str().unwrap_or(""));
    authorize(&state.store, header, needed).await
}

macro_rules! role_extractor {
    ($name:ident, $role:expr, $doc:literal) => {
        #[doc = $doc]
        pub struct $name(pub Caller);

        impl FromRequestParts<AppState> for $name {
            type Rejection = OpsError;
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
