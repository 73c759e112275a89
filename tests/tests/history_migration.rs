//! A history database written by the previous release (one row per sample, commit
//! 568bae2) opened by this one: converted in place to the compact layout, answering the
//! API as before, and rolled up in the background, through a kill -9 half-way.
//!
//! The outside reference is Python's own sqlite3, json and lzma, in
//! tests/peers/history_db.py: it reads the old rows before the service starts, and
//! decodes the blocks and aggregates the minutes and hours on its own, from the layout
//! documented in service/src/history/blocks.rs.

use std::path::{Path, PathBuf};
use std::time::Duration;

use ridgeline_tests::{
    Peer, http_request, python_peer, ridgeline_bin, spawn_service, wait_until, write_file,
};

fn corpus(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("corpus").join(name)
}

/// Runs a command of tests/peers/history_db.py with the reference interpreter and parses
/// the JSON it prints.
fn history_db(args: &[&Path]) -> serde_json::Value {
    let out = python_peer("history_db.py").args(args).output().expect("the reference Python starts");
    assert!(out.status.success(), "history_db.py {args:?} failed:\n{}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).unwrap_or_else(|e| {
        panic!("history_db.py {args:?} printed no JSON ({e}):\n{}", String::from_utf8_lossy(&out.stdout))
    })
}

/// config/demo.toml with its API on port 0, its history in `database` and its PLC link at
/// a port nobody listens on, as the previous release ran when it answered the fixture.
fn demo_config(dir: &Path, database: &Path) -> PathBuf {
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/demo.toml");
    let mut text = std::fs::read_to_string(&demo).expect("config/demo.toml");
    // The fixture's samples are of December 2026 and stay so: without a long retention
    // the default 30 days would prune them once rolled up, a month later, and what the
    // API answers would depend on the day the test runs.
    let service = "listen = \"127.0.0.1:0\"\nretention_days = 3650\nrollup_retention_days = 3650";
    let database = format!("database = \"{}\"", database.display());
    for (from, to) in [
        ("listen = \"127.0.0.1:8080\"", service),
        ("database = \"/tmp/ridgeline-demo.db\"", database.as_str()),
        ("modbus_tcp = \"127.0.0.1:5020\"", "modbus_tcp = \"127.0.0.1:1\""),
    ] {
        assert!(text.contains(from), "config/demo.toml has no `{from}`");
        text = text.replacen(from, to, 1);
    }
    write_file(dir, "ridgeline.toml", &text)
}

/// The old release's database, decompressed into `dir`.
fn old_database(dir: &Path) -> PathBuf {
    let database = dir.join("history.db");
    history_db(&[Path::new("unpack"), &corpus("history-568bae2.db.xz"), &database]);
    database
}

/// The log line that contains `text`.
fn log_line(log: &str, text: &str) -> Option<String> {
    log.lines().find(|l| l.contains(text)).map(str::to_owned)
}

/// The value of `field=` in a log line.
fn field<'a>(line: &'a str, field: &str) -> Option<&'a str> {
    line.split_whitespace().find_map(|w| w.strip_prefix(field)?.strip_prefix('='))
}

/// Where `got` first differs from `want`: the line, and the text around the first
/// differing character (an answer in JSON is one long line).
fn first_difference(got: &str, want: &str) -> String {
    let (got_lines, want_lines): (Vec<&str>, Vec<&str>) = (got.lines().collect(), want.lines().collect());
    let Some(line) =
        (0..got_lines.len().max(want_lines.len())).find(|&i| got_lines.get(i) != want_lines.get(i))
    else {
        return "the same lines with other line endings".to_owned();
    };
    let (g, w): (Vec<char>, Vec<char>) = (
        got_lines.get(line).unwrap_or(&"").chars().collect(),
        want_lines.get(line).unwrap_or(&"").chars().collect(),
    );
    let at = (0..g.len().max(w.len())).find(|&i| g.get(i) != w.get(i)).unwrap_or(0);
    let around = |text: &[char]| -> String { text.iter().skip(at.saturating_sub(60)).take(120).collect() };
    format!(
        "line {}, character {}:\n  got:  ...{}...\n  want: ...{}...",
        line + 1,
        at + 1,
        around(&g),
        around(&w)
    )
}

/// How many numbers `got` and `want` write one unit in the last place apart; an error
/// when they differ in anything else (text, or a number by more).
fn misread_numbers(got: &str, want: &str) -> Result<usize, String> {
    let is_number = |c: char| c.is_ascii_digit() || matches!(c, '-' | '+' | '.' | 'e' | 'E');
    let tokens = |text: &str| -> Vec<(bool, String)> {
        let mut out: Vec<(bool, String)> = Vec::new();
        for c in text.chars() {
            match out.last_mut() {
                Some((numeric, token)) if *numeric == is_number(c) => token.push(c),
                _ => out.push((is_number(c), c.to_string())),
            }
        }
        out
    };
    let (got, want) = (tokens(got), tokens(want));
    if got.len() != want.len() {
        return Err(format!("{} pieces against {}", got.len(), want.len()));
    }
    let mut apart = 0;
    for ((numeric, g), (_, w)) in got.iter().zip(&want) {
        if g == w {
            continue;
        }
        let (Some(a), Some(b)) = (numeric.then(|| g.parse::<f64>().ok()).flatten(), w.parse::<f64>().ok())
        else {
            return Err(format!("`{g}` where `{w}` was"));
        };
        if a.to_bits().abs_diff(b.to_bits()) != 1 {
            return Err(format!("{g} where {w} was, more than one unit in the last place"));
        }
        apart += 1;
    }
    Ok(apart)
}

/// The first `n` entries of a list, for a failure message.
fn first(list: &serde_json::Value, n: usize) -> serde_json::Value {
    list.as_array().map(|l| l.iter().take(n).cloned().collect()).unwrap_or_default()
}

/// The peak resident memory of process `pid` so far (VmHWM, in bytes), from Linux's
/// /proc/<pid>/status.
fn peak_rss_bytes(pid: u32) -> u64 {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).expect("the process's status");
    let line = log_line(&status, "VmHWM:").expect("a VmHWM line");
    let kb: u64 = line.split_whitespace().nth(1).and_then(|v| v.parse().ok()).expect("VmHWM in kB");
    kb * 1024
}

/// Whether rollups have reached every loop's last old minute, by the service's own record.
fn rolled_through_old_rows(database: &Path, old: &serde_json::Value) -> bool {
    let progress = history_db(&[Path::new("progress"), database]);
    old["loops"].as_object().expect("loops").iter().all(|(name, rows)| {
        let last_minute = rows["last_minute_ms"].as_i64().expect("a minute");
        progress[name].as_i64().is_some_and(|through| through > last_minute)
    })
}

#[test]
fn a_database_written_by_the_previous_release_migrates_in_place_with_every_stored_value_and_the_same_answers()
{
    let dir = tempfile::tempdir().unwrap();
    let database = old_database(dir.path());
    let answers_path = dir.path().join("answers.json");
    history_db(&[Path::new("unpack"), &corpus("history-568bae2-answers.json.xz"), &answers_path]);
    let answers: serde_json::Map<String, serde_json::Value> =
        serde_json::from_str(&std::fs::read_to_string(&answers_path).unwrap()).expect("the answers are JSON");
    assert!(answers.len() >= 12, "{} answers", answers.len());
    // Source: Python's sqlite3 and json, reading the old rows before the service opens the file.
    let old_rows = dir.path().join("old-rows.pickle");
    let old = history_db(&[Path::new("old-rows"), &database, &old_rows]);
    assert_eq!(old["rows"], 1800, "{old}");

    let config = demo_config(dir.path(), &database);
    let (service, api) = spawn_service(&config);
    let log = service.stderr();
    let done = log_line(&log, "stored samples converted to the compact layout").expect(&log);
    assert_eq!(field(&done, "converted"), Some("1800"), "{done}");
    let mut corrected = 0;
    for (path, want) in &answers {
        let want = want.as_str().expect("each answer is a body");
        let answer = http_request(api, "GET", path, &[], None).expect("the API answers");
        assert_eq!(answer.status, 200, "{path}: {}", answer.body);
        // Source: the previous release's own answers to the same requests on the same
        // database. The one difference allowed: that release read some of its stored
        // numbers back one unit in the last place off (serde_json's default parser), and
        // the blocks hold them as stored (checked against Python's json below).
        match misread_numbers(&answer.body, want) {
            Ok(n) => corrected += n,
            Err(why) => panic!(
                "{path} differs from the previous release's answer ({why}) at {}",
                first_difference(&answer.body, want)
            ),
        }
    }
    assert!(corrected < 2000, "{corrected} numbers one unit in the last place apart");
    assert_eq!(service.terminate(), Some(0), "the service stops cleanly");

    // Source: SQLite's own check of the file, through Python's sqlite3.
    let integrity = history_db(&[Path::new("integrity"), &database]);
    assert_eq!(integrity["integrity"], serde_json::json!(["ok"]));
    // Source: Python's sqlite3 decoding the blocks and json reading the old rows.
    let found = history_db(&[Path::new("find-again"), &old_rows, &database]);
    assert_eq!(found["samples_table"], false, "the old table is dropped");
    assert_eq!(found["compared"], 1800, "{found}");
    assert!(
        found["rows_differing"] == 0,
        "{} of 1800 old rows are not in the blocks as they were: {} values differ, {} of them by one unit in the \
         last place; first: {:#}",
        found["rows_differing"],
        found["values_differing"],
        found["values_one_ulp_off"],
        first(&found["examples"], 3)
    );
}

#[test]
fn a_few_hundred_thousand_old_rows_migrate_with_progress_in_bounded_memory_and_survive_kill_9_during_rollups()
{
    let dir = tempfile::tempdir().unwrap();
    let database = old_database(dir.path());
    let grown = history_db(&[Path::new("grow"), &database]);
    let rows = grown["rows"].as_u64().expect("a row count");
    assert!(rows > 290_000, "{grown}");
    let database_bytes = std::fs::metadata(&database).unwrap().len();
    // Source: Python's sqlite3 and json, reading the old rows before the service opens the file.
    let old_rows = dir.path().join("old-rows.pickle");
    let old = history_db(&[Path::new("old-rows"), &database, &old_rows]);
    assert_eq!(old["rows"], rows);

    let config = demo_config(dir.path(), &database);
    let mut command = std::process::Command::new(ridgeline_bin());
    command.args(["run", "--config", config.to_str().expect("utf-8 path")]);
    let mut service = Peer::spawn("ridgeline run", command);
    // The conversion runs before the API opens; it takes some seconds here.
    wait_until("the service logs the end of the conversion", Duration::from_secs(100), || {
        service.stderr().contains("stored samples converted to the compact layout")
    });
    let peak = peak_rss_bytes(service.id());
    let log = service.stderr();
    let start = log
        .lines()
        .find(|l| {
            l.contains("converting stored samples to the compact layout") && field(l, "samples").is_some()
        })
        .expect(&log);
    assert_eq!(field(start, "samples"), Some(rows.to_string().as_str()), "{start}");
    let done = log_line(&log, "stored samples converted to the compact layout").expect(&log);
    assert_eq!(field(&done, "converted"), Some(rows.to_string().as_str()), "{done}");
    let seconds: f64 = field(&done, "seconds").and_then(|s| s.parse().ok()).expect(&done);
    // A second's margin: the table is dropped after the last batch's progress check.
    if seconds >= 6.0 {
        let of = format!("of={rows}");
        assert!(
            log.lines().any(|l| l.contains("converting stored samples") && l.contains(&of)),
            "a conversion of {seconds} s logs its progress every 5 s:\n{log}"
        );
    }
    eprintln!(
        "converted {rows} rows of a {:.1} MiB database in {seconds:.1} s; peak resident memory {:.1} MiB",
        database_bytes as f64 / 1_048_576.0,
        peak as f64 / 1_048_576.0
    );
    // The whole table in memory would be more than the file's 60-odd MiB of rows; the
    // conversion goes 5,000 rows at a time.
    assert!(
        peak < 100 * 1_048_576,
        "peak resident memory {peak} bytes converting a database of {database_bytes} bytes"
    );

    wait_until("the first rollups are stored", Duration::from_secs(60), || {
        history_db(&[Path::new("rollups"), &database])["rows"].as_u64().is_some_and(|n| n > 0)
    });
    service.stop(); // SIGKILL, as kill -9
    assert!(!rolled_through_old_rows(&database, &old), "the kill came before the rollups were done");
    // Source: SQLite's own check of the file as the kill left it, through Python's sqlite3.
    let integrity = history_db(&[Path::new("integrity"), &database]);
    assert_eq!(integrity["integrity"], serde_json::json!(["ok"]), "after kill -9");

    let (service, _api) = spawn_service(&config);
    wait_until("every loop's old rows are rolled up", Duration::from_secs(120), || {
        rolled_through_old_rows(&database, &old)
    });
    assert_eq!(service.terminate(), Some(0), "the service stops cleanly");
    let integrity = history_db(&[Path::new("integrity"), &database]);
    assert_eq!(integrity["integrity"], serde_json::json!(["ok"]), "after a graceful stop");

    // Source: Python's own minute and hour aggregates of the old rows (math.fsum for the
    // means), against the rows in `rollups` and `rollup_inputs`.
    let check = history_db(&[Path::new("check-rollups"), &old_rows, &database]);
    eprintln!("rollup rows of the old rows' minutes and hours, per loop: {}", check["rows"]);
    assert!(
        check["differences"] == 0,
        "{} minute and hour aggregates differ from Python's aggregates of the old rows, by kind: {:#}; first: {:#}",
        check["differences"],
        check["kinds"],
        first(&check["examples"], 3)
    );
}
