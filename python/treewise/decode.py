"""Codes back to Arrow: the fitted column types by name, and sampled codes as typed arrays."""

from __future__ import annotations

from typing import Any, cast

import numpy as np
import numpy.typing as npt
import pyarrow as pa

from treewise.categories import OTHER, Bin
from treewise.errors import CorruptModelError

__all__ = ["decode_column", "type_from_name", "type_name"]

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


def type_name(dtype: pa.DataType) -> str:
    """Our name for a supported Arrow type, as stored in the model file."""
    if pa.types.is_dictionary(dtype):
        return f"dictionary<{type_name(dtype.index_type)},{type_name(dtype.value_type)}>"
    name = _NAMES.get(dtype)
    if name is None:
        # The codebook pass already refused unsupported types; this is a safe fallback.
        return "string"
    return name


def type_from_name(name: str) -> pa.DataType:
    """The Arrow type of a stored name; anything else means a damaged or foreign model file."""
    if name.startswith("dictionary<") and name.endswith(">"):
        index, _, value = name[len("dictionary<") : -1].partition(",")
        index_type, value_type = _PLAIN.get(index), _PLAIN.get(value)
        if index_type is not None and value_type is not None and pa.types.is_integer(index_type):
            return cast(pa.DataType, pa.dictionary(index_type, value_type))
    elif name in _PLAIN:
        return cast(pa.DataType, _PLAIN[name])
    raise CorruptModelError(f"the model file names an unknown column type {name!r}")


def decode_column(
    codes: npt.NDArray[np.uint16],
    categories: list[Any],
    dtype: pa.DataType,
    floats: npt.NDArray[np.float64] | None,
) -> pa.Array[Any]:
    """Sampled codes as an array of the fitted type.

    A float column takes the number drawn inside its bin; the null code, and the "other" code
    (which stands for many rare values and no single one), come back as null.
    """
    if floats is not None:
        return pa.array(floats, mask=np.isnan(floats)).cast(dtype)
    values = [c for c in categories if c is not OTHER and c is not None and not isinstance(c, Bin)]
    value_type = dtype.value_type if pa.types.is_dictionary(dtype) else dtype
    dictionary = pa.array(values, type=value_type)
    indices: Any = pa.array(codes.astype(np.int32), mask=codes >= len(values))
    if pa.types.is_dictionary(dtype):
        return pa.DictionaryArray.from_arrays(indices, dictionary).cast(dtype)
    return dictionary.take(indices)


#: The plain output type of each value family.
FAMILY_TYPES = {
    "bool": "bool",
    "int": "int64",
    "uint": "uint64",
    "str": "string",
    "float": "float64",
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
    if name.startswith("dictionary<") and name.endswith(">"):
        return name[len("dictionary<") : -1].partition(",")[2]
    return name


def family(name: str) -> str:
    """The value family (bool, int, uint, str, float) of a stored type name."""
    value = _value_name(name)
    if value.startswith("uint"):
        return "uint"
    if value.startswith("int"):
        return "int"
    if value.startswith("float"):
        return "float"
    return "bool" if value == "bool" else "str"


def widen(first: str, second: str) -> str:
    """One type name for a column seen with two types of one family (e.g. int8 and int64)."""
    return first if first == second else FAMILY_TYPES[family(first)]


def fitting_type(name: str, categories: list[Any]) -> str:
    """The type name to store for a column: ``name`` if it can hold every kept value.

    Otherwise the family's plain type: a column first seen as int8 may hold 300 by the end of
    the data, and a dictionary's index type may be too narrow for all the categories.
    """
    values = [c for c in categories if c is not OTHER and c is not None and not isinstance(c, Bin)]
    plain = _value_name(name)
    if plain in _RANGES and values:
        low, high = _RANGES[plain]
        if min(values) < low or max(values) > high:
            return FAMILY_TYPES[family(name)]
    if name != plain:
        index = name[len("dictionary<") :].partition(",")[0]
        if index not in _RANGES or len(categories) - 1 > _RANGES[index][1]:
            return FAMILY_TYPES[family(name)]
    return name
