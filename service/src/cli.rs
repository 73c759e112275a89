//! The command line: argument parsing and the commands that are not a long-running
//! service. Exit codes: 0 success, 2 invalid config or arguments, 1 runtime failure.

use std::io::IsTerminal;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::time::{Duration, Instant};

use anyhow::Context;
use clap::{Parser, Subcommand};

use crate::config::Direction;
use crate::config::{self, FileProblems, LogFormat};
use crate::history::parse_duration_s;
use crate::rehearse::{self, Options, Rehearsal};
use crate::sim;
use crate::tune::{self, Request, TuneError};

#[derive(Debug, Parser)]
#[command(
    name = "ridgeline",
    version,
    about = "Extremum-seeking supervisory optimizer that runs beside a PLC"
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the built-in demo: a simulated plant and the full service against it.
    Demo {
        /// Address of the API (default: the demo config's, 127.0.0.1:8080).
        #[arg(long, value_name = "ADDR")]
        listen: Option<SocketAddr>,
        /// Stop by itself after this many minutes of wall time.
        #[arg(long, value_name = "N", value_parser = parse_positive)]
        minutes: Option<f64>,
        /// Run plant and loops this many times faster than real time.
        #[arg(long, value_name = "X", default_value_t = crate::demo::DEFAULT_SPEED, value_parser = parse_positive)]
        speed: f64,
        /// Keep the history in this SQLite file (default: a temporary folder, removed at the end).
        #[arg(long, value_name = "FILE")]
        database: Option<PathBuf>,
    },
    /// Print a new random access token and the [[access]] entry to paste into the config.
    Token {
        /// Who uses the token; recorded as the actor of every change made with it.
        #[arg(long)]
        name: String,
        /// viewer (reads) or operator (reads and changes).
        #[arg(long, value_parser = ["viewer", "operator"])]
        role: String,
    },
    /// Run the service: every configured loop against the plant, until SIGINT or SIGTERM.
    Run {
        #[arg(long, value_name = "FILE")]
        config: PathBuf,
        /// Tick the loops this many times faster than real time, against a plant served by
        /// `ridgeline sim --speed` at the same speed: for soak runs (`tests/benches/soak/`),
        /// never for a real PLC, whose setpoints would move that many times too fast.
        #[arg(long, value_name = "X", default_value_t = 1.0, value_parser = parse_positive, hide = true)]
        speed: f64,
    },
    /// Serve a plant model over Modbus/TCP until stopped.
    Sim {
        #[arg(long, value_name = "FILE")]
        plant: PathBuf,
        #[arg(long, value_name = "ADDR", default_value = "127.0.0.1:5020")]
        listen: SocketAddr,
        /// Run the plant this many times faster than real time.
        #[arg(long, value_name = "X", default_value_t = 1.0, value_parser = parse_positive)]
        speed: f64,
    },
    /// Validate a config file: print every problem, or a summary of each loop.
    Check {
        #[arg(long, value_name = "FILE")]
        config: PathBuf,
    },
    /// Run the configured loops offline against a plant model and report how they did.
    Rehearse {
        #[arg(long, value_name = "FILE")]
        config: PathBuf,
        #[arg(long, value_name = "FILE")]
        plant: PathBuf,
        /// Simulated time, like 90s, 45m, 6h or 2d.
        #[arg(long, default_value = "6h", value_parser = parse_duration_s)]
        duration: f64,
        /// Write an SVG picture of the run; with --separately, one panel per input that
        /// overlays every loop's estimate on the optimum.
        #[arg(long, value_name = "OUT.svg")]
        plot: Option<PathBuf>,
        /// Write DIR/<loop>.csv with every tick.
        #[arg(long, value_name = "DIR")]
        csv: Option<PathBuf>,
        /// Print the report as JSON.
        #[arg(long)]
        json: bool,
        /// Each loop against its own copy of the plant, compared side by side at the end
        /// (loops may then write the same registers: one per tuning or method, say).
        #[arg(long)]
        separately: bool,
    },
    /// Fit the plant from a record of steps, recommend a tuning and prove it by rehearsal.
    Tune {
        /// The record: the API's samples CSV, or any CSV with `at` or `t_s`, `objective`
        /// and `<input>.applied` columns.
        #[arg(long, value_name = "FILE.csv")]
        samples: PathBuf,
        /// The input that was stepped.
        #[arg(long, value_name = "NAME")]
        input: String,
        /// The service config, for the loop's tick, bounds, direction and rate limit.
        #[arg(long, value_name = "FILE", requires = "loop_name")]
        config: Option<PathBuf>,
        /// The loop in --config.
        #[arg(long = "loop", value_name = "NAME", requires = "config")]
        loop_name: Option<String>,
        /// Default: the loop's, else the way the objective curves.
        #[arg(long, value_parser = ["maximize", "minimize"])]
        direction: Option<String>,
        /// Wanted convergence time constant, like 20m (default: 10 dither periods).
        #[arg(long, value_name = "DURATION", value_parser = parse_duration_s)]
        time_constant: Option<f64>,
        /// Largest steady loss the dither may cost (default: the objective's noise).
        #[arg(long, value_name = "X", value_parser = parse_positive)]
        max_loss: Option<f64>,
        /// Write the fitted plant as a plant-model file, to rehearse against.
        #[arg(long, value_name = "FILE")]
        plant_out: Option<PathBuf>,
        /// Print the result as JSON.
        #[arg(long)]
        json: bool,
    },
}

/// Exit status for an invalid config or arguments.
const INVALID: u8 = 2;
/// Exit status for a failure while running.
const FAILED: u8 = 1;

pub fn run(cli: Cli) -> ExitCode {
    match cli.command {
        Command::Demo { listen, minutes, speed, database } => {
            demo(crate::demo::Options { listen, speed, minutes, database })
        }
        Command::Token { name, role } => token(&name, &role),
        Command::Run { config, speed } => serve(&config, speed),
        Command::Sim { plant, listen, speed } => simulate(&plant, listen, speed),
        Command::Check { config } => check(&config),
        Command::Rehearse { config, plant, duration, plot, csv, json, separately } => rehearse(
            &config,
            &plant,
            Options { duration_s: duration, csv_dir: csv, keep_traces: plot.is_some() },
            plot.as_deref(),
            json,
            separately,
        ),
        Command::Tune {
            samples,
            input,
            config,
            loop_name,
            direction,
            time_constant,
            max_loss,
            plant_out,
            json,
        } => {
            let request = Request {
                input,
                direction: direction
                    .map(|d| if d == "maximize" { Direction::Maximize } else { Direction::Minimize }),
                time_constant_s: time_constant,
                max_loss,
                ..Request::default()
            };
            tune(&samples, request, config.as_deref().zip(loop_name.as_deref()), plant_out.as_deref(), json)
        }
    }
}

fn report_problems(problems: &FileProblems) -> ExitCode {
    eprintln!("{problems}");
    let n = problems.problems.len();
    eprintln!("{}: {n} problem{}", problems.file, if n == 1 { "" } else { "s" });
    ExitCode::from(INVALID)
}

fn check(path: &Path) -> ExitCode {
    match config::load(path) {
        Ok(config) => {
            let n = config.loops.len();
            println!("{}: valid, {n} loop{}", path.display(), if n == 1 { "" } else { "s" });
            for summary in config::summary::summarize(&config) {
                print!("{summary}");
            }
            ExitCode::SUCCESS
        }
        Err(problems) => report_problems(&problems),
    }
}

fn rehearse(
    config_path: &Path,
    plant_path: &Path,
    options: Options,
    plot: Option<&Path>,
    json: bool,
    separately: bool,
) -> ExitCode {
    let config = if separately { config::load_loops_apart(config_path) } else { config::load(config_path) };
    let plant = sim::load(plant_path);
    let (config, plant) = match (config, plant) {
        (Ok(c), Ok(p)) => (c, p),
        (c, p) => {
            for problems in [c.err(), p.err()].into_iter().flatten() {
                report_problems(&problems);
            }
            return ExitCode::from(INVALID);
        }
    };
    // One rehearsal of every loop together, or one per loop, each with its own plant.
    let configs: Vec<config::Config> = if separately {
        config.loops.iter().map(|l| config::Config { loops: vec![l.clone()], ..config.clone() }).collect()
    } else {
        vec![config]
    };
    let mut rehearsals = Vec::new();
    for c in &configs {
        match Rehearsal::new(c, &plant, &config_path.display().to_string()) {
            Ok(r) => rehearsals.push(r),
            Err(problems) => {
                eprintln!("the config does not fit the plant model {}:", plant_path.display());
                return report_problems(&problems);
            }
        }
    }
    let mut progress = Progress::new();
    let runs = rehearsals.len() as f64;
    let mut outcomes = Vec::new();
    for (i, rehearsal) in rehearsals.into_iter().enumerate() {
        match rehearsal.run(&options, &mut |done| progress.update((i as f64 + done) / runs)) {
            Ok(o) => outcomes.push(o),
            Err(e) => {
                progress.finish();
                eprintln!("rehearsal failed: {e:#}");
                return ExitCode::from(FAILED);
            }
        }
    }
    progress.finish();
    let outcome = if separately {
        let mut loops = Vec::new();
        let mut traces = Vec::new();
        for o in outcomes {
            loops.extend(o.report.loops);
            traces.extend(o.traces);
        }
        rehearse::Outcome { report: rehearse::Report::side_by_side(options.duration_s, loops), traces }
    } else {
        outcomes.remove(0)
    };
    if json {
        match serde_json::to_string_pretty(&outcome.report) {
            Ok(text) => println!("{text}"),
            Err(e) => {
                eprintln!("could not write the report as JSON: {e}");
                return ExitCode::from(FAILED);
            }
        }
    } else {
        println!(
            "rehearsal of {} against {}",
            rehearse::human_duration(options.duration_s),
            plant_path.display()
        );
        println!();
        print!("{}", outcome.report);
    }
    if let Some(path) = plot {
        let written = if separately {
            rehearse::plot::write_comparison_svg(path, &outcome.traces)
        } else {
            rehearse::plot::write_svg(path, &outcome.traces)
        };
        if let Err(e) = written {
            eprintln!("{e:#}");
            return ExitCode::from(FAILED);
        }
        if !json {
            println!("plot written to {}", path.display());
        }
    }
    ExitCode::SUCCESS
}

/// `ridgeline tune`: bad data or a fit that does not justify a tuning is exit 2 with the
/// sentence that says why; nothing is printed that the fit cannot back.
fn tune(
    samples: &Path,
    mut request: Request,
    the_loop: Option<(&Path, &str)>,
    plant_out: Option<&Path>,
    json: bool,
) -> ExitCode {
    if let Some((path, name)) = the_loop {
        let config = match config::load(path) {
            Ok(c) => c,
            Err(problems) => return report_problems(&problems),
        };
        let Some(l) = config.loops.iter().find(|l| l.name == name) else {
            let names: Vec<&str> = config.loops.iter().map(|l| l.name.as_str()).collect();
            eprintln!("{}: no loop `{name}` (its loops: {})", path.display(), names.join(", "));
            return ExitCode::from(INVALID);
        };
        let Some(input) = l.inputs.iter().find(|i| i.name == request.input) else {
            let names: Vec<&str> = l.inputs.iter().map(|i| i.name.as_str()).collect();
            eprintln!("loop `{name}` has no input `{}` (its inputs: {})", request.input, names.join(", "));
            return ExitCode::from(INVALID);
        };
        request.tick_s = Some(l.tick_s);
        request.bounds = Some(input.bounds);
        request.direction = request.direction.or(Some(l.direction));
        request.configured_rate_per_s = Some(input.max_rate_per_s);
    }
    let text = match std::fs::read_to_string(samples) {
        Ok(t) => t,
        Err(e) => {
            eprintln!("cannot read {}: {e}", samples.display());
            return ExitCode::from(INVALID);
        }
    };
    let record = match tune::read_csv(&text, &request.input) {
        Ok(r) => r,
        Err(e) => {
            eprintln!("{}: {e}", samples.display());
            return ExitCode::from(INVALID);
        }
    };
    let result = match tune::tune(&record, &request) {
        Ok(r) => r,
        Err(e @ TuneError::Proof(_)) => {
            eprintln!("{e}");
            return ExitCode::from(FAILED);
        }
        Err(e) => {
            eprintln!("{}: no tuning: {e}", samples.display());
            return ExitCode::from(INVALID);
        }
    };
    if let Some(path) = plant_out
        && let Err(e) = std::fs::write(path, &result.plant_toml)
    {
        eprintln!("cannot write {}: {e}", path.display());
        return ExitCode::from(FAILED);
    }
    if json {
        match serde_json::to_string_pretty(&result) {
            Ok(text) => println!("{text}"),
            Err(e) => {
                eprintln!("could not write the result as JSON: {e}");
                return ExitCode::from(FAILED);
            }
        }
    } else {
        println!("{result}");
        if let Some(path) = plant_out {
            println!("fitted plant written to {}", path.display());
        }
    }
    ExitCode::SUCCESS
}

/// Runs an async command on a runtime of its own; a failure is one sentence and exit 1.
fn block_on(work: impl std::future::Future<Output = anyhow::Result<()>>) -> ExitCode {
    let runtime = match tokio::runtime::Builder::new_multi_thread().enable_all().build() {
        Ok(r) => r,
        Err(e) => {
            eprintln!("cannot start the async runtime: {e}");
            return ExitCode::from(FAILED);
        }
    };
    match runtime.block_on(work) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            tracing::error!(error = %format!("{e:#}"), "stopped by an error");
            eprintln!("ridgeline: {e:#}");
            ExitCode::from(FAILED)
        }
    }
}

/// Logs to stderr, text or JSON; `RUST_LOG` overrides the default level.
fn init_logging(format: LogFormat, default: &str) {
    let filter = tracing_subscriber::EnvFilter::try_from_default_env()
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(default));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .with_ansi(std::io::stderr().is_terminal());
    let _ = match format {
        LogFormat::Text => builder.try_init(),
        LogFormat::Json => builder.json().try_init(),
    };
}

/// Completes on SIGINT or SIGTERM (what systemd sends to stop a service).
pub async fn stop_signal() {
    let interrupt = tokio::signal::ctrl_c();
    #[cfg(unix)]
    {
        use tokio::signal::unix::{SignalKind, signal};
        match signal(SignalKind::terminate()) {
            Ok(mut term) => {
                tokio::select! {
                    _ = interrupt => {},
                    _ = term.recv() => {},
                }
            }
            Err(_) => {
                let _ = interrupt.await;
            }
        }
    }
    #[cfg(not(unix))]
    let _ = interrupt.await;
}

fn serve(path: &Path, speed: f64) -> ExitCode {
    let config = match config::load(path) {
        Ok(c) => c,
        Err(problems) => return report_problems(&problems),
    };
    init_logging(config.service.log_format, "info");
    crate::open_files::raise_for(config.links.len());
    block_on(async move {
        let options = crate::app::Options { speed, ..crate::app::Options::default() };
        let app = crate::app::App::build(&config, &options).await?;
        tracing::info!(
            config = %path.display(),
            api = %app.local_addr()?,
            loops = config.loops.len(),
            "ridgeline running"
        );
        app.run_until(stop_signal()).await?;
        tracing::info!("stopped");
        Ok(())
    })
}

fn simulate(path: &Path, listen: SocketAddr, speed: f64) -> ExitCode {
    let spec = match sim::load(path) {
        Ok(s) => s,
        Err(problems) => return report_problems(&problems),
    };
    init_logging(LogFormat::Text, "info");
    block_on(async move {
        let server = crate::sim::server::PlantServer::bind(&spec, listen, speed)
            .await
            .with_context(|| format!("cannot listen on {listen}"))?;
        println!(
            "serving {} over Modbus/TCP on {} ({speed}x real time); Ctrl-C stops",
            path.display(),
            server.local_addr()?
        );
        server.run_until(stop_signal()).await?;
        Ok(())
    })
}

fn token(name: &str, role: &str) -> ExitCode {
    let valid_name =
        !name.trim().is_empty() && !name.chars().any(|c| c == '"' || c == '\\' || c.is_control());
    if !valid_name {
        eprintln!("--name must be non-empty, without quotes, backslashes or control characters");
        return ExitCode::from(INVALID);
    }
    let token = match crate::api::new_token() {
        Ok(t) => t,
        Err(e) => {
            eprintln!("cannot get random bytes from the operating system: {e}");
            return ExitCode::from(FAILED);
        }
    };
    println!("token (shown once; keep it where the script or person using it keeps secrets):");
    println!("{token}");
    println!();
    println!("paste into the service config:");
    println!("[[access]]");
    println!("name = \"{name}\"");
    println!("token_sha256 = \"{}\"", crate::api::token_sha256(&token));
    println!("role = \"{role}\"");
    ExitCode::SUCCESS
}

fn demo(options: crate::demo::Options) -> ExitCode {
    // The progress lines are the demo's output; logs show only what went wrong.
    init_logging(LogFormat::Text, "warn");
    block_on(async move { crate::demo::run(&options, stop_signal()).await })
}

/// A positive, finite number (speeds, minutes).
fn parse_positive(text: &str) -> Result<f64, String> {
    match text.parse::<f64>() {
        Ok(v) if v.is_finite() && v > 0.0 => Ok(v),
        _ => Err(format!("`{text}` must be a positive number")),
    }
}

/// A progress bar on stderr, shown only for runs that last more than a second and only
/// when stderr is a terminal.
struct Progress {
    started: Instant,
    bar: Option<indicatif::ProgressBar>,
    interactive: bool,
}

impl Progress {
    fn new() -> Self {
        Progress { started: Instant::now(), bar: None, interactive: std::io::stderr().is_terminal() }
    }

    fn update(&mut self, done: f64) {
        if !self.interactive {
            return;
        }
        if self.bar.is_none() && self.started.elapsed() > Duration::from_secs(1) {
            let bar = indicatif::ProgressBar::new(1000);
            if let Ok(style) =
                indicatif::ProgressStyle::with_template("rehearsing {bar:40} {percent:>3}% eta {eta}")
            {
                bar.set_style(style);
            }
            self.bar = Some(bar);
        }
        if let Some(bar) = &self.bar {
            bar.set_position((done * 1000.0) as u64);
        }
    }

    fn finish(&mut self) {
        if let Some(bar) = self.bar.take() {
            bar.finish_and_clear();
        }
    }
}
