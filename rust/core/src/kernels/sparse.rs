//! The sparse co-occurrence kernel: pairs of columns dominated by one level, counted from the
//! non-dominant entries that share a row (the accelerated method of Meila, JMLR 2000).

use std::ops::Range;

use rayon::prelude::*;

use super::walk::for_each_nondominant;
use super::{add_into, complete, internal, Ctx, PairTable};
use crate::error::Result;
use crate::stats::{pair_count, pair_index};

/// Rows of one sparse sub-block, at most (row numbers within it fit in u16); fewer when rows hold
/// many entries, so that a block's entries take about 8 MiB.
const SPARSE_BLOCK_ROWS: usize = 1 << 15;
/// Entries (non-dominant column levels) one sparse sub-block aims at.
const SPARSE_BLOCK_ENTRIES: usize = 1 << 20;

/// The sparse set's layout: its columns, their inner levels and where each pair's cells live.
struct SparseSet {
    /// Global column of each member.
    cols: Vec<usize>,
    /// Dominant level of each member.
    dom: Vec<u16>,
    /// Non-dominant levels of each member (its cardinality minus one).
    k: Vec<usize>,
    /// Start of each member pair's `k_p x k_q` cells, in pair-index order over members.
    off: Vec<usize>,
    total: usize,
    /// Rows per sub-block.
    block_rows: usize,
}

impl SparseSet {
    /// A level's index among its column's non-dominant levels.
    fn inner(level: u16, dom: u16) -> usize {
        usize::from(level) - usize::from(level > dom)
    }
}

/// Pairs within the sparse set: enumerate each row's co-occurring non-dominant entries.
pub(super) fn count_cooc(ctx: &Ctx<'_>, pairs: Vec<PairTable<'_>>) -> Result<()> {
    let d = ctx.cards.len();
    let mut member = vec![false; d];
    for p in &pairs {
        member[p.i] = true;
        member[p.j] = true;
    }
    let cols: Vec<usize> = (0..d).filter(|&c| member[c]).collect();
    let s = cols.len();
    let mut pos = vec![usize::MAX; d];
    for (x, &c) in cols.iter().enumerate() {
        pos[c] = x;
    }
    let dom: Vec<u16> = cols.iter().map(|&c| ctx.dominant[c]).collect();
    let k: Vec<usize> = cols
        .iter()
        .map(|&c| ctx.cards[c].saturating_sub(1))
        .collect();
    let mut off = Vec::with_capacity(pair_count(s) + 1);
    off.push(0);
    for p in 0..s {
        for q in p + 1..s {
            let last = off.last().copied().unwrap_or(0);
            off.push(last + k[p] * k[q]);
        }
    }
    let total = off.last().copied().unwrap_or(0);
    let n = ctx.n();
    let entries: u64 = cols
        .iter()
        .map(|&c| n as u64 - ctx.m[c][usize::from(ctx.dominant[c])])
        .sum();
    let per_row = (entries / (n as u64).max(1)) as usize + 1;
    let block_rows = (SPARSE_BLOCK_ENTRIES / per_row).clamp(256, SPARSE_BLOCK_ROWS) / 32 * 32;
    let set = SparseSet {
        cols,
        dom,
        k,
        off,
        total,
        block_rows,
    };
    // One contiguous range of rows per thread, each with its own u32 counters.
    let parts = rayon::current_num_threads().clamp(1, n.div_ceil(set.block_rows).max(1));
    let ranges: Vec<Range<usize>> = (0..parts)
        .map(|t| (n * t / parts)..(n * (t + 1) / parts))
        .collect();
    let partials: Vec<Vec<u32>> = ranges
        .into_par_iter()
        .map(|range| cooc_range(ctx, &set, range))
        .collect();
    let mut inner = vec![0u64; set.total];
    for part in &partials {
        inner
            .iter_mut()
            .zip(part)
            .for_each(|(x, &y)| *x += u64::from(y));
    }
    drop(partials);
    // The pair tables are untouched so far: a cancelled call stops here and leaves them so.
    ctx.token.check()?;
    pairs
        .into_par_iter()
        .try_for_each_init(Vec::new, |local: &mut Vec<u64>, p| {
            let (ri, rj) = (ctx.cards[p.i], ctx.cards[p.j]);
            let (pi, pj) = (pos[p.i], pos[p.j]);
            if pi >= s || pj >= s {
                return Err(internal("a co-occurrence pair outside the sparse set"));
            }
            let (di, dj) = (set.dom[pi], set.dom[pj]);
            let start = set.off[pair_index(s, pi, pj)];
            let kq = set.k[pj];
            if ri == 2 && rj == 2 {
                // Two binary columns: one counted cell, three from the marginals.
                let (a, b) = (1 - usize::from(di), 1 - usize::from(dj));
                let (di, dj) = (usize::from(di), usize::from(dj));
                let (mi, mj) = (&ctx.m[p.i], &ctx.m[p.j]);
                let both = inner[start];
                let short = || internal("a pair table exceeds a marginal");
                let a_only = mi[a].checked_sub(both).ok_or_else(short)?;
                let b_only = mj[b].checked_sub(both).ok_or_else(short)?;
                let neither = mi[di].checked_sub(b_only).ok_or_else(short)?;
                p.table[a * 2 + b] += both;
                p.table[a * 2 + dj] += a_only;
                p.table[di * 2 + b] += b_only;
                p.table[di * 2 + dj] += neither;
                return Ok(());
            }
            local.clear();
            local.resize(ri * rj, 0);
            for a in 0..ri {
                if a == usize::from(di) {
                    continue;
                }
                let la = SparseSet::inner(a as u16, di);
                for b in 0..rj {
                    if b == usize::from(dj) {
                        continue;
                    }
                    let lb = SparseSet::inner(b as u16, dj);
                    local[a * rj + b] = inner[start + la * kq + lb];
                }
            }
            complete(
                local,
                rj,
                Some(usize::from(di)),
                Some(usize::from(dj)),
                &ctx.m[p.i],
                &ctx.m[p.j],
            )?;
            add_into(p.table, local);
            Ok(())
        })
}

/// Co-occurrence counts of one range of rows, in u32 (a range is at most one chunk of rows).
fn cooc_range(ctx: &Ctx<'_>, set: &SparseSet, range: Range<usize>) -> Vec<u32> {
    let s = set.cols.len();
    let mut counts = vec![0u32; set.total];
    // Where pair (p, q)'s index starts: pair_index(s, p, q) = row_start[p] + q (wrapping).
    let row_start: Vec<usize> = (0..s)
        .map(|p| (p * s).wrapping_sub(p * (p + 1) / 2 + p + 1))
        .collect();
    let mut ent_row: Vec<u16> = Vec::new();
    let mut ent_val: Vec<(u32, u16)> = Vec::new();
    let mut sorted: Vec<(u32, u16)> = Vec::new();
    let mut starts: Vec<u32> = Vec::new();
    let mut block = range.start;
    while block < range.end && !ctx.token.cancelled() {
        let end = (block + set.block_rows).min(range.end);
        let len = end - block;
        ent_row.clear();
        ent_val.clear();
        // Column by column: the non-dominant entries of this block, as (row, member, level).
        for (p, &c) in set.cols.iter().enumerate() {
            let dom = set.dom[p];
            let col = &ctx.codes[c][block..end];
            for_each_nondominant(col, dom, |row, x| {
                ent_row.push(row as u16);
                ent_val.push((p as u32, SparseSet::inner(x, dom) as u16));
            });
        }
        // Group by row (a stable counting sort keeps each row's members in ascending order).
        starts.clear();
        starts.resize(len + 1, 0);
        for &r in &ent_row {
            starts[usize::from(r) + 1] += 1;
        }
        for t in 0..len {
            starts[t + 1] += starts[t];
        }
        sorted.clear();
        sorted.resize(ent_val.len(), (0, 0));
        {
            let mut next: Vec<u32> = starts[..len].to_vec();
            for (&r, &v) in ent_row.iter().zip(&ent_val) {
                let slot = &mut next[usize::from(r)];
                sorted[*slot as usize] = v;
                *slot += 1;
            }
        }
        for t in 0..len {
            let row = &sorted[starts[t] as usize..starts[t + 1] as usize];
            for (x, &(p, la)) in row.iter().enumerate() {
                let p = p as usize;
                let base = row_start[p];
                for &(q, lb) in &row[x + 1..] {
                    let q = q as usize;
                    let cell = set.off[base.wrapping_add(q)]
                        + usize::from(la) * set.k[q]
                        + usize::from(lb);
                    counts[cell] += 1;
                }
            }
        }
        block = end;
    }
    counts
}
