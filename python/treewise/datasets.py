"""Synthetic example data: sessions of Larchwick Trail Supply, an invented online outdoor-gear shop.

Everything here is made up. Larchwick Trail Supply does not exist, its regions are invented, and
no row describes a real person or a real shop; the probabilities were chosen by hand to look
plausible, not measured anywhere. The operating-system families carry anonymised labels.

Each session is drawn from a *hidden dependency tree* that we wrote down ourselves
(:data:`SHOP_HIDDEN_EDGES`): the root column ``device`` is drawn from its marginal, and every other
column from a hand-written conditional table P(child | parent). Because the true tree is known, a
fitted :class:`treewise.DependencyTree` can be checked against it.

Two columns are not part of that tree and must be left out of a fit (:func:`model_columns` does):

``session_id``
    A unique int64 key. Every value is distinct, so it says nothing about the other columns.
``planted_anomaly``
    True for the share ``anomaly_rate`` of rows that were overwritten with scripted, impossible or
    very unlikely sessions (a purchase with no cart and no checkout, product views without page
    views, a night-time burst of bot-like clicks from a tablet). It is the answer key for anomaly
    scoring, so fitting on it would leak the answer.

Two pairs of columns are tied deterministically, which decides where they sit in the tree:
``checkout_started`` is true exactly when ``payment_method`` is not null, and ``purchase`` is true
exactly when ``basket_value_eur`` is not null (outside planted anomalies). The finer column of
each pair carries everything the coarser one does, so the hidden tree draws the finer column
from the upstream parent and derives the coarser one from it; a maximum-likelihood fit prefers
that layout.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Mapping, Sequence
from typing import Any, Final

import numpy as np
import numpy.typing as npt
import pyarrow as pa

__all__ = [
    "BROKEN_TAG_BROWSER",
    "SHOP_HIDDEN_EDGES",
    "hidden_edges",
    "model_columns",
    "shop_sessions",
    "shop_sessions_broken_tag",
    "shop_sessions_with_crawlers",
]

Level = str | bool
Codes = npt.NDArray[np.int64]

#: Columns a fit must leave out: a unique key and the answer keys (planted anomalies, and the
#: kind of visitor in :func:`shop_sessions_with_crawlers`).
NON_MODEL_COLUMNS: Final = ("session_id", "planted_anomaly", "visitor_kind")

#: The (parent, child) edges of the tree the sessions are drawn from, parents before children.
SHOP_HIDDEN_EDGES: Final[tuple[tuple[str, str], ...]] = (
    ("device", "browser_family"),
    ("device", "os_family"),
    ("device", "hour_bucket"),
    ("device", "referrer_kind"),
    ("hour_bucket", "weekday_bucket"),
    ("hour_bucket", "region"),
    ("region", "site_language"),
    ("referrer_kind", "landing_section"),
    ("referrer_kind", "returning_visitor"),
    ("returning_visitor", "logged_in"),
    ("returning_visitor", "newsletter_signup"),
    ("logged_in", "wishlist_add"),
    ("landing_section", "pages_viewed"),
    ("pages_viewed", "product_views"),
    ("pages_viewed", "session_seconds"),
    ("pages_viewed", "search_used"),
    ("search_used", "filter_used"),
    ("product_views", "cart_add"),
    ("cart_add", "payment_method"),
    ("payment_method", "checkout_started"),
    ("payment_method", "coupon_entered"),
    ("payment_method", "support_chat"),
    ("payment_method", "basket_value_eur"),
    ("basket_value_eur", "purchase"),
)

BOOL_LEVELS: Final[tuple[bool, bool]] = (False, True)

#: The levels of each categorical column in code order. Some levels occur only in planted
#: anomalies (pages_viewed "0"), so normal rows give them probability 0.
LEVELS: Final[dict[str, tuple[Level, ...]]] = {
    "device": ("desktop", "mobile", "tablet"),
    "browser_family": ("chrome", "safari", "firefox", "in_app", "other"),
    "os_family": ("desk_os_a", "desk_os_b", "desk_os_open", "mobile_os_a", "mobile_os_b", "other"),
    "hour_bucket": ("night", "morning", "afternoon", "evening"),
    "weekday_bucket": ("weekday", "weekend"),
    "region": ("highlands", "lowlands", "coast", "capital", "abroad"),
    "site_language": ("local", "english", "other"),
    "referrer_kind": ("direct", "search", "social", "email", "ad", "partner"),
    "landing_section": ("home", "category", "product", "sale", "guides", "campaign"),
    "returning_visitor": BOOL_LEVELS,
    "logged_in": BOOL_LEVELS,
    "newsletter_signup": BOOL_LEVELS,
    "wishlist_add": BOOL_LEVELS,
    "pages_viewed": ("0", "1", "2-3", "4-7", "8-15", "16+"),
    "product_views": ("0", "1", "2-4", "5-9", "10+"),
    "search_used": BOOL_LEVELS,
    "filter_used": BOOL_LEVELS,
    "cart_add": BOOL_LEVELS,
    # Code 0 stands for "no checkout" and becomes a null in the table.
    "payment_method": (
        "none",
        "card",
        "wallet",
        "invoice",
        "bank_transfer",
        "cash_on_delivery",
    ),
    "coupon_entered": BOOL_LEVELS,
    "support_chat": BOOL_LEVELS,
}

DEVICE_MARGINAL: Final = (0.38, 0.55, 0.07)

#: The browser family whose ``cart_add`` tag stops firing in the second week.
BROKEN_TAG_BROWSER: Final = "safari"

#: P(child | parent) for each categorical child: its parent and one row of probabilities per
#: parent level, aligned with LEVELS. Rows are normalised on use, so they need only be close to 1.
CONDITIONALS: Final[dict[str, tuple[str, Mapping[Level, Sequence[float]]]]] = {
    "browser_family": (
        "device",
        {
            "desktop": (0.62, 0.14, 0.14, 0.00, 0.10),
            "mobile": (0.45, 0.30, 0.03, 0.18, 0.04),
            "tablet": (0.35, 0.55, 0.03, 0.02, 0.05),
        },
    ),
    "os_family": (
        "device",
        {
            "desktop": (0.70, 0.22, 0.06, 0.00, 0.00, 0.02),
            "mobile": (0.00, 0.00, 0.00, 0.62, 0.36, 0.02),
            "tablet": (0.02, 0.00, 0.00, 0.38, 0.57, 0.03),
        },
    ),
    # Hours are shop-local time: desktops browse during work hours, phones and tablets at night
    # and in the evening.
    "hour_bucket": (
        "device",
        {
            "desktop": (0.05, 0.30, 0.45, 0.20),
            "mobile": (0.12, 0.20, 0.28, 0.40),
            "tablet": (0.08, 0.15, 0.22, 0.55),
        },
    ),
    "weekday_bucket": (
        "hour_bucket",
        {
            "night": (0.50, 0.50),
            "morning": (0.86, 0.14),
            "afternoon": (0.76, 0.24),
            "evening": (0.57, 0.43),
        },
    ),
    # Visitors from abroad live in other time zones, so they crowd the shop's night.
    "region": (
        "hour_bucket",
        {
            "night": (0.12, 0.13, 0.10, 0.15, 0.50),
            "morning": (0.22, 0.26, 0.18, 0.29, 0.05),
            "afternoon": (0.22, 0.25, 0.18, 0.29, 0.06),
            "evening": (0.21, 0.25, 0.19, 0.27, 0.08),
        },
    ),
    "site_language": (
        "region",
        {
            "highlands": (0.94, 0.04, 0.02),
            "lowlands": (0.95, 0.04, 0.01),
            "coast": (0.90, 0.08, 0.02),
            "capital": (0.86, 0.11, 0.03),
            "abroad": (0.12, 0.63, 0.25),
        },
    ),
    "referrer_kind": (
        "device",
        {
            "desktop": (0.30, 0.38, 0.06, 0.12, 0.08, 0.06),
            "mobile": (0.18, 0.28, 0.26, 0.08, 0.15, 0.05),
            "tablet": (0.25, 0.30, 0.15, 0.18, 0.08, 0.04),
        },
    ),
    "landing_section": (
        "referrer_kind",
        {
            "direct": (0.70, 0.15, 0.08, 0.05, 0.02, 0.00),
            "search": (0.10, 0.30, 0.45, 0.03, 0.12, 0.00),
            "social": (0.05, 0.08, 0.30, 0.15, 0.22, 0.20),
            "email": (0.08, 0.07, 0.10, 0.45, 0.05, 0.25),
            "ad": (0.05, 0.15, 0.45, 0.15, 0.00, 0.20),
            "partner": (0.10, 0.20, 0.35, 0.05, 0.30, 0.00),
        },
    ),
    # Newsletter readers and people who type the address are mostly known customers.
    "returning_visitor": (
        "referrer_kind",
        {
            "direct": (0.30, 0.70),
            "search": (0.70, 0.30),
            "social": (0.80, 0.20),
            "email": (0.15, 0.85),
            "ad": (0.85, 0.15),
            "partner": (0.75, 0.25),
        },
    ),
    "logged_in": ("returning_visitor", {False: (0.96, 0.04), True: (0.45, 0.55)}),
    # The sign-up box is shown to new visitors only, apart from the shop footer.
    "newsletter_signup": ("returning_visitor", {False: (0.93, 0.07), True: (0.995, 0.005)}),
    # Guests can keep a wishlist in the browser, but few do.
    "wishlist_add": ("logged_in", {False: (0.98, 0.02), True: (0.80, 0.20)}),
    "pages_viewed": (
        "landing_section",
        {
            "home": (0.0, 0.20, 0.30, 0.28, 0.15, 0.07),
            "category": (0.0, 0.15, 0.28, 0.32, 0.17, 0.08),
            "product": (0.0, 0.45, 0.25, 0.17, 0.09, 0.04),
            "sale": (0.0, 0.25, 0.30, 0.25, 0.13, 0.07),
            "guides": (0.0, 0.65, 0.20, 0.10, 0.04, 0.01),
            "campaign": (0.0, 0.40, 0.30, 0.18, 0.09, 0.03),
        },
    ),
    "product_views": (
        "pages_viewed",
        {
            "0": (1.0, 0.0, 0.0, 0.0, 0.0),
            "1": (0.45, 0.55, 0.0, 0.0, 0.0),
            "2-3": (0.15, 0.35, 0.50, 0.0, 0.0),
            "4-7": (0.06, 0.14, 0.55, 0.25, 0.0),
            "8-15": (0.03, 0.05, 0.30, 0.45, 0.17),
            "16+": (0.02, 0.03, 0.15, 0.35, 0.45),
        },
    ),
    "search_used": (
        "pages_viewed",
        {
            "0": (1.0, 0.0),
            "1": (0.95, 0.05),
            "2-3": (0.82, 0.18),
            "4-7": (0.65, 0.35),
            "8-15": (0.50, 0.50),
            "16+": (0.38, 0.62),
        },
    ),
    "filter_used": ("search_used", {False: (0.92, 0.08), True: (0.55, 0.45)}),
    "cart_add": (
        "product_views",
        {
            "0": (0.995, 0.005),
            "1": (0.94, 0.06),
            "2-4": (0.84, 0.16),
            "5-9": (0.70, 0.30),
            "10+": (0.58, 0.42),
        },
    ),
    # A few checkouts start without a cart (the "buy now" button).
    "payment_method": (
        "cart_add",
        {
            False: (0.994, 0.003, 0.002, 0.0005, 0.0003, 0.0002),
            True: (0.42, 0.30, 0.14, 0.08, 0.04, 0.02),
        },
    ),
    "coupon_entered": (
        "payment_method",
        {
            "none": (0.98, 0.02),
            "card": (0.78, 0.22),
            "wallet": (0.85, 0.15),
            "invoice": (0.70, 0.30),
            "bank_transfer": (0.80, 0.20),
            "cash_on_delivery": (0.88, 0.12),
        },
    ),
    # Slow and unfamiliar payment methods raise questions.
    "support_chat": (
        "payment_method",
        {
            "none": (0.99, 0.01),
            "card": (0.96, 0.04),
            "wallet": (0.97, 0.03),
            "invoice": (0.82, 0.18),
            "bank_transfer": (0.78, 0.22),
            "cash_on_delivery": (0.85, 0.15),
        },
    ),
}

#: P(purchase | payment_method): a checkout completes more often with instant payment methods.
PURCHASE_GIVEN_PAYMENT: Final = (0.0, 0.80, 0.86, 0.62, 0.55, 0.70)
#: Median basket in euros and log-scale spread, per payment method (invoices buy tents).
BASKET_MEDIAN_EUR: Final = (0.0, 85.0, 60.0, 140.0, 180.0, 70.0)
BASKET_SIGMA: Final = 0.8
#: Median session length in seconds per pages_viewed level, and its log-scale spread.
SECONDS_MEDIAN: Final = (1.0, 25.0, 90.0, 240.0, 600.0, 1300.0)
SECONDS_SIGMA: Final = 0.7

#: The table's columns in order.
COLUMNS: Final = (
    "session_id",
    "device",
    "browser_family",
    "os_family",
    "hour_bucket",
    "weekday_bucket",
    "region",
    "site_language",
    "referrer_kind",
    "landing_section",
    "returning_visitor",
    "logged_in",
    "newsletter_signup",
    "pages_viewed",
    "session_seconds",
    "product_views",
    "search_used",
    "filter_used",
    "wishlist_add",
    "cart_add",
    "coupon_entered",
    "checkout_started",
    "payment_method",
    "purchase",
    "basket_value_eur",
    "support_chat",
    "planted_anomaly",
)


def hidden_edges() -> list[tuple[str, str]]:
    """Return the (parent, child) edges of the tree :func:`shop_sessions` draws from.

    Returns
    -------
    list of tuple of str
        A fresh list of the 24 edges of :data:`SHOP_HIDDEN_EDGES`, parents before children.
    """
    return list(SHOP_HIDDEN_EDGES)


def model_columns(table: pa.Table) -> list[str]:
    """Return the columns of ``table`` to fit: all but the key and the answer keys.

    The key is ``session_id``; the answer keys are ``planted_anomaly`` and, in tables of
    :func:`shop_sessions_with_crawlers`, ``visitor_kind``.

    Parameters
    ----------
    table : pyarrow.Table
        A table from :func:`shop_sessions` (or any table with those column names).

    Returns
    -------
    list of str
        The column names in table order, without the key and the answer keys.
    """
    return [name for name in table.column_names if name not in NON_MODEL_COLUMNS]


def _draw_child(rng: np.random.Generator, parent: Codes, table: npt.NDArray[np.float64]) -> Codes:
    """Draw one child code per row from ``table[parent_code]`` in one vectorized pass.

    Row ``k`` of the cumulative table is shifted by ``k``, so all rows fit in one sorted array
    and a single ``searchsorted`` of ``parent + u`` finds each row's draw.
    """
    n_parent, n_child = table.shape
    cumulative = np.cumsum(table / table.sum(axis=1, keepdims=True), axis=1)
    cumulative[:, -1] = 1.0  # exact, so rounding never spills a draw into the next row
    flat = (cumulative + np.arange(n_parent)[:, None]).ravel()
    u = rng.random(parent.shape[0])
    index = np.searchsorted(flat, parent + u, side="right")
    codes: Codes = np.clip(index - parent * n_child, 0, n_child - 1).astype(np.int64)
    return codes


def _table_for(child: str) -> tuple[str, npt.NDArray[np.float64]]:
    parent, rows = CONDITIONALS[child]
    table = np.array([rows[level] for level in LEVELS[parent]], dtype=np.float64)
    if table.shape[1] != len(LEVELS[child]):
        raise AssertionError(f"conditional table of {child!r} does not match its levels")
    return parent, table


def _code(column: str, level: Level) -> int:
    return LEVELS[column].index(level)


def _check_arguments(n: object, seed: object, anomaly_rate: object) -> float:
    if isinstance(n, bool) or not isinstance(n, numbers.Integral):
        raise TypeError(f"n must be an integer number of rows, got {n!r}")
    if int(n) < 1:
        raise ValueError(f"n must be at least 1, got {n}")
    if isinstance(seed, bool) or not isinstance(seed, numbers.Integral):
        raise TypeError(f"seed must be an integer, got {seed!r}")
    if int(seed) < 0:
        raise ValueError(f"seed must be 0 or more, got {seed}")
    if isinstance(anomaly_rate, bool) or not isinstance(anomaly_rate, numbers.Real):
        raise TypeError(f"anomaly_rate must be a number, got {anomaly_rate!r}")
    rate = float(anomaly_rate)
    if not (math.isfinite(rate) and 0.0 <= rate < 0.5):
        raise ValueError(f"anomaly_rate must be at least 0 and below 0.5, got {anomaly_rate}")
    return rate


def _plant_anomalies(
    rng: np.random.Generator,
    codes: dict[str, Codes],
    seconds: npt.NDArray[np.float64],
    basket: npt.NDArray[np.float64],
    rows: npt.NDArray[np.int64],
) -> None:
    """Overwrite ``rows`` in place with one of three scripted sessions each."""
    script = rng.integers(0, 3, rows.shape[0])

    # A purchase that never went through a cart or a checkout, with a large basket.
    ghost = rows[script == 0]
    codes["cart_add"][ghost] = 0
    codes["payment_method"][ghost] = _code("payment_method", "none")
    codes["pages_viewed"][ghost] = _code("pages_viewed", "1")
    codes["product_views"][ghost] = _code("product_views", "0")
    basket[ghost] = np.round(rng.uniform(900.0, 4000.0, ghost.shape[0]), 2)
    seconds[ghost] = np.round(rng.uniform(2.0, 15.0, ghost.shape[0]))

    # No pages viewed, yet many products viewed, in no time at all.
    empty = rows[script == 1]
    codes["pages_viewed"][empty] = _code("pages_viewed", "0")
    codes["product_views"][empty] = _code("product_views", "10+")
    codes["search_used"][empty] = 0
    seconds[empty] = 0.0

    # A bot-like night-time burst from a tablet with an unknown browser, from abroad.
    burst = rows[script == 2]
    fixed: dict[str, Level] = {
        "device": "tablet",
        "browser_family": "other",
        "os_family": "desk_os_open",
        "hour_bucket": "night",
        "region": "abroad",
        "site_language": "local",
        "referrer_kind": "partner",
        "landing_section": "campaign",
        "pages_viewed": "16+",
        "product_views": "10+",
        "cart_add": True,
        "coupon_entered": True,
    }
    for column, level in fixed.items():
        codes[column][burst] = _code(column, level)
    seconds[burst] = np.round(rng.uniform(3.0, 20.0, burst.shape[0]))


def _categorical(codes: Codes, levels: tuple[Level, ...], null_code: int | None) -> pa.Array[Any]:
    """Build a dictionary<int8, string> array; ``null_code`` (if given) becomes null."""
    names = [str(v) for v in levels]
    mask = None
    if null_code is not None:
        mask = codes == null_code
        # Drop the null level from the dictionary so that it never shows as a category.
        codes = codes - (codes > null_code)
        del names[null_code]
    indices = pa.array(codes.astype(np.int8), type=pa.int8(), mask=mask)
    return pa.DictionaryArray.from_arrays(indices, pa.array(names, pa.string()))


def shop_sessions(n: int = 100_000, seed: int = 0, anomaly_rate: float = 0.002) -> pa.Table:
    """Sessions of Larchwick Trail Supply, an invented online outdoor-gear shop.

    Every column but the key and the anomaly label is drawn from a hidden dependency tree
    (:data:`SHOP_HIDDEN_EDGES`), so a fitted tree can be compared with the truth. Then a share
    ``anomaly_rate`` of rows is overwritten with scripted, implausible sessions.

    Parameters
    ----------
    n : int, default 100_000
        The number of sessions (rows), at least 1.
    seed : int, default 0
        Seed of the random generator; the same ``(n, seed, anomaly_rate)`` gives the same table.
    anomaly_rate : float, default 0.002
        The share of rows replaced by planted anomalies, at least 0 and below 0.5. Exactly
        ``round(n * anomaly_rate)`` rows are planted.

    Returns
    -------
    pyarrow.Table
        27 columns: ``session_id`` (int64, unique), categorical strings (dictionary<int8,
        string>), bools, ``session_seconds`` (float64), ``payment_method`` (null when no checkout
        started), ``basket_value_eur`` (float64, null unless ``purchase``) and
        ``planted_anomaly`` (bool). Fit with ``columns=model_columns(table)``, which leaves out
        ``session_id`` and ``planted_anomaly``.

    Raises
    ------
    TypeError
        If ``n`` or ``seed`` is not an integer, or ``anomaly_rate`` is not a number.
    ValueError
        If ``n < 1``, ``seed < 0`` or ``anomaly_rate`` is outside ``[0, 0.5)``.
    """
    rate = _check_arguments(n, seed, anomaly_rate)
    n = int(n)
    rng = np.random.default_rng(int(seed))
    codes, seconds, basket = _draw_people(rng, n)

    n_anomalies = round(n * rate)
    planted = np.zeros(n, dtype=np.bool_)
    if n_anomalies:
        rows = np.sort(rng.choice(n, size=n_anomalies, replace=False)).astype(np.int64)
        planted[rows] = True
        _plant_anomalies(rng, codes, seconds, basket, rows)
    return _assemble(rng, codes, seconds, basket, planted)


def _draw_people(
    rng: np.random.Generator, n: int
) -> tuple[dict[str, Codes], npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    """Draw ``n`` people's sessions from the hidden tree: codes, seconds and baskets."""
    codes: dict[str, Codes] = {
        "device": rng.choice(len(DEVICE_MARGINAL), size=n, p=DEVICE_MARGINAL).astype(np.int64)
    }
    seconds = np.empty(0)
    basket = np.empty(0)
    # SHOP_HIDDEN_EDGES lists parents before children, so each parent is drawn before its child.
    for parent, child in SHOP_HIDDEN_EDGES:
        if child == "session_seconds":
            log_median = np.log(np.asarray(SECONDS_MEDIAN))[codes[parent]]
            raw = np.exp(log_median + SECONDS_SIGMA * rng.standard_normal(n))
            seconds = np.maximum(np.round(raw), 1.0)
        elif child == "basket_value_eur":
            bought = rng.random(n) < np.asarray(PURCHASE_GIVEN_PAYMENT)[codes[parent]]
            median = np.asarray(BASKET_MEDIAN_EUR)[codes[parent]]
            value = np.round(median * np.exp(BASKET_SIGMA * rng.standard_normal(n)), 2)
            # A bought basket costs at least a few euros (cheapest item: a tent peg pack).
            basket = np.where(bought, np.maximum(value, 4.5), np.nan)
        elif child in ("checkout_started", "purchase"):
            continue  # derived below from the finer column they hang from
        else:
            table_parent, table = _table_for(child)
            if table_parent != parent:
                raise AssertionError(f"{child!r} is drawn from {table_parent!r}, not {parent!r}")
            codes[child] = _draw_child(rng, codes[parent], table)
    return codes, seconds, basket


def _assemble(
    rng: np.random.Generator,
    codes: dict[str, Codes],
    seconds: npt.NDArray[np.float64],
    basket: npt.NDArray[np.float64],
    planted: npt.NDArray[np.bool_],
) -> pa.Table:
    """The table of COLUMNS from drawn codes; the key's gaps are the last draws of ``rng``."""
    n = planted.shape[0]
    no_payment = _code("payment_method", "none")
    # Random gaps make the key look like an id sequence shared with other traffic.
    session_id = 1_000_000 + np.cumsum(rng.integers(1, 8, n, dtype=np.int64))

    arrays: dict[str, pa.Array[Any]] = {"session_id": pa.array(session_id, pa.int64())}
    for name in COLUMNS[1:]:
        if name == "session_seconds":
            arrays[name] = pa.array(seconds, pa.float64())
        elif name == "basket_value_eur":
            arrays[name] = pa.array(basket, pa.float64(), from_pandas=True)  # NaN -> null
        elif name == "checkout_started":
            arrays[name] = pa.array(codes["payment_method"] != no_payment, pa.bool_())
        elif name == "purchase":
            arrays[name] = pa.array(~np.isnan(basket), pa.bool_())
        elif name == "planted_anomaly":
            arrays[name] = pa.array(planted, pa.bool_())
        elif LEVELS[name] is BOOL_LEVELS:
            arrays[name] = pa.array(codes[name] == 1, pa.bool_())
        else:
            null_code = no_payment if name == "payment_method" else None
            arrays[name] = _categorical(codes[name], LEVELS[name], null_code)
    return pa.table(arrays)


def shop_sessions_broken_tag(
    n: int = 100_000,
    seed: int = 1,
    anomaly_rate: float = 0.002,
    browser: str = BROKEN_TAG_BROWSER,
) -> pa.Table:
    """A second week of the shop in which a broken tracking tag stops ``cart_add`` firing.

    The sessions are drawn exactly as :func:`shop_sessions` draws them (use another ``seed``
    than the first week's), so shoppers behave as before: they add to the cart and pay at the
    same rates. Then, for every session whose ``browser_family`` is ``browser``, the release's
    broken tag records ``cart_add`` as false. Only that column changes, and only for one
    browser family; its dependencies on ``product_views`` and ``payment_method`` change with
    it. This is the planted change that ``treewise.compare`` should find first.

    Returns
    -------
    pyarrow.Table
        The columns of :func:`shop_sessions`.
    """
    if browser not in LEVELS["browser_family"]:
        raise ValueError(f"browser must be one of {LEVELS['browser_family']}, got {browser!r}")
    table = shop_sessions(n=n, seed=seed, anomaly_rate=anomaly_rate)
    broken = table.column("browser_family").to_numpy(zero_copy_only=False) == browser
    fired = table.column("cart_add").to_numpy(zero_copy_only=False)
    index = table.schema.get_field_index("cart_add")
    return table.set_column(index, "cart_add", pa.array(fired & ~broken, pa.bool_()))


# -- a second kind of visitor: scripted crawlers ---------------------------------------------

#: The (parent, child) edges of the crawlers' own hidden tree, parents before children. It
#: differs from the people's: crawlers land anywhere and their landing page sets how deep they
#: go, how many products they fetch and whether they follow filter links; their operating system
#: goes with their browser, not their device; they never log in, fill a cart or pay.
CRAWLER_HIDDEN_EDGES: Final[tuple[tuple[str, str], ...]] = (
    ("device", "browser_family"),
    ("browser_family", "os_family"),
    ("device", "hour_bucket"),
    ("hour_bucket", "weekday_bucket"),
    ("device", "region"),
    ("region", "site_language"),
    ("device", "referrer_kind"),
    ("referrer_kind", "landing_section"),
    ("referrer_kind", "returning_visitor"),
    ("returning_visitor", "logged_in"),
    ("returning_visitor", "newsletter_signup"),
    ("logged_in", "wishlist_add"),
    ("landing_section", "pages_viewed"),
    ("landing_section", "product_views"),
    ("landing_section", "filter_used"),
    ("pages_viewed", "session_seconds"),
    ("pages_viewed", "search_used"),
    ("product_views", "cart_add"),
    ("cart_add", "payment_method"),
    ("payment_method", "coupon_entered"),
    ("payment_method", "support_chat"),
    ("payment_method", "basket_value_eur"),
    ("basket_value_eur", "purchase"),
)

CRAWLER_DEVICE_MARGINAL: Final = (0.95, 0.05, 0.0)


def _same(row: Sequence[float], parent: str) -> dict[Level, Sequence[float]]:
    """One row of probabilities for every level of ``parent``: the child ignores its parent."""
    return dict.fromkeys(LEVELS[parent], row)


#: The crawlers' P(child | parent), laid out as CONDITIONALS; invented like the people's.
CRAWLER_CONDITIONALS: Final[dict[str, tuple[str, Mapping[Level, Sequence[float]]]]] = {
    "browser_family": ("device", _same((0.25, 0.0, 0.05, 0.0, 0.70), "device")),
    "os_family": (
        "browser_family",
        {
            "chrome": (0.05, 0.0, 0.90, 0.0, 0.0, 0.05),
            "safari": (0.0, 0.50, 0.0, 0.0, 0.0, 0.50),
            "firefox": (0.0, 0.0, 0.95, 0.0, 0.0, 0.05),
            "in_app": (0.0, 0.0, 0.0, 0.0, 0.0, 1.0),
            "other": (0.0, 0.0, 0.25, 0.0, 0.0, 0.75),
        },
    ),
    # Crawlers run round the clock, every day alike.
    "hour_bucket": ("device", _same((0.25, 0.25, 0.25, 0.25), "device")),
    "weekday_bucket": ("hour_bucket", _same((5 / 7, 2 / 7), "hour_bucket")),
    "region": ("device", _same((0.0, 0.0, 0.0, 0.25, 0.75), "device")),
    "site_language": (
        "region",
        _same((0.5, 0.5, 0.0), "region") | {"abroad": (0.05, 0.90, 0.05)},
    ),
    "referrer_kind": ("device", _same((0.85, 0.0, 0.0, 0.0, 0.0, 0.15), "device")),
    "landing_section": (
        "referrer_kind",
        _same((0.22, 0.22, 0.22, 0.14, 0.10, 0.10), "referrer_kind"),
    ),
    "returning_visitor": ("referrer_kind", _same((0.99, 0.01), "referrer_kind")),
    "logged_in": ("returning_visitor", _same((1.0, 0.0), "returning_visitor")),
    "newsletter_signup": ("returning_visitor", _same((1.0, 0.0), "returning_visitor")),
    "wishlist_add": ("logged_in", _same((1.0, 0.0), "logged_in")),
    "pages_viewed": (
        "landing_section",
        {
            "home": (0.0, 0.0, 0.0, 0.05, 0.25, 0.70),
            "category": (0.0, 0.0, 0.05, 0.15, 0.50, 0.30),
            "product": (0.0, 0.80, 0.20, 0.0, 0.0, 0.0),
            "sale": (0.0, 0.0, 0.10, 0.30, 0.45, 0.15),
            "guides": (0.0, 0.10, 0.60, 0.30, 0.0, 0.0),
            "campaign": (0.0, 0.90, 0.10, 0.0, 0.0, 0.0),
        },
    ),
    "product_views": (
        "landing_section",
        {
            "home": (0.05, 0.0, 0.15, 0.50, 0.30),
            "category": (0.0, 0.0, 0.05, 0.25, 0.70),
            "product": (0.0, 1.0, 0.0, 0.0, 0.0),
            "sale": (0.0, 0.0, 0.10, 0.30, 0.60),
            "guides": (0.90, 0.10, 0.0, 0.0, 0.0),
            "campaign": (0.70, 0.30, 0.0, 0.0, 0.0),
        },
    ),
    "filter_used": (
        "landing_section",
        {
            "home": (0.70, 0.30),
            "category": (0.15, 0.85),
            "product": (1.0, 0.0),
            "sale": (0.30, 0.70),
            "guides": (1.0, 0.0),
            "campaign": (1.0, 0.0),
        },
    ),
    "search_used": ("pages_viewed", _same((0.98, 0.02), "pages_viewed")),
    "cart_add": ("product_views", _same((1.0, 0.0), "product_views")),
    "payment_method": ("cart_add", _same((1.0, 0.0, 0.0, 0.0, 0.0, 0.0), "cart_add")),
    "coupon_entered": ("payment_method", _same((1.0, 0.0), "payment_method")),
    "support_chat": ("payment_method", _same((1.0, 0.0), "payment_method")),
}

#: Crawlers fetch a page in about a second: median session seconds per pages_viewed level.
CRAWLER_SECONDS_MEDIAN: Final = (1.0, 1.0, 2.0, 4.0, 9.0, 18.0)
CRAWLER_SECONDS_SIGMA: Final = 0.35
#: The columns a hybrid anomaly takes from a crawler: how the session moved through the shop.
NAVIGATION_COLUMNS: Final = (
    "landing_section",
    "pages_viewed",
    "product_views",
    "session_seconds",
    "search_used",
    "filter_used",
)


def _draw_crawlers(
    rng: np.random.Generator, n: int
) -> tuple[dict[str, Codes], npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    """Draw ``n`` crawler sessions from the crawlers' hidden tree: codes, seconds and baskets."""
    device = rng.choice(3, size=n, p=CRAWLER_DEVICE_MARGINAL).astype(np.int64)
    codes: dict[str, Codes] = {"device": device}
    seconds = np.empty(0)
    for parent, child in CRAWLER_HIDDEN_EDGES:
        if child == "session_seconds":
            log_median = np.log(np.asarray(CRAWLER_SECONDS_MEDIAN))[codes[parent]]
            raw = np.exp(log_median + CRAWLER_SECONDS_SIGMA * rng.standard_normal(n))
            seconds = np.maximum(np.round(raw), 1.0)
        elif child in ("basket_value_eur", "checkout_started", "purchase"):
            continue  # crawlers never pay: no basket, no checkout, no purchase
        else:
            table_parent, rows = CRAWLER_CONDITIONALS[child]
            if table_parent != parent:
                raise AssertionError(f"{child!r} is drawn from {table_parent!r}, not {parent!r}")
            table = np.array([rows[level] for level in LEVELS[parent]], dtype=np.float64)
            codes[child] = _draw_child(rng, codes[parent], table)
    return codes, seconds, np.full(n, np.nan)


def shop_sessions_with_crawlers(
    n: int = 100_000, seed: int = 0, crawler_share: float = 0.3, anomaly_rate: float = 0.0
) -> pa.Table:
    """Sessions of the invented shop from two kinds of visitor: people and scripted crawlers.

    People's sessions are drawn as :func:`shop_sessions` draws them (without its planted
    anomalies); crawlers' from a second hidden tree with other edges and tables
    (:data:`CRAWLER_HIDDEN_EDGES`): they land anywhere, go as deep as their landing page
    suggests in a second or so per page, and never log in or buy. The two kinds are shuffled
    together. A single tree has to average the two structures; a mixture of two trees need not.

    A share ``anomaly_rate`` of the people's sessions become *hybrid* anomalies: a person's
    session whose navigation (:data:`NAVIGATION_COLUMNS`: landing page, pages, products,
    seconds, search and filters) is taken from a fresh crawler session. Such a row breaks the
    people's dependency of time on pages (many pages at about a second each), while its
    navigation on its own is common among all sessions, people and crawlers together.

    Parameters
    ----------
    n : int, default 100_000
        Sessions, at least 1.
    seed : int, default 0
        Seed of the random generator; the same arguments give the same table.
    crawler_share : float, default 0.3
        The share of crawler sessions, at least 0 and below 0.5 (``round(n * crawler_share)``).
    anomaly_rate : float, default 0.0
        The share of all rows made hybrid anomalies (taken from the people), in ``[0, 0.5)``.

    Returns
    -------
    pyarrow.Table
        The columns of :func:`shop_sessions` (``planted_anomaly`` marks the hybrids) and
        ``visitor_kind`` ("person" or "crawler"), the answer key of the two kinds, which
        :func:`model_columns` leaves out like the other keys.
    """
    rate = _check_arguments(n, seed, anomaly_rate)
    if isinstance(crawler_share, bool) or not isinstance(crawler_share, numbers.Real):
        raise TypeError(f"crawler_share must be a number, got {crawler_share!r}")
    share = float(crawler_share)
    if not (math.isfinite(share) and 0.0 <= share < 0.5):
        raise ValueError(f"crawler_share must be at least 0 and below 0.5, got {crawler_share}")
    n = int(n)
    rng = np.random.default_rng(int(seed))
    n_crawlers = round(n * share)
    people, people_seconds, people_basket = _draw_people(rng, n - n_crawlers)
    bots, bot_seconds, bot_basket = _draw_crawlers(rng, n_crawlers)
    order = rng.permutation(n)
    codes = {name: np.concatenate([people[name], bots[name]])[order] for name in people}
    seconds = np.concatenate([people_seconds, bot_seconds])[order]
    basket = np.concatenate([people_basket, bot_basket])[order]
    crawler = (np.arange(n) >= n - n_crawlers)[order]

    planted = np.zeros(n, dtype=np.bool_)
    n_anomalies = min(round(n * rate), n - n_crawlers)
    if n_anomalies:
        rows = np.sort(rng.choice(np.flatnonzero(~crawler), size=n_anomalies, replace=False))
        planted[rows] = True
        donor, donor_seconds, _ = _draw_crawlers(rng, n_anomalies)
        for name in NAVIGATION_COLUMNS:
            if name == "session_seconds":
                seconds[rows] = donor_seconds
            else:
                codes[name][rows] = donor[name]
    table = _assemble(rng, codes, seconds, basket, planted)
    kind = pa.array(np.where(crawler, "crawler", "person"), pa.string())
    return table.append_column("visitor_kind", kind)
