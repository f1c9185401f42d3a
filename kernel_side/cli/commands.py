"""The ``jostle`` command line.

Subcommands live in their own modules; each exposes ``register(subparsers)`` which adds
its parsers and sets ``handler`` (a function ``args -> int`` exit code) as a default.
"""
from __future__ import annotations

import argparse
import importlib
import sys

# Modules that add subcommands; each has register(subparsers).
COMMAND_MODULES: list[str] = ["cli_sweep", "cli_demo"]


class CommandError(Exception):
    """A failure to report as one line on stderr with a non-zero exit code."""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="jostle",
        description="Explore how a Bayesian neural network's posterior predictive holds up under attack.",
    )
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        importlib.import_module(f"jostle.{name}").register(subparsers)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    handler = getattr(args, "handler", None)
    if handler is None:
        parser.print_help()
        return 2
    try:
        return int(handler(args) or 0)
    except CommandError as err:
        print(f"jostle {args.command}: {err}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print(f"jostle {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    # Under `python -m jostle.cli` this file is __main__; subcommand modules raise the
    # CommandError of jostle.cli, so dispatch through that module.
    from jostle.cli.commands import main as _main

    raise SystemExit(_main())
