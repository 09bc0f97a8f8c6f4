//! The systematic samples of the training rows (every k-th row in
//! content-hash order, ties in file order) taken on the engine without a
//! sort merged across partitions and without sending every training row to
//! the client: the rows per content-hash bucket are counted first (the
//! buckets are the leading 16 bits of the hash, so bucket order is hash
//! order), the client turns the counts into each bucket's first global
//! rank, and the engine numbers each bucket's rows in (hash, file, row)
//! order (a window partitioned by bucket) and keeps the rows whose global
//! rank a stride divides ([`sampled`]). The client receives the kept rows
//! only (at most the sum of the sample limits, plus one a stride).

use std::collections::BTreeMap;
use std::sync::Arc;

use datafusion::arrow::array::{Array, Float64Array, Int64Array};
use datafusion::arrow::datatypes::DataType;
use datafusion::common::Result as DfResult;
use datafusion::logical_expr::{
    ColumnarValue, ScalarFunctionArgs, ScalarUDFImpl, Signature, Volatility,
};
use datafusion::prelude::SessionContext;

use super::{collect, functions, sql_bytes};
use crate::error::{Error, Result};

/// `anomark_sampled(plan, bucket, rn)`: [`sampled`] of each row.
pub const SAMPLED: &str = "anomark_sampled";

/// Whether the `rn`-th row (from 1) of `bucket` in (hash, file, row) order
/// is sampled: its global rank (the bucket's first rank in `firsts`, sorted
/// by bucket, plus `rn − 1`) is a multiple of one of `strides`.
pub fn sampled(firsts: &[(u16, u64)], strides: &[u64], bucket: u16, rn: u64) -> Option<u64> {
    let at = firsts.binary_search_by_key(&bucket, |f| f.0).ok()?;
    let rank = firsts[at].1 + rn.checked_sub(1)?;
    strides
        .iter()
        .any(|&s| s > 0 && rank.is_multiple_of(s))
        .then_some(rank)
}

/// The literal carrying [`sampled`]'s plan: the count of strides (u32), the
/// strides (u64 each), then (bucket u16, first rank u64) pairs, all little-endian.
fn plan_bytes(firsts: &[(u16, u64)], strides: &[u64]) -> Vec<u8> {
    let mut v = (strides.len() as u32).to_le_bytes().to_vec();
    for s in strides {
        v.extend_from_slice(&s.to_le_bytes());
    }
    for (b, f) in firsts {
        v.extend_from_slice(&b.to_le_bytes());
        v.extend_from_slice(&f.to_le_bytes());
    }
    v
}

type Plan = (Vec<(u16, u64)>, Vec<u64>);

fn plan_of(b: &[u8]) -> DfResult<Plan> {
    let bad = || functions::fail(format!("{SAMPLED}: a malformed plan"));
    let n = u32::from_le_bytes(b.get(..4).ok_or_else(bad)?.try_into().expect("4")) as usize;
    let strides_end = 4 + 8 * n;
    let strides = b
        .get(4..strides_end)
        .ok_or_else(bad)?
        .chunks_exact(8)
        .map(|c| u64::from_le_bytes(c.try_into().expect("8")))
        .collect();
    let rest = b.get(strides_end..).ok_or_else(bad)?;
    if rest.len() % 10 != 0 {
        return Err(bad());
    }
    let firsts = rest
        .chunks_exact(10)
        .map(|c| {
            (
                u16::from_le_bytes(c[..2].try_into().expect("2")),
                u64::from_le_bytes(c[2..].try_into().expect("8")),
            )
        })
        .collect();
    Ok((firsts, strides))
}

/// `anomark_sampled(plan, bucket, rn)`: each row's global rank when
/// [`sampled`], else null.
#[derive(Debug, PartialEq, Eq, Hash)]
pub(crate) struct Sampled {
    pub(crate) signature: Signature,
}

impl Sampled {
    pub(crate) fn new() -> Self {
        Sampled {
            signature: Signature::variadic_any(Volatility::Immutable),
        }
    }
}

impl ScalarUDFImpl for Sampled {
    fn name(&self) -> &str {
        SAMPLED
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn return_type(&self, _: &[DataType]) -> DfResult<DataType> {
        Ok(DataType::Int64)
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> DfResult<ColumnarValue> {
        let (firsts, strides) = plan_of(functions::literal_bytes(&args.args[0], SAMPLED)?)?;
        let arrays = ColumnarValue::values_to_arrays(&args.args[1..])?;
        let int = |a: &datafusion::arrow::array::ArrayRef| -> DfResult<Int64Array> {
            datafusion::arrow::compute::cast(a, &DataType::Int64)?
                .as_any()
                .downcast_ref::<Int64Array>()
                .cloned()
                .ok_or_else(|| functions::fail(format!("{SAMPLED}: want integers")))
        };
        let (bucket, rn) = (int(&arrays[0])?, int(&arrays[1])?);
        let out: Int64Array = (0..args.number_rows)
            .map(|i| {
                let b = u16::try_from(bucket.value(i)).ok()?;
                let rn = u64::try_from(rn.value(i)).ok()?;
                sampled(&firsts, &strides, b, rn).map(|r| r as i64)
            })
            .collect();
        Ok(ColumnarValue::Array(Arc::new(out)))
    }
}

/// The training rows (`part = 0` of `assigned`) whose rank in (hash, file,
/// row) order a stride of `strides` divides: (rank, the row's `nx` values),
/// in rank order. `per` holds the training rows per content-hash bucket.
pub(crate) async fn every_kth(
    ctx: &SessionContext,
    nx: usize,
    per: &BTreeMap<u16, u64>,
    strides: &[usize],
) -> Result<Vec<(usize, Vec<f64>)>> {
    let doing = "sampling the training rows";
    let p = functions::PREFIX16;
    let mut firsts = Vec::with_capacity(per.len());
    let mut at = 0u64;
    for (&b, &n) in per {
        firsts.push((b, at));
        at += n;
    }
    let strides: Vec<u64> = strides.iter().map(|&s| s as u64).collect();
    let xl = (0..nx)
        .map(|j| format!("x{j}"))
        .collect::<Vec<_>>()
        .join(", ");
    let rows = collect(
        ctx,
        doing,
        &format!(
            "SELECT k, {xl} FROM (SELECT {SAMPLED}({plan}, b, rn) AS k, {xl} FROM (SELECT \
             {p}(h) AS b, ROW_NUMBER() OVER (PARTITION BY {p}(h) ORDER BY h, f, r ROWS BETWEEN \
             UNBOUNDED PRECEDING AND CURRENT ROW) AS rn, {xl} \
             FROM assigned WHERE part = 0)) WHERE k IS NOT NULL",
            plan = sql_bytes(&plan_bytes(&firsts, &strides)),
        ),
    )
    .await?;
    let mut kept = Vec::new();
    for b in &rows {
        let k = int64s(b, 0)?;
        let cols: Vec<Float64Array> = (0..nx)
            .map(|j| {
                datafusion::arrow::compute::cast(b.column(j + 1), &DataType::Float64)
                    .map_err(|e| super::engine_error("reading the engine's result", e))
                    .and_then(|a| {
                        a.as_any()
                            .downcast_ref::<Float64Array>()
                            .cloned()
                            .ok_or_else(|| Error::internal("a sampled value not a float"))
                    })
            })
            .collect::<Result<_>>()?;
        for i in 0..b.num_rows() {
            kept.push((
                k.value(i) as usize,
                cols.iter().map(|c| c.value(i)).collect(),
            ));
        }
    }
    kept.sort_unstable_by_key(|r: &(usize, Vec<f64>)| r.0);
    Ok(kept)
}

fn int64s(b: &datafusion::arrow::record_batch::RecordBatch, j: usize) -> Result<Int64Array> {
    let a = datafusion::arrow::compute::cast(b.column(j), &DataType::Int64)
        .map_err(|e| super::engine_error("reading the engine's result", e))?;
    a.as_any()
        .downcast_ref::<Int64Array>()
        .cloned()
        .ok_or_else(|| Error::internal("an engine result not castable to Int64"))
}

#[cfg(test)]
mod tests {
    use std::sync::Arc;

    use datafusion::arrow::array::{
        ArrayRef, FixedSizeBinaryArray, Float64Array, Int64Array, Int8Array,
    };
    use datafusion::arrow::datatypes::{DataType, Field, Schema};
    use datafusion::arrow::record_batch::RecordBatch;
    use datafusion::datasource::MemTable;

    use super::*;

    /// The rows kept on the engine (three partitions of small batches,
    /// buckets numbered on their own) are the rows a sort of all training
    /// rows by (hash, file, row) keeps at every multiple of a stride, in
    /// order. Invented rows with repeated hashes across files, for this
    /// check only.
    #[test]
    fn every_kth_row_by_buckets_is_every_kth_row_of_the_sorted_rows() {
        let n = 2000usize;
        let h: Vec<[u8; 32]> = (0..n)
            .map(|i| {
                let mut k = [0u8; 32];
                k[0] = (i * 37 % 5) as u8;
                k[1] = (i * 11 % 3) as u8;
                k[2] = (i % 4) as u8;
                k
            })
            .collect();
        let (f, r): (Vec<i64>, Vec<i64>) = (0..n).map(|i| ((i % 2) as i64, (i / 2) as i64)).unzip();
        let part: Vec<i8> = (0..n).map(|i| if i % 9 == 0 { 1 } else { 0 }).collect();
        let x: Vec<f64> = (0..n).map(|i| i as f64 * 0.5).collect();
        let schema = Arc::new(Schema::new(vec![
            Field::new("h", DataType::FixedSizeBinary(32), false),
            Field::new("f", DataType::Int64, false),
            Field::new("r", DataType::Int64, false),
            Field::new("part", DataType::Int8, false),
            Field::new("x0", DataType::Float64, false),
        ]));
        let columns: Vec<ArrayRef> = vec![
            Arc::new(FixedSizeBinaryArray::try_from_iter(h.iter()).unwrap()),
            Arc::new(Int64Array::from(f.clone())),
            Arc::new(Int64Array::from(r.clone())),
            Arc::new(Int8Array::from(part.clone())),
            Arc::new(Float64Array::from(x.clone())),
        ];
        let batch = RecordBatch::try_new(schema.clone(), columns).unwrap();
        let parts: Vec<Vec<RecordBatch>> = (0..3)
            .map(|p| {
                let (lo, hi) = (p * n / 3, (p + 1) * n / 3);
                (lo..hi)
                    .step_by(64)
                    .map(|at| batch.slice(at, 64.min(hi - at)))
                    .collect()
            })
            .collect();
        let ctx = super::super::local_context(3, 64).unwrap();
        ctx.register_table(
            "assigned",
            Arc::new(MemTable::try_new(schema, parts).unwrap()),
        )
        .unwrap();
        let mut train: Vec<usize> = (0..n).filter(|&i| part[i] == 0).collect();
        train.sort_by_key(|&i| (h[i], f[i], r[i]));
        // The training rows per content-hash bucket.
        let mut per: BTreeMap<u16, u64> = BTreeMap::new();
        for &i in &train {
            *per.entry(functions::bucket_of(&h[i])).or_default() += 1;
        }
        for strides in [vec![1usize], vec![3, 7], vec![5000]] {
            let got = super::super::cluster::runtime()
                .unwrap()
                .block_on(every_kth(&ctx, 1, &per, &strides))
                .unwrap();
            let want: Vec<(usize, Vec<f64>)> = train
                .iter()
                .enumerate()
                .filter(|(k, _)| strides.iter().any(|s| k % s == 0))
                .map(|(k, &i)| (k, vec![x[i]]))
                .collect();
            assert_eq!(got, want, "strides {strides:?}");
        }
    }
}
