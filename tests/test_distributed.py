"""fit_dask on a real two-process LocalCluster gives the local fit, bit for bit.

One cluster (two worker processes, one thread each) serves the whole module. Every check
compares against ``DependencyTree.fit`` on the same rows in this process: codes, every pair's
counts, the mutual information (exact ``==``) and the tree.
"""

from __future__ import annotations

import itertools
import os
import subprocess
import sys
import textwrap
import warnings
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import dask
import dask.dataframe as dd
import distributed
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from conftest import assert_same_model
from dask.delayed import delayed
from treewise import (
    CategoryCapWarning,
    DataError,
    DependencyTree,
    SchemaError,
)
from treewise.datasets import model_columns, shop_sessions
from treewise.distributed import fit_dask

SESSIONS = shop_sessions(6000, 31)
COLUMNS = model_columns(SESSIONS)
FRAME = SESSIONS.to_pandas()


def _float_frame(n: int, seed: int) -> pd.DataFrame:
    """Continuous floats (nearly every value distinct) with NaN, an int and a category."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(n) * 50.0
    y = np.where(rng.random(n) < 0.9, 0.5 * x + rng.standard_normal(n), rng.standard_normal(n))
    y[rng.random(n) < 0.02] = np.nan
    level = (x > 0).astype(np.int64) + (rng.random(n) < 0.2)
    shade = pd.Categorical(np.where(y > 0, "light", "dark"))
    return pd.DataFrame({"x": x, "y": y, "level": level, "shade": shade})


def _ran_on(client: distributed.Client, tasks: list[dict[str, Any]]) -> dict[str, int]:
    """How many tasks of each kind ran, checking that they ran on the cluster's workers."""
    workers = set(client.scheduler_info()["workers"])
    assert {t["worker"] for t in tasks} <= workers
    kinds: dict[str, int] = {}
    for t in tasks:
        key = t["key"][0] if isinstance(t["key"], tuple) else t["key"]
        prefix = str(key).rsplit("-", 1)[0]
        kinds[prefix] = kinds.get(prefix, 0) + 1
    return kinds


# -- without any client: Dask's local schedulers ---------------------------------------------
# A distributed Client makes itself the default scheduler for the whole process, so this check
# runs in a fresh interpreter where none ever existed (and with every warning an error).

NO_CLIENT_SCRIPT = textwrap.dedent(
    """
    import sys, warnings
    warnings.simplefilter("error")
    import dask, dask.dataframe as dd, numpy as np, pandas as pd
    from treewise import DependencyTree
    from treewise.distributed import fit_dask

    rng = np.random.default_rng(4)
    n = 3000
    x = rng.standard_normal(n)
    frame = pd.DataFrame({
        "x": np.where(rng.random(n) < 0.05, np.nan, x),
        "b": x + rng.standard_normal(n) > 0,
        "k": pd.Categorical(np.where(x > 0.5, "high", np.where(x < -0.5, "low", "mid"))),
    })
    assert "distributed" not in sys.modules
    want = DependencyTree().fit(frame)
    for scheduler in ("threads", "synchronous"):
        with dask.config.set(scheduler=scheduler):
            got = fit_dask(dd.from_pandas(frame, npartitions=5))
        assert got.parent_.tolist() == want.parent_.tolist()
        assert got.categories_ == want.categories_
        assert np.array_equal(got.pairwise_mutual_info_, want.pairwise_mutual_info_)
        for a in frame.columns:
            for b in frame.columns:
                assert np.array_equal(got.joint_counts(a, b), want.joint_counts(a, b))
    # Dask may import distributed to look for a client, but none was ever made.
    if "distributed" in sys.modules:
        import distributed
        try:
            distributed.default_client()
        except ValueError:
            pass
        else:
            raise AssertionError("a distributed client exists")
    print("same")
    """
)


def test_fit_dask_without_a_client_in_a_fresh_process() -> None:
    result = subprocess.run(
        [sys.executable, "-c", NO_CLIENT_SCRIPT],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
        env={**os.environ, "PYTHONWARNINGS": "error"},
    )
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "same"


# -- on the cluster ------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def client() -> Iterator[distributed.Client]:
    with (
        distributed.LocalCluster(
            n_workers=2, processes=True, threads_per_worker=1, dashboard_address=":0"
        ) as cluster,
        distributed.Client(cluster) as c,
    ):
        yield c


def test_partitions_equal_the_local_fit(client: distributed.Client) -> None:
    ddf = dd.from_pandas(FRAME, npartitions=7)
    with distributed.get_task_stream(client) as stream:
        model = fit_dask(ddf, columns=COLUMNS)
    kinds = _ran_on(client, stream.data)
    assert kinds.get("_tally", 0) >= 7 and kinds.get("_count", 0) >= 7
    assert_same_model(model, DependencyTree(columns=COLUMNS).fit(FRAME))
    # Scoring and sampling work off the merged counts like a local model's.
    local = DependencyTree(columns=COLUMNS).fit(FRAME)
    assert np.array_equal(model.score_samples(SESSIONS), local.score_samples(SESSIONS))
    assert model.sample(500, random_state=3).equals(local.sample(500, random_state=3))


def test_split_every_does_not_change_the_result(client: distributed.Client) -> None:
    ddf = dd.from_pandas(FRAME, npartitions=9)
    want = DependencyTree(columns=COLUMNS).fit(FRAME)
    for split_every in (2, 3, 1024):
        assert_same_model(fit_dask(ddf, columns=COLUMNS, split_every=split_every), want)


def test_filtered_partitions_equal_the_local_fit(client: distributed.Client) -> None:
    ddf = dd.from_pandas(FRAME, npartitions=7)
    kept = ddf[ddf.session_id % 3 == 0]
    sizes = kept.map_partitions(len).compute().tolist()
    assert len(sizes) == 7 and min(sizes) > 0
    want = DependencyTree(columns=COLUMNS).fit(FRAME[FRAME.session_id % 3 == 0])
    assert_same_model(fit_dask(kept, columns=COLUMNS), want)


def test_empty_partitions_are_harmless(client: distributed.Client) -> None:
    ddf = dd.from_pandas(FRAME, npartitions=7)
    low, high = FRAME.session_id.iloc[1200], FRAME.session_id.iloc[5400]
    kept = ddf[(ddf.session_id < low) | (ddf.session_id >= high)]
    sizes = kept.map_partitions(len).compute().tolist()
    assert len(sizes) == 7 and sizes.count(0) >= 3 and sum(sizes) == 1800
    want = DependencyTree(columns=COLUMNS).fit(
        FRAME[(FRAME.session_id < low) | (FRAME.session_id >= high)]
    )
    assert_same_model(fit_dask(kept, columns=COLUMNS), want)
    # Empty partitions first, too: the merge must not take its column types from them.
    late = ddf[ddf.session_id >= FRAME.session_id.iloc[5000]]
    assert late.map_partitions(len).compute().tolist()[:3] == [0, 0, 0]
    assert_same_model(
        fit_dask(late, columns=COLUMNS), DependencyTree(columns=COLUMNS).fit(FRAME[5000:])
    )


def test_all_partitions_empty_is_a_data_error(client: distributed.Client) -> None:
    ddf = dd.from_pandas(FRAME, npartitions=3)
    with pytest.raises(DataError, match="0 rows"):
        fit_dask(ddf[ddf.session_id < 0], columns=COLUMNS)


def test_float_columns_bin_identically(client: distributed.Client) -> None:
    frame = _float_frame(20_000, 2)
    want = DependencyTree(n_bins=16).fit(frame)
    got = fit_dask(dd.from_pandas(frame, npartitions=7), n_bins=16)
    assert_same_model(got, want)
    # x: 16 bins; y: 16 bins and the null code (NaN is null).
    assert [len(c) for c in got.categories_[:2]] == [16, 17]
    assert got.categories_[1][-1] is None


def test_more_distinct_floats_than_the_exact_tally_keeps(client: distributed.Client) -> None:
    # Beyond 2**20 distinct values a float tally is coarsened; per partition it is not, but the
    # merged tally is. The bins must still be the local fit's. The partitions are made on the
    # workers (a nested function travels by value), so no large graph is sent.
    rows = (2**20 + 60_000) // 2

    def make(k: int) -> pd.DataFrame:
        rng = np.random.default_rng([3, k])
        x = rng.standard_normal(rows) * 50.0
        level = (x > 0).astype(np.int64) + (rng.random(rows) < 0.2)
        return pd.DataFrame({"x": x, "level": level})

    frame = pd.concat([make(k) for k in range(2)], ignore_index=True)
    assert frame["x"].nunique() > 2**20
    meta = pd.DataFrame({"x": pd.Series(dtype=np.float64), "level": pd.Series(dtype=np.int64)})
    ddf = dd.from_delayed([delayed(make)(k) for k in range(2)], meta=meta)
    want = DependencyTree(n_bins=12).fit(frame)
    # Coarsened edges are truncated values, not all of them data values: the path was taken.
    edges = np.array([b.low for b in want.categories_[0][1:]])
    assert not np.isin(edges, frame["x"].to_numpy()).all()
    assert_same_model(fit_dask(ddf, n_bins=12), want)


def test_parquet_directory_equals_the_local_fit(client: distributed.Client, tmp_path: Path) -> None:
    bounds = [0, 1000, 1001, 3500, 6000]
    for k, (a, b) in enumerate(itertools.pairwise(bounds)):
        piece = SESSIONS.slice(a, b - a)
        if k == 2:  # one file with plain strings instead of dictionaries
            piece = pa.table(
                {
                    name: (
                        column.cast(pa.string()) if pa.types.is_dictionary(column.type) else column
                    )
                    for name, column in zip(piece.column_names, piece.columns, strict=True)
                }
            )
        pq.write_table(piece, tmp_path / f"part-{k}.parquet", row_group_size=400)
    (tmp_path / "_SUCCESS").write_text("")
    want = DependencyTree(columns=COLUMNS).fit(tmp_path)
    assert_same_model(want, DependencyTree(columns=COLUMNS).fit(SESSIONS))
    with distributed.get_task_stream(client) as stream:
        got = fit_dask(str(tmp_path), columns=COLUMNS)
    assert _ran_on(client, stream.data).get("_tally", 0) == 4
    assert_same_model(got, want)
    assert_same_model(fit_dask(str(tmp_path / "part-*.parquet"), columns=COLUMNS), want)


def test_file_with_an_all_null_column_first(client: distributed.Client, tmp_path: Path) -> None:
    table = pa.table({"k": pa.array([1, 2, 3, 1, 2, 3] * 50), "s": ["a", "b", "c"] * 100})
    pq.write_table(pa.table({"k": pa.nulls(4), "s": ["a", "b", "a", "c"]}), tmp_path / "a.parquet")
    pq.write_table(table, tmp_path / "b.parquet")
    want = DependencyTree().fit(tmp_path)
    assert_same_model(fit_dask(str(tmp_path)), want)


def test_files_whose_integer_width_grows(client: distributed.Client, tmp_path: Path) -> None:
    narrow = pa.table({"k": pa.array([1, 2, 1, 2] * 5, pa.int8()), "s": ["a", "b", "b", "a"] * 5})
    wide = pa.table({"k": pa.array([1, 2, 300, 2] * 25), "s": ["a", "b", "c", "a"] * 25})
    pq.write_table(narrow, tmp_path / "a.parquet")
    pq.write_table(wide, tmp_path / "b.parquet")
    want = DependencyTree().fit(pa.concat_tables([narrow.cast(wide.schema), wide]))
    assert_same_model(fit_dask(str(tmp_path)), want)


def test_category_cap_warns_on_the_driver_like_a_local_fit(client: distributed.Client) -> None:
    ddf = dd.from_pandas(FRAME, npartitions=5)
    with warnings.catch_warnings(record=True) as local_warnings:
        warnings.simplefilter("always")
        want = DependencyTree(columns=COLUMNS, max_categories=4).fit(FRAME)
    assert local_warnings and all(w.category is CategoryCapWarning for w in local_warnings)
    with pytest.warns(CategoryCapWarning) as record:
        got = fit_dask(ddf, columns=COLUMNS, max_categories=4)
    assert sorted(str(w.message) for w in record) == sorted(str(w.message) for w in local_warnings)
    assert_same_model(got, want)


def test_category_cap_warning_points_at_the_callers_line(client: distributed.Client) -> None:
    ddf = dd.from_pandas(FRAME, npartitions=2)
    with pytest.warns(CategoryCapWarning) as record:
        line = sys._getframe().f_lineno + 1
        fit_dask(ddf, columns=["device", "region"], max_categories=3)
    assert [(w.filename, w.lineno) for w in record] == [(__file__, line)] * len(record)


def _exploding_frame() -> dd.DataFrame:
    """A Dask DataFrame whose partitions raise if any task ever computes them."""

    def explode(k: int) -> pd.DataFrame:
        raise RuntimeError(f"partition {k} was computed")

    parts = [delayed(explode)(k) for k in range(4)]
    return dd.from_delayed(parts, meta=FRAME.head(0), verify_meta=False)


@pytest.mark.parametrize(
    ("kwargs", "error", "match"),
    [
        ({"max_categories": 1}, ValueError, "max_categories"),
        ({"max_categories": 70_000}, ValueError, "max_categories"),
        ({"max_categories": True}, TypeError, "max_categories"),
        ({"n_bins": 0}, ValueError, "n_bins"),
        ({"alpha": -0.5}, ValueError, "alpha"),
        ({"alpha": float("nan")}, ValueError, "alpha"),
        ({"alpha": "0.5"}, TypeError, "alpha"),
        ({"split_every": 1}, ValueError, "split_every"),
        ({"columns": ["device", "no_such_column"]}, SchemaError, "no_such_column"),
        ({"columns": "device"}, TypeError, "columns"),
        ({"columns": ["device", "device"]}, SchemaError, "device"),
        ({"columns": ["device", "region"], "root": "purchase"}, SchemaError, "purchase"),
        ({"colums": ["device"]}, TypeError, "colums"),
    ],
)
def test_bad_parameters_raise_before_any_task_runs(
    client: distributed.Client, kwargs: dict[str, Any], error: type[Exception], match: str
) -> None:
    ddf = _exploding_frame()
    with pytest.raises(RuntimeError, match="was computed"):  # the trap works
        ddf.map_partitions(len).compute()
    with distributed.get_task_stream(client) as stream, pytest.raises(error, match=match):
        fit_dask(ddf, **{"columns": COLUMNS, **kwargs})
    assert stream.data == []


@pytest.mark.parametrize(
    "data",
    [SESSIONS, FRAME, {"device": ["a"]}, 42, np.zeros((3, 2))],
    ids=["Table", "DataFrame", "dict", "int", "ndarray"],
)
def test_non_dask_input_is_a_type_error_naming_the_type(data: Any) -> None:
    with pytest.raises(TypeError, match=type(data).__name__):
        fit_dask(data)


def test_synchronous_scheduler_bypasses_the_client(client: distributed.Client) -> None:
    frame = _float_frame(5000, 9)
    with distributed.get_task_stream(client) as stream, dask.config.set(scheduler="synchronous"):
        got = fit_dask(dd.from_pandas(frame, npartitions=4))
    assert stream.data == []
    assert_same_model(got, DependencyTree().fit(frame))
