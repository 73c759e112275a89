//! A plant served by `ridgeline sim` and a loop run by `ridgeline run`, on loopback, with
//! the history database in a temporary folder.

use std::net::SocketAddr;
use std::path::PathBuf;

use ridgeline_tests::{
    Peer, f32_from_words, free_port, get_json, read_holding_registers, spawn_service, spawn_sim, write_file,
};

/// A static bowl with its peak at u = 3 (no lag, no noise), u starting at 2.
const PLANT: &str = r#"
step_s = 0.01
[[inputs]]
name = "u"
initial = 2.0
holding_register = 200
[[outputs]]
name = "y"
input_register = 100
expression = "10 - 2 * (u - 3)^2"
"#;

/// One loop that finds u = 3 in a few seconds of wall time: 50 ms ticks, a 1 s dither.
fn config(
    plant_port: u16,
    api: SocketAddr,
    database: &str,
    loop_extra: &str,
    objective: &str,
    extra: &str,
) -> String {
    format!(
        r#"
[service]
listen = "{api}"
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
    pub plant: PathBuf,
    pub plant_port: u16,
    pub api: SocketAddr,
    pub config: PathBuf,
}

impl Rig {
    pub fn new(loop_extra: &str) -> Self {
        Self::build(free_port(), loop_extra, "y", "")
    }

    /// A rig whose loop seeks on `objective`, with `extra` links and tags in the config.
    pub fn build(plant_port: u16, loop_extra: &str, objective: &str, extra: &str) -> Self {
        let dir = tempfile::tempdir().unwrap();
        let api = SocketAddr::from(([127, 0, 0, 1], free_port()));
        let plant = write_file(dir.path(), "plant.toml", PLANT);
        let database = dir.path().join("history").join("ridgeline.db").display().to_string();
        let text = config(plant_port, api, &database, loop_extra, objective, extra);
        let config = write_file(dir.path(), "ridgeline.toml", &text);
        Rig { dir, plant, plant_port, api, config }
    }

    pub fn sim(&self) -> Peer {
        spawn_sim(&self.plant, self.plant_port)
    }

    pub fn service(&self) -> Peer {
        spawn_service(&self.config, self.api)
    }

    pub fn setpoint(&self) -> Option<f64> {
        read_holding_registers(self.plant_port, 200, 2).map(|w| f32_from_words(&w))
    }

    pub fn status(&self) -> Option<serde_json::Value> {
        get_json(self.api, "/api/v1/loops/bowl")
    }

    pub fn estimate(&self) -> Option<f64> {
        self.status().and_then(|s| s["inputs"][0]["estimate"].as_f64())
    }

    pub fn ticks(&self) -> u64 {
        self.status().and_then(|s| s["ticks"].as_u64()).unwrap_or(0)
    }
}

impl Rig {
    pub fn with_mode(self, mode: &str) -> Self {
        let text = std::fs::read_to_string(&self.config).unwrap();
        std::fs::write(
            &self.config,
            text.replace("start_mode = \"seeking\"", &format!("start_mode = \"{mode}\"")),
        )
        .unwrap();
        self
    }

    /// Adds lines to the `[service]` table (`open_reads`, ...) or whole tables such as
    /// `[[access]]` entries before the links.
    pub fn with_service(self, service_lines: &str, tables: &str) -> Self {
        let text = std::fs::read_to_string(&self.config).unwrap();
        let text = text.replacen("[service]\n", &format!("[service]\n{service_lines}\n"), 1).replacen(
            "[links.plc]",
            &format!("{tables}\n[links.plc]"),
            1,
        );
        std::fs::write(&self.config, text).unwrap();
        self
    }

    /// The history database's path.
    pub fn database(&self) -> PathBuf {
        self.dir.path().join("history").join("ridgeline.db")
    }
}
