"""Processes: Ctrl-C stops long work within about a second and leaves no partial file; fork is safe.

Each case runs the work in a child process, waits until the child says it has started (and,
for outputs, until the temporary file exists), sends SIGINT and measures how long the child
takes to exit. The latency bound is the feature under test and is kept generous (3 s) so that a
loaded CI machine does not flake; nothing else here is timed. Inside one batch the bound is the
goal itself, 1 s, measured from the signal to the KeyboardInterrupt in the child.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

#: Seconds the child may take to exit after SIGINT (the feature promises about one).
LATENCY = 3.0
#: Seconds of work before the signal.
WORK_BEFORE_SIGNAL = 2.0

PRELUDE = textwrap.dedent(
    """
    import sys, itertools
    import numpy as np, pyarrow as pa
    import treewise

    def wide_table(rows, columns, seed=0):
        # Random codes for 1M rows, tiled: cheap to build, and every pair gets counted.
        rng = np.random.default_rng(seed)
        base = rng.integers(0, 6, size=(columns, 1_000_000), dtype=np.int8)
        reps = -(-rows // base.shape[1])
        return pa.table({f"c{k}": np.tile(base[k], reps)[:rows] for k in range(columns)})

    def small_model():
        table = wide_table(50_000, 6, seed=1)
        return treewise.DependencyTree().fit(table)

    def ready():
        print("ready", flush=True)

    try:
    {body}
        print("finished", flush=True)
    except KeyboardInterrupt:
        print("interrupted", flush=True)
        sys.exit(130)
    """
)


def run_and_interrupt(
    body: str, tmp_path: Path, wait_for: Path | None = None, wait: float = WORK_BEFORE_SIGNAL
) -> tuple[float, str, str]:
    """Run ``body`` in a child; SIGINT it once it is busy. Returns (latency, stdout, stderr)."""
    script = PRELUDE.replace("{body}", textwrap.indent(textwrap.dedent(body), "    "))
    child = subprocess.Popen(
        [sys.executable, "-c", script],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        cwd=tmp_path,
    )
    try:
        assert child.stdout is not None
        line = child.stdout.readline()
        assert line.strip() == "ready", f"the child did not start: {line!r} {child.stderr}"
        time.sleep(wait)
        if wait_for is not None:
            temporaries = list(wait_for.parent.glob(f".{wait_for.name}.*.tmp"))
            assert temporaries, "the output was not being written when the signal came"
        assert child.poll() is None, "the work ended before the signal; make it longer"
        sent = time.monotonic()
        child.send_signal(signal.SIGINT)
        try:
            child.wait(timeout=60)
        finally:
            latency = time.monotonic() - sent
        out, err = child.communicate()
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
    assert "interrupted" in out, f"stdout {out!r}, stderr {err[-2000:]!r}"
    assert child.returncode == 130
    return latency, out, err


def test_ctrl_c_stops_a_long_fit(tmp_path: Path) -> None:
    latency, _, _ = run_and_interrupt(
        """
        table = wide_table(20_000_000, 30)
        ready()
        for _ in itertools.count():  # each fit takes seconds; the loop only makes sure
            treewise.DependencyTree().fit(table)
        """,
        tmp_path,
    )
    assert latency < LATENCY


def test_ctrl_c_stops_a_fit_with_huge_batches(tmp_path: Path) -> None:
    latency, _, _ = run_and_interrupt(
        """
        table = wide_table(20_000_000, 30).combine_chunks()
        codes = treewise.DependencyTree().fit(table.slice(0, 100_000))
        ready()
        for _ in itertools.count():  # one batch of 20M rows: the core checks inside each slice
            treewise.DependencyTree().fit(table, codebook=codes, batch_rows=2**25)
        """,
        tmp_path,
        wait=0.5,
    )
    assert latency < LATENCY


# -- interrupted outputs -------------------------------------------------------------------------


def test_ctrl_c_stops_sample_to_parquet_and_leaves_no_file(tmp_path: Path) -> None:
    target = tmp_path / "synthetic.parquet"
    latency, _, _ = run_and_interrupt(
        """
        model = small_model()
        ready()
        model.sample_to_parquet(2**40, "synthetic.parquet", random_state=3)
        """,
        tmp_path,
        wait_for=target,
    )
    assert latency < LATENCY
    assert list(tmp_path.iterdir()) == []


def test_ctrl_c_stops_score_to_parquet_and_keeps_the_previous_file(tmp_path: Path) -> None:
    target = tmp_path / "scores.parquet"
    target.write_bytes(b"the previous complete file")
    latency, _, _ = run_and_interrupt(
        """
        model = small_model()
        batch = wide_table(262_144, 6, seed=4).to_batches()[0]
        endless = (batch for _ in itertools.count())  # a stream that never ends
        ready()
        model.score_to_parquet(endless, "scores.parquet", keys=["c0"], surprisal=True)
        """,
        tmp_path,
        wait_for=target,
    )
    assert latency < LATENCY
    assert [p.name for p in tmp_path.iterdir()] == [target.name]
    assert target.read_bytes() == b"the previous complete file"


def test_ctrl_c_during_save_keeps_the_previous_model(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A model file is written in one call; Ctrl-C as it reaches the disk (simulated at fsync)
    leaves the previous file whole and no temporary."""
    import pyarrow as pa
    import treewise
    import treewise.files

    target = tmp_path / "m.treewise"
    target.write_bytes(b"the previous complete file")
    model = treewise.DependencyTree().fit(pa.table({"a": [1, 2, 1], "b": ["x", "y", "y"]}))

    def interrupted(fd: int) -> None:
        raise KeyboardInterrupt

    monkeypatch.setattr(treewise.files.os, "fsync", interrupted)
    with pytest.raises(KeyboardInterrupt):
        model.save(target)
    assert [p.name for p in tmp_path.iterdir()] == [target.name]
    assert target.read_bytes() == b"the previous complete file"


def test_sigkill_may_leave_only_a_hidden_temporary(tmp_path: Path) -> None:
    """SIGKILL runs no cleanup: a temporary may remain, but never a partial final file."""
    script = textwrap.dedent(
        """
        import numpy as np, pyarrow as pa, treewise
        rng = np.random.default_rng(0)
        table = pa.table({f"c{k}": rng.integers(0, 5, 50_000) for k in range(6)})
        model = treewise.DependencyTree().fit(table)
        print("ready", flush=True)
        model.sample_to_parquet(2**40, "synthetic.parquet", random_state=3)
        """
    )
    child = subprocess.Popen(
        [sys.executable, "-c", script], stdout=subprocess.PIPE, text=True, cwd=tmp_path
    )
    try:
        assert child.stdout is not None
        assert child.stdout.readline().strip() == "ready"
        deadline = time.monotonic() + 30
        while not list(tmp_path.glob(".synthetic.parquet.*.tmp")):
            assert time.monotonic() < deadline, "no temporary file appeared"
            time.sleep(0.05)
        time.sleep(0.5)
        os.kill(child.pid, signal.SIGKILL)
        child.wait(timeout=30)
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
        if child.stdout is not None:
            child.stdout.close()
    assert not (tmp_path / "synthetic.parquet").exists()
    assert all(p.name.startswith(".synthetic.parquet.") for p in tmp_path.iterdir())


# -- fork ----------------------------------------------------------------------------------------

FORK_SCRIPT = textwrap.dedent(
    """
    import multiprocessing, sys
    import numpy as np, pyarrow as pa, treewise

    rng = np.random.default_rng(0)
    table = pa.table({f"c{k}": rng.integers(0, 4, 20_000) for k in range(5)})
    model = treewise.DependencyTree().fit(table)  # the parent's thread pool now exists
    scores = model.score_samples(table).tobytes()
    sample = model.sample(5_000, random_state=1)

    def work(seed):
        return model.score_samples(table).tobytes() == scores and model.sample(
            5_000, random_state=1
        ).equals(sample)

    if __name__ == "__main__":
        with multiprocessing.get_context("fork").Pool(2) as pool:
            try:
                print(pool.map_async(work, range(4)).get(timeout=float(sys.argv[1])), flush=True)
            except multiprocessing.TimeoutError:
                print("deadlock", flush=True)
    """
)


def test_forked_children_score_and_sample_without_deadlock(tmp_path: Path) -> None:
    done = subprocess.run(
        [sys.executable, "-c", FORK_SCRIPT, "4"],
        capture_output=True,
        text=True,
        timeout=120,
        cwd=tmp_path,
    )
    assert done.returncode == 0, done.stderr[-2000:]
    assert done.stdout.split() == ["[True,", "True,", "True,", "True]"], done.stdout


# -- inside one huge batch -----------------------------------------------------------------------

#: Seconds from SIGINT to the KeyboardInterrupt inside one batch (the goal of issue 14).
BATCH_LATENCY = 1.0

#: One child runs each phase on a single batch of 262,144 rows x 600 columns (one slice of the
#: bindings, so the old check between slices never came). Uninterrupted, on the 2-core
#: development machine: counting that batch 8.4 s, scoring it 2.4 s, sampling as many rows
#: 4.2 s with decoding (0.9 s in the core), the report on it 54 s. After each interrupt a small
#: call of the same kind must work.
BATCH_SCRIPT = textwrap.dedent(
    """
    import sys, time
    import numpy as np, pyarrow as pa, treewise
    from treewise.views.report import write_report

    rng = np.random.default_rng(0)
    COLS, ROWS = 600, 262_144
    base = rng.integers(0, 6, size=(COLS, ROWS), dtype=np.int8)
    table = pa.table({f"c{k}": base[k] for k in range(COLS)}).combine_chunks()
    assert len(table.to_batches()) == 1
    model = treewise.DependencyTree().fit(table.slice(0, 2_000))
    tiny = table.select(["c0", "c1", "c2"]).slice(0, 1_000)
    tiny_model = treewise.DependencyTree().fit(tiny)
    counts = treewise.PairStats(model.codebook_)

    def counts_refused_then_fresh():
        # Interrupted mid-batch, the counts may hold part of it: they refuse to be used.
        try:
            counts.marginal_counts("c0")
        except treewise.TreewiseError as e:
            assert "interrupted" in str(e), e
        else:
            raise AssertionError("interrupted PairStats were used")
        fresh = treewise.PairStats(model.codebook_).update(table.slice(0, 100))
        assert fresh.n_rows == 100

    phases = {
        "fit": (lambda: treewise.DependencyTree().fit(table),
                lambda: treewise.DependencyTree().fit(tiny)),
        "score": (lambda: model.score_samples(table),
                  lambda: model.score_samples(table.slice(0, 5))),
        "sample": (lambda: model.sample(ROWS, random_state=1), lambda: model.sample(5)),
        "report": (lambda: write_report(model, "big.html", data=table),
                   lambda: write_report(tiny_model, "tiny.html", data=tiny)),
        "counts": (lambda: counts.update(table), counts_refused_then_fresh),
    }
    for name in sys.argv[1:]:
        big, small = phases[name]
        print("ready", name, flush=True)
        try:
            big()
            print("finished", name, flush=True)
        except KeyboardInterrupt:
            print("interrupted", name, repr(time.monotonic()), flush=True)
        small()
        print("recovered", name, flush=True)
    """
)

#: Seconds each phase runs before the signal.
BATCH_DELAYS = {"fit": 1.0, "score": 0.3, "sample": 0.2, "report": 1.0, "counts": 1.0}


def test_ctrl_c_inside_one_huge_batch(tmp_path: Path) -> None:
    """fit, score_samples, sample, the report and PairStats.update each stop within a second
    of SIGINT while the core works on one batch, and the next call of the same kind works
    normally (PairStats cut off mid-batch refuse to be used)."""
    child = subprocess.Popen(
        [sys.executable, "-c", BATCH_SCRIPT, *BATCH_DELAYS],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        cwd=tmp_path,
    )
    latencies: dict[str, float] = {}
    try:
        assert child.stdout is not None
        for name, delay in BATCH_DELAYS.items():
            line = child.stdout.readline().split()
            assert line == ["ready", name], f"{line!r}; stderr {child.stderr}"
            time.sleep(delay)
            sent = time.monotonic()
            child.send_signal(signal.SIGINT)
            line = child.stdout.readline().split()
            assert line[:2] == ["interrupted", name], f"{line!r}: the work ended before the signal"
            latencies[name] = float(line[2]) - sent
            assert child.stdout.readline().split() == ["recovered", name]
        _, err = child.communicate(timeout=60)
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
    assert child.returncode == 0, err[-2000:]
    slow = {name: t for name, t in latencies.items() if not 0 <= t < BATCH_LATENCY}
    assert not slow, f"seconds from SIGINT to KeyboardInterrupt: {latencies}"
