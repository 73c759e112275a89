//! The plant-model TOML file: inputs, slowly drifting hidden quantities, and outputs.

use std::collections::HashSet;
use std::path::Path;

use crate::config::read::{self, FileProblems, Problems, Table};
use crate::expr::Expr;

/// A validated plant model.
#[derive(Debug, Clone)]
pub struct PlantSpec {
    pub step_s: f64,
    pub seed: u64,
    pub inputs: Vec<PlantInput>,
    pub drifts: Vec<Drift>,
    pub outputs: Vec<PlantOutput>,
}

/// A value a master writes, served at a holding register as f32 (big word order).
#[derive(Debug, Clone)]
pub struct PlantInput {
    pub name: String,
    pub initial: f64,
    pub holding_register: u16,
}

/// A hidden quantity that moves by itself: `start + ramp_per_h * t/3600 + A sin(2 pi t / P)`.
#[derive(Debug, Clone)]
pub struct Drift {
    pub name: String,
    pub start: f64,
    pub ramp_per_h: f64,
    pub sine_amplitude: f64,
    pub sine_period_s: f64,
}

impl Drift {
    pub fn at(&self, t_s: f64) -> f64 {
        let sine = if self.sine_amplitude == 0.0 {
            0.0
        } else {
            self.sine_amplitude * (std::f64::consts::TAU * t_s / self.sine_period_s).sin()
        };
        self.start + self.ramp_per_h * t_s / 3600.0 + sine
    }
}

/// A measured value, served at an input register as f32 (big word order): the
/// expression's value, delayed by the dead time, through a first-order lag, plus noise.
/// The expression may use outputs listed before this one (their lagged value, without
/// their noise).
#[derive(Debug, Clone)]
pub struct PlantOutput {
    pub name: String,
    pub input_register: u16,
    pub expression: Expr,
    pub lag_s: f64,
    pub dead_time_s: f64,
    pub noise_std: f64,
}

/// The name expressions use for simulated time in seconds.
pub const TIME: &str = "t_s";

/// Shortest integration step; finer steps only slow a rehearsal down.
const MIN_STEP_S: f64 = 0.001;

/// Most dead-time steps a model may hold in memory.
const MAX_DELAY_STEPS: f64 = 10_000_000.0;

impl PlantSpec {
    pub fn input(&self, name: &str) -> Option<usize> {
        self.inputs.iter().position(|i| i.name == name)
    }
    pub fn output(&self, name: &str) -> Option<usize> {
        self.outputs.iter().position(|o| o.name == name)
    }
    pub fn input_at_holding(&self, register: u16) -> Option<usize> {
        self.inputs.iter().position(|i| i.holding_register == register)
    }
    pub fn output_at_input_register(&self, register: u16) -> Option<usize> {
        self.outputs.iter().position(|o| o.input_register == register)
    }
}

/// Reads and validates a plant-model file.
pub fn load(path: &Path) -> Result<PlantSpec, FileProblems> {
    let (text, file) = read::read_file(path)?;
    parse(&text, &file)
}

/// Parses and validates plant-model text; `file` names it in problems.
pub fn parse(text: &str, file: &str) -> Result<PlantSpec, FileProblems> {
    read::document(text, file, &["step_s", "seed", "inputs", "drifts", "outputs"], read_spec, validate)
}

fn read_spec(t: &Table) -> Option<PlantSpec> {
    let inputs: Vec<_> = t
        .tables("inputs", &["name", "initial", "holding_register"])
        .iter()
        .map(|i| {
            Some(PlantInput {
                name: i.req("name")?,
                initial: i.req("initial")?,
                holding_register: i.req("holding_register")?,
            })
        })
        .collect();
    let drifts: Vec<_> = t
        .tables("drifts", &["name", "start", "ramp_per_h", "sine_amplitude", "sine_period_s"])
        .iter()
        .map(|d| {
            if d.has("sine_amplitude") != d.has("sine_period_s") {
                d.problem("`sine_amplitude` and `sine_period_s` go together");
            }
            Some(Drift {
                name: d.req("name")?,
                start: d.req("start")?,
                ramp_per_h: d.or("ramp_per_h", 0.0)?,
                sine_amplitude: d.or("sine_amplitude", 0.0)?,
                sine_period_s: d.or("sine_period_s", 1.0)?,
            })
        })
        .collect();
    let outputs =
        t.tables("outputs", &["name", "input_register", "expression", "lag_s", "dead_time_s", "noise_std"]);
    if outputs.is_empty() {
        t.problem("a plant needs at least one [[outputs]]");
    }
    let outputs: Vec<_> = outputs
        .iter()
        .map(|o| {
            let expression = o.expr("expression");
            Some(PlantOutput {
                name: o.req("name")?,
                input_register: o.req("input_register")?,
                expression: expression?,
                lag_s: o.or("lag_s", 0.0)?,
                dead_time_s: o.or("dead_time_s", 0.0)?,
                noise_std: o.or("noise_std", 0.0)?,
            })
        })
        .collect();
    Some(PlantSpec {
        step_s: t.req("step_s")?,
        seed: t.or("seed", 0u64)?,
        inputs: inputs.into_iter().collect::<Option<_>>()?,
        drifts: drifts.into_iter().collect::<Option<_>>()?,
        outputs: outputs.into_iter().collect::<Option<_>>()?,
    })
}

fn validate(spec: &PlantSpec, p: &Problems) {
    if spec.step_s < MIN_STEP_S {
        p.at("step_s", format!("must be at least {MIN_STEP_S} s"));
    }
    let mut names = HashSet::new();
    let all_names = spec
        .inputs
        .iter()
        .enumerate()
        .map(|(i, x)| (format!("inputs[{i}].name"), &x.name))
        .chain(spec.drifts.iter().enumerate().map(|(i, x)| (format!("drifts[{i}].name"), &x.name)))
        .chain(spec.outputs.iter().enumerate().map(|(i, x)| (format!("outputs[{i}].name"), &x.name)));
    for (path, name) in all_names {
        if !crate::config::is_identifier(name) {
            p.at(&path, format!("`{name}` must match [a-z][a-z0-9_]*"));
        } else if name == TIME {
            p.at(&path, format!("`{TIME}` is the simulated time in expressions; pick another name"));
        } else if Expr::parse(name).is_err() {
            p.at(&path, format!("`{name}` is a function name in expressions; pick another name"));
        } else if !names.insert(name.as_str()) {
            p.at(&path, format!("`{name}` is used twice among inputs, drifts and outputs"));
        }
    }
    check_registers(spec.inputs.iter().map(|i| i.holding_register), "inputs", "holding_register", p);
    check_registers(spec.outputs.iter().map(|o| o.input_register), "outputs", "input_register", p);
    for (i, d) in spec.drifts.iter().enumerate() {
        if d.sine_period_s <= 0.0 {
            p.at(&format!("drifts[{i}].sine_period_s"), "must be greater than zero");
        }
    }
    for (i, o) in spec.outputs.iter().enumerate() {
        let path = format!("outputs[{i}]");
        for (n, name) in o.expression.names().iter().enumerate() {
            let earlier_output = spec.outputs[..i].iter().any(|e| &e.name == name);
            if name != TIME
                && spec.input(name).is_none()
                && !spec.drifts.iter().any(|d| &d.name == name)
                && !earlier_output
            {
                p.at(
                    &format!("{path}.expression"),
                    format!(
                        "`{name}` at column {} is not an input, a drift, an output listed before this one, or `{TIME}`",
                        o.expression.name_column(n)
                    ),
                );
            }
        }
        for (key, value) in [("lag_s", o.lag_s), ("dead_time_s", o.dead_time_s), ("noise_std", o.noise_std)] {
            if value < 0.0 {
                p.at(&format!("{path}.{key}"), "must not be negative");
            }
        }
        if spec.step_s > 0.0 && o.dead_time_s / spec.step_s > MAX_DELAY_STEPS {
            p.at(
                &format!("{path}.dead_time_s"),
                format!("is more than {MAX_DELAY_STEPS} steps of {} s", spec.step_s),
            );
        }
    }
}

/// Each value is an f32 in two registers; no two may overlap or run past 65535.
fn check_registers(registers: impl Iterator<Item = u16>, section: &str, key: &str, p: &Problems) {
    let registers: Vec<u16> = registers.collect();
    for (i, &r) in registers.iter().enumerate() {
        let path = format!("{section}[{i}].{key}");
        if r == u16::MAX {
            p.at(&path, "an f32 at register 65535 runs past the last register");
        }
        if let Some(j) = registers[..i].iter().position(|&q| q.abs_diff(r) < 2) {
            p.at(&path, format!("register {r} overlaps the f32 of {section}[{j}] at {}", registers[j]));
        }
    }
}
