//! The rehearsal report: per loop how fast it settled, what it lost, and how often the
//! guard had to act; printed for people or as JSON.

use std::fmt::{self, Write as _};

use serde::Serialize;
use serde::ser::SerializeMap;

#[derive(Debug, Clone, Serialize)]
pub struct Report {
    pub duration_s: f64,
    pub loops: Vec<LoopReport>,
    /// With `--separately`: one row per loop, side by side.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub comparison: Option<Vec<ComparisonRow>>,
}

/// One loop of a side-by-side rehearsal (each loop against its own copy of the plant).
#[derive(Debug, Clone, Serialize)]
pub struct ComparisonRow {
    #[serde(rename = "loop")]
    pub loop_name: String,
    pub method: &'static str,
    pub settle_time_s: Option<f64>,
    pub mean_loss: Option<f64>,
    pub bound_hits: u64,
    pub rate_limited_ticks: u64,
}

impl Report {
    /// The reports of loops rehearsed each against its own copy of the plant, with the
    /// comparison that ends them.
    pub fn side_by_side(duration_s: f64, loops: Vec<LoopReport>) -> Report {
        let comparison = loops
            .iter()
            .map(|l| ComparisonRow {
                loop_name: l.name.clone(),
                method: l.method,
                settle_time_s: l.settle_time_s,
                mean_loss: l.mean_loss,
                bound_hits: l.bound_hits,
                rate_limited_ticks: l.rate_limited_ticks,
            })
            .collect();
        Report { duration_s, loops, comparison: Some(comparison) }
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct LoopReport {
    pub name: String,
    pub direction: &'static str,
    pub method: &'static str,
    pub ticks: u64,
    /// First time after which every estimate stayed within 2% of its bounds span of the
    /// moving optimum (or of the nearest point the dither lets the estimate reach, when
    /// the optimum is within a dither amplitude of a bound); `None` when the run ended
    /// outside that band.
    pub settle_time_s: Option<f64>,
    /// Mean `|J(optimum) - J(delivered)|` over the last quarter. `J(optimum)` is the best
    /// objective on the noise-free static map over the operating bounds, among setpoints
    /// whose objective is finite and inside the watchdog's plausible range; `J(delivered)`
    /// is the objective the plant gives without its noise, after its lag and dead time.
    pub mean_loss: Option<f64>,
    /// `mean_loss` over the mean `|J(optimum)|` of the same ticks.
    pub relative_loss: Option<f64>,
    /// Ticks in which the bounds held back an estimate or clipped a setpoint.
    pub bound_hits: u64,
    /// Ticks in which the rate limit cut a move of an estimate.
    pub rate_limited_ticks: u64,
    /// Ticks whose objective was not finite or outside the plausible range; the core
    /// held its estimates and wrote them without dither.
    pub objective_faults: u64,
    /// The first few such events, and constraints engaged and released.
    pub events: Vec<Event>,
    /// What each constraint did, in config order (empty for a loop without any).
    pub constraints: Vec<ConstraintReport>,
    #[serde(rename = "final", serialize_with = "inputs_by_name")]
    pub inputs: Vec<FinalInput>,
}

/// What one constraint did over a rehearsal. "Past the limit" is judged on the value
/// the plant delivered without its noise, after its lag and dead time.
#[derive(Debug, Clone, Serialize)]
pub struct ConstraintReport {
    pub name: String,
    pub handling: &'static str,
    /// `max` or `min`.
    pub side: &'static str,
    pub limit: f64,
    /// Ticks whose delivered value was past the limit, over all ticks.
    pub fraction_past_limit: f64,
    /// The largest distance past the limit (0 when never past it).
    pub largest_excess: f64,
    /// How many times the loop engaged the constraint.
    pub engagements: u64,
}

#[derive(Debug, Clone, Serialize)]
pub struct Event {
    pub t_s: f64,
    /// `objective_not_finite`, `objective_out_of_range`, `constraint_not_finite`, a
    /// state change of the loop (`tripped`, `recovered`), or `constraint_engaged` and
    /// `constraint_released` (with the constraint's value).
    pub kind: &'static str,
    /// The objective's value, when it was a number.
    pub value: Option<f64>,
    /// For a state change: why, and the state it went to.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub reason: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct FinalInput {
    #[serde(skip)]
    pub name: String,
    pub estimate: f64,
    /// The best point that respects every constraint.
    pub optimum: f64,
    /// For a loop with constraints: the best point with the constraints ignored.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub unconstrained_optimum: Option<f64>,
}

/// `final` is an object keyed by input name, in config order.
fn inputs_by_name<S: serde::Serializer>(inputs: &[FinalInput], s: S) -> Result<S::Ok, S::Error> {
    let mut map = s.serialize_map(Some(inputs.len()))?;
    for input in inputs {
        map.serialize_entry(&input.name, input)?;
    }
    map.end()
}

impl fmt::Display for Report {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, l) in self.loops.iter().enumerate() {
            if i > 0 {
                writeln!(f)?;
            }
            write!(f, "{l}")?;
        }
        if let Some(rows) = &self.comparison {
            writeln!(f, "\nside by side, each loop against its own copy of the plant:")?;
            let width = rows.iter().map(|r| r.loop_name.len()).max().unwrap_or(4).max(4);
            writeln!(
                f,
                "  {:<width$}  {:<8}  {:>14}  {:>12}  {:>10}  {:>12}",
                "loop", "method", "settle time", "mean loss", "bound hits", "rate-limited"
            )?;
            for r in rows {
                writeln!(
                    f,
                    "  {:<width$}  {:<8}  {:>14}  {:>12}  {:>10}  {:>12}",
                    r.loop_name,
                    r.method,
                    r.settle_time_s.map_or_else(|| "never".to_owned(), human_duration),
                    r.mean_loss.map_or_else(|| "n/a".to_owned(), |l| format!("{l:.6}")),
                    r.bound_hits,
                    r.rate_limited_ticks
                )?;
            }
        }
        Ok(())
    }
}

impl fmt::Display for LoopReport {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        writeln!(f, "loop {} ({}, {} ticks)", self.name, self.direction, self.ticks)?;
        let settle = match self.settle_time_s {
            Some(t) => format!("{} ({t} s)", human_duration(t)),
            None => "never: the run ended more than 2% of the bounds span from the optimum".into(),
        };
        writeln!(f, "  settle time             {settle}")?;
        let loss = match (self.mean_loss, self.relative_loss) {
            (Some(l), Some(r)) => format!("{l:.6} ({:.3}% of the best objective)", 100.0 * r),
            (Some(l), None) => format!("{l:.6}"),
            _ => "n/a (no ticks)".into(),
        };
        writeln!(f, "  mean loss, last quarter {loss}")?;
        writeln!(f, "  ticks at a bound        {}", self.bound_hits)?;
        writeln!(f, "  ticks rate-limited      {}", self.rate_limited_ticks)?;
        writeln!(f, "  objective faults        {}", self.objective_faults)?;
        for e in &self.events {
            match &e.reason {
                Some(reason) => writeln!(f, "    at {} s: {} ({reason})", e.t_s, e.kind)?,
                None => {
                    let value = e.value.map_or_else(|| "not a number".into(), |v| v.to_string());
                    writeln!(f, "    at {} s: {} ({value})", e.t_s, e.kind)?
                }
            }
        }
        for c in &self.constraints {
            writeln!(
                f,
                "  constraint {} ({}, {} {}): past the limit {:.2}% of ticks, at most by {:.4}, engaged {} times",
                c.name,
                c.handling,
                c.side,
                c.limit,
                100.0 * c.fraction_past_limit,
                c.largest_excess,
                c.engagements
            )?;
        }
        let width = self.inputs.iter().map(|i| i.name.len()).max().unwrap_or(0).max(5);
        if self.constraints.is_empty() {
            writeln!(f, "  {:width$}  {:>14}  {:>14}", "input", "final estimate", "optimum")?;
            for i in &self.inputs {
                writeln!(f, "  {:width$}  {:>14.6}  {:>14.6}", i.name, i.estimate, i.optimum)?;
            }
        } else {
            writeln!(
                f,
                "  {:width$}  {:>14}  {:>14}  {:>14}",
                "input", "final estimate", "optimum", "unconstrained"
            )?;
            for i in &self.inputs {
                let free = i.unconstrained_optimum.map_or_else(|| "n/a".to_owned(), |x| format!("{x:.6}"));
                writeln!(f, "  {:width$}  {:>14.6}  {:>14.6}  {free:>14}", i.name, i.estimate, i.optimum)?;
            }
        }
        Ok(())
    }
}

/// `1h 12m 5s` style, for reading; the report keeps seconds beside it.
pub fn human_duration(seconds: f64) -> String {
    let total = seconds.round() as u64;
    let (d, h, m, s) = (total / 86_400, total / 3600 % 24, total / 60 % 60, total % 60);
    let mut out = String::new();
    for (value, unit) in [(d, "d"), (h, "h"), (m, "m"), (s, "s")] {
        if value > 0 {
            let _ = write!(out, "{}{value}{unit}", if out.is_empty() { "" } else { " " });
        }
    }
    if out.is_empty() { "0s".into() } else { out }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn json_report_has_the_documented_fields() {
        let report = Report {
            duration_s: 60.0,
            loops: vec![LoopReport {
                name: "a".into(),
                direction: "maximize",
                method: "sine",
                ticks: 60,
                settle_time_s: None,
                mean_loss: Some(0.5),
                relative_loss: Some(0.1),
                bound_hits: 1,
                rate_limited_ticks: 2,
                objective_faults: 0,
                events: vec![],
                constraints: vec![],
                inputs: vec![FinalInput {
                    name: "u".into(),
                    estimate: 1.0,
                    optimum: 2.0,
                    unconstrained_optimum: None,
                }],
            }],
            comparison: None,
        };
        let v = serde_json::to_value(&report).unwrap();
        let l = &v["loops"][0];
        for key in [
            "name",
            "settle_time_s",
            "mean_loss",
            "relative_loss",
            "bound_hits",
            "rate_limited_ticks",
            "final",
        ] {
            assert!(l.get(key).is_some(), "missing {key}");
        }
        assert!(l["settle_time_s"].is_null());
        assert_eq!(l["final"]["u"]["estimate"], 1.0);
        assert_eq!(l["final"]["u"]["optimum"], 2.0);
    }

    #[test]
    fn durations_read_like_a_clock() {
        assert_eq!(human_duration(4325.0), "1h 12m 5s");
        assert_eq!(human_duration(0.2), "0s");
        assert_eq!(human_duration(90_000.0), "1d 1h");
    }
}
