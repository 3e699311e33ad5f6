"""The catalogue of bad inputs (docs/errors.md): each gets its typed error and a useful message.

Every case checks the exception class, that the message says what was wrong, where, and what to
do, and, where the call writes output, that nothing is left behind in the output folder. The
cases are listed one per row in docs/errors.md.
"""

from __future__ import annotations

import math
import os
import signal
import struct
import subprocess
import sys
import tempfile
import textwrap
import threading
import time
import zlib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import treewise
from treewise import (
    OTHER,
    CategoryCapWarning,
    ColumnKindWarning,
    CorruptModelError,
    DataError,
    DependencyTree,
    NotFittedError,
    SchemaError,
    TooManyCategoriesError,
    TreewiseError,
    UnseenCategoryWarning,
)
from treewise.sources import SkippedFileWarning

HEADER = 28  # magic 8, version 4, kind 4, payload length 8, CRC-32 4 (docs/model-format.md)
SUPPORTED = "Supported types: bool, signed and unsigned integers, strings"


def small_table() -> pa.Table:
    return pa.table(
        {
            "a": pa.array([1, 2, 1, 2, 3, 1], pa.int64()),
            "b": ["x", "y", "x", "x", "y", None],
            "f": [0.5, 1.5, 2.5, 3.5, 0.25, 1.0],
        }
    )


@pytest.fixture(scope="module")
def model() -> DependencyTree:
    return DependencyTree().fit(small_table())


@pytest.fixture(scope="module")
def model_bytes(model: DependencyTree, tmp_path_factory: pytest.TempPathFactory) -> bytes:
    path = tmp_path_factory.mktemp("model") / "m.treewise"
    model.save(path)
    return path.read_bytes()


@pytest.fixture
def spool_dir(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """The system temporary directory, redirected so that leftover spool files can be seen."""
    spool = tmp_path / "systemp"
    spool.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(spool))
    return spool


def resign(data: bytes, payload: bytes) -> bytes:
    """A file with a new payload and a header whose length and CRC-32 match it."""
    header = bytearray(data[:HEADER])
    struct.pack_into("<Q", header, 16, len(payload))
    # outside check: zlib.crc32 is the CRC-32 (IEEE polynomial) that the format names
    struct.pack_into("<I", header, 24, zlib.crc32(payload))
    return bytes(header) + payload


def load_bytes(tmp_path: Path, data: bytes) -> DependencyTree:
    path = tmp_path / "bad.treewise"
    path.write_bytes(data)
    return treewise.load(path)


# -- the shape of the table ----------------------------------------------------------------------


def test_empty_table_is_a_data_error(spool_dir: Path) -> None:
    with pytest.raises(DataError, match="0 rows; a dependency tree needs at least one"):
        DependencyTree().fit(pa.table({"a": pa.array([], pa.int64())}))
    # A one-shot stream of no rows is spooled and refused; its spool file is removed.
    schema = pa.schema([("a", pa.int64())])
    reader = pa.RecordBatchReader.from_batches(schema, iter([]))
    with pytest.raises(DataError, match="0 rows"):
        DependencyTree().fit(reader)
    assert list(spool_dir.iterdir()) == []


def test_zero_columns_is_a_data_error() -> None:
    with pytest.raises(DataError, match="has no columns; a dependency tree needs at least one"):
        DependencyTree().fit(pa.table({}))


@pytest.mark.parametrize(
    "column",
    [pa.array([None, None, None], pa.int64()), pa.array([None, None, None])],
    ids=["typed", "null-type"],
)
def test_all_null_column_is_left_out_with_a_warning_naming_it(column: pa.Array) -> None:
    table = pa.table({"a": [1, 2, 3], "empty": column})
    with pytest.warns(ColumnKindWarning, match=r"column 'empty' holds only nulls \(3 rows\)"):
        fitted = DependencyTree().fit(table)
    assert list(fitted.feature_names_in_) == ["a"]
    # Alone, it is an error that says what was wrong.
    with pytest.raises(DataError, match=r"no column is left to model: column 'empty'"):
        DependencyTree(columns=["empty"]).fit(table)


def test_nan_is_a_value_and_null_is_null() -> None:
    table = pa.table({"a": [1, 2], "x": [float("nan"), None]})
    fitted = DependencyTree().fit(table)
    assert math.isnan(fitted.categories_[1][0]) and fitted.categories_[1][1] is None


# -- types ---------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("column", "type_text", "advice"),
    [
        (pa.array([[1], [2, 3]]), "List(Int64)", "cast it to a supported type"),
        (pa.array([{"x": 1}, {"x": 2}]), "Struct(", "cast it to a supported type"),
        (pa.array([b"a", b"b"]), "Binary", "cast it to a supported type"),
        (pa.array([1, 2], pa.decimal128(5, 2)), "Decimal128(5, 2)", "cast it to float64"),
    ],
    ids=["list", "struct", "binary", "decimal"],
)
def test_unsupported_type_lists_supported_types(
    column: pa.Array, type_text: str, advice: str
) -> None:
    table = pa.table({"ok": [1, 2], "odd": column})
    with pytest.raises(DataError) as e:
        DependencyTree().fit(table)
    message = str(e.value)
    assert "column 'odd' has type" in message
    assert type_text in message
    assert advice in message
    assert SUPPORTED in message
    assert "float32/float64, and timestamps, dates, times and durations" in message


def test_pandas_object_column_of_mixed_types_is_a_data_error() -> None:
    frame = pd.DataFrame({"a": [1, "x", 2.5], "b": ["p", "q", "r"]})
    with pytest.raises(DataError, match="could not read the pandas DataFrame as Arrow") as e:
        DependencyTree().fit(frame)
    assert "column a" in str(e.value)
    assert "astype('string')" in str(e.value)


def test_nan_has_a_code_of_its_own() -> None:
    # In Arrow data NaN is a value and null is null (docs/column-kinds.md); pandas turns NaN
    # into null on the way to Arrow.
    table = pa.table({"x": pa.array([0.5, float("nan"), 1.5, None, 2.5, float("nan")])})
    fitted = DependencyTree(n_bins=2).fit(table)
    assert fitted.categories_[0][-1] is None and math.isnan(fitted.categories_[0][-2])
    assert fitted.marginal_counts("x")[-2:].tolist() == [2, 1]
    from_pandas = DependencyTree(n_bins=2).fit(pd.DataFrame({"x": [0.5, np.nan, 1.5, 2.5]}))
    assert from_pandas.categories_[0][-1] is None


@pytest.mark.parametrize(("value", "row"), [(float("inf"), 1), (float("-inf"), 2)])
def test_infinity_in_a_float_column_is_a_value(value: float, row: int) -> None:
    values = [1.0, 2.0, 3.0]
    values[row] = value
    fitted = DependencyTree().fit(pa.table({"x": values}))
    assert value in fitted.categories_[0]


# -- column names --------------------------------------------------------------------------------


def test_duplicate_column_names_are_a_schema_error() -> None:
    table = pa.Table.from_arrays([pa.array([1, 2]), pa.array([3, 4])], names=["a", "a"])
    with pytest.raises(SchemaError, match=r"duplicate column names \['a'\]; rename them"):
        DependencyTree().fit(table)
    frame = pd.DataFrame([[1, 2], [3, 4]], columns=["a", "a"])
    with pytest.raises(SchemaError, match=r"duplicate column names \['a'\]"):
        DependencyTree().fit(frame)


def test_non_string_column_names_are_a_data_error() -> None:
    frame = pd.DataFrame({0: [1, 2], 1: ["x", "y"]})
    with pytest.raises(DataError, match=r"column names must be strings.*\[0, 1\]") as e:
        DependencyTree().fit(frame)
    assert "df.columns.astype(str)" in str(e.value)


def test_column_name_with_a_nul_character_is_named_clearly() -> None:
    table = pa.table({"a\x00b": [1, 2, 1]})
    with pytest.raises(SchemaError, match="NUL"):
        DependencyTree().fit(table)


# -- very wide columns ---------------------------------------------------------------------------


def test_identifier_column_is_left_out_in_bounded_memory(
    monkeypatch: pytest.MonkeyPatch, spool_dir: Path
) -> None:
    limit = 2**21
    n = limit + limit // 2
    ids = pa.array(np.arange(n))
    table = pa.table({"id": ids, "k": pa.array(np.arange(n) % 3)})
    pulled = 0

    def batches() -> Iterator[pa.RecordBatch]:
        nonlocal pulled
        for batch in table.to_batches(max_chunksize=2**18):
            pulled += 1
            yield batch

    with pytest.warns(ColumnKindWarning) as caught:
        fitted = DependencyTree().fit(batches())
    (warning,) = caught
    message = str(warning.message)
    assert f"column 'id' looks like an identifier (more than {limit} distinct values" in message
    assert "left out of the model" in message
    assert list(fitted.feature_names_in_) == ["k"] and fitted.n_rows_ == n
    # Asked to keep it, it is refused: its most frequent values cannot be found in bounded
    # memory.
    with pytest.raises(TooManyCategoriesError, match="bucket it first"):
        DependencyTree(kinds={"id": "categorical"}).fit(table)
    assert pulled == -(-n // 2**18)
    assert list(spool_dir.iterdir()) == []


def test_wide_but_allowed_column_is_capped_with_a_warning() -> None:
    n = 5_000
    table = pa.table({"user": pa.array(np.arange(n) % 1_000), "k": pa.array(np.arange(n) % 3)})
    with pytest.warns(CategoryCapWarning) as caught:
        fitted = DependencyTree(max_categories=50, kinds={"user": "categorical"}).fit(table)
    (warning,) = caught
    assert "column 'user': 951 rare values in 4755 rows share the 'other' code" in str(
        warning.message
    )
    assert "raise max_categories" in str(warning.message)
    assert len(fitted.categories_[0]) == 50
    assert fitted.categories_[0][-1] is OTHER


# -- parameters ----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("params", "error", "message"),
    [
        ({"alpha": -0.5}, ValueError, "alpha must be a finite number >= 0, got -0.5"),
        ({"alpha": float("nan")}, ValueError, "alpha must be a finite number >= 0, got nan"),
        ({"alpha": float("inf")}, ValueError, "alpha must be a finite number >= 0, got inf"),
        ({"alpha": "0.5"}, TypeError, "alpha must be a number, got '0.5'"),
        ({"max_categories": 1}, ValueError, "max_categories must be between 2 and 65535"),
        ({"n_bins": 0}, ValueError, "n_bins must be between 1 and 65534"),
    ],
    ids=["alpha-negative", "alpha-nan", "alpha-inf", "alpha-str", "max-categories", "n-bins"],
)
def test_bad_parameter_is_refused_before_reading(
    params: dict[str, object], error: type[Exception], message: str
) -> None:
    # The data is a stream that fails if read: parameters are checked first.
    def untouchable() -> Iterator[pa.RecordBatch]:
        raise AssertionError("the data was read before the parameters were checked")
        yield  # pragma: no cover

    with pytest.raises(error) as e:
        DependencyTree(**params).fit(untouchable())
    assert message in str(e.value)
    assert not isinstance(e.value, TreewiseError)


def test_bad_prune_is_refused_before_reading() -> None:
    def untouchable() -> Iterator[pa.RecordBatch]:
        raise AssertionError("the data was read before prune= was checked")
        yield  # pragma: no cover

    with pytest.raises(ValueError, match="significance level must be between 0 and 1"):
        DependencyTree(prune=2).fit(untouchable())


def test_bad_alpha_set_after_fit_is_refused(model: DependencyTree) -> None:
    fitted = DependencyTree().fit(small_table())
    fitted.set_params(alpha=float("nan"))
    with pytest.raises(ValueError, match="alpha must be a finite number >= 0"):
        fitted.score_samples(small_table())


@pytest.mark.parametrize(
    ("n", "error", "message"),
    [
        (-1, ValueError, "n must be between 0 and 1099511627776, got -1"),
        (2**40 + 1, ValueError, "n must be between 0 and 1099511627776"),
        (1.5, TypeError, "n must be an integer, got 1.5"),
        ("3", TypeError, "n must be an integer, got '3'"),
        (True, TypeError, "n must be an integer, got True"),
    ],
    ids=["negative", "enormous", "float", "str", "bool"],
)
def test_bad_sample_size(
    model: DependencyTree, tmp_path: Path, n: object, error: type[Exception], message: str
) -> None:
    with pytest.raises(error) as e:
        model.sample(n)  # type: ignore[arg-type]
    assert message in str(e.value)
    with pytest.raises(error):
        model.sample_to_parquet(n, tmp_path / "s.parquet")  # type: ignore[arg-type]
    assert list(tmp_path.iterdir()) == []


def test_sample_of_zero_rows_is_an_empty_table_of_the_fitted_types(
    model: DependencyTree, tmp_path: Path
) -> None:
    empty = model.sample(0, random_state=1)
    assert empty.num_rows == 0
    assert empty.schema == model.sample(3, random_state=1).schema
    assert model.sample_to_parquet(0, tmp_path / "zero.parquet") == 0
    assert pq.read_table(tmp_path / "zero.parquet").num_rows == 0


@pytest.mark.parametrize(
    ("state", "error", "message"),
    [
        (-1, ValueError, "random_state must be between 0 and 2**64 - 1, got -1"),
        (2**64, ValueError, "random_state must be between 0 and 2**64 - 1"),
        (1.5, TypeError, "random_state must be None, an int, or a numpy Generator/RandomState"),
        ("seed", TypeError, "random_state must be None, an int, or a numpy Generator/RandomState"),
    ],
    ids=["negative", "too-large", "float", "str"],
)
def test_bad_random_state(
    model: DependencyTree, state: object, error: type[Exception], message: str
) -> None:
    with pytest.raises(error) as e:
        model.sample(5, random_state=state)  # type: ignore[arg-type]
    assert message in str(e.value)


# -- scoring data against a fitted model ---------------------------------------------------------


def test_scoring_data_missing_a_column_is_a_schema_error(model: DependencyTree) -> None:
    with pytest.raises(SchemaError, match=r"columns \['b', 'f'\] are not in .*; it has \['a'\]"):
        model.score_samples(pa.table({"a": [1]}))


@pytest.mark.parametrize(
    ("column", "found", "fitted"),
    [
        ("a", pa.array(["1"]), ("Utf8", "int")),
        ("a", pa.array([1.0]), ("Float64", "int")),
        ("b", pa.array([1]), ("Int64", "str")),
        ("a", pa.array([True]), ("Boolean", "int")),
    ],
    ids=["str-for-int", "float-for-int", "int-for-str", "bool-for-int"],
)
def test_scoring_a_column_of_another_type_is_a_schema_error(
    model: DependencyTree, column: str, found: pa.Array, fitted: tuple[str, str]
) -> None:
    row = {"a": pa.array([1]), "b": pa.array(["x"]), "f": pa.array([1.0])}
    row[column] = found
    with pytest.raises(SchemaError) as e:
        model.score_samples(pa.table(row))
    message = str(e.value)
    assert f"column '{column}' holds {fitted[0]} values" in message
    assert f"learned from {fitted[1]} values; cast it back" in message


def test_unseen_categories_warn_and_score(model: DependencyTree) -> None:
    data = pa.table({"a": [7, 1], "b": ["new", "x"], "f": [1.0, 1.0]})
    with pytest.warns(UnseenCategoryWarning, match=r"'a': 1, 'b': 1"):
        scores = model.score_samples(data)
    assert np.isfinite(scores).all()


def test_calls_before_fit_are_not_fitted_errors(tmp_path: Path) -> None:
    fresh = DependencyTree()
    for call in (
        lambda: fresh.sample(3),
        lambda: fresh.score_samples(small_table()),
        lambda: fresh.save(tmp_path / "m.treewise"),
    ):
        with pytest.raises(NotFittedError, match=r"not fitted yet; call fit\(data\) first"):
            call()
    assert list(tmp_path.iterdir()) == []


# -- model files ---------------------------------------------------------------------------------


def test_truncated_model_file_is_corrupt(model_bytes: bytes, tmp_path: Path) -> None:
    with pytest.raises(CorruptModelError, match=r"declares \d+ bytes of payload.*truncated"):
        load_bytes(tmp_path, model_bytes[: len(model_bytes) - 7])
    with pytest.raises(CorruptModelError, match="not a treewise file"):
        load_bytes(tmp_path, model_bytes[:20])


def test_bit_flipped_model_file_is_corrupt(model_bytes: bytes, tmp_path: Path) -> None:
    flipped = bytearray(model_bytes)
    flipped[len(flipped) // 2] ^= 0x10
    with pytest.raises(CorruptModelError, match="checksum does not match") as e:
        load_bytes(tmp_path, bytes(flipped))
    assert "damaged or was not written by treewise" in str(e.value)


def test_model_file_of_another_version_is_corrupt(model_bytes: bytes, tmp_path: Path) -> None:
    other = bytearray(model_bytes)
    struct.pack_into("<I", other, 8, 7)
    with pytest.raises(CorruptModelError) as e:
        load_bytes(tmp_path, bytes(other))
    assert "layout version 7, but this treewise reads version 2" in str(e.value)
    assert "use the treewise release that wrote it" in str(e.value)


def test_model_file_declaring_huge_sizes_is_corrupt(model_bytes: bytes, tmp_path: Path) -> None:
    # The header claims an exabyte of payload.
    header = bytearray(model_bytes)
    struct.pack_into("<Q", header, 16, 2**60)
    with pytest.raises(CorruptModelError, match="declares 1152921504606846976 bytes"):
        load_bytes(tmp_path, bytes(header))
    # A correctly signed payload whose first length (the column count) claims 2**60 columns.
    payload = bytearray(model_bytes[HEADER:])
    struct.pack_into("<Q", payload, 0, 2**60)
    with pytest.raises(CorruptModelError, match="a length of 1152921504606846976 at byte 0"):
        load_bytes(tmp_path, resign(model_bytes, bytes(payload)))


def test_file_that_is_not_a_model_is_corrupt(tmp_path: Path) -> None:
    for data in (b"", b"PK\x03\x04 a zip file, say", b"\x80\x04\x95 a pickle"):
        with pytest.raises(CorruptModelError, match=r"not a treewise file \(no TREEWISE header\)"):
            load_bytes(tmp_path, data)


def test_missing_model_path_and_directory(tmp_path: Path) -> None:
    with pytest.raises(FileNotFoundError, match=r"no model file at .*nothing\.treewise"):
        treewise.load(tmp_path / "nothing.treewise")
    with pytest.raises(IsADirectoryError, match="is a directory, not a model file"):
        treewise.load(tmp_path)


FORGED_STATS = textwrap.dedent(
    """
    import struct, zlib, treewise
    u64 = lambda v: struct.pack("<Q", v)
    text = lambda s: u64(len(s)) + s.encode()
    def column(name):  # a float column of 65,535 bins: 524 kB of edges
        edges = b"".join(struct.pack("<d", float(k + 1)) for k in range(65534))
        return text(name) + bytes([4, 0, 0]) + u64(65534) + edges + struct.pack("<dd", 0.0, 65535.0)
    payload = u64(2) + column("x") + column("y") + u64(2) + text("float64") * 2
    payload += u64(1) + u64(0) * 2 + u64(0)  # 1 row, empty marginals, no cells
    head = b"TREEWISE" + struct.pack("<IIQI", 1, 2, len(payload), zlib.crc32(payload))
    try:
        treewise.PairStats.from_bytes(head + payload)
    except treewise.CorruptModelError as e:
        print("refused:", e)
    """
)


def test_statistics_file_declaring_huge_tables_is_refused_before_allocating() -> None:
    done = subprocess.run(
        [sys.executable, "-c", FORGED_STATS], capture_output=True, text=True, timeout=120
    )
    assert done.returncode == 0, done.stderr[-500:]
    assert "refused:" in done.stdout


def wrapping_stats_file() -> bytes:
    """Statistics of 1 row over two 2-code columns whose table [[2, 2**64-1], [2**64-1, 1]]
    adds up to the marginals only modulo 2**64 (found by the cargo-fuzz target `decode`)."""

    def u64(v: int) -> bytes:
        return struct.pack("<Q", v)

    def text(s: str) -> bytes:
        return u64(len(s)) + s.encode()

    def column(name: str) -> bytes:  # kind 3 (string), no other, no null, values "a" < "b"
        return text(name) + bytes([3, 0, 0]) + u64(2) + text("a") + text("b")

    top = 2**64 - 1
    payload = u64(2) + column("x") + column("y") + u64(2) + text("string") * 2 + u64(1)
    payload += u64(2) + u64(1) + u64(0) + u64(2) + u64(1) + u64(0)
    payload += u64(4) + u64(2) + u64(top) + u64(top) + u64(1)
    head = b"TREEWISE" + struct.pack("<IIQI", 1, 2, len(payload), zlib.crc32(payload))
    return head + payload


def test_statistics_whose_counts_overflow_are_corrupt() -> None:
    with pytest.raises(CorruptModelError):
        treewise.PairStats.from_bytes(wrapping_stats_file())


def test_tallies_whose_counts_exceed_their_rows_are_corrupt() -> None:
    payload = struct.pack("<QQQ", 1, 1, 1) + b"b" + struct.pack("<Q", 0)  # 1 row; column 'b'
    payload += bytes([1]) + struct.pack("<QQ", 2**64 - 1, 0)  # a bool tally: 2**64-1 false
    head = b"TREEWISE" + struct.pack("<IIQI", 1, 3, len(payload), zlib.crc32(payload))
    with pytest.raises(CorruptModelError):
        treewise._core.CodebookBuilder.from_bytes(head + payload)


def test_from_stats_of_no_rows_is_a_data_error(model: DependencyTree) -> None:
    with pytest.raises(DataError, match="0 rows"):
        DependencyTree.from_stats(treewise.PairStats(model.codebook_))


# -- files to read -------------------------------------------------------------------------------


@pytest.fixture
def good_file(tmp_path: Path) -> Path:
    path = tmp_path / "data" / "good.parquet"
    path.parent.mkdir()
    pq.write_table(small_table(), path)
    return path


def test_corrupt_parquet_is_a_data_error_naming_the_file(good_file: Path) -> None:
    bad = good_file.with_name("bad.parquet")
    raw = good_file.read_bytes()
    bad.write_bytes(raw[: len(raw) // 2])
    with pytest.raises(DataError, match=r"bad\.parquet: cannot read it: .*magic bytes"):
        DependencyTree().fit(bad)
    bad.write_bytes(b"")
    with pytest.raises(DataError, match=r"bad\.parquet: cannot read it"):
        DependencyTree().fit(bad)


def test_empty_parquet_file_is_skipped_with_a_warning(good_file: Path) -> None:
    empty = good_file.with_name("empty.parquet")
    pq.write_table(small_table().slice(0, 0), empty)
    with pytest.warns(SkippedFileWarning, match=r"skipped .*empty\.parquet: it holds no rows"):
        fitted = DependencyTree().fit([empty, good_file])
    want = DependencyTree().fit(good_file)
    assert fitted.n_rows_ == want.n_rows_
    assert fitted.codebook_ == want.codebook_


def test_only_empty_parquet_files_are_a_data_error(tmp_path: Path) -> None:
    for k in range(2):
        pq.write_table(small_table().slice(0, 0), tmp_path / f"empty-{k}.parquet")
    with pytest.warns(SkippedFileWarning), pytest.raises(DataError, match="0 rows"):
        DependencyTree().fit(tmp_path)


def test_schema_drift_between_files_names_the_file(good_file: Path) -> None:
    drift = good_file.with_name("later.parquet")
    pq.write_table(small_table().set_column(0, "a", pa.array(["1"] * 6)), drift)
    with pytest.raises(SchemaError) as e:
        DependencyTree().fit([good_file, drift])
    message = str(e.value)
    assert "later.parquet" in message
    assert "column 'a' changed type between batches: int values earlier, Utf8 now" in message
    assert "cast it to one type in every batch and file" in message
    lacking = good_file.with_name("lacking.parquet")
    pq.write_table(small_table().drop_columns(["b"]), lacking)
    with pytest.raises(SchemaError, match=r"lacking\.parquet: columns \['b'\] are missing"):
        DependencyTree().fit([good_file, lacking])


def test_missing_data_path_is_file_not_found(tmp_path: Path) -> None:
    with pytest.raises(FileNotFoundError, match=r"no such file or directory: .*nope\.parquet"):
        DependencyTree().fit(tmp_path / "nope.parquet")
    with pytest.raises(FileNotFoundError, match=r"no files match .*\*\.parquet"):
        DependencyTree().fit(str(tmp_path / "*.parquet"))


def test_not_a_table_is_a_type_error() -> None:
    with pytest.raises(TypeError, match="treewise cannot read a ndarray; pass a pyarrow Table"):
        DependencyTree().fit(np.zeros((3, 2)))


# -- outputs -------------------------------------------------------------------------------------


def test_output_into_a_missing_directory_or_onto_a_directory(
    model: DependencyTree, tmp_path: Path
) -> None:
    missing = tmp_path / "no" / "such"
    with pytest.raises(
        FileNotFoundError, match=r"the directory .* does not exist; create it first"
    ):
        model.save(missing / "m.treewise")
    with pytest.raises(FileNotFoundError, match="does not exist; create it first"):
        model.sample_to_parquet(10, missing / "s.parquet")
    with pytest.raises(FileNotFoundError, match="does not exist; create it first"):
        model.score_to_parquet(small_table(), missing / "scores.parquet")
    with pytest.raises(IsADirectoryError, match="is a directory; give a file name"):
        model.save(tmp_path)
    with pytest.raises(IsADirectoryError, match="is a directory; give a file name"):
        model.sample_to_parquet(10, tmp_path)
    assert list(tmp_path.iterdir()) == []


def test_scoring_nothing_to_parquet_is_a_data_error_and_writes_nothing(
    model: DependencyTree, tmp_path: Path
) -> None:
    with pytest.raises(DataError, match="the data to score has 0 rows; there is nothing to write"):
        model.score_to_parquet(small_table().slice(0, 0), tmp_path / "scores.parquet")
    assert list(tmp_path.iterdir()) == []


def test_failing_score_to_parquet_leaves_no_file(model: DependencyTree, tmp_path: Path) -> None:
    # The second batch has a column of another type: the error comes after a batch was written.
    good = small_table()
    bad = good.set_column(0, "a", pa.array(["1"] * 6))
    batches = iter([*good.to_batches(), *bad.to_batches()])
    with pytest.raises(SchemaError, match="column 'a' holds Utf8 values"):
        model.score_to_parquet(batches, tmp_path / "scores.parquet")
    assert list(tmp_path.iterdir()) == []


def test_keys_given_as_one_string_is_a_type_error(model: DependencyTree, tmp_path: Path) -> None:
    with pytest.raises(TypeError, match="keys= must be a list of column names"):
        model.score_to_parquet(small_table(), tmp_path / "scores.parquet", keys="ab")


def test_bad_thread_count_is_a_value_error() -> None:
    script = "import treewise, pyarrow as pa; treewise.DependencyTree().fit(pa.table({'a': [1]}))"
    env = {**os.environ, "TREEWISE_THREADS": "zero"}
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, env=env, timeout=60
    )
    assert done.returncode == 1
    assert "ValueError: TREEWISE_THREADS must be a whole number of at least 1" in done.stderr
    assert "unset it to use every core" in done.stderr


# -- a Dask worker killed in the middle of a fit -------------------------------------------------


def test_dask_worker_killed_mid_fit_is_retried_to_the_local_answer() -> None:
    """SIGKILL one of two worker processes while fit_dask runs: the nanny restarts it, the
    scheduler recomputes the lost tasks, and the model equals the local fit (documented in
    docs/errors.md). Dask gives up with KilledWorker only after a task has been on three dying
    workers (distributed.scheduler.allowed-failures)."""
    import dask.dataframe as dd
    import distributed
    from dask.delayed import delayed
    from treewise.distributed import fit_dask

    parts, rows = 24, 1_000

    def part(k: int) -> pd.DataFrame:
        # Slow enough that the fit is still running when the worker dies.
        time.sleep(0.1)
        rng = np.random.default_rng(k)
        z = rng.integers(0, 4, rows)
        return pd.DataFrame(
            {
                "z": z,
                "a": (z + rng.integers(0, 2, rows)) % 5,
                "s": np.where(z > 1, "hi", "lo"),
                "x": z * 1.5 + rng.random(rows),
            }
        )

    local = pd.concat([part(k) for k in range(parts)], ignore_index=True)
    want = DependencyTree().fit(local)
    frame = dd.from_delayed([delayed(part, pure=True)(k) for k in range(parts)], meta=local[:0])
    with (
        distributed.LocalCluster(
            n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0"
        ) as cluster,
        distributed.Client(cluster) as client,
    ):
        pids = client.run(os.getpid)
        outcome: dict[str, Any] = {}

        def run() -> None:
            try:
                outcome["model"] = fit_dask(frame)
            except Exception as e:  # reported below
                outcome["error"] = e

        worker = threading.Thread(target=run)
        worker.start()
        deadline = time.monotonic() + 20
        while not any(client.processing().values()) and time.monotonic() < deadline:
            time.sleep(0.05)
        time.sleep(0.3)
        assert worker.is_alive(), "the fit ended before a worker could be killed"
        os.kill(min(pids.values()), signal.SIGKILL)
        worker.join(timeout=60)
        assert not worker.is_alive()
    assert "error" not in outcome, repr(outcome.get("error"))
    got = outcome["model"]
    assert got.codebook_ == want.codebook_
    assert got.parent_.tolist() == want.parent_.tolist()
    assert np.array_equal(got.pairwise_mutual_info_, want.pairwise_mutual_info_)
    for name in want.feature_names_in_:
        assert np.array_equal(got.marginal_counts(name), want.marginal_counts(name))
