//! The proof of a recommendation: the fitted plant written as a plant-model file, the
//! recommended loop as a config, both read by the ordinary parsers and rehearsed by the
//! ordinary rehearsal, with the convergence time constant measured on the run.

use serde::Serialize;

use super::fit::Map;
use super::recommend::{PlantModel, Recommendation};
use crate::config::{self, Direction, Range};
use crate::rehearse::{Options, Rehearsal};
use crate::sim;

/// Names in the generated files; the input keeps the record's name.
const PROCESS: &str = "fitted_process";
const OBJECTIVE: &str = "fitted_objective";
/// Plant steps per loop tick in the proving rehearsal.
const STEPS_PER_TICK: f64 = 10.0;

/// What the rehearsal of a recommendation measured.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Rehearsed {
    /// Decay time constant of the estimate's error, fitted between 60% and 5% of the
    /// starting error; `None` when the run never got that far.
    pub time_constant_s: Option<f64>,
    pub mean_loss: Option<f64>,
    pub settle_time_s: Option<f64>,
}

/// Everything needed to write and rehearse the fitted loop.
pub struct Case<'a> {
    pub input: &'a str,
    pub model: &'a PlantModel,
    pub map: &'a Map,
    pub bounds: Range,
    pub direction: Direction,
    pub recommendation: &'a Recommendation,
}

/// A number as TOML and expression text: full precision, never in exponent form.
fn num(x: f64) -> String {
    format!("{x:?}")
}

/// `a + b`, `a - |b|`: the expression language has no unary minus in every place.
fn plus(x: f64) -> String {
    if x < 0.0 { format!("- {}", num(-x)) } else { format!("+ {}", num(x)) }
}

/// The input's name in the generated files: its own when it is a plain name, else a
/// stand-in (the files are read by the expression and TOML parsers).
fn input_name(name: &str) -> &str {
    let plain = name.chars().next().is_some_and(|c| c.is_ascii_alphabetic() || c == '_')
        && name.chars().all(|c| c.is_ascii_alphanumeric() || c == '_')
        && name != PROCESS
        && name != OBJECTIVE;
    if plain { name } else { "tested_input" }
}

impl Case<'_> {
    /// Where the proving run starts: the bound farther from the optimum, so the run
    /// shows the whole approach.
    pub fn start(&self) -> f64 {
        let optimum = self.optimum();
        if optimum - self.bounds.min > self.bounds.max - optimum { self.bounds.min } else { self.bounds.max }
    }

    /// The fitted map's optimum held inside the bounds.
    pub fn optimum(&self) -> f64 {
        let v = self.map.vertex().unwrap_or(self.map.u0);
        v.clamp(self.bounds.min, self.bounds.max)
    }

    /// The plant-model file of the fitted plant: the input through the lag and dead time
    /// (`fitted_process`), then the quadratic map of it with the fitted noise. The map's
    /// constant is left to the loop's objective so the register carries small numbers.
    pub fn plant_toml(&self, seed: u64) -> String {
        let m = self.model;
        let tick = self.recommendation.tick_s;
        let [_, c1, c2] = self.map.c;
        let u0 = self.map.u0;
        format!(
            "# The plant fitted by `ridgeline tune`: the input through a first-order lag with dead time,\n\
             # then the quadratic map of the lagged value, plus the objective's noise.\n\
             step_s = {step}\nseed = {seed}\n\n\
             [[inputs]]\nname = \"{input}\"\ninitial = {start}\nholding_register = 0\n\n\
             [[outputs]]\nname = \"{PROCESS}\"\ninput_register = 0\nexpression = \"{input}\"\n\
             lag_s = {lag}\ndead_time_s = {dead}\n\n\
             [[outputs]]\nname = \"{OBJECTIVE}\"\ninput_register = 2\n\
             expression = \"0 {c1} * ({PROCESS} - {u0}) {c2} * ({PROCESS} - {u0})^2\"\nnoise_std = {noise}\n",
            step = num(tick / STEPS_PER_TICK),
            input = input_name(self.input),
            start = num(self.start()),
            lag = num(m.lag_s),
            dead = num(m.dead_time_s),
            c1 = plus(c1),
            c2 = plus(c2),
            u0 = num(u0),
            noise = num(m.noise_std),
        )
    }

    /// The recommended loop as a config file, reading the fitted plant.
    pub fn config_toml(&self) -> String {
        let r = self.recommendation;
        let b = self.bounds;
        format!(
            "[links.fitted]\nmodbus_tcp = \"127.0.0.1:5020\"\n\n\
             [tags.{OBJECTIVE}]\nlink = \"fitted\"\ninput_register = 2\ntype = \"f32\"\n\n\
             [[loops]]\nname = \"proof\"\nobjective = \"{OBJECTIVE} {c0}\"\ndirection = \"{direction}\"\n\
             tick_s = {tick}\n\n\
             [loops.filter]\nhighpass_hz = {hp}\nphase_deg = {phase}\n\n\
             [loops.watchdog]\nstale_after_s = {stale}\n\n\
             [[loops.inputs]]\nname = \"{input}\"\nwrite = {{ link = \"fitted\", holding_register = 0, type = \"f32\" }}\n\
             limits = [{min}, {max}]\nbounds = [{min}, {max}]\nsafe = {start}\nmax_rate_per_s = {rate}\n\
             dither_amplitude = {a}\ndither_period_s = {period}\ngain = {gain}\n",
            c0 = plus(self.map.c[0]),
            direction = self.direction.as_str(),
            tick = num(r.tick_s),
            hp = num(r.highpass_hz.value),
            phase = num(r.phase_deg.value),
            stale = num(10.0 * r.tick_s),
            input = input_name(self.input),
            min = num(b.min),
            max = num(b.max),
            start = num(self.start()),
            rate = num(r.max_rate_per_s.value),
            a = num(r.dither_amplitude.value),
            period = num(r.dither_period_s.value),
            gain = num(r.gain.value),
        )
    }

    /// Rehearses the recommendation against the fitted plant for long enough to see it
    /// converge and settle: eight predicted time constants and ten dither periods.
    pub fn rehearse(&self) -> anyhow::Result<Rehearsed> {
        let plant = sim::parse(&self.plant_toml(1), "fitted plant").map_err(|p| anyhow::anyhow!("{p}"))?;
        let config =
            config::parse(&self.config_toml(), "recommended loop").map_err(|p| anyhow::anyhow!("{p}"))?;
        let r = self.recommendation;
        let duration_s = 8.0 * r.time_constant_s + 10.0 * r.dither_period_s.value;
        let options = Options { duration_s, csv_dir: None, keep_traces: true };
        let outcome = Rehearsal::new(&config, &plant, "recommended loop")
            .map_err(|p| anyhow::anyhow!("{p}"))?
            .run(&options, &mut |_| {})?;
        let report = &outcome.report.loops[0];
        let trace = &outcome.traces[0];
        let estimate = &trace.inputs[0].estimate;
        let optimum = self.optimum();
        let error: Vec<f64> = estimate.iter().map(|e| e - optimum).collect();
        Ok(Rehearsed {
            time_constant_s: decay_time_constant(&trace.t_s, &error, 0.6, 0.05),
            mean_loss: report.mean_loss,
            settle_time_s: report.settle_time_s,
        })
    }
}

/// The time constant of an exponential decay of `error`: a least-squares line through
/// `ln |error|` from where it first falls under `upper` of its start until it first falls
/// under `lower` of it. `None` with fewer than five points in that stretch or no decay.
pub fn decay_time_constant(t_s: &[f64], error: &[f64], upper: f64, lower: f64) -> Option<f64> {
    let first = error.first()?.abs();
    let from = error.iter().position(|e| e.abs() < upper * first)?;
    let to = error.iter().position(|e| e.abs() < lower * first)?;
    let points: Vec<(f64, f64)> = (from..to).map(|k| (t_s[k], error[k].abs().ln())).collect();
    if points.len() < 5 {
        return None;
    }
    let n = points.len() as f64;
    let (mt, my) = points.iter().fold((0.0, 0.0), |(a, b), p| (a + p.0 / n, b + p.1 / n));
    let (sxy, sxx) =
        points.iter().fold((0.0, 0.0), |(a, b), p| (a + (p.0 - mt) * (p.1 - my), b + (p.0 - mt).powi(2)));
    let slope = sxy / sxx;
    (slope < 0.0).then(|| -1.0 / slope)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_decay_of_an_exponential_is_its_time_constant() {
        let t: Vec<f64> = (0..1000).map(f64::from).collect();
        let e: Vec<f64> = t.iter().map(|t| 3.0 * (-t / 120.0f64).exp()).collect();
        let tau = decay_time_constant(&t, &e, 0.6, 0.05).unwrap();
        assert!((tau - 120.0).abs() < 1e-9, "{tau}");
        assert_eq!(decay_time_constant(&t, &vec![1.0; 1000], 0.6, 0.05), None);
    }
}
