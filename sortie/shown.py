"""Quoting user values in messages, clipped, so that no error line can grow without bound.

A config value can be a million characters long (a pasted log, a generated list, a string built
by a YAML alias bomb). Every message that shows a value the user gave goes through :func:`shown`,
so an error stays one readable line whatever the input was.
"""

from __future__ import annotations

from typing import Any

#: Characters of a value shown in a message; longer values are cut in the middle.
LIMIT = 80
#: Characters of a whole message line; a last guard for lines that quote several values.
LINE_LIMIT = 200


def clip(text: str, limit: int = LIMIT) -> str:
    """``text`` cut to at most ``limit`` characters, keeping both ends and saying how much is gone."""
    text = str(text)
    if len(text) <= limit:
        return text
    gone = f"...[{len(text) - limit} more]..."
    keep = max(limit - len(gone), 2)
    return text[: keep - keep // 3] + gone + text[len(text) - keep // 3:]


def shown(value: Any, limit: int = LIMIT) -> str:
    """``repr(value)`` clipped to ``limit`` characters; containers are clipped before ``repr``
    walks them, so a huge list costs no more than a short one."""
    if isinstance(value, list | tuple) and len(value) > limit:
        head = ", ".join(repr(v)[:limit] for v in value[:8])
        return clip(f"[{head}, ... ({len(value)} items)]", limit)
    if isinstance(value, dict) and len(value) > limit:
        return f"{{... {len(value)} keys}}"
    if isinstance(value, str) and len(value) > limit:
        return repr(value[: max(limit - 30, 8)]) + f"...[{len(value)} characters]"
    return clip(repr(value), limit)


def one_line(text: str, limit: int = LINE_LIMIT) -> str:
    """A message as one line of at most ``limit`` characters (newlines in values become spaces)."""
    return clip(" ".join(str(text).split("\n")), limit)
