"""The environment for child Python processes that must run this very copy of sapwood.

A child started as ``python -m stream.cli`` imports whichever ``stream`` comes first on
its path: the installed package, or a checkout when its working directory is one. The
benchmark and the tests start children that must run the code their parent runs (the
benchmark measures it; the tests check it), and sharing one copy also lets them share
its compiled kernels (:mod:`stream.jit` caches them per source file).
"""

from __future__ import annotations

import os
from pathlib import Path

CODE_ROOT = Path(__file__).resolve().parents[1]
"""The directory holding this ``stream`` package (a checkout or site-packages)."""


def same_code_env(base: dict | None = None) -> dict[str, str]:
    """``base`` (default: this process's environment) with :data:`CODE_ROOT` first on
    ``PYTHONPATH``."""
    env = dict(os.environ if base is None else base)
    rest = [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p]
    env["PYTHONPATH"] = os.pathsep.join([str(CODE_ROOT)] + rest)
    return env
