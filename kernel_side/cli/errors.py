"""The one error type subcommands raise to report a failure."""
from __future__ import annotations


class CommandError(Exception):
    """A failure to report as one line on stderr with a non-zero exit code."""
