//! Verification by recomputation, and the rebuilding of a run's chosen
//! detector for `score`: a run recomputed from its spec and inputs (refused
//! when they changed) with what no computation can reproduce (clock,
//! ledger, key) taken from the record.

use std::path::{Path, PathBuf};

use super::ingest::{InMemory, Ingest, Ingested, Rows};
use super::{execute, RunOptions, SPEC_COPY};
use crate::audit::hash;
use crate::detect::{self, Model};
use crate::error::{Error, Result};
use crate::features;
use crate::output::RunFiles;
use crate::record::{self, RunRecord, TestOpenings, WallClock};
use crate::spec::{self, DetectorKind, Plan};

/// What a recomputation takes from the recorded run instead of the clock,
/// the ledger and the private key.
#[derive(Debug, Clone)]
pub struct Replay {
    /// The recorded wall-clock field.
    pub wall_clock: Option<WallClock>,
    /// The recorded ledger summary.
    pub openings: Option<TestOpenings>,
    /// The recorded signing key's fingerprint.
    pub key_fingerprint: String,
    /// The recorded path of the spec from the run directory.
    pub path_from_run: Option<String>,
    /// The recorded repository state of the spec (it may have moved on since).
    pub provenance: Option<crate::audit::provenance::Provenance>,
    /// The recorded engine field: a run made on an engine is recomputed in
    /// this process, to the same bytes but for that field, which is kept.
    pub engine: Option<String>,
}

/// Recomputes a run in memory from its spec, data and the recorded values
/// that no computation can reproduce (clock, ledger, key).
pub fn recompute(opts: &RunOptions, replay: &Replay) -> Result<RunFiles> {
    let plan = spec::load(&opts.spec)?;
    execute(
        opts,
        plan,
        &replay.key_fingerprint,
        Some(replay),
        replay.path_from_run.clone(),
    )
    .map(|r| r.0)
}

/// Checks the signature and every file hash of a run directory.
pub fn verify(dir: &Path, pubkey: &Path) -> Result<crate::sign::Manifest> {
    let key = crate::sign::load_public(pubkey)?;
    crate::sign::verify_dir(dir, &key)
}

/// Where a run's record says its spec is, relative to the run directory.
pub fn recorded_spec_path(dir: &Path) -> Result<PathBuf> {
    spec_path_of(dir, &record::read_run(dir)?)
}

/// Where `run` (the record of the run directory `dir`) says its spec is.
fn spec_path_of(dir: &Path, run: &RunRecord) -> Result<PathBuf> {
    match &run.spec.path_from_run {
        Some(rel) => Ok(dir.join(rel)),
        None => Err(Error::Output {
            path: dir.to_path_buf(),
            message: "the run does not record where its spec is; pass `--spec SPEC`".into(),
        }),
    }
}

/// Refuses inputs whose hashes differ from the ones `run` recorded (paths
/// relative to the spec's folder).
fn check_recorded_inputs(dir: &Path, spec: &Path, run: &RunRecord) -> Result<()> {
    let base = spec.parent().unwrap_or(Path::new(""));
    let mut problems = Vec::new();
    for input in &run.inputs {
        let rel = input.path.as_str();
        let p = base.join(rel);
        match hash::file(&p) {
            Ok(d) if d.blake3 == input.digest.blake3 => {}
            Ok(d) => problems.push(format!(
                "input `{rel}` has blake3 {} but the run recorded {}",
                d.blake3, input.digest.blake3
            )),
            Err(e) => problems.push(e.in_file(rel).to_string()),
        }
    }
    if !problems.is_empty() {
        problems.push("recomputation refused: the inputs are not the recorded ones".into());
        return Err(Error::Verify {
            dir: dir.to_path_buf(),
            problems,
        });
    }
    Ok(())
}

/// Refits a run's chosen detector from the run's own spec and inputs (for a
/// detector whose fitted state run.json does not hold, k-NN), refusing
/// changed inputs and a refit whose parameters differ from `recorded`.
pub fn refit_chosen(dir: &Path, recorded: &detect::Params) -> Result<Box<dyn Model>> {
    let (plan, rows, kind, set) = rebuild_chosen(dir)?;
    let detector = detect::name(kind);
    let fitted = features::fit(&plan.feature_sets[set], &rows.data, &rows.train)?;
    let train = fitted.apply(&rows.data, &rows.train)?;
    let model = detect::build(kind).fit(train.view(), &fitted.names())?;
    if &model.params() != recorded {
        return Err(Error::Verify {
            dir: dir.to_path_buf(),
            problems: vec![format!(
                "refitting `{detector}` from the run's spec and inputs gave other parameters than run.json records"
            )],
        });
    }
    Ok(model)
}

/// What `score` needs to run a run's chosen external command again: the
/// command and the training rows' features, rebuilt from the run's spec and
/// inputs (refused if they, or a file of the command's `inputs`, changed).
pub fn chosen_command(
    dir: &Path,
    recorded: &detect::Params,
) -> Result<(spec::CommandPlan, ndarray::Array2<f64>)> {
    let (plan, rows, kind, set) = rebuild_chosen(dir)?;
    let (DetectorKind::Command(i), detect::Params::Command { inputs, .. }) = (kind, recorded)
    else {
        return Err(Error::internal("the chosen candidate is not a command"));
    };
    let command = plan.commands[i].clone();
    if &detect::command::hash_inputs(&command)? != inputs {
        return Err(Error::Verify {
            dir: dir.to_path_buf(),
            problems: vec![format!(
                "a file of the command `{}`'s `inputs` differs from the one the run recorded",
                command.name
            )],
        });
    }
    let fitted = features::fit(&plan.feature_sets[set], &rows.data, &rows.train)?;
    let train = fitted.apply(&rows.data, &rows.train)?;
    Ok((command, train))
}

/// The run's spec, data and splits rebuilt from its recorded spec and
/// inputs (refused if they changed), with the chosen candidate's detector
/// and feature set.
fn rebuild_chosen(dir: &Path) -> Result<(Plan, Rows, DetectorKind, usize)> {
    let spec = recorded_spec_path(dir)?;
    let read = |p: &Path| std::fs::read(p).map_err(|e| Error::io(p, "reading", e));
    if read(&spec)? != read(&dir.join(SPEC_COPY))? {
        return Err(Error::Verify {
            dir: dir.to_path_buf(),
            problems: vec![format!(
                "the chosen detector keeps its training rows, which are refitted from the run's spec; `{}` differs from the recorded `{SPEC_COPY}`",
                spec.display()
            )],
        });
    }
    let run = record::read_run(dir)?;
    check_recorded_inputs(dir, &spec, &run)?;
    let plan = spec::load(&spec)?;
    let Ingested { rows, .. } = InMemory.ingest(&plan, &crate::progress::Progress::hidden())?;
    let chosen = run.chosen(&dir.join(record::RUN_JSON))?;
    let set_name = chosen.feature_set.as_str();
    let detector = chosen.detector.as_str();
    let set = plan
        .feature_sets
        .iter()
        .position(|s| s.name == set_name)
        .ok_or_else(|| Error::internal(format!("feature set `{set_name}` is not in the spec")))?;
    let command = match &chosen.params {
        detect::Params::Command { name, .. } => name.as_str(),
        _ => "",
    };
    let kind = *plan
        .detectors
        .iter()
        .find(|k| match k {
            DetectorKind::Command(i) => detector == "command" && plan.commands[*i].name == command,
            _ => detect::name(**k) == detector,
        })
        .ok_or_else(|| Error::internal(format!("detector `{detector}` is not in the spec")))?;
    Ok((plan, rows, kind, set))
}

/// The first place where two texts differ: a JSON path for JSON, else a line.
fn first_difference(name: &str, recorded: &[u8], recomputed: &[u8]) -> String {
    if name.ends_with(".json") {
        if let (Ok(a), Ok(b)) = (
            serde_json::from_slice::<serde_json::Value>(recorded),
            serde_json::from_slice::<serde_json::Value>(recomputed),
        ) {
            fn walk(a: &serde_json::Value, b: &serde_json::Value, at: String) -> Option<String> {
                use serde_json::Value::*;
                match (a, b) {
                    (Object(x), Object(y)) => {
                        for (k, v) in x {
                            match y.get(k) {
                                Some(w) => {
                                    if let Some(p) = walk(v, w, format!("{at}.{k}")) {
                                        return Some(p);
                                    }
                                }
                                None => return Some(format!("{at}.{k} (missing when recomputed)")),
                            }
                        }
                        y.keys()
                            .find(|k| !x.contains_key(*k))
                            .map(|k| format!("{at}.{k} (only when recomputed)"))
                    }
                    (Array(x), Array(y)) if x.len() == y.len() => x
                        .iter()
                        .zip(y)
                        .enumerate()
                        .find_map(|(i, (v, w))| walk(v, w, format!("{at}[{i}]"))),
                    _ if a == b => None,
                    _ => Some(format!("{at}: recorded {a}, recomputed {b}")),
                }
            }
            if let Some(p) = walk(&a, &b, String::new()) {
                return format!("`{name}` field {}", p.trim_start_matches('.'));
            }
        }
    }
    let (a, b) = (
        String::from_utf8_lossy(recorded),
        String::from_utf8_lossy(recomputed),
    );
    let line = a
        .lines()
        .zip(b.lines())
        .position(|(x, y)| x != y)
        .map(|i| i + 1)
        .unwrap_or(a.lines().count().min(b.lines().count()) + 1);
    let mut out = format!("`{name}` first differs at line {line}");
    if name == "scores.csv" {
        out.push_str(&scores_line_difference(&a, &b, line));
    }
    out
}

/// For a differing line of scores.csv: the row, its split and the first
/// candidate whose score differs, with both values.
fn scores_line_difference(recorded: &str, recomputed: &str, line: usize) -> String {
    let (Some(header), Some(x), Some(y)) = (
        recorded.lines().next(),
        recorded.lines().nth(line - 1),
        recomputed.lines().nth(line - 1),
    ) else {
        return String::new();
    };
    // Candidate names and ids are plain here when the line splits into as
    // many fields as the header; otherwise the line alone is reported.
    let names: Vec<&str> = header.split(',').collect();
    let (fx, fy): (Vec<&str>, Vec<&str>) = (x.split(',').collect(), y.split(',').collect());
    if fx.len() != names.len() || fy.len() != names.len() || fx[..2] != fy[..2] {
        return String::new();
    }
    match (3..names.len()).find(|&j| fx[j] != fy[j]) {
        Some(j) => format!(
            " (row `{}` of {}: candidate `{}` recorded {}, recomputed {})",
            fx[0], fx[1], names[j], fx[j], fy[j]
        ),
        None => String::new(),
    }
}

/// The rows of the scores' Parquet parts an engine wrote (`names`,
/// relative to the run directory `dir`), part after part.
pub(crate) struct PartsRows {
    /// The candidates' names, in the parts' column order.
    pub candidates: Vec<String>,
    /// The rows.
    pub rows: Vec<PartRow>,
}

/// One row of the scores' parts: its id (when the run has an id column),
/// split (1 validation, 2 test), file, row in file, label, and each
/// candidate's score.
pub(crate) type PartRow = (Option<String>, u8, u32, u64, bool, Vec<f64>);

/// Reads the scores' Parquet parts `names` of the run directory `dir`.
pub(crate) fn read_parts(dir: &Path, names: &[&String]) -> Result<PartsRows> {
    use polars::prelude::*;
    let mut out = PartsRows {
        candidates: vec![],
        rows: vec![],
    };
    for name in names {
        let path = dir.join(name);
        let bad = |e: &dyn std::fmt::Display| Error::Verify {
            dir: dir.to_path_buf(),
            problems: vec![format!("the scores part `{name}` does not read: {e}")],
        };
        let file = std::fs::File::open(&path).map_err(|e| Error::io(&path, "reading", e))?;
        let df = ParquetReader::new(file).finish().map_err(|e| bad(&e))?;
        let col = |n: &str| df.column(n).map_err(|e| bad(&e));
        let ids = match df.column("id") {
            Ok(c) => Some(c.str().map_err(|e| bad(&e))?.clone()),
            Err(_) => None,
        };
        let split = col("split")?.str().map_err(|e| bad(&e))?.clone();
        let f = col("file")?.i64().map_err(|e| bad(&e))?.clone();
        let r = col("row")?.i64().map_err(|e| bad(&e))?.clone();
        let label = col("label")?.i64().map_err(|e| bad(&e))?.clone();
        let names: Vec<String> = df
            .get_column_names()
            .iter()
            .map(|n| n.to_string())
            .collect();
        let first = names
            .iter()
            .position(|n| n == "label")
            .map_or(names.len(), |k| k + 1);
        let candidates = names[first..].to_vec();
        if out.candidates.is_empty() {
            out.candidates = candidates.clone();
        } else if out.candidates != candidates {
            return Err(bad(&"other score columns than the other parts"));
        }
        let scores: Vec<Float64Chunked> = candidates
            .iter()
            .map(|n| col(n).and_then(|c| c.f64().map_err(|e| bad(&e)).cloned()))
            .collect::<Result<_>>()?;
        for i in 0..df.height() {
            let part = match split.get(i) {
                Some("validation") => 1u8,
                Some("test") => 2,
                other => return Err(bad(&format!("a row of split {other:?}"))),
            };
            let (Some(f), Some(r), Some(a)) = (f.get(i), r.get(i), label.get(i)) else {
                return Err(bad(&"a missing value"));
            };
            let s: Vec<f64> = scores
                .iter()
                .map(|c| c.get(i).ok_or_else(|| bad(&"a missing score")))
                .collect::<Result<_>>()?;
            let id = ids.as_ref().and_then(|c| c.get(i)).map(str::to_string);
            out.rows.push((id, part, f as u32, r as u64, a == 1, s));
        }
    }
    Ok(out)
}

/// The scores digest (`audit::hash::scores_digest`) of the Parquet parts
/// an engine wrote (`names`, relative to `dir`): every row's split, file,
/// row, label and the candidates' scores in the parts' column order.
fn parts_digest(dir: &Path, names: &[&String]) -> Result<String> {
    let parts = read_parts(dir, names)?;
    let k = parts.rows.first().map_or(0, |row| row.5.len());
    if parts.rows.iter().any(|row| row.5.len() != k) {
        return Err(Error::internal(
            "score parts with different numbers of scores",
        ));
    }
    let rows = hash::score_rows(
        parts.rows.len(),
        k,
        |i| {
            let (_, split, file, row, anomaly, _) = &parts.rows[i];
            hash::Scored {
                split: *split,
                file: *file,
                row: *row,
                anomaly: *anomaly,
            }
        },
        |i, c| parts.rows[i].5[c],
    );
    Ok(hash::scores_digest(&rows))
}

/// Verifies a run directory, then recomputes it from `spec` and the data it
/// names (refusing if the spec or an input's hash differs from the record)
/// and confirms that every file matches, reporting the first difference.
pub fn verify_by_recomputation(
    dir: &Path,
    pubkey: &Path,
    spec: Option<&Path>,
) -> Result<crate::sign::Manifest> {
    let manifest = verify(dir, pubkey)?;
    let fail = |problems: Vec<String>| Error::Verify {
        dir: dir.to_path_buf(),
        problems,
    };
    let read = |p: PathBuf| std::fs::read(&p).map_err(|e| Error::io(p, "reading", e));
    // A signed run whose record does not read fails verification (exit 1).
    let run_path = dir.join(record::RUN_JSON);
    let run = record::parse_run(&run_path, &read(run_path.clone())?).map_err(|e| match e {
        Error::Output { message, .. } => fail(vec![format!("`run.json` is unreadable: {message}")]),
        e => e,
    })?;
    let spec_buf = match spec {
        Some(s) => s.to_path_buf(),
        None => spec_path_of(dir, &run)?,
    };
    let spec = spec_buf.as_path();
    let recorded_spec = read(dir.join(SPEC_COPY))?;
    if read(spec.to_path_buf())? != recorded_spec {
        return Err(fail(vec![format!(
            "the spec `{}` differs from the recorded `{SPEC_COPY}`; recomputation needs the spec the run used",
            spec.display()
        )]));
    }
    check_recorded_inputs(dir, spec, &run)?;
    let replay = Replay {
        wall_clock: run.wall_clock.clone(),
        openings: run.test_openings.clone(),
        key_fingerprint: manifest.key_fingerprint.clone(),
        path_from_run: run.spec.path_from_run.clone(),
        provenance: run.provenance.clone(),
        engine: run.engine.clone(),
    };
    let opts = RunOptions {
        spec: spec.to_path_buf(),
        key: PathBuf::new(),
        out: None,
        templates: None,
        no_wall_clock: run.wall_clock.is_none(),
        open_test: run.test_opened,
        progress: crate::progress::Progress::hidden(),
        engine: super::Engine::InProcess,
    };
    let mut files = recompute(&opts, &replay)?;
    let parts: Vec<&String> = manifest
        .files
        .keys()
        .filter(|n| n.starts_with(&format!("{}/", super::report::SCORES_PARTS)))
        .collect();
    if run.engine.is_some() {
        // A run on an engine wrote its scores as Parquet parts, scores.csv
        // in process: both give the scores digest, which run.json records
        // and the recomputed run.json (compared below) computes again.
        files.remove("scores.csv");
        let digest = parts_digest(dir, &parts)?;
        if run.scores_digest.as_deref() != Some(digest.as_str()) {
            return Err(fail(vec![format!(
                "the scores' Parquet parts give the scores digest {digest}, but `run.json` \
                 records {}",
                run.scores_digest.as_deref().unwrap_or("none")
            )]));
        }
    }
    // The scores first: a differing score (a program that is not
    // deterministic) is named by its row rather than by what it changed.
    let scores_first = manifest
        .files
        .keys()
        .filter(|n| *n == "scores.csv")
        .chain(manifest.files.keys().filter(|n| *n != "scores.csv"));
    for name in scores_first {
        if run.engine.is_some() && parts.contains(&name) {
            continue;
        }
        let recorded = read(dir.join(name))?;
        match files.get(name) {
            Some(b) if *b == *recorded.as_slice() => {}
            Some(b) => {
                let mut p = first_difference(name, &recorded, &b);
                if name.starts_with("card.") {
                    p.push_str(
                        " (a card made with `--templates` cannot be recomputed without them)",
                    );
                }
                return Err(fail(vec![p]));
            }
            None => {
                return Err(fail(vec![format!(
                    "`{name}` is not produced when recomputed"
                )]))
            }
        }
    }
    if let Some(extra) = files
        .names()
        .into_iter()
        .find(|n| !manifest.files.contains_key(n))
    {
        return Err(fail(vec![format!(
            "recomputation produces `{extra}`, which the run lacks"
        )]));
    }
    Ok(manifest)
}
