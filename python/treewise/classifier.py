"""The tree-augmented naive Bayes classifier (Friedman, Geiger & Goldszmidt 1997) over tables."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa

from treewise import _core
from treewise.categories import column_categories
from treewise.checks import (
    MAX_CATEGORIES,
    check_alpha,
    check_int,
    check_memory_limit,
    check_nonnegative,
    check_root,
)
from treewise.errors import DataError, NotFittedError
from treewise.inference import EvidenceTally, as_evidence, evidence_batches
from treewise.params import Params
from treewise.passes import TypeRecorder, learn_codebook
from treewise.progress import PassProgress
from treewise.sources import BATCH_ROWS, BatchLoop, check_columns, open_source, read_table

__all__ = ["TreeAugmentedClassifier"]


def _labels(y: Any) -> npt.NDArray[Any]:
    """Class labels as a 1-d numpy array (pyarrow, pandas, polars, lists)."""
    if isinstance(y, (pa.Array, pa.ChunkedArray)):
        if y.null_count:
            raise DataError(f"y has {y.null_count} nulls; every row needs a class")
        y = y.to_numpy(zero_copy_only=False)
    labels = np.asarray(y)
    if labels.ndim != 1:
        labels = labels.reshape(-1) if labels.ndim == 2 and labels.shape[1] == 1 else labels
    if labels.ndim != 1:
        raise ValueError(f"y must be one-dimensional, got shape {labels.shape}")
    if labels.dtype == object and any(v is None for v in labels):
        raise DataError("y has nulls; every row needs a class")
    if labels.dtype.kind == "f" and np.isnan(labels).any():
        raise DataError("y has NaN; every row needs a class")
    return labels


class TreeAugmentedClassifier(Params):
    """Tree-augmented naive Bayes: a dependency tree over the features, within each class.

    The class is every feature's parent, and the features also form a tree, the maximum spanning
    tree of the conditional mutual information I(X_i; X_j | C) = sum_c P(c) I_c(X_i; X_j)
    (Friedman, Geiger & Goldszmidt 1997). ``predict_proba`` computes P(c | x), proportional to
    P(c) prod_i P(x_i | x_parent(i), c), exactly; an unobserved feature (null, absent, or a value
    without a code) is summed out by message passing on the feature tree.

    Each table is pulled toward naive Bayes' own estimate by ``backoff`` pseudo-rows:
    P(x_i | a, c) = (n(x_i, a, c) + backoff * q_c(x_i)) / (n(a, c) + backoff), where
    q_c(x_i) = (n(x_i, c) + alpha) / (n(c) + alpha * r_i). A parent value seen in few rows of a
    class then says little, instead of a flat or spiky row; see docs/inference.md.

    Parameters
    ----------
    columns : list of str, optional
        The features, in this order. Default: every column of ``X``.
    max_categories : int, default 128
        As for :class:`~treewise.DependencyTree`.
    n_bins : int, default 10
        Float features are cut into at most this many quantile bins.
    root : str, optional
        The feature the tree is oriented from. Default: the first.
    alpha : float, default 0.5
        Dirichlet smoothing of P(x_i | c), of the root feature's table and of the class prior.
        With ``backoff=0``, also of every P(x_i | x_parent, c), as ``DependencyTree`` does.
    backoff : float, default 5.0
        Pseudo-rows pulling each P(x_i | x_parent, c) toward P(x_i | c); 0 turns it off.
    memory_limit : int or str, optional
        As for :class:`~treewise.DependencyTree`, shared equally by the classes' pair
        statistics (they are held at once).

    Attributes
    ----------
    classes_ : ndarray
        The class labels, sorted.
    class_count_ : ndarray of int
        Training rows per class.
    feature_names_in_ : ndarray of str
    n_features_in_ : int
    categories_ : list of list
        Each feature's categories, as in ``DependencyTree.categories_``.
    parent_ : ndarray of int
        Each feature's parent feature, -1 for the root (the class is everyone's parent too).
    conditional_mutual_info_ : ndarray of shape (n_features_in_, n_features_in_)
        I(X_i; X_j | C) in nats, the edge weights.
    codebook_ : Codebook
        The features' encoding.
    """

    classes_: npt.NDArray[Any]
    class_count_: npt.NDArray[np.int64]
    feature_names_in_: npt.NDArray[np.object_]
    _alpha: float
    _backoff: float

    _PARAMS = ("columns", "max_categories", "n_bins", "root", "alpha", "backoff", "memory_limit")

    def __init__(
        self,
        *,
        columns: Sequence[str] | None = None,
        max_categories: int = 128,
        n_bins: int = 10,
        root: str | None = None,
        alpha: float = 0.5,
        backoff: float = 5.0,
        memory_limit: int | str | None = None,
    ) -> None:
        self.columns = columns
        self.max_categories = max_categories
        self.n_bins = n_bins
        self.root = root
        self.alpha = alpha
        self.backoff = backoff
        self.memory_limit = memory_limit

    def __getstate__(self) -> dict[str, Any]:
        """Pickle support: each class's model travels as its validated model-file bytes."""
        state = self.__dict__.copy()
        engines = state.pop("_engines", None)
        state.pop("codebook_", None)
        if engines is not None:
            state["_engine_bytes"] = [e.to_bytes() for e in engines]
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        engine_bytes = state.pop("_engine_bytes", None)
        self.__dict__.update(state)
        if engine_bytes is not None:
            self._engines = [_core.TreeInference.from_bytes(b, self._backoff) for b in engine_bytes]
            self.codebook_ = _core.TreeModel.from_bytes(engine_bytes[0]).codebook

    # -- fitting ---------------------------------------------------------------------------------

    def fit(self, X: Any, y: Any) -> TreeAugmentedClassifier:
        """Fit the classifier.

        Parameters
        ----------
        X : table, path or stream
            Any source ``DependencyTree.fit`` accepts (read into memory).
        y : array-like of shape (n_rows,)
            The class of each row.

        Returns
        -------
        TreeAugmentedClassifier
            The fitted classifier.
        """
        max_categories = check_int("max_categories", self.max_categories, 2, MAX_CATEGORIES)
        n_bins = check_int("n_bins", self.n_bins, 1, MAX_CATEGORIES - 1)
        alpha = check_alpha(self.alpha)
        backoff = check_nonnegative("backoff", self.backoff)
        limit = check_memory_limit(self.memory_limit)
        labels = _labels(y)
        source = open_source(X)
        names = check_columns(source.names, self.columns, source.description)
        table = read_table(source, names)
        if table.num_rows == 0:
            raise DataError("X has 0 rows; a classifier needs at least one")
        if len(labels) != table.num_rows:
            raise ValueError(f"X has {table.num_rows} rows but y has {len(labels)} labels")
        root = check_root(self.root, names, "the features")
        types = TypeRecorder(names)
        # The codebook pass only: the tables are counted class by class below.
        with (
            PassProgress(False, table.num_rows, 1) as bar,
            learn_codebook(
                open_source(table), names, max_categories, n_bins, BATCH_ROWS, bar, types
            ) as (codebook, _),
        ):
            pass
        dtypes = types.type_names()
        classes, index = np.unique(labels, return_inverse=True)
        per_class = []
        share = None if limit is None else limit // len(classes)
        for k in range(len(classes)):
            stats = _core.PairStats(codebook, share)
            with BatchLoop(open_source(table.filter(pa.array(index == k))), names) as batches:
                for batch in batches:
                    stats.update(codebook, batch)
            per_class.append(stats)
        counts = np.array([s.n_rows for s in per_class], dtype=np.int64)
        # I(X_i; X_j | C) = sum_c P(c) I_c: each I_c by the Chow-Liu fit's own recipe.
        d = len(names)
        cmi = np.zeros(d * (d - 1) // 2)
        for stats, n_c in zip(per_class, counts, strict=True):
            mi = np.asarray(_core.TreeModel.fit(codebook, stats, dtypes, root, alpha).pair_mi)
            cmi += (n_c / table.num_rows) * mi
        cmi = np.maximum(cmi, 0.0)
        self._engines = [
            _core.TreeInference.from_weights(
                codebook, s, dtypes, cmi.tolist(), root, alpha, backoff
            )
            for s in per_class
        ]
        self._alpha, self._backoff = alpha, backoff
        self.classes_ = classes
        self.class_count_ = counts
        self.feature_names_in_ = np.array(names, dtype=object)
        self.n_features_in_ = d
        self.categories_ = [column_categories(*codebook.column(i)) for i in range(d)]
        self.parent_ = np.array(self._engines[0].parent, dtype=np.intp)
        square = np.zeros((d, d))
        square[np.triu_indices(d, k=1)] = cmi
        self.conditional_mutual_info_ = square + square.T
        self.codebook_ = codebook
        return self

    # -- prediction ------------------------------------------------------------------------------

    def _fitted(self) -> list[_core.TreeInference]:
        engines: list[_core.TreeInference] | None = getattr(self, "_engines", None)
        if engines is None:
            raise NotFittedError(
                "this TreeAugmentedClassifier is not fitted yet; call fit(X, y) first"
            )
        return engines

    def _log_prior(self) -> npt.NDArray[np.float64]:
        alpha = self._alpha
        total = self.class_count_.sum() + alpha * len(self.classes_)
        prior: npt.NDArray[np.float64] = np.log((self.class_count_ + alpha) / total)
        return prior

    def predict_log_proba(self, X: Any) -> npt.NDArray[np.float64]:
        """The log-probability ln P(class | row) of each row of ``X``, in ``classes_`` order.

        A row that every class gives probability zero (possible only with ``alpha=0``) gets the
        class prior, with an ``ImpossibleEvidenceWarning``.
        """
        engines = self._fitted()
        names = [str(n) for n in self.feature_names_in_]
        prior = self._log_prior()
        tally = EvidenceTally(names)
        parts = []
        with evidence_batches(open_source(X), names) as batches:
            for batch in batches:
                evidence = as_evidence(batch, names)
                scored = [engine.log_evidence(evidence) for engine in engines]
                tally.add(scored[0][1])
                joint = np.column_stack([np.frombuffer(s[0], "<f8") for s in scored]) + prior
                top = joint.max(axis=1, keepdims=True)
                impossible = ~np.isfinite(top[:, 0])
                if impossible.any():
                    tally.add([0] * len(names), int(impossible.sum()))
                    joint[impossible] = prior
                    top[impossible] = prior.max()
                total = top + np.log(np.exp(joint - top).sum(axis=1, keepdims=True))
                parts.append(joint - total)
        tally.warn("they get the class prior")
        k = len(self.classes_)
        return np.concatenate(parts) if parts else np.zeros((0, k))

    def predict_proba(self, X: Any) -> npt.NDArray[np.float64]:
        """P(class | row) for each row of ``X``, columns in ``classes_`` order."""
        return np.exp(self.predict_log_proba(X))

    def predict(self, X: Any) -> npt.NDArray[Any]:
        """The most probable class of each row (ties: the first in ``classes_``)."""
        log_proba = self.predict_log_proba(X)
        labels: npt.NDArray[Any] = self.classes_[np.argmax(log_proba, axis=1)]
        return labels

    def score(self, X: Any, y: Any) -> float:
        """Accuracy: the share of rows whose predicted class is ``y``."""
        labels = _labels(y)
        predicted = self.predict(X)
        if len(predicted) != len(labels):
            raise ValueError(f"X has {len(predicted)} rows but y has {len(labels)} labels")
        return float(np.mean(predicted == labels)) if len(labels) else math.nan
