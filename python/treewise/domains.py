"""Public domains for a private fit, and the codebook made from them.

The categories and ranges a user gives, and the ones learned with noise (thresholded category
counts, private quantiles).
"""

from __future__ import annotations

import itertools
import json
import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa
import pyarrow.compute as pc

from treewise import _core

if TYPE_CHECKING:
    from treewise._core import ColumnSpec
from treewise.errors import DataError, SchemaError
from treewise.noise import IntegerSource

__all__ = [
    "GRID",
    "Domain",
    "DomainLearner",
    "build_codebook",
    "check_domains",
    "family_of",
    "public_codebook",
    "read_domains",
]

#: Cells of the fine histogram over a public range from which bin edges are chosen privately.
GRID = 256
#: A column with more distinct values than this, while its categories are being learned, is
#: refused as identifier-like without reading further.
MAX_LEARNED_DISTINCT = 1 << 20


@dataclass
class Domain:
    """One column's public domain: its categories, or a numeric range (edges None: learned)."""

    categories: list[Any] | None = None
    low: float | None = None
    high: float | None = None
    edges: list[float] | None = None
    #: The noisy histogram of ``GRID`` cells over the range that learned edges came from; the
    #: values inside each bin are drawn from it (post-processing).
    grid: list[int] | None = None

    @property
    def numeric(self) -> bool:
        """Whether the domain is a numeric range."""
        return self.low is not None


def _bound(name: str, value: Any, dtype: pa.DataType | None) -> float:
    """A range bound as a number: itself, or a time column's value as its epoch number."""
    if isinstance(value, int | float) and not isinstance(value, bool):
        return float(value)
    if dtype is not None and pa.types.is_temporal(dtype):
        try:
            return _time_number(value, dtype)
        except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError, ValueError) as e:
            raise ValueError(f"domains[{name!r}]: {value!r} is not a {dtype} value: {e}") from None
    raise ValueError(f"domains[{name!r}]: a range bound must be a number, got {value!r}")


def _domain(name: str, spec: Any, dtype: pa.DataType | None = None) -> Domain:
    if isinstance(spec, Mapping):
        unknown = set(spec) - {"categories", "range", "edges"}
        if unknown or ("categories" in spec) == ("range" in spec):
            raise ValueError(
                f"domains[{name!r}] must be a list of categories, a (low, high) range, or a "
                f"dict with 'categories' or 'range' (and optional 'edges'), got {spec!r}"
            )
        if "categories" in spec:
            return _domain(name, list(spec["categories"]), dtype)
        low_high = spec["range"]
        domain = _domain(name, tuple(low_high), dtype)
        if "edges" in spec:
            domain.edges = sorted(float(e) for e in spec["edges"])
            if any(not (domain.low < e <= domain.high) for e in domain.edges):  # type: ignore[operator]
                raise ValueError(f"domains[{name!r}]: every edge must lie in (low, high]")
        return domain
    if isinstance(spec, tuple):
        if len(spec) != 2:
            raise ValueError(f"domains[{name!r}]: a range is a (low, high) pair, got {spec!r}")
        low, high = _bound(name, spec[0], dtype), _bound(name, spec[1], dtype)
        if not (math.isfinite(low) and math.isfinite(high) and low < high):
            raise ValueError(f"domains[{name!r}]: a range needs finite low < high, got {spec!r}")
        return Domain(low=low, high=high)
    if isinstance(spec, list):
        values = [v for v in spec if v is not None]
        if not values or len(set(values)) != len(values):
            raise ValueError(f"domains[{name!r}]: the categories must be distinct and not empty")
        return Domain(categories=values)
    raise ValueError(
        f"domains[{name!r}] must be a list of categories or a (low, high) range, got {spec!r}"
    )


def check_domains(
    domains: Mapping[str, Any] | None,
    names: Sequence[str],
    available: Sequence[str] | None = None,
    types: Mapping[str, pa.DataType] | None = None,
) -> dict[str, Domain]:
    """The given domains of the modelled columns ``names``, checked.

    A domain of a column that the data does not have (``available``, by default ``names``) is
    an error. With the columns' ``types``, a time column's range may be given in its own values
    (datetimes, dates); it is kept as epoch numbers in the column's unit.
    """
    if domains is None:
        return {}
    if not isinstance(domains, Mapping):
        raise TypeError(f"domains= takes a dict of column -> domain, got {domains!r}")
    unknown = [n for n in domains if n not in (names if available is None else available)]
    if unknown:
        raise SchemaError(f"domains= names columns that the data does not have: {unknown}")
    types = types or {}
    return {
        str(n): _domain(str(n), spec, types.get(str(n)))
        for n, spec in domains.items()
        if n in names
    }


def read_domains(path: str | os.PathLike[str]) -> dict[str, Any]:
    """Domains from a JSON file: column -> list of categories, or {"range": [low, high]}."""
    with open(path, encoding="utf-8") as f:
        loaded = json.load(f)
    if not isinstance(loaded, dict):
        raise ValueError(f"{path}: a domains file holds one JSON object (column -> domain)")
    return loaded


def family_of(dtype: pa.DataType) -> str:
    """The value family of an Arrow type (bool, int, uint, str, float, time)."""
    if pa.types.is_dictionary(dtype):
        return family_of(dtype.value_type)
    if pa.types.is_boolean(dtype):
        return "bool"
    if pa.types.is_signed_integer(dtype):
        return "int"
    if pa.types.is_unsigned_integer(dtype):
        return "uint"
    if pa.types.is_floating(dtype):
        return "float"
    if pa.types.is_temporal(dtype):
        return "time"
    if pa.types.is_string(dtype) or pa.types.is_large_string(dtype) or _is_view(dtype):
        return "str"
    raise SchemaError(f"a private fit cannot model a column of type {dtype}")


def _is_view(dtype: pa.DataType) -> bool:
    return bool(getattr(pa.types, "is_string_view", lambda _t: False)(dtype))


def _numbers(array: pa.Array[Any] | pa.ChunkedArray[Any]) -> npt.NDArray[np.float64]:
    """The non-null, non-NaN values of a numeric or time column as float64."""
    if pa.types.is_dictionary(array.type):
        array = array.cast(array.type.value_type)
    if pa.types.is_temporal(array.type):
        array = array.cast(pa.int64())
    values = np.asarray(pc.drop_null(array).to_numpy(zero_copy_only=False), dtype=np.float64)
    return values[~np.isnan(values)]


def _time_number(value: Any, dtype: pa.DataType) -> float:
    """A range bound of a time column as its epoch number in the column's unit."""
    if isinstance(value, int | float):
        return float(value)
    return float(pa.scalar(value, type=dtype).cast(pa.int64()).as_py())


class DomainLearner:
    """The exact counts that private domains are chosen from, gathered in one pass.

    Categorical columns without a domain: the count of each distinct value (nulls apart).
    Numeric columns with a range but no edges: a histogram of ``GRID`` equal cells over it.
    """

    def __init__(
        self, names: Sequence[str], families: Mapping[str, str], domains: Mapping[str, Domain]
    ) -> None:
        self.categories: dict[str, dict[Any, int]] = {}
        self.grids: dict[str, npt.NDArray[np.int64]] = {}
        self.ranges: dict[str, Domain] = {}
        self.rows: dict[str, int] = {}
        for n in names:
            domain = domains.get(n)
            family = families[n]
            if domain is None:
                if family in ("str", "int", "uint"):
                    self.categories[n] = {}
                    self.rows[n] = 0
                elif family != "bool":
                    raise SchemaError(
                        f"column {n!r} holds {family} values: a private fit needs its public "
                        f"range, e.g. domains={{{n!r}: (low, high)}}, or a list of its values"
                    )
            elif domain.numeric and domain.edges is None:
                self.grids[n] = np.zeros(GRID, dtype=np.int64)
                self.ranges[n] = domain

    @property
    def needed(self) -> bool:
        """Whether any domain must be learned from the data."""
        return bool(self.categories or self.grids)

    def see(self, batch: pa.RecordBatch) -> None:
        """Add one batch's values to the counts."""
        for n, counts in self.categories.items():
            column = batch.column(n)
            if pa.types.is_dictionary(column.type):
                column = column.cast(column.type.value_type)
            found: Any = pc.value_counts(pc.drop_null(column))
            for v, c in zip(
                found.field("values").to_pylist(), found.field("counts").to_pylist(), strict=True
            ):
                counts[v] = counts.get(v, 0) + int(c)
            self.rows[n] += len(column) - column.null_count
            if len(counts) > MAX_LEARNED_DISTINCT:
                raise _identifier(n)
        for n, grid in self.grids.items():
            d = self.ranges[n]
            assert d.low is not None and d.high is not None
            x = _numbers(batch.column(n))
            cell = np.floor((np.clip(x, d.low, d.high) - d.low) / (d.high - d.low) * GRID)
            grid += np.bincount(np.clip(cell, 0, GRID - 1).astype(np.int64), minlength=GRID)

    def check_identifiers(self) -> None:
        """Refuse a column whose values are nearly all distinct.

        The rule of docs/column-kinds.md: strings or integers with at least 95% distinct values
        in 20 or more rows.
        """
        for n, counts in self.categories.items():
            rows = self.rows[n]
            if rows >= 20 and len(counts) >= 0.95 * rows:
                raise _identifier(n)

    def release(
        self,
        draw: Any,
        threshold: int,
        max_values: int,
        n_bins: int,
        rng: IntegerSource,
    ) -> dict[str, Domain]:
        """The private domains, from noisy counts.

        The values whose noisy count reaches ``threshold`` (at most ``max_values``, the highest
        noisy counts first), and the bin edges at the quantiles of the noisy histogram.
        ``draw(rng, size)`` gives the noise.
        """
        out: dict[str, Domain] = {}
        for n, counts in self.categories.items():
            values = sorted(counts)
            noisy = np.array([counts[v] for v in values], dtype=np.int64) + draw(rng, len(values))
            passed = [(int(c), k) for k, c in enumerate(noisy) if c >= threshold]
            passed.sort(key=lambda ck: (-ck[0], ck[1]))
            kept = sorted((values[k] for _, k in passed[:max_values]))
            out[n] = Domain(categories=kept)
        for n, grid in self.grids.items():
            d = self.ranges[n]
            noisy = np.clip(grid + draw(rng, GRID), 0, None)
            edges = _quantile_edges(noisy, d, n_bins)
            out[n] = Domain(low=d.low, high=d.high, edges=edges, grid=[int(c) for c in noisy])
        return out


def _identifier(name: str) -> DataError:
    return DataError(
        f"column {name!r} looks like an identifier (nearly every value is distinct); a private "
        "fit refuses it: leave it out with columns=, or give its public categories in domains="
    )


def _quantile_edges(noisy: npt.NDArray[np.int64], d: Domain, n_bins: int) -> list[float]:
    """Edges at the k/n_bins quantiles of the noisy grid, on cell boundaries.

    Equal-width edges when the noisy histogram is empty.
    """
    assert d.low is not None and d.high is not None
    width = (d.high - d.low) / GRID
    total = int(noisy.sum())
    if total == 0:
        cells = [round(k * GRID / n_bins) for k in range(1, n_bins)]
    else:
        cum = np.cumsum(noisy)
        cells = [int(np.searchsorted(cum, k * total / n_bins)) + 1 for k in range(1, n_bins)]
    edges = sorted({d.low + c * width for c in cells if 0 < c < GRID})
    return [e for e in edges if d.low < e <= d.high]


#: Points per bin of a ``Steps`` summary (the core's QUANTILES + 1).
STEP_POINTS = 65


def bin_steps(
    grid: Sequence[int], low: float, high: float, edges: Sequence[float]
) -> list[list[float]]:
    """Each bin's 65 equal-mass points under the histogram ``grid`` over [low, high].

    The density is uniform inside each grid cell; a bin with no mass gets evenly spaced points.
    """
    counts = np.asarray(grid, dtype=np.float64)
    bounds = np.linspace(low, high, len(counts) + 1)
    cuts = [low, *edges, high]
    out = []
    for lo, hi in itertools.pairwise(cuts):
        inner = bounds[(bounds > lo) & (bounds < hi)]
        xs = np.concatenate([[lo], inner, [hi]])
        mids = (xs[:-1] + xs[1:]) / 2
        cell = np.clip(np.searchsorted(bounds, mids, side="right") - 1, 0, len(counts) - 1)
        mass = counts[cell] * (xs[1:] - xs[:-1]) / (bounds[1] - bounds[0])
        total = float(mass.sum())
        if total <= 0:
            points = np.linspace(lo, hi, STEP_POINTS)
        else:
            cum = np.concatenate([[0.0], np.cumsum(mass)])
            points = np.interp(np.linspace(0, total, STEP_POINTS), cum, xs)
        points = np.clip(np.maximum.accumulate(points), lo, hi)
        out.append([float(p) for p in points])
    return out


def public_codebook(
    domains: Mapping[str, Any], schema: pa.Schema, *, n_bins: int = 10
) -> _core.Codebook:
    """The codebook of public domains for the columns of ``schema``, in its order.

    Count ``treewise.PairStats`` with it for a private ``fit_stats`` (streaming, many workers).

    Every column needs a domain in ``domains`` (bool columns excepted): a list of categories,
    or ``{"range": [low, high]}`` (cut into ``n_bins`` equal-width bins, since no data is seen
    here) with optional ``"edges"``. Nothing in it comes from data.
    """
    names = list(schema.names)
    types = {n: schema.field(n).type for n in names}
    families = {n: family_of(t) for n, t in types.items()}
    return build_codebook(names, families, check_domains(domains, names, None, types), n_bins)


def build_codebook(
    names: Sequence[str],
    families: Mapping[str, str],
    domains: Mapping[str, Domain],
    n_bins: int,
) -> _core.Codebook:
    """The codebook of public domains: no value of it comes from the data unless learned with noise.

    Categorical columns but bool ones get an "other" code (values outside the domain), every
    column a null code, so that nothing about the data decides whether they exist. A range without
    edges is cut into ``n_bins`` equal-width bins (a fit from data chooses them privately
    instead); float columns get a code for NaN.
    """
    columns: list[ColumnSpec] = []
    for n in names:
        family = families[n]
        domain = domains.get(n)
        if domain is None and family == "bool":
            domain = Domain(categories=[False, True])
        if domain is None:
            raise SchemaError(f"column {n!r} has no public domain; give one in domains=")
        integral = family in ("int", "uint", "time")
        if domain.numeric:
            low, high = domain.low, domain.high
            assert low is not None and high is not None
            edges = domain.edges
            if edges is None:
                edges = [low + (high - low) * k / n_bins for k in range(1, n_bins)]
            if integral:
                edges = sorted({float(math.ceil(e)) for e in edges})
                edges = [e for e in edges if low < e <= high]
            specials = [math.nan] if family == "float" else []
            # Learned edges come with their noisy histogram: draws inside a bin follow it.
            steps = None if domain.grid is None else bin_steps(domain.grid, low, high, edges)
            bins = (list(edges), low, high, specials)
            columns.append((n, family, [], bins, False, True, integral, steps))
        else:
            assert domain.categories is not None
            values = _cast_categories(n, domain.categories, family)
            columns.append((n, family, values, None, family != "bool", True, False, None))
    return _core.Codebook.from_columns(columns)


def _cast_categories(name: str, values: list[Any], family: str) -> list[Any]:
    try:
        if family == "str":
            cast: list[Any] = [str(v) for v in values]
        elif family in ("int", "uint", "time"):
            cast = [int(v) for v in values]
            if any(c != v for c, v in zip(cast, values, strict=True)):
                raise ValueError
        elif family == "float":
            cast = [float(v) for v in values]
        else:
            cast = [bool(v) for v in values]
    except (TypeError, ValueError):
        raise SchemaError(
            f"column {name!r} holds {family} values, but its domain lists {values[:5]!r}"
        ) from None
    if len(set(cast)) != len(cast):
        raise SchemaError(f"column {name!r}: its domain's categories are not distinct")
    return sorted(cast)
