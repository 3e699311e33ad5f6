"""`treewise compare` end to end: the terminal summary, --json, and the HTML page in a browser."""

from __future__ import annotations

import json
import re
import struct
import subprocess
import sys
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import treewise
from test_report import Page, Rendered, assert_offline, body_rows, browse, cells
from treewise.datasets import model_columns, shop_sessions, shop_sessions_broken_tag

N = 20_000
TOP = 6
EXCLUDE = "session_id,planted_anomaly"


def run(*args: str | Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "treewise.cli", *map(str, args)],
        capture_output=True,
        text=True,
        check=False,
        timeout=300,
    )


@pytest.fixture(scope="module")
def weeks(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    folder = tmp_path_factory.mktemp("weeks")
    pq.write_table(shop_sessions(N, seed=0), folder / "week1.parquet")
    # Week two: one broken tag stops cart_add firing for safari (datasets.py).
    week2 = folder / "week2"
    week2.mkdir()
    table = shop_sessions_broken_tag(N, seed=1)
    pq.write_table(table.slice(0, N // 2), week2 / "a.parquet")
    pq.write_table(table.slice(N // 2), week2 / "b.parquet")
    return folder / "week1.parquet", week2


@pytest.fixture(scope="module")
def page_path(weeks: tuple[Path, Path], tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("page") / "changes.html"
    result = run(
        "compare", *weeks, "-o", out, "--exclude", EXCLUDE, "--key", "session_id", "--top", TOP
    )
    assert result.returncode == 0, result.stderr
    assert "Traceback" not in result.stderr
    return out


def test_the_summary_names_the_broken_tag(weeks: tuple[Path, Path], tmp_path: Path) -> None:
    result = run("compare", *weeks, "--exclude", EXCLUDE, "--top", "3", "--no-progress")
    assert result.returncode == 0, result.stderr
    out = " ".join(result.stdout.split())
    assert f"Compared {N:,} current rows with {N:,} reference rows over 25 columns" in out
    assert "Columns: 1 of 25 changed" in out
    assert "'cart_add' changed most where browser_family=safari" in out
    assert "The 3 rows of CUR most unlike REF" in out
    assert "evidence, not a verdict" in out


def test_json_is_complete_and_strict(weeks: tuple[Path, Path]) -> None:
    result = run("compare", *weeks, "--exclude", EXCLUDE, "--json", "--key", "session_id")
    assert result.returncode == 0, result.stderr
    data = json.loads(result.stdout)
    assert data["n_reference"] == data["n_current"] == N
    assert data["correction"] == "holm" and data["level"] == 0.001
    assert data["columns"][0]["column"] == "cart_add" and data["columns"][0]["changed"]
    assert len(data["columns"]) == 25
    assert {e["tree"] for e in data["edges"]} <= {"both", "reference", "current"}
    assert data["drill_down"]["cart_add"][0]["by"] == "browser_family"
    assert len(data["rows"]) == 10 and set(data["rows"][0]) == {"row", "session_id", "score"}
    scores = [r["score"] for r in data["rows"]]
    assert scores == sorted(scores, reverse=True)


def test_saved_models_compare_and_mismatched_ones_are_refused(
    weeks: tuple[Path, Path], tmp_path: Path
) -> None:
    week1, week2 = weeks
    columns = model_columns(pq.read_table(week1))
    ref = treewise.DependencyTree(columns=columns).fit(week1)
    ref.save(tmp_path / "ref.treewise")
    treewise.DependencyTree().fit(week2, codebook=ref).save(tmp_path / "cur.treewise")
    result = run("compare", tmp_path / "ref.treewise", tmp_path / "cur.treewise", "--json")
    assert result.returncode == 0, result.stderr
    assert json.loads(result.stdout)["columns"][0]["column"] == "cart_add"
    # A model against data: the data is counted with the model's codebook.
    result = run("compare", tmp_path / "ref.treewise", week2, "--top", "0", "--no-progress")
    assert result.returncode == 0, result.stderr
    treewise.DependencyTree(columns=columns).fit(week2).save(tmp_path / "other.treewise")
    result = run("compare", tmp_path / "ref.treewise", tmp_path / "other.treewise")
    assert result.returncode == 1
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ")
    assert "pass the data of both sides instead" in lines[0]


def test_the_page_has_every_section_and_stays_offline(page_path: Path) -> None:
    text = page_path.read_text("utf-8")
    assert_offline(text)
    page = Page(text)
    assert page.sections() == ["summary", "trees", "columns", "edges", "where", "rows", "cautions"]
    assert page.facts()["columns changed"] == "1"
    assert cells(body_rows(page.section("columns"))[0])[0] == "cart_add"
    assert len(body_rows(page.section("columns"))) == 25
    assert len(body_rows(page.section("rows"))) == TOP
    where = cells(body_rows(page.section("where"))[0])
    assert where[:2] == ["browser_family", "safari"]
    # Both sides' conditional tables of each changed edge, and both trees.
    assert len(page.section("edges").iter("svg")) == 2 * sum(
        1 for row in body_rows(page.section("edges")) if row.iter("strong")
    )
    assert len(page.section("trees").iter("svg")) == 2
    cautions = page.section("cautions").all_text()
    assert "A score is evidence, not a verdict" in cautions
    assert "personal data" in cautions and "Law and policy come first" in cautions


def test_names_from_the_data_are_escaped(tmp_path: Path) -> None:
    from treewise.views.changes import render_changes_report

    evil = "<script>alert(1)</script>"
    ref = pa.table({evil: ["a", "b"] * 300, "x": ["p", "q", "q", "p"] * 150})
    cur = pa.table({evil: ["a", "a", "a", "b"] * 150, "x": ["p", "q", "q", "p"] * 150})
    comparison = treewise.compare(ref, cur, progress=False)
    text = render_changes_report(comparison, rows=comparison.top_rows(cur, top=3))
    assert "<script>" not in text and "&lt;script&gt;" in text


@pytest.fixture(scope="module")
def rendered(page_path: Path, tmp_path_factory: pytest.TempPathFactory) -> Rendered:
    return browse(page_path, tmp_path_factory.mktemp("browser"), 3000)


def test_the_browser_draws_the_page(rendered: Rendered) -> None:
    page = Page(rendered.dom)
    assert page.sections()[0] == "summary"
    labels = {t.all_text() for t in page.section("trees").iter("text")}
    assert any(label.startswith("cart_add (") for label in labels)
    assert len(page.section("edges").iter("rect")) > 20
    assert "Uncaught" not in rendered.log
    assert not re.search(r":CONSOLE", rendered.log), rendered.log[-2000:]
    data = rendered.screenshot.read_bytes()
    assert data.startswith(b"\x89PNG\r\n\x1a\n")
    assert struct.unpack(">II", data[16:24]) == (1280, 3000)
    assert len(data) > 100_000  # a drawn page, not a blank one
