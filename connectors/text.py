"""Text from JSON made valid Unicode before it reaches the learner.

A JSON string may spell half of a UTF-16 pair as an escape (``"\\ud800"``); Python's
``json`` decodes it to a lone surrogate, a code point no UTF-8 file can hold, so every
later write of that value (checkpoint, saved model, snapshot) would fail. Such code points
are replaced with U+FFFD, the replacement character, as the Unicode standard (chapter 3,
"U+FFFD Substitution") recommends for ill-formed input. Valid pairs (``"\\ud83d\\ude00"``)
are already joined into one character by the decoder and are left alone.
"""

from __future__ import annotations

import re

_ESCAPE = re.compile(rb"\\u[dD][89a-fA-F]")
_SURROGATE = re.compile("[\ud800-\udfff]")


def may_hold_surrogates(raw: bytes) -> bool:
    """True when the JSON text ``raw`` escapes a surrogate code point (cheap pre-check)."""
    return _ESCAPE.search(raw) is not None


def valid_text(value: object) -> object:
    """``value`` with lone surrogates replaced by U+FFFD when it is a str, else as is."""
    if type(value) is str and _SURROGATE.search(value):
        return _SURROGATE.sub("\ufffd", value)
    return value


def valid_objects(objects: list[dict]) -> list[dict]:
    """Decoded JSON objects with every key and string value made valid text."""
    return [{valid_text(k): valid_text(v) for k, v in obj.items()} for obj in objects]
