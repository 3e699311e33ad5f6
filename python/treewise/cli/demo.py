"""The demo: an invented shop's sessions, fitted, checked, scored, sampled and reported on.

Run it as ``treewise demo [--rows N] [--dir PATH] [--seed S]`` or ``make demo`` (the same
command). The data comes from :func:`treewise.datasets.shop_sessions`, which draws every session
from a tree we wrote down, so the demo can say how many of the true edges the fit found and how
many planted anomalies the scores catch.
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import numpy.typing as npt
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as pads
import pyarrow.parquet as pq
from rich.console import Console
from rich.table import Table
from rich.text import Text

import treewise
from treewise.datasets import (
    BROKEN_TAG_BROWSER,
    hidden_edges,
    model_columns,
    shop_sessions,
    shop_sessions_broken_tag,
    shop_sessions_with_crawlers,
)
from treewise.fidelity import compare_columns
from treewise.mixture import TreeMixture
from treewise.views.terminal import (
    SAMPLE_CAUTION,
    SCORE_CAUTION,
    changed_columns_table,
    changed_edges_table,
    explain_rows,
    fidelity_table,
    mixture_table,
    surprising_table,
    tree_view,
)

__all__ = ["VisitorFigures", "run", "visitor_figures"]

#: How many Parquet files the sessions are split into.
N_FILES = 8
#: How many synthetic sessions to draw.
SYNTHETIC_ROWS = 200_000
#: The share of sessions counted as "the most surprising".
TOP_SHARE = 0.01
#: How many caught anomalies to show with their reasons.
EXAMPLES = 5
#: The keys carried along into the scores file.
KEYS = ("session_id", "planted_anomaly")
#: Rows sampled for the report's comparison of synthetic and real sessions.
REPORT_SYNTHETIC_ROWS = 50_000
#: The second week has this share of the first week's sessions (a smaller week keeps it quick).
WEEK_TWO_SHARE = 0.25
#: Rows of the second week shown as the most unlike the first.
WEEK_TWO_ROWS = 5
#: Training sessions of the two-visitor step: ``--rows``, within these bounds (it stays quick).
VISITOR_ROWS = (2_000, 100_000)
#: The share of crawler sessions, and of held-out sessions made hybrid anomalies.
CRAWLER_SHARE = 0.3
HYBRID_RATE = 0.005
#: The share of held-out sessions flagged (the lowest scores) when counting caught hybrids.
FLAG_SHARE = 0.01


@contextmanager
def _step(console: Console, number: int, title: str) -> Iterator[None]:
    """Print a step's title, run it, then print how long it took."""
    console.print()
    console.rule(Text(f"{number}. {title}", style="bold"), align="left")
    start = time.perf_counter()
    yield
    console.print(f"({time.perf_counter() - start:.2f} s)", style="dim")


def _write_sessions(table: pa.Table, folder: Path) -> list[Path]:
    """Split the sessions into up to N_FILES Parquet files; remove what an earlier run left."""
    folder.mkdir(parents=True, exist_ok=True)
    ours = sorted(folder.glob("part-*.parquet"))
    foreign = sorted(p.name for p in folder.iterdir() if p not in ours)
    if foreign:
        raise FileExistsError(
            f"{folder} holds files the demo did not write ({', '.join(foreign[:3])}); the demo "
            "fits every file there, so give it an empty or new --dir"
        )
    for old in ours:
        old.unlink()
    n_files = min(N_FILES, table.num_rows)
    bounds = np.linspace(0, table.num_rows, n_files + 1).astype(int)
    paths = []
    for k in range(n_files):
        path = folder / f"part-{k:02d}.parquet"
        pq.write_table(table.slice(bounds[k], bounds[k + 1] - bounds[k]), path)
        paths.append(path)
    return paths


def _recovered(model: treewise.DependencyTree) -> tuple[int, list[tuple[str, str]]]:
    """How many hidden edges the fit found (ignoring direction), and the ones it missed."""
    names = [str(name) for name in model.feature_names_in_]
    fitted = {frozenset((names[int(p)], names[c])) for c, p in enumerate(model.parent_) if p >= 0}
    missed = [edge for edge in hidden_edges() if frozenset(edge) not in fitted]
    return len(hidden_edges()) - len(missed), missed


def _varied(rows: pa.Table, names: list[str]) -> pa.Table:
    """Up to EXAMPLES of ``rows`` (most surprising first), each led by a different column."""
    picks: list[int] = []
    leaders: set[str] = set()
    for r, reasons in enumerate(explain_rows(rows, names)):
        if reasons and reasons[0][0] not in leaders:
            leaders.add(reasons[0][0])
            picks.append(r)
            if len(picks) == EXAMPLES:
                break
    return rows.take(picks)


def _synthetic_table(
    model: treewise.DependencyTree, again: treewise.DependencyTree
) -> tuple[Table, float]:
    """Each edge's mutual information in the fitted model and refitted on synthetic rows."""
    names = [str(name) for name in model.feature_names_in_]
    position = {str(name): i for i, name in enumerate(again.feature_names_in_)}
    table = Table(title="Mutual information of each tree edge (nats)")
    table.add_column("edge")
    table.add_column("fitted", justify="right")
    table.add_column("synthetic", justify="right")
    table.add_column("difference", justify="right")
    largest = 0.0
    edges = [(int(p), c) for c, p in enumerate(model.parent_) if p >= 0]
    edges.sort(key=lambda e: -model.mutual_info_[e[1]])
    for p, c in edges:
        fitted = float(model.pairwise_mutual_info_[p, c])
        drawn = float(again.pairwise_mutual_info_[position[names[p]], position[names[c]]])
        largest = max(largest, abs(drawn - fitted))
        table.add_row(
            f"{names[p]} - {names[c]}", f"{fitted:.4f}", f"{drawn:.4f}", f"{drawn - fitted:+.4f}"
        )
    return table, largest


@dataclass(frozen=True)
class VisitorFigures:
    """What the two-visitor step measures, on training and held-out sessions of its seed."""

    tree: treewise.DependencyTree
    mixture: TreeMixture
    train_rows: int
    train: pa.Table
    held_out: pa.Table
    crawler_component: int
    crawlers_found: float  # held-out crawlers whose most responsible component is the crawlers'
    purity: float  # sessions the crawler component explains best that are crawlers
    tree_mean: float  # held-out mean ln p per session
    mixture_mean: float
    n_planted: int
    n_flagged: int
    tree_caught: int
    mixture_caught: int


def visitor_figures(rows: int, seed: int) -> VisitorFigures:
    """Fit a tree and a mixture of two to people and crawlers; measure them on held-out rows.

    ``rows`` (clipped to VISITOR_ROWS) training sessions and half as many held-out ones are
    drawn by :func:`treewise.datasets.shop_sessions_with_crawlers` (seeds ``seed + 10`` and
    ``seed + 11``); the held-out ones hold hybrid anomalies. Each model flags the FLAG_SHARE
    of held-out sessions with the lowest ``score_samples``.
    """
    n_train = min(max(rows, VISITOR_ROWS[0]), VISITOR_ROWS[1])
    train = shop_sessions_with_crawlers(n_train, seed=seed + 10, crawler_share=CRAWLER_SHARE)
    held = shop_sessions_with_crawlers(
        n_train // 2, seed=seed + 11, crawler_share=CRAWLER_SHARE, anomaly_rate=HYBRID_RATE
    )
    columns = model_columns(train)
    mixture = TreeMixture(n_components=2, columns=columns, random_state=seed).fit(train)
    tree = mixture.single_tree_  # the tree fitted to the same rows, on the same codebook
    crawler = np.asarray(held["visitor_kind"].to_pylist()) == "crawler"
    planted = np.asarray(held["planted_anomaly"].to_pylist(), dtype=np.bool_)
    best = mixture.predict(held)
    found = [float(np.mean(best[crawler] == k)) if crawler.any() else 0.0 for k in range(2)]
    k = int(np.argmax(found))
    tree_scores, mixture_scores = tree.score_samples(held), mixture.score_samples(held)
    n_flagged = max(1, math.ceil(held.num_rows * FLAG_SHARE))

    def caught(scores: npt.NDArray[np.float64]) -> int:
        return int(planted[np.argsort(scores, kind="stable")[:n_flagged]].sum())

    return VisitorFigures(
        tree=tree,
        mixture=mixture,
        train_rows=n_train,
        train=train,
        held_out=held,
        crawler_component=k,
        crawlers_found=found[k],
        purity=float(np.mean(crawler[best == k])) if (best == k).any() else 0.0,
        tree_mean=float(tree_scores.mean()),
        mixture_mean=float(mixture_scores.mean()),
        n_planted=int(planted.sum()),
        n_flagged=n_flagged,
        tree_caught=caught(tree_scores),
        mixture_caught=caught(mixture_scores),
    )


def run(rows: int, directory: Path, seed: int, progress: bool | None = None) -> None:
    """Run the demo and print what it finds.

    Parameters
    ----------
    rows : int
        How many sessions to generate.
    directory : Path
        Where to write the sessions (``sessions/``), the model, the scores, the synthetic rows
        and the HTML report; created when missing.
    seed : int
        Seed of the data and of the synthetic rows.
    progress : bool, optional
        Progress bars: None shows them only when stderr is a terminal.
    """
    console = Console(highlight=False, markup=False, soft_wrap=True)
    begin = time.perf_counter()
    written: list[Path] = []  # every step adds the files it wrote, for the closing list
    folder = directory / "sessions"
    model_path = directory / "shop.treewise"
    scores_path = directory / "scores.parquet"
    synthetic_path = directory / "synthetic.parquet"
    report_path = directory / "report.html"
    week_two = directory / "week2"
    changes_path = directory / "changes.html"
    visitors_path = directory / "visitors-mixture.treewise"
    visitors_report = directory / "visitors.html"

    with _step(console, 1, f"Generate {rows:,} sessions of an invented shop"):
        table = shop_sessions(n=rows, seed=seed)
        paths = _write_sessions(table, folder)
        written.append(folder)
        columns = model_columns(table)
        left_out = [name for name in table.column_names if name not in columns]
        n_planted = int(pc.sum(table["planted_anomaly"].cast(pa.int64())).as_py() or 0)
        console.print(
            f"Wrote {len(paths)} Parquet files to {folder}/: {table.num_columns} columns, "
            f"{len(columns)} to model ({', '.join(left_out)} left out), {n_planted:,} planted "
            "anomalies."
        )
        del table

    with _step(console, 2, "Fit a dependency tree to the files, streaming"):
        model = treewise.DependencyTree(columns=columns).fit(folder, progress=progress)
        model.save(model_path)
        written.append(model_path)
        console.print(
            f"Fitted {model.n_rows_:,} rows x {model.n_features_in_} columns; saved {model_path}."
        )

    with _step(console, 3, "The tree"):
        console.print(tree_view(model, str(model_path)))

    with _step(console, 4, "Compare with the hidden tree the data was drawn from"):
        found, missed = _recovered(model)
        console.print(
            f"Recovered {found} of {len(hidden_edges())} hidden edges (ignoring direction)."
        )
        for parent, child in missed:
            console.print(f"  missed: {parent} - {child}")

    with _step(console, 5, "Score every session; do the planted anomalies stand out?"):
        n_top = max(1, math.ceil(model.n_rows_ * TOP_SHARE))
        worst = model.score_to_parquet(folder, scores_path, keys=KEYS, top=n_top, progress=progress)
        written.append(scores_path)
        caught = worst.filter(worst["planted_anomaly"])
        console.print(
            f"Wrote {scores_path}. Of {n_planted:,} planted anomalies, {caught.num_rows:,} rank "
            f"among the {worst.num_rows:,} most surprising sessions (the top 1%): "
            f"{caught.num_rows / worst.num_rows:.1%} of those, against "
            f"{n_planted / model.n_rows_:.1%} of all sessions."
        )
        if caught.num_rows:
            names = [str(name) for name in model.feature_names_in_]
            examples = _varied(caught, names)
            title = "Caught planted anomalies, the most surprising one per leading column"
            console.print(surprising_table(examples, names, ["session_id"], title))
            normal = worst.filter(pc.invert(worst["planted_anomaly"]))
            if normal.num_rows:
                reasons = explain_rows(normal.slice(0, 1), names)[0]
                console.print(
                    f"The most surprising ordinary session, row {normal['row'][0].as_py():,}, "
                    f"stands out by {', '.join(name for name, _ in reasons)}."
                )
        console.print(SCORE_CAUTION)

    with _step(console, 6, f"Draw {SYNTHETIC_ROWS:,} synthetic sessions and check them"):
        model.sample_to_parquet(
            SYNTHETIC_ROWS, synthetic_path, random_state=seed, progress=progress
        )
        written.append(synthetic_path)
        again = treewise.DependencyTree(columns=list(model.feature_names_in_)).fit(
            synthetic_path, progress=progress
        )
        comparison, largest = _synthetic_table(model, again)
        console.print(comparison)
        console.print(
            f"Wrote {synthetic_path}. Largest absolute difference over the "
            f"{comparison.row_count} edges: {largest:.4f} nats."
        )
        # Values against values: as many real sessions, picked at random, column by column.
        names = [str(n) for n in model.feature_names_in_]
        sessions = pads.dataset(folder, format="parquet")
        rng = np.random.default_rng(seed)
        total = sessions.count_rows()
        picked = np.sort(rng.choice(total, min(total, SYNTHETIC_ROWS), replace=False))
        real = sessions.take(picked, columns=names)
        synthetic = pq.read_table(synthetic_path)
        per_column, _ = compare_columns(real, synthetic, dict(model.kinds_), rng)
        console.print(fidelity_table(per_column, "Each column, synthetic against real sessions"))
        worst_column = max(per_column.to_pylist(), key=lambda r: r["excess"])
        console.print(
            f"The largest excess over the bootstrap noise floor is {worst_column['excess']:+.3f} "
            f"({worst_column['measure']} of {worst_column['column']!r}); near 0 means the "
            "synthetic column is "
            "as close to the real one as a resample of the real sessions is."
        )
        console.print(SAMPLE_CAUTION)

    with _step(console, 7, "Write an HTML report"):
        from treewise.views.report import write_report  # matplotlib loads only here

        write_report(
            model,
            report_path,
            folder,
            keys=["session_id"],
            synthetic_rows=REPORT_SYNTHETIC_ROWS,
            random_state=seed,
            title="Dependency tree of an invented shop's sessions",
        )
        written.append(report_path)
        console.print(
            f"Wrote {report_path}: the tree, its edges and conditional tables, each column, the "
            "scores, the most surprising sessions and the synthetic check, on one page that "
            "opens offline in any browser."
        )

    n_week_two = max(1, int(rows * WEEK_TWO_SHARE))
    with _step(console, 8, f"A second week of {n_week_two:,} sessions: what changed?"):
        from treewise.views.changes import write_changes_report

        week = shop_sessions_broken_tag(n=n_week_two, seed=seed + 1)
        _write_sessions(week, week_two)
        written.append(week_two)
        del week
        console.print(
            f"Wrote {week_two}/. A release broke a tracking tag: cart_add no longer fires for "
            f"{BROKEN_TAG_BROWSER} browsers. Shoppers behave as before; can compare tell?"
        )
        # Data on both sides: one codebook over both weeks, so values new in week two get
        # codes of their own.
        changes = treewise.compare(folder, week_two, columns=columns, progress=progress)
        console.print(changed_columns_table(changes, k=3))
        top_column = changes.columns["column"][0].as_py()
        where = changes.drill_down(top_column).to_pylist()[0]
        console.print(f"{top_column!r} changed most where {where['moved']}.")
        console.print(changed_edges_table(changes, k=3))
        new_rows = changes.top_rows(week_two, top=WEEK_TWO_ROWS, keys=["session_id"])
        write_changes_report(
            changes,
            changes_path,
            rows=new_rows,
            keys=["session_id"],
            title="What changed in the shop's second week",
        )
        written.append(changes_path)
        console.print(
            f"Wrote {changes_path}: both trees with the changed edges marked, the shifted "
            "columns, both conditional tables of each changed edge, where the change sits, "
            "and the sessions most unlike the first week."
        )

    with _step(console, 9, "Two kinds of visitor: one tree, or a mixture of two trees?"):
        from treewise.views.mixture_report import write_mixture_report

        seen = visitor_figures(rows, seed)
        mix = seen.mixture
        n_held = seen.held_out.num_rows
        console.print(
            f"Drew {seen.train_rows:,} training and {n_held:,} held-out sessions of the same shop "
            f"in which {CRAWLER_SHARE:.0%} are scripted crawlers. Crawlers follow a tree of their "
            "own: they land anywhere, go as deep as the landing page suggests, a second or so "
            "per page, and never buy. In the held-out sessions, "
            f"{seen.n_planted:,} people's sessions took a crawler's navigation (hybrid "
            "anomalies): many pages at about a second each, which people never do, though "
            "such navigation on its own is common among all sessions, crawlers included."
        )
        mix.save(visitors_path)
        written.append(visitors_path)
        state = "converged" if mix.converged_ else "not converged"
        console.print(
            f"Fitted one tree and a mixture of 2 trees ({mix.n_iter_} EM iterations, {state}) "
            f"to the training sessions; saved the mixture to {visitors_path}."
        )
        console.print(mixture_table(mix))
        console.print(
            f"Component {seen.crawler_component} is the crawlers: it is the most responsible "
            f"component of {seen.crawlers_found:.1%} of the held-out crawler sessions, and "
            f"{seen.purity:.1%} of the sessions it explains best are crawlers."
        )
        gain = seen.mixture_mean - seen.tree_mean
        console.print(
            f"Held-out mean ln p per session: {seen.tree_mean:.3f} under the tree, "
            f"{seen.mixture_mean:.3f} under the mixture, a gain of {gain:.3f} nats per session."
        )
        planted = max(1, seen.n_planted)
        console.print(
            f"Flagging the {seen.n_flagged:,} lowest-scoring held-out sessions "
            f"({FLAG_SHARE:.0%}): the tree catches {seen.tree_caught} of the "
            f"{seen.n_planted} hybrid anomalies ({seen.tree_caught / planted:.0%}), the mixture "
            f"{seen.mixture_caught} ({seen.mixture_caught / planted:.0%})."
        )
        write_mixture_report(
            mix,
            visitors_report,
            seen.held_out,
            keys=["session_id", "visitor_kind"],
            training=seen.train,
            title="A mixture of two trees: the shop's people and crawlers",
        )
        written.append(visitors_report)
        console.print(
            f"Wrote {visitors_report}: both trees side by side, the edges the single tree "
            "lacks, the held-out sessions each component explains, and both models' mean ln p "
            "on the held-out and the training sessions."
        )
        console.print(SCORE_CAUTION)

    console.print()
    console.rule(Text("Done", style="bold"), align="left")
    console.print(f"In {time.perf_counter() - begin:.1f} s the demo wrote:")
    for path in written:
        console.print(f"  {path}")
    console.print("Try next:")
    console.print(f"  treewise show {model_path}")
    console.print(
        f"  treewise score {model_path} {folder} -o scored.parquet --key session_id --surprisal"
    )
    console.print(f"  treewise sample {model_path} -n 10000 -o more-sessions.parquet --seed 1")
    console.print(f"  treewise report {model_path} -o shop-report.html")
    console.print(f"  treewise show {visitors_path}")
    console.print(
        f"  treewise compare {folder} {week_two} -o week2-changes.html "
        "--exclude session_id,planted_anomaly --key session_id"
    )
