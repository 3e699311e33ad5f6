"""The comparison report: one self-contained HTML page about what changed between two tables.

Like the model report, the page holds its own CSS and inline SVG, has no scripts, refers to
nothing outside itself, and escapes every string that comes from the data or the models.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa

from treewise.categories import category_label
from treewise.checks import check_int
from treewise.files import write_atomically
from treewise.views.html import data_table, esc, label_cell, meter, p_value
from treewise.views.plot import conditional_svg, figure_svg, plot_tree
from treewise.views.report import page_html
from treewise.views.terminal import explain_rows

if TYPE_CHECKING:
    from treewise.compare import Comparison
    from treewise.estimator import DependencyTree

__all__ = ["render_changes_report", "write_changes_report"]

#: The most categories a column's pair of bars shows; the rest are summed in one line.
SHARE_BARS = 12

CAUTIONS = """
<section id="cautions">
<h2>Cautions</h2>
<div class="cautions">
<div><h3>A score is evidence, not a verdict</h3>
<p>A changed column, a changed dependency or a row unlike the reference is worth a second
look. It does not say what caused the change (a release, a partner, a season, a bot, a fault
in the data) and it says nothing about intent. No decision about a person (to block, flag,
refuse or charge them) should rest on a score alone. Let a person review the case, and let the
person concerned be heard.</p></div>
<div><h3>Real rows and personal data</h3>
<p>The models keep exact counts of both tables, including combinations seen once, and this page
quotes real rows (those most unlike the reference) when data was given. Treat the models and
this report as personal data whenever the compared data was, and leave out columns that
identify people.</p></div>
<div><h3>Law and policy come first</h3>
<p>The privacy law where you work and your organisation's policy on purpose, consent, retention
and sharing take precedence over anything this report suggests. Check them before you score
people or share this page.</p></div>
<div><h3>Reading the statistics</h3>
<p>Every test is a G-test on the exact counts, with levels whose expected count is below 5
pooled, and Holm's correction over all column and edge tests together. With many rows, tiny
changes are significant: a small adjusted p-value says a change is not chance, not that it
matters; read the total variation (TV) for size. An edge's test asks whether P(child | parent)
changed; a tree keeps one parent per column, so a change along a dependency the tree does not
hold shows up on the columns and edges nearest to it.</p></div>
</div>
</section>
"""


def _summary(comparison: Comparison, n_rows: int | None) -> str:
    columns = comparison.columns.to_pylist()
    edges = comparison.edges.to_pylist()
    facts = [
        ("reference rows", f"{comparison.n_reference:,}"),
        ("current rows", f"{comparison.n_current:,}"),
        ("columns compared", f"{len(columns):,}"),
        ("columns changed", f"{sum(c['changed'] for c in columns):,}"),
        ("tree edges tested", f"{sum(e['p_value'] is not None for e in edges):,}"),
        ("edges changed", f"{sum(e['changed'] for e in edges):,}"),
        ("family-wise level", f"{comparison.level:g} (Holm)"),
    ]
    if n_rows is not None:
        facts.append(("rows shown", f"{n_rows:,}"))
    items = "".join(f"<div><dt>{esc(k)}</dt><dd>{esc(v)}</dd></div>" for k, v in facts)
    first = columns[0] if columns else None
    lead = ""
    if first is not None and first["changed"]:
        lead = (
            f"<p>The column that changed most is <strong>{label_cell(first['column'])}"
            f"</strong> (total variation {first['tv_distance']:.4f})"
        )
        if comparison.can_drill_down:
            where = comparison.drill_down(first["column"]).to_pylist()
            if where:
                lead += f"; it changed most where {esc(where[0]['moved'])}"
        lead += ".</p>"
    elif first is not None:
        lead = "<p>No column or edge changed at the family-wise level.</p>"
    return f"""
<section id="summary">
<h2>Summary</h2>
<dl class="facts">{items}</dl>
{lead}
</section>"""


def _trees(comparison: Comparison) -> str:
    changed = [(e["parent"], e["child"]) for e in comparison.edges.to_pylist() if e["changed"]]
    figures = []
    for side, model in (("reference", comparison.reference), ("current", comparison.current)):
        figure = plot_tree(model, highlight=changed)
        figures.append(
            f"<figure><h3>The {side} tree</h3>{figure_svg(figure, salt=f'treewise-{side}')}"
            "</figure>"
        )
    return f"""
<section id="trees">
<h2>The two trees</h2>
<p class="note">Each side's own tree, both hanging from one root. A dashed red line is an edge
whose P(child | parent) changed (Holm-adjusted p below {comparison.level:g}).</p>
<div class="heatmaps">{"".join(figures)}</div>
</section>"""


def _shares(model: DependencyTree, i: int) -> np.ndarray[Any, np.dtype[np.float64]]:
    counts = model.marginal_counts(i).astype(np.float64)
    total: float = float(counts.sum()) or 1.0
    return counts / total


def _columns(comparison: Comparison, cards: int) -> str:
    rows = comparison.columns.to_pylist()
    names = [str(n) for n in comparison.reference.feature_names_in_]
    head = [
        ("column", False),
        ("TV distance", True),
        ("G", True),
        ("dof", True),
        ("p-value", True),
        ("adjusted p", True),
        ("moved most", False),
    ]
    largest = max((r["tv_distance"] for r in rows), default=0.0) or 1.0
    body = [
        [
            f"<strong>{label_cell(r['column'])}</strong>"
            if r["changed"]
            else label_cell(r["column"]),
            f"{r['tv_distance']:.4f}{meter(r['tv_distance'] / largest)}",
            f"{r['g_statistic']:,.1f}",
            f"{r['dof']:,}",
            p_value(r["p_value"]),
            p_value(r["p_adjusted"]),
            esc("; ".join(r["moved"][:2])),
        ]
        for r in rows
    ]
    shown = []
    for r in [r for r in rows if r["changed"]][:cards]:
        i = names.index(r["column"])
        ref, cur = _shares(comparison.reference, i), _shares(comparison.current, i)
        labels = [category_label(c) for c in comparison.reference.categories_[i]]
        keep = np.argsort(-np.abs(cur - ref), kind="stable")[:SHARE_BARS]
        bars = "".join(
            f'<tr><td class="lab">{label_cell(labels[k], 18)}</td>'
            f'<td class="bar"><span style="width:{ref[k] * 100:.2f}%"></span>'
            f'<span class="cur" style="width:{cur[k] * 100:.2f}%"></span></td>'
            f'<td class="pct">{ref[k]:.1%} → {cur[k]:.1%}</td></tr>'
            for k in sorted(int(k) for k in keep)
        )
        shown.append(
            f'<div class="card"><h3>{label_cell(r["column"])}</h3>'
            f'<p class="meta">TV {r["tv_distance"]:.4f} · reference (upper bar) → current '
            f'(lower bar)</p><table class="bars pairs">{bars}</table></div>'
        )
    cards_html = f'<div class="cards">{"".join(shown)}</div>' if shown else ""
    return f"""
<section id="columns">
<h2>Shifted columns</h2>
<p class="note">Each column's shares on the two sides: the total variation distance (half the
sum of the absolute differences of the shares) and the G-test of homogeneity, changed columns
in bold, largest change first. The cards show both sides' shares of the changed columns.</p>
{data_table(head, body)}
{cards_html}
</section>"""


def _edges(comparison: Comparison, heatmaps: int) -> str:
    rows = comparison.edges.to_pylist()
    head = [
        ("parent", False),
        ("child", False),
        ("tree", False),
        ("MI reference", True),
        ("MI current", True),
        ("TV given parent", True),
        ("G", True),
        ("dof", True),
        ("adjusted p", True),
        ("moved most", False),
    ]
    body = []
    for r in rows:
        untested = r["p_value"] is None
        name = label_cell(r["parent"])
        body.append(
            [
                f"<strong>{name}</strong>" if r["changed"] else name,
                label_cell(r["child"]),
                esc(r["tree"]),
                f"{r['mi_reference']:.4f}",
                f"{r['mi_current']:.4f}",
                "—" if untested else f"{r['tv_conditional']:.4f}",
                "—" if untested else f"{r['g_statistic']:,.1f}",
                "—" if untested else f"{r['dof']:,}",
                "—" if untested else p_value(r["p_adjusted"]),
                esc("; ".join(r["moved"][:1])),
            ]
        )
    names = [str(n) for n in comparison.reference.feature_names_in_]
    figures = []
    for r in [r for r in rows if r["changed"]][:heatmaps]:
        p, c = names.index(r["parent"]), names.index(r["child"])
        pair = []
        for side, model in (("reference", comparison.reference), ("current", comparison.current)):
            title = f"P({names[c]} | {names[p]}), {side}"
            pair.append(
                f"<div><h4>{side}</h4>"
                + conditional_svg(
                    model.joint_counts(p, c),
                    [category_label(v) for v in model.categories_[p]],
                    [category_label(v) for v in model.categories_[c]],
                    title,
                )
                + "</div>"
            )
        figures.append(
            f"<figure><h3>{label_cell(names[c], 30)} given {label_cell(names[p], 30)}</h3>"
            f'<div class="pair">{"".join(pair)}</div>'
            f"<figcaption>TV given parent {r['tv_conditional']:.4f}</figcaption></figure>"
        )
    tables = f'<div class="heatmaps">{"".join(figures)}</div>' if figures else ""
    return f"""
<section id="edges">
<h2>Changed dependencies</h2>
<p class="note">Every edge of either tree, once. The test asks whether P(child | parent) is the
same on both sides: for each parent value, a side-by-child-value table, with G and dof summed
over the parent values (the G-test of conditional independence of side and child given the
parent). TV given parent weighs each parent value's change by its share of rows. Below, both
sides' conditional tables of the changed edges, from the exact counts.</p>
{data_table(head, body)}
{tables}
</section>"""


def _drill_down(comparison: Comparison, n_columns: int) -> str:
    if not comparison.can_drill_down:
        return ""
    changed = [r["column"] for r in comparison.columns.to_pylist() if r["changed"]][:n_columns]
    if not changed:
        return ""
    parts = []
    for column in changed:
        rows = comparison.drill_down(column).slice(0, 5).to_pylist()
        head = [
            ("given", False),
            ("value", False),
            ("share of rows", True),
            ("TV there", True),
            ("G", True),
            ("dof", True),
            ("moved most", False),
        ]
        body = [
            [
                label_cell(r["by"]),
                label_cell(r["value"]),
                f"{r['share']:.1%}",
                f"{r['tv']:.4f}",
                f"{r['g_statistic']:,.1f}",
                f"{r['dof']:,}",
                esc(r["moved"]),
            ]
            for r in rows
        ]
        parts.append(f"<h3>{label_cell(column)}</h3>{data_table(head, body)}")
    return f"""
<section id="where">
<h2>Where the changed columns changed</h2>
<p class="note">For each changed column, its change given each other column: the columns
whose values confine the change best (largest G beyond its degrees of freedom) come first,
with the value where it moved most.</p>
{"".join(parts)}
</section>"""


def _rows(comparison: Comparison, rows: pa.Table, keys: Sequence[str]) -> str:
    names = [str(n) for n in comparison.reference.feature_names_in_]
    head = [("row", True), *[(esc(k), False) for k in keys], ("ln p_cur − ln p_ref", True)]
    head.append(("why (column = value: nats)", False))
    values = {n: rows[n].to_pylist() for n in [*keys, *names]}
    body = []
    for r, reasons in enumerate(explain_rows(rows, names, prefix="ratio_")):
        why = "<br>".join(
            f"{label_cell(n)} = {label_cell(str(values[n][r]), 30)}: {v:+.2f}" for n, v in reasons
        )
        body.append(
            [
                f"{rows['row'][r].as_py():,}",
                *[label_cell(str(values[k][r])) for k in keys],
                f"{rows['score'][r].as_py():+.2f}",
                why,
            ]
        )
    return f"""
<section id="rows">
<h2>Rows most unlike the reference</h2>
<p class="note">The current rows with the largest log-likelihood ratio ln p_current(row) −
ln p_reference(row): far more likely under the current table's tree than under the
reference's. Each shows the three columns that add most to it, with their values.</p>
{data_table(head, body)}
</section>"""


def render_changes_report(
    comparison: Comparison,
    *,
    rows: pa.Table | None = None,
    keys: Sequence[str] = (),
    heatmaps: int = 4,
    title: str | None = None,
) -> str:
    """The comparison report as one HTML string; see :func:`write_changes_report`."""
    heatmaps = check_int("heatmaps", heatmaps, 0, 10_000)
    if isinstance(keys, str):
        raise TypeError(f"keys= must be a list of column names, got {keys!r}")
    heading = title or "What changed between two tables"
    sections = [
        ("summary", "Summary"),
        ("trees", "The two trees"),
        ("columns", "Shifted columns"),
        ("edges", "Changed dependencies"),
    ]
    body = [
        _summary(comparison, None if rows is None else rows.num_rows),
        _trees(comparison),
        _columns(comparison, cards=8),
        _edges(comparison, heatmaps),
    ]
    where = _drill_down(comparison, 3)
    if where:
        sections.append(("where", "Where"))
        body.append(where)
    if rows is not None and rows.num_rows:
        sections.append(("rows", "Rows"))
        body.append(_rows(comparison, rows, list(keys)))
    sections.append(("cautions", "Cautions"))
    body.append(CAUTIONS)
    intro = (
        f"{comparison.n_current:,} current rows against {comparison.n_reference:,} reference "
        f"rows, over {comparison.reference.n_features_in_:,} columns on one codebook."
    )
    footer = "Every figure here comes from the two models' exact counts" + (
        "" if rows is None else " and the scored current rows"
    )
    return page_html(heading, intro, sections, body, footer)


def write_changes_report(
    comparison: Comparison,
    path: str | os.PathLike[str],
    *,
    rows: pa.Table | None = None,
    keys: Sequence[str] = (),
    heatmaps: int = 4,
    title: str | None = None,
) -> Path:
    """Write a self-contained HTML page about ``comparison`` to ``path``.

    The page shows a summary, the two trees side by side with the changed edges marked, the
    shifted columns with both sides' shares, the changed edges with both conditional tables,
    where each changed column changed (when both sides' pair counts are known), the rows most
    unlike the reference with why (``rows``, from ``Comparison.top_rows``; ``keys`` are its
    columns to show beside each row), and the cautions. Inline CSS and SVG only.

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    page = render_changes_report(comparison, rows=rows, keys=keys, heatmaps=heatmaps, title=title)
    write_atomically(path, page.encode("utf-8"))
    return Path(path)
