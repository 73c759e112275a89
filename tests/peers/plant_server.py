"""A pymodbus 3.16 Modbus/TCP server that plays a PLC in front of a process with known
dynamics, for Ridgeline's black-box bump-test and constraint tests.

Usage: plant_server.py PLANT_JSON

PLANT_JSON is {"unit": 1, "setpoint_register": 0, "objective_register": 0,
"permit_register": 10, "initial": 2.5, "permit": 1, "lag_s": 1.5, "dead_time_s": 0.5,
"curvature": 4.0, "optimum": 2.3, "peak": 7.0, "noise_std": 0.01, "seed": 0}, and
optionally "constraint_register": 2 with "constraint": {"slope": 10.0, "offset": 0.0}
(both or neither) for a constraint output.

Registers (every other address is undefined: pymodbus answers it with exception 0x02):
- holding `setpoint_register`, +1: the setpoint u as an f32, starting at `initial`;
  Ridgeline writes it (function 16) and may read it back (function 3). A write that
  leaves it NaN or infinite is refused with exception 0x03 (illegal data value).
- holding `permit_register`: a u16 permit (1 = permitted, 0 = not), starting at
  `permit`; a test changes it by writing it over Modbus (function 6 or 16).
- input `objective_register`, +1: the objective J as an f32, computed by the action
  callback at the moment of each read (function 4) from the model below.
- input `constraint_register`, +1 (only when given; it must not overlap the objective's
  two registers): the constraint value C as an f32, computed like J at each read.

Every f32 is encoded here with Python's `struct`, never with Ridgeline's codec: IEEE 754
big-endian bytes, high word first (register N holds the sign, exponent and high mantissa
bits; register N+1 the low mantissa bits).

The model (a Wiener model, exact for a piecewise-constant input): the process value x is
the setpoint passed through a dead time L = `dead_time_s` and a first-order lag
T = `lag_s`, starting at rest at `initial`. Each write of the setpoint at time t_j (seconds
of time.monotonic() since the ready line) is a step du_j = u_j - u_{j-1} (u_0 = `initial`,
u_j the f32 written), and

    x(t) = initial + sum_j du_j * (1 - exp(-(t - t_j - L) / T))   over t >= t_j + L
    (a term is 0 before t_j + L; with T = 0 it is the delayed step du_j)

    J(t) = peak - (curvature / 2) * (x(t) - optimum)^2 + noise_std * N(0, 1)

    C(t) = constraint.offset + constraint.slope * x(t)   (no noise)

with one N(0, 1) drawn per read of the objective from numpy's default_rng(seed), so the
noise sequence depends only on the seed and the number of reads of the objective (a read
of the constraint alone draws none). x settles at the last setpoint written, J peaks at
`peak` where x = `optimum`.

Prints one JSON line {"ready": true, "port": P} once listening on 127.0.0.1 (port chosen
by the OS, so no port race); t = 0 is that moment. Then one JSON line per write of a
defined register, {"event": "write", "t": T, "wall_ms": W, "function": FC, "address": A,
"value": V}, where A is `setpoint_register` (V the f32 written, as a double) or
`permit_register` (V the u16 written); one line per read of the input registers that
covers the objective or the constraint, {"event": "read", "t": T, "wall_ms": W, "x": X,
"objective": J, "constraint": C}, where J and C are the values sent after their f32
rounding (what a client decodes), each present only when the read covers its registers,
and X the process value they were computed from; and one line per refused setpoint,
{"event": "refused", "t": T, "wall_ms": W, "function": FC, "address": A, "words": [...]}.
T is seconds of time.monotonic() since the ready line; W is the wall clock
(time.time() * 1000, Unix milliseconds with a fraction), taken at the same moment, to
line a record up with the times Ridgeline stamps on its events and samples. Reads of the
holding registers print nothing. Exits when stdin closes or on SIGTERM/SIGINT.
"""

import asyncio
import json
import math
import struct
import sys
import time

import numpy
from peer_server import emit, serve
from pymodbus.constants import ExcCodes
from pymodbus.simulator import DataType, SimData

READS = {3: "holding", 4: "input"}


def f32_words(value):
    """The two registers of an f32, big-endian bytes, high word first."""
    data = struct.pack(">f", value)
    return [int.from_bytes(data[0:2], "big"), int.from_bytes(data[2:4], "big")]


def f32_value(words):
    """The f32 two registers hold (high word first), as a double."""
    (value,) = struct.unpack(">f", b"".join(w.to_bytes(2, "big") for w in words))
    return value


class Plant:
    """Dead time, first-order lag, a quadratic map with noise and an optional linear
    constraint output (see the docstring)."""

    def __init__(self, spec):
        self.initial = float(spec["initial"])
        self.lag = float(spec["lag_s"])
        self.dead_time = float(spec["dead_time_s"])
        self.curvature = float(spec["curvature"])
        self.optimum = float(spec["optimum"])
        self.peak = float(spec["peak"])
        self.noise_std = float(spec["noise_std"])
        self.rng = numpy.random.default_rng(spec.get("seed", 0))
        constraint = spec.get("constraint")
        self.constraint_slope = float(constraint["slope"]) if constraint else None
        self.constraint_offset = float(constraint["offset"]) if constraint else None
        self.setpoint = self.initial
        self.changes = []  # (t_j, du_j)

    def write(self, t, setpoint):
        self.changes.append((t, setpoint - self.setpoint))
        self.setpoint = setpoint

    def x(self, t):
        x = self.initial
        for t_j, du in self.changes:
            age = t - t_j - self.dead_time
            if age < 0:
                continue
            # -expm1(-a) is 1 - exp(-a) without the cancellation near a = 0.
            x += du if self.lag == 0 else du * -math.expm1(-age / self.lag)
        return x

    def objective(self, x):
        """J at process value x, drawing one noise sample."""
        noise = self.noise_std * float(self.rng.standard_normal())
        return self.peak - self.curvature / 2 * (x - self.optimum) ** 2 + noise

    def constraint(self, x):
        """C at process value x (no noise)."""
        return self.constraint_offset + self.constraint_slope * x


async def main():
    spec = json.loads(sys.argv[1])
    plant = Plant(spec)
    setpoint_at = spec["setpoint_register"]
    permit_at = spec["permit_register"]
    objective_at = spec["objective_register"]
    constraint_at = spec.get("constraint_register")
    if permit_at in (setpoint_at, setpoint_at + 1):
        sys.exit("permit_register overlaps the setpoint's two registers")
    if (constraint_at is None) != (plant.constraint_slope is None):
        sys.exit("give constraint_register and constraint together, or neither")
    if constraint_at is not None and abs(constraint_at - objective_at) < 2:
        sys.exit("constraint_register overlaps the objective's two registers")
    start = time.monotonic()  # set again when the server listens: t = 0 at the ready line

    def now():
        """(t, wall_ms): seconds since the ready line, and the wall clock in Unix ms."""
        return time.monotonic() - start, time.time() * 1000

    def touches(at, width, address, count):
        return at < address + count and address < at + width

    async def action(function_code, start_address, address, count, registers, set_values):
        t, wall_ms = now()
        if set_values is None:
            # Reads of the setpoint or the permit (and pymodbus reading a register back to
            # answer 0x06) leave the registers as they are.
            if READS.get(function_code) != "input":
                return None
            objective = touches(objective_at, 2, address, count)
            constraint = constraint_at is not None and touches(constraint_at, 2, address, count)
            if not (objective or constraint):
                return None
            # One x for both, so J and C of one read are of the same moment.
            x = plant.x(t)
            record = {"event": "read", "t": t, "wall_ms": wall_ms, "x": x}
            if objective:
                words = f32_words(plant.objective(x))
                at = objective_at - start_address
                registers[at : at + 2] = words
                record["objective"] = f32_value(words)
            if constraint:
                words = f32_words(plant.constraint(x))
                at = constraint_at - start_address
                registers[at : at + 2] = words
                record["constraint"] = f32_value(words)
            emit(record)
            return None
        # Any write (6, 16, 23) lands in the holding registers. The registers after it:
        after = list(registers)
        after[address - start_address : address - start_address + count] = list(set_values)
        if touches(setpoint_at, 2, address, count):
            at = setpoint_at - start_address
            setpoint = f32_value(after[at : at + 2])
            if not math.isfinite(setpoint):
                emit(
                    {
                        "event": "refused",
                        "t": t,
                        "wall_ms": wall_ms,
                        "function": function_code,
                        "address": address,
                        "words": list(set_values),
                    }
                )
                return ExcCodes.ILLEGAL_VALUE
            plant.write(t, setpoint)
            emit(
                {
                    "event": "write",
                    "t": t,
                    "wall_ms": wall_ms,
                    "function": function_code,
                    "address": setpoint_at,
                    "value": setpoint,
                }
            )
        if touches(permit_at, 1, address, count):
            permit = after[permit_at - start_address]
            emit(
                {
                    "event": "write",
                    "t": t,
                    "wall_ms": wall_ms,
                    "function": function_code,
                    "address": permit_at,
                    "value": permit,
                }
            )
        return None

    holding = [
        SimData(setpoint_at, values=f32_words(plant.initial), datatype=DataType.REGISTERS),
        SimData(permit_at, values=[int(spec["permit"])], datatype=DataType.REGISTERS),
    ]
    # The action writes the objective (and the constraint) into these registers before
    # every read answers.
    inputs = [SimData(objective_at, values=[0, 0], datatype=DataType.REGISTERS)]
    if constraint_at is not None:
        inputs.append(SimData(constraint_at, values=[0, 0], datatype=DataType.REGISTERS))
        inputs.sort(key=lambda block: block.address)

    def ready(port):
        nonlocal start
        start = time.monotonic()
        emit({"ready": True, "port": port})

    await serve(spec.get("unit", 1), holding, inputs, action, ready)


if __name__ == "__main__":
    asyncio.run(main())
