//! The true optimum of a loop's objective over its operating bounds, tracked tick by
//! tick as the plant drifts.
//!
//! A full scan finds the best region at the start and now and then after; between scans
//! each tick refines the previous optimum by golden-section search in a small bracket,
//! which keeps a day of rehearsal cheap. Several inputs are handled coordinate by
//! coordinate.

use crate::config::Range;

/// Points per coordinate in a full scan.
const SCAN_POINTS: usize = 41;
/// Golden-section iterations; each shrinks the bracket by 0.618.
const REFINE_ITERATIONS: usize = 36;
/// Half-width of the per-tick bracket, as a fraction of the bounds span.
const TRACK_FRACTION: f64 = 0.02;
/// Ticks between full scans, to catch the optimum jumping to another hill.
const RESCAN_EVERY: u32 = 600;
/// Coordinate sweeps for several inputs.
const SWEEPS: usize = 8;

/// Tracks the optimum of one loop.
#[derive(Debug, Clone)]
pub struct OptimumTracker {
    /// +1 to maximize, -1 to minimize.
    sign: f64,
    best: Vec<f64>,
    since_scan: Option<u32>,
    point: Vec<f64>,
}

impl OptimumTracker {
    pub fn new(sign: f64, inputs: usize) -> Self {
        OptimumTracker { sign, best: vec![0.0; inputs], since_scan: None, point: vec![0.0; inputs] }
    }

    /// The optimum within `bounds` of `objective` (evaluated at a point of all inputs).
    pub fn find(&mut self, bounds: &[Range], objective: &mut impl FnMut(&[f64]) -> f64) -> &[f64] {
        let full_scan = match self.since_scan {
            None => true,
            Some(n) => n >= RESCAN_EVERY,
        };
        if full_scan {
            self.scan(bounds, objective);
        } else {
            self.since_scan = self.since_scan.map(|n| n + 1);
            let sweeps = if bounds.len() == 1 { 1 } else { SWEEPS };
            let mut lost = false;
            for _ in 0..sweeps {
                for (i, b) in bounds.iter().enumerate() {
                    let half = TRACK_FRACTION * b.span();
                    let lo = (self.best[i] - half).max(b.min);
                    let hi = (self.best[i] + half).min(b.max);
                    let x = self.refine(i, lo, hi, objective);
                    // Ending on a bracket edge that is not a bound means the optimum moved
                    // further than one tick's tracking reaches.
                    let edge = (hi - lo) * 1e-6;
                    lost |= (x - lo < edge && lo > b.min) || (hi - x < edge && hi < b.max);
                    self.best[i] = x;
                }
            }
            if lost {
                self.scan(bounds, objective);
            }
        }
        &self.best
    }

    fn scan(&mut self, bounds: &[Range], objective: &mut impl FnMut(&[f64]) -> f64) {
        self.since_scan = Some(0);
        for (x, b) in self.best.iter_mut().zip(bounds) {
            *x = 0.5 * (b.min + b.max);
        }
        let sweeps = if bounds.len() == 1 { 1 } else { SWEEPS };
        for _ in 0..sweeps {
            for (i, b) in bounds.iter().enumerate() {
                let step = b.span() / (SCAN_POINTS - 1) as f64;
                let mut best = (f64::NEG_INFINITY, self.best[i]);
                for k in 0..SCAN_POINTS {
                    let x = b.min + step * k as f64;
                    let score = self.score(i, x, objective);
                    if score > best.0 {
                        best = (score, x);
                    }
                }
                let (lo, hi) = ((best.1 - step).max(b.min), (best.1 + step).min(b.max));
                self.best[i] = self.refine(i, lo, hi, objective);
            }
        }
    }

    /// Golden-section search on coordinate `i` in `[lo, hi]`, others held at `best`.
    fn refine(
        &mut self,
        i: usize,
        mut lo: f64,
        mut hi: f64,
        objective: &mut impl FnMut(&[f64]) -> f64,
    ) -> f64 {
        const R: f64 = 0.618_033_988_749_894_9;
        let mut a = hi - R * (hi - lo);
        let mut b = lo + R * (hi - lo);
        let (mut fa, mut fb) = (self.score(i, a, objective), self.score(i, b, objective));
        for _ in 0..REFINE_ITERATIONS {
            if fa >= fb {
                hi = b;
                (b, fb) = (a, fa);
                a = hi - R * (hi - lo);
                fa = self.score(i, a, objective);
            } else {
                lo = a;
                (a, fa) = (b, fb);
                b = lo + R * (hi - lo);
                fb = self.score(i, b, objective);
            }
        }
        // The bracket ends may beat its interior when the optimum sits on a bound.
        let mut best = if fa >= fb { (fa, a) } else { (fb, b) };
        for end in [lo, hi] {
            let s = self.score(i, end, objective);
            if s > best.0 {
                best = (s, end);
            }
        }
        best.1
    }

    /// Signed objective at `best` with coordinate `i` set to `x`; NaN scores lowest.
    fn score(&mut self, i: usize, x: f64, objective: &mut impl FnMut(&[f64]) -> f64) -> f64 {
        self.point.copy_from_slice(&self.best);
        self.point[i] = x;
        let s = self.sign * objective(&self.point);
        if s.is_nan() { f64::NEG_INFINITY } else { s }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn finds_the_peak_of_a_parabola() {
        let mut t = OptimumTracker::new(1.0, 1);
        let x = t.find(&[Range { min: 0.0, max: 10.0 }], &mut |u| 10.0 - 2.0 * (u[0] - 3.0).powi(2))[0];
        assert!((x - 3.0).abs() < 1e-6, "{x}");
    }

    #[test]
    fn follows_a_moving_optimum_and_stops_at_a_bound() {
        let mut t = OptimumTracker::new(-1.0, 1);
        let b = [Range { min: 0.0, max: 10.0 }];
        for k in 0..2000 {
            let c = 2.0 + 0.005 * k as f64;
            let x = t.find(&b, &mut |u| (u[0] - c).powi(2))[0];
            assert!((x - c.min(10.0)).abs() < 1e-5, "tick {k}: {x} vs {c}");
        }
    }

    #[test]
    fn finds_a_coupled_optimum_of_two_inputs() {
        let mut t = OptimumTracker::new(1.0, 2);
        let b = [Range { min: -3.0, max: 3.0 }; 2];
        // J = 5 - 0.5 (x-x*)' Q (x-x*), Q = [[2, .5], [.5, 1]], x* = (1, -1)
        let x = t.find(&b, &mut |u| {
            let (a, c) = (u[0] - 1.0, u[1] + 1.0);
            5.0 - 0.5 * (2.0 * a * a + a * c + c * c)
        });
        assert!((x[0] - 1.0).abs() < 1e-4 && (x[1] + 1.0).abs() < 1e-4, "{x:?}");
    }

    #[test]
    fn jumps_to_a_new_hill_when_tracking_loses_the_optimum() {
        let mut t = OptimumTracker::new(1.0, 1);
        let b = [Range { min: 0.0, max: 10.0 }];
        t.find(&b, &mut |u| -(u[0] - 2.0).powi(2));
        let x = t.find(&b, &mut |u| -(u[0] - 8.0).powi(2))[0];
        assert!((x - 8.0).abs() < 1e-5, "{x}");
    }
}
