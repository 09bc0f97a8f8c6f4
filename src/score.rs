//! `anomark score`: applies a recorded run's chosen detector, its fitted
//! transforms and τ to new data, streaming, and writes every input row with
//! its score, its flag and the run's manifest hash.
//!
//! The model is rebuilt from the parameters in run.json (k-NN, whose
//! training rows are not recorded, is refitted from the run's own spec and
//! inputs, refused if they changed), so a row scores the same bits as in the
//! run. The input is read by polars' streaming engine in batches and each
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
use crate::progress::Progress;

/// The columns `score` adds.
pub const SCORE_COLUMN: &str = "anomark_score";
/// 1 when the row is flagged (s(x) > τ, i.e. p(x) < ε).
pub const FLAG_COLUMN: &str = "anomark_flag";
/// `blake3:` and the hash of the run's manifest.json.
pub const RUN_COLUMN: &str = "anomark_run";

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
}

fn format_of(path: &Path, role: &str) -> Result<Format> {
    match path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase)
        .as_deref()
    {
        Some("csv") => Ok(Format::Csv),
        Some("parquet") | Some("pq") => Ok(Format::Parquet),
        _ => Err(Error::Output {
            path: path.to_path_buf(),
            message: format!("the {role} must end in .csv or .parquet"),
        }),
    }
}

fn polars_error(path: &Path, e: PolarsError) -> Error {
    Error::Csv {
        path: path.to_path_buf(),
        message: e.to_string(),
    }
}

/// The recorded run, as far as scoring needs it.
struct Recorded {
    candidate: String,
    set: FittedFeatures,
    model: Box<dyn Model>,
    tau: f64,
    columns: Vec<String>,
    manifest_blake3: String,
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
    let run: serde_json::Value = serde_json::from_slice(&run_bytes)
        .map_err(|e| bad_run(dir, format!("`run.json` is not JSON: {e}")))?;
    let chosen = run["candidates"]
        .as_array()
        .and_then(|c| c.iter().find(|c| c["chosen"] == true))
        .ok_or_else(|| bad_run(dir, "run.json names no chosen candidate".into()))?;
    let field = |what: &str| {
        bad_run(
            dir,
            format!("run.json: the chosen candidate's {what} is unreadable"),
        )
    };
    let set_name = chosen["feature-set"]
        .as_str()
        .ok_or_else(|| field("feature set"))?;
    let set_value = run["feature-sets"]
        .as_array()
        .and_then(|s| s.iter().find(|s| s["set"] == set_name))
        .ok_or_else(|| field("feature set"))?;
    let set: FittedFeatures =
        serde_json::from_value(set_value.clone()).map_err(|_| field("feature set"))?;
    let params: Params =
        serde_json::from_value(chosen["params"].clone()).map_err(|_| field("parameters"))?;
    let tau = chosen["tau"].as_f64().ok_or_else(|| field("τ"))?;
    let columns: Vec<String> = serde_json::from_value(run["content-columns"].clone())
        .map_err(|_| bad_run(dir, "run.json: `content-columns` is unreadable".into()))?;
    let names = set.names();
    let candidate = chosen["name"].as_str().unwrap_or_default().to_string();
    let model = match detect::restore(&params, &names)? {
        Some(m) => m,
        None => crate::pipeline::refit_chosen(dir, &params)?,
    };
    Ok(Recorded {
        candidate,
        set,
        model,
        tau,
        columns,
        manifest_blake3: hash::bytes(&manifest_bytes),
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
    error: Option<Error>,
}

/// Scores every row of `opts.data` and writes `opts.out`.
pub fn score(opts: &ScoreOptions) -> Result<ScoreSummary> {
    let in_format = format_of(&opts.data, "data file")?;
    let out_format = format_of(&opts.out, "output file")?;
    crate::output::check_file_target(&opts.out)?;
    let run = recorded(&opts.dir, opts.pubkey.as_deref())?;

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
    for added in [SCORE_COLUMN, FLAG_COLUMN, RUN_COLUMN] {
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

    let parent = match opts.out.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let temp = tempfile::Builder::new()
        .prefix(".anomark-score-")
        .tempfile_in(&parent)
        .map_err(|e| Error::io(&parent, "creating a temporary file in", e))?;
    let file = temp
        .reopen()
        .map_err(|e| Error::io(temp.path(), "opening", e))?;

    let run = Arc::new(run);
    let state = Arc::new(Mutex::new(State {
        writer: None,
        sink: Sink::new(file),
        rows: 0,
        flagged: 0,
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
            match score_batch(&run, &used, df, &tag, st.rows, in_format, &data_path) {
                Ok((out, flagged)) => {
                    let n = out.height() as u64;
                    if let Err(e) = write_batch(&mut st, &out, out_format, &out_path) {
                        st.error = Some(e);
                        return Ok(true);
                    }
                    st.rows += n;
                    st.flagged += flagged;
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
    let lf = scan(&opts.data, in_format, &used)?;
    let outcome = lf
        .sink_batches(PlanCallback::new(callback), true, None)
        .and_then(|lf| lf.collect_with_engine(Engine::Streaming));
    drop(counter);
    let mut st = state.lock().expect("the scoring state is not poisoned");
    if let Some(e) = st.error.take() {
        return Err(e);
    }
    if let Err(e) = outcome {
        return Err(not_a_number(&opts.data, in_format == Format::Csv, &used, e));
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
                .collect(),
        )
        .map_err(|e| Error::internal(format!("an empty frame: {e}")))?;
        write_batch(&mut st, &empty, out_format, &opts.out)?;
    }
    finish_output(&mut st, &opts.out)?;
    temp.persist(&opts.out)
        .map_err(|e| Error::io(&opts.out, "renaming the finished output to", e.error))?;
    Ok(ScoreSummary {
        out: opts.out.clone(),
        rows: st.rows,
        flagged: st.flagged,
        candidate: run.candidate.clone(),
        tau: run.tau,
        run_manifest_blake3: run.manifest_blake3.clone(),
        signature_checked: opts.pubkey.is_some(),
        peak_rss_mib: crate::progress::peak_rss_mib(),
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

/// Scores one batch; returns it with the three added columns and the number flagged.
fn score_batch(
    run: &Recorded,
    used: &[String],
    df: DataFrame,
    tag: &str,
    offset: u64,
    format: Format,
    path: &Path,
) -> Result<(DataFrame, u64)> {
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
            return Err(Error::Data {
                path: path.to_path_buf(),
                column: Some(name.clone()),
                message: "a missing value: every feature column needs a number in every row".into(),
                total: missing.len(),
                lines: missing.into_iter().take(5).collect(),
                unit,
            });
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
    let scores = crate::detect::score_in_blocks(run.model.as_ref(), x.view(), BLOCK);
    let flags: Vec<bool> = scores.iter().map(|&s| s > run.tau).collect();
    let flagged = flags.iter().filter(|&&f| f).count() as u64;
    let mut out = df;
    let added = [
        Column::new(SCORE_COLUMN.into(), scores),
        Column::new(FLAG_COLUMN.into(), flags),
        Column::new(RUN_COLUMN.into(), vec![tag; n]),
    ];
    for c in added {
        out.with_column(c)
            .map_err(|e| Error::internal(format!("adding a column: {e}")))?;
    }
    Ok((out, flagged))
}

/// A column with values that are not numbers: its name, the first lines, how many.
type NotNumber = (String, Vec<u64>, usize);

/// A failed scan: most often a feature value that is not a number. Re-reads
/// the feature columns as text, streaming, to name the first such lines.
pub(crate) fn not_a_number(path: &Path, csv: bool, used: &[String], e: PolarsError) -> Error {
    if !csv {
        return polars_error(path, e);
    }
    let Ok(ppath) = PlRefPath::try_from_path(path) else {
        return polars_error(path, e);
    };
    let text = LazyCsvReader::new(ppath)
        .with_has_header(true)
        .with_infer_schema_length(Some(0))
        .finish()
        .map(|lf| lf.select(used.iter().map(|c| col(c.as_str())).collect::<Vec<_>>()));
    let found: Arc<Mutex<Option<NotNumber>>> = Arc::new(Mutex::new(None));
    let offset = Arc::new(Mutex::new(0u64));
    let (f2, o2, names) = (found.clone(), offset.clone(), used.to_vec());
    let scan = text.and_then(|lf| {
        lf.sink_batches(
            PlanCallback::new(move |df: DataFrame| {
                let mut off = o2.lock().expect("not poisoned");
                let mut found = f2.lock().expect("not poisoned");
                for name in &names {
                    let Ok(c) = df.column(name).and_then(|c| c.str().cloned()) else {
                        continue;
                    };
                    let bad: Vec<u64> = c
                        .iter()
                        .enumerate()
                        .filter(|(_, v)| {
                            v.is_some_and(|s| {
                                !s.trim().is_empty() && s.trim().parse::<f64>().is_err()
                            })
                        })
                        .map(|(i, _)| *off + i as u64 + 2)
                        .collect();
                    if !bad.is_empty() {
                        let total = bad.len();
                        *found = Some((name.clone(), bad.into_iter().take(5).collect(), total));
                        return Ok(true);
                    }
                }
                *off += df.height() as u64;
                Ok(false)
            }),
            true,
            None,
        )
        .and_then(|lf| lf.collect_with_engine(Engine::Streaming))
    });
    let found = found.lock().expect("not poisoned").take();
    match (scan, found) {
        (_, Some((column, lines, total))) => Error::Data {
            path: path.to_path_buf(),
            column: Some(column),
            message: "a value that is not a number".into(),
            lines,
            total,
            unit: RowUnit::Line,
        },
        _ => polars_error(path, e),
    }
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
