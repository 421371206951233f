"""Interleaved A/B of the alert monitors' and the record builder's CPU per fix: two trees.

``bench/ab.py --what pipeline`` times the whole per-message path, three fifths of which
is the tracker; a change to the monitors or the records worth a few per cent of the
path drowns there in this shared machine's noise, and a timer around each call (a
microsecond or more of its own, and preemption) drowns it too. So each tree's worker
(one process per tree, ``PYTHONPATH`` = the tree, as in ``bench/ab.py``) runs the
workload of ``bench/ab.py --what pipeline`` once (the same simulated drives, seed
2009/5, each vehicle's own path as its route, 40 geofences near the drives, a fresh
pipeline per drive; ``bench/speed.py``'s ``warmed_feeds``) and records the calls the
pipeline makes to

- ``VehicleAlerts.set_route`` / ``VehicleAlerts.update``: the route monitor, the fences
  and the off-network monitor of each answered fix, and
- ``RecordBuilder.record``: each published record (assignment, commit, alert),

then, asked for a stage, replays that stage's calls on fresh objects (a fresh
``VehicleAlerts`` per vehicle, a fresh ``RecordBuilder`` per drive) and answers the
replay's CPU time (``time.thread_time_ns``). Stages: ``monitors`` (everything),
``route`` (the fences left out), ``fences`` (no route set), ``records``, and
``parked``: a vehicle parked in each of the 40 fences (at its centre, 600 fixes at 1 Hz,
GPS jitter of 3 m per axis), the fence and off-network monitors only. Both trees
record the same calls (the outputs are the same, ``bench/outputs.py``). The figure to
read is the median over rounds of the ratio new / base per stage, with its quartiles,
and the ratio of each tree's fastest replay (the least disturbed by other processes, as
``timeit`` reads its repeats); the µs per fix are each tree's median.

Usage::

    git worktree add /tmp/base <rev>; ln -s "$PWD/.venv" /tmp/base/.venv
    .venv/bin/python bench/monitors_ab.py --base /tmp/base --new . [--extract helsinki]
        [--reps 30] [--drives 8] [--duration 600]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
STAGES = ("monitors", "route", "fences", "records", "parked")
PARKED_FIXES = 600  # fixes of each parked vehicle (one per fence, 1 Hz)
PARKED_JITTER_M = 3.0  # standard deviation of a parked vehicle's fixes per axis, metres


def worker(extract: str, drives: int, duration: float) -> None:
    """Serve ``<stage>`` on stdin with ``[cpu_ns, fixes]`` on stdout."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from speed import warmed_feeds

    from livematch.core.events import RecordBuilder
    from livematch.core.monitors.vehicle import VehicleAlerts

    by_drive, fresh = warmed_feeds(extract, drives, duration)
    monitor_calls: list[tuple[int, str, tuple[Any, ...]]] = []
    record_calls: list[list[Any]] = []
    set_route, update, record = (VehicleAlerts.set_route, VehicleAlerts.update,
                                 RecordBuilder.record)

    def on_set_route(self: VehicleAlerts, *args: Any) -> bool:
        monitor_calls.append((id(self), "set_route", args))
        return set_route(self, *args)

    def on_update(self: VehicleAlerts, *args: Any) -> Any:
        monitor_calls.append((id(self), "update", args))
        return update(self, *args)

    def on_record(self: RecordBuilder, event: Any) -> Any:
        record_calls[-1].append(event)
        return record(self, event)

    VehicleAlerts.set_route = on_set_route  # type: ignore[method-assign]
    VehicleAlerts.update = on_update  # type: ignore[method-assign]
    RecordBuilder.record = on_record  # type: ignore[method-assign]
    fixes = 0
    network = None
    for feed in by_drive:
        pipe = fresh()
        network = pipe.network
        record_calls.append([])
        for t, topic, payload in feed:
            pipe.handle(topic, payload, t + 0.5)
        pipe.flush()
        fixes += len(feed)
    VehicleAlerts.set_route = set_route  # type: ignore[method-assign]
    VehicleAlerts.update = update  # type: ignore[method-assign]
    RecordBuilder.record = record  # type: ignore[method-assign]
    parked, fences, settings = parked_calls(monitor_calls)
    print("ready", flush=True)
    clock = time.thread_time_ns
    for line in sys.stdin:
        stage = line.strip()
        t0 = clock()
        if stage == "parked":
            for calls in parked:
                alerts = VehicleAlerts()
                for fix in calls:
                    alerts.update(fix, None, True, fences, (), settings)
        elif stage == "records":
            for events in record_calls:
                builder = RecordBuilder(network)  # type: ignore[arg-type]
                for event in events:
                    builder.record(event)
        else:
            held: dict[int, VehicleAlerts] = {}
            for key, name, args in monitor_calls:
                alerts = held.get(key)
                if alerts is None:
                    alerts = held[key] = VehicleAlerts()
                if name == "set_route":
                    if stage != "fences":
                        alerts.set_route(*args)
                elif stage == "route":
                    alerts.update(args[0], args[1], args[2], None, args[4], args[5])
                else:
                    alerts.update(*args)
        print(json.dumps([clock() - t0, PARKED_FIXES * len(parked) if stage == "parked"
                          else fixes]), flush=True)


def parked_calls(monitor_calls: list[tuple[int, str, tuple[Any, ...]]],
                 ) -> tuple[list[list[Any]], Any, Any]:
    """Fixes of vehicles parked in the workload's fences: one per fence, standing at
    its centre for ``PARKED_FIXES`` seconds with GPS jitter (seeded), as a depot's
    vehicles stand; and the fence set and alert settings of the workload."""
    import numpy as np

    from livematch.core.fix import Fix

    args = next(a for _, name, a in monitor_calls if name == "update")
    fences, settings = args[3], args[5]
    rng = np.random.default_rng(3)
    parked = []
    for k, fence in enumerate(fences.fences):
        c = fence.geometry.centroid
        xy = rng.normal(0.0, PARKED_JITTER_M, (PARKED_FIXES, 2)) + np.array([c.x, c.y])
        parked.append([Fix(f"parked-{k}", 1.7e9 + i, 24.9, 60.2, x, y)
                       for i, (x, y) in enumerate(xy.tolist())])
    return parked, fences, settings


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--base", required=True, help="source tree of the base (a checkout)")
    ap.add_argument("--new", default=str(ROOT), help="source tree of the new code")
    ap.add_argument("--extract", default="helsinki")
    ap.add_argument("--reps", type=int, default=30, help="replays of each stage")
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
    pairs: dict[str, list[tuple[list[int], list[int]]]] = {s: [] for s in STAGES}
    for rep in range(args.reps):
        for k, stage in enumerate(STAGES):
            pairs[stage].append(workers.ask_both(stage, (rep + k) % 2 == 0))
    workers.close()
    for stage in STAGES:
        done = pairs[stage]
        q1, med, q3 = statistics.quantiles([b[0] / a[0] for a, b in done if a[0] > 0], n=4)
        fixes = done[0][0][1]
        base = statistics.median(a[0] for a, _ in done) / fixes / 1000.0
        new = statistics.median(b[0] for _, b in done) / fixes / 1000.0
        low = min(b[0] for _, b in done) / min(a[0] for a, _ in done)
        print(f"{args.extract} {stage}: base {base:.2f} µs/fix, new {new:.2f} µs/fix "
              f"(medians); ratio new/base median {med:.3f} (quartiles {q1:.3f}-{q3:.3f}, "
              f"{len(done)} pairs), of the fastest replays {low:.3f}")
    print(f"# load average at the end {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
