//! The decisions of one loop, free of I/O and clocks: from what was read at a tick (and
//! the time, passed in), the watchdog's verdict, the state, what the core does and what
//! is written. Shared by the live loop and the rehearsal.

use crate::config::{LoopConfig, Mode, OnShutdown, OnTrip, Range};
use crate::expr::Expr;
use crate::seek::guard::{ObjectiveFault, check_objective};
use crate::seek::{GuardActions, InputState, Seeker};

use super::bump::Staircase;
use super::constraints::{Change, ConstraintView, Constraints};
use super::states::{Effect, Event, Machine, StillFaulty};
pub use super::states::{State, Trip};

/// What was read at a tick.
#[derive(Debug, Clone, Copy)]
pub struct Reading<'a> {
    /// The loop's tags in [`Control::tag_names`] order (the objective's first); `None`
    /// when the read failed.
    pub tags: Option<&'a [f64]>,
    pub permit: Permit,
}

/// The PLC's permission to write, as read at a tick.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Permit {
    /// The loop has no permit tag: it may always write.
    NotConfigured,
    /// The permit tag's value: permission while it is finite and not zero.
    Reads(f64),
    /// The permit tag could not be read. The last value read stands for `stale_after_s`;
    /// after that the loop trips (`stale`), and writes nothing until a permit is read
    /// again: an unreadable permit is a fault of the link, not the PLC saying no.
    Unreadable,
}

/// Why the state changed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Cause {
    Tripped(Trip),
    /// Automatically, after `recover_after_s` of healthy ticks.
    Recovered,
    PermitWithdrawn,
    PermitGranted,
    /// The permit tag could not be read for `stale_after_s`.
    PermitLost,
    /// An operator asked for a mode.
    Asked(Mode),
    /// An operator asked for a mode once the fault had cleared, which ended the trip.
    Acknowledged(Mode),
    /// An operator started a bump test.
    TestStarted,
    /// The bump test's staircase is done.
    TestDone,
    /// A back-off constraint engaged during a bump test, which ends it.
    ConstraintEngaged,
}

impl Cause {
    pub fn describe(self) -> String {
        match self {
            Cause::Tripped(t) => format!("tripped: {}", t.as_str()),
            Cause::Recovered => "recovered after a healthy interval".into(),
            Cause::PermitWithdrawn => "the PLC withdrew permission".into(),
            Cause::PermitGranted => "the PLC granted permission".into(),
            Cause::PermitLost => "the permit tag cannot be read".into(),
            Cause::Asked(m) => format!("{m} asked for"),
            Cause::Acknowledged(m) => format!("{m} asked for once the fault had cleared"),
            Cause::TestStarted => "a bump test started".into(),
            Cause::TestDone => "the bump test is done".into(),
            Cause::ConstraintEngaged => "a back_off constraint engaged: the loop backs off instead".into(),
        }
    }
}

/// A change of state, for events and logs.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Transition {
    pub from: State,
    pub to: State,
    pub cause: Cause,
}

/// What happened in one tick.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TickReport {
    /// Write every input's [`Control::applied`] value now.
    pub write: bool,
    /// The objective as evaluated from the tags; `None` when the read failed.
    pub objective: Option<f64>,
    /// Why the objective was kept from the core, if it was.
    pub fault: Option<ObjectiveFault>,
    pub guard: GuardActions,
}

/// Why a mode change was refused: the fault that keeps the loop in fallback.
#[derive(Debug, Clone, PartialEq)]
pub struct Refused(pub String);

/// Why a bump test cannot start.
#[derive(Debug, Clone, PartialEq)]
pub enum TestRefused {
    /// Not in this state (an HTTP 409).
    Conflict(String),
    /// A level would leave the input's bounds (an HTTP 422).
    OutOfBounds(String),
}

/// How a bump test ended.
#[derive(Debug, Clone, PartialEq)]
pub enum TestOutcome {
    Done,
    /// Why it was cut short: a trip, the permit, an operator's request.
    Aborted(String),
}

/// A bump test that has ended, with everything it recorded.
#[derive(Debug, Clone)]
pub struct FinishedTest {
    pub staircase: Staircase,
    pub outcome: TestOutcome,
}

/// One loop's watchdog, state, core and estimates.
#[derive(Debug)]
pub struct Control {
    objective: Expr,
    constraints: Constraints,
    /// The constraint whose value was not a finite number at the last tick, if any.
    constraint_not_finite: Option<usize>,
    /// The objective the core saw at the last tick, penalties included.
    penalized: Option<f64>,
    plausible: Option<Range>,
    stale_after_s: f64,
    on_trip: OnTrip,
    on_shutdown: OnShutdown,
    safe: Vec<f64>,
    seeker: Seeker,
    machine: Machine,
    started: bool,
    /// A (re)start from the setpoints in the PLC is due; nothing is written until then.
    wants_read_back: bool,
    /// The filters start again at the next seeking step (after a pause or a fault).
    restart_filters: bool,
    objective_value: Option<f64>,
    last_read_s: f64,
    /// When the permit tag was last read (at first: when the loop was made, so a permit
    /// that is never read trips like a stale objective).
    permit_read_s: f64,
    /// Whether a permit read within `stale_after_s` stands (or the loop has no permit
    /// tag). Nothing is written without one, not even the fallback.
    permit_known: bool,
    /// Whether the permit tag has gone unread for `stale_after_s` (a fault).
    permit_stale: bool,
    /// Since when the setpoint registers have been failing (writes, or the read-back a
    /// start waits for), while the loop means to write.
    failing_since_s: Option<f64>,
    healthy_since_s: Option<f64>,
    fault: Option<Trip>,
    /// What is written this tick (or was last).
    applied: Vec<f64>,
    transitions: Vec<Transition>,
    ticks: u64,
    tick_s: f64,
    max_rates: Vec<f64>,
    /// The bump test running (in state `testing`).
    test: Option<Staircase>,
    /// A bump test that has ended, until the task takes it.
    finished_test: Option<FinishedTest>,
}

impl Control {
    /// A loop that has not started: it writes nothing until [`Control::start`].
    pub fn new(config: &LoopConfig) -> Self {
        let safe: Vec<f64> = config.inputs.iter().map(|i| i.safe).collect();
        let w = &config.watchdog;
        Control {
            objective: config.objective.clone(),
            constraints: Constraints::new(config),
            constraint_not_finite: None,
            penalized: None,
            plausible: w.objective_range,
            stale_after_s: w.stale_after_s,
            on_trip: w.on_trip,
            on_shutdown: config.on_shutdown,
            seeker: Seeker::for_loop(config, &safe),
            applied: vec![f64::NAN; safe.len()],
            safe,
            machine: Machine::new(config.start_mode, w.recover, w.recover_after_s.unwrap_or(f64::INFINITY)),
            started: false,
            wants_read_back: false,
            restart_filters: true,
            objective_value: None,
            last_read_s: 0.0,
            permit_read_s: 0.0,
            permit_known: config.permit.is_none(),
            permit_stale: false,
            failing_since_s: None,
            healthy_since_s: None,
            fault: None,
            transitions: Vec::new(),
            ticks: 0,
            tick_s: config.tick_s,
            max_rates: config.inputs.iter().map(|i| i.max_rate_per_s).collect(),
            test: None,
            finished_test: None,
        }
    }

    /// Starts at `now_s` from these estimates (chosen with `seek::guard::starting_point`).
    pub fn start(&mut self, now_s: f64, estimates: &[f64]) {
        self.seeker.reset_estimates(estimates);
        self.applied = self.seeker.inputs().iter().map(|i| i.applied).collect();
        self.started = true;
        self.wants_read_back = false;
        self.restart_filters = true;
        self.last_read_s = now_s;
        self.failing_since_s = None;
    }

    pub fn is_started(&self) -> bool {
        self.started
    }

    /// Whether the PLC holds this loop's dithered setpoints: it is seeking, and has been
    /// writing since its last (re)start from the PLC. Only then is there dither to take
    /// out when it stops seeking.
    pub fn dithering(&self) -> bool {
        self.started && self.machine.state == State::Seeking && !self.wants_read_back
    }

    /// Whether the loop waits for the setpoints in the PLC before writing again (after
    /// permission returned, a recovery, or a mode that starts writing).
    pub fn wants_read_back(&self) -> bool {
        self.started && self.wants_read_back
    }

    /// Restarts bumpless from the setpoints read back from the PLC (each one inside its
    /// bounds; any other gives way to `safe`), with the filters re-initialised.
    pub fn restart_from(&mut self, read_back: &[Option<f64>]) {
        let estimates: Vec<f64> = self
            .seeker
            .inputs()
            .iter()
            .zip(&self.safe)
            .enumerate()
            .map(|(i, (input, &safe))| {
                crate::seek::guard::initial_estimate(
                    read_back.get(i).copied().flatten(),
                    input.guard.bounds,
                    safe,
                )
            })
            .collect();
        self.seeker.reset_estimates(&estimates);
        self.wants_read_back = false;
        self.restart_filters = true;
    }

    /// The watchdog's verdict at `now_s`, given what is wrong with this tick's objective:
    /// the first fault that holds, if any. A permit that does not stand is stale too.
    fn fault_at(&self, now_s: f64, objective: Option<ObjectiveFault>) -> Option<Trip> {
        if now_s - self.last_read_s >= self.stale_after_s || self.permit_stale {
            return Some(Trip::Stale);
        }
        match objective {
            Some(ObjectiveFault::NotFinite | ObjectiveFault::ConstraintNotFinite) => {
                return Some(Trip::NotFinite);
            }
            Some(ObjectiveFault::OutOfRange) => return Some(Trip::OutOfRange),
            None => {}
        }
        match self.failing_since_s {
            Some(since) if now_s - since >= self.stale_after_s => Some(Trip::WriteFailed),
            _ => None,
        }
    }

    fn handle(&mut self, event: Event, cause: Cause) -> Result<(), StillFaulty> {
        let from = self.machine.state;
        let tripped_before = self.machine.tripped;
        let effect = self.machine.on(event, self.fault)?;
        let cause = match (effect, cause) {
            // A trip is recorded as such also when it only latches (without permission).
            (Effect::Latch(trip), _) => Cause::Tripped(trip),
            (_, Cause::Asked(mode)) if tripped_before.is_some() && self.machine.tripped.is_none() => {
                Cause::Acknowledged(mode)
            }
            _ => cause,
        };
        if matches!(effect, Effect::Recover | Effect::Restart) {
            self.wants_read_back = true;
            self.restart_filters = true;
        }
        if from == State::Testing
            && self.machine.state != State::Testing
            && let Some(staircase) = self.test.take()
        {
            let outcome = match cause {
                Cause::TestDone => TestOutcome::Done,
                Cause::Asked(_) | Cause::Acknowledged(_) => {
                    TestOutcome::Aborted(format!("cancelled: {}", cause.describe()))
                }
                other => TestOutcome::Aborted(other.describe()),
            };
            self.finished_test = Some(FinishedTest { staircase, outcome });
        }
        if self.machine.state != from || self.machine.tripped != tripped_before {
            self.transitions.push(Transition { from, to: self.machine.state, cause });
            if self.machine.state != State::Seeking {
                self.restart_filters = true;
            }
        }
        Ok(())
    }

    /// Takes in this tick's permit: whether one stands, and the event it makes, if any
    /// (the PLC's answer changed, or no answer has stood for `stale_after_s`).
    fn read_permit(&mut self, now_s: f64, permit: Permit) -> Option<(Event, Cause)> {
        match permit {
            Permit::NotConfigured => {
                (self.permit_known, self.permit_stale) = (true, false);
                None
            }
            Permit::Reads(v) => {
                self.permit_read_s = now_s;
                (self.permit_known, self.permit_stale) = (true, false);
                match (v.is_finite() && v != 0.0, self.machine.permitted) {
                    (true, false) => Some((Event::PermitGranted, Cause::PermitGranted)),
                    (false, true) => Some((Event::PermitWithdrawn, Cause::PermitWithdrawn)),
                    _ => None,
                }
            }
            Permit::Unreadable => {
                self.permit_stale = now_s - self.permit_read_s >= self.stale_after_s;
                self.permit_known &= !self.permit_stale;
                self.permit_stale.then_some((Event::PermitLost, Cause::PermitLost))
            }
        }
    }

    /// One tick at tick index `tick` and time `now_s` (seconds, any origin). The watchdog
    /// runs from the first tick, also while the loop waits to start: a loop that cannot
    /// read its objective or its setpoints trips like a running one.
    pub fn tick(&mut self, tick: u64, now_s: f64, reading: Reading<'_>) -> TickReport {
        self.ticks += 1;
        let n = self.objective.names().len();
        let objective = reading.tags.map(|values| self.objective.eval(&values[..n.min(values.len())]));
        self.objective_value = objective;
        self.constraint_not_finite = match reading.tags {
            Some(values) => {
                self.last_read_s = now_s;
                self.constraints.evaluate(values)
            }
            None => {
                self.constraints.forget();
                None
            }
        };
        // A constraint that cannot be judged trips the loop like the objective.
        let constraints_ok = match self.constraint_not_finite {
            Some(_) => Err(ObjectiveFault::ConstraintNotFinite),
            None => Ok(()),
        };
        let checked = match objective {
            Some(j) => {
                check_objective(j, self.plausible).and_then(|j| constraints_ok.map(|()| j)).map_err(Some)
            }
            None => Err(None),
        };
        // On the loop's own time grid, like a bump test: a cycle of the method is counted
        // in ticks, also when the service runs faster than real time.
        self.constraints.judge(self.test_time_s(tick));
        let objective_fault = checked.err().flatten();
        self.penalized = None;
        let quiet =
            TickReport { write: false, objective, fault: objective_fault, guard: GuardActions::default() };
        let permit_event = self.read_permit(now_s, reading.permit);
        self.fault = self.fault_at(now_s, objective_fault);
        if let Some((event, cause)) = permit_event {
            // Permit events are never refused.
            let _ = self.handle(event, cause);
        }
        match self.fault {
            Some(trip) => {
                self.healthy_since_s = None;
                let _ = self.handle(Event::Fault(trip), Cause::Tripped(trip));
            }
            // Only a tick that read and wrote what it should counts towards recovery.
            None if reading.tags.is_none() || self.failing_since_s.is_some() => self.healthy_since_s = None,
            None => {
                let since = *self.healthy_since_s.get_or_insert(now_s);
                let _ = self.handle(Event::Healthy { healthy_s: now_s - since }, Cause::Recovered);
            }
        }
        let state = self.machine.state;
        if !state.writes() {
            // Failures of a loop that no longer writes say nothing about its next writes.
            self.failing_since_s = None;
        }
        // Without a permit that stands, a writing state waits like one without a starting point.
        let waiting = !self.started || (state.writes() && (self.wants_read_back || !self.permit_known));
        let report = match (state, checked) {
            (State::Stopped | State::NoPermit, _) => quiet,
            (State::Fallback, _) if !self.permit_known => quiet,
            // The fallback is written while waiting for a starting point too: it needs none.
            (State::Fallback, _) => match self.fallback() {
                Some(guard) => TickReport { write: true, guard, ..quiet },
                None => quiet,
            },
            (_, _) if waiting => quiet,
            (State::Holding, _) => TickReport { write: true, guard: self.seeker.hold(), ..quiet },
            // A test must not push past a limit the loop keeps to: it ends, and the
            // back-off walks from the next tick, once the loop has read its setpoints back.
            (State::Testing, _) if self.constraints.backing_off() => {
                let _ = self.handle(Event::TestEnd, Cause::ConstraintEngaged);
                quiet
            }
            // The other inputs hold their estimates; the tested one follows the staircase.
            (State::Testing, _) => {
                let guard = self.seeker.hold();
                let at_s = self.test_time_s(tick);
                let next = self.test.as_mut().and_then(|t| Some((t.input, t.tick(at_s, checked.ok())?)));
                match next {
                    Some((input, setpoint)) => {
                        self.applied = self.seeker.inputs().iter().map(|i| i.applied).collect();
                        // The levels were checked against the bounds; this holds them anyway.
                        self.applied[input] = self.seeker.inputs()[input].guard.clamp(setpoint);
                        TickReport { write: true, guard, ..quiet }
                    }
                    None => {
                        let _ = self.handle(Event::TestEnd, Cause::TestDone);
                        quiet
                    }
                }
            }
            (State::Seeking | State::Observing, Ok(j)) => {
                let guard = match self.constraints.walk() {
                    // A back-off walks (or holds) without dither; seeking starts afresh after.
                    Some(walk) => {
                        self.restart_filters = true;
                        self.seeker.walk(walk)
                    }
                    None => {
                        if std::mem::take(&mut self.restart_filters) {
                            self.seeker.restart();
                        }
                        let seen = self.constraints.penalized(j);
                        self.penalized = Some(seen);
                        self.seeker.step(tick, seen)
                    }
                };
                TickReport { write: state == State::Seeking, guard, ..quiet }
            }
            // Nothing trustworthy to seek on: hold the estimate without dither, and start
            // the filters again once readings are good.
            (State::Seeking | State::Observing, Err(_)) => {
                self.restart_filters = true;
                TickReport { write: state == State::Seeking, guard: self.seeker.hold(), ..quiet }
            }
        };
        if report.write && !matches!(state, State::Fallback | State::Testing) {
            self.applied = self.seeker.inputs().iter().map(|i| i.applied).collect();
        }
        report
    }

    /// Sets the fallback setpoints (`safe`, or the estimate held, each inside the bounds);
    /// `None` when there is nothing to write: a loop that holds but never started has no
    /// estimate to hold.
    fn fallback(&mut self) -> Option<GuardActions> {
        let values = self.fallback_values()?;
        self.applied = values;
        Some(match self.on_trip {
            OnTrip::Hold => self.seeker.hold(),
            OnTrip::Safe => GuardActions::default(),
        })
    }

    fn fallback_values(&self) -> Option<Vec<f64>> {
        if self.on_trip == OnTrip::Hold && !self.started {
            return None;
        }
        let values = self
            .seeker
            .inputs()
            .iter()
            .zip(&self.safe)
            .map(|(input, &safe)| match self.on_trip {
                OnTrip::Safe => input.guard.clamp(safe),
                OnTrip::Hold => input.guard.clamp(input.estimate),
            })
            .collect();
        Some(values)
    }

    /// Whether `safe` lies outside an input's current bounds (fallback then writes the
    /// nearest bound).
    pub fn safe_outside_bounds(&self) -> Vec<bool> {
        self.seeker.inputs().iter().zip(&self.safe).map(|(i, &s)| !i.guard.bounds.contains(s)).collect()
    }

    /// Tells the watchdog whether the setpoint registers answered this tick: the writes,
    /// or the read-back that a start or a restart waits for.
    pub fn note_setpoints(&mut self, all_ok: bool, now_s: f64) {
        if all_ok {
            self.failing_since_s = None;
        } else {
            self.failing_since_s.get_or_insert(now_s);
            // The plant did not get this tick's dithered setpoint.
            self.restart_filters = true;
        }
    }

    /// An operator asks for `mode`. From fallback this is the acknowledgement, refused
    /// while the fault that tripped the loop (or any other) still holds.
    pub fn ask(&mut self, mode: Mode) -> Result<(), Refused> {
        self.handle(Event::Ask(mode), Cause::Asked(mode))
            .map_err(|StillFaulty(trip)| Refused(self.describe(trip)))
    }

    /// A sentence naming a fault that holds.
    fn describe(&self, trip: Trip) -> String {
        match trip {
            Trip::Stale if self.permit_stale => {
                format!("the permit tag has not been read for {} s or more", self.stale_after_s)
            }
            Trip::Stale => {
                format!("the objective's tags have not been read for {} s or more", self.stale_after_s)
            }
            Trip::NotFinite => match self.constraint_not_finite {
                Some(k) => {
                    format!("the value of constraint `{}` is not a finite number", self.constraints.name(k))
                }
                None => "the objective is not a finite number".into(),
            },
            Trip::OutOfRange => match (self.objective_value, self.plausible) {
                (Some(j), Some(r)) => format!("the objective {j} is outside its plausible range {r}"),
                _ => "the objective is outside its plausible range".into(),
            },
            Trip::WriteFailed => format!(
                "the setpoint registers have not taken a write (or answered a read-back) for {} s or more",
                self.stale_after_s
            ),
        }
    }

    /// Starts a bump test on `input` with every input starting from `starts` (the
    /// estimates of a writing loop, else the setpoints read back from the PLC): the loop
    /// is `testing` from the next tick. Returns the four levels.
    pub fn start_test(
        &mut self,
        input: usize,
        step: f64,
        settle_max_s: f64,
        starts: &[f64],
        tick: u64,
    ) -> Result<[f64; 4], TestRefused> {
        let conflict = |why: &str| Err(TestRefused::Conflict(why.to_owned()));
        match self.machine.state {
            _ if !self.started => return conflict("the loop has not started yet"),
            _ if self.wants_read_back => {
                return conflict("the loop is reading its setpoints back from the PLC; try again");
            }
            State::Testing => return conflict("a bump test is already running on this loop"),
            State::Fallback => return conflict("the loop is in fallback: acknowledge the trip first"),
            State::NoPermit => return conflict("the PLC does not permit this loop to write"),
            State::Stopped => {
                return conflict("the loop is stopped: put it in observing, holding or seeking first");
            }
            _ if !self.permitted() => return conflict("the PLC's permission to write does not stand"),
            _ => {}
        }
        let (Some(state), Some(&u0)) = (self.seeker.inputs().get(input), starts.get(input)) else {
            return conflict("the loop has no such input");
        };
        if starts.len() != self.seeker.inputs().len() || starts.iter().any(|s| !s.is_finite()) {
            return conflict("the setpoints in the PLC are not all known numbers");
        }
        // The other inputs hold where they stand: each must stand inside its bounds, or
        // holding it would move it.
        for (i, (state, &start)) in self.seeker.inputs().iter().zip(starts).enumerate() {
            if i != input && !state.guard.bounds.contains(start) {
                return Err(TestRefused::OutOfBounds(format!(
                    "another input of the loop (number {}) stands at {}, outside its bounds {}: a test would move it",
                    i + 1,
                    crate::config::show(start),
                    state.guard.bounds
                )));
            }
        }
        if !(self.max_rates[input] > 0.0 && self.max_rates[input].is_finite()) {
            return conflict("the input has no usable rate limit");
        }
        let bounds = state.guard.bounds;
        for (name, level) in [("u0", u0), ("u0 + step", u0 + step), ("u0 - step", u0 - step)] {
            if level > bounds.max {
                return Err(TestRefused::OutOfBounds(format!(
                    "{name} = {} is above the upper bound {} (bounds {bounds})",
                    crate::config::show(level),
                    crate::config::show(bounds.max)
                )));
            }
            if level < bounds.min {
                return Err(TestRefused::OutOfBounds(format!(
                    "{name} = {} is below the lower bound {} (bounds {bounds})",
                    crate::config::show(level),
                    crate::config::show(bounds.min)
                )));
            }
        }
        // The estimates become where the test starts, so that a cancel restores it and the
        // other inputs hold where they are.
        self.seeker.reset_estimates(starts);
        let staircase = Staircase::new(
            input,
            u0,
            step,
            self.max_rates[input],
            self.tick_s,
            settle_max_s,
            self.test_time_s(tick),
        );
        let levels = staircase.targets();
        let _ = self.handle(Event::TestStart, Cause::TestStarted);
        if self.machine.state != State::Testing {
            return conflict("the loop cannot start a test in its state");
        }
        self.test = Some(staircase);
        Ok(levels)
    }

    /// A bump test's clock: the tick index times the tick, so that its record is on the
    /// loop's time grid, and in plant time when the service runs faster than real time.
    pub fn test_time_s(&self, tick: u64) -> f64 {
        tick as f64 * self.tick_s
    }

    /// The bump test running, if any.
    pub fn test(&self) -> Option<&Staircase> {
        self.test.as_ref()
    }

    /// A bump test that has ended since last asked.
    pub fn take_finished_test(&mut self) -> Option<FinishedTest> {
        self.finished_test.take()
    }

    /// The state changes since last asked, oldest first.
    pub fn take_transitions(&mut self) -> Vec<Transition> {
        std::mem::take(&mut self.transitions)
    }

    /// Starts the filters again at the next seeking tick, after a gap in the ticks.
    pub fn restart_filters(&mut self) {
        self.restart_filters = true;
    }

    /// Changes an input's operating bounds; the estimate walks into them at the rate limit.
    pub fn set_bounds(&mut self, input: usize, bounds: Range) {
        self.seeker.set_bounds(input, bounds);
    }

    pub fn mode(&self) -> Mode {
        self.machine.mode
    }

    pub fn state(&self) -> State {
        self.machine.state
    }

    /// The remembered trip, while there is one.
    pub fn tripped(&self) -> Option<Trip> {
        self.machine.tripped
    }

    /// Whether the PLC's permission stands: its last answer was yes, read within
    /// `stale_after_s` (always, for a loop without a permit tag).
    pub fn permitted(&self) -> bool {
        self.machine.permitted && self.permit_known
    }

    /// What the method shows beyond the gradients (Newton's curvature, stepwise's dwell).
    pub fn detail(&self) -> crate::seek::Detail<'_> {
        self.seeker.detail()
    }

    pub fn inputs(&self) -> &[InputState] {
        self.seeker.inputs()
    }

    /// What each input is written (or was last).
    pub fn applied(&self) -> &[f64] {
        &self.applied
    }

    pub fn objective(&self) -> Option<f64> {
        self.objective_value
    }

    /// Every tag the loop reads, in the order [`Reading::tags`] holds them: the
    /// objective's names, then those only its constraints use.
    pub fn tag_names(&self) -> &[String] {
        self.constraints.tag_names()
    }

    /// The objective the core saw at the last seeking tick, worsened by the penalties of
    /// constraints past their limits; `None` when the core did not step.
    pub fn penalized_objective(&self) -> Option<f64> {
        self.penalized
    }

    /// Whether any constraint is handled by a penalty.
    pub fn has_penalty(&self) -> bool {
        self.constraints.has_penalty()
    }

    /// Each constraint as it stands, in config order.
    pub fn constraints(&self) -> impl ExactSizeIterator<Item = ConstraintView<'_>> + '_ {
        self.constraints.views()
    }

    /// The constraints engaged or released since last asked, oldest first.
    pub fn take_constraint_changes(&mut self) -> Vec<Change> {
        self.constraints.take_changes()
    }

    pub fn ticks(&self) -> u64 {
        self.ticks
    }

    /// What to write when the service stops: in fallback the fallback values; else the
    /// estimates without dither or `safe` (each inside its bounds); `None` for a loop that
    /// is not writing.
    pub fn shutdown_values(&self) -> Option<Vec<f64>> {
        if !self.permit_known {
            return None;
        }
        if self.machine.state == State::Fallback {
            return self.fallback_values();
        }
        if !self.started || !self.machine.state.writes() {
            return None;
        }
        Some(
            self.seeker
                .inputs()
                .iter()
                .zip(&self.safe)
                .map(|(input, &safe)| match self.on_shutdown {
                    OnShutdown::Hold => input.guard.clamp(input.estimate),
                    OnShutdown::Safe => input.guard.clamp(safe),
                })
                .collect(),
        )
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn config(mode: &str, watchdog: &str) -> LoopConfig {
        let text = format!(
            "[links.plc]\nmodbus_tcp = \"127.0.0.1:5020\"\n[tags.y]\nlink = \"plc\"\ninput_register = 0\ntype = \"f32\"\n\
             [[loops]]\nname = \"l\"\nobjective = \"y\"\ndirection = \"maximize\"\ntick_s = 1.0\nstart_mode = \"{mode}\"\n\
             on_shutdown = \"safe\"\n[loops.filter]\nhighpass_hz = 0.01\n[loops.watchdog]\nstale_after_s = 5\n\
             objective_range = [0, 100]\n{watchdog}\n[[loops.inputs]]\nname = \"u\"\n\
             write = {{ link = \"plc\", holding_register = 0, type = \"f32\" }}\nlimits = [0, 6]\nbounds = [1, 5]\n\
             safe = 2\nmax_rate_per_s = 1\ndither_amplitude = 0.1\ndither_period_s = 20\ngain = 0.01\n"
        );
        crate::config::parse(&text, "test").expect("valid").loops.remove(0)
    }

    fn good(values: &[f64]) -> Reading<'_> {
        Reading { tags: Some(values), permit: Permit::NotConfigured }
    }

    #[test]
    fn a_loop_writes_nothing_before_it_has_a_starting_point() {
        let mut c = Control::new(&config("seeking", ""));
        assert!(!c.tick(0, 0.0, good(&[10.0])).write);
        c.start(0.0, &[3.0]);
        assert!(c.tick(1, 1.0, good(&[10.0])).write);
        assert_eq!(c.inputs()[0].estimate, 3.0);
    }

    #[test]
    fn observing_computes_but_never_writes_and_stopped_does_neither() {
        let mut c = Control::new(&config("observing", ""));
        c.start(0.0, &[3.0]);
        for n in 0..50 {
            assert!(!c.tick(n, n as f64, good(&[10.0 + n as f64 * 0.1])).write);
        }
        assert_ne!(c.inputs()[0].applied, 3.0, "the dither is computed");
        c.ask(Mode::Stopped).unwrap();
        let before = c.inputs()[0];
        assert!(!c.tick(50, 50.0, good(&[1.0])).write);
        assert_eq!(c.inputs()[0], before);
    }

    #[test]
    fn a_stale_objective_trips_to_safe_after_stale_after_s() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, good(&[10.0]));
        for n in 1..5 {
            let r = c.tick(n, n as f64, Reading { tags: None, permit: Permit::NotConfigured });
            assert_eq!(c.state(), State::Seeking, "tick {n}");
            assert!(r.write);
        }
        let r = c.tick(5, 5.0, Reading { tags: None, permit: Permit::NotConfigured });
        assert_eq!(c.state(), State::Fallback);
        assert_eq!(c.tripped(), Some(Trip::Stale));
        assert!(r.write);
        assert_eq!(c.applied(), &[2.0], "safe, at once");
        let t = c.take_transitions();
        assert_eq!(
            t,
            vec![Transition {
                from: State::Seeking,
                to: State::Fallback,
                cause: Cause::Tripped(Trip::Stale)
            }]
        );
    }

    #[test]
    fn an_implausible_or_non_finite_objective_trips_at_once() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, good(&[500.0]));
        assert_eq!(c.tripped(), Some(Trip::OutOfRange));
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, good(&[f64::NAN]));
        assert_eq!(c.tripped(), Some(Trip::NotFinite));
        assert!(c.applied().iter().all(|v| v.is_finite()));
    }

    #[test]
    fn manual_recovery_is_refused_while_the_fault_holds_and_restarts_bumpless_after() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, good(&[500.0]));
        let refused = c.ask(Mode::Seeking).unwrap_err();
        assert!(refused.0.contains("outside its plausible range"), "{refused:?}");
        c.tick(1, 1.0, good(&[50.0]));
        assert_eq!(c.state(), State::Fallback, "manual: healthy readings alone do not recover");
        c.ask(Mode::Seeking).unwrap();
        assert_eq!(c.state(), State::Seeking);
        assert!(c.wants_read_back());
        assert!(!c.tick(2, 2.0, good(&[50.0])).write, "nothing is written before the read-back");
        c.restart_from(&[Some(2.0)]);
        assert!(c.tick(3, 3.0, good(&[50.0])).write);
        assert!((c.inputs()[0].estimate - 2.0).abs() < 1e-9, "restarted from what the PLC holds");
    }

    #[test]
    fn automatic_recovery_returns_after_the_healthy_interval() {
        let mut c = Control::new(&config("holding", "recover = \"auto\"\nrecover_after_s = 10"));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, good(&[500.0]));
        assert_eq!(c.state(), State::Fallback);
        for n in 1..11 {
            c.tick(n, n as f64, good(&[50.0]));
            assert_eq!(c.state(), State::Fallback, "tick {n}");
        }
        c.tick(11, 11.0, good(&[50.0]));
        assert_eq!(c.state(), State::Holding);
    }

    #[test]
    fn without_permission_nothing_is_written_and_its_return_restarts_from_the_plc() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        for n in 0..5 {
            let r = c.tick(n, n as f64, Reading { tags: Some(&[10.0]), permit: Permit::Reads(0.0) });
            assert!(!r.write);
            assert_eq!(c.state(), State::NoPermit);
        }
        c.tick(5, 5.0, Reading { tags: Some(&[10.0]), permit: Permit::Reads(1.0) });
        assert_eq!(c.state(), State::Seeking);
        assert!(c.wants_read_back());
    }

    #[test]
    fn failed_writes_trip_after_stale_after_s() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        for n in 0..6 {
            c.tick(n, n as f64, good(&[10.0]));
            c.note_setpoints(false, n as f64);
        }
        assert_eq!(c.tripped(), Some(Trip::WriteFailed));
    }

    #[test]
    fn fallback_writes_the_nearest_bound_when_the_bounds_exclude_safe() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        c.set_bounds(0, Range { min: 2.5, max: 5.0 });
        c.tick(0, 0.0, good(&[f64::NAN]));
        assert_eq!(c.applied(), &[2.5]);
        assert_eq!(c.safe_outside_bounds(), vec![true]);
    }

    #[test]
    fn a_loop_that_cannot_start_trips_like_a_running_one_and_writes_safe_while_it_waits() {
        let mut c = Control::new(&config("seeking", ""));
        for n in 0..5 {
            assert!(!c.tick(n, n as f64, Reading { tags: None, permit: Permit::NotConfigured }).write);
        }
        let r = c.tick(5, 5.0, Reading { tags: None, permit: Permit::NotConfigured });
        assert_eq!((c.state(), c.tripped()), (State::Fallback, Some(Trip::Stale)));
        assert!(r.write, "safe is written (and retried) before any starting point is known");
        assert_eq!(c.applied(), &[2.0]);
        assert_eq!(c.shutdown_values(), Some(vec![2.0]));

        let mut c = Control::new(&config("seeking", "on_trip = \"hold\""));
        let r = c.tick(5, 5.0, Reading { tags: None, permit: Permit::NotConfigured });
        assert_eq!(c.state(), State::Fallback);
        assert!(!r.write, "a loop that never started has no estimate to hold");
        assert_eq!(c.shutdown_values(), None);
    }

    #[test]
    fn setpoints_that_cannot_be_read_back_trip_with_write_failed() {
        let mut c = Control::new(&config("seeking", ""));
        for n in 0..6 {
            c.note_setpoints(false, n as f64);
            c.tick(n, n as f64, good(&[10.0]));
        }
        assert_eq!(c.tripped(), Some(Trip::WriteFailed));
        assert!(c.ask(Mode::Seeking).unwrap_err().0.contains("read-back"));
    }

    #[test]
    fn a_loop_that_stopped_writing_does_not_trip_on_its_old_write_failures() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, good(&[10.0]));
        c.note_setpoints(false, 0.0);
        c.ask(Mode::Observing).unwrap();
        for n in 1..20 {
            c.tick(n, n as f64, good(&[10.0]));
        }
        c.ask(Mode::Seeking).unwrap();
        c.tick(20, 20.0, good(&[10.0]));
        assert_eq!(c.state(), State::Seeking);
    }

    /// A loop whose PLC grants permission through tag `ok`.
    fn with_permit(mode: &str) -> LoopConfig {
        let mut c = config(mode, "");
        c.permit = Some("ok".into());
        c
    }

    fn permit(tags: Option<&[f64]>, permit: Permit) -> Reading<'_> {
        Reading { tags, permit }
    }

    #[test]
    fn an_unreadable_permit_stands_for_stale_after_s_then_trips_and_nothing_is_written_until_it_reads() {
        let mut c = Control::new(&with_permit("seeking"));
        c.start(0.0, &[3.0]);
        assert!(c.tick(0, 0.0, permit(Some(&[10.0]), Permit::Reads(1.0))).write);
        for n in 1..5 {
            let r = c.tick(n, n as f64, permit(Some(&[10.0]), Permit::Unreadable));
            assert_eq!(c.state(), State::Seeking, "tick {n}");
            assert!(r.write, "the last permit read stands (tick {n})");
        }
        for n in 5..8 {
            let r = c.tick(n, n as f64, permit(Some(&[10.0]), Permit::Unreadable));
            assert_eq!(
                (c.state(), c.tripped()),
                (State::Fallback, Some(Trip::Stale)),
                "a fault, not a refusal"
            );
            assert!(!r.write, "nothing is written while no permit stands (tick {n})");
            assert!(!c.permitted());
            assert_eq!(c.shutdown_values(), None);
        }
        let refused = c.ask(Mode::Seeking).unwrap_err();
        assert!(refused.0.contains("permit tag"), "{refused:?}");
        let r = c.tick(8, 8.0, permit(Some(&[10.0]), Permit::Reads(1.0)));
        assert!(r.write, "safe lands at once once the PLC permits");
        assert_eq!((c.state(), c.applied()), (State::Fallback, &[2.0][..]));
        let transitions = c.take_transitions();
        assert_eq!(transitions.len(), 1, "one trip, no permit events: {transitions:?}");
        assert_eq!(transitions[0].cause, Cause::Tripped(Trip::Stale));
    }

    #[test]
    fn a_permit_read_again_as_zero_after_a_cut_is_no_permit_with_the_trip_remembered() {
        let mut c = Control::new(&with_permit("seeking"));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, permit(Some(&[10.0]), Permit::Reads(1.0)));
        for n in 1..=5 {
            c.tick(n, n as f64, permit(None, Permit::Unreadable));
        }
        assert_eq!(c.state(), State::Fallback);
        let r = c.tick(6, 6.0, permit(Some(&[10.0]), Permit::Reads(0.0)));
        assert!(!r.write);
        assert_eq!((c.state(), c.tripped()), (State::NoPermit, Some(Trip::Stale)));
        c.tick(7, 7.0, permit(Some(&[10.0]), Permit::Reads(f64::NAN)));
        assert_eq!(c.state(), State::NoPermit, "a NaN permit withholds too");
        assert!(c.tick(8, 8.0, permit(Some(&[10.0]), Permit::Reads(1.0))).write);
        assert_eq!(c.state(), State::Fallback);
    }

    #[test]
    fn a_test_on_an_observing_loop_ends_observing_whatever_the_permit_and_faults_do_next() {
        let mut c = Control::new(&with_permit("observing"));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, permit(Some(&[10.0]), Permit::Reads(1.0)));
        c.start_test(0, 0.5, 100.0, &[3.0], 1).unwrap();
        assert!(c.tick(1, 1.0, permit(Some(&[10.0]), Permit::Reads(1.0))).write);
        assert_eq!(c.state(), State::Testing);
        let r = c.tick(2, 2.0, permit(Some(&[10.0]), Permit::Reads(0.0)));
        assert!(!r.write);
        assert_eq!(c.state(), State::Observing, "back to the mode, not to no_permit");
        let ended = c.take_finished_test().expect("the test ended");
        assert!(matches!(ended.outcome, TestOutcome::Aborted(ref why) if why.contains("withdrew")));
        // A fault and the permit's return must not make an observing loop write.
        for n in 3..10 {
            assert!(!c.tick(n, n as f64, permit(None, Permit::Unreadable)).write, "tick {n}");
        }
        assert!(!c.tick(10, 10.0, permit(Some(&[10.0]), Permit::Reads(1.0))).write);
        assert_eq!(c.state(), State::Observing);
    }

    #[test]
    fn a_test_refuses_levels_outside_the_bounds_and_a_loop_that_waits_for_its_setpoints() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, good(&[10.0]));
        match c.start_test(0, 2.5, 100.0, &[3.0], 1) {
            Err(TestRefused::OutOfBounds(why)) => assert!(why.contains("upper bound 5"), "{why}"),
            other => panic!("{other:?}"),
        }
        c.ask(Mode::Observing).unwrap();
        c.ask(Mode::Seeking).unwrap();
        assert!(matches!(c.start_test(0, 0.5, 100.0, &[3.0], 1), Err(TestRefused::Conflict(_))));
    }

    #[test]
    fn an_objective_that_cannot_be_read_trips_while_the_permit_reads_fine() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        for n in 0..=5 {
            c.tick(n, n as f64, Reading { tags: None, permit: Permit::Reads(1.0) });
        }
        assert_eq!((c.state(), c.tripped()), (State::Fallback, Some(Trip::Stale)));
        assert!(c.permitted());
    }

    #[test]
    fn a_permit_never_read_withholds_writes_and_trips_after_stale_after_s() {
        let mut c = Control::new(&with_permit("seeking"));
        c.start(0.0, &[3.0]);
        for n in 0..5 {
            let r = c.tick(n, n as f64, permit(Some(&[10.0]), Permit::Unreadable));
            assert!(!r.write);
            assert_eq!(c.state(), State::Seeking, "no_permit only means the PLC answered 0 (tick {n})");
            assert!(!c.permitted());
        }
        assert!(!c.tick(5, 5.0, permit(Some(&[10.0]), Permit::Unreadable)).write);
        assert_eq!((c.state(), c.tripped()), (State::Fallback, Some(Trip::Stale)));
    }

    #[test]
    fn a_loop_waiting_to_restart_from_the_plc_has_no_dither_there() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, good(&[10.0]));
        assert!(c.dithering());
        c.tick(1, 1.0, Reading { tags: Some(&[10.0]), permit: Permit::Reads(0.0) });
        c.tick(2, 2.0, Reading { tags: Some(&[10.0]), permit: Permit::Reads(1.0) });
        assert_eq!(c.state(), State::Seeking);
        assert!(!c.dithering(), "the operator's setpoint is in the PLC until the read-back");
        c.restart_from(&[Some(2.7)]);
        c.tick(3, 3.0, Reading { tags: Some(&[10.0]), permit: Permit::Reads(1.0) });
        assert!(c.dithering());
    }

    #[test]
    fn a_trip_without_permission_is_recorded_once_and_permission_back_lands_in_fallback() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, Reading { tags: Some(&[10.0]), permit: Permit::Reads(0.0) });
        c.tick(1, 1.0, Reading { tags: Some(&[500.0]), permit: Permit::Reads(0.0) });
        c.tick(2, 2.0, Reading { tags: Some(&[500.0]), permit: Permit::Reads(1.0) });
        let causes: Vec<_> = c.take_transitions().iter().map(|t| (t.from, t.to, t.cause)).collect();
        assert_eq!(
            causes,
            [
                (State::Seeking, State::NoPermit, Cause::PermitWithdrawn),
                (State::NoPermit, State::NoPermit, Cause::Tripped(Trip::OutOfRange)),
                (State::NoPermit, State::Fallback, Cause::PermitGranted),
            ]
        );
    }

    #[test]
    fn acknowledging_a_trip_without_permission_is_recorded() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, Reading { tags: Some(&[500.0]), permit: Permit::Reads(0.0) });
        c.tick(1, 1.0, Reading { tags: Some(&[50.0]), permit: Permit::Reads(0.0) });
        c.take_transitions();
        c.ask(Mode::Seeking).unwrap();
        assert_eq!(c.tripped(), None);
        let t = c.take_transitions();
        assert_eq!(t.len(), 1);
        assert_eq!(t[0].cause, Cause::Acknowledged(Mode::Seeking));
    }

    #[test]
    fn the_healthy_interval_starts_again_after_a_failed_read() {
        let mut c = Control::new(&config("holding", "recover = \"auto\"\nrecover_after_s = 10"));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, good(&[500.0]));
        for n in 1..20 {
            let tags = if n == 8 { None } else { Some(&[50.0][..]) };
            c.tick(n, n as f64, Reading { tags, permit: Permit::NotConfigured });
            assert_eq!(c.state(), if n < 19 { State::Fallback } else { State::Holding }, "tick {n}");
        }
    }

    /// A seeking loop (rate limit 1 per s, dither ±0.1 over 20 s) with a constraint on
    /// tag `co`, read after the objective's `y`.
    fn with_constraint(table: &str) -> LoopConfig {
        let text = format!(
            "[links.plc]\nmodbus_tcp = \"127.0.0.1:5020\"\n[tags.y]\nlink = \"plc\"\ninput_register = 0\ntype = \"f32\"\n\
             [tags.co]\nlink = \"plc\"\ninput_register = 2\ntype = \"f32\"\n\
             [[loops]]\nname = \"l\"\nobjective = \"y\"\ndirection = \"maximize\"\ntick_s = 1.0\nstart_mode = \"seeking\"\n\
             [loops.filter]\nhighpass_hz = 0.01\n[loops.watchdog]\nstale_after_s = 5\n\
             [[loops.inputs]]\nname = \"u\"\nwrite = {{ link = \"plc\", holding_register = 0, type = \"f32\" }}\n\
             limits = [0, 6]\nbounds = [1, 5]\nsafe = 2\nmax_rate_per_s = 0.05\ndither_amplitude = 0.1\n\
             dither_period_s = 20\ngain = 0.01\n[[loops.constraints]]\nname = \"co\"\nvalue = \"co\"\nmax = 150\n{table}"
        );
        crate::config::parse(&text, "test").expect("valid").loops.remove(0)
    }

    #[test]
    fn a_constraint_value_that_is_not_a_number_trips_the_loop_like_the_objective() {
        let mut c = Control::new(&with_constraint("handling = \"penalty\"\nweight = 1\n"));
        assert_eq!(c.tag_names(), ["y", "co"]);
        c.start(0.0, &[3.0]);
        let r = c.tick(0, 0.0, good(&[10.0, f64::INFINITY]));
        assert_eq!(r.fault, Some(ObjectiveFault::ConstraintNotFinite));
        assert_eq!((c.state(), c.tripped()), (State::Fallback, Some(Trip::NotFinite)));
        let refused = c.ask(Mode::Seeking).unwrap_err();
        assert!(refused.0.contains("constraint `co`"), "{refused:?}");
        c.tick(1, 1.0, good(&[10.0, 100.0]));
        c.ask(Mode::Seeking).unwrap();
    }

    #[test]
    fn a_back_off_walks_its_input_at_the_rate_limit_without_dither_and_never_against_its_way() {
        let mut c =
            Control::new(&with_constraint("handling = \"back_off\"\nmove = { u = \"down\" }\nmargin = 10\n"));
        c.start(0.0, &[3.0]);
        let mut last = f64::NAN;
        for n in 0..6 {
            c.tick(n, n as f64, good(&[10.0, 100.0]));
            last = c.applied()[0];
        }
        assert_ne!(last, 3.0, "seeking: the dither is on");
        let mut engaged_at = None;
        for n in 6..20 {
            c.tick(n, n as f64, good(&[10.0, 160.0]));
            engaged_at.get_or_insert(n);
            let now = c.applied()[0];
            assert!(now <= last, "tick {n}: {now} after {last} moved up while backing off down");
            assert!(last - now <= 0.05 + 1e-12, "tick {n}: faster than the rate limit");
            assert_eq!(c.inputs()[0].estimate, now, "no dither while backing off");
            last = now;
        }
        assert!(c.constraints().next().unwrap().engaged);
        assert_eq!(c.take_constraint_changes().len(), 1);
        // Margin inside: held for one dither period (20 s), then seeking again.
        for n in 20..40 {
            c.tick(n, n as f64, good(&[10.0, 130.0]));
            assert_eq!(c.applied()[0], last, "tick {n}: held while the plant answers");
        }
        c.tick(40, 40.0, good(&[10.0, 130.0]));
        assert!(!c.constraints().next().unwrap().engaged);
        let released = c.take_constraint_changes();
        assert_eq!(released.len(), 1);
        assert!(!released[0].engaged);
    }

    #[test]
    fn a_back_off_engaging_during_a_bump_test_aborts_it_and_the_loop_backs_off() {
        let mut c = Control::new(&with_constraint("handling = \"back_off\"\nmove = { u = \"down\" }\n"));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, good(&[10.0, 100.0]));
        c.start_test(0, 0.5, 100.0, &[3.0], 1).unwrap();
        assert!(c.tick(1, 1.0, good(&[10.0, 100.0])).write);
        assert_eq!(c.state(), State::Testing);
        assert!(!c.tick(2, 2.0, good(&[10.0, 160.0])).write);
        assert_eq!(c.state(), State::Seeking);
        let ended = c.take_finished_test().expect("the test ended");
        assert!(
            matches!(ended.outcome, TestOutcome::Aborted(ref why) if why.contains("back_off")),
            "{ended:?}"
        );
        c.restart_from(&[Some(3.2)]);
        c.tick(3, 3.0, good(&[10.0, 160.0]));
        assert!(c.applied()[0] < 3.2, "walks down from where the test left it");
    }

    #[test]
    fn the_core_sees_the_penalized_objective_and_the_status_keeps_the_measured_one() {
        let mut c = Control::new(&with_constraint("handling = \"penalty\"\nweight = 0.01\n"));
        c.start(0.0, &[3.0]);
        c.tick(0, 0.0, good(&[10.0, 170.0]));
        assert_eq!(c.objective(), Some(10.0));
        assert_eq!(c.penalized_objective(), Some(10.0 - 0.01 * 400.0));
        assert!(c.has_penalty());
    }

    #[test]
    fn shutdown_writes_safe_or_the_estimate_only_for_a_writing_loop() {
        let mut c = Control::new(&config("seeking", ""));
        c.start(0.0, &[3.0]);
        assert_eq!(c.shutdown_values(), Some(vec![2.0]));
        c.ask(Mode::Observing).unwrap();
        assert_eq!(c.shutdown_values(), None);
    }
}
