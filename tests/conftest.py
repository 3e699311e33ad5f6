"""Shared helpers for the test suite."""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa


def reference_columns(table: pa.Table) -> dict[str, np.ndarray[Any, Any]]:
    """The numpy reference's input for a pyarrow table: floats as float64 with NaN for null,
    everything else as an object array of plain Python values with None for null."""
    out: dict[str, np.ndarray[Any, Any]] = {}
    for name, column in zip(table.column_names, table.columns, strict=True):
        value_type = column.type
        if pa.types.is_dictionary(value_type):
            value_type = value_type.value_type
        if pa.types.is_floating(value_type):
            out[name] = np.array(
                [np.nan if v is None else v for v in column.to_pylist()], dtype=np.float64
            )
        else:
            values = column.to_pylist()
            array = np.empty(len(values), dtype=object)
            array[:] = values
            out[name] = array
    return out
