//! What the soak keeps while it runs: each input's bounds over time, and the resource
//! use of each life of the service.

use std::time::Instant;

/// A (min, max) pair: bounds or limits.
pub type Range = (f64, f64);

/// The operating bounds of one input over time, as the API set them.
pub struct BoundsHistory {
    eras: Vec<Era>,
}

/// Bounds asked for at `from`; until `settled` the previous ones may still show.
struct Era {
    from: Instant,
    bounds: Range,
    previous: Range,
    settled: Instant,
}

impl BoundsHistory {
    /// The config's bounds, in force from `at`.
    pub fn new(at: Instant, bounds: Range) -> Self {
        BoundsHistory { eras: vec![Era { from: at, bounds, previous: bounds, settled: at }] }
    }

    pub fn current(&self) -> Range {
        self.eras.last().map_or((f64::NAN, f64::NAN), |e| e.bounds)
    }

    /// New bounds asked for at `from`, in force for certain from `settled`.
    pub fn change(&mut self, from: Instant, bounds: Range, settled: Instant) {
        let previous = self.current();
        self.eras.push(Era { from, bounds, previous, settled });
    }

    pub fn allows(&self, at: Instant, value: f64) -> bool {
        let inside = |(min, max): Range| value >= min && value <= max;
        let era = self.eras.iter().rev().find(|e| e.from <= at).or(self.eras.first());
        era.is_some_and(|e| inside(e.bounds) || (at <= e.settled && inside(e.previous)))
    }
}

/// Resource use of one Ridgeline process, sampled.
pub struct Life {
    pub pid: u32,
    pub started: Instant,
    /// (when, resident KiB, open file descriptors, threads)
    pub samples: Vec<(Instant, u64, u64, u64)>,
    pub how_it_ended: String,
}

pub fn sample_process(pid: u32) -> Option<(u64, u64, u64)> {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let field = |name: &str| {
        status
            .lines()
            .find_map(|l| l.strip_prefix(name))
            .and_then(|rest| rest.split_whitespace().next())
            .and_then(|v| v.parse::<u64>().ok())
    };
    let fds = std::fs::read_dir(format!("/proc/{pid}/fd")).ok()?.count() as u64;
    Some((field("VmRSS:")?, fds, field("Threads:")?))
}

/// Median of the samples of `life` within `[from, to]`: (resident KiB, fds).
pub fn median_between(life: &Life, from: Instant, to: Instant) -> Option<(u64, u64)> {
    let mut rss: Vec<u64> = life.samples.iter().filter(|s| s.0 >= from && s.0 <= to).map(|s| s.1).collect();
    let mut fds: Vec<u64> = life.samples.iter().filter(|s| s.0 >= from && s.0 <= to).map(|s| s.2).collect();
    if rss.is_empty() {
        return None;
    }
    rss.sort_unstable();
    fds.sort_unstable();
    Some((rss[rss.len() / 2], fds[fds.len() / 2]))
}
