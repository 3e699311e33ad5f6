"""Edge stability: how often each edge of the tree comes back when the rows are resampled.

It answers a question about the fitted structure by refitting the tree (see docs/inference.md),
so it builds estimators; the inference on a fitted tree is in ``treewise.inference``.
"""

from __future__ import annotations

import numbers
from collections.abc import Mapping
from typing import Any

import numpy as np
import pyarrow as pa

from treewise.checks import RandomState, check_int, seed_of
from treewise.estimator import DependencyTree
from treewise.sources import read_table

__all__ = ["METHODS", "edge_stability"]

#: The resampling methods of edge_stability.
METHODS = ("bootstrap", "subsample")


def edge_stability(
    model: DependencyTree | Mapping[str, Any],
    data: Any,
    *,
    n_resamples: int = 100,
    method: str = "bootstrap",
    min_frequency: float = 0.1,
    random_state: RandomState = None,
) -> pa.Table:
    """How often each edge of the tree comes back when the rows are resampled and refitted.

    Parameters
    ----------
    model : DependencyTree or dict
        A DependencyTree (its parameters are used; it need not be fitted) or a dict of
        DependencyTree parameters.
    data : table, path or stream
        The data, read into memory (resampling needs every row).
    n_resamples : int, default 100
        Refits.
    method : {"bootstrap", "subsample"}, default "bootstrap"
        ``"bootstrap"``: n rows drawn with replacement, so each refit sees as many rows as the
        full fit. ``"subsample"``: half the rows, drawn without replacement. See
        docs/inference.md for the choice.
    min_frequency : float, default 0.1
        Besides the full-data tree's edges, report every edge found in at least this share of
        the refits.
    random_state : None, int, numpy.random.Generator or RandomState
        The resampling seed.

    Returns
    -------
    pyarrow.Table
        One row per edge, most stable first: ``column_a`` and ``column_b`` (in column order),
        ``frequency`` (share of refits whose tree has the edge), ``in_full_tree`` and
        ``mutual_info`` (on the full data, nats). Every refit uses the full fit's codebook, so
        codes mean the same thing in all of them.
    """
    if isinstance(model, DependencyTree):
        params, make = model.get_params(), type(model)
    elif isinstance(model, Mapping):
        params, make = dict(model), DependencyTree
    else:
        raise TypeError(
            f"model must be a DependencyTree or a dict of its parameters, got {model!r}"
        )
    if params.get("epsilon") is not None:
        raise ValueError(
            "edge_stability refits the data many times, and each private refit would spend the "
            "budget again; it is not available with epsilon= (docs/privacy.md)"
        )
    n_resamples = check_int("n_resamples", n_resamples, 1, 1_000_000)
    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, got {method!r}")
    if not (isinstance(min_frequency, numbers.Real) and 0.0 <= float(min_frequency) <= 1.0):
        raise ValueError(f"min_frequency must be between 0 and 1, got {min_frequency!r}")
    table = read_table(data)
    full = make(**params).fit(table)
    n = table.num_rows
    names = [str(n) for n in full.feature_names_in_]
    d = len(names)
    rng = np.random.default_rng(seed_of(random_state))
    size = n if method == "bootstrap" else max(1, n // 2)
    found = np.zeros((d, d), dtype=np.int64)
    for _ in range(n_resamples):
        rows = rng.integers(0, n, size) if method == "bootstrap" else rng.choice(n, size, False)
        refit = make(**params).fit(table.take(pa.array(rows)), codebook=full.codebook_)
        for child, parent in enumerate(refit.parent_):
            if parent >= 0:
                found[min(child, parent), max(child, parent)] += 1
    frequency = found / n_resamples
    tree = {(min(c, int(p)), max(c, int(p))) for c, p in enumerate(full.parent_) if p >= 0}
    often = {(int(i), int(j)) for i, j in zip(*np.nonzero(frequency >= min_frequency), strict=True)}
    edges = sorted(tree | {e for e in often if e[0] < e[1]}, key=lambda e: (-frequency[e], e))
    return pa.table(
        {
            "column_a": pa.array([names[i] for i, _ in edges], pa.string()),
            "column_b": pa.array([names[j] for _, j in edges], pa.string()),
            "frequency": pa.array([float(frequency[e]) for e in edges], pa.float64()),
            "in_full_tree": pa.array([e in tree for e in edges], pa.bool_()),
            "mutual_info": pa.array(
                [float(full.pairwise_mutual_info_[e]) for e in edges], pa.float64()
            ),
        }
    )
