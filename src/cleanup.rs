//! Removal of a run's temporary files when it is interrupted.
//!
//! Every temporary folder or file a run creates is registered here while it exists. The
//! binary installs [`on_signals`]: on SIGINT, SIGTERM or SIGHUP a watcher thread removes
//! everything registered and exits with 128 + the signal number. A commit holds
//! [`Registry::hold`] across its renames, so a signal waits until OUT is either as before or
//! complete. (SIGKILL cannot be caught: the next run recognises the leftovers by their
//! names and their free lock, see `report::output`.)

use std::path::{Path, PathBuf};
use std::sync::{Mutex, MutexGuard};

/// The paths to remove on a signal, with a number to unregister each by.
pub struct Registry {
    paths: Mutex<Vec<(u64, PathBuf)>>,
    next: std::sync::atomic::AtomicU64,
}

static REGISTRY: Registry = Registry {
    paths: Mutex::new(Vec::new()),
    next: std::sync::atomic::AtomicU64::new(1),
};

/// The process-wide registry.
pub fn registry() -> &'static Registry {
    &REGISTRY
}

impl Registry {
    /// Registers a path (a folder or a file) to remove on a signal; returns its ticket.
    pub fn add(&self, path: &Path) -> u64 {
        let id = self.next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        self.lock().push((id, path.to_path_buf()));
        id
    }

    /// Unregisters a ticket (the path was committed or removed).
    pub fn remove(&self, id: u64) {
        self.lock().retain(|(i, _)| *i != id);
    }

    /// Holds the registry: no signal cleanup runs until the guard is dropped.
    pub fn hold(&self) -> MutexGuard<'_, Vec<(u64, PathBuf)>> {
        self.lock()
    }

    fn lock(&self) -> MutexGuard<'_, Vec<(u64, PathBuf)>> {
        self.paths.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Removes every registered path (folders with their contents).
    fn remove_all(paths: &[(u64, PathBuf)]) {
        for (_, p) in paths {
            remove_path(p);
        }
    }
}

/// Removes a folder with its contents, or a file; missing paths are fine.
pub fn remove_path(p: &Path) {
    match std::fs::symlink_metadata(p) {
        Ok(m) if m.is_dir() => {
            // A file written while we remove can make one pass fail; try again.
            for _ in 0..3 {
                if std::fs::remove_dir_all(p).is_ok() || !p.exists() {
                    break;
                }
            }
        }
        Ok(_) => {
            let _ = std::fs::remove_file(p);
        }
        Err(_) => {}
    }
}

/// Installs the signal watcher (once; later calls do nothing). Only the binary calls this:
/// a library user keeps its own signal handling.
pub fn on_signals() {
    static ONCE: std::sync::Once = std::sync::Once::new();
    ONCE.call_once(|| {
        use signal_hook::consts::{SIGHUP, SIGINT, SIGTERM};
        let Ok(mut signals) = signal_hook::iterator::Signals::new([SIGINT, SIGTERM, SIGHUP])
        else {
            return;
        };
        std::thread::spawn(move || {
            if let Some(sig) = signals.forever().next() {
                let held = registry().hold();
                Registry::remove_all(&held);
                eprintln!(
                    "\ninterrupted: temporary files removed; outputs are as they were before this run"
                );
                std::process::exit(128 + sig);
            }
        });
    });
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn registered_paths_are_removed_and_unregistered_ones_kept() {
        let t = tempfile::tempdir().unwrap();
        let a = t.path().join("a");
        let b = t.path().join("b.json");
        let c = t.path().join("c");
        std::fs::create_dir_all(a.join("sub")).unwrap();
        std::fs::write(a.join("sub/x"), b"1").unwrap();
        std::fs::write(&b, b"2").unwrap();
        std::fs::create_dir(&c).unwrap();
        let r = Registry {
            paths: Mutex::new(Vec::new()),
            next: std::sync::atomic::AtomicU64::new(1),
        };
        r.add(&a);
        r.add(&b);
        let kc = r.add(&c);
        r.remove(kc);
        Registry::remove_all(&r.hold());
        assert!(!a.exists() && !b.exists());
        assert!(c.is_dir());
    }
}
