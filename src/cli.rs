//! The command line: clap types and their conversion into a [`Request`].
//!
//! This module opens no files and calls no stage: it only says what was asked.

use std::path::PathBuf;

use clap::{Parser, Subcommand};

use crate::pipeline::RunOptions;
use crate::progress::Progress;
use crate::score::ScoreOptions;
use crate::Request;

/// Validate density-based anomaly detectors by a declared protocol and publish signed model cards.
#[derive(Debug, Parser)]
#[command(name = "anomark", version, about, long_about = None)]
pub struct Args {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// The subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run a spec: split, fit, choose on validation, open the test set once, write a signed card.
    Run {
        /// The spec file (YAML).
        spec: PathBuf,
        /// The Ed25519 private key (PKCS#8 PEM) that signs the run.
        #[arg(long, value_name = "PATH")]
        key: PathBuf,
        /// The run directory to create (default: the spec's `output`).
        #[arg(long, value_name = "DIR")]
        out: Option<PathBuf>,
        /// A directory whose card.md / card.html replace the built-in templates.
        #[arg(long, value_name = "DIR")]
        templates: Option<PathBuf>,
        /// Record no wall-clock time, so that two runs are byte-identical.
        #[arg(long)]
        no_wall_clock: bool,
        /// The final run: open the test split once, after every choice is made on
        /// validation, and record the opening in the spec's test ledger.
        #[arg(long)]
        open_test: bool,
        /// Show no progress (progress is drawn only on a terminal anyway).
        #[arg(long, short)]
        quiet: bool,
        /// Print the summary as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Score new data with a run's chosen detector, transforms and threshold:
    /// every row with its score, its flag and the run's manifest hash.
    Score {
        /// The run directory.
        dir: PathBuf,
        /// The new data: a CSV or Parquet file.
        data: PathBuf,
        /// The output file: `.csv` or `.parquet` (never overwritten).
        #[arg(long, value_name = "FILE")]
        out: PathBuf,
        /// Refuse the run unless its signature verifies with this public key (SPKI PEM).
        #[arg(long, value_name = "PATH")]
        pubkey: Option<PathBuf>,
        /// Add each row's conformal p-value and flag the batch by the
        /// Benjamini-Hochberg procedure at this false-discovery rate, in (0, 1)
        /// (reads the data twice).
        #[arg(long, value_name = "Q", value_parser = fdr_level)]
        fdr: Option<f64>,
        /// Also write the batch's drift report as a self-contained HTML file
        /// (never overwritten).
        #[arg(long, value_name = "FILE")]
        report: Option<PathBuf>,
        /// Show no progress (progress is drawn only on a terminal anyway).
        #[arg(long, short)]
        quiet: bool,
        /// Print the summary as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Check the spec and the data without fitting anything: exit 0 when fine,
    /// 1 when problems were found, 2 for a usage or spec error.
    Check {
        /// The spec file (YAML).
        spec: PathBuf,
        /// Print the report as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Check a run directory's signature and every file's hash; with `--data`,
    /// also recompute it from the spec and data and compare every number.
    Verify {
        /// The run directory.
        dir: PathBuf,
        /// The Ed25519 public key (SPKI PEM).
        #[arg(long, value_name = "PATH")]
        pubkey: PathBuf,
        /// Recompute the run from its spec and inputs and compare.
        #[arg(long)]
        data: bool,
        /// The spec the run used, beside its data (default: where the run
        /// records it, relative to the run directory).
        #[arg(long, value_name = "PATH", requires = "data")]
        spec: Option<PathBuf>,
    },
    /// Make a new Ed25519 key pair.
    Keygen {
        /// Where to write the private key (PKCS#8 PEM, mode 0600).
        #[arg(long, value_name = "PATH")]
        private: PathBuf,
        /// Where to write the public key (SPKI PEM).
        #[arg(long, value_name = "PATH")]
        public: PathBuf,
    },
    /// Print the JSON Schema of the spec.
    Schema,
    /// Compare two run directories: inputs, spec, splits, features, parameters,
    /// thresholds, metric deltas, and a paired test comparison when both opened
    /// the same test rows.
    Diff {
        /// The earlier run directory.
        old: PathBuf,
        /// The later run directory.
        new: PathBuf,
        /// Print the comparison as JSON.
        #[arg(long)]
        json: bool,
    },
}

impl From<Args> for Request {
    fn from(args: Args) -> Self {
        match args.command {
            Command::Run {
                spec,
                key,
                out,
                templates,
                no_wall_clock,
                open_test,
                quiet,
                json,
            } => Request::Run {
                opts: RunOptions {
                    spec,
                    key,
                    out,
                    templates,
                    no_wall_clock,
                    open_test,
                    progress: Progress::new(quiet || json),
                },
                json,
            },
            Command::Score {
                dir,
                data,
                out,
                pubkey,
                fdr,
                report,
                quiet,
                json,
            } => Request::Score {
                opts: ScoreOptions {
                    dir,
                    data,
                    out,
                    pubkey,
                    fdr,
                    report,
                    progress: Progress::new(quiet || json),
                },
                json,
            },
            Command::Check { spec, json } => Request::Check { spec, json },
            Command::Verify {
                dir,
                pubkey,
                data,
                spec,
            } => Request::Verify {
                dir,
                pubkey,
                data,
                spec,
            },
            Command::Keygen { private, public } => Request::Keygen { private, public },
            Command::Schema => Request::Schema,
            Command::Diff { old, new, json } => Request::Diff { old, new, json },
        }
    }
}

/// `--fdr`: a number strictly between 0 and 1.
fn fdr_level(s: &str) -> Result<f64, String> {
    match s.parse::<f64>() {
        Ok(q) if q.is_finite() && q > 0.0 && q < 1.0 => Ok(q),
        _ => Err(format!(
            "must be a number strictly between 0 and 1, found `{s}`"
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    #[test]
    fn clap_definition_is_consistent() {
        Args::command().debug_assert();
    }
}
