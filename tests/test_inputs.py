"""Every supported input form of the same data gives the same model, exactly.

The reference is always a fit on a plain pyarrow Table; every other form (record batches, readers,
pandas, polars, dictionary encodings, integer and string widths, chunking) must reproduce its
codes, counts, mutual information and tree bit for bit.
"""

from __future__ import annotations

import itertools
import math
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pyarrow.compute as pc
import pytest
from treewise import OTHER, Bin, CategoryCapWarning, DependencyTree

N_ROWS = 1200


# -- invented data -----------------------------------------------------------------------------


def _chain_table(n: int = N_ROWS, seed: int = 7) -> pa.Table:
    """A chain a -> b -> s -> c with nulls, an empty string, long strings and a gap in ints.

    Each link copies its parent most of the time, so the maximum spanning tree is the chain.
    """
    rng = np.random.default_rng(seed)
    a = rng.integers(0, 5, n)
    b = np.where(rng.random(n) < 0.85, a, rng.integers(0, 5, n))
    words = np.array(["", "x", "yy", "a string longer than twelve bytes", "zz"], dtype=object)
    s_idx = np.where(rng.random(n) < 0.75, b, rng.integers(0, 5, n))
    s = words[s_idx]
    c = np.where(rng.random(n) < 0.8, s_idx % 2 == 0, rng.random(n) < 0.5)
    a_values = [
        None if m else int(v) * 10 - 20 for v, m in zip(a, rng.random(n) < 0.05, strict=True)
    ]
    s_values = [None if m else str(v) for v, m in zip(s, rng.random(n) < 0.04, strict=True)]
    c_values = [None if m else bool(v) for v, m in zip(c, rng.random(n) < 0.03, strict=True)]
    return pa.table(
        {
            "a": pa.array(a_values, pa.int64()),
            "b": pa.array(b.tolist(), pa.int64()),
            "s": pa.array(s_values, pa.string()),
            "c": pa.array(c_values, pa.bool_()),
        }
    )


TABLE = _chain_table()


def _summary(model: DependencyTree) -> dict[str, Any]:
    names = list(model.feature_names_in_)
    joints = {
        (x, y): model.joint_counts(x, y).tolist() for x, y in itertools.product(names, repeat=2)
    }
    return {
        "names": names,
        "n_rows": model.n_rows_,
        "parent": model.parent_.tolist(),
        "categories": model.categories_,
        "mutual_info": model.mutual_info_.tolist(),
        "pairwise": model.pairwise_mutual_info_.tolist(),
        "joints": joints,
    }


def _assert_same_model(got: DependencyTree, want: DependencyTree) -> None:
    g, w = _summary(got), _summary(want)
    for key in w:
        assert g[key] == w[key], key
    # Python's 0 == False would let an int column pass for a bool one: compare the kinds too.
    for cg, cw in zip(g["categories"], w["categories"], strict=True):
        assert [type(v) for v in cg] == [type(v) for v in cw]


@pytest.fixture(scope="module")
def reference() -> DependencyTree:
    return DependencyTree().fit(TABLE)


# -- sanity of the reference itself --------------------------------------------------------------


def test_reference_recovers_the_chain_and_counts_rows(reference: DependencyTree) -> None:
    # The chain 0 - 1 - 2 - 3, hung from its centre (the lower of the two middle columns).
    assert reference.parent_.tolist() == [1, -1, 1, 2]
    assert reference.n_rows_ == N_ROWS
    assert reference.categories_[0] == [-20, -10, 0, 10, 20, None]
    assert reference.categories_[2] == [
        "",
        "a string longer than twelve bytes",
        "x",
        "yy",
        "zz",
        None,
    ]
    assert reference.categories_[3] == [False, True, None]
    # Every marginal adds up to the rows, and the null code counts the nulls.
    for i, name in enumerate(TABLE.column_names):
        counts = reference.marginal_counts(name)
        assert int(counts.sum()) == N_ROWS
        if reference.categories_[i][-1] is None:
            assert int(counts[-1]) == TABLE.column(name).null_count


# -- the same data in every supported container ------------------------------------------------


class _StreamOnly:
    """Exposes a table through __arrow_c_stream__ and nothing else."""

    def __init__(self, table: pa.Table) -> None:
        self._table = table

    def __arrow_c_stream__(self, requested_schema: object = None) -> object:
        return self._table.__arrow_c_stream__(requested_schema)


class _ArrayOnly:
    """Exposes one record batch through __arrow_c_array__ and nothing else."""

    def __init__(self, batch: pa.RecordBatch) -> None:
        self._batch = batch

    def __arrow_c_array__(self, requested_schema: object = None) -> tuple[object, object]:
        return self._batch.__arrow_c_array__(requested_schema)


def test_stream_only_wrapper_is_not_a_pyarrow_object() -> None:
    wrapped = _StreamOnly(TABLE)
    assert not isinstance(wrapped, (pa.Table, pa.RecordBatch, pa.RecordBatchReader))
    assert not hasattr(wrapped, "__arrow_c_array__")


@pytest.mark.parametrize(
    "make",
    [
        pytest.param(lambda t: t.combine_chunks().to_batches()[0], id="record_batch"),
        pytest.param(
            lambda t: pa.RecordBatchReader.from_batches(t.schema, t.to_batches(max_chunksize=100)),
            id="record_batch_reader",
        ),
        pytest.param(_StreamOnly, id="arrow_c_stream_only"),
        pytest.param(lambda t: _ArrayOnly(t.combine_chunks().to_batches()[0]), id="c_array_only"),
        pytest.param(lambda t: pl.from_arrow(t), id="polars"),
        pytest.param(
            lambda t: pl.from_arrow(t).with_columns(pl.col("s").cast(pl.Categorical)),
            id="polars_categorical",
        ),
        pytest.param(
            lambda t: pl.from_arrow(t).with_columns(
                pl.col("s").cast(
                    pl.Enum(
                        ["zz", "never used", "yy", "x", "a string longer than twelve bytes", ""]
                    )
                )
            ),
            id="polars_enum",
        ),
    ],
)
def test_containers_give_the_same_model(make: Any, reference: DependencyTree) -> None:
    _assert_same_model(DependencyTree().fit(make(TABLE)), reference)


def _pandas_frames() -> dict[str, pd.DataFrame]:
    plain = pd.DataFrame(
        {
            "a": pd.array(TABLE.column("a").to_pylist(), dtype="Int64"),
            "b": TABLE.column("b").to_numpy(),
            "s": pd.array(TABLE.column("s").to_pylist(), dtype="string"),
            "c": pd.array(TABLE.column("c").to_pylist(), dtype="boolean"),
        }
    )
    categorical = plain.copy()
    # Categories in a scrambled order, one of them never used.
    categorical["s"] = pd.Categorical(
        TABLE.column("s").to_pylist(),
        categories=["zz", "unused", "x", "", "a string longer than twelve bytes", "yy"],
    )
    categorical["b"] = pd.Categorical(TABLE.column("b").to_pylist(), categories=[4, 2, 0, 3, 9, 1])
    with_index = plain.set_index(pd.RangeIndex(5, 5 + N_ROWS * 3, 3))
    return {"nullable_dtypes": plain, "categorical": categorical, "custom_index": with_index}


@pytest.mark.parametrize("kind", ["nullable_dtypes", "categorical", "custom_index"])
def test_pandas_frames_give_the_same_model(kind: str, reference: DependencyTree) -> None:
    frame = _pandas_frames()[kind]
    _assert_same_model(DependencyTree().fit(frame), reference)


# -- dictionary encodings ---------------------------------------------------------------------


def _dict_chunks(values: list[Any], dictionaries: list[list[Any]], value_type: pa.DataType) -> Any:
    """Dictionary-encode consecutive slices of ``values``, each slice with its own dictionary."""
    chunks = []
    start = 0
    sizes = [len(values) // len(dictionaries)] * len(dictionaries)
    sizes[-1] += len(values) - sum(sizes)
    for dictionary, size in zip(dictionaries, sizes, strict=True):
        part = values[start : start + size]
        start += size
        index = {v: k for k, v in enumerate(dictionary)}
        keys = pa.array([None if v is None else index[v] for v in part], pa.int32())
        chunks.append(pa.DictionaryArray.from_arrays(keys, pa.array(dictionary, value_type)))
    return pa.chunked_array(chunks)


def test_dictionary_chunks_with_different_dictionaries(reference: DependencyTree) -> None:
    long = "a string longer than twelve bytes"
    s_dicts = [
        ["zz", "x", "unused", "", "yy", long],
        [long, "", "never", "yy", "x", "zz", "also never"],
        ["yy", "zz", "x", "", long],
    ]
    a_dicts = [[20, -20, 999, 0, 10, -10], [-10, 0, 10, 20, -20], [0, -20, 10, 20, -10, -7]]
    c_dicts = [[True, False], [False, True], [True, False]]
    table = pa.table(
        {
            "a": _dict_chunks(TABLE.column("a").to_pylist(), a_dicts, pa.int64()),
            "b": TABLE.column("b"),
            "s": _dict_chunks(TABLE.column("s").to_pylist(), s_dicts, pa.string()),
            "c": _dict_chunks(TABLE.column("c").to_pylist(), c_dicts, pa.bool_()),
        }
    )
    assert table.column("s").num_chunks == 3
    assert table.column("s").chunk(0).dictionary != table.column("s").chunk(1).dictionary
    model = DependencyTree().fit(table)
    _assert_same_model(model, reference)
    # Unused dictionary entries are not values of the column.
    assert "unused" not in model.categories_[2]
    assert 999 not in model.categories_[0]


def test_null_dictionary_value_is_the_null_code() -> None:
    # Rows 1 and 3 reach a null through the dictionary, row 4 through a null key.
    keys = pa.array([0, 1, 2, 1, None, 0], pa.int8())
    dictionary = pa.array(["p", None, "q"], pa.string())
    encoded = pa.table(
        {"s": pa.DictionaryArray.from_arrays(keys, dictionary), "t": [1, 2, 3, 2, 2, 1]}
    )
    plain = pa.table({"s": ["p", None, "q", None, None, "p"], "t": [1, 2, 3, 2, 2, 1]})
    got, want = DependencyTree().fit(encoded), DependencyTree().fit(plain)
    _assert_same_model(got, want)
    assert got.categories_[0] == ["p", "q", None]
    assert got.marginal_counts("s").tolist() == [2, 1, 3]


# -- chunking -----------------------------------------------------------------------------------


def test_one_batch_or_many_gives_identical_counts(reference: DependencyTree) -> None:
    sizes = [1, 7, 1000, 3]
    sizes.append(N_ROWS - sum(sizes))
    starts = np.cumsum([0, *sizes[:-1]])
    batches = TABLE.combine_chunks().to_batches()
    assert len(batches) == 1
    # Offsets 1, 8, 1008 and 1011 are not byte-aligned for the validity and bool bitmaps.
    pieces = [batches[0].slice(int(o), n) for o, n in zip(starts, sizes, strict=True)]
    many = pa.Table.from_batches(pieces)
    assert [b.num_rows for b in many.to_batches()] == sizes
    _assert_same_model(DependencyTree().fit(many), reference)
    _assert_same_model(DependencyTree().fit(TABLE.combine_chunks()), reference)


def test_columns_chunked_at_different_rows(reference: DependencyTree) -> None:
    def rechunk(column: pa.ChunkedArray, cuts: list[int]) -> pa.ChunkedArray:
        flat = column.combine_chunks()
        bounds = [0, *cuts, len(flat)]
        return pa.chunked_array([flat.slice(lo, hi - lo) for lo, hi in itertools.pairwise(bounds)])

    table = pa.table(
        {
            "a": rechunk(TABLE.column("a"), [3, 500]),
            "b": rechunk(TABLE.column("b"), [1, 2, 3, 900]),
            "s": rechunk(TABLE.column("s"), [611]),
            "c": rechunk(TABLE.column("c"), [5, 13, 1001]),
        }
    )
    _assert_same_model(DependencyTree().fit(table), reference)


# -- widths of integer and string types ----------------------------------------------------------


def _with_types(table: pa.Table, types: dict[str, pa.DataType]) -> pa.Table:
    return pa.table(
        {n: table.column(n).cast(types.get(n, table.column(n).type)) for n in table.column_names}
    )


@pytest.mark.parametrize(
    "int_type",
    [pa.int8(), pa.int16(), pa.int32(), pa.uint8(), pa.uint16(), pa.uint32(), pa.uint64()],
    ids=str,
)
def test_integer_widths_give_the_same_model(int_type: pa.DataType) -> None:
    # Non-negative values that fit every width, in both integer columns.
    base = _with_types(
        pa.table(
            {
                "a": pc.add(TABLE.column("a"), 20),
                "b": TABLE.column("b"),
                "c": TABLE.column("c"),
            }
        ),
        {},
    )
    want = DependencyTree().fit(base)
    assert want.categories_[0] == [0, 10, 20, 30, 40, None]
    got = DependencyTree().fit(_with_types(base, {"a": int_type, "b": int_type}))
    _assert_same_model(got, want)


def test_extreme_integers_keep_their_values() -> None:
    lo, hi = -(2**63), 2**63 - 1
    signed = pa.table({"v": pa.array([hi, lo, 0, hi, -1], pa.int64()), "w": [1, 0, 0, 1, 0]})
    unsigned = pa.table({"v": pa.array([2**64 - 1, 0, 2**63, 2**64 - 1, 1], pa.uint64())})
    assert DependencyTree().fit(signed).categories_[0] == [lo, -1, 0, hi]
    model = DependencyTree().fit(unsigned)
    assert model.categories_[0] == [0, 1, 2**63, 2**64 - 1]
    assert model.marginal_counts("v").tolist() == [1, 1, 1, 2]


@pytest.mark.parametrize("str_type", [pa.large_string(), pa.string_view()], ids=str)
def test_string_types_give_the_same_model(str_type: pa.DataType, reference: DependencyTree) -> None:
    table = _with_types(TABLE, {"s": str_type})
    assert table.column("s").type == str_type
    _assert_same_model(DependencyTree().fit(table), reference)


def test_float32_and_float64_of_exact_values_bin_alike() -> None:
    rng = np.random.default_rng(3)
    x = rng.integers(-40, 40, 500) / 4.0  # quarters are exact in float32
    y = (x > 0).astype(np.int64)
    t64 = pa.table({"x": pa.array(x, pa.float64()), "y": y})
    t32 = pa.table({"x": pa.array(x, pa.float32()), "y": y})
    _assert_same_model(DependencyTree().fit(t32), DependencyTree().fit(t64))


# -- shape of the model --------------------------------------------------------------------------


@pytest.mark.parametrize("name", ["a", "s", "c"])
def test_one_column_is_a_one_node_model(name: str, reference: DependencyTree) -> None:
    model = DependencyTree().fit(TABLE.select([name]))
    assert model.parent_.tolist() == [-1]
    assert model.n_features_in_ == 1
    assert model.mutual_info_.tolist() == [0.0]
    assert model.pairwise_mutual_info_.shape == (1, 1)
    edges = model.edges()
    assert edges.num_rows == 0
    assert edges.column_names == ["parent", "child", "mutual_info", "g_statistic", "dof", "p_value"]
    i = TABLE.column_names.index(name)
    assert model.categories_ == [reference.categories_[i]]
    assert model.marginal_counts(name).tolist() == reference.marginal_counts(name).tolist()


def test_columns_selects_and_orders(reference: DependencyTree) -> None:
    model = DependencyTree(columns=["s", "a"]).fit(TABLE)
    assert list(model.feature_names_in_) == ["s", "a"]
    assert model.n_features_in_ == 2
    assert model.categories_ == [reference.categories_[2], reference.categories_[0]]
    assert model.parent_.tolist() == [-1, 0]
    assert model.joint_counts("s", "a").tolist() == reference.joint_counts("s", "a").tolist()
    assert model.mutual_info_[1] == reference.pairwise_mutual_info_[0, 2]


def _undirected(model: DependencyTree) -> set[frozenset[str]]:
    names = list(model.feature_names_in_)
    return {frozenset((names[c], names[p])) for c, p in enumerate(model.parent_) if p >= 0}


@pytest.mark.parametrize("root", ["a", "b", "s", "c"])
def test_root_changes_orientation_only(root: str, reference: DependencyTree) -> None:
    model = DependencyTree(root=root).fit(TABLE)
    names = list(model.feature_names_in_)
    r = names.index(root)
    assert model.parent_[r] == -1
    assert sum(model.parent_ == -1) == 1
    assert _undirected(model) == _undirected(reference)
    assert sorted(model.mutual_info_) == sorted(reference.mutual_info_)
    assert math.isclose(model.mutual_info_.sum(), reference.mutual_info_.sum(), rel_tol=1e-12)
    # Edges list parents before children, and every child's parent is its parent_.
    edges = model.edges().to_pylist()
    assert len(edges) == len(names) - 1
    placed = {root}
    for e in edges:
        assert e["parent"] in placed
        assert names[model.parent_[names.index(e["child"])]] == e["parent"]
        placed.add(e["child"])


def test_root_at_the_end_of_the_chain_reverses_it() -> None:
    model = DependencyTree(root="c").fit(TABLE)
    assert model.parent_.tolist() == [1, 2, 3, -1]


# -- the cap on categories ---------------------------------------------------------------------


def _capped_table() -> pa.Table:
    freq = {10: 6, 7: 5, 3: 4, -2: 4, 0: 2, 100: 1, None: 3}
    values = [v for v, k in freq.items() for _ in range(k)]
    words = [None if v is None else f"w{v}" for v in values]
    return pa.table({"v": pa.array(values, pa.int64()), "u": words})


def test_cap_keeps_the_most_frequent_and_warns() -> None:
    table = _capped_table()
    with pytest.warns(CategoryCapWarning, match="'v'") as record:
        model = DependencyTree(columns=["v"], max_categories=5).fit(table)
    assert len(record) == 1
    # Keep 5 - 1 (other) - 1 (null) = 3: 10 and 7, then 3 and -2 tie at 4 and -2 is smaller.
    assert model.categories_[0] == [-2, 7, 10, OTHER, None]
    assert model.categories_[0][3] is OTHER
    assert model.marginal_counts("v").tolist() == [4, 5, 6, 4 + 2 + 1, 3]
    assert "3 rare values in 7 rows" in str(record[0].message)


def test_cap_ties_prefer_the_smaller_string() -> None:
    table = pa.table({"s": ["b", "b", "c", "c", "a", "a", "d", "e", "e", "e"]})
    with pytest.warns(CategoryCapWarning, match="'s'"):
        model = DependencyTree(max_categories=3).fit(table)
    # e (3) first; a, b, c tie at 2 and a wins.
    assert model.categories_[0] == ["a", "e", OTHER]
    assert model.marginal_counts("s").tolist() == [2, 3, 5]


def test_cap_warning_names_only_the_capped_column() -> None:
    table = _capped_table()
    with pytest.warns(CategoryCapWarning) as record:
        model = DependencyTree(max_categories=5).fit(table)
    messages = [str(w.message) for w in record]
    assert len(messages) == 2
    assert sum("'v'" in m for m in messages) == 1
    assert sum("'u'" in m for m in messages) == 1
    # u relabels v ("w" + value, ties broken by the string), so the codes match one to one.
    assert model.categories_[1] == ["w-2", "w10", "w7", OTHER, None]
    joint = model.joint_counts("v", "u")
    assert (np.count_nonzero(joint, axis=0) == 1).all()
    assert (np.count_nonzero(joint, axis=1) == 1).all()


def test_cap_applies_to_each_column_alone() -> None:
    table = _capped_table().append_column("few", pa.array([1, 2] * 12 + [1], pa.int64()))
    with pytest.warns(CategoryCapWarning) as record:
        model = DependencyTree(columns=["few", "v"], max_categories=5).fit(table)
    assert len(record) == 1
    assert "'v'" in str(record[0].message) and "'few'" not in str(record[0].message)
    assert model.categories_[0] == [1, 2]


def test_no_cap_when_values_and_null_fit_exactly() -> None:
    # 6 values + a null code = 7 codes: max_categories=7 needs no "other" and must not warn
    # (pytest turns any warning into an error here).
    model = DependencyTree(columns=["v"], max_categories=7).fit(_capped_table())
    assert model.categories_[0] == [-2, 0, 3, 7, 10, 100, None]
    assert OTHER not in model.categories_[0]


def test_cap_of_two_with_nulls_sends_every_value_to_other() -> None:
    table = pa.table({"v": [1, 2, None, 1]})
    with pytest.warns(CategoryCapWarning, match="'v'"):
        model = DependencyTree(max_categories=2).fit(table)
    assert model.categories_[0] == [OTHER, None]
    assert model.marginal_counts("v").tolist() == [3, 1]


# -- float binning -------------------------------------------------------------------------------


def test_float_bins_cover_the_data_and_nan_is_a_value() -> None:
    rng = np.random.default_rng(11)
    x = rng.normal(size=400).round(3)
    x[[5, 50, 77]] = np.nan
    values = [None if i in (9, 10) else float(v) for i, v in enumerate(x)]
    table = pa.table({"x": pa.array(values, pa.float64()), "k": (np.nan_to_num(x) > 0).tolist()})
    model = DependencyTree(n_bins=6).fit(table)
    cats = model.categories_[0]
    # Bins, then NaN (a value of its own in Arrow data), then null.
    bins, nan, null = cats[:-2], cats[-2], cats[-1]
    assert null is None and math.isnan(nan)
    assert all(isinstance(b, Bin) for b in bins)
    assert 1 <= len(bins) <= 6
    present = np.array([v for v in values if v is not None and not math.isnan(v)])
    assert bins[0].low == present.min()
    assert bins[-1].high == present.max()
    assert bins[-1].closed and not any(b.closed for b in bins[:-1])
    for left, right in itertools.pairwise(bins):
        assert left.high == right.low
        assert left.low < left.high
    counts = model.marginal_counts("x")
    # Each value falls in exactly one bin, and the counts agree with Bin.__contains__.
    for v in present:
        assert sum(v in b for b in bins) == 1
    assert counts[:-2].tolist() == [sum(v in b for v in present) for b in bins]
    assert counts[-2:].tolist() == [3, 2]  # three NaN, two nulls


def test_float_column_of_one_value_is_one_category_or_one_closed_bin() -> None:
    model = DependencyTree().fit(pa.table({"x": [2.5, 2.5, None]}))
    assert model.categories_[0] == [2.5, None]
    assert model.marginal_counts("x").tolist() == [2, 1]
    binned = DependencyTree(kinds={"x": "numeric"}).fit(pa.table({"x": [2.5, 2.5, None]}))
    assert binned.categories_[0] == [Bin(2.5, 2.5, closed=True), None]
    assert 2.5 in binned.categories_[0][0]
