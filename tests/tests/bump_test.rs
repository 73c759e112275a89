//! The bump test through the API, against the project's pymodbus peer
//! (`tests/peers/plant_server.py`) playing a PLC in front of a plant with known lag, dead
//! time and curvature: the fit recovers them, the setpoint ends where it started, and a
//! withdrawn permit or a cut link stops the test.

use std::time::Duration;

use ridgeline::api::token_sha256;
use ridgeline_tests::{
    Peer, f32_from_words, get_json, http_request, python_peer, read_holding_registers, spawn_service,
    wait_until, write_file, write_holding_registers,
};

const OPERATOR: &str = "bump-test-operator-token";
/// The peer's plant: a first-order lag and dead time before `J = 7 - 2 (x - 2.3)^2`.
const LAG_S: f64 = 1.5;
const DEAD_TIME_S: f64 = 0.5;
const CURVATURE: f64 = 4.0;
const PERMIT_REGISTER: u16 = 10;

/// The peer, the service and the test's temporary folder, torn down together.
struct Bench {
    plant: Option<Peer>,
    plant_port: u16,
    _service: Peer,
    api: std::net::SocketAddr,
    _dir: tempfile::TempDir,
}

impl Bench {
    /// The peer with the plant above (u0 = 2.5, noise 0.01), and a loop on it that starts
    /// observing, untuned, with a permit tag.
    fn start() -> Bench {
        let plant = format!(
            r#"{{"unit": 1, "setpoint_register": 0, "objective_register": 0, "permit_register": {PERMIT_REGISTER},
                "initial": 2.5, "permit": 1, "lag_s": {LAG_S}, "dead_time_s": {DEAD_TIME_S},
                "curvature": {CURVATURE}, "optimum": 2.3, "peak": 7.0, "noise_std": 0.01, "seed": 4}}"#
        );
        let mut command = python_peer("plant_server.py");
        command.arg(plant);
        let (peer, ready) =
            Peer::start("plant_server.py", command, Duration::from_secs(30), |l| l.contains("\"ready\""));
        let ready: serde_json::Value = serde_json::from_str(&ready).expect("a JSON ready line");
        let plant_port = ready["port"].as_u64().expect("a port") as u16;
        let dir = tempfile::tempdir().unwrap();
        let config = format!(
            r#"
[service]
listen = "127.0.0.1:0"
database = "{database}"

[[access]]
name = "commissioning"
token_sha256 = "{hash}"
role = "operator"

[links.plc]
modbus_tcp = "127.0.0.1:{plant_port}"
timeout_ms = 300

[tags.j]
link = "plc"
input_register = 0
type = "f32"

[tags.enable]
link = "plc"
holding_register = {PERMIT_REGISTER}
type = "u16"

[[loops]]
name = "untuned"
objective = "j"
direction = "maximize"
tick_s = 0.1
start_mode = "observing"
permit = "enable"

[loops.filter]
highpass_hz = 0.02

[loops.watchdog]
stale_after_s = 1

[[loops.inputs]]
name = "u"
write = {{ link = "plc", holding_register = 0, type = "f32" }}
limits = [1.0, 4.0]
bounds = [2.0, 3.0]
safe = 2.4
max_rate_per_s = 1.0
dither_amplitude = 0.05
dither_period_s = 10
gain = 0.001
"#,
            database = dir.path().join("history.db").display(),
            hash = token_sha256(OPERATOR),
        );
        let path = write_file(dir.path(), "ridgeline.toml", &config);
        let (service, api) = spawn_service(&path);
        let bench = Bench { plant: Some(peer), plant_port, _service: service, api, _dir: dir };
        wait_until("the loop has ticked", Duration::from_secs(20), || {
            bench.status()["ticks"].as_u64().is_some_and(|t| t > 5)
        });
        bench
    }

    fn status(&self) -> serde_json::Value {
        get_json(self.api, "/api/v1/loops/untuned").unwrap_or_default()
    }

    fn post_test(&self, input: &str, body: &str) -> ridgeline_tests::HttpAnswer {
        let bearer = format!("Bearer {OPERATOR}");
        let path = format!("/api/v1/loops/untuned/inputs/{input}/bump-test");
        http_request(self.api, "POST", &path, &[("Authorization", &bearer)], Some(body))
            .expect("the API answers")
    }

    fn test(&self, id: i64) -> serde_json::Value {
        get_json(self.api, &format!("/api/v1/bump-tests/{id}")).unwrap_or_default()
    }

    /// Waits until the test is no longer running, and returns it.
    fn finished(&self, id: i64, limit: Duration) -> serde_json::Value {
        let mut test = serde_json::Value::Null;
        wait_until("the bump test has finished", limit, || {
            test = self.test(id);
            test["status"] == "done" || test["status"] == "aborted"
        });
        test
    }

    /// The setpoints the peer has seen written since last asked.
    fn writes(&self) -> Vec<f64> {
        let peer = self.plant.as_ref().expect("the plant runs");
        let mut written = Vec::new();
        while let Some(line) = peer.next_line(Duration::ZERO) {
            let event: serde_json::Value = serde_json::from_str(&line).unwrap_or_default();
            if event["event"] == "write" && event["address"] == 0 {
                written.push(event["value"].as_f64().expect("a value"));
            }
        }
        written
    }

    fn events(&self, kind: &str) -> Vec<serde_json::Value> {
        let all = get_json(self.api, "/api/v1/events?loop=untuned").unwrap_or_default();
        all.as_array().map(|a| a.iter().filter(|e| e["kind"] == kind).cloned().collect()).unwrap_or_default()
    }
}

fn num(v: &serde_json::Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("a number, not {v}"))
}

fn started(bench: &Bench, body: &str) -> i64 {
    let answer = bench.post_test("u", body);
    assert_eq!(answer.status, 202, "{}", answer.body);
    answer.json()["id"].as_i64().expect("an id")
}

#[test]
fn a_bump_test_recovers_the_plants_lag_dead_time_and_curvature_and_leaves_the_setpoint_at_u0() {
    let bench = Bench::start();
    let answer = bench.post_test("u", r#"{"step": 0.3, "settle_max_s": 60}"#);
    assert_eq!(answer.status, 202, "{}", answer.body);
    let test = answer.json();
    let id = test["id"].as_i64().unwrap();
    let setpoints: Vec<f64> = test["setpoints"].as_array().unwrap().iter().map(num).collect();
    assert_eq!(setpoints, vec![2.5, 2.8, 2.5 - 0.3, 2.5], "from u0 as the PLC held it");
    assert_eq!(bench.status()["state"], "testing");
    // One test at a time.
    let again = bench.post_test("u", r#"{"step": 0.1}"#);
    assert_eq!(again.status, 409, "{}", again.body);

    let test = bench.finished(id, Duration::from_secs(180));
    assert_eq!(test["status"], "done", "{test:#}");
    let levels = test["levels"].as_array().unwrap();
    assert_eq!(levels.len(), 4, "{test:#}");
    let model = &test["result"]["model"];
    // Source: the peer's plant (tests/peers/plant_server.py), whose lag, dead time and
    // curvature are the ones it was started with; tolerances from the issue (15/15/10%).
    assert!((num(&model["lag_s"]) / LAG_S - 1.0).abs() < 0.15, "lag: {model:#}");
    assert!((num(&model["dead_time_s"]) / DEAD_TIME_S - 1.0).abs() < 0.15, "dead time: {model:#}");
    assert!((num(&model["curvature"]) / CURVATURE - 1.0).abs() < 0.10, "curvature: {model:#}");
    assert!(test["result"]["recommended"]["gain"].is_number(), "{test:#}");

    // The setpoint is back where it was, and the loop observes again, writing nothing.
    let words = read_holding_registers(bench.plant_port, 0, 2).expect("the register reads");
    assert_eq!(f32_from_words(&words), 2.5);
    assert_eq!(bench.status()["state"], "observing");
    let written = bench.writes();
    assert_eq!(written.last(), Some(&2.5), "the last write restores u0");
    assert!(
        written.iter().all(|&u| (2.2 - 1e-6..=2.8 + 1e-6).contains(&u)),
        "inside the levels: {written:?}"
    );
    assert_eq!(bench.events("bump_test_started").len(), 1);
    assert_eq!(bench.events("bump_test_done").len(), 1);
}

#[test]
fn a_step_whose_levels_leave_the_bounds_is_refused_naming_the_bound() {
    let bench = Bench::start();
    let answer = bench.post_test("u", r#"{"step": 0.6}"#);
    assert_eq!(answer.status, 422, "{}", answer.body);
    assert!(answer.body.contains("upper bound 3"), "{}", answer.body);
    let answer = bench.post_test("u", r#"{"step": -1}"#);
    assert_eq!(answer.status, 422, "{}", answer.body);
    assert_eq!(bench.post_test("v", r#"{"step": 0.1}"#).status, 404);
    assert_eq!(bench.status()["state"], "observing");
    assert!(bench.writes().is_empty(), "nothing written");
}

#[test]
fn a_permit_withdrawn_mid_test_aborts_it_and_nothing_more_is_written() {
    let bench = Bench::start();
    let id = started(&bench, r#"{"step": 0.3}"#);
    wait_until("the staircase has written", Duration::from_secs(20), || !bench.writes().is_empty());
    assert!(write_holding_registers(bench.plant_port, PERMIT_REGISTER, &[0]), "the HMI withdraws the permit");
    let test = bench.finished(id, Duration::from_secs(20));
    assert_eq!(test["status"], "aborted", "{test:#}");
    assert!(test["abort_reason"].as_str().unwrap().contains("withdrew permission"), "{test:#}");
    // The loop was observing: without the PLC's permit it observes again, as before the test.
    assert_eq!(bench.status()["state"], "observing");
    // Whatever was on its way when the permit went is in; from now on nothing is written.
    bench.writes();
    let ticks = bench.status()["ticks"].as_u64().unwrap();
    wait_until("twenty more ticks", Duration::from_secs(20), || {
        bench.status()["ticks"].as_u64().is_some_and(|t| t >= ticks + 20)
    });
    assert_eq!(bench.writes(), Vec::<f64>::new(), "written without permit");
    assert_eq!(bench.events("bump_test_aborted").len(), 1);
    assert_eq!(bench.post_test("u", r#"{"step": 0.1}"#).status, 409, "no test without permit");
}

#[test]
fn a_cut_link_trips_the_loop_to_fallback_and_aborts_the_test() {
    let mut bench = Bench::start();
    let id = started(&bench, r#"{"step": 0.3}"#);
    wait_until("the staircase has written", Duration::from_secs(20), || !bench.writes().is_empty());
    let mut plant = bench.plant.take().expect("the plant runs");
    plant.stop();
    let test = bench.finished(id, Duration::from_secs(20));
    assert_eq!(test["status"], "aborted", "{test:#}");
    assert!(test["abort_reason"].as_str().unwrap().contains("stale"), "{test:#}");
    let status = bench.status();
    assert_eq!(status["state"], "fallback");
    assert_eq!(status["fallback_reason"], "stale");
    let answer = bench.post_test("u", r#"{"step": 0.1}"#);
    assert_eq!(answer.status, 409, "{}", answer.body);
    assert!(answer.body.contains("fallback"), "{}", answer.body);
}

#[test]
fn a_mode_change_cancels_the_test_and_puts_the_setpoint_back_at_u0() {
    let bench = Bench::start();
    let id = started(&bench, r#"{"step": 0.3}"#);
    wait_until("the staircase has left u0", Duration::from_secs(20), || {
        bench.writes().iter().any(|&u| u > 2.6)
    });
    let bearer = format!("Bearer {OPERATOR}");
    let answer = http_request(
        bench.api,
        "PUT",
        "/api/v1/loops/untuned/mode",
        &[("Authorization", &bearer)],
        Some(r#"{"mode": "observing"}"#),
    )
    .expect("the API answers");
    assert_eq!(answer.status, 200, "{}", answer.body);
    let test = bench.finished(id, Duration::from_secs(10));
    assert_eq!(test["status"], "aborted");
    assert!(test["abort_reason"].as_str().unwrap().starts_with("cancelled"), "{test:#}");
    let words = read_holding_registers(bench.plant_port, 0, 2).expect("the register reads");
    assert_eq!(f32_from_words(&words), 2.5, "u0 restored");
    assert_eq!(bench.status()["state"], "observing");
}
