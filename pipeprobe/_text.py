"""Text that is safe to print: control characters from a trace never reach the terminal raw.

Stage names, thread names, file names and load notes come from trace files
that anyone could have written. :func:`printable` spells every control
character (C0, DEL, C1: clear-screen, window-title and cursor sequences, a
carriage return that would forge a line) and every lone surrogate as a
visible escape such as ``\\x1b`` or ``\\ud800``; ordinary text, tabs
excepted, is left as it is. Every text output of pipeprobe (report,
compare, what-if, command-line errors and warnings) passes through it.
"""

from __future__ import annotations

import re

__all__ = ["printable"]

_UNSAFE = re.compile("[\x00-\x08\x0a-\x1f\x7f-\x9f\ud800-\udfff]")


def _escape(m: re.Match[str]) -> str:
    c = ord(m.group())
    return f"\\x{c:02x}" if c < 0x100 else f"\\u{c:04x}"


def printable(text: object) -> str:
    """``str(text)`` with control characters and lone surrogates written as escapes.

    Examples
    --------
    >>> printable("dec\\x1b[2Jode")
    'dec\\\\x1b[2Jode'
    >>> printable("line\\nforged"), printable("dec\\ud800ode"), printable("résumé\\tok")
    ('line\\\\x0aforged', 'dec\\\\ud800ode', 'résumé\\tok')
    """
    s = str(text)
    return _UNSAFE.sub(_escape, s) if _UNSAFE.search(s) else s
