//! CHECKS.md "Modbus": Ridgeline's Modbus/TCP link against a peer that answers garbage.
//! Every answer that is not the one asked for is a typed link error within the request's
//! timeout, never a panic and never a request that hangs, and the link reads again as
//! soon as a proper server answers on the same port: the peer then relays requests to
//! the pymodbus server of `tests/peers/modbus_server.py` and its answers back.
//!
//! Frame layout: Modbus Messaging on TCP/IP Implementation Guide V1.0b §3.1.3 (the MBAP
//! header: transaction id, protocol id 0, length of the unit id and PDU, unit id) and
//! Modbus Application Protocol Specification V1.1b3 (§4.1 the PDU, §6.3/§6.4 reads,
//! §6.6/§6.12 writes, §7 exception responses).

use std::future::Future;
use std::sync::{Arc, Mutex};
use std::time::Duration;

use proptest::prelude::*;
use proptest::test_runner::{Config, TestCaseError, TestRunner};
use ridgeline::config::RegisterSpace;
use ridgeline::field::LinkError;
use ridgeline::field::modbus::{ModbusLink, Urgency};
use ridgeline::report::Reporting;
use tokio::io::{AsyncRead, AsyncReadExt, AsyncWriteExt};
use tokio::net::{TcpListener, TcpStream};
use tokio::time::Instant;

use crate::modbus_interop::{PymodbusServer, UNIT, codec, lay_out};

/// The link's timeout per request: what each answer that never completes costs.
const REQUEST: Duration = Duration::from_millis(300);
/// A generous bound on one request, its timeout included: past it the request is stuck.
const STUCK: Duration = Duration::from_secs(20);
/// The link's longest reconnection wait, short so that recovery is quick to see.
const BACKOFF: Duration = Duration::from_millis(20);
/// The registers every read asks for: input registers 100 and 101.
const START: u16 = 100;
const COUNT: u16 = 2;

/// One request as the peer received it.
#[derive(Debug, Clone)]
struct Frame {
    transaction: u16,
    unit: u8,
    function: u8,
    /// The quantity of a read or a multiple write, the value of a single write.
    quantity: u16,
    raw: Vec<u8>,
}

impl Frame {
    fn parse(raw: Vec<u8>) -> Option<Frame> {
        let word = |i: usize| Some(u16::from_be_bytes([*raw.get(i)?, *raw.get(i + 1)?]));
        Some(Frame {
            transaction: word(0)?,
            unit: *raw.get(6)?,
            function: *raw.get(7)?,
            quantity: word(10)?,
            raw: raw.clone(),
        })
    }
}

/// An MBAP frame: transaction id, protocol id 0, the length of what follows (unit id and
/// PDU), unit id, PDU. Source: Modbus Messaging on TCP/IP Implementation Guide V1.0b §3.1.3.
fn mbap(transaction: u16, unit: u8, pdu: &[u8]) -> Vec<u8> {
    let mut frame = transaction.to_be_bytes().to_vec();
    frame.extend([0, 0]);
    frame.extend(u16::try_from(pdu.len() + 1).expect("a PDU fits a frame").to_be_bytes());
    frame.push(unit);
    frame.extend(pdu);
    frame
}

/// The PDU of a read answer: function, byte count, registers.
/// Source: Modbus Application Protocol Specification V1.1b3 §6.3/§6.4 (byte count 2 x N).
fn registers(function: u8, words: &[u16]) -> Vec<u8> {
    let mut pdu = vec![function, (2 * words.len()) as u8];
    for w in words {
        pdu.extend(w.to_be_bytes());
    }
    pdu
}

/// The answer a correct server gives: registers `0xA000 + i` for a read, the echo of a
/// single write, the address and quantity of a multiple write.
/// Source: Modbus Application Protocol Specification V1.1b3 §6.3/§6.4, §6.6, §6.12.
fn proper(request: &Frame) -> Vec<u8> {
    let pdu = match request.function {
        0x03 | 0x04 => {
            registers(request.function, &(0..request.quantity).map(|i| 0xA000 + i).collect::<Vec<_>>())
        }
        _ => request.raw[7..12].to_vec(),
    };
    mbap(request.transaction, request.unit, &pdu)
}

type Answer = Arc<dyn Fn(&Frame) -> Vec<u8> + Send + Sync>;

/// What the peer does with each request.
#[derive(Clone)]
enum Reply {
    /// Relays the request to the pymodbus server and its answer back.
    Relay,
    /// Sends what `answer` makes of the request, `pace` between bytes when set, then
    /// closes the connection or keeps it open (and silent).
    Garbage { answer: Answer, pace: Option<Duration>, close: bool },
}

fn garbage(close: bool, answer: impl Fn(&Frame) -> Vec<u8> + Send + Sync + 'static) -> Reply {
    Reply::Garbage { answer: Arc::new(answer), pace: None, close }
}

/// A Modbus/TCP peer on a port of its own, answering as told.
struct GarbagePeer {
    address: String,
    reply: Arc<Mutex<Reply>>,
}

impl GarbagePeer {
    async fn start(upstream: &str) -> GarbagePeer {
        let listener = TcpListener::bind("127.0.0.1:0").await.expect("a loopback port");
        let address = listener.local_addr().expect("a bound address").to_string();
        let reply = Arc::new(Mutex::new(Reply::Relay));
        let (shared, upstream) = (reply.clone(), upstream.to_owned());
        tokio::spawn(async move {
            while let Ok((stream, _)) = listener.accept().await {
                tokio::spawn(serve(stream, shared.clone(), upstream.clone()));
            }
        });
        GarbagePeer { address, reply }
    }

    fn answer(&self, reply: Reply) {
        *self.reply.lock().unwrap_or_else(|p| p.into_inner()) = reply;
    }

    /// A link to this peer, as the service builds one, with a short backoff.
    fn link(&self, timeout: Duration) -> ModbusLink {
        ModbusLink::reporting_to("garbage", &self.address, UNIT, timeout, BACKOFF, Reporting::default())
    }
}

/// One connection: each request is answered as the peer is told at the time.
async fn serve(mut stream: TcpStream, reply: Arc<Mutex<Reply>>, upstream: String) {
    let mut server: Option<TcpStream> = None;
    while let Some(request) = read_frame(&mut stream).await.and_then(Frame::parse) {
        let now = reply.lock().unwrap_or_else(|p| p.into_inner()).clone();
        match now {
            Reply::Relay => {
                if server.is_none() {
                    server = TcpStream::connect(&upstream).await.ok();
                }
                let Some(upstream) = server.as_mut() else { return };
                if upstream.write_all(&request.raw).await.is_err() {
                    return;
                }
                let Some(answer) = read_frame(upstream).await else { return };
                if stream.write_all(&answer).await.is_err() {
                    return;
                }
            }
            Reply::Garbage { answer, pace, close } => {
                let bytes = answer(&request);
                match pace {
                    None => {
                        let _ = stream.write_all(&bytes).await;
                    }
                    Some(pace) => {
                        for b in bytes {
                            if stream.write_all(&[b]).await.is_err() {
                                return;
                            }
                            tokio::time::sleep(pace).await;
                        }
                    }
                }
                if close {
                    // Dropping the stream closes the connection (a FIN: the request was read whole).
                    return;
                }
            }
        }
    }
}

/// One MBAP frame as bytes; `None` at the end of the stream.
async fn read_frame(stream: &mut (impl AsyncRead + Unpin)) -> Option<Vec<u8>> {
    let mut frame = vec![0u8; 7];
    stream.read_exact(&mut frame).await.ok()?;
    let length = usize::from(u16::from_be_bytes([frame[4], frame[5]]));
    let mut rest = vec![0u8; length.checked_sub(1)?];
    stream.read_exact(&mut rest).await.ok()?;
    frame.extend(rest);
    Some(frame)
}

/// Runs one request in a task of its own: a panic, or a request still running after
/// [`STUCK`], is reported as such.
async fn guarded<T: Send + 'static>(
    request: impl Future<Output = Result<T, LinkError>> + Send + 'static,
) -> Result<Result<T, LinkError>, String> {
    match tokio::time::timeout(STUCK, tokio::spawn(request)).await {
        Err(_) => Err(format!("the request was still running after {STUCK:?}")),
        Ok(Err(e)) if e.is_panic() => Err(format!("the request panicked: {e}")),
        Ok(Err(e)) => Err(format!("the request's task failed: {e}")),
        Ok(Ok(result)) => Ok(result),
    }
}

async fn read(link: &ModbusLink) -> Result<Result<Vec<u16>, LinkError>, String> {
    let link = link.clone();
    guarded(async move { link.read(RegisterSpace::Input, START, COUNT).await }).await
}

/// Once the peer relays to pymodbus again, the link reads what pymodbus serves: at once,
/// or after it has waited out its reconnection backoff.
async fn recovers(peer: &GarbagePeer, link: &ModbusLink, served: &[u16]) -> Result<(), String> {
    peer.answer(Reply::Relay);
    let deadline = Instant::now() + STUCK;
    loop {
        match read(link).await? {
            Ok(words) if words == served => return Ok(()),
            Ok(words) => {
                return Err(format!("read {words:04X?} through a proper server serving {served:04X?}"));
            }
            Err(e) if Instant::now() < deadline => {
                if !e.to_string().starts_with("link garbage: ") {
                    return Err(format!("an error that does not name the link: {e}"));
                }
                tokio::time::sleep(Duration::from_millis(10)).await;
            }
            Err(e) => return Err(format!("still failing after {STUCK:?} of a proper server: {e}")),
        }
    }
}

/// The pymodbus server the peer relays to, serving `0x1234, 0xBEEF` at input registers 100 and 101.
fn pymodbus() -> (PymodbusServer, Vec<u16>) {
    let u16 = codec(ridgeline::config::RegisterType::U16, ridgeline::config::WordOrder::Big, 1.0, 0.0);
    let server = PymodbusServer::start(&lay_out(
        RegisterSpace::Input,
        START,
        &[(u16, f64::from(0x1234)), (u16, f64::from(0xBEEF))],
    ));
    let served = [server.words(0), server.words(1)].concat();
    (server, served)
}

/// A named kind of garbage, the error kind it must give and a part of its reason.
struct Case {
    name: &'static str,
    reply: Reply,
    kind: &'static str,
    reason: &'static str,
}

fn case(name: &'static str, kind: &'static str, reason: &'static str, reply: Reply) -> Case {
    Case { name, reply, kind, reason }
}

/// Bytes from a fixed xorshift sequence: noise, the same on every run.
fn noise(n: usize, mut state: u32) -> Vec<u8> {
    (0..n)
        .map(|_| {
            state ^= state << 13;
            state ^= state >> 17;
            state ^= state << 5;
            state as u8
        })
        .collect()
}

/// Every named kind of garbage answer to a read of input registers 100 and 101.
fn read_cases() -> Vec<Case> {
    let with_pdu = |pdu: Vec<u8>| move |r: &Frame| mbap(r.transaction, r.unit, &pdu);
    vec![
        // Noise whose length field (bytes 5 and 6) is larger than what follows: the link
        // waits for the rest, then times out.
        case("random bytes", "timeout", "no answer within 300 ms", garbage(false, |_| noise(40, 13))),
        case(
            "random bytes, then the connection closes",
            "transport",
            "the server closed the connection after 40 bytes of an incomplete answer",
            garbage(true, |_| noise(40, 13)),
        ),
        case(
            "an HTTP error page",
            "timeout",
            "no answer within 300 ms",
            garbage(false, |_| b"HTTP/1.1 400 Bad Request\r\n\r\n".to_vec()),
        ),
        // Source: Implementation Guide V1.0b §3.1.3: the server copies the transaction id.
        case(
            "another transaction id",
            "transport",
            "MBAP header does not match",
            garbage(false, |r| proper(&Frame { transaction: r.transaction.wrapping_add(1), ..r.clone() })),
        ),
        // Source: Implementation Guide V1.0b §3.1.3: the server copies the unit id.
        case(
            "another unit id",
            "transport",
            "MBAP header does not match",
            garbage(false, |r| proper(&Frame { unit: r.unit.wrapping_add(1), ..r.clone() })),
        ),
        // Source: Implementation Guide V1.0b §3.1.3: protocol id 0 is Modbus.
        case(
            "a protocol id other than 0",
            "transport",
            "protocol identifier",
            garbage(false, |r| {
                let mut frame = proper(r);
                frame[3] = 1;
                frame
            }),
        ),
        // Source: Application Protocol V1.1b3 §6.4: the answer carries the request's function.
        case(
            "an answer for another function",
            "transport",
            "answered function 0x03 to a request for function 0x04",
            garbage(false, |r| mbap(r.transaction, r.unit, &registers(0x03, &[1, 2]))),
        ),
        // Source: Application Protocol V1.1b3 §7: an exception carries function + 0x80.
        case(
            "an exception for another function",
            "transport",
            "answered function 0x83 to a request for function 0x04",
            garbage(false, with_pdu(vec![0x83, 0x02])),
        ),
        // Source: Application Protocol V1.1b3 §7: codes 0x01 to 0x0B; 0x42 is none of them.
        // An exception is an answer: the connection stays up.
        case(
            "an exception with a code the specification does not define",
            "exception",
            "exception 0x42 (not a code the Modbus specification defines)",
            garbage(false, with_pdu(vec![0x84, 0x42])),
        ),
        case(
            "an exception without its code",
            "transport",
            "malformed answer: the PDU is shorter than its function needs",
            garbage(false, with_pdu(vec![0x84])),
        ),
        // Source: Application Protocol V1.1b3 §6.4: the byte count is 2 x N.
        case(
            "an odd byte count",
            "transport",
            "malformed answer",
            garbage(false, with_pdu(vec![0x04, 3, 0x12, 0x34, 0x56])),
        ),
        case(
            "fewer registers than asked for",
            "transport",
            "the answer holds 1 register, the request asked for 2",
            garbage(false, with_pdu(registers(0x04, &[7]))),
        ),
        case(
            "more registers than asked for",
            "transport",
            "the answer holds 3 registers, the request asked for 2",
            garbage(false, with_pdu(registers(0x04, &[7, 8, 9]))),
        ),
        case(
            "a byte count larger than the registers that follow",
            "transport",
            "malformed answer: the PDU is shorter than its function needs",
            garbage(false, with_pdu(vec![0x04, 4, 0x12, 0x34])),
        ),
        case(
            "a byte count smaller than the registers that follow",
            "transport",
            "malformed answer",
            garbage(false, with_pdu(vec![0x04, 2, 0x12, 0x34, 0x56, 0x78])),
        ),
        case(
            "a length field of 0",
            "transport",
            "malformed answer",
            garbage(false, |r| [&r.raw[..4], &[0, 0, r.unit]].concat()),
        ),
        case(
            "a length field of 1: a unit id and no PDU",
            "transport",
            "malformed answer: the PDU is shorter than its function needs",
            garbage(false, |r| [&r.raw[..4], &[0, 1, r.unit]].concat()),
        ),
        case(
            "a length field larger than the frame",
            "timeout",
            "no answer within 300 ms",
            garbage(false, |r| {
                let mut frame = proper(r);
                frame[5] += 10;
                frame
            }),
        ),
        // Source: Application Protocol V1.1b3 §4.1: a PDU is at most 253 bytes.
        case(
            "a length field of 65535 with as many bytes",
            "transport",
            "malformed answer",
            garbage(false, |r| {
                [&r.raw[..4], &[0xFF, 0xFF, r.unit, 0x04, 0xFE][..], &[0x55; 65_532]].concat()
            }),
        ),
        case(
            "a frame cut short",
            "timeout",
            "no answer within 300 ms",
            garbage(false, |r| proper(r)[..9].to_vec()),
        ),
        case(
            "a frame cut short, then the connection closes",
            "transport",
            "the server closed the connection after 9 bytes of an incomplete answer",
            garbage(true, |r| proper(r)[..9].to_vec()),
        ),
        case(
            "the connection closes without an answer",
            "transport",
            "the server closed the connection without answering",
            garbage(true, |_| Vec::new()),
        ),
        case("no answer at all", "timeout", "no answer within 300 ms", garbage(false, |_| Vec::new())),
        // The timeout covers the whole exchange, not each read from the socket.
        case(
            "a proper answer trickling in slower than the timeout",
            "timeout",
            "no answer within 300 ms",
            Reply::Garbage { answer: Arc::new(proper), pace: Some(Duration::from_millis(50)), close: false },
        ),
        case(
            "an answer to an older request, then the right one",
            "transport",
            "MBAP header does not match",
            garbage(false, |r| {
                let older = proper(&Frame { transaction: r.transaction.wrapping_sub(1), ..r.clone() });
                [older, proper(r)].concat()
            }),
        ),
    ]
}

#[tokio::test]
async fn every_kind_of_garbage_answer_is_a_typed_error_and_the_link_reads_again_after_it() {
    let (server, served) = pymodbus();
    let peer = GarbagePeer::start(&server.address).await;
    // One link through every case: each must leave it able to read again.
    let link = peer.link(REQUEST);
    recovers(&peer, &link, &served).await.unwrap_or_else(|e| panic!("before any garbage: {e}"));
    for case in read_cases() {
        peer.answer(case.reply.clone());
        let e = match read(&link).await {
            Err(why) => panic!("{}: {why}", case.name),
            Ok(Ok(words)) => panic!("{}: read {words:04X?} from garbage", case.name),
            Ok(Err(e)) => e,
        };
        assert_eq!(e.kind(), case.kind, "{}: {e}", case.name);
        let text = e.to_string();
        assert!(
            text.starts_with("link garbage: read input registers (0x04) at register 100 "),
            "{}: {text}",
            case.name
        );
        assert!(text.contains(case.reason), "{}: `{}` missing from: {text}", case.name, case.reason);
        recovers(&peer, &link, &served).await.unwrap_or_else(|e| panic!("after {}: {e}", case.name));
    }
}

#[tokio::test]
async fn a_proper_answer_followed_by_junk_is_read_and_the_junk_does_not_stick() {
    let (server, served) = pymodbus();
    let peer = GarbagePeer::start(&server.address).await;
    let link = peer.link(REQUEST);
    peer.answer(garbage(false, |r| [proper(r), noise(20, 7)].concat()));
    let words = read(&link).await.unwrap_or_else(|e| panic!("{e}")).expect("the proper answer is read");
    assert_eq!(words, [0xA000, 0xA001]);
    recovers(&peer, &link, &served).await.unwrap_or_else(|e| panic!("after the junk: {e}"));
}

#[tokio::test]
async fn writes_answered_with_a_wrong_echo_are_refused() {
    let (server, served) = pymodbus();
    let peer = GarbagePeer::start(&server.address).await;
    let link = peer.link(REQUEST);
    let cases: Vec<(&str, &[u16], Reply, &str)> = vec![
        // Source: Application Protocol V1.1b3 §6.6: the answer to a single write is its echo.
        (
            "a single write echoed with another value",
            &[7],
            garbage(false, |r| mbap(r.transaction, r.unit, &[0x06, 0, 200, 0, 8])),
            "answered 8 at register 200 to a write of 7 at register 200",
        ),
        (
            "a single write echoed at another register",
            &[7],
            garbage(false, |r| mbap(r.transaction, r.unit, &[0x06, 0, 201, 0, 7])),
            "answered 7 at register 201 to a write of 7 at register 200",
        ),
        // Source: Application Protocol V1.1b3 §6.12: the answer gives the address and quantity written.
        (
            "a multiple write answered with another quantity",
            &[7, 8],
            garbage(false, |r| mbap(r.transaction, r.unit, &[0x10, 0, 200, 0, 1])),
            "the answer acknowledges 1 register from register 200, the request wrote 2 from register 200",
        ),
        (
            "a multiple write answered with another address",
            &[7, 8],
            garbage(false, |r| mbap(r.transaction, r.unit, &[0x10, 0, 199, 0, 2])),
            "the answer acknowledges 2 registers from register 199, the request wrote 2 from register 200",
        ),
    ];
    for (name, words, reply, reason) in cases {
        peer.answer(reply);
        let request = {
            let (link, words) = (link.clone(), words.to_vec());
            async move { link.write(200, &words, Urgency::Normal).await }
        };
        let e = match guarded(request).await {
            Err(why) => panic!("{name}: {why}"),
            Ok(Ok(())) => panic!("{name}: taken for a proper answer"),
            Ok(Err(e)) => e,
        };
        assert_eq!(e.kind(), "transport", "{name}: {e}");
        assert!(e.to_string().contains(reason), "{name}: `{reason}` missing from: {e}");
        recovers(&peer, &link, &served).await.unwrap_or_else(|e| panic!("after {name}: {e}"));
    }
}

/// A proper answer with random damage, or plain noise; then the connection closes or stays open.
#[derive(Debug, Clone)]
enum Damage {
    /// Sets the byte at this index (of the proper answer) to this value.
    Set(prop::sample::Index, u8),
    /// Cuts the answer at this index.
    Cut(prop::sample::Index),
    /// Appends bytes.
    Append(Vec<u8>),
    /// Sets the MBAP length field.
    Length(u16),
    /// Answers this many registers in a well-formed frame, whatever the request asked for.
    Registers(u8),
}

fn damage() -> impl Strategy<Value = Damage> {
    prop_oneof![
        4 => (any::<prop::sample::Index>(), any::<u8>()).prop_map(|(i, b)| Damage::Set(i, b)),
        1 => any::<prop::sample::Index>().prop_map(Damage::Cut),
        1 => prop::collection::vec(any::<u8>(), 1..12).prop_map(Damage::Append),
        1 => prop_oneof![0u16..16, any::<u16>()].prop_map(Damage::Length),
        1 => (0u8..=126).prop_map(Damage::Registers),
    ]
}

fn garbage_answer() -> impl Strategy<Value = (Option<Vec<Damage>>, Vec<u8>, bool)> {
    (
        prop::option::weighted(0.8, prop::collection::vec(damage(), 1..4)),
        prop::collection::vec(any::<u8>(), 0..64),
        any::<bool>(),
    )
}

fn damaged(request: &Frame, damages: &[Damage]) -> Vec<u8> {
    let mut frame = proper(request);
    for d in damages {
        match d {
            Damage::Set(i, b) if !frame.is_empty() => {
                let at = i.index(frame.len());
                frame[at] = *b;
            }
            Damage::Set(..) => {}
            Damage::Cut(i) => frame.truncate(i.index(frame.len() + 1)),
            Damage::Append(bytes) => frame.extend(bytes),
            Damage::Length(n) if frame.len() >= 6 => frame[4..6].copy_from_slice(&n.to_be_bytes()),
            Damage::Length(_) => {}
            Damage::Registers(n) => {
                let words: Vec<u16> = (0..u16::from(*n)).collect();
                frame = mbap(request.transaction, request.unit, &registers(request.function, &words));
            }
        }
    }
    frame
}

#[test]
fn random_garbage_answers_are_typed_errors_never_a_panic_or_a_hang() {
    let runtime = tokio::runtime::Runtime::new().expect("a tokio runtime");
    let (server, served) = pymodbus();
    let peer = runtime.block_on(GarbagePeer::start(&server.address));
    // A shorter timeout than the named cases: the answers that never complete cost it.
    let link = runtime.block_on(async { peer.link(Duration::from_millis(150)) });
    let mut runner = TestRunner::new(Config { cases: 200, failure_persistence: None, ..Config::default() });
    let result = runner.run(&garbage_answer(), |(damages, noise, close)| {
        runtime.block_on(async {
            peer.answer(Reply::Garbage {
                answer: Arc::new(move |r: &Frame| match &damages {
                    Some(damages) => damaged(r, damages),
                    None => noise.clone(),
                }),
                pace: None,
                close,
            });
            match read(&link).await.map_err(TestCaseError::fail)? {
                // A damage may leave a proper answer (a register's value changed): all of it is there.
                Ok(words) => prop_assert_eq!(words.len(), usize::from(COUNT)),
                Err(e) => {
                    prop_assert!(["transport", "timeout", "exception"].contains(&e.kind()), "{}", e);
                    let text = e.to_string();
                    prop_assert!(
                        text.starts_with("link garbage: read input registers (0x04) at register 100 "),
                        "{}",
                        text
                    );
                }
            }
            recovers(&peer, &link, &served).await.map_err(TestCaseError::fail)
        })
    });
    if let Err(e) = result {
        panic!("{e}");
    }
}
