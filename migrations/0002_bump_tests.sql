-- Bump tests started through the API: the staircase's levels as they were held, and once
-- done the fitted plant and recommended tuning. `levels` is a JSON array of
-- {"setpoint", "from", "to", "settled_objective"}; `result` the JSON of `ridgeline tune
-- --json`, or NULL with `fit_error` saying why the record could not be fitted. A test
-- still `running` when the service starts was cut short by a stop and is marked aborted.
CREATE TABLE bump_tests (
    id             INTEGER PRIMARY KEY,
    loop           TEXT    NOT NULL,
    input          TEXT    NOT NULL,
    status         TEXT    NOT NULL,
    step           REAL    NOT NULL,
    settle_max_s   REAL    NOT NULL,
    setpoints      TEXT    NOT NULL,
    started_at_ms  INTEGER NOT NULL,
    finished_at_ms INTEGER,
    abort_reason   TEXT,
    levels         TEXT    NOT NULL,
    result         TEXT,
    fit_error      TEXT,
    actor          TEXT    NOT NULL
) STRICT;
