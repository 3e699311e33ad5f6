"""Every counting kernel (forced with TREEWISE_KERNEL) against the numpy reference."""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
import treewise
from conftest import reference_columns
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from treewise import reference

# Generated tables hold constant columns and columns of nulls only, which are warned about
# (docs/column-kinds.md); these tests compare fits, not warnings.
pytestmark = pytest.mark.filterwarnings("ignore::treewise.ColumnKindWarning")

KERNELS = ("auto", "bitset", "histogram", "sparse", "naive")
MAX_CATEGORIES = 512


def make_column(rng: np.random.Generator, n: int, card: int, style: str) -> pa.Array:
    """n codes below `card`: uniform, one dominant level (sparse), constant, or skewed."""
    if style == "constant":
        codes = np.full(n, rng.integers(0, card), dtype=np.int64)
    elif style == "sparse":
        # One level in 95-99.9 % of the rows (clickstream flags), the others rare.
        dominant = int(rng.integers(0, card))
        codes = np.full(n, dominant, dtype=np.int64)
        rare = rng.random(n) < rng.uniform(0.001, 0.05)
        codes[rare] = rng.integers(0, card, size=int(rare.sum()))
    elif style == "skewed":
        codes = rng.choice(card, size=n, p=rng.dirichlet(np.full(card, 0.5)))
    else:
        codes = rng.integers(0, card, size=n)
    return pa.array(codes * 3 - 7, type=pa.int32())


@st.composite
def tables(draw: st.DrawFn) -> pa.Table:
    n = draw(st.integers(1, 3_000))
    d = draw(st.integers(1, 7))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    columns = {}
    for k in range(d):
        card = draw(st.sampled_from([1, 2, 2, 3, 5, 9, 16, 40, 130, 300]))
        style = draw(st.sampled_from(["uniform", "sparse", "sparse", "skewed", "constant"]))
        columns[f"c{k}"] = make_column(rng, n, card, style)
    table = pa.table(columns)
    # Several batches of uneven length, so that the kernels count and merge more than once.
    size = draw(st.integers(1, n))
    return pa.Table.from_batches(table.to_batches(max_chunksize=size), schema=table.schema)


def fit(table: pa.Table) -> treewise.DependencyTree:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", treewise.CategoryCapWarning)
        return treewise.DependencyTree(max_categories=MAX_CATEGORIES).fit(table)


def assert_same_counts(model: treewise.DependencyTree, ref: Any) -> None:
    d = model.n_features_in_
    assert model.n_rows_ == ref.n_rows
    for i in range(d):
        np.testing.assert_array_equal(model.marginal_counts(i), ref.marginals[i])
        for j in range(i + 1, d):
            np.testing.assert_array_equal(model.joint_counts(i, j), ref.tables[(i, j)])
    np.testing.assert_array_equal(model.parent_, ref.parent)


@pytest.mark.parametrize("kernel", KERNELS)
@settings(
    max_examples=25,
    deadline=None,
    suppress_health_check=[
        HealthCheck.too_slow,
        HealthCheck.data_too_large,
        HealthCheck.function_scoped_fixture,
    ],
)
@given(table=tables())
def test_forced_kernel_matches_reference(
    kernel: str, table: pa.Table, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("TREEWISE_KERNEL", kernel)
    ref = reference.fit(reference_columns(table), max_categories=MAX_CATEGORIES)
    assert_same_counts(fit(table), ref)


def clickstream(n: int, d: int, seed: int) -> pa.Table:
    """Binary flags, at most 4 ones per row: every column dominated by 0."""
    rng = np.random.default_rng(seed)
    flags = np.zeros((n, d), dtype=np.int8)
    for row, ones in enumerate(rng.integers(0, 5, size=n)):
        flags[row, rng.choice(d, size=ones, replace=False)] = 1
    return pa.table({f"f{k:03d}": flags[:, k] for k in range(d)})


def test_every_kernel_gives_the_same_counts_on_sparse_flags(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    table = clickstream(4_000, 60, seed=1)
    ref = reference.fit(reference_columns(table), max_categories=MAX_CATEGORIES)
    for kernel in KERNELS:
        monkeypatch.setenv("TREEWISE_KERNEL", kernel)
        assert_same_counts(fit(table), ref)


def test_wide_cardinalities_and_mixed_columns(monkeypatch: pytest.MonkeyPatch) -> None:
    # Cardinality up to 300 next to binary, sparse and constant columns, in uneven batches.
    rng = np.random.default_rng(4)
    n = 5_000
    table = pa.table(
        {
            "wide": make_column(rng, n, 300, "uniform"),
            "wide_sparse": make_column(rng, n, 300, "sparse"),
            "flag": make_column(rng, n, 2, "sparse"),
            "small": make_column(rng, n, 6, "skewed"),
            "const": make_column(rng, n, 1, "constant"),
        }
    )
    table = pa.Table.from_batches(table.to_batches(max_chunksize=1_777), schema=table.schema)
    ref = reference.fit(reference_columns(table), max_categories=MAX_CATEGORIES)
    for kernel in KERNELS:
        monkeypatch.setenv("TREEWISE_KERNEL", kernel)
        assert_same_counts(fit(table), ref)


def test_unknown_kernel_is_refused(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TREEWISE_KERNEL", "fastest")
    table = pa.table({"a": [1, 2, 1], "b": [0, 0, 1]})
    with pytest.raises(treewise.TreewiseError, match="TREEWISE_KERNEL"):
        fit(table)
    monkeypatch.setenv("TREEWISE_KERNEL", " Bitset ")
    assert fit(table).n_rows_ == 3
