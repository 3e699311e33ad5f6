"""The exception hierarchy: one base class, one subclass per kind of failure."""

from __future__ import annotations

import warnings

__all__ = [
    "CategoryCapWarning",
    "ColumnKindWarning",
    "CorruptModelError",
    "DataError",
    "ImpossibleEvidenceWarning",
    "MemoryLimitError",
    "NotFittedError",
    "ResourceLimitError",
    "SchemaError",
    "TooManyCategoriesError",
    "TreewiseError",
    "UnseenCategoryWarning",
    "warn",
]


class TreewiseError(Exception):
    """Base class of every error treewise raises on purpose."""


class DataError(TreewiseError, ValueError):
    """The input data is unusable: empty, of an unsupported type, all null, or malformed."""


class SchemaError(DataError):
    """The columns or types do not match what was expected (a fitted model, earlier batches)."""


class TooManyCategoriesError(DataError):
    """A column has more distinct values than treewise can code."""


class CorruptModelError(TreewiseError, ValueError):
    """A model or statistics file is damaged, hostile, or of an unknown version."""


class ResourceLimitError(TreewiseError, MemoryError):
    """The work would pass a memory or size limit."""


class MemoryLimitError(ResourceLimitError):
    """The work would pass ``memory_limit``: the message says what needed how much, what to do."""


class CategoryCapWarning(UserWarning):
    """Some values of a column were merged into its "other" code by ``max_categories``."""


class ColumnKindWarning(UserWarning):
    """A column was left out of the model (only nulls, or an identifier) or holds one value."""


class NotFittedError(TreewiseError, ValueError, AttributeError):
    """A method that needs a fitted model was called before ``fit``."""


class ImpossibleEvidenceWarning(UserWarning):
    """Some rows' evidence has probability zero under the model (possible only with alpha=0)."""


class UnseenCategoryWarning(UserWarning):
    """Scored data held values (or nulls) that the model never saw in fitting."""


def warn(message: str, category: type[Warning]) -> None:
    """Issue a warning attributed to the user's line.

    That is the first frame outside treewise (and outside the standard library's contextlib,
    which treewise's passes run inside).
    """
    import contextlib
    import sys
    from pathlib import Path

    skip = (str(Path(__file__).resolve().parent), str(Path(contextlib.__file__).resolve()))
    level, frame = 2, sys._getframe(1)  # stacklevel 2 is the caller of this function
    while frame is not None and str(Path(frame.f_code.co_filename).resolve()).startswith(skip):
        level += 1
        frame = frame.f_back  # type: ignore[assignment]
    warnings.warn(message, category, stacklevel=level)
