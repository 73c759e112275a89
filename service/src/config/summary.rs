//! What `ridgeline check` tells about each loop of a valid config: how its dither is
//! sampled and filtered, and how fast the averaged loop should converge.

use std::fmt;

use super::{Config, LoopConfig};
use std::f64::consts::TAU;

use crate::seek::filter::highpass_gain_at;
use crate::tune::recommend::{PERIOD_PER_RESPONSE, loop_factor, sampled_response};

/// One input of one loop, as `check` reports it.
#[derive(Debug, Clone, PartialEq)]
pub struct InputSummary {
    pub name: String,
    pub dither_hz: f64,
    pub ticks_per_period: f64,
    /// High-pass cutoff as a fraction of the dither frequency.
    pub highpass_ratio: f64,
    /// Real part of the high-pass response at the dither frequency.
    pub reh: f64,
    /// Predicted convergence time constant when the curvature is known (DESIGN.md §4),
    /// with the plant's gain and phase at the dither frequency when `[loops.model]` has them.
    pub time_constant_s: Option<f64>,
    pub warnings: Vec<String>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct LoopSummary {
    pub name: String,
    pub direction: &'static str,
    pub tick_s: f64,
    pub start_mode: &'static str,
    pub curvature: Option<f64>,
    /// Whether the prediction includes the plant's lag and dead time.
    pub with_dynamics: bool,
    pub inputs: Vec<InputSummary>,
}

/// Averaged convergence time constant of the error for `J = J* - c (u - u*)^2`, with
/// `curvature = |d2J/du2| = 2c`: the rate is `lambda = 2 gain c factor` and per tick the
/// error shrinks by `1 - T lambda`. `factor` is ReH for a static plant, `|G| |H| cos(phi)`
/// behind a plant with dynamics. `None` unless `0 < T lambda < 1`, where averaging says
/// nothing or the loop runs away.
pub fn time_constant_s(tick_s: f64, gain: f64, curvature: f64, factor: f64) -> Option<f64> {
    let per_tick = tick_s * gain * curvature * factor;
    (per_tick > 0.0 && per_tick < 1.0).then(|| -tick_s / (1.0 - per_tick).ln())
}

pub fn summarize(config: &Config) -> Vec<LoopSummary> {
    config.loops.iter().map(summarize_loop).collect()
}

fn summarize_loop(l: &LoopConfig) -> LoopSummary {
    let fs = 1.0 / l.tick_s;
    let inputs = l
        .inputs
        .iter()
        .map(|input| {
            let f = input.dither_hz();
            let reh = highpass_gain_at(f, l.filter.highpass_hz, fs);
            let ratio = l.filter.highpass_hz / f;
            let mut warnings = Vec::new();
            // Common practice, no single source: a cutoff between f/10 and f/2 removes the
            // objective's mean and slow drift while passing the dither response.
            if !(0.1..=0.5).contains(&ratio) {
                warnings.push(format!(
                    "the high-pass cutoff is {ratio:.3} of the dither frequency; common practice keeps it between 0.1 and 0.5"
                ));
            }
            let factor = match &l.model {
                Some(m) if m.lag_s > 0.0 || m.dead_time_s > 0.0 => {
                    let (_, plant_lag) = sampled_response(m.lag_s, m.dead_time_s, TAU * f, l.tick_s);
                    let plant_lag = plant_lag.to_degrees();
                    if (l.filter.phase_deg - plant_lag).abs() > 30.0 {
                        warnings.push(format!(
                            "phase_deg = {} is {:.0} degrees from the plant's lag at the dither frequency ({plant_lag:.1} \
                             degrees from [loops.model]): the gradient estimate loses cos of the difference; set phase_deg \
                             near {plant_lag:.0} (`ridgeline tune` gives the exact value)",
                            l.filter.phase_deg,
                            (l.filter.phase_deg - plant_lag).abs()
                        ));
                    }
                    let response = m.lag_s + m.dead_time_s;
                    if input.dither_period_s < PERIOD_PER_RESPONSE * response {
                        warnings.push(format!(
                            "the dither period {} s is shorter than {PERIOD_PER_RESPONSE} x (lag + dead time) = {} s of \
                             [loops.model]: the plant smooths the dither away (common practice: 3 to 10 times)",
                            input.dither_period_s,
                            PERIOD_PER_RESPONSE * response
                        ));
                    }
                    loop_factor((m.lag_s, m.dead_time_s), l.tick_s, input.dither_period_s, l.filter.highpass_hz, l.filter.phase_deg)
                }
                _ => reh,
            };
            let time_constant = l.curvature().map(|c| time_constant_s(l.tick_s, input.gain, c, factor));
            match time_constant {
                Some(Some(tau)) if tau < 5.0 * input.dither_period_s => warnings.push(format!(
                    "adaptation is faster than 5 dither periods ({:.1} periods); common practice keeps it slower \
                     so the gradient estimate averages over several periods",
                    tau / input.dither_period_s
                )),
                Some(None) if factor <= 0.0 => warnings.push(
                    "phase_deg leaves the demodulated gradient at zero or reversed (the phase error is 90 degrees or \
                     more): the loop would not converge"
                        .to_owned(),
                ),
                Some(None) => warnings.push(
                    "the gain is so high that the averaged loop would overshoot in one tick; lower `gain`".to_owned(),
                ),
                _ => {}
            }
            InputSummary {
                name: input.name.clone(),
                dither_hz: f,
                ticks_per_period: input.dither_period_s / l.tick_s,
                highpass_ratio: ratio,
                reh,
                time_constant_s: time_constant.flatten(),
                warnings,
            }
        })
        .collect();
    LoopSummary {
        name: l.name.clone(),
        direction: l.direction.as_str(),
        tick_s: l.tick_s,
        start_mode: l.start_mode.as_str(),
        curvature: l.curvature(),
        with_dynamics: l.model.is_some_and(|m| m.lag_s > 0.0 || m.dead_time_s > 0.0),
        inputs,
    }
}

impl fmt::Display for LoopSummary {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        writeln!(
            f,
            "loop {}: {}, tick {} s, starts {}",
            self.name, self.direction, self.tick_s, self.start_mode
        )?;
        for i in &self.inputs {
            writeln!(
                f,
                "  input {}: dither {:.6} Hz ({:.1} ticks per period), high-pass cutoff {:.3} x dither frequency, ReH {:.4}",
                i.name, i.dither_hz, i.ticks_per_period, i.highpass_ratio, i.reh
            )?;
            if let (Some(tau), Some(curvature)) = (i.time_constant_s, self.curvature) {
                writeln!(
                    f,
                    "    predicted time constant {tau:.1} s ({:.1} dither periods) for |d2J/du2| = {curvature}{}",
                    tau * i.dither_hz,
                    if self.with_dynamics { ", with the plant's lag and dead time" } else { "" }
                )?;
            }
            for w in &i.warnings {
                writeln!(f, "    warning: {w}")?;
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn time_constant_matches_the_classic_worked_case() {
        // Source: CHECKS.md "Classic loop": J = 10 - 2(u-3)^2 (|J''| = 4), fs = 1, f = 0.05,
        // fc = 0.01, gain = 0.00125 gives about 207.4 s.
        let reh = highpass_gain_at(0.05, 0.01, 1.0);
        let tau = time_constant_s(1.0, 0.00125, 4.0, reh).unwrap();
        assert!((tau - 207.4).abs() < 0.1, "{tau}");
    }

    #[test]
    fn no_time_constant_when_one_tick_would_overshoot() {
        assert_eq!(time_constant_s(1.0, 1.0, 2.0, 1.0), None);
    }
}
