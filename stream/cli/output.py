"""What the command prints: everything passes :func:`stream.shown.for_terminal`, so no
control character from the data reaches the terminal raw (sapwood's own line breaks and
tabs stay)."""

from __future__ import annotations

from typing import Any

import click

from stream.shown import for_terminal


def echo(message: Any = None, **kwargs: Any) -> None:
    """``click.echo`` with control characters of ``message`` escaped."""
    click.echo(None if message is None else for_terminal(str(message)), **kwargs)
