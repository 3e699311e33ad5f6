"""Sparse input: a scipy.sparse matrix of flags counted from its non-zero entries alone.

Clickstream flags (did this session open page k?) are mostly zero. Read as a dense table, a
million rows of a thousand flags are a billion values to encode; as a sparse matrix they are a
few million entries. ``DependencyTree().fit(X)`` with a scipy.sparse ``X`` builds each column's
codes from its distinct values (zero included when a row lacks the column) and counts every pair
from the rows' non-zero entries: the cells with a zero on either side follow from the marginals.
The model equals a fit of the same matrix as a dense table with columns ``x0, x1, ...`` (or the
estimator's ``columns``), bit for bit.

Only flag-like columns take this path: integer or bool values, at most ``n_bins`` and
``max_categories`` distinct values each (so each is categorical, with no "other" and no bins).
Anything else is refused with the advice to pass a dense table.
"""

from __future__ import annotations

import sys
from collections.abc import Sequence
from typing import Any

import numpy as np
import pyarrow as pa

from treewise import _core
from treewise.decode import type_name
from treewise.errors import ColumnKindWarning, DataError, SchemaError, warn

__all__ = ["is_sparse", "sparse_counts"]


def is_sparse(data: Any) -> bool:
    """Whether ``data`` is a scipy.sparse matrix or array (scipy is not imported for this)."""
    module = sys.modules.get("scipy.sparse")
    return module is not None and bool(module.issparse(data))


def sparse_counts(
    data: Any,
    columns: Sequence[str] | None,
    kinds: dict[str, str] | None,
    max_categories: int,
    n_bins: int,
    memory_limit: int | None,
) -> tuple[_core.Codebook, _core.PairStats, list[str]]:
    """The codebook, the pair counts and the type names of a sparse matrix's columns."""
    matrix = data.tocsr(copy=True)
    matrix.sum_duplicates()
    matrix.eliminate_zeros()
    matrix.sort_indices()
    n_rows, n_cols = matrix.shape
    if n_rows == 0:
        raise DataError("the sparse matrix has 0 rows; a dependency tree needs at least one")
    names = [f"x{k}" for k in range(n_cols)] if columns is None else list(columns)
    if len(names) != n_cols:
        raise SchemaError(
            f"columns names {len(names)} columns but the sparse matrix has {n_cols}; give one "
            "name per matrix column, in order"
        )
    if any(kind not in ("auto", "categorical") for kind in (kinds or {}).values()):
        raise SchemaError(
            "kinds other than 'auto' and 'categorical' need a dense table: pass the data as a "
            "pyarrow Table or DataFrame"
        )
    dtype = matrix.dtype
    if dtype == np.bool_:
        family = "bool"
    elif np.issubdtype(dtype, np.signedinteger):
        family = "int"
    elif np.issubdtype(dtype, np.unsignedinteger):
        family = "uint"
    else:
        raise DataError(
            f"a sparse matrix of {dtype} values: the sparse input path takes integer or bool "
            "flags; cast it (X.astype(np.int8)), or pass a dense table to bin the numbers"
        )
    has_zero = np.bincount(matrix.indices, minlength=n_cols) < n_rows
    values_of, entry_codes, zero = _codes(matrix, has_zero)
    specs: list[_core.ColumnSpec] = []
    for name, values in zip(names, values_of, strict=True):
        if len(values) > min(n_bins, max_categories):
            raise DataError(
                f"column '{name}' has {len(values)} distinct values; the sparse input path takes "
                f"flag-like columns (at most n_bins={n_bins} distinct values); pass a dense "
                "table to bin or cap it"
            )
        if n_rows >= 20 and len(values) >= 0.95 * n_rows:
            raise DataError(
                f"column '{name}' looks like an identifier; pass a dense table, which leaves it out"
            )
        if len(values) == 1:
            warn(
                f"column '{name}' holds a single value; it is kept, carries no information and is "
                "never the root",
                ColumnKindWarning,
            )
        plain: list[Any] = (
            [bool(v) for v in values] if family == "bool" else [int(v) for v in values]
        )
        specs.append((name, family, plain, None, False, False, False, None))
    codebook = _core.Codebook.from_columns(specs)
    stats = _core.PairStats.from_csr(
        codebook,
        n_rows,
        matrix.indptr.astype("<u8").tobytes(),
        matrix.indices.astype("<u4").tobytes(),
        entry_codes.astype("<u2").tobytes(),
        zero,
        memory_limit,
    )
    dtypes = [type_name(pa.from_numpy_dtype(dtype))] * n_cols
    return codebook, stats, dtypes


#: The widest range of values (zero included) coded through one dense table of column x value.
DENSE_SPAN = 1 << 10


def _codes(
    matrix: Any, has_zero: np.ndarray[Any, Any]
) -> tuple[list[np.ndarray[Any, Any]], np.ndarray[Any, Any], list[int | None]]:
    """Each column's sorted values, each entry's code, and each column's code of 0.

    A column's values include 0 where a row lacks the column; an entry's code is its value's
    index among its column's values.
    """
    n_cols = matrix.shape[1]
    data = matrix.data.astype(np.int64) if matrix.dtype == np.bool_ else matrix.data
    low = min(int(data.min()) if data.size else 0, 0)
    high = max(int(data.max()) if data.size else 0, 0)
    if high - low < DENSE_SPAN:
        # A presence table of column x value: no sort, one scatter and one running count.
        present = np.zeros((n_cols, high - low + 1), dtype=bool)
        present[matrix.indices, data - low] = True
        present[has_zero, -low] = True
        rank = np.cumsum(present, axis=1, dtype=np.int64) - 1
        codes = rank[matrix.indices, data - low]
        values = [low + np.flatnonzero(row) for row in present]
        zero = [int(rank[c, -low]) if has_zero[c] else None for c in range(n_cols)]
        return values, codes, zero
    # Wide values: each column's distinct values by sorting its entries.
    by_column = matrix.tocsc()
    by_column.sort_indices()
    col_codes = np.empty(by_column.nnz, dtype=np.int64)
    values, zero = [], []
    for c in range(n_cols):
        start, end = by_column.indptr[c], by_column.indptr[c + 1]
        seen = np.unique(by_column.data[start:end])
        kept = np.union1d(seen, [0]) if has_zero[c] else seen
        col_codes[start:end] = np.searchsorted(kept, by_column.data[start:end])
        values.append(kept)
        zero.append(int(np.searchsorted(kept, 0)) if has_zero[c] else None)
    # The same sparsity pattern with the codes (plus one, to stay non-zero) back in row order.
    coded = by_column.copy()
    coded.data = col_codes + 1
    rows = coded.tocsr()
    rows.sort_indices()
    return values, rows.data - 1, zero
