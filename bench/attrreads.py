"""How often the per-fix path reads the plain-Python objects it holds, and what collects.

Run: ``LIVEMATCH_PURE_PYTHON=1 .venv/bin/python bench/attrreads.py [--extract helsinki]``

Compiled with mypyc, a read of a field of a *compiled* class is a load from its struct;
a read of a plain Python object's attribute (the settings classes, the road network, a
msgspec struct) is CPython's generic attribute look-up, and a float read that way is
unboxed too. This counts, on the workload of ``bench/ab.py --what pipeline`` (the same
simulated drives, seed 2009/5, each vehicle's own path as its route, 40 geofences, a
fresh pipeline per drive: ``bench/speed.py``'s ``warmed_feeds``), the attribute reads per
fix on ``MatchSettings`` (as the tracker holds it), ``AlertSettings`` and
``RoadNetwork``, by name. It must run from source (``LIVEMATCH_PURE_PYTHON=1``): it
replaces ``__getattribute__`` on those classes with a counting one, which compiled
callers never go through (and, for ``MatchSettings``, sets a counting subclass as the
pipeline's settings before its first vehicle).

It also reports the cyclic collector's runs during the same timed drives (a callback
on ``gc.callbacks``: count and pause by generation).
"""

from __future__ import annotations

import argparse
import collections
import gc
import os
import sys
import time
from pathlib import Path
from typing import Any


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--extract", default="helsinki")
    ap.add_argument("--top", type=int, default=12)
    args = ap.parse_args(argv)
    if os.environ.get("LIVEMATCH_PURE_PYTHON", "") in ("", "0"):
        print("run with LIVEMATCH_PURE_PYTHON=1 (compiled callers are not counted)")
        return 2
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from speed import warmed_feeds

    from livematch.core.monitors.settings import AlertSettings
    from livematch.core.network import RoadNetwork
    from livematch.core.settings import MatchSettings

    reads: collections.Counter[str] = collections.Counter()

    class CountingSettings(MatchSettings):
        __slots__ = ()

        def __getattribute__(self, name: str) -> Any:
            reads["MatchSettings." + name] += 1
            return object.__getattribute__(self, name)

    by_drive, fresh = warmed_feeds(args.extract, 8, 600.0)
    for cls in (RoadNetwork, AlertSettings):
        def counting(self: Any, name: str, _cls: type = cls,
                     _orig: Any = cls.__getattribute__) -> Any:
            reads[_cls.__name__ + "." + name] += 1
            return _orig(self, name)
        cls.__getattribute__ = counting  # type: ignore[method-assign,assignment]
    pauses: list[tuple[int, float]] = []
    started = [0.0]

    def on_gc(phase: str, info: dict[str, int]) -> None:
        if phase == "start":
            started[0] = time.perf_counter()
        else:
            pauses.append((info["generation"], time.perf_counter() - started[0]))

    fixes = 0
    gc.callbacks.append(on_gc)
    try:
        for feed in by_drive:
            pipe = fresh()
            pipe.settings = CountingSettings()  # before its first vehicle's tracker
            for t, topic, payload in feed:
                pipe.handle(topic, payload, t + 0.5)
            pipe.flush()
            fixes += len(feed)
    finally:
        gc.callbacks.remove(on_gc)
    by_class: collections.Counter[str] = collections.Counter()
    for name, n in reads.items():
        by_class[name.split(".")[0]] += n
    print(f"{args.extract}: {fixes} fixes")
    for cls_name, n in by_class.most_common():
        print(f"  {cls_name}: {n / fixes:.1f} attribute reads per fix")
    for name, n in reads.most_common(args.top):
        print(f"    {n / fixes:5.2f}  {name}")
    gens = collections.Counter(g for g, _ in pauses)
    for g in sorted(gens):
        ms = 1e3 * sum(p for gg, p in pauses if gg == g)
        print(f"  gc generation {g}: {gens[g]} collections, {ms:.1f} ms")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
