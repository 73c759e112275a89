//! The OpenAPI 3.1 document of the API, kept by hand next to the handlers and completed
//! at run time from the config (the examples name a real loop and input; the limits of
//! bounds, bump tests and trend windows are the config's). A test checks that it lists
//! every route of the router, the reference validator checks its form, and a fuzzer
//! checks the live service against it.

use serde_json::{Value, json};

use super::handlers::{
    EVENTS_DEFAULT, EVENTS_MAX, SAMPLES_DEFAULT, SAMPLES_MAX_CSV, SAMPLES_MAX_JSON, SETTLE_MAX_DEFAULT_S,
    SETTLE_MAX_MAX_S, SETTLE_MAX_TICKS, TREND_POINTS_DEFAULT, TREND_POINTS_MAX, TREND_WINDOW_DEFAULT,
    trend_window_max_days,
};
use super::server::{MAX_IN_FLIGHT, REQUEST_TIMEOUT};
use crate::config::LoopConfig;

/// What the document says of the running service.
pub struct Site<'a> {
    /// The loops, in config order: the examples name the first, and the limits of
    /// bounds and bump tests are the widest of all their inputs'.
    pub loops: Vec<&'a LoopConfig>,
    /// Whether reads are open to callers without a token.
    pub open_reads: bool,
    /// The longest trend window, in days.
    pub window_max_days: u32,
}

impl Default for Site<'_> {
    /// No loops, open reads and the default retention.
    fn default() -> Self {
        Site {
            loops: Vec::new(),
            open_reads: true,
            window_max_days: trend_window_max_days(crate::history::Retention::default().rollup_days),
        }
    }
}

impl Site<'_> {
    fn first_loop(&self) -> Option<&LoopConfig> {
        self.loops.first().copied()
    }

    /// The lowest and highest limits of any input: no bound outside them is taken.
    fn widest_limits(&self) -> Option<(f64, f64)> {
        let limits = self.loops.iter().flat_map(|l| &l.inputs).map(|i| i.limits);
        limits.fold(None, |acc, l| match acc {
            None => Some((l.min, l.max)),
            Some((lo, hi)) => Some((l.min.min(lo), l.max.max(hi))),
        })
    }

    /// The largest bump test step any input could take: half its limits' span (u0 +
    /// step and u0 - step both inside its bounds, which lie inside its limits).
    fn largest_step(&self) -> Option<f64> {
        self.loops.iter().flat_map(|l| &l.inputs).map(|i| i.limits.span() / 2.0).reduce(f64::max)
    }

    /// The longest settle_max_s any loop takes: a day, and at most SETTLE_MAX_TICKS of
    /// its ticks.
    fn longest_settle_s(&self) -> f64 {
        self.loops.iter().map(|l| settle_max_s(l.tick_s)).reduce(f64::max).unwrap_or(SETTLE_MAX_MAX_S)
    }
}

/// The longest settle_max_s a loop ticking every `tick_s` takes: the largest number the
/// handler's own sum lets through.
fn settle_max_s(tick_s: f64) -> f64 {
    let mut most = (SETTLE_MAX_TICKS * tick_s).min(SETTLE_MAX_MAX_S);
    while most > 0.0 && most / tick_s > SETTLE_MAX_TICKS {
        most = most.next_down();
    }
    most
}

/// A regular expression (ECMA-262, as JSON Schema's `pattern`) for the windows the
/// trend takes: digits with an optional fraction, then a unit, greater than zero and at
/// most `max_days` days.
pub fn window_pattern(max_days: u32) -> String {
    let seconds = u64::from(max_days) * 86_400;
    let units = [("s", 1), ("m", 60), ("h", 3600), ("d", 86_400)];
    let each: Vec<String> =
        units.iter().map(|(unit, scale)| format!("(?:{}){unit}", up_to(seconds / scale))).collect();
    format!("^(?:{})$", each.join("|"))
}

/// The decimal numbers greater than zero and at most `n`, written as `[0-9]+(\.[0-9]+)?`
/// (leading zeros allowed).
fn up_to(n: u64) -> String {
    let mut alternatives = vec![r"0+\.[0-9]*[1-9][0-9]*".to_owned()];
    if n > 1 {
        alternatives.push(format!(r"0*(?:{})(?:\.[0-9]+)?", integers_below(n)));
    }
    if n > 0 {
        alternatives.push(format!(r"0*{n}(?:\.0+)?"));
    }
    alternatives.join("|")
}

/// The integers from 1 to `n - 1` (`n` at least 2), without leading zeros: those with
/// fewer digits than `n`, then those with as many, by the first digit where they fall
/// below `n`.
fn integers_below(n: u64) -> String {
    let digits: Vec<u8> = n.to_string().bytes().map(|b| b - b'0').collect();
    let len = digits.len();
    let mut alternatives = Vec::new();
    match len {
        1 => {}
        2 => alternatives.push("[1-9]".to_owned()),
        _ => alternatives.push(format!("[1-9][0-9]{{0,{}}}", len - 2)),
    }
    for (i, &digit) in digits.iter().enumerate() {
        let low = u8::from(i == 0);
        if digit <= low {
            continue;
        }
        let prefix: String = digits[..i].iter().map(|d| char::from(b'0' + d)).collect();
        let class = if digit - 1 == low { low.to_string() } else { format!("[{low}-{}]", digit - 1) };
        let rest = match len - i - 1 {
            0 => String::new(),
            1 => "[0-9]".to_owned(),
            r => format!("[0-9]{{{r}}}"),
        };
        alternatives.push(format!("{prefix}{class}{rest}"));
    }
    alternatives.join("|")
}

fn error_response(description: &str) -> Value {
    json!({"description": description, "content": {"application/json": {"schema": {"$ref": "#/components/schemas/Error"}}}})
}

fn json_response(description: &str, schema: Value) -> Value {
    json!({"description": description, "content": {"application/json": {"schema": schema}}})
}

fn status_ref() -> Value {
    json!({"$ref": "#/components/schemas/LoopStatus"})
}

/// The `loop` path parameter, with the first loop as its example.
fn loop_param(site: &Site) -> Value {
    let mut param = json!({"name": "loop", "in": "path", "required": true, "schema": {"type": "string"}, "description": "Loop name."});
    if let Some(first) = site.first_loop() {
        param["example"] = json!(first.name);
    }
    param
}

/// The `input` path parameter, with the first loop's first input as its example.
fn input_param(site: &Site) -> Value {
    let mut param = json!({"name": "input", "in": "path", "required": true, "schema": {"type": "string"}, "description": "Input name."});
    if let Some(input) = site.first_loop().and_then(|l| l.inputs.first()) {
        param["example"] = json!(input.name);
    }
    param
}

/// Answers any route can give: the API's own limits on time and requests in flight.
fn limit_errors(mut responses: Value) -> Value {
    responses["408"] = error_response(&format!("Not answered within {} s.", REQUEST_TIMEOUT.as_secs()));
    let busy = format!("More than {MAX_IN_FLIGHT} requests in flight (`busy`): try again.");
    responses["503"] = match responses["503"]["description"].as_str() {
        Some(own) => error_response(&format!("{own} Or: {busy}")),
        None => error_response(&busy),
    };
    responses
}

/// Answers every read can give besides its own; 401 only when reads need a token.
fn read_errors(site: &Site, mut responses: Value) -> Value {
    if !site.open_reads {
        responses["401"] =
            error_response("No token or an unknown one: reads need a token (`open_reads = false`).");
    }
    limit_errors(responses)
}

/// Who may read: anyone (with or without a token) when reads are open, else a token.
fn read_security(site: &Site) -> Value {
    if site.open_reads { json!([{}, {"bearer": []}]) } else { json!([{"bearer": []}]) }
}

/// Answers every write can give besides its own.
fn write_errors(mut responses: Value) -> Value {
    responses["400"] =
        error_response("Malformed JSON, a wrong type, an unknown field, or a path that is not UTF-8.");
    responses["401"] = error_response("No token, an unknown token, or no tokens configured.");
    responses["403"] = error_response("A viewer token: changes need an operator token.");
    responses["404"] = error_response("Unknown loop or input.");
    responses["413"] = error_response("A body over 2 MiB.");
    limit_errors(responses)
}

/// A write's JSON body, with an example.
fn json_body(schema: &str, example: Option<Value>) -> Value {
    let mut media = json!({"schema": {"$ref": format!("#/components/schemas/{schema}")}});
    if let Some(example) = example {
        media["example"] = example;
    }
    json!({"required": true, "content": {"application/json": media}})
}

/// A trend's schema (apart from the others: `json!` has a recursion limit).
fn trend_schema() -> Value {
    let number_or_null = json!({"type": ["number", "null"]});
    json!({
        "type": "object",
        "required": ["loop", "resolution", "window_s", "bucket_s", "since", "until", "buckets"],
        "properties": {
            "loop": {"type": "string"},
            "resolution": {"enum": ["raw", "1m", "1h"], "description": "What the buckets were reduced from: raw samples, or one-minute or one-hour rollups."},
            "window_s": {"type": "number"},
            "bucket_s": {"type": "number", "description": "Width of each bucket."},
            "since": {"type": "string", "format": "date-time"},
            "until": {"type": "string", "format": "date-time"},
            "buckets": {"type": "array", "description": "Buckets without samples are left out.", "items": {
                "type": "object", "required": ["at", "samples", "objective", "inputs"],
                "properties": {
                    "at": {"type": "string", "format": "date-time", "description": "Start of the bucket."},
                    "samples": {"type": "integer", "minimum": 1},
                    "objective": {"type": "object", "required": ["min", "mean", "max"], "properties": {"min": number_or_null, "mean": number_or_null, "max": number_or_null}},
                    "inputs": {"type": "object", "additionalProperties": {
                        "type": "object", "required": ["applied", "estimate"],
                        "properties": {"applied": number_or_null, "estimate": number_or_null}
                    }}
                }
            }}
        }
    })
}

/// The schemas the routes refer to, but the trend's.
fn schemas() -> Value {
    let number_or_null = json!({"type": ["number", "null"]});
    json!({
        "Error": {
            "type": "object",
            "required": ["error"],
            "properties": {"error": {"type": "object", "required": ["code", "message"], "properties": {
                "code": {"type": "string", "description": "snake_case reason."},
                "message": {"type": "string", "description": "One sentence."}
            }}}
        },
        "Bounds": {"type": "object", "required": ["min", "max"], "properties": {"min": {"type": "number"}, "max": {"type": "number"}}},
        "InputStatus": {
            "type": "object",
            "required": ["name", "applied", "estimate", "gradient", "bounds", "limits", "safe"],
            "properties": {
                "name": {"type": "string"},
                "applied": number_or_null, "estimate": number_or_null, "gradient": number_or_null,
                "bounds": {"$ref": "#/components/schemas/Bounds"},
                "limits": {"$ref": "#/components/schemas/Bounds"},
                "safe": {"type": "number"},
                "curvature": {"$ref": "#/components/schemas/Curvature"}
            }
        },
        "Curvature": {
            "type": "object",
            "required": ["estimate", "trusted"],
            "description": "Newton loops only, once started (omitted for the other methods): the curvature estimate along this input.",
            "properties": {
                "estimate": {"type": "number", "description": "|d2J/du2| with the sign the direction needs: positive is a maximum when maximizing, a minimum when minimizing; negative is the wrong sign."},
                "trusted": {"type": "boolean", "description": "Whether this tick's Newton step used the estimate; when not, the loop took a gradient step scaled by the initial curvature."}
            }
        },
        "Dwell": {
            "type": "object",
            "required": ["input", "phase", "ends_in_s"],
            "description": "Stepwise loops only, while seeking (omitted otherwise): where the loop is in its dwell.",
            "properties": {
                "input": {"type": ["string", "null"], "description": "The input stepped into this dwell; null for the first dwell, the reference level."},
                "phase": {"enum": ["settling", "averaging"], "description": "Waiting for the plant, then averaging the objective over the end of the dwell."},
                "ends_in_s": {"type": "number", "minimum": 0, "description": "Seconds until the dwell ends and the next step is taken."}
            }
        },
        "LoopStatus": {
            "type": "object",
            "required": ["name", "mode", "state", "fallback_reason", "direction", "method", "permitted", "objective", "objective_at", "ticks", "inputs"],
            "properties": {
                "name": {"type": "string"},
                "mode": {"enum": ["seeking", "holding", "observing", "stopped"]},
                "state": {"enum": ["seeking", "holding", "observing", "stopped", "fallback", "no_permit", "testing"]},
                "fallback_reason": {"type": ["string", "null"]},
                "direction": {"enum": ["maximize", "minimize"]},
                "method": {"enum": ["sine", "newton", "stepwise"]},
                "permitted": {"type": "boolean"},
                "objective": number_or_null,
                "objective_at": {"type": ["string", "null"], "format": "date-time"},
                "ticks": {"type": "integer", "minimum": 0},
                "skipped_ticks": {"type": "integer", "minimum": 0},
                "inputs": {"type": "array", "items": {"$ref": "#/components/schemas/InputStatus"}},
                "constraints": {"type": "array", "items": {"$ref": "#/components/schemas/ConstraintStatus"}, "description": "The loop's constraints in config order; empty for a loop without any."},
                "penalized_objective": {"type": ["number", "null"], "description": "Loops with a penalty constraint only (omitted otherwise): the objective the core saw at the last tick, worsened by weight * excess^2 of each penalty constraint past its limit; null when the core did not step. `objective` stays the measured one."},
                "dwell": {"$ref": "#/components/schemas/Dwell"}
            }
        },
        "ConstraintStatus": {
            "type": "object",
            "required": ["name", "value", "limit", "side", "handling", "engaged"],
            "properties": {
                "name": {"type": "string"},
                "value": {"type": ["number", "null"], "description": "The value at the last tick whose tags were read; null before, or when that read failed."},
                "limit": {"type": "number"},
                "side": {"enum": ["max", "min"], "description": "max: the value must stay at or below the limit; min: at or above."},
                "handling": {"enum": ["back_off", "penalty"]},
                "engaged": {"type": "boolean", "description": "True from the tick the value went past the limit until it has stayed inside (margin inside, for back_off) for one cycle of the method."}
            }
        },
        "ModeChange": {
            "type": "object", "required": ["mode"], "additionalProperties": false,
            "properties": {"mode": {"enum": ["seeking", "holding", "observing", "stopped"]}}
        },
        "BumpTest": {
            "type": "object",
            "required": ["id", "loop", "input", "status", "step", "settle_max_s", "setpoints", "started_at", "finished_at", "abort_reason", "levels", "result", "fit_error", "actor"],
            "properties": {
                "id": {"type": "integer"},
                "loop": {"type": "string"},
                "input": {"type": "string"},
                "status": {"enum": ["running", "done", "aborted"]},
                "step": {"type": "number"},
                "settle_max_s": {"type": "number"},
                "setpoints": {"type": "array", "items": {"type": "number"}, "description": "u0, u0 + step, u0 - step, u0."},
                "started_at": {"type": "string", "format": "date-time"},
                "finished_at": {"type": ["string", "null"], "format": "date-time"},
                "abort_reason": {"type": ["string", "null"]},
                "levels": {"type": "array", "items": {"type": "object", "required": ["setpoint", "from", "to", "settled_objective", "settled"], "properties": {
                    "setpoint": {"type": "number"},
                    "from": {"type": "string", "format": "date-time"},
                    "to": {"type": "string", "format": "date-time"},
                    "settled_objective": number_or_null,
                    "settled": {"type": "boolean", "description": "False when the level ended at settle_max_s."}
                }}},
                "result": {"type": ["object", "null"], "description": "Once done: the fitted plant, the recommended tuning and its proof, as `ridgeline tune --json` prints them."},
                "fit_error": {"type": ["string", "null"], "description": "Once done without a result: why the record gave no tuning."},
                "actor": {"type": "string"}
            }
        },
        "Sample": {
            "type": "object",
            "required": ["at", "objective", "state", "inputs"],
            "properties": {
                "at": {"type": "string", "format": "date-time"},
                "objective": number_or_null,
                "state": {"type": "string"},
                "inputs": {"type": "object", "additionalProperties": {
                    "type": "object", "required": ["applied", "estimate", "gradient"],
                    "properties": {"applied": number_or_null, "estimate": number_or_null, "gradient": number_or_null}
                }},
                "phase": {"enum": ["settling", "averaging", null], "description": "Stepwise loops only (omitted for the other methods): the dwell phase at this tick; null when the loop was not seeking."},
                "constraints": {"type": "object", "additionalProperties": number_or_null, "description": "Loops with constraints only (omitted otherwise): each constraint's value at this tick, in config order; null when it was not known."}
            }
        },
        "Event": {
            "type": "object",
            "required": ["id", "at", "loop", "kind", "detail", "actor"],
            "properties": {
                "id": {"type": "integer"},
                "at": {"type": "string", "format": "date-time"},
                "loop": {"type": ["string", "null"]},
                "kind": {"type": "string", "description": "mode_changed, bounds_changed, tripped, recovered, permit_withdrawn, permit_granted, permit_lost, link_conflict, constraint_engaged, constraint_released, loop_started, loop_stopped, bump_test_started, bump_test_done, bump_test_aborted, link_down, link_up, service_started, service_stopped, disk_low"},
                "detail": {"description": "JSON detail of the event."},
                "actor": {"type": "string", "description": "The token's name, or \"system\"."}
            }
        }
    })
}

/// An input's new bounds; the limits stated are the widest of any input's.
fn bounds_change_schema(site: &Site) -> Value {
    let mut bound = json!({"type": "number"});
    if let Some((lowest, highest)) = site.widest_limits() {
        bound["minimum"] = json!(lowest);
        bound["maximum"] = json!(highest);
    }
    json!({
        "type": "object", "required": ["min", "max"], "additionalProperties": false,
        "description": "New operating bounds: min below max, both inside the input's limits (its status' `limits`; the minimum and maximum here are the widest of any input's), and at least twice the input's dither amplitude apart. Otherwise 422.",
        "properties": {"min": bound.clone(), "max": bound}
    })
}

/// A bump test's request; the limits stated are the widest of any loop's.
fn bump_test_request_schema(site: &Site) -> Value {
    let mut step = json!({"type": "number", "exclusiveMinimum": 0, "description": "The staircase goes u0, u0 + step, u0 - step, u0; every level inside the input's bounds (422 otherwise), so at most half the span of the input's limits (the maximum here is the largest of any input's)."});
    if let Some(largest) = site.largest_step() {
        step["maximum"] = json!(largest);
    }
    let settle = json!({
        "type": ["number", "null"], "exclusiveMinimum": 0, "maximum": site.longest_settle_s(), "default": SETTLE_MAX_DEFAULT_S,
        "description": format!("Longest a level is held when the objective does not settle: at most {SETTLE_MAX_MAX_S} s and at most {SETTLE_MAX_TICKS} of the loop's ticks (422 otherwise; the maximum here is the longest any loop takes). Absent or null: {SETTLE_MAX_DEFAULT_S} s.")
    });
    json!({
        "type": "object", "required": ["step"], "additionalProperties": false,
        "properties": {"step": step, "settle_max_s": settle}
    })
}

/// Every schema the routes refer to.
fn all_schemas(site: &Site) -> Value {
    let mut all = schemas();
    all["Trend"] = trend_schema();
    all["BoundsChange"] = bounds_change_schema(site);
    all["BumpTestRequest"] = bump_test_request_schema(site);
    all
}

/// The document without a running service: no loops, open reads, default retention.
#[cfg(test)]
pub fn document() -> Value {
    document_for(&Site::default())
}

/// The document of a running service.
pub fn document_for(site: &Site) -> Value {
    let mut paths = serde_json::Map::new();
    for (path, item) in probe_paths().into_iter().chain(loop_paths(site)).chain(history_paths(site)) {
        paths.insert(path.to_owned(), item);
    }
    json!({
        "openapi": "3.1.0",
        "info": {
            "title": "Ridgeline",
            "version": env!("CARGO_PKG_VERSION"),
            "description": "Supervisory extremum-seeking optimizer beside a PLC: loop status and changes, history, health and metrics. Times are RFC 3339 UTC. Errors are {\"error\": {\"code\", \"message\"}}. Examples and the limits of bounds, bump tests and trend windows come from this service's config."
        },
        "components": {
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer", "description": "A token from `ridgeline token`; its SHA-256 is in the config's [[access]]."}},
            "schemas": all_schemas(site)
        },
        "paths": paths
    })
}

/// Health, readiness and metrics, open to all.
fn probe_paths() -> Vec<(&'static str, Value)> {
    let text = |description: &str| json!({"description": description, "content": {"text/plain": {"schema": {"type": "string"}}}});
    vec![
        (
            "/healthz",
            json!({"get": {"operationId": "healthz", "summary": "200 while the process runs", "responses": limit_errors(json!({"200": text("Running.")}))}}),
        ),
        (
            "/readyz",
            json!({"get": {"operationId": "readyz", "summary": "200 when the database is writable and every loop has ticked", "responses": limit_errors(json!({
                "200": json_response("Ready.", json!({"type": "object"})),
                "503": error_response("Not ready yet, with the reason.")
            }))}}),
        ),
        (
            "/metrics",
            json!({"get": {"operationId": "metrics", "summary": "Prometheus text exposition format 0.0.4", "responses": limit_errors(json!({"200": text("Metrics.")}))}}),
        ),
    ]
}

/// This document and the loops: status and changes.
fn loop_paths(site: &Site) -> Vec<(&'static str, Value)> {
    let security = read_security(site);
    let operator = json!([{"bearer": []}]);
    let first = site.first_loop();
    let mode_example = json!({"mode": "holding"});
    let bounds_example =
        first.and_then(|l| l.inputs.first()).map(|i| json!({"min": i.bounds.min, "max": i.bounds.max}));
    let bump_example = first.and_then(|l| l.inputs.first()).map(|i| {
        json!({"step": i.bounds.span() / 10.0, "settle_max_s": SETTLE_MAX_DEFAULT_S.min(settle_max_s(first.map_or(1.0, |l| l.tick_s)))})
    });
    vec![
        (
            "/api/v1/openapi.json",
            json!({"get": {
                "operationId": "openapi", "summary": "This document", "security": security,
                "responses": read_errors(site, json!({"200": json_response("The OpenAPI document.", json!({"type": "object"}))}))
            }}),
        ),
        (
            "/api/v1/loops",
            json!({"get": {
                "operationId": "listLoops", "summary": "Status of every loop", "security": security,
                "responses": read_errors(site, json!({"200": json_response("Loop statuses in config order.", json!({"type": "array", "items": status_ref()}))}))
            }}),
        ),
        (
            "/api/v1/loops/{loop}",
            json!({"get": {
                "operationId": "getLoop", "summary": "Status of one loop", "security": security, "parameters": [loop_param(site)],
                "responses": read_errors(site, json!({
                    "200": json_response("The loop's status.", status_ref()),
                    "400": error_response("A path that is not UTF-8."),
                    "404": error_response("Unknown loop.")
                }))
            }}),
        ),
        (
            "/api/v1/loops/{loop}/mode",
            json!({"put": {
                "operationId": "setMode", "summary": "Ask a loop for a mode; from fallback this is the acknowledgement",
                "security": operator, "parameters": [loop_param(site)],
                "requestBody": json_body("ModeChange", Some(mode_example)),
                "responses": write_errors(json!({
                    "200": json_response("The loop's status with the change taken.", status_ref()),
                    "409": error_response("The loop stays in fallback (the trip's cause stands), or it is stopping.")
                }))
            }}),
        ),
        (
            "/api/v1/loops/{loop}/inputs/{input}/bounds",
            json!({"put": {
                "operationId": "setBounds", "summary": "Change an input's operating bounds, inside its limits",
                "security": operator, "parameters": [loop_param(site), input_param(site)],
                "requestBody": json_body("BoundsChange", bounds_example),
                "responses": write_errors(json!({
                    "200": json_response("The loop's status with the new bounds.", status_ref()),
                    "409": error_response("The loop is running a bump test, or it is stopping."),
                    "422": error_response("Bounds outside the input's limits, empty (min not below max), or narrower than twice the dither amplitude.")
                }))
            }}),
        ),
        (
            "/api/v1/loops/{loop}/inputs/{input}/bump-test",
            json!({"post": {
                "operationId": "startBumpTest",
                "summary": "Start a bump test: the input steps u0, u0 + step, u0 - step, u0 at its rate limit, each level held until the objective settles; the loop is `testing` meanwhile. A mode change cancels it and restores u0; a trip aborts it",
                "security": operator, "parameters": [loop_param(site), input_param(site)],
                "requestBody": json_body("BumpTestRequest", bump_example),
                "responses": write_errors(json!({
                    "202": {
                        "description": "The test, started.",
                        "content": {"application/json": {"schema": {"$ref": "#/components/schemas/BumpTest"}}},
                        "links": {"getBumpTest": {"operationId": "getBumpTest", "parameters": {"id": "$response.body#/id"}, "description": "The test as it goes."}}
                    },
                    "409": error_response("The loop is in fallback, without permit, stopped, not started, reading its setpoints back, already testing, or stopping."),
                    "422": error_response("A level outside the input's bounds (naming the bound), another input outside its bounds, a step not above zero, or a settle_max_s out of range (at most a day and at most 50,000 of the loop's ticks)."),
                    "503": error_response("The PLC's setpoints cannot be read, or no history store can keep the test.")
                }))
            }}),
        ),
    ]
}

/// History (bump tests, samples, trends and events) and the status page.
fn history_paths(site: &Site) -> Vec<(&'static str, Value)> {
    let security = read_security(site);
    let no_history = "No history is kept.";
    let example_loop = site.first_loop().map(|l| l.name.clone());
    let mut events_loop = json!({"name": "loop", "in": "query", "schema": {"type": "string"}, "description": "Only this loop's events."});
    if let Some(name) = &example_loop {
        events_loop["example"] = json!(name);
    }
    let limit =
        |most: u32| json!({"type": "integer", "minimum": 1, "maximum": most, "default": SAMPLES_DEFAULT});
    vec![
        (
            "/api/v1/bump-tests/{id}",
            json!({"get": {
                "operationId": "getBumpTest",
                "summary": "A bump test: its levels so far and, once done, the fitted plant and recommended tuning",
                "security": security,
                "parameters": [{"name": "id", "in": "path", "required": true, "schema": {"type": "integer", "format": "int64", "minimum": i64::MIN, "maximum": i64::MAX}, "description": "The id the start answered with."}],
                "responses": read_errors(site, json!({
                    "200": json_response("The test.", json!({"$ref": "#/components/schemas/BumpTest"})),
                    "400": error_response("An id that is not a 64-bit integer."),
                    "404": error_response("No such test."),
                    "503": error_response(no_history)
                }))
            }}),
        ),
        (
            "/api/v1/loops/{loop}/samples",
            json!({"get": {
                "operationId": "getSamples",
                "summary": "The loop's history, oldest first; CSV with `format=csv`, or with `Accept: text/csv` and no format",
                "security": security,
                "parameters": [
                    loop_param(site),
                    {"name": "since", "in": "query", "schema": {"type": "string", "format": "date-time"}, "description": "Samples at or after this time."},
                    {"name": "until", "in": "query", "schema": {"type": "string", "format": "date-time"}, "description": "Samples before this time."},
                    {"name": "page", "in": "query", "style": "form", "explode": true,
                     "description": format!("The query parameters `format` (json or csv) and `limit` (at most this many samples: default {SAMPLES_DEFAULT}, up to {SAMPLES_MAX_JSON} as JSON and {SAMPLES_MAX_CSV} as CSV, which is streamed). `Accept: text/csv` without a format is CSV too, with CSV's limit."),
                     "schema": {"type": "object", "anyOf": [
                         {"properties": {"format": {"const": "json"}, "limit": limit(SAMPLES_MAX_JSON)}, "additionalProperties": false},
                         {"properties": {"format": {"const": "csv"}, "limit": limit(SAMPLES_MAX_CSV)}, "required": ["format"], "additionalProperties": false}
                     ]}}
                ],
                "responses": read_errors(site, json!({
                    "200": {"description": "Samples.", "content": {
                        "application/json": {"schema": {"type": "array", "items": {"$ref": "#/components/schemas/Sample"}}},
                        "text/csv": {"schema": {"type": "string", "description": "Header at,objective,state,<input>.applied,<input>.estimate,<input>.gradient,...; a stepwise loop's has a phase column after state (settling, averaging, or empty when the loop was not seeking); a loop with constraints has a <constraint>.value column per constraint after the inputs."}}
                    }},
                    "400": error_response("A malformed time, limit or format, a limit over the format's, an unknown parameter, or a path that is not UTF-8."),
                    "404": error_response("Unknown loop."),
                    "503": error_response(no_history)
                }))
            }}),
        ),
        (
            "/api/v1/loops/{loop}/trend",
            json!({"get": {
                "operationId": "getTrend",
                "summary": "The loop's history over the last `window`, reduced to at most `points` buckets, oldest first: from raw samples for buckets under a minute within retention_days, else from one-minute or one-hour rollups (`resolution` says which)",
                "security": security,
                "parameters": [
                    loop_param(site),
                    {"name": "window", "in": "query", "schema": {"type": "string", "pattern": window_pattern(site.window_max_days), "default": TREND_WINDOW_DEFAULT},
                     "example": TREND_WINDOW_DEFAULT,
                     "description": format!("How far back: a number of seconds, minutes, hours or days like 90s, 45m, 8h or 2d, above zero and at most {}d (this service's [service] rollup_retention_days, and never more than 36500d). A window under a millisecond is one millisecond.", site.window_max_days)},
                    {"name": "points", "in": "query", "schema": {"type": "integer", "minimum": 1, "maximum": TREND_POINTS_MAX, "default": TREND_POINTS_DEFAULT},
                     "description": "At most this many buckets of equal width, aligned to multiples of the width."}
                ],
                "responses": read_errors(site, json!({
                    "200": json_response("The trend.", json!({"$ref": "#/components/schemas/Trend"})),
                    "400": error_response("A malformed or out-of-range window or points, naming the parameter; an unknown parameter; or a path that is not UTF-8."),
                    "404": error_response("Unknown loop."),
                    "503": error_response(no_history)
                }))
            }}),
        ),
        (
            "/api/v1/events",
            json!({"get": {
                "operationId": "listEvents",
                "summary": "Mode and bound changes, trips and recoveries, permits, starts and stops, link up and down: newest first",
                "security": security,
                "parameters": [
                    events_loop,
                    {"name": "since", "in": "query", "schema": {"type": "string", "format": "date-time"}},
                    {"name": "limit", "in": "query", "schema": {"type": "integer", "minimum": 1, "maximum": EVENTS_MAX, "default": EVENTS_DEFAULT}}
                ],
                "responses": read_errors(site, json!({
                    "200": json_response("Events.", json!({"type": "array", "items": {"$ref": "#/components/schemas/Event"}})),
                    "400": error_response("A malformed time or limit, or an unknown parameter."),
                    "404": error_response("Unknown loop."),
                    "503": error_response(no_history)
                }))
            }}),
        ),
        (
            "/",
            json!({"get": {
                "operationId": "statusPage", "summary": "Status page for people", "security": security,
                "responses": read_errors(site, json!({"200": {"description": "HTML.", "content": {"text/html": {"schema": {"type": "string"}}}}}))
            }}),
        ),
    ]
}

#[cfg(test)]
mod tests {
    use super::*;

    fn demo() -> crate::config::Config {
        let text =
            std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/../config/demo.toml")).unwrap();
        crate::config::parse(&text, "demo").unwrap()
    }

    fn operations(doc: &Value) -> Vec<(String, &Value)> {
        let paths = doc["paths"].as_object().unwrap();
        paths
            .iter()
            .flat_map(|(path, item)| {
                item.as_object().unwrap().iter().map(move |(m, op)| (format!("{m} {path}"), op))
            })
            .collect()
    }

    #[test]
    fn integers_below_a_bound_are_written_digit_by_digit() {
        assert_eq!(integers_below(730), "[1-9][0-9]{0,1}|[1-6][0-9]{2}|7[0-2][0-9]");
        assert_eq!(integers_below(10), "[1-9]");
        assert_eq!(integers_below(2), "1");
        assert_eq!(integers_below(100), "[1-9][0-9]{0,1}");
    }

    #[test]
    fn the_longest_settle_time_is_one_the_handler_takes() {
        for tick_s in [0.05, 0.1, 0.3, 1.0, 7.0, 0.001] {
            let most = settle_max_s(tick_s);
            assert!(most / tick_s <= SETTLE_MAX_TICKS && most <= SETTLE_MAX_MAX_S, "{tick_s}: {most}");
            assert!(
                most.next_up() / tick_s > SETTLE_MAX_TICKS || most == SETTLE_MAX_MAX_S,
                "{tick_s}: {most}"
            );
        }
    }

    #[test]
    fn a_running_service_names_its_first_loop_and_input_as_examples() {
        let config = demo();
        let site = Site { loops: config.loops.iter().collect(), open_reads: false, window_max_days: 30 };
        let doc = document_for(&site);
        let first = &config.loops[0];
        for (name, op) in operations(&doc) {
            for param in op["parameters"].as_array().into_iter().flatten() {
                if param["in"] == "path" && param["name"] == "loop" {
                    assert_eq!(param["example"], json!(first.name), "{name}");
                }
                if param["in"] == "path" && param["name"] == "input" {
                    assert_eq!(param["example"], json!(first.inputs[0].name), "{name}");
                }
            }
            // Closed reads: every read needs a token and may answer 401.
            if name.starts_with("get /api") || name == "get /" {
                assert_eq!(op["security"], json!([{"bearer": []}]), "{name}");
                assert!(op["responses"]["401"].is_object(), "{name}");
            }
        }
        let window = &doc["paths"]["/api/v1/loops/{loop}/trend"]["get"]["parameters"][1];
        assert!(window["schema"]["pattern"].as_str().unwrap().contains("0*30(?:\\.0+)?)d"), "{window}");
    }

    #[test]
    fn every_operation_has_an_id_and_the_answers_of_the_request_limits() {
        let doc = document();
        let mut ids = std::collections::HashSet::new();
        for (name, op) in operations(&doc) {
            assert!(ids.insert(op["operationId"].as_str().unwrap().to_owned()), "{name}: operationId twice");
            for status in ["408", "503"] {
                assert!(op["responses"][status].is_object(), "{name} has no {status}");
            }
        }
    }
}
