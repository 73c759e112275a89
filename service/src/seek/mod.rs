//! The optimizer core: pure, synchronous and deterministic. Time is the tick index.
//!
//! A [`Method`] turns each objective sample into a gradient estimate, a proposed move of
//! each input's estimate and this tick's perturbation; a [`Seeker`] owns the estimates
//! and passes every move through the [`guard`] so bounds and rate limits hold whatever
//! the method proposes.

pub mod filter;
pub mod guard;
pub mod newton;
pub mod sine;
pub mod stepwise;

use crate::config::{Direction, Filter, LoopConfig, MethodConfig, NewtonConfig, StepwiseConfig};
use guard::{Guarded, InputGuard};
pub use newton::{Newton, NewtonInput, NewtonSettings};
pub use sine::{Sine, SineInput, SineSettings};
pub use stepwise::{Stepwise, StepwiseSettings};

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
    /// `tick - 1`), with the inputs as they stand, and fills one [`Move`] per input.
    fn step(&mut self, tick: u64, objective: f64, inputs: &[InputState], moves: &mut [Move]);
    /// Forgets filter state, for when a loop resumes after not seeking.
    fn restart(&mut self);
    /// What the method knows beyond the gradient, for status and history.
    fn detail(&self) -> Detail<'_> {
        Detail::None
    }
}

/// What a method shows beyond each input's gradient.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Detail<'a> {
    None,
    /// Newton: the curvature estimate per input.
    Curvature(&'a [Curvature]),
    /// Stepwise: where the loop is in its dwell.
    Dwell(Dwell),
}

/// Newton's curvature estimate along one input, `|d2J/du2|` with the sign the direction
/// needs (positive: a maximum when maximizing, a minimum when minimizing; negative: the
/// wrong sign), and whether the Newton step used it this tick.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Curvature {
    pub estimate: f64,
    pub trusted: bool,
}

/// Where a stepwise loop is in its dwell.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Dwell {
    /// The input stepped into this dwell; `None` for the first, the reference level.
    pub input: Option<usize>,
    pub phase: DwellPhase,
    pub remaining_ticks: u64,
}

/// The two parts of a dwell: waiting for the plant, then averaging the objective.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DwellPhase {
    Settling,
    Averaging,
}

impl DwellPhase {
    pub fn as_str(self) -> &'static str {
        match self {
            DwellPhase::Settling => "settling",
            DwellPhase::Averaging => "averaging",
        }
    }
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
        let method: Box<dyn Method> = match &config.method {
            MethodConfig::Sine { filter } => Box::new(Sine::new(&sine_settings(config, filter))),
            MethodConfig::Newton { filter, newton } => {
                Box::new(Newton::new(&newton_settings(config, filter, newton)))
            }
            MethodConfig::Stepwise(s) => Box::new(Stepwise::new(&stepwise_settings(config, s))),
        };
        let guards: Vec<_> = config
            .inputs
            .iter()
            .map(|i| InputGuard {
                bounds: i.bounds,
                amplitude: i.dither_amplitude(),
                max_step: i.max_rate_per_s * config.tick_s,
            })
            .collect();
        Seeker::new(method, &guards, estimates)
    }

    /// One seeking tick: step the method, move each estimate through the guard and set
    /// the applied setpoint to estimate plus dither, clamped to the bounds.
    pub fn step(&mut self, tick: u64, objective: f64) -> GuardActions {
        self.method.step(tick, objective, &self.inputs, &mut self.moves);
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

    /// A back-off tick: each input walks one rate-limited step the way `ways` says (+1
    /// up, -1 down) from the setpoint it was last applied, which becomes its estimate, or
    /// holds its estimate (0); all are applied without dither. So a walked setpoint moves
    /// exactly at the rate limit, never against its way.
    pub fn walk(&mut self, ways: &[f64]) -> GuardActions {
        let mut acted = GuardActions::default();
        for (input, &way) in self.inputs.iter_mut().zip(ways) {
            let from = if input.applied.is_finite() { input.applied } else { input.estimate };
            let estimate = if way != 0.0 {
                input.guard.walked_estimate(from, way)
            } else {
                input.guard.held_estimate(input.estimate)
            };
            input.estimate = estimate.value;
            input.applied = input.guard.clamp(estimate.value);
            input.gradient = 0.0;
            note(&mut acted, estimate);
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

    /// What the method shows beyond the gradients.
    pub fn detail(&self) -> Detail<'_> {
        self.method.detail()
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

fn sign(config: &LoopConfig) -> f64 {
    match config.direction {
        Direction::Maximize => 1.0,
        Direction::Minimize => -1.0,
    }
}

/// The sine method's settings for a configured loop.
pub fn sine_settings(config: &LoopConfig, filter: &Filter) -> SineSettings {
    SineSettings {
        tick_s: config.tick_s,
        sign: sign(config),
        highpass_hz: filter.highpass_hz,
        lowpass_hz: filter.lowpass_hz,
        phase_deg: filter.phase_deg,
        inputs: config
            .inputs
            .iter()
            .filter_map(|i| {
                let d = i.dither?;
                Some(SineInput { amplitude: d.amplitude, period_s: d.period_s, gain: i.gain.unwrap_or(0.0) })
            })
            .collect(),
    }
}

/// The Newton method's settings for a configured loop: the initial curvature from
/// `[loops.newton]`, else from `[loops.model]` (validation requires one of them).
pub fn newton_settings(config: &LoopConfig, filter: &Filter, newton: &NewtonConfig) -> NewtonSettings {
    NewtonSettings {
        tick_s: config.tick_s,
        sign: sign(config),
        highpass_hz: filter.highpass_hz,
        lowpass_hz: filter.lowpass_hz,
        phase_deg: filter.phase_deg,
        time_constant_s: newton.time_constant_s,
        hessian_hz: newton.hessian_hz,
        initial_curvature: newton.initial_curvature.or(config.curvature()).unwrap_or(1.0),
        inputs: config
            .inputs
            .iter()
            .filter_map(|i| i.dither)
            .map(|d| NewtonInput { amplitude: d.amplitude, period_s: d.period_s })
            .collect(),
    }
}

/// The stepwise method's settings for a configured loop, its times in whole ticks.
pub fn stepwise_settings(config: &LoopConfig, s: &StepwiseConfig) -> StepwiseSettings {
    let ticks = |seconds: f64| (seconds / config.tick_s).round() as u64;
    StepwiseSettings {
        sign: sign(config),
        dwell_ticks: ticks(s.dwell_s),
        average_ticks: ticks(s.average_s),
        steps: config.inputs.iter().map(|i| i.step.unwrap_or(0.0)).collect(),
    }
}
