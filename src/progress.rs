//! Progress on a terminal: one spinner line per long stage, with its elapsed
//! time, drawn on stderr by indicatif. Silent when stderr is not a terminal
//! or when the user asked for `--quiet`, so pipelines and logs see nothing.
//!
//! Progress never touches results: it is told what happened, it decides nothing.

use std::io::IsTerminal;
use std::time::Duration;

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

/// The process's peak resident memory in MiB (Linux `VmHWM`), for summaries;
/// None where the kernel does not report it. Never part of a signed record.
pub fn peak_rss_mib() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kib: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some((kib / 1024.0 * 10.0).round() / 10.0)
}

/// Where progress goes: a terminal, or nowhere.
#[derive(Debug, Clone, Copy)]
pub struct Progress {
    shown: bool,
}

impl Progress {
    /// Progress that draws only when stderr is a terminal and `quiet` is false.
    pub fn new(quiet: bool) -> Self {
        Progress {
            shown: !quiet && std::io::stderr().is_terminal(),
        }
    }

    /// Progress that never draws (library callers, tests).
    pub fn hidden() -> Self {
        Progress { shown: false }
    }

    fn bar(&self, template: &str) -> ProgressBar {
        if !self.shown {
            return ProgressBar::hidden();
        }
        let bar = ProgressBar::with_draw_target(None, ProgressDrawTarget::stderr());
        bar.set_style(
            ProgressStyle::with_template(template)
                .unwrap_or_else(|_| ProgressStyle::default_spinner()),
        );
        bar.enable_steady_tick(Duration::from_millis(120));
        bar
    }

    /// A stage: a spinner with its name until the guard is dropped, then a
    /// line with the time it took.
    pub fn stage(&self, name: impl Into<String>) -> Stage {
        let name = name.into();
        let bar = self.bar("{spinner} {msg} ({elapsed})");
        bar.set_message(name.clone());
        Stage::new(bar, name)
    }

    /// A row counter for streaming work (rows done and rate).
    pub fn rows(&self, name: impl Into<String>) -> Stage {
        let name = name.into();
        let bar = self.bar("{spinner} {msg}: {human_pos} rows ({per_sec}, {elapsed})");
        bar.set_message(name.clone());
        Stage::new(bar, name)
    }
}

/// A part of a stage, timed only under `ANOMARK_STAGE_TIMES=1` and never drawn.
pub fn part(name: &str) -> Stage {
    Stage::new(ProgressBar::hidden(), format!("  {name}"))
}

/// The process's start, for the stage lines' `at` (set by [`start_clock`]).
static START: std::sync::OnceLock<std::time::Instant> = std::sync::OnceLock::new();

/// Marks the process's start: the stage lines then also say when each stage
/// ended, counted from here (the binary calls it first thing).
pub fn start_clock() {
    START.get_or_init(std::time::Instant::now);
}

/// With `ANOMARK_STAGE_TIMES=1`, every stage prints its wall time to stderr
/// when it ends (for the benchmarks; never on by default).
fn stage_times() -> bool {
    std::env::var_os("ANOMARK_STAGE_TIMES").is_some_and(|v| v == "1")
}

/// A running stage; finishes its line when dropped.
#[derive(Debug)]
pub struct Stage {
    bar: ProgressBar,
    name: String,
    started: std::time::Instant,
}

impl Stage {
    fn new(bar: ProgressBar, name: String) -> Self {
        Stage {
            bar,
            name,
            started: std::time::Instant::now(),
        }
    }
}

impl Stage {
    /// Adds rows done.
    pub fn add(&self, n: u64) {
        self.bar.inc(n);
    }
}

impl Drop for Stage {
    fn drop(&mut self) {
        if !self.bar.is_hidden() {
            self.bar.finish();
        }
        if stage_times() {
            let at = START
                .get()
                .map(|t| format!(" (at {:.3} s)", t.elapsed().as_secs_f64()))
                .unwrap_or_default();
            eprintln!(
                "anomark: stage {:.3} s  {}{at}",
                self.started.elapsed().as_secs_f64(),
                self.name
            );
        }
    }
}
