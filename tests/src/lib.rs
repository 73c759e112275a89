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
