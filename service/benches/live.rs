//! Live loops at scale: N loops at 10 Hz against simulated PLCs over loopback Modbus/TCP,
//! reporting ticks per second, tick lateness and the CPU the loops use.
//!
//! Run with `cargo bench -p ridgeline --bench live` (`-- LOOPS SECONDS` to change the
//! defaults of 100 loops for 30 s). The simulators run on a runtime of their own so
//! their CPU is measured apart from the loops'.

use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use ridgeline::field::Links;
use ridgeline::supervisor::{LoopTask, OnTick, Reporting, schedule};
use tokio_util::sync::CancellationToken;

mod scale;
use scale::{LOOPS_PER_PLC, TICK_S, config_text, percentile, start_plcs};

/// A loop's tick, timed.
struct Timed {
    task: LoopTask,
    durations: Arc<Mutex<Vec<Duration>>>,
}

impl OnTick for Timed {
    type Command = <LoopTask as OnTick>::Command;

    async fn next_command(&mut self) -> Self::Command {
        self.task.next_command().await
    }

    async fn on_command(&mut self, command: Self::Command) {
        self.task.on_command(command).await
    }

    async fn on_tick(&mut self, n: u64) {
        let started = Instant::now();
        self.task.tick(n).await;
        self.durations.lock().unwrap().push(started.elapsed());
    }
}

/// CPU seconds used by this process's threads whose name starts with `prefix`.
fn thread_cpu_s(prefix: &str) -> f64 {
    let ticks_per_s = 100.0; // USER_HZ on Linux
    let mut total = 0.0;
    for entry in std::fs::read_dir("/proc/self/task").into_iter().flatten().flatten() {
        let comm = std::fs::read_to_string(entry.path().join("comm")).unwrap_or_default();
        if !comm.starts_with(prefix) {
            continue;
        }
        let stat = std::fs::read_to_string(entry.path().join("stat")).unwrap_or_default();
        // Fields after the command name, which is in parentheses: utime is the 12th, stime the 13th.
        let after = stat.rsplit_once(") ").map_or("", |(_, rest)| rest);
        let fields: Vec<&str> = after.split_whitespace().collect();
        let utime: f64 = fields.get(11).and_then(|v| v.parse().ok()).unwrap_or(0.0);
        let stime: f64 = fields.get(12).and_then(|v| v.parse().ok()).unwrap_or(0.0);
        total += (utime + stime) / ticks_per_s;
    }
    total
}

fn main() -> anyhow::Result<()> {
    // `cargo bench` passes `--bench`; numbers after it are ours.
    let numbers: Vec<u64> = std::env::args().skip(1).filter_map(|a| a.parse().ok()).collect();
    let loops = numbers.first().copied().unwrap_or(100) as usize;
    let seconds = numbers.get(1).copied().unwrap_or(30);
    let plcs = loops.div_ceil(LOOPS_PER_PLC);

    let stop_sims = CancellationToken::new();
    let (_sims, ports) = start_plcs(plcs, &stop_sims)?;

    let config =
        ridgeline::config::parse(&config_text(&ports), "bench-config").map_err(|p| anyhow::anyhow!("{p}"))?;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .thread_name("loops")
        .enable_all()
        .build()?;
    let lateness = Arc::new(Mutex::new(Vec::new()));
    let durations = Arc::new(Mutex::new(Vec::new()));
    let cancel = CancellationToken::new();
    let skipped = Arc::new(Mutex::new(0u64));
    runtime.block_on(async {
        let links = Links::new(&config, &Reporting::default())?;
        let mut handles = Vec::new();
        for index in 0..loops.min(config.loops.len()) {
            let (task, _handle) = LoopTask::new(&config, index, &links, Reporting::default(), None);
            let mut timed = Timed { task, durations: durations.clone() };
            let (late, cancel, skipped) = (lateness.clone(), cancel.clone(), skipped.clone());
            handles.push(tokio::spawn(async move {
                schedule(Duration::from_secs_f64(TICK_S), &cancel, |d| late.lock().unwrap().push(d), &mut timed).await;
                *skipped.lock().unwrap() += timed.task.skipped_ticks();
            }));
        }
        // Let every loop connect and start, then measure from a clean slate.
        tokio::time::sleep(Duration::from_secs(2)).await;
        lateness.lock().unwrap().clear();
        durations.lock().unwrap().clear();
        let (cpu_loops, cpu_sims, wall) = (thread_cpu_s("loops"), thread_cpu_s("plant-sim"), Instant::now());
        tokio::time::sleep(Duration::from_secs(seconds)).await;
        let (cpu_loops, cpu_sims, wall) =
            (thread_cpu_s("loops") - cpu_loops, thread_cpu_s("plant-sim") - cpu_sims, wall.elapsed().as_secs_f64());
        let mut late = lateness.lock().unwrap().clone();
        let mut took = durations.lock().unwrap().clone();
        cancel.cancel();
        for h in handles {
            let _ = h.await;
        }
        late.sort();
        took.sort();
        let ticks = took.len() as f64;
        println!("{loops} loops at {} Hz against {plcs} simulated PLCs over loopback Modbus/TCP, {seconds} s measured", 1.0 / TICK_S);
        println!("  ticks per second      {:.0} (of {:.0} scheduled); skipped ticks {}", ticks / wall, loops as f64 / TICK_S, skipped.lock().unwrap());
        println!(
            "  tick lateness         p50 {:?}  p99 {:?}  max {:?}",
            percentile(&late, 0.5),
            percentile(&late, 0.99),
            late.last().copied().unwrap_or_default()
        );
        println!("  tick duration         p50 {:?}  p99 {:?} (read, decide, write)", percentile(&took, 0.5), percentile(&took, 0.99));
        println!(
            "  CPU, loops            {:.1}% of one core, {:.0} us per tick",
            100.0 * cpu_loops / wall,
            1e6 * cpu_loops / ticks.max(1.0)
        );
        println!("  CPU, simulated PLCs   {:.1}% of one core (not Ridgeline's share)", 100.0 * cpu_sims / wall);
        anyhow::Ok(())
    })?;
    stop_sims.cancel();
    Ok(())
}
