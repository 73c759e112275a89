//! The trend route's reads, as the route makes them: one loop's history into 300 buckets
//! over the status page's windows (1 h and 24 h at 10 Hz) and over 30 days and a year at
//! 1 Hz, each from the resolution the route picks (raw samples, one-minute or one-hour
//! rollups), and 30 days from one-minute rollups for comparison.
//!
//! Run with `cargo bench -p ridgeline --bench trend` (`-- ROUNDS` to change the default
//! of 5). Targets: 24 h under 50 ms (issue 12), 30 days from rollups under 20 ms (issue
//! 14). The samples are written and rolled up through the service's own writer into a
//! fresh file first (not timed).

use std::sync::Arc;
use std::time::Instant;

use anyhow::Context;
use ridgeline::history::{
    History, InputSample, MAX_BATCH_SAMPLES, Resolution, Retention, SampleRecord, WriterSettings,
};
use tokio_util::sync::CancellationToken;

const POINTS: i64 = 300;
const HOUR_MS: i64 = 3_600_000;
const DAY_MS: i64 = 24 * HOUR_MS;

fn main() -> anyhow::Result<()> {
    let rounds: usize = std::env::args()
        .skip(1)
        .find(|a| !a.starts_with('-'))
        .map_or(Ok(5), |n| n.parse())
        .context("ROUNDS must be a whole number")?;
    let runtime = tokio::runtime::Builder::new_multi_thread().enable_all().build()?;
    runtime.block_on(bench(rounds.max(1)))
}

async fn bench(rounds: usize) -> anyhow::Result<()> {
    let dir = tempfile::tempdir()?;
    let keep = Retention { raw_days: 36_500, rollup_days: 36_500 };
    let history = History::open(&dir.path().join("trend.db"), keep).await?;
    let now_ms = ridgeline::history::now_ms() / HOUR_MS * HOUR_MS;
    // One loop at 1 Hz for a year and one at 10 Hz for a day, both ending now.
    let slow = write(&history, "boiler-1-o2-trim", now_ms - 365 * DAY_MS, 1000, 365 * 86_400, now_ms).await?;
    let fast = write(&history, "dryer-3-inlet", now_ms - DAY_MS, 100, 864_000, now_ms).await?;
    println!(
        "trend: one loop into {POINTS} buckets ({slow} samples at 1 Hz over a year, {fast} at 10 Hz over a day)"
    );
    let cases = [
        ("dryer-3-inlet", "1 h at 10 Hz", HOUR_MS, None),
        ("dryer-3-inlet", "24 h at 10 Hz", DAY_MS, None),
        ("boiler-1-o2-trim", "30 days at 1 Hz", 30 * DAY_MS, None),
        ("boiler-1-o2-trim", "30 days at 1 Hz, from 1-minute rollups", 30 * DAY_MS, Some(Resolution::Minute)),
        ("boiler-1-o2-trim", "365 days at 1 Hz", 365 * DAY_MS, None),
    ];
    let inputs = vec!["setpoint".to_owned()];
    let mut best = Vec::new();
    for (loop_name, what, window_ms, forced) in cases {
        // As the route: buckets aligned to their width, the last one holding now.
        let bucket_ms = (window_ms + POINTS - 1) / POINTS;
        let until_ms = (now_ms / bucket_ms + 1) * bucket_ms;
        let since_ms = until_ms - bucket_ms * POINTS;
        let resolution = forced
            .unwrap_or_else(|| Resolution::for_trend(bucket_ms, since_ms, history.raw_kept_from_ms(now_ms)));
        let mut fastest = f64::MAX;
        for _ in 0..rounds {
            let started = Instant::now();
            let buckets =
                history.trend(loop_name, &inputs, since_ms, until_ms, bucket_ms, resolution).await?;
            fastest = fastest.min(started.elapsed().as_secs_f64() * 1000.0);
            anyhow::ensure!(buckets.len() as i64 >= POINTS - 2, "{what}: only {} buckets", buckets.len());
        }
        println!("  {what:<40} {:>4} {fastest:>8.1} ms (best of {rounds})", resolution.as_str());
        best.push((what, fastest));
    }
    let verdict = |met: bool| if met { "met" } else { "MISSED" };
    let ms = |what: &str| best.iter().find(|(w, _)| *w == what).map_or(f64::MAX, |(_, ms)| *ms);
    println!("  24 h under 50 ms: {}", verdict(ms("24 h at 10 Hz") < 50.0));
    println!("  30 days from rollups under 20 ms: {}", verdict(ms("30 days at 1 Hz") < 20.0));
    Ok(())
}

/// `n` samples of one loop every `tick_ms` from `start_ms`, written and rolled up through
/// the writer as the service runs it.
async fn write(
    history: &History,
    loop_name: &str,
    start_ms: i64,
    tick_ms: i64,
    n: usize,
    now_ms: i64,
) -> anyhow::Result<usize> {
    let settings = WriterSettings { queue_capacity: 200_000, disk_free_floor_bytes: 0 };
    let (sender, mut writer) = history.writer(settings, None);
    let loop_name: Arc<str> = Arc::from(loop_name);
    let input: Arc<str> = Arc::from("setpoint");
    for chunk in (0..n).collect::<Vec<_>>().chunks(100_000) {
        for &k in chunk {
            let phase = k as f64 * 0.0157;
            sender.sample(SampleRecord {
                loop_name: loop_name.clone(),
                tick: k as u64,
                at_ms: start_ms + k as i64 * tick_ms,
                objective: Some(85.2 + 0.013 * phase.cos()),
                state: "seeking".into(),
                inputs: vec![InputSample {
                    name: input.clone(),
                    applied: 2.5 + 0.05 * phase.sin(),
                    estimate: 2.5,
                    gradient: -0.02,
                }],
                phase: None,
                constraints: Vec::new(),
                resumable: false,
            });
        }
        for _ in 0..chunk.len().div_ceil(MAX_BATCH_SAMPLES) {
            writer.step().await.context("the writer stopped")??;
        }
    }
    while writer.roll_up_step(now_ms).await? {}
    let cancel = CancellationToken::new();
    cancel.cancel();
    writer.run(cancel).await;
    Ok(n)
}
