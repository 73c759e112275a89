//! The trend route's query: 24 h of one loop at 10 Hz (864,000 samples, one input) into
//! 300 buckets, reduced by SQLite from the samples table as the service stores it.
//!
//! Run with `cargo bench -p ridgeline --bench trend` (`-- ROUNDS` to change the default
//! of 5). Target (issue 12): under 50 ms on the project's machine. The samples are written
//! through the service's own writer into a fresh file first (not timed).

use std::sync::Arc;
use std::time::Instant;

use anyhow::Context;
use ridgeline::history::{History, InputSample, SampleRecord, WriterSettings};
use tokio_util::sync::CancellationToken;

const TICK_MS: i64 = 100;
const SAMPLES: usize = 864_000;
const POINTS: i64 = 300;

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
    let history = History::open(&dir.path().join("trend.db")).await?;
    let (sender, writer) =
        history.writer(WriterSettings { queue_capacity: 2 * SAMPLES, retention_days: 36_500 }, None);
    let cancel = CancellationToken::new();
    let task = tokio::spawn(writer.run(cancel.clone()));
    let loop_name: Arc<str> = Arc::from("boiler-1-o2-trim");
    let input: Arc<str> = Arc::from("o2_setpoint_pct");
    let start_ms = 1_700_000_000_000;
    for k in 0..SAMPLES {
        let phase = k as f64 * 0.0157;
        sender.sample(SampleRecord {
            loop_name: loop_name.clone(),
            tick: k as u64,
            at_ms: start_ms + k as i64 * TICK_MS,
            objective: Some(85.2 + 0.013 * phase.cos()),
            state: "seeking",
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
    cancel.cancel();
    task.await?;
    let until_ms = start_ms + SAMPLES as i64 * TICK_MS;
    let bucket_ms = (until_ms - start_ms) / POINTS;
    println!("trend: {SAMPLES} samples of one loop (24 h at 10 Hz, one input) into {POINTS} buckets");
    let inputs = vec![input.to_string()];
    let mut best = f64::MAX;
    for round in 1..=rounds {
        let started = Instant::now();
        let buckets = history.trend(&loop_name, &inputs, start_ms, until_ms, bucket_ms).await?;
        let ms = started.elapsed().as_secs_f64() * 1000.0;
        anyhow::ensure!(buckets.len() == POINTS as usize, "{} buckets", buckets.len());
        anyhow::ensure!(
            buckets.iter().map(|b| b.samples).sum::<i64>() == SAMPLES as i64,
            "samples went missing"
        );
        println!("  round {round}: {ms:.1} ms");
        best = best.min(ms);
    }
    println!("best of {rounds}: {best:.1} ms (target: under 50 ms)");
    Ok(())
}
