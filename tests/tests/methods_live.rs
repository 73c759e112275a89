//! The Newton-based and stepwise methods in the real service, over Modbus/TCP on
//! loopback: what their status and their samples show beyond the sine method's.

use std::net::SocketAddr;
use std::time::Duration;

use ridgeline::api::token_sha256;
use ridgeline_tests::{
    HttpAnswer, Peer, get_json, http_request, spawn_service, spawn_sim, wait_until, write_file,
};

const OPERATOR: &str = "methods-live-operator-token";
/// The stepwise loop's step, as configured below.
const STEP: f64 = 0.2;

/// Two static bowls with their peaks at 3 (no lag, no noise), one per loop, each on its
/// own registers; both inputs start at 2.
const PLANT: &str = r#"
step_s = 0.01
[[inputs]]
name = "u"
initial = 2.0
holding_register = 200
[[inputs]]
name = "v"
initial = 2.0
holding_register = 202
[[outputs]]
name = "y_newton"
input_register = 100
expression = "10 - 2 * (u - 3)^2"
[[outputs]]
name = "y_stepwise"
input_register = 102
expression = "10 - 2 * (v - 3)^2"
"#;

/// A Newton loop on u (50 ms ticks, a 1 s dither, the bowl's true curvature to start
/// from) and a stepwise loop on v (0.5 s ticks, 4 s dwells of which the last 2 s are
/// averaged; a step takes 0.2 s at the rate limit). Both start observing.
fn config(plant_port: u16, database: &str) -> String {
    format!(
        r#"
[service]
listen = "127.0.0.1:0"
database = "{database}"
open_reads = true

[[access]]
name = "methods-test"
token_sha256 = "{hash}"
role = "operator"

[links.plc]
modbus_tcp = "127.0.0.1:{plant_port}"
timeout_ms = 300

[tags.y_newton]
link = "plc"
input_register = 100
type = "f32"

[tags.y_stepwise]
link = "plc"
input_register = 102
type = "f32"

[[loops]]
name = "newton"
objective = "y_newton"
direction = "maximize"
tick_s = 0.05
start_mode = "observing"
method = "newton"

[loops.filter]
highpass_hz = 0.2

[loops.newton]
time_constant_s = 20
hessian_hz = 0.05
initial_curvature = 4.0

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

[[loops]]
name = "stepwise"
objective = "y_stepwise"
direction = "maximize"
tick_s = 0.5
start_mode = "observing"
method = "stepwise"

[loops.stepwise]
dwell_s = 4
average_s = 2

[loops.watchdog]
stale_after_s = 2

[[loops.inputs]]
name = "v"
write = {{ link = "plc", holding_register = 202, type = "f32" }}
limits = [0.0, 6.0]
bounds = [0.0, 6.0]
safe = 1.0
max_rate_per_s = 1.0
step = {STEP}
"#,
        hash = token_sha256(OPERATOR)
    )
}

/// The simulator and the service with both loops, torn down together.
struct Bench {
    _sim: Peer,
    _service: Peer,
    api: SocketAddr,
    _dir: tempfile::TempDir,
}

impl Bench {
    fn start() -> Bench {
        let dir = tempfile::tempdir().unwrap();
        let plant = write_file(dir.path(), "plant.toml", PLANT);
        let (sim, plant_port) = spawn_sim(&plant, None);
        let database = dir.path().join("history").join("ridgeline.db");
        let path =
            write_file(dir.path(), "ridgeline.toml", &config(plant_port, &database.display().to_string()));
        let (service, api) = spawn_service(&path);
        Bench { _sim: sim, _service: service, api, _dir: dir }
    }

    fn get(&self, path: &str, headers: &[(&str, &str)]) -> HttpAnswer {
        let answer = http_request(self.api, "GET", path, headers, None).expect("the API answers");
        assert_eq!(answer.status, 200, "GET {path}: {}", answer.body);
        answer
    }

    fn status(&self, name: &str) -> serde_json::Value {
        get_json(self.api, &format!("/api/v1/loops/{name}")).expect("the loop's status")
    }

    fn seek(&self, name: &str) {
        let bearer = format!("Bearer {OPERATOR}");
        let answer = http_request(
            self.api,
            "PUT",
            &format!("/api/v1/loops/{name}/mode"),
            &[("Authorization", &bearer)],
            Some(r#"{"mode": "seeking"}"#),
        )
        .expect("the API answers");
        assert_eq!(answer.status, 200, "{name} to seeking: {}", answer.body);
    }

    /// The loop's samples as JSON, oldest first, up to `until` when given.
    fn samples(&self, name: &str, until: Option<&str>) -> Vec<serde_json::Value> {
        let until = until.map(|u| format!("&until={u}")).unwrap_or_default();
        let answer = self.get(&format!("/api/v1/loops/{name}/samples?limit=10000{until}"), &[]);
        answer.json().as_array().expect("a list of samples").clone()
    }

    fn samples_csv(&self, name: &str, until: &str) -> String {
        self.get(&format!("/api/v1/loops/{name}/samples?limit=10000&until={until}&format=csv"), &[]).body
    }
}

/// The stepwise loop's levels: each dwell's estimate while it averages, in order, from
/// the samples taken while seeking. Every averaging tick of a dwell holds the same level.
fn averaged_levels(samples: &[serde_json::Value]) -> Vec<f64> {
    let mut levels: Vec<f64> = Vec::new();
    let mut in_average = false;
    for s in samples.iter().filter(|s| s["state"] == "seeking") {
        let averaging = s["phase"] == "averaging";
        if averaging {
            let estimate = s["inputs"]["v"]["estimate"].as_f64().expect("an estimate while seeking");
            if in_average {
                let level = *levels.last().expect("a level");
                assert_eq!(estimate, level, "the level moved while the objective was averaged: {s}");
            } else {
                levels.push(estimate);
            }
        }
        in_average = averaging;
    }
    levels
}

#[test]
fn newton_and_stepwise_loops_show_their_curvature_dwell_and_phases() {
    let bench = Bench::start();
    wait_until("both loops have ticked", Duration::from_secs(20), || {
        ["newton", "stepwise"].iter().all(|l| bench.status(l)["ticks"].as_u64().is_some_and(|t| t > 0))
    });
    // Observing: no dwell to show.
    assert!(bench.status("stepwise").get("dwell").is_none(), "{}", bench.status("stepwise"));
    bench.seek("newton");
    bench.seek("stepwise");

    // Newton: a curvature estimate per input, and no dwell.
    wait_until("the Newton loop seeks with a curvature estimate", Duration::from_secs(20), || {
        let s = bench.status("newton");
        s["state"] == "seeking" && s["inputs"][0].get("curvature").is_some()
    });
    let newton = bench.status("newton");
    for input in newton["inputs"].as_array().unwrap() {
        let curvature = &input["curvature"];
        assert!(curvature["estimate"].as_f64().is_some_and(f64::is_finite), "{newton}");
        assert!(curvature["trusted"].is_boolean(), "{newton}");
    }
    assert!(newton.get("dwell").is_none(), "{newton}");

    // Stepwise: the dwell, through both its phases, and no curvature.
    for phase in ["settling", "averaging"] {
        wait_until(&format!("the stepwise loop's dwell is {phase}"), Duration::from_secs(20), || {
            bench.status("stepwise").get("dwell").is_some_and(|d| d["phase"] == phase)
        });
    }
    let stepwise = bench.status("stepwise");
    let dwell = &stepwise["dwell"];
    assert!(dwell["phase"] == "settling" || dwell["phase"] == "averaging", "{stepwise}");
    assert!(dwell["input"].is_null() || dwell["input"] == "v", "{stepwise}");
    // At most the 4 s of a dwell to go.
    assert!(dwell["ends_in_s"].as_f64().is_some_and(|s| (0.0..=4.0).contains(&s)), "{stepwise}");
    assert!(stepwise["inputs"][0].get("curvature").is_none(), "{stepwise}");
    // The page draws itself from the status above; its script shows both.
    let page = bench.get("/", &[]).body;
    assert!(page.contains("input.curvature.estimate"), "the page shows the curvature");
    assert!(page.contains("status.dwell.phase"), "the page shows the dwell");

    // Four levels after the reference one: four steps, each judged on its own dwell.
    wait_until("five dwells of the stepwise loop are in history", Duration::from_secs(60), || {
        averaged_levels(&bench.samples("stepwise", None)).len() >= 5
    });
    let samples = bench.samples("stepwise", None);
    for s in &samples {
        // Source: INTERFACE.md "Methods" (stepwise: no sinusoidal dither), so what is
        // written is the estimate itself.
        if s["state"] == "seeking" {
            assert!(s["phase"] == "settling" || s["phase"] == "averaging", "{s}");
            assert_eq!(s["inputs"]["v"]["applied"], s["inputs"]["v"]["estimate"], "{s}");
        } else {
            assert!(s["phase"].is_null() && s.get("phase").is_some(), "a phase only while seeking: {s}");
        }
    }
    let levels = averaged_levels(&samples);
    // Source: INTERFACE.md "Methods" (step, wait, compare): each dwell holds the level one
    // step from the previous one; the bowl's peak at 3 is far from the bounds.
    for pair in levels.windows(2) {
        let moved = (pair[1] - pair[0]).abs();
        assert!((moved - STEP).abs() < 1e-9, "from {} to {}: levels {levels:?}", pair[0], pair[1]);
    }
    assert_eq!(levels[0], 2.0, "the first dwell is the reference level, where the PLC stood: {levels:?}");

    // The CSV of the same rows has the phase right after the state.
    let until = samples.last().unwrap()["at"].as_str().unwrap().to_owned();
    let json = bench.samples("stepwise", Some(&until));
    let csv = bench.samples_csv("stepwise", &until);
    let lines: Vec<&str> = csv.lines().collect();
    assert_eq!(lines[0], "at,objective,state,phase,v.applied,v.estimate,v.gradient");
    assert_eq!(lines.len() - 1, json.len());
    for (line, row) in lines[1..].iter().zip(&json) {
        let cells: Vec<&str> = line.split(',').collect();
        assert_eq!(cells.len(), 7, "{line}");
        assert_eq!(cells[0], row["at"].as_str().unwrap());
        assert_eq!(cells[2], row["state"].as_str().unwrap());
        assert_eq!(cells[3], row["phase"].as_str().unwrap_or(""), "{line} against {row}");
    }

    // The Newton loop's samples keep the sine method's shape: no phase anywhere.
    let newton_samples = bench.samples("newton", None);
    assert!(newton_samples.iter().any(|s| s["state"] == "seeking"), "the Newton loop's seeking is stored");
    for s in &newton_samples {
        assert!(s.get("phase").is_none(), "{s}");
    }
    let until = newton_samples.last().unwrap()["at"].as_str().unwrap().to_owned();
    let csv = bench.samples_csv("newton", &until);
    assert_eq!(csv.lines().next(), Some("at,objective,state,u.applied,u.estimate,u.gradient"));
}
