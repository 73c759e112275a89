//! Helpers for Ridgeline's black-box and reference tests: the built binary, the
//! reference Python interpreter with its pinned packages, and scratch files.

use std::path::{Path, PathBuf};
use std::process::Command;

/// The environment variable `tests/run` sets to the reference venv's interpreter.
pub const PYTHON_VAR: &str = "RIDGELINE_PYTHON";

/// The `ridgeline` binary of this build (`target/<profile>/ridgeline`), or `RIDGELINE_BIN`.
pub fn ridgeline_bin() -> PathBuf {
    if let Some(bin) = std::env::var_os("RIDGELINE_BIN") {
        return PathBuf::from(bin);
    }
    let exe = std::env::current_exe().expect("the test binary knows its path");
    // target/<profile>/deps/<test> -> target/<profile>/ridgeline
    let bin = exe
        .parent()
        .and_then(Path::parent)
        .map(|dir| dir.join("ridgeline"))
        .expect("test binary sits in target/<profile>/deps");
    assert!(
        bin.exists(),
        "{} is missing: build it first with `cargo build --bins` (tests/run does)",
        bin.display()
    );
    bin
}

/// What a finished command printed.
#[derive(Debug)]
pub struct Run {
    pub code: Option<i32>,
    pub stdout: String,
    pub stderr: String,
}

/// Runs the `ridgeline` binary with these arguments and waits for it.
pub fn ridgeline(args: &[&str]) -> Run {
    let out = Command::new(ridgeline_bin()).args(args).output().expect("ridgeline starts");
    Run {
        code: out.status.code(),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

/// The reference interpreter. Fails the test (never skips it) when it is not set up.
pub fn reference_python() -> PathBuf {
    match std::env::var_os(PYTHON_VAR) {
        Some(p) if Path::new(&p).exists() => PathBuf::from(p),
        _ => panic!(
            "{PYTHON_VAR} is not set to a Python with the reference packages of tests/requirements.txt. \
             Run the tests with `tests/run`, which creates that virtual environment and sets {PYTHON_VAR}."
        ),
    }
}

/// A program the checks run against, found on `PATH`. Fails the test (never skips it)
/// when it is missing, naming the Debian packages that hold it; tests/run installs them
/// when it runs as root with apt-get.
pub fn debian_tool(program: &str, packages: &[&str]) -> PathBuf {
    std::env::var_os("PATH")
        .iter()
        .flat_map(std::env::split_paths)
        .map(|d| d.join(program))
        .find(|p| p.is_file())
        .unwrap_or_else(|| {
            let named = packages.iter().map(|p| format!("`{p}`")).collect::<Vec<_>>().join(" and ");
            let plural = if packages.len() > 1 { "s" } else { "" };
            panic!(
                "{program} is not installed: it is in Debian's package{plural} {named}. tests/run installs it when it runs as \
                 root with apt-get; elsewhere install it (apt-get install {}) and run again",
                packages.join(" ")
            )
        })
}

/// Prometheus' checker, `promtool` (Debian's package `prometheus`).
pub fn promtool() -> PathBuf {
    debian_tool("promtool", &["prometheus"])
}

/// Runs a Python script with the reference interpreter and parses the JSON it prints.
pub fn python_json(script: &str) -> serde_json::Value {
    let out =
        Command::new(reference_python()).arg("-c").arg(script).output().expect("the reference Python starts");
    assert!(out.status.success(), "reference script failed:\n{}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).unwrap_or_else(|e| {
        panic!("reference script printed no JSON ({e}):\n{}", String::from_utf8_lossy(&out.stdout))
    })
}

/// Writes `text` to `dir/name` and returns the path.
pub fn write_file(dir: &Path, name: &str, text: &str) -> PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, text).expect("scratch file is writable");
    path
}

/// Least-squares slope of `y` against `x`.
pub fn slope(x: &[f64], y: &[f64]) -> f64 {
    let n = x.len() as f64;
    let (mx, my) = (x.iter().sum::<f64>() / n, y.iter().sum::<f64>() / n);
    let sxy: f64 = x.iter().zip(y).map(|(a, b)| (a - mx) * (b - my)).sum();
    let sxx: f64 = x.iter().map(|a| (a - mx) * (a - mx)).sum();
    sxy / sxx
}

/// A loopback port nobody listens on right now.
pub fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .expect("a free loopback port")
        .port()
}

/// Starts `ridgeline sim` serving `plant` on `127.0.0.1:port` (port 0 when `None`) and
/// waits until it listens; returns it and the port it got.
pub fn spawn_sim(plant: &Path, port: Option<u16>) -> (Peer, u16) {
    let mut command = Command::new(ridgeline_bin());
    let listen = format!("127.0.0.1:{}", port.unwrap_or(0));
    command.args(["sim", "--plant", plant.to_str().expect("utf-8 path"), "--listen", &listen]);
    let (peer, line) = Peer::start("ridgeline sim", command, std::time::Duration::from_secs(10), |l| {
        l.contains(" over Modbus/TCP on ")
    });
    let port = line
        .split(" over Modbus/TCP on ")
        .nth(1)
        .and_then(|rest| rest.split_whitespace().next())
        .and_then(|addr| addr.parse::<std::net::SocketAddr>().ok())
        .map(|a| a.port())
        .unwrap_or_else(|| panic!("cannot read the simulator's port from: {line}"));
    (peer, port)
}

/// Starts `ridgeline run` with `config` and waits until its API answers over plain HTTP;
/// returns it and the API's address, read from its log (so the config may listen on port
/// 0). Its log is [`Peer::stderr`].
pub fn spawn_service(config: &Path) -> (Peer, std::net::SocketAddr) {
    let (peer, api) = start_service(config);
    wait_until("the service's API answers", std::time::Duration::from_secs(10), || {
        http_get(api, "/healthz").is_some_and(|(status, _)| status == 200)
    });
    (peer, api)
}

/// Starts `ridgeline run` with `config` and waits only until it logs its API address
/// (an API over HTTPS, say, is for the caller to reach).
pub fn start_service(config: &Path) -> (Peer, std::net::SocketAddr) {
    let mut command = Command::new(ridgeline_bin());
    command.args(["run", "--config", config.to_str().expect("utf-8 path")]);
    let peer = Peer::spawn("ridgeline run", command);
    let mut api = None;
    wait_until("the service logs its API address", std::time::Duration::from_secs(15), || {
        api = peer.stderr().lines().find(|l| l.contains("ridgeline running")).and_then(|l| {
            l.split_whitespace()
                .find_map(|w| w.strip_prefix("api="))
                .and_then(|a| a.parse::<std::net::SocketAddr>().ok())
        });
        api.is_some()
    });
    (peer, api.expect("an API address"))
}

/// Polls `condition` every 50 ms until it holds; fails the test after `limit`.
pub fn wait_until(what: &str, limit: std::time::Duration, mut condition: impl FnMut() -> bool) {
    let deadline = std::time::Instant::now() + limit;
    while !condition() {
        assert!(std::time::Instant::now() < deadline, "timed out after {limit:?} waiting until {what}");
        std::thread::sleep(std::time::Duration::from_millis(50));
    }
}

/// An answer from the service's API.
#[derive(Debug, Clone)]
pub struct HttpAnswer {
    pub status: u16,
    /// Header lines as they came, names lower-cased.
    pub headers: Vec<(String, String)>,
    pub body: String,
}

impl HttpAnswer {
    pub fn header(&self, name: &str) -> Option<&str> {
        self.headers.iter().find(|(n, _)| n == name).map(|(_, v)| v.as_str())
    }

    pub fn json(&self) -> serde_json::Value {
        serde_json::from_str(&self.body).unwrap_or_else(|e| panic!("not JSON ({e}): {}", self.body))
    }
}

/// A plain HTTP/1.1 request on loopback, or `None` when nothing answers.
pub fn http_request(
    addr: std::net::SocketAddr,
    method: &str,
    path: &str,
    headers: &[(&str, &str)],
    body: Option<&str>,
) -> Option<HttpAnswer> {
    use std::io::{Read, Write};
    let mut stream = std::net::TcpStream::connect_timeout(&addr, std::time::Duration::from_secs(2)).ok()?;
    stream.set_read_timeout(Some(std::time::Duration::from_secs(10))).ok()?;
    let mut request = format!("{method} {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n");
    for (name, value) in headers {
        request.push_str(&format!("{name}: {value}\r\n"));
    }
    if let Some(body) = body {
        request.push_str(&format!("Content-Type: application/json\r\nContent-Length: {}\r\n", body.len()));
    }
    request.push_str("\r\n");
    request.push_str(body.unwrap_or(""));
    stream.write_all(request.as_bytes()).ok()?;
    let mut response = Vec::new();
    stream.read_to_end(&mut response).ok()?;
    let text = String::from_utf8_lossy(&response);
    let (head, body) = text.split_once("\r\n\r\n")?;
    let mut lines = head.lines();
    let status = lines.next()?.split_whitespace().nth(1)?.parse().ok()?;
    let headers: Vec<(String, String)> = lines
        .filter_map(|l| l.split_once(':'))
        .map(|(n, v)| (n.trim().to_ascii_lowercase(), v.trim().to_owned()))
        .collect();
    let chunked = headers.iter().any(|(n, v)| n == "transfer-encoding" && v.contains("chunked"));
    let body = if chunked { dechunk(body) } else { body.to_owned() };
    Some(HttpAnswer { status, headers, body })
}

/// A plain HTTP/1.1 GET on loopback: the status code and the body, or `None` when
/// nothing answers.
pub fn http_get(addr: std::net::SocketAddr, path: &str) -> Option<(u16, String)> {
    http_request(addr, "GET", path, &[], None).map(|a| (a.status, a.body))
}

fn dechunk(mut body: &str) -> String {
    let mut out = String::new();
    while let Some((size, rest)) = body.split_once("\r\n") {
        let Ok(n) = usize::from_str_radix(size.trim(), 16) else { break };
        if n == 0 || rest.len() < n {
            break;
        }
        out.push_str(&rest[..n]);
        body = rest[n..].trim_start_matches("\r\n");
    }
    out
}

/// GETs a JSON document from the service's API.
pub fn get_json(api: std::net::SocketAddr, path: &str) -> Option<serde_json::Value> {
    let (status, body) = http_get(api, path)?;
    (status == 200).then(|| serde_json::from_str(&body).ok()).flatten()
}

/// Reads holding registers with a hand-built Modbus/TCP request (function 0x03), so
/// tests can look at a register without going through Ridgeline's own client.
/// Source: Modbus Messaging on TCP/IP Implementation Guide V1.0b §3.1 (MBAP header),
/// Modbus Application Protocol Specification V1.1b3 §6.3.
pub fn read_holding_registers(port: u16, address: u16, count: u16) -> Option<Vec<u16>> {
    use std::io::{Read, Write};
    let mut stream = std::net::TcpStream::connect(("127.0.0.1", port)).ok()?;
    stream.set_read_timeout(Some(std::time::Duration::from_secs(2))).ok()?;
    let [a_hi, a_lo] = address.to_be_bytes();
    let [c_hi, c_lo] = count.to_be_bytes();
    // transaction 1, protocol 0, length 6, unit 1, function 3, address, count
    stream.write_all(&[0, 1, 0, 0, 0, 6, 1, 3, a_hi, a_lo, c_hi, c_lo]).ok()?;
    let mut header = [0u8; 9];
    stream.read_exact(&mut header).ok()?;
    if header[7] != 3 {
        return None;
    }
    let mut data = vec![0u8; usize::from(header[8])];
    stream.read_exact(&mut data).ok()?;
    Some(data.chunks_exact(2).map(|w| u16::from_be_bytes([w[0], w[1]])).collect())
}

/// An f32 held in two registers, high word first.
pub fn f32_from_words(words: &[u16]) -> f64 {
    f64::from(f32::from_bits((u32::from(words[0]) << 16) | u32::from(words[1])))
}

/// A process the tests talk to over the network (a reference peer from `tests/peers/`,
/// `ridgeline sim` or `ridgeline run`): started with piped stdio, killed and reaped on
/// drop, so a failing test leaves no stray process behind.
pub struct Peer {
    name: String,
    child: std::process::Child,
    lines: std::sync::mpsc::Receiver<String>,
    stderr: std::sync::Arc<std::sync::Mutex<String>>,
}

impl Peer {
    /// Starts `command` without waiting for it.
    pub fn spawn(name: &str, mut command: Command) -> Peer {
        use std::io::BufRead;
        use std::process::Stdio;
        let mut child = command
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap_or_else(|e| panic!("{name} does not start: {e}"));
        let stdout = child.stdout.take().expect("stdout is piped");
        let stderr = child.stderr.take().expect("stderr is piped");
        let (send, lines) = std::sync::mpsc::channel();
        // Both pipes are drained all the time, so a chatty peer never blocks on a full pipe.
        std::thread::spawn(move || {
            for line in std::io::BufReader::new(stdout).lines().map_while(Result::ok) {
                if send.send(line).is_err() {
                    break;
                }
            }
        });
        let collected = std::sync::Arc::new(std::sync::Mutex::new(String::new()));
        let sink = collected.clone();
        std::thread::spawn(move || {
            for line in std::io::BufReader::new(stderr).lines().map_while(Result::ok) {
                let mut text = sink.lock().unwrap_or_else(|p| p.into_inner());
                text.push_str(&line);
                text.push('\n');
            }
        });
        Peer { name: name.to_owned(), child, lines, stderr: collected }
    }

    /// Starts `command` and waits at most `timeout` for a stdout line for which `ready`
    /// is true; returns the peer and that line. Fails the test with the peer's stderr if
    /// the peer exits or stays silent instead.
    pub fn start(
        name: &str,
        command: Command,
        timeout: std::time::Duration,
        ready: impl Fn(&str) -> bool,
    ) -> (Peer, String) {
        let mut peer = Peer::spawn(name, command);
        let deadline = std::time::Instant::now() + timeout;
        loop {
            let left = deadline.saturating_duration_since(std::time::Instant::now());
            match peer.lines.recv_timeout(left) {
                Ok(line) if ready(&line) => return (peer, line),
                Ok(_) => continue,
                Err(std::sync::mpsc::RecvTimeoutError::Timeout) => {
                    panic!("{name} was not ready within {timeout:?}; stderr:\n{}", peer.stop())
                }
                Err(std::sync::mpsc::RecvTimeoutError::Disconnected) => {
                    panic!("{name} exited before it was ready; stderr:\n{}", peer.stop())
                }
            }
        }
    }

    /// The next line the peer prints, waiting at most `timeout`.
    pub fn next_line(&self, timeout: std::time::Duration) -> Option<String> {
        self.lines.recv_timeout(timeout).ok()
    }

    /// What the peer wrote to stderr so far (a service's log).
    pub fn stderr(&self) -> String {
        self.stderr.lock().unwrap_or_else(|p| p.into_inner()).clone()
    }

    pub fn is_running(&mut self) -> bool {
        matches!(self.child.try_wait(), Ok(None))
    }

    /// Sends SIGTERM (what systemd sends) and waits at most 20 s for the exit code.
    pub fn terminate(mut self) -> Option<i32> {
        let _ = Command::new("kill").args(["-TERM", &self.child.id().to_string()]).status();
        let deadline = std::time::Instant::now() + std::time::Duration::from_secs(20);
        while std::time::Instant::now() < deadline {
            if let Ok(Some(status)) = self.child.try_wait() {
                return status.code();
            }
            std::thread::sleep(std::time::Duration::from_millis(20));
        }
        None
    }

    /// Kills the peer at once (SIGKILL, like a crash) and returns what it wrote to stderr.
    pub fn stop(&mut self) -> String {
        let _ = self.child.kill();
        let _ = self.child.wait();
        // Give the reader thread a moment to take the last lines.
        std::thread::sleep(std::time::Duration::from_millis(20));
        self.stderr()
    }

    pub fn name(&self) -> &str {
        &self.name
    }

    /// The peer's process id.
    pub fn id(&self) -> u32 {
        self.child.id()
    }
}

impl Drop for Peer {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// A reference peer script from `tests/peers/`, run with the reference interpreter.
pub fn python_peer(script: &str) -> Command {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("peers").join(script);
    assert!(path.exists(), "{} is missing", path.display());
    let mut command = Command::new(reference_python());
    command.arg(path);
    command
}

/// Writes holding registers with a hand-built Modbus/TCP request (function 0x10), as an
/// HMI or the test itself would; whether the server acknowledged it.
/// Source: Modbus Application Protocol Specification V1.1b3 §6.12.
pub fn write_holding_registers(port: u16, address: u16, words: &[u16]) -> bool {
    use std::io::{Read, Write};
    let Ok(mut stream) = std::net::TcpStream::connect(("127.0.0.1", port)) else { return false };
    let _ = stream.set_read_timeout(Some(std::time::Duration::from_secs(2)));
    let count = words.len() as u16;
    let length = 7 + 2 * count;
    let mut request = vec![0, 1, 0, 0];
    request.extend_from_slice(&length.to_be_bytes());
    request.extend_from_slice(&[1, 0x10]);
    request.extend_from_slice(&address.to_be_bytes());
    request.extend_from_slice(&count.to_be_bytes());
    request.push((2 * count) as u8);
    for w in words {
        request.extend_from_slice(&w.to_be_bytes());
    }
    if stream.write_all(&request).is_err() {
        return false;
    }
    let mut answer = [0u8; 12];
    stream.read_exact(&mut answer).is_ok() && answer[7] == 0x10
}

/// The two registers of an f32, high word first.
pub fn f32_words(value: f64) -> [u16; 2] {
    let bits = (value as f32).to_bits();
    [(bits >> 16) as u16, bits as u16]
}

/// How a misbehaving PLC answers.
#[derive(Debug, Clone, Copy)]
pub enum BadPlc {
    /// Every request gets exception 0x06 (server device busy).
    Busy,
    /// Every request is answered (with exception 0x06) only after this long.
    Late(std::time::Duration),
}

/// A Modbus/TCP server on a loopback port (`port`, or any when `None`) that misbehaves
/// in the given way; runs until the test ends. Returns its port.
pub fn bad_plc(behaviour: BadPlc, port: Option<u16>) -> u16 {
    use std::io::{Read, Write};
    let listener = std::net::TcpListener::bind(("127.0.0.1", port.unwrap_or(0))).expect("a loopback port");
    let port = listener.local_addr().expect("bound").port();
    std::thread::spawn(move || {
        for stream in listener.incoming() {
            let Ok(mut stream) = stream else { continue };
            std::thread::spawn(move || {
                loop {
                    let mut header = [0u8; 7];
                    if stream.read_exact(&mut header).is_err() {
                        return;
                    }
                    let length = usize::from(u16::from_be_bytes([header[4], header[5]]));
                    let mut pdu = vec![0u8; length.saturating_sub(1)];
                    if stream.read_exact(&mut pdu).is_err() {
                        return;
                    }
                    if let BadPlc::Late(delay) = behaviour {
                        std::thread::sleep(delay);
                    }
                    let function = pdu.first().copied().unwrap_or(0);
                    // Source: Modbus Application Protocol Specification V1.1b3 §7 (exception responses).
                    let answer = [header[0], header[1], 0, 0, 0, 3, header[6], function | 0x80, 0x06];
                    if stream.write_all(&answer).is_err() {
                        return;
                    }
                }
            });
        }
    });
    port
}
