//! `anomark score`: applies a recorded run's chosen detector, its fitted
//! transforms and τ to new data, streaming, and writes every input row with
//! its score, its flag and the run's manifest hash.
//!
//! The model is rebuilt from the parameters in run.json (k-NN, whose
//! training rows are not recorded, is refitted from the run's own spec and
//! inputs, refused if they changed), so a row scores the same bits as in the
//! run. A chosen external command is run once on all the new rows, with the
//! run's training rows rebuilt from its spec and inputs as `train` (the same
//! contract as in the run, refused if its `inputs` files changed); that
//! path reads the input whole. The input is read by polars' streaming engine in batches and each
//! batch is scored on all cores in fixed row blocks; the output goes to a
//! temporary file beside the target and is renamed into place only when every
//! row is written.

use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

use polars::prelude::*;

use crate::audit::hash;
use crate::data::Format;
use crate::detect::{self, Model, Params};
use crate::error::{Error, Result, RowUnit};
use crate::features::FittedFeatures;
use crate::metrics::Threshold;
use crate::progress::Progress;

/// The columns `score` adds.
pub const SCORE_COLUMN: &str = "anomark_score";
/// 1 when the row is flagged (s(x) > τ, i.e. p(x) < ε).
pub const FLAG_COLUMN: &str = "anomark_flag";
/// `blake3:` and the hash of the run's manifest.json.
pub const RUN_COLUMN: &str = "anomark_run";
/// With `--fdr`: the row's conformal p-value against the run's validation normals.
pub const P_VALUE_COLUMN: &str = "anomark_p_value";
/// With `--fdr`: 1 when the Benjamini-Hochberg procedure at level Q flags the row.
pub const FDR_FLAG_COLUMN: &str = "anomark_fdr_flag";

/// Rows per scoring block: blocks are scored in parallel and joined in order,
/// so the result does not depend on the number of threads.
const BLOCK: usize = 4096;

/// What `score` was asked to do.
#[derive(Debug, Clone)]
pub struct ScoreOptions {
    /// The run directory.
    pub dir: PathBuf,
    /// New data: a CSV or Parquet file.
    pub data: PathBuf,
    /// The output file (`.csv` or `.parquet`).
    pub out: PathBuf,
    /// Refuse a run whose signature does not verify with this key.
    pub pubkey: Option<PathBuf>,
    /// Progress display.
    pub progress: Progress,
    /// Flag the batch by Benjamini-Hochberg at this level, in (0, 1).
    pub fdr: Option<f64>,
    /// Write the drift report as a self-contained HTML file.
    pub report: Option<PathBuf>,
}

/// What a scoring pass did.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct ScoreSummary {
    /// The output file.
    pub out: PathBuf,
    /// Rows scored.
    pub rows: u64,
    /// Rows flagged.
    pub flagged: u64,
    /// The candidate that scored them.
    pub candidate: String,
    /// Its τ.
    pub tau: f64,
    /// blake3 of the run's manifest.json.
    pub run_manifest_blake3: String,
    /// Whether the run's signature was checked with a public key.
    pub signature_checked: bool,
    /// Peak resident memory of the process, MiB.
    pub peak_rss_mib: Option<f64>,
    /// Conformal p-values and Benjamini-Hochberg flagging (with `--fdr`).
    pub fdr: Option<crate::conformal::FdrSummary>,
    /// The batch's drift against the run (null for a run recorded before
    /// drift references were kept).
    pub drift: Option<crate::drift::DriftReport>,
    /// The drift report file (with `--report`).
    pub report: Option<PathBuf>,
    /// Warnings, also printed on stderr.
    pub warnings: Vec<String>,
}

/// Which end of `score` a file is, for the wording of a refusal.
#[derive(Clone, Copy)]
enum Role {
    /// The data to score.
    Input,
    /// The scored file to write.
    Output,
}

fn format_of(path: &Path, role: Role) -> Result<Format> {
    match path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase)
        .as_deref()
    {
        Some("csv") => Ok(Format::Csv),
        Some("parquet") | Some("pq") => Ok(Format::Parquet),
        _ => match role {
            // The input is read, so its refusal is worded as a read (a
            // folder says it is a folder), never as an output.
            Role::Input => {
                if let Ok(m) = std::fs::metadata(path) {
                    crate::error::check_regular(path, "reading data", &m)?;
                }
                Err(Error::io(
                    path,
                    "reading data",
                    std::io::Error::new(
                        std::io::ErrorKind::InvalidInput,
                        "the data to score must be a `.csv` or `.parquet` file",
                    ),
                ))
            }
            Role::Output => Err(Error::Output {
                path: path.to_path_buf(),
                message: "the output file must end in .csv or .parquet".into(),
            }),
        },
    }
}

fn polars_error(path: &Path, e: PolarsError) -> Error {
    crate::data::read_error(path, e)
}

/// What scores the rows.
enum Scorer {
    /// A model rebuilt in process.
    Model(Box<dyn Model>),
    /// An external command, run once on every row of the input with the
    /// run's training rows' features.
    Command(Box<crate::spec::CommandPlan>, ndarray::Array2<f64>),
}

/// The recorded run, as far as scoring needs it.
struct Recorded {
    candidate: String,
    set: FittedFeatures,
    scorer: Scorer,
    tau: f64,
    columns: Vec<String>,
    manifest_blake3: String,
    calibration: Option<crate::conformal::Calibration>,
    drift_reference: Option<crate::record::DriftReference>,
    /// A of the conformal policy.
    conformal_level: Option<f64>,
}

fn bad_run(dir: &Path, message: String) -> Error {
    Error::Output {
        path: dir.to_path_buf(),
        message,
    }
}

/// Reads the run: checks the signature (with a key) or at least that
/// run.json is the file manifest.json lists, then rebuilds the chosen model.
fn recorded(dir: &Path, pubkey: Option<&Path>) -> Result<Recorded> {
    if let Some(k) = pubkey {
        let key = crate::sign::load_public(k)?;
        crate::sign::verify_dir(dir, &key)?;
    }
    let manifest_path = dir.join(crate::sign::MANIFEST);
    let manifest_bytes =
        std::fs::read(&manifest_path).map_err(|e| Error::io(&manifest_path, "reading", e))?;
    let manifest: serde_json::Value = serde_json::from_slice(&manifest_bytes)
        .map_err(|e| bad_run(dir, format!("`manifest.json` is not JSON: {e}")))?;
    let run_path = dir.join("run.json");
    let run_bytes = std::fs::read(&run_path).map_err(|e| Error::io(&run_path, "reading", e))?;
    if manifest["files"]["run.json"]["blake3"].as_str() != Some(hash::bytes(&run_bytes).as_str()) {
        return Err(Error::Verify {
            dir: dir.to_path_buf(),
            problems: vec![
                "run.json is not the file manifest.json lists: the run was changed after it was signed"
                    .into(),
            ],
        });
    }
    let run = crate::record::parse_run(&run_path, &run_bytes)?;
    let chosen = run.chosen(&run_path)?;
    let set: FittedFeatures = run.feature_set(&run_path, &chosen.feature_set)?.clone();
    let params: Params = chosen.params.clone();
    let tau = chosen.tau;
    let columns = run.content_columns.clone();
    let names = set.names();
    let candidate = chosen.name.clone();
    let scorer = if let Params::Command { .. } = params {
        let (command, train) = crate::protocol::chosen_command(dir, &params)?;
        Scorer::Command(Box::new(command), train)
    } else {
        Scorer::Model(match detect::restore(&params, &names)? {
            Some(m) => m,
            None => crate::protocol::refit_chosen(dir, &params)?,
        })
    };
    // Older runs kept neither; both are then simply absent.
    let calibration = match run.calibration {
        None => None,
        Some(c) => {
            if c.candidate != candidate {
                return Err(bad_run(
                    dir,
                    "run.json: `calibration` is not the chosen candidate's".into(),
                ));
            }
            Some(c.calibration().ok_or_else(|| {
                bad_run(
                    dir,
                    "run.json: the calibration scores are not sorted, or their ranks do not \
                     fit `validation-normals`"
                        .into(),
                )
            })?)
        }
    };
    let drift_reference = run.drift_reference;
    let conformal_level = match run.threshold_policy {
        crate::spec::ThresholdPolicy::Conformal {
            max_false_positive_rate,
        } => Some(max_false_positive_rate),
        _ => None,
    };
    Ok(Recorded {
        candidate,
        set,
        scorer,
        tau,
        columns,
        manifest_blake3: hash::bytes(&manifest_bytes),
        calibration,
        drift_reference,
        conformal_level,
    })
}

/// The streaming scan of the input with the used columns as f64.
fn scan(path: &Path, format: Format, used: &[String]) -> Result<LazyFrame> {
    let ppath = PlRefPath::try_from_path(path).map_err(|e| polars_error(path, e))?;
    match format {
        Format::Csv => {
            // Every column is read as text and written back as it came, except
            // the feature columns, which must parse as numbers.
            let mut schema = Schema::default();
            for c in used {
                schema.with_column(c.as_str().into(), DataType::Float64);
            }
            LazyCsvReader::new(ppath)
                .with_has_header(true)
                .with_infer_schema_length(Some(0))
                .with_dtype_overwrite(Some(Arc::new(schema)))
                .finish()
                .map_err(|e| polars_error(path, e))
        }
        Format::Parquet => {
            let lf = LazyFrame::scan_parquet(ppath, ScanArgsParquet::default())
                .map_err(|e| polars_error(path, e))?;
            Ok(lf.with_columns(
                used.iter()
                    .map(|c| col(c.as_str()).cast(DataType::Float64))
                    .collect::<Vec<_>>(),
            ))
        }
    }
}

enum Writer {
    Csv(polars::io::csv::write::BatchedWriter<Sink>),
    Parquet(Box<polars::io::parquet::write::BatchedWriter<Sink>>),
}

/// The buffered temporary output, shared with polars' writer so that `score`
/// itself flushes the last buffered bytes and syncs the file, and sees that
/// fail (polars' CSV writer never flushes its sink, and a buffer dropped with
/// bytes in it loses the error: a full disk gave a cut-off file and exit 0).
/// It keeps the first failure of the file itself, which is how a failed
/// write is told from a bug however polars words it (its Parquet writer
/// keeps only the text of an I/O error).
#[derive(Clone)]
struct Sink(Arc<Mutex<SinkState>>);

struct SinkState {
    out: BufWriter<std::fs::File>,
    failed: Option<String>,
}

impl Sink {
    fn new(file: std::fs::File) -> Self {
        Sink(Arc::new(Mutex::new(SinkState {
            out: BufWriter::with_capacity(1 << 20, file),
            failed: None,
        })))
    }

    /// Runs one operation on the buffered file, keeping its first failure.
    fn with<T>(
        &self,
        op: impl FnOnce(&mut BufWriter<std::fs::File>) -> std::io::Result<T>,
    ) -> std::io::Result<T> {
        let mut s = self.0.lock().expect("the output sink is not poisoned");
        let r = op(&mut s.out);
        if let Err(e) = &r {
            s.failed.get_or_insert_with(|| e.to_string());
        }
        r
    }

    /// The output error for a failed write: the file's own failure (a full
    /// disk, a quota, a lost mount) is the output's problem, naming `out`;
    /// a writer that failed while the file did not is a bug.
    fn error(&self, out: &Path, e: impl std::fmt::Display) -> Error {
        let s = self.0.lock().expect("the output sink is not poisoned");
        match &s.failed {
            Some(why) => Error::Output {
                path: out.to_path_buf(),
                message: format!("writing the scored rows: {why}"),
            },
            None => Error::internal(format!("writing a scored batch: {e}")),
        }
    }

    /// Writes out the buffer and syncs the file to disk.
    fn finish(&self, out: &Path) -> Result<()> {
        self.with(|w| w.flush().and_then(|()| w.get_ref().sync_all()))
            .map_err(|e| self.error(out, e))
    }
}

impl Write for Sink {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.with(|w| w.write(buf))
    }

    fn write_all(&mut self, buf: &[u8]) -> std::io::Result<()> {
        self.with(|w| w.write_all(buf))
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.with(|w| w.flush())
    }
}

struct State {
    writer: Option<Writer>,
    sink: Sink,
    rows: u64,
    flagged: u64,
    fdr_flagged: u64,
    drift: Option<crate::drift::DriftAccumulator>,
    error: Option<Error>,
}

/// Scores every row of `opts.data` and writes `opts.out`.
pub fn score(opts: &ScoreOptions) -> Result<ScoreSummary> {
    let in_format = format_of(&opts.data, Role::Input)?;
    let out_format = format_of(&opts.out, Role::Output)?;
    crate::output::check_file_target(&opts.out)?;
    if let Some(q) = opts.fdr {
        check_fdr_level(q)?;
    }
    if let Some(r) = &opts.report {
        crate::output::check_file_target(r)?;
    }
    let run = Arc::new(recorded(&opts.dir, opts.pubkey.as_deref())?);
    // Not a device or fifo, which would be read without end or block.
    crate::error::require_regular(&opts.data, "reading data")?;
    if opts.fdr.is_some() && run.calibration.is_none() {
        return Err(bad_run(
            &opts.dir,
            "run.json keeps no calibration scores (a run recorded before conformal p-values): \
             rerun the spec to score with `--fdr`"
                .into(),
        ));
    }

    // The content columns the features read, and their names in the file.
    let used_idx = run.set.columns_used();
    let used: Vec<String> = used_idx.iter().map(|&c| run.columns[c].clone()).collect();
    let wanted: Vec<&str> = used.iter().map(String::as_str).collect();
    let shown = opts.data.display().to_string();
    crate::data::refuse_repeated_names(&opts.data, &shown, in_format, &wanted)?;
    let present = crate::data::columns_of(&opts.data, in_format)?;
    let names: Vec<String> = present.iter().map(|p| p.0.clone()).collect();
    for &c in &used_idx {
        let name = &run.columns[c];
        match present.iter().find(|p| &p.0 == name) {
            None => {
                let hint = crate::spec::closest(name, names.iter().map(String::as_str))
                    .map(|s| format!(" (did you mean `{s}`?)"))
                    .unwrap_or_default();
                return Err(Error::Data {
                    path: opts.data.clone(),
                    column: Some(name.clone()),
                    message: format!(
                        "the run's features need the column `{name}`, which this file lacks{hint}"
                    ),
                    lines: vec![],
                    total: 0,
                    unit: RowUnit::Line,
                });
            }
            Some((_, false)) => {
                return Err(Error::Data {
                    path: opts.data.clone(),
                    column: Some(name.clone()),
                    message: "the column is not numeric in this Parquet file".into(),
                    lines: vec![],
                    total: 0,
                    unit: RowUnit::Row,
                })
            }
            Some(_) => {}
        }
    }
    for added in [
        SCORE_COLUMN,
        FLAG_COLUMN,
        RUN_COLUMN,
        P_VALUE_COLUMN,
        FDR_FLAG_COLUMN,
    ] {
        if names.iter().any(|n| n == added) {
            return Err(Error::Data {
                path: opts.data.clone(),
                column: Some(added.into()),
                message: "the input already has a column of this name, which score writes".into(),
                lines: vec![],
                total: 0,
                unit: RowUnit::Line,
            });
        }
    }
    // The Benjamini-Hochberg cut of this batch (`Some(None)`: nothing flagged).
    let mut fdr_cut: Option<Option<f64>> = None;
    let fdr = match (opts.fdr, &run.calibration) {
        (Some(q), Some(cal)) => {
            // A first pass: Benjamini-Hochberg needs every p-value of the batch
            // before it flags any row. p takes only the values j / (n + 1), so
            // counts per j are an exact summary in O(n) memory.
            let counts = rank_counts(&run, &used, cal, in_format, &opts.data, opts.progress)?;
            let cut = crate::conformal::bh_ranks(&counts, q);
            fdr_cut = Some(cut.p_cut);
            Some(crate::conformal::FdrSummary {
                q,
                calibration_normals: cal.len(),
                flagged: cut.rejected,
                p_cut: cut.p_cut,
            })
        }
        _ => None,
    };

    let parent = match opts.out.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let temp = tempfile::Builder::new()
        .prefix(".anomark-score-")
        .tempfile_in(&parent)
        .map_err(|e| Error::io(&parent, "creating a temporary file in", e))?;
    // Removed on SIGINT or SIGTERM until renamed into place.
    let registered = crate::cleanup::register(temp.path());
    crate::output::pause_point("score-writing");
    let file = temp
        .reopen()
        .map_err(|e| Error::io(temp.path(), "opening", e))?;

    let state = Arc::new(Mutex::new(State {
        writer: None,
        sink: Sink::new(file),
        rows: 0,
        flagged: 0,
        fdr_flagged: 0,
        drift: run
            .drift_reference
            .as_ref()
            .map(crate::drift::DriftAccumulator::new),
        error: None,
    }));
    let counter = Arc::new(opts.progress.rows("scoring"));
    let tag = format!("blake3:{}", run.manifest_blake3);
    let data_path = opts.data.clone();
    let out_path = opts.out.clone();
    let callback = {
        let (run, state, used, counter) =
            (run.clone(), state.clone(), used.clone(), counter.clone());
        move |df: DataFrame| -> PolarsResult<bool> {
            let mut st = state.lock().expect("the scoring state is not poisoned");
            if st.error.is_some() {
                return Ok(true);
            }
            let tags = Tags { run: &tag, fdr_cut };
            match score_batch(&run, &used, df, &tags, st.rows, in_format, &data_path) {
                Ok((out, scored)) => {
                    let n = out.height() as u64;
                    if let Err(e) = write_batch(&mut st, &out, out_format, &out_path) {
                        st.error = Some(e);
                        return Ok(true);
                    }
                    st.rows += n;
                    st.flagged += scored.flagged;
                    st.fdr_flagged += scored.fdr_flagged;
                    if let Some(d) = st.drift.as_mut() {
                        d.add(&scored.features, n, scored.flagged);
                    }
                    counter.add(n);
                    Ok(false)
                }
                Err(e) => {
                    st.error = Some(e);
                    Ok(true)
                }
            }
        }
    };
    let outcome = each_batch(&run.scorer, scan(&opts.data, in_format, &used)?, callback);
    drop(counter);
    let mut st = state.lock().expect("the scoring state is not poisoned");
    if let Some(e) = st.error.take() {
        return Err(e);
    }
    if let Err(e) = outcome {
        return Err(crate::data::not_a_number(
            &opts.data,
            in_format == Format::Csv,
            &used,
            e,
        ));
    }
    if st.writer.is_none() {
        // No rows: still write the header (CSV) or an empty file with the schema.
        let empty = DataFrame::new_infer_height(
            names
                .iter()
                .map(|n| {
                    let t = if used.contains(n) {
                        DataType::Float64
                    } else {
                        DataType::String
                    };
                    Column::new_empty(n.as_str().into(), &t)
                })
                .chain([
                    Column::new_empty(SCORE_COLUMN.into(), &DataType::Float64),
                    Column::new_empty(FLAG_COLUMN.into(), &DataType::Boolean),
                    Column::new_empty(RUN_COLUMN.into(), &DataType::String),
                ])
                .chain(
                    fdr_cut
                        .is_some()
                        .then(|| {
                            [
                                Column::new_empty(P_VALUE_COLUMN.into(), &DataType::Float64),
                                Column::new_empty(FDR_FLAG_COLUMN.into(), &DataType::Boolean),
                            ]
                        })
                        .into_iter()
                        .flatten(),
                )
                .collect(),
        )
        .map_err(|e| Error::internal(format!("an empty frame: {e}")))?;
        write_batch(&mut st, &empty, out_format, &opts.out)?;
    }
    finish_output(&mut st, &opts.out)?;
    if let Some(f) = &fdr {
        if st.fdr_flagged != f.flagged {
            return Err(Error::internal(format!(
                "the two scoring passes disagree: {} rows flagged by the first, {} by the second",
                f.flagged, st.fdr_flagged
            )));
        }
    }
    let drift = match (&st.drift, &run.drift_reference) {
        (Some(acc), Some(reference)) => {
            let mut expected = vec![];
            if let Some(p) = reference.validation_false_positive_rate {
                expected.push(("the validation false-positive rate".to_string(), p));
            }
            if let Some(a) = run.conformal_level {
                expected.push(("the conformal policy's level A".to_string(), a));
            }
            Some(acc.finish(reference, &expected))
        }
        _ => None,
    };
    let mut warnings = vec![];
    if let Some(d) = &drift {
        for r in d.flag_rate.iter().filter(|r| r.outside_limits) {
            warnings.push(format!(
                "the batch's flag rate {:.4} lies outside the p-chart limits {:.4}–{:.4} around \
                 {} = {:.4} (exact binomial p = {:.3e}): the data may have drifted from the run's, or \
                 the batch holds many anomalies",
                r.observed,
                r.lower_limit,
                r.upper_limit,
                r.expected_from,
                r.expected,
                r.binomial_p_value
            ));
        }
    }
    if let (Some(path), Some(d)) = (&opts.report, &drift) {
        let html = crate::card::render_drift(&crate::card::DriftContext::of(
            d,
            &run.candidate,
            &run.manifest_blake3,
            fdr.as_ref(),
        ))?;
        write_report(path, html.as_bytes())?;
    } else if let (Some(_), None) = (&opts.report, &drift) {
        return Err(bad_run(
            &opts.dir,
            "run.json keeps no drift reference (a run recorded before drift reports): rerun \
             the spec to write `--report`"
                .into(),
        ));
    }
    registered.finish(|| {
        temp.persist(&opts.out)
            .map_err(|e| Error::io(&opts.out, "renaming the finished output to", e.error))
    })?;
    Ok(ScoreSummary {
        out: opts.out.clone(),
        rows: st.rows,
        flagged: st.flagged,
        candidate: run.candidate.clone(),
        tau: run.tau,
        run_manifest_blake3: run.manifest_blake3.clone(),
        signature_checked: opts.pubkey.is_some(),
        peak_rss_mib: crate::progress::peak_rss_mib(),
        fdr,
        drift,
        report: opts.report.clone(),
        warnings,
    })
}

/// Ends the output: the writer's last bytes (a CSV header, the Parquet
/// footer), then the sink's buffer written out and the file synced.
fn finish_output(st: &mut State, out: &Path) -> Result<()> {
    let err = |e: PolarsError| st.sink.error(out, e);
    match st.writer.take() {
        Some(Writer::Csv(mut w)) => w.finish().map_err(err)?,
        Some(Writer::Parquet(w)) => {
            w.finish().map_err(err)?;
        }
        None => {}
    }
    st.sink.finish(out)
}

/// Writes the drift report through a temporary file renamed into place.
fn write_report(path: &Path, bytes: &[u8]) -> Result<()> {
    use std::io::Write;
    let parent = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let mut temp = tempfile::Builder::new()
        .prefix(".anomark-report-")
        .tempfile_in(&parent)
        .map_err(|e| Error::io(&parent, "creating a temporary file in", e))?;
    temp.write_all(bytes)
        .map_err(|e| Error::io(temp.path(), "writing", e))?;
    temp.persist(path)
        .map_err(|e| Error::io(path, "renaming the finished report to", e.error))?;
    Ok(())
}

/// Refuses an FDR level outside (0, 1).
pub fn check_fdr_level(q: f64) -> Result<()> {
    if q.is_finite() && q > 0.0 && q < 1.0 {
        Ok(())
    } else {
        Err(Error::Protocol {
            message: format!("`--fdr` must lie strictly between 0 and 1, found `{q}`"),
        })
    }
}

/// Hands the input to `callback` batch by batch on polars' streaming engine;
/// for an external command, whole (the program runs once, on every row).
fn each_batch<F>(scorer: &Scorer, lf: LazyFrame, callback: F) -> PolarsResult<()>
where
    F: Fn(DataFrame) -> PolarsResult<bool> + Send + Sync + 'static,
{
    if let Scorer::Command(..) = scorer {
        lf.collect().and_then(&callback).map(|_| ())
    } else {
        lf.sink_batches(PlanCallback::new(callback), true, None)
            .and_then(|lf| lf.collect_with_engine(Engine::Streaming))
            .map(|_| ())
    }
}

/// The first pass of `--fdr`: how many rows have each conformal rank j
/// (p = j / (n + 1)).
fn rank_counts(
    run: &Arc<Recorded>,
    used: &[String],
    cal: &crate::conformal::Calibration,
    format: Format,
    path: &Path,
    progress: Progress,
) -> Result<Vec<u64>> {
    struct Pass {
        counts: Vec<u64>,
        rows: u64,
        error: Option<Error>,
    }
    let state = Arc::new(Mutex::new(Pass {
        counts: vec![0; cal.len() + 2],
        rows: 0,
        error: None,
    }));
    let counter = Arc::new(progress.rows("p-values"));
    let shared = Arc::new((run.clone(), cal.clone(), used.to_vec(), path.to_path_buf()));
    let callback = {
        let (state, counter, shared) = (state.clone(), counter.clone(), shared.clone());
        move |df: DataFrame| -> PolarsResult<bool> {
            let (run, cal, used, path) = &*shared;
            let mut st = state.lock().expect("the scoring state is not poisoned");
            if st.error.is_some() {
                return Ok(true);
            }
            match batch_scores(run, used, &df, st.rows, format, path) {
                Ok((scores, _)) => {
                    for s in scores {
                        st.counts[cal.rank(s)] += 1;
                    }
                    st.rows += df.height() as u64;
                    counter.add(df.height() as u64);
                    Ok(false)
                }
                Err(e) => {
                    st.error = Some(e);
                    Ok(true)
                }
            }
        }
    };
    let outcome = each_batch(&run.scorer, scan(path, format, used)?, callback);
    drop(counter);
    let mut st = state.lock().expect("the scoring state is not poisoned");
    if let Some(e) = st.error.take() {
        return Err(e);
    }
    if let Err(e) = outcome {
        return Err(crate::data::not_a_number(
            path,
            format == Format::Csv,
            used,
            e,
        ));
    }
    Ok(std::mem::take(&mut st.counts))
}

fn write_batch(st: &mut State, df: &DataFrame, format: Format, out: &Path) -> Result<()> {
    let err = |e: PolarsError| st.sink.error(out, e);
    if st.writer.is_none() {
        let sink = st.sink.clone();
        let schema = df.schema();
        st.writer = Some(match format {
            Format::Csv => Writer::Csv(CsvWriter::new(sink).batched(schema).map_err(err)?),
            Format::Parquet => Writer::Parquet(Box::new(
                ParquetWriter::new(sink)
                    .with_compression(ParquetCompression::Snappy)
                    .batched(schema)
                    .map_err(err)?,
            )),
        });
    }
    match st.writer.as_mut().expect("set above") {
        Writer::Csv(w) => w.write_batch(df).map_err(err),
        Writer::Parquet(w) => w.write_batch(df).map_err(err),
    }
}

/// What scoring one batch found, besides the output rows.
struct Scored {
    flagged: u64,
    fdr_flagged: u64,
    /// The batch's feature values, one vector per feature, for drift.
    features: Vec<Vec<f64>>,
}

/// What every output row gets besides its score and flag.
struct Tags<'a> {
    /// The `anomark_run` value.
    run: &'a str,
    /// The batch's Benjamini-Hochberg cut (with `--fdr`; `Some(None)` when
    /// nothing is flagged).
    fdr_cut: Option<Option<f64>>,
}

/// Scores one batch; returns it with the added columns and what it found.
fn score_batch(
    run: &Recorded,
    used: &[String],
    df: DataFrame,
    tags: &Tags<'_>,
    offset: u64,
    format: Format,
    path: &Path,
) -> Result<(DataFrame, Scored)> {
    let (tag, fdr_cut) = (tags.run, tags.fdr_cut);
    let n = df.height();
    let (scores, x) = batch_scores(run, used, &df, offset, format, path)?;
    let flags: Vec<bool> = scores
        .iter()
        .map(|&s| Threshold(run.tau).flags(s))
        .collect();
    let flagged = flags.iter().filter(|&&f| f).count() as u64;
    let mut added = vec![];
    let mut fdr_flagged = 0;
    if let (Some(cut), Some(cal)) = (fdr_cut, &run.calibration) {
        let p: Vec<f64> = scores.iter().map(|&s| cal.p_value(s)).collect();
        let f: Vec<bool> = p.iter().map(|&v| cut.is_some_and(|c| v <= c)).collect();
        fdr_flagged = f.iter().filter(|&&f| f).count() as u64;
        added.push(Column::new(P_VALUE_COLUMN.into(), p));
        added.push(Column::new(FDR_FLAG_COLUMN.into(), f));
    }
    let features = if run.drift_reference.is_some() {
        x.columns().into_iter().map(|c| c.to_vec()).collect()
    } else {
        vec![]
    };
    let mut out = df;
    let added = [
        Column::new(SCORE_COLUMN.into(), scores),
        Column::new(FLAG_COLUMN.into(), flags),
        Column::new(RUN_COLUMN.into(), vec![tag; n]),
    ]
    .into_iter()
    .chain(added);
    for c in added {
        out.with_column(c)
            .map_err(|e| Error::internal(format!("adding a column: {e}")))?;
    }
    Ok((
        out,
        Scored {
            flagged,
            fdr_flagged,
            features,
        },
    ))
}

/// One batch's scores and feature matrix.
fn batch_scores(
    run: &Recorded,
    used: &[String],
    df: &DataFrame,
    offset: u64,
    format: Format,
    path: &Path,
) -> Result<(Vec<f64>, ndarray::Array2<f64>)> {
    let n = df.height();
    let unit = match format {
        Format::Csv => RowUnit::Line,
        Format::Parquet => RowUnit::Row,
    };
    let mut columns: Vec<Vec<f64>> = vec![vec![]; run.columns.len()];
    for name in used {
        let c = df
            .column(name)
            .and_then(|c| c.f64().cloned())
            .map_err(|e| Error::internal(format!("column `{name}` of a batch: {e}")))?;
        let missing: Vec<u64> = c
            .iter()
            .enumerate()
            .filter(|(_, v)| v.is_none())
            .map(|(i, _)| format.place(offset + i as u64))
            .collect();
        if !missing.is_empty() {
            return Err(crate::rules::missing_value_to_score(crate::rules::At {
                path: path.to_path_buf(),
                column: name.clone(),
                total: missing.len(),
                lines: missing.into_iter().take(5).collect(),
                unit,
            }));
        }
        let idx = run
            .columns
            .iter()
            .position(|c| c == name)
            .expect("a used column");
        columns[idx] = c.into_no_null_iter().collect();
    }
    let x = run
        .set
        .apply_columns(&columns, n)
        .map_err(|f| Error::Data {
            path: path.to_path_buf(),
            column: Some(f.feature.clone()),
            message: f.reason.clone(),
            total: f.rows.len(),
            lines: f
                .rows
                .iter()
                .map(|&r| format.place(offset + r as u64))
                .collect(),
            unit,
        })?;
    let scores = match &run.scorer {
        Scorer::Model(m) => crate::detect::score_in_blocks(m.as_ref(), x.view(), BLOCK),
        Scorer::Command(_, _) if n == 0 => vec![],
        Scorer::Command(command, train) => {
            crate::detect::command::invoke(
                command,
                &run.set.names(),
                train.view(),
                x.view(),
                false,
            )?
            .0
        }
    };
    Ok((scores, x))
}

/// blake3 of a run's manifest.json, as the output's `anomark_run` column holds it.
pub fn manifest_tag(dir: &Path) -> Result<String> {
    let p = dir.join(crate::sign::MANIFEST);
    let b = std::fs::read(&p).map_err(|e| Error::io(&p, "reading", e))?;
    Ok(format!("blake3:{}", hash::bytes(&b)))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Issue 25: a disk that filled up while scored rows were written was
    /// reported as a bug (exit 70), and when the last megabyte still sat in
    /// the write buffer the failure was lost: a cut-off file and exit 0. It
    /// is an output problem (exit 4) whether it shows while a batch is
    /// written (200,000 rows) or only when the buffer is written out at the
    /// end (10 rows), in either format. /dev/full fails every write with
    /// ENOSPC.
    #[cfg(target_os = "linux")]
    #[test]
    fn a_full_disk_while_scoring_is_an_output_error() {
        for format in [Format::Csv, Format::Parquet] {
            for n in [200_000, 10] {
                let file = std::fs::OpenOptions::new()
                    .write(true)
                    .open("/dev/full")
                    .unwrap();
                let mut st = State {
                    writer: None,
                    sink: Sink::new(file),
                    rows: 0,
                    flagged: 0,
                    fdr_flagged: 0,
                    drift: None,
                    error: None,
                };
                let values: Vec<f64> = (0..n).map(|i| i as f64 / 7.0).collect();
                let df =
                    DataFrame::new_infer_height(vec![Column::new("x".into(), values)]).unwrap();
                let out = Path::new("scored.out");
                let e = write_batch(&mut st, &df, format, out)
                    .and_then(|()| finish_output(&mut st, out))
                    .unwrap_err();
                assert_eq!(e.code(), crate::error::exit::IO, "{n} rows: {e}");
                let text = e.to_string();
                assert!(
                    text.contains("output `scored.out`") && text.contains("No space left"),
                    "{n} rows: {text}"
                );
            }
        }
    }
}
