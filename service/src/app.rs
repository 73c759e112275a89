//! The running service: history, metrics, links, one task per loop and the API, started
//! together and stopped in order. `run` and `demo` both go through [`App`].

use std::future::Future;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use anyhow::Context;
use tokio_util::sync::CancellationToken;

use crate::api::{self, AccessList, ApiState};
use crate::config::Config;
use crate::field::Links;
use crate::history::{History, InstanceLock, Retention, Writer, WriterSettings};
use crate::metrics::Metrics;
use crate::report::Reporting;
use crate::supervisor::{self, LoopHandle, LoopTask};

/// Samples that may wait for the history writer before new ones are dropped (counted).
const HISTORY_QUEUE: usize = 100_000;
/// How long requests in flight may take to finish once the service stops.
const API_DRAIN: Duration = Duration::from_secs(5);

/// How to run beyond what the config says.
#[derive(Debug, Clone)]
pub struct Options {
    /// Runs loops this many times faster than real time (the demo's time compression).
    pub speed: f64,
    /// Overrides `[service] listen`.
    pub listen: Option<SocketAddr>,
    /// Overrides `[service] database`.
    pub database: Option<PathBuf>,
}

impl Default for Options {
    fn default() -> Self {
        Options { speed: 1.0, listen: None, database: None }
    }
}

/// A service that is bound to its port and has its database open, but is not yet running.
pub struct App {
    listener: tokio::net::TcpListener,
    /// The API's certificate and key, when it serves HTTPS.
    tls: Option<api::Tls>,
    tasks: Vec<(LoopTask, Duration)>,
    state: ApiState,
    writer: Writer,
    reporting: Reporting,
    /// Held until the service has stopped: one running service per history store.
    lock: InstanceLock,
}

impl App {
    /// Takes the history store's instance lock, opens the database, binds the API
    /// listener and prepares every loop; nothing talks to the plant yet. Refused while
    /// another service runs on the same history store.
    pub async fn build(config: &Config, options: &Options) -> anyhow::Result<App> {
        let database = options.database.clone().unwrap_or_else(|| config.service.database.clone());
        let mut lock = InstanceLock::acquire(&database)?;
        let service = &config.service;
        let retention =
            Retention { raw_days: service.retention_days, rollup_days: service.rollup_retention_days };
        let history = History::open(&database, retention).await?;
        let metrics = Arc::new(Metrics::new(config));
        let settings = WriterSettings {
            queue_capacity: HISTORY_QUEUE,
            disk_free_floor_bytes: u64::from(service.disk_free_floor_mb) * 1024 * 1024,
        };
        let (sender, writer) = history.writer(settings, Some(metrics.clone()));
        let reporting = Reporting { metrics: Some(metrics.clone()), history: Some(sender) };

        let listen = options.listen.unwrap_or(config.service.listen);
        let listener = tokio::net::TcpListener::bind(listen)
            .await
            .with_context(|| format!("cannot listen on {listen} for the API"))?;
        if let Err(e) = lock.describe(listener.local_addr().ok()) {
            tracing::warn!(lock = %lock.path().display(), error = %e, "cannot note the API address in the instance lock");
        }
        let links = Links::new(config, &reporting).context("cannot set up the links")?;
        let mut tasks = Vec::new();
        let mut handles: Vec<LoopHandle> = Vec::new();
        for index in 0..config.loops.len() {
            let (mut task, handle) =
                LoopTask::new(config, index, &links, reporting.clone(), Some(history.clone()));
            task.set_speed(options.speed);
            let period = Duration::from_secs_f64(task.tick_s() / options.speed);
            tasks.push((task, period));
            handles.push(handle);
        }
        let access = AccessList::new(&config.access, config.service.open_reads);
        if access.is_empty() {
            tracing::warn!("no [[access]] tokens in the config: every change through the API is refused");
        }
        let tls = match &service.tls {
            Some(files) => Some(api::Tls::load(files).await?),
            None => None,
        };
        let listening = listener.local_addr()?;
        let warnings: Vec<String> =
            api::cleartext_warning(listening, tls.is_some(), config.access.len()).into_iter().collect();
        for warning in &warnings {
            tracing::warn!("{warning}");
        }
        let state = ApiState {
            loops: Arc::new(handles),
            history: Some(history),
            metrics,
            access: Arc::new(access),
            warnings: Arc::new(warnings),
        };
        Ok(App { listener, tls, tasks, state, writer, reporting, lock })
    }

    /// Where the API listens (useful with port 0).
    pub fn local_addr(&self) -> anyhow::Result<SocketAddr> {
        Ok(self.listener.local_addr()?)
    }

    /// Handles on every loop: latest status, mode and bounds changes.
    pub fn loops(&self) -> Arc<Vec<LoopHandle>> {
        self.state.loops.clone()
    }

    /// Runs until `shutdown` completes, then stops in order: the API stops taking
    /// requests (those in flight get a few seconds), every loop writes its shutdown
    /// values, and the history writer flushes what is queued.
    pub async fn run_until(self, shutdown: impl Future<Output = ()>) -> anyhow::Result<()> {
        let App { listener, tls, tasks, state, writer, reporting, lock } = self;
        let writer_stop = CancellationToken::new();
        let writing = tokio::spawn(writer.run(writer_stop.clone()));
        reporting.event(
            None,
            "service_started",
            serde_json::json!({"version": env!("CARGO_PKG_VERSION")}),
            "system",
        );

        let stop = CancellationToken::new();
        let mut handles = Vec::new();
        for (task, period) in tasks {
            let name = task.name().to_owned();
            handles.push((name, tokio::spawn(supervisor::run(task, period, stop.clone()))));
        }
        let api = tokio::spawn(api::serve(listener, api::router(state), tls, stop.clone(), API_DRAIN));

        shutdown.await;
        tracing::info!("stopping: loops write their shutdown setpoints, history is flushed");
        stop.cancel();
        // Every loop writes its shutdown setpoints before the history is flushed.
        for (name, handle) in handles {
            // A loop that panicked has stopped writing; /readyz has said so since.
            if let Err(e) = handle.await {
                tracing::error!(r#loop = %name, error = %e, "the loop's task ended abnormally");
            }
        }
        // The server itself cuts requests off after API_DRAIN; this is a backstop.
        match tokio::time::timeout(API_DRAIN + Duration::from_secs(1), api).await {
            Ok(served) => served.context("the API task failed")?.context("the API server failed")?,
            Err(_) => tracing::warn!("API requests still running after {API_DRAIN:?} were cut off"),
        }
        reporting.event(None, "service_stopped", serde_json::json!({}), "system");
        drop(reporting);
        writer_stop.cancel();
        writing.await.context("the history writer failed")?;
        drop(lock);
        Ok(())
    }
}
