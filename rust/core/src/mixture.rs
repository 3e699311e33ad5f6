//! Mixtures of trees (Meilă & Jordan, JMLR 2000): weighted pair counts from responsibilities,
//! each component's Chow–Liu tree and smoothed tables, and every row's log-likelihood under each.

use rayon::prelude::*;

use crate::codebook::UNSEEN;
use crate::error::{Error, Result};
use crate::model::{push_cdf, smoothed_weighted_row, Sampled, TreeModel, SAMPLE_BLOCK};
use crate::rng::Rng;
use crate::stats::{pair_count, pairs, PairStats};
use crate::tree;
use crate::weights::mutual_info;

/// Rows per block of the weighted counting: one block of responsibilities stays in cache while a
/// task runs over its pairs.
const ROW_BLOCK: usize = 4096;
/// Rows per chunk of the log-likelihood pass handed to one thread.
const SCORE_CHUNK: usize = 8192;
/// The most f64 cells the weighted tables of one call may hold (16 GiB).
pub const MAX_WEIGHTED_CELLS: u64 = 1 << 31;

/// One component's weighted statistics: total weight, marginals and pair tables (f64).
#[derive(Clone, Debug, PartialEq)]
pub struct WeightedStats {
    /// The sum of the component's responsibilities.
    pub n: f64,
    /// Per column, the weighted count of each code.
    pub marginals: Vec<Vec<f64>>,
    /// Per pair (i < j, pair-index order), the row-major `r_i x r_j` weighted table.
    pub tables: Vec<Vec<f64>>,
}

/// Checks the code columns against the cardinalities: equal lengths, every code below its
/// column's cardinality (UNSEEN allowed only when `lenient`). Returns the row count.
fn check_codes(codes: &[Vec<u16>], cards: &[usize], lenient: bool) -> Result<usize> {
    if codes.len() != cards.len() || codes.is_empty() {
        return Err(Error::Invalid(format!(
            "{} code columns for {} cardinalities (at least one column is needed)",
            codes.len(),
            cards.len()
        )));
    }
    let n = codes[0].len();
    for (c, (col, &card)) in codes.iter().zip(cards).enumerate() {
        if card == 0 || card > usize::from(UNSEEN) {
            return Err(Error::Invalid(format!(
                "column {c} has cardinality {card}; codes run from 1 to {UNSEEN} values"
            )));
        }
        if col.len() != n {
            return Err(Error::Invalid(format!(
                "code column {c} has {} rows, column 0 has {n}",
                col.len()
            )));
        }
        let bad = col
            .par_iter()
            .any(|&x| usize::from(x) >= card && !(lenient && x == UNSEEN));
        if bad {
            return Err(Error::Invalid(format!(
                "code column {c} holds a code outside 0..{card}"
            )));
        }
    }
    Ok(n)
}

/// Per component, the weighted marginals and pair tables of the code columns, each row weighted
/// by its responsibilities `resp` (row-major, `n x k`, finite and non-negative).
///
/// Every cell is a sum over rows in row order, computed by one thread, so the result is the
/// same bits for any number of threads.
pub fn weighted_stats(
    codes: &[Vec<u16>],
    cards: &[usize],
    resp: &[f64],
    k: usize,
) -> Result<Vec<WeightedStats>> {
    let len = weighted_sums_len(cards, k)?;
    let mut sums = vec![0.0; len];
    add_weighted_sums(&mut sums, codes, cards, resp, k)?;
    split_weighted_sums(&sums, cards, k)
}

/// How many f64 the running weighted sums of `k` components hold (see [`add_weighted_sums`]);
/// an error past [`MAX_WEIGHTED_CELLS`] pair cells.
pub fn weighted_sums_len(cards: &[usize], k: usize) -> Result<usize> {
    if k == 0 || cards.is_empty() {
        return Err(Error::Invalid(format!(
            "weighted sums need at least one column and one component, got {} and {k}",
            cards.len()
        )));
    }
    let cells: u64 = pairs(cards.len())
        .iter()
        .map(|&(i, j)| (cards[i] as u64).saturating_mul(cards[j] as u64))
        .fold(0u64, u64::saturating_add)
        .saturating_mul(k as u64);
    if cells > MAX_WEIGHTED_CELLS {
        return Err(Error::ResourceLimit(format!(
            "the weighted pair tables of {k} components would hold {cells} cells, more than \
             {MAX_WEIGHTED_CELLS}; use fewer components, columns or categories"
        )));
    }
    let marginals = cards
        .iter()
        .map(|&r| r as u64)
        .fold(0u64, u64::saturating_add)
        .saturating_mul(k as u64);
    usize::try_from(cells.saturating_add(marginals))
        .map_err(|_| Error::ResourceLimit("the weighted sums do not fit in memory".into()))
}

/// Adds the rows' weighted marginals and pair tables to the running `sums` of `k` components
/// (flat, [`weighted_sums_len`] values: each column's `r x k` marginals, then each pair's
/// `r_i x r_j x k` table in pair-index order, the components inner). `resp` as in
/// [`weighted_stats`].
///
/// Every cell adds its rows in row order to what it already holds, on one thread: adding the
/// rows batch by batch gives the same bits as adding them all at once, for any batch sizes and
/// any number of threads.
pub fn add_weighted_sums(
    sums: &mut [f64],
    codes: &[Vec<u16>],
    cards: &[usize],
    resp: &[f64],
    k: usize,
) -> Result<()> {
    let n = check_codes(codes, cards, false)?;
    if k == 0 || Some(resp.len()) != n.checked_mul(k) {
        return Err(Error::Invalid(format!(
            "responsibilities hold {} values, not {n} rows x {k} components",
            resp.len()
        )));
    }
    if resp.par_iter().any(|r| !(r.is_finite() && *r >= 0.0)) {
        return Err(Error::Invalid(
            "responsibilities must be finite and non-negative".into(),
        ));
    }
    let len = weighted_sums_len(cards, k)?;
    if sums.len() != len {
        return Err(Error::Invalid(format!(
            "the weighted sums hold {} values, not the {len} of these columns and {k} components",
            sums.len()
        )));
    }
    let d = cards.len();
    let all = pairs(d);
    let (marginal_sums, mut rest) = sums.split_at_mut(cards.iter().sum::<usize>() * k);
    let mut marginals: Vec<&mut [f64]> = Vec::with_capacity(d);
    let mut left = marginal_sums;
    for &r in cards {
        let (m, tail) = std::mem::take(&mut left).split_at_mut(r * k);
        marginals.push(m);
        left = tail;
    }
    let mut tables: Vec<&mut [f64]> = Vec::with_capacity(all.len());
    for &(i, j) in &all {
        let (t, tail) = std::mem::take(&mut rest).split_at_mut(cards[i] * cards[j] * k);
        tables.push(t);
        rest = tail;
    }
    let token = crate::cancel::current();
    // Marginals: one task per column, rows in order.
    marginals
        .par_iter_mut()
        .zip(codes.par_iter())
        .for_each(|(m, col)| {
            for (&x, r) in col.iter().zip(resp.chunks_exact(k)) {
                let at = usize::from(x) * k;
                if let Some(cell) = m.get_mut(at..at + k) {
                    cell.iter_mut().zip(r).for_each(|(m, r)| *m += r);
                }
            }
        });
    // Pair tables, cell-major with the k components inner. Pairs are cut into tasks; a task
    // walks the rows block by block and, inside a block, its pairs, so the block's
    // responsibilities are read from cache.
    let tasks = (rayon::current_num_threads() * 8).max(1);
    let per_task = all.len().div_ceil(tasks).max(1);
    tables
        .par_chunks_mut(per_task)
        .zip(all.par_chunks(per_task))
        .for_each(|(out, chunk)| {
            for start in (0..n).step_by(ROW_BLOCK) {
                if token.cancelled() {
                    break;
                }
                let end = (start + ROW_BLOCK).min(n);
                let block = &resp[start * k..end * k];
                for (&(i, j), table) in chunk.iter().zip(out.iter_mut()) {
                    let (xs, ys) = (&codes[i][start..end], &codes[j][start..end]);
                    // A fixed K lets the compiler unroll the per-cell additions.
                    match k {
                        1 => add_rows::<1>(table, xs, ys, cards[j], block),
                        2 => add_rows::<2>(table, xs, ys, cards[j], block),
                        3 => add_rows::<3>(table, xs, ys, cards[j], block),
                        4 => add_rows::<4>(table, xs, ys, cards[j], block),
                        5 => add_rows::<5>(table, xs, ys, cards[j], block),
                        6 => add_rows::<6>(table, xs, ys, cards[j], block),
                        8 => add_rows::<8>(table, xs, ys, cards[j], block),
                        16 => add_rows::<16>(table, xs, ys, cards[j], block),
                        _ => add_rows_any(table, xs, ys, cards[j], block, k),
                    }
                }
            }
        });
    token.check()
}

/// The running sums of [`add_weighted_sums`] as one [`WeightedStats`] per component (its `n`
/// is the sum of its first column's marginal, in code order).
pub fn split_weighted_sums(sums: &[f64], cards: &[usize], k: usize) -> Result<Vec<WeightedStats>> {
    let len = weighted_sums_len(cards, k)?;
    if sums.len() != len {
        return Err(Error::Invalid(format!(
            "the weighted sums hold {} values, not the {len} of these columns and {k} components",
            sums.len()
        )));
    }
    let all = pairs(cards.len());
    let mut parts: Vec<&[f64]> = Vec::with_capacity(cards.len() + all.len());
    let mut rest = sums;
    let sizes = cards
        .iter()
        .map(|&r| r * k)
        .chain(all.iter().map(|&(i, j)| cards[i] * cards[j] * k));
    for size in sizes {
        let (part, tail) = rest.split_at(size);
        parts.push(part);
        rest = tail;
    }
    let (marginals, tables) = parts.split_at(cards.len());
    // Split the component-inner layout into one WeightedStats per component.
    let split =
        |v: &[f64], t: usize| -> Vec<f64> { v.iter().skip(t).step_by(k).copied().collect() };
    Ok((0..k)
        .map(|t| {
            let marginals: Vec<Vec<f64>> = marginals.iter().map(|m| split(m, t)).collect();
            let n = marginals.first().map_or(0.0, |m| m.iter().sum());
            WeightedStats {
                n,
                marginals,
                tables: tables.iter().map(|tab| split(tab, t)).collect(),
            }
        })
        .collect())
}

/// Adds each row's `K` responsibilities to its cell of a pair table (cell-major, K inner).
#[inline]
fn add_rows<const K: usize>(table: &mut [f64], xs: &[u16], ys: &[u16], rb: usize, block: &[f64]) {
    for ((&a, &b), r) in xs.iter().zip(ys).zip(block.chunks_exact(K)) {
        let at = (usize::from(a) * rb + usize::from(b)) * K;
        let cell = table.get_mut(at..at + K).map(<&mut [f64; K]>::try_from);
        if let (Some(Ok(cell)), Ok(r)) = (cell, <&[f64; K]>::try_from(r)) {
            cell.iter_mut().zip(r).for_each(|(t, r)| *t += r);
        }
    }
}

/// [`add_rows`] for any number of components.
fn add_rows_any(table: &mut [f64], xs: &[u16], ys: &[u16], rb: usize, block: &[f64], k: usize) {
    for ((&a, &b), r) in xs.iter().zip(ys).zip(block.chunks_exact(k)) {
        let at = (usize::from(a) * rb + usize::from(b)) * k;
        let cell = &mut table[at..at + k];
        cell.iter_mut().zip(r).for_each(|(t, r)| *t += r);
    }
}

/// Per component, the exact counts of the rows assigned to it (`assign[row]` < `k`): hard
/// (classification) EM's M-step statistics. Each component's rows are gathered and counted by
/// the integer kernels of `PairStats` (bitsets, popcounts), so a row costs one component's
/// counting, not K; the counts are whole numbers below 2^53, so as f64 they are the same bits
/// [`weighted_stats`] gives with 0/1 responsibilities.
pub fn assigned_stats(
    codes: &[Vec<u16>],
    cards: &[usize],
    assign: &[u32],
    k: usize,
) -> Result<Vec<WeightedStats>> {
    let n = check_codes(codes, cards, false)?;
    if k == 0 || assign.len() != n || assign.iter().any(|&a| a as usize >= k) {
        return Err(Error::Invalid(format!(
            "{} component indices for {n} rows, each below {k}",
            assign.len()
        )));
    }
    let mut rows: Vec<Vec<usize>> = vec![Vec::new(); k];
    for (row, &a) in assign.iter().enumerate() {
        rows[a as usize].push(row);
    }
    let token = crate::cancel::current();
    let out = rows
        .iter()
        .map(|rows| {
            token.check()?;
            let subset: Vec<Vec<u16>> = codes
                .par_iter()
                .map(|col| rows.iter().map(|&r| col[r]).collect())
                .collect();
            let mut stats = PairStats::new(cards.to_vec())?;
            stats.add_codes(&subset)?;
            let as_f64 = |v: &[u64]| v.iter().map(|&x| x as f64).collect::<Vec<f64>>();
            Ok(WeightedStats {
                n: stats.n_rows() as f64,
                marginals: stats.marginals().iter().map(|m| as_f64(m)).collect(),
                tables: pairs(cards.len())
                    .iter()
                    .map(|&(i, j)| as_f64(stats.table(i, j)))
                    .collect(),
            })
        })
        .collect::<Result<Vec<_>>>()?;
    token.check()?;
    Ok(out)
}

/// One column's smoothed log-probabilities within a component: ln P(x | a) row-major by parent
/// code (one row for a root), ln P(x) for a parent without a code, and the mass of a value
/// without a code (as `TreeModel` scores them).
#[derive(Clone, Debug, PartialEq)]
pub struct LogTable {
    pub card: usize,
    pub logp: Vec<f64>,
    /// Cumulative probabilities per row, for sampling (+inf from the last possible code on).
    pub cdf: Vec<f64>,
    pub unseen: Vec<f64>,
    pub marginal: Vec<f64>,
    pub marginal_unseen: f64,
}

impl LogTable {
    fn new(counts: &[f64], card: usize, alpha: f64) -> LogTable {
        let mut logp = Vec::with_capacity(counts.len());
        let mut unseen = Vec::new();
        let mut sums = vec![0.0; card];
        let mut cdf = Vec::with_capacity(counts.len());
        for row in counts.chunks_exact(card) {
            let (lp, un) = smoothed_weighted_row(row, alpha);
            push_cdf(&lp, &mut cdf);
            logp.extend(lp);
            unseen.push(un);
            sums.iter_mut().zip(row).for_each(|(s, n)| *s += n);
        }
        let (marginal, marginal_unseen) = smoothed_weighted_row(&sums, alpha);
        LogTable {
            card,
            logp,
            cdf,
            unseen,
            marginal,
            marginal_unseen,
        }
    }

    /// The code drawn at uniform `u` given parent code `a`.
    #[inline]
    fn draw(&self, a: usize, u: f64) -> u16 {
        let row = self
            .cdf
            .get(a * self.card..(a + 1) * self.card)
            .unwrap_or(&[]);
        let k = row.partition_point(|c| *c <= u);
        u16::try_from(k.min(self.card.saturating_sub(1))).unwrap_or(0)
    }

    #[inline]
    fn log_prob(&self, a: u16, x: u16) -> f64 {
        if a == UNSEEN {
            if x == UNSEEN {
                self.marginal_unseen
            } else {
                self.marginal[usize::from(x)]
            }
        } else if x == UNSEEN {
            self.unseen[usize::from(a)]
        } else {
            self.logp[usize::from(a) * self.card + usize::from(x)]
        }
    }
}

/// One fitted component: its tree and its tables.
#[derive(Clone, Debug, PartialEq)]
pub struct Component {
    pub root: usize,
    pub parent: Vec<Option<usize>>,
    /// Breadth-first order: every parent before its children.
    pub order: Vec<usize>,
    /// Weighted mutual information of every pair (nats), in pair-index order.
    pub pair_mi: Vec<f64>,
    /// Per column, its weighted counts with its parent (rows: the parent's codes).
    pub counts: Vec<Vec<f64>>,
    pub tables: Vec<LogTable>,
}

/// The Chow–Liu tree of weighted statistics under the strict edge order, oriented from the
/// centre (as `fit_model` does), with tables smoothed by `alpha`.
pub fn fit_component(cards: &[usize], stats: &WeightedStats, alpha: f64) -> Result<Component> {
    let d = cards.len();
    if !(alpha.is_finite() && alpha >= 0.0) {
        return Err(Error::Invalid(format!(
            "alpha must be a finite number >= 0, got {alpha}"
        )));
    }
    let all = pairs(d);
    let shaped = stats.marginals.len() == d
        && stats.tables.len() == pair_count(d)
        && cards.iter().all(|&r| r > 0)
        && stats
            .marginals
            .iter()
            .zip(cards)
            .all(|(m, &r)| m.len() == r)
        && all
            .iter()
            .zip(&stats.tables)
            .all(|(&(i, j), t)| t.len() == cards[i] * cards[j]);
    if !shaped {
        return Err(Error::Invalid(
            "weighted statistics of another shape than the cardinalities".into(),
        ));
    }
    let pair_mi: Vec<f64> = all
        .par_iter()
        .zip(stats.tables.par_iter())
        .map(|(&(i, j), table)| {
            if stats.n > 0.0 {
                mutual_info(table, &stats.marginals[i], &stats.marginals[j], stats.n)
            } else {
                0.0
            }
        })
        .collect();
    let edges = tree::kruskal(d, &pair_mi, |_| true);
    let first = tree::orient(d, &edges, 0);
    let edges: Vec<(usize, usize)> = first
        .parent
        .iter()
        .enumerate()
        .filter_map(|(c, p)| p.map(|p| (p, c)))
        .collect();
    let eligible: Vec<bool> = cards.iter().map(|r| *r > 1).collect();
    let root = tree::centre(d, &edges, &eligible);
    let oriented = tree::orient(d, &edges, root);
    let (parent, order) = (oriented.parent, oriented.order);
    let counts: Vec<Vec<f64>> = parent
        .iter()
        .enumerate()
        .map(|(c, p)| edge_counts(cards, stats, c, *p))
        .collect();
    let tables = counts
        .iter()
        .zip(cards)
        .map(|(c, &card)| LogTable::new(c, card, alpha))
        .collect();
    Ok(Component {
        root,
        parent,
        order,
        pair_mi,
        counts,
        tables,
    })
}

/// Column `c`'s weighted counts with `parent` (parent code x code, row-major), or its marginal
/// for a root.
fn edge_counts(
    cards: &[usize],
    stats: &WeightedStats,
    c: usize,
    parent: Option<usize>,
) -> Vec<f64> {
    let d = cards.len();
    match parent {
        None => stats.marginals[c].clone(),
        Some(p) if p < c => stats.tables[crate::stats::pair_index(d, p, c)].clone(),
        Some(p) => {
            let t = &stats.tables[crate::stats::pair_index(d, c, p)];
            let (rc, rp) = (cards[c], cards[p]);
            (0..rp * rc).map(|k| t[(k % rc) * rp + k / rc]).collect()
        }
    }
}

/// Every component of an M-step from its statistics (one per component): its Chow–Liu tree
/// from its own weighted counts, and its tables smoothed by `alpha` and pulled toward the
/// pooled tables by `pooling` pseudo-rows.
///
/// The pooled tables are the components' counts added up (all the rows, whatever their
/// responsibilities), smoothed by `alpha`. Each row of a component's table becomes
/// (n_k(a, x) + pooling * P(x | a) + alpha) / (n_k(a) + pooling + alpha * r): the m-estimate
/// (Cestnik 1990, from memory) with the pooled conditional as its prior. A component that
/// explains few rows then falls back on what all the rows say rather than on a flat row. With
/// one component (nothing to pool) or `pooling = 0` the tables are the plain smoothed ones.
/// `Component::counts` holds the pseudo-counts the tables come from, so a stored component
/// rebuilds the same tables.
pub fn fit_components(
    cards: &[usize],
    stats: &[WeightedStats],
    alpha: f64,
    pooling: f64,
) -> Result<Vec<Component>> {
    if !(pooling.is_finite() && pooling >= 0.0) {
        return Err(Error::Invalid(format!(
            "pooling must be a finite number >= 0, got {pooling}"
        )));
    }
    let mut comps = stats
        .iter()
        .map(|s| fit_component(cards, s, alpha))
        .collect::<Result<Vec<_>>>()?;
    if pooling == 0.0 || stats.len() < 2 {
        return Ok(comps);
    }
    for comp in &mut comps {
        for (c, &card) in cards.iter().enumerate() {
            let mut pooled = vec![0.0; comp.counts[c].len()];
            for s in stats {
                let part = edge_counts(cards, s, c, comp.parent[c]);
                pooled.iter_mut().zip(part).for_each(|(t, x)| *t += x);
            }
            let counts = &mut comp.counts[c];
            for (row, prior) in counts.chunks_exact_mut(card).zip(pooled.chunks_exact(card)) {
                let (logp, _) = smoothed_weighted_row(prior, alpha);
                row.iter_mut()
                    .zip(logp)
                    .for_each(|(n, l)| *n += pooling * l.exp());
            }
            comp.tables[c] = LogTable::new(counts, card, alpha);
        }
    }
    Ok(comps)
}

/// A component from stored parts (a mixture file, which may be hostile): every length, link
/// and count is checked before use. `counts[c]` is column c's weighted counts with its parent
/// (parent code x code, row-major; the marginal for the root).
pub fn component_from_counts(
    cards: &[usize],
    root: usize,
    parent: Vec<Option<usize>>,
    counts: Vec<Vec<f64>>,
    pair_mi: Vec<f64>,
    alpha: f64,
) -> Result<Component> {
    let d = cards.len();
    let bad =
        |what: &str| Error::CorruptModel(format!("a mixture component is inconsistent: {what}"));
    if d == 0 || parent.len() != d || counts.len() != d || cards.contains(&0) {
        return Err(bad("its column count"));
    }
    if pair_mi.len() != pair_count(d) || pair_mi.iter().any(|m| !(m.is_finite() && *m >= 0.0)) {
        return Err(bad("its pairwise mutual information"));
    }
    if !(alpha.is_finite() && alpha >= 0.0) {
        return Err(bad("its smoothing"));
    }
    if root >= d || parent[root].is_some() {
        return Err(bad("its root"));
    }
    if parent
        .iter()
        .enumerate()
        .any(|(c, p)| p.is_some_and(|p| p >= d || p == c))
    {
        return Err(bad("a parent link outside the columns"));
    }
    let order = tree::forest_order(&parent, root).ok_or_else(|| bad("a cycle"))?;
    for (c, table) in counts.iter().enumerate() {
        let rows = parent[c].map_or(1, |p| cards[p]);
        if Some(table.len()) != rows.checked_mul(cards[c]) {
            return Err(bad(&format!(
                "column {c}'s table has {} cells",
                table.len()
            )));
        }
        if table.iter().any(|n| !(n.is_finite() && *n >= 0.0)) {
            return Err(bad(&format!("column {c}'s counts")));
        }
    }
    let tables = counts
        .iter()
        .zip(cards)
        .map(|(c, &card)| LogTable::new(c, card, alpha))
        .collect();
    Ok(Component {
        root,
        parent,
        order,
        pair_mi,
        counts,
        tables,
    })
}

/// ln P(row | component) for every row and component, row-major `n x k`. Codes may be UNSEEN
/// (scored as `TreeModel` scores them); each row sums its columns in column order.
pub fn log_likelihoods(
    codes: &[Vec<u16>],
    cards: &[usize],
    components: &[Component],
) -> Result<Vec<f64>> {
    let n = check_codes(codes, cards, true)?;
    let k = components.len();
    check_components(cards, components)?;
    let mut out = vec![0.0; n * k];
    let token = crate::cancel::current();
    out.par_chunks_mut(SCORE_CHUNK * k.max(1))
        .enumerate()
        .for_each(|(chunk, out)| {
            if token.cancelled() || k == 0 {
                return;
            }
            let start = chunk * SCORE_CHUNK;
            let rows = out.len() / k;
            let mut acc = vec![0.0; rows];
            for (t, comp) in components.iter().enumerate() {
                acc.iter_mut().for_each(|a| *a = 0.0);
                for (c, table) in comp.tables.iter().enumerate() {
                    let xs = &codes[c][start..start + rows];
                    match comp.parent[c] {
                        Some(p) => {
                            let ps = &codes[p][start..start + rows];
                            for ((a, &x), &pa) in acc.iter_mut().zip(xs).zip(ps) {
                                *a += table.log_prob(pa, x);
                            }
                        }
                        None => {
                            for (a, &x) in acc.iter_mut().zip(xs) {
                                *a += table.log_prob(0, x);
                            }
                        }
                    }
                }
                for (row, a) in acc.iter().enumerate() {
                    out[row * k + t] = *a;
                }
            }
        });
    token.check()?;
    Ok(out)
}

/// Every component must have a table of the right shape for every column.
fn check_components(cards: &[usize], components: &[Component]) -> Result<()> {
    let d = cards.len();
    let fits = |comp: &Component| {
        comp.parent.len() == d
            && comp.tables.len() == d
            && comp.tables.iter().enumerate().all(|(c, t)| {
                let rows = match comp.parent[c] {
                    None => Some(1),
                    Some(p) => cards.get(p).copied().filter(|_| p != c),
                };
                rows.is_some_and(|rows| {
                    t.card == cards[c]
                        && t.logp.len() == rows * cards[c]
                        && t.unseen.len() == rows
                        && t.marginal.len() == cards[c]
                })
            })
    };
    if !components.iter().all(fits) {
        return Err(Error::Invalid(
            "a component fitted to columns of other cardinalities".into(),
        ));
    }
    Ok(())
}

/// ln P_k(x_c | x_parent) for every column c and row, under component `which[row]` of each
/// row (codes may be UNSEEN, scored as [`log_likelihoods`] scores them): one column per model
/// column. Their sum over the columns is that component's entry of [`log_likelihoods`].
pub fn column_terms(
    codes: &[Vec<u16>],
    cards: &[usize],
    components: &[Component],
    which: &[u32],
) -> Result<Vec<Vec<f64>>> {
    let n = check_codes(codes, cards, true)?;
    check_components(cards, components)?;
    if which.len() != n || which.iter().any(|&w| w as usize >= components.len()) {
        return Err(Error::Invalid(format!(
            "{} component indices for {n} rows of a mixture of {}",
            which.len(),
            components.len()
        )));
    }
    let token = crate::cancel::current();
    let out = (0..cards.len())
        .into_par_iter()
        .map(|c| {
            if token.cancelled() {
                return Vec::new();
            }
            (0..n)
                .map(|row| {
                    let comp = &components[which[row] as usize];
                    let a = comp.parent[c].map_or(0, |p| codes[p][row]);
                    comp.tables[c].log_prob(a, codes[c][row])
                })
                .collect()
        })
        .collect();
    token.check()?;
    Ok(out)
}

/// One block of sampled rows: codes, numbers in bins and tail entries per column, components.
type SampledBlock = (Vec<Vec<u16>>, Vec<Vec<f64>>, Vec<Vec<u32>>, Vec<u32>);

/// Draws `count` rows from the mixture, starting at row `start` of the stream of `seed`
/// (a multiple of [`SAMPLE_BLOCK`]): per row one draw picks the component by `weights`, then
/// its tree is sampled from the root down, then each column's value behind its code is drawn
/// as `model` (the mixture's codebook and tail tables) does. Every row takes a fixed number of
/// draws from its block's stream, so rows do not depend on threads or chunking. Returns the
/// rows and each row's component.
pub fn sample(
    components: &[Component],
    weights: &[f64],
    model: &TreeModel,
    start: u64,
    count: usize,
    seed: u64,
) -> Result<(Sampled, Vec<u32>)> {
    let cards = model.codebook().cardinalities();
    let d = cards.len();
    if !start.is_multiple_of(SAMPLE_BLOCK as u64) {
        return Err(Error::Invalid(format!(
            "sampling must start at a multiple of {SAMPLE_BLOCK} rows"
        )));
    }
    if components.is_empty()
        || weights.len() != components.len()
        || weights.iter().any(|w| !(w.is_finite() && *w >= 0.0))
        || components
            .iter()
            .any(|c| c.tables.len() != d || c.order.len() != d || c.parent.len() != d)
        || components
            .iter()
            .any(|c| c.tables.iter().zip(&cards).any(|(t, &r)| t.card != r))
    {
        return Err(Error::Invalid(
            "components and weights do not match the model's columns".into(),
        ));
    }
    let mut cumulative: Vec<f64> = weights
        .iter()
        .scan(0.0, |acc, w| {
            *acc += w;
            Some(*acc)
        })
        .collect();
    // Rounding must never pick a component of weight zero, nor run off the end.
    if let Some(last) = weights.iter().rposition(|w| *w > 0.0) {
        cumulative[last..]
            .iter_mut()
            .for_each(|c| *c = f64::INFINITY);
    }
    let numeric: Vec<bool> = (0..d).map(|c| model.is_numeric(c)).collect();
    let tailed: Vec<bool> = (0..d).map(|c| model.has_tail(c)).collect();
    let first_block = start / SAMPLE_BLOCK as u64;
    let token = crate::cancel::current();
    let blocks: Vec<SampledBlock> = (0..count.div_ceil(SAMPLE_BLOCK))
        .into_par_iter()
        .map(|b| {
            let rows = SAMPLE_BLOCK.min(count - b * SAMPLE_BLOCK);
            let mut codes = vec![vec![0u16; rows]; d];
            let mut floats = vec![vec![f64::NAN; rows]; d];
            let mut tails = vec![vec![u32::MAX; rows]; d];
            let mut which = vec![0u32; rows];
            if token.cancelled() {
                return (codes, floats, tails, which);
            }
            let mut rng = Rng::new(seed, first_block + b as u64);
            let mut row_codes = vec![0u16; d];
            for (r, w) in which.iter_mut().enumerate() {
                let u = rng.next_f64();
                let t = cumulative
                    .partition_point(|c| *c <= u)
                    .min(components.len() - 1);
                *w = u32::try_from(t).unwrap_or(u32::MAX);
                let comp = &components[t];
                for &c in &comp.order {
                    let a = comp.parent[c].map_or(0, |p| usize::from(row_codes[p]));
                    row_codes[c] = comp.tables[c].draw(a, rng.next_f64());
                }
                for (c, &x) in row_codes.iter().enumerate() {
                    codes[c][r] = x;
                    let float = numeric[c].then_some(&mut floats[c][r]);
                    let tail = tailed[c].then_some(&mut tails[c][r]);
                    model.fill_drawn(c, x, &mut rng, float, tail);
                }
            }
            (codes, floats, tails, which)
        })
        .collect();
    token.check()?;
    let mut out = Sampled {
        codes: vec![Vec::with_capacity(count); d],
        floats: numeric
            .iter()
            .map(|&n| n.then(|| Vec::with_capacity(count)))
            .collect(),
        tails: tailed
            .iter()
            .map(|&t| t.then(|| Vec::with_capacity(count)))
            .collect(),
    };
    let mut which = Vec::with_capacity(count);
    for (codes, floats, tails, w) in blocks {
        for c in 0..d {
            out.codes[c].extend(&codes[c]);
            if let Some(f) = &mut out.floats[c] {
                f.extend(&floats[c]);
            }
            if let Some(t) = &mut out.tails[c] {
                t.extend(&tails[c]);
            }
        }
        which.extend(w);
    }
    Ok((out, which))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn weighted_counts_with_unit_weights_are_the_counts() -> Result<()> {
        let codes = vec![vec![0u16, 1, 1, 0, 1], vec![2u16, 0, 2, 2, 1]];
        let cards = [2, 3];
        let s = weighted_stats(&codes, &cards, &[1.0; 5], 1)?;
        assert_eq!(s[0].n, 5.0);
        assert_eq!(s[0].marginals, vec![vec![2.0, 3.0], vec![1.0, 1.0, 3.0]]);
        // Row-major 2 x 3 table of (col0, col1).
        assert_eq!(s[0].tables, vec![vec![0.0, 0.0, 2.0, 1.0, 1.0, 1.0]]);
        Ok(())
    }

    #[test]
    fn responsibilities_split_the_counts() -> Result<()> {
        let codes = vec![vec![0u16, 1, 1], vec![1u16, 0, 1]];
        let resp = [0.25, 0.75, 1.0, 0.0, 0.5, 0.5];
        let s = weighted_stats(&codes, &[2, 2], &resp, 2)?;
        assert_eq!(s[0].n, 1.75);
        assert_eq!(s[1].n, 1.25);
        assert_eq!(s[0].tables[0], vec![0.0, 0.25, 1.0, 0.5]);
        assert_eq!(s[1].tables[0], vec![0.0, 0.75, 0.0, 0.5]);
        Ok(())
    }

    #[test]
    fn sums_added_batch_by_batch_are_the_same_bits() -> Result<()> {
        // Uneven weights whose f64 sums depend on the order of the additions.
        let n = 10_007;
        let cards = [3, 5, 2, 7];
        let codes: Vec<Vec<u16>> = cards
            .iter()
            .enumerate()
            .map(|(c, &r)| (0..n).map(|i| ((i * (c + 3) + i / 7) % r) as u16).collect())
            .collect();
        let k = 3;
        let resp: Vec<f64> = (0..n * k)
            .map(|i| 1.0 / (1.0 + (i % 97) as f64 * 0.37))
            .collect();
        let whole = weighted_stats(&codes, &cards, &resp, k)?;
        let mut sums = vec![0.0; weighted_sums_len(&cards, k)?];
        for (start, end) in [(0, 1), (1, 4096), (4096, 4100), (4100, n)] {
            let part: Vec<Vec<u16>> = codes.iter().map(|c| c[start..end].to_vec()).collect();
            add_weighted_sums(&mut sums, &part, &cards, &resp[start * k..end * k], k)?;
        }
        assert_eq!(split_weighted_sums(&sums, &cards, k)?, whole);
        // The wrong length of sums is an error, not a panic.
        assert!(add_weighted_sums(&mut sums[1..], &codes, &cards, &resp, k).is_err());
        assert!(split_weighted_sums(&sums[1..], &cards, k).is_err());
        Ok(())
    }

    #[test]
    fn stored_components_are_checked() {
        let cards = [2, 2, 2];
        let counts = || vec![vec![1.0; 2], vec![1.0; 4], vec![1.0; 4]];
        let ok = component_from_counts(
            &cards,
            0,
            vec![None, Some(0), Some(1)],
            counts(),
            vec![0.0; 3],
            0.5,
        );
        assert!(ok.is_ok());
        // Columns 1 and 2 point at each other: a cycle the root does not reach.
        let cycle = component_from_counts(
            &cards,
            0,
            vec![None, Some(2), Some(1)],
            counts(),
            vec![0.0; 3],
            0.5,
        );
        assert!(matches!(cycle, Err(Error::CorruptModel(_))));
        let mut negative = counts();
        negative[1][0] = -1.0;
        let bad = component_from_counts(
            &cards,
            0,
            vec![None, Some(0), Some(1)],
            negative,
            vec![0.0; 3],
            0.5,
        );
        assert!(matches!(bad, Err(Error::CorruptModel(_))));
    }

    #[test]
    fn assigned_counts_are_the_weighted_counts_of_one_hot_responsibilities() -> Result<()> {
        let codes = vec![
            vec![0u16, 1, 1, 0, 1, 0, 2],
            vec![2u16, 0, 2, 2, 1, 1, 0],
            vec![1u16, 1, 0, 0, 1, 1, 0],
        ];
        let cards = [3, 3, 2];
        let assign = [1u32, 0, 2, 1, 1, 0, 2];
        let mut resp = vec![0.0; assign.len() * 3];
        for (row, &a) in assign.iter().enumerate() {
            resp[row * 3 + a as usize] = 1.0;
        }
        assert_eq!(
            assigned_stats(&codes, &cards, &assign, 3)?,
            weighted_stats(&codes, &cards, &resp, 3)?
        );
        // A component no row is assigned to has zero counts, not an error.
        let empty = assigned_stats(&codes, &cards, &assign, 4)?;
        assert_eq!(empty[3].n, 0.0);
        assert!(assigned_stats(&codes, &cards, &assign, 2).is_err());
        assert!(assigned_stats(&codes, &cards, &assign[..3], 3).is_err());
        Ok(())
    }

    #[test]
    fn pooling_pulls_each_table_toward_the_pooled_one() -> Result<()> {
        let codes = vec![
            vec![0u16, 1, 1, 0, 1, 0, 1, 1],
            vec![1u16, 0, 1, 1, 0, 0, 1, 0],
        ];
        let cards = [2, 2];
        let resp = [
            0.9, 0.1, 0.8, 0.2, 0.1, 0.9, 0.7, 0.3, 0.2, 0.8, 1.0, 0.0, 0.5, 0.5, 0.0, 1.0,
        ];
        let stats = weighted_stats(&codes, &cards, &resp, 2)?;
        let plain = fit_components(&cards, &stats, 0.5, 0.0)?;
        let pooled = fit_components(&cards, &stats, 0.5, 4.0)?;
        let all = weighted_stats(&codes, &cards, &[1.0; 8], 1)?;
        for (k, (p, q)) in plain.iter().zip(&pooled).enumerate() {
            assert_eq!(p.parent, q.parent);
            assert_eq!(p, &fit_component(&cards, &stats[k], 0.5)?);
            for c in 0..2 {
                // The m-estimate by hand: (n + 4 * P_pooled + 0.5) / (n_row + 4 + 0.5 * 2).
                let prior = edge_counts(&cards, &all[0], c, p.parent[c]);
                let n = &p.counts[c];
                for (a, (row, prow)) in n.chunks(2).zip(prior.chunks(2)).enumerate() {
                    let total: f64 = prow.iter().sum::<f64>() + 1.0;
                    for x in 0..2 {
                        let want = (row[x] + 4.0 * (prow[x] + 0.5) / total + 0.5)
                            / (row.iter().sum::<f64>() + 4.0 + 1.0);
                        let got = q.tables[c].logp[a * 2 + x].exp();
                        assert!((got - want).abs() < 1e-12, "{k} {c} {a} {x}: {got} {want}");
                    }
                }
            }
        }
        // One component has nothing to pool: the plain tables.
        let one = weighted_stats(&codes, &cards, &[1.0; 8], 1)?;
        assert_eq!(
            fit_components(&cards, &one, 0.5, 4.0)?,
            fit_components(&cards, &one, 0.5, 0.0)?
        );
        assert!(fit_components(&cards, &stats, 0.5, f64::NAN).is_err());
        assert!(fit_components(&cards, &stats, 0.5, -1.0).is_err());
        Ok(())
    }

    #[test]
    fn column_terms_add_up_to_the_component_likelihood() -> Result<()> {
        let codes = vec![
            vec![0u16, 1, 1, 0, 1, 0],
            vec![2u16, 0, 2, 2, 1, UNSEEN],
            vec![1u16, 1, 0, 0, 1, 1],
        ];
        let cards = [2, 3, 2];
        let resp = [0.9, 0.1, 0.2, 0.8, 0.5, 0.5, 1.0, 0.0, 0.3, 0.7, 0.6, 0.4];
        let mut clean = codes.clone();
        clean[1][5] = 1;
        let stats = weighted_stats(&clean, &cards, &resp, 2)?;
        let comps = stats
            .iter()
            .map(|s| fit_component(&cards, s, 0.5))
            .collect::<Result<Vec<_>>>()?;
        let ll = log_likelihoods(&codes, &cards, &comps)?;
        let which = [0u32, 1, 1, 0, 1, 0];
        let terms = column_terms(&codes, &cards, &comps, &which)?;
        for (row, &k) in which.iter().enumerate() {
            let sum: f64 = terms.iter().map(|t| t[row]).sum();
            assert!((sum - ll[row * 2 + k as usize]).abs() < 1e-12);
        }
        assert!(column_terms(&codes, &cards, &comps, &[0, 1]).is_err());
        assert!(column_terms(&codes, &cards, &comps, &[0, 1, 2, 0, 0, 0]).is_err());
        Ok(())
    }

    #[test]
    fn bad_input_is_an_error_not_a_panic() {
        let codes = vec![vec![0u16, 5]];
        assert!(weighted_stats(&codes, &[2], &[1.0, 1.0], 1).is_err());
        let codes = vec![vec![0u16, 1]];
        assert!(weighted_stats(&codes, &[2], &[1.0], 1).is_err());
        assert!(weighted_stats(&codes, &[2], &[1.0, f64::NAN], 1).is_err());
        assert!(weighted_stats(&codes, &[2], &[], 0).is_err());
        assert!(weighted_stats(&[vec![]], &[0], &[], 1).is_err());
    }
}
