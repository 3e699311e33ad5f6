"""Streamed sources, PairStats, and streamed scoring and sampling agree exactly with in-memory work.

The truth is always an in-memory fit of one plain pyarrow Table that we construct here. Every
other way in (Parquet files whose files and row groups carry different dictionaries and integer
widths, CSV, Arrow IPC, datasets, one-shot streams, merged PairStats, partial_fit) must give the
same codes, counts, mutual information and tree, bit for bit. Writing scores and samples to
Parquet must give what the in-memory methods give, and must never leave a partial file behind.
"""

from __future__ import annotations

import itertools
import os
import pickle
import re
import sys
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.dataset as pads
import pyarrow.parquet as pq
import pytest
import treewise.progress
from conftest import assert_same_model
from treewise import (
    OTHER,
    CategoryCapWarning,
    CorruptModelError,
    DataError,
    DependencyTree,
    PairStats,
    SchemaError,
)
from treewise.datasets import model_columns, shop_sessions
from treewise.sources import READ_AHEAD, SkippedFileWarning

# -- invented data -------------------------------------------------------------------------------

N_ROWS = 1500
REGIONS = ["north", "south", "east", "west", "harbour"]
CHANNELS = ["web", "app", "phone", "store"]
NAMES = ["region", "tier", "flag", "amount", "channel"]


def _truth(n: int = N_ROWS, seed: int = 11) -> pa.Table:
    """region -> tier -> flag -> amount and region -> channel, with nulls and NaN.

    Each child copies (a function of) its parent most of the time, so the tree is that one.
    Amounts are multiples of 0.25, exact in float32 and in CSV text.
    """
    rng = np.random.default_rng(seed)
    region = rng.integers(0, len(REGIONS), n)
    tier = np.where(rng.random(n) < 0.85, region % 3, rng.integers(0, 3, n)) * 10 + 5
    flag = np.where(rng.random(n) < 0.85, tier > 10, rng.random(n) < 0.5)
    amount = np.where(flag, 100.0, 20.0) + rng.integers(0, 40, n) * 0.25
    amount[rng.random(n) < 0.03] = np.nan
    channel = np.where(rng.random(n) < 0.7, region % len(CHANNELS), rng.integers(0, 4, n))

    def holes(rate: float) -> np.ndarray[Any, Any]:
        return rng.random(n) < rate

    return pa.table(
        {
            "region": pa.array(np.array(REGIONS, dtype=object)[region], mask=holes(0.03)),
            "tier": pa.array(tier, pa.int64(), mask=holes(0.04)),
            "flag": pa.array(flag, pa.bool_(), mask=holes(0.02)),
            "amount": pa.array(amount, pa.float64(), mask=holes(0.02)),
            "channel": pa.array(np.array(CHANNELS, dtype=object)[channel], pa.string()),
        }
    )


TRUTH = _truth()


@pytest.fixture(scope="module")
def reference() -> DependencyTree:
    return DependencyTree().fit(TRUTH)


def test_reference_is_the_planted_tree(reference: DependencyTree) -> None:
    # region -> tier -> flag -> amount, region -> channel; the root is its centre, tier
    assert reference.parent_.tolist() == [1, -1, 1, 2, 0]
    assert reference.n_rows_ == N_ROWS
    assert reference.categories_[0] == [*sorted(REGIONS), None]
    assert reference.categories_[1] == [5, 15, 25, None]


# -- files with different dictionaries -----------------------------------------------------------


def _dictionary(values: pa.Array, rng: np.random.Generator, extra: list[str]) -> pa.Array:
    """``values`` dictionary-encoded over a shuffled dictionary with unused ``extra`` entries."""
    words = [v for v in values.unique().to_pylist() if v is not None] + extra
    order = rng.permutation(len(words))
    dictionary = [words[k] for k in order]
    lookup = {v: i for i, v in enumerate(dictionary)}
    indices = pa.array([None if v is None else lookup[v] for v in values.to_pylist()], pa.int32())
    return pa.DictionaryArray.from_arrays(indices, pa.array(dictionary, pa.string()))


def _recast(table: pa.Table, **columns: pa.Array | pa.ChunkedArray) -> pa.Table:
    for name, column in columns.items():
        table = table.set_column(table.schema.get_field_index(name), name, column)
    return table


def _write_parts(directory: Path) -> list[Path]:
    """TRUTH in four Parquet files that differ in dictionaries, layouts and integer widths.

    - part 0: region and channel dictionary-encoded, every row group with its own shuffled
      dictionary holding unused words;
    - part 1: a single row, plain strings, tier as int32;
    - part 2: region plain, channel dictionary-encoded, tier int16, small row groups;
    - part 3 (in a subdirectory): region large_string, channel dictionary, amount float32.
    """
    rng = np.random.default_rng(5)
    directory.mkdir(parents=True, exist_ok=True)
    (directory / "more").mkdir(exist_ok=True)
    paths = [
        directory / "part-0.parquet",
        directory / "part-1.parquet",
        directory / "part-2.parquet",
        directory / "more" / "part-3.parquet",
    ]
    bounds = [0, 400, 401, 1001, N_ROWS]
    pieces = [TRUTH.slice(a, b - a) for a, b in itertools.pairwise(bounds)]

    dict_type = pa.dictionary(pa.int32(), pa.string())
    schema0 = pa.schema(
        [(f.name, dict_type if f.name in ("region", "channel") else f.type) for f in TRUTH.schema]
    )
    with pq.ParquetWriter(paths[0], schema0) as writer:
        for start in range(0, pieces[0].num_rows, 64):
            group = pieces[0].slice(start, 64)
            group = _recast(
                group,
                region=_dictionary(group["region"].combine_chunks(), rng, ["unused", "zz"]),
                channel=_dictionary(group["channel"].combine_chunks(), rng, ["fax"]),
            )
            writer.write_table(group)

    pq.write_table(_recast(pieces[1], tier=pieces[1]["tier"].cast(pa.int32())), paths[1])
    part2 = _recast(
        pieces[2],
        tier=pieces[2]["tier"].cast(pa.int16()),
        channel=pieces[2]["channel"].dictionary_encode(),
    )
    pq.write_table(part2, paths[2], row_group_size=111)
    part3 = _recast(
        pieces[3],
        region=pieces[3]["region"].cast(pa.large_string()),
        channel=_dictionary(pieces[3]["channel"].combine_chunks(), rng, ["telegram"]),
        amount=pieces[3]["amount"].cast(pa.float32()),
    )
    pq.write_table(part3, paths[3], row_group_size=200)
    # Files a directory read must ignore: they would fail if read.
    (directory / "_SUCCESS.parquet").write_bytes(b"not parquet")
    (directory / ".part-9.parquet.crc").write_bytes(b"not parquet")
    (directory / ".hidden.parquet").write_bytes(b"not parquet")
    (directory / "notes.txt").write_text("not data")
    return paths


@pytest.fixture(scope="module")
def parts(tmp_path_factory: pytest.TempPathFactory) -> list[Path]:
    return _write_parts(tmp_path_factory.mktemp("parts"))


def test_the_files_really_differ(parts: list[Path]) -> None:
    # The check below is only worth something if the files disagree in their encodings.
    dictionaries = {
        tuple(batch.column("region").dictionary.to_pylist())
        for batch in pq.ParquetFile(parts[0]).iter_batches(batch_size=64)
    }
    assert len(dictionaries) >= 3
    types = [pq.ParquetFile(p).schema_arrow for p in parts]
    assert pa.types.is_dictionary(types[0].field("region").type)
    assert types[2].field("region").type == pa.string()
    assert types[3].field("region").type == pa.large_string()
    assert {t.field("tier").type for t in types} == {pa.int64(), pa.int32(), pa.int16()}
    assert types[3].field("amount").type == pa.float32()
    # Together they hold exactly TRUTH's rows, in order (repr makes NaN equal to NaN).
    back = pa.concat_tables([pq.read_table(p).cast(TRUTH.schema) for p in parts])
    for name in NAMES:
        assert [repr(v) for v in back[name].to_pylist()] == [
            repr(v) for v in TRUTH[name].to_pylist()
        ]


@pytest.mark.parametrize("batch_rows", [1, 7, 65_536])
def test_streamed_fit_over_files_is_bit_identical(
    parts: list[Path], reference: DependencyTree, batch_rows: int
) -> None:
    model = DependencyTree().fit(parts, batch_rows=batch_rows, progress=False)
    assert_same_model(model, reference)
    streamed = PairStats.from_source(parts, model.codebook_, batch_rows=batch_rows)
    in_memory = PairStats.from_source(TRUTH, model.codebook_)
    assert streamed == in_memory
    assert streamed.n_rows == N_ROWS
    for a, b in itertools.combinations(NAMES, 2):
        assert streamed.joint_counts(a, b).tolist() == model.joint_counts(a, b).tolist()


def test_directory_glob_and_dataset_read_the_same_rows(
    parts: list[Path], reference: DependencyTree
) -> None:
    directory = parts[0].parent
    forms: list[Any] = [
        directory,
        str(directory),
        str(directory / "**" / "part-*.parquet"),
        [str(directory / "part-*.parquet"), parts[3]],
        pads.dataset([str(p) for p in parts], format="parquet"),
    ]
    for form in forms:
        assert_same_model(DependencyTree().fit(form, batch_rows=100), reference)


def test_in_memory_dataset_is_read_through_its_scanner(reference: DependencyTree) -> None:
    dataset = pads.dataset(TRUTH.to_batches(max_chunksize=333))
    assert not isinstance(dataset, pads.FileSystemDataset)
    assert_same_model(DependencyTree().fit(dataset, batch_rows=50), reference)


def test_csv_files_stream_like_the_table(tmp_path: Path) -> None:
    # CSV has no null string (an empty field reads as ""), so give the strings no nulls; and
    # pyarrow's CSV reader reads "nan" as null, so NaN cannot be a value of its own there.
    amount = TRUTH["amount"]
    table = _recast(
        TRUTH,
        region=TRUTH["region"].fill_null("inland"),
        amount=pc.if_else(pc.is_nan(amount), pa.scalar(None, pa.float64()), amount),
    )
    half = table.num_rows // 2
    pacsv.write_csv(table.slice(0, half), tmp_path / "a.csv")
    pacsv.write_csv(table.slice(half), tmp_path / "b.csv")
    model = DependencyTree().fit(tmp_path, batch_rows=97)
    assert_same_model(model, DependencyTree().fit(table))
    assert PairStats.from_source(tmp_path, model.codebook_) == PairStats.from_source(
        table, model.codebook_
    )


def test_arrow_ipc_file_and_stream_formats(tmp_path: Path, reference: DependencyTree) -> None:
    with pa.ipc.new_file(tmp_path / "a.arrow", TRUTH.schema) as writer:
        writer.write_table(TRUTH.slice(0, 700), max_chunksize=250)
    # The stream format allows a new dictionary per batch.
    rng = np.random.default_rng(3)
    rest = TRUTH.slice(700)
    schema = rest.schema.set(0, pa.field("region", pa.dictionary(pa.int32(), pa.string())))
    with pa.ipc.new_stream(tmp_path / "b.arrows", schema) as writer:
        for start in range(0, rest.num_rows, 160):
            piece = rest.slice(start, 160)
            region = _dictionary(piece["region"].combine_chunks(), rng, ["sea"])
            writer.write_table(_recast(piece, region=region))
    model = DependencyTree().fit([tmp_path / "a.arrow", tmp_path / "b.arrows"], batch_rows=90)
    assert_same_model(model, reference)


# -- one-shot streams ----------------------------------------------------------------------------


def _batches(table: pa.Table, size: int) -> list[pa.RecordBatch]:
    return table.to_batches(max_chunksize=size)


def test_stream_is_spooled_once_and_the_spool_is_removed(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, reference: DependencyTree
) -> None:
    spool_dir = tmp_path / "spool"
    spool_dir.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(spool_dir))
    seen_during: list[list[str]] = []

    def generate() -> Iterator[pa.RecordBatch]:
        yield from _batches(TRUTH, 131)
        seen_during.append(sorted(os.listdir(spool_dir)))

    model = DependencyTree().fit(generate(), batch_rows=50)
    assert_same_model(model, reference)
    # While the stream was read, the spool file existed in the (patched) temp directory...
    assert len(seen_during) == 1 and len(seen_during[0]) == 1
    assert seen_during[0][0].startswith("treewise-spool-")
    # ... and afterwards it is gone.
    assert os.listdir(spool_dir) == []


def test_record_batch_reader_fits_like_the_table(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, reference: DependencyTree
) -> None:
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    reader = pa.RecordBatchReader.from_batches(TRUTH.schema, _batches(TRUTH, 200))
    assert_same_model(DependencyTree().fit(reader, batch_rows=64), reference)
    assert os.listdir(tmp_path) == []


def test_spool_is_removed_when_the_stream_fails(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))

    def generate() -> Iterator[pa.RecordBatch]:
        yield from _batches(TRUTH.slice(0, 600), 200)
        yield TRUTH.slice(600, 100).drop_columns(["channel"]).to_batches()[0]

    with pytest.raises(SchemaError, match="channel"):
        DependencyTree().fit(generate())
    assert os.listdir(tmp_path) == []


def test_stream_whose_batches_change_dictionary(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, reference: DependencyTree
) -> None:
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    rng = np.random.default_rng(8)
    batches = []
    for k, batch in enumerate(_batches(TRUTH, 300)):
        # Every batch its own dictionary, and one batch plain strings in between.
        region = batch.column("region")
        if k != 2:
            region = _dictionary(region, rng, ["extra"])
        batches.append(batch.set_column(0, "region", region))
    assert_same_model(DependencyTree().fit(iter(batches)), reference)
    assert os.listdir(tmp_path) == []


def test_reader_over_parquet_row_groups_with_different_dictionaries(
    parts: list[Path], reference: DependencyTree
) -> None:
    file = pq.ParquetFile(parts[0])
    reader = pa.RecordBatchReader.from_batches(file.schema_arrow, file.iter_batches(batch_size=100))
    assert_same_model(DependencyTree().fit(reader), DependencyTree().fit(parts[0]))


def test_stream_with_a_codebook_is_read_once_without_a_spool(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, reference: DependencyTree
) -> None:
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    listed: list[list[str]] = []

    def generate() -> Iterator[pa.RecordBatch]:
        yield from _batches(TRUTH, 177)
        listed.append(os.listdir(tmp_path))

    model = DependencyTree().fit(generate(), codebook=reference)
    assert_same_model(model, reference)
    assert listed == [[]]
    stats = PairStats.from_source(iter(_batches(TRUTH, 500)), reference.codebook_)
    assert stats == PairStats.from_source(TRUTH, reference.codebook_)


# -- fitting with a given codebook ---------------------------------------------------------------


@pytest.mark.parametrize("as_model", [True, False])
def test_codebook_from_another_model_gives_the_same_counts(
    parts: list[Path], reference: DependencyTree, as_model: bool
) -> None:
    given = reference if as_model else reference.codebook_
    model = DependencyTree().fit(parts, codebook=given, batch_rows=128)
    assert_same_model(model, reference)


def test_unseen_value_without_other_code_is_an_error_naming_the_column(
    reference: DependencyTree,
) -> None:
    assert OTHER not in reference.categories_[1]
    new = _recast(TRUTH.slice(0, 40), tier=pa.array([35] * 40, pa.int64()))
    with pytest.raises(DataError, match="'tier'"):
        DependencyTree().fit(new, codebook=reference)
    with pytest.raises(DataError, match="'tier'"):
        PairStats.from_source(new, reference.codebook_)


def test_capped_codebook_sends_unseen_values_to_other(parts: list[Path]) -> None:
    with pytest.warns(CategoryCapWarning, match="'region'"):
        capped = DependencyTree(max_categories=4).fit(TRUTH)
    region = capped.categories_[0]
    assert region[-2:] == [OTHER, None]
    # The streamed files map their dictionaries into the capped codes exactly.
    streamed = PairStats.from_source(parts, capped.codebook_, batch_rows=33)
    assert streamed == PairStats.from_source(TRUTH, capped.codebook_)
    # A value no fit has seen joins "other".
    unseen = _recast(TRUTH.slice(0, 25), region=pa.array(["atlantis"] * 25))
    model = DependencyTree().fit(unseen, codebook=capped)
    counts = model.marginal_counts("region").tolist()
    assert counts[region.index(OTHER)] == 25
    assert sum(counts) == 25


def test_category_cap_warning_points_at_the_callers_line() -> None:
    with pytest.warns(CategoryCapWarning) as record:
        line = sys._getframe().f_lineno + 1
        DependencyTree(max_categories=4).fit(TRUTH)
    assert [(w.filename, w.lineno) for w in record] == [(__file__, line)] * len(record)


# -- PairStats -----------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def thirds(reference: DependencyTree) -> list[PairStats]:
    bounds = [0, 512, 513, N_ROWS]
    return [
        PairStats.from_source(TRUTH.slice(a, b - a), reference.codebook_)
        for a, b in itertools.pairwise(bounds)
    ]


def test_pair_stats_add_up_exactly(reference: DependencyTree, thirds: list[PairStats]) -> None:
    a, b, c = thirds
    whole = PairStats.from_source(TRUTH, reference.codebook_)
    assert a + b + c == whole
    assert sum([a, b, c]) == whole
    assert c + (b + a) == whole
    assert a + b != whole
    # Adding leaves the operands alone.
    assert (a.n_rows, b.n_rows, c.n_rows) == (512, 1, N_ROWS - 513)
    assert_same_model(DependencyTree.from_stats(a + b + c), reference)
    for x, y in itertools.product(NAMES, repeat=2):
        assert whole.joint_counts(x, y).tolist() == reference.joint_counts(x, y).tolist()
    for x in NAMES:
        assert whole.marginal_counts(x).tolist() == reference.marginal_counts(x).tolist()


def test_from_stats_takes_root_and_alpha(
    reference: DependencyTree, thirds: list[PairStats]
) -> None:
    total = sum(thirds)
    model = DependencyTree.from_stats(total, root="amount", alpha=0.0)
    want = DependencyTree(root="amount", alpha=0.0).fit(TRUTH)
    assert_same_model(model, want)
    assert np.array_equal(model.score_samples(TRUTH), want.score_samples(TRUTH))


def test_fit_stats_keeps_the_estimators_parameters_and_its_own_copy(
    reference: DependencyTree, thirds: list[PairStats]
) -> None:
    total = sum(thirds)
    estimator = DependencyTree(prune="bic", max_categories=99)
    assert estimator.fit_stats(total) is estimator
    assert_same_model(estimator, DependencyTree(prune="bic").fit(TRUTH))
    assert estimator.get_params()["max_categories"] == 99
    # The model counts on from a copy: more data leaves the caller's statistics alone.
    estimator.partial_fit(TRUTH.slice(0, 10))
    assert estimator.n_rows_ == N_ROWS + 10
    assert total.n_rows == N_ROWS
    with pytest.raises(SchemaError, match="columns="):
        DependencyTree(columns=NAMES[::-1]).fit_stats(total)
    with pytest.raises(TypeError, match="PairStats"):
        DependencyTree().fit_stats(reference)  # type: ignore[arg-type]


def test_pair_stats_with_different_codebooks_do_not_add(thirds: list[PairStats]) -> None:
    other = DependencyTree(n_bins=3).fit(TRUTH)
    foreign = PairStats.from_source(TRUTH, other.codebook_)
    with pytest.raises(SchemaError, match="codebook"):
        thirds[0] + foreign
    two = DependencyTree(columns=["region", "tier"]).fit(TRUTH)
    narrow = PairStats.from_source(TRUTH, two.codebook_)
    with pytest.raises(SchemaError):
        narrow + thirds[0]


def test_pair_stats_round_trip_through_bytes_files_and_pickle(
    tmp_path: Path, thirds: list[PairStats]
) -> None:
    total = sum(thirds)
    data = total.to_bytes()
    assert PairStats.from_bytes(data) == total
    total.save(tmp_path / "stats.tws")
    loaded = PairStats.load(tmp_path / "stats.tws")
    assert loaded == total
    assert loaded.dtypes == total.dtypes
    again = pickle.loads(pickle.dumps(total))
    assert again == total
    assert again + thirds[0] == total + thirds[0]
    assert sorted(os.listdir(tmp_path)) == ["stats.tws"]


@pytest.mark.parametrize("damage", ["flip", "truncate", "empty", "foreign"])
def test_damaged_pair_stats_bytes_are_refused(thirds: list[PairStats], damage: str) -> None:
    data = bytearray(thirds[2].to_bytes())
    if damage == "flip":
        data[len(data) // 2] ^= 0x5A
    elif damage == "truncate":
        data = data[:-9]
    elif damage == "empty":
        data = bytearray()
    else:
        data = bytearray(b"PAR1" + bytes(60))
    with pytest.raises(CorruptModelError):
        PairStats.from_bytes(bytes(data))


def test_pair_stats_from_an_all_null_piece_add_up() -> None:
    first = pa.table({"tier": pa.nulls(4), "region": ["north", "south", "north", "east"]})
    second = TRUTH.select(["tier", "region"]).slice(0, 300)
    want = DependencyTree().fit(
        pa.concat_tables([first.cast(second.schema), second]), progress=False
    )
    a = PairStats.from_source(first, want.codebook_)
    b = PairStats.from_source(second, want.codebook_)
    assert_same_model(DependencyTree.from_stats(a + b), want)
    assert_same_model(DependencyTree.from_stats(b + a), want)


def test_empty_pair_stats_round_trip(tmp_path: Path, reference: DependencyTree) -> None:
    empty = PairStats(reference.codebook_)
    assert empty.n_rows == 0
    assert pickle.loads(pickle.dumps(empty)) == empty
    empty.save(tmp_path / "empty.tws")
    assert PairStats.load(tmp_path / "empty.tws") == empty
    assert PairStats.from_bytes(empty.to_bytes()) + PairStats.from_source(
        TRUTH, reference.codebook_
    ) == PairStats.from_source(TRUTH, reference.codebook_)


def test_partial_fit_over_two_batches_equals_one_fit(reference: DependencyTree) -> None:
    model = DependencyTree().partial_fit(TRUTH.slice(0, 900), codebook=reference)
    model.partial_fit(TRUTH.slice(900))
    assert model.n_rows_ == N_ROWS
    assert model.parent_.tolist() == reference.parent_.tolist()
    assert np.array_equal(model.pairwise_mutual_info_, reference.pairwise_mutual_info_)
    assert model.categories_ == reference.categories_
    for child, parent in enumerate(model.parent_):
        if parent >= 0:
            a, b = NAMES[parent], NAMES[child]
            assert model.joint_counts(a, b).tolist() == reference.joint_counts(a, b).tolist()


def test_partial_fit_over_many_batches_equals_one_fit(reference: DependencyTree) -> None:
    model = DependencyTree()
    for k, batch in enumerate(_batches(TRUTH, 400)):
        if k == 0:
            model.partial_fit(batch, codebook=reference.codebook_)
        else:
            model.partial_fit(batch)
    assert_same_model(model, reference)
    # A pickled copy keeps every pair's counts and can go on counting.
    again = pickle.loads(pickle.dumps(model))
    assert_same_model(again, reference)
    again.partial_fit(TRUTH)
    assert again.n_rows_ == 2 * N_ROWS
    assert again.parent_.tolist() == reference.parent_.tolist()


def test_partial_fit_keeps_every_pair_after_the_first_call(reference: DependencyTree) -> None:
    model = DependencyTree().partial_fit(TRUTH, codebook=reference)
    assert_same_model(model, reference)


# -- errors that name the file -------------------------------------------------------------------


@pytest.fixture
def good(tmp_path: Path) -> Path:
    path = tmp_path / "good.parquet"
    pq.write_table(TRUTH.slice(0, 300), path)
    return path


def test_a_file_that_is_not_parquet_is_named(tmp_path: Path, good: Path) -> None:
    junk = tmp_path / "junk.parquet"
    junk.write_bytes(np.random.default_rng(0).bytes(300))
    with pytest.raises(DataError, match=re.escape(str(junk))):
        DependencyTree().fit([good, junk])
    with pytest.raises(DataError, match=re.escape(str(junk))):
        DependencyTree().fit(junk)


def test_missing_paths_and_empty_matches(tmp_path: Path, good: Path) -> None:
    missing = tmp_path / "nope.parquet"
    with pytest.raises(FileNotFoundError, match=re.escape(str(missing))):
        DependencyTree().fit([good, missing])
    empty = tmp_path / "empty"
    (empty / "deeper").mkdir(parents=True)
    (empty / "_metadata.parquet").write_bytes(b"x")
    (empty / "readme.txt").write_text("no data here")
    with pytest.raises(DataError, match=re.escape(str(empty))):
        DependencyTree().fit(empty)
    pattern = str(tmp_path / "*.nothing")
    with pytest.raises(FileNotFoundError, match=re.escape(pattern)):
        DependencyTree().fit(pattern)


def test_a_column_missing_from_a_later_file_names_that_file(tmp_path: Path, good: Path) -> None:
    second = tmp_path / "second.parquet"
    pq.write_table(TRUTH.slice(300, 50).drop_columns(["flag"]), second)
    with pytest.raises(SchemaError, match=re.escape(str(second))) as info:
        DependencyTree().fit([good, second])
    assert "flag" in str(info.value)


def test_an_error_in_a_later_batch_names_the_file_and_its_rows(tmp_path: Path) -> None:
    # A value the codebook has no code for, in the second batch of 100 rows of the second file:
    # the error names that file and the batch's rows within it (row 50 of the batch is 150).
    names = ["a", "b"]
    first = pa.table({"a": ["x", "y"] * 100, "b": [1, 2] * 100})
    model = DependencyTree(columns=names, max_categories=2).fit(first)
    second = first.set_column(0, "a", pa.array(["x"] * 150 + ["new"] + ["y"] * 49))
    paths = [tmp_path / "first.parquet", tmp_path / "second.parquet"]
    pq.write_table(first, paths[0])
    pq.write_table(second, paths[1])
    with pytest.raises(DataError) as info:
        DependencyTree(columns=names).fit(paths, codebook=model, batch_rows=100)
    message = str(info.value)
    assert message.startswith(f"{paths[1]}, rows 100-199: "), message
    assert "row 50 of this batch" in message
    # In memory, the first batch keeps the message as it was (its rows are the data's).
    with pytest.raises(DataError) as info:
        DependencyTree(columns=names).fit(second.slice(100), codebook=model)
    assert str(info.value).startswith("column 'a'"), str(info.value)


def test_a_column_changing_family_names_the_file(tmp_path: Path, good: Path) -> None:
    second = tmp_path / "second.parquet"
    piece = TRUTH.slice(300, 50)
    pq.write_table(_recast(piece, tier=piece["tier"].cast(pa.string())), second)
    with pytest.raises(DataError, match=re.escape(str(second))) as info:
        DependencyTree().fit([good, second])
    assert "tier" in str(info.value)


def test_int32_and_int64_files_get_the_same_codes(tmp_path: Path) -> None:
    narrow = tmp_path / "narrow.parquet"
    wide = tmp_path / "wide.parquet"
    half = N_ROWS // 2
    pq.write_table(
        _recast(TRUTH.slice(0, half), tier=TRUTH["tier"][:half].cast(pa.int32())), narrow
    )
    pq.write_table(TRUTH.slice(half), wide)
    model = DependencyTree().fit([narrow, wide])
    assert_same_model(model, DependencyTree().fit(TRUTH))


WIDE = pa.table({"k": pa.array([1, 2, 300, 2] * 25, pa.int64()), "s": ["a", "b", "c", "a"] * 25})
NARROW = pa.table({"k": pa.array([1, 2, 1, 2] * 5, pa.int8()), "s": ["a", "b", "b", "a"] * 5})


def test_integer_widths_may_grow_between_files(tmp_path: Path) -> None:
    pq.write_table(NARROW, tmp_path / "a.parquet")
    pq.write_table(WIDE, tmp_path / "b.parquet")
    model = DependencyTree().fit(tmp_path)
    assert_same_model(
        model, DependencyTree().fit(pa.concat_tables([NARROW.cast(WIDE.schema), WIDE]))
    )
    assert set(model.sample(50, random_state=0)["k"].to_pylist()) <= {1, 2, 300}


def test_a_small_dictionary_first_does_not_limit_sampling(tmp_path: Path) -> None:
    small = pa.table({"s": pa.array(["a", "b", "c"] * 10).dictionary_encode(), "k": [1, 2, 3] * 10})
    small = small.cast(pa.schema({"s": pa.dictionary(pa.int8(), pa.string()), "k": pa.int64()}))
    many = pa.table({"s": [f"v{i:03d}" for i in range(300)], "k": [1, 2, 3] * 100})
    pq.write_table(small, tmp_path / "a.parquet")
    pq.write_table(many, tmp_path / "b.parquet")
    model = DependencyTree(max_categories=1000).fit(tmp_path)
    assert len(model.categories_[0]) == 303
    drawn = model.sample(2000, random_state=1)["s"].to_pylist()
    assert set(drawn) <= set(model.categories_[0])


def test_a_stream_whose_integer_width_grows(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    model = DependencyTree().fit(iter(NARROW.to_batches() + WIDE.to_batches()))
    want = DependencyTree().fit(pa.concat_tables([NARROW.cast(WIDE.schema), WIDE]))
    assert model.categories_ == want.categories_
    assert np.array_equal(model.pairwise_mutual_info_, want.pairwise_mutual_info_)


def test_a_stream_whose_first_batch_is_all_null_in_a_column(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    first = pa.record_batch({"k": pa.array([1, 2]), "s": pa.nulls(2)})
    rest = pa.record_batch({"k": pa.array([1, 2, 2, 1]), "s": pa.array(["x", "y", "y", None])})
    pq.write_table(pa.Table.from_batches([first]), tmp_path / "a.parquet")
    pq.write_table(pa.Table.from_batches([rest]), tmp_path / "b.parquet")
    want = DependencyTree().fit(tmp_path)
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    assert_same_model(DependencyTree().fit(iter([first, rest])), want)


def test_an_empty_file_is_skipped_with_a_warning_naming_it(
    tmp_path: Path, reference: DependencyTree
) -> None:
    first, empty, last = (tmp_path / f"{k}.parquet" for k in ("a", "b", "c"))
    pq.write_table(TRUTH.slice(0, 700), first)
    pq.write_table(TRUTH.slice(0, 0), empty)
    pq.write_table(TRUTH.slice(700), last)
    with pytest.warns(SkippedFileWarning, match=re.escape(str(empty))) as record:
        model = DependencyTree().fit(tmp_path, batch_rows=256)
    assert all(str(empty) in str(w.message) for w in record)
    assert_same_model(model, reference)


# -- progress ------------------------------------------------------------------------------------


def test_progress_off_prints_nothing(
    parts: list[Path], reference: DependencyTree, capsys: pytest.CaptureFixture[str]
) -> None:
    assert_same_model(DependencyTree().fit(parts, progress=False), reference)
    # The default draws only on a terminal, and capsys is none.
    assert_same_model(DependencyTree().fit(parts), reference)
    captured = capsys.readouterr()
    assert (captured.out, captured.err) == ("", "")


def test_progress_on_draws_and_changes_nothing(
    parts: list[Path], reference: DependencyTree, capsys: pytest.CaptureFixture[str]
) -> None:
    assert_same_model(DependencyTree().fit(parts, progress=True, batch_rows=500), reference)
    captured = capsys.readouterr()
    assert "rows" in captured.out + captured.err


def test_progress_bars_go_to_stderr(parts: list[Path], capsys: pytest.CaptureFixture[str]) -> None:
    DependencyTree().fit(parts, progress=True)
    captured = capsys.readouterr()
    assert captured.out == ""
    assert "counting pairs" in captured.err


@pytest.mark.parametrize("progress", [1, "yes", 0.0])
def test_progress_must_be_a_bool(parts: list[Path], progress: Any) -> None:
    with pytest.raises(TypeError, match="progress"):
        DependencyTree().fit(parts, progress=progress)


# -- scoring into Parquet ------------------------------------------------------------------------

SESSIONS = shop_sessions(4000, 21)
COLUMNS = model_columns(SESSIONS)


@pytest.fixture(scope="module")
def shop_model() -> DependencyTree:
    return DependencyTree(columns=COLUMNS).fit(SESSIONS)


@pytest.fixture(scope="module")
def session_files(tmp_path_factory: pytest.TempPathFactory) -> list[Path]:
    directory = tmp_path_factory.mktemp("sessions")
    paths = [directory / f"sessions-{k}.parquet" for k in range(3)]
    pq.write_table(SESSIONS.slice(0, 1500), paths[0], row_group_size=500)
    # The middle file stores every dictionary column as plain strings.
    middle = SESSIONS.slice(1500, 1000)
    plain = {
        name: middle[name].cast(pa.string())
        for name in middle.column_names
        if pa.types.is_dictionary(middle.schema.field(name).type)
    }
    pq.write_table(_recast(middle, **plain), paths[1])
    pq.write_table(SESSIONS.slice(2500), paths[2])
    return paths


def test_score_to_parquet_matches_score_samples(
    tmp_path: Path, shop_model: DependencyTree, session_files: list[Path]
) -> None:
    out = tmp_path / "scores.parquet"
    top = shop_model.score_to_parquet(
        session_files, out, keys=["session_id"], surprisal=True, top=5, batch_rows=301
    )
    written = pq.read_table(out)
    assert written.column_names == ["session_id", "score"] + [f"surprisal_{c}" for c in COLUMNS]
    assert written.num_rows == SESSIONS.num_rows
    assert written["session_id"].to_pylist() == SESSIONS["session_id"].to_pylist()
    scores = shop_model.score_samples(SESSIONS)
    assert np.array_equal(written["score"].to_numpy(), scores)
    assert np.array_equal(shop_model.score_samples(session_files), scores)
    surprisal = shop_model.surprisal(SESSIONS)
    for column in COLUMNS:
        assert np.array_equal(
            written[f"surprisal_{column}"].to_numpy(), surprisal[column].to_numpy()
        )
    # The top table: the five lowest scores (ties by position), lowest first.
    rows = np.lexsort((np.arange(len(scores)), scores))[:5]
    assert top.num_rows == 5
    assert top["row"].to_pylist() == rows.tolist()
    assert top["score"].to_pylist() == scores[rows].tolist()
    assert top["session_id"].to_pylist() == SESSIONS["session_id"].take(rows).to_pylist()
    for column in COLUMNS:
        expected = surprisal[column].take(rows).to_pylist()
        assert top[f"surprisal_{column}"].to_pylist() == expected
    assert sorted(os.listdir(tmp_path)) == ["scores.parquet"]


def test_score_to_parquet_without_surprisal_or_top(
    tmp_path: Path, shop_model: DependencyTree
) -> None:
    out = tmp_path / "plain.parquet"
    top = shop_model.score_to_parquet(SESSIONS, out, batch_rows=1000)
    assert pq.read_table(out).column_names == ["score"]
    assert top.num_rows == 0


def test_a_key_named_score_is_refused_and_nothing_is_written(
    tmp_path: Path, shop_model: DependencyTree
) -> None:
    data = SESSIONS.append_column("score", SESSIONS["session_id"])
    with pytest.raises(SchemaError, match="score"):
        shop_model.score_to_parquet(data, tmp_path / "out.parquet", keys=["score"])
    assert os.listdir(tmp_path) == []


def test_writing_into_a_missing_directory_leaves_nothing(
    tmp_path: Path, shop_model: DependencyTree
) -> None:
    missing = tmp_path / "not" / "there"
    with pytest.raises(FileNotFoundError, match=re.escape(str(missing))):
        shop_model.score_to_parquet(SESSIONS, missing / "out.parquet")
    with pytest.raises(FileNotFoundError, match=re.escape(str(missing))):
        shop_model.sample_to_parquet(10, missing / "out.parquet", random_state=0)
    assert os.listdir(tmp_path) == []


def _broken_second_file(directory: Path) -> list[Path]:
    directory.mkdir()
    first, second = directory / "in-1.parquet", directory / "in-2.parquet"
    pq.write_table(SESSIONS.slice(0, 2000), first)
    pq.write_table(SESSIONS.slice(2000).drop_columns(["region"]), second)
    return [first, second]


def test_scoring_that_fails_half_way_leaves_no_file(
    tmp_path: Path, shop_model: DependencyTree
) -> None:
    inputs = _broken_second_file(tmp_path / "in")
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    target = out_dir / "scores.parquet"
    written: list[int] = []
    real = pq.ParquetWriter.write_table

    def counting(self: pq.ParquetWriter, table: pa.Table, *args: Any, **kwargs: Any) -> None:
        written.append(table.num_rows)
        real(self, table, *args, **kwargs)

    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(pq.ParquetWriter, "write_table", counting)
        with pytest.raises(SchemaError, match=re.escape(str(inputs[1]))):
            shop_model.score_to_parquet(inputs, target, keys=["session_id"], batch_rows=500)
    assert sum(written) == 2000  # the first file was scored and written before the failure
    assert os.listdir(out_dir) == []
    # An existing target is left exactly as it was.
    target.write_bytes(b"earlier results")
    with pytest.raises(SchemaError):
        shop_model.score_to_parquet(inputs, target, batch_rows=500)
    assert target.read_bytes() == b"earlier results"
    assert os.listdir(out_dir) == ["scores.parquet"]


def test_score_to_parquet_with_a_key_whose_width_differs_between_files(
    tmp_path: Path, shop_model: DependencyTree
) -> None:
    first, second = tmp_path / "a.parquet", tmp_path / "b.parquet"
    pq.write_table(SESSIONS.slice(0, 2000), first)
    rest = SESSIONS.slice(2000)
    pq.write_table(_recast(rest, session_id=rest["session_id"].cast(pa.int32())), second)
    out = tmp_path / "out.parquet"
    shop_model.score_to_parquet([first, second], out, keys=["session_id"])
    written = pq.read_table(out)
    assert written["session_id"].to_pylist() == SESSIONS["session_id"].to_pylist()


# -- sampling into Parquet -----------------------------------------------------------------------


@pytest.mark.parametrize(("n", "batch_rows"), [(37, 1), (9000, 4096), (9000, 5000), (9000, 10**6)])
def test_sample_to_parquet_equals_sample(
    tmp_path: Path, shop_model: DependencyTree, n: int, batch_rows: int
) -> None:
    out = tmp_path / "sample.parquet"
    assert shop_model.sample_to_parquet(n, out, random_state=17, batch_rows=batch_rows) == n
    written = pq.read_table(out)
    want = shop_model.sample(n, random_state=17)
    assert written.schema.remove_metadata() == want.schema
    assert written.equals(want)
    assert not written.equals(shop_model.sample(n, random_state=18))
    assert os.listdir(tmp_path) == ["sample.parquet"]


@pytest.mark.parametrize("interrupt", [OSError, KeyboardInterrupt])
def test_sampling_interrupted_half_way_leaves_no_file(
    tmp_path: Path, shop_model: DependencyTree, interrupt: type[BaseException]
) -> None:
    target = tmp_path / "sample.parquet"
    real = pq.ParquetWriter.write_batch
    calls = 0

    def failing(self: pq.ParquetWriter, batch: pa.RecordBatch, *args: Any, **kwargs: Any) -> None:
        nonlocal calls
        calls += 1
        if calls == 3:
            raise interrupt("stopped half-way")
        real(self, batch, *args, **kwargs)

    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(pq.ParquetWriter, "write_batch", failing)
        with pytest.raises(interrupt, match="half-way"):
            shop_model.sample_to_parquet(20_000, target, random_state=1, batch_rows=4096)
        assert calls == 3
        assert os.listdir(tmp_path) == []
        target.write_bytes(b"keep me")
        calls = 0
        with pytest.raises(interrupt, match="half-way"):
            shop_model.sample_to_parquet(20_000, target, random_state=1, batch_rows=4096)
    assert target.read_bytes() == b"keep me"
    assert os.listdir(tmp_path) == ["sample.parquet"]


def test_bad_sample_size_leaves_no_file(tmp_path: Path, shop_model: DependencyTree) -> None:
    with pytest.raises(ValueError, match="n must be"):
        shop_model.sample_to_parquet(-1, tmp_path / "s.parquet", random_state=0)
    assert os.listdir(tmp_path) == []


# -- bounded memory ------------------------------------------------------------------------------


def test_streamed_fit_keeps_arrow_memory_near_one_batch(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    table = shop_sessions(300_000, 9).select(COLUMNS)
    table = _recast(
        table,
        **{
            f.name: table[f.name].cast(pa.string())
            for f in table.schema
            if pa.types.is_dictionary(f.type)
        },
    )
    want = DependencyTree().fit(table)
    size = table.nbytes
    path = tmp_path / "big.parquet"
    pq.write_table(table, path, row_group_size=25_000)
    del table

    def whole_read(*args: Any, **kwargs: Any) -> None:
        raise AssertionError("a streamed fit read a whole file or row group at once")

    for name in ("read", "read_row_group", "read_row_groups"):
        monkeypatch.setattr(pq.ParquetFile, name, whole_read)
    monkeypatch.setattr(pq, "read_table", whole_read)
    # Arrow's own allocations are invisible to tracemalloc: sample Arrow's pool after each batch.
    peaks: list[int] = []
    real_rows = treewise.progress.PassProgress.rows

    def rows(self: treewise.progress.PassProgress, n: int) -> None:
        peaks.append(pa.total_allocated_bytes())
        real_rows(self, n)

    monkeypatch.setattr(treewise.progress.PassProgress, "rows", rows)
    before = pa.total_allocated_bytes()
    model = DependencyTree().fit(path, batch_rows=10_000, progress=False)
    after = pa.total_allocated_bytes()

    # Two passes of at least 30 batches each (the shop's numeric columns have more distinct
    # values than the one-pass fit's provisional codes allow).
    assert len(peaks) >= 2 * 30
    # Arrow memory stays near a few batches, never the file: the batch being counted, those
    # read ahead (READ_AHEAD), and the row group being decoded with its buffers.
    batch_bytes, group_bytes = size * 10_000 / 300_000, size * 25_000 / 300_000
    assert max(peaks) - before < (READ_AHEAD + 2) * batch_bytes + 2 * group_bytes
    assert max(peaks) - before < size / 3
    assert after - before < 1_000_000
    assert model.parent_.tolist() == want.parent_.tolist()
    assert np.array_equal(model.pairwise_mutual_info_, want.pairwise_mutual_info_)
