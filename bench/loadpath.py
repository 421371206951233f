"""Benchmark: the daemon's per-message path on the load bench's own feed, without a broker.

Run: ``.venv/bin/python bench/loadpath.py [--vehicles 500] [--seconds 10] [--warm-feed 0]
[--rounds 3] [--cprofile FILE] [--no-gc]``

``bench/load.py --cpu-per-fix`` reports the CPU time of the daemon's thread inside
``Pipeline.handle`` per fix (its probe: ``time.thread_time`` around each call, summed and
divided by the fixes: a *mean*). This script replays the same feed through the same
pipeline in one process, so the cost can be split and profiled:

- the pipeline is built as ``livematch run`` builds it (``build_pipeline``) from the
  configuration ``bench/load.py`` writes for ``livematch-1`` (``daemon_config``: the demo
  town ``replay_logs/larkmoor.geojson``, no routes, no fences, default settings);
- the feed is ``bench/load.py``'s: its pool (``make_pool``: 200 simulated drives on the
  demo town, seeds [77, i]), vehicle i driving pool drive i % 200 from second i // 200,
  ``--vehicles`` vehicles at 1 Hz spread evenly over each second, the generator's JSON
  payload, each vehicle on ``fleet/<vehicle>/position``; ``--warm-feed`` seconds first
  (not timed, as ``bench/load.py --warm-feed``), then ``--seconds`` timed seconds;
- every round starts a fresh pipeline (a fresh daemon per step in the load bench), after
  16 probe vehicles sent 3 fixes each (its warm-up);
- each ``handle`` call is timed with ``time.thread_time_ns`` (as the probe does) and
  ``time.perf_counter_ns``; reported: mean and median CPU µs per fix, by the fix's place
  in its vehicle's feed (1st, 2nd, ... since the vehicle's first fix), the share of the
  total each place takes, and the garbage collections that ran inside ``handle`` (their
  pause is part of the call's thread time). ``--no-gc`` runs the timed part with the
  collector off (what collection costs per fix); ``--cprofile FILE`` profiles one
  extra round (the profiler's own cost makes its times relative only).

Results: a Markdown report on stdout and in ``bench/results/loadpath.md`` (``--name``).
"""

from __future__ import annotations

import argparse
import cProfile
import gc
import json
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import load  # bench/load.py: the pool, its positions, the daemon's configuration

from livematch.native import describe

ROOT = Path(__file__).resolve().parent.parent
T0 = 1_800_000_000.0  # the epoch second the feed starts (any recent time)


def build(folder: Path) -> Any:
    """The pipeline ``livematch run`` builds from ``bench/load.py``'s livematch-1 config."""
    from livematch.commands.run import build_pipeline
    from livematch.config import load_config

    cfg = load.daemon_config(folder, 1883, "memory://", "w0", "")
    return build_pipeline(load_config(cfg))


def feed(pool: Any, vehicles: int, first_s: int, seconds: int
         ) -> list[tuple[float, str, bytes, int]]:
    """(receive time, topic, payload, place of the fix in its vehicle's feed), in order."""
    out = []
    for k in range(first_s, first_s + seconds):
        for i in range(vehicles):
            t = T0 + k + i / vehicles
            lon, lat = load.position(pool, i, k)
            payload = (f'{{"vehicle":"v{i}","time":{t:.3f},"lat":{lat:.7f},'
                       f'"lon":{lon:.7f},"accuracy":5.0}}').encode()
            out.append((t + 0.004, f"fleet/v{i}/position", payload, k))
    return out


def probes(pool: Any) -> list[tuple[float, str, bytes, int]]:
    """The load bench's warm-up: 16 probe vehicles, 3 fixes each, before the feed."""
    out = []
    for k in range(3):
        for p in range(load.PROBES):
            lon, lat = load.position(pool, load.POOL_DRIVES - 1 - p, k)
            t = T0 - 100 + k * 0.5
            payload = json.dumps({"vehicle": f"probe{p}", "time": round(t, 3), "lat": lat,
                                  "lon": lon, "accuracy": 5.0}).encode()
            out.append((t, f"fleet/probe{p}/position", payload, k))
    return out


def one_round(folder: Path, pool: Any, args: argparse.Namespace,
              profiler: cProfile.Profile | None = None) -> dict[str, Any]:
    pipeline = build(folder)
    for at, topic, payload, _k in probes(pool):
        pipeline.handle(topic, payload, at)
    for at, topic, payload, _k in feed(pool, args.vehicles, 0, args.warm_feed):
        pipeline.handle(topic, payload, at)
    timed = feed(pool, args.vehicles, args.warm_feed, args.seconds)
    collections: list[tuple[int, float]] = []
    started = [0]

    def on_gc(phase: str, info: dict[str, int]) -> None:
        if phase == "start":
            started[0] = time.thread_time_ns()
        else:
            collections.append((info["generation"], (time.thread_time_ns() - started[0]) / 1e3))

    cpu = np.empty(len(timed))
    wall = np.empty(len(timed))
    places = np.array([k for *_r, k in timed])
    handle = pipeline.handle
    outputs = 0
    # --pollute: read this many KB between calls, untimed (caches as cold as after the
    # daemon's own shell code and other processes ran between two messages)
    dirt = np.ones(args.pollute * 128) if args.pollute else None
    every = max(1, args.pollute_every)
    gc.collect()
    if args.no_gc:
        gc.disable()
    gc.callbacks.append(on_gc)
    if profiler is not None:
        profiler.enable()
    try:
        for j, (at, topic, payload, _k) in enumerate(timed):
            if dirt is not None and j % every == 0:
                dirt.sum()
            c0 = time.thread_time_ns()
            w0 = time.perf_counter_ns()
            outputs += len(handle(topic, payload, at))
            wall[j] = time.perf_counter_ns() - w0
            cpu[j] = time.thread_time_ns() - c0
    finally:
        if profiler is not None:
            profiler.disable()
        gc.callbacks.remove(on_gc)
        gc.enable()
    cpu /= 1e3
    wall /= 1e3
    by_place = {}
    for k in range(args.warm_feed, args.warm_feed + args.seconds):
        sel = cpu[places == k]
        by_place[k + 1] = {"mean": float(sel.mean()), "median": float(np.median(sel)),
                           "p99": float(np.percentile(sel, 99)),
                           "share": float(sel.sum() / cpu.sum())}
    return {
        "fixes": len(timed), "outputs_per_fix": outputs / len(timed),
        "cpu_mean": float(cpu.mean()), "cpu_median": float(np.median(cpu)),
        "cpu_p99": float(np.percentile(cpu, 99)),
        "wall_mean": float(wall.mean()), "wall_median": float(np.median(wall)),
        "top1pct_share": float(np.sort(cpu)[-len(cpu) // 100:].sum() / cpu.sum()),
        "gc": {g: [sum(1 for c in collections if c[0] == g),
                   sum(c[1] for c in collections if c[0] == g) / len(timed)]
               for g in (0, 1, 2)},
        "by_place": by_place,
        "counters": {k: v for k, v in pipeline.counters.items()
                     if not k.startswith("eps_m")},
    }


def render(args: argparse.Namespace, rounds: list[dict[str, Any]], load_avg: str) -> str:
    cmd = " ".join(["bench/loadpath.py", *sys.argv[1:]])
    pure = os.environ.get("LIVEMATCH_PURE_PYTHON", "")
    env = f"LIVEMATCH_PURE_PYTHON={pure} " if pure else ""

    def med(key: str) -> float:
        return statistics.median(r[key] for r in rounds)

    lines = [
        f"# The daemon's Pipeline.handle on the load bench's feed ({describe()})",
        "",
        f"Command: `{env}PYTHONPATH=$PWD .venv/bin/python {cmd}`; load average {load_avg}; "
        f"{len(rounds)} rounds, each a fresh pipeline; {args.vehicles} vehicles at 1 Hz, "
        f"{args.warm_feed} s warm feed (untimed), {args.seconds} s timed "
        f"({rounds[0]['fixes']:,} fixes); collector {'off' if args.no_gc else 'on'}"
        + (f"; {args.pollute} KB of other memory read (untimed) before "
           + ("every call" if args.pollute_every <= 1 else
              f"one call in {args.pollute_every}") if args.pollute else "") + ".",
        "",
        "| round | CPU µs per fix: mean | median | p99 | top 1 % of fixes' share | "
        "wall mean | outputs per fix | gc gen0 / gen1 / gen2: count (µs per fix) |",
        "|---:|---:|---:|---:|---:|---:|---:|---|",
    ]
    for n, r in enumerate(rounds, 1):
        g = r["gc"]
        lines.append(
            f"| {n} | {r['cpu_mean']:.1f} | {r['cpu_median']:.1f} | {r['cpu_p99']:.0f} | "
            f"{r['top1pct_share']:.0%} | {r['wall_mean']:.1f} | {r['outputs_per_fix']:.2f} | "
            + " / ".join(f"{g[k][0]} ({g[k][1]:.1f})" for k in (0, 1, 2)) + " |")
    lines += ["", f"Medians over rounds: mean {med('cpu_mean'):.1f}, median "
              f"{med('cpu_median'):.1f} CPU µs per fix.", "",
              "By the fix's place in its vehicle's feed (medians over rounds):", "",
              "| place | CPU µs mean | median | p99 | share of the total |",
              "|---:|---:|---:|---:|---:|"]
    for k in rounds[0]["by_place"]:
        rows = [r["by_place"][k] for r in rounds]
        lines.append(f"| {k} | " + " | ".join(
            f"{statistics.median(x[f] for x in rows):.1f}" for f in ("mean", "median", "p99"))
            + f" | {statistics.median(x['share'] for x in rows):.1%} |")
    lines += ["", "Counters (last round): " + ", ".join(
        f"{k} {v}" for k, v in sorted(rounds[-1]["counters"].items())) + "."]
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--vehicles", type=int, default=500)
    ap.add_argument("--seconds", type=int, default=10)
    ap.add_argument("--warm-feed", type=int, default=0)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--no-gc", action="store_true")
    ap.add_argument("--pollute", type=int, default=0, metavar="KB",
                    help="read KB kilobytes of other memory before a call (untimed)")
    ap.add_argument("--pollute-every", type=int, default=1, metavar="N",
                    help="with --pollute: before every N-th call only")
    ap.add_argument("--cprofile", default="")
    ap.add_argument("--name", default="loadpath")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"))
    args = ap.parse_args(argv)
    if args.warm_feed + args.seconds > 70:
        ap.error("--warm-feed + --seconds must be at most 70 (as in bench/load.py)")
    load_avg = f"{os.getloadavg()[0]:.2f}"
    with tempfile.TemporaryDirectory(prefix="lm-loadpath-") as tmp:
        folder = Path(tmp)
        pool_path = folder / "pool.npz"
        load.make_pool(pool_path)
        pool = dict(np.load(pool_path))
        rounds = [one_round(folder, pool, args) for _ in range(args.rounds)]
        if args.cprofile:
            profiler = cProfile.Profile()
            one_round(folder, pool, args, profiler)
            profiler.dump_stats(args.cprofile)
    text = render(args, rounds, load_avg)
    print(text)
    out = Path(args.out)
    (out / f"{args.name}.md").write_text(text, encoding="utf-8")
    (out / f"{args.name}.json").write_text(json.dumps(
        {"command": sys.argv, "livematch": describe(), "rounds": rounds}, indent=1),
        encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
