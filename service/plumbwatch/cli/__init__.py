"""The ``plumbwatch`` command."""

from plumbwatch.cli.main import main

__all__ = ["main"]
