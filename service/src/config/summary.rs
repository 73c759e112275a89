//! What `ridgeline check` tells about each loop of a valid config: how its dither is
//! sampled and filtered, and how fast the averaged loop should converge.

use std::fmt;

use super::{Config, LoopConfig};
use crate::seek::filter::highpass_gain_at;

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
    /// Predicted convergence time constant when `curvature_hint` is set (DESIGN.md §4).
    pub time_constant_s: Option<f64>,
    pub warnings: Vec<String>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct LoopSummary {
    pub name: String,
    pub direction: &'static str,
    pub tick_s: f64,
    pub start_mode: &'static str,
    pub curvature_hint: Option<f64>,
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
            let time_constant = l.curvature_hint.map(|c| time_constant_s(l.tick_s, input.gain, c, reh));
            match time_constant {
                Some(Some(tau)) if tau < 5.0 * input.dither_period_s => warnings.push(format!(
                    "adaptation is faster than 5 dither periods ({:.1} periods); common practice keeps it slower \
                     so the gradient estimate averages over several periods",
                    tau / input.dither_period_s
                )),
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
        curvature_hint: l.curvature_hint,
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
            if let (Some(tau), Some(hint)) = (i.time_constant_s, self.curvature_hint) {
                writeln!(
                    f,
                    "    predicted time constant {tau:.1} s ({:.1} dither periods) for |d2J/du2| = {hint}",
                    tau * i.dither_hz
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
