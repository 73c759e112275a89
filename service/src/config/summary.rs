//! What `ridgeline check` tells about each loop of a valid config: how its dither is
//! sampled and filtered (or its steps timed), and how fast the loop should converge.

use std::fmt;

use super::{Config, Dither, Filter, InputConfig, LoopConfig, MethodConfig, NewtonConfig, StepwiseConfig};
use std::f64::consts::TAU;

use crate::seek::filter::highpass_gain_at;
use crate::tune::recommend::{PERIOD_PER_RESPONSE, loop_factor, sampled_response};

/// How a dither is sampled and filtered.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DitherSummary {
    pub hz: f64,
    pub ticks_per_period: f64,
    /// High-pass cutoff as a fraction of the dither frequency.
    pub highpass_ratio: f64,
    /// Real part of the high-pass response at the dither frequency.
    pub reh: f64,
}

/// One input of one loop, as `check` reports it.
#[derive(Debug, Clone, PartialEq)]
pub struct InputSummary {
    pub name: String,
    /// None for the stepwise method.
    pub dither: Option<DitherSummary>,
    /// Stepwise: the step and how long the rate limit takes to make it.
    pub step: Option<(f64, f64)>,
    /// Predicted convergence time constant (DESIGN.md §4): sine's when the curvature is
    /// known, Newton's always, with the plant's gain and phase when `[loops.model]` has them.
    pub time_constant_s: Option<f64>,
    pub warnings: Vec<String>,
}

/// Stepwise: what a dwell gives, against the plant when it is known.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DwellSummary {
    pub dwell_s: f64,
    pub average_s: f64,
    /// `L + 3.91 T` of `[loops.model]`: the time to settle within 2%.
    pub settle_s: Option<f64>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct LoopSummary {
    pub name: String,
    pub direction: &'static str,
    pub method: &'static str,
    pub tick_s: f64,
    pub start_mode: &'static str,
    pub curvature: Option<f64>,
    /// Whether the prediction includes the plant's lag and dead time.
    pub with_dynamics: bool,
    pub dwell: Option<DwellSummary>,
    pub inputs: Vec<InputSummary>,
    /// One sentence per constraint: what it limits and how the loop keeps to it.
    pub constraints: Vec<String>,
    /// How long a constraint's value must stay inside before it is released: one cycle.
    pub release_after_s: f64,
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

/// Newton's averaged time constant: the gradient is seen through the plant and filters
/// at the dither frequency, the curvature at twice it (with twice the phase), so the
/// rate `1/time_constant_s` is scaled by the ratio of the two factors.
pub fn newton_time_constant_s(
    tick_s: f64,
    newton: &NewtonConfig,
    plant: (f64, f64),
    period_s: f64,
    filter: &Filter,
) -> Option<f64> {
    let gradient = loop_factor(plant, tick_s, period_s, filter.highpass_hz, filter.phase_deg);
    let curvature = loop_factor(plant, tick_s, period_s / 2.0, filter.highpass_hz, 2.0 * filter.phase_deg);
    time_constant_s(tick_s, 1.0 / newton.time_constant_s, 1.0, gradient / curvature)
}

/// Settling time of a first-order lag with dead time to within 2%: `L + T ln(50)`
/// (CHECKS.md, stepwise dwell rule).
pub fn settle_s(lag_s: f64, dead_time_s: f64) -> f64 {
    dead_time_s + lag_s * 50f64.ln()
}

pub fn summarize(config: &Config) -> Vec<LoopSummary> {
    config.loops.iter().map(summarize_loop).collect()
}

fn summarize_loop(l: &LoopConfig) -> LoopSummary {
    let dynamics = l.model.filter(|m| m.lag_s > 0.0 || m.dead_time_s > 0.0).map(|m| (m.lag_s, m.dead_time_s));
    let (inputs, dwell) = match &l.method {
        MethodConfig::Sine { filter } => {
            (l.inputs.iter().map(|i| dithered(l, i, filter, dynamics, None)).collect(), None)
        }
        MethodConfig::Newton { filter, newton } => {
            (l.inputs.iter().map(|i| dithered(l, i, filter, dynamics, Some(newton))).collect(), None)
        }
        MethodConfig::Stepwise(s) => stepped(l, s),
    };
    LoopSummary {
        name: l.name.clone(),
        direction: l.direction.as_str(),
        method: l.method.kind().as_str(),
        tick_s: l.tick_s,
        start_mode: l.start_mode.as_str(),
        curvature: l.curvature(),
        with_dynamics: dynamics.is_some(),
        dwell,
        inputs,
        constraints: l.constraints.iter().map(describe_constraint).collect(),
        release_after_s: l.cycle_s(),
    }
}

fn describe_constraint(c: &super::ConstraintConfig) -> String {
    let how = match &c.handling {
        super::Handling::Penalty { weight } => {
            format!("penalty: the objective is worsened by {weight} x excess^2 past the limit")
        }
        super::Handling::BackOff { moves, margin } => {
            let moves: Vec<String> = moves.iter().map(|m| format!("{} {}", m.input, m.way)).collect();
            format!(
                "back_off: past the limit, walks {} at the rate limit until {margin} inside",
                moves.join(", ")
            )
        }
    };
    format!("constraint {}: {} {}; {how}", c.name, c.value.source(), c.limit)
}

/// An input of the sine or the Newton method.
fn dithered(
    l: &LoopConfig,
    input: &InputConfig,
    filter: &Filter,
    dynamics: Option<(f64, f64)>,
    newton: Option<&NewtonConfig>,
) -> InputSummary {
    // Validation makes every input of these methods dithered.
    let d = input.dither.unwrap_or(Dither { amplitude: 0.0, period_s: f64::NAN });
    let f = d.hz();
    let fs = 1.0 / l.tick_s;
    let reh = highpass_gain_at(f, filter.highpass_hz, fs);
    let ratio = filter.highpass_hz / f;
    let mut warnings = Vec::new();
    // Common practice, no single source: a cutoff between f/10 and f/2 removes the
    // objective's mean and slow drift while passing the dither response.
    if !(0.1..=0.5).contains(&ratio) {
        warnings.push(format!(
            "the high-pass cutoff is {ratio:.3} of the dither frequency; common practice keeps it between 0.1 and 0.5"
        ));
    }
    if let Some((lag_s, dead_time_s)) = dynamics {
        let (_, plant_lag) = sampled_response(lag_s, dead_time_s, TAU * f, l.tick_s);
        let plant_lag = plant_lag.to_degrees();
        if (filter.phase_deg - plant_lag).abs() > 30.0 {
            warnings.push(format!(
                "phase_deg = {} is {:.0} degrees from the plant's lag at the dither frequency ({plant_lag:.1} \
                 degrees from [loops.model]): the gradient estimate loses cos of the difference; set phase_deg \
                 near {plant_lag:.0} (`ridgeline tune` gives the exact value)",
                filter.phase_deg,
                (filter.phase_deg - plant_lag).abs()
            ));
        }
        let response = lag_s + dead_time_s;
        if d.period_s < PERIOD_PER_RESPONSE * response {
            warnings.push(format!(
                "the dither period {} s is shorter than {PERIOD_PER_RESPONSE} x (lag + dead time) = {} s of \
                 [loops.model]: the plant smooths the dither away (common practice: 3 to 10 times)",
                d.period_s,
                PERIOD_PER_RESPONSE * response
            ));
        }
    }
    let plant = dynamics.unwrap_or((0.0, 0.0));
    let factor = match dynamics {
        Some(p) => loop_factor(p, l.tick_s, d.period_s, filter.highpass_hz, filter.phase_deg),
        None => reh,
    };
    let time_constant = match newton {
        Some(n) => Some(newton_time_constant_s(l.tick_s, n, plant, d.period_s, filter)),
        None => l.curvature().map(|c| time_constant_s(l.tick_s, input.gain.unwrap_or(0.0), c, factor)),
    };
    match time_constant {
        Some(Some(tau)) if tau < 5.0 * d.period_s => warnings.push(format!(
            "adaptation is faster than 5 dither periods ({:.1} periods); common practice keeps it slower \
             so the gradient estimate averages over several periods",
            tau / d.period_s
        )),
        Some(None) if factor <= 0.0 => warnings.push(
            "phase_deg leaves the demodulated gradient at zero or reversed (the phase error is 90 degrees or \
             more): the loop would not converge"
                .to_owned(),
        ),
        Some(None) if newton.is_some() => warnings.push(
            "time_constant_s is so short that the averaged loop would overshoot in one tick".to_owned(),
        ),
        Some(None) => warnings.push(
            "the gain is so high that the averaged loop would overshoot in one tick; lower `gain`".to_owned(),
        ),
        _ => {}
    }
    InputSummary {
        name: input.name.clone(),
        dither: Some(DitherSummary {
            hz: f,
            ticks_per_period: d.period_s / l.tick_s,
            highpass_ratio: ratio,
            reh,
        }),
        step: None,
        time_constant_s: time_constant.flatten(),
        warnings,
    }
}

/// The inputs and the dwell of the stepwise method.
fn stepped(l: &LoopConfig, s: &StepwiseConfig) -> (Vec<InputSummary>, Option<DwellSummary>) {
    let settle =
        l.model.filter(|m| m.lag_s > 0.0 || m.dead_time_s > 0.0).map(|m| settle_s(m.lag_s, m.dead_time_s));
    let samples = (s.average_s / l.tick_s).round().max(1.0);
    let inputs = l
        .inputs
        .iter()
        .map(|input| {
            let step = input.step.unwrap_or(0.0);
            let ramp_s = step / input.max_rate_per_s;
            let mut warnings = Vec::new();
            if let Some(settle) = settle
                && s.dwell_s - s.average_s < ramp_s + settle
            {
                warnings.push(format!(
                    "the objective is averaged from {} s into each dwell, before the plant has settled \
                     ({} s to ramp the step, {settle:.1} s for [loops.model] to settle within 2%: L + 3.91 T): \
                     lengthen dwell_s to at least {:.1} s",
                    s.dwell_s - s.average_s,
                    ramp_s,
                    ramp_s + settle + s.average_s
                ));
            }
            // CHECKS.md (stepwise): the step's effect c step^2 must exceed the noise of
            // the difference of two averages, 2 sqrt(2) sigma / sqrt(n).
            if let (Some(c), Some(noise)) = (l.curvature(), l.model.and_then(|m| m.noise_std)) {
                let effect = c / 2.0 * step * step;
                let floor = 2.0 * 2f64.sqrt() * noise / samples.sqrt();
                if effect < floor {
                    warnings.push(format!(
                        "a step of {step} changes the objective by about {effect:.3e} near the optimum, less than \
                         the noise of two averages of {samples} samples ({floor:.3e}): the comparisons would be \
                         decided by noise; take a larger step or a longer average_s"
                    ));
                }
            }
            InputSummary {
                name: input.name.clone(),
                dither: None,
                step: Some((step, ramp_s)),
                time_constant_s: None,
                warnings,
            }
        })
        .collect();
    (inputs, Some(DwellSummary { dwell_s: s.dwell_s, average_s: s.average_s, settle_s: settle }))
}

impl fmt::Display for LoopSummary {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        writeln!(
            f,
            "loop {}: {}, method {}, tick {} s, starts {}",
            self.name, self.direction, self.method, self.tick_s, self.start_mode
        )?;
        if let Some(d) = &self.dwell {
            write!(f, "  dwell {} s, the objective averaged over its last {} s", d.dwell_s, d.average_s)?;
            if let Some(settle) = d.settle_s {
                write!(f, "; the plant settles within 2% in {settle:.1} s")?;
            }
            writeln!(f)?;
        }
        for i in &self.inputs {
            if let Some(d) = &i.dither {
                writeln!(
                    f,
                    "  input {}: dither {:.6} Hz ({:.1} ticks per period), high-pass cutoff {:.3} x dither frequency, ReH {:.4}",
                    i.name, d.hz, d.ticks_per_period, d.highpass_ratio, d.reh
                )?;
            }
            if let Some((step, ramp_s)) = i.step {
                writeln!(f, "  input {}: step {step}, made in {ramp_s:.1} s at the rate limit", i.name)?;
                if let Some(c) = self.curvature {
                    // The steady three-level cycle's mean loss, c step^2 / 2 with |J''| = 2c.
                    writeln!(
                        f,
                        "    steady cycle: a step either side of the optimum, one step every {} s; mean loss about \
                         {:.4} (|d2J/du2| step^2 / 4)",
                        self.dwell.map_or(0.0, |d| d.dwell_s),
                        c * step * step / 4.0
                    )?;
                }
            }
            if let (Some(tau), Some(d)) = (i.time_constant_s, &i.dither) {
                let because = match (self.method, self.curvature) {
                    ("newton", _) => " whatever the curvature".to_owned(),
                    (_, Some(c)) => format!(" for |d2J/du2| = {c}"),
                    _ => String::new(),
                };
                writeln!(
                    f,
                    "    predicted time constant {tau:.1} s ({:.1} dither periods){because}{}",
                    tau * d.hz,
                    if self.with_dynamics { ", with the plant's lag and dead time" } else { "" }
                )?;
            }
            for w in &i.warnings {
                writeln!(f, "    warning: {w}")?;
            }
        }
        for c in &self.constraints {
            writeln!(f, "  {c}")?;
        }
        if !self.constraints.is_empty() {
            writeln!(
                f,
                "    a constraint is released once its value has stayed inside for {} s (one cycle of the method)",
                self.release_after_s
            )?;
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
