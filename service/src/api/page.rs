//! The status page for people: one self-contained HTML document (inline style and
//! script, nothing loaded from anywhere else) that draws each loop's state, trends,
//! constraints and events from the API and refreshes them by `fetch()` every few
//! seconds. With an operator token typed in, it changes mode and bounds through the same
//! API.

use axum::extract::State;
use axum::http::header;
use axum::response::{Html, IntoResponse};

use super::{ApiState, Reader};

const PAGE: &str = include_str!("page/index.html");

/// Only what the page itself carries, and calls back to this server: the browser
/// refuses anything else.
const POLICY: &str = "default-src 'none'; script-src 'unsafe-inline'; style-src 'unsafe-inline'; \
                      connect-src 'self'; img-src data:; base-uri 'none'; form-action 'none'; \
                      frame-ancestors 'none'";

pub async fn status_page(State(state): State<ApiState>, _: Reader) -> impl IntoResponse {
    (
        [
            (header::CONTENT_SECURITY_POLICY, POLICY),
            (header::CACHE_CONTROL, "no-store"),
            (header::REFERRER_POLICY, "no-referrer"),
        ],
        Html(with_warnings(&state.warnings)),
    )
}

/// The page with the service's setup warnings (tokens in clear text, say) at the top.
fn with_warnings(warnings: &[String]) -> String {
    let notes: String = warnings
        .iter()
        .map(|w| format!("<p class=\"setup-warning\" role=\"alert\">{}</p>\n", escape(w)))
        .collect();
    PAGE.replacen("<!-- setup warnings -->\n", &notes, 1)
}

fn escape(text: &str) -> String {
    text.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn setup_warnings_are_shown_at_the_top_escaped() {
        let page = with_warnings(&["tokens <in> clear & text".to_owned()]);
        assert!(page.contains(
            "<p class=\"setup-warning\" role=\"alert\">tokens &lt;in&gt; clear &amp; text</p>\n<p id=\"problem\""
        ));
        assert!(!with_warnings(&[]).contains("setup-warning\" role"));
    }
}
