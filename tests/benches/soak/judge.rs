//! The verdict: every requirement of the soak checked against what it recorded, and
//! the report.

use std::path::{Path, PathBuf};
use std::time::Duration;

use serde_json::Value;

use crate::records::median_between;
use crate::{Args, DEMO_TICK_S, FD_MARGIN, PERMIT_GRACE, RETENTION_DAYS, RSS_MARGIN, Soak, WARM_UP, human};

impl Soak {
    pub fn judge(self, j: Judged) -> Report {
        let mut rows: Vec<(String, String, String, bool)> = Vec::new();
        let mut row = |what: &str, found: String, required: &str, ok: bool| {
            rows.push((what.to_owned(), found, required.to_owned(), ok));
        };

        // Panics, in every log of every process.
        let mut panics = Vec::new();
        for path in &self.logs {
            let text = std::fs::read_to_string(path).unwrap_or_default();
            for line in text.lines().filter(|l| l.contains("panicked")) {
                panics.push(format!("{}: {line}", path.display()));
            }
        }
        row(
            "panics (ridgeline and simulator logs)",
            if panics.is_empty() { "0".into() } else { format!("{}: {}", panics.len(), panics.join("; ")) },
            "0",
            panics.is_empty(),
        );
        row(
            "processes that exited by themselves",
            if self.unexpected_exits.is_empty() { "0".into() } else { self.unexpected_exits.join("; ") },
            "0",
            self.unexpected_exits.is_empty(),
        );

        // Trips and recoveries, from the events API.
        let (mut trips, mut recovered, mut by_restart, mut open) = (0, 0, 0, Vec::new());
        let mut reasons: std::collections::BTreeMap<String, u64> = Default::default();
        let mut unreadable = Vec::new();
        for (name, events) in &j.events {
            let Some(events) = events else {
                unreadable.push(name.clone());
                continue;
            };
            let mut tripped: Option<&Value> = None;
            for e in events {
                match e["kind"].as_str().unwrap_or("") {
                    "tripped" => {
                        if tripped.is_none() {
                            trips += 1;
                        }
                        *reasons
                            .entry(e["detail"]["trip"].as_str().unwrap_or("?").to_owned())
                            .or_default() += 1;
                        tripped = Some(e);
                    }
                    "recovered" if tripped.is_some() => {
                        recovered += 1;
                        tripped = None;
                    }
                    // A new life of the service starts every loop afresh.
                    "loop_started" if tripped.is_some() => {
                        by_restart += 1;
                        tripped = None;
                    }
                    _ => {}
                }
            }
            if let Some(e) = tripped {
                open.push(format!("{name} tripped at {}", e["at"].as_str().unwrap_or("?")));
            }
        }
        let reasons: Vec<String> = reasons.iter().map(|(r, n)| format!("{r} {n}")).collect();
        row(
            "trips recovered",
            format!(
                "{trips} trips ({}); {recovered} recovered, {by_restart} ended by a restart of ridgeline, {} open{}",
                reasons.join(", "),
                open.len(),
                if open.is_empty() { String::new() } else { format!(": {}", open.join("; ")) }
            ),
            "none open",
            open.is_empty() && unreadable.is_empty(),
        );
        if !unreadable.is_empty() {
            row("events readable", format!("not for {}", unreadable.join(", ")), "all", false);
        }
        row(
            "every loop back in its mode at the end",
            j.final_states.join(", "),
            "within 180 s of the last fault",
            j.settled,
        );

        // Writes, as the PLC's port saw them.
        let writes = self.port.writes();
        let mut outside = Vec::new();
        let mut unpermitted = Vec::new();
        let mut writes_in_grace = 0usize;
        let mut strange = Vec::new();
        for w in &writes {
            let target = self
                .registers
                .iter()
                .enumerate()
                .find_map(|(l, regs)| regs.iter().position(|&r| r == w.address).map(|k| (l, k)));
            let value = match (w.function, w.words.as_slice()) {
                (0x10, [high, low]) => {
                    Some(f64::from(f32::from_bits((u32::from(*high) << 16) | u32::from(*low))))
                }
                _ => None,
            };
            let (Some((l, k)), Some(v)) = (target, value) else {
                strange.push(format!(
                    "function 0x{:02x} at {} ({} words)",
                    w.function,
                    w.address,
                    w.words.len()
                ));
                continue;
            };
            if !self.bounds[l][k].allows(w.at, v) {
                outside.push(format!(
                    "{} {v} at {} wall (bounds then {:?})",
                    self.loops[l].name,
                    human(w.at.duration_since(self.lives[0].started).as_secs_f64()),
                    self.bounds[l][k].current()
                ));
            }
            let withheld = self
                .permit_off
                .iter()
                .any(|&(off, on)| w.at > off + PERMIT_GRACE && on.is_none_or(|on| w.at < on));
            if withheld {
                unpermitted.push(format!("{} {v}", self.loops[l].name));
            }
            let in_grace = self.permit_off.iter().any(|&(off, _)| w.at > off && w.at <= off + PERMIT_GRACE);
            if in_grace {
                writes_in_grace += 1;
            }
        }
        // How much of the withdrawals the check covered: each from its grace to its end.
        let now = std::time::Instant::now();
        let checked: Vec<f64> = self
            .permit_off
            .iter()
            .map(|&(off, on)| on.unwrap_or(now).saturating_duration_since(off + PERMIT_GRACE).as_secs_f64())
            .collect();
        let first = |v: &[String]| v.iter().take(5).cloned().collect::<Vec<_>>().join("; ");
        row(
            "writes outside the bounds in force (PLC side)",
            format!(
                "{} of {} writes{}",
                outside.len(),
                writes.len(),
                if outside.is_empty() { String::new() } else { format!(": {}", first(&outside)) }
            ),
            "0",
            outside.is_empty() && !writes.is_empty(),
        );
        row(
            "writes while the permit was withdrawn",
            format!(
                "{} ({} withdrawals, checked from {} s after each landed: {} of them for {:.0} s in all; \
                 {} writes came within the grace){}",
                unpermitted.len(),
                self.permit_off.len(),
                PERMIT_GRACE.as_secs_f64(),
                checked.iter().filter(|&&c| c > 0.0).count(),
                checked.iter().sum::<f64>(),
                writes_in_grace,
                if unpermitted.is_empty() { String::new() } else { format!(": {}", first(&unpermitted)) }
            ),
            "0",
            unpermitted.is_empty(),
        );
        row(
            "writes to other registers or with other functions",
            if strange.is_empty() { "0".into() } else { format!("{}: {}", strange.len(), first(&strange)) },
            "0",
            strange.is_empty(),
        );

        // Memory and open files of the last life, after its warm-up against its end.
        let mut memory_ok = false;
        let mut memory = "no samples".to_owned();
        let mut files = "no samples".to_owned();
        let mut files_ok = false;
        if let Some(life) = self.lives.last()
            && let Some(last) = life.samples.last()
        {
            let early_from = life.started + WARM_UP;
            let early = median_between(life, early_from, early_from + Duration::from_secs(60));
            let late = median_between(life, last.0 - Duration::from_secs(60), last.0);
            // Halfway, to tell a cache filling up (growth early, flat later) from a leak.
            let middle = early_from + last.0.duration_since(early_from) / 2;
            let half =
                median_between(life, middle - Duration::from_secs(30), middle + Duration::from_secs(30));
            if let (Some(early), Some(late), Some(half)) = (early, late, half) {
                let lived = last.0.duration_since(life.started).as_secs_f64();
                let growth = late.0 as f64 / early.0 as f64 - 1.0;
                memory_ok = growth <= RSS_MARGIN;
                memory = format!(
                    "{:.1} MiB after warm-up, {:.1} MiB halfway, {:.1} MiB at the end ({:+.1}%; {:+.1}% in the second \
                     half) over {:.1} h of plant time",
                    early.0 as f64 / 1024.0,
                    half.0 as f64 / 1024.0,
                    late.0 as f64 / 1024.0,
                    100.0 * growth,
                    100.0 * (late.0 as f64 / half.0 as f64 - 1.0),
                    lived * self.speed / 3600.0
                );
                files_ok = late.1 as i64 - early.1 as i64 <= FD_MARGIN;
                files = format!("{} after warm-up, {} at the end", early.1, late.1);
            }
        }
        row(
            "resident memory, last life",
            memory,
            &format!("end within +{:.0}% of start", 100.0 * RSS_MARGIN),
            memory_ok,
        );
        row(
            "open file descriptors, last life",
            files,
            &format!("end within +{FD_MARGIN} of start"),
            files_ok,
        );

        // The database.
        let size = |p: &Path| std::fs::metadata(p).map_or(0, |m| m.len());
        let wal = PathBuf::from(format!("{}-wal", self.database.display()));
        let (db_bytes, wal_bytes) = (size(&self.database), size(&wal));
        let kills_ok = self.integrity_after_kills.iter().all(|v| v == "[\"ok\"]");
        row(
            "PRAGMA integrity_check after each kill -9 (Python sqlite3, read-only)",
            if self.integrity_after_kills.is_empty() {
                "no kills".into()
            } else {
                self.integrity_after_kills.join(", ")
            },
            "ok",
            kills_ok,
        );
        let (integrity, rows_text) = match &j.integrity {
            Ok(v) => (
                v["integrity_check"].to_string(),
                v["rows"]
                    .as_object()
                    .map(|o| o.iter().map(|(t, n)| format!("{t} {n}")).collect::<Vec<_>>().join(", "))
                    .unwrap_or_default(),
            ),
            Err(e) => (e.clone(), String::new()),
        };
        row(
            "PRAGMA integrity_check at the end (Python sqlite3)",
            integrity.clone(),
            "ok",
            integrity == "[\"ok\"]",
        );
        // Every loop stores a sample each tick it runs, whatever its state.
        let ticks = self.loops.len() as f64 * j.args.plant_hours * 3600.0 / DEMO_TICK_S;
        let per_day = (db_bytes + wal_bytes) as f64 * 24.0 / j.args.plant_hours;
        row(
            "database",
            format!(
                "{:.2} MB (+ {:.2} MB WAL) after {:.1} h of plant time, {:.0} bytes per loop tick; at the default \
                 retention_days = {RETENTION_DAYS} raw history levels off near {:.0} MB; rows: {rows_text}",
                db_bytes as f64 / 1e6,
                wal_bytes as f64 / 1e6,
                j.args.plant_hours,
                (db_bytes + wal_bytes) as f64 / ticks,
                per_day * f64::from(RETENTION_DAYS) / 1e6,
            ),
            "integrity ok; size reported",
            true,
        );
        row(
            "SIGTERM at the end",
            format!(
                "exit {}{}",
                j.exit.map_or("none".into(), |c| c.to_string()),
                if j.stopped { "" } else { ", no `stopped` line" }
            ),
            "exit 0",
            j.exit == Some(0) && j.stopped,
        );

        let mut csv = String::from("life,pid,wall_s,plant_h,rss_kib,fds,threads\n");
        for (n, life) in self.lives.iter().enumerate() {
            for &(at, rss, fds, threads) in &life.samples {
                let wall_s = at.duration_since(self.lives[0].started).as_secs_f64();
                let plant_h = at.duration_since(life.started).as_secs_f64() * self.speed / 3600.0;
                csv.push_str(&format!(
                    "{},{},{wall_s:.1},{plant_h:.3},{rss},{fds},{threads}\n",
                    n + 1,
                    life.pid
                ));
            }
        }
        let _ = std::fs::write(self.dir.join("resources.csv"), csv);
        let passed = rows.iter().all(|r| r.3);
        let mut text = String::new();
        text.push_str(&format!(
            "\ncommand: cargo bench -p ridgeline-tests --bench soak -- --seed {} --plant-hours {} --speed {} --kills {}\n",
            j.args.seed, j.args.plant_hours, j.args.speed, j.args.kills
        ));
        text.push_str(&format!(
            "soak report: seed {}, {} h of plant time at {}x: faults for {}, {} in all (wall); {} lives of ridgeline, {} of the simulator\n\n",
            j.args.seed,
            j.args.plant_hours,
            j.args.speed,
            human(j.wall.as_secs_f64()),
            human(j.total_wall.as_secs_f64()),
            self.lives.len(),
            self.sim_starts
        ));
        text.push_str("| check | found | required | pass |\n| --- | --- | --- | --- |\n");
        for (what, found, required, ok) in &rows {
            text.push_str(&format!(
                "| {what} | {found} | {required} | {} |\n",
                if *ok { "yes" } else { "**NO**" }
            ));
        }
        text.push_str("\nfaults and changes injected:\n");
        for (what, n) in &self.counts {
            text.push_str(&format!("  {n:>6}  {what}\n"));
        }
        text.push_str(&format!("  {:>6}  requests seen at the PLC's port\n", self.port.requests()));
        text.push_str("\nlives of ridgeline (resident MiB, open fds, threads: first sample -> last):\n");
        for (n, life) in self.lives.iter().enumerate() {
            let (Some(a), Some(b)) = (life.samples.first(), life.samples.last()) else {
                text.push_str(&format!("  {}: pid {}, no samples, {}\n", n + 1, life.pid, life.how_it_ended));
                continue;
            };
            text.push_str(&format!(
                "  {}: pid {}, {:.1} h plant: {:.1} -> {:.1} MiB, {} -> {} fds, {} -> {} threads; {}\n",
                n + 1,
                life.pid,
                b.0.duration_since(life.started).as_secs_f64() * self.speed / 3600.0,
                a.1 as f64 / 1024.0,
                b.1 as f64 / 1024.0,
                a.2,
                b.2,
                a.3,
                b.3,
                life.how_it_ended
            ));
        }
        text.push_str(&format!("ticks skipped by each loop in the last life: {:?}\n", j.skipped));
        text.push_str(&format!(
            "\nretention: samples are stamped with the wall clock, and `retention_days` (at least 1) counts wall days, \
             so a soak shorter than a day prunes nothing (pruning is not exercised here). A day of plant time is a day's \
             ticks, so the file above holds about a real day's samples of these loops; rollups are per wall minute and \
             hour, so it holds fewer of those than a real day would.\n\
             logs and the database: {}\n{}\n",
            self.dir.display(),
            if passed { "soak PASSED" } else { "soak FAILED" }
        ));
        Report { text, passed }
    }
}
pub struct Judged<'a> {
    pub args: &'a Args,
    pub wall: Duration,
    pub total_wall: Duration,
    pub settled: bool,
    pub final_states: Vec<String>,
    pub events: Vec<(String, Option<Vec<Value>>)>,
    pub skipped: Vec<u64>,
    pub stopped: bool,
    pub exit: Option<i32>,
    pub integrity: Result<Value, String>,
}

pub struct Report {
    pub text: String,
    pub passed: bool,
}
