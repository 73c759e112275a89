//! The OpenAPI 3.1 document of the API, kept by hand next to the handlers; a test checks
//! that it lists every route of the router, and the reference validator checks its form.

use serde_json::{Value, json};

use super::handlers::{
    EVENTS_DEFAULT, EVENTS_MAX, SAMPLES_DEFAULT, SAMPLES_MAX_CSV, SAMPLES_MAX_JSON, SETTLE_MAX_DEFAULT_S,
    SETTLE_MAX_MAX_S, TREND_POINTS_DEFAULT, TREND_POINTS_MAX, TREND_WINDOW_DEFAULT,
};

fn error_response(description: &str) -> Value {
    json!({"description": description, "content": {"application/json": {"schema": {"$ref": "#/components/schemas/Error"}}}})
}

fn json_response(description: &str, schema: Value) -> Value {
    json!({"description": description, "content": {"application/json": {"schema": schema}}})
}

fn loop_param() -> Value {
    json!({"name": "loop", "in": "path", "required": true, "schema": {"type": "string"}, "description": "Loop name."})
}

fn status_ref() -> Value {
    json!({"$ref": "#/components/schemas/LoopStatus"})
}

/// Responses every read can give besides its own.
fn read_errors(mut responses: Value) -> Value {
    responses["401"] = error_response("No or unknown token, when reads need one (`open_reads = false`).");
    responses
}

/// Responses every write can give besides its own.
fn write_errors(mut responses: Value) -> Value {
    responses["400"] = error_response("Malformed JSON, a wrong type or an unknown field.");
    responses["401"] = error_response("No token, an unknown token, or no tokens configured.");
    responses["403"] = error_response("A viewer token: changes need an operator token.");
    responses["404"] = error_response("Unknown loop or input.");
    responses["409"] = error_response("Not allowed in the loop's current state.");
    responses
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

/// Every schema the routes refer to.
fn all_schemas() -> Value {
    let mut all = schemas();
    all["Trend"] = trend_schema();
    all
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
        "BoundsChange": {
            "type": "object", "required": ["min", "max"], "additionalProperties": false,
            "properties": {"min": {"type": "number"}, "max": {"type": "number"}}
        },
        "BumpTestRequest": {
            "type": "object", "required": ["step"], "additionalProperties": false,
            "properties": {
                "step": {"type": "number", "exclusiveMinimum": 0, "description": "The staircase goes u0, u0 + step, u0 - step, u0; every level inside the input's bounds."},
                "settle_max_s": {"type": "number", "exclusiveMinimum": 0, "maximum": SETTLE_MAX_MAX_S, "default": SETTLE_MAX_DEFAULT_S, "description": "Longest a level is held when the objective does not settle."}
            }
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

pub fn document() -> Value {
    json!({
        "openapi": "3.1.0",
        "info": {
            "title": "Ridgeline",
            "version": env!("CARGO_PKG_VERSION"),
            "description": "Supervisory extremum-seeking optimizer beside a PLC: loop status and changes, history, health and metrics. Times are RFC 3339 UTC. Errors are {\"error\": {\"code\", \"message\"}}."
        },
        "components": {
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer", "description": "A token from `ridgeline token`; its SHA-256 is in the config's [[access]]."}},
            "schemas": all_schemas()
        },
        "paths": {
            "/healthz": {"get": {"summary": "200 while the process runs", "responses": {"200": {"description": "Running.", "content": {"text/plain": {"schema": {"type": "string"}}}}}}},
            "/readyz": {"get": {"summary": "200 when the database is writable and every loop has ticked", "responses": {
                "200": json_response("Ready.", json!({"type": "object"})),
                "503": error_response("Not ready yet, with the reason.")
            }}},
            "/metrics": {"get": {"summary": "Prometheus text exposition format 0.0.4", "responses": {"200": {"description": "Metrics.", "content": {"text/plain": {"schema": {"type": "string"}}}}}}},
            "/api/v1/openapi.json": {"get": {"summary": "This document", "security": [{}, {"bearer": []}], "responses": read_errors(json!({"200": json_response("The OpenAPI document.", json!({"type": "object"}))}))}},
            "/api/v1/loops": {"get": {"summary": "Status of every loop", "security": [{}, {"bearer": []}], "responses": read_errors(json!({"200": json_response("Loop statuses in config order.", json!({"type": "array", "items": status_ref()}))}))}},
            "/api/v1/loops/{loop}": {"get": {
                "summary": "Status of one loop", "security": [{}, {"bearer": []}], "parameters": [loop_param()],
                "responses": read_errors(json!({"200": json_response("The loop's status.", status_ref()), "404": error_response("Unknown loop.")}))
            }},
            "/api/v1/loops/{loop}/mode": {"put": {
                "summary": "Ask a loop for a mode; from fallback this is the acknowledgement",
                "security": [{"bearer": []}], "parameters": [loop_param()],
                "requestBody": {"required": true, "content": {"application/json": {"schema": {"$ref": "#/components/schemas/ModeChange"}}}},
                "responses": write_errors(json!({"200": json_response("The loop's status with the change taken.", status_ref())}))
            }},
            "/api/v1/loops/{loop}/inputs/{input}/bounds": {"put": {
                "summary": "Change an input's operating bounds, inside its limits",
                "security": [{"bearer": []}],
                "parameters": [loop_param(), {"name": "input", "in": "path", "required": true, "schema": {"type": "string"}, "description": "Input name."}],
                "requestBody": {"required": true, "content": {"application/json": {"schema": {"$ref": "#/components/schemas/BoundsChange"}}}},
                "responses": write_errors(json!({
                    "200": json_response("The loop's status with the new bounds.", status_ref()),
                    "422": error_response("Bounds outside the limits, empty, not finite, or narrower than twice the dither amplitude.")
                }))
            }},
            "/api/v1/loops/{loop}/inputs/{input}/bump-test": {"post": {
                "summary": "Start a bump test: the input steps u0, u0 + step, u0 - step, u0 at its rate limit, each level held until the objective settles; the loop is `testing` meanwhile. A mode change cancels it and restores u0; a trip aborts it",
                "security": [{"bearer": []}],
                "parameters": [loop_param(), {"name": "input", "in": "path", "required": true, "schema": {"type": "string"}, "description": "Input name."}],
                "requestBody": {"required": true, "content": {"application/json": {"schema": {"$ref": "#/components/schemas/BumpTestRequest"}}}},
                "responses": write_errors(json!({
                    "202": json_response("The test, started.", json!({"$ref": "#/components/schemas/BumpTest"})),
                    "409": error_response("The loop is in fallback, without permit, stopped, not started, reading its setpoints back, or already testing."),
                    "422": error_response("A level outside the input's bounds (naming the bound), another input outside its bounds, or a step or settle_max_s out of range (settle_max_s at most 50,000 ticks)."),
                    "503": error_response("The PLC's setpoints cannot be read, or no history store can keep the test.")
                }))
            }},
            "/api/v1/bump-tests/{id}": {"get": {
                "summary": "A bump test: its levels so far and, once done, the fitted plant and recommended tuning",
                "security": [{}, {"bearer": []}],
                "parameters": [{"name": "id", "in": "path", "required": true, "schema": {"type": "integer"}, "description": "The id the start answered with."}],
                "responses": read_errors(json!({
                    "200": json_response("The test.", json!({"$ref": "#/components/schemas/BumpTest"})),
                    "400": error_response("An id that is not an integer."),
                    "404": error_response("No such test."),
                    "503": error_response("No history is kept.")
                }))
            }},
            "/api/v1/loops/{loop}/samples": {"get": {
                "summary": "The loop's history, oldest first; CSV with `Accept: text/csv` or `format=csv`",
                "security": [{}, {"bearer": []}],
                "parameters": [
                    loop_param(),
                    {"name": "since", "in": "query", "schema": {"type": "string", "format": "date-time"}, "description": "Samples at or after this time."},
                    {"name": "until", "in": "query", "schema": {"type": "string", "format": "date-time"}, "description": "Samples before this time."},
                    {"name": "limit", "in": "query", "schema": {"type": "integer", "minimum": 1, "maximum": SAMPLES_MAX_CSV, "default": SAMPLES_DEFAULT},
                     "description": format!("At most this many samples: default {SAMPLES_DEFAULT}, up to {SAMPLES_MAX_JSON} as JSON and {SAMPLES_MAX_CSV} as CSV.")},
                    {"name": "format", "in": "query", "schema": {"enum": ["json", "csv"]}}
                ],
                "responses": read_errors(json!({
                    "200": {"description": "Samples.", "content": {
                        "application/json": {"schema": {"type": "array", "items": {"$ref": "#/components/schemas/Sample"}}},
                        "text/csv": {"schema": {"type": "string", "description": "Header at,objective,state,<input>.applied,<input>.estimate,<input>.gradient,...; a stepwise loop's has a phase column after state (settling, averaging, or empty when the loop was not seeking); a loop with constraints has a <constraint>.value column per constraint after the inputs."}}
                    }},
                    "400": error_response("A malformed time, limit or format."),
                    "404": error_response("Unknown loop.")
                }))
            }},
            "/api/v1/loops/{loop}/trend": {"get": {
                "summary": "The loop's history over the last `window`, reduced to at most `points` buckets, oldest first: from raw samples for buckets under a minute within retention_days, else from one-minute or one-hour rollups (`resolution` says which)",
                "security": [{}, {"bearer": []}],
                "parameters": [
                    loop_param(),
                    {"name": "window", "in": "query", "schema": {"type": "string", "pattern": "^[0-9.]+[smhd]$", "default": TREND_WINDOW_DEFAULT},
                     "description": "How far back: a duration like 90s, 45m, 8h or 2d, at most [service] rollup_retention_days (730d by default)."},
                    {"name": "points", "in": "query", "schema": {"type": "integer", "minimum": 1, "maximum": TREND_POINTS_MAX, "default": TREND_POINTS_DEFAULT},
                     "description": "At most this many buckets of equal width, aligned to multiples of the width."}
                ],
                "responses": read_errors(json!({
                    "200": json_response("The trend.", json!({"$ref": "#/components/schemas/Trend"})),
                    "400": error_response("A malformed or out-of-range window or points, naming the parameter."),
                    "404": error_response("Unknown loop."),
                    "503": error_response("No history is kept.")
                }))
            }},
            "/api/v1/events": {"get": {
                "summary": "Mode and bound changes, trips and recoveries, permits, starts and stops, link up and down: newest first",
                "security": [{}, {"bearer": []}],
                "parameters": [
                    {"name": "loop", "in": "query", "schema": {"type": "string"}, "description": "Only this loop's events."},
                    {"name": "since", "in": "query", "schema": {"type": "string", "format": "date-time"}},
                    {"name": "limit", "in": "query", "schema": {"type": "integer", "minimum": 1, "maximum": EVENTS_MAX, "default": EVENTS_DEFAULT}}
                ],
                "responses": read_errors(json!({
                    "200": json_response("Events.", json!({"type": "array", "items": {"$ref": "#/components/schemas/Event"}})),
                    "400": error_response("A malformed time or limit."),
                    "404": error_response("Unknown loop.")
                }))
            }},
            "/": {"get": {"summary": "Status page for people", "security": [{}, {"bearer": []}], "responses": read_errors(json!({"200": {"description": "HTML.", "content": {"text/html": {"schema": {"type": "string"}}}}}))}}
        }
    })
}
