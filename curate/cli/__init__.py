"""The ``curate`` command line: a thin shell over :mod:`curate.api` (typer; printing via rich).

``app`` holds the commands, ``options`` the option groups several commands share, ``main`` maps
every user error to one line on stderr and exit code 2.
"""

from __future__ import annotations

from curate.cli.app import app, main

__all__ = ["app", "main"]
