"""A pymodbus 3.16 Modbus/TCP server for Ridgeline's interoperability tests.

Usage: modbus_server.py LAYOUT_JSON

LAYOUT_JSON is {"unit": 1, "values": [ENTRY, ...]} where each ENTRY is
{"table": "input"|"holding", "address": N, "kind": "u16"|"i16"|"u32"|"i32"|"f32",
 "order": "big"|"little", "raw": NUMBER, "scale": X, "offset": Y, "busy": false}.

Every value is encoded here with Python's `struct` (big-endian bytes; "little" word order
swaps the two registers of a 32-bit value), never with Ridgeline's codec, so the test
compares Ridgeline's decoding against an outside encoding. Addresses no entry covers are
undefined: pymodbus answers them with exception 0x02. An entry with "busy" set is
answered with exception 0x06 (server device busy) by the action callback.

Prints one JSON line {"ready": true, "port": P, "values": [...]} once listening on
127.0.0.1 (port chosen by the OS, so no port race), giving each entry's registers and its
engineering value as Python computes it from the raw value (also as the bits of the
double). Then one JSON line per request:
{"event": "read"|"readback"|"write"|"busy", "function": FC, "address": A, "count": N,
 "words": [...], "decoded": {ADDRESS: VALUE}}, where "decoded" is the engineering value
Python decodes (with `struct`) from the registers written into each entry. Exits when
stdin closes or on SIGTERM/SIGINT.
"""

import asyncio
import json
import struct
import sys

from peer_server import emit, serve
from pymodbus.constants import ExcCodes
from pymodbus.simulator import DataType, SimData

FORMATS = {"u16": "H", "i16": "h", "u32": "I", "i32": "i", "f32": "f"}
READS = {3: "holding", 4: "input"}
WRITES = {6: "holding", 16: "holding"}


def encode(entry):
    """Registers of one entry, as a device with this word order would hold them."""
    data = struct.pack(">" + FORMATS[entry["kind"]], entry["raw"])
    words = [int.from_bytes(data[i : i + 2], "big") for i in range(0, len(data), 2)]
    return words[::-1] if entry["order"] == "little" else words


def decode(entry, words):
    """Engineering value of an entry's registers: raw * scale + offset."""
    if entry["order"] == "little":
        words = words[::-1]
    data = b"".join(w.to_bytes(2, "big") for w in words)
    (raw,) = struct.unpack(">" + FORMATS[entry["kind"]], data)
    return raw * entry["scale"] + entry["offset"]


def covering(entries, table, address, count):
    """Entries of `table` that the request [address, address + count) touches."""
    return [
        e
        for e in entries
        if e["table"] == table
        and e["address"] < address + count
        and address < e["address"] + len(e["words"])
    ]


async def main():
    layout = json.loads(sys.argv[1])
    entries = layout["values"]
    for e in entries:
        e["words"] = encode(e)
        # From the raw value, not from the registers, so a word-order slip in encode()
        # cannot hide behind the same slip in decode(). The f32 round trip is the rounding
        # the register type imposes.
        fmt = ">" + FORMATS[e["kind"]]
        (packed,) = struct.unpack(fmt, struct.pack(fmt, e["raw"]))
        e["engineering"] = packed * e["scale"] + e["offset"]
        # The exact bits of that double: JSON text need not round-trip through every parser.
        e["engineering_bits"] = int.from_bytes(struct.pack(">d", e["engineering"]), "big")

    def block(table):
        defined = [
            SimData(e["address"], values=e["words"], datatype=DataType.REGISTERS)
            for e in entries
            if e["table"] == table
        ]
        # pymodbus needs at least one block per table; an invalid register defines nothing.
        return defined or [SimData(0, datatype=DataType.INVALID)]

    async def action(function_code, start_address, address, count, registers, set_values):
        table = READS.get(function_code) or WRITES.get(function_code)
        touched = covering(entries, table, address, count)
        if any(e.get("busy") for e in touched):
            emit({"event": "busy", "function": function_code, "address": address, "count": count})
            return ExcCodes.DEVICE_BUSY
        if set_values is None:
            # pymodbus also reads a register back to answer 0x06; that is no client read.
            kind = "read" if function_code in READS else "readback"
            emit({"event": kind, "function": function_code, "address": address, "count": count})
            return None
        # The registers after this write, decoded per entry it lands in.
        after = list(registers)
        after[address - start_address : address - start_address + count] = list(set_values)
        decoded = {}
        for e in touched:
            at = e["address"] - start_address
            decoded[str(e["address"])] = decode(e, after[at : at + len(e["words"])])
        emit(
            {
                "event": "write",
                "function": function_code,
                "address": address,
                "count": count,
                "words": list(set_values),
                "decoded": decoded,
            }
        )
        return None

    def ready(port):
        emit(
            {
                "ready": True,
                "port": port,
                "values": [
                    {k: e[k] for k in ("table", "address", "words", "engineering", "engineering_bits")} for e in entries
                ],
            }
        )

    await serve(layout.get("unit", 1), block("holding"), block("input"), action, ready)


if __name__ == "__main__":
    asyncio.run(main())
