"""TreeMixture's EM past memory: one pass over the data per iteration, locally or on Dask.

Each pass encodes every batch with the single tree's codebook, scores it under the current
components (the E-step, which also gives the mean log-likelihood of the current parameters) and
adds its weighted marginals and pair tables to running f64 sums; the next components are fitted
from the sums (the M-step). Only the sums, one batch and a bounded sample of rows (for the
initialisation) are held in memory.

Determinism: every cell of the running sums adds its rows in row order (the core's
``add_weighted_sums``), so a local fit gives the same bits for any batch size and any number of
threads, and the same sums as the in-memory EM from the same responsibilities. The mean
log-likelihood per row is a sum of per-batch sums (each correctly rounded by ``math.fsum``): it
can differ in the last bits between batch sizes. On Dask the partitions' sums are added on the
driver in a fixed tree, which rounds differently from one running sum: there the figures agree
with a local fit to about 1e-12 relative, not bit for bit.
"""

from __future__ import annotations

import dataclasses
import math
import os
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa
import pyarrow.dataset as pads

from treewise import _core
from treewise.checks import check_int, seed_of
from treewise.errors import DataError
from treewise.estimator import DependencyTree
from treewise.passes import Spool
from treewise.progress import PassProgress, wants_progress
from treewise.sources import (
    BATCH_ROWS,
    BatchLoop,
    Source,
    check_columns,
    open_source,
    row_keys,
)

if TYPE_CHECKING:
    from treewise.mixture import TreeMixture, _Run

__all__ = ["SAMPLE_ROWS", "EmParts", "fit_streaming", "local_pass", "stream_em", "wants_streaming"]

FloatArray = npt.NDArray[np.float64]
Codes = npt.NDArray[np.uint16]

#: The most rows of the uniform sample the in-memory EM starts from (k-means++ seeding, n_init
#: starts) before the passes over all the data: 50,000 rows of d columns hold 100 KB per column.
SAMPLE_ROWS = 50_000


@dataclass(frozen=True)
class EmParts:
    """What the streaming EM shares with the in-memory EM of ``mixture.py``.

    ``TreeMixture.fit`` hands it over: ``mixture.py`` imports this module, so this one cannot
    import it.
    """

    #: Per row, ln sum_k w_k P_k(row) and the responsibilities (``mixture._log_mix``).
    log_mix: Callable[[FloatArray, FloatArray], tuple[FloatArray, FloatArray]]
    #: A component with less weight than this many rows is reseeded.
    min_rows: float
    #: The most reseeds of a run.
    max_reseeds: int
    #: Pseudo-rows pulling each component's tables toward the pooled ones (``pooling``).
    pooling: float = 0.0


def _is_dask(data: Any) -> bool:
    return type(data).__module__.startswith("dask") and hasattr(data, "to_delayed")


def _is_one_shot(data: Any) -> bool:
    return isinstance(data, (pa.RecordBatchReader, Iterator))


def _on_disk(data: Any) -> bool:
    if isinstance(data, (str, os.PathLike, pads.Dataset, Source)):
        return True
    return (
        isinstance(data, (list, tuple))
        and bool(data)
        and all(isinstance(p, (str, os.PathLike)) for p in data)
    )


def wants_streaming(data: Any, streaming: object) -> bool:
    """Whether to fit ``data`` by streaming EM: as asked, or (None) when it is not in memory."""
    if streaming is not None and not isinstance(streaming, bool):
        raise TypeError(f"streaming must be True, False or None, got {streaming!r}")
    if _is_dask(data):
        if streaming is False:
            raise ValueError(
                "a Dask DataFrame is fitted by streaming passes over its partitions; pass "
                "streaming=True or None, or compute() it into memory first"
            )
        return True
    if streaming is None:
        return _on_disk(data) or _is_one_shot(data)
    if not streaming and _is_one_shot(data):
        raise DataError(
            "streaming=False keeps every row in memory and reads the data twice, but a one-shot "
            "stream of record batches can be read only once; pass streaming=True (or leave "
            "streaming=None) to spool it to a temporary file, or read it into a table first"
        )
    return streaming


# -- the E-step of one batch ---------------------------------------------------------------------


def _e_step(
    codes: _core.MixtureCodes,
    comps: list[_core.MixtureComponent],
    weights: FloatArray,
    hard: bool,
    em: EmParts,
) -> tuple[FloatArray, FloatArray]:
    """Each row's log-likelihood (the bound's terms) and responsibilities, as ``_em`` has them."""
    n, k = codes.n_rows, len(comps)
    ll = np.frombuffer(codes.log_likelihoods(comps), "<f8").reshape(n, k)
    row_ll, resp = em.log_mix(ll, weights)
    if hard:
        best = np.argmax(resp, axis=1)
        with np.errstate(divide="ignore"):
            row_ll = ll[np.arange(n), best] + np.log(weights)[best]
        resp = np.zeros_like(resp)
        resp[np.arange(n), best] = 1.0
    return row_ll, resp


def _columns(codes: _core.MixtureCodes, d: int) -> list[bytes]:
    return [codes.column(c) for c in range(d)]


def _add_batch(
    codes: _core.MixtureCodes,
    comps: list[_core.MixtureComponent],
    weights: FloatArray,
    hard: bool,
    em: EmParts,
    cards: list[int],
    sums: bytes | None,
) -> tuple[bytes, float]:
    """The running sums with one encoded batch added, and the batch's sum of the bound's terms."""
    row_ll, resp = _e_step(codes, comps, weights, hard, em)
    sums = _core.mixture_add_sums(
        _columns(codes, len(cards)), cards, np.ascontiguousarray(resp).tobytes(), len(comps), sums
    )
    return sums, math.fsum(row_ll.tolist())


# -- the sample ----------------------------------------------------------------------------------


class _Sample:
    """A uniform sample of at most ``size`` rows: the rows with the smallest keys (ties by index).

    The keys depend on the seed and the row's index in the whole data alone, so the sample is
    the same whatever the batches or partitions.
    """

    def __init__(self, d: int, size: int) -> None:
        self.size = size
        self.keys = np.zeros(0, np.uint64)
        self.index = np.zeros(0, np.int64)
        self.codes: Codes = np.zeros((0, d), np.uint16)

    def add(self, keys: npt.NDArray[np.uint64], index: npt.NDArray[np.int64], codes: Codes) -> None:
        self.keys = np.concatenate([self.keys, keys])
        self.index = np.concatenate([self.index, index])
        self.codes = np.concatenate([self.codes, codes])
        if len(self.keys) > self.size:
            keep = np.lexsort((self.index, self.keys))[: self.size]
            self.keys, self.index, self.codes = self.keys[keep], self.index[keep], self.codes[keep]

    def add_batch(self, codes: _core.MixtureCodes, seed: int, start: int) -> None:
        n, d = codes.n_rows, self.codes.shape[1]
        matrix = np.stack([np.frombuffer(codes.column(c), "<u2") for c in range(d)], axis=1)
        keys = row_keys(seed, start, n)
        index = np.arange(start, start + n, dtype=np.int64)
        if len(self.keys) >= self.size:
            # Only rows that beat the largest key kept can enter.
            enter = keys <= self.keys.max()
            keys, index, matrix = keys[enter], index[enter], matrix[enter]
        self.add(keys, index, matrix)

    def merge(self, other: _Sample) -> _Sample:
        self.add(other.keys, other.index, other.codes)
        return self

    def mixture_codes(self, cards: list[int]) -> _core.MixtureCodes:
        """The sampled rows in their order in the data, as codes for the in-memory EM."""
        order = np.argsort(self.index, kind="stable")
        matrix = self.codes[order]
        return _core.MixtureCodes(
            [np.ascontiguousarray(matrix[:, c]).astype("<u2").tobytes() for c in range(len(cards))],
            cards,
        )


# -- the EM loop, whatever reads the data --------------------------------------------------------

#: One pass over the data under (components, weights, pass number): the running sums, the sum
#: of the bound's terms and the rows.
PassFn = Callable[[list[_core.MixtureComponent], FloatArray, int], tuple[bytes, float, int]]


def _start(
    mixture: TreeMixture,
    sample: _core.MixtureCodes,
    k: int,
    alpha: float,
    max_iter: int,
    tol: float,
    n_init: int,
    rng: np.random.Generator,
) -> _Run:
    """The in-memory EM (k-means++ or random starts, ``n_init`` of them) on the sample."""
    best: _Run | None = None
    for _ in range(n_init):
        run = mixture._em(sample, k, alpha, max_iter, tol, rng)
        if best is None or run.bounds[-1] > best.bounds[-1]:
            best = run
    assert best is not None
    return best


def stream_em(
    one_pass: PassFn,
    sample: _core.MixtureCodes,
    first: _Run,
    *,
    cards: list[int],
    alpha: float,
    max_iter: int,
    tol: float,
    hard: bool,
    em: EmParts,
    bar: PassProgress,
) -> _Run:
    """Streaming EM from the components and weights of ``first``: one pass per iteration.

    Pass t scores the data under the parameters of iteration t (its mean log-likelihood is
    ``bounds[t]``) and sums the statistics the parameters of t+1 are fitted from. The loop
    stops as the in-memory EM does (the bound moves by less than ``tol``, or ``max_iter``
    passes) and returns the parameters last scored, with ``first``'s reseeds added. A component
    whose weight falls under ``em.min_rows`` rows is refitted to the sample rows the mixture
    explains worst.
    """
    comps, weights = first.components, first.weights
    k = len(comps)
    bounds: list[float] = []
    reseeds = reseeded = 0
    converged = False
    for it in range(max_iter):
        sums, total, n = one_pass(comps, weights, it)
        if n == 0:
            raise DataError("the data has 0 rows; a mixture needs at least one")
        bounds.append(total / n)
        bar.note(f"EM iteration {it + 1}: mean log-likelihood {bounds[-1]:.6f} nats per row")
        if len(bounds) > 1 and not reseeded and abs(bounds[-1] - bounds[-2]) < tol:
            converged = True
            break
        if it == max_iter - 1:
            break
        new, totals = _core.mixture_fit_sums(cards, sums, k, alpha, em.pooling)
        new_weights = np.array(totals) / n
        reseeded = 0
        small = [j for j in range(k) if totals[j] < em.min_rows]
        small = small[: max(em.max_reseeds - reseeds, 0)]
        if small:
            new, new_weights, reseeded = _reseed(sample, new, new_weights, small, alpha, hard, em)
        reseeds += reseeded
        comps, weights = new, new_weights
    return dataclasses.replace(
        first,
        components=comps,
        weights=weights,
        bounds=bounds,
        converged=converged,
        reseeds=first.reseeds + reseeds,
    )


def _reseed(
    sample: _core.MixtureCodes,
    comps: list[_core.MixtureComponent],
    weights: FloatArray,
    small: list[int],
    alpha: float,
    hard: bool,
    em: EmParts,
) -> tuple[list[_core.MixtureComponent], FloatArray, int]:
    """Refit each degenerate component to its share of the sample rows explained worst."""
    m, k = sample.n_rows, len(comps)
    take = max(math.ceil(em.min_rows), m // (2 * k))
    if take * len(small) >= m:
        return comps, weights, 0  # too few sampled rows to give each its own
    row_ll, resp = _e_step(sample, comps, weights, hard, em)
    worst = np.argsort(row_ll, kind="stable")
    comps, weights = list(comps), weights.copy()
    # As the in-memory EM reseeds: the rows taken go wholly to their component, the others keep
    # their responsibilities, so the pooled tables the refit leans on are the sample's own.
    resp = resp.copy()
    for i, j in enumerate(small):
        rows = worst[i * take : (i + 1) * take]
        resp[rows] = 0.0
        resp[rows, j] = 1.0
    refitted = sample.fit_components(resp.tobytes(), k, alpha, em.pooling)
    for j in small:
        comps[j] = refitted[j]
        weights[j] = take / m
    return comps, weights / weights.sum(), len(small)


# -- local data ----------------------------------------------------------------------------------


def _tee_to_spool(source: Source, names: list[str], spool: Spool) -> Iterator[pa.RecordBatch]:
    """The batches of a one-shot ``source``, each copied to ``spool`` as it goes by."""
    with BatchLoop(source, names) as batches:
        for batch in batches:
            spool.write(batch)
            yield batch


def local_pass(
    source: Source,
    names: list[str],
    model: _core.TreeModel,
    hard: bool,
    em: EmParts,
    batch_rows: int,
    bar: PassProgress,
) -> PassFn:
    """One pass over a local ``source`` (replayable) per call, batch by batch."""
    cards = [int(c) for c in model.codebook.cardinalities]

    def one_pass(
        comps: list[_core.MixtureComponent], weights: FloatArray, it: int
    ) -> tuple[bytes, float, int]:
        sums: bytes | None = None
        partial: list[float] = []
        n = 0
        with BatchLoop(source, names, batch_rows, bar, f"EM pass {it + 1}") as loop:
            for batch in loop:
                codes, _, _ = _core.MixtureCodes.encode(model, batch)
                sums, part = _add_batch(codes, comps, weights, hard, em, cards, sums)
                partial.append(part)
                n += codes.n_rows
        if sums is None:
            raise DataError(f"{source.description} has 0 rows")
        return sums, math.fsum(partial), n

    return one_pass


def fit_streaming(
    mixture: TreeMixture,
    data: Any,
    *,
    k: int,
    alpha: float,
    max_iter: int,
    tol: float,
    n_init: int,
    progress: bool | None,
    batch_rows: int | None,
    em: EmParts,
) -> None:
    """Fit ``mixture`` to ``data`` by streaming EM and set its fitted attributes."""
    rows = check_int("batch_rows", BATCH_ROWS if batch_rows is None else batch_rows, 1, 2**31)
    show = wants_progress(progress)
    tree_params: dict[str, Any] = {
        "columns": mixture.columns,
        "max_categories": mixture.max_categories,
        "n_bins": mixture.n_bins,
        "kinds": mixture.kinds,
        "alpha": alpha,
        "memory_limit": mixture.memory_limit,
    }
    # The starts draw from the generator an in-memory fit would use (so data that fits in the
    # sample starts as an in-memory fit does); the sample's keys from a second one.
    root_seed = seed_of(mixture.random_state)
    rng = np.random.default_rng(root_seed)
    seed = int(np.random.default_rng([root_seed, 1]).integers(2**63))
    if _is_dask(data):
        _fit_dask(mixture, data, tree_params, rng, seed, k, alpha, max_iter, tol, n_init, show, em)
        return
    spool: Spool | None = None
    try:
        source = open_source(data)
        if source.replayable:
            tree = DependencyTree(**tree_params).fit(source, progress=show, batch_rows=rows)
        else:
            # A one-shot stream: the tree reads it once while it is copied to temporary Arrow
            # files, which the sample and every EM pass then read.
            spool = Spool()
            names = check_columns(source.names, mixture.columns, source.description)
            tree = DependencyTree(**tree_params).fit(
                _tee_to_spool(source, names, spool), progress=show, batch_rows=rows
            )
            spool.close()
            source = open_source(spool.paths)
        mixture._adopt_tree(tree)
        model = tree._fitted()
        names = [str(n) for n in tree.feature_names_in_]
        cards = [int(c) for c in tree.codebook_.cardinalities]
        with PassProgress(show, source.total_rows, source.n_parts) as bar:
            sample = _Sample(len(cards), SAMPLE_ROWS)
            with BatchLoop(source, names, rows, bar, "sampling rows for the start") as loop:
                start = 0
                for batch in loop:
                    codes, _, _ = _core.MixtureCodes.encode(model, batch)
                    sample.add_batch(codes, seed, start)
                    start += codes.n_rows
            if start == 0:
                raise DataError(f"{source.description} has 0 rows; a mixture needs at least one")
            sample_codes = sample.mixture_codes(cards)
            first = _start(mixture, sample_codes, k, alpha, max_iter, tol, n_init, rng)
            hard = mixture.algorithm == "hard"

            run = stream_em(
                local_pass(source, names, model, hard, em, rows, bar),
                sample_codes,
                first,
                cards=cards,
                alpha=alpha,
                max_iter=max_iter,
                tol=tol,
                hard=hard,
                em=em,
                bar=bar,
            )
    finally:
        if spool is not None:
            spool.remove()
    mixture._set_run(run, alpha)
    mixture.n_rows_ = start


# -- Dask ----------------------------------------------------------------------------------------


def _tree_reduce(items: list[Any], merge: Callable[[Any, Any], Any], split_every: int) -> Any:
    """Delayed ``items`` added up in a fixed tree of ``merge`` tasks (the same every time)."""
    from dask.delayed import delayed

    level = list(items)
    while len(level) > 1:
        level = [
            _fold(level[start : start + split_every], merge, delayed)
            for start in range(0, len(level), split_every)
        ]
    return level[0]


def _fold(group: list[Any], merge: Callable[[Any, Any], Any], delayed: Any) -> Any:
    acc = group[0]
    for other in group[1:]:
        acc = delayed(merge, pure=True)(acc, other)
    return acc


def _part_rows(part: Any, names: list[str]) -> int:
    """Worker task: the rows of one partition."""
    with BatchLoop(open_source(part), names) as loop:
        return sum(batch.num_rows for batch in loop)


def _part_sample(
    part: Any, names: list[str], model: bytes, seed: int, start: int, size: int, d: int
) -> _Sample:
    """Worker task: one partition's candidates for the sample (keys by global row index)."""
    tree = _core.TreeModel.from_bytes(model)
    sample = _Sample(d, size)
    with BatchLoop(open_source(part), names) as loop:
        for batch in loop:
            codes, _, _ = _core.MixtureCodes.encode(tree, batch)
            sample.add_batch(codes, seed, start)
            start += codes.n_rows
    return sample


#: A component as plain parts that pickle: root, parents, counts per column, pair MI.
Shipped = tuple[int, list[int], list[bytes], list[float]]


def _ship(comps: Sequence[_core.MixtureComponent], d: int) -> list[Shipped]:
    return [(c.root, list(c.parent), [c.counts(i) for i in range(d)], c.pair_mi) for c in comps]


def _unship(parts: list[Shipped], cards: list[int], alpha: float) -> list[_core.MixtureComponent]:
    return [
        _core.MixtureComponent.from_counts(cards, root, parent, counts, pair_mi, alpha)
        for root, parent, counts, pair_mi in parts
    ]


#: A partition's share of one pass: its sums (f64), its per-batch sums of the bound's terms and
#: its rows.
Partial = tuple[FloatArray, list[float], int]


def _part_pass(
    part: Any,
    names: list[str],
    model: bytes,
    shipped: list[Shipped],
    weights: list[float],
    cards: list[int],
    alpha: float,
    hard: bool,
    em: EmParts,
) -> Partial:
    """Worker task: one partition's weighted sums under the broadcast components."""
    tree = _core.TreeModel.from_bytes(model)
    comps = _unship(shipped, cards, alpha)
    w = np.array(weights)
    sums: bytes | None = None
    partial: list[float] = []
    n = 0
    with BatchLoop(open_source(part), names) as loop:
        for batch in loop:
            codes, _, _ = _core.MixtureCodes.encode(tree, batch)
            sums, ll = _add_batch(codes, comps, w, hard, em, cards, sums)
            partial.append(ll)
            n += codes.n_rows
    if sums is None:
        return np.zeros(_core.mixture_sums_len(cards, len(comps))), partial, 0
    return np.frombuffer(sums, "<f8").copy(), partial, n


def _add_partials(a: Partial, b: Partial) -> Partial:
    return a[0] + b[0], a[1] + b[1], a[2] + b[2]


def _fit_dask(
    mixture: TreeMixture,
    data: Any,
    tree_params: dict[str, Any],
    rng: np.random.Generator,
    seed: int,
    k: int,
    alpha: float,
    max_iter: int,
    tol: float,
    n_init: int,
    show: bool,
    em: EmParts,
) -> None:
    import dask.base
    from dask.delayed import delayed

    from treewise.distributed import fit_dask

    compute: Callable[..., Any] = dask.base.compute  # dask ships without type hints

    tree = fit_dask(data, **tree_params)
    mixture._adopt_tree(tree)
    encoded = tree._fitted().to_bytes()
    names = [str(n) for n in tree.feature_names_in_]
    cards = [int(c) for c in tree.codebook_.cardinalities]
    d = len(cards)
    parts = list(data.to_delayed())
    lengths = compute(*[delayed(_part_rows, pure=True)(p, names) for p in parts])
    n_rows = int(sum(lengths))
    if n_rows == 0:
        raise DataError("the Dask data has 0 rows; a mixture needs at least one")
    offsets = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(int).tolist()
    samples = [
        delayed(_part_sample, pure=True)(p, names, encoded, seed, o, SAMPLE_ROWS, d)
        for p, o in zip(parts, offsets, strict=True)
    ]
    (sample,) = compute(_tree_reduce(samples, _Sample.merge, 8))
    sample_codes = sample.mixture_codes(cards)
    first = _start(mixture, sample_codes, k, alpha, max_iter, tol, n_init, rng)
    hard = mixture.algorithm == "hard"

    def one_pass(
        comps: list[_core.MixtureComponent], weights: FloatArray, it: int
    ) -> tuple[bytes, float, int]:
        shipped = _ship(comps, d)
        w = [float(x) for x in weights]
        partials = [
            delayed(_part_pass, pure=True)(p, names, encoded, shipped, w, cards, alpha, hard, em)
            for p in parts
        ]
        (total,) = compute(_tree_reduce(partials, _add_partials, 8))
        sums, lls, n = total
        return np.ascontiguousarray(sums, "<f8").tobytes(), math.fsum(lls), n

    with PassProgress(show, n_rows, len(parts)) as bar:
        run = stream_em(
            one_pass,
            sample_codes,
            first,
            cards=cards,
            alpha=alpha,
            max_iter=max_iter,
            tol=tol,
            hard=hard,
            em=em,
            bar=bar,
        )
    mixture._set_run(run, alpha)
    mixture.n_rows_ = n_rows
