"""Forests: pruning keeps only the dependencies that pay, and forests score, sample and save."""

from __future__ import annotations

import itertools
import math
from pathlib import Path

import networkx as nx
import numpy as np
import pyarrow as pa
import pytest
import scipy.stats
import treewise
from conftest import raw_crosstab, reference_columns
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sklearn.metrics import mutual_info_score
from treewise import reference

#: The forest we sample from: (parent, child) edges; columns e and f stand alone.
FOREST = {("a", "b"), ("b", "c"), ("a", "d"), ("g", "h")}
NAMES = ["a", "b", "c", "d", "e", "f", "g", "h"]


def sample_forest(n: int, seed: int) -> pa.Table:
    """Rows from a forest we construct: every edge is a strong, noisy copy."""
    rng = np.random.default_rng(seed)
    cols: dict[str, np.ndarray] = {}
    for name in NAMES:
        parent = next((p for p, c in FOREST if c == name), None)
        fresh = rng.integers(0, 4, n)
        if parent is None:
            cols[name] = fresh
        else:
            cols[name] = np.where(rng.random(n) < 0.7, (cols[parent] + 1) % 4, fresh)
    return pa.table(cols)


def undirected(model: treewise.DependencyTree) -> set[frozenset[str]]:
    return {frozenset((r["parent"], r["child"])) for r in model.edges().to_pylist()}


@pytest.mark.parametrize("seed", range(5))
def test_bic_pruning_recovers_a_known_forest(seed: int) -> None:
    # Truth we constructed: the forest's edges, and no edge to the independent columns.
    table = sample_forest(20_000, seed)
    model = treewise.DependencyTree(prune="bic").fit(table)
    assert undirected(model) == {frozenset(e) for e in FOREST}
    # Without pruning, the spanning tree must join all 8 columns with 7 edges.
    assert len(treewise.DependencyTree().fit(table).edges()) == len(NAMES) - 1


def spanning_forest_of(graph: nx.Graph) -> tuple[int, float]:
    """Edge count and total weight of a maximum spanning forest (networkx)."""
    forest = nx.maximum_spanning_tree(graph)  # on a disconnected graph: a spanning forest
    return forest.number_of_edges(), forest.size(weight="weight")


def test_level_pruning_agrees_with_scipy_g_test() -> None:
    table = sample_forest(3_000, 11)
    level = 0.01
    model = treewise.DependencyTree(prune=level).fit(table)
    kept = undirected(model)
    # The edges that may join: every pair whose G-test, on the table pandas.crosstab counts from
    # the raw rows, rejects independence at the level.
    significant = nx.Graph()
    significant.add_nodes_from(NAMES)
    for a, b in itertools.combinations(NAMES, 2):
        counts = raw_crosstab(table, a, b)
        # outside check: scipy.stats.chi2_contingency with the log-likelihood ratio (G-test)
        result = scipy.stats.chi2_contingency(counts, correction=False, lambda_="log-likelihood")
        if result.pvalue < level:
            significant.add_edge(a, b, weight=mutual_info_score(table[a], table[b]))
    assert kept <= {frozenset(e) for e in significant.edges}
    # Pruned Kruskal is a maximum spanning forest of the significant pairs (networkx): as many
    # edges, as much mutual information (sklearn.metrics.mutual_info_score, raw columns).
    n_edges, weight = spanning_forest_of(significant)
    assert len(kept) == n_edges
    assert sum(significant.edges[tuple(e)]["weight"] for e in kept) == pytest.approx(
        weight, rel=1e-12
    )
    # Truth we constructed: the forest's edges, and nothing to the independent columns.
    assert kept == {frozenset(e) for e in FOREST}
    for row in model.edges().to_pylist():
        assert row["p_value"] < level


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.integers(0, 2**32 - 1), st.integers(2, 7), st.integers(20, 3_000))
def test_bic_pruning_matches_the_reference(seed: int, d: int, n: int) -> None:
    rng = np.random.default_rng(seed)
    cols = {}
    prev = rng.integers(0, 3, n)
    for k in range(d):
        strength = rng.uniform(0.0, 0.6)
        fresh = rng.integers(0, 2 + k % 3, n)
        prev = np.where(rng.random(n) < strength, prev % (2 + k % 3), fresh)
        cols[f"x{k}"] = prev
    table = pa.table(cols)
    ref = reference.fit(reference_columns(table), prune="bic")
    model = treewise.DependencyTree(prune="bic").fit(table)
    np.testing.assert_array_equal(model.parent_, ref.parent)
    # outside check: BIC (Schwarz, Ann. Statist. 6 (1978) 461-464) charges (k/2) ln N for k
    # parameters. An edge adds (r_i - 1)(r_j - 1) of them and N * I(X_i; X_j) to the maximum
    # log-likelihood (Chow & Liu 1968), so it pays when N * I > dof / 2 * ln N. I and dof come
    # from the raw columns (sklearn.metrics.mutual_info_score, pandas.crosstab's shape).
    paying = nx.Graph()
    paying.add_nodes_from(cols)
    for a, b in itertools.combinations(cols, 2):
        mi = mutual_info_score(cols[a], cols[b])
        shape = raw_crosstab(table, a, b).shape
        dof = (shape[0] - 1) * (shape[1] - 1)
        if n * mi > dof / 2 * math.log(n):
            paying.add_edge(a, b, weight=mi)
    kept = undirected(model)
    assert kept <= {frozenset(e) for e in paying.edges}
    n_edges, weight = spanning_forest_of(paying)
    assert len(kept) == n_edges
    assert math.fsum(model.mutual_info_) == pytest.approx(weight, rel=1e-9, abs=1e-12)


def test_a_forest_is_a_distribution() -> None:
    table = sample_forest(4_000, 3).select(["a", "b", "e", "g", "h"])
    model = treewise.DependencyTree(prune="bic", alpha=0.0).fit(table)
    assert (model.parent_ == -1).sum() == 3  # {a, b}, {e}, {g, h}
    levels = [model.categories_[i] for i in range(model.n_features_in_)]
    rows = list(itertools.product(*levels))
    names = list(model.feature_names_in_)
    every = pa.table({n: [r[k] for r in rows] for k, n in enumerate(names)})
    # outside check: the law of total probability
    assert math.fsum(np.exp(model.score_samples(every))) == pytest.approx(1.0, abs=1e-9)
    # Components are independent: the sampled e is independent of the sampled a.
    draws = model.sample(20_000, random_state=5).to_pandas()
    observed = np.asarray(
        [[np.sum((draws["a"] == x) & (draws["e"] == y)) for y in range(4)] for x in range(4)]
    )
    # outside check: scipy.stats.chi2_contingency (G-test of independence), p > 0.001
    # (common practice)
    g = scipy.stats.chi2_contingency(observed, correction=False, lambda_="log-likelihood")
    assert g.pvalue > 0.001


def test_a_forest_saves_and_loads(tmp_path: Path) -> None:
    table = sample_forest(2_000, 9)
    model = treewise.DependencyTree(prune="bic").fit(table)
    # A forest, not a lone set of roots: the constructed edges are there (truth we built).
    assert undirected(model) == {frozenset(e) for e in FOREST}
    model.save(tmp_path / "forest.treewise")
    again = treewise.load(tmp_path / "forest.treewise")
    np.testing.assert_array_equal(again.parent_, model.parent_)
    np.testing.assert_array_equal(again.score_samples(table), model.score_samples(table))
    assert again.edges().equals(model.edges())


@pytest.mark.parametrize("prune", ["aic", 0.0, 1.0, -0.5, True])
def test_bad_prune_values_are_refused(prune: object) -> None:
    with pytest.raises(ValueError, match=r"prune|level"):
        treewise.DependencyTree(prune=prune).fit(sample_forest(100, 0))  # type: ignore[arg-type]
