"""Fit a dependency tree to an invented shop's sessions and compare it with the hidden truth.

Run it as ``python -m treewise.demo [--rows N] [--seed S]``. The data comes from
:func:`treewise.datasets.shop_sessions`, which draws every session from a tree we wrote down, so
the demo can say how many of the true edges the fit found.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

import treewise
from treewise.datasets import hidden_edges, model_columns, shop_sessions

__all__ = ["main"]

NEXT_STEPS = """\
What to try next
  Fit your own table (pyarrow, pandas or polars):

    import treewise
    model = treewise.DependencyTree().fit(df)            # or columns=[...] to pick columns
    print(model.edges().to_pandas())                     # the tree, one edge per row

  Leave out keys and labels (ids, timestamps, answer columns) with columns=, and give numeric
  columns as float to have them cut into n_bins quantile bins."""


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected at least 1, got {value}")
    return value


def _seed(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected 0 or more, got {value}")
    return value


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python -m treewise.demo",
        description=(
            "Generate sessions of an invented online shop from a hidden dependency tree, fit a "
            "treewise.DependencyTree to them and report how much of the hidden tree it recovers."
        ),
    )
    parser.add_argument(
        "--rows", type=_positive_int, default=200_000, help="sessions to generate (200000)"
    )
    parser.add_argument("--seed", type=_seed, default=0, help="random seed (0)")
    return parser


def _tree_lines(model: treewise.DependencyTree) -> list[str]:
    """Render the tree as indented lines from the root: name, cardinality, MI with the parent."""
    names = [str(name) for name in model.feature_names_in_]
    children: dict[int, list[int]] = {i: [] for i in range(len(names))}
    roots: list[int] = []
    for child, parent in enumerate(model.parent_):
        if parent < 0:
            roots.append(child)
        else:
            children[int(parent)].append(child)
    lines: list[str] = []
    # Depth-first, strongest child first, so the main chains read top to bottom.
    stack = [(root, 0) for root in reversed(roots)]
    while stack:
        node, depth = stack.pop()
        card = len(model.categories_[node])
        if depth == 0:
            info = "root"
        else:
            info = f"MI {model.mutual_info_[node]:.3f}"
        lines.append(f"  {'  ' * depth}{names[node]}  ({card} categories, {info})")
        ordered = sorted(children[node], key=lambda c: -model.mutual_info_[c])
        stack.extend((c, depth + 1) for c in reversed(ordered))
    return lines


def _recovered(model: treewise.DependencyTree) -> tuple[int, int, list[tuple[str, str]]]:
    """How many hidden edges the fit found (undirected), of how many, and the ones it missed."""
    names = [str(name) for name in model.feature_names_in_]
    fitted = {frozenset((names[int(p)], names[c])) for c, p in enumerate(model.parent_) if p >= 0}
    hidden = hidden_edges()
    missed = [edge for edge in hidden if frozenset(edge) not in fitted]
    return len(hidden) - len(missed), len(hidden), missed


def main(argv: list[str] | None = None) -> int:
    """Run the demo.

    Parameters
    ----------
    argv : list of str, optional
        Command-line arguments without the program name; default ``sys.argv[1:]``.

    Returns
    -------
    int
        The exit status, 0 on success.
    """
    args = _parser().parse_args(argv)

    start = time.perf_counter()
    table = shop_sessions(n=args.rows, seed=args.seed)
    generated = time.perf_counter() - start
    columns = model_columns(table)
    print(
        f"Generated {table.num_rows:,} sessions of an invented outdoor-gear shop "
        f"({table.num_columns} columns, {len(columns)} modelled) in {generated:.2f} s"
    )

    start = time.perf_counter()
    model = treewise.DependencyTree(columns=columns).fit(table)
    fitted = time.perf_counter() - start
    print(
        f"Fitted a dependency tree on {model.n_rows_:,} rows x {model.n_features_in_} columns "
        f"in {fitted:.2f} s"
    )

    print("\nThe tree (mutual information with the parent, in nats):")
    for line in _tree_lines(model):
        print(line)

    edges = model.edges()
    strongest = [int(k) for k in np.argsort(-np.asarray(edges["mutual_info"]), kind="stable")[:5]]
    parents = edges["parent"].to_pylist()
    children = edges["child"].to_pylist()
    mutual_info = edges["mutual_info"].to_pylist()
    print("\nStrongest dependencies:")
    for k in strongest:
        print(f"  {parents[k]} -> {children[k]}  MI {mutual_info[k]:.3f}")

    found, total, missed = _recovered(model)
    print(
        f"\nCompared with the hidden tree (ignoring direction): recovered {found} of {total} "
        "hidden edges"
    )
    for parent, child in missed:
        print(f"  missed: {parent} - {child}")

    print()
    print(NEXT_STEPS)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
