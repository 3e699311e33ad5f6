"""Synthetic rows against real ones in real units: column distances next to a bootstrap floor."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa
import pyarrow.compute as pc

__all__ = ["compare_columns", "ks_distance", "rank_correlation", "tv_distance"]


def ks_distance(a: npt.NDArray[np.float64], b: npt.NDArray[np.float64]) -> float:
    """The two-sample Kolmogorov-Smirnov statistic (0: the same, 1: disjoint).

    It is the largest gap between the two empirical distribution functions; NaN when either side
    is empty.
    """
    if len(a) == 0 or len(b) == 0:
        return float("nan")
    a, b = np.sort(a), np.sort(b)
    points = np.concatenate([a, b])
    fa = np.searchsorted(a, points, side="right") / len(a)
    fb = np.searchsorted(b, points, side="right") / len(b)
    return float(np.max(np.abs(fa - fb)))


def tv_distance(a: pa.Array[Any], b: pa.Array[Any]) -> float:
    """Total variation distance between the value shares of two arrays (0: the same, 1: disjoint).

    Half the sum of the absolute differences of the shares; nulls are left out.
    """
    shares = []
    for side in (a, b):
        counts = pc.value_counts(side.drop_null())
        total = max(1, sum(c.as_py() for c in counts.field("counts")))
        shares.append(
            {
                _key(v): c.as_py() / total
                for v, c in zip(counts.field("values"), counts.field("counts"), strict=True)
            }
        )
    keys = set(shares[0]) | set(shares[1])
    return float(0.5 * sum(abs(shares[0].get(k, 0.0) - shares[1].get(k, 0.0)) for k in keys))


def _key(value: pa.Scalar[Any]) -> object:
    v = value.as_py()
    # NaN is a value of its own: give it one key.
    return "NaN" if isinstance(v, float) and v != v else v


def rank_correlation(x: npt.NDArray[np.float64], y: npt.NDArray[np.float64]) -> float:
    """Spearman's rank correlation: Pearson's correlation of the average ranks (NaN if constant)."""
    if len(x) < 2:
        return float("nan")
    rx, ry = _ranks(x), _ranks(y)
    if rx.std() == 0 or ry.std() == 0:
        return float("nan")
    return float(np.corrcoef(rx, ry)[0, 1])


def _ranks(x: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    """Ranks 1..n, ties given the average of the ranks they span."""
    _, inverse, counts = np.unique(x, return_inverse=True, return_counts=True)
    ends = np.cumsum(counts)
    average = ends - (counts - 1) / 2.0
    ranks: npt.NDArray[np.float64] = average[inverse.ravel()].astype(np.float64)
    return ranks


def numbers(column: Any) -> npt.NDArray[np.float64]:
    """The non-null values of a number or time column as floats (times in their own unit)."""
    if isinstance(column, pa.ChunkedArray):
        column = column.combine_chunks()
    if pa.types.is_dictionary(column.type):
        column = column.dictionary_decode()
    t = column.type
    if (
        pa.types.is_timestamp(t)
        or pa.types.is_date(t)
        or pa.types.is_time(t)
        or pa.types.is_duration(t)
    ):
        column = column.view(pa.int32() if t.bit_width == 32 else pa.int64())
    values: npt.NDArray[np.float64] = (
        column.drop_null().to_numpy(zero_copy_only=False).astype(np.float64)
    )
    return values


def _plain(column: Any) -> Any:
    if isinstance(column, pa.ChunkedArray):
        column = column.combine_chunks()
    if pa.types.is_dictionary(column.type):
        column = column.dictionary_decode()
    if pa.types.is_string_view(column.type) or pa.types.is_large_string(column.type):
        column = column.cast(pa.string())
    return column


def compare_columns(
    real: pa.Table,
    synthetic: pa.Table,
    kinds: dict[str, str],
    random_state: int | np.random.Generator | None = 0,
    edges: Sequence[tuple[str, str]] = (),
) -> tuple[pa.Table, pa.Table]:
    """Compare each column of ``synthetic`` with ``real`` in real units.

    A numeric column is compared by the Kolmogorov-Smirnov statistic of its values, any other by
    the total variation distance of its value shares; nulls are compared as a share of rows. Each
    distance stands next to its noise floor: the same distance between ``real`` and a bootstrap
    resample of it with as many rows as ``synthetic`` (what sampling alone costs).

    Returns
    -------
    columns : pyarrow.Table
        One row per column: ``column``, ``kind``, ``measure`` ("KS" or "TV"), ``distance``,
        ``noise_floor``, ``excess`` (distance minus floor), ``null_share_real`` and
        ``null_share_synthetic``.
    pairs : pyarrow.Table
        One row per edge (parent, child) whose two columns are both numeric: Spearman's rank
        correlation in ``real``, in ``synthetic`` and in the bootstrap resample.
    """
    rng = np.random.default_rng(random_state)
    boot_index = rng.integers(0, max(1, real.num_rows), size=synthetic.num_rows)
    boot = real.take(boot_index) if real.num_rows else real
    rows: dict[str, list[Any]] = {
        k: []
        for k in (
            "column",
            "kind",
            "measure",
            "distance",
            "noise_floor",
            "excess",
            "null_share_real",
            "null_share_synthetic",
        )
    }
    for name, kind in kinds.items():
        r, s, b = real.column(name), synthetic.column(name), boot.column(name)
        if kind == "numeric":
            measure = "KS"
            distance = ks_distance(numbers(r), numbers(s))
            floor = ks_distance(numbers(r), numbers(b))
        else:
            measure = "TV"
            distance = tv_distance(_plain(r), _plain(s))
            floor = tv_distance(_plain(r), _plain(b))
        rows["column"].append(name)
        rows["kind"].append(kind)
        rows["measure"].append(measure)
        rows["distance"].append(distance)
        rows["noise_floor"].append(floor)
        rows["excess"].append(distance - floor)
        rows["null_share_real"].append(r.null_count / max(1, len(r)))
        rows["null_share_synthetic"].append(s.null_count / max(1, len(s)))
    pairs: dict[str, list[Any]] = {
        k: [] for k in ("parent", "child", "rank_corr_real", "rank_corr_synthetic", "noise_floor")
    }
    for parent, child in edges:
        if kinds.get(parent) != "numeric" or kinds.get(child) != "numeric":
            continue
        values = []
        for table in (real, synthetic, boot):
            both = table.select([parent, child]).drop_null()
            values.append(rank_correlation(numbers(both.column(0)), numbers(both.column(1))))
        pairs["parent"].append(parent)
        pairs["child"].append(child)
        pairs["rank_corr_real"].append(values[0])
        pairs["rank_corr_synthetic"].append(values[1])
        pairs["noise_floor"].append(abs(values[2] - values[0]))
    return pa.table(rows), pa.table(pairs)
