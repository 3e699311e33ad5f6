"""Differentially private release of a tree: the budget, the noisy structure and tables.

The budget plan, the sensitivities, the noisy structure and tables, and their post-processing
into a consistent model (derivations in docs/privacy.md).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Any

import numpy as np
import numpy.typing as npt

from treewise import _core, reference
from treewise.errors import DataError
from treewise.noise import IntegerSource, discrete_gaussian, discrete_laplace

__all__ = [
    "DEFAULT_SPLIT",
    "MAX_PRIVATE_ROWS",
    "Plan",
    "check_privacy",
    "plan_budget",
    "release_model",
    "scaled_mutual_info",
    "score_sensitivity",
]

#: How the budget is shared by default between learning domains (when some are not given),
#: choosing the structure and releasing the tables.
DEFAULT_SPLIT: dict[str, float] = {"domains": 0.1, "structure": 0.3, "tables": 0.6}

#: The most rows a private fit accepts: the sensitivity of the structure scores is bounded for
#: tables up to this size (docs/privacy.md); a larger fit is refused.
MAX_PRIVATE_ROWS = 1 << 40

#: Multiplies every noise scale; 1 in every release. Only the audit tests change it, to show
#: that the audit fails when the noise is off (0) or too small.
NOISE_MULTIPLIER: Fraction = Fraction(1)


def _xlogx(x: npt.NDArray[np.float64]) -> list[float]:
    nz = x[x > 0]
    return list(nz * np.log(nz))


def scaled_mutual_info(table: npt.NDArray[np.integer[Any]]) -> float:
    """N * I(X; Y) in nats for a contingency table of n rows, summed with ``math.fsum``.

    n I = sum c ln c + n ln n - sum a ln a - sum b ln b, over the cells c, the row sums a and
    the column sums b. This is half the G statistic.
    """
    t = np.asarray(table, dtype=np.float64)
    n = float(t.sum())
    if n == 0:
        return 0.0
    terms = [*_xlogx(t.ravel()), n * math.log(n)]
    minus = _xlogx(t.sum(axis=1)) + _xlogx(t.sum(axis=0))
    return max(0.0, math.fsum(terms + [-m for m in minus]))


def score_sensitivity(n_max: int = MAX_PRIVATE_ROWS) -> int:
    """The add/remove sensitivity of the rounded structure score round(n I), in integers.

    Adding one row changes n I by at most phi(n + 1) - phi(n), phi(x) = x ln x, for a table of n
    rows before the addition (docs/privacy.md); that grows with n, so it is taken at
    ``n_max``. Rounding both scores adds at most 1, and 0.1 covers the floating-point error of
    the sums.
    """
    step = (n_max + 1) * math.log(n_max + 1) - n_max * math.log(n_max)
    return math.ceil(step + 0.1) + 1


def _rational_up(x: float) -> Fraction:
    """A rational >= x with a small denominator (so that the exact samplers stay quick)."""
    return Fraction(math.ceil(x * 1024), 1024)


@dataclass
class Plan:
    """The noise of every step of a private fit, and what it guarantees."""

    epsilon: float
    delta: float
    split: dict[str, float]
    accounting: str
    #: zCDP budget of the structure and tables (None under pure epsilon accounting).
    rho: float | None
    #: Per step: ("gaussian", variance) or ("laplace", scale) of each noisy number.
    noise: dict[str, tuple[str, Fraction]] = field(default_factory=dict)
    #: Per column whose domain is learned: its own (epsilon, delta) and, for categories, the
    #: threshold a noisy count must reach.
    domain_epsilon: float = 0.0
    domain_delta: float = 0.0
    threshold: int = 0

    def draw(self, step: str, rng: IntegerSource, size: int) -> npt.NDArray[np.int64]:
        """``size`` independent noise values of ``step``."""
        kind, scale = self.noise[step]
        scale = scale * NOISE_MULTIPLIER if kind == "laplace" else scale * NOISE_MULTIPLIER**2
        sampler = discrete_gaussian if kind == "gaussian" else discrete_laplace
        return np.array([sampler(scale, rng) for _ in range(size)], dtype=np.int64)


def check_privacy(
    epsilon: float | None, delta: float | None, split: Mapping[str, float] | None
) -> dict[str, float] | None:
    """Check the privacy parameters; the budget split with every step named, or None (no DP)."""
    if epsilon is None:
        if delta is not None:
            raise ValueError("delta= is only meaningful with epsilon=; give both or neither")
        return None
    if isinstance(epsilon, bool) or not isinstance(epsilon, int | float):
        raise TypeError(f"epsilon must be a positive number, got {epsilon!r}")
    if not (math.isfinite(epsilon) and epsilon > 0):
        raise ValueError(f"epsilon must be a positive finite number, got {epsilon!r}")
    d = 0.0 if delta is None else delta
    if isinstance(d, bool) or not isinstance(d, int | float) or not (0 <= d < 1):
        raise ValueError(f"delta must be a number in [0, 1), got {delta!r}")
    chosen = dict(DEFAULT_SPLIT if split is None else split)
    if set(chosen) != set(DEFAULT_SPLIT) or any(
        not isinstance(v, int | float) or not (v >= 0 and math.isfinite(v)) for v in chosen.values()
    ):
        raise ValueError(
            f"privacy_split must map each of {sorted(DEFAULT_SPLIT)} to a share >= 0, got {split!r}"
        )
    if chosen["structure"] <= 0 or chosen["tables"] <= 0:
        raise ValueError("privacy_split must give the structure and the tables a share > 0")
    return {k: float(v) for k, v in chosen.items()}


def plan_budget(
    epsilon: float,
    delta: float,
    split: Mapping[str, float],
    *,
    n_columns: int,
    learned_categories: int,
    learned_ranges: int,
) -> Plan:
    """Share (epsilon, delta) between the steps and work out each step's noise.

    Learning domains (when some column needs it) is accounted in (epsilon, delta) by basic
    composition; the structure and the tables in zCDP when delta > 0 (Bun & Steinke 2016),
    converted back with epsilon = rho + 2 sqrt(rho ln(1/delta)), and in pure epsilon otherwise.
    """
    learned = learned_categories + learned_ranges
    if learned and split["domains"] <= 0:
        raise ValueError(
            f"{learned} column(s) need their domains learned from the data, but privacy_split "
            "gives the domains no share; give them a share, or give every domain in domains="
        )
    steps = ["structure", "tables"] + (["domains"] if learned else [])
    total = sum(split[s] for s in steps)
    share = {s: split[s] / total for s in steps}
    shown = {s: round(share.get(s, 0.0), 12) for s in DEFAULT_SPLIT}
    eps_domains = epsilon * share.get("domains", 0.0)
    delta_domains = 0.0
    threshold = 0
    if learned_categories:
        if delta <= 0:
            raise ValueError(
                "learning a column's categories privately needs delta > 0 (a category seen in "
                "one row must be released only with a small probability); give delta=, or give "
                "the categories in domains="
            )
        delta_domains = delta / 2
    pairs = n_columns * (n_columns - 1) // 2
    eps_rest, delta_rest = epsilon - eps_domains, delta - delta_domains
    plan_noise: dict[str, tuple[str, Fraction]] = {}
    per_column = eps_domains / learned if learned else 0.0
    if learned:
        # Each row adds 1 to one count of each column's histogram: sensitivity 1 per column.
        plan_noise["domains"] = ("laplace", _rational_up(1.0 / per_column))
    if learned_categories:
        # P(Lap_Z(b) >= m) <= exp(-m / b): a count of 1 passes with probability <= delta_c.
        delta_c = delta_domains / learned_categories
        scale = float(plan_noise["domains"][1])
        threshold = 1 + math.ceil(scale * math.log(1.0 / delta_c))
    sens = score_sensitivity()
    rest = share["structure"] + share["tables"]
    if delta_rest > 0:
        log_inv = math.log(1.0 / delta_rest)
        rho = (math.sqrt(log_inv + eps_rest) - math.sqrt(log_inv)) ** 2
        rho_structure = rho * share["structure"] / rest
        rho_tables = rho * share["tables"] / rest
        # Each of the pairs' scores moves by at most sens; each table by 1 in one cell.
        if pairs:
            plan_noise["structure"] = (
                "gaussian",
                _rational_up(pairs * sens**2 / (2 * rho_structure)),
            )
        plan_noise["tables"] = ("gaussian", _rational_up(n_columns / (2 * rho_tables)))
        accounting = (
            "zCDP (Bun & Steinke 2016) for the structure and the tables, converted to "
            "(epsilon, delta) with epsilon = rho + 2 sqrt(rho ln(1/delta))"
        )
    else:
        rho = None
        eps_structure = eps_rest * share["structure"] / rest
        eps_tables = eps_rest * share["tables"] / rest
        if pairs:
            plan_noise["structure"] = ("laplace", _rational_up(pairs * sens / eps_structure))
        plan_noise["tables"] = ("laplace", _rational_up(n_columns / eps_tables))
        accounting = "pure epsilon-DP, basic composition"
    if learned:
        accounting += "; learned domains in (epsilon, delta) by basic composition"
    return Plan(
        epsilon=epsilon,
        delta=delta,
        split=shown,
        accounting=accounting,
        rho=rho,
        noise=plan_noise,
        domain_epsilon=per_column,
        domain_delta=(delta_domains / learned_categories) if learned_categories else 0.0,
        threshold=threshold,
    )


# -- the release ---------------------------------------------------------------------------------


def _apportion(total: int, weights: npt.NDArray[np.float64]) -> npt.NDArray[np.int64]:
    """Non-negative integers summing to ``total`` in proportion to ``weights``.

    Largest remainders, ties to the lower index; uniform when every weight is 0.
    """
    w = np.clip(np.asarray(weights, dtype=np.float64), 0.0, None)
    if w.sum() <= 0:
        w = np.ones_like(w)
    exact = total * w / w.sum()
    base = np.floor(exact).astype(np.int64)
    rest = int(total - base.sum())
    order = sorted(range(len(w)), key=lambda k: (-(exact[k] - base[k]), k))
    for k in order[:rest]:
        base[k] += 1
    return np.asarray(base, dtype=np.int64)


def _consistent_tables(
    root: int,
    order: Sequence[int],
    parent: Sequence[int],
    noisy: Mapping[int, npt.NDArray[np.int64]],
    cards: Sequence[int],
) -> dict[int, npt.NDArray[np.int64]]:
    """Post-process the noisy tables into non-negative tables that agree on shared columns.

    The method is in docs/privacy.md.

    Top-down from the root: the root's marginal is its noisy counts clipped at 0; then, in
    breadth-first order, each child's table keeps its parent's (already fixed) marginal as its
    row sums, and spreads each row's total over the child's codes in proportion to the noisy
    row clipped at 0. The child's marginal is then its table's column sums, which its own
    children's tables take as their row sums.
    """
    out: dict[int, npt.NDArray[np.int64]] = {}
    root_counts = np.clip(noisy[root], 0, None)
    if root_counts.sum() == 0:
        root_counts = np.ones_like(root_counts)  # a model needs at least one row
    out[root] = root_counts
    marginal = {root: root_counts}
    for c in order:
        p = parent[c]
        if p < 0:
            continue
        rows = noisy[c].reshape(cards[p], cards[c]).astype(np.float64)
        table = np.stack([_apportion(int(marginal[p][a]), rows[a]) for a in range(cards[p])])
        out[c] = table.ravel()
        marginal[c] = table.sum(axis=0)
    return out


@dataclass
class Release:
    """What a private fit publishes: the structure, the noisy scores and the tables."""

    root: int
    parent: list[int]
    counts: list[list[int]]
    pair_mi: list[float]
    n_rows: int


def release_model(
    stats: _core.PairStats,
    plan: Plan,
    rng: IntegerSource,
    root: int | None,
    eligible: Sequence[bool],
) -> Release:
    """Choose the structure by noisy scores and release its tables with noise (docs/privacy.md).

    Only ``stats`` holds exact counts; nothing exact is returned.
    """
    d = len(stats.cardinalities)
    cards = list(stats.cardinalities)
    if stats.n_rows > MAX_PRIVATE_ROWS:
        raise DataError(
            f"a private fit takes at most {MAX_PRIVATE_ROWS:,} rows (the bound on the structure "
            "scores' sensitivity holds up to there)"
        )
    pairs = [(i, j) for i in range(d) for j in range(i + 1, d)]
    noisy_scores = np.zeros((d, d))
    if pairs:
        exact = [round(scaled_mutual_info(_table(stats, i, j))) for i, j in pairs]
        noise = plan.draw("structure", rng, len(pairs))
        for (i, j), s, z in zip(pairs, exact, noise, strict=True):
            noisy_scores[i, j] = noisy_scores[j, i] = float(s + int(z))
    edges = reference.spanning_tree(noisy_scores)
    chosen_root = reference.centre(d, edges, list(eligible)) if root is None else root
    parent_arr, order = reference.orient(d, edges, chosen_root)
    parent = [int(p) for p in parent_arr]
    noisy: dict[int, npt.NDArray[np.int64]] = {}
    for c in order:
        p = parent[c]
        exact_counts = _marginal(stats, c) if p < 0 else _table(stats, p, c).ravel()
        noisy[c] = exact_counts + plan.draw("tables", rng, len(exact_counts))
        del exact_counts
    tables = _consistent_tables(chosen_root, order, parent, noisy, cards)
    n_rows = int(tables[chosen_root].sum())
    # An edge's weight is the mutual information of its released table; any other pair's is its
    # noisy score over the released row count (both post-processing of what was released).
    pair_mi = [max(0.0, noisy_scores[i, j]) / n_rows for i, j in pairs]
    for c, p in enumerate(parent):
        if p >= 0:
            table = tables[c].reshape(cards[p], cards[c])
            pair_mi[pairs.index((min(p, c), max(p, c)))] = scaled_mutual_info(table) / n_rows
    return Release(
        root=chosen_root,
        parent=parent,
        counts=[[int(x) for x in tables[c]] for c in range(d)],
        pair_mi=pair_mi,
        n_rows=n_rows,
    )


def _marginal(stats: _core.PairStats, i: int) -> npt.NDArray[np.int64]:
    return np.frombuffer(stats.marginal(i), dtype="<u8").astype(np.int64)


def _table(stats: _core.PairStats, i: int, j: int) -> npt.NDArray[np.int64]:
    """The exact table of columns i and j, rows by i's codes."""
    cards = stats.cardinalities
    a, b = min(i, j), max(i, j)
    t = np.frombuffer(stats.table(a, b), dtype="<u8").astype(np.int64).reshape(cards[a], cards[b])
    return t if i < j else t.T.copy()
