//! blake3 digests: of each row's content, of input files, of split manifests
//! and of the spec.
//!
//! The row encoding is part of the record's meaning and is documented in the
//! README ("Content hashes"); changing it changes every split, so it carries a
//! version tag.

use std::io::Read;
use std::path::Path;

use crate::error::{Error, Result};

/// Domain tag of the row encoding, version 1.
const ROW_TAG: &[u8] = b"anomark/row/v1\0";
/// Domain tag of a split manifest, version 2 (over content-hash buckets).
const MANIFEST_TAG: &[u8] = b"anomark/manifest/v2\0";

/// The blake3 hash of one row's canonical content.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct ContentHash(pub [u8; 32]);

impl ContentHash {
    /// The row's bucket: the big-endian `u16` of the hash's first two bytes
    /// (the split manifests and the training moments are defined on them).
    pub fn bucket(&self) -> u16 {
        u16::from_be_bytes([self.0[0], self.0[1]])
    }

    /// Lowercase hex.
    pub fn to_hex(&self) -> String {
        hex(&self.0)
    }
}

/// Lowercase hex of bytes.
pub fn hex(bytes: &[u8]) -> String {
    const DIGITS: &[u8; 16] = b"0123456789abcdef";
    let mut s = String::with_capacity(bytes.len() * 2);
    for b in bytes {
        s.push(DIGITS[(b >> 4) as usize] as char);
        s.push(DIGITS[(b & 15) as usize] as char);
    }
    s
}

/// The content hash of one row: blake3 over the tag `anomark/row/v1\0`, the
/// number of features as a little-endian u32, each feature value as the
/// little-endian bytes of its IEEE-754 binary64 (negative zero written as
/// zero), and one label byte (0 normal, 1 anomaly).
pub fn row(values: impl IntoIterator<Item = f64>, is_anomaly: bool, d: usize) -> ContentHash {
    let mut msg = vec![0u8; row_len(d)];
    encode_row(&mut msg, values, is_anomaly, d);
    ContentHash(*blake3::hash(&msg).as_bytes())
}

/// The length of a row's message with `d` features.
fn row_len(d: usize) -> usize {
    ROW_TAG.len() + 4 + 8 * d + 1
}

/// Writes one row's message, the encoding [`row`] hashes, into `msg` (of
/// [`row_len`] bytes): the one place that encoding is written.
fn encode_row(msg: &mut [u8], values: impl IntoIterator<Item = f64>, is_anomaly: bool, d: usize) {
    let (tag, rest) = msg.split_at_mut(ROW_TAG.len());
    tag.copy_from_slice(ROW_TAG);
    let (width, rest) = rest.split_at_mut(4);
    width.copy_from_slice(&(d as u32).to_le_bytes());
    let (body, label) = rest.split_at_mut(8 * d);
    let mut written = 0;
    for (bytes, v) in body.chunks_exact_mut(8).zip(values) {
        let v = if v == 0.0 { 0.0 } else { v };
        bytes.copy_from_slice(&v.to_bits().to_le_bytes());
        written += 1;
    }
    assert_eq!(written, d, "a row of {d} features");
    label[0] = u8::from(is_anomaly);
}

/// Content hashes of every row of a feature matrix, on all cores (each
/// row's hash is independent of the others, so the result is the same on
/// any number of threads), by [`messages`].
pub fn rows(x: &ndarray::Array2<f64>, is_anomaly: &[bool]) -> Vec<ContentHash> {
    let (n, d) = x.dim();
    // Rows read as slices where the matrix is one row-major run (a slice's
    // iterator is a plain loop; a view's steps by its strides).
    match x.as_slice() {
        Some(xs) => messages(n, row_len(d), |i, msg| {
            encode_row(
                msg,
                xs[i * d..(i + 1) * d].iter().copied(),
                is_anomaly[i],
                d,
            )
        }),
        None => messages(n, row_len(d), |i, msg| {
            encode_row(msg, x.row(i).iter().copied(), is_anomaly[i], d)
        }),
    }
}

/// The BLAKE3 hashes of `n` messages of `len` bytes each, message `i`
/// written by `encode(i, msg)`, on all cores: sixteen at a time side by side
/// by [`super::lanes`] while a message fits one chunk, else one by one by
/// the crate (the same bytes either way; `lanes` is tested against it).
fn messages(n: usize, len: usize, encode: impl Fn(usize, &mut [u8]) + Sync) -> Vec<ContentHash> {
    use super::lanes::{hash16, LANES, MAX_LEN};
    use rayon::prelude::*;
    // Zeroed (and its pages first touched) on all cores: 32 MB at a
    // million rows, which one thread takes about 10 ms to fault in.
    let mut out: Vec<ContentHash> = Vec::with_capacity(n);
    out.par_extend(rayon::iter::repeat_n(ContentHash([0; 32]), n));
    if len > MAX_LEN {
        out.par_iter_mut().enumerate().for_each_init(
            || vec![0u8; len],
            |msg, (i, h)| {
                encode(i, msg);
                *h = ContentHash(*blake3::hash(msg).as_bytes());
            },
        );
        return out;
    }
    // Each group's messages are laid out in one buffer; a short last group
    // repeats its last message (those hashes are dropped).
    const GROUPS_PER_TASK: usize = 256;
    out.par_chunks_mut(LANES * GROUPS_PER_TASK)
        .enumerate()
        .for_each(|(task, hashes)| {
            let mut buf = vec![0u8; LANES * len];
            let mut group = [[0u8; 32]; LANES];
            for (g, hs) in hashes.chunks_mut(LANES).enumerate() {
                let first = (task * GROUPS_PER_TASK + g) * LANES;
                for (l, msg) in buf.chunks_exact_mut(len).enumerate() {
                    encode(first + l.min(hs.len() - 1), msg);
                }
                hash16(&buf, len, len, &mut group);
                for (h, o) in hs.iter_mut().zip(&group) {
                    h.0 = *o;
                }
            }
        });
    out
}

/// Rows in canonical order, from [`order`].
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Order {
    /// Row indices `0..n` in ascending (content hash, row) order.
    pub rows: Vec<u32>,
    /// The runs of `rows` (as ranges of positions) whose rows share one
    /// content, for every content held by two rows or more, in order.
    pub repeats: Vec<std::ops::Range<usize>>,
}

/// Row indices `0..n` in ascending (content hash, row) order, on all cores,
/// and the runs of identical content.
///
/// Sorts compact (first 8 hash bytes, row) keys, whose order is the hashes'
/// byte order up to ties of the prefix; only a run of equal prefixes (in
/// practice: identical rows) is then ordered by the whole hash and cut into
/// runs of equal hashes. The order is exactly that of sorting by
/// `(hashes[i], i)`, and no whole hash is read outside a run of equal prefixes.
pub fn order(hashes: &[ContentHash]) -> Order {
    use rayon::prelude::*;
    let prefix = |h: &ContentHash| {
        let mut p = [0u8; 8];
        p.copy_from_slice(&h.0[..8]);
        u64::from_be_bytes(p)
    };
    let prefixes: Vec<u64> = hashes.par_iter().map(prefix).collect();
    // About 256 keys per bucket on a large input (the prefixes are uniform).
    let bits = match prefixes.len().checked_ilog2() {
        Some(l) if l >= 16 => (l - 8).min(16),
        _ => 0,
    };
    let keys = sorted_keys(&prefixes, bits);
    let mut out: Vec<u32> = keys.par_iter().map(|k| k.1).collect();
    let mut repeats = Vec::new();
    let mut i = 0;
    while i < keys.len() {
        let mut j = i + 1;
        while j < keys.len() && keys[j].0 == keys[i].0 {
            j += 1;
        }
        if j - i > 1 {
            out[i..j].sort_unstable_by_key(|&r| (hashes[r as usize], r));
            let mut a = i;
            while a < j {
                let mut b = a + 1;
                while b < j && hashes[out[b] as usize] == hashes[out[a] as usize] {
                    b += 1;
                }
                if b - a > 1 {
                    repeats.push(a..b);
                }
                a = b;
            }
        }
        i = j;
    }
    Order { rows: out, repeats }
}

/// The keys `(prefixes[i], i)` in ascending order. With `bits > 0` they are
/// first dealt into `2^bits` buckets by their top `bits` bits (a counting
/// pass and a scattering pass), and the buckets, consecutive and in key
/// order, are sorted on all cores; otherwise all are sorted in one parallel
/// sort. The keys are distinct (each holds its row), so both give the one
/// ascending order.
fn sorted_keys(prefixes: &[u64], bits: u32) -> Vec<(u64, u32)> {
    use rayon::prelude::*;
    if bits == 0 {
        let mut keys: Vec<(u64, u32)> = prefixes
            .par_iter()
            .enumerate()
            .map(|(i, &p)| (p, i as u32))
            .collect();
        keys.par_sort_unstable();
        return keys;
    }
    let shift = 64 - bits;
    let buckets = 1usize << bits;
    let (mut keys, start) = placed_by_bucket(prefixes.len(), buckets, |i| {
        let p = prefixes[i];
        ((p >> shift) as usize, (p, i as u32))
    });
    let mut parts = Vec::with_capacity(buckets);
    let mut rest = keys.as_mut_slice();
    for b in 0..buckets {
        let (part, tail) = rest.split_at_mut(start[b + 1] - start[b]);
        parts.push(part);
        rest = tail;
    }
    parts
        .into_par_iter()
        .with_min_len(64)
        .for_each(|part| part.sort_unstable());
    keys
}

/// Items `0..n` placed by bucket, as one counting sort places them: buckets
/// ascending, each bucket's items in input order; `item(i)` gives item i's
/// bucket (below `buckets`) and value. Returns the placed values and where
/// each bucket starts (`buckets + 1` offsets).
///
/// On all cores: each stretch of the input counts its items per bucket;
/// the output is then cut into one piece per (bucket, stretch), in that
/// order, and each stretch writes its items into its own pieces. The pieces
/// are where a serial placement would put those items, so the result does
/// not depend on the number of stretches.
fn placed_by_bucket<T: Copy + Default + Send + Sync>(
    n: usize,
    buckets: usize,
    item: impl Fn(usize) -> (usize, T) + Sync,
) -> (Vec<T>, Vec<usize>) {
    use rayon::prelude::*;
    // A stretch per core and a few more for balance, none very short, and
    // none with fewer than two items per bucket on average (each stretch
    // holds a counter and a piece per bucket).
    let stretches = (4 * rayon::current_num_threads())
        .min(n >> 14)
        .min(n / (2 * buckets.max(1)))
        .max(1);
    let per = n.div_ceil(stretches).max(1);
    let ranges: Vec<std::ops::Range<usize>> =
        (0..n).step_by(per).map(|a| a..(a + per).min(n)).collect();
    let counts: Vec<Vec<usize>> = ranges
        .par_iter()
        .map(|r| {
            let mut c = vec![0usize; buckets];
            for i in r.clone() {
                c[item(i).0] += 1;
            }
            c
        })
        .collect();
    let mut start = vec![0usize; buckets + 1];
    for b in 0..buckets {
        start[b + 1] = start[b] + counts.iter().map(|c| c[b]).sum::<usize>();
    }
    let mut out: Vec<T> = Vec::with_capacity(n);
    out.par_extend(rayon::iter::repeat_n(T::default(), n));
    let mut pieces: Vec<Vec<&mut [T]>> =
        ranges.iter().map(|_| Vec::with_capacity(buckets)).collect();
    let mut rest = out.as_mut_slice();
    for b in 0..buckets {
        for (s, c) in counts.iter().enumerate() {
            let (piece, tail) = std::mem::take(&mut rest).split_at_mut(c[b]);
            pieces[s].push(piece);
            rest = tail;
        }
    }
    pieces
        .into_par_iter()
        .zip(ranges)
        .for_each(|(mut pieces, r)| {
            let mut next = vec![0usize; buckets];
            for i in r {
                let (b, v) = item(i);
                pieces[b][next[b]] = v;
                next[b] += 1;
            }
        });
    (out, start)
}

/// A file's size and blake3 hash.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct FileDigest {
    /// Size in bytes.
    pub bytes: u64,
    /// blake3, lowercase hex.
    pub blake3: String,
}

/// Hashes a file by streaming it.
pub fn file(path: &Path) -> Result<FileDigest> {
    let mut f = std::fs::File::open(path).map_err(|e| Error::io(path, "reading", e))?;
    let mut h = blake3::Hasher::new();
    let mut buf = vec![0u8; 1 << 16];
    let mut bytes = 0u64;
    loop {
        let n = f
            .read(&mut buf)
            .map_err(|e| Error::io(path, "reading", e))?;
        if n == 0 {
            break;
        }
        bytes += n as u64;
        h.update(&buf[..n]);
    }
    Ok(FileDigest {
        bytes,
        blake3: h.finalize().to_hex().to_string(),
    })
}

/// The digest of a file made of `parts`, in order, without reading it back:
/// a part of 128 KiB or more is hashed on all cores (blake3's tree lets its
/// chunks be hashed side by side; the digest is the same bits).
pub fn parts<B: AsRef<[u8]>>(parts: &[B]) -> FileDigest {
    let mut h = blake3::Hasher::new();
    for p in parts {
        let p = p.as_ref();
        if p.len() >= 1 << 17 {
            h.update_rayon(p);
        } else {
            h.update(p);
        }
    }
    FileDigest {
        bytes: parts.iter().map(|p| p.as_ref().len() as u64).sum(),
        blake3: h.finalize().to_hex().to_string(),
    }
}

/// blake3 of bytes, lowercase hex.
pub fn bytes(b: &[u8]) -> String {
    blake3::hash(b).to_hex().to_string()
}

/// The hash of a split manifest, defined on content-hash buckets
/// ([`ContentHash::bucket`]) so that any partitioning of the rows gives it:
/// blake3 over the tag `anomark/manifest/v2\0` followed, for each non-empty
/// bucket in ascending order, by the bucket's number (2 bytes, big-endian)
/// and its digest ([`manifest_bucket_digest`]: blake3 over the 32-byte
/// content hashes of the bucket's rows in ascending byte order, a hash
/// repeated once per identical row). An empty split hashes the tag alone.
///
/// The hashes, in any order, are placed by bucket in one counting pass and
/// each bucket's few hashes sorted on all cores: no comparison sort of the
/// whole.
pub fn manifest(hashes: &[ContentHash]) -> String {
    use rayon::prelude::*;
    let (mut sorted, starts) = placed_by_bucket(hashes.len(), 1 << 16, |i| {
        let h = hashes[i];
        (usize::from(h.bucket()), h)
    });
    let runs: Vec<std::ops::Range<usize>> = starts
        .windows(2)
        .filter(|w| w[1] > w[0])
        .map(|w| w[0]..w[1])
        .collect();
    let mut rest: &mut [ContentHash] = &mut sorted;
    let mut buckets = Vec::with_capacity(runs.len());
    for r in &runs {
        let (bucket, after) = std::mem::take(&mut rest).split_at_mut(r.len());
        buckets.push(bucket);
        rest = after;
    }
    buckets.into_par_iter().for_each(|b| b.sort_unstable());
    of_runs(&sorted, &runs)
}

/// A split manifest in the earlier format, `anomark/manifest/v1`: blake3
/// over the tag `anomark/manifest/v1\0` and the rows' 32-byte content
/// hashes in ascending order. Runs no longer record it; it is computed only
/// to recognise the test-ledger entries that runs before the bucketed format
/// recorded, so that a test split opened then still counts as opened.
pub fn manifest_v1_of_sorted<'a>(hashes: impl Iterator<Item = &'a ContentHash>) -> String {
    let mut h = blake3::Hasher::new();
    h.update(b"anomark/manifest/v1\0");
    let mut buf = Vec::with_capacity(1 << 16);
    for c in hashes {
        buf.extend_from_slice(&c.0);
        if buf.len() >= 1 << 16 {
            h.update(&buf);
            buf.clear();
        }
    }
    h.update(&buf);
    h.finalize().to_hex().to_string()
}

/// The tag of a scored row's hash in the scores digest.
const SCORE_ROW_TAG: &[u8] = b"anomark/scores/v1\0";

/// A scored row as its hash in the scores digest reads it (apart from its
/// scores).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Scored {
    /// The split: 1 validation, 2 test.
    pub split: u8,
    /// The row's file, its index among the inputs.
    pub file: u32,
    /// The row in that file, from 0.
    pub row: u64,
    /// Whether the row is labelled an anomaly.
    pub anomaly: bool,
}

/// The length of a scored row's message with `k` candidates' scores.
fn score_row_len(k: usize) -> usize {
    SCORE_ROW_TAG.len() + 1 + 4 + 8 + 1 + 8 * k
}

/// Writes one scored row's message, the encoding [`score_row`] hashes, into
/// `msg` (of [`score_row_len`] bytes): the one place that encoding is written.
fn encode_score_row(msg: &mut [u8], r: Scored, scores: impl IntoIterator<Item = f64>) {
    let (tag, rest) = msg.split_at_mut(SCORE_ROW_TAG.len());
    tag.copy_from_slice(SCORE_ROW_TAG);
    let (head, body) = rest.split_at_mut(1 + 4 + 8 + 1);
    head[0] = r.split;
    head[1..5].copy_from_slice(&r.file.to_le_bytes());
    head[5..13].copy_from_slice(&r.row.to_le_bytes());
    head[13] = u8::from(r.anomaly);
    let mut written = 0;
    for (bytes, s) in body.chunks_exact_mut(8).zip(scores) {
        bytes.copy_from_slice(&s.to_bits().to_le_bytes());
        written += 1;
    }
    assert_eq!(written * 8, body.len(), "one score per candidate");
}

/// One scored row's hash in the scores digest: blake3 over the tag
/// `anomark/scores/v1\0`, the split (one byte: 1 validation, 2 test), the
/// row's file (its index among the inputs, `u32` little-endian) and its row
/// in that file (from 0, `u64` little-endian), its label (one byte, 1 for an
/// anomaly), then each candidate's score as its `f64` bits (little-endian),
/// candidates in spec order.
pub fn score_row(r: Scored, scores: &[f64]) -> ContentHash {
    let mut msg = vec![0u8; score_row_len(scores.len())];
    encode_score_row(&mut msg, r, scores.iter().copied());
    ContentHash(*blake3::hash(&msg).as_bytes())
}

/// [`score_row`] of `n` rows with `k` candidates each, row `i` being
/// `row(i)` with candidate `c`'s score `score(i, c)`, on all cores and
/// sixteen rows at a time by [`super::lanes`].
pub fn score_rows(
    n: usize,
    k: usize,
    row: impl Fn(usize) -> Scored + Sync,
    score: impl Fn(usize, usize) -> f64 + Sync,
) -> Vec<ContentHash> {
    messages(n, score_row_len(k), |i, msg| {
        encode_score_row(msg, row(i), (0..k).map(|c| score(i, c)))
    })
}

/// The scores digest of a run: [`manifest`]'s definition (buckets of
/// sorted hashes) over its scored rows' [`score_row`] hashes, so that it
/// does not depend on the order the rows are met in (in process from
/// scores.csv's rows; on an engine by bucket, as a split manifest).
pub fn scores_digest(rows: &[ContentHash]) -> String {
    manifest(rows)
}

/// One bucket's digest in a split manifest: blake3 over its rows' 32-byte
/// content hashes, given in ascending byte order.
pub fn manifest_bucket_digest<'a>(sorted: impl IntoIterator<Item = &'a ContentHash>) -> [u8; 32] {
    let mut h = blake3::Hasher::new();
    let mut last: Option<&ContentHash> = None;
    for c in sorted {
        debug_assert!(
            last.is_none_or(|l| l <= c),
            "manifest_bucket_digest: hashes out of order"
        );
        last = Some(c);
        h.update(&c.0);
    }
    *h.finalize().as_bytes()
}

/// [`manifest`] from the digests of its non-empty buckets computed elsewhere
/// (each by [`manifest_bucket_digest`]), in any order; a bucket named twice
/// is refused, since its rows would count twice.
pub fn manifest_of_buckets(mut buckets: Vec<(u16, [u8; 32])>) -> Result<String> {
    buckets.sort_by_key(|b| b.0);
    if let Some(w) = buckets.windows(2).find(|w| w[0].0 == w[1].0) {
        return Err(Error::internal(format!(
            "bucket {} of a split manifest is given twice",
            w[0].0
        )));
    }
    Ok(of_bucket_digests(&buckets))
}

/// The manifest over its buckets' digests, in ascending bucket order.
fn of_bucket_digests(buckets: &[(u16, [u8; 32])]) -> String {
    // One message in one buffer, hashed at once (the crate works on many
    // chunks side by side only when given them together).
    let mut msg = Vec::with_capacity(MANIFEST_TAG.len() + 34 * buckets.len());
    msg.extend_from_slice(MANIFEST_TAG);
    for (b, digest) in buckets {
        msg.extend_from_slice(&b.to_be_bytes());
        msg.extend_from_slice(digest);
    }
    blake3::hash(&msg).to_hex().to_string()
}

/// [`manifest_bucket_digest`] of each run of `hashes`, on all cores: the
/// runs of up to 32 rows (one BLAKE3 chunk) sixteen at a time side by side
/// by [`super::lanes`], grouped by length (a short last group repeats its
/// last run, whose extra digests are dropped), longer runs by the crate;
/// the same bytes either way (`lanes` is tested against the crate).
fn bucket_digests(hashes: &[ContentHash], runs: &[std::ops::Range<usize>]) -> Vec<[u8; 32]> {
    use super::lanes::{hash16, LANES, MAX_LEN};
    use rayon::prelude::*;
    let most = MAX_LEN / 32;
    let mut by_len: Vec<Vec<usize>> = vec![Vec::new(); most + 1];
    let mut long = Vec::new();
    for (i, r) in runs.iter().enumerate() {
        if r.len() <= most {
            by_len[r.len()].push(i);
        } else {
            long.push(i);
        }
    }
    let groups: Vec<(usize, &[usize])> = by_len
        .iter()
        .enumerate()
        .flat_map(|(k, v)| v.chunks(LANES).map(move |c| (k, c)))
        .collect();
    let mut out = vec![[0u8; 32]; runs.len()];
    let done: Vec<(usize, [u8; 32])> = groups
        .par_chunks(64)
        .flat_map_iter(|task| {
            let mut buf = vec![0u8; LANES * MAX_LEN];
            let mut done = Vec::with_capacity(task.len() * LANES);
            for &(k, group) in task {
                let len = 32 * k;
                for (l, msg) in buf.chunks_exact_mut(len).enumerate().take(LANES) {
                    let r = &runs[group[l.min(group.len() - 1)]];
                    for (slot, h) in msg.chunks_exact_mut(32).zip(&hashes[r.clone()]) {
                        slot.copy_from_slice(&h.0);
                    }
                }
                let mut digests = [[0u8; 32]; LANES];
                hash16(&buf, len, len, &mut digests);
                done.extend(group.iter().copied().zip(digests));
            }
            done
        })
        .chain(
            long.par_iter()
                .map(|&i| (i, manifest_bucket_digest(&hashes[runs[i].clone()]))),
        )
        .collect();
    for (i, digest) in done {
        out[i] = digest;
    }
    out
}

/// [`manifest`] of hashes given in ascending order (a split's rows are kept
/// in canonical order); the buckets' digests are made on all cores.
pub fn manifest_of_sorted<'a>(hashes: impl Iterator<Item = &'a ContentHash>) -> String {
    // Copied once into one run of memory: a split's rows are read from all
    // over the table of hashes, and the digests then read them sequentially.
    let hashes: Vec<ContentHash> = hashes.copied().collect();
    manifest_of_sorted_slice(&hashes)
}

/// [`manifest_of_sorted`] of hashes already held in one run of memory, in
/// ascending order, not copied.
pub fn manifest_of_sorted_slice(hashes: &[ContentHash]) -> String {
    let mut runs: Vec<std::ops::Range<usize>> = Vec::new();
    let mut start = 0;
    for i in 1..=hashes.len() {
        if i == hashes.len() || hashes[i].bucket() != hashes[start].bucket() {
            if i > start {
                runs.push(start..i);
            }
            start = i;
        }
    }
    of_runs(hashes, &runs)
}

/// The manifest of `hashes` in ascending order, cut into `runs`, one per
/// non-empty bucket in ascending bucket order.
fn of_runs(hashes: &[ContentHash], runs: &[std::ops::Range<usize>]) -> String {
    let digests: Vec<(u16, [u8; 32])> = runs
        .iter()
        .map(|r| hashes[r.start].bucket())
        .zip(bucket_digests(hashes, runs))
        .collect();
    debug_assert!(
        digests.windows(2).all(|w| w[0].0 < w[1].0),
        "manifest: hashes out of order"
    );
    of_bucket_digests(&digests)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A file in parts, some hashed on all cores (128 KiB and more), has the
    /// digest of its bytes hashed whole by one thread, on 1, 2 and 3
    /// threads: BLAKE3's tree mode defines one hash however its chunks are
    /// shared out (the BLAKE3 specification's tree mode, from memory).
    #[test]
    fn parts_hash_like_the_whole_file() {
        let big: Vec<u8> = (0..(1u32 << 19) + 77)
            .map(|i| (i.wrapping_mul(2_654_435_761) >> 13) as u8)
            .collect();
        let files: Vec<Vec<Vec<u8>>> = vec![
            vec![],
            vec![b"a,b\n".to_vec()],
            vec![big.clone()],
            vec![
                b"head".to_vec(),
                big[..1 << 17].to_vec(),
                vec![],
                big.clone(),
                b"tail".to_vec(),
            ],
        ];
        for parts in &files {
            let whole = parts.concat();
            for threads in [1, 2, 3] {
                let pool = rayon::ThreadPoolBuilder::new()
                    .num_threads(threads)
                    .build()
                    .unwrap();
                let d = pool.install(|| super::parts(parts));
                assert_eq!(d.bytes, whole.len() as u64);
                assert_eq!(d.blake3, bytes(&whole), "{threads} threads");
            }
        }
    }

    /// The placement on all cores equals one serial counting placement
    /// (buckets ascending, input order within a bucket), whatever the
    /// number of threads and so of stretches.
    #[test]
    fn placement_by_bucket_equals_the_serial_placement() {
        let serial = |items: &[(usize, u64)], buckets: usize| {
            let mut out = Vec::new();
            let mut start = vec![0];
            for b in 0..buckets {
                out.extend(items.iter().filter(|x| x.0 == b).map(|x| x.1));
                start.push(out.len());
            }
            (out, start)
        };
        for (n, buckets) in [
            (0usize, 4usize),
            (1, 1),
            (70_000, 3),
            (200_000, 64),
            (40_000, 1 << 16),
        ] {
            // Skewed buckets, some empty: bucket from a scrambled index.
            let items: Vec<(usize, u64)> = (0..n)
                .map(|i| {
                    let x = (i as u64)
                        .wrapping_mul(0x9E37_79B9_7F4A_7C15)
                        .rotate_left(17);
                    (
                        ((x % 1000) as usize * (x % 1000) as usize / 1000) % buckets,
                        x,
                    )
                })
                .collect();
            let want = serial(&items, buckets);
            for threads in [1, 2, 3, 8] {
                let pool = rayon::ThreadPoolBuilder::new()
                    .num_threads(threads)
                    .build()
                    .unwrap();
                let got = pool.install(|| placed_by_bucket(n, buckets, |i| items[i]));
                assert_eq!(got, want, "n {n}, buckets {buckets}, threads {threads}");
            }
        }
    }

    /// Official BLAKE3 test vectors (test_vectors/test_vectors.json of the
    /// BLAKE3 reference repository; input byte i = i mod 251), as listed in
    /// REFERENCES.md section 3.
    #[test]
    fn blake3_official_vectors() {
        let input = |n: usize| (0..n).map(|i| (i % 251) as u8).collect::<Vec<u8>>();
        let cases = [
            (
                0,
                "af1349b9f5f9a1a6a0404dea36dcc9499bcb25c9adc112b7cc9a93cae41f3262",
            ),
            (
                1,
                "2d3adedff11b61f14c886e35afa036736dcd87a74d27b5c1510225d0f592e213",
            ),
            (
                1023,
                "10108970eeda3eb932baac1428c7a2163b0e924c9a9e25b35bba72b28f70bd11",
            ),
            (
                1024,
                "42214739f095a406f3fc83deb889744ac00df831c10daa55189b5d121c855af7",
            ),
        ];
        for (n, want) in cases {
            assert_eq!(bytes(&input(n)), want, "len {n}");
        }
    }

    #[test]
    fn row_hash_ignores_sign_of_zero_but_not_label() {
        let a = row([0.0, 1.5], false, 2);
        let b = row([-0.0, 1.5], false, 2);
        let c = row([0.0, 1.5], true, 2);
        assert_eq!(a, b);
        assert_ne!(a, c);
    }

    #[test]
    fn rows_on_all_cores_equal_row_by_row() {
        let x = ndarray::Array2::from_shape_fn((10_000, 3), |(i, j)| {
            if i % 7 == 0 && j == 1 {
                -0.0
            } else {
                (i * 3 + j) as f64 * 0.37
            }
        });
        let labels: Vec<bool> = (0..10_000).map(|i| i % 13 == 0).collect();
        let fast = rows(&x, &labels);
        for (i, h) in fast.iter().enumerate() {
            assert_eq!(*h, row(x.row(i).iter().copied(), labels[i], 3), "row {i}");
        }
        // The same matrix held column by column: read by its strides.
        use ndarray::ShapeBuilder;
        let mut by_columns = ndarray::Array2::zeros((10_000, 3).f());
        by_columns.assign(&x);
        assert!(by_columns.as_slice().is_none());
        assert_eq!(rows(&by_columns, &labels), fast);
    }

    /// The side-by-side path and the one-row-at-a-time path (`row`, the
    /// `blake3` crate) agree at the widths around the one-chunk limit (125
    /// features fit, 126 do not), with no features, and on row counts that
    /// leave a short last group.
    #[test]
    fn rows_equal_row_by_row_at_every_width_class() {
        for &(n, d) in &[(1, 0), (17, 1), (33, 16), (50, 125), (19, 126), (5, 200)] {
            let x = ndarray::Array2::from_shape_fn((n, d), |(i, j)| {
                ((i * 31 + j * 7) % 97) as f64 * -1.25 + 0.5
            });
            let labels: Vec<bool> = (0..n).map(|i| i % 3 == 0).collect();
            let fast = rows(&x, &labels);
            assert_eq!(fast.len(), n);
            for (i, h) in fast.iter().enumerate() {
                assert_eq!(
                    *h,
                    row(x.row(i).iter().copied(), labels[i], d),
                    "n {n} d {d} row {i}"
                );
            }
        }
    }

    /// A scored row's hash is its documented byte layout, fed to the
    /// `blake3` crate piece by piece (the definition as `anomark/scores/v1`
    /// was first written), and the side-by-side `score_rows` agrees with it
    /// around the one-chunk limit (124 scores fit, 125 do not), with no
    /// scores, and on row counts that leave a short last group.
    #[test]
    fn score_rows_are_the_documented_layout() {
        let by_pieces = |r: Scored, scores: &[f64]| {
            let mut h = blake3::Hasher::new();
            h.update(b"anomark/scores/v1\0");
            h.update(&[r.split]);
            h.update(&r.file.to_le_bytes());
            h.update(&r.row.to_le_bytes());
            h.update(&[u8::from(r.anomaly)]);
            for s in scores {
                h.update(&s.to_bits().to_le_bytes());
            }
            ContentHash(*h.finalize().as_bytes())
        };
        let row_of = |i: usize| Scored {
            split: 1 + (i % 2) as u8,
            file: (i % 3) as u32,
            row: (i as u64) * 0x1_0000_0001,
            anomaly: i.is_multiple_of(5),
        };
        let score = |i: usize, c: usize| match (i + c) % 4 {
            0 => -0.0,
            1 => f64::INFINITY,
            _ => (i * 31 + c * 7) as f64 * -1.25 + 0.5,
        };
        assert_eq!(score_row_len(124), 1024);
        for &(n, k) in &[(1, 0), (17, 1), (33, 2), (40, 124), (19, 125), (3, 200)] {
            let fast = score_rows(n, k, row_of, score);
            assert_eq!(fast.len(), n);
            for (i, h) in fast.iter().enumerate() {
                let scores: Vec<f64> = (0..k).map(|c| score(i, c)).collect();
                assert_eq!(*h, score_row(row_of(i), &scores), "n {n} k {k} row {i}");
                assert_eq!(*h, by_pieces(row_of(i), &scores), "n {n} k {k} row {i}");
            }
        }
    }

    #[test]
    fn order_equals_sorting_by_hash_then_row() {
        // Identical rows (equal hashes) and hashes sharing their first 8
        // bytes exercise both the prefix sort and the tie-break.
        let mut hashes: Vec<ContentHash> = (0..5000u32)
            .map(|i| row([f64::from(i % 3000)], i % 7 == 0, 1))
            .collect();
        let mut twin = hashes[10];
        twin.0[31] ^= 1;
        hashes.push(twin);
        let mut want: Vec<u32> = (0..hashes.len() as u32).collect();
        want.sort_by_key(|&i| (hashes[i as usize], i));
        let got = order(&hashes);
        assert_eq!(got.rows, want);
        // The runs of equal content, found by comparing neighbours.
        let mut runs = Vec::new();
        let mut a = 0;
        while a < want.len() {
            let mut b = a + 1;
            while b < want.len() && hashes[want[b] as usize] == hashes[want[a] as usize] {
                b += 1;
            }
            if b - a > 1 {
                runs.push(a..b);
            }
            a = b;
        }
        assert!(!runs.is_empty());
        assert_eq!(got.repeats, runs);
    }

    /// The bucketed sort and the single sort give the same order, on
    /// uniform prefixes, on prefixes crowded into a few buckets, and at the
    /// edges of the key range.
    #[test]
    fn bucketed_key_sort_equals_one_sort() {
        use rand_chacha::rand_core::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let uniform: Vec<u64> = (0..20_000).map(|_| rng.next_u64()).collect();
        let crowded: Vec<u64> = (0..20_000).map(|_| rng.next_u64() % 1000).collect();
        let mut edges = vec![0, u64::MAX, 1 << 63, (1 << 63) - 1, 0, u64::MAX];
        edges.extend(uniform.iter().take(100));
        for prefixes in [uniform, crowded, edges] {
            let mut want: Vec<(u64, u32)> = prefixes
                .iter()
                .enumerate()
                .map(|(i, &p)| (p, i as u32))
                .collect();
            want.sort();
            for bits in [0, 1, 4, 12, 16] {
                assert_eq!(sorted_keys(&prefixes, bits), want, "bits {bits}");
            }
        }
    }

    #[test]
    fn manifest_is_order_free() {
        let a = row([1.0], false, 1);
        let b = row([2.0], false, 1);
        assert_eq!(manifest(&[a, b]), manifest(&[b, a]));
        assert_ne!(manifest(&[a, b]), manifest(&[a, b, b]));
        let mut many: Vec<ContentHash> = (0..5000u32)
            .map(|i| row([f64::from(i)], i % 7 == 0, 1))
            .collect();
        let unsorted = manifest(&many);
        many.sort_unstable();
        assert_eq!(manifest_of_sorted(many.iter()), unsorted);
        // Several rows to a bucket, rows repeated, in reverse order: the
        // placement by bucket equals one sort of the whole.
        let x = ndarray::Array2::from_shape_fn((300_000, 1), |(i, _)| (i % 200_000) as f64);
        let mut dense = rows(&x, &vec![false; 300_000]);
        dense.reverse();
        let placed = manifest(&dense);
        dense.sort_unstable();
        assert_eq!(placed, manifest_of_sorted(dense.iter()));
        // The definition written out: blake3 over the tag, then per
        // non-empty bucket in order its number (big-endian) and the blake3
        // of its sorted hashes.
        let mut h = blake3::Hasher::new();
        h.update(b"anomark/manifest/v2\0");
        let mut per: Vec<(u16, blake3::Hasher)> = Vec::new();
        for c in &many {
            let b = u16::from_be_bytes([c.0[0], c.0[1]]);
            if per.last().is_none_or(|l| l.0 != b) {
                per.push((b, blake3::Hasher::new()));
            }
            per.last_mut().unwrap().1.update(&c.0);
        }
        let mut digests = Vec::new();
        for (b, d) in &per {
            h.update(&b.to_be_bytes());
            h.update(d.finalize().as_bytes());
            digests.push((*b, *d.finalize().as_bytes()));
        }
        assert_eq!(unsorted, h.finalize().to_hex().to_string());
        // From bucket digests computed elsewhere, in any order.
        digests.reverse();
        assert_eq!(manifest_of_buckets(digests.clone()).unwrap(), unsorted);
        digests.push(digests[0]);
        assert!(manifest_of_buckets(digests).is_err());
        // Buckets of every run length from 1 to 40 rows (beyond one BLAKE3
        // chunk from 33), several of each length, some hashes repeated:
        // the side-by-side digests equal the crate's, bucket by bucket.
        let mut crafted: Vec<ContentHash> = Vec::new();
        for b in 0u16..400 {
            let k = 1 + (b as usize * 7) % 40;
            for j in 0..k {
                let mut h = [(j % 5) as u8; 32];
                h[..2].copy_from_slice(&(b * 163).to_be_bytes());
                h[2] = (j / 2) as u8;
                crafted.push(ContentHash(h));
            }
        }
        crafted.sort_unstable();
        let mut by_bucket: Vec<(u16, [u8; 32])> = Vec::new();
        for run in crafted.chunk_by(|a, b| a.bucket() == b.bucket()) {
            let mut h = blake3::Hasher::new();
            for c in run {
                h.update(&c.0);
            }
            by_bucket.push((run[0].bucket(), *h.finalize().as_bytes()));
        }
        assert_eq!(
            manifest_of_sorted(crafted.iter()),
            manifest_of_buckets(by_bucket).unwrap()
        );
        // An empty split: the tag alone.
        assert_eq!(
            manifest(&[]),
            blake3::hash(b"anomark/manifest/v2\0").to_hex().to_string()
        );
    }
}
