//! Samples into blocks: the writer's side of the compact layout, inside the caller's
//! transaction, with what it learned kept only once that transaction commits.

use std::collections::HashMap;
use std::collections::hash_map::Entry;
use std::sync::{Arc, LazyLock};

use sqlx::Row;
use sqlx::sqlite::SqliteConnection;

use super::blocks::{Builder, Layout};
use super::{HistoryError, SampleRecord};

/// Blocks per multi-row statement: one statement for 40 blocks (about 1,000 samples)
/// costs far less than 40, and 200 parameters stay well inside SQLite's limit.
const BLOCKS_PER_STATEMENT: usize = 40;
/// Statements that size up to this many blocks are prepared once and cached; the writer's
/// connection keeps room for them.
pub(super) const STATEMENTS: usize = 2 * BLOCKS_PER_STATEMENT;

/// `SEAL[n - 1]` inserts `n` full blocks; `SAVE_OPEN[n - 1]` saves `n` open ones.
static SEAL: LazyLock<Vec<String>> = LazyLock::new(|| {
    statements("INSERT INTO sample_blocks (loop, first_ms, samples, layout, data) VALUES ", "")
});
static SAVE_OPEN: LazyLock<Vec<String>> = LazyLock::new(|| {
    statements(
        "INSERT INTO open_blocks (loop, first_ms, samples, layout, data) VALUES ",
        " ON CONFLICT (loop) DO UPDATE SET first_ms = excluded.first_ms, samples = excluded.samples,
              layout = excluded.layout, data = excluded.data",
    )
});

fn statements(head: &str, tail: &str) -> Vec<String> {
    (1..=BLOCKS_PER_STATEMENT)
        .map(|n| format!("{head}{}{tail}", vec!["(?, ?, ?, ?, ?)"; n].join(", ")))
        .collect()
}

/// What the writer knows of the blocks and names in the database, as last committed.
#[derive(Debug, Default)]
pub(super) struct Packer {
    names: HashMap<Arc<str>, i64>,
    loops: HashMap<i64, LoopBlocks>,
}

/// A loop's block being filled, and the highest block key it has.
#[derive(Debug, Clone)]
struct LoopBlocks {
    open: Option<Builder>,
    top_key: i64,
}

/// What one call of [`Packer::pack`] wrote, to adopt once its transaction commits.
#[derive(Debug, Default)]
pub(super) struct Packed {
    names: Vec<(Arc<str>, i64)>,
    loops: Vec<(i64, LoopBlocks)>,
    /// Per loop id, its newest sample's time in the batch.
    pub newest: Vec<(i64, i64)>,
}

impl Packer {
    /// Writes `samples` into the loops' blocks: each sample joins its loop's open block when
    /// it fits (same inputs and constraints, not earlier, within the block's span and
    /// size); otherwise that block is sealed into `sample_blocks` and a new one begins. The
    /// open blocks are saved to `open_blocks`. Nothing of this is remembered until
    /// [`Packer::adopt`] is given the result.
    pub async fn pack(
        &self,
        conn: &mut SqliteConnection,
        samples: &[SampleRecord],
    ) -> Result<Packed, HistoryError> {
        let mut names: HashMap<Arc<str>, i64> = HashMap::new();
        let mut loops: HashMap<i64, LoopBlocks> = HashMap::new();
        let mut newest: HashMap<i64, i64> = HashMap::new();
        let mut sealed: Vec<(i64, Builder)> = Vec::new();
        let (mut values, mut layout, mut encoded) = (Vec::new(), Layout::default(), Vec::new());
        for s in samples {
            let loop_id = self.id(conn, &mut names, &s.loop_name).await?;
            layout.inputs.clear();
            for i in &s.inputs {
                layout.inputs.push(self.id(conn, &mut names, &i.name).await?);
            }
            layout.constraints.clear();
            for (name, _) in &s.constraints {
                layout.constraints.push(self.id(conn, &mut names, name).await?);
            }
            let state = self.id(conn, &mut names, &s.state).await?;
            let phase = match s.phase.as_deref() {
                Some(phase) => self.id(conn, &mut names, phase).await?,
                None => 0,
            };
            values.clear();
            values.push(s.objective.unwrap_or(f64::NAN));
            values.extend(s.inputs.iter().flat_map(|i| [i.applied, i.estimate, i.gradient]));
            values.extend(s.constraints.iter().map(|(_, v)| *v));
            layout.encode_into(&mut encoded);

            let blocks = match loops.entry(loop_id) {
                Entry::Occupied(e) => e.into_mut(),
                Entry::Vacant(e) => e.insert(match self.loops.get(&loop_id) {
                    Some(known) => known.clone(),
                    None => load(conn, loop_id).await?,
                }),
            };
            if !blocks.open.as_ref().is_some_and(|b| b.takes(s.at_ms, state, phase, &encoded, values.len())) {
                if let Some(full) = blocks.open.take().filter(|b| b.samples > 0) {
                    sealed.push((loop_id, full));
                }
                let key = free_key(conn, &sealed, loop_id, s.at_ms, blocks.top_key).await?;
                blocks.top_key = blocks.top_key.max(key);
                blocks.open = Some(Builder::new(key, encoded.clone()));
            }
            if let Some(open) = &mut blocks.open {
                open.push(s.at_ms, state, phase, &values);
            }
            let at = newest.entry(loop_id).or_insert(s.at_ms);
            *at = (*at).max(s.at_ms);
        }
        write_blocks(conn, &SEAL, &sealed).await?;
        let open: Vec<(i64, &Builder)> =
            loops.iter().filter_map(|(id, blocks)| blocks.open.as_ref().map(|b| (*id, b))).collect();
        write_blocks(conn, &SAVE_OPEN, &open).await?;
        Ok(Packed {
            names: names.into_iter().collect(),
            loops: loops.into_iter().collect(),
            newest: newest.into_iter().collect(),
        })
    }

    /// Remembers what a committed [`Packer::pack`] wrote.
    pub fn adopt(&mut self, packed: Packed) {
        self.names.extend(packed.names);
        self.loops.extend(packed.loops);
    }

    /// The id of `name`, adding it to `names` if the database does not have it yet.
    async fn id(
        &self,
        conn: &mut SqliteConnection,
        new: &mut HashMap<Arc<str>, i64>,
        name: &str,
    ) -> Result<i64, HistoryError> {
        if let Some(id) = self.names.get(name).or_else(|| new.get(name)) {
            return Ok(*id);
        }
        let id: i64 = sqlx::query_scalar(
            "INSERT INTO names (name) VALUES (?1) ON CONFLICT (name) DO UPDATE SET name = excluded.name RETURNING id",
        )
        .bind(name)
        .fetch_one(&mut *conn)
        .await?;
        new.insert(name.into(), id);
        Ok(id)
    }
}

/// A loop's open block and highest block key as the database has them.
async fn load(conn: &mut SqliteConnection, loop_id: i64) -> Result<LoopBlocks, HistoryError> {
    let sealed: Option<i64> = sqlx::query_scalar("SELECT max(first_ms) FROM sample_blocks WHERE loop = ?1")
        .bind(loop_id)
        .fetch_one(&mut *conn)
        .await?;
    let row = sqlx::query("SELECT first_ms, layout, data FROM open_blocks WHERE loop = ?1")
        .bind(loop_id)
        .fetch_optional(&mut *conn)
        .await?;
    let open = match row {
        Some(r) => match Builder::resume(r.try_get(0)?, r.try_get(1)?, r.try_get(2)?) {
            Ok(open) => Some(open),
            Err(e) => {
                tracing::error!(loop_id, error = %e, "the block a loop was filling cannot be read; it is replaced");
                None
            }
        },
        None => None,
    };
    let top_key = sealed.into_iter().chain(open.as_ref().map(|b| b.first_ms)).max().unwrap_or(i64::MIN);
    Ok(LoopBlocks { open, top_key })
}

/// Writes `blocks` with the statements of `sizes`, as many to a statement as they take.
async fn write_blocks<B: std::borrow::Borrow<Builder>>(
    conn: &mut SqliteConnection,
    sizes: &'static [String],
    blocks: &[(i64, B)],
) -> Result<(), HistoryError> {
    for chunk in blocks.chunks(BLOCKS_PER_STATEMENT) {
        let mut query = sqlx::query(sizes[chunk.len() - 1].as_str());
        for (loop_id, block) in chunk {
            let block = block.borrow();
            query = query
                .bind(*loop_id)
                .bind(block.first_ms)
                .bind(block.samples)
                .bind(block.layout.clone())
                .bind(block.data.clone());
        }
        query.execute(&mut *conn).await?;
    }
    Ok(())
}

/// The key for a new block whose first sample is at `at_ms`: that time, unless a block of
/// the loop already has it, stored or `sealed` in this batch (a clock set back, or more
/// samples in one millisecond than a block holds), then the next free millisecond.
async fn free_key(
    conn: &mut SqliteConnection,
    sealed: &[(i64, Builder)],
    loop_id: i64,
    at_ms: i64,
    top_key: i64,
) -> Result<i64, HistoryError> {
    if at_ms > top_key {
        return Ok(at_ms);
    }
    let mut key = at_ms;
    loop {
        if sealed.iter().any(|(id, b)| *id == loop_id && b.first_ms == key) {
            key += 1;
            continue;
        }
        let taken: bool = sqlx::query_scalar(
            "SELECT EXISTS (SELECT 1 FROM sample_blocks WHERE loop = ?1 AND first_ms = ?2)",
        )
        .bind(loop_id)
        .bind(key)
        .fetch_one(&mut *conn)
        .await?;
        if !taken {
            return Ok(key);
        }
        key += 1;
    }
}
