"""The mixture side of the ``treewise`` commands: fit --components, and a mixture file's uses.

Here are ``fit --components`` and the show, score, sample and report of a mixture file;
``commands.py`` parses the options and calls these when a fit asks for components or a model
file turns out to be a mixture (its first bytes are ``mixture_file.MAGIC``).
"""

from __future__ import annotations

import json
import time
import warnings
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import click
import numpy as np
import pyarrow as pa
from rich.console import Console
from rich.table import Table

import treewise
from treewise.mixture import TreeMixture, choose_n_components
from treewise.mixture_file import MAGIC
from treewise.sources import BatchLoop, check_columns, open_source, sample_rows
from treewise.stream import Scored, atomic_parquet, write_scores
from treewise.views.terminal import (
    SAMPLE_CAUTION,
    SCORE_CAUTION,
    mixture_json,
    mixture_table,
    tree_view,
)

__all__ = [
    "AUTO_CANDIDATES",
    "HELD_OUT_SHARE",
    "fit_mixture",
    "is_mixture",
    "load_mixture",
    "report_mixture",
    "sample_mixture",
    "score_mixture",
    "show_mixture",
]

#: The numbers of components ``--components auto`` tries; K=1 is the single tree.
AUTO_CANDIDATES = (1, 2, 3, 4, 6, 8)
#: The share of rows ``--components auto`` holds out to judge each K.
HELD_OUT_SHARE = 0.2
#: ``--components auto`` needs at least this many rows (two held out, the rest to fit).
AUTO_MIN_ROWS = 10
#: ``--components auto`` chooses K on a uniform random sample of at most this many rows (all of
#: them when fewer), then fits that K to all the data.
AUTO_SAMPLE_ROWS = 200_000


def is_mixture(path: str | Path) -> bool:
    """Whether ``path`` is a file that starts like a mixture file."""
    target = Path(path)
    if not target.is_file():
        return False
    with open(target, "rb") as f:
        return f.read(len(MAGIC)) == MAGIC


def load_mixture(path: str) -> TreeMixture:
    """Load a mixture file, saying which file was bad."""
    try:
        return TreeMixture.load(path)
    except treewise.CorruptModelError as e:
        raise treewise.CorruptModelError(f"cannot read the mixture file {path}: {e}") from e


def _seconds(start: float) -> str:
    return f"{time.perf_counter() - start:.2f} s"


def _split(table: pa.Table, seed: int) -> tuple[pa.Table, pa.Table]:
    """A seeded HELD_OUT_SHARE of the rows held out (both parts keep the rows' order)."""
    n = table.num_rows
    if n < AUTO_MIN_ROWS:
        raise treewise.DataError(
            f"--components auto needs at least {AUTO_MIN_ROWS} rows to hold some out; the data "
            f"has {n}. Give --components K instead."
        )
    held = np.zeros(n, dtype=np.bool_)
    held[np.random.default_rng(seed).permutation(n)[: round(n * HELD_OUT_SHARE)]] = True
    return table.filter(pa.array(~held)), table.filter(pa.array(held))


def _choice_table(figures: Mapping[int, float], chosen: int) -> Table:
    table = Table(title="Held-out mean ln p per row (nats) for each number of components K")
    table.add_column("K", justify="right")
    table.add_column("held-out mean ln p", justify="right")
    table.add_column("against K=1", justify="right")
    table.add_column("")
    base = figures.get(1)
    for k in sorted(figures):
        gain = "—" if base is None else f"{figures[k] - base:+.4f}"
        table.add_row(str(k), f"{figures[k]:.4f}", gain, "chosen" if k == chosen else "")
    return table


def fit_mixture(
    console: Console,
    data: str | list[str],
    output: str,
    components: int | str,
    seed: int,
    tree_params: dict[str, Any],
) -> None:
    """Fit ``--components K`` (or ``auto``) to ``data`` and save it to ``output``.

    K=1 (given or chosen) saves an ordinary tree file: a mixture of one tree is the single
    tree. ``tree_params`` are the encoding options and ``alpha``, as ``DependencyTree`` takes
    them.
    """
    start = time.perf_counter()
    mixture_params = {**tree_params, "random_state": seed}
    if components == "auto":
        table, total = sample_rows(data, AUTO_SAMPLE_ROWS, seed, tree_params.get("columns"))
        train, held = _split(table, seed)
        k, figures = choose_n_components(
            train, AUTO_CANDIDATES, criterion="heldout", validation=held, **mixture_params
        )
        sampled = "" if total == table.num_rows else f" (a random sample of the {total:,} rows)"
        console.print(
            f"Held out {held.num_rows:,} of {table.num_rows:,} rows{sampled} (seed {seed}) and "
            f"fitted K = {', '.join(map(str, AUTO_CANDIDATES))} to the other "
            f"{train.num_rows:,}."
        )
        console.print(_choice_table(figures, k))
        console.print(f"Chose K={k}; refitting it to all {total:,} rows.")
    else:
        k = int(components)
    # The fits read ``data`` as a source: files stream through in batches (a mixture by one
    # pass per EM iteration), so memory does not grow with the rows.
    if k == 1:
        tree = treewise.DependencyTree(**tree_params).fit(data)
        tree.save(output)
        console.print(
            f"Fitted one tree to {tree.n_rows_:,} rows x {tree.n_features_in_} columns "
            f"(K=1 is the single tree, saved as an ordinary tree file)."
        )
        console.print(f"Saved the model to {output} in {_seconds(start)}.")
        return
    model = TreeMixture(n_components=k, **mixture_params).fit(data)
    model.save(output)
    state = "converged" if model.converged_ else "stopped at max_iter, not converged"
    console.print(
        f"Fitted a mixture of {k} trees to {int(model.n_rows_):,} rows x "
        f"{model.n_features_in_} columns: {model.n_iter_} EM "
        f"iterations ({state}), {model.n_parameters_:,} free parameters, training mean ln p "
        f"{model.lower_bound_:.4f} nats per row."
    )
    console.print(mixture_table(model))
    console.print(f"Saved the mixture to {output} in {_seconds(start)}.")


def show_mixture(console: Console, model: TreeMixture, path: str, as_json: bool) -> None:
    """``treewise show`` of a mixture: the components, then each one's tree."""
    if as_json:
        click.echo(json.dumps(mixture_json(model), indent=2, allow_nan=False))
        return
    from treewise.views.components import component_tree

    console.print(
        f"{path}: a mixture of {len(model.components_)} trees over {model.n_features_in_} "
        f"columns, fitted on {int(model.n_rows_):,} rows."
    )
    console.print(mixture_table(model))
    for k, comp in enumerate(model.components_):
        view = component_tree(model, k)
        console.print(tree_view(view, f"component {k} (weight {comp.weight:.3f})"))


def score_mixture(
    console: Console,
    model: TreeMixture,
    data: str | list[str],
    output: str,
    keys: Sequence[str],
    top: int,
    surprisal: bool = False,
) -> None:
    """``treewise score`` of a mixture: ln p(row), its component and responsibilities.

    With ``surprisal``, also ``surprisal_<column>``: -ln P_k(value | parent value) under the
    row's most responsible component k (``TreeMixture.surprisal``). Written batch by batch as
    a tree's scores are (``stream.write_scores``), so memory holds one batch and the ``top``
    rows, whatever the size of the data.
    """
    start = time.perf_counter()
    names = [str(n) for n in model.feature_names_in_]
    source = open_source(data)
    wanted = check_columns(source.names, list(dict.fromkeys([*keys, *names])), source.description)
    unseen: list[str] = []
    n_rows = 0

    def scored() -> Iterator[Scored]:
        nonlocal n_rows
        with BatchLoop(source, wanted) as batches:
            for batch in batches:
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always", treewise.UnseenCategoryWarning)
                    explained = model.surprisal(batch.select(names))
                unseen.extend(str(w.message) for w in caught)
                extra = {"component": explained["component"].to_numpy().astype(np.int32)}
                for j in range(len(model.components_)):
                    extra[f"responsibility_{j}"] = explained[f"responsibility_{j}"].to_numpy()
                columns = [explained[name].to_numpy() for name in names]
                n_rows += batch.num_rows
                yield Scored(batch, -explained["total"].to_numpy(), columns, extra)

    worst = write_scores(scored(), output, names, keys, surprisal, top)
    if unseen:
        more = f" (and in {len(unseen) - 1} more batches)" if len(unseen) > 1 else ""
        warnings.warn(unseen[0] + more, treewise.UnseenCategoryWarning, stacklevel=2)
    console.print(f"Scored {n_rows:,} rows and wrote {output} in {_seconds(start)}.")
    if top and worst.num_rows:
        console.print(_worst_table(worst, keys, names))
    console.print(SCORE_CAUTION)


def _worst_table(worst: pa.Table, keys: Sequence[str], names: list[str]) -> Table:
    """The most surprising rows: position, keys, ln p, component and the columns to blame."""
    out = Table(title=f"The {worst.num_rows} most surprising rows")
    out.add_column("row", justify="right")
    for key in keys:
        out.add_column(key)
    out.add_column("ln p", justify="right")
    out.add_column("component", justify="right")
    out.add_column("P(component | row)", justify="right")
    out.add_column("most surprising columns")
    for r in range(worst.num_rows):
        k = int(worst["component"][r].as_py())
        values = [(float(worst[f"surprisal_{n}"][r].as_py()), n) for n in names]
        blame = ", ".join(f"{n} {v:.1f}" for v, n in sorted(values, reverse=True)[:3])
        out.add_row(
            f"{int(worst['row'][r].as_py()):,}",
            *(str(worst[key][r].as_py()) for key in keys),
            f"{float(worst['score'][r].as_py()):.2f}",
            str(k),
            f"{float(worst[f'responsibility_{k}'][r].as_py()):.3f}",
            blame,
        )
    return out


def sample_mixture(
    console: Console, model: TreeMixture, n_rows: int, output: str, seed: int
) -> None:
    """``treewise sample`` of a mixture: rows drawn and written block by block.

    The file is written to a temporary name and renamed at the end, in bounded memory.
    """
    start = time.perf_counter()
    schema = model.single_tree_._output_schema()
    with atomic_parquet(output, schema) as writer:
        for batch in model.iter_sample(n_rows, random_state=seed):
            writer.write_batch(batch)
    console.print(
        f"Wrote {n_rows:,} synthetic rows to {output} in {_seconds(start)} (seed {seed})."
    )
    console.print(SAMPLE_CAUTION)


def report_mixture(
    model: TreeMixture,
    output: str,
    data: str | list[str] | None,
    keys: Sequence[str],
    typical: int,
    tree_edges: int,
    title: str,
) -> None:
    """``treewise report`` of a mixture: the mixture report (views/mixture_report.py)."""
    from treewise.views.mixture_report import write_mixture_report

    write_mixture_report(
        model, output, data, typical=typical, keys=keys, tree_edges=tree_edges, title=title
    )
