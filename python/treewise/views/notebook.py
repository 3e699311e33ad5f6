"""A fitted model in a notebook: a compact HTML summary with the picture of the tree.

``DependencyTree._repr_html_`` returns :func:`model_html`, so Jupyter and other notebook
front ends show it when a model is the value of a cell. The HTML uses inline styles only (it
lives inside someone else's page) and escapes every name.
"""

from __future__ import annotations

import html
from typing import TYPE_CHECKING

from treewise.views.plot import INK, MUTED, figure_svg, plot_tree

if TYPE_CHECKING:
    from treewise.estimator import DependencyTree
    from treewise.mixture import TreeMixture

__all__ = ["NOTEBOOK_EDGES", "mixture_html", "model_html"]

#: The most edges drawn, and listed, in a notebook summary.
NOTEBOOK_EDGES = 40
#: How many of the strongest edges the summary lists.
LISTED_EDGES = 5


def model_html(model: DependencyTree) -> str:
    """A compact HTML summary of ``model``: one line of facts, the tree, the strongest edges.

    An unfitted model shows its ``repr``. Wide models draw only their strongest
    ``NOTEBOOK_EDGES`` edges; ``treewise.views.plot.plot_tree`` draws any part of the tree.
    """
    if getattr(model, "_model", None) is None:
        return f"<pre>{html.escape(repr(model))}</pre>"
    names = [str(n) for n in model.feature_names_in_]
    n_edges = int((model.parent_ >= 0).sum())
    n_trees = len(names) - n_edges
    facts = [
        f"{len(names):,} columns",
        f"{n_edges:,} edges" + (f" in {n_trees} trees" if n_trees > 1 else ""),
        f"{int(model.n_rows_):,} rows",
        f"{int(model.n_parameters_):,} free parameters",
        f"alpha {float(model.alpha):g}",
    ]
    privacy = getattr(model, "privacy_", None)
    if privacy:
        delta = float(privacy["delta"])
        facts.append(
            f"differentially private (ε = {privacy['epsilon']:g}"
            + (f", δ = {delta:g})" if delta else ")")
        )
    capped = n_edges > NOTEBOOK_EDGES
    figure = plot_tree(model, max_edges=NOTEBOOK_EDGES if capped else None)
    svg = figure_svg(figure, salt=f"treewise-notebook-{id(model)}")
    edges = model.edges().to_pylist()
    edges.sort(key=lambda e: -e["mutual_info"])
    cell = "padding:2px 10px 2px 0;text-align:left"
    rows = "".join(
        f'<tr><td style="{cell}">{html.escape(e["parent"])} → {html.escape(e["child"])}</td>'
        f'<td style="{cell};text-align:right">{e["mutual_info"]:.4f}</td></tr>'
        for e in edges[:LISTED_EDGES]
    )
    listed = (
        f'<table style="border-collapse:collapse;font-size:12px;margin-top:6px">'
        f'<tr><th style="{cell}">strongest edges</th><th style="{cell}">MI (nats)</th></tr>'
        f"{rows}</table>"
        if rows
        else ""
    )
    shown = f" (the {NOTEBOOK_EDGES} strongest edges drawn)" if capped else ""
    return (
        f'<div style="color:{INK};font-family:system-ui,sans-serif;font-size:13px">'
        f"<div><b>DependencyTree</b> · {html.escape(' · '.join(facts))}"
        f'<span style="color:{MUTED}">{shown}</span></div>'
        f'<div style="max-width:100%;overflow-x:auto">'
        f'<div style="max-width:900px">{svg}</div></div>'
        f"{listed}</div>"
    )


def mixture_html(model: TreeMixture) -> str:
    """A compact HTML summary of a fitted mixture: one line of facts, then its components.

    Per component: its weight, root, edges shared by every component, edges the single tree
    lacks and the strongest of those. ``treewise report`` (or ``views.mixture_report``) draws
    the trees.

    An unfitted mixture shows its ``repr``.
    """
    from treewise.views.components import component_edges

    if getattr(model, "_components", None) is None:
        return f"<pre>{html.escape(repr(model))}</pre>"
    names = [str(n) for n in model.feature_names_in_]
    state = "converged" if model.converged_ else "not converged"
    facts = [
        f"{len(model.components_)} trees",
        f"{len(names):,} columns",
        f"{int(model.n_rows_):,} rows",
        f"{int(model.n_parameters_):,} free parameters",
        f"{model.n_iter_} EM iterations ({state})",
        f"training mean ln p {model.lower_bound_:.4f} nats",
    ]
    cell = "padding:2px 10px 2px 0;text-align:left"
    right = f"{cell};text-align:right"
    head = "".join(
        f'<th style="{cell}">{h}</th>'
        for h in ("k", "weight", "root", "shared", "not in the single tree", "strongest new edge")
    )
    rows = []
    for k, comp in enumerate(model.components_):
        edges = component_edges(model, k)
        new = [e for e in edges if not e["in_single"]]
        strongest = (
            f"{html.escape(new[0]['parent'])} → {html.escape(new[0]['child'])} "
            f"({new[0]['mutual_info']:.4f})"
            if new
            else "—"
        )
        rows.append(
            f'<tr><td style="{cell}">{k}</td><td style="{right}">{comp.weight:.3f}</td>'
            f'<td style="{cell}">{html.escape(names[comp.root_])}</td>'
            f'<td style="{right}">{sum(e["shared"] for e in edges)}</td>'
            f'<td style="{right}">{len(new)}</td><td style="{cell}">{strongest}</td></tr>'
        )
    return (
        f'<div style="color:{INK};font-family:system-ui,sans-serif;font-size:13px">'
        f"<div><b>TreeMixture</b> · {html.escape(' · '.join(facts))}</div>"
        f'<table style="border-collapse:collapse;font-size:12px;margin-top:6px">'
        f"<tr>{head}</tr>{''.join(rows)}</table>"
        f'<div style="color:{MUTED};font-size:12px">shared: edges every component has; '
        "the report (treewise report) draws each component's tree</div></div>"
    )
