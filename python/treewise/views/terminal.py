"""The terminal views: the tree, its strongest edges and surprising rows as rich renderables.

The ``treewise`` commands and the demo print these; ``model_json`` is the model's structure as
plain JSON types.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa
from rich.table import Table
from rich.text import Text
from rich.tree import Tree

if TYPE_CHECKING:
    from treewise.compare import Comparison
    from treewise.estimator import DependencyTree
    from treewise.mixture import TreeMixture

__all__ = [
    "COMPARE_CAUTION",
    "SAMPLE_CAUTION",
    "SCORE_CAUTION",
    "changed_columns_table",
    "changed_edges_table",
    "explain_rows",
    "fidelity_table",
    "mixture_json",
    "mixture_table",
    "model_json",
    "new_rows_table",
    "strongest_table",
    "surprising_table",
    "tree_view",
]

#: Printed once wherever scores are shown.
SCORE_CAUTION = (
    "A score is evidence, not a verdict: a surprising row is worth a look, but no decision "
    "about a person should rest on a score alone."
)
#: Printed once after a comparison.
COMPARE_CAUTION = (
    "A score is evidence, not a verdict: a changed column or a row unlike the reference is "
    "worth a look, not proof of a fault, and no decision about a person should rest on it. "
    "On large tables tiny changes are significant: read the effect sizes (TV)."
)
#: Printed once wherever synthetic rows are written.
SAMPLE_CAUTION = (
    "Rows sampled from a model fitted on personal data can reveal rare records; local privacy "
    "law and your organisation's policy come first."
)


def tree_view(model: DependencyTree, name: str) -> Tree:
    """The fitted tree as a rich Tree, indented from the root.

    Each node shows the column's name and cardinality (its number of codes, counting the "other"
    and null codes) and, below the root, its mutual information with its parent in nats.
    Children are listed strongest first, so the main chains read top to bottom.

    Parameters
    ----------
    model : DependencyTree
        A fitted model.
    name : str
        What to call the model in the top line (its file name).

    Returns
    -------
    rich.tree.Tree
        Ready for ``Console.print``.
    """
    names = [str(name) for name in model.feature_names_in_]
    children: dict[int, list[int]] = {i: [] for i in range(len(names))}
    roots: list[int] = []
    for child, parent in enumerate(model.parent_):
        if parent < 0:
            roots.append(child)
        else:
            children[int(parent)].append(child)

    def label(node: int, is_root: bool) -> Text:
        cardinality = len(model.categories_[node])
        link = "root" if is_root else f"MI {model.mutual_info_[node]:.4f}"
        return Text.assemble((names[node], "bold"), f"  {cardinality} categories, {link}")

    top = Tree(Text(f"{name}: {len(names)} columns, {model.n_rows_:,} rows (MI in nats)"))
    stack: list[tuple[int, Tree]] = [(root, top) for root in reversed(roots)]
    while stack:
        node, under = stack.pop()
        branch = under.add(label(node, is_root=model.parent_[node] < 0))
        ordered = sorted(children[node], key=lambda c: (-model.mutual_info_[c], c))
        stack.extend((c, branch) for c in reversed(ordered))
    return top


def strongest_table(model: DependencyTree, k: int = 5) -> Table:
    """The ``k`` edges with the highest mutual information, strongest first."""
    edges = model.edges()
    mutual_info = np.asarray(edges["mutual_info"])
    order = np.argsort(-mutual_info, kind="stable")[:k]
    table = Table(title=f"Strongest dependencies (top {len(order)} of {edges.num_rows} edges)")
    table.add_column("parent")
    table.add_column("child")
    table.add_column("MI (nats)", justify="right")
    table.add_column("G", justify="right")
    parents, children = edges["parent"].to_pylist(), edges["child"].to_pylist()
    g_statistic = edges["g_statistic"].to_pylist()
    for e in order:
        table.add_row(parents[e], children[e], f"{mutual_info[e]:.4f}", f"{g_statistic[e]:,.0f}")
    return table


def explain_rows(
    top: pa.Table, names: Sequence[str], k: int = 3, prefix: str = "surprisal_"
) -> list[list[tuple[str, float]]]:
    """For each row of ``top``, the ``k`` columns with the highest ``<prefix><column>``.

    Parameters
    ----------
    top : pyarrow.Table
        Rows as returned by ``DependencyTree.score_to_parquet`` (one ``surprisal_<column>`` in
        nats per modelled column) or ``Comparison.top_rows`` (``ratio_<column>``).
    names : sequence of str
        The modelled columns.
    k : int, default 3
        How many columns per row.
    prefix : str, default "surprisal_"
        Which figures to rank: ``"surprisal_"`` or ``"ratio_"``.

    Returns
    -------
    list of list of (str, float)
        Per row, ``(column, value)`` pairs, highest first; ties keep the column order.
    """
    if top.num_rows == 0 or not names:
        return [[] for _ in range(top.num_rows)]
    matrix = np.column_stack(
        [np.asarray(top[f"{prefix}{name}"], dtype=np.float64) for name in names]
    )
    order = np.argsort(-matrix, axis=1, kind="stable")[:, :k]
    return [[(names[c], float(matrix[r, c])) for c in order[r]] for r in range(top.num_rows)]


def surprising_table(top: pa.Table, names: Sequence[str], keys: Sequence[str], title: str) -> Table:
    """The most surprising rows with the three columns that made each one so.

    Parameters
    ----------
    top : pyarrow.Table
        Rows as returned by ``DependencyTree.score_to_parquet``, most surprising first.
    names : sequence of str
        The modelled columns (surprisal columns of ``top``).
    keys : sequence of str
        Key columns of ``top`` to show beside the row number.
    title : str
        The table's title.

    Returns
    -------
    rich.table.Table
        One line per row: row number, keys, ln p(row) and the top three columns with their
        surprisal -ln P(value | parent value) in nats.
    """
    table = Table(title=title)
    table.add_column("row", justify="right")
    for key in keys:
        table.add_column(key)
    table.add_column("ln p", justify="right")
    table.add_column("most surprising columns (surprisal in nats)")
    key_values = {key: top[key].to_pylist() for key in keys}
    scores = top["score"].to_pylist()
    rows = top["row"].to_pylist()
    for r, reasons in enumerate(explain_rows(top, names)):
        why = "\n".join(f"{name} {value:.1f}" for name, value in reasons)
        cells = [str(key_values[key][r]) for key in keys]
        table.add_row(f"{rows[r]:,}", *cells, f"{scores[r]:.2f}", why)
    return table


def fidelity_table(columns: pa.Table, title: str) -> Table:
    """Each synthetic column against real values, next to the bootstrap noise floor.

    ``columns`` is what ``treewise.fidelity.compare_columns`` returns first.
    """
    table = Table(title=title)
    for head, justify in [
        ("column", "left"),
        ("kind", "left"),
        ("distance", "right"),
        ("floor", "right"),
        ("excess", "right"),
        ("nulls", "right"),
        ("synth.", "right"),
    ]:
        table.add_column(head, justify=justify, no_wrap=True)  # type: ignore[arg-type]
    for r in columns.to_pylist():
        table.add_row(
            r["column"],
            r["kind"],
            f"{r['measure']} {r['distance']:.3f}",
            f"{r['noise_floor']:.3f}",
            f"{r['excess']:+.3f}",
            f"{r['null_share_real']:.3f}",
            f"{r['null_share_synthetic']:.3f}",
        )
    table.caption = (
        "distance: KS (numeric) or total variation (categorical) against real values; floor: "
        "the same for a bootstrap resample of the real rows; nulls: share in real and synthetic"
    )
    return table


def model_json(model: DependencyTree) -> dict[str, Any]:
    """The model's structure as plain JSON types (what ``treewise show --json`` prints)."""
    names = [str(name) for name in model.feature_names_in_]
    edges = model.edges().to_pylist()
    return {
        "columns": names,
        "cardinalities": [len(categories) for categories in model.categories_],
        "parent": [names[int(p)] if p >= 0 else None for p in model.parent_],
        "n_rows": int(model.n_rows_),
        "alpha": float(model.alpha),
        "privacy": model.privacy_,
        "edges": [
            {
                "parent": e["parent"],
                "child": e["child"],
                "mutual_info": e["mutual_info"],
                "g_statistic": e["g_statistic"],
                "dof": e["dof"],
                "p_value": e["p_value"],
            }
            for e in edges
        ],
    }


def _p(p: float | None) -> str:
    if p is None:
        return "—"
    return "< 1e-300" if p == 0.0 else f"{p:.2g}"


def changed_columns_table(comparison: Comparison, k: int = 5) -> Table:
    """The ``k`` columns that changed most (changed first, by total variation)."""
    rows = comparison.columns.to_pylist()
    n_changed = sum(r["changed"] for r in rows)
    table = Table(
        title=f"Columns: {n_changed} of {len(rows)} changed (Holm-adjusted p < "
        f"{comparison.level:g})"
    )
    for head, justify in [("column", "left"), ("TV", "right"), ("G", "right"), ("dof", "right")]:
        table.add_column(head, justify=justify)  # type: ignore[arg-type]
    table.add_column("adj. p", justify="right")
    table.add_column("moved most")
    for r in rows[:k]:
        table.add_row(
            Text(r["column"], style="bold" if r["changed"] else ""),
            f"{r['tv_distance']:.4f}",
            f"{r['g_statistic']:,.1f}",
            str(r["dof"]),
            _p(r["p_adjusted"]),
            "\n".join(r["moved"][:2]),
        )
    return table


def changed_edges_table(comparison: Comparison, k: int = 5) -> Table:
    """The ``k`` dependencies that changed most: P(child | parent) across the two sides."""
    rows = comparison.edges.to_pylist()
    n_changed = sum(r["changed"] for r in rows)
    table = Table(title=f"Dependencies: {n_changed} of {len(rows)} tree edges changed")
    table.add_column("parent -> child")
    table.add_column("tree")
    table.add_column("TV | parent", justify="right")
    table.add_column("MI ref -> cur", justify="right")
    table.add_column("adj. p", justify="right")
    table.add_column("moved most")
    for r in rows[:k]:
        tv = r["tv_conditional"]
        table.add_row(
            Text(f"{r['parent']} -> {r['child']}", style="bold" if r["changed"] else ""),
            r["tree"],
            "—" if tv is None else f"{tv:.4f}",
            f"{r['mi_reference']:.3f} -> {r['mi_current']:.3f}",
            _p(r["p_adjusted"]),
            "\n".join(r["moved"][:1]),
        )
    return table


def new_rows_table(top: pa.Table, names: Sequence[str], keys: Sequence[str], title: str) -> Table:
    """The rows most unlike the reference, with the columns that make them so.

    Each row shows its log-likelihood ratio ln p_cur - ln p_ref and the three columns with the
    largest share of it, with their values.
    """
    table = Table(title=title)
    table.add_column("row", justify="right")
    for key in keys:
        table.add_column(key)
    table.add_column("ln p_cur - ln p_ref", justify="right")
    table.add_column("why (column = value: nats)")
    key_values = {key: top[key].to_pylist() for key in keys}
    values = {name: top[name].to_pylist() for name in names}
    scores = top["score"].to_pylist()
    rows = top["row"].to_pylist()
    for r, reasons in enumerate(explain_rows(top, names, prefix="ratio_")):
        why = "\n".join(f"{name} = {values[name][r]}: {value:+.2f}" for name, value in reasons)
        cells = [str(key_values[key][r]) for key in keys]
        table.add_row(f"{rows[r]:,}", *cells, f"{scores[r]:+.2f}", why)
    return table


def mixture_table(model: TreeMixture) -> Table:
    """One line per component of a mixture: weight, root, edges shared or new, strongest edge."""
    from treewise.views.components import component_edges

    table = Table(title=f"{len(model.components_)} components (MI in nats)")
    for head, justify in [
        ("k", "right"),
        ("weight", "right"),
        ("root", "left"),
        ("edges", "right"),
        ("shared", "right"),
        ("new", "right"),
        ("strongest new edge", "left"),
    ]:
        table.add_column(head, justify=justify)  # type: ignore[arg-type]
    table.caption = (
        "shared: edges every component has; new: edges the single tree (fitted to all rows) "
        "does not have"
    )
    names = [str(n) for n in model.feature_names_in_]
    for k, comp in enumerate(model.components_):
        edges = component_edges(model, k)
        new = [e for e in edges if not e["in_single"]]
        strongest = (
            f"{new[0]['parent']} - {new[0]['child']}\n{new[0]['mutual_info']:.4f}" if new else "—"
        )
        table.add_row(
            str(k),
            f"{comp.weight:.3f}",
            names[int(comp.root_)],
            str(len(edges)),
            str(sum(e["shared"] for e in edges)),
            str(len(new)),
            strongest,
        )
    return table


def mixture_json(model: TreeMixture) -> dict[str, Any]:
    """A mixture's structure as plain JSON types (``treewise show --json`` of a mixture)."""
    from treewise.views.components import component_edges

    names = [str(name) for name in model.feature_names_in_]
    return {
        "kind": "mixture",
        "columns": names,
        "cardinalities": [len(categories) for categories in model.single_tree_.categories_],
        "n_rows": int(model.n_rows_),
        "alpha": float(model.alpha),
        "n_iter": int(model.n_iter_),
        "converged": bool(model.converged_),
        "components": [
            {
                "weight": float(comp.weight),
                "parent": [names[int(p)] if p >= 0 else None for p in comp.parent_],
                "edges": [
                    {key: e[key] for key in ("parent", "child", "mutual_info", "shared")}
                    for e in component_edges(model, k)
                ],
            }
            for k, comp in enumerate(model.components_)
        ],
    }
