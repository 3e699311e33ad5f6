"""Shared helpers for the test suite."""

from __future__ import annotations

import itertools
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
import treewise


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption(
        "--run-slow", action="store_true", default=False, help="also run the tests marked slow"
    )


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Tests marked ``slow`` (declared in pyproject.toml) are skipped unless --run-slow is given."""
    if config.getoption("--run-slow"):
        return
    skip = pytest.mark.skip(reason="slow: run with --run-slow")
    for item in items:
        if "slow" in item.keywords:
            item.add_marker(skip)


def reference_columns(table: pa.Table) -> dict[str, np.ndarray[Any, Any]]:
    """The numpy reference's input for a pyarrow table: floats as float64 with NaN for null,
    everything else as an object array of plain Python values with None for null."""
    out: dict[str, np.ndarray[Any, Any]] = {}
    for name, column in zip(table.column_names, table.columns, strict=True):
        value_type = column.type
        if pa.types.is_dictionary(value_type):
            value_type = value_type.value_type
        if pa.types.is_floating(value_type):
            out[name] = np.array(
                [np.nan if v is None else v for v in column.to_pylist()], dtype=np.float64
            )
        else:
            values = column.to_pylist()
            array = np.empty(len(values), dtype=object)
            array[:] = values
            out[name] = array
    return out


def model_summary(model: treewise.DependencyTree) -> dict[str, Any]:
    """Everything a fit determines, in plain Python values, to compare two fits exactly."""
    names = list(model.feature_names_in_)
    return {
        "names": names,
        "n_rows": model.n_rows_,
        "parent": model.parent_.tolist(),
        "categories": model.categories_,
        "kinds": [[type(v) for v in c] for c in model.categories_],
        "pairwise": model.pairwise_mutual_info_.tolist(),
        "joints": {
            (a, b): model.joint_counts(a, b).tolist()
            for a, b in itertools.combinations_with_replacement(names, 2)
        },
    }


def assert_same_model(got: treewise.DependencyTree, want: treewise.DependencyTree) -> None:
    """Two fits agree exactly: counts, codes, tree and weights."""
    g, w = model_summary(got), model_summary(want)
    for key in w:
        assert g[key] == w[key], key
    assert got.codebook_ == want.codebook_


def raw_labels(column: pa.ChunkedArray | pa.Array) -> pd.Series:
    """A column's values as plain Python objects, with null as a label of its own ("<null>"), the
    way the model counts it; taken straight from the data, not from the model's codes."""
    values = column.to_pylist()
    return pd.Series(["<null>" if v is None else v for v in values], dtype=object)


def raw_crosstab(table: pa.Table, a: str, b: str) -> np.ndarray[Any, Any]:
    """The contingency table of columns ``a`` and ``b`` counted from the raw rows with
    pandas.crosstab (levels that occur only; rows and columns in sorted label order)."""
    x, y = raw_labels(table[a]), raw_labels(table[b])
    return pd.crosstab(x.astype(str), y.astype(str)).to_numpy().astype(np.int64)
