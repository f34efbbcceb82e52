"""Text from data made safe to print on a terminal.

Category values, labels and field names come from the data; a value holding an escape
sequence (ESC ``[2J`` clears the screen, ESC ``]0;...`` BEL sets a window title) must not
reach a terminal raw. Every control character (Unicode category Cc: C0, DEL, C1) is shown
as a Python-style escape (``\\x1b``, ``\\n``), so the value stays readable and
unambiguous. Line breaks and tabs of sapwood's own layout are kept by :func:`for_terminal`,
which the command line applies to everything it prints; data values themselves go
through :func:`printable`, which escapes those too, so a value cannot fake a line.

>>> printable("door\\x1b[2Jopen\\n")
'door\\\\x1b[2Jopen\\\\n'
>>> for_terminal("R1  IF x\\x07\\n")
'R1  IF x\\\\x07\\n'
"""

from __future__ import annotations

import re

_NAMED = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}
_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f]")
_CONTROL_NOT_LAYOUT = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f]")


def _escape(match: re.Match) -> str:
    char = match.group()
    return _NAMED.get(char) or f"\\x{ord(char):02x}"


def printable(text: str) -> str:
    """``text`` with every control character escaped (line breaks and tabs included)."""
    return _CONTROL.sub(_escape, text) if _CONTROL.search(text) else text


def for_terminal(text: str) -> str:
    """``text`` with control characters escaped except line breaks and tabs."""
    return _CONTROL_NOT_LAYOUT.sub(_escape, text) if _CONTROL_NOT_LAYOUT.search(text) \
        else text
