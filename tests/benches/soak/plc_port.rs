//! The soak's relay on the PLC's port: Ridgeline's link points here, and every frame
//! passes through it to the simulator, every write logged, unless a fault is injected.

use std::io::{Read, Write};
use std::net::{Shutdown, SocketAddr, TcpListener, TcpStream};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::{Duration, Instant};

/// How the relay on the PLC's port misbehaves.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Fault {
    None,
    /// Connections are cut, and new ones closed at once (a cable pulled at a switch that
    /// answers with resets).
    Refuse,
    /// Requests are taken and never answered (a PLC hung, or a link that drops packets).
    Silent,
    /// Every request is answered with exception 0x06, server device busy.
    Busy,
    /// Requests reach the PLC, and its answers come back this late.
    Late(Duration),
}

impl Fault {
    pub fn name(self) -> &'static str {
        match self {
            Fault::None => "none",
            Fault::Refuse => "link cut (connections reset)",
            Fault::Silent => "PLC silent (no answers)",
            Fault::Busy => "PLC busy (exception 0x06)",
            Fault::Late(_) => "PLC late (answers after 2 s)",
        }
    }
}

/// A write request as it reached the PLC's port.
#[derive(Debug, Clone)]
pub struct SeenWrite {
    pub at: Instant,
    pub function: u8,
    pub address: u16,
    pub words: Vec<u16>,
}

pub fn lock<T>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|p| p.into_inner())
}

/// The soak's relay on the PLC's port: Ridgeline's link points here, and it passes
/// Modbus/TCP frames on to the simulator, logging every write, unless told to misbehave.
pub struct PlcPort {
    pub port: u16,
    shared: Arc<PortShared>,
}

struct PortShared {
    fault: Mutex<Fault>,
    /// The simulator's port, `None` while it is down.
    upstream: Mutex<Option<u16>>,
    clients: Mutex<Vec<(u64, TcpStream)>>,
    writes: Mutex<Vec<SeenWrite>>,
    requests: AtomicU64,
    next_client: AtomicU64,
}

impl PlcPort {
    pub fn start() -> std::io::Result<PlcPort> {
        let listener = TcpListener::bind("127.0.0.1:0")?;
        let port = listener.local_addr()?.port();
        let shared = Arc::new(PortShared {
            fault: Mutex::new(Fault::None),
            upstream: Mutex::new(None),
            clients: Mutex::new(Vec::new()),
            writes: Mutex::new(Vec::new()),
            requests: AtomicU64::new(0),
            next_client: AtomicU64::new(0),
        });
        let accepting = shared.clone();
        std::thread::spawn(move || {
            for stream in listener.incoming() {
                let Ok(stream) = stream else { continue };
                if *lock(&accepting.fault) == Fault::Refuse {
                    continue; // dropped: closed at once
                }
                let id = accepting.next_client.fetch_add(1, Ordering::Relaxed);
                if let Ok(copy) = stream.try_clone() {
                    lock(&accepting.clients).push((id, copy));
                }
                let shared = accepting.clone();
                std::thread::spawn(move || {
                    relay(&shared, stream);
                    lock(&shared.clients).retain(|(i, _)| *i != id);
                });
            }
        });
        Ok(PlcPort { port, shared })
    }

    pub fn set_fault(&self, fault: Fault) {
        *lock(&self.shared.fault) = fault;
        if fault == Fault::Refuse {
            self.cut();
        }
    }

    /// Where the simulator listens now; `None` cuts every connection.
    pub fn set_upstream(&self, port: Option<u16>) {
        *lock(&self.shared.upstream) = port;
        if port.is_none() {
            self.cut();
        }
    }

    fn cut(&self) {
        for (_, stream) in lock(&self.shared.clients).drain(..) {
            let _ = stream.shutdown(Shutdown::Both);
        }
    }

    pub fn writes(&self) -> Vec<SeenWrite> {
        lock(&self.shared.writes).clone()
    }

    pub fn writes_seen(&self) -> usize {
        lock(&self.shared.writes).len()
    }

    /// Requests of any kind that reached the port.
    pub fn requests(&self) -> u64 {
        self.shared.requests.load(Ordering::Relaxed)
    }
}

/// One Modbus/TCP frame: the 7-byte MBAP header and the PDU.
/// Source: Modbus Messaging on TCP/IP Implementation Guide V1.0b §3.1.3.
fn read_frame(stream: &mut TcpStream) -> Option<Vec<u8>> {
    let mut frame = vec![0u8; 7];
    stream.read_exact(&mut frame).ok()?;
    let length = usize::from(u16::from_be_bytes([frame[4], frame[5]]));
    if !(2..=254).contains(&length) {
        return None;
    }
    frame.resize(6 + length, 0);
    stream.read_exact(&mut frame[7..]).ok()?;
    Some(frame)
}

/// Serves one of Ridgeline's connections until either side closes it.
fn relay(shared: &PortShared, mut client: TcpStream) {
    let mut upstream: Option<TcpStream> = None;
    while let Some(frame) = read_frame(&mut client) {
        shared.requests.fetch_add(1, Ordering::Relaxed);
        note_write(shared, &frame);
        let fault = *lock(&shared.fault);
        match fault {
            Fault::Refuse => return,
            Fault::Silent => continue,
            Fault::Busy => {
                // Source: Modbus Application Protocol Specification V1.1b3 §7, exception 0x06.
                let answer = [frame[0], frame[1], 0, 0, 0, 3, frame[6], frame[7] | 0x80, 0x06];
                if client.write_all(&answer).is_err() {
                    return;
                }
                continue;
            }
            Fault::Late(delay) => std::thread::sleep(delay),
            Fault::None => {}
        }
        if upstream.is_none() {
            let Some(port) = *lock(&shared.upstream) else { return };
            let Ok(stream) =
                TcpStream::connect_timeout(&SocketAddr::from(([127, 0, 0, 1], port)), Duration::from_secs(1))
            else {
                return;
            };
            let _ = stream.set_read_timeout(Some(Duration::from_secs(5)));
            upstream = Some(stream);
        }
        let Some(plc) = upstream.as_mut() else { return };
        let Some(answer) = plc.write_all(&frame).ok().and_then(|()| read_frame(plc)) else { return };
        if client.write_all(&answer).is_err() {
            return;
        }
    }
}

/// Logs a request that writes registers (functions 0x06 and 0x10; any other writing
/// function is logged with no words, and fails the check).
/// Source: Modbus Application Protocol Specification V1.1b3 §6.6, §6.12.
fn note_write(shared: &PortShared, frame: &[u8]) {
    let pdu = &frame[7..];
    let word = |i: usize| pdu.get(i..i + 2).map(|b| u16::from_be_bytes([b[0], b[1]]));
    let (address, words) = match pdu[0] {
        0x06 => (word(1), word(3).into_iter().collect()),
        0x10 => {
            let count = usize::from(word(3).unwrap_or(0));
            (word(1), (0..count).filter_map(|k| word(6 + 2 * k)).collect())
        }
        0x05 | 0x0F | 0x16 | 0x17 => (word(1), Vec::new()),
        _ => return,
    };
    lock(&shared.writes).push(SeenWrite {
        at: Instant::now(),
        function: pdu[0],
        address: address.unwrap_or(0),
        words,
    });
}
