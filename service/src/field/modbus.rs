//! A Modbus/TCP link: one connection shared by every loop that uses it, one request in
//! flight, a timeout on each request, answers checked against their request, and
//! reconnection with capped exponential backoff and jitter.

use std::io;
use std::pin::Pin;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::task::{Context as TaskContext, Poll};
use std::time::Duration;

use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::net::TcpStream;
use tokio::sync::Mutex;
use tokio::time::{Instant, timeout};
use tokio_modbus::client::{Client, Context};
use tokio_modbus::{ExceptionCode, ProtocolError, Response, Slave};

use super::error::{Function, LinkError};
use crate::config::RegisterSpace;
use crate::report::Reporting;

/// First wait before reconnecting after a failure; doubles per failure up to the cap.
const BACKOFF_FIRST: Duration = Duration::from_millis(200);
/// The longest wait, unless the link's loops tick faster (see [`ModbusLink::reporting_to`]).
pub const BACKOFF_CAP: Duration = Duration::from_secs(5);

/// A cheap-to-clone handle on one Modbus/TCP server.
#[derive(Clone)]
pub struct ModbusLink {
    inner: Arc<Inner>,
}

struct Inner {
    name: String,
    address: String,
    unit: u8,
    timeout: Duration,
    backoff_cap: Duration,
    reporting: Reporting,
    /// Held for the whole of a request, so requests on a link never overlap.
    connection: Mutex<Connection>,
}

#[derive(Default)]
struct Connection {
    context: Option<Context>,
    /// What the current connection's stream has seen, for transport errors' reasons.
    watch: Arc<Watch>,
    /// Failures since the last answer; a connection that is accepted but never answers
    /// does not reset it, so a hung peer backs off like a dead one.
    failures: u32,
    retry_at: Option<Instant>,
    connected_once: bool,
}

/// Whether a request waits out the reconnection backoff.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Urgency {
    Normal,
    /// Try to connect now whatever the backoff says (the writes of a stopping service).
    Now,
}

/// One request, before it is sent.
enum Request<'a> {
    Read(RegisterSpace, u16, u16),
    Write(u16, &'a [u16]),
}

impl Request<'_> {
    fn function(&self) -> Function {
        match self {
            Request::Read(RegisterSpace::Input, ..) => Function::ReadInputRegisters,
            Request::Read(RegisterSpace::Holding, ..) => Function::ReadHoldingRegisters,
            Request::Write(_, [_]) => Function::WriteSingleRegister,
            Request::Write(..) => Function::WriteMultipleRegisters,
        }
    }

    fn address(&self) -> u16 {
        match self {
            Request::Read(_, a, _) | Request::Write(a, _) => *a,
        }
    }

    /// The request as tokio-modbus sends it.
    fn wire(&self) -> tokio_modbus::Request<'_> {
        match *self {
            Request::Read(RegisterSpace::Input, a, n) => tokio_modbus::Request::ReadInputRegisters(a, n),
            Request::Read(RegisterSpace::Holding, a, n) => tokio_modbus::Request::ReadHoldingRegisters(a, n),
            Request::Write(a, [word]) => tokio_modbus::Request::WriteSingleRegister(a, *word),
            Request::Write(a, words) => tokio_modbus::Request::WriteMultipleRegisters(a, words.into()),
        }
    }

    /// Sends the request and checks that the answer is the one it asked for: the
    /// registers read, or an exception code; `Err` is why the exchange failed.
    ///
    /// tokio-modbus's `Reader`/`Writer` helpers only `debug_assert` the register count
    /// and the write echo (a panic in debug builds, a wrong answer taken in release), so
    /// requests go through `Client::call` and the answer is checked here.
    async fn send(&self, context: &mut Context) -> Result<Result<Vec<u16>, ExceptionCode>, String> {
        match context.call(self.wire()).await {
            Ok(Ok(response)) => self.check(response).map(Ok),
            Ok(Err(code)) => Ok(Err(code)),
            Err(e) => Err(protocol_reason(&e)),
        }
    }

    /// Source: Modbus Application Protocol Specification V1.1b3 §6.3 and §6.4 (a read
    /// answers 2 x N bytes for N registers asked), §6.6 (a single write is echoed) and
    /// §6.12 (a multiple write answers its starting address and quantity).
    fn check(&self, response: Response) -> Result<Vec<u16>, String> {
        match (self, response) {
            (
                Request::Read(_, _, count),
                Response::ReadInputRegisters(words) | Response::ReadHoldingRegisters(words),
            ) => {
                if words.len() == usize::from(*count) {
                    Ok(words)
                } else {
                    Err(format!("the answer holds {}, the request asked for {count}", registers(words.len())))
                }
            }
            (Request::Write(address, [word]), Response::WriteSingleRegister(at, echoed)) => {
                if (at, echoed) == (*address, *word) {
                    Ok(Vec::new())
                } else {
                    Err(format!(
                        "answered {echoed} at register {at} to a write of {word} at register {address}; \
                         the answer must echo the request"
                    ))
                }
            }
            (Request::Write(address, words), Response::WriteMultipleRegisters(at, count)) => {
                if (at, usize::from(count)) == (*address, words.len()) {
                    Ok(Vec::new())
                } else {
                    Err(format!(
                        "the answer acknowledges {} from register {at}, the request wrote {} from register {address}",
                        registers(usize::from(count)),
                        words.len()
                    ))
                }
            }
            (_, other) => Err(format!("answered function 0x{:02X}", other.function_code().value())),
        }
    }
}

fn registers(n: usize) -> String {
    if n == 1 { "1 register".to_owned() } else { format!("{n} registers") }
}

/// Why tokio-modbus refused an answer, in words (its own text for a function-code
/// mismatch is the whole decoded answer).
fn protocol_reason(e: &tokio_modbus::Error) -> String {
    match e {
        tokio_modbus::Error::Protocol(ProtocolError::HeaderMismatch { message, .. }) => {
            format!("the answer's MBAP header does not match the request ({message})")
        }
        tokio_modbus::Error::Protocol(ProtocolError::FunctionCodeMismatch { request, result }) => {
            let answered = match result {
                Ok(response) => response.function_code().value(),
                Err(exception) => exception.function.value() | 0x80,
            };
            format!("answered function 0x{answered:02X} to a request for function 0x{:02X}", request.value())
        }
        // tokio-modbus's decoder: InvalidData for what breaks the frame's rules, InvalidInput
        // for a PDU past 253 bytes, UnexpectedEof (its reader's "failed to fill whole
        // buffer") for a PDU shorter than its function needs.
        tokio_modbus::Error::Transport(io) if io.kind() == io::ErrorKind::UnexpectedEof => {
            "malformed answer: the PDU is shorter than its function needs".to_owned()
        }
        tokio_modbus::Error::Transport(io)
            if matches!(io.kind(), io::ErrorKind::InvalidData | io::ErrorKind::InvalidInput) =>
        {
            format!("malformed answer: {io}")
        }
        tokio_modbus::Error::Transport(io) => io.to_string(),
    }
}

/// What a connection's stream has seen since the last request went out: tokio-modbus
/// reports a closed connection as the thread's last OS error, which names something else.
#[derive(Debug, Default)]
struct Watch {
    closed: AtomicBool,
    read_since_request: AtomicUsize,
}

impl Watch {
    /// Why the exchange failed, if the server closed the connection.
    fn closed_reason(&self) -> Option<String> {
        if !self.closed.load(Ordering::Relaxed) {
            return None;
        }
        Some(match self.read_since_request.load(Ordering::Relaxed) {
            0 => "the server closed the connection without answering".to_owned(),
            n => format!("the server closed the connection after {n} bytes of an incomplete answer"),
        })
    }
}

/// A TCP stream that tells its [`Watch`] what it sees.
#[derive(Debug)]
struct Watched {
    stream: TcpStream,
    watch: Arc<Watch>,
}

impl AsyncRead for Watched {
    fn poll_read(
        mut self: Pin<&mut Self>,
        cx: &mut TaskContext<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        let before = buf.filled().len();
        let polled = Pin::new(&mut self.stream).poll_read(cx, buf);
        if let Poll::Ready(Ok(())) = polled {
            let read = buf.filled().len() - before;
            if read == 0 && buf.remaining() > 0 {
                self.watch.closed.store(true, Ordering::Relaxed);
            }
            self.watch.read_since_request.fetch_add(read, Ordering::Relaxed);
        }
        polled
    }
}

impl AsyncWrite for Watched {
    fn poll_write(mut self: Pin<&mut Self>, cx: &mut TaskContext<'_>, buf: &[u8]) -> Poll<io::Result<usize>> {
        self.watch.read_since_request.store(0, Ordering::Relaxed);
        Pin::new(&mut self.stream).poll_write(cx, buf)
    }

    fn poll_flush(mut self: Pin<&mut Self>, cx: &mut TaskContext<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.stream).poll_flush(cx)
    }

    fn poll_shutdown(mut self: Pin<&mut Self>, cx: &mut TaskContext<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.stream).poll_shutdown(cx)
    }
}

impl std::fmt::Debug for ModbusLink {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ModbusLink")
            .field("name", &self.inner.name)
            .field("address", &self.inner.address)
            .finish()
    }
}

impl ModbusLink {
    /// A link to `address` (`host:port`); nothing is connected until the first request.
    pub fn new(name: &str, address: &str, unit: u8, timeout: Duration) -> Self {
        Self::reporting_to(name, address, unit, timeout, BACKOFF_CAP, Reporting::default())
    }

    /// A link that counts its requests in the metrics and records going down and up.
    /// `backoff_cap` caps the reconnection backoff (never above 5 s), so that a link whose
    /// loops tick faster is retried on every tick: a fallback write must reach the PLC on
    /// the first tick it answers again.
    pub fn reporting_to(
        name: &str,
        address: &str,
        unit: u8,
        timeout: Duration,
        backoff_cap: Duration,
        reporting: Reporting,
    ) -> Self {
        ModbusLink {
            inner: Arc::new(Inner {
                name: name.to_owned(),
                address: address.to_owned(),
                unit,
                timeout,
                backoff_cap: backoff_cap.min(BACKOFF_CAP),
                reporting,
                connection: Mutex::default(),
            }),
        }
    }

    pub fn name(&self) -> &str {
        &self.inner.name
    }

    /// Reads `count` registers from `start` (at most 125, the protocol's limit).
    pub async fn read(&self, space: RegisterSpace, start: u16, count: u16) -> Result<Vec<u16>, LinkError> {
        self.request(Request::Read(space, start, count), Urgency::Normal).await
    }

    /// Writes registers from `start`: one with function 0x06, more with 0x10.
    pub async fn write(&self, start: u16, words: &[u16], urgency: Urgency) -> Result<(), LinkError> {
        self.request(Request::Write(start, words), urgency).await.map(|_| ())
    }

    #[tracing::instrument(level = "trace", skip_all, fields(link = %self.inner.name))]
    async fn request(&self, request: Request<'_>, urgency: Urgency) -> Result<Vec<u16>, LinkError> {
        let inner = &*self.inner;
        let mut connection = inner.connection.lock().await;
        let context = match connection.context.as_mut() {
            Some(context) => context,
            None => {
                let context = self.connect(&mut connection, urgency).await?;
                connection.context.insert(context)
            }
        };
        let (function, address) = (request.function(), request.address());
        let started = Instant::now();
        let answer = timeout(inner.timeout, request.send(context)).await;
        let seconds = started.elapsed().as_secs_f64();
        let failed = match answer {
            Ok(Ok(Ok(words))) => {
                inner.reporting.link_request(&inner.name, seconds, None);
                self.note_answer(&mut connection);
                return Ok(words);
            }
            // An exception is a proper answer: the connection stays up.
            Ok(Ok(Err(code))) => {
                let e = exception(&inner.name, function, address, code);
                inner.reporting.link_request(&inner.name, seconds, Some(&e));
                self.note_answer(&mut connection);
                return Err(e);
            }
            Ok(Err(reason)) => {
                let reason = connection.watch.closed_reason().unwrap_or(reason);
                LinkError::Transport { link: inner.name.clone(), function, address, reason }
            }
            Err(_) => LinkError::Timeout {
                link: inner.name.clone(),
                function,
                address,
                timeout_ms: inner.timeout.as_millis() as u64,
            },
        };
        inner.reporting.link_request(&inner.name, seconds, Some(&failed));
        // After a transport error or a timeout the stream may still deliver a stale
        // answer, so it is dropped and a fresh one is opened.
        connection.context = None;
        self.note_failure(&mut connection, &failed);
        Err(failed)
    }

    async fn connect(&self, connection: &mut Connection, urgency: Urgency) -> Result<Context, LinkError> {
        let inner = &*self.inner;
        if let Some(at) = connection.retry_at {
            let now = Instant::now();
            if now < at && urgency == Urgency::Normal {
                let down =
                    LinkError::Down { link: inner.name.clone(), retry_in_ms: (at - now).as_millis() as u64 };
                inner.reporting.link_error(&inner.name, &down);
                return Err(down);
            }
        }
        let attempt = async {
            let mut last = None;
            for addr in tokio::net::lookup_host(inner.address.as_str()).await? {
                match TcpStream::connect(addr).await {
                    Ok(stream) => return Ok(stream),
                    Err(e) => last = Some(e),
                }
            }
            Err(last.unwrap_or_else(|| io::Error::other("the name resolves to no address")))
        };
        let result = match timeout(inner.timeout, attempt).await {
            Ok(Ok(stream)) => {
                let watch = Arc::new(Watch::default());
                connection.watch = watch.clone();
                Ok(tokio_modbus::client::tcp::attach_slave(Watched { stream, watch }, Slave(inner.unit)))
            }
            Ok(Err(e)) => Err(e.to_string()),
            Err(_) => Err(format!("no connection within {} ms", inner.timeout.as_millis())),
        };
        match result {
            Ok(context) => {
                if connection.connected_once {
                    tracing::debug!(link = %inner.name, address = %inner.address, "link connected again");
                } else {
                    tracing::info!(link = %inner.name, address = %inner.address, "link connected");
                    connection.connected_once = true;
                }
                Ok(context)
            }
            Err(reason) => {
                let error =
                    LinkError::Connect { link: inner.name.clone(), address: inner.address.clone(), reason };
                inner.reporting.link_error(&inner.name, &error);
                self.note_failure(connection, &error);
                Err(error)
            }
        }
    }

    /// An answer came: a link that was failing is up again.
    fn note_answer(&self, connection: &mut Connection) {
        if connection.failures > 0 {
            let inner = &*self.inner;
            tracing::info!(link = %inner.name, address = %inner.address, "link answers again");
            let detail = serde_json::json!({"link": inner.name, "address": inner.address});
            inner.reporting.event(None, "link_up", detail, "system");
        }
        connection.failures = 0;
        connection.retry_at = None;
    }

    /// Schedules the next connection attempt; logs the first failure of a run of them
    /// only, so a dead link is one clear line rather than one per tick.
    fn note_failure(&self, connection: &mut Connection, error: &LinkError) {
        if connection.failures == 0 {
            tracing::warn!(link = %self.inner.name, error = %error, "link down; retrying with backoff");
            let detail = serde_json::json!({"link": self.inner.name, "error": error.to_string()});
            self.inner.reporting.event(None, "link_down", detail, "system");
        } else {
            tracing::debug!(link = %self.inner.name, error = %error, "link still down");
        }
        connection.failures = connection.failures.saturating_add(1);
        let wait = backoff(connection.failures, rand::random::<f64>()).min(self.inner.backoff_cap);
        connection.retry_at = Some(Instant::now() + wait);
    }
}

/// Wait before attempt `failures + 1`: 0.2 s doubling to at most 5 s, spread by ±20%
/// (`jitter` in 0..1) so that many links do not reconnect in step.
pub fn backoff(failures: u32, jitter: f64) -> Duration {
    let doubled = BACKOFF_FIRST.saturating_mul(1u32 << failures.saturating_sub(1).min(16));
    doubled.min(BACKOFF_CAP).mul_f64(0.8 + 0.4 * jitter.clamp(0.0, 1.0))
}

fn exception(link: &str, function: Function, address: u16, code: ExceptionCode) -> LinkError {
    // Source: Modbus Application Protocol Specification V1.1b3 §7 defines codes 0x01 to
    // 0x0B (not 0x07 or 0x09); tokio-modbus names any other code "Custom".
    let name = match code {
        ExceptionCode::Custom(_) => "not a code the Modbus specification defines".to_owned(),
        known => known.to_string(),
    };
    LinkError::Exception { link: link.to_owned(), function, address, code: u8::from(code), name }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn backoff_doubles_from_200_ms_to_a_5_s_cap() {
        assert_eq!(backoff(1, 0.5), Duration::from_millis(200));
        assert_eq!(backoff(2, 0.5), Duration::from_millis(400));
        assert_eq!(backoff(5, 0.5), Duration::from_millis(3200));
        assert_eq!(backoff(6, 0.5), Duration::from_secs(5));
        assert_eq!(backoff(1000, 0.5), Duration::from_secs(5));
    }

    #[test]
    fn backoff_jitter_spreads_by_twenty_percent() {
        assert_eq!(backoff(1, 0.0), Duration::from_millis(160));
        assert_eq!(backoff(1, 1.0), Duration::from_millis(240));
    }

    #[tokio::test]
    async fn an_unreachable_server_is_a_connect_error_then_down_until_the_backoff() {
        // Port 9 on loopback: nothing listens there.
        let link = ModbusLink::new("plc", "127.0.0.1:9", 1, Duration::from_millis(200));
        let first = link.read(RegisterSpace::Input, 0, 2).await.unwrap_err();
        assert_eq!(first.kind(), "connect", "{first}");
        assert!(first.to_string().starts_with("link plc: cannot connect to 127.0.0.1:9"), "{first}");
        let second = link.read(RegisterSpace::Input, 0, 2).await.unwrap_err();
        assert_eq!(second.kind(), "down", "{second}");
    }

    /// A TCP peer that accepts connections and then does `answer` with each.
    async fn peer(answer: fn(tokio::net::TcpStream)) -> String {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let addr = listener.local_addr().unwrap().to_string();
        tokio::spawn(async move {
            while let Ok((stream, _)) = listener.accept().await {
                answer(stream);
            }
        });
        addr
    }

    #[tokio::test]
    async fn a_peer_that_hangs_is_a_timeout_naming_function_and_register() {
        let addr = peer(|stream| {
            tokio::spawn(async move {
                let _held = stream;
                std::future::pending::<()>().await;
            });
        })
        .await;
        let link = ModbusLink::new("plc", &addr, 1, Duration::from_millis(100));
        let started = std::time::Instant::now();
        let e = link.read(RegisterSpace::Input, 100, 2).await.unwrap_err();
        assert_eq!(e.kind(), "timeout", "{e}");
        assert_eq!(
            e.to_string(),
            "link plc: read input registers (0x04) at register 100 got no answer within 100 ms"
        );
        assert!(started.elapsed() < Duration::from_secs(2));
    }

    #[tokio::test]
    async fn a_peer_that_answers_garbage_is_an_error_not_a_panic() {
        let addr = peer(|mut stream| {
            tokio::spawn(async move {
                use tokio::io::{AsyncReadExt, AsyncWriteExt};
                let mut request = [0u8; 64];
                let _ = stream.read(&mut request).await;
                let _ = stream.write_all(b"HTTP/1.1 400 Bad Request\r\n\r\n").await;
            });
        })
        .await;
        let link = ModbusLink::new("plc", &addr, 1, Duration::from_millis(200));
        let e = link.write(200, &[1, 2], Urgency::Normal).await.unwrap_err();
        assert!(matches!(e.kind(), "transport" | "timeout"), "{e}");
        assert!(e.to_string().contains("write multiple registers (0x10) at register 200"), "{e}");
    }
}
