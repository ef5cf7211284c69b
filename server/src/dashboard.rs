//! The team dashboard: a few static pages served by the server itself. The HTML,
//! JavaScript and CSS are compiled into the binary (no build step, no outside
//! network); the pages are public and call the API with the bearer token the user
//! types in, which the browser keeps in `sessionStorage` only.

use axum::http::{header, HeaderName, HeaderValue};
use axum::response::{IntoResponse, Response};
use serde::Serialize;
use std::sync::LazyLock;
use tessera_protocol::CellStatus;

/// The page as written; its footer holds the marker that [`INDEX_HTML`] replaces by the caution.
const INDEX_TEMPLATE: &str = include_str!("dashboard/index.html");
const CAUTION_MARKER: &str = "<!--caution-->";
const STATUSES_MARKER: &str = "<!--statuses-->";
/// The page with the caution from [`tessera_engine::caution`] (plain text: no markup to
/// escape) and the status table (JSON in a data block the script reads).
static INDEX_HTML: LazyLock<String> = LazyLock::new(|| {
    INDEX_TEMPLATE
        .replacen(CAUTION_MARKER, tessera_engine::caution::CAUTION, 1)
        .replacen(STATUSES_MARKER, &status_table_json(), 1)
});

/// How the dashboard shows one cell status.
#[derive(Debug, Serialize)]
pub struct StatusLook {
    /// The API name (the names in `statuses` of `/leaves` and `/changes`, and the keys
    /// of the coverage answer).
    pub name: CellStatus,
    /// A leaf status (drawn, counted in volume); `split` is not.
    pub leaf: bool,
    /// Legend and hover text.
    pub label: &'static str,
    /// Drawing order, best to worst: where cells overlap in the two drawn axes (they
    /// differ in the other dimensions) the worst ends on top.
    pub rank: u8,
    /// Position in the coverage bars and their legend.
    pub bar: u8,
    /// Chosen to stay distinct for the common forms of colour-vision deficiency
    /// (blue / orange / yellow / grey axes, with lightness differences); every status
    /// is also named in the legend and the hover box.
    pub color: &'static str,
}

/// The look of a status. The match is exhaustive: a new status does not compile until
/// it has its row here.
fn look(s: CellStatus) -> StatusLook {
    let (label, rank, bar, color) = match s {
        CellStatus::Safe => ("proven safe", 0, 0, "#2c6fbb"),
        CellStatus::Pending => ("pending", 1, 5, "#c9c9c9"),
        CellStatus::Leased => ("being checked", 2, 4, "#8f8f8f"),
        CellStatus::Unresolved => ("unresolved", 3, 2, "#f0c43c"),
        CellStatus::Failed => ("failed (worker errors)", 4, 3, "#6b2d5c"),
        // It holds a checked counterexample somewhere in it: its volume bounds the
        // unsafe volume in it from above and does not measure it.
        CellStatus::Counterexample => ("holds a counterexample", 5, 1, "#d9631e"),
        CellStatus::Split => ("split", u8::MAX, u8::MAX, ""),
    };
    StatusLook { name: s, leaf: s.is_leaf(), label, rank, bar, color }
}

/// Every status with its look, in [`CellStatus::ALL`] order (the order of the status
/// indices in `/leaves` and `/changes` rows).
pub fn status_table() -> Vec<StatusLook> {
    CellStatus::ALL.into_iter().map(look).collect()
}

/// The table as JSON safe inside a `<script>` element (no `<` left to close it).
fn status_table_json() -> String {
    serde_json::to_string(&status_table()).unwrap_or_else(|_| "[]".into()).replace('<', "\\u003c")
}
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
        assert_eq!(INDEX_TEMPLATE.matches(STATUSES_MARKER).count(), 1);
        assert!(!INDEX_HTML.contains(STATUSES_MARKER));
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

    #[test]
    fn the_page_carries_one_status_table_built_from_the_enum() {
        let start = INDEX_HTML.find(r#"<script id="cell-statuses" type="application/json">"#).expect("data block");
        let rest = &INDEX_HTML[start..];
        let json = &rest[rest.find('>').unwrap() + 1..rest.find("</script>").unwrap()];
        let table: Vec<serde_json::Value> = serde_json::from_str(json).expect("the data block is JSON");
        let names: Vec<&str> = table.iter().map(|s| s["name"].as_str().unwrap()).collect();
        assert_eq!(names, CellStatus::ALL.map(CellStatus::api_name));
        let leaves: Vec<&serde_json::Value> = table.iter().filter(|s| s["leaf"] == true).collect();
        assert_eq!(leaves.len(), CellStatus::LEAVES.len());
        // Ranks and bar positions order the leaves without ties; every leaf has a label and colour.
        for key in ["rank", "bar"] {
            let mut v: Vec<u64> = leaves.iter().map(|s| s[key].as_u64().unwrap()).collect();
            v.sort();
            v.dedup();
            assert_eq!(v.len(), leaves.len(), "{key}");
        }
        assert!(leaves.iter().all(|s| !s["label"].as_str().unwrap().is_empty() && s["color"].as_str().unwrap().starts_with('#')));
        // The stored name never reaches the page.
        assert!(!json.contains("\"unsafe\""));
        // The script spells no status list of its own: the statuses it does not treat
        // specially appear in it nowhere.
        for s in [CellStatus::Pending, CellStatus::Leased, CellStatus::Unresolved, CellStatus::Failed, CellStatus::Split] {
            assert!(!APP_JS.contains(&format!("'{}'", s.api_name())), "app.js names '{}'", s.api_name());
        }
    }
}
