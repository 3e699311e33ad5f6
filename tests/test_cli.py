"""The ``treewise`` command end to end: every subcommand in a subprocess, on small invented data."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.feather as feather
import pyarrow.parquet as pq
import pytest
import treewise
from treewise.cli import main
from treewise.datasets import hidden_edges, model_columns, shop_sessions

N = 20_000
COLUMNS = ["device", "browser_family", "os_family", "hour_bucket", "referrer_kind", "cart_add"]


def run(*args: str | Path, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    """Run ``python -m treewise.cli ARGS`` and capture its output."""
    return subprocess.run(
        [sys.executable, "-m", "treewise.cli", *map(str, args)],
        capture_output=True,
        text=True,
        cwd=cwd,
        check=False,
        timeout=300,
    )


def ok(*args: str | Path, cwd: Path | None = None) -> str:
    """Run a command that must succeed; its stdout with whitespace runs collapsed to one space."""
    result = run(*args, cwd=cwd)
    assert result.returncode == 0, result.stderr
    assert "Traceback" not in result.stderr
    return " ".join(result.stdout.split())


def one_error_line(result: subprocess.CompletedProcess[str], status: int) -> str:
    """Check a failure: the exit status, and one line on stderr starting with ``error:``."""
    assert result.returncode == status, (result.stdout, result.stderr)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("error: ")
    assert "Traceback" not in result.stderr
    return lines[0]


@pytest.fixture(scope="module")
def sessions() -> pa.Table:
    return shop_sessions(N, seed=21)


@pytest.fixture(scope="module")
def data(tmp_path_factory: pytest.TempPathFactory, sessions: pa.Table) -> dict[str, Path | str]:
    """The same sessions as one Parquet file, a directory of parts, CSV and Arrow IPC."""
    root = tmp_path_factory.mktemp("data")
    single = root / "sessions.parquet"
    pq.write_table(sessions, single)
    parts = root / "parts"
    parts.mkdir()
    bounds = [0, 7_000, 13_000, N]
    for k in range(3):
        chunk = sessions.slice(bounds[k], bounds[k + 1] - bounds[k])
        pq.write_table(chunk, parts / f"part-{k}.parquet")
    # CSV has no dictionary type: write the categorical columns as plain strings.
    plain = pa.table(
        {
            name: column.cast(pa.string()) if pa.types.is_dictionary(column.type) else column
            for name, column in zip(sessions.column_names, sessions.columns, strict=True)
        }
    )
    csv = root / "sessions.csv"
    pacsv.write_csv(plain, csv)
    ipc = root / "sessions.arrow"
    feather.write_feather(sessions, ipc, compression="uncompressed")
    return {
        "file": single,
        "directory": parts,
        "glob": str(parts / "part-*.parquet"),
        "csv": csv,
        "ipc": ipc,
    }


@pytest.fixture(scope="module")
def model_file(tmp_path_factory: pytest.TempPathFactory, data: dict[str, Path | str]) -> Path:
    path = tmp_path_factory.mktemp("model") / "shop.treewise"
    ok("fit", data["file"], "-o", path, "--columns", ",".join(COLUMNS), "--no-progress")
    return path


# -- fit ---------------------------------------------------------------------------------------


def test_fit_prints_a_summary_and_saves_the_model(
    tmp_path: Path, data: dict[str, Path | str], sessions: pa.Table
) -> None:
    path = tmp_path / "all.treewise"
    columns = model_columns(sessions)
    out = ok("fit", data["file"], "-o", path, "--columns", ",".join(columns), "--no-progress")
    model = treewise.load(path)
    assert list(model.feature_names_in_) == columns
    assert model.n_rows_ == N
    assert f"Fitted {N:,} rows x {len(columns)} columns: {len(columns) - 1} edges" in out
    # The five strongest edges, by name, in the summary table.
    assert "Strongest dependencies (top 5 of 24 edges)" in out
    for edge in model.edges().sort_by([("mutual_info", "descending")]).slice(0, 5).to_pylist():
        assert re.search(
            rf"{edge['parent']} .{{0,3}} {edge['child']} .*{edge['mutual_info']:.4f}", out
        )
    assert f"Saved the model to {path}" in out


@pytest.mark.parametrize("form", ["directory", "glob", "csv", "ipc"])
def test_every_input_form_gives_the_same_tree(
    tmp_path: Path, data: dict[str, Path | str], model_file: Path, form: str
) -> None:
    path = tmp_path / f"{form}.treewise"
    ok("fit", data[form], "-o", path, "--columns", ",".join(COLUMNS), "--no-progress")
    model, expected = treewise.load(path), treewise.load(model_file)
    assert model.n_rows_ == N
    np.testing.assert_array_equal(model.parent_, expected.parent_)
    np.testing.assert_allclose(model.mutual_info_, expected.mutual_info_, rtol=1e-12)


def test_several_inputs_are_fitted_together(tmp_path: Path, data: dict[str, Path | str]) -> None:
    path = tmp_path / "twice.treewise"
    ok("fit", data["file"], data["ipc"], "-o", path, "--columns", ",".join(COLUMNS))
    assert treewise.load(path).n_rows_ == 2 * N


def test_fit_options_reach_the_model(tmp_path: Path, data: dict[str, Path | str]) -> None:
    path = tmp_path / "options.treewise"
    ok(
        "fit",
        data["file"],
        "-o",
        path,
        "--columns",
        "device,os_family,session_seconds,cart_add,region",
        "--exclude",
        "region",
        "--max-categories",
        "4",
        "--bins",
        "3",
        "--alpha",
        "1.5",
        "--root",
        "cart_add",
        "--batch-rows",
        "999",
        "--no-progress",
    )
    model = treewise.load(path)
    assert list(model.feature_names_in_) == ["device", "os_family", "session_seconds", "cart_add"]
    assert model.alpha == 1.5
    assert model.parent_[3] == -1  # the root
    assert len(model.categories_[1]) == 4  # os_family capped: 3 values and "other"
    assert len(model.categories_[2]) == 3  # session_seconds in three bins


def test_fit_prunes_to_a_forest(tmp_path: Path, data: dict[str, Path | str]) -> None:
    # weekday_bucket and site_language hang on different, weakly related parts of the hidden tree.
    columns = "device,browser_family,weekday_bucket,support_chat"
    tree, forest = tmp_path / "tree.treewise", tmp_path / "forest.treewise"
    ok("fit", data["file"], "-o", tree, "--columns", columns, "--no-progress")
    ok("fit", data["file"], "-o", forest, "--columns", columns, "--prune", "bic", "--no-progress")
    full, pruned = treewise.load(tree), treewise.load(forest)
    expected = treewise.DependencyTree(columns=columns.split(","), prune="bic")
    expected.fit(data["file"])
    assert list(pruned.parent_) == list(expected.parent_)
    assert (full.parent_ == -1).sum() == 1
    # A forest came out: more than one root, and still at least one edge.
    assert 1 < (pruned.parent_ == -1).sum() < len(pruned.parent_)
    # device - browser_family is an edge of the hidden tree and far too strong to prune.
    kept = {frozenset((r["parent"], r["child"])) for r in pruned.edges().to_pylist()}
    assert frozenset(("device", "browser_family")) in kept
    bad = run("fit", data["file"], "-o", tmp_path / "x.treewise", "--prune", "1.5")
    assert bad.returncode == 2 and "--prune" in bad.stderr


def test_fit_warns_on_one_line_when_values_are_capped(
    tmp_path: Path, data: dict[str, Path | str]
) -> None:
    path = tmp_path / "capped.treewise"
    result = run("fit", data["file"], "-o", path, "--columns", "device,os_family")
    assert result.returncode == 0, result.stderr
    assert result.stderr == ""
    result = run(
        "fit", data["file"], "-o", path, "--columns", "device,os_family", "--max-categories", "3"
    )
    assert result.returncode == 0, result.stderr
    warning = [line for line in result.stderr.splitlines() if line.startswith("warning: ")]
    assert len(warning) == 1 and "os_family" in warning[0]


# -- score -------------------------------------------------------------------------------------


def test_score_writes_scores_keys_and_surprisal(
    tmp_path: Path, data: dict[str, Path | str], model_file: Path, sessions: pa.Table
) -> None:
    out_path = tmp_path / "scores.parquet"
    out = ok(
        "score",
        model_file,
        data["directory"],
        "-o",
        out_path,
        "--key",
        "session_id",
        "--key",
        "planted_anomaly",
        "--surprisal",
        "--top",
        "4",
        "--no-progress",
    )
    scores = pq.read_table(out_path)
    expected_columns = ["session_id", "planted_anomaly", "score"] + [
        f"surprisal_{c}" for c in COLUMNS
    ]
    assert scores.column_names == expected_columns
    assert scores["session_id"].equals(sessions["session_id"])
    model = treewise.load(model_file)
    np.testing.assert_allclose(
        scores["score"].to_numpy(), model.score_samples(sessions), rtol=1e-12
    )
    surprisal = model.surprisal(sessions)
    for column in COLUMNS:
        np.testing.assert_allclose(
            scores[f"surprisal_{column}"].to_numpy(), surprisal[column].to_numpy(), rtol=1e-12
        )

    assert f"Scored {N:,} rows and wrote {out_path}" in out
    assert "The 4 most surprising rows" in out
    assert "evidence, not a verdict" in out and "a score alone" in out
    # The first row shown has the lowest score (one of them, if tied); then its session id and
    # its three most surprising columns.
    first = re.search(r"│ +([\d,]+) │ (\d+) +│", out)
    assert first is not None
    worst = int(first.group(1).replace(",", ""))
    assert scores["score"][worst].as_py() == min(scores["score"].to_pylist())
    assert first.group(2) == str(sessions["session_id"][worst].as_py())
    row = {column: surprisal[column][worst].as_py() for column in COLUMNS}
    for column in sorted(row, key=lambda c: -row[c])[:3]:
        assert f"{column} {row[column]:.1f}" in out


def test_score_without_surprisal_or_top(
    tmp_path: Path, data: dict[str, Path | str], model_file: Path
) -> None:
    out_path = tmp_path / "plain.parquet"
    out = ok("score", model_file, data["csv"], "-o", out_path, "--top", "0")
    assert pq.read_schema(out_path).names == ["score"]
    assert "most surprising" not in out
    assert "evidence, not a verdict" in out


# -- sample ------------------------------------------------------------------------------------


def test_sample_is_reproducible_and_cautious(tmp_path: Path, model_file: Path) -> None:
    first, second = tmp_path / "a.parquet", tmp_path / "b.parquet"
    out = ok("sample", model_file, "-n", "5000", "-o", first, "--seed", "7", "--no-progress")
    ok("sample", model_file, "--rows", "5000", "--output", second, "--seed", "7")
    a, b = pq.read_table(first), pq.read_table(second)
    assert a.num_rows == 5000 and a.equals(b)
    assert a.column_names == COLUMNS
    assert f"Wrote 5,000 synthetic rows to {first}" in out and "(seed 7)" in out
    assert "reveal rare records" in out and "privacy law" in out


def test_sample_without_a_seed_prints_the_one_it_used(tmp_path: Path, model_file: Path) -> None:
    first, second = tmp_path / "a.parquet", tmp_path / "b.parquet"
    out = ok("sample", model_file, "-n", "3000", "-o", first)
    match = re.search(r"\(seed (\d+)\)", out)
    assert match is not None
    ok("sample", model_file, "-n", "3000", "-o", second, "--seed", match.group(1))
    assert pq.read_table(first).equals(pq.read_table(second))


# -- show --------------------------------------------------------------------------------------


def test_show_draws_the_tree(model_file: Path) -> None:
    result = run("show", model_file)
    assert result.returncode == 0, result.stderr
    model = treewise.load(model_file)
    lines = result.stdout.splitlines()
    for i, name in enumerate(COLUMNS):
        line = next(line for line in lines if re.search(rf"\b{name}\b", line))
        assert f"{len(model.categories_[i])} categories" in line
        if model.parent_[i] >= 0:
            assert f"MI {model.mutual_info_[i]:.4f}" in line
        else:
            assert "root" in line
    # A child is indented deeper than its parent.
    depth = {name: next(ln.index(name) for ln in lines if f" {name} " in ln) for name in COLUMNS}
    for child, parent in enumerate(model.parent_):
        if parent >= 0:
            assert depth[COLUMNS[child]] > depth[COLUMNS[parent]]


def test_show_json(model_file: Path) -> None:
    result = run("show", model_file, "--json")
    assert result.returncode == 0, result.stderr
    shown = json.loads(result.stdout)
    model = treewise.load(model_file)
    assert shown["columns"] == COLUMNS
    assert shown["cardinalities"] == [len(c) for c in model.categories_]
    assert shown["parent"] == [COLUMNS[p] if p >= 0 else None for p in model.parent_]
    assert shown["n_rows"] == N
    edges = model.edges().to_pylist()
    assert len(shown["edges"]) == len(edges) == len(COLUMNS) - 1
    for got, want in zip(shown["edges"], edges, strict=True):
        assert set(got) == {"parent", "child", "mutual_info", "g_statistic", "dof", "p_value"}
        assert got == want


# -- report ------------------------------------------------------------------------------------
# In-process (treewise.cli.main), to spare the start-up of a new interpreter per call.


def report(capsys: pytest.CaptureFixture[str], *args: str | Path) -> tuple[int, str, str]:
    """Run ``treewise report ARGS`` in this process: exit status, stdout, stderr."""
    status = main(["report", *map(str, args)])
    captured = capsys.readouterr()
    return status, " ".join(captured.out.split()), captured.err


def test_report_with_data(
    tmp_path: Path,
    data: dict[str, Path | str],
    model_file: Path,
    sessions: pa.Table,
    capsys: pytest.CaptureFixture[str],
) -> None:
    out_path = tmp_path / "report.html"
    args = ["--key", "session_id", "--top", "4", "--synthetic-rows", "3000", "--heatmaps", "2"]
    status, out, err = report(capsys, model_file, data["directory"], "-o", out_path, *args)
    assert status == 0, err
    assert f"Wrote the report to {out_path}" in out
    page = out_path.read_text("utf-8")
    assert "<title>Dependency tree report: shop.treewise</title>" in page
    for anchor in ("summary", "tree", "edges", "conditional", "marginals", "scores"):
        assert f'<section id="{anchor}">' in page
    assert page.count("<details>") == 4  # one per surprising row
    assert page.count('<svg width="') == 2  # the heat maps
    model = treewise.load(model_file)
    worst = int(np.argmin(model.score_samples(sessions)))
    assert f"<td class=n>{worst:,}</td>" in page
    assert "http://" not in page and "https://" not in page


def test_report_without_data(
    tmp_path: Path, model_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_path = tmp_path / "plain.html"
    status, _, err = report(
        capsys, model_file, "-o", out_path, "--title", "Shop <tree>", "--heatmaps", "0"
    )
    assert status == 0, err
    page = out_path.read_text("utf-8")
    assert "<title>Shop &lt;tree&gt;</title>" in page
    assert 'id="scores"' not in page and 'id="conditional"' not in page
    assert '<section id="cautions">' in page


def test_report_errors(
    tmp_path: Path, model_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    status, _, err = report(capsys, model_file, "-o", tmp_path / "r.html", "--key", "session_id")
    assert status == 2 and err.startswith("error: --key needs DATA")
    status, _, err = report(capsys, model_file, "-o", tmp_path / "no" / "r.html")
    assert status == 1 and "does not exist" in err and len(err.splitlines()) == 1
    assert not list(tmp_path.iterdir())


# -- demo --------------------------------------------------------------------------------------


def test_demo_tells_the_whole_story(tmp_path: Path) -> None:
    folder = tmp_path / "demo"
    out = ok("demo", "--rows", "20000", "--dir", folder, "--seed", "2", "--no-progress")
    match = re.search(r"Recovered (\d+) of (\d+) hidden edges", out)
    assert match is not None and int(match.group(2)) == len(hidden_edges())
    assert int(match.group(1)) >= 0.8 * len(hidden_edges())
    for name in (
        "sessions",
        "shop.treewise",
        "scores.parquet",
        "synthetic.parquet",
        "report.html",
        "week2",
        "changes.html",
    ):
        assert (folder / name).exists()
        assert str(folder / name) in out
    assert len(list((folder / "sessions").glob("*.parquet"))) == 8
    model = treewise.load(folder / "shop.treewise")
    assert model.n_rows_ == 20_000
    assert pq.read_metadata(folder / "scores.parquet").num_rows == 20_000
    assert pq.read_metadata(folder / "synthetic.parquet").num_rows == 200_000
    caught = re.search(r"Of (\d+) planted anomalies, (\d+) rank among the (\d+) most", out)
    assert caught is not None
    assert int(caught.group(1)) == 40 and int(caught.group(3)) == 200
    assert 0 < int(caught.group(2)) <= 40
    assert "Largest absolute difference over the 24 edges" in out
    assert "evidence, not a verdict" in out and "reveal rare records" in out
    assert f"treewise show {folder / 'shop.treewise'}" in out
    page = (folder / "report.html").read_text("utf-8")
    for anchor in ("tree", "edges", "scores", "surprising", "synthetic", "cautions"):
        assert f'<section id="{anchor}">' in page
    assert "<th>session_id</th>" in page
    # The second week's broken tag (datasets.shop_sessions_broken_tag) is the top change.
    assert "A second week of 5,000 sessions: what changed?" in out
    assert re.search(r"Columns: 1 of 25 changed .* cart_add ", out), out
    assert "'cart_add' changed most where browser_family=safari" in out
    assert re.search(r"tree edges changed .* (product_views -> cart_add|cart_add ->)", out)
    changes = (folder / "changes.html").read_text("utf-8")
    for anchor in ("trees", "columns", "edges", "where", "rows", "cautions"):
        assert f'<section id="{anchor}">' in changes
    # A second run over the same folder replaces its own files.
    ok("demo", "--rows", "500", "--dir", folder, "--no-progress")
    assert treewise.load(folder / "shop.treewise").n_rows_ == 500


def test_demo_refuses_a_folder_with_other_files(tmp_path: Path) -> None:
    (tmp_path / "sessions").mkdir()
    (tmp_path / "sessions" / "mine.parquet").write_bytes(b"")
    line = one_error_line(run("demo", "--rows", "100", "--dir", tmp_path), 1)
    assert "mine.parquet" in line


def test_make_demo_runs_the_demo_command(tmp_path: Path) -> None:
    # The Makefile's demo target runs `python -m treewise.cli demo`.
    result = subprocess.run(
        [sys.executable, "-m", "treewise.cli", "demo", "--rows", "300", "--dir", str(tmp_path)],
        capture_output=True,
        text=True,
        check=False,
        timeout=300,
    )
    assert result.returncode == 0, result.stderr
    assert "Recovered" in result.stdout
    assert (tmp_path / "shop.treewise").exists()


# -- errors ------------------------------------------------------------------------------------


def test_missing_data_file(tmp_path: Path) -> None:
    missing = tmp_path / "nowhere.parquet"
    line = one_error_line(run("fit", missing, "-o", tmp_path / "m.treewise"), 1)
    assert "nowhere.parquet" in line
    assert not (tmp_path / "m.treewise").exists()


def test_missing_model_file(tmp_path: Path) -> None:
    line = one_error_line(run("show", tmp_path / "absent.treewise"), 1)
    assert "absent.treewise" in line


def test_corrupt_model_file(tmp_path: Path, model_file: Path) -> None:
    bad = tmp_path / "bad.treewise"
    bad.write_bytes(model_file.read_bytes()[:-7])
    for args in (["show", bad], ["sample", bad, "-n", "5", "-o", tmp_path / "x.parquet"]):
        line = one_error_line(run(*args), 1)
        assert "model" in line and "bad.treewise" in line


def test_unknown_column(tmp_path: Path, data: dict[str, Path | str]) -> None:
    result = run("fit", data["file"], "-o", tmp_path / "m.treewise", "--columns", "device,colour")
    assert "colour" in one_error_line(result, 1)


def test_output_folder_must_exist(tmp_path: Path, data: dict[str, Path | str]) -> None:
    result = run("fit", data["file"], "-o", tmp_path / "no" / "such" / "m.treewise")
    assert "does not exist" in one_error_line(result, 1)


@pytest.mark.parametrize(
    "args",
    [
        ["fit", "x.parquet", "-o", "m.treewise", "--bogus"],
        ["fit", "x.parquet"],  # no -o
        ["fit", "x.parquet", "-o", "m.treewise", "--bins", "zero"],
        ["fit", "x.parquet", "-o", "m.treewise", "--columns", "a,,b"],
        ["sample", "m.treewise", "-n", "-3", "-o", "s.parquet"],
        ["score", "m.treewise", "-o", "s.parquet"],  # no data
        ["frobnicate"],
    ],
)
def test_usage_errors_exit_2(tmp_path: Path, args: list[str]) -> None:
    result = run(*args, cwd=tmp_path)
    one_error_line(result, 2)


def test_exclude_alone_leaves_columns_of_the_data_out(
    tmp_path: Path, data: dict[str, Path | str], sessions: pa.Table
) -> None:
    path = tmp_path / "m.treewise"
    ok("fit", data["directory"], "-o", path, "--exclude", "session_id,planted_anomaly")
    assert list(treewise.load(path).feature_names_in_) == model_columns(sessions)
    result = run("fit", data["file"], "-o", path, "--exclude", "session_id,colour")
    assert "colour" in one_error_line(result, 1)


def test_debug_shows_the_traceback(tmp_path: Path) -> None:
    result = run("--debug", "show", tmp_path / "absent.treewise")
    assert result.returncode == 1
    assert "Traceback" in result.stderr and "FileNotFoundError" in result.stderr


@pytest.mark.parametrize("command", ["fit", "score", "sample", "show", "report", "demo"])
def test_every_subcommand_has_an_example(command: str) -> None:
    result = run(command, "--help")
    assert result.returncode == 0
    assert "Example" in result.stdout and f"treewise {command}" in result.stdout


def test_version() -> None:
    assert ok("--version") == f"treewise, version {treewise.__version__}"
