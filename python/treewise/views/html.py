"""Small pieces of the HTML report: escaping, labels, numbers, tables and meters."""

from __future__ import annotations

import html
from collections.abc import Sequence

from treewise.categories import category_label
from treewise.views.plot import shorten

__all__ = [
    "LABEL_CHARS",
    "category_label",
    "cut",
    "data_table",
    "esc",
    "label_cell",
    "meter",
    "p_value",
    "value_label",
]

#: Characters of a value or a column name shown before it is cut.
LABEL_CHARS = 40


def esc(text: object) -> str:
    """Text from the model or the data, safe inside HTML text and attribute values."""
    return html.escape(str(text), quote=True)


def cut(text: str, limit: int = LABEL_CHARS) -> str:
    """``text`` cut to ``limit`` characters (not yet escaped)."""
    return shorten(text, limit)


def value_label(value: object) -> str:
    """A value read from the data, as text (not yet escaped)."""
    if value is None:
        return "null"
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


def label_cell(text: str, limit: int = LABEL_CHARS) -> str:
    """Escaped text, cut to ``limit`` characters with the whole of it in a tooltip when cut."""
    if len(text) <= limit:
        return esc(text)
    return f'<span title="{esc(text)}">{esc(cut(text, limit))}</span>'


def p_value(p: float) -> str:
    """A p-value as escaped HTML text."""
    if p == 0.0:
        return "&lt; 1e-300"  # below the smallest double: the chi-square tail underflowed
    if p < 1e-4:
        return f"{p:.1e}"
    return f"{p:.4f}"


def data_table(head: Sequence[tuple[str, bool]], rows: Sequence[Sequence[str]]) -> str:
    """A data table; ``head`` is (escaped title, numeric?) per column, cells are escaped HTML."""
    numeric = [is_number for _, is_number in head]
    ths = "".join(f"<th{' class=n' if n else ''}>{title}</th>" for title, n in head)
    body = "".join(
        "<tr>"
        + "".join(
            f"<td{' class=n' if n else ''}>{cell}</td>"
            for cell, n in zip(row, numeric, strict=True)
        )
        + "</tr>"
        for row in rows
    )
    return (
        f'<div class="wrap"><table class="data"><thead><tr>{ths}</tr></thead>'
        f"<tbody>{body}</tbody></table></div>"
    )


def meter(share: float) -> str:
    """A small bar showing ``share`` (0 to 1) of its width."""
    width = max(0.0, min(1.0, share)) * 100
    return f'<span class="meter"><span style="width:{width:.1f}%"></span></span>'
