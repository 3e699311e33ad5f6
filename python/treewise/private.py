"""The private fit: its passes over the data, the release, and the statement of its guarantee.

The statement is what the model carries as ``privacy_``; the derivations are in docs/privacy.md.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from typing import Any

import pyarrow as pa

from treewise import _core
from treewise.decode import FAMILY_TYPES, family, ordered_levels
from treewise.domains import DomainLearner, build_codebook, check_domains, family_of
from treewise.errors import DataError, SchemaError
from treewise.noise import IntegerSource
from treewise.passes import TypeRecorder, count_pairs
from treewise.privacy import Plan, plan_budget, release_model, score_sensitivity
from treewise.progress import PassProgress
from treewise.sources import BatchLoop, Source

__all__ = [
    "CAUTIONS",
    "check_public",
    "count_private",
    "guarantee_lines",
    "private_model",
    "statement",
]

#: What a private model's statement says beside its guarantee (README, report and `show`).
CAUTIONS = (
    "Differential privacy bounds how much any one row can change what is released; it does "
    "not make the data non-personal in every legal sense. A small epsilon costs utility. Defer "
    "to your local privacy law and policy."
)


def _families(source: Source, names: list[str], batch_rows: int) -> dict[str, pa.DataType]:
    """Each column's Arrow type, from the first batch (the schema is public)."""
    for batch in BatchLoop(source, names, batch_rows):
        types = {n: batch.schema.field(n).type for n in names}
        for n, t in types.items():
            if pa.types.is_null(t):
                raise SchemaError(
                    f"column {n!r} has no values of a type (all null): a private fit needs its "
                    "type; leave it out with columns="
                )
        return types
    raise DataError(f"{source.description} has 0 rows; a dependency tree needs at least one")


def count_private(
    source: Source,
    names: list[str],
    domains: Mapping[str, Any] | None,
    n_bins: int,
    max_categories: int,
    batch_rows: int,
    bar: PassProgress,
    budget: tuple[float, float, dict[str, float]],
    rng: IntegerSource,
) -> tuple[_core.PairStats, _core.Codebook, list[str], Plan, dict[str, str]]:
    """Learn the domains that were not given (with noise), then count with the public codebook.

    Returns the exact statistics (to be released only through ``private_model``), the codebook,
    the column types, the budget plan and, per column, where its domain came from.
    """
    if not source.replayable:
        raise DataError(
            "a private fit reads its data more than once (types, domains, counts), and this is "
            "a one-shot stream; write it to Parquet first, or count it into treewise.PairStats "
            "with a public codebook and use fit_stats"
        )
    arrow_types = _families(source, names, batch_rows)
    given = check_domains(domains, names, source.names, arrow_types)
    families = {n: family_of(t) for n, t in arrow_types.items()}
    learner = DomainLearner(names, families, given)
    epsilon, delta, split = budget
    plan = plan_budget(
        epsilon,
        delta,
        split,
        n_columns=len(names),
        learned_categories=len(learner.categories),
        learned_ranges=len(learner.grids),
    )
    origin = {n: "given" for n in names}
    domains_all = dict(given)
    if learner.needed:
        with BatchLoop(source, names, batch_rows, bar, "learning domains") as batches:
            for batch in batches:
                learner.see(batch)
        learner.check_identifiers()
        learned = learner.release(
            lambda r, size: plan.draw("domains", r, size),
            plan.threshold,
            max_categories - 2,
            n_bins,
            rng,
        )
        domains_all.update(learned)
        for n in learner.categories:
            origin[n] = "categories learned with noise"
        for n in learner.grids:
            origin[n] = "range given; bin edges learned with noise"
    codebook = build_codebook(names, families, domains_all, n_bins)
    stats = _core.PairStats(codebook)
    types = TypeRecorder(names)
    count_pairs(source, names, codebook, stats, batch_rows, bar, types)
    if stats.n_rows == 0:
        raise DataError(f"{source.description} has 0 rows; a dependency tree needs at least one")
    return stats, codebook, types.type_names(codebook), plan, origin


def check_public(codebook: _core.Codebook) -> None:
    """Refuse a codebook that holds summaries of data (tail tables or values inside bins)."""
    for i, name in enumerate(codebook.names):
        _kind, _integral, tail, within = codebook.shape(i)
        if tail is not None or within:
            raise SchemaError(
                f"a private fit from statistics needs a public codebook, but column {name!r} "
                "holds values learned from data; count with treewise.public_codebook(domains, "
                "schema) instead"
            )


def private_model(
    stats: _core.PairStats,
    codebook: _core.Codebook,
    dtypes: list[str],
    plan: Plan,
    rng: IntegerSource,
    root: int | None,
    alpha: float,
    origin: Mapping[str, str],
    seeded: bool,
) -> _core.TreeModel:
    """Release the model from exact statistics: noise once, then post-processing only.

    An ordered categorical's type names its levels, which may have been taken from the data:
    a private model gives such a column back as plain strings.
    """
    dtypes = [FAMILY_TYPES[family(t)] if ordered_levels(t) is not None else t for t in dtypes]
    eligible = [r > 1 for r in codebook.cardinalities]
    release = release_model(stats, plan, rng, root, eligible)
    model = _core.TreeModel.from_counts(
        codebook,
        dtypes,
        release.n_rows,
        release.root,
        release.parent,
        release.counts,
        release.pair_mi,
        alpha,
    )
    origins = {
        n: "public (bool)" if codebook.column(i)[0] == "bool" else origin.get(n, "given")
        for i, n in enumerate(codebook.names)
    }
    model.set_privacy(json.dumps(statement(plan, list(codebook.names), origins, seeded)))
    return model


def _noise_text(plan: Plan, step: str, what: str) -> str:
    kind, scale = plan.noise[step]
    if kind == "gaussian":
        return f"discrete Gaussian noise of variance {float(scale):.6g} on {what}"
    return f"discrete Laplace noise of scale {float(scale):.6g} on {what}"


def statement(
    plan: Plan, names: Sequence[str], origin: Mapping[str, str], seeded: bool
) -> dict[str, Any]:
    """The guarantee of a private model, as ``privacy_`` holds it."""
    mechanisms = {
        "tables": _noise_text(
            plan, "tables", "every cell of the root's counts and of each edge's table"
        ),
        "post_processing": (
            "negative counts clipped to 0; each child's table spread over its parent's "
            "released counts, top-down from the root (largest remainders), so that tables "
            "sharing a column agree"
        ),
    }
    if "structure" in plan.noise:
        mechanisms["structure"] = _noise_text(
            plan,
            "structure",
            f"round(n * mutual information) of every pair (sensitivity {score_sensitivity()}), "
            "then the maximum spanning tree of the noisy scores",
        )
    if "domains" in plan.noise:
        mechanisms["domains"] = _noise_text(plan, "domains", "each learned domain's counts") + (
            f"; a category is kept when its noisy count reaches {plan.threshold}"
            if plan.threshold
            else ""
        )
    return {
        "epsilon": plan.epsilon,
        "delta": plan.delta,
        "neighbouring": "add or remove one row",
        "accounting": plan.accounting,
        "rho": plan.rho,
        "split": plan.split,
        "protected": (
            "every row of the data: the structure, the tables, the row count and the domains "
            "learned from the data; domains given in domains= are public and not protected"
        ),
        "domains": {n: origin.get(n, "given") for n in names},
        "mechanisms": mechanisms,
        "randomness": (
            "seeded (random_state): reproducible, and NOT private against anyone who knows the seed"
            if seeded
            else "the operating system's (secrets)"
        ),
        "post_processing": (
            "sampling, scoring and inference use only the released model: they are "
            "post-processing and spend no further budget"
        ),
        "cautions": CAUTIONS,
    }


def guarantee_lines(p: Mapping[str, Any]) -> list[str]:
    """The statement of a private model in plain sentences (for ``show``, fit and the report)."""
    delta = float(p["delta"])
    kind = f"({p['epsilon']:g}, {delta:g})-DP" if delta else f"{p['epsilon']:g}-DP (pure)"
    split = ", ".join(f"{k} {100 * v:.0f}%" for k, v in p["split"].items() if v)
    domains = ", ".join(f"{n}: {how}" for n, how in p["domains"].items())
    lines = [
        f"Differentially private: {kind}; neighbouring tables: {p['neighbouring']} "
        f"({p['accounting']}).",
        f"Protected: {p['protected']}.",
        f"Budget split: {split}. Domains: {domains}.",
        f"Sampling: {p['post_processing']}.",
    ]
    if "seed" in p["randomness"]:
        lines.append(f"Randomness: {p['randomness']}.")
    lines.append(p["cautions"])
    return lines
