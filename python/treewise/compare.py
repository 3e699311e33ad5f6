"""Compare two tables: which columns shifted, which dependencies changed, which rows are new."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
import pyarrow as pa

from treewise.categories import category_label
from treewise.checks import MAX_CATEGORIES, check_alpha, check_int, check_kinds
from treewise.errors import DataError, NotFittedError, SchemaError
from treewise.estimator import DependencyTree
from treewise.homogeneity import MIN_EXPECTED, column_test, edge_test, holm
from treewise.pairstats import PairStats
from treewise.passes import TypeRecorder, learn_and_count_many
from treewise.progress import PassProgress, wants_progress
from treewise.sources import BATCH_ROWS, BatchLoop, check_columns, open_source

__all__ = ["Comparison", "compare"]

#: How many moved values (or cells) each row of ``columns`` and ``edges`` names.
MOVED = 3


@dataclass(repr=False)
class Comparison:
    """What changed between a reference table and a current one (see :func:`compare`).

    Attributes
    ----------
    reference, current : DependencyTree
        Each side's fitted tree, both on one codebook.
    columns : pyarrow.Table
        One row per column, most changed first: ``column``, ``tv_distance`` (total variation
        distance between the two sides' shares), ``g_statistic``, ``dof``, ``p_value`` (G-test
        of homogeneity), ``p_adjusted`` (Holm, over every column and edge test), ``changed``
        (``p_adjusted`` below ``level``), and ``moved`` (the values whose share moved most, as
        text).
    edges : pyarrow.Table
        One row per edge of either tree (no duplicates), most changed first: ``parent``,
        ``child``, ``tree`` (``both``, ``reference`` or ``current``), ``mi_reference`` and
        ``mi_current`` (mutual information in nats on each side), ``tv_conditional`` (the
        parent-weighted total variation between the two sides' P(child | parent)),
        ``g_statistic``, ``dof``, ``p_value`` and ``p_adjusted`` for whether P(child | parent)
        changed, ``changed``, and ``moved`` (the cells that moved most). The statistics are
        null when a side's counts of the pair are unknown (a loaded model keeps only its
        edges' tables).
    level : float
        The family-wise error rate below which a test counts as ``changed``.

    Both tables list the changed rows first, largest effect first (``tv_distance``,
    ``tv_conditional``), then the rest by adjusted p.
    """

    reference: DependencyTree
    current: DependencyTree
    columns: pa.Table
    edges: pa.Table
    level: float

    def __repr__(self) -> str:
        columns = sum(bool(c) for c in self.columns["changed"].to_pylist())
        edges = sum(bool(c) for c in self.edges["changed"].to_pylist())
        return (
            f"Comparison({self.n_reference:,} reference rows, {self.n_current:,} current rows: "
            f"{columns} of {self.columns.num_rows} columns and {edges} of {self.edges.num_rows} "
            f"edges changed at {self.level:g})"
        )

    @property
    def can_drill_down(self) -> bool:
        """Whether both sides know every pair's counts (models fitted here, not loaded)."""
        return all(model._stats is not None for model in (self.reference, self.current))

    @property
    def n_reference(self) -> int:
        """Rows of the reference side."""
        return int(self.reference.n_rows_)

    @property
    def n_current(self) -> int:
        """Rows of the current side."""
        return int(self.current.n_rows_)

    def score_samples(self, data: Any) -> npt.NDArray[np.float64]:
        """The log-likelihood ratio ln p_current(x) - ln p_reference(x) of each row, in nats.

        Positive: the row is more likely under the current side's model (it belongs to the new
        regime); negative: it looks like the reference. It equals
        ``current.score_samples(data) - reference.score_samples(data)``.
        """
        current = self.current.score_samples(data)
        result: npt.NDArray[np.float64] = current - self.reference.score_samples(data)
        return result

    def score_columns(self, data: Any) -> pa.Table:
        """Each column's share of :meth:`score_samples`, row by row (as ``surprisal`` has).

        Returns
        -------
        pyarrow.Table
            One float64 column per modelled column holding ln P_cur(x_c | its parent in the
            current tree) - ln P_ref(x_c | its parent in the reference tree), and ``total``
            (their sum, equal to :meth:`score_samples`).
        """
        ref = self.reference.surprisal(data)
        cur = self.current.surprisal(data)
        return pa.table(
            {
                name: pa.array(
                    ref.column(name).to_numpy() - cur.column(name).to_numpy(), pa.float64()
                )
                for name in ref.column_names
            }
        )

    def top_rows(
        self, data: Any, top: int = 20, keys: Sequence[str] = (), batch_rows: int = BATCH_ROWS
    ) -> pa.Table:
        """The ``top`` rows of ``data`` most unlike the reference, read batch by batch.

        Rows are ranked by :meth:`score_samples` (highest first: far more likely under the
        current model than under the reference), ties by position. Memory stays near one batch.

        Returns
        -------
        pyarrow.Table
            ``row`` (position in ``data``), the ``keys`` columns, the modelled columns' values,
            ``score`` and, per modelled column, ``ratio_<column>`` (its share of the score, as
            :meth:`score_columns` gives it).
        """
        top = check_int("top", top, 0, 1_000_000)
        if isinstance(keys, str) or not all(isinstance(k, str) for k in keys):
            raise TypeError(f"keys= must be a list of column names, got {keys!r}")
        names = [str(n) for n in self.reference.feature_names_in_]
        wanted = list(keys) + [n for n in names if n not in keys]
        source = open_source(data)
        wanted = check_columns(source.names, wanted, source.description)
        best: pa.Table | None = None
        start = 0
        with BatchLoop(source, wanted, batch_rows) as batches:
            for batch in batches:
                table = pa.Table.from_batches([batch])
                scores = self.score_samples(table.select(names))
                # Only the batch's own top rows can enter the overall top: break them down.
                keep = np.lexsort((np.arange(scores.size), -scores))[:top]
                picked = table.take(keep)
                parts = self.score_columns(picked.select(names))
                picked = picked.append_column("row", pa.array(start + keep, pa.int64()))
                picked = picked.append_column("score", pa.array(scores[keep], pa.float64()))
                for n in names:
                    picked = picked.append_column(f"ratio_{n}", parts.column(n))
                start += table.num_rows
                best = picked if best is None else pa.concat_tables([best, picked])
                order = np.lexsort(
                    (best.column("row").to_numpy(), -best.column("score").to_numpy())
                )
                best = best.take(order[:top])
        if best is None:
            return pa.table({"row": pa.array([], pa.int64()), "score": pa.array([], pa.float64())})
        first = ["row", *keys, *[n for n in names if n not in keys], "score"]
        return best.select(first + [f"ratio_{n}" for n in names])

    def drill_down(self, column: str) -> pa.Table:
        """Where a column's change sits: its conditional shift given each other column.

        For every other column Y, P(column | Y) is tested across the two sides as an edge is
        (the G-test of conditional independence of side and ``column`` given Y, with the same
        pooling of sparse levels). A change that comes from one value of Y (a broken tag on one
        browser) is homogeneous in every other stratum and complete in that one, so its G is
        the largest.

        Returns
        -------
        pyarrow.Table
            One row per other column, largest ``g_statistic - dof`` first (the excess over its
            expectation when nothing changed): ``by``, ``value`` (the value of ``by`` whose
            rows moved most), ``share`` (the share of rows, both sides, holding it), ``tv``
            (total variation between the sides' P(column | by = value)), ``moved`` (its
            largest cell change, as text), ``g_statistic``, ``dof`` and ``p_value``.
        """
        names = [str(n) for n in self.reference.feature_names_in_]
        if column not in names:
            raise KeyError(f"{column!r} is not a compared column; they are {names}")
        x = names.index(column)
        cats = self.reference.categories_
        rows: list[dict[str, Any]] = []
        for y, by in enumerate(names):
            if y == x:
                continue
            try:
                a = self.reference.joint_counts(y, x).astype(np.float64)
                b = self.current.joint_counts(y, x).astype(np.float64)
            except NotFittedError as e:
                raise NotFittedError(
                    f"drill_down needs every pair's counts on both sides, but {e}; compare the "
                    "data rather than loaded models"
                ) from e
            g, dof, p = edge_test(a, b)
            cond_a, cond_b = _conditional(a), _conditional(b)
            seen = (a.sum(axis=1) > 0) & (b.sum(axis=1) > 0)
            tv = 0.5 * np.abs(cond_b - cond_a).sum(axis=1) * seen
            k = int(np.argmax(tv))
            cell = int(np.argmax(np.abs(cond_b[k] - cond_a[k])))
            rows.append(
                {
                    "by": by,
                    "value": category_label(cats[y][k]),
                    "share": float((a[k].sum() + b[k].sum()) / (a.sum() + b.sum())),
                    "tv": float(tv[k]),
                    "moved": f"{by}={category_label(cats[y][k])}: {column}="
                    f"{category_label(cats[x][cell])} {cond_a[k, cell]:.1%} → "
                    f"{cond_b[k, cell]:.1%}",
                    "g_statistic": g,
                    "dof": dof,
                    "p_value": p,
                }
            )
        rows.sort(key=lambda r: (-(r["g_statistic"] - r["dof"]), r["by"]))
        return pa.Table.from_pylist(rows)

    def to_dict(self, top: int | None = None) -> dict[str, Any]:
        """The comparison as plain JSON-ready data: sizes, columns and edges (``top`` of each).

        A p-value that underflowed to 0 stays 0; NaN (an edge that could not be tested)
        becomes None.
        """

        def rows(table: pa.Table) -> list[dict[str, Any]]:
            picked = table if top is None else table.slice(0, top)
            out = picked.to_pylist()
            for row in out:
                for key, value in row.items():
                    if isinstance(value, float) and not math.isfinite(value):
                        row[key] = None
            return out

        return {
            "n_reference": self.n_reference,
            "n_current": self.n_current,
            "correction": "holm",
            "level": self.level,
            "min_expected": MIN_EXPECTED,
            "columns": rows(self.columns),
            "edges": rows(self.edges),
        }


def compare(
    reference: Any,
    current: Any,
    *,
    columns: Sequence[str] | None = None,
    max_categories: int = 128,
    n_bins: int = 10,
    kinds: Mapping[str, str] | None = None,
    alpha: float = 0.5,
    level: float = 0.001,
    progress: bool | None = None,
    batch_rows: int | None = None,
) -> Comparison:
    """Compare a reference table with a current one.

    Parameters
    ----------
    reference, current : data or DependencyTree
        Each side is data (any source ``DependencyTree.fit`` accepts, streams included) or a
        fitted model. Data on both sides is encoded with one codebook learned over both sides'
        batches, then each side is counted with it and gets its own tree. A model and data: the
        data is counted with the model's codebook. Two models must share one codebook (fit the
        current side with ``codebook=reference.codebook_``, or pass data instead).
    columns, max_categories, n_bins, kinds, alpha
        As for :class:`DependencyTree`, for data on both sides.
    level : float, default 0.001
        A column or edge whose Holm-adjusted p-value is below ``level`` is ``changed``: the
        chance that any unchanged one is flagged is at most ``level``.
    progress : bool, optional
        Progress bars (default: only when stderr is a terminal).
    batch_rows : int, optional
        Rows per batch read.

    Returns
    -------
    Comparison

    Notes
    -----
    Every test is a G-test on the exact counts of the two sides. A column's test compares its
    shares on the two sides (a 2 x r table). An edge's test compares P(child | parent): for each
    parent value, the 2 x r_child table of side by child value, with G and dof summed over the
    parent values (the G-test of conditional independence of side and child given the parent).
    Before each 2 x k table is tested, levels counted on neither side are dropped and levels
    whose expected count on either side is below 5 are pooled into one (common practice; see
    docs/compare.md). The p-values of every column and edge test together are adjusted by
    Holm's step-down method, which controls the family-wise error rate under any dependence
    between the tests: they share counts, so they are not independent. The changed rows come
    first, by effect size (``tv_distance``, ``tv_conditional``) descending: on large tables
    many p-values underflow to 0, and the size of a change ranks them better than its p.

    A p-value says how surprising the difference would be if both tables came from one
    distribution. On large tables tiny differences are significant: read the effect sizes too.
    """
    rows = check_int("batch_rows", BATCH_ROWS if batch_rows is None else batch_rows, 1, 2**31)
    alpha = check_alpha(alpha)
    if isinstance(level, bool) or not isinstance(level, (int, float)) or not 0 < level < 1:
        raise ValueError(f"level must be a number strictly between 0 and 1, got {level!r}")
    ref_is_model = isinstance(reference, DependencyTree)
    cur_is_model = isinstance(current, DependencyTree)
    if ref_is_model and cur_is_model:
        ref_model, cur_model = _fitted_pair(reference, current)
    elif ref_is_model or cur_is_model:
        model = reference if ref_is_model else current
        data = current if ref_is_model else reference
        codebook = model._fitted().codebook
        names = list(codebook.names)
        other = DependencyTree(columns=names, alpha=alpha, root=_root_name(model))
        try:
            other.fit(data, codebook=codebook, progress=progress, batch_rows=rows)
        except DataError as e:
            if "never seen" not in str(e):
                raise
            raise DataError(
                f"{e}. The data is counted with the model's codebook, which lacks this value; "
                "pass the data of both sides instead, so that one codebook covers both"
            ) from e
        ref_model, cur_model = (model, other) if ref_is_model else (other, model)
    else:
        ref_model, cur_model = _fit_both(
            reference, current, columns, max_categories, n_bins, kinds, alpha, progress, rows
        )
    return _compared(ref_model, cur_model, float(level))


def _root_name(model: DependencyTree) -> str:
    return str(model.feature_names_in_[model._fitted().root])


def _fitted_pair(
    reference: DependencyTree, current: DependencyTree
) -> tuple[DependencyTree, DependencyTree]:
    """Two fitted models, checked to share one codebook."""
    ref_book, cur_book = reference._fitted().codebook, current._fitted().codebook
    if ref_book != cur_book:
        raise SchemaError(
            "the two models were fitted with different codebooks, so their counts do not line "
            "up code by code; pass the data of both sides instead (treewise.compare(ref_data, "
            "cur_data) learns one codebook over both), or fit the current side with "
            "codebook=reference.codebook_"
        )
    return reference, current


def _fit_both(
    reference: Any,
    current: Any,
    columns: Sequence[str] | None,
    max_categories: int,
    n_bins: int,
    kinds: Mapping[str, str] | None,
    alpha: float,
    progress: bool | None,
    rows: int,
) -> tuple[DependencyTree, DependencyTree]:
    """One codebook over both sides' batches, then each side counted and fitted with it."""
    max_categories = check_int("max_categories", max_categories, 2, MAX_CATEGORIES)
    n_bins = check_int("n_bins", n_bins, 1, MAX_CATEGORIES - 1)
    sources = [open_source(reference), open_source(current)]
    names = check_columns(sources[0].names, columns, f"the reference ({sources[0].description})")
    check_columns(sources[1].names, names, f"the current data ({sources[1].description})")
    checked_kinds = check_kinds(kinds, names)
    sizes = [s.total_rows for s in sources]
    total = None if any(n is None for n in sizes) else sum(n for n in sizes if n is not None)
    types = TypeRecorder(names)
    models: list[DependencyTree] = []
    with PassProgress(wants_progress(progress), total, sum(s.n_parts for s in sources)) as bar:
        codebook, counted, kept_types = learn_and_count_many(
            sources, names, max_categories, n_bins, rows, bar, types, checked_kinds
        )
    kept = list(codebook.names)
    dtypes = kept_types.type_names(codebook)
    root: str | None = None
    for side, counts in zip(("reference", "current"), counted, strict=True):
        stats = PairStats.from_counts(codebook, counts, dtypes)
        if stats.n_rows == 0:
            raise DataError(f"the {side} side has 0 rows; a comparison needs rows on both")
        model = DependencyTree(columns=kept, alpha=alpha, root=root)
        model.fit_stats(stats, copy=False)
        root = _root_name(model)  # both trees hang from one root, so edges orient alike
        models.append(model)
    return models[0], models[1]


def _compared(ref: DependencyTree, cur: DependencyTree, level: float) -> Comparison:
    """The column and edge tests of two fitted models on one codebook."""
    names = [str(n) for n in ref.feature_names_in_]
    categories = ref.categories_
    column_rows: list[dict[str, Any]] = []
    for i, name in enumerate(names):
        a = ref.marginal_counts(i).astype(np.float64)
        b = cur.marginal_counts(i).astype(np.float64)
        g, dof, p = column_test(a, b)
        share_a, share_b = _shares(a), _shares(b)
        moved = np.argsort(-np.abs(share_b - share_a), kind="stable")[:MOVED]
        column_rows.append(
            {
                "column": name,
                "tv_distance": 0.5 * float(np.abs(share_a - share_b).sum()),
                "g_statistic": g,
                "dof": dof,
                "p_value": p,
                "moved": [
                    f"{category_label(categories[i][k])}: {share_a[k]:.1%} → {share_b[k]:.1%}"
                    for k in moved
                    if share_a[k] != share_b[k]
                ],
            }
        )
    edge_rows = [_edge_row(ref, cur, p, c, tree) for p, c, tree in _edge_union(ref, cur)]
    everything = column_rows + edge_rows
    # A table with nothing left to compare (dof 0) is no test: p = 1, not counted by Holm.
    p_all = [r["p_value"] if r["dof"] != 0 else math.nan for r in everything]
    adjusted = holm(np.array(p_all, dtype=np.float64))
    for row, q in zip(everything, adjusted, strict=True):
        row["p_adjusted"] = 1.0 if row["dof"] == 0 else float(q)
        row["changed"] = bool(q < level)
    column_rows.sort(
        key=lambda r: (not r["changed"], -r["tv_distance"], r["p_adjusted"], r["column"])
    )
    edge_rows.sort(key=lambda r: _edge_order(r))
    tests: list[pa.Field[Any]] = [
        pa.field("g_statistic", pa.float64()),
        pa.field("dof", pa.int64()),
        pa.field("p_value", pa.float64()),
        pa.field("p_adjusted", pa.float64()),
        pa.field("changed", pa.bool_()),
        pa.field("moved", pa.list_(pa.string())),
    ]
    column_fields: list[pa.Field[Any]] = [
        pa.field("column", pa.string()),
        pa.field("tv_distance", pa.float64()),
    ]
    edge_fields: list[pa.Field[Any]] = [
        *(pa.field(name, pa.string()) for name in ("parent", "child", "tree")),
        *(
            pa.field(name, pa.float64())
            for name in ("mi_reference", "mi_current", "tv_conditional")
        ),
    ]
    column_schema = pa.schema(column_fields + tests)
    edge_schema = pa.schema(edge_fields + tests)
    return Comparison(
        reference=ref,
        current=cur,
        columns=pa.Table.from_pylist(column_rows, schema=column_schema),
        edges=pa.Table.from_pylist(
            [{k: _null_nan(v) for k, v in r.items()} for r in edge_rows], schema=edge_schema
        ),
        level=level,
    )


def _null_nan(value: Any) -> Any:
    return None if isinstance(value, float) and math.isnan(value) else value


def _edge_order(row: dict[str, Any]) -> tuple[bool, float, float, str, str]:
    untested = math.isnan(row["p_adjusted"])
    return (
        not row["changed"],
        0.0 if untested else -row["tv_conditional"],
        math.inf if untested else row["p_adjusted"],
        row["parent"],
        row["child"],
    )


def _conditional(joint: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    """P(child | parent) per row of a parent x child table (a row without counts stays 0)."""
    result: npt.NDArray[np.float64] = joint / np.maximum(joint.sum(axis=1, keepdims=True), 1.0)
    return result


def _shares(counts: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    total = counts.sum()
    return counts / total if total > 0 else counts


def _edge_union(ref: DependencyTree, cur: DependencyTree) -> list[tuple[int, int, str]]:
    """(parent, child, tree) of every edge of either tree, oriented as the reference has it."""
    ref_edges = {(int(p), c) for c, p in enumerate(ref.parent_) if p >= 0}
    cur_edges = {(int(p), c) for c, p in enumerate(cur.parent_) if p >= 0}
    out = []
    for p, c in sorted(ref_edges):
        out.append((p, c, "both" if (p, c) in cur_edges or (c, p) in cur_edges else "reference"))
    for p, c in sorted(cur_edges):
        if (p, c) not in ref_edges and (c, p) not in ref_edges:
            out.append((p, c, "current"))
    return out


def _edge_row(
    ref: DependencyTree, cur: DependencyTree, p: int, c: int, tree: str
) -> dict[str, Any]:
    names = [str(n) for n in ref.feature_names_in_]
    row: dict[str, Any] = {
        "parent": names[p],
        "child": names[c],
        "tree": tree,
        "mi_reference": float(ref.pairwise_mutual_info_[p, c]),
        "mi_current": float(cur.pairwise_mutual_info_[p, c]),
        "tv_conditional": math.nan,
        "g_statistic": math.nan,
        "dof": None,
        "p_value": math.nan,
        "moved": [],
    }
    try:
        a = ref.joint_counts(p, c).astype(np.float64)
        b = cur.joint_counts(p, c).astype(np.float64)
    except NotFittedError:
        return row  # a loaded model keeps only its own edges' tables
    g, dof, p_value = edge_test(a, b)
    cond_a, cond_b = _conditional(a), _conditional(b)
    both = a.sum(axis=1) + b.sum(axis=1)
    weight = both / both.sum()
    # Only parent values seen on both sides have two conditionals to compare.
    seen = (a.sum(axis=1) > 0) & (b.sum(axis=1) > 0)
    change = np.abs(cond_b - cond_a) * (weight * seen)[:, None]
    row.update(
        tv_conditional=0.5 * float(change.sum()),
        g_statistic=g,
        dof=dof,
        p_value=p_value,
    )
    order = np.argsort(-change, axis=None, kind="stable")[:MOVED]
    cats = ref.categories_
    moved = []
    for flat in order:
        x, y = divmod(int(flat), a.shape[1])
        if change[x, y] > 0:
            moved.append(
                f"{names[p]}={category_label(cats[p][x])}: {names[c]}="
                f"{category_label(cats[c][y])} {cond_a[x, y]:.1%} → {cond_b[x, y]:.1%}"
            )
    row["moved"] = moved
    return row
