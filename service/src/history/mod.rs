//! The history store: samples, rollups, events and last estimates in SQLite, the only place that talks SQL.

mod blocks;
mod legacy;
mod lock;
mod packing;
mod rollup;
mod time;
mod writer;

use std::borrow::Cow;
use std::collections::HashMap;
use std::fmt;
use std::path::{Path, PathBuf};
use std::sync::{Arc, RwLock};
use std::time::Duration;

use futures_util::TryStreamExt;
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
pub use writer::{HistorySender, MAX_BATCH_SAMPLES, Writer, WriterSettings, Written};

use blocks::{Layout, MAX_BLOCK_SPAN_MS};
use rollup::{HOUR_MS, MINUTE_MS};

static MIGRATOR: Migrator = sqlx::migrate!("../migrations");

/// Blocks per page when reading samples (about 25 samples each): large enough that paging
/// costs little, small enough that no read holds a snapshot (and so the WAL) for long.
const PAGE_BLOCKS: i64 = 64;

/// A stored block: its key, the names its samples carry, and their bytes.
type StoredBlock = (i64, Layout, Vec<u8>);
const MS_PER_DAY: i64 = 86_400_000;

/// How long history is kept: raw samples, and their one-minute and one-hour rollups.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Retention {
    /// Samples older than this many days are deleted (once rolled up).
    pub raw_days: u32,
    /// Rollups older than this many days are deleted.
    pub rollup_days: u32,
}

impl Default for Retention {
    fn default() -> Self {
        Retention { raw_days: 30, rollup_days: 730 }
    }
}

/// What a trend was built from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Resolution {
    Raw,
    Minute,
    Hour,
}

impl Resolution {
    /// The coarsest resolution that still gives a bucket of `bucket_ms` more than one
    /// value, rollups wherever raw samples are no longer kept from `since_ms`.
    pub fn for_trend(bucket_ms: i64, since_ms: i64, raw_kept_from_ms: i64) -> Resolution {
        if bucket_ms >= HOUR_MS {
            Resolution::Hour
        } else if bucket_ms >= MINUTE_MS || since_ms < raw_kept_from_ms {
            Resolution::Minute
        } else {
            Resolution::Raw
        }
    }

    pub fn as_str(self) -> &'static str {
        match self {
            Resolution::Raw => "raw",
            Resolution::Minute => "1m",
            Resolution::Hour => "1h",
        }
    }
}

/// The history database: a small pool for reads and checks, and the settings the
/// writer's own connection uses. Cheap to clone.
#[derive(Clone)]
pub struct History {
    pool: SqlitePool,
    path: Arc<Path>,
    retention: Retention,
    /// Names by id, as far as read so far (the table only grows).
    names: Arc<RwLock<HashMap<i64, Arc<str>>>>,
    /// Whether the writer's last batch was committed (true until one fails), and the
    /// writer is still there.
    write_failure: WriteFailure,
}

impl fmt::Debug for History {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("History").field("path", &self.path).finish_non_exhaustive()
    }
}

/// Shared by the writer and [`History`]: `None` while batches are committed, else why not.
#[derive(Debug, Clone, Default)]
pub(crate) struct WriteFailure(Arc<std::sync::Mutex<Option<String>>>);

impl WriteFailure {
    fn set(&self, failure: Option<String>) {
        if let Ok(mut f) = self.0.lock() {
            *f = failure;
        }
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
    pub state: Cow<'static, str>,
    /// In config order, which is the order they come back in.
    pub inputs: Vec<InputSample>,
    /// A stepwise loop's dwell phase (`settling` or `averaging`) while it seeks.
    pub phase: Option<Cow<'static, str>>,
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
    /// journal, `synchronous=NORMAL`, a busy timeout (5 s) and foreign keys, applies the
    /// embedded migrations and converts samples stored by earlier versions to blocks. A
    /// file that cannot be opened is an error naming the path.
    pub async fn open(path: &Path, retention: Retention) -> Result<History, HistoryError> {
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
        let migrate_error = |reason: String| HistoryError::Migrate { path: path.to_owned(), reason };
        MIGRATOR.run(&pool).await.map_err(|e| migrate_error(e.to_string()))?;
        legacy::convert(&pool).await.map_err(|e| migrate_error(e.to_string()))?;
        let history = History {
            pool,
            path: path.into(),
            retention,
            names: Arc::default(),
            write_failure: WriteFailure::default(),
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
        let options = (*self.pool.connect_options()).clone();
        writer::channel(options, &self.path, self.retention, settings, metrics, self.write_failure.clone())
    }

    /// How long history is kept.
    pub fn retention(&self) -> Retention {
        self.retention
    }

    /// The earliest time raw samples are kept from, `now_ms` being now.
    pub fn raw_kept_from_ms(&self, now_ms: i64) -> i64 {
        now_ms.saturating_sub(i64::from(self.retention.raw_days) * MS_PER_DAY)
    }

    /// One loop's history with `since_ms <= at < until_ms` reduced to buckets of
    /// `bucket_ms` from `since_ms`, oldest first, from raw samples or from rollups as
    /// `resolution` says; buckets without samples are left out. Per bucket the number of
    /// samples, the objective's min, mean and max and each of `inputs`' applied and
    /// estimate means; values that were not finite are left out of them. Rollups are
    /// reduced by the database, up to the bucket the rolled-up minutes (or hours) end in;
    /// that bucket and the ones after come from raw samples, so a trend reaches the
    /// present. Raw samples are decoded a page of blocks at a time, so memory holds the
    /// buckets and one page whatever the window.
    pub async fn trend(
        &self,
        loop_name: &str,
        inputs: &[String],
        since_ms: i64,
        until_ms: i64,
        bucket_ms: i64,
        resolution: Resolution,
    ) -> Result<Vec<TrendBucket>, HistoryError> {
        let bucket_ms = bucket_ms.max(1);
        let Some(loop_id) = self.name_id(loop_name).await? else { return Ok(Vec::new()) };
        let mut input_ids = Vec::with_capacity(inputs.len());
        for name in inputs {
            input_ids.push(self.name_id(name).await?);
        }
        match resolution {
            Resolution::Raw => self.raw_trend(loop_id, &input_ids, since_ms, until_ms, bucket_ms).await,
            Resolution::Minute | Resolution::Hour => {
                // Rollups reach as far as the last closed minute (or hour); the buckets
                // from there on come from the raw samples, so the trend runs up to now.
                let period_ms = if resolution == Resolution::Hour { HOUR_MS } else { MINUTE_MS };
                let through: Option<i64> =
                    sqlx::query_scalar("SELECT through_ms FROM rollup_progress WHERE loop = ?1")
                        .bind(loop_id)
                        .fetch_optional(&self.pool)
                        .await?;
                let rolled = rollup::floor_to(through.unwrap_or(i64::MIN).max(since_ms), period_ms);
                let tail_ms = (since_ms + (rolled - since_ms).max(0) / bucket_ms * bucket_ms).min(until_ms);
                let period_s = period_ms / 1000;
                let mut buckets =
                    self.rollup_trend(loop_id, &input_ids, period_s, since_ms, tail_ms, bucket_ms).await?;
                buckets.extend(self.raw_trend(loop_id, &input_ids, tail_ms, until_ms, bucket_ms).await?);
                Ok(buckets)
            }
        }
    }

    async fn raw_trend(
        &self,
        loop_id: i64,
        input_ids: &[Option<i64>],
        since_ms: i64,
        until_ms: i64,
        bucket_ms: i64,
    ) -> Result<Vec<TrendBucket>, HistoryError> {
        struct Acc {
            samples: i64,
            objective: rollup::Stat,
            inputs: Vec<(rollup::Stat, rollup::Stat)>,
        }
        let mut buckets: std::collections::BTreeMap<i64, Acc> = std::collections::BTreeMap::new();
        let mut pages = self.block_pages(loop_id, since_ms, until_ms);
        while let Some(page) = pages.next().await {
            for (first_ms, layout, data) in page? {
                // Where each asked-for input sits in this block's layout.
                let slots: Vec<Option<usize>> = input_ids
                    .iter()
                    .map(|id| id.and_then(|id| layout.inputs.iter().position(|i| *i == id)))
                    .collect();
                for view in blocks::decode(first_ms, &layout, &data) {
                    let view = view?;
                    if !(since_ms..until_ms).contains(&view.at_ms) {
                        continue;
                    }
                    let acc = buckets.entry((view.at_ms - since_ms) / bucket_ms).or_insert_with(|| Acc {
                        samples: 0,
                        objective: rollup::Stat::default(),
                        inputs: vec![Default::default(); input_ids.len()],
                    });
                    acc.samples += 1;
                    acc.objective.add(view.objective());
                    for (k, slot) in slots.iter().enumerate() {
                        if let Some(slot) = slot {
                            let [applied, estimate, _] = view.input(*slot);
                            acc.inputs[k].0.add(applied);
                            acc.inputs[k].1.add(estimate);
                        }
                    }
                }
            }
        }
        Ok(buckets
            .into_iter()
            .map(|(bucket, acc)| TrendBucket {
                start_ms: since_ms + bucket * bucket_ms,
                samples: acc.samples,
                objective: acc.objective.triple(),
                inputs: acc.inputs.iter().map(|(a, e)| (a.triple()[1], e.triple()[1])).collect(),
            })
            .collect())
    }

    async fn rollup_trend(
        &self,
        loop_id: i64,
        input_ids: &[Option<i64>],
        period_s: i64,
        since_ms: i64,
        until_ms: i64,
        bucket_ms: i64,
    ) -> Result<Vec<TrendBucket>, HistoryError> {
        // Both statements take the same five parameters.
        let query = |sql: &'static str| {
            sqlx::query(sql).bind(since_ms).bind(bucket_ms).bind(loop_id).bind(period_s).bind(until_ms)
        };
        let rows = query(
            "SELECT (start_ms - ?1) / ?2 AS bucket, sum(ticks), min(objective_min),
                 sum(objective_mean * objective_n) / nullif(sum(objective_n), 0), max(objective_max)
             FROM rollups WHERE loop = ?3 AND period_s = ?4 AND start_ms >= ?1 AND start_ms < ?5
             GROUP BY bucket ORDER BY bucket",
        )
        .fetch_all(&self.pool)
        .await?;
        let mut buckets = rows
            .iter()
            .map(|r| {
                Ok(TrendBucket {
                    start_ms: since_ms + r.try_get::<i64, _>(0)? * bucket_ms,
                    samples: r.try_get(1)?,
                    objective: [r.try_get(2)?, r.try_get(3)?, r.try_get(4)?],
                    inputs: vec![(None, None); input_ids.len()],
                })
            })
            .collect::<Result<Vec<_>, sqlx::Error>>()?;
        let rows = query(
            "SELECT (start_ms - ?1) / ?2 AS bucket, input,
                 sum(applied_mean * applied_n) / nullif(sum(applied_n), 0),
                 sum(estimate_mean * estimate_n) / nullif(sum(estimate_n), 0)
             FROM rollup_inputs WHERE loop = ?3 AND period_s = ?4 AND start_ms >= ?1 AND start_ms < ?5
             GROUP BY bucket, input",
        )
        .fetch_all(&self.pool)
        .await?;
        for r in &rows {
            let (start_ms, input): (i64, i64) =
                (since_ms + r.try_get::<i64, _>(0)? * bucket_ms, r.try_get(1)?);
            let (Some(k), Ok(b)) = (
                input_ids.iter().position(|id| *id == Some(input)),
                buckets.binary_search_by_key(&start_ms, |b| b.start_ms),
            ) else {
                continue;
            };
            buckets[b].inputs[k] = (r.try_get(2)?, r.try_get(3)?);
        }
        Ok(buckets)
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
        self.sample_stream(loop_name, since_ms, until_ms, limit).try_collect().await
    }

    /// The same rows as [`History::samples`] as a stream, so a large export is never
    /// built in memory. Reads a page of blocks at a time, holding no read transaction
    /// between pages.
    pub fn sample_stream(
        &self,
        loop_name: &str,
        since_ms: Option<i64>,
        until_ms: Option<i64>,
        limit: u32,
    ) -> BoxStream<'static, Result<SampleRow, HistoryError>> {
        let history = self.clone();
        let loop_name = loop_name.to_owned();
        let (since_ms, until_ms) = (since_ms.unwrap_or(i64::MIN), until_ms.unwrap_or(i64::MAX));
        stream::once(async move {
            let pages = match history.name_id(&loop_name).await {
                Ok(Some(loop_id)) => history.block_pages(loop_id, since_ms, until_ms),
                Ok(None) => stream::empty().boxed(),
                Err(e) => stream::once(async move { Err(e) }).boxed(),
            };
            pages
                .then(move |page| {
                    let history = history.clone();
                    async move { history.page_rows(page?, since_ms, until_ms).await }
                })
                .map(|rows| match rows {
                    Ok(rows) => stream::iter(rows.into_iter().map(Ok)).boxed(),
                    Err(e) => stream::once(async move { Err(e) }).boxed(),
                })
                .flatten()
        })
        .flatten()
        .take(limit as usize)
        .boxed()
    }

    /// The samples of a page of blocks with `since_ms <= at < until_ms`, names read back.
    async fn page_rows(
        &self,
        page: Vec<StoredBlock>,
        since_ms: i64,
        until_ms: i64,
    ) -> Result<Vec<SampleRow>, HistoryError> {
        let mut rows = Vec::new();
        for (first_ms, layout, data) in &page {
            let inputs = self.names_of(&layout.inputs).await?;
            let constraints = self.names_of(&layout.constraints).await?;
            for view in blocks::decode(*first_ms, layout, data) {
                let view = view?;
                if !(since_ms..until_ms).contains(&view.at_ms) {
                    continue;
                }
                let phase = match view.phase {
                    0 => None,
                    id => Some(self.name(id).await?.to_string()),
                };
                rows.push(SampleRow {
                    at_ms: view.at_ms,
                    objective: view.objective(),
                    state: self.name(view.state).await?.to_string(),
                    inputs: inputs
                        .iter()
                        .enumerate()
                        .map(|(k, name)| {
                            let [applied, estimate, gradient] = view.input(k);
                            (name.to_string(), InputValues { applied, estimate, gradient })
                        })
                        .collect(),
                    phase,
                    constraints: constraints
                        .iter()
                        .enumerate()
                        .map(|(k, name)| (name.to_string(), view.value(1 + 3 * inputs.len() + k)))
                        .collect(),
                });
            }
        }
        Ok(rows)
    }

    /// One loop's blocks (sealed and open) that may hold samples with `since_ms <= at <
    /// until_ms`, in key order, a page at a time.
    fn block_pages(
        &self,
        loop_id: i64,
        since_ms: i64,
        until_ms: i64,
    ) -> BoxStream<'static, Result<Vec<StoredBlock>, HistoryError>> {
        let pool = self.pool.clone();
        // A block holds samples from (about) its key to less than a span after it.
        let (from, to) =
            (since_ms.saturating_sub(MAX_BLOCK_SPAN_MS), until_ms.saturating_add(MAX_BLOCK_SPAN_MS));
        stream::unfold(Some(from), move |after| {
            let pool = pool.clone();
            async move {
                let after = after?;
                let page = block_page(&pool, loop_id, after, to).await;
                match page {
                    Ok(page) if page.is_empty() => None,
                    Ok(page) => {
                        let next = page.last().map(|(key, ..)| *key);
                        Some((Ok(page), next))
                    }
                    Err(e) => Some((Err(e), None)),
                }
            }
        })
        .boxed()
    }

    /// The id of `name` in the names table, if it is there.
    async fn name_id(&self, name: &str) -> Result<Option<i64>, HistoryError> {
        Ok(sqlx::query_scalar("SELECT id FROM names WHERE name = ?1")
            .bind(name)
            .fetch_optional(&self.pool)
            .await?)
    }

    /// The name with id `id`, reading the names added since last asked when it is new.
    async fn name(&self, id: i64) -> Result<Arc<str>, HistoryError> {
        if let Some(name) = self.names.read().ok().and_then(|n| n.get(&id).cloned()) {
            return Ok(name);
        }
        let known = self.names.read().map(|n| n.len()).unwrap_or(0);
        let rows = sqlx::query("SELECT id, name FROM names").fetch_all(&self.pool).await?;
        let mut fresh = HashMap::with_capacity(rows.len().max(known));
        for r in &rows {
            fresh.insert(r.try_get::<i64, _>(0)?, Arc::from(r.try_get::<&str, _>(1)?));
        }
        let name = fresh.get(&id).cloned();
        if let Ok(mut names) = self.names.write() {
            *names = fresh;
        }
        name.ok_or_else(|| HistoryError::Corrupt(format!("a block refers to name {id}, which is not stored")))
    }

    async fn names_of(&self, ids: &[i64]) -> Result<Vec<Arc<str>>, HistoryError> {
        let mut names = Vec::with_capacity(ids.len());
        for id in ids {
            names.push(self.name(*id).await?);
        }
        Ok(names)
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

    /// Whether the writer's last batch was committed (for `/readyz`).
    pub fn writes_ok(&self) -> bool {
        self.write_failure().is_none()
    }

    /// Why history is not being written, when it is not: the last batch's error, or the
    /// writer having stopped. The lock is held only to copy the text, so a probe never
    /// holds up the writer.
    pub fn write_failure(&self) -> Option<String> {
        self.write_failure.0.lock().ok().and_then(|f| f.clone())
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

/// Up to a page of loop `loop_id`'s blocks with `after < key < to`, sealed or open, in
/// key order.
async fn block_page(
    pool: &SqlitePool,
    loop_id: i64,
    after: i64,
    to: i64,
) -> Result<Vec<StoredBlock>, HistoryError> {
    let rows = sqlx::query(
        "SELECT first_ms, layout, data FROM sample_blocks WHERE loop = ?1 AND first_ms > ?2 AND first_ms < ?3
         ORDER BY first_ms LIMIT ?4",
    )
    .bind(loop_id)
    .bind(after)
    .bind(to)
    .bind(PAGE_BLOCKS)
    .fetch_all(pool)
    .await?;
    let open = sqlx::query(
        "SELECT first_ms, layout, data FROM open_blocks WHERE loop = ?1 AND first_ms > ?2 AND first_ms < ?3",
    )
    .bind(loop_id)
    .bind(after)
    .bind(to)
    .fetch_optional(pool)
    .await?;
    let full = rows.len() as i64 == PAGE_BLOCKS;
    let mut page = Vec::with_capacity(rows.len() + 1);
    for r in &rows {
        page.push((r.try_get(0)?, Layout::decode(r.try_get(1)?)?, r.try_get(2)?));
    }
    if let Some(r) = open {
        let key: i64 = r.try_get(0)?;
        // After a full page of sealed blocks, the open block waits for the page it falls in.
        if !full || page.last().is_some_and(|(last, ..)| key < *last) {
            page.push((key, Layout::decode(r.try_get(1)?)?, r.try_get(2)?));
        }
    }
    page.sort_by_key(|(key, ..)| *key);
    Ok(page)
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
