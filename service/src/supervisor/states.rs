//! The states of a loop and every transition between them, in one table.
//!
//! `mode` is what an operator asked for; `state` is what the loop does. A loop in a
//! writing mode (seeking, holding) trips to `fallback` on a fault and stays there until
//! its recovery condition holds; when the PLC answers 0 to its permit it is `no_permit`
//! and writes nothing (a permit that cannot be read is a fault, not an answer). A trip
//! is remembered through `no_permit`, so permission returning to a tripped loop brings it
//! back to `fallback`, not to seeking. A bump test (`testing`) writes like `holding` and
//! ends on any trip, permit change or operator request, or when its staircase is done.

use crate::config::{Mode, Recover};

/// What a loop is doing, as reported.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum State {
    Seeking,
    Holding,
    Observing,
    Stopped,
    Fallback,
    NoPermit,
    Testing,
}

impl State {
    pub const ALL: [State; 7] = [
        State::Seeking,
        State::Holding,
        State::Observing,
        State::Stopped,
        State::Fallback,
        State::NoPermit,
        State::Testing,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            State::Seeking => "seeking",
            State::Holding => "holding",
            State::Observing => "observing",
            State::Stopped => "stopped",
            State::Fallback => "fallback",
            State::NoPermit => "no_permit",
            State::Testing => "testing",
        }
    }

    /// The state a mode means when nothing is wrong.
    pub fn of(mode: Mode) -> State {
        match mode {
            Mode::Seeking => State::Seeking,
            Mode::Holding => State::Holding,
            Mode::Observing => State::Observing,
            Mode::Stopped => State::Stopped,
        }
    }

    /// Whether setpoints are written in this state.
    pub fn writes(self) -> bool {
        matches!(self, State::Seeking | State::Holding | State::Fallback | State::Testing)
    }
}

/// Why a loop trips to fallback.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Trip {
    /// No successful read of the objective's tags (or of the permit tag) for `stale_after_s`.
    Stale,
    /// The objective is NaN or infinite.
    NotFinite,
    /// The objective is outside `objective_range`.
    OutOfRange,
    /// Setpoint writes have failed for `stale_after_s`.
    WriteFailed,
}

impl Trip {
    pub const ALL: [Trip; 4] = [Trip::Stale, Trip::NotFinite, Trip::OutOfRange, Trip::WriteFailed];

    pub fn as_str(self) -> &'static str {
        match self {
            Trip::Stale => "stale",
            Trip::NotFinite => "not_finite",
            Trip::OutOfRange => "out_of_range",
            Trip::WriteFailed => "write_failed",
        }
    }
}

/// Something that may move a loop to another state.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Event {
    /// A fault holds this tick.
    Fault(Trip),
    /// No fault holds this tick, and none has for `healthy_s`.
    Healthy { healthy_s: f64 },
    /// The PLC's permit tag reads 0 (or not a number). A permit that cannot be read is
    /// not this: it is a fault of the link ([`Trip::Stale`]).
    PermitWithdrawn,
    /// The PLC's permit tag reads non-zero again.
    PermitGranted,
    /// The permit tag has not been read for `stale_after_s`: the PLC's last answer no
    /// longer stands, and a writing loop trips (`stale`) whatever that answer was.
    PermitLost,
    /// An operator asks for a mode (from fallback this is the acknowledgement; from
    /// testing it cancels the test).
    Ask(Mode),
    /// An operator starts a bump test.
    TestStart,
    /// The bump test's staircase is done.
    TestEnd,
}

/// What a transition does besides changing the state.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Effect {
    None,
    /// Remember the trip: the loop is in fallback, or will be once permitted again.
    Latch(Trip),
    /// Forget the trip, and restart bumpless from the setpoints in the PLC.
    Recover,
    /// Restart bumpless from the setpoints in the PLC (permission is back, or a mode
    /// starts writing).
    Restart,
}

/// Why an operator's request was refused (an HTTP 409).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StillFaulty(pub Trip);

/// Where a loop is: the state it reports and what decides the next one.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Machine {
    pub mode: Mode,
    pub state: State,
    /// The trip a writing loop remembers until it recovers.
    pub tripped: Option<Trip>,
    pub permitted: bool,
    pub recover: Recover,
    pub recover_after_s: f64,
}

impl Machine {
    pub fn new(mode: Mode, recover: Recover, recover_after_s: f64) -> Self {
        Machine { mode, state: State::of(mode), tripped: None, permitted: true, recover, recover_after_s }
    }

    /// The transition table. `fault_now` is the fault that holds at this moment (which an
    /// acknowledgement needs to be gone).
    pub fn on(&mut self, event: Event, fault_now: Option<Trip>) -> Result<Effect, StillFaulty> {
        use State::*;
        let writing_mode = matches!(self.mode, Mode::Seeking | Mode::Holding);
        let (state, effect) = match (self.state, event) {
            // A writing loop trips on any fault.
            (Seeking | Holding | Testing, Event::Fault(trip)) => (Fallback, Effect::Latch(trip)),
            (Seeking | Holding | Observing, Event::TestStart) => (Testing, Effect::None),
            (Testing, Event::TestEnd) => {
                (State::of(self.mode), if writing_mode { Effect::Restart } else { Effect::None })
            }
            // Without permission a loop writes nothing, but remembers a trip for later.
            (NoPermit, Event::Fault(trip)) if self.tripped.is_none() => (NoPermit, Effect::Latch(trip)),
            (Seeking | Holding | Fallback, Event::PermitWithdrawn) => (NoPermit, Effect::None),
            // A test from a mode that does not write goes back to it: it must not learn to write.
            (Testing, Event::PermitWithdrawn) => {
                (if writing_mode { NoPermit } else { State::of(self.mode) }, Effect::None)
            }
            (NoPermit, Event::PermitGranted) if self.tripped.is_some() => (Fallback, Effect::None),
            // A permit that cannot be read is a fault of the link, not the PLC saying no.
            (Seeking | Holding | NoPermit | Testing, Event::PermitLost) => match self.tripped {
                Some(_) => (Fallback, Effect::None),
                None => (Fallback, Effect::Latch(Trip::Stale)),
            },
            (NoPermit, Event::PermitGranted) => (State::of(self.mode), Effect::Restart),
            // Automatic recovery after a healthy stretch; manual recovery only on request.
            (Fallback, Event::Healthy { healthy_s })
                if self.recover == Recover::Auto && healthy_s >= self.recover_after_s =>
            {
                (State::of(self.mode), Effect::Recover)
            }
            (Fallback, Event::Ask(mode)) => match fault_now {
                Some(trip) => return Err(StillFaulty(trip)),
                None => {
                    self.mode = mode;
                    (State::of(mode), Effect::Recover)
                }
            },
            (NoPermit, Event::Ask(mode)) => match (self.tripped, fault_now) {
                (Some(_), Some(trip)) => return Err(StillFaulty(trip)),
                _ => {
                    self.mode = mode;
                    self.tripped = None;
                    let state = if matches!(mode, Mode::Seeking | Mode::Holding) {
                        NoPermit
                    } else {
                        State::of(mode)
                    };
                    (state, Effect::None)
                }
            },
            (_, Event::Ask(mode)) => {
                // Leaving a test, a writing mode starts again from the setpoint restored.
                let starts_writing =
                    matches!(mode, Mode::Seeking | Mode::Holding) && (!writing_mode || self.state == Testing);
                self.mode = mode;
                let writes = matches!(mode, Mode::Seeking | Mode::Holding);
                let state = if writes && !self.permitted { NoPermit } else { State::of(mode) };
                (state, if starts_writing { Effect::Restart } else { Effect::None })
            }
            // Observing and stopped loops write nothing: faults and permits do not move them.
            (state, _) => (state, Effect::None),
        };
        match event {
            Event::PermitWithdrawn => self.permitted = false,
            Event::PermitGranted | Event::PermitLost => self.permitted = true,
            _ => {}
        }
        match effect {
            Effect::Latch(trip) => self.tripped = Some(trip),
            Effect::Recover => self.tripped = None,
            Effect::None | Effect::Restart => {}
        }
        self.state = state;
        Ok(effect)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn machine(mode: Mode, recover: Recover) -> Machine {
        Machine::new(mode, recover, 60.0)
    }

    #[test]
    fn a_fault_trips_a_writing_loop_and_only_an_acknowledgement_without_fault_brings_it_back() {
        let mut m = machine(Mode::Seeking, Recover::Manual);
        assert_eq!(m.on(Event::Fault(Trip::Stale), Some(Trip::Stale)), Ok(Effect::Latch(Trip::Stale)));
        assert_eq!(m.state, State::Fallback);
        assert_eq!(m.on(Event::Healthy { healthy_s: 1e9 }, None), Ok(Effect::None));
        assert_eq!(m.state, State::Fallback, "manual recovery never happens by itself");
        assert_eq!(m.on(Event::Ask(Mode::Seeking), Some(Trip::Stale)), Err(StillFaulty(Trip::Stale)));
        assert_eq!(m.on(Event::Ask(Mode::Seeking), None), Ok(Effect::Recover));
        assert_eq!(m.state, State::Seeking);
        assert_eq!(m.tripped, None);
    }

    #[test]
    fn automatic_recovery_waits_for_the_healthy_interval() {
        let mut m = machine(Mode::Holding, Recover::Auto);
        m.on(Event::Fault(Trip::OutOfRange), Some(Trip::OutOfRange)).unwrap();
        m.on(Event::Healthy { healthy_s: 59.0 }, None).unwrap();
        assert_eq!(m.state, State::Fallback);
        assert_eq!(m.on(Event::Healthy { healthy_s: 60.0 }, None), Ok(Effect::Recover));
        assert_eq!(m.state, State::Holding);
    }

    #[test]
    fn a_trip_is_remembered_through_no_permit() {
        let mut m = machine(Mode::Seeking, Recover::Manual);
        m.on(Event::PermitWithdrawn, None).unwrap();
        assert_eq!(m.state, State::NoPermit);
        m.on(Event::Fault(Trip::Stale), Some(Trip::Stale)).unwrap();
        assert_eq!(m.state, State::NoPermit, "nothing is written without permission, not even the fallback");
        m.on(Event::PermitGranted, Some(Trip::Stale)).unwrap();
        assert_eq!(m.state, State::Fallback);
    }

    #[test]
    fn permission_returning_restarts_a_healthy_loop_bumpless() {
        let mut m = machine(Mode::Seeking, Recover::Manual);
        m.on(Event::PermitWithdrawn, None).unwrap();
        assert_eq!(m.on(Event::PermitGranted, None), Ok(Effect::Restart));
        assert_eq!(m.state, State::Seeking);
    }

    #[test]
    fn observing_and_stopped_loops_never_trip() {
        for mode in [Mode::Observing, Mode::Stopped] {
            let mut m = machine(mode, Recover::Manual);
            m.on(Event::Fault(Trip::NotFinite), Some(Trip::NotFinite)).unwrap();
            m.on(Event::PermitWithdrawn, None).unwrap();
            assert_eq!(m.state, State::of(mode));
            assert_eq!(m.tripped, None);
        }
    }

    #[test]
    fn a_permit_lost_trips_a_writing_loop_and_ends_no_permit_with_the_trip_kept() {
        let mut m = machine(Mode::Holding, Recover::Manual);
        assert_eq!(m.on(Event::PermitLost, Some(Trip::Stale)), Ok(Effect::Latch(Trip::Stale)));
        assert_eq!((m.state, m.tripped), (State::Fallback, Some(Trip::Stale)));

        let mut m = machine(Mode::Seeking, Recover::Manual);
        m.on(Event::PermitWithdrawn, None).unwrap();
        m.on(Event::Fault(Trip::OutOfRange), Some(Trip::OutOfRange)).unwrap();
        assert_eq!(m.on(Event::PermitLost, Some(Trip::Stale)), Ok(Effect::None));
        assert_eq!((m.state, m.tripped), (State::Fallback, Some(Trip::OutOfRange)), "the first trip is kept");
        assert!(m.permitted, "the PLC's old no no longer stands");

        let mut m = machine(Mode::Observing, Recover::Manual);
        m.on(Event::PermitLost, Some(Trip::Stale)).unwrap();
        assert_eq!((m.state, m.tripped), (State::Observing, None));
    }

    #[test]
    fn asking_for_a_writing_mode_without_permission_waits_in_no_permit() {
        let mut m = machine(Mode::Observing, Recover::Manual);
        m.on(Event::PermitWithdrawn, None).unwrap();
        assert_eq!(m.on(Event::Ask(Mode::Seeking), None), Ok(Effect::Restart));
        assert_eq!(m.state, State::NoPermit);
        assert_eq!(m.on(Event::PermitGranted, None), Ok(Effect::Restart));
        assert_eq!(m.state, State::Seeking);
    }
}
