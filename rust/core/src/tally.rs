//! The codebook pass: exact tallies of each column's values, mergeable across batches, files and
//! workers, and the choice of each column's kind (categorical, numeric, constant, left out) with
//! its codes, tail table and within-bin values.

use arrow_array::{Array, RecordBatch};
use rayon::prelude::*;
use rustc_hash::FxHashMap;

use crate::bytes::{Reader, Writer};
use crate::codebook::{
    check_names, Codebook, ColumnCode, Shape, Values, DENSE_SPAN, MAX_CATEGORIES,
};
use crate::error::{Error, Result};
use crate::shape::{Tail, Within, TAIL_LIMIT};
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
    /// Strings past [`DISTINCT_LIMIT`] distinct values: only their row count is kept.
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
                let v = v.clamp(lo, hi);
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
        let Some(kind) = classify(&self.name, array.data_type())? else {
            self.nulls += array.len() as u64;
            return Ok(());
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

    /// Tallies a plain integer array whose values span a short range with a direct count per
    /// value instead of a hash per row. Returns false (having done nothing) otherwise.
    fn add_dense(&mut self, array: &dyn Array) -> Result<bool> {
        let unsigned = match self.tally {
            Tally::Int(_) => false,
            Tally::UInt(_) => true,
            _ => return Ok(false),
        };
        let walk = |f: &mut dyn FnMut(Option<i128>)| -> Result<()> {
            if unsigned {
                each_u64(array, |v| f(v.map(i128::from)))
            } else {
                each_i64(array, |v| f(v.map(i128::from)))
            }
        };
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
            Tally::Overflow(n) => each_str(array, |v| {
                let w = next();
                match v {
                    Some(_) => *n += w,
                    None => nulls += w,
                }
            })?,
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
            (mine @ Tally::Str(_), Tally::Overflow(b)) => {
                let a: u64 = match mine {
                    Tally::Str(m) => m.values().sum(),
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
        let replaced = match &self.tally {
            Tally::Str(m) if over(m.len()) => Some(Tally::Overflow(m.values().sum())),
            Tally::Int(m) if over(m.len()) => Some(Tally::Float(int_tally(
                m.iter().map(|(k, c)| (*k as f64, *c)),
            ))),
            Tally::UInt(m) if over(m.len()) => Some(Tally::Float(int_tally(
                m.iter().map(|(k, c)| (*k as f64, *c)),
            ))),
            _ => None,
        };
        if let Some(t) = replaced {
            self.tally = t;
        }
    }

    /// Decides how the column is modelled and fixes its codes (docs/column-kinds.md has the
    /// rules): categorical values with a tail table behind "other", numeric quantile bins with
    /// the values inside each, or left out of the model (only nulls, or an identifier).
    fn finish(self, max_categories: usize, n_bins: usize, choice: KindChoice) -> Result<Finished> {
        let ColumnTally {
            name,
            family,
            tally,
            nulls,
        } = self;
        let has_null = nulls > 0;
        let leave = |message: String| {
            Ok(Finished::Left(Note {
                column: name.clone(),
                kind: "left out",
                message,
            }))
        };
        if choice == KindChoice::Leave {
            return leave(format!("column '{name}' is left out, as asked"));
        }
        let (Some(family), false) = (family, matches!(tally, Tally::Unknown)) else {
            return leave(format!(
                "column '{name}' holds only nulls ({nulls} rows); it carries no information and \
                 is left out of the model"
            ));
        };
        let identifier = |n: u64, d: usize| {
            leave(format!(
                "column '{name}' looks like an identifier ({d} distinct values in {n} rows), so \
                 it is left out of the model and never sampled; to keep it, pass kinds={{'{name}': \
                 'categorical'}} (or 'numeric'), or --kind {name}=categorical"
            ))
        };
        let numeric_refused = || {
            Err(Error::Invalid(format!(
                "column '{name}' holds {} values, which cannot be modelled as numeric; use \
                 'categorical' for it",
                family.name()
            )))
        };
        let (values, shape, cap) = match tally {
            Tally::Unknown => return leave(format!("column '{name}' holds only nulls")),
            Tally::Bool(c) => {
                if choice == KindChoice::Numeric {
                    return numeric_refused();
                }
                let seen = [(false, c[0]), (true, c[1])]
                    .into_iter()
                    .filter(|(_, n)| *n > 0)
                    .collect();
                categorical(&name, seen, max_categories, has_null, Values::Bool)
            }
            Tally::Str(m) => {
                if choice == KindChoice::Numeric {
                    return numeric_refused();
                }
                let n: u64 = m.values().sum();
                if choice == KindChoice::Auto && looks_like_identifier(n, m.len()) {
                    return identifier(n, m.len());
                }
                categorical(
                    &name,
                    m.into_iter().collect(),
                    max_categories,
                    has_null,
                    Values::Str,
                )
            }
            Tally::Overflow(n) => {
                if choice == KindChoice::Categorical {
                    return Err(too_many_distinct(&name));
                }
                return identifier(n, DISTINCT_LIMIT);
            }
            Tally::Int(m) => {
                let n: u64 = m.values().sum();
                let d = m.len();
                if choice == KindChoice::Auto && family != Kind::Time && d > n_bins {
                    let span = m
                        .keys()
                        .max()
                        .zip(m.keys().min())
                        .map(|(h, l)| i128::from(*h) - i128::from(*l) + 1);
                    if looks_like_identifier(n, d) && span.is_some_and(|s| s <= 2 * d as i128) {
                        return identifier(n, d);
                    }
                }
                if wants_bins(choice, d, n_bins) {
                    numeric(
                        &int_tally(m.iter().map(|(k, c)| (*k as f64, *c))),
                        n_bins,
                        true,
                    )
                } else {
                    categorical(
                        &name,
                        m.into_iter().collect(),
                        max_categories,
                        has_null,
                        Values::Int,
                    )
                }
            }
            Tally::UInt(m) => {
                let n: u64 = m.values().sum();
                let d = m.len();
                if choice == KindChoice::Auto && d > n_bins {
                    let span = m
                        .keys()
                        .max()
                        .zip(m.keys().min())
                        .map(|(h, l)| i128::from(*h) - i128::from(*l) + 1);
                    if looks_like_identifier(n, d) && span.is_some_and(|s| s <= 2 * d as i128) {
                        return identifier(n, d);
                    }
                }
                if wants_bins(choice, d, n_bins) {
                    numeric(
                        &int_tally(m.iter().map(|(k, c)| (*k as f64, *c))),
                        n_bins,
                        true,
                    )
                } else {
                    categorical(
                        &name,
                        m.into_iter().collect(),
                        max_categories,
                        has_null,
                        Values::UInt,
                    )
                }
            }
            Tally::Float(f) => {
                let finite_only_specials = f.n == 0;
                let integral_family = family != Kind::Float;
                if !finite_only_specials && wants_bins(choice, f.distinct(), n_bins) {
                    let integral = integral_family
                        || f.counts.keys().all(|b| f64::from_bits(*b).fract() == 0.0);
                    numeric(&f, n_bins, integral)
                } else if integral_family {
                    // An integer column past the distinct limit can only be binned.
                    return Err(too_many_distinct(&name));
                } else if f.level > 0 {
                    return Err(Error::TooManyCategories(format!(
                        "column '{name}' has more than {FLOAT_DISTINCT_LIMIT} distinct values \
                         and cannot be categorical; let it be numeric (binned)"
                    )));
                } else {
                    let Values::Float(v) = f.as_values() else {
                        return Err(Error::Invalid("float values expected".into()));
                    };
                    let counts = f
                        .sorted()
                        .into_iter()
                        .map(|e| e.1)
                        .chain(f.special_values().into_iter().map(|e| e.1));
                    let seen = v.into_iter().map(TotalF64).zip(counts).collect();
                    categorical(&name, seen, max_categories, has_null, |v: Vec<TotalF64>| {
                        Values::Float(v.into_iter().map(|x| x.0).collect())
                    })
                }
            }
        };
        let has_other = cap.is_some();
        let column = ColumnCode::build(name, family, values, has_other, has_null, shape)?;
        Ok(Finished::Kept(Box::new(column), cap))
    }
}

/// How the caller wants a column modelled.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum KindChoice {
    /// Decide from the data.
    Auto,
    /// Keep values as categories (rare ones behind "other").
    Categorical,
    /// Quantile bins (numbers and times only).
    Numeric,
    /// Leave the column out of the model.
    Leave,
}

impl KindChoice {
    /// The choice named `name` ("auto", "categorical", "numeric" or "ignore").
    pub fn from_name(name: &str) -> Option<KindChoice> {
        Some(match name {
            "auto" => KindChoice::Auto,
            "categorical" => KindChoice::Categorical,
            "numeric" => KindChoice::Numeric,
            "ignore" => KindChoice::Leave,
            _ => return None,
        })
    }
}

/// Something the caller should tell the user about one column.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Note {
    pub column: String,
    /// "left out" or "constant".
    pub kind: &'static str,
    pub message: String,
}

/// A column's fate at the end of the codebook pass.
enum Finished {
    Kept(Box<ColumnCode>, Option<CapReport>),
    Left(Note),
}

/// Rows needed before a column can look like an identifier.
const IDENTIFIER_MIN_ROWS: u64 = 20;

/// Nearly every value distinct (at least 95%), in enough rows to say so.
fn looks_like_identifier(n: u64, distinct: usize) -> bool {
    n >= IDENTIFIER_MIN_ROWS && distinct as u128 * 20 >= u128::from(n) * 19
}

fn wants_bins(choice: KindChoice, distinct: usize, n_bins: usize) -> bool {
    match choice {
        KindChoice::Numeric => true,
        KindChoice::Categorical | KindChoice::Leave => false,
        KindChoice::Auto => distinct > n_bins,
    }
}

fn too_many_distinct(name: &str) -> Error {
    Error::TooManyCategories(format!(
        "column '{name}' has more than {DISTINCT_LIMIT} distinct values, so it looks like an \
         identifier; treewise keeps at most {MAX_CATEGORIES} codes per column and cannot find \
         the most frequent values of a column this wide in bounded memory. Leave it out \
         (kinds={{'{name}': 'ignore'}} or columns=), or bucket it first (by prefix, range or hash)"
    ))
}

/// A number tally of integer values.
fn int_tally(entries: impl Iterator<Item = (f64, u64)>) -> FloatTally {
    let mut t = FloatTally::default();
    entries.for_each(|(x, c)| t.add(x, c));
    t
}

type Column = (Values, Shape, Option<CapReport>);

fn numeric(f: &FloatTally, n_bins: usize, integral: bool) -> Column {
    let (values, within) = f.binned(n_bins);
    let shape = Shape {
        tail: None,
        within,
        integral,
    };
    (values, shape, None)
}

/// A float ordered by `total_cmp`, so that float categories sort like the other kinds.
#[derive(Clone, Copy, Debug)]
struct TotalF64(f64);

impl PartialEq for TotalF64 {
    fn eq(&self, other: &Self) -> bool {
        self.0.total_cmp(&other.0).is_eq()
    }
}
impl Eq for TotalF64 {}
impl PartialOrd for TotalF64 {
    fn partial_cmp(&self, other: &Self) -> Option<std::cmp::Ordering> {
        Some(self.cmp(other))
    }
}
impl Ord for TotalF64 {
    fn cmp(&self, other: &Self) -> std::cmp::Ordering {
        self.0.total_cmp(&other.0)
    }
}

/// Categorical codes: the most frequent values, and the rest as a tail table behind "other".
fn categorical<T: Ord>(
    name: &str,
    seen: Vec<(T, u64)>,
    max_categories: usize,
    has_null: bool,
    make: impl Fn(Vec<T>) -> Values,
) -> Column {
    let (kept, cap, dropped) = keep_most_frequent(name, seen, max_categories, has_null);
    let tail = cap.as_ref().map(|_| {
        // `dropped` comes most frequent first: the table keeps the head, the rest is summed.
        let mut dropped = dropped;
        let rest = dropped.split_off(TAIL_LIMIT.min(dropped.len()));
        dropped.sort_unstable_by(|a, b| a.0.cmp(&b.0));
        let (values, counts): (Vec<T>, Vec<u64>) = dropped.into_iter().unzip();
        Tail {
            values: make(values),
            counts,
            rest_values: rest.len() as u64,
            rest_rows: rest.iter().map(|e| e.1).sum(),
        }
    });
    let shape = Shape {
        tail,
        within: Vec::new(),
        integral: false,
    };
    (make(kept), shape, cap)
}

/// Keeps the most frequent values (ties: the smaller value) so that the codes, counting "other" and
/// null, fit in `max_categories`; returns the kept values sorted, what went to "other", and the
/// values that went there (most frequent first).
fn keep_most_frequent<T: Ord>(
    name: &str,
    mut seen: Vec<(T, u64)>,
    max_categories: usize,
    has_null: bool,
) -> (Vec<T>, Option<CapReport>, Vec<(T, u64)>) {
    let fits = seen.len() + usize::from(has_null) <= max_categories;
    let mut cap = None;
    let mut dropped = Vec::new();
    if !fits {
        let keep = max_categories.saturating_sub(1 + usize::from(has_null));
        seen.sort_unstable_by(|a, b| b.1.cmp(&a.1).then_with(|| a.0.cmp(&b.0)));
        dropped = seen.split_off(keep.min(seen.len()));
        cap = Some(CapReport {
            column: name.to_string(),
            values_capped: dropped.len(),
            rows_capped: dropped.iter().map(|(_, n)| n).sum(),
        });
    }
    let mut kept: Vec<T> = seen.into_iter().map(|(v, _)| v).collect();
    kept.sort_unstable();
    (kept, cap, dropped)
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
        self.columns
            .par_iter_mut()
            .zip(batch.columns().par_iter())
            .try_for_each(|(col, array)| {
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

    /// Fixes the codes. `max_categories` caps each column's codes (counting "other" and null);
    /// numbers get at most `n_bins` quantile bins; `kinds` overrides the choice for named columns.
    pub fn finish(
        self,
        max_categories: usize,
        n_bins: usize,
        kinds: &[(String, KindChoice)],
    ) -> Result<Learned> {
        if !(2..=MAX_CATEGORIES).contains(&max_categories) {
            return Err(Error::Invalid(format!(
                "max_categories must be between 2 and {MAX_CATEGORIES}, got {max_categories}"
            )));
        }
        if !(1..MAX_CATEGORIES).contains(&n_bins) {
            return Err(Error::Invalid(format!(
                "n_bins must be between 1 and {}, got {n_bins}",
                MAX_CATEGORIES - 1
            )));
        }
        if let Some((name, _)) = kinds
            .iter()
            .find(|(n, _)| !self.columns.iter().any(|c| c.name == *n))
        {
            return Err(Error::Schema(format!(
                "kinds names the column '{name}', which is not one of the columns being fitted"
            )));
        }
        if self.rows == 0 {
            return Err(Error::Data(
                "the data has 0 rows; a dependency tree needs at least one row".to_string(),
            ));
        }
        let finished: Vec<Finished> = self
            .columns
            .into_par_iter()
            .map(|c| {
                let choice = kinds
                    .iter()
                    .find(|(n, _)| *n == c.name)
                    .map_or(KindChoice::Auto, |(_, k)| *k);
                c.finish(max_categories, n_bins, choice)
            })
            .collect::<Result<_>>()?;
        let mut columns = Vec::new();
        let mut caps = Vec::new();
        let mut notes = Vec::new();
        for f in finished {
            match f {
                Finished::Kept(column, cap) => {
                    if column.cardinality() == 1 {
                        notes.push(Note {
                            column: column.name().to_string(),
                            kind: "constant",
                            message: format!(
                                "column '{}' holds a single value; it is kept, carries no \
                                 information and is never the root",
                                column.name()
                            ),
                        });
                    }
                    columns.push(*column);
                    caps.extend(cap);
                }
                Finished::Left(note) => notes.push(note),
            }
        }
        if columns.is_empty() {
            let why: Vec<&str> = notes.iter().map(|n| n.message.as_str()).collect();
            return Err(Error::Data(format!(
                "no column is left to model: {}",
                why.join("; ")
            )));
        }
        Ok(Learned {
            codebook: Codebook::new(columns)?,
            caps,
            notes,
        })
    }
}

/// The end of a codebook pass: the codebook, what the cap did, and notes on columns that were
/// left out or are constant.
#[derive(Clone, Debug)]
pub struct Learned {
    pub codebook: Codebook,
    pub caps: Vec<CapReport>,
    pub notes: Vec<Note>,
}

// -- serialization of the codebook pass, so that workers can send their tallies ----------------

fn sorted_entries<K: Ord + Clone>(map: &FxHashMap<K, u64>) -> Vec<(K, u64)> {
    let mut entries: Vec<(K, u64)> = map.iter().map(|(k, c)| (k.clone(), *c)).collect();
    entries.sort_unstable_by(|a, b| a.0.cmp(&b.0));
    entries
}

fn corrupt_tally(what: &str) -> Error {
    Error::CorruptModel(format!("codebook tallies: {what}"))
}

fn read_map<K: Ord + Eq + Clone + std::hash::Hash>(
    r: &mut Reader<'_>,
    entry_size: usize,
    mut key: impl FnMut(&mut Reader<'_>) -> Result<K>,
) -> Result<FxHashMap<K, u64>> {
    let n = r.len(entry_size)?;
    let mut map = FxHashMap::default();
    let mut last: Option<K> = None;
    for _ in 0..n {
        let k = key(r)?;
        let c = r.u64()?;
        if last.as_ref().is_some_and(|l| *l >= k) {
            return Err(corrupt_tally("keys are not strictly increasing"));
        }
        last = Some(k.clone());
        map.insert(k, c);
    }
    Ok(map)
}

impl CodebookBuilder {
    /// Writes the tallies (keys sorted, so equal tallies give equal bytes).
    pub fn write(&self, w: &mut Writer) {
        w.u64(self.rows);
        w.len(self.columns.len());
        for col in &self.columns {
            w.str(&col.name);
            w.u64(col.nulls);
            w.u8(col.family.map_or(0, |k| family_code(k) + 1));
            match &col.tally {
                Tally::Unknown => w.u8(0),
                Tally::Bool(c) => {
                    w.u8(1);
                    w.u64(c[0]);
                    w.u64(c[1]);
                }
                Tally::Int(m) => {
                    w.u8(2);
                    let e = sorted_entries(m);
                    w.len(e.len());
                    e.iter().for_each(|(k, c)| {
                        w.i64(*k);
                        w.u64(*c);
                    });
                }
                Tally::UInt(m) => {
                    w.u8(3);
                    let e = sorted_entries(m);
                    w.len(e.len());
                    e.iter().for_each(|(k, c)| {
                        w.u64(*k);
                        w.u64(*c);
                    });
                }
                Tally::Str(m) => {
                    w.u8(4);
                    let e = sorted_entries(m);
                    w.len(e.len());
                    e.iter().for_each(|(k, c)| {
                        w.str(k);
                        w.u64(*c);
                    });
                }
                Tally::Float(f) => {
                    w.u8(5);
                    w.u32(f.level);
                    w.f64(f.low);
                    w.f64(f.high);
                    w.u64(f.n);
                    f.specials.iter().for_each(|c| w.u64(*c));
                    let e = sorted_entries(&f.counts);
                    w.len(e.len());
                    e.iter().for_each(|(k, c)| {
                        w.u64(*k);
                        w.u64(*c);
                    });
                }
                Tally::Overflow(n) => {
                    w.u8(6);
                    w.u64(*n);
                }
            }
        }
    }

    /// Reads tallies written by [`CodebookBuilder::write`], checking every length and count.
    pub fn read(r: &mut Reader<'_>) -> Result<Self> {
        let rows = r.u64()?;
        let n = r.len(8 + 8 + 1)?;
        let mut columns = Vec::with_capacity(n);
        for _ in 0..n {
            let name = r.str()?;
            let nulls = r.u64()?;
            let family = match r.u8()? {
                0 => None,
                k => Some(family_from_code(k - 1).ok_or_else(|| corrupt_tally("unknown family"))?),
            };
            let tally = match r.u8()? {
                0 => Tally::Unknown,
                1 => Tally::Bool([r.u64()?, r.u64()?]),
                2 => Tally::Int(read_map(r, 16, |r| r.i64())?),
                3 => Tally::UInt(read_map(r, 16, |r| r.u64())?),
                4 => Tally::Str(read_map(r, 16, |r| r.str().map(String::into_boxed_str))?),
                5 => {
                    let level = r.u32()?;
                    let (low, high, count) = (r.f64()?, r.f64()?, r.u64()?);
                    let specials = [r.u64()?, r.u64()?, r.u64()?];
                    let counts = read_map(r, 16, |r| r.u64())?;
                    let total = counts.values().try_fold(0u64, |acc, c| acc.checked_add(*c));
                    let finite = counts.keys().all(|b| f64::from_bits(*b).is_finite());
                    if level > 52 || total != Some(count) || !finite {
                        return Err(corrupt_tally("a float tally is inconsistent"));
                    }
                    Tally::Float(FloatTally {
                        counts,
                        level,
                        low,
                        high,
                        n: count,
                        specials,
                    })
                }
                6 => Tally::Overflow(r.u64()?),
                _ => return Err(corrupt_tally("unknown tally kind")),
            };
            let suits = matches!(
                (family, &col_kind(&tally)),
                (None, 0)
                    | (Some(Kind::Bool), 1)
                    | (Some(Kind::Int | Kind::Time), 2 | 5)
                    | (Some(Kind::UInt), 3 | 5)
                    | (Some(Kind::Str), 4 | 6)
                    | (Some(Kind::Float), 5)
            );
            if !suits {
                return Err(corrupt_tally("a tally does not suit its column's type"));
            }
            let too_wide = match &tally {
                Tally::Int(m) => m.len() > DISTINCT_LIMIT,
                Tally::UInt(m) => m.len() > DISTINCT_LIMIT,
                Tally::Str(m) => m.len() > DISTINCT_LIMIT,
                _ => false,
            };
            if too_wide {
                return Err(corrupt_tally("a tally holds more values than the limit"));
            }
            let col = ColumnTally {
                name,
                family,
                tally,
                nulls,
            };
            // Every row is a value or a null: with this checked, no later sum can overflow.
            if col.total().and_then(|t| t.checked_add(col.nulls)) != Some(rows) {
                return Err(corrupt_tally("a column's counts do not add up to the rows"));
            }
            columns.push(col);
        }
        Ok(CodebookBuilder { columns, rows })
    }
}

fn col_kind(t: &Tally) -> u8 {
    t.code()
}

/// A value family's number in tally and codebook files.
pub(crate) fn family_code(kind: Kind) -> u8 {
    match kind {
        Kind::Bool => 0,
        Kind::Int => 1,
        Kind::UInt => 2,
        Kind::Str => 3,
        Kind::Float => 4,
        Kind::Time => 5,
    }
}

/// The inverse of [`family_code`].
pub(crate) fn family_from_code(code: u8) -> Option<Kind> {
    Some(match code {
        0 => Kind::Bool,
        1 => Kind::Int,
        2 => Kind::UInt,
        3 => Kind::Str,
        4 => Kind::Float,
        5 => Kind::Time,
        _ => return None,
    })
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

    #[test]
    fn cap_keeps_the_most_frequent_and_breaks_ties_by_value() {
        let seen = vec![(5i64, 3), (1, 3), (2, 10), (9, 1)];
        let (kept, cap, dropped) = keep_most_frequent("c", seen, 3, false);
        assert_eq!(kept, vec![1, 2]);
        let cap = cap.unwrap_or_else(|| panic!("no cap"));
        assert_eq!((cap.values_capped, cap.rows_capped), (2, 4));
        assert_eq!(dropped, vec![(5, 3), (9, 1)]);
    }

    fn finish_one(values: Vec<Option<i64>>, choice: KindChoice) -> Result<Learned> {
        use arrow_array::{ArrayRef, Int64Array};
        use std::sync::Arc;
        let array: ArrayRef = Arc::new(Int64Array::from(values));
        let batch = RecordBatch::try_from_iter([("x", array)])
            .map_err(|e| Error::Invalid(e.to_string()))?;
        let mut b = CodebookBuilder::new(vec!["x".into()]);
        b.observe(&batch)?;
        b.finish(128, 10, &[("x".into(), choice)])
    }

    #[test]
    fn many_integers_are_binned_and_few_are_categories() -> Result<()> {
        let many: Vec<Option<i64>> = (0..1000).map(|k| Some((k * 7) % 300)).collect();
        let learned = finish_one(many.clone(), KindChoice::Auto)?;
        let col = &learned.codebook.columns()[0];
        assert_eq!(col.model_kind(), "numeric");
        assert!(col.shape().integral);
        assert_eq!(col.shape().within.len(), col.values().len());
        let few: Vec<Option<i64>> = (0..1000).map(|k| Some(k % 4)).collect();
        let learned = finish_one(few, KindChoice::Auto)?;
        assert_eq!(
            learned.codebook.columns()[0].values(),
            &Values::Int(vec![0, 1, 2, 3])
        );
        // Forced categorical past the cap: the rest goes to "other" with a tail table.
        let learned = finish_one(many, KindChoice::Categorical)?;
        let col = &learned.codebook.columns()[0];
        let tail = col
            .shape()
            .tail
            .as_ref()
            .unwrap_or_else(|| panic!("no tail"));
        assert_eq!(tail.counts.len() + col.values().len(), 300);
        assert_eq!(
            Some(tail.rows()),
            learned.caps.first().map(|c| c.rows_capped)
        );
        Ok(())
    }

    #[test]
    fn row_numbers_are_identifiers_and_left_out() -> Result<()> {
        let ids: Vec<Option<i64>> = (0..500).map(Some).collect();
        let err = finish_one(ids.clone(), KindChoice::Auto);
        assert!(matches!(err, Err(Error::Data(m)) if m.contains("identifier")));
        let kept = finish_one(ids, KindChoice::Numeric)?;
        assert_eq!(kept.codebook.columns()[0].model_kind(), "numeric");
        Ok(())
    }
}
