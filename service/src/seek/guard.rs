//! Operating bounds and rate limit on each input: the one place that decides what may
//! be written, shared by the live loop and the rehearsal.

use crate::config::Range;

/// The limits one input's estimate and applied setpoint obey.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct InputGuard {
    /// Operating range; the applied setpoint, dither included, never leaves it.
    pub bounds: Range,
    /// Dither amplitude: the estimate is kept `amplitude` inside the bounds (anti-windup).
    pub amplitude: f64,
    /// Largest change of the estimate per tick (`max_rate_per_s * tick_s`).
    pub max_step: f64,
}

/// A value after the guard, and whether the guard had to act.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Guarded {
    pub value: f64,
    pub at_bound: bool,
    pub rate_limited: bool,
}

impl InputGuard {
    /// Moves the estimate from `current` toward `proposed`: the target is held so that
    /// `estimate ± amplitude` stays in the bounds, and the move is cut to `max_step`.
    /// An estimate left outside narrowed bounds walks back in at the rate limit.
    pub fn next_estimate(&self, current: f64, proposed: f64) -> Guarded {
        self.toward(current, proposed, self.estimate_range())
    }

    /// The estimate of a back-off tick: one `max_step` the way `way` says (+1, -1; 0
    /// holds), without dither, anywhere in the bounds.
    pub fn walked_estimate(&self, current: f64, way: f64) -> Guarded {
        self.toward(current, current + way * self.max_step, (self.bounds.min, self.bounds.max))
    }

    /// The estimate of a tick without dither: it stays where it is, anywhere in the
    /// bounds, and walks back into bounds that moved past it at the rate limit.
    pub fn held_estimate(&self, current: f64) -> Guarded {
        self.toward(current, current, (self.bounds.min, self.bounds.max))
    }

    // `max`/`min` rather than `clamp`, which panics on reversed bounds: a guard must
    // never bring the loop down, whatever reaches it.
    fn toward(&self, current: f64, proposed: f64, (lo, hi): (f64, f64)) -> Guarded {
        let proposed = if proposed.is_finite() { proposed } else { current };
        let target = proposed.max(lo).min(hi);
        let at_bound = target != proposed;
        let step = target - current;
        if step.abs() > self.max_step {
            Guarded { value: current + self.max_step.copysign(step), at_bound, rate_limited: true }
        } else {
            Guarded { value: target, at_bound, rate_limited: false }
        }
    }

    /// The setpoint to write: estimate plus dither, clamped to the bounds.
    pub fn applied(&self, estimate: f64, dither: f64) -> Guarded {
        let wanted = estimate + dither;
        let value = self.clamp(wanted);
        Guarded { value, at_bound: value != wanted, rate_limited: false }
    }

    /// Clamps to the bounds; a non-finite value becomes the middle of the bounds, never NaN.
    pub fn clamp(&self, value: f64) -> f64 {
        if value.is_nan() {
            0.5 * (self.bounds.min + self.bounds.max)
        } else {
            value.max(self.bounds.min).min(self.bounds.max)
        }
    }

    /// Where the estimate may sit while dithering: the bounds shrunk by the dither
    /// amplitude on each side (their middle when they are too narrow for the dither).
    pub fn estimate_range(&self) -> (f64, f64) {
        let (lo, hi) = (self.bounds.min + self.amplitude, self.bounds.max - self.amplitude);
        if lo <= hi {
            (lo, hi)
        } else {
            let mid = 0.5 * (self.bounds.min + self.bounds.max);
            (mid, mid)
        }
    }
}

/// Why an objective sample must not reach the core.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ObjectiveFault {
    /// NaN or infinite, e.g. a division by a tag that reads zero.
    NotFinite,
    /// Outside the watchdog's plausible range.
    OutOfRange,
    /// A constraint's value is NaN or infinite: the sample cannot be judged against it.
    ConstraintNotFinite,
}

impl ObjectiveFault {
    pub fn as_str(self) -> &'static str {
        match self {
            ObjectiveFault::NotFinite => "objective_not_finite",
            ObjectiveFault::OutOfRange => "objective_out_of_range",
            ObjectiveFault::ConstraintNotFinite => "constraint_not_finite",
        }
    }
}

/// Lets an objective sample through only when it is finite and plausible.
pub fn check_objective(value: f64, plausible: Option<Range>) -> Result<f64, ObjectiveFault> {
    if !value.is_finite() {
        Err(ObjectiveFault::NotFinite)
    } else if plausible.is_some_and(|r| !r.contains(value)) {
        Err(ObjectiveFault::OutOfRange)
    } else {
        Ok(value)
    }
}

/// Where a loop starts: the setpoint read back from the PLC when it is inside the
/// bounds, else the configured safe value (clamped into the bounds).
pub fn initial_estimate(read_back: Option<f64>, bounds: Range, safe: f64) -> f64 {
    starting_point(None, read_back, bounds, safe).0
}

/// Where a starting estimate came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Origin {
    /// The last estimate stored in history, recent enough.
    Stored,
    /// The setpoint read back from the PLC.
    ReadBack,
    /// The configured safe value.
    Safe,
}

impl Origin {
    pub fn as_str(self) -> &'static str {
        match self {
            Origin::Stored => "stored",
            Origin::ReadBack => "read_back",
            Origin::Safe => "safe",
        }
    }
}

/// Where a (re)started loop begins: a stored estimate that is recent enough (the caller
/// passes it only then) and inside the bounds, else the setpoint read back from the PLC
/// when inside the bounds, else `safe` clamped into the bounds.
pub fn starting_point(
    stored: Option<f64>,
    read_back: Option<f64>,
    bounds: Range,
    safe: f64,
) -> (f64, Origin) {
    let usable = |v: &f64| v.is_finite() && bounds.contains(*v);
    match (stored.filter(usable), read_back.filter(usable)) {
        (Some(v), _) => (v, Origin::Stored),
        (None, Some(v)) => (v, Origin::ReadBack),
        (None, None) => (safe.max(bounds.min).min(bounds.max), Origin::Safe),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn guard() -> InputGuard {
        InputGuard { bounds: Range { min: 1.0, max: 2.0 }, amplitude: 0.1, max_step: 0.05 }
    }

    #[test]
    fn estimate_stays_a_dither_amplitude_inside_the_bounds() {
        let g = guard().next_estimate(1.88, 1.95);
        assert_eq!(g.value, 1.9);
        assert!(g.at_bound && !g.rate_limited);
    }

    #[test]
    fn estimate_moves_at_most_one_step_per_tick() {
        let g = guard().next_estimate(1.5, 1.7);
        assert!((g.value - 1.55).abs() < 1e-15);
        assert!(g.rate_limited);
    }

    #[test]
    fn estimate_outside_narrowed_bounds_walks_back_at_the_rate_limit() {
        let g = guard().next_estimate(2.5, 2.5);
        assert!((g.value - 2.45).abs() < 1e-15);
        assert!(g.at_bound && g.rate_limited);
    }

    #[test]
    fn holding_keeps_an_estimate_near_a_bound_where_it_is() {
        let g = guard().held_estimate(1.95);
        assert_eq!(g.value, 1.95);
        assert!(!g.at_bound && !g.rate_limited);
        let outside = guard().held_estimate(2.5);
        assert!((outside.value - 2.45).abs() < 1e-15 && outside.rate_limited);
    }

    #[test]
    fn non_finite_proposals_leave_the_estimate_where_it_was() {
        assert_eq!(guard().next_estimate(1.5, f64::NAN).value, 1.5);
        assert_eq!(guard().next_estimate(1.5, f64::INFINITY).value, 1.5);
    }

    #[test]
    fn applied_setpoint_is_clamped_to_the_bounds() {
        assert_eq!(guard().applied(1.95, 0.1).value, 2.0);
        assert_eq!(guard().applied(f64::NAN, 0.1).value, 1.5);
    }

    #[test]
    fn a_recent_stored_estimate_inside_the_bounds_comes_first() {
        let b = Range { min: 1.0, max: 2.0 };
        assert_eq!(starting_point(Some(1.7), Some(1.2), b, 1.5), (1.7, Origin::Stored));
        assert_eq!(starting_point(Some(2.7), Some(1.2), b, 1.5), (1.2, Origin::ReadBack));
        assert_eq!(starting_point(Some(f64::NAN), None, b, 1.5), (1.5, Origin::Safe));
    }

    #[test]
    fn start_uses_the_read_back_value_only_inside_the_bounds() {
        let b = Range { min: 1.0, max: 2.0 };
        assert_eq!(initial_estimate(Some(1.2), b, 1.5), 1.2);
        assert_eq!(initial_estimate(Some(2.2), b, 1.5), 1.5);
        assert_eq!(initial_estimate(None, b, 3.0), 2.0);
    }
}
