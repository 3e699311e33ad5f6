"""TreeMixture: a mixture of Chow-Liu trees learned by EM (Meila & Jordan, JMLR 2000)."""

from __future__ import annotations

import math
import os
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa

from treewise import _core, mixture_inference
from treewise.checks import (
    MAX_CATEGORIES,
    MAX_SAMPLE_ROWS,
    RandomState,
    check_alpha,
    check_int,
    check_nonnegative,
    seed_of,
)
from treewise.errors import DataError, NotFittedError, UnseenCategoryWarning, warn
from treewise.estimator import DependencyTree
from treewise.files import read_model_file, write_atomically
from treewise.mixture_file import mixture_from_bytes, mixture_to_bytes
from treewise.mixture_stream import EmParts, fit_streaming, wants_streaming
from treewise.params import Params
from treewise.progress import PassProgress, wants_progress
from treewise.sources import BATCH_ROWS, BatchLoop, check_columns, open_source

__all__ = ["MixtureComponent", "TreeMixture", "choose_n_components"]

FloatArray = npt.NDArray[np.float64]

#: A component whose responsibilities add up to fewer rows than this is degenerate: it is
#: reseeded (common practice, as scikit-learn's k-means reseeds empty clusters).
MIN_COMPONENT_ROWS = 2.0
#: The most reseeds in one run: data with fewer patterns than components would otherwise reseed
#: at every iteration and never converge.
MAX_RESEEDS = 10


@dataclass(frozen=True)
class MixtureComponent:
    """One fitted tree of a mixture: its weight, structure and smoothed tables.

    ``log_conditional(c)`` is ln P(x_c | x_parent) with rows indexed by the parent's code (one
    row for the root); ``counts(c)`` the weighted counts it was smoothed from.
    """

    weight: float
    feature_names_in_: npt.NDArray[np.object_]
    root_: int
    parent_: npt.NDArray[np.intp]
    pairwise_mutual_info_: FloatArray
    _core_component: _core.MixtureComponent
    _cards: tuple[int, ...]

    @property
    def mutual_info_(self) -> FloatArray:
        """Each column's weighted mutual information with its parent (0 for the root)."""
        return np.array(
            [
                self.pairwise_mutual_info_[c, p] if p >= 0 else 0.0
                for c, p in enumerate(self.parent_)
            ]
        )

    def _shape(self, c: int) -> tuple[int, int]:
        p = int(self.parent_[c])
        return (self._cards[p] if p >= 0 else 1), self._cards[c]

    def counts(self, c: int) -> FloatArray:
        """Column ``c``'s weighted counts with its parent (parent code x code)."""
        return np.frombuffer(self._core_component.counts(c), "<f8").reshape(self._shape(c))

    def log_conditional(self, c: int) -> FloatArray:
        """Column ``c``'s smoothed ln P(code | parent code) (parent code x code)."""
        return np.frombuffer(self._core_component.log_table(c), "<f8").reshape(self._shape(c))


@dataclass
class _Run:
    """One EM run from one start."""

    components: list[_core.MixtureComponent]
    weights: FloatArray
    bounds: list[float]
    converged: bool
    reseeds: int


#: Per row, ln sum_k w_k P_k(row) and the responsibilities (``mixture_inference.log_mix``).
_log_mix = mixture_inference.log_mix


class TreeMixture(Params):
    """A mixture of dependency trees, fitted by expectation-maximisation.

    P(row) = sum_k w_k P_k(row), where each P_k is a Chow-Liu tree with its own structure and
    tables (Meila & Jordan, "Learning with Mixtures of Trees", JMLR 2000). Each iteration weighs
    every row by its responsibilities P(k | row) (E-step), then refits each tree to the weighted
    pair counts and its tables to the weighted counts with smoothing ``alpha`` (M-step).

    The default is soft EM: every row counts for every component by its responsibility. It is
    the variant that maximises the likelihood; with ``alpha=0`` and ``pooling=0`` each
    iteration provably never lowers it (the M-step is the exact maximum-likelihood tree of the
    weighted counts).
    ``algorithm="hard"`` is classification EM (Celeux & Govaert 1992): each row goes wholly to
    its most responsible component. It maximises the likelihood of the assignments instead,
    which biases the weights toward large components. It is the cheaper variant: each
    component's rows are counted exactly by the integer (bitset) kernels of a single fit, so
    an iteration counts every row once rather than K times.

    One codebook is learned with the ordinary fit (a single ``DependencyTree``, kept as
    ``single_tree_``). In memory (``streaming=False``), every row is encoded once and kept as
    codes across the iterations, and ``data`` is read twice (a table, a DataFrame or files;
    not a one-shot stream). Scoring, ``surprisal`` and the other questions read their data
    batch by batch, so memory holds the answers, not the data.

    Streaming (``streaming=True``, docs/scaling.md): the in-memory EM (seeding, ``n_init``
    starts) runs on a uniform sample of at most ``SAMPLE_ROWS`` (50,000) rows, then every
    iteration is one pass over all the data: each batch is scored under the current
    components, and its weighted pair counts are added to running f64 sums that the next
    components are fitted from. Memory holds the sums, one batch and the sample, whatever the
    size of the data; ``lower_bounds_`` are then the passes' mean log-likelihoods over all
    rows. A one-shot stream is copied to temporary Arrow files as the tree reads it. A Dask
    DataFrame is always fitted so: each pass maps a task over the partitions, whose sums are
    tree-reduced on the driver.

    Everything a tree answers, a mixture answers too: ``surprisal`` (under each row's most
    responsible component, with the responsibilities), ``predict_proba``/``predict`` of a
    column, ``marginals`` and ``impute`` (exact sums over components, see
    ``treewise.mixture_inference``), and conditional sampling (``sample(given=...)``).

    Parameters
    ----------
    n_components : int, default 2
        The number of trees K.
    alpha : float, default 0.5
        Dirichlet smoothing of every component's tables, as in ``DependencyTree``: alpha is
        added to every cell, and a component holds about 1/K of the rows, so the same alpha
        flattens its tables more than the single tree's, most under a many-valued parent. On
        large tables a smaller alpha fits better (bench/mixture_real.py, held out, K chosen:
        nycflights13 flights +1.88 nats per row over the tree at alpha 0.05 against +1.39 at
        0.5, movielens +0.59 against +0.30); on small ones it overfits (AER's CPS1985).
    pooling : float, default 5.0
        Pseudo-rows pulling each component's tables toward the pooled tables of all the rows
        (the m-estimate: (n_k(a, x) + pooling P(x | a) + alpha) / (n_k(a) + pooling +
        alpha r), P the alpha-smoothed conditional of all rows). A component that explains few
        rows with some parent value falls back on what all the rows say instead of a flat row;
        0 turns it off, and with one component there is nothing to pool. The trees themselves
        come from each component's own counts. Measured (bench/mixture_bench.py, held out),
        5 pseudo-rows raised a 4-tree mixture's held-out likelihood on all three of its tables:
        digits +3.93 to +4.07 nats per row, diamonds +0.62 to +0.64, and AER's CPS1985 (534
        rows) -0.53 to -0.18 against one tree.
    max_iter : int, default 100
        The most EM iterations per start.
    tol : float, default 1e-4
        Stop when the mean log-likelihood per row improves by less than this (nats).
    n_init : int, default 1
        Starts; the one with the highest final log-likelihood is kept.
    algorithm : {"soft", "hard"}, default "soft"
        Soft EM, or hard (classification) EM.
    init : {"kmeans++", "random"}, default "kmeans++"
        "kmeans++": K seed rows drawn k-means++-style under Hamming distance on the codes (the
        next seed with probability proportional to its squared distance to the nearest seed),
        each row assigned to its nearest seed. "random": responsibilities drawn from a flat
        Dirichlet.
    random_state : int, optional
        Seeds the initialisation. None draws from the operating system.
    columns, max_categories, n_bins, kinds, memory_limit
        As in ``DependencyTree``.
    streaming : bool, optional
        Fit by one pass over the data per iteration (True) or with every row in memory
        (False). None (the default) streams data that is not in memory: paths, Parquet, CSV or
        Arrow files, datasets, one-shot streams and Dask DataFrames. A Dask DataFrame always
        streams. The model file does not record it.

    Attributes
    ----------
    weights_ : ndarray of shape (K,)
    components_ : list of MixtureComponent
    converged_ : bool
    n_iter_ : int
        Iterations of the kept start.
    lower_bound_ : float
        The kept start's final mean log-likelihood per row of the codes (nats; the shared
        ln P(value | "other") of tail values is left out, being the same for every parameter).
        With ``algorithm="hard"``, the mean classification log-likelihood per row,
        max_k ln w_k P_k(row).
    lower_bounds_ : list of float
        That quantity after every iteration of the kept start.
    n_reseeds_ : int
        How often a degenerate component was reseeded in the kept start.
    single_tree_ : DependencyTree
        The single tree whose codebook the mixture shares.
    """

    def __init__(
        self,
        n_components: int = 2,
        *,
        alpha: float = 0.5,
        pooling: float = 5.0,
        max_iter: int = 100,
        tol: float = 1e-4,
        n_init: int = 1,
        algorithm: str = "soft",
        init: str = "kmeans++",
        random_state: RandomState = None,
        columns: Sequence[str] | None = None,
        max_categories: int = 128,
        n_bins: int = 10,
        kinds: Mapping[str, str] | None = None,
        memory_limit: int | str | None = None,
        streaming: bool | None = None,
    ) -> None:
        self.n_components = n_components
        self.alpha = alpha
        self.pooling = pooling
        self.max_iter = max_iter
        self.tol = tol
        self.n_init = n_init
        self.algorithm = algorithm
        self.init = init
        self.random_state = random_state
        self.columns = columns
        self.max_categories = max_categories
        self.n_bins = n_bins
        self.kinds = kinds
        self.memory_limit = memory_limit
        self.streaming = streaming

    _PARAMS = (
        "n_components",
        "alpha",
        "pooling",
        "max_iter",
        "tol",
        "n_init",
        "algorithm",
        "init",
        "random_state",
        "columns",
        "max_categories",
        "n_bins",
        "kinds",
        "memory_limit",
        "streaming",
    )

    # -- fitting ---------------------------------------------------------------------------------

    def fit(
        self,
        data: Any,
        y: None = None,
        *,
        progress: bool | None = None,
        batch_rows: int | None = None,
    ) -> TreeMixture:
        """Fit the mixture to ``data``: any input ``DependencyTree.fit`` takes, or Dask data.

        ``progress`` (default: only when stderr is a terminal) draws a bar per pass of a
        streaming fit and prints each iteration's mean log-likelihood per row; ``batch_rows``
        is the rows per batch of a streaming fit (default 262,144).
        """
        k = check_int("n_components", self.n_components, 1, 1024)
        alpha = check_alpha(self.alpha)
        max_iter = check_int("max_iter", self.max_iter, 1, 1_000_000)
        tol = check_nonnegative("tol", self.tol)
        n_init = check_int("n_init", self.n_init, 1, 10_000)
        if self.algorithm not in ("soft", "hard"):
            raise ValueError(f"algorithm must be 'soft' or 'hard', got {self.algorithm!r}")
        if self.init not in ("kmeans++", "random"):
            raise ValueError(f"init must be 'kmeans++' or 'random', got {self.init!r}")
        check_int("max_categories", self.max_categories, 2, MAX_CATEGORIES)
        pooling = check_nonnegative("pooling", self.pooling)
        if wants_streaming(data, self.streaming):
            fit_streaming(
                self,
                data,
                k=k,
                alpha=alpha,
                max_iter=max_iter,
                tol=tol,
                n_init=n_init,
                progress=progress,
                batch_rows=batch_rows,
                em=EmParts(_log_mix, MIN_COMPONENT_ROWS, MAX_RESEEDS, pooling),
            )
            return self
        show = wants_progress(progress)
        tree = DependencyTree(
            columns=self.columns,
            max_categories=self.max_categories,
            n_bins=self.n_bins,
            kinds=self.kinds,
            alpha=alpha,
            memory_limit=self.memory_limit,
        ).fit(data, progress=show)
        self._adopt_tree(tree)
        codes, _, _ = self._encode(data)
        rng = np.random.default_rng(seed_of(self.random_state))
        best: _Run | None = None
        with PassProgress(show, None, 1) as bar:
            for start in range(n_init):
                label = f"start {start + 1} of {n_init}, " if n_init > 1 else ""
                run = self._em(codes, k, alpha, max_iter, tol, rng, bar.note, label)
                if best is None or run.bounds[-1] > best.bounds[-1]:
                    best = run
        assert best is not None
        self._set_run(best, alpha)
        self.n_rows_ = codes.n_rows
        return self

    def _adopt_tree(self, tree: DependencyTree) -> None:
        self.single_tree_ = tree
        self.feature_names_in_ = tree.feature_names_in_
        self.n_features_in_ = tree.n_features_in_
        self.codebook_ = tree.codebook_

    def _restore(
        self,
        tree: DependencyTree,
        comps: list[_core.MixtureComponent],
        weights: FloatArray,
        bounds: list[float],
        converged: bool,
    ) -> None:
        """Set every fitted attribute from a mixture file's parts."""
        self._adopt_tree(tree)
        self._set_run(_Run(comps, weights, bounds, converged, 0), float(self.alpha))

    def _set_run(self, run: _Run, alpha: float) -> None:
        names = self.feature_names_in_
        cards = tuple(self.codebook_.cardinalities)
        d = len(cards)
        upper = np.triu_indices(d, k=1)
        comps = []
        for w, comp in zip(run.weights, run.components, strict=True):
            pairwise = np.zeros((d, d))
            pairwise[upper] = comp.pair_mi
            comps.append(
                MixtureComponent(
                    float(w),
                    names,
                    comp.root,
                    np.array(comp.parent, dtype=np.intp),
                    pairwise + pairwise.T,
                    comp,
                    cards,
                )
            )
        self._components = run.components
        self._fitted_alpha = alpha
        self._fitted_pooling = check_nonnegative("pooling", self.pooling)
        self.components_ = comps
        self.weights_ = run.weights
        self.lower_bounds_ = run.bounds
        self.lower_bound_ = run.bounds[-1]
        self.n_iter_ = len(run.bounds)
        self.converged_ = run.converged
        self.n_reseeds_ = run.reseeds

    def _encoded(
        self, data: Any
    ) -> Iterator[tuple[_core.MixtureCodes, list[bytes | None], npt.NDArray[np.int64]]]:
        """``data`` batch by batch as codes, with tail terms and values without a code.

        Per batch: the codes, each column's tail terms (None for a column without a tail
        table) and the values per column without a code.
        """
        tree = self.single_tree_
        model = tree._fitted()
        names = [str(n) for n in tree.feature_names_in_]
        source = open_source(data)
        check_columns(source.names, names, source.description)
        with BatchLoop(source, names, BATCH_ROWS, None, "encoding") as loop:
            for batch in loop:
                codes, columns, unseen = _core.MixtureCodes.encode_columns(
                    model, batch.select(names)
                )
                yield codes, columns, np.array(unseen, dtype=np.int64)

    def _encode(self, data: Any) -> tuple[_core.MixtureCodes, FloatArray, npt.NDArray[np.int64]]:
        """Every row of ``data`` as codes in memory (for EM), its tail term and unseen counts.

        Each batch is encoded as it is read: memory holds the codes, not the values.
        """
        cards = [int(c) for c in self.codebook_.cardinalities]
        d = len(cards)
        columns: list[list[bytes]] = [[] for _ in range(d)]
        tails: list[FloatArray] = []
        unseen = np.zeros(d, dtype=np.int64)
        for codes, terms, missing in self._encoded(data):
            for c in range(d):
                columns[c].append(codes.column(c))
            tails.append(_tail_sum(terms, codes.n_rows))
            unseen += missing
        joined = _core.MixtureCodes([b"".join(parts) for parts in columns], cards)
        return joined, np.concatenate(tails) if tails else np.zeros(0), unseen

    def _init_resp(self, codes: _core.MixtureCodes, k: int, rng: np.random.Generator) -> FloatArray:
        n = codes.n_rows
        if self.init == "random":
            return rng.dirichlet(np.ones(k), size=n)
        matrix = np.stack(
            [np.frombuffer(codes.column(c), "<u2") for c in range(self.n_features_in_)]
        )
        # k-means++ seeding (Arthur & Vassilvitskii 2007) under Hamming distance on the codes.
        seeds = [int(rng.integers(n))]
        nearest = (matrix != matrix[:, seeds[0], None]).sum(axis=0).astype(np.float64)
        distances = [nearest.copy()]
        for _ in range(1, k):
            mass = nearest**2
            total = mass.sum()
            pick = int(rng.integers(n)) if total == 0 else int(rng.choice(n, p=mass / total))
            seeds.append(pick)
            dist = (matrix != matrix[:, pick, None]).sum(axis=0).astype(np.float64)
            distances.append(dist)
            nearest = np.minimum(nearest, dist)
        assign = np.argmin(np.stack(distances, axis=1), axis=1)
        resp = np.zeros((n, k))
        resp[np.arange(n), assign] = 1.0
        return resp

    def _em(
        self,
        codes: _core.MixtureCodes,
        k: int,
        alpha: float,
        max_iter: int,
        tol: float,
        rng: np.random.Generator,
        note: Callable[[str], None] | None = None,
        label: str = "",
    ) -> _Run:
        """One EM run from one start; ``note`` (if any) hears each iteration's bound."""
        n = codes.n_rows
        pooling = check_nonnegative("pooling", self.pooling)
        resp = self._init_resp(codes, k, rng)
        row_ll: FloatArray | None = None
        bounds: list[float] = []
        reseeds = 0
        converged = False
        for _ in range(max_iter):
            reseeded = 0
            if reseeds < MAX_RESEEDS:
                resp, reseeded = _reseed(resp, row_ll, rng)
            reseeds += reseeded
            # M-step: weights and trees from the responsibilities.
            weights = resp.sum(axis=0) / n
            if self.algorithm == "hard" and bool((resp.max(axis=1) == 1.0).all()):
                # Every row wholly in one component: exact counts of each component's rows
                # by the integer kernels (the same numbers, a K-th of the counting).
                assign = np.argmax(resp, axis=1).astype("<u4")
                comps = codes.fit_assigned(assign.tobytes(), k, alpha, pooling)
            else:
                resp_bytes = np.ascontiguousarray(resp).tobytes()
                comps = codes.fit_components(resp_bytes, k, alpha, pooling)
            # E-step: every row under every tree; the bound of the parameters just fitted.
            ll = np.frombuffer(codes.log_likelihoods(comps), "<f8").reshape(n, k)
            row_ll, resp = _log_mix(ll, weights)
            if self.algorithm == "hard":
                # Classification step: each row wholly to its most responsible component
                # (ties to the lower index); the bound is the classification likelihood.
                best = np.argmax(resp, axis=1)
                with np.errstate(divide="ignore"):
                    row_ll = ll[np.arange(n), best] + np.log(weights)[best]
                resp = np.zeros_like(resp)
                resp[np.arange(n), best] = 1.0
            bounds.append(float(row_ll.mean()))
            if note is not None:
                note(
                    f"EM {label}iteration {len(bounds)}: mean log-likelihood "
                    f"{bounds[-1]:.6f} nats per row"
                )
            if len(bounds) > 1 and not reseeded and abs(bounds[-1] - bounds[-2]) < tol:
                converged = True
                break
        return _Run(comps, weights, bounds, converged, reseeds)

    # -- the model as a distribution -------------------------------------------------------------

    def _fitted(self) -> list[_core.MixtureComponent]:
        comps: list[_core.MixtureComponent] | None = getattr(self, "_components", None)
        if comps is None:
            raise NotFittedError("this TreeMixture is not fitted yet; call fit(data) first")
        return comps

    def _mixed(self, data: Any) -> tuple[FloatArray, FloatArray]:
        """Ln p(row) and the responsibilities of every row, read batch by batch."""
        comps = self._fitted()
        totals, resps = [np.zeros(0)], [np.zeros((0, len(comps)))]
        unseen = np.zeros(self.n_features_in_, dtype=np.int64)
        for codes, terms, missing in self._encoded(data):
            ll = np.frombuffer(codes.log_likelihoods(comps), "<f8")
            total, resp = _log_mix(ll.reshape(codes.n_rows, len(comps)), self.weights_)
            totals.append(total + _tail_sum(terms, codes.n_rows))
            resps.append(resp)
            unseen += missing
        self._warn_unseen(unseen)
        return np.concatenate(totals), np.concatenate(resps)

    def _warn_unseen(self, unseen: npt.NDArray[np.int64]) -> None:
        if unseen.any():
            names = [str(n) for n in self.feature_names_in_]
            report = ", ".join(f"{names[c]!r}: {m}" for c, m in enumerate(unseen) if m)
            warn(
                f"values never seen in fitting (scored with the smoothing mass, "
                f"alpha={self.alpha}): {report}",
                UnseenCategoryWarning,
            )

    def score_samples(self, data: Any) -> FloatArray:
        """The log-probability of each row under the mixture, in nats.

        The log-sum-exp over components of ln w_k + ln P_k(row), plus ln P(value | "other")
        for tail values, as a tree scores them. Unseen values are scored as a tree scores them.
        """
        return self._mixed(data)[0]

    def score(self, data: Any, y: None = None) -> float:
        """The total log-likelihood of ``data`` (nats), as ``DependencyTree.score``."""
        return float(self.score_samples(data).sum())

    def predict_proba(self, data: Any, target: str | int | None = None) -> FloatArray:
        """Posterior probabilities: of the components, or of one column's values.

        Without ``target``, the responsibilities P(component k | row), shape (rows, K), rows
        summing to 1 (as scikit-learn's ``GaussianMixture.predict_proba``). With ``target``,
        as ``DependencyTree.predict_proba``: P(target = category | the row's other columns),
        exact, each component's posterior mixed by P(k | the row's other columns); columns
        follow ``single_tree_.categories_[target]``.
        """
        if target is not None:
            return mixture_inference.predict_proba(self, data, target)
        return self._mixed(data)[1]

    def predict(
        self, data: Any, target: str | int | None = None, *, allow_null: bool = False
    ) -> Any:
        """Each row's most responsible component, or the most probable value of ``target``.

        With ``target``, the most probable value of that column given the rest of the row, as
        ``DependencyTree.predict`` gives it.
        """
        if target is not None:
            return mixture_inference.predict(self, data, target, allow_null)
        return np.asarray(np.argmax(self.predict_proba(data), axis=1), dtype=np.intp)

    def marginals(self, evidence: Mapping[str, Any] | None = None) -> dict[str, FloatArray]:
        """Every column's posterior given ``evidence`` (a dict column -> value).

        Each component's posterior, mixed by its posterior weight, as ``DependencyTree.marginals``.
        """
        return mixture_inference.marginals(self, evidence)

    def impute(
        self, data: Any, strategy: str = "joint", random_state: RandomState = None
    ) -> pa.Table:
        """Fill the nulls of ``data`` from the mixture.

        ``"marginal"`` (exact) and ``"sample"`` (an exact draw from the row's posterior) are
        the mixture's own answers. ``"joint"`` takes each component's most probable completion
        and keeps the one the mixture finds most probable (the exact maximum over a sum of
        trees has no message-passing solution). See ``treewise.mixture_inference.impute``.
        """
        return mixture_inference.impute(self, data, strategy, random_state)

    def surprisal(self, data: Any) -> pa.Table:
        """Which columns made each row unlikely, under the component that explains it best.

        Returns
        -------
        pyarrow.Table
            One float64 column per modelled column holding -ln P_k(x_column | x_parent) in
            nats under the row's most responsible component k (its own tree and parent), with
            the tail term of a value behind "other", as ``DependencyTree.surprisal`` gives it;
            ``component`` (k); ``component_total``, the sum of those columns
            (-ln P_k(row)); ``total``, -ln p(row) under the whole mixture (minus
            ``score_samples``); and ``responsibility_<j>`` = P(component j | row) for every j.
        """
        comps = self._fitted()
        names = [str(n) for n in self.feature_names_in_]
        k = len(comps)
        parts: list[dict[str, FloatArray]] = []
        unseen = np.zeros(len(names), dtype=np.int64)
        for codes, tails, missing in self._encoded(data):
            n = codes.n_rows
            ll = np.frombuffer(codes.log_likelihoods(comps), "<f8").reshape(n, k)
            total, resp = _log_mix(ll, self.weights_)
            unseen += missing
            which = np.argmax(resp, axis=1).astype(np.uint32)
            terms = codes.column_terms(comps, which.tobytes())
            part: dict[str, FloatArray] = {}
            for name, term, tail in zip(names, terms, tails, strict=True):
                value = -np.frombuffer(term, "<f8")
                part[name] = value if tail is None else value - np.frombuffer(tail, "<f8")
            part["component"] = which.astype(np.int64)
            part["component_total"] = np.sum([part[name] for name in names], axis=0)
            part["total"] = -(total + _tail_sum(tails, n))
            for j in range(k):
                part[f"responsibility_{j}"] = resp[:, j]
            parts.append(part)
        self._warn_unseen(unseen)
        keys = [*names, "component", "component_total", "total"]
        keys += [f"responsibility_{j}" for j in range(k)]
        empty = {key: np.zeros(0, np.int64 if key == "component" else np.float64) for key in keys}
        return pa.table(
            {key: pa.array(np.concatenate([empty[key], *(p[key] for p in parts)])) for key in keys}
        )

    def sample(
        self,
        n: int | None = None,
        random_state: RandomState = None,
        *,
        given: Mapping[str, Any] | Any = None,
        return_components: bool = False,
    ) -> Any:
        """Draw ``n`` synthetic rows: a component by its weight, then a row from its tree.

        Values come back as ``DependencyTree.sample`` gives them (numbers drawn inside their
        bin, rare values behind "other" by their counts), with the fitted names and types. The
        same ``random_state`` gives the same rows on any number of threads. With
        ``return_components``, also returns each row's component (as scikit-learn's
        ``GaussianMixture.sample`` returns labels).

        With ``given`` (a dict fixed for every row, or a table with one row of evidence per
        sampled row, as ``DependencyTree.sample``), each row draws its component from
        P(k | evidence), then its unobserved cells from that component given the evidence: an
        exact conditional draw from the mixture.
        """
        if given is not None:
            if return_components:
                raise ValueError("return_components is not available with given=")
            return mixture_inference.sample_given(self, n, given, random_state)
        if n is None:
            raise TypeError("sample() needs n, the number of rows (or given= evidence)")
        parts = list(self._sampled(n, random_state))
        table = pa.Table.from_batches([b for b, _ in parts], schema=parts[0][0].schema)
        if return_components:
            return table, np.concatenate([labels for _, labels in parts])
        return table

    def iter_sample(self, n: int, random_state: RandomState = None) -> Iterator[pa.RecordBatch]:
        """Draw ``n`` rows as record batches of at most 262,144 rows (bounded memory).

        The rows are those of ``sample(n, random_state)``, whatever the number of threads.
        """
        for batch, _ in self._sampled(n, random_state):
            if batch.num_rows:
                yield batch

    def _sampled(
        self, n: int, random_state: RandomState
    ) -> Iterator[tuple[pa.RecordBatch, npt.NDArray[np.intp]]]:
        """Blocks of sampled rows (at least one, maybe empty) with each row's component."""
        comps = self._fitted()
        n = check_int("n", n, 0, MAX_SAMPLE_ROWS)
        tree = self.single_tree_
        model = tree._fitted()
        seed = seed_of(random_state)
        weights = [float(w) for w in self.weights_]
        step = _core.SAMPLE_BLOCK * 64
        for start in range(0, max(n, 1), step):
            count = min(step, n - start)
            codes, floats, tails, which = _core.mixture_sample(
                model, comps, weights, start, count, seed
            )
            batch = tree._decode_sampled(codes, floats, tails, count)
            yield batch, np.frombuffer(which, "<u4").astype(np.intp)

    def _repr_html_(self) -> str:
        """The notebook view: the components, their weights and how their trees differ."""
        from treewise.views.notebook import mixture_html

        return mixture_html(self)

    def save(self, path: str | os.PathLike[str]) -> None:
        """Write the mixture to ``path`` (docs/model-format.md, "Mixture files"), atomically."""
        self._fitted()
        write_atomically(path, mixture_to_bytes(self))

    @classmethod
    def load(cls, path: str | os.PathLike[str]) -> TreeMixture:
        """Read a mixture written by :meth:`save`, checking every field before use."""
        return mixture_from_bytes(read_model_file(path), cls)

    @property
    def n_parameters_(self) -> int:
        """Free parameters: K - 1 weights plus each tree's (as ``DependencyTree`` counts them)."""
        self._fitted()
        cards = self.codebook_.cardinalities
        total = len(self.components_) - 1
        for comp in self.components_:
            total += sum(r - 1 for r in cards)
            total += sum(
                (cards[p] - 1) * (cards[c] - 1) for c, p in enumerate(comp.parent_) if p >= 0
            )
        return total

    def bic(self, data: Any) -> float:
        """-2 ln L + p ln N on ``data`` (lower is better); the structures are not counted."""
        scores = self.score_samples(data)
        return float(-2.0 * scores.sum() + self.n_parameters_ * math.log(len(scores)))


def _tail_sum(terms: list[bytes | None], n: int) -> FloatArray:
    """Per row, the tail terms ln P(value | "other") summed over the columns that have one."""
    total = np.zeros(n)
    for term in terms:
        if term is not None:
            total += np.frombuffer(term, "<f8")
    return total


def _reseed(
    resp: FloatArray, row_ll: FloatArray | None, rng: np.random.Generator
) -> tuple[FloatArray, int]:
    """Reseed every degenerate component; returns the responsibilities and how many.

    A component with fewer than MIN_COMPONENT_ROWS rows of weight is given the rows the mixture
    explains worst (random rows before the first E-step).
    """
    n, k = resp.shape
    reseeded = 0
    for j in range(k):
        if resp[:, j].sum() >= MIN_COMPONENT_ROWS:
            continue
        take = max(int(MIN_COMPONENT_ROWS), n // (2 * k))
        if take >= n:
            continue
        rows = (
            rng.permutation(n)[:take]
            if row_ll is None
            else np.argsort(row_ll, kind="stable")[:take]
        )
        resp = resp.copy()
        resp[rows] = 0.0
        resp[rows, j] = 1.0
        reseeded += 1
    return resp, reseeded


def choose_n_components(
    data: Any,
    candidates: Sequence[int],
    *,
    criterion: str = "heldout",
    validation: Any = None,
    rule: str = "one_se",
    **params: Any,
) -> tuple[int, dict[int, float]]:
    """Fit a ``TreeMixture`` for each K in ``candidates`` and pick one.

    ``criterion="heldout"`` scores every candidate on the rows of ``validation`` (required).
    With ``rule="one_se"`` (the default) it keeps the smallest K whose mean held-out
    log-likelihood per row is within one standard error of the best K's, the standard error
    being that of the per-row differences from the best (the one-standard-error rule of
    Breiman et al., "Classification and Regression Trees", 1984; Hastie, Tibshirani & Friedman,
    "The Elements of Statistical Learning", section 7.10: common practice). A larger mixture
    then has to beat a smaller one by more than the noise of the validation rows, which keeps
    small tables from choosing components that overfit. ``rule="best"`` keeps the highest mean.
    ``criterion="bic"`` keeps the K with the lowest BIC on ``data``. Returns the chosen K and
    each candidate's figure (mean held-out log-likelihood per row, or BIC). ``params`` go to
    every ``TreeMixture``.
    """
    if criterion not in ("heldout", "bic"):
        raise ValueError(f"criterion must be 'heldout' or 'bic', got {criterion!r}")
    if rule not in ("one_se", "best"):
        raise ValueError(f"rule must be 'one_se' or 'best', got {rule!r}")
    if criterion == "heldout" and validation is None:
        raise ValueError("criterion='heldout' needs validation= data")
    ks = sorted({check_int("candidates", k, 1, 1024) for k in candidates})
    if not ks:
        raise ValueError("candidates must hold at least one number of components")
    figures: dict[int, float] = {}
    rows: dict[int, FloatArray] = {}
    for k in ks:
        model = TreeMixture(n_components=k, **params).fit(data)
        if criterion == "bic":
            figures[k] = model.bic(data)
        else:
            rows[k] = model.score_samples(validation)
            if len(rows[k]) == 0:
                raise DataError("validation= has 0 rows; hold out some rows to judge K on")
            figures[k] = float(rows[k].mean())
    if criterion == "bic":
        return min(ks, key=lambda k: (figures[k], k)), figures
    best = max(ks, key=lambda k: (figures[k], -k))
    if rule == "best":
        return best, figures
    for k in ks:
        diff = rows[best] - rows[k]
        se = float(diff.std(ddof=1) / math.sqrt(len(diff))) if len(diff) > 1 else 0.0
        if figures[k] >= figures[best] - se:
            return k, figures
    return best, figures
