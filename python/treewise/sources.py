"""Inputs to Arrow: every supported source becomes a pyarrow Table, then bounded record batches."""

from __future__ import annotations

import sys
from collections import Counter
from collections.abc import Iterator, Sequence
from typing import Any

import pyarrow as pa

from treewise.errors import DataError, SchemaError

__all__ = ["BATCH_ROWS", "as_table", "iter_batches", "select_columns"]

#: Rows per batch handed to the Rust core: large enough to amortise the call, small enough that
#: Ctrl-C (checked between batches) is felt within a fraction of a second.
BATCH_ROWS = 262_144


def _from_pandas(frame: Any) -> pa.Table:
    bad = [c for c in frame.columns if not isinstance(c, str)]
    if bad:
        raise DataError(
            f"column names must be strings, but this DataFrame has {bad[:5]!r}; "
            "rename them first, for example df.columns = df.columns.astype(str)"
        )
    duplicated = sorted({c for c in frame.columns if list(frame.columns).count(c) > 1})
    if duplicated:
        raise SchemaError(f"the DataFrame has duplicate column names {duplicated}; rename them")
    try:
        return pa.Table.from_pandas(frame, preserve_index=False)
    except (pa.ArrowTypeError, pa.ArrowInvalid, pa.ArrowNotImplementedError) as e:
        raise DataError(
            f"could not read the pandas DataFrame as Arrow: {e}. Give each object column one "
            "type, for example df[col] = df[col].astype('string')"
        ) from e


def as_table(data: Any) -> pa.Table:
    """Turn any supported tabular input into a pyarrow Table without copying column buffers.

    Accepts a pyarrow Table, RecordBatch or RecordBatchReader, a pandas DataFrame, or any object
    that implements the Arrow PyCapsule interface (``__arrow_c_stream__`` or
    ``__arrow_c_array__``), such as a polars DataFrame or a DuckDB relation.
    """
    if isinstance(data, pa.Table):
        return data
    if isinstance(data, pa.RecordBatch):
        return pa.Table.from_batches([data])
    if isinstance(data, pa.RecordBatchReader):
        return data.read_all()
    pandas = sys.modules.get("pandas")
    if pandas is not None and isinstance(data, pandas.DataFrame):
        return _from_pandas(data)
    try:
        if hasattr(data, "__arrow_c_stream__"):
            return pa.RecordBatchReader.from_stream(data).read_all()
        if hasattr(data, "__arrow_c_array__"):
            return pa.Table.from_batches([pa.record_batch(data)])
    except (pa.ArrowInvalid, pa.ArrowTypeError) as e:
        # A single array or series exports a non-struct type: it is a column, not a table.
        raise TypeError(
            f"treewise needs a table, but the {type(data).__name__} given is not one ({e}); "
            "wrap a single column in a table, for example pa.table({'name': array})"
        ) from e
    raise TypeError(
        f"treewise cannot read a {type(data).__name__}; pass a pyarrow Table, RecordBatch or "
        "RecordBatchReader, a pandas or polars DataFrame, or any object with __arrow_c_stream__"
    )


def select_columns(table: pa.Table, columns: Sequence[str] | None) -> pa.Table:
    """Check the column names and keep ``columns`` (all of them when None), in that order."""
    names = table.column_names
    counts = Counter(names)
    duplicated = sorted(n for n, k in counts.items() if k > 1)
    if columns is None:
        if duplicated:
            raise SchemaError(
                f"the data has duplicate column names {duplicated}; rename them, or pick distinct "
                "ones with columns="
            )
        if not names:
            raise DataError("the data has no columns; a dependency tree needs at least one")
        return table
    if isinstance(columns, str) or not all(isinstance(c, str) for c in columns):
        raise TypeError(f"columns= must be a list of column names, got {columns!r}")
    wanted = list(columns)
    if not wanted:
        raise DataError("columns= is empty; name at least one column")
    repeated = sorted({c for c in wanted if wanted.count(c) > 1})
    if repeated:
        raise SchemaError(f"columns= names {repeated} more than once; name each column once")
    missing = [c for c in wanted if c not in counts]
    if missing:
        raise SchemaError(f"columns {missing} are not in the data; it has {names}")
    ambiguous = [c for c in wanted if c in duplicated]
    if ambiguous:
        raise SchemaError(f"the data has more than one column named {ambiguous}; rename them")
    return table.select(wanted)


def iter_batches(table: pa.Table, batch_rows: int = BATCH_ROWS) -> Iterator[pa.RecordBatch]:
    """Yield the table's non-empty record batches of at most ``batch_rows`` rows (zero-copy)."""
    for batch in table.to_batches(max_chunksize=batch_rows):
        if batch.num_rows:
            yield batch
