//! Typed walks over one Arrow array, so the codebook reads every supported type through one door.

use arrow_array::cast::AsArray;
use arrow_array::types::{
    Date32Type, Date64Type, DurationMicrosecondType, DurationMillisecondType,
    DurationNanosecondType, DurationSecondType, Float32Type, Float64Type, Int16Type, Int32Type,
    Int64Type, Int8Type, Time32MillisecondType, Time32SecondType, Time64MicrosecondType,
    Time64NanosecondType, TimestampMicrosecondType, TimestampMillisecondType,
    TimestampNanosecondType, TimestampSecondType, UInt16Type, UInt32Type, UInt64Type, UInt8Type,
};
use arrow_array::{Array, ArrowPrimitiveType, PrimitiveArray};
use arrow_schema::{DataType, TimeUnit};

use crate::error::{Error, Result};

/// The value family of a column; all Arrow types of one family share a codebook.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Kind {
    Bool,
    Int,
    UInt,
    Str,
    /// Floats: kept as values when few are distinct, else binned into quantile intervals.
    Float,
    /// Timestamps, dates, times of day and durations: integers over their epoch, in their unit.
    Time,
}

impl Kind {
    /// The name used in messages and in the model file.
    pub fn name(self) -> &'static str {
        match self {
            Kind::Bool => "bool",
            Kind::Int => "int",
            Kind::UInt => "uint",
            Kind::Str => "str",
            Kind::Float => "float",
            Kind::Time => "time",
        }
    }

    /// The inverse of [`Kind::name`].
    pub fn from_name(name: &str) -> Option<Kind> {
        Some(match name {
            "bool" => Kind::Bool,
            "int" => Kind::Int,
            "uint" => Kind::UInt,
            "str" => Kind::Str,
            "float" => Kind::Float,
            "time" => Kind::Time,
            _ => return None,
        })
    }
}

pub(crate) const SUPPORTED: &str =
    "bool, signed and unsigned integers, strings (utf8, large_utf8, utf8_view), \
     dictionary/categorical of these, float32/float64, and timestamps, dates, times and durations";

/// The family of an Arrow type. `Ok(None)` is the `null` type, which fits any family.
pub fn classify(column: &str, dt: &DataType) -> Result<Option<Kind>> {
    Ok(Some(match dt {
        DataType::Null => return Ok(None),
        DataType::Boolean => Kind::Bool,
        DataType::Int8 | DataType::Int16 | DataType::Int32 | DataType::Int64 => Kind::Int,
        DataType::UInt8 | DataType::UInt16 | DataType::UInt32 | DataType::UInt64 => Kind::UInt,
        DataType::Utf8 | DataType::LargeUtf8 | DataType::Utf8View => Kind::Str,
        DataType::Float32 | DataType::Float64 => Kind::Float,
        DataType::Timestamp(..)
        | DataType::Date32
        | DataType::Date64
        | DataType::Time32(_)
        | DataType::Time64(_)
        | DataType::Duration(_) => Kind::Time,
        DataType::Dictionary(_, value) => return classify(column, value),
        other => {
            let hint = match other {
                DataType::Float16 => "cast it to float32",
                DataType::Decimal32(..)
                | DataType::Decimal64(..)
                | DataType::Decimal128(..)
                | DataType::Decimal256(..) => "cast it to float64 to bin it, or to string",
                _ => "cast it to a supported type, or leave it out with columns=",
            };
            return Err(Error::Data(format!(
                "column '{column}' has type {other}, which treewise cannot encode; {hint}. \
                 Supported types: {SUPPORTED}."
            )));
        }
    }))
}

fn primitive<T: ArrowPrimitiveType>(array: &dyn Array) -> Result<&PrimitiveArray<T>> {
    array.as_primitive_opt::<T>().ok_or_else(|| {
        Error::Invalid(format!(
            "expected a primitive array, got {}",
            array.data_type()
        ))
    })
}

fn walk_primitive<T, V>(
    array: &dyn Array,
    convert: impl Fn(T::Native) -> V,
    mut f: impl FnMut(Option<V>),
) -> Result<()>
where
    T: ArrowPrimitiveType,
{
    let arr = primitive::<T>(array)?;
    match arr.nulls() {
        None => arr.values().iter().for_each(|v| f(Some(convert(*v)))),
        Some(nulls) => arr
            .values()
            .iter()
            .zip(nulls.iter())
            .for_each(|(v, valid)| f(valid.then(|| convert(*v)))),
    }
    Ok(())
}

fn mismatch(array: &dyn Array, kind: Kind) -> Error {
    Error::Invalid(format!(
        "array of type {} read as {}",
        array.data_type(),
        kind.name()
    ))
}

/// Calls `f` with each row of a bool array (`None` for null), in row order.
pub fn each_bool(array: &dyn Array, mut f: impl FnMut(Option<bool>)) -> Result<()> {
    let arr = array
        .as_boolean_opt()
        .ok_or_else(|| mismatch(array, Kind::Bool))?;
    arr.iter().for_each(&mut f);
    Ok(())
}

/// Calls `f` with each row of a signed integer or time array, widened to i64 (a time value is
/// its count of units since the epoch, as Arrow stores it).
pub fn each_i64(array: &dyn Array, f: impl FnMut(Option<i64>)) -> Result<()> {
    use DataType as T;
    match array.data_type() {
        T::Int8 => walk_primitive::<Int8Type, _>(array, i64::from, f),
        T::Int16 => walk_primitive::<Int16Type, _>(array, i64::from, f),
        T::Int32 => walk_primitive::<Int32Type, _>(array, i64::from, f),
        T::Int64 => walk_primitive::<Int64Type, _>(array, |v| v, f),
        T::Date32 => walk_primitive::<Date32Type, _>(array, i64::from, f),
        T::Date64 => walk_primitive::<Date64Type, _>(array, |v| v, f),
        T::Time32(TimeUnit::Second) => walk_primitive::<Time32SecondType, _>(array, i64::from, f),
        T::Time32(_) => walk_primitive::<Time32MillisecondType, _>(array, i64::from, f),
        T::Time64(TimeUnit::Nanosecond) => {
            walk_primitive::<Time64NanosecondType, _>(array, |v| v, f)
        }
        T::Time64(_) => walk_primitive::<Time64MicrosecondType, _>(array, |v| v, f),
        T::Timestamp(unit, _) => match unit {
            TimeUnit::Second => walk_primitive::<TimestampSecondType, _>(array, |v| v, f),
            TimeUnit::Millisecond => walk_primitive::<TimestampMillisecondType, _>(array, |v| v, f),
            TimeUnit::Microsecond => walk_primitive::<TimestampMicrosecondType, _>(array, |v| v, f),
            TimeUnit::Nanosecond => walk_primitive::<TimestampNanosecondType, _>(array, |v| v, f),
        },
        T::Duration(unit) => match unit {
            TimeUnit::Second => walk_primitive::<DurationSecondType, _>(array, |v| v, f),
            TimeUnit::Millisecond => walk_primitive::<DurationMillisecondType, _>(array, |v| v, f),
            TimeUnit::Microsecond => walk_primitive::<DurationMicrosecondType, _>(array, |v| v, f),
            TimeUnit::Nanosecond => walk_primitive::<DurationNanosecondType, _>(array, |v| v, f),
        },
        _ => Err(mismatch(array, Kind::Int)),
    }
}

/// Calls `f` with each row of any number or time array as an f64 (integers beyond 2^53 round to
/// the nearest float, which keeps their order). NaN is passed through.
pub fn each_number(array: &dyn Array, mut f: impl FnMut(Option<f64>)) -> Result<()> {
    match array.data_type() {
        DataType::Float32 | DataType::Float64 => each_f64(array, f),
        DataType::UInt8 | DataType::UInt16 | DataType::UInt32 | DataType::UInt64 => {
            each_u64(array, |v| f(v.map(|x| x as f64)))
        }
        _ => each_i64(array, |v| f(v.map(|x| x as f64))),
    }
}

/// Calls `f` with each row of an unsigned integer array, widened to u64.
pub fn each_u64(array: &dyn Array, f: impl FnMut(Option<u64>)) -> Result<()> {
    match array.data_type() {
        DataType::UInt8 => walk_primitive::<UInt8Type, _>(array, u64::from, f),
        DataType::UInt16 => walk_primitive::<UInt16Type, _>(array, u64::from, f),
        DataType::UInt32 => walk_primitive::<UInt32Type, _>(array, u64::from, f),
        DataType::UInt64 => walk_primitive::<UInt64Type, _>(array, |v| v, f),
        _ => Err(mismatch(array, Kind::UInt)),
    }
}

/// Calls `f` with each row of a float array, widened to f64. NaN is passed through.
pub fn each_f64(array: &dyn Array, f: impl FnMut(Option<f64>)) -> Result<()> {
    match array.data_type() {
        DataType::Float32 => walk_primitive::<Float32Type, _>(array, f64::from, f),
        DataType::Float64 => walk_primitive::<Float64Type, _>(array, |v| v, f),
        _ => Err(mismatch(array, Kind::Float)),
    }
}

/// Calls `f` with each row of a string array (utf8, large_utf8 or utf8_view).
pub fn each_str(array: &dyn Array, mut f: impl FnMut(Option<&str>)) -> Result<()> {
    match array.data_type() {
        DataType::Utf8 => array.as_string::<i32>().iter().for_each(&mut f),
        DataType::LargeUtf8 => array.as_string::<i64>().iter().for_each(&mut f),
        DataType::Utf8View => array.as_string_view().iter().for_each(&mut f),
        _ => return Err(mismatch(array, Kind::Str)),
    }
    Ok(())
}

/// Each row's dictionary key (`None` for null) and the dictionary values.
pub type DictKeys<'a> = (Vec<Option<usize>>, &'a dyn Array);

/// The dictionary keys of each row of `column` as indexes into its values (`None` for a null
/// key). Keys are checked against the dictionary, so a malformed array is an error, not a panic.
pub fn dictionary_keys<'a>(column: &str, array: &'a dyn Array) -> Result<Option<DictKeys<'a>>> {
    let Some(dict) = array.as_any_dictionary_opt() else {
        return Ok(None);
    };
    let n_values = dict.values().len();
    let keys = dict.keys();
    let mut out = Vec::with_capacity(keys.len());
    let mut bad: Option<(usize, i128)> = None;
    let mut push = |row: usize, key: Option<i128>| match key {
        Some(k) if (0..n_values as i128).contains(&k) => out.push(usize::try_from(k).ok()),
        Some(k) => {
            bad.get_or_insert((row, k));
            out.push(None);
        }
        None => out.push(None),
    };
    match keys.data_type() {
        DataType::Int8 | DataType::Int16 | DataType::Int32 | DataType::Int64 => {
            let mut row = 0;
            each_i64(keys, |k| {
                push(row, k.map(i128::from));
                row += 1;
            })?
        }
        _ => {
            let mut row = 0;
            each_u64(keys, |k| {
                push(row, k.map(i128::from));
                row += 1;
            })?
        }
    }
    if let Some((row, k)) = bad {
        return Err(Error::Data(format!(
            "column '{column}' is a dictionary array whose key {k} at row {row} of this batch is \
             outside its {n_values} dictionary values; the data is malformed, rebuild the column"
        )));
    }
    Ok(Some((out, dict.values().as_ref())))
}
