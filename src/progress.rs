//! Progress on a terminal: one spinner line per long stage, with its elapsed
//! time, drawn on stderr by indicatif. Silent when stderr is not a terminal
//! or when the user asked for `--quiet`, so pipelines and logs see nothing.
//!
//! Progress never touches results: it is told what happened, it decides nothing.

use std::io::IsTerminal;
use std::time::Duration;

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

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
        let bar = self.bar("{spinner} {msg} ({elapsed})");
        bar.set_message(name.into());
        Stage { bar }
    }

    /// A row counter for streaming work (rows done and rate).
    pub fn rows(&self, name: impl Into<String>) -> Stage {
        let bar = self.bar("{spinner} {msg}: {human_pos} rows ({per_sec}, {elapsed})");
        bar.set_message(name.into());
        Stage { bar }
    }
}

/// A running stage; finishes its line when dropped.
#[derive(Debug)]
pub struct Stage {
    bar: ProgressBar,
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
    }
}
