//! The stepwise method (perturb and observe): step one input, hold it for a dwell,
//! compare the objective averaged over the end of the dwell with the previous one, and
//! reverse that input's direction when it got worse. Inputs take turns. No dither.

use super::{Detail, Dwell, DwellPhase, InputState, Method, Move};

/// Settings of one loop.
#[derive(Debug, Clone)]
pub struct StepwiseSettings {
    /// +1 to maximize, -1 to minimize.
    pub sign: f64,
    /// Ticks each level is held (at least 2).
    pub dwell_ticks: u64,
    /// Ticks at the end of each dwell whose objective is averaged (1..=dwell_ticks).
    pub average_ticks: u64,
    /// Each input's step.
    pub steps: Vec<f64>,
}

/// The stepwise method of DESIGN.md §8.
#[derive(Debug, Clone)]
pub struct Stepwise {
    settings: StepwiseSettings,
    /// +1 or -1 per input: which way its next step goes.
    directions: Vec<f64>,
    /// Each input's level for this dwell, once it has been stepped.
    targets: Vec<Option<f64>>,
    /// The finite-difference gradient of each input's last step.
    gradients: Vec<f64>,
    /// The input stepped into this dwell; `None` for the first, the reference level.
    stepped: Option<usize>,
    /// Objective samples taken in this dwell.
    elapsed: u64,
    sum: f64,
    count: u64,
    /// The average of the previous dwell, `sign`-adjusted so that larger is better.
    previous: Option<f64>,
}

impl Stepwise {
    pub fn new(settings: &StepwiseSettings) -> Self {
        let n = settings.steps.len();
        let mut settings = settings.clone();
        settings.dwell_ticks = settings.dwell_ticks.max(2);
        settings.average_ticks = settings.average_ticks.clamp(1, settings.dwell_ticks);
        Stepwise {
            settings,
            directions: vec![1.0; n],
            targets: vec![None; n],
            gradients: vec![0.0; n],
            stepped: None,
            elapsed: 0,
            sum: 0.0,
            count: 0,
            previous: None,
        }
    }

    /// The end of a dwell: judge the last step and take the next one.
    fn end_dwell(&mut self, inputs: &[InputState]) {
        let n = self.directions.len();
        // Samples the watchdog let through are finite; the mean of none is no judgement.
        let average = (self.count > 0).then(|| self.settings.sign * self.sum / self.count as f64);
        if let (Some(i), Some(now), Some(before)) = (self.stepped, average, self.previous) {
            let moved = self.directions[i] * self.settings.steps[i];
            self.gradients[i] = self.settings.sign * (now - before) / moved;
            if now < before {
                self.directions[i] = -self.directions[i];
            }
        }
        if average.is_some() {
            self.previous = average;
        }
        let next = self.stepped.map_or(0, |i| (i + 1) % n.max(1));
        if let Some(input) = inputs.get(next) {
            self.targets[next] = Some(input.estimate + self.directions[next] * self.settings.steps[next]);
        }
        self.stepped = Some(next);
        self.elapsed = 0;
        self.sum = 0.0;
        self.count = 0;
    }
}

impl Method for Stepwise {
    fn step(&mut self, _tick: u64, objective: f64, inputs: &[InputState], moves: &mut [Move]) {
        self.elapsed += 1;
        if self.elapsed > self.settings.dwell_ticks - self.settings.average_ticks && objective.is_finite() {
            self.sum += objective;
            self.count += 1;
        }
        if self.elapsed >= self.settings.dwell_ticks {
            self.end_dwell(inputs);
        }
        for (i, mv) in moves.iter_mut().enumerate() {
            let estimate = inputs.get(i).map_or(0.0, |s| s.estimate);
            // Toward the level until it is reached: the guard's rate limit may take
            // several ticks to get there.
            let step = self.targets[i].map_or(0.0, |t| t - estimate);
            *mv = Move { gradient: self.gradients[i], step, dither: 0.0 };
        }
    }

    fn restart(&mut self) {
        *self = Stepwise::new(&self.settings);
    }

    fn detail(&self) -> Detail<'_> {
        let settling = self.settings.dwell_ticks - self.settings.average_ticks;
        Detail::Dwell(Dwell {
            input: self.stepped,
            phase: if self.elapsed < settling { DwellPhase::Settling } else { DwellPhase::Averaging },
            remaining_ticks: self.settings.dwell_ticks - self.elapsed,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::seek::newton::{Newton, NewtonInput, NewtonSettings};

    #[test]
    fn restart_forgets_all_that_newton_and_stepwise_learned() {
        let newton = || {
            Newton::new(&NewtonSettings {
                tick_s: 1.0,
                sign: -1.0,
                highpass_hz: 0.01,
                lowpass_hz: Some(0.2),
                phase_deg: 20.0,
                time_constant_s: 300.0,
                hessian_hz: 0.004,
                initial_curvature: 2.0,
                inputs: vec![
                    NewtonInput { amplitude: 0.1, period_s: 20.0 },
                    NewtonInput { amplitude: 0.2, period_s: 14.0 },
                ],
            })
        };
        let stepwise = || {
            Stepwise::new(&StepwiseSettings {
                sign: 1.0,
                dwell_ticks: 7,
                average_ticks: 3,
                steps: vec![0.1, 0.2],
            })
        };
        let methods: [(Box<dyn Method>, Box<dyn Method>); 2] =
            [(Box::new(newton()), Box::new(newton())), (Box::new(stepwise()), Box::new(stepwise()))];
        for (mut used, fresh) in methods {
            let mut moves = [Move::default(); 2];
            for tick in 0..500u64 {
                used.step(tick, (tick as f64 * 0.37).sin() + 0.01 * tick as f64, &[], &mut moves);
            }
            used.restart();
            assert_eq!(format!("{used:?}"), format!("{fresh:?}"));
        }
    }
}
