"""The ``treewise`` command line and the demo it runs; ``main`` is the console entry point."""

from __future__ import annotations

from treewise.cli.commands import main

__all__ = ["main"]
