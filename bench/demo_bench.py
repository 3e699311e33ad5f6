"""The demo's timing: `make demo` (`python -m treewise.cli demo`) run once, timed, in a new folder.

It measures the wall time and the peak RSS of the demo process (the largest resident set of any
child, from `getrusage`), records the demo's own closing lines (the edges recovered and the
anomalies found), and with `--write PATH` appends a section to bench/RESULTS.md naming the machine
and the command. Run: `python bench/demo_bench.py [--rows N] [--write bench/RESULTS.md]`.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

from fit_bench import machine_info, write_section


def machine() -> str:
    """The CPU, cores and memory (from fit_bench's machine_info)."""
    info = machine_info()
    return f"{info['CPU']} ({info['cores']} cores, {info['memory']})"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=2_000_000, help="sessions the demo makes")
    parser.add_argument("--write", type=Path, help="append a markdown section to this file")
    args = parser.parse_args()
    command = [sys.executable, "-m", "treewise.cli", "demo", "--rows", str(args.rows)]
    with tempfile.TemporaryDirectory() as folder:
        start = time.perf_counter()
        done = subprocess.run(
            [*command, "--dir", folder], capture_output=True, text=True, check=True
        )
        wall = time.perf_counter() - start
    peak_mib = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    lines = [line.strip() for line in done.stdout.splitlines() if line.strip()]
    found = [line for line in lines if "recovered" in line or "anomal" in line][:4]
    load = os.getloadavg()
    text = "\n".join(
        [
            f"## The demo: {args.rows:,} sessions",
            "",
            f"- Command: `python bench/demo_bench.py --rows {args.rows}` (runs "
            f"`python -m treewise.cli demo --rows {args.rows}` in a temporary folder)",
            f"- Date: {datetime.now(timezone.utc):%Y-%m-%d %H:%M} UTC; machine: "
            f"{machine()}; load after "
            f"{load[0]:.2f}, {load[1]:.2f}, {load[2]:.2f}",
            f"- Wall time: {wall:.1f} s; peak RSS of the demo process: {peak_mib:,.0f} MiB",
            *[f"- The demo said: {line}" for line in found],
        ]
    )
    print(text)
    if args.write:
        write_section(args.write, "demo_bench", text)


if __name__ == "__main__":
    main()
