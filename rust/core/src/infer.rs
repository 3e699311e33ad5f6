//! Exact inference on a fitted tree or forest: posterior marginals, the evidence likelihood, the
//! most probable completion and conditional sampling, by message passing along the edges.
//!
//! Each row is one query. The upward (collect) pass sends every column's message to its parent;
//! the downward pass sends the rest of the tree's view back. Messages are scaled to a maximum of
//! 1 after every product (the scales multiply into the evidence likelihood), so long trees and
//! tiny probabilities neither underflow nor lose precision; max-product scales the same way.

use arrow_array::{Array, RecordBatch};
use rayon::prelude::*;

use crate::codebook::{ColumnCode, UNSEEN};
use crate::error::{Error, Result};
use crate::model::TreeModel;
use crate::rng::Rng;
use crate::stats::PairStats;
use crate::{tree, weights};

/// The code of an unobserved cell in [`Evidence`], and of a cell left as it was in [`Filled`].
pub const MISSING: u16 = UNSEEN;
/// Rows per chunk handed to one thread.
const CHUNK: usize = 512;

/// How [`Inference::impute`] fills a row's nulls.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Strategy {
    /// The most probable joint completion (max-product).
    Joint,
    /// Each cell's own most probable value (the argmax of its posterior marginal).
    Marginal,
    /// A draw from the joint posterior.
    Sample,
}

/// One batch of evidence: per column and row, the observed code or [`MISSING`].
#[derive(Clone, Debug)]
pub struct Evidence {
    n_rows: usize,
    codes: Vec<Vec<u16>>,
    /// Where the data held a null (or NaN): the cells that imputation and sampling fill.
    null: Vec<Vec<bool>>,
    /// Per column: values without a code, treated as unobserved.
    pub unseen: Vec<u64>,
}

impl Evidence {
    /// Rows of evidence.
    pub fn n_rows(&self) -> usize {
        self.n_rows
    }
}

/// Filled-in or sampled rows: codes per column, [`MISSING`] where a cell was left as it was.
#[derive(Clone, Debug, Default)]
pub struct Filled {
    /// Codes per column.
    pub codes: Vec<Vec<u16>>,
    /// Per float column: the number placed in the filled bin (NaN elsewhere).
    pub floats: Vec<Option<Vec<f64>>>,
    /// Rows whose evidence has probability zero (left unfilled).
    pub impossible: u64,
}

/// Per-row posterior tables with the count of rows whose evidence is impossible (NaN rows).
#[derive(Clone, Debug, Default)]
pub struct Posterior {
    /// Row-major n x r tables, one per requested column.
    pub tables: Vec<Vec<f64>>,
    /// Rows whose evidence has probability zero under the model.
    pub impossible: u64,
}

/// How one column's evidence is encoded: with a code that marks nulls, or (for a column whose
/// codes are full) with the model's own encoder and the array's null mask.
#[derive(Clone, Debug)]
enum Encoder {
    WithNull(ColumnCode, u16),
    Plain(ColumnCode),
}

/// What one cell of one row allows.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Slot {
    Seen(usize),
    Free,
    /// A null being filled: only concrete values (not "other", not the null code).
    Values,
}

/// A model prepared for inference: probability tables and the layout of one row's messages.
#[derive(Clone, Debug)]
pub struct Inference {
    model: TreeModel,
    encoders: Vec<Encoder>,
    cards: Vec<usize>,
    parent: Vec<Option<usize>>,
    order: Vec<usize>,
    children: Vec<Vec<usize>>,
    /// P(x | a), row-major by the parent's code.
    prob: Vec<Vec<f64>>,
    /// P(x | a) row-major by x (the transpose), for observed columns; empty for a root.
    prob_t: Vec<Vec<f64>>,
    /// Codes below this are concrete values.
    n_values: Vec<usize>,
    /// Float columns (filled cells get a number inside their bin).
    is_float: Vec<bool>,
    /// Offsets of each column's vector (its own codes) in a row's scratch.
    off: Vec<usize>,
    /// Offsets of each column's message to its parent (the parent's codes; empty for a root).
    up_off: Vec<usize>,
    total: usize,
    up_total: usize,
    /// The most codes, and the most (children x codes) of any column.
    max_card: usize,
    max_fan: usize,
}

/// Scratch space for one row's messages, reused over the rows of a chunk.
#[derive(Clone)]
struct Scratch {
    slot: Vec<Slot>,
    lam: Vec<f64>,
    up: Vec<f64>,
    pi: Vec<f64>,
    suffix: Vec<f64>,
    pre: Vec<f64>,
    ctx: Vec<f64>,
    back: Vec<u16>,
    best: Vec<usize>,
}

/// Multiplies `v` by `m` and scales it to a maximum of 1; returns the scale (0: all zero).
fn mul_scale(v: &mut [f64], m: &[f64]) -> f64 {
    v.iter_mut().zip(m).for_each(|(x, y)| *x *= y);
    scale(v)
}

/// Scales `v` to a maximum of 1; returns the factor it was divided by (0 when all are zero).
fn scale(v: &mut [f64]) -> f64 {
    let max = v.iter().fold(0.0f64, |m, x| m.max(*x));
    if max > 0.0 && max != 1.0 {
        let inv = 1.0 / max;
        v.iter_mut().for_each(|x| *x *= inv);
    }
    max
}

/// A product of scale factors (each in (0, 1]) kept as a number while it is comfortably above
/// underflow and folded into its logarithm otherwise: one `ln` per many factors.
struct LogProduct {
    log: f64,
    mul: f64,
}

impl LogProduct {
    /// Below this a factor (or the running product) goes to the logarithm.
    const FOLD: f64 = 1e-150;

    fn new() -> Self {
        LogProduct { log: 0.0, mul: 1.0 }
    }

    fn push(&mut self, k: f64) {
        if k < Self::FOLD {
            self.log += k.ln();
            return;
        }
        self.mul *= k;
        if self.mul < Self::FOLD {
            self.log += self.mul.ln();
            self.mul = 1.0;
        }
    }

    fn ln(&self) -> f64 {
        self.log + self.mul.ln()
    }
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).fold(0.0, |acc, (x, y)| acc + x * y)
}

/// Scales `v` to sum to 1 (left unchanged when the sum is 0).
fn normalise(v: &mut [f64]) {
    let sum: f64 = v.iter().fold(0.0, |acc, x| acc + x);
    if sum > 0.0 {
        v.iter_mut().for_each(|x| *x /= sum);
    }
}

/// The first index of the largest value (ties go to the lower code), if any is above `floor`.
fn argmax(v: &[f64], floor: f64) -> Option<usize> {
    let mut best: Option<(usize, f64)> = None;
    for (k, &x) in v.iter().enumerate() {
        if x > floor && best.is_none_or(|(_, b)| x > b) {
            best = Some((k, x));
        }
    }
    best.map(|(k, _)| k)
}

/// A draw from weights `w` (not normalised) with the uniform number `u`; None if all are zero.
fn draw(w: &[f64], u: f64) -> Option<usize> {
    let total: f64 = w.iter().fold(0.0, |acc, x| acc + x);
    if total <= 0.0 {
        return None;
    }
    let target = u * total;
    let mut acc = 0.0;
    for (k, &x) in w.iter().enumerate() {
        acc += x;
        if x > 0.0 && acc > target {
            return Some(k);
        }
    }
    // Rounding ran off the end: the last code with any weight.
    w.iter().rposition(|x| *x > 0.0)
}

fn as_code(k: usize) -> u16 {
    u16::try_from(k).unwrap_or(MISSING)
}

/// The model of the maximum spanning tree of `weights` (one per pair, in pair-index order; for
/// example conditional mutual information), oriented from `root`, with tables from `stats`.
/// Ties follow the strict edge order of the Chow-Liu fit.
pub fn model_from_weights(
    codebook: crate::Codebook,
    dtypes: Vec<String>,
    stats: &PairStats,
    weights: Vec<f64>,
    root: usize,
    alpha: f64,
) -> Result<TreeModel> {
    let d = stats.n_columns();
    if weights.len() != d * d.saturating_sub(1) / 2 {
        return Err(Error::Invalid(format!(
            "{d} columns need {} pair weights, got {}",
            d * d.saturating_sub(1) / 2,
            weights.len()
        )));
    }
    if root >= d {
        return Err(Error::Invalid(format!(
            "root {root} is not one of the {d} columns"
        )));
    }
    let edges = tree::kruskal(d, &weights, |_| true);
    let parent = tree::orient(d, &edges, root).parent;
    TreeModel::from_stats(codebook, dtypes, stats, root, parent, weights, alpha)
}

/// The model of a given forest (`parent[c]` is None for a root) with tables from `stats`; the
/// first root orients it.
pub fn model_from_parents(
    codebook: crate::Codebook,
    dtypes: Vec<String>,
    stats: &PairStats,
    parent: Vec<Option<usize>>,
    alpha: f64,
) -> Result<TreeModel> {
    let root = parent
        .iter()
        .position(Option::is_none)
        .ok_or_else(|| Error::Invalid("a forest needs at least one root".into()))?;
    let mi = weights::all_weights(stats)
        .iter()
        .map(|w| w.mutual_info)
        .collect();
    TreeModel::from_stats(codebook, dtypes, stats, root, parent, mi, alpha)
}

impl Inference {
    /// Prepares `model` for inference with its own smoothed tables.
    pub fn new(model: TreeModel) -> Result<Self> {
        Self::with_backoff(model, 0.0)
    }

    /// Prepares `model` for inference with each child's table pulled toward the child's own
    /// smoothed marginal q by `backoff` pseudo-rows: P(x | a) = (n_ax + backoff q_x) / (n_a +
    /// backoff). A parent value seen in few rows then falls back on q instead of a flat row.
    /// Roots keep their tables, and `backoff = 0` keeps every table of the model.
    pub fn with_backoff(model: TreeModel, backoff: f64) -> Result<Self> {
        if !(backoff.is_finite() && backoff >= 0.0) {
            return Err(Error::Invalid(format!(
                "the back-off weight must be a finite number >= 0, got {backoff}"
            )));
        }
        let d = model.parent().len();
        let cards = model.codebook().cardinalities();
        let parent = model.parent().to_vec();
        let mut children = vec![Vec::new(); d];
        for (c, p) in parent.iter().enumerate() {
            if let Some(p) = *p {
                children[p].push(c);
            }
        }
        let missing = |c: usize| Error::Invalid(format!("the model has no table for column {c}"));
        let logp: Vec<Vec<f64>> = (0..d)
            .map(|c| {
                if backoff == 0.0 || parent[c].is_none() {
                    return model
                        .log_table(c)
                        .map(<[f64]>::to_vec)
                        .ok_or_else(|| missing(c));
                }
                let q = model.log_marginal(c).ok_or_else(|| missing(c))?;
                let counts = model.counts().get(c).ok_or_else(|| missing(c))?;
                Ok(counts
                    .chunks_exact(cards[c])
                    .flat_map(|row| {
                        let n_a = row.iter().sum::<u64>() as f64;
                        row.iter().zip(q).map(move |(&n, q)| {
                            ((n as f64 + backoff * q.exp()) / (n_a + backoff)).ln()
                        })
                    })
                    .collect())
            })
            .collect::<Result<_>>()?;
        let prob: Vec<Vec<f64>> = logp
            .iter()
            .map(|t| t.iter().map(|l| l.exp()).collect())
            .collect();
        let prob_t = (0..d)
            .map(|c| match parent[c] {
                Some(p) => {
                    let (r, rp) = (cards[c], cards[p]);
                    (0..r * rp)
                        .map(|k| prob[c][(k % rp) * r + k / rp])
                        .collect()
                }
                None => Vec::new(),
            })
            .collect();
        let encoders = model
            .codebook()
            .columns()
            .iter()
            .map(|col| match col.null_code() {
                Some(null) => Encoder::WithNull(col.clone(), null),
                None => {
                    let with_null = col.with_null();
                    match with_null.ok().and_then(|w| w.null_code().map(|n| (w, n))) {
                        Some((w, n)) => Encoder::WithNull(w, n),
                        None => Encoder::Plain(col.clone()),
                    }
                }
            })
            .collect();
        let n_values = model
            .codebook()
            .columns()
            .iter()
            .map(|col| col.values().len())
            .collect();
        let is_float = model
            .codebook()
            .columns()
            .iter()
            .map(|col| matches!(col.values(), crate::Values::Bins { .. }))
            .collect();
        let mut off = Vec::with_capacity(d);
        let mut up_off = Vec::with_capacity(d);
        let (mut total, mut up_total) = (0, 0);
        for c in 0..d {
            off.push(total);
            up_off.push(up_total);
            total += cards[c];
            up_total += parent[c].map_or(0, |p| cards[p]);
        }
        let max_card = cards.iter().copied().max().unwrap_or(1);
        let max_fan = (0..d)
            .map(|c| children[c].len() * cards[c])
            .max()
            .unwrap_or(0);
        Ok(Inference {
            order: model.order().to_vec(),
            model,
            encoders,
            cards,
            parent,
            children,
            prob,
            prob_t,
            n_values,
            is_float,
            off,
            up_off,
            total,
            up_total,
            max_card,
            max_fan,
        })
    }

    /// The model.
    pub fn model(&self) -> &TreeModel {
        &self.model
    }

    /// Encodes a batch with the model's columns (in order) as evidence. A null (or NaN) is
    /// unobserved, even in a column whose codebook has a null code; a value without a code is
    /// unobserved too, and counted in [`Evidence::unseen`].
    pub fn evidence(&self, batch: &RecordBatch) -> Result<Evidence> {
        self.model.codebook().check_batch(batch)?;
        let n = batch.num_rows();
        let columns: Vec<(Vec<u16>, Vec<bool>, u64)> = self
            .encoders
            .par_iter()
            .zip(batch.columns().par_iter())
            .map(|(encoder, array)| {
                let mut raw = Vec::with_capacity(n);
                let mut null = vec![false; n];
                let mut unseen = 0u64;
                match encoder {
                    Encoder::WithNull(code, null_code) => {
                        code.encode(array.as_ref(), false, &mut raw)?;
                        for (r, is_null) in raw.iter_mut().zip(null.iter_mut()) {
                            if *r == *null_code {
                                *is_null = true;
                                *r = MISSING;
                            } else if *r == UNSEEN {
                                unseen += 1;
                            }
                        }
                    }
                    Encoder::Plain(code) => {
                        code.encode(array.as_ref(), false, &mut raw)?;
                        let nulls = array.logical_nulls();
                        for (i, r) in raw.iter().enumerate() {
                            if nulls.as_ref().is_some_and(|m| m.is_null(i)) {
                                null[i] = true;
                            } else if *r == UNSEEN {
                                unseen += 1;
                            }
                        }
                    }
                }
                Ok((raw, null, unseen))
            })
            .collect::<Result<_>>()?;
        let mut codes = Vec::with_capacity(columns.len());
        let mut nulls = Vec::with_capacity(columns.len());
        let mut unseen = Vec::with_capacity(columns.len());
        for (c, n, u) in columns {
            codes.push(c);
            nulls.push(n);
            unseen.push(u);
        }
        Ok(Evidence {
            n_rows: n,
            codes,
            null: nulls,
            unseen,
        })
    }

    fn scratch(&self) -> Scratch {
        let d = self.cards.len();
        Scratch {
            slot: vec![Slot::Free; d],
            lam: vec![0.0; self.total],
            up: vec![0.0; self.up_total],
            pi: vec![0.0; self.total],
            suffix: vec![0.0; self.max_fan],
            pre: vec![0.0; self.max_card],
            ctx: vec![0.0; self.max_card],
            back: vec![0; self.up_total],
            best: vec![0; d],
        }
    }

    /// Sets row `i`'s slots; a null cell of a column in `fill` allows only concrete values.
    fn load(&self, ev: &Evidence, i: usize, fill: Option<&[bool]>, s: &mut Scratch) {
        for (c, slot) in s.slot.iter_mut().enumerate() {
            let code = ev.codes[c][i];
            let filled = fill.is_some_and(|f| f.get(c).copied().unwrap_or(false));
            *slot = if code != MISSING && usize::from(code) < self.cards[c] {
                Slot::Seen(usize::from(code))
            } else if filled && ev.null[c][i] && self.n_values[c] > 0 {
                Slot::Values
            } else {
                Slot::Free
            };
        }
    }

    /// Writes the evidence indicator of column `c` into `v`.
    fn indicator(&self, slot: Slot, c: usize, v: &mut [f64]) {
        match slot {
            Slot::Seen(x) => {
                v.fill(0.0);
                v[x] = 1.0;
            }
            Slot::Free => v.fill(1.0),
            Slot::Values => {
                let n = self.n_values[c];
                v.iter_mut()
                    .enumerate()
                    .for_each(|(x, l)| *l = if x < n { 1.0 } else { 0.0 });
            }
        }
    }

    /// The upward pass: each column's evidence times its children's messages (`lam`) and its
    /// message to its parent (`up`). Returns ln P(evidence), -inf when it is impossible.
    fn upward(&self, s: &mut Scratch) -> f64 {
        let Scratch { slot, lam, up, .. } = s;
        let mut z = LogProduct::new();
        for &v in self.order.iter().rev() {
            let r = self.cards[v];
            let lam_v = &mut lam[self.off[v]..self.off[v] + r];
            self.indicator(slot[v], v, lam_v);
            if let Slot::Seen(x) = slot[v] {
                // An observed column: only its own code matters, so the children's messages
                // are numbers; lam stays the indicator and their product goes to z.
                for &ch in &self.children[v] {
                    let k = up[self.up_off[ch] + x];
                    if k == 0.0 {
                        return f64::NEG_INFINITY;
                    }
                    z.push(k);
                }
            } else {
                for &ch in &self.children[v] {
                    let m = &up[self.up_off[ch]..self.up_off[ch] + r];
                    let k = mul_scale(lam_v, m);
                    if k == 0.0 {
                        return f64::NEG_INFINITY;
                    }
                    z.push(k);
                }
            }
            let table = &self.prob[v];
            let k = match self.parent[v] {
                Some(p) => {
                    let rp = self.cards[p];
                    let msg = &mut up[self.up_off[v]..self.up_off[v] + rp];
                    match slot[v] {
                        // P(x | a) for every a: a contiguous row of the transposed table.
                        Slot::Seen(x) => msg.copy_from_slice(&self.prob_t[v][x * rp..(x + 1) * rp]),
                        _ => msg
                            .iter_mut()
                            .zip(table.chunks_exact(r))
                            .for_each(|(m, row)| *m = dot(row, lam_v)),
                    }
                    scale(msg)
                }
                None => dot(&table[..r], lam_v),
            };
            if k <= 0.0 {
                return f64::NEG_INFINITY;
            }
            z.push(k);
        }
        z.ln()
    }

    /// The downward pass after [`Self::upward`], for the columns in `needed` (closed under
    /// parents): `pi` gets each one's message from the rest of the tree.
    fn downward(&self, s: &mut Scratch, needed: &[bool]) {
        let Scratch {
            slot,
            up,
            pi,
            suffix,
            pre,
            ctx,
            ..
        } = s;
        for &v in &self.order {
            if !needed[v] {
                continue;
            }
            let r = self.cards[v];
            if self.parent[v].is_none() {
                pi[self.off[v]..self.off[v] + r].copy_from_slice(&self.prob[v][..r]);
            }
            let kids = &self.children[v];
            if !kids.iter().any(|&c| needed[c]) {
                continue;
            }
            if let Slot::Seen(x) = slot[v] {
                // An observed parent tells each child everything: its row of the table.
                for &ch in kids.iter().filter(|&&c| needed[c]) {
                    let rc = self.cards[ch];
                    pi[self.off[ch]..self.off[ch] + rc]
                        .copy_from_slice(&self.prob[ch][x * rc..(x + 1) * rc]);
                }
                continue;
            }
            // suffix block i holds the product of the messages of children i+1.. (scaled).
            let k = kids.len();
            for i in (0..k).rev() {
                let (head, tail) = suffix.split_at_mut((i + 1) * r);
                let block = &mut head[i * r..];
                if i + 1 == k {
                    block.fill(1.0);
                } else {
                    block.copy_from_slice(&tail[..r]);
                    let m = &up[self.up_off[kids[i + 1]]..self.up_off[kids[i + 1]] + r];
                    mul_scale(block, m);
                }
            }
            let pre = &mut pre[..r];
            self.indicator(slot[v], v, pre);
            mul_scale(pre, &pi[self.off[v]..self.off[v] + r]);
            for (i, &ch) in kids.iter().enumerate() {
                if needed[ch] {
                    let ctx = &mut ctx[..r];
                    ctx.copy_from_slice(pre);
                    mul_scale(ctx, &suffix[i * r..(i + 1) * r]);
                    let rc = self.cards[ch];
                    let out = &mut pi[self.off[ch]..self.off[ch] + rc];
                    out.fill(0.0);
                    for (a, row) in self.prob[ch].chunks_exact(rc).enumerate() {
                        let w = ctx[a];
                        if w != 0.0 {
                            out.iter_mut().zip(row).for_each(|(o, p)| *o += w * p);
                        }
                    }
                    scale(out);
                }
                let m = &up[self.up_off[ch]..self.up_off[ch] + r];
                mul_scale(pre, m);
            }
        }
    }

    /// Column `c`'s posterior marginal after both passes, into `out` (summing to 1).
    fn belief(&self, s: &Scratch, c: usize, out: &mut [f64]) {
        let r = self.cards[c];
        let o = self.off[c];
        out.iter_mut()
            .zip(&s.pi[o..o + r])
            .zip(&s.lam[o..o + r])
            .for_each(|((b, p), l)| *b = p * l);
        normalise(out);
    }

    /// Max-product: the most probable completion of the row into `best`; false if impossible.
    fn max_product(&self, s: &mut Scratch) -> bool {
        let Scratch {
            slot,
            lam,
            up,
            back,
            best,
            ctx,
            ..
        } = s;
        // Max-product with the same scaling as sum-product: every product is scaled back to a
        // maximum of 1, which changes no argmax.
        for &v in self.order.iter().rev() {
            let r = self.cards[v];
            let lam_v = &mut lam[self.off[v]..self.off[v] + r];
            self.indicator(slot[v], v, lam_v);
            for &ch in &self.children[v] {
                let m = &up[self.up_off[ch]..self.up_off[ch] + r];
                if mul_scale(lam_v, m) == 0.0 {
                    return false;
                }
            }
            let table = &self.prob[v];
            match self.parent[v] {
                Some(p) => {
                    let rp = self.cards[p];
                    let o = self.up_off[v];
                    let (msg, from) = (&mut up[o..o + rp], &mut back[o..o + rp]);
                    match slot[v] {
                        Slot::Seen(x) => {
                            msg.copy_from_slice(&self.prob_t[v][x * rp..(x + 1) * rp]);
                            from.fill(as_code(x));
                        }
                        _ => {
                            for ((m, b), row) in msg.iter_mut().zip(from).zip(table.chunks_exact(r))
                            {
                                let mut top = (0, 0.0);
                                for (x, (t, l)) in row.iter().zip(lam_v.iter()).enumerate() {
                                    let value = t * l;
                                    if value > top.1 {
                                        top = (x, value);
                                    }
                                }
                                *m = top.1;
                                *b = as_code(top.0);
                            }
                        }
                    }
                    if scale(msg) == 0.0 {
                        return false;
                    }
                }
                None => {
                    let w = &mut ctx[..r];
                    w.iter_mut()
                        .zip(&table[..r])
                        .zip(lam_v.iter())
                        .for_each(|((w, t), l)| *w = t * l);
                    match argmax(w, 0.0) {
                        Some(x) => best[v] = x,
                        None => return false,
                    }
                }
            }
        }
        for &v in &self.order {
            if let Some(p) = self.parent[v] {
                best[v] = usize::from(back[self.up_off[v] + best[p]]);
            }
        }
        true
    }

    /// Draws a completion from the joint posterior after [`Self::upward`], into `best`.
    fn sample_down(&self, s: &mut Scratch, rng: &mut Rng) -> bool {
        let Scratch { lam, ctx, best, .. } = s;
        for &v in &self.order {
            let r = self.cards[v];
            let a = self.parent[v].map_or(0, |p| best[p]);
            let row = &self.prob[v][a * r..(a + 1) * r];
            let w = &mut ctx[..r];
            w.iter_mut()
                .zip(row)
                .zip(&lam[self.off[v]..self.off[v] + r])
                .for_each(|((w, p), l)| *w = p * l);
            match draw(w, rng.next_f64()) {
                Some(x) => best[v] = x,
                None => return false,
            }
        }
        true
    }

    /// Runs `f` on rows 0..n in parallel chunks, each chunk with its own scratch from `init`.
    fn per_row<T, I, F>(&self, n: usize, init: I, f: F) -> Vec<T>
    where
        T: Send,
        I: Fn(&Self) -> Scratch + Sync,
        F: Fn(&mut Scratch, usize) -> T + Sync,
    {
        (0..n.div_ceil(CHUNK))
            .into_par_iter()
            .flat_map_iter(|k| {
                let mut s = init(self);
                let rows = k * CHUNK..((k + 1) * CHUNK).min(n);
                rows.map(|i| f(&mut s, i)).collect::<Vec<_>>()
            })
            .collect()
    }

    /// ln P(observed cells) per row; -inf where the evidence is impossible.
    pub fn log_evidence(&self, ev: &Evidence) -> Result<Vec<f64>> {
        self.check(ev)?;
        Ok(self.per_row(ev.n_rows, Self::scratch, |s, i| {
            self.load(ev, i, None, s);
            self.upward(s)
        }))
    }

    fn check(&self, ev: &Evidence) -> Result<()> {
        if ev.codes.len() != self.cards.len() {
            return Err(Error::Invalid(format!(
                "evidence for {} columns given to a model of {}",
                ev.codes.len(),
                self.cards.len()
            )));
        }
        Ok(())
    }

    /// The posterior marginals of `targets` per row (row-major n x r per target). Rows whose
    /// evidence is impossible are NaN.
    pub fn posterior(&self, ev: &Evidence, targets: &[usize]) -> Result<Posterior> {
        self.check(ev)?;
        let d = self.cards.len();
        if let Some(t) = targets.iter().find(|&&t| t >= d) {
            return Err(Error::Invalid(format!("no column {t} of {d}")));
        }
        // Only the targets and their ancestors need the downward pass.
        let mut needed = vec![false; d];
        for &t in targets {
            let mut c = Some(t);
            while let Some(v) = c {
                if needed[v] {
                    break;
                }
                needed[v] = true;
                c = self.parent[v];
            }
        }
        let rows: Vec<Option<Vec<Vec<f64>>>> = self.per_row(ev.n_rows, Self::scratch, |s, i| {
            self.load(ev, i, None, s);
            if self.upward(s) == f64::NEG_INFINITY {
                return None;
            }
            self.downward(s, &needed);
            Some(
                targets
                    .iter()
                    .map(|&t| {
                        let mut b = vec![0.0; self.cards[t]];
                        self.belief(s, t, &mut b);
                        b
                    })
                    .collect(),
            )
        });
        let mut out = Posterior {
            tables: targets
                .iter()
                .map(|&t| Vec::with_capacity(ev.n_rows * self.cards[t]))
                .collect(),
            impossible: 0,
        };
        for row in rows {
            match row {
                Some(beliefs) => {
                    for (table, b) in out.tables.iter_mut().zip(beliefs) {
                        table.extend(b);
                    }
                }
                None => {
                    out.impossible += 1;
                    for (table, &t) in out.tables.iter_mut().zip(targets) {
                        table.extend(std::iter::repeat_n(f64::NAN, self.cards[t]));
                    }
                }
            }
        }
        Ok(out)
    }

    /// Fills the nulls of the columns in `fill` with concrete values (never "other" nor the
    /// null code); nulls elsewhere (a column the data lacks) are merely unobserved. With
    /// `Sample`, row i of the batch draws from stream `first_row + i` of `seed`, so the rows do
    /// not depend on chunking or threads.
    pub fn impute(
        &self,
        ev: &Evidence,
        fill: &[bool],
        strategy: Strategy,
        seed: u64,
        first_row: u64,
    ) -> Result<Filled> {
        self.check(ev)?;
        if fill.len() != self.cards.len() {
            return Err(Error::Invalid(format!(
                "{} fill flags for {} columns",
                fill.len(),
                self.cards.len()
            )));
        }
        let d = self.cards.len();
        let all = vec![true; d];
        let rows = self.per_row(ev.n_rows, Self::scratch, |s, i| {
            self.load(ev, i, Some(fill), s);
            let mut rng = Rng::new(seed, first_row.wrapping_add(i as u64));
            let done = match strategy {
                Strategy::Joint => self.max_product(s),
                Strategy::Sample => {
                    self.upward(s) > f64::NEG_INFINITY && self.sample_down(s, &mut rng)
                }
                Strategy::Marginal => {
                    let possible = self.upward(s) > f64::NEG_INFINITY;
                    if possible {
                        self.downward(s, &all);
                        let mut b = vec![0.0; self.max_card];
                        for c in 0..d {
                            if s.slot[c] == Slot::Values {
                                let b = &mut b[..self.cards[c]];
                                self.belief(s, c, b);
                                s.best[c] = argmax(b, 0.0).unwrap_or(0);
                            }
                        }
                    }
                    possible
                }
            };
            let u = (strategy != Strategy::Sample).then_some(0.5);
            done.then(|| self.cells(s, |c| s.slot[c] == Slot::Values, u, &mut rng))
        });
        Ok(self.gather(ev.n_rows, rows))
    }

    /// Draws `count` rows from the model given the evidence: one row of evidence for all of
    /// them, or one per row. Null cells are drawn (any code, as [`TreeModel::sample`] draws);
    /// other cells are left as they were. Row i draws from stream `first_row + i` of `seed`.
    pub fn sample_given(
        &self,
        ev: &Evidence,
        count: usize,
        first_row: u64,
        seed: u64,
    ) -> Result<Filled> {
        self.check(ev)?;
        let shared = ev.n_rows == 1;
        if !shared && ev.n_rows != count {
            return Err(Error::Invalid(format!(
                "{count} rows asked for with {} rows of evidence; give one row, or one per row",
                ev.n_rows
            )));
        }
        let mut template = self.scratch();
        // With one row of evidence, the upward pass is the same for every draw: run it once.
        let shared_ok = shared && {
            self.load(ev, 0, None, &mut template);
            self.upward(&mut template) > f64::NEG_INFINITY
        };
        let rows = self.per_row(
            count,
            |_| template.clone(),
            |s, i| {
                let e = if shared { 0 } else { i };
                let possible = if shared {
                    shared_ok
                } else {
                    self.load(ev, i, None, s);
                    self.upward(s) > f64::NEG_INFINITY
                };
                let mut rng = Rng::new(seed, first_row.wrapping_add(i as u64));
                (possible && self.sample_down(s, &mut rng))
                    .then(|| self.cells(s, |c| ev.null[c][e], None, &mut rng))
            },
        );
        Ok(self.gather(count, rows))
    }

    /// The filled cells of one row as (column, code, number in the bin for a float column).
    /// `u` places the number in its bin; None draws it.
    fn cells(
        &self,
        s: &Scratch,
        fill: impl Fn(usize) -> bool,
        u: Option<f64>,
        rng: &mut Rng,
    ) -> Vec<(usize, u16, f64)> {
        (0..self.cards.len())
            .filter(|&c| fill(c))
            .map(|c| {
                let k = s.best[c];
                let x = if self.is_float[c] {
                    let u = u.unwrap_or_else(|| rng.next_f64());
                    self.model.value_in_bin(c, k, u).unwrap_or(f64::NAN)
                } else {
                    f64::NAN
                };
                (c, as_code(k), x)
            })
            .collect()
    }

    /// Per-row filled cells into columns; a row is None when its evidence is impossible.
    fn gather(&self, n: usize, rows: Vec<Option<Vec<(usize, u16, f64)>>>) -> Filled {
        let d = self.cards.len();
        let mut out = Filled {
            codes: vec![vec![MISSING; n]; d],
            floats: self
                .is_float
                .iter()
                .map(|f| f.then(|| vec![f64::NAN; n]))
                .collect(),
            impossible: 0,
        };
        for (i, row) in rows.into_iter().enumerate() {
            let Some(cells) = row else {
                out.impossible += 1;
                continue;
            };
            for (c, k, x) in cells {
                out.codes[c][i] = k;
                if let Some(values) = &mut out.floats[c] {
                    values[i] = x;
                }
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::codebook::{Codebook, Values};

    /// A random forest model over `cards.len()` integer columns fitted to random rows.
    fn forest(
        cards: &[usize],
        parent: Vec<Option<usize>>,
        alpha: f64,
        seed: u64,
    ) -> Result<Inference> {
        let mut rng = Rng::new(seed, 0);
        let columns = cards
            .iter()
            .enumerate()
            .map(|(c, &r)| {
                ColumnCode::new(
                    format!("c{c}"),
                    Values::Int((0..r as i64).collect()),
                    false,
                    false,
                )
            })
            .collect::<Result<Vec<_>>>()?;
        let codebook = Codebook::new(columns)?;
        let n = 40;
        let mut codes: Vec<Vec<u16>> = vec![Vec::with_capacity(n); cards.len()];
        for _ in 0..n {
            // Children copy their parent's code often, so the tables are far from uniform.
            let mut row = vec![0usize; cards.len()];
            for c in 0..cards.len() {
                let own = (rng.next_f64() * cards[c] as f64) as usize;
                row[c] = match parent[c] {
                    Some(p) if p < c && rng.next_f64() < 0.6 => row[p] % cards[c],
                    _ => own,
                };
            }
            for (c, x) in row.iter().enumerate() {
                codes[c].push(as_code(*x));
            }
        }
        let mut stats = PairStats::new(codebook.cardinalities())?;
        stats.add_codes(&codes)?;
        let dtypes = vec!["int64".to_string(); cards.len()];
        Inference::new(model_from_parents(codebook, dtypes, &stats, parent, alpha)?)
    }

    fn every_row(cards: &[usize]) -> Vec<Vec<usize>> {
        let mut rows = vec![vec![]];
        for &r in cards {
            rows = rows
                .into_iter()
                .flat_map(|row| {
                    (0..r).map(move |x| {
                        let mut next = row.clone();
                        next.push(x);
                        next
                    })
                })
                .collect();
        }
        rows
    }

    fn joint(inf: &Inference, row: &[usize]) -> f64 {
        (0..row.len())
            .map(|c| {
                let a = inf.parent[c].map_or(0, |p| row[p]);
                inf.prob[c][a * inf.cards[c] + row[c]]
            })
            .product()
    }

    fn evidence(rows: &[Vec<Option<usize>>]) -> Evidence {
        let d = rows[0].len();
        Evidence {
            n_rows: rows.len(),
            codes: (0..d)
                .map(|c| rows.iter().map(|r| r[c].map_or(MISSING, as_code)).collect())
                .collect(),
            null: (0..d)
                .map(|c| rows.iter().map(|r| r[c].is_none()).collect())
                .collect(),
            unseen: vec![0; d],
        }
    }

    fn cases() -> Vec<(Vec<usize>, Vec<Option<usize>>)> {
        vec![
            (vec![2, 3, 2, 3], vec![None, Some(0), Some(0), Some(1)]),
            (
                vec![3, 2, 2, 3, 2],
                vec![Some(2), None, Some(1), None, Some(3)],
            ),
            (vec![2, 2, 3], vec![None, None, None]),
        ]
    }

    #[test]
    fn marginals_and_evidence_match_enumeration() -> Result<()> {
        for (k, (cards, parent)) in cases().into_iter().enumerate() {
            for alpha in [0.0, 0.7] {
                let inf = forest(&cards, parent.clone(), alpha, k as u64)?;
                let all = every_row(&cards);
                let mut rng = Rng::new(99, k as u64);
                let queries: Vec<Vec<Option<usize>>> = (0..30)
                    .map(|_| {
                        cards
                            .iter()
                            .map(|&r| {
                                (rng.next_f64() < 0.4).then(|| (rng.next_f64() * r as f64) as usize)
                            })
                            .collect()
                    })
                    .collect();
                let ev = evidence(&queries);
                let targets: Vec<usize> = (0..cards.len()).collect();
                let post = inf.posterior(&ev, &targets)?;
                let logz = inf.log_evidence(&ev)?;
                for (i, q) in queries.iter().enumerate() {
                    let fits = |row: &Vec<usize>| {
                        q.iter().zip(row).all(|(e, x)| e.is_none_or(|e| e == *x))
                    };
                    let z: f64 = all.iter().filter(|r| fits(r)).map(|r| joint(&inf, r)).sum();
                    if z == 0.0 {
                        assert_eq!(logz[i], f64::NEG_INFINITY);
                        assert!(post.tables[0][i * cards[0]].is_nan());
                        continue;
                    }
                    assert!(
                        (logz[i] - z.ln()).abs() < 1e-12,
                        "{} vs {}",
                        logz[i],
                        z.ln()
                    );
                    for (t, &r) in cards.iter().enumerate() {
                        for x in 0..r {
                            let p: f64 = all
                                .iter()
                                .filter(|row| fits(row) && row[t] == x)
                                .map(|row| joint(&inf, row))
                                .sum::<f64>()
                                / z;
                            let got = post.tables[t][i * r + x];
                            assert!(
                                (got - p).abs() < 1e-12,
                                "case {k} row {i} col {t}: {got} vs {p}"
                            );
                        }
                    }
                }
            }
        }
        Ok(())
    }

    #[test]
    fn the_joint_completion_is_the_most_probable_one() -> Result<()> {
        for (k, (cards, parent)) in cases().into_iter().enumerate() {
            let inf = forest(&cards, parent, 0.3, 10 + k as u64)?;
            let all = every_row(&cards);
            let queries: Vec<Vec<Option<usize>>> = (0..cards.len())
                .map(|c| (0..cards.len()).map(|j| (j == c).then_some(0)).collect())
                .chain(std::iter::once(vec![None; cards.len()]))
                .collect();
            let filled = inf.impute(
                &evidence(&queries),
                &vec![true; cards.len()],
                Strategy::Joint,
                0,
                0,
            )?;
            for (i, q) in queries.iter().enumerate() {
                let fits =
                    |row: &Vec<usize>| q.iter().zip(row).all(|(e, x)| e.is_none_or(|e| e == *x));
                let best = all
                    .iter()
                    .filter(|r| fits(r))
                    .map(|r| joint(&inf, r))
                    .fold(0.0, f64::max);
                let got: Vec<usize> = (0..cards.len())
                    .map(|c| q[c].unwrap_or(usize::from(filled.codes[c][i])))
                    .collect();
                assert!(q.iter().zip(&got).all(|(e, g)| e.is_none_or(|e| e == *g)));
                assert!((joint(&inf, &got) - best).abs() <= 1e-12 * best);
            }
        }
        Ok(())
    }

    #[test]
    fn conditional_samples_do_not_depend_on_chunking() -> Result<()> {
        let (cards, parent) = cases().remove(0);
        let inf = forest(&cards, parent, 0.5, 3)?;
        let ev = evidence(&[vec![None, Some(1), None, None]]);
        let whole = inf.sample_given(&ev, 2000, 0, 7)?;
        let first = inf.sample_given(&ev, 1100, 0, 7)?;
        let rest = inf.sample_given(&ev, 900, 1100, 7)?;
        for c in 0..cards.len() {
            let joined: Vec<u16> = first.codes[c]
                .iter()
                .chain(&rest.codes[c])
                .copied()
                .collect();
            assert_eq!(joined, whole.codes[c]);
        }
        assert!(whole.codes[1].iter().all(|x| *x == MISSING));
        assert!(whole.codes[0].iter().all(|x| *x != MISSING));
        Ok(())
    }

    #[test]
    fn back_off_tables_are_distributions_between_the_counts_and_the_marginal() -> Result<()> {
        let (cards, parent) = cases().remove(0);
        let plain = forest(&cards, parent, 0.5, 5)?;
        let model = plain.model().clone();
        let pulled = Inference::with_backoff(model.clone(), 3.0)?;
        for c in 0..cards.len() {
            let Some(p) = plain.parent[c] else {
                assert_eq!(pulled.prob[c], plain.prob[c]);
                continue;
            };
            let q: Vec<f64> = model
                .log_marginal(c)
                .unwrap_or(&[])
                .iter()
                .map(|l| l.exp())
                .collect();
            for a in 0..cards[p] {
                let row = &model.counts()[c][a * cards[c]..(a + 1) * cards[c]];
                let n_a = row.iter().sum::<u64>() as f64;
                let got = &pulled.prob[c][a * cards[c]..(a + 1) * cards[c]];
                assert!((got.iter().sum::<f64>() - 1.0).abs() < 1e-12);
                for x in 0..cards[c] {
                    let want = (row[x] as f64 + 3.0 * q[x]) / (n_a + 3.0);
                    assert!((got[x] - want).abs() < 1e-15);
                }
            }
        }
        assert!(Inference::with_backoff(model, -1.0).is_err());
        Ok(())
    }
}
