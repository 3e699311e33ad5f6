"""Codes back to Arrow: the fitted column types by name, and codes as arrays of real values."""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from typing import Any, cast

import numpy as np
import numpy.typing as npt
import pyarrow as pa

from treewise.errors import CorruptModelError, DataError

__all__ = ["ColumnValues", "decode_column", "type_from_name", "type_name"]

_PLAIN: dict[str, Any] = {
    "bool": pa.bool_(),
    "int8": pa.int8(),
    "int16": pa.int16(),
    "int32": pa.int32(),
    "int64": pa.int64(),
    "uint8": pa.uint8(),
    "uint16": pa.uint16(),
    "uint32": pa.uint32(),
    "uint64": pa.uint64(),
    "float32": pa.float32(),
    "float64": pa.float64(),
    "string": pa.string(),
    "large_string": pa.large_string(),
    "string_view": pa.string_view(),
}
_NAMES = {t: name for name, t in _PLAIN.items()}
# pyarrow's own names of the time types: timestamp[us, tz=UTC], date32[day], duration[ms], ...
_TIME = re.compile(
    r"^(?:timestamp\[(s|ms|us|ns)(?:, tz=([^\]]+))?\]|date32\[day\]|date64\[ms\]"
    r"|time32\[(s|ms)\]|time64\[(us|ns)\]|duration\[(s|ms|us|ns)\])$"
)


def _is_time(dtype: pa.DataType) -> bool:
    return bool(
        pa.types.is_timestamp(dtype)
        or pa.types.is_date(dtype)
        or pa.types.is_time(dtype)
        or pa.types.is_duration(dtype)
    )


def type_name(dtype: pa.DataType, levels: pa.Array[Any] | None = None) -> str:
    """Our name for a supported Arrow type, as stored in the model file.

    An ordered dictionary of strings (an ordered pandas categorical) with its ``levels`` is
    ``ordered<INDEX,VALUE>:`` followed by the levels as a JSON list, so that they come back in
    order, unused ones included.
    """
    if pa.types.is_dictionary(dtype):
        value = dtype.value_type
        strings = pa.types.is_string(value) or pa.types.is_large_string(value)
        if dtype.ordered and levels is not None and strings:
            index = type_name(dtype.index_type)
            return f"ordered<{index},{type_name(value)}>:" + json.dumps(levels.to_pylist())
        return f"dictionary<{type_name(dtype.index_type)},{type_name(value)}>"
    if _is_time(dtype):
        return str(dtype)
    name = _NAMES.get(dtype)
    if name is None:
        # The codebook pass already refused unsupported types; this is a safe fallback.
        return "string"
    return name


def _time_type(name: str) -> pa.DataType | None:
    m = _TIME.match(name)
    if m is None:
        return None
    ts_unit, tz, t32, t64, dur = cast(tuple[Any, Any, Any, Any, Any], m.groups())
    if ts_unit is not None:
        return pa.timestamp(ts_unit, tz=tz)
    if name.startswith("date32"):
        return pa.date32()
    if name.startswith("date64"):
        return pa.date64()
    if t32 is not None:
        return pa.time32(t32)
    if t64 is not None:
        return pa.time64(t64)
    return pa.duration(dur)


def ordered_levels(name: str) -> list[str] | None:
    """The levels of an ordered dictionary type name, in order (None for any other name)."""
    if not name.startswith("ordered<"):
        return None
    _, sep, levels = name.partition(">:")
    try:
        parsed = json.loads(levels) if sep else None
    except ValueError:
        parsed = None
    if not isinstance(parsed, list) or not all(isinstance(v, str) for v in parsed):
        raise CorruptModelError(f"the model file names a malformed ordered type {name[:80]!r}")
    return parsed


def type_from_name(name: str) -> pa.DataType:
    """The Arrow type of a stored name; anything else means a damaged or foreign model file."""
    if ordered_levels(name) is not None:
        index, _, value = name[len("ordered<") :].partition(">")[0].partition(",")
        index_type, value_type = _PLAIN.get(index), _PLAIN.get(value)
        if index_type is not None and pa.types.is_integer(index_type) and value_type is not None:
            return cast(pa.DataType, pa.dictionary(index_type, value_type, ordered=True))
    elif name.startswith("dictionary<") and name.endswith(">"):
        index, _, value = name[len("dictionary<") : -1].partition(",")
        index_type, value_type = _PLAIN.get(index), _PLAIN.get(value)
        if index_type is not None and value_type is not None and pa.types.is_integer(index_type):
            return cast(pa.DataType, pa.dictionary(index_type, value_type))
    elif name in _PLAIN:
        return cast(pa.DataType, _PLAIN[name])
    else:
        time = _time_type(name)
        if time is not None:
            return time
    raise CorruptModelError(f"the model file names an unknown column type {name!r}")


def _as_time(ints: pa.Array[Any], time_type: pa.DataType) -> pa.Array[Any]:
    """Counts of units since the epoch as the time type (its storage, reinterpreted)."""
    storage = pa.int32() if time_type.bit_width == 32 else pa.int64()
    return ints.cast(storage).view(time_type)


def _values_array(values: list[Any], value_type: pa.DataType) -> pa.Array[Any]:
    """Kept values (as the codebook lists them) as an array of a type that ``take`` supports."""
    if _is_time(value_type):
        return _as_time(pa.array(values, type=pa.int64()), value_type)
    if pa.types.is_string_view(value_type):
        return pa.array(values, type=pa.string())
    return pa.array(values, type=value_type)


@dataclass(frozen=True)
class ColumnValues:
    """What one column's codes stand for, to turn codes into real values of the fitted type.

    A categorical code is its kept value; the "other" code is one of the rare values behind it
    (``tail``, with counts), never null; a numeric code is a number inside its bin, drawn by the
    core. Only the null code comes back as null.
    """

    dtype: pa.DataType
    numeric: bool
    levels: pa.Array[Any] | None
    kept: pa.Array[Any] | None
    other: int | None
    null: int | None
    tail: pa.Array[Any] | None
    tail_counts: npt.NDArray[np.float64] | None

    @classmethod
    def of(cls, codebook: Any, i: int, dtype: pa.DataType, name: str = "") -> ColumnValues:
        """Column ``i`` of a core codebook, with its fitted Arrow type (and stored type name)."""
        _family, values, has_other, has_null = codebook.column(i)
        _kind, _integral, tail, _within = codebook.shape(i)
        value_type = dtype.value_type if pa.types.is_dictionary(dtype) else dtype
        numeric = isinstance(values, tuple)
        n_values = len(values[0]) + 1 + len(values[3]) if numeric else len(values)
        kept = None if numeric else _values_array(list(values), value_type)
        tail_values = None if tail is None else _values_array(list(tail[0]), value_type)
        counts = None if tail is None else np.asarray(tail[1], dtype=np.float64)
        levels = ordered_levels(name)
        return cls(
            dtype=dtype,
            numeric=numeric,
            levels=None if levels is None else pa.array(levels, value_type),
            kept=kept,
            other=n_values if has_other else None,
            null=n_values + int(has_other) if has_null else None,
            tail=tail_values,
            tail_counts=counts,
        )

    def most_frequent_tail(self) -> int:
        """The index of the most frequent value behind "other" (ties: the first)."""
        return int(np.argmax(self.tail_counts)) if self.tail_counts is not None else -1

    def draw_tail(self, rng: np.random.Generator, n: int) -> npt.NDArray[np.int64]:
        """``n`` indexes into the tail, drawn by the values' counts."""
        counts = self.tail_counts
        if counts is None or n == 0:
            return np.full(n, -1, dtype=np.int64)
        return rng.choice(len(counts), size=n, p=counts / counts.sum()).astype(np.int64)


def decode_column(
    codes: npt.NDArray[np.uint16],
    column: ColumnValues,
    floats: npt.NDArray[np.float64] | None = None,
    tails: npt.NDArray[np.int64] | None = None,
    rng: np.random.Generator | None = None,
) -> pa.Array[Any]:
    """Codes as an array of the fitted type.

    A numeric column takes the number the core gave each code (``floats``). At the "other" code
    a categorical column takes the tail value in ``tails`` (an index per row, -1 elsewhere), or
    one drawn with ``rng``, or else the most frequent one. Codes past the null code (cells left
    unfilled) and the null code come back as null.
    """
    codes = np.asarray(codes)
    null = column.null if column.null is not None else np.iinfo(np.uint16).max
    missing = codes >= null
    dtype = column.dtype
    if column.numeric:
        if floats is None:
            raise ValueError("a numeric column needs the numbers its codes stand for")
        value_type = dtype.value_type if pa.types.is_dictionary(dtype) else dtype
        if pa.types.is_floating(value_type):
            out: pa.Array[Any] = pa.array(floats, mask=missing, type=pa.float64())
        else:
            # Integer and time columns: the core's numbers are whole (their bins hold integers).
            whole = np.where(missing, 0, np.nan_to_num(floats)).astype(np.int64)
            out = pa.array(whole, mask=missing, type=pa.int64())
            if _is_time(value_type):
                out = _as_time(out, value_type)
            elif pa.types.is_unsigned_integer(value_type):
                out = out.cast(pa.uint64())
        return out.cast(dtype)
    assert column.kept is not None
    n_kept = len(column.kept)
    if column.tail is None and column.levels is None and not pa.types.is_dictionary(dtype):
        # The common case, kept values and null only: one take, no copies of the codes.
        gone = codes >= n_kept
        mask = gone if gone.any() else None
        plain: Any = pa.array(codes.astype(np.int32, copy=False), mask=mask)
        taken = column.kept.take(plain)
        return taken if taken.type == dtype else taken.cast(dtype)
    index = codes.astype(np.int64)
    dictionary = column.kept
    if column.other is not None and column.tail is not None:
        at_other = codes == column.other
        if tails is None or len(tails) != len(codes):
            picked = (
                column.draw_tail(rng, int(at_other.sum()))
                if rng is not None
                else np.full(int(at_other.sum()), column.most_frequent_tail())
            )
            tails = np.full(len(codes), -1, dtype=np.int64)
            tails[at_other] = picked
        index = np.where(at_other, n_kept + np.asarray(tails, dtype=np.int64), index)
        missing = missing | (at_other & (np.asarray(tails) < 0))
        dictionary = pa.concat_arrays([column.kept, column.tail])
    else:
        missing = missing | (codes >= n_kept)
    indices: Any = pa.array(np.where(missing, 0, index).astype(np.int32), mask=missing)
    if column.levels is not None:
        # An ordered categorical: index into its own levels, in order, unused ones included.
        position = {v: k for k, v in enumerate(column.levels.to_pylist())}
        at = np.array([position.get(v, -1) for v in dictionary.to_pylist()], dtype=np.int32)
        mapped = at[np.where(missing, 0, index)] if len(at) else np.zeros(len(codes), np.int32)
        gone = missing | (mapped < 0)
        keys: Any = pa.array(np.where(gone, 0, mapped).astype(np.int32), mask=gone)
        return pa.DictionaryArray.from_arrays(keys, column.levels).cast(dtype)
    if pa.types.is_dictionary(dtype):
        return pa.DictionaryArray.from_arrays(indices, dictionary).cast(dtype)
    return dictionary.take(indices).cast(dtype)


#: The plain output type of each value family.
FAMILY_TYPES = {
    "bool": "bool",
    "int": "int64",
    "uint": "uint64",
    "str": "string",
    "float": "float64",
    "time": "timestamp[us]",
}
_RANGES = {
    f"{s}int{b}": r
    for b in (8, 16, 32, 64)
    for s, r in (
        ("", (-(2 ** (b - 1)), 2 ** (b - 1) - 1)),
        ("u", (0, 2**b - 1)),
    )
}


def _value_name(name: str) -> str:
    if name.startswith("ordered<"):
        return name[len("ordered<") :].partition(">")[0].partition(",")[2]
    if name.startswith("dictionary<") and name.endswith(">"):
        return name[len("dictionary<") : -1].partition(",")[2]
    return name


def family(name: str) -> str:
    """The value family (bool, int, uint, str, float, time) of a stored type name."""
    value = _value_name(name)
    if value.startswith("uint"):
        return "uint"
    if value.startswith("int"):
        return "int"
    if value.startswith("float"):
        return "float"
    if _TIME.match(value):
        return "time"
    return "bool" if value == "bool" else "str"


def widen(first: str, second: str) -> str:
    """One type name for a column seen with two types of one family (e.g. int8 and int64)."""
    if first == second:
        return first
    if first.startswith("ordered<") or second.startswith("ordered<"):
        # Two different level lists: their union has no order of its own.
        return "string"
    if family(first) == "time":
        # Two time types (units, zones): the first one seen; the core checks the family.
        return first
    return FAMILY_TYPES[family(first)]


def fitting_type(name: str, values: list[Any], n_codes: int) -> str:
    """The type name to store for a column: ``name`` if it can hold every value it gives back.

    ``values`` are the values that can come back (kept and tail values, or the bins' lowest and
    highest numbers) and ``n_codes`` how many distinct values a dictionary must index. Otherwise
    the family's plain type: a column first seen as int8 may hold 300 by the end of the data,
    and a dictionary's index type may be too narrow for all its values.
    """
    plain = _value_name(name)
    numbers = [v for v in values if isinstance(v, (int, float)) and not isinstance(v, bool)]
    if plain in _RANGES and numbers:
        low, high = _RANGES[plain]
        if min(numbers) < low or max(numbers) > high:
            return FAMILY_TYPES[family(name)]
    levels = ordered_levels(name)
    if levels is not None:
        index = name[len("ordered<") :].partition(">")[0].partition(",")[0]
        missing = {v for v in values if isinstance(v, str)} - set(levels)
        if missing or index not in _RANGES or len(levels) - 1 > _RANGES[index][1]:
            return "string"
        return name
    if name != plain:
        index = name[len("dictionary<") :].partition(",")[0]
        if index not in _RANGES or n_codes - 1 > _RANGES[index][1]:
            return FAMILY_TYPES[family(name)]
    return name


#: Nanoseconds per unit of each pyarrow time unit.
_UNITS = {"s": 1_000_000_000, "ms": 1_000_000, "us": 1_000, "ns": 1}
_DAY = 86_400_000_000_000


def _time_unit(dtype: pa.DataType) -> tuple[str, int] | None:
    """A time type's origin (epoch, midnight or span) and its unit in nanoseconds."""
    if pa.types.is_timestamp(dtype):
        return "epoch", _UNITS[dtype.unit]
    if pa.types.is_date32(dtype):
        return "epoch", _DAY
    if pa.types.is_date64(dtype):
        return "epoch", _UNITS["ms"]
    if pa.types.is_time(dtype):
        return "midnight", _UNITS[dtype.unit]
    if pa.types.is_duration(dtype):
        return "span", _UNITS[dtype.unit]
    return None


def conform_time_column(column: pa.Array[Any], fitted: str, name: str) -> pa.Array[Any]:
    """``column`` in the unit of the stored time type name ``fitted``, as the core converts.

    The same integer arithmetic as ``rust/core/src/times.rs``: counts of the given unit become
    counts of the fitted one, exactly into a finer unit and rounded down (toward the past, in
    UTC) into a coarser one. Timestamps and dates convert into each other, times of day and
    durations only within their kind. Any other column, or one already in its fitted unit,
    comes back as it is; a value the fitted type cannot hold is a ``DataError``.
    """
    target = _time_type(fitted)
    given = _time_unit(column.type)
    wanted = None if target is None else _time_unit(target)
    if target is None or given is None or wanted is None or given[0] != wanted[0]:
        return column
    if given[1] == wanted[1] and column.type.id == target.id:
        return column
    narrow = pa.types.is_date32(column.type) or pa.types.is_time32(column.type)
    ints = column.cast(pa.int32()) if narrow else column.cast(pa.int64())
    valid = np.asarray(column.is_valid())
    values = ints.cast(pa.int64()).fill_null(0).to_numpy()
    (_, given_ns), (_, wanted_ns) = given, wanted
    if given_ns >= wanted_ns:
        factor = given_ns // wanted_ns
        limit = np.iinfo(np.int64).max // factor
        if (np.abs(values[valid]) > limit).any():
            raise DataError(
                f"column {name!r}: a value of type {column.type} does not fit the fitted "
                f"{target}; give the column as {target}"
            )
        converted = values * factor
    else:
        converted = np.floor_divide(values, wanted_ns // given_ns)
    storage = np.int32 if pa.types.is_date32(target) or pa.types.is_time32(target) else np.int64
    if storage is np.int32 and valid.any() and np.abs(converted[valid]).max() > 2**31 - 1:
        raise DataError(
            f"column {name!r}: a value of type {column.type} does not fit the fitted {target}; "
            f"give the column as {target}"
        )
    return pa.array(converted.astype(storage), type=target, mask=~valid)
