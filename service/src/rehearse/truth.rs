//! The truth a loop is judged against: its objective on the plant model's noise-free
//! static map, and the best value of it over the loop's operating bounds among the
//! setpoints that respect every constraint. Used by the rehearsal and by the demo's
//! progress lines.

use crate::config::{Config, Direction, Problem, Range, RegisterSpace, TagSource};
use crate::expr::Expr;
use crate::seek::guard::check_objective;
use crate::sim::{Plant, PlantSpec, StaticMap};
use crate::supervisor::constraints::Constraints;

use super::optimum::OptimumTracker;

/// Where a tag's value comes from in the plant.
#[derive(Debug, Clone, Copy)]
enum Source {
    Output(usize),
    Input(usize),
}

/// One loop wired to a plant model.
#[derive(Debug)]
pub struct Truth {
    /// +1 to maximize, -1 to minimize.
    sign: f64,
    plausible: Option<Range>,
    tracker: OptimumTracker,
    map: LoopMap,
    optimum: Vec<f64>,
}

/// The loop's objective and constraints as functions of its setpoints on the static map.
#[derive(Debug)]
struct LoopMap {
    objective: Expr,
    constraints: Constraints,
    /// Plant source of each of the loop's tags, in [`Constraints::tag_names`] order (the objective's first).
    sources: Vec<Source>,
    /// Plant input index of each loop input.
    plant_inputs: Vec<usize>,
    map: StaticMap,
    // Reused on every evaluation so scoring does not allocate.
    point: Vec<f64>,
    tag_values: Vec<f64>,
}

impl LoopMap {
    /// The objective at `setpoints` (the constraints' values follow in `constraints`).
    fn at(&mut self, setpoints: &[f64]) -> f64 {
        for (&pi, &v) in self.plant_inputs.iter().zip(setpoints) {
            self.point[pi] = v;
        }
        for (value, source) in self.tag_values.iter_mut().zip(&self.sources) {
            *value = match *source {
                Source::Output(k) => self.map.output(k, &self.point),
                Source::Input(i) => self.point[i],
            };
        }
        self.evaluate()
    }

    /// The objective from `tag_values`, and the constraints' values into `constraints`.
    fn evaluate(&mut self) -> f64 {
        self.constraints.evaluate(&self.tag_values);
        let n = self.objective.names().len();
        self.objective.eval(&self.tag_values[..n])
    }
}

impl Truth {
    /// Wires loop `index` to `plant` the way the live service would see it: its write
    /// registers drive the plant inputs at the same holding registers, Modbus tags read
    /// the plant outputs (or inputs) at the same registers, HTTP tags the plant output of
    /// the same name. Problems name the config keys that do not fit.
    pub fn new(config: &Config, index: usize, plant: &PlantSpec) -> Result<Self, Vec<Problem>> {
        let l = &config.loops[index];
        let mut problems = Vec::new();
        let constraints = Constraints::new(l);
        let sources: Vec<Source> = constraints
            .tag_names()
            .iter()
            .filter_map(|name| {
                tag_source(config, plant, name)
                    .map_err(|why| {
                        problems.push(Problem { path: format!("tags.{name}"), line: None, message: why })
                    })
                    .ok()
            })
            .collect();
        let plant_inputs: Vec<usize> = l
            .inputs
            .iter()
            .enumerate()
            .filter_map(|(ii, input)| {
                let register = input.write.holding_register;
                let found = plant.input_at_holding(register);
                if found.is_none() {
                    problems.push(Problem {
                        path: format!("loops[{index}].inputs[{ii}].write.holding_register"),
                        line: None,
                        message: format!("the plant model serves no input at holding register {register}"),
                    });
                }
                found
            })
            .collect();
        if !problems.is_empty() {
            return Err(problems);
        }
        let sign = match l.direction {
            Direction::Maximize => 1.0,
            Direction::Minimize => -1.0,
        };
        Ok(Truth {
            sign,
            plausible: l.watchdog.objective_range,
            tracker: OptimumTracker::new(sign, plant_inputs.len()),
            optimum: vec![0.0; plant_inputs.len()],
            map: LoopMap {
                objective: l.objective.clone(),
                constraints,
                tag_values: vec![0.0; sources.len()],
                sources,
                plant_inputs,
                map: StaticMap::new(plant),
                point: vec![0.0; plant.inputs.len()],
            },
        })
    }

    /// Plant input index of each loop input.
    pub fn plant_inputs(&self) -> &[usize] {
        &self.map.plant_inputs
    }

    /// What the loop's tags read from the plant now (lagged, delayed and noisy), in
    /// [`Constraints::tag_names`] order.
    pub fn read_tags(&self, plant: &Plant, values: &mut [f64]) {
        for (value, source) in values.iter_mut().zip(&self.map.sources) {
            *value = match *source {
                Source::Output(k) => plant.output(k),
                Source::Input(i) => plant.inputs()[i],
            };
        }
    }

    /// The optimum within `bounds` at plant time `t_s`, with every other plant input as
    /// in `inputs`: the best noise-free objective and the setpoints that reach it. Only
    /// setpoints whose objective is finite and plausible, and whose constraint values
    /// respect every limit, count as achievable.
    pub fn optimum(&mut self, t_s: f64, inputs: &[f64], bounds: &[Range]) -> (f64, &[f64]) {
        self.map.map.set_time(t_s);
        self.map.point.copy_from_slice(inputs);
        let plausible = self.plausible;
        let map = &mut self.map;
        let found = self.tracker.find(bounds, &mut |u| {
            let j = map.at(u);
            let allowed = check_objective(j, plausible).is_ok() && map.constraints.all_respected();
            if allowed { j } else { f64::NAN }
        });
        self.optimum.copy_from_slice(found);
        let best = self.map.at(&self.optimum);
        (best, &self.optimum)
    }

    /// The optimum as [`Truth::optimum`] finds it with the constraints ignored, by a full
    /// scan: where the loop would go without them.
    pub fn unconstrained_optimum(&mut self, t_s: f64, inputs: &[f64], bounds: &[Range]) -> Vec<f64> {
        self.map.map.set_time(t_s);
        self.map.point.copy_from_slice(inputs);
        let plausible = self.plausible;
        let map = &mut self.map;
        let mut tracker = OptimumTracker::new(self.sign, bounds.len());
        tracker
            .find(bounds, &mut |u| {
                let j = map.at(u);
                if check_objective(j, plausible).is_ok() { j } else { f64::NAN }
            })
            .to_vec()
    }

    /// Whether the loop has constraints.
    pub fn has_constraints(&self) -> bool {
        !self.map.constraints.is_empty()
    }

    /// The objective as the plant delivers it now, without its noise: the loop's objective
    /// over the plant's noise-free outputs, after their lag and dead time. What the process
    /// really gives, which on a plant with dynamics is not the static map at the setpoint.
    /// The constraints' values of the same delivery follow in [`Truth::delivered_constraints`].
    pub fn delivered(&mut self, plant: &Plant) -> f64 {
        let map = &mut self.map;
        for (value, source) in map.tag_values.iter_mut().zip(&map.sources) {
            *value = match *source {
                Source::Output(k) => plant.output_noise_free(k),
                Source::Input(i) => plant.inputs()[i],
            };
        }
        map.evaluate()
    }

    /// Each constraint's value as the plant delivered it at the last [`Truth::delivered`].
    pub fn delivered_constraints(
        &self,
    ) -> impl Iterator<Item = crate::supervisor::constraints::ConstraintView<'_>> {
        self.map.constraints.views()
    }
}

fn tag_source(config: &Config, plant: &PlantSpec, name: &str) -> Result<Source, String> {
    let Some(tag) = config.tag(name) else {
        return Err("is not defined".into());
    };
    match &tag.source {
        TagSource::Register { space: RegisterSpace::Input, address, .. } => plant
            .output_at_input_register(*address)
            .map(Source::Output)
            .ok_or_else(|| format!("the plant model serves no output at input register {address}")),
        TagSource::Register { space: RegisterSpace::Holding, address, .. } => plant
            .input_at_holding(*address)
            .map(Source::Input)
            .ok_or_else(|| format!("the plant model serves no input at holding register {address}")),
        TagSource::JsonPointer(_) => plant.output(name).map(Source::Output).ok_or_else(|| {
            format!(
                "an HTTP tag reads the plant output of the same name, and the plant has no output `{name}`"
            )
        }),
    }
}
