"""The ``livematch`` command line: a thin shell that parses arguments and calls the library.

Each command family lives in its own module under :mod:`livematch.commands` and exposes
``register(subparsers)``; that module sets ``func`` on its parser. Errors livematch raises
on purpose (:class:`~livematch.errors.LivematchError`) end in one line on stderr and exit
code 2, never a traceback.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from livematch.errors import LivematchError

# Command modules, in the order ``livematch --help`` lists them.
COMMAND_MODULES = (
    "livematch.commands.network",
    "livematch.commands.replay",
    "livematch.commands.run",
    "livematch.commands.warm",
    "livematch.commands.record",
    "livematch.commands.config",
    "livematch.commands.demo",
)


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser, with every available command family registered."""
    parser = argparse.ArgumentParser(
        prog="livematch",
        description="Live map matching and alerts for vehicle position feeds.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for name in COMMAND_MODULES:
        try:
            module = importlib.import_module(name)
        except ModuleNotFoundError as exc:
            if exc.name == name:  # that command family is not built yet
                continue
            raise
        module.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``livematch`` console script; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        code = args.func(args)
    except LivematchError as exc:
        print(f"livematch: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
    return int(code or 0)


if __name__ == "__main__":
    sys.exit(main())
