"""The ``treewise`` command: fit, score, sample and show dependency trees from the terminal."""

from __future__ import annotations

import json
import os
import secrets
import sys
import time
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, TextIO

import click
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from click.core import ParameterSource
from rich.console import Console

import treewise
from treewise.checks import check_memory_limit
from treewise.cli import mixtures
from treewise.domains import read_domains
from treewise.private import guarantee_lines
from treewise.sources import open_source
from treewise.views.terminal import (
    COMPARE_CAUTION,
    SAMPLE_CAUTION,
    SCORE_CAUTION,
    changed_columns_table,
    changed_edges_table,
    model_json,
    new_rows_table,
    strongest_table,
    surprising_table,
    tree_view,
)

__all__ = ["main"]

#: Errors that end a command with one line (exit status 1) instead of a traceback.
HANDLED_ERRORS: tuple[type[BaseException], ...] = (
    treewise.TreewiseError,
    OSError,  # FileNotFoundError, IsADirectoryError, PermissionError, a full disk, ...
    ValueError,
    TypeError,
    pa.ArrowException,
)

# -- helpers of the commands ------------------------------------------------------------------


def _console() -> Console:
    return Console(highlight=False, markup=False, soft_wrap=True)


def _source(data: Sequence[str]) -> str | list[str]:
    """What the library takes: one path (file, directory or glob) or a list of them."""
    return data[0] if len(data) == 1 else list(data)


def _progress(no_progress: bool) -> bool | None:
    """``None`` lets the library show a bar only when stderr is a terminal."""
    return False if no_progress else None


def _check_output(path: str) -> None:
    """Fail before the long work, not after it, when the output cannot be written."""
    target = Path(path)
    if target.is_dir():
        raise IsADirectoryError(f"the output {path} is a directory; give a file name")
    parent = target.parent
    if not parent.is_dir():
        raise FileNotFoundError(f"the output's directory {parent} does not exist; create it first")


def _load(path: str, command: str = "this command") -> treewise.DependencyTree:
    """Load a tree file, saying which file was bad; a mixture file is refused by name."""
    if mixtures.is_mixture(path):
        raise click.UsageError(
            f"{path} is a mixture of trees; {command} takes a single tree file, not a mixture "
            "(not available for mixtures yet)"
        )
    try:
        return treewise.load(path)
    except treewise.CorruptModelError as e:
        raise treewise.CorruptModelError(f"cannot read the model file {path}: {e}") from e


def _given(*names: str) -> list[str]:
    """Which of the current command's parameters were given on the command line."""
    ctx = click.get_current_context()
    return [n for n in names if ctx.get_parameter_source(n) is ParameterSource.COMMANDLINE]


def _refuse_for_mixture(what: str, *names: str) -> None:
    """A usage error naming the first of ``names`` given, which a mixture cannot do yet."""
    for name in _given(*names):
        option = "--" + name.replace("_", "-")
        raise click.UsageError(f"{option} is not available for a mixture {what} yet")


def _seconds(start: float) -> str:
    return f"{time.perf_counter() - start:.2f} s"


def _names(ctx: click.Context, param: click.Parameter, value: str | None) -> list[str] | None:
    """Split a comma-separated list of column names (``a,b,c``); refuse empty names."""
    if value is None:
        return None
    names = [part.strip() for part in value.split(",")]
    if not all(names):
        raise click.BadParameter(f"{value!r} has an empty column name; write a,b,c", ctx, param)
    return names


def _columns(
    data: Sequence[str], columns: list[str] | None, exclude: list[str] | None
) -> list[str] | None:
    """The estimator's ``columns=``: ``--columns`` (default: all of DATA's) less ``--exclude``."""
    if not exclude:
        return columns
    available = open_source(_source(data)).names if columns is None else columns
    where = "--columns" if columns is not None else "the data"
    unknown = [name for name in exclude if name not in available]
    if unknown:
        raise treewise.SchemaError(f"--exclude names {unknown}, which are not in {where}")
    kept = [name for name in available if name not in exclude]
    if not kept:
        raise treewise.DataError(f"--exclude leaves none of the columns of {where} to model")
    return kept


def _one_line(error: BaseException) -> str:
    """The error as one line: the library's own message, or a file error's reason and path."""
    if isinstance(error, OSError) and error.strerror and error.filename:
        text = f"{error.strerror}: {error.filename}"
    else:
        text = str(error) or type(error).__name__
    return " ".join(text.split())


def _show_warning(
    message: Warning | str,
    category: type[Warning],
    filename: str,
    lineno: int,
    file: TextIO | None = None,
    line: str | None = None,
) -> None:
    click.echo(f"warning: {' '.join(str(message).split())}", err=True)


class _Failure(click.ClickException):
    """A handled error: printed as one ``error: ...`` line, exit status 1."""

    def show(self, file: Any = None) -> None:
        click.echo(f"error: {self.message}", err=True)


class _Group(click.Group):
    """The command group; turns the library's errors into one line unless ``--debug``."""

    def invoke(self, ctx: click.Context) -> Any:
        try:
            return super().invoke(ctx)
        except BrokenPipeError:
            raise
        except HANDLED_ERRORS as e:
            if ctx.params.get("debug"):
                raise
            raise _Failure(_one_line(e)) from e


# -- the commands -----------------------------------------------------------------------------


@click.group(
    cls=_Group,
    context_settings={"help_option_names": ["-h", "--help"]},
    epilog="""\b
Example:
  treewise demo --rows 200000
  treewise show demo-output/shop.treewise
  treewise report demo-output/shop.treewise -o report.html""",
)
@click.version_option(version=treewise.__version__, prog_name="treewise")
@click.option("--debug", is_flag=True, help="Show the full traceback when something fails.")
def cli(debug: bool) -> None:
    """Fit, score, sample and show dependency trees over large categorical tables.

    A dependency tree hangs every column from the one other column that tells most about it.
    Fit one to your data, see its structure, score rows by how surprising they are, and draw
    synthetic rows that keep the dependencies.
    """


def _prune(ctx: click.Context, param: click.Parameter, value: str | None) -> str | float | None:
    """``--prune``: ``bic``, or a significance level strictly between 0 and 1."""
    if value is None or value == "bic":
        return value
    try:
        level = float(value)
    except ValueError:
        level = -1.0
    if not 0.0 < level < 1.0:
        raise click.BadParameter(f"give 'bic' or a level between 0 and 1, not {value!r}")
    return level


def _components(ctx: click.Context, param: click.Parameter, value: str | None) -> int | str | None:
    """``--components``: ``auto``, or a number of trees from 1 to 1024."""
    if value is None or value == "auto":
        return value
    try:
        k = int(value)
    except ValueError:
        k = 0
    if not 1 <= k <= 1024:
        raise click.BadParameter(f"give 'auto' or a number of trees from 1 to 1024, not {value!r}")
    return k


def _memory_limit(_ctx: click.Context, _param: click.Parameter, value: str | None) -> str | None:
    """``--memory-limit``: bytes, a size such as 4GiB or 500MB, or a share such as 50%."""
    if value is None:
        return None
    try:
        check_memory_limit(int(value) if value.strip().isdigit() else value)
    except ValueError as e:
        raise click.BadParameter(str(e)) from None
    return value


#: The --memory-limit option of the commands that count or sample.
_MEMORY_LIMIT = click.option(
    "--memory-limit",
    callback=_memory_limit,
    metavar="SIZE",
    help="The most memory the pair statistics or sampled rows may take: bytes, 4GiB, 500MB, "
    "or a share of the machine's memory such as 80% (default: 50%).",
)


def _limit(value: str | None) -> int | str | None:
    """A checked ``--memory-limit`` as ``memory_limit``: plain digits are bytes."""
    return int(value) if value is not None and value.strip().isdigit() else value


def _split(
    _ctx: click.Context, _param: click.Parameter, value: str | None
) -> dict[str, float] | None:
    """--privacy-split structure=0.3,tables=0.6,domains=0.1 as a dict (missing steps: 0)."""
    if value is None:
        return None
    split = {"domains": 0.0, "structure": 0.0, "tables": 0.0}
    for part in value.split(","):
        key, _, share = part.partition("=")
        if key.strip() not in split:
            raise click.BadParameter(f"{key!r}: the steps are structure, tables and domains")
        try:
            split[key.strip()] = float(share)
        except ValueError:
            raise click.BadParameter(f"{part!r} needs a number, like tables=0.6") from None
    return split


def _kinds(_ctx: click.Context, _param: click.Parameter, value: tuple[str, ...]) -> dict[str, str]:
    kinds = {}
    for item in value:
        column, sep, kind = item.partition("=")
        if not sep or not column or kind not in ("auto", "categorical", "numeric", "ignore"):
            raise click.BadParameter(
                f"give COLUMN=KIND with KIND one of auto, categorical, numeric, ignore; "
                f"not {item!r}"
            )
        kinds[column] = kind
    return kinds


def _encoding_options(command: Callable[..., Any]) -> Callable[..., Any]:
    """Add the column options of fit and compare: columns, exclude, max-categories, bins, kind."""
    for option in reversed(
        [
            click.option(
                "--columns",
                callback=_names,
                metavar="A,B,C",
                help="Columns to model, in this order (default: all).",
            ),
            click.option(
                "--exclude",
                callback=_names,
                metavar="X,Y",
                help="Columns to leave out (ids, keys, labels).",
            ),
            click.option(
                "--max-categories",
                type=click.IntRange(2, 65_535),
                metavar="N",
                default=128,
                show_default=True,
                help="Most codes per column; the rarest values beyond it share an 'other' code.",
            ),
            click.option(
                "--bins",
                type=click.IntRange(1, 65_534),
                metavar="N",
                default=10,
                show_default=True,
                help="Quantile bins for numeric columns; numbers with at most N distinct values "
                "are categorical.",
            ),
            click.option(
                "--kind",
                "kinds",
                multiple=True,
                callback=_kinds,
                metavar="COL=KIND",
                help="Model COL as categorical, numeric or auto, or ignore it (repeatable). "
                "See docs/column-kinds.md.",
            ),
        ]
    ):
        command = option(command)
    return command


@cli.command(
    epilog="""\b
Example:
  treewise fit demo-output/sessions -o shop.treewise --exclude session_id,planted_anomaly
  treewise fit 'logs/2026-*.parquet' extra.csv -o logs.treewise \\
      --columns device,os_family,cart_add,purchase --bins 20 --kind zip_code=categorical"""
)
@click.argument("data", nargs=-1, required=True)
@click.option("-o", "--output", required=True, metavar="MODEL", help="Where to save the model.")
@_encoding_options
@click.option(
    "--alpha",
    type=click.FloatRange(min=0.0),
    metavar="A",
    default=0.5,
    show_default=True,
    help="Smoothing of the conditional tables (0: maximum likelihood).",
)
@click.option(
    "--root",
    metavar="COL",
    help="The column the tree hangs from (default: the centre of the tree).",
)
@click.option(
    "--prune",
    callback=_prune,
    metavar="bic|LEVEL",
    help="Keep only edges that pay: 'bic', or a G-test significance level such as 0.01.",
)
@click.option(
    "--batch-rows", type=click.IntRange(min=1), metavar="N", help="Rows per batch read from disk."
)
@_MEMORY_LIMIT
@click.option(
    "--epsilon",
    type=click.FloatRange(min=0.0, min_open=True),
    metavar="EPS",
    help="Fit with differential privacy at this epsilon (docs/privacy.md).",
)
@click.option(
    "--delta",
    type=click.FloatRange(0.0, 1.0, max_open=True),
    metavar="DELTA",
    help="The delta of a private fit (default 0: pure epsilon-DP).",
)
@click.option(
    "--domains",
    "domains_path",
    type=click.Path(exists=True, dir_okay=False),
    metavar="FILE",
    help='Public domains of a private fit, as JSON: {"col": ["a", "b"], '
    '"num": {"range": [0, 100]}}.',
)
@click.option(
    "--privacy-split",
    callback=_split,
    metavar="structure=S,tables=T,domains=D",
    help="Shares of the privacy budget (default structure=0.3,tables=0.6,domains=0.1).",
)
@click.option(
    "--noise-seed",
    type=int,
    metavar="N",
    help="Seed the privacy noise, for tests and demos only: a seeded release is NOT private "
    "against anyone who knows the seed.",
)
@click.option(
    "--components",
    callback=_components,
    metavar="K|auto",
    help="Fit a mixture of K trees by EM and save a mixture file; 'auto' picks K from "
    "1,2,3,4,6,8 by the mean ln p of a seeded 20%% of rows held out (K=1 saves a tree file).",
)
@click.option(
    "--seed",
    type=click.IntRange(0, 2**64 - 1),
    metavar="S",
    default=0,
    show_default=True,
    help="With --components: seed of EM's start and of auto's held-out rows.",
)
@click.option("--no-progress", is_flag=True, help="Never show a progress bar.")
def fit(
    data: tuple[str, ...],
    output: str,
    columns: list[str] | None,
    exclude: list[str] | None,
    max_categories: int,
    bins: int,
    kinds: dict[str, str],
    alpha: float,
    root: str | None,
    prune: str | float | None,
    batch_rows: int | None,
    memory_limit: str | None,
    epsilon: float | None,
    delta: float | None,
    domains_path: str | None,
    privacy_split: dict[str, float] | None,
    noise_seed: int | None,
    components: int | str | None,
    seed: int,
    no_progress: bool,
) -> None:
    """Fit a dependency tree (or, with --components, a mixture of trees) to DATA; save it to MODEL.

    DATA: Parquet, CSV or Arrow IPC files, directories of them, or globs; they are read batch
    by batch, so they may be larger than memory. Leave out keys and labels (ids, timestamps,
    answers) with --columns/--exclude: a unique id says nothing about the other columns.
    """
    chosen = _columns(data, columns, exclude)
    _check_output(output)
    if components is None and _given("seed"):
        raise click.UsageError("--seed applies to --components; a tree fit draws nothing at random")
    if components is not None:
        given = {
            "--root": root,
            "--prune": prune,
            "--batch-rows": batch_rows,
            "--epsilon": epsilon,
            "--delta": delta,
            "--domains": domains_path,
            "--privacy-split": privacy_split,
            "--noise-seed": noise_seed,
        }
        for option, value in given.items():
            if value is not None:
                raise click.UsageError(f"{option} is not available with --components yet")
        tree_params = {
            "columns": chosen,
            "max_categories": max_categories,
            "n_bins": bins,
            "kinds": kinds or None,
            "alpha": alpha,
            "memory_limit": _limit(memory_limit),
        }
        mixtures.fit_mixture(_console(), _source(data), output, components, seed, tree_params)
        return
    start = time.perf_counter()
    model = treewise.DependencyTree(
        columns=chosen,
        max_categories=max_categories,
        n_bins=bins,
        kinds=kinds or None,
        root=root,
        alpha=alpha,
        prune=prune,
        memory_limit=_limit(memory_limit),
        epsilon=epsilon,
        delta=delta,
        domains=None if domains_path is None else read_domains(domains_path),
        privacy_split=privacy_split,
        random_state=noise_seed,
    )
    model.fit(_source(data), progress=_progress(no_progress), batch_rows=batch_rows)
    model.save(output)
    console = _console()
    rows = "about " if model.privacy_ else ""
    console.print(
        f"Fitted {rows}{model.n_rows_:,} rows x {model.n_features_in_} columns: "
        f"{int(np.sum(model.parent_ >= 0))} edges, {model.n_parameters_:,} free parameters."
    )
    console.print(strongest_table(model))
    if model.privacy_:
        for line in guarantee_lines(model.privacy_):
            console.print(line, highlight=False)
    console.print(f"Saved the model to {output} in {_seconds(start)}.")


@cli.command(
    epilog="""\b
Example:
  treewise score demo-output/shop.treewise demo-output/sessions \\
      -o scored.parquet --key session_id --top 5"""
)
@click.argument("model_path", metavar="MODEL")
@click.argument("data", nargs=-1, required=True)
@click.option("-o", "--output", required=True, metavar="OUT", help="Parquet file to write.")
@click.option(
    "--key", "keys", multiple=True, metavar="COL", help="Column to carry along (repeatable)."
)
@click.option("--surprisal", is_flag=True, help="Also write surprisal_<column> per column.")
@click.option(
    "--top",
    type=click.IntRange(0, 1_000_000),
    metavar="K",
    default=10,
    show_default=True,
    help="Show this many of the most surprising rows.",
)
@click.option("--no-progress", is_flag=True, help="Never show a progress bar.")
def score(
    model_path: str,
    data: tuple[str, ...],
    output: str,
    keys: tuple[str, ...],
    surprisal: bool,
    top: int,
    no_progress: bool,
) -> None:
    """Score every row of DATA under MODEL and write the scores to OUT.

    OUT holds the key columns, `score` (ln p(row) in nats: lower is more surprising) and, with
    --surprisal, `surprisal_<column>` for each modelled column (-ln P(value | parent value)).
    The most surprising rows are printed with the three columns that made them so. A mixture
    file writes `score`, `component` and `responsibility_<k>`, and with --surprisal each
    column's surprisal under the row's component (docs/cli.md, "Mixtures of trees").
    """
    if mixtures.is_mixture(model_path):
        mix = mixtures.load_mixture(model_path)
        _check_output(output)
        mixtures.score_mixture(_console(), mix, _source(data), output, keys, top, surprisal)
        return
    model = _load(model_path)
    _check_output(output)
    start = time.perf_counter()
    worst = model.score_to_parquet(
        _source(data),
        output,
        keys=keys,
        surprisal=surprisal,
        top=top,
        progress=_progress(no_progress),
    )
    n_rows = pq.read_metadata(output).num_rows
    console = _console()
    console.print(f"Scored {n_rows:,} rows and wrote {output} in {_seconds(start)}.")
    if worst.num_rows:
        names = [str(name) for name in model.feature_names_in_]
        title = f"The {worst.num_rows} most surprising rows"
        console.print(surprising_table(worst, names, keys, title))
    console.print(SCORE_CAUTION)


@cli.command(
    epilog="""\b
Example:
  treewise sample demo-output/shop.treewise -n 100000 -o synthetic.parquet --seed 7"""
)
@click.argument("model_path", metavar="MODEL")
@click.option(
    "-n",
    "--rows",
    "n_rows",
    type=click.IntRange(min=0),
    metavar="N",
    required=True,
    help="Rows to draw.",
)
@click.option("-o", "--output", required=True, metavar="OUT", help="Parquet file to write.")
@click.option(
    "--seed",
    type=click.IntRange(0, 2**64 - 1),
    metavar="S",
    help="Random seed; the same seed gives the same rows (default: a fresh one, printed).",
)
@click.option(
    "--batch-rows", type=click.IntRange(min=1), metavar="N", help="Rows per batch written."
)
@_MEMORY_LIMIT
@click.option("--no-progress", is_flag=True, help="Never show a progress bar.")
def sample(
    model_path: str,
    n_rows: int,
    output: str,
    seed: int | None,
    batch_rows: int | None,
    memory_limit: str | None,
    no_progress: bool,
) -> None:
    """Draw synthetic rows from MODEL and write them to OUT (Parquet).

    The rows have the fitted columns and types, with real values: a numeric column gets a value
    drawn from those seen inside the sampled bin, the "other" code one of the rare values behind
    it, and only the null code comes back as null. A mixture file draws a component by its
    weight, then a row from its tree.
    """
    if seed is None:
        seed = secrets.randbits(63)
    if mixtures.is_mixture(model_path):
        _refuse_for_mixture("sample", "batch_rows", "memory_limit")
        mix = mixtures.load_mixture(model_path)
        _check_output(output)
        mixtures.sample_mixture(_console(), mix, n_rows, output, seed)
        return
    model = _load(model_path)
    model.set_params(memory_limit=_limit(memory_limit))
    _check_output(output)
    start = time.perf_counter()
    written = model.sample_to_parquet(
        n_rows, output, random_state=seed, batch_rows=batch_rows, progress=_progress(no_progress)
    )
    console = _console()
    console.print(
        f"Wrote {written:,} synthetic rows to {output} in {_seconds(start)} (seed {seed})."
    )
    console.print(SAMPLE_CAUTION)


@cli.command(
    epilog="""\b
Example:
  treewise show demo-output/shop.treewise
  treewise show demo-output/shop.treewise --json > shop-tree.json"""
)
@click.argument("model_path", metavar="MODEL")
@click.option(
    "--json", "as_json", is_flag=True, help="Print JSON: columns, cardinalities, parents, edges."
)
def show(model_path: str, as_json: bool) -> None:
    """Show the tree of MODEL, indented from the root.

    Each column shows its cardinality and its mutual information with its parent (nats). A
    mixture file shows its components, then each component's tree.
    """
    if mixtures.is_mixture(model_path):
        mixtures.show_mixture(_console(), mixtures.load_mixture(model_path), model_path, as_json)
        return
    model = _load(model_path)
    if as_json:
        click.echo(json.dumps(model_json(model), indent=2, allow_nan=False))
        return
    _console().print(tree_view(model, model_path))
    if model.privacy_:
        for line in guarantee_lines(model.privacy_):
            _console().print(line, highlight=False)


@cli.command(
    epilog="""\b
Example:
  treewise report demo-output/shop.treewise -o shop-report.html
  treewise report demo-output/shop.treewise demo-output/sessions -o report.html \\
      --key session_id --top 30"""
)
@click.argument("model_path", metavar="MODEL")
@click.argument("data", nargs=-1)
@click.option("-o", "--output", required=True, metavar="OUT", help="HTML file to write.")
@click.option(
    "--key", "keys", multiple=True, metavar="COL", help="Column of DATA to show beside a row."
)
@click.option(
    "--top",
    type=click.IntRange(0, 100_000),
    metavar="K",
    default=20,
    show_default=True,
    help="Show this many of the most surprising rows of DATA.",
)
@click.option(
    "--synthetic-rows",
    type=click.IntRange(0, 100_000_000),
    metavar="N",
    default=100_000,
    show_default=True,
    help="Rows to sample for the comparison with DATA (0: none).",
)
@click.option(
    "--seed",
    type=click.IntRange(0, 2**64 - 1),
    metavar="S",
    default=0,
    show_default=True,
    help="Seed of the synthetic rows.",
)
@click.option(
    "--heatmaps",
    type=click.IntRange(min=0),
    metavar="N",
    default=6,
    show_default=True,
    help="Conditional tables to draw, strongest edges first.",
)
@click.option(
    "--tree-edges",
    type=click.IntRange(min=1),
    metavar="N",
    default=80,
    show_default=True,
    help="Draw at most this many edges (the strongest) in the tree picture.",
)
@click.option(
    "--typical",
    type=click.IntRange(0, 10_000),
    metavar="K",
    default=5,
    show_default=True,
    help="For a mixture: show this many of each component's most typical rows of DATA.",
)
@click.option("--title", metavar="TEXT", help="The page's title (default: from MODEL).")
def report(
    model_path: str,
    data: tuple[str, ...],
    output: str,
    keys: tuple[str, ...],
    top: int,
    synthetic_rows: int,
    seed: int,
    heatmaps: int,
    tree_edges: int,
    typical: int,
    title: str | None,
) -> None:
    """Write a self-contained HTML report about MODEL (and DATA) to OUT.

    The page shows the tree, its edges, the conditional tables of the strongest edges and
    every column's distribution. With DATA it also shows how the rows score, the most
    surprising rows and why, and how rows sampled from MODEL compare with DATA. It has no
    scripts and fetches nothing: open it in any browser, offline. A mixture file gets the
    mixture report: its components, their trees, and with DATA the rows each one explains.
    """
    from treewise.views.report import write_report  # matplotlib loads only for this command

    if keys and not data:
        raise click.UsageError("--key needs DATA to take the column from")
    if mixtures.is_mixture(model_path):
        _refuse_for_mixture("report", "top", "synthetic_rows", "seed", "heatmaps")
        mix = mixtures.load_mixture(model_path)
        _check_output(output)
        start = time.perf_counter()
        mixtures.report_mixture(
            mix,
            output,
            _source(data) if data else None,
            keys,
            typical,
            tree_edges,
            title or f"Mixture of trees report: {Path(model_path).name}",
        )
        _console().print(f"Wrote the report to {output} in {_seconds(start)}.")
        return
    if _given("typical"):
        raise click.UsageError("--typical is for a mixture's report; MODEL is a single tree")
    model = _load(model_path)
    _check_output(output)
    start = time.perf_counter()
    write_report(
        model,
        output,
        _source(data) if data else None,
        synthetic_rows=synthetic_rows,
        top=top,
        heatmaps=heatmaps,
        keys=keys,
        tree_edges=tree_edges,
        title=title or f"Dependency tree report: {Path(model_path).name}",
        random_state=seed,
    )
    _console().print(f"Wrote the report to {output} in {_seconds(start)}.")


def _side(spec: str) -> Any:
    """A saved model (a file that starts with the treewise header), or a data path as given."""
    path = Path(spec)
    if path.is_file():
        with open(path, "rb") as f:
            if f.read(8) == b"TREEWISE":
                return _load(spec, "compare")
    return spec


#: How many changed columns the JSON output drills down into.
DRILL_DOWN = 3


@cli.command(
    epilog="""\b
Example:
  treewise compare week1/ week2/ -o changes.html --exclude session_id,planted_anomaly
  treewise compare shop.treewise 'week2/*.parquet' --json > changes.json"""
)
@click.argument("reference", metavar="REF")
@click.argument("current", metavar="CUR")
@click.option("-o", "--output", metavar="OUT", help="HTML report to write.")
@click.option("--json", "as_json", is_flag=True, help="Print JSON instead of the summary.")
@_encoding_options
@click.option(
    "--level",
    type=click.FloatRange(0.0, 1.0, min_open=True, max_open=True),
    default=0.001,
    show_default=True,
    metavar="A",
    help="Family-wise error rate (Holm) below which a column or edge counts as changed.",
)
@click.option(
    "--top",
    type=click.IntRange(0, 100_000),
    metavar="K",
    default=10,
    show_default=True,
    help="Rows of CUR most unlike REF to show (0: do not score the rows).",
)
@click.option(
    "--key", "keys", multiple=True, metavar="COL", help="Column of CUR to show beside a row."
)
@click.option(
    "--batch-rows", type=click.IntRange(min=1), metavar="N", help="Rows per batch read from disk."
)
@click.option("--no-progress", is_flag=True, help="Never show a progress bar.")
def compare(
    reference: str,
    current: str,
    output: str | None,
    as_json: bool,
    columns: list[str] | None,
    exclude: list[str] | None,
    max_categories: int,
    bins: int,
    kinds: dict[str, str],
    level: float,
    top: int,
    keys: tuple[str, ...],
    batch_rows: int | None,
    no_progress: bool,
) -> None:
    """Compare CUR with REF: what changed, and where.

    Which columns shifted, which dependencies changed, and which rows of CUR are new.

    REF and CUR: Parquet, CSV or Arrow IPC files, directories or globs (read batch by batch),
    or saved models fitted on one codebook. With data on both sides, one codebook is learned
    over both. Every column and tree edge gets an exact G-test on the two sides' counts, with
    sparse levels pooled and Holm's correction over all the tests (docs/compare.md).
    """
    if output is not None:
        _check_output(output)
    ref, cur = _side(reference), _side(current)
    if isinstance(cur, treewise.DependencyTree) and keys:
        raise click.UsageError("--key needs CUR to be data, not a model")
    data_side = next((s for s in (ref, cur) if isinstance(s, str)), None)
    chosen = columns if data_side is None else _columns([data_side], columns, exclude)
    start = time.perf_counter()
    comparison = treewise.compare(
        ref,
        cur,
        columns=chosen,
        max_categories=max_categories,
        n_bins=bins,
        kinds=kinds or None,
        level=level,
        progress=_progress(no_progress),
        batch_rows=batch_rows,
    )
    took = _seconds(start)
    names = [str(n) for n in comparison.reference.feature_names_in_]
    rows = None
    if top and isinstance(cur, str):
        rows = comparison.top_rows(cur, top=top, keys=keys)
    if output is not None:
        from treewise.views.changes import write_changes_report  # matplotlib loads only here

        write_changes_report(
            comparison,
            output,
            rows=rows,
            keys=keys,
            title=f"What changed: {Path(current).name} against {Path(reference).name}",
        )
    if as_json:
        result = comparison.to_dict()
        changed = [c["column"] for c in result["columns"] if c["changed"]][:DRILL_DOWN]
        if comparison.can_drill_down:
            result["drill_down"] = {
                c: comparison.drill_down(c).slice(0, 3).to_pylist() for c in changed
            }
        if rows is not None:
            result["rows"] = [
                {k: v for k, v in r.items() if k in ("row", "score", *keys)}
                for r in rows.to_pylist()
            ]
        click.echo(json.dumps(result, indent=2, allow_nan=False, default=str))
        return
    console = _console()
    console.print(
        f"Compared {comparison.n_current:,} current rows with {comparison.n_reference:,} "
        f"reference rows over {len(names)} columns in {took}."
    )
    console.print(changed_columns_table(comparison))
    first = comparison.columns.to_pylist()[0] if comparison.columns.num_rows else None
    if first is not None and first["changed"] and comparison.can_drill_down:
        where = comparison.drill_down(first["column"]).to_pylist()
        if where:
            console.print(f"{first['column']!r} changed most where {where[0]['moved']}.")
    console.print(changed_edges_table(comparison))
    if rows is not None and rows.num_rows:
        title = f"The {rows.num_rows} rows of CUR most unlike REF"
        console.print(new_rows_table(rows, names, keys, title))
    if output is not None:
        console.print(f"Wrote the report to {output}.")
    console.print(COMPARE_CAUTION)


@cli.command(
    epilog="""\b
Example:
  treewise demo
  treewise demo --rows 200000 --dir /tmp/shop-demo --seed 3"""
)
@click.option(
    "--rows",
    type=click.IntRange(min=1),
    metavar="N",
    default=2_000_000,
    show_default=True,
    help="Sessions to generate.",
)
@click.option(
    "--dir",
    "directory",
    default="demo-output",
    metavar="PATH",
    show_default=True,
    help="Where to write the data, the model, the scores, the synthetic rows and the report.",
)
@click.option(
    "--seed",
    type=click.IntRange(min=0),
    default=0,
    show_default=True,
    metavar="S",
    help="Seed of the sessions and of the synthetic rows.",
)
@click.option("--no-progress", is_flag=True, help="Never show a progress bar.")
def demo(rows: int, directory: str, seed: int, no_progress: bool) -> None:
    """Run the whole story on an invented shop's sessions.

    Generates sessions from a hidden tree, writes them as Parquet files, fits a tree to them by
    streaming, compares it with the hidden one, scores the sessions against planted anomalies,
    checks that synthetic rows keep the dependencies, and writes an HTML report.
    """
    from treewise.cli import demo as story

    story.run(rows=rows, directory=Path(directory), seed=seed, progress=_progress(no_progress))


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``treewise`` command.

    Parameters
    ----------
    argv : sequence of str, optional
        The arguments without the program name; default ``sys.argv[1:]``.

    Returns
    -------
    int
        The exit status: 0 on success, 1 when the data or a model is unusable, 2 on a usage
        error, 130 when interrupted.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("default")
        warnings.showwarning = _show_warning
        try:
            result = cli.main(args=argv, prog_name="treewise", standalone_mode=False)
        except click.UsageError as e:
            hint = f" (see '{e.ctx.command_path} --help')" if e.ctx is not None else ""
            message = " ".join(e.format_message().split()).rstrip(".")
            click.echo(f"error: {message}{hint}", err=True)
            return e.exit_code
        except click.ClickException as e:
            e.show()
            return e.exit_code
        except click.Abort:
            click.echo("error: interrupted", err=True)
            return 130
        except BrokenPipeError:
            # The reader went away (`treewise show m | head`); say nothing more.
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
            return 1
    return result if isinstance(result, int) else 0


if __name__ == "__main__":
    raise SystemExit(main())
