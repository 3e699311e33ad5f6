"""The data sections of the HTML report: scores, the most surprising rows, synthetic rows."""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter

from treewise.checks import RandomState
from treewise.errors import DataError, UnseenCategoryWarning
from treewise.estimator import DependencyTree
from treewise.fidelity import compare_columns
from treewise.sources import BatchLoop, Source, check_columns, open_source, read_table
from treewise.views.html import cut, data_table, esc, label_cell, value_label
from treewise.views.plot import MUTED, figure_svg

__all__ = [
    "REASONS",
    "Findings",
    "find",
    "histogram_section",
    "replayable",
    "rows_at",
    "surprising_section",
    "synthetic_section",
]

#: Leading columns listed per surprising row.
REASONS = 4


@dataclass
class Findings:
    """What the data sections show, computed in a few passes over the data."""

    scores: npt.NDArray[np.float64]
    top_rows: pa.Table  # the most surprising rows: their keys and model columns, worst first
    top_positions: npt.NDArray[np.int64]
    top_surprisal: pa.Table
    comparison: list[tuple[str, str, float, float, float]]  # parent, child, real, synth, TVD
    compared_with: str
    synthetic_rows: int
    columns: pa.Table | None = None  # per column: distance in real units and its noise floor
    pairs: pa.Table | None = None  # per numeric edge: rank correlations


def replayable(data: Any) -> Any:
    """``data`` as something that can be read several times (a one-shot stream is read now)."""
    source = open_source(data)
    if source.replayable:
        return data
    table = read_table(source)
    if table.num_rows == 0:
        raise DataError("the stream of record batches is empty; there is nothing to report on")
    return table


def rows_at(source: Source, columns: list[str], positions: npt.NDArray[np.int64]) -> pa.Table:
    """The rows at ``positions`` (in that order), read batch by batch."""
    wanted = np.sort(positions)
    pieces: list[pa.Table] = []
    offset = 0
    with BatchLoop(source, columns) as batches:
        for batch in batches:
            lo, hi = np.searchsorted(wanted, [offset, offset + batch.num_rows])
            if hi > lo:
                # pyarrow's take has no string_view kernel: take plain strings.
                plain = pa.Table.from_batches([batch])
                for i, field in enumerate(plain.schema):
                    if pa.types.is_string_view(field.type):
                        plain = plain.set_column(i, field.name, plain.column(i).cast(pa.string()))
                pieces.append(plain.take(wanted[lo:hi] - offset))
            offset += batch.num_rows
    table = pa.concat_tables(pieces, promote_options="permissive")
    return table.take(np.searchsorted(wanted, positions))


def find(
    model: DependencyTree,
    data: Any,
    keys: Sequence[str],
    top: int,
    synthetic_rows: int,
    random_state: RandomState,
) -> Findings:
    """Score ``data``, find its most surprising rows, and compare synthetic rows with it."""
    names = [str(n) for n in model.feature_names_in_]
    data = replayable(data)
    source = open_source(data)
    keys = check_columns(source.names, list(keys), source.description) if keys else []
    scores = model.score_samples(data)
    if len(scores) == 0:
        raise DataError(f"{source.description} has 0 rows; there is nothing to report on")
    positions = np.argsort(scores, kind="stable")[:top].astype(np.int64)
    columns = keys + [n for n in names if n not in keys]
    if top:
        top_rows = rows_at(source, columns, positions)
        with warnings.catch_warnings():
            # score_samples has already warned about values never seen in fitting.
            warnings.simplefilter("ignore", UnseenCategoryWarning)
            top_surprisal = model.surprisal(top_rows.select(names))
    else:
        top_rows = top_surprisal = pa.table({})

    comparison: list[tuple[str, str, float, float, float]] = []
    compared_with = "the data"
    columns_cmp: pa.Table | None = None
    pairs_cmp: pa.Table | None = None
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
        # Values against values: a random sample of the real rows, as many as were sampled.
        rng = np.random.default_rng(random_state if isinstance(random_state, int) else None)
        take = min(len(scores), synthetic_rows)
        picked = np.sort(rng.choice(len(scores), size=take, replace=False)).astype(np.int64)
        real_rows = rows_at(source, names, picked)
        edges = [(names[int(p)], names[c]) for c, p in enumerate(model.parent_) if p >= 0]
        columns_cmp, pairs_cmp = compare_columns(
            real_rows, synthetic, dict(model.kinds_), rng, edges
        )
    return Findings(
        scores,
        top_rows,
        positions,
        top_surprisal,
        comparison,
        compared_with,
        synthetic_rows,
        columns_cmp,
        pairs_cmp,
    )


def histogram_section(found: Findings, top: int) -> str:
    """The section with the histogram of the rows' scores."""
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


def surprising_section(model: DependencyTree, found: Findings, keys: Sequence[str]) -> str:
    """The section listing the most surprising rows and the columns that made them so."""
    if found.top_rows.num_rows == 0:
        return ""
    names = [str(n) for n in model.feature_names_in_]
    values = {c: found.top_rows[c].to_pylist() for c in found.top_rows.column_names}
    matrix = np.column_stack([found.top_surprisal[n].to_numpy() for n in names])
    head = [("#", True), ("row", True)]
    head += [(esc(cut(k, 24)), False) for k in keys]
    head += [("ln p", True), ("the columns that made it surprising (surprisal in nats)", False)]
    body = []
    for r in range(found.top_rows.num_rows):
        order = np.argsort(-matrix[r], kind="stable")

        def said(c: int, row: int = r) -> str:
            value = value_label(values[names[c]][row])
            text = f"<b>{label_cell(names[c], 30)}</b> = {label_cell(value)}"
            p = int(model.parent_[c])
            if p >= 0:
                given = value_label(values[names[p]][row])
                text += (
                    f' <span class="given">given {label_cell(names[p], 30)} = '
                    f"{label_cell(given)}</span>"
                )
            return text

        reasons = "".join(f"<li>{said(int(c))}: {matrix[r, c]:.2f}</li>" for c in order[:REASONS])
        every = "".join(
            f"<tr><td>{label_cell(names[c], 30)}</td>"
            f"<td>{label_cell(value_label(values[names[c]][r]))}</td>"
            f'<td class="n">{matrix[r, c]:.2f}</td></tr>'
            for c in order
        )
        cell = (
            f'<ul class="reasons">{reasons}</ul><details><summary>all {len(names)} columns'
            f'</summary><table class="mini">{every}</table></details>'
        )
        row = [str(r + 1), f"{int(found.top_positions[r]):,}"]
        row += [label_cell(value_label(values[k][r]), 24) for k in keys]
        row += [f"{float(found.scores[found.top_positions[r]]):.2f}", cell]
        body.append(row)
    return f"""
<section id="surprising">
<h2>The most surprising rows</h2>
<p class="note">The rows with the lowest log-probability, lowest first; row is the position in
the data. Each column's surprisal is −ln P(value | parent's value): the columns listed first
are the ones the model found hardest to believe, given their parent. A surprising row is worth
a look, not a conclusion (see the cautions).</p>
{data_table(head, body)}
</section>"""


def synthetic_section(found: Findings) -> str:
    """The section comparing each edge in synthetic rows with the data."""
    if not found.synthetic_rows or not found.comparison:
        return ""
    rows = []
    for parent, child, real, fake, tvd in found.comparison:
        rows.append(
            [
                label_cell(parent, 30),
                label_cell(child, 30),
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
codebook, and each edge's statistics compared with {esc(found.compared_with)}. Joint distance
is the total variation distance between the two joint distributions of the edge's columns (0:
the same, 1: disjoint). Largest difference in mutual information: {largest:.4f} nats; largest
joint distance: {worst:.3f}. Sampling noise and smoothing (alpha) account for small
differences; large ones mean the synthetic rows misrepresent that dependence.</p>
{data_table(head, rows)}
{_column_fidelity(found)}
</section>"""


def _column_fidelity(found: Findings) -> str:
    """Each column's synthetic values against real ones, next to the bootstrap noise floor."""
    if found.columns is None or found.columns.num_rows == 0:
        return ""
    rows = []
    for r in found.columns.to_pylist():
        rows.append(
            [
                label_cell(r["column"], 30),
                esc(r["kind"]),
                esc(r["measure"]),
                f"{r['distance']:.3f}",
                f"{r['noise_floor']:.3f}",
                f"{r['excess']:+.3f}",
                f"{r['null_share_real']:.3f}",
                f"{r['null_share_synthetic']:.3f}",
            ]
        )
    head = [
        ("column", False),
        ("kind", False),
        ("measure", False),
        ("synthetic vs real", True),
        ("noise floor", True),
        ("excess", True),
        ("null share, real", True),
        ("null share, synthetic", True),
    ]
    pairs = ""
    if found.pairs is not None and found.pairs.num_rows:
        pair_rows = [
            [
                label_cell(p["parent"], 30),
                label_cell(p["child"], 30),
                f"{p['rank_corr_real']:.3f}",
                f"{p['rank_corr_synthetic']:.3f}",
                f"{p['noise_floor']:.3f}",
            ]
            for p in found.pairs.to_pylist()
        ]
        pair_head = [
            ("parent", False),
            ("child", False),
            ("rank correlation, real", True),
            ("synthetic", True),
            ("noise floor", True),
        ]
        pairs = f"""<p class="note">Linked numeric columns: Spearman's rank correlation of each
tree edge in the real and the synthetic rows; the noise floor is how far a bootstrap resample of
the real rows moves it.</p>
{data_table(pair_head, pair_rows)}"""
    return f"""<h3>Each column, in its own units</h3>
<p class="note">Synthetic values against a random sample of as many real rows: the
Kolmogorov-Smirnov statistic for numeric columns, the total variation distance of value shares
for the others (0: the same). The noise floor is the same distance between the real sample and
a bootstrap resample of it with as many rows as were synthesised: what sampling alone costs. An
excess near 0 means the column is reproduced as well as a resample of the real data would.</p>
{data_table(head, rows)}
{pairs}"""
