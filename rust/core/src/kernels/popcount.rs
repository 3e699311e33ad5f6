//! AND + popcount of bitset rows in tiles of up to 2 x 4 cells, on the fastest path the CPU offers
//! (AVX-512 `vpopcntq`, AVX2 nibble lookup, POPCNT, or portable `count_ones`).

/// How the bitset kernel counts bits, picked at run time from what the CPU offers.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Popcount {
    /// AVX-512 with the VPOPCNTDQ extension: the popcount of eight words per instruction.
    Avx512,
    /// AVX2: nibble lookup (`vpshufb`) into byte counters, summed with `vpsadbw`.
    Avx2,
    /// The POPCNT instruction on each word.
    Popcnt,
    /// `u64::count_ones` compiled for the baseline target.
    Portable,
}

impl Popcount {
    /// The fastest way this CPU offers.
    pub fn detect() -> Popcount {
        if Popcount::Avx512.available() {
            Popcount::Avx512
        } else if Popcount::Avx2.available() {
            Popcount::Avx2
        } else if Popcount::Popcnt.available() {
            Popcount::Popcnt
        } else {
            Popcount::Portable
        }
    }

    /// Whether this CPU can run this way of counting.
    pub fn available(self) -> bool {
        match self {
            #[cfg(target_arch = "x86_64")]
            Popcount::Avx512 => {
                std::arch::is_x86_feature_detected!("avx512f")
                    && std::arch::is_x86_feature_detected!("avx512vpopcntdq")
            }
            #[cfg(target_arch = "x86_64")]
            Popcount::Avx2 => std::arch::is_x86_feature_detected!("avx2"),
            #[cfg(target_arch = "x86_64")]
            Popcount::Popcnt => std::arch::is_x86_feature_detected!("popcnt"),
            Popcount::Portable => true,
            #[cfg(not(target_arch = "x86_64"))]
            _ => false,
        }
    }

    /// Every way this CPU can run (for tests and benchmarks).
    pub fn all_available() -> Vec<Popcount> {
        [
            Popcount::Avx512,
            Popcount::Avx2,
            Popcount::Popcnt,
            Popcount::Portable,
        ]
        .into_iter()
        .filter(|p| p.available())
        .collect()
    }

    /// Estimated nanoseconds per (table cell x 64 rows) on one thread.
    pub(super) fn cost_per_cell_word(self) -> f64 {
        match self {
            Popcount::Avx512 => 0.12,
            Popcount::Avx2 => 0.25,
            Popcount::Popcnt => 0.45,
            Popcount::Portable => 1.0,
        }
    }
}

/// Adds `popcount(a[x] & b[y])` over the first `words` words into `out[x * b.len() + y]`.
pub(crate) fn inner_counts(
    path: Popcount,
    a: &[&[u64]],
    b: &[&[u64]],
    words: usize,
    out: &mut [u64],
) {
    // A path the CPU lacks falls back to the portable one (this keeps the dispatch sound).
    let path = if path.available() {
        path
    } else {
        Popcount::Portable
    };
    let words = a.iter().chain(b).map(|s| s.len()).fold(words, usize::min);
    let (ka, kb) = (a.len(), b.len());
    let mut a0 = 0;
    while a0 < ka {
        let ta = (ka - a0).min(2);
        let mut b0 = 0;
        while b0 < kb {
            let tb = (kb - b0).min(4);
            let t = Tile {
                path,
                a: &a[a0..a0 + ta],
                b: &b[b0..b0 + tb],
                words,
            };
            let mut res = [[0u64; 4]; 2];
            match (ta, tb) {
                (2, 4) => t.run::<2, 4>(&mut res),
                (2, 3) => t.run::<2, 3>(&mut res),
                (2, 2) => t.run::<2, 2>(&mut res),
                (2, 1) => t.run::<2, 1>(&mut res),
                (1, 4) => t.run::<1, 4>(&mut res),
                (1, 3) => t.run::<1, 3>(&mut res),
                (1, 2) => t.run::<1, 2>(&mut res),
                _ => t.run::<1, 1>(&mut res),
            }
            for (x, r) in res.iter().enumerate().take(ta) {
                for (y, &v) in r.iter().enumerate().take(tb) {
                    out[(a0 + x) * kb + b0 + y] += v;
                }
            }
            b0 += tb;
        }
        a0 += ta;
    }
}

/// One tile of up to 2 x 4 cells.
struct Tile<'s> {
    path: Popcount,
    a: &'s [&'s [u64]],
    b: &'s [&'s [u64]],
    words: usize,
}

impl Tile<'_> {
    fn run<const TA: usize, const TB: usize>(&self, res: &mut [[u64; 4]; 2]) {
        let mut a: [&[u64]; TA] = [&[]; TA];
        for (dst, src) in a.iter_mut().zip(self.a) {
            *dst = &src[..self.words];
        }
        let mut b: [&[u64]; TB] = [&[]; TB];
        for (dst, src) in b.iter_mut().zip(self.b) {
            *dst = &src[..self.words];
        }
        let mut out = [[0u64; TB]; TA];
        match self.path {
            #[cfg(target_arch = "x86_64")]
            // SAFETY: `inner_counts` only keeps a path that `available()` confirmed on this CPU
            // (here AVX-512F and VPOPCNTDQ).
            Popcount::Avx512 => unsafe { tile_avx512::<TA, TB>(a, b, self.words, &mut out) },
            #[cfg(target_arch = "x86_64")]
            // SAFETY: as above, AVX2 was detected.
            Popcount::Avx2 => unsafe { tile_avx2::<TA, TB>(a, b, self.words, &mut out) },
            #[cfg(target_arch = "x86_64")]
            // SAFETY: as above, POPCNT was detected.
            Popcount::Popcnt => unsafe { tile_popcnt::<TA, TB>(a, b, self.words, &mut out) },
            _ => tile_scalar::<TA, TB>(a, b, self.words, &mut out),
        }
        for (r, o) in res.iter_mut().zip(&out) {
            r[..TB].copy_from_slice(o);
        }
    }
}

/// The tile with `u64::count_ones`; every slice holds exactly `words` words.
#[inline(always)]
fn tile_scalar<const TA: usize, const TB: usize>(
    a: [&[u64]; TA],
    b: [&[u64]; TB],
    words: usize,
    out: &mut [[u64; TB]; TA],
) {
    let mut acc = [[0u64; TB]; TA];
    for w in 0..words {
        let mut av = [0u64; TA];
        for (v, s) in av.iter_mut().zip(&a) {
            *v = s[w];
        }
        for (y, s) in b.iter().enumerate() {
            let bv = s[w];
            for (x, &v) in av.iter().enumerate() {
                acc[x][y] += u64::from((v & bv).count_ones());
            }
        }
    }
    *out = acc;
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "popcnt")]
fn tile_popcnt<const TA: usize, const TB: usize>(
    a: [&[u64]; TA],
    b: [&[u64]; TB],
    words: usize,
    out: &mut [[u64; TB]; TA],
) {
    tile_scalar::<TA, TB>(a, b, words, out);
}

/// The tile with AVX2: per 256 bits, AND, then the popcount of each nibble by table lookup
/// (`vpshufb`), summed into byte counters that `vpsadbw` widens to u64 every 31 vectors (a byte
/// counter gains at most 8 per vector, so 31 x 8 = 248 < 256 cannot overflow).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn tile_avx2<const TA: usize, const TB: usize>(
    a: [&[u64]; TA],
    b: [&[u64]; TB],
    words: usize,
    out: &mut [[u64; TB]; TA],
) {
    use std::arch::x86_64::*;
    let lut = _mm256_setr_epi8(
        0, 1, 1, 2, 1, 2, 2, 3, 1, 2, 2, 3, 2, 3, 3, 4, 0, 1, 1, 2, 1, 2, 2, 3, 1, 2, 2, 3, 2, 3,
        3, 4,
    );
    let low = _mm256_set1_epi8(0x0f);
    let zero = _mm256_setzero_si256();
    let vecs = words / 4;
    let mut total = [[zero; TB]; TA];
    let mut v = 0;
    while v < vecs {
        let end = (v + 31).min(vecs);
        let mut acc = [[zero; TB]; TA];
        while v < end {
            let mut av = [zero; TA];
            for (x, s) in av.iter_mut().zip(&a) {
                // SAFETY: v < words / 4 and every slice holds `words` words, so the 4 words
                // at 4 v are in bounds; loadu takes any alignment.
                *x = unsafe { _mm256_loadu_si256(s.as_ptr().add(4 * v).cast()) };
            }
            for (y, s) in b.iter().enumerate() {
                // SAFETY: as above.
                let bv = unsafe { _mm256_loadu_si256(s.as_ptr().add(4 * v).cast()) };
                for (x, &va) in av.iter().enumerate() {
                    let both = _mm256_and_si256(va, bv);
                    let lo = _mm256_and_si256(both, low);
                    let hi = _mm256_and_si256(_mm256_srli_epi16::<4>(both), low);
                    let cnt =
                        _mm256_add_epi8(_mm256_shuffle_epi8(lut, lo), _mm256_shuffle_epi8(lut, hi));
                    acc[x][y] = _mm256_add_epi8(acc[x][y], cnt);
                }
            }
            v += 1;
        }
        for (t, c) in total.iter_mut().zip(&acc) {
            for (tv, &cv) in t.iter_mut().zip(c) {
                *tv = _mm256_add_epi64(*tv, _mm256_sad_epu8(cv, zero));
            }
        }
    }
    for (o, t) in out.iter_mut().zip(&total) {
        for (ov, &tv) in o.iter_mut().zip(t) {
            let lanes = [
                _mm256_extract_epi64::<0>(tv),
                _mm256_extract_epi64::<1>(tv),
                _mm256_extract_epi64::<2>(tv),
                _mm256_extract_epi64::<3>(tv),
            ];
            *ov = lanes.iter().map(|&x| x as u64).sum();
        }
    }
    // The last words that do not fill a vector.
    add_tail(&a, &b, vecs * 4..words, out);
}

/// The tile with AVX-512: per 512 bits, AND, then `vpopcntq` counts each 64-bit lane, added into
/// u64 lanes (which cannot overflow: a lane gains at most 64 per vector).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx512vpopcntdq")]
fn tile_avx512<const TA: usize, const TB: usize>(
    a: [&[u64]; TA],
    b: [&[u64]; TB],
    words: usize,
    out: &mut [[u64; TB]; TA],
) {
    use std::arch::x86_64::*;
    let zero = _mm512_setzero_si512();
    let vecs = words / 8;
    let mut acc = [[zero; TB]; TA];
    for v in 0..vecs {
        let mut av = [zero; TA];
        for (x, s) in av.iter_mut().zip(&a) {
            // SAFETY: v < words / 8 and every slice holds `words` words, so the 8 words at 8 v
            // are in bounds; loadu takes any alignment.
            *x = unsafe { _mm512_loadu_si512(s.as_ptr().add(8 * v).cast()) };
        }
        for (y, s) in b.iter().enumerate() {
            // SAFETY: as above.
            let bv = unsafe { _mm512_loadu_si512(s.as_ptr().add(8 * v).cast()) };
            for (x, &va) in av.iter().enumerate() {
                let cnt = _mm512_popcnt_epi64(_mm512_and_si512(va, bv));
                acc[x][y] = _mm512_add_epi64(acc[x][y], cnt);
            }
        }
    }
    for (o, t) in out.iter_mut().zip(&acc) {
        for (ov, &tv) in o.iter_mut().zip(t) {
            *ov = _mm512_reduce_add_epi64(tv) as u64;
        }
    }
    // The last words that do not fill a vector.
    add_tail(&a, &b, vecs * 8..words, out);
}

/// Adds the AND + popcount of the words `range` (the ones past the last full vector).
#[inline(always)]
fn add_tail<const TA: usize, const TB: usize>(
    a: &[&[u64]; TA],
    b: &[&[u64]; TB],
    range: std::ops::Range<usize>,
    out: &mut [[u64; TB]; TA],
) {
    for w in range {
        for (x, sa) in a.iter().enumerate() {
            for (y, sb) in b.iter().enumerate() {
                out[x][y] += u64::from((sa[w] & sb[w]).count_ones());
            }
        }
    }
}
