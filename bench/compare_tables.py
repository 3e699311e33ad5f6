"""Comparison benchmark: `treewise.compare` of two Parquet sets against one fit, time and memory.

Writes two sets of ``--rows`` rows each of the invented shop's sessions
(``treewise.datasets``) as ``--files`` Parquet files per side: the reference week, and a current
week in which a broken tag stops ``cart_add`` firing for one browser family. Then measures in
fresh subprocesses, one at a time:

1. ``DependencyTree(columns=...).fit(reference files)``: the default two-pass fit of one side;
2. ``treewise.compare(reference files, current files)``: one codebook over both sides, then
   each side counted and fitted, and every column and edge tested;

each with its wall time and the subprocess's peak resident memory, and checks that the planted
change is the top column. The target: compare in at most 2.5x the time of one fit, with bounded
memory. Run: ``python bench/compare_tables.py [--rows N] [--files F] [--write bench/RESULTS.md]``
(``make bench`` runs it at 10,000,000 rows a side).
"""

from __future__ import annotations

import argparse
import json
import resource
import shlex
import subprocess
import sys
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import pyarrow.parquet as pq
from fit_bench import fmt_s, load_text, machine_info, write_section

REPO = Path(__file__).resolve().parent.parent


def write_sides(directory: Path, rows: int, files: int, seed: int) -> tuple[Path, Path]:
    """Both sides' files, written once and reused when the same configuration is there."""
    from treewise.datasets import shop_sessions, shop_sessions_broken_tag

    directory.mkdir(parents=True, exist_ok=True)
    stamp = directory / "config.json"
    config = {"rows": rows, "files": files, "seed": seed}
    sides = (directory / "reference", directory / "current")
    per_file = [rows // files + (1 if i < rows % files else 0) for i in range(files)]
    names = [f"part-{i:03d}.parquet" for i in range(files)]
    if (
        stamp.exists()
        and json.loads(stamp.read_text()) == config
        and all((side / n).exists() for side in sides for n in names)
    ):
        return sides
    for side in sides:
        side.mkdir(exist_ok=True)
        for old in side.glob("*.parquet"):
            old.unlink()
    for i, (name, n) in enumerate(zip(names, per_file, strict=True)):
        # One seed per file and side, so that files are independent draws.
        pq.write_table(shop_sessions(n, seed=seed * 100_000 + i), sides[0] / name)
        current = shop_sessions_broken_tag(n, seed=seed * 100_000 + 50_000 + i)
        pq.write_table(current, sides[1] / name)
        print(f"wrote {name} of each side: {n:,} rows", flush=True)
    stamp.write_text(json.dumps(config))
    return sides


def child(mode: str, directory: Path) -> dict[str, Any]:
    """One measurement in this (fresh) process."""
    import treewise
    from treewise.datasets import model_columns

    reference, current = directory / "reference", directory / "current"
    columns = model_columns(pq.read_schema(next(reference.glob("*.parquet"))).empty_table())
    start = time.perf_counter()
    result: dict[str, Any] = {"mode": mode}
    if mode == "fit":
        model = treewise.DependencyTree(columns=columns).fit(reference, progress=False)
        result["rows"] = int(model.n_rows_)
    else:
        comparison = treewise.compare(reference, current, columns=columns, progress=False)
        result["rows"] = comparison.n_reference + comparison.n_current
        result["top_column"] = comparison.columns["column"][0].as_py()
        edge = comparison.edges.slice(0, 1).to_pylist()[0]
        result["top_edge"] = f"{edge['parent']} -> {edge['child']}"
        result["changed_columns"] = int(sum(comparison.columns["changed"].to_pylist()))
        result["changed_edges"] = int(sum(comparison.edges["changed"].to_pylist()))
    result["seconds"] = time.perf_counter() - start
    result["peak_bytes"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    return result


def run(mode: str, directory: Path) -> dict[str, Any]:
    """Run :func:`child` in a fresh interpreter (so its peak memory is its own)."""
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", mode, "--dir", str(directory)]
    done = subprocess.run(cmd, capture_output=True, text=True, check=True)
    result: dict[str, Any] = json.loads(done.stdout.strip().splitlines()[-1])
    return result


def main(argv: list[str] | None = None) -> None:
    """Parse the options, write the data if needed, measure, print and optionally record."""
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=10_000_000, help="rows per side")
    p.add_argument("--files", type=int, default=10, help="Parquet files per side")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--dir", type=Path, default=None)
    p.add_argument("--write", type=Path, metavar="PATH")
    p.add_argument("--child", choices=["fit", "compare"], help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.dir is None:
        args.dir = REPO / "bench" / ".data" / f"compare-{args.rows}"
    if args.child:
        print(json.dumps(child(args.child, args.dir)))
        return
    command = shlex.join(sys.orig_argv)
    sides = write_sides(args.dir, args.rows, args.files, args.seed)
    size = sum(f.stat().st_size for side in sides for f in side.glob("*.parquet"))
    load_before = load_text()
    date = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    fit = run("fit", args.dir)
    compared = run("compare", args.dir)
    load_after = load_text()
    assert fit["rows"] == args.rows and compared["rows"] == 2 * args.rows, (fit, compared)
    gib = 2**30
    ratio = compared["seconds"] / fit["seconds"]
    lines = [
        "| measurement | seconds | rows/s | peak RSS |",
        "|---|---:|---:|---:|",
        f"| treewise `fit` of the reference side | {fmt_s(fit['seconds'])} | "
        f"{fit['rows'] / fit['seconds']:,.0f} | {fit['peak_bytes'] / gib:.2f} GiB |",
        f"| treewise `compare` of both sides | {fmt_s(compared['seconds'])} | "
        f"{compared['rows'] / compared['seconds']:,.0f} | {compared['peak_bytes'] / gib:.2f} GiB |",
    ]
    found = [
        f"- top column: `{compared['top_column']}`; top edge: `{compared['top_edge']}`; "
        f"changed: {compared['changed_columns']} column(s), {compared['changed_edges']} edge(s) "
        "(the planted change is a broken `cart_add` tag for one browser family)",
    ]
    goals = [
        f"- compare at most 2.5x one fit: {ratio:.2f}x "
        + ("(**met**)" if ratio <= 2.5 else "(**not met**)"),
        f"- bounded memory: compare's peak RSS {compared['peak_bytes'] / gib:.2f} GiB against "
        f"{fit['peak_bytes'] / gib:.2f} GiB for one fit (data: {size / gib:.2f} GiB of Parquet)",
    ]
    print("\n".join([*lines, "", *found, *goals]))
    if args.write is None:
        return
    info = machine_info()
    body = [
        f"## Comparing two tables: {args.rows:,} rows a side from {args.files} Parquet files each",
        "",
        f"- Command: `{command}`",
        f"- Date: {date}",
        f"- Load average (1, 5, 15 min): {load_before} before, {load_after} after",
        *[f"- {k}: {v}" for k, v in info.items()],
        "- Data: the invented shop's sessions (`treewise.datasets`), 25 modelled columns "
        f"(strings, bools, floats), {size / gib:.2f} GiB of Parquet for both sides",
        "- Each measurement runs in a fresh subprocess, one after another; peak RSS is that "
        "process's maximum resident set (ru_maxrss)",
        "",
        *lines,
        "",
        *found,
        "",
        "Goals:",
        "",
        *goals,
    ]
    key = f"compare_tables rows={args.rows} files={args.files} seed={args.seed}"
    write_section(args.write, key, "\n".join(body))
    print(f"wrote {args.write}")


if __name__ == "__main__":
    main()
