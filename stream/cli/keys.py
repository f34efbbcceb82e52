"""The outputs of a keyed run in the operator commands: ``--key KEY`` on each view, and
``sapwood keys`` listing the keys."""

from __future__ import annotations

import functools
from typing import Callable

import click

from .output import echo


def key_option(*names: str) -> Callable:
    """``--key KEY``: the command's path parameters ``names`` (a path, a tuple of paths
    or None) are read as that key's, when they are a keyed run's outputs."""
    def decorate(command: Callable) -> Callable:
        @click.option("--key", default=None, metavar="KEY",
                      help="With the outputs of a run with --by: the key whose tree to "
                           "show (see `sapwood keys`).")
        @functools.wraps(command)
        def wrapper(*args, key=None, **kw):
            from stream.views.keys import path_for_key

            for name in names:
                value = kw.get(name)
                if isinstance(value, tuple):
                    kw[name] = tuple(path_for_key(v, key) for v in value)
                elif value is not None:
                    kw[name] = path_for_key(value, key)
            return command(*args, **kw)
        return wrapper
    return decorate


@click.command("keys")
@click.argument("path", metavar="FOLDER")
@click.option("--json", "as_json", is_flag=True, help="The index as JSON.")
def keys(path, as_json) -> None:
    """List the keys of a run with --by: FOLDER is one of its output folders (the
    snapshot folder, or the folder of its summary, model or metrics)."""
    import json
    import os

    from stream.errors import ConfigError
    from stream.views.keys import keyed_home, keys_table, read_index

    home = keyed_home(path if os.path.isdir(path) else os.path.dirname(path) or ".")
    if home is None:
        raise ConfigError(f"{path!r} holds no index of keys (keys.json): it is not an "
                          f"output folder of a run with --by")
    index = read_index(home[0])
    if as_json:
        echo(json.dumps(index, indent=1))
        return
    echo(f"one tree per value of {index.get('by')!r} (target {index.get('target')!r}), "
         f"{len(index['keys']):,} keys")
    echo(keys_table(index))
