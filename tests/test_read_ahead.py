"""Reading ahead: files decoded on a thread while the core counts, in order, bounded, stoppable.

The truth is constructed: the same files read in turn (``READ_AHEAD = 0``) are the specification.
"""

from __future__ import annotations

import pickle
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import treewise
from treewise import sources
from treewise.sources import BatchLoop, Part, Source, open_source


def write_parts(tmp_path: Path, n_files: int = 4, rows: int = 3000) -> list[Path]:
    rng = np.random.default_rng(0)
    paths = []
    for f in range(n_files):
        table = pa.table(
            {
                "a": pa.array(rng.integers(0, 4, rows)),
                "b": pa.array([f"v{x}" for x in rng.integers(0, 3, rows)]),
                "c": pa.array(rng.integers(0, 2, rows).astype(np.int8)),
            }
        )
        path = tmp_path / f"part-{f}.parquet"
        pq.write_table(table, path, row_group_size=700)
        paths.append(path)
    return paths


def read_ahead_threads() -> list[threading.Thread]:
    return [t for t in threading.enumerate() if t.name == "treewise-read-ahead"]


def test_reading_ahead_gives_the_same_batches_and_fit(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    paths = [str(p) for p in write_parts(tmp_path)]
    source = open_source(paths)
    assert source.read_ahead

    def batches() -> list[tuple[str, str, pa.RecordBatch]]:
        seen = []
        with BatchLoop(source, ["a", "b", "c"], 500) as loop:
            for batch in loop:
                seen.append((loop.label, loop.rows(), batch))
        return seen

    ahead = batches()
    fitted = pickle.dumps(treewise.DependencyTree().fit(paths, batch_rows=500))
    monkeypatch.setattr(sources, "READ_AHEAD", 0)
    in_turn = batches()
    assert [(label, rows) for label, rows, _ in ahead] == [
        (label, rows) for label, rows, _ in in_turn
    ]
    assert all(x[2].equals(y[2]) for x, y in zip(ahead, in_turn, strict=True))
    assert pickle.dumps(treewise.DependencyTree().fit(paths, batch_rows=500)) == fitted
    assert not read_ahead_threads()


def test_an_error_read_ahead_names_its_part_and_rows_and_stops_the_thread() -> None:
    def parts(names: list[str], batch_rows: int) -> Iterator[Part]:
        def batches(broken: bool) -> Iterator[pa.RecordBatch]:
            for k in range(3):
                if broken and k == 2:
                    raise pa.ArrowInvalid("a damaged page")
                yield pa.record_batch({"x": pa.array([k, k])})

        yield Part("first.parquet", batches(False))
        yield Part("second.parquet", batches(True))

    source = Source(["x"], True, parts, n_parts=2, read_ahead=True)
    seen = []
    with pytest.raises(
        treewise.DataError, match=r"second\.parquet, rows 2-3: cannot read it"
    ) as caught:
        with BatchLoop(source, ["x"], 2) as loop:
            for _ in loop:
                seen.append((loop.label, loop.rows()))
    # The error belongs to the part being read when it happened, after its two good batches.
    assert seen[-1] == ("second.parquet", "rows 2-3")
    assert "a damaged page" in str(caught.value)
    time.sleep(0.05)
    assert not read_ahead_threads()


def test_the_queue_is_bounded_and_leaving_early_stops_the_reader() -> None:
    made = 0

    def parts(names: list[str], batch_rows: int) -> Iterator[Part]:
        def batches() -> Iterator[pa.RecordBatch]:
            nonlocal made
            for k in range(50):
                made += 1
                yield pa.record_batch({"x": pa.array([k])})

        yield Part("made", batches())

    source = Source(["x"], True, parts, read_ahead=True)
    used = 0
    with BatchLoop(source, ["x"], 1) as loop:
        for batch in loop:
            used += 1
            assert batch.column(0)[0].as_py() == used - 1  # in order
            time.sleep(0.01)  # a slow consumer: the reader waits for room in the queue
            # At most READ_AHEAD batches queued, one being made and one being used.
            assert made - used <= sources.READ_AHEAD + 1
            if used == 10:
                break
    time.sleep(0.05)
    assert not read_ahead_threads()
    assert made <= 10 + sources.READ_AHEAD + 1
