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
