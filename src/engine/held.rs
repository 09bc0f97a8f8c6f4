//! The held splits (validation and test) on an engine
//! ([`crate::protocol::held::HeldSplits`]): their rows stay in the engine's
//! `assigned` view; a candidate's scores are computed there by
//! `anomark_score` with its fitted parameters carried in the plan, and the
//! client receives only what a stage reads of them:
//!
//! - the evaluation summary (`engine::summary`: the anomaly scores, then the
//!   rows per cut point and gap), with a score that is not a number refused
//!   first, naming its row as in process;
//! - the score figures' facts: the order statistics the axes need
//!   (`card::plots::axis_ranks`), found exactly by four grouping passes of
//!   16 bits each over the scores' order keys (`functions::axis_prefix`),
//!   then the histogram counts per class on the bins those fix
//!   (`functions::score_bin`), each at most 65,536 groups a pass;
//! - for the chosen candidate, the validation normals' scores in ascending
//!   order, which run.json records as the conformal calibration (one number
//!   per validation normal, without place, id or label).
//!
//! Every number is the library's: the engine functions call it.

use std::collections::BTreeMap;

use datafusion::arrow::array::{Array, Int64Array};
use datafusion::prelude::SessionContext;

use super::{collect, functions, sql_bytes};
use crate::card::plots::{self, ScoreAxes, ScoreFacts};
use crate::conformal::{Calibration, Thinning};
use crate::data::SourceFile;
use crate::detect::{Model, Params};
use crate::error::{Error, Result};
use crate::part::Part;
use crate::protocol::held::{Asked, HeldSplits};
use crate::summary::Summary;

/// The held splits of an engine run: the session (and the runtime that
/// drives it) in which the `assigned` view holds every row with its split.
pub(crate) struct HeldOnEngine {
    /// Drives the session's queries (a cluster's connection lives in it).
    pub runtime: tokio::runtime::Runtime,
    /// The session with the `assigned` view.
    pub ctx: SessionContext,
    /// Per feature set, its columns in the view (`x0`, `x3`, …).
    pub sets: Vec<Vec<String>>,
    /// The source's files, to name a row.
    pub files: Vec<SourceFile>,
    /// The validation split's manifest.
    pub validation_manifest: String,
    /// Whether the view has the rows' ids (`id`).
    pub ids: bool,
}

/// Bits of an order key resolved per pass of the order statistics.
const DIGIT: u32 = 16;

impl HeldOnEngine {
    /// The SQL of `model`'s score of a row of the view (feature set `set`).
    fn score_sql(&self, set: usize, model: &dyn Model) -> Result<String> {
        let params = match model.params() {
            Params::IndependentGaussian { mean, variance } => {
                functions::ModelParams::Independent { mean, variance }
            }
            Params::MultivariateGaussian {
                mean, covariance, ..
            } => functions::ModelParams::Multivariate {
                mean,
                covariance: covariance.concat(),
            },
            _ => return Err(Error::internal("a detector an engine does not score")),
        };
        Ok(format!(
            "{}({}, {})",
            functions::SCORE,
            sql_bytes(&params.to_bytes()),
            self.sets[set].join(", ")
        ))
    }

    /// For each split of `parts`: the `k`-th smallest (from 0, in
    /// `f64::total_cmp` order) of its scores that `among` keeps, for each
    /// `k` of `ranks(split, count)` (each below the count of such scores),
    /// and that count; found by grouping on 16 more bits of the order key a
    /// pass, every split in the same pass over the rows.
    async fn order_statistics(
        &self,
        parts: &[Part],
        among: Among<'_>,
        ranks: impl Fn(Part, u64) -> Vec<usize>,
    ) -> Result<Vec<(u64, Vec<f64>)>> {
        let doing = among.doing();
        // Per split, per wanted rank: the prefix found so far and the rank
        // within it; and the split's count.
        let mut targets: Vec<Vec<(i64, u64)>> = vec![Vec::new(); parts.len()];
        let mut kept = vec![0u64; parts.len()];
        for pass in 0..4u32 {
            let shift = 64 - DIGIT * (pass + 1);
            let prefix = among.prefix(shift);
            let asked = |k: usize| format!("part = {}", parts[k] as i8);
            let within = if pass == 0 {
                (0..parts.len()).map(asked).collect::<Vec<_>>()
            } else {
                let mut within = Vec::new();
                for (k, t) in targets.iter().enumerate() {
                    let parents: std::collections::BTreeSet<i64> = t.iter().map(|t| t.0).collect();
                    if !parents.is_empty() {
                        let set: Vec<i64> = parents.into_iter().collect();
                        within.push(format!(
                            "{} AND {}({}, {})",
                            asked(k),
                            functions::AMONG,
                            sql_bytes(&functions::i64_le_bytes(&set)),
                            among.prefix(shift + DIGIT)
                        ));
                    }
                }
                within
            };
            if within.is_empty() {
                break;
            }
            let rows = collect(
                &self.ctx,
                doing,
                &format!(
                    "SELECT part, p, COUNT(*) FROM (SELECT part, {prefix} AS p FROM assigned \
                     WHERE ({}){rows}) WHERE p IS NOT NULL GROUP BY part, p",
                    within.join(") OR ("),
                    rows = among.rows(),
                ),
            )
            .await?;
            let mut groups: Vec<BTreeMap<i64, u64>> = vec![BTreeMap::new(); parts.len()];
            for b in &rows {
                let (part, p, n) = (
                    super::column::<datafusion::arrow::array::Int8Array>(b, 0)?,
                    super::column::<Int64Array>(b, 1)?,
                    int64s(b, 2)?,
                );
                for i in 0..b.num_rows() {
                    let k = index_of(parts, part.value(i))?;
                    *groups[k].entry(p.value(i)).or_default() += n.value(i) as u64;
                }
            }
            for (k, (groups, targets)) in groups.iter().zip(targets.iter_mut()).enumerate() {
                if pass == 0 {
                    kept[k] = groups.values().sum();
                    let wanted = ranks(parts[k], kept[k]);
                    if wanted.iter().any(|&r| r as u64 >= kept[k]) {
                        return Err(Error::internal("an order statistic beyond the scores"));
                    }
                    *targets = wanted.into_iter().map(|r| (0, r as u64)).collect();
                }
                narrow(groups, targets, pass)?;
            }
        }
        Ok(kept
            .into_iter()
            .zip(targets)
            .map(|(kept, targets)| {
                let values = targets
                    .iter()
                    .map(|t| functions::from_order_key(t.0))
                    .collect();
                (kept, values)
            })
            .collect())
    }

    /// The summaries of split `part` under each (candidate name, score
    /// expression, extra cut points) of `asked`, in the same two passes; a
    /// score that is not a number is refused as in process, for the first
    /// candidate asked that has one, naming its first such row.
    async fn summaries_async(
        &self,
        part: Part,
        asked: &[(&str, String, &[f64])],
    ) -> Result<Vec<Summary>> {
        let scores: Vec<(&str, &[f64])> = asked.iter().map(|(_, s, e)| (s.as_str(), *e)).collect();
        let j = match super::summaries(&self.ctx, "assigned", part as i8, &scores).await? {
            super::Summaries::All(all) => return Ok(all),
            super::Summaries::NotANumber(j) => j,
        };
        let (name, score, _) = &asked[j];
        // The first such row in the split's canonical (content hash, row) order.
        let nan = collect(
            &self.ctx,
            "checking the scores",
            &format!(
                "SELECT f, r FROM (SELECT h, f, r, {score} AS s FROM assigned WHERE part = {}) \
                 WHERE isnan(s) ORDER BY h, f, r LIMIT 1",
                part as i8
            ),
        )
        .await?;
        if let Some(b) = nan.iter().find(|b| b.num_rows() > 0) {
            let (f, r) = (int64s(b, 0)?, int64s(b, 1)?);
            let file = &self.files[f.value(0) as usize];
            let at = format!(
                "{} {} {}",
                file.shown,
                file.format.unit().word(),
                file.format.place(r.value(0) as u64)
            );
            return Err(Error::Fit {
                detector: String::new(),
                message: format!("the score of {at} is not a number"),
                features: vec![],
            }
            .in_candidate(*name));
        }
        Err(Error::internal("a score not a number, then not found"))
    }

    /// The score figures' facts of each split of `splits` (with its
    /// evaluation summary, τ countable in it) under `score` at τ: the axes'
    /// order statistics and then the histograms' bins, every split in the
    /// same passes over the rows.
    async fn facts_async(
        &self,
        splits: &[(Part, &Summary)],
        score: &str,
        tau: f64,
    ) -> Result<Vec<ScoreFacts>> {
        let at = splits
            .iter()
            .map(|(_, summary)| {
                summary
                    .confusion_at(tau)
                    .ok_or_else(|| Error::internal("τ inside a gap of the figures' summary"))
            })
            .collect::<Result<Vec<_>>>()?;
        let parts: Vec<Part> = splits.iter().map(|s| s.0).collect();
        let ordered = self
            .order_statistics(&parts, Among::Axis(score), |_, kept| {
                plots::axis_ranks(kept as usize)
            })
            .await?;
        let mut axes = Vec::with_capacity(splits.len());
        let mut bins = Vec::with_capacity(splits.len());
        for (&(part, summary), (kept, values)) in splits.iter().zip(&ordered) {
            let a = ScoreAxes::new(summary.rows() - kept, values, tau);
            let r = a.score_range();
            bins.push(format!(
                "WHEN {} THEN {}({}, {score})",
                part as i8,
                functions::BIN,
                sql_bytes(&functions::le_bytes(&[r.start, r.end]))
            ));
            axes.push(a);
        }
        let list: Vec<String> = parts.iter().map(|&p| (p as i8).to_string()).collect();
        let rows = collect(
            &self.ctx,
            "counting the scores per histogram bin",
            &format!(
                "SELECT part, a, b, COUNT(*) FROM (SELECT part, a, CASE part {} END AS b FROM \
                 assigned WHERE part IN ({})) GROUP BY part, a, b",
                bins.join(" "),
                list.join(", ")
            ),
        )
        .await?;
        // Per split and class: rows per bin, and rows in no bin.
        let mut classes: Vec<[(Vec<u64>, u64); 2]> = (0..splits.len())
            .map(|_| std::array::from_fn(|_| (vec![0u64; plots::SCORE_BINS], 0u64)))
            .collect();
        for b in &rows {
            let part = super::column::<datafusion::arrow::array::Int8Array>(b, 0)?;
            let a = super::column::<datafusion::arrow::array::BooleanArray>(b, 1)?;
            let (bin, n) = (super::column::<Int64Array>(b, 2)?, int64s(b, 3)?);
            for i in 0..b.num_rows() {
                let k = index_of(&parts, part.value(i))?;
                let class = &mut classes[k][usize::from(a.value(i))];
                let n = n.value(i) as u64;
                match usize::try_from(bin.value(i)) {
                    Ok(k) if k < plots::SCORE_BINS => class.0[k] += n,
                    _ => class.1 += n,
                }
            }
        }
        at.into_iter()
            .zip(axes)
            .zip(classes)
            .map(|((at, axes), [normal, anomalous])| ScoreFacts::new(at, axes, normal, anomalous))
            .collect()
    }

    async fn scores_digest_async(&self, scores: &[String], test: bool) -> Result<String> {
        // Each scored row's hash made on the engine, then the digest as a
        // split manifest: bucket digests there, joined here.
        let parts = if test { "1, 2" } else { "1" };
        collect(
            &self.ctx,
            "hashing the scores",
            &format!(
                "CREATE OR REPLACE VIEW anomark_scored AS SELECT {}(part, f, r, a, {}) AS h, \
                 CAST(0 AS TINYINT) AS part FROM assigned WHERE part IN ({parts})",
                functions::SCORE_ROW,
                scores.join(", ")
            ),
        )
        .await?;
        super::manifest(&self.ctx, "anomark_scored", 0).await
    }

    async fn write_scores_async(
        &self,
        dir: &std::path::Path,
        scores: &[String],
        names: &[String],
        test: bool,
    ) -> Result<Vec<String>> {
        let parts = if test { "1, 2" } else { "1" };
        let rows = collect(
            &self.ctx,
            "writing the scores",
            &format!(
                "SELECT {w}({dir}, {names}, g, part, f, r, a, {id}, {scores}) FROM (SELECT *, \
                 CAST({p}(h) / {per} AS BIGINT) AS g FROM assigned WHERE part IN ({parts})) \
                 GROUP BY g",
                id = if self.ids {
                    "id"
                } else {
                    "CAST(NULL AS VARCHAR)"
                },
                w = functions::WRITE_SCORES,
                dir = sql_bytes(dir.to_string_lossy().as_bytes()),
                names = sql_bytes(names.join("\n").as_bytes()),
                scores = scores.join(", "),
                p = functions::PREFIX16,
                per = 65_536 / SCORE_PARTS,
            ),
        )
        .await?;
        let mut files = Vec::new();
        for b in &rows {
            let c = super::column::<datafusion::arrow::array::BinaryArray>(b, 0)?;
            for i in 0..b.num_rows() {
                if !c.value(i).is_empty() {
                    files.push(String::from_utf8_lossy(c.value(i)).into_owned());
                }
            }
        }
        files.sort();
        Ok(files)
    }

    /// The calibration of `part`'s `n` normal rows, thinned as
    /// [`Calibration::thinned`] thins them in memory: every score while
    /// they are few; else the highest `tail` by a bounded top-k sort and
    /// the order statistics below by [`HeldOnEngine::order_statistics`], so
    /// the client receives at most `tail + body` scores whatever the rows.
    async fn calibration_async(
        &self,
        part: Part,
        score: &str,
        n: usize,
        thinning: Thinning,
    ) -> Result<Calibration> {
        let doing = "reading the calibration scores";
        let key = format!("{}({score})", functions::ORDER_KEY);
        // The scores of order keys, ascending (order keys sort as
        // `f64::total_cmp` does; equal keys, equal bits).
        let scores_of =
            |rows: &[datafusion::arrow::record_batch::RecordBatch]| -> Result<Vec<f64>> {
                let mut keys = Vec::new();
                for b in rows {
                    keys.extend_from_slice(super::column::<Int64Array>(b, 0)?.values());
                }
                keys.sort_unstable();
                Ok(keys.into_iter().map(functions::from_order_key).collect())
            };
        let normals = format!("FROM assigned WHERE part = {} AND NOT a", part as i8);
        let ranks = thinning.ranks(n);
        let sorted = match &ranks {
            None => {
                scores_of(&collect(&self.ctx, doing, &format!("SELECT {key} {normals}")).await?)?
            }
            Some(ranks) => {
                let tail = scores_of(
                    &collect(
                        &self.ctx,
                        doing,
                        &format!(
                            "SELECT k FROM (SELECT {key} AS k {normals}) ORDER BY k DESC LIMIT {}",
                            thinning.tail
                        ),
                    )
                    .await?,
                )?;
                let body: Vec<usize> = ranks[..ranks.len() - thinning.tail]
                    .iter()
                    .map(|r| r - 1)
                    .collect();
                let (count, values) = self
                    .order_statistics(&[part], Among::Normals(score), |_, _| body.clone())
                    .await?
                    .pop()
                    .ok_or_else(|| Error::internal("no order statistics of the calibration"))?;
                if count != n as u64 {
                    return Err(Error::internal(
                        "the calibration rows counted twice differently",
                    ));
                }
                values.into_iter().chain(tail).collect()
            }
        };
        Calibration::from_kept(n, sorted, ranks).ok_or_else(|| {
            Error::internal("the engine's calibration scores do not fit their count")
        })
    }
}

/// Where the split of an engine's `part` value stands among `parts` (the
/// splits a query asked about).
fn index_of(parts: &[Part], part: i8) -> Result<usize> {
    parts
        .iter()
        .position(|&p| p as i8 == part)
        .ok_or_else(|| Error::internal(format!("an answer for split {part}, not asked for")))
}

/// One pass of [`HeldOnEngine::order_statistics`] for one split: each
/// target (its prefix so far and its rank within it) moved to the group of
/// this pass (`groups`: prefix one digit longer → rows) that holds its
/// rank, and its rank within that group. The groups' running counts are
/// searched twice per target (thousands of targets among as many groups,
/// for the calibration), not walked.
fn narrow(groups: &BTreeMap<i64, u64>, targets: &mut [(i64, u64)], pass: u32) -> Result<()> {
    let keys: Vec<i64> = groups.keys().copied().collect();
    let mut before = Vec::with_capacity(keys.len() + 1);
    before.push(0u64);
    for n in groups.values() {
        before.push(before[before.len() - 1] + n);
    }
    for t in targets.iter_mut() {
        // The groups under the target's prefix: all of them in the first
        // pass, else those whose prefix one digit shorter is the target's.
        let (lo, hi) = if pass == 0 {
            (0, keys.len())
        } else {
            (
                keys.partition_point(|&p| p >> DIGIT < t.0),
                keys.partition_point(|&p| p >> DIGIT <= t.0),
            )
        };
        // The first group whose rows, counted from the range's start, pass
        // the target's rank.
        let want = before[lo] + t.1;
        let k = lo + before[lo + 1..=hi].partition_point(|&b| b <= want);
        if k >= hi {
            return Err(Error::internal(
                "an order statistic not found in its prefix's groups",
            ));
        }
        *t = (keys[k], want - before[k]);
    }
    Ok(())
}

/// Which scores [`HeldOnEngine::order_statistics`] orders: those of a
/// score expression within the figures' axis limit, or those of the
/// normal rows, all of them.
#[derive(Debug, Clone, Copy)]
enum Among<'a> {
    /// `score` within the figures' axis limit, every row.
    Axis(&'a str),
    /// `score` of the normal rows.
    Normals(&'a str),
}

impl Among<'_> {
    /// The leading `64 − shift` bits of a score's order key (null when not kept).
    fn prefix(self, shift: u32) -> String {
        match self {
            Among::Axis(score) => format!("{}({score}, {shift})", functions::AXIS_PREFIX),
            Among::Normals(score) => format!("({}({score}) >> {shift})", functions::ORDER_KEY),
        }
    }

    /// The rows' condition beyond the split's.
    fn rows(self) -> &'static str {
        match self {
            Among::Axis(_) => "",
            Among::Normals(_) => " AND NOT a",
        }
    }

    /// What the engine is doing, for its errors.
    fn doing(self) -> &'static str {
        match self {
            Among::Axis(_) => "ordering the scores for the figures",
            Among::Normals(_) => "ordering the calibration scores",
        }
    }
}

/// Parts of the scores written by an engine: at most 256, one per first
/// byte of the rows' content hashes (so a part's rows, and its bytes, do
/// not depend on how the engine partitioned them).
pub const SCORE_PARTS: usize = 256;

/// `anomark_write_scores`'s accumulator: one group's scored rows (split,
/// file, row in file, label, id, each candidate's score), kept encoded
/// until the group is complete, then written as one Parquet file, rows in
/// (split, file, row) order, into the folder named by the call.
#[derive(Debug, Default)]
pub(crate) struct ScoresWriter {
    /// The group, the folder, the candidates' names (`\n`-joined) and
    /// whether the rows have ids.
    header: Option<(i64, Vec<u8>, Vec<u8>, bool)>,
    /// Scores a row.
    k: usize,
    /// Rows: split (1 byte), file and row (i64 LE each), label (1 byte),
    /// the id's length (u32 LE) and bytes, then `k` scores (f64 LE).
    rows: Vec<u8>,
}

type DfResult<T> = datafusion::common::Result<T>;

/// One decoded row of a [`ScoresWriter`].
struct ScoredRow<'a> {
    part: u8,
    file: i64,
    row: i64,
    label: u8,
    id: &'a [u8],
    scores: &'a [u8],
}

impl ScoresWriter {
    fn state_bytes(&self) -> Vec<u8> {
        let mut v = Vec::new();
        if let Some((g, dir, names, ids)) = &self.header {
            v.extend_from_slice(&g.to_le_bytes());
            for b in [dir, names] {
                v.extend_from_slice(&(b.len() as u32).to_le_bytes());
                v.extend_from_slice(b);
            }
            v.push(u8::from(*ids));
            v.extend_from_slice(&(self.k as u32).to_le_bytes());
            v.extend_from_slice(&self.rows);
        }
        v
    }

    /// The rows, decoded.
    fn decoded(&self) -> DfResult<Vec<ScoredRow<'_>>> {
        let bad = || functions::fail(format!("{}: a malformed row", functions::WRITE_SCORES));
        let b = &self.rows;
        let mut out = Vec::new();
        let mut at = 0;
        while at < b.len() {
            let fixed = b.get(at..at + 22).ok_or_else(bad)?;
            let n = u32::from_le_bytes(fixed[18..22].try_into().expect("4 bytes")) as usize;
            let id = b.get(at + 22..at + 22 + n).ok_or_else(bad)?;
            let end = at + 22 + n + 8 * self.k;
            let scores = b.get(at + 22 + n..end).ok_or_else(bad)?;
            out.push(ScoredRow {
                part: fixed[0],
                file: i64::from_le_bytes(fixed[1..9].try_into().expect("8 bytes")),
                row: i64::from_le_bytes(fixed[9..17].try_into().expect("8 bytes")),
                label: fixed[17],
                id,
                scores,
            });
            at = end;
        }
        Ok(out)
    }
}

impl datafusion::logical_expr::Accumulator for ScoresWriter {
    fn update_batch(&mut self, values: &[datafusion::arrow::array::ArrayRef]) -> DfResult<()> {
        use datafusion::arrow::compute::cast;
        use datafusion::arrow::datatypes::DataType;
        const W: &str = functions::WRITE_SCORES;
        if values.len() < 8 || values[0].is_empty() {
            return Ok(());
        }
        let int = |a: &datafusion::arrow::array::ArrayRef| -> DfResult<Int64Array> {
            cast(a, &DataType::Int64)?
                .as_any()
                .downcast_ref::<Int64Array>()
                .cloned()
                .ok_or_else(|| functions::fail(format!("{W}: want integers")))
        };
        let (dir, names) = (
            functions::binaries(&values[0], W)?,
            functions::binaries(&values[1], W)?,
        );
        let (g, part, f, r) = (
            int(&values[2])?,
            int(&values[3])?,
            int(&values[4])?,
            int(&values[5])?,
        );
        let a = functions::bools(&values[6], W)?;
        let ids = cast(&values[7], &DataType::Utf8)?;
        let ids = ids
            .as_any()
            .downcast_ref::<datafusion::arrow::array::StringArray>()
            .ok_or_else(|| functions::fail(format!("{W}: want text ids")))?;
        let scores: Vec<&datafusion::arrow::array::Float64Array> = values[8..]
            .iter()
            .map(|c| functions::f64s(c, W))
            .collect::<DfResult<_>>()?;
        if self.header.is_none() {
            // A run without an id column passes NULL ids.
            let with_ids = ids.null_count() < ids.len();
            self.header = Some((
                g.value(0),
                dir.value(0).to_vec(),
                names.value(0).to_vec(),
                with_ids,
            ));
            self.k = scores.len();
        }
        for i in 0..part.len() {
            self.rows.push(part.value(i) as u8);
            self.rows.extend_from_slice(&f.value(i).to_le_bytes());
            self.rows.extend_from_slice(&r.value(i).to_le_bytes());
            self.rows.push(u8::from(a.value(i)));
            let id = if ids.is_null(i) { "" } else { ids.value(i) };
            self.rows
                .extend_from_slice(&(id.len() as u32).to_le_bytes());
            self.rows.extend_from_slice(id.as_bytes());
            for s in &scores {
                self.rows.extend_from_slice(&s.value(i).to_le_bytes());
            }
        }
        Ok(())
    }

    fn evaluate(&mut self) -> DfResult<datafusion::common::ScalarValue> {
        use datafusion::arrow::array::{ArrayRef, Float64Array, StringArray};
        use datafusion::arrow::datatypes::{DataType, Field, Schema};
        let Some((g, dir, names, with_ids)) = self.header.clone() else {
            return Ok(datafusion::common::ScalarValue::Binary(Some(vec![])));
        };
        let mut rows = self.decoded()?;
        rows.sort_unstable_by_key(|r| (r.part, r.file, r.row));
        let names = String::from_utf8_lossy(&names).into_owned();
        let names: Vec<&str> = names.split('\n').collect();
        let mut fields = Vec::new();
        let mut columns: Vec<ArrayRef> = Vec::new();
        if with_ids {
            fields.push(Field::new("id", DataType::Utf8, false));
            columns.push(std::sync::Arc::new(StringArray::from(
                rows.iter()
                    .map(|r| String::from_utf8_lossy(r.id).into_owned())
                    .collect::<Vec<_>>(),
            )));
        }
        fields.extend([
            Field::new("split", DataType::Utf8, false),
            Field::new("file", DataType::Int64, false),
            Field::new("row", DataType::Int64, false),
            Field::new("label", DataType::Int64, false),
        ]);
        columns.extend([
            std::sync::Arc::new(StringArray::from(
                rows.iter()
                    .map(|r| Part::ALL[usize::from(r.part).min(2)].name())
                    .collect::<Vec<_>>(),
            )) as ArrayRef,
            std::sync::Arc::new(Int64Array::from(
                rows.iter().map(|r| r.file).collect::<Vec<_>>(),
            )),
            std::sync::Arc::new(Int64Array::from(
                rows.iter().map(|r| r.row).collect::<Vec<_>>(),
            )),
            std::sync::Arc::new(Int64Array::from(
                rows.iter().map(|r| i64::from(r.label)).collect::<Vec<_>>(),
            )),
        ]);
        for (c, name) in names.iter().enumerate().take(self.k) {
            fields.push(Field::new(*name, DataType::Float64, false));
            columns.push(std::sync::Arc::new(Float64Array::from(
                rows.iter()
                    .map(|r| {
                        f64::from_le_bytes(r.scores[8 * c..8 * c + 8].try_into().expect("8 bytes"))
                    })
                    .collect::<Vec<_>>(),
            )));
        }
        let schema = std::sync::Arc::new(Schema::new(fields));
        let batch = datafusion::arrow::record_batch::RecordBatch::try_new(schema.clone(), columns)?;
        let name = format!("part-{g:03}.parquet");
        let path = std::path::Path::new(&*String::from_utf8_lossy(&dir)).join(&name);
        let file = std::fs::File::create(&path)
            .map_err(|e| functions::fail(format!("creating `{}`: {e}", path.display())))?;
        let mut writer = datafusion::parquet::arrow::ArrowWriter::try_new(file, schema, None)?;
        writer.write(&batch)?;
        writer.close()?;
        Ok(datafusion::common::ScalarValue::Binary(Some(
            name.into_bytes(),
        )))
    }

    fn size(&self) -> usize {
        std::mem::size_of_val(self) + self.rows.capacity()
    }

    fn state(&mut self) -> DfResult<Vec<datafusion::common::ScalarValue>> {
        Ok(vec![datafusion::common::ScalarValue::Binary(Some(
            self.state_bytes(),
        ))])
    }

    fn merge_batch(&mut self, states: &[datafusion::arrow::array::ArrayRef]) -> DfResult<()> {
        let s = functions::binaries(&states[0], functions::WRITE_SCORES)?;
        for i in 0..s.len() {
            if s.is_null(i) || s.value(i).is_empty() {
                continue;
            }
            let b = s.value(i);
            let malformed =
                || functions::fail(format!("{}: a malformed state", functions::WRITE_SCORES));
            let u32_at = |at: usize| -> DfResult<usize> {
                Ok(u32::from_le_bytes(
                    b.get(at..at + 4)
                        .ok_or_else(malformed)?
                        .try_into()
                        .expect("4 bytes"),
                ) as usize)
            };
            let g = i64::from_le_bytes(b.get(..8).ok_or_else(malformed)?.try_into().expect("8"));
            let dl = u32_at(8)?;
            let dir = b.get(12..12 + dl).ok_or_else(malformed)?.to_vec();
            let nl = u32_at(12 + dl)?;
            let names = b.get(16 + dl..16 + dl + nl).ok_or_else(malformed)?.to_vec();
            let with_ids = *b.get(16 + dl + nl).ok_or_else(malformed)? == 1;
            let k = u32_at(17 + dl + nl)?;
            if self.header.is_none() {
                self.header = Some((g, dir, names, with_ids));
                self.k = k;
            }
            self.rows
                .extend_from_slice(b.get(21 + dl + nl..).ok_or_else(malformed)?);
        }
        Ok(())
    }
}

/// A count column as Int64.
fn int64s(b: &datafusion::arrow::record_batch::RecordBatch, j: usize) -> Result<Int64Array> {
    let a = datafusion::arrow::compute::cast(
        b.column(j),
        &datafusion::arrow::datatypes::DataType::Int64,
    )
    .map_err(|e| super::engine_error("reading the engine's result", e))?;
    a.as_any()
        .downcast_ref::<Int64Array>()
        .cloned()
        .ok_or_else(|| Error::internal("an engine result not castable to Int64"))
}

impl HeldOnEngine {
    /// Runs `f` on the engine and waits for it on this thread, which must
    /// not be a thread of rayon's pool: the engine's functions use that pool
    /// themselves (row hashes, summaries), so a pool thread waiting here
    /// could leave none to run them, and both would wait for ever. The
    /// protocol therefore asks an engine from one thread at a time
    /// ([`crate::protocol::held::Held::on_engine`]).
    fn wait<F: std::future::Future>(&self, f: F) -> F::Output {
        debug_assert!(
            rayon::current_thread_index().is_none(),
            "an engine waited for on a thread of rayon's pool"
        );
        self.runtime.block_on(f)
    }
}

impl HeldSplits for HeldOnEngine {
    fn validation_manifest(&self) -> &str {
        &self.validation_manifest
    }

    fn summaries(&self, part: Part, asked: &[Asked<'_>]) -> Result<Vec<Summary>> {
        let scored: Vec<(&str, String, &[f64])> = asked
            .iter()
            .map(|a| Ok((a.name, self.score_sql(a.set, a.model)?, a.extra)))
            .collect::<Result<_>>()?;
        self.wait(self.summaries_async(part, &scored))
    }

    fn facts(
        &self,
        splits: &[(Part, &Summary)],
        set: usize,
        model: &dyn Model,
        tau: f64,
    ) -> Result<Vec<ScoreFacts>> {
        let score = self.score_sql(set, model)?;
        self.wait(self.facts_async(splits, &score, tau))
    }

    fn scores_digest(&self, candidates: &[(usize, &dyn Model)], test: bool) -> Result<String> {
        let scores: Vec<String> = candidates
            .iter()
            .map(|(set, model)| self.score_sql(*set, *model))
            .collect::<Result<_>>()?;
        self.wait(self.scores_digest_async(&scores, test))
    }

    fn write_scores(
        &self,
        dir: &std::path::Path,
        candidates: &[(usize, &dyn Model)],
        names: &[String],
        test: bool,
    ) -> Result<Vec<String>> {
        let scores: Vec<String> = candidates
            .iter()
            .map(|(set, model)| self.score_sql(*set, *model))
            .collect::<Result<_>>()?;
        self.wait(self.write_scores_async(dir, &scores, names, test))
    }

    fn calibration(
        &self,
        part: Part,
        set: usize,
        model: &dyn Model,
        normals: usize,
    ) -> Result<Calibration> {
        let score = self.score_sql(set, model)?;
        self.wait(self.calibration_async(part, &score, normals, Thinning::DEFAULT))
    }
}

#[cfg(test)]
mod tests {
    use std::sync::Arc;

    use datafusion::arrow::array::{
        ArrayRef, BooleanArray, FixedSizeBinaryArray, Float64Array, Int64Array, Int8Array,
    };
    use datafusion::arrow::datatypes::{DataType, Field, Schema};
    use datafusion::arrow::record_batch::RecordBatch;
    use datafusion::datasource::MemTable;

    use super::*;

    /// The summary of one candidate (named `c`, feature set 0) of `part`.
    fn one(held: &HeldOnEngine, part: Part, model: &dyn Model, extra: &[f64]) -> Result<Summary> {
        let asked = Asked {
            name: "c",
            set: 0,
            model,
            extra,
        };
        Ok(held.summaries(part, &[asked])?.remove(0))
    }

    /// The columns of the `assigned` view the held splits' questions read
    /// (one feature), for tables made in the tests.
    fn assigned_schema() -> Arc<Schema> {
        Arc::new(Schema::new(vec![
            Field::new("h", DataType::FixedSizeBinary(32), false),
            Field::new("f", DataType::Int64, false),
            Field::new("r", DataType::Int64, false),
            Field::new("a", DataType::Boolean, false),
            Field::new("part", DataType::Int8, false),
            Field::new("x0", DataType::Float64, false),
        ]))
    }

    /// The held splits' summaries made on an engine (three partitions of
    /// small batches) equal those made from the scores in memory, bit for
    /// bit: the evaluation summary, the figures' facts (order statistics
    /// found 16 bits a pass, then the bins) and the calibration's sorted
    /// scores. Invented rows with ties, both zeros, scores beyond the axis
    /// limit and infinite ones (squares that overflow), for this check only.
    #[test]
    fn the_held_summaries_on_an_engine_equal_those_from_the_scores() {
        let n = 3000usize;
        let mut state = 0x2929_u64;
        let mut next = move || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state
        };
        let x: Vec<f64> = (0..n)
            .map(|i| match i % 97 {
                0 => 1e80,
                1 => -1e200,
                2 => 0.0,
                3 => -0.0,
                _ => (next() % 4000) as f64 / 64.0 - 30.0,
            })
            .collect();
        let a: Vec<bool> = (0..n).map(|i| i % 11 == 5).collect();
        let part: Vec<i8> = (0..n).map(|i| if i % 3 == 0 { 2 } else { 1 }).collect();
        let params = functions::ModelParams::Independent {
            mean: vec![1.25],
            variance: vec![4.0],
        };
        let model = params.model(&["x0".to_string()]).unwrap();
        let schema = assigned_schema();
        let h: Vec<[u8; 32]> = (0..n).map(|i| [(i % 251) as u8; 32]).collect();
        let columns: Vec<ArrayRef> = vec![
            Arc::new(FixedSizeBinaryArray::try_from_iter(h.iter()).unwrap()),
            Arc::new(Int64Array::from(vec![0i64; n])),
            Arc::new(Int64Array::from((0..n as i64).collect::<Vec<_>>())),
            Arc::new(BooleanArray::from(a.clone())),
            Arc::new(Int8Array::from(part.clone())),
            Arc::new(Float64Array::from(x.clone())),
        ];
        let batch = RecordBatch::try_new(schema.clone(), columns).unwrap();
        let parts = super::super::tests::partitions(&batch, 3, 100);
        let runtime = super::super::cluster::runtime().unwrap();
        let ctx = super::super::local_context(3, 100).unwrap();
        ctx.register_table(
            "assigned",
            Arc::new(MemTable::try_new(schema, parts).unwrap()),
        )
        .unwrap();
        let held = HeldOnEngine {
            runtime,
            ctx,
            sets: vec![vec!["x0".into()]],
            files: vec![],
            validation_manifest: String::new(),
            ids: false,
        };
        // Each split's scores and labels in memory.
        let in_memory = |p: Part| {
            let rows: Vec<usize> = (0..n).filter(|&i| part[i] == p as i8).collect();
            let xs = ndarray::Array2::from_shape_fn((rows.len(), 1), |(i, _)| x[rows[i]]);
            let scores = crate::detect::score_in_blocks(model.as_ref(), xs.view(), 8192);
            let labels: Vec<bool> = rows.iter().map(|&i| a[i]).collect();
            (scores, labels)
        };
        for p in [Part::Validation, Part::Test] {
            let (scores, labels) = in_memory(p);
            assert!(scores.iter().any(|s| s.is_infinite()));
            assert!(scores
                .iter()
                .any(|s| s.is_finite() && !plots::within_axis_limit(*s)));
            let got = one(&held, p, model.as_ref(), &[]).unwrap();
            assert!(got == Summary::new(&scores, &labels, &[]), "{p:?}");
            // τ a cut point, and a τ the summary must be told of.
            for tau in [scores[labels.iter().position(|&y| y).unwrap()], 3.0] {
                let s = one(&held, p, model.as_ref(), &[tau]).unwrap();
                assert!(s == Summary::new(&scores, &labels, &[tau]));
                let facts = held.facts(&[(p, &s)], 0, model.as_ref(), tau).unwrap();
                assert_eq!(
                    facts,
                    vec![ScoreFacts::of(&scores, &labels, tau)],
                    "{p:?} τ {tau}"
                );
            }
            // The calibration, whole and thinned (infinities, ±0 and ties
            // among the kept scores), as in memory bit for bit.
            let normals: Vec<f64> = scores
                .iter()
                .zip(&labels)
                .filter(|(_, &y)| !y)
                .map(|(&s, _)| s)
                .collect();
            let score = held.score_sql(0, model.as_ref()).unwrap();
            let bits = |c: &Calibration| {
                let v: Vec<u64> = c.sorted().iter().map(|s| s.to_bits()).collect();
                (c.len(), v, c.ranks().map(<[usize]>::to_vec))
            };
            for thinning in [
                Thinning::DEFAULT,
                Thinning { tail: 40, body: 25 },
                Thinning { tail: 1, body: 1 },
            ] {
                let got = held
                    .wait(held.calibration_async(p, &score, normals.len(), thinning))
                    .unwrap();
                let want = Calibration::thinned(normals.clone(), thinning);
                assert_eq!(bits(&got), bits(&want), "{p:?} {thinning:?}");
                assert_eq!(got.ranks().is_some(), thinning != Thinning::DEFAULT);
            }
        }
        // Both splits' facts asked together (each pass over the rows serves
        // both): each split's own, in the order asked.
        let tau = 3.0;
        let mut summaries = Vec::new();
        let mut want = Vec::new();
        for p in [Part::Test, Part::Validation] {
            let (scores, labels) = in_memory(p);
            summaries.push((p, one(&held, p, model.as_ref(), &[tau]).unwrap()));
            want.push(ScoreFacts::of(&scores, &labels, tau));
        }
        let asked: Vec<(Part, &Summary)> = summaries.iter().map(|(p, s)| (*p, s)).collect();
        assert_eq!(held.facts(&asked, 0, model.as_ref(), tau).unwrap(), want);
        // The scores digest over both splits, from each row's score in memory.
        let xs = ndarray::Array2::from_shape_fn((n, 1), |(i, _)| x[i]);
        let scores = crate::detect::score_in_blocks(model.as_ref(), xs.view(), 8192);
        let rows: Vec<crate::audit::hash::ContentHash> = (0..n)
            .map(|i| {
                let row = crate::audit::hash::Scored {
                    split: part[i] as u8,
                    file: 0,
                    row: i as u64,
                    anomaly: a[i],
                };
                crate::audit::hash::score_row(row, &[scores[i]])
            })
            .collect();
        let got = held.scores_digest(&[(0, model.as_ref())], true).unwrap();
        assert_eq!(got, crate::audit::hash::scores_digest(&rows));
    }

    /// A score that is not a number is refused on the engine as in process:
    /// the candidate named, and the first such row in the split's canonical
    /// (content hash, file, row) order named by its file and line.
    #[test]
    fn a_score_that_is_not_a_number_is_refused_naming_its_row() {
        let schema = assigned_schema();
        // Rows 1 and 3 score NaN; row 3's content hash sorts first.
        let h: Vec<[u8; 32]> = vec![[5; 32], [9; 32], [7; 32], [2; 32]];
        let columns: Vec<ArrayRef> = vec![
            Arc::new(FixedSizeBinaryArray::try_from_iter(h.iter()).unwrap()),
            Arc::new(Int64Array::from(vec![0i64; 4])),
            Arc::new(Int64Array::from(vec![0i64, 1, 2, 3])),
            Arc::new(BooleanArray::from(vec![false, true, false, false])),
            Arc::new(Int8Array::from(vec![1i8; 4])),
            Arc::new(Float64Array::from(vec![1.0, f64::NAN, 2.0, f64::NAN])),
        ];
        let batch = RecordBatch::try_new(schema.clone(), columns).unwrap();
        let ctx = super::super::local_context(2, 2).unwrap();
        ctx.register_table(
            "assigned",
            Arc::new(MemTable::try_new(schema, vec![vec![batch]]).unwrap()),
        )
        .unwrap();
        let held = HeldOnEngine {
            runtime: super::super::cluster::runtime().unwrap(),
            ctx,
            sets: vec![vec!["x0".into()]],
            files: vec![SourceFile {
                path: "data.csv".into(),
                shown: "data.csv".into(),
                format: crate::data::Format::Csv,
                digest: crate::audit::hash::FileDigest {
                    bytes: 0,
                    blake3: String::new(),
                },
                rows: 4,
            }],
            validation_manifest: String::new(),
            ids: false,
        };
        let model = functions::ModelParams::Independent {
            mean: vec![0.0],
            variance: vec![1.0],
        }
        .model(&["x0".to_string()])
        .unwrap();
        // Two candidates asked together, both meeting the row: the first
        // in the order asked is named.
        let asked = ["pumps/independent-gaussian", "pumps/second"].map(|name| Asked {
            name,
            set: 0,
            model: model.as_ref(),
            extra: &[],
        });
        let e = held.summaries(Part::Validation, &asked).unwrap_err();
        let text = e.to_string();
        assert!(text.contains("pumps/independent-gaussian"), "{text}");
        assert!(!text.contains("pumps/second"), "{text}");
        assert!(
            text.contains("the score of data.csv line 5 is not a number"),
            "{text}"
        );
        assert_eq!(e.code(), 3);
    }
}
