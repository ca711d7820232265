"""Cell and table helpers shared by the sections of the report's HTML page."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from html import escape

__all__ = ["n_cell", "num", "table", "thousands"]


def n_cell(text: str | None, tag: str = "td") -> str:
    """A count cell: thousands separators for numbers, the suppression marker as is."""
    value = "" if text is None else (f"{int(text):,}" if text.isdigit() else text)
    return (
        f'<{tag} class="num n">{escape(value)}</{tag}>'
        if tag
        else (f'<span class="n">{escape(value)}</span>')
    )


def num(value: float | None, digits: int = 1) -> str:
    return "" if value is None else f"{value:,.{digits}f}"


def table(head: Sequence[str], rows: Iterable[str], numeric: Sequence[int] | None = None) -> str:
    numeric = range(1, len(head)) if numeric is None else numeric
    cells = "".join(
        f"<th{' class=num' if i in numeric else ''}>{escape(h)}</th>" for i, h in enumerate(head)
    )
    # A wide table (Table 1 with many groups) scrolls inside its own box, never past the page.
    body = f"<table><thead><tr>{cells}</tr></thead><tbody>{''.join(rows)}</tbody></table>"
    return f'<div class="wide">{body}</div>'


def thousands(text: str) -> str:
    return f"{int(text):,}" if text.isdigit() else text
