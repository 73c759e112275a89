//! Where the service reports what happens besides logs: Prometheus metrics and history
//! events. Both are optional, so tests and benchmarks can run parts without them.

use std::sync::Arc;

use crate::field::LinkError;
use crate::history::{EventRecord, HistorySender, now_ms};
use crate::metrics::Metrics;

#[derive(Clone, Default)]
pub struct Reporting {
    pub metrics: Option<Arc<Metrics>>,
    pub history: Option<HistorySender>,
}

impl std::fmt::Debug for Reporting {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Reporting")
            .field("metrics", &self.metrics.is_some())
            .field("history", &self.history.is_some())
            .finish()
    }
}

impl Reporting {
    /// Records an event in history (never dropped), if history is kept.
    pub fn event(&self, loop_name: Option<&str>, kind: &str, detail: serde_json::Value, actor: &str) {
        if let Some(h) = &self.history {
            h.event(EventRecord {
                at_ms: now_ms(),
                loop_name: loop_name.map(str::to_owned),
                kind: kind.to_owned(),
                detail,
                actor: actor.to_owned(),
            });
        }
    }

    /// Counts a request refused before it was sent (the link is down or will not connect).
    pub fn link_error(&self, link: &str, error: &LinkError) {
        if let Some(m) = &self.metrics {
            m.link_errors.with_label_values(&[link, error.kind()]).inc();
        }
    }

    /// Counts one request on a link: its duration, and its error if it failed.
    pub fn link_request(&self, link: &str, seconds: f64, error: Option<&LinkError>) {
        if let Some(m) = &self.metrics {
            m.link_request(link, seconds, error);
        }
    }
}
