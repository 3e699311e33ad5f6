"""Sparse input: a scipy.sparse matrix of flags fits exactly as the same data as a dense table.

Two kinds of truth: the dense fit of the same values (constructed, bit for bit), and scipy's own
sparse product X.T @ X (a general-purpose reference library) for the co-occurrence counts.
"""

from __future__ import annotations

import pickle
import warnings
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
import scipy.sparse as sp
import treewise
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st


def dense_twin(matrix: Any, names: list[str] | None = None) -> pa.Table:
    """The same matrix as a table of dense columns of its dtype."""
    full = matrix.toarray()
    names = names or [f"x{k}" for k in range(full.shape[1])]
    return pa.table({name: pa.array(full[:, k]) for k, name in enumerate(names)})


def fitted(data: Any, **params: Any) -> bytes:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", treewise.ColumnKindWarning)
        return pickle.dumps(treewise.DependencyTree(**params).fit(data))


def flags(n: int, d: int, seed: int, values: tuple[int, ...] = (1,), dtype: Any = np.int8) -> Any:
    rng = np.random.default_rng(seed)
    grid = np.zeros((n, d), dtype=dtype)
    popular = rng.random(d) * 0.3
    for k in range(d):
        on = rng.random(n) < popular[k]
        if k and rng.random() < 0.5:  # some columns follow an earlier one
            on = on | (grid[:, k - 1] != 0) & (rng.random(n) < 0.7)
        grid[on, k] = rng.choice(values, size=int(on.sum()))
    return sp.csr_matrix(grid)


@pytest.mark.parametrize(
    ("values", "dtype"),
    [((1,), np.int8), ((1, 2, 5), np.int16), ((-3, 1), np.int64), ((1, 7), np.uint8)],
)
def test_a_sparse_matrix_fits_as_its_dense_table(values: tuple[int, ...], dtype: Any) -> None:
    matrix = flags(4000, 25, 1, values, dtype)
    assert fitted(matrix) == fitted(dense_twin(matrix))
    # Any scipy format, and named columns.
    names = [f"page_{k}" for k in range(25)]
    by_name = fitted(dense_twin(matrix, names), columns=names)
    assert fitted(matrix.tocoo(), columns=names) == by_name
    assert fitted(sp.csc_array(matrix)) == fitted(dense_twin(matrix))


def test_bool_flags_full_columns_constants_duplicates_and_stored_zeros() -> None:
    rng = np.random.default_rng(2)
    n = 3000
    grid = np.zeros((n, 6), dtype=bool)
    grid[:, 0] = rng.random(n) < 0.2
    grid[:, 1] = grid[:, 0] | (rng.random(n) < 0.1)
    grid[:, 2] = True  # no zero in this column at all
    # column 3 stays all False: a constant, kept with a warning
    grid[:, 4] = rng.random(n) < 0.5
    grid[:, 5] = grid[:, 4] & (rng.random(n) < 0.8)
    matrix = sp.csr_matrix(grid)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        treewise.DependencyTree().fit(matrix)
    said = sorted(str(w.message).split("'")[1] for w in caught)
    assert said == ["x2", "x3"]  # all True, all False: both single-valued
    assert all("holds a single value" in str(w.message) for w in caught)
    assert fitted(matrix) == fitted(dense_twin(matrix))
    # Stored zeros and repeated entries (summed, as scipy means them) change nothing.
    coo = sp.coo_matrix(grid.astype(np.int8))
    rows = np.concatenate([coo.row, coo.row[:50], [0, 1]])
    cols = np.concatenate([coo.col, coo.col[:50], [3, 3]])
    vals = np.concatenate([coo.data, np.zeros(52, np.int8)])
    messy = sp.coo_matrix((vals, (rows, cols)), shape=grid.shape)
    assert fitted(messy) == fitted(dense_twin(sp.csr_matrix(grid.astype(np.int8))))


def test_pair_counts_equal_scipys_sparse_product() -> None:
    # scipy.sparse (reference library): for 0/1 flags, (X.T @ X)[i, j] counts the rows holding
    # both flags, which is the (1, 1) cell of the pair's table.
    matrix = flags(6000, 12, 3)
    model = treewise.DependencyTree().fit(matrix)
    wide = matrix.astype(np.int64)  # int8 products would overflow
    gram = (wide.T @ wide).toarray()
    stats = treewise.PairStats.from_source(dense_twin(matrix), model.codebook_)
    for i in range(12):
        for j in range(i + 1, 12):
            table = stats.joint_counts(f"x{i}", f"x{j}")
            assert table[1, 1] == gram[i, j]
            assert table.sum() == 6000
    edges = [(int(p), j) for j, p in enumerate(model.parent_) if p >= 0]
    assert len(edges) == 11
    for i, j in edges:
        parent, child = model.feature_names_in_[i], model.feature_names_in_[j]
        assert model.joint_counts(parent, child)[1, 1] == gram[i, j]


def test_what_the_sparse_path_cannot_take_is_refused_with_advice() -> None:
    floats = sp.random(100, 3, density=0.2, random_state=0, format="csr")
    with pytest.raises(treewise.DataError, match="astype"):
        treewise.DependencyTree().fit(floats)
    many = sp.csr_matrix(np.arange(300, dtype=np.int64).reshape(100, 3) % 40)
    with pytest.raises(treewise.DataError, match=r"distinct values.*dense table"):
        treewise.DependencyTree().fit(many)
    with pytest.raises(treewise.SchemaError, match="one name per matrix column"):
        treewise.DependencyTree(columns=["a", "b"]).fit(flags(50, 3, 0))
    with pytest.raises(treewise.SchemaError, match="dense table"):
        treewise.DependencyTree(kinds={"x0": "numeric"}).fit(flags(50, 3, 0))


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    n=st.integers(1, 300),
    d=st.integers(1, 8),
    density=st.floats(0.0, 1.0),
    top=st.integers(1, 4),
    seed=st.integers(0, 2**16),
)
def test_any_small_sparse_matrix_fits_as_its_dense_table(
    n: int, d: int, density: float, top: int, seed: int
) -> None:
    rng = np.random.default_rng(seed)
    grid = np.where(rng.random((n, d)) < density, rng.integers(1, top + 1, (n, d)), 0)
    matrix = sp.csr_matrix(grid.astype(np.int8))
    assert fitted(matrix) == fitted(dense_twin(matrix))
