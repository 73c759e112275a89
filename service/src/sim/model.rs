//! A plant model stepped in fixed time steps: static map, dead time, first-order lag
//! (exact discretisation for inputs held over a step) and seeded Gaussian noise. An
//! output may use outputs listed before it, which lets a model put a curved map after a
//! lag (the objective as a function of where the process has got to).

use std::collections::VecDeque;

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

use super::spec::PlantSpec;

/// Where an expression's name gets its value.
#[derive(Debug, Clone, Copy)]
enum Var {
    Input(usize),
    Drift(usize),
    Time,
    /// An output listed before: its steady state on the static map, its lagged value
    /// (without noise) in the running plant.
    Output(usize),
}

/// The noise-free steady-state value of each output for given inputs at a set time:
/// the plant's static map, also used for the true optimum.
#[derive(Debug, Clone)]
pub struct StaticMap {
    spec: PlantSpec,
    vars: Vec<Vec<Var>>,
    /// Drift values at `t_s`, computed once per time rather than per evaluation.
    drifts: Vec<f64>,
    t_s: f64,
    scratch: Vec<f64>,
    /// Steady state of each output that a later one uses, filled on the way.
    outputs: Vec<f64>,
}

impl StaticMap {
    pub fn new(spec: &PlantSpec) -> Self {
        let vars = spec
            .outputs
            .iter()
            .map(|o| {
                o.expression
                    .names()
                    .iter()
                    .map(|name| {
                        match (
                            spec.input(name),
                            spec.drifts.iter().position(|d| &d.name == name),
                            spec.output(name),
                        ) {
                            (Some(i), ..) => Var::Input(i),
                            (None, Some(d), _) => Var::Drift(d),
                            (None, None, Some(k)) => Var::Output(k),
                            // Validation leaves only `t_s`.
                            (None, None, None) => Var::Time,
                        }
                    })
                    .collect()
            })
            .collect();
        let widest = spec.outputs.iter().map(|o| o.expression.names().len()).max().unwrap_or(0);
        let mut map = StaticMap {
            spec: spec.clone(),
            vars,
            drifts: vec![0.0; spec.drifts.len()],
            t_s: 0.0,
            scratch: vec![0.0; widest],
            outputs: vec![0.0; spec.outputs.len()],
        };
        map.set_time(0.0);
        map
    }

    pub fn spec(&self) -> &PlantSpec {
        &self.spec
    }

    /// Moves the map to time `t_s` (drifts and `t_s` in expressions).
    pub fn set_time(&mut self, t_s: f64) {
        self.t_s = t_s;
        for (value, drift) in self.drifts.iter_mut().zip(&self.spec.drifts) {
            *value = drift.at(t_s);
        }
    }

    /// Output `k` at steady state for these input values, at the time last set.
    pub fn output(&mut self, k: usize, inputs: &[f64]) -> f64 {
        // Outputs this one uses come first (validation allows only earlier ones).
        for n in 0..self.vars[k].len() {
            if let Var::Output(j) = self.vars[k][n] {
                self.outputs[j] = self.output(j, inputs);
            }
        }
        let outputs = std::mem::take(&mut self.outputs);
        let value = self.output_with(k, inputs, |j| outputs[j]);
        self.outputs = outputs;
        value
    }

    /// Output `k`'s expression with these inputs, the drifts and time last set, and
    /// `output(j)` for each output it uses.
    fn output_with(&mut self, k: usize, inputs: &[f64], output: impl Fn(usize) -> f64) -> f64 {
        let vars = &self.vars[k];
        for (slot, var) in self.scratch.iter_mut().zip(vars) {
            *slot = match *var {
                Var::Input(i) => inputs[i],
                Var::Drift(d) => self.drifts[d],
                Var::Time => self.t_s,
                Var::Output(j) => output(j),
            };
        }
        self.spec.outputs[k].expression.eval(&self.scratch[..vars.len()])
    }
}

#[derive(Debug, Clone)]
struct OutputState {
    /// `exp(-step / lag)`: how much of the lagged value survives one step.
    keep: f64,
    dead_time: VecDeque<f64>,
    lagged: f64,
    measured: f64,
}

/// A running plant model. Deterministic for a given spec (and its seed).
#[derive(Debug, Clone)]
pub struct Plant {
    map: StaticMap,
    steps: u64,
    inputs: Vec<f64>,
    outputs: Vec<OutputState>,
    rng: ChaCha8Rng,
}

impl Plant {
    /// Starts at rest: every output at its steady state for the initial inputs.
    pub fn new(spec: &PlantSpec) -> Self {
        let mut map = StaticMap::new(spec);
        let inputs: Vec<f64> = spec.inputs.iter().map(|i| i.initial).collect();
        let outputs = spec
            .outputs
            .iter()
            .enumerate()
            .map(|(k, o)| {
                let rest = map.output(k, &inputs);
                let delay_steps = (o.dead_time_s / spec.step_s).round() as usize;
                OutputState {
                    keep: if o.lag_s > 0.0 { (-spec.step_s / o.lag_s).exp() } else { 0.0 },
                    dead_time: std::iter::repeat_n(rest, delay_steps).collect(),
                    lagged: rest,
                    measured: rest,
                }
            })
            .collect();
        Plant { map, steps: 0, inputs, outputs, rng: ChaCha8Rng::seed_from_u64(spec.seed) }
    }

    pub fn spec(&self) -> &PlantSpec {
        self.map.spec()
    }

    /// Simulated time in seconds.
    pub fn time_s(&self) -> f64 {
        self.steps as f64 * self.map.spec.step_s
    }

    pub fn steps(&self) -> u64 {
        self.steps
    }

    pub fn inputs(&self) -> &[f64] {
        &self.inputs
    }

    /// Sets input `i`; it is held over the following steps.
    pub fn set_input(&mut self, i: usize, value: f64) {
        self.inputs[i] = value;
    }

    /// What a sensor reads from output `k` now: lagged, delayed and noisy.
    pub fn output(&self, k: usize) -> f64 {
        self.outputs[k].measured
    }

    /// Output `k` now without its noise: what the process delivers, lagged and delayed.
    pub fn output_noise_free(&self, k: usize) -> f64 {
        self.outputs[k].lagged
    }

    /// Advances by one step with the inputs held.
    pub fn step(&mut self) {
        self.map.set_time(self.time_s());
        for k in 0..self.outputs.len() {
            // An output that uses earlier ones sees them as they are now: lagged, no noise.
            let lagged = &self.outputs;
            let now = self.map.output_with(k, &self.inputs, |j| lagged[j].lagged);
            let out = &mut self.outputs[k];
            let delayed = match out.dead_time.pop_front() {
                Some(old) => {
                    out.dead_time.push_back(now);
                    old
                }
                None => now,
            };
            out.lagged = delayed + out.keep * (out.lagged - delayed);
            let noise_std = self.map.spec.outputs[k].noise_std;
            out.measured = if noise_std > 0.0 {
                out.lagged + noise_std * self.rng.sample::<f64, _>(StandardNormal)
            } else {
                out.lagged
            };
        }
        self.steps += 1;
    }

    /// Steps until the plant time is within half a step of `t_s`.
    pub fn advance_to(&mut self, t_s: f64) {
        let half = 0.5 * self.map.spec.step_s;
        while self.time_s() + half < t_s {
            self.step();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sim::parse;

    fn plant(extra: &str) -> Plant {
        let text = format!(
            "step_s = 0.5\nseed = 3\n[[inputs]]\nname = \"u\"\ninitial = 1.0\nholding_register = 0\n\
             [[outputs]]\nname = \"y\"\ninput_register = 0\nexpression = \"2 * u\"\n{extra}"
        );
        Plant::new(&parse(&text, "test").expect("valid plant"))
    }

    #[test]
    fn plant_starts_at_rest() {
        assert_eq!(plant("lag_s = 5\ndead_time_s = 2").output(0), 2.0);
    }

    #[test]
    fn first_order_lag_is_discretised_exactly() {
        // Source: exact (zero-order-hold) solution of tau y' = u - y over a step of h: y += (1 - e^{-h/tau}) (u - y).
        let mut p = plant("lag_s = 4");
        p.set_input(0, 2.0);
        for _ in 0..8 {
            p.step();
        }
        let expected = 4.0 - 2.0 * (-4.0f64 / 4.0).exp();
        assert!((p.output(0) - expected).abs() < 1e-12, "{} vs {expected}", p.output(0));
    }

    #[test]
    fn dead_time_delays_by_whole_steps() {
        let mut p = plant("dead_time_s = 1.0");
        p.set_input(0, 3.0);
        p.step();
        p.step();
        assert_eq!(p.output(0), 2.0);
        p.step();
        assert_eq!(p.output(0), 6.0);
    }

    #[test]
    fn an_output_may_curve_the_lagged_value_of_an_earlier_one() {
        let text = "step_s = 0.5\n[[inputs]]\nname = \"u\"\ninitial = 1.0\nholding_register = 0\n\
                    [[outputs]]\nname = \"x\"\ninput_register = 0\nexpression = \"u\"\nlag_s = 4\n\
                    [[outputs]]\nname = \"j\"\ninput_register = 2\nexpression = \"10 - (x - 3)^2\"\n";
        let spec = parse(text, "test").expect("valid plant");
        let mut p = Plant::new(&spec);
        assert_eq!(p.output(1), 6.0, "at rest: the map of the steady state");
        p.set_input(0, 3.0);
        for _ in 0..8 {
            p.step();
        }
        // Source: exact solution of the lag as above, then the map: x = 3 - 2 e^{-1}.
        let x = 3.0 - 2.0 * (-1.0f64).exp();
        assert!((p.output(1) - (10.0 - (x - 3.0).powi(2))).abs() < 1e-12);
        assert_eq!(StaticMap::new(&spec).output(1, &[2.0]), 9.0);
    }

    #[test]
    fn noise_is_reproducible_for_a_seed() {
        let run = || {
            let mut p = plant("noise_std = 0.1");
            (0..50)
                .map(|_| {
                    p.step();
                    p.output(0)
                })
                .collect::<Vec<_>>()
        };
        let (a, b) = (run(), run());
        assert_eq!(a, b);
        let mean = a.iter().sum::<f64>() / a.len() as f64;
        assert!((mean - 2.0).abs() < 0.1 && a.iter().any(|&v| v != 2.0));
    }
}
