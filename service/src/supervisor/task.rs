//! The live loop: a [`LoopTask`] does one tick (read, decide, write, publish) when asked;
//! [`run`] only decides when to ask.

use std::sync::Arc;
use std::time::{Duration, SystemTime};

use tokio::sync::watch;
use tokio::time::{Instant, MissedTickBehavior};
use tokio_util::sync::CancellationToken;

use super::control::{Control, TickReport};
use super::status::{InputStatus, LoopStatus};
use crate::config::{Config, LoopConfig};
use crate::field::{LinkError, Links, LoopIo};

/// One loop bound to its links.
pub struct LoopTask {
    config: Arc<LoopConfig>,
    control: Control,
    io: LoopIo,
    values: Vec<f64>,
    status: watch::Sender<LoopStatus>,
    objective_at: Option<SystemTime>,
    last_tick: Option<u64>,
    skipped_ticks: u64,
    /// Whether the last write of each input failed, so each failure is logged once.
    write_failing: Vec<bool>,
    read_failing: bool,
}

impl LoopTask {
    /// The task for loop `index` of a validated config, and a receiver of its status.
    pub fn new(config: &Config, index: usize, links: &Links) -> (Self, watch::Receiver<LoopStatus>) {
        let loop_config = Arc::new(config.loops[index].clone());
        let control = Control::new(&loop_config);
        let io = LoopIo::new(config, links, index, control.objective_names());
        let (status, receiver) = watch::channel(LoopStatus::initial(&loop_config));
        let task = LoopTask {
            values: vec![f64::NAN; control.objective_names().len()],
            write_failing: vec![false; loop_config.inputs.len()],
            config: loop_config,
            control,
            io,
            status,
            objective_at: None,
            last_tick: None,
            skipped_ticks: 0,
            read_failing: false,
        };
        (task, receiver)
    }

    pub fn name(&self) -> &str {
        &self.config.name
    }

    pub fn tick_s(&self) -> f64 {
        self.config.tick_s
    }

    /// Ticks that came too late after a stall and were skipped.
    pub fn skipped_ticks(&self) -> u64 {
        self.skipped_ticks
    }

    /// One tick at tick index `n`: start if not started, read the tags, let the control
    /// decide, write the setpoints, publish the status.
    pub async fn tick(&mut self, n: u64) -> TickReport {
        if let Some(last) = self.last_tick
            && n > last + 1
        {
            self.skipped_ticks += n - last - 1;
            tracing::debug!(r#loop = %self.config.name, skipped = n - last - 1, "late ticks skipped");
        }
        self.last_tick = Some(n);
        if !self.control.is_started() {
            self.try_start().await;
        }
        let read = self.io.read(&mut self.values).await;
        self.note_read(&read);
        let report = self.control.tick(n, read.is_ok().then_some(self.values.as_slice()));
        if read.is_ok() {
            self.objective_at = Some(SystemTime::now());
        }
        if report.write {
            self.write_applied().await;
        }
        self.publish();
        report
    }

    /// Starts from the setpoints in the PLC; waits for a later tick when they cannot be
    /// read, rather than writing anything without knowing where the process stands.
    async fn try_start(&mut self) {
        let mut read_back = Vec::with_capacity(self.config.inputs.len());
        for i in 0..self.config.inputs.len() {
            match self.io.read_back(i).await {
                Ok(v) => read_back.push(Some(v)),
                Err(e) => {
                    tracing::debug!(r#loop = %self.config.name, error = %e, "setpoints not readable yet; start waits");
                    return;
                }
            }
        }
        self.control.start(&read_back);
        let estimates: Vec<String> = self
            .config
            .inputs
            .iter()
            .zip(self.control.inputs())
            .zip(&read_back)
            .map(|((c, i), r)| format!("{}={} (read back {})", c.name, i.estimate, r.unwrap_or(f64::NAN)))
            .collect();
        tracing::info!(r#loop = %self.config.name, mode = %self.control.mode(), start = %estimates.join(", "), "loop started");
    }

    fn note_read(&mut self, read: &Result<(), LinkError>) {
        match read {
            Err(e) if !self.read_failing => {
                // A dead link is logged once by the link, not once more by every loop on it.
                if e.is_connection() {
                    tracing::debug!(r#loop = %self.config.name, error = %e, "cannot read the objective's tags");
                } else {
                    tracing::warn!(r#loop = %self.config.name, error = %e, "cannot read the objective's tags");
                }
                self.read_failing = true;
            }
            Ok(()) if self.read_failing => {
                tracing::info!(r#loop = %self.config.name, "reading the objective's tags again");
                self.read_failing = false;
            }
            _ => {}
        }
    }

    async fn write_applied(&mut self) {
        let applied: Vec<f64> = self.control.inputs().iter().map(|i| i.applied).collect();
        for (i, value) in applied.into_iter().enumerate() {
            self.write_input(i, value).await;
        }
    }

    async fn write_input(&mut self, i: usize, value: f64) {
        let result = self.io.write(i, value).await;
        let input = &self.config.inputs[i].name;
        match (&result, self.write_failing[i]) {
            (Err(e), false) if e.is_connection() => {
                tracing::debug!(r#loop = %self.config.name, input = %input, error = %e, "setpoint write failed")
            }
            (Err(e), false) => {
                tracing::warn!(r#loop = %self.config.name, input = %input, error = %e, "setpoint write failed")
            }
            (Ok(()), true) => {
                tracing::info!(r#loop = %self.config.name, input = %input, "setpoint writes work again")
            }
            _ => {}
        }
        self.write_failing[i] = result.is_err();
    }

    /// Writes the `on_shutdown` values of a loop that is writing; called once on stop.
    pub async fn shutdown(&mut self) {
        let Some(values) = self.control.shutdown_values() else { return };
        for (i, value) in values.into_iter().enumerate() {
            self.write_input(i, value).await;
        }
        tracing::info!(r#loop = %self.config.name, on_shutdown = %self.config.on_shutdown, "shutdown setpoints written");
    }

    fn publish(&self) {
        let c = &self.control;
        let inputs = self
            .config
            .inputs
            .iter()
            .zip(c.inputs())
            .map(|(cfg, i)| InputStatus {
                name: cfg.name.clone(),
                applied: i.applied,
                estimate: i.estimate,
                gradient: i.gradient,
                bounds: i.guard.bounds.into(),
                limits: cfg.limits.into(),
                safe: cfg.safe,
            })
            .collect();
        self.status.send_replace(LoopStatus {
            name: self.config.name.clone(),
            mode: c.mode().as_str(),
            state: c.state().as_str(),
            fallback_reason: None,
            direction: self.config.direction.as_str(),
            method: self.config.method.as_str(),
            permitted: true,
            objective: c.objective(),
            objective_at: self.objective_at.map(|t| humantime::format_rfc3339_millis(t).to_string()),
            ticks: c.ticks(),
            skipped_ticks: self.skipped_ticks,
            inputs,
        });
    }
}

/// Something done once per tick, given the tick index.
pub trait OnTick {
    fn on_tick(&mut self, n: u64) -> impl Future<Output = ()> + Send;
}

impl OnTick for LoopTask {
    async fn on_tick(&mut self, n: u64) {
        self.tick(n).await;
    }
}

/// Ticks a loop every `period` of wall time until cancelled, then writes its shutdown
/// values. `observe` hears how late each tick started.
pub async fn run(
    mut task: LoopTask,
    period: Duration,
    cancel: CancellationToken,
    observe: impl FnMut(Duration),
) {
    schedule(period, &cancel, observe, &mut task).await;
    task.shutdown().await;
}

/// Calls `work` with the tick index every `period` until cancelled. A tick more than half
/// a period late (after a stall) is skipped, never queued up: the index follows the wall
/// clock, so the dither stays in phase with time, and the gap in the indices counts the
/// skipped ticks. `observe` hears the lateness of each tick that runs.
pub async fn schedule(
    period: Duration,
    cancel: &CancellationToken,
    mut observe: impl FnMut(Duration),
    work: &mut impl OnTick,
) {
    let start = Instant::now();
    let mut interval = tokio::time::interval_at(start, period);
    interval.set_missed_tick_behavior(MissedTickBehavior::Skip);
    loop {
        tokio::select! {
            biased;
            () = cancel.cancelled() => return,
            at = interval.tick() => {
                let late = Instant::now() - at;
                // After a stall the interval hands back the missed tick once; it is
                // skipped here, so the next tick comes on the clock's next beat.
                if late > period / 2 {
                    continue;
                }
                observe(late);
                let n = ((at - start).as_secs_f64() / period.as_secs_f64()).round() as u64;
                work.on_tick(n).await;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Records tick indices, stalls at one tick, and stops after another.
    struct Recorder {
        seen: Vec<u64>,
        stall_at: u64,
        stop_at: u64,
        cancel: CancellationToken,
    }

    impl OnTick for Recorder {
        async fn on_tick(&mut self, n: u64) {
            self.seen.push(n);
            if n == self.stall_at {
                // A stall of 2.5 periods, e.g. a link timing out.
                tokio::time::sleep(Duration::from_millis(2500)).await;
            }
            if n >= self.stop_at {
                self.cancel.cancel();
            }
        }
    }

    #[tokio::test(start_paused = true)]
    async fn ticks_follow_the_clock_and_a_stall_skips_ticks_instead_of_queueing_them() {
        let cancel = CancellationToken::new();
        let mut r = Recorder { seen: Vec::new(), stall_at: 3, stop_at: 8, cancel: cancel.clone() };
        let mut late = Vec::new();
        schedule(Duration::from_secs(1), &cancel, |d| late.push(d), &mut r).await;
        assert_eq!(r.seen, vec![0, 1, 2, 3, 6, 7, 8]);
        // Every tick that ran started on time; the stalled ones were skipped, not late.
        assert!(late.iter().all(|d| *d < Duration::from_millis(1)), "{late:?}");
    }
}
