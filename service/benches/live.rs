//! Live loops at scale: N loops against simulated PLCs over loopback Modbus/TCP,
//! reporting ticks per second, skipped ticks, tick lateness, the CPU the loops use, the
//! connections they hold and the memory they take.
//!
//! Run with `cargo bench -p ridgeline --bench live`: 100 loops at 10 Hz, ten to a PLC
//! and its link, measured for 30 s. `-- LOOPS SECONDS [--loops-per-plc N] [--hz F]`
//! changes them; `--loops-per-plc 1` gives every loop a PLC and a connection of its own,
//! as at a site of many small PLCs (`-- 10000 60 --loops-per-plc 1 --hz 1`).
//!
//! The simulated PLCs run in child processes (this program again, with `--serve-plcs`),
//! so this process holds only the loops and their links: its sockets, memory and CPU
//! are the loops' own, and each process keeps within its open-file limit.

use std::collections::HashSet;
use std::io::{BufRead, BufReader, Read, Write};
use std::process::{Child, ChildStdin, Command, Stdio};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use clap::Parser;
use ridgeline::field::Links;
use ridgeline::supervisor::{LoopHandle, LoopTask, OnTick, Reporting, schedule};
use tokio_util::sync::CancellationToken;

mod scale;
use scale::{Layout, percentile, start_plcs};

/// Simulated PLCs per child process at most: each holds a listening socket and a
/// connection, so a process of them needs about twice as many files (fewer PLCs to a
/// process where the open-file limit is lower).
const PLCS_PER_PROCESS: usize = 5_000;

/// Live loops at scale against simulated PLCs.
#[derive(Parser)]
struct Args {
    /// Loops to run.
    #[arg(default_value_t = 100)]
    loops: usize,
    /// Seconds to measure, after the start-up.
    #[arg(default_value_t = 30)]
    seconds: u64,
    /// Loops sharing one simulated PLC and its link (1: a PLC and a connection per loop).
    #[arg(long, default_value_t = Layout::default().loops_per_plc)]
    loops_per_plc: usize,
    /// Ticks per second of every loop.
    #[arg(long, default_value_t = Layout::default().hz)]
    hz: f64,
    /// Passed by `cargo bench`.
    #[arg(long, hide = true)]
    bench: bool,
    /// Serve this many simulated PLCs, print their ports on one line, and serve until
    /// standard input closes (what a child process of this benchmark does).
    #[arg(long, hide = true)]
    serve_plcs: Option<usize>,
}

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

    fn phase(&self) -> f64 {
        self.task.phase()
    }

    async fn on_tick(&mut self, n: u64) {
        let started = Instant::now();
        self.task.tick(n).await;
        self.durations.lock().unwrap().push(started.elapsed());
    }
}

/// CPU seconds (user and system) in a `/proc/.../stat` file's text.
fn stat_cpu_s(stat: &str) -> f64 {
    let ticks_per_s = 100.0; // USER_HZ on Linux
    // Fields after the command name, which is in parentheses: utime is the 12th, stime the 13th.
    let after = stat.rsplit_once(") ").map_or("", |(_, rest)| rest);
    let fields: Vec<&str> = after.split_whitespace().collect();
    let utime: f64 = fields.get(11).and_then(|v| v.parse().ok()).unwrap_or(0.0);
    let stime: f64 = fields.get(12).and_then(|v| v.parse().ok()).unwrap_or(0.0);
    (utime + stime) / ticks_per_s
}

/// CPU seconds used by this process's threads whose name starts with `prefix`.
fn thread_cpu_s(prefix: &str) -> f64 {
    let mut total = 0.0;
    for entry in std::fs::read_dir("/proc/self/task").into_iter().flatten().flatten() {
        let comm = std::fs::read_to_string(entry.path().join("comm")).unwrap_or_default();
        if comm.starts_with(prefix) {
            total += stat_cpu_s(&std::fs::read_to_string(entry.path().join("stat")).unwrap_or_default());
        }
    }
    total
}

/// Connections this process holds open to the simulated PLCs: established TCP sockets
/// among its open files whose far end is one of `ports` (Linux's `/proc/net/tcp`).
fn connections_to(ports: &HashSet<u16>) -> usize {
    let sockets: HashSet<String> = std::fs::read_dir("/proc/self/fd")
        .into_iter()
        .flatten()
        .flatten()
        .filter_map(|e| {
            let target = std::fs::read_link(e.path()).ok()?.to_string_lossy().into_owned();
            Some(target.strip_prefix("socket:[")?.strip_suffix(']')?.to_owned())
        })
        .collect();
    let mut open = 0;
    for table in ["/proc/self/net/tcp", "/proc/self/net/tcp6"] {
        for line in std::fs::read_to_string(table).unwrap_or_default().lines().skip(1) {
            // sl, local address, remote address, state (01 is established), ..., inode (10th).
            let fields: Vec<&str> = line.split_whitespace().collect();
            let remote_port = fields
                .get(2)
                .and_then(|r| r.rsplit_once(':'))
                .and_then(|(_, port)| u16::from_str_radix(port, 16).ok());
            if fields.get(3) == Some(&"01")
                && fields.get(9).is_some_and(|inode| sockets.contains(*inode))
                && remote_port.is_some_and(|p| ports.contains(&p))
            {
                open += 1;
            }
        }
    }
    open
}

/// [`connections_to`] off the loops' threads: the kernel takes a while to list
/// thousands of sockets.
async fn count_connections(ports: &Arc<HashSet<u16>>) -> anyhow::Result<usize> {
    let ports = ports.clone();
    Ok(tokio::task::spawn_blocking(move || connections_to(&ports)).await?)
}

/// This process's resident memory in MiB.
fn resident_mib() -> f64 {
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    let kib = status
        .lines()
        .find_map(|l| l.strip_prefix("VmRSS:"))
        .and_then(|v| v.split_whitespace().next()?.parse::<f64>().ok())
        .unwrap_or(0.0);
    kib / 1024.0
}

/// Skipped ticks so far, from every loop's published status.
fn skipped(handles: &[LoopHandle]) -> u64 {
    handles.iter().map(|h| h.status.borrow().skipped_ticks).sum()
}

/// The simulated PLCs, served by child processes of this program.
struct Simulators {
    children: Vec<(Child, Option<ChildStdin>)>,
    ports: Vec<u16>,
}

impl Simulators {
    fn start(layout: &Layout, plcs: usize, per_process: usize) -> anyhow::Result<Self> {
        let exe = std::env::current_exe()?;
        let mut sims = Simulators { children: Vec::new(), ports: Vec::with_capacity(plcs) };
        let mut left = plcs;
        while left > 0 {
            let here = left.min(per_process);
            left -= here;
            let mut child = Command::new(&exe)
                .args(["--serve-plcs", &here.to_string()])
                .args(["--loops-per-plc", &layout.loops_per_plc.to_string(), "--hz", &layout.hz.to_string()])
                .stdin(Stdio::piped())
                .stdout(Stdio::piped())
                .spawn()?;
            let stdin = child.stdin.take();
            let stdout = child.stdout.take();
            sims.children.push((child, stdin));
            let mut line = String::new();
            BufReader::new(stdout.ok_or_else(|| anyhow::anyhow!("no pipe from a simulator process"))?)
                .read_line(&mut line)?;
            let ports: Vec<u16> = line.split_whitespace().filter_map(|p| p.parse().ok()).collect();
            anyhow::ensure!(
                ports.len() == here,
                "a simulator process listed {} ports of {here}",
                ports.len()
            );
            sims.ports.extend(ports);
        }
        Ok(sims)
    }

    /// CPU seconds the simulator processes have used.
    fn cpu_s(&self) -> f64 {
        let stat = |c: &Child| std::fs::read_to_string(format!("/proc/{}/stat", c.id())).unwrap_or_default();
        self.children.iter().map(|(c, _)| stat_cpu_s(&stat(c))).sum()
    }
}

impl Drop for Simulators {
    /// Closing a child's standard input stops it; one that lingers is killed.
    fn drop(&mut self) {
        for (_, stdin) in &mut self.children {
            stdin.take();
        }
        let deadline = Instant::now() + Duration::from_secs(10);
        for (child, _) in &mut self.children {
            while child.try_wait().ok().flatten().is_none() && Instant::now() < deadline {
                std::thread::sleep(Duration::from_millis(50));
            }
            if child.try_wait().ok().flatten().is_none() {
                let _ = child.kill();
                let _ = child.wait();
            }
        }
    }
}

/// A child process's work: serve `plcs` simulated PLCs until standard input closes.
fn serve_plcs(layout: &Layout, plcs: usize) -> anyhow::Result<()> {
    let stop = CancellationToken::new();
    let (runtime, ports) = start_plcs(layout, plcs, &stop)?;
    let line: Vec<String> = ports.iter().map(u16::to_string).collect();
    let mut out = std::io::stdout().lock();
    writeln!(out, "{}", line.join(" "))?;
    out.flush()?;
    let _ = std::io::stdin().read_to_end(&mut Vec::new());
    stop.cancel();
    runtime.shutdown_timeout(Duration::from_secs(2));
    Ok(())
}

fn main() -> anyhow::Result<()> {
    let args = Args::parse();
    anyhow::ensure!(args.hz.is_finite() && args.hz > 0.0, "--hz must be a positive number, not {}", args.hz);
    anyhow::ensure!(args.loops > 0 && args.seconds > 0, "LOOPS and SECONDS must be at least 1");
    let layout = Layout { loops_per_plc: args.loops_per_plc, hz: args.hz };
    let limit = ridgeline::open_files::raise()?;
    if let Some(plcs) = args.serve_plcs {
        return serve_plcs(&layout, plcs);
    }
    let plcs = args.loops.div_ceil(layout.loops_per_plc);
    let needed = plcs as u64 + ridgeline::open_files::BESIDES_LINKS;
    anyhow::ensure!(
        limit.now.is_none_or(|n| n >= needed),
        "{plcs} links need about {needed} open files, and the limit is {:?} (ulimit -Hn)",
        limit.now
    );
    let per_process = limit
        .now
        .map_or(PLCS_PER_PROCESS, |n| (n.saturating_sub(64) / 2) as usize)
        .clamp(1, PLCS_PER_PROCESS);
    let sims = Simulators::start(&layout, plcs, per_process)?;
    let plc_ports: Arc<HashSet<u16>> = Arc::new(sims.ports.iter().copied().collect());
    let parsing = Instant::now();
    let config = ridgeline::config::parse(&layout.config_text(&sims.ports), "bench-config")
        .map_err(|p| anyhow::anyhow!("{p}"))?;
    let parsing = parsing.elapsed();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .thread_name("loops")
        .enable_all()
        .build()?;
    let tick = Duration::from_secs_f64(1.0 / layout.hz);
    // Every loop connects on its first tick, within a second of the start; measure once
    // every link has connected (or a minute has passed) and three more ticks have gone by.
    let settle = Duration::from_secs(2).max(3 * tick);
    let lateness = Arc::new(Mutex::new(Vec::new()));
    let durations = Arc::new(Mutex::new(Vec::new()));
    let cancel = CancellationToken::new();
    let resident_before = resident_mib();
    runtime.block_on(async {
        // As the service does: every loop's task first, then all of them started.
        let building = Instant::now();
        let links = Links::new(&config, &Reporting::default())?;
        let mut ready = Vec::new();
        let mut handles = Vec::new();
        for index in 0..args.loops.min(config.loops.len()) {
            let (task, handle) = LoopTask::new(&config, index, &links, Reporting::default(), None);
            ready.push(task);
            handles.push(handle);
        }
        let loops = handles.len();
        let building = building.elapsed();
        let mut tasks = Vec::new();
        for task in ready {
            let mut timed = Timed { task, durations: durations.clone() };
            let (late, cancel) = (lateness.clone(), cancel.clone());
            tasks.push(tokio::spawn(async move {
                schedule(tick, &cancel, |d| late.lock().unwrap().push(d), &mut timed).await;
            }));
        }
        let started = Instant::now();
        while count_connections(&plc_ports).await? < plcs && started.elapsed() < Duration::from_secs(60) {
            tokio::time::sleep(Duration::from_millis(500)).await;
        }
        let connected = started.elapsed();
        tokio::time::sleep(settle).await;
        let connections_start = count_connections(&plc_ports).await?;
        let resident = resident_mib();
        // Measure from a clean slate.
        lateness.lock().unwrap().clear();
        durations.lock().unwrap().clear();
        let skipped_start = skipped(&handles);
        let (cpu_loops, cpu_sims, wall) = (thread_cpu_s("loops"), sims.cpu_s(), Instant::now());
        tokio::time::sleep(Duration::from_secs(args.seconds)).await;
        let (cpu_loops, cpu_sims, wall) =
            (thread_cpu_s("loops") - cpu_loops, sims.cpu_s() - cpu_sims, wall.elapsed().as_secs_f64());
        let skipped = skipped(&handles) - skipped_start;
        let mut late = std::mem::take(&mut *lateness.lock().unwrap());
        let mut took = std::mem::take(&mut *durations.lock().unwrap());
        let connections_end = count_connections(&plc_ports).await?;
        let mut states: Vec<(&str, usize)> = Vec::new();
        for h in &handles {
            let state = h.status.borrow().state;
            match states.iter_mut().find(|(s, _)| *s == state) {
                Some((_, n)) => *n += 1,
                None => states.push((state, 1)),
            }
        }
        cancel.cancel();
        for t in tasks {
            let _ = t.await;
        }
        late.sort();
        took.sort();
        let ticks = took.len() as f64;
        let states: Vec<String> = states.iter().map(|(s, n)| format!("{n} {s}")).collect();
        println!(
            "{loops} loops at {} Hz, {} to a simulated PLC, over loopback Modbus/TCP; {} s measured",
            layout.hz, layout.loops_per_plc, args.seconds
        );
        println!(
            "  start-up              config read and checked in {parsing:.2?}, links and loops set up in {building:.2?}, \
             every link connected within {connected:.1?} of the start (measured from {settle:?} later)"
        );
        println!("  connections           {plcs} links; {connections_start} connections open at the start, {connections_end} at the end");
        println!(
            "  ticks per second      {:.0} (of {:.0} scheduled); skipped ticks {skipped}; loops at the end: {}",
            ticks / wall,
            loops as f64 * layout.hz,
            states.join(", ")
        );
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
        println!(
            "  resident memory       {resident:.1} MiB with every loop running ({resident_before:.1} MiB before; {:.1} KiB per loop)",
            1024.0 * (resident - resident_before) / loops as f64
        );
        println!("  CPU, simulated PLCs   {:.1}% of one core, in other processes (not Ridgeline's share)", 100.0 * cpu_sims / wall);
        anyhow::Ok(())
    })?;
    drop(sims);
    Ok(())
}
