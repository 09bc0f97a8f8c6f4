//! BLAKE3 of many short messages at once: sixteen equal-length messages of
//! at most one chunk (1,024 bytes) hashed side by side, one message per
//! vector lane.
//!
//! The `blake3` crate hashes one message at a time; for a message of one
//! chunk that is a chain of dependent compressions that leaves most of a
//! vector unit idle. Row content hashes ([`super::hash::rows`]) are millions
//! of such messages of one length, so here the same compression function
//! (BLAKE3 specification, section 2.2: the G function, seven rounds, the
//! message permutation) runs on `[u32; 16]` lanes, compiled also for AVX2 and
//! AVX-512 and picked at run time; the AVX-512 form loads each block of the
//! sixteen messages as sixteen vectors and transposes them in registers.
//! Only 32-bit additions, exclusive ors and rotations are used, so every
//! compiled form gives the same bytes, and those are the `blake3` crate's
//! (the tests compare every length from 0 to 1,024, each form on its own).
//! Longer messages are left to the crate.

/// Messages hashed side by side.
pub const LANES: usize = 16;
/// The longest message taken (one chunk).
pub const MAX_LEN: usize = 1024;

const IV: [u32; 8] = [
    0x6A09_E667,
    0xBB67_AE85,
    0x3C6E_F372,
    0xA54F_F53A,
    0x510E_527F,
    0x9B05_688C,
    0x1F83_D9AB,
    0x5BE0_CD19,
];
const CHUNK_START: u32 = 1;
const CHUNK_END: u32 = 2;
const ROOT: u32 = 8;
const BLOCK: usize = 64;

/// Word `i` of a round's message is word `SCHEDULE[r][i]` of the block: the
/// permutation (2, 6, 3, 10, 7, 0, 4, 13, 1, 11, 12, 5, 9, 14, 15, 8) applied
/// r times.
const SCHEDULE: [[usize; 16]; 7] = {
    const PERM: [usize; 16] = [2, 6, 3, 10, 7, 0, 4, 13, 1, 11, 12, 5, 9, 14, 15, 8];
    let mut s = [[0usize; 16]; 7];
    let mut i = 0;
    while i < 16 {
        s[0][i] = i;
        i += 1;
    }
    let mut r = 1;
    while r < 7 {
        let mut i = 0;
        while i < 16 {
            s[r][i] = s[r - 1][PERM[i]];
            i += 1;
        }
        r += 1;
    }
    s
};

type V = [u32; LANES];

#[inline(always)]
fn add(a: V, b: V) -> V {
    let mut o = [0; LANES];
    for l in 0..LANES {
        o[l] = a[l].wrapping_add(b[l]);
    }
    o
}

#[inline(always)]
fn xor_rot(a: V, b: V, r: u32) -> V {
    let mut o = [0; LANES];
    for l in 0..LANES {
        o[l] = (a[l] ^ b[l]).rotate_right(r);
    }
    o
}

#[inline(always)]
fn g(s: &mut [V; 16], a: usize, b: usize, c: usize, d: usize, mx: V, my: V) {
    s[a] = add(add(s[a], s[b]), mx);
    s[d] = xor_rot(s[d], s[a], 16);
    s[c] = add(s[c], s[d]);
    s[b] = xor_rot(s[b], s[c], 12);
    s[a] = add(add(s[a], s[b]), my);
    s[d] = xor_rot(s[d], s[a], 8);
    s[c] = add(s[c], s[d]);
    s[b] = xor_rot(s[b], s[c], 7);
}

/// The compression function on every lane (counter 0), returning the first
/// eight output words (the next chaining value, or the hash of a root block).
#[inline(always)]
fn compress(cv: &[V; 8], m: &[V; 16], block_len: u32, flags: u32) -> [V; 8] {
    let mut s: [V; 16] = [[0; LANES]; 16];
    s[..8].copy_from_slice(cv);
    for i in 0..4 {
        s[8 + i] = [IV[i]; LANES];
    }
    // s[12], s[13]: the chunk counter, 0.
    s[14] = [block_len; LANES];
    s[15] = [flags; LANES];
    for w in &SCHEDULE {
        g(&mut s, 0, 4, 8, 12, m[w[0]], m[w[1]]);
        g(&mut s, 1, 5, 9, 13, m[w[2]], m[w[3]]);
        g(&mut s, 2, 6, 10, 14, m[w[4]], m[w[5]]);
        g(&mut s, 3, 7, 11, 15, m[w[6]], m[w[7]]);
        g(&mut s, 0, 5, 10, 15, m[w[8]], m[w[9]]);
        g(&mut s, 1, 6, 11, 12, m[w[10]], m[w[11]]);
        g(&mut s, 2, 7, 8, 13, m[w[12]], m[w[13]]);
        g(&mut s, 3, 4, 9, 14, m[w[14]], m[w[15]]);
    }
    let mut out = [[0; LANES]; 8];
    for i in 0..8 {
        for l in 0..LANES {
            out[i][l] = s[i][l] ^ s[i + 8][l];
        }
    }
    out
}

/// The flags of block `b` of a one-chunk message of `blocks` blocks: the
/// first starts the chunk, the last ends it and is the root.
#[inline(always)]
fn block_flags(b: usize, blocks: usize) -> u32 {
    let mut flags = 0;
    if b == 0 {
        flags |= CHUNK_START;
    }
    if b + 1 == blocks {
        flags |= CHUNK_END | ROOT;
    }
    flags
}

#[inline(always)]
fn hash16_generic(messages: &[u8], stride: usize, len: usize, out: &mut [[u8; 32]; LANES]) {
    let blocks = len.div_ceil(BLOCK).max(1);
    let mut cv: [V; 8] = [[0; LANES]; 8];
    for (i, w) in cv.iter_mut().enumerate() {
        *w = [IV[i]; LANES];
    }
    for b in 0..blocks {
        let start = b * BLOCK;
        let block_len = (len - start).min(BLOCK);
        // Word w of lane l: bytes 4w.. of the block in message l, zero past
        // the message's end.
        let mut m: [V; 16] = [[0; LANES]; 16];
        for l in 0..LANES {
            let msg = &messages[l * stride..l * stride + len];
            let bytes = &msg[start..start + block_len];
            if block_len == BLOCK {
                for (w, word) in bytes.chunks_exact(4).enumerate() {
                    m[w][l] = u32::from_le_bytes(word.try_into().unwrap());
                }
            } else {
                let mut padded = [0u8; BLOCK];
                padded[..block_len].copy_from_slice(bytes);
                for (w, word) in padded.chunks_exact(4).enumerate() {
                    m[w][l] = u32::from_le_bytes(word.try_into().unwrap());
                }
            }
        }
        let flags = block_flags(b, blocks);
        cv = compress(&cv, &m, block_len as u32, flags);
    }
    for (l, o) in out.iter_mut().enumerate() {
        for (i, w) in cv.iter().enumerate() {
            o[4 * i..4 * i + 4].copy_from_slice(&w[l].to_le_bytes());
        }
    }
}

/// [`hash16_generic`] with each block's message words loaded as sixteen
/// 64-byte vectors (one per message; bytes past a message's end masked to
/// zero) and transposed in registers, so that vector w holds word w of every
/// message, and compressed by [`compress512`], the generic compression's
/// operations on vectors.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx512bw")]
fn hash16_avx512(messages: &[u8], stride: usize, len: usize, out: &mut [[u8; 32]; LANES]) {
    use std::arch::x86_64::*;
    assert!(len <= MAX_LEN && stride >= len);
    assert!(messages.len() >= (LANES - 1) * stride + len);
    let blocks = len.div_ceil(BLOCK).max(1);
    let mut cv: [__m512i; 8] = IV.map(|w| _mm512_set1_epi32(w as i32));
    for b in 0..blocks {
        let start = b * BLOCK;
        let block_len = (len - start).min(BLOCK);
        let mask: __mmask64 = if block_len == BLOCK {
            !0
        } else {
            (1u64 << block_len) - 1
        };
        let mut r = [_mm512_setzero_si512(); LANES];
        for (l, v) in r.iter_mut().enumerate() {
            // SAFETY: `l * stride + start` is at most `l * stride + len`,
            // within `messages` by the assertions above; the mask keeps the
            // load to the `block_len` bytes from there, which lie within
            // message l, and masked-out bytes are neither read nor faulted.
            *v = unsafe {
                _mm512_maskz_loadu_epi8(mask, messages.as_ptr().add(l * stride + start).cast())
            };
        }
        let m = transpose16(r);
        let flags = block_flags(b, blocks);
        cv = compress512(&cv, &m, block_len as u32, flags);
    }
    let mut words = [[0u32; LANES]; 8];
    for (w, v) in words.iter_mut().zip(&cv) {
        // SAFETY: a row of `words` is 64 bytes, the size of the store.
        unsafe { _mm512_storeu_si512(w.as_mut_ptr().cast(), *v) };
    }
    for (l, o) in out.iter_mut().enumerate() {
        for (i, w) in words.iter().enumerate() {
            o[4 * i..4 * i + 4].copy_from_slice(&w[l].to_le_bytes());
        }
    }
}

/// [`compress`] written with AVX-512 operations on sixteen state vectors
/// (the same additions, exclusive ors and rotations, so the same words);
/// left to the compiler, the arrays of the generic form were kept in memory.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
fn compress512(
    cv: &[std::arch::x86_64::__m512i; 8],
    m: &[std::arch::x86_64::__m512i; 16],
    block_len: u32,
    flags: u32,
) -> [std::arch::x86_64::__m512i; 8] {
    use std::arch::x86_64::*;
    // The G function on state vectors a, b, c, d and message vectors mx, my.
    macro_rules! g {
        ($s:ident, $a:literal, $b:literal, $c:literal, $d:literal, $mx:expr, $my:expr) => {
            $s[$a] = _mm512_add_epi32(_mm512_add_epi32($s[$a], $s[$b]), $mx);
            $s[$d] = _mm512_ror_epi32::<16>(_mm512_xor_si512($s[$d], $s[$a]));
            $s[$c] = _mm512_add_epi32($s[$c], $s[$d]);
            $s[$b] = _mm512_ror_epi32::<12>(_mm512_xor_si512($s[$b], $s[$c]));
            $s[$a] = _mm512_add_epi32(_mm512_add_epi32($s[$a], $s[$b]), $my);
            $s[$d] = _mm512_ror_epi32::<8>(_mm512_xor_si512($s[$d], $s[$a]));
            $s[$c] = _mm512_add_epi32($s[$c], $s[$d]);
            $s[$b] = _mm512_ror_epi32::<7>(_mm512_xor_si512($s[$b], $s[$c]));
        };
    }
    let zero = _mm512_setzero_si512();
    let mut s = [
        cv[0],
        cv[1],
        cv[2],
        cv[3],
        cv[4],
        cv[5],
        cv[6],
        cv[7],
        _mm512_set1_epi32(IV[0] as i32),
        _mm512_set1_epi32(IV[1] as i32),
        _mm512_set1_epi32(IV[2] as i32),
        _mm512_set1_epi32(IV[3] as i32),
        // The chunk counter, 0.
        zero,
        zero,
        _mm512_set1_epi32(block_len as i32),
        _mm512_set1_epi32(flags as i32),
    ];
    for w in &SCHEDULE {
        g!(s, 0, 4, 8, 12, m[w[0]], m[w[1]]);
        g!(s, 1, 5, 9, 13, m[w[2]], m[w[3]]);
        g!(s, 2, 6, 10, 14, m[w[4]], m[w[5]]);
        g!(s, 3, 7, 11, 15, m[w[6]], m[w[7]]);
        g!(s, 0, 5, 10, 15, m[w[8]], m[w[9]]);
        g!(s, 1, 6, 11, 12, m[w[10]], m[w[11]]);
        g!(s, 2, 7, 8, 13, m[w[12]], m[w[13]]);
        g!(s, 3, 4, 9, 14, m[w[14]], m[w[15]]);
    }
    [
        _mm512_xor_si512(s[0], s[8]),
        _mm512_xor_si512(s[1], s[9]),
        _mm512_xor_si512(s[2], s[10]),
        _mm512_xor_si512(s[3], s[11]),
        _mm512_xor_si512(s[4], s[12]),
        _mm512_xor_si512(s[5], s[13]),
        _mm512_xor_si512(s[6], s[14]),
        _mm512_xor_si512(s[7], s[15]),
    ]
}

/// The 16 × 16 transpose of 32-bit words: row l of `r` is message l's block,
/// row w of the result is word w of every message. Pairs of words, then of
/// double words, are interleaved within 128-bit lanes; then the 128-bit
/// lanes of each group of four are transposed.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
fn transpose16(r: [std::arch::x86_64::__m512i; LANES]) -> [std::arch::x86_64::__m512i; 16] {
    use std::arch::x86_64::*;
    // t[2k] lane q: words 4q, 4q+1 of rows 2k, 2k+1 interleaved; t[2k+1]:
    // words 4q+2, 4q+3.
    let mut t = [_mm512_setzero_si512(); 16];
    for k in 0..8 {
        t[2 * k] = _mm512_unpacklo_epi32(r[2 * k], r[2 * k + 1]);
        t[2 * k + 1] = _mm512_unpackhi_epi32(r[2 * k], r[2 * k + 1]);
    }
    // u[4g + j] lane q: word 4q + j of rows 4g..4g+4.
    let mut u = [_mm512_setzero_si512(); 16];
    for g in 0..4 {
        let (lo_a, hi_a, lo_b, hi_b) = (t[4 * g], t[4 * g + 1], t[4 * g + 2], t[4 * g + 3]);
        u[4 * g] = _mm512_unpacklo_epi64(lo_a, lo_b);
        u[4 * g + 1] = _mm512_unpackhi_epi64(lo_a, lo_b);
        u[4 * g + 2] = _mm512_unpacklo_epi64(hi_a, hi_b);
        u[4 * g + 3] = _mm512_unpackhi_epi64(hi_a, hi_b);
    }
    // m[4q + j] lane g = u[4g + j] lane q.
    let mut m = [_mm512_setzero_si512(); 16];
    for j in 0..4 {
        let x0 = _mm512_shuffle_i32x4::<0x44>(u[j], u[4 + j]);
        let x1 = _mm512_shuffle_i32x4::<0xEE>(u[j], u[4 + j]);
        let x2 = _mm512_shuffle_i32x4::<0x44>(u[8 + j], u[12 + j]);
        let x3 = _mm512_shuffle_i32x4::<0xEE>(u[8 + j], u[12 + j]);
        let rows = [
            _mm512_shuffle_i32x4::<0x88>(x0, x2),
            _mm512_shuffle_i32x4::<0xDD>(x0, x2),
            _mm512_shuffle_i32x4::<0x88>(x1, x3),
            _mm512_shuffle_i32x4::<0xDD>(x1, x3),
        ];
        for (q, v) in rows.into_iter().enumerate() {
            m[4 * q + j] = v;
        }
    }
    m
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn hash16_avx2(messages: &[u8], stride: usize, len: usize, out: &mut [[u8; 32]; LANES]) {
    hash16_generic(messages, stride, len, out)
}

/// The BLAKE3 hashes of sixteen messages of `len` bytes each, message l at
/// `messages[l * stride..][..len]`, into `out[l]`.
///
/// Panics when `len > MAX_LEN`, `stride < len` or `messages` is shorter
/// than sixteen strides (the last one may end at its message).
pub fn hash16(messages: &[u8], stride: usize, len: usize, out: &mut [[u8; 32]; LANES]) {
    assert!(len <= MAX_LEN && stride >= len);
    assert!(messages.len() >= (LANES - 1) * stride + len);
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx512f") && std::is_x86_feature_detected!("avx512bw") {
            // SAFETY: the CPU has just been seen to support AVX-512F and BW.
            return unsafe { hash16_avx512(messages, stride, len, out) };
        }
        if std::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been seen to support AVX2.
            return unsafe { hash16_avx2(messages, stride, len, out) };
        }
    }
    hash16_generic(messages, stride, len, out)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Sixteen different messages of every length from 0 to 1,024 bytes,
    /// against the `blake3` crate (the reference implementation's Rust
    /// package, crates.io), through every compiled form on this CPU.
    #[test]
    fn equals_the_blake3_crate_at_every_length() {
        let stride = MAX_LEN + 3;
        let messages: Vec<u8> = (0..LANES * stride)
            .map(|i| (i.wrapping_mul(2_654_435_761) >> 7) as u8)
            .collect();
        for len in 0..=MAX_LEN {
            let mut out = [[0u8; 32]; LANES];
            hash16(&messages, stride, len, &mut out);
            let mut generic = [[0u8; 32]; LANES];
            hash16_generic(&messages, stride, len, &mut generic);
            assert_eq!(out, generic, "len {len}");
            #[cfg(target_arch = "x86_64")]
            if std::is_x86_feature_detected!("avx512f") && std::is_x86_feature_detected!("avx512bw")
            {
                let mut avx512 = [[0u8; 32]; LANES];
                // SAFETY: the CPU has just been seen to support AVX-512F and BW.
                unsafe { hash16_avx512(&messages, stride, len, &mut avx512) };
                assert_eq!(avx512, generic, "len {len}");
            }
            #[cfg(target_arch = "x86_64")]
            if std::is_x86_feature_detected!("avx2") {
                let mut avx2 = [[0u8; 32]; LANES];
                // SAFETY: the CPU has just been seen to support AVX2.
                unsafe { hash16_avx2(&messages, stride, len, &mut avx2) };
                assert_eq!(avx2, generic, "len {len}");
            }
            for (l, o) in out.iter().enumerate() {
                let want = blake3::hash(&messages[l * stride..l * stride + len]);
                assert_eq!(o, want.as_bytes(), "len {len} lane {l}");
            }
        }
    }

    /// The BLAKE3 specification's hash of the empty input (its test vectors,
    /// value from memory, and the crate agrees in the test above).
    #[test]
    fn empty_input_vector() {
        let mut out = [[0u8; 32]; LANES];
        hash16(&[], 0, 0, &mut out);
        assert_eq!(
            crate::audit::hash::hex(&out[0]),
            "af1349b9f5f9a1a6a0404dea36dcc9499bcb25c9adc112b7cc9a93cae41f3262"
        );
        assert!(out.iter().all(|o| o == &out[0]));
    }
}
