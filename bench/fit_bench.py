"""Fit benchmark: treewise's Rust fit against the numpy reference and one plain numpy pass.

Generates one categorical table (``--rows`` x ``--cols`` codes, each column's cardinality drawn
from 2..10, each column a noisy function of an earlier column, fixed ``--seed``), then times on
that same data:

1. ``treewise.DependencyTree().fit(table)``: one warm-up, then best and median of ``--repeats``;
2. ``treewise.reference.fit(columns)``: the pure numpy reference (one run if it takes more than
   30 s, else best and median of ``--repeats``);
3. one plain numpy pass over the same column buffers (``np.add.reduce`` of each column, and
   ``np.bincount`` of each column), the memory floor that puts the fit in perspective;
4. the treewise fit again in one subprocess per thread setting (``TREEWISE_THREADS=1`` and unset,
   the default), since the thread count is read once, at the first call.

It checks that both fits give the same tree (and the same pairwise mutual information), prints a
table and, with ``--write PATH``, writes or replaces this configuration's section of a markdown
file. ``make bench`` runs ``.venv/bin/python bench/fit_bench.py --write bench/RESULTS.md``.
"""

from __future__ import annotations

import argparse
import gc
import hashlib
import json
import os
import platform
import re
import resource
import shlex
import statistics
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa
import treewise
from treewise import _core, reference

REPO = Path(__file__).resolve().parent.parent
#: A reference run longer than this is timed once.
REFERENCE_ONCE_SECONDS = 30.0
DTYPES = {"int8": np.int8, "int16": np.int16, "int64": np.int64}


# -- data --------------------------------------------------------------------------------------


@dataclass
class Data:
    """The generated table, as Arrow and as numpy views of the same buffers."""

    table: pa.Table
    columns: dict[str, npt.NDArray[np.integer[Any]]]
    cardinalities: list[int]
    parents: list[int]  # the generating parent of each column (-1 for the first)
    digest: str  # hash of every column's bytes, to check a subprocess saw the same data


def generate(rows: int, cols: int, seed: int, dtype: str) -> Data:
    """Build ``cols`` categorical columns; column ``k > 0`` is a noisy function of an earlier one.

    Column ``k`` copies ``f_k(x_p)`` for a random earlier column ``p`` and a random map ``f_k``,
    except in a random share (20-60 %) of rows, where it draws a uniform code instead.
    """
    rng = np.random.default_rng(seed)
    np_dtype = DTYPES[dtype]
    cards = [int(c) for c in rng.integers(2, 11, size=cols)]
    parents = [-1] + [int(rng.integers(0, k)) for k in range(1, cols)]
    codes: list[npt.NDArray[np.integer[Any]]] = []
    for k in range(cols):
        uniform = rng.integers(0, cards[k], size=rows, dtype=np.int64).astype(np_dtype)
        if k == 0:
            codes.append(uniform)
            continue
        mapping = rng.integers(0, cards[k], size=cards[parents[k]]).astype(np_dtype)
        noisy = rng.random(rows) < rng.uniform(0.2, 0.6)
        codes.append(np.where(noisy, uniform, mapping[codes[parents[k]]]))
    names = [f"c{k:02d}" for k in range(cols)]
    table = pa.table({n: pa.array(c) for n, c in zip(names, codes, strict=True)})
    del codes
    # numpy views of the Arrow buffers, so that every measurement reads the same memory.
    views = {n: table.column(n).chunk(0).to_numpy(zero_copy_only=True) for n in names}
    digest = hashlib.blake2b(digest_size=8)
    for v in views.values():
        digest.update(v.tobytes())
    return Data(table, views, cards, parents, digest.hexdigest())


# -- timing ------------------------------------------------------------------------------------


@dataclass
class Timing:
    """Wall times of one measurement, in seconds."""

    runs: list[float]
    warmups: int = 0
    result: Any = field(default=None, repr=False)

    @property
    def best(self) -> float:
        """The fastest run."""
        return min(self.runs)

    @property
    def median(self) -> float:
        """The median run."""
        return statistics.median(self.runs)


def time_calls(
    fn: Callable[[], Any], repeats: int, warmups: int = 1, once_if_over: float | None = None
) -> Timing:
    """Time ``fn`` ``repeats`` times after ``warmups`` untimed calls.

    With ``once_if_over``, time one call first (no warm-up) and stop there if it took longer.
    """
    runs: list[float] = []
    result: Any = None
    if once_if_over is not None:
        gc.collect()
        start = time.perf_counter()
        result = fn()
        runs.append(time.perf_counter() - start)
        if runs[0] > once_if_over:
            return Timing(runs, 0, result)
        repeats -= 1
    else:
        for _ in range(warmups):
            result = fn()
    for _ in range(repeats):
        result = None
        gc.collect()
        start = time.perf_counter()
        result = fn()
        runs.append(time.perf_counter() - start)
    return Timing(runs, 0 if once_if_over is not None else warmups, result)


def fit_treewise(data: Data) -> treewise.DependencyTree:
    """The measured treewise call."""
    return treewise.DependencyTree().fit(data.table)


def memory_sum(data: Data) -> int:
    """One plain pass: sum every column once (widened to int64 by the reduction)."""
    total = 0
    for v in data.columns.values():
        total += int(np.add.reduce(v, dtype=np.int64))
    return total


def memory_bincount(data: Data) -> int:
    """One plain pass that counts: ``np.bincount`` of every column (casts codes to intp)."""
    total = 0
    for v in data.columns.values():
        total += int(np.bincount(v).max())
    return total


def child_main(args: argparse.Namespace) -> None:
    """Subprocess mode: time the treewise fit under this process's TREEWISE_THREADS."""
    data = generate(args.rows, args.cols, args.seed, args.dtype)
    t = time_calls(lambda: fit_treewise(data), args.repeats)
    out = {
        "threads": _core.thread_count(),
        "runs": t.runs,
        "digest": data.digest,
        "parent": [int(p) for p in t.result.parent_],
    }
    print(json.dumps(out))


def run_child(args: argparse.Namespace, threads: int | None) -> dict[str, Any]:
    """Run :func:`child_main` in a fresh interpreter, with TREEWISE_THREADS set or unset."""
    env = dict(os.environ)
    env.pop("TREEWISE_THREADS", None)
    if threads is not None:
        env["TREEWISE_THREADS"] = str(threads)
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child"]
    cmd += ["--rows", str(args.rows), "--cols", str(args.cols), "--seed", str(args.seed)]
    cmd += ["--dtype", args.dtype, "--repeats", str(args.repeats)]
    done = subprocess.run(cmd, env=env, capture_output=True, text=True, check=True)
    result: dict[str, Any] = json.loads(done.stdout.strip().splitlines()[-1])
    return result


# -- machine -----------------------------------------------------------------------------------


def _read(path: str) -> str:
    try:
        return Path(path).read_text()
    except OSError:
        return ""


def machine_info() -> dict[str, str]:
    """CPU, cores, memory, OS and library versions, as display strings."""
    cpu = re.search(r"^model name\s*:\s*(.+)$", _read("/proc/cpuinfo"), re.M)
    mem = re.search(r"^MemTotal:\s*(\d+) kB", _read("/proc/meminfo"), re.M)
    os_name = re.search(r'^PRETTY_NAME="?([^"\n]+)"?', _read("/etc/os-release"), re.M)
    try:
        commit = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"],
            cwd=REPO,
            capture_output=True,
            text=True,
            check=True,
        ).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        commit = "none (no git commit yet)"
    core_file = str(_core.__file__)
    digest = hashlib.blake2b(Path(core_file).read_bytes(), digest_size=6)
    built = datetime.fromtimestamp(Path(core_file).stat().st_mtime, timezone.utc)
    return {
        "CPU": cpu.group(1).strip() if cpu else platform.processor() or "unknown",
        "cores": f"{os.cpu_count()} logical, {len(os.sched_getaffinity(0))} usable",
        "memory": f"{int(mem.group(1)) / 2**20:.1f} GiB" if mem else "unknown",
        "OS": f"{os_name.group(1) if os_name else platform.system()} ({platform.release()})",
        "Python": platform.python_version(),
        "numpy": np.__version__,
        "pyarrow": pa.__version__,
        "treewise": f"{treewise.__version__}, commit {commit}",
        "extension": f"{Path(core_file).name}, blake2b {digest.hexdigest()}, "
        f"built {built:%Y-%m-%d %H:%M} UTC, debug build: {_core.DEBUG_BUILD}",
    }


def load_text() -> str:
    """The 1, 5 and 15 minute load averages."""
    return ", ".join(f"{x:.2f}" for x in os.getloadavg())


# -- report ------------------------------------------------------------------------------------


def fmt_s(x: float) -> str:
    """Seconds with about three significant figures."""
    return f"{x:.3g}" if x < 100 else f"{x:.0f}"


def section_key(args: argparse.Namespace) -> str:
    """The marker that names this configuration's section in the markdown file."""
    return f"fit_bench rows={args.rows} cols={args.cols} seed={args.seed} dtype={args.dtype}"


def write_section(path: Path, key: str, body: str) -> None:
    """Write ``body`` between this key's markers, replacing an earlier section for the same key."""
    start, end = f"<!-- {key} -->", f"<!-- end {key} -->"
    block = f"{start}\n{body.rstrip()}\n{end}\n"
    if path.exists():
        text = path.read_text()
        pattern = re.compile(re.escape(start) + r".*?" + re.escape(end) + r"\n?", re.S)
        text = pattern.sub(lambda _: block, text) if pattern.search(text) else text + "\n" + block
    else:
        text = (
            "# treewise benchmarks\n\n"
            "Written by `bench/fit_bench.py` (`make bench`); each section is one configuration "
            "and is replaced when that configuration is run again.\n\n" + block
        )
    path.write_text(text)


def main(argv: Sequence[str] | None = None) -> None:
    """Parse the options, run every measurement, print and optionally write the results."""
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=1_000_000)
    p.add_argument("--cols", type=int, default=50)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--dtype", choices=sorted(DTYPES), default="int8", help="column type")
    p.add_argument("--repeats", type=int, default=3, help="timed runs per measurement")
    p.add_argument("--quick", action="store_true", help="smoke run: 100,000 rows")
    p.add_argument("--no-threads", action="store_true", help="skip the subprocess thread runs")
    p.add_argument("--write", type=Path, metavar="PATH", help="write a markdown section to PATH")
    p.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.quick:
        args.rows = 100_000
    if args.child:
        child_main(args)
        return

    command = shlex.join(sys.orig_argv)
    date = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    load_before = load_text()
    env_threads = os.environ.get("TREEWISE_THREADS")
    info = machine_info()
    print(f"{args.rows:,} rows x {args.cols} columns, seed {args.seed}, {args.dtype}")
    print(f"load average before: {load_before}")

    t0 = time.perf_counter()
    data = generate(args.rows, args.cols, args.seed, args.dtype)
    print(f"generated in {time.perf_counter() - t0:.1f} s; cardinalities {data.cardinalities}")

    tw = time_calls(lambda: fit_treewise(data), args.repeats)
    threads = _core.thread_count()
    print(f"treewise fit: best {tw.best:.3f} s, median {tw.median:.3f} s ({threads} threads)")
    mem_sum = time_calls(lambda: memory_sum(data), args.repeats)
    mem_bc = time_calls(lambda: memory_bincount(data), args.repeats)
    print(f"numpy passes: sum {mem_sum.best:.4f} s, bincount {mem_bc.best:.4f} s")

    children: dict[str, dict[str, Any]] = {}
    if not args.no_threads:
        for label, n in (("1", 1), ("default", None)):
            children[label] = run_child(args, n)
            c = children[label]
            print(
                f"subprocess TREEWISE_THREADS={label}: {c['threads']} thread(s), "
                f"best {min(c['runs']):.3f} s"
            )

    ref = time_calls(
        lambda: reference.fit(data.columns, max_categories=128, n_bins=10),
        args.repeats,
        once_if_over=REFERENCE_ONCE_SECONDS,
    )
    print(f"reference fit: best {ref.best:.2f} s over {len(ref.runs)} run(s)")
    model, ref_tree_fit = tw.result, ref.result
    score = time_calls(lambda: model.score_samples(data.table), args.repeats)
    ref_score = time_calls(
        lambda: reference.score_samples(ref_tree_fit, data.columns, model.alpha),
        args.repeats,
        once_if_over=REFERENCE_ONCE_SECONDS,
    )
    scores_agree = bool(np.allclose(score.result, ref_score.result, rtol=1e-12, atol=0.0))
    print(f"score_samples: treewise {score.best:.3f} s, reference {ref_score.best:.2f} s")
    draw = time_calls(lambda: model.sample(args.rows, random_state=0), args.repeats)
    ref_draw = time_calls(
        lambda: reference.sample(ref_tree_fit, args.rows, model.alpha, np.random.default_rng(0)),
        args.repeats,
        once_if_over=REFERENCE_ONCE_SECONDS,
    )
    print(f"sample: treewise {draw.best:.3f} s, reference {ref_draw.best:.2f} s")
    load_after = load_text()
    rebuilt = machine_info()["extension"] != info["extension"]
    if rebuilt:
        print("WARNING: the extension changed on disk during the run; rerun the benchmark")
    peak_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024

    tree, ref_tree = tw.result, ref.result
    same_tree = bool(np.array_equal(np.asarray(tree.parent_), np.asarray(ref_tree.parent)))
    same_cards = [len(c) for c in tree.categories_] == list(ref_tree.cardinalities)
    mi_diff = float(np.max(np.abs(tree.pairwise_mutual_info_ - ref_tree.mi)))
    generating = int(sum(int(a) == b for a, b in zip(tree.parent_, data.parents, strict=True)))
    child_trees = all(c["parent"] == [int(x) for x in tree.parent_] for c in children.values())
    child_data = all(c["digest"] == data.digest for c in children.values())

    rows: list[tuple[str, Timing | list[float], str]] = [
        ("treewise `DependencyTree().fit(table)`", tw, f"in process, {threads} threads"),
        ("numpy reference `reference.fit(columns)`", ref, "single-threaded numpy"),
        ("numpy pass: `np.add.reduce` of each column", mem_sum, "the memory floor"),
        ("numpy pass: `np.bincount` of each column", mem_bc, "one count per column"),
        ("treewise `score_samples(table)`", score, f"{args.rows:,} rows, alpha 0.5"),
        ("numpy reference `reference.score_samples`", ref_score, "single-threaded numpy"),
        (f"treewise `sample({args.rows:,})`", draw, "to a pyarrow Table"),
        ("numpy reference `reference.sample`", ref_draw, "codes only, numpy Generator"),
    ]
    for label, c in children.items():
        rows.append(
            (
                "treewise, subprocess, TREEWISE_THREADS="
                + ("unset" if label == "default" else label),
                c["runs"],
                f"{c['threads']} thread(s)",
            )
        )
    ratios: list[tuple[str, float]] = [
        ("reference / treewise (best)", ref.best / tw.best),
        ("treewise / numpy sum pass (best)", tw.best / mem_sum.best),
        ("treewise / numpy bincount pass (best)", tw.best / mem_bc.best),
        ("score_samples: reference / treewise (best)", ref_score.best / score.best),
        ("sample: reference / treewise (best)", ref_draw.best / draw.best),
    ]
    if children:
        one, dflt = min(children["1"]["runs"]), min(children["default"]["runs"])
        ratios.append(
            (
                f"1 thread / {children['default']['threads']} threads (subprocesses, best)",
                one / dflt,
            )
        )

    lines = [
        "| measurement | best s | median s | timed runs | note |",
        "|---|---:|---:|---:|---|",
    ]
    for label, t, note in rows:
        runs = t.runs if isinstance(t, Timing) else t
        lines.append(
            f"| {label} | {fmt_s(min(runs))} | {fmt_s(statistics.median(runs))} | {len(runs)} "
            f"| {note} |"
        )
    lines += ["", "| ratio | value |", "|---|---:|"]
    lines += [f"| {label} | {value:.1f} |" for label, value in ratios]
    checks = [
        "- same tree as the reference (`parent_` == `.parent`): "
        f"**{'yes' if same_tree else 'NO'}**",
        f"- same cardinalities: {'yes' if same_cards else 'NO'}; largest pairwise MI difference: "
        f"{mi_diff:.3g} nats",
        f"- tree edges matching the generating parent: {generating} of {args.cols - 1}",
        f"- subprocess fits saw the same data and gave the same tree: "
        f"{'yes' if child_data and child_trees else 'NO'}" + ("" if children else " (not run)"),
        "- score_samples equal to the reference's to 1e-12 (relative): "
        + ("yes" if scores_agree else "NO"),
        "- extension unchanged on disk during the run: " + ("NO, rerun" if rebuilt else "yes"),
    ]
    print()
    print("\n".join(lines))
    print()
    print("\n".join(checks))
    print(f"load average after: {load_after}; peak RSS of this process {peak_mib:.0f} MiB")

    if args.write is None:
        return
    size_mb = sum(v.nbytes for v in data.columns.values()) / 1e6
    pairs = args.cols * (args.cols - 1) // 2
    ns_per_pair_row = tw.best / (args.rows * max(pairs, 1)) * 1e9
    thread_note = ""
    if children:
        thread_note = (
            f" With one thread instead of {children['default']['threads']}, the fit takes "
            f"{ratios[-1][1]:.2f} times as long."
        )
    body = [
        f"## Fit: {args.rows:,} rows x {args.cols} columns, {args.dtype} codes, seed {args.seed}",
        "",
        f"- Command: `{command}`",
        f"- Date: {date}",
        f"- Load average (1, 5, 15 min): {load_before} before, {load_after} after",
        *[f"- {k}: {v}" for k, v in info.items()],
        f"- treewise threads in process: {threads} (TREEWISE_THREADS "
        f"{'unset' if env_threads is None else repr(env_threads)})",
        f"- Data: cardinalities drawn from 2..10 (here {min(data.cardinalities)} to "
        f"{max(data.cardinalities)}, mean {np.mean(data.cardinalities):.1f}); each column a "
        f"noisy function of a random earlier column; {size_mb:.0f} MB of codes in Arrow",
        f"- Timing: wall clock; treewise and numpy passes 1 warm-up then {args.repeats} timed "
        f"runs; the reference once if over {REFERENCE_ONCE_SECONDS:.0f} s, no warm-up",
        f"- Peak RSS of the measuring process (reference included): {peak_mib:.0f} MiB",
        "",
        *lines,
        "",
        "Checks:",
        "",
        *checks,
        "",
        "What the figures say: the Rust fit is "
        f"{ratios[0][1]:.1f} times faster than the numpy reference on the same data, and takes "
        f"{ratios[1][1]:.0f} times as long as one plain numpy sum over the same "
        f"{size_mb:.0f} MB ({ratios[2][1]:.1f} times one `np.bincount` of every column). A fit "
        f"counts all {pairs:,} column pairs, so one pass over the data is a floor it cannot "
        f"reach; per row and column pair the fit costs {ns_per_pair_row:.2f} ns "
        f"({threads} threads)." + thread_note,
        "",
        "Not measured yet (later work): larger cardinalities (up to the 128 cap and beyond, "
        "where other counting kernels will be needed), string, float and dictionary columns, "
        "nulls, sparse or highly skewed data, more columns, streaming from Parquet or a "
        "RecordBatchReader, and peak memory of the fit alone.",
    ]
    write_section(args.write, section_key(args), "\n".join(body))
    print(f"wrote {args.write}")


if __name__ == "__main__":
    main()
