//! Time columns in the unit a model was fitted with.
//!
//! A model keeps a time column's values (and bin edges) as counts of its fitted unit: a
//! `timestamp[us]` column as microseconds since the epoch. Data read later may carry the same
//! instants in another unit (Parquet stores `timestamp[s]` as milliseconds; pandas gives
//! nanoseconds), so before a fitted model encodes a batch, each time column is rescaled to the
//! fitted unit: exactly when the fitted unit is finer, rounded down (toward the past) when it is
//! coarser. Timestamps and dates count from the same epoch and convert into each other; times of
//! day and durations convert only within their own kind.

use std::sync::Arc;

use arrow_array::types::{
    Date32Type, Date64Type, DurationMicrosecondType, DurationMillisecondType,
    DurationNanosecondType, DurationSecondType, Time32MillisecondType, Time32SecondType,
    Time64MicrosecondType, Time64NanosecondType, TimestampMicrosecondType,
    TimestampMillisecondType, TimestampNanosecondType, TimestampSecondType,
};
use arrow_array::{Array, ArrayRef, PrimitiveArray, RecordBatch};
use arrow_schema::{DataType, Field, Schema, TimeUnit};

use crate::error::{Error, Result};
use crate::values::each_i64;

/// What a time value counts from: the epoch (timestamps, dates), midnight, or nothing.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Origin {
    Epoch,
    Midnight,
    Span,
}

const NANOS_PER_DAY: i128 = 86_400_000_000_000;

fn nanos(unit: &TimeUnit) -> i128 {
    match unit {
        TimeUnit::Second => 1_000_000_000,
        TimeUnit::Millisecond => 1_000_000,
        TimeUnit::Microsecond => 1_000,
        TimeUnit::Nanosecond => 1,
    }
}

/// A time type's origin and its unit in nanoseconds; None for other types.
fn unit_of(dtype: &DataType) -> Option<(Origin, i128)> {
    Some(match dtype {
        DataType::Timestamp(unit, _) => (Origin::Epoch, nanos(unit)),
        DataType::Date32 => (Origin::Epoch, NANOS_PER_DAY),
        DataType::Date64 => (Origin::Epoch, 1_000_000),
        DataType::Time32(unit) | DataType::Time64(unit) => (Origin::Midnight, nanos(unit)),
        DataType::Duration(unit) => (Origin::Span, nanos(unit)),
        _ => return None,
    })
}

fn parse_unit(text: &str) -> Option<TimeUnit> {
    Some(match text {
        "s" => TimeUnit::Second,
        "ms" => TimeUnit::Millisecond,
        "us" => TimeUnit::Microsecond,
        "ns" => TimeUnit::Nanosecond,
        _ => return None,
    })
}

/// The Arrow time type a stored type name stands for (`timestamp[us, tz=UTC]`, `date32[day]`,
/// `date64[ms]`, `time32[s]`, `time64[ns]`, `duration[ms]`, as pyarrow names them); None for a
/// name of another type.
pub fn time_type(name: &str) -> Option<DataType> {
    let (head, rest) = name.split_once('[')?;
    let inner = rest.strip_suffix(']')?;
    Some(match head {
        "timestamp" => {
            let (unit, zone) = match inner.split_once(", tz=") {
                Some((unit, zone)) => (unit, Some(Arc::<str>::from(zone))),
                None => (inner, None),
            };
            DataType::Timestamp(parse_unit(unit)?, zone)
        }
        "date32" if inner == "day" => DataType::Date32,
        "date64" if inner == "ms" => DataType::Date64,
        "time32" => DataType::Time32(parse_unit(inner)?),
        "time64" => DataType::Time64(parse_unit(inner)?),
        "duration" => DataType::Duration(parse_unit(inner)?),
        _ => return None,
    })
}

/// `array` (a time array of unit `from` ns) as `target`'s unit (`to` ns), rounded down.
fn rescale(
    array: &dyn Array,
    name: &str,
    from: i128,
    target: &DataType,
    to: i128,
) -> Result<ArrayRef> {
    let mut values: Vec<Option<i64>> = Vec::with_capacity(array.len());
    let mut bad = None;
    each_i64(array, |v| {
        values.push(v.and_then(|v| {
            let scaled = (i128::from(v) * from).div_euclid(to);
            let fits = i64::try_from(scaled).ok();
            if fits.is_none() && bad.is_none() {
                bad = Some(v);
            }
            fits
        }))
    })?;
    let narrow = |values: Vec<Option<i64>>| -> Result<Vec<Option<i32>>> {
        values
            .into_iter()
            .map(|v| v.map(i32::try_from).transpose())
            .collect::<std::result::Result<_, _>>()
            .map_err(|_| out_of_range(name, target))
    };
    if bad.is_some() {
        return Err(out_of_range(name, target));
    }
    Ok(match target {
        DataType::Timestamp(unit, zone) => {
            let zone = zone.clone();
            match unit {
                TimeUnit::Second => Arc::new(
                    PrimitiveArray::<TimestampSecondType>::from(values).with_timezone_opt(zone),
                ),
                TimeUnit::Millisecond => Arc::new(
                    PrimitiveArray::<TimestampMillisecondType>::from(values)
                        .with_timezone_opt(zone),
                ),
                TimeUnit::Microsecond => Arc::new(
                    PrimitiveArray::<TimestampMicrosecondType>::from(values)
                        .with_timezone_opt(zone),
                ),
                TimeUnit::Nanosecond => Arc::new(
                    PrimitiveArray::<TimestampNanosecondType>::from(values).with_timezone_opt(zone),
                ),
            }
        }
        DataType::Date32 => Arc::new(PrimitiveArray::<Date32Type>::from(narrow(values)?)),
        DataType::Date64 => Arc::new(PrimitiveArray::<Date64Type>::from(values)),
        DataType::Time32(TimeUnit::Second) => {
            Arc::new(PrimitiveArray::<Time32SecondType>::from(narrow(values)?))
        }
        DataType::Time32(_) => Arc::new(PrimitiveArray::<Time32MillisecondType>::from(narrow(
            values,
        )?)),
        DataType::Time64(TimeUnit::Nanosecond) => {
            Arc::new(PrimitiveArray::<Time64NanosecondType>::from(values))
        }
        DataType::Time64(_) => Arc::new(PrimitiveArray::<Time64MicrosecondType>::from(values)),
        DataType::Duration(unit) => match unit {
            TimeUnit::Second => Arc::new(PrimitiveArray::<DurationSecondType>::from(values)),
            TimeUnit::Millisecond => {
                Arc::new(PrimitiveArray::<DurationMillisecondType>::from(values))
            }
            TimeUnit::Microsecond => {
                Arc::new(PrimitiveArray::<DurationMicrosecondType>::from(values))
            }
            TimeUnit::Nanosecond => {
                Arc::new(PrimitiveArray::<DurationNanosecondType>::from(values))
            }
        },
        other => {
            return Err(Error::Invalid(format!(
                "column {name:?}: cannot convert times into {other}"
            )))
        }
    })
}

fn out_of_range(name: &str, target: &DataType) -> Error {
    Error::Invalid(format!(
        "column {name:?}: a time value does not fit the fitted type {target} once converted to \
         its unit; convert the column to {target} (or fit on data in this unit)"
    ))
}

/// `batch` (a model's columns, in order) with every time column in the unit of its fitted type
/// name in `dtypes`. A column already in its fitted unit, or of another kind, is kept as it is
/// (the codebook then checks it); the batch itself when nothing changes.
pub fn conform_times(batch: &RecordBatch, dtypes: &[String]) -> Result<RecordBatch> {
    if dtypes.len() != batch.num_columns() {
        return Ok(batch.clone());
    }
    let schema = batch.schema();
    let mut columns: Vec<ArrayRef> = batch.columns().to_vec();
    let mut fields: Vec<Field> = schema.fields().iter().map(|f| f.as_ref().clone()).collect();
    let mut changed = false;
    for (c, name) in dtypes.iter().enumerate() {
        let Some(target) = time_type(name) else {
            continue;
        };
        let given = columns[c].data_type().clone();
        let (Some((from_origin, from)), Some((to_origin, to))) =
            (unit_of(&given), unit_of(&target))
        else {
            continue;
        };
        if from_origin != to_origin
            || (from == to && std::mem::discriminant(&given) == std::mem::discriminant(&target))
        {
            continue;
        }
        let column = fields[c].name().clone();
        columns[c] = rescale(columns[c].as_ref(), &column, from, &target, to)?;
        fields[c] = Field::new(column, target, true);
        changed = true;
    }
    if !changed {
        return Ok(batch.clone());
    }
    RecordBatch::try_new(Arc::new(Schema::new(fields)), columns)
        .map_err(|e| Error::Invalid(format!("time columns in their fitted units: {e}")))
}

#[cfg(test)]
mod tests {
    use super::*;
    use arrow_array::cast::AsArray;

    fn one(array: ArrayRef) -> Result<RecordBatch> {
        RecordBatch::try_from_iter([("t", array)]).map_err(|e| Error::Invalid(e.to_string()))
    }

    #[test]
    fn stored_names_parse_as_pyarrow_writes_them() {
        assert_eq!(
            time_type("timestamp[us, tz=UTC]"),
            Some(DataType::Timestamp(
                TimeUnit::Microsecond,
                Some("UTC".into())
            ))
        );
        assert_eq!(
            time_type("timestamp[ns]"),
            Some(DataType::Timestamp(TimeUnit::Nanosecond, None))
        );
        assert_eq!(time_type("date32[day]"), Some(DataType::Date32));
        assert_eq!(time_type("date64[ms]"), Some(DataType::Date64));
        assert_eq!(
            time_type("time32[ms]"),
            Some(DataType::Time32(TimeUnit::Millisecond))
        );
        assert_eq!(
            time_type("duration[s]"),
            Some(DataType::Duration(TimeUnit::Second))
        );
        assert_eq!(time_type("int64"), None);
        assert_eq!(time_type("timestamp[hours]"), None);
    }

    #[test]
    fn units_convert_exactly_or_round_down() -> Result<()> {
        // 1.5 s and -1.5 s after the epoch in ns, into seconds: 1 and -2 (toward the past).
        let ns: ArrayRef = Arc::new(PrimitiveArray::<TimestampNanosecondType>::from(vec![
            Some(1_500_000_000),
            None,
            Some(-1_500_000_000),
        ]));
        let got = conform_times(&one(ns)?, &["timestamp[s]".into()])?;
        let s = got.column(0).as_primitive::<TimestampSecondType>();
        assert_eq!(s.iter().collect::<Vec<_>>(), vec![Some(1), None, Some(-2)]);
        // Days into milliseconds, exactly; and a date64 into the fitted date32.
        let days: ArrayRef = Arc::new(PrimitiveArray::<Date32Type>::from(vec![Some(1), Some(-1)]));
        let got = conform_times(&one(days)?, &["timestamp[ms, tz=UTC]".into()])?;
        assert_eq!(
            got.column(0).data_type(),
            &DataType::Timestamp(TimeUnit::Millisecond, Some("UTC".into()))
        );
        let ms = got.column(0).as_primitive::<TimestampMillisecondType>();
        assert_eq!(ms.values().to_vec(), vec![86_400_000, -86_400_000]);
        let d64: ArrayRef = Arc::new(PrimitiveArray::<Date64Type>::from(vec![Some(
            86_400_000 * 3 + 5,
        )]));
        let got = conform_times(&one(d64)?, &["date32[day]".into()])?;
        assert_eq!(got.column(0).as_primitive::<Date32Type>().value(0), 3);
        // The same unit, another kind (time of day against a timestamp), another type: kept.
        let tod: ArrayRef = Arc::new(PrimitiveArray::<Time64MicrosecondType>::from(vec![Some(5)]));
        let kept = one(tod)?;
        assert_eq!(
            conform_times(&kept, &["timestamp[s]".into()])?
                .column(0)
                .data_type(),
            kept.column(0).data_type()
        );
        assert_eq!(
            conform_times(&kept, &["time64[us]".into()])?
                .column(0)
                .data_type(),
            kept.column(0).data_type()
        );
        // A value the fitted unit cannot hold is an error that names the column.
        let far: ArrayRef = Arc::new(PrimitiveArray::<TimestampSecondType>::from(vec![Some(
            i64::MAX / 2,
        )]));
        let err = conform_times(&one(far)?, &["timestamp[ns]".into()])
            .map(|_| ())
            .err();
        assert!(matches!(err, Some(Error::Invalid(m)) if m.contains("\"t\"")));
        Ok(())
    }
}
