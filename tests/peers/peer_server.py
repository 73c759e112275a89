"""What the Modbus peers share: one pymodbus 3.16 device served on loopback (port chosen
by the OS), one JSON line per record on stdout, and a clean stop when stdin closes or on
SIGTERM/SIGINT. Imported by modbus_server.py and plant_server.py (their folder is on
sys.path when they run as scripts)."""

import asyncio
import json
import signal
import sys
import threading

from pymodbus.server import ModbusTcpServer
from pymodbus.simulator import DataType, SimData, SimDevice


def emit(record):
    print(json.dumps(record), flush=True)


async def serve(unit, holding, inputs, action, ready):
    """Serves holding and input register blocks through `action` until stopped; calls
    `ready(port)` once listening."""
    # Coils and discrete inputs are unused, but pymodbus needs one block of each when the
    # four tables are separate (as in most PLCs: input and holding registers apart).
    bits = [SimData(0, values=[False] * 16, datatype=DataType.BITS)]
    device = SimDevice(id=unit, simdata=(bits, list(bits), holding, inputs), action=action)
    server = ModbusTcpServer(device, address=("127.0.0.1", 0))
    await server.serve_forever(background=True)
    port = server.transport.sockets[0].getsockname()[1]

    done = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, done.set)

    def wait_for_stdin_eof():
        sys.stdin.read()
        loop.call_soon_threadsafe(done.set)

    threading.Thread(target=wait_for_stdin_eof, daemon=True).start()
    ready(port)
    await done.wait()
    await server.shutdown()
