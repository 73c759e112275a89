//! Offline rehearsal: every configured loop against a plant model, as fast as the CPU
//! allows, with the same core and guard as the live loop, scored against the plant's
//! true optimum.
//!
//! Wiring follows the registers: an input's `write` register drives the plant input
//! served at that holding register; a Modbus tag reads the plant output served at its
//! input register (or the plant input at its holding register); an HTTP tag reads the
//! plant output of the same name. All Modbus links are taken to be the one plant.
//! Register encodings are not modelled: values pass as they are.

pub mod optimum;
pub mod plot;
mod report;
mod truth;

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

use anyhow::Context;

use crate::config::{Config, FileProblems, LoopConfig, Mode, Problem, Range};
use crate::seek::guard::ObjectiveFault;
use crate::sim::{Plant, PlantSpec};
use crate::supervisor::control::{Cause, Control, Permit, Reading, Transition};
use plot::{InputTrace, LoopTrace};
pub use report::{ConstraintReport, Event, FinalInput, LoopReport, Report, human_duration};
pub use truth::Truth;

/// An estimate counts as settled within this fraction of its bounds span of the optimum.
const SETTLED_FRACTION: f64 = 0.02;
/// Loss is averaged over this last fraction of the run.
const SCORED_FRACTION: f64 = 0.25;
/// Events kept per loop in the report; the rest are only counted.
const EVENTS_KEPT: usize = 20;
/// Samples a plot trace keeps per loop; longer runs keep per-bucket extremes instead.
const TRACE_SAMPLES: u64 = 200_000;

/// What to run and what to write besides the report.
#[derive(Debug, Clone, Default)]
pub struct Options {
    pub duration_s: f64,
    /// Writes `<dir>/<loop>.csv` with every tick.
    pub csv_dir: Option<PathBuf>,
    /// Keeps every tick in memory for a plot.
    pub keep_traces: bool,
}

/// The result of a rehearsal.
#[derive(Debug)]
pub struct Outcome {
    pub report: Report,
    /// Filled when [`Options::keep_traces`] was set.
    pub traces: Vec<LoopTrace>,
}

/// A configured loop wired to a plant model, ready to run.
#[derive(Debug)]
pub struct Rehearsal {
    plant: Plant,
    loops: Vec<LoopRun>,
}

#[derive(Debug)]
struct LoopRun {
    config: LoopConfig,
    /// The same decisions as the live loop, always seeking.
    control: Control,
    truth: Truth,
    tick: u64,
    stats: Stats,
    csv: Option<BufWriter<File>>,
    trace: Option<TraceRecorder>,
    // Reused every tick so the hot path does not allocate.
    tag_values: Vec<f64>,
    bounds: Vec<Range>,
    optimum: Vec<f64>,
    /// Per constraint, in config order.
    constraints: Vec<ConstraintStats>,
}

/// What one constraint did over a rehearsal, judged on the value the plant delivered
/// without its noise.
#[derive(Debug, Default)]
struct ConstraintStats {
    ticks_past: u64,
    largest_excess: f64,
    engagements: u64,
}

impl Rehearsal {
    /// Wires every loop of `config` to `plant`; problems name the config's key paths.
    pub fn new(config: &Config, plant: &PlantSpec, config_file: &str) -> Result<Self, FileProblems> {
        let mut problems = Vec::new();
        let mut loops: Vec<LoopRun> = Vec::new();
        let model = Plant::new(plant);
        for (li, l) in config.loops.iter().enumerate() {
            let steps_per_tick = l.tick_s / plant.step_s;
            if steps_per_tick < 0.5 || (steps_per_tick - steps_per_tick.round()).abs() > 1e-6 * steps_per_tick
            {
                // Reads between plant steps would break the one-tick delay the demodulation assumes.
                problems.push(Problem {
                    path: format!("loops[{li}].tick_s"),
                    line: None,
                    message: format!(
                        "{} s is not a whole number of the plant model's {} s steps; \
                         choose a plant step_s that divides the tick",
                        l.tick_s, plant.step_s
                    ),
                });
            }
            let truth = match Truth::new(config, li, plant) {
                Ok(t) => t,
                Err(p) => {
                    problems.extend(p);
                    continue;
                }
            };
            for (ii, &pi) in truth.plant_inputs().iter().enumerate() {
                if let Some(other) = loops.iter().find(|o| o.truth.plant_inputs().contains(&pi)) {
                    problems.push(Problem {
                        path: format!("loops[{li}].inputs[{ii}].write"),
                        line: None,
                        message: format!("drives the same plant input as loop `{}`", other.config.name),
                    });
                }
            }
            let mut control = Control::new(l);
            // A rehearsal seeks whatever the start mode; a fault still trips it.
            let _ = control.ask(Mode::Seeking);
            let estimates: Vec<f64> = l
                .inputs
                .iter()
                .zip(truth.plant_inputs())
                .map(|(i, &pi)| {
                    crate::seek::guard::initial_estimate(Some(model.inputs()[pi]), i.bounds, i.safe)
                })
                .collect();
            control.start(0.0, &estimates);
            control.take_transitions();
            let tags = control.tag_names().len();
            loops.push(LoopRun {
                config: l.clone(),
                control,
                truth,
                tick: 0,
                stats: Stats::default(),
                csv: None,
                trace: None,
                tag_values: vec![0.0; tags],
                constraints: l.constraints.iter().map(|_| ConstraintStats::default()).collect(),
                bounds: l.inputs.iter().map(|i| i.bounds).collect(),
                optimum: vec![0.0; l.inputs.len()],
            });
        }
        if problems.is_empty() {
            Ok(Rehearsal { plant: model, loops })
        } else {
            Err(FileProblems { file: config_file.to_owned(), problems })
        }
    }

    /// Runs for `options.duration_s` of simulated time; `progress` hears the fraction done.
    pub fn run(mut self, options: &Options, progress: &mut dyn FnMut(f64)) -> anyhow::Result<Outcome> {
        let duration = options.duration_s;
        for l in &mut self.loops {
            if let Some(dir) = &options.csv_dir {
                l.csv = Some(open_csv(dir, &l.config)?);
            }
            if options.keep_traces {
                let ticks = (duration / l.config.tick_s).ceil() as u64;
                l.trace = Some(TraceRecorder::new(empty_trace(&l.config), ticks));
            }
        }
        let mut last_reported = 0.0;
        loop {
            let next = self.loops.iter().map(LoopRun::next_time).fold(f64::INFINITY, f64::min);
            if next >= duration {
                break;
            }
            self.plant.advance_to(next);
            for l in &mut self.loops {
                if l.next_time() <= next {
                    l.tick(next, duration, &mut self.plant)?;
                }
            }
            if next - last_reported >= duration / 200.0 {
                last_reported = next;
                progress(next / duration);
            }
        }
        progress(1.0);
        let mut traces = Vec::new();
        let mut loops = Vec::new();
        for mut l in self.loops {
            if let Some(mut csv) = l.csv.take() {
                csv.flush().context("could not finish writing a CSV file")?;
            }
            traces.extend(l.trace.take().map(TraceRecorder::finish));
            loops.push(l.report(duration, self.plant.inputs()));
        }
        Ok(Outcome { report: Report { duration_s: duration, loops, comparison: None }, traces })
    }
}

impl LoopRun {
    fn next_time(&self) -> f64 {
        self.tick as f64 * self.config.tick_s
    }

    fn tick(&mut self, t: f64, duration: f64, plant: &mut Plant) -> anyhow::Result<()> {
        if self.control.wants_read_back() {
            // As the live loop does after a recovery: restart from what the plant holds.
            let read_back: Vec<Option<f64>> =
                self.truth.plant_inputs().iter().map(|&pi| Some(plant.inputs()[pi])).collect();
            self.control.restart_from(&read_back);
        }
        self.truth.read_tags(plant, &mut self.tag_values);
        let report = self.control.tick(
            self.tick,
            t,
            Reading { tags: Some(&self.tag_values), permit: Permit::NotConfigured },
        );
        let measured = report.objective.unwrap_or(f64::NAN);
        if let Some(fault) = report.fault {
            self.stats.fault(t, fault, measured);
        }
        if report.write {
            for (&value, &pi) in self.control.applied().iter().zip(self.truth.plant_inputs()) {
                plant.set_input(pi, value);
            }
            self.control.note_setpoints(true, t);
        }
        for transition in self.control.take_transitions() {
            self.stats.transition(t, transition);
        }
        for change in self.control.take_constraint_changes() {
            let name = &self.config.constraints[change.constraint].name;
            self.constraints[change.constraint].engagements += u64::from(change.engaged);
            self.stats.constraint(t, change, name);
        }
        self.stats.bound_hits += u64::from(report.guard.at_bound);
        self.stats.rate_limited_ticks += u64::from(report.guard.rate_limited);

        // Score against the plant's true optimum at this moment.
        for (b, input) in self.bounds.iter_mut().zip(self.control.inputs()) {
            *b = input.guard.bounds;
        }
        let (best, optimum) = self.truth.optimum(t, plant.inputs(), &self.bounds);
        self.optimum.copy_from_slice(optimum);
        let achieved = self.truth.delivered(plant);
        for (stats, view) in self.constraints.iter_mut().zip(self.truth.delivered_constraints()) {
            let excess = view.value.map_or(0.0, |v| view.limit.excess(v));
            if excess > 0.0 {
                stats.ticks_past += 1;
                stats.largest_excess = stats.largest_excess.max(excess);
            }
        }

        // An optimum within a dither amplitude of a bound counts as reached when the
        // estimate is as close to it as the dither lets it be. A stepwise input cycles a
        // step either side of a level of its grid, which trails a moving optimum by up to
        // a step: it counts as settled within two steps.
        let settled =
            self.control.inputs().iter().zip(&self.optimum).zip(&self.config.inputs).all(|((i, &x), c)| {
                let (lo, hi) = i.guard.estimate_range();
                let within = (SETTLED_FRACTION * i.guard.bounds.span()).max(2.0 * c.step.unwrap_or(0.0));
                (i.estimate - x.max(lo).min(hi)).abs() <= within
            });
        self.stats.note_settled(t, settled);
        if t >= (1.0 - SCORED_FRACTION) * duration {
            self.stats.scored_ticks += 1;
            self.stats.loss_sum += (best - achieved).abs();
            self.stats.best_sum += best.abs();
        }
        self.stats.ticks += 1;
        self.record(t, measured, best)?;
        self.tick += 1;
        Ok(())
    }

    fn record(&mut self, t: f64, measured: f64, best: f64) -> anyhow::Result<()> {
        if let Some(csv) = &mut self.csv {
            let constraints = self.control.constraints().map(|c| c.value);
            write_row(csv, t, measured, best, self.control.inputs(), &self.optimum, constraints)
                .with_context(|| format!("could not write the CSV file of loop {}", self.config.name))?;
        }
        if let Some(trace) = &mut self.trace {
            trace.push(t, measured, best, self.control.inputs(), &self.optimum);
        }
        Ok(())
    }

    /// The loop's report at the end of the run (plant time `t_s`, plant inputs as given).
    fn report(&mut self, t_s: f64, plant_inputs: &[f64]) -> LoopReport {
        // Where the loop would have gone without its constraints, for comparison.
        let unconstrained = if self.truth.has_constraints() {
            self.truth.unconstrained_optimum(t_s, plant_inputs, &self.bounds)
        } else {
            Vec::new()
        };
        let s = &self.stats;
        let mean_loss = (s.scored_ticks > 0).then(|| s.loss_sum / s.scored_ticks as f64);
        let mean_best = s.best_sum / s.scored_ticks.max(1) as f64;
        LoopReport {
            name: self.config.name.clone(),
            direction: self.config.direction.as_str(),
            method: self.config.method.kind().as_str(),
            ticks: s.ticks,
            settle_time_s: s.settled_since,
            mean_loss,
            relative_loss: mean_loss.filter(|_| mean_best > 0.0).map(|l| l / mean_best),
            bound_hits: s.bound_hits,
            rate_limited_ticks: s.rate_limited_ticks,
            objective_faults: s.faults,
            events: s.events.clone(),
            constraints: self
                .config
                .constraints
                .iter()
                .zip(&self.constraints)
                .map(|(c, stats)| ConstraintReport {
                    name: c.name.clone(),
                    handling: c.handling.kind().as_str(),
                    side: c.limit.side(),
                    limit: c.limit.value(),
                    fraction_past_limit: stats.ticks_past as f64 / s.ticks.max(1) as f64,
                    largest_excess: stats.largest_excess,
                    engagements: stats.engagements,
                })
                .collect(),
            inputs: self
                .config
                .inputs
                .iter()
                .zip(self.control.inputs())
                .zip(&self.optimum)
                .zip(unconstrained.iter().map(Some).chain(std::iter::repeat(None)))
                .map(|(((c, i), &x), free)| FinalInput {
                    name: c.name.clone(),
                    estimate: i.estimate,
                    optimum: x,
                    unconstrained_optimum: free.copied(),
                })
                .collect(),
        }
    }
}

#[derive(Debug, Default)]
struct Stats {
    ticks: u64,
    /// Start of the current stretch of settled ticks.
    settled_since: Option<f64>,
    scored_ticks: u64,
    loss_sum: f64,
    best_sum: f64,
    bound_hits: u64,
    rate_limited_ticks: u64,
    faults: u64,
    events: Vec<Event>,
}

impl Stats {
    fn note_settled(&mut self, t: f64, settled: bool) {
        match (settled, self.settled_since) {
            (true, None) => self.settled_since = Some(t),
            (false, Some(_)) => self.settled_since = None,
            _ => {}
        }
    }

    fn transition(&mut self, t: f64, transition: Transition) {
        if self.events.len() < EVENTS_KEPT {
            let kind = match transition.cause {
                Cause::Tripped(_) => "tripped",
                Cause::Recovered => "recovered",
                _ => "state_changed",
            };
            let reason = format!(
                "{} -> {}: {}",
                transition.from.as_str(),
                transition.to.as_str(),
                transition.cause.describe()
            );
            self.events.push(Event { t_s: t, kind, value: None, reason: Some(reason) });
        }
    }

    fn constraint(&mut self, t: f64, change: crate::supervisor::constraints::Change, name: &str) {
        if self.events.len() < EVENTS_KEPT {
            let (kind, how) = if change.engaged {
                ("constraint_engaged", "past")
            } else {
                ("constraint_released", "back inside")
            };
            let reason = format!("{name} {how} its limit {}", change.limit);
            self.events.push(Event { t_s: t, kind, value: Some(change.value), reason: Some(reason) });
        }
    }

    fn fault(&mut self, t: f64, fault: ObjectiveFault, value: f64) {
        self.faults += 1;
        if self.events.len() < EVENTS_KEPT {
            self.events.push(Event {
                t_s: t,
                kind: fault.as_str(),
                value: value.is_finite().then_some(value),
                reason: None,
            });
        }
    }
}

fn csv_header(config: &LoopConfig) -> String {
    let mut header = String::from("t_s,objective,optimum_objective");
    for input in &config.inputs {
        for column in ["applied", "estimate", "gradient", "optimum"] {
            header.push_str(&format!(",{}.{column}", input.name));
        }
    }
    for c in &config.constraints {
        header.push_str(&format!(",{}.value", c.name));
    }
    header
}

fn open_csv(dir: &Path, config: &LoopConfig) -> anyhow::Result<BufWriter<File>> {
    std::fs::create_dir_all(dir)
        .with_context(|| format!("could not create the CSV folder {}", dir.display()))?;
    let path = dir.join(format!("{}.csv", config.name));
    let file = File::create(&path).with_context(|| format!("could not create {}", path.display()))?;
    let mut csv = BufWriter::new(file);
    writeln!(csv, "{}", csv_header(config)).with_context(|| format!("could not write {}", path.display()))?;
    Ok(csv)
}

fn write_row(
    out: &mut impl Write,
    t: f64,
    measured: f64,
    best: f64,
    inputs: &[crate::seek::InputState],
    optimum: &[f64],
    constraints: impl Iterator<Item = Option<f64>>,
) -> std::io::Result<()> {
    write!(out, "{t},")?;
    // A non-finite objective is an empty cell, never `NaN` text in a numeric column.
    if measured.is_finite() {
        write!(out, "{measured}")?;
    }
    write!(out, ",{best}")?;
    for (input, x) in inputs.iter().zip(optimum) {
        write!(out, ",{},{},{},{x}", input.applied, input.estimate, input.gradient)?;
    }
    // Each constraint's value as the loop read it; empty when unknown.
    for v in constraints {
        match v.filter(|v| v.is_finite()) {
            Some(v) => write!(out, ",{v}")?,
            None => write!(out, ",")?,
        }
    }
    writeln!(out)
}

/// Records a loop's trace for the plot with bounded memory: every tick up to
/// [`TRACE_SAMPLES`], else per bucket of ticks the smallest and the largest value of each
/// series, which keeps the dither band and the noise visible.
#[derive(Debug)]
struct TraceRecorder {
    trace: LoopTrace,
    ticks_per_bucket: u64,
    in_bucket: u64,
    bucket_start_s: f64,
    last_s: f64,
    /// Per series: objective, best, then applied, estimate and optimum of each input.
    low: Vec<f64>,
    high: Vec<f64>,
    values: Vec<f64>,
}

impl TraceRecorder {
    fn new(trace: LoopTrace, expected_ticks: u64) -> Self {
        let series = 2 + 3 * trace.inputs.len();
        let ticks_per_bucket =
            if expected_ticks <= TRACE_SAMPLES { 1 } else { expected_ticks.div_ceil(TRACE_SAMPLES / 2) };
        TraceRecorder {
            trace,
            ticks_per_bucket,
            in_bucket: 0,
            bucket_start_s: 0.0,
            last_s: 0.0,
            low: vec![f64::NAN; series],
            high: vec![f64::NAN; series],
            values: vec![0.0; series],
        }
    }

    fn push(
        &mut self,
        t: f64,
        measured: f64,
        best: f64,
        inputs: &[crate::seek::InputState],
        optimum: &[f64],
    ) {
        self.last_s = t;
        self.values[0] = if measured.is_finite() { measured } else { f64::NAN };
        self.values[1] = best;
        for (k, (input, &x)) in inputs.iter().zip(optimum).enumerate() {
            self.values[2 + 3 * k..5 + 3 * k].copy_from_slice(&[input.applied, input.estimate, x]);
        }
        if self.ticks_per_bucket == 1 {
            let values = std::mem::take(&mut self.values);
            self.append(t, &values);
            self.values = values;
            return;
        }
        if self.in_bucket == 0 {
            self.bucket_start_s = t;
        }
        // f64::min and max skip NaN, so a bucket is NaN only when all of it was.
        for ((lo, hi), &v) in self.low.iter_mut().zip(self.high.iter_mut()).zip(&self.values) {
            *lo = lo.min(v);
            *hi = hi.max(v);
        }
        self.in_bucket += 1;
        if self.in_bucket == self.ticks_per_bucket {
            self.flush(t);
        }
    }

    fn flush(&mut self, t: f64) {
        if self.in_bucket == 0 {
            return;
        }
        let (low, high) = (std::mem::take(&mut self.low), std::mem::take(&mut self.high));
        self.append(self.bucket_start_s, &low);
        self.append(0.5 * (self.bucket_start_s + t), &high);
        self.low = vec![f64::NAN; low.len()];
        self.high = vec![f64::NAN; high.len()];
        self.in_bucket = 0;
    }

    fn append(&mut self, t: f64, values: &[f64]) {
        let trace = &mut self.trace;
        trace.t_s.push(t);
        trace.objective_values.push(values[0]);
        trace.best_objective.push(values[1]);
        for (k, tr) in trace.inputs.iter_mut().enumerate() {
            tr.applied.push(values[2 + 3 * k]);
            tr.estimate.push(values[3 + 3 * k]);
            tr.optimum.push(values[4 + 3 * k]);
        }
    }

    fn finish(mut self) -> LoopTrace {
        self.flush(self.last_s);
        self.trace
    }
}

fn empty_trace(config: &LoopConfig) -> LoopTrace {
    LoopTrace {
        name: config.name.clone(),
        objective: config.objective.to_string(),
        direction: config.direction.as_str(),
        method: config.method.kind().as_str(),
        t_s: Vec::new(),
        objective_values: Vec::new(),
        best_objective: Vec::new(),
        inputs: config
            .inputs
            .iter()
            .map(|i| InputTrace {
                name: i.name.clone(),
                applied: Vec::new(),
                estimate: Vec::new(),
                optimum: Vec::new(),
            })
            .collect(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Range;
    use crate::seek::InputState;
    use crate::seek::guard::InputGuard;

    fn input(applied: f64) -> InputState {
        let guard = InputGuard { bounds: Range { min: -10.0, max: 10.0 }, amplitude: 1.0, max_step: 1.0 };
        InputState { guard, estimate: 0.0, applied, gradient: 0.0 }
    }

    fn trace() -> LoopTrace {
        LoopTrace { inputs: vec![InputTrace::default()], ..LoopTrace::default() }
    }

    #[test]
    fn short_runs_keep_every_tick_in_the_trace() {
        let mut r = TraceRecorder::new(trace(), 100);
        for n in 0..100 {
            r.push(f64::from(n), 1.0, 2.0, &[input(f64::from(n))], &[0.0]);
        }
        let t = r.finish();
        assert_eq!(t.t_s.len(), 100);
        assert_eq!(t.inputs[0].applied[42], 42.0);
    }

    #[test]
    fn long_runs_keep_a_bounded_trace_with_the_dither_band() {
        let ticks = 3 * TRACE_SAMPLES + 7;
        let mut r = TraceRecorder::new(trace(), ticks);
        for n in 0..ticks {
            let dither = (n as f64 * 0.7).sin();
            let objective = if n % 5 == 0 { f64::NAN } else { dither };
            r.push(n as f64, objective, 0.0, &[input(dither)], &[0.0]);
        }
        let t = r.finish();
        assert!(t.t_s.len() as u64 <= TRACE_SAMPLES + 2, "{}", t.t_s.len());
        let applied = &t.inputs[0].applied;
        assert!(applied.iter().cloned().fold(f64::MIN, f64::max) > 0.99);
        assert!(applied.iter().cloned().fold(f64::MAX, f64::min) < -0.99);
        assert!(t.objective_values.iter().all(|v| v.is_finite()), "a bucket with numbers is never NaN");
        assert!(t.t_s.windows(2).all(|w| w[0] <= w[1]));
    }
}
