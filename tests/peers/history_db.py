"""Reads and writes Ridgeline history databases with Python's own sqlite3, json and lzma,
for the checks of tests/tests/history_migration.rs: the old one-row-per-sample table as
releases before the compact layout wrote it, and the compact layout decoded by a decoder
of its own, written from the format in service/src/history/blocks.rs and nothing else.

    history_db.py unpack XZ OUT                 decompresses a fixture (lzma)
    history_db.py grow DB                       adds old-release rows before the DB's own
    history_db.py old-rows DB OUT               every old row, pickled to OUT for later
    history_db.py find-again OLD DB             every old row's values in DB's blocks?
    history_db.py rollups DB                    how many rollup rows (read-only)
    history_db.py progress DB                   rollup_progress per loop name (read-only)
    history_db.py check-rollups OLD DB          rollup rows against our own aggregates
    history_db.py integrity DB                  PRAGMA integrity_check (read-only)

Each command prints one JSON document on stdout.
"""

import gc
import json
import lzma
import math
import os
import pickle
import random
import sqlite3
import struct
import sys

MINUTE_MS = 60_000
HOUR_MS = 3_600_000


def read_only(path):
    # Read-only, so a database a service has open, or one it left behind when killed, is
    # looked at as it is: the service's own next start recovers its write-ahead log.
    return sqlite3.connect(f"file:{path}?mode=ro", uri=True)


def unpack(source, target):
    with lzma.open(source) as f, open(target, "wb") as out:
        out.write(f.read())
    return {"bytes": os.path.getsize(target)}


# --- The old release's format -------------------------------------------------------------


def old_number(x):
    """A float as the old writer's serde_json put it in JSON text (the shortest digits
    that read back exactly, a point up to 16 digits, an exponent past that or below
    1e-5: 1e-7, 0.00001, 1000000000000000.0, 1e+16), or null for a value that is not
    finite."""
    if x is None or not math.isfinite(x):
        return "null"
    shortest = repr(x)
    if "e" not in shortest:
        # From 1e-4 up to 1e16 repr lays the digits out the same way.
        return shortest
    sign = "-" if x < 0 else ""
    # repr gives the shortest digits that read back exactly, as ryu does; only the layout
    # (where the point goes, when an exponent is used and how) differs.
    mantissa, _, exp = repr(abs(x)).partition("e")
    whole, _, frac = mantissa.partition(".")
    digits = (whole + frac).lstrip("0")
    k = int(exp or 0) - len(frac)
    stripped = digits.rstrip("0")
    k += len(digits) - len(stripped)
    digits = stripped
    n = len(digits)
    kk = n + k  # the value is 0.digits x 10^kk
    if 0 <= k and kk <= 16:
        text = digits + "0" * k + ".0"
    elif 0 < kk <= 16:
        text = digits[:kk] + "." + digits[kk:]
    elif -5 < kk <= 0:
        text = "0." + "0" * (-kk) + digits
    elif n == 1:
        text = f"{digits}e{kk - 1:+}"
    else:
        text = f"{digits[0]}.{digits[1:]}e{kk - 1:+}"
    return sign + text


KEYS = {}


def old_object(pairs):
    """A JSON object in the old writer's compact form (no spaces), keys in the order given;
    values are numbers, None or lists of pairs (objects)."""
    parts = []
    for k, v in pairs:
        key = KEYS.get(k) or KEYS.setdefault(k, json.dumps(k) + ":")
        parts.append(key + (old_object(v) if isinstance(v, list) else old_number(v)))
    return "{" + ",".join(parts) + "}"


def grow(path):
    """Adds about 100,000 rows per loop of config/demo.toml, one every 17 s (so 19.7 days
    of them, with a stop of a few hours), ending a minute before the database's own rows,
    in the old release's format: inputs as compact JSON, constraints for the boiler's CO
    cap, a phase on stretches of the chiller loop, NULL objectives and null values now and
    then, and stretches in fallback and holding."""
    rng = random.Random(568)
    db = sqlite3.connect(path)
    # The formatting below is the old writer's: it gives back the text of every row the
    # previous release wrote, byte for byte.
    for text, constraints in db.execute("SELECT inputs, constraints FROM samples"):
        for stored in (text, constraints):
            if stored is not None:
                parsed = json.loads(stored)
                pairs = [(k, list(v.items()) if isinstance(v, dict) else v) for k, v in parsed.items()]
                assert old_object(pairs) == stored, (old_object(pairs), stored)
    (first_ms,) = db.execute("SELECT min(at_ms) FROM samples").fetchone()
    step_ms, per_loop = 17_000, 100_000
    start_ms = first_ms - MINUTE_MS - per_loop * step_ms
    stop_from, stop_until = start_ms + 7 * 86_400_000, start_ms + 7 * 86_400_000 + 3 * HOUR_MS + 1234
    loops = [
        ("boiler-1-o2-trim", "o2_setpoint_pct", 85.0, 0.4, 3.0, "seeking"),
        ("chw-plant-condenser", "cw_supply_degc", 0.65, 0.02, 25.0, "seeking"),
        ("dryer-3-inlet", "dryer_inlet_degc", 264.0, 1.5, 182.0, "observing"),
    ]
    rows = []
    for k, (name, input_name, level, spread, setpoint, usual) in enumerate(loops):
        state, state_left = usual, 0
        phase, phase_left = None, 0
        applied, estimate = setpoint, setpoint
        for i in range(per_loop):
            at_ms = start_ms + i * step_ms + 3 * k + rng.randrange(0, 40)
            if stop_from <= at_ms < stop_until:
                continue
            if state_left == 0:
                roll = rng.random()
                state = "fallback" if roll < 0.01 else "holding" if roll < 0.03 else usual
                state_left = rng.randrange(20, 200)
            state_left -= 1
            objective = level + rng.gauss(0, spread)
            if rng.random() < 0.01:
                objective = None
            applied = applied + rng.gauss(0, 0.01)
            estimate = estimate + rng.gauss(0, 0.01)
            gradient = rng.gauss(0, 0.05)
            r = rng.random()
            if r < 0.002:
                gradient = -0.0
            elif r < 0.004:
                gradient = rng.choice([1e-7, -2.5e-6, 3e-5, 1.5e17, 6.02e23])
            elif r < 0.014:
                gradient = None
            inputs = [
                (
                    input_name,
                    [
                        ("applied", None if rng.random() < 0.001 else applied),
                        ("estimate", None if rng.random() < 0.003 else estimate),
                        ("gradient", gradient),
                    ],
                )
            ]
            constraints = None
            if name == "boiler-1-o2-trim":
                co = None if rng.random() < 0.02 else abs(rng.gauss(60, 30))
                constraints = old_object([("co", co)])
            if name == "chw-plant-condenser":
                if phase_left == 0:
                    phase = rng.choice([None, None, "settling", "averaging"])
                    phase_left = rng.randrange(10, 100)
                phase_left -= 1
            rows.append(
                (
                    name,
                    at_ms,
                    objective,
                    state,
                    old_object(inputs),
                    phase if name == "chw-plant-condenser" else None,
                    constraints,
                )
            )
    # In time order, as the old writer inserted them, the loops interleaved.
    rows.sort(key=lambda r: (r[1], r[0]))
    with db:
        db.executemany(
            "INSERT INTO samples (loop, at_ms, objective, state, inputs, phase, constraints)"
            " VALUES (?, ?, ?, ?, ?, ?, ?)",
            rows,
        )
    (total,) = db.execute("SELECT count(*) FROM samples").fetchone()
    db.close()
    return {"added": len(rows), "rows": total, "bytes": os.path.getsize(path)}


def old_rows(path, target):
    """Every old row as [at_ms, objective, state, phase, [[input, [applied, estimate,
    gradient]], ...], [[constraint, value], ...]] per loop, in the old index's order (the
    order of time; ties by id), pickled to `target`. Values come from Python's json, None
    for null."""
    db = read_only(path)
    rows = db.execute(
        "SELECT loop, at_ms, objective, state, inputs, phase, coalesce(constraints, '{}') FROM samples"
        " ORDER BY loop, at_ms, id"
    ).fetchall()
    db.close()
    # One parse of all the texts as one JSON array: the same parser, far fewer calls.
    inputs = json.loads("[" + ",".join(r[4] for r in rows) + "]")
    constraints = json.loads("[" + ",".join(r[6] for r in rows) + "]")
    out = {}
    for (name, at_ms, objective, state, _, phase, _), ins, cons in zip(rows, inputs, constraints):
        ins = [[k, [v["applied"], v["estimate"], v["gradient"]]] for k, v in ins.items()]
        cons = [[k, v] for k, v in cons.items()]
        out.setdefault(name, []).append([at_ms, objective, state, phase, ins, cons])
    with open(target, "wb") as f:
        pickle.dump(out, f, protocol=pickle.HIGHEST_PROTOCOL)
    return {
        "rows": len(rows),
        "last_at_ms": max(r[-1][0] for r in out.values()),
        "loops": {
            name: {"rows": len(r), "last_minute_ms": r[-1][0] // MINUTE_MS * MINUTE_MS} for name, r in out.items()
        },
    }


def load_old(path):
    with open(path, "rb") as f:
        return pickle.load(f)


# --- The compact layout, decoded from its description -------------------------------------


class Bytes:
    def __init__(self, data):
        self.data, self.at = data, 0

    def varint(self):
        # LEB128: 7 bits a byte, low bits first, the top bit set on all but the last byte.
        value, shift = 0, 0
        while True:
            byte = self.data[self.at]
            self.at += 1
            value |= (byte & 0x7F) << shift
            shift += 7
            if not byte & 0x80:
                return value

    def f64(self):
        (v,) = struct.unpack_from("<d", self.data, self.at)
        self.at += 8
        return None if math.isnan(v) or math.isinf(v) else v

    def done(self):
        return self.at == len(self.data)


def unzigzag(v):
    return (v >> 1) ^ -(v & 1)


def decoded_samples(db):
    """Every loop's samples from both block tables: [at_ms, objective, state, phase,
    inputs, constraints] per loop name, ordered by block key, then as in the block."""
    names = dict(db.execute("SELECT id, name FROM names"))
    blocks = db.execute(
        "SELECT loop, first_ms, samples, layout, data FROM sample_blocks"
        " UNION ALL SELECT loop, first_ms, samples, layout, data FROM open_blocks ORDER BY loop, first_ms"
    ).fetchall()
    out, problems = {}, []
    for loop_id, first_ms, count, layout, data in blocks:
        lay = Bytes(layout)
        inputs = [names[lay.varint()] for _ in range(lay.varint())]
        constraints = [names[lay.varint()] for _ in range(lay.varint())]
        if not lay.done():
            problems.append(f"block ({loop_id}, {first_ms}): layout has bytes left over")
        d = Bytes(data)
        at_ms, state, phase, seen = first_ms, None, None, 0
        while not d.done():
            head = d.varint()
            at_ms += unzigzag(head >> 1)
            if head & 1:
                state = names[d.varint()]
                phase_id = d.varint()
                phase = names[phase_id] if phase_id else None
            objective = d.f64()
            ins = [[name, [d.f64(), d.f64(), d.f64()]] for name in inputs]
            cons = [[name, d.f64()] for name in constraints]
            out.setdefault(names[loop_id], []).append([at_ms, objective, state, phase, ins, cons])
            seen += 1
        if seen != count:
            problems.append(f"block ({loop_id}, {first_ms}) says {count} samples and holds {seen}")
    return out, problems


def same(a, b):
    """Equal, floats bit for bit (so -0.0 is not 0.0)."""
    if isinstance(a, float) and isinstance(b, float):
        return struct.pack("<d", a) == struct.pack("<d", b)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b))
    return a == b and type(a) is type(b)


def next_to(a, b):
    """Whether two floats are neighbours: one unit in the last place apart."""
    return isinstance(a, float) and isinstance(b, float) and a != b and math.nextafter(a, b) == b


def values(sample):
    """A sample's numbers: objective, then applied, estimate and gradient per input, then
    each constraint."""
    return [sample[1]] + [v for _, vs in sample[4] for v in vs] + [v for _, v in sample[5]]


def find_again(old_path, path):
    """Whether every old row is in the compact layout again, in the same order with the
    same time, state, phase, input and constraint names and values (bit for bit); samples
    after the old rows' last one (written since) are left out. Counts what differs, and
    how many of the values that differ are one unit in the last place off."""
    old = load_old(old_path)
    last = max(r[-1][0] for r in old.values())
    db = read_only(path)
    decoded, problems = decoded_samples(db)
    samples_table = db.execute("SELECT count(*) FROM sqlite_schema WHERE type = 'table' AND name = 'samples'")
    samples_table = samples_table.fetchone()[0] == 1
    db.close()
    compared = rows_differing = values_differing = one_ulp = 0
    examples = list(problems)
    for name in sorted(set(old) | set(decoded)):
        want = old.get(name, [])
        got = [s for s in decoded.get(name, []) if s[0] <= last]
        if len(got) != len(want):
            examples.append(f"{name}: {len(want)} old rows, {len(got)} samples up to {last} in blocks")
        for i, (w, g) in enumerate(zip(want, got)):
            compared += 1
            if same(w, g):
                continue
            rows_differing += 1
            if len(examples) < 10:
                examples.append(f"{name} row {i}: old {json.dumps(w)}, blocks {json.dumps(g)}")
            if same([w[0], w[2], w[3]], [g[0], g[2], g[3]]):
                pairs = list(zip(values(w), values(g)))
                values_differing += sum(1 for x, y in pairs if not same(x, y))
                one_ulp += sum(1 for x, y in pairs if next_to(x, y))
    return {
        "compared": compared,
        "rows_differing": rows_differing + len(problems),
        "values_differing": values_differing,
        "values_one_ulp_off": one_ulp,
        "examples": examples,
        "samples_table": samples_table,
    }


# --- Rollups ------------------------------------------------------------------------------


def stat(values):
    """n, min, mean, max of the values that are not None; the mean from math.fsum (the
    exactly rounded sum), so it is a reference, not another float accumulation."""
    v = [x for x in values if x is not None]
    if not v:
        return [0, None, None, None]
    return [len(v), min(v), math.fsum(v) / len(v), max(v)]


def close(got, want):
    if want is None or got is None:
        return got is None and want is None
    return abs(got - want) <= 1e-9 * abs(want)


def check_rollups(old_path, path):
    """Each loop's minute (period_s 60) and hour (3600) rows up to its old rows' last
    minute or hour, against aggregates Python computes from the old rows: the same set of
    minutes and hours; per minute the ticks, the ticks in fallback, the state held longest
    (where one was), and the objective's and each input's applied and estimate n, min and
    max exactly and mean within 1e-9 relative; per hour the same but the state."""
    old = load_old(old_path)
    db = read_only(path)
    ids = {name: i for i, name in db.execute("SELECT id, name FROM names")}
    names = {i: name for name, i in ids.items()}
    examples, kinds, counted = [], {}, {}

    def differ(kind, text):
        kinds[kind] = kinds.get(kind, 0) + 1
        if len(examples) < 20:
            examples.append(text)

    def compare_stat(kind, where, got, want):
        n, lo, mean, hi = got
        if n == want[0] and lo == want[1] and hi == want[3] and close(mean, want[2]):
            return
        if n == want[0] and close(mean, want[2]) and all(x == y or next_to(x, y) for x, y in ((lo, want[1]), (hi, want[3]))):
            kind += " min or max one ULP off"
        differ(kind, f"{where}: {kind}: n/min/mean/max {got}, Python's {want}")

    for name, rows in sorted(old.items()):
        loop_id = ids.get(name)
        if loop_id is None:
            differ("loops", f"{name}: not in names")
            continue
        counted[name] = {}
        for period_ms in (MINUTE_MS, HOUR_MS):
            period_s = period_ms // 1000
            groups = {}
            for r in rows:
                groups.setdefault(r[0] // period_ms * period_ms, []).append(r)
            last = max(groups)
            got = {
                row[0]: row[1:]
                for row in db.execute(
                    "SELECT start_ms, ticks, faults, state, objective_n, objective_min, objective_mean,"
                    " objective_max FROM rollups WHERE loop = ? AND period_s = ? AND start_ms <= ?",
                    (loop_id, period_s, last),
                )
            }
            got_inputs = {}
            for start, input_id, *values in db.execute(
                "SELECT start_ms, input, applied_n, applied_min, applied_mean, applied_max, estimate_n,"
                " estimate_min, estimate_mean, estimate_max FROM rollup_inputs"
                " WHERE loop = ? AND period_s = ? AND start_ms <= ?",
                (loop_id, period_s, last),
            ):
                got_inputs.setdefault(start, {})[names[input_id]] = values
            counted[name][str(period_s)] = len(got)
            if set(got) != set(groups):
                missing, extra = sorted(set(groups) - set(got)), sorted(set(got) - set(groups))
                differ(
                    f"period {period_s} rows",
                    f"{name} period {period_s}: {len(missing)} periods with samples have no row"
                    f" (first {missing[:3]}), {len(extra)} rows have no samples (first {extra[:3]})",
                )
            for start, group in sorted(groups.items()):
                row = got.get(start)
                if row is None:
                    continue
                ticks, faults, state, *objective = row
                where = f"{name} at {start}"
                if ticks != len(group):
                    differ(f"period {period_s} ticks", f"{where}: ticks {ticks}, {len(group)} old rows")
                falls = sum(1 for r in group if r[2] == "fallback")
                if faults != falls:
                    differ(f"period {period_s} faults", f"{where}: faults {faults}, {falls} old rows in fallback")
                if period_ms == MINUTE_MS:
                    held = {}
                    for r in group:
                        held[r[2]] = held.get(r[2], 0) + 1
                    most = max(held.values())
                    longest = [s for s, n in held.items() if n == most]
                    if len(longest) == 1 and names.get(state) != longest[0]:
                        differ(
                            f"period {period_s} state",
                            f"{where}: state {names.get(state)}, held longest {longest[0]} ({held})",
                        )
                compare_stat(f"period {period_s} objective", where, objective, stat([r[1] for r in group]))
                inputs = {}
                for r in group:
                    for input_name, (applied, estimate, _gradient) in r[4]:
                        a, e = inputs.setdefault(input_name, ([], []))
                        a.append(applied)
                        e.append(estimate)
                row_inputs = got_inputs.get(start, {})
                if set(row_inputs) != set(inputs):
                    differ(
                        f"period {period_s} inputs",
                        f"{where}: inputs {sorted(row_inputs)}, old rows have {sorted(inputs)}",
                    )
                for input_name, (a, e) in inputs.items():
                    values = row_inputs.get(input_name)
                    if values is not None:
                        compare_stat(f"period {period_s} {input_name} applied", where, values[0:4], stat(a))
                        compare_stat(f"period {period_s} {input_name} estimate", where, values[4:8], stat(e))
    db.close()
    return {"rows": counted, "differences": sum(kinds.values()), "kinds": kinds, "examples": examples}


def progress(path):
    db = read_only(path)
    out = dict(
        db.execute("SELECT n.name, p.through_ms FROM rollup_progress p JOIN names n ON n.id = p.loop").fetchall()
    )
    db.close()
    return out


def rollups(path):
    db = read_only(path)
    (count,) = db.execute("SELECT count(*) FROM rollups").fetchone()
    db.close()
    return {"rows": count}


def integrity(path):
    db = read_only(path)
    result = [r[0] for r in db.execute("PRAGMA integrity_check")]
    db.close()
    return {"integrity": result}


def main():
    # Hundreds of thousands of small lists and no cycles: the cyclic collector would only
    # walk them again and again.
    gc.disable()
    command, args = sys.argv[1], sys.argv[2:]
    commands = {
        "unpack": unpack,
        "grow": grow,
        "old-rows": old_rows,
        "find-again": find_again,
        "rollups": rollups,
        "progress": progress,
        "check-rollups": check_rollups,
        "integrity": integrity,
    }
    print(json.dumps(commands[command](*args)))


if __name__ == "__main__":
    main()
