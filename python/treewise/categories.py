"""Markers used in ``categories_``: the "other" code and the interval of a numeric bin."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Final

__all__ = ["OTHER", "Bin"]


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
