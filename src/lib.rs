//! anomark validates density-based anomaly detectors by a declared protocol.
//!
//! A YAML spec names the data, the features, the split, the candidate
//! detectors and the threshold policy. One run loads and checks the data, makes
//! seeded content-hashed splits, refuses leakage, fits each candidate on normal
//! training rows, picks each threshold and then the detector on validation
//! only, opens the test split once, and writes a signed run directory: the run
//! record, the scores and a model card.
//!
//! Modules, in pipeline order: [`spec`] → [`data`] → [`audit`] (hashes and the
//! leakage proof) → [`split`] → [`detect`] → [`summary`] → [`threshold`] → [`metrics`] →
//! [`card`] → [`output`] and [`sign`]; [`pipeline`] runs them, [`cli`] turns
//! arguments into a [`Request`], and [`error`] holds the one error type.

#![deny(missing_docs)]

pub mod audit;
pub mod card;
pub mod check;
pub mod cli;
pub mod data;
pub mod detect;
pub mod diff;
pub mod error;
pub mod features;
pub mod metrics;
pub mod output;
pub mod pipeline;
pub mod progress;
pub mod record;
pub mod rng;
pub mod score;
pub mod sign;
pub mod spec;
pub mod split;
pub mod stream;
pub mod summary;
pub mod threshold;

pub use error::{Error, Result};

use std::path::PathBuf;

/// One thing the user asked for.
#[derive(Debug, Clone)]
pub enum Request {
    /// Run a spec.
    Run {
        /// What to run.
        opts: pipeline::RunOptions,
        /// Print the summary as JSON.
        json: bool,
    },
    /// Score new data with a run.
    Score {
        /// What to score.
        opts: score::ScoreOptions,
        /// Print the summary as JSON.
        json: bool,
    },
    /// Dry-run a spec.
    Check {
        /// The spec file.
        spec: PathBuf,
        /// JSON output.
        json: bool,
    },
    /// Verify a run directory.
    Verify {
        /// The run directory.
        dir: PathBuf,
        /// The public key.
        pubkey: PathBuf,
        /// Recompute the run and compare.
        data: bool,
        /// The spec to recompute from (default: where the run records it).
        spec: Option<PathBuf>,
    },
    /// Make a key pair.
    Keygen {
        /// Private key path.
        private: PathBuf,
        /// Public key path.
        public: PathBuf,
    },
    /// Print the spec's JSON Schema.
    Schema,
    /// Compare two run directories.
    Diff {
        /// The earlier run.
        old: PathBuf,
        /// The later run.
        new: PathBuf,
        /// JSON output.
        json: bool,
    },
}

/// What a request produced: text for stdout and the exit code.
#[derive(Debug, Clone)]
pub struct Outcome {
    /// The lines to print on stdout.
    pub stdout: String,
    /// The exit code (0, or 1 when `check` found problems).
    pub code: i32,
    /// Warnings for stderr.
    pub warnings: Vec<String>,
}

fn to_json(v: &impl serde::Serialize) -> Result<String> {
    let mut s = serde_json::to_string_pretty(v)
        .map_err(|e| Error::internal(format!("serialising the summary: {e}")))?;
    s.push('\n');
    Ok(s)
}

fn rate(v: Option<f64>) -> String {
    v.map_or("n/a".into(), |v| format!("{v:.4}"))
}

/// Carries out a request.
pub fn run(request: &Request) -> Result<Outcome> {
    let mut code = error::exit::OK;
    let mut warnings = Vec::new();
    let stdout = match request {
        Request::Check { spec, json } => {
            let report = check::check(spec)?;
            if !report.problems.is_empty() {
                code = error::exit::VERIFY_FAILED;
            }
            if *json {
                let mut s = serde_json::to_string_pretty(&report)
                    .map_err(|e| Error::internal(format!("serialising the report: {e}")))?;
                s.push('\n');
                s
            } else {
                check::render_text(&report)
            }
        }
        Request::Run { opts, json } => {
            let s = pipeline::run(opts)?;
            warnings = s.warnings.clone();
            if *json {
                return Ok(Outcome {
                    stdout: to_json(&s)?,
                    code,
                    warnings,
                });
            }
            let test = match s.test_f1 {
                Some(_) => format!("test F1 {}", rate(s.test_f1)),
                None if opts.open_test => "test F1 n/a".to_string(),
                None => "test split sealed; --open-test for the final run".to_string(),
            };
            format!(
                "chosen: {} (validation F1 {}, {test})\nwrote: {}\n",
                s.chosen,
                rate(s.validation_f1),
                s.out.display()
            )
        }
        Request::Score { opts, json } => {
            let s = score::score(opts)?;
            if *json {
                to_json(&s)?
            } else {
                format!(
                    "scored {} rows with {} (τ = {}): {} flagged ({})\nrun manifest: blake3:{}{}\nwrote: {}\n",
                    s.rows,
                    s.candidate,
                    record::fmt_f64(s.tau),
                    s.flagged,
                    if s.rows > 0 {
                        format!("{:.2} %", 100.0 * s.flagged as f64 / s.rows as f64)
                    } else {
                        "no rows".into()
                    },
                    s.run_manifest_blake3,
                    if s.signature_checked { " (signature verified)" } else { " (signature not checked: pass --pubkey)" },
                    s.out.display()
                )
            }
        }
        Request::Verify {
            dir,
            pubkey,
            data,
            spec,
        } => {
            let m = if *data {
                pipeline::verify_by_recomputation(dir, pubkey, spec.as_deref())?
            } else {
                pipeline::verify(dir, pubkey)?
            };
            format!(
                "verified: {} ({} files, signature by {}{})\n",
                dir.display(),
                m.files.len(),
                m.key_fingerprint,
                if *data {
                    "; recomputed from spec and data, every file matches"
                } else {
                    ""
                }
            )
        }
        Request::Keygen { private, public } => {
            let fp = sign::keygen(private, public)?;
            format!(
                "wrote private key {} and public key {}\nfingerprint: {fp}\n",
                private.display(),
                public.display()
            )
        }
        Request::Schema => spec::schema_json(),
        Request::Diff { old, new, json } => {
            let d = diff::diff(old, new)?;
            if *json {
                let mut s = serde_json::to_string_pretty(&d)
                    .map_err(|e| Error::internal(format!("serialising the diff: {e}")))?;
                s.push('\n');
                s
            } else {
                diff::render_text(&d)
            }
        }
    };
    Ok(Outcome {
        stdout,
        code,
        warnings,
    })
}
