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
    let history = History::open(&dir.path().join("history.db"), Retention::default()).await.unwrap();
    (dir, history)
}

fn settings(queue_capacity: usize) -> WriterSettings {
    WriterSettings { queue_capacity, disk_free_floor_bytes: 0 }
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
        state: "seeking".into(),
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
        "samples" => {
            "SELECT coalesce(sum(samples), 0) FROM (SELECT samples FROM sample_blocks
                                                    UNION ALL SELECT samples FROM open_blocks)"
        }
        "blocks" => "SELECT count(*) FROM sample_blocks",
        "rollups" => "SELECT count(*) FROM rollups",
        "minute rollups" => "SELECT count(*) FROM rollups WHERE period_s = 60",
        "events" => "SELECT count(*) FROM events",
        _ => "SELECT count(*) FROM last_estimates",
    };
    sqlx::query_scalar(sql).fetch_one(&history.pool).await.unwrap()
}

#[tokio::test]
async fn opening_creates_the_file_and_missing_parent_directories_in_wal_mode() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("var/lib/ridgeline/history.db");
    let history = History::open(&path, Retention::default()).await.unwrap();
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
    History::open(&path, Retention::default()).await.unwrap();
}

#[tokio::test]
async fn a_path_that_cannot_be_opened_is_an_error_naming_the_path() {
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("plain-file");
    std::fs::write(&file, "not a directory").unwrap();
    let not_sqlite = dir.path().join("notes.db");
    std::fs::write(&not_sqlite, "x".repeat(4096)).unwrap();
    for path in [dir.path().to_owned(), file.join("history.db"), not_sqlite] {
        let e = History::open(&path, Retention::default()).await.unwrap_err();
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
    let layout: Vec<u8> =
        sqlx::query_scalar("SELECT layout FROM open_blocks").fetch_one(&history.pool).await.unwrap();
    assert!(
        blocks::Layout::decode(&layout).unwrap().constraints.is_empty(),
        "a block of its own, without any"
    );
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
    let (layout, data): (Vec<u8>, Vec<u8>) =
        sqlx::query_as("SELECT layout, data FROM sample_blocks ORDER BY first_ms LIMIT 1")
            .fetch_one(&history.pool)
            .await
            .unwrap();
    let layout = blocks::Layout::decode(&layout).unwrap();
    let stored = blocks::decode(1000, &layout, &data).next().unwrap().unwrap();
    let bits: Vec<_> = (0..7).map(|k| stored.value(k).map(f64::to_bits)).collect();
    assert_eq!(
        bits,
        [
            None,
            None,
            None,
            None,
            Some(1.5_f64.to_bits()),
            Some(2.5_f64.to_bits()),
            Some((-0.5_f64).to_bits())
        ]
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
    let (sender, mut writer) = history.writer(settings(120_000), Some(metrics.clone()));
    for k in 0..49_380 {
        sender.sample(sample(["boiler", "chiller", "dryer"][k % 3], k as i64, &[("u", 1.0, k as f64, 0.0)]));
    }
    sender.event(event(1, Some("boiler"), "mode", "alice"));
    assert_eq!(metrics.history_queue_depth.get(), 49_380);

    // The event's insert fails after the samples of its batch were inserted: the whole
    // batch rolls back, and is kept.
    sqlx::query("CREATE TRIGGER refuse BEFORE INSERT ON events BEGIN SELECT RAISE(ABORT, 'refused'); END")
        .execute(&history.pool)
        .await
        .unwrap();
    let e = writer.step().await.unwrap().unwrap_err();
    assert!(e.to_string().contains("refused"), "{e}");
    assert_eq!((count(&history, "samples").await, count(&history, "events").await), (0, 0));
    assert_eq!(metrics.history_queue_depth.get(), 29_380);
    sqlx::query("DROP TRIGGER refuse").execute(&history.pool).await.unwrap();

    assert_eq!(writer.step().await.unwrap().unwrap(), Written { samples: 20_000, events: 1 });
    assert_eq!((count(&history, "samples").await, count(&history, "events").await), (20_000, 1));
    assert_eq!(metrics.history_queue_depth.get(), 29_380);
    assert_eq!(writer.step().await.unwrap().unwrap(), Written { samples: 20_000, events: 0 });
    assert_eq!(writer.step().await.unwrap().unwrap(), Written { samples: 9_380, events: 0 });
    assert_eq!(count(&history, "samples").await, 49_380);
    assert_eq!(metrics.history_rows.get(), 49_381);
    assert_eq!(metrics.history_queue_depth.get(), 0);
    let dryer = history.last_estimates("dryer").await.unwrap();
    assert_eq!(dryer, [StoredEstimate { input: "u".into(), estimate: 49_379.0, at_ms: 49_379 }]);

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
    sqlx::query(
        "CREATE TRIGGER refuse BEFORE INSERT ON open_blocks BEGIN SELECT RAISE(ABORT, 'refused'); END",
    )
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
    sqlx::query(
        "CREATE TRIGGER refuse BEFORE INSERT ON open_blocks BEGIN SELECT RAISE(ABORT, 'refused'); END",
    )
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

/// Loop `name`'s samples, one per second from `from_ms` for `n` seconds, written.
async fn record(writer: &mut Writer, sender: &HistorySender, name: &str, from_ms: i64, n: i64) {
    for start in (0..n).step_by(4000) {
        for k in start..n.min(start + 4000) {
            let mut s = sample(name, from_ms + k * 1000, &[("u", k as f64, 2.0 * k as f64, 0.0)]);
            s.objective = Some((k % 60) as f64);
            assert!(sender.sample(s));
        }
        writer.step().await.unwrap().unwrap();
    }
}

async fn roll_up_all(writer: &mut Writer, now: i64) {
    while writer.roll_up_step(now).await.unwrap() {}
}

#[tokio::test]
async fn retention_deletes_samples_once_rolled_up_and_rollups_past_their_own_retention_never_events() {
    let (_dir, history) = fresh().await;
    let (sender, mut writer) = history.writer(settings(10_000), None);
    let now = 400 * DAY_MS;
    let old = now - 30 * DAY_MS - 3 * 3_600_000;
    for name in ["boiler", "chiller", "dryer"] {
        record(&mut writer, &sender, name, old, 7_200).await;
        record(&mut writer, &sender, name, now - 3_600_000, 10).await;
    }
    for k in 0..10 {
        sender.event(event(old - k * DAY_MS, Some("boiler"), "mode", "system"));
    }
    writer.step().await.unwrap().unwrap();
    assert_eq!(count(&history, "samples").await, 3 * 7_210);

    // Nothing is deleted before it is rolled up.
    assert_eq!(writer.prune(now).await.unwrap(), 0);
    roll_up_all(&mut writer, now).await;
    // Per loop, two hours of minutes and their two hours, and the minute of the 10 recent
    // samples and its hour.
    assert_eq!(count(&history, "rollups").await, 3 * (120 + 2 + 1 + 1));

    // Small batches: each statement deletes at most 500 blocks.
    let blocks = count(&history, "blocks").await as u64;
    let mut deleted = Vec::new();
    loop {
        match writer.prune(now).await.unwrap() {
            0 => break,
            n => deleted.push(n),
        }
    }
    assert!(deleted.iter().all(|n| *n <= 500), "{deleted:?}");
    assert_eq!(deleted.iter().sum::<u64>(), blocks);
    assert_eq!(count(&history, "samples").await, 3 * 10);
    let kept = history.samples("boiler", None, None, 100).await.unwrap();
    assert!(kept.iter().all(|r| r.at_ms >= now - 30 * DAY_MS));
    assert_eq!(count(&history, "rollups").await, 3 * 124, "rollups outlive the samples");

    // Two years on, the rollups go too; events stay.
    while writer.prune(now + 731 * DAY_MS).await.unwrap() > 0 {}
    assert_eq!(count(&history, "rollups").await, 0);
    assert_eq!(count(&history, "events").await, 10);
}

#[tokio::test]
async fn run_rolls_up_what_an_earlier_run_left_and_prunes_once_at_start() {
    let (_dir, history) = fresh().await;
    let (sender, mut writer) = history.writer(settings(10_000), None);
    let now = now_ms();
    let old = (now - 31 * DAY_MS) / 60_000 * 60_000;
    record(&mut writer, &sender, "dryer", old, 600).await;
    drop((sender, writer));

    let (sender, writer) = history.writer(settings(10), None);
    sender.sample(sample("dryer", now, &[]));
    let cancel = CancellationToken::new();
    let task = tokio::spawn(writer.run(cancel.clone()));
    let deadline = tokio::time::Instant::now() + Duration::from_secs(20);
    while count(&history, "samples").await != 1 || count(&history, "minute rollups").await != 10 {
        assert!(
            tokio::time::Instant::now() < deadline,
            "run never rolled up and pruned: {} samples, {} minutes",
            count(&history, "samples").await,
            count(&history, "minute rollups").await
        );
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    cancel.cancel();
    task.await.unwrap();
}

#[tokio::test]
async fn retention_goes_through_the_block_key_rather_than_scanning_the_table() {
    let (_dir, history) = fresh().await;
    let plan: Vec<String> =
        sqlx::query(sqlx::AssertSqlSafe(format!("EXPLAIN QUERY PLAN {}", writer::PRUNE_SQL)))
            .bind(0_i64)
            .bind(500_i64)
            .fetch_all(&history.pool)
            .await
            .unwrap()
            .iter()
            .map(|r| r.get::<String, _>(3))
            .collect();
    assert!(
        plan.iter().all(|step| !step.starts_with("SCAN b") && !step.starts_with("SCAN sample_blocks")),
        "{plan:#?}"
    );
    assert!(
        plan.iter().any(|step| step.contains("SEARCH b USING PRIMARY KEY (loop=? AND first_ms<?)")),
        "{plan:#?}"
    );
}

#[tokio::test]
async fn rollups_hold_each_minutes_and_hours_min_mean_and_max_and_trends_from_them_match_the_raw_samples() {
    let (_dir, history) = fresh().await;
    let (sender, mut writer) = history.writer(settings(10_000), None);
    let start = 1_000 * 3_600_000;
    // Objective k % 60 and applied k, estimate 2k: every minute the same objective.
    record(&mut writer, &sender, "boiler", start, 7_200).await;
    roll_up_all(&mut writer, start + 3 * 3_600_000).await;
    assert_eq!(count(&history, "minute rollups").await, 120);
    assert_eq!(count(&history, "rollups").await, 122);
    let row: (i64, i64, f64, f64, f64) = sqlx::query_as(
        "SELECT ticks, faults, objective_min, objective_mean, objective_max FROM rollups
         WHERE period_s = 60 AND start_ms = ?1",
    )
    .bind(start + 7 * 60_000)
    .fetch_one(&history.pool)
    .await
    .unwrap();
    assert_eq!(row, (60, 0, 0.0, 29.5, 59.0));
    let applied: (f64, f64, f64, f64) = sqlx::query_as(
        "SELECT applied_min, applied_mean, applied_max, estimate_mean FROM rollup_inputs
         WHERE period_s = 3600 AND start_ms = ?1",
    )
    .bind(start + 3_600_000)
    .fetch_one(&history.pool)
    .await
    .unwrap();
    assert_eq!(applied, (3600.0, 5399.5, 7199.0, 10799.0));

    let inputs = ["u".to_owned()];
    let until = start + 7_200_000;
    for (bucket, resolution) in [(600_000, Resolution::Minute), (3_600_000, Resolution::Hour)] {
        let raw = history.trend("boiler", &inputs, start, until, bucket, Resolution::Raw).await.unwrap();
        let rolled = history.trend("boiler", &inputs, start, until, bucket, resolution).await.unwrap();
        assert_eq!(raw.len(), (7_200_000 / bucket) as usize);
        assert_eq!(rolled.len(), raw.len(), "{resolution:?}");
        for (r, b) in raw.iter().zip(&rolled) {
            assert_eq!((r.start_ms, r.samples), (b.start_ms, b.samples));
            assert_eq!((r.objective[0], r.objective[2]), (b.objective[0], b.objective[2]));
            let close = |x: Option<f64>, y: Option<f64>| {
                (x.unwrap() - y.unwrap()).abs() <= 1e-9 * x.unwrap().abs().max(1.0)
            };
            assert!(close(r.objective[1], b.objective[1]), "{r:?} {b:?}");
            assert!(
                close(r.inputs[0].0, b.inputs[0].0) && close(r.inputs[0].1, b.inputs[0].1),
                "{r:?} {b:?}"
            );
        }
    }
}

#[tokio::test]
async fn a_restarted_writer_fills_the_block_it_left_and_a_clock_set_back_never_overwrites_a_block() {
    let (_dir, history) = fresh().await;
    let (sender, mut writer) = history.writer(settings(100), None);
    for k in 0..10 {
        sender.sample(sample("boiler", 1_000_000 + k * 100, &[("u", k as f64, 0.0, 0.0)]));
    }
    writer.step().await.unwrap().unwrap();
    drop((sender, writer));
    let (sender, mut writer) = history.writer(settings(100), None);
    for k in 10..20 {
        sender.sample(sample("boiler", 1_000_000 + k * 100, &[("u", k as f64, 0.0, 0.0)]));
    }
    writer.step().await.unwrap().unwrap();
    assert_eq!(
        (count(&history, "blocks").await, count(&history, "samples").await),
        (0, 20),
        "one open block"
    );
    // The clock set back by a second, twice: new blocks, each under a key of its own.
    for round in 0..2 {
        for k in 0..5 {
            sender.sample(sample("boiler", 1_000_000 + k * 100, &[("u", 100.0 + round as f64, 0.0, 0.0)]));
        }
        writer.step().await.unwrap().unwrap();
    }
    assert_eq!(count(&history, "samples").await, 30);
    let rows = history.samples("boiler", None, None, 100).await.unwrap();
    assert_eq!(rows.len(), 30);
    let applied: Vec<f64> = rows.iter().map(|r| r.inputs[0].1.applied.unwrap()).collect();
    assert_eq!(applied.iter().filter(|a| **a == 100.0).count(), 5);
    assert_eq!(applied.iter().filter(|a| **a == 101.0).count(), 5);
}

#[tokio::test]
async fn rows_of_the_old_layout_are_converted_into_blocks_with_every_value_kept() {
    let (_dir, history) = fresh().await;
    sqlx::raw_sql(
        "CREATE TABLE samples (id INTEGER PRIMARY KEY, loop TEXT NOT NULL, at_ms INTEGER NOT NULL,
             objective REAL, state TEXT NOT NULL, inputs TEXT NOT NULL, phase TEXT, constraints TEXT) STRICT;
         INSERT INTO samples (loop, at_ms, objective, state, inputs, phase, constraints) VALUES
             ('dryer', 3000, 7.5, 'seeking', '{\"t\":{\"applied\":180.25,\"estimate\":180.0,\"gradient\":-0.001}}', 'averaging', NULL),
             ('boiler', 2000, NULL, 'fallback', '{\"o2\":{\"applied\":null,\"estimate\":2.5,\"gradient\":null}}', NULL,
              '{\"co\":null,\"stack\":212.5}'),
             ('boiler', 1000, 85.125, 'seeking', '{\"o2\":{\"applied\":2.55,\"estimate\":2.5}}', NULL, '{\"co\":120.0,\"stack\":211.0}');",
    )
    .execute(&history.pool)
    .await
    .unwrap();
    assert_eq!(legacy::convert(&history.pool).await.unwrap(), 3);
    let exists: bool =
        sqlx::query_scalar("SELECT EXISTS (SELECT 1 FROM sqlite_schema WHERE name = 'samples')")
            .fetch_one(&history.pool)
            .await
            .unwrap();
    assert!(!exists, "the old table is dropped");
    let boiler = history.samples("boiler", None, None, 10).await.unwrap();
    assert_eq!(boiler.iter().map(|r| r.at_ms).collect::<Vec<_>>(), [1000, 2000]);
    assert_eq!((boiler[0].objective, boiler[0].state.as_str()), (Some(85.125), "seeking"));
    assert_eq!(
        boiler[0].inputs,
        [("o2".to_owned(), InputValues { applied: Some(2.55), estimate: Some(2.5), gradient: None })]
    );
    assert_eq!(boiler[0].constraints, [("co".to_owned(), Some(120.0)), ("stack".to_owned(), Some(211.0))]);
    assert_eq!((boiler[1].objective, boiler[1].state.as_str()), (None, "fallback"));
    assert_eq!(boiler[1].constraints, [("co".to_owned(), None), ("stack".to_owned(), Some(212.5))]);
    let dryer = history.samples("dryer", None, None, 10).await.unwrap();
    assert_eq!((dryer[0].phase.as_deref(), dryer[0].inputs[0].1.applied), (Some("averaging"), Some(180.25)));
    // Nothing to do the second time.
    assert_eq!(legacy::convert(&history.pool).await.unwrap(), 0);
}

#[tokio::test]
async fn a_trend_from_rollups_reaches_the_present_from_raw_samples_past_the_last_closed_minute() {
    let (_dir, history) = fresh().await;
    let (sender, mut writer) = history.writer(settings(10_000), None);
    let start = 1_000 * 3_600_000;
    record(&mut writer, &sender, "boiler", start, 150).await;
    // The writer saw minute 2 begin: minutes 0 and 1 are closed and rolled up, 2 is open.
    roll_up_all(&mut writer, start).await;
    assert_eq!(count(&history, "minute rollups").await, 2);
    let inputs = ["u".to_owned()];
    let trend =
        history.trend("boiler", &inputs, start, start + 180_000, 60_000, Resolution::Minute).await.unwrap();
    let samples: Vec<i64> = trend.iter().map(|b| b.samples).collect();
    assert_eq!(samples, [60, 60, 30]);
    assert_eq!(trend[2].objective, [Some(0.0), Some(14.5), Some(29.0)]);
}
