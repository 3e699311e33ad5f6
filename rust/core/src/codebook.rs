//! The codebook: each column's values as dense codes 0..r-1 (kept values in natural order, then
//! "other", then null), learned in one pass over the data.

use arrow_array::{Array, RecordBatch};
use rayon::prelude::*;
use rustc_hash::FxHashMap;

use crate::error::{Error, Result};
use crate::io::{Reader, Writer};
use crate::values::{
    classify, dictionary_keys, each_bool, each_f64, each_i64, each_str, each_u64, Kind,
};

/// The code an encoder writes for a value the codebook has no code for (lenient mode only).
pub const UNSEEN: u16 = u16::MAX;
/// The most codes one column may have: codes are u16, and `u16::MAX` is reserved for [`UNSEEN`].
pub const MAX_CATEGORIES: usize = u16::MAX as usize;

/// A column's kept values, in code order.
#[derive(Clone, Debug, PartialEq)]
pub enum Values {
    Bool(Vec<bool>),
    Int(Vec<i64>),
    UInt(Vec<u64>),
    Str(Vec<Box<str>>),
    /// Quantile bins: bin 0 is `[low, edges[0])`, bin k is `[edges[k-1], edges[k])`, and the last
    /// is `[edges[last], high]`. `low` and `high` are the smallest and largest finite values seen.
    Bins {
        edges: Vec<f64>,
        low: f64,
        high: f64,
    },
}

impl Values {
    /// How many value codes (not counting "other" and null).
    pub fn len(&self) -> usize {
        match self {
            Values::Bool(v) => v.len(),
            Values::Int(v) => v.len(),
            Values::UInt(v) => v.len(),
            Values::Str(v) => v.len(),
            Values::Bins { edges, .. } => edges.len() + 1,
        }
    }

    /// True when there are no value codes at all.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The value family.
    pub fn kind(&self) -> Kind {
        match self {
            Values::Bool(_) => Kind::Bool,
            Values::Int(_) => Kind::Int,
            Values::UInt(_) => Kind::UInt,
            Values::Str(_) => Kind::Str,
            Values::Bins { .. } => Kind::Float,
        }
    }
}

#[derive(Clone, Debug, Default)]
enum Lookup {
    #[default]
    None,
    Bool([u16; 2]),
    Int(FxHashMap<i64, u16>),
    UInt(FxHashMap<u64, u16>),
    /// Integers in a short range: direct indexing instead of hashing.
    Dense(Dense),
    Str(FxHashMap<Box<str>, u16>),
}

/// The widest range of integers that gets a direct-index table.
const DENSE_SPAN: i128 = 1 << 16;

/// Codes of integers in a short range, by direct indexing (values outside map to UNSEEN).
#[derive(Clone, Debug)]
struct Dense {
    base: i128,
    codes: Vec<u16>,
}

impl Dense {
    fn build(values: &[i128]) -> Option<Dense> {
        let (&low, &high) = (values.iter().min()?, values.iter().max()?);
        if high - low >= DENSE_SPAN {
            return None;
        }
        let mut codes = vec![UNSEEN; usize::try_from(high - low + 1).ok()?];
        for (k, v) in values.iter().enumerate() {
            codes[usize::try_from(v - low).ok()?] = as_code(k);
        }
        Some(Dense { base: low, codes })
    }

    #[inline]
    fn get(&self, x: i128) -> u16 {
        usize::try_from(x - self.base)
            .ok()
            .and_then(|i| self.codes.get(i).copied())
            .unwrap_or(UNSEEN)
    }
}

/// One column's encoding.
#[derive(Clone, Debug)]
pub struct ColumnCode {
    name: String,
    values: Values,
    has_other: bool,
    has_null: bool,
    lookup: Lookup,
}

impl PartialEq for ColumnCode {
    fn eq(&self, other: &Self) -> bool {
        self.name == other.name
            && self.values == other.values
            && self.has_other == other.has_other
            && self.has_null == other.has_null
    }
}

fn as_code(k: usize) -> u16 {
    // Callers keep k below MAX_CATEGORIES; saturate rather than wrap if one ever does not.
    u16::try_from(k).unwrap_or(UNSEEN)
}

impl ColumnCode {
    /// Builds a column's encoding from its kept values, which must be sorted and distinct.
    pub fn new(name: String, values: Values, has_other: bool, has_null: bool) -> Result<Self> {
        let card = values.len() + usize::from(has_other) + usize::from(has_null);
        if card > MAX_CATEGORIES {
            return Err(Error::TooManyCategories(format!(
                "column '{name}' would need {card} codes, more than the limit of {MAX_CATEGORIES}"
            )));
        }
        if card == 0 {
            return Err(Error::Invalid(format!("column '{name}' has no codes")));
        }
        let sorted = match &values {
            Values::Bool(v) => v.windows(2).all(|w| !w[0] & w[1]),
            Values::Int(v) => v.windows(2).all(|w| w[0] < w[1]),
            Values::UInt(v) => v.windows(2).all(|w| w[0] < w[1]),
            Values::Str(v) => v.windows(2).all(|w| w[0] < w[1]),
            Values::Bins { edges, low, high } => {
                edges.iter().all(|e| e.is_finite())
                    && edges.windows(2).all(|w| w[0] < w[1])
                    && low.is_finite()
                    && high.is_finite()
                    && low <= high
                    && edges.first().is_none_or(|e| low < e)
                    && edges.last().is_none_or(|e| e <= high)
            }
        };
        if !sorted {
            return Err(Error::Invalid(format!(
                "column '{name}': the values of a codebook must be sorted, distinct and finite"
            )));
        }
        let lookup = match &values {
            Values::Bool(v) => {
                let mut codes = [UNSEEN; 2];
                for (k, b) in v.iter().enumerate() {
                    codes[usize::from(*b)] = as_code(k);
                }
                Lookup::Bool(codes)
            }
            Values::Int(v) => {
                match Dense::build(&v.iter().map(|x| i128::from(*x)).collect::<Vec<_>>()) {
                    Some(dense) => Lookup::Dense(dense),
                    None => Lookup::Int(
                        v.iter()
                            .enumerate()
                            .map(|(k, x)| (*x, as_code(k)))
                            .collect(),
                    ),
                }
            }
            Values::UInt(v) => {
                match Dense::build(&v.iter().map(|x| i128::from(*x)).collect::<Vec<_>>()) {
                    Some(dense) => Lookup::Dense(dense),
                    None => Lookup::UInt(
                        v.iter()
                            .enumerate()
                            .map(|(k, x)| (*x, as_code(k)))
                            .collect(),
                    ),
                }
            }
            Values::Str(v) => Lookup::Str(
                v.iter()
                    .enumerate()
                    .map(|(k, x)| (x.clone(), as_code(k)))
                    .collect(),
            ),
            Values::Bins { .. } => Lookup::None,
        };
        Ok(ColumnCode {
            name,
            values,
            has_other,
            has_null,
            lookup,
        })
    }

    /// The column name.
    pub fn name(&self) -> &str {
        &self.name
    }
    /// The kept values in code order.
    pub fn values(&self) -> &Values {
        &self.values
    }
    /// Whether there is an "other" code (values beyond the cap).
    pub fn has_other(&self) -> bool {
        self.has_other
    }
    /// Whether there is a null code.
    pub fn has_null(&self) -> bool {
        self.has_null
    }
    /// The number of codes r: values, then "other", then null.
    pub fn cardinality(&self) -> usize {
        self.values.len() + usize::from(self.has_other) + usize::from(self.has_null)
    }
    /// The "other" code, if any.
    pub fn other_code(&self) -> Option<u16> {
        self.has_other.then(|| as_code(self.values.len()))
    }
    /// The null code, if any.
    pub fn null_code(&self) -> Option<u16> {
        self.has_null
            .then(|| as_code(self.values.len() + usize::from(self.has_other)))
    }

    fn value_code(&self, k: Option<u16>) -> u16 {
        k.or(self.other_code()).unwrap_or(UNSEEN)
    }

    fn bin_code(&self, x: f64) -> u16 {
        match &self.values {
            // The number of edges <= x: bins are closed on the left.
            Values::Bins { edges, .. } => as_code(edges.partition_point(|e| *e <= x)),
            _ => UNSEEN,
        }
    }

    /// Appends the codes of `array` to `out`. With `strict`, a value or null without a code is an
    /// error that names the column and the row; otherwise it is written as [`UNSEEN`].
    pub fn encode(&self, array: &dyn Array, strict: bool, out: &mut Vec<u16>) -> Result<()> {
        let start = out.len();
        let null = self.null_code().unwrap_or(UNSEEN);
        if let Some((keys, dict_values)) = dictionary_keys(&self.name, array)? {
            let mut dict_codes = Vec::with_capacity(dict_values.len());
            self.encode_plain(dict_values, &mut dict_codes)?;
            out.extend(keys.iter().map(|k| k.map_or(null, |k| dict_codes[k])));
        } else {
            self.encode_plain(array, out)?;
        }
        if strict {
            if let Some(row) = out[start..].iter().position(|c| *c == UNSEEN) {
                return Err(self.unseen_error(array, row));
            }
        }
        Ok(())
    }

    fn unseen_error(&self, array: &dyn Array, row: usize) -> Error {
        let name = &self.name;
        if array.logical_nulls().is_some_and(|n| n.is_null(row)) {
            Error::Data(format!(
                "column '{name}' has a null at row {row} of this batch, but it had no nulls when its \
                 codebook was learned; fill the nulls, or learn the codebook from data that has them"
            ))
        } else {
            Error::Data(format!(
                "column '{name}' has a value at row {row} of this batch that its codebook has never \
                 seen, and the column has no 'other' code; learn the codebook from data that includes \
                 it, or lower max_categories so that an 'other' code exists"
            ))
        }
    }

    fn encode_plain(&self, array: &dyn Array, out: &mut Vec<u16>) -> Result<()> {
        let kind = classify(&self.name, array.data_type())?;
        if kind.is_some_and(|k| k != self.values.kind()) {
            return Err(Error::Schema(format!(
                "column '{}' holds {} values but its codebook was learned from {} values; cast it back, \
                 or learn a new codebook",
                self.name,
                array.data_type(),
                self.values.kind().name()
            )));
        }
        let null = self.null_code().unwrap_or(UNSEEN);
        if kind.is_none() {
            // The `null` type: every row is null, whatever the column's family.
            out.extend(std::iter::repeat_n(null, array.len()));
            return Ok(());
        }
        out.reserve(array.len());
        match &self.lookup {
            Lookup::Bool(codes) => each_bool(array, |v| {
                out.push(v.map_or(null, |b| {
                    self.value_code(Some(codes[usize::from(b)]).filter(|c| *c != UNSEEN))
                }))
            }),
            Lookup::Int(map) => each_i64(array, |v| {
                out.push(v.map_or(null, |x| self.value_code(map.get(&x).copied())))
            }),
            Lookup::UInt(map) => each_u64(array, |v| {
                out.push(v.map_or(null, |x| self.value_code(map.get(&x).copied())))
            }),
            Lookup::Dense(dense) => {
                let code = |x: i128| self.value_code(Some(dense.get(x)).filter(|c| *c != UNSEEN));
                match self.values.kind() {
                    Kind::UInt => each_u64(array, |v| out.push(v.map_or(null, |x| code(x.into())))),
                    _ => each_i64(array, |v| out.push(v.map_or(null, |x| code(x.into())))),
                }
            }
            Lookup::Str(map) => each_str(array, |v| {
                out.push(v.map_or(null, |x| self.value_code(map.get(x).copied())))
            }),
            Lookup::None => each_f64(array, |v| {
                out.push(match v {
                    Some(x) if !x.is_nan() => self.bin_code(x),
                    _ => null,
                })
            }),
        }
    }
}

/// A column's tally of values, gathered in the codebook pass.
#[derive(Clone, Debug, Default)]
enum Tally {
    #[default]
    Unknown,
    Bool([u64; 2]),
    Int(FxHashMap<i64, u64>),
    UInt(FxHashMap<u64, u64>),
    Str(FxHashMap<Box<str>, u64>),
    /// Counts of the finite values seen, for quantiles.
    Float(FloatTally),
}

/// The most distinct values one column's tally may hold (categorical columns). Beyond it a
/// column is refused: picking its most frequent values exactly would need unbounded memory.
pub const DISTINCT_LIMIT: usize = 1 << 21;
/// The most distinct floats a float column's tally holds before it coarsens them.
pub const FLOAT_DISTINCT_LIMIT: usize = 1 << 20;

/// Counts of the finite values of a float column. Exact while there are at most
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
    n: u64,
}

impl Default for FloatTally {
    fn default() -> Self {
        FloatTally {
            counts: FxHashMap::default(),
            level: 0,
            low: f64::INFINITY,
            high: f64::NEG_INFINITY,
            n: 0,
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
        self.coarsen_to(self.level);
    }

    /// Bin edges at the order statistics `s[k*(n-1)/n_bins]` for k = 1..n_bins (integer
    /// division) of the sorted values s, without repeats and without the minimum, so every bin
    /// holds at least one value.
    fn bins(&self, n_bins: usize) -> Values {
        let mut sorted: Vec<(f64, u64)> = self
            .counts
            .iter()
            .map(|(b, c)| (f64::from_bits(*b), *c))
            .collect();
        sorted.sort_unstable_by(|a, b| a.0.total_cmp(&b.0));
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
        Values::Bins { edges, low, high }
    }
}

impl Tally {
    fn for_kind(kind: Kind) -> Tally {
        match kind {
            Kind::Bool => Tally::Bool([0; 2]),
            Kind::Int => Tally::Int(FxHashMap::default()),
            Kind::UInt => Tally::UInt(FxHashMap::default()),
            Kind::Str => Tally::Str(FxHashMap::default()),
            Kind::Float => Tally::Float(FloatTally::default()),
        }
    }

    fn kind(&self) -> Option<Kind> {
        Some(match self {
            Tally::Unknown => return None,
            Tally::Bool(_) => Kind::Bool,
            Tally::Int(_) => Kind::Int,
            Tally::UInt(_) => Kind::UInt,
            Tally::Str(_) => Kind::Str,
            Tally::Float(_) => Kind::Float,
        })
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
    tally: Tally,
    nulls: u64,
}

impl ColumnTally {
    fn observe(&mut self, array: &dyn Array) -> Result<()> {
        let Some(kind) = classify(&self.name, array.data_type())? else {
            self.nulls += array.len() as u64;
            return Ok(());
        };
        match self.tally.kind() {
            None => self.tally = Tally::for_kind(kind),
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
        let infinite = match dictionary_keys(&self.name, array)? {
            Some((keys, dict_values)) => {
                let mut weights = vec![0u64; dict_values.len()];
                for k in &keys {
                    match k {
                        Some(k) => weights[*k] += 1,
                        None => self.nulls += 1,
                    }
                }
                // An infinity found in the dictionary is reported at the first row that uses it.
                self.add(dict_values, &|i| weights[i])?
                    .map(|(at, x)| (keys.iter().position(|k| *k == Some(at)).unwrap_or(at), x))
            }
            None if self.add_dense(array)? => None,
            None => self.add(array, &|_| 1)?,
        };
        match infinite {
            Some((row, x)) => Err(Error::Data(format!(
                "column '{}' holds {x} at row {row} of this batch; quantile bins need finite \
                 values. Replace infinities (with null, or a large finite value) first",
                self.name
            ))),
            None => Ok(()),
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
    /// Returns the position and value of the first infinity in a float column, which is refused.
    fn add(
        &mut self,
        array: &dyn Array,
        weight: &dyn Fn(usize) -> u64,
    ) -> Result<Option<(usize, f64)>> {
        let mut infinite = None;
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
            Tally::Float(seen) => {
                let mut at = 0usize;
                each_f64(array, |v| {
                    let w = next();
                    at += 1;
                    match v {
                        Some(x) if x.is_infinite() && w > 0 => {
                            infinite.get_or_insert((at - 1, x));
                        }
                        Some(x) if !x.is_nan() => seen.add(x, w),
                        _ => nulls += w,
                    }
                })?;
            }
        }
        self.nulls += nulls;
        Ok(infinite)
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
            (mine, theirs) => {
                return Err(Error::Schema(format!(
                    "column '{}' holds {} values in one part of the data and {} values in another; \
                     cast it to one type everywhere",
                    self.name,
                    mine.kind().map_or("null", Kind::name),
                    theirs.kind().map_or("null", Kind::name)
                )))
            }
        }
        self.check_distinct()
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
            Tally::Float(f) => Some(f.n),
        }
    }

    /// Refuses a categorical column whose distinct values pass [`DISTINCT_LIMIT`].
    fn check_distinct(&self) -> Result<()> {
        let distinct = match &self.tally {
            Tally::Int(m) => m.len(),
            Tally::UInt(m) => m.len(),
            Tally::Str(m) => m.len(),
            _ => 0,
        };
        if distinct > DISTINCT_LIMIT {
            return Err(Error::TooManyCategories(format!(
                "column '{}' has more than {DISTINCT_LIMIT} distinct values, so it looks like an \
                 identifier; treewise keeps at most {MAX_CATEGORIES} codes per column and cannot \
                 find the most frequent values of a column this wide in bounded memory. Leave it \
                 out with columns=, or bucket it first (by prefix, range or hash)",
                self.name
            )));
        }
        Ok(())
    }

    fn finish(
        self,
        max_categories: usize,
        n_bins: usize,
    ) -> Result<(ColumnCode, Option<CapReport>)> {
        let name = self.name;
        let has_null = self.nulls > 0;
        let all_null = || {
            Error::Data(format!(
                "column '{name}' holds only nulls ({} rows); it carries no information. \
                 Leave it out with columns=, or fill it",
                self.nulls
            ))
        };
        let (values, cap) = match self.tally {
            Tally::Unknown => return Err(all_null()),
            Tally::Bool(c) => {
                let seen: Vec<(bool, u64)> = [(false, c[0]), (true, c[1])]
                    .into_iter()
                    .filter(|(_, n)| *n > 0)
                    .collect();
                let (kept, cap) = keep_most_frequent(&name, seen, max_categories, has_null);
                (Values::Bool(kept), cap)
            }
            Tally::Int(m) => {
                let (kept, cap) =
                    keep_most_frequent(&name, m.into_iter().collect(), max_categories, has_null);
                (Values::Int(kept), cap)
            }
            Tally::UInt(m) => {
                let (kept, cap) =
                    keep_most_frequent(&name, m.into_iter().collect(), max_categories, has_null);
                (Values::UInt(kept), cap)
            }
            Tally::Str(m) => {
                let (kept, cap) =
                    keep_most_frequent(&name, m.into_iter().collect(), max_categories, has_null);
                (Values::Str(kept), cap)
            }
            Tally::Float(seen) if seen.n == 0 => return Err(all_null()),
            Tally::Float(seen) => (seen.bins(n_bins), None),
        };
        if values.is_empty() && cap.is_none() {
            return Err(all_null());
        }
        let has_other = cap.is_some();
        Ok((ColumnCode::new(name, values, has_other, has_null)?, cap))
    }
}

/// Keeps the most frequent values (ties: the smaller value) so that the codes, counting "other" and
/// null, fit in `max_categories`; returns the kept values sorted, and what went to "other".
fn keep_most_frequent<T: Ord>(
    name: &str,
    mut seen: Vec<(T, u64)>,
    max_categories: usize,
    has_null: bool,
) -> (Vec<T>, Option<CapReport>) {
    let fits = seen.len() + usize::from(has_null) <= max_categories;
    let mut cap = None;
    if !fits {
        let keep = max_categories.saturating_sub(1 + usize::from(has_null));
        seen.sort_unstable_by(|a, b| b.1.cmp(&a.1).then_with(|| a.0.cmp(&b.0)));
        let dropped = seen.split_off(keep.min(seen.len()));
        cap = Some(CapReport {
            column: name.to_string(),
            values_capped: dropped.len(),
            rows_capped: dropped.iter().map(|(_, n)| n).sum(),
        });
    }
    let mut kept: Vec<T> = seen.into_iter().map(|(v, _)| v).collect();
    kept.sort_unstable();
    (kept, cap)
}

/// The codebook of a whole table.
#[derive(Clone, Debug, PartialEq)]
pub struct Codebook {
    columns: Vec<ColumnCode>,
}

impl Codebook {
    /// Builds a codebook from column encodings; names must be distinct.
    pub fn new(columns: Vec<ColumnCode>) -> Result<Self> {
        let mut names: Vec<&str> = columns.iter().map(|c| c.name()).collect();
        names.sort_unstable();
        if let Some(w) = names.windows(2).find(|w| w[0] == w[1]) {
            return Err(Error::Schema(format!(
                "column name '{}' appears twice",
                w[0]
            )));
        }
        Ok(Codebook { columns })
    }
    /// The column encodings, in column order.
    pub fn columns(&self) -> &[ColumnCode] {
        &self.columns
    }
    /// Each column's number of codes.
    pub fn cardinalities(&self) -> Vec<usize> {
        self.columns.iter().map(ColumnCode::cardinality).collect()
    }

    /// Checks that `batch` has exactly the codebook's columns, in order.
    pub fn check_batch(&self, batch: &RecordBatch) -> Result<()> {
        check_names(self.columns.iter().map(|c| c.name()), batch)
    }

    /// Encodes every column of `batch` (in parallel over columns).
    pub fn encode(&self, batch: &RecordBatch, strict: bool) -> Result<Vec<Vec<u16>>> {
        self.check_batch(batch)?;
        self.columns
            .par_iter()
            .zip(batch.columns().par_iter())
            .map(|(code, array)| {
                let mut out = Vec::with_capacity(array.len());
                code.encode(array.as_ref(), strict, &mut out)?;
                Ok(out)
            })
            .collect()
    }
}

fn check_names<'a>(expected: impl Iterator<Item = &'a str>, batch: &RecordBatch) -> Result<()> {
    let expected: Vec<&str> = expected.collect();
    let schema = batch.schema();
    let got: Vec<&str> = schema.fields().iter().map(|f| f.name().as_str()).collect();
    if expected != got {
        return Err(Error::Schema(format!(
            "expected the columns {expected:?} in this order, but the batch has {got:?}"
        )));
    }
    Ok(())
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
                col.check_distinct()
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
    /// floats get at most `n_bins` quantile bins. Returns the codebook and what the cap did.
    pub fn finish(
        self,
        max_categories: usize,
        n_bins: usize,
    ) -> Result<(Codebook, Vec<CapReport>)> {
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
        if self.rows == 0 {
            return Err(Error::Data(
                "the data has 0 rows; a dependency tree needs at least one row".to_string(),
            ));
        }
        let finished: Vec<(ColumnCode, Option<CapReport>)> = self
            .columns
            .into_par_iter()
            .map(|c| c.finish(max_categories, n_bins))
            .collect::<Result<_>>()?;
        let (columns, caps): (Vec<_>, Vec<_>) = finished.into_iter().unzip();
        Ok((
            Codebook::new(columns)?,
            caps.into_iter().flatten().collect(),
        ))
    }
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
                    let e = sorted_entries(&f.counts);
                    w.len(e.len());
                    e.iter().for_each(|(k, c)| {
                        w.u64(*k);
                        w.u64(*c);
                    });
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
            let tally = match r.u8()? {
                0 => Tally::Unknown,
                1 => Tally::Bool([r.u64()?, r.u64()?]),
                2 => Tally::Int(read_map(r, 16, |r| r.i64())?),
                3 => Tally::UInt(read_map(r, 16, |r| r.u64())?),
                4 => Tally::Str(read_map(r, 16, |r| r.str().map(String::into_boxed_str))?),
                5 => {
                    let level = r.u32()?;
                    let (low, high, count) = (r.f64()?, r.f64()?, r.u64()?);
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
                    })
                }
                _ => return Err(corrupt_tally("unknown tally kind")),
            };
            let col = ColumnTally { name, tally, nulls };
            col.check_distinct()?;
            // Every row is a value or a null: with this checked, no later sum can overflow.
            if col.total().and_then(|t| t.checked_add(col.nulls)) != Some(rows) {
                return Err(corrupt_tally("a column's counts do not add up to the rows"));
            }
            columns.push(col);
        }
        Ok(CodebookBuilder { columns, rows })
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
        let Values::Bins { edges, low, high } = tally.bins(4) else {
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
        let (kept, cap) = keep_most_frequent("c", seen, 3, false);
        assert_eq!(kept, vec![1, 2]);
        let cap = cap.unwrap_or_else(|| panic!("no cap"));
        assert_eq!((cap.values_capped, cap.rows_capped), (2, 4));
    }
}
