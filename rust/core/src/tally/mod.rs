//! The codebook pass: exact tallies of each column's values, mergeable across batches, files and
//! workers. `kind` turns them into each column's codes; `file` reads and writes them.

mod file;
mod kind;
mod provisional;

pub(crate) use file::{family_code, family_from_code};
pub use kind::{KindChoice, Learned, Note};
pub use provisional::{OnePass, PROVISIONAL_CODES};

use arrow_array::{Array, RecordBatch};
use rayon::prelude::*;
use rustc_hash::FxHashMap;

use crate::codebook::{check_names, Values, DENSE_SPAN};
use crate::error::{Error, Result};
use crate::shape::Within;
use crate::values::{
    classify, dictionary_keys, each_bool, each_i64, each_number, each_str, each_u64, Kind,
};

/// A column's tally of values, gathered in the codebook pass.
#[derive(Clone, Debug, Default)]
enum Tally {
    #[default]
    Unknown,
    Bool([u64; 2]),
    Int(FxHashMap<i64, u64>),
    UInt(FxHashMap<u64, u64>),
    Str(FxHashMap<Box<str>, u64>),
    /// Counts of the numbers seen, for quantiles (also integers past [`DISTINCT_LIMIT`]).
    Float(FloatTally),
    /// Strings, or integers that look like identifiers, past [`DISTINCT_LIMIT`] distinct values:
    /// only their row count is kept.
    Overflow(u64),
}

/// The most distinct values one column's tally may hold (categorical columns). Beyond it a
/// column is refused: picking its most frequent values exactly would need unbounded memory.
pub const DISTINCT_LIMIT: usize = 1 << 21;
/// The most distinct floats a float column's tally holds before it coarsens them.
pub const FLOAT_DISTINCT_LIMIT: usize = 1 << 20;

/// Counts of the values of a number column. Finite values are counted exactly while there are at most
/// [`FLOAT_DISTINCT_LIMIT`] distinct values; beyond that, values are truncated to fewer mantissa
/// bits (4 more at a time) until they fit. Truncation is monotone and nested, so the result
/// depends only on the multiset of values, not on their order or on how batches were split.
#[derive(Clone, Debug, PartialEq)]
pub struct FloatTally {
    counts: FxHashMap<u64, u64>,
    /// Mantissa bits dropped (0 = exact).
    level: u32,
    low: f64,
    high: f64,
    /// Finite values counted.
    n: u64,
    /// Counts of -inf, +inf and NaN, in that order.
    specials: [u64; 3],
}

impl Default for FloatTally {
    fn default() -> Self {
        FloatTally {
            counts: FxHashMap::default(),
            level: 0,
            low: f64::INFINITY,
            high: f64::NEG_INFINITY,
            n: 0,
            specials: [0; 3],
        }
    }
}

fn truncate(x: f64, level: u32) -> f64 {
    // +0.0 and -0.0 are one value.
    let x = if x == 0.0 { 0.0 } else { x };
    if level == 0 {
        x
    } else {
        f64::from_bits(x.to_bits() & !((1u64 << level) - 1))
    }
}

impl FloatTally {
    fn add(&mut self, x: f64, w: u64) {
        if w == 0 {
            return;
        }
        if !x.is_finite() {
            let k = if x.is_nan() { 2 } else { usize::from(x > 0.0) };
            self.specials[k] += w;
            return;
        }
        *self
            .counts
            .entry(truncate(x, self.level).to_bits())
            .or_default() += w;
        self.low = self.low.min(x);
        self.high = self.high.max(x);
        self.n += w;
        self.coarsen_to(self.level);
    }

    /// Truncates to at least `level`, then further until the distinct values fit.
    fn coarsen_to(&mut self, level: u32) {
        let mut level = level.max(self.level);
        while level != self.level || self.counts.len() > FLOAT_DISTINCT_LIMIT {
            if level == self.level {
                level = (level + 4).min(52);
            }
            let mut coarser = FxHashMap::default();
            for (bits, c) in self.counts.drain() {
                *coarser
                    .entry(truncate(f64::from_bits(bits), level).to_bits())
                    .or_default() += c;
            }
            self.counts = coarser;
            self.level = level;
            if level == 52 {
                break;
            }
        }
    }

    fn merge(&mut self, other: &FloatTally) {
        self.coarsen_to(other.level);
        for (bits, c) in &other.counts {
            *self
                .counts
                .entry(truncate(f64::from_bits(*bits), self.level).to_bits())
                .or_default() += c;
        }
        self.low = self.low.min(other.low);
        self.high = self.high.max(other.high);
        self.n += other.n;
        for (a, b) in self.specials.iter_mut().zip(other.specials) {
            *a += b;
        }
        self.coarsen_to(self.level);
    }

    /// The non-finite values seen, in code order, with their counts.
    fn special_values(&self) -> Vec<(f64, u64)> {
        [f64::NEG_INFINITY, f64::INFINITY, f64::NAN]
            .into_iter()
            .zip(self.specials)
            .filter(|(_, c)| *c > 0)
            .collect()
    }

    /// Distinct values seen (finite ones as counted, so at least 2^20 once coarsened).
    fn distinct(&self) -> usize {
        self.counts.len() + self.specials.iter().filter(|c| **c > 0).count()
    }

    /// The finite values, sorted, with their counts.
    fn sorted(&self) -> Vec<(f64, u64)> {
        let mut sorted: Vec<(f64, u64)> = self
            .counts
            .iter()
            .map(|(b, c)| (f64::from_bits(*b), *c))
            .collect();
        sorted.sort_unstable_by(|a, b| a.0.total_cmp(&b.0));
        sorted
    }

    /// Every value as a kept category (few distinct values), in total order.
    fn as_values(&self) -> Values {
        let mut v: Vec<f64> = self.sorted().into_iter().map(|e| e.0).collect();
        v.extend(self.special_values().into_iter().map(|e| e.0));
        Values::Float(v)
    }

    /// Bin edges at the order statistics `s[k*(n-1)/n_bins]` for k = 1..n_bins (integer
    /// division) of the sorted values s, without repeats and without the minimum, so every bin
    /// holds at least one value.
    #[cfg(test)]
    fn bins(&self, n_bins: usize) -> Values {
        self.binned(n_bins).0
    }

    /// The bins (see [`FloatTally::bins`]) and the observed values inside each.
    fn binned(&self, n_bins: usize) -> (Values, Vec<Within>) {
        let sorted = self.sorted();
        let (low, high) = (self.low, self.high);
        let mut edges: Vec<f64> = Vec::with_capacity(n_bins);
        let mut at = 0usize;
        let mut before = 0u128; // values before sorted[at]
        for k in 1..n_bins {
            let index = k as u128 * u128::from(self.n.saturating_sub(1)) / n_bins as u128;
            while at < sorted.len() && before + u128::from(sorted[at].1) <= index {
                before += u128::from(sorted[at].1);
                at += 1;
            }
            let Some(&(e, _)) = sorted.get(at) else { break };
            if e > low && e <= high && edges.last().is_none_or(|last| *last < e) {
                edges.push(e);
            }
        }
        let mut within = Vec::with_capacity(edges.len() + 1);
        let mut from = 0usize;
        for k in 0..=edges.len() {
            let to = match edges.get(k) {
                Some(e) => from + sorted[from..].partition_point(|s| s.0 < *e),
                None => sorted.len(),
            };
            // A coarsened tally holds truncated values, which may fall just outside the bin.
            let (lo, hi) = (
                if k == 0 { low } else { edges[k - 1] },
                edges.get(k).copied().unwrap_or(high),
            );
            let mut part: Vec<(f64, u64)> = Vec::with_capacity(to - from);
            for &(v, c) in &sorted[from..to] {
                // max/min, not clamp: clamp panics if a damaged tally ever had lo > hi.
                let v = v.max(lo).min(hi);
                match part.last_mut() {
                    Some(last) if last.0 == v => last.1 += c,
                    _ => part.push((v, c)),
                }
            }
            if part.is_empty() {
                within.clear();
                break;
            }
            within.push(Within::from_sorted(&part));
            from = to;
        }
        let specials = self.special_values().into_iter().map(|e| e.0).collect();
        (
            Values::Bins {
                edges,
                low,
                high,
                specials,
            },
            within,
        )
    }
}

impl Tally {
    fn for_kind(kind: Kind) -> Tally {
        match kind {
            Kind::Bool => Tally::Bool([0; 2]),
            Kind::Int | Kind::Time => Tally::Int(FxHashMap::default()),
            Kind::UInt => Tally::UInt(FxHashMap::default()),
            Kind::Str => Tally::Str(FxHashMap::default()),
            Kind::Float => Tally::Float(FloatTally::default()),
        }
    }

    /// The tally kind's number in a tally file.
    fn code(&self) -> u8 {
        match self {
            Tally::Unknown => 0,
            Tally::Bool(_) => 1,
            Tally::Int(_) => 2,
            Tally::UInt(_) => 3,
            Tally::Str(_) => 4,
            Tally::Float(_) => 5,
            Tally::Overflow(_) => 6,
        }
    }
}

/// A number tally of integer values.
fn int_tally(entries: impl Iterator<Item = (f64, u64)>) -> FloatTally {
    let mut t = FloatTally::default();
    entries.for_each(|(x, c)| t.add(x, c));
    t
}

/// What the cap on categories did to one column, for the caller's warning.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct CapReport {
    pub column: String,
    /// Distinct values that went into "other".
    pub values_capped: usize,
    /// Rows that hold one of them.
    pub rows_capped: u64,
}

/// One column's state in the codebook pass.
#[derive(Clone, Debug)]
struct ColumnTally {
    name: String,
    /// The value family of the column's Arrow type (None until a typed batch is seen).
    family: Option<Kind>,
    tally: Tally,
    nulls: u64,
}

impl ColumnTally {
    fn observe(&mut self, array: &dyn Array) -> Result<()> {
        if self.family_of(array)?.is_none() {
            self.nulls += array.len() as u64;
            return Ok(());
        }
        match dictionary_keys(&self.name, array)? {
            Some((keys, dict_values)) => {
                let mut weights = vec![0u64; dict_values.len()];
                for k in &keys {
                    match k {
                        Some(k) => weights[*k] += 1,
                        None => self.nulls += 1,
                    }
                }
                self.add(dict_values, &|i| weights[i])
            }
            None if self.add_dense(array)? => Ok(()),
            None => self.add(array, &|_| 1),
        }
    }

    /// The value family of `array` (None for the `null` type), which the column takes on at its
    /// first typed batch and must keep: a change of family between batches is an error.
    fn family_of(&mut self, array: &dyn Array) -> Result<Option<Kind>> {
        let Some(kind) = classify(&self.name, array.data_type())? else {
            return Ok(None);
        };
        match self.family {
            None => {
                self.family = Some(kind);
                self.tally = Tally::for_kind(kind);
            }
            Some(seen) if seen != kind => {
                return Err(Error::Schema(format!(
                    "column '{}' changed type between batches: {} values earlier, {} now; \
                     cast it to one type in every batch and file",
                    self.name,
                    seen.name(),
                    array.data_type()
                )))
            }
            Some(_) => {}
        }
        Ok(Some(kind))
    }

    /// Tallies a plain integer array whose values span a short range with a direct count per
    /// value instead of a hash per row. Returns false (having done nothing) otherwise.
    fn add_dense(&mut self, array: &dyn Array) -> Result<bool> {
        let unsigned = match self.tally {
            Tally::Int(_) => false,
            Tally::UInt(_) => true,
            _ => return Ok(false),
        };
        let walk = |f: &mut dyn FnMut(Option<i128>)| walk_ints(array, unsigned, f);
        let (mut low, mut high) = (i128::MAX, i128::MIN);
        walk(&mut |v| {
            if let Some(x) = v {
                low = low.min(x);
                high = high.max(x);
            }
        })?;
        if low > high || high - low >= DENSE_SPAN {
            return Ok(false);
        }
        let mut counts = vec![0u64; usize::try_from(high - low + 1).unwrap_or(0)];
        let mut nulls = 0u64;
        walk(&mut |v| match v {
            Some(x) => {
                if let Some(c) = usize::try_from(x - low)
                    .ok()
                    .and_then(|i| counts.get_mut(i))
                {
                    *c += 1;
                }
            }
            None => nulls += 1,
        })?;
        self.nulls += nulls;
        let seen = counts.iter().enumerate().filter(|(_, c)| **c > 0);
        match &mut self.tally {
            Tally::Int(map) => seen.for_each(|(i, c)| {
                let x = i64::try_from(low + i as i128).unwrap_or_default();
                *map.entry(x).or_default() += c;
            }),
            Tally::UInt(map) => seen.for_each(|(i, c)| {
                let x = u64::try_from(low + i as i128).unwrap_or_default();
                *map.entry(x).or_default() += c;
            }),
            _ => {}
        }
        Ok(true)
    }

    /// Adds each row of `array` with the weight `weight(row)`; rows of weight 0 are not values seen.
    fn add(&mut self, array: &dyn Array, weight: &dyn Fn(usize) -> u64) -> Result<()> {
        let mut row = 0usize;
        let mut nulls = 0u64;
        let mut next = || {
            let w = weight(row);
            row += 1;
            w
        };
        match &mut self.tally {
            Tally::Unknown => {}
            Tally::Bool(counts) => each_bool(array, |v| {
                let w = next();
                match v {
                    Some(b) => counts[usize::from(b)] += w,
                    None => nulls += w,
                }
            })?,
            Tally::Int(map) => each_i64(array, |v| {
                let w = next();
                match v {
                    Some(_) if w == 0 => {}
                    Some(x) => *map.entry(x).or_default() += w,
                    None => nulls += w,
                }
            })?,
            Tally::UInt(map) => each_u64(array, |v| {
                let w = next();
                match v {
                    Some(_) if w == 0 => {}
                    Some(x) => *map.entry(x).or_default() += w,
                    None => nulls += w,
                }
            })?,
            Tally::Str(map) => each_str(array, |v| {
                let w = next();
                match v {
                    Some(_) if w == 0 => {}
                    Some(x) => match map.get_mut(x) {
                        Some(c) => *c += w,
                        None => {
                            map.insert(x.into(), w);
                        }
                    },
                    None => nulls += w,
                }
            })?,
            Tally::Overflow(n) => {
                let mask = array.logical_nulls();
                for row in 0..array.len() {
                    let w = next();
                    if mask.as_ref().is_some_and(|m| m.is_null(row)) {
                        nulls += w;
                    } else {
                        *n += w;
                    }
                }
            }
            // Integers past the distinct limit are counted as numbers too.
            Tally::Float(seen) => each_number(array, |v| {
                let w = next();
                match v {
                    Some(x) => seen.add(x, w),
                    None => nulls += w,
                }
            })?,
        }
        self.nulls += nulls;
        Ok(())
    }

    /// Adds another tally of the same column (from another batch, file or worker).
    fn merge(&mut self, other: &ColumnTally) -> Result<()> {
        fn add_map<K: Clone + Eq + std::hash::Hash>(
            a: &mut FxHashMap<K, u64>,
            b: &FxHashMap<K, u64>,
        ) {
            for (k, c) in b {
                *a.entry(k.clone()).or_default() += c;
            }
        }
        if let (Some(mine), Some(theirs)) = (self.family, other.family) {
            if mine != theirs {
                return Err(Error::Schema(format!(
                    "column '{}' holds {} values in one part of the data and {} values in \
                     another; cast it to one type everywhere",
                    self.name,
                    mine.name(),
                    theirs.name()
                )));
            }
        }
        self.family = self.family.or(other.family);
        self.nulls += other.nulls;
        match (&mut self.tally, &other.tally) {
            (_, Tally::Unknown) => {}
            (mine @ Tally::Unknown, theirs) => *mine = theirs.clone(),
            (Tally::Bool(a), Tally::Bool(b)) => {
                a[0] += b[0];
                a[1] += b[1];
            }
            (Tally::Int(a), Tally::Int(b)) => add_map(a, b),
            (Tally::UInt(a), Tally::UInt(b)) => add_map(a, b),
            (Tally::Str(a), Tally::Str(b)) => add_map(a, b),
            (Tally::Float(a), Tally::Float(b)) => a.merge(b),
            (Tally::Overflow(a), Tally::Overflow(b)) => *a += b,
            (Tally::Overflow(a), Tally::Str(b)) => *a += b.values().sum::<u64>(),
            (Tally::Overflow(a), Tally::Int(b)) => *a += b.values().sum::<u64>(),
            (Tally::Overflow(a), Tally::UInt(b)) => *a += b.values().sum::<u64>(),
            (Tally::Overflow(a), Tally::Float(b)) => *a += b.n,
            (
                mine @ (Tally::Str(_) | Tally::Int(_) | Tally::UInt(_) | Tally::Float(_)),
                Tally::Overflow(b),
            ) => {
                let a: u64 = match mine {
                    Tally::Str(m) => m.values().sum(),
                    Tally::Int(m) => m.values().sum(),
                    Tally::UInt(m) => m.values().sum(),
                    Tally::Float(f) => f.n,
                    _ => 0,
                };
                *mine = Tally::Overflow(a + b);
            }
            // Integers on one side went past the distinct limit: both become number tallies.
            (Tally::Float(a), Tally::Int(b)) => {
                a.merge(&int_tally(b.iter().map(|(k, c)| (*k as f64, *c))))
            }
            (Tally::Float(a), Tally::UInt(b)) => {
                a.merge(&int_tally(b.iter().map(|(k, c)| (*k as f64, *c))))
            }
            (mine @ (Tally::Int(_) | Tally::UInt(_)), Tally::Float(b)) => {
                let mut a = match mine {
                    Tally::Int(m) => int_tally(m.iter().map(|(k, c)| (*k as f64, *c))),
                    Tally::UInt(m) => int_tally(m.iter().map(|(k, c)| (*k as f64, *c))),
                    _ => FloatTally::default(),
                };
                a.merge(b);
                *mine = Tally::Float(a);
            }
            _ => {
                return Err(Error::Schema(format!(
                    "column '{}' holds values of two types in different parts of the data; \
                     cast it to one type everywhere",
                    self.name,
                )))
            }
        }
        self.bound_distinct();
        Ok(())
    }

    /// The number of non-null values counted (None on overflow).
    fn total(&self) -> Option<u64> {
        let sum =
            |mut it: Box<dyn Iterator<Item = u64> + '_>| it.try_fold(0u64, |a, c| a.checked_add(c));
        match &self.tally {
            Tally::Unknown => Some(0),
            Tally::Bool(c) => c[0].checked_add(c[1]),
            Tally::Int(m) => sum(Box::new(m.values().copied())),
            Tally::UInt(m) => sum(Box::new(m.values().copied())),
            Tally::Str(m) => sum(Box::new(m.values().copied())),
            Tally::Float(f) => f.specials.iter().try_fold(f.n, |a, c| a.checked_add(*c)),
            Tally::Overflow(n) => Some(*n),
        }
    }

    /// Keeps a tally bounded: strings past [`DISTINCT_LIMIT`] distinct values keep only their
    /// count (an identifier), integers past it become a number tally (they can only be binned).
    fn bound_distinct(&mut self) {
        let over = |n: usize| n > DISTINCT_LIMIT;
        // Integers that look like keys (nearly all distinct, over a range at most twice their
        // number) stop being tallied: they are an identifier. Other integers become numbers.
        fn wide_ints(entries: Vec<(i128, u64)>, family: Option<Kind>) -> Tally {
            let n: u64 = entries.iter().map(|e| e.1).sum();
            let d = entries.len();
            let (lo, hi) = entries
                .iter()
                .fold((i128::MAX, i128::MIN), |(l, h), e| (l.min(e.0), h.max(e.0)));
            let keys = family != Some(Kind::Time) && kind::looks_like_keys(n, d, lo, hi);
            if keys {
                Tally::Overflow(n)
            } else {
                Tally::Float(int_tally(entries.into_iter().map(|(k, c)| (k as f64, c))))
            }
        }
        let family = self.family;
        let replaced = match &self.tally {
            Tally::Str(m) if over(m.len()) => Some(Tally::Overflow(m.values().sum())),
            Tally::Int(m) if over(m.len()) => Some(wide_ints(
                m.iter().map(|(k, c)| (i128::from(*k), *c)).collect(),
                family,
            )),
            Tally::UInt(m) if over(m.len()) => Some(wide_ints(
                m.iter().map(|(k, c)| (i128::from(*k), *c)).collect(),
                family,
            )),
            _ => None,
        };
        if let Some(t) = replaced {
            self.tally = t;
        }
    }
}

/// Each value of an integer or time array as an i128 (`unsigned`: the array holds unsigned
/// integers), or None for a null.
fn walk_ints(array: &dyn Array, unsigned: bool, f: &mut dyn FnMut(Option<i128>)) -> Result<()> {
    if unsigned {
        each_u64(array, |v| f(v.map(i128::from)))
    } else {
        each_i64(array, |v| f(v.map(i128::from)))
    }
}

/// Gathers the codebook in one pass over any number of batches.
#[derive(Clone, Debug)]
pub struct CodebookBuilder {
    columns: Vec<ColumnTally>,
    rows: u64,
}

impl CodebookBuilder {
    /// A builder for the named columns.
    pub fn new(names: Vec<String>) -> Self {
        let columns = names
            .into_iter()
            .map(|name| ColumnTally {
                name,
                family: None,
                tally: Tally::Unknown,
                nulls: 0,
            })
            .collect();
        CodebookBuilder { columns, rows: 0 }
    }

    /// Rows observed so far.
    pub fn rows(&self) -> u64 {
        self.rows
    }

    /// Tallies one batch (in parallel over columns).
    pub fn observe(&mut self, batch: &RecordBatch) -> Result<()> {
        check_names(self.columns.iter().map(|c| c.name.as_str()), batch)?;
        let token = crate::cancel::current();
        self.columns
            .par_iter_mut()
            .zip(batch.columns().par_iter())
            .try_for_each(|(col, array)| {
                token.check()?;
                col.observe(array.as_ref())?;
                col.bound_distinct();
                Ok::<(), Error>(())
            })?;
        self.rows += batch.num_rows() as u64;
        Ok(())
    }

    /// Adds another builder's tallies (the same columns, from other data).
    pub fn merge(&mut self, other: &CodebookBuilder) -> Result<()> {
        let mine: Vec<&str> = self.columns.iter().map(|c| c.name.as_str()).collect();
        let theirs: Vec<&str> = other.columns.iter().map(|c| c.name.as_str()).collect();
        if mine != theirs {
            return Err(Error::Schema(format!(
                "cannot merge codebook tallies of columns {mine:?} and {theirs:?}"
            )));
        }
        // Each side's counts add up to its rows, so no count can overflow once the rows do not.
        let rows = self.rows.checked_add(other.rows).ok_or_else(|| {
            Error::ResourceLimit("the merged tallies would count more than 2^64 rows".into())
        })?;
        for (a, b) in self.columns.iter_mut().zip(&other.columns) {
            a.merge(b)?;
        }
        self.rows = rows;
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantile_edges_skip_repeats_and_the_minimum() {
        let mut tally = FloatTally::default();
        for x in [3.0, 1.0, 9.0, 1.0, 2.0, 4.0, 1.0, 3.0] {
            tally.add(x, 1);
        }
        let Values::Bins {
            edges, low, high, ..
        } = tally.bins(4)
        else {
            panic!("not bins")
        };
        // k*(n-1)/4 for k=1,2,3 with n=8: indexes 1, 3, 5 -> 1.0 (the minimum, dropped), 2.0, 3.0.
        assert_eq!(edges, vec![2.0, 3.0]);
        assert_eq!((low, high), (1.0, 9.0));
    }

    #[test]
    fn coarsening_does_not_depend_on_order_or_split() {
        let values: Vec<f64> = (0..(FLOAT_DISTINCT_LIMIT as u64 + 5000))
            .map(|k| 1.0 + (k as f64) * 1e-9)
            .collect();
        let mut forward = FloatTally::default();
        values.iter().for_each(|x| forward.add(*x, 1));
        let mut halves = [FloatTally::default(), FloatTally::default()];
        values
            .iter()
            .rev()
            .enumerate()
            .for_each(|(i, x)| halves[i % 2].add(*x, 1));
        let [mut a, b] = halves;
        a.merge(&b);
        assert!(forward.level > 0);
        assert_eq!(forward.level, a.level);
        assert_eq!(forward.counts, a.counts);
        assert_eq!(forward.bins(10), a.bins(10));
    }
}
