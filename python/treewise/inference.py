"""Questions to a fitted tree: exact posteriors, imputation and conditional sampling.

Every function takes a fitted :class:`~treewise.DependencyTree` first. The work is exact
message passing on the tree (or forest) in the Rust core, one row per query, in parallel and
with the GIL released. In the data given as evidence, a null means *unobserved*, even in a
column whose codebook has a null category (NaN is a value of its own, docs/column-kinds.md),
and a value the codebook has no code for is unobserved too (an ``UnseenCategoryWarning``
counts them). A model column the data lacks is
unobserved in every row. See docs/inference.md.
"""

from __future__ import annotations

import weakref
from collections.abc import Callable, Collection, Mapping
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa
import pyarrow.compute as pc

from treewise import _core
from treewise.checks import MAX_SAMPLE_ROWS, RandomState, check_int, seed_of
from treewise.decode import decode_column
from treewise.errors import (
    DataError,
    ImpossibleEvidenceWarning,
    UnseenCategoryWarning,
    warn,
)
from treewise.sources import BatchLoop, Source, open_source, read_table

if TYPE_CHECKING:
    from treewise.estimator import DependencyTree

__all__ = [
    "EvidenceTally",
    "ImpossibleEvidenceWarning",
    "as_evidence",
    "decode_prediction",
    "evidence_batches",
    "filled_cells",
    "impossible_message",
    "impute",
    "impute_with",
    "marginals",
    "one_row",
    "predict",
    "predict_proba",
    "read_table",
    "replace_filled",
    "sample_given",
    "sample_given_with",
]

#: Rows per call of conditional sampling with one fixed row of evidence.
SAMPLE_ROWS = 262_144
#: The imputation strategies.
STRATEGIES = ("joint", "marginal", "sample")
#: The code the core writes for a cell it left as it was.
KEPT = 0xFFFF


# -- the prepared model --------------------------------------------------------------------------

_ENGINES: weakref.WeakKeyDictionary[Any, tuple[_core.TreeModel, float, _core.TreeInference]] = (
    weakref.WeakKeyDictionary()
)


def _engine(model: DependencyTree) -> _core.TreeInference:
    """The model prepared for inference, kept while the estimator's fitted model and alpha stay."""
    core = model._fitted()
    hit = _ENGINES.get(model)
    if hit is not None and hit[0] is core and hit[1] == core.alpha:
        return hit[2]
    engine = _core.TreeInference.from_model(core)
    _ENGINES[model] = (core, core.alpha, engine)
    return engine


def _names(model: DependencyTree) -> list[str]:
    model._fitted()
    return [str(n) for n in model.feature_names_in_]


# -- reading evidence ----------------------------------------------------------------------------


def evidence_batches(source: Source, wanted: list[str] | None) -> BatchLoop:
    """The loop over a source's batches, holding the ``wanted`` columns it has (None: all)."""
    present = list(source.names) if wanted is None else [n for n in wanted if n in source.names]
    # With none of the wanted columns, read one column anyway: the rows still count.
    return BatchLoop(source, present or list(source.names[:1]))


def as_evidence(batch: pa.RecordBatch, names: list[str], blank: Collection[str] = ()) -> Any:
    """The batch as the model's columns in order; absent and ``blank`` columns are all null."""
    n = batch.num_rows
    have = set(batch.schema.names)
    arrays = [
        batch.column(name) if name in have and name not in blank else pa.nulls(n) for name in names
    ]
    return pa.RecordBatch.from_arrays(arrays, names=names)


class EvidenceTally:
    """Values without a code and impossible rows over a whole call, warned about once."""

    def __init__(self, names: list[str]) -> None:
        self.names = names
        self.unseen = np.zeros(len(names), dtype=np.int64)
        self.impossible = 0

    def add(self, unseen: list[int], impossible: int = 0) -> None:
        """Count a batch's values without a code (per column) and its impossible rows."""
        self.unseen += np.asarray(unseen, dtype=np.int64)
        self.impossible += impossible

    def warn(self, impossible: str) -> None:
        """Warn once about what was counted; ``impossible`` says what became of such rows."""
        if self.unseen.any():
            report = ", ".join(f"{self.names[c]!r}: {k}" for c, k in enumerate(self.unseen) if k)
            warn(
                f"values never seen in fitting were treated as unobserved: {report}",
                UnseenCategoryWarning,
            )
        if self.impossible:
            warn(
                f"{self.impossible} rows have evidence of probability zero under the model "
                f"(alpha=0 and a combination never seen in fitting); {impossible}. Fit with "
                "alpha > 0 to give every combination some probability",
                ImpossibleEvidenceWarning,
            )


def _f64(data: bytes) -> npt.NDArray[np.float64]:
    return np.frombuffer(data, dtype="<f8")


# -- posteriors ----------------------------------------------------------------------------------


def predict_proba(model: DependencyTree, data: Any, target: str | int) -> npt.NDArray[np.float64]:
    """The posterior of ``target`` in each row of ``data``, given the row's other columns.

    Parameters
    ----------
    model : DependencyTree
        A fitted model.
    data : table, path or stream
        Any source ``fit`` accepts, with any of the model's columns; the missing ones, nulls and
        values without a code are unobserved. The ``target`` column, if present, is ignored.
    target : str or int
        The column to predict.

    Returns
    -------
    ndarray of shape (n_rows, len(model.categories_[target]))
        P(target = category | the row's observed columns), aligned with ``categories_``. Rows
        whose evidence is impossible (alpha=0 only) are NaN, with an
        ``ImpossibleEvidenceWarning``.
    """
    t = model._index(target)
    engine = _engine(model)
    names = _names(model)
    tally = EvidenceTally(names)
    parts: list[npt.NDArray[np.float64]] = []
    with evidence_batches(open_source(data), names) as batches:
        for batch in batches:
            (table,), unseen, impossible = engine.posterior(
                as_evidence(batch, names, {names[t]}), [t]
            )
            tally.add(unseen, impossible)
            parts.append(_f64(table))
    tally.warn("their probabilities are NaN")
    width = len(model.categories_[t])
    return np.concatenate(parts).reshape(-1, width) if parts else np.zeros((0, width))


def predict(
    model: DependencyTree, data: Any, target: str | int, allow_null: bool = False
) -> pa.Array[Any]:
    """The most probable value of ``target`` in each row of ``data`` (see :func:`predict_proba`).

    Ties go to the first category in ``categories_`` order. The result has the fitted type of
    ``target``: the most probable value, never null unless ``allow_null`` lets the null category
    win, or the evidence is impossible (alpha=0 only). Where the "other" category wins, the
    result is the most frequent value behind it. A numeric column gets the median of the values
    seen in its most probable bin.
    """
    t = model._index(target)
    return decode_prediction(
        model, _engine(model), t, predict_proba(model, data, target), allow_null
    )


def decode_prediction(
    model: DependencyTree,
    engine: _core.TreeInference,
    t: int,
    proba: npt.NDArray[np.float64],
    allow_null: bool,
) -> pa.Array[Any]:
    """Each row's most probable value of column ``t`` from its posterior ``proba``.

    ``model`` gives the values behind the codes and ``engine`` the number inside each bin.
    """
    null = model._column_values()[t].null
    if not allow_null and null is not None and proba.shape[1] > 1:
        proba[:, null] = -1.0  # below every probability: the null code never wins
    valid = ~np.isnan(proba).any(axis=1)
    codes = np.where(valid, np.argmax(np.nan_to_num(proba, nan=-1.0), axis=1), KEPT)
    codes = codes.astype(np.uint16)
    middles = engine.bin_middles(t)
    floats = None
    if middles is not None:
        table = np.append(np.asarray(middles, dtype=np.float64), np.nan)
        floats = table[np.minimum(codes, len(middles))]
    return decode_column(codes, model._column_values()[t], floats)


def marginals(
    model: DependencyTree, evidence: Mapping[str, Any] | None = None
) -> dict[str, npt.NDArray[np.float64]]:
    """Every column's posterior marginal given one set of evidence.

    Parameters
    ----------
    model : DependencyTree
        A fitted model.
    evidence : dict, optional
        Column name -> observed value (as it appears in the data; a float is placed in its bin).
        ``None`` values are unobserved. Without evidence, the model's own marginals.

    Returns
    -------
    dict of str -> ndarray
        For each column, P(category | evidence) aligned with ``categories_``; an observed column
        puts all its mass on its value. Impossible evidence raises ``DataError``.
    """
    names = _names(model)
    batch = one_row(model, evidence or {})
    tables, unseen, impossible = _engine(model).posterior(batch, list(range(len(names))))
    tally = EvidenceTally(names)
    tally.add(unseen)
    tally.warn("")
    if impossible:
        raise DataError(impossible_message(evidence or {}))
    return {name: _f64(table).copy() for name, table in zip(names, tables, strict=True)}


def one_row(model: DependencyTree, evidence: Mapping[str, Any]) -> Any:
    """One row of evidence with every model column (unobserved ones null)."""
    if not isinstance(evidence, Mapping):
        raise TypeError(f"evidence must be a dict of column -> value, got {evidence!r}")
    names = _names(model)
    unknown = [k for k in evidence if k not in names]
    if unknown:
        raise KeyError(f"{unknown} are not modelled columns; they are {names}")
    arrays = []
    for name in names:
        value = evidence.get(name)
        try:
            arrays.append(pa.nulls(1) if value is None else pa.array([value]))
        except (pa.ArrowInvalid, pa.ArrowTypeError) as e:
            raise DataError(f"evidence for {name!r}: cannot read {value!r} as a value: {e}") from e
    return pa.RecordBatch.from_arrays(arrays, names=names)


def impossible_message(evidence: Mapping[str, Any]) -> str:
    """What to say when fixed evidence has probability zero under the model."""
    return (
        f"the evidence {dict(evidence)!r} has probability zero under the model (alpha=0 and a "
        "combination never seen in fitting); fit with alpha > 0, or give other evidence"
    )


# -- filling in and sampling ---------------------------------------------------------------------


def impute(
    model: DependencyTree,
    data: Any,
    strategy: str = "joint",
    random_state: RandomState = None,
) -> pa.Table:
    """Fill the nulls of the model's columns in ``data`` from the rest of each row.

    Parameters
    ----------
    model : DependencyTree
        A fitted model.
    data : table, path or stream
        Any source ``fit`` accepts. Columns the model does not know pass through unchanged.
    strategy : {"joint", "marginal", "sample"}, default "joint"
        ``"joint"``: the most probable completion of each row as a whole (max-product).
        ``"marginal"``: each null cell's own most probable value. ``"sample"``: a draw from the
        joint posterior of the row's null cells.
    random_state : None, int, numpy.random.Generator or RandomState
        For ``"sample"``: the same value gives the same rows, whatever the threads or batches.

    Returns
    -------
    pyarrow.Table
        ``data`` with its nulls in modelled columns filled, types kept. Cells are filled with
        real values only, never null: the posterior is conditioned on every null cell holding one
        of the column's values. A numeric cell gets the median of the values seen in its bin
        ("joint", "marginal") or a value drawn from them ("sample"); the "other" category gives
        its most frequent value, or one drawn by count ("sample"). A model
        column the data lacks is unobserved, not filled ("joint" maximises over it too). Rows
        whose evidence is impossible (alpha=0 only) keep their nulls, with an
        ``ImpossibleEvidenceWarning``.
    """
    return impute_with(model, data, strategy, random_state, _engine(model).impute)


#: Fills one batch of evidence: (evidence, fill column indices, strategy, seed, first row) to
#: (codes, floats per column, unseen values per column, impossible rows), as
#: ``TreeInference.impute`` returns them.
FillBatch = Callable[
    [pa.RecordBatch, list[int], str, int, int], tuple[bytes, list[Any], list[int], int]
]


def impute_with(
    model: DependencyTree,
    data: Any,
    strategy: str,
    random_state: RandomState,
    fill_batch: FillBatch,
) -> pa.Table:
    """Fill the nulls of ``data`` batch by batch with ``fill_batch``; ``model`` decodes them.

    The loop shared by a tree's and a mixture's ``impute``: evidence from each batch, the
    filled cells decoded into values of the fitted types and merged into the batch's columns,
    and one warning for values without a code and impossible rows.
    """
    if strategy not in STRATEGIES:
        raise ValueError(f"strategy must be one of {STRATEGIES}, got {strategy!r}")
    names = _names(model)
    seed = seed_of(random_state) if strategy == "sample" else 0
    tally = EvidenceTally(names)
    schema = model._output_schema()
    out: list[pa.RecordBatch] = []
    first = 0
    source = open_source(data)
    with evidence_batches(source, None) as batches:
        for batch in batches:
            present = set(batch.schema.names)
            fill = [c for c, name in enumerate(names) if name in present]
            codes, floats, unseen, impossible = fill_batch(
                as_evidence(batch, names), fill, strategy, seed, first
            )
            tally.add(unseen, impossible)
            rng = np.random.default_rng([seed, first]) if strategy == "sample" else None
            filled = filled_cells(model, codes, floats, batch.num_rows, schema, rng)
            out.append(replace_filled(batch, filled))
            first += batch.num_rows
    tally.warn("their nulls are left as they were")
    if not out:
        return pa.table({n: pa.nulls(0) for n in source.names})
    return pa.Table.from_batches(out)


def replace_filled(batch: pa.RecordBatch, filled: dict[str, Any]) -> pa.RecordBatch:
    """``batch`` with the filled cells of ``filled_cells`` in place; other columns pass through."""
    arrays = [
        _merge_filled(batch.column(i), filled[f.name]) if f.name in filled else batch.column(i)
        for i, f in enumerate(batch.schema)
    ]
    return pa.RecordBatch.from_arrays(arrays, names=batch.schema.names)


def filled_cells(
    model: DependencyTree,
    codes: bytes,
    floats: list[bytes | None],
    n: int,
    schema: pa.Schema,
    rng: np.random.Generator | None = None,
) -> dict[str, tuple[npt.NDArray[np.bool_], pa.Array[Any]]]:
    """Per model column with any filled cell: (filled mask, decoded values of the fitted type).

    An "other" code takes a value behind it drawn with ``rng``, or else the most frequent one.
    """
    matrix = np.frombuffer(codes, "<u2").reshape(len(model.categories_), n)
    columns = model._column_values()
    out = {}
    for c, field in enumerate(schema):
        mask = matrix[c] != KEPT
        if mask.any():
            values = None if floats[c] is None else _f64(floats[c])  # type: ignore[arg-type]
            out[field.name] = (mask, decode_column(matrix[c], columns[c], values, None, rng))
    return out


def _merge_filled(
    original: pa.Array[Any], filled: tuple[npt.NDArray[np.bool_], pa.Array[Any]]
) -> Any:
    """``original`` with the filled cells replaced, in ``original``'s type when it can hold them."""
    mask, values = filled
    if pa.types.is_null(original.type):
        return pc.if_else(pa.array(mask), values, pa.nulls(len(values), values.type))
    try:
        values = values.cast(original.type)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as e:
        raise DataError(
            f"cannot write filled values of type {values.type} into a column of type "
            f"{original.type}: {e}"
        ) from e
    if pa.types.is_string_view(original.type):
        # pyarrow's if_else has no string_view kernel: choose in plain strings, then cast back.
        merged = pc.if_else(pa.array(mask), values.cast(pa.string()), original.cast(pa.string()))
        return merged.cast(original.type)
    return pc.if_else(pa.array(mask), values, original)


def sample_given(
    model: DependencyTree,
    n: int | None,
    given: Mapping[str, Any] | Any,
    random_state: RandomState = None,
) -> pa.Table:
    """Draw rows from the model conditioned on evidence.

    Parameters
    ----------
    model : DependencyTree
        A fitted model.
    n : int or None
        How many rows. With a table of evidence it may be None (one row per evidence row);
        otherwise it must equal the table's row count.
    given : dict or table
        A dict of column -> value fixed in every row, or any source ``fit`` accepts with one row
        of evidence per sampled row (nulls and absent columns are drawn).
    random_state : None, int, numpy.random.Generator or RandomState
        The same value gives the same rows, whatever the threads or batches.

    Returns
    -------
    pyarrow.Table
        The model's columns and types, as :meth:`DependencyTree.sample` returns them: the given
        values where there was evidence, draws from P(unobserved | evidence) elsewhere (the
        upward pass collects the evidence, then each column is drawn from the root down).
        Impossible fixed evidence raises ``DataError``; impossible rows of a table stay null,
        with an ``ImpossibleEvidenceWarning``.
    """
    return sample_given_with(model, n, given, random_state, _engine(model).sample_given)


#: Draws rows given evidence: (evidence, count, first row, seed) to (codes, floats per column,
#: unseen values per column, impossible rows), as ``TreeInference.sample_given`` returns them.
#: With one row of evidence it is shared by all ``count`` rows.
DrawGiven = Callable[[pa.RecordBatch, int, int, int], tuple[bytes, list[Any], list[int], int]]


def sample_given_with(
    model: DependencyTree,
    n: int | None,
    given: Mapping[str, Any] | Any,
    random_state: RandomState,
    draw: DrawGiven,
) -> pa.Table:
    """Conditional sampling with ``draw``; ``model`` reads the evidence and decodes the rows.

    The loop shared by a tree's and a mixture's ``sample(given=...)``: fixed evidence in
    blocks of SAMPLE_ROWS, or a table's batches, each drawn, decoded and laid over the given
    cells, with one warning for values without a code and impossible rows.
    """
    names = _names(model)
    seed = seed_of(random_state)
    schema = model._output_schema()
    tally = EvidenceTally(names)
    out: list[pa.RecordBatch] = []
    if isinstance(given, Mapping):
        if n is None:
            raise TypeError("sample_given needs n, the number of rows, with a dict of evidence")
        n = check_int("n", n, 0, MAX_SAMPLE_ROWS)
        row = one_row(model, given)
        fixed = _as_output(row, schema)
        for start in range(0, n, SAMPLE_ROWS):
            count = min(SAMPLE_ROWS, n - start)
            codes, floats, unseen, impossible = draw(row, count, start, seed)
            if impossible:
                raise DataError(impossible_message(given))
            if start == 0:
                tally.add(unseen)
            repeated = fixed.take(np.zeros(count, dtype=np.int64))
            rng = np.random.default_rng([seed, start])
            out.append(_assemble(model, codes, floats, count, schema, repeated, rng))
    else:
        source = open_source(given)
        if n is not None and source.total_rows is not None and n != source.total_rows:
            raise ValueError(f"n={n} but the evidence has {source.total_rows} rows; give n=None")
        first = 0
        with evidence_batches(source, names) as batches:
            for batch in batches:
                evidence = as_evidence(batch, names)
                codes, floats, unseen, impossible = draw(evidence, batch.num_rows, first, seed)
                tally.add(unseen, impossible)
                given_rows = _as_output(evidence, schema)
                rng = np.random.default_rng([seed, first])
                out.append(_assemble(model, codes, floats, batch.num_rows, schema, given_rows, rng))
                first += batch.num_rows
        if n is not None and n != first:
            raise ValueError(f"n={n} but the evidence has {first} rows; give n=None")
    tally.warn("their unobserved cells are left null")
    return pa.Table.from_batches(out, schema=schema)


def _as_output(batch: pa.RecordBatch, schema: pa.Schema) -> pa.RecordBatch:
    """Evidence in the model's output types (absent columns all null)."""
    arrays = []
    for column, field in zip(batch.columns, schema, strict=True):
        if pa.types.is_null(column.type):
            arrays.append(pa.nulls(len(column), field.type))
            continue
        try:
            arrays.append(column.cast(field.type))
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as e:
            raise DataError(
                f"evidence for {field.name!r} of type {column.type} does not fit the fitted type "
                f"{field.type}: {e}"
            ) from e
    return pa.RecordBatch.from_arrays(arrays, schema=schema)


def _assemble(
    model: DependencyTree,
    codes: bytes,
    floats: list[bytes | None],
    n: int,
    schema: pa.Schema,
    given: pa.RecordBatch,
    rng: np.random.Generator,
) -> pa.RecordBatch:
    """Sampled cells over the given ones."""
    filled = filled_cells(model, codes, floats, n, schema, rng)
    arrays = [
        _merge_filled(given.column(c), filled[f.name]) if f.name in filled else given.column(c)
        for c, f in enumerate(schema)
    ]
    return pa.RecordBatch.from_arrays(arrays, schema=schema)
