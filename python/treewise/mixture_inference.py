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
from treewise.checks import MAX_SAMPLE_ROWS, RandomState, check_int, seed_of
from treewise.errors import DataError
from treewise.inference import (
    KEPT,
    SAMPLE_ROWS,
    STRATEGIES,
    EvidenceTally,
    as_evidence,
    as_output,
    assemble,
    decode_prediction,
    evidence_batches,
    filled_cells,
    impossible_message,
    merge_filled,
    one_row,
)
from treewise.sources import open_source

if TYPE_CHECKING:
    from treewise.mixture import TreeMixture

__all__ = [
    "impute",
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


def posterior_weights(
    mixture: TreeMixture, evidence: Any, fill: list[int] | None = None
) -> tuple[FloatArray, list[int]]:
    """P(component | evidence) per row of an evidence batch, and the unseen values per column.

    The weights have shape (rows, K). Rows whose evidence no component can produce are NaN.

    With ``fill``, a null in those columns is known to hold one of the column's values, as
    imputation conditions.
    """
    parts = [engine.log_evidence(evidence, fill) for engine in engines(mixture)]
    unseen = list(parts[0][1])
    with np.errstate(divide="ignore", invalid="ignore"):
        joint = np.stack([np.frombuffer(p[0], "<f8") for p in parts], axis=1)
        joint = joint + np.log(mixture.weights_)[None, :]
        top = joint.max(axis=1, keepdims=True)
        shifted = np.exp(joint - np.where(np.isfinite(top), top, 0.0))
        weights = shifted / shifted.sum(axis=1, keepdims=True)
    weights[~np.isfinite(top[:, 0])] = np.nan
    return weights, unseen


def _mixed_posterior(
    mixture: TreeMixture, evidence: Any, targets: list[int], fill: list[int] | None = None
) -> tuple[list[FloatArray], list[int], int]:
    """Per target, P(target | evidence) per row (rows x categories), mixed over components.

    Also returns the unseen values per column and the rows no component can produce (NaN rows).
    """
    weights, unseen = posterior_weights(mixture, evidence, fill)
    n = len(weights)
    categories = mixture.single_tree_.categories_
    mixed = [np.zeros((n, len(categories[t]))) for t in targets]
    for k, engine in enumerate(engines(mixture)):
        tables, _, _ = engine.posterior(evidence, targets, fill)
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


def _pick(draws: list[Any], which: npt.NDArray[np.intp], d: int, n: int) -> tuple[bytes, list[Any]]:
    """Row i of the result is row i of ``draws[which[i]]`` (each a core ``Filled`` tuple)."""
    codes = np.stack([np.frombuffer(f[0], "<u2").reshape(d, n) for f in draws])
    picked = np.take_along_axis(codes, which[None, None, :], axis=0)[0]
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
    if strategy not in STRATEGIES:
        raise ValueError(f"strategy must be one of {STRATEGIES}, got {strategy!r}")
    tree = mixture.single_tree_
    names = _names(mixture)
    d = len(names)
    seed = seed_of(random_state) if strategy == "sample" else 0
    tally = EvidenceTally(names)
    schema = tree._output_schema()
    out: list[pa.RecordBatch] = []
    first = 0
    source = open_source(data)
    with evidence_batches(source, None) as batches:
        for batch in batches:
            n = batch.num_rows
            present = set(batch.schema.names)
            fill = [c for c, name in enumerate(names) if name in present]
            evidence = as_evidence(batch, names)
            weights, unseen = posterior_weights(mixture, evidence, fill)
            impossible = np.isnan(weights[:, 0])
            tally.add(unseen, int(impossible.sum()))
            rng = np.random.default_rng([seed, first])
            if strategy == "marginal":
                codes, floats = _marginal_fill(mixture, evidence, fill, weights)
            else:
                draws = [
                    engine.impute(evidence, fill, strategy, _component_seed(seed, k), first)
                    for k, engine in enumerate(engines(mixture))
                ]
                if strategy == "sample":
                    which = _draw_components(weights, rng)
                else:
                    which = _best_completion(mixture, batch, draws, names, schema)
                codes, floats = _pick(draws, which, d, n)
            matrix = np.frombuffer(codes, "<u2").reshape(d, n).copy()
            matrix[:, impossible] = KEPT
            filled = filled_cells(tree, matrix.tobytes(), floats, n, schema, rng)
            out.append(_replace(batch, filled))
            first += n
    tally.warn("their nulls are left as they were")
    if not out:
        return pa.table({name: pa.nulls(0) for name in source.names})
    return pa.Table.from_batches(out)


def _replace(batch: pa.RecordBatch, filled: dict[str, Any]) -> pa.RecordBatch:
    """``batch`` with its filled cells in place (other columns pass through)."""
    arrays = [
        merge_filled(batch.column(i), filled[f.name]) if f.name in filled else batch.column(i)
        for i, f in enumerate(batch.schema)
    ]
    return pa.RecordBatch.from_arrays(arrays, names=batch.schema.names)


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
    mixture: TreeMixture,
    batch: pa.RecordBatch,
    draws: list[Any],
    names: list[str],
    schema: pa.Schema,
) -> npt.NDArray[np.intp]:
    """Per row, the component whose completion the mixture finds most probable."""
    tree = mixture.single_tree_
    n = batch.num_rows
    scores = []
    for codes, floats, _, _ in draws:
        filled = filled_cells(tree, codes, floats, n, schema)
        completed = as_evidence(_replace(batch, filled), names)
        weights_and_total = [e.log_evidence(completed)[0] for e in engines(mixture)]
        with np.errstate(divide="ignore"):
            joint = np.stack([np.frombuffer(w, "<f8") for w in weights_and_total], axis=1)
            joint = joint + np.log(mixture.weights_)[None, :]
        top = joint.max(axis=1)
        safe = np.where(np.isfinite(top), top, 0.0)
        scores.append(
            np.where(
                np.isfinite(top), safe + np.log(np.exp(joint - safe[:, None]).sum(axis=1)), -np.inf
            )
        )
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
    tree = mixture.single_tree_
    names = _names(mixture)
    d = len(names)
    seed = seed_of(random_state)
    schema = tree._output_schema()
    tally = EvidenceTally(names)
    out: list[pa.RecordBatch] = []
    prepared = engines(mixture)
    if isinstance(given, Mapping):
        if n is None:
            raise TypeError(
                "sample(given=...) needs n, the number of rows, with a dict of evidence"
            )
        n = check_int("n", n, 0, MAX_SAMPLE_ROWS)
        row = one_row(tree, given)
        weights, unseen = posterior_weights(mixture, row)
        if np.isnan(weights).any():
            raise DataError(impossible_message(given))
        tally.add(unseen)
        fixed = as_output(row, schema)
        for start in range(0, n, SAMPLE_ROWS):
            count = min(SAMPLE_ROWS, n - start)
            rng = np.random.default_rng([seed, start])
            which = _draw_components(np.repeat(weights, count, axis=0), rng)
            draws = []
            for k, engine in enumerate(prepared):
                # Only the rows that drew component k need its draws.
                m = int((which == k).sum())
                part = engine.sample_given(row, m, start, _component_seed(seed, k))
                draws.append((m, part))
            codes, floats = _interleave(draws, which, d, count)
            repeated = fixed.take(np.zeros(count, dtype=np.int64))
            out.append(assemble(tree, codes, floats, count, schema, repeated, rng))
    else:
        source = open_source(given)
        if n is not None and source.total_rows is not None and n != source.total_rows:
            raise ValueError(f"n={n} but the evidence has {source.total_rows} rows; give n=None")
        first = 0
        with evidence_batches(source, names) as batches:
            for batch in batches:
                count = batch.num_rows
                evidence = as_evidence(batch, names)
                weights, unseen = posterior_weights(mixture, evidence)
                impossible = np.isnan(weights[:, 0])
                tally.add(unseen, int(impossible.sum()))
                rng = np.random.default_rng([seed, first])
                which = _draw_components(weights, rng)
                every = [
                    engine.sample_given(evidence, count, first, _component_seed(seed, k))
                    for k, engine in enumerate(prepared)
                ]
                codes, floats = _pick(every, which, d, count)
                matrix = np.frombuffer(codes, "<u2").reshape(d, count).copy()
                matrix[:, impossible] = KEPT
                given_rows = as_output(evidence, schema)
                out.append(assemble(tree, matrix.tobytes(), floats, count, schema, given_rows, rng))
                first += count
        if n is not None and n != first:
            raise ValueError(f"n={n} but the evidence has {first} rows; give n=None")
    tally.warn("their unobserved cells are left null")
    return pa.Table.from_batches(out, schema=schema)


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
