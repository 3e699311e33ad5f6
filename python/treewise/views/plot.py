"""Pictures of a fitted tree: the tree or forest (matplotlib), conditional tables (inline SVG).

The tree's layout comes from networkx (``multipartite_layout``, one layer per depth, the nodes of
a layer in depth-first order so that no two edges cross); matplotlib draws it on its
non-interactive Agg canvas, so nothing here needs a display or touches pyplot's global state.
"""

from __future__ import annotations

import html
import io
import math
import numbers
import re
from collections.abc import Iterable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import matplotlib
import networkx as nx
import numpy as np
import numpy.typing as npt
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.cm import ScalarMappable
from matplotlib.collections import LineCollection
from matplotlib.colors import LinearSegmentedColormap, Normalize, to_hex
from matplotlib.figure import Figure

if TYPE_CHECKING:
    from treewise.estimator import DependencyTree

__all__ = [
    "INK",
    "MUTED",
    "PROBABILITY",
    "STRENGTH",
    "Selection",
    "conditional_svg",
    "figure_svg",
    "plot_tree",
    "select_edges",
    "shorten",
]

#: Text colour.
INK = "#1f2a33"
#: Secondary text and outlines.
MUTED = "#5b6b78"
#: Edges marked by ``highlight`` (changed dependencies).
CHANGED = "#c0392b"
#: Box fill and outline of an ordinary column, and of a root.
NODE_FILL, NODE_EDGE = "#f5f7f8", "#93a3b0"
ROOT_FILL, ROOT_EDGE = "#dce8eb", "#2f5d6e"
#: Edge strength, weak to strong: pale slate, sage teal, deep teal, deep navy.
STRENGTH = LinearSegmentedColormap.from_list(
    "treewise_strength", ["#d3dce2", "#86aeb2", "#3f7a84", "#1b3a4d"]
)

#: Font size of node labels, in points.
LABEL_POINTS = 8.5
#: Conditional probability, 0 to 1: near-white to deep navy.
PROBABILITY = LinearSegmentedColormap.from_list(
    "treewise_probability", ["#f7f9fa", "#b9d0d3", "#4d8a93", "#1b3a4d"]
)
#: The most categories a side of a conditional table shows; the rarest beyond are merged.
HEATMAP_SIDE = 14

#: Rough width of one label character and height of one slot of a layer, in inches.
CHAR_INCHES = 0.068
ROW_INCHES = 0.32


@dataclass(frozen=True)
class Selection:
    """Which part of a tree to draw.

    Attributes
    ----------
    nodes : list of int
        Column indices to draw, in depth-first order (roots first, strongest child first).
    edges : list of (int, int)
        The (parent, child) edges to draw.
    depth : dict of int to int
        Each drawn node's layer: 0 for the top of its drawn component.
    n_candidates : int
        Edges of the tree (or of the subtree) before ``max_edges`` and ``min_mutual_info``.
    """

    nodes: list[int]
    edges: list[tuple[int, int]]
    depth: dict[int, int]
    n_candidates: int


def select_edges(
    model: DependencyTree,
    *,
    max_edges: int | None = None,
    min_mutual_info: float | None = None,
    subtree: str | int | None = None,
) -> Selection:
    """The nodes and edges ``plot_tree`` draws (see there for the parameters)."""
    if max_edges is not None and (
        isinstance(max_edges, bool) or not isinstance(max_edges, numbers.Integral) or max_edges < 0
    ):
        raise ValueError(f"max_edges must be an integer >= 0 or None, got {max_edges!r}")
    if min_mutual_info is not None and not (
        isinstance(min_mutual_info, numbers.Real) and math.isfinite(min_mutual_info)
    ):
        raise ValueError(
            f"min_mutual_info must be a finite number or None, got {min_mutual_info!r}"
        )
    model._fitted()  # NotFittedError before anything else
    parent = [int(p) for p in model.parent_]
    strength = [float(m) for m in model.mutual_info_]
    tree: nx.DiGraph[int] = nx.DiGraph()
    tree.add_nodes_from(range(len(parent)))
    tree.add_edges_from((p, c) for c, p in enumerate(parent) if p >= 0)
    if subtree is None:
        members = set(tree.nodes)
    else:
        top = model._index(subtree)
        members = {top} | nx.descendants(tree, top)
    candidates = [(p, c) for p, c in tree.edges if p in members and c in members]
    kept = candidates
    if min_mutual_info is not None:
        kept = [(p, c) for p, c in kept if strength[c] >= min_mutual_info]
    if max_edges is not None:
        kept = sorted(kept, key=lambda e: (-strength[e[1]], e[1]))[: int(max_edges)]
    if max_edges is None and min_mutual_info is None:
        shown = members  # every column, even one left alone by pruning
    else:
        shown = {n for edge in kept for n in edge} | ({top} if subtree is not None else set())

    drawn: nx.DiGraph[int] = nx.DiGraph()
    drawn.add_nodes_from(sorted(shown))
    drawn.add_edges_from(kept)
    components = [set(c) for c in nx.weakly_connected_components(drawn)]
    tops = [next(n for n in c if drawn.in_degree(n) == 0) for c in components]
    size = {t: len(c) for t, c in zip(tops, components, strict=True)}
    order: list[int] = []
    depth: dict[int, int] = {}  # each node's layer
    for t in sorted(tops, key=lambda t: (-size[t], t)):
        order.extend(
            nx.dfs_preorder_nodes(
                drawn, t, sort_neighbors=lambda ns: sorted(ns, key=lambda c: (-strength[c], c))
            )
        )
        for level, layer in enumerate(nx.bfs_layers(drawn, t)):
            depth.update(dict.fromkeys(layer, level))
    rank = {n: k for k, n in enumerate(order)}
    edges = sorted(kept, key=lambda e: rank[e[1]])
    return Selection(order, edges, depth, len(candidates))


def plot_tree(
    model: DependencyTree,
    *,
    ax: Axes | None = None,
    max_edges: int | None = None,
    min_mutual_info: float | None = None,
    subtree: str | int | None = None,
    figsize: tuple[float, float] | None = None,
    orient: str = "auto",
    highlight: Iterable[tuple[str, str]] = (),
) -> Figure:
    """Draw the fitted tree (or forest) in layers from its root(s).

    Each box is a column with its cardinality (number of codes, counting the "other" and null
    codes); a root has a darker box. Each line joins a parent to its child, wider and darker the
    more mutual information they share (colour bar in nats). A column's children are stacked
    strongest first, so the main chains read along the top.

    Parameters
    ----------
    model : DependencyTree
        A fitted model (a loaded one works too).
    ax : matplotlib Axes, optional
        Draw into these axes. Default: a new figure sized to the tree, on the Agg canvas.
    max_edges : int, optional
        Draw only the strongest this many edges (and the columns they join). For wide models:
        at 200 columns, ``max_edges=40`` shows the backbone.
    min_mutual_info : float, optional
        Draw only edges with at least this mutual information (nats).
    subtree : str or int, optional
        Draw only this column and its descendants.
    figsize : (float, float), optional
        Size of a new figure in inches. Default: grows with the depth and the widest layer.
    orient : {"auto", "right", "down"}, default "auto"
        Layers from left to right, or from top to bottom; "auto" takes the one that fits a
        page better (deep, narrow trees read down; wide ones read right).
    highlight : iterable of (str, str), optional
        Edges (pairs of column names, in either order) to mark with a dashed red line, such as
        the dependencies that changed between two tables.

    Returns
    -------
    matplotlib.figure.Figure
        The figure drawn on; save it with ``fig.savefig("tree.svg")`` or ``"tree.png"``.
    """
    if orient not in ("auto", "right", "down"):
        raise ValueError(f"orient must be 'auto', 'right' or 'down', got {orient!r}")
    chosen = select_edges(
        model, max_edges=max_edges, min_mutual_info=min_mutual_info, subtree=subtree
    )
    names = [shorten(str(n)) for n in model.feature_names_in_]
    labels = {n: f"{names[n]} ({len(model.categories_[n])})" for n in chosen.nodes}
    layers: dict[int, list[int]] = {}
    for n in chosen.nodes:
        layers.setdefault(chosen.depth[n], []).append(n)
    sizes = _sizes(len(layers), max((len(v) for v in layers.values()), default=1), labels)
    if orient == "auto":
        # Whichever direction needs the least shrinking to fit a page of 11 x 14 inches.
        orient = min(sizes, key=lambda o: max(sizes[o][0] / 11.0, sizes[o][1] / 14.0))
    if ax is None:
        figure = Figure(figsize=figsize or sizes[orient], layout="constrained")
        FigureCanvasAgg(figure)
        ax = figure.add_subplot()
    else:
        holder = ax.figure  # a Figure, or a SubFigure inside one
        figure = holder if isinstance(holder, Figure) else holder.figure
    ax.set_axis_off()
    title = _title(model, chosen, max_edges, min_mutual_info, subtree)
    if title:
        ax.set_title(title, loc="left", fontsize=9, color=MUTED, parse_math=False)
    if not chosen.nodes:
        ax.text(
            0.5, 0.5, "No edge passes the filters", ha="center", va="center", color=MUTED,
            transform=ax.transAxes, parse_math=False,
        )  # fmt: skip
        return figure

    drawn: nx.DiGraph[int] = nx.DiGraph()
    drawn.add_nodes_from(chosen.nodes)
    drawn.add_edges_from(chosen.edges)
    # One layer per depth: columns of the picture ("right") or rows ("down"); a layer's nodes
    # follow the depth-first order, first at the top (or left).
    pos = nx.multipartite_layout(
        drawn, subset_key=layers, align="vertical" if orient == "right" else "horizontal"
    )
    axis = 0 if orient == "right" else 1
    unit = _unit(
        [[(float(pos[n][0]), float(pos[n][1])) for n in layer] for layer in layers.values()], axis
    )
    xs = [float(pos[n][0]) for n in chosen.nodes]
    ys = [float(pos[n][1]) for n in chosen.nodes]
    across, along = (0.5, 0.6) if orient == "right" else (0.5, 0.5)
    ax.set_xlim(min(xs) - across * unit, max(xs) + across * unit)
    ax.set_ylim(max(ys) + along * unit, min(ys) - along * unit)  # the first layer or slot on top

    strength = model.mutual_info_
    values = [float(strength[c]) for _, c in chosen.edges]
    if values:
        norm = Normalize(0.0, max(max(values), 1e-12))
        segments = [[tuple(pos[p]), tuple(pos[c])] for p, c in chosen.edges]
        lines = LineCollection(
            segments,
            colors=[STRENGTH(norm(v)) for v in values],
            linewidths=[0.7 + 3.3 * float(norm(v)) for v in values],
            capstyle="round",
            zorder=1,
        )
        ax.add_collection(lines)
        bar = figure.colorbar(
            ScalarMappable(norm=norm, cmap=STRENGTH), ax=ax, shrink=0.8, aspect=30, pad=0.01
        )
        bar.set_label("mutual information with parent (nats)", color=MUTED, fontsize=8)
        bar.ax.tick_params(labelsize=7, colors=MUTED)
        bar.outline.set_visible(False)

    marked_pairs = {frozenset(edge) for edge in highlight}
    full = [str(n) for n in model.feature_names_in_]
    marked = [
        [tuple(pos[p]), tuple(pos[c])]
        for p, c in chosen.edges
        if frozenset((full[p], full[c])) in marked_pairs
    ]
    if marked:
        ax.add_collection(
            LineCollection(marked, colors=CHANGED, linewidths=2.0, linestyles="--", zorder=2)
        )

    parent = model.parent_
    tops = {n for n in chosen.nodes if chosen.depth[n] == 0}
    for n, x, y in zip(chosen.nodes, xs, ys, strict=True):
        is_root = parent[n] < 0
        hidden_parent = n in tops and not is_root  # its parent is not drawn
        ax.text(
            x,
            y,
            labels[n],
            ha="center",
            va="center",
            fontsize=LABEL_POINTS,
            color=INK,
            fontweight="bold" if is_root else "normal",
            parse_math=False,  # a "$" in a column name is a dollar, not mathematics
            zorder=3,
            bbox={
                "boxstyle": "round,pad=0.35",
                "facecolor": ROOT_FILL if is_root else NODE_FILL,
                "edgecolor": ROOT_EDGE if is_root else NODE_EDGE,
                "linewidth": 1.2 if is_root else 0.8,
                "linestyle": "--" if hidden_parent else "-",
            },
        )
    return figure


def _title(
    model: DependencyTree,
    chosen: Selection,
    max_edges: int | None,
    min_mutual_info: float | None,
    subtree: str | int | None,
) -> str:
    """A line saying what part of the tree is shown, or "" for the whole of it."""
    if subtree is None and max_edges is None and min_mutual_info is None:
        n_roots = int((model.parent_ < 0).sum())
        return f"A forest of {n_roots} trees" if n_roots > 1 else ""
    parts = [f"{len(chosen.edges)} of {chosen.n_candidates} edges"]
    if subtree is not None:
        parts.append(f"below {model.feature_names_in_[model._index(subtree)]}")
    if min_mutual_info is not None:
        parts.append(f"mutual information ≥ {min_mutual_info:g} nats")
    if max_edges is not None and len(chosen.edges) < chosen.n_candidates:
        parts.append("strongest first")
    return ", ".join(parts)


def _unit(layers: list[list[tuple[float, float]]], axis: int) -> float:
    """The distance between neighbouring layers in the layout's coordinates.

    ``multipartite_layout`` puts layers one unit apart, and the nodes of a layer one unit
    apart, then scales both axes by the same factor; this recovers that unit. ``layers`` holds
    each layer's node positions, ``axis`` is the coordinate that tells layers apart.
    """
    if len(layers) > 1:
        return abs(layers[1][0][axis] - layers[0][0][axis])
    slots = sorted(point[1 - axis] for point in layers[0])
    return slots[1] - slots[0] if len(slots) > 1 else 1.0


def _sizes(n_layers: int, widest: int, labels: dict[int, str]) -> dict[str, tuple[float, float]]:
    """A figure size in inches for each direction, so that labels and lines have room."""
    longest = max((len(text) for text in labels.values()), default=10)
    slot_width = max(1.2, longest * CHAR_INCHES + 0.45)
    return {
        "right": (n_layers * (slot_width + 0.25) + 1.6, max(2.2, widest * ROW_INCHES + 1.0)),
        "down": (max(4.0, widest * slot_width + 1.6), max(2.2, n_layers * 0.62 + 0.9)),
    }


def shorten(text: str, limit: int = 32) -> str:
    """``text`` cut to at most ``limit`` characters, ending in "…" when cut."""
    return text if len(text) <= limit else text[: limit - 1] + "…"


def figure_svg(figure: Figure, *, salt: str = "treewise") -> str:
    """The figure as an ``<svg>`` element to place inside an HTML page.

    Text stays text (selectable, searchable, drawn with the reader's own fonts), nothing refers
    outside the element, and the output is the same on every run. Give each figure of one page
    its own ``salt``, so that the ids of their clip paths differ.
    """
    out = io.StringIO()
    with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": salt}):
        figure.savefig(out, format="svg", metadata={"Date": None})
    text = out.getvalue()
    text = text[text.index("<svg") :]  # drop the XML declaration and the DOCTYPE
    text = re.sub(r"<metadata>.*?</metadata>", "", text, flags=re.DOTALL)
    # HTML knows the SVG namespaces; dropping them leaves no URL in the page at all.
    text = re.sub(r'\s+xmlns(:xlink)?="[^"]*"', "", text)
    # matplotlib's style sheet would apply to the whole page (`*`); its two defaults are SVG's.
    text = re.sub(r'<style type="text/css">\*\{[^}]*\}</style>', "", text)
    # Shrink to the width of whatever holds it, never stretch beyond the drawn size.
    text = text.replace("<svg ", '<svg style="max-width: 100%; height: auto" ', 1)
    return text.strip()


def _merge_rare(
    counts: npt.NDArray[np.float64], labels: list[str], axis: int
) -> tuple[npt.NDArray[np.float64], list[str]]:
    """Keep the HEATMAP_SIDE - 1 most common categories along ``axis`` and merge the rest."""
    if counts.shape[axis] <= HEATMAP_SIDE:
        return counts, labels
    totals = counts.sum(axis=1 - axis)
    keep = sorted(int(k) for k in np.argsort(-totals, kind="stable")[: HEATMAP_SIDE - 1])
    kept_set = set(keep)
    rest = [k for k in range(counts.shape[axis]) if k not in kept_set]
    kept = np.take(counts, keep, axis=axis)
    merged = np.take(counts, rest, axis=axis).sum(axis=axis, keepdims=True)
    return np.concatenate([kept, merged], axis=axis), [labels[k] for k in keep] + [
        f"({len(rest)} others)"
    ]


def conditional_svg(
    joint: npt.NDArray[Any], parent_labels: list[str], child_labels: list[str], title: str
) -> str:
    """P(child | parent) from a contingency table (rows: parent codes) as an inline SVG grid.

    Parent values never seen are left out; beyond ``HEATMAP_SIDE`` categories on a side the
    rarest are merged. Every cell has a tooltip with its probability and counts, and small
    grids print the percentage in the cell. The labels are plain text; they are escaped here.
    """
    counts = np.asarray(joint, dtype=np.float64)
    seen = counts.sum(axis=1) > 0
    counts, parent_labels = counts[seen], [t for t, s in zip(parent_labels, seen, strict=True) if s]
    counts, parent_labels = _merge_rare(counts, parent_labels, axis=0)
    counts, child_labels = _merge_rare(counts, child_labels, axis=1)
    totals = counts.sum(axis=1)
    share = counts / totals[:, None]
    n_rows, n_cols = counts.shape
    cell = 28 if n_cols <= 8 else 22
    left = int(min(170, 12 + 6.6 * max(len(shorten(t, 24)) for t in parent_labels)))
    # Child labels slant up and to the right at 45 degrees, about 6 px per character.
    slant = 0.71 * 6.0 * max(len(shorten(t, 20)) for t in child_labels)
    top = int(16 + slant)
    right = int(max(76, slant - cell / 2 + 8))
    width, height = left + n_cols * cell + right, top + n_rows * cell + 4
    parts = [
        f'<svg width="{width}" height="{height}" viewBox="0 0 {width} {height}" role="img" '
        f'aria-label="{html.escape(title)}" font-family="system-ui, sans-serif" font-size="11">'
    ]
    for j, label in enumerate(child_labels):
        middle, base = left + j * cell + cell / 2, top - 6
        parts.append(
            f'<text x="{middle:.1f}" y="{base}" transform="rotate(-45 {middle:.1f} {base})" '
            f'fill="{INK}">'
            f"<title>{html.escape(label)}</title>{html.escape(shorten(label, 20))}</text>"
        )
    for i, label in enumerate(parent_labels):
        y = top + i * cell + cell / 2 + 4
        parts.append(
            f'<text x="{left - 6}" y="{y:.1f}" text-anchor="end" fill="{INK}">'
            f"<title>{html.escape(label)}</title>{html.escape(shorten(label, 24))}</text>"
        )
        parts.append(
            f'<text x="{left + n_cols * cell + 6}" y="{y:.1f}" fill="{MUTED}">'
            f"n={int(totals[i]):,}</text>"
        )
        for j in range(n_cols):
            p = float(share[i, j])
            x, y0 = left + j * cell, top + i * cell
            tip = (
                f"P({child_labels[j]} | {parent_labels[i]}) = {p:.3f}: "
                f"{int(counts[i, j]):,} of {int(totals[i]):,} rows"
            )
            parts.append(
                f'<rect x="{x}" y="{y0}" width="{cell - 1}" height="{cell - 1}" '
                f'fill="{to_hex(PROBABILITY(p))}"><title>{html.escape(tip)}</title></rect>'
            )
            if n_cols <= 12 and p >= 0.005:
                colour = "#ffffff" if p > 0.5 else INK
                parts.append(
                    f'<text x="{x + (cell - 1) / 2:.1f}" y="{y0 + cell / 2 + 3.5:.1f}" '
                    f'text-anchor="middle" font-size="9.5" fill="{colour}">{p * 100:.0f}</text>'
                )
    parts.append("</svg>")
    return "".join(parts)
