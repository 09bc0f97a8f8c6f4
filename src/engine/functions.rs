//! anomark's protocol as DataFusion functions: every number an engine
//! computes is computed here by the library's own code (the row hash of
//! `audit::hash`, the rank key of `split`, the bucketed moments of `moments` and manifests of `audit::hash`, the
//! features of `features`, the models of `detect`, the summary of `summary`), so each engine's result is
//! the in-process result to the bit.
//!
//! Values that a function needs from the client (the seed and cut keys of a
//! split, a model's fitted parameters, the cut points of a summary) travel in
//! the plan as literal arguments, so executors hold no state.

use std::sync::Arc;

use datafusion::arrow::array::{
    Array, ArrayRef, BinaryArray, BooleanArray, FixedSizeBinaryArray, FixedSizeBinaryBuilder,
    Float64Array, Int64Array, Int8Array,
};
use datafusion::arrow::datatypes::DataType;
use datafusion::common::{DataFusionError, Result, ScalarValue};
use datafusion::logical_expr::function::AccumulatorArgs;
use datafusion::logical_expr::{
    Accumulator, AggregateUDF, AggregateUDFImpl, ColumnarValue, ScalarFunctionArgs, ScalarUDF,
    ScalarUDFImpl, Signature, Volatility,
};

use crate::audit::hash::ContentHash;
use crate::moments::Moments;
use crate::spec::Seed;

/// The row content hash: `anomark_row_hash(is_anomaly, x1, …, xd)`, 32 bytes.
pub const ROW_HASH: &str = "anomark_row_hash";
/// The leading 16 bits of a 32-byte key as an integer:
/// `anomark_prefix16(key)` (a content-hash bucket, or a rank-key bucket).
pub const PREFIX16: &str = "anomark_prefix16";
/// The protocol split's rank key: `anomark_rank_key(seed_bytes, hash)`.
pub const RANK_KEY: &str = "anomark_rank_key";
/// The protocol split: `anomark_split(cuts, hash, is_anomaly)`, the part
/// index (0 train, 1 validation, 2 test).
pub const SPLIT: &str = "anomark_split";
/// A fitted model's score: `anomark_score(model, x1, …, xd)`.
pub const SCORE: &str = "anomark_score";
/// The version guard: `anomark_version_check(client_version)` is true on a
/// process of the same anomark version and an error naming both otherwise.
pub const VERSION_CHECK: &str = "anomark_version_check";
/// One content-hash bucket's moments: `anomark_bucket_moments(hash, x1, …, xd)`.
pub const BUCKET_MOMENTS: &str = "anomark_bucket_moments";
/// One content-hash bucket's manifest digest: `anomark_bucket_digest(hash)`.
pub const BUCKET_DIGEST: &str = "anomark_bucket_digest";
/// A score's place among a summary's cut points:
/// `anomark_interval(cut_points, score)` ([`interval_code`]).
pub const INTERVAL: &str = "anomark_interval";
/// A score's `total_cmp` order as an integer: `anomark_order_key(score)`.
pub const ORDER_KEY: &str = "anomark_order_key";
/// `anomark_axis_prefix(s, shift)`: [`axis_prefix`] of each score.
pub const AXIS_PREFIX: &str = "anomark_axis_prefix";
/// `anomark_bin(range, s)`: [`score_bin`] of each score.
pub const BIN: &str = "anomark_bin";
/// `anomark_among(set, x)`: whether each integer `x` is one of `set`
/// ([`i64_le_bytes`] of integers sorted ascending; null for a null `x`):
/// one literal however many integers, where `x IN (…)` carries one plan
/// node per value to every task.
pub const AMONG: &str = "anomark_among";
/// `anomark_score_row(part, f, r, a, s1, …)`: `audit::hash::score_row`.
pub const SCORE_ROW: &str = "anomark_score_row";
/// `anomark_write_scores(dir, names, g, part, f, r, a, s1, …)`: writes a
/// group's scored rows as one Parquet part (`engine::held::ScoresWriter`).
pub const WRITE_SCORES: &str = "anomark_write_scores";

/// A feature's value on a training row: `anomark_feature(feature, a, b)`,
/// `features::FittedFeature::train_value` (NaN where a rule is broken;
/// [`FEATURE_CHECK`] names the rule).
pub const FEATURE: &str = "anomark_feature";
/// The first rule a feature's value on a training row breaks:
/// `anomark_feature_check(feature, a, b)`, a [`refusal_code`] (0: none).
pub const FEATURE_CHECK: &str = "anomark_feature_check";

/// A feature value read as text as a number: `anomark_number(text)`,
/// `data::text_number` (null when empty; NaN when not a number, which
/// [`NOT_NUMBER`] finds).
pub const NUMBER: &str = "anomark_number";
/// True for a text value that is not a number: `anomark_not_number(text)`,
/// `data::text_number` (false for a null or empty value).
pub const NOT_NUMBER: &str = "anomark_not_number";

/// The words an engine error carries when a process of another anomark
/// version refused a task (the client looks for them to name the mismatch).
pub const VERSION_MISMATCH: &str = "anomark version mismatch";

/// An execution error in DataFusion's type.
pub(crate) fn fail(message: impl Into<String>) -> DataFusionError {
    DataFusionError::Execution(message.into())
}

pub(crate) fn f64s<'a>(a: &'a ArrayRef, what: &str) -> Result<&'a Float64Array> {
    let f = a
        .as_any()
        .downcast_ref::<Float64Array>()
        .ok_or_else(|| fail(format!("{what}: want Float64, got {}", a.data_type())))?;
    if f.null_count() > 0 {
        return Err(fail(format!("{what}: a missing value")));
    }
    Ok(f)
}

pub(crate) fn bools<'a>(a: &'a ArrayRef, what: &str) -> Result<&'a BooleanArray> {
    let b = a
        .as_any()
        .downcast_ref::<BooleanArray>()
        .ok_or_else(|| fail(format!("{what}: want Boolean, got {}", a.data_type())))?;
    if b.null_count() > 0 {
        return Err(fail(format!("{what}: a missing value")));
    }
    Ok(b)
}

fn keys<'a>(a: &'a ArrayRef, what: &str) -> Result<&'a FixedSizeBinaryArray> {
    let k = a
        .as_any()
        .downcast_ref::<FixedSizeBinaryArray>()
        .ok_or_else(|| fail(format!("{what}: want 32 bytes, got {}", a.data_type())))?;
    if k.value_length() != 32 || k.null_count() > 0 {
        return Err(fail(format!("{what}: want 32 bytes, not null")));
    }
    Ok(k)
}

pub(crate) fn binaries<'a>(a: &'a ArrayRef, what: &str) -> Result<&'a BinaryArray> {
    a.as_any()
        .downcast_ref::<BinaryArray>()
        .ok_or_else(|| fail(format!("{what}: want Binary, got {}", a.data_type())))
}

/// A literal argument's bytes.
pub(crate) fn literal_bytes<'a>(v: &'a ColumnarValue, what: &str) -> Result<&'a [u8]> {
    match v {
        ColumnarValue::Scalar(ScalarValue::Binary(Some(b))) => Ok(b),
        _ => Err(fail(format!("{what}: want a Binary literal"))),
    }
}

/// The little-endian bytes of floats.
pub(crate) fn le_bytes(v: &[f64]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_bits().to_le_bytes()).collect()
}

/// The little-endian bytes of integers.
pub(crate) fn i64_le_bytes(v: &[i64]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

/// Floats from little-endian bytes.
pub(crate) fn from_le_bytes(b: &[u8]) -> Vec<f64> {
    b.chunks_exact(8)
        .map(|c| f64::from_bits(u64::from_le_bytes(c.try_into().expect("8 bytes"))))
        .collect()
}

/// The rows of `d` feature columns, row-major.
fn row_major(cols: &[&Float64Array], n: usize) -> ndarray::Array2<f64> {
    let d = cols.len();
    let mut x = ndarray::Array2::zeros((n, d));
    for (j, c) in cols.iter().enumerate() {
        for (i, v) in c.values().iter().enumerate() {
            x[[i, j]] = *v;
        }
    }
    x
}

macro_rules! scalar_udf_boilerplate {
    ($name:expr) => {
        fn name(&self) -> &str {
            $name
        }
        fn signature(&self) -> &Signature {
            &self.signature
        }
    };
}

/// `anomark_row_hash`: `audit::hash::rows` on the batch.
#[derive(Debug, PartialEq, Eq, Hash)]
struct RowHash {
    signature: Signature,
}

impl ScalarUDFImpl for RowHash {
    scalar_udf_boilerplate!(ROW_HASH);
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::FixedSizeBinary(32))
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let n = args.number_rows;
        let arrays = ColumnarValue::values_to_arrays(&args.args)?;
        let label = bools(&arrays[0], ROW_HASH)?;
        let cols: Vec<&Float64Array> = arrays[1..]
            .iter()
            .map(|a| f64s(a, ROW_HASH))
            .collect::<Result<_>>()?;
        let x = row_major(&cols, n);
        let is_anomaly: Vec<bool> = (0..n).map(|i| label.value(i)).collect();
        let hashes = crate::audit::hash::rows(&x, &is_anomaly);
        let mut b = FixedSizeBinaryBuilder::with_capacity(n, 32);
        for h in &hashes {
            b.append_value(h.0)?;
        }
        Ok(ColumnarValue::Array(Arc::new(b.finish())))
    }
}

/// `anomark_prefix16`: the leading two bytes, big-endian.
#[derive(Debug, PartialEq, Eq, Hash)]
struct Prefix16 {
    signature: Signature,
}

/// A content hash's bucket: its leading 16 bits, big-endian.
pub fn bucket_of(h: &[u8; 32]) -> u16 {
    u16::from_be_bytes([h[0], h[1]])
}

impl ScalarUDFImpl for Prefix16 {
    scalar_udf_boilerplate!(PREFIX16);
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::Int64)
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let arrays = ColumnarValue::values_to_arrays(&args.args)?;
        let k = keys(&arrays[0], PREFIX16)?;
        let out: Int64Array = (0..args.number_rows)
            .map(|i| {
                let v = k.value(i);
                Some(i64::from(u16::from_be_bytes([v[0], v[1]])))
            })
            .collect();
        Ok(ColumnarValue::Array(Arc::new(out)))
    }
}

/// `anomark_rank_key`: `split::rank_key` under the seed given as 8
/// little-endian bytes.
#[derive(Debug, PartialEq, Eq, Hash)]
struct RankKey {
    signature: Signature,
}

fn seed_of(b: &[u8]) -> Result<Seed> {
    let bytes: [u8; 8] = b
        .get(..8)
        .and_then(|s| s.try_into().ok())
        .ok_or_else(|| fail("a seed of 8 bytes"))?;
    Ok(Seed(u64::from_le_bytes(bytes)))
}

impl ScalarUDFImpl for RankKey {
    scalar_udf_boilerplate!(RANK_KEY);
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::FixedSizeBinary(32))
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let seed = seed_of(literal_bytes(&args.args[0], RANK_KEY)?)?;
        let arrays = ColumnarValue::values_to_arrays(&args.args[1..])?;
        let h = keys(&arrays[0], RANK_KEY)?;
        let mut b = FixedSizeBinaryBuilder::with_capacity(args.number_rows, 32);
        for i in 0..args.number_rows {
            let row: &[u8; 32] = h.value(i).try_into().expect("32 bytes");
            b.append_value(crate::split::rank_key(seed, row))?;
        }
        Ok(ColumnarValue::Array(Arc::new(b.finish())))
    }
}

/// Where a protocol split cuts each label's ranking: the seed, and for each
/// cut the first (rank key, content hash) of the part after it (`None`: the
/// cut lies after every content, so the part after it is empty).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SplitCuts {
    /// The seed of the ranking.
    pub seed: Seed,
    /// Normal rows: the starts of validation and of test.
    pub normal: [Option<[u8; 64]>; 2],
    /// Anomalies: the start of test (validation starts at the first).
    pub anomaly: Option<[u8; 64]>,
}

impl SplitCuts {
    /// The literal that carries the cuts in a plan.
    pub fn to_bytes(&self) -> Vec<u8> {
        let mut v = self.seed.0.to_le_bytes().to_vec();
        for c in self.normal.iter().chain(std::iter::once(&self.anomaly)) {
            match c {
                Some(k) => {
                    v.push(1);
                    v.extend_from_slice(k);
                }
                None => {
                    v.push(0);
                    v.extend_from_slice(&[0; 64]);
                }
            }
        }
        v
    }

    pub(crate) fn from_bytes(b: &[u8]) -> Result<SplitCuts> {
        if b.len() != 8 + 3 * 65 {
            return Err(fail("split cuts: wrong length"));
        }
        let seed = seed_of(b)?;
        let cut = |i: usize| -> Option<[u8; 64]> {
            let at = 8 + i * 65;
            (b[at] == 1).then(|| b[at + 1..at + 65].try_into().expect("64 bytes"))
        };
        Ok(SplitCuts {
            seed,
            normal: [cut(0), cut(1)],
            anomaly: cut(2),
        })
    }

    /// The part (0 train, 1 validation, 2 test) of a content.
    pub fn part(&self, hash: &[u8; 32], is_anomaly: bool) -> i8 {
        let mut key = [0u8; 64];
        key[..32].copy_from_slice(&crate::split::rank_key(self.seed, hash));
        key[32..].copy_from_slice(hash);
        let before = |c: &Option<[u8; 64]>| c.is_none_or(|c| key < c);
        if is_anomaly {
            if before(&self.anomaly) {
                1
            } else {
                2
            }
        } else if before(&self.normal[0]) {
            0
        } else if before(&self.normal[1]) {
            1
        } else {
            2
        }
    }
}

/// `anomark_split`: [`SplitCuts::part`] of each row.
#[derive(Debug, PartialEq, Eq, Hash)]
struct SplitUdf {
    signature: Signature,
}

impl ScalarUDFImpl for SplitUdf {
    scalar_udf_boilerplate!(SPLIT);
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::Int8)
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let cuts = SplitCuts::from_bytes(literal_bytes(&args.args[0], SPLIT)?)?;
        let arrays = ColumnarValue::values_to_arrays(&args.args[1..])?;
        let h = keys(&arrays[0], SPLIT)?;
        let a = bools(&arrays[1], SPLIT)?;
        let out: Int8Array = (0..args.number_rows)
            .map(|i| Some(cuts.part(h.value(i).try_into().expect("32 bytes"), a.value(i))))
            .collect();
        Ok(ColumnarValue::Array(Arc::new(out)))
    }
}

/// A fitted Gaussian as the plan carries it to the scoring function.
#[derive(Debug, Clone, PartialEq)]
pub enum ModelParams {
    /// Independent Gaussian: means and variances.
    Independent {
        /// Means.
        mean: Vec<f64>,
        /// Variances.
        variance: Vec<f64>,
    },
    /// Multivariate Gaussian: mean and covariance (row-major).
    Multivariate {
        /// Mean.
        mean: Vec<f64>,
        /// Covariance, row-major.
        covariance: Vec<f64>,
    },
}

impl ModelParams {
    /// The literal that carries the model in a plan: a tag byte, the
    /// dimension as a little-endian u32, then the floats' bits.
    pub fn to_bytes(&self) -> Vec<u8> {
        let (tag, a, b) = match self {
            ModelParams::Independent { mean, variance } => (0u8, mean, variance),
            ModelParams::Multivariate { mean, covariance } => (1u8, mean, covariance),
        };
        let mut v = vec![tag];
        v.extend_from_slice(&(a.len() as u32).to_le_bytes());
        v.extend(le_bytes(a));
        v.extend(le_bytes(b));
        v
    }

    pub(crate) fn from_bytes(b: &[u8]) -> Result<ModelParams> {
        if b.len() < 5 {
            return Err(fail("model: too short"));
        }
        let d = u32::from_le_bytes(b[1..5].try_into().expect("4 bytes")) as usize;
        let f = from_le_bytes(&b[5..]);
        let (mean, rest) = f.split_at(d.min(f.len()));
        match b[0] {
            0 if rest.len() == d => Ok(ModelParams::Independent {
                mean: mean.to_vec(),
                variance: rest.to_vec(),
            }),
            1 if rest.len() == d * d => Ok(ModelParams::Multivariate {
                mean: mean.to_vec(),
                covariance: rest.to_vec(),
            }),
            _ => Err(fail("model: malformed")),
        }
    }

    /// The library's model of these parameters (`detect::restore`, as
    /// `anomark score` rebuilds a run's model: the scores of the fitted
    /// model, to the bit).
    pub fn model(&self, features: &[String]) -> crate::Result<Box<dyn crate::detect::Model>> {
        use crate::detect::Params;
        let params = match self {
            ModelParams::Independent { mean, variance } => Params::IndependentGaussian {
                mean: mean.clone(),
                variance: variance.clone(),
            },
            ModelParams::Multivariate { mean, covariance } => Params::MultivariateGaussian {
                mean: mean.clone(),
                covariance: covariance
                    .chunks(mean.len().max(1))
                    .map(|r| r.to_vec())
                    .collect(),
                // Not read when rebuilding the model.
                ln_det_covariance: f64::NAN,
            },
        };
        crate::detect::restore(&params, features)?
            .ok_or_else(|| crate::Error::internal("a Gaussian that cannot be rebuilt"))
    }
}

/// `anomark_score`: the model's scores of the batch's rows.
#[derive(Debug, PartialEq, Eq, Hash)]
struct ScoreUdf {
    signature: Signature,
}

impl ScalarUDFImpl for ScoreUdf {
    scalar_udf_boilerplate!(SCORE);
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::Float64)
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let params = ModelParams::from_bytes(literal_bytes(&args.args[0], SCORE)?)?;
        let arrays = ColumnarValue::values_to_arrays(&args.args[1..])?;
        let cols: Vec<&Float64Array> = arrays
            .iter()
            .map(|a| f64s(a, SCORE))
            .collect::<Result<_>>()?;
        let names: Vec<String> = (0..cols.len()).map(|j| format!("x{j}")).collect();
        let model = params
            .model(&names)
            .map_err(|e| fail(format!("{SCORE}: {e}")))?;
        let x = row_major(&cols, args.number_rows);
        let scores = crate::detect::score_in_blocks(model.as_ref(), x.view(), 8192);
        Ok(ColumnarValue::Array(Arc::new(Float64Array::from(scores))))
    }
}

/// `anomark_version_check`: refuses a client of another version.
#[derive(Debug, PartialEq, Eq, Hash)]
struct VersionCheck {
    signature: Signature,
    /// The version this process reports.
    version: String,
}

impl VersionCheck {
    fn check(&self, client: &str, role: &str) -> Result<()> {
        if client != self.version {
            return Err(fail(format!(
                "{VERSION_MISMATCH}: {role} runs anomark {}, the client {client}",
                self.version
            )));
        }
        Ok(())
    }
}

impl ScalarUDFImpl for VersionCheck {
    scalar_udf_boilerplate!(VERSION_CHECK);
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::Boolean)
    }
    /// Every planner that optimises the plan (the client, and a cluster's
    /// scheduler) checks the version here; the expression itself stays, so
    /// every task checks again where it runs.
    fn simplify(
        &self,
        args: Vec<datafusion::logical_expr::Expr>,
        _info: &datafusion::logical_expr::simplify::SimplifyContext,
    ) -> Result<datafusion::logical_expr::simplify::ExprSimplifyResult> {
        use datafusion::logical_expr::Expr;
        if let Some(Expr::Literal(v, _)) = args.first() {
            if let Some(Some(v)) = v.try_as_str() {
                self.check(v, "the planner (scheduler)")?;
            }
        }
        Ok(datafusion::logical_expr::simplify::ExprSimplifyResult::Original(args))
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        match &args.args[0] {
            ColumnarValue::Scalar(v) => match v.try_as_str() {
                Some(Some(v)) => self.check(v, "an executor")?,
                _ => return Err(fail(format!("{VERSION_CHECK}: want a text literal"))),
            },
            _ => return Err(fail(format!("{VERSION_CHECK}: want a text literal"))),
        }
        Ok(ColumnarValue::Scalar(ScalarValue::Boolean(Some(true))))
    }
}

/// The moments of one content-hash bucket's rows given in any order: the
/// rows put in ascending content-hash order and handed to
/// `moments::Moments::of_bucket` (rows with equal hashes have equal content,
/// so their order among themselves does not change the bits).
pub fn bucket_moments(hashes: &[[u8; 32]], x: ndarray::ArrayView2<'_, f64>) -> Moments {
    let mut order: Vec<usize> = (0..hashes.len()).collect();
    order.sort_by(|&a, &b| hashes[a].cmp(&hashes[b]));
    let sorted = x.select(ndarray::Axis(0), &order);
    Moments::of_bucket(sorted.view())
}

/// The bytes of moments: n as u64, then the mean's and the co-moments' bits.
pub fn moments_to_bytes(m: &Moments) -> Vec<u8> {
    let mut v = m.n.to_le_bytes().to_vec();
    v.extend(le_bytes(&m.mean));
    v.extend(le_bytes(&m.m2));
    v
}

/// Moments from [`moments_to_bytes`], of dimension `d`.
pub fn moments_from_bytes(b: &[u8], d: usize) -> Result<Moments> {
    if b.len() != 8 * (1 + d + d * d) {
        return Err(fail("moments: wrong length"));
    }
    let n = u64::from_le_bytes(b[..8].try_into().expect("8 bytes"));
    let f = from_le_bytes(&b[8..]);
    Ok(Moments {
        n,
        mean: f[..d].to_vec(),
        m2: f[d..].to_vec(),
    })
}

/// The aggregate functions share one shape: a name, any arguments, Binary
/// state and result.
#[derive(Debug, PartialEq, Eq, Hash)]
struct Aggregate {
    name: &'static str,
    signature: Signature,
}

impl AggregateUDFImpl for Aggregate {
    fn name(&self) -> &str {
        self.name
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::Binary)
    }
    fn accumulator(&self, args: AccumulatorArgs) -> Result<Box<dyn Accumulator>> {
        let d = args.exprs.len().saturating_sub(1);
        Ok(match self.name {
            BUCKET_MOMENTS => Box::new(MomentsAcc {
                d,
                hashes: Vec::new(),
                rows: Vec::new(),
            }),
            WRITE_SCORES => Box::new(super::held::ScoresWriter::default()),
            _ => Box::new(HashesAcc(Vec::new())),
        })
    }
}

/// Keeps a bucket's (hash, row) pairs; evaluates to [`bucket_moments`].
#[derive(Debug)]
struct MomentsAcc {
    d: usize,
    hashes: Vec<[u8; 32]>,
    rows: Vec<f64>,
}

impl MomentsAcc {
    fn pairs_bytes(&self) -> Vec<u8> {
        let mut v = Vec::with_capacity(self.hashes.len() * (32 + 8 * self.d));
        for (h, r) in self
            .hashes
            .iter()
            .zip(self.rows.chunks_exact(self.d.max(1)))
        {
            v.extend_from_slice(h);
            v.extend(le_bytes(r));
        }
        v
    }
}

impl Accumulator for MomentsAcc {
    fn update_batch(&mut self, values: &[ArrayRef]) -> Result<()> {
        let h = keys(&values[0], BUCKET_MOMENTS)?;
        let cols: Vec<&Float64Array> = values[1..]
            .iter()
            .map(|a| f64s(a, BUCKET_MOMENTS))
            .collect::<Result<_>>()?;
        for i in 0..h.len() {
            self.hashes.push(h.value(i).try_into().expect("32 bytes"));
            self.rows.extend(cols.iter().map(|c| c.value(i)));
        }
        Ok(())
    }
    fn evaluate(&mut self) -> Result<ScalarValue> {
        let x = ndarray::ArrayView2::from_shape((self.hashes.len(), self.d), &self.rows)
            .map_err(|e| fail(e.to_string()))?;
        let m = bucket_moments(&self.hashes, x);
        Ok(ScalarValue::Binary(Some(moments_to_bytes(&m))))
    }
    fn size(&self) -> usize {
        std::mem::size_of_val(self) + self.hashes.capacity() * 32 + self.rows.capacity() * 8
    }
    fn state(&mut self) -> Result<Vec<ScalarValue>> {
        Ok(vec![ScalarValue::Binary(Some(self.pairs_bytes()))])
    }
    fn merge_batch(&mut self, states: &[ArrayRef]) -> Result<()> {
        let s = binaries(&states[0], BUCKET_MOMENTS)?;
        let width = 32 + 8 * self.d;
        for i in 0..s.len() {
            if s.is_null(i) {
                continue;
            }
            for pair in s.value(i).chunks_exact(width) {
                self.hashes.push(pair[..32].try_into().expect("32 bytes"));
                self.rows.extend(from_le_bytes(&pair[32..]));
            }
        }
        Ok(())
    }
}

/// Keeps a bucket's hashes (its state: them sorted, concatenated);
/// evaluates to the bucket's manifest digest
/// (`audit::hash::manifest_bucket_digest` of them sorted).
#[derive(Debug)]
struct HashesAcc(Vec<[u8; 32]>);

impl HashesAcc {
    fn bytes(&mut self) -> Vec<u8> {
        self.0.sort_unstable();
        self.0.concat()
    }
}

impl Accumulator for HashesAcc {
    fn update_batch(&mut self, values: &[ArrayRef]) -> Result<()> {
        let h = keys(&values[0], BUCKET_DIGEST)?;
        self.0
            .extend((0..h.len()).map(|i| -> [u8; 32] { h.value(i).try_into().expect("32") }));
        Ok(())
    }
    fn evaluate(&mut self) -> Result<ScalarValue> {
        self.0.sort_unstable();
        let sorted: Vec<ContentHash> = self.0.iter().map(|h| ContentHash(*h)).collect();
        let digest = crate::audit::hash::manifest_bucket_digest(&sorted);
        Ok(ScalarValue::Binary(Some(digest.to_vec())))
    }
    fn size(&self) -> usize {
        std::mem::size_of_val(self) + self.0.capacity() * 32
    }
    fn state(&mut self) -> Result<Vec<ScalarValue>> {
        Ok(vec![ScalarValue::Binary(Some(self.bytes()))])
    }
    fn merge_batch(&mut self, states: &[ArrayRef]) -> Result<()> {
        let s = binaries(&states[0], BUCKET_DIGEST)?;
        for i in 0..s.len() {
            if s.is_valid(i) {
                self.0.extend(
                    s.value(i)
                        .chunks_exact(32)
                        .map(|c| -> [u8; 32] { c.try_into().expect("32") }),
                );
            }
        }
        Ok(())
    }
}

/// A score's place in `f64::total_cmp` order as a signed integer (so an
/// engine's `MIN` and `MAX` follow that order exactly); its own inverse.
pub fn order_key(v: f64) -> i64 {
    flip(v.to_bits() as i64)
}

/// The score of an [`order_key`].
pub fn from_order_key(k: i64) -> f64 {
    f64::from_bits(flip(k) as u64)
}

/// Flips the magnitude bits of a negative number: `total_cmp`'s order as
/// signed integers; applied twice it gives the bits back.
fn flip(b: i64) -> i64 {
    b ^ ((((b >> 63) as u64) >> 1) as i64)
}

/// Where a score falls among the cut points of a summary (distinct, from
/// high to low in `total_cmp` order), as `Summary::with_cut_points` places
/// it: `2j + 1` on cut point `j`, `2j` inside gap `j` (below cut point
/// `j − 1`, above cut point `j`).
pub fn interval_code(cut_points: &[f64], v: f64) -> i64 {
    let j = cut_points.partition_point(|c| c.total_cmp(&v).is_gt());
    let on_cut = j < cut_points.len() && cut_points[j].total_cmp(&v).is_eq();
    2 * j as i64 + i64::from(on_cut)
}

/// `anomark_interval(cut_points, s)`: [`interval_code`] of each score.
#[derive(Debug, PartialEq, Eq, Hash)]
struct Interval {
    signature: Signature,
}

impl ScalarUDFImpl for Interval {
    scalar_udf_boilerplate!(INTERVAL);
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::Int64)
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let cuts = from_le_bytes(literal_bytes(&args.args[0], INTERVAL)?);
        let arrays = ColumnarValue::values_to_arrays(&args.args[1..])?;
        let s = f64s(&arrays[0], INTERVAL)?;
        let out: Int64Array = s
            .values()
            .iter()
            .map(|&v| Some(interval_code(&cuts, v)))
            .collect();
        Ok(ColumnarValue::Array(Arc::new(out)))
    }
}

/// `anomark_order_key(s)`: [`order_key`] of each score.
#[derive(Debug, PartialEq, Eq, Hash)]
struct OrderKey {
    signature: Signature,
}

impl ScalarUDFImpl for OrderKey {
    scalar_udf_boilerplate!(ORDER_KEY);
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::Int64)
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let arrays = ColumnarValue::values_to_arrays(&args.args)?;
        let s = f64s(&arrays[0], ORDER_KEY)?;
        let out: Int64Array = s.values().iter().map(|&v| Some(order_key(v))).collect();
        Ok(ColumnarValue::Array(Arc::new(out)))
    }
}

/// A feature without fitted parameters as bytes for [`FEATURE`] and
/// [`FEATURE_CHECK`]: its input's kind (0 column, 1 ratio, 2 difference,
/// 3 product), then one byte per transform (0 `log`, 1 `log1p`, 2 `sqrt`);
/// `None` for a transform with fitted parameters.
pub fn feature_to_bytes(f: &crate::features::FittedFeature) -> Option<Vec<u8>> {
    use crate::features::Fitted;
    use crate::spec::FeatureInput;
    let mut b = vec![match f.input {
        FeatureInput::Column(_) => 0,
        FeatureInput::Ratio(..) => 1,
        FeatureInput::Difference(..) => 2,
        FeatureInput::Product(..) => 3,
    }];
    for t in &f.transforms {
        b.push(match t {
            Fitted::Log => 0,
            Fitted::Log1p => 1,
            Fitted::Sqrt => 2,
            _ => return None,
        });
    }
    Some(b)
}

/// The feature of [`feature_to_bytes`] (its input reading columns 0 and 1:
/// the function is handed their values).
pub fn feature_from_bytes(b: &[u8]) -> Result<crate::features::FittedFeature> {
    use crate::features::Fitted;
    use crate::spec::FeatureInput;
    let (&kind, rest) = b.split_first().ok_or_else(|| fail("an empty feature"))?;
    let input = match kind {
        0 => FeatureInput::Column(0),
        1 => FeatureInput::Ratio(0, 1),
        2 => FeatureInput::Difference(0, 1),
        3 => FeatureInput::Product(0, 1),
        k => return Err(fail(format!("a feature input of kind {k}"))),
    };
    let transforms = rest
        .iter()
        .map(|t| match t {
            0 => Ok(Fitted::Log),
            1 => Ok(Fitted::Log1p),
            2 => Ok(Fitted::Sqrt),
            k => Err(fail(format!("a transform of kind {k}"))),
        })
        .collect::<Result<Vec<_>>>()?;
    Ok(crate::features::FittedFeature {
        name: String::new(),
        input,
        from: String::new(),
        transforms,
    })
}

/// A training refusal as an integer ordered as the rules are checked: 1 the
/// input, 2 + k transform k, 2 + the number of transforms the bound (0: none).
pub fn refusal_code(r: Option<crate::features::TrainRefusal>, transforms: usize) -> i64 {
    use crate::features::TrainRefusal;
    match r {
        None => 0,
        Some(TrainRefusal::Input) => 1,
        Some(TrainRefusal::Domain(k)) => 2 + k as i64,
        Some(TrainRefusal::Limit) => 2 + transforms as i64,
    }
}

/// The refusal of a [`refusal_code`] (`None` for 0 or a code out of range).
pub fn refusal_of_code(code: i64, transforms: usize) -> Option<crate::features::TrainRefusal> {
    use crate::features::TrainRefusal;
    let t = transforms as i64;
    match code {
        1 => Some(TrainRefusal::Input),
        c if (2..2 + t).contains(&c) => Some(TrainRefusal::Domain((c - 2) as usize)),
        c if c == 2 + t => Some(TrainRefusal::Limit),
        _ => None,
    }
}

/// `anomark_feature` and `anomark_feature_check`: a feature's training
/// value, or the code of the rule it breaks.
#[derive(Debug, PartialEq, Eq, Hash)]
struct FeatureUdf {
    signature: Signature,
    name: &'static str,
}

impl ScalarUDFImpl for FeatureUdf {
    fn name(&self) -> &str {
        self.name
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(if self.name == FEATURE {
            DataType::Float64
        } else {
            DataType::Int64
        })
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let f = feature_from_bytes(literal_bytes(&args.args[0], self.name)?)?;
        let arrays = ColumnarValue::values_to_arrays(&args.args[1..])?;
        let (a, b) = (f64s(&arrays[0], self.name)?, f64s(&arrays[1], self.name)?);
        let values = a.values().iter().zip(b.values().iter());
        if self.name == FEATURE {
            let out: Float64Array = values
                .map(|(&a, &b)| Some(f.train_value(a, b).unwrap_or(f64::NAN)))
                .collect();
            Ok(ColumnarValue::Array(Arc::new(out)))
        } else {
            let out: Int64Array = values
                .map(|(&a, &b)| Some(refusal_code(f.train_value(a, b).err(), f.transforms.len())))
                .collect();
            Ok(ColumnarValue::Array(Arc::new(out)))
        }
    }
}

/// `anomark_number` and `anomark_not_number`: text values read by the
/// library's number parser.
#[derive(Debug, PartialEq, Eq, Hash)]
struct NumberUdf {
    signature: Signature,
    name: &'static str,
}

impl ScalarUDFImpl for NumberUdf {
    fn name(&self) -> &str {
        self.name
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(if self.name == NUMBER {
            DataType::Float64
        } else {
            DataType::Boolean
        })
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let arrays = ColumnarValue::values_to_arrays(&args.args)?;
        let text = datafusion::arrow::compute::cast(&arrays[0], &DataType::Utf8)?;
        let text = text
            .as_any()
            .downcast_ref::<datafusion::arrow::array::StringArray>()
            .ok_or_else(|| fail(format!("{}: want text", self.name)))?;
        let parsed = text.iter().map(|v| v.map(crate::data::text_number));
        if self.name == NUMBER {
            let out: Float64Array = parsed
                .map(|v| match v {
                    None | Some(Ok(None)) => None,
                    Some(Ok(Some(x))) => Some(x),
                    Some(Err(_)) => Some(f64::NAN),
                })
                .collect();
            Ok(ColumnarValue::Array(Arc::new(out)))
        } else {
            let out: BooleanArray = parsed.map(|v| Some(matches!(v, Some(Err(_))))).collect();
            Ok(ColumnarValue::Array(Arc::new(out)))
        }
    }
}

/// The leading `64 − shift` bits of a score's [`order_key`] (an
/// arithmetic shift, so prefixes keep `f64::total_cmp` order), `None` for a
/// score beyond the figures' axis limit (`card::plots::within_axis_limit`):
/// the digits by which the figures' order statistics are found exactly, 16
/// bits a pass.
pub fn axis_prefix(v: f64, shift: u32) -> Option<i64> {
    crate::card::plots::within_axis_limit(v).then(|| order_key(v) >> shift.min(63))
}

/// The score histogram's bin of a score on `range` (`card::plots::bin_of`
/// with `card::plots::SCORE_BINS` bins), −1 outside it.
pub fn score_bin(range: &std::ops::Range<f64>, v: f64) -> i64 {
    crate::card::plots::bin_of(v, range, crate::card::plots::SCORE_BINS).map_or(-1, |b| b as i64)
}

/// An integer literal argument.
fn literal_i64(v: &ColumnarValue, what: &str) -> Result<i64> {
    match v {
        ColumnarValue::Scalar(s) => match s {
            ScalarValue::Int64(Some(x)) => Ok(*x),
            ScalarValue::Int32(Some(x)) => Ok(i64::from(*x)),
            ScalarValue::UInt64(Some(x)) => Ok(*x as i64),
            _ => Err(fail(format!("{what}: want an integer literal"))),
        },
        _ => Err(fail(format!("{what}: want an integer literal"))),
    }
}

/// `anomark_among(set, x)`: membership in a sorted set, by binary search.
#[derive(Debug, PartialEq, Eq, Hash)]
struct AmongUdf {
    signature: Signature,
}

impl ScalarUDFImpl for AmongUdf {
    scalar_udf_boilerplate!(AMONG);
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::Boolean)
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let bytes = literal_bytes(&args.args[0], AMONG)?;
        if bytes.len() % 8 != 0 {
            return Err(fail(format!("{AMONG}: want 8 bytes per integer")));
        }
        let set: Vec<i64> = bytes
            .chunks_exact(8)
            .map(|c| i64::from_le_bytes(c.try_into().expect("8 bytes")))
            .collect();
        if set.windows(2).any(|w| w[0] >= w[1]) {
            return Err(fail(format!("{AMONG}: want integers sorted ascending")));
        }
        let arrays = ColumnarValue::values_to_arrays(&args.args[1..])?;
        let x = arrays[0]
            .as_any()
            .downcast_ref::<Int64Array>()
            .ok_or_else(|| {
                fail(format!(
                    "{AMONG}: want Int64, got {}",
                    arrays[0].data_type()
                ))
            })?;
        let out: BooleanArray = x
            .iter()
            .map(|v| v.map(|v| set.binary_search(&v).is_ok()))
            .collect();
        Ok(ColumnarValue::Array(Arc::new(out)))
    }
}

/// `anomark_axis_prefix(s, shift)`: [`axis_prefix`] of each score.
#[derive(Debug, PartialEq, Eq, Hash)]
struct AxisPrefix {
    signature: Signature,
}

impl ScalarUDFImpl for AxisPrefix {
    scalar_udf_boilerplate!(AXIS_PREFIX);
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::Int64)
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let shift = literal_i64(&args.args[1], AXIS_PREFIX)?;
        let shift = u32::try_from(shift)
            .ok()
            .filter(|s| *s < 64)
            .ok_or_else(|| fail(format!("{AXIS_PREFIX}: a shift of 0 to 63")))?;
        let arrays = ColumnarValue::values_to_arrays(&args.args[..1])?;
        let s = f64s(&arrays[0], AXIS_PREFIX)?;
        let out: Int64Array = s.values().iter().map(|&v| axis_prefix(v, shift)).collect();
        Ok(ColumnarValue::Array(Arc::new(out)))
    }
}

/// `anomark_bin(range, s)`: [`score_bin`] of each score, the range's two
/// ends carried in the plan.
#[derive(Debug, PartialEq, Eq, Hash)]
struct Bin {
    signature: Signature,
}

impl ScalarUDFImpl for Bin {
    scalar_udf_boilerplate!(BIN);
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::Int64)
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let ends = from_le_bytes(literal_bytes(&args.args[0], BIN)?);
        let [start, end] = ends[..] else {
            return Err(fail(format!("{BIN}: want the range's two ends")));
        };
        let arrays = ColumnarValue::values_to_arrays(&args.args[1..])?;
        let s = f64s(&arrays[0], BIN)?;
        let out: Int64Array = s
            .values()
            .iter()
            .map(|&v| Some(score_bin(&(start..end), v)))
            .collect();
        Ok(ColumnarValue::Array(Arc::new(out)))
    }
}

/// `anomark_score_row(part, f, r, a, s1, …)`: each row's
/// `audit::hash::score_row` (split, file, row in file, label, scores), a
/// batch's rows sixteen at a time by `audit::hash::score_rows`.
#[derive(Debug, PartialEq, Eq, Hash)]
struct ScoreRow {
    signature: Signature,
}

impl ScalarUDFImpl for ScoreRow {
    scalar_udf_boilerplate!(SCORE_ROW);
    fn return_type(&self, _: &[DataType]) -> Result<DataType> {
        Ok(DataType::FixedSizeBinary(32))
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let n = args.number_rows;
        let arrays = ColumnarValue::values_to_arrays(&args.args)?;
        if arrays.len() < 4 {
            return Err(fail(format!("{SCORE_ROW}: want part, f, r, a and scores")));
        }
        let int = |a: &ArrayRef| -> Result<Int64Array> {
            let c = datafusion::arrow::compute::cast(a, &DataType::Int64)?;
            c.as_any()
                .downcast_ref::<Int64Array>()
                .cloned()
                .ok_or_else(|| fail(format!("{SCORE_ROW}: want integers")))
        };
        let (part, f, r) = (int(&arrays[0])?, int(&arrays[1])?, int(&arrays[2])?);
        let a = bools(&arrays[3], SCORE_ROW)?;
        let scores: Vec<&Float64Array> = arrays[4..]
            .iter()
            .map(|c| f64s(c, SCORE_ROW))
            .collect::<Result<_>>()?;
        let hashes = crate::audit::hash::score_rows(
            n,
            scores.len(),
            |i| crate::audit::hash::Scored {
                split: part.value(i) as u8,
                file: f.value(i) as u32,
                row: r.value(i) as u64,
                anomaly: a.value(i),
            },
            |i, c| scores[c].value(i),
        );
        let out = FixedSizeBinaryArray::try_from_iter(hashes.iter().map(|h| h.0))?;
        Ok(ColumnarValue::Array(Arc::new(out)))
    }
}

/// Every scalar function, the version guard reporting `version`.
pub fn scalar_functions(version: &str) -> Vec<Arc<ScalarUDF>> {
    let any = || Signature::variadic_any(Volatility::Immutable);
    vec![
        Arc::new(ScalarUDF::from(RowHash { signature: any() })),
        Arc::new(ScalarUDF::from(Prefix16 { signature: any() })),
        Arc::new(ScalarUDF::from(RankKey { signature: any() })),
        Arc::new(ScalarUDF::from(SplitUdf { signature: any() })),
        Arc::new(ScalarUDF::from(ScoreUdf { signature: any() })),
        Arc::new(ScalarUDF::from(Interval { signature: any() })),
        Arc::new(ScalarUDF::from(OrderKey { signature: any() })),
        Arc::new(ScalarUDF::from(FeatureUdf {
            signature: any(),
            name: FEATURE,
        })),
        Arc::new(ScalarUDF::from(NumberUdf {
            signature: any(),
            name: NUMBER,
        })),
        Arc::new(ScalarUDF::from(NumberUdf {
            signature: any(),
            name: NOT_NUMBER,
        })),
        Arc::new(ScalarUDF::from(FeatureUdf {
            signature: any(),
            name: FEATURE_CHECK,
        })),
        Arc::new(ScalarUDF::from(AxisPrefix { signature: any() })),
        Arc::new(ScalarUDF::from(AmongUdf { signature: any() })),
        Arc::new(ScalarUDF::from(Bin { signature: any() })),
        Arc::new(ScalarUDF::from(ScoreRow { signature: any() })),
        Arc::new(ScalarUDF::from(super::sample::Sampled::new())),
        Arc::new(ScalarUDF::from(VersionCheck {
            signature: Signature::variadic_any(Volatility::Volatile),
            version: version.to_string(),
        })),
    ]
}

/// Every aggregate function.
pub fn aggregate_functions() -> Vec<Arc<AggregateUDF>> {
    [BUCKET_MOMENTS, BUCKET_DIGEST, WRITE_SCORES]
        .into_iter()
        .map(|name| {
            Arc::new(AggregateUDF::from(Aggregate {
                name,
                signature: Signature::variadic_any(Volatility::Immutable),
            }))
        })
        .collect()
}
