"""The lab's command-line flags on ``livematch replay`` (light: no heavy imports here).

See :mod:`livematch.lab.run` for what each flag does; :func:`run_lab` there runs it.
"""

from __future__ import annotations

import argparse

__all__ = ["DEFAULT_VEHICLES", "add_lab_arguments", "lab_wanted"]

#: How many vehicles the report shows when none are asked for.
DEFAULT_VEHICLES = 3


def add_lab_arguments(parser: argparse.ArgumentParser) -> None:
    """Add ``--truth``, ``--report``, ``--vehicles``, ``--speed``, ``--publish``."""
    parser.add_argument("--truth", metavar="FILE",
                        help="truth file (simulator or demo JSON Lines): adds accuracy and "
                             "alert detection to the comparison table")
    parser.add_argument("--report", action="store_true",
                        help="write DIR/report.html: table, maps and timelines (offline)")
    parser.add_argument("--vehicles", metavar="A,B",
                        help=f"vehicles shown in the report (default: the first "
                             f"{DEFAULT_VEHICLES})")
    parser.add_argument("--speed", type=float, metavar="X",
                        help="pace by the log's receive times, X times real time "
                             "(default: as fast as possible)")
    parser.add_argument("--publish", metavar="URL",
                        help="publish the log to mqtt://HOST[:PORT] (original topics, QoS 1) "
                             "instead of matching it")


def lab_wanted(args: argparse.Namespace) -> bool:
    """Whether the arguments ask for more than a plain replay."""
    return bool(len(args.config or []) > 1 or args.truth or args.report or args.vehicles
                or args.speed is not None or args.publish)
