"""Bad inputs and bad parameters to DependencyTree.fit: the right exception class, a useful message.

Every error raised on purpose must be a treewise.TreewiseError subclass (or, for parameters and
non-tables, the standard ValueError/TypeError), and its message must name the offending column,
type or parameter. No input may surface as a pyo3 PanicException.
"""

from __future__ import annotations

import datetime
import decimal
import warnings

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pytest
from treewise import (
    CategoryCapWarning,
    ColumnKindWarning,
    DataError,
    DependencyTree,
    MemoryLimitError,
    NotFittedError,
    ResourceLimitError,
    SchemaError,
    TreewiseError,
)

GOOD = pa.table({"a": [1, 2, 1, 2], "b": ["x", "y", "x", "x"]})


# -- empty data ----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "data",
    [
        pytest.param(pa.table({"a": pa.array([], pa.int64())}), id="pyarrow"),
        pytest.param(pd.DataFrame({"a": pd.Series([], dtype="int64")}), id="pandas"),
        pytest.param(pl.DataFrame({"a": pl.Series([], dtype=pl.Int64)}), id="polars"),
        pytest.param(
            pa.RecordBatchReader.from_batches(pa.schema([("a", pa.int64())]), []), id="reader"
        ),
        pytest.param(GOOD.slice(4), id="sliced_to_nothing"),
    ],
)
def test_zero_rows_is_a_data_error(data: object) -> None:
    with pytest.raises(DataError, match="0 rows"):
        DependencyTree().fit(data)


@pytest.mark.parametrize(
    "data",
    [
        pytest.param(pa.table({}), id="pyarrow"),
        pytest.param(GOOD.select([]), id="pyarrow_rows_no_columns"),
        pytest.param(pd.DataFrame(index=range(3)), id="pandas"),
        pytest.param(pl.DataFrame(), id="polars"),
    ],
)
def test_zero_columns_is_a_data_error(data: object) -> None:
    with pytest.raises(DataError, match="no columns"):
        DependencyTree().fit(data)


def test_empty_columns_argument_is_a_data_error() -> None:
    with pytest.raises(DataError, match="columns="):
        DependencyTree(columns=[]).fit(GOOD)


@pytest.mark.parametrize(
    "column",
    [
        pytest.param(pa.array([None, None, None, None], pa.null()), id="null_type"),
        pytest.param(pa.array([None] * 4, pa.int64()), id="int64"),
        pytest.param(pa.array([None] * 4, pa.uint8()), id="uint8"),
        pytest.param(pa.array([None] * 4, pa.string()), id="string"),
        pytest.param(pa.array([None] * 4, pa.bool_()), id="bool"),
        pytest.param(
            pa.DictionaryArray.from_arrays(pa.array([None] * 4, pa.int32()), pa.array(["u"])),
            id="dictionary_null_keys",
        ),
        pytest.param(
            pa.chunked_array(
                [pa.array([None, None], pa.int64()), pa.array([None, None], pa.int64())]
            ),
            id="two_chunks",
        ),
    ],
)
def test_all_null_column_is_left_out_with_a_warning_naming_it(column: object) -> None:
    table = GOOD.append_column("empty_col", column)
    with pytest.warns(ColumnKindWarning, match=r"'empty_col'.*only nulls.*left out"):
        model = DependencyTree().fit(table)
    assert list(model.feature_names_in_) == ["a", "b"]
    # With nothing else to model, it is an error that says why.
    with pytest.raises(DataError, match=r"no column is left to model.*'empty_col'.*only nulls"):
        DependencyTree(columns=["empty_col"]).fit(table)


def test_pandas_all_none_column_is_left_out_naming_it() -> None:
    frame = pd.DataFrame({"a": [1, 2, 3], "nothing": [None, None, None]})
    with pytest.warns(ColumnKindWarning, match="'nothing'"):
        model = DependencyTree().fit(frame)
    assert list(model.feature_names_in_) == ["a"]


def test_all_null_column_left_out_with_columns_fits() -> None:
    table = GOOD.append_column("empty_col", pa.array([None] * 4, pa.null()))
    model = DependencyTree(columns=["b", "a"]).fit(table)
    assert list(model.feature_names_in_) == ["b", "a"]


@pytest.mark.parametrize(
    "column",
    [
        pytest.param(pa.array([None] * 4, pa.float64()), id="float64_nulls"),
    ],
)
def test_all_null_float_column_is_left_out_naming_it(column: object) -> None:
    table = GOOD.append_column("empty_col", column)
    with pytest.warns(ColumnKindWarning, match=r"'empty_col'.*only nulls"):
        model = DependencyTree().fit(table)
    assert "empty_col" not in model.feature_names_in_


def test_a_column_of_nan_values_is_constant_not_null() -> None:
    # In Arrow, NaN is a value (a null is marked in the validity bitmap): docs/column-kinds.md.
    table = GOOD.append_column("nan_col", pa.array([float("nan")] * 4, pa.float32()))
    with pytest.warns(ColumnKindWarning, match=r"'nan_col' holds a single value"):
        model = DependencyTree().fit(table)
    assert model.kinds_["nan_col"] == "constant"
    assert np.isnan(model.categories_[2][0])


@pytest.mark.parametrize("bad", [float("inf"), float("-inf")], ids=["inf", "-inf"])
@pytest.mark.parametrize("float_type", [pa.float32(), pa.float64()], ids=str)
def test_an_infinity_is_a_value_of_its_own(bad: float, float_type: pa.DataType) -> None:
    column = pa.array([1.0, None, bad, 2.0], float_type)
    model = DependencyTree().fit(GOOD.append_column("inf_col", column))
    assert model.categories_[2] == [*sorted([1.0, 2.0, bad]), None]
    sampled = model.sample(400, random_state=0).column("inf_col").to_pylist()
    assert bad in sampled


def test_an_infinity_in_a_dictionary_column_is_a_value() -> None:
    keys = pa.array([1, 1, 1, 0], pa.int8())
    column = pa.DictionaryArray.from_arrays(keys, pa.array([float("inf"), 1.0]))
    model = DependencyTree().fit(pa.table({"f": column, "g": [1, 2, 1, 2]}))
    assert model.categories_[0] == [1.0, float("inf")]
    assert model.marginal_counts("f").tolist() == [3, 1]


def test_unused_dictionary_entries_are_not_values() -> None:
    dictionary = pa.array([1.0, float("inf"), 2.0, float("nan")], pa.float64())
    keys = pa.array([0, 2, 0, 3], pa.int8())
    table = GOOD.append_column("f", pa.DictionaryArray.from_arrays(keys, dictionary))
    model = DependencyTree(columns=["f"]).fit(table)
    # Only the used values count: 1.0, 2.0 and NaN (a value here: the key is not null).
    assert model.categories_[0][:2] == [1.0, 2.0] and np.isnan(model.categories_[0][2])
    assert model.marginal_counts("f").tolist() == [2, 1, 1]


# -- unsupported types ---------------------------------------------------------------------------

UNSUPPORTED = [
    ("list", pa.array([[1], [2, 3], [], None])),
    ("struct", pa.array([{"x": 1}, {"x": 2}, None, {"x": 3}])),
    ("binary", pa.array([b"a", b"b", b"", None], pa.binary())),
    ("largebinary", pa.array([b"a", b"b", b"", None], pa.large_binary())),
    ("decimal128", pa.array([decimal.Decimal("1.5")] * 3 + [None], pa.decimal128(4, 1))),
    ("float16", pa.array(np.array([1, 2, 3, 4], np.float16))),
    ("float16", pa.array(np.array([1, 2, 3, 4], np.float16)).dictionary_encode()),
]


@pytest.mark.parametrize(
    ("type_word", "column"),
    [pytest.param(w, c, id=f"{w}-{c.type}") for w, c in UNSUPPORTED],
)
def test_unsupported_type_is_a_data_error_naming_column_and_type(
    type_word: str, column: pa.Array
) -> None:
    table = GOOD.append_column("bad_col", column)
    with pytest.raises(DataError) as info:
        DependencyTree().fit(table)
    message = str(info.value)
    assert "'bad_col'" in message
    assert type_word in message.lower()
    # The message lists what is supported.
    assert "Supported types" in message
    for supported in ("bool", "integers", "utf8", "dictionary", "float32", "float64"):
        assert supported in message
    # The unsupported column can be left out.
    DependencyTree(columns=["a", "b"]).fit(table)


def test_unsupported_type_from_pandas_and_polars() -> None:
    frame = pd.DataFrame({"a": [1, 2], "lists": [[1], [2, 3]]})
    with pytest.raises(DataError, match="'lists'"):
        DependencyTree().fit(frame)
    polars_frame = pl.DataFrame({"a": [1, 2], "lists": [[1], [2, 3]]})
    with pytest.raises(DataError, match=r"'lists'.*List"):
        DependencyTree().fit(polars_frame)


def test_dates_and_timestamps_are_supported() -> None:
    frame = pl.DataFrame(
        {
            "a": [1, 2, 1, 2],
            "when": [datetime.date(2020, 1, d) for d in (1, 2, 3, 4)],
            "at": [datetime.datetime(2020, 1, 1, h) for h in (1, 2, 3, 4)],
        }
    )
    model = DependencyTree().fit(frame)
    sampled = model.sample(10, random_state=0)
    assert sampled.schema.field("when").type == pa.date32()
    assert pa.types.is_timestamp(sampled.schema.field("at").type)


# -- pandas specifics ----------------------------------------------------------------------------


@pytest.mark.parametrize(
    "values",
    [[1, "x", 2], [1.5, "x", None], ["x", b"y", "z"]],
    ids=["int_str", "float_str", "bytes"],
)
def test_pandas_object_column_of_mixed_types_is_a_data_error(values: list[object]) -> None:
    frame = pd.DataFrame({"ok": [1, 2, 3], "mixed_col": pd.Series(values, dtype=object)})
    with pytest.raises(DataError, match="mixed_col"):
        DependencyTree().fit(frame)


@pytest.mark.parametrize(
    "names", [[0, 1], ["a", 7], [("a", "b"), ("a", "c")]], ids=["ints", "mixed", "tuples"]
)
def test_pandas_non_string_column_names_are_a_data_error(names: list[object]) -> None:
    frame = pd.DataFrame([[1, 2], [3, 4]], columns=names)
    with pytest.raises(DataError, match="column names must be strings") as info:
        DependencyTree().fit(frame)
    bad = next(n for n in names if not isinstance(n, str))
    assert repr(bad) in str(info.value)


def test_pandas_duplicate_column_names_are_a_schema_error() -> None:
    frame = pd.DataFrame([[1, 2], [3, 4]], columns=["dup", "dup"])
    with pytest.raises(SchemaError, match="dup"):
        DependencyTree().fit(frame)


# -- schema errors -------------------------------------------------------------------------------


def _duplicated() -> pa.Table:
    return pa.Table.from_arrays(
        [pa.array([1, 2]), pa.array([3, 4]), pa.array([5, 6])], names=["dup", "dup", "solo"]
    )


def test_duplicate_column_names_are_a_schema_error() -> None:
    with pytest.raises(SchemaError, match=r"duplicate column names.*'dup'"):
        DependencyTree().fit(_duplicated())
    with pytest.raises(SchemaError, match="'dup'"):
        DependencyTree(columns=["solo", "dup"]).fit(_duplicated())
    # Picking only distinct names is fine.
    assert DependencyTree(columns=["solo"]).fit(_duplicated()).n_features_in_ == 1


def test_missing_column_is_a_schema_error_naming_it() -> None:
    with pytest.raises(SchemaError, match="'nowhere'"):
        DependencyTree(columns=["a", "nowhere"]).fit(GOOD)


def test_repeated_column_is_a_schema_error_naming_it() -> None:
    with pytest.raises(SchemaError, match=r"'b'.*more than once"):
        DependencyTree(columns=["b", "a", "b"]).fit(GOOD)


@pytest.mark.parametrize("columns", ["a", ["a", 3], [None]], ids=["str", "int_name", "none_name"])
def test_columns_of_the_wrong_type_is_a_type_error(columns: object) -> None:
    with pytest.raises(TypeError, match="columns="):
        DependencyTree(columns=columns).fit(GOOD)  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("root", "columns"),
    [("zzz", None), ("b", ["a"]), (0, None)],
    ids=["absent", "unselected", "index"],
)
def test_root_not_a_modelled_column_is_a_schema_error(root: object, columns: object) -> None:
    with pytest.raises(SchemaError, match=f"root={root!r}"):
        DependencyTree(root=root, columns=columns).fit(GOOD)  # type: ignore[arg-type]


# -- bad parameters ------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("params", "error", "word"),
    [
        ({"max_categories": 1}, ValueError, "max_categories"),
        ({"max_categories": 0}, ValueError, "max_categories"),
        ({"max_categories": -5}, ValueError, "max_categories"),
        ({"max_categories": 70_000}, ValueError, "max_categories"),
        ({"max_categories": 65_536}, ValueError, "max_categories"),
        ({"max_categories": 2.5}, TypeError, "max_categories"),
        ({"max_categories": True}, TypeError, "max_categories"),
        ({"max_categories": "10"}, TypeError, "max_categories"),
        ({"max_categories": None}, TypeError, "max_categories"),
        ({"n_bins": 0}, ValueError, "n_bins"),
        ({"n_bins": 65_535}, ValueError, "n_bins"),
        ({"n_bins": 2.0}, TypeError, "n_bins"),
        ({"n_bins": False}, TypeError, "n_bins"),
    ],
    ids=lambda v: repr(v) if isinstance(v, dict) else None,
)
def test_bad_parameters(params: dict[str, object], error: type[Exception], word: str) -> None:
    with pytest.raises(error, match=word):
        DependencyTree(**params).fit(GOOD)  # type: ignore[arg-type]


def test_parameter_bounds_are_accepted() -> None:
    DependencyTree(max_categories=65_535, n_bins=65_534).fit(GOOD)
    # One bin makes the number column constant, which is warned about.
    with pytest.warns(ColumnKindWarning, match="'a' holds a single value"):
        DependencyTree(max_categories=np.int64(2), n_bins=np.int32(1)).fit(GOOD)  # type: ignore[arg-type]
    # Parameters are checked before the data is read: even unusable data gives the parameter error.
    with pytest.raises(ValueError, match="n_bins"):
        DependencyTree(n_bins=0).fit(pa.table({}))


# -- not a table ---------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("data", "type_name"),
    [
        ([[1, 2], [3, 4]], "list"),
        (3, "int"),
        ({"a": [1, 2]}, "dict"),
        (None, "NoneType"),
        (np.array([[1, 2], [3, 4]]), "ndarray"),
    ],
    ids=lambda v: None if isinstance(v, str) else type(v).__name__,
)
def test_not_a_table_is_a_type_error_naming_the_type(data: object, type_name: str) -> None:
    with pytest.raises(TypeError, match=f"cannot read a {type_name}\\b"):
        DependencyTree().fit(data)


def test_a_string_is_a_path_and_a_missing_one_is_named() -> None:
    with pytest.raises(FileNotFoundError, match=r"no-such-table\.csv"):
        DependencyTree().fit("no-such-table.csv")


@pytest.mark.parametrize(
    ("data", "type_name"),
    [
        (pa.array([1, 2, 3]), "Int64Array"),
        (pa.chunked_array([[1, 2, 3]]), "ChunkedArray"),
        (pd.Series([1, 2, 3], name="a"), "Series"),
        (pl.Series("a", [1, 2, 3]), "Series"),
    ],
    ids=["pa_array", "pa_chunked_array", "pd_series", "pl_series"],
)
def test_a_single_column_object_is_a_type_error(data: object, type_name: str) -> None:
    with pytest.raises(TypeError, match=type_name):
        DependencyTree().fit(data)


# -- not fitted ----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "call",
    [
        lambda m: m.edges(),
        lambda m: m.joint_counts("a", "b"),
        lambda m: m.joint_counts(0, 1),
        lambda m: m.marginal_counts("a"),
    ],
    ids=["edges", "joint_counts", "joint_counts_by_index", "marginal_counts"],
)
def test_before_fit_is_not_fitted_error(call: object) -> None:
    model = DependencyTree()
    with pytest.raises(NotFittedError, match="not fitted") as info:
        call(model)  # type: ignore[operator]
    assert isinstance(info.value, AttributeError)
    assert isinstance(info.value, TreewiseError)
    assert not hasattr(model, "parent_")


def test_failed_fit_leaves_the_model_unfitted() -> None:
    model = DependencyTree()
    with pytest.raises(DataError):
        model.fit(pa.table({"a": pa.array([], pa.int64())}))
    with pytest.raises(NotFittedError):
        model.edges()


# -- malformed data ------------------------------------------------------------------------------


def test_dictionary_key_out_of_range_is_a_data_error() -> None:
    keys = pa.array([0, 5, 1], pa.int32())
    bad = pa.DictionaryArray.from_arrays(keys, pa.array(["p", "q"]), safe=False)
    with pytest.raises(DataError, match="malformed"):
        DependencyTree().fit(pa.table({"ok": [1, 2, 3], "broken": bad}))


def test_malformed_dictionary_error_names_the_column() -> None:
    keys = pa.array([0, -1, 1], pa.int8())
    bad = pa.DictionaryArray.from_arrays(keys, pa.array(["p", "q"]), safe=False)
    with pytest.raises(DataError) as info:
        DependencyTree().fit(pa.table({"ok": [1, 2, 3], "broken": bad}))
    assert "'broken'" in str(info.value)
    assert "-1" in str(info.value)


# -- fuzz: never a panic -----------------------------------------------------------------------

_INT_TYPES = [pa.int8(), pa.int16(), pa.int32(), pa.int64()]
_UINT_TYPES = [pa.uint8(), pa.uint16(), pa.uint32(), pa.uint64()]
_STR_TYPES = [pa.string(), pa.large_string(), pa.string_view()]


def _random_column(rng: np.random.Generator, n: int) -> pa.Array:
    kind = rng.choice(
        ["int", "uint", "bool", "str", "float", "dict", "null"], p=[0.16] * 6 + [0.04]
    )
    null_rate = rng.choice([0.0, 0.3, 1.0], p=[0.55, 0.4, 0.05])
    mask = rng.random(n) < null_rate

    def with_nulls(values: list[object]) -> list[object]:
        return [None if m else v for v, m in zip(values, mask, strict=True)]

    if kind == "int":
        t = _INT_TYPES[rng.integers(len(_INT_TYPES))]
        info = np.iinfo(t.to_pandas_dtype())
        pool = [int(info.min), int(info.max), 0, -1, 1]
        return pa.array(with_nulls([pool[k] for k in rng.integers(0, 5, n)]), t)
    if kind == "uint":
        t = _UINT_TYPES[rng.integers(len(_UINT_TYPES))]
        pool = [0, 1, int(np.iinfo(t.to_pandas_dtype()).max)]
        return pa.array(with_nulls([pool[k] for k in rng.integers(0, 3, n)]), t)
    if kind == "bool":
        return pa.array(with_nulls([bool(b) for b in rng.integers(0, 2, n)]), pa.bool_())
    if kind == "str":
        t = _STR_TYPES[rng.integers(len(_STR_TYPES))]
        pool = ["", "a", "é", "x" * 40, "\x00", " "]
        return pa.array(with_nulls([pool[k] for k in rng.integers(0, 6, n)]), t)
    if kind == "float":
        t = [pa.float32(), pa.float64()][rng.integers(2)]
        pool = [-0.0, 0.0, 1.5, -1e300 if t == pa.float64() else -1e30, float("nan")]
        if rng.random() < 0.3:
            pool += [float("inf"), float("-inf")]
        return pa.array(with_nulls([pool[k] for k in rng.integers(0, len(pool), n)]), t)
    if kind == "dict":
        dictionary = pa.array(["p", "q", "", None][: rng.integers(1, 5)])
        keys = with_nulls([int(k) for k in rng.integers(0, len(dictionary), n)])
        return pa.DictionaryArray.from_arrays(pa.array(keys, pa.int16()), dictionary)
    return pa.nulls(n)


def _random_table(rng: np.random.Generator) -> pa.Table:
    n = int(rng.choice([1, 1, 2, 3, 7]))
    d = int(rng.integers(1, 5))
    table = pa.table({f"c{i}": _random_column(rng, n) for i in range(d)})
    if n > 1 and rng.random() < 0.5:
        cut = int(rng.integers(1, n))
        halves = (table.slice(0, cut), table.slice(cut))
        table = pa.Table.from_batches([b for half in halves for b in half.to_batches()])
    return table


@pytest.mark.parametrize("seed", range(60))
def test_fuzz_fit_succeeds_or_raises_a_treewise_error(seed: int) -> None:
    rng = np.random.default_rng(seed)
    table = _random_table(rng)
    max_categories = int(rng.choice([2, 3, 128]))
    n_bins = int(rng.choice([1, 2, 10]))
    model = DependencyTree(max_categories=max_categories, n_bins=n_bins)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CategoryCapWarning)
        warnings.simplefilter("ignore", ColumnKindWarning)
        try:
            model.fit(table)
        except TreewiseError:
            return  # a PanicException (a BaseException) or any other class fails the test
    # Columns of nulls only (a null key or a null dictionary value alike) are left out; every
    # other column is modelled.
    nulls_only = [set(table.column(i).to_pylist()) == {None} for i in range(table.num_columns)]
    d = nulls_only.count(False)
    assert model.n_rows_ == table.num_rows
    assert model.n_features_in_ == d
    assert sorted(model.parent_.tolist()).count(-1) == 1
    assert model.edges().num_rows == d - 1
    for i in range(d):
        counts = model.marginal_counts(i)
        assert int(counts.sum()) == table.num_rows
        assert len(counts) == len(model.categories_[i])
        # Numeric: the bins, one code per non-finite value (three at most) and null.
        assert len(counts) <= max(max_categories, n_bins + 4)


# -- resource limits -----------------------------------------------------------------------------


def test_pair_tables_beyond_the_cell_limit_are_a_resource_limit_error() -> None:
    # docs/errors.md: ResourceLimitError when "the pair tables would pass 2**33 cells". Three
    # columns of 65,534 distinct values (every one kept under max_categories=65,535) need
    # 3 * 65,534**2 (about 1.3e10) cells; the codebook pass that finds this out stays small.
    n = 65_534
    assert 3 * n * n > 2**33
    table = pa.table({name: np.arange(n, dtype=np.int32) for name in ("a", "b", "c")})
    wide = dict.fromkeys(("a", "b", "c"), "categorical")
    # Past any memory limit the hard cap holds; the message says what to do, and the class is
    # both a TreewiseError and a MemoryError.
    with pytest.raises(ResourceLimitError, match="cells") as caught:
        DependencyTree(max_categories=65_535, kinds=wide, memory_limit="1000TB").fit(table)
    assert "max_categories" in str(caught.value) and "fewer columns" in str(caught.value)
    assert isinstance(caught.value, TreewiseError) and isinstance(caught.value, MemoryError)
    # Under a lower limit the memory limit refuses first, with the figure: 3 tables of
    # 65,534^2 u64 cells.
    with pytest.raises(MemoryLimitError, match=r"pair statistics 96\.0 GiB"):
        DependencyTree(max_categories=65_535, kinds=wide, memory_limit="64GiB").fit(table)
