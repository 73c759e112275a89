//! One running service per history store: an exclusive lock held for the life of the
//! process, so a second `ridgeline run` of the same config cannot resume from the first
//! one's estimates and fight it over the same setpoints.
//!
//! On SQLite the lock is an OS file lock on `<database>.lock`. The kernel lets go of it
//! when the process ends, however it ends (`kill -9` included), so a stale file never
//! blocks a restart. The file says who holds it, for the refusal's message.

use std::fs::{File, OpenOptions, TryLockError};
use std::io::{Read, Seek, Write};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};

/// Held while the service runs; dropping it (or the process ending) lets go.
#[derive(Debug)]
pub struct InstanceLock {
    file: File,
    path: PathBuf,
}

/// Why the lock could not be taken.
#[derive(Debug, thiserror::Error)]
pub enum LockError {
    #[error(
        "another Ridgeline ({holder}) is running on the history database {}: two instances would write \
         the same setpoints. Stop it first, or give this one a database of its own",
        database.display()
    )]
    Held { database: PathBuf, holder: String },
    #[error("cannot take the instance lock {}: {reason}", path.display())]
    Io { path: PathBuf, reason: String },
}

impl InstanceLock {
    /// Takes the lock for the history database at `database`, or says who holds it.
    pub fn acquire(database: &Path) -> Result<Self, LockError> {
        let mut name = database.as_os_str().to_owned();
        name.push(".lock");
        let path = PathBuf::from(name);
        let io = |e: std::io::Error| LockError::Io { path: path.clone(), reason: e.to_string() };
        if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
            std::fs::create_dir_all(dir).map_err(io)?;
        }
        // Not truncated on open: the holder's line must survive for the one refused.
        let mut file =
            OpenOptions::new().read(true).write(true).create(true).truncate(false).open(&path).map_err(io)?;
        match file.try_lock() {
            Ok(()) => {}
            Err(TryLockError::WouldBlock) => {
                let mut holder = String::new();
                let _ = file.read_to_string(&mut holder);
                let holder = holder.trim();
                let holder = if holder.is_empty() { "process unknown, still starting" } else { holder };
                return Err(LockError::Held { database: database.to_owned(), holder: holder.to_owned() });
            }
            Err(TryLockError::Error(e)) => return Err(io(e)),
        }
        let mut lock = InstanceLock { file, path: path.clone() };
        lock.describe(None).map_err(io)?;
        Ok(lock)
    }

    /// Writes who holds the lock: this process, and its API address once bound.
    pub fn describe(&mut self, api: Option<SocketAddr>) -> std::io::Result<()> {
        let mut line = format!("process {}", std::process::id());
        if let Some(api) = api {
            line.push_str(&format!(", API at {api}"));
        }
        self.file.set_len(0)?;
        self.file.rewind()?;
        self.file.write_all(line.as_bytes())?;
        self.file.flush()
    }

    pub fn path(&self) -> &Path {
        &self.path
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_second_lock_on_the_same_database_is_refused_naming_the_holder_and_free_once_dropped() {
        let dir = tempfile::tempdir().unwrap();
        let database = dir.path().join("sub").join("history.db");
        let mut first = InstanceLock::acquire(&database).unwrap();
        first.describe(Some("127.0.0.1:8123".parse().unwrap())).unwrap();
        let refused = InstanceLock::acquire(&database).unwrap_err().to_string();
        assert!(refused.contains(&format!("process {}", std::process::id())), "{refused}");
        assert!(refused.contains("API at 127.0.0.1:8123"), "{refused}");
        assert!(refused.contains("history.db"), "{refused}");
        assert!(first.path().ends_with("history.db.lock"));
        drop(first);
        InstanceLock::acquire(&database).expect("free again once the holder is gone");
    }
}
