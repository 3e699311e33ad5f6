"""The DependencyTree estimator: fit a Chow-Liu tree to a table (scikit-learn conventions)."""

from __future__ import annotations

import json
import math
import numbers
import os
from collections.abc import Iterator, Mapping, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa

from treewise import _core, inference
from treewise.categories import column_categories
from treewise.checks import (
    MAX_CATEGORIES,
    MAX_SAMPLE_ROWS,
    RandomState,
    check_alpha,
    check_int,
    check_kinds,
    check_memory_limit,
    check_prune,
    seed_of,
)
from treewise.counts import ExactCounts
from treewise.decode import ColumnValues, decode_column, type_from_name
from treewise.errors import CorruptModelError, DataError, NotFittedError, SchemaError
from treewise.files import read_model_file, write_atomically
from treewise.noise import IntegerSource, integer_source
from treewise.pairstats import PairStats
from treewise.params import Params
from treewise.passes import TypeRecorder, count_pairs, learn_and_count
from treewise.privacy import Plan, check_privacy, plan_budget
from treewise.private import check_public, count_private, private_model
from treewise.progress import PassProgress, wants_progress
from treewise.sources import (
    BATCH_ROWS,
    BatchLoop,
    check_columns,
    generated_source,
    open_source,
)
from treewise.sparse import is_sparse, sparse_counts
from treewise.stream import Scored, atomic_parquet, score_batches, write_scores

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = ["DependencyTree"]

#: Rows per sampled batch by default.
SAMPLE_BATCH_ROWS = 262_144


class DependencyTree(ExactCounts, Params):
    """A maximum-likelihood tree-structured distribution over categorical columns.

    Fitting counts every pair of columns exactly, weighs each pair by its mutual information and
    keeps the maximum spanning tree (Chow & Liu 1968), oriented away from ``root``. The fitted
    model is a probability distribution: it scores rows, explains which column made a row
    unlikely, and draws synthetic rows.

    Parameters
    ----------
    columns : list of str, optional
        The columns to model, in this order. Default: every column of the data.
    max_categories : int, default 128
        The most codes any non-float column may have, counting an "other" code and a null code.
        The rarest values beyond it share the "other" code, and a ``CategoryCapWarning`` says
        how many.
    n_bins : int, default 10
        A number or time column with more distinct values than this is numeric: it is cut into
        at most this many quantile bins (plus a code per non-finite value and a null code), and
        ``max_categories`` does not apply to it. One with at most this many is categorical.
    kinds : dict of str to str, optional
        How to model named columns, overriding the choice made from the data:
        ``"categorical"``, ``"numeric"``, ``"ignore"`` (leave it out) or ``"auto"``. The rules
        are in docs/column-kinds.md; identifiers (nearly every value distinct) and all-null
        columns are left out by default, with a ``ColumnKindWarning``.
    root : str, optional
        The column the tree is oriented from. Default: the centre of the tree (the column whose
        longest path to the others is shortest), never a constant column.
    alpha : float, default 0.5
        Dirichlet smoothing of the conditional tables: P(x | a) = (n_ax + alpha) /
        (n_a + alpha * r_x). ``alpha=0`` is the maximum-likelihood estimate; the default 0.5 is
        the Jeffreys pseudo-count (common practice). The counts are kept, so changing ``alpha``
        with ``set_params`` needs no refit.
    prune : {None, "bic"} or float, default None
        Keep only the dependencies that pay, turning the tree into a forest. ``"bic"`` keeps an
        edge while its G statistic exceeds dof·ln N (adding it lowers the BIC); a float in
        (0, 1) keeps it while the G-test rejects independence at that significance level.
        Kruskal's algorithm then runs over the edges that pass. None keeps the whole tree.
    memory_limit : int or str, optional
        The most memory the pair statistics (with the scratch of counting a batch and the tail
        tables) and the rows of one ``sample`` call may take: bytes, a size such as ``"4GiB"``
        or ``"500MB"``, or a share of the machine's memory such as ``"80%"``. Default: half of
        the machine's memory (physical RAM, or the container's cgroup limit when lower). Work
        that would pass it raises ``MemoryLimitError`` before allocating, saying what needs how
        much and what to change.
    epsilon : float, optional
        Fit with differential privacy: the model released satisfies (epsilon, delta)-DP for
        adding or removing one row (docs/privacy.md). None (the default) is an ordinary fit.
    delta : float, optional
        The delta of the guarantee (default 0: pure epsilon-DP). With delta > 0 the structure
        and tables are accounted in zCDP, and unknown categories can be learned privately.
    domains : dict, optional
        Public domains per column, for a private fit: a list of categories, or a ``(low,
        high)`` range of a number or time column (its bin edges are then chosen privately),
        or ``{"range": [low, high], "edges": [...]}``. A column without one has its
        categories learned with noise (needs delta > 0); bool columns need none. In a private
        fit the domains decide how each column is modelled; of ``kinds``, only "ignore" applies.
    privacy_split : dict, optional
        Shares of the budget: ``{"domains": 0.1, "structure": 0.3, "tables": 0.6}`` by
        default; the domains' share is spent only when some domain is learned.
    random_state : int, optional
        Seeds the privacy noise, for tests and reproducible demos only: a seeded release is
        not private against anyone who knows the seed. None draws from the operating system.

    Attributes
    ----------
    feature_names_in_ : ndarray of str
        The modelled columns, in order.
    n_features_in_ : int
        How many columns.
    n_rows_ : int
        How many rows the model was fitted on.
    categories_ : list of list
        Each column's categories in code order: values (or ``Bin`` intervals for floats), then
        ``treewise.OTHER`` if there is an "other" code, then ``None`` if there is a null code.
    parent_ : ndarray of int
        Each column's parent's index, -1 for the root.
    mutual_info_ : ndarray of float
        Each column's mutual information with its parent in nats, 0 for the root.
    pairwise_mutual_info_ : ndarray of float, shape (n_features_in_, n_features_in_)
        The mutual information of every pair of columns (the edge weights).
    n_parameters_ : int
        Free parameters: sum of (r_i - 1) plus, per edge, (r_parent - 1)(r_child - 1).
    codebook_ : Codebook
        The encoding of every column, to reuse with ``fit(..., codebook=model.codebook_)`` or
        ``PairStats``.
    privacy_ : dict or None
        For a private fit, its guarantee: epsilon, delta, the accounting, the neighbouring
        relation, what was protected, the budget split and the noise of each step. None for an
        ordinary fit.
    """

    _model: _core.TreeModel | None
    _stats: _core.PairStats | None

    def __init__(
        self,
        *,
        columns: Sequence[str] | None = None,
        max_categories: int = 128,
        n_bins: int = 10,
        kinds: Mapping[str, str] | None = None,
        root: str | None = None,
        alpha: float = 0.5,
        prune: str | float | None = None,
        memory_limit: int | str | None = None,
        epsilon: float | None = None,
        delta: float | None = None,
        domains: Mapping[str, Any] | None = None,
        privacy_split: Mapping[str, float] | None = None,
        random_state: int | None = None,
    ) -> None:
        self.columns = columns
        self.max_categories = max_categories
        self.n_bins = n_bins
        self.kinds = kinds
        self.root = root
        self.alpha = alpha
        self.prune = prune
        self.memory_limit = memory_limit
        self.epsilon = epsilon
        self.delta = delta
        self.domains = domains
        self.privacy_split = privacy_split
        self.random_state = random_state

    _PARAMS = (
        "columns",
        "max_categories",
        "n_bins",
        "kinds",
        "root",
        "alpha",
        "prune",
        "memory_limit",
        "epsilon",
        "delta",
        "domains",
        "privacy_split",
        "random_state",
    )

    def __getstate__(self) -> dict[str, Any]:
        """Pickle support: the Rust objects travel as their own validated file bytes."""
        state = self.__dict__.copy()
        model = state.pop("_model", None)
        stats = state.pop("_stats", None)
        state.pop("codebook_", None)
        if model is not None:
            state["_model_bytes"] = model.to_bytes()
            if stats is not None:
                state["_stats_bytes"] = stats.to_bytes(model.codebook, model.dtypes)
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        model_bytes = state.pop("_model_bytes", None)
        stats_bytes = state.pop("_stats_bytes", None)
        self.__dict__.update(state)
        if model_bytes is not None:
            self._model = _core.TreeModel.from_bytes(model_bytes)
            self.codebook_ = self._model.codebook
            # Rebuilt, not unpickled: a NaN category must be the one NaN object (math.nan).
            codebook = self._model.codebook
            self.categories_ = [
                column_categories(*codebook.column(i)) for i in range(len(codebook))
            ]
            self._stats = None
            if stats_bytes is not None:
                self._stats = _core.PairStats.from_bytes(stats_bytes)[2]

    # -- fitting ---------------------------------------------------------------------------------

    def fit(
        self,
        data: Any,
        y: None = None,
        *,
        codebook: _core.Codebook | DependencyTree | None = None,
        progress: bool | None = None,
        batch_rows: int | None = None,
    ) -> DependencyTree:
        """Fit the tree to ``data``.

        Parameters
        ----------
        data : table, path or stream
            In memory: a pyarrow Table or RecordBatch, a pandas or polars DataFrame, or any
            object with ``__arrow_c_stream__``. On disk: a Parquet, CSV or Arrow IPC file, a
            directory, a glob, or a list of paths, or a ``pyarrow.dataset.Dataset``; files are
            streamed one batch at a time. One-shot streams: a ``pyarrow.RecordBatchReader`` or
            any iterator of record batches. A scipy.sparse matrix of integer or bool flags is
            counted from its non-zero entries alone (columns ``x0, x1, ...`` or ``columns``;
            see ``treewise.sparse``).
        y : None
            Ignored; present for scikit-learn compatibility.
        codebook : Codebook or DependencyTree, optional
            Encode with this codebook (for example an earlier model's ``codebook_``) instead of
            learning one: the data is then read once. A value it has no code for goes to the
            column's "other" code, or is an error when the column has none.
        progress : bool, optional
            Draw a progress bar per pass. Default: only when stderr is a terminal.
        batch_rows : int, optional
            Rows per batch (default 262,144); memory grows with it.

        Returns
        -------
        DependencyTree
            The fitted estimator.

        Notes
        -----
        Without ``codebook``, the data is read once: pairs are counted with provisional codes
        while each column's codes are learned, then recoded to the final codes (exactly the
        counts a second pass would give). A modelled column with more than 4,096 distinct
        values (not an identifier, which is left out), or provisional tables past 256 MiB,
        makes the fit read the data a second time to count;
        so does, for data in memory, a number column with more than ``n_bins`` distinct values
        (it will be binned, and its bins count faster). The progress line says so. A one-shot
        stream is spooled to a temporary Arrow file (in the system's temporary directory)
        meanwhile, in case it must be read again.
        """
        max_categories = check_int("max_categories", self.max_categories, 2, MAX_CATEGORIES)
        n_bins = check_int("n_bins", self.n_bins, 1, MAX_CATEGORIES - 1)
        alpha = check_alpha(self.alpha)
        check_prune(self.prune)
        limit = check_memory_limit(self.memory_limit)
        rows = check_int("batch_rows", BATCH_ROWS if batch_rows is None else batch_rows, 1, 2**31)
        if is_sparse(data) and codebook is None and self._privacy_budget() is None:
            kinds = None if self.kinds is None else dict(self.kinds)
            book, counts, dtypes = sparse_counts(
                data, self.columns, kinds, max_categories, n_bins, limit
            )
            names = list(book.names)
            if self.root is not None and self.root not in names:
                raise SchemaError(f"root={self.root!r} is not one of the modelled columns {names}")
            return self._adopt(counts, book, dtypes, self._root_index(names), alpha)
        source = open_source(data)
        given = _as_codebook(codebook)
        wanted = self.columns if self.columns is not None or given is None else given.names
        names = check_columns(source.names, wanted, source.description)
        kinds = check_kinds(self.kinds, names)
        if self.root is not None and self.root not in names:
            raise SchemaError(f"root={self.root!r} is not one of the modelled columns {names}")
        budget = self._privacy_budget()
        if budget is not None:
            # A private fit models a column by its domain; of the kinds, only "ignore" applies.
            names = [n for n in names if kinds.get(n) != "ignore"]
            rng = integer_source(self._noise_seed())
            with PassProgress(wants_progress(progress), source.total_rows, source.n_parts) as bar:
                if given is not None:
                    check_public(given.select(names))
                    public = given.select(names)
                    stats = _core.PairStats(public)
                    recorder = TypeRecorder(names)
                    count_pairs(source, names, public, stats, rows, bar, recorder)
                    plan = plan_budget(
                        *budget, n_columns=len(names), learned_categories=0, learned_ranges=0
                    )
                    found: tuple[
                        _core.PairStats, _core.Codebook, list[str], Plan, dict[str, str]
                    ] = (stats, public, recorder.type_names(public), plan, {})
                else:
                    found = count_private(
                        source, names, self.domains, n_bins, max_categories, rows, bar, budget, rng
                    )
            stats, chosen, dtypes, plan, origin = found
            if stats.n_rows == 0:
                raise DataError(
                    f"{source.description} has 0 rows; a dependency tree needs at least one"
                )
            return self._adopt(
                stats, chosen, dtypes, self._root_index(names), alpha, (plan, rng, origin)
            )
        types = TypeRecorder(names)
        with PassProgress(wants_progress(progress), source.total_rows, source.n_parts) as bar:
            if given is None:
                # Columns left out of the model (identifiers, all null) are not counted.
                chosen, stats, types = learn_and_count(
                    source, names, max_categories, n_bins, rows, bar, types, kinds, limit
                )
            else:
                chosen = given.select(names)
                stats = _core.PairStats(chosen, limit)
                if isinstance(codebook, DependencyTree):
                    # Time columns are counted in the units the codebook's model was fitted in.
                    model = codebook._fitted()
                    fitted = dict(zip(codebook.feature_names_in_, model.dtypes, strict=True))
                    types.types = {n: fitted[n] for n in names if n in fitted}
                count_pairs(source, names, chosen, stats, rows, bar, types)
        if stats.n_rows == 0:
            raise DataError(
                f"{source.description} has 0 rows; a dependency tree needs at least one"
            )
        return self._adopt(
            stats, chosen, types.type_names(chosen), self._root_index(list(chosen.names)), alpha
        )

    def partial_fit(
        self, data: Any, y: None = None, *, codebook: _core.Codebook | DependencyTree | None = None
    ) -> DependencyTree:
        """Add ``data`` to the counts and refit the tree (exactly as one fit on all the data).

        The first call fixes the codebook: ``codebook`` when given, else one learned from this
        first ``data``. Later values without a code go to a column's "other" code, or are an
        error when it has none. A model read with ``load`` keeps only its edges' counts and
        cannot continue; refit it, or keep the ``PairStats``.
        """
        if getattr(self, "_model", None) is None:
            if codebook is None:
                return self.fit(data)
            return self.fit(data, codebook=codebook)
        model = self._fitted()
        if self._privacy_budget() is not None or model.privacy is not None:
            raise NotFittedError(
                "a private model is released once, with noise on all its data: partial_fit "
                "would release again and spend more budget; count every batch into "
                "treewise.PairStats (with a public codebook) and call fit_stats once"
            )
        if self._stats is None:
            raise NotFittedError(
                "this model was loaded from a file, which keeps only its edges' counts; "
                "partial_fit needs every pair's counts: refit it, or use treewise.PairStats"
            )
        names = list(model.codebook.names)
        source = open_source(data)
        types = TypeRecorder(names)
        with PassProgress(False, None, 1) as bar:
            count_pairs(
                source,
                check_columns(source.names, names, source.description),
                model.codebook,
                self._stats,
                BATCH_ROWS,
                bar,
                types,
            )
        return self._adopt(
            self._stats, model.codebook, model.dtypes, self._root_index(names), model.alpha
        )

    @classmethod
    def from_stats(
        cls,
        stats: PairStats,
        *,
        root: str | None = None,
        alpha: float = 0.5,
        prune: str | float | None = None,
    ) -> DependencyTree:
        """Build a fitted model from pair statistics (for example merged from many workers)."""
        if stats.n_rows == 0:
            raise DataError("these PairStats have counted 0 rows; a model needs at least one")
        estimator = cls(columns=list(stats.columns), root=root, alpha=alpha, prune=prune)
        return estimator.fit_stats(stats)

    def fit_stats(self, stats: PairStats, *, copy: bool = True) -> DependencyTree:
        """Fit the tree to counted pair statistics, with this estimator's parameters.

        ``stats`` must count the estimator's ``columns`` (all of its columns when None), in
        order. The model keeps the statistics (a copy unless ``copy=False``), so ``partial_fit``
        and ``joint_counts`` work as after ``fit``. ``from_stats`` and the Dask fit end here.
        """
        if not isinstance(stats, PairStats):
            raise TypeError(f"fit_stats takes treewise.PairStats, got {stats!r}")
        if stats.n_rows == 0:
            raise DataError("these PairStats have counted 0 rows; a model needs at least one")
        names = check_columns(stats.columns, self.columns, "the PairStats")
        if names != stats.columns:
            raise SchemaError(
                f"the PairStats count the columns {stats.columns}, but columns={names}"
            )
        counts = stats._stats.copy() if copy else stats._stats
        root = self._root_index(names)
        budget = self._privacy_budget()
        if budget is not None:
            check_public(stats.codebook)
            plan = plan_budget(
                *budget, n_columns=len(names), learned_categories=0, learned_ranges=0
            )
            rng = integer_source(self._noise_seed())
            return self._adopt(
                stats._stats,
                stats.codebook,
                stats.dtypes,
                root,
                check_alpha(self.alpha),
                (plan, rng, {}),
            )
        return self._adopt(counts, stats.codebook, stats.dtypes, root, check_alpha(self.alpha))

    def _adopt(
        self,
        stats: _core.PairStats,
        codebook: _core.Codebook,
        dtypes: list[str],
        root: int | None,
        alpha: float,
        private: tuple[Plan, IntegerSource, dict[str, str]] | None = None,
    ) -> DependencyTree:
        """The end of every fit: build the tree from the counts and adopt it with its counts.

        A private fit adopts only the released model: the exact counts are dropped here.
        """
        kind, level = check_prune(self.prune)
        if private is not None:
            plan, rng, origin = private
            seeded = self.random_state is not None
            released = private_model(
                stats, codebook, dtypes, plan, rng, root, alpha, origin, seeded
            )
            self._set_model(released)
            return self
        self._set_model(_core.TreeModel.fit(codebook, stats, dtypes, root, alpha, kind, level))
        self._stats = stats
        return self

    def _privacy_budget(self) -> tuple[float, float, dict[str, float]] | None:
        """(epsilon, delta, split) of a private fit, checked; None for an ordinary fit."""
        split = check_privacy(self.epsilon, self.delta, self.privacy_split)
        if split is None:
            return None
        if self.prune is not None:
            raise ValueError("prune= is not available in a private fit (the tree is released)")
        assert self.epsilon is not None
        return float(self.epsilon), float(self.delta or 0.0), split

    def _noise_seed(self) -> int | None:
        seed = self.random_state
        if seed is None:
            return None
        if isinstance(seed, bool) or not isinstance(seed, int):
            raise TypeError(f"random_state of a private fit must be an int or None, got {seed!r}")
        return seed

    def _root_index(self, names: list[str]) -> int | None:
        """The root's index, or None to let the core pick the centre of the tree."""
        if self.root is None:
            return None
        if self.root in names:
            return names.index(self.root)
        raise SchemaError(
            f"root={self.root!r} is not one of the modelled columns {names} (a column left out "
            "of the model, such as an identifier, cannot be the root)"
        )

    def _set_model(self, model: _core.TreeModel) -> None:
        """Set every fitted attribute from a model (after fit, or after load)."""
        codebook = model.codebook
        d = len(codebook)
        self._model = model
        self._stats = None
        self.feature_names_in_ = np.array(codebook.names, dtype=object)
        self.n_features_in_ = d
        self.n_rows_ = model.n_rows
        self.categories_ = [column_categories(*codebook.column(i)) for i in range(d)]
        self.parent_ = np.array(model.parent, dtype=np.intp)
        pairwise = np.zeros((d, d))
        upper = np.triu_indices(d, k=1)
        pairwise[upper] = model.pair_mi
        self.pairwise_mutual_info_ = pairwise + pairwise.T
        self.mutual_info_ = np.array(
            [
                self.pairwise_mutual_info_[c, p] if p >= 0 else 0.0
                for c, p in enumerate(model.parent)
            ]
        )
        self.n_parameters_ = model.n_parameters
        self.kinds_ = {str(name): codebook.shape(i)[0] for i, name in enumerate(codebook.names)}
        self.codebook_ = codebook
        self.privacy_: dict[str, Any] | None = _statement(model.privacy)
        self._values: list[ColumnValues] | None = None

    # -- fitted views ----------------------------------------------------------------------------

    def _fitted(self) -> _core.TreeModel:
        model: _core.TreeModel | None = getattr(self, "_model", None)
        if model is None:
            raise NotFittedError("this DependencyTree is not fitted yet; call fit(data) first")
        if model.alpha != self.alpha:
            model.set_alpha(check_alpha(self.alpha))
        return model

    def _index(self, column: str | int) -> int:
        self._fitted()
        names = list(self.feature_names_in_)
        if isinstance(column, str):
            if column not in names:
                raise KeyError(f"{column!r} is not a modelled column; they are {names}")
            return names.index(column)
        if isinstance(column, numbers.Integral) and 0 <= int(column) < len(names):
            return int(column)
        raise KeyError(f"no column {column!r}: give a name or an index below {len(names)}")

    # -- the model as a distribution -------------------------------------------------------------

    def _scored(
        self,
        data: Any,
        surprisal: bool,
        keys: Sequence[str] = (),
        batch_rows: int = BATCH_ROWS,
        progress: bool | None = False,
    ) -> Iterator[Scored]:
        """Score ``data`` batch by batch (any source), then warn once about unseen values."""
        model = self._fitted()
        names = [str(n) for n in self.feature_names_in_]
        return score_batches(model, names, self.alpha, data, surprisal, keys, batch_rows, progress)

    def score_samples(self, data: Any) -> npt.NDArray[np.float64]:
        """The log-probability of each row under the model, in nats.

        Columns may come in any order and extra columns are ignored. A value never seen in
        fitting goes to the column's "other" code when it has one; otherwise it gets the
        smoothing mass alpha / (n_parent + alpha * r) (-inf when ``alpha=0``), and a child of
        such a value is scored by its own marginal. An ``UnseenCategoryWarning`` gives the
        count per column. A null is scored as the null category it was fitted as.
        """
        parts = [scored.total for scored in self._scored(data, surprisal=False)]
        return np.concatenate(parts) if parts else np.zeros(0)

    def score(self, data: Any, y: None = None) -> float:
        """The total log-likelihood of ``data`` in nats (the sum of ``score_samples``)."""
        return float(self.score_samples(data).sum())

    def surprisal(self, data: Any) -> pa.Table:
        """Which columns made each row unlikely.

        Returns
        -------
        pyarrow.Table
            One float64 column per modelled column holding -ln P(x_column | x_parent) in nats,
            and ``total`` (-ln p(row), the sum across the row).
        """
        self._fitted()
        names = [str(n) for n in self.feature_names_in_]
        totals: list[npt.NDArray[np.float64]] = []
        columns: list[list[npt.NDArray[np.float64]]] = [[] for _ in names]
        for scored in self._scored(data, surprisal=True):
            totals.append(-scored.total)
            for c, values in enumerate(scored.surprisal or []):
                columns[c].append(values)
        arrays = {
            n: pa.array(np.concatenate(v) if v else np.zeros(0))
            for n, v in zip(names, columns, strict=True)
        }
        arrays["total"] = pa.array(np.concatenate(totals) if totals else np.zeros(0))
        return pa.table(arrays)

    def score_to_parquet(
        self,
        data: Any,
        path: str | os.PathLike[str],
        *,
        keys: Sequence[str] = (),
        surprisal: bool = False,
        top: int = 0,
        batch_rows: int = BATCH_ROWS,
        progress: bool | None = None,
    ) -> pa.Table:
        """Score any source batch by batch into a Parquet file, in bounded memory.

        The file holds the ``keys`` columns carried along from the data, ``score`` (ln p(row)
        in nats) and, with ``surprisal``, one ``surprisal_<column>`` per modelled column. It is
        written to a temporary name and renamed, so ``path`` never holds a partial file.

        Returns
        -------
        pyarrow.Table
            The ``top`` most surprising rows (lowest score, ties by position): ``row``
            (position in the source), the keys, ``score``, and ``surprisal_<column>`` for each
            modelled column.
        """
        top = check_int("top", top, 0, 1_000_000)
        if isinstance(keys, str) or not all(isinstance(k, str) for k in keys):
            raise TypeError(f"keys= must be a list of column names, got {keys!r}")
        keys = list(keys)
        names = [str(n) for n in self.feature_names_in_]
        scored = self._scored(data, surprisal or top > 0, keys, batch_rows, progress)
        return write_scores(scored, path, names, keys, surprisal, top)

    def sample_to_parquet(
        self,
        n: int,
        path: str | os.PathLike[str],
        *,
        random_state: RandomState = None,
        batch_rows: int | None = None,
        progress: bool | None = None,
    ) -> int:
        """Write ``n`` sampled rows to a Parquet file in bounded memory; returns ``n``.

        The rows equal ``sample(n, random_state)`` for the same seed. The file is written to a
        temporary name and renamed into place.
        """
        schema = self._output_schema()
        rows = SAMPLE_BATCH_ROWS if batch_rows is None else batch_rows
        sampled = generated_source(self.iter_sample(n, random_state, rows), schema.names, n, "")
        with (
            PassProgress(wants_progress(progress), int(n), 1) as bar,
            atomic_parquet(path, schema) as writer,
        ):
            # No `with`: an error of the writer is not one of reading the sampled rows.
            for batch in BatchLoop(sampled, schema.names, rows, bar, "sampling"):
                writer.write_batch(batch)
        return int(n)

    def bic(self, data: Any) -> float:
        """Bayesian information criterion on ``data``: -2 ln L + k ln n (lower is better)."""
        log_likelihood, n = self._log_likelihood(data)
        return -2.0 * log_likelihood + self._fitted().n_parameters * math.log(n)

    def aic(self, data: Any) -> float:
        """Akaike information criterion on ``data``: -2 ln L + 2k (lower is better)."""
        log_likelihood, _ = self._log_likelihood(data)
        return -2.0 * log_likelihood + 2.0 * self._fitted().n_parameters

    def _log_likelihood(self, data: Any) -> tuple[float, int]:
        """Ln L of ``data`` and its number of rows, from one scoring pass."""
        scores = self.score_samples(data)
        if len(scores) == 0:
            raise DataError("the data has 0 rows; the criterion needs at least one")
        return float(scores.sum()), len(scores)

    def iter_sample(
        self, n: int, random_state: RandomState = None, batch_rows: int = SAMPLE_BATCH_ROWS
    ) -> Iterator[pa.RecordBatch]:
        """Draw ``n`` rows as record batches of at most ``batch_rows`` rows (bounded memory).

        The rows depend only on ``n`` and ``random_state``, not on ``batch_rows`` or the number
        of threads. See :meth:`sample` for how values come back.
        """
        model = self._fitted()
        n = check_int("n", n, 0, MAX_SAMPLE_ROWS)
        block = _core.SAMPLE_BLOCK
        batch_rows = check_int("batch_rows", batch_rows, 1, MAX_SAMPLE_ROWS)
        step = max(block, batch_rows // block * block)
        seed = seed_of(random_state)
        limit = check_memory_limit(getattr(self, "memory_limit", None))
        schema = self._output_schema()
        columns = self._column_values()
        for start in range(0, n, step):
            count = min(step, n - start)
            codes, floats, tails = model.sample(start, count, seed, limit)
            batch = self._decode_sampled(codes, floats, tails, count, columns, schema)
            for offset in range(0, count, batch_rows):
                yield batch.slice(offset, batch_rows)

    def _decode_sampled(
        self,
        codes: bytes,
        floats: list[bytes | None],
        tails: list[bytes | None],
        count: int,
        columns: list[ColumnValues] | None = None,
        schema: pa.Schema | None = None,
    ) -> pa.RecordBatch:
        """Sampled codes (with the numbers in bins and tail entries drawn) as real values."""
        columns = self._column_values() if columns is None else columns
        schema = self._output_schema() if schema is None else schema
        matrix = np.frombuffer(codes, "<u2").reshape(self.n_features_in_, count)
        values = [None if f is None else np.frombuffer(f, "<f8") for f in floats]
        picked = [None if t is None else np.frombuffer(t, "<u4").astype(np.int64) for t in tails]
        for p in picked:
            if p is not None:
                p[p == 0xFFFFFFFF] = -1
        arrays = [
            decode_column(matrix[c], columns[c], values[c], picked[c])
            for c in range(self.n_features_in_)
        ]
        return pa.RecordBatch.from_arrays(arrays, schema=schema)

    # -- questions to the tree (exact inference; see docs/inference.md) ---------------------------

    def predict_proba(self, data: Any, target: str | int) -> npt.NDArray[np.float64]:
        """The posterior of column ``target`` for each row, given the row's other values.

        Exact (sum-product message passing on the tree). A null, a value without a code and a
        column absent from ``data`` are unobserved. Columns of the result follow
        ``categories_[target]``.
        """
        return inference.predict_proba(self, data, target)

    def predict(self, data: Any, target: str | int, *, allow_null: bool = False) -> pa.Array[Any]:
        """The most probable value of column ``target`` for each row, given the rest.

        A value, never null, unless ``allow_null=True`` lets the null category win.
        """
        return inference.predict(self, data, target, allow_null)

    def marginals(
        self, evidence: Mapping[str, Any] | None = None
    ) -> dict[str, npt.NDArray[np.float64]]:
        """Every column's posterior distribution given ``evidence`` (a dict column -> value)."""
        return inference.marginals(self, evidence)

    def impute(
        self, data: Any, strategy: str = "joint", random_state: RandomState = None
    ) -> pa.Table:
        """Fill the nulls of ``data`` from the model.

        ``strategy="joint"`` takes the most probable completion of each row as a whole
        (max-product); ``"marginal"`` each missing cell's own most probable value; ``"sample"``
        a draw from the row's posterior.
        """
        return inference.impute(self, data, strategy, random_state)

    def sample(
        self,
        n: int | None = None,
        random_state: RandomState = None,
        *,
        given: Mapping[str, Any] | Any = None,
    ) -> pa.Table:
        """Draw ``n`` synthetic rows by ancestral sampling.

        The root is drawn first, then each child given its parent's drawn value.

        Parameters
        ----------
        n : int
            How many rows (0 or more). With ``given`` as a table, None means one per row.
        random_state : None, int, numpy.random.Generator or RandomState
            The same value gives the same rows, whatever the number of threads.
        given : dict or table, optional
            Conditional sampling: fixed evidence (a dict column -> value) for every row, or a
            table with one row of evidence per sampled row (nulls unobserved).

        Returns
        -------
        pyarrow.Table
            The fitted column names and types. A numeric column gets a number drawn from the
            values seen inside the sampled bin (integer and time columns stay whole); the
            "other" code gives one of the rare values it stands for, drawn by their counts.
            Only the null code comes back as null. Columns left out of the model (identifiers)
            are not sampled.
        """
        if given is not None:
            return inference.sample_given(self, n, given, random_state)
        if n is None:
            raise TypeError("sample() needs n, the number of rows (or given= evidence)")
        return pa.Table.from_batches(
            list(self.iter_sample(n, random_state)), schema=self._output_schema()
        )

    def _column_values(self) -> list[ColumnValues]:
        """What each column's codes stand for, to decode codes into values (built once)."""
        model = self._fitted()
        if getattr(self, "_values", None) is None:
            schema = self._output_schema()
            self._values = [
                ColumnValues.of(model.codebook, c, schema.field(c).type, model.dtypes[c])
                for c in range(self.n_features_in_)
            ]
        assert self._values is not None
        return self._values

    def _output_schema(self) -> pa.Schema:
        model = self._fitted()
        return pa.schema(
            [
                pa.field(str(name), type_from_name(t))
                for name, t in zip(self.feature_names_in_, model.dtypes, strict=True)
            ]
        )

    # -- views -------------------------------------------------------------------------------------

    def plot(self, **options: Any) -> Figure:
        """A matplotlib figure of the tree; see :func:`treewise.views.plot.plot_tree`."""
        from treewise.views.plot import plot_tree  # matplotlib loads only for a picture

        return plot_tree(self, **options)

    def _repr_html_(self) -> str:
        """The notebook view: a compact summary with the picture."""
        from treewise.views.notebook import model_html

        return model_html(self)

    # -- persistence -----------------------------------------------------------------------------

    def save(self, path: str | os.PathLike[str]) -> None:
        """Write the model to ``path`` in treewise's own file layout (docs/model-format.md).

        The file is written to a temporary name beside ``path`` and renamed into place, so an
        interrupted save never leaves a half-written file under the final name.
        """
        write_atomically(path, self._fitted().to_bytes())

    @classmethod
    def load(cls, path: str | os.PathLike[str]) -> DependencyTree:
        """Read a model written by :meth:`save`; see :func:`treewise.load`."""
        return cls._from_bytes(read_model_file(path))

    @classmethod
    def _from_bytes(cls, data: bytes) -> DependencyTree:
        """A model from a model file's bytes, checked in full (a mixture file embeds one)."""
        model = _core.TreeModel.from_bytes(data)
        names = model.codebook.names
        estimator = cls(columns=list(names), root=names[model.root], alpha=model.alpha)
        for t in model.dtypes:
            type_from_name(t)
        estimator._set_model(model)
        return estimator


def _statement(text: str | None) -> dict[str, Any] | None:
    """A private model's statement from its file: a JSON object, or the file is damaged."""
    if text is None:
        return None
    try:
        statement = json.loads(text)
    except ValueError:
        statement = None
    if not isinstance(statement, dict):
        raise CorruptModelError(
            "the model's privacy statement is not a JSON object; the file is damaged or was not "
            "written by treewise"
        )
    return statement


def _as_codebook(codebook: object) -> _core.Codebook | None:
    """A codebook given as such, or taken from a fitted model."""
    if codebook is None or isinstance(codebook, _core.Codebook):
        return codebook
    if isinstance(codebook, DependencyTree):
        return codebook._fitted().codebook
    raise TypeError(
        f"codebook= takes a treewise.Codebook or a fitted DependencyTree, got {codebook!r}"
    )
