"""The entries of ``categories_``: values, the "other" marker, numeric bins and the null code."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Final

__all__ = ["OTHER", "Bin", "category_label", "column_categories"]


class _Other:
    """The single marker of the "other" code (values beyond ``max_categories``)."""

    _instance: _Other | None = None

    def __new__(cls) -> _Other:
        if cls._instance is None:
            cls._instance = super().__new__(cls)
        return cls._instance

    def __repr__(self) -> str:
        return "OTHER"

    def __reduce__(self) -> str:
        return "OTHER"


OTHER: Final = _Other()


@dataclass(frozen=True)
class Bin:
    """One quantile bin of a numeric column: ``[low, high)``, or ``[low, high]`` when ``closed``.

    The first bin starts at the smallest value seen and the last ends at the largest one, but in
    encoding the first bin also takes anything below it and the last anything above it.
    """

    low: float
    high: float
    closed: bool = False

    def __contains__(self, x: object) -> bool:
        if not isinstance(x, (int, float)) or math.isnan(x):
            return False
        return self.low <= x < self.high or (self.closed and x == self.high)

    def __repr__(self) -> str:
        return f"[{self.low!r}, {self.high!r}{']' if self.closed else ')'}"


def column_categories(kind: str, values: Any, has_other: bool, has_null: bool) -> list[Any]:
    """One column's categories in code order: values or bins (and non-finite values), OTHER, None.

    The arguments are what ``Codebook.column`` returns.
    """
    if isinstance(values, tuple):
        # Numeric: bins, then the non-finite values seen.
        edges, low, high, specials = values
        bounds = [low, *edges, high]
        last = len(bounds) - 2
        cats: list[Any] = [Bin(bounds[k], bounds[k + 1], closed=k == last) for k in range(last + 1)]
        cats.extend(specials)
    else:
        cats = list(values)
    # One NaN object, so that lists of categories compare equal (NaN != NaN, but `is` holds).
    cats = [math.nan if isinstance(c, float) and c != c else c for c in cats]
    if has_other:
        cats.append(OTHER)
    if has_null:
        cats.append(None)
    return cats


def category_label(value: object) -> str:
    """How a category of ``categories_`` reads in reports and summaries (not escaped)."""
    if value is OTHER:
        return "(other)"
    if value is None:
        return "(null)"
    if isinstance(value, Bin):
        return f"[{value.low:.4g}, {value.high:.4g}{']' if value.closed else ')'}"
    return str(value)
