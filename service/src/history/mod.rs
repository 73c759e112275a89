//! The history store: samples, events and last estimates in SQLite, the only place that talks SQL.

mod lock;
mod time;
mod writer;

use std::fmt;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Duration;

use futures_util::stream::{self, BoxStream, StreamExt};
use serde::de::{Deserializer, MapAccess, Visitor};
use serde::{Deserialize, Serialize};
use sqlx::Row;
use sqlx::migrate::Migrator;
use sqlx::sqlite::{
    SqliteConnectOptions, SqliteJournalMode, SqlitePool, SqlitePoolOptions, SqliteRow, SqliteSynchronous,
};

pub use lock::{InstanceLock, LockError};
pub use time::{now_ms, parse_duration_s, parse_rfc3339, rfc3339};
pub use writer::{HistorySender, Writer, WriterSettings, Written};

static MIGRATOR: Migrator = sqlx::migrate!("../migrations");

/// Rows per page when streaming samples: large enough that paging costs little, small
/// enough that no read holds a snapshot (and so the WAL) for long.
const STREAM_PAGE_ROWS: u32 = 1000;

/// The history database: a small pool for reads and checks, and the settings the
/// writer's own connection uses. Cheap to clone.
#[derive(Clone)]
pub struct History {
    pool: SqlitePool,
    path: Arc<Path>,
    /// Whether the writer's last batch was committed (true until one fails), and the
    /// writer is still there.
    writes_ok: Arc<std::sync::atomic::AtomicBool>,
}

impl fmt::Debug for History {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("History").field("path", &self.path).finish_non_exhaustive()
    }
}

/// What can go wrong with the history store.
#[derive(Debug, thiserror::Error)]
pub enum HistoryError {
    /// The database file or its directory cannot be created, opened or read as SQLite.
    #[error("cannot open the history database {}: {reason}", path.display())]
    Open { path: PathBuf, reason: String },
    /// The embedded migrations cannot be applied, or do not match those already applied.
    #[error("cannot apply the history migrations to {}: {reason}", path.display())]
    Migrate { path: PathBuf, reason: String },
    /// A statement failed (I/O, a full disk, a lock held too long, ...).
    #[error("history query failed: {0}")]
    Query(#[from] sqlx::Error),
    /// A stored row that this version cannot read back.
    #[error("unreadable history row: {0}")]
    Corrupt(String),
}

/// One tick of one loop, as a loop hands it to the writer.
#[derive(Debug, Clone, PartialEq)]
pub struct SampleRecord {
    pub loop_name: Arc<str>,
    /// The loop's tick index, by which history is thinned evenly under overload.
    pub tick: u64,
    pub at_ms: i64,
    /// `None` when the tick had no usable objective; a non-finite value is stored as NULL.
    pub objective: Option<f64>,
    pub state: &'static str,
    /// In config order, which is the order they come back in.
    pub inputs: Vec<InputSample>,
    /// A stepwise loop's dwell phase (`settling` or `averaging`) while it seeks.
    pub phase: Option<&'static str>,
    /// Each constraint's value in config order (NaN when not known); empty for a loop
    /// without constraints.
    pub constraints: Vec<(Arc<str>, f64)>,
    /// Whether the estimates were in force (the loop wrote this tick): only those are
    /// kept as the last estimates a restarted loop may resume from.
    pub resumable: bool,
}

/// One input's values in a tick.
#[derive(Debug, Clone, PartialEq)]
pub struct InputSample {
    pub name: Arc<str>,
    pub applied: f64,
    pub estimate: f64,
    pub gradient: f64,
}

/// Something that happened: a mode change, a trip, a bounds change, a link going down...
#[derive(Debug, Clone, PartialEq)]
pub struct EventRecord {
    pub at_ms: i64,
    /// `None` for events of the whole service (start, stop, a link).
    pub loop_name: Option<String>,
    pub kind: String,
    pub detail: serde_json::Value,
    /// The token's name, or `"system"`.
    pub actor: String,
}

/// A stored sample.
#[derive(Debug, Clone, PartialEq)]
pub struct SampleRow {
    pub at_ms: i64,
    pub objective: Option<f64>,
    pub state: String,
    /// In the order they were stored (config order).
    pub inputs: Vec<(String, InputValues)>,
    /// A stepwise loop's dwell phase while it seeks.
    pub phase: Option<String>,
    /// Each constraint's value, in the order stored (config order); empty for a loop
    /// without constraints.
    pub constraints: Vec<(String, Option<f64>)>,
}

/// One bucket of a loop's trend.
#[derive(Debug, Clone, PartialEq)]
pub struct TrendBucket {
    pub start_ms: i64,
    pub samples: i64,
    /// The objective's min, mean and max; `None` when no sample had one.
    pub objective: [Option<f64>; 3],
    /// Per input (in the order asked for), the means of applied and estimate.
    pub inputs: Vec<(Option<f64>, Option<f64>)>,
}

/// One input's stored values; `None` where the value was not finite.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
pub struct InputValues {
    #[serde(default)]
    pub applied: Option<f64>,
    #[serde(default)]
    pub estimate: Option<f64>,
    #[serde(default)]
    pub gradient: Option<f64>,
}

/// A bump test as stored: created when it starts, saved whole at each change.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BumpTestRow {
    pub id: i64,
    #[serde(rename = "loop")]
    pub loop_name: String,
    pub input: String,
    /// `running`, `done` or `aborted`.
    pub status: String,
    pub step: f64,
    pub settle_max_s: f64,
    /// The four levels the staircase visits: u0, u0 + step, u0 - step, u0.
    pub setpoints: Vec<f64>,
    #[serde(serialize_with = "as_rfc3339")]
    pub started_at: i64,
    #[serde(serialize_with = "as_rfc3339_opt")]
    pub finished_at: Option<i64>,
    pub abort_reason: Option<String>,
    /// `[{"setpoint", "from", "to", "settled_objective"}]`, as held so far.
    pub levels: serde_json::Value,
    /// What `ridgeline tune --json` prints for the record of the test, once done.
    pub result: Option<serde_json::Value>,
    /// Why a finished test's record gave no tuning.
    pub fit_error: Option<String>,
    pub actor: String,
}

fn as_rfc3339<S: serde::Serializer>(ms: &i64, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_str(&rfc3339(*ms))
}

fn as_rfc3339_opt<S: serde::Serializer>(ms: &Option<i64>, s: S) -> Result<S::Ok, S::Error> {
    match ms {
        Some(ms) => s.serialize_str(&rfc3339(*ms)),
        None => s.serialize_none(),
    }
}

/// A stored event: the event and its id in history.
#[derive(Debug, Clone, PartialEq)]
pub struct EventRow {
    pub id: i64,
    pub event: EventRecord,
}

/// The last finite estimate stored for one input of a loop.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredEstimate {
    pub input: String,
    pub estimate: f64,
    pub at_ms: i64,
}

impl History {
    /// Opens the database at `path`, creating the file and its directories, with WAL
    /// journal, `synchronous=NORMAL`, a busy timeout (5 s) and foreign keys, and applies
    /// the embedded migrations. A file that cannot be opened is an error naming the path.
    pub async fn open(path: &Path) -> Result<History, HistoryError> {
        let open_error = |reason: String| HistoryError::Open { path: path.to_owned(), reason };
        if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
            std::fs::create_dir_all(parent).map_err(|e| open_error(e.to_string()))?;
        }
        // WAL lets the API read while the writer writes; NORMAL syncs at checkpoints
        // rather than every commit, which in WAL mode still never corrupts the file on
        // a crash or power loss (it can only lose the last commits).
        let options = SqliteConnectOptions::new()
            .filename(path)
            .create_if_missing(true)
            .journal_mode(SqliteJournalMode::Wal)
            .synchronous(SqliteSynchronous::Normal)
            .busy_timeout(Duration::from_secs(5))
            .foreign_keys(true);
        let pool = SqlitePoolOptions::new()
            .max_connections(4)
            .acquire_timeout(Duration::from_secs(10))
            .connect_with(options)
            .await
            .map_err(|e| open_error(reason(&e)))?;
        MIGRATOR
            .run(&pool)
            .await
            .map_err(|e| HistoryError::Migrate { path: path.to_owned(), reason: e.to_string() })?;
        let history = History {
            pool,
            path: path.into(),
            writes_ok: Arc::new(std::sync::atomic::AtomicBool::new(true)),
        };
        // One service per store (the instance lock), so a test still running is a stopped one's.
        let aborted = history.abort_unfinished_bump_tests().await.map_err(|e| open_error(e.to_string()))?;
        if aborted > 0 {
            tracing::warn!(aborted, "bump tests left running by a service that stopped are marked aborted");
        }
        Ok(history)
    }

    /// The sender loops and the API use, and the writer task that drains it.
    pub fn writer(
        &self,
        settings: WriterSettings,
        metrics: Option<Arc<crate::metrics::Metrics>>,
    ) -> (HistorySender, Writer) {
        writer::channel((*self.pool.connect_options()).clone(), settings, metrics, self.writes_ok.clone())
    }

    /// One loop's samples with `since_ms <= at < until_ms` reduced in the database to
    /// buckets of `bucket_ms` from `since_ms`, oldest first; buckets without samples are
    /// left out. Per bucket the objective's min, mean and max and each of `inputs`'
    /// applied and estimate means; values that were not finite are left out of them.
    pub async fn trend(
        &self,
        loop_name: &str,
        inputs: &[String],
        since_ms: i64,
        until_ms: i64,
        bucket_ms: i64,
    ) -> Result<Vec<TrendBucket>, HistoryError> {
        let mut sql = String::from(
            "SELECT (at_ms - ?1) / ?2 AS bucket, count(*), min(objective), avg(objective), max(objective)",
        );
        for k in 0..inputs.len() {
            sql.push_str(&format!(
                ", avg(json_extract(inputs, ?{})), avg(json_extract(inputs, ?{}))",
                6 + 2 * k,
                7 + 2 * k
            ));
        }
        sql.push_str(
            " FROM samples WHERE loop = ?3 AND at_ms >= ?4 AND at_ms < ?5 GROUP BY bucket ORDER BY bucket",
        );
        // Built only from placeholders: every value, the JSON paths included, is bound.
        let mut query = sqlx::query(sqlx::AssertSqlSafe(sql))
            .bind(since_ms)
            .bind(bucket_ms.max(1))
            .bind(loop_name.to_owned())
            .bind(since_ms)
            .bind(until_ms);
        for name in inputs {
            // Input names are identifiers ([a-z][a-z0-9_]*), so they need no quoting in a path.
            query = query.bind(format!("$.{name}.applied")).bind(format!("$.{name}.estimate"));
        }
        let rows = query.fetch_all(&self.pool).await?;
        rows.iter()
            .map(|r| {
                let bucket: i64 = r.try_get(0)?;
                let means = (0..inputs.len())
                    .map(|k| Ok((r.try_get(5 + 2 * k)?, r.try_get(6 + 2 * k)?)))
                    .collect::<Result<Vec<_>, sqlx::Error>>()?;
                Ok(TrendBucket {
                    start_ms: since_ms + bucket * bucket_ms.max(1),
                    samples: r.try_get(1)?,
                    objective: [r.try_get(2)?, r.try_get(3)?, r.try_get(4)?],
                    inputs: means,
                })
            })
            .collect()
    }

    /// Samples of one loop with `since_ms <= at < until_ms` (either optional), oldest
    /// first, at most `limit`.
    pub async fn samples(
        &self,
        loop_name: &str,
        since_ms: Option<i64>,
        until_ms: Option<i64>,
        limit: u32,
    ) -> Result<Vec<SampleRow>, HistoryError> {
        let rows = sqlx::query(
            "SELECT id, at_ms, objective, state, inputs, phase, constraints FROM samples
             WHERE loop = ?1 AND at_ms >= ?2 AND at_ms < ?3 ORDER BY at_ms, id LIMIT ?4",
        )
        .bind(loop_name.to_owned())
        .bind(since_ms.unwrap_or(i64::MIN))
        .bind(until_ms.unwrap_or(i64::MAX))
        .bind(i64::from(limit))
        .fetch_all(&self.pool)
        .await?;
        rows.iter().map(|r| sample_row(r, loop_name).map(|(_, row)| row)).collect()
    }

    /// The same rows as [`History::samples`] as a stream, so a large export is never
    /// built in memory. Reads a page at a time, holding no read transaction between pages.
    pub fn sample_stream(
        &self,
        loop_name: &str,
        since_ms: Option<i64>,
        until_ms: Option<i64>,
        limit: u32,
    ) -> BoxStream<'static, Result<SampleRow, HistoryError>> {
        struct Page {
            pool: SqlitePool,
            loop_name: String,
            /// The (at_ms, id) of the last row returned; the next page starts after it.
            after: (i64, i64),
            until_ms: i64,
            remaining: u32,
        }
        let start = Page {
            pool: self.pool.clone(),
            loop_name: loop_name.to_owned(),
            after: (since_ms.unwrap_or(i64::MIN), i64::MIN),
            until_ms: until_ms.unwrap_or(i64::MAX),
            remaining: limit,
        };
        stream::unfold(Some(start), |page| async move {
            let mut page = page.filter(|p| p.remaining > 0)?;
            let rows = sqlx::query(
                "SELECT id, at_ms, objective, state, inputs, phase, constraints FROM samples
                 WHERE loop = ?1 AND (at_ms, id) > (?2, ?3) AND at_ms < ?4 ORDER BY at_ms, id LIMIT ?5",
            )
            .bind(page.loop_name.clone())
            .bind(page.after.0)
            .bind(page.after.1)
            .bind(page.until_ms)
            .bind(i64::from(page.remaining.min(STREAM_PAGE_ROWS)))
            .fetch_all(&page.pool)
            .await;
            let rows = match rows {
                Ok(rows) if rows.is_empty() => return None,
                Ok(rows) => rows,
                Err(e) => return Some((vec![Err(HistoryError::from(e))], None)),
            };
            let mut out = Vec::with_capacity(rows.len());
            for r in &rows {
                match sample_row(r, &page.loop_name) {
                    Ok((id, row)) => {
                        page.after = (row.at_ms, id);
                        out.push(Ok(row));
                    }
                    Err(e) => {
                        out.push(Err(e));
                        return Some((out, None));
                    }
                }
            }
            page.remaining = page.remaining.saturating_sub(out.len() as u32);
            Some((out, Some(page)))
        })
        .flat_map(stream::iter)
        .boxed()
    }

    /// Events, newest first, of one loop or of all, since a time, at most `limit`.
    pub async fn events(
        &self,
        loop_name: Option<&str>,
        since_ms: Option<i64>,
        limit: u32,
    ) -> Result<Vec<EventRow>, HistoryError> {
        // Two statements rather than `?1 IS NULL OR loop = ?1`, so each uses its index.
        let query = match loop_name {
            Some(name) => sqlx::query(
                "SELECT id, at_ms, loop, kind, detail, actor FROM events
                 WHERE loop = ?1 AND at_ms >= ?2 ORDER BY at_ms DESC, id DESC LIMIT ?3",
            )
            .bind(name.to_owned()),
            None => sqlx::query(
                "SELECT id, at_ms, loop, kind, detail, actor FROM events
                 WHERE at_ms >= ?1 ORDER BY at_ms DESC, id DESC LIMIT ?2",
            ),
        };
        let rows =
            query.bind(since_ms.unwrap_or(i64::MIN)).bind(i64::from(limit)).fetch_all(&self.pool).await?;
        rows.iter().map(event_row).collect()
    }

    /// The last stored estimate of each input of a loop, with when it was stored, for
    /// resuming after a restart. Ordered by input name.
    pub async fn last_estimates(&self, loop_name: &str) -> Result<Vec<StoredEstimate>, HistoryError> {
        let rows =
            sqlx::query("SELECT input, estimate, at_ms FROM last_estimates WHERE loop = ?1 ORDER BY input")
                .bind(loop_name.to_owned())
                .fetch_all(&self.pool)
                .await?;
        rows.iter()
            .map(|r| {
                Ok(StoredEstimate { input: r.try_get(0)?, estimate: r.try_get(1)?, at_ms: r.try_get(2)? })
            })
            .collect()
    }

    /// Stores a new bump test (its `id` is ignored) and returns its id.
    pub async fn create_bump_test(&self, row: &BumpTestRow) -> Result<i64, HistoryError> {
        let id = sqlx::query(
            "INSERT INTO bump_tests (loop, input, status, step, settle_max_s, setpoints, started_at_ms,
                 finished_at_ms, abort_reason, levels, result, fit_error, actor)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13)",
        )
        .bind(&row.loop_name)
        .bind(&row.input)
        .bind(&row.status)
        .bind(row.step)
        .bind(row.settle_max_s)
        .bind(serde_json::to_string(&row.setpoints).unwrap_or_default())
        .bind(row.started_at)
        .bind(row.finished_at)
        .bind(&row.abort_reason)
        .bind(row.levels.to_string())
        .bind(row.result.as_ref().map(|r| r.to_string()))
        .bind(&row.fit_error)
        .bind(&row.actor)
        .execute(&self.pool)
        .await?
        .last_insert_rowid();
        Ok(id)
    }

    /// Saves what changed in a bump test: status, end, reason, levels and result.
    pub async fn save_bump_test(&self, row: &BumpTestRow) -> Result<(), HistoryError> {
        sqlx::query(
            "UPDATE bump_tests SET status = ?2, finished_at_ms = ?3, abort_reason = ?4, levels = ?5,
                 result = ?6, fit_error = ?7 WHERE id = ?1",
        )
        .bind(row.id)
        .bind(&row.status)
        .bind(row.finished_at)
        .bind(&row.abort_reason)
        .bind(row.levels.to_string())
        .bind(row.result.as_ref().map(|r| r.to_string()))
        .bind(&row.fit_error)
        .execute(&self.pool)
        .await?;
        Ok(())
    }

    /// One bump test by id.
    pub async fn bump_test(&self, id: i64) -> Result<Option<BumpTestRow>, HistoryError> {
        let row = sqlx::query(
            "SELECT id, loop, input, status, step, settle_max_s, setpoints, started_at_ms, finished_at_ms,
                 abort_reason, levels, result, fit_error, actor FROM bump_tests WHERE id = ?1",
        )
        .bind(id)
        .fetch_optional(&self.pool)
        .await?;
        let Some(r) = row else { return Ok(None) };
        let json = |text: String| {
            serde_json::from_str::<serde_json::Value>(&text).map_err(|e| HistoryError::Corrupt(e.to_string()))
        };
        Ok(Some(BumpTestRow {
            id: r.try_get(0)?,
            loop_name: r.try_get(1)?,
            input: r.try_get(2)?,
            status: r.try_get(3)?,
            step: r.try_get(4)?,
            settle_max_s: r.try_get(5)?,
            setpoints: serde_json::from_str(&r.try_get::<String, _>(6)?)
                .map_err(|e| HistoryError::Corrupt(e.to_string()))?,
            started_at: r.try_get(7)?,
            finished_at: r.try_get(8)?,
            abort_reason: r.try_get(9)?,
            levels: json(r.try_get(10)?)?,
            result: r.try_get::<Option<String>, _>(11)?.map(json).transpose()?,
            fit_error: r.try_get(12)?,
            actor: r.try_get(13)?,
        }))
    }

    /// Marks the bump tests left `running` by a service that stopped as aborted.
    async fn abort_unfinished_bump_tests(&self) -> Result<u64, HistoryError> {
        let done = sqlx::query(
            "UPDATE bump_tests SET status = 'aborted', finished_at_ms = ?1,
                 abort_reason = 'the service stopped before the test was done'
             WHERE status = 'running'",
        )
        .bind(now_ms())
        .execute(&self.pool)
        .await?;
        Ok(done.rows_affected())
    }

    /// Whether the writer's last batch was committed (for `/readyz`): cheap, and takes no
    /// lock, so a probe can never hold up the writer.
    pub fn writes_ok(&self) -> bool {
        self.writes_ok.load(std::sync::atomic::Ordering::Relaxed)
    }
}

/// The reason of an open failure without sqlx's "error returned from database" wrapping.
fn reason(e: &sqlx::Error) -> String {
    match e {
        sqlx::Error::Database(db) => db.message().to_owned(),
        sqlx::Error::Io(io) => io.to_string(),
        other => other.to_string(),
    }
}

fn sample_row(r: &SqliteRow, loop_name: &str) -> Result<(i64, SampleRow), HistoryError> {
    let (id, at_ms): (i64, i64) = (r.try_get(0)?, r.try_get(1)?);
    let inputs: &str = r.try_get(4)?;
    let inputs = serde_json::from_str::<InOrder<InputValues>>(inputs).map_err(|e| {
        HistoryError::Corrupt(format!("the inputs of loop {loop_name}'s sample at {}: {e}", rfc3339(at_ms)))
    })?;
    let constraints: Option<&str> = r.try_get(6)?;
    let constraints = match constraints {
        Some(text) => serde_json::from_str::<InOrder<Option<f64>>>(text).map_err(|e| {
            HistoryError::Corrupt(format!(
                "the constraints of loop {loop_name}'s sample at {}: {e}",
                rfc3339(at_ms)
            ))
        })?,
        None => InOrder(Vec::new()),
    };
    Ok((
        id,
        SampleRow {
            at_ms,
            objective: r.try_get(2)?,
            state: r.try_get(3)?,
            inputs: inputs.0,
            phase: r.try_get(5)?,
            constraints: constraints.0,
        },
    ))
}

fn event_row(r: &SqliteRow) -> Result<EventRow, HistoryError> {
    let id: i64 = r.try_get(0)?;
    let detail: &str = r.try_get(4)?;
    let detail = serde_json::from_str(detail)
        .map_err(|e| HistoryError::Corrupt(format!("the detail of event {id}: {e}")))?;
    let event = EventRecord {
        at_ms: r.try_get(1)?,
        loop_name: r.try_get(2)?,
        kind: r.try_get(3)?,
        detail,
        actor: r.try_get(5)?,
    };
    Ok(EventRow { id, event })
}

/// A JSON object column (`inputs`, `constraints`) read straight into a list, keeping
/// the stored order.
struct InOrder<T>(Vec<(String, T)>);

impl<'de, T: Deserialize<'de>> Deserialize<'de> for InOrder<T> {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct Entries<T>(std::marker::PhantomData<T>);
        impl<'de, T: Deserialize<'de>> Visitor<'de> for Entries<T> {
            type Value = InOrder<T>;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("an object of named values")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<InOrder<T>, A::Error> {
                let mut entries = Vec::with_capacity(map.size_hint().unwrap_or(2));
                while let Some(entry) = map.next_entry()? {
                    entries.push(entry);
                }
                Ok(InOrder(entries))
            }
        }
        d.deserialize_map(Entries(std::marker::PhantomData))
    }
}

#[cfg(test)]
mod tests;
