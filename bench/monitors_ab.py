"""Interleaved A/B of the alert monitors' and the record builder's CPU per fix: two trees.

``bench/ab.py --what pipeline`` times the whole per-message path, three fifths of which
is the tracker; a change to the monitors or the records of a few per cent of the path
drowns there in this shared machine's noise. This script runs the same workload (the
same simulated drives, seed 2009/5, each vehicle's own path as its route, 40 geofences
near the drives, a fresh pipeline per drive; ``bench/speed.py``'s ``warmed_feeds``) in
one worker process per tree, as ``bench/ab.py`` does, but each worker reports the CPU
time (``time.thread_time_ns``) spent inside three calls only:

- ``VehicleAlerts.update``: the route monitor, the fences and the off-network monitor of
  one answered fix (the route monitor also on its own, ``RouteMonitor.update``),
- ``RecordBuilder.record``: one published record (assignment, commit, alert).

Each is wrapped by a timer in both trees alike (its cost, about a microsecond per call,
is in both figures); the figure to read is the median over drives and rounds of the
per-drive ratio new / base of each, with its quartiles.

Usage::

    git worktree add /tmp/base <rev>; ln -s "$PWD/.venv" /tmp/base/.venv
    .venv/bin/python bench/monitors_ab.py --base /tmp/base --new . [--extract helsinki]
        [--reps 4] [--drives 8] [--duration 600]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
#: (label, module, class, method) of the timed calls.
TIMED = [
    ("monitors", "livematch.core.monitors.vehicle", "VehicleAlerts", "update"),
    ("route", "livematch.core.monitors.route", "RouteMonitor", "update"),
    ("records", "livematch.core.events", "RecordBuilder", "record"),
]


def _timed(method: Callable[..., Any], label: str, spent: dict[str, int]) -> Callable[..., Any]:
    clock = time.thread_time_ns

    def timed(*args: Any) -> Any:
        t0 = clock()
        out = method(*args)
        spent[label] += clock() - t0
        return out

    return timed


def worker(extract: str, drives: int, duration: float) -> None:
    """Serve ``<drive>`` on stdin with ``{label: cpu_ns, "fixes": n}`` on stdout."""
    import importlib

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from speed import warmed_feeds

    by_drive, fresh = warmed_feeds(extract, drives, duration)
    spent = dict.fromkeys((label for label, *_ in TIMED), 0)
    for label, module, cls, name in TIMED:
        owner = getattr(importlib.import_module(module), cls)
        setattr(owner, name, _timed(getattr(owner, name), label, spent))
    print("ready", flush=True)
    for line in sys.stdin:
        feed = by_drive[int(line)]
        pipe = fresh()
        for key in spent:
            spent[key] = 0
        for t, topic, payload in feed:
            pipe.handle(topic, payload, t + 0.5)
        pipe.flush()
        print(json.dumps({**spent, "fixes": len(feed)}), flush=True)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--base", required=True, help="source tree of the base (a checkout)")
    ap.add_argument("--new", default=str(ROOT), help="source tree of the new code")
    ap.add_argument("--extract", default="helsinki")
    ap.add_argument("--reps", type=int, default=4, help="rounds over all drives")
    ap.add_argument("--drives", type=int, default=8)
    ap.add_argument("--duration", type=float, default=600.0, help="seconds per drive")
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        worker(args.extract, args.drives, args.duration)
        return 0
    me = [sys.executable, str(Path(__file__).resolve()), "--base", args.base, "--worker",
          "--extract", args.extract, "--drives", str(args.drives),
          "--duration", str(args.duration)]
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from _pair import WorkerPair

    workers = WorkerPair(me, args.base, args.new)
    print(f"# bench/monitors_ab.py {' '.join(argv if argv is not None else sys.argv[1:])}; "
          f"load average {os.getloadavg()[0]:.2f}")
    pairs = [workers.ask_both(str(k), (rep + k) % 2 == 0)
             for rep in range(args.reps) for k in range(args.drives)]
    workers.close()
    fixes = sum(a["fixes"] for a, _ in pairs)
    for label, *_ in TIMED:
        ratios = sorted(b[label] / a[label] for a, b in pairs if a[label] > 0)
        q1, med, q3 = statistics.quantiles(ratios, n=4)
        base = sum(a[label] for a, _ in pairs) / fixes / 1000.0
        new = sum(b[label] for _, b in pairs) / fixes / 1000.0
        print(f"{args.extract} {label}: base {base:.2f} µs/fix, new {new:.2f} µs/fix (pooled); "
              f"per-drive ratio new/base median {med:.3f} (quartiles {q1:.3f}-{q3:.3f}, "
              f"{len(ratios)} pairs)")
    print(f"# load average at the end {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
