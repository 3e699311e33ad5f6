//! Walks of a column's non-dominant rows (scalar and AVX2), and the lookup kernel for pairs with
//! one sparse side, which counts only those rows and derives the dominant line.

use rayon::prelude::*;

use super::{internal, Ctx, PairTable};
use crate::error::Result;

/// Calls `f(row, code)` for every row of `col` (in order) whose code is not `dominant`.
#[inline(always)]
pub(super) fn for_each_nondominant(col: &[u16], dominant: u16, mut f: impl FnMut(usize, u16)) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the CPU supports AVX2 (checked just above).
        unsafe { nondominant_avx2(col, dominant, &mut f) };
        return;
    }
    nondominant_scalar(col, dominant, &mut f);
}

#[inline(always)]
pub(super) fn nondominant_scalar(col: &[u16], dominant: u16, f: &mut impl FnMut(usize, u16)) {
    for (ci, chunk) in col.chunks(32).enumerate() {
        // Skip whole chunks at the dominant level (vectorises to xor + or).
        if chunk.iter().fold(0u16, |acc, &c| acc | (c ^ dominant)) == 0 {
            continue;
        }
        for (t, &c) in chunk.iter().enumerate() {
            if c != dominant {
                f(ci * 32 + t, c);
            }
        }
    }
}

/// `for_each_nondominant` with AVX2: 32 codes per compare, then one call per set mask bit.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn nondominant_avx2(col: &[u16], dominant: u16, f: &mut impl FnMut(usize, u16)) {
    use std::arch::x86_64::*;
    let dom = _mm256_set1_epi16(dominant as i16);
    let groups = col.chunks_exact(32);
    let tail = groups.remainder();
    for (g, chunk) in groups.enumerate() {
        let p = chunk.as_ptr().cast::<__m256i>();
        // SAFETY: `chunk` holds 32 u16 = two 32-byte vectors; loadu takes any alignment.
        let (c0, c1) = unsafe { (_mm256_loadu_si256(p), _mm256_loadu_si256(p.add(1))) };
        let eq = _mm256_permute4x64_epi64::<0xD8>(_mm256_packs_epi16(
            _mm256_cmpeq_epi16(c0, dom),
            _mm256_cmpeq_epi16(c1, dom),
        ));
        let mut other = !(_mm256_movemask_epi8(eq) as u32);
        while other != 0 {
            let t = other.trailing_zeros() as usize;
            f(g * 32 + t, chunk[t]);
            other &= other - 1;
        }
    }
    let base = col.len() - tail.len();
    for (t, &c) in tail.iter().enumerate() {
        if c != dominant {
            f(base + t, c);
        }
    }
}

/// The rows (in order) where `col` is not at `dominant`.
fn nondominant_rows(col: &[u16], dominant: u16) -> Vec<u32> {
    let mut rows = Vec::new();
    for_each_nondominant(col, dominant, |row, _| rows.push(row as u32));
    rows
}

/// Pairs with one sparse side: count the rows where that side is not dominant, derive the rest.
pub(super) fn count_lookup(
    ctx: &Ctx<'_>,
    first: Vec<PairTable<'_>>,
    second: Vec<PairTable<'_>>,
) -> Result<()> {
    let d = ctx.cards.len();
    let mut needed = vec![false; d];
    first.iter().for_each(|p| needed[p.i] = true);
    second.iter().for_each(|p| needed[p.j] = true);
    let rows: Vec<Option<Vec<u32>>> = (0..d)
        .into_par_iter()
        .map(|c| needed[c].then(|| nondominant_rows(ctx.codes[c], ctx.dominant[c])))
        .collect();
    let tasks: Vec<(bool, PairTable<'_>)> = first
        .into_iter()
        .map(|p| (true, p))
        .chain(second.into_iter().map(|p| (false, p)))
        .collect();
    tasks
        .into_par_iter()
        .try_for_each_init(Vec::new, |sums: &mut Vec<u64>, (on_first, p)| {
            ctx.token.check()?;
            // Count straight into the table; the walked rows' totals per level of the other
            // column give the dominant line: marginal minus what was counted outside it.
            let (ri, rj) = (ctx.cards[p.i], ctx.cards[p.j]);
            let side = if on_first { p.i } else { p.j };
            let list = rows[side]
                .as_deref()
                .ok_or_else(|| internal("missing row list"))?;
            let (a, b) = (ctx.codes[p.i], ctx.codes[p.j]);
            sums.clear();
            sums.resize(if on_first { rj } else { ri }, 0);
            for &k in list {
                let k = k as usize;
                let (x, y) = (usize::from(a[k]), usize::from(b[k]));
                p.table[x * rj + y] += 1;
                sums[if on_first { y } else { x }] += 1;
            }
            let short = || internal("a pair table exceeds a marginal");
            if on_first {
                let row = usize::from(ctx.dominant[p.i]) * rj;
                for (y, (&m, &c)) in ctx.m[p.j].iter().zip(sums.iter()).enumerate() {
                    p.table[row + y] += m.checked_sub(c).ok_or_else(short)?;
                }
            } else {
                let col = usize::from(ctx.dominant[p.j]);
                for (x, (&m, &c)) in ctx.m[p.i].iter().zip(sums.iter()).enumerate() {
                    p.table[x * rj + col] += m.checked_sub(c).ok_or_else(short)?;
                }
            }
            Ok(())
        })
}
