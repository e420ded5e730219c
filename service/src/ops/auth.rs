//! Who is calling: a bearer token's caller, checked against the role an operation needs. Both
//! transports hand the `Authorization` value they received (HTTP header, gRPC metadata) to
//! [`authorize`].

use super::error::{ErrorKind, OpsError};
use crate::store::Backend;
use crate::store::tokens::{Caller, Role};

/// The caller behind an `Authorization` value, if its role is at least `needed`: absent, malformed or
/// unknown → [`ErrorKind::Unauthorized`]; too low → [`ErrorKind::Forbidden`]. A value that is not
/// visible ASCII is passed as `""`.
pub async fn authorize(
    store: &Backend,
    authorization: Option<&str>,
    needed: Role,
) -> Result<Caller, OpsError> {
    let header = authorization.ok_or_else(|| {
        OpsError::new(
            ErrorKind::Unauthorized,
            "send Authorization: Bearer <token>",
        )
    })?;
    // The scheme name is case-insensitive (RFC 9110 §11.1): `bearer`, `BEARER` and `Bearer` all count.
    let token = header
        .split_once(' ')
        .filter(|(scheme, _)| scheme.eq_ignore_ascii_case("bearer"))
        .map(|(_, t)| t.trim())
        .filter(|t| !t.is_empty())
        .ok_or_else(|| {
            OpsError::new(
                ErrorKind::Unauthorized,
                "the Authorization header must be Bearer <token>",
            )
        })?;
    let caller = store
        .authenticate(token)
        .await
        .map_err(OpsError::from)?
        .ok_or_else(|| OpsError::new(ErrorKind::Unauthorized, "the token is unknown or revoked"))?;
    if caller.role < needed {
        return Err(OpsError::new(
            ErrorKind::Forbidden,
            format!(
                "this needs the {} role; the token has {}",
                needed.as_str(),
                caller.role.as_str()
            ),
        ));
    }
    Ok(caller)
}
