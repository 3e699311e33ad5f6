//! Output type names of model columns (the Arrow type `sample` returns) and the check that a
//! column's kept values fit the type it names.

use crate::codebook::{ColumnCode, Values};
use crate::values::Kind;

fn int_range(name: &str) -> Option<(i128, i128)> {
    Some(match name {
        "int8" => (i8::MIN.into(), i8::MAX.into()),
        "int16" => (i16::MIN.into(), i16::MAX.into()),
        "int32" => (i32::MIN.into(), i32::MAX.into()),
        "int64" => (i64::MIN.into(), i64::MAX.into()),
        "uint8" => (0, u8::MAX.into()),
        "uint16" => (0, u16::MAX.into()),
        "uint32" => (0, u32::MAX.into()),
        "uint64" => (0, u64::MAX.into()),
        _ => return None,
    })
}

/// Whether `name` is one of Arrow's time types as pyarrow names them (timestamp[us, tz=...],
/// date32[day], date64[ms], time32[s], time64[ns], duration[ms]).
fn is_time_name(name: &str) -> bool {
    [
        "timestamp[",
        "date32[",
        "date64[",
        "time32[",
        "time64[",
        "duration[",
    ]
    .iter()
    .any(|p| name.starts_with(p))
        && name.ends_with(']')
}

fn value_type_fits(name: &str, column: &ColumnCode) -> bool {
    let within = |lo: i128, hi: i128, mut it: Box<dyn Iterator<Item = i128> + '_>| {
        it.all(|v| lo <= v && v <= hi)
    };
    let ints = |it: Box<dyn Iterator<Item = i128> + '_>| {
        int_range(name).is_some_and(|(lo, hi)| within(lo, hi, it))
    };
    match (column.family(), column.values()) {
        (Kind::Time, _) => is_time_name(name),
        (_, Values::Bool(_)) => name == "bool",
        (_, Values::Str(_)) => matches!(name, "string" | "large_string" | "string_view"),
        (_, Values::Float(_)) => matches!(name, "float32" | "float64"),
        (Kind::Float, Values::Bins { .. }) => matches!(name, "float32" | "float64"),
        (Kind::Int, Values::Bins { low, high, .. }) => {
            name.starts_with("int") && ints(Box::new([*low, *high].into_iter().map(|x| x as i128)))
        }
        (Kind::UInt, Values::Bins { low, high, .. }) => {
            name.starts_with("uint") && ints(Box::new([*low, *high].into_iter().map(|x| x as i128)))
        }
        (_, Values::Bins { .. }) => false,
        (_, Values::Int(v)) => {
            name.starts_with("int") && ints(Box::new(v.iter().map(|x| i128::from(*x))))
        }
        (_, Values::UInt(v)) => {
            name.starts_with("uint") && ints(Box::new(v.iter().map(|x| i128::from(*x))))
        }
    }
}

/// Whether `name` is a type name treewise writes and can hold every kept value of `column`:
/// a plain type, `dictionary<INDEX,VALUE>` with a signed or unsigned integer index, or an
/// ordered dictionary of strings with its levels.
pub fn fits(name: &str, column: &ColumnCode) -> bool {
    // An ordered dictionary of strings with its levels: `ordered<INDEX,VALUE>:["a","b"]`.
    if let Some((types, levels)) = name
        .strip_prefix("ordered<")
        .and_then(|r| r.split_once(">:"))
    {
        return match types.split_once(',') {
            Some((index, value)) => {
                int_range(index).is_some()
                    && levels.starts_with('[')
                    && levels.ends_with(']')
                    && value_type_fits(value, column)
            }
            None => false,
        };
    }
    if let Some(inner) = name
        .strip_prefix("dictionary<")
        .and_then(|r| r.strip_suffix('>'))
    {
        return match inner.split_once(',') {
            Some((index, value)) => int_range(index).is_some() && value_type_fits(value, column),
            None => false,
        };
    }
    value_type_fits(name, column)
}

/// Whether values of this type are narrowed to 32-bit floats on output.
pub fn is_float32(name: &str) -> bool {
    name == "float32" || name.ends_with(",float32>")
}
