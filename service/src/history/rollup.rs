//! One-minute and one-hour aggregates of each loop's samples, written as minutes close and
//! kept long after the samples themselves: what long trends are drawn from.

use std::collections::BTreeMap;

use sqlx::Row;
use sqlx::sqlite::SqliteConnection;

use super::HistoryError;
use super::blocks::{self, Layout, MAX_BLOCK_SPAN_MS};

pub(super) const MINUTE_MS: i64 = 60_000;
pub(super) const HOUR_MS: i64 = 3_600_000;

/// The start of the period of `period_ms` that `ms` lies in.
pub(super) fn floor_to(ms: i64, period_ms: i64) -> i64 {
    ms.div_euclid(period_ms) * period_ms
}

/// Min, mean and max of the finite values seen, and how many there were.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub(super) struct Stat {
    pub n: i64,
    min: f64,
    sum: f64,
    max: f64,
}

impl Stat {
    pub fn add(&mut self, v: Option<f64>) {
        let Some(v) = v else { return };
        if self.n == 0 {
            (self.min, self.max) = (v, v);
        }
        self.n += 1;
        self.sum += v;
        self.min = self.min.min(v);
        self.max = self.max.max(v);
    }

    /// (min, mean, max), each `None` when no value was finite.
    pub fn triple(&self) -> [Option<f64>; 3] {
        if self.n == 0 {
            return [None; 3];
        }
        [Some(self.min), Some(self.sum / self.n as f64), Some(self.max)]
    }
}

/// One loop's samples of one minute, aggregated.
#[derive(Debug, Clone, Default, PartialEq)]
pub(super) struct Minute {
    pub ticks: i64,
    pub faults: i64,
    /// Ticks per state id, in the order first seen.
    states: Vec<(i64, i64)>,
    pub objective: Stat,
    /// Per input name id: applied and estimate.
    pub inputs: Vec<(i64, Stat, Stat)>,
}

impl Minute {
    /// Adds one sample whose inputs are named by `layout`; `fault` is whether its state is
    /// a fault (fallback).
    pub fn add(&mut self, view: &blocks::View<'_>, layout: &Layout, fault: bool) {
        self.ticks += 1;
        self.faults += i64::from(fault);
        match self.states.iter_mut().find(|(s, _)| *s == view.state) {
            Some((_, n)) => *n += 1,
            None => self.states.push((view.state, 1)),
        }
        self.objective.add(view.objective());
        for (k, &input) in layout.inputs.iter().enumerate() {
            let [applied, estimate, _] = view.input(k);
            let slot = match self.inputs.iter().position(|(id, ..)| *id == input) {
                Some(i) => i,
                None => {
                    self.inputs.push((input, Stat::default(), Stat::default()));
                    self.inputs.len() - 1
                }
            };
            self.inputs[slot].1.add(applied);
            self.inputs[slot].2.add(estimate);
        }
    }

    /// The state held for the most ticks (the first seen of those tied).
    pub fn state(&self) -> i64 {
        let most = self.states.iter().map(|(_, n)| *n).max().unwrap_or(0);
        self.states.iter().find(|(_, n)| *n == most).map_or(0, |(s, _)| *s)
    }
}

/// Rolls up loop `loop_id`'s samples with `from_ms <= at < until_ms` (both on minute
/// boundaries) into one row per minute that has samples, and then every hour that ends
/// within the range into one row from its minutes. Rows already there are replaced, so
/// doing a range again is harmless. `fault_state` is the name id of the fault state.
/// Holds one aggregate per minute of the range in memory: callers keep ranges short.
pub(super) async fn roll_up(
    conn: &mut SqliteConnection,
    loop_id: i64,
    fault_state: i64,
    from_ms: i64,
    until_ms: i64,
) -> Result<usize, HistoryError> {
    let mut minutes: BTreeMap<i64, Minute> = BTreeMap::new();
    let rows = sqlx::query(
        "SELECT first_ms, layout, data FROM sample_blocks WHERE loop = ?1 AND first_ms > ?2 AND first_ms < ?3
         UNION ALL
         SELECT first_ms, layout, data FROM open_blocks WHERE loop = ?1 AND first_ms > ?2 AND first_ms < ?3",
    )
    .bind(loop_id)
    .bind(from_ms - MAX_BLOCK_SPAN_MS)
    .bind(until_ms + MAX_BLOCK_SPAN_MS)
    .fetch_all(&mut *conn)
    .await?;
    for r in &rows {
        let (first_ms, layout, data): (i64, &[u8], &[u8]) = (r.try_get(0)?, r.try_get(1)?, r.try_get(2)?);
        let layout = Layout::decode(layout)?;
        for view in blocks::decode(first_ms, &layout, data) {
            let view = view?;
            if (from_ms..until_ms).contains(&view.at_ms) {
                let minute = minutes.entry(floor_to(view.at_ms, MINUTE_MS)).or_default();
                minute.add(&view, &layout, view.state == fault_state);
            }
        }
    }
    for (start_ms, m) in &minutes {
        let [min, mean, max] = m.objective.triple();
        sqlx::query(
            "INSERT OR REPLACE INTO rollups (loop, period_s, start_ms, ticks, faults, state, objective_n,
                 objective_min, objective_mean, objective_max) VALUES (?1, 60, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9)",
        )
        .bind(loop_id)
        .bind(start_ms)
        .bind(m.ticks)
        .bind(m.faults)
        .bind(m.state())
        .bind(m.objective.n)
        .bind(min)
        .bind(mean)
        .bind(max)
        .execute(&mut *conn)
        .await?;
        for (input, applied, estimate) in &m.inputs {
            let ([a_min, a_mean, a_max], [e_min, e_mean, e_max]) = (applied.triple(), estimate.triple());
            sqlx::query(
                "INSERT OR REPLACE INTO rollup_inputs (loop, period_s, start_ms, input, applied_n, applied_min,
                     applied_mean, applied_max, estimate_n, estimate_min, estimate_mean, estimate_max)
                 VALUES (?1, 60, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)",
            )
            .bind(loop_id)
            .bind(start_ms)
            .bind(input)
            .bind(applied.n)
            .bind(a_min)
            .bind(a_mean)
            .bind(a_max)
            .bind(estimate.n)
            .bind(e_min)
            .bind(e_mean)
            .bind(e_max)
            .execute(&mut *conn)
            .await?;
        }
    }
    let mut hour = floor_to(from_ms, HOUR_MS);
    while hour + HOUR_MS <= until_ms {
        roll_up_hour(conn, loop_id, hour).await?;
        hour += HOUR_MS;
    }
    Ok(minutes.len())
}

/// The hour from `hour_ms` as one row from its minute rows (none if it has none), and its
/// inputs likewise. Both statements take the loop, the hour and its end.
const HOUR_SQL: [&str; 2] = [
    "INSERT OR REPLACE INTO rollups (loop, period_s, start_ms, ticks, faults, state, objective_n,
         objective_min, objective_mean, objective_max)
     SELECT ?1, 3600, ?2, sum(ticks), sum(faults),
         (SELECT state FROM rollups WHERE loop = ?1 AND period_s = 60 AND start_ms >= ?2 AND start_ms < ?3
          GROUP BY state ORDER BY sum(ticks) DESC, min(start_ms) LIMIT 1),
         sum(objective_n), min(objective_min),
         sum(objective_mean * objective_n) / nullif(sum(objective_n), 0), max(objective_max)
     FROM rollups WHERE loop = ?1 AND period_s = 60 AND start_ms >= ?2 AND start_ms < ?3
     HAVING count(*) > 0",
    "INSERT OR REPLACE INTO rollup_inputs (loop, period_s, start_ms, input, applied_n, applied_min,
         applied_mean, applied_max, estimate_n, estimate_min, estimate_mean, estimate_max)
     SELECT ?1, 3600, ?2, input,
         sum(applied_n), min(applied_min), sum(applied_mean * applied_n) / nullif(sum(applied_n), 0), max(applied_max),
         sum(estimate_n), min(estimate_min), sum(estimate_mean * estimate_n) / nullif(sum(estimate_n), 0),
         max(estimate_max)
     FROM rollup_inputs WHERE loop = ?1 AND period_s = 60 AND start_ms >= ?2 AND start_ms < ?3
     GROUP BY input",
];

async fn roll_up_hour(conn: &mut SqliteConnection, loop_id: i64, hour_ms: i64) -> Result<(), HistoryError> {
    for sql in HOUR_SQL {
        sqlx::query(sql).bind(loop_id).bind(hour_ms).bind(hour_ms + HOUR_MS).execute(&mut *conn).await?;
    }
    Ok(())
}

/// Where loop `loop_id`'s rollups end: every minute before it is rolled up. With none
/// yet, the start of the minute before its first stored sample's; `None` when it has no
/// samples.
pub(super) async fn rolled_through(
    conn: &mut SqliteConnection,
    loop_id: i64,
) -> Result<Option<i64>, HistoryError> {
    let through: Option<i64> = sqlx::query_scalar("SELECT through_ms FROM rollup_progress WHERE loop = ?1")
        .bind(loop_id)
        .fetch_optional(&mut *conn)
        .await?;
    match through {
        Some(through) => Ok(Some(through)),
        None => next_minute_from(conn, loop_id, i64::MIN).await,
    }
}

pub(super) async fn set_rolled_through(
    conn: &mut SqliteConnection,
    loop_id: i64,
    through_ms: i64,
) -> Result<(), HistoryError> {
    sqlx::query("INSERT OR REPLACE INTO rollup_progress (loop, through_ms) VALUES (?1, ?2)")
        .bind(loop_id)
        .bind(through_ms)
        .execute(&mut *conn)
        .await?;
    Ok(())
}

/// The minute before the one loop `loop_id`'s first block keyed at or after `from_ms`
/// starts in (where rolling up can go on from, past a gap); `None` without such a block.
pub(super) async fn next_minute_from(
    conn: &mut SqliteConnection,
    loop_id: i64,
    from_ms: i64,
) -> Result<Option<i64>, HistoryError> {
    let next: Option<i64> = sqlx::query_scalar(
        "SELECT min(first_ms) FROM (SELECT min(first_ms) AS first_ms FROM sample_blocks WHERE loop = ?1 AND first_ms >= ?2
                                   UNION ALL SELECT first_ms FROM open_blocks WHERE loop = ?1 AND first_ms >= ?2)",
    )
    .bind(loop_id)
    .bind(from_ms)
    .fetch_one(&mut *conn)
    .await?;
    // A block's key can be a little after its first sample, never a minute after.
    Ok(next.map(|k| floor_to(k, MINUTE_MS) - MINUTE_MS))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_stat_leaves_out_values_that_were_not_finite_and_has_none_without_any() {
        let mut s = Stat::default();
        assert_eq!(s.triple(), [None, None, None]);
        for v in [Some(2.0), None, Some(-1.0), Some(5.0)] {
            s.add(v);
        }
        assert_eq!(s.n, 3);
        assert_eq!(s.triple(), [Some(-1.0), Some(2.0), Some(5.0)]);
    }

    #[test]
    fn a_minute_keeps_the_state_held_longest_and_counts_faults() {
        let layout = Layout { inputs: vec![40], constraints: vec![] };
        let mut b = blocks::Builder::new(0, layout.encode());
        for (k, state) in [7, 9, 9, 7, 9].iter().enumerate() {
            b.push(k as i64 * 100, *state, 0, &[1.0, k as f64, 2.0 * k as f64, 0.0]);
        }
        let mut m = Minute::default();
        for view in blocks::decode(0, &layout, &b.data) {
            let view = view.unwrap();
            m.add(&view, &layout, view.state == 7);
        }
        assert_eq!((m.ticks, m.faults, m.state()), (5, 2, 9));
        assert_eq!(m.inputs[0].0, 40);
        assert_eq!(m.inputs[0].1.triple(), [Some(0.0), Some(2.0), Some(4.0)]);
        assert_eq!(m.inputs[0].2.triple(), [Some(0.0), Some(4.0), Some(8.0)]);
    }
}
