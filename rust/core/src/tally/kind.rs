//! The choice of each column's kind (categorical, numeric, constant, left out) at the end of the
//! codebook pass, with its codes, the tail table behind "other" and the values inside each bin.

use rayon::prelude::*;
use rustc_hash::FxHashMap;

use super::{
    int_tally, CapReport, CodebookBuilder, ColumnTally, FloatTally, Tally, DISTINCT_LIMIT,
    FLOAT_DISTINCT_LIMIT,
};
use crate::codebook::{Codebook, ColumnCode, Shape, Values, MAX_CATEGORIES};
use crate::error::{Error, Result};
use crate::shape::{Tail, TAIL_LIMIT};
use crate::values::Kind;

impl ColumnTally {
    /// Decides how the column is modelled and fixes its codes (docs/column-kinds.md has the
    /// rules): categorical values with a tail table behind "other", numeric quantile bins with
    /// the values inside each, or left out of the model (only nulls, or an identifier).
    fn finish(self, max_categories: usize, n_bins: usize, choice: KindChoice) -> Result<Finished> {
        let values_seen = self.total().unwrap_or(0);
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
        let (Some(family), false) = (family, values_seen == 0) else {
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
                if choice != KindChoice::Auto {
                    return Err(too_many_distinct(&name));
                }
                return leave(format!(
                    "column '{name}' looks like an identifier (more than {DISTINCT_LIMIT} \
                     distinct values in {n} rows), so it is left out of the model and never \
                     sampled; bucket it first (by prefix, range or hash) to model it"
                ));
            }
            Tally::Int(m) => match integers(m, choice, n_bins, family != Kind::Time) {
                Integers::Identifier(n, d) => return identifier(n, d),
                Integers::Binned(column) => *column,
                Integers::Values(seen) => {
                    categorical(&name, seen, max_categories, has_null, Values::Int)
                }
            },
            Tally::UInt(m) => match integers(m, choice, n_bins, true) {
                Integers::Identifier(n, d) => return identifier(n, d),
                Integers::Binned(column) => *column,
                Integers::Values(seen) => {
                    categorical(&name, seen, max_categories, has_null, Values::UInt)
                }
            },
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

/// What an integer column becomes.
enum Integers<T> {
    /// Nearly all distinct over a short range: (rows, distinct values), left out.
    Identifier(u64, usize),
    Binned(Box<Column>),
    /// Categorical: the values with their counts.
    Values(Vec<(T, u64)>),
}

/// The kind of an integer column: categorical with at most `n_bins` distinct values, else
/// binned, unless (when `may_be_key`) its values look like keys (see [`looks_like_identifier`],
/// over a range at most twice their number).
fn integers<T: Copy + Into<i128>>(
    m: FxHashMap<T, u64>,
    choice: KindChoice,
    n_bins: usize,
    may_be_key: bool,
) -> Integers<T> {
    let n: u64 = m.values().sum();
    let d = m.len();
    if choice == KindChoice::Auto && may_be_key && d > n_bins {
        let (lo, hi) = m.keys().fold((i128::MAX, i128::MIN), |(l, h), k| {
            let k: i128 = (*k).into();
            (l.min(k), h.max(k))
        });
        if looks_like_keys(n, d, lo, hi) {
            return Integers::Identifier(n, d);
        }
    }
    if wants_bins(choice, d, n_bins) {
        let tally = int_tally(m.iter().map(|(k, c)| (Into::<i128>::into(*k) as f64, *c)));
        Integers::Binned(Box::new(numeric(&tally, n_bins, true)))
    } else {
        Integers::Values(m.into_iter().collect())
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

/// Integers that look like keys: nearly all distinct, over a range at most twice their number.
pub(super) fn looks_like_keys(n: u64, distinct: usize, low: i128, high: i128) -> bool {
    looks_like_identifier(n, distinct) && high - low < 2 * distinct as i128
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

impl CodebookBuilder {
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

#[cfg(test)]
mod tests {
    use super::*;
    use arrow_array::RecordBatch;

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
