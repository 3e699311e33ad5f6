"""Questions to a fitted TreeMixture: exact posteriors, imputation and conditional sampling.

Every answer is a sum over components. Each component is a tree on the mixture's shared
codebook, prepared for exact message passing in the Rust core like a ``DependencyTree``
(``_core.TreeInference.from_component``). For a row with evidence e, component k carries the
posterior weight P(k | e) = w_k P_k(e) / sum_j w_j P_j(e), and

    P(x_t | e) = sum_k P(k | e) P_k(x_t | e)

is exact (Meila & Jordan, JMLR 2000, section 2: inference in a mixture is inference in each
tree, mixed by the posterior over components). Evidence follows ``treewise.inference``: a null,
a value without a code and an absent column are unobserved. See docs/inference.md.
"""

from __future__ import annotations

import weakref
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa

from treewise import _core
from treewise.checks import RandomState
from treewise.errors import DataError
from treewise.inference import (
    KEPT,
    EvidenceTally,
    as_evidence,
    decode_prediction,
    evidence_batches,
    filled_cells,
    impossible_message,
    impute_with,
    one_row,
    replace_filled,
    sample_given_with,
)
from treewise.sources import open_source

if TYPE_CHECKING:
    from treewise.mixture import TreeMixture

__all__ = [
    "impute",
    "log_mix",
    "marginals",
    "posterior_weights",
    "predict",
    "predict_proba",
    "sample_given",
]

FloatArray = npt.NDArray[np.float64]

_ENGINES: weakref.WeakKeyDictionary[Any, tuple[Any, list[_core.TreeInference]]] = (
    weakref.WeakKeyDictionary()
)


def engines(mixture: TreeMixture) -> list[_core.TreeInference]:
    """Each component prepared for inference, kept while the mixture's fitted components stay."""
    comps = mixture._fitted()
    hit = _ENGINES.get(mixture)
    if hit is not None and hit[0] is comps:
        return hit[1]
    model = mixture.single_tree_._fitted()
    prepared = [_core.TreeInference.from_component(model, c) for c in comps]
    _ENGINES[mixture] = (comps, prepared)
    return prepared


def _names(mixture: TreeMixture) -> list[str]:
    mixture._fitted()
    return [str(n) for n in mixture.feature_names_in_]


def log_mix(ll: FloatArray, weights: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Per row, ln sum_k w_k P_k(row) (log-sum-exp) and the responsibilities P(k | row).

    ``ll`` is ln P_k(row), rows x K. A row no component can produce (possible with alpha=0 on
    new data) has total -inf and gets the weights as its responsibilities.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        joint = ll + np.log(weights)[None, :]
        top = joint.max(axis=1)
        finite = np.isfinite(top)
        shifted = np.exp(joint - np.where(finite, top, 0.0)[:, None])
        total = np.where(finite, top + np.log(shifted.sum(axis=1)), top)
        resp = shifted / shifted.sum(axis=1, keepdims=True)
    resp[~finite] = weights
    return total, resp


def _weights_of(mixture: TreeMixture, log_evidence: list[bytes]) -> FloatArray:
    """P(k | evidence) from each component's ln P_k(evidence); NaN rows where none can."""
    ll = np.stack([np.frombuffer(part, "<f8") for part in log_evidence], axis=1)
    total, weights = log_mix(ll, mixture.weights_)
    weights[~np.isfinite(total)] = np.nan
    return weights


def posterior_weights(
    mixture: TreeMixture, evidence: Any, fill: list[int] | None = None
) -> tuple[FloatArray, list[int]]:
    """P(component | evidence) per row of an evidence batch, and the unseen values per column.

    The weights have shape (rows, K). Rows whose evidence no component can produce are NaN.

    With ``fill``, a null in those columns is known to hold one of the column's values, as
    imputation conditions.
    """
    parts = [engine.log_evidence(evidence, fill) for engine in engines(mixture)]
    return _weights_of(mixture, [p[0] for p in parts]), list(parts[0][1])


def _mixed_posterior(
    mixture: TreeMixture, evidence: Any, targets: list[int], fill: list[int] | None = None
) -> tuple[list[FloatArray], list[int], int]:
    """Per target, P(target | evidence) per row (rows x categories), mixed over components.

    Also returns the unseen values per column and the rows no component can produce (NaN rows).
    """
    # One message pass per component gives both its posterior and its evidence likelihood.
    parts = [engine.posterior_and_evidence(evidence, targets, fill) for engine in engines(mixture)]
    weights = _weights_of(mixture, [p[1] for p in parts])
    unseen = list(parts[0][2])
    n = len(weights)
    categories = mixture.single_tree_.categories_
    mixed = [np.zeros((n, len(categories[t]))) for t in targets]
    for k, (tables, _, _, _) in enumerate(parts):
        w = weights[:, k, None]
        for out, table in zip(mixed, tables, strict=True):
            # A component that cannot produce the row has weight 0 and NaN tables.
            out += np.where(w > 0, w * np.nan_to_num(np.frombuffer(table, "<f8").reshape(n, -1)), 0)
    impossible = np.isnan(weights[:, 0])
    for out in mixed:
        out[impossible] = np.nan
    return mixed, unseen, int(impossible.sum())


def predict_proba(mixture: TreeMixture, data: Any, target: str | int) -> FloatArray:
    """The posterior of column ``target`` in each row of ``data``, given the row's other columns.

    As ``treewise.inference.predict_proba`` for a tree, mixed over the components by each
    row's posterior weights P(k | the row's other columns). Columns follow
    ``categories_[target]``; rows no component can produce (alpha=0 only) are NaN.
    """
    names = _names(mixture)
    t = mixture.single_tree_._index(target)
    tally = EvidenceTally(names)
    parts: list[FloatArray] = []
    with evidence_batches(open_source(data), names) as batches:
        for batch in batches:
            (table,), unseen, impossible = _mixed_posterior(
                mixture, as_evidence(batch, names, {names[t]}), [t]
            )
            tally.add(unseen, impossible)
            parts.append(table)
    tally.warn("their probabilities are NaN")
    width = len(mixture.single_tree_.categories_[t])
    return np.concatenate(parts) if parts else np.zeros((0, width))


def predict(
    mixture: TreeMixture, data: Any, target: str | int, allow_null: bool = False
) -> pa.Array[Any]:
    """The most probable value of ``target`` per row under the mixture.

    See ``DependencyTree.predict`` for how values come back.
    """
    _names(mixture)
    tree = mixture.single_tree_
    t = tree._index(target)
    proba = predict_proba(mixture, data, target)
    return decode_prediction(tree, engines(mixture)[0], t, proba, allow_null)


def marginals(
    mixture: TreeMixture, evidence: Mapping[str, Any] | None = None
) -> dict[str, FloatArray]:
    """Every column's posterior given one set of evidence (a dict column -> value).

    Impossible evidence raises ``DataError``.
    """
    names = _names(mixture)
    batch = one_row(mixture.single_tree_, evidence or {})
    tables, unseen, impossible = _mixed_posterior(mixture, batch, list(range(len(names))))
    tally = EvidenceTally(names)
    tally.add(unseen)
    tally.warn("")
    if impossible:
        raise DataError(impossible_message(evidence or {}))
    return {name: table[0].copy() for name, table in zip(names, tables, strict=True)}


def _pick(
    draws: list[Any], which: npt.NDArray[np.intp], impossible: npt.NDArray[np.bool_]
) -> tuple[bytes, list[Any]]:
    """Row i of the result is row i of ``draws[which[i]]`` (each a core ``Filled`` tuple).

    Impossible rows are left as they were (KEPT codes).
    """
    d, n = len(draws[0][1]), len(which)
    codes = np.stack([np.frombuffer(f[0], "<u2").reshape(d, n) for f in draws])
    picked = np.take_along_axis(codes, which[None, None, :], axis=0)[0]
    picked[:, impossible] = KEPT
    floats: list[Any] = []
    for c in range(d):
        columns = [f[1][c] for f in draws]
        if all(col is None for col in columns):
            floats.append(None)
            continue
        stack = np.stack(
            [np.full(n, np.nan) if col is None else np.frombuffer(col, "<f8") for col in columns]
        )
        floats.append(np.take_along_axis(stack, which[None, :], axis=0)[0].tobytes())
    return np.ascontiguousarray(picked).tobytes(), floats


def _draw_components(weights: FloatArray, rng: np.random.Generator) -> npt.NDArray[np.intp]:
    """One component per row from its posterior weights (NaN rows get component 0)."""
    cumulative = np.cumsum(np.nan_to_num(weights), axis=1)
    u = rng.random(len(weights)) * cumulative[:, -1]
    which = (cumulative <= u[:, None]).sum(axis=1)
    return np.asarray(np.minimum(which, weights.shape[1] - 1), dtype=np.intp)


def _component_seed(seed: int, k: int) -> int:
    """Component k's stream: the seed mixed with k (each component draws independently)."""
    return int(np.random.SeedSequence([seed, 0x6D6978, k]).generate_state(1, np.uint64)[0])


def impute(
    mixture: TreeMixture, data: Any, strategy: str = "joint", random_state: RandomState = None
) -> pa.Table:
    """Fill the nulls of the model's columns in ``data`` from the mixture.

    ``"marginal"``: each null cell's most probable value under the mixture's exact posterior
    (mixed over components). ``"sample"``: a component drawn from the row's posterior weights,
    then a draw from that component's posterior: an exact draw from the mixture's posterior.
    ``"joint"``: each component's most probable completion (max-product), and of those the one
    the mixture gives the highest probability. The mixture's own most probable completion is a
    maximum of a sum, with no exact message-passing solution; this is the standard
    best-of-components answer and it is exact when one component dominates. Otherwise as
    ``DependencyTree.impute``.
    """
    _names(mixture)
    prepared = engines(mixture)

    def fill_batch(
        evidence: pa.RecordBatch, fill: list[int], how: str, seed: int, first: int
    ) -> tuple[bytes, list[Any], list[int], int]:
        weights, unseen = posterior_weights(mixture, evidence, fill)
        impossible = np.isnan(weights[:, 0])
        if how == "marginal":
            codes, floats = _marginal_fill(mixture, evidence, fill, weights)
        else:
            draws = [
                engine.impute(evidence, fill, how, _component_seed(seed, k), first)
                for k, engine in enumerate(prepared)
            ]
            if how == "sample":
                which = _draw_components(weights, np.random.default_rng([seed, first, 1]))
            else:
                which = _best_completion(mixture, evidence, draws)
            codes, floats = _pick(draws, which, impossible)
        return codes, floats, unseen, int(impossible.sum())

    return impute_with(mixture.single_tree_, data, strategy, random_state, fill_batch)


def _marginal_fill(
    mixture: TreeMixture, evidence: Any, fill: list[int], weights: FloatArray
) -> tuple[bytes, list[Any]]:
    """Codes (KEPT where nothing is filled) and bin numbers for the "marginal" strategy."""
    n = evidence.num_rows
    d = evidence.num_columns
    matrix = np.full((d, n), KEPT, dtype=np.uint16)
    floats: list[Any] = [None] * d
    nulls = [c for c in fill if evidence.column(c).null_count > 0]
    if not nulls:
        return matrix.tobytes(), floats
    tables, _, _ = _mixed_posterior(mixture, evidence, nulls, fill)
    engine = engines(mixture)[0]
    for c, table in zip(nulls, tables, strict=True):
        cells = np.asarray(evidence.column(c).is_null()) & ~np.isnan(table).any(axis=1)
        if not cells.any():
            continue
        values = mixture.single_tree_._column_values()[c]
        special = [code for code in (values.other, values.null) if code is not None]
        concrete = min(special, default=table.shape[1])
        if concrete == 0:
            continue  # no concrete value to fill with (as a tree leaves such cells)
        best = np.argmax(table[:, :concrete], axis=1)
        matrix[c, cells] = best[cells]
        middles = engine.bin_middles(c)
        if middles is not None:
            numbers = np.full(n, np.nan)
            numbers[cells] = np.asarray(middles, dtype=np.float64)[best[cells]]
            floats[c] = numbers.tobytes()
    return matrix.tobytes(), floats


def _best_completion(
    mixture: TreeMixture, evidence: pa.RecordBatch, draws: list[Any]
) -> npt.NDArray[np.intp]:
    """Per row, the component whose completion the mixture finds most probable.

    Each completion is decoded into values and scored as evidence under every component, so
    a column the data lacks stays unobserved (summed out) in the comparison.
    """
    tree = mixture.single_tree_
    schema = tree._output_schema()
    n = evidence.num_rows
    absent = {f.name for f in evidence.schema if pa.types.is_null(f.type)}
    scores = []
    for codes, floats, _, _ in draws:
        filled = filled_cells(tree, codes, floats, n, schema)
        kept = {name: cells for name, cells in filled.items() if name not in absent}
        completed = replace_filled(evidence, kept)
        parts = [engine.log_evidence(completed)[0] for engine in engines(mixture)]
        ll = np.stack([np.frombuffer(p, "<f8") for p in parts], axis=1)
        scores.append(log_mix(ll, mixture.weights_)[0])
    return np.asarray(np.argmax(np.stack(scores, axis=1), axis=1), dtype=np.intp)


def sample_given(
    mixture: TreeMixture,
    n: int | None,
    given: Mapping[str, Any] | Any,
    random_state: RandomState = None,
) -> pa.Table:
    """Draw rows from the mixture conditioned on evidence.

    Each row draws a component from its posterior weights P(k | evidence), then its unobserved
    cells from that component's tree given the evidence: an exact draw from P(row | evidence)
    under the mixture. ``given`` is as in ``DependencyTree.sample``: a dict fixed for every row,
    or a table with one row of evidence per sampled row. The same ``random_state`` gives the
    same rows, whatever the threads.
    """
    names = _names(mixture)
    d = len(names)
    prepared = engines(mixture)

    def draw(
        evidence: pa.RecordBatch, count: int, first: int, seed: int
    ) -> tuple[bytes, list[Any], list[int], int]:
        weights, unseen = posterior_weights(mixture, evidence)
        impossible = np.isnan(weights[:, 0])
        rng = np.random.default_rng([seed, first, 1])
        if evidence.num_rows == 1:
            # One row of evidence for every draw: only the rows that drew component k need
            # that component's draws.
            if impossible[0]:
                return np.full((d, count), KEPT, np.uint16).tobytes(), [None] * d, unseen, count
            which = _draw_components(np.repeat(weights, count, axis=0), rng)
            parts = []
            for k, engine in enumerate(prepared):
                m = int((which == k).sum())
                parts.append((m, engine.sample_given(evidence, m, first, _component_seed(seed, k))))
            codes, floats = _interleave(parts, which, d, count)
            return codes, floats, unseen, 0
        which = _draw_components(weights, rng)
        every = [
            engine.sample_given(evidence, count, first, _component_seed(seed, k))
            for k, engine in enumerate(prepared)
        ]
        codes, floats = _pick(every, which, impossible)
        return codes, floats, unseen, int(impossible.sum())

    return sample_given_with(mixture.single_tree_, n, given, random_state, draw)


def _interleave(
    draws: list[tuple[int, Any]], which: npt.NDArray[np.intp], d: int, n: int
) -> tuple[bytes, list[Any]]:
    """Rows drawn per component, laid out in row order.

    ``draws[k]`` holds the rows of component k in order; row i is the next unused row of
    component ``which[i]``.
    """
    matrix = np.empty((d, n), dtype=np.uint16)
    floats: list[Any] = [None] * d
    for k, (m, (codes, numbers, _, _)) in enumerate(draws):
        rows = np.flatnonzero(which == k)
        if m == 0:
            continue
        matrix[:, rows] = np.frombuffer(codes, "<u2").reshape(d, m)
        for c, col in enumerate(numbers):
            if col is None:
                continue
            if floats[c] is None:
                floats[c] = np.full(n, np.nan)
            floats[c][rows] = np.frombuffer(col, "<f8")
    as_bytes = [None if f is None else f.tobytes() for f in floats]
    return matrix.tobytes(), as_bytes
