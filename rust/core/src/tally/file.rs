//! The tally file: a codebook pass's tallies as bytes, so that workers can send them to be merged.

use rustc_hash::FxHashMap;

use super::{CodebookBuilder, ColumnTally, FloatTally, Tally, DISTINCT_LIMIT};
use crate::bytes::{Reader, Writer};
use crate::error::{Error, Result};
use crate::values::Kind;

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
            if name.contains('\0') {
                return Err(corrupt_tally("a column name contains the NUL character"));
            }
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
                    // The range of the finite values seen: empty, or finite with low <= high.
                    let range = if count == 0 {
                        low == f64::INFINITY && high == f64::NEG_INFINITY
                    } else {
                        low.is_finite() && high.is_finite() && low <= high
                    };
                    if level > 52 || total != Some(count) || !finite || !range {
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
                    | (Some(Kind::Int | Kind::Time), 2 | 5 | 6)
                    | (Some(Kind::UInt), 3 | 5 | 6)
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
