//! The move from one row per sample (versions before the compact layout) to blocks: done
//! in place when the service opens such a database, in batches, logging its progress.

use std::sync::Arc;
use std::time::{Duration, Instant};

use sqlx::sqlite::SqlitePool;
use sqlx::{Connection, Row};

use super::packing::Packer;
use super::{HistoryError, InOrder, InputSample, InputValues, SampleRecord, rfc3339};

/// Rows converted per transaction: memory stays bounded whatever the size of the table,
/// and a conversion cut short resumes where it stopped.
const BATCH_ROWS: i64 = 5000;
const PROGRESS_EVERY: Duration = Duration::from_secs(5);

/// Converts every row of the old `samples` table into blocks, deleting each batch of rows
/// in the transaction that writes its blocks, then drops the table. Nothing to do (and no
/// cost) on a database without that table.
pub(super) async fn convert(pool: &SqlitePool) -> Result<u64, HistoryError> {
    let exists: bool = sqlx::query_scalar(
        "SELECT EXISTS (SELECT 1 FROM sqlite_schema WHERE type = 'table' AND name = 'samples')",
    )
    .fetch_one(pool)
    .await?;
    if !exists {
        return Ok(0);
    }
    let total: i64 = sqlx::query_scalar("SELECT count(*) FROM samples").fetch_one(pool).await?;
    if total > 0 {
        tracing::info!(samples = total, "converting stored samples to the compact layout");
    }
    let mut conn = pool.acquire().await?;
    let mut packer = Packer::default();
    let (mut done, started, mut reported) = (0u64, Instant::now(), Instant::now());
    loop {
        let mut tx = (*conn).begin_with("BEGIN IMMEDIATE").await?;
        // In the old index's order, so each loop's samples come in time order.
        let rows = sqlx::query(
            "SELECT id, loop, at_ms, objective, state, inputs, phase, constraints FROM samples
             ORDER BY loop, at_ms, id LIMIT ?1",
        )
        .bind(BATCH_ROWS)
        .fetch_all(&mut *tx)
        .await?;
        if rows.is_empty() {
            sqlx::query("DROP TABLE samples").execute(&mut *tx).await?;
            tx.commit().await?;
            break;
        }
        let mut ids = Vec::with_capacity(rows.len());
        let mut records = Vec::with_capacity(rows.len());
        for r in &rows {
            ids.push(r.try_get::<i64, _>(0)?);
            records.push(record(r)?);
        }
        let packed = packer.pack(&mut tx, &records).await?;
        sqlx::query("DELETE FROM samples WHERE id IN (SELECT value FROM json_each(?1))")
            .bind(serde_json::to_string(&ids).unwrap_or_default())
            .execute(&mut *tx)
            .await?;
        tx.commit().await?;
        packer.adopt(packed);
        done += rows.len() as u64;
        if reported.elapsed() >= PROGRESS_EVERY {
            reported = Instant::now();
            tracing::info!(converted = done, of = total, "converting stored samples to the compact layout");
        }
    }
    if done > 0 {
        tracing::info!(
            converted = done,
            seconds = started.elapsed().as_secs_f64(),
            "stored samples converted to the compact layout; the space they took is reused by new history"
        );
    }
    Ok(done)
}

/// An old row as the record the writer would have been given for it.
fn record(r: &sqlx::sqlite::SqliteRow) -> Result<SampleRecord, HistoryError> {
    let (loop_name, at_ms): (String, i64) = (r.try_get(1)?, r.try_get(2)?);
    let corrupt = |what: &str, e: serde_json::Error| {
        HistoryError::Corrupt(format!("the {what} of loop {loop_name}'s sample at {}: {e}", rfc3339(at_ms)))
    };
    let inputs: InOrder<InputValues> =
        serde_json::from_str(r.try_get(5)?).map_err(|e| corrupt("inputs", e))?;
    let constraints: Option<&str> = r.try_get(7)?;
    let constraints: InOrder<Option<f64>> = match constraints {
        Some(text) => serde_json::from_str(text).map_err(|e| corrupt("constraints", e))?,
        None => InOrder(Vec::new()),
    };
    let missing = |v: Option<f64>| v.unwrap_or(f64::NAN);
    Ok(SampleRecord {
        loop_name: loop_name.as_str().into(),
        tick: 0,
        at_ms,
        objective: r.try_get(3)?,
        state: r.try_get::<String, _>(4)?.into(),
        inputs: inputs
            .0
            .into_iter()
            .map(|(name, v)| InputSample {
                name: name.into(),
                applied: missing(v.applied),
                estimate: missing(v.estimate),
                gradient: missing(v.gradient),
            })
            .collect(),
        phase: r.try_get::<Option<String>, _>(6)?.map(Into::into),
        constraints: constraints.0.into_iter().map(|(name, v)| (Arc::from(name), missing(v))).collect(),
        resumable: false,
    })
}
