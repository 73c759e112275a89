//! Constraints in the live service over Modbus/TCP: a back-off constraint against the
//! project's pymodbus peer (`tests/peers/plant_server.py`) playing a PLC in front of a
//! plant whose unconstrained optimum lies past the limit, so the loop keeps running into
//! it. What the service reports (events, status, metrics, samples) is checked against
//! what the peer saw on the wire: the constraint values it sent and the setpoints written.

use std::net::SocketAddr;
use std::time::Duration;

use ridgeline_tests::{
    HttpAnswer, Peer, get_json, http_request, python_peer, spawn_service, wait_until, write_file,
};
use serde_json::Value;

/// The peer's plant: `J = 10 - 2 (x - 5)^2` (no noise) behind a 0.1 s dead time and a
/// 0.2 s lag, and the constraint output `C = 10 x`, starting at rest at u = x = 3.5 (C = 35).
/// The unconstrained optimum x = 5 has C = 50; the constrained one, C = 40, is x = 4.
const PLANT: &str = r#"{"unit": 1, "setpoint_register": 0, "objective_register": 0, "permit_register": 10,
    "initial": 3.5, "permit": 1, "lag_s": 0.2, "dead_time_s": 0.1, "curvature": 4.0, "optimum": 5.0,
    "peak": 10.0, "noise_std": 0.0, "seed": 7,
    "constraint_register": 2, "constraint": {"slope": 10.0, "offset": 0.0}}"#;
const SETPOINT_REGISTER: u64 = 0;
/// The constraint `c = c_meter <= 40`, backed off by walking u down until 2 inside.
const LIMIT: f64 = 40.0;
const MARGIN: f64 = 2.0;
/// The loop's tick, u's rate limit and its dither period (one cycle of the sine method:
/// how long the value must stay margin inside before the constraint is released).
const TICK_S: f64 = 0.1;
const MAX_RATE_PER_S: f64 = 0.5;
const DITHER_PERIOD_S: f64 = 2.0;

/// A sine loop maximizing `j` on u, seeking from the start, with the back-off
/// constraint on the peer's constraint output.
fn config(plant_port: u16, database: &str) -> String {
    format!(
        r#"
[service]
listen = "127.0.0.1:0"
database = "{database}"
open_reads = true

[links.plc]
modbus_tcp = "127.0.0.1:{plant_port}"
timeout_ms = 300

[tags.j]
link = "plc"
input_register = 0
type = "f32"

[tags.c_meter]
link = "plc"
input_register = 2
type = "f32"

[[loops]]
name = "capped"
objective = "j"
direction = "maximize"
tick_s = {TICK_S}
start_mode = "seeking"

[loops.filter]
highpass_hz = 0.1
phase_deg = 50

[loops.watchdog]
stale_after_s = 2

[[loops.inputs]]
name = "u"
write = {{ link = "plc", holding_register = {SETPOINT_REGISTER}, type = "f32" }}
limits = [0.0, 8.0]
bounds = [1.0, 7.0]
safe = 3.0
max_rate_per_s = {MAX_RATE_PER_S}
dither_amplitude = 0.1
dither_period_s = {DITHER_PERIOD_S}
gain = 0.08

[[loops.constraints]]
name = "c"
value = "c_meter"
max = {LIMIT}
handling = "back_off"
move = {{ u = "down" }}
margin = {MARGIN}
"#
    )
}

/// The peer and the service, torn down together, with everything the peer has printed.
struct Bench {
    plant: Peer,
    _service: Peer,
    api: SocketAddr,
    /// The peer's JSON lines so far, in the order it printed them.
    log: Vec<Value>,
    _dir: tempfile::TempDir,
}

impl Bench {
    fn start() -> Bench {
        let mut command = python_peer("plant_server.py");
        command.arg(PLANT);
        let (plant, ready) =
            Peer::start("plant_server.py", command, Duration::from_secs(30), |l| l.contains("\"ready\""));
        let ready: Value = serde_json::from_str(&ready).expect("a JSON ready line");
        let plant_port = ready["port"].as_u64().expect("a port") as u16;
        let dir = tempfile::tempdir().unwrap();
        let database = dir.path().join("history.db");
        let path =
            write_file(dir.path(), "ridgeline.toml", &config(plant_port, &database.display().to_string()));
        let (service, api) = spawn_service(&path);
        Bench { plant, _service: service, api, log: Vec::new(), _dir: dir }
    }

    /// Waits until the peer's log reaches past wall time `after_ms` (Unix ms): the loop
    /// reads every tick, so then it holds every read and write before that time.
    fn catch_up(&mut self, after_ms: f64) {
        wait_until("the peer's log reaches the present", Duration::from_secs(30), || {
            self.drain();
            self.log.iter().rev().any(|l| l["wall_ms"].as_f64().is_some_and(|w| w > after_ms))
        });
    }

    /// Takes in what the peer printed since last asked.
    fn drain(&mut self) {
        while let Some(line) = self.plant.next_line(Duration::ZERO) {
            self.log.push(
                serde_json::from_str(&line).unwrap_or_else(|e| panic!("peer line not JSON ({e}): {line}")),
            );
        }
    }

    fn get(&self, path: &str) -> HttpAnswer {
        let answer = http_request(self.api, "GET", path, &[], None).expect("the API answers");
        assert_eq!(answer.status, 200, "GET {path}: {}", answer.body);
        answer
    }

    fn status(&self) -> Value {
        get_json(self.api, "/api/v1/loops/capped").unwrap_or_default()
    }

    /// The loop's constraint events, oldest first.
    fn constraint_events(&self) -> Vec<Value> {
        let all = get_json(self.api, "/api/v1/events?loop=capped&limit=1000").unwrap_or_default();
        let mut events: Vec<Value> = all
            .as_array()
            .map(|a| {
                a.iter()
                    .filter(|e| e["kind"] == "constraint_engaged" || e["kind"] == "constraint_released")
                    .cloned()
                    .collect()
            })
            .unwrap_or_default();
        events.sort_by_key(|e| e["id"].as_i64());
        events
    }
}

/// The wall clock in Unix milliseconds.
fn now_ms() -> f64 {
    let since = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).expect("after 1970");
    since.as_secs_f64() * 1000.0
}

fn num(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("a number, not {v}"))
}

/// Unix milliseconds of an RFC 3339 UTC time with milliseconds, as the service stamps its
/// events (`2026-12-01T21:40:00.123Z`). Parsed here rather than with the service's own
/// parser. Days from the civil date: H. Hinnant, "chrono-Compatible Low-Level Date
/// Algorithms", days_from_civil.
fn unix_ms(at: &str) -> f64 {
    let fields: Vec<&str> = at.split(['-', 'T', ':', '.', 'Z']).collect();
    let n: Vec<i64> = fields[..fields.len().min(7)].iter().filter_map(|f| f.parse().ok()).collect();
    assert!(
        at.ends_with('Z') && fields.len() == 8 && n.len() == 7 && fields[6].len() == 3,
        "not an RFC 3339 UTC time with milliseconds: {at}"
    );
    let (y, m, d) = (if n[1] <= 2 { n[0] - 1 } else { n[0] }, n[1], n[2]);
    let era = y.div_euclid(400);
    let yoe = y - era * 400;
    let doy = (153 * (if m > 2 { m - 3 } else { m + 9 }) + 2) / 5 + d - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    let days = era * 146_097 + doe - 719_468;
    (((days * 24 + n[3]) * 60 + n[4]) * 60 + n[5]) as f64 * 1000.0 + n[6] as f64
}

/// Whether the peer's line is a read that sent the constraint.
fn is_read(line: &Value) -> bool {
    line["event"] == "read" && line["constraint"].is_number()
}

/// The index in the peer's log of the read in whose tick `event` (engaged or released)
/// happened: the last read before the event's time that sent exactly the value the event
/// names. The service stamps the event after that tick's write and before the next
/// tick's read, in milliseconds truncated.
fn read_for(log: &[Value], event: &Value) -> usize {
    let at_ms = unix_ms(event["at"].as_str().expect("an `at`"));
    let value = num(&event["detail"]["value"]);
    let i = log
        .iter()
        .rposition(|l| is_read(l) && num(&l["constraint"]) == value && num(&l["wall_ms"]) <= at_ms + 1.0)
        .unwrap_or_else(|| panic!("the peer never sent the constraint value {value} before {event}"));
    if let Some(next) = log[i + 1..].iter().find(|l| is_read(l)) {
        let next_ms = num(&next["wall_ms"]);
        assert!(
            at_ms <= next_ms,
            "{event} is stamped after the next tick's read {next}, not in its own tick"
        );
    }
    i
}

/// Whether the peer's line is a write of the setpoint.
fn is_setpoint_write(line: &Value) -> bool {
    line["event"] == "write" && line["address"] == SETPOINT_REGISTER
}

/// The allowance for f32 rounding between two setpoints of about `a` and `b`.
fn f32_rounding(a: f64, b: f64) -> f64 {
    f64::from(f32::EPSILON) * a.abs().max(b.abs())
}

#[test]
fn a_back_off_constraint_engages_and_releases_as_events_and_never_writes_against_its_move() {
    let mut bench = Bench::start();

    // Source: the issue ("exist from the first scrape"): both series, before any wait.
    let metrics = bench.get("/metrics").body;
    for name in ["ridgeline_constraint_value", "ridgeline_constraint_engaged"] {
        assert!(
            metrics.lines().any(|l| l.starts_with(&format!("{name}{{"))
                && l.contains(r#"loop="capped""#)
                && l.contains(r#"constraint="c""#)),
            "no {name} series for loop capped, constraint c, at the first scrape:\n{metrics}"
        );
    }

    // The plant's optimum is past the limit: the loop climbs into it, backs off, holds,
    // is released, climbs into it again. Two whole engagements, each with its release.
    let mut events = Vec::new();
    wait_until("two engagements and two releases of the constraint", Duration::from_secs(180), || {
        bench.drain();
        events = bench.constraint_events();
        events.iter().filter(|e| e["kind"] == "constraint_released").count() >= 2
    });
    // The peer's log up to past the last event: every read and write before it is in.
    let last_ms = events.iter().map(|e| unix_ms(e["at"].as_str().expect("an `at`"))).fold(0.0, f64::max);
    bench.catch_up(last_ms + 1.0);
    let log = bench.log.clone();

    // Source: the issue (detail {constraint, value, limit, side, handling}); engaged and
    // released alternate, starting engaged.
    for (k, e) in events.iter().enumerate() {
        let kind = if k % 2 == 0 { "constraint_engaged" } else { "constraint_released" };
        assert_eq!(e["kind"], kind, "events out of turn: {events:#?}");
        let d = &e["detail"];
        assert_eq!(d["constraint"], "c", "{e}");
        assert_eq!(d["side"], "max", "{e}");
        assert_eq!(d["handling"], "back_off", "{e}");
        assert_eq!(num(&d["limit"]), LIMIT, "{e}");
        let value = num(&d["value"]);
        if kind == "constraint_engaged" {
            assert!(value > LIMIT, "engaged at a value not past the limit: {e}");
        } else {
            assert!(value <= LIMIT - MARGIN, "released at a value not margin inside: {e}");
        }
    }

    for pair in events.chunks_exact(2) {
        let (engaged, released) = (&pair[0], &pair[1]);
        // Outside evidence of each change: the peer's read that sent exactly the value the
        // event names, the last one before the event's time; the event is stamped in that
        // read's tick, so before the next read.
        let (start, end) = (read_for(&log, engaged), read_for(&log, released));
        assert!(start < end, "released before engaged in the peer's log: {engaged} {released}");

        // The setpoint last written before the engaging read is the reference (the walk
        // starts from it); every setpoint written from the engaging tick up to the
        // releasing tick's read is written while engaged. (The releasing tick's own
        // write, stamped before the released event, already seeks again.) Each is written
        // after its tick's read, and follows from what that read sent.
        let reference = log[..start]
            .iter()
            .rfind(|l| is_setpoint_write(l))
            .unwrap_or_else(|| panic!("no setpoint written before the engagement {engaged}"));
        let step = MAX_RATE_PER_S * TICK_S;
        let mut before = num(&reference["value"]);
        let mut walked = 0;
        for (i, write) in
            log.iter().enumerate().take(end).skip(start + 1).filter(|(_, l)| is_setpoint_write(l))
        {
            let after = num(&write["value"]);
            let read = log[..i].iter().rfind(|l| is_read(l)).expect("the engaging read at least");
            let seen = num(&read["constraint"]);
            let rounding = f32_rounding(before, after);
            // Source: the issue and docs/constraints.md (move = { u = "down" }: no write
            // moves u up while engaged).
            assert!(
                after <= before + rounding,
                "{write} moved u up from {before} against `down` while the constraint was engaged \
                 ({engaged}), after reading {read}"
            );
            // Source: docs/constraints.md "back_off": past the limit, one rate-limit step
            // down from the setpoint last written, without dither; `margin` inside, held;
            // inside but short of `margin`, held for up to a cycle, then walked on.
            let walk = (before - after - step).abs() <= 2.0 * rounding;
            let hold = after == before;
            if seen > LIMIT {
                assert!(
                    walk,
                    "{write} after {before}: not one rate-limit step ({step}) down, after reading {read}"
                );
            } else if seen <= LIMIT - MARGIN {
                assert!(hold, "{write}: u moved from {before} while margin inside, after reading {read}");
            } else {
                assert!(
                    walk || hold,
                    "{write} after {before}: neither held nor walked, after reading {read}"
                );
            }
            walked += usize::from(walk);
            before = after;
        }
        assert!(walked > 0, "the back-off never walked u between {engaged} and {released}");

        // Source: the issue (released only once the value has stayed margin inside for one
        // dither period). The last stretch of reads margin inside before the release:
        let first_inside = log[start..end]
            .iter()
            .rposition(|l| is_read(l) && num(&l["constraint"]) > LIMIT - MARGIN)
            .and_then(|k| log[start + k + 1..=end].iter().find(|l| is_read(l)))
            .expect("the engaging read is past the limit, the releasing one margin inside");
        let held_s = num(&log[end]["t"]) - num(&first_inside["t"]);
        // The service times its ticks, the peer its reads: allow a quarter period between.
        assert!(
            held_s >= 0.75 * DITHER_PERIOD_S,
            "released {held_s} s after the value came margin inside, before one dither period \
             ({DITHER_PERIOD_S} s): {released}"
        );
    }

    // Source: the issue (status `constraints: [{name, value, limit, side, handling,
    // engaged}]`, samples with a `<constraint>.value` column after the inputs and a
    // `constraints` object). Fetched before the peer's log catches up with the present,
    // so every value they show is one the peer has sent.
    let status = bench.status();
    let latest = bench.get("/api/v1/loops/capped/samples?limit=10000").json();
    let until = latest.as_array().and_then(|a| a.last()).expect("samples are kept")["at"]
        .as_str()
        .expect("an `at`")
        .to_owned();
    // Samples before `until`, as JSON and as CSV: the same rows.
    let samples = bench.get(&format!("/api/v1/loops/capped/samples?limit=10000&until={until}")).json();
    let samples = samples.as_array().expect("a list of samples").clone();
    let csv = bench.get(&format!("/api/v1/loops/capped/samples?format=csv&limit=10000&until={until}")).body;
    bench.catch_up(now_ms());
    let sent = |value: f64| bench.log.iter().any(|l| l["constraint"].as_f64() == Some(value));

    let constraints =
        status["constraints"].as_array().unwrap_or_else(|| panic!("no constraints: {status:#}"));
    assert_eq!(constraints.len(), 1, "{status:#}");
    let c = &constraints[0];
    assert_eq!(c["name"], "c", "{status:#}");
    assert_eq!(num(&c["limit"]), LIMIT, "{status:#}");
    assert_eq!(c["side"], "max", "{status:#}");
    assert_eq!(c["handling"], "back_off", "{status:#}");
    assert!(c["engaged"].is_boolean(), "{status:#}");
    assert!(sent(num(&c["value"])), "the status shows a value the peer never sent: {status:#}");

    let mut lines = csv.lines();
    assert_eq!(lines.next(), Some("at,objective,state,u.applied,u.estimate,u.gradient,c.value"), "{csv}");
    let rows: Vec<&str> = lines.collect();
    assert!(rows.len() > 10, "{csv}");
    for row in &rows {
        let cells: Vec<&str> = row.split(',').collect();
        assert_eq!(cells.len(), 7, "{row}");
        let value: f64 = cells[6].parse().unwrap_or_else(|_| panic!("c.value is not a number: {row}"));
        assert!(sent(value), "c.value {value} was never sent: {row}");
    }
    assert_eq!(rows.len(), samples.len(), "the same samples as CSV and as JSON");
    for s in &samples {
        assert!(s["constraints"]["c"].as_f64().is_some_and(sent), "{s}");
    }
}
