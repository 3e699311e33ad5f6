"""The same data gives the same bytes: whatever the thread count, batch size or partitioning.

Models are compared by the bytes ``save`` writes, samples by their Arrow IPC bytes and scores by
their float64 bytes. The thread count is read once per process (TREEWISE_THREADS), so each count
runs in a child process.
"""

from __future__ import annotations

import hashlib
import inspect
import itertools
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import dask
import dask.dataframe as dd
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from treewise import CategoryCapWarning, DependencyTree
from treewise.distributed import fit_dask

# Generated tables hold constant columns and columns of nulls only, which are warned about
# (docs/column-kinds.md); these tests compare fits, not warnings.
pytestmark = pytest.mark.filterwarnings("ignore::treewise.ColumnKindWarning")

SAMPLE_ROWS = 10_000  # more than two sampling blocks of 4,096 rows


def table(n: int = 60_000, seed: int = 11) -> pa.Table:
    """Every value family, nulls, a capped column, a dictionary and floats with NaN."""
    rng = np.random.default_rng(seed)
    z = rng.integers(0, 5, n)

    def follow(card: int) -> np.ndarray:
        return np.where(rng.random(n) < 0.7, z % card, rng.integers(0, card, n))

    wide = np.where(rng.random(n) < 0.5, z, rng.integers(0, 300, n))
    x = z * 2.0 + rng.standard_normal(n)
    return pa.table(
        {
            "z": pa.array(z, pa.int32()),
            "u": pa.array(follow(3), pa.uint16()),
            "flag": pa.array(follow(2) == 1),
            "s": pa.array([f"s{k}" for k in follow(4)], mask=rng.random(n) < 0.05),
            "wide": pa.array([f"w{k:03d}" for k in wide]),
            "d": pa.array([f"d{k}" for k in follow(3)]).dictionary_encode(),
            "x": pa.array(np.where(rng.random(n) < 0.03, np.nan, x)),
            "y": pa.array(x * 0.5 + rng.random(n), pa.float32()),
        }
    )


def fit(data: object, **kwargs: object) -> DependencyTree:
    with pytest.warns(CategoryCapWarning, match="'wide'"):
        return DependencyTree(max_categories=64, n_bins=7).fit(data, **kwargs)  # type: ignore[arg-type]


def model_bytes(model: DependencyTree, path: Path) -> bytes:
    model.save(path)
    return path.read_bytes()


def ipc_bytes(t: pa.Table) -> bytes:
    """The table's bytes, independent of its chunking (dictionaries written as their values)."""
    columns = [
        c.cast(c.type.value_type) if pa.types.is_dictionary(c.type) else c for c in t.columns
    ]
    t = pa.table(columns, names=t.column_names).combine_chunks()
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, t.schema) as writer:
        writer.write_table(t)
    return bytes(sink.getvalue().to_pybytes())


@pytest.fixture(scope="module")
def data() -> pa.Table:
    return table()


@pytest.fixture(scope="module")
def reference(data: pa.Table, tmp_path_factory: pytest.TempPathFactory) -> bytes:
    return model_bytes(fit(data), tmp_path_factory.mktemp("ref") / "m.treewise")


CHILD = textwrap.dedent(
    """
    import sys, warnings
    import numpy as np
    import pyarrow as pa
    import treewise
    warnings.simplefilter("ignore")
    {helpers}
    data = table()
    model = treewise.DependencyTree(max_categories=64, n_bins=7).fit(data)
    model.save(sys.argv[1] + "/model.treewise")
    sample = model.sample({rows}, random_state=12345)
    with open(sys.argv[1] + "/sample.arrow", "wb") as f:
        f.write(ipc_bytes(sample))
    with open(sys.argv[1] + "/scores.bin", "wb") as f:
        f.write(model.score_samples(data).tobytes())
    """
).replace("{rows}", str(SAMPLE_ROWS))


def child_script() -> str:
    """CHILD with this module's table() and ipc_bytes() pasted in (no test imports there)."""
    helpers = "\n".join(inspect.getsource(f) for f in (table, ipc_bytes))
    return CHILD.replace("{helpers}", helpers)


def test_thread_count_changes_no_byte(tmp_path: Path) -> None:
    digests = {}
    for threads in ("1", "2", "4"):
        out = tmp_path / threads
        out.mkdir()
        env = {**os.environ, "TREEWISE_THREADS": threads}
        done = subprocess.run(
            [sys.executable, "-c", child_script(), str(out)],
            capture_output=True,
            text=True,
            env=env,
            timeout=120,
        )
        assert done.returncode == 0, done.stderr[-2000:]
        digests[threads] = [
            hashlib.sha256((out / name).read_bytes()).hexdigest()
            for name in ("model.treewise", "sample.arrow", "scores.bin")
        ]
    assert digests["1"] == digests["2"] == digests["4"]


@pytest.mark.parametrize("batch_rows", [1_000, 4_096, 33_333, 2**31])
def test_batch_size_changes_no_byte(
    data: pa.Table, reference: bytes, tmp_path: Path, batch_rows: int
) -> None:
    assert model_bytes(fit(data, batch_rows=batch_rows), tmp_path / "m.treewise") == reference


def test_files_batches_and_streams_change_no_byte(
    data: pa.Table, reference: bytes, tmp_path: Path
) -> None:
    # Uneven files, each with its own dictionary and row groups.
    cuts = [0, 7, 20_000, 20_001, 45_000, data.num_rows]
    folder = tmp_path / "parts"
    folder.mkdir()
    for k, (a, b) in enumerate(itertools.pairwise(cuts)):
        pq.write_table(data.slice(a, b - a), folder / f"part-{k}.parquet", row_group_size=5_000)
    assert model_bytes(fit(folder), tmp_path / "files.treewise") == reference
    # A list of record batches of uneven sizes.
    batches = [data.slice(a, b - a).combine_chunks() for a, b in itertools.pairwise(cuts)]
    assert model_bytes(fit(batches), tmp_path / "batches.treewise") == reference
    # A one-shot stream without dictionary columns (spooled).
    plain = data.drop_columns(["d"])
    want = model_bytes(fit(plain), tmp_path / "plain.treewise")
    reader = pa.RecordBatchReader.from_batches(plain.schema, plain.to_batches(max_chunksize=9_999))
    assert model_bytes(fit(reader), tmp_path / "stream.treewise") == want


def test_a_stream_of_dictionary_columns_changes_no_byte(
    data: pa.Table, reference: bytes, tmp_path: Path
) -> None:
    reader = pa.RecordBatchReader.from_batches(data.schema, data.to_batches(max_chunksize=9_999))
    assert model_bytes(fit(reader), tmp_path / "stream.treewise") == reference


@pytest.mark.parametrize("npartitions", [1, 3, 8])
def test_dask_partitions_change_no_byte(tmp_path: Path, npartitions: int) -> None:
    frame: pd.DataFrame = table(20_000, seed=5).to_pandas()
    want = model_bytes(fit(frame), tmp_path / "local.treewise")
    with dask.config.set(scheduler="synchronous"), pytest.warns(CategoryCapWarning):
        got = fit_dask(
            dd.from_pandas(frame, npartitions=npartitions, sort=False), max_categories=64, n_bins=7
        )
    assert model_bytes(got, tmp_path / "dask.treewise") == want


def test_float_coarsening_changes_no_byte(tmp_path: Path) -> None:
    """More distinct floats than the exact tally keeps (2**20): the coarsened bins too."""
    n = 2**20 + 50_000
    rng = np.random.default_rng(2)
    x = rng.standard_normal(n)
    data = pa.table({"x": x, "k": pa.array((x > 0).astype(np.int8) + (rng.random(n) < 0.2))})
    whole = DependencyTree(n_bins=9).fit(data, batch_rows=2**21)
    want = model_bytes(whole, tmp_path / "whole.treewise")
    for k, (a, b) in enumerate([(0, 333_333), (333_333, 900_000), (900_000, n)]):
        pq.write_table(data.slice(a, b - a), tmp_path / f"f{k}.parquet")
    files = sorted(tmp_path.glob("f*.parquet"), reverse=True)  # another order of the rows
    again = DependencyTree(n_bins=9).fit(files, batch_rows=77_777)
    assert model_bytes(again, tmp_path / "again.treewise") == want


def test_sample_bytes_do_not_depend_on_chunking(data: pa.Table, tmp_path: Path) -> None:
    model = fit(data)
    want = ipc_bytes(model.sample(SAMPLE_ROWS, random_state=99))
    for batch_rows in (1, 4_095, 4_096, 5_000, 2**20):
        batches = list(model.iter_sample(SAMPLE_ROWS, 99, batch_rows))
        assert ipc_bytes(pa.Table.from_batches(batches)) == want, batch_rows
    model.sample_to_parquet(SAMPLE_ROWS, tmp_path / "s.parquet", random_state=99, batch_rows=777)
    # Parquet stores no bytes under nulls, so the rows are compared as values.
    written = pq.read_table(tmp_path / "s.parquet")
    # NaN is a value of its own in sampled floats; pandas' comparison takes NaN as equal to NaN.
    pd.testing.assert_frame_equal(
        written.to_pandas(), model.sample(SAMPLE_ROWS, random_state=99).to_pandas()
    )
    # A saved and loaded model samples the same rows.
    model.save(tmp_path / "m.treewise")
    again = DependencyTree.load(tmp_path / "m.treewise")
    assert ipc_bytes(again.sample(SAMPLE_ROWS, random_state=99)) == want
