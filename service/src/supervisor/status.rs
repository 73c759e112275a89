//! The latest status of a loop, as the API and the progress lines show it.

use serde::Serialize;

use crate::config::{LoopConfig, Range};
use crate::seek::Curvature;

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LoopStatus {
    pub name: String,
    /// What was asked for: seeking, holding, observing or stopped.
    pub mode: &'static str,
    /// What the loop is doing: a mode, or fallback or no_permit.
    pub state: &'static str,
    pub fallback_reason: Option<String>,
    pub direction: &'static str,
    pub method: &'static str,
    pub permitted: bool,
    pub objective: Option<f64>,
    /// RFC 3339 UTC time of the last successful read of the objective.
    pub objective_at: Option<String>,
    pub ticks: u64,
    /// Ticks skipped because they came too late after a stall (not in the interface
    /// contract's list; an addition).
    pub skipped_ticks: u64,
    pub inputs: Vec<InputStatus>,
    /// The loop's constraints in config order (empty for a loop without any).
    pub constraints: Vec<ConstraintStatus>,
    /// A loop with a penalty constraint: the objective its core saw at the last tick,
    /// worsened by the penalties (`null` when the core did not step); absent otherwise.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub penalized_objective: Option<Option<f64>>,
    /// A stepwise loop's dwell while it seeks.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub dwell: Option<DwellStatus>,
}

/// A constraint as it stands.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ConstraintStatus {
    pub name: String,
    /// The value at the last tick whose tags were read.
    pub value: Option<f64>,
    pub limit: f64,
    /// `max` (the value must stay at or below the limit) or `min`.
    pub side: &'static str,
    /// `back_off` or `penalty`.
    pub handling: &'static str,
    pub engaged: bool,
}

/// Where a seeking stepwise loop is in its dwell.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DwellStatus {
    /// The input stepped into this dwell; `None` for the first, the reference level.
    pub input: Option<String>,
    /// `settling` or `averaging`.
    pub phase: &'static str,
    /// Seconds until the dwell ends and the next step is taken.
    pub ends_in_s: f64,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct InputStatus {
    pub name: String,
    pub applied: f64,
    pub estimate: f64,
    pub gradient: f64,
    pub bounds: Bounds,
    pub limits: Bounds,
    pub safe: f64,
    /// Newton's curvature estimate along this input.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub curvature: Option<Curvature>,
}

#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Bounds {
    pub min: f64,
    pub max: f64,
}

impl From<Range> for Bounds {
    fn from(r: Range) -> Self {
        Bounds { min: r.min, max: r.max }
    }
}

impl LoopStatus {
    /// The status of a loop that has not ticked yet.
    pub fn initial(config: &LoopConfig) -> Self {
        LoopStatus {
            name: config.name.clone(),
            mode: config.start_mode.as_str(),
            state: config.start_mode.as_str(),
            fallback_reason: None,
            direction: config.direction.as_str(),
            method: config.method.kind().as_str(),
            permitted: true,
            objective: None,
            objective_at: None,
            ticks: 0,
            skipped_ticks: 0,
            inputs: config
                .inputs
                .iter()
                .map(|i| InputStatus {
                    name: i.name.clone(),
                    applied: f64::NAN,
                    estimate: f64::NAN,
                    gradient: 0.0,
                    bounds: i.bounds.into(),
                    limits: i.limits.into(),
                    safe: i.safe,
                    curvature: None,
                })
                .collect(),
            constraints: config
                .constraints
                .iter()
                .map(|c| ConstraintStatus {
                    name: c.name.clone(),
                    value: None,
                    limit: c.limit.value(),
                    side: c.limit.side(),
                    handling: c.handling.kind().as_str(),
                    engaged: false,
                })
                .collect(),
            penalized_objective: config
                .constraints
                .iter()
                .any(|c| c.handling.kind() == crate::config::HandlingKind::Penalty)
                .then_some(None),
            dwell: None,
        }
    }
}
