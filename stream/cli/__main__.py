"""``python -m stream.cli``: the ``sapwood`` command."""

from .main import main

main()
