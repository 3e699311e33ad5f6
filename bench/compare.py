"""Counting-kernel benchmark: treewise against the numpy reference, a scipy.sparse one-hot Gram
and one plain numpy pass, on the same data in one run.

Regimes (the targets of the counting kernels; ratios are taken within this one run):

- (a) dense 1M x 50, cardinality 2-10: >= 100x the reference, >= 100x the scipy one-hot Gram,
  <= 10x one numpy pass; with TREEWISE_THREADS=2 >= 1.7x TREEWISE_THREADS=1 (subprocesses);
- (b) dense 1M x 50, cardinality 20-50: >= 50x the reference;
- (c) binary 10M x 100: <= 5x one numpy pass;
- (d) clickstream flags 1M x 1000 binary columns, at most 8 ones per row: >= 20x scipy.sparse;
- scaling with rows (1M -> 10M) and with columns (50 -> 400) on (a)-like data, plotted to
  ``bench/scaling.png``.

For each regime it times the full ``DependencyTree().fit(table)`` and, to show where the time
goes, its two passes done by hand: the codebook pass (``CodebookBuilder.observe``) and the count
pass (``PairStats.update``: encode each batch to codes, then the counting kernels). On (a), (b)
and (d) it also times the count pass with each kernel forced by ``TREEWISE_KERNEL``.

The numpy reference is ``treewise.reference.fit(columns)``; where it would take minutes it is
timed on the first rows only and scaled linearly (said so in the table). The scipy baseline
builds the one-hot CSR matrix of all columns from the same numpy arrays and computes ``X.T @ X``
(every pair table at once); for the flags of (d), whose full one-hot would hold 10^9 entries, it
one-hot encodes only the non-zero level (the other cells follow from the column sums and N).
The numpy pass is ``np.add.reduce`` of every column, the memory floor.

``make bench`` runs ``bench/compare.py --write bench/RESULTS.md``; ``--quick`` is a smoke run
on a tenth of the rows with shorter sweeps.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import shlex
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa
import scipy.sparse as sp
import treewise
from fit_bench import fmt_s, load_text, machine_info, time_calls, write_section
from treewise import _core, reference
from treewise.sources import iter_batches

HERE = Path(__file__).resolve().parent
Columns = dict[str, npt.NDArray[Any]]


# -- data --------------------------------------------------------------------------------------


def dense(rows: int, cols: int, lo: int, hi: int, seed: int) -> Columns:
    """Categorical columns with cardinality in lo..hi; each a noisy function of an earlier one."""
    rng = np.random.default_rng(seed)
    dtype = np.int8 if hi <= 127 else np.int16
    cards = rng.integers(lo, hi + 1, size=cols)
    out: Columns = {}
    names = [f"c{k:03d}" for k in range(cols)]
    for k in range(cols):
        uniform = rng.integers(0, cards[k], size=rows, dtype=np.int16).astype(dtype)
        if k == 0:
            out[names[k]] = uniform
            continue
        parent = out[names[int(rng.integers(0, k))]]
        mapping = rng.integers(0, cards[k], size=int(parent.max()) + 1).astype(dtype)
        noisy = rng.random(rows, dtype=np.float32) < rng.uniform(0.2, 0.6)
        out[names[k]] = np.where(noisy, uniform, mapping[parent])
    return out


def flags(rows: int, cols: int, max_ones: int, seed: int) -> Columns:
    """Clickstream flags: each row sets 0..max_ones columns drawn by a Zipf-like popularity."""
    rng = np.random.default_rng(seed)
    popularity = 1.0 / np.arange(1, cols + 1) ** 0.8
    popularity /= popularity.sum()
    ones = rng.integers(0, max_ones + 1, size=rows)
    row_of = np.repeat(np.arange(rows), ones)
    col_of = rng.choice(cols, size=len(row_of), p=popularity)
    grid = np.zeros((cols, rows), dtype=np.int8)
    grid[col_of, row_of] = 1
    return {f"f{k:04d}": grid[k] for k in range(cols)}


def to_table(columns: Columns) -> pa.Table:
    """The same columns as a pyarrow Table (one chunk each)."""
    return pa.table({name: pa.array(values) for name, values in columns.items()})


# -- the measured calls ------------------------------------------------------------------------


def fit_treewise(table: pa.Table) -> treewise.DependencyTree:
    """The full fit."""
    return treewise.DependencyTree().fit(table)


def codebook_pass(table: pa.Table) -> Any:
    """The fit's first pass, by hand: observe every batch, then fix the codebook."""
    builder = _core.CodebookBuilder(table.column_names)
    for batch in iter_batches(table):
        builder.observe(batch)
    codebook = builder.finish(128, 10)[0]
    return codebook


def count_pass(table: pa.Table, codebook: Any) -> Any:
    """The fit's second pass, by hand: encode every batch and count it."""
    stats = _core.PairStats(codebook)
    for batch in iter_batches(table):
        stats.update(codebook, batch)
    return stats


def numpy_pass(columns: Columns) -> int:
    """One plain pass: sum every column once (the memory floor)."""
    return sum(int(np.add.reduce(v, dtype=np.int64)) for v in columns.values())


def onehot_gram(columns: Columns, only_nonzero: bool = False) -> tuple[float, float, Any]:
    """Build the one-hot CSR matrix of the columns and compute ``X.T @ X``: (build s, product s).

    With ``only_nonzero`` each column contributes one indicator (value != 0) instead of one
    indicator per level.
    """
    start = time.perf_counter()
    values = list(columns.values())
    n = len(values[0])
    if only_nonzero:
        rows_parts, cols_parts = [], []
        for k, v in enumerate(values):
            r = np.flatnonzero(v)
            rows_parts.append(r)
            cols_parts.append(np.full(len(r), k, dtype=np.int32))
        row_idx = np.concatenate(rows_parts)
        col_idx = np.concatenate(cols_parts)
        x = sp.csr_matrix(
            (np.ones(len(row_idx), dtype=np.float64), (row_idx, col_idx)), shape=(n, len(values))
        )
    else:
        d = len(values)
        cards = [int(v.max()) + 1 for v in values]
        offsets = np.concatenate([[0], np.cumsum(cards)]).astype(np.int32)
        indices = np.empty((n, d), dtype=np.int32)
        for k, v in enumerate(values):
            np.add(v, offsets[k], out=indices[:, k], casting="unsafe")
        x = sp.csr_matrix(
            (np.ones(n * d, dtype=np.float64), indices.ravel(), np.arange(0, n * d + 1, d)),
            shape=(n, int(offsets[-1])),
        )
    built = time.perf_counter()
    gram = x.T @ x
    done = time.perf_counter()
    return built - start, done - built, gram


def head(columns: Columns, rows: int) -> Columns:
    """The first ``rows`` rows of every column."""
    return {k: v[:rows] for k, v in columns.items()}


# -- regimes -----------------------------------------------------------------------------------


@dataclass
class Regime:
    """One data shape, what to time on it and its targets."""

    key: str
    title: str
    make: Callable[[], Columns]
    rows: int
    ref_rows: int | None  # None: skip the reference; else time it on the first ref_rows rows
    scipy: str | None  # "onehot", "nonzero" or None
    scipy_rows: int | None
    forced: tuple[str, ...]
    targets: list[tuple[str, str, float]]  # (label, ratio key, bound): ">=" ratios or "<="


@dataclass
class Measured:
    """What one regime measured (seconds)."""

    fit: list[float]
    codebook: list[float]
    count: list[float]
    forced: dict[str, float]
    numpy: list[float]
    ref: float | None
    ref_runs: int
    ref_rows: int | None
    scipy_build: float | None
    scipy_product: float | None
    scipy_rows: int | None
    same_tree: bool | None
    note: str
    #: (d) only: the fit of the same flags given as a scipy.sparse int8 matrix, and whether its
    #: tree equals the dense fit's.
    sparse_fit: list[float] | None = None
    sparse_same: bool | None = None


def measure(reg: Regime, repeats: int, log: Callable[[str], None]) -> Measured:
    """Generate the regime's data and time everything on it."""
    t0 = time.perf_counter()
    columns = reg.make()
    table = to_table(columns)
    n = len(next(iter(columns.values())))
    log(f"[{reg.key}] generated {n:,} x {len(columns)} in {time.perf_counter() - t0:.1f} s")
    fit = time_calls(lambda: fit_treewise(table), repeats)
    log(f"[{reg.key}] treewise fit best {fit.best:.3f} s")
    cb = time_calls(lambda: codebook_pass(table), repeats)
    codebook = cb.result
    cnt = time_calls(lambda: count_pass(table, codebook), repeats)
    log(f"[{reg.key}] codebook pass {cb.best:.3f} s, count pass {cnt.best:.3f} s")
    forced: dict[str, float] = {}
    saved = os.environ.get("TREEWISE_KERNEL")
    try:
        for kernel in reg.forced:
            os.environ["TREEWISE_KERNEL"] = kernel
            forced[kernel] = time_calls(lambda: count_pass(table, codebook), 1, warmups=0).best
            log(f"[{reg.key}] count pass, TREEWISE_KERNEL={kernel}: {forced[kernel]:.3f} s")
    finally:
        if saved is None:
            os.environ.pop("TREEWISE_KERNEL", None)
        else:
            os.environ["TREEWISE_KERNEL"] = saved
    npass = time_calls(lambda: numpy_pass(columns), max(repeats, 3))
    log(f"[{reg.key}] numpy pass best {npass.best:.4f} s")
    ref_s: float | None = None
    ref_runs = 0
    same_tree: bool | None = None
    if reg.ref_rows is not None:
        sub = head(columns, reg.ref_rows) if reg.ref_rows < n else columns
        r = time_calls(lambda: reference.fit(sub), 2, once_if_over=30.0)
        ref_s, ref_runs = r.best * n / len(next(iter(sub.values()))), len(r.runs)
        if reg.ref_rows >= n:
            same_tree = bool(np.array_equal(fit.result.parent_, r.result.parent))
        log(f"[{reg.key}] reference best {r.best:.2f} s on {min(reg.ref_rows, n):,} rows")
        del r
    build = product = None
    if reg.scipy is not None:
        rows = min(reg.scipy_rows or n, n)
        sub = head(columns, rows) if rows < n else columns
        gc.collect()
        b, p, _ = onehot_gram(sub, only_nonzero=reg.scipy == "nonzero")
        build, product = b * n / rows, p * n / rows
        log(f"[{reg.key}] scipy one-hot build {b:.2f} s, X.T @ X {p:.2f} s on {rows:,} rows")
    sparse_fit: list[float] | None = None
    sparse_same: bool | None = None
    if reg.scipy == "nonzero":
        # The sparse input path: the same flags as a CSR matrix, counted from its non-zeros.
        names = list(columns)
        flags = sp.csr_matrix(np.stack([columns[c] for c in names], axis=1).astype(np.int8))
        sp_fit = time_calls(lambda: treewise.DependencyTree(columns=names).fit(flags), repeats)
        sparse_fit = sp_fit.runs
        sparse_same = bool(np.array_equal(sp_fit.result.parent_, fit.result.parent_))
        log(f"[{reg.key}] treewise fit of the scipy.sparse matrix best {sp_fit.best:.3f} s")
        del flags
    return Measured(
        fit.runs,
        cb.runs,
        cnt.runs,
        forced,
        npass.runs,
        ref_s,
        ref_runs,
        reg.ref_rows,
        build,
        product,
        reg.scipy_rows,
        same_tree,
        "",
        sparse_fit,
        sparse_same,
    )


def child_main(args: argparse.Namespace) -> None:
    """Subprocess mode: time the fit of regime (a)'s data under this TREEWISE_THREADS."""
    table = to_table(dense(args.rows, 50, 2, 10, seed=1))
    t = time_calls(lambda: fit_treewise(table), args.repeats)
    print(json.dumps({"threads": _core.thread_count(), "runs": t.runs}))


def run_threads(rows: int, repeats: int, threads: int) -> dict[str, Any]:
    """Time regime (a) in a fresh interpreter with TREEWISE_THREADS set."""
    env = {**os.environ, "TREEWISE_THREADS": str(threads)}
    env.pop("TREEWISE_KERNEL", None)
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child"]
    cmd += ["--rows", str(rows), "--repeats", str(repeats)]
    done = subprocess.run(cmd, env=env, capture_output=True, text=True, check=True)
    out: dict[str, Any] = json.loads(done.stdout.strip().splitlines()[-1])
    return out


def sweep(
    points: list[tuple[int, int]], repeats: int, log: Callable[[str], None]
) -> list[dict[str, float]]:
    """Fit time (best) and one numpy pass for (rows, cols) points of (a)-like data."""
    out = [sweep_point(rows, cols, repeats, log) for rows, cols in points]
    return out


def sweep_point(rows: int, cols: int, repeats: int, log: Callable[[str], None]) -> dict[str, float]:
    """One point of a sweep."""
    columns = dense(rows, cols, 2, 10, seed=2)
    table = to_table(columns)
    fit = time_calls(lambda: fit_treewise(table), repeats)
    npass = time_calls(lambda: numpy_pass(columns), 3)
    pairs = cols * (cols - 1) // 2
    log(f"[sweep] {rows:,} x {cols}: fit {fit.best:.3f} s, numpy pass {npass.best:.4f} s")
    return {
        "rows": rows,
        "cols": cols,
        "fit": fit.best,
        "numpy": npass.best,
        "ns_row_pair": fit.best / (rows * pairs) * 1e9,
    }


# -- report ------------------------------------------------------------------------------------


def ratios(m: Measured) -> dict[str, float]:
    """The ratios the targets talk about."""
    fit = min(m.fit)
    out = {"fit/numpy": fit / min(m.numpy), "count/numpy": min(m.count) / min(m.numpy)}
    if m.ref is not None:
        out["ref/fit"] = m.ref / fit
        out["ref/count"] = m.ref / min(m.count)
    if m.scipy_build is not None and m.scipy_product is not None:
        out["scipy/fit"] = (m.scipy_build + m.scipy_product) / fit
        out["scipy product/fit"] = m.scipy_product / fit
        if m.sparse_fit:
            # Both from the same CSR matrix: scipy's product against treewise's whole fit.
            out["scipy product/sparse fit"] = m.scipy_product / min(m.sparse_fit)
    return out


def plot(
    rows_sweep: list[dict[str, float]], cols_sweep: list[dict[str, float]], path: Path
) -> None:
    """Two panels: fit time against rows and against columns, with the numpy pass."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=(11, 4.2))
    ax = axes[0]
    x = [p["rows"] / 1e6 for p in rows_sweep]
    ax.plot(x, [p["fit"] for p in rows_sweep], "o-", label="treewise fit")
    ax.plot(x, [p["numpy"] for p in rows_sweep], "s--", label="one numpy pass")
    if rows_sweep:
        k = rows_sweep[0]["fit"] / rows_sweep[0]["rows"]
        ax.plot(x, [k * p["rows"] for p in rows_sweep], ":", color="grey", label="linear")
    cols = int(rows_sweep[0]["cols"]) if rows_sweep else 0
    ax.set(xlabel="rows (millions)", ylabel="seconds", title=f"rows, {cols} columns")
    ax.legend()
    ax = axes[1]
    x = [p["cols"] for p in cols_sweep]
    ax.plot(x, [p["fit"] for p in cols_sweep], "o-", label="treewise fit")
    ax.plot(x, [p["numpy"] for p in cols_sweep], "s--", label="one numpy pass")
    if cols_sweep:
        c0 = cols_sweep[0]
        k = c0["fit"] / (c0["cols"] * (c0["cols"] - 1) / 2)
        ax.plot(x, [k * c * (c - 1) / 2 for c in x], ":", color="grey", label="∝ pairs")
    rows = int(cols_sweep[0]["rows"]) if cols_sweep else 0
    ax.set(xlabel="columns", ylabel="seconds", title=f"columns, {rows:,} rows")
    ax.legend()
    fig.suptitle("treewise fit, cardinality 2-10 (bench/compare.py)")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def verdict(value: float, bound: float, at_least: bool) -> str:
    """'met' or 'not met'."""
    ok = value >= bound if at_least else value <= bound
    return "met" if ok else "**not met**"


def main(argv: list[str] | None = None) -> None:
    """Parse the options, run every regime, print and optionally write the results."""
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="a tenth of the rows, short sweeps")
    p.add_argument("--repeats", type=int, default=3, help="timed runs of each treewise call")
    p.add_argument("--only", default="abcdts", help="which parts: a b c d t(hreads) s(weeps)")
    p.add_argument("--write", type=Path, metavar="PATH", help="write a markdown section to PATH")
    p.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    p.add_argument("--rows", type=int, default=1_000_000, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.child:
        child_main(args)
        return
    scale = 10 if args.quick else 1
    m1 = 1_000_000 // scale

    def log(s: str) -> None:
        print(s, flush=True)

    command = shlex.join(sys.orig_argv)
    date = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    load_before = load_text()
    info = machine_info()
    log(f"load average before: {load_before}")
    started = time.perf_counter()

    regimes = {
        "a": Regime(
            "a",
            f"(a) dense {m1:,} x 50, cardinality 2-10",
            lambda: dense(m1, 50, 2, 10, seed=1),
            m1,
            m1,
            "onehot",
            None,
            ("auto", "bitset", "histogram", "sparse", "naive"),
            [
                ("reference / treewise fit >= 100", "ref/fit", 100.0),
                ("scipy one-hot Gram / treewise fit >= 100", "scipy/fit", 100.0),
                ("treewise fit / numpy pass <= 10", "fit/numpy", 10.0),
            ],
        ),
        "b": Regime(
            "b",
            f"(b) dense {m1:,} x 50, cardinality 20-50",
            lambda: dense(m1, 50, 20, 50, seed=3),
            m1,
            m1,
            "onehot",
            None,
            ("auto", "bitset", "histogram", "naive"),
            [("reference / treewise fit >= 50", "ref/fit", 50.0)],
        ),
        "c": Regime(
            "c",
            f"(c) binary {10 * m1:,} x 100",
            lambda: dense(10 * m1, 100, 2, 2, seed=4),
            10 * m1,
            m1 // 2,
            None,
            None,
            (),
            [("treewise fit / numpy pass <= 5", "fit/numpy", 5.0)],
        ),
        "d": Regime(
            "d",
            f"(d) clickstream flags {m1:,} x 1000, at most 8 ones per row",
            lambda: flags(m1, 1000, 8, seed=5),
            m1,
            None,
            "nonzero",
            None,
            ("auto", "bitset"),
            [
                ("scipy.sparse Gram / treewise fit >= 20", "scipy/fit", 20.0),
                ("the same, sparse input", "scipy product/sparse fit", 20.0),
            ],
        ),
    }
    bounds_ge = {"ref/fit", "scipy/fit", "scipy product/sparse fit"}
    results: dict[str, Measured] = {}
    for key in "abcd":
        if key in args.only:
            results[key] = measure(regimes[key], args.repeats, log)
            gc.collect()

    threads: dict[int, dict[str, Any]] = {}
    if "t" in args.only:
        for t in (1, 2):
            threads[t] = run_threads(m1, args.repeats, t)
            log(f"[threads] TREEWISE_THREADS={t}: best {min(threads[t]['runs']):.3f} s")

    rows_sweep: list[dict[str, float]] = []
    cols_sweep: list[dict[str, float]] = []
    if "s" in args.only:
        sweep_rows = [1, 2, 5, 10] if not args.quick else [1, 2, 5]
        rows_sweep = sweep([(r * m1, 20) for r in sweep_rows], 2, log)
        cols_sweep = sweep([(m1, c) for c in (50, 100, 200, 400)], 2, log)
        plot(rows_sweep, cols_sweep, HERE / "scaling.png")
        log(f"wrote {HERE / 'scaling.png'}")
    load_after = load_text()
    elapsed = time.perf_counter() - started
    rebuilt = machine_info()["extension"] != info["extension"]

    # -- the markdown section -----------------------------------------------------------------
    out = [
        "## Counting kernels: treewise against the reference, scipy.sparse and one numpy pass"
        + (" (quick run)" if args.quick else ""),
        "",
        f"- Command: `{command}`",
        f"- Date: {date}; whole run {elapsed / 60:.1f} min",
        f"- Load average (1, 5, 15 min): {load_before} before, {load_after} after",
        *[f"- {k}: {v}" for k, v in info.items()],
        f"- treewise threads in process: {_core.thread_count()}",
        "- Timing: wall clock, best of "
        f"{args.repeats} runs after one warm-up (treewise), best of 3 (numpy pass); the "
        "reference best of 2 (once if over 30 s); scipy and forced kernels once",
        "- fit = `DependencyTree().fit(table)`; codebook pass = `CodebookBuilder.observe` over "
        "the batches; count pass = `PairStats.update` over the batches (encode to codes, then the "
        "counting kernels); forced = the count pass with `TREEWISE_KERNEL` set",
        "- Extension unchanged on disk during the run: " + ("NO, rerun" if rebuilt else "yes"),
        "",
    ]
    for key, m in results.items():
        reg = regimes[key]
        r = ratios(m)
        out += [f"### {reg.title}", ""]
        out += ["| measurement | best s | note |", "|---|---:|---|"]
        out.append(f"| treewise fit | {fmt_s(min(m.fit))} | {len(m.fit)} runs |")
        out.append(
            f"| codebook pass | {fmt_s(min(m.codebook))} | the first of the two-pass fit's passes |"
        )
        out.append(
            f"| count pass (encode + kernels) | {fmt_s(min(m.count))} | the second of the two |"
        )
        for kernel, s in m.forced.items():
            out.append(f"| count pass, TREEWISE_KERNEL={kernel} | {fmt_s(s)} | once |")
        out.append(f"| numpy pass (`np.add.reduce` per column) | {fmt_s(min(m.numpy))} | floor |")
        if m.ref is not None:
            rows = m.ref_rows or reg.rows
            note = (
                f"timed on the first {rows:,} rows and scaled x{reg.rows / rows:g} (linear)"
                if rows < reg.rows
                else f"{m.ref_runs} run(s)"
            )
            out.append(f"| numpy reference `reference.fit` | {fmt_s(m.ref)} | {note} |")
        else:
            out.append(
                "| numpy reference | not run | 499,500 pairs: its per-pair Python overhead "
                "alone would take many minutes |"
            )
        if m.scipy_build is not None and m.scipy_product is not None:
            what = "non-zero level only" if reg.scipy == "nonzero" else "every level"
            out.append(
                f"| scipy one-hot CSR build ({what}) | {fmt_s(m.scipy_build)} | from the "
                "numpy columns |"
            )
            out.append(f"| scipy `X.T @ X` | {fmt_s(m.scipy_product)} | every pair table |")
        if m.sparse_fit:
            same = "same tree as the dense fit" if m.sparse_same else "**another tree**"
            out.append(
                f"| treewise fit of the flags as a scipy.sparse int8 CSR matrix | "
                f"{fmt_s(min(m.sparse_fit))} | {len(m.sparse_fit)} runs; {same} |"
            )
        out += ["", "| ratio | value | target |", "|---|---:|---|"]
        for label, value in r.items():
            target = ""
            for tl, tk, bound in reg.targets:
                if tk == label:
                    target = f"{tl}: {verdict(value, bound, tk in bounds_ge)}"
            out.append(f"| {label} | {value:.1f} | {target} |")
        if m.same_tree is not None:
            out.append("")
            out.append(f"Same tree as the reference: {'yes' if m.same_tree else '**NO**'}.")
        out.append("")
    if threads:
        one, two = min(threads[1]["runs"]), min(threads[2]["runs"])
        out += [
            f"### Threads, regime (a) ({m1:,} x 50), fresh subprocesses",
            "",
            "| TREEWISE_THREADS | threads | best s |",
            "|---|---:|---:|",
            f"| 1 | {threads[1]['threads']} | {fmt_s(one)} |",
            f"| 2 | {threads[2]['threads']} | {fmt_s(two)} |",
            "",
            f"1 thread / 2 threads = {one / two:.2f} (target >= 1.7: "
            f"{verdict(one / two, 1.7, True)})",
            "",
        ]
    if rows_sweep or cols_sweep:
        out += [
            "### Scaling (cardinality 2-10), plotted in [scaling.png](scaling.png)",
            "",
            "| rows | columns | fit s | numpy pass s | ns per row and pair |",
            "|---:|---:|---:|---:|---:|",
        ]
        for pt in rows_sweep + cols_sweep:
            out.append(
                f"| {int(pt['rows']):,} | {int(pt['cols'])} | {fmt_s(pt['fit'])} | "
                f"{fmt_s(pt['numpy'])} | {pt['ns_row_pair']:.3f} |"
            )
        if len(rows_sweep) >= 2:
            first, last = rows_sweep[0], rows_sweep[-1]
            out += [
                "",
                f"Rows x{last['rows'] / first['rows']:g}: fit time x"
                f"{last['fit'] / first['fit']:.2f} (linear would be "
                f"x{last['rows'] / first['rows']:g}).",
            ]
        out.append("")
        out.append("![scaling](scaling.png)")
        out.append("")
    out.append(
        "Regime (e), Parquet 20M x 40 against a pyarrow read, is measured in the streaming "
        "section, not here."
    )
    text = "\n".join(out)
    print()
    print(text)
    if args.write is not None:
        key = "compare" + (" quick" if args.quick else "")
        write_section(args.write, key, text)
        log(f"wrote {args.write}")


if __name__ == "__main__":
    main()
