//! The real binary against a plant over real Modbus/TCP on loopback: `ridgeline sim`
//! serves the plant, `ridgeline run` runs the loop.

use std::net::SocketAddr;
use std::time::Duration;

use ridgeline_tests::{f32_from_words, read_holding_registers, wait_until};

use crate::rig::Rig;

#[test]
fn sim_and_run_find_the_peak_of_a_plant_over_modbus() {
    let rig = Rig::new("");
    let _sim = rig.sim();
    let _service = rig.service();
    // Within 2% of the bounds span of the peak at u = 3.
    wait_until("the estimate is within 0.12 of the peak", Duration::from_secs(60), || {
        rig.estimate().is_some_and(|e| (e - 3.0).abs() < 0.12)
    });
    let status = rig.status().unwrap();
    assert_eq!(status["state"], "seeking");
    assert!(status["objective"].as_f64().unwrap() > 9.9, "{status}");
    assert!(status["objective_at"].as_str().unwrap().ends_with('Z'), "RFC 3339 UTC: {status}");
    let written = rig.setpoint().expect("the setpoint register reads");
    assert!((written - 3.0).abs() < 0.3, "the PLC holds {written}");
}

#[test]
fn a_loop_in_observing_mode_never_writes() {
    let rig = Rig::new("").with_mode("observing");
    let _sim = rig.sim();
    let _service = rig.service();
    wait_until("the loop has ticked 40 times", Duration::from_secs(20), || rig.ticks() >= 40);
    let status = rig.status().unwrap();
    assert_eq!(status["state"], "observing");
    assert!(status["objective"].as_f64().is_some(), "it reads: {status}");
    // The register still holds the plant's initial value, bit for bit.
    assert_eq!(rig.setpoint(), Some(2.0));
}

#[test]
fn sigterm_writes_the_shutdown_value_and_exits_0() {
    let rig = Rig::new("on_shutdown = \"safe\"");
    let _sim = rig.sim();
    let service = rig.service();
    rig.wait_writing();
    let stopping = std::time::Instant::now();
    assert_eq!(service.terminate(), Some(0));
    eprintln!("measured: SIGTERM -> shutdown value written and exit 0 in {:?}", stopping.elapsed());
    assert_eq!(rig.setpoint(), Some(1.0), "safe = 1.0 written on the way out");
}

#[test]
fn an_unreachable_plc_at_start_is_one_log_line_and_the_service_keeps_retrying() {
    let rig = Rig::new("");
    let mut service = rig.service();
    // Many retries: 30 ticks of 50 ms against the dead link.
    wait_until("the loop has ticked 30 times", Duration::from_secs(20), || {
        rig.status().and_then(|s| s["ticks"].as_u64()).is_some_and(|t| t >= 30)
    });
    assert!(service.is_running(), "the service keeps running");
    let log = service.stderr();
    let down: Vec<&str> = log.lines().filter(|l| l.contains("link down")).collect();
    assert_eq!(down.len(), 1, "one line for the failing link:\n{log}");
    assert!(down[0].contains("link plc: cannot connect to 127.0.0.1:"), "{}", down[0]);
    let _sim = rig.sim();
    wait_until("the loop writes once the PLC answers", Duration::from_secs(15), || {
        rig.setpoint().is_some_and(|v| v != 2.0)
    });
}

#[test]
fn a_restarted_modbus_server_is_reconnected_without_restarting_ridgeline() {
    let rig = Rig::new("");
    let mut sim = rig.sim();
    let service = rig.service();
    rig.wait_writing();
    sim.stop();
    wait_until("the service sees the link down", Duration::from_secs(10), || {
        service.stderr().contains("link down")
    });
    // The new server starts at the plant's initial value, 2.0; a change means the
    // service reconnected and wrote.
    let _sim = rig.sim();
    wait_until("the loop writes to the new server", Duration::from_secs(15), || {
        rig.setpoint().is_some_and(|v| v != 2.0)
    });
}

#[test]
fn an_objective_read_over_http_drives_the_loop() {
    let rig = Rig::seeking("", "lab_y");
    let _sim = rig.sim();
    let http = ObjectiveServer::start(rig.plant_port());
    let rig = rig.with_tables(&format!(
        "\n[links.lab]\nhttp_get = \"http://{}/readings\"\ntimeout_ms = 500\n\n\
         [tags.lab_y]\nlink = \"lab\"\njson_pointer = \"/plant/y\"\n",
        http.addr
    ));
    let _service = rig.service();
    wait_until("the estimate is within 0.12 of the peak", Duration::from_secs(60), || {
        rig.estimate().is_some_and(|e| (e - 3.0).abs() < 0.12)
    });
    assert!(http.requests() > 20, "every tick fetched the document");
}

/// A small HTTP server that serves `{"plant": {"y": ...}}`, computing y from the
/// setpoint it reads from the simulated PLC, like an analyzer beside the process.
struct ObjectiveServer {
    addr: SocketAddr,
    served: std::sync::Arc<std::sync::atomic::AtomicUsize>,
}

impl ObjectiveServer {
    fn start(plant_port: u16) -> Self {
        use std::io::{Read, Write};
        let listener = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
        let addr = listener.local_addr().unwrap();
        let served = std::sync::Arc::new(std::sync::atomic::AtomicUsize::new(0));
        let count = served.clone();
        std::thread::spawn(move || {
            for stream in listener.incoming() {
                let Ok(mut stream) = stream else { continue };
                let mut request = [0u8; 1024];
                let _ = stream.read(&mut request);
                let body = match read_holding_registers(plant_port, 200, 2) {
                    Some(words) => {
                        let u = f32_from_words(&words);
                        format!("{{\"plant\": {{\"y\": {}}}}}", 10.0 - 2.0 * (u - 3.0).powi(2))
                    }
                    None => "{\"plant\": {\"y\": null}}".to_owned(),
                };
                count.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                let _ = write!(
                    stream,
                    "HTTP/1.1 200 OK\r\nContent-Type: application/json\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
                    body.len()
                );
            }
        });
        ObjectiveServer { addr, served }
    }

    fn requests(&self) -> usize {
        self.served.load(std::sync::atomic::Ordering::Relaxed)
    }
}
