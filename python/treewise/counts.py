"""The fitted tree's exact counts as tables: its edges, each column's counts and any pair's."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa

from treewise.errors import NotFittedError

if TYPE_CHECKING:
    from treewise import _core

__all__ = ["ExactCounts", "u64"]


def u64(data: bytes) -> npt.NDArray[np.uint64]:
    """Little-endian u64 bytes from the core as a numpy array."""
    return np.frombuffer(data, dtype="<u8").astype(np.uint64)


class ExactCounts:
    """The exact-count views of a fitted ``DependencyTree`` (mixed into it)."""

    feature_names_in_: npt.NDArray[Any]
    categories_: list[list[Any]]
    parent_: npt.NDArray[np.intp]
    _stats: _core.PairStats | None

    def _fitted(self) -> _core.TreeModel:
        raise NotImplementedError

    def _index(self, column: str | int) -> int:
        raise NotImplementedError

    def edges(self) -> pa.Table:
        """The tree's edges, parents before children.

        Returns
        -------
        pyarrow.Table
            Columns ``parent``, ``child`` (names), ``mutual_info`` (nats), ``g_statistic``
            (2·N·MI), ``dof`` ((r_parent−1)(r_child−1) over the codes that occur) and ``p_value``
            (the G-test of independence against chi-square with ``dof``).
        """
        edges = self._fitted().edges()
        names = list(self.feature_names_in_)
        return pa.table(
            {
                "parent": pa.array([names[e[0]] for e in edges], pa.string()),
                "child": pa.array([names[e[1]] for e in edges], pa.string()),
                "mutual_info": pa.array([e[2] for e in edges], pa.float64()),
                "g_statistic": pa.array([e[3] for e in edges], pa.float64()),
                "dof": pa.array([e[4] for e in edges], pa.int64()),
                "p_value": pa.array([e[5] for e in edges], pa.float64()),
            }
        )

    def marginal_counts(self, column: str | int) -> npt.NDArray[np.uint64]:
        """The exact count of each code of ``column``, aligned with ``categories_``.

        For a private model, the released noisy counts (after post-processing).
        """
        i = self._index(column)
        counts = u64(self._fitted().counts(i)).reshape(-1, len(self.categories_[i]))
        total: npt.NDArray[np.uint64] = counts.sum(axis=0, dtype=np.uint64)
        return total

    def joint_counts(self, first: str | int, second: str | int) -> npt.NDArray[np.uint64]:
        """The exact contingency table of two columns, rows by ``first``'s codes.

        Every pair is available right after ``fit``; a loaded model keeps only its edges. For a
        private model, the released noisy table of an edge (after post-processing); it has no
        other pairs.
        """
        i, j = self._index(first), self._index(second)
        if i == j:
            return np.diag(self.marginal_counts(i))
        shape = (len(self.categories_[i]), len(self.categories_[j]))
        if self.parent_[j] == i:
            return u64(self._fitted().counts(j)).reshape(shape)
        if self.parent_[i] == j:
            return u64(self._fitted().counts(i)).reshape(shape[::-1]).T.copy()
        if self._stats is None and self._fitted().privacy is not None:
            names = self.feature_names_in_
            raise NotFittedError(
                f"{names[i]!r} and {names[j]!r} are not joined by an edge, and a private model "
                "releases only the tables of its edges"
            )
        if self._stats is None:
            names = self.feature_names_in_
            raise NotFittedError(
                f"{names[i]!r} and {names[j]!r} are not joined by an edge, and a loaded model "
                "keeps only the tables of its edges; refit to see every pair"
            )
        a, b = min(i, j), max(i, j)
        table = u64(self._stats.table(a, b)).reshape(len(self.categories_[a]), -1)
        return (table if i < j else table.T).copy()
