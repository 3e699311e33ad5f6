"""Fitting on a Dask cluster, bit-identical to a local fit.

Each partition's codebook tally and pair counts are computed on the workers and tree-reduced by
addition; the driver only fixes the codes and builds the tree. A private fit (``epsilon=``)
counts with a codebook of public domains and adds its noise once, on the driver.

Both reductions are exact (tallies and counts are integers; float tallies coarsen in an
order-free way), so the result is bit-identical to a local fit of the same rows.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from typing import Any

import pyarrow as pa

from treewise import _core
from treewise.checks import (
    MAX_CATEGORIES,
    check_alpha,
    check_int,
    check_kinds,
    check_prune,
    check_root,
)
from treewise.domains import public_codebook
from treewise.errors import DataError
from treewise.estimator import DependencyTree
from treewise.pairstats import PairStats
from treewise.passes import warn_caps, warn_notes
from treewise.sources import BatchLoop, check_columns, expand_paths, open_source

__all__ = ["fit_dask"]


def _batches(part: Any, names: list[str]) -> BatchLoop:
    source = open_source(part)
    check_columns(source.names, names, source.description)
    return BatchLoop(source, names)


def _tally(part: Any, names: list[str]) -> bytes:
    """Worker task: the codebook tally of one partition or file."""
    builder = _core.CodebookBuilder(names)
    with _batches(part, names) as batches:
        for batch in batches:
            builder.observe(batch)
    return builder.to_bytes()


def _schema(part: Any, names: list[str]) -> pa.Schema:
    """Worker task: the Arrow schema of one partition's columns (from its first batch)."""
    with _batches(part, names) as batches:
        for batch in batches:
            return batch.schema
    raise DataError("the first Dask partition has no rows; a private fit needs its schema")


def _merge_tallies(a: bytes, b: bytes) -> bytes:
    left = _core.CodebookBuilder.from_bytes(a)
    left.merge(_core.CodebookBuilder.from_bytes(b))
    return left.to_bytes()


def _count(part: Any, names: list[str], codebook: bytes) -> bytes:
    """Worker task: the pair statistics of one partition or file."""
    stats = PairStats(_core.Codebook.from_bytes(codebook))
    with _batches(part, names) as batches:
        for batch in batches:
            stats.update(batch)
    return stats.to_bytes()


def _merge_stats(a: bytes, b: bytes) -> bytes:
    left, right = PairStats.from_bytes(a), PairStats.from_bytes(b)
    # Keep the column types of the side that has seen data.
    total = (left if left.n_rows else right) + (right if left.n_rows else left)
    return total.to_bytes()


def _tree_reduce(items: list[Any], merge: Callable[[bytes, bytes], bytes], split_every: int) -> Any:
    from dask.delayed import delayed

    level = list(items)
    while len(level) > 1:
        merged = []
        for start in range(0, len(level), split_every):
            group = level[start : start + split_every]
            acc = group[0]
            for other in group[1:]:
                acc = delayed(merge, pure=True)(acc, other)
            merged.append(acc)
        level = merged
    return level[0]


def _parts(data: Any) -> tuple[list[Any], list[str]]:
    """Delayed partitions (a Dask DataFrame) or file paths, and the available column names."""
    if isinstance(data, (str, os.PathLike)) or (
        isinstance(data, (list, tuple)) and all(isinstance(p, (str, os.PathLike)) for p in data)
    ):
        files = expand_paths(data)
        return [str(f) for f in files], open_source(files).names
    to_delayed = getattr(data, "to_delayed", None)
    if to_delayed is None:
        raise TypeError(
            f"fit_dask takes a Dask DataFrame or Parquet paths, got a {type(data).__name__}; "
            "for in-memory data use DependencyTree.fit"
        )
    return list(to_delayed()), [str(c) for c in data.columns]


def fit_dask(data: Any, *, split_every: int = 8, **params: Any) -> DependencyTree:
    """Fit a dependency tree on Dask: the same model as ``DependencyTree.fit`` on the same rows.

    Parameters
    ----------
    data : dask.dataframe.DataFrame, path or list of paths
        A Dask DataFrame (one task per partition), or Parquet/CSV/Arrow files, a directory or a
        glob (one task per file; workers read the files themselves, so the paths must be
        reachable from every worker).
    split_every : int
        How many partial results each reduction task adds up.
    **params
        The parameters of :class:`DependencyTree` (columns, max_categories, n_bins, root,
        alpha, prune; epsilon, delta, domains, privacy_split, random_state for a private fit,
        where every column but bool ones needs a public domain).

    Returns
    -------
    DependencyTree
        A fitted model, with ``joint_counts`` for every pair like a local fit.

    Notes
    -----
    The work runs on the current Dask client when there is one (``distributed.Client``), else
    on Dask's local scheduler. A task lost with its worker is run again by the scheduler.
    """
    from dask.base import compute
    from dask.delayed import delayed

    estimator = DependencyTree(**params)
    max_categories = check_int("max_categories", estimator.max_categories, 2, MAX_CATEGORIES)
    n_bins = check_int("n_bins", estimator.n_bins, 1, MAX_CATEGORIES - 1)
    check_alpha(estimator.alpha)
    check_prune(estimator.prune)
    split_every = check_int("split_every", split_every, 2, 1024)
    parts, available = _parts(data)
    if not parts:
        raise DataError("the Dask data has no partitions")
    names = check_columns(available, estimator.columns, "the Dask data")
    kinds = check_kinds(estimator.kinds, names)
    if estimator.root is not None:
        check_root(estimator.root, names)  # before any task runs

    if estimator.epsilon is not None:
        # A private fit counts with a codebook of public domains; the noise is added once, on
        # the driver, to the merged exact counts (in fit_stats), whatever the partitioning.
        (schema,) = compute(delayed(_schema)(parts[0], names))
        codebook = public_codebook(estimator.domains or {}, schema, n_bins=n_bins)
    else:
        tallies = [delayed(_tally, pure=True)(p, names) for p in parts]
        (tally,) = compute(_tree_reduce(tallies, _merge_tallies, split_every))
        codebook, caps, notes = _core.CodebookBuilder.from_bytes(tally).finish(
            max_categories, n_bins, list(kinds.items())
        )
        warn_caps(caps, max_categories)
        warn_notes(notes)
    # Columns left out of the model (identifiers, all null) are not counted.
    names = list(codebook.names)
    encoded = codebook.to_bytes()
    counts = [delayed(_count, pure=True)(p, names, encoded) for p in parts]
    (merged,) = compute(_tree_reduce(counts, _merge_stats, split_every))
    return estimator.fit_stats(PairStats.from_bytes(merged), copy=False)
