"""sapwood's own container for a learner's whole state: numeric arrays plus JSON metadata.

Inside: :func:`write_model_file`, :func:`read_model_file`, :func:`describe_model_file`,
:func:`json_problem` and ``FORMAT_VERSION``. Nothing here can build an arbitrary Python
object: no pickle, ever.

Layout, version 1 (every byte of the file is accounted for)::

    SAPWOOD-STATE\\n                                     opening line
    version 1 manifest <N> sha256 <64 hex digits>\\n     header line
    <N bytes: the manifest, UTF-8 JSON on one line>\\n
    <array bytes, back to back, in manifest order>

The manifest is ``{"kind": str, "meta": {...}, "arrays": [entry, ...]}`` and each entry
``{"name", "dtype", "shape", "order", "offset", "nbytes", "sha256"}``. ``dtype`` is a numpy
name from a fixed list (bool, int8-64, uint8-64, float16/32/64, complex64/128); multi-byte
values are little-endian (floats IEEE 754); ``order`` is ``"C"`` (row-major) or ``"F"``
(column-major, kept so Fortran-ordered arrays come back Fortran-ordered); ``offset``
counts from the first byte after the manifest's line break.

Why our own layout rather than a zip of ``.npy`` files:

- The file size is fixed by the header and the manifest (header + manifest + sum of the
  arrays' byte counts), so any truncation, and any junk appended, is found before a
  single array is allocated, and no array is allocated beyond what the file holds.
- Every byte is covered by a check: the manifest and each array by SHA-256, the opening
  and header lines by exact matching. A zip adds a central directory, padding and CRC-32
  only; ``.npy`` headers are parsed as Python literals.
- The first three lines are text: ``head -n 3 model.sap`` shows kind, meta and arrays.

The checksums guard against accidental damage (disks, copies, interrupted transfers), not
against deliberate tampering: anyone can rewrite a file with matching checksums.

Versions: a file newer than ``FORMAT_VERSION`` is refused with a clear message. Older
versions pass through ``_MANIFEST_UPGRADES`` (version v -> function giving the v+1 form),
empty while 1 is the only version. The opening line and the ``version N`` start of the
header line never change. What a learner keeps in ``meta`` is that learner's business; it
should carry its own schema number there.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import os
import re
import sys
from collections.abc import Callable
from typing import IO, Any

import numpy as np

from stream.errors import ModelFileError, NewerFileError

from .atomic import atomic_writer

MAGIC = b"SAPWOOD-STATE\n"
FORMAT_VERSION = 1

_HEADER = re.compile(rb"version (\d{1,9}) manifest (\d{1,15}) sha256 ([0-9a-f]{64})\n\Z")
_MAX_HEADER = 128
_DTYPES = (
    "bool",
    "int8", "int16", "int32", "int64",
    "uint8", "uint16", "uint32", "uint64",
    "float16", "float32", "float64",
    "complex64", "complex128",
)

_MANIFEST_UPGRADES: dict[int, Callable[[dict], dict]] = {}
"""Format version v -> function turning a version-v manifest into the version v+1 form."""


@dataclasses.dataclass(frozen=True)
class _Entry:
    name: str
    dtype: str
    shape: tuple[int, ...]
    order: str
    offset: int
    nbytes: int
    sha256: str


@dataclasses.dataclass(frozen=True)
class _Layout:
    version: int
    kind: str
    meta: dict
    entries: list[_Entry]
    data_start: int
    size: int


def write_model_file(path: str | os.PathLike, kind: str, meta: dict,
                     arrays: dict[str, np.ndarray],
                     before_replace: Callable[[], None] | None = None) -> None:
    """Write a learner's state to ``path`` atomically.

    Parameters
    ----------
    path
        Target file; replaced only once the new file is complete.
    kind
        What the state belongs to (e.g. ``"hoeffding-classifier"``); checked on reading.
    meta
        JSON values only (str keys, no NaN/inf, lists not tuples), so that what is read
        back equals what was written.
    arrays
        Name -> plain numpy array (or numpy scalar, stored 0-d) of a bool, integer,
        float or complex dtype.
    before_replace
        Called just before the new file replaces ``path`` (see
        :func:`stream.run.atomic.write_atomic`).

    Raises
    ------
    ModelFileError
        If ``kind``, ``meta`` or an array cannot be stored; nothing is written then.
    """
    name = os.fspath(path)
    if not isinstance(kind, str) or not kind:
        raise _refused(name, f"kind must be a non-empty string, got {kind!r}")
    if not isinstance(meta, dict):
        raise _refused(name, f"meta must be a dict, got {type(meta).__name__}")
    problem = json_problem(meta, "meta", exact=True)
    if problem:
        raise _refused(name, problem)
    if not isinstance(arrays, dict):
        raise _refused(name, f"arrays must be a dict, got {type(arrays).__name__}")

    entries, blocks, offset = [], [], 0
    for key, value in arrays.items():
        array, order, block = _array_bytes(name, key, value)
        entries.append({
            "name": key, "dtype": array.dtype.name, "shape": list(array.shape), "order": order,
            "offset": offset, "nbytes": block.nbytes, "sha256": hashlib.sha256(block).hexdigest(),
        })
        blocks.append(block)
        offset += block.nbytes
    manifest = json.dumps({"kind": kind, "meta": meta, "arrays": entries}, ensure_ascii=False,
                          allow_nan=False, separators=(",", ":")).encode("utf-8")
    header = (f"version {FORMAT_VERSION} manifest {len(manifest)} "
              f"sha256 {hashlib.sha256(manifest).hexdigest()}\n").encode("ascii")
    with atomic_writer(path, "wb", before_replace) as out:
        out.write(MAGIC)
        out.write(header)
        out.write(manifest)
        out.write(b"\n")
        for block in blocks:
            out.write(block)


def read_model_file(path: str | os.PathLike,
                    expect_kind: str | None = None) -> tuple[dict, dict[str, np.ndarray]]:
    """Read and verify a state file; return ``(meta, arrays)``.

    Parameters
    ----------
    path
        A file written by :func:`write_model_file`.
    expect_kind
        If given, a file of another kind is refused.

    Returns
    -------
    meta, arrays
        ``arrays`` are writable numpy arrays in native byte order, each over its own
        buffer, with the dtype, shape and memory order they were written with.

    Raises
    ------
    ModelFileError
        Missing, foreign, truncated, corrupt (any checksum), newer format or wrong kind;
        the message names the file and what is wrong.
    """
    name = os.fspath(path)
    with _open(name) as handle:
        try:
            layout = _read_layout(handle, name)
            if expect_kind is not None and layout.kind != expect_kind:
                raise ModelFileError(
                    f"{name!r} holds a {layout.kind!r} state, expected {expect_kind!r}")
            arrays = {entry.name: _read_array(handle, name, layout.data_start, entry)
                      for entry in layout.entries}
        except OSError as exc:
            raise ModelFileError(f"{name!r} cannot be read: {exc.strerror or exc}") from exc
    return layout.meta, arrays


def describe_model_file(path: str | os.PathLike) -> dict[str, Any]:
    """Summarise a state file without loading its arrays.

    The header, the manifest checksum and the file size are verified; the array
    checksums are not (that needs every byte, use :func:`read_model_file`).

    Returns
    -------
    dict
        ``path``, ``kind``, ``version`` (as written), ``meta``, ``bytes`` (file size) and
        ``arrays``: name -> ``{"dtype", "shape", "order", "nbytes"}``.
    """
    name = os.fspath(path)
    with _open(name) as handle:
        try:
            layout = _read_layout(handle, name)
        except OSError as exc:
            raise ModelFileError(f"{name!r} cannot be read: {exc.strerror or exc}") from exc
    return {
        "path": name, "kind": layout.kind, "version": layout.version, "meta": layout.meta,
        "bytes": layout.size,
        "arrays": {e.name: {"dtype": e.dtype, "shape": e.shape, "order": e.order,
                            "nbytes": e.nbytes} for e in layout.entries},
    }


def json_problem(value: Any, where: str, exact: bool = False) -> str | None:
    """Describe the first part of ``value`` that JSON cannot hold, or return None.

    Parameters
    ----------
    value
        The object to be written as JSON.
    where
        How to name ``value`` in the message, e.g. ``"meta"``.
    exact
        Also refuse what JSON would change on the way back (tuples come back as lists).

    Examples
    --------
    >>> json_problem({"kappa": float("nan")}, "payload")
    "payload['kappa'] is nan; JSON has no NaN or infinity (use None)"
    """
    if value is None or isinstance(value, (str, bool, int)):
        return None
    if isinstance(value, float):
        if math.isfinite(value):
            return None
        return f"{where} is {value!r}; JSON has no NaN or infinity (use None)"
    if isinstance(value, dict):
        for key, item in value.items():
            if not isinstance(key, str):
                return f"{where} has key {key!r}; JSON keys must be strings"
            problem = json_problem(item, f"{where}[{key!r}]", exact)
            if problem:
                return problem
        return None
    if isinstance(value, tuple) and exact:
        return f"{where} is a tuple, which would be read back as a list; store a list"
    if isinstance(value, (list, tuple)):
        for index, item in enumerate(value):
            problem = json_problem(item, f"{where}[{index}]", exact)
            if problem:
                return problem
        return None
    return f"{where} is of type {type(value).__name__}, which JSON cannot hold"


def _refused(file: str, why: str) -> ModelFileError:
    return ModelFileError(f"cannot write {file!r}: {why}")


def _array_bytes(file: str, key: Any, value: Any) -> tuple[np.ndarray, str, np.ndarray]:
    """Validate one array; return it, its memory order and its bytes as flat uint8."""
    if not isinstance(key, str) or not key:
        raise _refused(file, f"array names must be non-empty strings, got {key!r}")
    if isinstance(value, np.generic):
        value = np.asarray(value)  # a numpy scalar is stored as a 0-d array
    if type(value) is not np.ndarray:
        hint = (" (store its data and mask as two arrays)"
                if isinstance(value, np.ma.MaskedArray) else "")
        raise _refused(file, f"array {key!r} is a {type(value).__name__}, "
                             f"not a plain numpy array{hint}")
    dtype = value.dtype
    if dtype.name not in _DTYPES:
        if dtype.kind == "O":
            hint = " (object arrays would need pickle, which sapwood never uses)"
        elif dtype.kind in "fc":
            hint = " (extended precision is laid out differently on different machines)"
        else:
            hint = ""
        raise _refused(file, f"array {key!r} has dtype {dtype}; only bool, integer, float "
                             f"and complex arrays can be stored{hint}")
    if dtype.byteorder == ">" or (dtype.byteorder == "=" and sys.byteorder == "big"):
        value = value.astype(dtype.newbyteorder("<"))
    if value.ndim > 1 and value.flags.f_contiguous and not value.flags.c_contiguous:
        order, run = "F", value.T  # the transpose is C-contiguous over the same bytes
    else:
        order, run = "C", np.ascontiguousarray(value)
    return value, order, run.reshape(-1).view(np.uint8)


def _open(name: str) -> IO[bytes]:
    try:
        return open(name, "rb")
    except FileNotFoundError:
        raise ModelFileError(f"{name!r} does not exist") from None
    except IsADirectoryError:
        raise ModelFileError(f"{name!r} is a directory, not a sapwood state file") from None
    except OSError as exc:
        raise ModelFileError(f"{name!r} cannot be read: {exc.strerror or exc}") from exc


def _corrupt(name: str, what: str) -> ModelFileError:
    return ModelFileError(f"{name!r} is corrupt: {what}")


def _truncated(name: str, what: str) -> ModelFileError:
    return ModelFileError(f"{name!r} is truncated: {what}")


def _read_layout(handle: IO[bytes], name: str) -> _Layout:
    """Check opening line, header, manifest and total size; read no array bytes."""
    size = os.fstat(handle.fileno()).st_size
    opening = handle.read(len(MAGIC))
    if opening != MAGIC:
        if len(opening) < len(MAGIC) and MAGIC.startswith(opening):
            raise _truncated(name, "the file is empty" if not opening
                             else "it ends inside the opening line")
        raise ModelFileError(f"{name!r} is not a sapwood state file "
                             f"(it does not begin with 'SAPWOOD-STATE')")

    line = handle.readline(_MAX_HEADER)
    if not line.endswith(b"\n"):
        if handle.tell() >= size:
            raise _truncated(name, "it ends inside the header line")
        raise _corrupt(name, "the header line is damaged")
    match = _HEADER.match(line)
    if match is None:
        raise _corrupt(name, "the header line is damaged")
    version = int(match.group(1))
    if version > FORMAT_VERSION:
        raise NewerFileError(
            f"{name!r} was written by a newer sapwood (format version {version}; this "
            f"one reads up to {FORMAT_VERSION}); read it with a newer sapwood")
    if version < 1:
        raise _corrupt(name, f"format version {version} does not exist")
    if any(v not in _MANIFEST_UPGRADES for v in range(version, FORMAT_VERSION)):
        raise ModelFileError(f"{name!r} is in format version {version}, which this sapwood "
                             f"no longer reads")

    manifest_size = int(match.group(2))
    data_start = handle.tell() + manifest_size + 1
    if data_start > size:
        raise _truncated(name, f"the manifest needs {manifest_size} bytes, "
                               f"the file ends after {size - handle.tell()}")
    text = handle.read(manifest_size)
    if len(text) != manifest_size:
        raise _truncated(name, "it ends inside the manifest")
    if hashlib.sha256(text).hexdigest() != match.group(3).decode("ascii"):
        raise _corrupt(name, "checksum of the manifest does not match")
    if handle.read(1) != b"\n":
        raise _corrupt(name, "the manifest is not followed by a line break")
    try:
        manifest = json.loads(text.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError):
        raise _corrupt(name, "the manifest is not valid JSON") from None
    for old in range(version, FORMAT_VERSION):
        manifest = _MANIFEST_UPGRADES[old](manifest)

    kind, meta, entries = _parse_manifest(name, manifest)
    needed = sum(entry.nbytes for entry in entries)
    present = size - data_start
    if present < needed:
        raise _truncated(name, f"the arrays need {needed} bytes, only {present} follow "
                               f"the manifest")
    if present > needed:
        raise _corrupt(name, f"{present - needed} unexpected bytes follow the last array")
    return _Layout(version, kind, meta, entries, data_start, size)


def _parse_manifest(name: str, manifest: Any) -> tuple[str, dict, list[_Entry]]:
    """Validate the manifest's structure; sizes are checked with Python ints (no overflow)."""
    if not isinstance(manifest, dict):
        raise _corrupt(name, "the manifest is not a JSON object")
    kind, meta, items = manifest.get("kind"), manifest.get("meta"), manifest.get("arrays")
    if not isinstance(kind, str) or not isinstance(meta, dict) or not isinstance(items, list):
        raise _corrupt(name, "the manifest lacks kind, meta or arrays")
    entries: list[_Entry] = []
    seen: set[str] = set()
    offset = 0
    for index, item in enumerate(items):
        label = (f"array {item['name']!r}" if isinstance(item, dict)
                 and isinstance(item.get("name"), str) else f"array entry {index}")
        if not isinstance(item, dict):
            raise _corrupt(name, f"{label} of the manifest is not an object")
        array_name, dtype, shape = item.get("name"), item.get("dtype"), item.get("shape")
        if not isinstance(array_name, str) or not array_name or array_name in seen:
            raise _corrupt(name, f"{label} has a missing or repeated name")
        if dtype not in _DTYPES:
            raise _corrupt(name, f"{label} has unknown dtype {dtype!r}")
        if not isinstance(shape, list) or not all(_is_count(n) for n in shape):
            raise _corrupt(name, f"{label} has an invalid shape {shape!r}")
        if item.get("order") not in ("C", "F"):
            raise _corrupt(name, f"{label} has an invalid order {item.get('order')!r}")
        nbytes = math.prod(shape) * np.dtype(dtype).itemsize
        if item.get("nbytes") != nbytes or type(item.get("nbytes")) is not int:
            raise _corrupt(name, f"{label}: shape {shape} of {dtype} needs {nbytes} bytes, "
                                 f"the manifest says {item.get('nbytes')!r}")
        if item.get("offset") != offset or type(item.get("offset")) is not int:
            raise _corrupt(name, f"{label} starts at {item.get('offset')!r}, expected {offset}")
        digest = item.get("sha256")
        if not isinstance(digest, str) or re.fullmatch("[0-9a-f]{64}", digest) is None:
            raise _corrupt(name, f"{label} has no valid checksum")
        entries.append(_Entry(array_name, dtype, tuple(shape), item["order"], offset,
                              nbytes, digest))
        seen.add(array_name)
        offset += nbytes
    return kind, meta, entries


def _is_count(value: Any) -> bool:
    return type(value) is int and value >= 0


def _read_array(handle: IO[bytes], name: str, data_start: int, entry: _Entry) -> np.ndarray:
    # Sizes were checked against the file size before this point, so the allocation
    # below is bounded by the file.
    handle.seek(data_start + entry.offset)
    buffer = bytearray(entry.nbytes)
    view, filled = memoryview(buffer), 0
    while filled < entry.nbytes:
        got = handle.readinto(view[filled:])
        if not got:
            raise _truncated(name, f"it ends inside array {entry.name!r}")
        filled += got
    if hashlib.sha256(buffer).hexdigest() != entry.sha256:
        raise _corrupt(name, f"checksum of array {entry.name!r} does not match")
    stored = np.dtype(entry.dtype).newbyteorder("<")
    array = np.frombuffer(buffer, dtype=stored).reshape(entry.shape, order=entry.order)
    if not stored.isnative:
        array = array.byteswap(inplace=True).view(stored.newbyteorder("="))
    return array
