"""PairStats in public: exact pair counts over one codebook, mergeable by addition."""

from __future__ import annotations

import os
from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from treewise import _core
from treewise.decode import widen
from treewise.errors import SchemaError
from treewise.files import read_model_file, write_atomically
from treewise.passes import TypeRecorder, count_pairs
from treewise.progress import PassProgress, wants_progress
from treewise.sources import BATCH_ROWS, check_columns, open_source

__all__ = ["PairStats"]


class PairStats:
    """Exact counts of rows, of each column's codes and of every pair of columns.

    Two PairStats counted with the same codebook add up exactly (``a + b``), so statistics from
    files, batches, threads or cluster workers merge into the same numbers as one pass over all
    the data. ``DependencyTree.from_stats`` turns them into a model.

    Parameters
    ----------
    codebook : Codebook
        The encoding to count with, e.g. a fitted model's ``codebook_``.
    dtypes : list of str, optional
        The Arrow type name of each column, for the types ``sample`` returns; by default the
        type the first counted data has.
    """

    def __init__(self, codebook: _core.Codebook, dtypes: Sequence[str] | None = None) -> None:
        if not isinstance(codebook, _core.Codebook):
            raise TypeError(f"PairStats needs a treewise Codebook, got {codebook!r}")
        self.codebook = codebook
        self._stats = _core.PairStats(codebook)
        self._dtypes = None if dtypes is None else list(dtypes)

    @classmethod
    def from_counts(
        cls,
        codebook: _core.Codebook,
        counts: _core.PairStats,
        dtypes: Sequence[str] | None = None,
    ) -> PairStats:
        """Wrap counts already taken with ``codebook`` (as the one-pass fit takes them)."""
        if list(counts.cardinalities) != list(codebook.cardinalities):
            raise SchemaError("these counts were not taken with this codebook")
        stats = cls(codebook, dtypes)
        stats._stats = counts
        return stats

    @classmethod
    def from_source(
        cls,
        data: Any,
        codebook: _core.Codebook,
        *,
        progress: bool | None = None,
        batch_rows: int = BATCH_ROWS,
    ) -> PairStats:
        """Count any source (table, files, stream) with ``codebook`` in one pass."""
        stats = cls(codebook)
        stats.update(data, progress=progress, batch_rows=batch_rows)
        return stats

    @property
    def columns(self) -> list[str]:
        """The counted columns, in order."""
        return list(self.codebook.names)

    @property
    def n_rows(self) -> int:
        """Rows counted so far."""
        return self._stats.n_rows

    @property
    def dtypes(self) -> list[str]:
        """Each column's Arrow type name (``string`` until data has been seen)."""
        if self._dtypes is None:
            return TypeRecorder(self.columns).type_names(self.codebook)
        return list(self._dtypes)

    def update(
        self, data: Any, *, progress: bool | None = False, batch_rows: int = BATCH_ROWS
    ) -> PairStats:
        """Count more data (any source with the codebook's columns); returns ``self``."""
        source = open_source(data)
        names = check_columns(source.names, self.columns, source.description)
        types = TypeRecorder(names)
        with PassProgress(wants_progress(progress), source.total_rows, source.n_parts) as bar:
            count_pairs(source, names, self.codebook, self._stats, batch_rows, bar, types)
        if types.types:
            seen = types.type_names(self.codebook)
            self._dtypes = (
                seen
                if self._dtypes is None
                else [widen(a, b) for a, b in zip(self._dtypes, seen, strict=True)]
            )
        return self

    def __add__(self, other: object) -> PairStats:
        if not isinstance(other, PairStats):
            return NotImplemented
        if other.codebook != self.codebook:
            raise SchemaError(
                "cannot add PairStats counted with different codebooks; count both with the "
                "same codebook (for example a fitted model's codebook_)"
            )
        if self._dtypes is None or other._dtypes is None:
            dtypes = self._dtypes or other._dtypes
        else:
            dtypes = [widen(a, b) for a, b in zip(self._dtypes, other._dtypes, strict=True)]
        total = PairStats(self.codebook, dtypes)
        total._stats = self._stats.copy()
        total._stats.merge(other._stats)
        return total

    def __radd__(self, other: object) -> PairStats:
        # So that sum([a, b, c]) works: sum starts from 0.
        if other == 0:
            return self
        return self.__add__(other)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, PairStats):
            return NotImplemented
        return bool(self.codebook == other.codebook and self._stats == other._stats)

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return f"PairStats({len(self.columns)} columns, {self.n_rows:,} rows)"

    def marginal_counts(self, column: str) -> npt.NDArray[np.uint64]:
        """The count of each code of ``column``."""
        return np.frombuffer(self._stats.marginal(self._index(column)), "<u8").astype(np.uint64)

    def joint_counts(self, first: str, second: str) -> npt.NDArray[np.uint64]:
        """The contingency table of two columns, rows by ``first``'s codes."""
        i, j = self._index(first), self._index(second)
        if i == j:
            return np.diag(self.marginal_counts(first))
        a, b = min(i, j), max(i, j)
        cards = self._stats.cardinalities
        table = np.frombuffer(self._stats.table(a, b), "<u8").astype(np.uint64)
        table = table.reshape(cards[a], cards[b])
        return table if i < j else table.T.copy()

    def _index(self, column: str) -> int:
        if column not in self.columns:
            raise KeyError(f"{column!r} is not a counted column; they are {self.columns}")
        return self.columns.index(column)

    def to_bytes(self) -> bytes:
        """The statistics file's bytes (our own versioned layout, with a checksum)."""
        return self._stats.to_bytes(self.codebook, self.dtypes)

    @classmethod
    def from_bytes(cls, data: bytes) -> PairStats:
        """Read statistics from bytes, checking every length and count before use."""
        codebook, dtypes, stats = _core.PairStats.from_bytes(data)
        out = cls(codebook, dtypes)
        out._stats = stats
        return out

    def save(self, path: str | os.PathLike[str]) -> None:
        """Write the statistics to ``path`` atomically."""
        write_atomically(path, self.to_bytes())

    @classmethod
    def load(cls, path: str | os.PathLike[str]) -> PairStats:
        """Read statistics written by :meth:`save`."""
        return cls.from_bytes(read_model_file(path))

    def __getstate__(self) -> dict[str, bytes]:
        return {"bytes": self.to_bytes()}

    def __setstate__(self, state: dict[str, bytes]) -> None:
        other = PairStats.from_bytes(state["bytes"])
        self.__dict__.update(other.__dict__)
