//! The classic sine-dither method: high-pass the objective, demodulate it against each
//! input's dither, integrate the gradient estimate.

use std::f64::consts::TAU;

use super::filter::FirstOrder;
use super::{Method, Move};

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

#[derive(Debug, Clone)]
struct Channel {
    amplitude: f64,
    /// Dither periods per tick, `tick_s / period_s`.
    cycles_per_tick: f64,
    /// `2 / amplitude`: turns the demodulated signal into objective units per input unit.
    normalise: f64,
    /// `sign * tick_s * gain`: turns a gradient into a change of the estimate.
    step_per_gradient: f64,
    lowpass: Option<FirstOrder>,
    /// `sin` of the phase of the last tick that computed one, to reuse as the next
    /// tick's demodulation reference when `phase_deg` is zero.
    last_sin: Option<(u64, f64)>,
}

/// The sine method of DESIGN.md §4 for any number of inputs, each with its own dither.
#[derive(Debug, Clone)]
pub struct Sine {
    highpass: FirstOrder,
    phase_rad: f64,
    channels: Vec<Channel>,
}

impl Sine {
    pub fn new(settings: &SineSettings) -> Self {
        let fs = 1.0 / settings.tick_s;
        let channels = settings
            .inputs
            .iter()
            .map(|input| Channel {
                amplitude: input.amplitude,
                cycles_per_tick: settings.tick_s / input.period_s,
                normalise: 2.0 / input.amplitude,
                step_per_gradient: settings.sign * settings.tick_s * input.gain,
                lowpass: settings.lowpass_hz.map(|fc| FirstOrder::lowpass(fc, fs)),
                last_sin: None,
            })
            .collect();
        Sine {
            highpass: FirstOrder::highpass(settings.highpass_hz, fs),
            phase_rad: settings.phase_deg.to_radians(),
            channels,
        }
    }
}

/// Dither phase at `tick`, reduced to one period so `sin` stays accurate for long runs.
#[inline]
fn phase(tick: f64, cycles_per_tick: f64) -> f64 {
    let cycles = tick * cycles_per_tick;
    TAU * (cycles - cycles.floor())
}

impl Method for Sine {
    fn step(&mut self, tick: u64, objective: f64, moves: &mut [Move]) {
        let hp = self.highpass.filter(objective);
        let phase_rad = self.phase_rad;
        for (ch, mv) in self.channels.iter_mut().zip(moves.iter_mut()) {
            // The objective read now answers the setpoint written at the previous tick.
            let reference = match ch.last_sin {
                Some((t, s)) if phase_rad == 0.0 && tick.checked_sub(1) == Some(t) => s,
                _ => (phase(tick as f64 - 1.0, ch.cycles_per_tick) - phase_rad).sin(),
            };
            let raw = ch.normalise * hp * reference;
            let gradient = match &mut ch.lowpass {
                Some(lp) => lp.filter(raw),
                None => raw,
            };
            let s = phase(tick as f64, ch.cycles_per_tick).sin();
            ch.last_sin = Some((tick, s));
            *mv = Move { gradient, step: ch.step_per_gradient * gradient, dither: ch.amplitude * s };
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
