//! The running service: links, one task per loop and the API, started together and
//! stopped together. `run` and `demo` both go through [`App`].

use std::future::Future;
use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;

use anyhow::Context;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

use crate::api::{self, Statuses};
use crate::config::Config;
use crate::field::Links;
use crate::supervisor::{self, LoopTask};

/// How to run beyond what the config says.
#[derive(Debug, Clone)]
pub struct Options {
    /// Runs loops this many times faster than real time (the demo's time compression).
    pub speed: f64,
    /// Overrides `[service] listen`.
    pub listen: Option<SocketAddr>,
}

impl Default for Options {
    fn default() -> Self {
        Options { speed: 1.0, listen: None }
    }
}

/// A service that is bound to its port but not yet running.
pub struct App {
    listener: tokio::net::TcpListener,
    tasks: Vec<(LoopTask, Duration)>,
    statuses: Statuses,
}

impl App {
    /// Binds the API listener and prepares every loop; nothing talks to the plant yet.
    pub async fn build(config: &Config, options: &Options) -> anyhow::Result<App> {
        let listen = options.listen.unwrap_or(config.service.listen);
        let listener = tokio::net::TcpListener::bind(listen)
            .await
            .with_context(|| format!("cannot listen on {listen} for the API"))?;
        let links = Links::new(config).context("cannot set up the links")?;
        let mut tasks = Vec::new();
        let mut statuses = Vec::new();
        for index in 0..config.loops.len() {
            let (task, status) = LoopTask::new(config, index, &links);
            let period = Duration::from_secs_f64(task.tick_s() / options.speed);
            tasks.push((task, period));
            statuses.push(status);
        }
        Ok(App { listener, tasks, statuses: Arc::new(statuses) })
    }

    /// Where the API listens (useful with port 0).
    pub fn local_addr(&self) -> anyhow::Result<SocketAddr> {
        Ok(self.listener.local_addr()?)
    }

    /// The latest status of every loop.
    pub fn statuses(&self) -> Statuses {
        self.statuses.clone()
    }

    /// Runs until `shutdown` completes; then every loop writes its shutdown values and
    /// the API stops accepting requests.
    pub async fn run_until(self, shutdown: impl Future<Output = ()>) -> anyhow::Result<()> {
        let cancel = CancellationToken::new();
        let loops = TaskTracker::new();
        for (task, period) in self.tasks {
            loops.spawn(supervisor::run(task, period, cancel.clone(), |_| {}));
        }
        loops.close();
        let api = axum::serve(self.listener, api::router(self.statuses))
            .with_graceful_shutdown(cancel.clone().cancelled_owned());
        let api = tokio::spawn(async move { api.await });
        shutdown.await;
        tracing::info!("stopping: loops write their shutdown setpoints");
        cancel.cancel();
        loops.wait().await;
        api.await.context("the API task failed")?.context("the API server failed")?;
        Ok(())
    }
}
