//! The live loop: a [`LoopTask`] does one tick (read, decide, write, publish) when asked;
//! [`run`] only decides when to ask.

use std::sync::Arc;
use std::time::Duration;

use tokio::sync::{mpsc, oneshot, watch};
use tokio::time::{Instant, MissedTickBehavior};
use tokio_util::sync::CancellationToken;

use super::control::{
    Cause, Control, FinishedTest, Permit, Reading, State, TestOutcome, TestRefused, TickReport,
};
use super::status::{ConstraintStatus, DwellStatus, InputStatus, LoopStatus};
use crate::config::{Config, LoopConfig, Mode, OnTrip, Range};
use crate::field::{LinkError, Links, LoopIo, Urgency};
use crate::history::{BumpTestRow, History, InputSample, SampleRecord, now_ms, rfc3339};
pub use crate::report::Reporting;
use crate::seek::Detail;
use crate::seek::guard::starting_point;

/// Why a running loop refused a command.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum CommandError {
    /// Not possible in the loop's current state (an HTTP 409).
    #[error("{0}")]
    Conflict(String),
    /// Well-formed but not possible with these values (an HTTP 422).
    #[error("{0}")]
    Unprocessable(String),
    /// Something the command needs cannot be reached now: the PLC, the history store (an
    /// HTTP 503).
    #[error("{0}")]
    Unavailable(String),
}

/// A change asked of a running loop through its [`LoopHandle`]; it takes effect at the
/// loop's next tick.
pub enum Command {
    SetMode {
        mode: Mode,
        actor: String,
        reply: oneshot::Sender<Result<LoopStatus, CommandError>>,
    },
    SetBounds {
        input: usize,
        bounds: Range,
        actor: String,
        reply: oneshot::Sender<Result<LoopStatus, CommandError>>,
    },
    BumpTest {
        input: usize,
        step: f64,
        settle_max_s: f64,
        actor: String,
        reply: oneshot::Sender<Result<BumpTestRow, CommandError>>,
    },
}

/// The API's handle on a running loop: its config, its latest status, and a way to
/// change its mode and bounds.
#[derive(Clone)]
pub struct LoopHandle {
    pub config: Arc<LoopConfig>,
    pub status: watch::Receiver<LoopStatus>,
    commands: mpsc::Sender<Command>,
}

impl LoopHandle {
    /// Asks for `mode`; answers with the status once the loop has taken the change.
    pub async fn set_mode(&self, mode: Mode, actor: &str) -> Result<LoopStatus, CommandError> {
        self.ask(|reply| Command::SetMode { mode, actor: actor.to_owned(), reply }).await
    }

    /// Sets input `input`'s operating bounds (already checked against the limits).
    pub async fn set_bounds(
        &self,
        input: usize,
        bounds: Range,
        actor: &str,
    ) -> Result<LoopStatus, CommandError> {
        self.ask(|reply| Command::SetBounds { input, bounds, actor: actor.to_owned(), reply }).await
    }

    /// Starts a bump test on input `input`; answers with the stored test once running.
    pub async fn bump_test(
        &self,
        input: usize,
        step: f64,
        settle_max_s: f64,
        actor: &str,
    ) -> Result<BumpTestRow, CommandError> {
        self.ask(|reply| Command::BumpTest { input, step, settle_max_s, actor: actor.to_owned(), reply })
            .await
    }

    async fn ask<T>(
        &self,
        command: impl FnOnce(oneshot::Sender<Result<T, CommandError>>) -> Command,
    ) -> Result<T, CommandError> {
        let stopping = || CommandError::Conflict(format!("loop {} is stopping", self.config.name));
        let (reply, answer) = oneshot::channel();
        self.commands.send(command(reply)).await.map_err(|_| stopping())?;
        answer.await.map_err(|_| stopping())?
    }
}

/// One loop bound to its links.
pub struct LoopTask {
    config: Arc<LoopConfig>,
    name: Arc<str>,
    input_names: Vec<Arc<str>>,
    constraint_names: Vec<Arc<str>>,
    control: Control,
    io: LoopIo,
    /// The loop's tags (the objective's, then its constraints'), then the permit tag when
    /// there is one; `None` where the last read failed.
    values: Vec<Option<f64>>,
    /// The loop's tags of a read that got them all.
    tag_values: Vec<f64>,
    status: watch::Sender<LoopStatus>,
    commands: mpsc::Receiver<Command>,
    reporting: Reporting,
    /// The history store: the last estimates to resume from after a restart, and the
    /// loop's bump tests.
    history: Option<History>,
    /// The origin of the loop's own clock, for the watchdog.
    started_at: Instant,
    /// Plant seconds per wall second: 1 but in the demo's (and soak's) time compression.
    speed: f64,
    objective_at: Option<i64>,
    last_tick: Option<u64>,
    skipped_ticks: u64,
    /// Where in the tick period this loop ticks, as a fraction (see [`OnTick::phase`]):
    /// its place among the configured loops, so they are spread evenly.
    phase: f64,
    heartbeat: u16,
    /// The heartbeat value last written successfully, which the register should still
    /// hold at the next tick.
    heartbeat_written: Option<u16>,
    /// Whether the heartbeat register was last found changed by another writer.
    heartbeat_conflict: bool,
    /// Whether the last write of each input failed, so each failure is logged once.
    write_failing: Vec<bool>,
    read_failing: bool,
    /// The bump test running, as stored, and when (Unix ms, loop clock s) it started.
    test: Option<(BumpTestRow, i64, f64)>,
    /// The last save of a bump test, which the next one waits for.
    test_saving: Option<tokio::task::JoinHandle<()>>,
}

impl LoopTask {
    /// The task for loop `index` of a validated config, and the API's handle on it.
    /// `history` is where the last stored estimates are taken from at start, and where
    /// bump tests are kept.
    pub fn new(
        config: &Config,
        index: usize,
        links: &Links,
        reporting: Reporting,
        history: Option<History>,
    ) -> (Self, LoopHandle) {
        let loop_config = Arc::new(config.loops[index].clone());
        let control = Control::new(&loop_config);
        let mut tags: Vec<String> = control.tag_names().to_vec();
        tags.extend(loop_config.permit.iter().cloned());
        let io = LoopIo::new(config, links, index, &tags);
        let (status, receiver) = watch::channel(LoopStatus::initial(&loop_config));
        let (commands_in, commands) = mpsc::channel(16);
        let task = LoopTask {
            values: vec![None; tags.len()],
            tag_values: Vec::with_capacity(tags.len()),
            write_failing: vec![false; loop_config.inputs.len()],
            name: Arc::from(loop_config.name.as_str()),
            input_names: loop_config.inputs.iter().map(|i| Arc::from(i.name.as_str())).collect(),
            constraint_names: loop_config.constraints.iter().map(|c| Arc::from(c.name.as_str())).collect(),
            config: loop_config.clone(),
            control,
            io,
            status,
            commands,
            reporting,
            history,
            started_at: Instant::now(),
            speed: 1.0,
            objective_at: None,
            last_tick: None,
            skipped_ticks: 0,
            phase: index as f64 / config.loops.len().max(1) as f64,
            heartbeat: 0,
            heartbeat_written: None,
            heartbeat_conflict: false,
            read_failing: false,
            test: None,
            test_saving: None,
        };
        (task, LoopHandle { config: loop_config, status: receiver, commands: commands_in })
    }

    pub fn name(&self) -> &str {
        &self.config.name
    }

    pub fn tick_s(&self) -> f64 {
        self.config.tick_s
    }

    /// Ticks skipped because they came too late after a stall.
    pub fn skipped_ticks(&self) -> u64 {
        self.skipped_ticks
    }

    /// Runs the loop's clock `speed` times faster than the wall, so its watchdog and
    /// recovery intervals count plant seconds like its ticks (the demo's time compression).
    pub fn set_speed(&mut self, speed: f64) {
        self.speed = speed;
    }

    /// Plant seconds since the task was made.
    fn now_s(&self) -> f64 {
        self.started_at.elapsed().as_secs_f64() * self.speed
    }

    /// One tick at tick index `n`: start if not started, read the tags, let the control
    /// decide, write the setpoints and the heartbeat, publish and record.
    pub async fn tick(&mut self, n: u64) -> TickReport {
        if let Some(last) = self.last_tick
            && n > last + 1
        {
            self.skipped_ticks += n - last - 1;
            if let Some(m) = &self.reporting.metrics {
                m.ticks_skipped.with_label_values(&[&*self.name]).inc_by(n - last - 1);
            }
            tracing::debug!(r#loop = %self.name, skipped = n - last - 1, "late ticks skipped");
            // The objective now answers a setpoint older than one tick: the demodulation
            // would pair it with the wrong phase.
            self.control.restart_filters();
        }
        self.last_tick = Some(n);
        if !self.control.is_started() {
            self.try_start().await;
        } else if self.control.wants_read_back() {
            self.restart_from_plc().await;
        }
        let read = self.io.read(&mut self.values).await;
        self.note_read(&read);
        let (loop_tags, permit_tag) = self.values.split_at(self.control.tag_names().len());
        self.tag_values.clear();
        self.tag_values.extend(loop_tags.iter().map_while(|v| *v));
        let tags_read = self.tag_values.len() == loop_tags.len();
        if tags_read {
            self.objective_at = Some(now_ms());
        }
        let permit = match (self.config.permit.is_some(), permit_tag.first()) {
            (false, _) => Permit::NotConfigured,
            (true, Some(Some(v))) => Permit::Reads(*v),
            (true, _) => Permit::Unreadable,
        };
        let tags = tags_read.then_some(&self.tag_values[..]);
        let now_s = self.now_s();
        let report = self.control.tick(n, now_s, Reading { tags, permit });
        if report.write {
            let all_ok = self.write_applied().await;
            self.control.note_setpoints(all_ok, now_s);
        }
        if self.config.heartbeat.is_some() && self.control.is_started() {
            self.check_heartbeat().await;
            // A failed heartbeat is a link error (counted and logged by the link), not a trip.
            let written = self.io.write_heartbeat(self.heartbeat).await.is_ok();
            self.heartbeat_written = written.then_some(self.heartbeat);
            self.heartbeat = self.heartbeat.wrapping_add(1);
        }
        self.report_transitions("system");
        self.report_constraints();
        self.follow_test().await;
        self.publish();
        self.record(&report);
        report
    }

    /// Logs and records every constraint engaged or released since the last call.
    fn report_constraints(&mut self) {
        for change in self.control.take_constraint_changes() {
            let Some(c) = self.config.constraints.get(change.constraint) else { continue };
            let handling = c.handling.kind().as_str();
            let (kind, what) = if change.engaged {
                ("constraint_engaged", "constraint engaged: the value is past its limit")
            } else {
                ("constraint_released", "constraint released: the value has stayed inside its limit")
            };
            tracing::info!(
                r#loop = %self.name, constraint = %c.name, value = change.value, limit = change.limit,
                side = c.limit.side(), handling, "{what}"
            );
            self.reporting.event(
                Some(&self.name),
                kind,
                serde_json::json!({
                    "constraint": c.name, "value": change.value, "limit": change.limit,
                    "side": c.limit.side(), "handling": handling,
                }),
                "system",
            );
        }
    }

    /// Starts a bump test: from the estimate of a loop that writes, else from the setpoint
    /// the PLC holds. Stored before the first step is written.
    async fn start_test(
        &mut self,
        input: usize,
        step: f64,
        settle_max_s: f64,
        actor: &str,
    ) -> Result<BumpTestRow, CommandError> {
        let Some(history) = self.history.clone() else {
            return Err(CommandError::Unavailable("there is no history store to keep the test in".into()));
        };
        let Some(cfg) = self.config.inputs.get(input) else {
            return Err(CommandError::Conflict(format!("loop {} has no input {input}", self.name)));
        };
        let name = cfg.name.clone();
        // Where every input starts: what the loop writes, or what the PLC holds.
        let starts: Vec<f64> = if self.control.is_started() && self.control.state().writes() {
            self.control.inputs().iter().map(|i| i.estimate).collect()
        } else {
            let back = self.read_back().await.map_err(|e| {
                CommandError::Unavailable(format!("cannot read the setpoints from the PLC: {e}"))
            })?;
            back.into_iter().map(|v| v.unwrap_or(f64::NAN)).collect()
        };
        let u0 = starts[input];
        let next_tick = self.last_tick.map_or(0, |t| t + 1);
        let origin_s = self.control.test_time_s(next_tick);
        let setpoints =
            self.control.start_test(input, step, settle_max_s, &starts, next_tick).map_err(|e| match e {
                TestRefused::Conflict(m) => CommandError::Conflict(format!("loop {}: {m}", self.name)),
                TestRefused::OutOfBounds(m) => CommandError::Unprocessable(format!("input `{name}`: {m}")),
            })?;
        let started_at = now_ms();
        let mut row = BumpTestRow {
            id: 0,
            loop_name: self.config.name.clone(),
            input: name.clone(),
            status: "running".into(),
            step,
            settle_max_s,
            setpoints: setpoints.to_vec(),
            started_at,
            finished_at: None,
            abort_reason: None,
            levels: serde_json::json!([]),
            result: None,
            fit_error: None,
            actor: actor.to_owned(),
        };
        match history.create_bump_test(&row).await {
            Ok(id) => row.id = id,
            Err(e) => {
                // Not kept, not run: cancel at once (the loop's own mode again).
                let _ = self.control.ask(self.control.mode());
                self.control.take_finished_test();
                self.control.take_transitions();
                self.write_estimates().await;
                return Err(CommandError::Unavailable(format!("cannot store the bump test in history: {e}")));
            }
        }
        tracing::info!(r#loop = %self.name, input = %name, id = row.id, step, u0, actor = %actor, "bump test started");
        self.reporting.event(
            Some(&self.name),
            "bump_test_started",
            serde_json::json!({"id": row.id, "input": name, "step": step, "setpoints": setpoints, "settle_max_s": settle_max_s}),
            actor,
        );
        self.test = Some((row.clone(), started_at, origin_s));
        Ok(row)
    }

    /// Stores the levels of the running bump test as they end, and the test once it ends;
    /// a test that is done is fitted off the loop's task and its result stored.
    async fn follow_test(&mut self) {
        let Some((row, origin_ms, origin_s)) = &mut self.test else { return };
        let finished = self.control.take_finished_test();
        let staircase = match (&finished, self.control.test()) {
            (Some(f), _) => &f.staircase,
            (None, Some(s)) => s,
            (None, None) => return,
        };
        let at_ms = |s: f64| *origin_ms + ((s - *origin_s) * 1000.0).round() as i64;
        let levels: Vec<serde_json::Value> = staircase
            .levels()
            .iter()
            .map(|l| {
                serde_json::json!({
                    "setpoint": l.setpoint, "from": rfc3339(at_ms(l.from_s)), "to": rfc3339(at_ms(l.to_s)),
                    "settled_objective": l.settled_objective, "settled": l.settled,
                })
            })
            .collect();
        let levels_changed = row.levels.as_array().is_none_or(|a| a.len() != levels.len());
        row.levels = serde_json::Value::Array(levels);
        let Some(FinishedTest { staircase, outcome }) = finished else {
            if levels_changed {
                let row = row.clone();
                self.save_test(async move { Some(row) });
            }
            return;
        };
        let Some((mut row, ..)) = self.test.take() else { return };
        row.finished_at = Some(now_ms());
        let detail = serde_json::json!({"id": row.id, "input": row.input, "levels": row.levels});
        match outcome {
            TestOutcome::Aborted(reason) => {
                tracing::warn!(r#loop = %self.name, id = row.id, reason = %reason, "bump test aborted");
                row.status = "aborted".into();
                let mut detail = detail;
                detail["reason"] = serde_json::json!(reason);
                row.abort_reason = Some(reason);
                self.reporting.event(Some(&self.name), "bump_test_aborted", detail, "system");
                self.save_test(async move { Some(row) });
            }
            TestOutcome::Done => {
                tracing::info!(r#loop = %self.name, id = row.id, "bump test done; fitting the plant");
                self.reporting.event(Some(&self.name), "bump_test_done", detail, "system");
                let cfg = &self.config.inputs[staircase.input];
                let request = crate::tune::Request {
                    input: cfg.name.clone(),
                    tick_s: Some(self.config.tick_s),
                    bounds: Some(self.control.inputs()[staircase.input].guard.bounds),
                    direction: Some(self.config.direction),
                    configured_rate_per_s: Some(cfg.max_rate_per_s),
                    ..Default::default()
                };
                // The levels and the end are kept at once; the fit and its proof take a CPU
                // for a moment, off the loop's task. The test shows `running` until its
                // result is stored.
                let ended = row.clone();
                self.save_test(async move { Some(ended) });
                self.save_test(async move {
                    let record = staircase.record().clone();
                    let fitted =
                        tokio::task::spawn_blocking(move || crate::tune::tune(&record, &request)).await;
                    match fitted {
                        Ok(Ok(result)) => row.result = serde_json::to_value(&result).ok(),
                        Ok(Err(e)) => row.fit_error = Some(e.to_string()),
                        Err(e) => row.fit_error = Some(format!("the fit failed: {e}")),
                    }
                    row.status = "done".into();
                    Some(row)
                });
            }
        }
    }

    /// Stores the bump test `row` makes, off the loop's task (a busy database must not
    /// hold up a tick) and after every earlier save of it, so saves land in order.
    fn save_test(&mut self, row: impl Future<Output = Option<BumpTestRow>> + Send + 'static) {
        let Some(history) = self.history.clone() else { return };
        let earlier = self.test_saving.take();
        let name = self.name.clone();
        self.test_saving = Some(tokio::spawn(async move {
            if let Some(earlier) = earlier {
                let _ = earlier.await;
            }
            let Some(row) = row.await else { return };
            if let Err(e) = history.save_bump_test(&row).await {
                tracing::warn!(r#loop = %name, id = row.id, error = %e, "cannot store the bump test");
            }
        }));
    }

    /// Checks that the heartbeat register still holds the value this loop wrote last. If
    /// it does not, something else writes it: most likely a second optimizer on the same
    /// PLC registers (another Ridgeline with a config of its own), which no lock can see.
    /// Recorded once per conflict (`link_conflict`), and once more when it ends.
    async fn check_heartbeat(&mut self) {
        let Some(expected) = self.heartbeat_written else { return };
        let Some(Ok(found)) = self.io.read_heartbeat().await else { return };
        let conflict = found != expected;
        if conflict == self.heartbeat_conflict {
            return;
        }
        self.heartbeat_conflict = conflict;
        let Some(h) = &self.config.heartbeat else { return };
        if conflict {
            tracing::warn!(
                r#loop = %self.name, link = %h.link, register = h.holding_register, expected, found,
                "the heartbeat register was changed by another writer: is a second optimizer writing this PLC?"
            );
            self.reporting.event(
                Some(&self.name),
                "link_conflict",
                serde_json::json!({
                    "link": h.link, "holding_register": h.holding_register, "expected": expected, "found": found,
                    "note": "another writer changed the heartbeat register; check that no second optimizer writes these registers",
                }),
                "system",
            );
        } else {
            tracing::info!(r#loop = %self.name, link = %h.link, "the heartbeat register counts on from this loop's writes again");
        }
    }

    /// Reads every input's setpoint back from the PLC.
    async fn read_back(&self) -> Result<Vec<Option<f64>>, LinkError> {
        let mut values = Vec::with_capacity(self.config.inputs.len());
        for i in 0..self.config.inputs.len() {
            values.push(Some(self.io.read_back(i).await?));
        }
        Ok(values)
    }

    /// Starts from the last stored estimate when it is recent (younger than ten dither
    /// periods) and inside the bounds, else from the setpoint read back from the PLC when
    /// inside the bounds, else from `safe`. Waits for a later tick when the PLC cannot be
    /// read, rather than writing anything without knowing where the process stands.
    async fn try_start(&mut self) {
        let read_back = match self.read_back().await {
            Ok(v) => v,
            Err(e) => {
                tracing::debug!(r#loop = %self.name, error = %e, "setpoints not readable yet; start waits");
                self.control.note_setpoints(false, self.now_s());
                return;
            }
        };
        let stored = match &self.history {
            Some(history) => match history.last_estimates(&self.name).await {
                Ok(rows) => rows,
                Err(e) => {
                    tracing::warn!(r#loop = %self.name, error = %e, "cannot read the stored estimates; not resuming from them");
                    Vec::new()
                }
            },
            None => Vec::new(),
        };
        let now = now_ms();
        let mut estimates = Vec::new();
        let mut detail = serde_json::Map::new();
        let fresh_s = 10.0 * self.config.cycle_s();
        for ((cfg, input), back) in self.config.inputs.iter().zip(self.control.inputs()).zip(&read_back) {
            let stored = stored.iter().find(|s| s.input == cfg.name);
            let age_s = stored.map(|s| (now - s.at_ms) as f64 / 1000.0);
            let recent = stored.filter(|_| age_s.is_some_and(|a| a < fresh_s)).map(|s| s.estimate);
            let (estimate, origin) = starting_point(recent, *back, input.guard.bounds, cfg.safe);
            estimates.push(estimate);
            detail.insert(
                cfg.name.clone(),
                serde_json::json!({
                    "estimate": estimate,
                    "from": origin.as_str(),
                    "stored": stored.map(|s| s.estimate),
                    "stored_age_s": age_s,
                    "read_back": back,
                }),
            );
        }
        // The heartbeat goes on from the register's value, so the PLC sees it change at
        // once after a restart.
        if let Some(Ok(last)) = self.io.read_heartbeat().await {
            self.heartbeat = last.wrapping_add(1);
        }
        self.control.start(self.now_s(), &estimates);
        let detail = serde_json::Value::Object(detail);
        tracing::info!(r#loop = %self.name, mode = %self.control.mode(), start = %detail, "loop started");
        self.reporting.event(
            Some(&self.name),
            "loop_started",
            serde_json::json!({"mode": self.control.mode().as_str(), "inputs": detail}),
            "system",
        );
    }

    /// A bumpless restart from what the PLC holds (after permission returned, a
    /// recovery, or a mode that starts writing); retried every tick until it succeeds.
    async fn restart_from_plc(&mut self) {
        match self.read_back().await {
            Ok(read_back) => {
                self.control.restart_from(&read_back);
                tracing::info!(r#loop = %self.name, read_back = ?read_back, "restarted from the setpoints in the PLC");
            }
            Err(e) => {
                tracing::debug!(r#loop = %self.name, error = %e, "setpoints not readable yet; restart waits");
                self.control.note_setpoints(false, self.now_s());
            }
        }
    }

    /// Logs, counts and records every state change since the last call.
    fn report_transitions(&mut self, actor: &str) {
        for t in self.control.take_transitions() {
            let mut detail = serde_json::json!({"from": t.from.as_str(), "to": t.to.as_str(), "reason": t.cause.describe()});
            let kind = match t.cause {
                Cause::Tripped(trip) => {
                    if let Some(m) = &self.reporting.metrics {
                        m.fallbacks.with_label_values(&[&*self.name, trip.as_str()]).inc();
                    }
                    detail["trip"] = serde_json::json!(trip.as_str());
                    detail["on_trip"] = serde_json::json!(self.config.watchdog.on_trip.as_str());
                    if t.to != State::Fallback {
                        detail["note"] = serde_json::json!(
                            "nothing is written without the PLC's permission; the fallback applies when it returns"
                        );
                    } else if !self.control.permitted() {
                        detail["note"] = serde_json::json!(
                            "the permit tag cannot be read: nothing is written until it is read again"
                        );
                    }
                    let outside = self.control.safe_outside_bounds();
                    let writes: serde_json::Map<_, _> = self
                        .config
                        .inputs
                        .iter()
                        .zip(self.control.applied())
                        .zip(&outside)
                        .map(|((c, v), out)| {
                            let note = if *out && self.config.watchdog.on_trip == OnTrip::Safe {
                                "safe lies outside the bounds: the nearest bound is written"
                            } else {
                                ""
                            };
                            (c.name.clone(), serde_json::json!({"value": v, "note": note}))
                        })
                        .collect();
                    detail["writes"] = serde_json::Value::Object(writes);
                    tracing::warn!(r#loop = %self.name, trip = trip.as_str(), detail = %detail, "loop tripped to fallback");
                    "tripped"
                }
                Cause::Recovered | Cause::Acknowledged(_) => "recovered",
                Cause::PermitWithdrawn => "permit_withdrawn",
                Cause::PermitGranted => "permit_granted",
                Cause::PermitLost => "permit_lost",
                // bump_test_started, bump_test_done and bump_test_aborted (with
                // constraint_engaged, when a back-off ended the test) say it, with details.
                Cause::TestStarted | Cause::TestDone | Cause::ConstraintEngaged => "",
                // The mode_changed event of the request says it all.
                Cause::Asked(_) => "",
            };
            if !matches!(t.cause, Cause::Tripped(_)) {
                tracing::info!(r#loop = %self.name, from = t.from.as_str(), to = t.to.as_str(), reason = %t.cause.describe(), "state changed");
            }
            if !kind.is_empty() {
                self.reporting.event(Some(&self.name), kind, detail, actor);
            }
        }
    }

    fn note_read(&mut self, read: &Result<(), LinkError>) {
        match read {
            Err(e) if !self.read_failing => {
                // A dead link is logged once by the link, not once more by every loop on it.
                if e.is_connection() {
                    tracing::debug!(r#loop = %self.name, error = %e, "cannot read the objective's tags");
                } else {
                    tracing::warn!(r#loop = %self.name, error = %e, "cannot read the objective's tags");
                }
                self.read_failing = true;
            }
            Ok(()) if self.read_failing => {
                tracing::info!(r#loop = %self.name, "reading the objective's tags again");
                self.read_failing = false;
            }
            _ => {}
        }
    }

    /// Writes every input's applied value; whether all writes went through.
    async fn write_applied(&mut self) -> bool {
        let mut all_ok = true;
        for i in 0..self.config.inputs.len() {
            let value = self.control.applied()[i];
            all_ok &= self.write_input(i, value, Urgency::Normal).await.is_ok();
        }
        all_ok
    }

    /// Writes the estimates without dither (when a loop stops seeking, so no dither is
    /// left behind in the PLC).
    async fn write_estimates(&mut self) {
        for i in 0..self.config.inputs.len() {
            let input = self.control.inputs()[i];
            let _ = self.write_input(i, input.guard.clamp(input.estimate), Urgency::Normal).await;
        }
    }

    async fn write_input(&mut self, i: usize, value: f64, urgency: Urgency) -> Result<(), LinkError> {
        let bounds = self.control.inputs()[i].guard.bounds;
        let result = self.io.write(i, value, bounds, urgency).await;
        let input = &self.config.inputs[i].name;
        match (&result, self.write_failing[i]) {
            (Err(e), false) if e.is_connection() => {
                tracing::debug!(r#loop = %self.name, input = %input, error = %e, "setpoint write failed")
            }
            (Err(e), false) => {
                tracing::warn!(r#loop = %self.name, input = %input, error = %e, "setpoint write failed")
            }
            (Ok(()), true) => {
                tracing::info!(r#loop = %self.name, input = %input, "setpoint writes work again")
            }
            _ => {}
        }
        self.write_failing[i] = result.is_err();
        result
    }

    /// Applies a command between ticks; it shows in the next tick's decisions.
    async fn apply(&mut self, command: Command) {
        match command {
            Command::SetMode { mode, actor, reply } => {
                let from = self.control.mode();
                let was_dithering = self.control.dithering();
                let was_testing = self.control.state() == State::Testing;
                if let Err(refused) = self.control.ask(mode) {
                    let _ = reply.send(Err(CommandError::Conflict(format!(
                        "loop {} stays in fallback: {}",
                        self.name, refused.0
                    ))));
                    return;
                }
                // A loop that stops seeking takes its dither out of the PLC. (Leaving holding
                // leaves the estimate, leaving fallback the fallback value, and a loop not yet
                // restarted from the PLC the PLC's own value, where they are.)
                if was_dithering && !self.control.state().writes() {
                    self.write_estimates().await;
                }
                // A cancelled bump test puts the setpoint back where the test started.
                if was_testing && self.control.permitted() {
                    self.write_estimates().await;
                }
                if from != mode {
                    tracing::info!(r#loop = %self.name, from = %from, to = %mode, actor = %actor, "mode changed");
                    self.reporting.event(
                        Some(&self.name),
                        "mode_changed",
                        serde_json::json!({"from": from.as_str(), "to": mode.as_str()}),
                        &actor,
                    );
                }
                self.report_transitions(&actor);
                self.follow_test().await;
                self.publish();
                let _ = reply.send(Ok(self.status.borrow().clone()));
            }
            Command::BumpTest { input, step, settle_max_s, actor, reply } => {
                let started = self.start_test(input, step, settle_max_s, &actor).await;
                self.report_transitions(&actor);
                self.publish();
                let _ = reply.send(started);
            }
            Command::SetBounds { reply, .. } if self.control.state() == State::Testing => {
                let _ = reply.send(Err(CommandError::Conflict(format!(
                    "loop {} is running a bump test: change its bounds once the test has ended (or cancel it with a mode)",
                    self.name
                ))));
            }
            Command::SetBounds { input, bounds, actor, reply } => {
                let Some(before) = self.control.inputs().get(input).map(|i| i.guard.bounds) else {
                    let _ = reply.send(Err(CommandError::Conflict(format!(
                        "loop {} has no input {input}",
                        self.name
                    ))));
                    return;
                };
                self.control.set_bounds(input, bounds);
                let name = &self.config.inputs[input].name;
                tracing::info!(r#loop = %self.name, input = %name, from = %before, to = %bounds, actor = %actor, "bounds changed");
                self.reporting.event(
                    Some(&self.name),
                    "bounds_changed",
                    serde_json::json!({
                        "input": name,
                        "from": {"min": before.min, "max": before.max},
                        "to": {"min": bounds.min, "max": bounds.max},
                    }),
                    &actor,
                );
                self.publish();
                let _ = reply.send(Ok(self.status.borrow().clone()));
            }
        }
    }

    /// Writes the `on_shutdown` values of a loop that is writing (the fallback values in
    /// fallback); called once on stop. The link's backoff is ignored and each write is
    /// tried a few times, and the event says for each input whether it reached the PLC.
    pub async fn shutdown(&mut self) {
        const ATTEMPTS: usize = 3;
        let written = match self.control.shutdown_values() {
            Some(values) => {
                let mut by_input = serde_json::Map::new();
                for (i, &value) in values.iter().enumerate() {
                    let mut ok = false;
                    for attempt in 0..ATTEMPTS {
                        if attempt > 0 {
                            tokio::time::sleep(Duration::from_millis(300)).await;
                        }
                        if self.write_input(i, value, Urgency::Now).await.is_ok() {
                            ok = true;
                            break;
                        }
                    }
                    let name = &self.config.inputs[i].name;
                    if !ok {
                        tracing::error!(r#loop = %self.name, input = %name, value, "shutdown setpoint NOT written: the PLC keeps its last setpoint");
                    }
                    by_input.insert(name.clone(), serde_json::json!({"value": value, "written": ok}));
                }
                tracing::info!(r#loop = %self.name, on_shutdown = %self.config.on_shutdown, "shutdown setpoints done");
                serde_json::Value::Object(by_input)
            }
            None => serde_json::Value::Null,
        };
        if let Some((mut row, ..)) = self.test.take() {
            row.status = "aborted".into();
            row.finished_at = Some(now_ms());
            row.abort_reason = Some("the service stopped".into());
            self.save_test(async move { Some(row) });
        }
        // Bump-test saves and a fit in progress get a few seconds to land.
        if let Some(saving) = self.test_saving.take()
            && tokio::time::timeout(Duration::from_secs(10), saving).await.is_err()
        {
            tracing::warn!(r#loop = %self.name, "a bump test's result was not stored before the stop");
        }
        self.reporting.event(
            Some(&self.name),
            "loop_stopped",
            serde_json::json!({"on_shutdown": self.config.on_shutdown.as_str(), "setpoints": written}),
            "system",
        );
    }

    fn publish(&self) {
        let c = &self.control;
        // Before a loop has started it has no estimates, only what it reads (and a
        // fallback value, if it tripped meanwhile).
        let known = |v: f64| if c.is_started() { v } else { f64::NAN };
        let curvature = match c.detail() {
            Detail::Curvature(estimates) if c.is_started() => estimates,
            _ => &[],
        };
        let dwell = match c.detail() {
            Detail::Dwell(d) if c.state() == State::Seeking => Some(DwellStatus {
                input: d.input.map(|i| self.config.inputs[i].name.clone()),
                phase: d.phase.as_str(),
                ends_in_s: d.remaining_ticks as f64 * self.config.tick_s,
            }),
            _ => None,
        };
        let inputs = self
            .config
            .inputs
            .iter()
            .enumerate()
            .zip(c.inputs())
            .zip(c.applied())
            .map(|(((k, cfg), i), &applied)| InputStatus {
                name: cfg.name.clone(),
                applied,
                estimate: known(i.estimate),
                gradient: known(i.gradient),
                bounds: i.guard.bounds.into(),
                limits: cfg.limits.into(),
                safe: cfg.safe,
                curvature: curvature.get(k).copied(),
            })
            .collect();
        self.status.send_replace(LoopStatus {
            name: self.config.name.clone(),
            mode: c.mode().as_str(),
            state: c.state().as_str(),
            fallback_reason: c.tripped().map(|t| t.as_str().to_owned()),
            direction: self.config.direction.as_str(),
            method: self.config.method.kind().as_str(),
            permitted: c.permitted(),
            objective: c.objective(),
            objective_at: self.objective_at.map(rfc3339),
            ticks: c.ticks(),
            skipped_ticks: self.skipped_ticks,
            inputs,
            constraints: c
                .constraints()
                .map(|v| ConstraintStatus {
                    name: v.name.to_owned(),
                    value: v.value,
                    limit: v.limit.value(),
                    side: v.limit.side(),
                    handling: v.handling.as_str(),
                    engaged: v.engaged,
                })
                .collect(),
            penalized_objective: c.has_penalty().then(|| c.penalized_objective()),
            dwell,
        });
    }

    /// Metrics and a history sample for the tick just done.
    fn record(&self, report: &TickReport) {
        let c = &self.control;
        let started = c.is_started();
        if let Some(m) = &self.reporting.metrics {
            if let Some(j) = report.objective {
                m.objective.with_label_values(&[&*self.name]).set(j);
            }
            for ((name, i), &applied) in self.input_names.iter().zip(c.inputs()).zip(c.applied()) {
                if applied.is_finite() {
                    m.setpoint.with_label_values(&[&*self.name, name]).set(applied);
                }
                if started {
                    m.estimate.with_label_values(&[&*self.name, name]).set(i.estimate);
                    m.gradient.with_label_values(&[&*self.name, name]).set(i.gradient);
                }
            }
            m.set_state(&self.name, c.state());
            for view in c.constraints() {
                if let Some(v) = view.value {
                    m.constraint_value.with_label_values(&[&*self.name, view.name]).set(v);
                }
                m.constraint_engaged
                    .with_label_values(&[&*self.name, view.name])
                    .set(f64::from(u8::from(view.engaged)));
            }
        }
        if let Some(h) = &self.reporting.history {
            let known = |v: f64| if started { v } else { f64::NAN };
            h.sample(SampleRecord {
                loop_name: self.name.clone(),
                tick: self.last_tick.unwrap_or(0),
                at_ms: now_ms(),
                objective: report.objective,
                state: c.state().as_str().into(),
                inputs: self
                    .input_names
                    .iter()
                    .zip(c.inputs())
                    .zip(c.applied())
                    .map(|((name, i), &applied)| InputSample {
                        name: name.clone(),
                        applied,
                        estimate: known(i.estimate),
                        gradient: known(i.gradient),
                    })
                    .collect(),
                // Only an estimate that was in force is one to resume from.
                resumable: report.write && c.state() != State::Fallback,
                constraints: self
                    .constraint_names
                    .iter()
                    .zip(c.constraints())
                    .map(|(name, v)| (name.clone(), v.value.unwrap_or(f64::NAN)))
                    .collect(),
                phase: match c.detail() {
                    Detail::Dwell(d) if c.state() == State::Seeking => Some(d.phase.as_str().into()),
                    _ => None,
                },
            });
        }
    }
}

/// A job done once per tick, which may also take commands between ticks.
pub trait OnTick {
    type Command: Send;
    fn on_tick(&mut self, n: u64) -> impl Future<Output = ()> + Send;
    /// Waits for the next command; must be cancel-safe (it races the clock).
    fn next_command(&mut self) -> impl Future<Output = Self::Command> + Send;
    fn on_command(&mut self, command: Self::Command) -> impl Future<Output = ()> + Send;
    /// Where the ticks fall, as a fraction of the period (of at most [`PHASE_SPREAD`]);
    /// 0 is at once.
    fn phase(&self) -> f64 {
        0.0
    }
}

/// Loops start spread over at most this much of their period, so ten thousand loops on
/// one tick wake ten to a millisecond, not all at once; and a slow loop's first tick
/// comes within a second of the start.
pub const PHASE_SPREAD: Duration = Duration::from_secs(1);

impl OnTick for LoopTask {
    type Command = Command;

    async fn on_tick(&mut self, n: u64) {
        self.tick(n).await;
    }

    fn phase(&self) -> f64 {
        self.phase
    }

    async fn next_command(&mut self) -> Command {
        match self.commands.recv().await {
            Some(c) => c,
            // No handle is left: nobody will ever send one.
            None => std::future::pending().await,
        }
    }

    async fn on_command(&mut self, command: Command) {
        self.apply(command).await;
    }
}

/// Ticks a loop every `period` of wall time until cancelled, then writes its shutdown
/// values. Tick lateness goes to the metrics.
pub async fn run(mut task: LoopTask, period: Duration, cancel: CancellationToken) {
    let lateness =
        task.reporting.metrics.as_ref().map(|m| m.tick_lateness_seconds.with_label_values(&[task.name()]));
    schedule(
        period,
        &cancel,
        |late| {
            if let Some(h) = &lateness {
                h.observe(late.as_secs_f64());
            }
        },
        &mut task,
    )
    .await;
    task.shutdown().await;
}

/// Calls `work` with the tick index every `period` until cancelled, and hands it commands
/// as they come between ticks. A tick more than half a period late (after a stall) is
/// skipped, never queued up: the index follows the wall clock, so the dither stays in
/// phase with time, and the gap in the indices counts the skipped ticks. `observe`
/// hears the lateness of each tick that runs. The first tick comes `work.phase()` of the
/// period (of at most [`PHASE_SPREAD`]) after the call.
pub async fn schedule<W: OnTick>(
    period: Duration,
    cancel: &CancellationToken,
    mut observe: impl FnMut(Duration),
    work: &mut W,
) {
    let start = Instant::now() + period.min(PHASE_SPREAD).mul_f64(work.phase().clamp(0.0, 1.0));
    let mut interval = tokio::time::interval_at(start, period);
    interval.set_missed_tick_behavior(MissedTickBehavior::Skip);
    loop {
        tokio::select! {
            biased;
            () = cancel.cancelled() => return,
            at = interval.tick() => {
                let late = Instant::now() - at;
                // After a stall the interval hands back the missed tick once; it is
                // skipped here, so the next tick comes on the clock's next beat.
                if late > period / 2 {
                    continue;
                }
                observe(late);
                let n = ((at - start).as_secs_f64() / period.as_secs_f64()).round() as u64;
                work.on_tick(n).await;
            }
            command = work.next_command() => work.on_command(command).await,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Records tick indices, stalls at one tick, and stops after another.
    struct Recorder {
        seen: Vec<u64>,
        stall_at: u64,
        stop_at: u64,
        cancel: CancellationToken,
    }

    impl OnTick for Recorder {
        type Command = ();

        async fn next_command(&mut self) {
            std::future::pending().await
        }

        async fn on_command(&mut self, (): ()) {}

        async fn on_tick(&mut self, n: u64) {
            self.seen.push(n);
            if n == self.stall_at {
                // A stall of 2.5 periods, e.g. a link timing out.
                tokio::time::sleep(Duration::from_millis(2500)).await;
            }
            if n >= self.stop_at {
                self.cancel.cancel();
            }
        }
    }

    #[tokio::test(start_paused = true)]
    async fn ticks_follow_the_clock_and_a_stall_skips_ticks_instead_of_queueing_them() {
        let cancel = CancellationToken::new();
        let mut r = Recorder { seen: Vec::new(), stall_at: 3, stop_at: 8, cancel: cancel.clone() };
        let mut late = Vec::new();
        schedule(Duration::from_secs(1), &cancel, |d| late.push(d), &mut r).await;
        assert_eq!(r.seen, vec![0, 1, 2, 3, 6, 7, 8]);
        // Every tick that ran started on time; the stalled ones were skipped, not late.
        assert!(late.iter().all(|d| *d < Duration::from_millis(1)), "{late:?}");
    }

    /// Records when each tick comes, from its phase, and stops after three.
    struct Phased {
        phase: f64,
        started: Instant,
        at: Vec<Duration>,
        cancel: CancellationToken,
    }

    impl OnTick for Phased {
        type Command = ();

        async fn next_command(&mut self) {
            std::future::pending().await
        }

        async fn on_command(&mut self, (): ()) {}

        fn phase(&self) -> f64 {
            self.phase
        }

        async fn on_tick(&mut self, _n: u64) {
            self.at.push(self.started.elapsed());
            if self.at.len() == 3 {
                self.cancel.cancel();
            }
        }
    }

    #[tokio::test(start_paused = true)]
    async fn a_phase_puts_the_ticks_that_share_of_the_period_later_up_to_a_second() {
        for (period, phase, first) in [(500, 0.5, 250), (2000, 0.25, 250), (10_000, 0.5, 500)] {
            let (period, first) = (Duration::from_millis(period), Duration::from_millis(first));
            let cancel = CancellationToken::new();
            let mut p = Phased { phase, started: Instant::now(), at: Vec::new(), cancel: cancel.clone() };
            schedule(period, &cancel, |_| {}, &mut p).await;
            assert_eq!(p.at, vec![first, first + period, first + 2 * period]);
        }
    }
}
