//! Each engine step against the in-process computation, bit for bit, on
//! generated rows with duplicates, in one partition and in several
//! partitions with small batches.

use std::collections::BTreeMap;
use std::sync::Arc;

use datafusion::arrow::array::{ArrayRef, BooleanArray, Float64Array, Int8Array};
use datafusion::arrow::datatypes::{DataType, Field, Schema};
use datafusion::arrow::record_batch::RecordBatch;
use datafusion::datasource::MemTable;
use ndarray::Array2;

use super::*;
use crate::audit::hash;
use crate::audit::leak::Part;
use crate::data::Dataset;
use crate::spec::SplitPlan;

const D: usize = 3;

/// `n` rows of three features from a small range (so that identical rows
/// occur), every seventh row an anomaly shifted away from the normals.
fn rows(n: usize, seed: u64) -> (Array2<f64>, Vec<bool>) {
    let mut state = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
    let mut next = move || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        state
    };
    let mut x = Array2::zeros((n, D));
    let mut a = vec![false; n];
    for i in 0..n {
        a[i] = i % 7 == 3;
        for j in 0..D {
            let v = (next() % 40) as f64 * 0.25 + j as f64;
            x[[i, j]] = if a[i] { v + 20.0 } else { v };
        }
    }
    (x, a)
}

/// A session over the rows in `partitions` partitions of batches of `batch`
/// rows, with the view `hashed` (columns a, x0.., h).
async fn session(x: &Array2<f64>, a: &[bool], partitions: usize, batch: usize) -> SessionContext {
    let ctx = local_context(partitions, batch).unwrap();
    let mut fields = vec![Field::new("a", DataType::Boolean, false)];
    fields.extend((0..D).map(|j| Field::new(format!("x{j}"), DataType::Float64, false)));
    let schema = Arc::new(Schema::new(fields));
    let n = a.len();
    let per = n.div_ceil(partitions);
    let mut parts = Vec::new();
    for p in 0..partitions {
        let lo = (p * per).min(n);
        let hi = ((p + 1) * per).min(n);
        let mut batches = Vec::new();
        let mut at = lo;
        while at < hi {
            let end = (at + batch).min(hi);
            let mut cols: Vec<ArrayRef> = vec![Arc::new(BooleanArray::from(a[at..end].to_vec()))];
            for j in 0..D {
                cols.push(Arc::new(Float64Array::from(
                    (at..end).map(|i| x[[i, j]]).collect::<Vec<_>>(),
                )));
            }
            batches.push(RecordBatch::try_new(schema.clone(), cols).unwrap());
            at = end;
        }
        parts.push(batches);
    }
    let table = MemTable::try_new(schema, parts).unwrap();
    ctx.register_table("data", Arc::new(table)).unwrap();
    ctx.sql(&format!(
        "CREATE VIEW hashed AS SELECT a, x0, x1, x2, {}(a, x0, x1, x2) AS h FROM data",
        functions::ROW_HASH
    ))
    .await
    .unwrap();
    ctx
}

/// `batch` as `k` partitions of consecutive rows, each in batches of at
/// most `rows` rows: a table the engine reads in several partitions.
pub(super) fn partitions(
    batch: &datafusion::arrow::record_batch::RecordBatch,
    k: usize,
    rows: usize,
) -> Vec<Vec<datafusion::arrow::record_batch::RecordBatch>> {
    let n = batch.num_rows();
    (0..k)
        .map(|p| {
            let (lo, hi) = (p * n / k, (p + 1) * n / k);
            (lo..hi)
                .step_by(rows)
                .map(|at| batch.slice(at, rows.min(hi - at)))
                .collect()
        })
        .collect()
}

fn runtime() -> tokio::runtime::Runtime {
    super::cluster::runtime().unwrap()
}

/// (partitions, batch rows) of every configuration tested.
const CONFIGS: [(usize, usize); 3] = [(1, 8192), (4, 7), (3, 100)];

fn fractions() -> Fractions {
    Fractions {
        normal: [0.6, 0.2, 0.2],
        anomaly: [0.5, 0.5],
    }
}

/// The in-process split (`split::assign`) of the rows: each row's part.
fn in_process_parts(x: &Array2<f64>, a: &[bool], seed: u64) -> (Vec<i8>, crate::split::Splits) {
    let data = Dataset::for_tests(x.clone(), a.to_vec(), BTreeMap::new());
    let hashes = hash::rows(&data.x, &data.is_anomaly);
    let plan = SplitPlan::Protocol {
        seed: Seed(seed),
        fractions: fractions(),
    };
    let splits = crate::split::assign(&plan, &data, &hashes).unwrap();
    let mut part = vec![-1i8; a.len()];
    for r in &splits.train {
        part[r.0 as usize] = Part::Train as i8;
    }
    for r in &splits.validation {
        part[r.0 as usize] = Part::Validation as i8;
    }
    let test: Vec<usize> = (0..a.len()).filter(|&i| part[i] < 0).collect();
    for i in test {
        part[i] = Part::Test as i8;
    }
    (part, splits)
}

/// Reads (a, x0.., h, part, score?) of the `assigned` view in row order.
async fn read(ctx: &SessionContext, sql: &str) -> Vec<RecordBatch> {
    collect(ctx, "test", sql).await.unwrap()
}

#[test]
fn row_hash_equals_the_library() {
    let (x, a) = rows(500, 1);
    let want = hash::rows(&x, &a);
    runtime().block_on(async {
        for (p, b) in CONFIGS {
            let ctx = session(&x, &a, p, b).await;
            // Row order is kept by a scan of a memory table with no shuffle.
            let out = read(&ctx, "SELECT h FROM hashed").await;
            let mut got = Vec::new();
            for b in &out {
                let h = column::<FixedSizeBinaryArray>(b, 0).unwrap();
                got.extend((0..b.num_rows()).map(|i| h.value(i).to_vec()));
            }
            let mut want: Vec<Vec<u8>> = want.iter().map(|h| h.0.to_vec()).collect();
            got.sort();
            want.sort();
            assert_eq!(got, want, "{p} partitions, batches of {b}");
        }
    });
}

/// The steps of a run on the engine, for one configuration.
struct Outcome {
    parts: Vec<(Vec<u8>, i8)>,
    counts: [Counts; 3],
    duplicates: usize,
    leaked: usize,
    leaks: Option<(usize, ContentHash, [i8; 2])>,
    moments: Moments,
    manifests: Vec<String>,
    summary: Summary,
}

/// The view `assigned`: the rows of `hashed`, each with its split by `cuts`.
async fn assign(ctx: &SessionContext, cuts: &SplitCuts) {
    ctx.sql(&format!(
        "CREATE VIEW assigned AS SELECT *, {}({}, h, a) AS part FROM hashed",
        functions::SPLIT,
        sql_bytes(&cuts.to_bytes())
    ))
    .await
    .unwrap();
}

async fn run_steps(x: &Array2<f64>, a: &[bool], seed: u64, p: usize, b: usize) -> Outcome {
    let ctx = session(x, a, p, b).await;
    let cuts = split_cuts(&ctx, "hashed", Seed(seed), &fractions())
        .await
        .unwrap();
    assign(&ctx, &cuts).await;
    let mut parts = Vec::new();
    for batch in read(&ctx, "SELECT h, part FROM assigned").await {
        let h = column::<FixedSizeBinaryArray>(&batch, 0).unwrap();
        let part = column::<Int8Array>(&batch, 1).unwrap();
        parts.extend((0..batch.num_rows()).map(|i| (h.value(i).to_vec(), part.value(i))));
    }
    parts.sort();
    let names: Vec<String> = (0..D).map(|j| format!("x{j}")).collect();
    let moments = moments(&ctx, "assigned", 0, &names).await.unwrap();
    let mut manifests = Vec::new();
    for part in 0..3 {
        manifests.push(manifest(&ctx, "assigned", part).await.unwrap());
    }
    let model = functions::ModelParams::Independent {
        mean: moments.mean.clone(),
        variance: moments
            .covariance()
            .iter()
            .step_by(D + 1)
            .copied()
            .collect(),
    };
    ctx.sql(&format!(
        "CREATE VIEW scored AS SELECT *, {}({}, x0, x1, x2) AS s FROM assigned",
        functions::SCORE,
        sql_bytes(&model.to_bytes())
    ))
    .await
    .unwrap();
    let check = split_check(&ctx, "assigned").await.unwrap();
    Outcome {
        parts,
        counts: check.counts,
        duplicates: check.rows_with_duplicates,
        leaked: check.leaked,
        leaks: leakage(&ctx, "assigned").await.unwrap(),
        moments,
        manifests,
        summary: summary(&ctx, "scored", "s", 1, &[1.5])
            .await
            .unwrap()
            .unwrap(),
    }
}

/// The training moments computed in process by the library's one
/// definition (`moments::of_rows`).
fn in_process_moments(x: &Array2<f64>, hashes: &[ContentHash], train: &[usize]) -> Moments {
    let h: Vec<ContentHash> = train.iter().map(|&i| hashes[i]).collect();
    crate::moments::of_rows(&h, x.select(ndarray::Axis(0), train).view()).unwrap()
}

#[test]
fn every_step_equals_the_in_process_run_in_every_configuration() {
    let (x, a) = rows(3000, 2);
    let seed = 42;
    let hashes = hash::rows(&x, &a);
    let (part, splits) = in_process_parts(&x, &a, seed);
    let mut want_parts: Vec<(Vec<u8>, i8)> = hashes
        .iter()
        .zip(&part)
        .map(|(h, p)| (h.0.to_vec(), *p))
        .collect();
    want_parts.sort();
    let train: Vec<usize> = splits.train.iter().map(|r| r.0 as usize).collect();
    let want_moments = in_process_moments(&x, &hashes, &train);
    let sorted = |p: i8| {
        let v: Vec<ContentHash> = (0..a.len())
            .filter(|&i| part[i] == p)
            .map(|i| hashes[i])
            .collect();
        hash::manifest(&v)
    };
    let want_manifests: Vec<String> = (0..3).map(sorted).collect();
    assert_eq!(want_manifests[2], splits.test.manifest());
    // The independent Gaussian fitted in process on the same moments, and
    // its validation scores summarised by `Summary::new`.
    let names: Vec<String> = (0..D).map(|j| format!("x{j}")).collect();
    let model = crate::detect::fit_moments(
        crate::spec::DetectorKind::IndependentGaussian,
        &want_moments,
        &names,
    )
    .unwrap();
    let val: Vec<usize> = splits.validation.iter().map(|r| r.0 as usize).collect();
    let scores = model.score(x.select(ndarray::Axis(0), &val).view());
    let labels: Vec<bool> = val.iter().map(|&i| a[i]).collect();
    let want_summary = Summary::new(&scores, &labels, &[1.5]);
    runtime().block_on(async {
        for (p, b) in CONFIGS {
            let got = run_steps(&x, &a, seed, p, b).await;
            let at = format!("{p} partitions, batches of {b}");
            assert!(got.parts == want_parts, "split, {at}");
            assert_eq!(got.counts, splits.report.counts, "{at}");
            assert_eq!(got.duplicates, splits.report.rows_with_duplicates, "{at}");
            assert_eq!((got.leaks, got.leaked), (None, 0), "{at}");
            assert_eq!(got.moments.n, want_moments.n, "{at}");
            let bits = |m: &Moments| -> Vec<u64> {
                m.mean.iter().chain(&m.m2).map(|v| v.to_bits()).collect()
            };
            assert_eq!(bits(&got.moments), bits(&want_moments), "moments, {at}");
            assert_eq!(got.manifests, want_manifests, "{at}");
            assert!(got.summary == want_summary, "summary, {at}");
        }
    });
}

#[test]
fn the_split_is_exact_at_cuts_inside_duplicate_runs() {
    // Few distinct contents with many copies each: cuts fall inside runs
    // of identical rows, and buckets hold one content each.
    for (n, seed) in [(300, 3), (200, 4), (141, 5)] {
        let (mut x, a) = rows(n, seed);
        for i in 0..n {
            for j in 0..D {
                x[[i, j]] = (x[[i, j]] * 0.5).floor();
            }
        }
        let hashes = hash::rows(&x, &a);
        let (part, splits) = in_process_parts(&x, &a, seed);
        let mut want: Vec<(Vec<u8>, i8)> = hashes
            .iter()
            .zip(&part)
            .map(|(h, p)| (h.0.to_vec(), *p))
            .collect();
        want.sort();
        runtime().block_on(async {
            for (p, b) in CONFIGS {
                let ctx = session(&x, &a, p, b).await;
                let cuts = split_cuts(&ctx, "hashed", Seed(seed), &fractions())
                    .await
                    .unwrap();
                let mut got: Vec<(Vec<u8>, i8)> = hashes
                    .iter()
                    .zip(&a)
                    .map(|(h, &an)| (h.0.to_vec(), cuts.part(&h.0, an)))
                    .collect();
                got.sort();
                assert!(got == want, "{n} rows, {p} partitions");
                // The one-pass check of the assigned rows: the in-process
                // counts and repeated rows, and no leakage.
                assign(&ctx, &cuts).await;
                let check = split_check(&ctx, "assigned").await.unwrap();
                assert!(splits.report.rows_with_duplicates > 0);
                assert_eq!(
                    (check.counts, check.rows_with_duplicates, check.leaked),
                    (splits.report.counts, splits.report.rows_with_duplicates, 0),
                    "{n} rows, {p} partitions"
                );
            }
        });
    }
}

#[test]
fn leakage_names_the_shared_content() {
    let (x, a) = rows(300, 6);
    let hashes = hash::rows(&x, &a);
    runtime().block_on(async {
        for (p, b) in CONFIGS {
            let ctx = session(&x, &a, p, b).await;
            // Rows split by position: identical rows land apart.
            ctx.sql(
                "CREATE VIEW assigned AS SELECT *, CAST(CASE WHEN x0 < 3 THEN 0 \
                 WHEN x1 < 4 THEN 1 ELSE 2 END AS TINYINT) AS part FROM hashed",
            )
            .await
            .unwrap();
            ctx.sql(
                "CREATE VIEW leaky AS SELECT a, h, CAST(CASE WHEN x2 < 5 THEN 1 ELSE 2 END \
                 AS TINYINT) AS part FROM hashed UNION ALL SELECT a, h, CAST(2 AS TINYINT) \
                 AS part FROM hashed WHERE x2 < 2.5",
            )
            .await
            .unwrap();
            assert_eq!(leakage(&ctx, "assigned").await.unwrap(), None);
            let (count, first, parts) = leakage(&ctx, "leaky").await.unwrap().unwrap();
            let mut shared: Vec<ContentHash> = (0..a.len())
                .filter(|&i| x[[i, 2]] < 2.5)
                .map(|i| hashes[i])
                .collect();
            shared.sort();
            shared.dedup();
            assert_eq!((count, first, parts), (shared.len(), shared[0], [1, 2]));
            // The one-pass check counts the same leaked contents, and every
            // row of the leaky view that shares its content.
            let check = split_check(&ctx, "leaky").await.unwrap();
            assert_eq!(check.leaked, shared.len());
            let mut all: Vec<ContentHash> = hashes.clone();
            all.extend((0..a.len()).filter(|&i| x[[i, 2]] < 2.5).map(|i| hashes[i]));
            let repeated: usize = hash::order(&all).repeats.iter().map(|r| r.len()).sum();
            assert_eq!(check.rows_with_duplicates, repeated);
            assert_eq!(split_check(&ctx, "assigned").await.unwrap().leaked, 0);
        }
    });
}

#[test]
fn the_summary_of_no_anomaly_and_extreme_scores() {
    // Scores with ties, negative zero and infinities against Summary::new.
    let scores = [
        0.0,
        -0.0,
        1.0,
        1.0,
        f64::INFINITY,
        -3.0,
        2.5,
        2.5,
        f64::NEG_INFINITY,
    ];
    let labels = [false, true, false, true, false, false, true, false, false];
    let want = Summary::new(&scores, &labels, &[0.5]);
    runtime().block_on(async {
        let ctx = local_context(2, 2).unwrap();
        let schema = Arc::new(Schema::new(vec![
            Field::new("s", DataType::Float64, false),
            Field::new("a", DataType::Boolean, false),
            Field::new("part", DataType::Int8, false),
        ]));
        let batch = RecordBatch::try_new(
            schema.clone(),
            vec![
                Arc::new(Float64Array::from(scores.to_vec())),
                Arc::new(BooleanArray::from(labels.to_vec())),
                Arc::new(Int8Array::from(vec![1i8; scores.len()])),
            ],
        )
        .unwrap();
        let (b1, b2) = (batch.slice(0, 4), batch.slice(4, 5));
        let table = MemTable::try_new(schema.clone(), vec![vec![b1], vec![b2]]).unwrap();
        ctx.register_table("t", Arc::new(table)).unwrap();
        let got = summary(&ctx, "t", "s", 1, &[0.5]).await.unwrap().unwrap();
        assert!(got == want);
        let empty = summary(&ctx, "t", "s", 2, &[0.5]).await.unwrap().unwrap();
        assert!(empty == Summary::new(&[], &[], &[0.5]));
        // A score that is not a number, of a normal row or of an anomaly:
        // no summary, for the caller to name the row.
        for (k, anomaly) in [(0, false), (1, true)] {
            let mut with_nan = scores.to_vec();
            with_nan[k] = f64::NAN;
            assert_eq!(labels[k], anomaly);
            let batch = RecordBatch::try_new(
                schema.clone(),
                vec![
                    Arc::new(Float64Array::from(with_nan)),
                    Arc::new(BooleanArray::from(labels.to_vec())),
                    Arc::new(Int8Array::from(vec![1i8; scores.len()])),
                ],
            )
            .unwrap();
            let table = MemTable::try_new(schema.clone(), vec![vec![batch]]).unwrap();
            ctx.register_table(format!("nan{k}"), Arc::new(table))
                .unwrap();
            let got = summary(&ctx, &format!("nan{k}"), "s", 1, &[0.5]).await;
            assert!(got.unwrap().is_none(), "NaN in row {k}");
            // Among several scores, the first that holds it is named.
            let asked: [(&str, &[f64]); 2] = [("CAST(1.0 AS DOUBLE)", &[]), ("s", &[])];
            let got = summaries(&ctx, &format!("nan{k}"), 1, &asked)
                .await
                .unwrap();
            assert!(matches!(got, Summaries::NotANumber(1)), "{got:?}");
        }
        // Several scores in the same two passes: each its own summary, with
        // its own extra cut points.
        let twice: Vec<f64> = scores.iter().map(|x| x * 2.0).collect();
        let negated: Vec<f64> = scores.iter().map(|x| 0.0 - x).collect();
        let asked: [(&str, &[f64]); 3] =
            [("s", &[0.5]), ("s * 2.0", &[]), ("0.0 - s", &[1.0, -7.0])];
        let Summaries::All(got) = summaries(&ctx, "t", 1, &asked).await.unwrap() else {
            panic!("no score here is NaN");
        };
        assert_eq!(got.len(), 3);
        assert!(got[0] == want);
        assert!(got[1] == Summary::new(&twice, &labels, &[]));
        assert!(got[2] == Summary::new(&negated, &labels, &[1.0, -7.0]));
    });
}

#[test]
fn a_process_of_another_version_is_refused_by_name() {
    runtime().block_on(async {
        let config = SessionConfig::new().with_target_partitions(2);
        let ctx = SessionContext::new_with_state(state_with(config, "0.0.0-other").unwrap());
        let e = collect(
            &ctx,
            "starting the session",
            &format!(
                "SELECT {}({})",
                functions::VERSION_CHECK,
                sql_text(version())
            ),
        )
        .await
        .unwrap_err();
        let text = e.to_string();
        assert!(
            text.contains("runs anomark 0.0.0-other")
                && text.contains(&format!("the client {}", version())),
            "{text}"
        );
        assert_eq!(e.code(), crate::error::exit::ENGINE);
    });
}

#[test]
fn literals_round_trip() {
    let cuts = SplitCuts {
        seed: Seed(7),
        normal: [Some([3; 64]), None],
        anomaly: Some([9; 64]),
    };
    assert_eq!(SplitCuts::from_bytes(&cuts.to_bytes()).unwrap(), cuts);
    let m = functions::ModelParams::Multivariate {
        mean: vec![1.0, -0.0],
        covariance: vec![2.0, 0.5, 0.5, f64::MIN_POSITIVE],
    };
    assert_eq!(
        functions::ModelParams::from_bytes(&m.to_bytes()).unwrap(),
        m
    );
}

#[test]
fn interval_codes_and_order_keys_follow_the_summary() {
    let values = [
        f64::NEG_INFINITY,
        -2.5,
        -0.0,
        0.0,
        1e-300,
        1.0,
        1.0 + f64::EPSILON,
        7.25,
        f64::MAX,
        f64::INFINITY,
    ];
    // Keys in total_cmp order, and back to the same bits.
    for w in values.windows(2) {
        assert!(
            functions::order_key(w[0]) < functions::order_key(w[1]),
            "{w:?}"
        );
    }
    for v in values {
        assert_eq!(
            functions::from_order_key(functions::order_key(v)).to_bits(),
            v.to_bits()
        );
    }
    let labels = [
        true, false, true, false, false, true, false, true, false, false,
    ];
    let s = Summary::new(&values, &labels, &[0.5]);
    for v in values.iter().chain(&[0.5, 3.0, -7.0]) {
        let (j, on_cut) = s.locate(*v);
        assert_eq!(
            functions::interval_code(s.cut_points(), *v),
            2 * j as i64 + i64::from(on_cut),
            "{v}"
        );
    }
}

/// `anomark_among` against `BTreeSet::contains`: integers of every sign
/// and the extremes, a null, sets of none, one and many, over two
/// partitions of small batches.
#[test]
fn among_is_membership_in_the_sorted_set() {
    use datafusion::arrow::array::Int64Array;
    let xs: Vec<Option<i64>> = (-40..40)
        .map(|i| Some(i * 3))
        .chain([Some(i64::MIN), Some(i64::MAX), None, Some(0)])
        .collect();
    let schema = Arc::new(Schema::new(vec![Field::new("x", DataType::Int64, true)]));
    let batch = RecordBatch::try_new(
        schema.clone(),
        vec![Arc::new(Int64Array::from(xs.clone())) as ArrayRef],
    )
    .unwrap();
    let half = xs.len() / 2;
    let parts = vec![
        vec![batch.slice(0, 10), batch.slice(10, half - 10)],
        vec![batch.slice(half, xs.len() - half)],
    ];
    runtime().block_on(async {
        let ctx = local_context(2, 8).unwrap();
        ctx.register_table("t", Arc::new(MemTable::try_new(schema, parts).unwrap()))
            .unwrap();
        let sets: [Vec<i64>; 4] = [
            vec![],
            vec![0],
            vec![i64::MIN, -9, 6, 7, 60, i64::MAX],
            (-100..100).filter(|v| v % 2 == 0).collect(),
        ];
        for set in sets {
            let rows = read(
                &ctx,
                &format!(
                    "SELECT x, {}({}, x) FROM t",
                    functions::AMONG,
                    sql_bytes(&functions::i64_le_bytes(&set))
                ),
            )
            .await;
            let want: std::collections::BTreeSet<i64> = set.iter().copied().collect();
            let mut seen = 0;
            for b in &rows {
                let x = column::<Int64Array>(b, 0).unwrap();
                let got = column::<BooleanArray>(b, 1).unwrap();
                for i in 0..b.num_rows() {
                    let w = (!x.is_null(i)).then(|| want.contains(&x.value(i)));
                    let g = (!got.is_null(i)).then(|| got.value(i));
                    assert_eq!(g, w, "{set:?}");
                    seen += 1;
                }
            }
            assert_eq!(seen, xs.len());
        }
        // A set out of order, or not of whole integers, is refused.
        for bytes in [functions::i64_le_bytes(&[5, 1]), vec![0u8; 7]] {
            let sql = format!(
                "SELECT {}({}, x) FROM t",
                functions::AMONG,
                sql_bytes(&bytes)
            );
            let got = ctx.sql(&sql).await.unwrap().collect().await;
            assert!(got.is_err(), "{bytes:?}");
        }
    });
}

/// A table whose one partition never yields a batch (a stalled engine),
/// holding no thread: the stream waits on a task that sleeps for an hour.
#[derive(Debug)]
struct Stalled(datafusion::arrow::datatypes::SchemaRef);

impl datafusion::physical_plan::streaming::PartitionStream for Stalled {
    fn schema(&self) -> &datafusion::arrow::datatypes::SchemaRef {
        &self.0
    }

    fn execute(
        &self,
        _: Arc<datafusion::execution::TaskContext>,
    ) -> datafusion::execution::SendableRecordBatchStream {
        let mut b = datafusion::physical_plan::stream::RecordBatchReceiverStream::builder(
            self.0.clone(),
            1,
        );
        let tx = b.tx();
        b.spawn(async move {
            tokio::time::sleep(std::time::Duration::from_secs(3_600)).await;
            drop(tx);
            Ok(())
        });
        b.build()
    }
}

#[test]
fn a_query_past_its_deadline_fails_naming_the_step_and_the_deadline() {
    let schema = Arc::new(Schema::new(vec![Field::new("x", DataType::Float64, false)]));
    let config = Deadline::seconds(1)
        .unwrap()
        .on(SessionConfig::new().with_target_partitions(1));
    let ctx = SessionContext::new_with_state(state_with(config, version()).unwrap());
    assert_eq!(Deadline::of(&ctx).as_seconds(), 1);
    let table = datafusion::catalog::streaming::StreamingTable::try_new(
        schema.clone(),
        vec![Arc::new(Stalled(schema))],
    )
    .unwrap();
    ctx.register_table("stalled", Arc::new(table)).unwrap();
    let started = std::time::Instant::now();
    let e = runtime()
        .block_on(collect(
            &ctx,
            "counting the splits",
            "SELECT COUNT(*) FROM stalled",
        ))
        .unwrap_err();
    let waited = started.elapsed();
    assert!(matches!(e, Error::Engine { .. }), "{e}");
    assert_eq!(e.code(), 5);
    assert_eq!(
        e.to_string(),
        "engine: counting the splits: the engine gave no answer within the deadline of 1 s, \
         and the query was abandoned"
    );
    assert!(
        waited >= std::time::Duration::from_secs(1) && waited.as_secs() < 30,
        "{waited:?}"
    );
}

#[test]
fn a_deadline_is_bounded_and_defaults_to_an_hour() {
    assert_eq!(Deadline::default().as_seconds(), 3_600);
    assert_eq!(
        Deadline::of(&local_context(1, 8).unwrap()),
        Deadline::default()
    );
    assert_eq!(Deadline::seconds(604_800).unwrap().as_seconds(), 604_800);
    for bad in [0, 604_801] {
        let e = Deadline::seconds(bad).unwrap_err();
        assert_eq!(e.code(), 2, "{e}");
        assert!(e.to_string().contains("1 to 604800 seconds"), "{e}");
    }
}

/// `anomark_feature` gives the bits of `FittedFeatures::apply` for every
/// input kind and transform without fitted parameters, in several
/// partitions, and `anomark_feature_check` the first rule a training value
/// breaks, in `features::fit`'s order (input, each transform's domain, the
/// bound).
#[test]
fn features_on_the_engine_equal_the_library() {
    use crate::features::{Fitted, FittedFeature, FittedFeatures, TrainRefusal};
    use crate::spec::FeatureInput;
    let (mut x, a) = rows(3_000, 11);
    // Zeros and negatives: refused ratios, logs and square roots.
    for i in (0..3_000).step_by(97) {
        x[[i, 1]] = 0.0;
    }
    for i in (5..3_000).step_by(89) {
        x[[i, 0]] = -x[[i, 0]] - 1.5;
    }
    let feature = |input, transforms| FittedFeature {
        name: "f".into(),
        input,
        from: String::new(),
        transforms,
    };
    let cases = [
        feature(FeatureInput::Column(0), vec![]),
        feature(FeatureInput::Column(2), vec![Fitted::Log]),
        feature(FeatureInput::Ratio(0, 1), vec![Fitted::Log1p]),
        feature(
            FeatureInput::Difference(2, 0),
            vec![Fitted::Sqrt, Fitted::Log],
        ),
        feature(FeatureInput::Product(0, 2), vec![]),
        feature(FeatureInput::Ratio(2, 1), vec![Fitted::Sqrt]),
    ];
    let data = Dataset::sample_of(
        vec!["x0".into(), "x1".into(), "x2".into()],
        x.iter().copied().collect(),
    )
    .unwrap();
    let rt = runtime();
    for partitions in [1, 3] {
        let ctx = rt.block_on(session(&x, &a, partitions, 257));
        for f in &cases {
            let (p, q) = match f.input {
                FeatureInput::Column(p) => (p, p),
                FeatureInput::Ratio(p, q)
                | FeatureInput::Difference(p, q)
                | FeatureInput::Product(p, q) => (p, q),
            };
            let lit = sql_bytes(&functions::feature_to_bytes(f).unwrap());
            let got = rt.block_on(read(
                &ctx,
                &format!(
                    "SELECT x{p} AS u, x{q} AS w, {}({lit}, x{p}, x{q}), {}({lit}, x{p}, x{q}) FROM data",
                    functions::FEATURE,
                    functions::FEATURE_CHECK
                ),
            ));
            let mut seen = 0;
            for b in &got {
                let col = |j| column::<Float64Array>(b, j).unwrap().clone();
                let (xa, xb, v) = (col(0), col(1), col(2));
                let code = column::<datafusion::arrow::array::Int64Array>(b, 3).unwrap();
                for i in 0..b.num_rows() {
                    let (va, vb) = (xa.value(i), xb.value(i));
                    // The library on the same row: the fit's checks, and
                    // `apply`'s value where they pass.
                    let want = f.train_value(va, vb);
                    let c = functions::refusal_code(want.err(), f.transforms.len());
                    assert_eq!(code.value(i), c);
                    assert_eq!(
                        functions::refusal_of_code(c, f.transforms.len()),
                        want.err()
                    );
                    match want {
                        Ok(w) => {
                            assert_eq!(v.value(i).to_bits(), w.to_bits());
                            let mut row = vec![0.0; 3];
                            row[p] = va;
                            row[q] = vb;
                            let one = Dataset::sample_of(
                                vec!["x0".into(), "x1".into(), "x2".into()],
                                row,
                            )
                            .unwrap();
                            let set = FittedFeatures {
                                set: "s".into(),
                                features: vec![f.clone()],
                            };
                            let m = set.apply(&one, &[crate::data::RowId(0)]).unwrap();
                            assert_eq!(m[(0, 0)].to_bits(), w.to_bits());
                        }
                        Err(r) => {
                            assert!(v.value(i).is_nan());
                            if r == TrainRefusal::Input {
                                assert!(!matches!(f.input, FeatureInput::Column(_)));
                            }
                        }
                    }
                    seen += 1;
                }
            }
            assert_eq!(seen, 3_000);
        }
    }
    // Some rows of each kind of refusal occur above.
    let refusals: Vec<Option<TrainRefusal>> = (0..3_000)
        .flat_map(|i| {
            let row = data.x.row(i).to_vec();
            cases
                .iter()
                .map(move |f| {
                    let (p, q) = match f.input {
                        FeatureInput::Column(p) => (p, p),
                        FeatureInput::Ratio(p, q)
                        | FeatureInput::Difference(p, q)
                        | FeatureInput::Product(p, q) => (p, q),
                    };
                    f.train_value(row[p], row[q]).err()
                })
                .collect::<Vec<_>>()
        })
        .collect();
    for r in [
        TrainRefusal::Input,
        TrainRefusal::Domain(0),
        TrainRefusal::Domain(1),
    ] {
        assert!(refusals.contains(&Some(r)), "{r:?}");
    }
    // Features with fitted parameters have no bytes.
    assert!(functions::feature_to_bytes(&feature(
        FeatureInput::Column(0),
        vec![Fitted::BoxCox { lambda: 0.5 }]
    ))
    .is_none());
}

/// A cluster session's partitions: the rows over the task rows, rounded up,
/// within the client's cores and [`PARTITIONS_MAX`].
#[test]
fn partitions_follow_the_rows_within_their_bounds() {
    assert_eq!(partitions_for(0, 500_000, 2), 2);
    assert_eq!(partitions_for(1_000_000, 500_000, 2), 2);
    assert_eq!(partitions_for(1_000_001, 500_000, 2), 3);
    assert_eq!(partitions_for(20_000_000, 500_000, 2), 40);
    assert_eq!(partitions_for(20_000_000, 500_000, 64), 64);
    assert_eq!(partitions_for(u64::MAX, 1_000, 2), PARTITIONS_MAX);
    assert_eq!(partitions_for(10, 1_000, 0), 1);
    assert_eq!(partitions_for(10, 1_000, 10_000), PARTITIONS_MAX);
}
