//! The real binary against a plant over real Modbus/TCP on loopback: `ridgeline sim`
//! serves the plant, `ridgeline run` runs the loop.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::Duration;

use ridgeline_tests::{
    Peer, f32_from_words, free_port, get_json, read_holding_registers, spawn_service, spawn_sim, wait_until,
    write_file,
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
fn config(plant_port: u16, api: SocketAddr, loop_extra: &str, objective: &str, extra: &str) -> String {
    format!(
        r#"
[service]
listen = "{api}"

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

struct Rig {
    _dir: tempfile::TempDir,
    plant: PathBuf,
    plant_port: u16,
    api: SocketAddr,
    config: PathBuf,
}

impl Rig {
    fn new(loop_extra: &str) -> Self {
        Self::build(free_port(), loop_extra, "y", "")
    }

    /// A rig whose loop seeks on `objective`, with `extra` links and tags in the config.
    fn build(plant_port: u16, loop_extra: &str, objective: &str, extra: &str) -> Self {
        let dir = tempfile::tempdir().unwrap();
        let api = SocketAddr::from(([127, 0, 0, 1], free_port()));
        let plant = write_file(dir.path(), "plant.toml", PLANT);
        let config =
            write_file(dir.path(), "ridgeline.toml", &config(plant_port, api, loop_extra, objective, extra));
        Rig { _dir: dir, plant, plant_port, api, config }
    }

    fn sim(&self) -> Peer {
        spawn_sim(&self.plant, self.plant_port)
    }

    fn service(&self) -> Peer {
        spawn_service(&self.config, self.api)
    }

    fn setpoint(&self) -> Option<f64> {
        read_holding_registers(self.plant_port, 200, 2).map(|w| f32_from_words(&w))
    }

    fn status(&self) -> Option<serde_json::Value> {
        get_json(self.api, "/api/v1/loops/bowl")
    }

    fn estimate(&self) -> Option<f64> {
        self.status().and_then(|s| s["inputs"][0]["estimate"].as_f64())
    }

    fn ticks(&self) -> u64 {
        self.status().and_then(|s| s["ticks"].as_u64()).unwrap_or(0)
    }
}

#[test]
fn sim_and_run_find_the_peak_of_a_plant_over_modbus() {
    let rig = Rig::new("");
    let _sim = rig.sim();
    let _service = rig.service();
    // Within 2% of the bounds span of the peak at u = 3.
    wait_until("the estimate is within 0.12 of the peak", Duration::from_secs(60), || {
        rig.estimate().is_some_and(|e| (e - 3.0).abs() < 0.12)
    });
    let status = rig.status().unwrap();
    assert_eq!(status["state"], "seeking");
    assert!(status["objective"].as_f64().unwrap() > 9.9, "{status}");
    assert!(status["objective_at"].as_str().unwrap().ends_with('Z'), "RFC 3339 UTC: {status}");
    let written = rig.setpoint().expect("the setpoint register reads");
    assert!((written - 3.0).abs() < 0.3, "the PLC holds {written}");
}

#[test]
fn a_loop_in_observing_mode_never_writes() {
    let rig = Rig::new("").with_mode("observing");
    let _sim = rig.sim();
    let _service = rig.service();
    wait_until("the loop has ticked 40 times", Duration::from_secs(20), || rig.ticks() >= 40);
    let status = rig.status().unwrap();
    assert_eq!(status["state"], "observing");
    assert!(status["objective"].as_f64().is_some(), "it reads: {status}");
    // The register still holds the plant's initial value, bit for bit.
    assert_eq!(rig.setpoint(), Some(2.0));
}

#[test]
fn sigterm_writes_the_shutdown_value_and_exits_0() {
    let rig = Rig::new("on_shutdown = \"safe\"");
    let _sim = rig.sim();
    let service = rig.service();
    wait_until("the loop is writing", Duration::from_secs(20), || rig.setpoint().is_some_and(|v| v != 2.0));
    assert_eq!(service.terminate(), Some(0));
    assert_eq!(rig.setpoint(), Some(1.0), "safe = 1.0 written on the way out");
}

#[test]
fn an_unreachable_plc_at_start_is_one_log_line_and_the_service_keeps_retrying() {
    let rig = Rig::new("");
    let mut service = rig.service();
    std::thread::sleep(Duration::from_secs(2));
    assert!(service.is_running(), "the service keeps running");
    let log = service.stderr();
    let down: Vec<&str> = log.lines().filter(|l| l.contains("link down")).collect();
    assert_eq!(down.len(), 1, "one line for the failing link:\n{log}");
    assert!(down[0].contains("link plc: cannot connect to 127.0.0.1:"), "{}", down[0]);
    let _sim = rig.sim();
    wait_until("the loop writes once the PLC answers", Duration::from_secs(15), || {
        rig.setpoint().is_some_and(|v| v != 2.0)
    });
}

#[test]
fn a_restarted_modbus_server_is_reconnected_without_restarting_ridgeline() {
    let rig = Rig::new("");
    let mut sim = rig.sim();
    let _service = rig.service();
    wait_until("the loop is writing", Duration::from_secs(20), || rig.setpoint().is_some_and(|v| v != 2.0));
    sim.stop();
    std::thread::sleep(Duration::from_millis(800));
    let _sim = rig.sim();
    // The new server starts at the plant's initial value; a write means reconnection.
    assert_eq!(rig.setpoint(), Some(2.0));
    wait_until("the loop writes to the new server", Duration::from_secs(15), || {
        rig.setpoint().is_some_and(|v| v != 2.0)
    });
}

#[test]
fn an_objective_read_over_http_drives_the_loop() {
    let plant_port = free_port();
    let http = ObjectiveServer::start(plant_port);
    let lab = format!(
        "\n[links.lab]\nhttp_get = \"http://{}/readings\"\ntimeout_ms = 500\n\n\
         [tags.lab_y]\nlink = \"lab\"\njson_pointer = \"/plant/y\"\n",
        http.addr
    );
    let rig = Rig::build(plant_port, "", "lab_y", &lab);
    let _sim = rig.sim();
    let _service = rig.service();
    wait_until("the estimate is within 0.12 of the peak", Duration::from_secs(60), || {
        rig.estimate().is_some_and(|e| (e - 3.0).abs() < 0.12)
    });
    assert!(http.requests() > 20, "every tick fetched the document");
}

impl Rig {
    fn with_mode(self, mode: &str) -> Self {
        let text = std::fs::read_to_string(&self.config).unwrap();
        std::fs::write(
            &self.config,
            text.replace("start_mode = \"seeking\"", &format!("start_mode = \"{mode}\"")),
        )
        .unwrap();
        self
    }
}

/// A small HTTP server that serves `{"plant": {"y": ...}}`, computing y from the
/// setpoint it reads from the simulated PLC, like an analyzer beside the process.
struct ObjectiveServer {
    addr: SocketAddr,
    served: std::sync::Arc<std::sync::atomic::AtomicUsize>,
}

impl ObjectiveServer {
    fn start(plant_port: u16) -> Self {
        use std::io::{Read, Write};
        let listener = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
        let addr = listener.local_addr().unwrap();
        let served = std::sync::Arc::new(std::sync::atomic::AtomicUsize::new(0));
        let count = served.clone();
        std::thread::spawn(move || {
            for stream in listener.incoming() {
                let Ok(mut stream) = stream else { continue };
                let mut request = [0u8; 1024];
                let _ = stream.read(&mut request);
                let body = match read_holding_registers(plant_port, 200, 2) {
                    Some(words) => {
                        let u = f32_from_words(&words);
                        format!("{{\"plant\": {{\"y\": {}}}}}", 10.0 - 2.0 * (u - 3.0).powi(2))
                    }
                    None => "{\"plant\": {\"y\": null}}".to_owned(),
                };
                count.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                let _ = write!(
                    stream,
                    "HTTP/1.1 200 OK\r\nContent-Type: application/json\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
                    body.len()
                );
            }
        });
        ObjectiveServer { addr, served }
    }

    fn requests(&self) -> usize {
        self.served.load(std::sync::atomic::Ordering::Relaxed)
    }
}
