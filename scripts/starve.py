#!/usr/bin/env python3
"""Run a command starved of CPU, as on a busy machine, to shake out timing-bound tests.

``scripts/starve.py [--run F] [--period S] -- COMMAND...`` starts COMMAND in a process
group of its own and lets that group run for ``F`` of every ``S`` seconds (SIGSTOP, then
SIGCONT), so the command, its threads and every process it starts (mosquitto,
redis-server, a daemon, the demo) see wall time pass several times faster than their
own work, as on a loaded 2-core CI machine. The exit code is the command's.

Unlike CPU burners it loads no one else: other work on the machine (a timing bench)
is not disturbed, and it needs no lock. It is harsher than a real load (a stopped
process answers nothing at all for ``(1 - F) * S`` seconds), so a test that passes
under it waits for events, not for time.

Example (docs/measured.md, "Session 29 (flaky29)")::

    PYTHONPATH=$PWD scripts/starve.py --run 0.1 -- .venv/bin/python -m pytest -q tests/x.py
"""

from __future__ import annotations

import argparse
import os
import signal
import subprocess
import sys
import time


def _signal_group(group: int, sig: signal.Signals) -> bool:
    """Send ``sig`` to the process group; False when it is gone."""
    try:
        os.killpg(group, sig)
    except ProcessLookupError:
        return False
    return True


def starve(command: list[str], run: float, period_s: float) -> int:
    """Run ``command`` for ``run`` of every ``period_s`` seconds until it ends.

    Returns its exit code (128 + the signal's number when a signal ended it).

    Example (degenerate: a command that ends at once)::

        >>> starve([sys.executable, "-c", "raise SystemExit(3)"], 0.5, 0.1)
        3
    """
    proc = subprocess.Popen(command, start_new_session=True)
    group = proc.pid
    stopped = False

    def forward(signum: int, _frame: object) -> None:
        _signal_group(group, signal.SIGCONT)
        _signal_group(group, signal.Signals(signum))

    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, forward)
    try:
        while proc.poll() is None:
            time.sleep(period_s * run)
            stopped = _signal_group(group, signal.SIGSTOP)
            time.sleep(period_s * (1.0 - run))
            if not _signal_group(group, signal.SIGCONT):
                break
            stopped = False
    finally:
        if stopped:
            _signal_group(group, signal.SIGCONT)
    code = proc.wait()
    return 128 - code if code < 0 else code


def main() -> int:
    """The command line: ``--run``, ``--period``, then the command after ``--``."""
    parser = argparse.ArgumentParser(description=(__doc__ or "").split("\n")[0])
    parser.add_argument("--run", type=float, default=0.25,
                        help="share of each period the command runs (0 < F <= 1; 0.25)")
    parser.add_argument("--period", type=float, default=0.1,
                        help="seconds per stop-and-run cycle (0.1)")
    parser.add_argument("command", nargs=argparse.REMAINDER,
                        help="the command, after --")
    args = parser.parse_args()
    command = args.command[1:] if args.command[:1] == ["--"] else args.command
    if not command:
        parser.error("no command given (put it after --)")
    if not 0.0 < args.run <= 1.0 or not args.period > 0.0:
        parser.error(f"--run must be in (0, 1] and --period > 0, got {args.run}, "
                     f"{args.period}")
    return starve(command, args.run, args.period)


if __name__ == "__main__":
    sys.exit(main())
