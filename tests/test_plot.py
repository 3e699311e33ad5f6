"""The picture of a tree: layout, labels, strength encoding, filters, files, and wide models."""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import matplotlib
import numpy as np
import pyarrow as pa
import pytest
import treewise
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from treewise.datasets import model_columns, shop_sessions
from treewise.views.plot import conditional_svg, figure_svg, plot_tree, select_edges

SVG = "{http://www.w3.org/2000/svg}"


def wide_table(d: int = 200, n: int = 1500, seed: int = 0) -> pa.Table:
    """``d`` columns of 4 values, each a noisy copy of an earlier random column."""
    rng = np.random.default_rng(seed)
    values: list[np.ndarray] = []
    for i in range(d):
        if i == 0:
            values.append(rng.integers(0, 4, n))
        else:
            source = values[int(rng.integers(0, i))]
            noise = rng.random(n) < 0.35
            values.append(np.where(noise, rng.integers(0, 4, n), source))
    return pa.table({f"feature_{i:03d}": pa.array(v) for i, v in enumerate(values)})


@pytest.fixture(scope="module")
def sessions() -> pa.Table:
    return shop_sessions(n=4000, seed=5)


@pytest.fixture(scope="module")
def model(sessions: pa.Table) -> treewise.DependencyTree:
    return treewise.DependencyTree(columns=model_columns(sessions)).fit(sessions)


@pytest.fixture(scope="module")
def forest() -> treewise.DependencyTree:
    small = shop_sessions(n=300, seed=2)
    fitted = treewise.DependencyTree(columns=model_columns(small), prune="bic").fit(small)
    assert int((fitted.parent_ < 0).sum()) > 1  # the test needs a real forest
    return fitted


@pytest.fixture(scope="module")
def wide() -> treewise.DependencyTree:
    return treewise.DependencyTree().fit(wide_table())


def labels_of(figure: Figure) -> dict[str, tuple[float, float]]:
    """Each node label of the tree's axes and its position in data coordinates."""
    ax = figure.axes[0]
    return {
        t.get_text(): (float(t.get_position()[0]), float(t.get_position()[1])) for t in ax.texts
    }


def expected_labels(model: treewise.DependencyTree) -> list[str]:
    return [
        f"{n} ({len(c)})" for n, c in zip(model.feature_names_in_, model.categories_, strict=True)
    ]


def lines_of(figure: Figure) -> LineCollection:
    (lines,) = [c for c in figure.axes[0].collections if isinstance(c, LineCollection)]
    return lines


class TextCollector(HTMLParser):
    """The text of every <text> element of an SVG placed in HTML (tooltips left out)."""

    def __init__(self) -> None:
        super().__init__()
        self.open: list[str] = []
        self.texts: list[str] = []
        self.paths = 0

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag in ("text", "title"):
            self.open.append(tag)
        self.paths += tag == "path"

    def handle_endtag(self, tag: str) -> None:
        if tag in ("text", "title") and self.open:
            self.open.pop()

    def handle_data(self, data: str) -> None:
        if self.open and self.open[-1] == "text":
            self.texts.append(data)


def test_every_column_is_a_labelled_box_with_its_cardinality(
    model: treewise.DependencyTree,
) -> None:
    figure = plot_tree(model)
    assert sorted(labels_of(figure)) == sorted(expected_labels(model))
    # One line per edge, and a colour bar (a second axes) for the strength scale.
    assert len(lines_of(figure).get_segments()) == model.n_features_in_ - 1
    assert len(figure.axes) == 2
    assert "mutual information" in figure.axes[1].get_ylabel()


@pytest.mark.parametrize("orient", ["down", "right"])
def test_children_sit_one_layer_beyond_their_parents(
    model: treewise.DependencyTree, orient: str
) -> None:
    where = labels_of(plot_tree(model, orient=orient))
    labels = expected_labels(model)
    axis = 1 if orient == "down" else 0  # layers go down (y) or right (x)
    layer = sorted({round(p[axis], 9) for p in where.values()})
    step = layer[1] - layer[0]
    for child, parent in enumerate(model.parent_):
        if parent >= 0:
            gap = where[labels[child]][axis] - where[labels[int(parent)]][axis]
            assert gap == pytest.approx(step)


def test_wider_and_darker_lines_mean_more_mutual_information(
    model: treewise.DependencyTree,
) -> None:
    lines = lines_of(plot_tree(model))
    chosen = select_edges(model)
    strength = np.array([model.mutual_info_[c] for _, c in chosen.edges])
    widths = np.asarray(lines.get_linewidths())
    darkness = 1.0 - np.asarray(lines.get_colors())[:, :3].mean(axis=1)
    order = np.argsort(strength)
    assert np.all(np.diff(widths[order]) >= 0)
    assert np.all(np.diff(darkness[order]) >= -1e-9)
    assert widths[order[-1]] > 3 * widths[order[0]]


def test_the_figure_saves_as_svg_and_png(model: treewise.DependencyTree, tmp_path: Path) -> None:
    figure = plot_tree(model)
    figure.savefig(tmp_path / "tree.png")
    figure.savefig(tmp_path / "tree.svg")
    png = (tmp_path / "tree.png").read_bytes()
    assert png.startswith(b"\x89PNG\r\n\x1a\n") and len(png) > 20_000
    assert ET.parse(tmp_path / "tree.svg").getroot().tag == f"{SVG}svg"
    # With text kept as text, every label is an SVG <text> element.
    with matplotlib.rc_context({"svg.fonttype": "none"}):
        figure.savefig(tmp_path / "text.svg")
    root = ET.parse(tmp_path / "text.svg").getroot()
    texts = {"".join(t.itertext()) for t in root.iter(f"{SVG}text")}
    assert set(expected_labels(model)) <= texts


def test_inline_svg_keeps_labels_as_text_and_refers_to_nothing(
    model: treewise.DependencyTree,
) -> None:
    svg = figure_svg(plot_tree(model))
    assert svg.startswith("<svg ") and svg.endswith("</svg>")
    assert "http" not in svg and "<?xml" not in svg and "DOCTYPE" not in svg
    collected = TextCollector()
    collected.feed(svg)
    assert set(expected_labels(model)) <= set(collected.texts)
    assert collected.paths >= model.n_features_in_ - 1  # edges and boxes are drawn
    assert figure_svg(plot_tree(model)) == svg  # the same bytes on every run


def test_a_forest_draws_every_tree(forest: treewise.DependencyTree) -> None:
    figure = plot_tree(forest)
    n_edges = int((forest.parent_ >= 0).sum())
    n_roots = forest.n_features_in_ - n_edges
    assert sorted(labels_of(figure)) == sorted(expected_labels(forest))
    assert len(lines_of(figure).get_segments()) == n_edges
    assert figure.axes[0].get_title(loc="left") == f"A forest of {n_roots} trees"
    # Every root starts a tree at the first layer.
    chosen = select_edges(forest)
    assert {n for n in chosen.nodes if chosen.depth[n] == 0} == set(
        np.flatnonzero(forest.parent_ < 0).tolist()
    )


def test_only_the_strongest_edges(model: treewise.DependencyTree) -> None:
    figure = plot_tree(model, max_edges=5)
    strongest = np.argsort(-model.mutual_info_, kind="stable")[:5]
    chosen = select_edges(model, max_edges=5)
    assert sorted(c for _, c in chosen.edges) == sorted(strongest.tolist())
    assert len(lines_of(figure).get_segments()) == 5
    assert set(chosen.nodes) == {n for edge in chosen.edges for n in edge}
    assert "5 of 24 edges" in figure.axes[0].get_title(loc="left")


def test_a_threshold_and_a_subtree(model: treewise.DependencyTree) -> None:
    threshold = float(np.median(model.mutual_info_[model.parent_ >= 0]))
    chosen = select_edges(model, min_mutual_info=threshold)
    assert all(model.mutual_info_[c] >= threshold for _, c in chosen.edges)
    assert len(chosen.edges) == int(np.sum(model.mutual_info_[model.parent_ >= 0] >= threshold))

    names = list(model.feature_names_in_)
    top = "pages_viewed"
    below = {names.index(top)}
    grew = True
    while grew:
        more = {c for c, p in enumerate(model.parent_) if p in below} - below
        grew, below = bool(more), below | more
    figure = plot_tree(model, subtree=top)
    assert set(labels_of(figure)) == {expected_labels(model)[n] for n in below}
    assert select_edges(model, subtree=top).depth[names.index(top)] == 0
    assert "below pages_viewed" in figure.axes[0].get_title(loc="left")


def test_nothing_left_to_draw(model: treewise.DependencyTree) -> None:
    figure = plot_tree(model, min_mutual_info=1e9)
    assert [t.get_text() for t in figure.axes[0].texts] == ["No edge passes the filters"]


def test_two_hundred_columns(wide: treewise.DependencyTree, tmp_path: Path) -> None:
    whole = plot_tree(wide)
    assert len(labels_of(whole)) == 200
    width, height = whole.get_size_inches()
    assert width < 80 and height < 80  # a big picture, not an absurd one
    backbone = plot_tree(wide, max_edges=40)
    assert len(lines_of(backbone).get_segments()) == 40
    backbone.savefig(tmp_path / "backbone.png")
    assert (tmp_path / "backbone.png").stat().st_size > 20_000


def test_draws_into_given_axes(model: treewise.DependencyTree) -> None:
    figure = Figure(figsize=(12, 8))
    ax = figure.add_subplot(1, 2, 1)
    assert plot_tree(model, ax=ax, max_edges=6) is figure
    assert len(ax.texts) == len(select_edges(model, max_edges=6).nodes)


def test_names_are_drawn_literally() -> None:
    table = pa.table(
        {
            "price $usd$": ["a", "b", "a", "b"] * 5,
            "<b>&amp</b>": ["x", "y", "x", "y"] * 5,
        }
    )
    model = treewise.DependencyTree().fit(table)
    figure = plot_tree(model)
    assert set(labels_of(figure)) == {"price $usd$ (2)", "<b>&amp</b> (2)"}
    svg = figure_svg(figure)
    assert "&lt;b&gt;&amp;amp&lt;/b&gt; (2)" in svg and "<b>" not in svg


def test_bad_arguments(model: treewise.DependencyTree) -> None:
    with pytest.raises(ValueError, match="max_edges"):
        plot_tree(model, max_edges=-1)
    with pytest.raises(ValueError, match="min_mutual_info"):
        plot_tree(model, min_mutual_info=float("nan"))
    with pytest.raises(ValueError, match="orient"):
        plot_tree(model, orient="up")
    with pytest.raises(KeyError, match="colour"):
        plot_tree(model, subtree="colour")
    with pytest.raises(treewise.NotFittedError):
        plot_tree(treewise.DependencyTree())


def test_a_conditional_table_as_svg() -> None:
    rng = np.random.default_rng(1)
    joint = rng.integers(0, 50, (20, 18)).astype(np.uint64)
    joint[3] = 0  # a parent value never seen is left out
    parents = [f"p{i}" for i in range(20)]
    children = [f"<c{j}>" for j in range(18)]
    svg = conditional_svg(joint, parents, children, "P(<c> | p)")
    collected = TextCollector()
    collected.feed(svg)
    assert svg.count("<rect ") == 14 * 14  # the 13 most common of each side, and the rest
    assert "(6 others)" in collected.texts and "(5 others)" in collected.texts
    assert "p3" not in collected.texts
    assert "<c" not in svg and sum(t.startswith("<c") for t in collected.texts) == 13
    # Each row's cells hold P(child | parent): the tooltips of a row add up to one.
    shares = [float(x) for x in re.findall(r"\| p0\) = ([0-9.]+)", svg)]
    assert len(shares) == 14 and sum(shares) == pytest.approx(1.0, abs=0.01)
