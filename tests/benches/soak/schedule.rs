//! The soak's faults and changes, drawn from the seed before the run starts.

use std::time::Duration;

use proptest::prelude::RngExt;
use proptest::test_runner::TestRng;

use crate::plc_port::Fault;

/// Exponential waiting time with this mean (a Poisson process of faults).
fn exponential(rng: &mut TestRng, mean: f64) -> f64 {
    -mean * (1.0 - rng.random::<f64>()).ln()
}

/// What the schedule does at a moment of the soak.
#[derive(Debug, Clone)]
pub enum Action {
    /// The PLC's port starts to misbehave this way.
    Link(Fault),
    /// The PLC's port answers normally again.
    LinkBack,
    /// The simulated PLC is killed (every connection drops) ...
    PlcDown,
    /// ... and started again: plant time from 0, setpoints at their initial values.
    PlcUp,
    PermitOff,
    PermitOn,
    Mode {
        loop_index: usize,
        mode: &'static str,
    },
    /// New bounds for one input, as fractions of its limits' span.
    Bounds {
        loop_index: usize,
        input_fraction: f64,
        low: f64,
        span: f64,
    },
    /// The input's bounds back to the config's.
    BoundsBack {
        loop_index: usize,
        input_fraction: f64,
    },
    /// `kill -9` of Ridgeline, a database check, and a restart after this long.
    Kill {
        down: Duration,
    },
}

/// The whole run's faults, drawn from the seed before it starts: (seconds of wall time
/// from the start, action), in time order. Link faults and permit withdrawals last a
/// few `unit`s (wall seconds: the watchdog's, or a floor; see `fault_unit`).
pub fn schedule(rng: &mut TestRng, wall_s: f64, unit: f64, loops: usize, kills: usize) -> Vec<(f64, Action)> {
    let mut plan = Vec::new();
    // The link: one fault at a time, each lasting 0.25 to 2 units (0.5 to 4 s at 60x).
    let mut t = exponential(rng, 30.0);
    while t < wall_s {
        let lasting = unit * rng.random_range(0.25..2.0);
        let end = (t + lasting).min(wall_s);
        match rng.random_range(0..5) {
            0 => plan.push((t, Action::Link(Fault::Refuse))),
            1 => plan.push((t, Action::Link(Fault::Silent))),
            2 => plan.push((t, Action::Link(Fault::Busy))),
            // Twice the demo link's 1 s timeout.
            3 => plan.push((t, Action::Link(Fault::Late(Duration::from_secs(2))))),
            _ => {
                plan.push((t, Action::PlcDown));
                plan.push((end, Action::PlcUp));
            }
        }
        if !matches!(plan.last(), Some((_, Action::PlcUp))) {
            plan.push((end, Action::LinkBack));
        }
        t = end + exponential(rng, 30.0);
    }
    // The permit, withdrawn for 1.5 to 4 units at a time (3 to 8 s at 60x): longer than
    // the grace after which a write counts against it (PERMIT_GRACE, 2 s), so most of
    // each withdrawal is checked.
    let mut t = exponential(rng, 60.0);
    while t < wall_s {
        let end = (t + unit * rng.random_range(1.5..4.0)).min(wall_s);
        plan.push((t, Action::PermitOff));
        plan.push((end, Action::PermitOn));
        t = end + exponential(rng, 60.0);
    }
    // The operator's changes through the API.
    let mut t = exponential(rng, 15.0);
    while t < wall_s {
        let loop_index = rng.random_range(0..loops);
        let input_fraction = rng.random::<f64>();
        let action = match rng.random_range(0..10) {
            0..4 => {
                let modes = ["seeking", "seeking", "holding", "observing", "stopped"];
                Action::Mode { loop_index, mode: modes[rng.random_range(0..modes.len())] }
            }
            4..8 => {
                let span = rng.random_range(0.3..0.8);
                Action::Bounds { loop_index, input_fraction, low: rng.random_range(0.0..1.0 - span), span }
            }
            _ => Action::BoundsBack { loop_index, input_fraction },
        };
        plan.push((t, action));
        t += exponential(rng, 15.0);
    }
    // Kills in the first 60% of the run, so the last life is long enough to judge its memory.
    for _ in 0..kills {
        let at = wall_s * rng.random_range(0.1..0.6);
        plan.push((at, Action::Kill { down: Duration::from_secs_f64(rng.random_range(0.2..5.0)) }));
    }
    plan.sort_by(|a, b| a.0.total_cmp(&b.0));
    plan
}
