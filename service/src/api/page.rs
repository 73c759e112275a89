//! The status page for people: one self-contained HTML document (inline style and
//! script, nothing loaded from anywhere else) that draws each loop's state, trends,
//! constraints and events from the API and refreshes them by `fetch()` every few
//! seconds. With an operator token typed in, it changes mode and bounds through the same
//! API.

use axum::http::header;
use axum::response::{Html, IntoResponse};

use super::Reader;

const PAGE: &str = include_str!("page/index.html");

/// Only what the page itself carries, and calls back to this server: the browser
/// refuses anything else.
const POLICY: &str = "default-src 'none'; script-src 'unsafe-inline'; style-src 'unsafe-inline'; \
                      connect-src 'self'; img-src data:; base-uri 'none'; form-action 'none'; \
                      frame-ancestors 'none'";

pub async fn status_page(_: Reader) -> impl IntoResponse {
    (
        [
            (header::CONTENT_SECURITY_POLICY, POLICY),
            (header::CACHE_CONTROL, "no-store"),
            (header::REFERRER_POLICY, "no-referrer"),
        ],
        Html(PAGE),
    )
}
