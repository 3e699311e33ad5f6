"""A mixture's components for the views: each as a drawable tree, its edges, the rows it fits."""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, cast

import numpy as np
import numpy.typing as npt

from treewise.errors import DataError, UnseenCategoryWarning

if TYPE_CHECKING:
    from treewise import _core
    from treewise.estimator import DependencyTree
    from treewise.mixture import TreeMixture

__all__ = [
    "Assignment",
    "ComponentTree",
    "assign",
    "component_edges",
    "component_tree",
    "shared_edges",
    "single_edges",
]

Pair = frozenset[str]


@dataclass(frozen=True)
class ComponentTree:
    """One component as the tree views read a tree: names, categories, parents, strengths.

    ``plot_tree`` and ``tree_view`` read only these attributes (and ``_fitted``/``_index``,
    answered by the single tree whose codebook the mixture shares).
    """

    feature_names_in_: npt.NDArray[np.object_]
    categories_: list[list[Any]]
    parent_: npt.NDArray[np.intp]
    mutual_info_: npt.NDArray[np.float64]
    n_rows_: int
    _single: DependencyTree

    def _fitted(self) -> _core.TreeModel:
        return self._single._fitted()

    def _index(self, column: str | int) -> int:
        return self._single._index(column)


def component_tree(mixture: TreeMixture, k: int) -> DependencyTree:
    """Component ``k`` of ``mixture`` as a tree the views draw (``n_rows_``: its weighted rows).

    Typed as a ``DependencyTree`` for the views, which read only what ``ComponentTree`` has.
    """
    comp = mixture.components_[k]
    single = mixture.single_tree_
    view = ComponentTree(
        single.feature_names_in_,
        single.categories_,
        comp.parent_,
        comp.mutual_info_,
        round(comp.weight * int(mixture.n_rows_)),
        single,
    )
    return cast("DependencyTree", view)


def _pairs(names: Sequence[str], parent: npt.NDArray[np.intp]) -> set[Pair]:
    return {frozenset((names[int(p)], names[c])) for c, p in enumerate(parent) if p >= 0}


def shared_edges(mixture: TreeMixture) -> set[Pair]:
    """The edges (unordered pairs of column names) every component's tree has."""
    names = [str(n) for n in mixture.feature_names_in_]
    sets = [_pairs(names, comp.parent_) for comp in mixture.components_]
    return set.intersection(*sets) if sets else set()


def single_edges(mixture: TreeMixture) -> set[Pair]:
    """The edges of the single tree whose codebook the mixture shares."""
    names = [str(n) for n in mixture.feature_names_in_]
    return _pairs(names, mixture.single_tree_.parent_)


def component_edges(mixture: TreeMixture, k: int) -> list[dict[str, Any]]:
    """Component ``k``'s edges, strongest first (ties by child column order).

    Each is a dict: ``parent``, ``child``, ``mutual_info`` (the component's weighted mutual
    information, nats), ``shared`` (every component has the edge), ``in_single`` (the single
    tree has it) and ``single_mutual_info`` (the pair's mutual information in the single
    tree's counts; None for a loaded tree, which keeps only its own edges').
    """
    names = [str(n) for n in mixture.feature_names_in_]
    comp = mixture.components_[k]
    shared, single = shared_edges(mixture), single_edges(mixture)
    pairwise = np.asarray(mixture.single_tree_.pairwise_mutual_info_)
    # A loaded tree keeps only its own edges' mutual information (the rest reads 0).
    everywhere = np.count_nonzero(pairwise) > 2 * len(single)
    rows = []
    children = [c for c, p in enumerate(comp.parent_) if p >= 0]
    for c in sorted(children, key=lambda c: (-float(comp.mutual_info_[c]), c)):
        p = int(comp.parent_[c])
        pair = frozenset((names[int(p)], names[c]))
        known = everywhere or pair in single
        rows.append(
            {
                "parent": names[int(p)],
                "child": names[c],
                "mutual_info": float(comp.mutual_info_[c]),
                "shared": pair in shared,
                "in_single": pair in single,
                "single_mutual_info": float(pairwise[p, c]) if known else None,
            }
        )
    return rows


@dataclass(frozen=True)
class Assignment:
    """Which rows of some data each component explains, and how well both models fit them.

    ``best`` is each row's most responsible component; ``typical[k]`` the positions of the
    rows assigned to ``k`` with the highest responsibility for ``k`` (ties: the higher mixture
    log-likelihood, then the earlier row).
    """

    scores: npt.NDArray[np.float64]  # ln p(row) under the mixture
    tree_scores: npt.NDArray[np.float64]  # ln p(row) under the single tree
    responsibilities: npt.NDArray[np.float64]
    best: npt.NDArray[np.intp]
    counts: npt.NDArray[np.int64]
    typical: list[npt.NDArray[np.int64]]

    @property
    def gain(self) -> float:
        """Mean log-likelihood per row of the mixture minus the single tree's (nats)."""
        return float(self.scores.mean() - self.tree_scores.mean())


def assign(mixture: TreeMixture, data: Any, typical: int) -> Assignment:
    """Score ``data`` under the mixture and its single tree, and assign every row.

    ``data`` is read twice: make a one-shot stream replayable first.
    """
    scores, resp = mixture._mixed(data)  # one pass gives both
    if len(scores) == 0:
        raise DataError("the data has 0 rows; there is nothing to assign to the components")
    with warnings.catch_warnings():
        # The mixture has already warned about values never seen in fitting.
        warnings.simplefilter("ignore", UnseenCategoryWarning)
        tree_scores = mixture.single_tree_.score_samples(data)
    k = len(mixture.components_)
    best = np.asarray(np.argmax(resp, axis=1), dtype=np.intp)
    counts = np.bincount(best, minlength=k).astype(np.int64)
    picks = []
    for j in range(k):
        rows = np.flatnonzero(best == j)
        order = np.lexsort((rows, -scores[rows], -resp[rows, j]))
        picks.append(rows[order[:typical]].astype(np.int64))
    return Assignment(scores, tree_scores, resp, best, counts, picks)
