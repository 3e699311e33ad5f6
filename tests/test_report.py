"""The HTML report and the notebook summary: content, escaping, no network, and a real browser."""

from __future__ import annotations

import os
import re
import shutil
import struct
import subprocess
from dataclasses import dataclass, field
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import treewise
from treewise.datasets import model_columns, shop_sessions
from treewise.views.notebook import model_html
from treewise.views.report import render_report, write_report

N = 4000
TOP = 7


# -- reading the page ------------------------------------------------------------------------


@dataclass
class Element:
    tag: str
    attrs: dict[str, str]
    content: list[Element | str] = field(default_factory=list)  # text and children, in order

    @property
    def children(self) -> list[Element]:
        return [c for c in self.content if isinstance(c, Element)]

    def iter(self, tag: str | None = None) -> list[Element]:
        found = [self] if tag is None or self.tag == tag else []
        for child in self.children:
            found.extend(child.iter(tag))
        return found

    def all_text(self) -> str:
        return "".join(c if isinstance(c, str) else c.all_text() for c in self.content)


VOID = {"meta", "br", "img", "link", "input", "hr", "col", "source", "wbr"}


class Page(HTMLParser):
    """A small DOM from html.parser: enough to count elements and read their text."""

    def __init__(self, text: str) -> None:
        super().__init__()
        self.root = Element("#document", {})
        self.stack = [self.root]
        self.feed(text)
        self.close()

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        element = Element(tag, {k: v or "" for k, v in attrs})
        self.stack[-1].content.append(element)
        if tag not in VOID:
            self.stack.append(element)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.stack[-1].content.append(Element(tag, {k: v or "" for k, v in attrs}))

    def handle_endtag(self, tag: str) -> None:
        for k in range(len(self.stack) - 1, 0, -1):
            if self.stack[k].tag == tag:
                del self.stack[k:]
                return

    def handle_data(self, data: str) -> None:
        self.stack[-1].content.append(data)

    def section(self, anchor: str) -> Element:
        (found,) = [s for s in self.root.iter("section") if s.attrs.get("id") == anchor]
        return found

    def sections(self) -> list[str]:
        return [s.attrs["id"] for s in self.root.iter("section")]

    def facts(self) -> dict[str, str]:
        """The summary's figures, by name."""
        names = [dt.all_text() for dt in self.section("summary").iter("dt")]
        return dict(
            zip(names, [dd.all_text() for dd in self.section("summary").iter("dd")], strict=True)
        )


def body_rows(section: Element) -> list[Element]:
    """The rows of the section's main data table."""
    # The first data table (the synthetic section adds per-column tables after its own).
    table = next(t for t in section.iter("table") if "data" in t.attrs.get("class", ""))
    (body,) = [c for c in table.children if c.tag == "tbody"]
    return [row for row in body.children if row.tag == "tr"]


def cells(row: Element) -> list[str]:
    return [" ".join(c.all_text().split()) for c in row.children if c.tag == "td"]


def assert_offline(text: str) -> None:
    """Nothing in the page is fetched: no URL at all, no src, links only within the page.

    (matplotlib draws a colour bar's gradient as a PNG inside the SVG, as a ``data:`` URI.)
    """
    assert "http://" not in text and "https://" not in text
    page = Page(text)
    for element in page.root.iter():
        assert "src" not in element.attrs, element.tag
        for name in ("href", "xlink:href"):
            if name in element.attrs:
                target = element.attrs[name]
                assert target.startswith(("#", "data:image/png;base64,")), target[:40]
    assert "@import" not in text and "url(http" not in text
    assert not page.root.iter("script") and not page.root.iter("link")


# -- fixtures --------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def sessions() -> pa.Table:
    return shop_sessions(n=N, seed=11)


@pytest.fixture(scope="module")
def model(sessions: pa.Table) -> treewise.DependencyTree:
    return treewise.DependencyTree(columns=model_columns(sessions)).fit(sessions)


@pytest.fixture(scope="module")
def loaded(
    model: treewise.DependencyTree, tmp_path_factory: pytest.TempPathFactory
) -> treewise.DependencyTree:
    path = tmp_path_factory.mktemp("model") / "shop.treewise"
    model.save(path)
    return treewise.load(path)


@pytest.fixture(scope="module")
def with_data(
    loaded: treewise.DependencyTree, sessions: pa.Table, tmp_path_factory: pytest.TempPathFactory
) -> Path:
    """The full report: a loaded model and its data from Parquet files."""
    folder = tmp_path_factory.mktemp("sessions")
    pq.write_table(sessions.slice(0, 1500), folder / "a.parquet")
    pq.write_table(sessions.slice(1500), folder / "b.parquet")
    path = folder.parent / "report.html"
    written = write_report(
        loaded, path, folder, top=TOP, keys=["session_id"], synthetic_rows=20_000, random_state=3
    )
    assert written == path
    return path


# -- without data ----------------------------------------------------------------------------


def test_a_loaded_model_without_data(loaded: treewise.DependencyTree) -> None:
    text = render_report(loaded)
    page = Page(text)
    assert page.sections() == ["summary", "tree", "edges", "conditional", "marginals", "cautions"]
    names = [str(n) for n in loaded.feature_names_in_]
    facts = page.facts()
    assert facts["rows fitted"] == f"{N:,}" and facts["columns"] == "25"
    assert facts["edges"] == "24" and facts["smoothing alpha"] == "0.5"
    assert facts["free parameters"] == f"{loaded.n_parameters_:,}"
    root = names[int(np.flatnonzero(loaded.parent_ < 0)[0])]
    assert facts["pruning"] == "none (one tree)" and facts["root"] == root
    assert "rows of data scored" not in facts

    edges = body_rows(page.section("edges"))
    assert len(edges) == 24
    strongest = loaded.edges().sort_by([("mutual_info", "descending")]).to_pylist()
    for k, (row, edge) in enumerate(zip(edges, strongest, strict=True), start=1):
        rank, parent, child, mi, g, dof, _ = cells(row)
        assert rank == str(k)
        assert (parent, child) == (edge["parent"], edge["child"])
        assert mi == f"{edge['mutual_info']:.4f}" and g == f"{edge['g_statistic']:,.1f}"
        assert dof == str(edge["dof"])

    tree = page.section("tree")
    (svg,) = tree.iter("svg")
    labels = {t.all_text() for t in svg.iter("text")}
    assert {f"{n} ({len(c)})" for n, c in zip(names, loaded.categories_, strict=True)} <= labels
    assert len(svg.iter("path")) > 24

    heatmaps = page.section("conditional").iter("figure")
    assert len(heatmaps) == 6
    first = heatmaps[0]
    table = loaded.joint_counts(strongest[0]["parent"], strongest[0]["child"])
    assert len(first.iter("rect")) == int(np.sum(table.sum(axis=1) > 0)) * table.shape[1]

    cards = [d for d in page.section("marginals").iter("div") if d.attrs.get("class") == "card"]
    assert [c.iter("h3")[0].all_text() for c in cards] == names
    assert_offline(text)


def test_the_marginal_bars_are_the_counts(model: treewise.DependencyTree) -> None:
    page = Page(render_report(model, heatmaps=0))
    assert "conditional" not in page.sections()
    cards = [d for d in page.section("marginals").iter("div") if d.attrs.get("class") == "card"]
    device = cards[0]
    counts = model.marginal_counts("device")
    shares = [f"{c / counts.sum():.1%}" for c in counts]
    rows = [cells(r) for r in device.iter("tr")]
    assert [r[0] for r in rows] == [str(v) for v in model.categories_[0]]
    assert [r[-1] for r in rows] == shares


def test_a_forest_and_an_edge_stability_table(sessions: pa.Table) -> None:
    small = sessions.slice(0, 300)
    forest = treewise.DependencyTree(columns=model_columns(small), prune="bic").fit(small)
    n_edges = int((forest.parent_ >= 0).sum())
    edges = forest.edges().to_pylist()
    stability = pa.table(
        {
            "column_a": [e["parent"] for e in edges[:3]],
            "column_b": [e["child"] for e in edges[:3]],
            "frequency": [0.9, 0.55, 0.125],
            "in_full_tree": [True] * 3,
            "mutual_info": [e["mutual_info"] for e in edges[:3]],
        }
    )
    page = Page(render_report(forest, stability=stability))
    assert page.facts()["pruning"] == f"BIC: {forest.n_features_in_ - n_edges} trees"
    assert "forest" in page.section("tree").all_text()
    rows = body_rows(page.section("edges"))
    assert len(rows) == n_edges
    shown = {(r[1], r[2]): r[-1] for r in map(cells, rows)}
    assert shown[(edges[0]["parent"], edges[0]["child"])] == "90%"
    assert shown[(edges[2]["parent"], edges[2]["child"])] == "12%"
    assert list(shown.values()).count("—") == n_edges - 3
    with pytest.raises(TypeError, match="edge_stability"):
        render_report(forest, stability=pa.table({"a": [1]}))


def test_two_hundred_columns_draw_the_strongest_edges() -> None:
    rng = np.random.default_rng(4)
    base = rng.integers(0, 3, 600)
    table = pa.table(
        {
            f"c{i:03d}": np.where(rng.random(600) < 0.3, rng.integers(0, 3, 600), base)
            for i in range(200)
        }
    )
    model = treewise.DependencyTree().fit(table)
    page = Page(render_report(model, tree_edges=30, heatmaps=2))
    tree = page.section("tree")
    assert "Only the 30 strongest of the 199 edges" in " ".join(tree.all_text().split())
    assert len(body_rows(page.section("edges"))) == 199
    cards = [d for d in page.section("marginals").iter("div") if d.attrs.get("class") == "card"]
    assert len(cards) == 200


def test_names_and_values_are_escaped() -> None:
    hostile = "<script>alert('x')</script>"
    table = pa.table(
        {
            hostile: ["<b>bold</b>", "a&b", '"quoted"', "<b>bold</b>"] * 10,
            "plain": ["x", "y", "z", "x"] * 10,
        }
    )
    model = treewise.DependencyTree().fit(table)
    text = render_report(model, table, top=3, synthetic_rows=500, title="<i>mine</i>")
    assert "<script" not in text and "<b>bold" not in text and "<i>mine" not in text
    assert "&lt;script&gt;alert(&#x27;x&#x27;)&lt;/script&gt;" in text
    assert "&lt;b&gt;bold&lt;/b&gt;" in text and "a&amp;b" in text and "&quot;quoted&quot;" in text
    assert Page(text).root.iter("title")[0].all_text() == "<i>mine</i>"
    assert_offline(text)


# -- with data -------------------------------------------------------------------------------


def test_the_report_with_data(
    with_data: Path, loaded: treewise.DependencyTree, sessions: pa.Table
) -> None:
    text = with_data.read_text("utf-8")
    page = Page(text)
    assert page.sections() == [
        "summary", "tree", "edges", "conditional", "marginals", "scores", "surprising",
        "synthetic", "cautions",
    ]  # fmt: skip
    assert page.facts()["rows of data scored"] == f"{N:,}"
    (histogram,) = page.section("scores").iter("svg")
    assert len(histogram.iter("path")) > 5

    scores = loaded.score_samples(sessions)
    worst = np.argsort(scores, kind="stable")[:TOP]
    rows = body_rows(page.section("surprising"))
    assert len(rows) == TOP
    surprisal = loaded.surprisal(sessions.take(pa.array(worst)))
    names = [str(n) for n in loaded.feature_names_in_]
    for k, (row, r) in enumerate(zip(rows, worst, strict=True)):
        rank, position, session_id, ln_p, why = cells(row)
        assert (rank, position) == (str(k + 1), f"{r:,}")
        assert session_id == str(sessions["session_id"][int(r)].as_py())
        assert ln_p == f"{scores[r]:.2f}"
        leading = max(names, key=lambda n: surprisal[n][k].as_py())
        assert why.startswith(leading)

    comparison = body_rows(page.section("synthetic"))
    assert len(comparison) == 24
    real = treewise.DependencyTree(columns=names).fit(sessions, codebook=loaded)
    first = cells(comparison[0])
    p, c = names.index(first[0]), names.index(first[1])
    assert first[2] == f"{real.pairwise_mutual_info_[p, c]:.4f}"
    for row in comparison:
        _, _, mi_real, mi_fake, _, distance = cells(row)
        assert abs(float(mi_fake) - float(mi_real)) < 0.03  # 20,000 rows keep each dependence
        assert 0.0 <= float(distance) < 0.05
    cautions = " ".join(page.section("cautions").all_text().split())
    assert "No decision about a person" in cautions and "rest on a score alone" in cautions
    assert "reveal real ones" in cautions and "privacy law" in cautions
    assert_offline(text)


def test_a_one_shot_stream_and_no_extras(
    model: treewise.DependencyTree, sessions: pa.Table
) -> None:
    reader = pa.RecordBatchReader.from_batches(
        sessions.schema, sessions.to_batches(max_chunksize=999)
    )
    page = Page(render_report(model, reader, top=0, synthetic_rows=0))
    assert page.sections()[-2:] == ["scores", "cautions"]


def test_data_with_values_the_model_never_saw(
    model: treewise.DependencyTree, sessions: pa.Table
) -> None:
    odd = sessions.slice(0, 500).to_pylist()
    odd[0]["device"] = "smart_fridge"  # device has no "other" code
    table = pa.Table.from_pylist(odd)
    with pytest.warns(treewise.UnseenCategoryWarning, match="device"):
        page = Page(render_report(model, table, top=3, synthetic_rows=2000))
    note = " ".join(page.section("synthetic").all_text().split())
    assert "compared with the fitted counts" in note
    assert len(body_rows(page.section("surprising"))) == 3


def test_written_atomically(model: treewise.DependencyTree, tmp_path: Path) -> None:
    path = tmp_path / "report.html"
    path.write_text("old")
    write_report(model, path, heatmaps=1)
    assert path.read_text("utf-8").startswith("<!DOCTYPE html>")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.html"]
    with pytest.raises(FileNotFoundError):
        write_report(model, tmp_path / "missing" / "report.html")
    with pytest.raises(ValueError, match="top"):
        render_report(model, top=-1)
    with pytest.raises(treewise.NotFittedError):
        render_report(treewise.DependencyTree())


# -- the notebook summary --------------------------------------------------------------------


def test_notebook_summary(model: treewise.DependencyTree) -> None:
    text = model_html(model)
    page = Page(text)
    (svg,) = page.root.iter("svg")
    assert {t.all_text() for t in svg.iter("text")} >= {"device (3)", "os_family (6)"}
    assert "25 columns · 24 edges · 4,000 rows" in text
    assert len(page.root.iter("tr")) == 1 + 5
    assert "<style" not in text and "<script" not in text
    assert_offline(text)
    assert (
        model_html(treewise.DependencyTree(alpha=0.25)) == "<pre>DependencyTree(alpha=0.25)</pre>"
    )


# -- in a real browser -----------------------------------------------------------------------


def chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        found = shutil.which(name)
        if found:
            return found
    return None


@dataclass
class Rendered:
    dom: str
    log: str
    screenshot: Path


def browse(page: Path, folder: Path, height: int) -> Rendered:
    """Open ``page`` in headless chromium: its DOM, its log and a 1280 x ``height`` screenshot."""
    browser = chromium()
    if browser is None:
        pytest.skip("chromium is not installed (CI installs it: apt-get install chromium)")
    shot = folder / "page.png"
    result = subprocess.run(
        [
            browser,
            "--headless=new",
            "--no-sandbox",
            "--disable-gpu",
            "--hide-scrollbars",
            "--no-first-run",
            f"--user-data-dir={folder / 'profile'}",
            "--enable-logging=stderr",
            "--v=0",
            f"--window-size=1280,{height}",
            f"--screenshot={shot}",
            "--dump-dom",
            page.as_uri(),
        ],
        capture_output=True,
        text=True,
        timeout=180,
        check=False,
        env={**os.environ, "LANG": "C.UTF-8"},
    )
    assert result.returncode == 0, result.stderr[-2000:]
    return Rendered(result.stdout, result.stderr, shot)


@pytest.fixture(scope="module")
def rendered(with_data: Path, tmp_path_factory: pytest.TempPathFactory) -> Rendered:
    return browse(with_data, tmp_path_factory.mktemp("browser"), 4000)


def test_the_browser_draws_the_page(rendered: Rendered, loaded: treewise.DependencyTree) -> None:
    page = Page(rendered.dom)
    names = [str(n) for n in loaded.feature_names_in_]
    (tree,) = page.section("tree").iter("svg")
    labels = {t.all_text() for t in tree.iter("text")}
    assert {f"{n} ({len(c)})" for n, c in zip(names, loaded.categories_, strict=True)} <= labels
    assert len(tree.iter("path")) > 24
    assert len(body_rows(page.section("edges"))) == 24
    assert len(body_rows(page.section("surprising"))) == TOP
    assert len(body_rows(page.section("synthetic"))) == 24
    assert len(page.section("conditional").iter("rect")) > 50
    # The browser met no script error and wrote nothing to its console.
    assert "Uncaught" not in rendered.log
    assert not re.search(r":CONSOLE", rendered.log), rendered.log[-2000:]


def test_the_screenshot(rendered: Rendered) -> None:
    data = rendered.screenshot.read_bytes()
    assert data.startswith(b"\x89PNG\r\n\x1a\n")
    width, height = struct.unpack(">II", data[16:24])
    assert (width, height) == (1280, 4000)
    assert len(data) > 150_000  # a drawn page, not a blank one

    from PIL import Image  # matplotlib's own dependency

    image = Image.open(rendered.screenshot).convert("RGB")
    colours = image.resize((320, 1000)).getcolors(maxcolors=1 << 20)
    assert colours is not None and len(colours) > 200
