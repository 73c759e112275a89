//! The process's open-file limit, raised at start: every link holds a connection.

use rustix::process::{Resource, Rlimit, getrlimit, setrlimit};

/// Files a service holds besides its links: API connections, the history database with
/// its WAL and shared-memory files, the runtime's own descriptors, and a margin.
pub const BESIDES_LINKS: u64 = 256;

/// The soft open-file limit before and after [`raise`]; `None` is unlimited.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct OpenFileLimit {
    pub before: Option<u64>,
    pub now: Option<u64>,
}

/// Raises the soft limit on open files (`RLIMIT_NOFILE`) to the hard limit. Common
/// practice for servers: the soft limit's usual default of 1024 only protects programs
/// that use `select(2)`, which Ridgeline does not; the hard limit is the administrator's
/// (systemd's `LimitNOFILE=`, or `ulimit -Hn`).
pub fn raise() -> std::io::Result<OpenFileLimit> {
    let limit = getrlimit(Resource::Nofile);
    let before = limit.current;
    // An unlimited hard limit cannot be the soft one (Linux caps it at fs.nr_open).
    let Some(maximum) = limit.maximum else { return Ok(OpenFileLimit { before, now: before }) };
    if before.is_some_and(|current| current < maximum) {
        setrlimit(Resource::Nofile, Rlimit { current: Some(maximum), maximum: Some(maximum) })?;
    }
    Ok(OpenFileLimit { before, now: getrlimit(Resource::Nofile).current })
}

/// Raises the limit for a service with `links` links, and says in the log what it did;
/// warns when even the raised limit leaves too few files for the links.
pub fn raise_for(links: usize) {
    let needed = links as u64 + BESIDES_LINKS;
    match raise() {
        Ok(OpenFileLimit { now: Some(now), .. }) if now < needed => tracing::warn!(
            limit = now,
            links,
            needed,
            "the open-file limit is {now}, fewer than the {needed} files that {links} links and the API \
             and history need; raise LimitNOFILE= in the systemd unit (or ulimit -n)"
        ),
        Ok(OpenFileLimit { before, now }) if before != now => {
            tracing::debug!(before = ?before, now = ?now, "raised the open-file limit")
        }
        Ok(_) => {}
        Err(e) => tracing::warn!(error = %e, "cannot raise the open-file limit"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_soft_limit_rises_to_the_hard_limit() {
        let raised = raise().expect("raising the soft limit to the hard one is always allowed");
        match getrlimit(Resource::Nofile).maximum {
            Some(hard) => assert_eq!(raised.now, Some(hard)),
            None => assert_eq!(raised.now, raised.before),
        }
    }
}
