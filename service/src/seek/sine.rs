//! The classic sine-dither method: high-pass the objective, demodulate it against each
//! input's dither, integrate the gradient estimate.

use std::f64::consts::TAU;

use super::filter::FirstOrder;
use super::{InputState, Method, Move};

/// Settings of one input's dither and integrator.
#[derive(Debug, Clone, Copy)]
pub struct SineInput {
    pub amplitude: f64,
    pub period_s: f64,
    pub gain: f64,
}

/// Settings of one loop.
#[derive(Debug, Clone)]
pub struct SineSettings {
    pub tick_s: f64,
    /// +1 to maximize, -1 to minimize.
    pub sign: f64,
    pub highpass_hz: f64,
    pub lowpass_hz: Option<f64>,
    pub phase_deg: f64,
    pub inputs: Vec<SineInput>,
}

/// Longest dither period, in ticks, that is tabulated rather than computed each tick.
const MAX_TABLE_TICKS: f64 = 65_536.0;

/// A channel's dither wave and its demodulation reference (the same wave delayed by
/// `phase_deg`).
#[derive(Debug, Clone)]
pub(super) enum Wave {
    /// The period is a whole number of ticks (the usual case): one value per tick of
    /// the period, so a tick costs a lookup and long runs lose no phase accuracy.
    Table { dither: Vec<f64>, reference: Vec<f64> },
    /// Any other period: computed from the phase reduced to one period.
    Computed { cycles_per_tick: f64, shift_rad: f64 },
}

impl Wave {
    pub(super) fn new(ticks_per_period: f64, shift_rad: f64) -> Self {
        let whole = ticks_per_period.round();
        if (ticks_per_period - whole).abs() <= 1e-9 * whole && whole <= MAX_TABLE_TICKS {
            let table =
                |shift: f64| (0..whole as usize).map(|k| (TAU * k as f64 / whole - shift).sin()).collect();
            Wave::Table { dither: table(0.0), reference: table(shift_rad) }
        } else {
            Wave::Computed { cycles_per_tick: 1.0 / ticks_per_period, shift_rad }
        }
    }

    /// `sin` of the phase at `tick - 1` minus the shift (the reference for the objective
    /// read at `tick`), and `sin` of the phase at `tick` (this tick's dither).
    #[inline]
    pub(super) fn at(&self, tick: i64) -> (f64, f64) {
        match self {
            Wave::Table { dither, reference } => {
                let k = tick.rem_euclid(dither.len() as i64) as usize;
                let previous = if k == 0 { dither.len() - 1 } else { k - 1 };
                (reference[previous], dither[k])
            }
            Wave::Computed { cycles_per_tick, shift_rad } => {
                let phase = |t: i64| {
                    let cycles = t as f64 * cycles_per_tick;
                    TAU * (cycles - cycles.floor())
                };
                ((phase(tick - 1) - shift_rad).sin(), phase(tick).sin())
            }
        }
    }
}

#[derive(Debug, Clone)]
struct Channel {
    amplitude: f64,
    wave: Wave,
    /// `2 / amplitude`: turns the demodulated signal into objective units per input unit.
    normalise: f64,
    /// `sign * tick_s * gain`: turns a gradient into a change of the estimate.
    step_per_gradient: f64,
    lowpass: Option<FirstOrder>,
}

/// The sine method of DESIGN.md §4 for any number of inputs, each with its own dither.
#[derive(Debug, Clone)]
pub struct Sine {
    highpass: FirstOrder,
    channels: Vec<Channel>,
}

impl Sine {
    pub fn new(settings: &SineSettings) -> Self {
        let fs = 1.0 / settings.tick_s;
        let channels = settings
            .inputs
            .iter()
            .map(|input| {
                let ticks_per_period = input.period_s / settings.tick_s;
                Channel {
                    amplitude: input.amplitude,
                    wave: Wave::new(ticks_per_period, settings.phase_deg.to_radians()),
                    normalise: 2.0 / input.amplitude,
                    step_per_gradient: settings.sign * settings.tick_s * input.gain,
                    lowpass: settings.lowpass_hz.map(|fc| FirstOrder::lowpass(fc, fs)),
                }
            })
            .collect();
        Sine { highpass: FirstOrder::highpass(settings.highpass_hz, fs), channels }
    }
}

impl Method for Sine {
    fn step(&mut self, tick: u64, objective: f64, _inputs: &[InputState], moves: &mut [Move]) {
        let hp = self.highpass.filter(objective);
        // Ticks beyond i64 would take 292 billion years at 1 per second.
        let tick = i64::try_from(tick).unwrap_or(i64::MAX);
        for (ch, mv) in self.channels.iter_mut().zip(moves.iter_mut()) {
            // The objective read now answers the setpoint written at the previous tick.
            let (reference, dither) = ch.wave.at(tick);
            let raw = ch.normalise * hp * reference;
            let gradient = match &mut ch.lowpass {
                Some(lp) => lp.filter(raw),
                None => raw,
            };
            *mv = Move { gradient, step: ch.step_per_gradient * gradient, dither: ch.amplitude * dither };
        }
    }

    fn restart(&mut self) {
        self.highpass.restart();
        for ch in &mut self.channels {
            if let Some(lp) = &mut ch.lowpass {
                lp.restart();
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tabulated_and_computed_waves_agree() {
        let table = Wave::new(20.0, 0.3);
        let computed = Wave::Computed { cycles_per_tick: 1.0 / 20.0, shift_rad: 0.3 };
        assert!(matches!(table, Wave::Table { .. }));
        for tick in 0..1000 {
            let (a, b) = (table.at(tick), computed.at(tick));
            assert!((a.0 - b.0).abs() < 1e-12 && (a.1 - b.1).abs() < 1e-12, "tick {tick}");
        }
    }

    #[test]
    fn periods_that_are_not_whole_ticks_are_computed() {
        assert!(matches!(Wave::new(100.0 / 7.0, 0.0), Wave::Computed { .. }));
        assert!(matches!(Wave::new(1e6, 0.0), Wave::Computed { .. }));
    }

    #[test]
    fn dither_starts_at_zero_phase() {
        let mut sine = Sine::new(&SineSettings {
            tick_s: 1.0,
            sign: 1.0,
            highpass_hz: 0.01,
            lowpass_hz: None,
            phase_deg: 0.0,
            inputs: vec![SineInput { amplitude: 0.5, period_s: 20.0, gain: 1.0 }],
        });
        let mut moves = [Move::default()];
        sine.step(0, 1.0, &[], &mut moves);
        assert_eq!(moves[0].dither, 0.0);
        sine.step(5, 1.0, &[], &mut moves);
        assert!((moves[0].dither - 0.5).abs() < 1e-15);
    }
}
