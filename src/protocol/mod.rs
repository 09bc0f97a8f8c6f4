//! The protocol, as a short chain of typed stages, each returning the next
//! resolved type:
//!
//! spec ([`crate::spec::Plan`]) → [`ingest`] (rows, content hashes, splits
//! with the leakage proof, the test split sealed: `Ingested`) → [`train`]
//! and [`fit`] (per feature set the training data, as rows or as moments;
//! every candidate fitted, scored on validation and thresholded: `Fitted`)
//! → [`choose`] (the selection on validation: `Chosen`) → [`open`] (the
//! test split opened once, on a final run only: `Opened`) → [`report`]
//! (run.json, scores.csv, figures and the card, worded in [`wording`]) →
//! the signed directory.
//!
//! [`recompute`] runs the same chain again to verify a run and rebuilds a
//! run's chosen detector for `score`. The rules the stages apply to rows and
//! fits are worded once in [`crate::rules`].

use std::path::PathBuf;
use std::time::{Instant, SystemTime};

use crate::card;
use crate::error::{Error, Result};
use crate::output::{self, RunFiles};
use crate::record::{self, WallClock};
use crate::spec::{self, Plan};

pub mod choose;
pub mod fit;
pub mod held;
pub mod ingest;
pub mod open;
pub mod recompute;
pub mod report;
pub mod train;
pub mod wording;

pub use choose::{policy_name, selection_rule};
pub use recompute::{
    chosen_command, recompute, recorded_spec_path, refit_chosen, verify, verify_by_recomputation,
    Replay,
};
pub use report::{RunSummary, SPEC_COPY};

/// What `anomark run` needs.
#[derive(Debug, Clone)]
pub struct RunOptions {
    /// The spec file.
    pub spec: PathBuf,
    /// The private key (empty when none was given: `anomark::run` then
    /// refuses before reading anything and says how to make one).
    pub key: PathBuf,
    /// The output directory (else the spec's `output`).
    pub out: Option<PathBuf>,
    /// A directory of templates that replace built-in ones.
    pub templates: Option<PathBuf>,
    /// Leave the wall-clock field null, making the directory byte-identical across runs.
    pub no_wall_clock: bool,
    /// The final run: open the test split once and record it on the ledger.
    pub open_test: bool,
    /// Progress display for the long stages.
    pub progress: crate::progress::Progress,
    /// Where the rows are read, split and summarised.
    pub engine: Engine,
}

/// How long a run on an engine waits for the engine's answer to one query
/// when `--engine-deadline` is not given: one hour.
pub const ENGINE_DEADLINE_DEFAULT_SECONDS: u64 = 3_600;
/// The longest `--engine-deadline`: seven days per query.
pub const ENGINE_DEADLINE_MAX_SECONDS: u64 = 604_800;
/// The rows a task of a cluster's hash-partitioned stage is planned to hold
/// when `--engine-task-rows` is not given (an executor's memory grows with
/// it times its concurrent tasks; README "Running on a cluster").
pub const ENGINE_TASK_ROWS_DEFAULT: u64 = 500_000;
/// The bounds of `--engine-task-rows`: fewer rows make more tasks (each with
/// its own shuffle files), more rows make larger ones.
pub const ENGINE_TASK_ROWS_BOUNDS: std::ops::RangeInclusive<u64> = 1_000..=100_000_000;

/// The command line's engine options, as given (checked by [`Engine::parse`]).
#[derive(Debug, Clone, Copy, Default)]
pub struct EngineFlags<'a> {
    /// `--engine`.
    pub engine: Option<&'a str>,
    /// `--memory-limit` in bytes.
    pub memory_limit: Option<u64>,
    /// `--engine-deadline` in seconds.
    pub deadline: Option<u64>,
    /// `--engine-task-rows`.
    pub task_rows: Option<u64>,
}

/// Where a run's rows are read, split and summarised (`--engine`).
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub enum Engine {
    /// In this process, in memory or streamed as the spec says (the default).
    #[default]
    InProcess,
    /// Apache DataFusion in this process, with an optional memory pool limit
    /// in bytes (operators beyond it spill to disk): `--engine local`.
    Local {
        /// The memory pool's limit in bytes (`--memory-limit`).
        memory_limit: Option<u64>,
        /// Seconds the client waits for one query's answer (`--engine-deadline`).
        deadline: u64,
    },
    /// A Ballista cluster whose scheduler listens at `url`
    /// (`--engine df://HOST:PORT`).
    Cluster {
        /// `df://HOST:PORT`.
        url: String,
        /// Seconds the client waits for one query's answer, the handshake
        /// included (`--engine-deadline`).
        deadline: u64,
        /// The rows each task of a hash-partitioned stage is planned to hold
        /// (`--engine-task-rows`): the session's partitions are the rows over
        /// this ([`crate::engine::partitions_for`]).
        task_rows: u64,
    },
    /// An `--engine` / `--memory-limit` that [`Engine::parse`] refused, with
    /// its message: `run` stops with it (a usage error) before reading anything.
    Refused(String),
}

impl Engine {
    /// `--engine VALUE` with `--memory-limit` (only with `local`),
    /// `--engine-deadline` (1 to [`ENGINE_DEADLINE_MAX_SECONDS`]) and
    /// `--engine-task-rows` (only with a cluster, within
    /// [`ENGINE_TASK_ROWS_BOUNDS`]): `local` or `df://HOST:PORT`; anything
    /// else refused by name.
    pub fn parse(flags: EngineFlags<'_>) -> Result<Engine> {
        let EngineFlags {
            engine: value,
            memory_limit,
            deadline,
            task_rows,
        } = flags;
        let usage = |message: String| Err(Error::Usage { message });
        if value.is_none() && deadline.is_some() {
            return usage("`--engine-deadline` needs `--engine`".into());
        }
        if task_rows.is_some() && !value.is_some_and(|v| v.starts_with("df://")) {
            return usage(
                "`--engine-task-rows` is for a cluster (`--engine df://HOST:PORT`): in one \
                 process every partition runs at once, and `--memory-limit` bounds them"
                    .into(),
            );
        }
        let task_rows = task_rows.unwrap_or(ENGINE_TASK_ROWS_DEFAULT);
        if !ENGINE_TASK_ROWS_BOUNDS.contains(&task_rows) {
            return usage(format!(
                "`--engine-task-rows` must be {} to {}, not {task_rows}",
                ENGINE_TASK_ROWS_BOUNDS.start(),
                ENGINE_TASK_ROWS_BOUNDS.end()
            ));
        }
        let deadline = deadline.unwrap_or(ENGINE_DEADLINE_DEFAULT_SECONDS);
        if !(1..=ENGINE_DEADLINE_MAX_SECONDS).contains(&deadline) {
            return usage(format!(
                "`--engine-deadline` must be 1 to {ENGINE_DEADLINE_MAX_SECONDS} seconds, not \
                 {deadline}"
            ));
        }
        match value {
            None if memory_limit.is_some() => {
                usage("`--memory-limit` needs `--engine local`".into())
            }
            None => Ok(Engine::InProcess),
            Some("local") => Ok(Engine::Local {
                memory_limit,
                deadline,
            }),
            Some(url) if url.starts_with("df://") => {
                if memory_limit.is_some() {
                    return usage(
                        "`--memory-limit` is for `--engine local`; a cluster's executors take \
                         theirs at `anomark cluster executor --memory-limit`"
                            .into(),
                    );
                }
                let rest = &url["df://".len()..];
                match rest.rsplit_once(':') {
                    Some((host, port)) if !host.is_empty() && port.parse::<u16>().is_ok() => {
                        Ok(Engine::Cluster {
                            url: url.into(),
                            deadline,
                            task_rows,
                        })
                    }
                    _ => usage(format!(
                        "`--engine` must be `local` or `df://HOST:PORT`, such as \
                         df://127.0.0.1:50050, not `{url}`"
                    )),
                }
            }
            Some(other) => usage(format!(
                "`--engine` must be `local` or `df://HOST:PORT`, not `{other}`"
            )),
        }
    }

    /// The run record's engine field: `local`, the cluster's URL, or none.
    pub fn recorded(&self) -> Option<String> {
        match self {
            Engine::InProcess => None,
            Engine::Local { .. } => Some("local".into()),
            Engine::Cluster { url, .. } => Some(url.clone()),
            Engine::Refused(_) => None,
        }
    }

    /// Refuses a plan this engine cannot run, with the reason, before
    /// anything is read or written (an engine needs the `cluster` feature).
    fn check(&self, plan: &Plan) -> Result<()> {
        match self {
            Engine::InProcess => return Ok(()),
            Engine::Refused(message) => {
                return Err(Error::Usage {
                    message: message.clone(),
                })
            }
            Engine::Local { .. } | Engine::Cluster { .. } => {}
        }
        #[cfg(feature = "cluster")]
        {
            crate::engine::run::check_scope(plan)
        }
        #[cfg(not(feature = "cluster"))]
        {
            let _ = plan;
            Err(Error::Usage {
                message: format!(
                    "`--engine {}` needs anomark built with the `cluster` feature \
                     (`cargo build --release --features cluster`); this build runs in \
                     process only",
                    self.recorded().unwrap_or_default()
                ),
            })
        }
    }

    /// The reader of a plan's rows on this engine.
    fn reader(&self, plan: &Plan) -> Box<dyn ingest::Ingest> {
        match self {
            Engine::InProcess => ingest::reader(plan),
            #[cfg(feature = "cluster")]
            e => Box::new(crate::engine::run::OnEngine(e.clone())),
            #[cfg(not(feature = "cluster"))]
            _ => ingest::reader(plan),
        }
    }
}

/// Runs the whole protocol and writes the signed run directory.
pub fn run(opts: &RunOptions) -> Result<RunSummary> {
    let plan = spec::load(&opts.spec)?;
    opts.engine.check(&plan)?;
    let out = match (&opts.out, &plan.output) {
        (Some(o), _) => o.clone(),
        (None, Some(o)) => o.clone(),
        (None, None) => {
            return Err(Error::Output {
                path: opts.spec.clone(),
                message: "no output directory: pass `--out DIR` or set `output` in the spec".into(),
            })
        }
    };
    output::check_target(&out)?;
    if let Some(d) = &opts.templates {
        card::check_overrides(d)?;
    }
    if opts.open_test {
        crate::audit::ledger::check_path(&plan.ledger)?;
    }
    let key = crate::sign::load_private(&opts.key)?;
    let fingerprint = crate::sign::fingerprint(&key.verifying_key());
    let from_run = record::relative_path(&out, &opts.spec);
    let stale = crate::cleanup::stale_beside(&out);
    let (files, mut summary) = execute(opts, plan, &fingerprint, None, from_run)?;
    summary.warnings.extend(stale);
    let stage = opts.progress.stage("signing and writing the run directory");
    summary.out = files.commit(&out, &key)?;
    drop(stage);
    summary.peak_rss_mib = crate::progress::peak_rss_mib();
    Ok(summary)
}

/// The stages in order, from a loaded plan to the run directory's files.
fn execute(
    opts: &RunOptions,
    plan: Plan,
    fingerprint: &str,
    replay: Option<&Replay>,
    path_from_run: Option<String>,
) -> Result<(RunFiles, RunSummary)> {
    let started = (SystemTime::now(), Instant::now());
    let progress = opts.progress;
    let provenance = provenance_in_background(opts, replay);

    let ingested = opts.engine.reader(&plan).ingest(&plan, &progress)?;
    // Fit and choose on train and validation only.
    let fitted = fit::candidates(&plan, &ingested.rows, &progress)?;
    let chosen = choose::choose(&plan, fitted)?;
    let t = crate::progress::part("train and validation manifests");
    let manifests = ingested.manifests();
    drop(t);
    let test_counts = ingested.test_counts();
    let ingest::Ingested { rows, test } = ingested;
    // Every choice is fixed: only a final run opens the test split, once.
    let ledger = opts.open_test.then_some(match replay {
        Some(r) => open::Ledger::Replay(r.openings.as_ref()),
        None => open::Ledger::Append,
    });
    let t = crate::progress::part("opening the test split");
    let opened = open::test(&plan, &rows, test, chosen, ledger)?;
    drop(t);

    // scores.csv, the figures and the scores digest while the bootstrap
    // intervals, started as each summary was made, are computed beside them.
    let stage = progress.stage("scores.csv, figures and the scores digest");
    // On an engine the scores are written where the rows are, into a
    // folder beside the run directory until it is committed.
    let staging = match &rows.held {
        held::Held::Rows => None,
        held::Held::Engine(_) => {
            let target = opts
                .out
                .clone()
                .or_else(|| plan.output.clone())
                .ok_or_else(|| Error::internal("an engine run without an output directory"))?;
            Some(output::Staging::beside(&target)?)
        }
    };
    let artifacts = report::artifacts(&plan, &rows, &opened, staging)?;
    drop(stage);
    let stage = progress.stage("the record, once the intervals are in");
    let header = report::Header {
        spec_file: opts
            .spec
            .file_name()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default(),
        path_from_run,
        provenance: provenance.join().unwrap_or(None),
        wall_clock: wall_clock(opts, replay, started),
        engine: match replay {
            Some(r) => r.engine.clone(),
            None => opts.engine.recorded(),
        },
        manifests,
        test_counts,
        scores_digest: artifacts.scores_digest.clone(),
    };
    let rec = report::record(&plan, &rows, &opened, header)?;
    // The rows are not read again. Held in memory, theirs (the value
    // matrix: 128 MB at a million rows of 16 features) is handed back by a
    // thread of its own while the card is written and signed, not when the
    // process ends. (Should no thread start, the closure and the rows are
    // dropped here.) Rows on an engine are dropped here, in order: their
    // drop may stop processes.
    if matches!(rows.held, held::Held::Rows) {
        let _ = std::thread::Builder::new()
            .name("anomark-free".into())
            .spawn(move || drop(rows));
    } else {
        drop(rows);
    }
    drop(stage);
    let stage = progress.stage("writing the card");
    let files = report::files(
        &plan,
        &rec,
        artifacts,
        opts.templates.as_deref(),
        fingerprint,
    )?;
    drop(stage);
    Ok((files, report::summary(&rec, opened.warnings)?))
}

/// The repository state as the run begins, read by git in the background
/// while the data is read (a recomputation keeps the recorded state).
fn provenance_in_background(
    opts: &RunOptions,
    replay: Option<&Replay>,
) -> std::thread::JoinHandle<Option<crate::audit::provenance::Provenance>> {
    match replay {
        Some(r) => {
            let p = r.provenance.clone();
            std::thread::spawn(move || p)
        }
        None => {
            let spec = opts.spec.clone();
            std::thread::spawn(move || crate::audit::provenance::of(&spec))
        }
    }
}

/// The wall-clock field: when the run started and how long it has taken so
/// far (null with `--no-wall-clock`; a recomputation keeps the recorded one).
fn wall_clock(
    opts: &RunOptions,
    replay: Option<&Replay>,
    (started, clock): (SystemTime, Instant),
) -> Option<WallClock> {
    if let Some(r) = replay {
        return r.wall_clock.clone();
    }
    (!opts.no_wall_clock).then(|| WallClock {
        started_utc: record::rfc3339(
            started
                .duration_since(SystemTime::UNIX_EPOCH)
                .map(|d| d.as_secs())
                .unwrap_or(0),
        ),
        seconds: (clock.elapsed().as_millis() as f64) / 1000.0,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// `--engine` and `--memory-limit` as the command line gives them.
    #[test]
    fn engines_parse_and_refuse_by_name() {
        let parse = |engine, memory_limit, deadline| {
            Engine::parse(EngineFlags {
                engine,
                memory_limit,
                deadline,
                task_rows: None,
            })
        };
        assert_eq!(parse(None, None, None).unwrap(), Engine::InProcess);
        assert_eq!(
            parse(Some("local"), Some(1 << 30), None).unwrap(),
            Engine::Local {
                memory_limit: Some(1 << 30),
                deadline: ENGINE_DEADLINE_DEFAULT_SECONDS,
            }
        );
        let url = "df://127.0.0.1:50050";
        assert_eq!(
            parse(Some(url), None, Some(90)).unwrap(),
            Engine::Cluster {
                url: url.into(),
                deadline: 90,
                task_rows: ENGINE_TASK_ROWS_DEFAULT,
            }
        );
        assert_eq!(
            parse(Some(url), None, None).unwrap().recorded(),
            Some(url.into())
        );
        let week = ENGINE_DEADLINE_MAX_SECONDS;
        assert!(parse(Some(url), None, Some(week)).is_ok());
        for (engine, limit, deadline, words) in [
            (Some("spark://h:1"), None, None, "`--engine` must be"),
            (Some("df://h"), None, None, "df://HOST:PORT"),
            (Some("df://:7"), None, None, "df://HOST:PORT"),
            (
                Some(url),
                Some(1),
                None,
                "`--memory-limit` is for `--engine local`",
            ),
            (
                None,
                Some(1),
                None,
                "`--memory-limit` needs `--engine local`",
            ),
            (None, None, Some(5), "`--engine-deadline` needs `--engine`"),
            (
                Some("local"),
                None,
                Some(0),
                "must be 1 to 604800 seconds, not 0",
            ),
            (
                Some(url),
                None,
                Some(week + 1),
                "must be 1 to 604800 seconds",
            ),
        ] {
            let e = parse(engine, limit, deadline).unwrap_err();
            assert!(e.to_string().contains(words), "{e}");
            assert_eq!(e.code(), 2);
        }
        // `--engine-task-rows`: a cluster's only, within its bounds.
        let with_rows = |engine, task_rows| {
            Engine::parse(EngineFlags {
                engine,
                task_rows: Some(task_rows),
                ..EngineFlags::default()
            })
        };
        assert_eq!(
            with_rows(Some(url), 1_000).unwrap(),
            Engine::Cluster {
                url: url.into(),
                deadline: ENGINE_DEADLINE_DEFAULT_SECONDS,
                task_rows: 1_000,
            }
        );
        for (engine, rows, words) in [
            (Some(url), 999, "must be 1000 to 100000000, not 999"),
            (Some(url), 100_000_001, "must be 1000 to 100000000"),
            (
                Some("local"),
                5_000,
                "`--engine-task-rows` is for a cluster",
            ),
            (None, 5_000, "`--engine-task-rows` is for a cluster"),
        ] {
            let e = with_rows(engine, rows).unwrap_err();
            assert!(e.to_string().contains(words), "{e}");
            assert_eq!(e.code(), 2);
        }
    }

    /// A build without the `cluster` feature refuses an engine, naming the
    /// feature, before anything is read.
    #[cfg(not(feature = "cluster"))]
    #[test]
    fn an_engine_needs_the_cluster_feature() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("spec.yaml");
        let spec = "format: 1\ndata:\n  path: absent.csv\n  label:\n    column: l\n    \
                    normal: ok\n    anomaly: bad\n  features: [a]\nsplit:\n  protocol:\n    \
                    seed: 1\ndetectors: [independent-gaussian]\nthreshold: max-f1\ncard:\n  \
                    title: t\n  owner: o\n  intended-use: u\n";
        let plan = crate::spec::parse(&path, spec.as_bytes().to_vec()).unwrap();
        let e = Engine::Local {
            memory_limit: None,
            deadline: ENGINE_DEADLINE_DEFAULT_SECONDS,
        }
        .check(&plan)
        .unwrap_err();
        assert!(e.to_string().contains("`cluster` feature"), "{e}");
        assert_eq!(e.code(), 2);
    }
}
