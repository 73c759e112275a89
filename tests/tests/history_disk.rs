//! The disk under the history: its size as a metric, a `disk_low` event under the floor,
//! and `/readyz` not ready while a full disk refuses writes, with the loops running on.
//! The history lives on a small tmpfs of its own that the test fills (mounting one needs
//! root, as `tests/run` has on the project's machines).

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

use ridgeline_tests::{get_json, http_request, wait_until};

use crate::rig::Rig;

/// A tmpfs of `size_kib` KiB mounted at `dir`, unmounted when dropped.
struct SmallDisk {
    dir: PathBuf,
}

impl SmallDisk {
    fn mount(dir: &Path, size_kib: u32) -> SmallDisk {
        std::fs::create_dir_all(dir).unwrap();
        let out = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size_kib}k"), "tmpfs"])
            .arg(dir)
            .output()
            .expect("mount runs");
        assert!(
            out.status.success(),
            "this check puts the history on a small tmpfs to fill it, which needs root (tests/run \
             runs as root on the project's machines): {}",
            String::from_utf8_lossy(&out.stderr)
        );
        SmallDisk { dir: dir.to_owned() }
    }

    /// Writes a file until the disk is full; returns its path.
    fn fill(&self) -> PathBuf {
        let path = self.dir.join("filler");
        let mut file = std::fs::File::create(&path).unwrap();
        let chunk = vec![0u8; 16 * 1024];
        while file.write_all(&chunk).and_then(|()| file.sync_all()).is_ok() {}
        path
    }
}

impl Drop for SmallDisk {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg("-l").arg(&self.dir).status();
    }
}

fn readyz(rig: &Rig) -> (u16, String) {
    http_request(rig.api(), "GET", "/readyz", &[], None).map_or((0, String::new()), |a| (a.status, a.body))
}

#[test]
fn a_full_disk_makes_readyz_not_ready_with_the_reason_while_the_loop_runs_on_and_a_disk_low_event_follows() {
    let rig = Rig::new("").with_service("disk_free_floor_mb = 12", "");
    let disk = SmallDisk::mount(rig.database().parent().unwrap(), 16 * 1024);
    let _sim = rig.sim();
    let mut service = rig.service();
    wait_until("the service is ready", Duration::from_secs(20), || readyz(&rig).0 == 200);

    // Source: the issue (metric `ridgeline_history_bytes`: database plus WAL).
    wait_until("the history's size is a metric", Duration::from_secs(30), || {
        http_request(rig.api(), "GET", "/metrics", &[], None).is_some_and(|a| {
            a.body.lines().any(|l| {
                l.strip_prefix("ridgeline_history_bytes ")
                    .and_then(|v| v.trim().parse::<f64>().ok())
                    .is_some_and(|v| v > 0.0)
            })
        })
    });

    let filler = disk.fill();
    // Source: SQLite's own error for a full disk (SQLITE_FULL, "database or disk is full").
    let mut reason = String::new();
    wait_until("readyz says history is not written", Duration::from_secs(60), || {
        let (status, body) = readyz(&rig);
        reason = body;
        status == 503
    });
    assert!(reason.contains("history is not being written"), "{reason}");
    assert!(reason.contains("full"), "the reason names the full disk: {reason}");
    let ticks = rig.ticks();
    wait_until("the loop ticks on while history cannot be written", Duration::from_secs(20), || {
        rig.ticks() > ticks + 20
    });
    wait_until("a warning names the floor", Duration::from_secs(30), || {
        service.stderr().contains("free space under the history database is below the floor")
    });

    std::fs::remove_file(filler).unwrap();
    wait_until("ready again once there is room", Duration::from_secs(60), || readyz(&rig).0 == 200);
    // The event waited for the disk like every other: nothing is lost.
    let mut event = serde_json::Value::Null;
    wait_until("a disk_low event is in history", Duration::from_secs(30), || {
        let events = get_json(rig.api(), "/api/v1/events?limit=1000").unwrap_or_default();
        event = events
            .as_array()
            .and_then(|a| a.iter().find(|e| e["kind"] == "disk_low"))
            .cloned()
            .unwrap_or_default();
        !event.is_null()
    });
    assert_eq!(event["loop"], serde_json::Value::Null, "{event}");
    assert_eq!(event["detail"]["floor_bytes"], 12 * 1024 * 1024, "{event}");
    assert!(event["detail"]["free_bytes"].as_u64().is_some_and(|f| f < 12 * 1024 * 1024), "{event}");
    let samples = http_request(rig.api(), "GET", "/api/v1/loops/bowl/samples?limit=10", &[], None).unwrap();
    assert_eq!(samples.status, 200);
    service.stop();
}
