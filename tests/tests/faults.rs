//! Fault tests: the real binary against a real Modbus peer on loopback, with every fault
//! an operator worries about. Each waits for what it checks with a generous deadline and
//! prints how long it took (`cargo test -- --nocapture` shows it). The reliability run,
//! `RIDGELINE_RELIABILITY_RUN=1` with one test at a time on a quiet machine, also holds
//! those times to their precise bounds; docs/operation.md's reliability table comes from
//! its lines. An ordinary run on a loaded machine cannot fail on timing alone.

use std::time::{Duration, Instant};

use ridgeline::api::token_sha256;
use ridgeline_tests::{
    BadPlc, Peer, bad_plc, f32_words, get_json, http_request, python_peer, read_holding_registers, ridgeline,
    spawn_service, wait_until, write_holding_registers,
};

use crate::rig::Rig;

/// The rig's loop ticks every 50 ms; its watchdog calls the objective stale after 1 s.
const TICK: Duration = Duration::from_millis(50);
const STALE: Duration = Duration::from_secs(1);
/// Polling the API and the register (every 5 ms, one request at a time) adds this much
/// to a measured time, at most, in the reliability run.
const MEASURING: Duration = Duration::from_millis(100);
/// How long any one condition is waited for: generous, for a loaded 2-core machine.
const PATIENCE: Duration = Duration::from_secs(30);
const OPERATOR: &str = "fault-test-operator-token";

fn access() -> String {
    format!(
        "[[access]]\nname = \"night-shift\"\ntoken_sha256 = \"{}\"\nrole = \"operator\"\n",
        token_sha256(OPERATOR)
    )
}

fn state(rig: &Rig) -> String {
    rig.status().map(|s| s["state"].as_str().unwrap_or("").to_owned()).unwrap_or_default()
}

/// Whether this is the reliability run, which holds measured times to precise bounds.
fn reliability_run() -> bool {
    std::env::var_os("RIDGELINE_RELIABILITY_RUN").is_some_and(|v| v == "1")
}

/// Waits until `condition` holds (at most `PATIENCE`); how long that took. Polls every
/// 5 ms in the reliability run, every 25 ms otherwise (each poll is a new connection).
fn time_until(what: &str, mut condition: impl FnMut() -> bool) -> Duration {
    let poll = Duration::from_millis(if reliability_run() { 5 } else { 25 });
    let started = Instant::now();
    while !condition() {
        assert!(started.elapsed() < PATIENCE, "timed out after {PATIENCE:?} waiting until {what}");
        std::thread::sleep(poll);
    }
    started.elapsed()
}

/// Prints a measured time; the reliability run also holds it to `bound` (plus what
/// polling adds).
fn timed(what: &str, took: Duration, bound: Duration) {
    eprintln!("measured: {what} in {took:?} (bound {bound:?})");
    if reliability_run() {
        assert!(took <= bound + MEASURING, "{what}: {took:?}, more than {bound:?}");
    }
}

/// Waits until the loop is in `wanted`; how long that took.
fn time_until_state(rig: &Rig, wanted: &str) -> Duration {
    time_until(&format!("the loop is {wanted}"), || state(rig) == wanted)
}

fn put_mode(rig: &Rig, mode: &str) -> ridgeline_tests::HttpAnswer {
    let bearer = format!("Bearer {OPERATOR}");
    let body = format!("{{\"mode\": \"{mode}\"}}");
    http_request(rig.api(), "PUT", "/api/v1/loops/bowl/mode", &[("Authorization", &bearer)], Some(&body))
        .unwrap()
}

#[test]
fn a_cut_link_trips_to_fallback_and_safe_lands_on_the_first_tick_it_answers_again() {
    let rig = Rig::new("");
    let mut sim = rig.sim();
    let _service = rig.service();
    rig.wait_writing();
    sim.stop();
    let to_fallback = time_until_state(&rig, "fallback");
    // Source: issue requirement, fallback within stale_after_s plus one tick.
    timed("link cut -> fallback", to_fallback, STALE + TICK);
    let status = rig.status().unwrap();
    assert_eq!(status["fallback_reason"], "stale");

    let _sim = rig.sim();
    let to_safe = time_until("safe is in the register", || rig.setpoint() == Some(1.0));
    // Source: issue requirement, the fallback value lands on the first tick the link answers.
    timed("PLC back -> safe setpoint in the register", to_safe, TICK);
    let tripped = rig.event("a trip event", |e| e["kind"] == "tripped");
    assert_eq!(tripped["detail"]["trip"], "stale");
    assert_eq!(tripped["actor"], "system");
}

#[test]
fn an_objective_frozen_outside_its_plausible_range_trips_with_that_reason() {
    // The plant's objective sits between 8 and 10; a plausible range of 0..5 calls it wrong.
    let rig = Rig::new("").edit("stale_after_s = 1", "stale_after_s = 1\nobjective_range = [0.0, 5.0]");
    let _sim = rig.sim();
    let _service = rig.service();
    let took = time_until_state(&rig, "fallback");
    // At once, not after stale_after_s: the reason says which check tripped.
    timed("implausible objective -> fallback, after the API answered", took, TICK);
    let status = rig.status().unwrap();
    assert_eq!(status["fallback_reason"], "out_of_range");
    wait_until("safe is in the register", PATIENCE, || rig.setpoint() == Some(1.0));
}

#[test]
fn a_nan_objective_trips_and_no_nan_is_ever_written() {
    // y / (y - y) is 0/0: NaN at every tick.
    let rig = Rig::seeking("", "y / (y - y)");
    let _sim = rig.sim();
    let _service = rig.service();
    let took = time_until_state(&rig, "fallback");
    timed("NaN objective -> fallback, after the API answered", took, TICK);
    assert_eq!(rig.status().unwrap()["fallback_reason"], "not_finite");
    for _ in 0..20 {
        let v = rig.setpoint().expect("register readable");
        assert!(v.is_finite() && (v == 2.0 || v == 1.0), "the register held {v}");
        std::thread::sleep(TICK);
    }
    assert_eq!(rig.setpoint(), Some(1.0));
}

#[test]
fn without_the_plcs_permit_nothing_is_written_and_its_return_restarts_bumpless() {
    let rig = Rig::with_permit();
    let _sim = rig.sim();
    // The operator at the HMI withholds permission before the service starts.
    assert!(write_holding_registers(rig.plant_port(), 300, &f32_words(0.0)));
    let _service = rig.service();
    wait_until("no_permit", PATIENCE, || state(&rig) == "no_permit");
    let untouched = read_holding_registers(rig.plant_port(), 200, 2).unwrap();
    for _ in 0..40 {
        std::thread::sleep(TICK);
        assert_eq!(
            read_holding_registers(rig.plant_port(), 200, 2).unwrap(),
            untouched,
            "a write without permission"
        );
    }
    assert_eq!(rig.status().unwrap()["permitted"], false);
    // Meanwhile the operator moves the setpoint by hand at the HMI.
    assert!(write_holding_registers(rig.plant_port(), 200, &f32_words(2.7)));
    // Permission back: the loop restarts from what the PLC holds now, then seeks.
    assert!(write_holding_registers(rig.plant_port(), 300, &f32_words(1.0)));
    let took = time_until("the loop writes again", || rig.setpoint().is_some_and(|v| (v - 2.7).abs() > 1e-6));
    eprintln!("measured: permit back -> writing in {took:?}");
    let first = rig.setpoint().unwrap();
    // The dither (0.1) and one tick at the rate limit (0.1) away from the operator's 2.7,
    // far from the 2.0 where the loop's own estimate stood.
    assert!((first - 2.7).abs() <= 0.21, "bumpless: started next to the operator's 2.7, wrote {first}");
    assert_eq!(state(&rig), "seeking");
    rig.event("permit_granted", |e| e["kind"] == "permit_granted");
}

#[test]
fn manual_recovery_is_refused_with_409_while_the_fault_persists_and_accepted_after() {
    let rig = Rig::new("").with_service("", &access());
    let mut sim = rig.sim();
    let _service = rig.service();
    rig.wait_writing();
    sim.stop();
    time_until_state(&rig, "fallback");
    let refused = put_mode(&rig, "seeking");
    assert_eq!(refused.status, 409, "{}", refused.body);
    assert_eq!(refused.json()["error"]["code"], "conflict");
    assert!(refused.body.contains("have not been read"), "the refusal names the condition: {}", refused.body);
    assert_eq!(state(&rig), "fallback");

    let _sim = rig.sim();
    wait_until("reads are good again", PATIENCE, || {
        rig.status().and_then(|s| s["objective"].as_f64()).is_some_and(|j| j > 0.0)
            && put_mode(&rig, "seeking").status == 200
    });
    assert_eq!(state(&rig), "seeking");
    let recovered = rig.event("a recovery event", |e| e["kind"] == "recovered");
    assert_eq!(recovered["actor"], "night-shift");
}

#[test]
fn automatic_recovery_returns_to_seeking_after_the_healthy_interval() {
    let rig =
        Rig::new("").edit("stale_after_s = 1", "stale_after_s = 1\nrecover = \"auto\"\nrecover_after_s = 1");
    let mut sim = rig.sim();
    let _service = rig.service();
    rig.wait_writing();
    sim.stop();
    time_until_state(&rig, "fallback");
    let _sim = rig.sim();
    let took = time_until_state(&rig, "seeking");
    eprintln!("measured: PLC back -> seeking again (recover_after_s 1 s) in {took:?}");
    assert!(took >= Duration::from_millis(900), "not before the healthy interval: {took:?}");
    rig.event("an automatic recovery", |e| e["kind"] == "recovered" && e["actor"] == "system");
}

#[test]
fn the_heartbeat_increments_every_tick_and_wraps_after_65535() {
    // A pymodbus server plays the PLC and logs every write it decodes, so no count goes
    // unseen however busy the machine is. The PLC's heartbeat word stands at 65533: the
    // service goes on from there.
    let layout = serde_json::json!({"unit": 1, "values": [
        {"table": "input", "address": 100, "kind": "f32", "order": "big", "raw": 8.0, "scale": 1.0, "offset": 0.0, "busy": false},
        {"table": "holding", "address": 200, "kind": "f32", "order": "big", "raw": 2.0, "scale": 1.0, "offset": 0.0, "busy": false},
        {"table": "holding", "address": 400, "kind": "u16", "order": "big", "raw": 65533, "scale": 1.0, "offset": 0.0, "busy": false},
    ]});
    let mut command = python_peer("modbus_server.py");
    command.arg(layout.to_string());
    let (plc, ready) =
        Peer::start("pymodbus server (tests/peers/modbus_server.py)", command, PATIENCE, |l| {
            l.starts_with(r#"{"ready""#)
        });
    let port = serde_json::from_str::<serde_json::Value>(&ready).unwrap()["port"].as_u64().unwrap() as u16;
    let rig = Rig::new("")
        .edit(
            "[[loops.inputs]]",
            "[loops.heartbeat]\nlink = \"plc\"\nholding_register = 400\n\n[[loops.inputs]]",
        )
        .with_plant_port(port);
    let _service = rig.service();
    let mut beats = Vec::new();
    let deadline = Instant::now() + PATIENCE;
    while beats.len() < 4 {
        assert!(Instant::now() < deadline, "four heartbeats not written within {PATIENCE:?}: {beats:?}");
        let Some(line) = plc.next_line(Duration::from_secs(1)) else { continue };
        let record: serde_json::Value = serde_json::from_str(&line).unwrap();
        if record["event"] == "write" && record["address"] == 400 {
            // Source: reference library pymodbus 3.16.1, decoding the register written.
            beats.push(record["decoded"]["400"].as_f64().unwrap() as u32);
        }
    }
    // Source: issue requirement, a u16 counter that counts on from the register's value,
    // one step per tick, and wraps at 65535 -> 0.
    assert_eq!(&beats[..4], &[65534, 65535, 0, 1], "{beats:?}");
}

#[test]
fn after_kill_9_a_restart_resumes_from_the_stored_estimate() {
    let rig = Rig::new("");
    let _sim = rig.sim();
    let mut service = rig.service();
    wait_until("the estimate moved well away from the start", Duration::from_secs(30), || {
        rig.estimate().is_some_and(|e| e > 2.4)
    });
    // History is written in batches: wait until an estimate that far is stored.
    wait_until("an estimate above 2.4 is in history", PATIENCE, || {
        let since = ridgeline::history::rfc3339(ridgeline::history::now_ms() - 10_000);
        get_json(rig.api(), &format!("/api/v1/loops/bowl/samples?since={since}&limit=10000"))
            .and_then(|s| s.as_array().cloned())
            .is_some_and(|s| {
                s.iter().any(|row| row["inputs"]["u"]["estimate"].as_f64().is_some_and(|e| e > 2.4))
            })
    });
    // The first run's loop_started event is in the same database: only a later one counts.
    let first_run = rig.events().iter().filter_map(|e| e["id"].as_i64()).max().unwrap_or(0);
    service.stop();
    let restarting = Instant::now();
    let _service = rig.service();
    let restarted = || {
        rig.events().into_iter().find(|e| e["kind"] == "loop_started" && e["id"].as_i64() > Some(first_run))
    };
    wait_until("the restarted loop started", PATIENCE, || restarted().is_some());
    eprintln!("measured: kill -9, restart -> resumed from the stored estimate in {:?}", restarting.elapsed());
    let started = restarted().unwrap();
    let u = &started["detail"]["inputs"]["u"];
    assert_eq!(u["from"], "stored", "{started}");
    let stored = u["stored"].as_f64().unwrap();
    assert!(stored > 2.4, "{started}");
    assert_eq!(u["estimate"].as_f64().unwrap(), stored);
    // The read-back (estimate plus dither) differs from the stored estimate: the choice is visible.
    assert!(u["read_back"].as_f64().is_some());
}

/// A loop whose PLC misbehaves from the start never gets a starting point, yet its
/// watchdog trips it like a running loop, it keeps ticking, and the service stops cleanly.
fn trips_before_it_could_start(behaviour: BadPlc, label: &str) {
    let rig = Rig::new("").with_plant_port(bad_plc(behaviour, None));
    let service = rig.service();
    let took = time_until_state(&rig, "fallback");
    timed(&format!("PLC {label} from the start -> fallback, after the API answered"), took, STALE * 5);
    let status = rig.status().unwrap();
    assert_eq!(status["fallback_reason"], "stale", "{status}");
    assert_eq!(status["inputs"][0]["estimate"], serde_json::Value::Null, "never started: {status}");
    assert_eq!(status["inputs"][0]["applied"], 1.0, "safe is what it tries to write: {status}");
    rig.event("a stale trip", |e| e["kind"] == "tripped" && e["detail"]["trip"] == "stale");
    let before = status["ticks"].as_u64().unwrap();
    wait_until("the loop keeps ticking", PATIENCE, || rig.ticks() > before);
    let stopping = Instant::now();
    assert_eq!(service.terminate(), Some(0), "it stops cleanly");
    assert!(stopping.elapsed() < PATIENCE, "stopped in {:?}", stopping.elapsed());
}

#[test]
fn a_loop_against_a_plc_answering_busy_from_the_start_trips_and_no_task_gets_stuck() {
    trips_before_it_could_start(BadPlc::Busy, "answering busy (0x06)");
}

#[test]
fn a_loop_against_a_plc_answering_after_twice_the_timeout_from_the_start_trips_and_stops_cleanly() {
    trips_before_it_could_start(
        BadPlc::Late(Duration::from_millis(600)),
        "answering after twice the timeout",
    );
}

#[test]
fn a_cut_link_on_a_permitted_loop_pages_as_a_fallback_and_safe_lands_once_the_plc_permits_again() {
    let rig = Rig::with_permit();
    let mut sim = rig.sim();
    let _service = rig.service();
    rig.wait_writing();
    sim.stop();
    // The permit is on the cut link too. It cannot be read, which is a fault of the link,
    // not the PLC saying no: the loop must never show no_permit on the way to fallback.
    let mut seen = Vec::new();
    wait_until("the loop is in fallback", PATIENCE, || {
        let now = state(&rig);
        if seen.last() != Some(&now) {
            seen.push(now.clone());
        }
        now == "fallback"
    });
    assert!(!seen.iter().any(|s| s == "no_permit"), "states seen: {seen:?}");
    let status = rig.status().unwrap();
    assert_eq!(status["fallback_reason"], "stale");
    assert_eq!(status["permitted"], false, "no permit stands while it cannot be read");
    // The series the fallback alert (deploy/alerts.yml) pages on.
    let mut metrics = String::new();
    wait_until("the fallback series is 1", PATIENCE, || {
        metrics = ridgeline_tests::http_get(rig.api(), "/metrics").map(|m| m.1).unwrap_or_default();
        metrics.contains("ridgeline_loop_state{loop=\"bowl\",state=\"fallback\"} 1")
    });
    assert!(metrics.contains("ridgeline_loop_state{loop=\"bowl\",state=\"no_permit\"} 0"), "{metrics}");
    let trip = rig.event("a stale trip", |e| e["kind"] == "tripped" && e["detail"]["trip"] == "stale");
    assert_eq!(trip["detail"]["to"], "fallback");
    // The PLC comes back and permits (the plant's permit starts at 1): safe lands.
    let _sim = rig.sim();
    wait_until("safe is in the register", PATIENCE, || rig.setpoint() == Some(1.0));
    assert_eq!(state(&rig), "fallback");
}

/// A running loop whose PLC starts misbehaving on the same port trips on the stale
/// objective within stale_after_s plus a tick (plus the timeout of a request in flight).
fn trips_when_the_plc_turns(behaviour: BadPlc, label: &str, slack: Duration) {
    let rig = Rig::new("");
    let mut sim = rig.sim();
    let _service = rig.service();
    rig.wait_writing();
    sim.stop();
    bad_plc(behaviour, Some(rig.plant_port()));
    let took = time_until_state(&rig, "fallback");
    timed(&format!("PLC {label} -> fallback"), took, STALE + TICK + slack);
    assert_eq!(rig.status().unwrap()["fallback_reason"], "stale");
    // And it keeps ticking: no task is stuck on the misbehaving PLC.
    let before = rig.status().unwrap()["ticks"].as_u64().unwrap();
    wait_until("the loop keeps ticking", PATIENCE, || rig.ticks() > before);
}

#[test]
fn a_running_loop_trips_when_the_plc_starts_answering_busy() {
    trips_when_the_plc_turns(BadPlc::Busy, "answering busy (0x06)", Duration::ZERO);
}

#[test]
fn a_running_loop_trips_when_the_plc_answers_after_twice_the_timeout() {
    // The rig's link times out after 300 ms; the PLC answers after 600 ms.
    trips_when_the_plc_turns(
        BadPlc::Late(Duration::from_millis(600)),
        "answering after twice the timeout",
        Duration::from_millis(600),
    );
}

#[test]
fn a_second_service_on_the_same_history_refuses_to_start_and_names_the_first() {
    let rig = Rig::new("");
    let _sim = rig.sim();
    let first = rig.service();
    rig.wait_writing();
    rig.event("the first start", |e| e["kind"] == "loop_started");
    let second = ridgeline(&["run", "--config", rig.config.to_str().unwrap()]);
    // Source: issue requirement: exit 1, and a sentence naming the running one (process
    // id and API address).
    assert_eq!(second.code, Some(1), "{}", second.stderr);
    assert!(second.stderr.contains(&format!("process {}", first.id())), "{}", second.stderr);
    assert!(second.stderr.contains(&format!("API at {}", rig.api())), "{}", second.stderr);
    // The second never started a loop: one start in history, and the first runs on.
    let starts = rig.events().iter().filter(|e| e["kind"] == "loop_started").count();
    assert_eq!(starts, 1);
    let ticks = rig.ticks();
    wait_until("the first service ticks on", PATIENCE, || rig.ticks() > ticks);
}

#[test]
fn two_services_with_their_own_histories_on_one_plc_see_a_link_conflict_on_the_heartbeat() {
    let heartbeat = "[loops.heartbeat]\nlink = \"plc\"\nholding_register = 400\n\n[[loops.inputs]]";
    let rig = Rig::new("").edit("[[loops.inputs]]", heartbeat);
    let _sim = rig.sim();
    let _first = rig.service();
    rig.wait_writing();
    // The same loop in a config of its own, with a history of its own: no lock can see it.
    let text = std::fs::read_to_string(&rig.config).unwrap();
    let other_db = rig.dir.path().join("other").join("ridgeline.db");
    let text = text.replace(&rig.database().display().to_string(), &other_db.display().to_string());
    let other_config = ridgeline_tests::write_file(rig.dir.path(), "other.toml", &text);
    let (_second, second_api) = spawn_service(&other_config);
    let conflicts = |api| {
        get_json(api, "/api/v1/events?limit=1000")
            .and_then(|e| e.as_array().cloned())
            .unwrap_or_default()
            .into_iter()
            .filter(|e| e["kind"] == "link_conflict")
            .collect::<Vec<_>>()
    };
    let mut found = Vec::new();
    wait_until("a link_conflict event", Duration::from_secs(20), || {
        found = [rig.api(), second_api].into_iter().flat_map(conflicts).collect();
        !found.is_empty()
    });
    let detail = &found[0]["detail"];
    assert_eq!(detail["holding_register"], 400, "{detail}");
    assert_ne!(detail["expected"], detail["found"], "{detail}");
}
