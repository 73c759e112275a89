//! The tuning recommended for a fitted plant: dither period, phase, high-pass, amplitude,
//! gain and rate limit, each with the reason it has, from the averaged formulas of
//! CHECKS.md "Speed with plant dynamics".

use std::f64::consts::TAU;

use serde::Serialize;

use crate::config::summary::time_constant_s;
use crate::config::{Direction, Range, show};
use crate::seek::filter::FirstOrder;

/// What is known of the plant: the `[loops.model]` of a config, or a fit.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct PlantModel {
    pub lag_s: f64,
    pub dead_time_s: f64,
    /// `|d2J/du2|` near the optimum.
    pub curvature: f64,
    pub noise_std: f64,
}

/// Common practice, no single source (CHECKS.md): the dither period is at least 3 to 10
/// times the plant's lag plus dead time; Ridgeline takes the fastest end of that range and
/// compensates the plant's phase instead.
pub const PERIOD_PER_RESPONSE: f64 = 3.0;
/// Fewest ticks in a dither period: fewer and the sampled sine is a poor sine (common practice).
pub const MIN_TICKS_PER_PERIOD: f64 = 10.0;
/// High-pass cutoff as a fraction of the dither frequency (common practice: 1/10 to 1/2).
pub const HIGHPASS_RATIO: f64 = 0.2;
/// Default convergence time constant in dither periods; common practice keeps adaptation
/// at least 5 periods slow so that the gradient estimate averages over several.
pub const DEFAULT_PERIODS_PER_TIME_CONSTANT: f64 = 10.0;
pub const MIN_PERIODS_PER_TIME_CONSTANT: f64 = 5.0;
/// Margin of the recommended rate limit over what dither and convergence need.
const RATE_MARGIN: f64 = 1.2;

/// Gain and phase lag (radians) of a first-order lag with dead time at `w` rad/s:
/// `G(s) = e^{-Ls} / (Ts + 1)`, so `|G| = 1/sqrt(1 + (wT)^2)` and the lag is `atan(wT) + wL`.
pub fn plant_response(lag_s: f64, dead_time_s: f64, w: f64) -> (f64, f64) {
    (1.0 / (1.0 + (w * lag_s).powi(2)).sqrt(), (w * lag_s).atan() + w * dead_time_s)
}

/// Gain and phase lag of the plant as the loop sees it: the setpoint written at one tick
/// is held until the next, and the objective read at the next tick is demodulated
/// against the dither written at this one. The lag held over a tick `h` is then exactly
/// `(1 - p) / (1 - p e^{-jwh})` with `p = e^{-h/T}`, times the dead time's `e^{-jwL}`.
/// For `h` much shorter than `T` this tends to [`plant_response`].
pub fn sampled_response(lag_s: f64, dead_time_s: f64, w: f64, tick_s: f64) -> (f64, f64) {
    let p = if lag_s > 0.0 { (-tick_s / lag_s).exp() } else { 0.0 };
    let (s, c) = (w * tick_s).sin_cos();
    // 1 - p e^{-jwh} = (1 - p c) + j p s
    let (re, im) = (1.0 - p * c, p * s);
    ((1.0 - p) / re.hypot(im), im.atan2(re) + w * dead_time_s)
}

/// The factor by which the plant and the high-pass slow the averaged gradient:
/// `|G| |H| cos(phi)` with `phi = arg G + arg H + phase_deg`, the phase left
/// uncompensated. `1/tau = gain * |d2J/du2| * factor` (CHECKS.md, Tan et al.).
pub fn loop_factor(
    (lag_s, dead_time_s): (f64, f64),
    tick_s: f64,
    dither_period_s: f64,
    highpass_hz: f64,
    phase_deg: f64,
) -> f64 {
    let w = TAU / dither_period_s;
    let (g, lag) = sampled_response(lag_s, dead_time_s, w, tick_s);
    let (h, lead) = highpass(dither_period_s, highpass_hz, tick_s);
    g * h * (lead - lag + phase_deg.to_radians()).cos()
}

/// Gain and phase lead (radians) of the loop's discrete high-pass at the dither frequency.
fn highpass(dither_period_s: f64, highpass_hz: f64, tick_s: f64) -> (f64, f64) {
    let (re, im) =
        FirstOrder::highpass(highpass_hz, 1.0 / tick_s).response(1.0 / dither_period_s, 1.0 / tick_s);
    (re.hypot(im), im.atan2(re))
}

/// The loss the dither costs once converged: `|d2J/du2| (a |G|)^2 / 4` (CHECKS.md; the
/// objective swings by `a |G|` around a peak of curvature `c = |d2J/du2| / 2`).
pub fn dither_loss(curvature: f64, amplitude: f64, plant_gain: f64) -> f64 {
    curvature * (amplitude * plant_gain).powi(2) / 4.0
}

/// The loop around the plant: what the recommendation must fit into.
#[derive(Debug, Clone, PartialEq)]
pub struct Goal {
    pub tick_s: f64,
    pub bounds: Range,
    pub direction: Direction,
    /// Wanted convergence time constant; default 10 dither periods.
    pub time_constant_s: Option<f64>,
    /// Largest steady loss the dither may cost; default the objective's noise.
    pub max_loss: Option<f64>,
    /// A rate limit already configured, to compare with what the loop needs.
    pub configured_rate_per_s: Option<f64>,
    /// The largest move from the starting setpoint in the record: the dither goes no
    /// further than the process was agreed to go in the test.
    pub largest_move: Option<f64>,
}

/// One recommended value and why.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Reasoned {
    pub value: f64,
    pub reason: String,
}

/// A tuning for one input of a sine loop.
#[derive(Debug, Clone, PartialEq)]
pub struct Recommendation {
    pub tick_s: f64,
    pub dither_period_s: Reasoned,
    pub dither_amplitude: Reasoned,
    pub highpass_hz: Reasoned,
    pub phase_deg: Reasoned,
    pub gain: Reasoned,
    pub max_rate_per_s: Reasoned,
    /// The averaged loop's time constant with these values.
    pub time_constant_s: f64,
    /// The dither's steady loss with these values.
    pub mean_loss: f64,
    /// The plant's gain at the dither frequency, as the loop samples it.
    pub plant_gain: f64,
    pub warnings: Vec<String>,
}

/// Rounds to four significant digits, so the pasted values read as chosen, not computed.
pub fn round4(x: f64) -> f64 {
    if x == 0.0 || !x.is_finite() {
        return x;
    }
    let scale = 10f64.powi(3 - x.abs().log10().floor() as i32);
    (x * scale).round() / scale
}

/// The tuning for `model` in `goal`.
pub fn recommend(model: &PlantModel, goal: &Goal) -> Recommendation {
    let h = goal.tick_s;
    let mut warnings = Vec::new();
    let response_s = model.lag_s + model.dead_time_s;
    let ticks = (PERIOD_PER_RESPONSE * response_s / h).ceil().max(MIN_TICKS_PER_PERIOD);
    let period = ticks * h;
    let period_reason = if ticks == MIN_TICKS_PER_PERIOD {
        format!(
            "{MIN_TICKS_PER_PERIOD} ticks, the fewest that still draw a sine (common practice); the plant responds within {} s",
            show(round4(response_s))
        )
    } else {
        format!(
            "{ticks} ticks: at least {PERIOD_PER_RESPONSE} x (lag + dead time) = {} s, so the plant follows the dither \
             (common practice: 3 to 10 times)",
            show(round4(PERIOD_PER_RESPONSE * response_s))
        )
    };
    let w = TAU / period;
    let highpass_hz = round4(HIGHPASS_RATIO / period);
    let (g, plant_lag) = sampled_response(model.lag_s, model.dead_time_s, w, h);
    let (hp, hp_lead) = highpass(period, highpass_hz, h);
    let phase_deg = ((plant_lag - hp_lead).to_degrees() * 10.0).round() / 10.0;

    let max_loss = goal.max_loss.unwrap_or(model.noise_std);
    let loss_reason = match goal.max_loss {
        Some(l) => format!("the allowed loss {}", show(l)),
        None => format!(
            "a loss equal to the objective's noise ({}; set --max-loss to choose)",
            show(round4(max_loss))
        ),
    };
    let span = goal.bounds.span();
    let by_loss = (4.0 * max_loss / model.curvature).sqrt() / g;
    let largest_move = goal.largest_move.unwrap_or(f64::INFINITY);
    let (amplitude, amplitude_reason) = if by_loss <= (span / 4.0).min(largest_move) {
        (
            round4(by_loss),
            format!(
                "the largest whose steady loss |d2J/du2| (a |G|)^2 / 4 stays within {loss_reason}, with the plant passing \
                 {:.3} of the dither",
                g
            ),
        )
    } else if largest_move <= span / 4.0 {
        (
            round4(largest_move),
            format!(
                "the largest move of the bump test, which the process was agreed to take: {loss_reason} would allow {}",
                show(round4(by_loss))
            ),
        )
    } else {
        (
            round4(span / 4.0),
            format!("a quarter of the bounds' span: {loss_reason} would allow {}", show(round4(by_loss))),
        )
    };
    if goal.max_loss.is_some_and(|l| l < model.noise_std / 10.0) {
        warnings.push(format!(
            "the allowed loss {} is under a tenth of the objective's noise ({}): the dither's response will be hard \
             to see and the gradient estimate noisy",
            show(max_loss),
            show(round4(model.noise_std))
        ));
    }

    let (tau, tau_reason) = match goal.time_constant_s {
        Some(t) => (t, format!("the requested time constant of {}", show(t))),
        None => (
            DEFAULT_PERIODS_PER_TIME_CONSTANT * period,
            format!(
                "{DEFAULT_PERIODS_PER_TIME_CONSTANT} dither periods (common practice: at least {MIN_PERIODS_PER_TIME_CONSTANT})"
            ),
        ),
    };
    if tau < MIN_PERIODS_PER_TIME_CONSTANT * period {
        warnings.push(format!(
            "the time constant {} s is under {MIN_PERIODS_PER_TIME_CONSTANT} dither periods ({} s): the gradient \
             estimate will not average over enough periods, and the plant's phase will matter more",
            show(round4(tau)),
            show(MIN_PERIODS_PER_TIME_CONSTANT * period)
        ));
    }
    let factor = loop_factor((model.lag_s, model.dead_time_s), h, period, highpass_hz, phase_deg);
    let per_tick = (1.0 - (-h / tau).exp()) / h;
    let gain = round4(per_tick / (model.curvature * factor));
    let time_constant = time_constant_s(h, gain, model.curvature, factor).unwrap_or(tau);

    let dither_rate = TAU * amplitude / period;
    let move_rate = span / time_constant;
    let rate = round4(RATE_MARGIN * (dither_rate + move_rate));
    if let Some(configured) = goal.configured_rate_per_s
        && configured < dither_rate + move_rate
    {
        warnings.push(format!(
            "the configured max_rate_per_s {} is below what the loop needs ({}): the rate limit will slow it",
            show(configured),
            show(round4(dither_rate + move_rate))
        ));
    }
    let loss = dither_loss(model.curvature, amplitude, g);
    Recommendation {
        tick_s: h,
        dither_period_s: Reasoned { value: period, reason: period_reason },
        dither_amplitude: Reasoned { value: amplitude, reason: amplitude_reason },
        highpass_hz: Reasoned {
            value: highpass_hz,
            reason: "a fifth of the dither frequency (common practice: 1/10 to 1/2)".to_owned(),
        },
        phase_deg: Reasoned {
            value: phase_deg,
            reason: format!(
                "the plant's lag at the dither frequency ({:.1} deg, the lag and dead time as sampled each tick) less \
                 the high-pass's lead ({:.1} deg)",
                plant_lag.to_degrees(),
                hp_lead.to_degrees()
            ),
        },
        gain: Reasoned {
            value: gain,
            reason: format!(
                "for {tau_reason}: 1/tau = gain |d2J/du2| |G| |H| = gain x {} x {:.3} x {:.3}",
                show(round4(model.curvature)),
                g,
                hp
            ),
        },
        max_rate_per_s: Reasoned {
            value: rate,
            reason: format!(
                "the dither's fastest swing 2 pi a / period ({}) plus crossing the bounds in one time constant ({}), \
                 with 20% to spare",
                show(round4(dither_rate)),
                show(round4(move_rate))
            ),
        },
        time_constant_s: time_constant,
        mean_loss: loss,
        plant_gain: g,
        warnings,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const MODEL: PlantModel = PlantModel { lag_s: 40.0, dead_time_s: 12.0, curvature: 4.0, noise_std: 0.03 };

    fn goal() -> Goal {
        Goal {
            tick_s: 1.0,
            bounds: Range { min: 1.0, max: 4.0 },
            direction: Direction::Maximize,
            time_constant_s: None,
            max_loss: None,
            configured_rate_per_s: None,
            largest_move: None,
        }
    }

    #[test]
    fn the_sampled_response_tends_to_the_continuous_one_for_short_ticks() {
        let (g, lag) = plant_response(10.0, 3.0, 0.1);
        let (gs, lags) = sampled_response(10.0, 3.0, 0.1, 1e-4);
        assert!((g - gs).abs() < 1e-5 && (lag - lags).abs() < 1e-5, "{g} {gs} {lag} {lags}");
        assert_eq!(sampled_response(0.0, 0.0, 0.3, 1.0), (1.0, 0.0), "a static plant as sampled");
    }

    #[test]
    fn the_recommendation_meets_its_own_rules() {
        let r = recommend(&MODEL, &goal());
        assert_eq!(r.dither_period_s.value, 156.0, "3 x (40 + 12) s in whole ticks");
        assert!((r.highpass_hz.value * r.dither_period_s.value - 0.2).abs() < 1e-3);
        assert!((r.time_constant_s / (10.0 * 156.0) - 1.0).abs() < 0.01, "{}", r.time_constant_s);
        assert!(r.mean_loss <= 0.03 * 1.001, "{}", r.mean_loss);
        assert!(r.dither_amplitude.value <= 3.0 / 4.0);
        // With the phase compensated, the loop factor is |G| |H| to within the rounding.
        let f =
            loop_factor((MODEL.lag_s, MODEL.dead_time_s), 1.0, 156.0, r.highpass_hz.value, r.phase_deg.value);
        assert!(f > 0.99 * r.plant_gain * 0.98, "{f}");
        assert!(r.warnings.is_empty(), "{:?}", r.warnings);
    }

    #[test]
    fn a_short_time_constant_and_a_tight_rate_limit_are_warned_of() {
        let r = recommend(
            &MODEL,
            &Goal { time_constant_s: Some(300.0), configured_rate_per_s: Some(1e-4), ..goal() },
        );
        assert_eq!(r.warnings.len(), 2, "{:?}", r.warnings);
        assert!(r.warnings[0].contains("under 5 dither periods"));
        assert!(r.warnings[1].contains("max_rate_per_s"));
    }
}
