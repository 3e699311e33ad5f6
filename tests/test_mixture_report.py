"""The mixture report: its figures against the model's own answers, escaping, and a real browser."""

from __future__ import annotations

import re
import struct
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
from test_report import Page, Rendered, assert_offline, body_rows, browse, cells
from treewise.datasets import model_columns, shop_sessions_with_crawlers
from treewise.mixture import TreeMixture
from treewise.views.mixture_report import render_mixture_report, write_mixture_report

N = 6000
TYPICAL = 4


@pytest.fixture(scope="module")
def train() -> pa.Table:
    return shop_sessions_with_crawlers(N, seed=5)


@pytest.fixture(scope="module")
def held() -> pa.Table:
    return shop_sessions_with_crawlers(N // 2, seed=6, anomaly_rate=0.01)


@pytest.fixture(scope="module")
def mixture(train: pa.Table) -> TreeMixture:
    return TreeMixture(2, columns=model_columns(train), random_state=0).fit(train)


@pytest.fixture(scope="module")
def loaded(mixture: TreeMixture, tmp_path_factory: pytest.TempPathFactory) -> TreeMixture:
    path = tmp_path_factory.mktemp("mixture") / "visitors.treewise"
    mixture.save(path)
    return TreeMixture.load(path)


@pytest.fixture(scope="module")
def page_path(
    loaded: TreeMixture, train: pa.Table, held: pa.Table, tmp_path_factory: pytest.TempPathFactory
) -> Path:
    path = tmp_path_factory.mktemp("page") / "mixture.html"
    written = write_mixture_report(
        loaded,
        path,
        held,
        typical=TYPICAL,
        keys=["session_id", "visitor_kind"],
        training=train,
        choice={1: -16.0, 2: -15.0, 3: -15.1},
    )
    assert written == path
    return path


def edges_of(parent: np.ndarray, names: list[str]) -> set[frozenset[str]]:
    return {frozenset((names[int(p)], names[c])) for c, p in enumerate(parent) if p >= 0}


def test_the_page_has_every_section_and_stays_offline(page_path: Path) -> None:
    text = page_path.read_text("utf-8")
    assert_offline(text)
    page = Page(text)
    assert page.sections() == [
        "summary",
        "components",
        "trees",
        "differing",
        "rows",
        "likelihood",
        "cautions",
    ]
    assert page.facts()["components"] == "2"
    assert len(page.section("trees").iter("svg")) == 2


def test_the_figures_are_the_models_own(
    page_path: Path, loaded: TreeMixture, train: pa.Table, held: pa.Table
) -> None:
    page = Page(page_path.read_text("utf-8"))
    names = [str(n) for n in loaded.feature_names_in_]
    # Rows explained best: recounted here from predict (the most responsible component).
    best = loaded.predict(held)
    counts = np.bincount(best, minlength=2)
    shared = set.intersection(*(edges_of(c.parent_, names) for c in loaded.components_))
    single = edges_of(loaded.single_tree_.parent_, names)
    rows = [cells(r) for r in body_rows(page.section("components"))]
    for k, row in enumerate(rows):
        comp_edges = edges_of(loaded.components_[k].parent_, names)
        assert row[0] == str(k)
        assert row[1] == f"{loaded.weights_[k]:.3f}"
        assert row[3] == str(len(shared))
        assert row[4] == str(len(comp_edges - single))
        assert row[6] == f"{counts[k]:,} ({counts[k] / len(best):.1%})"
    # The held-out and training means, recomputed from score_samples of both models.
    means = [cells(r) for r in body_rows(page.section("likelihood"))]
    for column, rows in ((1, held), (2, train)):
        mix = float(loaded.score_samples(rows).mean())
        tree = float(loaded.single_tree_.score_samples(rows).mean())
        assert means[0][column] == f"{mix:.4f}" and means[1][column] == f"{tree:.4f}"
        assert means[2][column] == f"{mix - tree:+.4f}"
    assert "this model" in page.section("likelihood").all_text()


def test_differing_edges_are_in_the_component_and_not_in_the_single_tree(
    page_path: Path, loaded: TreeMixture
) -> None:
    page = Page(page_path.read_text("utf-8"))
    names = [str(n) for n in loaded.feature_names_in_]
    single = edges_of(loaded.single_tree_.parent_, names)
    tables = [t for t in page.section("differing").iter("table")]
    assert len(tables) == 2
    for k, table in enumerate(tables):
        (tbody,) = [c for c in table.children if c.tag == "tbody"]
        listed = [cells(r) for r in tbody.children]
        assert listed
        comp = edges_of(loaded.components_[k].parent_, names)
        strengths = [float(r[2]) for r in listed]
        assert strengths == sorted(strengths, reverse=True)
        for parent, child, *_ in listed:
            assert frozenset((parent, child)) in comp - single


def test_typical_rows_belong_to_their_component(
    page_path: Path, loaded: TreeMixture, held: pa.Table
) -> None:
    page = Page(page_path.read_text("utf-8"))
    resp = loaded.predict_proba(held)
    ids = held["session_id"].to_pylist()
    tables = page.section("rows").iter("table")
    assert len(tables) == 2
    for k, table in enumerate(tables):
        (tbody,) = [c for c in table.children if c.tag == "tbody"]
        shown = [cells(r) for r in tbody.children]
        assert len(shown) == TYPICAL
        # The most typical: no other row of the component has a higher responsibility.
        mine = resp[np.argmax(resp, axis=1) == k, k]
        positions = [int(row[0].replace(",", "")) for row in shown]
        assert min(resp[positions, k]) >= np.sort(mine)[-TYPICAL]
        for row in shown:
            r = int(row[0].replace(",", ""))
            assert int(np.argmax(resp[r])) == k
            assert row[1] == f"{resp[r, k]:.3f}"
            assert row[3] == str(ids[r])  # the key, read from the data at that row


def test_the_cautions_of_the_model_report(page_path: Path) -> None:
    cautions = Page(page_path.read_text("utf-8")).section("cautions").all_text()
    text = " ".join(cautions.split())
    assert "A score is evidence, not a verdict" in text
    assert "No decision about a person (to block, flag, refuse or charge them)" in text
    assert "Synthetic rows can reveal real ones" in text
    assert "Law and policy come first" in text
    assert "the most typical ones of each component" in text


def test_without_data_and_escaped_names() -> None:
    evil = "<b>x</b>"
    rng = np.random.default_rng(0)
    a = rng.integers(0, 3, 800)
    table = pa.table(
        {evil: a, "y": (a + (rng.random(800) < 0.1)) % 3, "z": rng.integers(0, 2, 800)}
    )
    model = TreeMixture(2, random_state=1).fit(table)
    text = render_mixture_report(model)
    assert "<b>x</b>" not in text and "&lt;b&gt;x&lt;/b&gt;" in text
    assert Page(text).sections() == ["summary", "components", "trees", "differing", "cautions"]


@pytest.fixture(scope="module")
def rendered(page_path: Path, tmp_path_factory: pytest.TempPathFactory) -> Rendered:
    return browse(page_path, tmp_path_factory.mktemp("browser"), 3000)


def test_the_browser_draws_the_page(rendered: Rendered, loaded: TreeMixture) -> None:
    page = Page(rendered.dom)
    svgs = page.section("trees").iter("svg")
    assert len(svgs) == 2
    names = [str(n) for n in loaded.feature_names_in_]
    cards = [len(c) for c in loaded.single_tree_.categories_]
    for svg in svgs:
        labels = {t.all_text() for t in svg.iter("text")}
        assert {f"{n} ({c})" for n, c in zip(names, cards, strict=True)} <= labels
    assert "Uncaught" not in rendered.log
    assert not re.search(r":CONSOLE", rendered.log), rendered.log[-2000:]
    data = rendered.screenshot.read_bytes()
    assert data.startswith(b"\x89PNG\r\n\x1a\n")
    assert struct.unpack(">II", data[16:24]) == (1280, 3000)
    from PIL import Image  # matplotlib's own dependency

    colours = Image.open(rendered.screenshot).convert("RGB").resize((320, 750)).getcolors(1 << 20)
    assert colours is not None and len(colours) > 200
