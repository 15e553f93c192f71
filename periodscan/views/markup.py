"""Small HTML building blocks shared by the report's sections."""

from __future__ import annotations

import html
import math


def escape(value) -> str:
    """Text made safe for HTML."""
    return html.escape(str(value))


def number(value, fmt: str = "{:+.2f}") -> str:
    """A number in ``fmt``; a dash for None, NaN and infinity."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "&ndash;"
    return fmt.format(value)


def bullet_list(items: list[str]) -> str:
    """Plain-text items as an escaped <ul>."""
    return "<ul>" + "".join(f"<li>{escape(i)}</li>" for i in items) + "</ul>"


def definition_list(rows: list[tuple[str, str]], css: str = "answer") -> str:
    """(term, HTML) pairs as a <dl>; terms are escaped, definitions are taken as HTML."""
    body = "".join(f"<dt>{escape(k)}</dt><dd>{v}</dd>" for k, v in rows)
    return f"<dl class='{css}'>{body}</dl>"
