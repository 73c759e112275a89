//! The bump test's staircase, free of I/O and clocks: u0, u0 + step, u0 - step, u0, each
//! level reached at the rate limit and held until the objective has settled (or for
//! `settle_max_s`), with the record of every tick for the fit.
//!
//! When is a level settled? Two conditions, both needed:
//! - the objective has stopped moving: the samples since the level was reached are cut
//!   in thirds, and the mean of the last third is within
//!   `max(3 sigma sqrt(1/n_mid + 1/n_last), 3% of the level's change)` of the middle
//!   third's, sigma being the noise measured on the baseline. On the first step the
//!   response must also have shown (more than 4 sigma from the baseline), or a dead time
//!   would pass for a settled level;
//! - the level has lasted the plant's settling time: the dead time plus four lags (98%
//!   of a first-order step), with the lag and dead time fitted to the record so far by
//!   the same fit `tune` uses. A noisy objective can look still before it has settled;
//!   the fit sees the whole response.

use serde::Serialize;

use crate::tune::Record;

/// Ticks the first level (u0, the baseline) is held at least, to measure the noise.
pub const BASELINE_TICKS: usize = 30;
/// Most rows the settling fit looks at (the record is thinned evenly beyond this).
const FIT_ROWS: usize = 2000;
/// Fewest ticks a level is held.
const MIN_HOLD_TICKS: usize = 10;
/// A visible response moves the objective by more than this many noise deviations.
const VISIBLE_SIGMAS: f64 = 4.0;
/// A level whose last third differs from its middle third by less than this many
/// standard errors of the difference has settled.
const SETTLED_SIGMAS: f64 = 3.0;
/// ... or by less than this fraction of the level's change.
const SETTLED_FRACTION: f64 = 0.03;

/// One level of the staircase as held.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Level {
    pub setpoint: f64,
    /// Seconds on the loop's clock when the level was reached and when it ended.
    pub from_s: f64,
    pub to_s: f64,
    /// Mean objective over the last third of the hold; `None` without samples.
    pub settled_objective: Option<f64>,
    /// Whether the level ended because it had settled (not at `settle_max_s`).
    pub settled: bool,
}

#[derive(Debug, Clone, PartialEq)]
enum Phase {
    /// Moving the setpoint to the level at the rate limit.
    Ramping,
    /// At the level since `since_s`, with the objective's samples since then.
    Holding {
        since_s: f64,
        samples: Vec<f64>,
    },
    Done,
}

/// A running staircase on one input.
#[derive(Debug, Clone, PartialEq)]
pub struct Staircase {
    pub input: usize,
    pub u0: f64,
    pub step: f64,
    targets: [f64; 4],
    next: usize,
    setpoint: f64,
    max_move: f64,
    settle_max_s: f64,
    phase: Phase,
    started_s: f64,
    /// Mean and standard deviation of the objective on the baseline.
    baseline: Option<(f64, f64)>,
    /// The plant's settling time (dead time plus four lags) fitted on the first step, and
    /// the record's length when it was last fitted.
    settling_s: Option<f64>,
    fitted_at: usize,
    levels: Vec<Level>,
    record: Record,
}

impl Staircase {
    /// Starts at `now_s` from `u0` (already written), moving at most `rate_per_s` each
    /// second, ticking every `tick_s`.
    pub fn new(
        input: usize,
        u0: f64,
        step: f64,
        rate_per_s: f64,
        tick_s: f64,
        settle_max_s: f64,
        now_s: f64,
    ) -> Self {
        Staircase {
            input,
            u0,
            step,
            targets: [u0, u0 + step, u0 - step, u0],
            next: 0,
            setpoint: u0,
            max_move: rate_per_s * tick_s,
            settle_max_s,
            phase: Phase::Holding { since_s: now_s, samples: Vec::new() },
            started_s: now_s,
            baseline: None,
            settling_s: None,
            fitted_at: 0,
            levels: Vec::new(),
            record: Record::default(),
        }
    }

    /// The levels the staircase visits.
    pub fn targets(&self) -> [f64; 4] {
        self.targets
    }

    /// The levels held so far (the one being held included once it has ended).
    pub fn levels(&self) -> &[Level] {
        &self.levels
    }

    /// Every tick so far: seconds since the start, the setpoint in force, the objective read.
    pub fn record(&self) -> &Record {
        &self.record
    }

    pub fn is_done(&self) -> bool {
        self.phase == Phase::Done
    }

    /// One tick at `now_s` with the objective read at it (`None` when it could not be
    /// read): the setpoint to write now, or `None` once the staircase is done.
    pub fn tick(&mut self, now_s: f64, objective: Option<f64>) -> Option<f64> {
        let target = self.targets[self.next];
        match &mut self.phase {
            Phase::Done => {}
            Phase::Ramping => {
                let gap = target - self.setpoint;
                self.setpoint = if gap.abs() <= self.max_move {
                    target
                } else {
                    self.setpoint + self.max_move * gap.signum()
                };
                if self.setpoint == target {
                    self.phase = Phase::Holding { since_s: now_s, samples: Vec::new() };
                }
            }
            Phase::Holding { since_s, samples } => {
                // The objective read now answers the setpoint held since the last tick.
                if let Some(j) = objective.filter(|j| j.is_finite()) {
                    samples.push(j);
                }
                let held_s = now_s - *since_s;
                let (since_s, samples) = (*since_s, std::mem::take(samples));
                let still = self.still(&samples);
                if still && self.levels.len() == 1 {
                    self.fit_settling();
                }
                // The baseline needs no settling time; every step does.
                let settled = still
                    && match self.settling_s {
                        Some(needed) => held_s >= needed,
                        None => self.levels.is_empty(),
                    };
                if settled || held_s >= self.settle_max_s {
                    self.end_level(since_s, now_s, &samples, settled);
                } else {
                    self.phase = Phase::Holding { since_s, samples };
                }
            }
        }
        // As in the samples: the objective read at this tick, and the setpoint written at it
        // (which holds until the next).
        self.record.push(now_s - self.started_s, self.setpoint, objective.unwrap_or(f64::NAN));
        (self.phase != Phase::Done).then_some(self.setpoint)
    }

    /// Fits the record so far, at most every ten ticks, for the plant's settling time.
    fn fit_settling(&mut self) {
        let rows = self.record.len();
        if rows < self.fitted_at + 10 {
            return;
        }
        self.fitted_at = rows;
        // At most a couple of thousand rows: this runs inside a tick, and the settling
        // time needs the shape of the response, not every sample.
        let every = rows.div_ceil(FIT_ROWS).max(1);
        let thinned;
        let record = if every == 1 {
            &self.record
        } else {
            thinned = Record {
                t_s: self.record.t_s.iter().step_by(every).copied().collect(),
                u: self.record.u.iter().step_by(every).copied().collect(),
                y: self.record.y.iter().step_by(every).copied().collect(),
            };
            &thinned
        };
        let needed = match crate::tune::fit::fit(record) {
            Ok(f) => Some(f.dead_time_s + 4.0 * f.lag_s),
            Err(crate::tune::FitError::TooShort { needed_s, .. }) => Some(needed_s),
            Err(_) => None,
        };
        if let Some(needed) = needed.filter(|n| n.is_finite()) {
            self.settling_s = Some(needed);
        }
    }

    /// Whether the objective has stopped moving on the level with these samples.
    fn still(&self, samples: &[f64]) -> bool {
        let n = samples.len();
        let Some((baseline_mean, sigma)) = self.baseline else {
            // The baseline: long enough to measure the noise.
            return n >= BASELINE_TICKS;
        };
        if n < MIN_HOLD_TICKS {
            return false;
        }
        let first_step = self.levels.len() == 1;
        let mean = |s: &[f64]| s.iter().sum::<f64>() / s.len() as f64;
        let (middle, last) = (&samples[n / 3..2 * n / 3], &samples[2 * n / 3..]);
        let (m_mid, m_last) = (mean(middle), mean(last));
        // The first step: its response must show before the level can count as settled.
        if first_step && (m_last - baseline_mean).abs() <= VISIBLE_SIGMAS * sigma {
            return false;
        }
        let previous = self.levels.last().and_then(|l| l.settled_objective).unwrap_or(baseline_mean);
        let noise = SETTLED_SIGMAS * sigma * (1.0 / middle.len() as f64 + 1.0 / last.len() as f64).sqrt();
        (m_last - m_mid).abs() <= noise.max(SETTLED_FRACTION * (m_last - previous).abs())
    }

    fn end_level(&mut self, since_s: f64, now_s: f64, samples: &[f64], settled: bool) {
        let n = samples.len();
        let last = &samples[2 * n / 3..];
        let settled_objective = (!last.is_empty()).then(|| last.iter().sum::<f64>() / last.len() as f64);
        if self.baseline.is_none() {
            let mean = samples.iter().sum::<f64>() / n.max(1) as f64;
            let var = samples.iter().map(|j| (j - mean).powi(2)).sum::<f64>() / (n.max(2) - 1) as f64;
            self.baseline = Some((mean, var.sqrt()));
        }
        self.levels.push(Level {
            setpoint: self.targets[self.next],
            from_s: since_s,
            to_s: now_s,
            settled_objective,
            settled,
        });
        self.next += 1;
        self.phase = if self.next == self.targets.len() { Phase::Done } else { Phase::Ramping };
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Runs a staircase against a first-order plant with dead time (one tick = 1 s).
    fn run(lag: f64, dead_ticks: usize, settle_max_s: f64) -> Staircase {
        let mut s = Staircase::new(0, 2.0, 0.5, 0.1, 1.0, settle_max_s, 0.0);
        let mut x = 2.0;
        let mut queue = std::collections::VecDeque::from(vec![2.0; dead_ticks]);
        let mut noise = 0.0f64;
        for k in 0..100_000 {
            let j = 10.0 - (x - 1.5f64).powi(2) + 0.01 * noise.sin();
            noise += 1.7;
            let Some(u) = s.tick(k as f64, Some(j)) else { break };
            queue.push_back(u);
            let delayed = queue.pop_front().unwrap();
            x = delayed + (x - delayed) * (-1.0 / lag).exp();
        }
        s
    }

    #[test]
    fn the_staircase_visits_its_four_levels_at_the_rate_limit_and_ends_at_u0() {
        let s = run(5.0, 3, 10_000.0);
        assert!(s.is_done());
        let setpoints: Vec<f64> = s.levels().iter().map(|l| l.setpoint).collect();
        assert_eq!(setpoints, vec![2.0, 2.5, 1.5, 2.0]);
        assert!(s.levels().iter().all(|l| l.settled), "{:?}", s.levels());
        let u = &s.record().u;
        assert!(u.windows(2).all(|w| (w[1] - w[0]).abs() <= 0.1 + 1e-12), "ramps at 0.1 per tick");
        assert_eq!(*u.last().unwrap(), 2.0);
    }

    #[test]
    fn a_level_is_held_until_the_plant_has_settled_not_only_past_its_dead_time() {
        let s = run(20.0, 15, 10_000.0);
        // Source: a first-order step response is within 2% after L + 3.9 T (common
        // practice); the staircase holds L + 4 T as fitted, give or take the fit's error.
        for step in &s.levels()[1..] {
            assert!(step.to_s - step.from_s >= 0.9 * (15.0 + 4.0 * 20.0), "{step:?}");
            assert!(step.settled, "{step:?}");
        }
    }

    #[test]
    fn a_level_that_does_not_settle_ends_at_settle_max_s() {
        let s = run(1e6, 0, 120.0);
        assert!(s.is_done());
        assert!(!s.levels()[1].settled);
        assert!((s.levels()[1].to_s - s.levels()[1].from_s - 120.0).abs() < 1.0 + 1e-9);
    }
}
