"""The passes over a source: learn a codebook and count every pair, one batch at a time.

A fit reads its data once (`learn_and_count`): the pairs are counted with provisional codes
while the codebook is learned, then recoded. Only when the provisional tables would pass
`ONE_PASS_CELLS` does it read the data a second time to count.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pyarrow as pa

from treewise import _core
from treewise.decode import (
    FAMILY_TYPES,
    conform_time_column,
    family,
    fitting_type,
    type_name,
    widen,
)
from treewise.errors import CategoryCapWarning, ColumnKindWarning, warn
from treewise.progress import PassProgress
from treewise.sources import BatchLoop, Source, open_source

__all__ = [
    "ONE_PASS_CELLS",
    "Spool",
    "TypeRecorder",
    "count_pairs",
    "learn_and_count",
    "learn_and_count_many",
    "learn_codebook",
    "warn_caps",
    "warn_notes",
]

#: The most cells (8 bytes each) the one-pass fit's provisional pair tables may hold before it
#: falls back to a second pass: 2^25 cells, 256 MiB. Each column also takes at most
#: ``_core.PROVISIONAL_CODES`` provisional codes. ``TREEWISE_ONE_PASS=0`` in the environment
#: forces two passes (for tests and comparisons).
ONE_PASS_CELLS = 1 << 25


class TypeRecorder:
    """Each column's Arrow type as seen with values (a null-typed batch says nothing).

    Two widths of one family (int8 in one file, int64 in another) become the family's plain
    type.
    """

    def __init__(self, names: list[str]) -> None:
        self.names = names
        self.types: dict[str, str] = {}

    def see(self, batch: pa.RecordBatch) -> pa.RecordBatch:
        """Record the types of a batch's columns; returns the batch to count.

        A time column keeps the unit it was first seen in (the model stores that type): a later
        batch in another unit (a Parquet file of milliseconds after one of seconds) is converted
        to it, as a fitted model converts the data it scores.
        """
        columns = list(batch.columns)
        converted = False
        for i, field in enumerate(batch.schema):
            if pa.types.is_null(field.type):
                continue
            column: Any = batch.column(i)
            levels = column.dictionary if pa.types.is_dictionary(field.type) else None
            name = type_name(field.type, levels)
            seen = self.types.get(field.name)
            if seen is not None and seen != name and family(seen) == "time":
                columns[i] = conform_time_column(column, seen, field.name)
                converted = converted or columns[i] is not column
            self.types[field.name] = name if seen is None else widen(seen, name)
        if not converted:
            return batch
        return pa.RecordBatch.from_arrays(columns, names=batch.schema.names)

    def select(self, names: list[str]) -> TypeRecorder:
        """The recorded types of the columns ``names`` only."""
        if names == self.names:
            return self
        kept = TypeRecorder(names)
        kept.types = {n: t for n, t in self.types.items() if n in names}
        return kept

    def type_names(self, codebook: _core.Codebook | None = None) -> list[str]:
        """Our stored name of each column's type, able to hold every code of ``codebook``.

        A column never seen with values gets the plain type of its codebook family (bool,
        int64, uint64, string or float64).
        """
        names = []
        for i, n in enumerate(self.names):
            kind, values, _has_other, _has_null = (
                ("str", [], False, False) if codebook is None else codebook.column(i)
            )
            if n not in self.types:
                names.append(FAMILY_TYPES[kind])
            elif codebook is None or kind == "float":
                names.append(self.types[n])
            elif isinstance(values, tuple):
                # Numeric bins: what comes back lies between the lowest and highest value seen.
                _edges, low, high, _specials = values
                names.append(fitting_type(self.types[n], [int(low), int(high)], 0))
            else:
                tail = codebook.shape(i)[2]
                back = list(values) + ([] if tail is None else list(tail[0]))
                names.append(fitting_type(self.types[n], back, len(back)))
        return names


def warn_notes(notes: list[tuple[str, str, str]]) -> None:
    """One ColumnKindWarning per column left out of the model or holding a single value."""
    for _column, _kind, message in notes:
        warn(message, ColumnKindWarning)


def warn_caps(caps: list[tuple[str, int, int]], max_categories: int) -> None:
    """One CategoryCapWarning per column whose rare values went to the 'other' code."""
    for column, n_values, n_rows in caps:
        warn(
            f"column {column!r}: {n_values} rare values in {n_rows} rows share the 'other' "
            f"code (max_categories={max_categories}); raise max_categories to keep them apart",
            CategoryCapWarning,
        )


@contextmanager
def learn_codebook(
    source: Source,
    names: list[str],
    max_categories: int,
    n_bins: int,
    batch_rows: int,
    bar: PassProgress,
    types: TypeRecorder,
    kinds: dict[str, str] | None = None,
) -> Iterator[tuple[_core.Codebook, Source]]:
    """The codebook pass. Yields the codebook and the source to count from next.

    Columns left out of the model (docs/column-kinds.md) are not in the codebook: count the
    columns ``codebook.names``.

    A replayable source is simply read again. A one-shot stream is spooled to temporary Arrow
    IPC files while its codebook is learned, and counted from them; they are removed when the
    block ends: one pass over the stream, exact counts, memory near one batch.
    """
    builder = _core.CodebookBuilder(names)
    spool = None if source.replayable else Spool()
    try:
        _read_once(source, names, batch_rows, bar, types, "learning codes", builder.observe, spool)
        codebook, caps, notes = builder.finish(max_categories, n_bins, list((kinds or {}).items()))
        warn_caps(caps, max_categories)
        warn_notes(notes)
        yield codebook, _to_count(source, spool)
    finally:
        if spool is not None:
            spool.remove()


def _read_once(
    source: Source,
    names: list[str],
    batch_rows: int,
    bar: PassProgress,
    types: TypeRecorder,
    title: str,
    observe: Callable[[pa.RecordBatch], None],
    spool: Spool | None,
) -> None:
    """The first pass over ``source``: each batch's types recorded, observed and spooled."""
    with BatchLoop(source, names, batch_rows, bar, title) as batches:
        for batch in batches:
            batch = types.see(batch)
            observe(batch)
            if spool is not None:
                spool.write(batch)


def _to_count(source: Source, spool: Spool | None) -> Source:
    """The source a second pass reads: ``source`` again, or the spool of a one-shot stream."""
    if spool is None:
        return source
    spool.close()
    return open_source(spool.paths)


class Spool:
    """Temporary Arrow IPC files that a one-shot stream is copied to, batch by batch.

    An IPC file has one schema and one dictionary per column, but the batches of a stream may
    drift within a family (int8 then int64, a null-typed batch, new dictionaries): dictionaries
    are written as plain values, and a batch of another schema starts a new file.
    """

    def __init__(self) -> None:
        self.paths: list[Path] = []
        self.writer: pa.ipc.RecordBatchFileWriter | None = None
        self.schema: pa.Schema | None = None

    def write(self, batch: pa.RecordBatch) -> None:
        """Append ``batch`` (dictionaries as plain values; a new schema starts a new file)."""
        batch = pa.RecordBatch.from_arrays(
            [
                c.cast(c.type.value_type) if pa.types.is_dictionary(c.type) else c
                for c in batch.columns
            ],
            names=batch.schema.names,
        )
        if self.writer is None or batch.schema != self.schema:
            self.close()
            fd, name = tempfile.mkstemp(prefix="treewise-spool-", suffix=".arrow")
            os.close(fd)
            self.paths.append(Path(name))
            self.schema = batch.schema
            self.writer = pa.ipc.new_file(name, batch.schema)
        self.writer.write_batch(batch)

    def close(self) -> None:
        """Finish the file being written; the files can then be read."""
        if self.writer is not None:
            self.writer.close()
            self.writer = None

    def remove(self) -> None:
        """Close and delete every file of the spool."""
        self.close()
        for path in self.paths:
            path.unlink(missing_ok=True)


def count_pairs(
    source: Source,
    names: list[str],
    codebook: _core.Codebook,
    stats: _core.PairStats,
    batch_rows: int,
    bar: PassProgress,
    types: TypeRecorder,
    title: str = "counting pairs",
) -> None:
    """The counting pass: encode each batch with ``codebook`` and add its pair counts."""
    with BatchLoop(source, names, batch_rows, bar, title) as batches:
        for batch in batches:
            stats.update(codebook, types.see(batch))


def _cell_limit(memory_limit: int | None) -> int:
    """Cells the provisional tables may hold (8 bytes each).

    ``ONE_PASS_CELLS``, and at most a quarter of ``memory_limit``; 0 (two passes) under
    ``TREEWISE_ONE_PASS=0``.
    """
    if os.environ.get("TREEWISE_ONE_PASS", "").strip() == "0":
        return 0
    if memory_limit is None:
        return ONE_PASS_CELLS
    return min(ONE_PASS_CELLS, memory_limit // 32)


def learn_and_count(
    source: Source,
    names: list[str],
    max_categories: int,
    n_bins: int,
    batch_rows: int,
    bar: PassProgress,
    types: TypeRecorder,
    kinds: dict[str, str] | None = None,
    memory_limit: int | None = None,
) -> tuple[_core.Codebook, _core.PairStats, TypeRecorder]:
    """Learn the codebook and count every pair: the codebook, the counts, the kept columns' types.

    One pass counts with provisional codes (one per distinct value) and recodes at the end,
    exactly as a second pass would count. When a column has more than
    ``_core.PROVISIONAL_CODES`` distinct values, the provisional tables would pass
    ``ONE_PASS_CELLS``, or (for data in memory, cheap to read again) a number column has more
    than ``n_bins`` distinct values and will be binned, the pass only tallies from then on and
    a second pass counts; the progress line says so. A one-shot stream is spooled meanwhile, in
    case it must be read again.
    """
    codebook, (stats,), kept = learn_and_count_many(
        [source], names, max_categories, n_bins, batch_rows, bar, types, kinds, memory_limit
    )
    return codebook, stats, kept


def learn_and_count_many(
    sources: list[Source],
    names: list[str],
    max_categories: int,
    n_bins: int,
    batch_rows: int,
    bar: PassProgress,
    types: TypeRecorder,
    kinds: dict[str, str] | None = None,
    memory_limit: int | None = None,
) -> tuple[_core.Codebook, list[_core.PairStats], TypeRecorder]:
    """One codebook learned over several sources, each source's pairs counted on their own.

    As :func:`learn_and_count`, for the two sides of a comparison.
    """
    cells = _cell_limit(memory_limit)
    counters = [_core.OnePass(names, cells) for _ in sources]
    categorical = [name for name, kind in (kinds or {}).items() if kind == "categorical"]
    for source, counter in zip(sources, counters, strict=True):
        if source.replayable and not source.read_ahead:
            # Data in memory is cheap to read again: a column that will be binned is counted
            # faster with its bins in a second pass than value by value in this one.
            counter.stop_past_bins(n_bins, categorical)
    spools = [None if source.replayable else Spool() for source in sources]
    try:
        for source, counter, spool in zip(sources, counters, spools, strict=True):
            title = "learning codes, counting pairs"
            _read_once(source, names, batch_rows, bar, types, title, counter.observe, spool)
        fallbacks = [counter.fallback for counter in counters]
        uncounted = [counter.uncounted for counter in counters]
        learned, caps, notes, counted = _core.OnePass.finish_together(
            counters, max_categories, n_bins, list((kinds or {}).items()), memory_limit
        )
        warn_caps(caps, max_categories)
        warn_notes(notes)
        kept = list(learned.names)
        all_stats: list[_core.PairStats] = []
        for source, spool, stats, fallback, wide in zip(
            sources, spools, counted, fallbacks, uncounted, strict=True
        ):
            if stats is None:
                modelled = [name for name in wide if name in kept]
                if fallback is None and modelled:
                    fallback = (
                        f"column '{modelled[0]}' has more than {_core.PROVISIONAL_CODES} distinct "
                        "values"
                    )
                stats = _core.PairStats(learned, memory_limit)
                counting = _to_count(source, spool)
                # A spooled stream holds decoded values: its types say nothing new.
                seen = types if spool is None else TypeRecorder(names)
                why = f"second pass: {fallback}" if fallback else "second pass"
                title = f"counting pairs ({why})"
                count_pairs(counting, kept, learned, stats, batch_rows, bar, seen, title)
            all_stats.append(stats)
        return learned, all_stats, types.select(kept)
    finally:
        for spool in spools:
            if spool is not None:
                spool.remove()
