"""treewise: fit, score, sample and explain dependency trees over large categorical tables."""

from __future__ import annotations

import os
import warnings
from importlib.metadata import PackageNotFoundError, version

from treewise import _core
from treewise._core import Codebook
from treewise.categories import OTHER, Bin
from treewise.classifier import TreeAugmentedClassifier
from treewise.compare import Comparison, compare
from treewise.domains import public_codebook
from treewise.errors import (
    CategoryCapWarning,
    ColumnKindWarning,
    CorruptModelError,
    DataError,
    ImpossibleEvidenceWarning,
    MemoryLimitError,
    NotFittedError,
    ResourceLimitError,
    SchemaError,
    TooManyCategoriesError,
    TreewiseError,
    UnseenCategoryWarning,
)
from treewise.estimator import DependencyTree
from treewise.mixture import TreeMixture, choose_n_components
from treewise.pairstats import PairStats

try:
    __version__ = version("treewise")
except PackageNotFoundError:  # running from a source tree without an install
    __version__ = "0.0.0+unknown"


def load(path: str | os.PathLike[str]) -> DependencyTree:
    """Read a model saved with ``DependencyTree.save``.

    The file is checked in full (header, version, checksum, every length, code and count) before
    it is used; a damaged or foreign file raises ``CorruptModelError``. Nothing in the file is
    executed: it holds numbers and names only.
    """
    return DependencyTree.load(path)


if _core.DEBUG_BUILD:
    warnings.warn(
        "treewise's Rust core is a debug build and runs many times slower; rebuild it with "
        "`maturin develop --release` (make build does)",
        RuntimeWarning,
        stacklevel=2,
    )

__all__ = [
    "OTHER",
    "Bin",
    "CategoryCapWarning",
    "Codebook",
    "ColumnKindWarning",
    "Comparison",
    "CorruptModelError",
    "DataError",
    "DependencyTree",
    "ImpossibleEvidenceWarning",
    "MemoryLimitError",
    "NotFittedError",
    "PairStats",
    "ResourceLimitError",
    "SchemaError",
    "TooManyCategoriesError",
    "TreeAugmentedClassifier",
    "TreeMixture",
    "TreewiseError",
    "UnseenCategoryWarning",
    "__version__",
    "choose_n_components",
    "compare",
    "load",
    "public_codebook",
]
