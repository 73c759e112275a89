//! The one writer: a bounded queue of samples and an unbounded one of events, drained in
//! batched transactions on a connection of its own, with retention between batches.

use std::collections::HashMap;
use std::fmt;
use std::sync::{Arc, LazyLock};
use std::time::Duration;

use sqlx::query::Query;
use sqlx::sqlite::{Sqlite, SqliteArguments, SqliteConnectOptions, SqliteConnection};
use sqlx::{ConnectOptions, Connection};
use tokio::sync::mpsc::{self, error::TrySendError};
use tokio::time::Instant;
use tokio_util::sync::CancellationToken;

use super::{EventRecord, HistoryError, InputSample, SampleRecord, now_ms, rfc3339};
use crate::metrics::Metrics;

/// Most samples written in one transaction; more wait for the next one.
const MAX_BATCH_SAMPLES: usize = 5000;
const MAX_BATCH_EVENTS: usize = 1000;
/// Rows per multi-row `INSERT`: one statement per 100 rows costs far less than one per
/// row, and 500 parameters stay well inside SQLite's limit of 32,766.
const ROWS_PER_STATEMENT: usize = 100;
/// Rows per retention `DELETE`, each its own short transaction.
const PRUNE_BATCH_ROWS: i64 = 2000;
const PRUNE_EVERY: Duration = Duration::from_secs(5 * 60);
const WRITE_ATTEMPTS: u32 = 5;
/// How long the flush at shutdown may take.
const FLUSH_LIMIT: Duration = Duration::from_secs(10);
const FIRST_RETRY_DELAY: Duration = Duration::from_millis(250);
const MS_PER_DAY: i64 = 86_400_000;

/// Deletes up to `?2` samples older than `?1`, per loop through the (loop, at_ms) index:
/// the recursive part lists the loops with one index seek each (SQLite's "skip-scan"
/// idiom), so finding nothing to delete never scans the table.
pub(super) const PRUNE_SQL: &str = "DELETE FROM samples WHERE id IN (
    WITH RECURSIVE loops(name) AS (
        SELECT min(loop) FROM samples
        UNION ALL
        SELECT (SELECT min(loop) FROM samples WHERE loop > loops.name) FROM loops
        WHERE loops.name IS NOT NULL
    )
    SELECT samples.id FROM loops CROSS JOIN samples
    WHERE samples.loop = loops.name AND samples.at_ms < ?1
    LIMIT ?2
)";

/// `INSERT_SAMPLES[n - 1]` inserts `n` samples. Every size is its own prepared statement,
/// cached on the writer's connection. `OR FAIL` rather than the default `OR ABORT` spares
/// SQLite a statement journal (a copy of every page a statement touches, so that it can be
/// undone alone): a failed row fails the whole transaction anyway, which rolls back.
static INSERT_SAMPLES: LazyLock<Vec<String>> = LazyLock::new(|| {
    multi_row(
        "INSERT OR FAIL INTO samples (loop, at_ms, objective, state, inputs, phase, constraints) VALUES ",
        "(?, ?, ?, ?, ?, ?, ?)",
        "",
    )
});
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

/// How the writer queues and keeps history.
#[derive(Debug, Clone)]
pub struct WriterSettings {
    /// Samples that may wait to be written; more are dropped and counted. At least 1.
    pub queue_capacity: usize,
    /// Samples older than this are deleted; 0 keeps them forever. Events are kept forever.
    pub retention_days: u32,
}

impl Default for WriterSettings {
    fn default() -> Self {
        WriterSettings { queue_capacity: 10_000, retention_days: 90 }
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
    retention_days: u32,
    metrics: Option<Arc<Metrics>>,
    /// Shared with [`super::History::writes_ok`]: whether the last batch was committed.
    writes_ok: Arc<std::sync::atomic::AtomicBool>,
    /// The batch's latest finite estimates, by loop.
    latest: HashMap<Arc<str>, Vec<Latest>>,
    /// Each state's text shared, so binding it allocates nothing.
    states: Vec<Arc<str>>,
}

/// A writer that is gone (its task ended, or panicked) writes nothing more: `/readyz`
/// says so.
impl Drop for Writer {
    fn drop(&mut self) {
        self.writes_ok.store(false, std::sync::atomic::Ordering::Relaxed);
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
    settings: WriterSettings,
    metrics: Option<Arc<Metrics>>,
    writes_ok: Arc<std::sync::atomic::AtomicBool>,
) -> (HistorySender, Writer) {
    let (samples, samples_rx) = mpsc::channel(settings.queue_capacity.max(1));
    let (events, events_rx) = mpsc::unbounded_channel();
    let sender = HistorySender { samples, events, metrics: metrics.clone() };
    let writer = Writer {
        // Room for every multi-row statement size of both tables, and the rest.
        options: options.statement_cache_capacity(2 * ROWS_PER_STATEMENT + 16),
        conn: None,
        samples_rx,
        events_rx,
        samples: Vec::new(),
        events: Vec::new(),
        carried: Vec::new(),
        retention_days: settings.retention_days,
        metrics,
        writes_ok,
        latest: HashMap::new(),
        states: Vec::new(),
    };
    (sender, writer)
}

impl Writer {
    /// Waits for at least one record (or returns `None` when every sender is gone and
    /// nothing is queued), then writes everything queued, up to 5,000 samples, in one
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
    /// what it held. Every 5 minutes, and once at start, deletes samples older than
    /// `retention_days`, 2,000 rows per statement between batches, so writes never wait
    /// long behind it.
    pub async fn run(mut self, cancel: CancellationToken) {
        let mut next_prune = Instant::now();
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
                () = tokio::time::sleep_until(next_prune), if !pruning && self.retention_days > 0 => {
                    pruning = true;
                }
                () = std::future::ready(()), if pruning => {}
            }
            if pruning {
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

    /// Deletes at most 2,000 samples older than `retention_days` before `now_ms`, in one
    /// short statement. Returns how many it deleted: 0 when none older remain (or when
    /// retention is off).
    pub async fn prune(&mut self, now_ms: i64) -> Result<u64, HistoryError> {
        if self.retention_days == 0 {
            return Ok(0);
        }
        let cutoff_ms = now_ms.saturating_sub(i64::from(self.retention_days) * MS_PER_DAY);
        let mut conn = self.take_conn().await?;
        let result = sqlx::query(PRUNE_SQL).bind(cutoff_ms).bind(PRUNE_BATCH_ROWS).execute(&mut conn).await;
        match result {
            Ok(done) => {
                self.conn = Some(conn);
                Ok(done.rows_affected())
            }
            Err(e) => Err(e.into()),
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
        self.writes_ok.store(result.is_ok(), std::sync::atomic::Ordering::Relaxed);
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
        let mut conn = self.take_conn().await?;
        // On an error the connection is dropped (rolling back), and the next attempt
        // opens a fresh one.
        self.insert(&mut conn).await?;
        self.conn = Some(conn);
        self.samples.clear();
        self.events.clear();
        if let Some(m) = &self.metrics {
            m.history_rows.inc_by((written.samples + written.events) as u64);
        }
        self.set_queue_depth();
        Ok(written)
    }

    /// The pending batch in one transaction.
    async fn insert(&mut self, conn: &mut SqliteConnection) -> Result<(), HistoryError> {
        // IMMEDIATE takes the write lock up front, waiting out the busy timeout for it.
        let mut tx = conn.begin_with("BEGIN IMMEDIATE").await?;
        // Each statement's values are built while SQLite runs the one before, on its own thread.
        let mut chunks = self.samples.chunks(ROWS_PER_STATEMENT);
        let mut next = chunks.next().map(|c| insert_samples(c, &mut self.states));
        while let Some(query) = next {
            let (done, following) = futures_util::join!(query.execute(&mut *tx), async {
                chunks.next().map(|c| insert_samples(c, &mut self.states))
            });
            done?;
            next = following;
        }
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
        Ok(())
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

fn insert_samples(
    chunk: &[SampleRecord],
    states: &mut Vec<Arc<str>>,
) -> Query<'static, Sqlite, SqliteArguments> {
    let mut query = sqlx::query(INSERT_SAMPLES[chunk.len() - 1].as_str());
    for s in chunk {
        query = query
            .bind(s.loop_name.clone())
            .bind(s.at_ms)
            .bind(s.objective.filter(|x| x.is_finite()))
            .bind(interned(states, s.state))
            .bind(inputs_json(&s.inputs))
            .bind(s.phase)
            .bind(constraints_json(&s.constraints));
    }
    query
}

fn interned(states: &mut Vec<Arc<str>>, state: &'static str) -> Arc<str> {
    match states.iter().find(|s| ***s == *state) {
        Some(s) => s.clone(),
        None => {
            let s: Arc<str> = Arc::from(state);
            states.push(s.clone());
            s
        }
    }
}

/// `{"<constraint>": value, ...}` in the given order (a value that is not finite as
/// `null`); `None` for a loop without constraints.
fn constraints_json(constraints: &[(Arc<str>, f64)]) -> Option<String> {
    if constraints.is_empty() {
        return None;
    }
    let map: serde_json::Map<String, serde_json::Value> =
        constraints.iter().map(|(name, v)| (name.to_string(), serde_json::json!(v))).collect();
    Some(serde_json::Value::Object(map).to_string())
}

/// `{"<input>": {"applied": .., "estimate": .., "gradient": ..}, ...}` in the given order;
/// serde_json writes a non-finite number as `null`.
pub(super) fn inputs_json(inputs: &[InputSample]) -> String {
    let mut out = Vec::with_capacity(2 + inputs.len() * 96);
    out.push(b'{');
    for (k, i) in inputs.iter().enumerate() {
        if k > 0 {
            out.push(b',');
        }
        // Writing into a Vec cannot fail.
        let _ = serde_json::to_writer(&mut out, &*i.name);
        out.extend_from_slice(b":{\"applied\":");
        let _ = serde_json::to_writer(&mut out, &i.applied);
        out.extend_from_slice(b",\"estimate\":");
        let _ = serde_json::to_writer(&mut out, &i.estimate);
        out.extend_from_slice(b",\"gradient\":");
        let _ = serde_json::to_writer(&mut out, &i.gradient);
        out.push(b'}');
    }
    out.push(b'}');
    // serde_json writes UTF-8 only.
    String::from_utf8(out).unwrap_or_else(|e| String::from_utf8_lossy(e.as_bytes()).into_owned())
}
