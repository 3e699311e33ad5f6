//! The one-pass fit: pair counts taken with provisional codes (one per distinct value, in the
//! order first seen) while the tallies are still being gathered. When the codebook is fixed, each
//! provisional code maps to its final code and the counts are recoded: a coarser table is a sum
//! of rows and columns of a finer one, so the result equals counting again with the final codes,
//! bit for bit. A column with more than [`PROVISIONAL_CODES`] distinct values, or provisional
//! tables past the cell limit, ends the counting: the pass goes on as a plain tally and the
//! caller counts in a second pass.

use arrow_array::{Array, RecordBatch};
use rayon::prelude::*;
use rustc_hash::FxHashMap;

use super::kind::Learned;
use super::{walk_ints, CodebookBuilder, ColumnTally, KindChoice, Tally};
use crate::codebook::{canonical, check_names, Scalar, DENSE_SPAN, UNSEEN};
use crate::error::{Error, Result};
use crate::stats::{cell_count, PairStats};
use crate::values::{dictionary_keys, each_bool, each_f64, each_str, Kind};

/// The most provisional codes one column may take before the pass stops counting.
pub const PROVISIONAL_CODES: usize = 4096;

/// One distinct value of a column, in provisional code order.
#[derive(Clone, Debug)]
enum Value {
    Null,
    Bool(bool),
    Int(i64),
    UInt(u64),
    Str(Box<str>),
    Float(f64),
}

impl Value {
    fn scalar(&self) -> Scalar<'_> {
        match self {
            Value::Null => Scalar::Null,
            Value::Bool(b) => Scalar::Bool(*b),
            Value::Int(x) => Scalar::Int(*x),
            Value::UInt(x) => Scalar::UInt(*x),
            Value::Str(s) => Scalar::Str(s),
            Value::Float(x) => Scalar::Float(*x),
        }
    }
}

/// The column has more distinct values than [`PROVISIONAL_CODES`].
struct Full;

/// A column's provisional codes: its distinct values so far and a lookup per value family.
#[derive(Default)]
struct Dict {
    values: Vec<Value>,
    null: Option<u16>,
    bools: [Option<u16>; 2],
    ints: FxHashMap<i64, u16>,
    uints: FxHashMap<u64, u16>,
    strs: FxHashMap<Box<str>, u16>,
    floats: FxHashMap<u64, u16>,
    /// Codes of the integers in `base..base + dense.len()` by direct index (UNSEEN: not seen
    /// yet), while the column's integers span less than [`DENSE_SPAN`].
    dense: Vec<u16>,
    base: i128,
    /// The integers spread too wide for the direct index: hashing only, from now on.
    wide: bool,
}

impl Dict {
    fn push(&mut self, value: Value) -> std::result::Result<u16, Full> {
        if self.values.len() >= PROVISIONAL_CODES {
            return Err(Full);
        }
        let code = u16::try_from(self.values.len()).map_err(|_| Full)?;
        self.values.push(value);
        Ok(code)
    }

    fn null_code(&mut self) -> std::result::Result<u16, Full> {
        match self.null {
            Some(c) => Ok(c),
            None => {
                let c = self.push(Value::Null)?;
                self.null = Some(c);
                Ok(c)
            }
        }
    }

    /// Appends the provisional codes of `array` (of value family `family`, None for the `null`
    /// type) to `out`; Ok(false) when the column ran out of provisional codes.
    fn encode(
        &mut self,
        name: &str,
        family: Option<Kind>,
        array: &dyn Array,
        out: &mut Vec<u16>,
    ) -> Result<bool> {
        let start = out.len();
        let done = match dictionary_keys(name, array)? {
            Some((keys, dict_values)) => {
                let mut dict_codes = Vec::with_capacity(dict_values.len());
                if !self.encode_plain(family, dict_values, &mut dict_codes)? {
                    return Ok(false);
                }
                let null = if keys.iter().any(Option::is_none) {
                    match self.null_code() {
                        Ok(c) => c,
                        Err(Full) => return Ok(false),
                    }
                } else {
                    UNSEEN
                };
                out.extend(keys.iter().map(|k| k.map_or(null, |k| dict_codes[k])));
                true
            }
            None => self.encode_plain(family, array, out)?,
        };
        debug_assert!(!done || out.len() - start == array.len());
        Ok(done)
    }

    fn encode_plain(
        &mut self,
        family: Option<Kind>,
        array: &dyn Array,
        out: &mut Vec<u16>,
    ) -> Result<bool> {
        out.reserve(array.len());
        let mut full = false;
        match family {
            None => match self.null_code() {
                Ok(c) => out.extend(std::iter::repeat_n(c, array.len())),
                Err(Full) => full = true,
            },
            Some(Kind::Bool) => each_bool(array, |v| {
                let code = match v {
                    None => self.null_code(),
                    Some(b) => match self.bools[usize::from(b)] {
                        Some(c) => Ok(c),
                        None => self.push(Value::Bool(b)).inspect(|c| {
                            self.bools[usize::from(b)] = Some(*c);
                        }),
                    },
                };
                out.push(code.unwrap_or_else(|Full| {
                    full = true;
                    0
                }));
            })?,
            Some(Kind::Int | Kind::Time) => return self.encode_ints(array, false, out),
            Some(Kind::UInt) => return self.encode_ints(array, true, out),
            Some(Kind::Str) => each_str(array, |v| {
                let code = match v {
                    None => self.null_code(),
                    Some(s) => match self.strs.get(s) {
                        Some(c) => Ok(*c),
                        None => self.push(Value::Str(s.into())).inspect(|c| {
                            self.strs.insert(s.into(), *c);
                        }),
                    },
                };
                out.push(code.unwrap_or_else(|Full| {
                    full = true;
                    0
                }));
            })?,
            Some(Kind::Float) => each_f64(array, |v| {
                let code = match v {
                    None => self.null_code(),
                    Some(x) => {
                        let x = canonical(x);
                        match self.floats.get(&x.to_bits()) {
                            Some(c) => Ok(*c),
                            None => self.push(Value::Float(x)).inspect(|c| {
                                self.floats.insert(x.to_bits(), *c);
                            }),
                        }
                    }
                };
                out.push(code.unwrap_or_else(|Full| {
                    full = true;
                    0
                }));
            })?,
        }
        Ok(!full)
    }

    /// Integers: by direct index while they span a short range, else by hash.
    fn encode_ints(
        &mut self,
        array: &dyn Array,
        unsigned: bool,
        out: &mut Vec<u16>,
    ) -> Result<bool> {
        if let Some(done) = self.encode_native(array, unsigned, out)? {
            return Ok(done);
        }
        let walk = |f: &mut dyn FnMut(Option<i128>)| walk_ints(array, unsigned, f);
        let value = |x: i128| {
            if unsigned {
                Value::UInt(u64::try_from(x).unwrap_or_default())
            } else {
                Value::Int(i64::try_from(x).unwrap_or_default())
            }
        };
        if !self.wide {
            let (mut low, mut high) = (i128::MAX, i128::MIN);
            walk(&mut |v| {
                if let Some(x) = v {
                    low = low.min(x);
                    high = high.max(x);
                }
            })?;
            if !self.dense.is_empty() {
                low = low.min(self.base);
                high = high.max(self.base + self.dense.len() as i128 - 1);
            }
            if low <= high && high - low < DENSE_SPAN {
                self.widen_dense(low, high);
                let mut full = false;
                walk(&mut |v| {
                    let code = match v {
                        None => self.null_code(),
                        Some(x) => {
                            let i = usize::try_from(x - self.base).unwrap_or(usize::MAX);
                            match self.dense.get(i).copied() {
                                Some(c) if c != UNSEEN => Ok(c),
                                _ => self.push(value(x)).inspect(|c| {
                                    if let Some(slot) = self.dense.get_mut(i) {
                                        *slot = *c;
                                    }
                                }),
                            }
                        }
                    };
                    out.push(code.unwrap_or_else(|Full| {
                        full = true;
                        0
                    }));
                })?;
                return Ok(!full);
            }
            if low <= high {
                self.go_wide();
            }
        }
        let mut full = false;
        walk(&mut |v| {
            let code = match v {
                None => self.null_code(),
                Some(x) => {
                    let found = if unsigned {
                        u64::try_from(x)
                            .ok()
                            .and_then(|k| self.uints.get(&k).copied())
                    } else {
                        i64::try_from(x)
                            .ok()
                            .and_then(|k| self.ints.get(&k).copied())
                    };
                    match found {
                        Some(c) => Ok(c),
                        None => self.push(value(x)).inspect(|c| match value(x) {
                            Value::UInt(k) => {
                                self.uints.insert(k, *c);
                            }
                            Value::Int(k) => {
                                self.ints.insert(k, *c);
                            }
                            _ => {}
                        }),
                    }
                }
            };
            out.push(code.unwrap_or_else(|Full| {
                full = true;
                0
            }));
        })?;
        Ok(!full)
    }

    /// The fast path of [`Dict::encode_ints`]: a primitive array without nulls whose values,
    /// with those seen before, span less than [`DENSE_SPAN`], read straight from its buffer.
    /// None (having done nothing) for anything else.
    fn encode_native(
        &mut self,
        array: &dyn Array,
        unsigned: bool,
        out: &mut Vec<u16>,
    ) -> Result<Option<bool>> {
        use arrow_array::cast::AsArray;
        use arrow_array::types as t;
        use arrow_schema::{DataType as D, TimeUnit as U};
        if self.wide || array.null_count() != 0 || array.is_empty() {
            return Ok(None);
        }
        macro_rules! go {
            ($t:ty) => {
                match array.as_primitive_opt::<$t>() {
                    Some(a) => Ok(self.dense_codes(a.values(), unsigned, out)),
                    None => Ok(None),
                }
            };
        }
        match array.data_type() {
            D::Int8 => go!(t::Int8Type),
            D::Int16 => go!(t::Int16Type),
            D::Int32 => go!(t::Int32Type),
            D::Int64 => go!(t::Int64Type),
            D::UInt8 => go!(t::UInt8Type),
            D::UInt16 => go!(t::UInt16Type),
            D::UInt32 => go!(t::UInt32Type),
            D::UInt64 => go!(t::UInt64Type),
            D::Date32 => go!(t::Date32Type),
            D::Date64 => go!(t::Date64Type),
            D::Time32(U::Second) => go!(t::Time32SecondType),
            D::Time32(_) => go!(t::Time32MillisecondType),
            D::Time64(U::Nanosecond) => go!(t::Time64NanosecondType),
            D::Time64(_) => go!(t::Time64MicrosecondType),
            D::Timestamp(U::Second, _) => go!(t::TimestampSecondType),
            D::Timestamp(U::Millisecond, _) => go!(t::TimestampMillisecondType),
            D::Timestamp(U::Microsecond, _) => go!(t::TimestampMicrosecondType),
            D::Timestamp(U::Nanosecond, _) => go!(t::TimestampNanosecondType),
            D::Duration(U::Second) => go!(t::DurationSecondType),
            D::Duration(U::Millisecond) => go!(t::DurationMillisecondType),
            D::Duration(U::Microsecond) => go!(t::DurationMicrosecondType),
            D::Duration(U::Nanosecond) => go!(t::DurationNanosecondType),
            _ => Ok(None),
        }
    }

    /// Direct-index codes of `values` (None when they and the integers seen before span
    /// [`DENSE_SPAN`] or more); Some(false) when the column ran out of provisional codes.
    fn dense_codes<N>(&mut self, values: &[N], unsigned: bool, out: &mut Vec<u16>) -> Option<bool>
    where
        N: Copy + Ord + Into<i128> + Wrapping64,
    {
        let first = *values.first()?;
        let (lo, hi) = values
            .iter()
            .fold((first, first), |(l, h), &v| (l.min(v), h.max(v)));
        let (mut low, mut high): (i128, i128) = (lo.into(), hi.into());
        if !self.dense.is_empty() {
            low = low.min(self.base);
            high = high.max(self.base + self.dense.len() as i128 - 1);
        }
        if high - low >= DENSE_SPAN {
            return None;
        }
        self.widen_dense(low, high);
        let (base, dense) = (self.base, &self.dense);
        // The offset from the base in wrapping 64-bit arithmetic: exact, since it is below
        // DENSE_SPAN, and cheaper than 128-bit arithmetic in the loop.
        let base64 = base as i64;
        let index = |v: N| v.wrapping64().wrapping_sub(base64) as u64 as usize;
        let start = out.len();
        // Known values in one branch-free gather; the few new ones are fixed up after.
        out.extend(
            values
                .iter()
                .map(|&v| dense.get(index(v)).copied().unwrap_or(UNSEEN)),
        );
        if out[start..].contains(&UNSEEN) {
            for (slot, &v) in out[start..].iter_mut().zip(values) {
                if *slot != UNSEEN {
                    continue;
                }
                let i = index(v);
                let mut code = self.dense.get(i).copied().unwrap_or(UNSEEN);
                if code == UNSEEN {
                    let x: i128 = v.into();
                    let value = if unsigned {
                        Value::UInt(u64::try_from(x).unwrap_or_default())
                    } else {
                        Value::Int(i64::try_from(x).unwrap_or_default())
                    };
                    code = match self.push(value) {
                        Ok(c) => c,
                        Err(Full) => return Some(false),
                    };
                    if let Some(d) = self.dense.get_mut(i) {
                        *d = code;
                    }
                }
                *slot = code;
            }
        }
        Some(true)
    }

    /// Makes the direct index cover `low..=high` (a span under [`DENSE_SPAN`]).
    fn widen_dense(&mut self, low: i128, high: i128) {
        let len = usize::try_from(high - low + 1).unwrap_or(0);
        if !self.dense.is_empty() && low == self.base && len == self.dense.len() {
            return;
        }
        let mut dense = vec![UNSEEN; len];
        if let Ok(shift) = usize::try_from(self.base - low) {
            if !self.dense.is_empty() {
                dense[shift..shift + self.dense.len()].copy_from_slice(&self.dense);
            }
        }
        self.dense = dense;
        self.base = low;
    }

    /// Leaves the direct index for hashing, with every integer seen so far in the hash maps.
    fn go_wide(&mut self) {
        for (k, v) in self.values.iter().enumerate() {
            let c = u16::try_from(k).unwrap_or(UNSEEN);
            match v {
                Value::Int(x) => {
                    self.ints.insert(*x, c);
                }
                Value::UInt(x) => {
                    self.uints.insert(*x, c);
                }
                _ => {}
            }
        }
        self.dense = Vec::new();
        self.wide = true;
    }

    /// Adds the values counted so far (`counts` per provisional code) to the column's tally.
    fn fill_tally(&self, column: &mut ColumnTally, counts: &[u64]) -> Result<()> {
        for (value, &c) in self.values.iter().zip(counts) {
            if c == 0 {
                continue;
            }
            match (value, &mut column.tally) {
                (Value::Null, _) => column.nulls += c,
                (Value::Bool(b), Tally::Bool(t)) => t[usize::from(*b)] += c,
                (Value::Int(x), Tally::Int(m)) => *m.entry(*x).or_default() += c,
                (Value::UInt(x), Tally::UInt(m)) => *m.entry(*x).or_default() += c,
                (Value::Str(s), Tally::Str(m)) => *m.entry(s.clone()).or_default() += c,
                (Value::Float(x), Tally::Float(f)) => f.add(*x, c),
                _ => {
                    return Err(Error::Invalid(format!(
                        "internal error: column '{}' has a provisional value of another type than \
                         its tally",
                        column.name
                    )))
                }
            }
        }
        column.bound_distinct();
        Ok(())
    }
}

/// An integer's bits as an i64 (sign-extended or, for u64, reinterpreted): differences of two
/// such values are exact modulo 2^64.
trait Wrapping64 {
    fn wrapping64(self) -> i64;
}

macro_rules! wrapping64 {
    ($($t:ty),*) => {$(
        impl Wrapping64 for $t {
            #[inline]
            fn wrapping64(self) -> i64 {
                self as i64
            }
        }
    )*};
}
wrapping64!(i8, i16, i32, i64, u8, u16, u32, u64);

/// The state while counting with provisional codes.
struct Counting {
    /// Per column (all of them, in order).
    dicts: Vec<Dict>,
    /// The columns still counted, in order: column `k` of `stats` is column `cols[k]`. A column
    /// that runs out of provisional codes leaves the tables and is only tallied from then on.
    cols: Vec<usize>,
    stats: PairStats,
    /// The columns that left the tables, in the order they left.
    dropped: Vec<usize>,
}

/// The codebook pass that also counts every pair, so that one read of the data is enough.
pub struct OnePass {
    builder: CodebookBuilder,
    counting: Option<Counting>,
    cell_limit: u64,
    fallback: Option<String>,
    /// Stop counting once a number column (not in `exempt`) has more distinct values than this:
    /// see [`OnePass::stop_past_bins`].
    bins: Option<usize>,
    exempt: Vec<bool>,
}

impl OnePass {
    /// A pass over the named columns whose provisional pair tables may hold at most
    /// `cell_limit` cells (8 bytes each).
    pub fn new(names: Vec<String>, cell_limit: u64) -> Result<Self> {
        let d = names.len();
        Ok(OnePass {
            builder: CodebookBuilder::new(names),
            counting: Some(Counting {
                dicts: (0..d).map(|_| Dict::default()).collect(),
                cols: (0..d).collect(),
                stats: PairStats::new(vec![0; d])?,
                dropped: Vec::new(),
            }),
            cell_limit,
            fallback: None,
            bins: None,
            exempt: vec![false; d],
        })
    }

    /// Makes the pass stop counting once a number or time column, other than those named in
    /// `categorical`, has more than `n_bins` distinct values. Such a column will be binned, and
    /// counting its values one by one costs more than a second pass when reading the data again
    /// is cheap (data in memory).
    pub fn stop_past_bins(&mut self, n_bins: usize, categorical: &[String]) {
        self.bins = Some(n_bins);
        for (flag, column) in self.exempt.iter_mut().zip(&self.builder.columns) {
            *flag = categorical.contains(&column.name);
        }
    }

    /// Rows observed so far.
    pub fn rows(&self) -> u64 {
        self.builder.rows
    }

    /// Why the pass stopped counting (None while it still counts).
    pub fn fallback(&self) -> Option<&str> {
        self.fallback.as_deref()
    }

    /// Tallies one batch and, while the provisional state stays within bounds, counts it.
    ///
    /// A column that runs out of provisional codes leaves the pair tables (its counts so far
    /// go to its tally) and is only tallied from then on; if it is left out of the model in the
    /// end (an identifier), the pass needed no second read.
    pub fn observe(&mut self, batch: &RecordBatch) -> Result<()> {
        let Some(counting) = &mut self.counting else {
            return self.builder.observe(batch);
        };
        let columns = &mut self.builder.columns;
        check_names(columns.iter().map(|c| c.name.as_str()), batch)?;
        let d = columns.len();
        let mut counted = vec![false; d];
        counting.cols.iter().for_each(|&i| counted[i] = true);
        // Some(codes) for a counted column that fit, None for one that ran out of codes (and
        // for the columns no longer counted, which are tallied below).
        let encoded: Vec<Option<Vec<u16>>> = columns
            .par_iter_mut()
            .zip(counting.dicts.par_iter_mut())
            .zip(batch.columns().par_iter())
            .zip(counted.par_iter())
            .map(|(((column, dict), array), &is_counted)| {
                if !is_counted {
                    return Ok(None);
                }
                let family = column.family_of(array.as_ref())?;
                let mut out = Vec::with_capacity(array.len());
                let fits = dict.encode(&column.name, family, array.as_ref(), &mut out)?;
                Ok(fits.then_some(out))
            })
            .collect::<Result<_>>()?;
        let full: Vec<usize> = counting
            .cols
            .iter()
            .copied()
            .filter(|&i| encoded[i].is_none())
            .collect();
        let staying: Vec<usize> = counting
            .cols
            .iter()
            .copied()
            .filter(|i| !full.contains(i))
            .collect();
        let cards: Vec<usize> = staying
            .iter()
            .map(|&i| counting.dicts[i].values.len())
            .collect();
        let binned = self.bins.and_then(|n_bins| {
            staying.iter().copied().find(|&i| {
                let numbers = matches!(
                    columns[i].family,
                    Some(Kind::Int | Kind::UInt | Kind::Float | Kind::Time)
                );
                let dict = &counting.dicts[i];
                numbers
                    && !self.exempt[i]
                    && dict.values.len() - usize::from(dict.null.is_some()) > n_bins
            })
        });
        let why = if let Some(i) = binned {
            Some(format!(
                "column '{}' has more distinct numbers than n_bins, so it will be binned; \
                 counting the binned codes in a second pass is cheaper",
                columns[i].name
            ))
        } else if cell_count(&cards) > self.cell_limit {
            Some(format!(
                "the provisional pair tables would hold {} cells, past the limit of {}",
                cell_count(&cards),
                self.cell_limit
            ))
        } else {
            None
        };
        if let Some(why) = why {
            self.fall_back(why)?;
            return self.builder.observe(batch);
        }
        // The columns that just ran out of codes leave the tables with their counts so far.
        if !full.is_empty() {
            let mut keep = Vec::with_capacity(staying.len());
            for (k, (&i, &r)) in counting
                .cols
                .iter()
                .zip(counting.stats.cardinalities())
                .enumerate()
            {
                if full.contains(&i) {
                    let dict = std::mem::take(&mut counting.dicts[i]);
                    dict.fill_tally(&mut columns[i], counting.stats.marginal(k))?;
                } else {
                    keep.push((k, (0..r).map(|c| c as u16).collect::<Vec<u16>>()));
                }
            }
            let old_cards: Vec<usize> = keep.iter().map(|(_, m)| m.len()).collect();
            counting.stats = counting.stats.recode(&keep, old_cards)?;
            counting.cols = staying;
            counting.dropped.extend(full);
        }
        // The columns no longer counted are tallied.
        for (i, column) in columns.iter_mut().enumerate() {
            if !counting.cols.contains(&i) {
                column.observe(batch.column(i).as_ref())?;
                column.bound_distinct();
            }
        }
        let codes: Vec<Vec<u16>> = counting
            .cols
            .iter()
            .filter_map(|&i| encoded[i].clone())
            .collect();
        if cards != counting.stats.cardinalities() {
            let keep: Vec<(usize, Vec<u16>)> = counting
                .stats
                .cardinalities()
                .iter()
                .enumerate()
                .map(|(k, &r)| (k, (0..r).map(|c| c as u16).collect()))
                .collect();
            counting.stats = counting.stats.recode(&keep, cards)?;
        }
        counting.stats.add_codes(&codes)?;
        self.builder.rows += batch.num_rows() as u64;
        Ok(())
    }

    /// The columns that ran out of provisional codes and are only tallied; the pass needs a
    /// second read if any of them is modelled in the end.
    pub fn uncounted(&self) -> Vec<String> {
        self.counting.as_ref().map_or_else(Vec::new, |c| {
            c.dropped
                .iter()
                .map(|&i| self.builder.columns[i].name.clone())
                .collect()
        })
    }

    /// Moves the counts so far into the tallies; the rest of the pass only tallies.
    fn fall_back(&mut self, why: String) -> Result<()> {
        if let Some(counting) = self.counting.take() {
            counting.fill_tallies(&mut self.builder)?;
        }
        self.fallback = Some(why);
        Ok(())
    }

    /// Fixes the codes (see [`CodebookBuilder::finish`]) and, when the whole pass was counted,
    /// returns the pair statistics over the final codes.
    pub fn finish(
        self,
        max_categories: usize,
        n_bins: usize,
        kinds: &[(String, KindChoice)],
    ) -> Result<(Learned, Option<PairStats>)> {
        let (learned, mut stats) =
            OnePass::finish_together(vec![self], max_categories, n_bins, kinds, |_| Ok(()))?;
        Ok((learned, stats.pop().flatten()))
    }

    /// Fixes one codebook from the tallies of several passes over the same columns (the two
    /// sides of a comparison, say) and returns, per pass, its pair statistics over those codes
    /// (None for a pass that stopped counting). `check` sees the codebook before any statistics
    /// over it are allocated (the memory limit).
    pub fn finish_together(
        passes: Vec<OnePass>,
        max_categories: usize,
        n_bins: usize,
        kinds: &[(String, KindChoice)],
        check: impl Fn(&crate::Codebook) -> Result<()>,
    ) -> Result<(Learned, Vec<Option<PairStats>>)> {
        let mut merged: Option<CodebookBuilder> = None;
        let mut countings = Vec::with_capacity(passes.len());
        for mut pass in passes {
            let counting = pass.counting.take();
            if let Some(c) = &counting {
                c.fill_tallies(&mut pass.builder)?;
            }
            countings.push(counting);
            match &mut merged {
                None => merged = Some(pass.builder),
                Some(m) => m.merge(&pass.builder)?,
            }
        }
        let builder = merged.ok_or_else(|| Error::Invalid("no pass to finish".into()))?;
        let names: Vec<String> = builder.columns.iter().map(|c| c.name.clone()).collect();
        let learned = builder.finish(max_categories, n_bins, kinds)?;
        if countings.iter().any(Option::is_some) {
            check(&learned.codebook)?;
        }
        let stats = countings
            .into_iter()
            .map(|c| match c {
                Some(c) => c.recoded(&names, &learned),
                None => Ok(None),
            })
            .collect::<Result<Vec<_>>>()?;
        Ok((learned, stats))
    }
}

impl Counting {
    /// The counts over the final codes of `learned` (columns named `names` while counting), or
    /// None when a modelled column left the tables (a second pass must count).
    fn recoded(&self, names: &[String], learned: &Learned) -> Result<Option<PairStats>> {
        let cards = self.stats.cardinalities();
        let mut keep = Vec::with_capacity(learned.codebook.columns().len());
        for code in learned.codebook.columns() {
            let i = names
                .iter()
                .position(|n| n == code.name())
                .ok_or_else(|| Error::Invalid("internal error: a kept column vanished".into()))?;
            let Some(k) = self.cols.iter().position(|&c| c == i) else {
                return Ok(None);
            };
            let counts = self.stats.marginal(k);
            let map = self.dicts[i].values[..cards[k]]
                .iter()
                .zip(counts)
                .map(|(v, &c)| match code.code_of(v.scalar()) {
                    // A code never counted adds nothing wherever it goes.
                    UNSEEN if c == 0 => Ok(0),
                    UNSEEN => Err(Error::Invalid(format!(
                        "internal error: column '{}' has a counted value without a final code",
                        code.name()
                    ))),
                    k => Ok(k),
                })
                .collect::<Result<Vec<u16>>>()?;
            keep.push((k, map));
        }
        self.stats
            .recode(&keep, learned.codebook.cardinalities())
            .map(Some)
    }

    /// Moves the counts so far of the counted columns into their tallies.
    fn fill_tallies(&self, builder: &mut CodebookBuilder) -> Result<()> {
        for (k, &i) in self.cols.iter().enumerate() {
            self.dicts[i].fill_tally(&mut builder.columns[i], self.stats.marginal(k))?;
        }
        Ok(())
    }
}
