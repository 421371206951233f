"""``livematch config check FILE``: validate a daemon configuration and nothing more.

It applies the same rules as ``livematch run`` at start, including the
``LIVEMATCH__SECTION__KEY`` environment overrides, and exits 0 with ``FILE: ok`` or 2
with one line per problem (file or variable, key, what was expected).
"""

from __future__ import annotations

import argparse
from typing import Any

from livematch.config import load_config


def register(subparsers: Any) -> None:
    """Add the ``config`` command family to the CLI."""
    parser = subparsers.add_parser("config", help="validate daemon configuration files")
    sub = parser.add_subparsers(dest="config_command", metavar="SUBCOMMAND")
    sub.required = True
    check = sub.add_parser("check", help="validate a TOML configuration file and exit")
    check.add_argument("file", metavar="FILE", help="configuration file (TOML)")
    check.set_defaults(func=_check)


def _check(args: argparse.Namespace) -> int:
    load_config(args.file)
    print(f"{args.file}: ok")
    return 0
