//! A detector that is an external program (`detectors: [{command: ...}]`).
//!
//! anomark writes an exchange folder holding `train` (the training rows'
//! features after transforms) and `rows` (the rows to score, in a seeded
//! ChaCha permutation), runs the program once on it without a shell, and
//! reads back `scores`: one finite number per line of `rows`, in its order,
//! higher meaning more anomalous. The files carry feature values only: no
//! label, no split name, no id and no row number.
//!
//! A run invokes the program once with the validation rows
//! ([`validation_scores`]). A final run invokes it a second time, after the
//! test split was opened and the opening put on the ledger, with the
//! validation and the test rows shuffled together ([`final_scores`]); that
//! function needs an [`OpenedTest`], which only `SealedTest::open` makes, so
//! test rows cannot reach a program in any other run. The second
//! invocation's validation scores must equal the first's bit for bit, which
//! also shows that the program is deterministic.
//!
//! A wrong number of scores, a score that is not a finite number, a missing
//! scores file, a non-zero exit or a timeout is an [`Error::Command`] (exit
//! 3) with the last lines of the program's standard error. On a timeout the
//! program's whole process group is killed.

use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use ndarray::{Array2, ArrayView2};

use super::{Model, Params};
use crate::audit::hash;
use crate::data::RowId;
use crate::error::{Error, Result};
use crate::spec::{CommandIo, CommandPlan};
use crate::split::OpenedTest;

/// The environment variable that holds the exchange folder's path (it is
/// also the program's last argument).
pub const FOLDER_VARIABLE: &str = "ANOMARK_EXCHANGE";

/// Lines of the program's standard error shown when it fails.
const STDERR_LINES: usize = 20;
/// Bytes of standard error kept (the tail).
const STDERR_KEEP: usize = 64 * 1024;
/// The ChaCha stream of the row permutation.
const SHUFFLE_STREAM: u64 = 0x0063_6f6d_6d61_6e64;

/// One file the program depends on, with its blake3.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct InputHash {
    /// The path as the spec writes it (relative to the spec).
    pub path: String,
    /// blake3, lowercase hex.
    pub blake3: String,
}

/// One invocation of the program, as recorded in run.json.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct Invocation {
    /// Rows in `train`.
    pub train_rows: usize,
    /// Rows in `rows`.
    pub rows: usize,
    /// Whether `rows` held the test rows (a final run's second invocation).
    pub test_rows_included: bool,
    /// The program's exit status.
    pub exit_status: i32,
    /// blake3 of the scores file exactly as the program wrote it.
    pub scores_blake3: String,
}

/// A command's fitted state: what anomark knows of it, which is its
/// provenance only. It cannot score rows by itself (the protocol hands rows
/// to the program in one folder), so [`Model::score`] gives NaN, which the
/// protocol refuses.
struct External {
    params: Params,
}

impl Model for External {
    fn score(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        vec![f64::NAN; x.nrows()]
    }
    fn params(&self) -> Params {
        self.params.clone()
    }
}

/// The params of a command before any invocation.
fn params_of(plan: &CommandPlan, inputs: Vec<InputHash>, invocations: Vec<Invocation>) -> Params {
    Params::Command {
        name: plan.name.clone(),
        run: plan.run.clone(),
        io: plan.io,
        seed: plan.seed,
        timeout_seconds: plan.timeout_seconds,
        inputs,
        invocations,
    }
}

/// The blake3 of every file in `inputs`.
pub fn hash_inputs(plan: &CommandPlan) -> Result<Vec<InputHash>> {
    plan.inputs
        .iter()
        .map(|(written, p)| {
            Ok(InputHash {
                path: written.clone(),
                blake3: hash::file(p)?.blake3,
            })
        })
        .collect()
}

/// Runs the program on the training rows and the validation rows; returns
/// the model (its provenance) and the validation scores in `rows` order.
/// `features` makes the features of any rows, in the order given.
pub fn validation_scores(
    plan: &CommandPlan,
    names: &[String],
    features: &dyn Fn(&[RowId]) -> Result<Array2<f64>>,
    train: &[RowId],
    rows: &[RowId],
) -> Result<(Box<dyn Model>, Vec<f64>)> {
    let inputs = hash_inputs(plan)?;
    let train_x = features(train)?;
    let x = features(rows)?;
    let (scores, inv) = invoke(plan, names, train_x.view(), x.view(), false)?;
    Ok((
        Box::new(External {
            params: params_of(plan, inputs, vec![inv]),
        }),
        scores,
    ))
}

/// A final run's second invocation: the validation and the test rows
/// shuffled together. The validation scores must be the bits of the first
/// invocation's (`recorded`); `place` names a validation row in an error.
/// Returns the model with both invocations recorded and the test scores in
/// the opened split's order.
#[allow(clippy::too_many_arguments)]
pub fn final_scores(
    plan: &CommandPlan,
    names: &[String],
    features: &dyn Fn(&[RowId]) -> Result<Array2<f64>>,
    train: &[RowId],
    validation: &[RowId],
    recorded: &[f64],
    test: &OpenedTest,
    first: &dyn Model,
    place: &dyn Fn(RowId) -> String,
) -> Result<(Box<dyn Model>, Vec<f64>)> {
    let Params::Command {
        inputs,
        mut invocations,
        ..
    } = first.params()
    else {
        return Err(Error::internal(
            "a command candidate without command params",
        ));
    };
    if hash_inputs(plan)? != inputs {
        return Err(Error::Command {
            name: plan.name.clone(),
            message: "a file of `inputs` changed between the validation and the test invocation"
                .into(),
            stderr: vec![],
        });
    }
    let mut all: Vec<RowId> = validation.to_vec();
    all.extend_from_slice(test.rows());
    let train_x = features(train)?;
    let x = features(&all)?;
    let (scores, inv) = invoke(plan, names, train_x.view(), x.view(), true)?;
    if let Some(k) = (0..validation.len()).find(|&k| scores[k].to_bits() != recorded[k].to_bits()) {
        return Err(Error::Command {
            name: plan.name.clone(),
            message: format!(
                "the program is not deterministic: it scored {} as {} with the validation rows \
                 alone and as {} with the test rows added; seed every random choice it makes",
                place(validation[k]),
                crate::float::fmt_f64(recorded[k]),
                crate::float::fmt_f64(scores[k])
            ),
            stderr: vec![],
        });
    }
    invocations.push(inv);
    let model = Box::new(External {
        params: params_of(plan, inputs, invocations),
    });
    Ok((model, scores[validation.len()..].to_vec()))
}

/// The seeded permutation of `n` rows: position k of `rows` holds row `perm[k]`.
pub fn permutation(seed: u64, n: usize) -> Vec<usize> {
    let mut rng = crate::rng::seeded(seed, SHUFFLE_STREAM);
    let mut perm: Vec<usize> = (0..n).collect();
    for i in (1..n).rev() {
        let j = crate::rng::below(&mut rng, (i + 1) as u64) as usize;
        perm.swap(i, j);
    }
    perm
}

/// The three exchange file names for a format.
pub fn file_names(io: CommandIo) -> [&'static str; 3] {
    match io {
        CommandIo::Csv => ["train.csv", "rows.csv", "scores.csv"],
        CommandIo::Parquet => ["train.parquet", "rows.parquet", "scores.parquet"],
    }
}

/// Writes the folder, runs the program, reads and checks the scores, and
/// puts them back into the order of `x`'s rows.
pub fn invoke(
    plan: &CommandPlan,
    names: &[String],
    train: ArrayView2<'_, f64>,
    x: ArrayView2<'_, f64>,
    test_rows_included: bool,
) -> Result<(Vec<f64>, Invocation)> {
    let fail = |message: String, stderr: Vec<String>| Error::Command {
        name: plan.name.clone(),
        message,
        stderr,
    };
    let dir = tempfile::Builder::new()
        .prefix("anomark-exchange-")
        .tempdir()
        .map_err(|e| Error::io(std::env::temp_dir(), "making a folder in", e))?;
    let folder = dir.path().to_path_buf();
    let [train_name, rows_name, scores_name] = file_names(plan.io);
    let n = x.nrows();
    let perm = permutation(plan.seed, n);
    let shuffled = x.select(ndarray::Axis(0), &perm);
    write_matrix(&folder.join(train_name), names, train, plan.io)?;
    write_matrix(&folder.join(rows_name), names, shuffled.view(), plan.io)?;

    let (status, stderr) = run_program(plan, &folder)?;
    let exit_status = match status {
        Ok(code) => code,
        Err(message) => return Err(fail(message, stderr)),
    };
    if exit_status != 0 {
        return Err(fail(
            format!("the program exited with status {exit_status}"),
            stderr,
        ));
    }
    let scores_path = folder.join(scores_name);
    let bytes = match std::fs::read(&scores_path) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            return Err(fail(
                format!("the program exited with status 0 but wrote no `{scores_name}`"),
                stderr,
            ))
        }
        Err(e) => return Err(Error::io(scores_path, "reading", e)),
    };
    let read = match plan.io {
        CommandIo::Csv => parse_csv_scores(&bytes),
        CommandIo::Parquet => parse_parquet_scores(&bytes),
    }
    .map_err(|m| fail(format!("`{scores_name}`: {m}"), stderr.clone()))?;
    if read.len() != n {
        return Err(fail(
            format!(
                "`{scores_name}` holds {} score(s) but `{rows_name}` holds {n} row(s); write one score per row, in order",
                read.len()
            ),
            stderr,
        ));
    }
    if let Some(k) = read.iter().position(|v| !v.is_finite()) {
        return Err(fail(
            format!(
                "`{scores_name}`: the score of row {} of `{rows_name}` is `{}`, not a finite number",
                k + 1,
                crate::float::fmt_f64(read[k])
            ),
            stderr,
        ));
    }
    let mut scores = vec![0.0; n];
    for (k, &i) in perm.iter().enumerate() {
        scores[i] = read[k];
    }
    drop(dir);
    Ok((
        scores,
        Invocation {
            train_rows: train.nrows(),
            rows: n,
            test_rows_included,
            exit_status,
            scores_blake3: hash::bytes(&bytes),
        },
    ))
}

/// Quotes a CSV field when it needs it (RFC 4180); also for scores.csv.
pub(crate) fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// Writes a feature matrix with a header of feature names: CSV with
/// shortest round-trip numbers, or Parquet with one f64 column per feature.
fn write_matrix(
    path: &Path,
    names: &[String],
    x: ArrayView2<'_, f64>,
    io: CommandIo,
) -> Result<()> {
    let bytes = match io {
        CommandIo::Csv => {
            let mut s = names
                .iter()
                .map(|n| csv_field(n))
                .collect::<Vec<_>>()
                .join(",");
            s.push('\n');
            for row in x.rows() {
                for (j, v) in row.iter().enumerate() {
                    if j > 0 {
                        s.push(',');
                    }
                    crate::float::push_f64(&mut s, *v);
                }
                s.push('\n');
            }
            s.into_bytes()
        }
        CommandIo::Parquet => {
            use polars::prelude::*;
            let columns: Vec<Column> = names
                .iter()
                .enumerate()
                .map(|(j, n)| Column::new(n.as_str().into(), x.column(j).to_vec()))
                .collect();
            let mut df = DataFrame::new(x.nrows(), columns)
                .map_err(|e| Error::internal(format!("exchange table: {e}")))?;
            let mut buf = Vec::new();
            ParquetWriter::new(&mut buf)
                .finish(&mut df)
                .map_err(|e| Error::internal(format!("writing parquet: {e}")))?;
            buf
        }
    };
    let mut f = std::fs::File::create(path).map_err(|e| Error::io(path, "writing", e))?;
    f.write_all(&bytes)
        .map_err(|e| Error::io(path, "writing", e))?;
    Ok(())
}

/// Reads `scores.csv`: a header line `score`, then one number a line.
pub fn parse_csv_scores(bytes: &[u8]) -> std::result::Result<Vec<f64>, String> {
    let text = std::str::from_utf8(bytes).map_err(|_| "not UTF-8 text".to_string())?;
    let mut lines = text.lines();
    match lines.next().map(str::trim) {
        Some("score") => {}
        Some(h) => {
            return Err(format!(
                "line 1 must be the header `score`, found `{}`",
                h.chars().take(40).collect::<String>()
            ))
        }
        None => return Err("the file is empty; line 1 must be the header `score`".into()),
    }
    let mut out = Vec::new();
    for (i, l) in lines.enumerate() {
        let t = l.trim();
        if t.is_empty() {
            continue;
        }
        match t.parse::<f64>() {
            Ok(v) if v.is_finite() => out.push(v),
            _ => {
                return Err(format!(
                    "line {}: `{}` is not a finite number (row {} of the rows to score)",
                    i + 2,
                    t.chars().take(40).collect::<String>(),
                    out.len() + 1
                ))
            }
        }
    }
    Ok(out)
}

/// Reads `scores.parquet`: a column `score` of numbers.
fn parse_parquet_scores(bytes: &[u8]) -> std::result::Result<Vec<f64>, String> {
    use polars::prelude::*;
    let df = ParquetReader::new(std::io::Cursor::new(bytes.to_vec()))
        .finish()
        .map_err(|e| format!("cannot read as Parquet: {e}"))?;
    let c = df
        .column("score")
        .map_err(|_| "no column `score`".to_string())?
        .cast(&DataType::Float64)
        .map_err(|e| format!("column `score` is not numeric: {e}"))?;
    let ca = c
        .f64()
        .map_err(|e| format!("column `score` is not numeric: {e}"))?;
    ca.iter()
        .enumerate()
        .map(|(k, v)| v.ok_or_else(|| format!("row {} of `score` is missing", k + 1)))
        .collect()
}

/// The program to execute: a relative path with a separator is taken from
/// the spec's folder; a bare name is looked up on `PATH`.
fn program_path(plan: &CommandPlan) -> PathBuf {
    let p = Path::new(&plan.run[0]);
    if p.is_relative() && plan.run[0].contains(std::path::MAIN_SEPARATOR) {
        plan.folder.join(p)
    } else {
        p.to_path_buf()
    }
}

/// The program's outcome: its exit code, or why it has none; and the last
/// lines of its standard error.
type Outcome = (std::result::Result<i32, String>, Vec<String>);

/// Runs the program with the folder as its last argument and in
/// [`FOLDER_VARIABLE`], from the spec's folder, in a process group of its
/// own that is killed on a timeout.
fn run_program(plan: &CommandPlan, folder: &Path) -> Result<Outcome> {
    let mut cmd = Command::new(program_path(plan));
    #[cfg(unix)]
    {
        use std::os::unix::process::CommandExt;
        cmd.arg0(&plan.run[0]);
        cmd.process_group(0);
    }
    cmd.args(&plan.run[1..])
        .arg(folder)
        .env(FOLDER_VARIABLE, folder)
        .current_dir(&plan.folder)
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::piped());
    let mut child = match cmd.spawn() {
        Ok(c) => c,
        Err(e) => return Ok((Err(format!("cannot start `{}`: {e}", plan.run[0])), vec![])),
    };
    // The tail of standard error, gathered by a thread that is not waited
    // for after a kill (a descendant that left the group may hold the pipe).
    let tail = Arc::new(Mutex::new(Vec::<u8>::new()));
    if let Some(mut err) = child.stderr.take() {
        let tail = Arc::clone(&tail);
        std::thread::spawn(move || {
            let mut buf = [0u8; 8192];
            while let Ok(k) = err.read(&mut buf) {
                if k == 0 {
                    break;
                }
                let mut t = tail.lock().unwrap_or_else(|p| p.into_inner());
                t.extend_from_slice(&buf[..k]);
                if t.len() > 2 * STDERR_KEEP {
                    let cut = t.len() - STDERR_KEEP;
                    t.drain(..cut);
                }
            }
        });
    }
    let deadline = Instant::now() + Duration::from_secs(plan.timeout_seconds);
    let status = loop {
        match child.try_wait() {
            Ok(Some(s)) => break Ok(s),
            Ok(None) if Instant::now() >= deadline => {
                kill_group(&mut child);
                break Err(format!(
                    "the program did not finish within {} s (`timeout-seconds`) and was killed",
                    plan.timeout_seconds
                ));
            }
            Ok(None) => std::thread::sleep(Duration::from_millis(10)),
            Err(e) => {
                kill_group(&mut child);
                break Err(format!("waiting for the program: {e}"));
            }
        }
    };
    // Give the reader a moment to take the last bytes written before exit.
    let settle = Instant::now() + Duration::from_millis(200);
    while Arc::strong_count(&tail) > 1 && Instant::now() < settle {
        std::thread::sleep(Duration::from_millis(5));
    }
    let text = {
        let t = tail.lock().unwrap_or_else(|p| p.into_inner());
        String::from_utf8_lossy(&t).into_owned()
    };
    let lines: Vec<String> = text.lines().map(str::to_string).collect();
    let last = lines[lines.len().saturating_sub(STDERR_LINES)..].to_vec();
    let code = status.and_then(|s| match s.code() {
        Some(c) => Ok(c),
        None => Err(signal_message(&s)),
    });
    Ok((code, last))
}

#[cfg(unix)]
fn signal_message(s: &std::process::ExitStatus) -> String {
    use std::os::unix::process::ExitStatusExt;
    match s.signal() {
        Some(sig) => format!("the program was ended by signal {sig}"),
        None => "the program ended without an exit status".into(),
    }
}

#[cfg(not(unix))]
fn signal_message(_: &std::process::ExitStatus) -> String {
    "the program ended without an exit status".into()
}

/// Kills the child's process group (the child and everything it started
/// that stayed in the group), then reaps the child.
fn kill_group(child: &mut std::process::Child) {
    #[cfg(target_os = "linux")]
    {
        if let Ok(pid) = i32::try_from(child.id()) {
            // SAFETY: kill(2) with a negative pid signals the process group
            // the child leads (it was started with process_group(0)).
            unsafe {
                libc::kill(-pid, libc::SIGKILL);
            }
        }
    }
    let _ = child.kill();
    let _ = child.wait();
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn permutation_is_a_seeded_shuffle() {
        let p = permutation(1, 100);
        let mut s = p.clone();
        s.sort();
        assert_eq!(s, (0..100).collect::<Vec<_>>());
        assert_eq!(p, permutation(1, 100));
        assert_ne!(p, permutation(2, 100));
        assert_ne!(p, (0..100).collect::<Vec<_>>());
    }

    /// The Parquet exchange: a feature matrix written and read back by
    /// polars keeps every value's bits, and a `score` column is read in order.
    #[test]
    fn parquet_exchange_round_trips() {
        use polars::prelude::*;
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("rows.parquet");
        let x = ndarray::array![[1.5, -0.1], [1e-300, 3.0], [0.1 + 0.2, 7.0]];
        let names = vec!["a".to_string(), "b,c".to_string()];
        write_matrix(&p, &names, x.view(), CommandIo::Parquet).unwrap();
        let df = ParquetReader::new(std::fs::File::open(&p).unwrap())
            .finish()
            .unwrap();
        for (j, n) in names.iter().enumerate() {
            let c: Vec<f64> = df
                .column(n)
                .unwrap()
                .f64()
                .unwrap()
                .into_no_null_iter()
                .collect();
            let want: Vec<u64> = x.column(j).iter().map(|v| v.to_bits()).collect();
            assert_eq!(c.iter().map(|v| v.to_bits()).collect::<Vec<_>>(), want);
        }
        let mut scores = df!("score" => [2.0f64, 0.5, 1.25]).unwrap();
        let mut buf = Vec::new();
        ParquetWriter::new(&mut buf).finish(&mut scores).unwrap();
        assert_eq!(parse_parquet_scores(&buf).unwrap(), vec![2.0, 0.5, 1.25]);
        assert!(parse_parquet_scores(b"not parquet").is_err());
    }

    /// CSV exchange values are the shortest decimals that read back to the
    /// same doubles (Python's `float()` reads them the same way).
    #[test]
    fn csv_exchange_writes_round_trip_numbers() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("train.csv");
        let x = ndarray::array![[0.1 + 0.2, -2.0], [1e-300, 12345.678]];
        let names = vec!["a".to_string(), "b\"x".to_string()];
        write_matrix(&p, &names, x.view(), CommandIo::Csv).unwrap();
        let text = std::fs::read_to_string(&p).unwrap();
        let mut lines = text.lines();
        assert_eq!(lines.next(), Some("a,\"b\"\"x\""));
        assert_eq!(lines.next(), Some("0.30000000000000004,-2"));
        let back: Vec<f64> = lines
            .next()
            .unwrap()
            .split(',')
            .map(|v| v.parse().unwrap())
            .collect();
        assert_eq!(back[0].to_bits(), 1e-300f64.to_bits());
        assert_eq!(back[1].to_bits(), 12345.678f64.to_bits());
    }

    #[test]
    fn csv_scores_need_the_header_and_finite_numbers() {
        assert_eq!(
            parse_csv_scores(b"score\n1.5\n-2\n\n3e2\n").unwrap(),
            vec![1.5, -2.0, 300.0]
        );
        assert!(parse_csv_scores(b"1.5\n2\n")
            .unwrap_err()
            .contains("header"));
        let e = parse_csv_scores(b"score\n1\nnan\n").unwrap_err();
        assert!(e.contains("line 3") && e.contains("row 2"), "{e}");
        assert!(parse_csv_scores(b"score\ninf\n").is_err());
        assert!(parse_csv_scores(b"").is_err());
    }
}
