//! The command line: clap types and their conversion into a [`Request`].
//!
//! This module opens no files and calls no stage: it only says what was asked.

use std::path::PathBuf;

use clap::{Parser, Subcommand};
use clap_complete::Shell;

use crate::progress::Progress;
use crate::protocol::RunOptions;
use crate::score::ScoreOptions;
use crate::Request;

/// Validate density-based anomaly detectors by a declared protocol and publish signed model cards.
#[derive(Debug, Parser)]
#[command(name = "anomark", version, about, long_about = None, after_help = example(EX_INIT))]
pub struct Args {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// The subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Write a first spec for a CSV or Parquet file: features, label, id,
    /// a seeded split, both Gaussian detectors and a card to fill in.
    #[command(after_help = example(EX_INIT))]
    Init {
        /// The data file (`.csv` or `.parquet`); its header and first 10,000 rows are read.
        data: PathBuf,
        /// The label column (default: guessed: a column with two values, preferring a
        /// name such as `label`, `class` or `diagnosis`).
        #[arg(long, value_name = "COLUMN")]
        label: Option<String>,
        /// The label value that marks a known anomaly (default: the rarer value).
        #[arg(long, value_name = "VALUE")]
        anomaly: Option<String>,
        /// Where to write the spec (never overwritten; default: stdout).
        #[arg(long, value_name = "SPEC")]
        out: Option<PathBuf>,
    },
    /// Run a spec: split, fit, choose on validation, open the test set once, write a signed card.
    #[command(after_help = example(EX_RUN))]
    Run {
        /// The spec file (YAML).
        spec: PathBuf,
        /// The Ed25519 private key (PKCS#8 PEM) that signs the run; make one with
        /// `anomark keygen --private key.pem --public key.pub.pem`.
        #[arg(long, value_name = "PATH")]
        key: Option<PathBuf>,
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
        /// Read, split and summarise the rows on an engine: `local` (Apache
        /// DataFusion in this process) or `df://HOST:PORT` (a Ballista cluster's
        /// scheduler); needs the `cluster` feature. Default: in this process.
        #[arg(long, value_name = "ENGINE")]
        engine: Option<String>,
        /// With `--engine local`: the memory pool, such as `512MiB` or `2GiB` (at
        /// most 1024TiB; default: no limit); operators beyond it spill to disk.
        #[arg(long, value_name = "SIZE", value_parser = memory_size)]
        memory_limit: Option<u64>,
        /// With `--engine`: how long to wait for the engine's answer to one
        /// query, 1 to 604800 seconds (default 3600); past it the run fails
        /// with exit code 5 and writes nothing.
        #[arg(long, value_name = "SECONDS")]
        engine_deadline: Option<u64>,
        /// With `--engine df://HOST:PORT`: the rows each task of a hash-partitioned
        /// stage is planned to hold, 1000 to 100000000 (default 500000). The session's
        /// partitions are the rows over this (at least the client's cores, at most
        /// 4096); an executor's memory grows with it times its concurrent tasks.
        #[arg(long, value_name = "ROWS")]
        engine_task_rows: Option<u64>,
        /// Show no progress (progress is drawn only on a terminal anyway).
        #[arg(long, short)]
        quiet: bool,
        /// Print the summary as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Score new data with a run's chosen detector, transforms and threshold:
    /// every row with its score, its flag and the run's manifest hash.
    #[command(after_help = example(EX_SCORE))]
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
    #[command(after_help = example(EX_CHECK))]
    Check {
        /// The spec file (YAML).
        spec: PathBuf,
        /// Print the report as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Check a run directory's signature and every file's hash; with `--data`,
    /// also recompute it from the spec and data and compare every number.
    #[command(after_help = example(EX_VERIFY))]
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
    #[command(after_help = example(EX_KEYGEN))]
    Keygen {
        /// Where to write the private key (PKCS#8 PEM, mode 0600).
        #[arg(long, value_name = "PATH")]
        private: PathBuf,
        /// Where to write the public key (SPKI PEM).
        #[arg(long, value_name = "PATH")]
        public: PathBuf,
    },
    /// Print the JSON Schema of the spec.
    #[command(after_help = example(EX_SCHEMA))]
    Schema,
    /// Compare two run directories: inputs, spec, splits, features, parameters,
    /// thresholds, metric deltas, and a paired test comparison when both opened
    /// the same test rows.
    #[command(after_help = example(EX_DIFF))]
    Diff {
        /// The earlier run directory.
        old: PathBuf,
        /// The later run directory.
        new: PathBuf,
        /// Print the comparison as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Start a process of a Ballista cluster that runs anomark's engine functions:
    /// the scheduler, or an executor, with anomark's functions registered.
    #[cfg(feature = "cluster")]
    #[command(after_help = example(EX_CLUSTER))]
    Cluster {
        /// Which process.
        #[command(subcommand)]
        role: ClusterRole,
    },
    /// Print a shell completion script.
    #[command(after_help = example(EX_COMPLETIONS))]
    Completions {
        /// The shell.
        shell: Shell,
    },
    /// Print the man page (roff), or write one page per command into a directory.
    #[command(after_help = example(EX_MAN))]
    Man {
        /// Write `anomark.1` and one `anomark-COMMAND.1` per command into this
        /// directory (created if missing; refused if it already holds a page).
        #[arg(long, value_name = "DIR")]
        out: Option<PathBuf>,
    },
}

/// The processes of a cluster.
#[cfg(feature = "cluster")]
#[derive(Debug, Clone, Subcommand)]
pub enum ClusterRole {
    /// The scheduler: plans each job and hands its tasks to the executors.
    #[command(after_help = example(EX_CLUSTER_SCHEDULER))]
    Scheduler {
        /// The address to listen on.
        #[arg(long, value_name = "HOST:PORT")]
        bind: String,
        /// Seconds without a heartbeat (executors send one every 2 s) after which an
        /// executor is taken as lost and its tasks run elsewhere, 4 to 3600.
        #[arg(long, value_name = "SECONDS", default_value_t = 30,
              value_parser = clap::value_parser!(u64).range(4..=3600))]
        executor_timeout: u64,
        /// Report this version instead of anomark's own (tests only).
        #[arg(long, hide = true)]
        report_version: Option<String>,
    },
    /// An executor: runs tasks, keeps shuffle files in its work directory.
    #[command(after_help = example(EX_CLUSTER))]
    Executor {
        /// The scheduler's address.
        #[arg(long, value_name = "HOST:PORT")]
        scheduler: String,
        /// The address to listen on; the next port serves the executor's gRPC.
        #[arg(long, value_name = "HOST:PORT")]
        bind: String,
        /// The directory for shuffle files (default: a new temporary directory).
        #[arg(long, value_name = "DIR")]
        work_dir: Option<PathBuf>,
        /// The executor's memory pool, such as `4GiB` or `512MiB` (default: no limit),
        /// shared evenly by its concurrent tasks; operators that exceed their share
        /// spill to the work directory.
        #[arg(long, value_name = "SIZE", value_parser = memory_size)]
        memory_limit: Option<u64>,
        /// Tasks run at once, 1 to 256 (default: the host's cores); fewer tasks
        /// give each a larger share of `--memory-limit`.
        #[arg(long, value_name = "N")]
        concurrent_tasks: Option<usize>,
        /// Report this version instead of anomark's own (tests only).
        #[arg(long, hide = true)]
        report_version: Option<String>,
        /// Register none of anomark's functions (tests only).
        #[arg(long, hide = true)]
        without_functions: bool,
    },
}

/// The example closing `anomark init --help` (also in the README).
pub const EX_INIT: &str = "anomark init readings.csv --out spec.yaml";
/// The example closing `anomark run --help` (also in the README).
pub const EX_RUN: &str = "anomark run spec.yaml --key key.pem --out runs/r1 --open-test --json";
/// The example closing `anomark score --help` (also in the README).
pub const EX_SCORE: &str = "anomark score runs/r1 shift.csv --out shift-scored.csv --json";
/// The example closing `anomark check --help` (also in the README).
pub const EX_CHECK: &str = "anomark check spec.yaml";
/// The example closing `anomark verify --help` (also in the README).
pub const EX_VERIFY: &str = "anomark verify runs/r1 --pubkey key.pub.pem";
/// The example closing `anomark keygen --help` (also in the README).
pub const EX_KEYGEN: &str = "anomark keygen --private key.pem --public key.pub.pem";
/// The example closing `anomark schema --help` (also in the README).
pub const EX_SCHEMA: &str = "anomark schema > anomark-spec.schema.json";
/// The example closing `anomark diff --help` (also in the README).
pub const EX_DIFF: &str = "anomark diff runs/r1 runs/r2";
/// The example closing `anomark completions --help` (also in the README).
pub const EX_COMPLETIONS: &str =
    "anomark completions bash > ~/.local/share/bash-completion/completions/anomark";
/// The example closing `anomark man --help` (also in the README).
pub const EX_MAN: &str = "anomark man --out man/man1";

/// The example closing `anomark cluster --help` and `anomark cluster
/// executor --help` (also in the README).
pub const EX_CLUSTER: &str =
    "anomark cluster executor --scheduler 10.0.0.5:50050 --bind 10.0.0.6:50051 --work-dir shuffle";
/// The example closing `anomark cluster scheduler --help` (also in the README).
pub const EX_CLUSTER_SCHEDULER: &str = "anomark cluster scheduler --bind 0.0.0.0:50050";

/// Every command's closing example, by command name.
pub const EXAMPLES: &[(&str, &str)] = &[
    ("init", EX_INIT),
    ("run", EX_RUN),
    ("score", EX_SCORE),
    ("check", EX_CHECK),
    ("verify", EX_VERIFY),
    ("keygen", EX_KEYGEN),
    ("schema", EX_SCHEMA),
    ("diff", EX_DIFF),
    ("completions", EX_COMPLETIONS),
    ("man", EX_MAN),
    #[cfg(feature = "cluster")]
    ("cluster", EX_CLUSTER),
];

fn example(line: &'static str) -> String {
    format!("Example:\n  {line}")
}

/// The clap command, for completions and man pages.
pub fn command() -> clap::Command {
    <Args as clap::CommandFactory>::command()
}

impl From<Args> for Request {
    fn from(args: Args) -> Self {
        match args.command {
            Command::Init {
                data,
                label,
                anomaly,
                out,
            } => Request::Init {
                opts: crate::init::InitOptions {
                    data,
                    label,
                    anomaly,
                    out,
                },
            },
            Command::Completions { shell } => Request::Completions { shell },
            Command::Man { out } => Request::Man { out },
            Command::Run {
                spec,
                key,
                out,
                templates,
                no_wall_clock,
                open_test,
                engine,
                memory_limit,
                engine_deadline,
                engine_task_rows,
                quiet,
                json,
            } => Request::Run {
                opts: RunOptions {
                    spec,
                    // No key: `run` refuses before reading anything and says
                    // how to make one (an empty path stands for none).
                    key: key.unwrap_or_default(),
                    out,
                    templates,
                    no_wall_clock,
                    open_test,
                    progress: Progress::new(quiet || json),
                    engine: crate::protocol::Engine::parse(crate::protocol::EngineFlags {
                        engine: engine.as_deref(),
                        memory_limit,
                        deadline: engine_deadline,
                        task_rows: engine_task_rows,
                    })
                    .unwrap_or_else(|e| crate::protocol::Engine::Refused(e.to_string())),
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
            #[cfg(feature = "cluster")]
            Command::Cluster { role } => Request::Cluster { role },
        }
    }
}

/// A memory size: a whole number of bytes, or with a unit `KiB`, `MiB`,
/// `GiB`, `TiB` (powers of 1,024), at most 1 PiB.
pub fn memory_size(s: &str) -> Result<u64, String> {
    let t = s.trim();
    let split = t.find(|c: char| !c.is_ascii_digit()).unwrap_or(t.len());
    let (digits, unit) = t.split_at(split);
    let shift = match unit.trim() {
        "" | "B" => 0,
        "KiB" => 10,
        "MiB" => 20,
        "GiB" => 30,
        "TiB" => 40,
        _ => u32::MAX,
    };
    let bad =
        || format!("must be a size such as `512MiB` or `4GiB` (at most 1024TiB), found `{s}`");
    let n: u64 = digits.parse().map_err(|_| bad())?;
    if shift == u32::MAX {
        return Err(bad());
    }
    n.checked_mul(1u64 << shift)
        .filter(|&b| b > 0 && b <= 1 << 50)
        .ok_or_else(bad)
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

    /// Binary units (IEC 80000-13: KiB = 2^10 bytes, MiB = 2^20, GiB = 2^30).
    #[test]
    fn memory_sizes_in_binary_units_with_an_upper_bound() {
        assert_eq!(memory_size("512MiB"), Ok(512 << 20));
        assert_eq!(memory_size("4GiB"), Ok(4 << 30));
        assert_eq!(memory_size("1024TiB"), Ok(1 << 50));
        assert_eq!(memory_size("4096"), Ok(4096));
        for bad in ["", "0", "1025TiB", "4GB", "-1GiB", "1.5GiB", "GiB"] {
            assert!(memory_size(bad).is_err(), "{bad}");
        }
    }
}
