//! The REST API, access tokens, history and metrics of the real service, with a real
//! SQLite file and a real Modbus peer.

use std::time::Duration;

use ridgeline::api::token_sha256;
use ridgeline_tests::{HttpAnswer, Peer, http_request, promtool, python_json, ridgeline, wait_until};

use crate::rig::Rig;

const OPERATOR: &str = "operator-token-for-tests-0001";
const VIEWER: &str = "viewer-token-for-tests-0002";

fn access_tables() -> String {
    format!(
        "[[access]]\nname = \"shift-script\"\ntoken_sha256 = \"{}\"\nrole = \"operator\"\n\n\
         [[access]]\nname = \"control-room-wall\"\ntoken_sha256 = \"{}\"\nrole = \"viewer\"\n",
        token_sha256(OPERATOR),
        token_sha256(VIEWER)
    )
}

/// A running plant and service with an operator and a viewer token.
struct Running {
    rig: Rig,
    _sim: Peer,
    service: Peer,
}

fn running(open_reads: bool) -> Running {
    let rig = Rig::new("").with_service(&format!("open_reads = {open_reads}"), &access_tables());
    let sim = rig.sim();
    let service = rig.service();
    wait_until("the loop has ticked", Duration::from_secs(20), || ticks(&rig) > 0);
    Running { rig, _sim: sim, service }
}

fn ticks(rig: &Rig) -> u64 {
    call(rig, "GET", "/api/v1/loops/bowl", Some(VIEWER), None).json()["ticks"].as_u64().unwrap_or(0)
}

fn call(rig: &Rig, method: &str, path: &str, token: Option<&str>, body: Option<&str>) -> HttpAnswer {
    let bearer = token.map(|t| format!("Bearer {t}"));
    let headers: Vec<(&str, &str)> = bearer.iter().map(|b| ("Authorization", b.as_str())).collect();
    http_request(rig.api(), method, path, &headers, body).expect("the API answers")
}

/// Every write route, with a body it accepts.
const WRITES: &[(&str, &str)] = &[
    ("/api/v1/loops/bowl/mode", r#"{"mode": "holding"}"#),
    ("/api/v1/loops/bowl/inputs/u/bounds", r#"{"min": 0.5, "max": 5.5}"#),
];

/// What a change may touch: the mode and the bounds.
fn settings(rig: &Rig) -> (serde_json::Value, serde_json::Value) {
    let status = call(rig, "GET", "/api/v1/loops/bowl", None, None).json();
    (status["mode"].clone(), status["inputs"][0]["bounds"].clone())
}

#[test]
fn every_write_route_needs_an_operator_token() {
    let r = running(true);
    for (path, body) in WRITES {
        let before = settings(&r.rig);
        // Source: RFC 9110 §15.5.2 and §15.5.4 (401 without valid credentials, 403 when refused).
        assert_eq!(call(&r.rig, "PUT", path, None, Some(body)).status, 401, "{path} without a token");
        let unknown = call(&r.rig, "PUT", path, Some("not-a-known-token"), Some(body));
        assert_eq!(unknown.status, 401, "{path} with an unknown token");
        assert_eq!(unknown.header("www-authenticate"), Some("Bearer"));
        assert_eq!(unknown.json()["error"]["code"], "unauthorized");
        assert_eq!(
            call(&r.rig, "PUT", path, Some(VIEWER), Some(body)).status,
            403,
            "{path} with a viewer token"
        );
        assert_eq!(settings(&r.rig), before, "{path}: a refused request changed the loop");
        let ok = call(&r.rig, "PUT", path, Some(OPERATOR), Some(body));
        assert_eq!(ok.status, 200, "{path} with an operator token: {}", ok.body);
    }
    let status = call(&r.rig, "GET", "/api/v1/loops/bowl", None, None).json();
    assert_eq!(status["mode"], "holding");
    assert_eq!(status["inputs"][0]["bounds"], serde_json::json!({"min": 0.5, "max": 5.5}));
    // One event for each accepted change, none for the six refused requests. History keeps
    // events in the order they happened, and every refused request came before the
    // accepted change of its route: once both accepted changes are in, a refused one's
    // event would be too.
    let changes = || -> Vec<serde_json::Value> {
        r.rig
            .events()
            .into_iter()
            .filter(|e| e["kind"] == "mode_changed" || e["kind"] == "bounds_changed")
            .map(|e| e["actor"].clone())
            .collect()
    };
    wait_until("both accepted changes are in history", Duration::from_secs(10), || changes().len() >= 2);
    assert_eq!(changes(), ["shift-script", "shift-script"]);
}

#[test]
fn reads_need_a_token_only_when_open_reads_is_off() {
    let closed = running(false);
    for path in [
        "/api/v1/loops",
        "/api/v1/loops/bowl",
        "/api/v1/events",
        "/api/v1/loops/bowl/samples",
        "/api/v1/openapi.json",
    ] {
        assert_eq!(call(&closed.rig, "GET", path, None, None).status, 401, "{path} without a token");
        assert_eq!(
            call(&closed.rig, "GET", path, Some("wrong"), None).status,
            401,
            "{path} with an unknown token"
        );
        assert_eq!(
            call(&closed.rig, "GET", path, Some(VIEWER), None).status,
            200,
            "{path} with a viewer token"
        );
        assert_eq!(
            call(&closed.rig, "GET", path, Some(OPERATOR), None).status,
            200,
            "{path} with an operator token"
        );
    }
    // Health and metrics stay open for probes and scrapers.
    assert_eq!(call(&closed.rig, "GET", "/healthz", None, None).status, 200);
    assert_eq!(call(&closed.rig, "GET", "/metrics", None, None).status, 200);
    drop(closed);
    let open = running(true);
    assert_eq!(call(&open.rig, "GET", "/api/v1/loops", None, None).status, 200);
}

#[test]
fn refused_changes_leave_the_loop_and_the_history_unchanged() {
    let r = running(true);
    let before = call(&r.rig, "GET", "/api/v1/loops/bowl", None, None).json();
    // Everything the start records is in history before counting.
    wait_until("the start is in history", Duration::from_secs(5), || {
        r.rig.events().iter().any(|e| e["kind"] == "loop_started")
    });
    let events_before = r.rig.events().len();
    let bounds = "/api/v1/loops/bowl/inputs/u/bounds";
    let cases: &[(&str, &str, u16, &str)] = &[
        (bounds, r#"{"min": -1.0, "max": 5.0}"#, 422, "outside the limits"),
        (bounds, r#"{"min": 4.0, "max": 4.0}"#, 422, "is empty"),
        (bounds, r#"{"min": 5.0, "max": 1.0}"#, 422, "is empty"),
        (bounds, r#"{"min": 3.0, "max": 3.1}"#, 422, "narrower than twice the dither amplitude"),
        (bounds, r#"{"min": 1e999, "max": 5.0}"#, 400, "not valid"),
        (bounds, r#"{"min": "1", "max": 5.0}"#, 400, "not valid"),
        (bounds, r#"{"min": 1.0, "max": 5.0, "step": 2}"#, 400, "unknown field"),
        (bounds, r#"{"min": 1.0"#, 400, "not valid"),
        (bounds, r#"{"min": 1.0}"#, 400, "missing field"),
        ("/api/v1/loops/bowl/inputs/v/bounds", r#"{"min": 1.0, "max": 5.0}"#, 404, "no input `v`"),
        ("/api/v1/loops/nope/inputs/u/bounds", r#"{"min": 1.0, "max": 5.0}"#, 404, "no loop `nope`"),
        ("/api/v1/loops/bowl/mode", r#"{"mode": "fallback"}"#, 400, "is not one of"),
        ("/api/v1/loops/bowl/mode", r#"{"mode": 1}"#, 400, "not valid"),
        ("/api/v1/loops/bowl/mode", r#"{"mode": "holding", "why": "x"}"#, 400, "unknown field"),
        ("/api/v1/loops/bowl/mode", "not json", 400, "not valid"),
        ("/api/v1/loops/nope/mode", r#"{"mode": "holding"}"#, 404, "no loop `nope`"),
    ];
    // Valid changes with the wrong credentials are refused too.
    let valid_bounds = r#"{"min": 1.0, "max": 5.0}"#;
    let mode = "/api/v1/loops/bowl/mode";
    let holding = r#"{"mode": "holding"}"#;
    let credentials: &[(&str, &str, Option<&str>, u16)] = &[
        (mode, holding, None, 401),
        (mode, holding, Some("not-a-known-token"), 401),
        (mode, holding, Some(VIEWER), 403),
        (bounds, valid_bounds, None, 401),
        (bounds, valid_bounds, Some(VIEWER), 403),
    ];
    for (path, body, token, status) in credentials {
        let answer = call(&r.rig, "PUT", path, *token, Some(body));
        assert_eq!(answer.status, *status, "{path} {body} {token:?}: {}", answer.body);
    }
    for (path, body, status, message) in cases {
        let answer = call(&r.rig, "PUT", path, Some(OPERATOR), Some(body));
        assert_eq!(answer.status, *status, "{path} {body}: {}", answer.body);
        let error = answer.json();
        assert!(error["error"]["code"].is_string(), "{body}: {error}");
        assert!(error["error"]["message"].as_str().unwrap().contains(message), "{body}: {error}");
    }
    let after = call(&r.rig, "GET", "/api/v1/loops/bowl", None, None).json();
    assert_eq!(after["mode"], before["mode"]);
    assert_eq!(after["inputs"][0]["bounds"], before["inputs"][0]["bounds"]);
    // History is written a moment after a change. A marker change (the same bounds again)
    // goes in after every refused request: once it is in history, an event of a refused
    // request would be there before it.
    let marker =
        call(&r.rig, "PUT", bounds, Some(OPERATOR), Some(&before["inputs"][0]["bounds"].to_string()));
    assert_eq!(marker.status, 200, "{}", marker.body);
    wait_until("the marker change is in history", Duration::from_secs(10), || {
        r.rig.events().len() > events_before
    });
    let events = r.rig.events();
    assert_eq!(events.len(), events_before + 1, "no event for a refused change: {events:#?}");
}

#[test]
fn samples_written_during_a_run_come_back_in_order_and_as_csv() {
    let r = running(true);
    wait_until("30 samples stored", Duration::from_secs(20), || {
        call(&r.rig, "GET", "/api/v1/loops/bowl/samples", None, None)
            .json()
            .as_array()
            .is_some_and(|a| a.len() >= 30)
    });
    let json = call(&r.rig, "GET", "/api/v1/loops/bowl/samples?limit=10000", None, None).json();
    let rows = json.as_array().unwrap();
    let times: Vec<&str> = rows.iter().map(|s| s["at"].as_str().unwrap()).collect();
    assert!(times.windows(2).all(|w| w[0] <= w[1]), "oldest first");
    let first = &rows[0];
    assert_eq!(first["state"], "seeking");
    assert!(
        first["inputs"]["u"]["applied"].as_f64().is_some()
            && first["inputs"]["u"]["estimate"].as_f64().is_some(),
        "{first}"
    );

    // Samples before a time already stored do not change, so JSON and CSV see the same rows.
    let until = rows[20]["at"].as_str().unwrap();
    let query = format!("/api/v1/loops/bowl/samples?until={until}&limit=10000");
    let as_json = call(&r.rig, "GET", &query, None, None).json();
    let csv = http_request(r.rig.api(), "GET", &query, &[("Accept", "text/csv")], None).unwrap();
    assert_eq!(csv.status, 200);
    assert!(csv.header("content-type").unwrap().starts_with("text/csv"));
    let lines: Vec<&str> = csv.body.lines().collect();
    assert_eq!(lines[0], "at,objective,state,u.applied,u.estimate,u.gradient");
    assert_eq!(lines.len() - 1, as_json.as_array().unwrap().len());
    let by_format = call(&r.rig, "GET", &format!("{query}&format=csv"), None, None);
    assert_eq!(by_format.body, csv.body);
    // The CSV carries the same numbers as the JSON.
    let cells: Vec<&str> = lines[1].split(',').collect();
    let j = &as_json[0];
    assert_eq!(cells[0], j["at"].as_str().unwrap());
    assert_eq!(cells[3].parse::<f64>().unwrap(), j["inputs"]["u"]["applied"].as_f64().unwrap());

    let bad = call(&r.rig, "GET", "/api/v1/loops/bowl/samples?since=yesterday", None, None);
    assert_eq!(bad.status, 400);
    assert_eq!(call(&r.rig, "GET", "/api/v1/loops/bowl/samples?limit=0", None, None).status, 400);
    assert_eq!(call(&r.rig, "GET", "/api/v1/loops/nope/samples", None, None).status, 404);
    let wrong_method = call(&r.rig, "POST", "/api/v1/loops", None, Some("{}"));
    assert_eq!(wrong_method.status, 405);
    assert_eq!(wrong_method.json()["error"]["code"], "method_not_allowed");
}

#[test]
fn events_record_who_changed_what_newest_first() {
    let r = running(true);
    assert_eq!(
        call(&r.rig, "PUT", "/api/v1/loops/bowl/mode", Some(OPERATOR), Some(r#"{"mode": "holding"}"#)).status,
        200
    );
    let body = r#"{"min": 1.0, "max": 5.0}"#;
    assert_eq!(
        call(&r.rig, "PUT", "/api/v1/loops/bowl/inputs/u/bounds", Some(OPERATOR), Some(body)).status,
        200
    );
    // History is written in batches, a moment after the change.
    wait_until("the change is in history", Duration::from_secs(5), || {
        r.rig.events().first().is_some_and(|e| e["kind"] == "bounds_changed")
    });
    let events = r.rig.events();
    assert_eq!(events[0]["kind"], "bounds_changed");
    assert_eq!(events[0]["actor"], "shift-script");
    assert_eq!(events[0]["loop"], "bowl");
    assert_eq!(events[0]["detail"]["input"], "u");
    assert_eq!(events[0]["detail"]["from"], serde_json::json!({"min": 0.0, "max": 6.0}));
    assert_eq!(events[0]["detail"]["to"], serde_json::json!({"min": 1.0, "max": 5.0}));
    assert_eq!(events[1]["kind"], "mode_changed");
    assert_eq!(events[1]["detail"], serde_json::json!({"from": "seeking", "to": "holding"}));
    assert_eq!(events[1]["actor"], "shift-script");
    assert!(events.iter().any(|e| e["kind"] == "loop_started" && e["actor"] == "system"));
    assert!(events.windows(2).all(|w| w[0]["id"].as_i64() > w[1]["id"].as_i64()), "newest first");
    // Tokens never show: not in answers, not in the log.
    let log = r.service.stderr();
    assert!(!log.contains(OPERATOR) && !log.contains(VIEWER), "a token in the log");
    assert!(!serde_json::to_string(&events).unwrap().contains(OPERATOR));
}

#[test]
fn kill_9_leaves_a_database_that_passes_integrity_check_and_reopens() {
    let r = running(true);
    wait_until("40 ticks", Duration::from_secs(20), || ticks(&r.rig) >= 40);
    let Running { rig, _sim: sim, mut service } = r;
    service.stop();
    let db = rig.database();
    // Source: reference library Python sqlite3 (SQLite's own PRAGMA integrity_check).
    let check = python_json(&format!(
        "import json, sqlite3\nc = sqlite3.connect({path:?})\n\
         print(json.dumps({{'integrity': c.execute('PRAGMA integrity_check').fetchone()[0], \
         'samples': c.execute('SELECT coalesce(sum(samples), 0) FROM (SELECT samples FROM sample_blocks \
         UNION ALL SELECT samples FROM open_blocks)').fetchone()[0]}}))",
        path = db.display().to_string()
    ));
    assert_eq!(check["integrity"], "ok");
    assert!(check["samples"].as_u64().unwrap() > 0, "{check}");
    let _service = rig.service();
    wait_until("the reopened service is ready", Duration::from_secs(20), || {
        http_request(rig.api(), "GET", "/readyz", &[], None).is_some_and(|a| a.status == 200)
    });
    let old =
        http_request(rig.api(), "GET", "/api/v1/loops/bowl/samples?limit=10", &[], None).unwrap().json();
    assert_eq!(old.as_array().unwrap().len(), 10, "samples from before the kill are there");
    drop(sim);
}

#[test]
fn readyz_answers_200_once_every_loop_has_ticked_even_without_a_plc() {
    let rig = Rig::new("");
    let _service = rig.service();
    // No PLC: the loop cannot read, but it ticks, and the database is writable.
    wait_until("ready", Duration::from_secs(20), || {
        http_request(rig.api(), "GET", "/readyz", &[], None).is_some_and(|a| a.status == 200)
    });
}

#[test]
fn metrics_parse_with_prometheus_client_and_name_every_series() {
    let r = running(true);
    call(&r.rig, "GET", "/api/v1/loops/bowl", None, None);
    call(&r.rig, "GET", "/no/such/route/123", None, None);
    let metrics = call(&r.rig, "GET", "/metrics", None, None);
    assert!(metrics.header("content-type").unwrap().starts_with("text/plain; version=0.0.4"));
    let dir = tempfile::tempdir().unwrap();
    let path = ridgeline_tests::write_file(dir.path(), "metrics.txt", &metrics.body);
    // Source: reference library prometheus_client 0.26.0 (text_string_to_metric_families).
    let parsed = python_json(&format!(
        "import json\nfrom prometheus_client.parser import text_string_to_metric_families\n\
         text = open({path:?}).read()\n\
         out = {{}}\n\
         for f in text_string_to_metric_families(text):\n\
         \x20   names = {{k for s in f.samples for k in s.labels if k != 'le'}}\n\
         \x20   out[f.name] = {{'type': f.type, 'labels': sorted(names)}}\n\
         print(json.dumps(out))",
        path = path.display().to_string()
    ));
    // Source: INTERFACE.md metrics table (names, types, labels).
    let expected: &[(&str, &str, &[&str])] = &[
        ("ridgeline_objective", "gauge", &["loop"]),
        ("ridgeline_setpoint", "gauge", &["input", "loop"]),
        ("ridgeline_estimate", "gauge", &["input", "loop"]),
        ("ridgeline_gradient", "gauge", &["input", "loop"]),
        ("ridgeline_loop_state", "gauge", &["loop", "state"]),
        ("ridgeline_fallbacks", "counter", &["loop", "reason"]),
        ("ridgeline_link_errors", "counter", &["kind", "link"]),
        ("ridgeline_link_request_seconds", "histogram", &["link"]),
        ("ridgeline_tick_lateness_seconds", "histogram", &["loop"]),
        ("ridgeline_ticks_skipped", "counter", &["loop"]),
        ("ridgeline_history_queue_depth", "gauge", &[]),
        ("ridgeline_history_rows", "counter", &[]),
        ("ridgeline_history_dropped", "counter", &[]),
        ("ridgeline_http_requests", "counter", &["route", "status"]),
        ("ridgeline_build_info", "gauge", &["version"]),
    ];
    for (name, kind, labels) in expected {
        assert_eq!(parsed[name]["type"], *kind, "{name}: {}", parsed[name]);
        assert_eq!(parsed[name]["labels"], serde_json::json!(labels), "{name}'s label names");
    }
    let text = &metrics.body;
    for series in [
        "ridgeline_loop_state{loop=\"bowl\",state=\"seeking\"} 1",
        "ridgeline_fallbacks_total{loop=\"bowl\",reason=\"stale\"} 0",
        "ridgeline_link_errors_total{kind=\"timeout\",link=\"plc\"} 0",
        "ridgeline_http_requests_total{route=\"/api/v1/loops/{loop}\",status=\"200\"}",
        "ridgeline_http_requests_total{route=\"unmatched\",status=\"404\"} 1",
    ] {
        assert!(text.contains(series), "missing `{series}`");
    }
    assert!(!text.contains("/api/v1/loops/bowl\""), "a raw path became a label");
    assert!(!text.contains("/no/such/route"), "a scanner's path became a label");
    // Common practice: `promtool check metrics` (Debian's prometheus package; tests/run installs it).
    {
        let promtool = promtool();
        let out = std::process::Command::new(promtool)
            .args(["check", "metrics"])
            .stdin(std::fs::File::open(&path).unwrap())
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "promtool: {}{}",
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        );
    }
}

#[test]
fn the_openapi_document_validates_and_lists_every_interface_route() {
    let r = running(true);
    let doc = call(&r.rig, "GET", "/api/v1/openapi.json", None, None);
    let dir = tempfile::tempdir().unwrap();
    let path = ridgeline_tests::write_file(dir.path(), "openapi.json", &doc.body);
    // Source: reference library openapi-spec-validator 0.9.0 (OpenAPI 3.1 schema).
    let result = python_json(&format!(
        "import json\nfrom openapi_spec_validator import validate\n\
         spec = json.load(open({path:?}))\n\
         try:\n\
         \x20   validate(spec)\n\
         \x20   print(json.dumps({{'valid': True, 'version': spec['openapi']}}))\n\
         except Exception as e:\n\
         \x20   print(json.dumps({{'valid': False, 'error': str(e)}}))",
        path = path.display().to_string()
    ));
    assert_eq!(result["valid"], true, "{result}");
    assert_eq!(result["version"], "3.1.0");
    let spec = doc.json();
    // Source: INTERFACE.md REST API table.
    for (method, route) in [
        ("get", "/healthz"),
        ("get", "/readyz"),
        ("get", "/metrics"),
        ("get", "/api/v1/openapi.json"),
        ("get", "/api/v1/loops"),
        ("get", "/api/v1/loops/{loop}"),
        ("put", "/api/v1/loops/{loop}/mode"),
        ("put", "/api/v1/loops/{loop}/inputs/{input}/bounds"),
        ("get", "/api/v1/loops/{loop}/samples"),
        ("get", "/api/v1/events"),
        ("get", "/"),
    ] {
        assert!(spec["paths"][route][method].is_object(), "{method} {route} missing");
    }
}

#[test]
fn the_status_page_shows_each_loop() {
    let r = running(true);
    let page = call(&r.rig, "GET", "/", None, None);
    assert_eq!(page.status, 200);
    assert!(page.header("content-type").unwrap().starts_with("text/html"));
    // One self-contained document: its script draws each loop from the API it is served
    // beside (tests/tests/status_page.rs drives it in a browser), and it loads nothing
    // from anywhere else.
    assert!(page.body.contains("<script>") && page.body.contains("\"/api/v1/loops\""), "{}", page.body);
    for outside in ["http://", "https://", "src=", "@import", "url("] {
        assert!(!page.body.contains(outside), "the page refers to `{outside}`");
    }
    assert!(page.header("content-security-policy").unwrap().contains("default-src 'none'"));
    let loops = call(&r.rig, "GET", "/api/v1/loops", None, None).json();
    assert_eq!(loops[0]["name"], "bowl");
}

#[test]
fn ridgeline_token_prints_a_fresh_token_and_the_entry_with_its_sha256() {
    let run = ridgeline(&["token", "--name", "shift-script", "--role", "operator"]);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    let lines: Vec<&str> = run.stdout.lines().collect();
    let token = lines[1];
    assert_eq!(token.len(), 64, "256 bits in hex");
    assert!(token.chars().all(|c| c.is_ascii_hexdigit()));
    // Source: reference library Python hashlib (SHA-256, FIPS 180-4).
    let digest = python_json(&format!(
        "import hashlib, json\nprint(json.dumps(hashlib.sha256({token:?}.encode()).hexdigest()))"
    ));
    assert!(
        run.stdout.contains(&format!("token_sha256 = \"{}\"", digest.as_str().unwrap())),
        "{}",
        run.stdout
    );
    assert!(run.stdout.contains("role = \"operator\"") && run.stdout.contains("name = \"shift-script\""));
    let again = ridgeline(&["token", "--name", "shift-script", "--role", "operator"]);
    assert_ne!(again.stdout.lines().nth(1), Some(token), "every token is new");
    assert_eq!(ridgeline(&["token", "--name", "x", "--role", "admin"]).code, Some(2));
}

#[test]
fn the_shipped_scrape_config_and_alert_rules_pass_promtool() {
    let promtool = promtool();
    let deploy = crate::check_command::root().join("deploy");
    for args in [["check", "config", "prometheus.yml"], ["check", "rules", "alerts.yml"]] {
        // Source: Prometheus' own checker (Debian package prometheus).
        let out = std::process::Command::new(&promtool).args(args).current_dir(&deploy).output().unwrap();
        assert!(
            out.status.success(),
            "{args:?}: {}{}",
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        );
    }
}
