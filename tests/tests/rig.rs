//! A plant served by `ridgeline sim` and a loop run by `ridgeline run`, on loopback, with
//! the history database in a temporary folder. Both bind port 0 and report the port they
//! got, so tests running side by side never race for a port.

use std::cell::{Cell, RefCell};
use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::Duration;

use ridgeline_tests::{
    Peer, f32_from_words, free_port, get_json, read_holding_registers, spawn_service, spawn_sim, wait_until,
    write_file,
};

/// A static bowl with its peak at u = 3 (no lag, no noise), u starting at 2. Two more
/// holding registers stand for the PLC's own: a permit the HMI sets (300, f32, 1 = yes)
/// and a heartbeat word the PLC watches (400).
const PLANT: &str = r#"
step_s = 0.01
[[inputs]]
name = "u"
initial = 2.0
holding_register = 200
[[inputs]]
name = "enable"
initial = 1.0
holding_register = 300
[[inputs]]
name = "beat"
initial = 0.0
holding_register = 400
[[outputs]]
name = "y"
input_register = 100
expression = "10 - 2 * (u - 3)^2"
"#;

/// One loop that finds u = 3 in a few seconds of wall time: 50 ms ticks, a 1 s dither.
fn config(plant_port: u16, database: &str, loop_extra: &str, objective: &str, extra: &str) -> String {
    format!(
        r#"
[service]
listen = "127.0.0.1:0"
database = "{database}"

[links.plc]
modbus_tcp = "127.0.0.1:{plant_port}"
timeout_ms = 300

[tags.y]
link = "plc"
input_register = 100
type = "f32"
{extra}
[[loops]]
name = "bowl"
objective = "{objective}"
direction = "maximize"
tick_s = 0.05
start_mode = "seeking"
{loop_extra}

[loops.filter]
highpass_hz = 0.2

[loops.watchdog]
stale_after_s = 1

[[loops.inputs]]
name = "u"
write = {{ link = "plc", holding_register = 200, type = "f32" }}
limits = [0.0, 6.0]
bounds = [0.0, 6.0]
safe = 1.0
max_rate_per_s = 2.0
dither_amplitude = 0.1
dither_period_s = 1.0
gain = 0.09
"#
    )
}

pub struct Rig {
    pub dir: tempfile::TempDir,
    plant: PathBuf,
    plant_port: Cell<Option<u16>>,
    api: Cell<Option<SocketAddr>>,
    pub config: PathBuf,
    loop_extra: String,
    objective: String,
    extra: RefCell<String>,
    edits: RefCell<Vec<(String, String)>>,
}

impl Rig {
    pub fn new(loop_extra: &str) -> Self {
        Self::seeking(loop_extra, "y")
    }

    /// A rig whose loop writes only while the PLC's permit (register 300) is not zero.
    pub fn with_permit() -> Self {
        Self::new("permit = \"enable\"")
            .with_tables("\n[tags.enable]\nlink = \"plc\"\nholding_register = 300\ntype = \"f32\"\n")
    }

    /// A rig whose loop seeks on `objective` (a tag name).
    pub fn seeking(loop_extra: &str, objective: &str) -> Self {
        let dir = tempfile::tempdir().unwrap();
        let plant = write_file(dir.path(), "plant.toml", PLANT);
        let config = dir.path().join("ridgeline.toml");
        Rig {
            dir,
            plant,
            plant_port: Cell::new(None),
            api: Cell::new(None),
            config,
            loop_extra: loop_extra.to_owned(),
            objective: objective.to_owned(),
            extra: RefCell::new(String::new()),
            edits: RefCell::new(Vec::new()),
        }
    }

    /// The simulator's port: the one it got, or one picked now for a simulator that
    /// starts after the service.
    pub fn plant_port(&self) -> u16 {
        self.plant_port.get().unwrap_or_else(|| {
            let port = free_port();
            self.plant_port.set(Some(port));
            port
        })
    }

    /// Points the loop at another server (a misbehaving PLC) instead of the simulator.
    pub fn with_plant_port(self, port: u16) -> Self {
        self.plant_port.set(Some(port));
        self
    }

    /// The service's API address, once it runs.
    pub fn api(&self) -> SocketAddr {
        self.api.get().expect("the service was started")
    }

    /// Starts the simulator: on port 0 the first time, on the same port after.
    pub fn sim(&self) -> Peer {
        let (peer, port) = spawn_sim(&self.plant, self.plant_port.get());
        self.plant_port.set(Some(port));
        peer
    }

    /// Writes the config (with the simulator's port) and starts the service.
    pub fn service(&self) -> Peer {
        self.write_config();
        let (peer, api) = spawn_service(&self.config);
        self.api.set(Some(api));
        peer
    }

    /// Writes the config, with the simulator's port and every edit.
    pub fn write_config(&self) {
        let database = self.database().display().to_string();
        let mut text =
            config(self.plant_port(), &database, &self.loop_extra, &self.objective, &self.extra.borrow());
        for (from, to) in self.edits.borrow().iter() {
            assert!(text.contains(from.as_str()), "the rig's config has no `{from}`");
            text = text.replacen(from.as_str(), to, 1);
        }
        std::fs::write(&self.config, text).unwrap();
    }

    pub fn setpoint(&self) -> Option<f64> {
        read_holding_registers(self.plant_port(), 200, 2).map(|w| f32_from_words(&w))
    }

    pub fn status(&self) -> Option<serde_json::Value> {
        get_json(self.api(), "/api/v1/loops/bowl")
    }

    pub fn estimate(&self) -> Option<f64> {
        self.status().and_then(|s| s["inputs"][0]["estimate"].as_f64())
    }

    pub fn ticks(&self) -> u64 {
        self.status().and_then(|s| s["ticks"].as_u64()).unwrap_or(0)
    }

    /// The loop's events, newest first (reads must be open).
    pub fn events(&self) -> Vec<serde_json::Value> {
        let events = get_json(self.api(), "/api/v1/events?loop=bowl&limit=1000").expect("the events");
        events.as_array().expect("a list of events").clone()
    }

    /// Waits for the loop's newest event that `matches` (history is written in batches, a
    /// moment after what happened) and returns it.
    pub fn event(&self, what: &str, matches: impl Fn(&serde_json::Value) -> bool) -> serde_json::Value {
        let mut found = None;
        wait_until(&format!("{what} is in history"), Duration::from_secs(5), || {
            found = self.events().into_iter().find(|e| matches(e));
            found.is_some()
        });
        found.expect("found")
    }

    /// Waits until the loop has written a setpoint of its own (the plant starts at 2.0).
    pub fn wait_writing(&self) {
        wait_until("the loop is writing", Duration::from_secs(20), || {
            self.setpoint().is_some_and(|v| v != 2.0)
        });
    }

    pub fn with_mode(self, mode: &str) -> Self {
        self.edit("start_mode = \"seeking\"", &format!("start_mode = \"{mode}\""))
    }

    /// Adds lines to the `[service]` table (`open_reads`, ...) and whole tables such as
    /// `[[access]]` entries before the links.
    pub fn with_service(self, service_lines: &str, tables: &str) -> Self {
        self.edit("[service]\n", &format!("[service]\n{service_lines}\n"))
            .edit("[links.plc]", &format!("{tables}\n[links.plc]"))
    }

    /// Adds links and tags to the config.
    pub fn with_tables(self, tables: &str) -> Self {
        self.extra.borrow_mut().push_str(tables);
        self
    }

    /// Replaces text in the config when it is written.
    pub fn edit(self, from: &str, to: &str) -> Self {
        self.edits.borrow_mut().push((from.to_owned(), to.to_owned()));
        self
    }

    /// The history database's path.
    pub fn database(&self) -> PathBuf {
        self.dir.path().join("history").join("ridgeline.db")
    }
}
