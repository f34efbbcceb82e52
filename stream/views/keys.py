"""The outputs of a keyed run (``sapwood learn --by FIELD``) seen one key at a time.

A keyed run writes each key's outputs into a folder of its own inside every output
folder, and beside those folders ``keys.json``, the index of keys (see
:mod:`stream.run.keyed`). :func:`path_for_key` turns a path as the user gave it to
``learn`` (``rules/``, ``out/model.sapwood``) into that key's path; :func:`keyed_home`
tells whether a path belongs to a keyed run at all.
"""

from __future__ import annotations

import json
import os

from stream.errors import ConfigError

INDEX_NAME = "keys.json"


def keyed_home(path: str) -> tuple[str, bool] | None:
    """``(folder holding keys.json, whether path is that folder)`` when ``path`` is a
    keyed run's output as given to ``learn`` (the folder itself, or a file name inside
    it); else None."""
    if os.path.isdir(path) and os.path.isfile(os.path.join(path, INDEX_NAME)):
        return path, True
    parent = os.path.dirname(path) or "."
    if not os.path.isdir(path) and os.path.isfile(os.path.join(parent, INDEX_NAME)):
        return parent, False
    return None


def read_index(home: str) -> dict:
    """The index of keys in ``home``, checked for the fields views use."""
    path = os.path.join(home, INDEX_NAME)
    try:
        with open(path, encoding="utf-8") as handle:
            index = json.load(handle)
        keys = index["keys"]
        if not isinstance(keys, list) or not all(
                isinstance(k, dict) and isinstance(k.get("key"), str)
                and isinstance(k.get("folder"), str) for k in keys):
            raise ValueError("'keys' is not a list of {key, folder} entries")
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise ConfigError(f"cannot read the index of keys {path!r}: {exc}") from exc
    return index


def path_for_key(path: str, key: str | None) -> str:
    """``path`` of ``key``. Without a key, a keyed run's path is refused with the list of
    keys (a view shows one tree at a time); other paths are returned as they are."""
    home = keyed_home(path)
    if home is None:
        if key is not None:
            raise ConfigError(f"--key {key!r}: {path!r} is not the output of a run with "
                              f"--by (no {INDEX_NAME} in it or beside it)")
        return path
    folder_path, is_folder = home
    if key is None:
        if not is_folder and os.path.exists(path):
            return path                   # the keyed run's own file (its summary)
        raise ConfigError(f"{path!r} holds one tree per key; name one with --key "
                         f"({keys_listing(read_index(folder_path))})")
    index = read_index(folder_path)
    for entry in index["keys"]:
        if entry["key"] == key:
            inside = os.path.join(folder_path, entry["folder"])
            return inside if is_folder else os.path.join(inside, os.path.basename(path))
    raise ConfigError(f"--key {key!r}: no such key in {os.path.join(folder_path, INDEX_NAME)!r} "
                      f"({keys_listing(index)})")


def keys_listing(index: dict, shown: int = 12) -> str:
    """"7 values of 'line': 1, 2, 3, ..." for messages."""
    keys = [e["key"] for e in index["keys"]]
    listed = ", ".join(repr(k) for k in keys[:shown])
    more = f", ... ({len(keys) - shown:,} more)" if len(keys) > shown else ""
    return f"{len(keys):,} values of {index.get('by')!r}: {listed}{more}"


def keys_table(index: dict) -> str:
    """The index as aligned text: key, records, score, leaves, swaps."""
    regression = index.get("task") == "regression"
    head = ("key", "records", "rmse" if regression else "accuracy", "leaves", "swaps")
    rows = [head]
    for e in index["keys"]:
        score = e.get("rmse") if regression else e.get("accuracy")
        shown = "n/a" if score is None else (f"{score:.4g}" if regression
                                             else f"{100 * score:.1f}%")
        rows.append((e["key"], f"{e.get('records', 0):,}", shown,
                     str(e.get("leaves", "")), str(e.get("swaps", ""))))
    widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
    return "\n".join("  ".join(c.ljust(w) if i == 0 else c.rjust(w)
                               for i, (c, w) in enumerate(zip(r, widths))).rstrip()
                     for r in rows)
