//! Loads the sources into a [`Dataset`]: the numeric source columns as a
//! matrix, labels, stable row ids and the text columns that later stages need.
//!
//! This module owns reading and checking values. It knows nothing of splits or
//! models: the split, group and time columns are handed on as text. Sources are
//! CSV or Parquet files, globs, or directories of Parquet files (read through
//! polars' lazy scans). A CSV file in the plain case is read by the parallel
//! reader in `fast`, which gives the same values; any other file, and every
//! message about a bad value, goes through polars. [`inspect`] gathers every
//! value problem; [`load`]
//! refuses the first one and applies the missing-value policy. Every refusal
//! names the file, the column and the first offending places: file lines for
//! CSV (the header is line 1, so data row `i` is line `i + 2`; a quoted field
//! spanning lines would shift this), 1-based rows for Parquet.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

use ndarray::Array2;
use polars::prelude::*;

use crate::audit::hash::{self, FileDigest};
use crate::error::{Error, Result, RowUnit};
use crate::rules;
use crate::spec::{Column, MissingPolicy, Plan, SourcePlan};

pub(crate) mod fast;
mod text;

pub use text::TextColumn;

/// How many offending places an error lists.
const SHOWN: usize = 5;

/// A kept row's index in the [`Dataset`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, serde::Serialize)]
pub struct RowId(pub u64);

/// The file format of a source file.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Format {
    /// Comma-separated text with a header line.
    Csv,
    /// Apache Parquet.
    Parquet,
}

impl Format {
    pub(crate) fn unit(self) -> RowUnit {
        match self {
            Format::Csv => RowUnit::Line,
            Format::Parquet => RowUnit::Row,
        }
    }

    /// The 1-based place of a 0-based data row: its line for CSV, its row for Parquet.
    pub fn place(self, row: u64) -> u64 {
        match self {
            Format::Csv => row + 2,
            Format::Parquet => row + 1,
        }
    }
}

/// One input file.
#[derive(Debug, Clone)]
pub struct SourceFile {
    /// The file on disk.
    pub path: PathBuf,
    /// The path relative to the spec's directory, with `/` separators (recorded).
    pub shown: String,
    /// Its format.
    pub format: Format,
    /// Size and blake3.
    pub digest: FileDigest,
    /// Data rows in the file.
    pub rows: usize,
}

impl Dataset {
    /// Sampled training rows held apart from their source (a reader that
    /// summarises the training rows keeps a systematic sample of them for
    /// the figures and the drift reference): `x` row-major with `columns`,
    /// every row a normal one, no ids or text.
    pub(crate) fn sample_of(columns: Vec<String>, x: Vec<f64>) -> Result<Dataset> {
        let n = x.len() / columns.len().max(1);
        let x = Array2::from_shape_vec((n, columns.len()), x)
            .map_err(|e| Error::internal(format!("the sampled training rows: {e}")))?;
        Ok(Dataset {
            files: vec![],
            columns,
            x,
            is_anomaly: vec![false; n],
            origin: vec![Origin { file: 0, row: 0 }; n],
            ids: None,
            text: BTreeMap::new(),
            dropped: Dropped::default(),
        })
    }
}

impl SourceFile {
    /// File `path` of source `s`, its bytes hashed, its rows not yet counted
    /// (for readers that count them as they pass: the streamed reader, an
    /// engine).
    pub(crate) fn hashed(path: &Path, plan: &Plan, s: &SourcePlan) -> Result<SourceFile> {
        Ok(SourceFile {
            path: path.to_path_buf(),
            shown: shown(path, plan),
            format: format_of(path, plan, s)?,
            digest: hash::file(path)?,
            rows: 0,
        })
    }
}

/// Where a row came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Origin {
    /// Index into [`Dataset::files`].
    pub file: u32,
    /// 0-based data row within that file.
    pub row: u64,
}

/// Rows left out under `missing-values: drop-row`.
#[derive(Debug, Clone, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct Dropped {
    /// Dropped normal rows.
    pub normal: usize,
    /// Dropped anomalous rows.
    pub anomaly: usize,
    /// With a fixed split column: split value → (normal, anomaly) dropped.
    pub by_split: BTreeMap<String, [usize; 2]>,
}

/// The examples, read (and, after [`load`], checked).
#[derive(Debug, Clone)]
pub struct Dataset {
    /// Every input file, in reading order.
    pub files: Vec<SourceFile>,
    /// The numeric source columns, in the plan's order.
    pub columns: Vec<String>,
    /// Their values, one row per kept row. After [`load`] all are finite;
    /// after [`inspect`] a missing or unusable value is NaN.
    pub x: Array2<f64>,
    /// `true` for a known anomaly.
    pub is_anomaly: Vec<bool>,
    /// Where each row came from.
    pub origin: Vec<Origin>,
    /// The id column's values, when the spec names one.
    pub ids: Option<TextColumn>,
    /// Text columns (split, group, time) by name.
    pub text: BTreeMap<String, TextColumn>,
    /// Rows left out for missing values.
    pub dropped: Dropped,
}

impl Dataset {
    /// Number of rows.
    pub fn len(&self) -> usize {
        self.is_anomaly.len()
    }

    /// `true` when there are no rows.
    pub fn is_empty(&self) -> bool {
        self.is_anomaly.is_empty()
    }

    /// The file and 1-based place (line or row) of a row, for messages.
    pub fn place(&self, r: RowId) -> String {
        let o = self.origin[r.0 as usize];
        let f = &self.files[o.file as usize];
        format!(
            "{} {} {}",
            f.shown,
            f.format.unit().word(),
            f.format.place(o.row)
        )
    }

    /// The first row's file and the first places of `rows` in it (rows from
    /// other files are counted, not listed).
    fn places(&self, rows: &[RowId]) -> (&SourceFile, Vec<u64>) {
        let first = self.origin[rows[0].0 as usize].file;
        let f = &self.files[first as usize];
        let places = rows
            .iter()
            .map(|r| self.origin[r.0 as usize])
            .filter(|o| o.file == first)
            .take(SHOWN)
            .map(|o| f.format.place(o.row))
            .collect();
        (f, places)
    }

    /// A data error about `rows` (all assumed from the first row's file, which
    /// is the one named; rows from other files are counted, not listed).
    pub fn error(&self, column: &str, message: String, rows: &[RowId]) -> Error {
        self.at(column, rows).refuse(message)
    }

    /// Where `rows` of `column` are, for a refusal by [`rules`] (the first
    /// row's file is named; rows from other files are counted, not listed).
    pub fn at(&self, column: &str, rows: &[RowId]) -> rules::At {
        let (f, places) = self.places(rows);
        rules::At {
            path: PathBuf::from(&f.shown),
            column: column.to_string(),
            lines: places,
            total: rows.len(),
            unit: f.format.unit(),
        }
    }

    /// The places of `rows` in words, such as `line 8` or `lines 8, 10 and
    /// 3 more`, prefixed by the file when it is not `file`.
    fn places_in_words(&self, rows: &[RowId], file: &str) -> String {
        let (f, places) = self.places(rows);
        let words = crate::error::places(&places, rows.len(), f.format.unit());
        if f.shown == file {
            words
        } else {
            format!("`{}` {words}", f.shown)
        }
    }

    /// The refusal of label values that are neither declared value: one
    /// value with its places, or each value with its own places (the first
    /// [`SHOWN`] values, in order of first appearance, and how many more).
    fn bad_labels(
        &self,
        column: &str,
        normal: &str,
        anomaly: &str,
        bad: &[(RowId, String)],
    ) -> Error {
        let values = by_value(bad.iter().map(|(r, v)| (*r, v.as_str())));
        let rows: Vec<RowId> = bad.iter().map(|r| r.0).collect();
        if let [(v, _)] = values.as_slice() {
            return rules::undeclared_label(self.at(column, &rows), v, normal, anomaly);
        }
        let (f, _) = self.places(&rows);
        let each: Vec<(&str, String)> = values
            .iter()
            .take(SHOWN)
            .map(|(v, rows)| (*v, self.places_in_words(rows, &f.shown)))
            .collect();
        rules::undeclared_labels(
            PathBuf::from(&f.shown),
            column,
            f.format.unit(),
            (normal, anomaly),
            &each,
            values.len(),
        )
    }
}

/// The error of a failed read of `path` by polars: a file that cannot be
/// opened or read (missing, unreadable, a dangling or looping link) is a
/// file problem ([`Error::Io`], exit 4) wherever polars wrapped it; anything
/// else is the reader refusing the content.
pub(crate) fn read_error(path: &Path, e: PolarsError) -> Error {
    let mut inner = &e;
    loop {
        match inner {
            PolarsError::Context { error, .. } | PolarsError::ExprContext { error, .. } => {
                inner = error
            }
            PolarsError::IO { error, .. } => {
                let source = match error.raw_os_error() {
                    Some(code) => std::io::Error::from_raw_os_error(code),
                    None => std::io::Error::new(error.kind(), error.to_string()),
                };
                return Error::io(path, "reading", source);
            }
            _ => break,
        }
    }
    // The format follows the extension, as everywhere a file's format is chosen.
    let parquet = path
        .extension()
        .and_then(|x| x.to_str())
        .is_some_and(|x| matches!(x.to_ascii_lowercase().as_str(), "parquet" | "pq"));
    // The reader's message names no line; for CSV the first line at fault
    // is found by a scan of the file (only once the read has failed).
    let message = match (parquet, first_bad_csv_line(path)) {
        (false, Some(m)) => m,
        _ => e.to_string(),
    };
    Error::Csv {
        path: path.to_path_buf(),
        format: if parquet { "Parquet" } else { "CSV" },
        message,
    }
}

/// The first line of a CSV file that no reader can take, in words: a line
/// that is not UTF-8, or a record with more or fewer fields than the header
/// (quoted fields may hold commas, newlines and doubled quotes). `None` when
/// every line is well formed or the file cannot be read.
fn first_bad_csv_line(path: &Path) -> Option<String> {
    use std::io::BufRead;
    let mut reader = std::io::BufReader::new(std::fs::File::open(path).ok()?);
    let mut buf = Vec::new();
    let (mut line, mut start, mut fields, mut quoted) = (0u64, 1u64, 1usize, false);
    let mut header: Option<usize> = None;
    loop {
        buf.clear();
        if reader.read_until(b'\n', &mut buf).ok()? == 0 {
            return None;
        }
        line += 1;
        if !quoted {
            start = line;
        }
        if std::str::from_utf8(&buf).is_err() {
            return Some(format!("line {line} is not valid UTF-8"));
        }
        for &b in buf.iter() {
            match b {
                b'"' => quoted = !quoted,
                b',' if !quoted => fields += 1,
                _ => {}
            }
        }
        if quoted {
            continue;
        }
        let body = buf.strip_suffix(b"\n").unwrap_or(&buf);
        let body = body.strip_suffix(b"\r").unwrap_or(body);
        let count = fields;
        fields = 1;
        match header {
            None => header = Some(count),
            // A blank line holds no record.
            Some(_) if body.is_empty() => {}
            Some(h) if count != h => {
                let at = if start == line {
                    format!("line {line}")
                } else {
                    format!("the record on lines {start} to {line}")
                };
                return Some(format!("{at} has {count} fields but the header has {h}"));
            }
            Some(_) => {}
        }
    }
}

/// Groups `(row, value)` pairs by value, in order of first appearance.
pub(crate) fn by_value<'a, R>(bad: impl Iterator<Item = (R, &'a str)>) -> Vec<(&'a str, Vec<R>)> {
    let mut values: Vec<(&str, Vec<R>)> = Vec::new();
    let mut at: BTreeMap<&str, usize> = BTreeMap::new();
    for (r, v) in bad {
        let k = *at.entry(v).or_insert_with(|| {
            values.push((v, Vec::new()));
            values.len() - 1
        });
        values[k].1.push(r);
    }
    values
}

/// A file's column names and, for each, whether it is numeric (every CSV
/// column counts as numeric here: CSV has no types until values are parsed).
pub fn columns_of(path: &Path, format: Format) -> Result<Vec<(String, bool)>> {
    match format {
        Format::Csv => Ok(CsvReadOptions::default()
            .with_has_header(true)
            .with_raise_if_empty(true)
            .with_n_rows(Some(0))
            .with_infer_schema_length(Some(0))
            .try_into_reader_with_file_path(Some(path.to_path_buf()))
            .and_then(|r| r.finish())
            .map_err(|e| read_error(path, e))?
            .get_column_names()
            .iter()
            .map(|n| (n.to_string(), true))
            .collect()),
        Format::Parquet => {
            let ppath = PlRefPath::try_from_path(path).map_err(|e| read_error(path, e))?;
            let mut lf = LazyFrame::scan_parquet(ppath, ScanArgsParquet::default())
                .map_err(|e| read_error(path, e))?;
            let schema = lf.collect_schema().map_err(|e| read_error(path, e))?;
            Ok(schema
                .iter()
                .map(|(n, t)| (n.to_string(), t.is_primitive_numeric()))
                .collect())
        }
    }
}

/// A bounded sample of one file, for `anomark init`: every column in file
/// order with its first values as text (as the loader would read a label or
/// id), and, where the file types the column as a number (Parquet), as numbers.
#[derive(Debug, Clone)]
pub struct Sample {
    /// How many rows were read (at most the bound asked for).
    pub rows: usize,
    /// The columns, in file order.
    pub columns: Vec<SampleColumn>,
}

/// One column of a [`Sample`].
#[derive(Debug, Clone)]
pub struct SampleColumn {
    /// The column name.
    pub name: String,
    /// The values as text (`None` when missing): CSV fields as written,
    /// Parquet values cast to text the way the loader casts a label.
    pub text: Vec<Option<String>>,
    /// The values as numbers when the file types the column as numeric
    /// (Parquet); `None` for CSV, whose fields are typed by parsing them.
    pub numbers: Option<Vec<Option<f64>>>,
}

/// Reads the header and at most `rows` first rows of a CSV or Parquet file.
pub fn sample(path: &Path, format: Format, rows: usize) -> Result<Sample> {
    crate::error::require_regular(path, "reading data")?;
    let df = match format {
        Format::Csv => CsvReadOptions::default()
            .with_has_header(true)
            .with_raise_if_empty(true)
            .with_n_rows(Some(rows))
            .with_infer_schema_length(Some(0))
            .try_into_reader_with_file_path(Some(path.to_path_buf()))
            .and_then(|r| r.finish())
            .map_err(|e| read_error(path, e))?,
        Format::Parquet => {
            let ppath = PlRefPath::try_from_path(path).map_err(|e| read_error(path, e))?;
            LazyFrame::scan_parquet(ppath, ScanArgsParquet::default())
                .and_then(|lf| lf.limit(rows as IdxSize).collect())
                .map_err(|e| read_error(path, e))?
        }
    };
    let mut columns = Vec::with_capacity(df.width());
    for c in df.columns() {
        let name = c.name().to_string();
        let as_text = c.cast(&DataType::String).map_err(|e| read_error(path, e))?;
        let text = as_text
            .str()
            .map_err(|e| read_error(path, e))?
            .iter()
            .map(|s| s.map(str::to_string))
            .collect();
        let numbers = if format == Format::Parquet && c.dtype().is_primitive_numeric() {
            let n = c
                .cast(&DataType::Float64)
                .map_err(|e| read_error(path, e))?;
            Some(n.f64().map_err(|e| read_error(path, e))?.iter().collect())
        } else {
            None
        };
        columns.push(SampleColumn {
            name,
            text,
            numbers,
        });
    }
    Ok(Sample {
        rows: df.height(),
        columns,
    })
}

/// Expands a source path: a file, a glob (`*`, `?`, `[`), or a directory
/// (every `.parquet` file below it, skipping names that start with `.` or `_`,
/// as distributed engines write them). Sorted, so the order is reproducible.
///
/// Each real file is listed once: a folder reached a second time through a
/// link (a link to `.` or to a parent loops) is not walked again, and of the
/// paths that resolve to one file only the first in sorted order is kept.
pub(crate) fn expand(s: &SourcePlan, plan: &Plan) -> Result<Vec<PathBuf>> {
    let p = &s.resolved;
    let not_found = |why: String| plan.error_at(&s.at, &s.field, why);
    let mut files = if s.written.contains(['*', '?', '[']) {
        let pattern = p.to_string_lossy().into_owned();
        let paths = glob::glob(&pattern)
            .map_err(|e| not_found(format!("`{}` is not a valid glob: {e}", s.written)))?;
        let mut out = Vec::new();
        for entry in paths {
            match entry {
                Ok(f) if f.is_file() => out.push(f),
                Ok(_) => {}
                Err(e) => {
                    let path = e.path().to_path_buf();
                    return Err(Error::io(path, "reading", e.into()));
                }
            }
        }
        if out.is_empty() {
            return Err(not_found(format!("no file matches `{}`", s.written)));
        }
        out
    } else if p.is_dir() {
        let mut out = Vec::new();
        walk_parquet(p, &mut out, &mut std::collections::BTreeSet::new())?;
        if out.is_empty() {
            return Err(not_found(format!(
                "directory `{}` holds no `.parquet` file",
                s.written
            )));
        }
        out
    } else {
        // Missing, a dangling link, a device or a fifo: each says what it is.
        crate::error::require_regular(p, "reading data")?;
        vec![p.clone()]
    };
    files.sort();
    // Nothing but regular files is read: a fifo or device named `.parquet`
    // in a folder would block or never end. Then each real file once.
    let mut real = std::collections::BTreeSet::new();
    let mut once = Vec::with_capacity(files.len());
    for f in files {
        crate::error::require_regular(&f, "reading data")?;
        let r = std::fs::canonicalize(&f).map_err(|e| Error::io(&f, "resolving", e))?;
        if real.insert(r) {
            once.push(f);
        }
    }
    Ok(once)
}

/// Every `.parquet` file below `dir`, its entries visited in name order; a
/// folder whose resolved path was walked already is skipped.
fn walk_parquet(
    dir: &Path,
    out: &mut Vec<PathBuf>,
    walked: &mut std::collections::BTreeSet<PathBuf>,
) -> Result<()> {
    let real = std::fs::canonicalize(dir).map_err(|e| Error::io(dir, "resolving", e))?;
    if !walked.insert(real) {
        return Ok(());
    }
    let mut entries = Vec::new();
    for entry in std::fs::read_dir(dir).map_err(|e| Error::io(dir, "listing", e))? {
        let entry = entry.map_err(|e| Error::io(dir, "listing", e))?;
        entries.push(entry.file_name());
    }
    entries.sort();
    for name in entries {
        let shown = name.to_string_lossy();
        if shown.starts_with('.') || shown.starts_with('_') {
            continue;
        }
        let p = dir.join(&name);
        if p.is_dir() {
            walk_parquet(&p, out, walked)?;
        } else if shown.ends_with(".parquet") {
            out.push(p);
        }
    }
    Ok(())
}

pub(crate) fn format_of(path: &Path, plan: &Plan, s: &SourcePlan) -> Result<Format> {
    let ext = path
        .extension()
        .and_then(|e| e.to_str())
        .unwrap_or("")
        .to_ascii_lowercase();
    match ext.as_str() {
        "csv" => Ok(Format::Csv),
        "parquet" | "pq" => Ok(Format::Parquet),
        _ => Err(plan.error_at(
            &s.at,
            &s.field,
            format!(
                "`{}` is neither `.csv` nor `.parquet`; anomark reads those two formats",
                path.display()
            ),
        )),
    }
}

pub(crate) fn shown(path: &Path, plan: &Plan) -> String {
    let base = plan.spec_path.parent().unwrap_or(Path::new(""));
    let rel = path.strip_prefix(base).unwrap_or(path);
    rel.components()
        .map(|c| c.as_os_str().to_string_lossy().into_owned())
        .collect::<Vec<_>>()
        .join("/")
}

pub(crate) fn missing_column(plan: &Plan, c: &Column, file: &str, present: &[String]) -> Error {
    let mut shown: Vec<String> = present.iter().take(12).map(|p| format!("`{p}`")).collect();
    if present.len() > 12 {
        shown.push(format!("and {} more", present.len() - 12));
    }
    let hint = crate::spec::closest(&c.name, present.iter().map(String::as_str))
        .map(|s| format!("; did you mean `{s}`?"))
        .unwrap_or_default();
    plan.error_at(
        &c.at,
        &c.field,
        format!(
            "column `{}` is not in `{file}` (its columns: {}){hint}",
            c.name,
            shown.join(", ")
        ),
    )
}

/// The names of a CSV file's header line as written (quotes undone, a
/// byte-order mark and a carriage return dropped), repeats kept; polars
/// renames a repeated name, so its header cannot show one. `None` when the
/// line is unusual (a quote left open, no newline within 16 MiB): the
/// general reader words that.
fn csv_header_names(path: &Path) -> Result<Option<Vec<String>>> {
    use std::io::{BufRead, Read};
    let f = std::fs::File::open(path).map_err(|e| Error::io(path, "reading", e))?;
    let mut line = Vec::new();
    std::io::BufReader::new(f)
        .take(16 << 20)
        .read_until(b'\n', &mut line)
        .map_err(|e| Error::io(path, "reading", e))?;
    if line.last() != Some(&b'\n') && line.len() == 16 << 20 {
        return Ok(None);
    }
    let text = String::from_utf8_lossy(&line);
    let text = text.strip_prefix('\u{feff}').unwrap_or(&text);
    let text = text.trim_end_matches(['\n', '\r']);
    let (mut names, mut field, mut quoted, mut was_quoted) = (vec![], String::new(), false, false);
    let mut chars = text.chars().peekable();
    while let Some(c) = chars.next() {
        match (c, quoted) {
            ('"', true) if chars.peek() == Some(&'"') => {
                chars.next();
                field.push('"');
            }
            ('"', true) => quoted = false,
            ('"', false) if field.is_empty() && !was_quoted => {
                quoted = true;
                was_quoted = true;
            }
            (',', false) => {
                names.push(std::mem::take(&mut field));
                was_quoted = false;
            }
            _ => field.push(c),
        }
    }
    if quoted {
        return Ok(None);
    }
    names.push(field);
    Ok(Some(names))
}

/// Refuses a CSV file whose header names a column the spec uses more than
/// once: which of them is meant cannot be told, and two columns of one name
/// may disagree. Names no column uses may repeat.
pub(crate) fn refuse_repeated_columns(path: &Path, shown: &str, wanted: &[&str]) -> Result<()> {
    let Some(names) = csv_header_names(path)? else {
        return Ok(());
    };
    let mut seen: Vec<&str> = Vec::new();
    for &w in wanted {
        if seen.contains(&w) {
            continue;
        }
        seen.push(w);
        let at: Vec<String> = (0..names.len())
            .filter(|&i| names[i] == w)
            .map(|i| (i + 1).to_string())
            .collect();
        if at.len() > 1 {
            return Err(Error::Data {
                path: PathBuf::from(shown),
                column: Some(w.to_string()),
                message: format!(
                    "the header names this column {} times, at positions {}; the spec \
                     uses it, and anomark cannot tell which one is meant (rename all but one)",
                    at.len(),
                    at.join(", ")
                ),
                lines: vec![1],
                total: 1,
                unit: RowUnit::Line,
            });
        }
    }
    Ok(())
}

/// Refuses a Parquet file whose schema names a column more than once,
/// naming the first such column and its positions: polars cannot read such a
/// file at all, whichever columns the spec uses, and would only say that a
/// name repeats. A file whose footer cannot be read is left to the reader.
pub(crate) fn refuse_repeated_parquet_columns(path: &Path, shown: &str) -> Result<()> {
    let Ok(file) = std::fs::File::open(path) else {
        return Ok(());
    };
    let mut reader = ParquetReader::new(file);
    let Ok(meta) = reader.get_metadata() else {
        return Ok(());
    };
    let names: Vec<&str> = meta
        .schema_descr
        .fields()
        .iter()
        .map(|f| f.name())
        .collect();
    for (i, name) in names.iter().enumerate() {
        if names[..i].contains(name) {
            continue;
        }
        let at: Vec<String> = (i..names.len())
            .filter(|&j| names[j] == *name)
            .map(|j| (j + 1).to_string())
            .collect();
        if at.len() > 1 {
            return Err(Error::Data {
                path: PathBuf::from(shown),
                column: Some(name.to_string()),
                message: format!(
                    "the file's schema names this column {} times, at positions {}; a \
                     Parquet file that repeats a column name cannot be read (rename all but one)",
                    at.len(),
                    at.join(", ")
                ),
                lines: vec![],
                total: 0,
                unit: RowUnit::Row,
            });
        }
    }
    Ok(())
}

/// Refuses a file whose header or schema repeats a column name: for CSV a
/// name the spec uses (`wanted`), for Parquet any name.
pub(crate) fn refuse_repeated_names(
    path: &Path,
    shown: &str,
    format: Format,
    wanted: &[&str],
) -> Result<()> {
    match format {
        Format::Csv => refuse_repeated_columns(path, shown, wanted),
        Format::Parquet => refuse_repeated_parquet_columns(path, shown),
    }
}

/// One file's columns as read: numeric columns (None = missing), text columns.
struct FileFrame {
    /// The plain-CSV reader's result (then the other fields are empty but
    /// `height`).
    plain: Option<fast::Plain>,
    numeric: Vec<Vec<Option<f64>>>,
    /// Per numeric column, rows whose text is not a number (CSV only).
    not_number: Vec<Vec<(usize, String)>>,
    text: Vec<Vec<Option<String>>>,
    height: usize,
}

impl FileFrame {
    /// A frame of the general reader, columns still to be filled.
    fn general(height: usize) -> Self {
        FileFrame {
            plain: None,
            numeric: vec![],
            not_number: vec![],
            text: vec![],
            height,
        }
    }
}

fn read_csv(
    path: &Path,
    plan: &Plan,
    numeric: &[&Column],
    text: &[&Column],
    label: Option<fast::LabelWant<'_>>,
) -> Result<FileFrame> {
    if let Some(p) = fast::read(path, numeric, text, label) {
        return Ok(FileFrame {
            height: p.height,
            plain: Some(p),
            numeric: vec![],
            not_number: vec![],
            text: vec![],
        });
    }
    read_csv_polars(path, plan, numeric, text)
}

/// The general CSV reader (polars), which also names every problem's place.
fn read_csv_polars(
    path: &Path,
    plan: &Plan,
    numeric: &[&Column],
    text: &[&Column],
) -> Result<FileFrame> {
    // The plain reader gives up on any repeated name and comes here.
    let wanted: Vec<&str> = numeric
        .iter()
        .chain(text)
        .map(|c| c.name.as_str())
        .collect();
    refuse_repeated_columns(path, &shown(path, plan), &wanted)?;
    let base = CsvReadOptions::default()
        .with_has_header(true)
        .with_raise_if_empty(true);
    let header = base
        .clone()
        .with_n_rows(Some(0))
        .with_infer_schema_length(Some(0))
        .try_into_reader_with_file_path(Some(path.to_path_buf()))
        .and_then(|r| r.finish())
        .map_err(|e| read_error(path, e))?;
    let present: Vec<String> = header
        .get_column_names()
        .iter()
        .map(|s| s.to_string())
        .collect();
    for c in numeric.iter().chain(text) {
        if !present.contains(&c.name) {
            return Err(missing_column(plan, c, &shown(path, plan), &present));
        }
    }
    let wanted: Arc<[PlSmallStr]> = numeric
        .iter()
        .chain(text)
        .map(|c| PlSmallStr::from_str(&c.name))
        .collect();
    let mut schema = Schema::default();
    for c in numeric {
        schema.with_column(c.name.as_str().into(), DataType::Float64);
    }
    for c in text {
        schema.with_column(c.name.as_str().into(), DataType::String);
    }
    let typed = base
        .clone()
        .with_columns(Some(wanted.clone()))
        .with_schema_overwrite(Some(Arc::new(schema)))
        .try_into_reader_with_file_path(Some(path.to_path_buf()))
        .and_then(|r| r.finish());
    // "NA" and the like are not guessed to mean missing: only the empty field is.
    let (df, as_text) = match typed {
        Ok(df) => (df, false),
        Err(_) => {
            // A value that does not parse as a number: read as text to name the rows.
            let df = base
                .with_columns(Some(wanted))
                .with_infer_schema_length(Some(0))
                .try_into_reader_with_file_path(Some(path.to_path_buf()))
                .and_then(|r| r.finish())
                .map_err(|e| read_error(path, e))?;
            (df, true)
        }
    };
    if !as_text {
        return typed_frame(&df, path, numeric, text);
    }
    let mut frame = FileFrame::general(df.height());
    for c in numeric {
        let values = text_values(&df, path, &c.name)?;
        let mut col = Vec::with_capacity(values.len());
        let mut bad = Vec::new();
        for (i, v) in values.into_iter().enumerate() {
            match v.as_deref().map(text_number) {
                None | Some(Ok(None)) => col.push(None),
                Some(Ok(Some(v))) => col.push(Some(v)),
                Some(Err(s)) => {
                    bad.push((i, s.to_string()));
                    col.push(Some(f64::NAN));
                }
            }
        }
        frame.numeric.push(col);
        frame.not_number.push(bad);
    }
    for c in text {
        frame.text.push(text_values(&df, path, &c.name)?);
    }
    Ok(frame)
}

/// A feature value read as text: `Ok(None)` when empty (missing, once
/// trimmed), `Ok(Some(v))` a number (Rust's correctly rounded `f64` parse of
/// the trimmed text; `NaN` and `inf` spelt out parse, and are then refused
/// as missing and infinite), `Err(trimmed)` not a number. The one
/// definition for text read in process and on an engine.
pub fn text_number(s: &str) -> std::result::Result<Option<f64>, &str> {
    let s = s.trim();
    if s.is_empty() {
        return Ok(None);
    }
    s.parse::<f64>().map(Some).map_err(|_| s)
}

fn read_parquet(
    path: &Path,
    plan: &Plan,
    numeric: &[&Column],
    text: &[&Column],
    types: &mut BTreeMap<String, (DataType, String)>,
) -> Result<FileFrame> {
    refuse_repeated_parquet_columns(path, &shown(path, plan))?;
    let ppath = PlRefPath::try_from_path(path).map_err(|e| read_error(path, e))?;
    let lf = LazyFrame::scan_parquet(ppath, ScanArgsParquet::default())
        .map_err(|e| read_error(path, e))?;
    let schema = lf
        .clone()
        .collect_schema()
        .map_err(|e| read_error(path, e))?;
    let present: Vec<String> = schema.iter_names().map(|s| s.to_string()).collect();
    let file = shown(path, plan);
    for c in numeric.iter().chain(text) {
        let Some(dtype) = schema.get(c.name.as_str()) else {
            return Err(missing_column(plan, c, &file, &present));
        };
        match types.get(&c.name) {
            Some((first, first_file)) if first != dtype => {
                return Err(Error::Data {
                    path: PathBuf::from(&file),
                    column: Some(c.name.clone()),
                    message: format!(
                        "the column's type is `{dtype}` here but `{first}` in `{first_file}`; \
                         every file must give a column one type"
                    ),
                    lines: vec![],
                    total: 0,
                    unit: RowUnit::Row,
                })
            }
            Some(_) => {}
            None => {
                types.insert(c.name.clone(), (dtype.clone(), file.clone()));
            }
        }
    }
    for c in numeric {
        let dtype = &types[&c.name].0;
        if !dtype.is_primitive_numeric() {
            return Err(Error::Data {
                path: PathBuf::from(&file),
                column: Some(c.name.clone()),
                message: format!("a feature column must be numeric, this one is `{dtype}`"),
                lines: vec![],
                total: 0,
                unit: RowUnit::Row,
            });
        }
    }
    let exprs: Vec<Expr> = numeric
        .iter()
        .map(|c| col(c.name.as_str()).cast(DataType::Float64))
        .chain(
            text.iter()
                .map(|c| col(c.name.as_str()).cast(DataType::String)),
        )
        .collect();
    let df = lf
        .select(exprs)
        .collect()
        .map_err(|e| read_error(path, e))?;
    typed_frame(&df, path, numeric, text)
}

/// A frame whose numeric columns are already Float64 and text columns String.
fn typed_frame(
    df: &DataFrame,
    path: &Path,
    numeric: &[&Column],
    text: &[&Column],
) -> Result<FileFrame> {
    let mut frame = FileFrame::general(df.height());
    for c in numeric {
        frame.numeric.push(f64_values(df, path, &c.name)?);
        frame.not_number.push(vec![]);
    }
    for c in text {
        frame.text.push(text_values(df, path, &c.name)?);
    }
    Ok(frame)
}

fn f64_values(df: &DataFrame, path: &Path, name: &str) -> Result<Vec<Option<f64>>> {
    let c = df
        .column(name)
        .and_then(|c| c.f64().cloned())
        .map_err(|e| read_error(path, e))?;
    Ok(c.iter().collect())
}

fn text_values(df: &DataFrame, path: &Path, name: &str) -> Result<Vec<Option<String>>> {
    let c = df
        .column(name)
        .and_then(|c| c.str().cloned())
        .map_err(|e| read_error(path, e))?;
    Ok(c.iter().map(|s| s.map(str::to_string)).collect())
}

/// What [`inspect`] found.
#[derive(Debug)]
pub struct Inspection {
    /// Every row, with NaN where a value is missing or unusable.
    pub data: Dataset,
    /// Per row: some numeric value is missing (empty, null or NaN).
    pub has_missing: Vec<bool>,
    /// Missing values per numeric column.
    pub missing_per_column: Vec<usize>,
    /// Value problems other than missing values (non-numeric, non-finite,
    /// undeclared labels, missing ids), in the order found.
    pub problems: Vec<Error>,
    /// The first missing-value error per column (a problem unless rows are dropped).
    pub missing: Vec<Error>,
}

/// Reads every source and gathers value problems without stopping at the
/// first. Errors that leave nothing to inspect (a missing file or column, a
/// type that differs between files, unreadable CSV) are returned as `Err`.
pub fn inspect(plan: &Plan) -> Result<Inspection> {
    let numeric: Vec<&Column> = plan.columns.iter().collect();
    let text_cols = plan.text_columns();
    let label = plan.label.as_ref();
    let label_k = label.and_then(|l| text_cols.iter().position(|c| c.name == l.column.name));

    let mut files = Vec::new();
    let mut types = BTreeMap::new();
    let d = numeric.len();
    // Row-major, `d` values per row.
    let mut xs: Vec<f64> = Vec::new();
    let mut text: Vec<TextColumn> = vec![TextColumn::default(); text_cols.len()];
    let mut is_anomaly = Vec::new();
    let mut origin = Vec::new();
    let mut has_missing = Vec::new();
    let mut missing_rows: Vec<Vec<RowId>> = vec![Vec::new(); numeric.len()];
    let mut non_finite: Vec<Vec<RowId>> = vec![Vec::new(); numeric.len()];
    let mut not_number: Vec<Vec<(RowId, String)>> = vec![Vec::new(); numeric.len()];
    let mut bad_label: Vec<(RowId, String)> = Vec::new();
    let mut empty_text: Vec<Vec<RowId>> = vec![Vec::new(); text_cols.len()];

    for s in &plan.sources {
        for path in expand(s, plan)? {
            let format = format_of(&path, plan, s)?;
            let mut frame = match format {
                Format::Csv => {
                    let want = match (s.implied, label) {
                        (None, Some(l)) => text_cols
                            .iter()
                            .position(|c| c.name == l.column.name)
                            .map(|index| fast::LabelWant {
                                index,
                                normal: &l.normal,
                                anomaly: &l.anomaly,
                            }),
                        _ => None,
                    };
                    let _t = crate::progress::part("reading CSV");
                    read_csv(&path, plan, &numeric, &text_cols, want)?
                }
                Format::Parquet => read_parquet(&path, plan, &numeric, &text_cols, &mut types)?,
            };
            let file_index = files.len() as u32;
            let start = is_anomaly.len();
            let height = frame.height;
            origin.extend((0..height as u64).map(|row| Origin {
                file: file_index,
                row,
            }));
            let digest = match frame.plain.take() {
                // Every value present and finite, every text field non-empty,
                // every label one of the two declared values.
                Some(p) => {
                    if xs.is_empty() {
                        xs = p.values;
                    } else {
                        xs.extend_from_slice(&p.values);
                    }
                    has_missing.extend(std::iter::repeat_n(false, height));
                    for (k, col) in p.text.into_iter().enumerate() {
                        if Some(k) == label_k {
                            continue;
                        }
                        if text[k].is_empty() {
                            text[k] = col;
                        } else {
                            text[k].append(&col);
                        }
                    }
                    match (s.implied, p.labels) {
                        (Some(a), _) => is_anomaly.extend(std::iter::repeat_n(a, height)),
                        (None, Some(resolved)) => is_anomaly.extend(resolved),
                        (None, None) => {
                            return Err(Error::internal("labels of a plain CSV file not read"))
                        }
                    }
                    p.digest
                }
                None => {
                    // Labels first, from the file's own column.
                    match s.implied {
                        Some(a) => is_anomaly.extend(std::iter::repeat_n(a, height)),
                        None => {
                            let l = label.expect("a labelled source has a label");
                            let k = label_k.expect("the label is a text column");
                            for (i, v) in frame.text[k].iter().enumerate() {
                                let v = v.as_deref().unwrap_or_default();
                                let a = rules::label_of(v.as_bytes(), &l.normal, &l.anomaly);
                                if a.is_none() {
                                    bad_label.push((RowId((start + i) as u64), v.to_string()));
                                }
                                is_anomaly.push(a.unwrap_or(false));
                            }
                        }
                    }
                    for i in 0..height {
                        let id = RowId((start + i) as u64);
                        let mut missing = false;
                        for (j, col) in frame.numeric.iter().enumerate() {
                            let v = match col[i] {
                                None => {
                                    missing = true;
                                    missing_rows[j].push(id);
                                    f64::NAN
                                }
                                Some(v) if v.is_nan() && frame.not_number[j].is_empty() => {
                                    missing = true;
                                    missing_rows[j].push(id);
                                    v
                                }
                                Some(v) if v.is_infinite() => {
                                    non_finite[j].push(id);
                                    f64::NAN
                                }
                                Some(v) => v,
                            };
                            xs.push(if v == 0.0 { 0.0 } else { v });
                        }
                        has_missing.push(missing);
                        for (k, col) in frame.text.iter_mut().enumerate() {
                            if Some(k) == label_k {
                                continue;
                            }
                            let v = col[i].take().unwrap_or_default();
                            if v.is_empty() {
                                empty_text[k].push(id);
                            }
                            text[k].push(&v);
                        }
                    }
                    for (j, bad) in frame.not_number.iter().enumerate() {
                        for (i, v) in bad {
                            not_number[j].push((RowId((start + i) as u64), v.clone()));
                        }
                    }
                    hash::file(&path)?
                }
            };
            files.push(SourceFile {
                shown: shown(&path, plan),
                path,
                format,
                digest,
                rows: height,
            });
        }
    }

    let _t = crate::progress::part("problems and columns");
    let n = is_anomaly.len();
    let x = Array2::from_shape_vec((n, d), xs)
        .map_err(|e| Error::internal(format!("feature matrix: {e}")))?;
    let mut data = Dataset {
        files,
        columns: numeric.iter().map(|c| c.name.clone()).collect(),
        x,
        is_anomaly,
        origin,
        ids: None,
        text: BTreeMap::new(),
        dropped: Dropped::default(),
    };

    let mut problems = Vec::new();
    for (j, c) in numeric.iter().enumerate() {
        if let Some((_, v)) = not_number[j].first() {
            let rows: Vec<RowId> = not_number[j].iter().map(|r| r.0).collect();
            problems.push(rules::not_a_number(data.at(&c.name, &rows), Some(v)));
        }
        if !non_finite[j].is_empty() {
            problems.push(rules::infinite(data.at(&c.name, &non_finite[j])));
        }
    }
    if let (false, Some(l)) = (bad_label.is_empty(), label) {
        problems.push(data.bad_labels(&l.column.name, &l.normal, &l.anomaly, &bad_label));
    }
    for (k, c) in text_cols.iter().enumerate() {
        if label.is_some_and(|l| l.column.name == c.name) {
            continue;
        }
        if !empty_text[k].is_empty() {
            problems.push(rules::empty_text(data.at(&c.name, &empty_text[k])));
        }
    }
    let missing = numeric
        .iter()
        .enumerate()
        .filter(|(j, _)| !missing_rows[*j].is_empty())
        .map(|(j, c)| rules::missing_value(data.at(&c.name, &missing_rows[j])))
        .collect();

    for (k, c) in text_cols.iter().enumerate() {
        let v = std::mem::take(&mut text[k]);
        if plan.id_column.as_ref().is_some_and(|id| id.name == c.name) {
            data.ids = Some(v);
        } else if label.is_none_or(|l| l.column.name != c.name) {
            data.text.insert(c.name.clone(), v);
        }
    }
    Ok(Inspection {
        data,
        has_missing,
        missing_per_column: missing_rows.iter().map(Vec::len).collect(),
        problems,
        missing,
    })
}

/// Reads and checks the data the plan names: refuses the first value problem,
/// and drops rows with missing values when the spec says so.
pub fn load(plan: &Plan) -> Result<Dataset> {
    let Inspection {
        data,
        has_missing,
        problems,
        missing,
        ..
    } = inspect(plan)?;
    if let Some(p) = problems.into_iter().next() {
        return Err(p);
    }
    match plan.missing {
        MissingPolicy::Refuse => match all_missing(missing) {
            Some(e) => Err(e),
            None => Ok(data),
        },
        MissingPolicy::DropRow => Ok(drop_rows(data, &has_missing, plan)),
    }
}

/// How many columns a refusal for missing values lists.
const SHOWN_COLUMNS: usize = 12;

/// One refusal for every missing value: a column's own error when one column
/// has them, else every column (up to [`SHOWN_COLUMNS`]) with its first places
/// and the total count of missing cells, as `check` lists them.
pub(crate) fn all_missing(missing: Vec<Error>) -> Option<Error> {
    if missing.len() <= 1 {
        return missing.into_iter().next();
    }
    let mut path: Option<PathBuf> = None;
    let mut unit = RowUnit::Line;
    let mut cells = 0;
    let mut each = Vec::new();
    for e in &missing {
        if let Error::Data {
            path: here,
            column,
            lines,
            total,
            unit: u,
            ..
        } = e
        {
            let first = path.get_or_insert_with(|| {
                unit = *u;
                here.clone()
            });
            let places = crate::error::places(lines, *total, *u);
            let place = if first == here {
                places
            } else {
                format!("`{}` {places}", here.display())
            };
            cells += total;
            if each.len() < SHOWN_COLUMNS {
                each.push(format!(
                    "column `{}` ({place})",
                    column.as_deref().unwrap_or_default()
                ));
            }
        }
    }
    if missing.len() > SHOWN_COLUMNS {
        each.push(format!(
            "and {} more columns",
            missing.len() - SHOWN_COLUMNS
        ));
    }
    Some(Error::Data {
        path: path.unwrap_or_default(),
        column: None,
        message: format!("{cells} feature values are missing: {}", each.join(", ")),
        lines: vec![],
        total: 0,
        unit,
    })
}

/// Leaves out the rows marked in `drop`, counting them by label (and by split
/// value with a fixed split column).
pub fn drop_rows(mut data: Dataset, drop: &[bool], plan: &Plan) -> Dataset {
    if !drop.iter().any(|&d| d) {
        return data;
    }
    let keep: Vec<usize> = (0..data.len()).filter(|&i| !drop[i]).collect();
    let split_col = match &plan.split {
        crate::spec::SplitPlan::FromColumn { column, .. } => data.text.get(&column.name).cloned(),
        _ => None,
    };
    let mut dropped = Dropped::default();
    for i in (0..data.len()).filter(|&i| drop[i]) {
        let a = data.is_anomaly[i];
        if a {
            dropped.anomaly += 1;
        } else {
            dropped.normal += 1;
        }
        if let Some(s) = &split_col {
            dropped.by_split.entry(s[i].to_string()).or_default()[usize::from(a)] += 1;
        }
    }
    let pick = |v: &TextColumn| v.pick(&keep);
    Dataset {
        x: data.x.select(ndarray::Axis(0), &keep),
        is_anomaly: keep.iter().map(|&i| data.is_anomaly[i]).collect(),
        origin: keep.iter().map(|&i| data.origin[i]).collect(),
        ids: data.ids.as_ref().map(pick),
        text: std::mem::take(&mut data.text)
            .into_iter()
            .map(|(k, v)| (k, pick(&v)))
            .collect(),
        dropped,
        files: data.files,
        columns: data.columns,
    }
}

#[cfg(test)]
impl Dataset {
    /// A dataset from one in-memory "file" (tests only).
    pub(crate) fn for_tests(
        x: Array2<f64>,
        is_anomaly: Vec<bool>,
        text: BTreeMap<String, TextColumn>,
    ) -> Dataset {
        let n = is_anomaly.len();
        Dataset {
            files: vec![SourceFile {
                path: "test.csv".into(),
                shown: "test.csv".into(),
                format: Format::Csv,
                digest: FileDigest {
                    bytes: 0,
                    blake3: String::new(),
                },
                rows: n,
            }],
            columns: (0..x.ncols()).map(|j| format!("x{j}")).collect(),
            x,
            is_anomaly,
            origin: (0..n as u64).map(|row| Origin { file: 0, row }).collect(),
            ids: None,
            text,
            dropped: Dropped::default(),
        }
    }
}

/// A column with values that are not numbers: its name, the first lines, how many.
type NotNumber = (String, Vec<u64>, usize);

/// A failed scan of `used` columns as numbers (`score`'s input, a streamed
/// source): most often a value that is not a number. Re-reads the columns
/// as text, streaming, to name the first such lines (CSV); else the read
/// error as [`read_error`] maps it.
pub fn not_a_number(path: &Path, csv: bool, used: &[String], e: PolarsError) -> Error {
    if !csv {
        return read_error(path, e);
    }
    let Ok(ppath) = PlRefPath::try_from_path(path) else {
        return read_error(path, e);
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
        (_, Some((column, lines, total))) => rules::not_a_number(
            rules::At {
                path: path.to_path_buf(),
                column,
                lines,
                total,
                unit: RowUnit::Line,
            },
            None,
        ),
        _ => read_error(path, e),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand_chacha::rand_core::{Rng, SeedableRng};

    fn plan_for(dir: &Path, csv: &str, features: &[&str]) -> Plan {
        let spec = dir.join("spec.yaml");
        std::fs::write(
            &spec,
            format!(
                "format: 1\ndata:\n  path: {csv}\n  id-column: id\n  label: {{column: label, normal: ok, anomaly: bad}}\n  \
                 features: [{}]\nsplit:\n  from-column: split\ndetectors: [independent-gaussian]\nthreshold: max-f1\n\
                 card:\n  title: t\n  owner: o\n  intended-use: u\n  out-of-scope-uses: [x]\n",
                features.join(", ")
            ),
        )
        .unwrap();
        crate::spec::load(&spec).unwrap()
    }

    #[test]
    fn an_io_error_from_the_reader_is_a_file_problem() {
        // A permission refusal, even inside polars' context wrapping, is a
        // file problem (README's exit-code table), not a data refusal.
        let io = PolarsError::from(std::io::Error::new(
            std::io::ErrorKind::PermissionDenied,
            "permission denied",
        ));
        let wrapped = io.context("reading the header".into());
        let e = read_error(Path::new("d.csv"), wrapped);
        assert_eq!(e.code(), crate::error::exit::IO, "{e}");
        assert!(e.to_string().starts_with("reading `d.csv`: "), "{e}");
        let e = read_error(Path::new("d.csv"), PolarsError::ComputeError("bad".into()));
        assert_eq!(e.code(), crate::error::exit::DATA, "{e}");
    }

    /// The plain-CSV reader and polars' reader agree bit for bit on random
    /// decimal text (both parse correctly rounded; the check is against
    /// polars, a general-purpose library), and the digest equals the
    /// streamed file hash.
    #[test]
    fn plain_reader_agrees_with_polars() {
        let dir = tempfile::tempdir().unwrap();
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        let mut text = String::from("id,a,label,b,split,c\n");
        let number = |rng: &mut rand_chacha::ChaCha8Rng| {
            let mut s = String::new();
            if rng.next_u32().is_multiple_of(2) {
                s.push('-');
            }
            s.push_str(&(rng.next_u64() % 10u64.pow(1 + rng.next_u32() % 17)).to_string());
            let decimals = rng.next_u32() % 19;
            if decimals > 0 {
                s.push('.');
                for _ in 0..decimals {
                    s.push(char::from(b'0' + (rng.next_u32() % 10) as u8));
                }
            }
            if rng.next_u32().is_multiple_of(4) {
                let mark = if rng.next_u32().is_multiple_of(2) {
                    "e-"
                } else {
                    "E"
                };
                s.push_str(&format!("{mark}{}", rng.next_u32() % 61));
            }
            s
        };
        for i in 0..150_000 {
            let (a, b, c) = (number(&mut rng), number(&mut rng), number(&mut rng));
            let label = if i % 97 == 0 { "bad" } else { "ok" };
            let split = ["train", "validation", "test"][i % 3];
            text.push_str(&format!("r{i},{a},{label},{b},{split},{c}\n"));
        }
        std::fs::write(dir.path().join("d.csv"), &text).unwrap();
        let plan = plan_for(dir.path(), "d.csv", &["c", "a", "b"]);
        let numeric: Vec<&Column> = plan.columns.iter().collect();
        let text_cols = plan.text_columns();
        let path = dir.path().join("d.csv");
        let want = fast::LabelWant {
            index: 0,
            normal: "ok",
            anomaly: "bad",
        };
        assert_eq!(text_cols[0].name, "label");
        let plain = fast::read(&path, &numeric, &text_cols, Some(want)).expect("plain CSV");
        let general = read_csv_polars(&path, &plan, &numeric, &text_cols).unwrap();
        assert_eq!(plain.height, 150_000);
        assert_eq!(general.height, plain.height);
        for (j, col) in general.numeric.iter().enumerate() {
            for (i, v) in col.iter().enumerate() {
                let v = v.unwrap();
                let v = if v == 0.0 { 0.0 } else { v };
                assert_eq!(
                    plain.values[i * numeric.len() + j].to_bits(),
                    v.to_bits(),
                    "row {i}, column {}",
                    numeric[j].name
                );
            }
        }
        for (k, col) in general.text.iter().enumerate().skip(1) {
            let want: TextColumn = col.iter().map(|v| v.clone().unwrap()).collect();
            assert_eq!(plain.text[k], want, "text column {}", text_cols[k].name);
        }
        let labels: Vec<bool> = general.text[0]
            .iter()
            .map(|v| v.as_deref() == Some("bad"))
            .collect();
        assert_eq!(plain.labels, Some(labels));
        assert!(plain.text[0].is_empty());
        assert_eq!(plain.digest, hash::file(&path).unwrap());
    }

    /// Files outside the plain case go to polars, which names the problem.
    #[test]
    fn plain_reader_leaves_the_rest_to_polars() {
        let dir = tempfile::tempdir().unwrap();
        let head = "id,a,label,split\n";
        let cases = [
            "r1,1.5,ok,train\nr2,\"2\",ok,test\n",
            "r1,1.5,ok,train\nr\"2,2,ok,test\n",
            "r1,1.5,ok,train\nr2,2,ok,test\r\n",
            "r1,1.5,ok,train\r\nr2,2,ok,test\r\n",
            "r1,1.5,ok,train\n\nr2,2,ok,test\n",
            "r1,1.5,ok,train\nr2,,ok,test\n",
            "r1,1.5,ok,train\nr2,2,,test\n",
            "r1,1.5,ok,train\nr2,2,ok\n",
            "r1,1.5,ok,train\nr2,2,ok,test,extra\n",
            "r1,1.5,ok,train\nr2,NaN,ok,test\n",
            "r1,1.5,ok,train\nr2,+2,ok,test\n",
            "r1,1.5,ok,train\nr2,1e400,ok,test\n",
            "r1,1.5,ok,train\nr2,2,OK,test\n",
            "r1,1.5,ok,train\nr2,2,ok,test\nr3",
        ];
        // Whether the plain reader takes this file text.
        let plain = |name: &str, text: String| {
            let path = dir.path().join(name);
            std::fs::write(&path, text).unwrap();
            let plan = plan_for(dir.path(), name, &["a"]);
            let numeric: Vec<&Column> = plan.columns.iter().collect();
            let label = fast::LabelWant {
                index: 0,
                normal: "ok",
                anomaly: "bad",
            };
            fast::read(&path, &numeric, &plan.text_columns(), Some(label)).is_some()
        };
        for (n, body) in cases.iter().enumerate() {
            assert!(
                !plain(&format!("c{n}.csv"), format!("{head}{body}")),
                "case {n}: {body:?}"
            );
        }
        for (n, head) in ["id,a,label,split,x,x\n", "id,a,label,split,,\n"]
            .iter()
            .enumerate()
        {
            assert!(
                !plain(&format!("h{n}.csv"), format!("{head}r1,1.5,ok,train,1,2\n")),
                "header {head:?}"
            );
        }
        assert!(!plain(
            "bom.csv",
            format!("\u{feff}{head}r1,1.5,ok,train\n")
        ));
        assert!(!plain(
            "crlf-header.csv",
            "id,a,label,split\r\nr1,1.5,ok,train\n".into()
        ));
        // The same rows, plain, are taken (the cases above fail for their
        // own reason).
        assert!(plain("plain.csv", format!("{head}r1,1.5,ok,train\n")));
    }
}
