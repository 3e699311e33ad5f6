"""The passes over a source: learn a codebook, then count every pair, one batch at a time."""

from __future__ import annotations

import os
import tempfile
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pyarrow as pa

from treewise import _core
from treewise.decode import type_name
from treewise.errors import CategoryCapWarning, SchemaError
from treewise.progress import PassProgress
from treewise.sources import Source, located, open_source

__all__ = ["TypeRecorder", "count_pairs", "learn_codebook", "warn_caps"]


#: The output type of a column whose data never showed a typed batch, by codebook family.
FAMILY_TYPES = {
    "bool": "bool",
    "int": "int64",
    "uint": "uint64",
    "str": "string",
    "float": "float64",
}


class TypeRecorder:
    """Each column's Arrow type as first seen with values (a null-typed batch says nothing)."""

    def __init__(self, names: list[str]) -> None:
        self.names = names
        self.types: dict[str, pa.DataType] = {}

    def see(self, batch: pa.RecordBatch) -> None:
        """Record the types of a batch's columns that have none yet."""
        if len(self.types) == len(self.names):
            return
        for field in batch.schema:
            if field.name not in self.types and not pa.types.is_null(field.type):
                self.types[field.name] = field.type

    def type_names(self, codebook: _core.Codebook | None = None) -> list[str]:
        """Our stored name of each column's type.

        A column never seen with values gets the plain type of its codebook family (bool,
        int64, uint64, string or float64).
        """
        names = []
        for i, n in enumerate(self.names):
            if n in self.types:
                names.append(type_name(self.types[n]))
            else:
                family = "str" if codebook is None else codebook.column(i)[0]
                names.append(FAMILY_TYPES[family])
        return names


def warn_caps(caps: list[tuple[str, int, int]], max_categories: int) -> None:
    """One CategoryCapWarning per column whose rare values went to the 'other' code."""
    for column, n_values, n_rows in caps:
        warnings.warn(
            f"column {column!r}: {n_values} rare values in {n_rows} rows share the 'other' "
            f"code (max_categories={max_categories}); raise max_categories to keep them apart",
            CategoryCapWarning,
            stacklevel=4,
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
) -> Iterator[tuple[_core.Codebook, Source]]:
    """The codebook pass. Yields the codebook and the source to count from next.

    A replayable source is simply read again. A one-shot stream is spooled to a temporary Arrow
    IPC file while its codebook is learned, and counted from that file, which is removed when
    the block ends: one pass over the stream, exact counts, memory near one batch.
    """
    builder = _core.CodebookBuilder(names)
    bar.start("learning codes")
    spool: Path | None = None
    writer: _Spool | None = None
    try:
        if not source.replayable:
            fd, name = tempfile.mkstemp(prefix="treewise-spool-", suffix=".arrow")
            os.close(fd)
            spool = Path(name)
        for part in source.parts(names, batch_rows):
            with located(part.label):
                for batch in part.batches:
                    types.see(batch)
                    builder.observe(batch)
                    if spool is not None:
                        writer = writer or _Spool(spool, batch.schema)
                        writer.write(batch)
                    bar.rows(batch.num_rows)
            bar.part_done()
        if writer is not None:
            writer.close()
            writer = None
        codebook, caps = builder.finish(max_categories, n_bins)
        warn_caps(caps, max_categories)
        yield codebook, (source if spool is None else open_source(spool))
    finally:
        if writer is not None:
            writer.close()
        if spool is not None:
            spool.unlink(missing_ok=True)


def _plain(dtype: pa.DataType) -> pa.DataType:
    return dtype.value_type if pa.types.is_dictionary(dtype) else dtype


class _Spool:
    """A temporary Arrow IPC file that a one-shot stream is copied to, batch by batch."""

    def __init__(self, path: Path, schema: pa.Schema) -> None:
        self.schema = pa.schema([f.with_type(_plain(f.type)) for f in schema])
        self.writer = pa.ipc.new_file(str(path), self.schema)

    def write(self, batch: pa.RecordBatch) -> None:
        # An IPC file allows one dictionary per column, but each batch of a stream may carry
        # its own: spool plain values instead (the codebook is learned from values anyway).
        batch = pa.RecordBatch.from_arrays(
            [c.dictionary_decode() if pa.types.is_dictionary(c.type) else c for c in batch.columns],
            names=batch.schema.names,
        )
        if batch.schema != self.schema:
            try:
                batch = batch.cast(self.schema)
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError, ValueError) as e:
                raise SchemaError(
                    f"the stream's batches change schema ({self.schema} then {batch.schema}); "
                    "give every batch the same column types"
                ) from e
        self.writer.write_batch(batch)

    def close(self) -> None:
        self.writer.close()


def count_pairs(
    source: Source,
    names: list[str],
    codebook: _core.Codebook,
    stats: _core.PairStats,
    batch_rows: int,
    bar: PassProgress,
    types: TypeRecorder,
) -> None:
    """The counting pass: encode each batch with ``codebook`` and add its pair counts."""
    bar.start("counting pairs")
    for part in source.parts(names, batch_rows):
        with located(part.label):
            for batch in part.batches:
                types.see(batch)
                stats.update(codebook, batch)
                bar.rows(batch.num_rows)
        bar.part_done()
