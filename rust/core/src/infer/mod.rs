//! Exact inference on a fitted tree or forest: posterior marginals, the evidence likelihood, the
//! most probable completion and conditional sampling, by message passing along the edges.
//!
//! Each row is one query. The upward (collect) pass sends every column's message to its parent;
//! the downward pass sends the rest of the tree's view back. Messages are scaled to a maximum of
//! 1 after every product (the scales multiply into the evidence likelihood), so long trees and
//! tiny probabilities neither underflow nor lose precision; max-product scales the same way.

mod evidence;
mod passes;
#[cfg(test)]
mod tests;

use rayon::prelude::*;

use crate::codebook::UNSEEN;
use crate::error::{Error, Result};
use crate::model::TreeModel;
use crate::rng::Rng;
use crate::tree;

use evidence::Encoder;
use passes::{argmax, as_code};

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
    /// ln P(observed cells) per row, from the same upward pass (-inf where impossible).
    pub log_evidence: Vec<f64>,
    /// Rows whose evidence has probability zero under the model.
    pub impossible: u64,
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
        let order = model.order().to_vec();
        Ok(Self::assemble(model, parent, order, &logp))
    }

    /// Prepares one component of a mixture for inference: its own forest (`parent`, with
    /// `order` listing every parent before its children) and log tables (`logp[c]` is ln P(x |
    /// a) row-major by the parent's code, one row for a root), with `model`'s codebook, for
    /// reading evidence and drawing values inside a code. Every shape is checked.
    pub fn from_tables(
        model: TreeModel,
        parent: Vec<Option<usize>>,
        order: Vec<usize>,
        logp: Vec<Vec<f64>>,
    ) -> Result<Self> {
        let cards = model.codebook().cardinalities();
        let d = cards.len();
        let mut seen = vec![false; d];
        let shaped = parent.len() == d
            && logp.len() == d
            && (0..d).all(|c| {
                let rows = parent[c].map_or(Some(1), |p| cards.get(p).copied());
                rows.is_some_and(|rows| logp[c].len() == rows * cards[c])
            });
        // Every parent (checked above to be a column) comes before its children.
        let ordered = shaped
            && order.len() == d
            && order.iter().all(|&c| {
                let ok = c < d && !seen[c] && parent[c].is_none_or(|p| seen[p]);
                if c < d {
                    seen[c] = true;
                }
                ok
            });
        if !(shaped && ordered) {
            return Err(Error::Invalid(
                "a component's forest or tables do not match the model's columns".into(),
            ));
        }
        Ok(Self::assemble(model, parent, order, &logp))
    }

    /// The prepared tables and message layout of a forest over `model`'s codebook.
    fn assemble(
        model: TreeModel,
        parent: Vec<Option<usize>>,
        order: Vec<usize>,
        logp: &[Vec<f64>],
    ) -> Self {
        let d = parent.len();
        let cards = model.codebook().cardinalities();
        let children = tree::children(&parent);
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
        let encoders = evidence::encoders(model.codebook());
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
        Inference {
            order,
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
        }
    }

    /// The model.
    pub fn model(&self) -> &TreeModel {
        &self.model
    }

    /// Runs `f` on rows 0..n in parallel chunks, each chunk with its own scratch from `init`.
    /// An interrupt stops it between chunks (`Error::Cancelled`).
    fn per_row<T, I, F>(&self, n: usize, init: I, f: F) -> Result<Vec<T>>
    where
        T: Send,
        I: Fn(&Self) -> Scratch + Sync,
        F: Fn(&mut Scratch, usize) -> T + Sync,
    {
        let token = crate::cancel::current();
        let rows = (0..n.div_ceil(CHUNK))
            .into_par_iter()
            .flat_map_iter(|k| {
                if token.cancelled() {
                    return Vec::new();
                }
                let mut s = init(self);
                let rows = k * CHUNK..((k + 1) * CHUNK).min(n);
                rows.map(|i| f(&mut s, i)).collect::<Vec<_>>()
            })
            .collect();
        token.check()?;
        Ok(rows)
    }

    /// ln P(observed cells) per row; -inf where the evidence is impossible.
    pub fn log_evidence(&self, ev: &Evidence) -> Result<Vec<f64>> {
        self.log_evidence_filling(ev, None)
    }

    /// ln P(observed cells) per row, where a null in a column flagged in `fill` is known to hold
    /// one of the column's values (as [`Inference::impute`] conditions); -inf where impossible.
    pub fn log_evidence_filling(&self, ev: &Evidence, fill: Option<&[bool]>) -> Result<Vec<f64>> {
        self.check(ev)?;
        self.check_fill(fill)?;
        self.per_row(ev.n_rows, Self::scratch, |s, i| {
            self.load(ev, i, fill, s);
            self.upward(s)
        })
    }

    fn check_fill(&self, fill: Option<&[bool]>) -> Result<()> {
        match fill {
            Some(f) if f.len() != self.cards.len() => Err(Error::Invalid(format!(
                "{} fill flags for {} columns",
                f.len(),
                self.cards.len()
            ))),
            _ => Ok(()),
        }
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
        self.posterior_filling(ev, targets, None)
    }

    /// As [`Inference::posterior`], where a null in a column flagged in `fill` is known to
    /// hold one of the column's values (as [`Inference::impute`] conditions).
    pub fn posterior_filling(
        &self,
        ev: &Evidence,
        targets: &[usize],
        fill: Option<&[bool]>,
    ) -> Result<Posterior> {
        self.check(ev)?;
        self.check_fill(fill)?;
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
        let rows: Vec<(f64, Option<Vec<Vec<f64>>>)> =
            self.per_row(ev.n_rows, Self::scratch, |s, i| {
                self.load(ev, i, fill, s);
                let logz = self.upward(s);
                if logz == f64::NEG_INFINITY {
                    return (logz, None);
                }
                self.downward(s, &needed);
                let beliefs = targets
                    .iter()
                    .map(|&t| {
                        let mut b = vec![0.0; self.cards[t]];
                        self.belief(s, t, &mut b);
                        b
                    })
                    .collect();
                (logz, Some(beliefs))
            })?;
        let mut out = Posterior {
            tables: targets
                .iter()
                .map(|&t| Vec::with_capacity(ev.n_rows * self.cards[t]))
                .collect(),
            log_evidence: Vec::with_capacity(ev.n_rows),
            impossible: 0,
        };
        for (logz, row) in rows {
            out.log_evidence.push(logz);
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
        self.check_fill(Some(fill))?;
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
        })?;
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
        )?;
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
