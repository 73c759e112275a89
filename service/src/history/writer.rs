//! The one writer: a bounded queue of samples and an unbounded one of events, drained in
//! batched transactions on a connection of its own, with rollups, retention and a watch on
//! the disk between batches.

use std::collections::HashMap;
use std::fmt;
use std::path::{Path, PathBuf};
use std::sync::{Arc, LazyLock};
use std::time::Duration;

use sqlx::sqlite::{SqliteConnectOptions, SqliteConnection};
use sqlx::{ConnectOptions, Connection};
use tokio::sync::mpsc::{self, error::TrySendError};
use tokio::time::Instant;
use tokio_util::sync::CancellationToken;

use super::packing::{Packed, Packer};
use super::rollup::{self, MINUTE_MS};
use super::{EventRecord, HistoryError, Retention, SampleRecord, WriteFailure, now_ms, rfc3339};
use crate::metrics::Metrics;

/// Most samples written in one transaction (about 750 KB of blocks at one input); more
/// wait for the next one. Under a backlog the batches are this large, and each commit's
/// fixed cost is spread over them.
pub const MAX_BATCH_SAMPLES: usize = 20_000;
const MAX_BATCH_EVENTS: usize = 1000;
/// Rows per multi-row `INSERT`: one statement per 100 rows costs far less than one per
/// row, and 500 parameters stay well inside SQLite's limit of 32,766.
const ROWS_PER_STATEMENT: usize = 100;
/// Rows per retention `DELETE`, each its own short transaction (a sample block holds
/// about 25 samples).
const PRUNE_BATCH_ROWS: i64 = 500;
/// Most minutes rolled up in one step (one transaction), across loops, so catching up on
/// a long history never holds up a batch for long.
const ROLLUP_STEP_MINUTES: i64 = 60;
/// How often the database's size and the free space under it are looked at.
const DISK_EVERY: Duration = Duration::from_secs(10);
const PRUNE_EVERY: Duration = Duration::from_secs(5 * 60);
const WRITE_ATTEMPTS: u32 = 5;
/// How long the flush at shutdown may take.
const FLUSH_LIMIT: Duration = Duration::from_secs(10);
const FIRST_RETRY_DELAY: Duration = Duration::from_millis(250);
const MS_PER_DAY: i64 = 86_400_000;

/// Deletes up to `?2` sample blocks older than `?1`, per loop through the blocks' key,
/// and only blocks wholly rolled up: a block's samples are less than a minute after its key.
pub(super) const PRUNE_SQL: &str = "DELETE FROM sample_blocks WHERE (loop, first_ms) IN (
    SELECT b.loop, b.first_ms FROM rollup_progress p CROSS JOIN sample_blocks b
    WHERE b.loop = p.loop AND b.first_ms < min(?1, p.through_ms) - 60000
    LIMIT ?2
)";
/// Deletes up to `?2` rollup rows older than `?1`.
const PRUNE_ROLLUPS_SQL: &str = "DELETE FROM rollups WHERE (loop, period_s, start_ms) IN (
    SELECT r.loop, r.period_s, r.start_ms FROM names n CROSS JOIN rollups r
    WHERE r.loop = n.id AND r.period_s IN (60, 3600) AND r.start_ms < ?1 LIMIT ?2
)";
const PRUNE_ROLLUP_INPUTS_SQL: &str = "DELETE FROM rollup_inputs WHERE (loop, period_s, start_ms, input) IN (
    SELECT r.loop, r.period_s, r.start_ms, r.input FROM names n CROSS JOIN rollup_inputs r
    WHERE r.loop = n.id AND r.period_s IN (60, 3600) AND r.start_ms < ?1 LIMIT ?2
)";

/// `UPSERT_ESTIMATES[n - 1]` upserts `n` last estimates, never moving one back in time.
static UPSERT_ESTIMATES: LazyLock<Vec<String>> = LazyLock::new(|| {
    multi_row(
        "INSERT INTO last_estimates (loop, input, estimate, at_ms) VALUES ",
        "(?, ?, ?, ?)",
        " ON CONFLICT (loop, input) DO UPDATE SET estimate = excluded.estimate, at_ms = excluded.at_ms
          WHERE excluded.at_ms >= last_estimates.at_ms",
    )
});

fn multi_row(head: &str, row: &str, tail: &str) -> Vec<String> {
    (1..=ROWS_PER_STATEMENT).map(|n| format!("{head}{}{tail}", vec![row; n].join(", "))).collect()
}

/// One input's latest finite estimate in a batch: (input, estimate, at_ms).
type Latest = (Arc<str>, f64, i64);

/// How the writer queues history and watches the disk.
#[derive(Debug, Clone)]
pub struct WriterSettings {
    /// Samples that may wait to be written; more are dropped and counted. At least 1.
    pub queue_capacity: usize,
    /// Below this many free bytes on the database's file system: a `disk_low` event and a
    /// warning.
    pub disk_free_floor_bytes: u64,
}

impl Default for WriterSettings {
    fn default() -> Self {
        WriterSettings { queue_capacity: 10_000, disk_free_floor_bytes: 1024 * 1024 * 1024 }
    }
}

/// What one batch wrote.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Written {
    pub samples: usize,
    pub events: usize,
}

/// The way in to history for loops and the API. Cheap to clone; never waits.
#[derive(Clone)]
pub struct HistorySender {
    samples: mpsc::Sender<SampleRecord>,
    events: mpsc::UnboundedSender<EventRecord>,
    metrics: Option<Arc<Metrics>>,
}

impl fmt::Debug for HistorySender {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("HistorySender")
            .field("free_capacity", &self.samples.capacity())
            .finish_non_exhaustive()
    }
}

impl HistorySender {
    /// Queues a sample without waiting. Under overload history is decimated rather than
    /// the loops slowed down: once the queue is half full only every second tick of a
    /// loop is kept, then every 4th and every 8th as it fills further, and when it is
    /// full (or the writer has stopped) none. Each sample left out is counted in
    /// `ridgeline_history_dropped_total`. Returns whether it was queued.
    pub fn sample(&self, sample: SampleRecord) -> bool {
        let capacity = self.samples.max_capacity();
        let queued = capacity - self.samples.capacity();
        let kept = sample.tick.is_multiple_of(keep_every(queued, capacity))
            && match self.samples.try_send(sample) {
                Ok(()) => true,
                Err(TrySendError::Full(_) | TrySendError::Closed(_)) => false,
            };
        if let Some(m) = &self.metrics {
            m.history_queue_depth.set((capacity - self.samples.capacity()) as i64);
            if !kept {
                m.history_dropped.inc();
            }
        }
        kept
    }

    /// Queues an event. Events are never dropped; only if the writer has already stopped
    /// is one not recorded, and then it is logged instead.
    pub fn event(&self, event: EventRecord) {
        if let Err(mpsc::error::SendError(e)) = self.events.send(event) {
            log_unrecorded(&e, "the history writer has stopped");
        }
    }
}

/// The task that drains the queues into the database. [`Writer::step`] writes one batch;
/// [`Writer::run`] decides when, prunes old samples and flushes at shutdown.
pub struct Writer {
    options: SqliteConnectOptions,
    /// Opened on first use and again after a failed batch.
    conn: Option<SqliteConnection>,
    samples_rx: mpsc::Receiver<SampleRecord>,
    events_rx: mpsc::UnboundedReceiver<EventRecord>,
    /// The batch being written: kept until it is committed, so a failure loses nothing.
    samples: Vec<SampleRecord>,
    events: Vec<EventRecord>,
    /// Events of batches given up. They are written in a transaction of their own before
    /// each batch, so that history goes on even if one of them is what the database
    /// refuses.
    carried: Vec<EventRecord>,
    retention: Retention,
    metrics: Option<Arc<Metrics>>,
    /// Shared with [`super::History::write_failure`]: why the last batch was not committed.
    write_failure: WriteFailure,
    /// The batch's latest finite estimates, by loop.
    latest: HashMap<Arc<str>, Vec<Latest>>,
    /// The loops' open blocks and the names, as committed.
    packer: Packer,
    rollups: Rollups,
    disk: Disk,
}

/// Which minutes of which loops wait to be rolled up.
#[derive(Debug, Default)]
struct Rollups {
    /// Per loop id: the end of its rolled-up minutes, once known.
    through: HashMap<i64, i64>,
    /// Per loop id: the start of its newest minute, which is still open; the minutes
    /// before it are closed.
    open_minute: HashMap<i64, i64>,
    /// Whether the loops already in the database at start have been looked up.
    caught_up: bool,
    /// The id of the `fallback` state, once named.
    fault_state: Option<i64>,
    /// After a failed step, when to try again.
    paused_until: Option<Instant>,
}

/// The database's files and the file system under them.
#[derive(Debug)]
struct Disk {
    path: PathBuf,
    floor_bytes: u64,
    /// Whether free space is under the floor (a `disk_low` event has been sent).
    low: bool,
}

/// A writer that is gone (its task ended, or panicked) writes nothing more: `/readyz`
/// says so.
impl Drop for Writer {
    fn drop(&mut self) {
        self.write_failure.set(Some("the history writer has stopped".into()));
    }
}

impl fmt::Debug for Writer {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Writer")
            .field("pending_samples", &self.samples.len())
            .field("pending_events", &self.events.len())
            .field("carried_events", &self.carried.len())
            .finish_non_exhaustive()
    }
}

pub(super) fn channel(
    options: SqliteConnectOptions,
    path: &Path,
    retention: Retention,
    settings: WriterSettings,
    metrics: Option<Arc<Metrics>>,
    write_failure: WriteFailure,
) -> (HistorySender, Writer) {
    let (samples, samples_rx) = mpsc::channel(settings.queue_capacity.max(1));
    let (events, events_rx) = mpsc::unbounded_channel();
    let sender = HistorySender { samples, events, metrics: metrics.clone() };
    let writer = Writer {
        // Room for every multi-row statement size of the estimates and blocks, and the rest.
        options: options.statement_cache_capacity(ROWS_PER_STATEMENT + super::packing::STATEMENTS + 32),
        conn: None,
        samples_rx,
        events_rx,
        samples: Vec::new(),
        events: Vec::new(),
        carried: Vec::new(),
        retention,
        metrics,
        write_failure,
        latest: HashMap::new(),
        packer: Packer::default(),
        rollups: Rollups::default(),
        disk: Disk { path: path.to_owned(), floor_bytes: settings.disk_free_floor_bytes, low: false },
    };
    (sender, writer)
}

impl Writer {
    /// Waits for at least one record (or returns `None` when every sender is gone and
    /// nothing is queued), then writes everything queued, up to 20,000 samples, in one
    /// transaction, with an upsert of the last estimate per loop and input. Updates
    /// `ridgeline_history_rows_total` and `ridgeline_history_queue_depth`. On an error
    /// the batch is kept, and the next call tries it again.
    pub async fn step(&mut self) -> Option<Result<Written, HistoryError>> {
        if !self.wait().await {
            return None;
        }
        let written = self.write_batch().await;
        Some(written)
    }

    /// Steps until `cancel`, then writes everything still queued before returning, so
    /// history is flushed before the process exits (cancel it after the loops have
    /// stopped: a record sent after the flush began is not written). A failed batch is
    /// logged and retried a few times with backoff; one that still fails is logged with
    /// what it held. Between batches, never holding one up for long: rolls up each closed
    /// minute (at most an hour of one loop at a time, so a long history left to roll up
    /// catches up in the background), every 5 minutes and once at start deletes what is
    /// past retention, 500 rows per statement, and every 10 s looks at the disk.
    pub async fn run(mut self, cancel: CancellationToken) {
        let mut next_prune = Instant::now();
        let mut next_disk = Instant::now();
        let mut pruning = false;
        loop {
            tokio::select! {
                biased;
                () = cancel.cancelled() => break,
                more = self.wait() => {
                    if !more {
                        break;
                    }
                    // A stop does not wait out a failing batch's retries: the flush
                    // takes the batch over.
                    self.write_retrying(&cancel).await;
                }
                () = tokio::time::sleep_until(next_disk) => {
                    self.watch_disk();
                    next_disk = Instant::now() + DISK_EVERY;
                }
                () = tokio::time::sleep_until(next_prune), if !pruning => pruning = true,
                () = std::future::ready(()), if pruning || self.rollups.pending() => {}
            }
            if self.rollups.pending() {
                if let Err(e) = self.roll_up_step(now_ms()).await {
                    tracing::warn!(error = %e, "rolling up history failed; trying again in 30 s");
                    self.rollups.paused_until = Some(Instant::now() + Duration::from_secs(30));
                }
            } else if pruning {
                let done = match self.prune(now_ms()).await {
                    Ok(deleted) => deleted == 0,
                    Err(e) => {
                        tracing::warn!(error = %e, "history retention failed; trying again in 5 minutes");
                        true
                    }
                };
                if done {
                    pruning = false;
                    next_prune = Instant::now() + PRUNE_EVERY;
                }
            }
        }
        self.flush().await;
    }

    /// Deletes, in short statements of at most 500 rows, sample blocks older than
    /// `retention.raw_days` before `now_ms` once rolled up, then rollups older than
    /// `retention.rollup_days`. Returns how many rows it deleted: 0 when none older remain
    /// (a retention of 0 days keeps everything).
    pub async fn prune(&mut self, now_ms: i64) -> Result<u64, HistoryError> {
        let cutoff = |days: u32| now_ms.saturating_sub(i64::from(days) * MS_PER_DAY);
        let mut statements = Vec::new();
        if self.retention.raw_days > 0 {
            statements.push((PRUNE_SQL, cutoff(self.retention.raw_days)));
        }
        if self.retention.rollup_days > 0 {
            let rollup_cutoff = cutoff(self.retention.rollup_days);
            statements.push((PRUNE_ROLLUPS_SQL, rollup_cutoff));
            statements.push((PRUNE_ROLLUP_INPUTS_SQL, rollup_cutoff));
        }
        let mut conn = self.take_conn().await?;
        let mut deleted = 0;
        for (sql, cutoff_ms) in statements {
            deleted += sqlx::query(sql)
                .bind(cutoff_ms)
                .bind(PRUNE_BATCH_ROWS)
                .execute(&mut conn)
                .await?
                .rows_affected();
        }
        self.conn = Some(conn);
        Ok(deleted)
    }

    /// Rolls up one step: the first time, finds the loops with samples stored before
    /// this start (whose minutes before now are all closed); then the closed minutes of
    /// the loops in turn, up to an hour of minutes in all, in a transaction of its own.
    /// Returns whether more steps have work to do.
    pub async fn roll_up_step(&mut self, now_ms: i64) -> Result<bool, HistoryError> {
        let mut conn = self.take_conn().await?;
        let rollups = &mut self.rollups;
        if !rollups.caught_up {
            let stored: Vec<i64> = sqlx::query_scalar(
                "SELECT id FROM names n WHERE EXISTS (SELECT 1 FROM sample_blocks b WHERE b.loop = n.id)
                     OR EXISTS (SELECT 1 FROM open_blocks o WHERE o.loop = n.id)",
            )
            .fetch_all(&mut conn)
            .await?;
            for loop_id in stored {
                rollups.close_before(loop_id, now_ms);
            }
            rollups.caught_up = true;
            self.conn = Some(conn);
            return Ok(self.rollups.pending());
        }
        if rollups.fault_state.is_none() {
            // Named once and for all, so that it has an id to count faults by.
            rollups.fault_state = Some(
                sqlx::query_scalar(
                    "INSERT INTO names (name) VALUES ('fallback')
                     ON CONFLICT (name) DO UPDATE SET name = excluded.name RETURNING id",
                )
                .fetch_one(&mut conn)
                .await?,
            );
        }
        let fault_state = rollups.fault_state.unwrap_or(-1);
        // Loops taken in turn, up to an hour of minutes in all, in one transaction.
        let mut tx = conn.begin_with("BEGIN IMMEDIATE").await?;
        let mut advanced: Vec<(i64, i64)> = Vec::new();
        let mut minutes_left = ROLLUP_STEP_MINUTES;
        while minutes_left > 0 {
            let Some((loop_id, open_minute)) = rollups.next_loop(&advanced) else { break };
            let through = match rollups.through.get(&loop_id) {
                Some(through) => *through,
                None => rollup::rolled_through(&mut tx, loop_id).await?.unwrap_or(open_minute),
            };
            let mut until = open_minute.min(through + minutes_left * MINUTE_MS);
            if until > through {
                minutes_left -= (until - through) / MINUTE_MS;
                let minutes = rollup::roll_up(&mut tx, loop_id, fault_state, through, until).await?;
                if minutes == 0 {
                    // A gap (the service was stopped): on to the loop's next samples at once.
                    let next = rollup::next_minute_from(&mut tx, loop_id, until).await?;
                    until = next.map_or(open_minute, |next| next.clamp(until, open_minute));
                }
                rollup::set_rolled_through(&mut tx, loop_id, until).await?;
            }
            advanced.push((loop_id, until.max(through)));
        }
        tx.commit().await?;
        self.rollups.through.extend(advanced);
        self.conn = Some(conn);
        Ok(self.rollups.pending())
    }

    /// Looks at the database's size (for `ridgeline_history_bytes`) and at the free space
    /// of its file system: falling under the floor sends a `disk_low` event and a warning,
    /// once until it is back over the floor.
    fn watch_disk(&mut self) {
        let disk = &mut self.disk;
        let bytes: u64 = ["", "-wal"]
            .iter()
            .filter_map(|suffix| {
                let mut file = disk.path.clone().into_os_string();
                file.push(suffix);
                std::fs::metadata(file).ok().map(|m| m.len())
            })
            .sum();
        if let Some(m) = &self.metrics {
            m.history_bytes.set(i64::try_from(bytes).unwrap_or(i64::MAX));
        }
        let dir = disk.path.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(Path::new("."));
        let free = match rustix::fs::statvfs(dir) {
            Ok(stat) => stat.f_bavail.saturating_mul(stat.f_frsize),
            Err(e) => {
                tracing::debug!(error = %e, dir = %dir.display(), "cannot read the free space under the history");
                return;
            }
        };
        if free < disk.floor_bytes && !disk.low {
            disk.low = true;
            tracing::warn!(
                free_mb = free / 1_048_576, floor_mb = disk.floor_bytes / 1_048_576, database = %disk.path.display(),
                "free space under the history database is below the floor; history stops when the disk is full"
            );
            self.events.push(EventRecord {
                at_ms: now_ms(),
                loop_name: None,
                kind: "disk_low".into(),
                detail: serde_json::json!({
                    "free_bytes": free, "floor_bytes": disk.floor_bytes, "database": disk.path.display().to_string(),
                }),
                actor: "system".into(),
            });
        } else if free >= disk.floor_bytes && disk.low {
            disk.low = false;
            tracing::info!(
                free_mb = free / 1_048_576,
                "free space under the history database is back above the floor"
            );
        }
    }

    /// Whether there is something to write, waiting for it if not. Cancel-safe: a
    /// record taken from a queue is kept in the pending batch before this returns.
    async fn wait(&mut self) -> bool {
        if !self.samples.is_empty() || !self.events.is_empty() {
            return true;
        }
        tokio::select! {
            biased;
            Some(e) = self.events_rx.recv() => self.events.push(e),
            Some(s) = self.samples_rx.recv() => self.samples.push(s),
            else => return false,
        }
        true
    }

    pub(super) async fn take_conn(&mut self) -> Result<SqliteConnection, HistoryError> {
        match self.conn.take() {
            Some(conn) => Ok(conn),
            None => Ok(self.options.connect().await?),
        }
    }

    /// Adds what is queued to the pending batch, up to the caps, and writes it; what
    /// `/readyz` reports follows the outcome.
    async fn write_batch(&mut self) -> Result<Written, HistoryError> {
        let result = self.write_pending().await;
        self.write_failure.set(result.as_ref().err().map(|e| format!("its last batch failed: {e}")));
        result
    }

    async fn write_pending(&mut self) -> Result<Written, HistoryError> {
        while self.samples.len() < MAX_BATCH_SAMPLES {
            match self.samples_rx.try_recv() {
                Ok(s) => self.samples.push(s),
                Err(_) => break,
            }
        }
        while self.events.len() < MAX_BATCH_EVENTS {
            match self.events_rx.try_recv() {
                Ok(e) => self.events.push(e),
                Err(_) => break,
            }
        }
        self.set_queue_depth();
        let written = Written { samples: self.samples.len(), events: self.events.len() };
        if !self.carried.is_empty()
            && let Err(e) = self.write_carried().await
        {
            tracing::debug!(error = %e, events = self.carried.len(), "events held back still not written");
            if written.samples + written.events == 0 {
                return Err(e);
            }
        }
        if written.samples + written.events == 0 {
            return Ok(written);
        }
        self.collect_latest();
        // Each loop's samples in time order, so that blocks are. A loop queues its own in
        // order, so only a clock set back calls for sorting.
        if !each_loop_in_time_order(&self.samples) {
            self.samples.sort_by(|a, b| a.loop_name.cmp(&b.loop_name).then(a.at_ms.cmp(&b.at_ms)));
        }
        let mut conn = self.take_conn().await?;
        // On an error the connection is dropped (rolling back), and the next attempt
        // opens a fresh one.
        let packed = self.insert(&mut conn).await?;
        self.conn = Some(conn);
        for &(loop_id, at_ms) in &packed.newest {
            self.rollups.close_before(loop_id, at_ms);
        }
        self.packer.adopt(packed);
        self.samples.clear();
        self.events.clear();
        if let Some(m) = &self.metrics {
            m.history_rows.inc_by((written.samples + written.events) as u64);
        }
        self.set_queue_depth();
        Ok(written)
    }

    /// The pending batch in one transaction; what it packed, to adopt once committed.
    async fn insert(&mut self, conn: &mut SqliteConnection) -> Result<Packed, HistoryError> {
        // IMMEDIATE takes the write lock up front, waiting out the busy timeout for it.
        let mut tx = conn.begin_with("BEGIN IMMEDIATE").await?;
        let packed = self.packer.pack(&mut tx, &self.samples).await?;
        insert_events(&mut tx, &self.events).await?;
        let latest: Vec<_> = self
            .latest
            .iter()
            .flat_map(|(l, inputs)| inputs.iter().map(move |(i, estimate, at_ms)| (l, i, *estimate, *at_ms)))
            .collect();
        for chunk in latest.chunks(ROWS_PER_STATEMENT) {
            let mut query = sqlx::query(UPSERT_ESTIMATES[chunk.len() - 1].as_str());
            for (l, i, estimate, at_ms) in chunk {
                query = query.bind(Arc::clone(l)).bind(Arc::clone(i)).bind(*estimate).bind(*at_ms);
            }
            query.execute(&mut *tx).await?;
        }
        tx.commit().await?;
        Ok(packed)
    }

    /// Writes the events of batches given up, alone in one transaction.
    async fn write_carried(&mut self) -> Result<(), HistoryError> {
        let mut conn = self.take_conn().await?;
        let mut tx = conn.begin_with("BEGIN IMMEDIATE").await?;
        insert_events(&mut tx, &self.carried).await?;
        tx.commit().await?;
        self.conn = Some(conn);
        tracing::info!(events = self.carried.len(), "events held back by failed batches are written");
        if let Some(m) = &self.metrics {
            m.history_rows.inc_by(self.carried.len() as u64);
        }
        self.carried.clear();
        Ok(())
    }

    /// The latest finite estimate of each loop and input in the pending batch.
    fn collect_latest(&mut self) {
        for inputs in self.latest.values_mut() {
            inputs.clear();
        }
        for s in self.samples.iter().filter(|s| s.resumable) {
            let inputs = match self.latest.get_mut(&*s.loop_name) {
                Some(inputs) => inputs,
                None => self.latest.entry(s.loop_name.clone()).or_default(),
            };
            for i in s.inputs.iter().filter(|i| i.estimate.is_finite()) {
                match inputs.iter_mut().find(|(name, ..)| *name == i.name) {
                    Some(slot) if s.at_ms >= slot.2 => *slot = (i.name.clone(), i.estimate, s.at_ms),
                    Some(_) => {}
                    None => inputs.push((i.name.clone(), i.estimate, s.at_ms)),
                }
            }
        }
        // Loops that stopped sending are forgotten rather than kept forever.
        self.latest.retain(|_, inputs| !inputs.is_empty());
    }

    /// Writes the pending batch, retrying with backoff. After several failures the batch
    /// is given up, so a lasting failure never stalls history: its samples are counted as
    /// dropped, and its events are held back and tried again before each later batch,
    /// since events are never dropped.
    /// Once `stop` is cancelled it makes no further attempt, keeping the batch pending.
    pub(super) async fn write_retrying(&mut self, stop: &CancellationToken) {
        let mut delay = FIRST_RETRY_DELAY;
        for attempt in 1..=WRITE_ATTEMPTS {
            let result = self.write_batch().await;
            match result {
                Ok(written) => {
                    if attempt > 1 {
                        tracing::info!(attempt, "history batch written after retrying");
                    }
                    tracing::trace!(
                        samples = written.samples,
                        events = written.events,
                        "history batch written"
                    );
                    return;
                }
                Err(e) if attempt < WRITE_ATTEMPTS => {
                    tracing::warn!(
                        attempt, error = %e, samples = self.samples.len(), events = self.events.len(),
                        "writing a history batch failed; retrying in {delay:?}"
                    );
                    tokio::select! {
                        () = tokio::time::sleep(delay) => {}
                        () = stop.cancelled() => return,
                    }
                    delay *= 2;
                }
                Err(e) => {
                    tracing::error!(
                        error = %e, samples = self.samples.len(), events = self.events.len(),
                        "writing a history batch failed {WRITE_ATTEMPTS} times; its samples are \
                         given up (counted as dropped), its events held back for later"
                    );
                    if let Some(m) = &self.metrics {
                        m.history_dropped.inc_by(self.samples.len() as u64);
                    }
                    self.samples.clear();
                    self.carried.append(&mut self.events);
                }
            }
        }
    }

    /// Closes the queues and writes everything in them. After [`FLUSH_LIMIT`] no new
    /// attempt starts (one under way finishes), so a database that does not take the
    /// history does not keep the process from exiting; what is left then is logged
    /// (events, whole) and counted (samples).
    async fn flush(&mut self) {
        self.samples_rx.close();
        self.events_rx.close();
        let deadline = CancellationToken::new();
        let timer = tokio::spawn({
            let deadline = deadline.clone();
            async move {
                tokio::time::sleep(FLUSH_LIMIT).await;
                deadline.cancel();
            }
        });
        let drained = |w: &Self| {
            w.samples.is_empty()
                && w.events.is_empty()
                && w.carried.is_empty()
                && w.samples_rx.is_empty()
                && w.events_rx.is_empty()
        };
        while !drained(self) && !deadline.is_cancelled() {
            self.write_retrying(&deadline).await;
        }
        timer.abort();
        if !drained(self) {
            while let Ok(e) = self.events_rx.try_recv() {
                self.events.push(e);
            }
            for event in self.carried.drain(..).chain(self.events.drain(..)) {
                log_unrecorded(&event, "history could not be flushed before exit");
            }
            let samples = self.samples.len() + self.samples_rx.len();
            tracing::error!(samples, "history not flushed within {FLUSH_LIMIT:?}; samples dropped");
            if let Some(m) = &self.metrics {
                m.history_dropped.inc_by(samples as u64);
            }
            self.samples.clear();
        }
        self.set_queue_depth();
    }

    fn set_queue_depth(&self) {
        if let Some(m) = &self.metrics {
            m.history_queue_depth.set(self.samples_rx.len() as i64);
        }
    }
}

async fn insert_events(conn: &mut SqliteConnection, events: &[EventRecord]) -> Result<(), sqlx::Error> {
    for e in events {
        sqlx::query("INSERT INTO events (at_ms, loop, kind, detail, actor) VALUES (?, ?, ?, ?, ?)")
            .bind(e.at_ms)
            .bind(e.loop_name.clone())
            .bind(e.kind.clone())
            .bind(e.detail.to_string())
            .bind(e.actor.clone())
            .execute(&mut *conn)
            .await?;
    }
    Ok(())
}

/// Whether no loop's sample in `samples` is earlier than one of the same loop before it.
fn each_loop_in_time_order(samples: &[SampleRecord]) -> bool {
    let mut last: HashMap<&str, i64> = HashMap::new();
    samples.iter().all(|s| {
        let at = last.entry(&s.loop_name).or_insert(s.at_ms);
        let ordered = s.at_ms >= *at;
        *at = s.at_ms;
        ordered
    })
}

/// Of how many ticks one is kept with `queued` samples waiting in a queue of `capacity`.
fn keep_every(queued: usize, capacity: usize) -> u64 {
    match queued as f64 / capacity as f64 {
        f if f < 0.5 => 1,
        f if f < 0.75 => 2,
        f if f < 0.875 => 4,
        _ => 8,
    }
}

/// An event that could not be written still reaches the log, whole.
fn log_unrecorded(e: &EventRecord, why: &str) {
    tracing::error!(
        at = %rfc3339(e.at_ms), r#loop = ?e.loop_name, kind = %e.kind, actor = %e.actor,
        detail = %e.detail, why, "history event not recorded"
    );
}

impl Rollups {
    /// Marks the minutes of loop `loop_id` before the one `at_ms` lies in as closed.
    fn close_before(&mut self, loop_id: i64, at_ms: i64) {
        let minute = rollup::floor_to(at_ms, MINUTE_MS);
        let open = self.open_minute.entry(loop_id).or_insert(minute);
        *open = (*open).max(minute);
    }

    /// Whether a step has something to do (and is not waiting after a failure).
    fn pending(&self) -> bool {
        if self.paused_until.is_some_and(|t| Instant::now() < t) {
            return false;
        }
        !self.caught_up || self.next_loop(&[]).is_some()
    }

    /// A loop with closed minutes not rolled up yet (or not yet looked up), other than
    /// those `done` in this step, and the start of its open minute.
    fn next_loop(&self, done: &[(i64, i64)]) -> Option<(i64, i64)> {
        self.open_minute
            .iter()
            .find(|(id, open)| {
                self.through.get(id).is_none_or(|t| t < open) && !done.iter().any(|(d, _)| d == *id)
            })
            .map(|(id, open)| (*id, *open))
    }
}
