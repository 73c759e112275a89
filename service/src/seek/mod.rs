//! The optimizer core: pure, synchronous and deterministic. Time is the tick index.
//!
//! A [`Method`] turns each objective sample into a gradient estimate, a proposed move of
//! each input's estimate and this tick's perturbation; a [`Seeker`] owns the estimates
//! and passes every move through the [`guard`] so bounds and rate limits hold whatever
//! the method proposes.

pub mod filter;
pub mod guard;
pub mod sine;

use crate::config::{Direction, LoopConfig, MethodKind};
use guard::{Guarded, InputGuard};
pub use sine::{Sine, SineInput, SineSettings};

/// What a method proposes for one input at one tick.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Move {
    /// Gradient estimate, objective units per input unit.
    pub gradient: f64,
    /// Proposed change of the estimate, before bounds and rate limit.
    pub step: f64,
    /// Perturbation to add to the estimate in this tick's setpoint.
    pub dither: f64,
}

/// An extremum-seeking method.
pub trait Method: Send + Sync + std::fmt::Debug {
    /// Feeds the objective read at `tick` (which answers the setpoints written at
    /// `tick - 1`) and fills one [`Move`] per input.
    fn step(&mut self, tick: u64, objective: f64, moves: &mut [Move]);
    /// Forgets filter state, for when a loop resumes after not seeking.
    fn restart(&mut self);
}

/// One input as the core sees it after a tick.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct InputState {
    pub guard: InputGuard,
    pub estimate: f64,
    pub applied: f64,
    pub gradient: f64,
}

impl InputState {
    /// An input at rest at `estimate` (clamped into its bounds): applied without dither,
    /// with no gradient yet.
    fn at_rest(guard: InputGuard, estimate: f64) -> Self {
        let estimate = guard.clamp(estimate);
        InputState { guard, estimate, applied: estimate, gradient: 0.0 }
    }
}

/// Whether the guard had to act on any input in a tick.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct GuardActions {
    pub at_bound: bool,
    pub rate_limited: bool,
}

/// A loop's method with its estimates, guarded.
#[derive(Debug)]
pub struct Seeker {
    method: Box<dyn Method>,
    inputs: Vec<InputState>,
    moves: Vec<Move>,
}

impl Seeker {
    pub fn new(method: Box<dyn Method>, guards: &[InputGuard], estimates: &[f64]) -> Self {
        let inputs = guards
            .iter()
            .zip(estimates)
            .map(|(&guard, &e)| InputState::at_rest(guard, e))
            .collect::<Vec<_>>();
        Seeker { method, moves: vec![Move::default(); inputs.len()], inputs }
    }

    /// The core for a configured loop, starting from the given estimates.
    pub fn for_loop(config: &LoopConfig, estimates: &[f64]) -> Self {
        let method: Box<dyn Method> = match config.method {
            // Validation refuses the others until they exist.
            MethodKind::Sine | MethodKind::Newton | MethodKind::Stepwise => {
                Box::new(Sine::new(&sine_settings(config)))
            }
        };
        let guards: Vec<_> = config
            .inputs
            .iter()
            .map(|i| InputGuard {
                bounds: i.bounds,
                amplitude: i.dither_amplitude,
                max_step: i.max_rate_per_s * config.tick_s,
            })
            .collect();
        Seeker::new(method, &guards, estimates)
    }

    /// One seeking tick: step the method, move each estimate through the guard and set
    /// the applied setpoint to estimate plus dither, clamped to the bounds.
    pub fn step(&mut self, tick: u64, objective: f64) -> GuardActions {
        self.method.step(tick, objective, &mut self.moves);
        let mut acted = GuardActions::default();
        for (input, mv) in self.inputs.iter_mut().zip(&self.moves) {
            let estimate = input.guard.next_estimate(input.estimate, input.estimate + mv.step);
            let applied = input.guard.applied(estimate.value, mv.dither);
            input.estimate = estimate.value;
            input.applied = applied.value;
            input.gradient = mv.gradient;
            note(&mut acted, estimate);
            note(&mut acted, applied);
        }
        acted
    }

    /// A tick without seeking: the estimate stays (walking into the bounds if they moved)
    /// and is applied without dither; no gradient is estimated.
    pub fn hold(&mut self) -> GuardActions {
        let mut acted = GuardActions::default();
        for input in &mut self.inputs {
            let estimate = input.guard.held_estimate(input.estimate);
            input.estimate = estimate.value;
            input.applied = input.guard.clamp(estimate.value);
            input.gradient = 0.0;
            note(&mut acted, estimate);
        }
        acted
    }

    /// Sets the estimates (clamped into the bounds) and applies them without dither, as
    /// when a loop starts from the setpoints read back from the PLC.
    pub fn reset_estimates(&mut self, estimates: &[f64]) {
        for (input, &e) in self.inputs.iter_mut().zip(estimates) {
            *input = InputState::at_rest(input.guard, e);
        }
    }

    /// Restarts the method's filters; the estimates stay.
    pub fn restart(&mut self) {
        self.method.restart();
    }

    pub fn inputs(&self) -> &[InputState] {
        &self.inputs
    }

    /// Changes an input's operating bounds from the next tick on.
    pub fn set_bounds(&mut self, input: usize, bounds: crate::config::Range) {
        if let Some(i) = self.inputs.get_mut(input) {
            i.guard.bounds = bounds;
        }
    }
}

fn note(acted: &mut GuardActions, g: Guarded) {
    acted.at_bound |= g.at_bound;
    acted.rate_limited |= g.rate_limited;
}

/// The sine method's settings for a configured loop.
pub fn sine_settings(config: &LoopConfig) -> SineSettings {
    SineSettings {
        tick_s: config.tick_s,
        sign: match config.direction {
            Direction::Maximize => 1.0,
            Direction::Minimize => -1.0,
        },
        highpass_hz: config.filter.highpass_hz,
        lowpass_hz: config.filter.lowpass_hz,
        phase_deg: config.filter.phase_deg,
        inputs: config
            .inputs
            .iter()
            .map(|i| SineInput { amplitude: i.dither_amplitude, period_s: i.dither_period_s, gain: i.gain })
            .collect(),
    }
}
