//! Data larger than memory (`data.stream: true`): a plain CSV file is read
//! in fixed-size chunks by the plain-CSV reader (`data::fast::Chunks`), and
//! anything else (Parquet, or a CSV file the plain reader gives up on, which
//! is then read again from its first line) by polars' streaming engine in
//! batches. Either way, training rows are hashed and folded
//! into mergeable sufficient statistics (count, mean and co-moment matrix per
//! feature set), block by block, and then dropped. Only the validation and
//! test rows, and 32 bytes of content hash per training row (for the train
//! manifest and the leakage check), stay in memory.
//!
//! Blocks are fixed runs of [`BLOCK`] training rows in file order, whatever
//! batches the engine delivers, and blocks merge in order by the pairwise
//! update of Chan, Golub and LeVeque (1979), so the same file gives the same
//! bits on every run and thread count. (The bits differ in the last places from
//! an in-memory fit, which sums in content-hash order.)

use std::collections::BTreeMap;
use std::sync::{Arc, Mutex};

use ndarray::{Array2, ArrayView2};
use polars::prelude::*;

use crate::audit::hash::{self, ContentHash};
use crate::audit::leak::Part;
use crate::data::{self, Dataset, Dropped, Format, Origin, SourceFile};
use crate::detect::{self, Model};
use crate::error::{Error, Result, RowUnit};
use crate::features::{self, FittedFeatures};
use crate::progress::Progress;
use crate::rules;
use crate::spec::{DetectorKind, MissingPolicy, Plan, SplitPlan};
use crate::split::Counts;

/// Training rows per block of sufficient statistics.
pub const BLOCK: usize = 65_536;

/// Count, mean and co-moment matrix Σ (x − x̄)(x − x̄)ᵀ (row-major, d × d).
#[derive(Debug, Clone, PartialEq)]
pub struct Moments {
    /// Rows.
    pub n: u64,
    /// Mean.
    pub mean: Vec<f64>,
    /// Co-moment matrix.
    pub m2: Vec<f64>,
}

impl Moments {
    /// No rows yet.
    pub fn empty(d: usize) -> Self {
        Moments {
            n: 0,
            mean: vec![0.0; d],
            m2: vec![0.0; d * d],
        }
    }

    /// The moments of one block, two-pass (mean first, then centred products).
    pub fn of_block(x: ArrayView2<'_, f64>) -> Self {
        let (n, d) = x.dim();
        let mut mean = vec![0.0; d];
        for row in x.rows() {
            for (s, v) in mean.iter_mut().zip(row.iter()) {
                *s += v;
            }
        }
        for s in mean.iter_mut() {
            *s /= n as f64;
        }
        let mut m2 = vec![0.0; d * d];
        let mut c = vec![0.0; d];
        for row in x.rows() {
            for (cj, (v, mu)) in c.iter_mut().zip(row.iter().zip(&mean)) {
                *cj = v - mu;
            }
            for a in 0..d {
                for b in 0..=a {
                    m2[a * d + b] += c[a] * c[b];
                }
            }
        }
        for a in 0..d {
            for b in 0..a {
                m2[b * d + a] = m2[a * d + b];
            }
        }
        Moments {
            n: n as u64,
            mean,
            m2,
        }
    }

    /// Folds `other` in: the pairwise update (Chan, Golub and LeVeque 1979).
    pub fn merge(&mut self, other: &Moments) {
        if other.n == 0 {
            return;
        }
        if self.n == 0 {
            *self = other.clone();
            return;
        }
        let d = self.mean.len();
        let (na, nb) = (self.n as f64, other.n as f64);
        let n = na + nb;
        let delta: Vec<f64> = other
            .mean
            .iter()
            .zip(&self.mean)
            .map(|(b, a)| b - a)
            .collect();
        for (m, dl) in self.mean.iter_mut().zip(&delta) {
            *m += dl * (nb / n);
        }
        let w = na * nb / n;
        for a in 0..d {
            for b in 0..d {
                self.m2[a * d + b] += other.m2[a * d + b] + delta[a] * delta[b] * w;
            }
        }
        self.n += other.n;
    }

    /// The maximum-likelihood covariance M2 / n.
    pub fn covariance(&self) -> Vec<f64> {
        self.m2.iter().map(|v| v / self.n as f64).collect()
    }
}

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
    /// Per feature set: the training rows' moments.
    pub moments: Vec<Moments>,
}

/// Fits a Gaussian detector from training moments.
pub fn fit(kind: DetectorKind, m: &Moments, names: &[String]) -> Result<Box<dyn Model>> {
    let name = detect::name(kind);
    let d = m.mean.len();
    let cov = m.covariance();
    let constant: Vec<String> = (0..d)
        .filter(|&j| cov[j * d + j] <= 0.0 || !cov[j * d + j].is_finite())
        .map(|j| names[j].clone())
        .collect();
    if !constant.is_empty() {
        return Err(rules::zero_variance(name, constant));
    }
    match kind {
        DetectorKind::IndependentGaussian => {
            let variance = (0..d).map(|j| cov[j * d + j]).collect();
            Ok(detect::restore_independent(m.mean.clone(), variance))
        }
        DetectorKind::MultivariateGaussian => {
            rules::refuse_too_few_for_covariance(name, m.n, d)?;
            detect::restore_multivariate(m.mean.clone(), cov, names)
        }
        other => Err(Error::internal(format!(
            "`{}` cannot be fitted from moments",
            detect::name(other)
        ))),
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
    moments: Vec<Moments>,
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
            moments: self.moments.clone(),
            dropped: self.dropped.clone(),
        }
    }

    fn reset(&mut self, m: Mark) {
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
        self.moments = m.moments;
        self.dropped = m.dropped;
        self.row = 0;
        self.error = None;
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
    moments: Vec<Moments>,
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

    /// Folds the first `rows` pending training rows into the moments.
    fn fold(&self, acc: &mut Acc, rows: usize) -> Result<()> {
        if rows == 0 {
            return Ok(());
        }
        let c = self.ncols;
        let columns: Vec<Vec<f64>> = (0..c)
            .map(|j| (0..rows).map(|i| acc.pending[i * c + j]).collect())
            .collect();
        for (s, f) in self.fitted.iter().enumerate() {
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
            let block = Moments::of_block(x.view());
            acc.moments[s].merge(&block);
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
) -> bool {
    let label = plan.label.as_ref().expect("checked by the spec");
    let numeric: Vec<&crate::spec::Column> = plan.columns.iter().collect();
    let mut text: Vec<&crate::spec::Column> = vec![&label.column, split];
    text.extend(plan.id_column.iter());
    let Some(mut chunks) = data::fast::Chunks::open(&files[fi].path, &numeric, &text, None) else {
        return false;
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
        a.reset(mark);
    }
    done
}

/// Streams the plan's one labelled source.
pub fn load(plan: &Plan, progress: &Progress) -> Result<Streamed> {
    let SplitPlan::FromColumn { column: split, .. } = &plan.split else {
        return Err(Error::internal("streaming needs a from-column split"));
    };
    let source = &plan.sources[0];
    let paths = data::expand(source, plan)?;
    let columns: Vec<String> = plan.columns.iter().map(|c| c.name.clone()).collect();
    let empty = Dataset {
        files: vec![],
        columns: columns.clone(),
        x: Array2::zeros((0, columns.len())),
        is_anomaly: vec![],
        origin: vec![],
        ids: None,
        text: BTreeMap::new(),
        dropped: Dropped::default(),
    };
    let fitted: Vec<FittedFeatures> = plan
        .feature_sets
        .iter()
        .map(|s| features::fit(s, &empty, &[]))
        .collect::<Result<_>>()?;
    let mut files = Vec::new();
    for p in &paths {
        files.push(SourceFile {
            path: p.clone(),
            shown: data::shown(p, plan),
            format: data::format_of(p, plan, source)?,
            digest: hash::file(p)?,
            rows: 0,
        });
    }
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
        moments: fitted
            .iter()
            .map(|f| Moments::empty(f.features.len()))
            .collect(),
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
            && plain_file(plan, &acc, &fitted, &mut files, fi, split, &counter)
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
        moments: a.moments,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn merged_blocks_equal_the_moments_of_all_rows() {
        // Welford / Chan: merging the moments of two halves gives the moments
        // of the whole (common practice, no source); here to 1e-12 relative.
        let x = array![
            [1.0, 10.0],
            [2.0, 12.5],
            [4.0, 9.0],
            [8.0, 15.0],
            [3.0, 11.0],
            [5.5, 13.0],
            [7.0, 8.5]
        ];
        let whole = Moments::of_block(x.view());
        let mut merged = Moments::of_block(x.slice(ndarray::s![..3, ..]));
        merged.merge(&Moments::of_block(x.slice(ndarray::s![3.., ..])));
        assert_eq!(merged.n, 7);
        for (a, b) in merged.mean.iter().zip(&whole.mean) {
            assert!((a - b).abs() <= 1e-12 * b.abs());
        }
        for (a, b) in merged.m2.iter().zip(&whole.m2) {
            assert!((a - b).abs() <= 1e-12 * b.abs().max(1.0), "{a} {b}");
        }
        // Python's statistics.pvariance([1, 2, 4, 8, 3, 5.5, 7]) = 5.76530612244898.
        assert!((merged.covariance()[0] - 5.765_306_122_448_98).abs() < 1e-12);
    }
}
