"""The HTML report: one self-contained page about a fitted tree and, optionally, data scored by it.

The page holds its own CSS and inline SVG; it has no scripts and refers to nothing outside
itself, so it opens offline in any browser and can be mailed or archived as one file. Every
string that comes from the data or the model (column names, values, titles) is escaped.
"""

from __future__ import annotations

import datetime
import os
from collections.abc import Sequence
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa

from treewise.checks import RandomState, check_int
from treewise.files import write_atomically
from treewise.views.findings import (
    find,
    histogram_section,
    surprising_section,
    synthetic_section,
)
from treewise.views.html import (
    category_label,
    cut,
    data_table,
    esc,
    label_cell,
    meter,
    p_value,
)
from treewise.views.plot import conditional_svg, figure_svg, plot_tree

if TYPE_CHECKING:
    from treewise.estimator import DependencyTree

__all__ = ["CAUTIONS", "category_label", "cautions", "page_html", "render_report", "write_report"]

#: The most categories a column's bars show; the rest are summed in one line.
MARGINAL_BARS = 12


def cautions(
    knows: str = "the model only knows the dependencies of one tree",
    quoted: str = "the most surprising ones",
) -> str:
    """The cautions section every model report ends with.

    ``knows`` completes "rare but ordinary behaviour scores low too, and ..."; ``quoted`` says
    which real rows the page quotes.
    """
    return f"""
<section id="cautions">
<h2>Cautions</h2>
<div class="cautions">
<div><h3>A score is evidence, not a verdict</h3>
<p>A low score says a row is unusual under this model, and so worth a second look. It does not
say the row is wrong, and it says nothing about intent: rare but ordinary behaviour scores low
too, and {knows}. No decision about a person (to block,
flag, refuse or charge them) should rest on a score alone. Let a person review the case, and let
the person concerned be heard.</p></div>
<div><h3>Synthetic rows can reveal real ones</h3>
<p>Rows sampled from a model fitted on personal data are not automatically anonymous. The model
keeps exact counts, including combinations seen once, and sampling can reproduce such a rare
combination and so point back to the real record behind it. It also keeps the rare values behind
each "other" code and the values seen inside each numeric bin, and sampling gives them back: leave
out columns that identify people. Treat the model, its synthetic rows
and this report as personal data whenever the fitted data was. This report also quotes real rows
({quoted}) when data was given.</p></div>
<div><h3>Law and policy come first</h3>
<p>The privacy law where you work and your organisation's policy on purpose, consent, retention
and sharing take precedence over anything this report suggests. Check them before you score
people or share synthetic data.</p></div>
<div><h3>Reading the statistics</h3>
<p>With many rows, nearly every edge is significant: a tiny p-value says a dependence is not
chance, not that it is strong; compare mutual information for strength. A tree keeps only one
parent per column, so a missing edge does not mean independence, and the direction of an edge
is just the walk away from the root, not cause and effect.</p></div>
</div>
</section>
"""


CAUTIONS = cautions()

#: The page's style sheet (a file of this package).
STYLE = resources.files("treewise.views").joinpath("report.css").read_text(encoding="utf-8")


# -- the parts about the model ------------------------------------------------------------------


def _privacy(model: DependencyTree) -> str:
    """The guarantee of a private model, next to its cautions."""
    from treewise.private import guarantee_lines

    assert model.privacy_ is not None
    lines = "".join(f"<p>{esc(line)}</p>" for line in guarantee_lines(model.privacy_))
    return f"""
<section id="privacy">
<h2>Privacy</h2>
{lines}
<p class="note">The guarantee covers the model: every table, count and edge on this page
about the model is a released noisy figure. Sections about data given to this report (scores,
surprising rows, the synthetic comparison) use that data directly and are not covered.</p>
</section>"""


def _edge_rows(model: DependencyTree) -> list[dict[str, Any]]:
    """The edges of ``edges()``, strongest first (ties by child column order)."""
    rows: list[dict[str, Any]] = model.edges().to_pylist()
    position = {str(n): i for i, n in enumerate(model.feature_names_in_)}
    return sorted(rows, key=lambda e: (-e["mutual_info"], position[e["child"]]))


def _pruning(model: DependencyTree, n_edges: int) -> str:
    n_roots = model.n_features_in_ - n_edges
    if model.prune is not None:
        setting = "BIC" if model.prune == "bic" else f"G-test at {model.prune:g}"
        return f"{setting}: {n_roots} tree{'s' if n_roots != 1 else ''}"
    if n_roots > 1:
        return f"{n_roots} trees (setting not stored with the model)"
    return "none (one tree)"


def _summary(model: DependencyTree, n_edges: int, data_rows: int | None) -> str:
    names = [str(n) for n in model.feature_names_in_]
    roots = [names[i] for i, p in enumerate(model.parent_) if p < 0]
    facts = [
        ("rows fitted", f"{int(model.n_rows_):,}"),
        ("columns", f"{model.n_features_in_:,}"),
        ("edges", f"{n_edges:,}"),
        ("free parameters", f"{int(model.n_parameters_):,}"),
        ("smoothing alpha", f"{float(model.alpha):g}"),
        ("pruning", _pruning(model, n_edges)),
        ("root" if len(roots) == 1 else "roots", ", ".join(cut(r, 30) for r in roots[:6])),
        ("mutual information kept", f"{float(np.sum(model.mutual_info_)):.3f} nats"),
    ]
    if data_rows is not None:
        facts.append(("rows of data scored", f"{data_rows:,}"))
    items = "".join(f"<div><dt>{esc(k)}</dt><dd>{esc(v)}</dd></div>" for k, v in facts)
    return f"""
<section id="summary">
<h2>Summary</h2>
<dl class="facts">{items}</dl>
<p class="note">The mutual information kept is the sum over the edges: how many nats per row the
tree saves over treating every column as independent.</p>
</section>"""


def _tree(model: DependencyTree, n_edges: int, tree_edges: int | None) -> str:
    capped = tree_edges is not None and n_edges > tree_edges
    figure = plot_tree(model, max_edges=tree_edges if capped else None)
    svg = figure_svg(figure, salt="treewise-tree")
    note = (
        "Each box is a column with its number of categories (its codes, counting the "
        '"other" and null codes); the root has a dark outline. Each line joins a column to its '
        "parent, wider and darker the more mutual information they share."
    )
    if capped:
        note += (
            f" Only the {tree_edges} strongest of the {n_edges} edges are drawn; a dashed box is "
            "a column whose parent is not drawn. The edge table below lists them all, and "
            "<code>treewise.views.plot.plot_tree(model, subtree=...)</code> draws any branch."
        )
    if model.n_features_in_ - n_edges > 1:
        note += " Pruning left a forest: every tree hangs from its own root."
    return f"""
<section id="tree">
<h2>The tree</h2>
<figure>{svg}<figcaption>{note}</figcaption></figure>
</section>"""


def _edges(model: DependencyTree, rows: list[dict[str, Any]], stability: pa.Table | None) -> str:
    if not rows:
        return """
<section id="edges"><h2>Edges</h2><p class="note">The model has no edges: pruning kept no
dependency, so every column stands alone.</p></section>"""
    frequency = _stability(stability)
    strongest = max(float(e["mutual_info"]) for e in rows) or 1.0
    head = [
        ("#", True),
        ("parent", False),
        ("child", False),
        ("mutual information (nats)", True),
        ("G", True),
        ("dof", True),
        ("p-value", True),
    ]
    if frequency is not None:
        head.append(("stability", True))
    body = []
    for k, e in enumerate(rows, start=1):
        mi = float(e["mutual_info"])
        row = [
            str(k),
            label_cell(e["parent"]),
            label_cell(e["child"]),
            f"{mi:.4f}{meter(mi / strongest)}",
            f"{float(e['g_statistic']):,.1f}",
            f"{int(e['dof']):,}",
            p_value(float(e["p_value"])),
        ]
        if frequency is not None:
            share = frequency.get(frozenset((e["parent"], e["child"])))
            row.append("—" if share is None else f"{share:.0%}")
        body.append(row)
    note = (
        "Strongest first. G = 2·N·MI is the G-test statistic of independence, with dof degrees "
        "of freedom; the p-value is its chi-square tail."
    )
    if frequency is not None:
        note += " Stability is the share of refits on resampled rows whose tree has the edge."
    return f"""
<section id="edges">
<h2>Edges</h2>
<p class="note">{note}</p>
{data_table(head, body)}
</section>"""


def _stability(stability: pa.Table | None) -> dict[frozenset[str], float] | None:
    """Edge -> frequency from a ``treewise.stability.edge_stability`` table."""
    if stability is None:
        return None
    wanted = {"column_a", "column_b", "frequency"}
    if not isinstance(stability, pa.Table) or not wanted <= set(stability.column_names):
        raise TypeError(
            "stability= takes the table of treewise.stability.edge_stability (columns "
            f"column_a, column_b, frequency), got {stability!r}"
        )
    return {
        frozenset((str(a), str(b))): float(f or 0.0)
        for a, b, f in zip(
            stability["column_a"].to_pylist(),
            stability["column_b"].to_pylist(),
            stability["frequency"].to_pylist(),
            strict=True,
        )
    }


def _marginals(model: DependencyTree) -> str:
    names = [str(n) for n in model.feature_names_in_]
    cards = []
    for i, name in enumerate(names):
        counts = model.marginal_counts(i).astype(np.float64)
        total = float(counts.sum()) or 1.0
        labels = [category_label(c) for c in model.categories_[i]]
        shown = list(range(len(labels)))
        if len(shown) > MARGINAL_BARS + 1:
            keep = np.argsort(-counts, kind="stable")[:MARGINAL_BARS]
            shown = sorted(int(k) for k in keep)
        bars = "".join(
            f'<tr><td class="lab">{label_cell(labels[k], 18)}</td>'
            f'<td class="bar"><span style="width:{counts[k] / total * 100:.2f}%"></span></td>'
            f'<td class="pct">{counts[k] / total:.1%}</td></tr>'
            for k in shown
        )
        rest = len(labels) - len(shown)
        if rest:
            share = 1.0 - float(sum(counts[k] for k in shown)) / total
            bars += (
                f'<tr><td class="lab" colspan="2">{rest} more categories</td>'
                f'<td class="pct">{share:.1%}</td></tr>'
            )
        parent = int(model.parent_[i])
        link = "root" if parent < 0 else f"parent: {label_cell(names[parent], 30)}"
        cards.append(
            f'<div class="card"><h3>{label_cell(name)}</h3>'
            f'<p class="meta">{len(labels)} categories · {link}</p>'
            f'<table class="bars">{bars}</table></div>'
        )
    return f"""
<section id="marginals">
<h2>Columns</h2>
<p class="note">Each column's share of rows per category, from the exact counts of the fit, in
the column's own order; a column with many categories shows its {MARGINAL_BARS} most common.</p>
<div class="cards">{"".join(cards)}</div>
</section>"""


def _conditionals(model: DependencyTree, rows: list[dict[str, Any]], heatmaps: int) -> str:
    if heatmaps == 0 or not rows:
        return ""
    names = [str(n) for n in model.feature_names_in_]
    figures = []
    for e in rows[:heatmaps]:
        p, c = names.index(e["parent"]), names.index(e["child"])
        title = f"P({names[c]} | {names[p]})"
        svg = conditional_svg(
            model.joint_counts(p, c),
            [category_label(v) for v in model.categories_[p]],
            [category_label(v) for v in model.categories_[c]],
            title,
        )
        figures.append(
            f"<figure><h3>{label_cell(names[c], 30)} given {label_cell(names[p], 30)}</h3>"
            f"{svg}<figcaption>mutual information {float(e['mutual_info']):.4f} nats"
            "</figcaption></figure>"
        )
    return f"""
<section id="conditional">
<h2>Conditional tables of the strongest edges</h2>
<p class="note">Each row is one value of the parent (left) and shows how the child's values
(top) share its rows, in percent; every row adds up to 100, and darker is more likely. These
are the exact counts of the fit, before smoothing; n is the rows with that parent value.
Hover over a cell for its counts.</p>
<div class="heatmaps">{"".join(figures)}</div>
</section>"""


# -- the page -----------------------------------------------------------------------------------


def render_report(
    model: DependencyTree,
    data: Any = None,
    *,
    synthetic_rows: int = 100_000,
    top: int = 20,
    heatmaps: int = 6,
    keys: Sequence[str] = (),
    stability: pa.Table | None = None,
    tree_edges: int | None = 80,
    title: str | None = None,
    random_state: RandomState = 0,
) -> str:
    """The report as one HTML string; see :func:`write_report` for the parameters."""
    model._fitted()
    synthetic_rows = check_int("synthetic_rows", synthetic_rows, 0, 100_000_000)
    top = check_int("top", top, 0, 100_000)
    heatmaps = check_int("heatmaps", heatmaps, 0, 10_000)
    if tree_edges is not None:
        tree_edges = check_int("tree_edges", tree_edges, 1, 1_000_000)
    if isinstance(keys, str):
        raise TypeError(f"keys= must be a list of column names, got {keys!r}")
    keys = list(keys)
    edges = _edge_rows(model)
    found = None if data is None else find(model, data, keys, top, synthetic_rows, random_state)
    heading = title or "Dependency tree report"
    private = model.privacy_ is not None
    sections = [
        ("summary", "Summary"),
        *([("privacy", "Privacy")] if private else []),
        ("tree", "The tree"),
        ("edges", "Edges"),
        ("conditional", "Conditional tables"),
        ("marginals", "Columns"),
    ]
    if heatmaps == 0 or not edges:
        sections.remove(("conditional", "Conditional tables"))
    body = [
        _summary(model, len(edges), None if found is None else len(found.scores)),
        *([_privacy(model)] if private else []),
        _tree(model, len(edges), tree_edges),
        _edges(model, edges, stability),
        _conditionals(model, edges, heatmaps),
        _marginals(model),
    ]
    if found is not None:
        sections.append(("scores", "Scores"))
        body.append(histogram_section(found, top))
        if found.top_rows.num_rows:
            sections.append(("surprising", "Surprising rows"))
            body.append(surprising_section(model, found, keys))
        if found.comparison:
            sections.append(("synthetic", "Synthetic rows"))
            body.append(synthetic_section(found))
    sections.append(("cautions", "Cautions"))
    body.append(CAUTIONS)
    intro = (
        f"A Chow-Liu dependency tree over {model.n_features_in_:,} columns, fitted on "
        f"{int(model.n_rows_):,} rows."
    )
    counts = "released noisy counts" if private else "exact counts"
    footer = f"Every figure here comes from the model's {counts}" + (
        "" if found is None else ", the scored data and rows sampled from the model"
    )
    return page_html(heading, intro, sections, body, footer)


def page_html(
    heading: str, intro: str, sections: Sequence[tuple[str, str]], body: Sequence[str], footer: str
) -> str:
    """The page shell every report shares: style sheet, heading, navigation, sections, footer.

    ``intro`` (the line under the heading, to which the version and date are added) and
    ``footer`` are escaped HTML; ``sections`` are (anchor, name) pairs for the navigation.
    """
    nav = "".join(f'<a href="#{anchor}">{esc(name)}</a>' for anchor, name in sections)
    from treewise import __version__

    when = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="treewise {esc(__version__)}">
<title>{esc(heading)}</title>
<style>
{STYLE}</style>
</head>
<body>
<main>
<header>
<h1>{esc(heading)}</h1>
<p>{intro} Written by treewise {esc(__version__)} on {when}.</p>
</header>
<nav>{nav}</nav>
{"".join(body)}
<footer>{footer}. The page needs no network and runs no scripts.</footer>
</main>
</body>
</html>
"""


def write_report(
    model: DependencyTree,
    path: str | os.PathLike[str],
    data: Any = None,
    **options: Any,
) -> Path:
    """Write a self-contained HTML report about ``model`` (and ``data``) to ``path``.

    The page shows a summary, the tree, the edge table, the conditional tables of the
    strongest edges and every column's distribution. With ``data`` it adds a histogram of the
    rows' scores, the most surprising rows with the columns that made them so, and a comparison
    of synthetic rows with the data, edge by edge. It ends with cautions on using scores and
    synthetic rows. The file has inline CSS and SVG only: no scripts, nothing fetched.

    Parameters
    ----------
    model : DependencyTree
        A fitted model; a loaded one works too (the report needs only its edges' counts).
    path : str or path
        Where to write; the file is written to a temporary name and renamed into place.
    data : table, path or stream, optional
        Rows to score, in any form ``fit`` takes. Files are read a few times, batch by batch;
        a one-shot stream is read into memory first.
    **options
        Passed to :func:`render_report`:

    synthetic_rows : int, default 100,000
        Rows to sample for the comparison with ``data`` (0: no comparison).
    top : int, default 20
        How many of the most surprising rows to show (0: none).
    heatmaps : int, default 6
        Conditional tables P(child | parent) to draw, strongest edges first.
    keys : list of str, optional
        Columns of ``data`` to show beside each surprising row (ids, timestamps).
    stability : pyarrow.Table, optional
        The table of ``treewise.stability.edge_stability``; adds a stability column to the
        edge table.
    tree_edges : int or None, default 80
        Draw at most this many edges (the strongest) in the picture of the tree; None: all.
    title : str, optional
        The page's title.
    random_state : None, int, numpy Generator or RandomState, default 0
        Seed of the synthetic rows.

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    page = render_report(model, data, **options)
    write_atomically(path, page.encode("utf-8"))
    return Path(path)
