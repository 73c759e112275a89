//! `ridgeline tune` on a 24 h record at 1 s (86,400 rows): reading the CSV, the fit, the
//! recommendation and the proving rehearsal, end to end through the library calls the
//! command makes.
//!
//! Run with `cargo bench -p ridgeline --bench tune` (`-- ROUNDS` to change the default of
//! 5 rounds). Target (issue 9): under 1 s on the 2-core machine. The record is a staircase
//! 2.5, 2.9, 2.1, 2.5 (6 h each) through a lag of 40 s and a dead time of 12 s, then
//! `J = 7 - 2 (x - 2.3)^2` with Gaussian noise of 0.03 (seeded).

use std::fmt::Write;
use std::time::Instant;

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use ridgeline::tune::{self, Request};

fn record_csv() -> String {
    let (mut t, mut u) = (Vec::new(), Vec::new());
    for (level, k) in [2.5, 2.9, 2.1, 2.5].iter().flat_map(|&l| std::iter::repeat_n(l, 6 * 3600)).zip(0..) {
        t.push(f64::from(k));
        u.push(level);
    }
    let mut x = vec![0.0; t.len()];
    tune::fit::lagged_input(&t, &u, 40.0, 12.0, &mut x);
    let mut rng = ChaCha8Rng::seed_from_u64(9);
    let mut csv = String::from("t_s,objective,u.applied\n");
    for ((t, u), x) in t.iter().zip(&u).zip(&x) {
        let j = 7.0 - 2.0 * (x - 2.3).powi(2) + 0.03 * rng.sample::<f64, _>(StandardNormal);
        let _ = writeln!(csv, "{t},{j},{u}");
    }
    csv
}

fn main() -> anyhow::Result<()> {
    let rounds: usize =
        std::env::args().skip(1).find(|a| !a.starts_with('-')).map(|a| a.parse()).transpose()?.unwrap_or(5);
    let csv = record_csv();
    let request = Request { input: "u".into(), ..Request::default() };
    let mut seconds = Vec::new();
    let mut last = None;
    for _ in 0..rounds {
        let started = Instant::now();
        let record = tune::read_csv(&csv, "u")?;
        let result = tune::tune(&record, &request)?;
        seconds.push(started.elapsed().as_secs_f64());
        last = Some((record.len(), result));
    }
    seconds.sort_by(f64::total_cmp);
    let (rows, result) = last.expect("at least one round");
    println!(
        "tune on {rows} rows (24 h at 1 s), fit + recommendation + proving rehearsal: median {:.3} s, \
         fastest {:.3} s, slowest {:.3} s over {rounds} rounds (target: under 1 s)",
        seconds[seconds.len() / 2],
        seconds[0],
        seconds[seconds.len() - 1]
    );
    println!(
        "  fitted lag {:.2} s, dead time {:.2} s, curvature {:.3}; predicted time constant {:.0} s, rehearsed {:.0} s",
        result.model.lag_s,
        result.model.dead_time_s,
        result.model.curvature,
        result.predicted.time_constant_s,
        result.rehearsed.time_constant_s.unwrap_or(f64::NAN)
    );
    Ok(())
}
