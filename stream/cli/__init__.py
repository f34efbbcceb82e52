"""The ``sapwood`` command: a thin layer over the library.

=======  ===================================================================================
main     the command group, ``learn``, ``score``, ``rules``, ``schema``; ``main`` maps
         exceptions to exit codes
views    the operator-view commands: ``diff``, ``notes``, ``explain``, ``watch``,
         ``report``
=======  ===================================================================================
"""

from .main import cli, main

__all__ = ["cli", "main"]
