"""Scoring and sampling at scale: batch by batch into Parquet, in bounded memory, atomically."""

from __future__ import annotations

import itertools
import os
from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa
import pyarrow.parquet as pq

from treewise import _core
from treewise.errors import DataError, SchemaError, UnseenCategoryWarning, warn
from treewise.files import atomic_path
from treewise.progress import PassProgress, wants_progress
from treewise.sources import BATCH_ROWS, BatchLoop, check_columns, open_source

__all__ = ["Scored", "TopRows", "atomic_parquet", "score_batches", "write_scores"]


@dataclass
class Scored:
    """One scored batch: the batch read, ln p per row, and per-column surprisal if asked.

    ``extra`` holds more per-row columns to write after ``score`` (a mixture's component and
    responsibilities).
    """

    batch: pa.RecordBatch
    total: npt.NDArray[np.float64]
    surprisal: list[npt.NDArray[np.float64]] | None
    extra: dict[str, npt.NDArray[Any]] = field(default_factory=dict)


def score_batches(
    model: _core.TreeModel,
    names: list[str],
    alpha: float,
    data: Any,
    surprisal: bool,
    keys: Sequence[str] = (),
    batch_rows: int = BATCH_ROWS,
    progress: bool | None = False,
) -> Iterator[Scored]:
    """Score ``data`` batch by batch (any source), then warn once about unseen values.

    ``names`` are the model's columns; ``keys`` are further columns of the data read along
    (into ``Scored.batch``); ``alpha`` is named in the warning.
    """
    source = open_source(data)
    check_columns(source.names, names, source.description)
    extra = [k for k in keys if k not in names]
    wanted = names + check_columns(source.names, extra, source.description) if extra else names
    unseen = np.zeros(len(names), dtype=np.int64)
    with (
        PassProgress(wants_progress(progress), source.total_rows, source.n_parts) as bar,
        BatchLoop(source, wanted, batch_rows, bar, "scoring") as batches,
    ):
        for batch in batches:
            total, columns, missing = model.score(batch.select(names), surprisal)
            unseen += missing
            per_column = None if columns is None else [np.frombuffer(c, "<f8") for c in columns]
            yield Scored(batch, np.frombuffer(total, "<f8"), per_column)
    if unseen.any():
        report = ", ".join(f"{names[c]!r}: {k}" for c, k in enumerate(unseen) if k)
        warn(
            f"values never seen in fitting (scored with the smoothing mass, alpha={alpha}): "
            f"{report}",
            UnseenCategoryWarning,
        )


@contextmanager
def atomic_parquet(path: str | os.PathLike[str], schema: pa.Schema) -> Iterator[pq.ParquetWriter]:
    """A Parquet writer whose file appears under ``path`` only once it is complete."""
    with atomic_path(path) as tmp:
        writer = pq.ParquetWriter(str(tmp), schema)
        try:
            yield writer
        finally:
            writer.close()


class TopRows:
    """The ``k`` lowest-scoring rows seen so far, kept in a small table (bounded memory)."""

    def __init__(self, k: int) -> None:
        self.k = k
        self.table: pa.Table | None = None

    def offer(self, rows: pa.Table, scores: np.ndarray[Any, Any]) -> None:
        """Consider a batch's rows (with a ``score`` column already in ``rows``)."""
        if self.k <= 0 or rows.num_rows == 0:
            return
        if rows.num_rows > self.k:
            # Only a batch's own k lowest can reach the overall k lowest; keep every row tied
            # with the k-th lowest, so that ties are decided by row number below.
            kth = np.partition(scores, self.k - 1)[self.k - 1]
            rows = rows.take(np.flatnonzero(scores <= kth))
        merged = rows if self.table is None else pa.concat_tables([self.table, rows])
        order = np.lexsort((merged["row"].to_numpy(), merged["score"].to_numpy()))
        self.table = merged.take(order[: self.k])


def write_scores(
    scored: Iterable[Scored],
    path: str | os.PathLike[str],
    names: Sequence[str],
    keys: Sequence[str],
    surprisal: bool,
    top: int,
) -> pa.Table:
    """Write scores batch by batch to Parquet; return the ``top`` most surprising rows.

    The file holds the key columns, ``score`` (ln p(row) in nats), each item's ``extra``
    columns and, with ``surprisal``, one ``surprisal_<column>`` per modelled column. The
    returned table holds ``row`` (the row's position in the source), the keys, ``score``, the
    extra columns and ``surprisal_<column>`` for each column. A key named like an output column
    is a ``SchemaError``.
    """
    iterator = iter(scored)
    first = next(iterator, None)
    if first is None:
        raise DataError("the data to score has 0 rows; there is nothing to write")
    taken = {"score", "row", *first.extra}
    clash = [k for k in keys if k in taken or k.startswith("surprisal_")]
    if clash:
        raise SchemaError(f"key columns may not be named {clash}; rename them in the data")

    def output(item: Scored) -> pa.Table:
        columns: dict[str, Any] = {k: item.batch.column(k) for k in keys}
        columns["score"] = pa.array(item.total)
        columns.update({name: pa.array(values) for name, values in item.extra.items()})
        if surprisal:
            for name, values in zip(names, item.surprisal or [], strict=True):
                columns[f"surprisal_{name}"] = pa.array(values)
        return pa.table(columns)

    best = TopRows(top)
    offset = 0
    schema = output(first).schema
    with atomic_parquet(path, schema) as writer:
        for item in itertools.chain([first], iterator):
            n = len(item.total)
            table = output(item)
            if table.schema != schema:
                # Keys may drift in width between files (int32, int64): write the first type.
                try:
                    table = table.cast(schema)
                except (pa.ArrowInvalid, pa.ArrowNotImplementedError, ValueError) as e:
                    raise SchemaError(
                        f"the key columns changed type between parts of the data "
                        f"({schema} then {table.schema}); give them one type everywhere"
                    ) from e
            writer.write_table(table)
            if top > 0:
                rows: dict[str, Any] = {"row": pa.array(np.arange(offset, offset + n))}
                rows.update({k: item.batch.column(k) for k in keys})
                rows["score"] = pa.array(item.total)
                rows.update({name: pa.array(values) for name, values in item.extra.items()})
                for name, values in zip(names, item.surprisal or [], strict=True):
                    rows[f"surprisal_{name}"] = pa.array(values)
                best.offer(pa.table(rows), item.total)
            offset += n
    return best.table if best.table is not None else pa.table({"row": pa.array([], pa.int64())})
