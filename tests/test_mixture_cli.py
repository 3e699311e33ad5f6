"""`treewise fit --components` and the other commands on a mixture file, in process; the demo's
two-visitor step."""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import treewise
from treewise.cli import main
from treewise.cli.demo import VISITOR_ROWS, visitor_figures
from treewise.cli.mixtures import AUTO_CANDIDATES
from treewise.datasets import model_columns, shop_sessions_with_crawlers
from treewise.mixture import TreeMixture
from treewise.mixture_file import MAGIC

N = 8000
EXCLUDE = "session_id,planted_anomaly,visitor_kind"


def cli(capsys: pytest.CaptureFixture[str], *args: str | Path) -> tuple[int, str, str]:
    """Run the command in process: exit status, stdout with whitespace runs collapsed, stderr."""
    status = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return status, " ".join(out.split()), err.strip()


def ok(capsys: pytest.CaptureFixture[str], *args: str | Path) -> str:
    status, out, err = cli(capsys, *args)
    assert status == 0, err
    return out


def refused(capsys: pytest.CaptureFixture[str], status: int, *args: str | Path) -> str:
    """A failure: its exit status and its one ``error:`` line."""
    got, _, err = cli(capsys, *args)
    assert got == status, err
    assert len(err.splitlines()) == 1 and err.startswith("error: ") and "Traceback" not in err
    return err


@pytest.fixture(scope="module")
def train() -> pa.Table:
    return shop_sessions_with_crawlers(N, seed=3)


@pytest.fixture(scope="module")
def files(train: pa.Table, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("data")
    pq.write_table(train, root / "train.parquet")
    held = shop_sessions_with_crawlers(N // 4, seed=4, anomaly_rate=0.01)
    pq.write_table(held, root / "held.parquet")
    return {"root": root, "train": root / "train.parquet", "held": root / "held.parquet"}


@pytest.fixture(scope="module")
def mixture_file(files: dict[str, Path]) -> Path:
    path = files["root"] / "visitors.treewise"
    assert main(["fit", str(files["train"]), "-o", str(path), "--exclude", EXCLUDE,
                 "--components", "2", "--seed", "7", "--alpha", "0.25"]) == 0  # fmt: skip
    return path


def test_fit_components_writes_the_mixture_the_library_fits(
    mixture_file: Path, files: dict[str, Path], train: pa.Table, capsys: pytest.CaptureFixture[str]
) -> None:
    capsys.readouterr()
    assert mixture_file.read_bytes().startswith(MAGIC)
    loaded = TreeMixture.load(mixture_file)
    direct = TreeMixture(2, columns=model_columns(train), alpha=0.25, random_state=7)
    direct.fit(files["train"])
    # The command is a thin layer: the same file (fitted by streaming EM, as the library fits
    # a file), parameters and seed give the same model.
    np.testing.assert_array_equal(loaded.weights_, direct.weights_)
    for a, b in zip(loaded.components_, direct.components_, strict=True):
        np.testing.assert_array_equal(a.parent_, b.parent_)
    assert loaded.n_rows_ == N and float(loaded.alpha) == 0.25


def test_components_one_writes_an_ordinary_tree(
    files: dict[str, Path], train: pa.Table, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "one.treewise"
    out = ok(capsys, "fit", files["train"], "-o", path, "--exclude", EXCLUDE, "--components", "1")
    assert "K=1 is the single tree" in out
    tree = treewise.load(path)
    direct = treewise.DependencyTree(columns=model_columns(train)).fit(train)
    np.testing.assert_array_equal(tree.parent_, direct.parent_)


def test_auto_prints_every_candidate_and_keeps_a_k_within_noise_of_the_best(
    files: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "auto.treewise"
    out = ok(capsys, "fit", files["train"], "-o", path, "--exclude", EXCLUDE,
             "--components", "auto", "--seed", "1")  # fmt: skip
    assert f"Held out {round(N * 0.2):,} of {N:,} rows (seed 1)" in out
    figures = {
        int(k): float(v)
        for k, v in re.findall(r"│ (\d+) │ +(-\d+\.\d{4}) │ +[+-]\d+\.\d{4} │", out)
    }
    assert sorted(figures) == list(AUTO_CANDIDATES)
    best = max(figures.values())
    top = min(k for k, v in figures.items() if v == best)
    chosen = int(re.findall(r"Chose K=(\d+);", out)[0])
    # The one-standard-error rule keeps the best K or a smaller one close to it.
    assert chosen <= top and figures[chosen] >= best - 0.05
    # Constructed truth: the sessions come from two populations with different trees
    # (datasets.shop_sessions_with_crawlers), so held-out likelihood must prefer K > 1.
    assert chosen > 1
    assert TreeMixture.load(path).weights_.shape == (chosen,)


def test_show_the_mixture(mixture_file: Path, capsys: pytest.CaptureFixture[str]) -> None:
    model = TreeMixture.load(mixture_file)
    out = ok(capsys, "show", mixture_file)
    assert "a mixture of 2 trees over 25 columns, fitted on 8,000 rows" in out
    assert out.count("component 0 (weight") == 1 and out.count("component 1 (weight") == 1
    status = main(["show", str(mixture_file), "--json"])
    data = json.loads(capsys.readouterr().out)
    assert status == 0 and data["kind"] == "mixture"
    names = [str(n) for n in model.feature_names_in_]
    for comp, shown in zip(model.components_, data["components"], strict=True):
        assert shown["weight"] == float(comp.weight)
        assert shown["parent"] == [names[p] if p >= 0 else None for p in comp.parent_]
        assert len(shown["edges"]) == int(np.sum(comp.parent_ >= 0))


def test_score_writes_the_mixtures_own_answers(
    mixture_file: Path, files: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_path = tmp_path / "scored.parquet"
    out = ok(capsys, "score", mixture_file, files["held"], "-o", out_path,
             "--key", "session_id", "--top", "3")  # fmt: skip
    assert "The 3 most surprising rows" in out and "evidence, not a verdict" in out
    scored = pq.read_table(out_path)
    assert scored.column_names == [
        "session_id", "score", "component", "responsibility_0", "responsibility_1",
    ]  # fmt: skip
    model = TreeMixture.load(mixture_file)
    held = pq.read_table(files["held"])
    np.testing.assert_allclose(scored["score"].to_numpy(), model.score_samples(held), rtol=1e-12)
    np.testing.assert_array_equal(scored["component"].to_numpy(), model.predict(held))
    resp = model.predict_proba(held)
    np.testing.assert_allclose(scored["responsibility_1"].to_numpy(), resp[:, 1], rtol=1e-12)
    assert scored["session_id"].equals(held["session_id"])
    out = ok(capsys, "score", mixture_file, files["held"], "-o", out_path, "--surprisal",
             "--top", "2")  # fmt: skip
    assert "most surprising columns" in out
    explained = pq.read_table(out_path)
    expected = model.surprisal(held)
    for name in [str(n) for n in model.feature_names_in_]:
        np.testing.assert_allclose(
            explained[f"surprisal_{name}"].to_numpy(), expected[name].to_numpy(), rtol=1e-12
        )


def test_score_reads_batch_by_batch(
    mixture_file: Path, files: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # Three files, so three batches: the scores, the row numbers of the top rows and the
    # unseen-value warning are those of the whole data.
    held = pq.read_table(files["held"])
    parts = []
    for i, start in enumerate(range(0, held.num_rows, held.num_rows // 3 + 1)):
        path = tmp_path / f"part{i}.parquet"
        pq.write_table(held.slice(start, held.num_rows // 3 + 1), path)
        parts.append(path)
    out_path = tmp_path / "scored.parquet"
    out = ok(capsys, "score", mixture_file, *parts, "-o", out_path, "--top", "4")
    scored = pq.read_table(out_path)
    model = TreeMixture.load(mixture_file)
    expected = model.score_samples(held)
    np.testing.assert_allclose(scored["score"].to_numpy(), expected, rtol=1e-12)
    # A key named like an output column would be overwritten: refused, nothing written.
    clashing = tmp_path / "clash.parquet"
    pq.write_table(held.append_column("component", pa.array(np.zeros(held.num_rows))), clashing)
    err = refused(capsys, 1, "score", mixture_file, clashing, "-o", tmp_path / "no.parquet",
                  "--key", "component")  # fmt: skip
    assert "key columns may not be named ['component']" in err
    assert not (tmp_path / "no.parquet").exists()
    lowest = np.argsort(expected, kind="stable")[:4]
    rows = [int(r.replace(",", "")) for r in re.findall(r"│ +([\d,]+) │ +-\d", out)]
    assert rows == lowest.tolist()


def test_sample_draws_what_the_library_draws(
    mixture_file: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_path = tmp_path / "synthetic.parquet"
    out = ok(capsys, "sample", mixture_file, "-n", "3000", "-o", out_path, "--seed", "5")
    assert "Wrote 3,000 synthetic rows" in out and "reveal rare records" in out
    drawn = TreeMixture.load(mixture_file).sample(3000, random_state=5)
    assert pq.read_table(out_path).equals(drawn)
    err = refused(
        capsys, 2, "sample", mixture_file, "-n", "10", "-o", out_path, "--batch-rows", "5"
    )
    assert "--batch-rows is not available for a mixture sample" in err


def test_report_of_a_mixture(
    mixture_file: Path, files: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    page = tmp_path / "mixture.html"
    out = ok(capsys, "report", mixture_file, files["held"], "-o", page,
             "--key", "session_id", "--typical", "2")  # fmt: skip
    assert f"Wrote the report to {page}" in out
    text = page.read_text("utf-8")
    for anchor in ("summary", "components", "trees", "differing", "rows", "likelihood"):
        assert f'<section id="{anchor}">' in text
    assert "A score is evidence, not a verdict" in text
    assert "Mixture of trees report: visitors.treewise" in text
    err = refused(capsys, 2, "report", mixture_file, "-o", page, "--heatmaps", "3")
    assert "--heatmaps is not available for a mixture report yet" in err


def test_what_a_mixture_cannot_do_yet_is_said(
    mixture_file: Path, files: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    err = refused(capsys, 2, "compare", mixture_file, files["held"])
    assert "is a mixture of trees; compare takes a single tree file" in err
    out = tmp_path / "m.treewise"
    err = refused(
        capsys, 2, "fit", files["train"], "-o", out, "--components", "2", "--prune", "bic"
    )
    assert "--prune is not available with --components yet" in err
    err = refused(capsys, 2, "fit", files["train"], "-o", out, "--seed", "3")
    assert "--seed applies to --components" in err
    err = refused(capsys, 2, "fit", files["train"], "-o", out, "--components", "many")
    assert "give 'auto' or a number of trees from 1 to 1024" in err
    assert not out.exists()
    tree = tmp_path / "tree.treewise"
    ok(capsys, "fit", files["train"], "-o", tree, "--exclude", EXCLUDE)
    err = refused(capsys, 2, "report", tree, "-o", tmp_path / "r.html", "--typical", "3")
    assert "--typical is for a mixture's report" in err


def test_auto_needs_rows_to_hold_out(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    tiny = tmp_path / "tiny.parquet"
    pq.write_table(pa.table({"a": ["x", "y"] * 3, "b": ["p", "q", "q"] * 2}), tiny)
    err = refused(capsys, 1, "fit", tiny, "-o", tmp_path / "m.treewise", "--components", "auto")
    assert "needs at least 10 rows" in err


def test_auto_chooses_on_a_sample_and_fits_all_rows(
    files: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: Any
) -> None:
    from treewise.cli import mixtures

    # Data larger than the sample: K is chosen on a random sample, then fitted to every row.
    monkeypatch.setattr(mixtures, "AUTO_SAMPLE_ROWS", 1_000)
    path = tmp_path / "sampled.treewise"
    out = ok(capsys, "fit", files["train"], "-o", path, "--exclude", EXCLUDE,
             "--components", "auto", "--seed", "2")  # fmt: skip
    assert f"Held out 200 of 1,000 rows (a random sample of the {N:,} rows) (seed 2)" in out
    assert f"refitting it to all {N:,} rows" in out
    chosen = int(re.findall(r"Chose K=(\d+);", out)[0])
    if chosen > 1:
        assert TreeMixture.load(path).n_rows_ == N
    else:
        assert treewise.DependencyTree.load(path).n_rows_ == N


def test_the_demo_mixture_catches_more_hybrids_than_the_tree() -> None:
    # A constructed-truth test: the two populations, their hidden trees and the hybrid
    # anomalies are written down in treewise.datasets.shop_sessions_with_crawlers, so which
    # rows are crawlers and which are planted is known exactly. At the demo's fixed seed and
    # its default size, the mixture must separate the crawlers, explain held-out sessions
    # better, and flag more hybrids than the single tree within the same budget.
    seen = visitor_figures(VISITOR_ROWS[1], seed=0)
    assert seen.crawlers_found > 0.95 and seen.purity > 0.95
    assert seen.mixture_mean > seen.tree_mean
    assert seen.n_planted == round(VISITOR_ROWS[1] // 2 * 0.005)
    assert seen.mixture_caught > seen.tree_caught
