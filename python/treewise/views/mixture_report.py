"""The mixture report: one self-contained HTML page about a fitted mixture of trees.

It shares the model report's page shell, style sheet, HTML pieces, tree drawing and cautions;
like it, the page has no scripts, refers to nothing outside itself, and escapes every string
that comes from the data or the model.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from treewise.checks import check_int
from treewise.errors import UnseenCategoryWarning
from treewise.files import write_atomically
from treewise.sources import check_columns, open_source
from treewise.views.components import (
    Assignment,
    assign,
    component_edges,
    component_tree,
    shared_edges,
)
from treewise.views.findings import replayable, rows_at
from treewise.views.html import data_table, esc, label_cell, meter, value_label
from treewise.views.plot import figure_svg, plot_tree
from treewise.views.report import cautions, page_html

if TYPE_CHECKING:
    from treewise.mixture import TreeMixture

__all__ = ["MIXTURE_CAUTIONS", "render_mixture_report", "write_mixture_report"]

#: The shared cautions, said of a mixture.
MIXTURE_CAUTIONS = cautions(
    knows="the model only knows the dependencies its few trees hold",
    quoted="the most typical ones of each component",
)
#: Edges per component listed as differing from the single tree.
DIFFERING = 5


def _summary(model: TreeMixture, assignment: Assignment | None) -> str:
    weights = ", ".join(f"{w:.2f}" for w in model.weights_)
    facts = [
        ("components", f"{len(model.components_)}"),
        ("weights", weights),
        ("rows fitted", f"{int(model.n_rows_):,}"),
        ("columns", f"{int(model.n_features_in_):,}"),
        ("free parameters", f"{int(model.n_parameters_):,}"),
        ("smoothing alpha", f"{float(model.alpha):g}"),
        ("EM iterations", f"{int(model.n_iter_)} ({'converged' if model.converged_ else 'cut'})"),
        ("training mean ln p", f"{float(model.lower_bound_):.4f} nats"),
    ]
    if assignment is not None:
        facts.append(("rows of data scored", f"{len(assignment.scores):,}"))
    items = "".join(f"<div><dt>{esc(k)}</dt><dd>{esc(v)}</dd></div>" for k, v in facts)
    return f"""
<section id="summary">
<h2>Summary</h2>
<dl class="facts">{items}</dl>
<p class="note">P(row) = Σ<sub>k</sub> w<sub>k</sub> P<sub>k</sub>(row): each component is a
Chow-Liu tree with its own structure and tables, fitted by EM. The training mean ln p is EM's
last figure, per row, of the codes (the ln P(value | "other") of rare values, the same for
every model, is left out).</p>
</section>"""


def _components(model: TreeMixture, assignment: Assignment | None) -> str:
    head = [
        ("component", True),
        ("weight", True),
        ("edges", True),
        ("shared by all", True),
        ("not in the single tree", True),
        ("root", False),
    ]
    if assignment is not None:
        head.append(("rows it explains best", True))
    names = [str(n) for n in model.feature_names_in_]
    total = len(assignment.scores) if assignment is not None else 0
    body = []
    for k, comp in enumerate(model.components_):
        edges = component_edges(model, k)
        row = [
            str(k),
            f"{comp.weight:.3f}{meter(comp.weight)}",
            f"{len(edges):,}",
            f"{sum(e['shared'] for e in edges):,}",
            f"{sum(not e['in_single'] for e in edges):,}",
            label_cell(names[int(comp.root_)]),
        ]
        if assignment is not None:
            n = int(assignment.counts[k])
            row.append(f"{n:,} ({n / total:.1%})")
        body.append(row)
    note = (
        "Each component's weight w<sub>k</sub> and tree. An edge shared by all is in every "
        "component's tree; the last figures count edges the single tree, fitted to all rows "
        "at once, does not have."
    )
    if assignment is not None:
        note += (
            " A row is explained best by the component with the highest responsibility "
            "P(k | row) for it."
        )
    return f"""
<section id="components">
<h2>Components</h2>
<p class="note">{note}</p>
{data_table(head, body)}
</section>"""


def _trees(model: TreeMixture, tree_edges: int | None) -> str:
    shared = [(a, b) for a, b in (sorted(pair) for pair in shared_edges(model))]
    figures = []
    for k, comp in enumerate(model.components_):
        view = component_tree(model, k)
        n_edges = int(np.sum(comp.parent_ >= 0))
        capped = tree_edges is not None and n_edges > tree_edges
        figure = plot_tree(view, max_edges=tree_edges if capped else None, highlight=shared)
        svg = figure_svg(figure, salt=f"treewise-component-{k}")
        figures.append(f"<figure><h3>Component {k} (weight {comp.weight:.3f})</h3>{svg}</figure>")
    cap = (
        f" Each picture draws at most the {tree_edges} strongest edges."
        if tree_edges is not None
        else ""
    )
    return f"""
<section id="trees">
<h2>The trees</h2>
<p class="note">Each component's tree, drawn as the model report draws a tree: a box is a column
with its number of codes, the root has a dark outline, and a line is wider and darker the more
weighted mutual information it carries. A dashed red line marks an edge that every component
shares.{cap}</p>
<div class="heatmaps">{"".join(figures)}</div>
</section>"""


def _differing(model: TreeMixture) -> str:
    head = [
        ("parent", False),
        ("child", False),
        ("mutual information in the component (nats)", True),
        ("in the single tree's counts (nats)", True),
    ]
    parts = []
    for k in range(len(model.components_)):
        rows = [e for e in component_edges(model, k) if not e["in_single"]][:DIFFERING]
        if not rows:
            parts.append(
                f'<h3>Component {k}</h3><p class="note">Every edge is in the single tree.</p>'
            )
            continue
        strongest = rows[0]["mutual_info"] or 1.0
        body = [
            [
                label_cell(e["parent"]),
                label_cell(e["child"]),
                f"{e['mutual_info']:.4f}{meter(e['mutual_info'] / strongest)}",
                "—" if e["single_mutual_info"] is None else f"{e['single_mutual_info']:.4f}",
            ]
            for e in rows
        ]
        parts.append(f"<h3>Component {k}</h3>{data_table(head, body)}")
    return f"""
<section id="differing">
<h2>Edges the single tree does not have</h2>
<p class="note">Per component, its {DIFFERING} strongest edges that the single tree lacks: the
dependencies the mixture finds by letting each kind of row have its own tree. The last column
is the same pair's mutual information over all rows together (— when a loaded tree did not keep
it); a dependency strong within one component can be weak on average.</p>
{"".join(parts)}
</section>"""


def _rows(
    model: TreeMixture, assignment: Assignment, data: Any, keys: list[str], typical: int
) -> str:
    names = [str(n) for n in model.feature_names_in_]
    total = len(assignment.scores)
    source = open_source(data)
    columns = keys + [n for n in names if n not in keys]
    parts = []
    for k in range(len(model.components_)):
        n = int(assignment.counts[k])
        heading = f"<h3>Component {k}: {n:,} rows ({n / total:.1%})</h3>"
        positions = assignment.typical[k]
        if not len(positions):
            parts.append(heading + '<p class="note">No row has it as its most responsible.</p>')
            continue
        rows = rows_at(source, columns, positions).to_pylist()
        head = [("row", True), ("P(k | row)", True), ("ln p", True)] + [
            (esc(c), False) for c in columns
        ]
        body = [
            [
                f"{int(r):,}",
                f"{assignment.responsibilities[r, k]:.3f}",
                f"{assignment.scores[r]:.2f}",
                *(label_cell(value_label(row[c]), 24) for c in columns),
            ]
            for r, row in zip(positions, rows, strict=True)
        ]
        parts.append(heading + data_table(head, body))
    return f"""
<section id="rows">
<h2>Which rows each component explains</h2>
<p class="note">The rows of the data whose most responsible component is each one, and up to
{typical} of its most typical rows: the highest responsibility P(k | row), then the highest
ln p(row) under the mixture. They are real rows of the data.</p>
{"".join(parts)}
</section>"""


def _means(model: TreeMixture, data: Any) -> tuple[float, float]:
    """Mean ln p per row of ``data`` under the mixture and under its single tree."""
    data = replayable(data)  # read twice: a one-shot stream is kept for the second read
    mixture = float(model.score_samples(data).mean())
    with warnings.catch_warnings():
        # score_samples has already warned about values never seen in fitting.
        warnings.simplefilter("ignore", UnseenCategoryWarning)
        tree = float(model.single_tree_.score_samples(data).mean())
    return mixture, tree


def _likelihood(
    model: TreeMixture,
    assignment: Assignment | None,
    training: tuple[float, float] | None,
    choice: Mapping[int, float] | None,
    choice_rule: str,
) -> str:
    parts = []
    sides = []
    if assignment is not None:
        data = (float(assignment.scores.mean()), float(assignment.tree_scores.mean()))
        sides.append(("the data given", data))
    if training is not None:
        sides.append(("the training rows", training))
    if sides:
        head = [("model", False)] + [
            (f"mean ln p per row of {esc(n)} (nats)", True) for n, _ in sides
        ]
        body = [
            ["the mixture", *(f"{m:.4f}" for _, (m, _) in sides)],
            ["the single tree", *(f"{t:.4f}" for _, (_, t) in sides)],
            ["gain of the mixture", *(f"{m - t:+.4f}" for _, (m, t) in sides)],
        ]
        parts.append(data_table(head, body))
        parts.append(
            '<p class="note">The data given to this report is held-out data only if the mixture '
            "was not fitted on it. Both models score every value, the rare ones behind "
            '"other" included. A held-out gain near 0 says one tree explains new rows as well '
            "as the mixture does; a held-out gain well below the training gain says the extra "
            "trees fit noise.</p>"
        )
    if choice:
        kept = len(model.components_)
        body = [
            [str(k), f"{v:.4f}", "this model" if k == kept else ""]
            for k, v in sorted(choice.items())
        ]
        parts.append("<h3>Choosing the number of components</h3>")
        parts.append(data_table([("K", True), ("figure", True), ("", False)], body))
        parts.append(f'<p class="note">{esc(choice_rule)}</p>')
    if not parts:
        return ""
    return f"""
<section id="likelihood">
<h2>The mixture against the single tree</h2>
{"".join(parts)}
</section>"""


def render_mixture_report(
    model: TreeMixture,
    data: Any = None,
    *,
    typical: int = 5,
    keys: Sequence[str] = (),
    tree_edges: int | None = 80,
    training: Any = None,
    choice: Mapping[int, float] | None = None,
    choice_rule: str = "Held-out mean ln p per row for each number of components K; the "
    "smallest K within one standard error of the highest is chosen (choose_n_components).",
    title: str | None = None,
) -> str:
    """The mixture report as one HTML string; see :func:`write_mixture_report`."""
    model._fitted()
    typical = check_int("typical", typical, 0, 10_000)
    if tree_edges is not None:
        tree_edges = check_int("tree_edges", tree_edges, 1, 1_000_000)
    if isinstance(keys, str):
        raise TypeError(f"keys= must be a list of column names, got {keys!r}")
    keys = list(keys)
    assignment = None
    if data is not None:
        data = replayable(data)
        source = open_source(data)
        keys = check_columns(source.names, keys, source.description) if keys else []
        assignment = assign(model, data, typical)
    sections = [
        ("summary", "Summary"),
        ("components", "Components"),
        ("trees", "The trees"),
        ("differing", "Edges not in the single tree"),
    ]
    body = [
        _summary(model, assignment),
        _components(model, assignment),
        _trees(model, tree_edges),
        _differing(model),
    ]
    if assignment is not None:
        sections.append(("rows", "Rows per component"))
        body.append(_rows(model, assignment, data, keys, typical))
    trained = None if training is None else _means(model, training)
    likelihood = _likelihood(model, assignment, trained, choice, choice_rule)
    if likelihood:
        sections.append(("likelihood", "Against the single tree"))
        body.append(likelihood)
    sections.append(("cautions", "Cautions"))
    body.append(MIXTURE_CAUTIONS)
    k = len(model.components_)
    intro = (
        f"A mixture of {k} Chow-Liu trees over {int(model.n_features_in_):,} columns, fitted on "
        f"{int(model.n_rows_):,} rows."
    )
    footer = "Every figure here comes from the model's counts" + (
        "" if assignment is None else " and the scored data"
    )
    return page_html(title or "Mixture of trees report", intro, sections, body, footer)


def write_mixture_report(
    model: TreeMixture,
    path: str | os.PathLike[str],
    data: Any = None,
    **options: Any,
) -> Path:
    """Write a self-contained HTML report about a mixture of trees (and ``data``) to ``path``.

    The page shows the components and their weights, their trees side by side with the edges
    they all share marked, and per component its strongest edges the single tree lacks. With
    ``data`` it adds how many rows each component explains best, the most typical rows of
    each, and the mean log-likelihood per row of the mixture against the single tree. It ends
    with the cautions of the model report. Inline CSS and SVG only: no scripts, nothing fetched.

    Parameters
    ----------
    model : TreeMixture
        A fitted mixture; a loaded one works too.
    path : str or path
        Where to write; written to a temporary name and renamed into place.
    data : table, path or stream, optional
        Rows to assign and score (held-out rows show the held-out gain), in any form ``fit``
        takes. A one-shot stream is read into memory first.
    **options
        Passed to :func:`render_mixture_report`:

    typical : int, default 5
        The most typical rows to show per component (0: none).
    keys : list of str, optional
        Columns of ``data`` to show beside each row.
    tree_edges : int or None, default 80
        Draw at most this many edges (the strongest) per component; None: all.
    training : table, path or stream, optional
        The rows the mixture was fitted on, to show both models' mean ln p on them too.
    choice : mapping of int to float, optional
        The figure per candidate number of components, as ``choose_n_components`` returns it.
    choice_rule : str
        One sentence saying how ``choice`` was made.
    title : str, optional
        The page's title.

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    page = render_mixture_report(model, data, **options)
    write_atomically(path, page.encode("utf-8"))
    return Path(path)
