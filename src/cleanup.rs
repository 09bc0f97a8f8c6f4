//! anomark's own temporaries when the process is interrupted: a run writes
//! into `.anomark-partial-*` and `score` into `.anomark-score-*` beside the
//! target, and on SIGINT, SIGTERM or SIGHUP a dedicated thread removes every
//! registered temporary and ends the process with the conventional code
//! 128 + the signal's number (130 for SIGINT, 143 for SIGTERM).
//!
//! SIGKILL cannot be caught: a run or score killed by it leaves its
//! temporary behind (never a partial target: the target appears only by a
//! rename). A later `run` or `check` reports such leftovers beside its target
//! as warnings and removes nothing, since another anomark may be writing them.

use std::path::{Path, PathBuf};
use std::sync::{Mutex, MutexGuard};

/// Temporaries to remove on an interruption.
static REGISTRY: Mutex<Vec<PathBuf>> = Mutex::new(Vec::new());

/// The name prefixes of anomark's temporaries.
pub const PREFIXES: [&str; 2] = [".anomark-partial-", ".anomark-score-"];

fn registry() -> MutexGuard<'static, Vec<PathBuf>> {
    // A panic elsewhere while the lock was held leaves a usable list.
    REGISTRY.lock().unwrap_or_else(|p| p.into_inner())
}

/// Starts the thread that turns SIGINT, SIGTERM and SIGHUP into a cleanup.
/// Call it first in `main`, before any other thread starts: the signals are
/// blocked in the calling thread and every thread started after it, and
/// only the cleanup thread takes them (child processes started through
/// `std::process::Command` get a cleared mask).
#[cfg(target_os = "linux")]
pub fn install() {
    // SAFETY: the set is initialised by sigemptyset before use; the calls
    // take pointers to locals that outlive them; `_exit` ends the process
    // without running anything else of it.
    unsafe {
        let mut set: libc::sigset_t = std::mem::zeroed();
        libc::sigemptyset(&mut set);
        for s in [libc::SIGINT, libc::SIGTERM, libc::SIGHUP] {
            libc::sigaddset(&mut set, s);
        }
        if libc::pthread_sigmask(libc::SIG_BLOCK, &set, std::ptr::null_mut()) != 0 {
            return;
        }
        let started = std::thread::Builder::new()
            .name("anomark-signals".into())
            .spawn(move || {
                let mut sig: libc::c_int = 0;
                while libc::sigwait(&set, &mut sig) != 0 {}
                // Held until the process ends, so that no rename into place
                // can run between the removal and the exit.
                let list = registry();
                remove(&list);
                libc::_exit(128 + sig);
            });
        if started.is_err() {
            // No thread to take them: the signals keep their default action.
            libc::pthread_sigmask(libc::SIG_UNBLOCK, &set, std::ptr::null_mut());
        }
    }
}

/// Elsewhere signals keep their default action.
#[cfg(not(target_os = "linux"))]
pub fn install() {}

fn remove(list: &[PathBuf]) {
    for p in list {
        if p.is_dir() {
            let _ = std::fs::remove_dir_all(p);
        } else {
            let _ = std::fs::remove_file(p);
        }
    }
}

/// A registered temporary: removed on an interruption until [`Registered::finish`]
/// or until dropped (the temporary's own guard removes it on an error).
#[derive(Debug)]
pub struct Registered {
    path: PathBuf,
}

/// Registers the temporary file or folder `path`.
pub fn register(path: &Path) -> Registered {
    registry().push(path.to_path_buf());
    Registered {
        path: path.to_path_buf(),
    }
}

impl Registered {
    /// Runs `f` (the rename of the temporary into place) and unregisters it,
    /// with the list locked: an interruption removes the temporary before
    /// the rename or not at all.
    pub fn finish<T>(mut self, f: impl FnOnce() -> T) -> T {
        let mut list = registry();
        let out = f();
        list.retain(|p| p != &self.path);
        self.path = PathBuf::new();
        out
    }
}

impl Drop for Registered {
    fn drop(&mut self) {
        if !self.path.as_os_str().is_empty() {
            registry().retain(|p| p != &self.path);
        }
    }
}

/// Warnings for anomark temporaries beside `target` (in its parent folder),
/// such as a SIGKILL leaves: reported, never removed.
pub fn stale_beside(target: &Path) -> Vec<String> {
    let parent = match target.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let Ok(entries) = std::fs::read_dir(&parent) else {
        return vec![];
    };
    let mut names: Vec<String> = entries
        .filter_map(|e| e.ok())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| PREFIXES.iter().any(|p| n.starts_with(p)))
        .collect();
    names.sort();
    names
        .into_iter()
        .map(|n| {
            format!(
                "`{}` is a temporary of an anomark run or score that was killed (or is \
                 still running); anomark removes its own on SIGINT and SIGTERM but cannot \
                 after a SIGKILL: remove it once no anomark writes there",
                parent.join(n).display()
            )
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_finished_temporary_is_no_longer_registered() {
        let r = register(Path::new("a-temporary"));
        assert!(registry().iter().any(|p| p == Path::new("a-temporary")));
        r.finish(|| ());
        assert!(!registry().iter().any(|p| p == Path::new("a-temporary")));
        drop(register(Path::new("b-temporary")));
        assert!(!registry().iter().any(|p| p == Path::new("b-temporary")));
    }
}
