"""Plain numpy reference of a Chow-Liu dependency-tree fit: the executable specification.

A fit runs in four steps, and the Rust core must agree with each one bit for bit:

1. :func:`encode_column` turns every column into integer codes ``0 .. r-1``.
2. :func:`pair_table` counts each pair of columns into an ``r_i x r_j`` contingency table.
3. :func:`mutual_information` scores each table with a canonical, order-fixed float recipe.
4. :func:`spanning_tree` keeps a maximum-weight spanning tree (Kruskal, strict tie order), and
   :func:`orient` points it away from the root in breadth-first order.

The method is the dependency tree of Chow & Liu (1968). :func:`fit` runs all four steps.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from treewise.categories import OTHER, Bin

__all__ = [
    "TAIL_LIMIT",
    "LeftOut",
    "ReferenceComponent",
    "ReferenceTree",
    "Tail",
    "centre",
    "encode_column",
    "encode_like",
    "fit",
    "mixture_em_step",
    "mixture_log_likelihoods",
    "mixture_m_step",
    "mutual_information",
    "orient",
    "pair_table",
    "sample",
    "score_samples",
    "spanning_tree",
    "weighted_pair_stats",
]

IntArray = npt.NDArray[np.int64]
FloatArray = npt.NDArray[np.float64]
Category = object  # a kept bool/int/str value, a Bin, OTHER, or None (the null code)


class LeftOut(ValueError):
    """A column that is not modelled: it holds only nulls, or looks like an identifier."""


#: Rows needed before a column can look like an identifier.
IDENTIFIER_MIN_ROWS = 20


def _looks_like_identifier(n: int, distinct: int) -> bool:
    """Nearly every value distinct (at least 95%), in enough rows to say so."""
    return n >= IDENTIFIER_MIN_ROWS and distinct * 20 >= n * 19


def encode_column(
    values: npt.NDArray[np.generic], max_categories: int = 128, n_bins: int = 10, name: str = "?"
) -> tuple[IntArray, list[Category]]:
    """Encode one column as integer codes ``0 .. r-1``, choosing its kind from its values.

    Parameters
    ----------
    values : numpy.ndarray
        A float array (NaN is null) or an object array of bool, int or str values (``None`` is
        null). A column of numbers with more than ``n_bins`` distinct values is numeric: it is
        cut into at most ``n_bins`` quantile bins, then one code per infinity seen, then null.
        Any other column is categorical, keeping at most ``max_categories`` codes, counting the
        "other" and null codes.
    max_categories, n_bins : int
        The caps above.
    name : str
        Column name, for error messages.

    Returns
    -------
    codes : numpy.ndarray of int64
        The code of each row.
    categories : list
        What each code stands for: kept values (or :class:`Bin` then infinities), then OTHER,
        then None.

    Raises
    ------
    LeftOut
        If the column is all null, or looks like an identifier: strings nearly all distinct, or
        integers nearly all distinct over a range at most twice their number.
    ValueError
        If the column is not 1-D or mixes value types.
    """
    if values.ndim != 1:
        raise ValueError(f"column {name!r} is not one-dimensional")
    if np.issubdtype(values.dtype, np.floating):
        x = values.astype(np.float64)
        present = x[~np.isnan(x)]
        if len(present) == 0:
            raise LeftOut(f"column {name!r} has no non-null value")
        if len(np.unique(present)) > n_bins and np.isfinite(present).any():
            return _encode_numeric(x, n_bins)
        items: list[object] = [None if math.isnan(v) else float(v) for v in x.tolist()]
        return _encode_categorical(items, max_categories)
    if np.issubdtype(values.dtype, np.integer) or values.dtype == np.bool_:
        return _encode_integers(values, max_categories, n_bins, name)
    items = [v.item() if isinstance(v, np.generic) else v for v in values.tolist()]
    counts = Counter(v for v in items if v is not None)
    if not counts:
        raise LeftOut(f"column {name!r} has no non-null value")
    kinds = {type(v) for v in items if v is not None}
    kind = kinds.pop()
    if kinds or not issubclass(kind, (bool, int, str)):
        raise ValueError(f"column {name!r} must hold only bool, only int or only str values")
    n, distinct = sum(counts.values()), len(counts)
    if kind is str and _looks_like_identifier(n, distinct):
        raise LeftOut(f"column {name!r} looks like an identifier")
    if kind is int and distinct > n_bins:
        span = max(counts) - min(counts) + 1  # type: ignore[type-var, operator]
        if _looks_like_identifier(n, distinct) and span <= 2 * distinct:
            raise LeftOut(f"column {name!r} looks like an identifier")
        x = np.array([np.nan if v is None else v for v in items], dtype=np.float64)
        return _encode_numeric(x, n_bins)
    return _encode_categorical(items, max_categories)


def _encode_integers(
    x: npt.NDArray[np.generic], max_categories: int, n_bins: int, name: str
) -> tuple[IntArray, list[Category]]:
    """The rules of :func:`encode_column` for a null-free numpy int or bool array, with numpy."""
    if len(x) == 0:
        raise LeftOut(f"column {name!r} has no non-null value")
    uniques, inverse, counts = np.unique(x, return_inverse=True, return_counts=True)
    if x.dtype != np.bool_ and len(uniques) > n_bins:
        low, high = int(uniques[0]), int(uniques[-1])
        if _looks_like_identifier(len(x), len(uniques)) and high - low + 1 <= 2 * len(uniques):
            raise LeftOut(f"column {name!r} looks like an identifier")
        return _encode_numeric(x.astype(np.float64), n_bins)
    keep = np.arange(len(uniques))
    if len(uniques) > max_categories:
        # Most frequent first, ties to the smaller value; uniques are already sorted by value.
        keep = np.sort(np.lexsort((np.arange(len(uniques)), -counts))[: max_categories - 1])
    code_of = np.full(len(uniques), len(keep), dtype=np.int64)  # "other" unless kept
    code_of[keep] = np.arange(len(keep))
    categories: list[Category] = [uniques[k].item() for k in keep]
    if len(keep) < len(uniques):
        categories.append(OTHER)
    return code_of[inverse.ravel()], categories


def _encode_categorical(
    items: list[object], max_categories: int
) -> tuple[IntArray, list[Category]]:
    """Kept values in natural order (the most frequent when capped), then OTHER, then None."""
    counts = Counter(v for v in items if v is not None)
    has_null = None in items
    if len(counts) + has_null <= max_categories:
        kept = sorted(counts)  # type: ignore[type-var]
    else:
        m = max(0, max_categories - 1 - has_null)
        by_count = sorted(counts.items(), key=lambda vc: (-vc[1], vc[0]))
        kept = sorted(v for v, _ in by_count[:m])  # type: ignore[type-var]
    has_other = len(kept) < len(counts)
    index: dict[object, int] = {v: i for i, v in enumerate(kept)}
    other_code, null_code = len(kept), len(kept) + has_other
    codes = [null_code if v is None else index.get(v, other_code) for v in items]
    categories: list[Category] = [*kept, *([OTHER] if has_other else []), *([None] * has_null)]
    return np.array(codes, dtype=np.int64), categories


def _encode_numeric(x: FloatArray, n_bins: int) -> tuple[IntArray, list[Category]]:
    """Quantile bins over the finite values, then a code per infinity seen, then null (NaN)."""
    null = np.isnan(x)
    finite = np.isfinite(x)
    s = np.sort(x[finite])
    n = len(s)
    edges: list[float] = []
    for k in range(1, n_bins):
        e = float(s[(k * (n - 1)) // n_bins])
        if e > s[0] and (not edges or e > edges[-1]):
            edges.append(e)
    codes = np.searchsorted(np.array(edges, dtype=np.float64), x, side="right").astype(np.int64)
    bounds = [float(s[0]), *edges, float(s[-1])]
    categories: list[Category] = [
        Bin(bounds[i], bounds[i + 1], closed=i == len(edges)) for i in range(len(edges) + 1)
    ]
    for special in (-math.inf, math.inf):
        if (x == special).any():
            codes[x == special] = len(categories)
            categories.append(special)
    if null.any():
        codes[null] = len(categories)
        categories.append(None)
    return codes, categories


def centre(d: int, edges: list[tuple[int, int]], eligible: list[bool]) -> int:
    """The default root: the centre of the largest component among the eligible columns.

    In the largest component (ties: the one with the lowest column), the eligible column whose
    longest path to the others is shortest; ties go to the lower index.
    """
    neighbours: list[list[int]] = [[] for _ in range(d)]
    for i, j in edges:
        neighbours[i].append(j)
        neighbours[j].append(i)

    def distances(start: int) -> dict[int, int]:
        dist, queue = {start: 0}, [start]
        while queue:
            u = queue.pop(0)
            for v in neighbours[u]:
                if v not in dist:
                    dist[v] = dist[u] + 1
                    queue.append(v)
        return dist

    components: list[list[int]] = []
    seen: set[int] = set()
    for start in range(d):
        if start not in seen:
            members = sorted(distances(start))
            seen.update(members)
            components.append(members)
    largest = max(components, key=len)  # the first of the largest: the lowest column
    pool = [c for c in largest if eligible[c]] or largest
    return min(pool, key=lambda c: (max(distances(c).values()), c))


def pair_table(codes_i: IntArray, codes_j: IntArray, r_i: int, r_j: int) -> IntArray:
    """Count rows by (code in column i, code in column j) into an ``r_i x r_j`` int64 table."""
    flat = np.bincount(codes_i * r_j + codes_j, minlength=r_i * r_j)
    return flat.astype(np.int64).reshape(r_i, r_j)


def mutual_information(table: IntArray | FloatArray) -> tuple[float, float, int]:
    """Mutual information (nats) of a contingency table, with its G statistic and its dof.

    Each non-zero cell gives ``(c / N) * log((c * N) / (ma * mb))`` in float64 with ``math.log``;
    the terms are sorted ascending and added left to right from 0.0; the sum is clipped at 0.

    Returns
    -------
    mi : float
        Mutual information in nats.
    g : float
        The G (log-likelihood ratio) statistic, ``(2 * N) * mi``.
    dof : int
        ``(ra - 1) * (rb - 1)`` over the rows and columns with a non-zero total.
    """
    n = float(table.sum())
    ma = table.sum(axis=1).astype(np.float64)
    mb = table.sum(axis=0).astype(np.float64)
    terms = []
    for a, b in zip(*np.nonzero(table), strict=True):
        c = float(table[a, b])
        terms.append((c / n) * math.log((c * n) / (float(ma[a]) * float(mb[b]))))
    total = 0.0
    for t in sorted(terms):
        total += t
    mi = max(total, 0.0)
    dof = (int((ma > 0).sum()) - 1) * (int((mb > 0).sum()) - 1)
    return mi, (2.0 * n) * mi, dof


def spanning_tree(
    mi: FloatArray, keep: Callable[[int, int], bool] | None = None
) -> list[tuple[int, int]]:
    """Kruskal's maximum spanning tree: edges ``(i, j)``, ``i < j``, in the order they were kept.

    Candidates go by MI descending (exact float comparison), then ``i``, then ``j``. With
    ``keep``, only the candidates it accepts may join (pruning: the result is then a forest).
    """
    d = mi.shape[0]
    pairs = sorted(
        ((i, j) for i in range(d) for j in range(i + 1, d)), key=lambda p: (-mi[p], p[0], p[1])
    )
    leader = list(range(d))

    def find(u: int) -> int:
        while leader[u] != u:
            leader[u] = leader[leader[u]]
            u = leader[u]
        return u

    chosen: list[tuple[int, int]] = []
    for i, j in pairs:
        if len(chosen) == d - 1:
            break
        ri, rj = find(i), find(j)
        if ri != rj and (keep is None or keep(i, j)):
            leader[max(ri, rj)] = min(ri, rj)
            chosen.append((i, j))
    return chosen


def orient(d: int, edges: list[tuple[int, int]], root: int) -> tuple[IntArray, list[int]]:
    """Point the tree away from ``root`` by breadth-first walk (neighbours in ascending index).

    Returns the parent of each node (-1 for a root) and the visiting order. Components the root
    does not reach are walked from their lowest index.
    """
    neighbours: list[list[int]] = [[] for _ in range(d)]
    for i, j in edges:
        neighbours[i].append(j)
        neighbours[j].append(i)
    parent = np.full(d, -1, dtype=np.int64)
    order: list[int] = []
    seen = [False] * d
    for start in [root, *range(d)]:
        if seen[start]:
            continue
        seen[start] = True
        queue = [start]
        while queue:
            u = queue.pop(0)
            order.append(u)
            for v in sorted(neighbours[u]):
                if not seen[v]:
                    seen[v] = True
                    parent[v] = u
                    queue.append(v)
    return parent, order


#: The most rare values a tail table keeps (the most frequent first; the rest are summed).
TAIL_LIMIT = 1 << 15


@dataclass(frozen=True)
class Tail:
    """The values behind a column's "other" code: a table of counts, and the rest summed."""

    counts: dict[object, int]
    rest_values: int
    rest_rows: int

    def log_prob(self, value: object, alpha: float) -> float:
        """Ln P(value | other): smoothing ``alpha`` over the values plus one slot for unseen."""
        rows = sum(self.counts.values()) + self.rest_rows
        slots = len(self.counts) + self.rest_values + 1
        denom = rows + alpha * slots
        if value in self.counts:
            top = self.counts[value] + alpha
        elif self.rest_values:
            top = self.rest_rows / self.rest_values + alpha
        else:
            top = alpha
        return math.log(top / denom) if top > 0 else -math.inf


def tail_of(values: npt.NDArray[np.generic], categories: list[Category]) -> Tail | None:
    """The tail behind the "other" code of a categorical column (None without "other")."""
    if OTHER not in categories:
        return None
    kept = {c for c in categories if c is not OTHER and c is not None}
    items = [v.item() if isinstance(v, np.generic) else v for v in values.tolist()]
    counts = Counter(
        v for v in items if v is not None and not (isinstance(v, float) and math.isnan(v))
    )
    rare = sorted(
        ((v, c) for v, c in counts.items() if v not in kept),
        key=lambda vc: (-vc[1], vc[0]),
    )
    table, rest = rare[:TAIL_LIMIT], rare[TAIL_LIMIT:]
    return Tail(dict(table), len(rest), sum(c for _, c in rest))


@dataclass(frozen=True, eq=False)
class ReferenceTree:
    """Everything a reference fit produces (column ``k`` is ``names[k]``)."""

    names: list[str]
    categories: list[list[Category]]
    cardinalities: list[int]
    codes: list[IntArray]
    n_rows: int
    marginals: list[IntArray]
    tables: dict[tuple[int, int], IntArray]
    mi: FloatArray
    parent: IntArray
    order: list[int]
    edges: list[tuple[int, int]]
    mutual_info: FloatArray
    g_statistic: FloatArray
    dof: IntArray
    tails: list[Tail | None]

    def total_mutual_info(self) -> float:
        """Sum of each column's MI with its parent, the quantity the tree maximises."""
        return float(sum(float(x) for x in self.mutual_info))


def fit(
    columns: Mapping[str, npt.NDArray[np.generic]],
    *,
    max_categories: int = 128,
    n_bins: int = 10,
    root: str | None = None,
    prune: str | None = None,
) -> ReferenceTree:
    """Fit a Chow-Liu dependency tree to columns of equal length.

    Parameters
    ----------
    columns : Mapping of str to numpy.ndarray
        The data, one array per column (see :func:`encode_column`).
    max_categories, n_bins : int
        Passed to :func:`encode_column`.
    root : str, optional
        Name of the root column; by default the centre of the tree (:func:`centre`) among the
        columns with more than one code.
    prune : {None, "bic"}
        With ``"bic"``, an edge may join only while G > dof · ln N.

    Returns
    -------
    ReferenceTree

    Raises
    ------
    ValueError
        On no rows, no columns, unequal lengths, no column left to model (all null or
        identifiers) or an unknown root.
    """
    names = list(columns)
    if not names:
        raise ValueError("no columns")
    n_rows = len(columns[names[0]])
    for name in names:
        if len(columns[name]) != n_rows:
            raise ValueError(f"column {name!r} has {len(columns[name])} rows, expected {n_rows}")
    if n_rows == 0:
        raise ValueError(f"column {names[0]!r} has no rows")
    encoded = []
    for name in list(names):
        try:
            encoded.append(encode_column(np.asarray(columns[name]), max_categories, n_bins, name))
        except LeftOut:
            names.remove(name)
    if not names:
        raise ValueError("no column is left to model")
    if root is not None and root not in names:
        raise ValueError(f"root {root!r} is not a modelled column")
    codes = [c for c, _ in encoded]
    cards = [len(cats) for _, cats in encoded]
    d = len(names)
    mi, g = np.zeros((d, d)), np.zeros((d, d))
    dof = np.zeros((d, d), dtype=np.int64)
    tables: dict[tuple[int, int], IntArray] = {}
    for i in range(d):
        for j in range(i + 1, d):
            tables[i, j] = pair_table(codes[i], codes[j], cards[i], cards[j])
            mi[i, j], g[i, j], dof[i, j] = mutual_information(tables[i, j])
            mi[j, i], g[j, i], dof[j, i] = mi[i, j], g[i, j], dof[i, j]
    if prune not in (None, "bic"):
        raise ValueError(f"the reference prunes only with 'bic', got {prune!r}")

    def pays(i: int, j: int) -> bool:
        return prune is None or bool(g[i, j] > dof[i, j] * math.log(n_rows))

    edges = spanning_tree(mi, pays)
    start = centre(d, edges, [r > 1 for r in cards]) if root is None else names.index(root)
    parent, order = orient(d, edges, start)
    return ReferenceTree(
        names=names,
        categories=[cats for _, cats in encoded],
        cardinalities=cards,
        codes=codes,
        n_rows=n_rows,
        marginals=[
            np.bincount(c, minlength=r).astype(np.int64) for c, r in zip(codes, cards, strict=True)
        ],
        tables=tables,
        mi=mi,
        parent=parent,
        order=order,
        edges=[(int(parent[v]), v) for v in order if parent[v] >= 0],
        mutual_info=np.array([mi[v, parent[v]] if parent[v] >= 0 else 0.0 for v in range(d)]),
        g_statistic=g,
        dof=dof,
        tails=[
            tail_of(np.asarray(columns[name]), cats)
            for name, (_, cats) in zip(names, encoded, strict=True)
        ],
    )


# -- the fitted tree as a distribution ---------------------------------------------------------


def encode_like(tree: ReferenceTree, column: int, values: npt.NDArray[np.generic]) -> IntArray:
    """Codes of new values under a fitted column's categories; -1 marks a value without a code.

    A value outside the kept ones takes the "other" code when the column has one; a null takes
    the null code when there is one; a float takes the bin whose interval holds it.
    """
    cats = tree.categories[column]
    null_code = len(cats) - 1 if cats[-1] is None else -1
    items = [v.item() if isinstance(v, np.generic) else v for v in values.tolist()]
    if values.dtype.kind == "f":
        items = [None if v != v else v for v in items]  # NaN is null in a float array
    if isinstance(cats[0], Bin):
        x = np.array([np.nan if v is None else float(v) for v in items], dtype=np.float64)
        edges = np.array([b.low for b in cats[1:] if isinstance(b, Bin)], dtype=np.float64)
        codes = np.searchsorted(edges, x, side="right").astype(np.int64)
        for k, c in enumerate(cats):
            if isinstance(c, float) and math.isinf(c):
                codes[x == c] = k
        codes[np.isnan(x)] = null_code
        return codes
    kept = [c for c in cats if c is not OTHER and c is not None]
    index: dict[object, int] = {v: i for i, v in enumerate(kept)}
    other = len(kept) if any(c is OTHER for c in cats) else -1
    return np.array([null_code if v is None else index.get(v, other) for v in items], np.int64)


def _parent_child_counts(tree: ReferenceTree, c: int) -> IntArray:
    """Column c's counts: rows are the parent's codes (one row for a root)."""
    p = int(tree.parent[c])
    if p < 0:
        return tree.marginals[c][None, :]
    return tree.tables[p, c] if p < c else tree.tables[c, p].T


def _smoothed(counts: IntArray | FloatArray, alpha: float) -> tuple[FloatArray, FloatArray]:
    """Smoothed log-probabilities of a table of counts, row by row.

    Returns ln((n + alpha) / (n_row + alpha r)) per cell and ln(alpha / (n_row + alpha r)) per
    row; a row with nothing to go on (no counts, no smoothing) is uniform.
    """
    r = counts.shape[1]
    denom = counts.sum(axis=1).astype(np.float64) + alpha * r
    safe = np.where(denom > 0, denom, 1.0)
    with np.errstate(divide="ignore"):
        logp = np.log((counts + alpha) / safe[:, None])
        unseen = np.log(np.full(len(denom), alpha) / safe)
    logp[denom <= 0] = math.log(1.0 / r)
    unseen[denom <= 0] = math.log(1.0 / r)
    return logp, unseen


def score_samples(
    tree: ReferenceTree, columns: Mapping[str, npt.NDArray[np.generic]], alpha: float
) -> FloatArray:
    """Ln p(row) in nats: the sum over columns, in column order, of ln P(x_c | x_parent).

    P(x | a) = (n_ax + alpha) / (n_a + alpha r). A value without a code gets
    alpha / (n_a + alpha r); when the parent's value has no code, the column's marginal is used.
    A value behind "other" adds ln P(value | other) from the column's tail (:class:`Tail`).
    """
    codes = [encode_like(tree, c, np.asarray(columns[name])) for c, name in enumerate(tree.names)]
    total = np.zeros(len(codes[0]))
    for c in range(len(tree.names)):
        counts = _parent_child_counts(tree, c)
        logp, unseen = _smoothed(counts, alpha)
        marg, marg_unseen = _smoothed(counts.sum(axis=0, keepdims=True), alpha)
        p = int(tree.parent[c])
        a = codes[p] if p >= 0 else np.zeros_like(codes[c])
        x = codes[c]
        with_parent = np.where(
            x >= 0, logp[np.maximum(a, 0), np.maximum(x, 0)], unseen[np.maximum(a, 0)]
        )
        without = np.where(x >= 0, marg[0, np.maximum(x, 0)], marg_unseen[0])
        total = total + np.where(a >= 0, with_parent, without)
        tail = tree.tails[c]
        if tail is not None:
            other = tree.categories[c].index(OTHER)
            raw = np.asarray(columns[tree.names[c]]).tolist()
            extra = [
                tail.log_prob(v, alpha) if k == other else 0.0 for k, v in zip(x, raw, strict=True)
            ]
            total = total + np.array(extra)
    return total


def sample(tree: ReferenceTree, n: int, alpha: float, rng: np.random.Generator) -> list[IntArray]:
    """Draw ``n`` rows of codes by ancestral sampling.

    Each column is drawn in breadth-first order, given its parent's sampled code.
    """
    codes: list[IntArray] = [np.zeros(n, dtype=np.int64) for _ in tree.names]
    for c in tree.order:
        probs = np.exp(_smoothed(_parent_child_counts(tree, c), alpha)[0])
        p = int(tree.parent[c])
        parent_codes = codes[p] if p >= 0 else np.zeros(n, dtype=np.int64)
        for a in np.unique(parent_codes):
            rows = parent_codes == a
            weights = probs[a] / probs[a].sum()
            codes[c][rows] = rng.choice(len(weights), size=int(rows.sum()), p=weights)
    return codes


# -- mixtures of trees (Meila & Jordan, JMLR 2000) -------------------------------------------------


@dataclass(frozen=True)
class ReferenceComponent:
    """One tree of a mixture: its root, parents (-1 for the root), pair MI and log-tables.

    ``logp[c]`` is ln P(x_c | parent code), rows by the parent's code (one row for the root).
    """

    root: int
    parent: IntArray
    mi: FloatArray
    logp: list[FloatArray]


def weighted_pair_stats(
    codes: list[IntArray], cards: list[int], resp: FloatArray
) -> list[tuple[float, list[FloatArray], dict[tuple[int, int], FloatArray]]]:
    """Per component k: total weight, weighted marginals and weighted ``r_i x r_j`` tables.

    Row t adds ``resp[t, k]`` to every cell it falls in; each cell is summed in row order.
    """
    out = []
    d = len(codes)
    for k in range(resp.shape[1]):
        w = resp[:, k]
        marginals = [
            np.bincount(codes[c], weights=w, minlength=cards[c]).astype(np.float64)
            for c in range(d)
        ]
        tables = {
            (i, j): np.bincount(
                codes[i] * cards[j] + codes[j], weights=w, minlength=cards[i] * cards[j]
            )
            .astype(np.float64)
            .reshape(cards[i], cards[j])
            for i in range(d)
            for j in range(i + 1, d)
        }
        out.append((float(marginals[0].sum()), marginals, tables))
    return out


def mixture_m_step(
    codes: list[IntArray], cards: list[int], resp: FloatArray, alpha: float, pooling: float = 0.0
) -> list[ReferenceComponent]:
    """Each component's Chow-Liu tree on weighted mutual information, and its tables.

    The tree is oriented from its centre (as :func:`fit` picks the root), and the tables are
    smoothed by ``alpha`` from the weighted counts. With ``pooling`` > 0 and more than one
    component, each row of a table is the m-estimate (n_k(a, x) + pooling * P(x | a) + alpha)
    / (n_k(a) + pooling + alpha * r), P(x | a) being the ``alpha``-smoothed conditional of all
    the rows' counts (the components' counts added up).
    """
    d = len(codes)
    comps = []
    stats = weighted_pair_stats(codes, cards, resp)

    def counts_of(
        marginals: list[FloatArray], tables: dict[Any, FloatArray], c: int, p: int
    ) -> Any:
        return marginals[c][None, :] if p < 0 else (tables[p, c] if p < c else tables[c, p].T)

    for _, marginals, tables in stats:
        mi = np.zeros((d, d))
        for (i, j), table in tables.items():
            mi[i, j] = mi[j, i] = mutual_information(table)[0] if table.sum() > 0 else 0.0
        edges = spanning_tree(mi)
        first, _ = orient(d, edges, 0)
        links = [(int(p), c) for c, p in enumerate(first) if p >= 0]
        root = centre(d, links, [r > 1 for r in cards])
        parent, _ = orient(d, links, root)
        logp = []
        for c in range(d):
            p = int(parent[c])
            counts = counts_of(marginals, tables, c, p)
            if pooling > 0 and len(stats) > 1:
                pooled = sum(counts_of(m, t, c, p) for _, m, t in stats)
                counts = counts + pooling * np.exp(_smoothed(pooled, alpha)[0])
            logp.append(_smoothed(counts, alpha)[0])
        comps.append(ReferenceComponent(root, parent, mi, logp))
    return comps


def mixture_log_likelihoods(codes: list[IntArray], comps: list[ReferenceComponent]) -> FloatArray:
    """Ln P_k(row) for every row and component: the sum over columns, in column order."""
    n = len(codes[0])
    out = np.zeros((n, len(comps)))
    for k, comp in enumerate(comps):
        total = np.zeros(n)
        for c, logp in enumerate(comp.logp):
            p = int(comp.parent[c])
            a = codes[p] if p >= 0 else np.zeros(n, dtype=np.int64)
            total = total + logp[a, codes[c]]
        out[:, k] = total
    return out


def mixture_em_step(
    codes: list[IntArray], cards: list[int], resp: FloatArray, alpha: float, pooling: float = 0.0
) -> tuple[list[ReferenceComponent], FloatArray, FloatArray, FloatArray]:
    """One EM iteration from responsibilities ``resp`` (rows x K).

    M-step: weights ``w_k = sum_t resp[t, k] / N`` and :func:`mixture_m_step` (with ``pooling``
    pseudo-rows toward the pooled tables). E-step: per row
    ``ln sum_k w_k P_k(row)`` (log-sum-exp) and the new responsibilities ``w_k P_k(row) / P(row)``.
    Returns the components, the weights, each row's log-likelihood and the responsibilities.
    """
    weights = resp.sum(axis=0) / resp.shape[0]
    comps = mixture_m_step(codes, cards, resp, alpha, pooling)
    with np.errstate(divide="ignore"):
        joint = mixture_log_likelihoods(codes, comps) + np.log(weights)[None, :]
    top = joint.max(axis=1)
    row_ll = top + np.log(np.exp(joint - top[:, None]).sum(axis=1))
    return comps, weights, row_ll, np.exp(joint - row_ll[:, None])
