"""One place that configures numba for sapwood's compiled kernels.

Compiled machine code is cached on disk so that only the first run pays for compilation.
numba keys its cache on each function's own source file, so a kernel whose callee in
another module changed would load stale code. sapwood therefore keeps its cache in a
directory named after a digest of every source file that holds a kernel, in every
folder of ``stream`` and ``connectors``: any edit, or an upgrade of the package, selects
a fresh directory. Every compiled function goes through :func:`njit` below. The directory lives under the user's cache
(``$XDG_CACHE_HOME`` or ``~/.cache``), which also works when the package itself is
installed read-only. An explicit ``NUMBA_CACHE_DIR`` in the environment wins.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numba

_CODE_ROOT = Path(__file__).resolve().parents[1]
KERNEL_PACKAGES = ("stream", "connectors")
"""The packages (under the code root) whose kernels share the cache."""


def kernel_sources(root: Path = _CODE_ROOT) -> list[Path]:
    """Every source file of :data:`KERNEL_PACKAGES` that holds a compiled function, in a
    stable order (subpackages included)."""
    found = []
    for package in KERNEL_PACKAGES:
        for path in sorted((root / package).rglob("*.py")):
            if b"@njit" in path.read_bytes():
                found.append(path)
    return found


def _kernel_digest() -> str:
    digest = hashlib.sha256(numba.__version__.encode())
    for path in kernel_sources():
        digest.update(path.relative_to(_CODE_ROOT).as_posix().encode())
        digest.update(path.read_bytes())
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


def njit(function=None, *, borrows: bool = False, **options):
    """``numba.njit`` with on-disk caching and numpy's error model (no Python checks).

    ``borrows=True`` marks a function that only reads and writes the arrays it is handed
    and makes none itself: it is compiled without numba's reference counting (numba's
    ``_nrt`` compile flag off), which takes an atomic increment and decrement per array
    argument off every call. That cost dominated the per-record helpers: an ADWIN update
    took 60 ns with it and 30 ns without. A function that allocates an array fails to
    compile with the flag, so a wrong mark shows at once.
    """
    if borrows:
        options["_nrt"] = False
    options.setdefault("cache", True)
    options.setdefault("error_model", "numpy")
    if function is None:
        return lambda f: numba.njit(**options)(f)
    return numba.njit(**options)(function)
