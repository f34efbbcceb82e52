"""Lazy package faces: a package names its public objects and the module holding each, and
loads that module only when the name is first used, so importing a package stays cheap."""

from __future__ import annotations

import importlib
from typing import Any, Callable


def lazy_face(package: str, names: dict[str, str]) -> tuple[Callable[[str], Any], list[str]]:
    """``(__getattr__, __all__)`` for ``package``: ``names`` maps each public name to the
    module (relative to the package) that defines it.

    >>> getattr_, all_ = lazy_face("stream", {"TreeSettings": "classify.settings"})
    >>> all_
    ['TreeSettings']
    >>> getattr_("TreeSettings").__name__
    'TreeSettings'
    """

    def __getattr__(name: str) -> Any:
        if name in names:
            return getattr(importlib.import_module(f".{names[name]}", package), name)
        raise AttributeError(f"module {package!r} has no attribute {name!r}")

    return __getattr__, sorted(names)
