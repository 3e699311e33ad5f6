//! The codebook: each column's values as dense codes 0..r-1 (kept values in natural order, or
//! quantile bins and non-finite values, then "other", then null), and the encoder of batches.

use arrow_array::{Array, RecordBatch};
use rayon::prelude::*;
use rustc_hash::FxHashMap;

use crate::error::{Error, Result};
use crate::shape::{Tail, Within, TAIL_LIMIT};
use crate::values::{
    classify, dictionary_keys, each_bool, each_f64, each_i64, each_number, each_str, each_u64, Kind,
};

/// The code an encoder writes for a value the codebook has no code for (lenient mode only).
pub const UNSEEN: u16 = u16::MAX;
/// The most codes one column may have: codes are u16, and `u16::MAX` is reserved for [`UNSEEN`].
pub const MAX_CATEGORIES: usize = u16::MAX as usize;

/// A column's kept values, in code order.
#[derive(Clone, Debug)]
pub enum Values {
    Bool(Vec<bool>),
    Int(Vec<i64>),
    UInt(Vec<u64>),
    Str(Vec<Box<str>>),
    /// Discrete floats kept as values, in total order (may hold -inf, +inf and NaN, last).
    Float(Vec<f64>),
    /// Quantile bins of a numeric column: bin 0 is `[low, edges[0])`, bin k is
    /// `[edges[k-1], edges[k])`, and the last is `[edges[last], high]`, where `low` and `high` are
    /// the smallest and largest finite values seen. Then one code per non-finite value seen
    /// (`specials`: -inf, +inf, NaN, in that order).
    Bins {
        edges: Vec<f64>,
        low: f64,
        high: f64,
        specials: Vec<f64>,
    },
}

fn same_floats(a: &[f64], b: &[f64]) -> bool {
    a.len() == b.len() && a.iter().zip(b).all(|(x, y)| x.to_bits() == y.to_bits())
}

// Floats compare by their bits, so that a NaN category equals itself.
impl PartialEq for Values {
    fn eq(&self, other: &Self) -> bool {
        match (self, other) {
            (Values::Bool(a), Values::Bool(b)) => a == b,
            (Values::Int(a), Values::Int(b)) => a == b,
            (Values::UInt(a), Values::UInt(b)) => a == b,
            (Values::Str(a), Values::Str(b)) => a == b,
            (Values::Float(a), Values::Float(b)) => same_floats(a, b),
            (
                Values::Bins {
                    edges,
                    low,
                    high,
                    specials,
                },
                Values::Bins {
                    edges: e2,
                    low: l2,
                    high: h2,
                    specials: s2,
                },
            ) => {
                same_floats(edges, e2)
                    && same_floats(&[*low, *high], &[*l2, *h2])
                    && same_floats(specials, s2)
            }
            _ => false,
        }
    }
}

impl Values {
    /// How many value codes (not counting "other" and null).
    pub fn len(&self) -> usize {
        match self {
            Values::Bool(v) => v.len(),
            Values::Int(v) => v.len(),
            Values::UInt(v) => v.len(),
            Values::Str(v) => v.len(),
            Values::Float(v) => v.len(),
            Values::Bins {
                edges, specials, ..
            } => edges.len() + 1 + specials.len(),
        }
    }

    /// True when there are no value codes at all.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The value family these values come from when nothing else says so.
    pub fn default_family(&self) -> Kind {
        match self {
            Values::Bool(_) => Kind::Bool,
            Values::Int(_) => Kind::Int,
            Values::UInt(_) => Kind::UInt,
            Values::Str(_) => Kind::Str,
            Values::Float(_) | Values::Bins { .. } => Kind::Float,
        }
    }

    /// Whether these values can be the codes of a column of `family`.
    fn suits(&self, family: Kind) -> bool {
        matches!(
            (self, family),
            (Values::Bool(_), Kind::Bool)
                | (Values::Int(_), Kind::Int | Kind::Time)
                | (Values::UInt(_), Kind::UInt)
                | (Values::Str(_), Kind::Str)
                | (Values::Float(_), Kind::Float)
                | (
                    Values::Bins { .. },
                    Kind::Int | Kind::UInt | Kind::Float | Kind::Time
                )
        )
    }

    /// Sorted and distinct (floats in total order), and bins well formed.
    fn is_sorted(&self) -> bool {
        match self {
            Values::Bool(v) => v.windows(2).all(|w| !w[0] & w[1]),
            Values::Int(v) => v.windows(2).all(|w| w[0] < w[1]),
            Values::UInt(v) => v.windows(2).all(|w| w[0] < w[1]),
            Values::Str(v) => v.windows(2).all(|w| w[0] < w[1]),
            Values::Float(v) => {
                v.iter().all(|x| canonical(*x).to_bits() == x.to_bits())
                    && v.windows(2).all(|w| w[0].total_cmp(&w[1]).is_lt())
            }
            Values::Bins {
                edges,
                low,
                high,
                specials,
            } => {
                edges.iter().all(|e| e.is_finite())
                    && edges.windows(2).all(|w| w[0] < w[1])
                    && low.is_finite()
                    && high.is_finite()
                    && low <= high
                    && edges.first().is_none_or(|e| low < e)
                    && edges.last().is_none_or(|e| e <= high)
                    && specials.iter().all(|x| !x.is_finite())
                    && specials
                        .iter()
                        .all(|x| canonical(*x).to_bits() == x.to_bits())
                    && specials.windows(2).all(|w| w[0].total_cmp(&w[1]).is_lt())
            }
        }
    }
}

/// One float as the codebook stores it: -0.0 is 0.0 and every NaN is the one quiet NaN, so that
/// equal values have equal bits.
pub fn canonical(x: f64) -> f64 {
    if x.is_nan() {
        f64::NAN
    } else if x == 0.0 {
        0.0
    } else {
        x
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
    /// Floats by the bits of their canonical form.
    Float(FxHashMap<u64, u16>),
}

/// The widest range of integers that gets a direct-index table.
pub(crate) const DENSE_SPAN: i128 = 1 << 16;

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

fn as_code(k: usize) -> u16 {
    // Callers keep k below MAX_CATEGORIES; saturate rather than wrap if one ever does not.
    u16::try_from(k).unwrap_or(UNSEEN)
}

/// Codes of integers: a direct-index table when they span a short range, else a hash map.
fn integer_lookup<T>(values: &[T], hashed: impl Fn(FxHashMap<T, u16>) -> Lookup) -> Lookup
where
    T: Copy + Into<i128> + Eq + std::hash::Hash,
{
    let wide: Vec<i128> = values.iter().map(|x| (*x).into()).collect();
    match Dense::build(&wide) {
        Some(dense) => Lookup::Dense(dense),
        None => hashed(
            values
                .iter()
                .enumerate()
                .map(|(k, x)| (*x, as_code(k)))
                .collect(),
        ),
    }
}

fn lookup_for(values: &Values) -> Lookup {
    match values {
        Values::Bool(v) => {
            let mut codes = [UNSEEN; 2];
            for (k, b) in v.iter().enumerate() {
                codes[usize::from(*b)] = as_code(k);
            }
            Lookup::Bool(codes)
        }
        Values::Int(v) => integer_lookup(v, Lookup::Int),
        Values::UInt(v) => integer_lookup(v, Lookup::UInt),
        Values::Str(v) => Lookup::Str(
            v.iter()
                .enumerate()
                .map(|(k, x)| (x.clone(), as_code(k)))
                .collect(),
        ),
        Values::Float(v) => Lookup::Float(
            v.iter()
                .enumerate()
                .map(|(k, x)| (x.to_bits(), as_code(k)))
                .collect(),
        ),
        Values::Bins { .. } => Lookup::None,
    }
}

/// What sits inside a column's codes beyond the codes themselves: the tail behind "other" and
/// the observed values inside each numeric bin.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Shape {
    /// The values behind the "other" code (a column with "other" only).
    pub tail: Option<Tail>,
    /// One summary per bin (numeric columns only; empty when unknown, e.g. a hand-made codebook).
    pub within: Vec<Within>,
    /// Every value of the numeric column is an integer: draws inside a bin are rounded.
    pub integral: bool,
}

/// One column's encoding.
#[derive(Clone, Debug)]
pub struct ColumnCode {
    name: String,
    family: Kind,
    values: Values,
    has_other: bool,
    has_null: bool,
    shape: Shape,
    lookup: Lookup,
    /// Encodes values to their index in the tail table (UNSEEN when not there).
    tail_lookup: Option<Box<ColumnCode>>,
}

impl PartialEq for ColumnCode {
    fn eq(&self, other: &Self) -> bool {
        self.name == other.name
            && self.family == other.family
            && self.values == other.values
            && self.has_other == other.has_other
            && self.has_null == other.has_null
            && self.shape == other.shape
    }
}

impl ColumnCode {
    /// Builds a column's encoding from its kept values, which must be sorted and distinct; the
    /// family is the one the values imply (floats for bins) and there is no shape.
    pub fn new(name: String, values: Values, has_other: bool, has_null: bool) -> Result<Self> {
        let family = values.default_family();
        Self::build(name, family, values, has_other, has_null, Shape::default())
    }

    /// Builds a column's encoding with its value family and shape, checking that they agree.
    pub fn build(
        name: String,
        family: Kind,
        values: Values,
        has_other: bool,
        has_null: bool,
        shape: Shape,
    ) -> Result<Self> {
        let card = values.len() + usize::from(has_other) + usize::from(has_null);
        if card > MAX_CATEGORIES {
            return Err(Error::TooManyCategories(format!(
                "column '{name}' would need {card} codes, more than the limit of {MAX_CATEGORIES}"
            )));
        }
        if card == 0 {
            return Err(Error::Invalid(format!("column '{name}' has no codes")));
        }
        if !values.is_sorted() {
            return Err(Error::Invalid(format!(
                "column '{name}': the values of a codebook must be sorted and distinct, and bins \
                 finite"
            )));
        }
        if !values.suits(family) {
            return Err(Error::Invalid(format!(
                "column '{name}': {} values cannot hold these codes",
                family.name()
            )));
        }
        let tail_lookup = match &shape.tail {
            None => None,
            Some(tail) => {
                let plain = matches!(
                    tail.values,
                    Values::Bool(_)
                        | Values::Int(_)
                        | Values::UInt(_)
                        | Values::Str(_)
                        | Values::Float(_)
                );
                if !has_other
                    || !plain
                    || tail.values.len() != tail.counts.len()
                    || tail.values.len() > TAIL_LIMIT
                    || tail.checked_rows().is_none_or(|r| r == 0)
                {
                    return Err(Error::Invalid(format!(
                        "column '{name}': its table of rare values is malformed"
                    )));
                }
                let inner = ColumnCode::build(
                    name.clone(),
                    family,
                    tail.values.clone(),
                    false,
                    false,
                    Shape::default(),
                )?;
                Some(Box::new(inner))
            }
        };
        if let Values::Bins {
            edges, low, high, ..
        } = &values
        {
            let ok = shape.within.is_empty()
                || (shape.within.len() == edges.len() + 1
                    && shape.within.iter().enumerate().all(|(k, w)| {
                        let lo = if k == 0 { *low } else { edges[k - 1] };
                        let hi = edges.get(k).copied().unwrap_or(*high);
                        w.is_valid(lo, hi)
                    }));
            if !ok {
                return Err(Error::Invalid(format!(
                    "column '{name}': the values inside its bins are malformed"
                )));
            }
        } else if !shape.within.is_empty() {
            return Err(Error::Invalid(format!(
                "column '{name}' has values inside bins but no bins"
            )));
        }
        let lookup = lookup_for(&values);
        Ok(ColumnCode {
            name,
            family,
            values,
            has_other,
            has_null,
            shape,
            lookup,
            tail_lookup,
        })
    }

    /// The same column with a null code (added when it had none), keeping everything else.
    pub fn with_null(&self) -> Result<Self> {
        Self::build(
            self.name.clone(),
            self.family,
            self.values.clone(),
            self.has_other,
            true,
            self.shape.clone(),
        )
    }

    /// The column name.
    pub fn name(&self) -> &str {
        &self.name
    }
    /// The value family of the column's Arrow type.
    pub fn family(&self) -> Kind {
        self.family
    }
    /// The kept values in code order.
    pub fn values(&self) -> &Values {
        &self.values
    }
    /// The tail behind "other" and the values inside bins.
    pub fn shape(&self) -> &Shape {
        &self.shape
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
    /// How the column is modelled: "constant" (one code), "numeric" (bins) or "categorical".
    pub fn model_kind(&self) -> &'static str {
        if self.cardinality() == 1 {
            "constant"
        } else if matches!(self.values, Values::Bins { .. }) {
            "numeric"
        } else {
            "categorical"
        }
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

    /// The code of a number in a numeric column (UNSEEN for a NaN it has no code for).
    fn number_code(&self, x: f64) -> u16 {
        let Values::Bins {
            edges, specials, ..
        } = &self.values
        else {
            return UNSEEN;
        };
        if x.is_finite() {
            // The number of edges <= x: bins are closed on the left.
            return as_code(edges.partition_point(|e| *e <= x));
        }
        let x = canonical(x);
        match specials.iter().position(|s| s.to_bits() == x.to_bits()) {
            Some(k) => as_code(edges.len() + 1 + k),
            // An infinity never seen goes to the end bin on its side.
            None if x == f64::NEG_INFINITY => 0,
            None if x == f64::INFINITY => as_code(edges.len()),
            None => UNSEEN,
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

    /// Each row's index in the tail table behind "other" (UNSEEN where the value is not there,
    /// or is null); None when the column has no tail table.
    pub fn tail_indices(&self, array: &dyn Array) -> Result<Option<Vec<u16>>> {
        let Some(inner) = &self.tail_lookup else {
            return Ok(None);
        };
        let mut out = Vec::with_capacity(array.len());
        inner.encode(array, false, &mut out)?;
        Ok(Some(out))
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

    /// The code of one value, exactly as [`ColumnCode::encode`] codes it in an array of the
    /// column's family (UNSEEN when it has none): the one-pass fit maps its provisional codes
    /// to the final ones with it.
    pub(crate) fn code_of(&self, value: Scalar<'_>) -> u16 {
        let null = self.null_code().unwrap_or(UNSEEN);
        let known = |c: u16| self.value_code(Some(c).filter(|c| *c != UNSEEN));
        match (value, &self.lookup) {
            (Scalar::Null, _) => null,
            (Scalar::Bool(b), Lookup::Bool(codes)) => known(codes[usize::from(b)]),
            (Scalar::Int(x), Lookup::Int(map)) => self.value_code(map.get(&x).copied()),
            (Scalar::UInt(x), Lookup::UInt(map)) => self.value_code(map.get(&x).copied()),
            (Scalar::Int(x), Lookup::Dense(dense)) => known(dense.get(x.into())),
            (Scalar::UInt(x), Lookup::Dense(dense)) => known(dense.get(x.into())),
            (Scalar::Str(x), Lookup::Str(map)) => self.value_code(map.get(x).copied()),
            (Scalar::Float(x), Lookup::Float(map)) => {
                self.value_code(map.get(&canonical(x).to_bits()).copied())
            }
            (Scalar::Int(x), Lookup::None) => self.number_code(x as f64),
            (Scalar::UInt(x), Lookup::None) => self.number_code(x as f64),
            (Scalar::Float(x), Lookup::None) => self.number_code(x),
            _ => UNSEEN,
        }
    }

    fn encode_plain(&self, array: &dyn Array, out: &mut Vec<u16>) -> Result<()> {
        let kind = classify(&self.name, array.data_type())?;
        if kind.is_some_and(|k| k != self.family) {
            return Err(Error::Schema(format!(
                "column '{}' holds {} values but its codebook was learned from {} values; cast it back, \
                 or learn a new codebook",
                self.name,
                array.data_type(),
                self.family.name()
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
                match self.family {
                    Kind::UInt => each_u64(array, |v| out.push(v.map_or(null, |x| code(x.into())))),
                    _ => each_i64(array, |v| out.push(v.map_or(null, |x| code(x.into())))),
                }
            }
            Lookup::Str(map) => each_str(array, |v| {
                out.push(v.map_or(null, |x| self.value_code(map.get(x).copied())))
            }),
            Lookup::Float(map) => each_f64(array, |v| {
                out.push(v.map_or(null, |x| {
                    self.value_code(map.get(&canonical(x).to_bits()).copied())
                }))
            }),
            Lookup::None => {
                each_number(array, |v| out.push(v.map_or(null, |x| self.number_code(x))))
            }
        }
    }
}

/// One value of a column, as the Arrow readers in `values` yield it.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) enum Scalar<'a> {
    Null,
    Bool(bool),
    /// Signed integers, and times as their integer count of units.
    Int(i64),
    UInt(u64),
    Str(&'a str),
    Float(f64),
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
        let token = crate::cancel::current();
        self.columns
            .par_iter()
            .zip(batch.columns().par_iter())
            .map(|(code, array)| {
                token.check()?;
                let mut out = Vec::with_capacity(array.len());
                code.encode(array.as_ref(), strict, &mut out)?;
                Ok(out)
            })
            .collect()
    }
}

/// Checks that a batch has exactly the `expected` columns, in order.
pub fn check_names<'a>(expected: impl Iterator<Item = &'a str>, batch: &RecordBatch) -> Result<()> {
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
