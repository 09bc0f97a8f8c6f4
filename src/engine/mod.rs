//! The protocol on Apache DataFusion, in-process or on a Ballista cluster
//! (the `cluster` feature; README, "Running on a cluster").
//!
//! [`functions`] holds anomark's functions (the row content hash, the split
//! rank key and the split, the moments and hashes of a content-hash bucket,
//! scoring with the fitted parameters in the plan, the evaluation summary);
//! this module holds the steps a client runs with them on any engine: the
//! exact protocol split (a histogram pass over the rank keys' leading 16
//! bits per label and one refinement pass over the buckets that hold a cut),
//! the leakage check, the training moments and split manifests by
//! content-hash bucket, and the summary. Every step returns what the
//! in-process run computes, to the bit, whatever the partitions and batches.

pub mod cluster;
pub mod functions;
pub(crate) mod held;
pub mod run;
pub(crate) mod sample;

use std::collections::BTreeMap;

use datafusion::arrow::array::{Array, BooleanArray, FixedSizeBinaryArray, Int64Array, Int8Array};
use datafusion::arrow::record_batch::RecordBatch;
use datafusion::execution::session_state::{SessionState, SessionStateBuilder};
use datafusion::execution::FunctionRegistry;
use datafusion::prelude::{SessionConfig, SessionContext};

use crate::audit::hash::ContentHash;
use crate::error::{Error, Result};
use crate::moments::Moments;
use crate::spec::{Fractions, Seed};
use crate::split::Counts;
use crate::summary::Summary;
use functions::SplitCuts;

/// The anomark version every process of a session must run.
pub fn version() -> &'static str {
    env!("CARGO_PKG_VERSION")
}

/// An engine failure as anomark's error, with what was being done.
pub fn engine_error(doing: &str, e: impl std::fmt::Display) -> Error {
    let text = e.to_string();
    if let Some(at) = text.find(functions::VERSION_MISMATCH) {
        let rest = &text[at..];
        let end = rest.find(['\n', '"']).unwrap_or(rest.len());
        return Error::Engine {
            message: format!("{doing}: {}", &rest[..end]),
        };
    }
    Error::Engine {
        message: format!("{doing}: {}", text.trim_end_matches('.')),
    }
}

/// Registers anomark's functions on a session state.
pub fn register_state(state: &mut SessionState, version: &str) -> Result<()> {
    for f in functions::scalar_functions(version) {
        state
            .register_udf(f)
            .map_err(|e| engine_error("registering anomark's functions", e))?;
    }
    for f in functions::aggregate_functions() {
        state
            .register_udaf(f)
            .map_err(|e| engine_error("registering anomark's functions", e))?;
    }
    Ok(())
}

/// Registers anomark's functions on a context (after Ballista has set its
/// session up: it replaces a function list set earlier).
pub fn register(ctx: &SessionContext, version: &str) {
    for f in functions::scalar_functions(version) {
        ctx.register_udf(f.as_ref().clone());
    }
    for f in functions::aggregate_functions() {
        ctx.register_udaf(f.as_ref().clone());
    }
}

/// A session state with anomark's functions.
pub fn state_with(config: SessionConfig, version: &str) -> Result<SessionState> {
    let mut state = SessionStateBuilder::new()
        .with_config(config)
        .with_default_features()
        .build();
    register_state(&mut state, version)?;
    Ok(state)
}

/// How long the client waits for the engine's answer to one query before it
/// gives up with [`Error::Engine`]: a stalled engine (a cluster that lost an
/// executor and does not recover, a scheduler that stopped answering) ends
/// the client's work instead of holding it forever. Carried in the session's
/// configuration ([`Deadline::on`]), so every query of a session (each
/// engine step, [`collect`]) is bounded by it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Deadline {
    seconds: u64,
}

impl Deadline {
    /// The deadline of a session that sets none: one hour per query.
    pub const DEFAULT_SECONDS: u64 = crate::protocol::ENGINE_DEADLINE_DEFAULT_SECONDS;
    /// The longest deadline accepted: seven days per query.
    pub const MAX_SECONDS: u64 = crate::protocol::ENGINE_DEADLINE_MAX_SECONDS;

    /// A deadline of `seconds` per query, 1 to [`Deadline::MAX_SECONDS`].
    pub fn seconds(seconds: u64) -> Result<Self> {
        if (1..=Self::MAX_SECONDS).contains(&seconds) {
            Ok(Deadline { seconds })
        } else {
            Err(Error::Usage {
                message: format!(
                    "the engine's deadline must be 1 to {} seconds, not {seconds}",
                    Self::MAX_SECONDS
                ),
            })
        }
    }

    /// The deadline in seconds.
    pub fn as_seconds(self) -> u64 {
        self.seconds
    }

    /// `config` with this deadline for every query of its sessions.
    pub fn on(self, config: SessionConfig) -> SessionConfig {
        config.with_extension(std::sync::Arc::new(self))
    }

    /// The deadline of the session `ctx` (the default if it sets none).
    pub fn of(ctx: &SessionContext) -> Self {
        ctx.state()
            .config()
            .get_extension::<Deadline>()
            .map_or_else(Deadline::default, |d| *d)
    }
}

impl Default for Deadline {
    fn default() -> Self {
        Deadline {
            seconds: Self::DEFAULT_SECONDS,
        }
    }
}

/// This host's cores (1 when unknown): an executor's default concurrent
/// tasks, and a session's partitions before the rows are counted.
pub fn cores() -> usize {
    std::thread::available_parallelism().map_or(1, |n| n.get())
}

/// The most partitions a cluster session plans ([`partitions_for`]).
pub const PARTITIONS_MAX: usize = 4_096;

/// The target partitions of a cluster session over `rows` rows: one per
/// `task_rows` rows (rounded up), at least `cores`, at most
/// [`PARTITIONS_MAX`]. A hash-partitioned stage (a GROUP BY of content
/// hashes, a window partitioned by bucket) then gives each task about
/// `task_rows` rows, so an executor's memory follows `task_rows` times its
/// concurrent tasks, whatever the rows. The numbers never depend on it.
pub fn partitions_for(rows: u64, task_rows: u64, cores: usize) -> usize {
    let wanted = rows.div_ceil(task_rows.max(1));
    usize::try_from(wanted)
        .unwrap_or(usize::MAX)
        .clamp(cores.clamp(1, PARTITIONS_MAX), PARTITIONS_MAX)
}

/// Runs a query and collects its batches, within the session's
/// [`Deadline`]: past it the query is abandoned and the error names what
/// was being done.
pub async fn collect(ctx: &SessionContext, doing: &str, sql: &str) -> Result<Vec<RecordBatch>> {
    // Each query timed on its own under `ANOMARK_STAGE_TIMES=1`.
    let _t = crate::progress::part(&format!("query: {doing}"));
    let deadline = Deadline::of(ctx);
    let query = async {
        ctx.sql(sql)
            .await
            .map_err(|e| engine_error(doing, e))?
            .collect()
            .await
            .map_err(|e| engine_error(doing, e))
    };
    tokio::time::timeout(std::time::Duration::from_secs(deadline.as_seconds()), query)
        .await
        .unwrap_or_else(|_| {
            Err(Error::Engine {
                message: format!(
                    "{doing}: the engine gave no answer within the deadline of {} s, and the \
                 query was abandoned",
                    deadline.as_seconds()
                ),
            })
        })
}

/// A column of a result batch as a concrete array.
fn column<A: 'static>(b: &RecordBatch, j: usize) -> Result<&A> {
    b.column(j)
        .as_any()
        .downcast_ref::<A>()
        .ok_or_else(|| Error::internal(format!("engine result column {j} of an unexpected type")))
}

/// A Binary literal in SQL.
pub fn sql_bytes(b: &[u8]) -> String {
    format!("X'{}'", crate::audit::hash::hex(b))
}

/// A text literal in SQL.
pub fn sql_text(s: &str) -> String {
    format!("'{}'", s.replace('\'', "''"))
}

/// The fractions of one label's parts, as `split` cuts them (normal rows:
/// train, validation, test; anomalies: validation, test).
fn fractions_of(anomaly: bool, f: &Fractions) -> Vec<f64> {
    if anomaly {
        f.anomaly.to_vec()
    } else {
        f.normal.to_vec()
    }
}

/// A distinct content in a split's ranking: its (rank key, content hash)
/// and its number of rows.
type RankedContent = ([u8; 64], i64);

/// The exact protocol split of the rows of `table` (columns `h`, the
/// content hash, and `a`, true for a known anomaly): within each label the
/// contents ranked by (rank key, content hash) and cut at the exact counts
/// of `split::exact_counts`, a content going whole to the part where its
/// first row falls, as `split::assign` does.
///
/// One histogram pass counts the rows per label and per leading 16 bits of
/// the rank key; each cut falls in one bucket (or at the start of the next
/// bucket holding rows), and one refinement pass reads the distinct
/// contents of those buckets only.
pub async fn split_cuts(
    ctx: &SessionContext,
    table: &str,
    seed: Seed,
    fractions: &Fractions,
) -> Result<SplitCuts> {
    let doing = "splitting";
    let seed_lit = sql_bytes(&seed.0.to_le_bytes());
    let keyed = format!(
        "SELECT a, h, {rk}({seed_lit}, h) AS k FROM {table}",
        rk = functions::RANK_KEY
    );
    let hist = collect(
        ctx,
        doing,
        &format!(
            "SELECT a, {p}(k) AS p, COUNT(*) AS n FROM ({keyed}) GROUP BY a, p",
            p = functions::PREFIX16
        ),
    )
    .await?;
    // Rows per bucket, by label, in bucket order.
    let mut buckets: [BTreeMap<i64, i64>; 2] = Default::default();
    for b in &hist {
        let (a, p, n) = (
            column::<BooleanArray>(b, 0)?,
            column::<Int64Array>(b, 1)?,
            column::<Int64Array>(b, 2)?,
        );
        for i in 0..b.num_rows() {
            *buckets[usize::from(a.value(i))]
                .entry(p.value(i))
                .or_default() += n.value(i);
        }
    }
    // Per label and cut: the bucket holding the cut position, the rows
    // before that bucket, and the next bucket holding rows.
    struct Cut {
        position: i64,
        bucket: i64,
        before: i64,
        next: Option<i64>,
    }
    let mut wanted: [Vec<Option<Cut>>; 2] = Default::default();
    for anomaly in [false, true] {
        let list = &buckets[usize::from(anomaly)];
        let total: i64 = list.values().sum();
        let fr = fractions_of(anomaly, fractions);
        let counts = crate::split::exact_counts(total as usize, &fr);
        let mut position = 0i64;
        for c in &counts[..counts.len() - 1] {
            position += *c as i64;
            let mut before = 0;
            let mut found = None;
            let mut iter = list.iter().peekable();
            while let Some((&p, &n)) = iter.next() {
                if before + n > position {
                    found = Some(Cut {
                        position,
                        bucket: p,
                        before,
                        next: iter.peek().map(|(&q, _)| q),
                    });
                    break;
                }
                before += n;
            }
            wanted[usize::from(anomaly)].push(found);
        }
    }
    // One refinement pass: the distinct contents of the buckets in question.
    let mut sets: [Vec<i64>; 2] = Default::default();
    for (l, cuts) in wanted.iter().enumerate() {
        for c in cuts.iter().flatten() {
            sets[l].push(c.bucket);
            sets[l].extend(c.next);
        }
        sets[l].sort_unstable();
        sets[l].dedup();
    }
    let mut contents: [BTreeMap<i64, Vec<RankedContent>>; 2] = Default::default();
    if sets.iter().any(|s| !s.is_empty()) {
        let cond = |anomaly: bool, s: &[i64]| -> String {
            if s.is_empty() {
                "FALSE".into()
            } else {
                let list: Vec<String> = s.iter().map(|p| p.to_string()).collect();
                format!(
                    "({}a AND {p}(k) IN ({}))",
                    if anomaly { "" } else { "NOT " },
                    list.join(", "),
                    p = functions::PREFIX16
                )
            }
        };
        let rows = collect(
            ctx,
            doing,
            &format!(
                "SELECT a, k, h, COUNT(*) AS m FROM ({keyed}) WHERE {} OR {} GROUP BY a, k, h",
                cond(false, &sets[0]),
                cond(true, &sets[1])
            ),
        )
        .await?;
        for b in &rows {
            let (a, k, h, m) = (
                column::<BooleanArray>(b, 0)?,
                column::<FixedSizeBinaryArray>(b, 1)?,
                column::<FixedSizeBinaryArray>(b, 2)?,
                column::<Int64Array>(b, 3)?,
            );
            for i in 0..b.num_rows() {
                let mut key = [0u8; 64];
                key[..32].copy_from_slice(k.value(i));
                key[32..].copy_from_slice(h.value(i));
                let p = i64::from(u16::from_be_bytes([key[0], key[1]]));
                contents[usize::from(a.value(i))]
                    .entry(p)
                    .or_default()
                    .push((key, m.value(i)));
            }
        }
        for label in contents.iter_mut() {
            for list in label.values_mut() {
                list.sort_unstable();
            }
        }
    }
    // The first content whose first row is at or after each cut position.
    let mut starts: [Vec<Option<[u8; 64]>>; 2] = Default::default();
    for (l, cuts) in wanted.iter().enumerate() {
        for c in cuts {
            let start = match c {
                None => None,
                Some(c) => {
                    let mut pos = c.before;
                    let mut key = None;
                    for (k, m) in contents[l].get(&c.bucket).into_iter().flatten() {
                        if pos >= c.position {
                            key = Some(*k);
                            break;
                        }
                        pos += m;
                    }
                    key.or_else(|| {
                        c.next
                            .and_then(|q| contents[l].get(&q))
                            .and_then(|v| v.first())
                            .map(|(k, _)| *k)
                    })
                }
            };
            starts[l].push(start);
        }
    }
    Ok(SplitCuts {
        seed,
        normal: [starts[0][0], starts[0][1]],
        anomaly: starts[1][0],
    })
}

/// What one pass over `table` (columns `h`, `part` and `a`) tells of its
/// splits: rows per split and label, rows whose content another row also
/// holds, and how many contents sit in more than one split.
pub struct SplitCheck {
    /// Rows per split and label; exact when no content is leaked (when
    /// one is, the run stops on the leakage).
    pub counts: [Counts; 3],
    /// Rows sharing their content with another row.
    pub rows_with_duplicates: usize,
    /// Contents held in more than one split (leakage when not zero).
    pub leaked: usize,
}

/// The [`SplitCheck`] of `table`: one grouping by content hash (each
/// content's rows, lowest and highest split, and label: the label is part
/// of the content, so one per content), then summed on the engine per
/// lowest split and label, so that at most six rows come back whatever the
/// data, the source is read once for all three answers, and each content
/// holds four small values while it is grouped.
pub async fn split_check(ctx: &SessionContext, table: &str) -> Result<SplitCheck> {
    let rows = collect(
        ctx,
        "counting the splits, repeated rows and leakage",
        &format!(
            "SELECT lo, a, CAST(SUM(n) AS BIGINT), CAST(SUM(CASE WHEN n > 1 THEN n ELSE 0 END) \
             AS BIGINT), CAST(SUM(CASE WHEN lo <> hi THEN 1 ELSE 0 END) AS BIGINT) FROM \
             (SELECT COUNT(*) AS n, MIN(part) AS lo, MAX(part) AS hi, BOOL_OR(a) AS a FROM \
             {table} GROUP BY h) GROUP BY lo, a"
        ),
    )
    .await?;
    let mut check = SplitCheck {
        counts: [Counts::default(); 3],
        rows_with_duplicates: 0,
        leaked: 0,
    };
    for b in &rows {
        let (lo, a) = (column::<Int8Array>(b, 0)?, column::<BooleanArray>(b, 1)?);
        let (n, repeated, leaked) = (
            column::<Int64Array>(b, 2)?,
            column::<Int64Array>(b, 3)?,
            column::<Int64Array>(b, 4)?,
        );
        for i in 0..b.num_rows() {
            let c = usize::try_from(lo.value(i))
                .ok()
                .and_then(|p| check.counts.get_mut(p))
                .ok_or_else(|| Error::internal("a split index out of range"))?;
            if a.value(i) {
                c.anomaly += n.value(i) as usize;
            } else {
                c.normal += n.value(i) as usize;
            }
            check.rows_with_duplicates += repeated.value(i) as usize;
            check.leaked += leaked.value(i) as usize;
        }
    }
    Ok(check)
}

/// Contents that sit in more than one split of `table`: how many, and the
/// first (in content-hash order) with the two lowest parts holding it.
pub async fn leakage(
    ctx: &SessionContext,
    table: &str,
) -> Result<Option<(usize, ContentHash, [i8; 2])>> {
    let rows = collect(
        ctx,
        "checking for leakage",
        &format!(
            "SELECT h, MIN(part) AS lo, MAX(part) AS hi FROM {table} GROUP BY h \
             HAVING MIN(part) <> MAX(part) ORDER BY h"
        ),
    )
    .await?;
    let total: usize = rows.iter().map(|b| b.num_rows()).sum();
    let Some(b) = rows.iter().find(|b| b.num_rows() > 0) else {
        return Ok(None);
    };
    let h = column::<FixedSizeBinaryArray>(b, 0)?;
    let (lo, hi) = (column::<Int8Array>(b, 1)?, column::<Int8Array>(b, 2)?);
    Ok(Some((
        total,
        ContentHash(h.value(0).try_into().expect("32 bytes")),
        [lo.value(0), hi.value(0)],
    )))
}

/// The training moments of the feature columns `features` of the rows of
/// `table` in split `part`: [`bucket_moments`] folded on the client by
/// `moments::fold_buckets`, the library's one definition.
pub async fn moments(
    ctx: &SessionContext,
    table: &str,
    part: i8,
    features: &[String],
) -> Result<Moments> {
    crate::moments::fold_buckets(
        features.len(),
        bucket_moments(ctx, table, part, features).await?,
    )
}

/// Each content-hash bucket's moments of the feature columns `features` of
/// the rows of `table` in split `part`, computed by the engine
/// ([`functions::bucket_moments`]), in no particular order; each holds its
/// bucket's row count.
pub async fn bucket_moments(
    ctx: &SessionContext,
    table: &str,
    part: i8,
    features: &[String],
) -> Result<Vec<(u16, Moments)>> {
    let doing = "fitting on the training rows";
    let cols: Vec<String> = features.iter().map(|f| quote(f)).collect();
    let rows = collect(
        ctx,
        doing,
        &format!(
            "SELECT {p}(h) AS b, {m}(h, {cols}) AS mo FROM {table} WHERE part = {part} \
             GROUP BY b",
            p = functions::PREFIX16,
            m = functions::BUCKET_MOMENTS,
            cols = cols.join(", ")
        ),
    )
    .await?;
    let d = features.len();
    let mut buckets = Vec::new();
    for b in &rows {
        let (id, m) = (
            column::<Int64Array>(b, 0)?,
            column::<datafusion::arrow::array::BinaryArray>(b, 1)?,
        );
        for i in 0..b.num_rows() {
            let bucket = u16::try_from(id.value(i))
                .map_err(|_| Error::internal("a content-hash bucket beyond 16 bits"))?;
            let moments =
                functions::moments_from_bytes(m.value(i), d).map_err(|e| engine_error(doing, e))?;
            buckets.push((bucket, moments));
        }
    }
    Ok(buckets)
}

/// The manifest hash of split `part` of `table`: [`manifests_of`] for one split.
pub async fn manifest(ctx: &SessionContext, table: &str, part: i8) -> Result<String> {
    let [m] = manifests_of(ctx, table, [part]).await?;
    Ok(m)
}

/// The manifest hashes of the splits `parts` of `table`, in one query: each
/// (split, content-hash bucket) digest computed by the engine
/// (`audit::hash::manifest_bucket_digest` of its sorted hashes), joined per
/// split on the client by `audit::hash::manifest_of_buckets`, the library's
/// one definition. A split without rows has the manifest of no rows.
pub async fn manifests_of<const N: usize>(
    ctx: &SessionContext,
    table: &str,
    parts: [i8; N],
) -> Result<[String; N]> {
    let list: Vec<String> = parts.iter().map(|p| p.to_string()).collect();
    let rows = collect(
        ctx,
        "hashing the split manifests",
        &format!(
            "SELECT part, {p}(h) AS b, {dg}(h) AS dg FROM {table} WHERE part IN ({}) \
             GROUP BY part, b",
            list.join(", "),
            p = functions::PREFIX16,
            dg = functions::BUCKET_DIGEST
        ),
    )
    .await?;
    let mut buckets: [Vec<(u16, [u8; 32])>; N] = std::array::from_fn(|_| Vec::new());
    for b in &rows {
        let (part, id, dg) = (
            column::<Int8Array>(b, 0)?,
            column::<Int64Array>(b, 1)?,
            column::<datafusion::arrow::array::BinaryArray>(b, 2)?,
        );
        for i in 0..b.num_rows() {
            let k = parts
                .iter()
                .position(|&p| p == part.value(i))
                .ok_or_else(|| Error::internal("a manifest of a split not asked for"))?;
            let bucket = u16::try_from(id.value(i))
                .map_err(|_| Error::internal("a content-hash bucket beyond 16 bits"))?;
            let digest: [u8; 32] = dg
                .value(i)
                .try_into()
                .map_err(|_| Error::internal("a bucket digest of other than 32 bytes"))?;
            buckets[k].push((bucket, digest));
        }
    }
    let mut out: [String; N] = std::array::from_fn(|_| String::new());
    for (o, b) in out.iter_mut().zip(buckets) {
        *o = crate::audit::hash::manifest_of_buckets(b)?;
    }
    Ok(out)
}

/// The evaluation summary of the scores in column `score` of the rows of
/// `table` in split `part`, with the distinct anomaly scores and `extra`
/// as cut points: [`summaries`] of one score. `None` when a score of the
/// split is not a number: the caller names the row.
pub async fn summary(
    ctx: &SessionContext,
    table: &str,
    score: &str,
    part: i8,
    extra: &[f64],
) -> Result<Option<Summary>> {
    Ok(
        match summaries(ctx, table, part, &[(score, extra)]).await? {
            Summaries::All(mut all) => all.pop(),
            Summaries::NotANumber(_) => None,
        },
    )
}

/// What [`summaries`] found.
#[derive(Debug)]
pub enum Summaries {
    /// Each score's summary, in the order asked.
    All(Vec<Summary>),
    /// The first score asked (by its index) with a value that is not a
    /// number in the split: the caller names the row.
    NotANumber(usize),
}

/// The evaluation summaries of the rows of `table` in split `part` under
/// each score expression of `asked` (with its `extra` cut points beside the
/// distinct anomaly scores: `Summary::new`'s definition), in two passes over
/// the rows whatever the number of scores: one collects every score of the
/// anomalies (and any score that is not a number), one counts the rows per
/// cut point and gap of each score (with each gap's lowest and highest
/// score in `total_cmp` order), one grouping set per score.
pub async fn summaries(
    ctx: &SessionContext,
    table: &str,
    part: i8,
    asked: &[(&str, &[f64])],
) -> Result<Summaries> {
    let doing = "summarising the scores";
    if asked.is_empty() {
        return Ok(Summaries::All(Vec::new()));
    }
    let k = asked.len();
    let scores: Vec<String> = asked
        .iter()
        .enumerate()
        .map(|(j, (score, _))| format!("{score} AS s{j}"))
        .collect();
    let s_list: Vec<String> = (0..k).map(|j| format!("s{j}")).collect();
    let nan_any: Vec<String> = (0..k).map(|j| format!("isnan(s{j})")).collect();
    let scored = format!(
        "SELECT a, {} FROM {table} WHERE part = {part}",
        scores.join(", ")
    );
    let rows = collect(
        ctx,
        doing,
        &format!(
            "SELECT a, {} FROM ({scored}) WHERE a OR {}",
            s_list.join(", "),
            nan_any.join(" OR ")
        ),
    )
    .await?;
    let mut anomalies: Vec<Vec<f64>> = vec![Vec::new(); k];
    let mut nan = vec![false; k];
    for b in &rows {
        let a = column::<BooleanArray>(b, 0)?;
        for (j, (an, bad)) in anomalies.iter_mut().zip(nan.iter_mut()).enumerate() {
            let s = column::<datafusion::arrow::array::Float64Array>(b, j + 1)?;
            for i in 0..b.num_rows() {
                let v = s.value(i);
                *bad |= v.is_nan();
                if a.value(i) {
                    an.push(v);
                }
            }
        }
    }
    if let Some(j) = nan.iter().position(|&n| n) {
        return Ok(Summaries::NotANumber(j));
    }
    // Each score's cut points exactly as `Summary::new` makes them.
    let cut_points: Vec<Vec<f64>> = anomalies
        .iter()
        .zip(asked)
        .map(|(an, (_, extra))| {
            let flags = vec![true; an.len()];
            Summary::new(an, &flags, extra).cut_points().to_vec()
        })
        .collect();
    let coded: Vec<String> = cut_points
        .iter()
        .enumerate()
        .map(|(j, cuts)| {
            format!(
                "{i}({cuts}, s{j}) AS c{j}, {o}(s{j}) AS k{j}",
                i = functions::INTERVAL,
                o = functions::ORDER_KEY,
                cuts = sql_bytes(&functions::le_bytes(cuts))
            )
        })
        .collect();
    let aggregates: Vec<String> = (0..k).map(|j| format!("MIN(k{j}), MAX(k{j})")).collect();
    let sets: Vec<String> = (0..k).map(|j| format!("(c{j}, a)")).collect();
    let c_list: Vec<String> = (0..k).map(|j| format!("c{j}")).collect();
    let rows = collect(
        ctx,
        doing,
        &format!(
            "SELECT {}, a, COUNT(*), {} FROM (SELECT a, {} FROM ({scored})) GROUP BY GROUPING \
             SETS ({})",
            c_list.join(", "),
            aggregates.join(", "),
            coded.join(", "),
            sets.join(", ")
        ),
    )
    .await?;
    // A row of grouping set j has its code in column j and no other.
    let mut counts: Vec<Vec<crate::summary::CodeCount>> = vec![Vec::new(); k];
    for b in &rows {
        let codes: Vec<&Int64Array> = (0..k)
            .map(|j| column::<Int64Array>(b, j))
            .collect::<Result<_>>()?;
        let (a, n) = (
            column::<BooleanArray>(b, k)?,
            column::<Int64Array>(b, k + 1)?,
        );
        for i in 0..b.num_rows() {
            let mut sets = (0..k).filter(|&j| !codes[j].is_null(i));
            let (Some(j), None) = (sets.next(), sets.next()) else {
                return Err(Error::internal("a summary row of no single grouping set"));
            };
            let (lo, hi) = (
                column::<Int64Array>(b, k + 2 + 2 * j)?,
                column::<Int64Array>(b, k + 3 + 2 * j)?,
            );
            counts[j].push((
                codes[j].value(i),
                a.value(i),
                n.value(i) as u64,
                functions::from_order_key(lo.value(i)),
                functions::from_order_key(hi.value(i)),
            ));
        }
    }
    cut_points
        .into_iter()
        .zip(counts)
        .map(|(cuts, counts)| {
            Summary::from_counts(cuts, &counts)
                .ok_or_else(|| Error::internal("an interval code beyond the summary's cut points"))
        })
        .collect::<Result<_>>()
        .map(Summaries::All)
}

/// Creates the view `name` over the table `source`: the column `a` (true
/// for a known anomaly, the SQL expression `is_anomaly`), the content
/// columns `columns`, and `h`, each row's content hash. Every batch read
/// passes the version guard first, so no process of another anomark
/// version computes anything of the run.
pub async fn hashed_view(
    ctx: &SessionContext,
    name: &str,
    source: &str,
    is_anomaly: &str,
    columns: &[String],
) -> Result<()> {
    let cols: Vec<String> = columns.iter().map(|c| quote(c)).collect();
    let cols = cols.join(", ");
    collect(
        ctx,
        "reading the data",
        &format!(
            "CREATE VIEW {name} AS SELECT a, {cols}, {hash}(a, {cols}) AS h FROM \
             (SELECT {is_anomaly} AS a, {cols} FROM {source} WHERE {guard}({v}))",
            hash = functions::ROW_HASH,
            guard = functions::VERSION_CHECK,
            v = sql_text(version()),
        ),
    )
    .await?;
    Ok(())
}

/// A column name quoted for SQL.
pub fn quote(name: &str) -> String {
    format!("\"{}\"", name.replace('"', "\"\""))
}

/// A session on one machine with `partitions` target partitions and
/// batches of `batch` rows, anomark's functions registered (the default
/// [`Deadline`]).
pub fn local_context(partitions: usize, batch: usize) -> Result<SessionContext> {
    let config = SessionConfig::new()
        .with_target_partitions(partitions)
        .with_batch_size(batch);
    Ok(SessionContext::new_with_state(state_with(
        config,
        version(),
    )?))
}

#[cfg(test)]
mod tests;
