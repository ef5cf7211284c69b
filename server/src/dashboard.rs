//! The team dashboard: a few static pages served by the server itself. The HTML,
//! JavaScript and CSS are compiled into the binary (no build step, no outside
//! network); the pages are public and call the API with the bearer token the user
//! types in, which the browser keeps in `sessionStorage` only.

use axum::http::{header, HeaderName, HeaderValue};
use axum::response::{IntoResponse, Response};
use std::sync::LazyLock;

/// The page as written; its footer holds the marker that [`INDEX_HTML`] replaces by the caution.
const INDEX_TEMPLATE: &str = include_str!("dashboard/index.html");
const CAUTION_MARKER: &str = "<!--caution-->";
/// The page with the caution from [`tessera_engine::caution`] (plain text: no markup to escape).
static INDEX_HTML: LazyLock<String> =
    LazyLock::new(|| INDEX_TEMPLATE.replacen(CAUTION_MARKER, tessera_engine::caution::CAUTION, 1));
const APP_JS: &str = include_str!("dashboard/app.js");
const STYLE_CSS: &str = include_str!("dashboard/style.css");

/// Same-origin only: the pages load nothing from elsewhere and may call only this server.
const CSP: &str = "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; \
connect-src 'self'; base-uri 'none'; form-action 'self'; frame-ancestors 'none'";

fn asset(content_type: &'static str, body: &'static str) -> Response {
    let headers: [(HeaderName, HeaderValue); 4] = [
        (header::CONTENT_TYPE, HeaderValue::from_static(content_type)),
        (header::CACHE_CONTROL, HeaderValue::from_static("no-cache")),
        (header::CONTENT_SECURITY_POLICY, HeaderValue::from_static(CSP)),
        (header::X_CONTENT_TYPE_OPTIONS, HeaderValue::from_static("nosniff")),
    ];
    (headers, body).into_response()
}

/// The single page (campaign list and campaign views are chosen by the script from the path).
pub async fn index() -> Response {
    asset("text/html; charset=utf-8", INDEX_HTML.as_str())
}

pub async fn app_js() -> Response {
    asset("text/javascript; charset=utf-8", APP_JS)
}

pub async fn style_css() -> Response {
    asset("text/css; charset=utf-8", STYLE_CSS)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn assets_carry_the_caution_and_load_nothing_from_elsewhere() {
        assert_eq!(INDEX_TEMPLATE.matches(CAUTION_MARKER).count(), 1);
        assert!(INDEX_HTML.contains(tessera_engine::caution::CAUTION));
        assert!(!INDEX_HTML.contains(CAUTION_MARKER));
        for (name, text) in [("index.html", INDEX_HTML.as_str()), ("app.js", APP_JS), ("style.css", STYLE_CSS)] {
            for bad in ["http://", "https://", "//cdn", "@import"] {
                assert!(!text.contains(bad), "{name} refers to '{bad}'");
            }
        }
        // The token is kept for the session only, never in localStorage or cookies.
        assert!(APP_JS.contains("sessionStorage"));
        assert!(!APP_JS.contains("localStorage"));
        assert!(!APP_JS.contains("document.cookie"));
    }
}
