-- Compact history: samples packed into blocks of binary records (the layout is described
-- in service/src/history/blocks.rs and docs/history.md), names stored once, and one-minute
-- and one-hour rollups that outlive the raw samples. The old `samples` table is converted
-- into blocks by the service after this migration, in batches, and then dropped.

-- Every loop, state, phase, input and constraint name, stored once; the tables below refer
-- to names by id.
CREATE TABLE names (
    id   INTEGER PRIMARY KEY,
    name TEXT    NOT NULL UNIQUE
) STRICT;

-- A loop's consecutive samples, less than a minute and at most 980 bytes of them:
-- `layout` lists the input and constraint name ids the samples carry, `data` holds the
-- samples. Keyed by (loop, first_ms), which serves the API's time-range reads and
-- retention without any other index. first_ms is the time of the block's first sample,
-- or a few milliseconds later when another block of the loop already had that key.
-- Blocks are written once, when full, so pages fill up.
CREATE TABLE sample_blocks (
    loop     INTEGER NOT NULL,
    first_ms INTEGER NOT NULL,
    samples  INTEGER NOT NULL,
    layout   BLOB    NOT NULL,
    data     BLOB    NOT NULL,
    PRIMARY KEY (loop, first_ms)
) STRICT, WITHOUT ROWID;

-- The block each loop is filling, rewritten with each batch until it is full and moves to
-- sample_blocks. Readers see both.
CREATE TABLE open_blocks (
    loop     INTEGER PRIMARY KEY,
    first_ms INTEGER NOT NULL,
    samples  INTEGER NOT NULL,
    layout   BLOB    NOT NULL,
    data     BLOB    NOT NULL
) STRICT, WITHOUT ROWID;

-- Aggregates of a loop's samples per minute (period_s = 60) and per hour (3600): ticks
-- stored, ticks in fallback, the state that held for the most ticks, and the objective's
-- min, mean and max over its `objective_n` finite values (NULL when there were none).
CREATE TABLE rollups (
    loop           INTEGER NOT NULL,
    period_s       INTEGER NOT NULL,
    start_ms       INTEGER NOT NULL,
    ticks          INTEGER NOT NULL,
    faults         INTEGER NOT NULL,
    state          INTEGER NOT NULL,
    objective_n    INTEGER NOT NULL,
    objective_min  REAL,
    objective_mean REAL,
    objective_max  REAL,
    PRIMARY KEY (loop, period_s, start_ms)
) STRICT, WITHOUT ROWID;

-- How far each loop's samples are rolled up: every minute before through_ms. Samples are
-- deleted by retention only once rolled up.
CREATE TABLE rollup_progress (
    loop       INTEGER PRIMARY KEY,
    through_ms INTEGER NOT NULL
) STRICT;

-- Per input of a rollup: applied and estimate min, mean and max over their finite values.
CREATE TABLE rollup_inputs (
    loop          INTEGER NOT NULL,
    period_s      INTEGER NOT NULL,
    input         INTEGER NOT NULL,
    start_ms      INTEGER NOT NULL,
    applied_n     INTEGER NOT NULL,
    applied_min   REAL,
    applied_mean  REAL,
    applied_max   REAL,
    estimate_n    INTEGER NOT NULL,
    estimate_min  REAL,
    estimate_mean REAL,
    estimate_max  REAL,
    PRIMARY KEY (loop, period_s, start_ms, input)
) STRICT, WITHOUT ROWID;
