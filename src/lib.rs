//! anomark validates density-based anomaly detectors by a declared protocol.
//!
//! A YAML spec names the data, the features, the split, the candidate
//! detectors and the threshold policy. One run loads and checks the data, makes
//! seeded content-hashed splits, refuses leakage, fits each candidate on normal
//! training rows, picks each threshold and then the detector on validation
//! only, opens the test split once, and writes a signed run directory: the run
//! record, the scores and a model card.
//!
//! Modules, in protocol order: [`spec`] → [`data`] → [`audit`] (hashes and the
//! leakage proof) → [`split`] → [`detect`] → [`summary`] → [`threshold`] → [`metrics`] →
//! [`card`] → [`output`] and [`sign`]; [`protocol`] runs them as a chain of
//! typed stages, [`cli`] turns arguments into a [`Request`], [`error`] holds
//! the one error type and [`rules`] words each rule rows and fits must meet.

#![deny(missing_docs)]

pub mod audit;
pub mod card;
pub mod check;
pub mod cleanup;
pub mod cli;
pub mod conformal;
pub mod data;
pub mod decision;
pub mod detect;
pub mod diff;
pub mod drift;
#[cfg(feature = "cluster")]
pub mod engine;
pub mod error;
pub mod features;
pub mod float;
pub mod init;
pub mod metrics;
pub mod moments;
pub mod output;
pub mod part;
pub mod progress;
pub mod protocol;
pub mod record;
pub mod rng;
pub mod rules;
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
    /// Start a process of a cluster.
    #[cfg(feature = "cluster")]
    Cluster {
        /// Which process, and how.
        role: cli::ClusterRole,
    },
    /// Write a first spec for a data file.
    Init {
        /// What to read and where to write.
        opts: init::InitOptions,
    },
    /// Print a shell completion script.
    Completions {
        /// The shell.
        shell: clap_complete::Shell,
    },
    /// Print the man page, or write every page into a directory.
    Man {
        /// The directory for the pages (else the main page on stdout).
        out: Option<PathBuf>,
    },
    /// Run a spec.
    Run {
        /// What to run.
        opts: protocol::RunOptions,
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

/// The text summary's lines on FDR flagging and drift.
fn score_extra(s: &score::ScoreSummary) -> String {
    let mut out = String::new();
    if let Some(f) = &s.fdr {
        out += &format!(
            "Benjamini-Hochberg at Q = {}: {} flagged (p-value cut {}; {} validation normals)\n",
            record::fmt_f64(f.q),
            f.flagged,
            f.p_cut.map_or("none".into(), record::fmt_f64),
            f.calibration_normals
        );
    }
    if let Some(d) = &s.drift {
        for r in &d.flag_rate {
            out += &format!(
                "flag rate {:.4} against {} {:.4}: limits {:.4}–{:.4}, binomial p {:.3e}{}\n",
                r.observed,
                r.expected_from,
                r.expected,
                r.lower_limit,
                r.upper_limit,
                r.binomial_p_value,
                if r.outside_limits { " (outside)" } else { "" }
            );
        }
    }
    if let Some(r) = &s.report {
        out += &format!("drift report: {}\n", r.display());
    }
    out
}

/// Carries out a request.
pub fn run(request: &Request) -> Result<Outcome> {
    let mut code = error::exit::OK;
    let mut warnings = Vec::new();
    let stdout = match request {
        Request::Check { spec, json } => {
            let report = check::check(spec)?;
            // Leftovers of killed runs beside the spec's output, reported only.
            if let Some(out) = spec::load(spec).ok().and_then(|p| p.output) {
                warnings.extend(cleanup::stale_beside(&out));
            }
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
        Request::Init { opts } => {
            let text = init::init(opts)?;
            match &opts.out {
                Some(out) => format!(
                    "wrote: {}\nnext: fill in its card, then `anomark check {}`\n",
                    out.display(),
                    out.display()
                ),
                None => text,
            }
        }
        Request::Completions { shell } => {
            let mut buf = Vec::new();
            clap_complete::generate(*shell, &mut cli::command(), "anomark", &mut buf);
            String::from_utf8(buf)
                .map_err(|e| Error::internal(format!("completion script is not UTF-8: {e}")))?
        }
        Request::Man { out: None } => {
            let mut buf = Vec::new();
            clap_mangen::Man::new(cli::command())
                .render(&mut buf)
                .map_err(|e| Error::internal(format!("rendering the man page: {e}")))?;
            String::from_utf8(buf)
                .map_err(|e| Error::internal(format!("man page is not UTF-8: {e}")))?
        }
        Request::Man { out: Some(dir) } => {
            // Like every output of anomark, a page that exists is not overwritten.
            if let Ok(entries) = std::fs::read_dir(dir) {
                for e in entries.flatten() {
                    let name = e.file_name().to_string_lossy().into_owned();
                    if name.starts_with("anomark") && name.ends_with(".1") {
                        return Err(Error::Output {
                            path: e.path(),
                            message: "already exists; `anomark man` never overwrites a page".into(),
                        });
                    }
                }
            }
            std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, "creating", e))?;
            clap_mangen::generate_to(cli::command(), dir)
                .map_err(|e| Error::io(dir, "writing man pages into", e))?;
            format!("wrote: man pages into {}\n", dir.display())
        }
        Request::Run { opts, .. } if opts.key.as_os_str().is_empty() => {
            return Err(Error::Usage {
                message: "`anomark run` needs `--key PATH`, the Ed25519 private key that signs \
                          the run; make a key pair once with `anomark keygen --private key.pem \
                          --public key.pub.pem` (keep key.pem private, share key.pub.pem with \
                          whoever verifies), then `anomark run SPEC --key key.pem`"
                    .into(),
            })
        }
        Request::Run { opts, json } => {
            let s = protocol::run(opts)?;
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
            warnings = s.warnings.clone();
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
                ) + &score_extra(&s)
            }
        }
        Request::Verify {
            dir,
            pubkey,
            data,
            spec,
        } => {
            let m = if *data {
                protocol::verify_by_recomputation(dir, pubkey, spec.as_deref())?
            } else {
                protocol::verify(dir, pubkey)?
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
        #[cfg(feature = "cluster")]
        Request::Cluster { role } => {
            cluster(role)?;
            String::new()
        }
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

/// Runs a process of a cluster until it is stopped.
#[cfg(feature = "cluster")]
fn cluster(role: &cli::ClusterRole) -> Result<()> {
    use engine::cluster::{executor, scheduler, ExecutorOptions, SchedulerOptions};
    let own = || engine::version().to_string();
    match role {
        cli::ClusterRole::Scheduler {
            bind,
            executor_timeout,
            report_version,
        } => scheduler(&SchedulerOptions {
            bind: bind.clone(),
            reported_version: report_version.clone().unwrap_or_else(own),
            executor_timeout_seconds: *executor_timeout,
        }),
        cli::ClusterRole::Executor {
            scheduler,
            bind,
            work_dir,
            memory_limit,
            concurrent_tasks,
            report_version,
            without_functions,
        } => executor(&ExecutorOptions {
            scheduler: scheduler.clone(),
            bind: bind.clone(),
            work_dir: work_dir.clone(),
            memory_limit: *memory_limit,
            concurrent_tasks: *concurrent_tasks,
            without_functions: *without_functions,
            reported_version: report_version.clone().unwrap_or_else(own),
        }),
    }
}
