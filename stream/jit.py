"""One place that configures numba for sapwood's compiled kernels.

Compiled machine code is cached on disk so that only the first run pays for compilation.
numba keys its cache on each function's own source file, so a kernel whose callee in
another module changed would load stale code. sapwood therefore keeps its cache in a
directory named after a digest of every kernel source file: any edit, or an upgrade of
the package, selects a fresh directory. The directory lives under the user's cache
(``$XDG_CACHE_HOME`` or ``~/.cache``), which also works when the package itself is
installed read-only. An explicit ``NUMBA_CACHE_DIR`` in the environment wins.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numba

_PACKAGE_DIR = Path(__file__).resolve().parent


def _kernel_digest() -> str:
    digest = hashlib.sha256(numba.__version__.encode())
    for path in sorted(_PACKAGE_DIR.glob("*.py")):
        text = path.read_bytes()
        if b"@njit" in text:
            digest.update(path.name.encode())
            digest.update(text)
    return digest.hexdigest()[:16]


def cache_directory() -> Path:
    """Directory holding sapwood's compiled kernels for this exact source."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "sapwood" / "kernels" / _kernel_digest()


if not os.environ.get("NUMBA_CACHE_DIR"):
    try:
        _dir = cache_directory()
        _dir.mkdir(parents=True, exist_ok=True)
        numba.config.CACHE_DIR = str(_dir)
    except OSError:  # no writable home: numba falls back to its own locations
        pass


def njit(function=None, **options):
    """``numba.njit`` with on-disk caching and numpy's error model (no Python checks)."""
    options.setdefault("cache", True)
    options.setdefault("error_model", "numpy")
    if function is None:
        return lambda f: numba.njit(**options)(f)
    return numba.njit(**options)(function)
