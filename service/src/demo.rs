//! `ridgeline demo`: the built-in scenario. A simulated plant served over Modbus/TCP on
//! loopback, the full service against it, and a progress line per loop every few seconds
//! saying how far each loop is from the simulated optimum (the best point that respects
//! its constraints), and where each constraint stands.

use std::future::Future;
use std::net::SocketAddr;
use std::time::{Duration, Instant};

use anyhow::Context;

use crate::app::{self, App};
use crate::config::{self, Config, LinkKind};
use crate::rehearse::{Truth, human_duration};
use crate::sim::server::{PlantHandle, PlantServer};
use crate::sim::{self, PlantSpec};

pub const CONFIG: &str = include_str!("../../config/demo.toml");
pub const PLANT: &str = include_str!("../../config/demo-plant.toml");

/// Time compression of the demo by default: both loops settle in well under two minutes.
pub const DEFAULT_SPEED: f64 = 60.0;
/// Wall time between progress lines.
const PROGRESS_EVERY: Duration = Duration::from_secs(5);

#[derive(Debug, Clone)]
pub struct Options {
    pub listen: Option<SocketAddr>,
    pub speed: f64,
    pub minutes: Option<f64>,
    /// Keeps the history here instead of in a temporary folder removed at the end.
    pub database: Option<std::path::PathBuf>,
}

/// The embedded scenario, parsed.
pub fn scenario() -> anyhow::Result<(Config, PlantSpec)> {
    let config = config::parse(CONFIG, "config/demo.toml").map_err(|p| anyhow::anyhow!("{p}"))?;
    let plant = sim::parse(PLANT, "config/demo-plant.toml").map_err(|p| anyhow::anyhow!("{p}"))?;
    Ok((config, plant))
}

/// Runs the demo until `stop` completes or `options.minutes` have passed.
pub async fn run(options: &Options, stop: impl Future<Output = ()>) -> anyhow::Result<()> {
    let (mut config, plant) = scenario()?;
    let server = PlantServer::bind(&plant, SocketAddr::from(([127, 0, 0, 1], 0)), options.speed)
        .await
        .context("cannot start the simulated plant on loopback")?;
    let plant_addr = server.local_addr()?;
    // An operator token for this run only, so the demo can be driven through the API
    // (modes, bounds, bump tests) as a plant would be.
    let token = crate::api::new_token().context("cannot get random bytes for the demo's operator token")?;
    config.access.push(config::Access {
        name: "demo-operator".into(),
        token_sha256: crate::api::token_sha256(&token),
        role: config::Role::Operator,
    });
    for link in &mut config.links {
        if let LinkKind::ModbusTcp { address, .. } = &mut link.kind {
            *address = plant_addr.to_string();
        }
    }
    // History goes to a temporary folder, removed at the end, unless --database names a file.
    let (database, _scratch) = match &options.database {
        Some(path) => (path.clone(), None),
        None => {
            let scratch = tempfile::Builder::new()
                .prefix("ridgeline-demo-")
                .tempdir()
                .context("cannot make a temporary folder")?;
            (scratch.path().join("history.db"), Some(scratch))
        }
    };
    let app_options =
        app::Options { speed: options.speed, listen: options.listen, database: Some(database.clone()) };
    let app = App::build(&config, &app_options)
        .await
        .context("the demo's API needs a free port; pick one with --listen 127.0.0.1:PORT")?;
    println!(
        "Ridgeline demo: a simulated boiler, chilled-water plant and dryer on Modbus/TCP {plant_addr}, \
         the service's API on http://{}/api/v1/loops, {}x real time.",
        app.local_addr()?,
        options.speed
    );
    println!("Operator token for this run (Authorization: Bearer ...): {token}");
    println!(
        "Every {} s: each loop's state, objective, applied setpoint and distance to the plant's true optimum. \
         History in {}. Ctrl-C stops.",
        PROGRESS_EVERY.as_secs(),
        database.display()
    );
    let loops = app.loops();
    let handle = server.handle();
    let (stop_all, stopped) = tokio::sync::oneshot::channel::<()>();
    let plant_task = tokio::spawn(server.run_until(async move {
        let _ = stopped.await;
    }));
    let progress = progress_lines(&config, &plant, handle, loops);
    let deadline = async {
        match options.minutes {
            Some(m) => tokio::time::sleep(Duration::from_secs_f64(m * 60.0)).await,
            None => std::future::pending().await,
        }
    };
    let until = async {
        tokio::select! {
            () = stop => {},
            () = deadline => {},
            () = progress => {},
        }
    };
    app.run_until(until).await?;
    let _ = stop_all.send(());
    plant_task.await.context("the simulated plant task failed")?.context("the simulated plant failed")?;
    Ok(())
}

/// Prints one line per loop every few seconds; never returns.
async fn progress_lines(
    config: &Config,
    plant: &PlantSpec,
    handle: PlantHandle,
    loops: std::sync::Arc<Vec<crate::supervisor::LoopHandle>>,
) {
    let mut truths: Vec<Option<Truth>> =
        (0..config.loops.len()).map(|i| Truth::new(config, i, plant).ok()).collect();
    let started = Instant::now();
    let mut interval = tokio::time::interval(PROGRESS_EVERY);
    interval.tick().await;
    loop {
        interval.tick().await;
        let (t_s, inputs) = handle.snapshot();
        for (handle, truth) in loops.iter().zip(&mut truths) {
            let status = handle.status.borrow().clone();
            let mut line = format!(
                "{:>6} wall  {:>9} plant  {:<20} {:<9} objective {:>9}",
                human_duration(started.elapsed().as_secs_f64()),
                human_duration(t_s),
                status.name,
                status.state,
                status.objective.map_or_else(|| "-".to_owned(), |j| format!("{j:.4}"))
            );
            let bounds: Vec<_> = status
                .inputs
                .iter()
                .map(|i| config::Range { min: i.bounds.min, max: i.bounds.max })
                .collect();
            let optimum = truth.as_mut().map(|t| t.optimum(t_s, &inputs, &bounds).1.to_vec());
            for (k, input) in status.inputs.iter().enumerate() {
                line.push_str(&format!("  {} {:.3}", input.name, input.applied));
                if let Some(x) = optimum.as_ref().and_then(|o| o.get(k)) {
                    let away = (input.estimate - x).abs();
                    let span = input.bounds.max - input.bounds.min;
                    line.push_str(&format!(" (optimum {x:.3}, {:.1}% of span away)", 100.0 * away / span));
                }
            }
            for c in &status.constraints {
                let value = c.value.map_or_else(|| "-".to_owned(), |v| format!("{v:.1}"));
                let state = if c.engaged { ", engaged: backing off" } else { "" };
                line.push_str(&format!("  {} {value} ({} {}{state})", c.name, c.side, c.limit));
            }
            println!("{line}");
        }
    }
}
