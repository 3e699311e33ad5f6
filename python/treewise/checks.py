"""Parameter checks and seeding shared by every estimator, view and pass: one home, one message."""

from __future__ import annotations

import math
import numbers
import os
from collections.abc import Mapping

import numpy as np

from treewise.errors import SchemaError
from treewise.memory import DEFAULT_SHARE, machine_memory, parse_size

__all__ = [
    "MAX_CATEGORIES",
    "MAX_SAMPLE_ROWS",
    "RandomState",
    "check_alpha",
    "check_int",
    "check_memory_limit",
    "check_nonnegative",
    "check_prune",
    "check_root",
    "seed_of",
]

#: The most codes a column may have (codes are 16-bit, with one value reserved).
MAX_CATEGORIES = 65_535
#: The most rows one sampling call accepts (2**40, about a trillion).
MAX_SAMPLE_ROWS = 2**40

RandomState = int | np.random.Generator | np.random.RandomState | None


def check_int(name: str, value: object, low: int, high: int) -> int:
    """``value`` as an int, refused unless it is an integer (not a bool) in [low, high]."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"{name} must be an integer, got {value!r}")
    if not low <= int(value) <= high:
        raise ValueError(f"{name} must be between {low} and {high}, got {value}")
    return int(value)


def check_memory_limit(value: object) -> int | None:
    """``memory_limit`` in bytes.

    None gives the default, ``DEFAULT_SHARE`` of the machine's memory (None, no bound, when it
    cannot be read); an int is bytes; a string is bytes with a unit ("4GiB", "500MB") or a share
    of the machine's memory ("50%").
    """
    whole = machine_memory()
    if value is None:
        return None if whole is None else int(whole * DEFAULT_SHARE)
    if isinstance(value, bool) or not isinstance(value, numbers.Integral | str):
        raise TypeError(
            f"memory_limit must be bytes (an int), a size such as '4GiB' or a share such as "
            f"'50%', got {value!r}"
        )
    limit = parse_size(value, whole) if isinstance(value, str) else int(value)
    if limit < 1:
        raise ValueError(f"memory_limit must be at least one byte, got {value!r}")
    return limit


def check_nonnegative(name: str, value: object) -> float:
    """``value`` as a float, refused unless it is a finite real number (not a bool) >= 0."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a number, got {value!r}")
    number = float(value)
    if not (math.isfinite(number) and number >= 0):
        raise ValueError(f"{name} must be a finite number >= 0, got {value!r}")
    return number


def check_alpha(alpha: object) -> float:
    """The smoothing ``alpha``: a finite number >= 0."""
    return check_nonnegative("alpha", alpha)


def check_prune(prune: object) -> tuple[str, float]:
    """The core's (kind, level) for a ``prune`` parameter."""
    if prune is None:
        return "none", 0.0
    if prune == "bic":
        return "bic", 0.0
    if isinstance(prune, numbers.Real) and not isinstance(prune, bool):
        level = float(prune)
        if 0.0 < level < 1.0:
            return "level", level
        raise ValueError(f"a pruning significance level must be between 0 and 1, got {prune}")
    raise ValueError(f"prune must be None, 'bic' or a significance level in (0, 1); got {prune!r}")


def check_root(root: str | None, names: list[str], what: str = "the modelled columns") -> int:
    """The index of the ``root`` column among ``names`` (the first when None)."""
    if root is None:
        return 0
    if root in names:
        return names.index(root)
    raise SchemaError(f"root={root!r} is not one of {what} {names}")


#: How a column may be modelled (``kinds=``; docs/column-kinds.md).
KINDS = ("auto", "categorical", "numeric", "ignore")


def check_kinds(kinds: object, names: list[str]) -> dict[str, str]:
    """The ``kinds`` parameter (column name -> kind), checked against the columns being fitted."""
    if kinds is None:
        return {}
    if not isinstance(kinds, Mapping):
        raise TypeError(f"kinds must be a dict of column name to kind, got {kinds!r}")
    out = {}
    for column, kind in kinds.items():
        if column not in names:
            raise SchemaError(f"kinds names {column!r}, which is not one of the columns {names}")
        if kind not in KINDS:
            raise ValueError(f"kinds[{column!r}] is {kind!r}; use one of {KINDS}")
        out[str(column)] = str(kind)
    return out


def seed_of(random_state: RandomState) -> int:
    """A 64-bit seed for the core's generator from scikit-learn-style ``random_state``."""
    if random_state is None:
        return int.from_bytes(os.urandom(8), "little")
    if isinstance(random_state, np.random.Generator):
        return int(random_state.integers(0, 2**64, dtype=np.uint64))
    if isinstance(random_state, np.random.RandomState):
        return int(random_state.randint(0, 2**63, dtype=np.int64))
    if isinstance(random_state, numbers.Integral) and not isinstance(random_state, bool):
        if 0 <= int(random_state) < 2**64:
            return int(random_state)
        raise ValueError(f"random_state must be between 0 and 2**64 - 1, got {random_state}")
    raise TypeError(
        f"random_state must be None, an int, or a numpy Generator/RandomState, got {random_state!r}"
    )
