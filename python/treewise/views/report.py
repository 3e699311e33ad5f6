"""The HTML report: one self-contained page about a fitted tree and, optionally, data scored by it.

The page holds its own CSS and inline SVG; it has no scripts and refers to nothing outside
itself, so it opens offline in any browser and can be mailed or archived as one file. Every
string that comes from the data or the model (column names, values, titles) is escaped.
"""

from __future__ import annotations

import datetime
import html
import math
import os
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter

from treewise.categories import OTHER, Bin
from treewise.errors import DataError, UnseenCategoryWarning
from treewise.files import write_atomically
from treewise.views.plot import MUTED, conditional_svg, figure_svg, plot_tree, shorten
from treewise.sources import BATCH_ROWS, Source, check_columns, open_source

if TYPE_CHECKING:
    from treewise.estimator import DependencyTree, RandomState

__all__ = ["category_label", "render_report", "write_report"]

#: The most categories a column's bars show; the rest are summed in one line.
MARGINAL_BARS = 12
#: Characters of a value or a column name shown before it is cut.
LABEL_CHARS = 40
#: Leading columns listed per surprising row.
REASONS = 4

CAUTIONS = """
<section id="cautions">
<h2>Cautions</h2>
<div class="cautions">
<div><h3>A score is evidence, not a verdict</h3>
<p>A low score says a row is unusual under this model, and so worth a second look. It does not
say the row is wrong, and it says nothing about intent: rare but ordinary behaviour scores low
too, and the model only knows the dependencies of one tree. No decision about a person (to block,
flag, refuse or charge them) should rest on a score alone. Let a person review the case, and let
the person concerned be heard.</p></div>
<div><h3>Synthetic rows can reveal real ones</h3>
<p>Rows sampled from a model fitted on personal data are not automatically anonymous. The model
keeps exact counts, including combinations seen once, and sampling can reproduce such a rare
combination and so point back to the real record behind it. Treat the model, its synthetic rows
and this report as personal data whenever the fitted data was. This report also quotes real rows
(the most surprising ones) when data was given.</p></div>
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

STYLE = """
:root { --ink: #1f2a33; --muted: #5b6b78; --line: #dde3e8; --soft: #f3f6f7;
        --accent: #3f7a84; --deep: #1b3a4d; --paper: #fcfcfb; }
* { box-sizing: border-box; }
body { margin: 0; background: var(--paper); color: var(--ink);
       font: 15px/1.5 system-ui, -apple-system, "Segoe UI", "Noto Sans", "DejaVu Sans",
             sans-serif; }
main { max-width: 1180px; margin: 0 auto; padding: 28px 32px 48px; }
header h1 { font-size: 26px; margin: 0 0 4px; font-weight: 650; }
header p { margin: 0; color: var(--muted); }
nav { margin: 18px 0 8px; display: flex; flex-wrap: wrap; gap: 6px 16px; font-size: 14px; }
nav a { color: var(--accent); text-decoration: none; }
nav a:hover { text-decoration: underline; }
section { margin-top: 34px; }
h2 { font-size: 19px; font-weight: 650; border-bottom: 1px solid var(--line);
     padding-bottom: 6px; margin: 0 0 12px; }
h3 { font-size: 15px; font-weight: 620; margin: 0 0 4px; overflow-wrap: anywhere; }
p.note { color: var(--muted); font-size: 14px; margin: 6px 0 12px; max-width: 900px; }
.facts { display: grid; grid-template-columns: repeat(auto-fill, minmax(165px, 1fr));
         gap: 10px; margin: 0; }
.facts div { background: #fff; border: 1px solid var(--line); border-radius: 8px;
             padding: 10px 12px; }
.facts dt { color: var(--muted); font-size: 13px; }
.facts dd { margin: 2px 0 0; font-size: 18px; font-weight: 600; overflow-wrap: anywhere; }
figure { margin: 0; background: #fff; border: 1px solid var(--line); border-radius: 8px;
         padding: 12px; overflow-x: auto; }
figure svg { display: block; max-width: 100%; height: auto; margin: 0 auto; }
figcaption { color: var(--muted); font-size: 13px; margin-top: 6px; }
table.data { border-collapse: collapse; width: 100%; background: #fff; font-size: 14px;
             font-variant-numeric: tabular-nums; }
table.data th, table.data td { padding: 5px 9px; border-bottom: 1px solid var(--line);
             text-align: left; vertical-align: top; }
table.data th { background: var(--soft); font-weight: 600; position: sticky; top: 0; }
table.data td.n, table.data th.n { text-align: right; white-space: nowrap; }
table.data tbody tr:nth-child(even) { background: #fafbfb; }
.wrap { overflow-x: auto; border: 1px solid var(--line); border-radius: 8px; }
.meter { display: inline-block; width: 70px; height: 8px; background: var(--soft);
         border-radius: 4px; margin-left: 8px; vertical-align: middle; }
.meter span { display: block; height: 8px; background: var(--accent); border-radius: 4px; }
.cards { display: grid; grid-template-columns: repeat(auto-fill, minmax(270px, 1fr));
         gap: 12px; }
.card { background: #fff; border: 1px solid var(--line); border-radius: 8px; padding: 10px 12px; }
.card .meta { color: var(--muted); font-size: 12.5px; margin: 0 0 6px; }
table.bars { border-collapse: collapse; width: 100%; font-size: 12.5px;
             font-variant-numeric: tabular-nums; }
table.bars td { padding: 1px 4px 1px 0; white-space: nowrap; }
table.bars td.lab { max-width: 110px; overflow: hidden; text-overflow: ellipsis; }
table.bars td.bar { width: 55%; }
table.bars td.bar span { display: block; height: 10px; background: #86aeb2;
                         border-radius: 2px; min-width: 1px; }
table.bars td.pct { text-align: right; color: var(--muted); }
.heatmaps { display: grid; grid-template-columns: repeat(auto-fill, minmax(440px, 1fr));
            gap: 14px; }
.heatmaps figure svg { margin: 0; }
ul.reasons { margin: 0; padding-left: 16px; }
ul.reasons li { overflow-wrap: anywhere; }
.given { color: var(--muted); }
details summary { cursor: pointer; color: var(--accent); font-size: 13px; }
table.mini { border-collapse: collapse; font-size: 12.5px; margin-top: 4px; }
table.mini td { padding: 1px 8px 1px 0; border-bottom: 1px dotted var(--line); }
.cautions { display: grid; grid-template-columns: repeat(auto-fill, minmax(420px, 1fr));
            gap: 12px; }
.cautions div { background: #f6f4ef; border: 1px solid #e6dfd2; border-radius: 8px;
                padding: 10px 14px; }
.cautions p { margin: 4px 0 0; font-size: 14px; }
footer { margin-top: 36px; color: var(--muted); font-size: 13px; }
code { font-size: 13px; background: var(--soft); padding: 1px 4px; border-radius: 3px; }
"""


# -- small pieces ----------------------------------------------------------------------------------


def _esc(text: object) -> str:
    """Text from the model or the data, safe inside HTML text and attribute values."""
    return html.escape(str(text), quote=True)


def _cut(text: str, limit: int = LABEL_CHARS) -> str:
    return shorten(text, limit)


def category_label(value: object) -> str:
    """How a category of ``categories_`` reads in the report (not yet escaped)."""
    if value is OTHER:
        return "(other)"
    if value is None:
        return "(null)"
    if isinstance(value, Bin):
        return f"[{value.low:.4g}, {value.high:.4g}{']' if value.closed else ')'}"
    return str(value)


def _value_label(value: object) -> str:
    """A value read from the data, as text (not yet escaped)."""
    if value is None:
        return "null"
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


def _label_cell(text: str, limit: int = LABEL_CHARS) -> str:
    """Escaped text, cut to ``limit`` characters with the whole of it in a tooltip when cut."""
    if len(text) <= limit:
        return _esc(text)
    return f'<span title="{_esc(text)}">{_esc(_cut(text, limit))}</span>'


def _p_value(p: float) -> str:
    if p == 0.0:
        return "&lt; 1e-300"  # below the smallest double: the chi-square tail underflowed
    if p < 1e-4:
        return f"{p:.1e}"
    return f"{p:.4f}"


def _table(head: Sequence[tuple[str, bool]], rows: Sequence[Sequence[str]]) -> str:
    """A data table; ``head`` is (escaped title, numeric?) per column, cells are escaped HTML."""
    numeric = [is_number for _, is_number in head]
    ths = "".join(f"<th{' class=n' if n else ''}>{title}</th>" for title, n in head)
    body = "".join(
        "<tr>"
        + "".join(
            f"<td{' class=n' if n else ''}>{cell}</td>"
            for cell, n in zip(row, numeric, strict=True)
        )
        + "</tr>"
        for row in rows
    )
    return (
        f'<div class="wrap"><table class="data"><thead><tr>{ths}</tr></thead>'
        f"<tbody>{body}</tbody></table></div>"
    )


def _meter(share: float) -> str:
    width = max(0.0, min(1.0, share)) * 100
    return f'<span class="meter"><span style="width:{width:.1f}%"></span></span>'


# -- the parts about the model ------------------------------------------------------------------


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
        ("root" if len(roots) == 1 else "roots", ", ".join(_cut(r, 30) for r in roots[:6])),
        ("mutual information kept", f"{float(np.sum(model.mutual_info_)):.3f} nats"),
    ]
    if data_rows is not None:
        facts.append(("rows of data scored", f"{data_rows:,}"))
    items = "".join(f"<div><dt>{_esc(k)}</dt><dd>{_esc(v)}</dd></div>" for k, v in facts)
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
            _label_cell(e["parent"]),
            _label_cell(e["child"]),
            f"{mi:.4f}{_meter(mi / strongest)}",
            f"{float(e['g_statistic']):,.1f}",
            f"{int(e['dof']):,}",
            _p_value(float(e["p_value"])),
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
{_table(head, body)}
</section>"""


def _stability(stability: pa.Table | None) -> dict[frozenset[str], float] | None:
    """Edge -> frequency from a ``treewise.inference.edge_stability`` table."""
    if stability is None:
        return None
    wanted = {"column_a", "column_b", "frequency"}
    if not isinstance(stability, pa.Table) or not wanted <= set(stability.column_names):
        raise TypeError(
            "stability= takes the table of treewise.inference.edge_stability (columns "
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
            f'<tr><td class="lab">{_label_cell(labels[k], 18)}</td>'
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
        link = "root" if parent < 0 else f"parent: {_label_cell(names[parent], 30)}"
        cards.append(
            f'<div class="card"><h3>{_label_cell(name)}</h3>'
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
            f"<figure><h3>{_label_cell(names[c], 30)} given {_label_cell(names[p], 30)}</h3>"
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


# -- the parts about data -----------------------------------------------------------------------


@dataclass
class _Findings:
    """What the data sections show, computed in a few passes over the data."""

    scores: npt.NDArray[np.float64]
    top_rows: pa.Table  # the most surprising rows: their keys and model columns, worst first
    top_positions: npt.NDArray[np.int64]
    top_surprisal: pa.Table
    comparison: list[tuple[str, str, float, float, float]]  # parent, child, real, synth, TVD
    compared_with: str
    synthetic_rows: int


def _replayable(data: Any) -> Any:
    """``data`` as something that can be read several times (a one-shot stream is read now)."""
    source = open_source(data)
    if source.replayable:
        return data
    tables = [
        pa.Table.from_batches([batch])
        for part in source.parts(source.names, BATCH_ROWS)
        for batch in part.batches
    ]
    if not tables:
        raise DataError("the stream of record batches is empty; there is nothing to report on")
    return pa.concat_tables(tables, promote_options="default")


def _rows_at(source: Source, columns: list[str], positions: npt.NDArray[np.int64]) -> pa.Table:
    """The rows at ``positions`` (in that order), read batch by batch."""
    wanted = np.sort(positions)
    pieces: list[pa.Table] = []
    offset = 0
    for part in source.parts(columns, BATCH_ROWS):
        for batch in part.batches:
            lo, hi = np.searchsorted(wanted, [offset, offset + batch.num_rows])
            if hi > lo:
                pieces.append(pa.Table.from_batches([batch]).take(wanted[lo:hi] - offset))
            offset += batch.num_rows
    table = pa.concat_tables(pieces, promote_options="permissive")
    return table.take(np.searchsorted(wanted, positions))


def _findings(
    model: DependencyTree,
    data: Any,
    keys: Sequence[str],
    top: int,
    synthetic_rows: int,
    random_state: RandomState,
) -> _Findings:
    from treewise.estimator import DependencyTree

    names = [str(n) for n in model.feature_names_in_]
    data = _replayable(data)
    source = open_source(data)
    keys = check_columns(source.names, list(keys), source.description) if keys else []
    scores = model.score_samples(data)
    if len(scores) == 0:
        raise DataError(f"{source.description} has 0 rows; there is nothing to report on")
    positions = np.argsort(scores, kind="stable")[:top].astype(np.int64)
    columns = keys + [n for n in names if n not in keys]
    if top:
        top_rows = _rows_at(source, columns, positions)
        with warnings.catch_warnings():
            # score_samples has already warned about values never seen in fitting.
            warnings.simplefilter("ignore", UnseenCategoryWarning)
            top_surprisal = model.surprisal(top_rows.select(names))
    else:
        top_rows = top_surprisal = pa.table({})

    comparison: list[tuple[str, str, float, float, float]] = []
    compared_with = "the data"
    if synthetic_rows:
        synthetic = model.sample(synthetic_rows, random_state=random_state)
        # Both sides are counted with the model's own codebook, so their tables line up.
        fake = DependencyTree(columns=names).fit(synthetic, codebook=model)
        real: DependencyTree = model
        try:
            real = DependencyTree(columns=names).fit(data, codebook=model)
        except DataError:
            compared_with = "the fitted counts (the data has values the model never saw)"
        for c, p in enumerate(model.parent_):
            if p < 0:
                continue
            a, b = real.joint_counts(int(p), c), fake.joint_counts(int(p), c)
            share_a, share_b = a / max(1, int(a.sum())), b / max(1, int(b.sum()))
            # A loaded model knows only its own edges' mutual information.
            mi = model.mutual_info_[c] if real is model else real.pairwise_mutual_info_[p, c]
            comparison.append(
                (
                    names[int(p)],
                    names[c],
                    float(mi),
                    float(fake.pairwise_mutual_info_[p, c]),
                    0.5 * float(np.abs(share_a - share_b).sum()),
                )
            )
        comparison.sort(key=lambda row: -row[2])
    return _Findings(
        scores, top_rows, positions, top_surprisal, comparison, compared_with, synthetic_rows
    )


def _histogram(found: _Findings, top: int) -> str:
    scores = found.scores
    finite = scores[np.isfinite(scores)]
    figure = Figure(figsize=(8.0, 2.8), layout="constrained")
    FigureCanvasAgg(figure)
    ax = figure.add_subplot()
    # A log scale keeps the thin tail of surprising rows visible beside the bulk; a bin with
    # one row still shows (the bars start at half a row).
    counts, edges = np.histogram(finite, bins=60)
    heights = np.where(counts > 0, counts, 0.5)
    ax.stairs(heights, edges, baseline=0.5, fill=True, color="#86aeb2")
    ax.set_yscale("log")
    ax.set_ylim(bottom=0.5)
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:,.0f}"))
    if top and len(found.top_positions):
        edge = float(scores[found.top_positions[-1]])
        if math.isfinite(edge):
            ax.axvline(edge, color="#a0662f", linewidth=1.2, linestyle="--")
            ax.annotate(
                f"the {len(found.top_positions)} most surprising rows",
                xy=(edge, 1.0),  # at the top of the axes
                xycoords=("data", "axes fraction"),
                xytext=(4, -12),
                textcoords="offset points",
                fontsize=8,
                color="#a0662f",
                parse_math=False,
            )
    ax.set_xlabel("ln p(row), nats (lower is more surprising)", color=MUTED, fontsize=9)
    ax.set_ylabel("rows", color=MUTED, fontsize=9)
    ax.tick_params(colors=MUTED, labelsize=8)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color("#b8c3cb")
    svg = figure_svg(figure, salt="treewise-scores")
    impossible = len(scores) - len(finite)
    extra = (
        f" {impossible:,} rows have probability 0 (alpha=0) and are not drawn."
        if impossible
        else ""
    )
    return f"""
<section id="scores">
<h2>Scores of the data</h2>
<p class="note">The log-probability of each of the {len(scores):,} rows under the model, in
nats; the mean is {float(np.mean(finite)) if len(finite) else float("nan"):.3f}.{extra}</p>
<figure>{svg}</figure>
</section>"""


def _surprising(model: DependencyTree, found: _Findings, keys: Sequence[str]) -> str:
    if found.top_rows.num_rows == 0:
        return ""
    names = [str(n) for n in model.feature_names_in_]
    values = {c: found.top_rows[c].to_pylist() for c in found.top_rows.column_names}
    matrix = np.column_stack([found.top_surprisal[n].to_numpy() for n in names])
    head = [("#", True), ("row", True)]
    head += [(_esc(_cut(k, 24)), False) for k in keys]
    head += [("ln p", True), ("the columns that made it surprising (surprisal in nats)", False)]
    body = []
    for r in range(found.top_rows.num_rows):
        order = np.argsort(-matrix[r], kind="stable")

        def said(c: int, row: int = r) -> str:
            value = _value_label(values[names[c]][row])
            text = f"<b>{_label_cell(names[c], 30)}</b> = {_label_cell(value)}"
            p = int(model.parent_[c])
            if p >= 0:
                given = _value_label(values[names[p]][row])
                text += (
                    f' <span class="given">given {_label_cell(names[p], 30)} = '
                    f"{_label_cell(given)}</span>"
                )
            return text

        reasons = "".join(f"<li>{said(int(c))}: {matrix[r, c]:.2f}</li>" for c in order[:REASONS])
        every = "".join(
            f"<tr><td>{_label_cell(names[c], 30)}</td>"
            f"<td>{_label_cell(_value_label(values[names[c]][r]))}</td>"
            f'<td class="n">{matrix[r, c]:.2f}</td></tr>'
            for c in order
        )
        cell = (
            f'<ul class="reasons">{reasons}</ul><details><summary>all {len(names)} columns'
            f'</summary><table class="mini">{every}</table></details>'
        )
        row = [str(r + 1), f"{int(found.top_positions[r]):,}"]
        row += [_label_cell(_value_label(values[k][r]), 24) for k in keys]
        row += [f"{float(found.scores[found.top_positions[r]]):.2f}", cell]
        body.append(row)
    return f"""
<section id="surprising">
<h2>The most surprising rows</h2>
<p class="note">The rows with the lowest log-probability, lowest first; row is the position in
the data. Each column's surprisal is −ln P(value | parent's value): the columns listed first
are the ones the model found hardest to believe, given their parent. A surprising row is worth
a look, not a conclusion (see the cautions).</p>
{_table(head, body)}
</section>"""


def _synthetic(found: _Findings) -> str:
    if not found.synthetic_rows or not found.comparison:
        return ""
    rows = []
    for parent, child, real, fake, tvd in found.comparison:
        rows.append(
            [
                _label_cell(parent, 30),
                _label_cell(child, 30),
                f"{real:.4f}",
                f"{fake:.4f}",
                f"{fake - real:+.4f}",
                f"{tvd:.3f}",
            ]
        )
    head = [
        ("parent", False),
        ("child", False),
        ("MI, real (nats)", True),
        ("MI, synthetic", True),
        ("difference", True),
        ("joint distance", True),
    ]
    largest = max(abs(f - r) for _, _, r, f, _ in found.comparison)
    worst = max(t for *_, t in found.comparison)
    return f"""
<section id="synthetic">
<h2>Synthetic rows against real ones</h2>
<p class="note">{found.synthetic_rows:,} rows were sampled from the model and counted with its
codebook, and each edge's statistics compared with {_esc(found.compared_with)}. Joint distance
is the total variation distance between the two joint distributions of the edge's columns (0:
the same, 1: disjoint). Largest difference in mutual information: {largest:.4f} nats; largest
joint distance: {worst:.3f}. Sampling noise and smoothing (alpha) account for small
differences; large ones mean the synthetic rows misrepresent that dependence.</p>
{_table(head, rows)}
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
    from treewise.estimator import _check_int

    model._fitted()
    synthetic_rows = _check_int("synthetic_rows", synthetic_rows, 0, 100_000_000)
    top = _check_int("top", top, 0, 100_000)
    heatmaps = _check_int("heatmaps", heatmaps, 0, 10_000)
    if tree_edges is not None:
        tree_edges = _check_int("tree_edges", tree_edges, 1, 1_000_000)
    if isinstance(keys, str):
        raise TypeError(f"keys= must be a list of column names, got {keys!r}")
    keys = list(keys)
    edges = _edge_rows(model)
    found = (
        None if data is None else _findings(model, data, keys, top, synthetic_rows, random_state)
    )
    heading = title or "Dependency tree report"
    sections = [
        ("summary", "Summary"),
        ("tree", "The tree"),
        ("edges", "Edges"),
        ("conditional", "Conditional tables"),
        ("marginals", "Columns"),
    ]
    if heatmaps == 0 or not edges:
        sections.remove(("conditional", "Conditional tables"))
    body = [
        _summary(model, len(edges), None if found is None else len(found.scores)),
        _tree(model, len(edges), tree_edges),
        _edges(model, edges, stability),
        _conditionals(model, edges, heatmaps),
        _marginals(model),
    ]
    if found is not None:
        sections.append(("scores", "Scores"))
        body.append(_histogram(found, top))
        if found.top_rows.num_rows:
            sections.append(("surprising", "Surprising rows"))
            body.append(_surprising(model, found, keys))
        if found.comparison:
            sections.append(("synthetic", "Synthetic rows"))
            body.append(_synthetic(found))
    sections.append(("cautions", "Cautions"))
    body.append(CAUTIONS)
    nav = "".join(f'<a href="#{anchor}">{name}</a>' for anchor, name in sections)
    from treewise import __version__

    when = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="treewise {_esc(__version__)}">
<title>{_esc(heading)}</title>
<style>{STYLE}</style>
</head>
<body>
<main>
<header>
<h1>{_esc(heading)}</h1>
<p>A Chow-Liu dependency tree over {model.n_features_in_:,} columns, fitted on
{int(model.n_rows_):,} rows. Written by treewise {_esc(__version__)} on {when}.</p>
</header>
<nav>{nav}</nav>
{"".join(body)}
<footer>Every figure here comes from the model's exact counts{
        "" if found is None else ", the scored data and rows sampled from the model"
    }. The page needs no network and runs no scripts.</footer>
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
        The table of ``treewise.inference.edge_stability``; adds a stability column to the
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
