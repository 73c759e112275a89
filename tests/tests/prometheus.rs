//! A real Prometheus (Debian package `prometheus`) scraping a running Ridgeline on
//! loopback: every expression of `deploy/dashboard.json` and `deploy/alerts.yml`
//! evaluates through its HTTP API without error, the dashboard's return series, and the
//! alert rules load and evaluate cleanly.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use ridgeline_tests::{
    Peer, free_port, http_get, http_request, spawn_service, spawn_sim, wait_until, write_file,
};
use serde_json::Value;

/// A static bowl with its peak at u = 3, u starting at 2, and a second output for the
/// constraint.
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
[[outputs]]
name = "c_meter"
input_register = 102
expression = "10 * u"
"#;

/// One seeking loop with one input and one back-off constraint, so that every series
/// the dashboard draws exists.
fn config(plant_port: u16, database: &str) -> String {
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

[tags.c_meter]
link = "plc"
input_register = 102
type = "f32"

[[loops]]
name = "bowl"
objective = "y"
direction = "maximize"
tick_s = 0.05
start_mode = "seeking"

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

[[loops.constraints]]
name = "c"
value = "c_meter"
max = 50.0
handling = "back_off"
move = {{ u = "down" }}
margin = 2.0
"#
    )
}

fn deploy(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..").join("deploy").join(name)
}

fn dashboard() -> Value {
    let path = deploy("dashboard.json");
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{} is not JSON: {e}", path.display()))
}

/// Every panel of the dashboard, rows' nested panels included.
fn panels(dashboard: &Value) -> Vec<&Value> {
    fn walk<'a>(list: &'a Value, out: &mut Vec<&'a Value>) {
        for p in list.as_array().into_iter().flatten() {
            out.push(p);
            walk(&p["panels"], out);
        }
    }
    let mut out = Vec::new();
    walk(&dashboard["panels"], &mut out);
    out
}

/// `(where, expr)` of every panel target of the dashboard.
fn dashboard_exprs(dashboard: &Value) -> Vec<(String, String)> {
    let mut out = Vec::new();
    for p in panels(dashboard) {
        for t in p["targets"].as_array().into_iter().flatten() {
            if let Some(expr) = t["expr"].as_str() {
                let at = format!("panel {:?} target {}", p["title"].as_str().unwrap_or("?"), t["refId"]);
                out.push((at, expr.to_owned()));
            }
        }
    }
    out
}

/// What Grafana would put in place of the dashboard's variables: every instance and
/// every loop (the variables' "All", whose `allValue` is `.*`), and one minute for the
/// interval variables (60 scrapes at the 1 s interval below).
fn substitute(expr: &str) -> String {
    let value = |name: &str| -> &str {
        match name {
            "instance" | "loop" => ".*",
            "__rate_interval" | "__interval" | "__range" => "1m",
            "__range_s" => "60",
            "__interval_ms" | "__range_ms" => "60000",
            other => panic!("the dashboard uses a variable the test does not know: ${other} in {expr}"),
        }
    };
    let mut out = String::new();
    let mut rest = expr;
    while let Some(at) = rest.find('$') {
        out.push_str(&rest[..at]);
        let after = &rest[at + 1..];
        let (name, len) = if let Some(braced) = after.strip_prefix('{') {
            let end = braced.find('}').unwrap_or_else(|| panic!("unclosed ${{ in {expr}"));
            // `${var:format}`: the format does not change a regex "All".
            (braced[..end].split(':').next().unwrap_or(""), end + 2)
        } else {
            let end = after.find(|c: char| !(c.is_ascii_alphanumeric() || c == '_')).unwrap_or(after.len());
            (&after[..end], end)
        };
        assert!(!name.is_empty(), "a lone `$` in {expr}");
        out.push_str(value(name));
        rest = &after[len..];
    }
    out.push_str(rest);
    assert!(!out.contains("[["), "old-style [[variable]] in {expr}");
    out
}

/// Percent-encodes a query parameter (RFC 3986 unreserved characters kept).
fn encode(text: &str) -> String {
    text.bytes()
        .map(|b| match b {
            b'A'..=b'Z' | b'a'..=b'z' | b'0'..=b'9' | b'-' | b'_' | b'.' | b'~' => (b as char).to_string(),
            _ => format!("%{b:02X}"),
        })
        .collect()
}

/// GETs a Prometheus API path; its JSON answer, errors included (they carry
/// `status: "error"` and the reason).
fn api(prometheus: SocketAddr, path: &str) -> Value {
    let answer = http_request(prometheus, "GET", path, &[], None)
        .unwrap_or_else(|| panic!("Prometheus does not answer {path}"));
    serde_json::from_str(&answer.body).unwrap_or_else(|e| {
        panic!("Prometheus answered {path} with {} and no JSON ({e}): {}", answer.status, answer.body)
    })
}

/// `prometheus` on PATH (Debian's package `prometheus`); the test fails without it.
fn prometheus_bin() -> PathBuf {
    ridgeline_tests::debian_tool("prometheus", &["prometheus"])
}

/// Starts Prometheus on a free loopback port with `config`, its storage in `dir`, and
/// waits until it is ready; picks another port if the one chosen was taken meanwhile.
fn start_prometheus(bin: &Path, dir: &Path, config: &Path) -> (Peer, SocketAddr) {
    for attempt in 1..=5 {
        let addr = SocketAddr::from(([127, 0, 0, 1], free_port()));
        let storage = dir.join(format!("tsdb-{attempt}"));
        let mut command = Command::new(bin);
        command.arg(format!("--config.file={}", config.display()));
        command.arg(format!("--storage.tsdb.path={}", storage.display()));
        command.arg(format!("--web.listen-address={addr}"));
        let mut peer = Peer::spawn("prometheus", command);
        let deadline = Instant::now() + Duration::from_secs(30);
        loop {
            if !peer.is_running() {
                let log = peer.stop();
                if log.contains("address already in use") && attempt < 5 {
                    eprintln!("prometheus: port {} was taken, trying another", addr.port());
                    break;
                }
                panic!("prometheus exited before it was ready; its log:\n{log}");
            }
            if http_get(addr, "/-/ready").is_some_and(|(status, _)| status == 200) {
                return (peer, addr);
            }
            assert!(
                Instant::now() < deadline,
                "prometheus was not ready on {addr} within 30 s; its log:\n{}",
                peer.stop()
            );
            std::thread::sleep(Duration::from_millis(100));
        }
    }
    unreachable!("the last attempt returns or fails")
}

/// The names of the alert (and recording) rules of a rule file, by a line scan.
fn rule_names(rules: &str) -> Vec<String> {
    rules
        .lines()
        .map(|l| l.trim().trim_start_matches("- ").trim())
        .filter_map(|l| l.strip_prefix("alert:").or_else(|| l.strip_prefix("record:")))
        .map(|name| name.trim().trim_matches(['"', '\'']).to_owned())
        .collect()
}

fn now_s() -> f64 {
    std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).expect("after 1970").as_secs_f64()
}

#[test]
fn the_dashboard_is_a_provisioning_ready_model() {
    let d = dashboard();
    // Source: Grafana dashboard JSON model (uid, title, schemaVersion, panels,
    // templating.list; a variable of type `datasource` whose query is the plugin id).
    assert!(d["uid"].as_str().is_some_and(|u| !u.is_empty() && u.len() <= 40), "uid: {}", d["uid"]);
    assert!(d["title"].as_str().is_some_and(|t| !t.is_empty()));
    assert!(d["schemaVersion"].as_u64().is_some());
    assert!(d["description"].as_str().is_some_and(|t| t.contains("provisioning")));
    assert!(d.get("id").is_none_or(Value::is_null), "a provisioned dashboard carries no database id");
    let vars = d["templating"]["list"].as_array().expect("templating.list");
    let var = |name: &str| {
        vars.iter().find(|v| v["name"] == name).unwrap_or_else(|| panic!("no `{name}` variable"))
    };
    assert_eq!(var("datasource")["type"], "datasource");
    assert_eq!(var("datasource")["query"], "prometheus");
    for name in ["instance", "loop"] {
        let v = var(name);
        assert_eq!(v["type"], "query", "{v}");
        assert!(v["definition"].as_str().is_some_and(|q| q.starts_with("label_values(")), "{v}");
        assert_eq!(v["allValue"], ".*", "{v}");
    }
    let mut ids = std::collections::HashSet::new();
    for p in panels(&d) {
        assert!(ids.insert(p["id"].as_u64().expect("a panel id")), "duplicate panel id: {p}");
        if p["type"] == "row" {
            continue;
        }
        assert_eq!(p["datasource"]["uid"], "${datasource}", "{}", p["title"]);
        let targets = p["targets"].as_array().filter(|t| !t.is_empty());
        for t in targets.unwrap_or_else(|| panic!("panel {} has no target", p["title"])) {
            assert_eq!(t["datasource"]["uid"], "${datasource}", "{}", p["title"]);
            let expr = t["expr"].as_str().unwrap_or_else(|| panic!("a target without expr: {t}"));
            for name in ["$instance", "$loop"] {
                if let Some(at) = expr.find(name) {
                    assert!(expr[..at].ends_with("=~\""), "{name} is not a regex matcher in {expr}");
                }
            }
            assert!(expr.contains("$instance"), "panel {} does not follow $instance: {expr}", p["title"]);
        }
    }
}

#[test]
fn a_real_prometheus_evaluates_every_dashboard_and_alert_expression() {
    let started = Instant::now();
    // Before anything starts: without Prometheus this check fails at once.
    let bin = prometheus_bin();
    let dir = tempfile::tempdir().unwrap();
    let plant = write_file(dir.path(), "plant.toml", PLANT);
    let (_sim, plant_port) = spawn_sim(&plant, None);
    let database = dir.path().join("history.db");
    let ridgeline = write_file(dir.path(), "ridgeline.toml", &config(plant_port, database.to_str().unwrap()));
    let (_service, service) = spawn_service(&ridgeline);

    let rules_path = deploy("alerts.yml");
    let rules = std::fs::read_to_string(&rules_path).unwrap();
    let names = rule_names(&rules);
    assert!(!names.is_empty(), "no rules in {}", rules_path.display());
    // Scraped every second by a job named like the shipped one (deploy/prometheus.yml),
    // which the alert on `up{job="ridgeline"}` selects; the rules are the shipped file.
    let scrape = format!(
        "global:\n  scrape_interval: 1s\n  evaluation_interval: 1s\n\
         rule_files:\n  - \"{}\"\n\
         scrape_configs:\n  - job_name: ridgeline\n    static_configs:\n      - targets: [\"{service}\"]\n",
        rules_path.canonicalize().unwrap().display()
    );
    let scrape = write_file(dir.path(), "prometheus.yml", &scrape);
    let (mut prometheus, at) = start_prometheus(&bin, dir.path(), &scrape);

    // Source: Prometheus (Debian package prometheus) HTTP API: GET /api/v1/targets,
    // `data.activeTargets[].health` is "up" once a scrape succeeded.
    wait_until("Prometheus has scraped Ridgeline", Duration::from_secs(30), || {
        let targets = api(at, "/api/v1/targets?state=active");
        targets["data"]["activeTargets"]
            .as_array()
            .into_iter()
            .flatten()
            .any(|t| t["labels"]["instance"] == service.to_string() && t["health"] == "up")
    });

    // Source: Prometheus (Debian package prometheus) HTTP API: GET /api/v1/query_range,
    // `status` "success" and `data.result` a matrix, one entry per series. Grafana asks
    // for the dashboard's time range like this; the last minute, a point a second.
    let exprs = dashboard_exprs(&dashboard());
    assert!(exprs.len() >= 10, "too few dashboard expressions: {exprs:?}");
    let mut empty: Vec<(String, String)> = exprs.iter().map(|(w, e)| (w.clone(), substitute(e))).collect();
    let waited = Instant::now();
    loop {
        let end = now_s();
        empty.retain(|(at_panel, expr)| {
            let answer = api(
                at,
                &format!(
                    "/api/v1/query_range?query={}&start={:.3}&end={end:.3}&step=1",
                    encode(expr),
                    end - 60.0
                ),
            );
            assert_eq!(answer["status"], "success", "{at_panel}: `{expr}` fails in Prometheus: {answer}");
            assert_eq!(answer["data"]["resultType"], "matrix", "{at_panel}: {answer}");
            answer["data"]["result"].as_array().is_none_or(Vec::is_empty)
        });
        if empty.is_empty() {
            break;
        }
        assert!(
            waited.elapsed() < Duration::from_secs(40),
            "after 40 s of scrapes these dashboard expressions still return no series:\n{empty:#?}"
        );
        // A rate needs two scrapes in its window, a second apart.
        std::thread::sleep(Duration::from_millis(500));
    }
    eprintln!(
        "measured: every dashboard expression had a series {:?} after the first scrape",
        waited.elapsed()
    );

    // Source: Prometheus (Debian package prometheus) HTTP API: GET /api/v1/rules,
    // `data.groups[].rules[]` with `name`, `query`, `health` ("ok" once evaluated
    // without error, "err" with `lastError`, "unknown" before the first evaluation).
    let mut loaded = Vec::new();
    wait_until("every alert rule has been evaluated", Duration::from_secs(30), || {
        let answer = api(at, "/api/v1/rules");
        assert_eq!(answer["status"], "success", "{answer}");
        loaded = answer["data"]["groups"]
            .as_array()
            .into_iter()
            .flatten()
            .flat_map(|g| g["rules"].as_array().cloned().unwrap_or_default())
            .collect();
        for rule in &loaded {
            assert_ne!(
                rule["health"], "err",
                "rule {} fails to evaluate: {}",
                rule["name"], rule["lastError"]
            );
        }
        names.iter().all(|n| loaded.iter().any(|r| r["name"] == n.as_str() && r["health"] == "ok"))
    });
    assert_eq!(loaded.len(), names.len(), "Prometheus loaded other rules than {names:?}: {loaded:#?}");
    for rule in &loaded {
        assert_eq!(rule["lastError"].as_str().unwrap_or(""), "", "{rule:#}");
        // Source: Prometheus (Debian package prometheus) HTTP API: GET /api/v1/query,
        // an instant query, as the rule evaluator runs it.
        let expr = rule["query"].as_str().unwrap_or_else(|| panic!("a rule without query: {rule:#}"));
        let answer = api(at, &format!("/api/v1/query?query={}", encode(expr)));
        assert_eq!(
            answer["status"], "success",
            "alert {}: `{expr}` fails in Prometheus: {answer}",
            rule["name"]
        );
    }

    assert!(prometheus.is_running(), "prometheus kept running; its log:\n{}", prometheus.stderr());
    prometheus.stop();
    eprintln!("measured: the whole check took {:?}", started.elapsed());
}
