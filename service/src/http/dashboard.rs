//! The dashboard: HTML, CSS and JavaScript embedded in the binary (no CDN, no separate front-end
//! server). Everything it shows it fetches from `/api/v1` with the user's bearer token, so this module
//! serves static bytes only and needs no state.
//!
//! Layout of the URL space:
//! - `/` and any `/ui/...` path outside `/ui/assets/` answer with the single page (`index.html`); the
//!   script reads the path (`/ui/queue`, `/ui/parts/{part_number}`, `/ui/fits/{fit_id}` ...) and draws
//!   the page, so a link to a fit can be bookmarked and reloaded.
//! - `/ui/assets/{file}` are the scripts and styles; an unknown asset is a 404, never the page.

use axum::Router;
use axum::extract::Path;
use axum::http::{HeaderMap, HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use rust_embed::Embed;

#[derive(Embed)]
#[folder = "ui/"]
struct Assets;

/// The dashboard's routes; the service merges them into its router.
pub fn router<S: Clone + Send + Sync + 'static>() -> Router<S> {
    Router::new()
        .route("/", get(page))
        .route("/ui", get(page))
        .route("/ui/", get(page))
        .route("/ui/{*path}", get(ui_path))
}

/// Every page is the same document; the script picks the view from the location.
async fn page(headers: HeaderMap) -> Response {
    serve("index.html", &headers)
}

async fn ui_path(Path(path): Path<String>, headers: HeaderMap) -> Response {
    if path.starts_with("assets/") {
        serve(&path, &headers)
    } else {
        serve("index.html", &headers)
    }
}

/// Content-Security-Policy: the pages load nothing from anywhere but this server, run no inline script
/// and cannot be framed. Downloads are built as `blob:` URLs because they need the bearer token. The
/// one inline style admitted (by its hash) is the inspection report's, which the dashboard opens as a
/// `blob:` page that inherits this policy.
static CSP: std::sync::LazyLock<HeaderValue> = std::sync::LazyLock::new(|| {
    HeaderValue::from_str(&format!(
        "default-src 'self'; script-src 'self'; style-src 'self' {}; img-src 'self' data: blob:; \
         connect-src 'self'; object-src 'none'; base-uri 'none'; frame-ancestors 'none'; \
         form-action 'self'",
        crate::report::html::style_source()
    ))
    .expect("the policy is visible ASCII")
});

fn serve(path: &str, headers: &HeaderMap) -> Response {
    let Some(file) = Assets::get(path) else {
        return (
            StatusCode::NOT_FOUND,
            [(header::CONTENT_TYPE, "text/plain; charset=utf-8")],
            format!("no dashboard asset named {path}\n"),
        )
            .into_response();
    };
    let etag = format!(
        "\"{}\"",
        file.metadata
            .sha256_hash()
            .iter()
            .take(16)
            .map(|b| format!("{b:02x}"))
            .collect::<String>()
    );
    let common = [
        // Revalidate every time: the assets are small and a stale script against a newer API is worse.
        (header::CACHE_CONTROL, HeaderValue::from_static("no-cache")),
        (
            header::X_CONTENT_TYPE_OPTIONS,
            HeaderValue::from_static("nosniff"),
        ),
        (header::CONTENT_SECURITY_POLICY, CSP.clone()),
        (
            header::ETAG,
            HeaderValue::from_str(&etag).expect("hex digits are a valid header value"),
        ),
    ];
    let unchanged = headers
        .get(header::IF_NONE_MATCH)
        .and_then(|v| v.to_str().ok())
        .is_some_and(|v| v.split(',').any(|t| t.trim() == etag));
    if unchanged {
        return (StatusCode::NOT_MODIFIED, common).into_response();
    }
    let mime = file.metadata.mimetype();
    let content_type = if mime.starts_with("text/") {
        format!("{mime}; charset=utf-8")
    } else {
        mime.to_string()
    };
    (
        StatusCode::OK,
        common,
        [(header::CONTENT_TYPE, content_type)],
        file.data.into_owned(),
    )
        .into_response()
}

#[cfg(test)]
mod tests {
    use super::*;
    use axum::body::Body;
    use axum::http::Request;
    use tower::ServiceExt;

    async fn get_path(path: &str, if_none_match: Option<&str>) -> (StatusCode, HeaderMap, String) {
        let mut req = Request::get(path);
        if let Some(tag) = if_none_match {
            req = req.header(header::IF_NONE_MATCH, tag);
        }
        let res = router::<()>()
            .oneshot(req.body(Body::empty()).unwrap())
            .await
            .unwrap();
        let status = res.status();
        let headers = res.headers().clone();
        let bytes = axum::body::to_bytes(res.into_body(), 1 << 24)
            .await
            .unwrap();
        (
            status,
            headers,
            String::from_utf8_lossy(&bytes).into_owned(),
        )
    }

    #[tokio::test]
    async fn the_root_and_every_page_path_serve_the_single_page() {
        for path in [
            "/",
            "/ui",
            "/ui/queue",
            "/ui/fits/42",
            "/ui/parts/HB-2.2%C2%B5H",
        ] {
            let (status, headers, body) = get_path(path, None).await;
            assert_eq!(status, StatusCode::OK, "{path}");
            assert_eq!(
                headers[header::CONTENT_TYPE],
                "text/html; charset=utf-8",
                "{path}"
            );
            assert!(body.contains("<title>henrybook</title>"), "{path}");
        }
    }

    #[tokio::test]
    async fn an_unknown_asset_is_a_404_not_the_page() {
        let (status, _, body) = get_path("/ui/assets/no-such.js", None).await;
        assert_eq!(status, StatusCode::NOT_FOUND);
        assert!(body.contains("no-such.js"));
    }

    #[tokio::test]
    async fn scripts_and_styles_carry_their_types_and_a_strict_policy() {
        let (status, headers, _) = get_path("/ui/assets/app.js", None).await;
        assert_eq!(status, StatusCode::OK);
        assert_eq!(
            headers[header::CONTENT_TYPE],
            "text/javascript; charset=utf-8"
        );
        assert!(
            headers[header::CONTENT_SECURITY_POLICY]
                .to_str()
                .unwrap()
                .contains("script-src 'self'")
        );
        let (_, headers, _) = get_path("/ui/assets/app.css", None).await;
        assert_eq!(headers[header::CONTENT_TYPE], "text/css; charset=utf-8");
    }

    #[tokio::test]
    async fn a_matching_etag_answers_not_modified() {
        let (_, headers, _) = get_path("/ui/assets/app.js", None).await;
        let tag = headers[header::ETAG].to_str().unwrap().to_string();
        let (status, _, body) = get_path("/ui/assets/app.js", Some(&tag)).await;
        assert_eq!(status, StatusCode::NOT_MODIFIED);
        assert!(body.is_empty());
        let (status, _, _) = get_path("/ui/assets/app.js", Some("\"other\"")).await;
        assert_eq!(status, StatusCode::OK);
    }

    /// Every `/ui/assets/...` reference in the page and every relative `import` in the scripts resolves
    /// to an embedded file, so a renamed module cannot leave the page blank.
    #[test]
    fn every_referenced_asset_is_embedded() {
        let mut missing = Vec::new();
        let mut checked = 0;
        for name in Assets::iter() {
            let file = Assets::get(&name).unwrap();
            let text = String::from_utf8_lossy(&file.data).into_owned();
            let dir = name.rsplit_once('/').map(|(d, _)| d).unwrap_or("");
            for piece in text.split(['"', '\'']) {
                let target = if let Some(rest) = piece.strip_prefix("/ui/") {
                    if !rest.starts_with("assets/") {
                        continue;
                    }
                    rest.to_string()
                } else if let Some(rest) = piece.strip_prefix("./") {
                    if !rest.ends_with(".js") || !name.ends_with(".js") {
                        continue;
                    }
                    format!("{dir}/{rest}")
                } else {
                    continue;
                };
                checked += 1;
                if Assets::get(&target).is_none() {
                    missing.push(format!("{name} -> {target}"));
                }
            }
        }
        assert!(checked >= 5, "found only {checked} references");
        assert!(missing.is_empty(), "missing assets: {missing:?}");
    }
}
