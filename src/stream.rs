//! Data larger than memory (`data.stream: true`): a plain CSV file is read
//! in fixed-size chunks by the plain-CSV reader (`data::fast::Chunks`), and
//! anything else (Parquet, or a CSV file the plain reader gives up on, which
//! is then read again from its first line) by polars' streaming engine in
//! batches. Only the validation and test rows, and 32 bytes of content hash
//! per training row (for the train manifest and the leakage check), stay in
//! memory.
//!
//! Training rows are checked in fixed blocks of [`BLOCK`] rows in file order
//! (so a refused value is named as before any fit), then kept as records
//! (content hash and source values) in [`PARTITIONS`] partitions by the
//! hash's first byte, held in memory up to [`SPILL_BYTES`] and beyond that
//! appended to temporary files. When the source is read, the partitions are
//! taken in order, each sorted by content hash (ties in reading order), and
//! their buckets folded into the training moments of every feature set by
//! [`crate::moments`]: the same bits as an in-memory run of the same rows,
//! whatever chunks or batches the readers hand over. The same pass keeps the
//! systematic samples of training rows (every k-th in content-hash order)
//! that the card's feature figures and the drift reference show.

use std::collections::BTreeMap;
use std::sync::{Arc, Mutex};

use ndarray::Array2;
use polars::prelude::*;

use crate::audit::hash::{self, ContentHash};
use crate::audit::leak::Part;
use crate::data::{self, Dataset, Dropped, Format, Origin, RowId, SourceFile};
use crate::error::{Error, Result, RowUnit};
use crate::features::{self, FittedFeatures};
use crate::moments::{Fold, Moments};
use crate::progress::Progress;
use crate::rules;
use crate::spec::{MissingPolicy, Plan, SplitPlan};
use crate::split::Counts;

/// Training rows per block of checks (file order).
pub const BLOCK: usize = 65_536;

/// Partitions of the kept training rows, by the content hash's first byte
/// (each holds 256 of the moments' buckets, in order).
pub const PARTITIONS: usize = 256;

/// Bytes of training records held in memory before they are appended to the
/// partitions' temporary files (`ANOMARK_SPILL_BYTES` lowers it, for tests).
pub const SPILL_BYTES: usize = 256 << 20;

/// What streaming the source produced.
pub struct Streamed {
    /// The validation and test rows only.
    pub data: Dataset,
    /// Content hash of each of those rows.
    pub hashes: Vec<ContentHash>,
    /// Each of those rows' split (validation or test).
    pub parts: Vec<Part>,
    /// Content hashes of the training rows, ascending.
    pub train_hashes: Vec<ContentHash>,
    /// Training rows by label.
    pub train_counts: Counts,
    /// Per feature set: the fitted (parameter-free) features.
    pub fitted: Vec<FittedFeatures>,
    /// Per feature set: the training rows' moments ([`crate::moments`]).
    pub moments: Vec<Moments>,
    /// The sampled training rows (source columns), in content-hash order.
    pub train_sample: Dataset,
    /// Per limit asked of [`load`]: the rows of `train_sample` that are every
    /// k-th training row in content-hash order, k = ⌈training rows / limit⌉.
    pub samples: Vec<Vec<RowId>>,
}

/// The training rows kept for the moments: records of the content hash and
/// the source values (little-endian binary64), in [`PARTITIONS`] partitions
/// by the hash's first byte, each in reading order.
struct TrainRows {
    /// Bytes per record.
    width: usize,
    /// Each partition's records not yet written out.
    held: Vec<Vec<u8>>,
    /// Bytes of each partition already in its file.
    written: Vec<u64>,
    held_bytes: usize,
    limit: usize,
    dir: Option<(tempfile::TempDir, crate::cleanup::Registered)>,
}

impl TrainRows {
    fn new(columns: usize) -> Self {
        let limit = std::env::var("ANOMARK_SPILL_BYTES")
            .ok()
            .and_then(|v| v.parse().ok())
            .unwrap_or(SPILL_BYTES);
        TrainRows {
            width: 32 + 8 * columns,
            held: vec![Vec::new(); PARTITIONS],
            written: vec![0; PARTITIONS],
            held_bytes: 0,
            limit,
            dir: None,
        }
    }

    fn write_error(path: &std::path::Path, e: std::io::Error) -> Error {
        Error::Io {
            path: path.to_path_buf(),
            action: "writing the streamed training rows aside",
            source: e,
        }
    }

    fn file(&mut self, p: usize) -> Result<std::path::PathBuf> {
        if self.dir.is_none() {
            let dir = tempfile::Builder::new()
                .prefix(".anomark-train-rows-")
                .tempdir()
                .map_err(|e| Self::write_error(&std::env::temp_dir(), e))?;
            let guard = crate::cleanup::register(dir.path());
            self.dir = Some((dir, guard));
        }
        let (dir, _) = self.dir.as_ref().expect("made above");
        Ok(dir.path().join(format!("{p:03}")))
    }

    fn push(&mut self, h: &ContentHash, values: &[f64]) -> Result<()> {
        let part = &mut self.held[h.0[0] as usize];
        part.extend_from_slice(&h.0);
        for v in values {
            part.extend_from_slice(&v.to_le_bytes());
        }
        self.held_bytes += self.width;
        if self.held_bytes > self.limit {
            self.spill()?;
        }
        Ok(())
    }

    /// Appends every partition's held records to its file.
    fn spill(&mut self) -> Result<()> {
        use std::io::Write;
        for p in 0..PARTITIONS {
            if self.held[p].is_empty() {
                continue;
            }
            let path = self.file(p)?;
            let mut f = std::fs::OpenOptions::new()
                .create(true)
                .append(true)
                .open(&path)
                .map_err(|e| Self::write_error(&path, e))?;
            f.write_all(&self.held[p])
                .map_err(|e| Self::write_error(&path, e))?;
            self.written[p] += self.held[p].len() as u64;
            self.held[p].clear();
        }
        self.held_bytes = 0;
        Ok(())
    }

    /// Each partition's length in bytes, to return to with [`TrainRows::reset`].
    fn mark(&self) -> Vec<u64> {
        (0..PARTITIONS)
            .map(|p| self.written[p] + self.held[p].len() as u64)
            .collect()
    }

    fn reset(&mut self, mark: &[u64]) -> Result<()> {
        for (p, &len) in mark.iter().enumerate() {
            if len >= self.written[p] {
                self.held[p].truncate((len - self.written[p]) as usize);
            } else {
                let path = self.file(p)?;
                std::fs::OpenOptions::new()
                    .write(true)
                    .open(&path)
                    .and_then(|f| f.set_len(len))
                    .map_err(|e| Self::write_error(&path, e))?;
                self.written[p] = len;
                self.held[p].clear();
            }
        }
        self.held_bytes = self.held.iter().map(Vec::len).sum();
        Ok(())
    }

    /// Partition `p`'s records, in reading order.
    fn take(&mut self, p: usize) -> Result<Vec<u8>> {
        let mut bytes = Vec::new();
        if self.written[p] > 0 {
            let path = self.file(p)?;
            bytes = std::fs::read(&path).map_err(|e| Error::Io {
                path: path.clone(),
                action: "reading the streamed training rows back",
                source: e,
            })?;
        }
        bytes.append(&mut self.held[p]);
        Ok(bytes)
    }

    /// Folds the kept rows into each feature set's moments, partition by
    /// partition in order, and keeps every `strides[k]`-th row (in
    /// content-hash order) for the samples.
    fn finish(
        mut self,
        fitted: &[FittedFeatures],
        columns: &[String],
        strides: &[usize],
    ) -> Result<(Vec<Moments>, Dataset, Vec<Vec<RowId>>)> {
        let c = columns.len();
        let mut folds: Vec<Fold> = fitted.iter().map(|f| Fold::new(f.features.len())).collect();
        let mut sample_x: Vec<f64> = Vec::new();
        let mut samples: Vec<Vec<RowId>> = vec![Vec::new(); strides.len()];
        let mut g = 0usize;
        for p in 0..PARTITIONS {
            let bytes = self.take(p)?;
            let k = bytes.len() / self.width;
            let record = |i: usize| &bytes[i * self.width..(i + 1) * self.width];
            let hash_of = |i: usize| {
                let mut h = [0u8; 32];
                h.copy_from_slice(&record(i)[..32]);
                ContentHash(h)
            };
            let value = |i: usize, j: usize| {
                let at = 32 + 8 * j;
                let mut b = [0u8; 8];
                b.copy_from_slice(&record(i)[at..at + 8]);
                f64::from_le_bytes(b)
            };
            // Content-hash order; equal hashes keep their reading order.
            let mut order: Vec<usize> = (0..k).collect();
            order.sort_by_key(|&i| hash_of(i));
            let hashes: Vec<ContentHash> = order.iter().map(|&i| hash_of(i)).collect();
            let values: Vec<Vec<f64>> = (0..c)
                .map(|j| order.iter().map(|&i| value(i, j)).collect())
                .collect();
            for (f, fold) in fitted.iter().zip(folds.iter_mut()) {
                let x = f.apply_columns(&values, k).map_err(|fault| {
                    Error::internal(format!(
                        "a checked training row was refused: {}: {}",
                        fault.feature, fault.reason
                    ))
                })?;
                fold.add_sorted_rows(&hashes, x.view())?;
            }
            for i in 0..k {
                let hits: Vec<usize> = (0..strides.len())
                    .filter(|&s| (g + i).is_multiple_of(strides[s]))
                    .collect();
                if hits.is_empty() {
                    continue;
                }
                let at = RowId((sample_x.len() / c.max(1)) as u64);
                sample_x.extend(values.iter().map(|col| col[i]));
                for s in hits {
                    samples[s].push(at);
                }
            }
            g += k;
        }
        let sample = Dataset::sample_of(columns.to_vec(), sample_x)?;
        Ok((
            folds.into_iter().map(Fold::finish).collect(),
            sample,
            samples,
        ))
    }
}

/// Rows of the current file read so far, and everything kept.
/// One batch of rows, column by column.
struct Columns {
    numeric: Vec<Vec<Option<f64>>>,
    labels: Vec<Option<String>>,
    splits: Vec<Option<String>>,
    ids: Option<Vec<Option<String>>>,
}

impl Columns {
    /// A batch from polars' streaming engine.
    fn of_frame(df: &DataFrame, plan: &Plan, split_col: &str) -> Result<Self> {
        let label = plan.label.as_ref().expect("streaming has a label column");
        let strings = |name: &str| -> Result<Vec<Option<String>>> {
            Ok(df
                .column(name)
                .and_then(|c| c.str().cloned())
                .map_err(|e| Error::internal(format!("column `{name}`: {e}")))?
                .iter()
                .map(|v| v.map(str::to_string))
                .collect())
        };
        let mut numeric: Vec<Vec<Option<f64>>> = Vec::with_capacity(plan.columns.len());
        for c in &plan.columns {
            numeric.push(
                df.column(&c.name)
                    .and_then(|c| c.f64().cloned())
                    .map_err(|e| Error::internal(format!("column `{}`: {e}", c.name)))?
                    .iter()
                    .collect(),
            );
        }
        Ok(Columns {
            numeric,
            labels: strings(&label.column.name)?,
            splits: strings(split_col)?,
            ids: match &plan.id_column {
                Some(c) => Some(strings(&c.name)?),
                None => None,
            },
        })
    }

    /// A chunk from the plain-CSV reader: text columns label, split, id.
    fn of_plain(parsed: data::fast::Parsed, d: usize) -> Self {
        let (values, text, _, height) = parsed;
        let numeric = (0..d)
            .map(|j| (0..height).map(|i| Some(values[i * d + j])).collect())
            .collect();
        let mut text = text
            .into_iter()
            .map(|t| t.iter().map(|v| Some(v.to_string())).collect());
        let labels = text.next().unwrap_or_default();
        let splits = text.next().unwrap_or_default();
        Columns {
            numeric,
            labels,
            splits,
            ids: text.next(),
        }
    }
}

/// What [`Acc`] held before a file, to undo the file when its plain-CSV
/// reading gives up and polars reads it again.
struct Mark {
    lens: [usize; 6],
    pending: Vec<f64>,
    pending_origin: Vec<Origin>,
    train_counts: Counts,
    kept: Vec<u64>,
    dropped: Dropped,
}

impl Acc {
    fn mark(&self) -> Mark {
        Mark {
            lens: [
                self.x.len(),
                self.is_anomaly.len(),
                self.origin.len(),
                self.ids.as_ref().map_or(0, data::TextColumn::len),
                self.hashes.len(),
                self.train_hashes.len(),
            ],
            pending: self.pending.clone(),
            pending_origin: self.pending_origin.clone(),
            train_counts: self.train_counts,
            kept: self.kept.mark(),
            dropped: self.dropped.clone(),
        }
    }

    fn reset(&mut self, m: Mark) -> Result<()> {
        self.x.truncate(m.lens[0]);
        self.is_anomaly.truncate(m.lens[1]);
        self.parts.truncate(m.lens[1]);
        self.origin.truncate(m.lens[2]);
        if let Some(ids) = self.ids.as_mut() {
            ids.truncate(m.lens[3]);
        }
        self.hashes.truncate(m.lens[4]);
        self.train_hashes.truncate(m.lens[5]);
        self.pending = m.pending;
        self.pending_origin = m.pending_origin;
        self.train_counts = m.train_counts;
        self.kept.reset(&m.kept)?;
        self.dropped = m.dropped;
        self.row = 0;
        self.error = None;
        Ok(())
    }
}

struct Acc {
    file: u32,
    row: u64,
    // Kept validation and test rows.
    x: Vec<f64>,
    is_anomaly: Vec<bool>,
    origin: Vec<Origin>,
    ids: Option<data::TextColumn>,
    hashes: Vec<ContentHash>,
    parts: Vec<Part>,
    // Training rows not yet folded into a block.
    pending: Vec<f64>,
    pending_origin: Vec<Origin>,
    train_hashes: Vec<ContentHash>,
    train_counts: Counts,
    kept: TrainRows,
    dropped: Dropped,
    error: Option<Error>,
}

struct Ctx<'a> {
    plan: &'a Plan,
    fitted: &'a [FittedFeatures],
    files: &'a [SourceFile],
    ncols: usize,
}

impl Ctx<'_> {
    /// Where `rows` (0-based rows of the current file) of `column` are.
    fn at(&self, acc: &Acc, column: &str, rows: &[u64]) -> rules::At {
        let f = &self.files[acc.file as usize];
        rules::At {
            path: f.shown.clone().into(),
            column: column.into(),
            total: rows.len(),
            lines: rows.iter().take(5).map(|&r| f.format.place(r)).collect(),
            unit: f.format.unit(),
        }
    }

    /// Checks the first `rows` pending training rows' features (finite and
    /// within the training bound) and moves the rows to the kept ones.
    fn fold(&self, acc: &mut Acc, rows: usize) -> Result<()> {
        if rows == 0 {
            return Ok(());
        }
        let c = self.ncols;
        let columns: Vec<Vec<f64>> = (0..c)
            .map(|j| (0..rows).map(|i| acc.pending[i * c + j]).collect())
            .collect();
        for f in self.fitted {
            let x = f.apply_columns(&columns, rows).map_err(|fault| {
                let o = acc.pending_origin[fault.rows[0]];
                let file = &self.files[o.file as usize];
                Error::Data {
                    path: file.shown.clone().into(),
                    column: Some(fault.feature.clone()),
                    message: fault.reason.clone(),
                    total: fault.rows.len(),
                    lines: fault
                        .rows
                        .iter()
                        .map(|&r| acc.pending_origin[r])
                        .filter(|p| p.file == o.file)
                        .map(|p| file.format.place(p.row))
                        .collect(),
                    unit: match file.format {
                        Format::Csv => RowUnit::Line,
                        Format::Parquet => RowUnit::Row,
                    },
                }
            })?;
            // The in-memory fit's bound (features::fit), named the same way.
            for (j, name) in f.names().iter().enumerate() {
                let huge: Vec<usize> = (0..rows)
                    .filter(|&i| x[(i, j)].abs() > crate::features::TRAIN_LIMIT)
                    .collect();
                if let Some(&first) = huge.first() {
                    let o = acc.pending_origin[first];
                    let file = &self.files[o.file as usize];
                    return Err(rules::beyond_train_limit(
                        rules::At {
                            path: file.shown.clone().into(),
                            column: name.clone(),
                            total: huge.len(),
                            lines: huge
                                .iter()
                                .map(|&r| acc.pending_origin[r])
                                .filter(|p| p.file == o.file)
                                .take(5)
                                .map(|p| file.format.place(p.row))
                                .collect(),
                            unit: file.format.unit(),
                        },
                        rules::MOMENTS_OVERFLOW,
                    ));
                }
            }
        }
        // The pending rows are the last training rows hashed.
        let first = acc.train_hashes.len() - acc.pending_origin.len();
        for i in 0..rows {
            let h = acc.train_hashes[first + i];
            acc.kept.push(&h, &acc.pending[i * c..(i + 1) * c])?;
        }
        acc.pending.drain(..rows * c);
        acc.pending_origin.drain(..rows);
        Ok(())
    }

    fn batch(&self, acc: &mut Acc, cols: Columns, split_col: &str) -> Result<()> {
        let Columns {
            numeric,
            labels,
            splits,
            ids,
        } = cols;
        let n = labels.len();
        let plan = self.plan;
        let label = plan.label.as_ref().expect("streaming has a label column");
        // Check every row first, so that an error names its lines.
        let mut keep = Vec::with_capacity(n);
        let mut bad_label = Vec::new();
        let mut bad_split = Vec::new();
        let mut anomaly_in_train = Vec::new();
        let mut missing: Vec<Vec<u64>> = vec![vec![]; self.ncols];
        let mut infinite: Vec<Vec<u64>> = vec![vec![]; self.ncols];
        for i in 0..n {
            let r = acc.row + i as u64;
            let a = labels[i]
                .as_deref()
                .and_then(|v| rules::label_of(v.as_bytes(), &label.normal, &label.anomaly))
                .unwrap_or_else(|| {
                    bad_label.push(r);
                    false
                });
            let p = splits[i]
                .as_deref()
                .and_then(rules::part_of)
                .unwrap_or_else(|| {
                    bad_split.push(r);
                    Part::Train
                });
            if a && p == Part::Train {
                anomaly_in_train.push(r);
            }
            let mut has_missing = false;
            // As the in-memory reader reads them: a NaN is a missing value,
            // an infinite value is refused.
            for (j, col) in numeric.iter().enumerate() {
                match col[i] {
                    None => {
                        missing[j].push(r);
                        has_missing = true;
                    }
                    Some(v) if v.is_nan() => {
                        missing[j].push(r);
                        has_missing = true;
                    }
                    Some(v) if v.is_infinite() => infinite[j].push(r),
                    Some(_) => {}
                }
            }
            if has_missing && plan.missing == MissingPolicy::DropRow {
                if a {
                    acc.dropped.anomaly += 1;
                } else {
                    acc.dropped.normal += 1;
                }
                let e = acc
                    .dropped
                    .by_split
                    .entry(splits[i].clone().unwrap_or_default())
                    .or_default();
                e[a as usize] += 1;
                keep.push(None);
            } else {
                keep.push(Some((a, p)));
            }
        }
        if let Some(j) = (0..self.ncols).find(|&j| !infinite[j].is_empty()) {
            return Err(rules::infinite(self.at(
                acc,
                &plan.columns[j].name,
                &infinite[j],
            )));
        }
        let label_of = |r: u64| labels[(r - acc.row) as usize].as_deref().unwrap_or("");
        let values = crate::data::by_value(bad_label.iter().map(|&r| (r, label_of(r))));
        if values.len() > 1 {
            // Several undeclared values: each with its own lines.
            let f = &self.files[acc.file as usize];
            let unit = f.format.unit();
            let each: Vec<(&str, String)> = values
                .iter()
                .take(5)
                .map(|(v, rows)| {
                    let places: Vec<u64> =
                        rows.iter().take(5).map(|&r| f.format.place(r)).collect();
                    (*v, crate::error::places(&places, rows.len(), unit))
                })
                .collect();
            return Err(rules::undeclared_labels(
                f.shown.clone().into(),
                &label.column.name,
                unit,
                (&label.normal, &label.anomaly),
                &each,
                values.len(),
            ));
        }
        if let Some(&first) = bad_label.first() {
            let i = (first - acc.row) as usize;
            return Err(rules::undeclared_label(
                self.at(acc, &label.column.name, &bad_label),
                labels[i].as_deref().unwrap_or(""),
                &label.normal,
                &label.anomaly,
            ));
        }
        if let Some(&first) = bad_split.first() {
            let i = (first - acc.row) as usize;
            return Err(rules::unknown_split(
                self.at(acc, split_col, &bad_split),
                splits[i].as_deref().unwrap_or(""),
            ));
        }
        if !anomaly_in_train.is_empty() {
            return Err(rules::anomaly_in_train(self.at(
                acc,
                split_col,
                &anomaly_in_train,
            )));
        }
        if plan.missing == MissingPolicy::Refuse {
            // Every column with a missing value in this chunk, worded as
            // the in-memory reader words it.
            let each: Vec<Error> = (0..self.ncols)
                .filter(|&j| !missing[j].is_empty())
                .map(|j| rules::missing_value(self.at(acc, &plan.columns[j].name, &missing[j])))
                .collect();
            if let Some(e) = data::all_missing(each) {
                return Err(e);
            }
        }
        let c = self.ncols;
        let kept: Vec<usize> = (0..n).filter(|&i| keep[i].is_some()).collect();
        let mut x = Array2::<f64>::zeros((kept.len(), c));
        let mut lab = Vec::with_capacity(kept.len());
        for (k, &i) in kept.iter().enumerate() {
            for j in 0..c {
                x[(k, j)] = numeric[j][i].expect("kept rows have no missing value");
            }
            lab.push(keep[i].expect("kept").0);
        }
        let hashes = hash::rows(&x, &lab);
        for (k, &i) in kept.iter().enumerate() {
            let (a, p) = keep[i].expect("kept");
            let origin = Origin {
                file: acc.file,
                row: acc.row + i as u64,
            };
            if p == Part::Train {
                acc.train_hashes.push(hashes[k]);
                acc.train_counts.normal += 1;
                acc.pending.extend(x.row(k).iter());
                acc.pending_origin.push(origin);
            } else {
                acc.x.extend(x.row(k).iter());
                acc.is_anomaly.push(a);
                acc.origin.push(origin);
                acc.hashes.push(hashes[k]);
                acc.parts.push(p);
                if let (Some(out), Some(ids)) = (acc.ids.as_mut(), ids.as_ref()) {
                    out.push(ids[i].as_deref().unwrap_or_default());
                }
            }
        }
        while acc.pending_origin.len() >= BLOCK {
            self.fold(acc, BLOCK)?;
        }
        acc.row += n as u64;
        Ok(())
    }
}

/// Streams one CSV file through the plain-CSV reader, chunk by chunk.
/// `false` (with the state as it was before the file) when the file is not
/// plain CSV or a chunk is refused: polars then reads it and reports any
/// problem in its own words and places.
fn plain_file(
    plan: &Plan,
    acc: &Arc<Mutex<Acc>>,
    fitted: &[FittedFeatures],
    files: &mut [SourceFile],
    fi: usize,
    split: &crate::spec::Column,
    counter: &crate::progress::Stage,
) -> Result<bool> {
    let label = plan.label.as_ref().expect("checked by the spec");
    let numeric: Vec<&crate::spec::Column> = plan.columns.iter().collect();
    let mut text: Vec<&crate::spec::Column> = vec![&label.column, split];
    text.extend(plan.id_column.iter());
    let Some(mut chunks) = data::fast::Chunks::open(&files[fi].path, &numeric, &text, None) else {
        return Ok(false);
    };
    let mut a = acc.lock().expect("not poisoned");
    let mark = a.mark();
    let ctx = Ctx {
        plan,
        fitted,
        files: &*files,
        ncols: numeric.len(),
    };
    let done = loop {
        match chunks.next() {
            Ok(Some(parsed)) => {
                let n = parsed.3 as u64;
                if ctx
                    .batch(
                        &mut a,
                        Columns::of_plain(parsed, numeric.len()),
                        &split.name,
                    )
                    .is_err()
                {
                    break false;
                }
                counter.add(n);
            }
            Ok(None) => break true,
            Err(data::fast::NotPlain) => break false,
        }
    };
    if done {
        files[fi].rows = a.row as usize;
    } else {
        a.reset(mark)?;
    }
    Ok(done)
}

/// Streams the plan's one labelled source, keeping for each of
/// `sample_limits` every k-th training row in content-hash order,
/// k = ⌈training rows / limit⌉ (as an in-memory run samples them).
pub fn load(plan: &Plan, progress: &Progress, sample_limits: &[usize]) -> Result<Streamed> {
    let SplitPlan::FromColumn { column: split, .. } = &plan.split else {
        return Err(Error::internal("streaming needs a from-column split"));
    };
    let source = &plan.sources[0];
    let paths = data::expand(source, plan)?;
    let columns: Vec<String> = plan.columns.iter().map(|c| c.name.clone()).collect();
    let fitted: Vec<FittedFeatures> = features::fit_without_rows(plan)?;
    let mut files = paths
        .iter()
        .map(|p| SourceFile::hashed(p, plan, source))
        .collect::<Result<Vec<_>>>()?;
    let acc = Arc::new(Mutex::new(Acc {
        file: 0,
        row: 0,
        x: vec![],
        is_anomaly: vec![],
        origin: vec![],
        ids: plan.id_column.as_ref().map(|_| data::TextColumn::default()),
        hashes: vec![],
        parts: vec![],
        pending: vec![],
        pending_origin: vec![],
        train_hashes: vec![],
        train_counts: Counts::default(),
        kept: TrainRows::new(columns.len()),
        dropped: Dropped::default(),
        error: None,
    }));
    let counter = Arc::new(progress.rows("streaming the data"));
    let label = plan.label.as_ref().expect("checked by the spec");
    let mut text: Vec<String> = vec![label.column.name.clone(), split.name.clone()];
    text.extend(plan.id_column.iter().map(|c| c.name.clone()));
    let used: Vec<String> = columns.iter().chain(&text).cloned().collect();
    for (fi, file) in files.clone().iter().enumerate() {
        let wanted: Vec<&str> = used.iter().map(String::as_str).collect();
        data::refuse_repeated_names(&file.path, &file.shown, file.format, &wanted)?;
        let present: Vec<String> = data::columns_of(&file.path, file.format)?
            .into_iter()
            .map(|c| c.0)
            .collect();
        for c in plan.columns.iter().chain(
            [&label.column, split]
                .into_iter()
                .chain(plan.id_column.iter()),
        ) {
            if !present.contains(&c.name) {
                return Err(data::missing_column(plan, c, &file.shown, &present));
            }
        }
        {
            let mut a = acc.lock().expect("not poisoned");
            a.file = fi as u32;
            a.row = 0;
        }
        if file.format == Format::Csv
            && plain_file(plan, &acc, &fitted, &mut files, fi, split, &counter)?
        {
            continue;
        }
        let err = |e: PolarsError| crate::data::read_error(&file.path, e);
        let ppath = PlRefPath::try_from_path(&file.path).map_err(err)?;
        let lf = match file.format {
            Format::Csv => {
                let mut schema = Schema::default();
                for c in &columns {
                    schema.with_column(c.as_str().into(), DataType::Float64);
                }
                LazyCsvReader::new(ppath)
                    .with_has_header(true)
                    .with_infer_schema_length(Some(0))
                    .with_dtype_overwrite(Some(Arc::new(schema)))
                    .finish()
                    .map_err(err)?
            }
            Format::Parquet => {
                LazyFrame::scan_parquet(ppath, ScanArgsParquet::default()).map_err(err)?
            }
        };
        let lf = lf.select(
            columns
                .iter()
                .map(|c| col(c.as_str()).cast(DataType::Float64))
                .chain(text.iter().map(|c| col(c.as_str()).cast(DataType::String)))
                .collect::<Vec<_>>(),
        );
        let callback = {
            let acc = acc.clone();
            let counter = counter.clone();
            let plan = plan.clone();
            let fitted = fitted.clone();
            let files = files.clone();
            let split_col = split.name.clone();
            let ncols = columns.len();
            move |df: DataFrame| -> PolarsResult<bool> {
                let mut a = acc.lock().expect("not poisoned");
                if a.error.is_some() {
                    return Ok(true);
                }
                let ctx = Ctx {
                    plan: &plan,
                    fitted: &fitted,
                    files: &files,
                    ncols,
                };
                let batch = Columns::of_frame(&df, &plan, &split_col)
                    .and_then(|cols| ctx.batch(&mut a, cols, &split_col));
                if let Err(e) = batch {
                    a.error = Some(e);
                    return Ok(true);
                }
                counter.add(df.height() as u64);
                Ok(false)
            }
        };
        let outcome = lf
            .sink_batches(PlanCallback::new(callback), true, None)
            .and_then(|lf| lf.collect_with_engine(Engine::Streaming));
        let mut a = acc.lock().expect("not poisoned");
        if let Some(e) = a.error.take() {
            return Err(e);
        }
        if let Err(e) = outcome {
            return Err(crate::data::not_a_number(
                &file.path,
                file.format == Format::Csv,
                &used[..columns.len()],
                e,
            ));
        }
        files[fi].rows = a.row as usize;
    }
    drop(counter);
    let mut a = Arc::try_unwrap(acc)
        .map_err(|_| Error::internal("the streaming state is still shared"))?
        .into_inner()
        .expect("not poisoned");
    let rest = a.pending_origin.len();
    let ctx = Ctx {
        plan,
        fitted: &fitted,
        files: &files,
        ncols: columns.len(),
    };
    ctx.fold(&mut a, rest)?;
    a.train_hashes.sort_unstable();
    let strides: Vec<usize> = sample_limits
        .iter()
        .map(|&l| a.train_hashes.len().div_ceil(l.max(1)).max(1))
        .collect();
    let stage = progress.stage("folding the training rows' moments");
    let kept = std::mem::replace(&mut a.kept, TrainRows::new(0));
    let (moments, train_sample, samples) = kept.finish(&fitted, &columns, &strides)?;
    drop(stage);
    let n = a.is_anomaly.len();
    let x = Array2::from_shape_vec((n, columns.len()), std::mem::take(&mut a.x))
        .map_err(|e| Error::internal(format!("the kept rows: {e}")))?;
    Ok(Streamed {
        data: Dataset {
            files,
            columns,
            x,
            is_anomaly: a.is_anomaly,
            origin: a.origin,
            ids: a.ids,
            text: BTreeMap::new(),
            dropped: a.dropped,
        },
        hashes: a.hashes,
        parts: a.parts,
        train_hashes: a.train_hashes,
        train_counts: a.train_counts,
        fitted,
        moments,
        train_sample,
        samples,
    })
}
