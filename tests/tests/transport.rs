//! Transport security: the API over HTTPS, checked with Python's `ssl` client and
//! `openssl s_client` against a site CA made at test time; a warning wherever tokens
//! would travel in clear text; https:// HTTP links that trust a site CA through
//! `ca_file`; and clients that cannot pin the API by never finishing their requests.

use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

use ridgeline::api::token_sha256;
use ridgeline_tests::{Peer, get_json, http_get, python_json, python_peer, start_service, wait_until};

use crate::rig::Rig;

/// A site CA and a certificate it signed for the API on 127.0.0.1 / localhost, made
/// with the openssl command-line tool.
struct Pki {
    ca: PathBuf,
    cert: PathBuf,
    key: PathBuf,
}

fn openssl(dir: &Path, args: &[&str]) {
    let out = Command::new("openssl").args(args).current_dir(dir).output().expect("openssl runs");
    assert!(out.status.success(), "openssl {args:?}: {}", String::from_utf8_lossy(&out.stderr));
}

fn make_pki(dir: &Path) -> Pki {
    let p256 = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"];
    openssl(
        dir,
        &[
            &["req", "-x509"][..],
            &p256,
            &["-keyout", "ca.key", "-out", "ca.pem", "-days", "2"],
            &[
                "-subj",
                "/CN=Ridgeline test site CA",
                "-addext",
                "basicConstraints=critical,CA:TRUE",
                "-addext",
                "keyUsage=critical,keyCertSign",
            ],
        ]
        .concat(),
    );
    openssl(
        dir,
        &[&["req"][..], &p256, &["-keyout", "api.key", "-out", "api.csr", "-subj", "/CN=localhost"]].concat(),
    );
    std::fs::write(
        dir.join("api.ext"),
        "subjectAltName=IP:127.0.0.1,DNS:localhost\nbasicConstraints=CA:FALSE\n\
         keyUsage=critical,digitalSignature\nextendedKeyUsage=serverAuth\n",
    )
    .unwrap();
    openssl(
        dir,
        &[
            "x509",
            "-req",
            "-in",
            "api.csr",
            "-CA",
            "ca.pem",
            "-CAkey",
            "ca.key",
            "-CAcreateserial",
            "-out",
            "api.pem",
            "-days",
            "2",
            "-extfile",
            "api.ext",
        ],
    );
    Pki { ca: dir.join("ca.pem"), cert: dir.join("api.pem"), key: dir.join("api.key") }
}

fn with_tls(rig: Rig, pki: &Pki) -> Rig {
    rig.edit(
        "listen = \"127.0.0.1:0\"",
        &format!(
            "listen = \"127.0.0.1:0\"\ntls_cert = \"{}\"\ntls_key = \"{}\"",
            pki.cert.display(),
            pki.key.display()
        ),
    )
}

#[test]
fn the_api_serves_https_that_pythons_ssl_client_and_openssl_verify_against_the_site_ca() {
    let rig = Rig::new("");
    let pki = make_pki(rig.dir.path());
    let rig = with_tls(rig, &pki);
    let _sim = rig.sim();
    rig.write_config();
    let (_service, api) = start_service(&rig.config);

    // Source: Python's ssl module (the standard library's TLS client) verifying the
    // chain against the site CA and the host name, then plain http.client over it.
    let answer = python_json(&format!(
        r#"
import http.client, json, ssl, time
ca, port = {ca:?}, {port}
def get(path, context):
    c = http.client.HTTPSConnection("127.0.0.1", port, context=context, timeout=10)
    c.request("GET", path)
    r = c.getresponse()
    return r.status, r.read().decode(), c.sock.version()
trusted = ssl.create_default_context(cafile=ca)
deadline = time.time() + 30
while True:
    status, body, version = get("/readyz", trusted)
    if status == 200 or time.time() > deadline:
        break
    time.sleep(0.2)
loops = get("/api/v1/loops", trusted)
try:
    get("/healthz", ssl.create_default_context())
    untrusted = "accepted"
except ssl.SSLCertVerificationError as e:
    untrusted = e.verify_message
print(json.dumps({{"status": status, "ready": json.loads(body), "version": version,
                  "loops": [loops[0], json.loads(loops[1])], "untrusted": untrusted}}))
"#,
        ca = pki.ca.display().to_string(),
        port = api.port(),
    ));
    assert_eq!(answer["status"], 200, "{answer}");
    assert_eq!(answer["ready"]["warnings"], serde_json::json!([]), "TLS on loopback: nothing to warn about");
    assert_eq!(answer["loops"][0], 200);
    assert_eq!(answer["loops"][1][0]["name"], "bowl");
    // Source: RFC 8446 (TLS 1.3), which rustls and Python's ssl both speak.
    assert_eq!(answer["version"], "TLSv1.3");
    // Only the site CA vouches for the certificate: the system's roots alone refuse it.
    assert!(answer["untrusted"].as_str().unwrap().contains("unable to get local issuer"), "{answer}");

    // Source: OpenSSL's own client (openssl s_client), verifying against the site CA.
    let out = Command::new("openssl")
        .args(["s_client", "-connect", &api.to_string(), "-CAfile"])
        .arg(&pki.ca)
        .args(["-verify_return_error", "-verify_hostname", "localhost", "-brief"])
        .stdin(std::process::Stdio::null())
        .output()
        .expect("openssl s_client runs");
    let told = String::from_utf8_lossy(&out.stderr).into_owned() + &String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success(), "{told}");
    assert!(told.contains("Verification: OK"), "{told}");
    assert!(told.contains("Protocol version: TLSv1.3"), "{told}");

    // HTTPS only: a plain HTTP request on the same port gets no HTTP answer.
    assert!(http_get(api, "/healthz").is_none_or(|(status, _)| status != 200));
}

#[test]
fn a_missing_certificate_stops_the_start_with_a_sentence_naming_the_files() {
    let rig = Rig::new("");
    let pki = Pki {
        ca: rig.dir.path().join("ca.pem"),
        cert: rig.dir.path().join("nowhere.pem"),
        key: rig.dir.path().join("nowhere.key"),
    };
    let rig = with_tls(rig, &pki);
    rig.write_config();
    let run = ridgeline_tests::ridgeline(&["run", "--config", rig.config.to_str().unwrap()]);
    assert_eq!(run.code, Some(1), "{}", run.stderr);
    assert!(run.stderr.contains("cannot serve HTTPS with tls_cert"), "{}", run.stderr);
    assert!(run.stderr.contains("nowhere.pem"), "{}", run.stderr);
}

#[test]
fn tokens_in_clear_text_beyond_loopback_are_warned_about_in_the_log_readyz_and_the_page() {
    let access = format!(
        "\n[[access]]\nname = \"night-shift\"\ntoken_sha256 = \"{}\"\nrole = \"operator\"\n",
        token_sha256("t")
    );
    let rig = Rig::new("").with_tables(&access).edit("listen = \"127.0.0.1:0\"", "listen = \"0.0.0.0:0\"");
    let _sim = rig.sim();
    let service = rig.service();
    let mut ready = None;
    wait_until("the service is ready", Duration::from_secs(30), || {
        ready = get_json(rig.api(), "/readyz").filter(|r| r["status"] == "ready");
        ready.is_some()
    });
    let warnings = ready.unwrap()["warnings"].clone();
    let warning = warnings[0].as_str().expect("a warning in /readyz");
    assert!(warning.contains("without TLS") && warning.contains("clear text"), "{warning}");
    assert!(service.stderr().contains("without TLS"), "{}", service.stderr());
    let (status, page) = http_get(rig.api(), "/").unwrap();
    assert_eq!(status, 200);
    assert!(page.contains("class=\"setup-warning\"") && page.contains("without TLS"), "the page shows it");
}

/// Python's https server (tests/peers/https_readings.py) serving `{"plant": {"y": 7.5}}`.
fn readings_over_https(pki: &Pki) -> (Peer, u16) {
    let mut command = python_peer("https_readings.py");
    command.arg(&pki.cert).arg(&pki.key);
    let (peer, line) = Peer::start(
        "https readings (tests/peers/https_readings.py)",
        command,
        Duration::from_secs(20),
        |l| l.contains("\"port\""),
    );
    let port = serde_json::from_str::<serde_json::Value>(&line).unwrap()["port"].as_u64().unwrap();
    (peer, port as u16)
}

fn reading_over(rig: Rig, port: u16, ca_file: Option<&Path>) -> Rig {
    let trust = ca_file.map(|f| format!("ca_file = \"{}\"\n", f.display())).unwrap_or_default();
    rig.with_tables(&format!(
        "\n[links.lab]\nhttp_get = \"https://127.0.0.1:{port}/readings\"\n{trust}timeout_ms = 2000\n\n\
         [tags.lab_y]\nlink = \"lab\"\njson_pointer = \"/plant/y\"\n"
    ))
}

#[test]
fn an_https_link_reads_through_the_site_ca_in_ca_file_and_names_the_certificate_problem_without_it() {
    let rig = Rig::seeking("", "lab_y");
    let pki = make_pki(rig.dir.path());
    let (_readings, port) = readings_over_https(&pki);
    let rig = reading_over(rig, port, Some(&pki.ca));
    let _sim = rig.sim();
    let _service = rig.service();
    wait_until("the objective is read over https", Duration::from_secs(30), || {
        rig.status().is_some_and(|s| s["objective"] == 7.5)
    });

    let untrusting = reading_over(Rig::seeking("", "lab_y"), port, None);
    let _sim = untrusting.sim();
    let service = untrusting.service();
    // Source: rustls names an unknown issuer so in its certificate errors.
    wait_until("the link error names the certificate", Duration::from_secs(30), || {
        service.stderr().contains("UnknownIssuer")
    });
    assert_eq!(untrusting.status().unwrap()["objective"], serde_json::Value::Null);
}

#[test]
fn clients_that_never_finish_their_headers_do_not_pin_the_api_and_are_cut_off() {
    let rig = Rig::new("");
    let _sim = rig.sim();
    let _service = rig.service();
    // 200 connections each send half a request and then nothing.
    let mut stalled: Vec<std::net::TcpStream> = (0..200)
        .map(|_| {
            let mut s = std::net::TcpStream::connect(rig.api()).unwrap();
            s.write_all(b"GET /healthz HTTP/1.1\r\nHost: x\r\n").unwrap();
            s
        })
        .collect();
    // Meanwhile everyone else is served.
    for _ in 0..20 {
        assert_eq!(http_get(rig.api(), "/healthz").map(|a| a.0), Some(200));
    }
    // The service closes them (hyper's header read timeout, 10 s): each read ends.
    for s in &mut stalled {
        s.set_read_timeout(Some(Duration::from_secs(60))).unwrap();
        let mut answer = Vec::new();
        match s.read_to_end(&mut answer) {
            Ok(_) => {}
            Err(e) if e.kind() == std::io::ErrorKind::ConnectionReset => {}
            Err(e) => panic!("the service did not close a stalled connection within 60 s: {e}"),
        }
        let text = String::from_utf8_lossy(&answer);
        assert!(!text.contains("200 OK"), "a stalled request was answered: {text}");
    }
}
