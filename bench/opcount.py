"""Benchmark: Python bytecode the tracker runs per fix, by function, and its fix log's size.

Run: ``PYTHONPATH=<tree> .venv/bin/python bench/opcount.py [--extract helsinki]
[--drives 2] [--duration 600] [--top 40]``

Timing on this machine drifts by a third within minutes and A/B runs of a change of a
per cent or two disagree from run to run (``bench/ab.py``, docs/measured.md). This
counts instead what does not drift: the bytecode instructions the interpreter executes
in ``Tracker.update`` / ``flush`` (``sys.settrace`` with ``f_trace_opcodes``; compiled
kernels run no bytecode and count nothing), per fix and by function, for the same
seeded 1 Hz drives as ``bench/ab.py`` (seed [2009, 5]). Two trees compare by running
this once with each on ``PYTHONPATH``. An instruction is not a unit of time (a call or
a C function such as ``struct.pack`` is one or a few instructions that cost more), so
read a difference as where the Python work moved, not as microseconds.

Also reported, from an untraced second pass over the same drives: the fix log's rows
held and in use (``Tracker.fix_xy``, ``fix_n``), the mean over every fix.
"""

from __future__ import annotations

import argparse
import collections
import sys
from pathlib import Path
from types import FrameType
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--extract", default="helsinki")
    ap.add_argument("--drives", type=int, default=2)
    ap.add_argument("--duration", type=float, default=600.0, help="seconds per drive")
    ap.add_argument("--top", type=int, default=40, help="functions listed")
    args = ap.parse_args()

    from _drives import drive_fixes, load_extract

    from livematch.core.candidates import warm_up
    from livematch.core.settings import MatchSettings
    from livematch.core.tracker import Tracker

    net = load_extract(args.extract)
    runs = drive_fixes(net, args.drives, args.duration, [2009, 5])
    warm_up()
    counts: collections.Counter[str] = collections.Counter()

    def tracer(frame: FrameType, event: str, arg: Any) -> Any:
        frame.f_trace_opcodes = True
        if event == "opcode":
            code = frame.f_code
            counts[f"{code.co_name} ({Path(code.co_filename).name})"] += 1
        return tracer

    fixes_n = rows = used = 0
    for fixes in runs:
        tracker = Tracker(net, fixes[0].vehicle, MatchSettings())
        sys.settrace(tracer)
        for fix in fixes:
            tracker.update(fix)
        tracker.flush()
        sys.settrace(None)
        fixes_n += len(fixes)
    for fixes in runs:
        tracker = Tracker(net, fixes[0].vehicle, MatchSettings())
        for fix in fixes:
            tracker.update(fix)
            rows += len(tracker.fix_xy)
            used += tracker.fix_n
    total = sum(counts.values())
    print(f"{args.extract}, {len(runs)} drives x {args.duration:g} s at 1 Hz, {fixes_n} "
          f"fixes: {total / fixes_n:.1f} bytecode instructions a fix; fix log "
          f"{rows / fixes_n:.1f} rows held, {used / fixes_n:.1f} in use (means over fixes)")
    for name, c in counts.most_common(args.top):
        print(f"{c / fixes_n:9.1f}  {name}")


if __name__ == "__main__":
    main()
