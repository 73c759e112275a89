//! CHECKS.md "Modbus": Ridgeline against Modbus peers it did not write. Ridgeline's
//! client talks to a pymodbus server (`tests/peers/modbus_server.py`), and a pymodbus
//! client reads and writes `ridgeline sim`. The values on the wire are encoded and
//! decoded on the Python side with `struct`, never with Ridgeline's own codec.

use std::time::Duration;

use ridgeline::config::{Codec, RegisterSpace, RegisterType, WordOrder};
use ridgeline::field::codec::{decode, encode};
use ridgeline::field::modbus::{ModbusLink, Urgency};
use ridgeline::field::{Function, LinkError, MAX_READ_REGISTERS, RegisterRead, plan_blocks};
use ridgeline_tests::{Peer, python_json, python_peer, spawn_sim, write_file};
use serde_json::{Value, json};

use RegisterType::{F32, I16, I32, U16, U32};
use WordOrder::{Big, Little};

/// How long a peer may take to start listening.
const START: Duration = Duration::from_secs(10);
/// Ridgeline's per-request timeout against the peer.
const REQUEST: Duration = Duration::from_secs(2);
/// How long the peer may take to report a request it answered.
const EVENT: Duration = Duration::from_secs(5);
/// The pymodbus device id, and Ridgeline's unit id for it.
pub(crate) const UNIT: u8 = 1;

pub(crate) fn codec(kind: RegisterType, word_order: WordOrder, scale: f64, offset: f64) -> Codec {
    Codec { kind, word_order, scale, offset }
}

/// One value the pymodbus server holds: `raw` is what Python packs with `struct`.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Entry {
    space: RegisterSpace,
    address: u16,
    codec: Codec,
    raw: f64,
    /// Answered with exception 0x06 (server device busy).
    busy: bool,
}

impl Entry {
    fn json(&self) -> Value {
        let c = &self.codec;
        // `struct` packs integer formats from Python ints only.
        let raw = if c.kind == F32 { json!(self.raw) } else { json!(self.raw as i64) };
        json!({
            "table": match self.space { RegisterSpace::Input => "input", RegisterSpace::Holding => "holding" },
            "address": self.address,
            "kind": c.kind.to_string(),
            "order": c.word_order.to_string(),
            "raw": raw,
            "scale": c.scale,
            "offset": c.offset,
            "busy": self.busy,
        })
    }
}

/// Entries at consecutive addresses of one table, from `start`.
pub(crate) fn lay_out(space: RegisterSpace, start: u16, values: &[(Codec, f64)]) -> Vec<Entry> {
    let mut address = start;
    values
        .iter()
        .map(|&(codec, raw)| {
            let entry = Entry { space, address, codec, raw, busy: false };
            address += codec.kind.width();
            entry
        })
        .collect()
}

/// A running `tests/peers/modbus_server.py`, killed when dropped.
pub(crate) struct PymodbusServer {
    peer: Peer,
    pub(crate) address: String,
    /// Per entry, as Python made it: `words` (the registers) and `engineering_bits` (the value).
    values: Vec<Value>,
}

impl PymodbusServer {
    pub(crate) fn start(entries: &[Entry]) -> Self {
        let layout = json!({ "unit": UNIT, "values": entries.iter().map(Entry::json).collect::<Vec<_>>() });
        let mut command = python_peer("modbus_server.py");
        command.arg(layout.to_string());
        // The server binds port 0 and reports the port the OS chose: no race for a free port.
        let (peer, line) =
            Peer::start("pymodbus server (tests/peers/modbus_server.py)", command, START, |line| {
                line.starts_with(r#"{"ready""#)
            });
        let ready: Value = serde_json::from_str(&line).expect("the ready line is JSON");
        let port = ready["port"].as_u64().expect("the ready line names the port");
        let values = ready["values"].as_array().expect("the ready line lists the values").clone();
        assert_eq!(values.len(), entries.len());
        PymodbusServer { peer, address: format!("127.0.0.1:{port}"), values }
    }

    fn link(&self, name: &str) -> ModbusLink {
        ModbusLink::new(name, &self.address, UNIT, REQUEST)
    }

    /// The registers Python encoded for entry `i`.
    pub(crate) fn words(&self, i: usize) -> Vec<u16> {
        let words = self.values[i]["words"].as_array().expect("words");
        words.iter().map(|w| w.as_u64().expect("a register") as u16).collect()
    }

    /// The engineering value Python computed for entry `i` from its raw value
    /// (`raw * scale + offset`), taken from the double's bits so JSON parsing cannot round it.
    fn engineering(&self, i: usize) -> f64 {
        f64::from_bits(self.values[i]["engineering_bits"].as_u64().expect("the bits of a double"))
    }

    /// The next request of this kind ("read", "write", "busy") the server reports.
    fn next_event(&self, kind: &str) -> Value {
        loop {
            let line = self.peer.next_line(EVENT).unwrap_or_else(|| {
                panic!("{} reported no {kind} request within {EVENT:?}", self.peer.name())
            });
            let event: Value = serde_json::from_str(&line).expect("events are JSON lines");
            if event["event"] == kind {
                return event;
            }
        }
    }
}

/// Every register type with scale and offset, in both word orders. The 32-bit values have
/// differing high and low words, so a swapped word order cannot pass unnoticed.
fn read_cases(second_set: bool) -> Vec<(Codec, f64)> {
    let mut cases = Vec::new();
    for order in [Big, Little] {
        if second_set {
            cases.extend([
                (codec(U16, order, 1.0, 0.0), 65_535.0),
                (codec(I16, order, 1.0, 0.0), -32_768.0),
                (codec(U32, order, 0.5, 10.0), 305_419_896.0), // 0x12345678
                (codec(I32, order, 1.0, 0.0), -2.0),           // 0xFFFFFFFE: the sign lives in the high word
                (codec(F32, order, 1.0, 0.0), -0.003_906_25),
            ]);
        } else {
            cases.extend([
                (codec(U16, order, 0.1, -50.0), 51_234.0),
                (codec(I16, order, 0.01, 0.0), -1_234.0),
                (codec(U32, order, 1.0, 0.0), 3_000_000_000.0), // above i32::MAX
                (codec(I32, order, 0.001, 100.0), -123_456_789.0),
                (codec(F32, order, 2.0, -1.0), -1_234.567_8), // not exact in f32: Python rounds it
            ]);
        }
    }
    cases
}

#[tokio::test]
async fn client_reads_every_register_type_in_both_word_orders_as_pymodbus_and_struct_encode_them() {
    // The same addresses in both tables hold different values, so reading the wrong
    // table (function 0x03 for 0x04) fails too.
    let mut entries = lay_out(RegisterSpace::Input, 100, &read_cases(false));
    entries.extend(lay_out(RegisterSpace::Holding, 100, &read_cases(true)));
    let server = PymodbusServer::start(&entries);
    let link = server.link("pymodbus");
    for (i, e) in entries.iter().enumerate() {
        let words = link
            .read(e.space, e.address, e.codec.kind.width())
            .await
            .unwrap_or_else(|err| panic!("{e:?}: {err}"));
        // Source: Modbus Application Protocol Specification V1.1b3 §4.2 (registers are sent
        // big-endian) and §6.3/§6.4 (read holding/input registers): the registers arrive as served.
        assert_eq!(words, server.words(i), "{e:?}");
        let value = decode(&e.codec, &words);
        // Source: reference library pymodbus 3.16.1 (server) with Python's struct packing the
        // raw value; "little" swaps the two registers of a 32-bit value (vendor word order;
        // the spec defines none). Same IEEE operations on both sides, so equal bit for bit.
        assert_eq!(value, server.engineering(i), "{e:?}: registers {words:04X?}");
    }
}

/// Writes each value with Ridgeline's codec and link, then checks what pymodbus saw.
async fn write_and_check(values: &[(Codec, f64)], function: u8) {
    let entries: Vec<Entry> =
        lay_out(RegisterSpace::Holding, 400, values).into_iter().map(|e| Entry { raw: 0.0, ..e }).collect();
    let server = PymodbusServer::start(&entries);
    let link = server.link("pymodbus");
    for (e, &(_, value)) in entries.iter().zip(values) {
        let words = encode(&e.codec, value).unwrap_or_else(|err| panic!("{e:?}: {err}"));
        link.write(e.address, &words, Urgency::Normal).await.unwrap_or_else(|err| panic!("{e:?}: {err}"));
        let event = server.next_event("write");
        // Source: Modbus Application Protocol Specification V1.1b3 §6.6 (write single
        // register, 0x06) and §6.12 (write multiple registers, 0x10); the function code as
        // the pymodbus 3.16.1 server decoded the request.
        assert_eq!(event["function"], function, "{e:?}: {event}");
        assert_eq!(event["address"], e.address, "{e:?}: {event}");
        assert_eq!(event["count"], e.codec.kind.width(), "{e:?}: {event}");
        assert_eq!(event["words"], json!(words), "{e:?}: {event}");
        let decoded = event["decoded"][e.address.to_string()].as_f64().expect("pymodbus decoded the write");
        // Source: reference library pymodbus 3.16.1 (server action callback), decoding the
        // written registers with Python's struct. Integer setpoints sit on the scale's grid;
        // an f32 carries 24 significant bits.
        let tolerance = match e.codec.kind {
            F32 => value.abs() * f64::from(f32::EPSILON),
            _ => 1e-9 * value.abs().max(1.0),
        };
        assert!((decoded - value).abs() <= tolerance, "{e:?}: wrote {value}, Python decoded {decoded}");
    }
}

#[tokio::test]
async fn client_writes_a_16_bit_setpoint_with_function_0x06_that_pymodbus_decodes_back() {
    write_and_check(&[(codec(U16, Big, 0.1, 0.0), 123.4), (codec(I16, Big, 0.01, 0.0), -12.34)], 0x06).await;
}

#[tokio::test]
async fn client_writes_32_bit_setpoints_with_function_0x10_in_both_word_orders_that_pymodbus_decodes_back() {
    let mut values = Vec::new();
    for order in [Big, Little] {
        values.extend([
            (codec(U32, order, 1.0, 0.0), 4_000_000_000.0),
            (codec(I32, order, 0.01, 0.0), -1_234.56),
            (codec(F32, order, 1.0, 0.0), -273.15),
            (codec(F32, order, 0.5, 10.0), 1_000.25),
        ]);
    }
    write_and_check(&values, 0x10).await;
}

/// The exception's code and function, with the error's text.
fn exception(result: Result<impl std::fmt::Debug, LinkError>) -> (u8, Function, u16, String) {
    match result {
        Err(e @ LinkError::Exception { .. }) => {
            let text = e.to_string();
            assert_eq!(e.kind(), "exception");
            let LinkError::Exception { code, function, address, .. } = e else { unreachable!() };
            (code, function, address, text)
        }
        other => panic!("expected a Modbus exception, got {other:?}"),
    }
}

#[tokio::test]
async fn exceptions_from_pymodbus_become_link_errors_naming_link_function_register_and_code() {
    let mut entries = lay_out(RegisterSpace::Input, 10, &[(codec(U16, Big, 1.0, 0.0), 7.0)]);
    entries.push(Entry {
        space: RegisterSpace::Holding,
        address: 20,
        codec: codec(U16, Big, 1.0, 0.0),
        raw: 0.0,
        busy: true,
    });
    let server = PymodbusServer::start(&entries);
    let link = server.link("plc-east");

    // Source: Modbus Application Protocol Specification V1.1b3 §7 (exception code 0x02,
    // ILLEGAL DATA ADDRESS), as the pymodbus 3.16.1 server answers an undefined register.
    let (code, function, address, text) = exception(link.read(RegisterSpace::Input, 7, 1).await);
    assert_eq!((code, function, address), (0x02, Function::ReadInputRegisters, 7), "{text}");
    for part in ["link plc-east", "read input registers (0x04)", "register 7", "exception 0x02"] {
        assert!(text.contains(part), "`{part}` missing from: {text}");
    }
    // A read that runs past the last defined register is refused the same way.
    let (code, ..) = exception(link.read(RegisterSpace::Input, 10, 2).await);
    assert_eq!(code, 0x02);

    // Source: Modbus Application Protocol Specification V1.1b3 §7 (exception code 0x06,
    // SERVER DEVICE BUSY), returned as ExcCodes.DEVICE_BUSY by the pymodbus 3.16.1 action callback.
    let (code, function, address, text) = exception(link.read(RegisterSpace::Holding, 20, 1).await);
    assert_eq!((code, function, address), (0x06, Function::ReadHoldingRegisters, 20), "{text}");
    for part in ["link plc-east", "read holding registers (0x03)", "register 20", "exception 0x06"] {
        assert!(text.contains(part), "`{part}` missing from: {text}");
    }
    let (code, function, _, text) = exception(link.write(20, &[1], Urgency::Normal).await);
    assert_eq!((code, function), (0x06, Function::WriteSingleRegister), "{text}");
    assert!(text.contains("write single register (0x06)"), "{text}");
    assert_eq!(server.next_event("busy")["function"], 3);

    // An exception is an answer, not a broken connection: the next request goes through.
    assert_eq!(link.read(RegisterSpace::Input, 10, 1).await.expect("a good read after exceptions"), vec![7]);
}

#[tokio::test]
async fn a_125_register_read_works_and_longer_plans_are_split_into_requests_of_at_most_125() {
    // 100 f32 values: 200 registers, more than one request may carry.
    let values: Vec<(Codec, f64)> =
        (0..100).map(|i| (codec(F32, Big, 1.0, 0.0), f64::from(i) * 1.25 - 50.0)).collect();
    let entries = lay_out(RegisterSpace::Input, 1000, &values);
    let server = PymodbusServer::start(&entries);
    let link = server.link("pymodbus");
    let served: Vec<u16> = (0..entries.len()).flat_map(|i| server.words(i)).collect();

    // Source: Modbus Application Protocol Specification V1.1b3 §6.4: quantity of input
    // registers 1 to 125 (0x7D); pymodbus 3.16.1 answers the largest allowed read.
    let words = link.read(RegisterSpace::Input, 1000, MAX_READ_REGISTERS).await.expect("a 125-register read");
    assert_eq!(words, served[..125]);
    assert_eq!(server.next_event("read")["count"], 125);

    let reads: Vec<RegisterRead> = entries
        .iter()
        .enumerate()
        .map(|(slot, e)| RegisterRead { slot, space: e.space, address: e.address, codec: e.codec })
        .collect();
    let blocks = plan_blocks(reads);
    assert!(blocks.len() >= 2, "200 registers need at least two requests: {blocks:?}");
    let mut decoded = vec![f64::NAN; entries.len()];
    for block in &blocks {
        let words = link.read(block.space, block.start, block.count).await.expect("a planned read");
        for m in &block.members {
            let at = usize::from(m.address - block.start);
            decoded[m.slot] = decode(&m.codec, &words[at..at + 2]);
        }
    }
    let mut sent = 0;
    for _ in &blocks {
        let count = server.next_event("read")["count"].as_u64().expect("a count");
        // Source: Modbus Application Protocol Specification V1.1b3 §6.3/§6.4 (at most 125
        // registers per read), counted by the pymodbus 3.16.1 server as it received them.
        assert!(count <= u64::from(MAX_READ_REGISTERS), "a request for {count} registers was sent");
        sent += count;
    }
    assert_eq!(sent, 200, "every register read exactly once");
    for (i, value) in decoded.iter().enumerate() {
        // Source: reference library pymodbus 3.16.1 (server) with Python's struct packing each f32.
        assert_eq!(*value, server.engineering(i), "value {i}");
    }
}

/// A plant without noise or lag: y = 2 u + 1, so y reads 4 at u = 1.5 and 6 at u = 2.5.
const PLANT: &str = r#"
step_s = 0.05

[[inputs]]
name = "u"
initial = 1.5
holding_register = 200

[[outputs]]
name = "y"
input_register = 100
expression = "2 * u + 1"
"#;

#[test]
fn a_pymodbus_client_reads_and_writes_the_ridgeline_simulator() {
    let dir = tempfile::tempdir().expect("a temp dir");
    let plant = write_file(dir.path(), "plant.toml", PLANT);
    // Port 0: the OS picks a free port and `sim` prints the address it bound.
    let (_sim, port) = spawn_sim(&plant, None);
    let host = "127.0.0.1";

    let out = python_json(&format!(
        r#"
import json, struct, time
from pymodbus.client import ModbusTcpClient

def f32(words):
    return struct.unpack(">f", struct.pack(">HH", *words))[0]

client = ModbusTcpClient("{host}", port={port}, timeout=2, retries=0)
assert client.connect(), "cannot connect to ridgeline sim at {host}:{port}"

def read(table, address):
    fn = client.read_input_registers if table == "input" else client.read_holding_registers
    r = fn(address, count=2, device_id=1)
    assert not r.isError(), f"{{table}} {{address}}: {{r}}"
    return f32(r.registers)

def failure(r):
    return dict(error=r.isError(), function=r.function_code, exception=getattr(r, "exception_code", None))

out = dict(y_before=read("input", 100), u_before=read("holding", 200))
w = client.write_registers(200, list(struct.unpack(">HH", struct.pack(">f", 2.5))), device_id=1)
out["write"] = dict(error=w.isError(), function=w.function_code, address=w.address, count=w.count)
out["u_after"] = read("holding", 200)
# y follows at the plant's next step (0.05 s); poll rather than guess how long that takes.
started = time.monotonic()
while True:
    out["y_after"] = read("input", 100)
    if out["y_after"] == 6.0 or time.monotonic() - started > 5:
        break
    time.sleep(0.01)
out["waited_s"] = time.monotonic() - started
out["unmapped_input"] = failure(client.read_input_registers(102, count=1, device_id=1))
out["unmapped_holding"] = failure(client.read_holding_registers(199, count=2, device_id=1))
client.close()
print(json.dumps(out))
"#
    ));

    // Source: reference library pymodbus 3.16.1 (client) with Python's struct decoding the
    // big-word-order f32 the simulator serves (Modbus Application Protocol Specification
    // V1.1b3 §6.3/§6.4 read holding/input registers).
    assert_eq!(out["y_before"], 4.0, "{out}");
    assert_eq!(out["u_before"], 1.5, "{out}");
    // Source: Modbus Application Protocol Specification V1.1b3 §6.12: the 0x10 response
    // echoes the starting address and the quantity written.
    assert_eq!(out["write"], json!({"error": false, "function": 0x10, "address": 200, "count": 2}), "{out}");
    assert_eq!(out["u_after"], 2.5, "{out}");
    assert_eq!(out["y_after"], 6.0, "y did not follow the write within 5 s: {out}");
    // Source: Modbus Application Protocol Specification V1.1b3 §7: exception responses carry
    // the function code plus 0x80 and exception code 0x02 (ILLEGAL DATA ADDRESS).
    assert_eq!(out["unmapped_input"], json!({"error": true, "function": 0x84, "exception": 2}), "{out}");
    assert_eq!(out["unmapped_holding"], json!({"error": true, "function": 0x83, "exception": 2}), "{out}");
}
