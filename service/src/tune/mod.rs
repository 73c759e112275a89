//! Commissioning: from a record of steps to a fitted plant ([`fit`]), a recommended
//! tuning ([`recommend`]) and its proof by rehearsal ([`prove`]). The fit and the
//! recommendation are pure; `ridgeline tune` and the bump-test route are thin callers.

pub mod fit;
pub mod prove;
pub mod recommend;
pub mod record;

use std::fmt;

use serde::Serialize;

use crate::config::{Direction, Range, show};
pub use fit::{Fit, FitError};
use prove::{Case, Rehearsed};
use recommend::round4;
pub use recommend::{Goal, PlantModel, Recommendation};
pub use record::{Record, RecordError, read_csv};

/// What the caller knows of the loop; anything left out is taken from the record.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Request {
    pub input: String,
    pub tick_s: Option<f64>,
    pub bounds: Option<Range>,
    pub direction: Option<Direction>,
    pub time_constant_s: Option<f64>,
    pub max_loss: Option<f64>,
    pub configured_rate_per_s: Option<f64>,
}

/// Why no tuning is given.
#[derive(Debug, thiserror::Error)]
pub enum TuneError {
    /// The record cannot be fitted.
    #[error(transparent)]
    Fit(#[from] FitError),
    /// The fit stands but does not justify a tuning.
    #[error("{0}")]
    Unjustified(String),
    /// The proving rehearsal failed to run.
    #[error("the proving rehearsal failed: {0:#}")]
    Proof(anyhow::Error),
}

/// The fitted plant, as `tune --json` prints it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FittedModel {
    pub lag_s: f64,
    pub lag_s_std: f64,
    pub dead_time_s: f64,
    pub dead_time_s_std: f64,
    pub gain_per_level: Vec<f64>,
    /// `|d2J/du2|`.
    pub curvature: f64,
    pub curvature_std: f64,
    /// `dJ/du` at the first level.
    pub slope: f64,
    /// Where the fitted map peaks (or bottoms), when that is inside the bounds.
    pub vertex: Option<f64>,
    pub noise_std: f64,
    pub fit_rmse: f64,
    pub levels: Vec<LevelOut>,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LevelOut {
    pub setpoint: f64,
    pub from_s: f64,
    pub to_s: f64,
    pub settled_objective: Option<f64>,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Recommended {
    pub tick_s: f64,
    pub dither_period_s: f64,
    pub dither_amplitude: f64,
    pub highpass_hz: f64,
    pub phase_deg: f64,
    pub gain: f64,
    pub max_rate_per_s: f64,
    pub bounds: [f64; 2],
    pub direction: &'static str,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Reasons {
    pub dither_period_s: String,
    pub dither_amplitude: String,
    pub highpass_hz: String,
    pub phase_deg: String,
    pub gain: String,
    pub max_rate_per_s: String,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Predicted {
    pub time_constant_s: f64,
    pub mean_loss: f64,
}

/// A fit, a tuning and its proof: the answer of `tune --json` and of a finished bump test.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TuneResult {
    pub input: String,
    pub model: FittedModel,
    pub recommended: Recommended,
    pub reasons: Reasons,
    pub predicted: Predicted,
    pub rehearsed: Rehearsed,
    pub warnings: Vec<String>,
    /// The tuning as TOML to paste into the loop.
    pub toml: String,
    /// The fitted plant as a plant-model file (`tune --plant-out` writes it).
    #[serde(skip)]
    pub plant_toml: String,
}

/// Fits `record`, recommends a tuning for `request` and proves it by rehearsal.
pub fn tune(record: &Record, request: &Request) -> Result<TuneResult, TuneError> {
    let fit = fit::fit(record)?;
    let mut warnings = Vec::new();
    let second = fit.map.second_derivative();
    let distinct = {
        let mut s: Vec<f64> = fit.levels.iter().map(|l| l.setpoint).collect();
        s.sort_by(f64::total_cmp);
        s.dedup();
        s.len()
    };
    let Some(curvature_std) = fit.curvature_std else {
        return Err(TuneError::Unjustified(format!(
            "the record holds {distinct} setpoint levels; the objective's curvature, which sets the gain, needs three \
             (u0, u0 + step, u0 - step)"
        )));
    };
    // Written so that a NaN curvature is not significant either.
    let significant = second.abs() > 2.0 * curvature_std;
    if !significant {
        let step = fit.levels.windows(2).map(|w| (w[1].setpoint - w[0].setpoint).abs()).fold(0.0, f64::max);
        return Err(TuneError::Unjustified(format!(
            "the objective's curvature ({} +- {}) cannot be told from zero in this record: repeat the test with a \
             larger step (this one was {}; curvature shows with the square of the step)",
            show(second.abs()),
            show(curvature_std),
            show(step)
        )));
    }
    let peak = second < 0.0;
    let direction = match (request.direction, peak) {
        (Some(Direction::Maximize), false) | (Some(Direction::Minimize), true) => {
            return Err(TuneError::Unjustified(format!(
                "the objective curves {} (d2J/du2 = {}), so it has a {} where the loop would {}: the loop cannot \
                 converge on it. Check the direction, or the record's objective column",
                if peak { "down" } else { "up" },
                show(second),
                if peak { "maximum" } else { "minimum" },
                request.direction.map_or("", |d| d.as_str())
            )));
        }
        (Some(d), _) => d,
        (None, true) => Direction::Maximize,
        (None, false) => Direction::Minimize,
    };
    let setpoints = fit.levels.iter().map(|l| l.setpoint);
    let (lo, hi) = setpoints.fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), s| (lo.min(s), hi.max(s)));
    let bounds = request.bounds.unwrap_or_else(|| {
        let widen = hi - lo;
        warnings.push(format!(
            "no loop given (--config and --loop): the bounds are taken as [{}, {}], the tested range widened by its \
             width on each side",
            show(lo - widen),
            show(hi + widen)
        ));
        Range { min: lo - widen, max: hi + widen }
    });
    let vertex = fit.map.vertex().filter(|v| bounds.contains(*v));
    if vertex.is_none() {
        let v = fit.map.vertex().unwrap_or(f64::NAN);
        warnings.push(format!(
            "the fitted optimum {} lies outside the bounds [{}, {}]: the loop will hold the nearer bound, and the \
             rehearsed time constant measures the approach to it",
            show(v),
            show(bounds.min),
            show(bounds.max)
        ));
    }
    if let Some(settled) = &fit.settled_map {
        let c = settled.second_derivative();
        if (c - second).abs() > 3.0 * curvature_std.max(0.1 * second.abs()) {
            warnings.push(format!(
                "the settled levels alone give a curvature of {}, the whole response {}: the plant may not be \
                 first order, or it drifted during the test",
                show(c.abs()),
                show(second.abs())
            ));
        }
    }
    let tick_s = match request.tick_s.or_else(|| record.median_step_s()) {
        Some(t) if t > 0.0 => t,
        _ => return Err(TuneError::Unjustified("the record's time column does not advance".into())),
    };
    let model = PlantModel {
        lag_s: fit.lag_s,
        dead_time_s: fit.dead_time_s,
        curvature: second.abs(),
        noise_std: fit.noise_std,
    };
    let goal = Goal {
        tick_s,
        bounds,
        direction,
        time_constant_s: request.time_constant_s,
        max_loss: request.max_loss.or((fit.noise_std == 0.0).then_some(0.01 * fit.response)),
        configured_rate_per_s: request.configured_rate_per_s,
        largest_move: Some(fit.levels.iter().map(|l| (l.setpoint - fit.map.u0).abs()).fold(0.0, f64::max)),
    };
    let r = recommend::recommend(&model, &goal);
    warnings.extend(r.warnings.iter().cloned());
    let case =
        Case { input: &request.input, model: &model, map: &fit.map, bounds, direction, recommendation: &r };
    let rehearsed = case.rehearse().map_err(TuneError::Proof)?;
    if rehearsed.time_constant_s.is_none() {
        warnings.push(
            "the proving rehearsal did not converge far enough to measure a time constant; do not use this tuning \
             before finding out why"
                .into(),
        );
    }
    let model = FittedModel {
        lag_s: fit.lag_s,
        lag_s_std: fit.lag_s_std,
        dead_time_s: fit.dead_time_s,
        dead_time_s_std: fit.dead_time_s_std,
        gain_per_level: fit.gain_per_level.clone(),
        curvature: second.abs(),
        curvature_std,
        slope: fit.map.slope(),
        vertex,
        noise_std: fit.noise_std,
        fit_rmse: fit.fit_rmse,
        levels: fit
            .levels
            .iter()
            .map(|l| LevelOut {
                setpoint: l.setpoint,
                from_s: l.from_s,
                to_s: l.to_s,
                settled_objective: l.settled_objective,
            })
            .collect(),
    };
    let recommended = Recommended {
        tick_s,
        dither_period_s: r.dither_period_s.value,
        dither_amplitude: r.dither_amplitude.value,
        highpass_hz: r.highpass_hz.value,
        phase_deg: r.phase_deg.value,
        gain: r.gain.value,
        max_rate_per_s: r.max_rate_per_s.value,
        bounds: [bounds.min, bounds.max],
        direction: direction.as_str(),
    };
    Ok(TuneResult {
        input: request.input.clone(),
        toml: snippet(&request.input, &model, &recommended),
        model,
        recommended,
        reasons: Reasons {
            dither_period_s: r.dither_period_s.reason.clone(),
            dither_amplitude: r.dither_amplitude.reason.clone(),
            highpass_hz: r.highpass_hz.reason.clone(),
            phase_deg: r.phase_deg.reason.clone(),
            gain: r.gain.reason.clone(),
            max_rate_per_s: r.max_rate_per_s.reason.clone(),
        },
        predicted: Predicted { time_constant_s: r.time_constant_s, mean_loss: r.mean_loss },
        rehearsed,
        warnings,
        plant_toml: case.plant_toml(1),
    })
}

/// The tuning as TOML to paste into the loop: its filter, its model, and the input's keys.
fn snippet(input: &str, m: &FittedModel, r: &Recommended) -> String {
    format!(
        "# paste into the loop (tick_s = {tick}):\n\
         [loops.filter]\nhighpass_hz = {hp}\nphase_deg = {phase}\n\
         [loops.model]\nlag_s = {lag}\ndead_time_s = {dead}\ncurvature = {curvature}\nnoise_std = {noise}\n\
         # and in [[loops.inputs]] name = \"{input}\":\n\
         max_rate_per_s = {rate}\ndither_amplitude = {a}\ndither_period_s = {period}\ngain = {gain}\n",
        tick = show(r.tick_s),
        hp = show(r.highpass_hz),
        phase = show(r.phase_deg),
        lag = show(round4(m.lag_s)),
        dead = show(round4(m.dead_time_s)),
        curvature = show(round4(m.curvature)),
        noise = show(round4(m.noise_std)),
        rate = show(r.max_rate_per_s),
        a = show(r.dither_amplitude),
        period = show(r.dither_period_s),
        gain = show(r.gain),
    )
}

fn or_dash(x: Option<f64>, digits: usize) -> String {
    x.map_or_else(|| "-".to_owned(), |v| format!("{v:.digits$}"))
}

impl fmt::Display for TuneResult {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let m = &self.model;
        let r = &self.recommended;
        writeln!(f, "plant fitted from {} levels of `{}`:", m.levels.len(), self.input)?;
        writeln!(
            f,
            "  lag {:.2} s (+- {:.2}), dead time {:.2} s (+- {:.2})",
            m.lag_s, m.lag_s_std, m.dead_time_s, m.dead_time_s_std
        )?;
        writeln!(
            f,
            "  curvature |d2J/du2| {} (+- {}), slope at the start {}, optimum {}",
            show(round4(m.curvature)),
            show(round4(m.curvature_std)),
            show(round4(m.slope)),
            m.vertex.map_or_else(|| "outside the bounds".to_owned(), |v| show(round4(v)))
        )?;
        writeln!(
            f,
            "  noise {} (settled stretches), fit RMSE {}",
            show(round4(m.noise_std)),
            show(round4(m.fit_rmse))
        )?;
        let gains: Vec<String> = m.gain_per_level.iter().map(|g| show(round4(*g))).collect();
        writeln!(f, "  gain per level (small-step dJ/du between settled levels): {}", gains.join(", "))?;
        writeln!(
            f,
            "\nrecommended ({}, tick {} s, bounds [{}, {}]):",
            r.direction,
            show(r.tick_s),
            show(r.bounds[0]),
            show(r.bounds[1])
        )?;
        let reasons = &self.reasons;
        for (key, value, reason) in [
            ("dither_period_s", r.dither_period_s, &reasons.dither_period_s),
            ("dither_amplitude", r.dither_amplitude, &reasons.dither_amplitude),
            ("highpass_hz", r.highpass_hz, &reasons.highpass_hz),
            ("phase_deg", r.phase_deg, &reasons.phase_deg),
            ("gain", r.gain, &reasons.gain),
            ("max_rate_per_s", r.max_rate_per_s, &reasons.max_rate_per_s),
        ] {
            writeln!(f, "  {key} = {}: {reason}", show(value))?;
        }
        writeln!(f, "\nproof by rehearsal against the fitted plant:")?;
        writeln!(f, "                    predicted   rehearsed")?;
        writeln!(
            f,
            "  time constant s   {:>9.1}   {:>9}",
            self.predicted.time_constant_s,
            or_dash(self.rehearsed.time_constant_s, 1)
        )?;
        writeln!(
            f,
            "  mean loss         {:>9.3e}   {:>9}",
            self.predicted.mean_loss,
            self.rehearsed.mean_loss.map_or("-".into(), |l| format!("{l:.3e}"))
        )?;
        writeln!(f, "  settle time s             -   {:>9}", or_dash(self.rehearsed.settle_time_s, 0))?;
        for w in &self.warnings {
            writeln!(f, "warning: {w}")?;
        }
        write!(f, "\n{}", self.toml)
    }
}

#[cfg(test)]
mod tests {
    use rand::{RngExt, SeedableRng};
    use rand_chacha::ChaCha8Rng;
    use rand_distr::StandardNormal;

    use super::*;

    /// A noisy staircase u0, u0 + 0.4, u0 - 0.4, u0 through lag 40 s, dead time 12 s and
    /// `J = 7 - 2 (x - 2.3)^2` (|d2J/du2| = 4), sampled every second.
    fn staircase(noise: f64) -> Record {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let mut record = Record::default();
        let mut t = 0.0;
        for (u, hold) in [(2.5, 200), (2.9, 400), (2.1, 400), (2.5, 400)] {
            for _ in 0..hold {
                record.push(t, u, 0.0);
                t += 1.0;
            }
        }
        let mut x = vec![0.0; record.len()];
        fit::lagged_input(&record.t_s, &record.u, 40.0, 12.0, &mut x);
        for (y, x) in record.y.iter_mut().zip(&x) {
            *y = 7.0 - 2.0 * (x - 2.3).powi(2) + noise * rng.sample::<f64, _>(StandardNormal);
        }
        record
    }

    #[test]
    fn the_recommended_loop_converges_as_predicted_when_rehearsed() {
        let request = Request {
            input: "u".into(),
            bounds: Some(Range { min: 1.0, max: 4.0 }),
            direction: Some(Direction::Maximize),
            ..Request::default()
        };
        let result = tune(&staircase(0.03), &request).expect("a tuning");
        let (predicted, rehearsed) =
            (result.predicted.time_constant_s, result.rehearsed.time_constant_s.unwrap());
        assert!(
            (rehearsed / predicted - 1.0).abs() < 0.1,
            "predicted {predicted} s, rehearsed {rehearsed} s\n{result}"
        );
        assert!((result.model.lag_s / 40.0 - 1.0).abs() < 0.1, "{result}");
        assert!((result.model.vertex.unwrap() - 2.3).abs() < 0.05, "{result}");
    }

    #[test]
    fn a_direction_against_the_curvature_is_refused() {
        let request =
            Request { input: "u".into(), direction: Some(Direction::Minimize), ..Request::default() };
        let e = tune(&staircase(0.03), &request).unwrap_err().to_string();
        assert!(e.contains("curves down") && e.contains("minimize"), "{e}");
    }
}
