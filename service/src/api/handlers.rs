//! The route handlers: thin, each one checks access, finds the loop, and hands over to
//! the loop task or the history store.

use axum::Json;
use axum::body::Body;
use axum::extract::State;
use axum::http::{HeaderMap, header};
use axum::response::{IntoResponse, Response};
use futures_util::StreamExt;
use serde::Deserialize;
use serde_json::{Value, json};

use super::{ApiError, ApiState, JsonBody, Operator, PathParams, QueryParams, Reader, openapi};
use crate::config::{MethodKind, Mode, Range};
use crate::history::{
    BumpTestRow, EventRow, History, Resolution, Retention, SampleRow, parse_rfc3339, rfc3339,
};
use crate::supervisor::CommandError;
use crate::supervisor::status::LoopStatus;

/// Samples per request when none is asked for, and the most one request may ask for.
pub const SAMPLES_DEFAULT: u32 = 1000;
pub const SAMPLES_MAX_JSON: u32 = 10_000;
/// CSV is streamed, so an export may be much longer than a JSON page.
pub const SAMPLES_MAX_CSV: u32 = 1_000_000;
pub const EVENTS_DEFAULT: u32 = 100;
pub const EVENTS_MAX: u32 = 10_000;

pub async fn healthz() -> &'static str {
    "ok\n"
}

pub async fn readyz(State(state): State<ApiState>) -> Result<Json<Value>, ApiError> {
    if let Some(why) = state.history.as_ref().and_then(History::write_failure) {
        return Err(ApiError::Unavailable(format!("history is not being written: {why}")));
    }
    let stopped: Vec<&str> = state
        .loops
        .iter()
        .filter(|l| l.status.has_changed().is_err())
        .map(|l| l.config.name.as_str())
        .collect();
    if !stopped.is_empty() {
        return Err(ApiError::Unavailable(format!("loops no longer running: {}", stopped.join(", "))));
    }
    let waiting: Vec<String> =
        state.loops.iter().filter(|l| l.status.borrow().ticks == 0).map(|l| l.config.name.clone()).collect();
    if !waiting.is_empty() {
        return Err(ApiError::Unavailable(format!("loops that have not ticked yet: {}", waiting.join(", "))));
    }
    Ok(Json(json!({"status": "ready", "warnings": *state.warnings})))
}

pub async fn metrics(State(state): State<ApiState>) -> impl IntoResponse {
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], state.metrics.render())
}

/// The OpenAPI document, with this service's loops as examples and its limits.
pub async fn openapi(State(state): State<ApiState>, _: Reader) -> Json<Value> {
    let rollup_days = state.history.as_ref().map_or(Retention::default(), History::retention).rollup_days;
    let site = openapi::Site {
        loops: state.loops.iter().map(|l| l.config.as_ref()).collect(),
        open_reads: state.access.open_reads(),
        window_max_days: trend_window_max_days(rollup_days),
    };
    Json(openapi::document_for(&site))
}

pub async fn loops(State(state): State<ApiState>, _: Reader) -> Json<Vec<LoopStatus>> {
    Json(state.loops.iter().map(|l| l.status.borrow().clone()).collect())
}

pub async fn one_loop(
    State(state): State<ApiState>,
    _: Reader,
    PathParams(name): PathParams<String>,
) -> Result<Json<LoopStatus>, ApiError> {
    Ok(Json(state.find(&name)?.status.borrow().clone()))
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModeChange {
    mode: String,
}

pub async fn set_mode(
    State(state): State<ApiState>,
    Operator(caller): Operator,
    PathParams(name): PathParams<String>,
    JsonBody(change): JsonBody<ModeChange>,
) -> Result<Json<LoopStatus>, ApiError> {
    let handle = state.find(&name)?;
    let mode: Mode = change.mode.parse().map_err(|e: String| ApiError::BadRequest(format!("mode: {e}")))?;
    handle.set_mode(mode, &caller.name).await.map(Json).map_err(conflict)
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BoundsChange {
    min: f64,
    max: f64,
}

pub async fn set_bounds(
    State(state): State<ApiState>,
    Operator(caller): Operator,
    PathParams((name, input)): PathParams<(String, String)>,
    JsonBody(change): JsonBody<BoundsChange>,
) -> Result<Json<LoopStatus>, ApiError> {
    let (handle, index) = state.find_input(&name, &input)?;
    let bounds = Range { min: change.min, max: change.max };
    handle.config.inputs[index].check_bounds(bounds).map_err(ApiError::Unprocessable)?;
    handle.set_bounds(index, bounds, &caller.name).await.map(Json).map_err(conflict)
}

/// A level held at most this long when the request does not say.
pub const SETTLE_MAX_DEFAULT_S: f64 = 900.0;
/// The longest a level may be held: a day, and no more than this many ticks.
pub const SETTLE_MAX_MAX_S: f64 = 86_400.0;
pub const SETTLE_MAX_TICKS: f64 = 50_000.0;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BumpTestRequest {
    step: f64,
    settle_max_s: Option<f64>,
}

pub async fn bump_test(
    State(state): State<ApiState>,
    Operator(caller): Operator,
    PathParams((name, input)): PathParams<(String, String)>,
    JsonBody(request): JsonBody<BumpTestRequest>,
) -> Result<(axum::http::StatusCode, Json<BumpTestRow>), ApiError> {
    let (handle, index) = state.find_input(&name, &input)?;
    if !(request.step.is_finite() && request.step > 0.0) {
        return Err(ApiError::Unprocessable(format!(
            "step: {} is not a number greater than zero",
            request.step
        )));
    }
    let settle_max_s = request.settle_max_s.unwrap_or(SETTLE_MAX_DEFAULT_S);
    if !(settle_max_s.is_finite() && settle_max_s > 0.0 && settle_max_s <= SETTLE_MAX_MAX_S) {
        return Err(ApiError::Unprocessable(format!(
            "settle_max_s: {settle_max_s} is not between 0 and {SETTLE_MAX_MAX_S} s"
        )));
    }
    // The test keeps every tick in memory until it is fitted.
    let ticks = settle_max_s / handle.config.tick_s;
    if ticks > SETTLE_MAX_TICKS {
        return Err(ApiError::Unprocessable(format!(
            "settle_max_s: {settle_max_s} s is {ticks:.0} ticks of {} s; a level may last at most {SETTLE_MAX_TICKS} ticks",
            handle.config.tick_s
        )));
    }
    let row = handle.bump_test(index, request.step, settle_max_s, &caller.name).await.map_err(conflict)?;
    Ok((axum::http::StatusCode::ACCEPTED, Json(row)))
}

pub async fn bump_test_status(
    State(state): State<ApiState>,
    _: Reader,
    PathParams(id): PathParams<i64>,
) -> Result<Json<BumpTestRow>, ApiError> {
    let history = state.history()?;
    history
        .bump_test(id)
        .await
        .map_err(|e| ApiError::Internal(e.to_string()))?
        .map(Json)
        .ok_or_else(|| ApiError::NotFound(format!("there is no bump test {id}")))
}

fn conflict(e: CommandError) -> ApiError {
    match e {
        CommandError::Conflict(m) => ApiError::Conflict(m),
        CommandError::Unprocessable(m) => ApiError::Unprocessable(m),
        CommandError::Unavailable(m) => ApiError::Unavailable(m),
    }
}

/// The trend window when none is asked for; the longest is the rollups' retention.
pub const TREND_WINDOW_DEFAULT: &str = "1h";
/// Buckets of a trend: the default, and the most one request may ask for.
pub const TREND_POINTS_DEFAULT: u32 = 300;
pub const TREND_POINTS_MAX: u32 = 2000;
/// The longest trend window in any case: a hundred years of 365 days, inside the hundred
/// years a duration may be.
pub const TREND_WINDOW_MAX_DAYS: u32 = 36_500;

/// The longest trend window, in days: as long as rollups are kept, at most
/// [`TREND_WINDOW_MAX_DAYS`].
pub fn trend_window_max_days(rollup_days: u32) -> u32 {
    rollup_days.min(TREND_WINDOW_MAX_DAYS)
}

/// Whether `window` is written as the document says: digits, an optional fraction, and
/// one of the units s, m, h or d (no sign, no spaces).
fn plain_window(window: &str) -> bool {
    let Some(number) = window.strip_suffix(['s', 'm', 'h', 'd']) else { return false };
    let (whole, fraction) = number.split_once('.').map_or((number, None), |(w, f)| (w, Some(f)));
    let digits = |part: &str| !part.is_empty() && part.bytes().all(|b| b.is_ascii_digit());
    digits(whole) && fraction.is_none_or(digits)
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TrendQuery {
    window: Option<String>,
    points: Option<u32>,
}

/// The loop's history over the last `window`, reduced to at most `points` buckets of
/// equal width, aligned to multiples of the width so that the same bucket answers alike
/// from one request to the next: from raw samples for buckets under a minute within the
/// samples' retention, else from the one-minute or (for buckets of an hour or more)
/// one-hour rollups. The answer says which.
pub async fn trend(
    State(state): State<ApiState>,
    _: Reader,
    PathParams(name): PathParams<String>,
    QueryParams(query): QueryParams<TrendQuery>,
) -> Result<Json<Value>, ApiError> {
    let handle = state.find(&name)?;
    let history = state.history()?;
    let window = query.window.as_deref().unwrap_or(TREND_WINDOW_DEFAULT);
    if !plain_window(window) {
        return Err(ApiError::BadRequest(format!(
            "window: `{window}` is not a duration like 90s, 45m, 8h or 2d (digits, then s, m, h or d)"
        )));
    }
    let window_s =
        crate::history::parse_duration_s(window).map_err(|e| ApiError::BadRequest(format!("window: {e}")))?;
    let rollup_days = history.retention().rollup_days;
    let max_days = trend_window_max_days(rollup_days);
    if window_s > f64::from(max_days) * 86_400.0 {
        return Err(ApiError::BadRequest(if max_days < rollup_days {
            format!("window: `{window}` is longer than the longest trend window ({max_days}d)")
        } else {
            format!("window: `{window}` is longer than the {max_days} days rollups are kept ({max_days}d)")
        }));
    }
    let points = limit_param(query.points, TREND_POINTS_DEFAULT, TREND_POINTS_MAX)
        .map_err(|_| ApiError::BadRequest(format!("points: must be between 1 and {TREND_POINTS_MAX}")))?;
    // A window under a millisecond is one: buckets are whole milliseconds.
    let window_ms = ((window_s * 1000.0).round() as i64).max(1);
    let bucket_ms = (window_ms + i64::from(points) - 1) / i64::from(points);
    let now_ms = crate::history::now_ms();
    let until_ms = (now_ms / bucket_ms + 1) * bucket_ms;
    let since_ms = until_ms - bucket_ms * i64::from(points);
    let resolution = Resolution::for_trend(bucket_ms, since_ms, history.raw_kept_from_ms(now_ms));
    let inputs: Vec<String> = handle.config.inputs.iter().map(|i| i.name.clone()).collect();
    let buckets = history
        .trend(&name, &inputs, since_ms, until_ms, bucket_ms, resolution)
        .await
        .map_err(|e| ApiError::Internal(e.to_string()))?;
    let buckets: Vec<Value> = buckets
        .iter()
        .map(|b| {
            let [min, mean, max] = b.objective;
            let means: serde_json::Map<String, Value> = inputs
                .iter()
                .zip(&b.inputs)
                .map(|(name, (applied, estimate))| {
                    (name.clone(), json!({"applied": applied, "estimate": estimate}))
                })
                .collect();
            json!({
                "at": rfc3339(b.start_ms), "samples": b.samples,
                "objective": {"min": min, "mean": mean, "max": max}, "inputs": means,
            })
        })
        .collect();
    Ok(Json(json!({
        "loop": name,
        "resolution": resolution.as_str(),
        "window_s": window_ms as f64 / 1000.0,
        "bucket_s": bucket_ms as f64 / 1000.0,
        "since": rfc3339(since_ms),
        "until": rfc3339(until_ms),
        "buckets": buckets,
    })))
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SampleQuery {
    since: Option<String>,
    until: Option<String>,
    limit: Option<u32>,
    format: Option<String>,
}

fn time_param(name: &str, value: Option<&str>) -> Result<Option<i64>, ApiError> {
    value.map(|v| parse_rfc3339(v).map_err(|e| ApiError::BadRequest(format!("{name}: {e}")))).transpose()
}

fn limit_param(limit: Option<u32>, default: u32, max: u32) -> Result<u32, ApiError> {
    match limit.unwrap_or(default) {
        n if (1..=max).contains(&n) => Ok(n),
        n => Err(ApiError::BadRequest(format!("limit: {n} is not between 1 and {max}"))),
    }
}

pub async fn samples(
    State(state): State<ApiState>,
    _: Reader,
    PathParams(name): PathParams<String>,
    QueryParams(query): QueryParams<SampleQuery>,
    headers: HeaderMap,
) -> Result<Response, ApiError> {
    let handle = state.find(&name)?;
    let history = state.history()?;
    // Only a stepwise loop has dwell phases, and only a loop with constraints has their
    // values: the other loops' samples keep their shape.
    let shape = Shape {
        phase: handle.config.method.kind() == MethodKind::Stepwise,
        constraints: handle.config.constraints.iter().map(|c| c.name.clone()).collect(),
    };
    let since = time_param("since", query.since.as_deref())?;
    let until = time_param("until", query.until.as_deref())?;
    let csv = match query.format.as_deref() {
        Some("csv") => true,
        Some("json") => false,
        Some(other) => return Err(ApiError::BadRequest(format!("format: `{other}` is not json or csv"))),
        None => {
            headers.get(header::ACCEPT).and_then(|a| a.to_str().ok()).is_some_and(|a| a.contains("text/csv"))
        }
    };
    if csv {
        let limit = limit_param(query.limit, SAMPLES_DEFAULT, SAMPLES_MAX_CSV)?;
        let inputs: Vec<String> = handle.config.inputs.iter().map(|i| i.name.clone()).collect();
        let mut header_line =
            String::from(if shape.phase { "at,objective,state,phase" } else { "at,objective,state" });
        for i in &inputs {
            header_line.push_str(&format!(",{i}.applied,{i}.estimate,{i}.gradient"));
        }
        for c in &shape.constraints {
            header_line.push_str(&format!(",{c}.value"));
        }
        header_line.push('\n');
        let rows = history.sample_stream(&name, since, until, limit).map(move |row| match row {
            Ok(row) => Ok(csv_line(&row, &inputs, &shape)),
            Err(e) => {
                tracing::error!(error = %e, "history read failed during a CSV export");
                Err(std::io::Error::other("history read failed"))
            }
        });
        let body =
            futures_util::stream::once(async move { Ok::<_, std::io::Error>(header_line) }).chain(rows);
        let disposition = format!("attachment; filename=\"{name}-samples.csv\"");
        return Ok((
            [
                (header::CONTENT_TYPE, "text/csv; charset=utf-8".to_owned()),
                (header::CONTENT_DISPOSITION, disposition),
            ],
            Body::from_stream(body),
        )
            .into_response());
    }
    let limit = limit_param(query.limit, SAMPLES_DEFAULT, SAMPLES_MAX_JSON)?;
    let rows =
        history.samples(&name, since, until, limit).await.map_err(|e| ApiError::Internal(e.to_string()))?;
    Ok(Json(rows.iter().map(|row| sample_json(row, &shape)).collect::<Vec<_>>()).into_response())
}

/// What a loop's samples carry beyond the objective, state and inputs.
struct Shape {
    /// A stepwise loop's dwell phase.
    phase: bool,
    /// The loop's constraints, in config order.
    constraints: Vec<String>,
}

/// The value stored for constraint `name` in `row`, if any.
fn constraint_value(row: &SampleRow, name: &str) -> Option<f64> {
    row.constraints.iter().find(|(n, _)| n == name).and_then(|(_, v)| *v)
}

/// A stored sample as JSON, with the dwell phase (or null) of a stepwise loop and the
/// constraints' values of a loop with constraints; serde_json writes a value that is not
/// finite as `null`.
fn sample_json(row: &SampleRow, shape: &Shape) -> Value {
    let inputs: serde_json::Map<String, Value> =
        row.inputs.iter().map(|(name, values)| (name.clone(), json!(values))).collect();
    let mut sample =
        json!({"at": rfc3339(row.at_ms), "objective": row.objective, "state": row.state, "inputs": inputs});
    if shape.phase {
        sample["phase"] = json!(row.phase);
    }
    if !shape.constraints.is_empty() {
        let values: serde_json::Map<String, Value> =
            shape.constraints.iter().map(|c| (c.clone(), json!(constraint_value(row, c)))).collect();
        sample["constraints"] = Value::Object(values);
    }
    sample
}

/// One CSV row with the loop's inputs in config order, the dwell phase after the state
/// for a stepwise loop, and each constraint's value after the inputs; missing or
/// non-finite values are empty cells.
fn csv_line(row: &SampleRow, inputs: &[String], shape: &Shape) -> String {
    let cell = |v: Option<f64>| v.filter(|x| x.is_finite()).map(|x| x.to_string()).unwrap_or_default();
    let mut line = format!("{},{},{}", rfc3339(row.at_ms), cell(row.objective), row.state);
    if shape.phase {
        line.push(',');
        line.push_str(row.phase.as_deref().unwrap_or_default());
    }
    for name in inputs {
        let values = row.inputs.iter().find(|(n, _)| n == name).map(|(_, v)| v);
        for value in
            [values.and_then(|v| v.applied), values.and_then(|v| v.estimate), values.and_then(|v| v.gradient)]
        {
            line.push(',');
            line.push_str(&cell(value));
        }
    }
    for c in &shape.constraints {
        line.push(',');
        line.push_str(&cell(constraint_value(row, c)));
    }
    line.push('\n');
    line
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct EventQuery {
    #[serde(rename = "loop")]
    loop_name: Option<String>,
    since: Option<String>,
    limit: Option<u32>,
}

pub async fn events(
    State(state): State<ApiState>,
    _: Reader,
    QueryParams(query): QueryParams<EventQuery>,
) -> Result<Json<Vec<Value>>, ApiError> {
    if let Some(name) = &query.loop_name {
        state.find(name)?;
    }
    let history = state.history()?;
    let since = time_param("since", query.since.as_deref())?;
    let limit = limit_param(query.limit, EVENTS_DEFAULT, EVENTS_MAX)?;
    let rows = history
        .events(query.loop_name.as_deref(), since, limit)
        .await
        .map_err(|e| ApiError::Internal(e.to_string()))?;
    Ok(Json(rows.iter().map(event_json).collect()))
}

fn event_json(EventRow { id, event: e }: &EventRow) -> Value {
    json!({"id": id, "at": rfc3339(e.at_ms), "loop": e.loop_name, "kind": e.kind, "detail": e.detail, "actor": e.actor})
}
