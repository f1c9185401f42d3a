"""The command line: `jostle demo`, `present`, `fit`, `inspect`, `sweep`."""

from jostle.cli.commands import main

__all__ = ["main"]
