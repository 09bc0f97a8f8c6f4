//! The parallel reader for plain CSV: the common case of an unquoted,
//! comma-separated file whose wanted fields are all present, numbers in
//! plain decimal notation and text non-empty.
//!
//! It maps the file once, hashes those bytes while it parses them, splits
//! the body at line ends into blocks parsed on all cores, and fills the
//! row-major value matrix and the labels directly. It gives up (returns `None`) on anything
//! outside that case: a quote, a carriage return, a byte-order mark, an empty
//! line, a line with another number of fields, an empty or non-UTF-8 text
//! field, a label that is not one of the two declared values, or a number that is not `-?digits[.digits][e±digits]` or not
//! finite. The polars reader then reads the file as before and reports any
//! problem with its place, so this reader changes no message and no value.
//!
//! Numbers are parsed by fast-float2, the parser polars' CSV reader uses; on
//! the accepted grammar every correctly rounded parser gives the same bits
//! (a test compares them with polars' on the same file).

use std::path::Path;

use rayon::prelude::*;

use super::TextColumn;
use crate::audit::hash::FileDigest;
use crate::spec::Column;

/// Bytes per parallel block (at least; a block ends at a line end).
const BLOCK_BYTES: usize = 1 << 20;

/// A file read by the fast path.
pub(super) struct Plain {
    /// Numeric values, row-major (`height × numeric.len()`), negative zero
    /// written as zero.
    pub values: Vec<f64>,
    /// Text columns, in the order asked for; the label column (when one was
    /// given) is left empty and resolved into `labels`.
    pub text: Vec<TextColumn>,
    /// `true` for the anomaly value, when a label column was given.
    pub labels: Option<Vec<bool>>,
    /// Data rows.
    pub height: usize,
    /// Size and blake3 of the bytes read.
    pub digest: FileDigest,
}

/// The label column among the text columns: its index there and its two
/// declared values. A row with any other value sends the file to polars.
pub(crate) struct LabelWant<'a> {
    pub index: usize,
    pub normal: &'a str,
    pub anomaly: &'a str,
}

/// Where a header field goes.
#[derive(Clone, Copy)]
enum Slot {
    Skip,
    Number(usize),
    Text(usize),
    Label,
}

/// One block's share of the output.
struct Out<'a> {
    values: &'a mut [f64],
    labels: &'a mut [bool],
    /// Per text column (empty for the label): where each row's value ends
    /// in the block's own bytes of that column.
    ends: Vec<&'a mut [usize]>,
}

/// Reads `path` when it is plain CSV holding every wanted column; `None`
/// sends the caller to the general reader.
pub(super) fn read(
    path: &Path,
    numeric: &[&Column],
    text: &[&Column],
    label: Option<LabelWant<'_>>,
) -> Option<Plain> {
    let file = std::fs::File::open(path).ok()?;
    // SAFETY: the map is read-only and private to this call. The bytes that
    // are hashed are the bytes that are parsed; a file changed by another
    // process while it is read gives unreliable input to any reader (polars
    // maps files the same way), and the recorded hash then fails `verify`.
    let map = unsafe { memmap2::Mmap::map(&file) }.ok()?;
    let bytes: &[u8] = &map;
    let _t = crate::progress::part("mapping, hashing and parsing");
    let (digest, parsed) = rayon::join(
        || FileDigest {
            bytes: bytes.len() as u64,
            blake3: blake3::hash(bytes).to_hex().to_string(),
        },
        || parse(bytes, numeric, text, label.as_ref()),
    );
    // Unmapping 170 MB of file pages takes the kernel about 10 ms: done by
    // a thread of its own while the run goes on (nothing reads the map now).
    // (Should no thread start, the closure and the map are dropped here.)
    let _ = std::thread::Builder::new()
        .name("anomark-unmap".into())
        .spawn(move || drop(map));
    let (values, text, labels, height) = parsed?;
    Some(Plain {
        values,
        text,
        labels,
        height,
        digest,
    })
}

/// Parsed rows: row-major values, text columns, resolved labels, height.
pub(crate) type Parsed = (Vec<f64>, Vec<TextColumn>, Option<Vec<bool>>, usize);

fn parse(
    bytes: &[u8],
    numeric: &[&Column],
    text: &[&Column],
    label: Option<&LabelWant<'_>>,
) -> Option<Parsed> {
    let header_end = memchr::memchr(b'\n', bytes)?;
    let slots = slots(&bytes[..header_end], numeric, text, label)?;
    let body = &bytes[header_end + 1..];
    if body.is_empty() {
        return None;
    }
    parse_body(body, &slots, numeric.len(), text.len(), label)
}

/// Whether `bytes` (a header line, or a field) may be read as plain CSV: no
/// quote and no carriage return anywhere (a quoted field may hold delimiters
/// and line ends). A block's fields are checked as they are parsed
/// ([`field_end`]); a header must also not start with a byte-order mark.
fn plain(bytes: &[u8]) -> bool {
    memchr::memchr2(b'"', b'\r', bytes).is_none()
}

/// Where each field of a plain header line goes, or `None` when the line
/// is not plain (see [`plain`]; nor may it start with a byte-order mark) or
/// a wanted column is missing or repeated.
fn slots(
    header: &[u8],
    numeric: &[&Column],
    text: &[&Column],
    label: Option<&LabelWant<'_>>,
) -> Option<Vec<Slot>> {
    if header.starts_with(b"\xEF\xBB\xBF") || !plain(header) {
        return None;
    }
    let header: Vec<&[u8]> = header.split(|&b| b == b',').collect();
    // Any repeated name, wanted or not: the general reader decides.
    let mut names = header.clone();
    names.sort_unstable();
    if names.windows(2).any(|w| w[0] == w[1]) {
        return None;
    }
    let mut slots = vec![Slot::Skip; header.len()];
    let wanted = numeric
        .iter()
        .enumerate()
        .map(|(j, c)| (c, Slot::Number(j)))
        .chain(text.iter().enumerate().map(|(k, c)| {
            let slot = match label {
                Some(l) if l.index == k => Slot::Label,
                _ => Slot::Text(k),
            };
            (c, slot)
        }));
    for (c, slot) in wanted {
        let i = header.iter().position(|h| *h == c.name.as_bytes())?;
        // A column wanted twice: the general reader decides.
        if !matches!(slots[i], Slot::Skip) {
            return None;
        }
        slots[i] = slot;
    }
    Some(slots)
}

/// Parses whole lines on all cores.
fn parse_body(
    body: &[u8],
    slots: &[Slot],
    d: usize,
    ntext: usize,
    label: Option<&LabelWant<'_>>,
) -> Option<Parsed> {
    let blocks: Vec<&[u8]> = split_blocks(body);
    let heights: Vec<usize> = blocks
        .par_iter()
        .map(|b| memchr::memchr_iter(b'\n', b).count() + usize::from(!b.ends_with(b"\n")))
        .collect();
    let height: usize = heights.iter().sum();
    // The matrix, the largest output, is zeroed (and its pages first
    // touched) on all cores rather than by one allocation on this thread.
    let mut values: Vec<f64> = Vec::with_capacity(height * d);
    values.par_extend(rayon::iter::repeat_n(0.0, height * d));
    let mut labels = vec![false; if label.is_some() { height } else { 0 }];
    // Where each text value ends: block-relative while the blocks are
    // parsed, then moved by the bytes of the blocks before.
    let mut ends: Vec<Vec<usize>> = (0..ntext)
        .map(|k| match label {
            Some(l) if l.index == k => Vec::new(),
            _ => vec![0; height],
        })
        .collect();
    // Each block gets its own disjoint share of every output.
    let mut outs: Vec<Out<'_>> = Vec::with_capacity(blocks.len());
    {
        let mut v: &mut [f64] = &mut values;
        let mut l: &mut [bool] = &mut labels;
        let mut t: Vec<&mut [usize]> = ends.iter_mut().map(|c| c.as_mut_slice()).collect();
        for &h in &heights {
            let (vh, vr) = v.split_at_mut(h * d);
            v = vr;
            let (lh, lr) = l.split_at_mut(if label.is_some() { h } else { 0 });
            l = lr;
            let mut th = Vec::with_capacity(t.len());
            t = t
                .into_iter()
                .map(|c| {
                    let (a, b) = c.split_at_mut(if c.is_empty() { 0 } else { h });
                    th.push(a);
                    b
                })
                .collect();
            outs.push(Out {
                values: vh,
                labels: lh,
                ends: th,
            });
        }
    }
    // Each block copies its text values while its lines are in cache: one
    // buffer per block and text column.
    let texts: Vec<Vec<Vec<u8>>> = blocks
        .par_iter()
        .zip(outs.into_par_iter())
        .map(|(b, out)| parse_block(b, slots, d, ntext, label, out))
        .collect::<Option<_>>()?;
    // Each text column joined: every block's bytes copied to its place and
    // its ends moved by the bytes before it, block by block on all cores;
    // then checked as UTF-8 as a whole (a field ends at an ASCII delimiter,
    // so the whole is valid exactly when every field is).
    let columns: Vec<TextColumn> = ends
        .into_iter()
        .enumerate()
        .map(|(k, mut ends)| {
            if ends.is_empty() {
                return Some(TextColumn::default());
            }
            let total: usize = texts.iter().map(|t| t[k].len()).sum();
            let mut bytes = vec![0u8; total];
            let mut jobs = Vec::with_capacity(blocks.len());
            let (mut e, mut by): (&mut [usize], &mut [u8]) = (&mut ends, &mut bytes);
            let mut before = 0;
            for (t, &h) in texts.iter().zip(&heights) {
                let (eh, er) = e.split_at_mut(h);
                let (bh, br) = by.split_at_mut(t[k].len());
                jobs.push((eh, bh, &t[k], before));
                before += t[k].len();
                (e, by) = (er, br);
            }
            jobs.into_par_iter().for_each(|(eh, bh, t, before)| {
                bh.copy_from_slice(t);
                for x in eh.iter_mut() {
                    *x += before;
                }
            });
            TextColumn::from_parts(String::from_utf8(bytes).ok()?, ends)
        })
        .collect::<Option<_>>()?;
    Some((values, columns, label.is_some().then_some(labels), height))
}

/// Bytes read per chunk by [`Chunks`].
const CHUNK_BYTES: usize = 32 << 20;

/// A plain CSV file read chunk by chunk (for `data.stream`): memory stays at
/// a chunk whatever the file's size. Each chunk is parsed on all cores like
/// a whole file; any line outside the plain case makes [`Chunks::next`]
/// return `Err(NotPlain)`, and the caller reads the file with polars instead.
pub(crate) struct Chunks<'a> {
    file: std::fs::File,
    slots: Vec<Slot>,
    d: usize,
    ntext: usize,
    label: Option<LabelWant<'a>>,
    carry: Vec<u8>,
    chunk: usize,
    at_end: bool,
}

/// The file is not plain CSV (from this chunk on).
#[derive(Debug)]
pub(crate) struct NotPlain;

impl<'a> Chunks<'a> {
    /// Opens the file and reads its header line; `None` outside the plain case.
    pub(crate) fn open(
        path: &Path,
        numeric: &[&Column],
        text: &[&Column],
        label: Option<LabelWant<'a>>,
    ) -> Option<Self> {
        use std::io::Read;
        let mut file = std::fs::File::open(path).ok()?;
        let mut carry = Vec::new();
        let header_end = loop {
            if let Some(k) = memchr::memchr(b'\n', &carry) {
                break k;
            }
            let mut buf = vec![0u8; 1 << 16];
            let got = file.read(&mut buf).ok()?;
            if got == 0 {
                return None;
            }
            carry.extend_from_slice(&buf[..got]);
        };
        let slots = slots(&carry[..header_end], numeric, text, label.as_ref())?;
        carry.drain(..=header_end);
        // Test hook: smaller chunks, to exercise chunk boundaries and the
        // fall-back to polars after many chunks.
        let chunk = std::env::var("ANOMARK_CHUNK_BYTES")
            .ok()
            .and_then(|v| v.parse::<usize>().ok())
            .filter(|&v| v > 0)
            .unwrap_or(CHUNK_BYTES);
        Some(Chunks {
            file,
            slots,
            d: numeric.len(),
            ntext: text.len(),
            label,
            carry,
            chunk,
            at_end: false,
        })
    }

    /// The next chunk of whole lines, parsed; `Ok(None)` at the end of the file.
    pub(crate) fn next(&mut self) -> Result<Option<Parsed>, NotPlain> {
        use std::io::Read;
        loop {
            if self.at_end {
                if self.carry.is_empty() {
                    return Ok(None);
                }
                let body = std::mem::take(&mut self.carry);
                return self.parse(&body).map(Some);
            }
            let start = self.carry.len();
            self.carry.resize(start + self.chunk, 0);
            let mut filled = start;
            while filled < self.carry.len() {
                match self.file.read(&mut self.carry[filled..]) {
                    Ok(0) => {
                        self.at_end = true;
                        break;
                    }
                    Ok(k) => filled += k,
                    Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
                    Err(_) => return Err(NotPlain),
                }
            }
            self.carry.truncate(filled);
            if self.at_end {
                continue;
            }
            // Whole lines now; the partial last line waits for the next chunk.
            if let Some(k) = memchr::memrchr(b'\n', &self.carry) {
                let rest = self.carry.split_off(k + 1);
                let body = std::mem::replace(&mut self.carry, rest);
                return self.parse(&body).map(Some);
            }
        }
    }

    fn parse(&self, body: &[u8]) -> Result<Parsed, NotPlain> {
        parse_body(body, &self.slots, self.d, self.ntext, self.label.as_ref()).ok_or(NotPlain)
    }
}

/// The body cut into blocks of whole lines.
fn split_blocks(body: &[u8]) -> Vec<&[u8]> {
    let mut out = Vec::new();
    let mut start = 0;
    while start < body.len() {
        let want = (start + BLOCK_BYTES).min(body.len());
        let end = if want == body.len() {
            want
        } else {
            match memchr::memchr(b'\n', &body[want..]) {
                Some(k) => want + k + 1,
                None => body.len(),
            }
        };
        out.push(&body[start..end]);
        start = end;
    }
    out
}

/// Parses one block of whole lines field by field: a number is parsed where
/// it starts and must end at its delimiter, any other field is found by its
/// delimiter; a text field is copied to the block's bytes of its column.
fn parse_block(
    block: &[u8],
    slots: &[Slot],
    d: usize,
    ntext: usize,
    label: Option<&LabelWant<'_>>,
    mut out: Out<'_>,
) -> Option<Vec<Vec<u8>>> {
    // No pass of its own looks for quotes and carriage returns: every byte
    // is in a field or is its delimiter; a number's bytes are digits, a
    // point, a sign or an exponent, and every other field is searched by
    // `field_end`, which refuses them.
    let n = block.len();
    let mut texts: Vec<Vec<u8>> = vec![Vec::new(); ntext];
    let last = slots.len().checked_sub(1)?;
    let mut p = 0;
    let mut row = 0;
    while p < n {
        let values = out.values.get_mut(row * d..(row + 1) * d)?;
        for (f, slot) in slots.iter().enumerate() {
            let end = match *slot {
                Slot::Number(j) => {
                    let (v, end) = number_at(block, p)?;
                    values[j] = if v == 0.0 { 0.0 } else { v };
                    end
                }
                _ => {
                    let end = field_end(block, p)?;
                    let field = &block[p..end];
                    match *slot {
                        Slot::Text(k) => {
                            if field.is_empty() {
                                return None;
                            }
                            let t = &mut texts[k];
                            t.extend_from_slice(field);
                            *out.ends[k].get_mut(row)? = t.len();
                        }
                        Slot::Label => {
                            let l = label?;
                            *out.labels.get_mut(row)? =
                                crate::rules::label_of(field, l.normal, l.anomaly)?;
                        }
                        Slot::Skip | Slot::Number(_) => {}
                    }
                    end
                }
            };
            // Each field ends at its own delimiter: a comma, or the line end
            // (or the block's end) after the last field.
            match block.get(end) {
                Some(b',') if f < last => p = end + 1,
                Some(b'\n') if f == last => p = end + 1,
                None if f == last => p = end,
                _ => return None,
            }
        }
        row += 1;
    }
    (row * d == out.values.len()).then_some(texts)
}

/// Where the field starting at `p` ends: the index of its comma or line end,
/// or the block's end; `None` when the field holds a quote or a carriage
/// return (the file is then not plain, [`plain`]). Fields are short as a
/// rule (ids, labels, split names): the first bytes are looked at one by
/// one, which costs less than setting up a vector search; a longer field is
/// searched by `memchr`.
#[inline]
fn field_end(block: &[u8], p: usize) -> Option<usize> {
    const LOOKED_AT: usize = 16;
    let near = &block[p..block.len().min(p + LOOKED_AT)];
    for (k, &c) in near.iter().enumerate() {
        match c {
            b',' | b'\n' => return Some(p + k),
            b'"' | b'\r' => return None,
            _ => {}
        }
    }
    let from = p + near.len();
    let end = memchr::memchr2(b',', b'\n', &block[from..]).map_or(block.len(), |k| from + k);
    plain(&block[from..end]).then_some(end)
}

/// The number that starts at `start`, and where it ends (the index of the
/// byte after it: a delimiter or the block's end): [`number_at_bytes`]'s
/// answer, found eight bytes at a time for the usual field (fewer than 8
/// digits before the point and after it, 16 bytes left in the block).
#[inline]
fn number_at(b: &[u8], start: usize) -> Option<(f64, usize)> {
    let neg = b.get(start) == Some(&b'-');
    let p = start + usize::from(neg);
    if let Some(w) = b.get(p..p + 16) {
        let (n1, int) = leading_digits(u64::from_le_bytes(w[..8].try_into().ok()?));
        if (1..8).contains(&n1) {
            let (end, m, decimals) = if w[n1] == b'.' {
                let after = u64::from_le_bytes(w[n1 + 1..n1 + 9].try_into().ok()?);
                let (n2, dec) = leading_digits(after);
                (p + n1 + 1 + n2, int * POW10_INT[n2] + dec, n2)
            } else {
                (p + n1, int, 0)
            };
            // A point needs a digit after it; at most 7 + 7 digits, so m is
            // exact below 2⁵³ and the one division is correctly rounded.
            if decimals < 8
                && (decimals > 0 || w[n1] != b'.')
                && matches!(b.get(end), None | Some(b',' | b'\n'))
            {
                let v = m as f64 / POW10[decimals];
                return Some((if neg { -v } else { v }, end));
            }
        }
    }
    number_at_bytes(b, start)
}

/// Powers of ten up to 10⁸ as integers.
const POW10_INT: [u64; 9] = [
    1,
    10,
    100,
    1_000,
    10_000,
    100_000,
    1_000_000,
    10_000_000,
    100_000_000,
];

/// How many of the eight bytes in `w` (the first byte lowest) are decimal
/// digits before the first that is not, and their value (0 when none).
#[inline]
fn leading_digits(w: u64) -> (usize, u64) {
    const ONES: u64 = 0x0101_0101_0101_0101;
    // A byte is a digit when its high nibble is 3 and stays 3 after adding
    // 6 (0x30..=0x39). A carry out of a byte ≥ 0xFA only disturbs the bytes
    // after it, which a non-digit already ends.
    let not_digit = ((w & (0xF0 * ONES)) ^ (0x30 * ONES))
        | ((w.wrapping_add(0x06 * ONES) & (0xF0 * ONES)) ^ (0x30 * ONES));
    let n = (not_digit.trailing_zeros() / 8) as usize;
    if n == 0 {
        return (0, 0);
    }
    // The n digits moved to the top, zero digits before them, then summed in
    // pairs, fours and eights (each lane holds the value of its digits).
    let mut v = (w & (0x0F * ONES)) << (8 * (8 - n));
    v = (v.wrapping_mul(10) + (v >> 8)) & 0x00FF_00FF_00FF_00FF;
    v = (v.wrapping_mul(100) + (v >> 16)) & 0x0000_FFFF_0000_FFFF;
    v = v.wrapping_mul(10_000) + (v >> 32);
    (n, v & 0xFFFF_FFFF)
}

/// [`number_at`] byte by byte: the fixed-point case is parsed in place;
/// anything else is cut at the next delimiter and left to [`number`].
fn number_at_bytes(b: &[u8], start: usize) -> Option<(f64, usize)> {
    let mut p = start;
    let neg = b.get(p) == Some(&b'-');
    p += usize::from(neg);
    let digits = |p: &mut usize, m: &mut u64| {
        let from = *p;
        while let Some(&c) = b.get(*p) {
            let digit = c.wrapping_sub(b'0');
            if digit > 9 {
                break;
            }
            *m = m.wrapping_mul(10).wrapping_add(u64::from(digit));
            *p += 1;
        }
        *p - from
    };
    let mut m: u64 = 0;
    let int_digits = digits(&mut p, &mut m);
    let mut decimals = 0;
    let mut point = false;
    if b.get(p) == Some(&b'.') {
        point = true;
        p += 1;
        decimals = digits(&mut p, &mut m);
    }
    if matches!(b.get(p), None | Some(b',' | b'\n'))
        && int_digits > 0
        && (!point || decimals > 0)
        && int_digits + decimals <= 19
        && m < (1 << 53)
        && decimals <= 22
    {
        let v = m as f64 / POW10[decimals];
        return Some((if neg { -v } else { v }, p));
    }
    let end = memchr::memchr2(b',', b'\n', &b[start..]).map_or(b.len(), |k| start + k);
    Some((number(&b[start..end])?, end))
}

/// Exact powers of ten as binary64 (10^22 is the last exact one).
const POW10: [f64; 23] = [
    1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11, 1e12, 1e13, 1e14, 1e15, 1e16,
    1e17, 1e18, 1e19, 1e20, 1e21, 1e22,
];

/// A finite number in plain notation, `-?digits[.digits][(e|E)[+-]digits]`.
///
/// The common fixed-point case (at most 19 digits, a digit value below 2^53
/// and at most 22 decimals) is m / 10^k with both operands exact, so the one
/// IEEE division is the correctly rounded value (Clinger's fast path, the
/// same one fast-float2 takes). Anything else is validated here and parsed
/// by fast-float2.
fn number(field: &[u8]) -> Option<f64> {
    let neg = field.first() == Some(&b'-');
    let s = &field[usize::from(neg)..];
    let mut m: u64 = 0;
    let mut i = 0;
    while i < s.len() && s[i].is_ascii_digit() {
        m = m.wrapping_mul(10).wrapping_add(u64::from(s[i] - b'0'));
        i += 1;
    }
    let int_digits = i;
    if int_digits == 0 {
        return None;
    }
    let mut decimals = 0;
    if i < s.len() && s[i] == b'.' {
        i += 1;
        let from = i;
        while i < s.len() && s[i].is_ascii_digit() {
            m = m.wrapping_mul(10).wrapping_add(u64::from(s[i] - b'0'));
            i += 1;
        }
        decimals = i - from;
        if decimals == 0 {
            return None;
        }
    }
    if i == s.len() && int_digits + decimals <= 19 && m < (1 << 53) && decimals <= 22 {
        let v = m as f64 / POW10[decimals];
        return Some(if neg { -v } else { v });
    }
    if i < s.len() {
        if !matches!(s[i], b'e' | b'E') {
            return None;
        }
        i += 1;
        if i < s.len() && matches!(s[i], b'+' | b'-') {
            i += 1;
        }
        let from = i;
        while i < s.len() && s[i].is_ascii_digit() {
            i += 1;
        }
        if i == from || i != s.len() {
            return None;
        }
    }
    let v: f64 = fast_float2::parse(field).ok()?;
    v.is_finite().then_some(v)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn plain_numbers_parse_like_the_standard_library() {
        for s in [
            "0",
            "-0",
            "1.5",
            "-20.000001",
            "123456.654321",
            "1e5",
            "2.5E-3",
            "7e+2",
            "0.1",
            "9007199254740993",
            "2.2250738585072011e-308",
            "9007199254740991.5",
            "0.0000000000000000000001",
            "1234567890123456789",
            "12345678901234567890",
            "0.30000000000000004",
            "-65.658630",
            "00012.5000",
        ] {
            let want: f64 = s.parse().unwrap();
            assert_eq!(
                number(s.as_bytes()).map(f64::to_bits),
                Some(want.to_bits()),
                "{s}"
            );
        }
        for s in [
            "", "-", "+1", ".5", "5.", "1e", "1e+", " 1", "1 ", "inf", "NaN", "1,5", "0x10",
            "1e999", "--1", "1.2.3",
        ] {
            assert_eq!(number(s.as_bytes()), None, "{s:?}");
        }
    }

    /// The fixed-point shortcut against the standard library's correctly
    /// rounded parser on random digit strings of every length up to 19.
    #[test]
    fn fixed_point_shortcut_is_correctly_rounded() {
        use rand_chacha::rand_core::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        for _ in 0..300_000 {
            let digits = 1 + (rng.next_u32() % 19) as usize;
            let mut t: String = (0..digits)
                .map(|_| char::from(b'0' + (rng.next_u32() % 10) as u8))
                .collect();
            let point = (rng.next_u32() as usize) % digits;
            if point > 0 {
                t.insert(digits - point, '.');
            }
            if rng.next_u32().is_multiple_of(2) {
                t.insert(0, '-');
            }
            let want: f64 = t.parse().unwrap();
            assert_eq!(
                number(t.as_bytes()).map(f64::to_bits),
                Some(want.to_bits()),
                "{t}"
            );
        }
    }

    /// The eight-byte digit runs against counting and summing the digits one
    /// by one, on every mix of digits, points, delimiters and other bytes.
    #[test]
    fn leading_digits_agree_with_the_bytes() {
        use rand_chacha::rand_core::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(8);
        let alphabet = b"0123456789.,-\n/:e\xff\xfa\x00";
        for _ in 0..200_000 {
            let mut w = [0u8; 8];
            for x in &mut w {
                *x = if rng.next_u32().is_multiple_of(4) {
                    (rng.next_u32() & 0xFF) as u8
                } else {
                    alphabet[(rng.next_u32() as usize) % alphabet.len()]
                };
            }
            let n = w.iter().take_while(|c| c.is_ascii_digit()).count();
            let v = w[..n]
                .iter()
                .fold(0u64, |a, &c| a * 10 + u64::from(c - b'0'));
            assert_eq!(leading_digits(u64::from_le_bytes(w)), (n, v), "{w:?}");
        }
    }

    /// Numbers read eight bytes at a time give the byte-by-byte reading's
    /// value and end, at every start in lines of random fields (short and
    /// long digit runs, points without digits, signs, exponents, junk).
    #[test]
    fn numbers_read_in_words_agree_with_the_bytes() {
        use rand_chacha::rand_core::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(9);
        for _ in 0..20_000 {
            let mut line = Vec::new();
            for _ in 0..1 + rng.next_u32() % 5 {
                if rng.next_u32().is_multiple_of(3) {
                    line.push(b'-');
                }
                for _ in 0..rng.next_u32() % 10 {
                    line.push(b'0' + (rng.next_u32() % 10) as u8);
                }
                match rng.next_u32() % 8 {
                    0 => {}
                    1 => line.extend_from_slice(b"e-3"),
                    2 => line.push(b'x'),
                    _ => {
                        line.push(b'.');
                        for _ in 0..rng.next_u32() % 11 {
                            line.push(b'0' + (rng.next_u32() % 10) as u8);
                        }
                    }
                }
                line.push(if rng.next_u32().is_multiple_of(4) {
                    b'\n'
                } else {
                    b','
                });
            }
            if rng.next_u32().is_multiple_of(2) {
                line.pop();
            }
            for p in 0..line.len() {
                let got = number_at(&line, p).map(|(v, e)| (v.to_bits(), e));
                let want = number_at_bytes(&line, p).map(|(v, e)| (v.to_bits(), e));
                assert_eq!(got, want, "{:?} at {p}", String::from_utf8_lossy(&line));
            }
        }
    }

    /// A field's end found byte by byte near its start, or by `memchr`
    /// further on, is `memchr`'s: fields of 0 to 40 bytes ending at a comma,
    /// a line end or the block's end, starting anywhere.
    #[test]
    fn field_ends_agree_with_memchr() {
        for len in 0..=40 {
            for end in [&b","[..], b"\n", b""] {
                let mut block = b"ab,".to_vec();
                block.extend(std::iter::repeat_n(b'x', len));
                block.extend_from_slice(end);
                block.extend_from_slice(b"tail,\n");
                if end.is_empty() {
                    block.truncate(3 + len);
                }
                for p in 0..=block.len() {
                    let want =
                        memchr::memchr2(b',', b'\n', &block[p..]).map_or(block.len(), |k| p + k);
                    assert_eq!(field_end(&block, p), Some(want), "len {len} at {p}");
                    // A quote or a carriage return in the field: refused.
                    for bad in [b'"', b'\r'] {
                        if want > p {
                            let mut changed = block.clone();
                            changed[want - 1] = bad;
                            assert_eq!(field_end(&changed, p), None, "len {len} at {p}");
                        }
                    }
                }
            }
        }
    }

    #[test]
    fn blocks_end_at_line_ends_and_cover_the_body() {
        let line = b"12345,abc,0.5\n";
        let body: Vec<u8> = line
            .iter()
            .copied()
            .cycle()
            .take(line.len() * 200_000)
            .collect();
        let blocks = split_blocks(&body);
        assert!(blocks.len() > 1);
        assert_eq!(blocks.iter().map(|b| b.len()).sum::<usize>(), body.len());
        for b in &blocks {
            assert!(b.ends_with(b"\n"));
        }
    }

    /// A quote or a carriage return anywhere, even in a column that is not
    /// read and in the last of many blocks, sends the file to the general
    /// reader, as does a byte-order mark or a quote in the header.
    #[test]
    fn anything_but_plain_csv_is_left_to_the_general_reader() {
        let column = |name: &str| Column {
            name: name.into(),
            at: crate::error::Location {
                file: "spec.yaml".into(),
                line: 1,
                column: 1,
            },
            field: "data.features".into(),
        };
        let (a, b) = (column("a"), column("b"));
        let numeric = [&a, &b];
        let line = b"1.5,abc,2.5\n";
        let mut file = b"a,skip,b\n".to_vec();
        for _ in 0..200_000 {
            file.extend_from_slice(line);
        }
        assert!(split_blocks(&file).len() > 1);
        let (values, _, _, height) = parse(&file, &numeric, &[], None).unwrap();
        assert_eq!(height, 200_000);
        assert_eq!(&values[values.len() - 2..], &[1.5, 2.5]);
        let near_end = file.len() - 2 * line.len() + 5;
        for (at, byte) in [(near_end, b'"'), (near_end, b'\r'), (3, b'"')] {
            let mut changed = file.clone();
            changed[at] = byte;
            assert!(
                parse(&changed, &numeric, &[], None).is_none(),
                "{byte} at {at}"
            );
        }
        // At every byte of a line (numbers, a skipped field, a text field,
        // the delimiters), in the first block and in the last.
        let c = column("t");
        let text = [&c];
        let line = b"1.5,abc,2.5,xy\n";
        let mut file = b"a,skip,b,t\n".to_vec();
        for _ in 0..100_000 {
            file.extend_from_slice(line);
        }
        assert!(parse(&file, &numeric, &text, None).is_some());
        for start in [b"a,skip,b,t\n".len(), file.len() - line.len()] {
            for k in 0..line.len() {
                for byte in [b'"', b'\r'] {
                    let mut changed = file.clone();
                    changed[start + k] = byte;
                    assert!(
                        parse(&changed, &numeric, &text, None).is_none(),
                        "{byte} at {k} of the line at {start}"
                    );
                }
            }
        }
        let mut marked = b"\xEF\xBB\xBF".to_vec();
        marked.extend_from_slice(&file);
        assert!(parse(&marked, &numeric, &[], None).is_none());
    }
}
