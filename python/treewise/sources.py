"""Inputs to Arrow: every supported source becomes a stream of bounded record batches.

In memory: pyarrow Tables and RecordBatches, pandas and polars DataFrames, any object with
``__arrow_c_stream__`` or ``__arrow_c_array__``. On disk: Parquet (the main format), CSV and
Arrow IPC files, given as a path, a directory, a glob or a list of paths, and
``pyarrow.dataset`` datasets. One-shot streams: a ``pyarrow.RecordBatchReader`` or any iterator
of record batches. Files are read one at a time, with only the needed columns, in batches of at
most ``batch_rows`` rows, so memory stays near one batch whatever the size of the data.
"""

from __future__ import annotations

import glob as globbing
import itertools
import os
import queue
import sys
import threading
from collections import Counter
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from types import TracebackType
from typing import Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.dataset as pads
import pyarrow.parquet as pq

from treewise.errors import DataError, SchemaError, TreewiseError, warn
from treewise.progress import PassProgress

__all__ = [
    "BATCH_ROWS",
    "READ_AHEAD",
    "BatchLoop",
    "Part",
    "SkippedFileWarning",
    "Source",
    "as_table",
    "generated_source",
    "iter_batches",
    "open_source",
    "read_table",
    "select_columns",
]

#: Rows per batch handed to the Rust core: large enough to amortise the call, small enough that
#: memory stays bounded and Ctrl-C (checked between batches) is felt within a fraction of a second.
BATCH_ROWS = 262_144

#: Batches a file source reads ahead on its own thread while the core counts the one before:
#: at most this many wait in the queue, one more is being read and one counted.
READ_AHEAD = 2

_PARQUET = (".parquet", ".pq", ".parq")
_CSV = (".csv", ".csv.gz", ".csv.bz2", ".tsv")
_IPC = (".arrow", ".feather", ".ipc", ".arrows")


class SkippedFileWarning(UserWarning):
    """A file of the source holds no rows and was skipped."""


# -- in-memory inputs ----------------------------------------------------------------------------


def _from_pandas(frame: Any) -> pa.Table:
    bad = [c for c in frame.columns if not isinstance(c, str)]
    if bad:
        raise DataError(
            f"column names must be strings, but this DataFrame has {bad[:5]!r}; "
            "rename them first, for example df.columns = df.columns.astype(str)"
        )
    duplicated = sorted({c for c in frame.columns if list(frame.columns).count(c) > 1})
    if duplicated:
        raise SchemaError(f"the DataFrame has duplicate column names {duplicated}; rename them")
    try:
        return pa.Table.from_pandas(frame, preserve_index=False)
    except (pa.ArrowTypeError, pa.ArrowInvalid, pa.ArrowNotImplementedError) as e:
        raise DataError(
            f"could not read the pandas DataFrame as Arrow: {e}. Give each object column one "
            "type, for example df[col] = df[col].astype('string')"
        ) from e


def as_table(data: Any) -> pa.Table:
    """Turn an in-memory tabular input into a pyarrow Table without copying column buffers.

    Accepts a pyarrow Table, RecordBatch or RecordBatchReader (read to the end), a pandas
    DataFrame, or any object that implements the Arrow PyCapsule interface
    (``__arrow_c_stream__`` or ``__arrow_c_array__``), such as a polars DataFrame.
    """
    if isinstance(data, pa.Table):
        return data
    if isinstance(data, pa.RecordBatch):
        return pa.Table.from_batches([data])
    if isinstance(data, pa.RecordBatchReader):
        return data.read_all()
    pandas = sys.modules.get("pandas")
    if pandas is not None and isinstance(data, pandas.DataFrame):
        return _from_pandas(data)
    try:
        if hasattr(data, "__arrow_c_stream__"):
            return pa.RecordBatchReader.from_stream(data).read_all()
        if hasattr(data, "__arrow_c_array__"):
            return pa.Table.from_batches([pa.record_batch(data)])
    except (pa.ArrowInvalid, pa.ArrowTypeError) as e:
        # A single array or series exports a non-struct type: it is a column, not a table.
        raise TypeError(
            f"treewise needs a table, but the {type(data).__name__} given is not one ({e}); "
            "wrap a single column in a table, for example pa.table({'name': array})"
        ) from e
    raise TypeError(
        f"treewise cannot read a {type(data).__name__}; pass a pyarrow Table, RecordBatch or "
        "RecordBatchReader, a pandas or polars DataFrame, any object with __arrow_c_stream__, "
        "a path (Parquet, CSV or Arrow IPC file, directory or glob), a list of paths, a "
        "pyarrow.dataset.Dataset, or an iterator of record batches"
    )


def select_columns(table: pa.Table, columns: Sequence[str] | None) -> pa.Table:
    """Check the column names and keep ``columns`` (all of them when None), in that order."""
    return table.select(check_columns(table.column_names, columns, "the data"))


def check_columns(names: Sequence[str], columns: Sequence[str] | None, where: str) -> list[str]:
    """The columns to read from data that has ``names``: all of them, or ``columns``, checked."""
    nul = [n for n in names if "\x00" in n]
    if nul:
        raise SchemaError(
            f"column names may not contain the NUL character, but {where} has {nul!r}; rename them"
        )
    counts = Counter(names)
    duplicated = sorted(n for n, k in counts.items() if k > 1)
    if columns is None:
        if duplicated:
            raise SchemaError(
                f"{where} has duplicate column names {duplicated}; rename them, or pick distinct "
                "ones with columns="
            )
        if not names:
            raise DataError(f"{where} has no columns; a dependency tree needs at least one")
        return list(names)
    if isinstance(columns, str) or not all(isinstance(c, str) for c in columns):
        raise TypeError(f"columns= must be a list of column names, got {columns!r}")
    wanted = list(columns)
    if not wanted:
        raise DataError("columns= is empty; name at least one column")
    repeated = sorted({c for c in wanted if wanted.count(c) > 1})
    if repeated:
        raise SchemaError(f"columns= names {repeated} more than once; name each column once")
    missing = [c for c in wanted if c not in counts]
    if missing:
        raise SchemaError(f"columns {missing} are not in {where}; it has {list(names)}")
    ambiguous = [c for c in wanted if c in duplicated]
    if ambiguous:
        raise SchemaError(f"{where} has more than one column named {ambiguous}; rename them")
    return wanted


def iter_batches(table: pa.Table, batch_rows: int = BATCH_ROWS) -> Iterator[pa.RecordBatch]:
    """Yield the table's non-empty record batches of at most ``batch_rows`` rows (zero-copy)."""
    for batch in table.to_batches(max_chunksize=batch_rows):
        if batch.num_rows:
            yield batch


# -- files ---------------------------------------------------------------------------------------


def _format_of(path: Path) -> str:
    name = path.name.lower()
    for fmt, endings in (("parquet", _PARQUET), ("csv", _CSV), ("ipc", _IPC)):
        if name.endswith(endings):
            return fmt
    with open(path, "rb") as f:
        head = f.read(8)
    if head.startswith(b"PAR1"):
        return "parquet"
    if head.startswith(b"ARROW1") or head.startswith(b"\xff\xff\xff\xff"):
        return "ipc"
    raise DataError(
        f"cannot tell the format of {path}; give it a .parquet, .csv or .arrow name, or "
        "convert it to Parquet"
    )


def _is_data_file(path: Path) -> bool:
    name = path.name.lower()
    hidden = name.startswith((".", "_"))
    return path.is_file() and not hidden and name.endswith(_PARQUET + _CSV + _IPC)


def expand_paths(spec: str | os.PathLike[str] | Sequence[str | os.PathLike[str]]) -> list[Path]:
    """Files named by a path, a directory (searched recursively), a glob, or a list of those."""
    specs = [spec] if isinstance(spec, (str, os.PathLike)) else list(spec)
    if not specs:
        raise DataError("the list of paths is empty; name at least one file")
    files: list[Path] = []
    for item in specs:
        text = os.fspath(item)
        path = Path(text)
        if path.is_dir():
            found = sorted(p for p in path.rglob("*") if _is_data_file(p))
            if not found:
                raise DataError(
                    f"the directory {path} holds no Parquet, CSV or Arrow IPC files "
                    "(names ending in .parquet, .csv, .arrow and the like)"
                )
            files.extend(found)
        elif path.is_file():
            files.append(path)
        elif globbing.has_magic(text):
            matched = sorted(Path(p) for p in globbing.glob(text, recursive=True))
            matched = [p for p in matched if p.is_file()]
            if not matched:
                raise FileNotFoundError(f"no files match {text}")
            files.extend(matched)
        else:
            raise FileNotFoundError(f"no such file or directory: {text}")
    return files


@dataclass
class Part:
    """One piece of a source (a file, or the whole in-memory table) and its batches."""

    label: str
    batches: Iterator[pa.RecordBatch]


#: Errors of reading a file that become a DataError naming it (missing files stay as they are).
_READ_ERRORS = (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError, OSError)


def _relocated(error: Exception, label: str, rows: str = "") -> Exception | None:
    """``error`` with the part (file) and rows named in it, or None to re-raise it unchanged."""
    where = ", ".join(text for text in (label, rows) if text)
    if isinstance(error, TreewiseError):
        if where and not (label and label in str(error)):
            return type(error)(f"{where}: {error}")
        return None
    if isinstance(error, _READ_ERRORS):
        if isinstance(error, (FileNotFoundError, IsADirectoryError, PermissionError)):
            return None
        return DataError(f"{where or 'the data'}: cannot read it: {error}")
    return None


@contextmanager
def _located(label: str) -> Iterator[None]:
    """Re-raise an error while reading ``label`` with the file (or source) named in it."""
    try:
        yield
    except Exception as e:
        relocated = _relocated(e, label)
        if relocated is None:
            raise
        raise relocated from e


def _file_columns(path: Path, fmt: str) -> list[str]:
    with _located(str(path)):
        if fmt == "parquet":
            return list(pq.ParquetFile(path).schema_arrow.names)
        if fmt == "ipc":
            return list(_open_ipc(path).schema.names)
        with pacsv.open_csv(path) as reader:
            return list(reader.schema.names)


def _open_ipc(path: Path) -> Any:
    try:
        return pa.ipc.open_file(str(path))
    except pa.ArrowInvalid:
        return pa.ipc.open_stream(pa.OSFile(str(path), "rb"))


def _file_batches(
    path: Path, fmt: str, names: list[str], batch_rows: int
) -> Iterator[pa.RecordBatch]:
    present = _file_columns(path, fmt)
    missing = [n for n in names if n not in present]
    if missing:
        raise SchemaError(
            f"{path}: columns {missing} are missing (the file has {present}); every file must "
            "hold the modelled columns"
        )
    if fmt == "parquet":
        parquet = pq.ParquetFile(path)
        for batch in parquet.iter_batches(batch_size=batch_rows, columns=names):
            yield batch
    elif fmt == "ipc":
        reader = _open_ipc(path)
        batches = (
            (reader.get_batch(i) for i in range(reader.num_record_batches))
            if isinstance(reader, pa.ipc.RecordBatchFileReader)
            else reader
        )
        for batch in batches:
            yield from pa.Table.from_batches([batch.select(names)]).to_batches(batch_rows)
    else:
        options = pacsv.ConvertOptions(include_columns=names)
        with pacsv.open_csv(path, convert_options=options) as reader:
            for batch in reader:
                yield from pa.Table.from_batches([batch]).to_batches(batch_rows)


def _file_rows(path: Path, fmt: str) -> int | None:
    if fmt == "parquet":
        with _located(str(path)):
            return int(pq.ParquetFile(path).metadata.num_rows)
    return None


# -- the source ----------------------------------------------------------------------------------


@dataclass
class Source:
    """Data to read in record batches, one part (file) at a time.

    ``replayable`` says whether the data can be read more than once (a codebook pass, then a
    counting pass). ``total_rows`` is known up front for in-memory tables and Parquet files.
    """

    names: list[str]
    replayable: bool
    parts: Callable[[list[str], int], Iterator[Part]]
    n_parts: int = 1
    total_rows: int | None = None
    description: str = "data"
    files: list[Path] = field(default_factory=list)
    #: Read ahead on a thread (files: decoding releases the GIL, so it overlaps the counting).
    read_ahead: bool = False


def _memory_source(table: pa.Table) -> Source:
    def parts(names: list[str], batch_rows: int) -> Iterator[Part]:
        yield Part("", iter_batches(table.select(names), batch_rows))

    return Source(table.column_names, True, parts, 1, table.num_rows, "the data")


def _file_source(files: list[Path]) -> Source:
    formats = [_format_of(p) for p in files]
    first_names = _file_columns(files[0], formats[0])
    rows = [_file_rows(p, f) for p, f in zip(files, formats, strict=True)]
    total = None if any(r is None for r in rows) else sum(r for r in rows if r is not None)

    skipped: set[Path] = set()

    def parts(names: list[str], batch_rows: int) -> Iterator[Part]:
        for path, fmt, n in zip(files, formats, rows, strict=True):
            if n == 0:
                if path not in skipped:  # once, not once per pass
                    skipped.add(path)
                    warn(f"skipped {path}: it holds no rows", SkippedFileWarning)
                continue
            yield Part(str(path), _file_batches(path, fmt, names, batch_rows))

    what = f"the data ({len(files)} file{'s' if len(files) != 1 else ''})"
    return Source(first_names, True, parts, len(files), total, what, files, read_ahead=True)


def _dataset_source(dataset: pads.Dataset) -> Source:
    if isinstance(dataset, pads.FileSystemDataset) and isinstance(
        dataset.filesystem, pa.fs.LocalFileSystem
    ):
        # Read file by file: the dataset scanner is known to hold on to memory.
        return _file_source([Path(f) for f in dataset.files])

    def parts(names: list[str], batch_rows: int) -> Iterator[Part]:
        yield Part("dataset", dataset.to_batches(columns=names, batch_size=batch_rows))

    return Source(list(dataset.schema.names), True, parts, 1, None, "the dataset", read_ahead=True)


def _stream_source(batches: Iterable[Any], names: list[str] | None) -> Source:
    iterator = iter(batches)
    first: list[Any] = []
    if names is None:
        # Peek at the first item for the column names.
        for item in iterator:
            first.append(item)
            break
        if not first:
            raise DataError("the stream of record batches is empty; a fit needs at least one row")
        names = list(_as_table(first[0]).schema.names)
    consumed = False

    def parts(wanted: list[str], batch_rows: int) -> Iterator[Part]:
        nonlocal consumed
        if consumed:
            raise DataError(
                "this stream of record batches has been read once already and cannot be replayed"
            )
        consumed = True

        def read() -> Iterator[pa.RecordBatch]:
            for item in itertools.chain(first, iterator):
                table = _as_table(item)
                missing = [n for n in wanted if n not in table.schema.names]
                if missing:
                    raise SchemaError(f"a batch of the stream lacks the columns {missing}")
                yield from iter_batches(table.select(wanted), batch_rows)

        yield Part("stream", read())

    return Source(list(names), False, parts, 1, None, "the stream of record batches")


def _as_table(item: Any) -> pa.Table:
    """One item of a stream (a record batch, a table, or any Arrow producer) as a table."""
    if isinstance(item, (pa.RecordBatch, pa.Table)) or hasattr(item, "__arrow_c_array__"):
        return as_table(item)
    raise TypeError(f"a stream must yield Arrow record batches, got a {type(item).__name__}")


def open_source(data: Any) -> Source:
    """Describe any supported input as a :class:`Source` (nothing is read yet but metadata).

    A :class:`Source` is returned as it is.
    """
    if isinstance(data, Source):
        return data
    if isinstance(data, (str, os.PathLike)):
        return _file_source(expand_paths(data))
    if (
        isinstance(data, (list, tuple))
        and data
        and all(isinstance(p, (str, os.PathLike)) for p in data)
    ):
        return _file_source(expand_paths(data))
    if isinstance(data, pads.Dataset):
        return _dataset_source(data)
    if isinstance(data, pa.RecordBatchReader):
        return _stream_source(data, data.schema.names)
    if (
        isinstance(data, (list, tuple))
        and data
        and all(isinstance(b, (pa.RecordBatch, pa.Table)) for b in data)
    ):
        tables = [b if isinstance(b, pa.Table) else pa.Table.from_batches([b]) for b in data]
        return _memory_source(pa.concat_tables(tables))
    if isinstance(data, Iterator):
        return _stream_source(data, None)
    return _memory_source(as_table(data))


def generated_source(
    batches: Iterator[pa.RecordBatch], names: list[str], total_rows: int | None, description: str
) -> Source:
    """Batches made as they are read (sampled rows) as a one-part source that is read once."""

    def parts(wanted: list[str], batch_rows: int) -> Iterator[Part]:
        yield Part("", batches)

    return Source(names, False, parts, 1, total_rows, description)


# -- the one loop over a source's batches --------------------------------------------------------


class BatchLoop:
    """One pass over a source's batches, part (file) by part, that knows where it is.

    Iterate over it for the batches of ``names``, at most ``batch_rows`` rows each. With a
    ``bar``, the pass starts a bar titled ``title`` and counts rows after each batch has been
    handled and files after each part. Used as a context manager around the loop, any error
    raised inside the block (reading a batch, or handling it) is re-raised with the file and the
    batch's rows named in it: ``data/part-3.parquet, rows 262,144-524,287: ...``. Ctrl-C
    (KeyboardInterrupt) passes through unchanged: Python notices it between batches, the core
    within a batch.

    Examples
    --------
    >>> with BatchLoop(source, names, bar=bar, title="counting pairs") as batches:  # doctest: +SKIP
    ...     for batch in batches:
    ...         stats.update(codebook, batch)
    """

    def __init__(
        self,
        source: Source,
        names: list[str],
        batch_rows: int = BATCH_ROWS,
        bar: PassProgress | None = None,
        title: str = "",
    ) -> None:
        self.source = source
        self.names = names
        self.batch_rows = batch_rows
        self.bar = bar
        self.title = title
        #: The part being read ("" for in-memory data), the batch's first row in it, its rows.
        self.label = ""
        self.first_row = 0
        self.n_rows = 0

    def __iter__(self) -> Iterator[pa.RecordBatch]:
        if self.bar is not None and self.title:
            self.bar.start(self.title)
        reader = _ReadAhead(self.source, self.names, self.batch_rows)
        started = False
        try:
            for label, batch in reader:
                if batch is None:  # a new part
                    if started and self.bar is not None:
                        self.bar.part_done()
                    started = True
                    self.label, self.first_row, self.n_rows = label, 0, 0
                    continue
                self.first_row += self.n_rows
                self.n_rows = batch.num_rows
                yield batch
                if self.bar is not None:
                    self.bar.rows(batch.num_rows)
            if started and self.bar is not None:
                self.bar.part_done()
        finally:
            reader.close()
        # Past the last batch, an error belongs to no file.
        self.label, self.first_row, self.n_rows = "", 0, 0

    def rows(self) -> str:
        """The current batch's rows within its part, as text ("" before the first batch)."""
        if self.n_rows == 0 or (not self.label and self.first_row == 0):
            return ""  # the first batch of in-memory data: its rows are the data's
        return f"rows {self.first_row:,}-{self.first_row + self.n_rows - 1:,}"

    def __enter__(self) -> BatchLoop:
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        value: BaseException | None,
        trace: TracebackType | None,
    ) -> None:
        if isinstance(value, Exception):
            relocated = _relocated(value, self.label, self.rows())
            if relocated is not None:
                raise relocated from value


class _ReadAhead:
    """A source's (part label, batch) pairs, read ahead on a thread when the source allows it.

    Files are read up to ``READ_AHEAD`` batches ahead, other sources in turn. Each part starts
    with (label, None). An error while reading is raised where its batch would have come, after
    its part's label, so the loop names the file.
    """

    _DONE = object()

    def __init__(self, source: Source, names: list[str], batch_rows: int) -> None:
        self._parts = source.parts(names, batch_rows)
        self._stop = threading.Event()
        self._queue: queue.Queue[Any] | None = None
        self._thread: threading.Thread | None = None
        if source.read_ahead and READ_AHEAD > 0:
            self._queue = queue.Queue(maxsize=READ_AHEAD)
            self._thread = threading.Thread(
                target=self._read, name="treewise-read-ahead", daemon=True
            )
            self._thread.start()

    def _pairs(self) -> Iterator[tuple[str, pa.RecordBatch | None]]:
        for part in self._parts:
            yield part.label, None
            for batch in part.batches:
                yield part.label, batch

    def _put(self, item: Any) -> bool:
        assert self._queue is not None
        while not self._stop.is_set():
            try:
                self._queue.put(item, timeout=0.05)
                return True
            except queue.Full:
                continue
        return False

    def _read(self) -> None:
        try:
            for pair in self._pairs():
                if not self._put(pair):
                    return
        except BaseException as e:  # handed to the reading loop, which raises it
            self._put(e)
            return
        self._put(self._DONE)

    def __iter__(self) -> Iterator[tuple[str, pa.RecordBatch | None]]:
        if self._queue is None:
            yield from self._pairs()
            return
        while True:
            item = self._queue.get()
            if item is self._DONE:
                return
            if isinstance(item, BaseException):
                raise item
            yield item

    def close(self) -> None:
        """Stops the reading thread (it finishes the batch it is decoding) and drops the queue."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
        if self._queue is not None:
            while not self._queue.empty():
                self._queue.get_nowait()


def read_table(data: Any, columns: list[str] | None = None) -> pa.Table:
    """Any source (or an opened ``Source``) as one in-memory table; ``columns``: only these."""
    source = data if isinstance(data, Source) else open_source(data)
    if columns is not None:
        columns = check_columns(source.names, columns, source.description)
    with BatchLoop(source, columns or list(source.names)) as batches:
        tables = [pa.Table.from_batches([batch]) for batch in batches]
    if not tables:
        return pa.table({c: pa.nulls(0) for c in (columns or source.names)})
    return pa.concat_tables(tables, promote_options="default")


def row_keys(seed: int, start: int, n: int) -> npt.NDArray[np.uint64]:
    """A pseudo-random 64-bit key per global row index ``start .. start + n``.

    splitmix64's finaliser (from memory) on the index plus the seed: a row's key depends on the
    seed and its position in the whole data alone, whatever the batches or partitions.
    """
    z = np.arange(start, start + n, dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15)
    z = z + np.uint64(seed % 2**64)
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return z ^ (z >> np.uint64(31))


def sample_rows(
    data: Any, size: int, seed: int, columns: list[str] | None = None
) -> tuple[pa.Table, int]:
    """A uniform random sample of at most ``size`` rows of any source, read in one pass.

    Returns the sampled rows in their order in the data, and how many rows the data has. The
    rows kept are those with the ``size`` smallest ``row_keys`` (ties by position), so the
    sample depends on the seed and the data alone, not on the batches; memory holds about
    twice ``size`` rows.
    """
    source = data if isinstance(data, Source) else open_source(data)
    names = check_columns(source.names, columns, source.description) if columns else None
    parts: list[pa.Table] = []
    keys: list[npt.NDArray[np.uint64]] = []
    threshold: np.uint64 | None = None
    n = 0

    def compact() -> None:
        nonlocal threshold
        table = pa.concat_tables(parts, promote_options="default")
        every = np.concatenate(keys)
        keep = np.sort(np.argsort(every, kind="stable")[:size])
        parts[:] = [table.take(keep)]
        keys[:] = [every[keep]]
        if len(keep) == size:
            threshold = every[keep].max()

    with BatchLoop(source, names or list(source.names)) as batches:
        for batch in batches:
            batch_keys = row_keys(seed, n, batch.num_rows)
            n += batch.num_rows
            enter = np.ones(batch.num_rows, bool) if threshold is None else batch_keys <= threshold
            if enter.any():
                parts.append(pa.Table.from_batches([batch]).filter(pa.array(enter)))
                keys.append(batch_keys[enter])
            if sum(len(k) for k in keys) > 2 * size:
                compact()
    if not parts:
        return pa.table({c: pa.nulls(0) for c in (names or source.names)}), n
    compact()
    return parts[0], n
