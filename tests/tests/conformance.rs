//! The live service against its own OpenAPI document: schemathesis (PyPI, pinned in
//! tests/requirements.txt) fuzzes every route with all of its checks, once without a
//! token and once with an operator token, against a real loop on `ridgeline sim`.

use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use ridgeline::api::{ROUTES, token_sha256};
use ridgeline_tests::{Peer, http_get, reference_python, wait_until, write_file};

use crate::rig::Rig;

const OPERATOR: &str = "operator-token-for-the-fuzzer-0003";

/// Test cases per operation and phase: enough to reach every route's limits, few enough
/// for a bounded run (each run takes about 10 to 20 s here).
const MAX_EXAMPLES: &str = "40";
/// A run that takes longer than this has hung: it is stopped and the test fails.
const RUN_LIMIT: Duration = Duration::from_secs(180);

/// What schemathesis is told beyond its defaults. A new bounds' min must be below its
/// max and a bump test's levels inside the input's bounds where u0 stands now: no JSON
/// Schema can say that, so there, and only there, a schema-valid request may be refused
/// with 422 (the document says when). No cache kept between runs.
const CONFIG: &str = r#"
[cache]
enabled = false

[[operations]]
include-path-regex = "/(bounds|bump-test)$"
[operations.checks.positive_data_acceptance]
expected-statuses = ["2xx", "3xx", "401", "403", "404", "409", "422", "429", "5xx"]

# The samples' `format` and `limit` are one object parameter with a branch per format.
# For a negative case schemathesis may break `format` in a way its query serialization
# then drops, and sends a valid request (seen: `?limit=254`, answered 200 as it should).
# The limits themselves are still checked by positive_data_acceptance and the
# handlers' own tests.
[[operations]]
include-path-regex = "/samples$"
[operations.checks.negative_data_rejection]
enabled = false
"#;

/// With an operator token every operation must be reached with data the service takes:
/// a run whose operations only ever answered 404 fails.
const CONFIG_WITH_TOKEN: &str = r#"
[warnings]
fail-on = ["missing_test_data"]
"#;

/// A service with one loop seeking on the simulator, an operator token and open reads,
/// ready (history written, the loop ticking).
fn ready_service() -> (Rig, Peer, Peer) {
    let access = format!(
        "[[access]]\nname = \"fuzzer\"\ntoken_sha256 = \"{}\"\nrole = \"operator\"\n",
        token_sha256(OPERATOR)
    );
    let rig = Rig::new("").with_service("", &access);
    let sim = rig.sim();
    let service = rig.service();
    wait_until("the service is ready", Duration::from_secs(30), || {
        http_get(rig.api(), "/readyz").is_some_and(|(status, _)| status == 200)
    });
    (rig, sim, service)
}

/// Runs schemathesis against the live document with every check; returns whether it
/// passed and what it printed.
fn schemathesis(rig: &Rig, run: &str, token: Option<&str>) -> (bool, String) {
    let dir = rig.dir.path().join(run);
    std::fs::create_dir_all(&dir).unwrap();
    let extra = if token.is_some() { CONFIG_WITH_TOKEN } else { "" };
    let config = write_file(&dir, "schemathesis.toml", &format!("{extra}{CONFIG}"));
    let log = dir.join("schemathesis.log");
    let url = format!("http://{}/api/v1/openapi.json", rig.api());
    let mut command = Command::new(reference_python());
    // In a scratch folder: nothing it keeps lands in the work tree.
    command.current_dir(&dir).args(["-m", "schemathesis.cli", "--config-file"]).arg(&config);
    command.args(["--no-color", "run", &url, "--checks", "all", "--max-examples", MAX_EXAMPLES]);
    command.args(["--workers", "1", "--request-timeout", "20", "--generation-database", "none"]);
    if let Some(token) = token {
        command.args(["--header", &format!("Authorization: Bearer {token}")]);
    }
    let output = std::fs::File::create(&log).unwrap();
    let mut child = command
        .stdin(Stdio::null())
        .stdout(output.try_clone().unwrap())
        .stderr(output)
        .spawn()
        .expect("the reference Python starts schemathesis");
    let deadline = Instant::now() + RUN_LIMIT;
    let status = loop {
        if let Some(status) = child.try_wait().unwrap() {
            break Some(status);
        }
        if Instant::now() > deadline {
            let _ = child.kill();
            let _ = child.wait();
            break None;
        }
        std::thread::sleep(Duration::from_millis(200));
    };
    let printed = std::fs::read_to_string(&log).unwrap_or_default();
    match status {
        Some(status) => (status.success(), printed),
        None => (false, format!("schemathesis did not finish within {RUN_LIMIT:?}:\n{printed}")),
    }
}

#[test]
fn schemathesis_finds_nothing_with_or_without_an_operator_token() {
    let (rig, _sim, mut service) = ready_service();
    for (run, token) in [("without-token", None), ("operator", Some(OPERATOR))] {
        // Source: schemathesis 4.32.5 (PyPI), every check against the service's own
        // OpenAPI 3.1 document; exit code 0 means no failure and no failing warning.
        let (passed, printed) = schemathesis(&rig, run, token);
        assert!(passed, "schemathesis {run}: failures against the document:\n{printed}");
        // Every route but the document's own, which schemathesis leaves out of a run
        // against the document it reads.
        let tested = format!("Tested: {}", ROUTES.len() - 1);
        assert!(printed.contains(&tested), "schemathesis {run} did not test every route:\n{printed}");
        assert!(service.is_running(), "the service died under the fuzzer:\n{}", service.stderr());
    }
    let log = service.stderr();
    assert!(!log.contains("panicked"), "the service panicked under the fuzzer:\n{log}");
}
