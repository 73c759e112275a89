-- The history store: every tick of every loop, the events, and the last estimate of each
-- loop's inputs. Times are Unix milliseconds UTC. A number that is not finite is stored as
-- NULL (JSON null in `inputs`), never as text or a sentinel.

-- One row per loop tick. Inputs are one JSON object rather than a row each, so a tick is
-- one insert whatever the number of inputs:
-- {"<input>": {"applied": 1.2, "estimate": 1.19, "gradient": -0.02}, ...} in config order.
CREATE TABLE samples (
    id        INTEGER PRIMARY KEY,
    loop      TEXT    NOT NULL,
    at_ms     INTEGER NOT NULL,
    objective REAL,
    state     TEXT    NOT NULL,
    inputs    TEXT    NOT NULL
) STRICT;

-- Serves both the per-loop time-range reads and retention, which deletes per loop.
CREATE INDEX samples_loop_at ON samples (loop, at_ms);

-- Mode changes, trips, recoveries, bound changes, link up/down, start and stop. `loop` is
-- NULL for events of the whole service; `detail` is a JSON value; `actor` is a token's
-- name or 'system'. Retention never deletes events.
CREATE TABLE events (
    id     INTEGER PRIMARY KEY,
    at_ms  INTEGER NOT NULL,
    loop   TEXT,
    kind   TEXT    NOT NULL,
    detail TEXT    NOT NULL,
    actor  TEXT    NOT NULL
) STRICT;

-- Newest first, of every loop and of one loop.
CREATE INDEX events_at ON events (at_ms);
CREATE INDEX events_loop_at ON events (loop, at_ms);

-- Where each input of each loop was last, for resuming after a restart. Upserted with
-- every batch of samples, only ever moving forward in time.
CREATE TABLE last_estimates (
    loop     TEXT    NOT NULL,
    input    TEXT    NOT NULL,
    estimate REAL    NOT NULL,
    at_ms    INTEGER NOT NULL,
    PRIMARY KEY (loop, input)
) STRICT, WITHOUT ROWID;
