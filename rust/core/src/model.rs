//! The fitted tree as a distribution: smoothed conditional tables kept as exact counts, row
//! scores, per-column surprisal and ancestral sampling.

use arrow_array::RecordBatch;
use rayon::prelude::*;

use crate::codebook::{Codebook, ColumnCode, Values, UNSEEN};
use crate::dtype;
use crate::error::{Error, Result};
use crate::rng::Rng;
use crate::shape::pick;
use crate::stats::{pair_count, pair_index, PairStats};
use crate::tree::forest_order;
use crate::weights::PairWeight;

/// Rows per sampling block: each block draws from its own random stream, so the rows do not
/// depend on how many threads run or how the caller chunks the request.
pub const SAMPLE_BLOCK: usize = 4096;
/// Rows per scoring chunk handed to one thread.
const SCORE_CHUNK: usize = 8192;

/// One column's conditional table P(x | parent code), or its marginal when it is a root.
#[derive(Clone, Debug)]
struct Cpt {
    card: usize,
    /// ln P(x | a), row-major by parent code a (one row for a root).
    logp: Vec<f64>,
    /// ln of the probability given to a value without a code, per parent code.
    unseen: Vec<f64>,
    /// Cumulative probabilities per row, for sampling (+inf from the last possible code on).
    cdf: Vec<f64>,
    /// ln P(x), used when the parent's value has no code.
    marginal: Vec<f64>,
    marginal_unseen: f64,
}

/// ln((n + alpha) / denom) for each count of one row, and ln(alpha / denom) for a value without
/// a code. A row with no counts and no smoothing is uniform (the alpha -> 0 limit).
fn smoothed_row(counts: &[u64], alpha: f64) -> (Vec<f64>, f64) {
    let counts: Vec<f64> = counts.iter().map(|&n| n as f64).collect();
    smoothed_weighted_row(&counts, alpha)
}

/// [`smoothed_row`] of weighted counts (a mixture component's); integer counts give the same
/// bits either way.
pub fn smoothed_weighted_row(counts: &[f64], alpha: f64) -> (Vec<f64>, f64) {
    let card = counts.len();
    let total: f64 = counts.iter().sum();
    let denom = total + alpha * card as f64;
    if denom <= 0.0 {
        let uniform = (1.0 / card as f64).ln();
        return (vec![uniform; card], uniform);
    }
    let logp = counts.iter().map(|&n| ((n + alpha) / denom).ln()).collect();
    (logp, (alpha / denom).ln())
}

/// Appends the cumulative distribution of one row of log-probabilities to `cdf`, for sampling
/// by a uniform draw. Rounding must never pick a code of probability zero, nor run off the end:
/// from the last code of non-zero probability on, the sums are infinite.
pub(crate) fn push_cdf(logp: &[f64], cdf: &mut Vec<f64>) {
    let start = cdf.len();
    let mut acc = 0.0;
    for l in logp {
        acc += l.exp();
        cdf.push(acc);
    }
    if let Some(last) = logp.iter().rposition(|l| *l > f64::NEG_INFINITY) {
        cdf[start + last..]
            .iter_mut()
            .for_each(|c| *c = f64::INFINITY);
    }
}

impl Cpt {
    fn new(counts: &[u64], rows: usize, card: usize, alpha: f64) -> Cpt {
        let mut logp = Vec::with_capacity(rows * card);
        let mut unseen = Vec::with_capacity(rows);
        let mut cdf = Vec::with_capacity(rows * card);
        let mut column_sums = vec![0u64; card];
        for row in counts.chunks_exact(card) {
            let (lp, un) = smoothed_row(row, alpha);
            push_cdf(&lp, &mut cdf);
            logp.extend(lp);
            unseen.push(un);
            column_sums.iter_mut().zip(row).for_each(|(s, n)| *s += n);
        }
        let (marginal, marginal_unseen) = smoothed_row(&column_sums, alpha);
        Cpt {
            card,
            logp,
            unseen,
            cdf,
            marginal,
            marginal_unseen,
        }
    }

    /// ln P(x | a), where either code may be UNSEEN.
    #[inline]
    fn log_prob(&self, a: Option<u16>, x: u16) -> f64 {
        match a {
            Some(a) if a != UNSEEN => {
                let a = usize::from(a);
                if x == UNSEEN {
                    self.unseen[a]
                } else {
                    self.logp[a * self.card + usize::from(x)]
                }
            }
            _ => {
                if x == UNSEEN {
                    self.marginal_unseen
                } else {
                    self.marginal[usize::from(x)]
                }
            }
        }
    }

    #[inline]
    fn draw(&self, a: usize, u: f64) -> u16 {
        let row = &self.cdf[a * self.card..(a + 1) * self.card];
        // The code is the number of cumulative probabilities <= u. For short rows a branch-free
        // count beats a binary search, whose branches the CPU cannot predict.
        let k = if self.card <= 32 {
            row.iter().map(|c| usize::from(*c <= u)).sum::<usize>()
        } else {
            row.partition_point(|c| *c <= u)
        };
        u16::try_from(k.min(self.card - 1)).unwrap_or(0)
    }
}

/// The number that code `k` of numeric column `col` stands for at uniform draw `u`: inside a bin,
/// a value from the bin's observed distribution (uniform in [lo, hi) when the codebook has no
/// summary of it); a non-finite value's own code gives that value; NaN for "other" and null.
/// With `narrow`, the value is rounded to the nearest 32-bit float that is still in the bin.
fn number_at(col: &ColumnCode, k: usize, u: f64, narrow: bool) -> f64 {
    let Values::Bins {
        edges,
        low,
        high,
        specials,
    } = col.values()
    else {
        return f64::NAN;
    };
    if k > edges.len() {
        return specials
            .get(k - edges.len() - 1)
            .copied()
            .unwrap_or(f64::NAN);
    }
    let lo = if k == 0 { *low } else { edges[k - 1] };
    let last = k == edges.len();
    let hi = if last { *high } else { edges[k] };
    let shape = col.shape();
    let v = match shape.within.get(k) {
        Some(within) => within.value(u, shape.integral),
        None => lo + u * (hi - lo),
    };
    let mut v = v.max(lo).min(hi);
    if narrow {
        // The bounds are data values of a float32 column, so they are exact in f32.
        let mut f = v as f32;
        if !last && f64::from(f) >= hi {
            f = (hi as f32).next_down();
        }
        v = f64::from(f).max(lo);
    }
    // Rounding must not carry a draw out of its bin.
    if v < hi || last {
        v
    } else {
        lo
    }
}

/// Scores of one batch.
#[derive(Clone, Debug, Default)]
pub struct Scored {
    /// ln p(row) per row.
    pub total: Vec<f64>,
    /// −ln P(x_c | x_parent) per column, then per row (only when asked for).
    pub surprisal: Option<Vec<Vec<f64>>>,
    /// Per column: how many values (or nulls) had no code of their own.
    pub unseen: Vec<u64>,
}

impl Scored {
    /// Appends the scores of the next rows.
    pub fn append(&mut self, next: Scored) {
        self.total.extend(next.total);
        match (&mut self.surprisal, next.surprisal) {
            (Some(mine), Some(theirs)) => {
                mine.iter_mut().zip(theirs).for_each(|(a, b)| a.extend(b))
            }
            (mine @ None, theirs) if self.unseen.is_empty() => *mine = theirs,
            _ => {}
        }
        if self.unseen.is_empty() {
            self.unseen = next.unseen;
        } else {
            self.unseen
                .iter_mut()
                .zip(next.unseen)
                .for_each(|(a, b)| *a += b);
        }
    }
}

/// Sampled rows, as codes, plus the values drawn inside the codes: numbers inside the bins of
/// numeric columns, and rare values behind the "other" code of categorical ones.
#[derive(Clone, Debug, Default)]
pub struct Sampled {
    /// Codes per column.
    pub codes: Vec<Vec<u16>>,
    /// Per column: for a numeric column, the number each code stands for (NaN for a null code).
    pub floats: Vec<Option<Vec<f64>>>,
    /// Per column with a tail table: the tail entry drawn where the code is "other", else
    /// `u32::MAX`.
    pub tails: Vec<Option<Vec<u32>>>,
}

impl Sampled {
    /// Appends the next rows.
    pub fn append(&mut self, next: Sampled) {
        if self.codes.is_empty() {
            *self = next;
            return;
        }
        self.codes
            .iter_mut()
            .zip(next.codes)
            .for_each(|(a, b)| a.extend(b));
        for (a, b) in self.floats.iter_mut().zip(next.floats) {
            if let (Some(a), Some(b)) = (a, b) {
                a.extend(b);
            }
        }
        for (a, b) in self.tails.iter_mut().zip(next.tails) {
            if let (Some(a), Some(b)) = (a, b) {
                a.extend(b);
            }
        }
    }
}

/// A fitted dependency tree (or forest) over one codebook.
#[derive(Clone, Debug)]
pub struct TreeModel {
    codebook: Codebook,
    dtypes: Vec<String>,
    n_rows: u64,
    root: usize,
    parent: Vec<Option<usize>>,
    order: Vec<usize>,
    counts: Vec<Vec<u64>>,
    pair_mi: Vec<f64>,
    alpha: f64,
    cpts: Vec<Cpt>,
    tails: Vec<Option<TailTables>>,
}

/// A column's tail behind "other", ready for scoring and sampling at the model's smoothing.
#[derive(Clone, Debug)]
struct TailTables {
    /// ln P(value | other) per tail entry.
    logp: Vec<f64>,
    /// ln P(value | other) for a value outside the table.
    outside: f64,
    cdf: Vec<f64>,
}

fn corrupt(what: String) -> Error {
    Error::CorruptModel(format!("the model is inconsistent: {what}"))
}

impl TreeModel {
    /// Builds a model from its parts, checking every length, link and count, so that a model
    /// read from an untrusted file can never index out of bounds.
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        codebook: Codebook,
        dtypes: Vec<String>,
        n_rows: u64,
        root: usize,
        parent: Vec<Option<usize>>,
        counts: Vec<Vec<u64>>,
        pair_mi: Vec<f64>,
        alpha: f64,
    ) -> Result<Self> {
        let d = codebook.columns().len();
        let cards = codebook.cardinalities();
        if d == 0 || n_rows == 0 {
            return Err(corrupt(format!("{d} columns and {n_rows} rows")));
        }
        if dtypes.len() != d || parent.len() != d || counts.len() != d {
            return Err(corrupt(format!(
                "{d} columns but {} types, {} parents and {} count tables",
                dtypes.len(),
                parent.len(),
                counts.len()
            )));
        }
        if pair_mi.len() != pair_count(d) || pair_mi.iter().any(|m| !m.is_finite() || *m < 0.0) {
            return Err(corrupt(
                "the pairwise mutual information is malformed".into(),
            ));
        }
        if root >= d || parent[root].is_some() {
            return Err(corrupt(format!("column {root} cannot be the root")));
        }
        if parent
            .iter()
            .enumerate()
            .any(|(c, p)| p.is_some_and(|p| p >= d || p == c))
        {
            return Err(corrupt("a parent link points outside the columns".into()));
        }
        let order = forest_order(&parent, root)
            .ok_or_else(|| corrupt("the parent links form a cycle".into()))?;
        let mut column_sums: Vec<Vec<u64>> = Vec::with_capacity(d);
        for c in 0..d {
            let rows = parent[c].map_or(1, |p| cards[p]);
            if Some(counts[c].len()) != rows.checked_mul(cards[c]) {
                return Err(corrupt(format!(
                    "column {c}'s table has {} cells",
                    counts[c].len()
                )));
            }
            let total = counts[c]
                .iter()
                .try_fold(0u64, |acc, n| acc.checked_add(*n));
            if total != Some(n_rows) {
                return Err(corrupt(format!(
                    "column {c}'s counts do not add up to {n_rows} rows"
                )));
            }
            let mut sums = vec![0u64; cards[c]];
            for row in counts[c].chunks_exact(cards[c]) {
                sums.iter_mut().zip(row).for_each(|(s, n)| *s += n);
            }
            column_sums.push(sums);
        }
        for c in 0..d {
            if let Some(p) = parent[c] {
                let row_sums: Vec<u64> = counts[c]
                    .chunks_exact(cards[c])
                    .map(|r| r.iter().sum())
                    .collect();
                if row_sums != column_sums[p] {
                    return Err(corrupt(format!(
                        "column {c}'s table disagrees with its parent's counts"
                    )));
                }
            }
        }
        for (col, t) in codebook.columns().iter().zip(&dtypes) {
            if !dtype::fits(t, col) {
                return Err(corrupt(format!(
                    "column '{}' is stored as type {t:?}, which cannot hold its values",
                    col.name()
                )));
            }
        }
        let mut model = TreeModel {
            codebook,
            dtypes,
            n_rows,
            root,
            parent,
            order,
            counts,
            pair_mi,
            alpha: 0.0,
            cpts: Vec::new(),
            tails: Vec::new(),
        };
        model.set_alpha(alpha)?;
        Ok(model)
    }

    /// The model of a fitted structure: each column's counts with its parent, taken from `stats`.
    pub fn from_stats(
        codebook: Codebook,
        dtypes: Vec<String>,
        stats: &PairStats,
        root: usize,
        parent: Vec<Option<usize>>,
        pair_mi: Vec<f64>,
        alpha: f64,
    ) -> Result<Self> {
        if stats.cardinalities() != codebook.cardinalities().as_slice() {
            return Err(Error::Schema(
                "the pair statistics were not counted with this codebook".into(),
            ));
        }
        let cards = stats.cardinalities();
        let counts = parent
            .iter()
            .enumerate()
            .map(|(c, p)| match *p {
                None => stats.marginal(c).to_vec(),
                Some(p) if p < c => stats.table(p, c).to_vec(),
                Some(p) => {
                    // Stored as (c, p); transpose so that rows are the parent's codes.
                    let t = stats.table(c, p);
                    let (rc, rp) = (cards[c], cards[p]);
                    (0..rp * rc).map(|k| t[(k % rc) * rp + k / rc]).collect()
                }
            })
            .collect();
        TreeModel::new(
            codebook,
            dtypes,
            stats.n_rows(),
            root,
            parent,
            counts,
            pair_mi,
            alpha,
        )
    }

    /// Changes the Dirichlet smoothing; the counts stay, so no refit is needed.
    pub fn set_alpha(&mut self, alpha: f64) -> Result<()> {
        if !(alpha.is_finite() && alpha >= 0.0) {
            return Err(Error::Invalid(format!(
                "alpha must be a finite number >= 0, got {alpha}"
            )));
        }
        let cards = self.codebook.cardinalities();
        self.cpts = (0..cards.len())
            .map(|c| {
                let rows = self.parent[c].map_or(1, |p| cards[p]);
                Cpt::new(&self.counts[c], rows, cards[c], alpha)
            })
            .collect();
        self.tails = self
            .codebook
            .columns()
            .iter()
            .map(|col| {
                col.shape().tail.as_ref().map(|tail| {
                    let (logp, outside) = tail.log_probs(alpha);
                    TailTables {
                        logp,
                        outside,
                        cdf: tail.cdf(),
                    }
                })
            })
            .collect();
        self.alpha = alpha;
        Ok(())
    }

    /// The codebook.
    pub fn codebook(&self) -> &Codebook {
        &self.codebook
    }
    /// Each column's output type name (opaque to the core).
    pub fn dtypes(&self) -> &[String] {
        &self.dtypes
    }
    /// Rows the counts come from.
    pub fn n_rows(&self) -> u64 {
        self.n_rows
    }
    /// The column the structure is oriented from.
    pub fn root(&self) -> usize {
        self.root
    }
    /// Each column's parent.
    pub fn parent(&self) -> &[Option<usize>] {
        &self.parent
    }
    /// Breadth-first order: parents before children.
    pub fn order(&self) -> &[usize] {
        &self.order
    }
    /// Per column: its counts (a root's marginal, or the parent x child table).
    pub fn counts(&self) -> &[Vec<u64>] {
        &self.counts
    }
    /// Mutual information of every pair, in pair-index order.
    pub fn pair_mi(&self) -> &[f64] {
        &self.pair_mi
    }
    /// The smoothing pseudo-count.
    pub fn alpha(&self) -> f64 {
        self.alpha
    }

    /// Free parameters: Σ_i (r_i − 1) + Σ_edges (r_parent − 1)(r_child − 1).
    pub fn n_parameters(&self) -> u64 {
        let cards = self.codebook.cardinalities();
        let singles: u64 = cards.iter().map(|&r| r as u64 - 1).sum();
        let edges: u64 = self
            .parent
            .iter()
            .enumerate()
            .filter_map(|(c, p)| p.map(|p| (cards[p] as u64 - 1) * (cards[c] as u64 - 1)))
            .sum();
        singles + edges
    }

    /// The weight of the edge into `child` (None for a root), recomputed from the kept counts;
    /// equal to the fit's pair weight because the counts are the same.
    pub fn edge_weight(&self, child: usize) -> Option<PairWeight> {
        let p = self.parent.get(child).copied().flatten()?;
        let d = self.parent.len();
        let mi = self.pair_mi[pair_index(d, p.min(child), p.max(child))];
        let card = self.codebook.cardinalities()[child];
        let table = &self.counts[child];
        let occurring_child = (0..card)
            .filter(|&x| table.iter().skip(x).step_by(card).any(|n| *n > 0))
            .count() as u64;
        let occurring_parent = table
            .chunks_exact(card)
            .filter(|row| row.iter().any(|n| *n > 0))
            .count() as u64;
        Some(PairWeight::new(
            mi,
            self.n_rows,
            occurring_parent,
            occurring_child,
        ))
    }

    /// ln P of column c's code at each row given its parent's code (UNSEEN allowed in both).
    /// `tail` holds ln P(value | other) per row for a column with a tail table (0 elsewhere).
    fn column_log_prob(
        &self,
        codes: &[Vec<u16>],
        tail: Option<&[f64]>,
        c: usize,
        rows: std::ops::Range<usize>,
        out: &mut [f64],
        add: bool,
    ) {
        let cpt = &self.cpts[c];
        let xs = &codes[c][rows.clone()];
        match self.parent[c] {
            Some(p) => {
                let ps = &codes[p][rows.clone()];
                for ((o, &x), &a) in out.iter_mut().zip(xs).zip(ps) {
                    let l = cpt.log_prob(Some(a), x);
                    *o = if add { *o + l } else { l };
                }
            }
            None => {
                for (o, &x) in out.iter_mut().zip(xs) {
                    let l = cpt.log_prob(Some(0), x);
                    *o = if add { *o + l } else { l };
                }
            }
        }
        if let Some(tail) = tail {
            out.iter_mut().zip(&tail[rows]).for_each(|(o, t)| *o += t);
        }
    }

    /// ln P(value | other) per row of each column with a tail table, 0 where the code is not
    /// "other" (a value outside the table gets the table's share for such values).
    pub fn tail_terms(
        &self,
        batch: &RecordBatch,
        codes: &[Vec<u16>],
    ) -> Result<Vec<Option<Vec<f64>>>> {
        self.codebook
            .columns()
            .par_iter()
            .zip(batch.columns().par_iter())
            .zip(codes.par_iter())
            .zip(self.tails.par_iter())
            .map(|(((col, array), codes), tables)| {
                let (Some(tables), Some(other)) = (tables, col.other_code()) else {
                    return Ok(None);
                };
                let Some(index) = col.tail_indices(array.as_ref())? else {
                    return Ok(None);
                };
                Ok(Some(
                    codes
                        .iter()
                        .zip(index)
                        .map(|(&code, i)| match (code == other, i) {
                            (false, _) => 0.0,
                            (true, UNSEEN) => tables.outside,
                            (true, i) => tables.logp[usize::from(i)],
                        })
                        .collect(),
                ))
            })
            .collect()
    }

    /// Scores one batch with the model's columns (in order). With `surprisal`, also returns
    /// −ln P(x_c | x_parent) for every column.
    pub fn score(&self, batch: &RecordBatch, surprisal: bool) -> Result<Scored> {
        let batch = &crate::times::conform_times(batch, &self.dtypes)?;
        let codes = self.codebook.encode(batch, false)?;
        let tails = self.tail_terms(batch, &codes)?;
        let n = batch.num_rows();
        let d = codes.len();
        let unseen = codes
            .par_iter()
            .map(|col| col.iter().filter(|c| **c == UNSEEN).count() as u64)
            .collect();
        let mut total = vec![0.0; n];
        let token = crate::cancel::current();
        total
            .par_chunks_mut(SCORE_CHUNK)
            .enumerate()
            .for_each(|(k, out)| {
                if token.cancelled() {
                    return;
                }
                let start = k * SCORE_CHUNK;
                for (c, tail) in tails.iter().enumerate() {
                    let tail = tail.as_deref();
                    self.column_log_prob(&codes, tail, c, start..start + out.len(), out, true);
                }
            });
        let surprisal = surprisal.then(|| {
            (0..d)
                .into_par_iter()
                .map(|c| {
                    let mut col = vec![0.0; n];
                    if token.cancelled() {
                        return col;
                    }
                    self.column_log_prob(&codes, tails[c].as_deref(), c, 0..n, &mut col, false);
                    col.iter_mut().for_each(|v| *v = -*v);
                    col
                })
                .collect()
        });
        token.check()?;
        Ok(Scored {
            total,
            surprisal,
            unseen,
        })
    }

    /// Draws `count` rows by ancestral sampling, starting at row `start` of the stream of `seed`.
    /// `start` must be a multiple of [`SAMPLE_BLOCK`]: the rows of a seed are then the same
    /// however the request is split.
    pub fn sample(&self, start: u64, count: usize, seed: u64) -> Result<Sampled> {
        if !start.is_multiple_of(SAMPLE_BLOCK as u64) {
            return Err(Error::Invalid(format!(
                "sampling must start at a multiple of {SAMPLE_BLOCK} rows"
            )));
        }
        let d = self.codebook.columns().len();
        let first_block = start / SAMPLE_BLOCK as u64;
        let n_blocks = count.div_ceil(SAMPLE_BLOCK);
        let columns = self.codebook.columns();
        let numeric: Vec<bool> = columns
            .iter()
            .map(|col| matches!(col.values(), Values::Bins { .. }))
            .collect();
        let mut out = Sampled {
            codes: vec![vec![0u16; count]; d],
            floats: numeric
                .iter()
                .map(|&is| is.then(|| vec![f64::NAN; count]))
                .collect(),
            tails: self
                .tails
                .iter()
                .map(|t| t.as_ref().map(|_| vec![u32::MAX; count]))
                .collect(),
        };
        // Each block writes straight into its own slice of every output column.
        let mut code_blocks: Vec<Vec<&mut [u16]>> =
            (0..n_blocks).map(|_| Vec::with_capacity(d)).collect();
        for column in &mut out.codes {
            for (b, chunk) in column.chunks_mut(SAMPLE_BLOCK).enumerate() {
                code_blocks[b].push(chunk);
            }
        }
        let float_blocks = split_blocks(&mut out.floats, n_blocks);
        let tail_blocks = split_blocks(&mut out.tails, n_blocks);
        let token = crate::cancel::current();
        code_blocks
            .into_par_iter()
            .zip(float_blocks.into_par_iter())
            .zip(tail_blocks.into_par_iter())
            .enumerate()
            .for_each(|(b, ((mut codes, mut floats), mut tails))| {
                if token.cancelled() {
                    return;
                }
                let mut rng = Rng::new(seed, first_block + b as u64);
                // Column by column in breadth-first order, so each parent is drawn before its
                // children; the draws per block are fixed, so a block's rows depend only on
                // (seed, block).
                for &c in &self.order {
                    let cpt = &self.cpts[c];
                    let column = std::mem::take(&mut codes[c]);
                    match self.parent[c] {
                        Some(p) => {
                            for (x, &a) in column.iter_mut().zip(codes[p].iter()) {
                                *x = cpt.draw(usize::from(a), rng.next_f64());
                            }
                        }
                        None => column
                            .iter_mut()
                            .for_each(|x| *x = cpt.draw(0, rng.next_f64())),
                    }
                    // One more draw per row for what the code stands for, used or not.
                    if let Some(values) = &mut floats[c] {
                        let narrow = dtype::is_float32(&self.dtypes[c]);
                        for (v, &x) in values.iter_mut().zip(column.iter()) {
                            let u = rng.next_f64();
                            *v = number_at(&columns[c], usize::from(x), u, narrow);
                        }
                    }
                    if let (Some(picked), Some(tables), Some(other)) =
                        (&mut tails[c], &self.tails[c], columns[c].other_code())
                    {
                        for (t, &x) in picked.iter_mut().zip(column.iter()) {
                            let u = rng.next_f64();
                            if x == other {
                                *t = u32::try_from(pick(&tables.cdf, u)).unwrap_or(u32::MAX);
                            }
                        }
                    }
                    codes[c] = column;
                }
            });
        token.check()?;
        Ok(out)
    }
}

impl TreeModel {
    /// Column `c`'s smoothed table ln P(x | parent code), row-major by the parent's code (one
    /// row for a root); the tables scoring and sampling use.
    pub fn log_table(&self, c: usize) -> Option<&[f64]> {
        self.cpts.get(c).map(|t| t.logp.as_slice())
    }

    /// Column `c`'s smoothed marginal ln P(x) (what scoring uses when the parent has no code).
    pub fn log_marginal(&self, c: usize) -> Option<&[f64]> {
        self.cpts.get(c).map(|t| t.marginal.as_slice())
    }

    /// What sampling fills in after column `c`'s code `x` is drawn, from `rng`, exactly as
    /// `sample` does: one draw for a numeric column (the number inside the bin, into `float`)
    /// and one for a column with a tail table (the tail entry where `x` is "other", into
    /// `tail`). Mixtures of trees sample through it.
    pub fn fill_drawn(
        &self,
        c: usize,
        x: u16,
        rng: &mut Rng,
        float: Option<&mut f64>,
        tail: Option<&mut u32>,
    ) {
        let Some(column) = self.codebook.columns().get(c) else {
            return;
        };
        if let Some(v) = float {
            let narrow = self.dtypes.get(c).is_some_and(|t| dtype::is_float32(t));
            *v = number_at(column, usize::from(x), rng.next_f64(), narrow);
        }
        if let (Some(t), Some(Some(tables))) = (tail, self.tails.get(c)) {
            let u = rng.next_f64();
            if Some(x) == column.other_code() {
                *t = u32::try_from(pick(&tables.cdf, u)).unwrap_or(u32::MAX);
            }
        }
    }

    /// Whether column `c` is numeric (sampling draws a number inside its bin).
    pub fn is_numeric(&self, c: usize) -> bool {
        self.codebook
            .columns()
            .get(c)
            .is_some_and(|col| matches!(col.values(), Values::Bins { .. }))
    }

    /// Whether column `c` has a tail table behind "other" (sampling draws an entry from it).
    pub fn has_tail(&self, c: usize) -> bool {
        self.tails.get(c).is_some_and(Option::is_some)
    }

    /// The number code `k` of numeric column `c` stands for at uniform draw `u`, as `sample`
    /// draws it (`u = 0.5` gives the bin's median); None when `c` is not numeric or `k` is its
    /// null code.
    pub fn value_in_bin(&self, c: usize, k: usize, u: f64) -> Option<f64> {
        let column = self.codebook.columns().get(c)?;
        if !matches!(column.values(), Values::Bins { .. }) || k >= column.values().len() {
            return None;
        }
        let narrow = dtype::is_float32(self.dtypes.get(c)?);
        Some(number_at(column, k, u, narrow))
    }
}

/// Splits optional per-column outputs into per-block slices (None for columns without one).
fn split_blocks<T>(columns: &mut [Option<Vec<T>>], n_blocks: usize) -> Vec<Vec<Option<&mut [T]>>> {
    let mut blocks: Vec<Vec<Option<&mut [T]>>> = (0..n_blocks)
        .map(|_| Vec::with_capacity(columns.len()))
        .collect();
    for column in columns.iter_mut() {
        match column {
            Some(values) => {
                for (b, chunk) in values.chunks_mut(SAMPLE_BLOCK).enumerate() {
                    blocks[b].push(Some(chunk));
                }
            }
            None => blocks.iter_mut().for_each(|f| f.push(None)),
        }
    }
    blocks
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::codebook::ColumnCode;

    fn model(alpha: f64) -> Result<TreeModel> {
        let a = ColumnCode::new("a".into(), Values::Int(vec![1, 2, 3]), false, false)?;
        let b = ColumnCode::new("b".into(), Values::Bool(vec![false, true]), false, false)?;
        let codebook = Codebook::new(vec![a, b])?;
        let mut stats = PairStats::new(codebook.cardinalities())?;
        stats.add_codes(&[vec![0, 0, 1, 2, 2, 2], vec![0, 0, 1, 1, 1, 0]])?;
        crate::fit_model(
            codebook,
            vec!["int64".into(), "bool".into()],
            &stats,
            Some(1),
            alpha,
            crate::Prune::None,
        )
    }

    #[test]
    fn probabilities_of_every_row_sum_to_one() -> Result<()> {
        for alpha in [0.0, 0.5, 4.0] {
            let m = model(alpha)?;
            let total: f64 = (0..3u16)
                .flat_map(|a| (0..2u16).map(move |b| (a, b)))
                .map(|(a, b)| {
                    let codes = vec![vec![a], vec![b]];
                    let mut out = [0.0];
                    m.column_log_prob(&codes, None, 0, 0..1, &mut out, true);
                    m.column_log_prob(&codes, None, 1, 0..1, &mut out, true);
                    out[0].exp()
                })
                .sum();
            assert!((total - 1.0).abs() < 1e-12, "alpha {alpha}: {total}");
        }
        Ok(())
    }

    #[test]
    fn samples_do_not_depend_on_how_they_are_requested() -> Result<()> {
        let m = model(0.5)?;
        let whole = m.sample(0, 3 * SAMPLE_BLOCK + 17, 42)?;
        let first = m.sample(0, SAMPLE_BLOCK, 42)?;
        let rest = m.sample(SAMPLE_BLOCK as u64, 2 * SAMPLE_BLOCK + 17, 42)?;
        for c in 0..2 {
            let joined: Vec<u16> = first.codes[c]
                .iter()
                .chain(&rest.codes[c])
                .copied()
                .collect();
            assert_eq!(joined, whole.codes[c]);
        }
        assert!(m.sample(1, 10, 42).is_err());
        Ok(())
    }

    #[test]
    fn a_cycle_in_the_parent_links_is_refused() -> Result<()> {
        let m = model(0.5)?;
        let parent = vec![Some(1), Some(0)];
        let r = TreeModel::new(
            m.codebook().clone(),
            m.dtypes().to_vec(),
            m.n_rows(),
            0,
            parent,
            m.counts().to_vec(),
            m.pair_mi().to_vec(),
            0.5,
        );
        assert!(matches!(r, Err(Error::CorruptModel(_))));
        Ok(())
    }
}
