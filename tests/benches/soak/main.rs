//! Soak: the demo plant at high speed for a day or more of plant time, with faults at
//! random, then a report of what must still hold: no panic, every trip recovered, no
//! write outside the bounds or without the permit (as the PLC's port sees them), memory
//! and open files flat, the database's size, and `PRAGMA integrity_check` after kills.
//!
//! ```sh
//! cargo build --release --bins
//! RIDGELINE_PYTHON=.venv/bin/python cargo bench -p ridgeline-tests --bench soak -- \
//!     --seed 1 --plant-hours 24 --speed 60
//! ```
//!
//! The real binary runs the demo's config (`config/demo.toml`, with a permit tag added to
//! every loop) as `ridgeline run --speed X` against `ridgeline sim --speed X` serving
//! `config/demo-plant.toml` (plus the permit register). Between the two sits the soak's
//! own Modbus/TCP relay on the PLC's port: it logs every write request on the wire and
//! injects the link faults. Faults come at random from a seeded generator: link cuts,
//! a PLC that stops answering, answers busy (exception 0x06) or answers too late, PLC
//! restarts, the permit withdrawn and given back, mode and bounds changes through the
//! API with an operator token, and `kill -9` of Ridgeline followed by a restart on the
//! same database. The soak acts as the operator, too: it acknowledges a loop in
//! `fallback` (the demo's loops recover manually) every few seconds until one sticks.
//! Exit status 0 when every requirement holds, 1 otherwise; the report says which.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::{Command, ExitCode};
use std::time::{Duration, Instant, SystemTime};

use proptest::test_runner::{RngAlgorithm, TestRng};
use ridgeline_tests::{Peer, f32_words, http_request, write_holding_registers};
use serde_json::Value;

mod judge;
mod plc_port;
mod records;
mod schedule;

use judge::{Judged, Report};
use plc_port::{Fault, PlcPort};
use records::{BoundsHistory, Life, Range, sample_process};
use schedule::{Action, schedule};

/// The demo's watchdog: `stale_after_s` of every loop in config/demo.toml, in plant
/// seconds. Under `--speed X` the service counts it in plant seconds like its ticks, so
/// it lasts `STALE_S / X` wall seconds: a third of a second at 60x, less than one link
/// timeout.
const STALE_S: f64 = 20.0;
/// The shortest unit the soak sizes its faults in, in wall seconds. The link's timeout
/// (1 s, the default the demo keeps) and its reconnection backoff count wall time, so
/// faults measured only against a watchdog compressed to a fraction of a second would
/// be shorter than one failed request; see [`fault_unit`].
const FAULT_FLOOR_S: f64 = 2.0;
/// The holding register of the soak's permit (an f32 plant input: 1 permits, 0 withholds).
const PERMIT_REGISTER: u16 = 300;
/// A tick that read the permit just before it was withdrawn may still write. The permit
/// is the last block a tick reads (register 300, above the loops' tags), and an answer
/// counts only within the link's timeout (1 s, wall time), after which the write follows
/// at once; 1 s more covers a loaded machine's scheduling. Writes are counted against a
/// withdrawn permit from this long after it landed.
const PERMIT_GRACE: Duration = Duration::from_secs(2);
/// Resident memory at the end of the last life may exceed its early level by this
/// fraction, open file descriptors by this many, and still count as flat.
const RSS_MARGIN: f64 = 0.20;
const FD_MARGIN: i64 = 4;
/// Memory is not judged before a life has run this long (caches and pools fill first).
const WARM_UP: Duration = Duration::from_secs(60);
/// Between resource samples of the running service.
const SAMPLE_EVERY: Duration = Duration::from_secs(5);
/// Between the operator's looks for loops in fallback to acknowledge.
const ACK_EVERY: Duration = Duration::from_secs(10);
const OPERATOR_TOKEN: &str = "soak-operator-token-not-secret";
/// Every demo loop's `tick_s`, and the config's default `retention_days` (the demo
/// config keeps the default).
const DEMO_TICK_S: f64 = 2.0;
const RETENTION_DAYS: u32 = 30;

fn main() -> ExitCode {
    let args = match Args::parse() {
        Ok(a) => a,
        Err(e) => {
            eprintln!(
                "soak: {e}\nusage: soak [--seed N] [--plant-hours H] [--speed X] [--kills K] [--dir DIR]"
            );
            return ExitCode::from(2);
        }
    };
    match Soak::prepare(&args).and_then(|soak| soak.run(&args)) {
        Ok(report) => {
            println!("{}", report.text);
            if report.passed { ExitCode::SUCCESS } else { ExitCode::FAILURE }
        }
        Err(e) => {
            eprintln!("soak could not run: {e}");
            ExitCode::FAILURE
        }
    }
}

/// The command line.
struct Args {
    seed: u64,
    plant_hours: f64,
    speed: f64,
    kills: usize,
    dir: Option<PathBuf>,
}

impl Args {
    fn parse() -> Result<Args, String> {
        let mut args = Args {
            seed: SystemTime::now().duration_since(SystemTime::UNIX_EPOCH).map_or(1, |d| d.as_secs()),
            plant_hours: 24.0,
            speed: 60.0,
            kills: 4,
            dir: None,
        };
        let mut words = std::env::args().skip(1);
        while let Some(word) = words.next() {
            let mut value = |name: &str| words.next().ok_or(format!("{name} needs a value"));
            match word.as_str() {
                "--seed" => args.seed = number(&value("--seed")?)?,
                "--plant-hours" => args.plant_hours = number(&value("--plant-hours")?)?,
                "--speed" => args.speed = number(&value("--speed")?)?,
                "--kills" => args.kills = number(&value("--kills")?)?,
                "--dir" => args.dir = Some(PathBuf::from(value("--dir")?)),
                // `cargo bench` passes --bench to a harness-less bench.
                "--bench" => {}
                other => return Err(format!("unknown argument `{other}`")),
            }
        }
        if !(args.plant_hours > 0.0 && args.speed > 0.0) {
            return Err("--plant-hours and --speed must be positive".into());
        }
        Ok(args)
    }
}

fn number<T: std::str::FromStr>(text: &str) -> Result<T, String> {
    text.parse().map_err(|_| format!("`{text}` is not a number"))
}

/// A loop as the service listed it at the start.
struct LoopInfo {
    name: String,
    start_mode: String,
    inputs: Vec<InputRanges>,
}

/// An input's config bounds and its limits.
struct InputRanges {
    bounds: Range,
    limits: Range,
}

/// Everything the soak runs and watches.
struct Soak {
    bin: PathBuf,
    python: PathBuf,
    dir: PathBuf,
    config: PathBuf,
    plant: PathBuf,
    database: PathBuf,
    speed: f64,
    /// The holding register each loop's inputs are written to, in config order.
    registers: Vec<Vec<u16>>,
    port: PlcPort,
    sim: Option<(Peer, u16)>,
    sim_starts: usize,
    service: Option<(Peer, SocketAddr)>,
    lives: Vec<Life>,
    logs: Vec<PathBuf>,
    loops: Vec<LoopInfo>,
    bounds: Vec<Vec<BoundsHistory>>,
    /// When the permit was withdrawn (as acknowledged by the PLC) and given back.
    permit_off: Vec<(Instant, Option<Instant>)>,
    unexpected_exits: Vec<String>,
    integrity_after_kills: Vec<String>,
    counts: std::collections::BTreeMap<String, u64>,
}

impl Soak {
    fn prepare(args: &Args) -> Result<Soak, String> {
        let bin = ridgeline_tests::ridgeline_bin();
        if !bin.exists() {
            return Err(format!(
                "{} is missing: build it with `cargo build --release --bins`",
                bin.display()
            ));
        }
        let python = std::env::var_os(ridgeline_tests::PYTHON_VAR)
            .map(PathBuf::from)
            .unwrap_or_else(|| Path::new(env!("CARGO_MANIFEST_DIR")).join("../.venv/bin/python"));
        if !python.exists() {
            return Err(format!(
                "no Python at {} for PRAGMA integrity_check: set {} (tests/run creates .venv)",
                python.display(),
                ridgeline_tests::PYTHON_VAR
            ));
        }
        let dir = match &args.dir {
            Some(d) => {
                std::fs::create_dir_all(d).map_err(|e| format!("cannot make {}: {e}", d.display()))?;
                d.clone()
            }
            None => tempfile::Builder::new()
                .prefix("ridgeline-soak-")
                .tempdir()
                .map_err(|e| format!("cannot make a scratch folder: {e}"))?
                .keep(),
        };
        let port = PlcPort::start().map_err(|e| format!("cannot open the PLC's port on loopback: {e}"))?;
        let config_dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("../config");
        let read = |name: &str| {
            std::fs::read_to_string(config_dir.join(name))
                .map_err(|e| format!("cannot read config/{name}: {e}"))
        };
        let database = dir.join("history.db");
        let (config_text, registers) = soak_config(&read("demo.toml")?, port.port, &database)?;
        let plant_text = format!(
            "{}\n# The soak's permit register: 1 permits, 0 withholds.\n[[inputs]]\nname = \"soak_permit\"\n\
             initial = 1.0\nholding_register = {PERMIT_REGISTER}\n",
            read("demo-plant.toml")?
        );
        let config = dir.join("soak.toml");
        let plant = dir.join("soak-plant.toml");
        std::fs::write(&config, config_text)
            .map_err(|e| format!("cannot write {}: {e}", config.display()))?;
        std::fs::write(&plant, plant_text).map_err(|e| format!("cannot write {}: {e}", plant.display()))?;
        let check = Command::new(&bin).args(["check", "--config"]).arg(&config).output();
        match check {
            Ok(out) if out.status.success() => {}
            Ok(out) => {
                return Err(format!(
                    "the soak's config does not pass `ridgeline check`:\n{}",
                    String::from_utf8_lossy(&out.stderr)
                ));
            }
            Err(e) => return Err(format!("cannot run {}: {e}", bin.display())),
        }
        Ok(Soak {
            bin,
            python,
            dir,
            config,
            plant,
            database,
            speed: args.speed,
            registers,
            port,
            sim: None,
            sim_starts: 0,
            service: None,
            lives: Vec::new(),
            logs: Vec::new(),
            loops: Vec::new(),
            bounds: Vec::new(),
            permit_off: Vec::new(),
            unexpected_exits: Vec::new(),
            integrity_after_kills: Vec::new(),
            counts: Default::default(),
        })
    }

    fn count(&mut self, what: &str) {
        *self.counts.entry(what.to_owned()).or_default() += 1;
    }

    fn start_sim(&mut self) -> Result<(), String> {
        let mut command = Command::new(&self.bin);
        command.arg("sim").arg("--plant").arg(&self.plant);
        command.args(["--listen", "127.0.0.1:0", "--speed", &self.speed.to_string()]);
        let (peer, line) = Peer::start("ridgeline sim", command, Duration::from_secs(30), |l| {
            l.contains(" over Modbus/TCP on ")
        });
        let port = line
            .split(" over Modbus/TCP on ")
            .nth(1)
            .and_then(|rest| rest.split_whitespace().next())
            .and_then(|a| a.parse::<SocketAddr>().ok())
            .map(|a| a.port())
            .ok_or_else(|| format!("cannot read the simulator's port from: {line}"))?;
        self.sim = Some((peer, port));
        self.sim_starts += 1;
        self.port.set_upstream(Some(port));
        Ok(())
    }

    fn stop_sim(&mut self) {
        self.port.set_upstream(None);
        if let Some((mut peer, _)) = self.sim.take() {
            let log = peer.stop();
            self.save_log(&format!("sim-{}.log", self.sim_starts), &log);
        }
        // A restarted PLC permits: its permit register starts at its initial value, 1.
        self.permit_given_back(Instant::now());
    }

    fn start_service(&mut self) -> Result<(), String> {
        let mut command = Command::new(&self.bin);
        command.arg("run").arg("--config").arg(&self.config).args(["--speed", &self.speed.to_string()]);
        let peer = Peer::spawn("ridgeline run", command);
        let deadline = Instant::now() + Duration::from_secs(60);
        let api = loop {
            let api = peer.stderr().lines().find(|l| l.contains("ridgeline running")).and_then(|l| {
                l.split_whitespace()
                    .find_map(|w| w.strip_prefix("api="))
                    .and_then(|a| a.parse::<SocketAddr>().ok())
            });
            if let Some(api) = api {
                break api;
            }
            if Instant::now() > deadline {
                return Err(format!("ridgeline run did not start within 60 s; its log:\n{}", peer.stderr()));
            }
            std::thread::sleep(Duration::from_millis(50));
        };
        self.lives.push(Life {
            pid: peer.id(),
            started: Instant::now(),
            samples: Vec::new(),
            how_it_ended: "running".into(),
        });
        self.service = Some((peer, api));
        Ok(())
    }

    fn save_log(&mut self, name: &str, text: &str) {
        let path = self.dir.join(name);
        if std::fs::write(&path, text).is_ok() {
            self.logs.push(path);
        }
    }

    fn api(&self) -> Option<SocketAddr> {
        self.service.as_ref().map(|(_, a)| *a)
    }

    fn get(&self, path: &str) -> Option<Value> {
        let answer = http_request(self.api()?, "GET", path, &[], None)?;
        (answer.status == 200).then(|| serde_json::from_str(&answer.body).ok()).flatten()
    }

    fn put(&self, path: &str, body: &str) -> Option<u16> {
        let bearer = format!("Bearer {OPERATOR_TOKEN}");
        http_request(self.api()?, "PUT", path, &[("Authorization", &bearer)], Some(body)).map(|a| a.status)
    }

    fn statuses(&self) -> Option<Vec<Value>> {
        self.get("/api/v1/loops")?.as_array().cloned()
    }

    fn sample(&mut self) {
        let Some(life) = self.lives.last_mut() else { return };
        if let Some((rss, fds, threads)) = sample_process(life.pid) {
            life.samples.push((Instant::now(), rss, fds, threads));
        }
        let died = match self.service.as_mut() {
            Some((peer, _)) => !peer.is_running(),
            None => false,
        };
        if died {
            let (mut peer, _) = self.service.take().expect("checked above");
            let log = peer.stop();
            self.unexpected_exits.push(format!("ridgeline (pid {}) exited by itself", peer.id()));
            if let Some(life) = self.lives.last_mut() {
                life.how_it_ended = "exited by itself".into();
            }
            self.save_log(&format!("ridgeline-{}.log", self.lives.len()), &log);
            if let Err(e) = self.start_service() {
                self.unexpected_exits.push(e);
            }
        }
        let sim_died = match self.sim.as_mut() {
            Some((peer, _)) => !peer.is_running(),
            None => false,
        };
        if sim_died {
            self.unexpected_exits.push("the simulator exited by itself".into());
            self.stop_sim();
            if let Err(e) = self.start_sim() {
                self.unexpected_exits.push(e);
            }
        }
    }

    /// The operator's round: every loop in fallback is asked back to its mode (accepted
    /// only once its fault is gone).
    fn acknowledge(&mut self) {
        let Some(statuses) = self.statuses() else { return };
        for status in statuses {
            if status["state"] != "fallback" {
                continue;
            }
            let (name, mode) = (status["name"].as_str().unwrap_or(""), status["mode"].as_str().unwrap_or(""));
            let answer = self.put(&format!("/api/v1/loops/{name}/mode"), &format!("{{\"mode\":\"{mode}\"}}"));
            let what = match answer {
                Some(200) => "acknowledgements accepted",
                Some(409) => "acknowledgements refused (fault still there)",
                _ => "acknowledgements unanswered",
            };
            self.count(what);
        }
    }

    fn set_permit(&mut self, permit: bool) {
        let Some((_, sim_port)) = self.sim.as_ref().map(|(p, port)| (p.id(), *port)) else {
            self.count("permit changes while the PLC was down");
            return;
        };
        let now = Instant::now();
        if permit {
            self.permit_given_back(now);
        }
        // Straight to the simulator, not through the PLC's port, so the soak's own
        // writes are not taken for Ridgeline's.
        if !write_holding_registers(sim_port, PERMIT_REGISTER, &f32_words(if permit { 1.0 } else { 0.0 })) {
            self.count("permit changes the PLC did not take");
            return;
        }
        if !permit {
            self.permit_off.push((Instant::now(), None));
            self.count("permit withdrawn");
        }
    }

    fn permit_given_back(&mut self, at: Instant) {
        if let Some(last) = self.permit_off.last_mut()
            && last.1.is_none()
        {
            last.1 = Some(at);
        }
    }

    /// The loop's input named by a fraction (the schedule does not know how many there are).
    fn input_of(&self, loop_index: usize, fraction: f64) -> usize {
        let n = self.loops[loop_index].inputs.len();
        ((fraction * n as f64) as usize).min(n - 1)
    }

    fn set_bounds(&mut self, loop_index: usize, input: usize, bounds: Range) {
        let LoopInfo { name, inputs, .. } = &self.loops[loop_index];
        let Some(statuses) = self.statuses() else { return };
        let Some(input_name) =
            statuses.get(loop_index).and_then(|s| s["inputs"][input]["name"].as_str().map(str::to_owned))
        else {
            return;
        };
        debug_assert!(input < inputs.len());
        let path = format!("/api/v1/loops/{name}/inputs/{input_name}/bounds");
        let body = format!("{{\"min\":{},\"max\":{}}}", bounds.0, bounds.1);
        let asked = Instant::now();
        let answer = self.put(&path, &body);
        let answered = Instant::now();
        let history = &mut self.bounds[loop_index][input];
        match answer {
            Some(200) => history.change(asked, bounds, answered),
            // Unknown whether it took: either bounds may show until the next change.
            None => history.change(asked, bounds, answered + Duration::from_secs(24 * 3600)),
            Some(_) => {}
        }
        self.count(&format!(
            "bounds changes answered {}",
            answer.map_or("nothing".into(), |s| s.to_string())
        ));
    }

    fn kill(&mut self, down: Duration) -> Result<(), String> {
        let Some((mut peer, _)) = self.service.take() else { return Ok(()) };
        let killed = Instant::now();
        let log = peer.stop();
        if let Some(life) = self.lives.last_mut() {
            life.how_it_ended = "kill -9".into();
        }
        self.save_log(&format!("ridgeline-{}.log", self.lives.len()), &log);
        // API bounds are not kept across a restart: the config's hold again.
        for (loop_index, info) in self.loops.iter().enumerate() {
            for (k, input) in info.inputs.iter().enumerate() {
                self.bounds[loop_index][k].change(killed, input.bounds, killed + Duration::from_secs(2));
            }
        }
        // The database as the kill left it, before anything opens it again (read-only,
        // so the check itself does not recover the WAL for the restart).
        let verdict = self.integrity(true).map_or_else(|e| e, |v| v["integrity_check"].to_string());
        self.integrity_after_kills.push(verdict);
        self.count("kill -9 of ridgeline");
        std::thread::sleep(down);
        self.start_service()
    }

    /// Python's sqlite3 on the database: `PRAGMA integrity_check`, sizes and row counts.
    fn integrity(&self, read_only: bool) -> Result<Value, String> {
        const SCRIPT: &str = r#"
import json, sqlite3, sys
path, mode = sys.argv[1], sys.argv[2]
con = sqlite3.connect(f"file:{path}?mode={mode}", uri=True)
check = [r[0] for r in con.execute("PRAGMA integrity_check")]
page_size = con.execute("PRAGMA page_size").fetchone()[0]
pages = con.execute("PRAGMA page_count").fetchone()[0]
free = con.execute("PRAGMA freelist_count").fetchone()[0]
tables = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")]
rows = {t: con.execute(f'SELECT count(*) FROM "{t}"').fetchone()[0] for t in tables}
print(json.dumps({"integrity_check": check, "bytes": page_size * pages, "free_bytes": page_size * free, "rows": rows}))
"#;
        // Source: the Python standard library's sqlite3 module and SQLite's own PRAGMA
        // integrity_check (https://sqlite.org/pragma.html#pragma_integrity_check).
        let out = Command::new(&self.python)
            .arg("-c")
            .arg(SCRIPT)
            .arg(&self.database)
            .arg(if read_only { "ro" } else { "rw" })
            .output()
            .map_err(|e| format!("cannot run {}: {e}", self.python.display()))?;
        if !out.status.success() {
            return Err(format!(
                "sqlite3 could not check the database: {}",
                String::from_utf8_lossy(&out.stderr).trim()
            ));
        }
        serde_json::from_slice(&out.stdout).map_err(|e| format!("the check printed no JSON: {e}"))
    }

    fn run(mut self, args: &Args) -> Result<Report, String> {
        let wall_s = args.plant_hours * 3600.0 / args.speed;
        println!(
            "soak: seed {}, {} h of plant time at {}x ({} of wall time), {} kills; binary {}; files in {}",
            args.seed,
            args.plant_hours,
            args.speed,
            human(wall_s),
            args.kills,
            self.bin.display(),
            self.dir.display()
        );
        self.start_sim()?;
        self.start_service()?;
        let statuses = wait_for(Duration::from_secs(60), || self.statuses().filter(|s| !s.is_empty()))
            .ok_or("the service's API never listed its loops")?;
        for status in &statuses {
            let inputs: Vec<InputRanges> = status["inputs"]
                .as_array()
                .map(|a| {
                    a.iter()
                        .map(|i| {
                            let f = |v: &Value| v.as_f64().unwrap_or(f64::NAN);
                            InputRanges {
                                bounds: (f(&i["bounds"]["min"]), f(&i["bounds"]["max"])),
                                limits: (f(&i["limits"]["min"]), f(&i["limits"]["max"])),
                            }
                        })
                        .collect()
                })
                .unwrap_or_default();
            let started = Instant::now();
            self.bounds.push(inputs.iter().map(|i| BoundsHistory::new(started, i.bounds)).collect());
            self.loops.push(LoopInfo {
                name: status["name"].as_str().unwrap_or("").to_owned(),
                start_mode: status["mode"].as_str().unwrap_or("").to_owned(),
                inputs,
            });
        }
        if self.loops.len() != self.registers.len() {
            return Err(format!(
                "the API lists {} loops, the config {}",
                self.loops.len(),
                self.registers.len()
            ));
        }
        let mut rng = TestRng::from_seed(RngAlgorithm::ChaCha, &seed_bytes(args.seed));
        let plan = schedule(&mut rng, wall_s, fault_unit(args.speed), self.loops.len(), args.kills);
        println!(
            "soak: {} scheduled actions; the watchdog is {:.2} s of wall time, faults are sized in units of {:.1} s",
            plan.len(),
            STALE_S / args.speed,
            fault_unit(args.speed)
        );

        let start = Instant::now();
        let (mut next_sample, mut next_ack, mut next_progress) =
            (start, start + ACK_EVERY, start + Duration::from_secs(60));
        let mut plan = plan.into_iter().peekable();
        let end = start + Duration::from_secs_f64(wall_s);
        while Instant::now() < end || plan.peek().is_some() {
            let now = Instant::now();
            if let Some((at, _)) = plan.peek()
                && start + Duration::from_secs_f64(*at) <= now
            {
                let (_, action) = plan.next().expect("peeked");
                self.act(action)?;
                continue;
            }
            if now >= next_sample {
                self.sample();
                next_sample = now + SAMPLE_EVERY;
            }
            if now >= next_ack {
                self.acknowledge();
                next_ack = now + ACK_EVERY;
            }
            if now >= next_progress {
                let elapsed = now.duration_since(start).as_secs_f64();
                let rss = self.lives.last().and_then(|l| l.samples.last()).map_or(0, |s| s.1);
                println!(
                    "soak: {} wall, {:.1} h plant; life {}, {} MiB resident; writes seen {}",
                    human(elapsed),
                    elapsed * args.speed / 3600.0,
                    self.lives.len(),
                    rss / 1024,
                    self.port.writes_seen()
                );
                next_progress = now + Duration::from_secs(60);
            }
            std::thread::sleep(Duration::from_millis(20));
        }
        let faults_end = Instant::now();
        self.finish(args, start, faults_end)
    }

    fn act(&mut self, action: Action) -> Result<(), String> {
        match action {
            Action::Link(fault) => {
                self.port.set_fault(fault);
                self.count(fault.name());
            }
            Action::LinkBack => self.port.set_fault(Fault::None),
            Action::PlcDown => {
                self.stop_sim();
                self.count("PLC restarts");
            }
            Action::PlcUp => self.start_sim()?,
            Action::PermitOff => self.set_permit(false),
            Action::PermitOn => self.set_permit(true),
            Action::Mode { loop_index, mode } => {
                let name = self.loops[loop_index].name.clone();
                let answer =
                    self.put(&format!("/api/v1/loops/{name}/mode"), &format!("{{\"mode\":\"{mode}\"}}"));
                self.count(&format!(
                    "mode changes answered {}",
                    answer.map_or("nothing".into(), |s| s.to_string())
                ));
            }
            Action::Bounds { loop_index, input_fraction, low, span } => {
                let input = self.input_of(loop_index, input_fraction);
                let (lmin, lmax) = self.loops[loop_index].inputs[input].limits;
                // Round numbers, as an operator types them (most are not exact in f32).
                let round = |v: f64| (v * 1000.0).round() / 1000.0;
                let min = round(lmin + low * (lmax - lmin));
                let max = round(min + span * (lmax - lmin)).min(lmax);
                self.set_bounds(loop_index, input, (min, max));
            }
            Action::BoundsBack { loop_index, input_fraction } => {
                let input = self.input_of(loop_index, input_fraction);
                let bounds = self.loops[loop_index].inputs[input].bounds;
                self.set_bounds(loop_index, input, bounds);
            }
            Action::Kill { down } => self.kill(down)?,
        }
        Ok(())
    }

    /// Ends the faults, brings every loop back to its start mode and bounds, stops the
    /// service with SIGTERM, and judges the run.
    fn finish(mut self, args: &Args, start: Instant, faults_end: Instant) -> Result<Report, String> {
        self.port.set_fault(Fault::None);
        if self.sim.is_none() {
            self.start_sim()?;
        }
        self.set_permit(true);
        for loop_index in 0..self.loops.len() {
            for input in 0..self.loops[loop_index].inputs.len() {
                let bounds = self.loops[loop_index].inputs[input].bounds;
                self.set_bounds(loop_index, input, bounds);
            }
            let LoopInfo { name, start_mode: mode, .. } = &self.loops[loop_index];
            self.put(&format!("/api/v1/loops/{name}/mode"), &format!("{{\"mode\":\"{mode}\"}}"));
        }
        // Every loop back in its mode's own state: fallbacks acknowledged as they clear.
        let settled = wait_for(Duration::from_secs(180), || {
            self.sample();
            self.acknowledge();
            let statuses = self.statuses()?;
            // A loop that was in fallback refused its start mode above: asked again.
            for (status, LoopInfo { name, start_mode: mode, .. }) in statuses.iter().zip(&self.loops) {
                if status["mode"] != mode.as_str() {
                    self.put(&format!("/api/v1/loops/{name}/mode"), &format!("{{\"mode\":\"{mode}\"}}"));
                }
            }
            let back =
                statuses.iter().zip(&self.loops).all(|(s, info)| s["state"] == info.start_mode.as_str());
            std::thread::sleep(Duration::from_secs(2));
            back.then_some(statuses)
        });
        let final_states: Vec<String> = self
            .statuses()
            .unwrap_or_default()
            .iter()
            .map(|s| format!("{} {}", s["name"].as_str().unwrap_or("?"), s["state"].as_str().unwrap_or("?")))
            .collect();
        // A minute more of quiet running, for the last memory samples.
        let quiet_until = Instant::now() + Duration::from_secs(30);
        while Instant::now() < quiet_until {
            self.sample();
            std::thread::sleep(SAMPLE_EVERY);
        }
        let events = self.events();
        let all: Vec<Value> = events.iter().flat_map(|(_, e)| e.iter().flatten().cloned()).collect();
        let _ = std::fs::write(self.dir.join("events.json"), Value::Array(all).to_string());
        let skipped: Vec<u64> = self
            .statuses()
            .unwrap_or_default()
            .iter()
            .map(|s| s["skipped_ticks"].as_u64().unwrap_or(0))
            .collect();

        // SIGTERM, as systemd stops it.
        let (peer, _) = self.service.take().ok_or("the service is not running at the end")?;
        let _ = Command::new("kill").args(["-TERM", &peer.id().to_string()]).status();
        let stopped = wait_for(Duration::from_secs(30), || {
            std::thread::sleep(Duration::from_millis(100));
            peer.stderr().lines().any(|l| l.trim_end().ends_with("stopped")).then_some(())
        });
        let log = peer.stderr();
        let exit = peer.terminate();
        if let Some(life) = self.lives.last_mut() {
            life.how_it_ended = format!("SIGTERM, exit {}", exit.map_or("none".into(), |c| c.to_string()));
        }
        self.save_log(&format!("ridgeline-{}.log", self.lives.len()), &log);
        self.stop_sim();
        let ended = Instant::now();
        let integrity = self.integrity(false);
        let judged = Judged {
            args,
            wall: faults_end.duration_since(start),
            total_wall: ended.duration_since(start),
            settled: settled.is_some(),
            final_states,
            events,
            skipped,
            stopped: stopped.is_some(),
            exit,
            integrity,
        };
        Ok(self.judge(judged))
    }

    /// Every event of every loop, oldest first, from the API (`None` for a loop whose
    /// events could not all be read).
    fn events(&self) -> Vec<(String, Option<Vec<Value>>)> {
        self.loops
            .iter()
            .map(|LoopInfo { name, .. }| {
                let events = self
                    .get(&format!("/api/v1/events?loop={name}&limit=10000"))
                    .and_then(|v| v.as_array().cloned())
                    .filter(|a| a.len() < 10_000)
                    .map(|mut a| {
                        a.sort_by_key(|e| e["id"].as_i64().unwrap_or(0));
                        a
                    });
                (name.clone(), events)
            })
            .collect()
    }
}

/// Calls `probe` until it gives something or `limit` has passed.
fn wait_for<T>(limit: Duration, mut probe: impl FnMut() -> Option<T>) -> Option<T> {
    let deadline = Instant::now() + limit;
    loop {
        if let Some(v) = probe() {
            return Some(v);
        }
        if Instant::now() > deadline {
            return None;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
}

/// The unit the soak sizes its link faults and permit withdrawals in, in wall seconds:
/// the watchdog in wall seconds, but never less than [`FAULT_FLOOR_S`]. At 60x that is
/// the floor, so every link fault outlasts the watchdog and must trip (and be recovered);
/// at low speeds some faults are shorter than the watchdog and must pass without a trip.
fn fault_unit(speed: f64) -> f64 {
    (STALE_S / speed).max(FAULT_FLOOR_S)
}

fn seed_bytes(seed: u64) -> [u8; 32] {
    let mut bytes = [0u8; 32];
    bytes[..8].copy_from_slice(&seed.to_le_bytes());
    bytes
}

fn human(seconds: f64) -> String {
    let s = seconds.round() as u64;
    match s {
        0..60 => format!("{s} s"),
        60..3600 => format!("{}m {:02}s", s / 60, s % 60),
        _ => format!("{}h {:02}m", s / 3600, (s % 3600) / 60),
    }
}

/// The demo's config made the soak's: its PLC link on the soak's port, the API on any
/// free port, history in the soak's folder, the permit register on every loop, and an
/// operator token. Returns it with each loop's write registers, in config order.
fn soak_config(demo: &str, plc_port: u16, database: &Path) -> Result<(String, Vec<Vec<u16>>), String> {
    let mut text = String::new();
    let mut registers: Vec<Vec<u16>> = Vec::new();
    let mut edits = [0usize; 3];
    for line in demo.lines() {
        let trimmed = line.trim_start();
        if trimmed.starts_with("modbus_tcp = ") {
            text.push_str(&format!("modbus_tcp = \"127.0.0.1:{plc_port}\"\n"));
            edits[0] += 1;
        } else if trimmed.starts_with("listen = ") {
            text.push_str("listen = \"127.0.0.1:0\"\n");
            edits[1] += 1;
        } else if trimmed.starts_with("database = ") {
            text.push_str(&format!("database = {:?}\n", database.display().to_string()));
            edits[2] += 1;
        } else if trimmed == "[[loops]]" {
            text.push_str("[[loops]]\npermit = \"soak_permit\"\n");
            registers.push(Vec::new());
        } else {
            if trimmed.starts_with("write = {")
                && let Some(register) = trimmed
                    .split("holding_register = ")
                    .nth(1)
                    .and_then(|r| r.split(|c: char| !c.is_ascii_digit()).next())
                    .and_then(|r| r.parse::<u16>().ok())
                && let Some(current) = registers.last_mut()
            {
                // An f32 takes this register and the next; writes start here.
                current.push(register);
            }
            text.push_str(line);
            text.push('\n');
        }
    }
    if edits != [1, 1, 1] || registers.is_empty() || registers.iter().any(Vec::is_empty) {
        return Err(format!(
            "config/demo.toml no longer looks as the soak expects (one modbus_tcp, listen and database line, \
             a write register per loop): found {edits:?} and registers {registers:?}"
        ));
    }
    text.push_str(&format!(
        "\n[tags.soak_permit]\nlink = \"demo_plc\"\nholding_register = {PERMIT_REGISTER}\ntype = \"f32\"\n\n\
         [[access]]\nname = \"soak-operator\"\ntoken_sha256 = \"{}\"\nrole = \"operator\"\n",
        ridgeline::api::token_sha256(OPERATOR_TOKEN)
    ));
    Ok((text, registers))
}
