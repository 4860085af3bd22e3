"""Words and numbers for the static duplicate report: counts with their plurals, file sizes, names
that break only where a person would break them."""
from __future__ import annotations

import re
from html import escape

from ..common import units

BREAKS = "/_-"  # a name or folder may break after one of these (or at a space), never inside a word or number
LONGEST_RUN = 22  # characters without a break point that still fit one line of a file's card


def count(n: int, singular: str, plural: str | None = None) -> str:
    """'1 pair', '3 pairs', '0 copies' (count(0, 'copy', 'copies'))."""
    return f"{n:,} {singular if n == 1 else (plural or singular + 's')}"


def size_text(n: int | None) -> str:
    """A file size as the page writes it (index.common.units: '812 bytes', '39.1 kB', '2.4 MB')."""
    return "size unknown" if n is None else units.size_text(n)


def breakable(text: str, limit: int = LONGEST_RUN) -> str:
    """HTML for a file name or folder that may wrap only after / _ - or at a space. A run without a
    break point longer than `limit` (which would overflow its card or break mid-word) is cut in its
    middle; the whole text is then in the title attribute, which shows on pointing at it."""
    parts = re.split(r"([/_\-\s])", text)  # runs at even positions, break points at odd ones
    cut = [p[: (limit - 1) // 2] + "\u2026" + p[-(limit // 2):] if i % 2 == 0 and len(p) > limit else p
           for i, p in enumerate(parts)]
    html = "".join(escape(p) + ("<wbr>" if i % 2 and p in BREAKS else "") for i, p in enumerate(cut))
    return html if cut == parts else f'<span class="cut" title="{escape(text)}">{html}</span>'
