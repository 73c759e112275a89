//! Prometheus metrics: every series the interface lists, registered once, with every
//! label combination known in advance present (at zero) from the first scrape.

use prometheus::{
    Encoder, GaugeVec, HistogramOpts, HistogramVec, IntCounter, IntCounterVec, IntGauge, Opts, Registry,
    TextEncoder,
};

use crate::config::Config;
use crate::field::LinkError;
use crate::supervisor::control::State;

/// Why a loop tripped to fallback (the watchdog's reasons).
pub const FALLBACK_REASONS: &[&str] = &["stale", "not_finite", "out_of_range", "write_failed"];

/// Every metric of the service. Cheap to share behind an `Arc`.
pub struct Metrics {
    registry: Registry,
    pub objective: GaugeVec,
    pub setpoint: GaugeVec,
    pub estimate: GaugeVec,
    pub gradient: GaugeVec,
    pub loop_state: GaugeVec,
    pub constraint_value: GaugeVec,
    pub constraint_engaged: GaugeVec,
    pub fallbacks: IntCounterVec,
    pub link_errors: IntCounterVec,
    pub link_request_seconds: HistogramVec,
    pub tick_lateness_seconds: HistogramVec,
    pub ticks_skipped: IntCounterVec,
    pub history_queue_depth: IntGauge,
    pub history_rows: IntCounter,
    pub history_dropped: IntCounter,
    pub history_bytes: IntGauge,
    pub http_requests: IntCounterVec,
    build_info: GaugeVec,
}

impl std::fmt::Debug for Metrics {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Metrics")
    }
}

/// The route label of requests that matched no route, so scanners cannot create series.
pub const UNMATCHED_ROUTE: &str = "unmatched";

impl Metrics {
    /// Registers every metric and creates the series of every loop, input, state,
    /// fallback reason, link and link error kind of `config` at zero.
    pub fn new(config: &Config) -> Self {
        let registry = Registry::new();
        let gauge = |name: &str, help: &str, labels: &[&str]| {
            let g = GaugeVec::new(Opts::new(name, help), labels).expect("static metric definition");
            registry.register(Box::new(g.clone())).expect("metric registered once");
            g
        };
        let counter = |name: &str, help: &str, labels: &[&str]| {
            let c = IntCounterVec::new(Opts::new(name, help), labels).expect("static metric definition");
            registry.register(Box::new(c.clone())).expect("metric registered once");
            c
        };
        let histogram = |name: &str, help: &str, labels: &[&str], buckets: Vec<f64>| {
            let h = HistogramVec::new(HistogramOpts::new(name, help).buckets(buckets), labels)
                .expect("static metric definition");
            registry.register(Box::new(h.clone())).expect("metric registered once");
            h
        };
        // Request and lateness times on a control network: 0.5 ms to 10 s.
        let seconds =
            vec![0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0];
        let metrics = Metrics {
            objective: gauge("ridgeline_objective", "Latest value of each loop's objective.", &["loop"]),
            setpoint: gauge(
                "ridgeline_setpoint",
                "Setpoint applied to each input (estimate plus dither).",
                &["loop", "input"],
            ),
            estimate: gauge(
                "ridgeline_estimate",
                "Each input's estimate of its best setpoint.",
                &["loop", "input"],
            ),
            gradient: gauge(
                "ridgeline_gradient",
                "Each input's gradient estimate, objective units per input unit.",
                &["loop", "input"],
            ),
            loop_state: gauge(
                "ridgeline_loop_state",
                "1 for the state each loop is in, 0 for the others.",
                &["loop", "state"],
            ),
            constraint_value: gauge(
                "ridgeline_constraint_value",
                "Latest value of each loop constraint's expression.",
                &["loop", "constraint"],
            ),
            constraint_engaged: gauge(
                "ridgeline_constraint_engaged",
                "1 while a constraint is engaged (past its limit, and not yet released), else 0.",
                &["loop", "constraint"],
            ),
            fallbacks: counter(
                "ridgeline_fallbacks_total",
                "Trips to the fallback setpoint, by reason.",
                &["loop", "reason"],
            ),
            link_errors: counter(
                "ridgeline_link_errors_total",
                "Failed requests on each link, by kind.",
                &["link", "kind"],
            ),
            link_request_seconds: histogram(
                "ridgeline_link_request_seconds",
                "Time of each request on a link, answered or not.",
                &["link"],
                seconds.clone(),
            ),
            tick_lateness_seconds: histogram(
                "ridgeline_tick_lateness_seconds",
                "How late each loop tick started after its scheduled time.",
                &["loop"],
                seconds,
            ),
            ticks_skipped: counter(
                "ridgeline_ticks_skipped_total",
                "Ticks skipped because they came more than half a period late (after a stall).",
                &["loop"],
            ),
            history_queue_depth: IntGauge::new(
                "ridgeline_history_queue_depth",
                "Samples waiting to be written to history.",
            )
            .expect("static metric definition"),
            history_rows: IntCounter::new(
                "ridgeline_history_rows_total",
                "Samples and events written to history.",
            )
            .expect("static metric definition"),
            history_dropped: IntCounter::new(
                "ridgeline_history_dropped_total",
                "Samples not written because the history queue was full (events are never dropped).",
            )
            .expect("static metric definition"),
            history_bytes: IntGauge::new(
                "ridgeline_history_bytes",
                "Size of the history database and its write-ahead log, in bytes.",
            )
            .expect("static metric definition"),
            http_requests: counter(
                "ridgeline_http_requests_total",
                "API requests, by route template and status code.",
                &["route", "status"],
            ),
            build_info: gauge("ridgeline_build_info", "Always 1; the version is in the label.", &["version"]),
            registry,
        };
        let registered = [
            metrics.registry.register(Box::new(metrics.history_queue_depth.clone())),
            metrics.registry.register(Box::new(metrics.history_rows.clone())),
            metrics.registry.register(Box::new(metrics.history_dropped.clone())),
            metrics.registry.register(Box::new(metrics.history_bytes.clone())),
        ];
        assert!(registered.iter().all(Result::is_ok), "history metrics registered once");
        metrics.build_info.with_label_values(&[env!("CARGO_PKG_VERSION")]).set(1.0);
        metrics.start_at_zero(config);
        metrics
    }

    /// Prometheus instrumentation practice: series whose labels are known in advance
    /// exist from the first scrape, rather than appearing with their first event.
    fn start_at_zero(&self, config: &Config) {
        for l in &config.loops {
            self.objective.with_label_values(&[&l.name]);
            self.tick_lateness_seconds.with_label_values(&[&l.name]);
            self.ticks_skipped.with_label_values(&[&l.name]);
            self.set_state(&l.name, State::of(l.start_mode));
            for reason in FALLBACK_REASONS {
                self.fallbacks.with_label_values(&[l.name.as_str(), reason]);
            }
            for i in &l.inputs {
                for g in [&self.setpoint, &self.estimate, &self.gradient] {
                    g.with_label_values(&[&l.name, &i.name]);
                }
            }
            for c in &l.constraints {
                self.constraint_value.with_label_values(&[&l.name, &c.name]);
                self.constraint_engaged.with_label_values(&[&l.name, &c.name]);
            }
        }
        for link in &config.links {
            self.link_request_seconds.with_label_values(&[&link.name]);
            for kind in LinkError::KINDS {
                self.link_errors.with_label_values(&[link.name.as_str(), kind]);
            }
        }
    }

    /// Records one request on a link: its duration, and its error if it failed.
    pub fn link_request(&self, link: &str, seconds: f64, error: Option<&LinkError>) {
        self.link_request_seconds.with_label_values(&[link]).observe(seconds);
        if let Some(e) = error {
            self.link_errors.with_label_values(&[link, e.kind()]).inc();
        }
    }

    /// Marks `state` as the loop's current state.
    pub fn set_state(&self, loop_name: &str, state: State) {
        for s in State::ALL {
            self.loop_state.with_label_values(&[loop_name, s.as_str()]).set(if s == state {
                1.0
            } else {
                0.0
            });
        }
    }

    /// The text exposition format 0.0.4.
    pub fn render(&self) -> String {
        let mut out = Vec::new();
        // Encoding into a Vec cannot fail for valid metric families.
        let _ = TextEncoder::new().encode(&self.registry.gather(), &mut out);
        String::from_utf8(out).unwrap_or_default()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_known_series_exists_before_anything_happens() {
        let text =
            std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/../config/demo.toml")).unwrap();
        let config = crate::config::parse(&text, "demo").unwrap();
        let m = Metrics::new(&config);
        let out = m.render();
        for needle in [
            "ridgeline_objective{loop=\"boiler-1-o2-trim\"} 0",
            "ridgeline_setpoint{input=\"o2_setpoint_pct\",loop=\"boiler-1-o2-trim\"} 0",
            "ridgeline_loop_state{loop=\"boiler-1-o2-trim\",state=\"seeking\"} 1",
            "ridgeline_loop_state{loop=\"boiler-1-o2-trim\",state=\"fallback\"} 0",
            "ridgeline_fallbacks_total{loop=\"chw-plant-condenser\",reason=\"stale\"} 0",
            "ridgeline_link_errors_total{kind=\"timeout\",link=\"demo_plc\"} 0",
            "ridgeline_link_request_seconds_count{link=\"demo_plc\"} 0",
            "ridgeline_tick_lateness_seconds_count{loop=\"boiler-1-o2-trim\"} 0",
            "ridgeline_ticks_skipped_total{loop=\"boiler-1-o2-trim\"} 0",
            "ridgeline_constraint_value{constraint=\"co\",loop=\"boiler-1-o2-trim\"} 0",
            "ridgeline_constraint_engaged{constraint=\"co\",loop=\"boiler-1-o2-trim\"} 0",
            "ridgeline_history_dropped_total 0",
            "ridgeline_history_bytes 0",
            "ridgeline_build_info{version=",
        ] {
            assert!(out.contains(needle), "missing `{needle}` in:\n{out}");
        }
    }
}
