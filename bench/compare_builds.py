"""Two builds side by side: bench/fit_bench.py run in each checkout, alternately, on one table.

Each checkout must have its own built `.venv` (`make build`). The runs alternate (before, after,
before, after, ...) so that a change in the machine's load hits both sides alike; the best time of
each measurement over all runs is kept. Run:

    python bench/compare_builds.py --before ../old-checkout --after . [--rows N] [--rounds K]
        [--write bench/RESULTS.md]
"""

from __future__ import annotations

import argparse
import os
import re
import subprocess
from datetime import datetime, timezone
from pathlib import Path

from fit_bench import machine_info

# --core: times only treewise's fit, score_samples and sample, many times, in one process per
# turn, on fit_bench's table (the reference is not run), printing "name seconds" lines.
CORE = """
import sys, time, warnings
sys.path.insert(0, "bench")
from fit_bench import generate
import treewise
warnings.simplefilter("ignore")
data = generate({rows}, 50, 0, "int8")
def best(f, k):
    t = []
    for _ in range(k):
        s = time.perf_counter(); f(); t.append(time.perf_counter() - s)
    return min(t)
model = treewise.DependencyTree().fit(data.table)
print("fit", best(lambda: treewise.DependencyTree().fit(data.table), {k}))
print("score_samples", best(lambda: model.score_samples(data.table), {k}))
print("sample", best(lambda: model.sample({rows}, random_state=1), {k}))
"""

ROW = re.compile(r"^\| (treewise `[^`]+`|numpy reference `[^`]+`) \| ([0-9.]+) \|")
COMMIT = re.compile(r"commit ([0-9a-f]{7,})")


def run_core(checkout: Path, rows: int, k: int) -> dict[str, float]:
    """treewise's own fit, score and sample in ``checkout``, each the best of ``k`` calls."""
    python = checkout / ".venv" / "bin" / "python"
    out = subprocess.run(
        [str(python), "-c", CORE.format(rows=rows, k=k)],
        cwd=checkout,
        capture_output=True,
        text=True,
        check=True,
        env={key: v for key, v in os.environ.items() if key != "PYTHONPATH"},
    ).stdout
    return {f"treewise `{n}`": float(t) for n, t in (line.split() for line in out.splitlines())}


def run(checkout: Path, rows: int) -> tuple[dict[str, float], str]:
    """One fit_bench run in ``checkout``: its best time per measurement, and its commit."""
    python = checkout / ".venv" / "bin" / "python"
    out = subprocess.run(
        [str(python), "bench/fit_bench.py", "--rows", str(rows), "--no-threads", "--repeats", "3"],
        cwd=checkout,
        capture_output=True,
        text=True,
        check=True,
        env={k: v for k, v in os.environ.items() if k != "PYTHONPATH"},
    ).stdout
    times = {m.group(1): float(m.group(2)) for m in map(ROW.match, out.splitlines()) if m}
    commit = COMMIT.search(out)
    return times, commit.group(1) if commit else "?"


def git_commit(checkout: Path) -> str:
    """The short commit of ``checkout``."""
    out = subprocess.run(
        ["git", "-C", str(checkout), "rev-parse", "--short", "HEAD"],
        capture_output=True,
        text=True,
        check=False,
    )
    return out.stdout.strip() or "?"


def machine() -> str:
    """The CPU, cores and memory (from fit_bench's machine_info)."""
    info = machine_info()
    return f"{info['CPU']} ({info['cores']} cores, {info['memory']})"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--before", type=Path, required=True)
    parser.add_argument("--after", type=Path, default=Path("."))
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--write", type=Path, help="append a markdown section to this file")
    parser.add_argument(
        "--core", type=int, metavar="K", help="time only treewise, best of K calls per round"
    )
    args = parser.parse_args()
    best: dict[str, dict[str, float]] = {"before": {}, "after": {}}
    commits = {}
    for _ in range(args.rounds):
        for side, checkout in (("before", args.before), ("after", args.after)):
            if args.core:
                times = run_core(checkout.resolve(), args.rows, args.core)
                commits[side] = git_commit(checkout)
            else:
                times, commits[side] = run(checkout.resolve(), args.rows)
                commits[side] = git_commit(checkout) if commits[side] == "?" else commits[side]
            for name, t in times.items():
                best[side][name] = min(t, best[side].get(name, float("inf")))
    load = os.getloadavg()
    how = (
        f"treewise's fit, score_samples and sample only, best of {args.core} calls a round"
        if args.core
        else "`bench/fit_bench.py --no-threads`"
    )
    core = f" --core {args.core}" if args.core else ""
    lines = [
        f"## Before and after: {args.rows:,} rows x 50 columns, side by side",
        "",
        f"- Command: `python bench/compare_builds.py --before {args.before} --after {args.after} "
        f"--rows {args.rows} --rounds {args.rounds}{core}` (each side runs {how} in its own "
        "checkout and build, alternating)",
        f"- Date: {datetime.now(timezone.utc):%Y-%m-%d %H:%M} UTC; machine: "
        f"{machine()}; load after "
        f"{load[0]:.2f}, {load[1]:.2f}, {load[2]:.2f}",
        f"- Before: commit {commits['before']}; after: commit {commits['after']}; best of "
        f"{(args.core or 3) * args.rounds} timed runs each",
        "",
        "| measurement | before s | after s | after / before |",
        "|---|---:|---:|---:|",
    ]
    for name, before in best["before"].items():
        after = best["after"].get(name)
        if after is not None:
            lines.append(f"| {name} | {before:.4g} | {after:.4g} | {after / before:.2f} |")
    text = "\n".join(lines)
    print(text)
    if args.write:
        with open(args.write, "a", encoding="utf-8") as f:
            f.write("\n" + text + "\n")


if __name__ == "__main__":
    main()
