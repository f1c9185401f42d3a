"""The ``jostle`` command line.

Subcommands live in their own modules; each exposes ``register(subparsers)`` which adds
its parsers and sets ``handler`` (a function ``args -> int`` exit code) as a default.
"""
from __future__ import annotations

import argparse
import sys

from jostle.cli import demo, report, sweep
from jostle.cli.errors import CommandError

# Modules that add subcommands; each has register(subparsers).
COMMAND_MODULES = (sweep, demo, report)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="jostle",
        description="Explore how a Bayesian neural network's posterior predictive holds up under attack.",
    )
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for module in COMMAND_MODULES:
        module.register(subparsers)
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

