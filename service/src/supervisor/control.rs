//! The decisions of one loop, free of I/O and clocks: from the tag values read at a tick,
//! what the core does and whether the setpoints are written. Shared by the live loop and
//! the rehearsal.

use crate::config::{LoopConfig, Mode, OnShutdown, Range};
use crate::expr::Expr;
use crate::seek::guard::{ObjectiveFault, check_objective, initial_estimate};
use crate::seek::{GuardActions, InputState, Seeker};

/// What a loop is doing, as reported (`mode` is what was asked for).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum State {
    Seeking,
    Holding,
    Observing,
    Stopped,
    Fallback,
    NoPermit,
}

impl State {
    pub const ALL: [State; 6] =
        [State::Seeking, State::Holding, State::Observing, State::Stopped, State::Fallback, State::NoPermit];

    pub fn as_str(self) -> &'static str {
        match self {
            State::Seeking => "seeking",
            State::Holding => "holding",
            State::Observing => "observing",
            State::Stopped => "stopped",
            State::Fallback => "fallback",
            State::NoPermit => "no_permit",
        }
    }
}

/// What happened in one tick.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TickReport {
    /// Write every input's applied setpoint now.
    pub write: bool,
    /// The objective as evaluated from the tags; `None` when the read failed.
    pub objective: Option<f64>,
    /// Why the objective was kept from the core, if it was.
    pub fault: Option<ObjectiveFault>,
    pub guard: GuardActions,
}

/// One loop's mode, core and estimates.
#[derive(Debug)]
pub struct Control {
    objective: Expr,
    plausible: Option<Range>,
    on_shutdown: OnShutdown,
    safe: Vec<f64>,
    seeker: Seeker,
    mode: Mode,
    started: bool,
    /// The filters start again at the next seeking step (after a pause or a fault).
    restart_filters: bool,
    objective_value: Option<f64>,
    ticks: u64,
}

impl Control {
    /// A loop that has not started: it writes nothing until [`Control::start`].
    pub fn new(config: &LoopConfig) -> Self {
        let safe: Vec<f64> = config.inputs.iter().map(|i| i.safe).collect();
        Control {
            objective: config.objective.clone(),
            plausible: config.watchdog.objective_range,
            on_shutdown: config.on_shutdown,
            seeker: Seeker::for_loop(config, &safe),
            safe,
            mode: config.start_mode,
            started: false,
            restart_filters: true,
            objective_value: None,
            ticks: 0,
        }
    }

    /// Starts from the setpoints read back from the PLC: each one inside its bounds is
    /// the estimate, any other (or one that could not be read) gives way to `safe`.
    pub fn start(&mut self, read_back: &[Option<f64>]) {
        self.reset_estimates(read_back);
        self.started = true;
    }

    pub fn is_started(&self) -> bool {
        self.started
    }

    fn reset_estimates(&mut self, read_back: &[Option<f64>]) {
        let estimates: Vec<f64> = self
            .seeker
            .inputs()
            .iter()
            .zip(&self.safe)
            .enumerate()
            .map(|(i, (input, &safe))| {
                initial_estimate(read_back.get(i).copied().flatten(), input.guard.bounds, safe)
            })
            .collect();
        self.seeker.reset_estimates(&estimates);
        self.restart_filters = true;
    }

    /// One tick: `tags` are the values read, in the objective's name order, or `None`
    /// when reading failed.
    pub fn tick(&mut self, tick: u64, tags: Option<&[f64]>) -> TickReport {
        let objective = tags.map(|values| self.objective.eval(values));
        self.objective_value = objective;
        self.ticks += 1;
        let checked = match objective {
            Some(j) => check_objective(j, self.plausible).map_err(Some),
            None => Err(None),
        };
        let fault = checked.err().flatten();
        let quiet = TickReport { write: false, objective, fault, guard: GuardActions::default() };
        if !self.started {
            return quiet;
        }
        match (self.mode, checked) {
            (Mode::Stopped, _) => quiet,
            (Mode::Holding, _) => TickReport { write: true, guard: self.seeker.hold(), ..quiet },
            (Mode::Seeking | Mode::Observing, Ok(j)) => {
                if std::mem::take(&mut self.restart_filters) {
                    self.seeker.restart();
                }
                let guard = self.seeker.step(tick, j);
                TickReport { write: self.mode == Mode::Seeking, guard, ..quiet }
            }
            // Nothing trustworthy to seek on: hold the estimate without dither, and start
            // the filters again once readings are good.
            (Mode::Seeking | Mode::Observing, Err(_)) => {
                self.restart_filters = true;
                TickReport { write: self.mode == Mode::Seeking, guard: self.seeker.hold(), ..quiet }
            }
        }
    }

    /// Switches mode at the next tick. A loop that starts writing again after observing
    /// or being stopped restarts from the setpoints read back from the PLC (bumpless).
    pub fn set_mode(&mut self, mode: Mode, read_back: &[Option<f64>]) {
        let was_writing = matches!(self.mode, Mode::Seeking | Mode::Holding);
        let will_write = matches!(mode, Mode::Seeking | Mode::Holding);
        if will_write && !was_writing {
            self.reset_estimates(read_back);
        }
        if mode != self.mode {
            self.restart_filters = true;
        }
        self.mode = mode;
    }

    /// Starts the filters again at the next seeking tick, after a gap in the ticks or a
    /// setpoint that did not reach the plant.
    pub fn restart_filters(&mut self) {
        self.restart_filters = true;
    }

    /// Changes an input's operating bounds; the estimate walks into them at the rate limit.
    pub fn set_bounds(&mut self, input: usize, bounds: Range) {
        self.seeker.set_bounds(input, bounds);
    }

    pub fn mode(&self) -> Mode {
        self.mode
    }

    pub fn state(&self) -> State {
        match self.mode {
            Mode::Seeking => State::Seeking,
            Mode::Holding => State::Holding,
            Mode::Observing => State::Observing,
            Mode::Stopped => State::Stopped,
        }
    }

    pub fn inputs(&self) -> &[InputState] {
        self.seeker.inputs()
    }

    pub fn objective(&self) -> Option<f64> {
        self.objective_value
    }

    pub fn objective_names(&self) -> &[String] {
        self.objective.names()
    }

    pub fn ticks(&self) -> u64 {
        self.ticks
    }

    /// What to write when the service stops: the estimates without dither, or `safe`
    /// (each kept inside its bounds); `None` for a loop that is not writing.
    pub fn shutdown_values(&self) -> Option<Vec<f64>> {
        if !self.started || !matches!(self.mode, Mode::Seeking | Mode::Holding) {
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

    fn config(mode: &str) -> LoopConfig {
        let text = format!(
            "[links.plc]\nmodbus_tcp = \"127.0.0.1:5020\"\n[tags.y]\nlink = \"plc\"\ninput_register = 0\ntype = \"f32\"\n\
             [[loops]]\nname = \"l\"\nobjective = \"y\"\ndirection = \"maximize\"\ntick_s = 1.0\nstart_mode = \"{mode}\"\n\
             on_shutdown = \"safe\"\n[loops.filter]\nhighpass_hz = 0.01\n[loops.watchdog]\nstale_after_s = 5\n\
             objective_range = [0, 100]\n[[loops.inputs]]\nname = \"u\"\n\
             write = {{ link = \"plc\", holding_register = 0, type = \"f32\" }}\nlimits = [0, 6]\nbounds = [1, 5]\n\
             safe = 2\nmax_rate_per_s = 1\ndither_amplitude = 0.1\ndither_period_s = 20\ngain = 0.01\n"
        );
        crate::config::parse(&text, "test").expect("valid").loops.remove(0)
    }

    #[test]
    fn a_loop_writes_nothing_before_it_has_a_starting_point() {
        let mut c = Control::new(&config("seeking"));
        assert!(!c.tick(0, Some(&[10.0])).write);
        c.start(&[Some(3.0)]);
        assert!(c.tick(1, Some(&[10.0])).write);
        assert_eq!(c.inputs()[0].estimate, 3.0);
    }

    #[test]
    fn start_falls_back_to_safe_when_the_read_back_is_outside_the_bounds_or_missing() {
        let mut c = Control::new(&config("seeking"));
        c.start(&[Some(5.5)]);
        assert_eq!(c.inputs()[0].estimate, 2.0);
        c.start(&[None]);
        assert_eq!(c.inputs()[0].estimate, 2.0);
    }

    #[test]
    fn observing_computes_but_never_writes_and_stopped_does_neither() {
        let mut c = Control::new(&config("observing"));
        c.start(&[Some(3.0)]);
        for n in 0..50 {
            assert!(!c.tick(n, Some(&[10.0 + n as f64 * 0.1])).write);
        }
        assert_ne!(c.inputs()[0].applied, 3.0, "the dither is computed");
        c.set_mode(Mode::Stopped, &[]);
        let before = c.inputs()[0];
        assert!(!c.tick(50, Some(&[1.0])).write);
        assert_eq!(c.inputs()[0], before);
    }

    #[test]
    fn holding_writes_the_estimate_without_dither() {
        let mut c = Control::new(&config("holding"));
        c.start(&[Some(3.0)]);
        for n in 0..30 {
            let r = c.tick(n, Some(&[10.0]));
            assert!(r.write);
            assert_eq!(c.inputs()[0].applied, 3.0);
        }
    }

    #[test]
    fn leaving_observing_restarts_from_the_read_back_setpoint() {
        let mut c = Control::new(&config("observing"));
        c.start(&[Some(3.0)]);
        for n in 0..20 {
            c.tick(n, Some(&[10.0 + n as f64]));
        }
        c.set_mode(Mode::Seeking, &[Some(4.2)]);
        assert_eq!(c.inputs()[0].estimate, 4.2);
    }

    #[test]
    fn an_implausible_objective_holds_the_estimate_and_never_reaches_the_core() {
        let mut c = Control::new(&config("seeking"));
        c.start(&[Some(3.0)]);
        let r = c.tick(0, Some(&[500.0]));
        assert_eq!(r.fault, Some(ObjectiveFault::OutOfRange));
        assert!(r.write);
        assert_eq!(c.inputs()[0].applied, 3.0);
        let r = c.tick(1, Some(&[f64::NAN]));
        assert_eq!(r.fault, Some(ObjectiveFault::NotFinite));
        assert!(c.inputs()[0].applied.is_finite());
    }

    #[test]
    fn shutdown_writes_safe_or_the_estimate_only_for_a_writing_loop() {
        let mut c = Control::new(&config("seeking"));
        c.start(&[Some(3.0)]);
        assert_eq!(c.shutdown_values(), Some(vec![2.0]));
        c.set_mode(Mode::Observing, &[]);
        assert_eq!(c.shutdown_values(), None);
    }
}
