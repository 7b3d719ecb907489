"""Error lines: a message on one line of at most N characters, and values quoted inside one.

Every error a user can make is answered by one line; these are the only places that fold a
text onto one line and cut it (with ``...``), so every module cuts the same way.
"""

from __future__ import annotations

import json
from typing import Any

#: Longest error line by default, characters.
MAX_ERROR_CHARS = 400
#: Longest value quoted inside an error line by default, characters.
QUOTE_MAX_CHARS = 60


def one_line(text: Any, limit: int = MAX_ERROR_CHARS, ellipsis: str = "...") -> str:
    """``text`` on one line, at most ``limit`` characters.

    Every run of whitespace and control characters becomes one space; a longer text is cut
    and ends with ``ellipsis``. Only the first ``4 * limit`` characters are looked at, so a
    huge text costs no more than a short one.
    """
    raw = str(text)[: 4 * limit]
    flat = " ".join("".join(c if c.isprintable() else " " for c in raw).split())
    return flat if len(flat) <= limit else flat[: limit - len(ellipsis)] + ellipsis


def quoted(value: Any, limit: int = QUOTE_MAX_CHARS) -> str:
    """``repr(value)`` (one line: repr escapes newlines), cut to ``limit`` characters."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def quoted_json(value: Any, limit: int = QUOTE_MAX_CHARS) -> str:
    """``value`` as JSON text (``repr`` if it is not JSON), cut to ``limit`` characters."""
    try:
        text = json.dumps(value)
    except (TypeError, ValueError):
        text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."
