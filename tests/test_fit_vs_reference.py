"""The Rust core against the numpy reference (the executable specification) on generated tables."""

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

KINDS = ("int", "str", "bool", "float", "dict", "uint")


def make_column(rng: np.random.Generator, n: int, kind: str, card: int, style: str) -> pa.Array:
    """One column of n rows: `style` picks constant, all-distinct, or random codes with nulls."""
    if style == "constant":
        codes = np.zeros(n, dtype=np.int64)
    elif style == "distinct":
        codes = rng.permutation(n).astype(np.int64)
    else:
        # Skewed frequencies so that caps and ties both occur.
        weights = rng.dirichlet(np.full(card, 0.7))
        codes = rng.choice(card, size=n, p=weights)
    null_share = 0.0 if style != "nulls" else rng.uniform(0.05, 0.5)
    mask = rng.random(n) < null_share
    if kind == "int":
        values: Any = pa.array(codes * 7 - 20, mask=mask, type=pa.int32())
    elif kind == "uint":
        values = pa.array(codes.astype(np.uint64) * 3, mask=mask, type=pa.uint64())
    elif kind == "str":
        values = pa.array([f"v{c:03d}" for c in codes], mask=mask, type=pa.string())
    elif kind == "bool":
        values = pa.array(codes % 2 == 1, mask=mask, type=pa.bool_())
    elif kind == "float":
        values = pa.array(np.round(codes * 0.37 + rng.normal(0, 0.05, n), 2), mask=mask)
    else:
        values = pa.array([f"level-{c}" for c in codes], mask=mask).dictionary_encode()
    return values


@st.composite
def tables(draw: st.DrawFn) -> tuple[pa.Table, int, int]:
    n = draw(st.integers(1, 5_000))
    d = draw(st.integers(1, 12))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    columns = {}
    for k in range(d):
        kind = draw(st.sampled_from(KINDS))
        card = draw(st.integers(1, 40))
        style = draw(st.sampled_from(["random", "random", "nulls", "constant", "distinct"]))
        columns[f"c{k}"] = make_column(rng, n, kind, card, style)
    max_categories = draw(st.sampled_from([2, 3, 5, 16, 128]))
    n_bins = draw(st.sampled_from([1, 2, 5, 10]))
    return pa.table(columns), max_categories, n_bins


def fit_both(table: pa.Table, max_categories: int, n_bins: int) -> tuple[Any, Any]:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", treewise.CategoryCapWarning)
        try:
            ref = reference.fit(
                reference_columns(table), max_categories=max_categories, n_bins=n_bins
            )
        except ValueError:
            # The specification refuses the table (an all-null column): so must the core.
            with pytest.raises(treewise.DataError):
                treewise.DependencyTree(max_categories=max_categories, n_bins=n_bins).fit(table)
            return None, None
        model = treewise.DependencyTree(max_categories=max_categories, n_bins=n_bins).fit(table)
    return ref, model


def assert_same(ref: Any, model: treewise.DependencyTree) -> None:
    d = model.n_features_in_
    assert list(model.feature_names_in_) == ref.names
    assert model.n_rows_ == ref.n_rows
    assert model.categories_ == ref.categories
    for i in range(d):
        np.testing.assert_array_equal(model.marginal_counts(i), ref.marginals[i])
        for j in range(i + 1, d):
            np.testing.assert_array_equal(model.joint_counts(i, j), ref.tables[(i, j)])
    # Trees and orientation agree exactly; the weights to 1e-12 relative.
    np.testing.assert_array_equal(model.parent_, ref.parent)
    np.testing.assert_allclose(model.pairwise_mutual_info_, ref.mi, rtol=1e-12, atol=0)
    np.testing.assert_allclose(model.mutual_info_, ref.mutual_info, rtol=1e-12, atol=0)
    edges = model.edges()
    for row in edges.to_pylist():
        i = ref.names.index(row["parent"])
        j = ref.names.index(row["child"])
        assert row["dof"] == ref.dof[i, j]
        np.testing.assert_allclose(row["g_statistic"], ref.g_statistic[i, j], rtol=1e-12)


@settings(
    max_examples=60,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
@given(tables())
def test_core_matches_reference(case: tuple[pa.Table, int, int]) -> None:
    table, max_categories, n_bins = case
    ref, model = fit_both(table, max_categories, n_bins)
    if ref is not None:
        assert_same(ref, model)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(tables(), st.integers(1, 600))
def test_batching_does_not_change_anything(case: tuple[pa.Table, int, int], size: int) -> None:
    table, max_categories, n_bins = case
    batches = table.to_batches(max_chunksize=size)
    rebatched = pa.Table.from_batches(batches, schema=table.schema)
    ref, model = fit_both(rebatched, max_categories, n_bins)
    if ref is not None:
        assert_same(ref, model)


def test_ties_are_broken_by_column_index() -> None:
    # Four identical columns: every pair has the same mutual information, so the strict edge
    # order (lower index, then higher) makes the star at column 0, and both sides agree.
    rng = np.random.default_rng(7)
    x = rng.integers(0, 4, 500)
    table = pa.table({f"c{k}": x for k in range(4)})
    ref, model = fit_both(table, 128, 10)
    assert_same(ref, model)
    np.testing.assert_array_equal(model.parent_, [-1, 0, 0, 0])


def test_transposed_information_is_bit_identical() -> None:
    # The sorted-terms recipe makes MI depend only on the multiset of cell terms.
    rng = np.random.default_rng(3)
    a = rng.integers(0, 5, 2_000)
    b = (a + rng.integers(0, 3, 2_000)) % 7
    model = treewise.DependencyTree().fit(pa.table({"a": a, "b": b, "a2": a}))
    mi = model.pairwise_mutual_info_
    assert mi[0, 1] == mi[2, 1]
