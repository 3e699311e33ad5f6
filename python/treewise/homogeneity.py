"""Exact G-tests of homogeneity between two sides' counts, with sparse-cell pooling and Holm."""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

from treewise import _core

__all__ = [
    "MIN_EXPECTED",
    "column_test",
    "edge_test",
    "g_homogeneity",
    "holm",
    "pooled_levels",
]

#: A level whose expected count on either side is below this is pooled with the other sparse
#: levels (the "expected count of at least 5" rule of thumb: common practice).
MIN_EXPECTED = 5.0


def pooled_levels(table: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """The 2 x k table after the sparse-cell rule, before any statistic is computed.

    Rows are the two sides, columns the levels. The rule, in order:

    1. levels counted on neither side are dropped (they carry no information);
    2. a level is *sparse* when its expected count on either side, ``n_side * c_level / N``,
       is below ``MIN_EXPECTED`` (5); all sparse levels are pooled into one level;
    3. if that pooled level is still sparse, it is merged into the non-sparse level with the
       smallest total (when there is one).

    A side with no rows at all leaves nothing to compare: the result then has one row.
    """
    counts: npt.NDArray[np.float64] = np.asarray(table, dtype=np.float64)
    counts = counts[counts.sum(axis=1) > 0]
    counts = counts[:, counts.sum(axis=0) > 0]
    if counts.shape[0] < 2 or counts.shape[1] < 2:
        return counts
    sides = counts.sum(axis=1)
    total = sides.sum()
    expected_low = counts.sum(axis=0) * sides.min() / total
    sparse = expected_low < MIN_EXPECTED
    if not sparse.any():
        return counts
    kept: npt.NDArray[np.float64] = counts[:, ~sparse]
    pooled: npt.NDArray[np.float64] = counts[:, sparse].sum(axis=1, keepdims=True)
    if pooled.sum() * sides.min() / total < MIN_EXPECTED and kept.shape[1] > 0:
        smallest = int(np.argmin(kept.sum(axis=0)))
        kept = kept.copy()
        kept[:, smallest] += pooled[:, 0]
        return kept
    joined: npt.NDArray[np.float64] = np.hstack([kept, pooled])
    return joined


def g_homogeneity(table: npt.ArrayLike) -> tuple[float, int]:
    """G statistic and degrees of freedom of a 2 x k table after :func:`pooled_levels`.

    G = 2 * sum O ln(O / E) over the cells with O > 0, with E = row total * column total / N,
    and dof = (rows - 1)(columns - 1) of the pooled table; a table with fewer than two rows or
    columns left gives (0, 0).
    """
    counts = pooled_levels(table)
    if counts.shape[0] < 2 or counts.shape[1] < 2:
        return 0.0, 0
    total = counts.sum()
    expected = np.outer(counts.sum(axis=1), counts.sum(axis=0)) / total
    observed = counts > 0
    terms = counts[observed] * np.log(counts[observed] / expected[observed])
    g = 2.0 * float(np.sort(terms).sum())
    dof = (counts.shape[0] - 1) * (counts.shape[1] - 1)
    return max(g, 0.0), dof


def _p_value(g: float, dof: int) -> float:
    return 1.0 if dof == 0 else float(_core.chi2_sf(g, dof))


def column_test(reference: npt.ArrayLike, current: npt.ArrayLike) -> tuple[float, int, float]:
    """G-test that one column's shares are the same on both sides: (G, dof, p)."""
    g, dof = g_homogeneity(np.vstack([reference, current]))
    return g, dof, _p_value(g, dof)


def edge_test(reference: npt.ArrayLike, current: npt.ArrayLike) -> tuple[float, int, float]:
    """G-test that P(child | parent) is the same on both sides: (G, dof, p).

    ``reference`` and ``current`` are the parent x child count tables of the two sides. For
    each parent value, the 2 x k_child table (side x child value) is tested for homogeneity
    after the sparse-cell rule; G and dof are summed over the parent values. The sum is the
    G-test of conditional independence of side and child given the parent, since the G
    statistic of a three-way table given one variable is the sum over its strata.
    """
    ref = np.asarray(reference, dtype=np.float64)
    cur = np.asarray(current, dtype=np.float64)
    g_total, dof_total = 0.0, 0
    for a in range(ref.shape[0]):
        g, dof = g_homogeneity(np.vstack([ref[a], cur[a]]))
        g_total += g
        dof_total += dof
    return g_total, dof_total, _p_value(g_total, dof_total)


def holm(p_values: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """Holm-Bonferroni adjusted p-values (Holm 1979): a step-down Bonferroni correction.

    With m tests sorted by p ascending, the k-th (from 0) is adjusted to
    max over j <= k of min(1, (m - j) p_(j)). Rejecting the adjusted p below a level controls
    the family-wise error rate at that level under any dependence between the tests. NaN
    (a test that could not be run) stays NaN and does not count towards m.
    """
    p = np.asarray(p_values, dtype=np.float64)
    adjusted = np.full(p.shape, math.nan)
    tested = np.flatnonzero(~np.isnan(p))
    m = tested.size
    order = tested[np.argsort(p[tested], kind="stable")]
    running = 0.0
    for k, i in enumerate(order):
        running = max(running, min(1.0, (m - k) * float(p[i])))
        adjusted[i] = running
    return adjusted
