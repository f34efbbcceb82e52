"""Run files: a command's options in one reviewed TOML file (``--config FILE``).

Keys are the long option names without their dashes (``grace-period = 100``,
``checkpoint = "line3.ckpt"``); the command's arguments by their name (``sources =
["line3.jsonl"]``); options that repeat take a list (``kind = ["door=category"]``). What
the command line gives overrides the file. A key the command does not know is an error
naming the key and the file. ``--print-config`` shows the settings in force, as a run
file.

A flag set to true in the file cannot be switched off on the command line: edit the file.
"""

from __future__ import annotations

import math
import sys
from typing import Any

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

import click

from stream.errors import ConfigError

from .options import RUN_FILE, GroupedOption


def file_keys(command: click.Command) -> dict[str, click.Parameter]:
    """Run-file key -> parameter, for every parameter a run file may set."""
    keys = {}
    for param in command.params:
        if param.name in ("config", "print_config") or getattr(param, "renamed_to", None):
            continue
        if isinstance(param, click.Option):
            longs = [o for o in param.opts if o.startswith("--")]
            if not longs or param.hidden:
                continue
            keys[longs[0][2:]] = param
        else:
            keys[param.name] = param
    return keys


def read_run_file(path: str, command: click.Command) -> dict[str, Any]:
    """The run file at ``path`` as a ``default_map`` (parameter name -> value)."""
    try:
        with open(path, "rb") as handle:
            data = tomllib.load(handle)
    except OSError as exc:
        raise ConfigError(f"cannot read run file {path!r}: {exc.strerror or exc}") from exc
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"run file {path!r} is not valid TOML: {exc}") from exc
    keys = file_keys(command)
    values = {}
    for key, value in data.items():
        param = keys.get(key)
        if param is None:
            raise ConfigError(f"run file {path!r}: unknown key {key!r}; known keys: "
                              f"{', '.join(sorted(keys))}")
        many = getattr(param, "multiple", False) or param.nargs == -1
        if many and not isinstance(value, list):
            value = [value]
        if isinstance(value, dict) or (not many and isinstance(value, list)):
            raise ConfigError(f"run file {path!r}: key {key!r} takes "
                              f"{'a list' if many else 'one value'}, got {value!r}")
        values[param.name] = value
    return values


def _load(ctx: click.Context, param: click.Parameter, value: str | None) -> None:
    if value:
        ctx.default_map = {**(ctx.default_map or {}), **read_run_file(value, ctx.command)}


def config_options(function):
    """``--config FILE`` (read before the other options) and ``--print-config``."""
    function = click.option("--print-config", is_flag=True, cls=GroupedOption,
                            group=RUN_FILE,
                            help="Print the settings in force as a run file, and stop.")(
        function)
    return click.option("--config", cls=GroupedOption, group=RUN_FILE, is_eager=True,
                        expose_value=False, callback=_load,
                        type=click.Path(dir_okay=False), metavar="FILE",
                        help="Take options from this TOML run file (keys named as the "
                             "long options); the command line overrides it.")(function)


def settings_in_force(ctx: click.Context) -> str:
    """The command's parameters as they stand, as the text of a run file."""
    lines = [f"# sapwood {ctx.info_name}: the settings in force"]
    for key, param in file_keys(ctx.command).items():
        value = ctx.params.get(param.name)
        if value is None or value == () or value is False:
            continue
        lines.append(f"{key} = {toml_value(value)}")
    return "\n".join(lines) + "\n"


def toml_value(value: Any) -> str:
    """One value as TOML: strings quoted, booleans lower-case, lists bracketed."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return "nan" if math.isnan(value) else repr(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    text = str(value)
    escaped = "".join(_ESCAPES.get(c, c if c.isprintable() else f"\\u{ord(c):04x}")
                      for c in text)
    return f'"{escaped}"'


_ESCAPES = {'"': '\\"', "\\": "\\\\", "\n": "\\n", "\t": "\\t", "\r": "\\r"}
