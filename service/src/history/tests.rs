use std::sync::Arc;
use std::time::Duration;

use futures_util::TryStreamExt;
use serde_json::json;
use sqlx::Row;
use tokio_util::sync::CancellationToken;

use super::*;
use crate::metrics::Metrics;

const DAY_MS: i64 = 86_400_000;

fn metrics() -> Arc<Metrics> {
    let text = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/../config/demo.toml")).unwrap();
    Arc::new(Metrics::new(&crate::config::parse(&text, "demo").unwrap()))
}

async fn fresh() -> (tempfile::TempDir, History) {
    let dir = tempfile::tempdir().unwrap();
    let history = History::open(&dir.path().join("history.db")).await.unwrap();
    (dir, history)
}

fn settings(queue_capacity: usize) -> WriterSettings {
    WriterSettings { queue_capacity, retention_days: 30 }
}

fn sample(loop_name: &str, at_ms: i64, inputs: &[(&str, f64, f64, f64)]) -> SampleRecord {
    SampleRecord {
        phase: None,
        constraints: Vec::new(),
        resumable: true,
        loop_name: loop_name.into(),
        tick: at_ms.max(0) as u64,
        at_ms,
        objective: Some(at_ms as f64 / 1000.0),
        state: "seeking",
        inputs: inputs
            .iter()
            .map(|&(name, applied, estimate, gradient)| InputSample {
                name: name.into(),
                applied,
                estimate,
                gradient,
            })
            .collect(),
    }
}

fn event(at_ms: i64, loop_name: Option<&str>, kind: &str, actor: &str) -> EventRecord {
    EventRecord {
        at_ms,
        loop_name: loop_name.map(str::to_owned),
        kind: kind.to_owned(),
        detail: json!({"from": "observing", "to": "seeking", "bounds": {"min": 1.1, "max": 1.4}}),
        actor: actor.to_owned(),
    }
}

async fn count(history: &History, table: &str) -> i64 {
    let sql = match table {
        "samples" => "SELECT count(*) FROM samples",
        "events" => "SELECT count(*) FROM events",
        _ => "SELECT count(*) FROM last_estimates",
    };
    sqlx::query_scalar(sql).fetch_one(&history.pool).await.unwrap()
}

#[tokio::test]
async fn opening_creates_the_file_and_missing_parent_directories_in_wal_mode() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("var/lib/ridgeline/history.db");
    let history = History::open(&path).await.unwrap();
    assert!(path.is_file());
    let (_, mut writer) = history.writer(settings(10), None);
    // The pool and the writer's own connection both run with the crash-safe settings.
    let mut conns = vec![writer.take_conn().await.unwrap()];
    conns.push(history.pool.acquire().await.unwrap().detach());
    for conn in &mut conns {
        let mode: String = sqlx::query_scalar("PRAGMA journal_mode").fetch_one(&mut *conn).await.unwrap();
        let sync: i64 = sqlx::query_scalar("PRAGMA synchronous").fetch_one(&mut *conn).await.unwrap();
        let busy: i64 = sqlx::query_scalar("PRAGMA busy_timeout").fetch_one(&mut *conn).await.unwrap();
        let keys: i64 = sqlx::query_scalar("PRAGMA foreign_keys").fetch_one(&mut *conn).await.unwrap();
        // Source: SQLite PRAGMA documentation, synchronous: 0 OFF, 1 NORMAL, 2 FULL.
        assert_eq!((mode.as_str(), sync, busy, keys), ("wal", 1, 5000, 1));
    }
    // Opening again applies no migration twice.
    drop(history);
    History::open(&path).await.unwrap();
}

#[tokio::test]
async fn a_path_that_cannot_be_opened_is_an_error_naming_the_path() {
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("plain-file");
    std::fs::write(&file, "not a directory").unwrap();
    let not_sqlite = dir.path().join("notes.db");
    std::fs::write(&not_sqlite, "x".repeat(4096)).unwrap();
    for path in [dir.path().to_owned(), file.join("history.db"), not_sqlite] {
        let e = History::open(&path).await.unwrap_err();
        let text = e.to_string();
        assert!(matches!(e, HistoryError::Open { .. }), "{path:?}: {e:?}");
        assert!(
            text.starts_with(&format!("cannot open the history database {}: ", path.display())),
            "{text}"
        );
        assert!(!text.ends_with(": "), "{text}");
    }
}

#[tokio::test]
async fn samples_come_back_oldest_first_with_since_until_and_limit_honoured_and_input_order_kept() {
    let (_dir, history) = fresh().await;
    let (sender, mut writer) = history.writer(settings(100), None);
    // Queued out of order, and inputs not in alphabetical order.
    for at in [5, 1, 4, 2, 3] {
        assert!(sender.sample(sample(
            "boiler",
            at * 1000,
            &[("zeta", 1.0, 2.0, 3.0), ("alpha", 4.0, 5.0, 6.0)]
        )));
    }
    assert!(sender.sample(sample("chiller", 3000, &[("cw", 1.0, 1.0, 0.0)])));
    assert_eq!(writer.step().await.unwrap().unwrap(), Written { samples: 6, events: 0 });

    let at = |rows: &[SampleRow]| rows.iter().map(|r| r.at_ms).collect::<Vec<_>>();
    assert_eq!(
        at(&history.samples("boiler", None, None, 100).await.unwrap()),
        [1000, 2000, 3000, 4000, 5000]
    );
    assert_eq!(at(&history.samples("boiler", Some(2000), Some(4000), 100).await.unwrap()), [2000, 3000]);
    assert_eq!(at(&history.samples("boiler", Some(2000), None, 2).await.unwrap()), [2000, 3000]);
    assert_eq!(at(&history.samples("boiler", None, Some(1000), 100).await.unwrap()), Vec::<i64>::new());
    assert!(history.samples("nobody", None, None, 100).await.unwrap().is_empty());

    let row = &history.samples("boiler", None, None, 1).await.unwrap()[0];
    assert_eq!((row.objective, row.state.as_str()), (Some(1.0), "seeking"));
    let v = |a, e, g| InputValues { applied: Some(a), estimate: Some(e), gradient: Some(g) };
    assert_eq!(row.inputs, [("zeta".to_owned(), v(1.0, 2.0, 3.0)), ("alpha".to_owned(), v(4.0, 5.0, 6.0))]);
}

#[tokio::test]
async fn constraint_values_come_back_in_config_order_with_unknown_ones_as_none() {
    let (_dir, history) = fresh().await;
    let (sender, mut writer) = history.writer(settings(10), None);
    let mut with = sample("boiler", 1000, &[("o2", 3.0, 3.0, 0.0)]);
    with.constraints = vec![("stack_temp".into(), 212.5), ("co".into(), f64::NAN)];
    assert!(sender.sample(with));
    assert!(sender.sample(sample("boiler", 2000, &[("o2", 3.0, 3.0, 0.0)])));
    assert_eq!(writer.step().await.unwrap().unwrap().samples, 2);
    let rows = history.samples("boiler", None, None, 10).await.unwrap();
    assert_eq!(rows[0].constraints, [("stack_temp".to_owned(), Some(212.5)), ("co".to_owned(), None)]);
    assert!(rows[1].constraints.is_empty(), "a loop without constraints stores none");
    let raw: Option<String> = sqlx::query_scalar("SELECT constraints FROM samples WHERE at_ms = 2000")
        .fetch_one(&history.pool)
        .await
        .unwrap();
    assert_eq!(raw, None, "NULL, not an empty object");
}

#[tokio::test]
async fn the_sample_stream_pages_through_the_same_rows_as_the_list() {
    let (_dir, history) = fresh().await;
    let (sender, mut writer) = history.writer(settings(10_000), None);
    // Several rows share each time, so paging must continue by id within a time.
    for k in 0..2_600 {
        sender.sample(sample("boiler", (k / 3) * 100, &[("u", k as f64, 0.0, 0.0)]));
    }
    sender.sample(sample("other", 500, &[]));
    assert_eq!(writer.step().await.unwrap().unwrap().samples, 2_601);
    for (since, until, limit) in
        [(None, None, 5_000), (Some(1_000), Some(70_000), 5_000), (Some(0), None, 2_345)]
    {
        let listed = history.samples("boiler", since, until, limit).await.unwrap();
        let streamed: Vec<_> =
            history.sample_stream("boiler", since, until, limit).try_collect().await.unwrap();
        assert!(listed.len() > 1000, "{}", listed.len());
        assert_eq!(streamed, listed);
    }
    let all = history.samples("boiler", None, None, 5_000).await.unwrap();
    let applied: Vec<f64> = all.iter().map(|r| r.inputs[0].1.applied.unwrap()).collect();
    assert_eq!(applied, (0..2_600).map(|k| k as f64).collect::<Vec<_>>());
    assert_eq!(history.sample_stream("boiler", None, None, 0).try_collect::<Vec<_>>().await.unwrap(), []);
}

#[tokio::test]
async fn non_finite_values_are_stored_as_null_and_come_back_as_none() {
    let (_dir, history) = fresh().await;
    let (sender, mut writer) = history.writer(settings(10), None);
    let mut s =
        sample("boiler", 1000, &[("u", f64::INFINITY, f64::NAN, f64::NEG_INFINITY), ("v", 1.5, 2.5, -0.5)]);
    s.objective = Some(f64::NAN);
    sender.sample(s);
    let mut none = sample("boiler", 2000, &[]);
    none.objective = None;
    sender.sample(none);
    writer.step().await.unwrap().unwrap();

    let rows = history.samples("boiler", None, None, 10).await.unwrap();
    assert_eq!(rows[0].objective, None);
    assert_eq!(rows[0].inputs[0].1, InputValues { applied: None, estimate: None, gradient: None });
    assert_eq!(
        rows[0].inputs[1].1,
        InputValues { applied: Some(1.5), estimate: Some(2.5), gradient: Some(-0.5) }
    );
    assert_eq!((rows[1].objective, rows[1].inputs.len()), (None, 0));
    let stored: (Option<f64>, String) =
        sqlx::query_as("SELECT objective, inputs FROM samples ORDER BY at_ms LIMIT 1")
            .fetch_one(&history.pool)
            .await
            .unwrap();
    assert_eq!(stored.0, None);
    assert_eq!(
        stored.1,
        r#"{"u":{"applied":null,"estimate":null,"gradient":null},"v":{"applied":1.5,"estimate":2.5,"gradient":-0.5}}"#
    );
    // A NaN estimate never becomes a last estimate.
    assert_eq!(history.last_estimates("boiler").await.unwrap().len(), 1);
}

#[tokio::test]
async fn events_come_back_newest_first_filtered_by_loop_and_since_with_detail_and_actor_intact() {
    let (_dir, history) = fresh().await;
    let (sender, mut writer) = history.writer(settings(10), None);
    sender.event(event(1000, None, "start", "system"));
    sender.event(event(2000, Some("boiler"), "mode", "alice"));
    sender.event(event(3000, Some("chiller"), "bounds", "bob"));
    sender.event(event(3000, Some("boiler"), "trip", "system"));
    sender.event(event(4000, Some("boiler"), "recovery", "system"));
    assert_eq!(writer.step().await.unwrap().unwrap(), Written { samples: 0, events: 5 });

    let kinds = |rows: &[EventRow]| rows.iter().map(|r| r.event.kind.clone()).collect::<Vec<_>>();
    assert_eq!(
        kinds(&history.events(None, None, 100).await.unwrap()),
        ["recovery", "trip", "bounds", "mode", "start"]
    );
    assert_eq!(
        kinds(&history.events(Some("boiler"), None, 100).await.unwrap()),
        ["recovery", "trip", "mode"]
    );
    assert_eq!(kinds(&history.events(Some("boiler"), Some(3000), 100).await.unwrap()), ["recovery", "trip"]);
    assert_eq!(kinds(&history.events(None, Some(2000), 2).await.unwrap()), ["recovery", "trip"]);
    assert!(history.events(Some("nobody"), None, 100).await.unwrap().is_empty());

    let mode = history.events(Some("boiler"), None, 100).await.unwrap().pop().unwrap().event;
    assert_eq!((mode.at_ms, mode.loop_name.as_deref(), mode.actor.as_str()), (2000, Some("boiler"), "alice"));
    assert_eq!(
        mode.detail,
        json!({"from": "observing", "to": "seeking", "bounds": {"min": 1.1, "max": 1.4}})
    );
    // Key order survives the round trip too.
    assert_eq!(
        mode.detail.to_string(),
        r#"{"from":"observing","to":"seeking","bounds":{"min":1.1,"max":1.4}}"#
    );
    let start = history.events(None, None, 100).await.unwrap().pop().unwrap();
    assert_eq!((start.event.loop_name, start.id), (None, 1));
}

#[tokio::test]
async fn last_estimates_are_the_latest_per_input_after_several_batches() {
    let (_dir, history) = fresh().await;
    let (sender, mut writer) = history.writer(settings(100), None);
    sender.sample(sample("boiler", 1000, &[("o2", 1.0, 2.10, 0.0), ("air", 1.0, 30.0, 0.0)]));
    sender.sample(sample("boiler", 2000, &[("o2", 1.0, 2.20, 0.0), ("air", 1.0, 31.0, 0.0)]));
    sender.sample(sample("chiller", 2000, &[("cw", 1.0, 24.0, 0.0)]));
    writer.step().await.unwrap().unwrap();
    // A later batch: a newer o2, a non-finite air (ignored), and an older chiller sample
    // that must not move its estimate back in time.
    sender.sample(sample("boiler", 3000, &[("o2", 1.0, 2.30, 0.0), ("air", 1.0, f64::NAN, 0.0)]));
    sender.sample(sample("chiller", 1500, &[("cw", 1.0, 99.0, 0.0)]));
    writer.step().await.unwrap().unwrap();
    sender.sample(sample("boiler", 4000, &[("o2", 1.0, 2.40, 0.0)]));
    sender.sample(sample("boiler", 3500, &[("o2", 1.0, 9.99, 0.0)]));
    writer.step().await.unwrap().unwrap();

    let boiler = history.last_estimates("boiler").await.unwrap();
    assert_eq!(
        boiler,
        [
            StoredEstimate { input: "air".into(), estimate: 31.0, at_ms: 2000 },
            StoredEstimate { input: "o2".into(), estimate: 2.40, at_ms: 4000 },
        ]
    );
    let chiller = history.last_estimates("chiller").await.unwrap();
    assert_eq!(chiller, [StoredEstimate { input: "cw".into(), estimate: 24.0, at_ms: 2000 }]);
    assert!(history.last_estimates("nobody").await.unwrap().is_empty());
}

#[tokio::test]
async fn a_full_queue_drops_samples_and_counts_them_but_never_events_and_never_waits() {
    let (_dir, history) = fresh().await;
    let metrics = metrics();
    let (sender, mut writer) = history.writer(settings(3), Some(metrics.clone()));
    // No writer is draining: the queue fills, and every call still returns at once.
    let queued: Vec<bool> = (0..1000).map(|k| sender.sample(sample("boiler", k, &[]))).collect();
    assert_eq!(queued.iter().filter(|q| **q).count(), 3);
    assert!(queued[..3].iter().all(|q| *q));
    for k in 0..500 {
        sender.event(event(k, Some("boiler"), "mode", "system"));
    }
    assert_eq!(metrics.history_dropped.get(), 997);

    let mut total = Written::default();
    while total.events < 500 {
        let w = writer.step().await.unwrap().unwrap();
        total = Written { samples: total.samples + w.samples, events: total.events + w.events };
    }
    assert_eq!(total, Written { samples: 3, events: 500 });
    assert_eq!(metrics.history_rows.get(), 503);
    assert_eq!(metrics.history_queue_depth.get(), 0);
    // Once drained, the queue takes samples again.
    assert!(sender.sample(sample("boiler", 2000, &[])));
    assert_eq!(metrics.history_dropped.get(), 997);
}

#[tokio::test]
async fn a_filling_queue_thins_each_loop_evenly_before_it_is_full() {
    let (_dir, history) = fresh().await;
    let metrics = metrics();
    let (sender, mut writer) = history.writer(settings(8), Some(metrics.clone()));
    let kept: Vec<i64> = (0..64).filter(|&k| sender.sample(sample("boiler", k, &[]))).collect();
    // Every tick below half full, then every 2nd, 4th and 8th, then none.
    assert_eq!(kept, [0, 1, 2, 3, 4, 6, 8, 16]);
    assert_eq!(metrics.history_dropped.get(), 56);
    assert_eq!(metrics.history_queue_depth.get(), 8, "the depth is current while nothing drains");
    let rows = writer.step().await.unwrap().unwrap();
    assert_eq!(rows.samples, 8);
}

#[tokio::test]
async fn step_writes_a_whole_batch_in_one_transaction_and_keeps_a_failed_one_for_the_next_try() {
    let (_dir, history) = fresh().await;
    let metrics = metrics();
    let (sender, mut writer) = history.writer(settings(30_000), Some(metrics.clone()));
    for k in 0..12_345 {
        sender.sample(sample(["boiler", "chiller", "dryer"][k % 3], k as i64, &[("u", 1.0, k as f64, 0.0)]));
    }
    sender.event(event(1, Some("boiler"), "mode", "alice"));
    assert_eq!(metrics.history_queue_depth.get(), 12_345);

    // The event's insert fails after the samples of its batch were inserted: the whole
    // batch rolls back, and is kept.
    sqlx::query("CREATE TRIGGER refuse BEFORE INSERT ON events BEGIN SELECT RAISE(ABORT, 'refused'); END")
        .execute(&history.pool)
        .await
        .unwrap();
    let e = writer.step().await.unwrap().unwrap_err();
    assert!(e.to_string().contains("refused"), "{e}");
    assert_eq!((count(&history, "samples").await, count(&history, "events").await), (0, 0));
    assert_eq!(metrics.history_queue_depth.get(), 12_345 - 5_000);
    sqlx::query("DROP TRIGGER refuse").execute(&history.pool).await.unwrap();

    assert_eq!(writer.step().await.unwrap().unwrap(), Written { samples: 5_000, events: 1 });
    assert_eq!((count(&history, "samples").await, count(&history, "events").await), (5_000, 1));
    assert_eq!(metrics.history_queue_depth.get(), 7_345);
    assert_eq!(writer.step().await.unwrap().unwrap(), Written { samples: 5_000, events: 0 });
    assert_eq!(writer.step().await.unwrap().unwrap(), Written { samples: 2_345, events: 0 });
    assert_eq!(count(&history, "samples").await, 12_345);
    assert_eq!(metrics.history_rows.get(), 12_346);
    assert_eq!(metrics.history_queue_depth.get(), 0);
    let dryer = history.last_estimates("dryer").await.unwrap();
    assert_eq!(dryer, [StoredEstimate { input: "u".into(), estimate: 12_344.0, at_ms: 12_344 }]);

    // With every sender gone and nothing queued, there is nothing more to step.
    drop(sender);
    assert!(writer.step().await.is_none());
}

#[tokio::test]
async fn run_writes_while_running_and_flushes_everything_queued_when_cancelled() {
    let (_dir, history) = fresh().await;
    let (sender, writer) = history.writer(settings(20_000), None);
    let cancel = CancellationToken::new();
    let task = tokio::spawn(writer.run(cancel.clone()));
    // Recent times, or retention (which `run` does at start) would delete them.
    let now = now_ms();
    sender.sample(sample("boiler", now, &[]));
    sender.event(event(1, None, "start", "system"));
    let deadline = tokio::time::Instant::now() + Duration::from_secs(10);
    while count(&history, "events").await == 0 {
        assert!(tokio::time::Instant::now() < deadline, "run never wrote");
        tokio::time::sleep(Duration::from_millis(10)).await;
    }

    // Queued faster than one batch, then cancelled at once: all of it is written.
    for k in 0..7_000 {
        sender.sample(sample("boiler", now + k, &[("u", 1.0, 2.0, 3.0)]));
    }
    sender.event(event(2, None, "stop", "system"));
    cancel.cancel();
    task.await.unwrap();
    assert_eq!((count(&history, "samples").await, count(&history, "events").await), (7_001, 2));
    // After the flush the writer is gone: samples are refused, not queued forever.
    assert!(!sender.sample(sample("boiler", 99_999, &[])));
}

#[tokio::test]
async fn run_retries_a_failed_batch_until_it_is_written() {
    let (_dir, history) = fresh().await;
    let metrics = metrics();
    let (sender, writer) = history.writer(settings(100), Some(metrics.clone()));
    sqlx::query("CREATE TRIGGER refuse BEFORE INSERT ON samples BEGIN SELECT RAISE(ABORT, 'refused'); END")
        .execute(&history.pool)
        .await
        .unwrap();
    let now = now_ms();
    for k in 0..10 {
        sender.sample(sample("boiler", now + k, &[]));
    }
    sender.event(event(now, None, "start", "system"));
    let cancel = CancellationToken::new();
    let task = tokio::spawn(writer.run(cancel.clone()));
    // The first attempt fails at once; the retry comes 250 ms later.
    tokio::time::sleep(Duration::from_millis(100)).await;
    assert_eq!(count(&history, "events").await, 0);
    sqlx::query("DROP TRIGGER refuse").execute(&history.pool).await.unwrap();
    let deadline = tokio::time::Instant::now() + Duration::from_secs(10);
    while count(&history, "samples").await < 10 {
        assert!(tokio::time::Instant::now() < deadline, "never retried");
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    cancel.cancel();
    task.await.unwrap();
    assert_eq!(count(&history, "events").await, 1);
    assert_eq!((metrics.history_dropped.get(), metrics.history_rows.get()), (0, 11));
}

#[tokio::test]
async fn a_batch_that_keeps_failing_gives_up_its_samples_after_five_tries_but_keeps_its_events() {
    let (_dir, history) = fresh().await;
    let metrics = metrics();
    let (sender, mut writer) = history.writer(settings(100), Some(metrics.clone()));
    sqlx::query("CREATE TRIGGER refuse BEFORE INSERT ON samples BEGIN SELECT RAISE(ABORT, 'refused'); END")
        .execute(&history.pool)
        .await
        .unwrap();
    for k in 0..10 {
        sender.sample(sample("boiler", k, &[]));
    }
    sender.event(event(1, None, "start", "system"));
    // Paused only around the writer: the pool's acquire timeout would fire at once on a
    // paused clock, as it auto-advances while SQLite works on its own thread.
    tokio::time::pause();
    let started = tokio::time::Instant::now();
    let never = CancellationToken::new();
    writer.write_retrying(&never).await;
    // Backoff 0.25 + 0.5 + 1 + 2 s between the five attempts (at least: sqlx's own
    // timers may move the paused clock further).
    assert!(started.elapsed() >= Duration::from_millis(3750), "{:?}", started.elapsed());
    tokio::time::resume();
    assert_eq!(metrics.history_dropped.get(), 10);
    assert_eq!((count(&history, "samples").await, count(&history, "events").await), (0, 0));

    // The writer carries on with the next batch.
    sqlx::query("DROP TRIGGER refuse").execute(&history.pool).await.unwrap();
    sender.sample(sample("boiler", 11, &[]));
    writer.write_retrying(&never).await;
    assert_eq!((count(&history, "samples").await, count(&history, "events").await), (1, 1));
}

#[tokio::test]
async fn an_event_the_database_refuses_is_held_back_without_stopping_the_rest_of_history() {
    let (_dir, history) = fresh().await;
    let metrics = metrics();
    let (sender, mut writer) = history.writer(settings(100), Some(metrics.clone()));
    sqlx::query(
        "CREATE TRIGGER refuse BEFORE INSERT ON events WHEN NEW.kind = 'odd' \
         BEGIN SELECT RAISE(ABORT, 'refused'); END",
    )
    .execute(&history.pool)
    .await
    .unwrap();
    sender.sample(sample("boiler", 1, &[]));
    sender.event(event(1, None, "odd", "system"));
    tokio::time::pause();
    let never = CancellationToken::new();
    writer.write_retrying(&never).await;
    tokio::time::resume();
    assert_eq!(metrics.history_dropped.get(), 1, "the batch's sample is given up");

    // Later batches are written, while the refused event waits for its turn.
    sender.sample(sample("boiler", 2, &[]));
    sender.event(event(2, None, "mode", "system"));
    writer.write_retrying(&never).await;
    let kinds = |rows: Vec<EventRow>| rows.into_iter().map(|r| r.event.kind).collect::<Vec<_>>();
    assert_eq!(kinds(history.events(None, None, 10).await.unwrap()), ["mode"]);
    assert_eq!(count(&history, "samples").await, 1);

    sqlx::query("DROP TRIGGER refuse").execute(&history.pool).await.unwrap();
    sender.sample(sample("boiler", 3, &[]));
    writer.write_retrying(&never).await;
    assert_eq!(kinds(history.events(None, None, 10).await.unwrap()), ["mode", "odd"], "newest first");
    assert_eq!(count(&history, "samples").await, 2);
}

#[tokio::test]
async fn a_writer_that_is_gone_is_reported_as_not_writing() {
    let (_dir, history) = fresh().await;
    let (_sender, writer) = history.writer(settings(10), None);
    assert!(history.writes_ok());
    drop(writer);
    assert!(!history.writes_ok());
}

#[tokio::test]
async fn run_cancelled_before_it_starts_still_writes_what_was_queued() {
    let (_dir, history) = fresh().await;
    let (sender, writer) = history.writer(settings(100), None);
    for k in 0..50 {
        sender.sample(sample("boiler", k, &[]));
    }
    sender.event(event(1, None, "stop", "system"));
    let cancel = CancellationToken::new();
    cancel.cancel();
    writer.run(cancel).await;
    assert_eq!((count(&history, "samples").await, count(&history, "events").await), (50, 1));
}

#[tokio::test]
async fn retention_deletes_samples_older_than_retention_days_and_keeps_newer_ones_and_all_events() {
    let (_dir, history) = fresh().await;
    let (sender, mut writer) = history.writer(settings(10_000), None);
    let now = 400 * DAY_MS;
    let old = now - 30 * DAY_MS - 1;
    for k in 0..4_500 {
        sender.sample(sample(["boiler", "chiller", "dryer"][k % 3], old - k as i64, &[("u", 1.0, 1.0, 0.0)]));
    }
    for k in 0..10 {
        sender.sample(sample("boiler", now - 30 * DAY_MS + k, &[]));
        sender.event(event(old - k * DAY_MS, Some("boiler"), "mode", "system"));
    }
    writer.step().await.unwrap().unwrap();

    // Small batches: each statement deletes at most 2,000 rows.
    let mut deleted = Vec::new();
    loop {
        match writer.prune(now).await.unwrap() {
            0 => break,
            n => deleted.push(n),
        }
    }
    assert_eq!(deleted, [2_000, 2_000, 500]);
    assert_eq!((count(&history, "samples").await, count(&history, "events").await), (10, 10));
    let kept = history.samples("boiler", None, None, 100).await.unwrap();
    assert!(kept.iter().all(|r| r.at_ms >= now - 30 * DAY_MS));

    // `run` prunes once at start.
    for k in 0..100 {
        sender.sample(sample("dryer", old - k, &[]));
    }
    writer.step().await.unwrap().unwrap();
    let (sender2, writer2) = history.writer(WriterSettings { queue_capacity: 10, retention_days: 1 }, None);
    sender2.sample(sample("dryer", now_ms(), &[]));
    let cancel = CancellationToken::new();
    let task = tokio::spawn(writer2.run(cancel.clone()));
    let deadline = tokio::time::Instant::now() + Duration::from_secs(10);
    while count(&history, "samples").await != 1 {
        assert!(tokio::time::Instant::now() < deadline, "run never pruned");
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    cancel.cancel();
    task.await.unwrap();
    assert_eq!(count(&history, "events").await, 10);
}

#[tokio::test]
async fn retention_uses_the_loop_index_rather_than_scanning_the_table() {
    let (_dir, history) = fresh().await;
    let plan: Vec<String> =
        sqlx::query(sqlx::AssertSqlSafe(format!("EXPLAIN QUERY PLAN {}", writer::PRUNE_SQL)))
            .bind(0_i64)
            .bind(2000_i64)
            .fetch_all(&history.pool)
            .await
            .unwrap()
            .iter()
            .map(|r| r.get::<String, _>(3))
            .collect();
    // The outer DELETE finds each row by id; nothing walks the whole table.
    assert!(plan.iter().all(|step| !step.starts_with("SCAN samples")), "{plan:#?}");
    assert!(
        plan.iter().any(|step| step == "SEARCH samples USING INTEGER PRIMARY KEY (rowid=?)"),
        "{plan:#?}"
    );
    assert!(
        plan.iter().any(|step| step.contains("USING COVERING INDEX samples_loop_at (loop=? AND at_ms<?)")),
        "{plan:#?}"
    );
}

#[test]
fn inputs_are_written_as_compact_json_in_config_order() {
    let inputs = [
        InputSample { name: "b \"quoted\"".into(), applied: 1.0, estimate: 0.1 + 0.2, gradient: -1e-300 },
        InputSample { name: "a".into(), applied: f64::NAN, estimate: 1e21, gradient: 0.0 },
    ];
    let text = writer::inputs_json(&inputs);
    assert_eq!(
        text,
        r#"{"b \"quoted\"":{"applied":1.0,"estimate":0.30000000000000004,"gradient":-1e-300},"a":{"applied":null,"estimate":1e+21,"gradient":0.0}}"#
    );
    let back: InOrder<InputValues> = serde_json::from_str(&text).unwrap();
    assert_eq!(back.0[0].0, "b \"quoted\"");
    assert_eq!(back.0[0].1.estimate, Some(0.1 + 0.2));
    assert_eq!(back.0[1].1.estimate, Some(1e21));
}
