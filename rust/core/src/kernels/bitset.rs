//! The bitset kernel: one bitset per (column, level) over a block of rows, pair cells by AND +
//! popcount, the last row and column from the marginals.

use rayon::prelude::*;

use super::popcount::{inner_counts, Popcount};
use super::{add_into, complete, internal, Ctx, PairTable};
use crate::error::Result;

/// The bitset memory one block of rows may take (in u64 words: 16 MiB). Longer blocks amortise
/// each tile's set-up; the tiles stream their partners' bitsets from cache.
const BITSET_BUDGET_WORDS: usize = 1 << 21;
/// The longest bitset of one block, in u64 words (32,768 rows: 4 KiB, so a tile stays in L1).
const BITSET_MAX_WORDS: usize = 512;

/// Pairs counted by AND + popcount over per-level bitsets, block of rows by block of rows.
pub(super) fn count_bitset(ctx: &Ctx<'_>, path: Popcount, pairs: Vec<PairTable<'_>>) -> Result<()> {
    let d = ctx.cards.len();
    let n = ctx.n();
    let k: Vec<usize> = ctx.cards.iter().map(|&r| r.saturating_sub(1)).collect();
    // Partners of each column (j > i) and the bitset rows of the needed columns.
    let mut partners: Vec<Vec<usize>> = vec![Vec::new(); d];
    let mut needed = vec![false; d];
    for p in &pairs {
        partners[p.i].push(p.j);
        needed[p.i] = true;
        needed[p.j] = true;
    }
    let mut base = vec![usize::MAX; d];
    let mut rows_total = 0;
    for c in 0..d {
        if needed[c] {
            base[c] = rows_total;
            rows_total += k[c];
        }
    }
    // Per column: the bitset rows of its partners' levels (y), and where each partner starts.
    let ylist: Vec<Vec<usize>> = (0..d)
        .map(|c| {
            partners[c]
                .iter()
                .flat_map(|&j| base[j]..base[j] + k[j])
                .collect()
        })
        .collect();
    // Gram cells: for column c, k_c rows of |ylist(c)| cells; `gram_off[c]` is where they start.
    let mut gram_off = vec![0usize; d + 1];
    for c in 0..d {
        gram_off[c + 1] = gram_off[c] + k[c] * ylist[c].len();
    }
    let mut gram = vec![0u64; gram_off[d]];
    // Tasks: one or two consecutive levels of one column against all its partners' levels.
    struct Task<'g> {
        col: usize,
        level: usize,
        out: &'g mut [u64],
    }
    let mut tasks: Vec<Task<'_>> = Vec::new();
    {
        let mut rest: &mut [u64] = &mut gram;
        for c in 0..d {
            let len = ylist[c].len();
            if len == 0 {
                continue;
            }
            let mut level = 0;
            while level < k[c] {
                let rows = (k[c] - level).min(2);
                let (head, tail) = std::mem::take(&mut rest).split_at_mut(rows * len);
                tasks.push(Task {
                    col: c,
                    level,
                    out: head,
                });
                rest = tail;
                level += rows;
            }
        }
    }
    // Rows per block: a multiple of 512 (whole AVX2 vectors), within the memory budget.
    let words_max = (BITSET_BUDGET_WORDS / rows_total.max(1)).clamp(32, BITSET_MAX_WORDS) / 8 * 8;
    let block_rows = words_max * 64;
    let stride = n.min(block_rows).div_ceil(64).div_ceil(8) * 8;
    let mut bits = vec![0u64; rows_total * stride];
    let mut start = 0;
    while start < n {
        ctx.token.check()?;
        let end = (start + block_rows).min(n);
        let words = (end - start).div_ceil(64).div_ceil(4) * 4;
        // Build every needed column's bitsets for this block.
        {
            let mut parts: Vec<(usize, &mut [u64])> = Vec::new();
            let mut rest: &mut [u64] = &mut bits;
            for c in 0..d {
                if needed[c] {
                    let (head, tail) = std::mem::take(&mut rest).split_at_mut(k[c] * stride);
                    parts.push((c, head));
                    rest = tail;
                }
            }
            parts.into_par_iter().for_each(|(c, out)| {
                build_bitsets(&ctx.codes[c][start..end], k[c], stride, out);
            });
        }
        let bits = &bits;
        let row = |r: usize| &bits[r * stride..r * stride + words];
        tasks.par_iter_mut().for_each(|t| {
            if ctx.token.cancelled() {
                return;
            }
            let len = ylist[t.col].len();
            let rows = t.out.len() / len.max(1);
            let a: Vec<&[u64]> = (0..rows).map(|x| row(base[t.col] + t.level + x)).collect();
            let b: Vec<&[u64]> = ylist[t.col].iter().map(|&y| row(y)).collect();
            inner_counts(path, &a, &b, words, t.out);
        });
        start = end;
    }
    drop(tasks);
    // The pair tables are untouched so far: a cancelled call stops here and leaves them so.
    ctx.token.check()?;
    // Each pair's inner cells from the Gram rows, then its last row and column from marginals.
    let mut partner_at: Vec<Vec<usize>> = vec![Vec::new(); d];
    for c in 0..d {
        let mut at = 0;
        for &j in &partners[c] {
            partner_at[c].push(at);
            at += k[j];
        }
    }
    let mut order: Vec<Vec<usize>> = vec![Vec::new(); d];
    for (x, p) in pairs.iter().enumerate() {
        order[p.i].push(x);
    }
    let mut rank = vec![0usize; pairs.len()];
    for list in &order {
        for (y, &x) in list.iter().enumerate() {
            rank[x] = y;
        }
    }
    let gram = &gram;
    pairs
        .into_par_iter()
        .zip(rank.into_par_iter())
        .try_for_each_init(Vec::new, |local: &mut Vec<u64>, (p, y)| {
            let (ri, rj) = (ctx.cards[p.i], ctx.cards[p.j]);
            let (ki, kj) = (k[p.i], k[p.j]);
            let len = ylist[p.i].len();
            let at = *partner_at[p.i]
                .get(y)
                .ok_or_else(|| internal("missing bitset partner"))?;
            local.clear();
            local.resize(ri * rj, 0);
            for a in 0..ki {
                let g = &gram[gram_off[p.i] + a * len + at..][..kj];
                local[a * rj..a * rj + kj].copy_from_slice(g);
            }
            complete(
                local,
                rj,
                Some(ri - 1),
                Some(rj - 1),
                &ctx.m[p.i],
                &ctx.m[p.j],
            )?;
            add_into(p.table, local);
            Ok(())
        })
}

/// Writes the bitsets of levels `0..k` of `codes` (bit t of word w: row 64 w + t) into `out`,
/// `stride` words per level; words past the codes are zero.
pub(crate) fn build_bitsets(codes: &[u16], k: usize, stride: usize, out: &mut [u64]) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the CPU supports AVX2 (checked just above).
        unsafe { build_bitsets_avx2(codes, k, stride, out) };
        return;
    }
    build_bitsets_scalar(codes, k, stride, out);
}

pub(super) fn build_bitsets_scalar(codes: &[u16], k: usize, stride: usize, out: &mut [u64]) {
    out.fill(0);
    for (w, chunk) in codes.chunks(64).enumerate() {
        if k <= 8 {
            for l in 0..k {
                let level = l as u16;
                let mut m = 0u64;
                for (t, &c) in chunk.iter().enumerate() {
                    m |= u64::from(c == level) << t;
                }
                out[l * stride + w] = m;
            }
        } else {
            for (t, &c) in chunk.iter().enumerate() {
                let c = usize::from(c);
                if c < k {
                    out[c * stride + w] |= 1u64 << t;
                }
            }
        }
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn build_bitsets_avx2(codes: &[u16], k: usize, stride: usize, out: &mut [u64]) {
    use std::arch::x86_64::*;
    out.fill(0);
    let groups = codes.chunks_exact(64);
    let tail = groups.remainder();
    let full = codes.len() / 64;
    for (w, g) in groups.enumerate() {
        let p = g.as_ptr().cast::<__m256i>();
        // SAFETY: `g` holds 64 u16 = 128 bytes = four 32-byte vectors; loadu takes any alignment.
        let (c0, c1, c2, c3) = unsafe {
            (
                _mm256_loadu_si256(p),
                _mm256_loadu_si256(p.add(1)),
                _mm256_loadu_si256(p.add(2)),
                _mm256_loadu_si256(p.add(3)),
            )
        };
        for l in 0..k {
            let level = _mm256_set1_epi16(l as i16);
            // packs interleaves the 128-bit lanes; permute 0xD8 puts rows back in order.
            let lo = _mm256_permute4x64_epi64::<0xD8>(_mm256_packs_epi16(
                _mm256_cmpeq_epi16(c0, level),
                _mm256_cmpeq_epi16(c1, level),
            ));
            let hi = _mm256_permute4x64_epi64::<0xD8>(_mm256_packs_epi16(
                _mm256_cmpeq_epi16(c2, level),
                _mm256_cmpeq_epi16(c3, level),
            ));
            let lo = u64::from(_mm256_movemask_epi8(lo) as u32);
            let hi = u64::from(_mm256_movemask_epi8(hi) as u32);
            out[l * stride + w] = lo | (hi << 32);
        }
    }
    for (t, &c) in tail.iter().enumerate() {
        let c = usize::from(c);
        if c < k {
            out[c * stride + full] |= 1u64 << t;
        }
    }
}
